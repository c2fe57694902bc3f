"""Label-free drift statistics when a site's disclosure step suppressed small histogram cells.

A site that suppresses small cells sets them to 0 before release: its score histogram then
holds fewer cases than the window (``n_observations``), and in which bins the missing
cases lay is unknown. Treating them as zeros invents a shift (a bin of ten cases split
into four positives and six negatives, suppressed, reads as an empty bin and a PSI of
0.8). Reading the histogram as it stands would be a guess; instead, every statistic here
is the **smallest value consistent with what was released**: the missing cases of the
window and of the baseline are placed, in whatever bins, so as to bring the two
distributions closest. An alarm raised on this bound would be raised by every possible
full histogram; a window whose bound stays below the limit is "not shown to have shifted".

- :func:`psi_lower_bound`: PSI is jointly convex in the two share vectors (it is the
  symmetrised Kullback-Leibler divergence; Cover & Thomas 2006, theorem 2.7.2) and a sum
  over bins: whole cases are placed one at a time where they lower it most (exact for one
  side with the other fixed), the two sides alternating until neither changes. On the
  joint problem this is block coordinate descent, so the value is the smallest found,
  close to but not proven to be the minimum.
- :func:`ks_lower_bound`: the KS distance at the bin edges is the largest of linear
  functions of the placements, so its minimum is a linear programme (SciPy's HiGHS).

References
----------
Cover TM, Thomas JA (2006). Elements of Information Theory, 2nd ed. Wiley, theorem 2.7.2
(joint convexity of relative entropy). doi:10.1002/047174882X
Hundepool A et al. (2012). Statistical Disclosure Control. Wiley, chapter 5 (cell
suppression: a suppressed cell is unknown, not zero). doi:10.1002/9781118348239
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy.optimize import linprog

from site_agent.exceptions import InputError

_EPSILON = 1e-4
"""Share floor of the PSI (as in coordinator.monitoring.drift, common practice)."""


@dataclass(frozen=True, slots=True)
class Placement:
    """A bound and the (fractional) placement of the missing cases that attains it."""

    value: float
    reference: tuple[float, ...]
    current: tuple[float, ...]
    missing_reference: int
    missing_current: int


def _check(counts: Sequence[int], total: int, name: str) -> tuple[np.ndarray, int]:
    c = np.asarray(counts, dtype=float)
    if c.ndim != 1 or c.size < 2 or np.any(c < 0):
        raise InputError(f"{name} counts must be two or more non-negative numbers")
    missing = round(float(total - c.sum()))
    if missing < 0:
        raise InputError(f"{name} total {total} is below the sum of its counts {int(c.sum())}")
    return c, missing


def _psi(a: np.ndarray, e: np.ndarray) -> float:
    a = np.maximum(a, _EPSILON)
    e = np.maximum(e, _EPSILON)
    return float(np.sum((a - e) * np.log(a / e)))


def psi_lower_bound(
    reference: Sequence[int],
    reference_total: int,
    current: Sequence[int],
    current_total: int,
    *,
    reference_capacity: Sequence[float] | None = None,
    current_capacity: Sequence[float] | None = None,
) -> Placement:
    """Return the smallest PSI over every placement of the suppressed cases.

    Parameters
    ----------
    reference, current
        Released counts per bin (suppressed cells read 0).
    reference_total, current_total
        Cases each histogram stands for; the difference to the counts' sum is suppressed.
    reference_capacity, current_capacity
        Most suppressed cases each bin can hold (0 where no cell of the bin was
        suppressed: a cell that reads more than 0 was released); default: all of them.

    Raises
    ------
    InputError
        On counts of different lengths, fewer than two bins, or a total below the counts.
    """
    r, mr = _check(reference, reference_total, "reference")
    c, mc = _check(current, current_total, "current")
    if r.size != c.size:
        raise InputError("reference and current need the same bins")
    if reference_total <= 0 or current_total <= 0:
        raise InputError("both histograms need at least one case")
    b = r.size
    if mr == 0 and mc == 0:
        return Placement(_psi(c / current_total, r / reference_total), tuple(r), tuple(c), 0, 0)

    caps = _caps(reference_capacity, mr, b) + _caps(current_capacity, mc, b)
    y, x = np.zeros(b), np.zeros(b)
    # Block coordinate descent, one whole case at a time: with the other side fixed the
    # PSI is a separable convex function of this side's placements, so adding each case
    # where it lowers the PSI most (water-filling) is exact for that side; the two sides
    # alternate until neither changes.
    for _ in range(20):
        before = (y.copy(), x.copy())
        y = _fill(r, reference_total, mr, caps[:b], (c + x) / current_total, True)
        x = _fill(c, current_total, mc, caps[b:], (r + y) / reference_total, False)
        if np.array_equal(before[0], y) and np.array_equal(before[1], x):
            break
    e, a = (r + y) / reference_total, (c + x) / current_total
    return Placement(_psi(a, e), tuple(r + y), tuple(c + x), mr, mc)


def _fill(
    counts: np.ndarray,
    total: int,
    missing: int,
    caps: list[float],
    fixed: np.ndarray,
    is_reference: bool,
) -> np.ndarray:
    """Place ``missing`` whole cases on one side, each where the PSI falls most."""
    placed = np.zeros(counts.size)

    def term(i: int, extra: float) -> float:
        mine = np.array([(counts[i] + extra) / total])
        theirs = np.array([fixed[i]])
        return _psi(theirs, mine) if is_reference else _psi(mine, theirs)

    for _ in range(missing):
        best, gain = -1, math.inf
        for i in range(counts.size):
            if placed[i] + 1 > caps[i] + 1e-9:
                continue
            delta = term(i, placed[i] + 1) - term(i, placed[i])
            if delta < gain:
                best, gain = i, delta
        if best < 0:
            break
        placed[best] += 1
    return placed


def ks_lower_bound(
    reference: Sequence[int],
    reference_total: int,
    current: Sequence[int],
    current_total: int,
    *,
    reference_capacity: Sequence[float] | None = None,
    current_capacity: Sequence[float] | None = None,
) -> Placement:
    """Return the smallest binned KS distance over every placement of the suppressed cases.

    ``D = max_j |F_ref(x_j) − F_cur(x_j)|`` over the upper bin edges, with the cumulative
    shares linear in the placements: minimise ``t`` subject to ``−t <= F_ref − F_cur <= t``
    at every edge (a linear programme, solved by SciPy's HiGHS).

    Raises
    ------
    InputError
        As :func:`psi_lower_bound`.
    """
    r, mr = _check(reference, reference_total, "reference")
    c, mc = _check(current, current_total, "current")
    if r.size != c.size:
        raise InputError("reference and current need the same bins")
    if reference_total <= 0 or current_total <= 0:
        raise InputError("both histograms need at least one case")
    b = r.size
    lower = np.tril(np.ones((b, b)))  # cumulative sums as a matrix
    base = lower @ r / reference_total - lower @ c / current_total
    if mr == 0 and mc == 0:
        return Placement(float(np.max(np.abs(base))), tuple(r), tuple(c), 0, 0)
    # variables: y (b, reference placements), x (b, current placements), t
    diff = np.hstack([lower / reference_total, -lower / current_total, np.zeros((b, 1))])
    t_col = np.zeros((b, 2 * b + 1))
    t_col[:, -1] = 1.0
    a_ub = np.vstack([diff - t_col, -diff - t_col])
    b_ub = np.concatenate([-base, base])
    a_eq = np.zeros((2, 2 * b + 1))
    a_eq[0, :b] = 1.0
    a_eq[1, b : 2 * b] = 1.0
    cost = np.zeros(2 * b + 1)
    cost[-1] = 1.0
    result = linprog(
        cost,
        A_ub=a_ub,
        b_ub=b_ub,
        A_eq=a_eq,
        b_eq=[mr, mc],
        bounds=[(0.0, cap) for cap in _caps(reference_capacity, mr, b)]
        + [(0.0, cap) for cap in _caps(current_capacity, mc, b)]
        + [(0.0, None)],
        method="highs",
    )
    if not result.success:  # pragma: no cover - the programme is always feasible
        raise InputError(f"KS bound: linear programme failed ({result.message})")
    y, x = result.x[:b], result.x[b : 2 * b]
    return Placement(float(result.x[-1]), tuple(r + y), tuple(c + x), mr, mc)


def _caps(capacity: Sequence[float] | None, missing: int, bins: int) -> list[float]:
    if capacity is None:
        return [float(missing)] * bins
    if len(capacity) != bins:
        raise InputError("one capacity per bin is needed")
    caps = [min(float(missing), max(0.0, float(c))) for c in capacity]
    if sum(caps) < missing:  # inconsistent capacities: fall back to no restriction
        return [float(missing)] * bins
    return caps
