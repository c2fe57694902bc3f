"""The ``meta`` command: table and JSON output, the notice, and errors with exit code 2.

Hospital names and numbers are invented for these tests only, except the BCG trials.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import typer
from typer.testing import CliRunner

from coordinator.cli import EXIT_INPUT_ERROR, add_meta_command
from coordinator.pooling.meta_analysis import meta_analyze
from site_agent.notices import RESEARCH_NOTICE

# BCG trials, Colditz et al. (1994) JAMA 271:698-702, as distributed with metafor (dat.bcg).
_BCG = [
    (4, 119, 11, 128),
    (6, 300, 29, 274),
    (3, 228, 11, 209),
    (62, 13536, 248, 12619),
    (33, 5036, 47, 5761),
    (180, 1361, 372, 1079),
    (8, 2537, 10, 619),
    (505, 87886, 499, 87892),
    (29, 7470, 45, 7232),
    (17, 1699, 65, 1600),
    (186, 50448, 141, 27197),
    (5, 2493, 3, 2338),
    (27, 16886, 29, 17825),
]


def _app() -> typer.Typer:
    app = typer.Typer()

    @app.callback()
    def _root() -> None:
        """Test root, so that ``meta`` stays a subcommand."""

    add_meta_command(app)
    return app


def _bcg_csv(tmp_path: Path) -> Path:
    lines = ["site,estimate,variance"]
    for i, (a, b, c, d) in enumerate(_BCG, start=1):
        y = float(np.log(a / (a + b)) - np.log(c / (c + d)))
        v = 1 / a - 1 / (a + b) + 1 / c - 1 / (c + d)  # common practice (log risk ratio)
        lines.append(f"trial {i},{y!r},{v!r}")
    path = tmp_path / "bcg.csv"
    path.write_text("\n".join(lines) + "\n")
    return path


def test_table_shows_sites_both_models_heterogeneity_and_ends_with_notice(tmp_path: Path) -> None:
    """The table lists every site, fixed and REML pools, tau², I², Q, and ends with the notice."""
    result = CliRunner().invoke(_app(), ["meta", str(_bcg_csv(tmp_path))])
    assert result.exit_code == 0, result.output
    out = result.stdout
    assert "trial 13" in out
    assert "fixed effect (inverse variance)" in out and "random effects, REML" in out
    # metafor rma() on dat.bcg, Viechtbauer (2010) J Stat Softw 36(3); recalled from memory.
    assert "-0.7145" in out and "tau² 0.3132" in out and "I² 92.2%" in out
    assert "Cochran's Q 152.23 on 12 df" in out
    assert out.rstrip().endswith(RESEARCH_NOTICE)


def test_json_output_carries_both_models_and_the_notice(tmp_path: Path) -> None:
    """--json prints parseable JSON with the fixed and the chosen random-effects model."""
    result = CliRunner().invoke(
        _app(), ["meta", str(_bcg_csv(tmp_path)), "--json", "--method", "dl", "--hksj"]
    )
    assert result.exit_code == 0, result.output
    doc = json.loads(result.stdout)
    assert doc["random"]["method"] == "dl" and doc["random"]["hksj"] is True
    assert doc["fixed"]["method"] == "fixed" and doc["fixed"]["hksj"] is False
    assert doc["fixed"]["prediction_lower"] is None
    assert doc["notice"] == RESEARCH_NOTICE
    # metafor rma(method="DL") on dat.bcg: estimate -0.7141, tau² 0.3088; recalled from memory.
    assert doc["random"]["estimate"] == pytest.approx(-0.7141, abs=5e-5)
    assert doc["random"]["tau2"] == pytest.approx(0.3088, abs=5e-5)


def test_counts_with_measure_show_back_transformed_values(tmp_path: Path) -> None:
    """With --measure sensitivity the table adds the back-transformed sensitivity columns."""
    path = tmp_path / "counts.csv"
    path.write_text(
        "site,tp,fp,fn,tn\n"
        "Fenwick Regional,45,30,5,420\n"
        "Orchard Bay Hospital,38,52,12,398\n"
        "Tallow Ridge Clinic,20,11,0,210\n"
    )
    result = CliRunner().invoke(_app(), ["meta", str(path), "--measure", "sensitivity"])
    assert result.exit_code == 0, result.output
    assert "sensitivity 95% CI" in result.stdout
    assert "Fenwick Regional" in result.stdout and "0.9000" in result.stdout  # 45 / 50
    assert "continuity correction" in result.stdout


def test_table_values_equal_the_library_result(tmp_path: Path) -> None:
    """The pooled PM estimate printed is the one meta_analyze returns for the same file."""
    path = _bcg_csv(tmp_path)
    rows = [line.split(",") for line in path.read_text().splitlines()[1:]]
    ref = meta_analyze([float(r[1]) for r in rows], [float(r[2]) for r in rows], method="pm")
    result = CliRunner().invoke(_app(), ["meta", str(path), "--method", "pm"])
    assert f"{ref.estimate:.4f}" in result.stdout
    assert "random effects, Paule-Mandel" in result.stdout


@pytest.mark.parametrize(
    ("text", "extra", "message"),
    [
        ("name,estimate,se\nA,1,0.1\nB,2,0.1\n", [], "missing column 'site'"),
        ("site,estimate,variance\nA,1,0.1\nB,2,-0.1\n", [], "row 2, column 'variance'"),
        ("site,estimate,se\nA,1,0.1\n", [], "at least two sites"),
        ("site,estimate,se\nA,1,0.1\nB,2,x\n", [], "row 2, column 'se': not a number"),
        ("site,tp,fp,fn,tn\nA,1,2,3,4\nB,1,2,3,4\n", [], "choose the measure"),
        ("site,auc\nA,0.7\nB,0.8\n", ["--measure", "auc"], "'auc_se'"),
    ],
)
def test_bad_input_prints_one_error_line_and_exits_2(
    tmp_path: Path, text: str, extra: list[str], message: str
) -> None:
    """Every bad input gives one 'error: ...' line on stderr and exit code 2."""
    path = tmp_path / "sites.csv"
    path.write_text(text)
    result = CliRunner().invoke(_app(), ["meta", str(path), *extra])
    assert result.exit_code == EXIT_INPUT_ERROR == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and message in lines[0]
    assert result.stdout == ""


def test_missing_file_is_an_input_error(tmp_path: Path) -> None:
    """A path that does not exist gives the one-line error and exit code 2."""
    result = CliRunner().invoke(_app(), ["meta", str(tmp_path / "absent.csv")])
    assert result.exit_code == 2
    assert result.stderr.strip() == "error: no such file: absent.csv"


def test_help_names_what_it_pools() -> None:
    """The command help lists the column layouts it accepts."""
    result = CliRunner().invoke(_app(), ["meta", "--help"], terminal_width=400)
    assert result.exit_code == 0
    assert "auc and auc_se" in " ".join(result.stdout.split())
