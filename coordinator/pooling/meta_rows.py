"""Random-effects rows of the study results: each metric meta-analysed across the sites.

Logit AUC, logit sensitivity and specificity and the log diagnostic odds ratio at the
first threshold are pooled by REML with the Hartung-Knapp-Sidik-Jonkman interval (the
primary analysis), DerSimonian-Laird and the fixed-effect model
(:func:`~coordinator.pooling.meta_analysis.meta_analyze`); groups of sites that share a
site attribute (role, scanner vendor, ...) get their own REML AUC. Values are reported
on the measure's own scale (back-transformed).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence

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
