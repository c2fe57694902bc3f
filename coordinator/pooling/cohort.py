"""Pooled as one cohort: the sites' sufficient statistics merged, as if the cases had been pooled.

Counts add up (:meth:`~site_agent.statistics.summaries.SufficientStatistics.merge`) and
every metric is derived once from the merge. The cohort AUC comes from the sites' score
histograms, compared bin against bin (sites may release different bins), with the largest
possible binning error beside it. Subgroups are pooled the same way, level by level.
"""

from __future__ import annotations

from collections.abc import Sequence
from functools import reduce

import numpy as np

from coordinator.pooling.sites import POOLED, estimate_row
from coordinator.pooling.study_results import CurvePoints, MetricRow
from site_agent.contract.release import SiteRelease, SubgroupRelease
from site_agent.exceptions import InputError
from site_agent.statistics.binned_auc import clamped_logit, interpolated_auc
from site_agent.statistics.estimates import two_sided_z
from site_agent.statistics.metrics import ProportionMetrics, summarize
from site_agent.statistics.roc import hanley_mcneil_se
from site_agent.statistics.summaries import ScoreHistogram, SufficientStatistics


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
    with cases spread evenly in log-odds within a bin
    (:func:`site_agent.statistics.binned_auc.interpolated_auc`; sites may release
    different bins once disclosure control merges small ones), and only those pairs add
    to the bound, which is the largest distance from the estimate to any AUC the released
    bins allow. A site
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
            pair = interpolated_auc([(hi.edges, hi.positive)], [(hj.edges, hj.negative)])
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


def pooled_subgroup_rows(releases: Sequence[SiteRelease], confidence: float) -> list[MetricRow]:
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
                row = estimate_row(POOLED, name, p.wilson, threshold=t.threshold)
                rows.append(row.model_copy(update={"subgroup": label}))
    return rows


def cohort_roc(releases: Sequence[SiteRelease]) -> list[CurvePoints]:
    """ROC curve of all sites' cases as one cohort, from the sites' own score bins.

    Merging histograms keeps only the edges every site kept, which can leave a pooled
    curve of two or three points; here each threshold is an edge of any site, and a site's
    bin that straddles it counts the share of the bin above it, with cases spread evenly
    in log-odds within the bin (the assumption of
    :func:`site_agent.statistics.binned_auc.interpolated_auc`). Empty when a class is absent.
    """
    hists = [r.statistics.histogram for r in releases]
    big_p = sum(sum(h.positive) for h in hists)
    big_n = sum(sum(h.negative) for h in hists)
    if not releases or not big_p or not big_n:
        return []
    thresholds = np.array(sorted({e for h in hists for e in h.edges}, reverse=True))
    z = clamped_logit(thresholds)
    above_pos = np.zeros(thresholds.size)
    above_neg = np.zeros(thresholds.size)
    for h in hists:
        edges = clamped_logit(np.asarray(h.edges, dtype=float))
        lo, hi = edges[:-1], edges[1:]
        # Share of each bin at or above each threshold, cases spread evenly within the bin.
        width = np.maximum(hi - lo, 1e-12)
        share = np.clip((hi[None, :] - z[:, None]) / width[None, :], 0.0, 1.0)
        above_pos += share @ np.asarray(h.positive, dtype=float)
        above_neg += share @ np.asarray(h.negative, dtype=float)
    tpr = [0.0, *(above_pos / big_p).tolist(), 1.0]
    fpr = [0.0, *(above_neg / big_n).tolist(), 1.0]
    return [CurvePoints(site=POOLED, kind="roc", x=fpr, y=tpr)]
