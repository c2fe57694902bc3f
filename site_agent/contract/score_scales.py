"""Score scales: where a protocol puts the edges of its class-conditional score histograms.

A released histogram can only order cases that fall in different bins, so the bins must be
narrow where the scores are. Models trained with a logistic or softmax output give many
scores within 0.01 of 0 or 1 (a score of 0.9999 and one of 0.99999 differ by a factor of 10
in the odds); equal bins of width 0.01 put all of them in one bin and an external site whose
scores moved towards 1 then shows two or three ROC points. Two scales fix the edges in the
protocol, before any site computes anything, so every site bins with the same edges:

- :func:`logit_edges` (the default): equal steps of log-odds between ``-limit`` and
  ``+limit``, mapped back to [0, 1] with the logistic function; the outer bins run to 0
  and 1. The default limit of 16 is just below the log-odds of the largest 32-bit float
  below 1 (1 − 2⁻²⁴, log-odds 16.6), the finest score most models can output.
- :func:`quantile_edges`: edges at equally spaced quantiles of the development site's
  scores, computed there and written into the protocol. Each bin then holds at least
  ``min_cell`` development cases, so the edges themselves are as coarse as a released
  histogram of that site would be.

Edges are rounded to 12 significant digits so that the protocol's canonical JSON (and so
its hash) does not depend on the last bits of a platform's ``exp``.

References
----------
Hanley JA, McNeil BJ (1982). The meaning and use of the area under a receiver operating
characteristic (ROC) curve. Radiology 143:29–36 (the AUC of rating data: cases in one bin
are ties, so binning costs at most half the share of pairs that share a bin).
doi:10.1148/radiology.143.1.7063747
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

DEFAULT_LOGIT_LIMIT = 16.0
"""Largest absolute log-odds with its own bins (see the module docstring)."""
SIGNIFICANT_DIGITS = 12


def _rounded(value: float) -> float:
    return float(f"{value:.{SIGNIFICANT_DIGITS}g}")


def _logistic(z: float) -> float:
    return 1.0 / (1.0 + math.exp(-z))


def logit_edges(bins: int, limit: float = DEFAULT_LOGIT_LIMIT) -> tuple[float, ...]:
    """Return ``bins + 1`` edges on [0, 1], equally spaced in log-odds on [−limit, limit].

    The inner ``bins − 1`` edges are ``logistic(−limit + k·2·limit/(bins − 2))`` for
    ``k = 0 … bins − 2``; the first edge is 0 and the last 1, so the outer two bins hold
    the scores beyond ``±limit``.

    Raises
    ------
    ValueError
        If ``bins < 3`` or ``limit`` is not a positive finite number.
    """
    if bins < 3:
        raise ValueError("a logit scale needs at least 3 bins")
    if not (math.isfinite(limit) and limit > 0):
        raise ValueError("the logit limit must be a positive finite number")
    steps = np.linspace(-limit, limit, bins - 1)
    inner = [_rounded(_logistic(float(z))) for z in steps]
    return (0.0, *inner, 1.0)


def quantile_edges(scores: Sequence[float], bins: int, *, min_cell: int) -> tuple[float, ...]:
    """Return edges at equally spaced quantiles of the development site's scores.

    The inner edges are the ``k/bins`` quantiles (``k = 1 … bins − 1``; numpy's default
    linear interpolation) of ``scores``, rounded, with repeats dropped (tied scores give
    one edge), so fewer than ``bins`` bins may result. ``bins`` may be at most
    ``len(scores) // min_cell``: each bin then holds about ``min_cell`` or more of the
    development cases, and the edges written into the protocol resolve that site's scores
    no finer than its own released histogram would (the minimum-cell rule, common
    practice in statistical disclosure control).

    Raises
    ------
    ValueError
        If a score is outside [0, 1] or not finite, ``bins < 2``, ``min_cell < 1``, or
        there are too few scores for ``bins`` bins of ``min_cell`` cases.
    """
    values = np.asarray(scores, dtype=float)
    if values.ndim != 1 or not np.all(np.isfinite(values)):
        raise ValueError("scores must be a one-dimensional list of finite numbers")
    if np.any((values < 0.0) | (values > 1.0)):
        raise ValueError("scores must lie in [0, 1]")
    if bins < 2 or min_cell < 1:
        raise ValueError("need at least 2 bins and a minimum cell of at least 1")
    if bins > values.size // min_cell:
        raise ValueError(
            f"{values.size} scores allow at most {values.size // min_cell} bins of {min_cell} cases"
        )
    quantiles = np.quantile(values, np.arange(1, bins) / bins)
    inner = sorted({_rounded(float(q)) for q in quantiles} - {0.0, 1.0})
    return (0.0, *inner, 1.0)


def nested_calibration_edges(
    histogram_edges: Sequence[float], bins: int = 10, limit: float = 4.0
) -> tuple[float, ...]:
    """Return calibration edges chosen among the histogram's own inner edges.

    About ``bins`` bins, with inner edges spread evenly among the histogram edges whose
    log-odds lie within ``±limit`` (where calibration is read; beyond it the outer bins
    hold the rest). Every calibration edge is a histogram edge, so calibration adds no cut
    to the score partition a release reports (common practice in disclosure control:
    nested tables cannot be differenced into new cells).
    """
    inner = [e for e in histogram_edges[1:-1] if abs(math.log(e / (1.0 - e))) <= limit]
    if len(inner) < bins - 1:
        chosen = inner
    else:
        step = len(inner) / (bins - 1)
        chosen = sorted(
            {inner[min(len(inner) - 1, round(step * (k + 0.5)))] for k in range(bins - 1)}
        )
    return (0.0, *chosen, 1.0)
