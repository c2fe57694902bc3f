"""The study report: one self-contained HTML file rendered from :class:`StudyResults`.

The file opens with no network: styles are inline, figures are inline SVG drawn by
matplotlib (:mod:`coordinator.report.plots`), and there is no script. Every string
taken from the results is HTML-escaped. Sections follow the reading order of a
diagnostic-accuracy paper (STARD 2015; Bossuyt et al., BMJ 2015;351:h5527,
doi:10.1136/bmj.h5527): sites and flow, estimates, pooling, curves, cross tabulations.

This module is the page skeleton (styles, contents, caution at top and bottom); each
section is rendered by the module named for it: :mod:`~coordinator.report.key_numbers`,
:mod:`~coordinator.report.site_tables`, :mod:`~coordinator.report.pooled_sections`,
:mod:`~coordinator.report.curve_sections`, :mod:`~coordinator.report.cross_tables`,
:mod:`~coordinator.report.stard_items`, over the helpers in
:mod:`~coordinator.report.html_parts`.
"""

from __future__ import annotations

from pathlib import Path

from coordinator.pooling.study_results import StudyResults
from coordinator.report.adaptation import adaptation_section
from coordinator.report.cross_tables import two_by_two_section
from coordinator.report.curve_sections import calibration_section, roc_section
from coordinator.report.html_parts import esc
from coordinator.report.key_numbers import study_facts, summary_section
from coordinator.report.pooled_sections import forest_section, heterogeneity_section
from coordinator.report.site_tables import (
    estimates_section,
    flow_section,
    not_released_section,
    sites_section,
    subgroup_section,
)
from coordinator.report.stard_items import stard_section

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
.findings{margin:4px 0 8px;padding-left:20px}.findings li{margin:3px 0}
details summary{cursor:pointer;color:#444;font-size:.92em}
nav ol{columns:2;font-size:.92em}
table{border-collapse:collapse;margin:8px 0 16px;font-size:.82em}
.table-scroll{overflow-x:auto;max-width:100%}
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
        ("sites", "Sites and setting", sites_section(results)),
        ("flow", "Participant flow", flow_section(results)),
        ("estimates", "Accuracy per site", estimates_section(results)),
        ("forest", "Pooled estimates (forest plots)", forest_section(results)),
        ("heterogeneity", "Heterogeneity between sites", heterogeneity_section(results)),
        ("roc", "ROC curves", roc_section(results)),
        ("calibration", "Calibration", calibration_section(results)),
        ("cross-tabulation", "Cross tabulations (2×2)", two_by_two_section(results)),
        ("not-released", "Sites that did not release results", not_released_section(results)),
        ("subgroups", "Subgroups", subgroup_section(results)),
        ("stard", "STARD 2015 items covered", stard_section()),
        ("notes", "Notes", _notes_section(results)),
    ]
    if results.adaptation or results.reference_lines:
        adaptation = ("adaptation", "Local adaptation and reference lines")
        sections.insert(-2, (*adaptation, adaptation_section(results)))
    nav = "".join(f'<li><a href="#{sid}">{esc(title)}</a></li>' for sid, title, _ in sections)
    body = "".join(
        f'<section id="{sid}"><h2>{esc(title)}</h2>{content}</section>'
        for sid, title, content in sections
    )
    caution = f'<p class="caution" role="note">{esc(results.notice)}</p>'
    return (
        '<!DOCTYPE html><html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{esc(results.title)}</title><style>{_CSS}</style></head><body><main>"
        f'<header><h1>{esc(results.title)}</h1><div id="caution-top">{caution}</div>'
        f"{study_facts(results)}</header>"
        f'<section id="summary"><h2>Summary</h2>{summary_section(results)}</section>'
        f'<nav><h2>Contents</h2><ol>{nav}</ol></nav>{body}<footer id="caution-bottom">{caution}'
        "</footer></main></body></html>\n"
    )


def _notes_section(results: StudyResults) -> str:
    notes = [*results.notes, *(f"{m.metric}: {m.note}" for m in results.meta if m.note)]
    if not notes:
        return "<p>No notes.</p>"
    return "<ul>" + "".join(f"<li>{esc(n)}</li>" for n in notes) + "</ul>"
