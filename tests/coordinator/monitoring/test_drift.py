"""Tests of label-free drift statistics on binned counts and category mixes."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.special import rel_entr
from scipy.stats import chi2, chi2_contingency, ks_2samp

from coordinator.monitoring.drift import (
    DEFAULT_PSI_THRESHOLDS,
    DriftLevel,
    binned_ks,
    category_chi_square,
    population_stability_index,
    total_variation_distance,
)
from site_agent.exceptions import InputError

EDGES = np.linspace(0.0, 1.0, 21)

counts_pair = st.integers(min_value=2, max_value=12).flatmap(
    lambda k: st.tuples(
        st.lists(st.integers(1, 500), min_size=k, max_size=k),
        st.lists(st.integers(1, 500), min_size=k, max_size=k),
    )
)


def _histogram(scores: np.ndarray) -> np.ndarray:
    return np.histogram(scores, bins=EDGES)[0]


def test_psi_equals_jeffreys_divergence_from_scipy_rel_entr() -> None:
    """PSI equals KL(a‖e) + KL(e‖a) computed with scipy.special.rel_entr when no bin is empty."""
    reference = np.array([120, 340, 280, 160, 100])
    current = np.array([90, 250, 300, 220, 140])

    result = population_stability_index(reference, current)

    e, a = reference / reference.sum(), current / current.sum()
    # Reference: scipy.special.rel_entr (SciPy 1.17); PSI is the Jeffreys (1946) divergence.
    expected = float(np.sum(rel_entr(a, e)) + np.sum(rel_entr(e, a)))
    assert result.psi == pytest.approx(expected, rel=1e-12)
    assert result.empty_bins == 0
    assert result.thresholds == DEFAULT_PSI_THRESHOLDS


@settings(max_examples=60, deadline=None)
@given(counts_pair)
def test_psi_is_symmetric_non_negative_and_scale_invariant(
    pair: tuple[list[int], list[int]],
) -> None:
    """PSI is ≥ 0, symmetric in the two windows and unchanged when counts are scaled."""
    reference, current = pair

    forward = population_stability_index(reference, current).psi
    backward = population_stability_index(current, reference).psi
    scaled = population_stability_index([3 * c for c in reference], current).psi

    assert forward >= 0.0
    assert forward == pytest.approx(backward, rel=1e-9, abs=1e-12)
    assert forward == pytest.approx(scaled, rel=1e-9, abs=1e-12)


def test_psi_levels_follow_rule_of_thumb_thresholds() -> None:
    """PSI levels use the 0.1 / 0.25 rule of thumb (Siddiqi 2006; common practice)."""
    rng = np.random.default_rng(20240611)
    reference = _histogram(rng.beta(2, 5, 20_000))
    same = _histogram(rng.beta(2, 5, 20_000))
    moved = _histogram(rng.beta(5, 2, 20_000))

    assert population_stability_index(reference, same).level is DriftLevel.STABLE
    assert population_stability_index(reference, moved).level is DriftLevel.SHIFTED
    middle = population_stability_index([500, 500], [620, 380])
    # Hand computation (common practice formula): (0.62−0.5)·ln(1.24) + (0.38−0.5)·ln(0.76)
    by_hand = 0.12 * math.log(1.24) - 0.12 * math.log(0.76)
    assert middle.psi == pytest.approx(by_hand, rel=1e-12)
    assert middle.level is DriftLevel.STABLE
    watch = population_stability_index([500, 500], [700, 300])
    assert 0.1 <= watch.psi < 0.25
    assert watch.level is DriftLevel.WATCH


def test_psi_floors_empty_bins_at_epsilon_and_counts_them() -> None:
    """An empty bin gets share epsilon, and the result reports how many bins were floored."""
    result = population_stability_index([50, 50, 0], [40, 40, 20], epsilon=1e-3)

    e = np.array([0.5, 0.5, 1e-3])
    a = np.array([0.4, 0.4, 0.2])
    assert result.psi == pytest.approx(float(np.sum((a - e) * np.log(a / e))), rel=1e-12)
    assert result.empty_bins == 1
    assert math.isfinite(result.psi)


def test_psi_is_nan_with_reason_for_an_empty_window() -> None:
    """A window without cases gives NaN, level undetermined and a reason, not an error."""
    result = population_stability_index([0, 0, 0], [1, 2, 3])

    assert math.isnan(result.psi)
    assert result.level is DriftLevel.UNDETERMINED
    assert result.reason == "a window holds no cases"


def test_binned_ks_equals_scipy_ks_2samp_when_scores_sit_at_bin_midpoints() -> None:
    """With one score value per bin the binned KS equals scipy.stats.ks_2samp (asymp) exactly."""
    rng = np.random.default_rng(7)
    midpoints = (EDGES[:-1] + EDGES[1:]) / 2
    raw_ref = midpoints[np.minimum(rng.binomial(19, 0.40, 900), 19)]
    raw_cur = midpoints[np.minimum(rng.binomial(19, 0.45, 700), 19)]

    result = binned_ks(_histogram(raw_ref), _histogram(raw_cur))

    # Reference: scipy.stats.ks_2samp(method="asymp") on the raw values (SciPy 1.17).
    reference = ks_2samp(raw_ref, raw_cur, method="asymp")
    assert result.distance == pytest.approx(reference.statistic, abs=1e-12)
    assert result.p_value == pytest.approx(reference.pvalue, rel=1e-9)
    assert result.effective_n == pytest.approx(900 * 700 / 1600)


@settings(max_examples=40, deadline=None)
@given(
    st.integers(0, 2**32 - 1),
    st.floats(0.5, 4.0),
    st.floats(0.5, 4.0),
)
def test_binned_ks_is_a_lower_bound_of_scipy_ks_on_raw_scores(
    seed: int, a: float, b: float
) -> None:
    """Binned KS distance never exceeds scipy.stats.ks_2samp on the raw scores; its p is larger."""
    rng = np.random.default_rng(seed)
    raw_ref = rng.beta(2.0, 2.0, 400)
    raw_cur = rng.beta(a, b, 300)

    result = binned_ks(_histogram(raw_ref), _histogram(raw_cur))

    # Reference: scipy.stats.ks_2samp(method="asymp") on the raw scores (SciPy 1.17).
    exact = ks_2samp(raw_ref, raw_cur, method="asymp")
    assert result.distance <= exact.statistic + 1e-12
    assert result.p_value >= exact.pvalue - 1e-12


def test_binned_ks_levels_use_p_value_thresholds() -> None:
    """A large shift reads shifted and no shift reads stable at p thresholds 0.05 / 0.01."""
    rng = np.random.default_rng(11)
    reference = _histogram(rng.beta(2, 5, 5_000))

    assert binned_ks(reference, _histogram(rng.beta(2, 5, 5_000))).level is DriftLevel.STABLE
    assert binned_ks(reference, _histogram(rng.beta(3, 4, 5_000))).level is DriftLevel.SHIFTED


def test_binned_ks_rejects_histograms_on_different_bins() -> None:
    """Histograms with different bin counts are refused with a one-line message."""
    with pytest.raises(InputError, match="different numbers of bins"):
        binned_ks([1, 2, 3], [1, 2])


def test_category_chi_square_matches_pearson_statistic_computed_by_hand() -> None:
    """The chi-square statistic and p equal a hand Pearson computation with scipy.stats.chi2."""
    reference = {"vendor_a": 410, "vendor_b": 290, "vendor_c": 100}
    current = {"vendor_a": 300, "vendor_b": 330, "vendor_c": 170}

    result = category_chi_square(reference, current)

    observed = np.array([[410, 290, 100], [300, 330, 170]], dtype=float)
    expected = observed.sum(1, keepdims=True) * observed.sum(0, keepdims=True) / observed.sum()
    # Pearson (1900): X² = Σ (O − E)² / E; p from scipy.stats.chi2 with (2−1)(3−1) = 2 dof.
    statistic = float(np.sum((observed - expected) ** 2 / expected))
    assert result.statistic == pytest.approx(statistic, rel=1e-12)
    assert result.dof == 2
    assert result.p_value == pytest.approx(float(chi2.sf(statistic, 2)), rel=1e-9)
    assert result.level is DriftLevel.SHIFTED
    assert result.categories == ("vendor_a", "vendor_b", "vendor_c")


def test_category_chi_square_on_a_2x2_table_matches_scipy_without_yates_correction() -> None:
    """A two-category mix matches scipy.stats.chi2_contingency(correction=False)."""
    result = category_chi_square({"a": 30, "b": 70}, {"a": 45, "b": 55})

    # Reference: scipy.stats.chi2_contingency(correction=False) (SciPy 1.17).
    reference = chi2_contingency(np.array([[30, 70], [45, 55]]), correction=False)
    assert result.statistic == pytest.approx(reference.statistic, rel=1e-12)
    assert result.p_value == pytest.approx(reference.pvalue, rel=1e-12)


def test_category_chi_square_handles_categories_seen_in_one_window_only() -> None:
    """A new category counts as zero in the other window; absent from both are dropped."""
    result = category_chi_square({"a": 50, "b": 50, "gone": 0}, {"a": 40, "b": 40, "new": 2})

    assert result.categories == ("a", "b", "new")
    assert result.small_expected  # expected count for "new" is about 1 (< 5, Cochran 1954)


def test_category_chi_square_is_nan_when_only_one_category_occurs() -> None:
    """A single observed category makes the test undefined: NaN with a reason."""
    result = category_chi_square({"a": 10}, {"a": 12})

    assert math.isnan(result.p_value)
    assert result.level is DriftLevel.UNDETERMINED
    assert result.reason == "fewer than two categories occur"


def test_total_variation_distance_is_half_the_l1_distance_of_shares() -> None:
    """TVD is ½ Σ|p − q| (Levin, Peres & Wilmer 2009, Prop. 4.2): 0.2 for this mix."""
    result = total_variation_distance({"a": 50, "b": 50}, {"a": 70, "b": 30})

    assert result.distance == pytest.approx(0.2, abs=1e-12)
    far = total_variation_distance({"a": 50, "b": 50}, {"a": 80, "b": 20})
    assert far.distance == pytest.approx(0.3, abs=1e-12)
    assert far.level is DriftLevel.SHIFTED
    assert total_variation_distance({"a": 1}, {"b": 3}).distance == pytest.approx(1.0)


@pytest.mark.parametrize(
    ("reference", "current", "message"),
    [
        ([1, -2, 3], [1, 2, 3], "negative"),
        ([1.5, 2, 3], [1, 2, 3], "whole-number"),
        ([], [], "non-empty"),
        ([5], [5], "at least two bins"),
    ],
)
def test_invalid_histograms_raise_input_error(
    reference: list[float], current: list[float], message: str
) -> None:
    """Negative, fractional, empty or single-bin histograms are refused."""
    with pytest.raises(InputError, match=message):
        population_stability_index(reference, current)


def test_invalid_thresholds_raise_input_error() -> None:
    """Thresholds out of order are refused."""
    with pytest.raises(InputError, match="thresholds"):
        population_stability_index([1, 2], [2, 1], thresholds=(0.3, 0.1))
    with pytest.raises(InputError, match="p-value thresholds"):
        binned_ks([1, 2], [2, 1], thresholds=(0.01, 0.05))
