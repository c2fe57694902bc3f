"""The result of an analytic sample-size calculation: one criterion, one answer.

Every planning formula returns a :class:`SampleSize`: the number of cases (and of
diseased cases among them) the criterion asks for, the precision that number reaches,
and the published source of the formula, so a report can print all three side by side.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

from site_agent.exceptions import InputError


@dataclass(frozen=True, slots=True)
class SampleSize:
    """Cases one criterion needs.

    Attributes
    ----------
    criterion
        What is asked for, in words (``"AUC 95% CI half-width <= 0.05"``).
    n_total
        Cases (observations) needed, all classes together.
    n_events
        Diseased cases expected among them (``ceil(n_total * prevalence)``).
    target
        The precision asked for, on the scale named in ``criterion``.
    achieved
        The precision the formula gives at ``n_total`` (never worse than ``target``).
    source
        The published formula (authors, year).
    notes
        Assumptions the number rests on, in words fit for a report.
    """

    criterion: str
    n_total: int
    n_events: int
    target: float
    achieved: float
    source: str
    notes: tuple[str, ...] = ()


def check_fraction(value: float, name: str) -> None:
    """Raise :class:`InputError` unless ``0 < value < 1``."""
    if not (math.isfinite(value) and 0.0 < value < 1.0):
        raise InputError(f"{name} must lie strictly between 0 and 1, got {value}")


def check_positive(value: float, name: str) -> None:
    """Raise :class:`InputError` unless ``value`` is finite and positive."""
    if not (math.isfinite(value) and value > 0.0):
        raise InputError(f"{name} must be a positive number, got {value}")


def smallest_n(precision_at: Callable[[int], float], target: float, *, start: int = 2) -> int:
    """Return the smallest whole ``n >= start`` whose precision is at most ``target``.

    ``precision_at(n)`` must fall as ``n`` grows (a standard error or an interval width);
    found by doubling then bisection. Private helper: callers have validated their input.
    """
    func = precision_at
    low, high = start, start
    while func(high) > target:
        low, high = high, high * 2
        if high > 10**9:
            raise InputError(f"the target {target} needs more than a billion cases")
    if func(low) <= target:
        return low
    while high - low > 1:  # invariant: func(low) > target >= func(high)
        mid = (low + high) // 2
        if func(mid) > target:
            low = mid
        else:
            high = mid
    return high
