"""The study report: one self-contained HTML file rendered from :class:`StudyResults`.

The file opens with no network: styles are inline, figures are inline SVG drawn by
matplotlib (:mod:`coordinator.report.plots`), and there is no script. Every string
taken from the results is HTML-escaped. Sections follow the reading order of a
diagnostic-accuracy paper (STARD 2015; Bossuyt et al., BMJ 2015;351:h5527,
doi:10.1136/bmj.h5527): sites and flow, estimates, pooling, curves, cross tabulations.
"""

from __future__ import annotations

import html
import math
import re
from collections.abc import Container, Iterable, Sequence
from pathlib import Path

from coordinator.pooling.study_results import CurvePoints, MetaRow, MetricRow, StudyResults
from coordinator.report import plots
from coordinator.report.adaptation import adaptation_section
from coordinator.report.exports import find_metric, headline_auc, prevalence

POOLED = plots.POOLED_SITE
DASH = "—"
PERCENT_METRICS = frozenset(
    {"sensitivity", "specificity", "ppv", "npv", "prevalence", "accuracy", "balanced_accuracy"}
)
"""Proportions shown as percentages with one decimal; other metrics get three decimals."""

_LABELS = {
    "auc": "AUC",
    "sensitivity": "Sensitivity",
    "specificity": "Specificity",
    "ppv": "PPV",
    "npv": "NPV",
    "brier": "Brier score",
    "ece": "ECE",
    "calibration_slope": "Calibration slope",
    "calibration_intercept": "Calibration intercept",
    "kappa": "Cohen's κ",
    "weighted_kappa": "Weighted κ",
    "prevalence": "Prevalence",
    "accuracy": "Accuracy",
}
_METHODS = {
    "delong": "DeLong",
    "delong-logit": "DeLong, logit",
    "wilson": "Wilson",
    "clopper-pearson": "Clopper–Pearson",
    "reml": "REML",
    "dl": "DerSimonian–Laird",
    "dersimonian-laird": "DerSimonian–Laird",
    "pm": "Paule–Mandel",
    "fixed": "fixed effect",
    "wald": "Wald",
    "paule-mandel": "Paule–Mandel",
}
_NO_INTERVAL = frozenset({"none", "point"})
"""Method names that mean a metric was released without a confidence interval."""
_STATUS = {"released": "Released", "declined": "Declined", "silent": "No reply"}

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,"Helvetica Neue",Arial,sans-serif;
margin:0;color:#1d1d1f;background:#fafafa;line-height:1.45}
main{max-width:1280px;margin:0 auto;padding:24px 32px 48px;background:#fff}
h1{font-size:1.7em;margin:.2em 0}h2{font-size:1.3em;margin-top:2em;
border-bottom:2px solid #d0d7de;padding-bottom:.2em}h3{font-size:1.05em;margin-top:1.4em}
.caution{border:2px solid #b42318;background:#fef3f2;color:#7a1a12;padding:12px 16px;
border-radius:6px;font-weight:600;margin:16px 0}
.meta{display:grid;grid-template-columns:max-content 1fr;gap:2px 16px;font-size:.92em}
.meta dt{color:#555}.meta dd{margin:0}code{font-size:.9em;word-break:break-all}
.summary{font-size:1.05em;background:#f5f8fc;border-left:4px solid #1f77b4;padding:10px 16px}
nav ol{columns:2;font-size:.92em}
table{border-collapse:collapse;margin:8px 0 16px;font-size:.82em}
caption{text-align:left;font-weight:600;padding:4px 0;color:#333}
th,td{border:1px solid #d8dde3;padding:4px 8px;vertical-align:top}
th{background:#eef2f6;text-align:left}tbody tr:nth-child(even){background:#f8fafc}
td.num{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
.ci{color:#555}.reason{color:#8a4b00;font-size:.85em;white-space:normal}
.tag{display:inline-block;font-size:.75em;padding:0 6px;border-radius:8px;
background:#fff4d6;color:#7a5200;border:1px solid #e8c766;margin-left:4px}
.flag{color:#b42318;font-weight:700}
figure{margin:16px 0}figcaption{font-size:.88em;color:#333;max-width:900px}
figure svg{max-width:100%;height:auto}
.cards{display:flex;flex-wrap:wrap;gap:8px 24px}.small{font-size:.85em;color:#555}
"""


def render_report(results: StudyResults, path: Path) -> Path:
    """Write the study report as one self-contained HTML file.

    Parameters
    ----------
    results
        The study results to report.
    path
        File to write (replaced if it exists).

    Returns
    -------
    Path
        ``path``, once written.
    """
    path.write_text(report_html(results), encoding="utf-8")
    return path


def report_html(results: StudyResults) -> str:
    """Return the report as an HTML document string."""
    sections = [
        ("sites", "Sites and setting", _sites_section(results)),
        ("flow", "Participant flow", _flow_section(results)),
        ("estimates", "Accuracy per site", _estimates_section(results)),
        ("forest", "Pooled estimates (forest plots)", _forest_section(results)),
        ("heterogeneity", "Heterogeneity between sites", _heterogeneity_section(results)),
        ("roc", "ROC curves", _roc_section(results)),
        ("calibration", "Calibration", _calibration_section(results)),
        ("cross-tabulation", "Cross tabulations (2×2)", _two_by_two_section(results)),
        ("not-released", "Sites that did not release results", _not_released_section(results)),
        ("subgroups", "Subgroups", _subgroup_section(results)),
        ("stard", "STARD 2015 items covered", _stard_section()),
        ("notes", "Notes", _notes_section(results)),
    ]
    if results.adaptation or results.reference_lines:
        adaptation = ("adaptation", "Local adaptation and reference lines")
        sections.insert(-2, (*adaptation, adaptation_section(results)))
    nav = "".join(f'<li><a href="#{sid}">{_e(title)}</a></li>' for sid, title, _ in sections)
    body = "".join(
        f'<section id="{sid}"><h2>{_e(title)}</h2>{content}</section>'
        for sid, title, content in sections
    )
    caution = f'<p class="caution" role="note">{_e(results.notice)}</p>'
    return (
        '<!DOCTYPE html><html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{_e(results.title)}</title><style>{_CSS}</style></head><body><main>"
        f'<header><h1>{_e(results.title)}</h1><div id="caution-top">{caution}</div>'
        f"{_study_facts(results)}</header>"
        f'<section id="summary"><h2>Summary</h2>{_summary(results)}</section>'
        f'<nav><h2>Contents</h2><ol>{nav}</ol></nav>{body}<footer id="caution-bottom">{caution}'
        "</footer></main></body></html>\n"
    )


# -- formatting ---------------------------------------------------------------------------


def _e(text: object) -> str:
    return html.escape(str(text), quote=True)


def _slug(text: str) -> str:
    return re.sub(r"[^a-z0-9]+", "-", text.lower()).strip("-") or "x"


def _label(metric: str) -> str:
    if metric in _LABELS:
        return _LABELS[metric]
    words = metric.replace("_", " ")
    if words.startswith("auc "):
        return "AUC " + words[4:]
    return words[:1].upper() + words[1:]


def _method(method: str) -> str:
    return _METHODS.get(method, method)


def _method_header(method: str) -> str:
    if method == "histogram":
        return "from score bins, no CI"
    return "no interval" if method in _NO_INTERVAL else f"{_method(method)} CI"


def _num(metric: str, value: float) -> str:
    """Format one value: percent with one decimal for proportions, else three decimals."""
    if not math.isfinite(value):
        return DASH
    if metric in PERCENT_METRICS:
        return f"{100 * value:.1f}%".replace("-0.0%", "0.0%")
    return f"{value:.3f}".replace("-0.000", "0.000")  # no negative zero from rounding


def _interval(metric: str, lower: float, upper: float) -> str:
    if not (math.isfinite(lower) and math.isfinite(upper)):
        return ""
    negative = _num(metric, lower).startswith("-")
    separator = " to " if negative else "–"  # a dash between negative numbers misreads
    return f"{_num(metric, lower)}{separator}{_num(metric, upper)}"


def _cell(row: MetricRow | None) -> str:
    """Return the inner HTML of a table cell: estimate (95% CI), or a dash and the reason."""
    if row is None:
        return f'{DASH} <span class="reason">not available</span>'
    if not math.isfinite(row.estimate):
        return f'{DASH} <span class="reason">{_e(row.reason or "undefined")}</span>'
    ci = _interval(row.metric, row.lower, row.upper)
    ci_html = f' <span class="ci">({ci})</span>' if ci else ""
    return f"{_num(row.metric, row.estimate)}{ci_html}"


def _pvalue(p: float) -> str:
    if not math.isfinite(p):
        return DASH
    return "<0.001" if p < 0.001 else f"{p:.3f}"


def _table(
    table_id: str,
    caption: str,
    header: Sequence[str],
    rows: Iterable[Sequence[str]],
    *,
    text_columns: Container[int] = (0,),
) -> str:
    """Return a table; ``header`` and cells are HTML already.

    Columns are right-aligned as numbers except those listed in ``text_columns``.
    """
    head = "".join(f"<th>{h}</th>" for h in header)
    body = "".join(
        "<tr>"
        + "".join(
            f"<td{'' if i in text_columns else ' class=num'}>{c}</td>" for i, c in enumerate(r)
        )
        + "</tr>"
        for r in rows
    )
    return (
        f'<table id="{table_id}"><caption>{_e(caption)}</caption>'
        f"<thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"
    )


def _figure(fig_id: str, svg: str, caption: str) -> str:
    return f'<figure id="{fig_id}">{svg}<figcaption>{caption}</figcaption></figure>'


def _site_order(results: StudyResults) -> list[str]:
    """Return site names in the order of ``results.sites``, others after, pooled last."""
    names = [s.site for s in results.sites]
    for row in results.metrics:
        if row.site not in names and row.site != POOLED:
            names.append(row.site)
    if any(r.site == POOLED for r in results.metrics):
        names.append(POOLED)
    return names


def _site_label(results: StudyResults, site: str) -> str:
    if site == POOLED:
        return "<b>Pooled</b> <span class=small>(all released cases as one cohort)</span>"
    roles = {s.site: s.role for s in results.sites}
    tag = ' <span class="tag">development</span>' if roles.get(site) == "development" else ""
    return f"{_e(site)}{tag}"


# -- sections -----------------------------------------------------------------------------


def _study_facts(results: StudyResults) -> str:
    released = sum(s.status == "released" for s in results.sites)
    facts = [
        ("Study", _e(results.study_id)),
        ("Protocol hash", f"<code>{_e(results.protocol_hash)}</code>"),
        ("Created", _e(results.created_at.isoformat(timespec="minutes"))),
        ("Run by", _e(results.engine)),
        ("Sites", f"{released} of {len(results.sites)} invited sites released results"),
    ]
    return '<dl class="meta">' + "".join(f"<dt>{k}</dt><dd>{v}</dd>" for k, v in facts) + "</dl>"


def _i2_words(i2: float) -> str:
    """Describe I² in words: low, moderate, high at 25%, 50%, 75% (Higgins et al., BMJ 2003)."""
    if i2 < 0.25:
        return "little"
    if i2 < 0.50:
        return "low"
    if i2 < 0.75:
        return "moderate"
    return "high"


def _summary(results: StudyResults) -> str:
    """Return the findings paragraph and a short list of key numbers derived from the rows."""
    findings = " ".join(_e(f) for f in results.findings) or "No findings were recorded."
    items: list[tuple[str, str]] = []
    for role in ("development", "external"):
        aucs = [
            (row.estimate, s.site)
            for s in results.sites
            if s.role == role
            and (row := headline_auc(results, s.site)) is not None
            and math.isfinite(row.estimate)
        ]
        if len(aucs) == 1:
            items.append((f"AUC, {role} site", f"{_num('auc', aucs[0][0])} ({_e(aucs[0][1])})"))
        elif aucs:
            (low, low_site), (high, high_site) = min(aucs), max(aucs)
            items.append(
                (
                    f"AUC, {len(aucs)} {role} sites",
                    f"worst {_num('auc', low)} ({_e(low_site)}), "
                    f"best {_num('auc', high)} ({_e(high_site)})",
                )
            )
    meta = _primary_meta(results, "auc")
    if meta is not None and math.isfinite(meta.estimate):
        text = f"{_num('auc', meta.estimate)} (95% CI {_interval('auc', meta.lower, meta.upper)})"
        pi = _interval("auc", meta.prediction_lower, meta.prediction_upper)
        items.append((f"AUC, pooled ({_e(_method(meta.method))})", text))
        if pi:
            items.append(("AUC expected at a new site", f"{pi} (95% prediction interval)"))
        if math.isfinite(meta.i2):
            items.append(
                (
                    "Heterogeneity of AUC",
                    f"{_i2_words(meta.i2)}: I² = {100 * meta.i2:.1f}%, "
                    f"τ² = {meta.tau2:.4f}, {meta.k} sites",
                )
            )
    cohort = headline_auc(results, POOLED)
    if cohort is not None and math.isfinite(cohort.estimate):
        items.append(("AUC, all cases as one cohort", _cell(cohort)))
    missing = [s.site for s in results.sites if s.status != "released"]
    if missing:
        items.append(("Did not release", _e(", ".join(missing))))
    listed = "".join(f"<dt>{k}</dt><dd>{v}</dd>" for k, v in items)
    return f'<p class="summary">{findings}</p>' + (
        f'<h3>Key numbers</h3><dl class="meta" id="key-numbers">{listed}</dl>' if items else ""
    )


def _sites_section(results: StudyResults) -> str:
    rows = [
        [
            _site_label(results, s.site),
            _e(s.role),
            _e(_STATUS.get(s.status, s.status)),
            _e(s.description or DASH),
        ]
        for s in results.sites
    ]
    return _table(
        "table-sites",
        "Invited sites, their role, and what each released",
        ["Site", "Role", "Status", "Description"],
        rows,
        text_columns=range(4),
    )


def _flow_section(results: StudyResults) -> str:
    if not results.flow:
        return "<p>No site released participant-flow counts.</p>"
    resampled = any(f.resampled for f in results.flow)
    header = [
        "Site",
        "Observations",
        "Patients",
        "With reference standard",
        "Reference standard pending",
        "Positives",
        "Negatives",
        "Prevalence",
    ] + (["Resampled cases"] if resampled else [])
    rows = []
    for f in results.flow:
        row = [_site_label(results, f.site)] + [
            str(v)
            for v in (
                f.observations,
                f.patients,
                f.with_reference_standard,
                f.pending_reference_standard,
                f.positives,
                f.negatives,
            )
        ]
        row.append(_num("prevalence", prevalence(f)))
        if resampled:
            row.append(f'<span class="flag">⚑ {f.resampled}</span>' if f.resampled else "0")
        rows.append(row)
    note = (
        '<p class="small"><span class="flag">⚑</span> Rehearsal only: these cases were '
        "resampled to build a synthetic site; they are not independent patients.</p>"
        if resampled
        else ""
    )
    return (
        _table(
            "table-flow",
            "Observations per site (STARD 2015 item 19); pending cases are not in any estimate",
            header,
            rows,
        )
        + note
    )


def _ordered(metrics: Iterable[str], order: Sequence[str]) -> list[str]:
    unique = list(dict.fromkeys(metrics))
    return sorted(unique, key=lambda m: order.index(m) if m in order else len(order))


def _estimates_section(results: StudyResults) -> str:
    overall = [r for r in results.metrics if r.subgroup is None]
    exact = {(r.site, r.metric, r.method, r.threshold): r for r in reversed(overall)}
    sites = _site_order(results)
    header = ["Site", "n"] + [
        f"{_e(title)}<br><span class=small>{_e(sub)}</span>" for _, _, title, sub in _HEADLINE
    ]
    rows = []
    for site in sites:
        found = [
            exact.get((site, metric, method, None))
            or (exact.get((site, metric, "hanley-mcneil", None)) if method == "delong" else None)
            for metric, method, _, _ in _HEADLINE
        ]
        present = [r for r in found if r is not None]
        if present:
            n = str(max(r.n for r in present))
            cells = [_headline_cell(r) for r in found]
            rows.append([_site_label(results, site), n, *cells])
    out = _table(
        "table-site-metrics",
        "Discrimination and calibration per site: estimate (95% CI)",
        header,
        rows,
    )
    out += (
        '<p class="small">For all cases as one cohort the AUC compares cases across sites '
        "through their score histograms; its interval uses the Hanley–McNeil standard "
        "error and ± gives the largest possible error from binning. Histogram AUCs of "
        "single sites are shown with the same bound.</p>"
    )
    out += _readers_table(results, sites, overall)
    threshold_metrics = _ordered(
        (r.metric for r in overall if r.threshold is not None),
        ["sensitivity", "specificity", "ppv", "npv"],
    )
    thresholds = sorted({r.threshold for r in overall if r.threshold is not None})
    rows = []
    for site in sites:
        for t in thresholds:
            found = [
                find_metric(results, site, m, threshold=t, method="wilson")
                for m in threshold_metrics
            ]
            if all(r is None for r in found):
                continue
            methods = sorted({_method(r.method) for r in found if r is not None})
            rows.append(
                [_site_label(results, site), f"{t:g}"]
                + [_cell(r) for r in found]
                + [_e(", ".join(methods))]
            )
    if rows:
        out += _table(
            "table-threshold-metrics",
            "Accuracy at each pre-specified threshold: estimate (95% CI)",
            ["Site", "Threshold"] + [_label(m) for m in threshold_metrics] + ["CI method"],
            rows,
            text_columns=(0, len(threshold_metrics) + 2),
        )
    return out + (
        '<p class="small">A dash marks a value that is undefined at that site; the reason '
        "follows it. The development site (tagged) is where the model was built; its "
        "numbers are not external validation.</p>"
    )


_HEADLINE: tuple[tuple[str, str, str, str], ...] = (
    ("auc", "delong", "AUC", "DeLong CI"),
    ("auc", "delong-logit", "AUC", "logit-scale CI"),
    ("auc", "obuchowski", "AUC", "patient-clustered CI"),
    ("auc", "histogram", "AUC from score bins", "± binning bound"),
    ("brier", "point", "Brier score", "lower is better"),
    ("ece", "point", "ECE", "calibration error"),
    ("calibration intercept", "logistic-recalibration", "Calibration", "intercept, ideally zero"),
    ("calibration slope", "logistic-recalibration", "Calibration", "slope, ideally one"),
)
"""Columns of the per-site table: (metric, method, heading, sub-heading)."""


def _headline_cell(row: MetricRow | None) -> str:
    if row is not None and row.bound is not None and math.isfinite(row.estimate):
        text = _cell(row) if math.isfinite(row.lower) else _num(row.metric, row.estimate)
        return f'{text} <span class="ci">±{row.bound:.3f}</span>'
    return _cell(row)


def _readers_table(results: StudyResults, sites: Sequence[str], rows: list[MetricRow]) -> str:
    """Agreement (Cohen's kappa) and paired AUC comparisons with readers, per site."""
    body = []
    for site in sites:
        kappas: dict[str, dict[str, MetricRow]] = {}
        for r in rows:
            if r.site == site and r.metric.startswith("kappa "):
                kappas.setdefault(r.metric.removeprefix("kappa "), {})[r.method] = r
        for pair, by_method in kappas.items():
            kinds = ("cohen-kappa", "cohen-kappa-linear", "cohen-kappa-quadratic")
            cells = [by_method.get(m) for m in kinds]
            body.append([_site_label(results, site), _e(pair), *(_cell(c) for c in cells), ""])
        for r in rows:
            if r.site == site and r.metric.startswith("auc difference"):
                who = r.metric.removeprefix("auc difference ")
                body.append([_site_label(results, site), _e(who), "", "", "", _cell(r)])
    if not body:
        return ""
    return _table(
        "table-readers",
        "Agreement with readers (Cohen's kappa, 95% CI) and paired DeLong AUC differences",
        ["Site", "Raters", "Kappa", "Linear weighted", "Quadratic weighted", "AUC difference"],
        body,
        text_columns=(0, 1),
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


def _primary_meta(results: StudyResults, metric: str) -> MetaRow | None:
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
    for site in _site_order(results):
        preferred = "delong" if metric == "auc" else "wilson"
        row = find_metric(results, site, metric, threshold=threshold, method=preferred)
        if row is not None:
            rows.append(row)
    return rows


def _forest_section(results: StudyResults) -> str:
    if not results.meta:
        return "<p>No metric was meta-analysed (fewer than two sites released it).</p>"
    out = []
    for full_name in dict.fromkeys(m.metric for m in results.meta):
        meta = _primary_meta(results, full_name)
        assert meta is not None  # the name comes from results.meta
        metric, threshold = _meta_metric(meta)
        rows = _forest_rows(results, metric, threshold)
        sites = [r for r in rows if r.site != POOLED]
        cohort_row = next((r for r in rows if r.site == POOLED), None)
        name = _label(metric) + (f" at threshold {threshold:g}" if threshold is not None else "")
        svg = plots.forest_svg(
            name,
            [
                plots.ForestSite(_forest_label(results, r.site), r.estimate, r.lower, r.upper)
                for r in sites
            ],
            meta,
            None
            if cohort_row is None
            else plots.ForestSite(
                "All cases as one cohort", cohort_row.estimate, cohort_row.lower, cohort_row.upper
            ),
            percent=metric in PERCENT_METRICS,
            log=meta.scale == "log",
        )
        method = _e(_method(meta.method)) + (
            ", Hartung–Knapp–Sidik–Jonkman CI" if meta.hksj else ""
        )
        site_method = _e(", ".join(sorted({_method(r.method) for r in sites})))
        squares = (
            f"Squares: each site's estimate with its 95% CI ({site_method}). "
            if sites
            else "Per-site values of this measure are not in the released metric rows; "
            "only the pooled estimate is drawn. "
        )
        caption = (
            f"<b>{_e(name)}.</b> {squares}"
            f"Diamond: pooled estimate {_num(metric, meta.estimate)} "
            f"({method}; pooled on the {_e(meta.scale)} scale), its width the 95% CI. "
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
        )
        out.append(_figure(f"fig-forest-{_slug(full_name)}", svg, caption))
    return "".join(out)


def _forest_label(results: StudyResults, site: str) -> str:
    roles = {s.site: s.role for s in results.sites}
    return f"{site} (development)" if roles.get(site) == "development" else site


def _heterogeneity_section(results: StudyResults) -> str:
    if not results.meta:
        return "<p>No heterogeneity statistics: no metric was meta-analysed.</p>"
    rows = []
    for m in results.meta:
        metric, threshold = _meta_metric(m)
        name = _label(metric) + (f" at {threshold:g}" if threshold is not None else "")
        if m.subgroup is not None:
            name += f", sites with {m.subgroup}"
        estimate = _num(metric, m.estimate)
        ci = _interval(metric, m.lower, m.upper)
        rows.append(
            [
                _e(name),
                str(m.k),
                _e(f"{_method(m.method)}, {m.scale} scale"),
                f'{estimate} <span class="ci">({ci or DASH})</span>',
                _interval(metric, m.prediction_lower, m.prediction_upper) or DASH,
                f"{m.tau2:.4f}" if math.isfinite(m.tau2) else DASH,
                f"{100 * m.i2:.1f}%" if math.isfinite(m.i2) else DASH,
                f"{m.h2:.2f}" if math.isfinite(m.h2) else DASH,
                f"{m.q:.2f}" if math.isfinite(m.q) else DASH,
                _pvalue(m.q_pvalue),
                "yes" if m.hksj else "no",
                _e(m.note or ""),
            ]
        )
    table = _table(
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
            _e(t.cases),
            str(t.sites),
            str(t.n),
            f"{t.statistic:.2f}" if math.isfinite(t.statistic) else DASH,
            str(t.df),
            _pvalue(t.p_value),
            _e(t.reason or ""),
        ]
        for t in results.distribution_tests
    ]
    return _table(
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


def _curves(results: StudyResults, kind: str) -> list[CurvePoints]:
    order = {name: i for i, name in enumerate(_site_order(results))}
    chosen = [c for c in results.curves if c.kind == kind]
    return sorted(chosen, key=lambda c: order.get(c.site, len(order)))


def _roc_section(results: StudyResults) -> str:
    curves = _curves(results, "roc")
    if not curves:
        return "<p>No ROC curves were released.</p>"
    aucs = {c.site: _roc_label(results, c) for c in curves}
    drawn = (
        "Curves are drawn from the score bins the sites released, so a curve is coarser "
        "than the site's exact AUC when its scores crowd into few bins; the area under the "
        "drawn curve is given beside the AUC where the two differ."
    )
    return _figure(
        "fig-roc-all",
        plots.roc_overview_svg(curves, aucs),
        "<b>ROC curves of all sites.</b> Each line traces sensitivity against the false-"
        "positive rate as the threshold moves; the dashed black line is all released cases "
        f"as one cohort, the dotted diagonal a test with no discrimination. {drawn}",
    ) + _figure(
        "fig-roc-sites",
        plots.roc_small_multiples_svg(curves, aucs),
        f"<b>ROC curve per site</b>, titled with the site's AUC. {drawn}",
    )


def _roc_label(results: StudyResults, curve: CurvePoints) -> str:
    """Return the site's AUC, and the area under the drawn (binned) curve if it differs."""
    area = _num("auc", _trapezoid_area(curve.x, curve.y))
    row = headline_auc(results, curve.site)
    if row is None or not math.isfinite(row.estimate):
        return f"curve area {area}"
    auc = _num("auc", row.estimate)
    return auc if auc == area else f"{auc}; curve area {area}"


def _trapezoid_area(x: Sequence[float], y: Sequence[float]) -> float:
    """Area under a polyline through the points (the trapezoidal rule), as drawn."""
    return math.fsum((x[i + 1] - x[i]) * (y[i + 1] + y[i]) / 2 for i in range(len(x) - 1))


def _calibration_section(results: StudyResults) -> str:
    curves = _curves(results, "calibration")
    if not curves:
        return "<p>No calibration curves were released.</p>"
    return _figure(
        "fig-calibration-sites",
        plots.calibration_svg(curves),
        "<b>Calibration per site.</b> Each point is one bin of model scores: the mean score "
        "in the bin (x) against the observed share of positive cases (y); larger points hold "
        "more cases. Points on the dotted diagonal are well calibrated; points below it mean "
        "the model over-estimates risk at that site.",
    )


def _two_by_two_section(results: StudyResults) -> str:
    if not results.two_by_two:
        return "<p>No cross tabulations were released.</p>"
    cards, seen = [], dict[str, int]()
    for t in results.two_by_two:
        index = seen[t.site] = seen.get(t.site, 0) + 1
        rows = [
            ["Index test positive", str(t.tp), str(t.fp), str(t.tp + t.fp)],
            ["Index test negative", str(t.fn), str(t.tn), str(t.fn + t.tn)],
            ["Total", str(t.tp + t.fn), str(t.fp + t.tn), str(t.tp + t.fp + t.fn + t.tn)],
        ]
        cards.append(
            _table(
                f"table-2x2-{_slug(t.site)}-{index}",
                f"{t.site}, threshold {t.threshold:g}",
                ["", "Reference positive", "Reference negative", "Total"],
                rows,
            )
        )
    return (
        '<p class="small">Index test result (model score at or above the threshold) by '
        "reference standard, per site and threshold (STARD 2015 item 23).</p>"
        f'<div class="cards">{"".join(cards)}</div>'
    )


def _not_released_section(results: StudyResults) -> str:
    absent = [s for s in results.sites if s.status != "released"]
    if not absent:
        return '<p id="all-released">Every invited site released results.</p>'
    rows = [
        [_e(s.site), _e(_STATUS.get(s.status, s.status)), _e(s.reason or "no reason given")]
        for s in absent
    ]
    return _table(
        "table-not-released",
        "Sites that declined or did not reply; none of their cases is in any estimate",
        ["Site", "Status", "Reason"],
        rows,
        text_columns=range(3),
    )


def _subgroup_section(results: StudyResults) -> str:
    rows = [r for r in results.metrics if r.subgroup is not None]
    if not rows:
        return "<p>No subgroup analyses were requested or released.</p>"
    body = [
        [
            _site_label(results, r.site),
            _e(r.subgroup),
            _e(_label(r.metric)),
            f"{r.threshold:g}" if r.threshold is not None else DASH,
            str(r.n),
            _cell(r),
            _e(_method(r.method)),
        ]
        for r in rows
    ]
    return _table(
        "table-subgroups",
        "Estimates within subgroups: estimate (95% CI)",
        ["Site", "Subgroup", "Metric", "Threshold", "n", "Estimate (95% CI)", "CI method"],
        body,
        text_columns=(0, 1, 2, 6),
    )


_STARD_COVERED = (
    ("8", "Setting and location of participants", "sites", "Sites and setting (one row per site)"),
    ("12a", "Test positivity thresholds", "estimates", "Thresholds of the pre-specified protocol"),
    ("16", "Missing reference standard", "flow", "'Reference standard pending' per site"),
    ("17", "Analyses of variability", "heterogeneity", "Heterogeneity; subgroups below"),
    ("19", "Flow of participants", "flow", "Participant flow table (no diagram)"),
    ("20", "Baseline characteristics", "flow", "Only what sites release: counts, prevalence"),
    ("23", "Cross tabulation by reference standard", "cross-tabulation", "2×2 per site"),
    ("24", "Estimates of accuracy with 95% CIs", "estimates", "Per site, pooled and forest plots"),
)
_STARD_NOT_COVERED = (
    (
        "1–7, 9–11, 12b–15, 18",
        "Title, abstract, background, design, eligibility, series, "
        "test methods, blinding, analysis methods, indeterminate results, sample size: in the "
        "study protocol and manuscript, not in released statistics",
    ),
    ("21a–22", "Severity, alternative diagnoses, time between tests: not released by sites"),
    ("25", "Adverse events from the tests: not applicable to a retrospective evaluation"),
    ("26–30", "Discussion, registration, protocol access, funding: the study group's manuscript"),
)


def _stard_section() -> str:
    covered = _table(
        "table-stard",
        "STARD 2015 items this report answers (Bossuyt et al., BMJ 2015;351:h5527)",
        ["Item", "Topic", "Where in this report"],
        ([_e(i), _e(t), f'<a href="#{a}">{_e(w)}</a>'] for i, t, a, w in _STARD_COVERED),
        text_columns=range(3),
    )
    missing = "".join(f"<li><b>{_e(i)}</b>: {_e(t)}</li>" for i, t in _STARD_NOT_COVERED)
    return covered + f"<h3>Items not covered here</h3><ul>{missing}</ul>"


def _notes_section(results: StudyResults) -> str:
    notes = [*results.notes, *(f"{m.metric}: {m.note}" for m in results.meta if m.note)]
    if not notes:
        return "<p>No notes.</p>"
    return "<ul>" + "".join(f"<li>{_e(n)}</li>" for n in notes) + "</ul>"
