"""The ``sitepool plan`` commands: how many sites and cases a study needs.

``sitepool plan grid`` simulates a grid of sites x cases per site
(:mod:`simulations.planning`) and writes plan.json, plan.csv and plan.html;
``sitepool plan sizes`` prints the analytic sample sizes of :mod:`coordinator.planning`
for one cohort (Hanley & McNeil, Obuchowski, Buderer, Riley et al.).
"""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path
from typing import Annotated

import typer
from pydantic import ValidationError
from rich.console import Console
from rich.table import Table

from site_agent.exceptions import SitepoolError
from site_agent.notices import RESEARCH_NOTICE

HELP = (
    "Plan a consortium before recruiting: how many sites and cases per site give a useful answer."
)
plan_app = typer.Typer(name="plan", help=HELP, epilog=RESEARCH_NOTICE, no_args_is_help=True)


def add_plan_command(app: typer.Typer) -> None:
    """Register ``plan`` on the root ``sitepool`` command."""
    app.add_typer(plan_app)


def _integers(text: str, option: str) -> tuple[int, ...]:
    try:
        return tuple(int(part) for part in text.split(",") if part.strip())
    except ValueError:
        _fail(f"{option} takes whole numbers separated by commas, got {text!r}")
        raise  # unreachable: _fail exits


@plan_app.command(
    "grid",
    help=(
        "Simulate a grid of sites x cases per site and report, per design, the width of "
        "the pooled AUC interval and of the prediction interval, the power to flag an AUC "
        "drop at a new site and the drift monitor's detection delay, each with its Monte "
        "Carlo interval; say which design meets the targets; write plan.json, plan.csv "
        "and plan.html."
    ),
    epilog=RESEARCH_NOTICE,
)
def grid_command(
    out: Annotated[Path, typer.Option("--out", help="Directory for plan.json/csv/html.")],
    sites: Annotated[str, typer.Option("--sites", help="Site counts, comma-separated.")] = (
        "3,5,8,12,20"
    ),
    cases: Annotated[
        str, typer.Option("--cases", help="Cases per site, comma-separated.")
    ] = "50,100,200,400,800",
    replicates: Annotated[int, typer.Option("--replicates", min=10)] = 200,
    auc: Annotated[
        float | None, typer.Option("--auc", help="Anticipated mean AUC (default 0.8).")
    ] = None,
    prevalence: Annotated[
        float | None, typer.Option("--prevalence", help="Diseased share (default 0.3).")
    ] = None,
    tau: Annotated[
        float | None,
        typer.Option("--tau", help="Between-site SD of the logit AUC (default 0.2)."),
    ] = None,
    tau_from: Annotated[
        Path | None,
        typer.Option(
            "--tau-from",
            help="A previous study's results.json: take tau (and, unless given, AUC and "
            "prevalence) from it.",
        ),
    ] = None,
    drop: Annotated[float, typer.Option("--drop", help="AUC drop to detect.")] = 0.05,
    alpha: Annotated[float, typer.Option("--alpha", help="One-sided level of the flag.")] = 0.05,
    window_cases: Annotated[
        int, typer.Option("--window-cases", help="Cases per monitoring window.")
    ] = 100,
    horizon: Annotated[
        int, typer.Option("--horizon", help="Monitoring windows simulated after a drop.")
    ] = 24,
    seed: Annotated[int, typer.Option("--seed")] = 20261202,
    workers: Annotated[
        int, typer.Option("--workers", min=0, help="Processes; 0: CPU count, at most 2.")
    ] = 0,
    max_ci_width: Annotated[
        float | None, typer.Option("--max-ci-width", help="Target: pooled AUC interval width.")
    ] = None,
    max_pi_width: Annotated[
        float | None, typer.Option("--max-pi-width", help="Target: prediction interval width.")
    ] = None,
    min_power: Annotated[
        float | None, typer.Option("--min-power", help="Target: power to flag the drop.")
    ] = None,
    max_delay: Annotated[
        float | None, typer.Option("--max-delay", help="Target: windows until the alarm.")
    ] = None,
) -> None:
    """Run the planning grid and write its outputs."""
    from simulations.planning import PlanSettings, Targets, plan_grid, tau_from_results
    from simulations.planning_report import format_value, summary_lines, write_outputs

    console = Console(stderr=True)
    source = "given"
    if tau_from is not None:
        if tau is not None:
            _fail("give either --tau or --tau-from, not both")
        try:
            tau, previous_auc, previous_prevalence = tau_from_results(tau_from)
        except SitepoolError as exc:
            _fail(str(exc))
        source = f"REML estimate from {tau_from.name}"
        auc = previous_auc if auc is None else auc
        prevalence = previous_prevalence if prevalence is None else prevalence
        console.print(f"from {tau_from}: tau {tau:.3g}, AUC {auc:.3g}, prevalence {prevalence:.3g}")
    try:
        settings = PlanSettings(
            site_counts=_integers(sites, "--sites"),
            cases_per_site=_integers(cases, "--cases"),
            replicates=replicates,
            auc=0.80 if auc is None else auc,
            prevalence=0.30 if prevalence is None else prevalence,
            tau=0.2 if tau is None else tau,
            tau_source=source,
            drop=drop,
            alpha=alpha,
            window_cases=window_cases,
            horizon_windows=horizon,
            seed=seed,
        )
        targets = Targets(
            max_ci_width=max_ci_width,
            max_prediction_width=max_pi_width,
            min_power=min_power,
            max_delay=max_delay,
        )
    except ValidationError as exc:
        _fail("; ".join(str(err["msg"]) for err in exc.errors()))
    chosen = workers or min(2, os.cpu_count() or 1)
    started = time.perf_counter()

    def progress(line: str) -> None:
        console.print(f"[dim]{time.perf_counter() - started:6.1f}s[/dim] {line}")

    progress(
        f"{len(settings.site_counts) * len(settings.cases_per_site)} designs x "
        f"{settings.replicates} replicates on {chosen} process(es), seed {settings.seed}"
    )
    result = plan_grid(settings, targets, workers=chosen, progress=progress)
    table = Table(title="Consortium plan (mean and 95% Monte Carlo interval)")
    for column in ("sites", "cases/site", "pooled CI width", "PI width", "power", "delay"):
        table.add_column(column, justify="right")
    table.add_column("meets", justify="center")
    for c in result.cells:
        meets = {None: "", True: "yes", False: "no"}[c.meets_targets]
        table.add_row(
            str(c.sites),
            str(c.cases_per_site),
            format_value(c.pooled_ci_width),
            format_value(c.prediction_width),
            format_value(c.power),
            format_value(c.detection_delay),
            meets,
        )
    Console(width=150).print(table)
    for line in summary_lines(result):
        print(line)
    paths = write_outputs(result, out)
    print(f"json: {paths['json']}\ncsv:  {paths['csv']}\nhtml: {paths['html']}")
    print(f"done in {time.perf_counter() - started:.1f} s. {RESEARCH_NOTICE}")


@plan_app.command(
    "sizes",
    help=(
        "Analytic sample sizes for one cohort: AUC precision (Hanley & McNeil 1982; "
        "Obuchowski 1997 with several images per patient), sensitivity and specificity "
        "precision given prevalence (Buderer 1996), and the three external-validation "
        "criteria of Riley et al. (2021)."
    ),
    epilog=RESEARCH_NOTICE,
)
def sizes_command(
    auc: Annotated[float, typer.Option("--auc", help="Anticipated AUC (C-statistic).")] = 0.80,
    prevalence: Annotated[float, typer.Option("--prevalence")] = 0.30,
    auc_half_width: Annotated[float, typer.Option("--auc-half-width")] = 0.05,
    images_per_patient: Annotated[float, typer.Option("--images-per-patient")] = 1.0,
    image_correlation: Annotated[
        float, typer.Option("--image-correlation", help="Within-patient correlation r.")
    ] = 0.0,
    sensitivity: Annotated[float, typer.Option("--sensitivity")] = 0.85,
    specificity: Annotated[float, typer.Option("--specificity")] = 0.80,
    accuracy_half_width: Annotated[float, typer.Option("--accuracy-half-width")] = 0.05,
    oe_width: Annotated[float, typer.Option("--oe-width", help="O/E interval width.")] = 0.2,
    slope_width: Annotated[
        float, typer.Option("--slope-width", help="Calibration-slope interval width.")
    ] = 0.2,
    c_width: Annotated[float, typer.Option("--c-width", help="C-statistic interval width.")] = 0.1,
    lp_mean: Annotated[
        float | None,
        typer.Option(
            "--lp-mean",
            help="Mean of the model's linear predictor (log-odds) in the validation "
            "population, if published; with --lp-sd. Default: the normal linear predictor "
            "with the anticipated prevalence and AUC.",
        ),
    ] = None,
    lp_sd: Annotated[
        float | None, typer.Option("--lp-sd", help="SD of that linear predictor; with --lp-mean.")
    ] = None,
) -> None:
    """Print the analytic sample sizes."""
    from coordinator.planning.accuracy_precision import (
        cases_for_sensitivity,
        cases_for_specificity,
    )
    from coordinator.planning.auc_precision import cases_for_auc
    from coordinator.planning.external_validation import external_validation_size

    try:
        answers = [
            cases_for_auc(
                auc,
                prevalence,
                auc_half_width,
                observations_per_patient=images_per_patient,
                correlation=image_correlation,
            ),
            cases_for_sensitivity(sensitivity, prevalence, accuracy_half_width),
            cases_for_specificity(specificity, prevalence, accuracy_half_width),
        ]
        riley = external_validation_size(
            prevalence,
            auc,
            oe_ci_width=oe_width,
            slope_ci_width=slope_width,
            c_ci_width=c_width,
            lp_mean=lp_mean,
            lp_sd=lp_sd,
        )
    except SitepoolError as exc:
        _fail(str(exc))
    answers += list(riley.criteria)
    table = Table(title=f"Cases for one cohort at prevalence {prevalence:g}")
    for column in ("criterion", "cases", "diseased", "source"):
        table.add_column(column, justify="left" if column in ("criterion", "source") else "right")
    for a in answers:
        table.add_row(a.criterion, str(a.n_total), str(a.n_events), a.source)
    Console().print(table)
    for a in answers:
        for note in a.notes:
            print(f"  {a.source}: {note}")
    print(f"All three Riley et al. (2021) criteria together: {riley.n_total} cases.")
    print(
        "These are totals for one cohort. Across sites that differ, use `sitepool plan grid`: "
        "between-site heterogeneity widens the pooled and prediction intervals."
    )
    print(RESEARCH_NOTICE)


def _fail(message: str) -> None:
    print(f"error: {message}", file=sys.stderr)
    raise typer.Exit(2)
