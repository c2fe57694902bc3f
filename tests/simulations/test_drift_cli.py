"""``sitepool rehearse-drift``: the rehearsal, then the same report ``sitepool monitor`` writes.

Invented hospitals drawn from the public Wisconsin breast cancer data (scikit-learn), for
tests only; the in-process engine.
"""

from __future__ import annotations

import json
from pathlib import Path

from typer.testing import CliRunner

from simulations.cli import app
from simulations.drift_rehearsal import drift_scenario
from simulations.scenario import Scenario
from site_agent.notices import RESEARCH_NOTICE

SCANNER_SITE = "Kestrel Valley Hospital"


def _small_scenario(path: Path) -> Scenario:
    """Write two of the drift scenario's hospitals over 10 months (one changes scanner)."""
    base = drift_scenario()
    sizes = {"Northgate General": 3000, SCANNER_SITE: 1200}
    sites = tuple(
        s.model_copy(update={"n_cases": sizes[s.name]}) for s in base.sites if s.name in sizes
    )
    events = tuple(e for e in base.drift_events if e.site == SCANNER_SITE)
    scenario = base.model_copy(update={"months": 10, "sites": sites, "drift_events": events})
    scenario.dump(path)
    return scenario


def test_rehearse_drift_writes_what_monitor_writes_from_its_store(tmp_path: Path) -> None:
    """drift.json and the CSVs equal `monitor --store` on the same store; the page adds context."""
    scenario = _small_scenario(tmp_path / "scenario.json")
    runner = CliRunner()

    rehearsed = runner.invoke(
        app,
        ["rehearse-drift", "--out", str(tmp_path / "rehearsal"),
         "--scenario", str(tmp_path / "scenario.json")],
    )  # fmt: skip
    monitored = runner.invoke(
        app,
        [
            "monitor", "--out", str(tmp_path / "monitor"),
            "--store", str(tmp_path / "rehearsal" / "monitoring.sqlite"),
            "--study", f"drift-rehearsal-{scenario.seed}",
        ],
    )  # fmt: skip

    assert rehearsed.exit_code == 0, rehearsed.output
    assert monitored.exit_code == 0, monitored.output
    for name in ("drift.json", "drift-windows.csv", "drift-alarms.csv"):
        assert (tmp_path / "rehearsal" / name).read_bytes() == (
            tmp_path / "monitor" / name
        ).read_bytes(), name
    page = (tmp_path / "rehearsal" / "drift-report.html").read_text()
    assert "Rehearsal on invented hospitals" in page
    assert f"Injected: {SCANNER_SITE} from window 7" in page
    assert "Monitoring pass 2 as of" in page
    assert (
        "Rehearsal on invented hospitals"
        not in (tmp_path / "monitor" / "drift-report.html").read_text()
    )
    findings = json.loads((tmp_path / "rehearsal" / "drift.json").read_text())
    assert [s["site"] for s in findings["sites"]] == sorted(["Northgate General", SCANNER_SITE])
    assert " ".join(rehearsed.output.split()).endswith(" ".join(RESEARCH_NOTICE.split()))


def test_rehearse_drift_refuses_an_unknown_engine(tmp_path: Path) -> None:
    """An engine other than inprocess or loopback gives one line and exit code 2."""
    result = CliRunner().invoke(
        app, ["rehearse-drift", "--out", str(tmp_path), "--engine", "cluster"]
    )

    assert result.exit_code == 2
    assert result.stderr.strip() == "error: unknown engine 'cluster': use inprocess or loopback"
