"""A monitoring rehearsal: synthetic sites that drift over time, watched window by window.

The rehearsal builds the scenario's sites with its drift events spliced in
(:mod:`simulations.drift_events`), develops the model at the development site on a
patient-grouped training part (that site is then monitored on its held-out patients;
the drift scenario asks for far more cases there than the public data holds, so many of
them are jittered copies of training cases and its AUC is optimistic: it serves as a stable
reference for drift, not as a validation), lays out each invented hospital (a policy
that allows monitoring, an approval, a ledger) under ``out/site-data/<site>/``, registers a
monitoring protocol with one window per month, and runs it on the chosen engine in two
passes, as labels mature:

1. as of the scenario's end, when the labels of its last ``pending_label_months`` months
   are still pending (each site's ``cases.csv`` is written as it stands that day);
2. ``maturation_months`` later, when those labels have come back (``cases.csv`` written
   again, every label known). Only the windows stored with pending labels are asked
   again; their stored releases are replaced, never duplicated.

Every released window goes into the results store ``out/monitoring.sqlite``; running the
rehearsal again into the same directory resumes and stores nothing twice. Without
pending labels in the scenario there is one pass.

Invented data for rehearsal only; sitepool is a research tool, not a medical device.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from datetime import date
from importlib import resources
from pathlib import Path

import numpy as np
import pandas as pd

from coordinator.monitoring.results_store import SqliteResultsStore
from coordinator.monitoring.rounds import MonitoringOutcome, monitoring_windows
from coordinator.runs.engines import Engine, run_monitoring
from simulations.dataset import FeatureTable, load_public_dataset
from simulations.development import develop_model
from simulations.drift_events import (
    build_drifting_sites,
    event_start,
    scenario_end,
    with_pending_labels,
)
from simulations.scenario import Scenario
from simulations.sites import development_split
from site_agent.contract.protocol import (
    EvaluationPlan,
    ModelReference,
    MonitoringPlan,
    Operation,
    StudyProtocol,
)
from site_agent.disclosure.approvals import approve
from site_agent.disclosure.policy import SitePolicy, SmallCellAction
from site_agent.service import SiteSettings
from site_agent.training.model_bundle import save_bundle

DRIFT_SCENARIO_FILE = "drift_scenario.toml"
STORE_FILE = "monitoring.sqlite"
MIX_ATTRIBUTE = "scanner_vendor"
HISTOGRAM_EDGES: tuple[float, ...] = (
    0.0,
    *(round(1.0 / (1.0 + math.exp(-x)), 6) for x in np.linspace(-4.5, 4.5, 7)),
    1.0,
)
"""Score bins of each window, evenly spaced on the logit scale (a confident model puts most
scores near 0 and 1). Eight coarse bins: a site suppresses small cells of the positive,
negative and pending rows, and coarse bins keep that from reshaping the label-free row."""
DEFAULT_BASELINE_WINDOWS = 6
"""Months of baseline in the rehearsal: half a year before the first event can start."""
DEFAULT_MATURATION_MONTHS = 3
"""Months between the two monitoring passes; more than the scenario's pending months, so
every pending label has come back by the second pass."""

Progress = Callable[[str], None]


@dataclass(frozen=True, slots=True)
class InjectedEvent:
    """A drift event as the rehearsal injected it: where, from which window, what."""

    site: str
    window_number: int
    description: str


@dataclass(frozen=True, slots=True)
class MonitoringPass:
    """One monitoring run of the rehearsal and the label completeness it left in the store.

    ``label_completeness`` maps each site to one value per protocol window, in order: the
    share of the stored release's cases with a known label, None where nothing is stored.
    """

    as_of: date
    outcome: MonitoringOutcome
    label_completeness: dict[str, tuple[float | None, ...]]

    def mean_completeness(self) -> float:
        """Return the mean completeness over every stored (site, window)."""
        values = [c for row in self.label_completeness.values() for c in row if c is not None]
        return sum(values) / len(values) if values else 0.0


@dataclass(frozen=True, slots=True)
class MonitoredStudy:
    """What a monitoring rehearsal ran, pass by pass, and where its results store is."""

    protocol: StudyProtocol
    store_path: Path
    passes: tuple[MonitoringPass, ...]
    events: tuple[InjectedEvent, ...]
    sites: tuple[str, ...]

    @property
    def outcome(self) -> MonitoringOutcome:
        """Return the latest pass's outcome."""
        return self.passes[-1].outcome


def drift_scenario() -> Scenario:
    """Return the packaged monitoring scenario (four invented hospitals, 24 months)."""
    text = resources.files("simulations").joinpath(DRIFT_SCENARIO_FILE).read_text()
    return Scenario.from_text(text, "toml")


def injected_events(scenario: Scenario) -> tuple[InjectedEvent, ...]:
    """Return the scenario's events with the monthly window in which each begins."""
    return tuple(
        InjectedEvent(e.site, e.from_month, e.description or "unnamed change")
        for e in sorted(scenario.drift_events, key=lambda e: (e.from_month, e.site))
    )


def monitoring_protocol(
    scenario: Scenario, model: ModelReference, *, baseline_windows: int
) -> StudyProtocol:
    """Return the rehearsal's monitoring protocol: one window per scenario month."""
    return StudyProtocol(
        study_id=f"drift-rehearsal-{scenario.seed}",
        title=f"Rehearsal of drift monitoring at {len(scenario.sites)} invented hospitals",
        model=model,
        # Calibration in two bins (cut at 0.5, a histogram edge too): every cut the
        # release reports is then a histogram edge, so the one-partition rule of the site
        # gate (site_agent.disclosure.partition) has no interleaved cuts to withhold.
        evaluation=EvaluationPlan(
            thresholds=(0.5,), histogram_edges=HISTOGRAM_EDGES, calibration_bins=2
        ),
        operations=(Operation.MONITOR,),
        rounds=scenario.months,
        quorum=1,
        monitoring=MonitoringPlan(
            first_window_start=scenario.start_date,
            window_months=1,
            windows=scenario.months,
            baseline_windows=baseline_windows,
            mix_attributes=(MIX_ATTRIBUTE,),
        ),
    )


def monitoring_policy() -> SitePolicy:
    """Return each rehearsal site's policy: monitoring allowed, small cells suppressed.

    Suppression keeps every window on the protocol's bin edges, so windows stay
    comparable bin by bin; merging would make each window's edges differ and leave few
    edges common to a window and its baseline.
    """
    return SitePolicy(
        small_cells=SmallCellAction.SUPPRESS,
        allowed_operations=(Operation.MONITOR,),
        allowed_subgroup_attributes=(MIX_ATTRIBUTE,),
    )


def rehearse_drift(
    scenario: Scenario,
    out: Path,
    *,
    engine: Engine = "inprocess",
    baseline_windows: int = DEFAULT_BASELINE_WINDOWS,
    maturation_months: int = DEFAULT_MATURATION_MONTHS,
    dataset: FeatureTable | None = None,
    progress: Progress | None = None,
) -> MonitoredStudy:
    """Lay out the drifting sites and run the monitoring passes into the results store.

    Parameters
    ----------
    maturation_months
        Months from the first pass (the scenario's end) to the second; 0: one pass only.

    Raises
    ------
    InputError
        If the scenario cannot be built or the monitoring plan is invalid.
    DeploymentError
        If the engine fails.
    """
    say = progress or (lambda _: None)
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    dataset = dataset if dataset is not None else load_public_dataset()
    say(f"building {len(scenario.sites)} drifting sites from {dataset.n_cases} public cases")
    sites = build_drifting_sites(scenario, dataset)
    development = sites[scenario.development_index]
    train, held_out = development_split(development, seed=scenario.seed)
    say(f"developing a logistic model at {development.name} on {len(train)} cases")
    developed = develop_model(train, "logistic", seed=scenario.seed, site=development.name)
    bundle_path = out / "model" / "model-bundle.zip"
    bundle_path.parent.mkdir(parents=True, exist_ok=True)
    sha256 = save_bundle(developed.model, developed.manifest, bundle_path)
    model = ModelReference(name=developed.manifest.name, architecture="logistic", sha256=sha256)
    protocol = monitoring_protocol(scenario, model, baseline_windows=baseline_windows)
    policy = monitoring_policy()
    settings = []
    tables = []
    for site in sites:
        home = out / "site-data" / site.spec.slug
        home.mkdir(parents=True, exist_ok=True)
        tables.append(held_out if site is development else site.table)
        (home / "policy.json").write_text(policy.model_dump_json(indent=2))
        approve(protocol, home / policy.approvals_file)
        settings.append(
            SiteSettings(
                site=site.name,
                data_path=home / "cases.csv",
                policy_path=home / "policy.json",
                ledger_path=home / "ledger.jsonl",
            )
        )
    for event in scenario.drift_events:
        say(f"injected: {event.site} from {event_start(scenario, event).date()}")
    store_path = out / STORE_FILE
    passes = []
    for number, as_of in enumerate(pass_dates(scenario, maturation_months), start=1):
        for table, site_settings in zip(tables, settings, strict=True):
            assert site_settings.data_path is not None
            with_pending_labels(table, scenario, as_of).to_csv(site_settings.data_path, index=False)
        say(f"pass {number} as of {as_of}: {scenario.months} monthly windows, {engine} engine")
        outcome = run_monitoring(
            protocol,
            bundle_path,
            settings,
            store_path=store_path,
            engine=engine,
            workdir=out / "run",
            as_of=as_of,
            progress=say,
        )
        passes.append(MonitoringPass(as_of, outcome, stored_completeness(store_path, protocol)))
        say(f"pass {number}: {outcome.revised_windows()} site window(s) updated")
    return MonitoredStudy(
        protocol=protocol,
        store_path=store_path,
        passes=tuple(passes),
        events=injected_events(scenario),
        sites=tuple(s.name for s in sites),
    )


def pass_dates(scenario: Scenario, maturation_months: int) -> tuple[date, ...]:
    """Return the day of each monitoring pass: the scenario's end, then once labels matured."""
    first = scenario_end(scenario)
    if scenario.pending_label_months == 0 or maturation_months == 0:
        return (first,)
    second: date = (pd.Timestamp(first) + pd.DateOffset(months=maturation_months)).date()
    return (first, second)


def stored_completeness(
    store_path: Path, protocol: StudyProtocol
) -> dict[str, tuple[float | None, ...]]:
    """Return each site's label completeness per protocol window, as the store holds it."""
    assert protocol.monitoring is not None
    windows = [(w.start, w.end) for w in monitoring_windows(protocol.monitoring)]
    with SqliteResultsStore(store_path) as store:
        records = store.windows(protocol.study_id)
    by_site: dict[str, dict[tuple[date, date], float | None]] = {}
    for r in records:
        by_site.setdefault(r.site, {})[(r.window_start, r.window_end)] = r.label_completeness
    return {site: tuple(values.get(w) for w in windows) for site, values in sorted(by_site.items())}
