"""Read per-site results that come from elsewhere, ready for meta-analysis.

Some sites never run the site agent: their results come from a publication or are
reported by hand. A CSV or Parquet file with one row per site gives them, in one of
three layouts (column names are case-insensitive):

- ``site, estimate, se`` or ``site, estimate, variance``: estimates already on the
  scale to be pooled (analysed as given);
- ``site, auc, auc_se``: AUCs, pooled on the logit scale with delta-method variances;
- ``site, tp, fp, fn, tn``: 2x2 counts at one threshold; the measure to pool is
  sensitivity or specificity (logit scale) or the diagnostic odds ratio (log scale).

Every problem is reported as an :class:`~site_agent.exceptions.InputError` naming the
1-based data row (header not counted) and the column. Values from the file are never
echoed in messages.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

import pandas as pd

from coordinator.pooling.effect_sizes import (
    EffectSizes,
    Transform,
    log_diagnostic_odds_ratio,
    logit_auc,
    logit_sensitivity,
    logit_specificity,
)
from site_agent.exceptions import InputError

Measure = Literal["estimate", "auc", "sensitivity", "specificity", "dor"]
MEASURES: tuple[Measure, ...] = ("estimate", "auc", "sensitivity", "specificity", "dor")
COUNT_COLUMNS = ("tp", "fp", "fn", "tn")
_LAYOUTS = "'estimate' with 'se' or 'variance', 'auc' with 'auc_se', or 'tp', 'fp', 'fn', 'tn'"


@dataclass(frozen=True, slots=True)
class SiteInputs:
    """Per-site values read from a file, on the scale they will be pooled on.

    Parameters
    ----------
    labels
        Site names, in file order.
    estimates, variances
        One value per site, on the scale named by ``transform``.
    measure
        What was pooled: ``estimate`` (as given), ``auc``, ``sensitivity``,
        ``specificity`` or ``dor`` (diagnostic odds ratio).
    transform
        Scale of ``estimates``: ``identity``, ``logit`` or ``log``.
    notes
        What was done to the values (transforms, continuity corrections, exclusions).
    """

    labels: tuple[str, ...]
    estimates: tuple[float, ...]
    variances: tuple[float, ...]
    measure: Measure
    transform: Transform
    notes: tuple[str, ...]


def read_site_results(path: str | Path, *, measure: Measure | None = None) -> SiteInputs:
    """Read a CSV (``.csv``) or Parquet (``.parquet``, ``.pq``) file of per-site results.

    Parameters
    ----------
    path
        The file to read.
    measure
        What to pool. ``None`` picks ``estimate`` or ``auc`` from the columns present;
        2x2 counts need an explicit ``sensitivity``, ``specificity`` or ``dor``.

    Raises
    ------
    InputError
        Unreadable file, missing columns, non-numeric or empty cells, invalid values,
        duplicate site names, or fewer than two usable sites.
    """
    file = Path(path)
    suffix = file.suffix.lower()
    if not file.is_file():
        raise InputError(f"no such file: {file.name}")
    try:
        if suffix == ".csv":
            frame = pd.read_csv(file, dtype=str, keep_default_na=False)
        elif suffix in (".parquet", ".pq"):
            frame = pd.read_parquet(file)
        else:
            raise InputError(f"unsupported file type {suffix!r}: use .csv or .parquet")
    except InputError:
        raise
    except Exception as exc:  # pandas and pyarrow raise many types for unreadable files
        raise InputError(f"cannot read {file.name}: {type(exc).__name__}") from exc
    return site_inputs_from_frame(frame, measure=measure)


def site_inputs_from_frame(frame: pd.DataFrame, *, measure: Measure | None = None) -> SiteInputs:
    """Validate a table of per-site results and put it on its pooling scale.

    See :func:`read_site_results` for the layouts and errors.
    """
    table = frame.rename(columns=lambda c: str(c).strip().lower())
    columns = set(table.columns)
    if "site" not in columns:
        raise InputError("missing column 'site'")
    chosen = measure if measure is not None else _infer_measure(columns)
    _require_columns(columns, chosen)
    labels = _site_labels(table)

    if chosen == "estimate":
        estimate = _numbers(table, "estimate")
        if "se" in columns and "variance" in columns:
            raise InputError("give either column 'se' or column 'variance', not both")
        spread = "se" if "se" in columns else "variance"
        values = _numbers(table, spread)
        _check_rows(values, spread, lambda x: x > 0, "must be positive")
        variances = [x**2 for x in values] if spread == "se" else values
        sizes = EffectSizes(tuple(estimate), tuple(variances), "identity")
        return _finish(labels, sizes, "estimate", ())
    if chosen == "auc":
        auc = _numbers(table, "auc")
        se = _numbers(table, "auc_se")
        _check_rows(auc, "auc", lambda x: 0 < x < 1, "must lie strictly between 0 and 1")
        _check_rows(se, "auc_se", lambda x: x > 0, "must be positive")
        return _finish(labels, logit_auc(auc, se), "auc", ())

    counts = {name: _numbers(table, name) for name in COUNT_COLUMNS}
    for name, values in counts.items():
        _check_rows(values, name, lambda x: x >= 0 and x == int(x), "must be a whole number >= 0")
    keep, excluded = _usable_rows(counts, chosen, labels)
    if len(keep) < 2:
        raise InputError(f"a meta-analysis needs at least two usable sites, got {len(keep)}")
    picked = {name: [values[i] for i in keep] for name, values in counts.items()}
    if chosen == "sensitivity":
        sizes = logit_sensitivity(picked["tp"], picked["fn"])
    elif chosen == "specificity":
        sizes = logit_specificity(picked["tn"], picked["fp"])
    else:
        sizes = log_diagnostic_odds_ratio(picked["tp"], picked["fp"], picked["fn"], picked["tn"])
    return _finish(tuple(labels[i] for i in keep), sizes, chosen, excluded)


def _infer_measure(columns: set[str]) -> Measure:
    if "estimate" in columns:
        return "estimate"
    if "auc" in columns:
        return "auc"
    if columns >= set(COUNT_COLUMNS):
        raise InputError(
            "the file holds 2x2 counts: choose the measure to pool "
            "(sensitivity, specificity or dor)"
        )
    raise InputError(f"no known layout: expected columns {_LAYOUTS}")


def _require_columns(columns: set[str], measure: Measure) -> None:
    needed: dict[Measure, tuple[str, ...]] = {
        "estimate": ("estimate",),
        "auc": ("auc", "auc_se"),
        "sensitivity": COUNT_COLUMNS,
        "specificity": COUNT_COLUMNS,
        "dor": COUNT_COLUMNS,
    }
    missing = [repr(c) for c in needed[measure] if c not in columns]
    if measure == "estimate" and not {"se", "variance"} & columns:
        missing.append("'se' or 'variance'")
    if missing:
        raise InputError(f"measure '{measure}' needs missing column(s) {', '.join(missing)}")


def _site_labels(table: pd.DataFrame) -> list[str]:
    labels: list[str] = []
    for row, raw in enumerate(table["site"], start=1):
        label = "" if raw is None or (isinstance(raw, float) and math.isnan(raw)) else str(raw)
        label = label.strip()
        if not label:
            raise InputError(f"row {row}, column 'site': empty site name")
        if label in labels:
            raise InputError(f"row {row}, column 'site': duplicate site name")
        labels.append(label)
    if len(labels) < 2:
        raise InputError(f"a meta-analysis needs at least two sites, got {len(labels)}")
    return labels


def _numbers(table: pd.DataFrame, column: str) -> list[float]:
    values: list[float] = []
    for row, raw in enumerate(table[column], start=1):
        text = raw.strip() if isinstance(raw, str) else raw
        if text is None or text == "" or (isinstance(text, float) and math.isnan(text)):
            raise InputError(f"row {row}, column {column!r}: empty cell")
        try:
            value = float(text)
        except (TypeError, ValueError):
            raise InputError(f"row {row}, column {column!r}: not a number") from None
        if not math.isfinite(value):
            raise InputError(f"row {row}, column {column!r}: not a finite number")
        values.append(value)
    return values


def _check_rows(values: list[float], column: str, ok: Callable[[float], bool], rule: str) -> None:
    for row, value in enumerate(values, start=1):
        if not ok(value):
            raise InputError(f"row {row}, column {column!r}: {rule}")


def _usable_rows(
    counts: dict[str, list[float]], measure: Measure, labels: list[str]
) -> tuple[list[int], tuple[str, ...]]:
    """Rows where the measure is defined; the others are excluded with a stated reason."""
    pairs = {"sensitivity": (("tp", "fn"),), "specificity": (("tn", "fp"),)}
    needed = pairs.get(measure, (("tp", "fn"), ("tn", "fp")))
    keep: list[int] = []
    excluded: list[str] = []
    for i, label in enumerate(labels):
        empty = [f"{a} + {b}" for a, b in needed if counts[a][i] + counts[b][i] == 0]
        if empty:
            excluded.append(f"site {label!r} excluded: {' and '.join(empty)} is 0")
        else:
            keep.append(i)
    return keep, tuple(excluded)


def _finish(
    labels: list[str] | tuple[str, ...],
    sizes: EffectSizes,
    measure: Measure,
    excluded: tuple[str, ...],
) -> SiteInputs:
    return SiteInputs(
        labels=tuple(labels),
        estimates=sizes.estimates,
        variances=sizes.variances,
        measure=measure,
        transform=sizes.transform,
        notes=sizes.notes + excluded,
    )
