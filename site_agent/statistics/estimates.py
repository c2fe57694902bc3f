"""Result objects shared by the statistical primitives of the site engine.

Every statistic returns a small frozen object rather than a bare tuple. A statistic that
is undefined on the data (no cases, one class only) returns NaN fields and a ``reason``
instead of raising: "undefined here" is not "invalid input".
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

from scipy.stats import norm

from site_agent.exceptions import InputError

NAN = float("nan")


def two_sided_z(confidence: float) -> float:
    """Return the standard normal quantile ``z`` with ``P(|Z| <= z) = confidence``.

    Raises
    ------
    InputError
        If ``confidence`` is not strictly between 0 and 1.
    """
    if not 0.0 < confidence < 1.0:
        raise InputError("confidence must lie strictly between 0 and 1")
    return float(norm.ppf(0.5 + confidence / 2.0))


@dataclass(frozen=True, slots=True)
class Estimate:
    """A point estimate with a two-sided confidence interval.

    Parameters
    ----------
    estimate
        The point estimate (NaN when undefined).
    lower, upper
        Confidence limits at level ``confidence`` (NaN when undefined).
    se
        Standard error of the estimate (NaN when not defined by the method).
    method
        Name of the interval method, e.g. ``"wilson"``, ``"clopper-pearson"``,
        ``"delong"``, ``"delong-logit"``, ``"obuchowski"``, ``"cluster-ratio"``.
    n
        Number of observations the estimate rests on.
    confidence
        Two-sided confidence level of the interval.
    reason
        Why the estimate is NaN, or ``None`` when it is defined.
    """

    estimate: float
    lower: float
    upper: float
    se: float
    method: str
    n: int
    confidence: float = 0.95
    reason: str | None = None

    @property
    def is_defined(self) -> bool:
        """Return whether the point estimate is a finite number."""
        return math.isfinite(self.estimate)

    def to_dict(self) -> dict[str, Any]:
        """Return the fields as a plain dict (NaN stays a float NaN)."""
        return asdict(self)

    @classmethod
    def undefined(cls, method: str, n: int, reason: str, confidence: float = 0.95) -> Estimate:
        """Return an all-NaN estimate that says why it is undefined."""
        return cls(NAN, NAN, NAN, NAN, method, n, confidence, reason)
