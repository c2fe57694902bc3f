"""``sitepool monitor`` on its own: what it asks for and how it refuses, with a real store.

The end-to-end run of the command on a rehearsal's store (report, CSVs, webhook) is in
tests/simulations/test_drift_rehearsal.py; here the command is registered on a bare typer
app, so nothing from the simulator is imported.
"""

from __future__ import annotations

from pathlib import Path

import typer
from typer.testing import CliRunner

from coordinator.monitoring.cli import MONITOR_HELP, add_monitor_command
from coordinator.monitoring.results_store import SqliteResultsStore
from site_agent.notices import RESEARCH_NOTICE


def _app() -> typer.Typer:
    app = typer.Typer()
    add_monitor_command(app)

    @app.command("other")
    def other() -> None:
        """Keep ``monitor`` a named subcommand (typer runs a lone command as the app)."""

    return app


def test_monitor_needs_a_store() -> None:
    """Without --store the command fails with exit code 2, naming the missing option."""
    result = CliRunner().invoke(_app(), ["monitor", "--out", "unused", "--study", "s"])

    assert result.exit_code == 2
    assert "Missing option '--store'" in result.output


def test_monitor_refuses_a_store_that_does_not_exist(tmp_path: Path) -> None:
    """A missing store file gives one line on stderr and exit code 2; no file is created."""
    store = tmp_path / "absent.sqlite"

    result = CliRunner().invoke(
        _app(), ["monitor", "--out", str(tmp_path / "out"), "--store", str(store), "--study", "s"]
    )

    assert result.exit_code == 2
    assert result.stderr.strip() == f"error: results store {store} does not exist"
    assert not store.exists()


def test_monitor_says_when_the_store_has_too_few_windows(tmp_path: Path) -> None:
    """A study with no more windows than the baseline ends with the reason, exit code 2."""
    store = tmp_path / "monitoring.sqlite"
    with SqliteResultsStore(store):
        pass

    result = CliRunner().invoke(
        _app(),
        [
            "monitor", "--out", str(tmp_path / "out"), "--store", str(store),
            "--study", "nodule-watch-2031", "--baseline-windows", "3",
        ],
    )  # fmt: skip

    assert result.exit_code == 2
    assert result.stderr.strip().splitlines()[-1] == (
        "error: 0 stored windows: monitoring needs more than the 3 baseline windows"
    )


def test_monitor_help_states_the_caution_at_most_once() -> None:
    """`monitor --help` names what it writes; the caution is not appended to the help text."""
    result = CliRunner().invoke(_app(), ["monitor", "--help"], terminal_width=400)

    assert result.exit_code == 0
    assert "drift-report.html" in MONITOR_HELP and RESEARCH_NOTICE not in MONITOR_HELP
    assert " ".join(result.stdout.split()).count("not a medical device") <= 1
