"""Drift of each site across monitoring windows, from the releases kept in a results store.

Every site is compared with its own baseline: the first ``baseline_windows`` calendar
windows of the study, merged. Two kinds of evidence are read from each later window.

*Label-free, available as soon as a window closes.* The score histogram of every case
(pending labels included) against the baseline histogram, by the population stability
index and the binned Kolmogorov–Smirnov test (:mod:`coordinator.monitoring.drift`); and the mix of
one acquisition attribute (scanner vendor) by Pearson's chi-square and the total variation
distance. A window whose level reads ``shifted`` raises an alarm.

*Label-based, as the reference standard matures.* Sensitivity and specificity at one
threshold (successes out of trials; pending labels are in neither) run through
standardized binomial CUSUM and EWMA charts (:mod:`coordinator.monitoring.control_charts`), and the
window's DeLong AUC with its standard error through the normal CUSUM and EWMA charts.
Targets come from the baseline windows: the pooled proportion, and the inverse-variance
weighted mean AUC. Charts watch for a fall (``side="lower"``) and start after the
baseline; a window without labelled cases is skipped, not counted as in control.

Label completeness per window is the share of released cases whose label is known. The
store keeps each window's latest release (:mod:`coordinator.monitoring.rounds` asks again for
windows with pending labels), so the analysis reads the labels known at the latest run;
``revisions`` says how often a window's release was replaced as its labels matured.

Caveats, said plainly: targets estimated from a few baseline windows make false alarms
more frequent than the ARL tables say (Jones, Champ & Rigdon 2004); the AUC chart adds
the target's variance to each window's, which only partly corrects this. A site's
disclosure step may suppress a small confusion cell; such a window is skipped for the
proportion it corrupts. Pending counts below the site's minimum cell are withheld by the
site, so completeness is then slightly overstated. Windows whose labels are only partly
known may be biased if some diagnoses are confirmed sooner than others.

References
----------
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
Siddiqi N (2006). Credit Risk Scorecards. Wiley, chapter 8.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from datetime import date

import numpy as np
from pydantic import BaseModel, ConfigDict, Field

from coordinator.monitoring.alerts import DriftAlert
from coordinator.monitoring.control_charts import (
    DEFAULT_CUSUM_H,
    DEFAULT_CUSUM_K,
    DEFAULT_EWMA_LAMBDA,
    DEFAULT_EWMA_WIDTH,
    CusumResult,
    EwmaResult,
    cusum_chart_proportion,
    ewma_chart_proportion,
    self_starting_cusum,
    self_starting_ewma,
)
from coordinator.monitoring.drift import (
    DEFAULT_TVD_THRESHOLDS,
    DriftLevel,
    category_chi_square,
    total_variation_distance,
)
from coordinator.monitoring.results_store import WindowRecord
from coordinator.monitoring.window_null import (
    DEFAULT_SHIFT_ALPHA,
    DEFAULT_WATCH_ALPHA,
    Dispersion,
    baseline_dispersion,
    label_free_drift,
)
from site_agent.contract.protocol import DEFAULT_BASELINE_WINDOWS
from site_agent.contract.release import SiteRelease
from site_agent.exceptions import InputError
from site_agent.notices import RESEARCH_NOTICE
from site_agent.statistics.summaries import (
    ConfusionCounts,
    ProportionName,
    ScoreHistogram,
    common_edges,
)

SCORE_DISTRIBUTION = "score_distribution"
SENSITIVITY = "sensitivity"
SPECIFICITY = "specificity"
AUC = "auc"
LABEL_METRICS = (SENSITIVITY, SPECIFICITY, AUC)
"""Metric names of the label-based charts, in report order."""
PSI_BAND_SHARE = 0.1
"""PSI is taken over score bands holding at least this share of the baseline each (about
ten bands, as scorecards use deciles; Siddiqi 2006, common practice), so that sparse bins
and their floored shares do not dominate it. KS uses every common bin."""


def mix_metric(attribute: str) -> str:
    """Return the metric name of an attribute's case mix (``scanner_vendor_mix``)."""
    return f"{attribute}_mix"


class _Model(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


class DriftSettings(_Model):
    """How windows are compared and charted; defaults are the cited published designs."""

    baseline_windows: int = Field(default=DEFAULT_BASELINE_WINDOWS, ge=1)
    mix_attribute: str | None = Field(default="scanner_vendor")
    threshold: float | None = Field(
        default=None, description="Threshold of the proportion charts; None: the first."
    )
    cusum_k: float = DEFAULT_CUSUM_K
    cusum_h: float = DEFAULT_CUSUM_H
    ewma_lambda: float = DEFAULT_EWMA_LAMBDA
    ewma_width: float = DEFAULT_EWMA_WIDTH
    psi_thresholds: tuple[float, float] | None = Field(
        default=None,
        description=(
            "Fixed PSI limits (watch, shifted); None: limits from the window sizes and the "
            "baseline's dispersion (coordinator.monitoring.window_null)."
        ),
    )
    p_thresholds: tuple[float, float] = (DEFAULT_WATCH_ALPHA, DEFAULT_SHIFT_ALPHA)
    tvd_thresholds: tuple[float, float] = DEFAULT_TVD_THRESHOLDS


class WindowDrift(_Model):
    """One site's drift statistics in one window; None where undefined or not released."""

    window_number: int
    window_start: date
    window_end: date
    baseline: bool
    released: bool
    n_cases: int | None = None
    n_labelled: int | None = None
    n_pending: int | None = None
    label_completeness: float | None = None
    revisions: int = Field(default=0, description="Times the stored release was replaced.")
    psi: float | None = None
    psi_limit: float | None = Field(default=None, description="PSI at which it reads shifted.")
    psi_level: DriftLevel = DriftLevel.UNDETERMINED
    ks_distance: float | None = None
    ks_p_value: float | None = None
    ks_level: DriftLevel = DriftLevel.UNDETERMINED
    mix_shares: dict[str, float] = Field(default_factory=dict)
    mix_p_value: float | None = None
    mix_level: DriftLevel = DriftLevel.UNDETERMINED
    tvd: float | None = None
    tvd_level: DriftLevel = DriftLevel.UNDETERMINED
    sensitivity: float | None = None
    sensitivity_trials: int | None = None
    specificity: float | None = None
    specificity_trials: int | None = None
    auc: float | None = None
    auc_se: float | None = None
    charts: dict[str, float | None] = Field(
        default_factory=dict, description="Chart statistics by '<metric>_<cusum|ewma>'."
    )
    notes: list[str] = Field(default_factory=list)


class DriftAlarm(_Model):
    """A chart or a drift statistic that crossed its limit at one site in one window."""

    site: str
    metric: str
    method: str
    window_number: int
    window_start: date
    window_end: date
    statistic: float | None
    message: str


class SiteDrift(_Model):
    """Everything the drift analysis found for one site."""

    site: str
    targets: dict[str, float | None] = Field(description="Baseline value of each metric.")
    baseline_edges: tuple[float, ...] | None = None
    baseline_counts: tuple[int, ...] | None = None
    limits: dict[str, float] = Field(default_factory=dict)
    notes: list[str] = Field(default_factory=list)
    windows: list[WindowDrift]


class DriftFindings(_Model):
    """The drift analysis of one study: per-site series, the alarms, and the settings."""

    study_id: str
    settings: DriftSettings
    threshold: float | None
    windows: list[tuple[date, date]]
    sites: list[SiteDrift]
    alarms: list[DriftAlarm]
    notice: str = RESEARCH_NOTICE

    def first_alarms(self) -> dict[tuple[str, str], DriftAlarm]:
        """Return the first alarm per (site, metric), whatever the method."""
        first: dict[tuple[str, str], DriftAlarm] = {}
        for alarm in sorted(self.alarms, key=lambda a: a.window_number):
            first.setdefault((alarm.site, alarm.metric), alarm)
        return first


def analyse_windows(
    study_id: str, records: Sequence[WindowRecord], settings: DriftSettings | None = None
) -> DriftFindings:
    """Analyse the stored windows of one study, site by site (see the module docstring).

    Raises
    ------
    InputError
        If there are no more windows than baseline windows, or a stored release is invalid.
    """
    settings = settings or DriftSettings()
    windows = sorted({(r.window_start, r.window_end) for r in records})
    if len(windows) <= settings.baseline_windows:
        raise InputError(
            f"{len(windows)} stored windows: monitoring needs more than the "
            f"{settings.baseline_windows} baseline windows"
        )
    by_site: dict[str, dict[tuple[date, date], SiteRelease]] = {}
    revisions: dict[str, dict[tuple[date, date], int]] = {}
    for record in records:
        key = (record.window_start, record.window_end)
        by_site.setdefault(record.site, {})[key] = SiteRelease.from_json(record.release_json)
        revisions.setdefault(record.site, {})[key] = record.revisions
    threshold = _threshold(by_site, settings.threshold)
    sites = []
    alarms: list[DriftAlarm] = []
    for site in sorted(by_site):
        site_drift, site_alarms = _analyse_site(
            site, by_site[site], revisions[site], windows, settings, threshold
        )
        sites.append(site_drift)
        alarms.extend(site_alarms)
    alarms.sort(key=lambda a: (a.site, a.window_number, a.metric, a.method))
    return DriftFindings(
        study_id=study_id,
        settings=settings,
        threshold=threshold,
        windows=windows,
        sites=sites,
        alarms=alarms,
    )


def alarm_alerts(findings: DriftFindings) -> list[DriftAlert]:
    """Return one webhook alert per site, metric and method: its first alarm.

    A persistent shift keeps alarming window after window; one alert at its onset (its
    message says how many windows alarmed in all) keeps the receiver from being flooded.
    """
    groups: dict[tuple[str, str, str], list[DriftAlarm]] = {}
    for alarm in findings.alarms:
        groups.setdefault((alarm.site, alarm.metric, alarm.method), []).append(alarm)
    alerts = []
    for group in groups.values():
        first = min(group, key=lambda a: a.window_number)
        alerts.append(
            DriftAlert(
                study_id=findings.study_id,
                site=first.site,
                window_start=first.window_start,
                window_end=first.window_end,
                metric=first.metric,
                method=first.method,
                statistic=first.statistic,
                level=DriftLevel.SHIFTED,
                message=f"{first.message} ({len(group)} alarming window(s) in this run).",
            )
        )
    return alerts


def _threshold(
    by_site: dict[str, dict[tuple[date, date], SiteRelease]], wanted: float | None
) -> float | None:
    for releases in by_site.values():
        for release in releases.values():
            thresholds = release.statistics.thresholds
            if wanted is None:
                return thresholds[0]
            if wanted in thresholds:
                return wanted
            raise InputError(f"threshold {wanted} is not among the released thresholds")
    return None


def _confusion(release: SiteRelease, threshold: float | None) -> ConfusionCounts | None:
    for c in release.statistics.confusion:
        if c.threshold == threshold:
            return c
    return None


def _usable_counts(c: ConfusionCounts, name: ProportionName) -> tuple[int, int]:
    """Return (successes, trials), or (0, 0) if a disclosure step may have zeroed a cell.

    A site that suppresses a small confusion cell sets it to 0 and drops all four
    proportions' patient moments; a genuine count has moments with at least one patient
    per proportion that has trials. With moments dropped, a proportion is still usable
    when neither of its cells is 0 (a suppressed cell reads 0).
    """
    successes, trials = c.counts(name)
    moments = getattr(c, name)
    if trials > 0 and moments.clusters == 0 and (successes == 0 or successes == trials):
        return 0, 0
    return successes, trials


def _analyse_site(
    site: str,
    releases: dict[tuple[date, date], SiteRelease],
    revisions: dict[tuple[date, date], int],
    windows: list[tuple[date, date]],
    settings: DriftSettings,
    threshold: float | None,
) -> tuple[SiteDrift, list[DriftAlarm]]:
    n_base = settings.baseline_windows
    ordered = [releases.get(w) for w in windows]
    baseline = [r for r in ordered[:n_base] if r is not None]
    notes: list[str] = []
    base_hist = _merged_histogram([r.statistics.histogram for r in baseline])
    base_mix = _mix_counts(baseline, settings.mix_attribute)
    dispersion = _dispersion(baseline, base_hist)
    base_total = sum(r.statistics.n_observations for r in baseline)
    base_capacity = _baseline_capacity(baseline, base_hist)
    if not baseline:
        notes.append("no baseline window was released: drift is undetermined at this site")
    rows: list[dict[str, object]] = []
    alarms: list[DriftAlarm] = []
    for index, ((start, end), release) in enumerate(zip(windows, ordered, strict=True)):
        row: dict[str, object] = {
            "window_number": index + 1,
            "window_start": start,
            "window_end": end,
            "baseline": index < n_base,
            "released": release is not None,
        }
        if release is None:
            row["notes"] = ["not released by the site (declined, no answer, or not yet asked)"]
            rows.append(row)
            continue
        row.update(_counts_row(release, threshold, settings.mix_attribute))
        row["revisions"] = revisions.get((start, end), 0)
        if index >= n_base and base_hist is not None:
            row.update(
                _label_free_row(
                    release, base_hist, base_mix, settings, dispersion, base_total, base_capacity
                )
            )
            for metric, method, key, level in (
                (SCORE_DISTRIBUTION, "psi", "psi", "psi_level"),
                (SCORE_DISTRIBUTION, "ks", "ks_distance", "ks_level"),
                (mix_metric(settings.mix_attribute or "attribute"), "chi_square", "mix_p_value",
                 "mix_level"),
                (mix_metric(settings.mix_attribute or "attribute"), "tvd", "tvd", "tvd_level"),
            ):  # fmt: skip
                if row.get(level) is DriftLevel.SHIFTED:
                    value = row.get(key)
                    alarms.append(
                        _alarm(
                            site, metric, method, index, start, end,
                            value if isinstance(value, float) else None,
                            f"{metric.replace('_', ' ')} shifted from the baseline ({method})",
                        )
                    )  # fmt: skip
        rows.append(row)
    targets, limits, chart_alarms = _charts(site, rows, ordered, settings, threshold, notes)
    alarms.extend(chart_alarms)
    return (
        SiteDrift(
            site=site,
            targets=targets,
            baseline_edges=None if base_hist is None else base_hist.edges,
            baseline_counts=None if base_hist is None else base_hist.all,
            limits=limits,
            notes=notes,
            windows=[WindowDrift.model_validate(row) for row in rows],
        ),
        alarms,
    )


def _alarm(
    site: str,
    metric: str,
    method: str,
    index: int,
    start: date,
    end: date,
    statistic: float | None,
    message: str,
) -> DriftAlarm:
    return DriftAlarm(
        site=site,
        metric=metric,
        method=method,
        window_number=index + 1,
        window_start=start,
        window_end=end,
        statistic=statistic if statistic is None or math.isfinite(statistic) else None,
        message=f"{site}, window {start} to {end}: {message}",
    )


def _merged_histogram(histograms: list[ScoreHistogram]) -> ScoreHistogram | None:
    if not histograms:
        return None
    merged = histograms[0]
    for h in histograms[1:]:
        merged = merged.merge(h)
    return merged


def _mix_counts(releases: list[SiteRelease], attribute: str | None) -> dict[str, int] | None:
    total: dict[str, int] | None = None
    for release in releases:
        counts = _attribute_counts(release, attribute)
        if counts is None:
            continue
        total = total or {}
        for level, n in counts.items():
            total[level] = total.get(level, 0) + n
    return total


def _attribute_counts(release: SiteRelease, attribute: str | None) -> dict[str, int] | None:
    for counts in release.attribute_counts:
        if counts.attribute == attribute:
            return counts.as_dict()
    return None


def _finite(value: float) -> float | None:
    return float(value) if math.isfinite(value) else None


def _counts_row(
    release: SiteRelease, threshold: float | None, attribute: str | None
) -> dict[str, object]:
    stats = release.statistics
    labelled = stats.n_positive + stats.n_negative
    known = labelled + stats.n_pending
    row: dict[str, object] = {
        "n_cases": stats.n_observations,
        "n_labelled": labelled,
        "n_pending": stats.n_pending,
        "label_completeness": labelled / known if known else None,
        "auc": release.exact.auc.auc,
        "auc_se": release.exact.auc.se,
    }
    mix = _attribute_counts(release, attribute)
    if mix:
        total = sum(mix.values())
        row["mix_shares"] = {level: n / total for level, n in mix.items()} if total else {}
    c = _confusion(release, threshold)
    if c is not None:
        for name in (SENSITIVITY, SPECIFICITY):
            successes, trials = _usable_counts(c, name)  # type: ignore[arg-type]
            row[f"{name}_trials"] = trials
            row[name] = successes / trials if trials else None
    return row


def _capacity(release: SiteRelease) -> list[float]:
    """Most suppressed cases each bin of a window's histogram can hold.

    A suppressed cell reads 0 in its row (positive, negative or pending), and each row's
    total is released, so a bin can hold at most, summed over its rows that read 0, what
    that row is missing; a bin with no zero cell lost nothing to suppression.
    """
    stats = release.statistics
    h = stats.histogram
    pending = [a - p - n for a, p, n in zip(h.all, h.positive, h.negative, strict=True)]
    rows = (
        (h.positive, stats.n_positive - sum(h.positive)),
        (h.negative, stats.n_negative - sum(h.negative)),
        (pending, stats.n_pending - sum(pending)),
    )
    return [
        float(sum(max(0, lost) for row, lost in rows if row[i] == 0)) for i in range(len(pending))
    ]


def _baseline_capacity(
    baseline: list[SiteRelease], base_hist: ScoreHistogram | None
) -> list[float] | None:
    """Per bin, the suppressed baseline cases it can hold, summed over the baseline windows."""
    if base_hist is None:
        return None
    total = [0.0] * (len(base_hist.edges) - 1)
    for release in baseline:
        histogram = release.statistics.histogram
        if tuple(histogram.edges) != tuple(base_hist.edges):
            return None
        cap = _capacity(release)
        total = [t + c for t, c in zip(total, cap, strict=True)]
    return total


def _dispersion(baseline: list[SiteRelease], base_hist: ScoreHistogram | None) -> Dispersion:
    """Dispersion of the baseline windows' score histograms on the PSI bands (window_null)."""
    if base_hist is None:
        return Dispersion(1.0, math.inf, 0, "no baseline histogram")
    bands = _bands(base_hist.all, PSI_BAND_SHARE)
    windows, totals = [], []
    for release in baseline:
        if tuple(release.statistics.histogram.edges) != tuple(base_hist.edges):
            continue  # a window on other edges cannot be put on the baseline's bands
        counts = release.statistics.histogram.all
        windows.append([sum(counts[a:b]) for a, b in bands])
        totals.append(max(release.statistics.n_observations, sum(counts)))
    return baseline_dispersion(windows, totals)


def _label_free_row(
    release: SiteRelease,
    base_hist: ScoreHistogram,
    base_mix: dict[str, int] | None,
    settings: DriftSettings,
    dispersion: Dispersion,
    base_total: int,
    base_capacity: list[float] | None,
) -> dict[str, object]:
    row: dict[str, object] = {}
    notes: list[str] = []
    current = release.statistics.histogram
    edges = common_edges(base_hist.edges, current.edges)
    if len(edges) < 3:
        notes.append("the window and the baseline share fewer than two score bins")
    else:
        ref, cur = base_hist.coarsened(edges).all, current.coarsened(edges).all
        # Cases in suppressed cells are unknown: judge the bound closest to the baseline.
        ref_total = max(base_total, sum(ref))
        cur_total = max(release.statistics.n_observations, sum(cur))
        same = tuple(edges) == tuple(current.edges) == tuple(base_hist.edges)
        if sum(ref) and sum(cur):
            drift = label_free_drift(
                ref, ref_total, cur, cur_total, dispersion,
                p_thresholds=settings.p_thresholds,
                fixed_psi_limits=settings.psi_thresholds,
                bands=_bands(ref, PSI_BAND_SHARE),
                reference_capacity=base_capacity if same else None,
                current_capacity=_capacity(release) if same else None,
            )  # fmt: skip
            row.update(
                psi=_finite(drift.psi),
                psi_limit=_finite(drift.psi_limits[1]),
                psi_level=drift.psi_level,
                ks_distance=_finite(drift.ks_distance),
                ks_p_value=_finite(drift.ks_p_value),
                ks_level=drift.ks_level,
            )
            if drift.bounded:
                notes.append("suppressed cells: PSI and KS are lower bounds")
        else:
            notes.append("a window holds no cases")
    mix = _attribute_counts(release, settings.mix_attribute)
    if base_mix and mix:
        chi = category_chi_square(base_mix, mix, thresholds=settings.p_thresholds)
        tvd = total_variation_distance(base_mix, mix, thresholds=settings.tvd_thresholds)
        row.update(
            mix_p_value=_finite(chi.p_value),
            mix_level=chi.level,
            tvd=_finite(tvd.distance),
            tvd_level=tvd.level,
        )
        if chi.small_expected:
            notes.append("some expected attribute counts are below 5: chi-square is rough")
    row["notes"] = notes
    return row


def _bands(reference: tuple[int, ...], share: float) -> list[tuple[int, int]]:
    """Group adjacent bins, left to right, until each group holds ``share`` of the reference.

    A last group short of ``share`` joins the one before it. At least two groups are kept
    when the reference has two non-empty bins.
    """
    total = sum(reference)
    groups: list[tuple[int, int]] = []
    start, running = 0, 0
    for end, count in enumerate(reference, start=1):
        running += count
        if total and running >= share * total:
            groups.append((start, end))
            start, running = end, 0
    if start < len(reference):
        if groups and running < share * total:
            groups[-1] = (groups[-1][0], len(reference))
        else:
            groups.append((start, len(reference)))
    if len(groups) < 2:
        return [(i, i + 1) for i in range(len(reference))]
    return groups


def _charts(
    site: str,
    rows: list[dict[str, object]],
    ordered: list[SiteRelease | None],
    settings: DriftSettings,
    threshold: float | None,
    notes: list[str],
) -> tuple[dict[str, float | None], dict[str, float], list[DriftAlarm]]:
    n_base = settings.baseline_windows
    targets: dict[str, float | None] = {}
    alarms: list[DriftAlarm] = []
    monitored = rows[n_base:]
    charts: dict[str, tuple[CusumResult, EwmaResult]] = {}
    for name in (SENSITIVITY, SPECIFICITY):
        successes = np.zeros(len(rows), dtype=np.int64)
        trials = np.zeros(len(rows), dtype=np.int64)
        for i, release in enumerate(ordered):
            c = None if release is None else _confusion(release, threshold)
            if c is not None:
                successes[i], trials[i] = _usable_counts(c, name)  # type: ignore[arg-type]
        base_trials = int(trials[:n_base].sum())
        p0 = float(successes[:n_base].sum()) / base_trials if base_trials else math.nan
        targets[name] = _finite(p0)
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
                    _alarm(
                        site, name, method, index, start, end, float(values[offset]),
                        f"{name} fell below its baseline target ({method.upper()} alarm)",
                    )
                )  # fmt: skip
    return targets, limits, alarms


def _num(value: object) -> float:
    return float(value) if isinstance(value, int | float) else math.nan
