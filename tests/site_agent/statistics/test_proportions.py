"""Tests of statistics.proportions against Newcombe (1998), statsmodels and derivations."""

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm
from hypothesis import given, settings
from hypothesis import strategies as st
from statsmodels.stats.proportion import proportion_confint

from site_agent.exceptions import InputError
from site_agent.statistics.estimates import Estimate
from site_agent.statistics.proportions import (
    clopper_pearson,
    cluster_moments,
    clustered_proportion,
    clustered_proportion_from_moments,
    design_effect,
    wilson,
)

# Newcombe (1998) Statistics in Medicine 17:857–872, Table I, method 3 (Wilson score
# interval without continuity correction); values recalled from memory, 4 decimals.
NEWCOMBE_WILSON = [
    (81, 263, 0.2553, 0.3662),
    (15, 148, 0.0624, 0.1605),
    (0, 20, 0.0000, 0.1611),
    (1, 29, 0.0061, 0.1718),
    (29, 29, 0.8830, 1.0000),
]
# Newcombe (1998) Table I, method 5 (exact Clopper–Pearson); recalled from memory, only the
# rows recalled with confidence are listed.
NEWCOMBE_EXACT = [
    (0, 20, 0.0000, 0.1684),
    (1, 29, 0.0009, 0.1776),
    (29, 29, 0.8806, 1.0000),
]
CASES = [(81, 263), (15, 148), (0, 20), (1, 29), (29, 29), (0, 10), (5, 5), (3, 7)]


@pytest.mark.parametrize(("x", "n", "lower", "upper"), NEWCOMBE_WILSON)
def test_wilson_matches_newcombe_table_i(x: int, n: int, lower: float, upper: float) -> None:
    """Wilson limits equal Newcombe's Table I to 4 decimals."""
    result = wilson(x, n)
    assert result.lower == pytest.approx(lower, abs=5e-5)
    assert result.upper == pytest.approx(upper, abs=5e-5)
    assert result.estimate == pytest.approx(x / n)
    assert (result.method, result.n) == ("wilson", n)


@pytest.mark.parametrize(("x", "n", "lower", "upper"), NEWCOMBE_EXACT)
def test_clopper_pearson_matches_newcombe_table_i(
    x: int, n: int, lower: float, upper: float
) -> None:
    """Exact limits equal Newcombe's Table I to 4 decimals."""
    result = clopper_pearson(x, n)
    assert result.lower == pytest.approx(lower, abs=5e-5)
    assert result.upper == pytest.approx(upper, abs=5e-5)


@pytest.mark.parametrize("confidence", [0.9, 0.95, 0.99])
@pytest.mark.parametrize(("x", "n"), CASES)
def test_intervals_match_statsmodels_proportion_confint(x: int, n: int, confidence: float) -> None:
    """Wilson and exact limits equal statsmodels proportion_confint (wilson / beta)."""
    alpha = 1 - confidence
    # Reference library: statsmodels.stats.proportion.proportion_confint.
    w_lo, w_hi = proportion_confint(x, n, alpha=alpha, method="wilson")
    b_lo, b_hi = proportion_confint(x, n, alpha=alpha, method="beta")
    w = wilson(x, n, confidence)
    b = clopper_pearson(x, n, confidence)
    assert (w.lower, w.upper) == pytest.approx((w_lo, w_hi), abs=1e-12)
    assert (b.lower, b.upper) == pytest.approx((b_lo, b_hi), abs=1e-10)


@pytest.mark.parametrize("function", [wilson, clopper_pearson])
def test_zero_trials_give_nan_with_reason(function: object) -> None:
    """Zero trials give a NaN estimate with a reason, not an exception."""
    result = function(0, 0)  # type: ignore[operator]
    assert isinstance(result, Estimate)
    assert math.isnan(result.estimate) and math.isnan(result.lower)
    assert result.reason is not None and result.n == 0


@pytest.mark.parametrize(
    ("x", "n", "match"),
    [(5, 3, "exceed"), (-1, 3, "negative"), (1.5, 3, "whole"), (True, 3, "booleans")],
)
def test_invalid_counts_raise_input_error(x: object, n: int, match: str) -> None:
    """Impossible counts raise InputError."""
    with pytest.raises(InputError, match=match):
        wilson(x, n)  # type: ignore[arg-type]


def test_invalid_confidence_raises_input_error() -> None:
    """A confidence level outside (0, 1) is invalid input."""
    with pytest.raises(InputError, match="confidence"):
        clopper_pearson(3, 10, confidence=1.0)


def _random_clusters(seed: int, k: int = 40) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    totals = rng.integers(1, 6, size=k)
    p = rng.beta(2, 3, size=k)  # patient-level heterogeneity induces clustering
    return rng.binomial(totals, p), totals


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_clustered_variance_matches_statsmodels_cluster_robust_mean(seed: int) -> None:
    """The ratio-estimator SE equals statsmodels' cluster-robust SE of an intercept-only OLS."""
    successes, totals = _random_clusters(seed)
    result = clustered_proportion(successes, totals)
    groups = np.repeat(np.arange(totals.size), totals)
    pairs = zip(successes, totals, strict=True)
    y = np.concatenate([np.r_[np.ones(a), np.zeros(m - a)] for a, m in pairs])
    # Reference library: statsmodels OLS with cov_type="cluster" (small-sample factor
    # G/(G − 1)·(N − 1)/(N − K), K = 1), the sandwich form of Rao & Scott (1992) eq. 2.
    fit = sm.OLS(y, np.ones_like(y)).fit(cov_type="cluster", cov_kwds={"groups": groups})
    assert result.estimate == pytest.approx(fit.params[0])
    assert result.se == pytest.approx(fit.bse[0], rel=1e-10)
    assert result.n == totals.sum() and result.method == "cluster-ratio"


@pytest.mark.parametrize("seed", [3, 4])
def test_clustered_proportion_from_moments_equals_direct_computation(seed: int) -> None:
    """The moment form gives the same Estimate as the per-cluster arrays."""
    successes, totals = _random_clusters(seed)
    mo = cluster_moments(successes, totals)
    from_moments = clustered_proportion_from_moments(
        mo.successes, mo.total, mo.clusters, mo.sum_a2, mo.sum_am, mo.sum_m2, confidence=0.9
    )
    direct = clustered_proportion(successes, totals, confidence=0.9)
    assert from_moments.estimate == direct.estimate
    assert from_moments.se == pytest.approx(direct.se, rel=1e-12)
    assert (from_moments.lower, from_moments.upper) == pytest.approx((direct.lower, direct.upper))


@settings(max_examples=50, deadline=None)
@given(
    st.lists(st.tuples(st.integers(0, 5), st.integers(0, 5)), min_size=2, max_size=30), st.data()
)
def test_cluster_moments_of_two_sites_add_up_to_the_moments_of_the_union(
    pairs: list[tuple[int, int]], data: st.DataObject
) -> None:
    """Moments are mergeable: summing two sites' moments equals the moments of all clusters."""
    a = np.array([min(x, m) for x, m in pairs])
    m = np.array([m for _, m in pairs])
    cut = data.draw(st.integers(0, len(pairs)))
    merged = cluster_moments(a[:cut], m[:cut]) + cluster_moments(a[cut:], m[cut:])
    assert merged == cluster_moments(a, m)


def test_design_effect_with_singleton_clusters_is_n_over_n_minus_one() -> None:
    """One observation per cluster: the only inflation is the k/(k − 1) factor."""
    successes = np.r_[np.ones(12), np.zeros(18)]
    # Derivation (common practice): Σ(y_i − p̂)² = n·p̂(1 − p̂), so v = p̂(1 − p̂)/(n − 1).
    assert design_effect(successes, np.ones(30)) == pytest.approx(30 / 29)


def test_design_effect_of_perfectly_correlated_clusters_is_cluster_size() -> None:
    """Clusters that are all-success or all-failure inflate the variance by the cluster size."""
    totals = np.full(20, 4)
    successes = np.r_[np.full(8, 4), np.zeros(12)]
    # Kish (1965) Survey Sampling: deff = 1 + (m − 1)ρ = m for ρ = 1, times k/(k − 1) here.
    assert design_effect(successes, totals) == pytest.approx(4 * 20 / 19)


def test_clustered_interval_is_wider_than_wilson_when_clustered() -> None:
    """Positive intra-cluster correlation widens the interval beyond the naive Wilson one."""
    totals = np.full(20, 4)
    successes = np.r_[np.full(8, 4), np.zeros(12)]
    clustered = clustered_proportion(successes, totals)
    naive = wilson(32, 80)
    assert clustered.lower < naive.lower and clustered.upper > naive.upper
    # Wilson at the effective sample size n* = 80 / deff (Korn & Graubard 1998).
    n_eff = 80 / (4 * 20 / 19)
    z = 1.959963984540054
    p = 0.4
    half = z * math.sqrt(z * z + 4 * n_eff * p * (1 - p))
    assert clustered.lower == pytest.approx((2 * n_eff * p + z * z - half) / (2 * (n_eff + z * z)))


def test_clustered_proportion_without_trials_is_nan_with_reason() -> None:
    """No trials at all: NaN with a reason."""
    result = clustered_proportion([0, 0], [0, 0])
    assert math.isnan(result.estimate) and result.reason is not None


def test_clustered_proportion_with_one_cluster_has_nan_interval_and_reason() -> None:
    """A single cluster: the proportion is defined, its cluster-robust variance is not."""
    result = clustered_proportion([3], [5])
    assert result.estimate == pytest.approx(0.6)
    assert math.isnan(result.se) and result.reason is not None


def test_clustered_proportion_rejects_more_successes_than_trials() -> None:
    """A cluster with more successes than trials is invalid input."""
    with pytest.raises(InputError, match="more successes than trials"):
        clustered_proportion([3, 1], [2, 4])
