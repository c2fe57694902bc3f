"""Benchmark: cost of the disclosure step when a release carries many cuts on the score axis.

Times :func:`site_agent.disclosure.small_cells.apply_policy` (whose partition rule,
:mod:`site_agent.disclosure.partition`, reduces every threshold and bin edge of a release
to one partition) on the Northgate demo table (``examples/northgate_predictions.csv``,
invented data) with 10 and 99 thresholds between neighbouring scores, 100 histogram bins,
with and without a subgroup attribute, for both small-cell policies. Medians of 5 runs.

Run with ``python -m simulations.benchmarks.disclosure_partition``. Figures vary with the
machine and its load.
"""

from __future__ import annotations

import itertools
import statistics
import time
from pathlib import Path

import numpy as np

from site_agent.contract.protocol import EvaluationPlan, uniform_edges
from site_agent.data.predictions import load_predictions
from site_agent.disclosure.policy import SitePolicy, SmallCellAction
from site_agent.disclosure.small_cells import apply_policy
from site_agent.evaluation import evaluate_site

EXAMPLE = Path(__file__).resolve().parents[2] / "examples" / "northgate_predictions.csv"


def _thresholds(scores: np.ndarray, count: int) -> tuple[float, ...]:
    distinct = np.unique(scores)
    middle = len(distinct) // 2 - count // 2
    chosen = distinct[middle : middle + count + 1]
    return tuple(float(round((a + b) / 2, 6)) for a, b in itertools.pairwise(chosen))


def main() -> None:
    """Print one line per configuration: thresholds, subgroups, policy, median seconds."""
    predictions = load_predictions(EXAMPLE)
    for count, subgroups, action in itertools.product(
        (10, 99), ((), ("sex",)), (SmallCellAction.SUPPRESS, SmallCellAction.MERGE)
    ):
        plan = EvaluationPlan(
            thresholds=_thresholds(predictions.score, count),
            histogram_edges=uniform_edges(100),
            subgroups=subgroups,
        )
        release = evaluate_site(predictions, plan, site="northgate", protocol_hash="unregistered")
        policy = SitePolicy(min_cell=5, small_cells=action, allowed_subgroup_attributes=("sex",))
        times = []
        for _ in range(5):
            start = time.perf_counter()
            _, note = apply_policy(release, policy)
            times.append(time.perf_counter() - start)
        print(
            f"thresholds={count:3d} subgroups={len(subgroups)} policy={action.value:8s} "
            f"median={statistics.median(times):.3f}s "
            f"cuts withheld (positive, negative)="
            f"({len(note.positive_cuts_withheld)}, {len(note.negative_cuts_withheld)})"
        )


if __name__ == "__main__":
    main()
