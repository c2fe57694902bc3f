"""What a planning grid says, as a terminal table, CSV, JSON and a small HTML page.

The page holds one figure per measure (pooled interval width, prediction interval
width, power, detection delay) against cases per site, one line per number of sites,
with the Monte Carlo interval as error bars and the target as a dashed line; then the
table of every design with its verdicts, and the research-tool caution at top and
bottom. A value the simulation cannot know is written as unknown or as a bound: a
delay with replicates that never alarmed is "≥ x", a prediction interval with two
sites is "n/a".
"""

from __future__ import annotations

import csv
import html
import math
from pathlib import Path

import matplotlib.pyplot as plt

from coordinator.report.plots import STYLE, colour, svg
from simulations.planning import CellResult, McValue, PlanResult
from site_agent.notices import RESEARCH_NOTICE

JSON_FILE = "plan.json"
CSV_FILE = "plan.csv"
HTML_FILE = "plan.html"

MEASURES: tuple[tuple[str, str, str | None], ...] = (
    ("pooled_ci_width", "Width of the pooled AUC interval", "max_ci_width"),
    ("prediction_width", "Width of the prediction interval (new site)", "max_prediction_width"),
    ("power", "Power to flag a new site's AUC drop", "min_power"),
    ("detection_delay", "Drift monitor: windows until alarm", "max_delay"),
)
_CSV_COLUMNS = (
    "sites",
    "cases_per_site",
    "total_cases",
    "replicates",
    "usable",
)


def format_value(value: McValue, digits: int = 3) -> str:
    """Return ``estimate (lower–upper)``, ``≥ x`` for a censored mean, ``n/a`` when unknown."""
    if not math.isfinite(value.estimate):
        return "n/a"
    if value.bound == "at least":
        return f"≥ {value.estimate:.{digits}g} ({value.censored} no alarm)"
    return f"{value.estimate:.{digits}g} ({value.lower:.{digits}g}–{value.upper:.{digits}g})"


def summary_lines(result: PlanResult) -> list[str]:
    """Return the plain-language verdict: which design meets the targets, if any."""
    s = result.settings
    lines = [
        f"{len(result.cells)} designs x {s.replicates} replicates, seed {s.seed}; "
        f"AUC {s.auc:g}, prevalence {s.prevalence:g}, tau {s.tau:.3g} ({s.tau_source}), "
        f"drop {s.drop:g}, {s.window_cases} cases per monitoring window."
    ]
    asked = [name for name, value in result.targets.model_dump().items() if value is not None]
    if not asked:
        lines.append("No targets given: the table shows each design; none is recommended.")
    elif result.recommended is None:
        lines.append(
            "No design in the grid meets every target with its whole Monte Carlo interval; "
            "widen the grid or relax a target."
        )
    else:
        k, n = result.recommended
        lines.append(
            f"Cheapest design meeting every target: {k} sites x {n} cases per site "
            f"({k * n} cases in all)."
        )
    return lines


def write_csv(result: PlanResult, path: Path) -> None:
    """Write one row per design; unknown values are empty, bounds are flagged."""
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle)
        header = list(_CSV_COLUMNS)
        for name, _, _ in MEASURES:
            header += [name, f"{name}_lower", f"{name}_upper", f"{name}_bound"]
        header += ["false_alarm", "false_alarm_lower", "false_alarm_upper", "meets_targets"]
        writer.writerow(header)
        for c in result.cells:
            row: list[object] = [
                c.sites,
                c.cases_per_site,
                c.sites * c.cases_per_site,
                c.replicates,
                c.usable,
            ]
            for name, _, _ in MEASURES:
                v: McValue = getattr(c, name)
                row += [_cell(v.estimate), _cell(v.lower), _cell(v.upper), v.bound]
            fa = c.false_alarm
            row += [_cell(fa.estimate), _cell(fa.lower), _cell(fa.upper)]
            row.append("" if c.meets_targets is None else str(c.meets_targets).lower())
            writer.writerow(row)


def write_outputs(result: PlanResult, directory: Path) -> dict[str, Path]:
    """Write plan.json, plan.csv and plan.html into ``directory``; return their paths."""
    directory.mkdir(parents=True, exist_ok=True)
    paths = {
        "json": directory / JSON_FILE,
        "csv": directory / CSV_FILE,
        "html": directory / HTML_FILE,
    }
    result.write_json(paths["json"])
    write_csv(result, paths["csv"])
    paths["html"].write_text(render_html(result))
    return paths


def render_html(result: PlanResult) -> str:
    """Return the planning page as one self-contained HTML document."""
    e = html.escape
    s = result.settings
    figures = "\n".join(
        f"<figure>{_figure(result, name, title, target)}</figure>"
        for name, title, target in MEASURES
    )
    head = "".join(
        f"<th>{e(t)}</th>"
        for t in (
            "sites",
            "cases per site",
            "all cases",
            *(title for _, title, _ in MEASURES),
            "false alarm (no drop)",
            "meets targets",
        )
    )
    rows = "\n".join(_row(c, result.recommended) for c in result.cells)
    targets = ", ".join(
        f"{k.replace('_', ' ')} {v:g}" for k, v in result.targets.model_dump().items() if v
    )
    notes = "".join(f"<li>{e(n)}</li>" for n in result.notes)
    summary = "".join(f"<p>{e(line)}</p>" for line in summary_lines(result))
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<title>sitepool consortium plan</title>
<style>
body {{ font-family: sans-serif; margin: 1.5em auto; max-width: 1100px; color: #222; }}
.notice {{ border: 2px solid #b00; background: #fff4f4; padding: .6em 1em; font-weight: bold; }}
table {{ border-collapse: collapse; margin: .6em 0; font-size: 85%; }}
th, td {{ border: 1px solid #ccc; padding: .25em .5em; text-align: center; }}
tr.best td {{ background: #e3f1e0; font-weight: bold; }}
td.yes {{ color: #1a6b1a; }} td.no {{ color: #a00; }}
.figures {{ display: grid; grid-template-columns: 1fr 1fr; gap: 1em; }}
figure {{ margin: 0; }} figure svg {{ width: 100%; height: auto; }}
</style></head><body>
<p class="notice" id="notice-top">{e(RESEARCH_NOTICE)}</p>
<h1>Consortium plan: sites and cases per site</h1>
{summary}
<p>Targets: {e(targets) if targets else "none given"}. A target is met only when the whole
95% Monte Carlo interval meets it.</p>
<div class="figures">
{figures}
</div>
<h2>Every design</h2>
<p>Each value is the mean over replicates with its 95% Monte Carlo interval (Wilson for
power). "≥" marks a lower bound: some replicates raised no alarm within
{s.horizon_windows} windows. "n/a": not defined (a prediction interval needs 3 sites).</p>
<table><tr>{head}</tr>
{rows}
</table>
<h2>How these numbers were made</h2>
<ul>{notes}
<li>Seed {s.seed}; the design with k sites and n cases draws from
SeedSequence({s.seed}, spawn_key=(k, n)); rerunning with the same settings gives the same
numbers.</li></ul>
<p class="notice" id="notice-bottom">{e(RESEARCH_NOTICE)}</p>
</body></html>
"""


def _row(c: CellResult, recommended: tuple[int, int] | None) -> str:
    e = html.escape
    best = recommended == (c.sites, c.cases_per_site)
    cells = [str(c.sites), str(c.cases_per_site), str(c.sites * c.cases_per_site)]
    body = "".join(f"<td>{x}</td>" for x in cells)
    for name, _, _ in MEASURES:
        verdict = c.verdicts.get(name, "")
        body += f'<td class="{verdict}">{e(format_value(getattr(c, name)))}</td>'
    body += f"<td>{e(format_value(c.false_alarm))}</td>"
    meets = {None: "", True: "yes", False: "no"}[c.meets_targets]
    body += f'<td class="{meets}">{meets}</td>'
    return f'<tr class="best">{body}</tr>' if best else f"<tr>{body}</tr>"


def _figure(result: PlanResult, name: str, title: str, target_key: str | None) -> str:
    with plt.rc_context(STYLE):
        fig, ax = plt.subplots(figsize=(5.2, 3.4))
        cases = sorted(result.settings.cases_per_site)
        for index, k in enumerate(sorted(result.settings.site_counts)):
            points = [result.cell(k, n) for n in cases]
            values: list[McValue] = [getattr(p, name) for p in points]
            xs = [n for n, v in zip(cases, values, strict=True) if math.isfinite(v.estimate)]
            kept = [v for v in values if math.isfinite(v.estimate)]
            if not kept:
                continue
            ys = [v.estimate for v in kept]
            below = [v.estimate - v.lower for v in kept]
            above = [(v.upper - v.estimate) if math.isfinite(v.upper) else 0.0 for v in kept]
            ax.errorbar(
                xs, ys, yerr=[below, above], marker="o", ms=3, capsize=2,
                color=colour(index), label=f"{k} sites",
            )  # fmt: skip
            bounded = [(x, v.estimate) for x, v in zip(xs, kept, strict=True) if v.bound != "exact"]
            if bounded:
                bx, by = zip(*bounded, strict=True)
                ax.plot(bx, by, linestyle="none", marker="^", ms=7, color=colour(index))
        target = result.targets.model_dump().get(target_key) if target_key else None
        if target:
            ax.axhline(target, linestyle="--", color="#555", linewidth=1, label="target")
        ax.set_xscale("log")
        ax.set_xticks(cases, [str(n) for n in cases])
        ax.minorticks_off()
        ax.set_xlabel("cases per site")
        ax.set_title(title)
        if name == "detection_delay":
            ax.set_ylabel("windows (▲: lower bound)")
        ax.legend(fontsize=7, frameon=False)
        return svg(fig)


def _cell(value: float) -> str:
    return f"{value:.6g}" if math.isfinite(value) else ""
