"""Pooling: turn the sites' releases into the study results.

Two kinds of pooled answer sit side by side, because they answer different questions:

- *pooled as one cohort*: the sites' sufficient statistics are merged (counts add up)
  and every metric is derived once from the merge, exactly as if the cases had been
  pooled (:mod:`coordinator.pooling.cohort`);
- *random-effects meta-analysis*: each site's estimate is taken with its own variance
  and the between-site variance tau² is estimated (:mod:`coordinator.pooling.meta_rows`
  over :mod:`coordinator.pooling.meta_analysis`), giving the mean performance across
  sites like these and a prediction interval for a new site.

The pooled AUC comes from the sites' score histograms, compared bin against bin (sites
may release different bins), with the largest possible binning error beside it. Each
site's own rows, curves, 2×2 tables and flow come from :mod:`coordinator.pooling.sites`;
the plain-language findings from :mod:`coordinator.pooling.findings`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from datetime import UTC, datetime

from coordinator.pooling.cohort import (
    cohort_calibration,
    cohort_roc,
    merge_statistics,
    pooled_auc,
    pooled_subgroup_rows,
    site_binned_aucs,
)
from coordinator.pooling.comparisons import compare_score_distributions
from coordinator.pooling.findings import study_findings
from coordinator.pooling.meta_analysis import pooled_vs_meta_note
from coordinator.pooling.meta_rows import meta_rows, site_subgroup_meta
from coordinator.pooling.sites import (
    POOLED,
    SiteInfo,
    binned_auc_row,
    participant_flow,
    site_curves,
    site_rows,
    summary_rows,
    two_by_two_tables,
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
from site_agent.contract.release import SiteRelease
from site_agent.statistics.metrics import MetricsSummary, summarize
from site_agent.statistics.roc import HistogramAuc


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
        metrics += site_rows(release, summary)
        curves += site_curves(release.site, summary)
        two_by_two += two_by_two_tables(release.site, release.statistics)
        flow.append(
            participant_flow(release.site, release.statistics, info.get(release.site, SiteInfo()))
        )
    meta: list[MetaRow] = []
    tests: list[DistributionTest] = []
    if releases:
        metrics = _with_shared_shape(metrics, site_binned_aucs(releases))
        pooled = merge_statistics(releases)
        summary = summarize(pooled, confidence=confidence)
        summaries[POOLED] = summary
        metrics += [r for r in summary_rows(POOLED, summary) if r.metric != "auc"]
        metrics.append(pooled_auc(releases, confidence))
        metrics += pooled_subgroup_rows(releases, confidence)
        # The pooled curves come from every site's own bins, not from the merged ones.
        curves += cohort_calibration(curves) + cohort_roc(releases)
        two_by_two += two_by_two_tables(POOLED, pooled)
        meta = meta_rows(releases, confidence) + site_subgroup_meta(releases, info, confidence)
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
        findings=study_findings(outcomes, metrics, meta, info, confidence),
        notes=[*notes, pooled_vs_meta_note()],
    )


def _with_shared_shape(rows: list[MetricRow], binned: dict[str, HistogramAuc]) -> list[MetricRow]:
    """Replace each site's AUC from score bins by the one spread by all sites' bins.

    Either is then given as a range alone when its bins cannot tell it from chance
    (:func:`~coordinator.pooling.sites.binned_auc_row`).
    """
    out = []
    for row in rows:
        if row.metric == "auc" and row.method == "histogram" and row.subgroup is None:
            auc = binned.get(row.site)
            if auc is not None and auc.reason is None:
                row = row.model_copy(update={"estimate": auc.auc, "bound": auc.bound})
            row = binned_auc_row(row)
        out.append(row)
    return out


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
            reason=t.reason or _left_out(releases, cases),
        )
        for cases, t in tests.items()
    ]


def _left_out(releases: Sequence[SiteRelease], cases: str) -> str | None:
    """Say how many cases bins a site suppressed keep out of a test on released bins."""
    hidden = 0
    for r in releases:
        s, h = r.statistics, r.statistics.histogram
        released = {"all cases": (s.n_observations, h.all), "positives": (s.n_positive, h.positive)}
        released["negatives"] = (s.n_negative, h.negative)
        total, row = released[cases]
        hidden += max(0, total - sum(row))
    if not hidden:
        return None
    return f"without {hidden} cases in score bins a site suppressed (their place is unknown)"
