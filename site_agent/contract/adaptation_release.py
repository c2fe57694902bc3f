"""What a fine-tuning request releases: performance before and after, on held-out cases only.

An :class:`AdaptationRelease` carries, for one site, the model's performance on the site's
held-out local test set before any fine-tuning (``before``) and after fine-tuning on each
requested number of local training cases and seed (``points``): the DeLong AUC with its
interval, and at each protocol threshold the confusion counts with Wilson intervals for
sensitivity and specificity; and for each fine-tuned point the paired DeLong difference
``after − before`` with its variance, both AUCs measured on the same held-out cases.
Besides these it carries only sizes (training pool, test set, cases actually used). Every
list is bounded by the protocol's grid and thresholds, so no per-case value has a place
to go.

:func:`site_agent.disclosure.adaptation_control.control_adaptation` applies the site's
minimum cell size to these records before they leave.

Undefined statistics are ``None`` with a ``reason``; JSON never carries NaN.
"""

from __future__ import annotations

import math

from pydantic import BaseModel, ConfigDict, Field, NonNegativeInt

from site_agent.contract.release import (
    SITE_NAME_PATTERN,
    UNDEFINED,
    UNREGISTERED_PROTOCOL,
    AucRecord,
    EstimateRecord,
    finite_or_none,
)
from site_agent.statistics.censored import CensoredCount
from site_agent.statistics.roc import AucDifference

MAX_POINTS = 2_000
"""Most (case count, seed) points one release may carry."""
MAX_THRESHOLDS = 20


class _Record(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=False)


class ThresholdPerformance(_Record):
    """Confusion counts at one threshold, with Wilson sensitivity and specificity."""

    threshold: float = Field(ge=0.0, le=1.0)
    tp: NonNegativeInt | CensoredCount
    fp: NonNegativeInt | CensoredCount
    fn: NonNegativeInt | CensoredCount
    tn: NonNegativeInt | CensoredCount
    sensitivity: EstimateRecord
    specificity: EstimateRecord
    """Wilson; with a censored cell, estimate None and the hull over the censored range."""


class Performance(_Record):
    """A model's performance on the site's held-out local test set."""

    auc: AucRecord
    at_thresholds: tuple[ThresholdPerformance, ...] = Field(max_length=MAX_THRESHOLDS)


class AucChange(_Record):
    """Paired DeLong difference of AUCs, after − before fine-tuning, on the same test cases.

    References
    ----------
    DeLong ER, DeLong DM, Clarke-Pearson DL (1988). Biometrics 44:837-845, eqs. 5-6
    (see :func:`site_agent.statistics.roc.paired_delong`).
    """

    difference: float | None
    variance: float | None
    lower: float | None
    upper: float | None
    p_value: float | None
    confidence: float = Field(gt=0.0, lt=1.0)
    reason: str | None = None

    @classmethod
    def of(cls, d: AucDifference) -> AucChange:
        """Convert an :class:`~site_agent.statistics.roc.AucDifference` of after minus before."""
        values = (d.difference, d.variance, d.lower, d.upper)
        undefined = not all(math.isfinite(v) for v in values)
        return cls(
            difference=finite_or_none(d.difference),
            variance=finite_or_none(d.variance),
            lower=finite_or_none(d.lower),
            upper=finite_or_none(d.upper),
            p_value=finite_or_none(d.p_value),
            confidence=d.confidence,
            reason=d.reason or (UNDEFINED if undefined else None),
        )


class AdaptationPoint(_Record):
    """Performance after fine-tuning on ``n_used`` local cases drawn with ``seed``."""

    n_requested: int | None = Field(ge=0, description="Requested count; None for the pool.")
    n_used: int = Field(ge=0, description="Cases trained on (whole patients, so may differ).")
    seed: int = Field(ge=0)
    after: Performance
    change: AucChange | None = Field(
        default=None, description="Paired DeLong AUC after − before; None when not trained."
    )


class AdaptationRelease(_Record):
    """Everything one fine-tuning request releases from one site."""

    site: str = Field(min_length=1, max_length=80, pattern=SITE_NAME_PATTERN)
    protocol_hash: str = Field(pattern=rf"^([0-9a-f]{{64}}|{UNREGISTERED_PROTOCOL})$")
    weights: str = Field(
        description="'bundle' (the protocol's model) or 'sent' (weights sent with the request)."
    )
    n_pool: int = Field(ge=0, description="Labelled cases in the local training pool.")
    n_test: int = Field(ge=0, description="Labelled cases in the held-out test set.")
    n_test_positive: int = Field(ge=0)
    n_test_negative: int = Field(ge=0)
    before: Performance
    points: tuple[AdaptationPoint, ...] = Field(default=(), max_length=MAX_POINTS)
