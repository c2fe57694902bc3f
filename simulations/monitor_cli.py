"""The ``sitepool monitor`` command: analyse stored monitoring windows and write a drift report.

Either from an existing results store (``--store FILE --study ID``) or from a monitoring
rehearsal on invented hospitals that drift (``--rehearse``), which first runs every
window through the coordinator and site agents. With ``--webhook URL`` each alarm's onset
is posted as JSON; a failed delivery is logged and monitoring goes on.
"""

from __future__ import annotations

import logging
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Annotated

import typer
from rich.console import Console

from site_agent.exceptions import SitepoolError
from site_agent.notices import RESEARCH_NOTICE

HELP = (
    "Watch each site for drift over time windows: label-free score and case-mix drift, and "
    "CUSUM/EWMA charts on sensitivity, specificity and AUC as labels mature. Reads windows "
    "from a results store (--store, --study) or rehearses on drifting invented hospitals "
    f"(--rehearse), then writes drift-report.html, drift.json and CSVs. {RESEARCH_NOTICE}"
)


def add_monitor_command(app: typer.Typer) -> None:
    """Register ``monitor`` on the root ``sitepool`` command."""
    app.command("monitor", help=HELP)(monitor_command)


def monitor_command(
    out: Annotated[Path, typer.Option("--out", help="Directory for the drift report.")],
    store: Annotated[
        Path | None, typer.Option("--store", help="SQLite results store to read windows from.")
    ] = None,
    study: Annotated[str | None, typer.Option("--study", help="Study id in the store.")] = None,
    rehearse: Annotated[
        bool, typer.Option("--rehearse", help="Run a monitoring rehearsal first.")
    ] = False,
    scenario: Annotated[
        Path | None,
        typer.Option("--scenario", help="Rehearsal scenario file; default: the drift scenario."),
    ] = None,
    seed: Annotated[int | None, typer.Option("--seed", help="Override the scenario seed.")] = None,
    engine: Annotated[
        str, typer.Option("--engine", help="Rehearsal engine: inprocess or loopback.")
    ] = "inprocess",
    baseline_windows: Annotated[
        int, typer.Option("--baseline-windows", min=1, help="Windows that form the baseline.")
    ] = 6,
    webhook: Annotated[
        str | None, typer.Option("--webhook", help="URL to post each alarm's onset to.")
    ] = None,
) -> None:
    """Run or read the monitoring windows, analyse them and write the drift report."""
    from coordinator.monitoring.alerts import WebhookAlerter
    from coordinator.monitoring.analysis import DriftSettings, alarm_alerts, analyse_windows
    from coordinator.monitoring.results_store import SqliteResultsStore
    from coordinator.report.drift_report import write_drift_report

    console = Console(stderr=True)
    started = time.perf_counter()

    def progress(line: str) -> None:
        console.print(f"[dim]{time.perf_counter() - started:6.1f}s[/dim] {line}")

    if rehearse == (store is not None):
        _fail("give either --rehearse or --store (with --study)")
    if store is not None and not study:
        _fail("--store needs --study")
    if engine not in ("inprocess", "loopback"):
        _fail(f"unknown engine {engine!r}: use inprocess or loopback")
    out.mkdir(parents=True, exist_ok=True)
    handler = _log_to(out / "monitor.log", progress)
    context: list[str] = []
    try:
        alerter = WebhookAlerter(webhook) if webhook else None
        if rehearse:
            store, study, context = _rehearse(out, scenario, seed, engine, baseline_windows,
                                              progress)  # fmt: skip
        assert store is not None and study is not None
        if not store.exists():
            _fail(f"results store {store} does not exist")
        with SqliteResultsStore(store) as opened:
            records = opened.windows(study)
        progress(f"analysing {len(records)} stored windows of study {study}")
        findings = analyse_windows(study, records, DriftSettings(baseline_windows=baseline_windows))
        files = write_drift_report(findings, out, context=context)
        if alerter is not None:
            with alerter:
                alerts = alarm_alerts(findings)
                delivered = sum(alerter.send(a).delivered for a in alerts)
            progress(f"webhook: {delivered} of {len(alerts)} alerts delivered")
    except SitepoolError as exc:
        _fail(str(exc))
    finally:
        logging.getLogger("coordinator.monitoring.rounds").removeHandler(handler)
    for (site, metric), alarm in sorted(findings.first_alarms().items()):
        console.print(f"  alarm: {site}, {metric.replace('_', ' ')}, from window "
                      f"{alarm.window_number} ({alarm.window_start})")  # fmt: skip
    console.print(f"report: [bold]{files.report}[/bold]  (open it in a browser)")
    console.print(f"data:   {files.json}, {files.windows_csv}, {files.alarms_csv}")
    console.print(f"done in {time.perf_counter() - started:.1f} s. {RESEARCH_NOTICE}")


def _rehearse(
    out: Path,
    scenario_path: Path | None,
    seed: int | None,
    engine: str,
    baseline_windows: int,
    progress: Callable[[str], None],
) -> tuple[Path, str, list[str]]:
    from simulations.drift_rehearsal import drift_scenario, rehearse_drift
    from simulations.scenario import Scenario

    chosen = Scenario.load(scenario_path) if scenario_path is not None else drift_scenario()
    if seed is not None:
        chosen = chosen.model_copy(update={"seed": seed})
    study = rehearse_drift(
        chosen,
        out,
        engine=engine,  # type: ignore[arg-type]
        baseline_windows=baseline_windows,
        progress=progress,
    )
    context = [
        "Rehearsal on invented hospitals (synthetic partitions of the Wisconsin Diagnostic "
        "Breast Cancer data); no result here describes a real hospital.",
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
    return study.store_path, study.protocol.study_id, context


def _log_to(path: Path, progress: Callable[[str], None]) -> logging.Handler:
    logging.basicConfig(
        filename=path,
        level=logging.INFO,
        format="%(asctime)s %(name)s %(levelname)s %(message)s",
        force=True,
    )
    handler = _ProgressHandler(progress)
    logging.getLogger("coordinator.monitoring.rounds").addHandler(handler)
    progress(f"site and coordinator logs go to {path}")
    return handler


class _ProgressHandler(logging.Handler):
    """Echo the monitoring rounds' INFO lines as progress lines."""

    def __init__(self, progress: Callable[[str], None]) -> None:
        super().__init__(level=logging.INFO)
        self._progress = progress

    def emit(self, record: logging.LogRecord) -> None:
        self._progress(record.getMessage())


def _fail(message: str) -> None:
    print(f"error: {message}", file=sys.stderr)
    raise typer.Exit(2)
