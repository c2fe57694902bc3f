"""Benchmark: wall time of a planning grid of 5 site counts x 5 case counts x 200 replicates.

Runs :func:`simulations.planning.plan_grid` with the default grid (3, 5, 8, 12, 20 sites x
50, 100, 200, 400, 800 cases per site), 200 replicates per design, on ``--workers``
processes (2 by default, the machine's cores), and prints the wall time, the replicates
per second and the time of the slowest design. The target is under 2 minutes on 2 cores;
figures vary with the machine and its load, the README quotes one run. Timing lives here,
never in tests.

Run: ``python -m simulations.benchmarks.planning [--workers N] [--replicates R]``.
Invented data; sitepool is a research tool, not a medical device.
"""

from __future__ import annotations

import argparse
import os
import time

from simulations.planning import DEFAULT_REPLICATES, PlanSettings, plan_grid
from site_agent.notices import RESEARCH_NOTICE

TARGET_SECONDS = 120.0


def main(argv: list[str] | None = None) -> None:
    """Time the default planning grid and print the figures."""
    parser = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    parser.add_argument("--workers", type=int, default=min(2, os.cpu_count() or 1))
    parser.add_argument("--replicates", type=int, default=DEFAULT_REPLICATES)
    args = parser.parse_args(argv)
    settings = PlanSettings(replicates=args.replicates)
    designs = len(settings.site_counts) * len(settings.cases_per_site)
    stamps: list[float] = []
    started = time.perf_counter()
    plan_grid(
        settings,
        workers=args.workers,
        progress=lambda _: stamps.append(time.perf_counter() - started),
    )
    seconds = time.perf_counter() - started
    total = designs * settings.replicates
    print(
        f"{len(settings.site_counts)} site counts x {len(settings.cases_per_site)} case counts "
        f"x {settings.replicates} replicates on {args.workers} process(es): {seconds:.1f} s "
        f"({total / seconds:.0f} replicates/s; target < {TARGET_SECONDS:.0f} s: "
        f"{'met' if seconds < TARGET_SECONDS else 'NOT met'})"
    )
    gaps = [b - a for a, b in zip([0.0, *stamps], stamps, strict=False)]
    print(f"longest wait between finished designs: {max(gaps):.1f} s")
    print(RESEARCH_NOTICE)


if __name__ == "__main__":
    main()
