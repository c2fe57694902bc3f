"""Drift of each site across monitoring windows, from the releases kept in a results store.

Every site is compared with its own baseline: the first ``baseline_windows`` calendar
windows of the study, merged. Two kinds of evidence are read from each later window.

*Label-free, available as soon as a window closes.* The score histogram of every case
(pending labels included) against the baseline histogram, by the population stability
index and the binned Kolmogorov–Smirnov test (:mod:`coordinator.monitoring.drift`); and the mix of
one acquisition attribute (scanner vendor) by Pearson's chi-square and the total variation
distance. A window whose level reads ``shifted`` raises an alarm
(:mod:`coordinator.monitoring.label_free`).

*Label-based, as the reference standard matures.* Sensitivity and specificity at one
threshold (successes out of trials; pending labels are in neither) run through
standardized binomial CUSUM and EWMA charts (:mod:`coordinator.monitoring.control_charts`), and the
window's DeLong AUC with its standard error through the normal CUSUM and EWMA charts.
Targets come from the baseline windows: the pooled proportion, and the inverse-variance
weighted mean AUC. Charts watch for a fall (``side="lower"``) and start after the
baseline; a window without labelled cases is skipped, not counted as in control
(:mod:`coordinator.monitoring.accuracy_charts`).

This module reads the store and assembles each site's windows; the result models are in
:mod:`coordinator.monitoring.findings` and the webhook alerts of the alarms in
:mod:`coordinator.monitoring.alerts`. :func:`analyse_windows`, :class:`DriftFindings`,
:class:`DriftSettings` and :func:`alarm_alerts` are importable from here.

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

from collections.abc import Sequence
from datetime import date

from coordinator.monitoring.accuracy_charts import chart_site, confusion_at, usable_counts
from coordinator.monitoring.alerts import alarm_alerts
from coordinator.monitoring.drift import DriftLevel
from coordinator.monitoring.findings import (
    AUC,
    LABEL_METRICS,
    SCORE_DISTRIBUTION,
    SENSITIVITY,
    SPECIFICITY,
    DriftAlarm,
    DriftFindings,
    DriftSettings,
    SiteDrift,
    WindowDrift,
    mix_metric,
    window_alarm,
)
from coordinator.monitoring.label_free import (
    attribute_counts,
    baseline_capacity,
    dispersion,
    label_free_row,
    merged_histogram,
    mix_counts,
)
from coordinator.monitoring.results_store import WindowRecord
from site_agent.contract.release import SiteRelease
from site_agent.exceptions import InputError

__all__ = [
    "AUC",
    "LABEL_METRICS",
    "SCORE_DISTRIBUTION",
    "SENSITIVITY",
    "SPECIFICITY",
    "DriftAlarm",
    "DriftFindings",
    "DriftSettings",
    "SiteDrift",
    "WindowDrift",
    "alarm_alerts",
    "analyse_windows",
    "mix_metric",
]


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
    base_hist = merged_histogram([r.statistics.histogram for r in baseline])
    base_mix = mix_counts(baseline, settings.mix_attribute)
    spread = dispersion(baseline, base_hist)
    base_total = sum(r.statistics.n_observations for r in baseline)
    base_capacity = baseline_capacity(baseline, base_hist)
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
                label_free_row(
                    release, base_hist, base_mix, settings, spread, base_total, base_capacity
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
                        window_alarm(
                            site, metric, method, index, start, end,
                            value if isinstance(value, float) else None,
                            f"{metric.replace('_', ' ')} shifted from the baseline ({method})",
                        )
                    )  # fmt: skip
        rows.append(row)
    targets, limits, chart_alarms = chart_site(site, rows, ordered, settings, threshold, notes)
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
    mix = attribute_counts(release, attribute)
    if mix:
        total = sum(mix.values())
        row["mix_shares"] = {level: n / total for level, n in mix.items()} if total else {}
    c = confusion_at(release, threshold)
    if c is not None:
        for name in (SENSITIVITY, SPECIFICITY):
            successes, trials = usable_counts(c, name)  # type: ignore[arg-type]
            row[f"{name}_trials"] = trials
            row[name] = successes / trials if trials else None
    return row
