"""The head of the study report: study facts, the findings list and the key numbers.

The key numbers are read from the result rows (per-site AUC by role, the primary
random-effects AUC with its prediction interval and heterogeneity, the one-cohort AUC,
sites that did not release); none is computed here beyond choosing and formatting.
"""

from __future__ import annotations

import math

from coordinator.pooling.study_results import MetricRow, StudyResults
from coordinator.report.exports import headline_auc
from coordinator.report.findings_list import findings_section
from coordinator.report.html_parts import (
    POOLED,
    esc,
    estimate_cell,
    interval_text,
    method_name,
    num,
)
from coordinator.report.pooled_sections import primary_meta


def study_facts(results: StudyResults) -> str:
    """Return the study's identifying facts as a definition list."""
    released = sum(s.status == "released" for s in results.sites)
    facts = [
        ("Study", esc(results.study_id)),
        ("Protocol hash", f"<code>{esc(results.protocol_hash)}</code>"),
        ("Created", esc(results.created_at.isoformat(timespec="minutes"))),
        ("Run by", esc(results.engine)),
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


def summary_section(results: StudyResults) -> str:
    """Return the findings list and a short list of key numbers derived from the rows."""
    findings = findings_section(results)
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
            items.append((f"AUC, {role} site", f"{num('auc', aucs[0][0])} ({esc(aucs[0][1])})"))
        elif aucs:
            (low, low_site), (high, high_site) = min(aucs), max(aucs)
            items.append(
                (
                    f"AUC, {len(aucs)} {role} sites",
                    f"worst {num('auc', low)} ({esc(low_site)}), "
                    f"best {num('auc', high)} ({esc(high_site)})",
                )
            )
    meta = primary_meta(results, "auc")
    if meta is not None and math.isfinite(meta.estimate):
        text = (
            f"{num('auc', meta.estimate)} (95% CI {interval_text('auc', meta.lower, meta.upper)})"
        )
        pi = interval_text("auc", meta.prediction_lower, meta.prediction_upper)
        items.append((f"AUC, pooled ({esc(method_name(meta.method))})", text))
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
    if cohort is not None and (math.isfinite(cohort.estimate) or cohort.estimate_low is not None):
        items.append(("AUC, all cases as one cohort", _cohort_cell(results, cohort)))
    missing = [s.site for s in results.sites if s.status != "released"]
    if missing:
        items.append(("Did not release", esc(", ".join(missing))))
    listed = "".join(f"<dt>{k}</dt><dd>{v}</dd>" for k, v in items)
    return f'<div class="summary">{findings}</div>' + (
        f'<h3>Key numbers</h3><dl class="meta" id="key-numbers">{listed}</dl>' if items else ""
    )


def _cohort_cell(results: StudyResults, cohort: MetricRow) -> str:
    """Return the one-cohort AUC with its binning bound and, in a rehearsal, its true value."""
    text = estimate_cell(cohort)
    if cohort.bound is not None and math.isfinite(cohort.bound):
        text += ' <span class="ci">(± the largest possible binning error)</span>'
    for check in results.simulation_checks:
        if check.site == cohort.site and check.metric == cohort.metric:
            error = f", error {check.error:+.4f}" if math.isfinite(check.error) else ""
            text += f"; true value {num('auc', check.true_value)}{error} <em>(simulation only)</em>"
    return text
