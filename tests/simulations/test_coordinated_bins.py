"""The coordinated-binning oracle of the resolution benchmark, against exhaustive search.

Reference: brute force over every subset of the protocol's inner edges (common practice
for checking a dynamic program on small inputs); invented scores, simulation only.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from simulations.benchmarks.coordinated_bins import (
    _best_bins,
    _cost,
    coordinated_half_width,
)
from site_agent.statistics.roc import mixed_histogram_auc


@pytest.mark.parametrize("seed", range(5))
def test_best_bins_match_exhaustive_search(seed: int) -> None:
    rng = np.random.default_rng(seed)
    k = 9
    row = rng.integers(0, 5, size=k).astype(np.int64)
    others = (
        np.array([0, 3, 5], dtype=np.int64),
        np.array([3, 5, 9], dtype=np.int64),
        rng.integers(1, 20, size=3).astype(np.int64),
    )
    min_cell = 4
    best = _best_bins(row, others, min_cell)
    allowed = []
    for r in range(k):
        for inner in itertools.combinations(range(1, k), r):
            kept = [0, *inner, k]
            sizes = [int(row[a:b].sum()) for a, b in itertools.pairwise(kept)]
            if all(n == 0 or n >= min_cell for n in sizes):
                allowed.append(_cost(row, kept, others))
    assert _cost(row, best, others) == min(allowed)
    assert all(
        n == 0 or n >= min_cell for n in (row[a:b].sum() for a, b in itertools.pairwise(best))
    )


def test_half_width_is_half_the_share_of_cross_site_pairs_whose_bins_overlap() -> None:
    """Minimum cell = class size: one bin per class and site, so the overlap is forced.

    Site A's positives span [0.2, 0.8] and site B's negatives [0.4, 0.6]: every such pair
    is unordered by the bins; B's positives and A's negatives lie apart. The half-width is
    then ``(3 · 3) / (2 · 6 · 6)``, what :func:`mixed_histogram_auc` gives on the same bins.
    """
    edges = np.linspace(0.0, 1.0, 101)
    site_a = (np.array([0.21, 0.5, 0.79, 0.05, 0.07, 0.09]), np.array([1, 1, 1, 0, 0, 0]))
    site_b = (np.array([0.91, 0.93, 0.94, 0.41, 0.52, 0.59]), np.array([1, 1, 1, 0, 0, 0]))
    half = coordinated_half_width([site_a, site_b], edges, min_cell=3)
    assert half == pytest.approx(9 / 72)
    a_pos = [((0.21, 0.8), (3,))]
    b_neg = [((0.41, 0.6), (3,))]
    assert mixed_histogram_auc(a_pos, b_neg).bound * 9 / 36 == pytest.approx(half)
    # With a minimum cell of 1 every case keeps its own bin and nothing overlaps.
    assert coordinated_half_width([site_a, site_b], edges, min_cell=1) == 0.0
