"""Adaptation curves: how many local cases a site needs for the model to work there.

:func:`adaptation_rows` summarises the sites' adaptation releases
(:mod:`coordinator.adaptation.requests` collects them):

- per site and case count, the metric after fine-tuning is combined over the seeds by
  Rubin's rules on the logit scale
  (:func:`~coordinator.adaptation.combination.combine_over_seeds`): the mean of the seeds'
  logits, with a variance that adds the mean within-seed variance (DeLong for the AUC,
  binomial for sensitivity and specificity) and the between-seed variance; where a seed's
  AUC is exactly 0 or 1 the AUC is combined on its own scale and the interval truncated to
  [0, 1] (:func:`~coordinator.adaptation.combination.combine_auc_over_seeds`);
- pooled across sites, the *mean of the sites' logit estimates* with every site weighted
  equally; its interval treats the sites as fixed (it describes these sites, not a new
  one; the random-effects analysis of the evaluation round speaks to new sites);
- per site and case count, the paired DeLong change of AUC (after − before, on the same
  held-out cases) combined over the seeds by Rubin's rules on its own scale
  (:func:`~coordinator.adaptation.combination.combine_differences`; rows with metric
  :data:`AUC_CHANGE`, not pooled);
- per site, the smallest case count whose combined AUC comes within the plan's margin of
  the development site's AUC (:func:`adequate_cases`, judged on the point estimate).

References
----------
D.B. Rubin (1987). Multiple imputation for nonresponse in surveys. Wiley, New York.
Chapter 3 (combining rules, degrees of freedom). DOI: 10.1002/9780470316696
DeLong ER, DeLong DM, Clarke-Pearson DL (1988). Biometrics 44:837-845 (the per-seed
variances of the AUC and of its paired change).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence

import numpy as np

from coordinator.adaptation.combination import (
    Combined,
    combine_auc_over_seeds,
    combine_differences,
    combine_over_seeds,
    combine_over_sites,
    metric_logit,
)
from coordinator.pooling.study_results import AdaptationRow, AdequateCases
from site_agent.contract.adaptation_release import AdaptationPoint, AdaptationRelease, Performance
from site_agent.exceptions import InputError

POOLED = "pooled"
WHOLE_POOL = "all"
"""Label of the whole training pool among the case counts."""
METRICS = ("auc", "sensitivity", "specificity")
AUC_CHANGE = "auc_change"
"""Metric name of the rows holding the paired DeLong AUC change after − before."""


def _raw(perf: Performance, metric: str, threshold: float | None) -> float:
    if metric == "auc":
        return math.nan if perf.auc.auc is None else perf.auc.auc
    for t in perf.at_thresholds:
        if t.threshold == threshold:
            record = t.sensitivity if metric == "sensitivity" else t.specificity
            return math.nan if record.estimate is None else record.estimate
    return math.nan


def site_rows(
    release: AdaptationRelease, thresholds: Sequence[float], confidence: float = 0.95
) -> tuple[list[AdaptationRow], dict[tuple[str, int | None, float | None], Combined]]:
    """Return one site's adaptation rows and the combined values behind them."""
    counts: list[int | None] = []
    for p in release.points:
        if p.n_requested not in counts:
            counts.append(p.n_requested)
    rows: list[AdaptationRow] = []
    combined: dict[tuple[str, int | None, float | None], Combined] = {}
    for metric, threshold in _metric_keys(thresholds):
        for n in counts:
            points = [p for p in release.points if p.n_requested == n]
            if metric == "auc":
                c, method = combine_auc_over_seeds([p.after.auc for p in points], confidence)
            else:
                pairs = [metric_logit(p.after, metric, threshold) for p in points]
                c = combine_over_seeds([a for a, _ in pairs], [b for _, b in pairs], confidence)
                method = "rubin-logit"
            raw = [
                v for v in (_raw(p.after, metric, threshold) for p in points) if math.isfinite(v)
            ]
            combined[(metric, n, threshold)] = c
            rows.append(
                AdaptationRow(
                    site=release.site,
                    metric=metric,
                    n_cases=n,
                    n_used=float(np.mean([p.n_used for p in points])),
                    estimate=c.estimate,
                    lower=c.lower,
                    upper=c.upper,
                    seed_min=min(raw) if raw else math.nan,
                    seed_max=max(raw) if raw else math.nan,
                    repeats=len(points),
                    threshold=threshold,
                    method=method,
                    reason=c.reason,
                )
            )
    for n in counts:
        points = [p for p in release.points if p.n_requested == n and p.change is not None]
        if points:
            rows.append(_change_row(release.site, n, points, confidence))
    return rows, combined


def _change_row(
    site: str, n: int | None, points: Sequence[AdaptationPoint], confidence: float
) -> AdaptationRow:
    """Combine the seeds' paired DeLong changes (after − before) of one case count."""
    values = [
        (p.change.difference, p.change.variance)
        if p.change is not None and p.change.difference is not None
        else (math.nan, math.nan)
        for p in points
    ]
    d = [math.nan if v is None else v for v, _ in values]
    u = [math.nan if v is None else v for _, v in values]
    c = combine_differences(d, u, confidence)
    raw = [x for x in d if math.isfinite(x)]
    return AdaptationRow(
        site=site,
        metric=AUC_CHANGE,
        n_cases=n,
        n_used=float(np.mean([p.n_used for p in points])),
        estimate=c.estimate,
        lower=c.lower,
        upper=c.upper,
        seed_min=min(raw) if raw else math.nan,
        seed_max=max(raw) if raw else math.nan,
        repeats=len(points),
        method="rubin-paired-delong",
        reason=c.reason,
    )


def _metric_keys(thresholds: Sequence[float]) -> list[tuple[str, float | None]]:
    keys: list[tuple[str, float | None]] = [("auc", None)]
    for t in sorted(set(thresholds)):
        keys += [("sensitivity", t), ("specificity", t)]
    return keys


def adaptation_rows(
    releases: Mapping[str, AdaptationRelease],
    thresholds: Sequence[float],
    confidence: float = 0.95,
) -> list[AdaptationRow]:
    """Return every site's adaptation rows and the pooled rows (mean of logits over sites)."""
    rows: list[AdaptationRow] = []
    by_site = {}
    for site, release in sorted(releases.items()):
        site_out, combined = site_rows(release, thresholds, confidence)
        rows.extend(site_out)
        by_site[site] = (site_out, combined)
    if not by_site:
        return rows
    keys = {key for _, combined in by_site.values() for key in combined}
    for metric, threshold in _metric_keys(thresholds):
        counts = _ordered_counts(n for (m, n, t) in keys if m == metric and t == threshold)
        for n in counts:
            parts = [
                c[(metric, n, threshold)]
                for _, c in by_site.values()
                if (metric, n, threshold) in c
            ]
            pooled = combine_over_sites(parts, confidence)
            used = [
                r.n_used
                for site_out, _ in by_site.values()
                for r in site_out
                if r.metric == metric and r.n_cases == n and r.threshold == threshold
            ]
            rows.append(
                AdaptationRow(
                    site=POOLED,
                    metric=metric,
                    n_cases=n,
                    n_used=float(np.mean(used)),
                    estimate=pooled.estimate,
                    lower=pooled.lower,
                    upper=pooled.upper,
                    seed_min=math.nan,
                    seed_max=math.nan,
                    repeats=pooled.m,
                    threshold=threshold,
                    method="mean-of-site-logits",
                    reason=pooled.reason,
                )
            )
    return rows


def _ordered_counts(counts: Iterable[int | None]) -> list[int | None]:
    unique = set(counts)
    numbers = sorted(n for n in unique if n is not None)
    return [*numbers, None] if None in unique else list(numbers)


def adequate_cases(
    rows: Sequence[AdaptationRow], reference_auc: float, margin: float
) -> list[AdequateCases]:
    """Return, per site (and pooled), the smallest case count whose AUC is within ``margin``.

    A count is adequate when the combined AUC (point estimate) is at least
    ``reference_auc − margin``. The whole pool counts after every explicit count.

    Raises
    ------
    InputError
        If the margin is negative.
    """
    if margin < 0:
        raise InputError("the margin must not be negative")
    out = []
    sites = sorted({r.site for r in rows if r.metric == "auc"}, key=lambda s: (s == POOLED, s))
    for site in sites:
        curve = {r.n_cases: r for r in rows if r.site == site and r.metric == "auc"}
        chosen: int | None = None
        whole = False
        reason: str | None = None
        if not math.isfinite(reference_auc):
            reason = "the development site's AUC is undefined"
        else:
            for n in _ordered_counts(curve):
                if curve[n].estimate >= reference_auc - margin:
                    chosen, whole = n, n is None
                    break
            else:
                reason = "no case count, not even the whole pool, came within the margin"
        out.append(
            AdequateCases(
                site=site,
                reference_auc=reference_auc,
                margin=margin,
                n_cases=chosen,
                whole_pool=whole,
                reason=reason,
            )
        )
    return out


def count_label(n: int | None) -> str:
    """Return a case count as shown in reports: the number, or 'all' for the whole pool."""
    return WHOLE_POOL if n is None else str(n)
