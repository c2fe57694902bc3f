"""Pooling: turn the sites' releases into the study results.

Two kinds of pooled answer sit side by side, because they answer different questions:

- *pooled as one cohort*: the sites' sufficient statistics are merged (counts add up)
  and every metric is derived once from the merge, exactly as if the cases had been
  pooled (:meth:`~site_agent.statistics.summaries.SufficientStatistics.merge`);
- *random-effects meta-analysis*: each site's estimate is taken with its own variance
  and the between-site variance tau² is estimated (:mod:`coordinator.pooling.meta_analysis`),
  giving the mean performance across sites like these and a prediction interval for
  a new site.

The pooled AUC comes from the sites' score histograms, compared bin against bin (sites
may release different bins), with the largest possible binning error beside it.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from functools import reduce

from coordinator.pooling.comparisons import compare_score_distributions
from coordinator.pooling.meta_analysis import (
    EffectSizes,
    MetaAnalysis,
    log_diagnostic_odds_ratio,
    logit_auc,
    logit_sensitivity,
    logit_specificity,
    meta_analyze,
    pooled_vs_meta_note,
)
from coordinator.pooling.study_results import (
    CurvePoints,
    DistributionTest,
    MetaRow,
    MetricRow,
    ParticipantFlow,
    SiteOutcome,
    StudyResults,
    TwoByTwo,
)
from coordinator.runs.rounds import RoundOutcome
from site_agent.contract.protocol import StudyProtocol
from site_agent.contract.release import AucRecord, EstimateRecord, SiteRelease, SubgroupRelease
from site_agent.exceptions import InputError
from site_agent.statistics.estimates import two_sided_z
from site_agent.statistics.metrics import MetricsSummary, ProportionMetrics, summarize
from site_agent.statistics.roc import hanley_mcneil_se, mixed_histogram_auc
from site_agent.statistics.summaries import ScoreHistogram, SufficientStatistics

POOLED = "pooled"
"""Site name of the merged statistics in the results."""
META_METHODS: tuple[tuple[str, bool], ...] = (("reml", True), ("dl", False), ("fixed", False))
"""Meta-analyses run for every metric: REML with HKSJ (primary), DerSimonian-Laird, fixed."""


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


def merge_statistics(releases: Sequence[SiteRelease]) -> SufficientStatistics:
    """Merge the sites' sufficient statistics into those of one pooled cohort."""
    if not releases:
        raise InputError("no site released statistics: nothing to pool")
    return reduce(lambda a, b: a.merge(b), (r.statistics for r in releases))


def pooled_auc(releases: Sequence[SiteRelease], confidence: float = 0.95) -> MetricRow:
    """AUC of all sites' cases as one cohort; see :func:`cohort_auc`."""
    return cohort_auc([(r.statistics.histogram, r.exact.auc.auc) for r in releases], confidence)


def cohort_auc(
    parts: Sequence[tuple[ScoreHistogram, float | None]], confidence: float = 0.95
) -> MetricRow:
    """AUC of several sites' cases as one cohort, with the largest possible binning error.

    ``parts`` holds, per site, its score histogram and its exact AUC (None if withheld).

    The cohort AUC is a weighted sum over pairs of sites ``(i, j)`` of the share of
    (positive from ``i``, negative from ``j``) pairs ordered correctly::

        AUC = Σ_ij P_i N_j AUC_ij / (P N)

    Within a site (``i = j``) ``AUC_ii`` is the site's exact AUC, released as a scalar.
    Across sites it comes from the two sites' score histograms, compared bin against bin
    (:func:`site_agent.statistics.roc.mixed_histogram_auc`; sites may release different bins once
    disclosure control merges small ones), and only those pairs add to the bound. A site
    whose exact AUC is withheld (differential privacy) uses its histogram for its own
    pairs too. The interval is normal with the Hanley & McNeil (1982) standard error,
    which needs only the AUC and the class sizes.

    References
    ----------
    Hanley JA, McNeil BJ (1982). Radiology 143:29-36. doi:10.1148/radiology.143.1.7063747
    """
    hists = [h for h, _ in parts]
    pos = [sum(h.positive) for h in hists]
    neg = [sum(h.negative) for h in hists]
    big_p, big_n = sum(pos), sum(neg)
    reason = None if big_p and big_n else "the pooled cases lack a class: AUC undefined"
    value = bound = 0.0
    for i, (hi, exact_i) in enumerate(parts):
        for j, hj in enumerate(hists):
            if not pos[i] or not neg[j] or reason:
                continue
            weight = pos[i] * neg[j] / (big_p * big_n)
            exact = exact_i if i == j else None
            if exact is not None:
                value += weight * exact
                continue
            pair = mixed_histogram_auc([(hi.edges, hi.positive)], [(hj.edges, hj.negative)])
            value += weight * pair.auc
            bound += weight * pair.bound
    nan = float("nan")
    if reason:
        value = bound = nan
    se = hanley_mcneil_se(value, big_p, big_n)
    z = two_sided_z(confidence)
    return MetricRow(
        site=POOLED,
        metric="auc",
        method="hanley-mcneil",
        estimate=value,
        lower=max(0.0, value - z * se) if not reason else nan,
        upper=min(1.0, value + z * se) if not reason else nan,
        n=big_p + big_n,
        reason=reason,
        bound=None if reason else bound,
    )


def build_results(
    protocol: StudyProtocol,
    outcome: RoundOutcome,
    *,
    engine: str,
    sites: Mapping[str, SiteInfo] | None = None,
    confidence: float = 0.95,
    notes: Sequence[str] = (),
) -> StudyResults:
    """Assemble the study results from one round's releases, declines and faults.

    Parameters
    ----------
    protocol
        The study protocol the round ran.
    outcome
        The round's releases by site, declines and node faults.
    engine
        Which engine ran the round (``inprocess`` or ``loopback``), for the record.
    sites
        Roles, shift descriptions and resampling counts by site name; sites that are
        not named (or that never answered) count as external.
    confidence
        Two-sided level of every interval.
    notes
        Caveats to carry into the report.
    """
    info = dict(sites or {})
    releases = [outcome.releases[name] for name in sorted(outcome.releases)]
    metrics: list[MetricRow] = []
    curves: list[CurvePoints] = []
    two_by_two: list[TwoByTwo] = []
    flow: list[ParticipantFlow] = []
    summaries: dict[str, MetricsSummary] = {}
    for release in releases:
        summary = summarize(release.statistics, confidence=confidence)
        summaries[release.site] = summary
        metrics += _site_rows(release, summary)
        curves += _curves(release.site, summary)
        two_by_two += _tables(release.site, release.statistics)
        flow.append(_flow(release.site, release.statistics, info.get(release.site, SiteInfo())))
    meta: list[MetaRow] = []
    tests: list[DistributionTest] = []
    if releases:
        pooled = merge_statistics(releases)
        summary = summarize(pooled, confidence=confidence)
        summaries[POOLED] = summary
        metrics += [r for r in _summary_rows(POOLED, summary) if r.metric != "auc"]
        metrics.append(pooled_auc(releases, confidence))
        metrics += _pooled_subgroup_rows(releases, confidence)
        curves += _curves(POOLED, summary)
        two_by_two += _tables(POOLED, pooled)
        meta = _meta_rows(releases, confidence) + _site_subgroup_meta(releases, info, confidence)
        tests = _distribution_tests(releases)
    outcomes = _outcomes(outcome, info)
    return StudyResults(
        study_id=protocol.study_id,
        title=protocol.title,
        protocol_hash=outcome.protocol_hash,
        created_at=datetime.now(UTC),
        engine=engine,
        sites=outcomes,
        metrics=metrics,
        curves=curves,
        two_by_two=two_by_two,
        flow=flow,
        meta=meta,
        distribution_tests=tests,
        findings=_findings(outcomes, metrics, meta, info, confidence),
        notes=[*notes, pooled_vs_meta_note()],
    )


def _outcomes(outcome: RoundOutcome, info: Mapping[str, SiteInfo]) -> list[SiteOutcome]:
    rows = [
        SiteOutcome(site=name, status="released", **_described(info.get(name)))
        for name in sorted(outcome.releases)
    ]
    rows += [
        SiteOutcome(site=d.site, status="declined", reason=d.reason, **_described(info.get(d.site)))
        for d in outcome.declines
    ]
    answered = {*outcome.releases, *(d.site for d in outcome.declines)}
    # A deployment names the site of a fault where it knows it: that reason is the site's own.
    named = {f.site: f.reason for f in outcome.faults if f.site and f.site not in answered}
    rows += [
        SiteOutcome(site=name, status="silent", reason=why, **_described(info.get(name)))
        for name, why in sorted(named.items())
    ]
    answered |= set(named)
    silent = sorted(set(info) - answered)
    # Faults are known by node, not by site: a silent site gets the round's faults as context.
    faults = "; ".join(f"node {f.node_id}: {f.reason}" for f in outcome.faults)
    reasons = "no usable reply this round" + (f" (faults seen: {faults})" if faults else "")
    rows += [
        SiteOutcome(site=name, status="silent", reason=reasons, **_described(info[name]))
        for name in silent
    ]
    return rows


def _described(site: SiteInfo | None) -> dict[str, str | None]:
    site = site or SiteInfo()
    return {"role": site.role, "description": site.description}


def _row(
    site: str, metric: str, record: EstimateRecord, *, threshold: float | None = None
) -> MetricRow:
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
        _row(site, metric, record, threshold=threshold)
        for record in (p.wilson, p.clopper_pearson, p.clustered)
    ]


def _summary_rows(site: str, summary: MetricsSummary) -> list[MetricRow]:
    """Rows derived from sufficient statistics: the same for a site and for the pool."""
    rows = [_row(site, "prevalence", summary.prevalence)]
    for t in summary.thresholds:
        for name in ("sensitivity", "specificity", "ppv", "npv"):
            rows += _proportion_rows(site, name, getattr(t, name), t.threshold)
        rows.append(_row(site, "accuracy", t.accuracy, threshold=t.threshold))
        rows.append(_scalar(site, "f1", t.f1.value, t.f1.n, t.f1.reason, threshold=t.threshold))
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
    rows.append(_scalar(site, "brier", summary.brier.value, summary.brier.n, summary.brier.reason))
    rows.append(_scalar(site, "ece", summary.ece.value, summary.ece.n, summary.ece.reason))
    for k in summary.agreement:
        metric = f"kappa {k.raters[0]} vs {k.raters[1]}"
        for record in (k.unweighted, k.linear, k.quadratic):
            rows.append(_row(site, metric, record))
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


def _site_rows(release: SiteRelease, summary: MetricsSummary) -> list[MetricRow]:
    site = release.site
    exact = release.exact
    rows = [
        _auc_row(site, exact.auc, "delong"),
        _auc_row(site, exact.auc, "delong-logit"),
        _auc_row(site, exact.clustered_auc, "obuchowski"),
        *_summary_rows(site, summary),
        _row(site, "calibration intercept", exact.calibration.intercept),
        _row(site, "calibration slope", exact.calibration.slope),
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
                    _row(site, name, p.wilson, threshold=t.threshold).model_copy(
                        update={"subgroup": label}
                    )
                )
    return rows


def _curves(site: str, summary: MetricsSummary) -> list[CurvePoints]:
    curves = []
    if summary.roc.reason is None:
        curves.append(
            CurvePoints(site=site, kind="roc", x=list(summary.roc.fpr), y=list(summary.roc.tpr))
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


def _tables(site: str, statistics: SufficientStatistics) -> list[TwoByTwo]:
    return [
        TwoByTwo(site=site, threshold=c.threshold, tp=c.tp, fp=c.fp, fn=c.fn, tn=c.tn)
        for c in statistics.confusion
    ]


def _flow(site: str, s: SufficientStatistics, info: SiteInfo) -> ParticipantFlow:
    return ParticipantFlow(
        site=site,
        observations=s.n_observations,
        patients=s.n_patients,
        with_reference_standard=s.n_positive + s.n_negative,
        pending_reference_standard=s.n_pending,
        positives=s.n_positive,
        negatives=s.n_negative,
        resampled=info.resampled,
    )


def _pooled_subgroup_rows(releases: Sequence[SiteRelease], confidence: float) -> list[MetricRow]:
    """Subgroups pooled across sites: each level's cases from every site as one cohort."""
    levels: dict[tuple[str, str], list[SubgroupRelease]] = {}
    for release in releases:
        for group in release.subgroups:
            levels.setdefault((group.attribute, group.level), []).append(group)
    rows = []
    for (attribute, level), groups in sorted(levels.items()):
        label = f"{attribute}={level}"
        auc = cohort_auc([(g.statistics.histogram, g.auc.auc) for g in groups], confidence)
        rows.append(auc.model_copy(update={"subgroup": label}))
        merged = reduce(lambda a, b: a.merge(b), (g.statistics for g in groups))
        first = summarize(merged, confidence=confidence).thresholds[:1]
        for t in first:
            for name in ("sensitivity", "specificity"):
                p: ProportionMetrics = getattr(t, name)
                row = _row(POOLED, name, p.wilson, threshold=t.threshold)
                rows.append(row.model_copy(update={"subgroup": label}))
    return rows


def _distribution_tests(releases: Sequence[SiteRelease]) -> list[DistributionTest]:
    """Kruskal–Wallis across sites on binned scores: all cases, positives, negatives."""
    if len(releases) < 2:
        return []
    tests = compare_score_distributions([r.statistics.histogram for r in releases])
    return [
        DistributionTest(
            cases=cases,
            method="kruskal-wallis (binned scores)",
            statistic=t.statistic,
            df=t.df,
            p_value=t.p_value,
            n=t.n,
            sites=t.groups,
            reason=t.reason,
        )
        for cases, t in tests.items()
    ]


def _meta_rows(releases: Sequence[SiteRelease], confidence: float) -> list[MetaRow]:
    """Meta-analyse logit AUC, logit sensitivity and specificity, and log DOR across sites."""
    rows: list[MetaRow] = []
    usable = [r for r in releases if r.exact.auc.auc is not None and r.exact.auc.se]
    if len(usable) >= 2:
        aucs = [nan_if_none(r.exact.auc.auc) for r in usable]
        ses = [nan_if_none(r.exact.auc.se) for r in usable]
        rows += _meta("auc", logit_auc(aucs, ses), [r.site for r in usable], confidence)
    with_counts = [r for r in releases if r.statistics.confusion]
    if len(with_counts) >= 2:
        first = [r.statistics.confusion[0] for r in with_counts]
        labels = [r.site for r in with_counts]
        tp, fp, fn, tn = ([getattr(c, cell) for c in first] for cell in ("tp", "fp", "fn", "tn"))
        threshold = first[0].threshold
        sized: list[tuple[str, Callable[[], EffectSizes]]] = [
            (f"sensitivity@{threshold:g}", lambda: logit_sensitivity(tp, fn)),
            (f"specificity@{threshold:g}", lambda: logit_specificity(tn, fp)),
            (
                f"diagnostic odds ratio@{threshold:g}",
                lambda: log_diagnostic_odds_ratio(tp, fp, fn, tn),
            ),
        ]
        for metric, effect in sized:
            try:
                rows += _meta(metric, effect(), labels, confidence)
            except InputError:
                continue  # a class absent at some site: the measure is undefined there
    return rows


def _site_subgroup_meta(
    releases: Sequence[SiteRelease], info: Mapping[str, SiteInfo], confidence: float
) -> list[MetaRow]:
    """Random-effects AUC (REML, HKSJ) within each group of sites sharing a site attribute.

    The role (development or external) is always an attribute: the AUC across external
    sites alone is the external-validation answer. Levels with fewer than two sites that
    released an AUC are skipped.
    """
    levels: dict[tuple[str, str], list[SiteRelease]] = {}
    for release in releases:
        site = info.get(release.site, SiteInfo())
        for attribute, level in {"role": site.role, **site.attributes}.items():
            levels.setdefault((attribute, level), []).append(release)
    rows = []
    for (attribute, level), members in sorted(levels.items()):
        usable = [r for r in members if r.exact.auc.auc is not None and r.exact.auc.se]
        if len(usable) < 2 or len(usable) == len(releases):
            continue  # too few sites, or the same sites as the whole study
        effect = logit_auc(
            [nan_if_none(r.exact.auc.auc) for r in usable],
            [nan_if_none(r.exact.auc.se) for r in usable],
        )
        m = meta_analyze(
            effect.estimates,
            effect.variances,
            labels=[r.site for r in usable],
            method="reml",
            hksj=True,
            confidence=confidence,
            transform=effect.transform,
        )
        row = _meta_row("auc", m, effect)
        rows.append(row.model_copy(update={"subgroup": f"{attribute}={level}"}))
    return rows


def _meta(metric: str, effect: EffectSizes, labels: list[str], confidence: float) -> list[MetaRow]:
    rows = []
    for method, hksj in META_METHODS:
        m = meta_analyze(
            effect.estimates,
            effect.variances,
            labels=labels,
            method=method,  # type: ignore[arg-type]
            hksj=hksj,
            confidence=confidence,
            transform=effect.transform,
        )
        rows.append(_meta_row(metric, m, effect))
    return rows


def _meta_row(metric: str, m: MetaAnalysis, effect: EffectSizes) -> MetaRow:
    back = m.back_transformed
    estimate, lower, upper = (m.estimate, m.lower, m.upper)
    pred_lower, pred_upper = (m.prediction_lower, m.prediction_upper)
    if back is not None:
        estimate, lower, upper = back.estimate, back.lower, back.upper
        pred_lower, pred_upper = back.prediction_lower, back.prediction_upper
    notes = [*effect.notes, *m.notes]
    return MetaRow(
        metric=metric,
        method=m.method,
        scale=m.scale,
        estimate=estimate,
        lower=lower,
        upper=upper,
        prediction_lower=pred_lower,
        prediction_upper=pred_upper,
        tau2=m.tau2,
        i2=m.i2,
        h2=m.h2,
        q=m.q,
        q_pvalue=m.q_pvalue,
        k=m.k,
        hksj=m.hksj,
        note="; ".join(notes) or None,
    )


def _findings(
    outcomes: Sequence[SiteOutcome],
    metrics: Sequence[MetricRow],
    meta: Sequence[MetaRow],
    info: Mapping[str, SiteInfo],
    confidence: float,
) -> list[str]:
    """Plain-language findings: development versus external AUC, pooling, heterogeneity."""
    level = f"{confidence:.0%}"
    aucs = {
        r.site: r
        for r in metrics
        if r.metric == "auc" and r.method == "delong" and r.subgroup is None
    }
    findings = []
    development = [s for s, i in info.items() if i.role == "development" and s in aucs]
    external = sorted(
        (r for s, r in aucs.items() if s not in development and math.isfinite(r.estimate)),
        key=lambda r: r.estimate,
    )
    for site in development:
        r = aucs[site]
        findings.append(
            f"At the development site {site} the AUC was {r.estimate:.3f} "
            f"({level} CI {r.lower:.3f} to {r.upper:.3f})."
        )
    if external:
        low, high = external[0], external[-1]
        findings.append(
            f"At the {len(external)} external sites the AUC ranged from {low.estimate:.3f} "
            f"({low.site}) to {high.estimate:.3f} ({high.site})."
        )
        if development:
            dev = aucs[development[0]].estimate
            worse = [r for r in external if r.upper < dev]
            if worse:
                names = ", ".join(r.site for r in worse)
                findings.append(
                    f"The model performed measurably worse than at the development site at "
                    f"{len(worse)} site(s), whose {level} CI lies wholly below the development "
                    f"AUC: {names}."
                )
    for row in meta:
        if row.metric == "auc" and row.subgroup == "role=external":
            findings.append(
                f"Across the external sites alone (REML, HKSJ), the mean AUC is "
                f"{row.estimate:.3f} ({level} CI {row.lower:.3f} to {row.upper:.3f}); {level} "
                f"prediction interval for a new site {row.prediction_lower:.3f} to "
                f"{row.prediction_upper:.3f}."
            )
        if row.metric == "auc" and row.method == "reml" and row.subgroup is None:
            findings.append(
                f"Random-effects meta-analysis (REML, HKSJ) gives a mean AUC of "
                f"{row.estimate:.3f} ({level} CI {row.lower:.3f} to {row.upper:.3f}); a new site "
                f"should expect an AUC between {row.prediction_lower:.3f} and "
                f"{row.prediction_upper:.3f} ({level} prediction interval); "
                f"I² = {100 * row.i2:.0f}%."
            )
    not_released = [o for o in outcomes if o.status != "released"]
    if not_released:
        findings.append(
            "Sites that released nothing: "
            + "; ".join(f"{o.site} ({o.status}: {o.reason})" for o in not_released)
            + "."
        )
    return findings
