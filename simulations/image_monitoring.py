"""Drift monitoring on images: windowed score distributions of the CNN at invented hospitals.

The image rehearsal's sites (:mod:`simulations.image_rehearsal`) are laid out with a
monitoring protocol: windows of ``window_months`` over the sites' acquisition year, the
first ``baseline_windows`` as each site's reference. One site changes scanner partway
through (an :class:`~simulations.image_rehearsal.ImageDrift`: by default a blurrier,
noisier acquisition), so the CNN's score distribution there moves while the others stay.
Each window is asked through the same protocol, gate and ledger as any monitoring round;
the releases go to the SQLite results store and are analysed by
:func:`coordinator.monitoring.analysis.analyse_windows` (PSI, binned KS, charts), with the
monitoring thresholds as they are.

Every site holds :data:`MONITORED_CASES` cases (the development site that many held out of
CNN training), about 80 per two-month window: with the 30 or so of the one-off image study
per window, the score histograms of stable sites moved by chance enough to raise false
alarms. ``sitepool rehearse-drift --images`` runs this rehearsal and writes the report.

Invented images of invented hospitals, for rehearsal only; sitepool is a research tool, not
a medical device.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, timedelta
from pathlib import Path

from coordinator.monitoring.analysis import DriftFindings, DriftSettings, analyse_windows
from coordinator.monitoring.results_store import SqliteResultsStore
from coordinator.runs.engines import Engine, run_monitoring
from simulations.image_rehearsal import (
    ACQUISITION_DAYS,
    SUBGROUP,
    ImageDrift,
    ImageScenario,
    Progress,
    default_image_scenario,
    prepare_image_study,
)
from simulations.image_shifts import ImageShift
from site_agent.contract.protocol import (
    EvaluationPlan,
    ModelReference,
    MonitoringPlan,
    Operation,
    StudyProtocol,
    uniform_edges,
)
from site_agent.disclosure.policy import SmallCellAction

MONITORED_CASES = 400
"""Cases per site in the monitoring rehearsal (about 80 per two-month window)."""
DEFAULT_BASELINE_WINDOWS = 2
"""Windows that form each site's baseline (January to April)."""
DEFAULT_DRIFT = ImageDrift(
    starts_at=0.6, shift=ImageShift(blur_sigma=1.5, resolution=0.5, noise_sigma=0.15)
)
"""The default scanner change: blur, resolution loss and noise from 60% of the year on."""
FIRST_WINDOW = date(2031, 1, 1)
"""Cases of the image rehearsal are acquired over the first 300 days of 2031."""


@dataclass(frozen=True)
class ImageMonitoring:
    """Where the monitoring rehearsal stored its windows, and what the analysis found."""

    protocol: StudyProtocol
    store_path: Path
    findings: DriftFindings
    drifting_site: str
    drift_window: int
    drift_description: str


def monitor_images(
    out: Path,
    *,
    scenario: ImageScenario | None = None,
    drifting_site: int = 1,
    drift: ImageDrift = DEFAULT_DRIFT,
    window_months: int = 2,
    windows: int = 5,
    baseline_windows: int = DEFAULT_BASELINE_WINDOWS,
    cases_per_site: int = MONITORED_CASES,
    engine: Engine = "inprocess",
    progress: Progress | None = None,
) -> ImageMonitoring:
    """Run windowed monitoring of the image model at the scenario's sites, one of them drifting.

    Raises
    ------
    DeploymentError
        If the engine fails or too few sites release a window.
    """
    base = scenario or default_image_scenario()
    held_out = 1.0 - base.development_train_fraction
    sites = [
        s.model_copy(
            update={
                "n_cases": round(cases_per_site / held_out)
                if i == base.development_index
                else cases_per_site
            }
        )
        for i, s in enumerate(base.sites)
    ]
    sites[drifting_site] = sites[drifting_site].model_copy(update={"drift": drift})
    chosen = base.model_copy(update={"sites": tuple(sites)})
    out = Path(out)

    def protocol_for(sha256: str) -> StudyProtocol:
        return StudyProtocol(
            study_id=f"image-monitoring-{chosen.seed}",
            title=f"Drift monitoring of an image model at {len(sites)} invented hospitals",
            model=ModelReference(name="phantom-cnn", architecture="cnn", sha256=sha256),
            evaluation=EvaluationPlan(thresholds=(0.5,), histogram_edges=uniform_edges(10)),
            operations=(Operation.MONITOR,),
            rounds=windows,
            quorum=1,
            monitoring=MonitoringPlan(
                first_window_start=FIRST_WINDOW,
                window_months=window_months,
                windows=windows,
                baseline_windows=baseline_windows,
                mix_attributes=(SUBGROUP,),
            ),
        )

    study = prepare_image_study(
        chosen,
        out,
        adapt=False,
        progress=progress,
        protocol_for=protocol_for,
        # Suppression keeps every window on the protocol's bin edges (see drift_rehearsal).
        small_cells=SmallCellAction.SUPPRESS,
    )
    store_path = out / "monitoring.sqlite"
    run_monitoring(
        study.protocol,
        study.bundle_path,
        study.settings,
        store_path=store_path,
        engine=engine,
        workdir=out / "run",
        as_of=date(2032, 6, 30),
        progress=progress,
    )
    with SqliteResultsStore(store_path) as store:
        records = store.windows(study.protocol.study_id)
    findings = analyse_windows(
        study.protocol.study_id, records, DriftSettings(baseline_windows=baseline_windows)
    )
    return ImageMonitoring(
        protocol=study.protocol,
        store_path=store_path,
        findings=findings,
        drifting_site=sites[drifting_site].name,
        drift_window=_window_of(drift.starts_at, window_months),
        drift_description=_describe(drift.shift),
    )


def _window_of(starts_at: float, window_months: int) -> int:
    """The 1-based window holding the first changed case (cases span 300 days from FIRST_WINDOW)."""
    first = FIRST_WINDOW + timedelta(days=int(starts_at * ACQUISITION_DAYS))
    months = (first.year - FIRST_WINDOW.year) * 12 + first.month - FIRST_WINDOW.month
    return months // window_months + 1


def _describe(shift: ImageShift) -> str:
    changed = {
        k: v for k, v in shift.model_dump().items() if v != ImageShift.model_fields[k].default
    }
    return ", ".join(f"{k.replace('_', ' ')} {v}" for k, v in changed.items())
