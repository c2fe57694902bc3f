"""Simulation-based consortium planning: how many sites, and how many cases at each.

For every design in a grid of ``sites x cases per site`` the planner repeats a study
``replicates`` times and reports, each with its Monte Carlo interval:

- the expected width of the pooled AUC interval and of the prediction interval for a
  new site (REML with the HKSJ interval, the study's primary meta-analysis);
- the power to flag a new site whose AUC is ``drop`` lower than the consortium would
  predict for it, and the false-alarm rate at a new site with no drop;
- the expected detection delay of the drift monitor: a new site's study cases form its
  baseline, then its AUC falls by ``drop`` and windows of ``window_cases`` cases are
  charted by the lower CUSUM the monitor runs.

How a replicate is drawn. Site ``i``'s true AUC is ``expit(logit(auc) + u_i)`` with
``u_i ~ N(0, tau²)``, ``tau`` being the between-site SD on the logit-AUC scale, given
directly or read from a previous study's ``results.json`` (:func:`tau_from_results`).
Each site has ``n`` cases, ``round(n * prevalence)`` of them diseased (stratified),
with binormal equal-variance scores (``N(0, 1)`` and ``N(sqrt(2) Phi^-1(AUC_i), 1)``).
The numbers then go through the same code a study uses: each site's AUC and DeLong variance by
:func:`site_agent.statistics.roc.delong_batch` (the site agent's DeLong, many sites at
once), the logit transform by
:func:`coordinator.pooling.effect_sizes.logit_auc`, pooling by
:func:`coordinator.pooling.meta_analysis.meta_analyze`, and the chart by
:func:`coordinator.monitoring.control_charts.cusum_chart` with the monitor's defaults and
its target rule (the baseline AUC, its variance added to each window's). Replicates do
*not* go through Flower, model development or the synthetic-hospital builder of
:mod:`simulations.sites`: those would add transport and feature shifts, not sampling
error, and would cost seconds per replicate. Model scores are drawn directly.

A new site is flagged when its logit AUC falls below the one-sided ``1 - alpha``
prediction bound ``mu - t(k-2) sqrt(tau² + SE(mu)² + v_new)`` (normal quantile with two
sites), the prediction interval of Higgins, Thompson & Spiegelhalter (2009) widened by
the new site's own sampling variance.

Reproducible: the cell for ``k`` sites and ``n`` cases draws from
``SeedSequence(seed, spawn_key=(k, n))``, so its numbers do not depend on the rest of
the grid, on the order cells finish, or on the number of worker processes.

References
----------
Higgins JPT, Thompson SG, Spiegelhalter DJ (2009). A re-evaluation of random-effects
    meta-analysis. J R Stat Soc A 172(1):137-159. doi:10.1111/j.1467-985X.2008.00552.x
Riley RD, Higgins JPT, Deeks JJ (2011). Interpretation of random effects meta-analyses.
    BMJ 342:d549. doi:10.1136/bmj.d549
Morris TP, White IR, Crowther MJ (2019). Using simulation studies to evaluate statistical
    methods. Statistics in Medicine 38(11):2074-2102 (Monte Carlo standard errors).
    doi:10.1002/sim.8086
Hanley JA, McNeil BJ (1982). Radiology 143(1):29-36 (the binormal AUC relation
    AUC = Phi(d / sqrt(2)) is common practice).
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Literal

import numpy as np
from numpy.typing import NDArray
from pydantic import Field, model_validator
from scipy import stats

from coordinator.monitoring.control_charts import DEFAULT_CUSUM_H, DEFAULT_CUSUM_K, cusum_chart
from coordinator.pooling.effect_sizes import logit_auc
from coordinator.pooling.meta_analysis import meta_analyze
from coordinator.pooling.records import Number, ResultRecord
from coordinator.pooling.study_results import StudyResults
from site_agent.exceptions import InputError
from site_agent.notices import RESEARCH_NOTICE
from site_agent.statistics.proportions import wilson
from site_agent.statistics.roc import delong_batch

DEFAULT_SITE_COUNTS = (3, 5, 8, 12, 20)
DEFAULT_CASES_PER_SITE = (50, 100, 200, 400, 800)
DEFAULT_REPLICATES = 200
DEFAULT_SEED = 20261202
DEFAULT_HORIZON_WINDOWS = 24

Progress = Callable[[str], None]
Verdict = Literal["yes", "no", "uncertain", "undefined"]
_NAN = float("nan")


class PlanSettings(ResultRecord):
    """Everything a planning run depends on; with the seed, enough to reproduce it."""

    site_counts: tuple[int, ...] = DEFAULT_SITE_COUNTS
    cases_per_site: tuple[int, ...] = DEFAULT_CASES_PER_SITE
    replicates: int = Field(default=DEFAULT_REPLICATES, ge=10)
    auc: float = Field(default=0.80, gt=0.5, lt=1.0, description="Anticipated mean AUC.")
    prevalence: float = Field(default=0.30, gt=0.0, lt=1.0)
    tau: float = Field(default=0.20, ge=0.0, le=3.0, description="Between-site SD, logit AUC.")
    tau_source: str = "given"
    drop: float = Field(default=0.05, gt=0.0, lt=0.5, description="AUC drop to detect.")
    alpha: float = Field(default=0.05, gt=0.0, lt=0.5, description="One-sided, new-site flag.")
    confidence: float = Field(default=0.95, gt=0.0, lt=1.0)
    window_cases: int = Field(default=100, ge=10, description="Cases per monitoring window.")
    horizon_windows: int = Field(default=DEFAULT_HORIZON_WINDOWS, ge=1)
    cusum_k: float = DEFAULT_CUSUM_K
    cusum_h: float = DEFAULT_CUSUM_H
    seed: int = DEFAULT_SEED

    @model_validator(mode="after")
    def _check_grid(self) -> PlanSettings:
        if not self.site_counts or min(self.site_counts) < 2:
            raise ValueError("every site count must be at least 2")
        if not self.cases_per_site or min(self.cases_per_site) < 10:
            raise ValueError("every cases-per-site value must be at least 10")
        if len(set(self.site_counts)) != len(self.site_counts):
            raise ValueError("site counts repeat")
        if len(set(self.cases_per_site)) != len(self.cases_per_site):
            raise ValueError("cases-per-site values repeat")
        for n in (*self.cases_per_site, self.window_cases):
            positives = round(n * self.prevalence)
            if positives < 2 or n - positives < 2:
                raise ValueError(
                    f"{n} cases at prevalence {self.prevalence:g} leave fewer than two cases "
                    "in a class: the DeLong variance needs two"
                )
        return self


class Targets(ResultRecord):
    """What a design must reach; ``None``: not asked for."""

    max_ci_width: float | None = Field(default=None, gt=0.0)
    max_prediction_width: float | None = Field(default=None, gt=0.0)
    min_power: float | None = Field(default=None, gt=0.0, lt=1.0)
    max_delay: float | None = Field(default=None, gt=0.0, description="Windows.")


class McValue(ResultRecord):
    """A Monte Carlo estimate with its interval over replicates.

    ``censored`` replicates never reached the event (no alarm within the horizon); then
    ``estimate`` is a lower bound (``bound = "at least"``) and ``upper`` is unknown (NaN).
    """

    estimate: Number
    lower: Number
    upper: Number
    n: int
    bound: Literal["exact", "at least"] = "exact"
    censored: int = 0
    method: str


class CellResult(ResultRecord):
    """One design: ``sites`` sites with ``cases_per_site`` cases each."""

    sites: int
    cases_per_site: int
    seed_key: tuple[int, int, int] = Field(description="SeedSequence(seed, spawn_key=(k, n)).")
    replicates: int
    usable: int = Field(description="Replicates with at least two sites' AUC defined.")
    pooled_ci_width: McValue
    prediction_width: McValue
    power: McValue
    false_alarm: McValue
    detection_delay: McValue
    verdicts: dict[str, Verdict] = Field(default_factory=dict)
    meets_targets: bool | None = None


class PlanResult(ResultRecord):
    """A planning grid and what it says about each design."""

    created_at: datetime
    settings: PlanSettings
    targets: Targets
    cells: tuple[CellResult, ...]
    recommended: tuple[int, int] | None = Field(
        default=None, description="(sites, cases per site) of the cheapest design meeting all."
    )
    notes: tuple[str, ...] = ()
    notice: str = RESEARCH_NOTICE

    def cell(self, sites: int, cases_per_site: int) -> CellResult:
        """Return the cell of one design."""
        for c in self.cells:
            if c.sites == sites and c.cases_per_site == cases_per_site:
                return c
        raise InputError(f"no cell for {sites} sites x {cases_per_site} cases")

    def write_json(self, path: Path) -> None:
        """Write the result as indented JSON."""
        path.write_text(self.model_dump_json(indent=2))


@dataclass(frozen=True, slots=True)
class _Replicate:
    ci_width: float
    prediction_width: float
    flagged_drop: bool
    flagged_same: bool
    delay: int | None
    usable: bool


def tau_from_results(path: Path) -> tuple[float, float, float]:
    """Return ``(tau, auc, prevalence)`` from a previous study's ``results.json``.

    ``tau`` is the square root of the REML tau² of the AUC on the logit scale across all
    sites (no subgroup); ``auc`` its pooled estimate; ``prevalence`` the share of
    positives over every site's flow.

    Raises
    ------
    InputError
        The file cannot be read, or has no REML logit-AUC meta-analysis with a tau².
    """
    try:
        results = StudyResults.read_json(path)
    except (OSError, ValueError) as exc:
        raise InputError(f"cannot read study results from {path}: {exc}") from exc
    rows = [
        m
        for m in results.meta
        if m.metric == "auc" and m.method == "reml" and m.scale == "logit" and m.subgroup is None
    ]
    if not rows or not math.isfinite(rows[0].tau2):
        raise InputError(f"{path} has no REML meta-analysis of the AUC with a defined tau²")
    positives = sum(f.positives for f in results.flow)
    total = positives + sum(f.negatives for f in results.flow)
    prevalence = positives / total if total else _NAN
    return math.sqrt(rows[0].tau2), float(rows[0].estimate), prevalence


def plan_grid(
    settings: PlanSettings,
    targets: Targets | None = None,
    *,
    workers: int = 1,
    progress: Progress | None = None,
) -> PlanResult:
    """Simulate every design of the grid; see the module docstring for the model.

    ``workers > 1`` runs cells in that many processes; results are identical.
    """
    say = progress or (lambda _: None)
    targets = targets or Targets()
    designs = [(k, n) for k in settings.site_counts for n in settings.cases_per_site]
    started = time.perf_counter()
    done: dict[tuple[int, int], CellResult] = {}

    def report(cell: CellResult) -> None:
        done[(cell.sites, cell.cases_per_site)] = cell
        say(
            f"[{len(done)}/{len(designs)}] {cell.sites} sites x {cell.cases_per_site} cases "
            f"({time.perf_counter() - started:.1f} s)"
        )

    if workers <= 1:
        for k, n in designs:
            report(simulate_cell(settings, k, n))
    else:
        with ProcessPoolExecutor(max_workers=workers) as pool:
            futures = [pool.submit(simulate_cell, settings, k, n) for k, n in designs]
            for future in as_completed(futures):
                report(future.result())
    cells = [_judged(done[d], targets) for d in designs]
    meeting = [c for c in cells if c.meets_targets]
    recommended = None
    if meeting:
        best = min(meeting, key=lambda c: (c.sites * c.cases_per_site, c.sites))
        recommended = (best.sites, best.cases_per_site)
    notes = [
        "replicates draw site-level scores directly and use the study's statistics and "
        "pooling code; they do not pass through Flower or model development",
        f"between-site SD tau {settings.tau:.3g} on the logit-AUC scale ({settings.tau_source})",
        "a target counts as met only when its whole Monte Carlo interval meets it",
    ]
    if any(c.sites < 3 for c in cells):
        notes.append("no prediction interval with 2 sites (it needs t with k - 2 df)")
    return PlanResult(
        created_at=datetime.now(UTC),
        settings=settings,
        targets=targets,
        cells=tuple(cells),
        recommended=recommended,
        notes=tuple(notes),
    )


def simulate_cell(settings: PlanSettings, sites: int, cases_per_site: int) -> CellResult:
    """Simulate one design ``replicates`` times from its own seed (module docstring)."""
    rng = np.random.default_rng(
        np.random.SeedSequence(settings.seed, spawn_key=(sites, cases_per_site))
    )
    r, k, n = settings.replicates, sites, cases_per_site
    centre = math.log(settings.auc / (1.0 - settings.auc))
    # Every site's scores for every replicate in one batch: rows are (replicate, site).
    site_auc = _expit(centre + rng.normal(0.0, settings.tau, (r, k)))
    auc, variance = _draw_aucs(site_auc.reshape(-1), n, settings.prevalence, rng)
    auc, variance = auc.reshape(r, k), variance.reshape(r, k)
    usual = _expit(centre + rng.normal(0.0, settings.tau, r))
    dropped = np.maximum(usual - settings.drop, 0.5)
    same_auc, same_var = _draw_aucs(usual, n, settings.prevalence, rng)
    drop_auc, drop_var = _draw_aucs(dropped, n, settings.prevalence, rng)
    h, w = settings.horizon_windows, settings.window_cases
    window_auc, window_var = _draw_aucs(np.repeat(dropped, h), w, settings.prevalence, rng)
    window_auc, window_var = window_auc.reshape(r, h), window_var.reshape(r, h)

    runs = []
    for i in range(r):
        delay = _detection_delay(settings, window_auc[i], window_var[i], same_auc[i], same_var[i])
        runs.append(
            _pool(
                settings,
                auc[i],
                variance[i],
                (same_auc[i], same_var[i]),
                (drop_auc[i], drop_var[i]),
                delay,
            )
        )
    usable = [run for run in runs if run.usable]
    z = float(stats.norm.ppf(0.975))  # Monte Carlo intervals are 95% (Morris et al. 2019)
    return CellResult(
        sites=sites,
        cases_per_site=cases_per_site,
        seed_key=(settings.seed, sites, cases_per_site),
        replicates=settings.replicates,
        usable=len(usable),
        pooled_ci_width=_mean([run.ci_width for run in usable], z),
        prediction_width=_mean([run.prediction_width for run in usable], z),
        power=_share([run.flagged_drop for run in usable]),
        false_alarm=_share([run.flagged_same for run in usable]),
        detection_delay=_delay([run.delay for run in runs], settings.horizon_windows, z),
    )


def _draw_aucs(
    true_auc: NDArray[np.float64], n: int, prevalence: float, rng: np.random.Generator
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Draw binormal scores for one site per entry of ``true_auc``; DeLong AUC and variance.

    Each site holds ``round(n * prevalence)`` diseased cases (stratified sampling).
    """
    positives = _positives(n, prevalence)
    separation = math.sqrt(2.0) * stats.norm.ppf(true_auc)  # AUC = Phi(d / sqrt 2)
    pos = rng.normal(0.0, 1.0, (true_auc.size, positives)) + separation[:, None]
    neg = rng.normal(0.0, 1.0, (true_auc.size, n - positives))
    return delong_batch(pos, neg)


def _positives(n: int, prevalence: float) -> int:
    return round(n * prevalence)


def _pool(
    settings: PlanSettings,
    auc: NDArray[np.float64],
    variance: NDArray[np.float64],
    same: tuple[float, float],
    dropped: tuple[float, float],
    delay: int | None,
) -> _Replicate:
    """Meta-analyse one replicate's sites and test the two new sites against it."""
    defined = (auc > 0.0) & (auc < 1.0) & (variance > 0.0)
    if int(defined.sum()) < 2:
        return _Replicate(_NAN, _NAN, False, False, delay, usable=False)
    effect_sizes = logit_auc(auc[defined], np.sqrt(variance[defined]))
    meta = meta_analyze(
        effect_sizes.estimates,
        effect_sizes.variances,
        method="reml",
        hksj=True,
        confidence=settings.confidence,
        transform="logit",
    )
    back = meta.back_transformed
    assert back is not None  # the logit transform always back-transforms
    df = int(defined.sum()) - 2
    one_sided = 1.0 - settings.alpha
    quantile = float(stats.t.ppf(one_sided, df) if df > 0 else stats.norm.ppf(one_sided))
    spread = meta.tau2 + meta.se**2

    def flagged(site: tuple[float, float]) -> bool:
        value, var = site
        if not (0.0 < value < 1.0 and var > 0.0):
            return False  # an undefined AUC at the new site cannot raise a flag
        y = math.log(value / (1.0 - value))
        v = var / (value * (1.0 - value)) ** 2  # delta method, as logit_auc
        return y < meta.estimate - quantile * math.sqrt(spread + v)

    return _Replicate(
        back.upper - back.lower,
        back.prediction_upper - back.prediction_lower,  # NaN with 2 sites
        flagged(dropped),
        flagged(same),
        delay,
        usable=True,
    )


def _detection_delay(
    settings: PlanSettings,
    window_auc: NDArray[np.float64],
    window_var: NDArray[np.float64],
    target: float,
    target_var: float,
) -> int | None:
    """Windows after the drop until the lower CUSUM alarms (1: the first); None: no alarm."""
    if not (0.0 < target < 1.0 and target_var > 0.0):
        return None
    # As the monitor does: target = baseline AUC, its variance added to each window's.
    total_se = np.sqrt(window_var + target_var)
    chart = cusum_chart(
        window_auc, total_se, target=target, k=settings.cusum_k, h=settings.cusum_h, side="lower"
    )
    return None if chart.first_alarm is None else chart.first_alarm + 1


def _mean(values: list[float], z: float) -> McValue:
    finite = np.asarray([v for v in values if math.isfinite(v)], dtype=np.float64)
    if finite.size < 2:
        return McValue(estimate=_NAN, lower=_NAN, upper=_NAN, n=int(finite.size), method="mean")
    mean = float(finite.mean())
    half = z * float(finite.std(ddof=1)) / math.sqrt(finite.size)  # Monte Carlo SE of a mean
    return McValue(
        estimate=mean, lower=mean - half, upper=mean + half, n=int(finite.size), method="mean"
    )


def _share(flags: list[bool]) -> McValue:
    if not flags:
        return McValue(estimate=_NAN, lower=_NAN, upper=_NAN, n=0, method="wilson")
    w = wilson(int(sum(flags)), len(flags))
    return McValue(estimate=w.estimate, lower=w.lower, upper=w.upper, n=len(flags), method="wilson")


def _delay(delays: list[int | None], horizon: int, z: float) -> McValue:
    censored = sum(d is None for d in delays)
    observed = [float(horizon if d is None else d) for d in delays]
    value = _mean(observed, z)
    if censored == 0:
        return value
    # Replicates without an alarm count as the horizon: the mean is only a lower bound.
    return value.model_copy(
        update={"upper": _NAN, "bound": "at least", "censored": censored, "method": "censored mean"}
    )


def _judged(cell: CellResult, targets: Targets) -> CellResult:
    verdicts: dict[str, Verdict] = {}
    if targets.max_ci_width is not None:
        verdicts["pooled_ci_width"] = _at_most(cell.pooled_ci_width, targets.max_ci_width)
    if targets.max_prediction_width is not None:
        verdicts["prediction_width"] = _at_most(cell.prediction_width, targets.max_prediction_width)
    if targets.min_power is not None:
        verdicts["power"] = _at_least(cell.power, targets.min_power)
    if targets.max_delay is not None:
        verdicts["detection_delay"] = _at_most(cell.detection_delay, targets.max_delay)
    meets = all(v == "yes" for v in verdicts.values()) if verdicts else None
    return cell.model_copy(update={"verdicts": verdicts, "meets_targets": meets})


def _at_most(value: McValue, limit: float) -> Verdict:
    if not math.isfinite(value.estimate):
        return "undefined"
    if value.bound == "at least":
        return "no" if value.lower > limit else "uncertain"
    if value.upper <= limit:
        return "yes"
    return "no" if value.lower > limit else "uncertain"


def _at_least(value: McValue, limit: float) -> Verdict:
    if not math.isfinite(value.estimate):
        return "undefined"
    if value.lower >= limit:
        return "yes"
    return "no" if value.upper < limit else "uncertain"


def _expit(x: NDArray[np.float64]) -> NDArray[np.float64]:
    out: NDArray[np.float64] = 0.5 * (1.0 + np.tanh(0.5 * x))  # overflow-free logistic
    return out
