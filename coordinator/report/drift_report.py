"""The drift report: which site drifted, when, and in what, as one self-contained HTML page.

:func:`write_drift_report` writes, into one directory:

- ``drift-report.html``: the research-tool notice at top and bottom; an alarm summary
  (site × metric → first alarming window); label completeness per site and window as of
  the latest monitoring run, with the windows whose release was replaced as labels
  matured marked and counted; one
  panel per site with its score distribution (baseline against the latest windows), the
  label-free statistics, the attribute mix, the label-based metrics against their targets
  and the CUSUM and EWMA charts; the list of alarms. Figures are inline SVG.
- ``drift.json``: the :class:`~coordinator.monitoring.analysis.DriftFindings` as JSON;
- ``drift-windows.csv`` (one row per site and window) and ``drift-alarms.csv``.
"""

from __future__ import annotations

import csv
import html
import math
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import matplotlib.pyplot as plt

from coordinator.monitoring.analysis import (
    LABEL_METRICS,
    SCORE_DISTRIBUTION,
    DriftFindings,
    DriftSettings,
    SiteDrift,
    mix_metric,
)
from coordinator.report.plots import STYLE, colour, svg
from site_agent.notices import RESEARCH_NOTICE

REPORT_FILE = "drift-report.html"
JSON_FILE = "drift.json"
WINDOWS_CSV = "drift-windows.csv"
ALARMS_CSV = "drift-alarms.csv"
UPDATED_MARK = "u"
"""Mark beside a window's completeness when its release was replaced as labels matured."""
_WINDOW_COLUMNS = (
    "window_number", "window_start", "window_end", "baseline", "released", "n_cases",
    "n_labelled", "n_pending", "label_completeness", "revisions", "psi", "psi_level", "ks_distance",
    "ks_p_value", "ks_level", "mix_p_value", "mix_level", "tvd", "tvd_level", "sensitivity",
    "sensitivity_trials", "specificity", "specificity_trials", "auc", "auc_se",
)  # fmt: skip


@dataclass(frozen=True, slots=True)
class DriftReportFiles:
    """Paths of everything :func:`write_drift_report` wrote."""

    report: Path
    json: Path
    windows_csv: Path
    alarms_csv: Path


def _psi_rule(settings: DriftSettings) -> str:
    """Say in words which PSI limit applies."""
    if settings.psi_thresholds is not None:
        return f"{settings.psi_thresholds[1]:g} (a fixed limit set by the study)"
    return (
        f"the level a window of its size exceeds by chance with probability "
        f"{settings.p_thresholds[1]:g}, given the baseline's own window-to-window noise "
        "(chi-square approximation, Yurdakul 2018)"
    )


def write_drift_report(
    findings: DriftFindings, out: Path, *, context: Sequence[str] = ()
) -> DriftReportFiles:
    """Write the drift report, its JSON and its CSVs into ``out``.

    Parameters
    ----------
    findings
        The drift analysis of one study.
    out
        Directory to write into (created if missing).
    context
        Lines shown under the title, e.g. the drift a rehearsal injected.
    """
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    files = DriftReportFiles(
        out / REPORT_FILE, out / JSON_FILE, out / WINDOWS_CSV, out / ALARMS_CSV
    )
    files.json.write_text(findings.model_dump_json(indent=2))
    with files.windows_csv.open("w", newline="") as sink:
        writer = csv.writer(sink)
        writer.writerow(["site", *_WINDOW_COLUMNS])
        for site in findings.sites:
            for w in site.windows:
                row = w.model_dump(mode="json")
                writer.writerow([site.site, *(_cell(row[c]) for c in _WINDOW_COLUMNS)])
    with files.alarms_csv.open("w", newline="") as sink:
        writer = csv.writer(sink)
        columns = ("site", "metric", "method", "window_number", "window_start", "window_end")
        writer.writerow([*columns, "statistic", "message"])
        for a in findings.alarms:
            row = a.model_dump(mode="json")
            writer.writerow([*(row[c] for c in columns), _cell(a.statistic), a.message])
    files.report.write_text(_html(findings, context))
    return files


def _cell(value: object) -> object:
    if value is None:
        return ""
    if isinstance(value, float):
        return f"{value:.6g}"
    return value


def _metrics(findings: DriftFindings) -> list[str]:
    mix = findings.settings.mix_attribute
    return [SCORE_DISTRIBUTION, *([mix_metric(mix)] if mix else []), *LABEL_METRICS]


def _label(metric: str) -> str:
    return {"auc": "AUC"}.get(metric, metric.replace("_", " "))


def _html(findings: DriftFindings, context: Sequence[str]) -> str:
    e = html.escape
    first = findings.first_alarms()
    methods: dict[tuple[str, str], set[str]] = {}
    for a in findings.alarms:
        if a.window_number == first[(a.site, a.metric)].window_number:
            methods.setdefault((a.site, a.metric), set()).add(a.method)
    metrics = _metrics(findings)
    summary = ["<tr><th>site</th>", *(f"<th>{e(_label(m))}</th>" for m in metrics), "</tr>"]
    for site in findings.sites:
        summary.append(f"<tr><th>{e(site.site)}</th>")
        for m in metrics:
            alarm = first.get((site.site, m))
            if alarm is None:
                summary.append('<td class="quiet">quiet</td>')
            else:
                how = ", ".join(sorted(methods[(site.site, m)]))
                summary.append(
                    f'<td class="alarm">window {alarm.window_number} '
                    f"({alarm.window_start:%Y-%m})<br><small>{e(how)}</small></td>"
                )
        summary.append("</tr>")
    completeness = ["<tr><th>site</th>"]
    completeness += [f"<th>{n}</th>" for n in range(1, len(findings.windows) + 1)] + ["</tr>"]
    for site in findings.sites:
        completeness.append(f"<tr><th>{e(site.site)}</th>")
        for w in site.windows:
            c = w.label_completeness
            text = "–" if c is None else f"{100 * c:.0f}%"
            if w.revisions:
                text += f"<sup>{UPDATED_MARK}{w.revisions}</sup>"
            shade = "" if c is None else f' style="background:rgba(44,160,44,{0.15 + 0.6 * c:.2f})"'
            completeness.append(f"<td{shade}>{text}</td>")
        completeness.append("</tr>")
    updated = sum(1 for site in findings.sites for w in site.windows if w.revisions)
    alarm_rows = [
        f"<tr><td>{e(a.site)}</td><td>{e(_label(a.metric))}</td><td>{e(a.method)}</td>"
        f"<td>{a.window_number} ({a.window_start} to {a.window_end})</td>"
        f"<td>{'' if a.statistic is None else f'{a.statistic:.3g}'}</td></tr>"
        for a in findings.alarms
    ]
    panels = [_panel(findings, site) for site in findings.sites]
    first_start, last_end = findings.windows[0][0], findings.windows[-1][1]
    s = findings.settings
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<title>sitepool drift report: {e(findings.study_id)}</title>
<style>
body {{ font-family: sans-serif; margin: 1.5em auto; max-width: 1100px; color: #222; }}
.notice {{ border: 2px solid #b00; background: #fff4f4; padding: .6em 1em; font-weight: bold; }}
table {{ border-collapse: collapse; margin: .6em 0; font-size: 90%; }}
th, td {{ border: 1px solid #ccc; padding: .25em .5em; text-align: center; }}
td.alarm {{ background: #f8c9c4; font-weight: bold; }}
td.quiet {{ background: #e3f1e0; color: #555; }}
.panel {{ border-top: 2px solid #888; margin-top: 1.5em; }}
small {{ font-weight: normal; }}
</style></head><body>
<p class="notice" id="notice-top">{e(RESEARCH_NOTICE)}</p>
<h1>Drift report: {e(findings.study_id)}</h1>
<p>{len(findings.sites)} sites, {len(findings.windows)} windows from {first_start} to
{last_end}. Each site is compared with its own first {s.baseline_windows} windows
(baseline). Alarms say that something changed and deserves a look; they are not findings
about patients.</p>
{"".join(f"<p><em>{e(line)}</em></p>" for line in context)}
<h2>Alarm summary: first alarming window per site and metric</h2>
<table id="alarm-summary">{"".join(summary)}</table>
<p><small>Score distribution: PSI over baseline score bands above {_psi_rule(s)}, or binned
KS p below {s.p_thresholds[1]:g} with the effective size divided by the baseline's
dispersion (Kish 1965); cells a site suppressed count as unknown, and both statistics are
the smallest value any placement of those cases allows. Attribute mix:
chi-square p below {s.p_thresholds[1]:g} or total variation distance of at least
{s.tvd_thresholds[1]:g} (our default). Sensitivity and specificity (threshold
{findings.threshold}) and AUC: one-sided CUSUM (k {s.cusum_k:g}, h {s.cusum_h:g}) and
EWMA (λ {s.ewma_lambda:g}, L {s.ewma_width:g}) charts for a fall below the baseline,
designs from published ARL tables (Montgomery 2009; Lucas &amp; Saccucci 1990); the AUC
charts are self-starting (Hawkins 1987): each window is judged against the mean and SD of
all earlier windows, their uncertainty carried by a t distribution.</small></p>
<h2>Label completeness (share of released cases with a known label)</h2>
<table id="label-completeness">{"".join(completeness)}</table>
<p id="label-updates">{updated} site window(s) were fetched again and updated after their
labels matured (marked {UPDATED_MARK}<i>n</i>: updated <i>n</i> times); completeness is as
of the latest monitoring run.</p>
<p><small>Label-based charts use labelled cases only; pending labels still count in the
score distribution and the attribute mix. A site withholds pending counts below its
minimum cell, so completeness can read slightly high.</small></p>
<h2>Sites</h2>
{"".join(panels)}
<h2>Every alarm</h2>
<table id="alarms"><tr><th>site</th><th>metric</th><th>method</th><th>window</th>
<th>statistic</th></tr>{"".join(alarm_rows)}</table>
<p class="notice" id="notice-bottom">{e(RESEARCH_NOTICE)}</p>
</body></html>
"""


def _panel(findings: DriftFindings, site: SiteDrift) -> str:
    e = html.escape
    notes = "".join(f"<li>{e(n)}</li>" for n in site.notes)
    targets = ", ".join(
        f"{_label(k)} {v:.3f}" if v is not None else f"{_label(k)} undefined"
        for k, v in site.targets.items()
    )
    return (
        f'<div class="panel"><h3>{e(site.site)}</h3><p>Baseline targets: {e(targets)}.</p>'
        f"{f'<ul>{notes}</ul>' if notes else ''}"
        f"{_label_free_svg(findings, site)}{_label_based_svg(findings, site)}</div>"
    )


def _nan(value: float | None) -> float:
    return math.nan if value is None else value


def _label_free_svg(findings: DriftFindings, site: SiteDrift) -> str:
    numbers = [w.window_number for w in site.windows]
    with plt.rc_context(STYLE):
        fig, axes = plt.subplots(1, 3, figsize=(11.0, 2.8))
        ax = axes[0]
        if site.baseline_edges is not None and site.baseline_counts is not None:
            edges = site.baseline_edges
            total = sum(site.baseline_counts) or 1
            ax.stairs([c / total for c in site.baseline_counts], edges, label="baseline")
            latest = [w for w in site.windows if w.released and not w.baseline][-1:]
            for w in latest:
                ax.text(0.02, 0.9, f"PSI window {w.window_number}: {_fmt(w.psi)}",
                        transform=ax.transAxes, fontsize=8)  # fmt: skip
            low, high = max(edges[1] / 2, 1e-4), 1 - max((1 - edges[-2]) / 2, 1e-4)
            if low < high:  # a logit axis needs at least one inner edge on each side
                ax.set_xscale("logit")
                ax.set_xlim(low, high)
        ax.set_title("baseline score distribution")
        ax.set_xlabel("score (logit scale)")
        ax.set_ylabel("share of cases")
        ax = axes[1]
        ax.plot(numbers, [_nan(w.psi) for w in site.windows], "o-", label="PSI",
                color=colour(0))  # fmt: skip
        ax.plot(numbers, [_nan(w.ks_distance) for w in site.windows], "s-", label="KS distance",
                color=colour(1))  # fmt: skip
        ax.step(numbers, [_nan(w.psi_limit) for w in site.windows], where="mid",
                color=colour(0), linestyle=":", label="PSI limit")  # fmt: skip
        ax.axvspan(0.5, findings.settings.baseline_windows + 0.5, color="#ddd", alpha=0.5)
        ax.set_title("score distribution vs baseline")
        ax.set_xlabel("window")
        ax.legend(fontsize=7)
        ax = axes[2]
        levels = sorted({level for w in site.windows for level in w.mix_shares})
        bottom = [0.0] * len(numbers)
        for i, level in enumerate(levels):
            shares = [w.mix_shares.get(level, 0.0) for w in site.windows]
            ax.bar(numbers, shares, bottom=bottom, label=level, color=colour(i))
            bottom = [b + s for b, s in zip(bottom, shares, strict=True)]
        ax.set_title(f"{findings.settings.mix_attribute or 'attribute'} mix")
        ax.set_xlabel("window")
        if levels:
            ax.legend(fontsize=7)
        fig.tight_layout()
        return svg(fig)


def _label_based_svg(findings: DriftFindings, site: SiteDrift) -> str:
    numbers = [w.window_number for w in site.windows]
    with plt.rc_context(STYLE):
        fig, axes = plt.subplots(1, 3, figsize=(11.0, 2.8))
        ax = axes[0]
        for i, metric in enumerate(LABEL_METRICS):
            values = [_nan(getattr(w, metric)) for w in site.windows]
            ax.plot(numbers, values, "o-", color=colour(i), label=_label(metric), markersize=3)
            target = site.targets.get(metric)
            if target is not None:
                ax.axhline(target, color=colour(i), linestyle=":")
        ax.axvspan(0.5, findings.settings.baseline_windows + 0.5, color="#ddd", alpha=0.5)
        ax.set_title("labelled cases: metrics and baseline targets")
        ax.set_xlabel("window")
        ax.legend(fontsize=7)
        for ax, method, limit in (
            (axes[1], "cusum", site.limits.get("cusum_h")),
            (axes[2], "ewma", site.limits.get("ewma_limit")),
        ):
            for i, metric in enumerate(LABEL_METRICS):
                values = [_nan(w.charts.get(f"{metric}_{method}")) for w in site.windows]
                if method == "ewma":
                    values = [-v for v in values]  # a fall shows as a rise toward the limit
                ax.plot(numbers, values, "o-", color=colour(i), label=_label(metric),
                        markersize=3)  # fmt: skip
            if limit is not None:
                ax.axhline(limit, color="#b00", linestyle="--", label="alarm limit")
            ax.set_title(f"{method.upper()} for a fall" + (" (C⁻)" if method == "cusum" else ""))
            ax.set_xlabel("window")
            ax.legend(fontsize=7)
        fig.tight_layout()
        return svg(fig)


def _fmt(value: float | None) -> str:
    return "undefined" if value is None else f"{value:.3f}"
