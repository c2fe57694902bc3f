"""The findings list that opens the study report: one line per finding, number and interval.

A reader takes in at a glance: the development site's AUC, the worst external site, the
sites measurably worse than development (interval wholly below the development AUC), the
pooled AUC with its prediction interval for a new site, and what local adaptation
recovered at the site that was worst before it. Every number is read from a row of the
results (:class:`~coordinator.pooling.study_results.StudyResults`); none is computed here
beyond choosing and formatting. The sentences of ``results.findings`` stay below the list
as the detail.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from coordinator.pooling.study_results import MetricRow, ReferenceLine, StudyResults
from coordinator.report.exports import headline_auc
from coordinator.report.html_parts import esc, interval_text, method_name, num
from coordinator.report.pooled_sections import primary_meta


@dataclass(frozen=True, slots=True)
class Finding:
    """One line of the list: what it is about, and its number with interval."""

    label: str
    text: str


def _ci(lower: float, upper: float, level: str = "95%") -> str:
    ci = interval_text("auc", lower, upper)
    return f"{level} CI {ci}" if ci else "no interval"


def _auc(row: MetricRow) -> str:
    return f"AUC {num('auc', row.estimate)} ({_ci(row.lower, row.upper)})"


def _aucs_by_role(results: StudyResults) -> tuple[list[MetricRow], list[MetricRow]]:
    development: list[MetricRow] = []
    external: list[MetricRow] = []
    for s in results.sites:
        row = headline_auc(results, s.site)
        if row is None or not math.isfinite(row.estimate):
            continue
        (development if s.role == "development" else external).append(row)
    return development, sorted(external, key=lambda r: r.estimate)


def study_finding_lines(results: StudyResults) -> list[Finding]:
    """Return the findings list of a study, in reading order (module docstring)."""
    lines: list[Finding] = []
    development, external = _aucs_by_role(results)
    dev = development[0] if development else None
    if dev is not None:
        lines.append(Finding(f"Development site ({dev.site})", _auc(dev)))
    if external:
        worst = external[0]
        lines.append(Finding(f"Worst external site ({worst.site})", _auc(worst)))
    if dev is not None and external:
        worse = [r for r in external if math.isfinite(r.upper) and r.upper < dev.estimate]
        names = ", ".join(f"{r.site} {num('auc', r.estimate)}" for r in worse) or "none"
        lines.append(
            Finding(
                "Sites measurably worse than development",
                f"{len(worse)} of {len(external)} external sites have a 95% CI wholly below "
                f"AUC {num('auc', dev.estimate)}: {names}",
            )
        )
    meta = primary_meta(results, "auc")
    if meta is not None and math.isfinite(meta.estimate):
        pi = interval_text("auc", meta.prediction_lower, meta.prediction_upper)
        new_site = f"; a new site: {pi} (95% prediction interval)" if pi else ""
        lines.append(
            Finding(
                f"Pooled AUC, {meta.k} sites ({method_name(meta.method)}"
                f"{', HKSJ' if meta.hksj else ''})",
                f"{num('auc', meta.estimate)} ({_ci(meta.lower, meta.upper)}){new_site}",
            )
        )
    adaptation = _adaptation_line(results)
    if adaptation is not None:
        lines.append(adaptation)
    return lines


def _line(results: StudyResults, site: str, line: str) -> ReferenceLine | None:
    for r in results.reference_lines:
        if r.site == site and r.line == line and math.isfinite(r.estimate):
            return r
    return None


def _adaptation_line(results: StudyResults) -> Finding | None:
    """Return what site-local fine-tuning on the whole pool recovered at the worst site."""
    roles = {s.site: s.role for s in results.sites}
    before = [
        r
        for r in results.reference_lines
        if r.line == "none" and roles.get(r.site) != "development" and math.isfinite(r.estimate)
    ]
    if not before:
        return None
    worst = min(before, key=lambda r: r.estimate)
    after = _line(results, worst.site, "site-local")
    if after is None:
        return None
    change = next(
        (
            a
            for a in results.adaptation
            if a.site == worst.site and a.metric == "auc_change" and a.n_cases is None
        ),
        None,
    )
    text = (
        f"AUC {num('auc', worst.estimate)} ({_ci(worst.lower, worst.upper)}) before, "
        f"{num('auc', after.estimate)} ({_ci(after.lower, after.upper)}) after fine-tuning "
        "on its whole local pool"
    )
    if change is not None and math.isfinite(change.estimate):
        ci = interval_text("auc", change.lower, change.upper)
        text += f"; change {change.estimate:+.3f}" + (f" (95% CI {ci})" if ci else "")
    return Finding(f"Adaptation at {worst.site} (worst before it, held-out test set)", text)


def findings_section(results: StudyResults) -> str:
    """Return the findings list, with the findings in sentences below as the detail."""
    lines = study_finding_lines(results)
    items = "".join(f"<li><strong>{esc(f.label)}:</strong> {esc(f.text)}</li>" for f in lines)
    listed = f'<ul class="findings" id="findings">{items}</ul>' if lines else ""
    if not lines:
        listed = "<p>No findings were recorded.</p>"
    detail = ""
    if results.findings:
        sentences = "".join(f"<li>{esc(s)}</li>" for s in results.findings)
        detail = (
            '<details id="findings-detail"><summary>The findings in sentences</summary>'
            f"<ul>{sentences}</ul></details>"
        )
    return listed + detail
