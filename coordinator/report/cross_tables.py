"""Cross tabulations of the study report: 2×2 tables and agreement with readers.

The 2×2 tables give index test result by reference standard per site and threshold
(STARD 2015 item 23; Bossuyt et al., BMJ 2015;351:h5527). The readers table gives
Cohen's kappa (unweighted, linear and quadratic weights) between the model and each
reader, and paired DeLong differences in AUC, as the sites released them.
"""

from __future__ import annotations

from collections.abc import Sequence

from coordinator.pooling.sites import KAPPA_METHODS
from coordinator.pooling.study_results import MetricRow, StudyResults
from coordinator.report.html_parts import (
    DASH,
    esc,
    estimate_cell,
    html_table,
    site_label,
    slug,
)
from site_agent.statistics.censored import Cell, cell_text, class_total, is_censored, sum_text


def two_by_two_section(results: StudyResults) -> str:
    """Return the 2×2 tables, one card per site and threshold."""
    if not results.two_by_two:
        return "<p>No cross tabulations were released.</p>"
    cards, seen, censored = [], dict[str, int](), False
    for t in results.two_by_two:
        index = seen[t.site] = seen.get(t.site, 0) + 1
        positives, negatives = class_total(t.tp, t.fn), class_total(t.fp, t.tn)
        rows = [
            ["Index test positive", *_cells(t.tp, t.fp)],
            ["Index test negative", *_cells(t.fn, t.tn)],
            ["Total", str(positives), str(negatives), str(positives + negatives)],
        ]
        censored = censored or is_censored(t.tp, t.fp, t.fn, t.tn)
        cards.append(
            html_table(
                f"table-2x2-{slug(t.site)}-{index}",
                f"{t.site}, threshold {t.threshold:g}",
                ["", "Reference positive", "Reference negative", "Total"],
                rows,
            )
        )
    legend = (
        " A cell shown as &lt;m was below the site's minimum cell size m and was not "
        "released; its class partner is shown as the range it can be. Pooled cells that "
        "include such a cell are ranges."
        if censored
        else ""
    )
    return (
        '<p class="small">Index test result (model score at or above the threshold) by '
        f"reference standard, per site and threshold (STARD 2015 item 23).{legend}</p>"
        f'<div class="cards">{"".join(cards)}</div>'
    )


def _cells(left: Cell, right: Cell) -> list[str]:
    """Return one row's two cells and their sum, escaped: a censored cell reads ``<m``."""
    return [esc(cell_text(left)), esc(cell_text(right)), esc(sum_text(left, right))]


def readers_table(results: StudyResults, sites: Sequence[str], rows: list[MetricRow]) -> str:
    """Agreement (Cohen's kappa) and paired AUC comparisons with readers, per site."""
    body = []
    for site in sites:
        kappas: dict[str, dict[str, MetricRow]] = {}
        for r in rows:
            if r.site == site and r.metric.startswith("kappa "):
                kappas.setdefault(r.metric.removeprefix("kappa "), {})[r.method] = r
        for pair, by_method in kappas.items():
            cells = [by_method.get(m) for m in KAPPA_METHODS]
            shown = [estimate_cell(c) for c in cells]
            if (
                cells[0] is not None
                and cells[0].reason
                and all(c is not None and c.reason == cells[0].reason for c in cells)
            ):
                shown[1:] = [DASH, DASH]  # one reason for the table, said once
            body.append([site_label(results, site), esc(pair), *shown, ""])
        for r in rows:
            if r.site == site and r.metric.startswith("auc difference"):
                who = r.metric.removeprefix("auc difference ")
                body.append([site_label(results, site), esc(who), "", "", "", estimate_cell(r)])
    if not body:
        return ""
    return html_table(
        "table-readers",
        "Agreement with readers (Cohen's kappa, 95% CI) and paired DeLong AUC differences",
        ["Site", "Raters", "Kappa", "Linear weighted", "Quadratic weighted", "AUC difference"],
        body,
        text_columns=(0, 1),
    )
