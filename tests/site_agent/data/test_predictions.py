"""Tests of site_agent.data.predictions: reading and validating a site's predictions table.

The tables here are invented for tests only (no real hospital or patient).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from site_agent.data.predictions import (
    MISSING,
    MISSING_LEVEL,
    PENDING,
    load_predictions,
    read_table,
    validate_predictions,
)
from site_agent.exceptions import PredictionsError

EXAMPLE = Path(__file__).parents[3] / "examples" / "northgate_predictions.csv"

HEADER = "case_id,patient_id,label,score,category,reader_a,acquired_on,scanner_vendor,feature_1"
GOOD_ROWS = [
    "c1,p1,1,0.91,5,1,2024-02-01,Altavue,0.3",
    "c2,p1,0,0.12,1,0,2024-02-02,Koristo,1.5",
    "c3,p2,,0.55,3,,,Altavue,-2",
]


def _write(tmp_path: Path, rows: list[str], header: str = HEADER) -> Path:
    path = tmp_path / "site.csv"
    path.write_text("\n".join([header, *rows]) + "\n")
    return path


def test_valid_table_gives_typed_columns(tmp_path: Path) -> None:
    """A valid table yields typed arrays: pending label, missing call, attribute, feature."""
    p = load_predictions(_write(tmp_path, GOOD_ROWS))
    assert len(p) == 3
    assert p.label.tolist() == [1, 0, PENDING]
    assert p.score.tolist() == [0.91, 0.12, 0.55]
    assert p.category is not None and p.category.tolist() == [5, 1, 3]
    assert p.readers["reader_a"].tolist() == [1, 0, MISSING]
    assert p.acquired_on is not None and np.isnat(p.acquired_on[2])
    assert p.acquired_on[0] == np.datetime64("2024-02-01")
    assert set(p.attributes) == {"scanner_vendor"}
    assert p.features["feature_1"].tolist() == [0.3, 1.5, -2.0]
    assert p.labelled.tolist() == [True, True, False]


def test_example_file_matches_pandas_reading() -> None:
    """The example table loads; counts agree with a plain pandas reading of the file."""
    frame = pd.read_csv(EXAMPLE)  # pandas as the independent reader
    p = load_predictions(EXAMPLE)
    assert len(p) == len(frame)
    assert int((p.label == PENDING).sum()) == int(frame["label"].isna().sum())
    assert int((p.label == 1).sum()) == int((frame["label"] == 1).sum())
    assert np.allclose(p.score, frame["score"].to_numpy())
    assert len(set(p.patient_id)) == frame["patient_id"].nunique()
    assert set(p.attributes) == {"scanner_vendor", "field_strength", "sex", "age_band"}
    assert set(p.readers) == {"reader_a", "reader_b"}


def test_parquet_and_csv_give_the_same_predictions(tmp_path: Path) -> None:
    """The same table written as Parquet validates to the same columns as its CSV."""
    csv = _write(tmp_path, GOOD_ROWS)
    frame = pd.read_csv(csv)
    parquet = tmp_path / "site.parquet"
    frame.to_parquet(parquet)
    a, b = load_predictions(csv), load_predictions(parquet)
    assert a.label.tolist() == b.label.tolist()
    assert a.score.tolist() == b.score.tolist()
    assert a.readers["reader_a"].tolist() == b.readers["reader_a"].tolist()
    assert a.acquired_on is not None and b.acquired_on is not None
    assert a.acquired_on.tolist() == b.acquired_on.tolist()


def test_empty_attribute_cell_gets_missing_level(tmp_path: Path) -> None:
    """An empty attribute cell becomes the 'not recorded' level, not an error."""
    rows = [*GOOD_ROWS[:2], "c3,p2,0,0.4,2,1,2024-01-01,,0"]
    p = load_predictions(_write(tmp_path, rows))
    assert p.attributes["scanner_vendor"].tolist()[2] == MISSING_LEVEL


# Each case: a bad cell, the row and column the error must name, and the bad value that
# must NOT appear in the message (site data never leaks into errors).
BAD_CELLS = [
    ("c2,p1,0,1.7,1,0,2024-02-02,Koristo,1", 2, "score", "1.7"),
    ("c2,p1,0,-0.25,1,0,2024-02-02,Koristo,1", 2, "score", "-0.25"),
    ("c2,p1,0,highish,1,0,2024-02-02,Koristo,1", 2, "score", "highish"),
    ("c2,p1,0,,1,0,2024-02-02,Koristo,1", 2, "score", None),
    ("c2,p1,0,nan,1,0,2024-02-02,Koristo,1", 2, "score", None),
    ("c2,p1,2,0.3,1,0,2024-02-02,Koristo,1", 2, "label", None),
    ("c2,p1,yes,0.3,1,0,2024-02-02,Koristo,1", 2, "label", "yes"),
    ("c2,p1,0,0.3,1,0.5,2024-02-02,Koristo,1", 2, "reader_a", "0.5"),
    ("c2,p1,0,0.3,1,maybe,2024-02-02,Koristo,1", 2, "reader_a", "maybe"),
    ("c2,p1,0,0.3,2.5,0,2024-02-02,Koristo,1", 2, "category", "2.5"),
    ("c2,p1,0,0.3,1,0,2024-13-45,Koristo,1", 2, "acquired_on", "2024-13-45"),
    ("c2,p1,0,0.3,1,0,yesterday,Koristo,1", 2, "acquired_on", "yesterday"),
    ("c2,,0,0.3,1,0,2024-02-02,Koristo,1", 2, "patient_id", None),
    (",p1,0,0.3,1,0,2024-02-02,Koristo,1", 2, "case_id", None),
    ("c2,p1,0,0.3,1,0,2024-02-02,Koristo,abc", 2, "feature_1", "abc"),
]


@pytest.mark.parametrize(("row", "line", "column", "value"), BAD_CELLS)
def test_bad_cell_names_row_and_column_but_not_value(
    tmp_path: Path, row: str, line: int, column: str, value: str | None
) -> None:
    """Each invalid cell raises PredictionsError naming its row and column, not its value."""
    path = _write(tmp_path, [GOOD_ROWS[0], row, GOOD_ROWS[2]])
    with pytest.raises(PredictionsError, match=rf"^row {line}, column '{column}': ") as info:
        load_predictions(path)
    assert info.value.row == line
    assert info.value.column == column
    if value is not None:
        assert value not in str(info.value)


def test_duplicate_case_id_names_both_rows(tmp_path: Path) -> None:
    """A repeated case id names the second row and the row it repeats."""
    rows = [*GOOD_ROWS, "c2,p3,0,0.2,1,0,2024-01-01,Meridex,0"]
    with pytest.raises(PredictionsError, match=r"^row 4, column 'case_id': .*same as row 2"):
        load_predictions(_write(tmp_path, rows))


@pytest.mark.parametrize("missing", ["case_id", "patient_id", "label", "score"])
def test_missing_required_column_is_named(tmp_path: Path, missing: str) -> None:
    """Dropping a required column raises an error naming that column."""
    frame = pd.read_csv(_write(tmp_path, GOOD_ROWS), dtype=str, keep_default_na=False)
    with pytest.raises(PredictionsError, match=rf"column '{missing}': required column is missing"):
        validate_predictions(frame.drop(columns=[missing]))


def test_header_only_table_is_rejected(tmp_path: Path) -> None:
    """A table with a header and no rows is rejected as empty."""
    with pytest.raises(PredictionsError, match="no rows"):
        load_predictions(_write(tmp_path, []))


def test_zero_byte_file_is_rejected(tmp_path: Path) -> None:
    """A zero-byte CSV is reported as empty."""
    path = tmp_path / "empty.csv"
    path.write_text("")
    with pytest.raises(PredictionsError, match="empty"):
        read_table(path)


def test_missing_file_is_reported(tmp_path: Path) -> None:
    """A path that does not exist is reported as not found."""
    with pytest.raises(PredictionsError, match="not found"):
        read_table(tmp_path / "absent.csv")


def test_unknown_suffix_is_reported(tmp_path: Path) -> None:
    """A file whose suffix is neither CSV nor Parquet is refused before reading."""
    path = tmp_path / "site.xlsx"
    path.write_text("x")
    with pytest.raises(PredictionsError, match="unknown suffix"):
        read_table(path)


def test_subset_keeps_every_column_aligned(tmp_path: Path) -> None:
    """Subsetting keeps labels, scores, readers and attributes of the same cases."""
    p = load_predictions(_write(tmp_path, GOOD_ROWS))
    sub = p.subset(np.array([False, True, True]))
    assert sub.case_id.tolist() == ["c2", "c3"]
    assert sub.readers["reader_a"].tolist() == [0, MISSING]
    assert sub.attributes["scanner_vendor"].tolist() == ["Koristo", "Altavue"]


def test_example_file_is_what_its_seeded_generator_writes(tmp_path: Path) -> None:
    """Regenerating the example with its seed reproduces the committed file byte for byte."""
    import importlib.util

    script = EXAMPLE.with_name("make_example_predictions.py")
    spec = importlib.util.spec_from_file_location("make_example_predictions", script)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    out = tmp_path / "regenerated.csv"
    module.make_predictions().to_csv(out, index=False, lineterminator="\n")
    assert out.read_text() == EXAMPLE.read_text()
