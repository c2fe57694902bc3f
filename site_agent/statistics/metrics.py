"""Metrics derived from sufficient statistics: the same code serves one site and a pooled merge.

:func:`summarize` turns :class:`~site_agent.statistics.summaries.SufficientStatistics` into a
:class:`MetricsSummary`: per threshold, sensitivity, specificity and predictive values
with three intervals each (Wilson, Clopper–Pearson, cluster-robust over patients),
accuracy, F1 and prevalence; the histogram AUC with its binning-error bound and ROC
points; Brier score and expected calibration error; Cohen's kappas for every agreement
table. A metric undefined on the data is ``None`` with a ``reason``; JSON never holds NaN.
A metric resting on a censored confusion cell (:mod:`site_agent.statistics.censored`) has
no point value: it carries the range of its values and the hull of its intervals over
every count the released cells allow, or is not released; the clustered interval, whose
patient moments leave with the cell, is not released.
"""

from __future__ import annotations

import math
from collections.abc import Callable

from pydantic import BaseModel, ConfigDict, Field

from site_agent.contract.release import EstimateRecord, finite_or_none
from site_agent.exceptions import InputError
from site_agent.statistics.agreement import cohen_kappa
from site_agent.statistics.binned_auc import interpolated_auc, interpolated_roc
from site_agent.statistics.calibration import expected_calibration_error
from site_agent.statistics.censored import (
    CENSORED_REASON,
    Cell,
    CensoredCount,
    cell_range,
    cells_hull,
    class_total,
)
from site_agent.statistics.estimates import Estimate
from site_agent.statistics.proportions import (
    clopper_pearson,
    clustered_proportion_from_moments,
    wilson,
)
from site_agent.statistics.summaries import (
    AgreementTable,
    CalibrationBins,
    ConfusionCounts,
    ProportionName,
    Scale,
    SufficientStatistics,
    hidden_bins,
)

DEFAULT_CONFIDENCE = 0.95
AGREEMENT_CENSORED_REASON = (
    "not released: site policy (an agreement cell is below the minimum cell size)"
)
"""Reason beside a kappa whose agreement table has suppressed cells."""
CALIBRATION_CENSORED_REASON = "range: calibration bins below the site's minimum cell size"
"""Reason beside a Brier score or ECE resting on suppressed calibration bins."""
AGREEMENT_WITHHELD_REASON = "not released: site policy (the table was withheld whole)"
"""Reason beside a kappa whose agreement table the site withheld (pending cases, or a
threshold that would split off a small count)."""


class _Summary(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=False)


class ProportionMetrics(_Summary):
    """One proportion (e.g. sensitivity) with its Wilson, exact and clustered intervals."""

    successes: int | None
    """None when a cell of the proportion is censored (the intervals are then hulls)."""
    total: int | None
    wilson: EstimateRecord
    clopper_pearson: EstimateRecord
    clustered: EstimateRecord
    """Cluster-robust (patients as clusters) ratio-estimator interval."""


class ScalarMetric(_Summary):
    """A number without an interval; None with a reason where undefined."""

    value: float | None
    n: int
    reason: str | None = None
    low: float | None = None
    high: float | None = None
    """With a censored cell: the smallest and largest value (``value`` is then None)."""


class ThresholdMetrics(_Summary):
    """Classification metrics at one threshold (a case is called positive if score ≥ it)."""

    threshold: float
    tp: Cell
    fp: Cell
    fn: Cell
    tn: Cell
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
    """ROC points, one per histogram edge of either class, by decreasing threshold.

    The first threshold is None: above every score, nothing is called positive. ``exact``
    says which points rest on released counts of both classes; at the others one
    coordinate is interpolated within a bin
    (:func:`site_agent.statistics.binned_auc.interpolated_roc`).
    """

    fpr: tuple[float, ...]
    tpr: tuple[float, ...]
    thresholds: tuple[float | None, ...]
    exact: tuple[bool, ...] = ()
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
    """Cases in the table's released cells: a lower bound when ``censored``."""
    censored: bool = False
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
    withheld_agreement: tuple[tuple[str, str], ...] = Field(
        default=(), description="Raters of agreement tables withheld whole: no kappa."
    )


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
    Censored cells: see :mod:`site_agent.statistics.censored`.
    """
    s = statistics
    labelled = s.n_positive + s.n_negative
    classes = s.class_bins("positive"), s.class_bins("negative")
    hist = interpolated_auc(*classes)
    roc, exact = interpolated_roc(*classes)
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
            exact=exact,
            reason=roc.reason,
        ),
        brier=_brier(s),
        ece=_ece(s),
        calibration=_calibration_points(s.calibration),
        agreement=tuple(_kappas(t, confidence) for t in s.agreement),
        withheld_agreement=s.withheld_agreement,
    )


def _proportion(
    counts: ConfusionCounts, name: ProportionName, confidence: float
) -> ProportionMetrics:
    exact = counts.counts(name)
    if exact is None:
        return _censored_proportion(counts, name, confidence)
    successes, total = exact
    if counts.censored:  # the threshold's patient moments left with its censored cells
        return ProportionMetrics(
            successes=successes,
            total=total,
            wilson=EstimateRecord.of(wilson(successes, total, confidence)),
            clopper_pearson=EstimateRecord.of(clopper_pearson(successes, total, confidence)),
            clustered=EstimateRecord.of_hull(
                None, method="cluster-ratio", n=total, confidence=confidence
            ),
        )
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


_ONE_CLASS = ("sensitivity", "specificity")
"""Proportions whose two cells split one class (the others, PPV and NPV, span both)."""


def _censored_proportion(
    counts: ConfusionCounts, name: ProportionName, confidence: float
) -> ProportionMetrics:
    """Return a proportion resting on a censored cell: the hull over every count the cells allow.

    The clustered interval needs the patient moments, which leave with the cell: it is
    not released.
    """
    s, f = counts.cells(name)
    # Sensitivity and specificity split one class, whose total is released; PPV and NPV
    # span both classes: their total is known only from below.
    n = class_total(s, f) if name in _ONE_CLASS else cell_range(s)[0] + cell_range(f)[0]

    def record(interval: Callable[[int, int, float], Estimate], method: str) -> EstimateRecord:
        hull = cells_hull(s, f, interval, confidence, partners=name in _ONE_CLASS)
        return EstimateRecord.of_hull(hull, method=method, n=n, confidence=confidence)

    return ProportionMetrics(
        successes=None,
        total=None,
        wilson=record(wilson, "wilson"),
        clopper_pearson=record(clopper_pearson, "clopper-pearson"),
        clustered=EstimateRecord.of_hull(None, method="cluster-ratio", n=n, confidence=confidence),
    )


def _accuracy(c: ConfusionCounts, confidence: float) -> EstimateRecord:
    """Accuracy (TP + TN) / N with its Wilson interval; the hull if a cell is censored."""
    (tp_lo, tp_hi), (tn_lo, tn_hi) = cell_range(c.tp), cell_range(c.tn)
    (fp_lo, _), (fn_lo, _) = cell_range(c.fp), cell_range(c.fn)
    if not c.censored:
        n = tp_lo + tn_lo + fp_lo + fn_lo
        return EstimateRecord.of(wilson(tp_lo + tn_lo, n, confidence))
    n = class_total(c.tp, c.fn) + class_total(c.tn, c.fp)
    right = CensoredCount(low=tp_lo + tn_lo, high=tp_hi + tn_hi, class_total=n)
    wrong = CensoredCount(low=n - right.high, high=n - right.low, class_total=n)
    hull = cells_hull(right, wrong, wilson, confidence, partners=True)
    return EstimateRecord.of_hull(hull, method="wilson", n=n, confidence=confidence)


def _f1(c: ConfusionCounts) -> ScalarMetric:
    """F1 = 2·TP / (2·TP + FP + FN), the harmonic mean of PPV and sensitivity (common practice).

    With ``P = TP + FN`` (the positive class total) F1 = 2·TP / (TP + P + FP), which
    increases with TP and decreases with FP: over censored cells its extremes lie at the
    corners (smallest TP with largest FP, and the reverse).
    """
    positives = class_total(c.tp, c.fn)
    (tp_lo, tp_hi), (fp_lo, fp_hi) = cell_range(c.tp), cell_range(c.fp)
    n = positives + class_total(c.tn, c.fp)
    if tp_hi + positives + fp_hi == 0:
        return ScalarMetric(value=None, n=n, reason="no positive cases and no positive calls")
    if not c.censored:
        return ScalarMetric(value=2 * tp_lo / (tp_lo + positives + fp_lo), n=n)
    if tp_lo + positives + fp_lo == 0:
        return ScalarMetric(value=None, n=n, reason=CENSORED_REASON)
    return ScalarMetric(
        value=None,
        n=n,
        reason=CENSORED_REASON,
        low=2 * tp_lo / (tp_lo + positives + fp_hi),
        high=2 * tp_hi / (tp_hi + positives + fp_lo),
    )


def _threshold_metrics(c: ConfusionCounts, confidence: float) -> ThresholdMetrics:
    return ThresholdMetrics(
        threshold=c.threshold,
        tp=c.tp,
        fp=c.fp,
        fn=c.fn,
        tn=c.tn,
        accuracy=_accuracy(c, confidence),
        f1=_f1(c),
        sensitivity=_proportion(c, "sensitivity", confidence),
        specificity=_proportion(c, "specificity", confidence),
        ppv=_proportion(c, "ppv", confidence),
        npv=_proportion(c, "npv", confidence),
    )


def _brier(s: SufficientStatistics) -> ScalarMetric:
    """Return the Brier score, or its range when calibration bins are suppressed.

    Brier (1950): BS = (1/N) Σ (score − label)², summed per bin so that it merges. With
    calibration bins suppressed (released as 0), the cases they held are known in number
    and class but not in place: the score is the range over their possible bins.
    """
    bins = s.calibration
    n = sum(bins.count)
    hidden = _hidden_calibration(s)
    if hidden is None:
        if n == 0:
            return ScalarMetric(value=None, n=0, reason="no labelled cases")
        return ScalarMetric(value=math.fsum(bins.squared_error_sum) / n, n=n)
    positives, negatives, low_edges, high_edges = hidden
    total = n + positives + negatives
    known = math.fsum(bins.squared_error_sum)
    # A hidden positive in [a, b) errs by (1 − score)², a hidden negative by score².
    low = known + positives * min((1 - b) ** 2 for b in high_edges)
    low += negatives * min(a**2 for a in low_edges)
    high = known + positives * max((1 - a) ** 2 for a in low_edges)
    high += negatives * max(b**2 for b in high_edges)
    return ScalarMetric(
        value=None, n=total, reason=CALIBRATION_CENSORED_REASON, low=low / total, high=high / total
    )


def _ece(s: SufficientStatistics) -> ScalarMetric:
    """Return the expected calibration error; a range when calibration bins are suppressed.

    A suppressed bin adds ``|Σ(score − label)|`` over its cases, between 0 and
    ``Σ|score − label|`` (at most ``1 − a`` per positive and ``b`` per negative in [a, b));
    a merged bin that also holds released cases, between 0 and their ``|Σ|`` plus that.
    """
    bins = s.calibration
    n = sum(bins.count)
    hidden = _hidden_calibration(s)
    if hidden is None:
        if n == 0:
            return ScalarMetric(value=None, n=0, reason="no labelled cases")
        value = float(expected_calibration_error(bins.count, bins.score_sum, bins.label_sum))
        reason = None if math.isfinite(value) else "not defined on these data"
        return ScalarMetric(value=finite_or_none(value), n=n, reason=reason)
    positives, negatives, low_edges, high_edges = hidden
    total = n + positives + negatives
    gaps = [abs(a - b) for a, b in zip(bins.score_sum, bins.label_sum, strict=True)]
    suppressed = set(bins.suppressed)
    # A bin holding hidden cases and released ones (after a merge) may cancel to 0.
    known = math.fsum(g for i, g in enumerate(gaps) if i not in suppressed)
    most = positives * max(1 - a for a in low_edges) + negatives * max(high_edges)
    return ScalarMetric(
        value=None,
        n=total,
        reason=CALIBRATION_CENSORED_REASON,
        low=known / total,
        high=(math.fsum(gaps) + most) / total,
    )


def _hidden_calibration(
    s: SufficientStatistics,
) -> tuple[int, int, list[float], list[float]] | None:
    """Return hidden positives and negatives and the lower and upper edges of their bins.

    Hidden: labelled cases in no released calibration bin (the bins a site suppressed read
    0; the class totals are released). They lie in the suppressed bins (after a merge,
    bins that also hold other sites' released cases), or, for statistics that do not list
    them, in the bins that read 0. None when every labelled case is in a released bin
    (noisy counts may even add up to more).
    """
    bins = s.calibration
    positives = max(0, s.n_positive - sum(bins.label_sum))
    negatives = max(0, s.n_negative - (sum(bins.count) - sum(bins.label_sum)))
    empty = hidden_bins(bins.suppressed, bins.count)
    if not (positives or negatives) or not empty:
        return None
    return positives, negatives, [bins.edges[i] for i in empty], [bins.edges[i + 1] for i in empty]


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
    if table.censored:  # suppressed cells read 0 but are unknown: no kappa from them
        withheld = EstimateRecord.of_hull(
            None, method="cohen-kappa", n=table.n, confidence=confidence
        ).model_copy(update={"reason": AGREEMENT_CENSORED_REASON})
        return KappaMetrics(
            raters=table.raters,
            scale=table.scale,
            categories=table.categories,
            n=table.n,
            censored=True,
            unweighted=withheld,
            linear=withheld.model_copy(update={"method": "cohen-kappa-linear"}),
            quadratic=withheld.model_copy(update={"method": "cohen-kappa-quadratic"}),
        )
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
