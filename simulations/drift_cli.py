"""``sitepool rehearse-drift``: rehearse drift monitoring on invented hospitals that drift.

The command runs the monitoring rehearsal (:func:`simulations.drift_rehearsal.rehearse_drift`:
every window through the coordinator and site agents, in two passes as labels mature) into
``OUT/monitoring.sqlite``, then reports through the coordinator's own monitoring code
(:mod:`coordinator.monitoring.cli`), so its ``drift-report.html``, ``drift.json`` and CSVs
are what ``sitepool monitor --store OUT/monitoring.sqlite --study ID`` writes, with lines
on the injected changes and the passes in the report's header. With ``--webhook URL`` each
alarm's onset is posted as JSON; a failed delivery is logged and the command goes on.

With ``--images`` the monitored model is the image rehearsal's CNN instead
(:func:`simulations.image_monitoring.monitor_images`): invented phantom images at the image
rehearsal's hospitals, one of which changes scanner partway through the year; the same
analysis and the same report files follow.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Annotated

import typer

from coordinator.monitoring.cli import (
    LOG_FILE,
    fail,
    monitoring_log,
    print_drift_summary,
    progress_console,
    report_drift,
)
from site_agent.exceptions import SitepoolError
from site_agent.notices import RESEARCH_NOTICE

if TYPE_CHECKING:
    from simulations.drift_rehearsal import MonitoredStudy

REHEARSE_DRIFT_HELP = (
    "Rehearse drift monitoring on invented hospitals that change scanner or case mix over "
    "monthly windows, then analyse the windows as `sitepool monitor` does and write "
    "drift-report.html, drift.json and CSVs."
)
IMAGE_NOTE = (
    "Rehearsal on invented hospitals holding invented phantom images (procedurally drawn "
    "lesions, simulated scanners); no result here describes a real hospital or patient."
)
SYNTHETIC_NOTE = (
    "Rehearsal on invented hospitals (synthetic partitions of the Wisconsin Diagnostic "
    "Breast Cancer data); no result here describes a real hospital."
)


def add_rehearse_drift_command(app: typer.Typer, name: str = "rehearse-drift") -> None:
    """Register ``rehearse-drift`` on ``app``; the research notice is the help page's epilog."""
    app.command(name, help=REHEARSE_DRIFT_HELP, epilog=RESEARCH_NOTICE)(rehearse_drift_command)


def rehearse_drift_command(
    out: Annotated[Path, typer.Option("--out", help="Directory for the store and report.")],
    scenario: Annotated[
        Path | None,
        typer.Option("--scenario", help="Scenario file; default: the drift scenario."),
    ] = None,
    seed: Annotated[int | None, typer.Option("--seed", help="Override the scenario seed.")] = None,
    engine: Annotated[
        str, typer.Option("--engine", help="inprocess (default) or loopback.")
    ] = "inprocess",
    baseline_windows: Annotated[
        int | None,
        typer.Option(
            "--baseline-windows",
            min=1,
            help="Windows that form the baseline; default: the rehearsal's half year.",
        ),
    ] = None,
    webhook: Annotated[
        str | None, typer.Option("--webhook", help="URL to post each alarm's onset to.")
    ] = None,
    images: Annotated[
        bool,
        typer.Option(
            "--images",
            help=(
                "Monitor the image rehearsal's CNN on invented phantom images instead of the "
                "feature table; one site changes scanner partway through the year."
            ),
        ),
    ] = False,
) -> None:
    """Run the drift rehearsal, analyse its windows and write the drift report."""
    from coordinator.monitoring.alerts import WebhookAlerter
    from coordinator.monitoring.analysis import DriftSettings
    from simulations.drift_rehearsal import (
        DEFAULT_BASELINE_WINDOWS,
        drift_scenario,
        rehearse_drift,
    )
    from simulations.scenario import Scenario

    started = time.perf_counter()
    console, progress = progress_console(started)
    if engine not in ("inprocess", "loopback"):
        fail(f"unknown engine {engine!r}: use inprocess or loopback")
    if images and scenario is not None:
        fail("--scenario is for the feature-table rehearsal; --images uses its own sites")
    if images:
        from simulations.image_monitoring import DEFAULT_BASELINE_WINDOWS as IMAGE_BASELINE

        default_baseline = IMAGE_BASELINE
    else:
        default_baseline = DEFAULT_BASELINE_WINDOWS
    baseline = default_baseline if baseline_windows is None else baseline_windows
    out.mkdir(parents=True, exist_ok=True)
    with monitoring_log(out / LOG_FILE, progress):
        try:
            alerter = WebhookAlerter(webhook) if webhook else None
            if images:
                study_id, store_path, context = _image_monitoring(
                    out, seed, engine, baseline, progress
                )
                findings, files = report_drift(
                    store_path,
                    study_id,
                    out,
                    settings=DriftSettings(baseline_windows=baseline),
                    alerter=alerter,
                    context=context,
                    progress=progress,
                )
                print_drift_summary(console, findings, files, started)
                return
            chosen = Scenario.load(scenario) if scenario is not None else drift_scenario()
            if seed is not None:
                chosen = chosen.model_copy(update={"seed": seed})
            study = rehearse_drift(
                chosen,
                out,
                engine=engine,  # type: ignore[arg-type]
                baseline_windows=baseline,
                progress=progress,
            )
            findings, files = report_drift(
                study.store_path,
                study.protocol.study_id,
                out,
                settings=DriftSettings(baseline_windows=baseline),
                alerter=alerter,
                context=rehearsal_context(study),
                progress=progress,
            )
        except SitepoolError as exc:
            fail(str(exc))
    print_drift_summary(console, findings, files, started)


def _image_monitoring(
    out: Path, seed: int | None, engine: str, baseline: int, progress: Callable[[str], None]
) -> tuple[str, Path, list[str]]:
    """Run the image monitoring rehearsal; return its study id, store and report context."""
    from simulations.image_monitoring import monitor_images
    from simulations.image_rehearsal import default_image_scenario

    scenario = default_image_scenario()
    if seed is not None:
        scenario = scenario.model_copy(update={"seed": seed})
    result = monitor_images(
        out,
        scenario=scenario,
        engine=engine,  # type: ignore[arg-type]
        baseline_windows=baseline,
        progress=progress,
    )
    plan = result.protocol.monitoring
    assert plan is not None  # monitor_images registers a monitoring protocol
    context = [
        IMAGE_NOTE,
        f"Injected: {result.drifting_site} changes scanner from window "
        f"{result.drift_window}: {result.drift_description}.",
        f"Windows of {plan.window_months} months from {plan.first_window_start}; "
        f"the first {baseline} form each site's baseline.",
    ]
    return result.protocol.study_id, result.store_path, context


def rehearsal_context(study: MonitoredStudy) -> list[str]:
    """Return the report's header lines: synthetic data, injected changes, the passes."""
    context = [
        SYNTHETIC_NOTE,
        *(
            f"Injected: {e.site} from window {e.window_number}: {e.description}."
            for e in study.events
        ),
    ]
    for number, done in enumerate(study.passes, start=1):
        pending = sum(len(w.awaiting_labels) for w in done.outcome.windows)
        context.append(
            f"Monitoring pass {number} as of {done.as_of}: "
            f"{done.outcome.revised_windows()} site window(s) updated as labels matured, "
            f"{pending} still awaiting labels; mean label completeness "
            f"{100 * done.mean_completeness():.1f}%."
        )
    return context
