"""Censored confusion cells: a count the site's policy suppressed is unknown, never zero.

A site's minimum-cell rule (:mod:`site_agent.disclosure.small_cells`) suppresses a small
confusion cell (1 to m−1 cases) together with its partner in the same class (``tp`` with
``fn``, ``fp`` with ``tn``). What is still known of each suppressed cell is a range of
counts and the class total the two cells share; :class:`CensoredCount` holds exactly that
and has no field that could be read as a count. A confusion cell is therefore a
:data:`Cell`: an exact ``int`` or a :class:`CensoredCount`.

Merging sites adds ranges (:func:`add_cells`), so a pooled cell that includes a censored
one is a range too. A metric resting on a censored cell is reported as the hull of its
values over every count the released numbers allow (:func:`proportion_hull`): the point
estimate becomes a range and the interval becomes the hull of the intervals over that
range, so it contains every interval the unsuppressed data could have given.

Why corners suffice
-------------------
Each proportion is ``s / (s + f)`` with successes ``s`` and failures ``f`` varying over
independent ranges (for sensitivity ``f = class total − s``, which is the same thing on one
axis). The estimate and the Wilson and Clopper–Pearson limits increase with ``s`` at fixed
``f`` and decrease with ``f`` at fixed ``s``: for Clopper–Pearson because the limits are
beta quantiles, ``Beta(s, f + 1)`` and ``Beta(s + 1, f)``, increasing in the first shape
parameter and decreasing in the second (Clopper & Pearson 1934; Newcombe 1998, method 5);
for Wilson because the limits are the roots of ``(p̂ − p)² = z² p(1 − p)/n`` on either side
of ``p̂`` (Wilson 1927), which move with ``p̂`` (checked against full enumeration in
``tests/site_agent/statistics/test_censored.py``). So the extremes lie at the corners of
the box of (``s``, ``f``) values, and four evaluations give the hull.

References
----------
Wilson EB (1927). JASA 22:209–212. doi:10.1080/01621459.1927.10502953
Clopper CJ, Pearson ES (1934). Biometrika 26:404–413. doi:10.1093/biomet/26.4.404
Newcombe RG (1998). Two-sided confidence intervals for the single proportion.
Statistics in Medicine 17:857–872.
Hundepool A et al. (2012). Statistical Disclosure Control. Wiley, ch. 5 (primary and
secondary cell suppression).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Literal

from pydantic import BaseModel, ConfigDict, NonNegativeInt, model_validator

from site_agent.statistics.estimates import Estimate

CENSORED_REASON = "not released: site policy (a confusion cell is below the minimum cell size)"
"""Reason beside a metric that rests on a censored cell."""


class CensoredCount(BaseModel):
    """A suppressed confusion cell: its count lies in ``low..high``, never read as a number.

    ``class_total`` is this cell plus its partner in the same class (``tp + fn`` or
    ``fp + tn``), which the release gives anyway.
    """

    model_config = ConfigDict(frozen=True, extra="forbid")

    censored: Literal[True] = True
    low: NonNegativeInt
    high: NonNegativeInt
    class_total: NonNegativeInt

    @model_validator(mode="after")
    def _range_in_class(self) -> CensoredCount:
        if not self.low <= self.high <= self.class_total:
            raise ValueError("a censored cell needs low <= high <= class_total")
        return self

    def text(self) -> str:
        """Return the cell as a reader sees it: ``<m`` for a primary cell, else a range."""
        if self.low == 1:
            return f"<{self.high + 1}"
        return f"{self.low}–{self.high}"


Cell = int | CensoredCount
"""A confusion cell: an exact count, or a censored one."""


def cell_range(cell: Cell) -> tuple[int, int]:
    """Return the smallest and largest count a cell can be."""
    if isinstance(cell, CensoredCount):
        return cell.low, cell.high
    return cell, cell


def is_censored(*cells: Cell) -> bool:
    """Return whether any of ``cells`` is censored."""
    return any(isinstance(c, CensoredCount) for c in cells)


def cell_text(cell: Cell) -> str:
    """Return a cell for a table: the count, ``<m``, or a range."""
    return cell.text() if isinstance(cell, CensoredCount) else str(cell)


def sum_text(*cells: Cell) -> str:
    """Return the sum of cells from different classes: a count, or a range if one is censored."""
    low = sum(cell_range(c)[0] for c in cells)
    high = sum(cell_range(c)[1] for c in cells)
    return str(low) if low == high else f"{low}–{high}"


def censor_pair(small: int, partner: int, min_cell: int) -> tuple[CensoredCount, CensoredCount]:
    """Return the censored forms of a small cell and its partner in the same class.

    The small cell is known to lie in 1..m−1 (that is what "small" means); the partner is
    the class total minus it. When both are small, both get 1..m−1 cut to the class total.
    Only the released facts enter: the rule (1..m−1) and the class total.
    """
    total = small + partner
    low, high = max(1, total - (min_cell - 1)), min(min_cell - 1, total - 1)
    first = CensoredCount(low=1, high=min(min_cell - 1, total), class_total=total)
    second = CensoredCount(low=total - first.high, high=total - first.low, class_total=total)
    if 0 < partner < min_cell:  # both small: each lies in 1..m−1 and they sum to the total
        both = CensoredCount(low=low, high=high, class_total=total)
        return both, both
    return first, second


def merge_pair(cell: Cell, partner: Cell, other: Cell, other_partner: Cell) -> tuple[Cell, Cell]:
    """Merge one class's two cells from two disjoint sets of cases, keeping the class total."""
    total = class_total(cell, partner) + class_total(other, other_partner)
    if not is_censored(cell, partner, other, other_partner):
        return (
            cell_range(cell)[0] + cell_range(other)[0],
            cell_range(partner)[0] + cell_range(other_partner)[0],
        )
    (l1, h1), (l2, h2) = cell_range(cell), cell_range(other)
    (p1, q1), (p2, q2) = cell_range(partner), cell_range(other_partner)
    return (
        CensoredCount(low=l1 + l2, high=h1 + h2, class_total=total),
        CensoredCount(low=p1 + p2, high=q1 + q2, class_total=total),
    )


def class_total(cell: Cell, partner: Cell) -> int:
    """Return the exact sum of a cell and its class partner (known even when censored)."""
    if isinstance(cell, CensoredCount):
        return cell.class_total
    if isinstance(partner, CensoredCount):
        return partner.class_total
    return cell + partner


@dataclass(frozen=True, slots=True)
class ProportionHull:
    """A proportion over every count the released cells allow.

    ``estimate_low``/``estimate_high`` bound the point estimate; ``lower``/``upper`` are the
    smallest lower limit and the largest upper limit of the interval over the same counts.
    """

    estimate_low: float
    estimate_high: float
    lower: float
    upper: float
    method: str
    n_low: int
    n_high: int
    confidence: float


def proportion_hull(
    successes: tuple[int, int],
    failures: tuple[int, int],
    interval: Callable[[int, int, float], Estimate],
    confidence: float,
) -> ProportionHull | None:
    """Return the hull of a proportion and its interval over ranges of successes and failures.

    Parameters
    ----------
    successes, failures
        Smallest and largest possible count of each (inclusive).
    interval
        The interval method, e.g. :func:`~.proportions.wilson`, called as
        ``interval(successes, trials, confidence)``.
    confidence
        Two-sided level.

    Returns
    -------
    ProportionHull or None
        None when some allowed counts give no trials (the proportion may be undefined).
    """
    (s_lo, s_hi), (f_lo, f_hi) = successes, failures
    if s_lo + f_lo == 0:
        return None
    # Monotone in each argument (module docstring): the extremes lie at two corners.
    low = interval(s_lo, s_lo + f_hi, confidence)
    high = interval(s_hi, s_hi + f_lo, confidence)
    return _hull(low, high, s_lo + f_lo, s_hi + f_hi, confidence)


def _hull(
    low: Estimate, high: Estimate, n_low: int, n_high: int, confidence: float
) -> ProportionHull | None:
    """Return the hull of the intervals at the two extreme counts; None if one is undefined."""
    values = (low.estimate, low.lower, high.estimate, high.upper)
    if not all(math.isfinite(v) for v in values):
        return None
    return ProportionHull(
        estimate_low=low.estimate,
        estimate_high=high.estimate,
        lower=low.lower,
        upper=high.upper,
        method=low.method,
        n_low=n_low,
        n_high=n_high,
        confidence=confidence,
    )


def cells_hull(
    successes: Cell,
    failures: Cell,
    interval: Callable[[int, int, float], Estimate],
    confidence: float,
    *,
    partners: bool,
) -> ProportionHull | None:
    """Return :func:`proportion_hull` of ``successes / (successes + failures)`` over the cells.

    ``partners``: the two cells split one class (sensitivity's ``tp`` and ``fn``), so they
    move together, their sum being the class total: successes range over the cell's range
    and failures are the rest. Cells of two classes (PPV's ``tp`` and ``fp``) are not
    partners, even when the two class totals happen to be equal.
    """
    if (
        partners
        and isinstance(successes, CensoredCount)
        and isinstance(failures, CensoredCount)
        and successes.class_total == failures.class_total
        and successes.low + failures.high == successes.class_total
    ):
        total = successes.class_total
        lo, hi = cell_range(successes)
        if total == 0:
            return None
        low = interval(lo, total, confidence)
        high = interval(hi, total, confidence)
        return _hull(low, high, total, total, confidence)
    return proportion_hull(cell_range(successes), cell_range(failures), interval, confidence)
