"""The ``sitepool plan`` commands: table, files, page and the research-tool caution."""

from __future__ import annotations

import csv
import json
from pathlib import Path

from typer.testing import CliRunner

from simulations.cli import app
from site_agent.notices import RESEARCH_NOTICE


def test_plan_grid_prints_the_table_and_writes_json_csv_and_html(tmp_path: Path) -> None:
    """A small grid: the verdict line, three files, the caution in output and page."""
    result = CliRunner().invoke(
        app,
        [
            "plan", "grid", "--out", str(tmp_path), "--sites", "3,5", "--cases", "60,120",
            "--replicates", "20", "--workers", "1", "--max-ci-width", "0.5", "--seed", "9",
        ],
    )  # fmt: skip
    assert result.exit_code == 0, result.output
    assert "Cheapest design meeting every target" in result.output
    assert RESEARCH_NOTICE in " ".join(result.output.split())
    plan = json.loads((tmp_path / "plan.json").read_text())
    assert plan["settings"]["seed"] == 9
    assert plan["recommended"] is not None
    with (tmp_path / "plan.csv").open() as handle:
        rows = list(csv.DictReader(handle))
    assert len(rows) == 4
    page = (tmp_path / "plan.html").read_text()
    assert page.count(RESEARCH_NOTICE) == 2
    assert page.count("<svg") == 4


def test_plan_grid_rejects_tau_given_twice(tmp_path: Path) -> None:
    """--tau and --tau-from together are refused with exit code 2."""
    result = CliRunner().invoke(
        app,
        ["plan", "grid", "--out", str(tmp_path), "--tau", "0.1", "--tau-from", "x.json"],
    )
    assert result.exit_code == 2
    assert "either --tau or --tau-from" in result.output


def test_plan_sizes_prints_every_criterion_with_its_source() -> None:
    """Hanley-McNeil, Buderer and the three Riley criteria, and the caution."""
    result = CliRunner().invoke(app, ["plan", "sizes", "--auc", "0.75", "--prevalence", "0.1"])
    assert result.exit_code == 0, result.output
    for source in ("Hanley & McNeil (1982)", "Buderer (1996)", "Riley et al. (2021)"):
        assert source in result.output
    assert RESEARCH_NOTICE in " ".join(result.output.split())
