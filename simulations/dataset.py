"""The public dataset that synthetic sites are drawn from.

The default is the Wisconsin Diagnostic Breast Cancer (WDBC) data shipped with
scikit-learn: 569 fine-needle aspirates of breast masses, 212 malignant and 357 benign,
each described by 30 features computed from a digitised image of the cell nuclei. For each
of ten nuclear measurements the table holds the mean, the standard error and the "worst"
(mean of the three largest values) over the nuclei in the image.

Labels: scikit-learn codes 0 = malignant, 1 = benign. Here **label 1 = disease (malignant)**
and 0 = benign, as in the rest of sitepool.

Feature groups
--------------
Acquisition shifts act on groups of features, so each measurement is given one group by
what in an imaging chain would change it:

``intensity``
    ``texture``: the standard deviation of grey-scale values, the only WDBC measurement
    computed from grey levels. A scanner's gain and offset act on it.
``texture``
    ``smoothness`` (local variation in radius lengths) and ``fractal_dimension``
    ("coastline approximation" minus one): fine-scale detail of the nuclear contour, which
    depends on resolution and sharpening.
``shape``
    ``radius``, ``perimeter``, ``area``, ``compactness``, ``concavity``,
    ``concave_points`` and ``symmetry``: size and form of the contour.

A user-supplied table is grouped by the same keywords found in its column names; a column
matching none goes to ``other`` (only measurement noise and resampling jitter act on it).

Lesion size, used by the covariate shift, is ``feature_mean_radius`` when present.

References
----------
W.N. Street, W.H. Wolberg and O.L. Mangasarian (1993). Nuclear feature extraction for
breast tumor diagnosis. IS&T/SPIE International Symposium on Electronic Imaging: Science
and Technology, vol. 1905, pp. 861-870. DOI: 10.1117/12.148698

W.H. Wolberg, W.N. Street, O.L. Mangasarian (1995). Breast Cancer Wisconsin (Diagnostic).
UCI Machine Learning Repository. DOI: 10.24432/C5DW2B
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import numpy.typing as npt
import pandas as pd

from site_agent.exceptions import InputError

CITATION = (
    "W.N. Street, W.H. Wolberg and O.L. Mangasarian (1993). Nuclear feature extraction for "
    "breast tumor diagnosis. IS&T/SPIE International Symposium on Electronic Imaging: Science "
    "and Technology, vol. 1905, pp. 861-870. Data: Breast Cancer Wisconsin (Diagnostic), "
    "UCI Machine Learning Repository, DOI 10.24432/C5DW2B; copy shipped with scikit-learn "
    "(sklearn.datasets.load_breast_cancer)."
)
FEATURE_PREFIX = "feature_"
SIZE_FEATURE = "feature_mean_radius"

_GROUP_KEYWORDS: dict[str, tuple[str, ...]] = {
    "intensity": ("texture",),
    "texture": ("smoothness", "fractal_dimension"),
    "shape": (
        "radius",
        "perimeter",
        "area",
        "compactness",
        "concave_points",
        "concavity",
        "symmetry",
    ),
}


@dataclass(frozen=True)
class FeatureGroups:
    """Which feature columns each acquisition shift acts on (see the module docstring)."""

    intensity: tuple[str, ...]
    texture: tuple[str, ...]
    shape: tuple[str, ...]
    other: tuple[str, ...] = ()


@dataclass(frozen=True)
class FeatureTable:
    """Cases of a labelled feature table; treat ``features`` as read-only.

    Attributes
    ----------
    features
        One row per case, columns ``feature_<name>`` (floats).
    labels
        0/1 per row, 1 = disease.
    groups
        Feature groups used by the acquisition shifts.
    size_feature
        Column used as lesion size by the covariate shift, or ``None`` if there is none.
    source
        Where the table came from (a citation or a file name).
    """

    features: pd.DataFrame
    labels: npt.NDArray[np.int64]
    groups: FeatureGroups
    size_feature: str | None
    source: str

    @property
    def feature_names(self) -> tuple[str, ...]:
        """Feature column names in table order."""
        return tuple(str(c) for c in self.features.columns)

    @property
    def n_cases(self) -> int:
        """Number of cases."""
        return len(self.labels)

    @property
    def n_positive(self) -> int:
        """Number of cases with label 1 (disease)."""
        return int(self.labels.sum())


def load_public_dataset() -> FeatureTable:
    """Return the WDBC table shipped with scikit-learn, relabelled 1 = malignant.

    References
    ----------
    Street, Wolberg & Mangasarian (1993), SPIE 1905:861-870, DOI 10.1117/12.148698.
    """
    from sklearn.datasets import load_breast_cancer

    bunch = load_breast_cancer(as_frame=True)
    frame = bunch.data.copy()
    frame.columns = [FEATURE_PREFIX + _snake(str(c)) for c in frame.columns]
    labels = (bunch.target.to_numpy() == 0).astype(np.int64)  # sklearn: 0 = malignant
    return _table(frame.astype(np.float64), labels, source=CITATION)


def load_feature_table(path: Path | str, label_column: str = "label") -> FeatureTable:
    """Read a user-supplied table of the same shape: ``feature_*`` columns and a 0/1 label.

    Parameters
    ----------
    path
        A ``.csv`` or ``.parquet`` file.
    label_column
        Column holding 1 = disease, 0 = no disease.

    Raises
    ------
    InputError
        If the file cannot be read, the label column is missing or not 0/1, a class is
        absent, there are no feature columns, or a feature value is missing or non-numeric.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    try:
        if suffix == ".csv":
            raw = pd.read_csv(path)
        elif suffix in (".parquet", ".pq"):
            raw = pd.read_parquet(path)
        else:
            raise InputError(f"feature table {path.name} must be .csv or .parquet")
    except (OSError, ValueError, pd.errors.ParserError) as exc:
        raise InputError(f"cannot read feature table {path.name}") from exc
    if label_column not in raw.columns:
        raise InputError(f"feature table has no label column {label_column!r}")
    labels = pd.to_numeric(raw[label_column], errors="coerce")
    if labels.isna().any() or not labels.isin([0, 1]).all():
        raise InputError(f"label column {label_column!r} must hold only 0 and 1")
    if labels.nunique() < 2:
        raise InputError(f"label column {label_column!r} must hold both classes")
    feature_columns = [c for c in raw.columns if str(c).startswith(FEATURE_PREFIX)]
    if not feature_columns:
        raise InputError(f"feature table has no columns named {FEATURE_PREFIX}<name>")
    features = pd.DataFrame(index=raw.index)
    for column in feature_columns:
        values = pd.to_numeric(raw[column], errors="coerce")
        if not np.all(np.isfinite(values.to_numpy(dtype=np.float64))):
            raise InputError(f"feature column {column!r} has missing or non-numeric values")
        features[str(column)] = values.astype(np.float64)
    return _table(
        features.reset_index(drop=True), labels.to_numpy(dtype=np.int64), source=path.name
    )


def _table(frame: pd.DataFrame, labels: npt.NDArray[np.int64], source: str) -> FeatureTable:
    return FeatureTable(
        features=frame,
        labels=labels,
        groups=_group(tuple(str(c) for c in frame.columns)),
        size_feature=SIZE_FEATURE if SIZE_FEATURE in frame.columns else None,
        source=source,
    )


def _group(columns: tuple[str, ...]) -> FeatureGroups:
    found: dict[str, list[str]] = {name: [] for name in (*_GROUP_KEYWORDS, "other")}
    for column in columns:
        group = next(
            (g for g, words in _GROUP_KEYWORDS.items() if any(w in column for w in words)),
            "other",
        )
        found[group].append(column)
    return FeatureGroups(
        intensity=tuple(found["intensity"]),
        texture=tuple(found["texture"]),
        shape=tuple(found["shape"]),
        other=tuple(found["other"]),
    )


def _snake(name: str) -> str:
    return re.sub(r"[^0-9a-z]+", "_", name.lower()).strip("_")
