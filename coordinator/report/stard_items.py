"""The STARD 2015 section of the study report: which items this report answers, and where.

Item numbers and topics from the STARD 2015 checklist (Bossuyt PM et al., STARD 2015: an
updated list of essential items for reporting diagnostic accuracy studies. BMJ
2015;351:h5527, doi:10.1136/bmj.h5527).
"""

from __future__ import annotations

from coordinator.report.html_parts import esc, html_table

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


def stard_section() -> str:
    """Return the STARD 2015 items covered and not covered."""
    covered = html_table(
        "table-stard",
        "STARD 2015 items this report answers (Bossuyt et al., BMJ 2015;351:h5527)",
        ["Item", "Topic", "Where in this report"],
        ([esc(i), esc(t), f'<a href="#{a}">{esc(w)}</a>'] for i, t, a, w in _STARD_COVERED),
        text_columns=range(3),
    )
    missing = "".join(f"<li><b>{esc(i)}</b>: {esc(t)}</li>" for i, t in _STARD_NOT_COVERED)
    return covered + f"<h3>Items not covered here</h3><ul>{missing}</ul>"
