"""CSV exports of a study's results, one tidy table per file, for spreadsheets and R.

Every number the HTML report shows is in these files or in ``results.json``. The
helpers that pick a site's headline rows (the AUC with its DeLong interval, the
sensitivity and specificity at the first threshold) live here so that the report and
``sites.csv`` show the same numbers.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pandas as pd

from coordinator.pooling.study_results import (
    MetaRow,
    MetricRow,
    ParticipantFlow,
    StudyResults,
)
from site_agent.statistics.censored import cell_range, class_total, is_censored

HEADLINE_AUC_METHOD = "delong"
"""Interval method of the AUC shown in summaries when a site released several."""

EXPORT_FILES = ("metrics.csv", "meta.csv", "two_by_two.csv", "flow.csv", "sites.csv")
"""Names of the files :func:`write_exports` writes, in order."""


def first_threshold(results: StudyResults) -> float | None:
    """Return the lowest threshold at which any whole-site metric was released."""
    thresholds = [
        r.threshold for r in results.metrics if r.threshold is not None and r.subgroup is None
    ]
    return min(thresholds) if thresholds else None


def find_metric(
    results: StudyResults,
    site: str,
    metric: str,
    *,
    threshold: float | None = None,
    method: str | None = None,
) -> MetricRow | None:
    """Return the whole-site row for ``site`` and ``metric``, or None if none was released.

    When several interval methods were released and ``method`` is not given (or not
    found), the first row in the results wins.
    """
    rows = [
        r
        for r in results.metrics
        if r.site == site and r.metric == metric and r.subgroup is None and r.threshold == threshold
    ]
    preferred = [r for r in rows if r.method == method]
    chosen = preferred or rows
    return chosen[0] if chosen else None


def headline_auc(results: StudyResults, site: str) -> MetricRow | None:
    """Return the site's AUC row, preferring the DeLong interval."""
    return find_metric(results, site, "auc", method=HEADLINE_AUC_METHOD)


def prevalence(flow: ParticipantFlow) -> float:
    """Return positives / (positives + negatives), NaN when there are no cases."""
    cases = flow.positives + flow.negatives
    return flow.positives / cases if cases else float("nan")


def _frame(records: list[Any], model: type[Any]) -> pd.DataFrame:
    return pd.DataFrame([r.model_dump() for r in records], columns=list(model.model_fields))


def metrics_frame(results: StudyResults) -> pd.DataFrame:
    """Return every :class:`MetricRow`, one per line."""
    return _frame(results.metrics, MetricRow)


def meta_frame(results: StudyResults) -> pd.DataFrame:
    """Return every :class:`MetaRow`, one per line."""
    return _frame(results.meta, MetaRow)


def two_by_two_frame(results: StudyResults) -> pd.DataFrame:
    """Return the 2x2 tables, one per site and threshold, with the total ``n``.

    Each cell has its count (empty when censored) and the range it can be
    (``tp_low``, ``tp_high``; equal to the count when it is exact).
    """
    records: list[dict[str, Any]] = []
    for t in results.two_by_two:
        record: dict[str, Any] = {"site": t.site, "threshold": t.threshold}
        for name in ("tp", "fp", "fn", "tn"):
            cell = getattr(t, name)
            low, high = cell_range(cell)
            record[name] = None if is_censored(cell) else low
            record[f"{name}_low"], record[f"{name}_high"] = low, high
        record["n"] = class_total(t.tp, t.fn) + class_total(t.fp, t.tn)
        records.append(record)
    columns = ["site", "threshold", "tp", "fp", "fn", "tn"]
    columns += [f"{c}_{end}" for c in ("tp", "fp", "fn", "tn") for end in ("low", "high")]
    return pd.DataFrame.from_records(records, columns=[*columns, "n"]).astype(
        {c: "Int64" for c in ("tp", "fp", "fn", "tn")}
    )


def flow_frame(results: StudyResults) -> pd.DataFrame:
    """Return the participant flow per site, with the prevalence the report shows."""
    frame = _frame(results.flow, ParticipantFlow)
    frame["prevalence"] = [prevalence(f) for f in results.flow]
    return frame


def sites_frame(results: StudyResults) -> pd.DataFrame:
    """Return one line per site: outcome, role, AUC and first-threshold accuracy."""
    threshold = first_threshold(results)
    cases = {f.site: f.positives + f.negatives for f in results.flow}
    records: list[dict[str, Any]] = []
    for outcome in results.sites:
        record: dict[str, Any] = {
            "site": outcome.site,
            "status": outcome.status,
            "role": outcome.role,
            "reason": outcome.reason,
            "description": outcome.description,
            "n": cases.get(outcome.site),
        }
        auc = headline_auc(results, outcome.site)
        record |= _estimate_columns("auc", auc)
        record["auc_method"] = auc.method if auc else None
        record["threshold"] = threshold
        for metric in ("sensitivity", "specificity"):
            row = find_metric(results, outcome.site, metric, threshold=threshold, method="wilson")
            record |= _estimate_columns(metric, row)
        records.append(record)
    return pd.DataFrame.from_records(records)


def _estimate_columns(prefix: str, row: MetricRow | None) -> dict[str, float | None]:
    """Estimate and interval; for a metric on a censored cell, its range (``_low``, ``_high``).

    A censored estimate has no point value (empty ``prefix`` column); the range of values
    the released counts allow is in ``{prefix}_low`` and ``{prefix}_high`` and the interval
    columns hold the hull of the intervals over that range.
    """
    if row is None:
        return {
            prefix: None,
            f"{prefix}_lower": None,
            f"{prefix}_upper": None,
            f"{prefix}_low": None,
            f"{prefix}_high": None,
        }
    return {
        prefix: row.estimate,
        f"{prefix}_lower": row.lower,
        f"{prefix}_upper": row.upper,
        f"{prefix}_low": row.estimate_low,
        f"{prefix}_high": row.estimate_high,
    }


def write_exports(results: StudyResults, directory: Path) -> list[Path]:
    """Write the CSV exports of ``results`` into ``directory`` (created if missing).

    Parameters
    ----------
    results
        The study results.
    directory
        Folder to write ``metrics.csv``, ``meta.csv``, ``two_by_two.csv``, ``flow.csv``
        and ``sites.csv`` into. Existing files of those names are replaced.

    Returns
    -------
    list of Path
        The files written, in the order of :data:`EXPORT_FILES`.
    """
    directory.mkdir(parents=True, exist_ok=True)
    frames = (
        metrics_frame(results),
        meta_frame(results),
        two_by_two_frame(results),
        flow_frame(results),
        sites_frame(results),
    )
    paths = []
    for name, frame in zip(EXPORT_FILES, frames, strict=True):
        path = directory / name
        frame.to_csv(path, index=False)
        paths.append(path)
    return paths
