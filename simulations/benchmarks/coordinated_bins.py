"""How far better bins could take the one-cohort AUC's binning range: an oracle, simulation only.

The range of one-cohort AUCs that released bins allow has a half-width of half the share
of cross-site (positive, negative) pairs whose bins overlap
(:func:`site_agent.statistics.roc.mixed_histogram_auc`); within-site pairs are exact. A
site's minimum-cell rule sets how narrow its bins can be, but not where its cuts go. This
module asks what the half-width would be if every site placed its cuts *knowing every
other site's scores* (possible only in a simulation, where all cases lie on one machine):

each site in turn, each class in turn, re-bins on the protocol's edges to overlap the
fewest cases of the other class at the other sites, given their current bins (dynamic
programming over the edges; every bin holds 0 or at least ``min_cell`` cases), until no
site changes its bins (coordinate descent). Thresholds and subgroups are ignored, which
only frees the cuts. The result is a local optimum, so it is what coordinated binning
reaches, not a proven floor; it is a benchmark figure and never a study's number.
"""

from __future__ import annotations

from collections.abc import Sequence
from itertools import pairwise

import numpy as np
from numpy.typing import NDArray

IntArray = NDArray[np.int64]
Bins = list[int]
"""Kept edge indices, first 0 and last the number of protocol bins."""

MAX_SWEEPS = 20
_NARROWER = 1e-9
"""Cost of a bin's width per case: breaks ties between equally overlapping binnings."""


def coordinated_half_width(
    sites: Sequence[tuple[NDArray[np.float64], NDArray[np.int64]]],
    edges: Sequence[float],
    min_cell: int,
) -> float:
    """Return the half-width of the one-cohort AUC range under coordinated binning.

    ``sites`` holds each site's ``(scores, labels)`` (labels 1 and 0), ``edges`` the
    protocol's histogram edges on [0, 1].
    """
    grid = np.asarray(edges, dtype=float)
    k = grid.size - 1
    counts = {
        (i, c): np.bincount(
            np.clip(np.searchsorted(grid, scores[labels == c], "right") - 1, 0, k - 1),
            minlength=k,
        )
        for i, (scores, labels) in enumerate(sites)
        for c in (0, 1)
    }
    bins: dict[tuple[int, int], Bins] = {key: [0, k] for key in counts}
    for _ in range(MAX_SWEEPS):
        changed = False
        for key in counts:
            best = _best_bins(counts[key], _others(counts, bins, key), min_cell)
            changed |= best != bins[key]
            bins[key] = best
        if not changed:
            break
    n_pos = sum(int(counts[i, 1].sum()) for i in range(len(sites)))
    n_neg = sum(int(counts[i, 0].sum()) for i in range(len(sites)))
    overlapping = sum(
        _cost(counts[i, 1], bins[i, 1], _others(counts, bins, (i, 1))) for i in range(len(sites))
    )
    return overlapping / (2 * n_pos * n_neg) if n_pos and n_neg else float("nan")


def _others(
    counts: dict[tuple[int, int], IntArray], bins: dict[tuple[int, int], Bins], key: tuple[int, int]
) -> tuple[IntArray, IntArray, IntArray]:
    """Return start, end and count of every occupied bin of the other class at other sites."""
    site, cls = key
    spans = [
        (a, b, int(counts[j, 1 - cls][a:b].sum()))
        for (j, c), kept in bins.items()
        if j != site and c == 1 - cls
        for a, b in pairwise(kept)
    ]
    occupied = [s for s in spans if s[2]]
    start, end, n = (np.array([s[i] for s in occupied], dtype=np.int64) for i in range(3))
    return start, end, n


def _overlap(a: IntArray, b: int, others: tuple[IntArray, IntArray, IntArray]) -> IntArray:
    """Other-class cases in bins overlapping ``[a_i, b)`` for every ``a_i``."""
    start, end, n = others
    hits = (start[None, :] < b) & (end[None, :] > a[:, None])
    out: IntArray = hits.astype(np.int64) @ n
    return out


def _cost(row: IntArray, kept: Bins, others: tuple[IntArray, IntArray, IntArray]) -> int:
    """Cross-site pairs left unordered by ``row`` binned on ``kept`` (cases × overlapped)."""
    total = 0
    for a, b in pairwise(kept):
        n = int(row[a:b].sum())
        if n:
            total += n * int(_overlap(np.array([a]), b, others)[0])
    return total


def _best_bins(row: IntArray, others: tuple[IntArray, IntArray, IntArray], min_cell: int) -> Bins:
    """Return the bins of ``row`` that overlap the fewest other cases (0 or >= min_cell each)."""
    k = row.size
    cumulative = np.concatenate([[0], np.cumsum(row)])
    best = np.full(k + 1, np.inf)
    best[0] = 0.0
    previous = np.zeros(k + 1, dtype=np.int64)
    for b in range(1, k + 1):
        a = np.arange(b)
        n = cumulative[b] - cumulative[a]
        # Ties (e.g. against another site's one wide bin) go to the narrower bins.
        cost = best[a] + n * (_overlap(a, b, others) + _NARROWER * (b - a))
        cost[(n > 0) & (n < min_cell)] = np.inf
        previous[b] = int(np.argmin(cost))
        best[b] = cost[previous[b]]
    if not np.isfinite(best[k]):  # fewer than min_cell cases: one bin, as a site would merge
        return [0, k]
    kept = [k]
    while kept[-1]:
        kept.append(int(previous[kept[-1]]))
    return kept[::-1]
