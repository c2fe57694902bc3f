"""Label-based drift of one site: CUSUM and EWMA charts on its accuracy, window by window.

Sensitivity and specificity at one threshold (successes out of trials; pending labels are
in neither) run through standardized binomial CUSUM and EWMA charts
(:mod:`coordinator.monitoring.control_charts`), and each window's AUC through self-starting
CUSUM and EWMA charts (Hawkins 1987), whose in-control mean and spread are re-estimated from
the windows before each one. Proportion targets come from the baseline windows' pooled
proportion (Jones, Champ & Rigdon 2004 on estimated targets). Charts watch
for a fall (``side="lower"``) and start after the baseline.

A site's disclosure step may censor a small confusion cell; :func:`usable_counts` then
drops the proportion resting on it for that window.

References
----------
Hawkins DM (1987). Self-starting CUSUM charts for location and scale. The Statistician
36:299–316. doi:10.2307/2348827
Page ES (1954). Continuous inspection schemes. Biometrika 41:100–115.
doi:10.1093/biomet/41.1-2.100
Roberts SW (1959). Control chart tests based on geometric moving averages.
Technometrics 1:239–250. doi:10.1080/00401706.1959.10489860
DeLong ER, DeLong DM, Clarke-Pearson DL (1988). Comparing the areas under two or more
correlated receiver operating characteristic curves: a nonparametric approach.
Biometrics 44:837–845. doi:10.2307/2531595
Jones LA, Champ CW, Rigdon SE (2004). The run length distribution of the CUSUM with
estimated parameters. Journal of Quality Technology 36:95–108.
doi:10.1080/00224065.2004.11980254
"""

from __future__ import annotations

import math
from datetime import date

import numpy as np

from coordinator.monitoring.control_charts import (
    CusumResult,
    EwmaResult,
    cusum_chart_proportion,
    ewma_chart_proportion,
    self_starting_cusum,
    self_starting_ewma,
)
from coordinator.monitoring.findings import (
    AUC,
    SENSITIVITY,
    SPECIFICITY,
    DriftAlarm,
    DriftSettings,
    finite_or_none,
    window_alarm,
)
from site_agent.contract.release import SiteRelease
from site_agent.statistics.summaries import ConfusionCounts, ProportionName


def confusion_at(release: SiteRelease, threshold: float | None) -> ConfusionCounts | None:
    """Return the release's confusion counts at ``threshold``, or None if it has none."""
    for c in release.statistics.confusion:
        if c.threshold == threshold:
            return c
    return None


def usable_counts(c: ConfusionCounts, name: ProportionName) -> tuple[int, int]:
    """Return (successes, trials), or (0, 0) when a cell of the proportion is censored.

    A site's disclosure step marks a small confusion cell and its class partner censored
    (:class:`~site_agent.statistics.censored.CensoredCount`); the window then gives no
    count for that proportion, and the chart skips it rather than read a guess.
    """
    counts = c.counts(name)
    return (0, 0) if counts is None else counts


def chart_site(
    site: str,
    rows: list[dict[str, object]],
    ordered: list[SiteRelease | None],
    settings: DriftSettings,
    threshold: float | None,
    notes: list[str],
) -> tuple[dict[str, float | None], dict[str, float], list[DriftAlarm]]:
    """Chart one site's windows; return the targets, the limits and the alarms.

    ``rows`` (one per window, in order) gain their chart statistics under ``"charts"``;
    ``notes`` gains a line for each metric without a usable baseline target.
    """
    n_base = settings.baseline_windows
    targets: dict[str, float | None] = {}
    alarms: list[DriftAlarm] = []
    monitored = rows[n_base:]
    charts: dict[str, tuple[CusumResult, EwmaResult]] = {}
    for name in (SENSITIVITY, SPECIFICITY):
        successes = np.zeros(len(rows), dtype=np.int64)
        trials = np.zeros(len(rows), dtype=np.int64)
        for i, release in enumerate(ordered):
            c = None if release is None else confusion_at(release, threshold)
            if c is not None:
                successes[i], trials[i] = usable_counts(c, name)  # type: ignore[arg-type]
        base_trials = int(trials[:n_base].sum())
        p0 = float(successes[:n_base].sum()) / base_trials if base_trials else math.nan
        targets[name] = finite_or_none(p0)
        if not 0.0 < p0 < 1.0:
            notes.append(f"{name}: the baseline gives no target strictly between 0 and 1")
            continue
        # Page (1954) and Roberts (1959) on standardized binomial counts; a fall alarms.
        options = {"target_rate": p0, "side": "lower"}
        charts[name] = (
            cusum_chart_proportion(
                successes[n_base:], trials[n_base:], k=settings.cusum_k, h=settings.cusum_h,
                **options,  # type: ignore[arg-type]
            ),
            ewma_chart_proportion(
                successes[n_base:], trials[n_base:], lam=settings.ewma_lambda,
                width=settings.ewma_width, **options,  # type: ignore[arg-type]
            ),
        )  # fmt: skip
    auc = np.array([_num(r.get("auc")) for r in rows])
    base = np.isfinite(auc[:n_base])
    if base.sum() >= 2:
        # Hawkins (1987) self-starting charts: the in-control mean and SD of the window
        # AUCs are re-estimated from every earlier window, their uncertainty in a t law.
        targets[AUC] = float(np.mean(auc[:n_base][base]))
        charts[AUC] = (
            self_starting_cusum(auc, n_base, k=settings.cusum_k, h=settings.cusum_h, side="lower"),
            self_starting_ewma(
                auc, n_base, lam=settings.ewma_lambda, width=settings.ewma_width, side="lower"
            ),
        )
    else:
        targets[AUC] = None
        notes.append("auc: fewer than two baseline windows have an AUC")
    limits: dict[str, float] = {"cusum_h": settings.cusum_h}
    for name, (cusum, ewma) in charts.items():
        limits["ewma_limit"] = ewma.control_limit
        for offset, row in enumerate(monitored):
            chart_values = dict(row.get("charts", {}))  # type: ignore[call-overload]
            chart_values[f"{name}_cusum"] = cusum.lower[offset]
            chart_values[f"{name}_ewma"] = ewma.statistic[offset]
            row["charts"] = chart_values
        for method, result, values in (
            ("cusum", cusum, cusum.lower),
            ("ewma", ewma, ewma.statistic),
        ):
            for offset in result.alarms:
                row = monitored[offset]
                index = n_base + offset
                start, end = row["window_start"], row["window_end"]
                assert isinstance(start, date) and isinstance(end, date)
                alarms.append(
                    window_alarm(
                        site, name, method, index, start, end, float(values[offset]),
                        f"{name} fell below its baseline target ({method.upper()} alarm)",
                    )
                )  # fmt: skip
    return targets, limits, alarms


def _num(value: object) -> float:
    return float(value) if isinstance(value, int | float) else math.nan
