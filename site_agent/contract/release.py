"""The release: the only thing an evaluation sends off site.

A :class:`SiteRelease` holds a site's mergeable
:class:`~site_agent.statistics.summaries.SufficientStatistics`
(for the whole site and for each subgroup level the plan asks for) and a few site-level
scalars that need the raw scores (:class:`ExactEstimates`): the DeLong AUC, the
Obuchowski clustered AUC, the calibration intercept and slope, and the paired DeLong
comparison of the model with each reader. No field can hold per-case values: every list
is bounded by the number of bins, thresholds, categories, readers or subgroup levels.

Undefined statistics are ``None`` with a ``reason``; JSON never carries NaN.
"""

from __future__ import annotations

import math

from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from site_agent.exceptions import InputError
from site_agent.statistics.censored import CENSORED_REASON, ProportionHull
from site_agent.statistics.estimates import Estimate
from site_agent.statistics.roc import AucDifference, AucEstimate
from site_agent.statistics.summaries import SufficientStatistics

UNREGISTERED_PROTOCOL = "unregistered"
"""Protocol hash of an evaluation run without a registered protocol (a local rehearsal)."""
MAX_READERS = 50
MAX_SUBGROUPS = 200
"""Most subgroup levels one release may carry."""
MAX_MIX_ATTRIBUTES = 10
MAX_MIX_LEVELS = 50
"""Most attributes, and levels per attribute, of a release's attribute counts."""
POOLED_LEVELS = "(levels below the minimum cell)"
"""Level name under which a site's disclosure step pools small attribute levels."""
SITE_NAME_PATTERN = r"^[A-Za-z0-9._ -]+$"
UNDEFINED = "not defined on these data"
"""Reason given when a library result is NaN without saying why."""


class _Record(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=False)


def finite_or_none(value: float) -> float | None:
    """Return ``value`` as a float, or None when it is NaN or infinite."""
    return float(value) if math.isfinite(value) else None


def _reason(reason: str | None, *values: float) -> str | None:
    """Return ``reason``, or a generic one when some value is undefined and none was given."""
    if reason is None and not all(math.isfinite(v) for v in values):
        return UNDEFINED
    return reason


class EstimateRecord(_Record):
    """A point estimate with its interval; None where undefined, and why."""

    estimate: float | None
    lower: float | None
    upper: float | None
    se: float | None
    method: str
    n: int = Field(ge=0)
    confidence: float = Field(gt=0.0, lt=1.0)
    reason: str | None = None
    estimate_low: float | None = None
    estimate_high: float | None = None
    """With a censored cell: the smallest and largest value the estimate can take (the
    estimate is then None and ``lower``/``upper`` are the hull of the intervals)."""

    @classmethod
    def of_hull(
        cls, hull: ProportionHull | None, *, method: str, n: int, confidence: float
    ) -> EstimateRecord:
        """Return a metric resting on a censored cell: its hull, or not released at all."""
        if hull is None:
            return cls(
                estimate=None,
                lower=None,
                upper=None,
                se=None,
                method=method,
                n=n,
                confidence=confidence,
                reason=CENSORED_REASON,
            )
        return cls(
            estimate=None,
            lower=hull.lower,
            upper=hull.upper,
            se=None,
            method=hull.method,
            n=n,
            confidence=confidence,
            reason=CENSORED_REASON,
            estimate_low=hull.estimate_low,
            estimate_high=hull.estimate_high,
        )

    @classmethod
    def of(cls, e: Estimate) -> EstimateRecord:
        """Convert a statistic's :class:`~.estimates.Estimate` (NaN becomes None)."""
        return cls(
            estimate=finite_or_none(e.estimate),
            lower=finite_or_none(e.lower),
            upper=finite_or_none(e.upper),
            se=finite_or_none(e.se),
            method=e.method,
            n=e.n,
            confidence=e.confidence,
            reason=_reason(e.reason, e.estimate, e.lower, e.upper, e.se),
        )


class AucRecord(_Record):
    """An AUC with its variance, normal and logit-scale intervals; None where undefined."""

    auc: float | None
    variance: float | None
    se: float | None
    lower: float | None
    upper: float | None
    logit_lower: float | None
    logit_upper: float | None
    n_positive: int = Field(ge=0)
    n_negative: int = Field(ge=0)
    method: str
    confidence: float = Field(gt=0.0, lt=1.0)
    reason: str | None = None

    @classmethod
    def of(cls, a: AucEstimate) -> AucRecord:
        """Convert an :class:`~site_agent.statistics.roc.AucEstimate` (NaN becomes None)."""
        values = (a.auc, a.variance, a.se, a.lower, a.upper, a.logit_lower, a.logit_upper)
        return cls(
            auc=finite_or_none(a.auc),
            variance=finite_or_none(a.variance),
            se=finite_or_none(a.se),
            lower=finite_or_none(a.lower),
            upper=finite_or_none(a.upper),
            logit_lower=finite_or_none(a.logit_lower),
            logit_upper=finite_or_none(a.logit_upper),
            n_positive=a.n_positive,
            n_negative=a.n_negative,
            method=a.method,
            confidence=a.confidence,
            reason=_reason(a.reason, *values),
        )


class ReaderComparison(_Record):
    """Paired DeLong comparison of the model's AUC with one reader's, on the same cases."""

    reader: str = Field(min_length=1, max_length=80)
    n_positive: int = Field(ge=0)
    n_negative: int = Field(ge=0)
    auc_model: float | None
    auc_reader: float | None
    difference: float | None
    variance: float | None
    se: float | None
    z: float | None
    p_value: float | None
    lower: float | None
    upper: float | None
    confidence: float = Field(gt=0.0, lt=1.0)
    reason: str | None = None

    @classmethod
    def of(
        cls, reader: str, d: AucDifference, *, n_positive: int, n_negative: int
    ) -> ReaderComparison:
        """Convert an :class:`~site_agent.statistics.roc.AucDifference` of model minus reader."""
        values = (d.auc_a, d.auc_b, d.difference, d.variance, d.se, d.z, d.p_value)
        return cls(
            reader=reader,
            n_positive=n_positive,
            n_negative=n_negative,
            auc_model=finite_or_none(d.auc_a),
            auc_reader=finite_or_none(d.auc_b),
            difference=finite_or_none(d.difference),
            variance=finite_or_none(d.variance),
            se=finite_or_none(d.se),
            z=finite_or_none(d.z),
            p_value=finite_or_none(d.p_value),
            lower=finite_or_none(d.lower),
            upper=finite_or_none(d.upper),
            confidence=d.confidence,
            reason=_reason(d.reason, *values),
        )


class CalibrationRecord(_Record):
    """Logistic recalibration fit: intercept (calibration-in-the-large) and slope."""

    intercept: EstimateRecord
    slope: EstimateRecord
    reason: str | None = None


class ExactEstimates(_Record):
    """Site-level scalars computed from the raw scores, which cannot be merged exactly."""

    auc: AucRecord
    """DeLong AUC with its variance, normal and logit intervals."""
    clustered_auc: AucRecord
    """Obuchowski AUC with patients as clusters."""
    calibration: CalibrationRecord
    readers: tuple[ReaderComparison, ...] = Field(default=(), max_length=MAX_READERS)


class SubgroupRelease(_Record):
    """One level of a subgroup attribute: its statistics and its exact AUC."""

    attribute: str = Field(min_length=1, max_length=80)
    level: str = Field(min_length=1, max_length=80)
    statistics: SufficientStatistics
    auc: AucRecord


class AttributeCounts(_Record):
    """How many of the site's cases fall in each level of one case attribute (e.g. vendor).

    Counts every case, pending labels too. The disclosure step pools small levels under
    :data:`POOLED_LEVELS`, so a rare level's name and count do not leave the site.
    """

    attribute: str = Field(min_length=1, max_length=80)
    levels: tuple[str, ...] = Field(max_length=MAX_MIX_LEVELS)
    counts: tuple[int, ...] = Field(max_length=MAX_MIX_LEVELS)

    @model_validator(mode="after")
    def _one_count_per_level(self) -> AttributeCounts:
        if len(self.levels) != len(self.counts) or len(set(self.levels)) != len(self.levels):
            raise ValueError("attribute counts need one count per distinct level")
        if any(c < 0 for c in self.counts) or any(not 1 <= len(v) <= 80 for v in self.levels):
            raise ValueError("attribute counts must be non-negative, level names 1-80 chars")
        return self

    def as_dict(self) -> dict[str, int]:
        """Return the counts by level name."""
        return dict(zip(self.levels, self.counts, strict=True))


class SiteRelease(_Record):
    """Everything one evaluation releases from one site."""

    site: str = Field(min_length=1, max_length=80, pattern=SITE_NAME_PATTERN)
    protocol_hash: str = Field(pattern=rf"^([0-9a-f]{{64}}|{UNREGISTERED_PROTOCOL})$")
    statistics: SufficientStatistics
    exact: ExactEstimates
    subgroups: tuple[SubgroupRelease, ...] = Field(default=(), max_length=MAX_SUBGROUPS)
    attribute_counts: tuple[AttributeCounts, ...] = Field(default=(), max_length=MAX_MIX_ATTRIBUTES)

    def to_json(self) -> str:
        """Return the release as JSON, exactly as it would leave the site."""
        return self.model_dump_json(indent=2)

    @classmethod
    def from_json(cls, text: str | bytes) -> SiteRelease:
        """Parse a release, raising :class:`InputError` naming the first defect."""
        try:
            return cls.model_validate_json(text)
        except ValidationError as exc:
            first = exc.errors()[0]
            where = ".".join(str(p) for p in first["loc"]) or "release"
            raise InputError(f"invalid site release at {where}: {first['msg']}") from exc
