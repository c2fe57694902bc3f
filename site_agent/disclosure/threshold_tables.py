"""Agreement tables of the model at several thresholds: no small cell by differencing.

A protocol with thresholds ``t₁ < t₂ < …`` makes a site release, for each reader, one
2×2 agreement table of the model called positive at each threshold (``model@t``) against
the reader. Every case the model calls positive at ``t₂`` it also calls positive at
``t₁``, so for each reader call ``j``::

    counts_t₁[1][j] − counts_t₂[1][j] = cases with a score in [t₁, t₂) that the reader called j

Each table can pass the minimum-cell rule on its own while that difference is 1 to m−1:
two released tables then isolate a handful of cases by their score band and reader call.
This module withholds whole tables until no difference between two released tables of
one reader is small. Kept tables are walked in order of threshold; a table joins only if
its difference to the last kept table is 0 or at least ``m`` in every reader column.
Differences are non-negative and add up along the thresholds, so a sum of differences
that are each 0 or at least ``m`` is itself 0 or at least ``m``: every pair of kept tables,
adjacent or not, passes. Withholding a whole table (rather than one cell of it) is
complementary suppression across tables (common practice in statistical disclosure
control: Hundepool A et al. (2012), Statistical Disclosure Control, Wiley, chapter 4,
secondary cell suppression and linked tables).

The check runs on the counts as computed, before the per-table cell rule: whatever that
rule later zeroes, the differences between the released tables' true counts are safe.
"""

from __future__ import annotations

from collections.abc import Sequence

from site_agent.statistics.summaries import AgreementTable, model_rater


def _ok(value: int, min_cell: int) -> bool:
    return value == 0 or value >= min_cell


def _positive_row(table: AgreementTable) -> tuple[int, ...]:
    """Cases the model called positive, by the other rater's call (row 1 of a 2×2 table)."""
    return table.exact_counts()[1]


def differencing_tables(
    tables: Sequence[AgreementTable], thresholds: Sequence[float], min_cell: int
) -> set[int]:
    """Return the indices of model-at-threshold tables to withhold (see the module docstring).

    Parameters
    ----------
    tables
        A release's agreement tables, in release order.
    thresholds
        The protocol's thresholds (``model@t`` rater names are built from them).
    min_cell
        The site's minimum cell size.
    """
    by_reader: dict[str, list[tuple[float, int]]] = {}
    names = {model_rater(t): t for t in thresholds}
    for index, table in enumerate(tables):
        first, second = table.raters
        if first in names and table.scale == "binary":
            by_reader.setdefault(second, []).append((names[first], index))
    withheld: set[int] = set()
    for family in by_reader.values():
        kept: AgreementTable | None = None
        for _, index in sorted(family):
            table = tables[index]
            if kept is not None:
                differences = (
                    a - b for a, b in zip(_positive_row(kept), _positive_row(table), strict=True)
                )
                if not all(_ok(d, min_cell) for d in differences):
                    withheld.add(index)
                    continue
            kept = table
    return withheld
