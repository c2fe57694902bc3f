"""The ``sitepool`` command: one entry point over the three packages.

The root command lives at the top of the import graph (``simulations``), so it can
reach the site commands, the coordinator commands and the rehearsal alike.
"""

from __future__ import annotations

import logging
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import TYPE_CHECKING, Annotated

import typer
from rich.console import Console

from coordinator.cli import add_meta_command
from coordinator.deployment.cli import coordinator_app
from coordinator.monitoring.cli import add_monitor_command
from coordinator.pool_files_cli import add_pool_files_command
from simulations.drift_cli import add_rehearse_drift_command
from simulations.planning_cli import add_plan_command
from site_agent.cli import site_app
from site_agent.exceptions import SitepoolError
from site_agent.notices import RESEARCH_NOTICE

if TYPE_CHECKING:
    from simulations.rehearsal import RehearsalOutput

app = typer.Typer(
    name="sitepool",
    help=(
        "Validate a diagnostic imaging model at several hospitals without moving any "
        f"patient data. {RESEARCH_NOTICE}"
    ),
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)
app.add_typer(site_app)
app.add_typer(coordinator_app)
add_meta_command(app)
add_monitor_command(app)
add_rehearse_drift_command(app)
add_plan_command(app)
add_pool_files_command(app)


@app.command(
    "rehearse",
    help=(
        "Rehearse a multi-site study on synthetic hospitals drawn from a public dataset: "
        "develop a model at one site, evaluate it at every site through the same "
        "coordinator and site-agent code a deployment uses, and write results.json, "
        "sites.csv and report.html."
    ),
    epilog=RESEARCH_NOTICE,
)
def rehearse_command(
    out: Annotated[Path, typer.Option("--out", help="Directory for results and report.")],
    scenario: Annotated[
        Path | None,
        typer.Option("--scenario", help="Scenario file (TOML, YAML or JSON); default built in."),
    ] = None,
    sites: Annotated[
        int | None, typer.Option("--sites", min=2, help="Scale the scenario to N sites.")
    ] = None,
    seed: Annotated[int | None, typer.Option("--seed", help="Override the scenario seed.")] = None,
    engine: Annotated[
        str, typer.Option("--engine", help="inprocess (default) or loopback.")
    ] = "inprocess",
    architecture: Annotated[
        str, typer.Option("--model", help="Model architecture: logistic or mlp.")
    ] = "logistic",
    data: Annotated[
        Path | None,
        typer.Option(
            "--data",
            help=(
                "Your own public feature table (CSV or Parquet: feature_* columns and a 0/1 "
                "label) instead of the built-in Wisconsin breast cancer data."
            ),
        ),
    ] = None,
    label_column: Annotated[
        str, typer.Option("--label-column", help="Label column of --data (1 = disease).")
    ] = "label",
    adapt: Annotated[
        bool,
        typer.Option(
            "--adapt/--no-adapt",
            help=(
                "Fine-tune at each site on 0, 10, 25, 50, 100 and all local cases, run "
                "federated fine-tuning, and draw the four reference lines (on by default; "
                "--no-adapt evaluates only)."
            ),
        ),
    ] = True,
    images: Annotated[
        bool,
        typer.Option(
            "--images",
            help=(
                "Rehearse on invented phantom images instead of the feature table: sites keep "
                "DICOM, PNG or NumPy images with a manifest, a small CNN is trained at the "
                "development site, and the same study and report follow (--scenario, --sites, "
                "--model and --data do not apply)."
            ),
        ),
    ] = False,
    score_bins: Annotated[
        str,
        typer.Option(
            "--score-bins",
            help=(
                "Score bins fixed in the protocol: logit (equal steps of log-odds, default) "
                "or development-quantiles (quantiles of the development site's training "
                "scores)."
            ),
        ),
    ] = "logit",
) -> None:
    """Run a rehearsal and say where its report is."""
    from simulations.rehearsal import rehearse
    from simulations.scenario import Scenario, default_scenario

    console = Console(stderr=True)
    started = time.perf_counter()

    def progress(line: str) -> None:
        console.print(f"[dim]{time.perf_counter() - started:6.1f}s[/dim] {line}")

    if engine not in ("inprocess", "loopback"):
        _fail(f"unknown engine {engine!r}: use inprocess or loopback")
    if architecture not in ("logistic", "mlp"):
        _fail(f"unknown model {architecture!r}: use logistic or mlp")
    if score_bins not in ("logit", "development-quantiles"):
        _fail(f"unknown score bins {score_bins!r}: use logit or development-quantiles")
    out.mkdir(parents=True, exist_ok=True)
    log_path = out / "rehearsal.log"
    logging.basicConfig(
        filename=log_path,
        level=logging.INFO,
        format="%(asctime)s %(name)s %(levelname)s %(message)s",
        force=True,
    )
    progress(f"site and coordinator logs go to {log_path}")
    try:
        chosen = Scenario.load(scenario) if scenario is not None else default_scenario()
        if sites is not None:
            chosen = chosen.with_sites(sites)
        if seed is not None:
            chosen = chosen.model_copy(update={"seed": seed})
        if images:
            from simulations.image_rehearsal import default_image_scenario, rehearse_images

            image_scenario = default_image_scenario()
            if seed is not None:
                image_scenario = image_scenario.model_copy(update={"seed": seed})
            with _flower_console_silenced():
                output = rehearse_images(
                    out,
                    scenario=image_scenario,
                    engine=engine,  # type: ignore[arg-type]
                    adapt=adapt,
                    progress=progress,
                )
            _done(console, output)
            return
        dataset = None
        if data is not None:
            from simulations.dataset import load_feature_table

            dataset = load_feature_table(data, label_column)
        with _flower_console_silenced():
            output = rehearse(
                chosen,
                out,
                engine=engine,  # type: ignore[arg-type]
                architecture=architecture,
                dataset=dataset,
                progress=progress,
                adapt=adapt,
                score_bins=score_bins,  # type: ignore[arg-type]
            )
    except SitepoolError as exc:
        _fail(str(exc))
    _done(console, output)


def _done(console: Console, output: RehearsalOutput) -> None:
    for finding in output.results.findings:
        console.print(f"  {finding}")
    console.print(f"results: {output.results_path}")
    console.print(f"report:  [bold]{output.report_path}[/bold]  (open it in a browser)")
    console.print(f"done in {output.seconds:.1f} s. {RESEARCH_NOTICE}")


@contextmanager
def _flower_console_silenced() -> Iterator[None]:
    """Send Flower's log to the log file only: detach its console handler for a while.

    Flower's ``flwr`` logger writes to the terminal through its own handler as well as
    propagating to the root logger (the log file); the terminal keeps the progress lines.
    """
    flower = logging.getLogger("flwr")
    console = [
        h
        for h in flower.handlers
        if isinstance(h, logging.StreamHandler) and not isinstance(h, logging.FileHandler)
    ]
    for handler in console:
        flower.removeHandler(handler)
    try:
        yield
    finally:
        for handler in console:
            flower.addHandler(handler)


def _fail(message: str) -> None:
    print(f"error: {message}", file=sys.stderr)
    raise typer.Exit(2)


def main() -> None:
    """Run the ``sitepool`` command line."""
    app()
