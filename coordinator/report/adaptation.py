"""The report's adaptation section: adaptation curves and the four reference lines per site.

Two figures and two tables, rendered from :class:`~coordinator.pooling.study_results.StudyResults`
only: AUC against the number of local training cases (mean over seeds with its Rubin
interval, one panel per site, the development site's AUC minus the margin as a dashed
line), a table of the paired DeLong change of AUC after − before per site and case count,
and per site the AUC with no adaptation, site-local and federated fine-tuning and
centralized training on the pooled data (simulation only), each with its interval.
An empty string when the study had no fine-tuning stage.
"""

from __future__ import annotations

import html
import math

import matplotlib.pyplot as plt

from coordinator.adaptation.curves import AUC_CHANGE, POOLED, count_label
from coordinator.pooling.study_results import AdaptationRow, StudyResults
from coordinator.report.plots import colour, svg

_LINE_LABELS = {
    "none": "no adaptation",
    "site-local": "site-local fine-tuning",
    "federated": "federated fine-tuning",
    "centralized": "centralized (pooled data, simulation only)",
}
REFERENCE_LINES = tuple(_LINE_LABELS)
"""Report order of the lines (as in :data:`coordinator.adaptation.fine_tuning.REFERENCE_LINES`)."""


def _e(text: object) -> str:
    return html.escape(str(text), quote=True)


def _f(value: float) -> str:
    return "–" if not math.isfinite(value) else f"{value:.3f}"


def _positions(rows: list[AdaptationRow]) -> tuple[list[float], list[str]]:
    """Evenly spaced x positions (counts are not on a linear scale), labels 0, 10, ... all."""
    return [float(i) for i in range(len(rows))], [count_label(r.n_cases) for r in rows]


def adaptation_curves_svg(results: StudyResults) -> str:
    """Return one panel per site (and pooled): AUC vs local cases, with intervals."""
    sites = sorted(
        {r.site for r in results.adaptation if r.metric == "auc"}, key=lambda s: (s == POOLED, s)
    )
    margin = results.adequate_cases[0] if results.adequate_cases else None
    columns = min(3, len(sites))
    rows_n = math.ceil(len(sites) / columns)
    fig, axes = plt.subplots(
        rows_n, columns, figsize=(3.4 * columns, 2.7 * rows_n), squeeze=False, sharey=True
    )
    flat = [ax for row in axes for ax in row]
    estimates = [r.estimate for r in results.adaptation if r.metric == "auc"]
    finite = [v for v in estimates if math.isfinite(v)]
    # Zoom to the estimates (AUCs near 1 are otherwise flat lines); wide intervals are cut
    # at the axis and given in full in the table below.
    bottom = max(0.5, math.floor((min(finite, default=0.5) - 0.05) * 20) / 20)
    for i, site in enumerate(sites):
        ax = flat[i]
        curve = [r for r in results.adaptation if r.site == site and r.metric == "auc"]
        x, labels = _positions(curve)
        y = [r.estimate for r in curve]
        low = [r.estimate - r.lower if math.isfinite(r.lower) else 0.0 for r in curve]
        high = [r.upper - r.estimate if math.isfinite(r.upper) else 0.0 for r in curve]
        ax.errorbar(x, y, yerr=[low, high], marker="o", capsize=3, color=colour(i))
        if margin is not None and math.isfinite(margin.reference_auc):
            ax.axhline(margin.reference_auc - margin.margin, linestyle="--", color="#555555")
        ax.set_ylim(bottom, 1.005)
        ax.set_xticks(x, labels)
        ax.set_title(site, fontsize=9)
        ax.set_xlabel("local training cases", fontsize=8)
        ax.set_ylabel("AUC", fontsize=8)
    for ax in flat[len(sites) :]:
        ax.set_visible(False)
    fig.tight_layout()
    return svg(fig)


def reference_lines_svg(results: StudyResults) -> str:
    """Return a per-site chart of the four reference lines' AUCs with intervals."""
    sites = sorted({r.site for r in results.reference_lines})
    fig, ax = plt.subplots(figsize=(7.5, 0.55 * len(sites) * 4 / 3 + 1.6), layout="constrained")
    for j, line in enumerate(REFERENCE_LINES):
        rows = {r.site: r for r in results.reference_lines if r.line == line}
        ys, xs, lows, highs = [], [], [], []
        for i, site in enumerate(sites):
            row = rows.get(site)
            if row is None or not math.isfinite(row.estimate):
                continue
            ys.append(i * 5 + j)
            xs.append(row.estimate)
            lows.append(row.estimate - row.lower if math.isfinite(row.lower) else 0.0)
            highs.append(row.upper - row.estimate if math.isfinite(row.upper) else 0.0)
        ax.errorbar(
            xs,
            ys,
            xerr=[lows, highs],
            fmt="o",
            capsize=2,
            color=colour(j),
            label=_LINE_LABELS[line],
        )
    ax.set_yticks([i * 5 + 1.5 for i in range(len(sites))], sites, fontsize=8)
    ax.invert_yaxis()
    ax.set_xlabel("AUC on the site's held-out local test set (95% CI)")
    # Below the panel, so that it never covers a site's intervals.
    fig.legend(fontsize=7, loc="outside lower center", ncol=2, frameon=False)
    return svg(fig)


def adaptation_section(results: StudyResults) -> str:
    """Return the section's HTML, or an empty string without adaptation results."""
    if not results.adaptation and not results.reference_lines:
        return ""
    parts = [
        "<p>Sites fine-tuned the model on increasing numbers of their own cases, drawn by "
        "whole patients from a local training pool, and measured it on a held-out local test "
        "set that training never saw. Each point is the mean over seeds on the logit scale "
        "with a Rubin interval (within-seed and between-seed variance; where a seed reached "
        "an AUC of exactly 1, on the AUC scale with the interval cut at 1); the pooled panel is "
        "the mean of the sites' logits. The dashed line is the development site's AUC minus "
        "the margin.</p>"
    ]
    if results.adaptation:
        parts.append(f"<figure>{adaptation_curves_svg(results)}</figure>")
        parts.append(_shift_descriptions(results))
    changes = [r for r in results.adaptation if r.metric == AUC_CHANGE]
    if changes:
        rows = "".join(
            f"<tr><td>{_e(r.site)}</td><td>{_e(count_label(r.n_cases))}</td>"
            f"<td>{_signed(r.estimate)}</td><td>{_signed(r.lower)} to {_signed(r.upper)}</td>"
            f"<td>{r.repeats}</td><td>{_e(r.reason or '')}</td></tr>"
            for r in changes
        )
        parts.append(
            "<p>Change of AUC after local fine-tuning, after − before, on the same held-out "
            "cases: the paired DeLong difference at each seed, combined over seeds by "
            "Rubin's rules.</p>"
            "<table><thead><tr><th>site</th><th>local training cases</th><th>AUC change</th>"
            "<th>95% CI</th><th>seeds</th><th>note</th></tr></thead>"
            f"<tbody>{rows}</tbody></table>"
        )
    if results.adequate_cases:
        rows = "".join(
            f"<tr><td>{_e(a.site)}</td><td>{_e(_adequate(a.n_cases, a.whole_pool))}</td>"
            f"<td>{_e(a.reason or '')}</td></tr>"
            for a in results.adequate_cases
        )
        parts.append(
            "<table><thead><tr><th>site</th><th>smallest adequate local cases</th>"
            f"<th>note</th></tr></thead><tbody>{rows}</tbody></table>"
        )
    if results.reference_lines:
        parts.append(f"<figure>{reference_lines_svg(results)}</figure>")
        rows = "".join(
            f"<tr><td>{_e(r.site)}</td><td>{_e(_LINE_LABELS.get(r.line, r.line))}</td>"
            f"<td>{_f(r.estimate)}</td><td>{_f(r.lower)} to {_f(r.upper)}</td>"
            f"<td>{_e(r.method)}</td></tr>"
            for r in results.reference_lines
        )
        parts.append(
            "<table><thead><tr><th>site</th><th>reference line</th><th>AUC</th>"
            f"<th>95% CI</th><th>method</th></tr></thead><tbody>{rows}</tbody></table>"
        )
    return "".join(parts)


def _shift_descriptions(results: StudyResults) -> str:
    """List how each adapted site differs from the development site, as it was described.

    A curve that rises over many cases means the site's shift destroyed information the
    model relied on; one that is flat after a few cases means a refit undid the shift.
    """
    adapted = {r.site for r in results.adaptation}
    described = [s for s in results.sites if s.site in adapted and s.description]
    if not described:
        return ""
    items = "".join(f"<li>{_e(s.site)}: {_e(s.description)}</li>" for s in described)
    return (
        "<p>What each site's curve responds to, as the site is described. A shift a refit "
        "can undo (a gain, an offset, a contrast change) should be repaired by a few local "
        "cases; a shift that destroys information (unreliable features, noise, blur, lost "
        "resolution) is repaired slowly over tens to hundreds of cases, or not at all.</p>"
        f"<ul>{items}</ul>"
    )


def _signed(value: float) -> str:
    return "–" if not math.isfinite(value) else f"{value:+.3f}"


def _adequate(n: int | None, whole_pool: bool) -> str:
    if n is not None:
        return str(n)
    return "the whole pool" if whole_pool else "not reached"
