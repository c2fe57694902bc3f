"""Pooled as one cohort: the sites' sufficient statistics merged, as if the cases had been pooled.

Counts add up (:meth:`~site_agent.statistics.summaries.SufficientStatistics.merge`) and
every metric is derived once from the merge. The cohort AUC comes from the sites' score
histograms, compared bin against bin (sites may release different bins), with the largest
possible binning error beside it. Subgroups are pooled the same way, level by level.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from functools import reduce

from coordinator.pooling.sites import POOLED, binned_auc_row, estimate_row
from coordinator.pooling.study_results import CurvePoints, MetricRow
from site_agent.contract.release import SiteRelease, SubgroupRelease
from site_agent.exceptions import InputError
from site_agent.statistics.binned_auc import (
    Histograms,
    interpolated_auc,
    interpolated_roc,
    shared_shape,
)
from site_agent.statistics.estimates import two_sided_z
from site_agent.statistics.metrics import ProportionMetrics, summarize
from site_agent.statistics.roc import HistogramAuc, hanley_mcneil_se
from site_agent.statistics.summaries import SufficientStatistics


def merge_statistics(releases: Sequence[SiteRelease]) -> SufficientStatistics:
    """Merge the sites' sufficient statistics into those of one pooled cohort."""
    if not releases:
        raise InputError("no site released statistics: nothing to pool")
    return reduce(lambda a, b: a.merge(b), (r.statistics for r in releases))


def pooled_auc(releases: Sequence[SiteRelease], confidence: float = 0.95) -> MetricRow:
    """AUC of all sites' cases as one cohort; see :func:`cohort_auc`."""
    return cohort_auc([(r.statistics, r.exact.auc.auc) for r in releases], confidence)


def cohort_auc(
    parts: Sequence[tuple[SufficientStatistics, float | None]], confidence: float = 0.95
) -> MetricRow:
    """AUC of several sites' cases as one cohort, with the largest possible binning error.

    ``parts`` holds, per site, its statistics (whose score histogram is used, suppressed
    cases as unknown within their span:
    :meth:`~site_agent.statistics.summaries.SufficientStatistics.class_bins`) and its exact
    AUC (None if withheld).

    The cohort AUC is a weighted sum over pairs of sites ``(i, j)`` of the share of
    (positive from ``i``, negative from ``j``) pairs ordered correctly::

        AUC = Σ_ij P_i N_j AUC_ij / (P N)

    Within a site (``i = j``) ``AUC_ii`` is the site's exact AUC, released as a scalar.
    Across sites it comes from the two sites' score histograms of each class, compared
    bin against bin (:func:`site_agent.statistics.binned_auc.interpolated_auc`; sites and
    classes keep different bins once disclosure control merges small ones), with each
    site's bin spread by the shape all sites' bins of that class give together
    (:func:`~site_agent.statistics.binned_auc.shared_shape`). Only those pairs add to the
    bound, which is the largest distance from the estimate to any AUC the released bins
    allow. A site
    whose exact AUC is withheld (differential privacy) uses its histogram for its own
    pairs too. The interval is normal with the Hanley & McNeil (1982) standard error,
    which needs only the AUC and the class sizes. When the bins allow AUCs on both sides
    of 0.5, the row gives only that range (:func:`~coordinator.pooling.sites.binned_auc_row`).

    References
    ----------
    Hanley JA, McNeil BJ (1982). Radiology 143:29-36. doi:10.1148/radiology.143.1.7063747
    """
    pair_auc = _pair_aucs([stats for stats, _ in parts])
    # Counted from the bins the pair AUCs use (noisy counts need not add up to the totals).
    pos, neg = (
        [sum(sum(counts) for _, counts in stats.class_bins(name)) for stats, _ in parts]
        for name in ("positive", "negative")
    )
    big_p, big_n = sum(pos), sum(neg)
    reason = None if big_p and big_n else "the pooled cases lack a class: AUC undefined"
    value = bound = 0.0
    for i, (_, exact_i) in enumerate(parts):
        for j in range(len(parts)):
            if not pos[i] or not neg[j] or reason:
                continue
            weight = pos[i] * neg[j] / (big_p * big_n)
            exact = exact_i if i == j else None
            if exact is not None:
                value += weight * exact
                continue
            pair = pair_auc(i, j)
            value += weight * pair.auc
            bound += weight * pair.bound
    nan = float("nan")
    if reason:
        value = bound = nan
    se = hanley_mcneil_se(value, big_p, big_n)
    z = two_sided_z(confidence)
    row = MetricRow(
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
    return binned_auc_row(row)


def site_binned_aucs(releases: Sequence[SiteRelease]) -> dict[str, HistogramAuc]:
    """Each site's AUC from its released bins, spread by the shape all sites' bins give.

    As :func:`cohort_auc` does across sites: within a site's wide bin, the other sites'
    narrower bins of the same class show how the scores spread
    (:func:`~site_agent.statistics.binned_auc.shared_shape`); the bound is still the site's
    own (the largest distance to any AUC its released bins allow).
    """
    pair_auc = _pair_aucs([r.statistics for r in releases])
    return {r.site: pair_auc(i, i) for i, r in enumerate(releases)}


def _pair_aucs(stats: Sequence[SufficientStatistics]) -> Callable[[int, int], HistogramAuc]:
    """Return the AUC from bins of site ``i``'s positives against site ``j``'s negatives.

    Every site's bins of a class are spread by the shape all sites' bins of that class
    give together (computed once here).
    """
    positives = [s.class_bins("positive") for s in stats]
    negatives = [s.class_bins("negative") for s in stats]
    spread_pos, spread_neg = _shared_by_site(positives), _shared_by_site(negatives)

    def pair_auc(i: int, j: int) -> HistogramAuc:
        spread = (spread_pos[i], spread_neg[j])
        return interpolated_auc(positives[i], negatives[j], spread=spread)

    return pair_auc


def _shared_by_site(sites: Sequence[Histograms]) -> list[Histograms]:
    """Return every site's histograms spread by the shape all of them give together."""
    flat = shared_shape([h for bins in sites for h in bins])
    out: list[Histograms] = []
    for bins in sites:
        out.append(flat[: len(bins)])
        flat = flat[len(bins) :]
    return out


def pooled_subgroup_rows(releases: Sequence[SiteRelease], confidence: float) -> list[MetricRow]:
    """Subgroups pooled across sites: each level's cases from every site as one cohort."""
    levels: dict[tuple[str, str], list[SubgroupRelease]] = {}
    for release in releases:
        for group in release.subgroups:
            levels.setdefault((group.attribute, group.level), []).append(group)
    rows = []
    for (attribute, level), groups in sorted(levels.items()):
        label = f"{attribute}={level}"
        auc = cohort_auc([(g.statistics, g.auc.auc) for g in groups], confidence)
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
    curve of two or three points; here each threshold is an edge of any site's bins of
    either class, and a bin that straddles it counts the share of the bin above it
    (:func:`site_agent.statistics.binned_auc.interpolated_roc`). Empty when a class is
    absent.
    """
    if not releases:
        return []
    curve, exact = interpolated_roc(
        [b for r in releases for b in r.statistics.class_bins("positive")],
        [b for r in releases for b in r.statistics.class_bins("negative")],
    )
    if curve.reason is not None:
        return []
    return [
        CurvePoints(
            site=POOLED, kind="roc", x=list(curve.fpr), y=list(curve.tpr), exact=list(exact)
        )
    ]


def cohort_calibration(site_curves: Sequence[CurvePoints]) -> list[CurvePoints]:
    """Calibration of all sites' cases together: every site's released bins as points.

    Merged statistics keep only the calibration edges every site kept, which can leave
    two bins; each site's own bins are exact, so the pooled panel shows all of them (one
    point per site and bin, ordered by mean score) rather than a coarser merge.
    """
    points = sorted(
        (x, y, n)
        for c in site_curves
        if c.kind == "calibration" and c.counts is not None
        for x, y, n in zip(c.x, c.y, c.counts, strict=True)
    )
    if not points:
        return []
    xs, ys, ns = zip(*points, strict=True)
    return [CurvePoints(site=POOLED, kind="calibration", x=list(xs), y=list(ys), counts=list(ns))]
