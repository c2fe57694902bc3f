"""Metrics derived from sufficient statistics: the same code serves one site and a pooled merge.

:func:`summarize` turns :class:`~site_agent.statistics.summaries.SufficientStatistics` into a
:class:`MetricsSummary`: per threshold, sensitivity, specificity and predictive values
with three intervals each (Wilson, Clopper–Pearson, cluster-robust over patients),
accuracy, F1 and prevalence; the histogram AUC with its binning-error bound and ROC
points; Brier score and expected calibration error; Cohen's kappas for every agreement
table. A metric undefined on the data is ``None`` with a ``reason``; JSON never holds NaN.
"""

from __future__ import annotations

import math

from pydantic import BaseModel, ConfigDict, Field

from site_agent.contract.release import EstimateRecord, finite_or_none
from site_agent.exceptions import InputError
from site_agent.statistics.agreement import cohen_kappa
from site_agent.statistics.calibration import expected_calibration_error
from site_agent.statistics.estimates import Estimate
from site_agent.statistics.proportions import (
    clopper_pearson,
    clustered_proportion_from_moments,
    wilson,
)
from site_agent.statistics.roc import histogram_auc, histogram_roc
from site_agent.statistics.summaries import (
    AgreementTable,
    CalibrationBins,
    ConfusionCounts,
    ProportionName,
    Scale,
    SufficientStatistics,
)

DEFAULT_CONFIDENCE = 0.95


class _Summary(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=False)


class ProportionMetrics(_Summary):
    """One proportion (e.g. sensitivity) with its Wilson, exact and clustered intervals."""

    successes: int
    total: int
    wilson: EstimateRecord
    clopper_pearson: EstimateRecord
    clustered: EstimateRecord
    """Cluster-robust (patients as clusters) ratio-estimator interval."""


class ScalarMetric(_Summary):
    """A number without an interval; None with a reason where undefined."""

    value: float | None
    n: int
    reason: str | None = None


class ThresholdMetrics(_Summary):
    """Classification metrics at one threshold (a case is called positive if score ≥ it)."""

    threshold: float
    tp: int
    fp: int
    fn: int
    tn: int
    sensitivity: ProportionMetrics
    specificity: ProportionMetrics
    ppv: ProportionMetrics
    npv: ProportionMetrics
    accuracy: EstimateRecord
    f1: ScalarMetric


class HistogramAucRecord(_Summary):
    """AUC from binned scores and the bound on its distance to the exact AUC."""

    auc: float | None
    bound: float | None
    n_positive: int
    n_negative: int
    reason: str | None = None


class RocPoints(_Summary):
    """ROC points, one per histogram edge, by decreasing threshold.

    The first threshold is None: above every score, nothing is called positive.
    """

    fpr: tuple[float, ...]
    tpr: tuple[float, ...]
    thresholds: tuple[float | None, ...]
    reason: str | None = None


class CalibrationPoint(_Summary):
    """One calibration bin: mean predicted score against observed disease rate."""

    lower: float
    upper: float
    n: int
    mean_score: float | None
    observed_rate: float | None


class KappaMetrics(_Summary):
    """Cohen's kappas of one agreement table."""

    raters: tuple[str, str]
    scale: Scale
    categories: tuple[int, ...]
    n: int
    unweighted: EstimateRecord
    linear: EstimateRecord
    quadratic: EstimateRecord


class MetricsSummary(_Summary):
    """Every derived metric of a site or of a pooled set of sites."""

    n_observations: int
    n_positive: int
    n_negative: int
    n_pending: int
    n_patients: int
    confidence: float
    prevalence: EstimateRecord
    thresholds: tuple[ThresholdMetrics, ...]
    auc: HistogramAucRecord
    roc: RocPoints
    brier: ScalarMetric
    ece: ScalarMetric
    calibration: tuple[CalibrationPoint, ...]
    agreement: tuple[KappaMetrics, ...] = Field(default=())


def summarize(
    statistics: SufficientStatistics, *, confidence: float = DEFAULT_CONFIDENCE
) -> MetricsSummary:
    """Derive every metric, with intervals, from sufficient statistics.

    Parameters
    ----------
    statistics
        One site's statistics or the merge of several sites'.
    confidence
        Two-sided level of every interval.

    References
    ----------
    Newcombe RG (1998). Statistics in Medicine 17:857–872 (Wilson, Clopper–Pearson).
    Rao JNK, Scott AJ (1992). Biometrics 48:577–585. doi:10.2307/2532311 (clustered).
    Hanley JA, McNeil BJ (1982). Radiology 143:29–36 (AUC of binned ratings).
    Brier GW (1950). Verification of forecasts expressed in terms of probability. Monthly
    Weather Review 78:1–3. doi:10.1175/1520-0493(1950)078<0001:VOFEIT>2.0.CO;2
    Naeini MP, Cooper GF, Hauskrecht M (2015). Obtaining well calibrated probabilities
    using Bayesian binning. Proc. AAAI 2015:2901–2907 (ECE).
    Cohen J (1960, 1968); Fleiss JL, Cohen J, Everitt BS (1969), see
    :func:`site_agent.statistics.agreement.cohen_kappa`.
    """
    s = statistics
    labelled = s.n_positive + s.n_negative
    h = s.histogram
    hist = histogram_auc(h.positive, h.negative)
    roc = histogram_roc(h.positive, h.negative, h.edges)
    return MetricsSummary(
        n_observations=s.n_observations,
        n_positive=s.n_positive,
        n_negative=s.n_negative,
        n_pending=s.n_pending,
        n_patients=s.n_patients,
        confidence=confidence,
        prevalence=EstimateRecord.of(wilson(s.n_positive, labelled, confidence)),
        thresholds=tuple(_threshold_metrics(c, confidence) for c in s.confusion),
        auc=HistogramAucRecord(
            auc=finite_or_none(hist.auc),
            bound=finite_or_none(hist.bound),
            n_positive=hist.n_positive,
            n_negative=hist.n_negative,
            reason=hist.reason,
        ),
        roc=RocPoints(
            fpr=roc.fpr,
            tpr=roc.tpr,
            thresholds=tuple(finite_or_none(t) for t in roc.thresholds),
            reason=roc.reason,
        ),
        brier=_brier(s.calibration),
        ece=_ece(s.calibration),
        calibration=_calibration_points(s.calibration),
        agreement=tuple(_kappas(t, confidence) for t in s.agreement),
    )


def _proportion(
    counts: ConfusionCounts, name: ProportionName, confidence: float
) -> ProportionMetrics:
    successes, total = counts.counts(name)
    mo = counts.moments(name)
    try:
        clustered = clustered_proportion_from_moments(
            mo.successes, mo.total, mo.clusters, mo.sum_a2, mo.sum_am, mo.sum_m2, confidence
        )
    except InputError:
        # Moments altered by a disclosure step (noise) may no longer fit the counts.
        clustered = Estimate.undefined(
            "cluster-ratio", total, "patient moments are inconsistent with the counts", confidence
        )
    return ProportionMetrics(
        successes=successes,
        total=total,
        wilson=EstimateRecord.of(wilson(successes, total, confidence)),
        clopper_pearson=EstimateRecord.of(clopper_pearson(successes, total, confidence)),
        clustered=EstimateRecord.of(clustered),
    )


def _threshold_metrics(c: ConfusionCounts, confidence: float) -> ThresholdMetrics:
    n = c.tp + c.fp + c.fn + c.tn
    # F1 = 2·TP / (2·TP + FP + FN), the harmonic mean of PPV and sensitivity (common practice).
    f1_denominator = 2 * c.tp + c.fp + c.fn
    f1 = (
        ScalarMetric(value=2 * c.tp / f1_denominator, n=n)
        if f1_denominator
        else ScalarMetric(value=None, n=n, reason="no positive cases and no positive calls")
    )
    return ThresholdMetrics(
        threshold=c.threshold,
        tp=c.tp,
        fp=c.fp,
        fn=c.fn,
        tn=c.tn,
        accuracy=EstimateRecord.of(wilson(c.tp + c.tn, n, confidence)),
        f1=f1,
        sensitivity=_proportion(c, "sensitivity", confidence),
        specificity=_proportion(c, "specificity", confidence),
        ppv=_proportion(c, "ppv", confidence),
        npv=_proportion(c, "npv", confidence),
    )


def _brier(bins: CalibrationBins) -> ScalarMetric:
    n = sum(bins.count)
    if n == 0:
        return ScalarMetric(value=None, n=0, reason="no labelled cases")
    # Brier (1950): BS = (1/N) Σ (score − label)², summed per bin so that it merges.
    return ScalarMetric(value=math.fsum(bins.squared_error_sum) / n, n=n)


def _ece(bins: CalibrationBins) -> ScalarMetric:
    n = sum(bins.count)
    if n == 0:
        return ScalarMetric(value=None, n=0, reason="no labelled cases")
    value = float(expected_calibration_error(bins.count, bins.score_sum, bins.label_sum))
    reason = None if math.isfinite(value) else "not defined on these data"
    return ScalarMetric(value=finite_or_none(value), n=n, reason=reason)


def _calibration_points(bins: CalibrationBins) -> tuple[CalibrationPoint, ...]:
    points = []
    for i, n in enumerate(bins.count):
        points.append(
            CalibrationPoint(
                lower=bins.edges[i],
                upper=bins.edges[i + 1],
                n=n,
                mean_score=bins.score_sum[i] / n if n else None,
                observed_rate=bins.label_sum[i] / n if n else None,
            )
        )
    return tuple(points)


def _kappas(table: AgreementTable, confidence: float) -> KappaMetrics:
    counts = table.matrix()
    return KappaMetrics(
        raters=table.raters,
        scale=table.scale,
        categories=table.categories,
        n=table.n,
        unweighted=EstimateRecord.of(cohen_kappa(counts, "none", confidence)),
        linear=EstimateRecord.of(cohen_kappa(counts, "linear", confidence)),
        quadratic=EstimateRecord.of(cohen_kappa(counts, "quadratic", confidence)),
    )
