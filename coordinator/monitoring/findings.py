"""What the drift analysis finds: its settings, per-window rows, alarms and the study result.

The models are frozen pydantic models, written to ``drift.json`` by the drift report
(:mod:`coordinator.report.drift_report`); the analysis that fills them is
:func:`coordinator.monitoring.analysis.analyse_windows`. Defaults of the settings are the
published designs cited in :mod:`coordinator.monitoring.control_charts` (Page 1954;
Roberts 1959) and :mod:`coordinator.monitoring.drift` (PSI bands, Siddiqi 2006).
"""

from __future__ import annotations

import math
from datetime import date

from pydantic import BaseModel, ConfigDict, Field

from coordinator.monitoring.control_charts import (
    DEFAULT_CUSUM_H,
    DEFAULT_CUSUM_K,
    DEFAULT_EWMA_LAMBDA,
    DEFAULT_EWMA_WIDTH,
)
from coordinator.monitoring.drift import (
    DEFAULT_TVD_THRESHOLDS,
    DriftLevel,
)
from coordinator.monitoring.window_null import DEFAULT_SHIFT_ALPHA, DEFAULT_WATCH_ALPHA
from site_agent.contract.protocol import DEFAULT_BASELINE_WINDOWS
from site_agent.notices import RESEARCH_NOTICE

SCORE_DISTRIBUTION = "score_distribution"
SENSITIVITY = "sensitivity"
SPECIFICITY = "specificity"
AUC = "auc"
LABEL_METRICS = (SENSITIVITY, SPECIFICITY, AUC)
"""Metric names of the label-based charts, in report order."""


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


def window_alarm(
    site: str,
    metric: str,
    method: str,
    index: int,
    start: date,
    end: date,
    statistic: float | None,
    message: str,
) -> DriftAlarm:
    """Return the alarm of window ``index`` (0-based); a non-finite statistic becomes None."""
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


def finite_or_none(value: float) -> float | None:
    """Return ``value`` as a float, or None when it is NaN or infinite (unknown, not zero)."""
    return float(value) if math.isfinite(value) else None
