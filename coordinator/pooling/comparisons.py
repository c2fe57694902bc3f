"""Comparisons across sites that need no case-level data: Kruskal–Wallis on binned scores.

Do the model's scores follow the same distribution at every site? Each site releases its
score histogram on fixed bins, so the Kruskal–Wallis test can be computed exactly on the
*binned* scores: every case in a bin shares that bin's midrank, and the tie correction
accounts for the ties binning creates. It is a test of the binned scores, coarser than the
raw ones (a difference inside one bin cannot be seen), so it can miss small shifts.

Run on all cases (label-free: acquisition and population shift together) and within each
class (positives, negatives: differences that disease prevalence alone cannot explain).

References
----------
Kruskal WH, Wallis WA (1952). Use of ranks in one-criterion variance analysis. Journal of
the American Statistical Association 47(260):583–621. doi:10.1080/01621459.1952.10483441
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from functools import reduce

import numpy as np
from scipy.stats import chi2

from site_agent.exceptions import InputError
from site_agent.statistics.summaries import ScoreHistogram, common_edges

_H_ROUNDING = 1e-12
"""Relative size below which H is taken as rounding error of an exact zero."""


@dataclass(frozen=True, slots=True)
class KruskalWallis:
    """Kruskal–Wallis H with its chi-square p-value; NaN with a reason where undefined."""

    statistic: float
    df: int
    p_value: float
    n: int
    groups: int
    reason: str | None = None


def kruskal_wallis_binned(counts: Sequence[Sequence[int]]) -> KruskalWallis:
    """Kruskal–Wallis test from per-group counts on the same ordered bins.

    Parameters
    ----------
    counts
        One row per group (site), one column per bin, bins in increasing score order.

    Notes
    -----
    With ``N`` cases, ``n_i`` in group ``i`` and ``R_i`` the sum of its midranks,
    ``H = [12 / (N (N + 1)) Σ R_i² / n_i − 3 (N + 1)] / C`` where the tie correction is
    ``C = 1 − Σ_b (t_b³ − t_b) / (N³ − N)`` over bins holding ``t_b`` cases (Kruskal &
    Wallis 1952, eqs. 1.1 and 1.2). ``H`` is referred to chi-square with ``k − 1``
    degrees of freedom. Empty groups are dropped.

    Raises
    ------
    InputError
        If the rows differ in length or hold negative counts.
    """
    table = np.asarray(counts, dtype=np.float64)
    if table.ndim != 2 or table.shape[1] == 0:
        raise InputError("counts must be a table: one row per group, one column per bin")
    if np.any(table < 0) or not np.all(np.isfinite(table)):
        raise InputError("counts must be finite and not negative")
    table = table[table.sum(axis=1) > 0]
    k = table.shape[0]
    n_total = float(table.sum())
    nan = float("nan")
    if k < 2:
        return KruskalWallis(nan, 0, nan, int(n_total), k, "fewer than two groups hold cases")
    tied = table.sum(axis=0)
    correction = 1.0 - float(np.sum(tied**3 - tied)) / (n_total**3 - n_total)
    if correction <= 0.0:
        return KruskalWallis(nan, k - 1, nan, int(n_total), k, "every case falls in one bin")
    below = np.cumsum(tied) - tied
    midrank = below + (tied + 1.0) / 2.0  # the midrank every case in a bin shares
    rank_sums = table @ midrank
    sizes = table.sum(axis=1)
    h = 12.0 / (n_total * (n_total + 1.0)) * float(np.sum(rank_sums**2 / sizes))
    h -= 3.0 * (n_total + 1.0)
    # Identical groups give H = 0 exactly, but the subtraction leaves rounding error of
    # either sign, relative to the terms subtracted: count that as zero (so p = 1).
    h = h / correction if h > _H_ROUNDING * 3.0 * (n_total + 1.0) else 0.0
    return KruskalWallis(h, k - 1, float(chi2.sf(h, k - 1)), int(n_total), k)


def compare_score_distributions(
    histograms: Sequence[ScoreHistogram],
) -> dict[str, KruskalWallis]:
    """Kruskal–Wallis across sites for all cases, positives and negatives.

    Sites whose disclosure control merged bins differently are first re-binned to the edges
    all of them kept, which is exact.
    """
    if not histograms:
        raise InputError("no histograms to compare")
    edges = reduce(common_edges, (h.edges for h in histograms))
    if len(edges) < 3:
        nan = float("nan")
        reason = "the sites' released bins share no common interior edge"
        undefined = KruskalWallis(nan, len(histograms) - 1, nan, 0, len(histograms), reason)
        return {"all cases": undefined, "positives": undefined, "negatives": undefined}
    binned = [h.coarsened(edges) for h in histograms]
    return {
        "all cases": kruskal_wallis_binned([h.all for h in binned]),
        "positives": kruskal_wallis_binned([h.positive for h in binned]),
        "negatives": kruskal_wallis_binned([h.negative for h in binned]),
    }
