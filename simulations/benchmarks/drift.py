"""Benchmark of drift monitoring: detection delay and false alarms per chart, over seeds.

For each seed the packaged drift scenario (:func:`simulations.drift_rehearsal.drift_scenario`)
is rebuilt with that seed, the model is developed again, and every site's monthly windows
are released through the same site functions a site agent runs (the window filter of
:func:`site_agent.service.window_predictions`, :func:`site_agent.evaluation.evaluate_site`,
the site's :func:`site_agent.disclosure.small_cells.apply_policy`) and analysed by
:func:`coordinator.monitoring.analysis.analyse_windows`. Flower is left out: per seed it would
only add the transport of 96 messages, and 30 seeds through it take too long on two cores.

Measured per metric and method:

- for each injected event, the share of seeds in which the chart alarmed at the drifted
  site in the event's window or later, and the median delay in windows (0: the first
  window after the change);
- false alarms per site-year: alarms at sites without any event, over their monitored
  (post-baseline) windows, plus alarms at drifted sites before their event.

Run: ``python -m simulations.benchmarks.drift [--seeds N]``. The figures go in the README,
never into tests. Invented data; sitepool is a research tool, not a medical device.
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
import time
from datetime import UTC, datetime
from pathlib import Path

import pandas as pd

from coordinator.monitoring.analysis import DriftFindings, DriftSettings, analyse_windows
from coordinator.monitoring.results_store import WindowRecord
from coordinator.monitoring.rounds import monitoring_windows
from simulations.dataset import FeatureTable, load_public_dataset
from simulations.development import develop_model
from simulations.drift_events import build_drifting_sites, with_pending_labels
from simulations.drift_rehearsal import (
    DEFAULT_BASELINE_WINDOWS,
    InjectedEvent,
    drift_scenario,
    injected_events,
    monitoring_policy,
    monitoring_protocol,
)
from simulations.scenario import Scenario
from simulations.sites import development_split
from site_agent.contract.protocol import ModelReference
from site_agent.data.predictions import validate_predictions
from site_agent.disclosure.small_cells import apply_policy
from site_agent.evaluation import evaluate_site
from site_agent.exceptions import DisclosureRefused, EmptyWindowError
from site_agent.notices import RESEARCH_NOTICE
from site_agent.service import window_predictions
from site_agent.training.model_bundle import load_bundle, save_bundle

DEFAULT_SEEDS = 30


def simulate_windows(
    scenario: Scenario,
    *,
    baseline_windows: int = DEFAULT_BASELINE_WINDOWS,
    dataset: FeatureTable | None = None,
) -> tuple[str, list[WindowRecord]]:
    """Release every site's monthly windows through the site functions, without Flower.

    Returns the study id and one record per released window, as a results store holds them.
    """
    dataset = dataset if dataset is not None else load_public_dataset()
    sites = build_drifting_sites(scenario, dataset)
    development = sites[scenario.development_index]
    train, held_out = development_split(development, seed=scenario.seed)
    developed = develop_model(train, "logistic", seed=scenario.seed, site=development.name)
    with tempfile.TemporaryDirectory() as directory:
        path = Path(directory) / "bundle.zip"
        sha256 = save_bundle(developed.model, developed.manifest, path)
        bundle = load_bundle(path, expected_sha256=sha256)
    model = ModelReference(name=developed.manifest.name, architecture="logistic", sha256=sha256)
    protocol = monitoring_protocol(scenario, model, baseline_windows=baseline_windows)
    assert protocol.monitoring is not None  # set by monitoring_protocol
    policy = monitoring_policy()
    stored_at = datetime.now(UTC)
    records = []
    for site in sites:
        table = with_pending_labels(held_out if site is development else site.table, scenario)
        # A site's CSV is read as text; label "" marks a pending reference standard.
        frame = table.astype({"label": str}).assign(score=bundle.predict(table))
        predictions = validate_predictions(frame.astype({"acquired_on": str}))
        for number, window in enumerate(monitoring_windows(protocol.monitoring), start=1):
            try:
                release = evaluate_site(
                    window_predictions(predictions, window),
                    protocol.evaluation,
                    site=site.name,
                    protocol_hash=protocol.content_hash(),
                    mix_attributes=protocol.monitoring.mix_attributes,
                )
                controlled, _ = apply_policy(release, policy)
            except (DisclosureRefused, EmptyWindowError):
                continue
            records.append(
                WindowRecord(
                    study_id=protocol.study_id,
                    site=site.name,
                    window_start=window.start,
                    window_end=window.end,
                    round_id=number,
                    release_json=controlled.model_dump_json(),
                    stored_at=stored_at,
                    labelled_cases=controlled.statistics.n_positive
                    + controlled.statistics.n_negative,
                    pending_cases=controlled.statistics.n_pending,
                )
            )
    return protocol.study_id, records


def score_findings(
    findings: DriftFindings, events: tuple[InjectedEvent, ...], baseline_windows: int
) -> list[dict[str, object]]:
    """Return one row per (metric, method): delay per event, false alarms, monitored years."""
    drifted = {e.site: min(x.window_number for x in events if x.site == e.site) for e in events}
    n_windows = len(findings.windows)
    methods = sorted({(a.metric, a.method) for a in findings.alarms})
    rows = []
    for metric, method in methods:
        alarms = [a for a in findings.alarms if (a.metric, a.method) == (metric, method)]
        row: dict[str, object] = {"metric": metric, "method": method}
        false_alarms = 0
        quiet_windows = 0
        for site in (s.site for s in findings.sites):
            onset = drifted.get(site, n_windows + 1)
            quiet_windows += max(0, min(onset, n_windows + 1) - 1 - baseline_windows)
            false_alarms += sum(1 for a in alarms if a.site == site and a.window_number < onset)
        row["false_alarms"] = false_alarms
        row["quiet_years"] = quiet_windows / 12.0
        for event in events:
            later = [
                a.window_number - event.window_number
                for a in alarms
                if a.site == event.site and a.window_number >= event.window_number
            ]
            row[event.description] = min(later) if later else None
        rows.append(row)
    return rows


def main() -> None:
    """Run the benchmark over seeds and print the table."""
    parser = argparse.ArgumentParser(description=f"Drift monitoring benchmark. {RESEARCH_NOTICE}")
    parser.add_argument("--seeds", type=int, default=DEFAULT_SEEDS)
    args = parser.parse_args()
    base = drift_scenario()
    events = injected_events(base)
    dataset = load_public_dataset()
    settings = DriftSettings(baseline_windows=DEFAULT_BASELINE_WINDOWS)
    started = time.perf_counter()
    rows: list[dict[str, object]] = []
    for seed in range(1, args.seeds + 1):
        scenario = base.model_copy(update={"seed": seed})
        study_id, records = simulate_windows(scenario, dataset=dataset)
        findings = analyse_windows(study_id, records, settings)
        for row in score_findings(findings, events, settings.baseline_windows):
            rows.append({"seed": seed, **row})
        print(f"seed {seed}: {len(records)} windows released, {len(findings.alarms)} alarms")
    elapsed = time.perf_counter() - started
    print(_table(pd.DataFrame(rows), events, args.seeds))
    print(f"{args.seeds} seeds in {elapsed:.0f} s (in-process site functions, no Flower).")
    print(RESEARCH_NOTICE)


DETECTION_WINDOWS = 2
"""An event counts as caught promptly when an alarm comes within this many windows of it."""


def _table(frame: pd.DataFrame, events: tuple[InjectedEvent, ...], seeds: int) -> str:
    lines = []
    header = ["metric / method", "false alarms per stable site-year"]
    for event in events:
        header.append(
            f"{event.site} from window {event.window_number}: detected, within "
            f"{DETECTION_WINDOWS} windows, median delay"
        )
    lines.append(" | ".join(header))
    for (metric, method), group in frame.groupby(["metric", "method"]):
        # Seeds without any alarm of this chart have no row: they count as no false alarm.
        quiet_years = float(group["quiet_years"].iloc[0]) * seeds
        cells = [f"{metric} / {method}", f"{group['false_alarms'].sum() / quiet_years:.3f}"]
        for event in events:
            cells.append(_detection(list(group[event.description]), seeds))
        lines.append(" | ".join(cells))
    # The alarm summary as a whole: the first alarm of any detector, per seed and event.
    cells = ["any detector (alarm summary)", "-"]
    for event in events:
        per_seed = frame.groupby("seed")[event.description].apply(
            lambda d: min((x for x in d if x is not None and x == x), default=None)
        )
        cells.append(_detection(list(per_seed), seeds))
    lines.append(" | ".join(cells))
    return "\n".join(lines)


def _detection(delays: list[object], seeds: int) -> str:
    found = [float(d) for d in delays if isinstance(d, int | float) and d == d]
    prompt = sum(1 for d in found if d < DETECTION_WINDOWS)
    median = f"{statistics.median(found):.0f}" if found else "-"
    return f"{len(found)}/{seeds}, {prompt}/{seeds}, {median}"


if __name__ == "__main__":
    main()
