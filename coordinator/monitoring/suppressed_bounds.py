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
  symmetrised Kullback-Leibler divergence; Cover & Thomas 2006, theorem 2.7.2), so its
  minimum over the continuous relaxation of the placements is found by a convex solver
  (SciPy's SLSQP) and is a lower bound of the minimum over whole cases.
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

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy.optimize import linprog, minimize

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

    def shares(v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        return (r + v[:b]) / reference_total, (c + v[b:]) / current_total

    def objective(v: np.ndarray) -> float:
        e, a = shares(v)
        return _psi(a, e)

    # Start from the proportional placement (missing cases spread as the released ones).
    start = np.concatenate(
        [
            mr * (r + 1) / (r + 1).sum(),
            mc * (c + 1) / (c + 1).sum(),
        ]
    )
    constraints = [
        {"type": "eq", "fun": lambda v: v[:b].sum() - mr},
        {"type": "eq", "fun": lambda v: v[b:].sum() - mc},
    ]
    caps = _caps(reference_capacity, mr, b) + _caps(current_capacity, mc, b)
    start = _feasible_start(start, caps, b, mr, mc)
    result = minimize(
        objective,
        start,
        method="SLSQP",
        bounds=[(0.0, cap) for cap in caps],
        constraints=constraints,
        options={"ftol": 1e-10, "maxiter": 200},
    )
    best = result.x if result.success else start
    value = min(objective(best), objective(start))
    e, a = shares(best)
    return Placement(value, tuple(e * reference_total), tuple(a * current_total), mr, mc)


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


def _feasible_start(
    start: np.ndarray, caps: list[float], bins: int, mr: int, mc: int
) -> np.ndarray:
    """Spread each side's missing cases over its bins in proportion to their capacity."""
    out = np.array(start, dtype=float)
    for lo, missing in ((0, mr), (bins, mc)):
        cap = np.array(caps[lo : lo + bins])
        out[lo : lo + bins] = missing * cap / cap.sum() if cap.sum() > 0 else 0.0
    return out
