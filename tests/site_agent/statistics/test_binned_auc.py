"""The AUC of histograms with different bins, cases spread evenly in log-odds within a bin."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.metrics import roc_auc_score

from site_agent.contract.score_scales import logit_edges
from site_agent.statistics.binned_auc import clamped_logit, interpolated_auc, probability_greater
from site_agent.statistics.roc import mixed_histogram_auc


def _slow_probability_greater(a: float, b: float, c: float, d: float) -> float:
    """P(X > Y) by a fine midpoint grid over both intervals (the obvious reference)."""
    xs = a + (np.arange(2000) + 0.5) * (b - a) / 2000
    ys = c + (np.arange(2000) + 0.5) * (d - c) / 2000
    return float((xs[:, None] > ys[None, :]).mean())


@pytest.mark.parametrize(
    ("a", "b", "c", "d"),
    [(0.0, 1.0, 0.0, 1.0), (0.0, 1.0, 0.5, 2.0), (-3.0, 4.0, 1.0, 1.5), (2.0, 3.0, 0.0, 1.0)],
)
def test_probability_greater_matches_a_grid_count(a: float, b: float, c: float, d: float) -> None:
    """The closed form agrees with counting ordered pairs on a 2000 × 2000 grid."""
    exact = float(probability_greater(np.array(a), np.array(b), np.array(c), np.array(d)))

    assert exact == pytest.approx(_slow_probability_greater(a, b, c, d), abs=1e-3)


def test_identical_bins_count_as_ties_and_reduce_to_the_midpoint() -> None:
    """Same edges for both classes: every overlapping pair is 1/2, as Hanley & McNeil (1982)."""
    edges = logit_edges(10)
    pos, neg = [0, 1, 3, 0, 5, 2, 8, 4, 9, 6], [7, 6, 5, 4, 3, 2, 1, 0, 0, 1]

    interpolated = interpolated_auc([(edges, pos)], [(edges, neg)])
    midpoint = mixed_histogram_auc([(edges, pos)], [(edges, neg)])

    assert interpolated.auc == pytest.approx(midpoint.auc, abs=1e-12)
    assert interpolated.bound == pytest.approx(midpoint.bound, abs=1e-12)


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 10_000), shift=st.floats(-3.0, 3.0), merge=st.integers(1, 8))
def test_exact_auc_lies_within_the_bound_of_the_estimate(
    seed: int, shift: float, merge: int
) -> None:
    """Whatever the scores, |estimate − exact AUC| <= bound (exact: scikit-learn roc_auc_score)."""
    rng = np.random.default_rng(seed)
    pos_scores = 1.0 / (1.0 + np.exp(-rng.normal(2.0 + shift, 3.0, 60)))
    neg_scores = 1.0 / (1.0 + np.exp(-rng.normal(-1.0, 3.0, 80)))
    fine = np.array(logit_edges(40))
    coarse = np.concatenate([fine[:-1:merge], [1.0]])  # one site merged its bins
    pos_counts, _ = np.histogram(pos_scores, bins=coarse)
    neg_counts, _ = np.histogram(neg_scores, bins=fine)
    exact = roc_auc_score(np.r_[np.ones(60), np.zeros(80)], np.r_[pos_scores, neg_scores])

    result = interpolated_auc([(coarse, pos_counts)], [(fine, neg_counts)])

    assert abs(result.auc - exact) <= result.bound + 1e-12


def test_clamped_logit_gives_the_outer_edges_finite_log_odds() -> None:
    """0 and 1 have no log-odds: they are placed one unit beyond the default limit of 16."""
    z = clamped_logit(np.array([0.0, 0.5, 1.0]))

    assert z.tolist() == pytest.approx([-17.0, 0.0, 17.0])


def test_roc_points_on_shared_edges_are_scikit_learns_and_all_exact() -> None:
    """Both classes on one set of edges: every point exact, equal to sklearn's roc_curve.

    Reference: scikit-learn ``roc_curve(drop_intermediate=False)`` on each score replaced
    by its bin's lower edge (a case is called positive when its bin starts at or above t).
    """
    from sklearn.metrics import roc_curve

    from site_agent.statistics.binned_auc import interpolated_roc

    rng = np.random.default_rng(5)
    edges = np.linspace(0.0, 1.0, 11)
    scores = rng.beta(2, 2, 300)
    labels = rng.random(300) < scores
    lower = edges[np.clip(np.searchsorted(edges, scores, side="right") - 1, 0, 9)]
    pos = np.histogram(scores[labels], bins=edges)[0]
    neg = np.histogram(scores[~labels], bins=edges)[0]

    curve, exact = interpolated_roc([(tuple(edges), tuple(pos))], [(tuple(edges), tuple(neg))])

    assert all(exact)
    fpr, tpr, _ = roc_curve(labels, lower, drop_intermediate=False)
    ours = set(zip(np.round(curve.fpr, 12), np.round(curve.tpr, 12), strict=True))
    assert set(zip(np.round(fpr, 12), np.round(tpr, 12), strict=True)) <= ours


def test_shared_shape_keeps_every_released_count_in_its_own_bin() -> None:
    """Re-spreading moves cases only within their released bins (counts are kept)."""
    from site_agent.statistics.binned_auc import shared_shape

    fine = (0.0, 0.2, 0.4, 0.5, 0.6, 0.8, 1.0)
    coarse = (0.0, 0.4, 0.8, 1.0)
    histograms = [(fine, (1.0, 6.0, 2.0, 9.0, 5.0, 0.0)), (coarse, (10.0, 7.0, 3.0))]

    spread = shared_shape(histograms)

    for (edges, counts), (grid, values) in zip(histograms, spread, strict=True):
        for (lo, hi), count in zip(itertools.pairwise(edges), counts, strict=True):
            inside = [v for a, v in zip(grid[:-1], values, strict=True) if lo <= a < hi]
            assert sum(inside) == pytest.approx(count)
    # Within [0.4, 0.8) the coarse site's cases follow the fine site's 2 and 9 in the two
    # equally wide (in log-odds) bins [0.4, 0.5) and [0.5, 0.6).
    _, values = spread[1]
    assert values[3] > 2 * values[2]
