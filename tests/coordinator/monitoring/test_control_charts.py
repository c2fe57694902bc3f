"""Tests of CUSUM and EWMA charts against published average-run-length tables."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import norm

from coordinator.monitoring.control_charts import (
    DEFAULT_CUSUM_H,
    DEFAULT_EWMA_LAMBDA,
    DEFAULT_EWMA_WIDTH,
    cusum_chart,
    cusum_chart_proportion,
    cusum_decision_interval,
    ewma_chart,
    ewma_chart_proportion,
    siegmund_arl,
)
from site_agent.exceptions import InputError

# Montgomery DC (2009), Introduction to Statistical Quality Control 6th ed., table "ARL
# performance of the tabular CUSUM with k = 1/2 and h = 4 or h = 5";
# recalled from memory: shift in σ units -> (ARL at h = 4, ARL at h = 5).
CUSUM_TABLE = {0.0: (168.0, 465.0), 0.5: (26.6, 38.0), 1.0: (8.38, 10.4), 2.0: (3.34, 4.01)}

# Lucas & Saccucci (1990) Technometrics 32:1-12, as tabulated in Montgomery (2009)
# Table 9.11: λ = 0.10, L = 2.814 gives in-control ARL 500; recalled from memory.
EWMA_TABLE_ARL0 = 500.0


def _run_lengths(alarms: tuple[int, ...]) -> np.ndarray:
    """Run lengths between restarts: the chart restarts from zero after every alarm."""
    ends = np.asarray(alarms) + 1
    return np.diff(np.concatenate([[0], ends]))


def _markov_cusum_arl(k: float, h: float, shift: float, states: int = 150) -> float:
    """One-sided CUSUM ARL by the Brook & Evans (1972, Biometrika 59:539) Markov chain."""
    w = 2 * h / (2 * states - 1)
    centres = np.concatenate([[0.0], np.arange(1, states) * w])
    upper_edges = np.concatenate([[w / 2], centres[1:] + w / 2])
    lower_edges = np.concatenate([[-np.inf], centres[1:] - w / 2])
    drift = centres[:, None] - k + shift
    p = norm.cdf(upper_edges[None, :] - drift) - norm.cdf(lower_edges[None, :] - drift)
    return float(np.linalg.solve(np.eye(states) - p, np.ones(states))[0])


def _markov_ewma_arl(lam: float, width: float, states: int = 301) -> float:
    """Two-sided EWMA in-control ARL by the Lucas & Saccucci (1990) Markov chain."""
    limit = width * math.sqrt(lam / (2 - lam))
    w = 2 * limit / states
    centres = -limit + w * (np.arange(states) + 0.5)
    start = (1 - lam) * centres[:, None]
    p = norm.cdf((centres[None, :] + w / 2 - start) / lam) - norm.cdf(
        (centres[None, :] - w / 2 - start) / lam
    )
    return float(np.linalg.solve(np.eye(states) - p, np.ones(states))[states // 2])


@pytest.mark.parametrize(("h", "column"), [(4.0, 0), (5.0, 1)])
def test_recalled_cusum_table_agrees_with_brook_evans_markov_chain(h: float, column: int) -> None:
    """The recalled CUSUM table values agree with a Brook–Evans Markov chain computed here."""
    for shift, row in CUSUM_TABLE.items():
        two_sided = 1 / (
            1 / _markov_cusum_arl(0.5, h, shift) + 1 / _markov_cusum_arl(0.5, h, -shift)
        )
        assert two_sided == pytest.approx(row[column], rel=0.03)


def test_recalled_ewma_table_agrees_with_markov_chain() -> None:
    """λ = 0.1, L = 2.814 gives ARL0 ≈ 500 by the Markov chain; L = 2.7 gives about 370."""
    assert _markov_ewma_arl(0.1, 2.814) == pytest.approx(EWMA_TABLE_ARL0, rel=0.01)
    assert _markov_ewma_arl(0.1, 2.7) == pytest.approx(370.0, rel=0.02)


@pytest.mark.parametrize(
    ("h", "table_arl0", "windows"), [(4.0, 168.0, 400_000), (5.0, 465.0, 900_000)]
)
def test_cusum_in_control_arl_matches_published_table(
    h: float, table_arl0: float, windows: int
) -> None:
    """Monte Carlo in-control ARL of the k = 0.5 CUSUM matches the table within 4 SE."""
    rng = np.random.default_rng(19540101 + int(h))
    z = rng.standard_normal(windows)

    result = cusum_chart(z, np.ones(windows), target=0.0, k=0.5, h=h)

    runs = _run_lengths(result.alarms)
    standard_error = runs.std(ddof=1) / math.sqrt(runs.size)
    assert runs.size > 1500
    # Montgomery (2009) CUSUM ARL table (recalled from memory): 168 at h = 4, 465 at h = 5.
    assert abs(runs.mean() - table_arl0) < 4 * standard_error


def test_cusum_out_of_control_arl_for_one_sigma_shift_matches_table() -> None:
    """A 1 σ shift is caught after about 8.38 windows at h = 4 (Montgomery table, recalled)."""
    rng = np.random.default_rng(8)
    z = rng.standard_normal(60_000) + 1.0

    result = cusum_chart(z, np.ones(z.size), target=0.0, k=0.5, h=4.0)

    runs = _run_lengths(result.alarms)
    standard_error = runs.std(ddof=1) / math.sqrt(runs.size)
    assert abs(runs.mean() - CUSUM_TABLE[1.0][0]) < 4 * standard_error


def test_ewma_in_control_arl_matches_lucas_saccucci_table() -> None:
    """Monte Carlo in-control ARL of the default EWMA (λ = 0.1, L = 2.814) is about 500."""
    rng = np.random.default_rng(19900101)
    z = rng.standard_normal(1_000_000)

    result = ewma_chart(z, np.ones(z.size), target=0.0)

    runs = _run_lengths(result.alarms)
    standard_error = runs.std(ddof=1) / math.sqrt(runs.size)
    assert (result.lam, result.width) == (DEFAULT_EWMA_LAMBDA, DEFAULT_EWMA_WIDTH)
    # Lucas & Saccucci (1990) via Montgomery (2009) Table 9.11 (recalled from memory): 500.
    assert abs(runs.mean() - EWMA_TABLE_ARL0) < 4 * standard_error


@pytest.mark.parametrize("shift", sorted(CUSUM_TABLE))
def test_siegmund_approximation_is_close_to_published_cusum_table(shift: float) -> None:
    """Siegmund's ARL approximation is within 5 % of the CUSUM table (recalled values)."""
    at_h4, at_h5 = CUSUM_TABLE[shift]

    # Montgomery (2009) §9.1 (recalled from memory); Siegmund (1985) approximation.
    assert siegmund_arl(0.5, 4.0, shift=shift) == pytest.approx(at_h4, rel=0.05)
    assert siegmund_arl(0.5, 5.0, shift=shift) == pytest.approx(at_h5, rel=0.05)


def test_default_decision_interval_gives_in_control_arl_near_370() -> None:
    """Design h = 4.77, k = 0.5 gives ARL0 ≈ 370 (Montgomery 2009 §9.1, recalled from memory)."""
    assert siegmund_arl(0.5, DEFAULT_CUSUM_H) == pytest.approx(370.0, rel=0.01)
    assert cusum_decision_interval(370.0, k=0.5) == pytest.approx(4.77, abs=0.02)
    assert siegmund_arl(0.5, 4.0, side="upper") == pytest.approx(
        2 * siegmund_arl(0.5, 4.0), rel=1e-12
    )


def test_cusum_reproduces_montgomery_example_signal_at_period_29() -> None:
    """Montgomery's CUSUM example (μ0 = 10, σ = 1, k = 0.5, h = 5) signals at period 29."""
    # Montgomery (2009) Example 9.1 data and result (C⁺_29 = 5.28); recalled from memory.
    x = [9.45, 7.99, 9.29, 11.66, 12.16, 10.18, 8.04, 11.46, 9.20, 10.34]
    x += [9.03, 11.47, 10.51, 9.40, 10.08, 9.37, 10.62, 10.31, 8.52, 10.84]
    x += [10.90, 9.33, 12.29, 11.50, 10.60, 11.08, 10.38, 11.62, 11.31, 10.52]

    result = cusum_chart(x, [1.0] * 30, target=10.0, k=0.5, h=5.0)

    assert result.first_alarm == 28  # 0-based index of period 29
    assert result.upper[28] == pytest.approx(5.28, abs=0.005)
    assert result.upper[4] == pytest.approx(2.82, abs=0.005)


def test_binomial_cusum_flags_a_fall_in_sensitivity_on_the_lower_side() -> None:
    """A drop of sensitivity from 0.85 to 0.75 at window 12 alarms on the lower side soon after."""
    rng = np.random.default_rng(3)
    trials = [120] * 24
    rates = [0.85] * 12 + [0.75] * 12
    successes = [int(rng.binomial(n, p)) for n, p in zip(trials, rates, strict=True)]

    result = cusum_chart_proportion(successes, trials, target_rate=0.85, side="lower")

    assert result.first_alarm is not None and 12 <= result.first_alarm <= 15
    assert result.method == "standardized binomial CUSUM"
    # z uses the binomial se at p0 (normal approximation; common practice).
    expected_z = (successes[0] / 120 - 0.85) / math.sqrt(0.85 * 0.15 / 120)
    assert result.z[0] == pytest.approx(expected_z, rel=1e-12)


def test_upper_side_chart_ignores_a_fall() -> None:
    """A one-sided upper chart does not alarm on a sustained fall."""
    result = cusum_chart([-3.0] * 10, [1.0] * 10, target=0.0, side="upper")

    assert result.alarms == ()
    assert result.lower[-1] > DEFAULT_CUSUM_H


def test_window_without_trials_is_skipped_and_keeps_chart_state() -> None:
    """A window with no diseased cases gives NaN z, is listed as skipped and keeps the state."""
    result = ewma_chart_proportion([50, 0, 40], [100, 0, 100], target_rate=0.5)

    assert result.skipped == (1,)
    assert math.isnan(result.z[1])
    assert result.statistic[1] == result.statistic[0]
    assert result.statistic[2] == pytest.approx(0.9 * result.statistic[0] + 0.1 * result.z[2])


def test_chart_restarts_after_an_alarm() -> None:
    """After an alarm the CUSUM restarts from zero, so a persistent shift alarms again."""
    result = cusum_chart([3.0] * 8, [1.0] * 8, target=0.0, k=0.5, h=4.0)

    # C⁺ grows by 2.5 per window: 2.5, 5.0 (alarm, restart), 2.5, 5.0 (alarm) ...
    assert result.alarms == (1, 3, 5, 7)
    assert result.first_alarm == 1
    assert result.upper[:3] == pytest.approx((2.5, 5.0, 2.5))


@pytest.mark.parametrize(
    ("call", "message"),
    [
        (lambda: cusum_chart([1.0, 2.0], [1.0], target=0.0), "same length"),
        (lambda: cusum_chart([1.0], [-1.0], target=0.0), "negative"),
        (lambda: cusum_chart([1.0], [1.0], target=0.0, h=0.0), "h must be"),
        (lambda: cusum_chart_proportion([5], [4], target_rate=0.5), "successes <= trials"),
        (lambda: cusum_chart_proportion([1], [4], target_rate=1.0), "target_rate"),
        (lambda: ewma_chart([1.0], [1.0], target=0.0, lam=0.0), "lam must"),
        (lambda: ewma_chart([1.0], [1.0], target=0.0, side="down"), "side must"),  # type: ignore[arg-type]
        (lambda: cusum_decision_interval(0.5), "arl0 must"),
    ],
)
def test_invalid_chart_input_raises_input_error(call: object, message: str) -> None:
    """Mismatched lengths, negative errors and bad design constants are refused."""
    with pytest.raises(InputError, match=message):
        call()  # type: ignore[operator]
