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


def test_plan_sizes_reproduces_the_pmvalsampsize_heart_valve_example() -> None:
    """Prevalence 0.018, C 0.8, LP Normal(-5, 2.5²), O/E width 1: 906, 4554 and 4252."""
    # pmvalsampsize docs/example.ipynb (the heart valve example of Riley et al. 2021 with
    # a normal LP): 905, 4544 (10^6 simulated LP values) and 4252. Ours: 906 (the smallest
    # n whose O/E interval is at most 1 wide) and 4554 (quadrature); the differences are
    # explained in tests/coordinator/planning/test_riley_worked_example.py.
    result = CliRunner().invoke(
        app,
        [
            "plan", "sizes", "--auc", "0.8", "--prevalence", "0.018", "--oe-width", "1",
            "--lp-mean", "-5", "--lp-sd", "2.5",
        ],
    )  # fmt: skip
    assert result.exit_code == 0, result.output
    assert "All three Riley et al. (2021) criteria together: 4554 cases." in result.output
    for cases in ("906", "4252", "Normal(-5.000, 2.500²) as given"):
        assert cases in result.output


def test_plan_sizes_refuses_a_linear_predictor_mean_without_its_sd() -> None:
    """--lp-mean alone is invalid input, exit code 2."""
    result = CliRunner().invoke(app, ["plan", "sizes", "--lp-mean", "-5"])
    assert result.exit_code == 2
    assert "give both or neither" in result.output
