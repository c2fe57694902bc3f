"""Formatting and HTML building blocks shared by the sections of the study report.

Every string taken from the results goes through :func:`esc` (HTML escaping). Numbers
follow one rule: proportions as percentages with one decimal, other metrics with three
decimals; a value that is not finite is shown as a dash with its reason, never as zero.
Sites appear in the order of the results, the pooled cohort last.
"""

from __future__ import annotations

import html
import math
import re
from collections.abc import Container, Iterable, Sequence

from coordinator.pooling.study_results import COARSE_BINS_REASON, MetricRow, StudyResults
from coordinator.report import plots

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
STATUS = {"released": "Released", "declined": "Declined", "silent": "No reply"}


def esc(text: object) -> str:
    """Return ``text`` HTML-escaped, quotes included."""
    return html.escape(str(text), quote=True)


def slug(text: str) -> str:
    """Return ``text`` as a lowercase id fragment (letters, digits, hyphens)."""
    return re.sub(r"[^a-z0-9]+", "-", text.lower()).strip("-") or "x"


def metric_label(metric: str) -> str:
    """Return the display name of a metric."""
    if metric in _LABELS:
        return _LABELS[metric]
    words = metric.replace("_", " ")
    if words.startswith("auc "):
        return "AUC " + words[4:]
    return words[:1].upper() + words[1:]


def method_name(method: str) -> str:
    """Return the display name of an interval or pooling method."""
    return _METHODS.get(method, method)


def num(metric: str, value: float) -> str:
    """Format one value: percent with one decimal for proportions, else three decimals."""
    if not math.isfinite(value):
        return DASH
    if metric in PERCENT_METRICS:
        return f"{100 * value:.1f}%".replace("-0.0%", "0.0%")
    return f"{value:.3f}".replace("-0.000", "0.000")  # no negative zero from rounding


def interval_text(metric: str, lower: float, upper: float) -> str:
    """Return ``lower–upper`` formatted, or an empty string if either is undefined."""
    if not (math.isfinite(lower) and math.isfinite(upper)):
        return ""
    negative = num(metric, lower).startswith("-")
    separator = " to " if negative else "–"  # a dash between negative numbers misreads
    return f"{num(metric, lower)}{separator}{num(metric, upper)}"


def estimate_cell(row: MetricRow | None) -> str:
    """Return the inner HTML of a table cell: estimate (95% CI), or a dash and the reason.

    An AUC from score bins carries its binning bound after the interval (``±b``).
    """
    if row is None:
        return f'{DASH} <span class="reason">not available</span>'
    if row.estimate_low is not None and row.estimate_high is not None:
        return censored_text(row)
    if not math.isfinite(row.estimate):
        return f'{DASH} <span class="reason">{esc(row.reason or "undefined")}</span>'
    ci = interval_text(row.metric, row.lower, row.upper)
    ci_html = f' <span class="ci">({ci})</span>' if ci else ""
    if row.bound is not None and math.isfinite(row.bound):  # an AUC from score bins
        ci_html += f' <span class="ci">±{row.bound:.3f}</span>'
    return f"{num(row.metric, row.estimate)}{ci_html}"


def censored_text(row: MetricRow) -> str:
    """Return a metric shown as the range of values it can take, with the reason.

    A metric resting on a censored cell: the interval shown is the hull of the intervals
    over that range, so it contains every interval the suppressed counts could have
    given. An AUC from score bins too coarse to tell it from chance: the range the bins
    allow, with no interval.
    """
    low, high = row.estimate_low, row.estimate_high
    assert low is not None and high is not None  # the caller checked
    coarse = row.reason == COARSE_BINS_REASON
    if low <= 0.0 and high >= 1.0:  # a bound that bounds nothing is not shown as a number
        why = (
            "the released score bins allow any AUC"
            if coarse
            else "not released: site policy (the cells at this threshold are below the "
            "site's minimum cell size)"
        )
        return f'{DASH} <span class="reason">{why}</span>'
    ci = interval_text(row.metric, row.lower, row.upper)
    ci_html = f' <span class="ci">({ci})</span>' if ci else ""
    why = (
        "range the score bins allow (too coarse to tell from chance)"
        if coarse
        else "range: a cell below the site's minimum cell size"
    )
    values = f"{num(row.metric, low)} to {num(row.metric, high)}"
    return f'{values}{ci_html} <span class="reason">{why}</span>'


def pvalue_text(p: float) -> str:
    """Return a p-value with three decimals, ``<0.001``, or a dash if undefined."""
    if not math.isfinite(p):
        return DASH
    return "<0.001" if p < 0.001 else f"{p:.3f}"


def html_table(
    table_id: str,
    caption: str,
    header: Sequence[str],
    rows: Iterable[Sequence[str]],
    *,
    text_columns: Container[int] = (0,),
) -> str:
    """Return a table; ``header`` and cells are HTML already.

    Columns are right-aligned as numbers except those listed in ``text_columns``. A table
    wider than the page scrolls sideways inside its own box (ranges with their reasons
    make some tables wide) instead of running past the page's edge.
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
        f'<div class="table-scroll"><table id="{table_id}"><caption>{esc(caption)}</caption>'
        f"<thead><tr>{head}</tr></thead><tbody>{body}</tbody></table></div>"
    )


def html_figure(fig_id: str, svg: str, caption: str) -> str:
    """Return a figure with its inline SVG and caption (HTML already)."""
    return f'<figure id="{fig_id}">{svg}<figcaption>{caption}</figcaption></figure>'


def site_order(results: StudyResults) -> list[str]:
    """Return site names in the order of ``results.sites``, others after, pooled last."""
    names = [s.site for s in results.sites]
    for row in results.metrics:
        if row.site not in names and row.site != POOLED:
            names.append(row.site)
    if any(r.site == POOLED for r in results.metrics):
        names.append(POOLED)
    return names


def site_label(results: StudyResults, site: str) -> str:
    """Return the site's name for a table cell, tagged if it is the development site."""
    if site == POOLED:
        return "<b>Pooled</b> <span class=small>(all released cases as one cohort)</span>"
    roles = {s.site: s.role for s in results.sites}
    tag = ' <span class="tag">development</span>' if roles.get(site) == "development" else ""
    return f"{esc(site)}{tag}"
