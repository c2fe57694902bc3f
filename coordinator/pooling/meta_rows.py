"""Random-effects rows of the study results: each metric meta-analysed across the sites.

Logit AUC, logit sensitivity and specificity and the log diagnostic odds ratio at the
first threshold are pooled by REML with the Hartung-Knapp-Sidik-Jonkman interval (the
primary analysis), DerSimonian-Laird and the fixed-effect model
(:func:`~coordinator.pooling.meta_analysis.meta_analyze`); groups of sites that share a
site attribute (role, scanner vendor, ...) get their own REML AUC. Values are reported
on the measure's own scale (back-transformed). A site whose confusion cells for a measure
are censored by its minimum-cell rule is left out of that measure, and the note says so.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import replace

from coordinator.pooling.effect_sizes import (
    EffectSizes,
    log_diagnostic_odds_ratio,
    logit_auc,
    logit_sensitivity,
    logit_specificity,
)
from coordinator.pooling.meta_analysis import MetaAnalysis, meta_analyze
from coordinator.pooling.sites import SiteInfo, nan_if_none
from coordinator.pooling.study_results import MetaRow
from site_agent.contract.release import SiteRelease
from site_agent.exceptions import InputError
from site_agent.statistics.censored import CensoredCount

META_METHODS: tuple[tuple[str, bool], ...] = (("reml", True), ("dl", False), ("fixed", False))
"""Meta-analyses run for every metric: REML with HKSJ (primary), DerSimonian-Laird, fixed."""


def meta_rows(releases: Sequence[SiteRelease], confidence: float) -> list[MetaRow]:
    """Meta-analyse logit AUC, logit sensitivity and specificity, and log DOR across sites."""
    rows: list[MetaRow] = []
    usable = [r for r in releases if r.exact.auc.auc is not None and r.exact.auc.se]
    if len(usable) >= 2:
        aucs = [nan_if_none(r.exact.auc.auc) for r in usable]
        ses = [nan_if_none(r.exact.auc.se) for r in usable]
        rows += _meta("auc", logit_auc(aucs, ses), [r.site for r in usable], confidence)
    with_counts = [r for r in releases if r.statistics.confusion]
    if with_counts:
        threshold = with_counts[0].statistics.confusion[0].threshold
        measures: tuple[tuple[str, tuple[str, ...], _Effect], ...] = (
            (f"sensitivity@{threshold:g}", ("tp", "fn"), lambda c: logit_sensitivity(*c)),
            (f"specificity@{threshold:g}", ("tn", "fp"), lambda c: logit_specificity(*c)),
            (
                f"diagnostic odds ratio@{threshold:g}",
                ("tp", "fp", "fn", "tn"),
                lambda c: log_diagnostic_odds_ratio(*c),
            ),
        )
        for metric, cells, effect in measures:
            rows += _count_meta(metric, cells, effect, with_counts, confidence)
    return rows


_Effect = Callable[[list[list[int]]], EffectSizes]


def _count_meta(
    metric: str,
    cells: tuple[str, ...],
    effect: _Effect,
    releases: Sequence[SiteRelease],
    confidence: float,
) -> list[MetaRow]:
    """Meta-analyse one count measure at the first threshold over the sites that have it.

    A site whose cells for the measure are censored by its minimum-cell rule is left out
    (its counts are not known) and named in the rows' note; fewer than two sites left
    gives no rows.
    """
    counts: list[list[int]] = [[] for _ in cells]
    labels, left_out = [], []
    for r in releases:
        c = r.statistics.confusion[0]
        values = [getattr(c, cell) for cell in cells]
        if any(isinstance(v, CensoredCount) for v in values):
            left_out.append(r.site)
            continue
        labels.append(r.site)
        for column, v in zip(counts, values, strict=True):
            column.append(v)
    if len(labels) < 2:
        return []
    try:
        sizes = effect(counts)
    except InputError:
        return []  # a class absent at some site: the measure is undefined there
    if left_out:
        note = f"left out, cells censored by the site's minimum cell size: {', '.join(left_out)}"
        sizes = replace(sizes, notes=(*sizes.notes, note))
    return _meta(metric, sizes, labels, confidence)


def site_subgroup_meta(
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
