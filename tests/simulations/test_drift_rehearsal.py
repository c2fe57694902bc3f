"""The monitoring rehearsal and ``sitepool monitor`` on its store, end to end (in-process engine).

Invented hospitals drawn from the public Wisconsin breast cancer data (scikit-learn), for
tests only. One rehearsal (seeded, two monitoring passes) is shared by the tests of this
module.
"""

from __future__ import annotations

import json
import threading
from collections.abc import Iterator
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import ClassVar

import pytest
from typer.testing import CliRunner

from coordinator.monitoring.analysis import DriftFindings, DriftSettings, analyse_windows
from coordinator.monitoring.results_store import SqliteResultsStore
from simulations.cli import app
from simulations.drift_rehearsal import MonitoredStudy, drift_scenario, rehearse_drift
from simulations.scenario import Scenario
from site_agent.disclosure.ledger import ReleaseLedger
from site_agent.notices import RESEARCH_NOTICE

SCANNER_SITE = "Kestrel Valley Hospital"
STABLE_SITES = ("Northgate General", "Riverside Clinic")
EVENT_WINDOW = 7
DETECTION_WINDOWS = 2
"""The scanner change must alarm within this many windows of its first month."""
LABEL_FREE = ("score_distribution", "scanner_vendor_mix")


def small_drift_scenario() -> Scenario:
    """Three of the packaged drift scenario's hospitals over 12 months; one changes scanner."""
    base = drift_scenario()
    sizes = {"Northgate General": 4000, "Riverside Clinic": 1500, SCANNER_SITE: 1500}
    sites = tuple(
        s.model_copy(update={"n_cases": sizes[s.name]}) for s in base.sites if s.name in sizes
    )
    events = tuple(e for e in base.drift_events if e.site == SCANNER_SITE)
    return base.model_copy(update={"months": 12, "sites": sites, "drift_events": events})


@pytest.fixture(scope="module")
def rehearsal(tmp_path_factory: pytest.TempPathFactory) -> tuple[MonitoredStudy, DriftFindings]:
    """Run the small rehearsal once and analyse its store."""
    out = tmp_path_factory.mktemp("drift-rehearsal")
    study = rehearse_drift(small_drift_scenario(), out, baseline_windows=6)
    with SqliteResultsStore(study.store_path) as store:
        records = store.windows(study.protocol.study_id)
    return study, analyse_windows(
        study.protocol.study_id, records, DriftSettings(baseline_windows=6)
    )


def test_scanner_change_alarms_at_its_site_within_two_windows(
    rehearsal: tuple[MonitoredStudy, DriftFindings],
) -> None:
    """The scanner change alarms by month 8 (vendor mix and the alarm summary as a whole).

    The score distribution alarms too, but may take longer: cells the site suppressed
    are bounded, not read as zeros, so a modest score shift needs more windows to show.
    """
    _, findings = rehearsal
    first = findings.first_alarms()
    at_site = [a.window_number for (site, _), a in first.items() if site == SCANNER_SITE]

    assert EVENT_WINDOW <= min(at_site) < EVENT_WINDOW + DETECTION_WINDOWS
    vendor = first[(SCANNER_SITE, "scanner_vendor_mix")]
    assert EVENT_WINDOW <= vendor.window_number < EVENT_WINDOW + DETECTION_WINDOWS
    assert first[(SCANNER_SITE, "score_distribution")].window_number >= EVENT_WINDOW


def test_stable_sites_raise_no_label_free_alarm(
    rehearsal: tuple[MonitoredStudy, DriftFindings],
) -> None:
    """Hospitals without an injected change stay quiet on score distribution and vendor mix."""
    _, findings = rehearsal

    noisy = [a for a in findings.alarms if a.site in STABLE_SITES and a.metric in LABEL_FREE]

    assert noisy == []


def test_second_pass_completes_the_months_the_first_left_pending(
    rehearsal: tuple[MonitoredStudy, DriftFindings],
) -> None:
    """Pass 1 has no label for the last two months; pass 2 has them all, updated in place."""
    study, findings = rehearsal
    first, second = study.passes

    for site in study.sites:
        assert first.label_completeness[site] == (1.0,) * 10 + (0.0, 0.0)
        assert second.label_completeness[site] == (1.0,) * 12
    assert second.mean_completeness() > first.mean_completeness()
    assert [w.skipped for w in second.outcome.windows] == [True] * 10 + [False] * 2
    assert [sorted(w.revised) for w in second.outcome.windows[10:]] == [sorted(study.sites)] * 2
    for site in findings.sites:
        assert [w.revisions for w in site.windows] == [0] * 10 + [1, 1]


def test_second_pass_asks_each_site_only_for_its_two_incomplete_windows(
    rehearsal: tuple[MonitoredStudy, DriftFindings],
) -> None:
    """Each site's release ledger holds twelve monitor requests from pass 1 and two more."""
    study, _ = rehearsal
    ledgers = sorted((study.store_path.parent / "site-data").glob("*/ledger.jsonl"))

    asked = [sum(e.operation == "monitor" for e in ReleaseLedger(p).entries()) for p in ledgers]

    assert asked == [12 + 2] * len(study.sites)


class _Receiver(BaseHTTPRequestHandler):
    bodies: ClassVar[list[bytes]] = []

    def do_POST(self) -> None:
        length = int(self.headers["content-length"])
        type(self).bodies.append(self.rfile.read(length))
        self.send_response(204)
        self.end_headers()

    def log_message(self, format: str, *args: object) -> None:
        """Keep the test output quiet."""


@pytest.fixture
def receiver() -> Iterator[tuple[str, list[bytes]]]:
    """Run a real HTTP receiver on 127.0.0.1 for the test; stop it afterwards."""
    _Receiver.bodies = []
    server = ThreadingHTTPServer(("127.0.0.1", 0), _Receiver)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{server.server_address[1]}/alerts", _Receiver.bodies
    finally:
        server.shutdown()
        server.server_close()
        thread.join()


def test_monitor_command_writes_the_report_and_posts_alarms(
    rehearsal: tuple[MonitoredStudy, DriftFindings],
    receiver: tuple[str, list[bytes]],
    tmp_path: Path,
) -> None:
    """`sitepool monitor --store` writes the drift report and posts each alarm's onset."""
    study, findings = rehearsal
    url, bodies = receiver

    result = CliRunner().invoke(
        app,
        [
            "monitor", "--out", str(tmp_path), "--store", str(study.store_path),
            "--study", study.protocol.study_id, "--webhook", url,
        ],
    )  # fmt: skip

    assert result.exit_code == 0, result.output
    page = (tmp_path / "drift-report.html").read_text()
    assert page.count(RESEARCH_NOTICE) == 2
    assert page.index('id="alarm-summary"') < page.index('id="label-completeness"')
    assert '<p id="label-updates">6 site window(s) were fetched again' in page  # 3 sites × 2
    assert (tmp_path / "drift-windows.csv").read_text().count("\n") == 1 + 3 * 12
    alerts = [json.loads(body) for body in bodies]
    posted = {(a["site"], a["metric"], a["method"]) for a in alerts}
    assert posted == {(a.site, a.metric, a.method) for a in findings.alarms}
    assert all(a["notice"] == RESEARCH_NOTICE for a in alerts)
