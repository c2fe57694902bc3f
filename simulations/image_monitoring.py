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

Every site holds :data:`MONITORED_CASES` cases (the development site that many besides
its CNN training cases), about 200 per two-month window, binned in four score bins
(:data:`HISTOGRAM_EDGES`), and the baseline is the half year before the change
(:data:`DEFAULT_BASELINE_WINDOWS`). With the 30 to 80 cases per window tried first, small
cells suppressed at the sites reshaped stable sites' histograms and PSI raised false alarms;
with two baseline windows, the binned KS test flagged a stable site (p about 0.001 in two
windows against the same short baseline). ``sitepool rehearse-drift --images`` runs this
rehearsal and writes the report.

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
)
from site_agent.disclosure.policy import SmallCellAction

HISTOGRAM_EDGES = (0.0, 0.119203, 0.5, 0.880797, 1.0)
"""Four score bins, split at logits -2, 0 and 2 (sigmoid values to six places). The site
suppresses cells below its minimum of 5 in each class row; with ten even bins, sparse bins
came and went and PSI raised false alarms at stable sites."""
MONITORED_CASES = 1000
"""Cases per site in the monitoring rehearsal (about 200 per two-month window)."""
DEFAULT_BASELINE_WINDOWS = 3
"""Windows that form each site's baseline: January to June, before the scanner change."""
DEFAULT_DRIFT = ImageDrift(
    starts_at=0.61, shift=ImageShift(blur_sigma=1.5, resolution=0.5, noise_sigma=0.15)
)
"""The default scanner change: blur, resolution loss and noise from 3 July 2031 (61% of the
sites' 300 acquisition days), so the half-year baseline holds no changed case."""
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
    development = base.sites[base.development_index]
    n_train = int(development.n_cases * base.development_train_fraction)
    sites = [
        s.model_copy(update={"n_cases": cases_per_site + (n_train if s is development else 0)})
        for s in base.sites
    ]
    sites[drifting_site] = sites[drifting_site].model_copy(update={"drift": drift})
    # The CNN trains on as many cases as in the one-off study; the rest are monitored.
    chosen = base.model_copy(
        update={
            "sites": tuple(sites),
            "development_train_fraction": n_train / (cases_per_site + n_train),
        }
    )
    out = Path(out)

    def protocol_for(sha256: str) -> StudyProtocol:
        return StudyProtocol(
            study_id=f"image-monitoring-{chosen.seed}",
            title=f"Drift monitoring of an image model at {len(sites)} invented hospitals",
            model=ModelReference(name="phantom-cnn", architecture="cnn", sha256=sha256),
            # Two calibration bins: every reported cut is a histogram edge (drift_rehearsal).
            evaluation=EvaluationPlan(
                thresholds=(0.5,), histogram_edges=HISTOGRAM_EDGES, calibration_bins=2
            ),
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
    """Return the 1-based window of the first changed case (cases span ACQUISITION_DAYS)."""
    first = FIRST_WINDOW + timedelta(days=int(starts_at * ACQUISITION_DAYS))
    months = (first.year - FIRST_WINDOW.year) * 12 + first.month - FIRST_WINDOW.month
    return months // window_months + 1


def _describe(shift: ImageShift) -> str:
    changed = {
        k: v for k, v in shift.model_dump().items() if v != ImageShift.model_fields[k].default
    }
    return ", ".join(f"{k.replace('_', ' ')} {v}" for k, v in changed.items())
