"""Tests of ``sitepool site evaluate`` through the root command, with typer's CliRunner.

The example site "Northgate General" and the study below are invented.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from typer.testing import CliRunner

from simulations.cli import app
from site_agent.contract.protocol import EvaluationPlan, StudyProtocol
from site_agent.contract.release import SiteRelease
from site_agent.notices import RESEARCH_NOTICE
from site_agent.site_output import SiteEvaluationOutput

EXAMPLE = Path(__file__).parents[2] / "examples" / "northgate_predictions.csv"
runner = CliRunner()


def _output(stdout: str) -> SiteEvaluationOutput:
    return SiteEvaluationOutput.model_validate_json(stdout)


def _release(stdout: str) -> SiteRelease:
    """Return the release half of ``--json`` output, re-read as the wire model."""
    return SiteRelease.from_json(_output(stdout).leaves_the_site.release.to_json())


def test_json_output_is_the_release_named_after_the_file() -> None:
    """--json prints a parseable release; the site defaults to the file stem."""
    result = runner.invoke(app, ["site", "evaluate", str(EXAMPLE), "--json"])
    assert result.exit_code == 0, result.stderr
    release = _release(result.stdout)
    assert release.site == "northgate_predictions"
    assert release.protocol_hash == "unregistered"
    assert release.statistics.thresholds == EvaluationPlan().thresholds


def test_protocol_file_sets_plan_and_hash(tmp_path: Path) -> None:
    """With --protocol the release carries the protocol's hash, thresholds and subgroups."""
    protocol = StudyProtocol(
        study_id="lumen-ext-val-01",
        title="Invented external validation study",
        evaluation=EvaluationPlan(thresholds=(0.25, 0.6), subgroups=("scanner_vendor",)),
    )
    path = tmp_path / "protocol.json"
    path.write_text(protocol.canonical_json())
    result = runner.invoke(
        app,
        ["site", "evaluate", str(EXAMPLE), "--json", "--protocol", str(path), "--site", "ng"],
    )
    assert result.exit_code == 0, result.stderr
    release = _release(result.stdout)
    assert release.site == "ng"
    assert release.protocol_hash == protocol.content_hash()
    assert release.statistics.thresholds == (0.25, 0.6)
    assert {g.attribute for g in release.subgroups} == {"scanner_vendor"}


def test_readable_output_shows_metrics_and_ends_with_notice() -> None:
    """Without --json the tables show the key metrics and end with the research notice."""
    result = runner.invoke(app, ["site", "evaluate", str(EXAMPLE)])
    assert result.exit_code == 0, result.stderr
    release = _release(runner.invoke(app, ["site", "evaluate", str(EXAMPLE), "--json"]).stdout)
    assert release.exact.auc.auc is not None
    assert f"{release.exact.auc.auc:.3f}" in result.stdout
    for label in ("sensitivity", "specificity", "AUC, DeLong", "logit", "kappa", "slope"):
        assert label in result.stdout
    assert result.stdout.rstrip().endswith(RESEARCH_NOTICE)


def test_help_says_research_tool_not_medical_device() -> None:
    """The command's help carries the research notice."""
    result = runner.invoke(app, ["site", "evaluate", "--help"])
    assert result.exit_code == 0
    assert "not a medical device" in " ".join(result.stdout.split())


@pytest.mark.parametrize(
    ("content", "message"),
    [
        ("case_id,patient_id,label,score\nc1,p1,1,0.4\nc2,p2,0,7\n", "row 2, column 'score'"),
        ("case_id,patient_id,label\nc1,p1,1\n", "column 'score': required column is missing"),
        ("case_id,patient_id,label,score\nc1,p1,1,0.4\nc1,p2,0,0.2\n", "same as row 1"),
        ("case_id,patient_id,label,score\n", "no rows"),
        ("", "empty"),
    ],
)
def test_bad_table_prints_one_error_line_and_exits_2(
    tmp_path: Path, content: str, message: str
) -> None:
    """Invalid input: one 'error:' line on stderr, exit code 2, nothing on stdout."""
    path = tmp_path / "site.csv"
    path.write_text(content)
    result = runner.invoke(app, ["site", "evaluate", str(path)])
    assert result.exit_code == 2
    assert result.stdout == ""
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and message in lines[0]


def test_missing_file_and_bad_protocol_exit_2(tmp_path: Path) -> None:
    """A missing table or an invalid protocol file is reported on stderr with exit code 2."""
    missing = runner.invoke(app, ["site", "evaluate", str(tmp_path / "absent.csv")])
    assert missing.exit_code == 2 and missing.stdout == ""
    assert missing.stderr.startswith("error: predictions file not found")
    bad = tmp_path / "protocol.json"
    bad.write_text(json.dumps({"study_id": "x"}))
    result = runner.invoke(app, ["site", "evaluate", str(EXAMPLE), "--protocol", str(bad)])
    assert result.exit_code == 2 and result.stdout == ""
    assert result.stderr.startswith("error: invalid study protocol")


def test_missing_subgroup_column_exits_2(tmp_path: Path) -> None:
    """A protocol asking for a subgroup column the table lacks is an input error."""
    protocol = StudyProtocol(
        study_id="lumen-ext-val-02",
        title="Invented study",
        evaluation=EvaluationPlan(subgroups=("ward",)),
    )
    path = tmp_path / "protocol.json"
    path.write_text(protocol.canonical_json())
    result = runner.invoke(app, ["site", "evaluate", str(EXAMPLE), "--protocol", str(path)])
    assert result.exit_code == 2 and result.stdout == ""
    assert "'ward'" in result.stderr


def test_policy_option_shows_the_release_after_disclosure_control(tmp_path: Path) -> None:
    """With --policy, every released histogram and calibration bin is 0 or at least min_cell."""
    policy = tmp_path / "policy.json"
    policy.write_text(json.dumps({"min_cell": 5, "small_cells": "merge"}))
    result = runner.invoke(
        app, ["site", "evaluate", str(EXAMPLE), "--json", "--policy", str(policy)]
    )
    assert result.exit_code == 0, result.stderr
    release = _release(result.stdout)
    h = release.statistics.histogram
    assert set(h.edges) <= set(EvaluationPlan().histogram_edges)
    # The small-cell rule (min_cell 5, common practice): no count from 1 to 4 leaves.
    assert all(v == 0 or v >= 5 for row in (h.positive, h.negative) for v in row)
    assert all(v == 0 or v >= 5 for v in release.statistics.calibration.count)
    unpoliced = _release(runner.invoke(app, ["site", "evaluate", str(EXAMPLE), "--json"]).stdout)
    assert sum(h.positive) == sum(unpoliced.statistics.histogram.positive)


def _interval(estimate: float | None, lower: float | None, upper: float | None) -> str:
    """Return the table's text of an estimate with its interval (see ``site_agent.cli._ci``)."""
    assert estimate is not None and lower is not None and upper is not None
    return f"{estimate:.3f} [{lower:.3f}, {upper:.3f}]"


def test_json_separates_what_leaves_from_metrics_that_stay_and_matches_the_table() -> None:
    """--json: the release, and the table's metrics with intervals and methods beside it."""
    table = runner.invoke(app, ["site", "evaluate", str(EXAMPLE)])
    result = runner.invoke(app, ["site", "evaluate", str(EXAMPLE), "--json"])
    assert result.exit_code == 0, result.stderr

    raw = json.loads(result.stdout)
    assert set(raw) == {"leaves_the_site", "stays_at_site", "notice"}
    assert raw["notice"] == RESEARCH_NOTICE
    out = _output(result.stdout)
    stays = out.stays_at_site
    # Every interval the table prints is in the JSON, with its method named.
    for t in stays.metrics.thresholds:
        for name in ("sensitivity", "specificity", "ppv", "npv"):
            p = getattr(t, name)
            assert p.wilson.method == "wilson" and p.clopper_pearson.method == "clopper-pearson"
            for record in (p.wilson, p.clopper_pearson):
                assert _interval(record.estimate, record.lower, record.upper) in table.stdout
    auc = stays.exact.auc
    assert auc.method == "delong"
    assert _interval(auc.auc, auc.lower, auc.upper) in table.stdout
    assert stays.metrics.agreement, "the example has readers"
    for k in stays.metrics.agreement:
        u = k.unweighted
        assert u.method.startswith("cohen-kappa")
        assert _interval(u.estimate, u.lower, u.upper) in table.stdout
    assert out.leaves_the_site.disclosure_note is None


def test_json_and_table_show_censored_cells_as_ranges(tmp_path: Path) -> None:
    """A policy with a large minimum cell: censored cells and their metrics are ranges."""
    policy = tmp_path / "policy.json"
    policy.write_text(json.dumps({"min_cell": 11, "small_cells": "merge"}))
    args = ["site", "evaluate", str(EXAMPLE), "--policy", str(policy)]
    result = runner.invoke(app, [*args, "--json"])
    table = runner.invoke(app, args)
    assert result.exit_code == 0 and table.exit_code == 0, result.stderr

    out = _output(result.stdout)
    note = out.leaves_the_site.disclosure_note
    assert note is not None and any(".confusion[" in p for p in note.suppressed)
    censored = [t for t in out.stays_at_site.metrics.thresholds if t.sensitivity.successes is None]
    censored += [t for t in out.stays_at_site.metrics.thresholds if t.specificity.successes is None]
    assert censored
    for t in censored:
        for p in (t.sensitivity, t.specificity):
            if p.successes is None and p.wilson.estimate_low is not None:
                assert p.wilson.estimate is None and p.wilson.estimate_high is not None
                assert f"{p.wilson.estimate_low:.3f} to {p.wilson.estimate_high:.3f}" in (
                    table.stdout
                )
    assert "range: censored" in table.stdout
