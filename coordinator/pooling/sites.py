"""What each site contributes to the study results: metric rows, curves, 2×2 tables, flow.

Every released record becomes a :class:`~coordinator.pooling.study_results.MetricRow`
(estimate with its interval); undefined values (written as None in a release) become NaN
with the site's reason beside them, never zero. The rows derived from sufficient
statistics (:func:`summary_rows`) are the same for one site and for the merged pool.
:class:`SiteInfo` carries what the coordinator knows about a site beyond its release.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field

from coordinator.pooling.study_results import (
    COARSE_BINS_REASON,
    CurvePoints,
    MetricRow,
    ParticipantFlow,
    TwoByTwo,
)
from site_agent.contract.release import AucRecord, EstimateRecord, SiteRelease
from site_agent.statistics.metrics import (
    AGREEMENT_WITHHELD_REASON,
    MetricsSummary,
    ProportionMetrics,
    summarize,
)
from site_agent.statistics.summaries import SufficientStatistics

POOLED = "pooled"
"""Site name of the merged statistics in the results."""
CHANCE_AUC = 0.5
KAPPA_METHODS = ("cohen-kappa", "cohen-kappa-linear", "cohen-kappa-quadratic")
"""Methods of a table's three kappa rows (unweighted, linear and quadratic weights)."""


def binned_auc_row(row: MetricRow) -> MetricRow:
    """Return an AUC from score bins, or only the range its bins allow when that holds 0.5.

    The released bins allow any AUC within ``estimate ± bound`` (in [0, 1]). When that
    range holds 0.5 the bins cannot tell the model from chance, and the estimate would
    rest only on how cases are assumed to spread within bins: the row then carries the
    range (``estimate_low``, ``estimate_high``) and :data:`COARSE_BINS_REASON`, with no
    estimate and no interval (a guess is not shown as a number).
    """
    if row.bound is None or not math.isfinite(row.estimate):
        return row
    low, high = max(0.0, row.estimate - row.bound), min(1.0, row.estimate + row.bound)
    if not low <= CHANCE_AUC <= high:
        return row
    nan = float("nan")
    update = {"estimate": nan, "lower": nan, "upper": nan, "bound": None}
    return row.model_copy(
        update={**update, "estimate_low": low, "estimate_high": high, "reason": COARSE_BINS_REASON}
    )


@dataclass(frozen=True, slots=True)
class SiteInfo:
    """What the coordinator knows about a site beyond its release (rehearsals fill it)."""

    role: str = "external"
    description: str | None = None
    resampled: int = 0
    attributes: Mapping[str, str] = field(default_factory=dict)
    """Site-level attributes (e.g. main scanner vendor) for subgroups of sites."""


def nan_if_none(value: float | None) -> float:
    """Return ``value``, or NaN for None (the release writes undefined values as None)."""
    return float("nan") if value is None else float(value)


def estimate_row(
    site: str, metric: str, record: EstimateRecord, *, threshold: float | None = None
) -> MetricRow:
    """Return one released estimate with its interval as a metric row."""
    return MetricRow(
        site=site,
        metric=metric,
        method=record.method,
        estimate=nan_if_none(record.estimate),
        lower=nan_if_none(record.lower),
        upper=nan_if_none(record.upper),
        threshold=threshold,
        n=record.n,
        reason=record.reason,
        estimate_low=record.estimate_low,
        estimate_high=record.estimate_high,
    )


def _auc_row(site: str, auc: AucRecord, method: str, bound: float | None = None) -> MetricRow:
    logit = method.endswith("logit")
    return MetricRow(
        site=site,
        metric="auc",
        method=method,
        estimate=nan_if_none(auc.auc),
        lower=nan_if_none(auc.logit_lower if logit else auc.lower),
        upper=nan_if_none(auc.logit_upper if logit else auc.upper),
        n=auc.n_positive + auc.n_negative,
        reason=auc.reason,
        bound=bound,
    )


def _proportion_rows(
    site: str, metric: str, p: ProportionMetrics, threshold: float
) -> list[MetricRow]:
    return [
        estimate_row(site, metric, record, threshold=threshold)
        for record in (p.wilson, p.clopper_pearson, p.clustered)
    ]


def summary_rows(site: str, summary: MetricsSummary) -> list[MetricRow]:
    """Rows derived from sufficient statistics: the same for a site and for the pool."""
    rows = [estimate_row(site, "prevalence", summary.prevalence)]
    for t in summary.thresholds:
        for name in ("sensitivity", "specificity", "ppv", "npv"):
            rows += _proportion_rows(site, name, getattr(t, name), t.threshold)
        rows.append(estimate_row(site, "accuracy", t.accuracy, threshold=t.threshold))
        f1 = _scalar(site, "f1", t.f1.value, t.f1.n, t.f1.reason, threshold=t.threshold)
        rows.append(f1.model_copy(update={"estimate_low": t.f1.low, "estimate_high": t.f1.high}))
    rows.append(
        MetricRow(
            site=site,
            metric="auc",
            method="histogram",
            estimate=nan_if_none(summary.auc.auc),
            lower=float("nan"),
            upper=float("nan"),
            n=summary.auc.n_positive + summary.auc.n_negative,
            reason=summary.auc.reason,
            bound=summary.auc.bound,
        )
    )
    for name in ("brier", "ece"):
        m = getattr(summary, name)
        row = _scalar(site, name, m.value, m.n, m.reason)
        rows.append(row.model_copy(update={"estimate_low": m.low, "estimate_high": m.high}))
    for k in summary.agreement:
        metric = f"kappa {k.raters[0]} vs {k.raters[1]}"
        for record in (k.unweighted, k.linear, k.quadratic):
            rows.append(estimate_row(site, metric, record))
    for first, second in summary.withheld_agreement:
        for method in KAPPA_METHODS:
            rows.append(
                _scalar(
                    site, f"kappa {first} vs {second}", None, 0, AGREEMENT_WITHHELD_REASON
                ).model_copy(update={"method": method})
            )
    return rows


def _scalar(
    site: str,
    metric: str,
    value: float | None,
    n: int,
    reason: str | None,
    *,
    threshold: float | None = None,
) -> MetricRow:
    nan = float("nan")
    return MetricRow(
        site=site,
        metric=metric,
        method="point",
        estimate=nan_if_none(value),
        lower=nan,
        upper=nan,
        threshold=threshold,
        n=n,
        reason=reason,
    )


def site_rows(release: SiteRelease, summary: MetricsSummary) -> list[MetricRow]:
    """Rows of one site: exact AUCs, summary rows, calibration, readers and subgroups."""
    site = release.site
    exact = release.exact
    rows = [
        _auc_row(site, exact.auc, "delong"),
        _auc_row(site, exact.auc, "delong-logit"),
        _auc_row(site, exact.clustered_auc, "obuchowski"),
        *summary_rows(site, summary),
        estimate_row(site, "calibration intercept", exact.calibration.intercept),
        estimate_row(site, "calibration slope", exact.calibration.slope),
    ]
    for c in exact.readers:
        rows.append(
            MetricRow(
                site=site,
                metric=f"auc difference model - {c.reader}",
                method="paired-delong",
                estimate=nan_if_none(c.difference),
                lower=nan_if_none(c.lower),
                upper=nan_if_none(c.upper),
                n=c.n_positive + c.n_negative,
                reason=c.reason,
            )
        )
    first = release.statistics.confusion[0].threshold if release.statistics.confusion else None
    for group in release.subgroups:
        label = f"{group.attribute}={group.level}"
        rows.append(_auc_row(site, group.auc, "delong").model_copy(update={"subgroup": label}))
        sub = summarize(group.statistics)
        for t in sub.thresholds:
            if t.threshold != first:
                continue
            for name in ("sensitivity", "specificity"):
                p: ProportionMetrics = getattr(t, name)
                rows.append(
                    estimate_row(site, name, p.wilson, threshold=t.threshold).model_copy(
                        update={"subgroup": label}
                    )
                )
    return rows


def site_curves(site: str, summary: MetricsSummary) -> list[CurvePoints]:
    """ROC and calibration curves of one site (or the pool), where they are defined."""
    curves = []
    if summary.roc.reason is None:
        curves.append(
            CurvePoints(
                site=site,
                kind="roc",
                x=list(summary.roc.fpr),
                y=list(summary.roc.tpr),
                exact=list(summary.roc.exact),
            )
        )
    filled = [p for p in summary.calibration if p.n > 0 and p.mean_score is not None]
    if filled:
        curves.append(
            CurvePoints(
                site=site,
                kind="calibration",
                x=[nan_if_none(p.mean_score) for p in filled],
                y=[nan_if_none(p.observed_rate) for p in filled],
                counts=[p.n for p in filled],
            )
        )
    return curves


def two_by_two_tables(site: str, statistics: SufficientStatistics) -> list[TwoByTwo]:
    """One 2×2 table per threshold of one site (or the pool)."""
    return [
        TwoByTwo(site=site, threshold=c.threshold, tp=c.tp, fp=c.fp, fn=c.fn, tn=c.tn)
        for c in statistics.confusion
    ]


def participant_flow(site: str, s: SufficientStatistics, info: SiteInfo) -> ParticipantFlow:
    """Return one site's participant-flow counts (STARD 2015 item 19)."""
    return ParticipantFlow(
        site=site,
        observations=s.n_observations,
        patients=s.n_patients,
        with_reference_standard=s.n_positive + s.n_negative,
        pending_reference_standard=None if s.pending_withheld else s.n_pending,
        positives=s.n_positive,
        negatives=s.n_negative,
        resampled=info.resampled,
    )
