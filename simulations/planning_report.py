"""What a planning grid says, as a terminal table, CSV, JSON and a small HTML page.

The page opens with the research-tool caution and the verdict (the cheapest design
meeting every target, highlighted in the table), then the targets in words and the
settings; one figure per measure (pooled interval width, prediction interval width,
power, detection delay) against cases per site, one line per number of sites, with the
Monte Carlo interval as error bars and the target as a dashed line; then the table of
every design, each value coloured by its verdict against its target (met, missed, or
undecided when the Monte Carlo interval straddles it), and the caution again at the
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
TARGET_WORDS: dict[str, str] = {
    "max_ci_width": "pooled AUC interval at most {v:g} wide",
    "max_prediction_width": "prediction interval at most {v:g} wide",
    "min_power": "power to flag the drop at least {v:g}",
    "max_delay": "drift alarm within {v:g} windows",
}
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


def summary_lines(result: PlanResult) -> tuple[str, str]:
    """Return the settings in one line and the verdict: which design meets the targets."""
    s = result.settings
    settings = (
        f"{len(result.cells)} designs x {s.replicates} replicates, seed {s.seed}; "
        f"AUC {s.auc:g}, prevalence {s.prevalence:g}, between-site SD of the logit AUC "
        f"(tau) {s.tau:.3g} ({s.tau_source}), AUC drop to flag {s.drop:g}, "
        f"{s.window_cases} cases per monitoring window."
    )
    asked = [name for name, value in result.targets.model_dump().items() if value is not None]
    if not asked:
        verdict = "No targets given: the table shows each design; none is recommended."
    elif result.recommended is None:
        verdict = (
            "No design in the grid meets every target with its whole Monte Carlo interval; "
            "widen the grid or relax a target."
        )
    else:
        k, n = result.recommended
        verdict = (
            f"Cheapest design meeting every target: {k} sites x {n} cases per site "
            f"({k * n} cases in all)."
        )
    return settings, verdict


def targets_in_words(result: PlanResult) -> str:
    """Return the targets asked for, in words (``"none given"`` when there are none)."""
    asked = [
        TARGET_WORDS[name].format(v=value)
        for name, value in result.targets.model_dump().items()
        if value is not None
    ]
    return "; ".join(asked) if asked else "none given"


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
    notes = "".join(f"<li>{e(n)}</li>" for n in result.notes)
    settings_line, verdict = summary_lines(result)
    highlighted = (
        " It is the highlighted row of the table." if result.recommended is not None else ""
    )
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<title>sitepool consortium plan</title>
<style>
body {{ font-family: sans-serif; margin: 1.5em auto; max-width: 1100px; color: #222; }}
.notice {{ border: 2px solid #b00; background: #fff4f4; padding: .6em 1em; font-weight: bold; }}
.verdict {{ font-size: 115%; font-weight: bold; }}
table {{ border-collapse: collapse; margin: .6em 0; font-size: 85%; }}
th, td {{ border: 1px solid #ccc; padding: .25em .5em; text-align: center; }}
tr.best td {{ background: #e3f1e0; font-weight: bold; }}
td.yes, span.yes {{ color: #1a6b1a; }} td.no, span.no {{ color: #a00; }}
td.uncertain, span.uncertain {{ color: #8a5a00; font-style: italic; }}
.figures {{ display: grid; grid-template-columns: 1fr 1fr; gap: 1em; }}
figure {{ margin: 0; }} figure svg {{ width: 100%; height: auto; }}
</style></head><body>
<p class="notice" id="notice-top">{e(RESEARCH_NOTICE)}</p>
<h1>Consortium plan: sites and cases per site</h1>
<p class="verdict" id="verdict">{e(verdict)}{highlighted}</p>
<p>Targets: {e(targets_in_words(result))}. A target is met only when the whole 95% Monte
Carlo interval meets it; the dashed line in a figure is its target.</p>
<p>{e(settings_line)}</p>
<div class="figures">
{figures}
</div>
<h2>Every design</h2>
<p>Each value is the mean over replicates with its 95% Monte Carlo interval (Wilson for
power). "≥" marks a lower bound: some replicates raised no alarm within
{s.horizon_windows} windows. "n/a": not defined (a prediction interval needs 3 sites).
Against a target, a value is <span class="yes">green</span> when its whole Monte Carlo
interval meets the target, <span class="no">red</span> when the whole interval misses it,
and <span class="uncertain">amber</span> when the interval straddles the target (more
replicates would be needed to say); "meets targets" is yes only when every target is
green.</p>
<table id="designs"><tr>{head}</tr>
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
