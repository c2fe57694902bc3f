from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sklearn.datasets import load_breast_cancer

from simulations.dataset import CITATION, SIZE_FEATURE, load_feature_table, load_public_dataset
from site_agent.exceptions import InputError


def test_public_dataset_has_569_cases_212_malignant_as_label_1() -> None:
    """WDBC loads with 569 cases of which 212 (malignant) carry label 1."""
    table = load_public_dataset()
    # scikit-learn documentation of load_breast_cancer (sklearn 1.9, "Class Distribution:
    # 212 - Malignant, 357 - Benign"), after Street, Wolberg & Mangasarian (1993).
    assert table.n_cases == 569
    assert table.n_positive == 212
    assert table.features.shape == (569, 30)


def test_label_1_is_sklearn_target_0_malignant() -> None:
    """Our label 1 is exactly scikit-learn's target 0, which it names 'malignant'."""
    bunch = load_breast_cancer()
    assert bunch.target_names[0] == "malignant"
    np.testing.assert_array_equal(load_public_dataset().labels, (bunch.target == 0).astype(int))


def test_feature_columns_are_prefixed_snake_case_of_sklearn_names() -> None:
    """Columns are feature_<snake_case sklearn name>, in sklearn's order."""
    names = load_public_dataset().feature_names
    assert names[0] == "feature_mean_radius"
    assert "feature_worst_concave_points" in names
    assert "feature_mean_fractal_dimension" in names
    assert all(n.startswith("feature_") and " " not in n for n in names)


def test_feature_groups_partition_columns_as_documented() -> None:
    """Grey-level texture is intensity-like; smoothness and fractal dimension texture-like."""
    table = load_public_dataset()
    groups = table.groups
    assert groups.intensity == (
        "feature_mean_texture",
        "feature_texture_error",
        "feature_worst_texture",
    )
    assert set(groups.texture) == {
        f"feature_{stat}"
        for stat in (
            "mean_smoothness",
            "smoothness_error",
            "worst_smoothness",
            "mean_fractal_dimension",
            "fractal_dimension_error",
            "worst_fractal_dimension",
        )
    }
    assert len(groups.shape) == 21 and groups.other == ()
    every = groups.intensity + groups.texture + groups.shape
    assert sorted(every) == sorted(table.feature_names)
    assert table.size_feature == SIZE_FEATURE


def test_citation_names_the_dataset_authors() -> None:
    """The citation constant names the creators as scikit-learn's documentation does."""
    assert "Street" in CITATION and "Wolberg" in CITATION and "Mangasarian" in CITATION
    assert load_public_dataset().source == CITATION


def _public_frame() -> pd.DataFrame:
    table = load_public_dataset()
    return table.features.assign(label=table.labels)


@pytest.mark.parametrize("suffix", [".csv", ".parquet"])
def test_user_table_round_trips_the_public_data(tmp_path: Path, suffix: str) -> None:
    """A CSV or Parquet copy of the public data loads back to the same table."""
    path = tmp_path / f"cases{suffix}"
    frame = _public_frame()
    frame.to_csv(path, index=False) if suffix == ".csv" else frame.to_parquet(path)
    loaded = load_feature_table(path)
    public = load_public_dataset()
    pd.testing.assert_frame_equal(loaded.features, public.features, rtol=1e-12)
    np.testing.assert_array_equal(loaded.labels, public.labels)
    assert loaded.groups == public.groups and loaded.source == path.name


def test_user_table_with_other_label_column_name(tmp_path: Path) -> None:
    """label_column picks the label; unknown feature names go to the 'other' group."""
    path = tmp_path / "t.csv"
    pd.DataFrame({"y": [0, 1, 1], "feature_opacity": [1.0, 2.0, 3.0]}).to_csv(path, index=False)
    table = load_feature_table(path, label_column="y")
    assert table.groups.other == ("feature_opacity",) and table.size_feature is None


@pytest.mark.parametrize(
    ("frame", "message"),
    [
        (pd.DataFrame({"feature_a": [1.0, 2.0]}), "no label column 'label'"),
        (pd.DataFrame({"label": [0, 2], "feature_a": [1.0, 2.0]}), "only 0 and 1"),
        (pd.DataFrame({"label": [1, 1], "feature_a": [1.0, 2.0]}), "both classes"),
        (pd.DataFrame({"label": [0, 1], "a": [1.0, 2.0]}), "no columns named feature_"),
        (pd.DataFrame({"label": [0, 1], "feature_a": ["x", "2"]}), "'feature_a' has missing"),
        (pd.DataFrame({"label": [0, 1], "feature_a": [None, 2.0]}), "'feature_a' has missing"),
    ],
)
def test_invalid_user_table_raises_clear_input_error(
    tmp_path: Path, frame: pd.DataFrame, message: str
) -> None:
    """Each defect of a user table gives an InputError saying what is wrong."""
    path = tmp_path / "bad.csv"
    frame.to_csv(path, index=False)
    with pytest.raises(InputError, match=message):
        load_feature_table(path)


def test_unsupported_or_missing_file_raises_input_error(tmp_path: Path) -> None:
    """A wrong suffix or an absent file gives an InputError, not a library error."""
    with pytest.raises(InputError, match=r"must be \.csv or \.parquet"):
        load_feature_table(tmp_path / "cases.xlsx")
    with pytest.raises(InputError, match="cannot read feature table"):
        load_feature_table(tmp_path / "absent.csv")
