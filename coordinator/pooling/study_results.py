"""The study results document: everything a study produced, as written to ``results.json``.

The report, the CSV exports and the JSON all render from this one model, so every
number in the report is also in the JSON. Metrics are kept as a tidy long table of
:class:`MetricRow` (one estimate with its interval per row), which is what people
load into a spreadsheet and what the CSV files hold.
"""

from __future__ import annotations

from datetime import datetime
from pathlib import Path

from pydantic import Field

from coordinator.pooling.records import Number, ResultRecord
from site_agent.notices import RESEARCH_NOTICE
from site_agent.statistics.censored import CensoredCount

COARSE_BINS_REASON = "score bins too coarse: they allow AUCs on both sides of chance (0.5)"
"""Reason of an AUC from score bins shown as the range the bins allow, with no estimate."""


class MetricRow(ResultRecord):
    """One estimate with its interval, for one site (or the pool) and one metric."""

    site: str = Field(description="Site name, or 'pooled' for the merged statistics.")
    metric: str = Field(description="e.g. auc, sensitivity, specificity, ppv, npv, kappa.")
    method: str = Field(description="Interval method, e.g. wilson, delong, delong-logit.")
    estimate: Number
    lower: Number
    upper: Number
    threshold: float | None = None
    n: int = 0
    subgroup: str | None = Field(default=None, description="'attribute=level' or None.")
    reason: str | None = Field(default=None, description="Why the estimate is undefined.")
    bound: float | None = Field(
        default=None, description="Histogram AUC only: largest possible binning error."
    )
    estimate_low: float | None = Field(
        default=None,
        description="A range instead of an estimate: the smallest value it can take "
        "(the estimate is then undefined; reason says why: a censored cell, with lower/upper "
        "the hull of the intervals, or score bins too coarse, COARSE_BINS_REASON).",
    )
    estimate_high: float | None = Field(
        default=None, description="A range instead of an estimate: the largest value."
    )


class CurvePoints(ResultRecord):
    """An ROC curve (x = 1 - specificity, y = sensitivity) or a calibration curve."""

    site: str
    kind: str = Field(description="'roc' or 'calibration'.")
    x: list[float]
    y: list[float]
    counts: list[int] | None = Field(default=None, description="Cases per calibration bin.")
    exact: list[bool] | None = Field(
        default=None,
        description="ROC: whether each point rests on released counts of both classes "
        "(else one coordinate is interpolated within a bin).",
    )


class TwoByTwo(ResultRecord):
    """Cross tabulation of the index test (at a threshold) by the reference standard."""

    site: str
    threshold: float
    tp: int | CensoredCount
    fp: int | CensoredCount
    fn: int | CensoredCount
    tn: int | CensoredCount
    """A cell a site's policy suppressed is a :class:`CensoredCount` (a range), never 0."""


class ParticipantFlow(ResultRecord):
    """Flow of observations at one site (STARD 2015 item 19)."""

    site: str
    observations: int = Field(
        description="Released observations: without the pending ones when those are withheld."
    )
    patients: int
    with_reference_standard: int
    pending_reference_standard: int | None = Field(
        description="None: withheld by the site's policy (at least one; unknown how many)."
    )
    positives: int
    negatives: int
    resampled: int = Field(default=0, description="Simulation only: resampled cases.")


class MetaRow(ResultRecord):
    """One random-effects (or fixed-effect) meta-analysis across sites."""

    metric: str
    method: str
    scale: str
    estimate: Number
    lower: Number
    upper: Number
    prediction_lower: Number
    prediction_upper: Number
    tau2: Number
    i2: Number
    h2: Number
    q: Number
    q_pvalue: Number
    k: int
    hksj: bool = False
    note: str | None = None
    subgroup: str | None = Field(
        default=None, description="Sites sharing a site attribute, 'attribute=level'."
    )


class DistributionTest(ResultRecord):
    """A test across sites of whether scores follow one distribution (Kruskal–Wallis)."""

    cases: str = Field(description="'all cases', 'positives' or 'negatives'.")
    method: str
    statistic: Number
    df: int
    p_value: Number
    n: int
    sites: int
    reason: str | None = None


class SiteOutcome(ResultRecord):
    """What happened with one site in the study."""

    site: str
    status: str = Field(description="'released', 'declined' or 'silent' (no reply).")
    reason: str | None = None
    role: str = Field(default="external", description="'development' or 'external'.")
    description: str | None = Field(default=None, description="Shift description (rehearsal).")


class AdaptationRow(ResultRecord):
    """One point of an adaptation curve: a metric after fine-tuning on n local cases.

    Combined over the repeats (seeds) by Rubin's rules on the logit scale; see
    :func:`coordinator.adaptation.combination.combine_over_seeds`.
    """

    site: str = Field(description="Site name, or 'pooled' (mean over sites).")
    metric: str = Field(description="auc, sensitivity or specificity.")
    n_cases: int | None = Field(description="Local training cases asked for; None: whole pool.")
    n_used: Number = Field(description="Mean cases actually used (whole patients).")
    estimate: Number
    lower: Number
    upper: Number
    seed_min: Number = Field(description="Smallest estimate over the seeds.")
    seed_max: Number = Field(description="Largest estimate over the seeds.")
    repeats: int = 0
    threshold: float | None = None
    method: str = "rubin-logit"
    reason: str | None = None


class AdequateCases(ResultRecord):
    """The smallest number of local cases whose mean AUC comes within the margin."""

    site: str
    reference_auc: Number = Field(description="The development site's AUC.")
    margin: float
    n_cases: int | None = Field(description="Smallest adequate count; None if none was.")
    whole_pool: bool = Field(default=False, description="Only the whole pool was adequate.")
    reason: str | None = None


class ReferenceLine(ResultRecord):
    """One site's AUC under one of the four reference lines, on its held-out test set."""

    site: str
    line: str = Field(description="none, site-local, federated or centralized.")
    estimate: Number
    lower: Number
    upper: Number
    method: str
    n: int = 0
    reason: str | None = None


class SimulationCheck(ResultRecord):
    """A value a rehearsal knows because its data are simulated, beside the study's estimate.

    No study of real hospitals can fill this in: the coordinator never sees a case. It is
    shown marked "simulation only".
    """

    site: str = Field(description="Site name, or 'pooled' for all cases as one cohort.")
    metric: str
    method: str = Field(description="Method of the estimate it checks, e.g. hanley-mcneil.")
    estimate: Number = Field(description="The study's estimate from released statistics.")
    bound: float | None = Field(default=None, description="Its stated binning bound.")
    true_value: Number = Field(description="The value computed from every simulated case.")

    @property
    def error(self) -> float:
        """Return ``estimate − true_value``."""
        return self.estimate - self.true_value


class StudyResults(ResultRecord):
    """Everything a study produced."""

    study_id: str
    title: str
    protocol_hash: str
    created_at: datetime
    engine: str
    notice: str = RESEARCH_NOTICE
    sites: list[SiteOutcome]
    metrics: list[MetricRow]
    curves: list[CurvePoints] = Field(default_factory=list)
    two_by_two: list[TwoByTwo] = Field(default_factory=list)
    flow: list[ParticipantFlow] = Field(default_factory=list)
    meta: list[MetaRow] = Field(default_factory=list)
    distribution_tests: list[DistributionTest] = Field(default_factory=list)
    adaptation: list[AdaptationRow] = Field(default_factory=list)
    adequate_cases: list[AdequateCases] = Field(default_factory=list)
    reference_lines: list[ReferenceLine] = Field(default_factory=list)
    findings: list[str] = Field(default_factory=list, description="Plain-language findings.")
    notes: list[str] = Field(default_factory=list, description="Caveats, e.g. resampling.")
    simulation_checks: list[SimulationCheck] = Field(
        default_factory=list, description="Rehearsals only: true values of the simulated data."
    )

    def write_json(self, path: Path) -> None:
        """Write the results as indented JSON."""
        path.write_text(self.model_dump_json(indent=2))

    @classmethod
    def read_json(cls, path: Path) -> StudyResults:
        """Read results written by :meth:`write_json`."""
        return cls.model_validate_json(path.read_text())
