"""Table cells of the report: a value the site did not release is never shown as a number."""

from __future__ import annotations

import math

from coordinator.pooling.study_results import MetricRow
from coordinator.report.html_parts import estimate_cell


def _censored(low: float, high: float) -> MetricRow:
    return MetricRow(
        site="Fernbrook",
        metric="sensitivity",
        method="wilson",
        estimate=math.nan,
        lower=max(0.0, low - 0.05),
        upper=min(1.0, high + 0.05),
        threshold=0.5,
        estimate_low=low,
        estimate_high=high,
    )


def test_a_range_that_bounds_something_is_shown_as_a_range() -> None:
    """Sensitivity known to lie in 0.79-0.87: both ends are printed, with the reason."""
    html = estimate_cell(_censored(0.793, 0.867))

    assert "79.3%" in html and "86.7%" in html and "range" in html


def test_a_range_over_the_whole_unit_interval_reads_not_released() -> None:
    """0% to 100% bounds nothing: the cell says 'not released: site policy', no number."""
    html = estimate_cell(_censored(0.0, 1.0))

    assert "not released: site policy" in html
    assert "%" not in html
