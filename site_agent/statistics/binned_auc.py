"""AUC from histograms with different bins: cases spread evenly in log-odds within a bin.

:func:`site_agent.statistics.roc.mixed_histogram_auc` counts a positive and a negative
whose bins overlap as a tie (1/2), the midpoint of what they could be. When two sites'
bins differ (each site merges its own small bins), a wide merged bin at one site overlaps
many narrow bins at another, and "a tie" is a poor guess for most of those pairs. Here a
case is taken to lie uniformly within its bin on the log-odds scale (the scale the
default protocol bins on, :mod:`site_agent.contract.score_scales`), and a pair in
overlapping bins counts the probability that the positive scores higher::

    P(X > Y) = [F(b) − F(a)] / ((b − a)(d − c)),   X ~ U[a, b), Y ~ U[c, d)
    F(x) = 0 (x <= c);  (x − c)²/2 (c < x <= d);  (d − c)²/2 + (d − c)(x − d) (x > d)

For identical bins this is 1/2, the Hanley & McNeil (1982) tie; for disjoint bins 0 or 1.
Within-bin uniformity is the same assumption as linear interpolation of a binned empirical
distribution function (common practice for grouped data).

The worst case does not depend on that assumption: only pairs in overlapping bins can be
misordered, so the exact AUC lies within ``midpoint ± half_overlap`` whatever the scores
within bins (the argument of :func:`~site_agent.statistics.roc.histogram_auc`). The
returned ``bound`` is the largest distance from *this* estimate to that interval's ends:
``half_overlap + |estimate − midpoint|``.

Several sites' bins of one class (:func:`shared_shape`) tell more than each alone: where
one site's bin is wide, the others' narrower bins show how the class's scores spread in
it. One step of the self-consistency algorithm for grouped data (Turnbull 1976), started
from cases spread evenly within their bins, re-spreads each site's bin by the shape all
sites' bins of that class give together. The worst-case bound is still taken from the
released bins alone.

ROC points (:func:`interpolated_roc`) come at every edge of either class; a point is
exact where the edge is an edge of both classes' bins, and one coordinate is
interpolated (cases spread evenly in log-odds) where it is not.

References
----------
Hanley JA, McNeil BJ (1982). The meaning and use of the area under a receiver operating
characteristic (ROC) curve. Radiology 143:29–36. doi:10.1148/radiology.143.1.7063747
Turnbull BW (1976). The empirical distribution function with arbitrarily grouped,
censored and truncated data. J R Stat Soc B 38:290–295 (the self-consistency equations).
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Sequence
from itertools import pairwise

import numpy as np
from numpy.typing import NDArray

from site_agent.contract.score_scales import DEFAULT_LOGIT_LIMIT
from site_agent.statistics.roc import HistogramAuc, RocCurve, mixed_histogram_auc

FloatArray = NDArray[np.float64]
Histograms = Sequence[tuple[Sequence[float], Sequence[float]]]
"""``(edges, counts)`` pairs on [0, 1], e.g. one class at several sites."""

LOGIT_CLAMP = DEFAULT_LOGIT_LIMIT + 1.0
"""Log-odds given to the scores 0 and 1 (the outer edges), which have none."""
_SLIVER = 1e-6


def clamped_logit(p: FloatArray) -> FloatArray:
    """Return ``log(p / (1 − p))`` clamped to ``±LOGIT_CLAMP`` (0 and 1 included)."""
    low = 1.0 / (1.0 + math.exp(LOGIT_CLAMP))
    q = np.clip(np.asarray(p, dtype=float), low, 1.0 - low)
    out: FloatArray = np.clip(np.log(q / (1.0 - q)), -LOGIT_CLAMP, LOGIT_CLAMP)
    return out


def _antiderivative(x: FloatArray, c: FloatArray, d: FloatArray) -> FloatArray:
    """F(x) of the module docstring: ∫ clip(t − c, 0, d − c) dt from −∞ to x."""
    w = d - c
    inside = 0.5 * (x - c) ** 2
    above = 0.5 * w**2 + w * (x - d)
    return np.where(x <= c, 0.0, np.where(x <= d, inside, above))


def probability_greater(a: FloatArray, b: FloatArray, c: FloatArray, d: FloatArray) -> FloatArray:
    """Return P(X > Y) for independent X ~ U[a, b) and Y ~ U[c, d) (broadcast arrays)."""
    return (_antiderivative(b, c, d) - _antiderivative(a, c, d)) / ((b - a) * (d - c))


def interpolated_auc(
    positive: Histograms,
    negative: Histograms,
    *,
    spread: tuple[Histograms, Histograms] | None = None,
) -> HistogramAuc:
    """Return the AUC of binned scores with cases spread evenly in log-odds within bins.

    ``positive`` and ``negative`` hold ``(edges, counts)`` pairs on [0, 1], as for
    :func:`~site_agent.statistics.roc.mixed_histogram_auc`, which gives the midpoint and
    half-width this estimate's ``bound`` is built from (module docstring). ``spread``,
    when given, holds the same cases on finer bins (:func:`shared_shape`): the estimate is
    taken from them, the bound still from ``positive`` and ``negative``.
    """
    midpoint = mixed_histogram_auc(positive, negative)
    if midpoint.reason is not None:
        return midpoint
    pos_source, neg_source = spread if spread is not None else (positive, negative)
    pos_lo, pos_hi, pos_n = _stacked(pos_source)
    neg_lo, neg_hi, neg_n = _stacked(neg_source)
    p = probability_greater(pos_lo[:, None], pos_hi[:, None], neg_lo[None, :], neg_hi[None, :])
    pairs = pos_n[:, None] * neg_n[None, :]
    value = float((pairs * p).sum()) / (float(pos_n.sum()) * float(neg_n.sum()))
    bound = midpoint.bound + abs(value - midpoint.auc)
    return HistogramAuc(value, bound, midpoint.n_positive, midpoint.n_negative, None)


def shared_shape(histograms: Histograms) -> list[tuple[tuple[float, ...], tuple[float, ...]]]:
    """Return each histogram on the union of all their edges, spread by their shared shape.

    The shape is the sum of every histogram with its cases spread evenly in log-odds
    within each bin, on the union of the edges; each histogram's bin is then divided
    among the finer bins inside it in proportion to that shape (one self-consistency step
    of Turnbull 1976; counts stay within their own bins, so every released count is kept).
    """
    grid = np.array(sorted({float(e) for edges, _ in histograms for e in edges}))
    width = np.maximum(np.diff(clamped_logit(grid)), _SLIVER)
    bins = [
        [(int(i), int(j), float(n)) for (i, j), n in zip(pairwise(starts), counts, strict=True)]
        for starts, counts in (
            (np.searchsorted(grid, np.asarray(edges, dtype=float)), counts)
            for edges, counts in histograms
        )
    ]
    shape = np.zeros(width.size)
    for i, j, n in itertools.chain.from_iterable(bins):
        shape[i:j] += n * width[i:j] / width[i:j].sum()
    out = []
    for spans in bins:
        fine = np.zeros(width.size)
        for i, j, n in spans:
            if n > 0:
                fine[i:j] = n * shape[i:j] / shape[i:j].sum()
        out.append((tuple(grid.tolist()), tuple(fine.tolist())))
    return out


def interpolated_roc(
    positive: Histograms, negative: Histograms
) -> tuple[RocCurve, tuple[bool, ...]]:
    """Return ROC points at every edge of either class, and which of them are exact.

    At each edge (by decreasing threshold) the share of each class at or above it counts
    a bin that straddles the edge by the part of the bin above it, with cases spread
    evenly in log-odds (module docstring). A point is exact (``True``) when no bin holding
    cases, of any histogram of either class, straddles its edge; the first and last
    points, (0, 0) and (1, 1), always are. A curve with a reason and no points when a
    class is empty.
    """
    midpoint = mixed_histogram_auc(positive, negative)
    if midpoint.reason is not None:
        return RocCurve((), (), (), midpoint.reason.replace("AUC", "ROC curve")), ()
    everything = [*positive, *negative]
    inner = sorted(
        {float(e) for edges, _ in everything for e in edges if 0.0 < e < 1.0}, reverse=True
    )
    z = clamped_logit(np.asarray(inner, dtype=float))
    shares = []
    straddled = np.zeros(z.size, dtype=bool)  # a bin holding cases straddles the edge
    for histograms in (positive, negative):
        lo, hi, n = _stacked(histograms)
        share = np.clip((hi[None, :] - z[:, None]) / (hi - lo)[None, :], 0.0, 1.0)
        shares.append([0.0, *(share @ n / n.sum()).tolist(), 1.0])
        inside = (lo[None, :] < z[:, None]) & (z[:, None] < hi[None, :])
        straddled |= (inside & (n > 0)[None, :]).any(axis=1)
    exact = (True, *(not bool(v) for v in straddled), True)
    curve = RocCurve(tuple(shares[1]), tuple(shares[0]), (math.inf, *inner, 0.0))
    return curve, exact


def _stacked(histograms: Histograms) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Return bin lower and upper ends on the clamped log-odds scale, and counts.

    Inputs were checked by :func:`~site_agent.statistics.roc.mixed_histogram_auc` first.
    """
    lows, highs, counts = [], [], []
    for edges, values in histograms:
        z = clamped_logit(np.asarray(edges, dtype=float))
        lows.append(z[:-1])
        # Bins beyond the clamp would have no width: give them a sliver (an estimate only;
        # the bound holds for any estimate in [0, 1]).
        highs.append(np.maximum(z[1:], z[:-1] + _SLIVER))
        counts.append(np.asarray(values, dtype=float))
    return np.concatenate(lows), np.concatenate(highs), np.concatenate(counts)
