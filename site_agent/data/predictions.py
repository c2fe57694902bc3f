"""The site's predictions table: one row per observation, validated once at the entry point.

A site keeps a table of the model's outputs beside the reference standard. Columns:

``case_id``
    Unique identifier of the observation (an image, a study, a lesion).
``patient_id``
    The patient the observation belongs to; several observations may share a patient.
``label``
    Reference standard: ``1`` disease, ``0`` no disease, empty while it is pending.
``score``
    The model's probability of disease, a number in [0, 1].
``category`` (optional)
    The model's ordinal output (for example 1 to 5); may be empty.
``reader_*`` (optional)
    Readers' calls, binary (0/1) or ordinal non-negative integers; may be empty.
``acquired_on`` (optional)
    ISO 8601 acquisition date; may be empty.
``feature_*`` (optional)
    Model input features for a site that runs the model locally; never case attributes.
``image`` (optional)
    Path of the case's image (see :mod:`site_agent.data.images`); never a case attribute.

Every other column is a case attribute usable for subgroups (``scanner_vendor``, ``sex``...).

Validation raises :class:`~site_agent.exceptions.PredictionsError` naming the 1-based
data row and the column. Messages never quote a value from the table.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import date, datetime
from pathlib import Path
from types import MappingProxyType

import numpy as np
import numpy.typing as npt
import pandas as pd

from site_agent.exceptions import PredictionsError

REQUIRED_COLUMNS: tuple[str, ...] = ("case_id", "patient_id", "label", "score")
READER_PREFIX = "reader_"
FEATURE_PREFIX = "feature_"
CATEGORY_COLUMN = "category"
DATE_COLUMN = "acquired_on"
IMAGE_COLUMN = "image"
PENDING = -1
"""Value of :attr:`Predictions.label` for a case whose reference standard is pending."""
MISSING = -1
"""Value of an ordinal call (``category``, ``reader_*``) that was not recorded."""
MISSING_LEVEL = "(not recorded)"
"""Attribute level given to a case whose attribute cell is empty."""

_SUFFIXES = {".csv": "csv", ".parquet": "parquet", ".pq": "parquet"}

IntArray = npt.NDArray[np.int64]
FloatArray = npt.NDArray[np.float64]
StrArray = npt.NDArray[np.object_]


@dataclass(frozen=True, eq=False)
class Predictions:
    """A validated predictions table held as typed column arrays of equal length.

    Build it with :func:`validate_predictions` or :func:`load_predictions`; the
    constructor assumes valid input.
    """

    case_id: StrArray
    patient_id: StrArray
    label: IntArray
    """1 disease, 0 no disease, :data:`PENDING` (-1) reference standard pending."""
    score: FloatArray
    category: IntArray | None = None
    """Ordinal model output, :data:`MISSING` (-1) where not recorded; None without the column."""
    readers: Mapping[str, IntArray] = field(default_factory=lambda: MappingProxyType({}))
    """Readers' calls by column name, :data:`MISSING` (-1) where not recorded."""
    acquired_on: npt.NDArray[np.datetime64] | None = None
    attributes: Mapping[str, StrArray] = field(default_factory=lambda: MappingProxyType({}))
    """Case attributes by column name; empty cells hold :data:`MISSING_LEVEL`."""
    features: Mapping[str, FloatArray] = field(default_factory=lambda: MappingProxyType({}))

    def __len__(self) -> int:
        return int(self.score.shape[0])

    @property
    def labelled(self) -> npt.NDArray[np.bool_]:
        """Mask of cases whose reference standard is known."""
        return np.asarray(self.label != PENDING, dtype=bool)

    @property
    def reader_names(self) -> tuple[str, ...]:
        """Reader column names in table order."""
        return tuple(self.readers)

    def subset(self, mask: npt.NDArray[np.bool_]) -> Predictions:
        """Return the cases where ``mask`` is true, keeping every column."""
        return Predictions(
            case_id=self.case_id[mask],
            patient_id=self.patient_id[mask],
            label=self.label[mask],
            score=self.score[mask],
            category=None if self.category is None else self.category[mask],
            readers=MappingProxyType({k: v[mask] for k, v in self.readers.items()}),
            acquired_on=None if self.acquired_on is None else self.acquired_on[mask],
            attributes=MappingProxyType({k: v[mask] for k, v in self.attributes.items()}),
            features=MappingProxyType({k: v[mask] for k, v in self.features.items()}),
        )


def read_table(path: Path | str) -> pd.DataFrame:
    """Read a CSV or Parquet table, chosen by the file suffix.

    CSV cells are read as text (empty cells stay empty strings) so that validation
    sees exactly what the file holds.

    Raises
    ------
    PredictionsError
        The file is missing or unreadable, its suffix is unknown, or it is empty.
    """
    path = Path(path)
    kind = _SUFFIXES.get(path.suffix.lower())
    if kind is None:
        raise PredictionsError(
            f"cannot read {path.name}: unknown suffix (use one of {', '.join(sorted(_SUFFIXES))})"
        )
    if not path.is_file():
        raise PredictionsError(f"predictions file not found: {path}")
    try:
        if kind == "csv":
            if path.stat().st_size == 0:
                raise PredictionsError(f"predictions file is empty: {path.name}")
            return pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True)
        return pd.read_parquet(path)
    except PredictionsError:
        raise
    except pd.errors.EmptyDataError as exc:
        raise PredictionsError(f"predictions file is empty: {path.name}") from exc
    except (OSError, ValueError, pd.errors.ParserError) as exc:
        raise PredictionsError(f"cannot parse predictions file {path.name}") from exc


def load_predictions(path: Path | str) -> Predictions:
    """Read and validate a predictions table (see :func:`read_table`)."""
    return validate_predictions(read_table(path))


def validate_predictions(frame: pd.DataFrame) -> Predictions:
    """Check a predictions table and return its typed columns.

    Raises
    ------
    PredictionsError
        On the first defect found, naming the 1-based data row and the column.
    """
    columns = [str(c) for c in frame.columns]
    if len(set(columns)) != len(columns):
        dup = next(c for c in columns if columns.count(c) > 1)
        raise PredictionsError("column appears more than once", column=dup)
    frame = frame.set_axis(columns, axis=1)
    for name in REQUIRED_COLUMNS:
        if name not in frame.columns:
            raise PredictionsError("required column is missing", column=name)
    if len(frame) == 0:
        raise PredictionsError("predictions table has no rows")

    case_id = _identifiers(frame, "case_id")
    _no_duplicates(case_id)
    patient_id = _identifiers(frame, "patient_id")
    label = _labels(frame)
    score = _scores(frame)
    category = _calls(frame, CATEGORY_COLUMN) if CATEGORY_COLUMN in frame.columns else None
    readers = {c: _calls(frame, c) for c in columns if c.startswith(READER_PREFIX)}
    acquired_on = _dates(frame) if DATE_COLUMN in frame.columns else None
    features = {c: _features(frame, c) for c in columns if c.startswith(FEATURE_PREFIX)}
    reserved = set(REQUIRED_COLUMNS) | {CATEGORY_COLUMN, DATE_COLUMN, IMAGE_COLUMN}
    attributes = {
        c: _attribute(frame, c)
        for c in columns
        if c not in reserved and not c.startswith((READER_PREFIX, FEATURE_PREFIX))
    }
    return Predictions(
        case_id=case_id,
        patient_id=patient_id,
        label=label,
        score=score,
        category=category,
        readers=MappingProxyType(readers),
        acquired_on=acquired_on,
        attributes=MappingProxyType(attributes),
        features=MappingProxyType(features),
    )


# Private helpers below assume the column exists and the frame has at least one row.


def _empty_mask(values: pd.Series) -> npt.NDArray[np.bool_]:
    """Mark cells that are missing or blank text."""
    is_na = values.isna().to_numpy(dtype=bool)
    text = values.astype(object).map(lambda v: isinstance(v, str) and v.strip() == "")
    return np.asarray(is_na | text.to_numpy(dtype=bool), dtype=bool)


def _numbers(values: pd.Series) -> tuple[FloatArray, npt.NDArray[np.bool_]]:
    """Return the column as floats (NaN where not a number) and its empty-cell mask."""
    empty = _empty_mask(values)
    as_text = values.astype(object).map(lambda v: v.strip() if isinstance(v, str) else v)
    numbers = pd.to_numeric(as_text.where(~empty, None), errors="coerce")
    return np.asarray(numbers, dtype=np.float64), empty


def _first(mask: npt.NDArray[np.bool_]) -> int:
    """Return the 1-based data row of the first true entry."""
    return int(np.flatnonzero(mask)[0]) + 1


def _identifiers(frame: pd.DataFrame, column: str) -> StrArray:
    values = frame[column]
    empty = _empty_mask(values)
    if empty.any():
        raise PredictionsError("identifier must not be empty", row=_first(empty), column=column)
    text = values.astype(object).map(lambda v: str(v).strip())
    return np.asarray(text.to_numpy(), dtype=object)


def _no_duplicates(case_id: StrArray) -> None:
    seen: dict[str, int] = {}
    for row, value in enumerate(case_id, start=1):
        if value in seen:
            raise PredictionsError(
                f"duplicate case id (same as row {seen[value]})", row=row, column="case_id"
            )
        seen[value] = row


def _labels(frame: pd.DataFrame) -> IntArray:
    numbers, empty = _numbers(frame["label"])
    bad = ~empty & ~np.isin(numbers, (0.0, 1.0))
    if bad.any():
        raise PredictionsError(
            "label must be 1 (disease), 0 (no disease) or empty (pending)",
            row=_first(bad),
            column="label",
        )
    out = np.full(numbers.shape, PENDING, dtype=np.int64)
    out[~empty] = numbers[~empty].astype(np.int64)
    return out


def _scores(frame: pd.DataFrame) -> FloatArray:
    numbers, empty = _numbers(frame["score"])
    with np.errstate(invalid="ignore"):
        bad = empty | ~np.isfinite(numbers) | (numbers < 0.0) | (numbers > 1.0)
    if bad.any():
        raise PredictionsError("score must be a number in [0, 1]", row=_first(bad), column="score")
    return numbers


def _calls(frame: pd.DataFrame, column: str) -> IntArray:
    numbers, empty = _numbers(frame[column])
    with np.errstate(invalid="ignore"):
        bad = ~empty & (~np.isfinite(numbers) | (numbers < 0) | (numbers != np.round(numbers)))
    if bad.any():
        raise PredictionsError(
            "call must be a non-negative integer or empty", row=_first(bad), column=column
        )
    out = np.full(numbers.shape, MISSING, dtype=np.int64)
    out[~empty] = numbers[~empty].astype(np.int64)
    return out


def _dates(frame: pd.DataFrame) -> npt.NDArray[np.datetime64]:
    values = frame[DATE_COLUMN]
    empty = _empty_mask(values)
    parsed = np.full(len(values), np.datetime64("NaT"), dtype="datetime64[D]")
    for row in np.flatnonzero(~empty):
        day = _iso_date(values.iloc[row])
        if day is None:
            raise PredictionsError(
                "date must be an ISO 8601 date (YYYY-MM-DD) or empty",
                row=int(row) + 1,
                column=DATE_COLUMN,
            )
        parsed[row] = np.datetime64(day, "D")
    return parsed


def _iso_date(value: object) -> date | None:
    """Return the date of an ISO 8601 text or a date-like cell, None if it is neither."""
    if isinstance(value, datetime):
        return value.date()
    if isinstance(value, date):
        return value
    if isinstance(value, str):
        try:
            return datetime.fromisoformat(value.strip()).date()
        except ValueError:
            return None
    return None


def _features(frame: pd.DataFrame, column: str) -> FloatArray:
    numbers, empty = _numbers(frame[column])
    bad = empty | ~np.isfinite(numbers)
    if bad.any():
        raise PredictionsError("feature must be a finite number", row=_first(bad), column=column)
    return numbers


def _attribute(frame: pd.DataFrame, column: str) -> StrArray:
    values = frame[column]
    empty = _empty_mask(values)
    text = values.astype(object).map(lambda v: str(v).strip())
    out = np.asarray(text.to_numpy(), dtype=object)
    out[empty] = MISSING_LEVEL
    return out
