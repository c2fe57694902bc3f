"""Pooled sections of the study report: forest plots, heterogeneity and score distributions.

Each meta-analysed metric gets a forest plot (per-site estimates, the random-effects
diamond, the prediction interval and the one-cohort estimate) and a row of the
heterogeneity table (tau², I² read as low, moderate or high near 25%, 50% and 75% after
Higgins et al., BMJ 2003;327:557; H²; Cochran's Q). The Kruskal–Wallis table (Kruskal &
Wallis 1952) asks whether the binned scores follow one distribution at every site.
"""

from __future__ import annotations

import math

from coordinator.pooling.study_results import COARSE_BINS_REASON, MetaRow, MetricRow, StudyResults
from coordinator.report import plots
from coordinator.report.exports import find_metric
from coordinator.report.html_parts import (
    DASH,
    PERCENT_METRICS,
    POOLED,
    esc,
    html_figure,
    html_table,
    interval_text,
    method_name,
    metric_label,
    num,
    pvalue_text,
    site_order,
    slug,
)


def _meta_metric(meta: MetaRow) -> tuple[str, float | None]:
    """Split a meta-analysed metric name such as ``"sensitivity@0.5"`` into name and threshold."""
    name, sep, threshold = meta.metric.partition("@")
    if sep:
        try:
            return name, float(threshold)
        except ValueError:
            return meta.metric, None
    return name, None


def primary_meta(results: StudyResults, metric: str) -> MetaRow | None:
    """Return the first random-effects row of ``metric`` (the primary analysis), else any."""
    rows = [m for m in results.meta if m.metric == metric and m.subgroup is None]
    random = [m for m in rows if m.method != "fixed"]
    chosen = random or rows
    return chosen[0] if chosen else None


def _forest_rows(results: StudyResults, metric: str, threshold: float | None) -> list[MetricRow]:
    """Return the whole-site rows of ``metric`` (pooled last), one per site.

    Sites with several interval methods give their Wilson (proportions) or DeLong (AUC) row.
    """
    rows = []
    for site in site_order(results):
        preferred = "delong" if metric == "auc" else "wilson"
        row = find_metric(results, site, metric, threshold=threshold, method=preferred)
        if row is not None:
            rows.append(row)
    return rows


def forest_section(results: StudyResults) -> str:
    """Return one forest plot per meta-analysed metric."""
    if not results.meta:
        return "<p>No metric was meta-analysed (fewer than two sites released it).</p>"
    out = []
    for full_name in dict.fromkeys(m.metric for m in results.meta):
        meta = primary_meta(results, full_name)
        assert meta is not None  # the name comes from results.meta
        metric, threshold = _meta_metric(meta)
        rows = _forest_rows(results, metric, threshold)
        sites = [r for r in rows if r.site != POOLED]
        cohort_row = next((r for r in rows if r.site == POOLED), None)
        name = metric_label(metric) + (
            f" at threshold {threshold:g}" if threshold is not None else ""
        )
        svg = plots.forest_svg(
            name,
            [
                plots.ForestSite(_forest_label(results, r.site), r.estimate, r.lower, r.upper)
                for r in sites
            ],
            meta,
            None
            if cohort_row is None
            else plots.ForestSite("All cases as one cohort", *_cohort_bar(cohort_row)),
            percent=metric in PERCENT_METRICS,
            log=meta.scale == "log",
        )
        method = esc(method_name(meta.method)) + (
            ", Hartung–Knapp–Sidik–Jonkman CI" if meta.hksj else ""
        )
        site_method = esc(", ".join(sorted({method_name(r.method) for r in sites})))
        squares = (
            f"Squares: each site's estimate with its 95% CI ({site_method}). "
            if sites
            else "Per-site values of this measure are not in the released metric rows; "
            "only the pooled estimate is drawn. "
        )
        caption = (
            f"<b>{esc(name)}.</b> {squares}"
            f"Diamond: pooled estimate {num(metric, meta.estimate)} "
            f"({method}; pooled on the {esc(meta.scale)} scale), its width the 95% CI. "
            "Grey bar: 95% prediction interval, where the value at a new site like these "
            "is expected to fall. "
            + (
                "Open circle: all released cases merged as one cohort. The two pooled "
                "numbers can differ: the random-effects estimate averages the sites' "
                "estimates with weights that grow with precision and shrink with "
                "between-site spread, whereas the one-cohort estimate counts every case "
                "equally, so large sites dominate it and differences in prevalence or score "
                "scale between sites enter it directly"
                + (
                    " (for AUC, cases of one site are also ranked against cases of another)."
                    if metric == "auc"
                    else "."
                )
                if cohort_row is not None
                else ""
            )
            + " Other pooling methods are in the heterogeneity table."
            + _censored_caption(sites, cohort_row)
        )
        out.append(html_figure(f"fig-forest-{slug(full_name)}", svg, caption))
    return "".join(out)


def _censored_caption(sites: list[MetricRow], cohort: MetricRow | None) -> str:
    """Say which rows rest on a censored cell: no square, and the cohort bar is a hull."""
    left_out = [r.site for r in sites if r.estimate_low is not None]
    text = ""
    if left_out:
        text += (
            " No square (a cell below the site's minimum cell size; the range is in the "
            f"accuracy table, and the meta-analysis left the site out): {', '.join(left_out)}."
        )
    if cohort is not None and cohort.reason == COARSE_BINS_REASON:
        text += (
            " The one-cohort bar has no point: it spans the AUCs the released score bins "
            "allow, which include 0.5 (too coarse for an estimate)."
        )
    elif cohort is not None and cohort.estimate_low is not None:
        text += (
            " The one-cohort bar rests on such a cell: it has no point and spans the "
            "intervals over every count the released cells allow."
        )
    return esc(text)


def _cohort_bar(row: MetricRow) -> tuple[float, float, float]:
    """Return the one-cohort marker and bar: for bins too coarse, the range they allow."""
    low, high = row.estimate_low, row.estimate_high
    if row.reason == COARSE_BINS_REASON and low is not None and high is not None:
        return row.estimate, low, high
    return row.estimate, row.lower, row.upper


def _forest_label(results: StudyResults, site: str) -> str:
    roles = {s.site: s.role for s in results.sites}
    return f"{site} (development)" if roles.get(site) == "development" else site


def heterogeneity_section(results: StudyResults) -> str:
    """Return the heterogeneity table and the score-distribution tests."""
    if not results.meta:
        return "<p>No heterogeneity statistics: no metric was meta-analysed.</p>"
    rows = []
    for m in results.meta:
        metric, threshold = _meta_metric(m)
        name = metric_label(metric) + (f" at {threshold:g}" if threshold is not None else "")
        if m.subgroup is not None:
            name += f", sites with {m.subgroup}"
        estimate = num(metric, m.estimate)
        ci = interval_text(metric, m.lower, m.upper)
        rows.append(
            [
                esc(name),
                str(m.k),
                esc(f"{method_name(m.method)}, {m.scale} scale"),
                f'{estimate} <span class="ci">({ci or DASH})</span>',
                interval_text(metric, m.prediction_lower, m.prediction_upper) or DASH,
                f"{m.tau2:.4f}" if math.isfinite(m.tau2) else DASH,
                f"{100 * m.i2:.1f}%" if math.isfinite(m.i2) else DASH,
                f"{m.h2:.2f}" if math.isfinite(m.h2) else DASH,
                f"{m.q:.2f}" if math.isfinite(m.q) else DASH,
                pvalue_text(m.q_pvalue),
                "yes" if m.hksj else "no",
                esc(m.note or ""),
            ]
        )
    table = html_table(
        "table-heterogeneity",
        "Random-effects meta-analysis and between-site heterogeneity",
        [
            "Metric",
            "k",
            "Method",
            "Pooled (95% CI)",
            "95% prediction interval",
            "τ²",
            "I²",
            "H²",
            "Q",
            "p (Q)",
            "HKSJ",
            "Note",
        ],
        rows,
        text_columns=(0, 2, 10, 11),
    )
    return (
        table
        + (
            '<p class="small">τ²: between-site variance on the pooling scale. I²: share of '
            "the spread in site estimates beyond chance; read as low, moderate or high near "
            "25%, 50% and 75% (Higgins et al., BMJ 2003;327:557). H²: Q divided by its "
            "degrees of freedom. Q and p: Cochran's test of equal accuracy at all sites, "
            "which has little power with few sites. HKSJ: Hartung–Knapp–Sidik–Jonkman "
            "interval.</p>"
        )
        + _distribution_tests_table(results)
    )


def _distribution_tests_table(results: StudyResults) -> str:
    """Kruskal–Wallis across sites on the released (binned) score distributions."""
    if not results.distribution_tests:
        return ""
    rows = [
        [
            esc(t.cases),
            str(t.sites),
            str(t.n),
            f"{t.statistic:.2f}" if math.isfinite(t.statistic) else DASH,
            str(t.df),
            pvalue_text(t.p_value),
            esc(t.reason or ""),
        ]
        for t in results.distribution_tests
    ]
    return html_table(
        "table-score-distributions",
        "Do the model's scores follow one distribution at every site? (Kruskal–Wallis)",
        ["Cases", "Sites", "n", "H", "df", "p", "Note"],
        rows,
        text_columns=(0, 6),
    ) + (
        '<p class="small">Kruskal–Wallis test (Kruskal & Wallis 1952) on the binned scores '
        "the sites released, tie-corrected; bins hide differences inside a bin. All cases: "
        "acquisition and population differences together; positives and negatives: "
        "differences that disease prevalence alone cannot explain.</p>"
    )
