"""Benchmark of score resolution: what released bins cost the AUCs, on the default rehearsal.

Run with ``python -m simulations.benchmarks.resolution [--scales logit80,uniform40]``.
For each score scale it runs the default rehearsal scenario (invented hospitals, in-process
engine) and prints, per site, the exact AUC, the AUC from the site's released (merged)
bins, their distance, the ROC points the released bins give; and, for all cases as one
cohort, the estimate from released bins, its worst-case binning bound, the true value
computed from every simulated case (simulation only: no study can know it) and the error.
"ROC pts" counts the distinct points of a site's curve (at every edge of either class);
"exact pts" those that rest on released counts of both classes.

Targets (issue 12): every site within 0.01, one-cohort bound <= 0.02, one-cohort actual
error <= 0.002. The table says which hold. Figures belong in the README, never in tests.
"""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

from simulations.rehearsal import HISTOGRAM_BINS, rehearse
from simulations.scenario import default_scenario
from site_agent.contract.protocol import uniform_edges
from site_agent.contract.score_scales import logit_edges
from site_agent.disclosure.policy import DEFAULT_MIN_CELL
from site_agent.notices import RESEARCH_NOTICE

SITE_TOLERANCE = 0.01
BOUND_TARGET = 0.02
ERROR_TARGET = 0.002

SCALES: dict[str, tuple[float, ...] | None] = {
    **{f"logit{n}": logit_edges(n) for n in sorted({80, HISTOGRAM_BINS, 320})},
    "devquantiles": None,
    "uniform40": uniform_edges(40),
    "uniform100": uniform_edges(100),
}
"""Score scales the benchmark can compare: the default, the development site's training
score quantiles (None: computed in the rehearsal), and equal bins on [0, 1]."""


def _verdict(ok: bool) -> str:
    return "meets" if ok else "MISSES"


def run_scale(name: str, edges: tuple[float, ...] | None, work: Path) -> None:
    """Rehearse the default scenario with ``edges`` and print the table for it."""
    output = rehearse(
        default_scenario(),
        work / name,
        histogram_edges=edges,
        score_bins="logit" if edges is not None else "development-quantiles",
    )
    results = output.results
    print(f"\n== {name} ==")
    print(f"{'site':<28} {'exact':>7} {'bins':>7} {'|diff|':>7} {'ROC pts':>7} {'exact pts':>9}")
    worst = 0.0
    for site in results.sites:
        rows = {
            m.method: m
            for m in results.metrics
            if m.site == site.site and m.metric == "auc" and m.subgroup is None
        }
        if "delong" not in rows or "histogram" not in rows:
            continue
        diff = abs(rows["histogram"].estimate - rows["delong"].estimate)
        worst = max(worst, diff)
        roc = [c for c in results.curves if c.site == site.site and c.kind == "roc"]
        points = len(set(zip(roc[0].x, roc[0].y, strict=True))) if roc else 0
        flags = (roc[0].exact or []) if roc else []
        exact = len({(x, y) for x, y, e in zip(roc[0].x, roc[0].y, flags, strict=True) if e})
        print(
            f"{site.site:<28} {rows['delong'].estimate:7.4f} "
            f"{rows['histogram'].estimate:7.4f} {diff:7.4f} {points:7d} {exact:9d}"
        )
    print(f"worst site distance {worst:.4f}: {_verdict(worst <= SITE_TOLERANCE)} <= 0.01")
    for check in results.simulation_checks:
        bound = check.bound if check.bound is not None else float("nan")
        print(
            f"one cohort: estimate {check.estimate:.4f}, bound ±{bound:.4f} "
            f"({_verdict(bound <= BOUND_TARGET)} <= {BOUND_TARGET}), "
            f"true {check.true_value:.4f} (simulation only), error {check.error:+.4f} "
            f"({_verdict(abs(check.error) <= ERROR_TARGET)} <= {ERROR_TARGET})"
        )


def range_half_widths(edges: tuple[float, ...], work: Path) -> None:
    """Print the half-width of the one-cohort AUC range: released bins, and coordinated bins.

    Runs the default scenario's evaluation round again and takes, over every pair of cases
    from two different sites, the share of pairs whose bins overlap, halved (the
    within-site pairs are exact): the bound a midpoint estimate would carry. Beside it,
    the half-width if every site had placed its cuts knowing every other site's scores
    (:mod:`simulations.benchmarks.coordinated_bins`; simulation only), at the default
    minimum cell and at 3.
    """
    from coordinator.runs.engines import run_study
    from simulations.benchmarks.coordinated_bins import coordinated_half_width
    from simulations.rehearsal import prepare_study
    from simulations.simulation_truth import site_scores
    from site_agent.statistics.roc import mixed_histogram_auc

    study = prepare_study(default_scenario(), work / "parts", histogram_edges=edges)
    outcome = run_study(
        study.protocol, study.bundle_path, study.settings, engine="inprocess", workdir=work
    )
    stats = [r.statistics for r in outcome.rounds[-1].releases.values()]
    positives = [s.class_bins("positive") for s in stats]
    negatives = [s.class_bins("negative") for s in stats]
    big_p = sum(s.n_positive for s in stats)
    big_n = sum(s.n_negative for s in stats)
    total = 0.0
    for i, pos in enumerate(positives):
        for j, neg in enumerate(negatives):
            if i != j and stats[i].n_positive and stats[j].n_negative:
                pair = mixed_histogram_auc(pos, neg)
                total += pair.bound * pair.n_positive * pair.n_negative
    half = total / (big_p * big_n)
    print(f"half-width of the one-cohort AUC range the released bins allow {half:.4f}")
    scores = site_scores(study.bundle_path, study.protocol, study.settings)
    for min_cell in (DEFAULT_MIN_CELL, 3):
        print(
            f"the same, bins placed knowing every site's scores (simulation only), "
            f"minimum cell {min_cell}: {coordinated_half_width(scores, edges, min_cell):.4f}"
        )


def main() -> None:
    """Run the benchmark and print its tables."""
    parser = argparse.ArgumentParser(description=f"Score resolution benchmark. {RESEARCH_NOTICE}")
    parser.add_argument(
        "--scales",
        default=f"logit{HISTOGRAM_BINS},uniform40",
        help=f"Comma-separated scales from: {', '.join(SCALES)}.",
    )
    args = parser.parse_args()
    names = [s.strip() for s in args.scales.split(",") if s.strip()]
    unknown = [n for n in names if n not in SCALES]
    if unknown:
        parser.error(f"unknown scale(s): {', '.join(unknown)}")
    with tempfile.TemporaryDirectory() as tmp:
        for name in names:
            run_scale(name, SCALES[name], Path(tmp))
        first = SCALES[names[0]]
        if first is not None:
            print(f"\n{names[0]}:")
            range_half_widths(first, Path(tmp) / "parts")
    print(f"\n{RESEARCH_NOTICE}")


if __name__ == "__main__":
    main()
