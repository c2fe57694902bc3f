"""Window-size limits for PSI, suppressed-cell bounds and self-starting charts.

References used as outside checks: SciPy's chi2/f/t/norm distributions and scipy.stats
ks_2samp (reference library); numpy Monte Carlo of two multinomial samples from one
distribution for the PSI null (Yurdakul 2018's chi-square approximation, recalled from
memory); Hawkins (1987), The Statistician 36:299-316, for the self-starting transform,
written out again below.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from coordinator.monitoring.control_charts import self_starting_cusum, self_starting_z
from coordinator.monitoring.drift import DriftLevel, population_stability_index
from coordinator.monitoring.suppressed_bounds import ks_lower_bound, psi_lower_bound
from coordinator.monitoring.window_null import (
    Dispersion,
    baseline_dispersion,
    label_free_drift,
    psi_limits,
)


def test_psi_limit_holds_its_false_positive_rate_on_two_samples_of_one_distribution() -> None:
    """Monte Carlo: PSI of two multinomial samples from one law exceeds the 1% limit ~1%."""
    rng = np.random.default_rng(11)
    shares = np.array([0.1, 0.2, 0.3, 0.25, 0.15])
    n_ref, n_cur = 750, 60
    _, limit = psi_limits(n_ref, n_cur, 5, shift_alpha=0.01, watch_alpha=0.05)
    psi = [
        population_stability_index(
            rng.multinomial(n_ref, shares), rng.multinomial(n_cur, shares)
        ).psi
        for _ in range(4000)
    ]
    rate = float(np.mean(np.array(psi) >= limit))
    # 4000 draws: a binomial 99.99% band around 0.01 is roughly 0.005 to 0.017.
    assert 0.004 <= rate <= 0.02
    # the fixed rule of thumb (0.25, Siddiqi 2006) alarms far more often on 60-case windows
    assert float(np.mean(np.array(psi) >= 0.25)) < rate or limit < 0.25


def test_psi_limit_shrinks_with_window_size() -> None:
    """(1/n_ref + 1/n_cur) chi2_{0.995}(B-1): smaller windows get wider limits."""
    small = psi_limits(750, 50, 6)[1]
    large = psi_limits(750, 500, 6)[1]
    assert small == pytest.approx((1 / 750 + 1 / 50) * stats.chi2.isf(0.005, 5))
    assert large < small


def test_estimated_dispersion_uses_the_f_quantile() -> None:
    """With phi estimated on df degrees of freedom the limit is phi*scale*(B-1)*F(B-1, df)."""
    d = Dispersion(phi=1.5, df=24.0, windows=6)
    _, limit = psi_limits(700, 120, 5, d)
    assert limit == pytest.approx(1.5 * (1 / 700 + 1 / 120) * 4 * stats.f.isf(0.005, 4, 24))


def test_baseline_dispersion_is_near_one_for_multinomial_windows_and_higher_for_clustered() -> None:
    """Independent windows give phi near 1; windows whose shares wander give phi well above 1."""
    rng = np.random.default_rng(3)
    shares = np.array([0.2, 0.3, 0.3, 0.2])
    plain = baseline_dispersion([rng.multinomial(120, shares).tolist() for _ in range(6)])
    wander = baseline_dispersion(
        [rng.multinomial(120, rng.dirichlet(shares * 15)).tolist() for _ in range(6)]
    )
    assert plain.phi < 1.8 and plain.df == 18
    assert wander.phi > 2.0


def test_bounds_equal_the_plain_statistics_without_suppression() -> None:
    """No missing cases: the PSI bound is PSI, the KS bound is scipy's binned KS distance."""
    ref, cur = [30, 50, 20], [10, 5, 15]
    psi = psi_lower_bound(ref, 100, cur, 30)
    ks = ks_lower_bound(ref, 100, cur, 30)
    assert psi.value == pytest.approx(population_stability_index(ref, cur).psi)
    # scipy.stats.ks_2samp on the bin indices repeated by their counts (reference library)
    expected = stats.ks_2samp(np.repeat([0, 1, 2], ref), np.repeat([0, 1, 2], cur)).statistic
    assert ks.value == pytest.approx(expected)


def test_a_suppressed_cell_is_not_read_as_an_empty_bin() -> None:
    """A window whose middle bin was suppressed (reads 0, 10 cases missing) is not shifted."""
    ref, cur = [250, 250, 250], [40, 0, 40]
    zeroed = population_stability_index(ref, cur).psi
    bound = psi_lower_bound(ref, 750, cur, 90, current_capacity=[0, 10, 0])
    ks = ks_lower_bound(ref, 750, cur, 90, current_capacity=[0, 10, 0])
    assert zeroed > 1.0
    assert bound.value < zeroed
    assert bound.current == pytest.approx((40, 10, 40), abs=1e-3)
    assert ks.value == pytest.approx(abs(1 / 3 - 40 / 90), abs=1e-6)


def test_capacity_limits_where_missing_cases_may_go() -> None:
    """Missing cases may only fill bins with capacity: the bound then stays large."""
    ref, cur = [250, 250, 250], [80, 0, 0]
    free = psi_lower_bound(ref, 750, cur, 240)
    pinned = psi_lower_bound(ref, 750, cur, 240, current_capacity=[160, 0, 0])
    assert free.value < 1e-6
    assert pinned.value > 1.0


def test_label_free_drift_flags_a_real_shift_and_not_noise() -> None:
    """A window drawn from another law reads shifted; one from the baseline law reads not."""
    rng = np.random.default_rng(5)
    base = rng.multinomial(750, [0.1, 0.2, 0.4, 0.2, 0.1]).tolist()
    same = rng.multinomial(120, [0.1, 0.2, 0.4, 0.2, 0.1]).tolist()
    moved = rng.multinomial(120, [0.02, 0.08, 0.3, 0.3, 0.3]).tolist()
    one = Dispersion(1.0, math.inf, 0)
    assert label_free_drift(base, 750, same, 120, one).psi_level is not DriftLevel.SHIFTED
    result = label_free_drift(base, 750, moved, 120, one)
    assert result.psi_level is DriftLevel.SHIFTED and result.ks_level is DriftLevel.SHIFTED


def test_self_starting_z_is_hawkins_transform_written_out() -> None:
    """U_n = Phi^-1(F_{t,n-2}((x_n - mean)/(s*sqrt(1+1/(n-1))))) (Hawkins 1987)."""
    x = np.array([0.81, 0.84, 0.79, 0.83, 0.80, 0.82, 0.74, 0.86])
    u = self_starting_z(x, 6)
    expected = []
    for n in (7, 8):
        prev = x[: n - 1]
        t = (x[n - 1] - prev.mean()) / (prev.std(ddof=1) * math.sqrt(1 + 1 / (n - 1)))
        expected.append(stats.norm.ppf(stats.t.cdf(t, n - 2)))
    assert u == pytest.approx(expected)


def test_self_starting_cusum_in_control_false_alarm_rate_is_that_of_the_table() -> None:
    """On in-control normal windows with a 6-window baseline, lower-side alarms stay rare.

    Hawkins (1987): the U_n are independent N(0, 1), so the one-sided CUSUM with k = 0.5,
    h = 4.77 keeps an in-control ARL near 740 windows (twice Montgomery's two-sided 370,
    recalled from memory); 24 monitored windows then alarm in about 3% of runs.
    """
    rng = np.random.default_rng(17)
    runs = 600
    alarmed = sum(
        bool(self_starting_cusum(rng.normal(0.85, 0.03, 30), 6, side="lower").alarms)
        for _ in range(runs)
    )
    assert alarmed / runs < 0.08


def test_self_starting_cusum_catches_a_large_fall() -> None:
    """A sustained fall of 5 SDs from window 7 on gives U < -2 at once and alarms in 7 windows.

    Slower than a chart with known in-control values: each shifted window joins the
    running mean and SD and absorbs part of the shift (the price Hawkins 1987 names for
    not knowing the in-control values).
    """
    rng = np.random.default_rng(2)
    x = rng.normal(0.85, 0.02, 20)
    x[6:] -= 0.10
    result = self_starting_cusum(x, 6, side="lower")
    assert self_starting_z(x, 6)[0] < -2.0
    assert result.first_alarm is not None and result.first_alarm <= 6
