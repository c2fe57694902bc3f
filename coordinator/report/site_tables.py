"""Per-site tables of the study report: sites, participant flow, accuracy, subgroups.

The accuracy tables give each site's discrimination and calibration (AUC with its
DeLong, logit, patient-clustered and binned intervals; Brier score, ECE, calibration
intercept and slope) and its accuracy at every pre-specified threshold, following STARD
2015 items 19 and 24 (Bossuyt et al., BMJ 2015;351:h5527, doi:10.1136/bmj.h5527).
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence

from coordinator.pooling.study_results import StudyResults
from coordinator.report.cross_tables import readers_table
from coordinator.report.exports import find_metric, prevalence
from coordinator.report.html_parts import (
    DASH,
    STATUS,
    esc,
    estimate_cell,
    html_table,
    method_name,
    metric_label,
    num,
    site_label,
    site_order,
)


def sites_section(results: StudyResults) -> str:
    """Return the table of invited sites, their role and status."""
    rows = [
        [
            site_label(results, s.site),
            esc(s.role),
            esc(STATUS.get(s.status, s.status)),
            esc(s.description or DASH),
        ]
        for s in results.sites
    ]
    return html_table(
        "table-sites",
        "Invited sites, their role, and what each released",
        ["Site", "Role", "Status", "Description"],
        rows,
        text_columns=range(4),
    )


WITHHELD_PENDING = "withheld: site policy (protects a small count)"


def flow_section(results: StudyResults) -> str:
    """Return the participant-flow table (STARD 2015 item 19)."""
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
        withheld = f.pending_reference_standard is None
        row = [
            site_label(results, f.site),
            f"≥ {f.observations + 1}" if withheld else str(f.observations),
            *(str(v) for v in (f.patients, f.with_reference_standard)),
            f'≥ 1 <span class="reason">{WITHHELD_PENDING}</span>'
            if withheld
            else str(f.pending_reference_standard),
            *(str(v) for v in (f.positives, f.negatives)),
        ]
        row.append(num("prevalence", prevalence(f)))
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
        html_table(
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


def estimates_section(results: StudyResults) -> str:
    """Return the per-site accuracy tables: headline metrics, readers, thresholds."""
    overall = [r for r in results.metrics if r.subgroup is None]
    exact = {(r.site, r.metric, r.method, r.threshold): r for r in reversed(overall)}
    sites = site_order(results)
    header = ["Site", "n"] + [
        f"{esc(title)}<br><span class=small>{esc(sub)}</span>" for _, _, title, sub in _HEADLINE
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
            cells = [estimate_cell(r) for r in found]
            rows.append([site_label(results, site), n, *cells])
    out = html_table(
        "table-site-metrics",
        "Discrimination and calibration per site: estimate (95% CI)",
        header,
        rows,
    )
    out += (
        '<p class="small">For all cases as one cohort the AUC compares cases across sites '
        "through their score histograms; its interval uses the Hanley–McNeil standard "
        "error and ± gives the largest possible error from binning. The AUC from score "
        "bins of a single site is shown with the same bound; within a wide bin of one "
        "site, cases are spread as the other sites' narrower bins of the same class show "
        "(the bound does not rest on that). The expected calibration error is taken on "
        "the calibration bins each site released: where a site merged small bins, on "
        "fewer, wider bins, which can only lower it (sites are then not compared on one "
        "binning).</p>"
    )
    out += readers_table(results, sites, overall)
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
            methods = sorted({method_name(r.method) for r in found if r is not None})
            rows.append(
                [site_label(results, site), f"{t:g}"]
                + [estimate_cell(r) for r in found]
                + [esc(", ".join(methods))]
            )
    if rows:
        out += html_table(
            "table-threshold-metrics",
            "Accuracy at each pre-specified threshold: estimate (95% CI)",
            ["Site", "Threshold"] + [metric_label(m) for m in threshold_metrics] + ["CI method"],
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
    ("ece", "point", "ECE", "on the released bins"),
    ("calibration intercept", "logistic-recalibration", "Calibration", "intercept, ideally zero"),
    ("calibration slope", "logistic-recalibration", "Calibration", "slope, ideally one"),
)
"""Columns of the per-site table: (metric, method, heading, sub-heading)."""


def not_released_section(results: StudyResults) -> str:
    """Return the table of sites that declined or did not reply."""
    absent = [s for s in results.sites if s.status != "released"]
    if not absent:
        return '<p id="all-released">Every invited site released results.</p>'
    rows = [
        [esc(s.site), esc(STATUS.get(s.status, s.status)), esc(s.reason or "no reason given")]
        for s in absent
    ]
    return html_table(
        "table-not-released",
        "Sites that declined or did not reply; none of their cases is in any estimate",
        ["Site", "Status", "Reason"],
        rows,
        text_columns=range(3),
    )


def subgroup_section(results: StudyResults) -> str:
    """Return the table of estimates within subgroups."""
    rows = [r for r in results.metrics if r.subgroup is not None]
    if not rows:
        return "<p>No subgroup analyses were requested or released.</p>"
    body = [
        [
            site_label(results, r.site),
            esc(r.subgroup),
            esc(metric_label(r.metric)),
            f"{r.threshold:g}" if r.threshold is not None else DASH,
            str(r.n),
            estimate_cell(r),
            esc(method_name(r.method)),
        ]
        for r in rows
    ]
    return html_table(
        "table-subgroups",
        "Estimates within subgroups: estimate (95% CI); ± the largest possible binning "
        "error of an AUC pooled from score bins",
        ["Site", "Subgroup", "Metric", "Threshold", "n", "Estimate (95% CI)", "CI method"],
        body,
        text_columns=(0, 1, 2, 6),
    )
