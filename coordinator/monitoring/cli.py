"""``sitepool monitor``: analyse the monitoring windows in a results store, write a drift report.

The command reads one study's windows from a SQLite results store (``--store FILE --study
ID``), analyses them site by site (:func:`coordinator.monitoring.analysis.analyse_windows`)
and writes ``drift-report.html``, ``drift.json`` and two CSVs
(:func:`coordinator.report.drift_report.write_drift_report`). With ``--webhook URL`` each
alarm's onset is posted as JSON; a failed delivery is logged and monitoring goes on.
Invalid input prints one line ``error: ...`` on stderr and exits with code 2.

Heavy modules (the statistics, the report's plotting) are imported when a command runs, so
that ``sitepool --help`` stays quick. The pieces are public so that the simulator's drift
rehearsal (``sitepool rehearse-drift``) fills a store and then reports through the very
same code: :func:`monitoring_log`, :func:`report_drift` and :func:`print_drift_summary`.
"""

from __future__ import annotations

import logging
import sys
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, NoReturn

import typer
from rich.console import Console

from site_agent.exceptions import SitepoolError
from site_agent.notices import RESEARCH_NOTICE

if TYPE_CHECKING:
    from coordinator.monitoring.alerts import WebhookAlerter
    from coordinator.monitoring.analysis import DriftFindings, DriftSettings
    from coordinator.report.drift_report import DriftReportFiles

EXIT_INPUT_ERROR = 2
LOG_FILE = "monitor.log"
ROUNDS_LOGGER = "coordinator.monitoring.rounds"
"""The logger whose INFO lines are echoed as progress while windows are fetched."""
DEFAULT_MONITOR_BASELINE = 6
"""Default of ``--baseline-windows``: half a year of monthly windows."""
MONITOR_HELP = (
    "Watch each site for drift over the monitoring windows kept in a results store: "
    "label-free score and case-mix drift, and CUSUM/EWMA charts on sensitivity, specificity "
    "and AUC as labels mature. Writes drift-report.html, drift.json and CSVs."
)

Progress = Callable[[str], None]


def add_monitor_command(app: typer.Typer, name: str = "monitor") -> None:
    """Register ``monitor`` on ``app``; the research notice is the help page's epilog."""
    app.command(name, help=MONITOR_HELP, epilog=RESEARCH_NOTICE)(monitor_command)


def monitor_command(
    out: Annotated[Path, typer.Option("--out", help="Directory for the drift report.")],
    store: Annotated[
        Path, typer.Option("--store", help="SQLite results store to read windows from.")
    ],
    study: Annotated[str, typer.Option("--study", help="Study id in the store.")],
    baseline_windows: Annotated[
        int, typer.Option("--baseline-windows", min=1, help="Windows that form the baseline.")
    ] = DEFAULT_MONITOR_BASELINE,
    webhook: Annotated[
        str | None, typer.Option("--webhook", help="URL to post each alarm's onset to.")
    ] = None,
) -> None:
    """Analyse the stored monitoring windows and write the drift report."""
    from coordinator.monitoring.alerts import WebhookAlerter
    from coordinator.monitoring.analysis import DriftSettings

    started = time.perf_counter()
    console, progress = progress_console(started)
    if not store.exists():
        fail(f"results store {store} does not exist")
    out.mkdir(parents=True, exist_ok=True)
    with monitoring_log(out / LOG_FILE, progress):
        try:
            alerter = WebhookAlerter(webhook) if webhook else None
            findings, files = report_drift(
                store,
                study,
                out,
                settings=DriftSettings(baseline_windows=baseline_windows),
                alerter=alerter,
                progress=progress,
            )
        except SitepoolError as exc:
            fail(str(exc))
    print_drift_summary(console, findings, files, started)


def progress_console(started: float) -> tuple[Console, Progress]:
    """Return a console on stderr and a progress printer that shows the elapsed seconds."""
    console = Console(stderr=True)

    def progress(line: str) -> None:
        console.print(f"[dim]{time.perf_counter() - started:6.1f}s[/dim] {line}")

    return console, progress


@contextmanager
def monitoring_log(path: Path, progress: Progress) -> Iterator[None]:
    """Send every log line to ``path`` and echo the monitoring rounds' INFO lines as progress."""
    logging.basicConfig(
        filename=path,
        level=logging.INFO,
        format="%(asctime)s %(name)s %(levelname)s %(message)s",
        force=True,
    )
    handler = _ProgressHandler(progress)
    logging.getLogger(ROUNDS_LOGGER).addHandler(handler)
    progress(f"site and coordinator logs go to {path}")
    try:
        yield
    finally:
        logging.getLogger(ROUNDS_LOGGER).removeHandler(handler)


def report_drift(
    store: Path,
    study: str,
    out: Path,
    *,
    settings: DriftSettings,
    alerter: WebhookAlerter | None = None,
    context: Sequence[str] = (),
    progress: Progress,
) -> tuple[DriftFindings, DriftReportFiles]:
    """Analyse the study's stored windows, write the drift report and post the alerts.

    ``context`` lines go into the report's header (what produced the store). The alerter,
    if any, is closed afterwards.

    Raises
    ------
    InputError
        If the store holds too few windows for the baseline, or an invalid release.
    """
    from coordinator.monitoring.alerts import alarm_alerts
    from coordinator.monitoring.analysis import analyse_windows
    from coordinator.monitoring.results_store import SqliteResultsStore
    from coordinator.report.drift_report import write_drift_report

    with SqliteResultsStore(store) as opened:
        records = opened.windows(study)
    progress(f"analysing {len(records)} stored windows of study {study}")
    findings = analyse_windows(study, records, settings)
    files = write_drift_report(findings, out, context=context)
    if alerter is not None:
        with alerter:
            alerts = alarm_alerts(findings)
            delivered = sum(alerter.send(a).delivered for a in alerts)
        progress(f"webhook: {delivered} of {len(alerts)} alerts delivered")
    return findings, files


def print_drift_summary(
    console: Console, findings: DriftFindings, files: DriftReportFiles, started: float
) -> None:
    """Print each alarm's onset, where the report and data are, and the research notice."""
    for (site, metric), alarm in sorted(findings.first_alarms().items()):
        console.print(f"  alarm: {site}, {metric.replace('_', ' ')}, from window "
                      f"{alarm.window_number} ({alarm.window_start})")  # fmt: skip
    console.print(f"report: [bold]{files.report}[/bold]  (open it in a browser)")
    console.print(f"data:   {files.json}, {files.windows_csv}, {files.alarms_csv}")
    console.print(f"done in {time.perf_counter() - started:.1f} s. {RESEARCH_NOTICE}")


def fail(message: str) -> NoReturn:
    """Print ``error: message`` on stderr and exit with code 2."""
    print(f"error: {message}", file=sys.stderr)
    raise typer.Exit(EXIT_INPUT_ERROR)


class _ProgressHandler(logging.Handler):
    """Echo the monitoring rounds' INFO lines as progress lines."""

    def __init__(self, progress: Progress) -> None:
        super().__init__(level=logging.INFO)
        self._progress = progress

    def emit(self, record: logging.LogRecord) -> None:
        self._progress(record.getMessage())
