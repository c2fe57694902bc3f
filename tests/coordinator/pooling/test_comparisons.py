"""Kruskal–Wallis on binned scores, checked against scipy.stats.kruskal."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st
from scipy.stats import kruskal

from coordinator.pooling.comparisons import compare_score_distributions, kruskal_wallis_binned
from site_agent.statistics.summaries import ScoreHistogram


@settings(max_examples=80)
@given(
    st.integers(2, 5).flatmap(
        lambda k: st.lists(
            st.lists(st.integers(0, 12), min_size=6, max_size=6), min_size=k, max_size=k
        )
    )
)
@example([[2, 11, 11, 6, 4, 0], [2, 11, 11, 6, 4, 0]])  # once gave H = +3e-14 and p < 1
def test_binned_kruskal_wallis_equals_scipy_on_the_bin_ranks(counts: list[list[int]]) -> None:
    """H and p equal scipy.stats.kruskal (tie-corrected) applied to each case's bin index."""
    groups = [np.repeat(np.arange(6), row) for row in counts]
    result = kruskal_wallis_binned(counts)
    nonempty = [g for g in groups if g.size]
    if len(nonempty) < 2 or len(np.unique(np.concatenate(nonempty))) < 2:
        assert result.reason is not None and np.isnan(result.statistic)
        return
    reference = kruskal(*nonempty)  # scipy reference, tie-corrected
    assert result.statistic == pytest.approx(reference.statistic, rel=1e-9, abs=1e-9)
    if abs(reference.statistic) < 1e-9:
        # Identical groups: H is 0 up to rounding; scipy returns NaN for H = -3e-14, we
        # clamp H at 0 and report p = 1.
        assert result.p_value == 1.0
    else:
        assert result.p_value == pytest.approx(reference.pvalue, rel=1e-9, abs=1e-15)
    assert result.df == len(nonempty) - 1


def test_sites_with_differently_merged_bins_are_compared_on_shared_edges() -> None:
    """Histograms merged to different edges are re-binned to the shared ones first."""
    fine = ScoreHistogram(
        edges=(0.0, 0.25, 0.5, 0.75, 1.0),
        positive=(0, 1, 5, 9),
        negative=(8, 6, 2, 0),
        all=(8, 7, 7, 9),
    )
    merged = ScoreHistogram(edges=(0.0, 0.5, 1.0), positive=(2, 12), negative=(20, 1), all=(22, 13))
    result = compare_score_distributions([fine, merged])
    expected = kruskal_wallis_binned([(15, 16), (22, 13)])  # the fine site on shared edges
    assert result["all cases"].statistic == pytest.approx(expected.statistic)
    assert result["positives"].n == 1 + 5 + 9 + 14


def test_a_single_bin_gives_nan_with_a_reason() -> None:
    """All cases in one bin: the test is undefined, not an error."""
    result = kruskal_wallis_binned([[5, 0], [7, 0]])
    assert np.isnan(result.statistic) and result.reason == "every case falls in one bin"
