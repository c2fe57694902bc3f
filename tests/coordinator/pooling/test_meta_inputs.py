"""Reading per-site results files for meta-analysis.

Hospital names and numbers are invented for these tests only.
"""

from __future__ import annotations

import math
from pathlib import Path

import pandas as pd
import pytest

from coordinator.pooling.meta_inputs import read_site_results, site_inputs_from_frame
from site_agent.exceptions import InputError


def _write(tmp_path: Path, text: str, name: str = "sites.csv") -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


COUNTS = (
    "site,tp,fp,fn,tn\n"
    "Fenwick Regional,45,30,5,420\n"
    "Orchard Bay Hospital,38,52,12,398\n"
    "Tallow Ridge Clinic,20,11,0,210\n"
)


def test_estimate_with_se_is_read_as_given_with_squared_se() -> None:
    """An estimate/se table is pooled as given; variances are the squared SEs."""
    frame = pd.DataFrame(
        {"site": ["Fenwick Regional", "Orchard Bay"], "estimate": [0.8, 0.7], "se": [0.1, 0.2]}
    )
    inputs = site_inputs_from_frame(frame)
    assert inputs.measure == "estimate" and inputs.transform == "identity"
    assert inputs.labels == ("Fenwick Regional", "Orchard Bay")
    assert inputs.variances == pytest.approx((0.01, 0.04))


def test_variance_column_and_mixed_case_headers_are_accepted(tmp_path: Path) -> None:
    """Column names are matched without regard to case or surrounding spaces."""
    path = _write(tmp_path, " Site ,Estimate,VARIANCE\nA,0.5,0.02\nB,0.6,0.03\n")
    inputs = read_site_results(path)
    assert inputs.estimates == (0.5, 0.6)
    assert inputs.variances == (0.02, 0.03)


def test_auc_layout_is_put_on_the_logit_scale_and_says_so(tmp_path: Path) -> None:
    """AUC rows are logit-transformed with delta-method variances, and the notes say so."""
    path = _write(tmp_path, "site,auc,auc_se\nA,0.80,0.02\nB,0.75,0.03\n")
    inputs = read_site_results(path)
    assert inputs.measure == "auc" and inputs.transform == "logit"
    assert inputs.estimates[0] == pytest.approx(math.log(0.8 / 0.2))
    # delta method, common practice: Var(logit AUC) = se² / (AUC (1 - AUC))²
    assert inputs.variances[0] == pytest.approx(0.02**2 / (0.8 * 0.2) ** 2)
    assert any("logit" in note for note in inputs.notes)


@pytest.mark.parametrize(
    ("measure", "transform", "first"),
    [
        ("sensitivity", "logit", math.log(45 / 5)),
        ("specificity", "logit", math.log(420 / 30)),
        ("dor", "log", math.log(45 * 420 / (30 * 5))),
    ],
)
def test_counts_give_the_chosen_measure(
    tmp_path: Path, measure: str, transform: str, first: float
) -> None:
    """2x2 counts are turned into the measure the user picks, on its pooling scale."""
    inputs = read_site_results(_write(tmp_path, COUNTS), measure=measure)  # type: ignore[arg-type]
    assert inputs.transform == transform
    assert inputs.estimates[0] == pytest.approx(first)  # common practice formulas


def test_zero_cell_correction_is_reported(tmp_path: Path) -> None:
    """A site with a zero cell is corrected and the notes say so."""
    inputs = read_site_results(_write(tmp_path, COUNTS), measure="sensitivity")
    assert inputs.estimates[2] == pytest.approx(math.log(20.5 / 0.5))
    assert any("continuity correction" in note for note in inputs.notes)


def test_parquet_and_csv_give_the_same_inputs(tmp_path: Path) -> None:
    """The same table read from Parquet and from CSV gives identical values."""
    csv = _write(tmp_path, COUNTS)
    parquet = tmp_path / "sites.parquet"
    pd.read_csv(csv).to_parquet(parquet)
    assert read_site_results(parquet, measure="dor") == read_site_results(csv, measure="dor")


def test_site_without_diseased_cases_is_excluded_with_a_reason(tmp_path: Path) -> None:
    """Sensitivity is undefined at a site with no diseased cases: excluded, reason noted."""
    text = COUNTS + "Cinder Vale Infirmary,0,12,0,300\n"
    inputs = read_site_results(_write(tmp_path, text), measure="sensitivity")
    assert "Cinder Vale Infirmary" not in inputs.labels
    assert any("'Cinder Vale Infirmary' excluded: tp + fn is 0" in n for n in inputs.notes)


@pytest.mark.parametrize(
    ("text", "measure", "message"),
    [
        ("name,estimate,se\nA,1,0.1\nB,2,0.1\n", None, "missing column 'site'"),
        ("site,estimate\nA,1\nB,2\n", None, "needs missing column.*'se' or 'variance'"),
        ("site,auc\nA,0.7\nB,0.8\n", "auc", "needs missing column.*'auc_se'"),
        ("site,tp,fp,fn\nA,1,2,3\nB,1,2,3\n", "dor", "needs missing column.*'tn'"),
        ("site,value\nA,1\nB,2\n", None, "no known layout"),
        (COUNTS, None, "choose the measure"),
        ("site,estimate,variance\nA,1,0.1\nB,2,-0.1\n", None, "row 2, column 'variance': must be"),
        ("site,estimate,se\nA,1,0.1\nB,2,0\n", None, "row 2, column 'se': must be positive"),
        ("site,estimate,se\nA,1,0.1\nB,2,abc\n", None, "row 2, column 'se': not a number"),
        ("site,estimate,se\nA,1,0.1\nB,,0.2\n", None, "row 2, column 'estimate': empty cell"),
        ("site,estimate,se\nA,1,0.1\nB,inf,0.2\n", None, "row 2, column 'estimate': not a finite"),
        ("site,estimate,se\nA,1,0.1\n", None, "at least two sites, got 1"),
        ("site,estimate,se\nA,1,0.1\nA,2,0.1\n", None, "row 2, column 'site': duplicate"),
        ("site,estimate,se\nA,1,0.1\n ,2,0.1\n", None, "row 2, column 'site': empty site name"),
        ("site,auc,auc_se\nA,0.7,0.1\nB,1.0,0.1\n", None, "row 2, column 'auc': must lie"),
        (
            "site,tp,fp,fn,tn\nA,1,2,3,4\nB,1.5,2,3,4\n",
            "dor",
            "row 2, column 'tp': must be a whole",
        ),
        ("site,tp,fp,fn,tn\nA,1,2,3,4\nB,0,2,0,4\n", "sensitivity", "two usable sites, got 1"),
        ("site,estimate,se,variance\nA,1,0.1,0.01\nB,2,0.1,0.01\n", None, "not both"),
    ],
)
def test_bad_tables_raise_input_error_naming_the_problem(
    tmp_path: Path, text: str, measure: str | None, message: str
) -> None:
    """Each kind of bad input gives an InputError that names the row, column or rule."""
    with pytest.raises(InputError, match=message):
        read_site_results(_write(tmp_path, text), measure=measure)  # type: ignore[arg-type]


def test_missing_and_unsupported_files_raise_input_error(tmp_path: Path) -> None:
    """A missing file and an unknown suffix are refused with a clear message."""
    with pytest.raises(InputError, match=r"no such file: absent\.csv"):
        read_site_results(tmp_path / "absent.csv")
    with pytest.raises(InputError, match=r"unsupported file type '\.xlsx'"):
        read_site_results(_write(tmp_path, "x", "sites.xlsx"))


def test_corrupt_parquet_raises_input_error(tmp_path: Path) -> None:
    """A file with a Parquet suffix that is not Parquet is refused, not a crash."""
    with pytest.raises(InputError, match=r"cannot read sites\.parquet"):
        read_site_results(_write(tmp_path, "not parquet", "sites.parquet"))
