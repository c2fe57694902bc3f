"""A rehearsal: the whole study, end to end, on synthetic sites drawn from a public dataset.

The rehearsal builds the scenario's sites, develops the model at the development site
(on a patient-grouped training part; the site evaluates on the held-out rest), writes
each site's table where its site agent reads it, registers a protocol, and runs the
evaluation through the same coordinator and site-agent code a real deployment uses,
on the in-process engine or on a loopback deployment. It writes:

- ``results.json``: every number, per site and pooled, with intervals;
- ``sites.csv`` and the other CSV exports;
- ``report.html``: the self-contained study report;
- ``model/`` and ``run/protocol.json``: what the study ran;
- ``site-data/<site>/``: each invented hospital's cases, policy, approvals and ledger.

Invented data for rehearsal only; sitepool is a research tool, not a medical device.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Collection
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

import pandas as pd

from coordinator.pooling.assemble import build_results
from coordinator.pooling.sites import SiteInfo
from coordinator.pooling.study_results import StudyResults
from coordinator.report.exports import write_exports
from coordinator.report.study_report import render_report
from coordinator.runs.engines import Engine, run_study
from simulations.dataset import FeatureTable, load_public_dataset
from simulations.development import develop_model
from simulations.references import with_reference_lines
from simulations.scenario import Scenario
from simulations.simulation_truth import cohort_truth
from simulations.sites import SyntheticSite, build_sites, development_split
from site_agent.contract.protocol import (
    AdaptationPlan,
    EvaluationPlan,
    ModelReference,
    Operation,
    StudyProtocol,
)
from site_agent.contract.score_scales import logit_edges, nested_calibration_edges, quantile_edges
from site_agent.disclosure.approvals import approve
from site_agent.disclosure.policy import (
    DEFAULT_MIN_CELL,
    SitePolicy,
    SmallCellAction,
    UpdateRelease,
)
from site_agent.service import SiteSettings
from site_agent.training.model_bundle import save_bundle

RESULTS_FILE = "results.json"
REPORT_FILE = "report.html"
DEFAULT_SUBGROUPS = ("scanner_vendor",)
HISTOGRAM_BINS = 160
"""Equal steps of log-odds (:func:`~site_agent.contract.score_scales.logit_edges`), so
saturated scores stay apart. More bins than the smallest site has cases (86 held-out cases
at the development site) is allowed: each site merges its bins until every class count is
0 or at least its minimum cell (``python -m simulations.benchmarks.resolution`` compares
scales)."""
DEFAULT_THRESHOLDS = (0.5,)
REHEARSAL_ADAPTATION = AdaptationPlan(epochs=200, learning_rate=0.02, l2_to_initial=0.1)
"""The fine-tuning plan a rehearsal registers, fixed in advance like any protocol's.

A weaker pull to the starting weights than the protocol default (0.1, not 1.0) and more
steps let fine-tuning go as far as a site's cases support: with the default pull the model
barely moves whatever the number of cases, so the curve would be flat from ten cases on.
"""

Progress = Callable[[str], None]
ScoreBins = Literal["logit", "development-quantiles"]
"""Where the protocol puts its score bins: equal steps of log-odds, or quantiles of the
development site's training scores (:mod:`site_agent.contract.score_scales`)."""


@dataclass(frozen=True, slots=True)
class RehearsalOutput:
    """Where a rehearsal wrote its files, and the results it produced."""

    results: StudyResults
    directory: Path
    results_path: Path
    report_path: Path
    exports: tuple[Path, ...]
    seconds: float


def write_outputs(results: StudyResults, out: Path, started: float) -> RehearsalOutput:
    """Write results.json, the CSV exports and report.html; say where they are."""
    results_path = out / RESULTS_FILE
    results.write_json(results_path)
    exports = tuple(write_exports(results, out))
    report_path = render_report(results, out / REPORT_FILE)
    return RehearsalOutput(
        results=results,
        directory=out,
        results_path=results_path,
        report_path=report_path,
        exports=exports,
        seconds=time.perf_counter() - started,
    )


@dataclass(frozen=True, slots=True)
class PreparedStudy:
    """A rehearsal laid out on disk, ready for an engine to run."""

    protocol: StudyProtocol
    bundle_path: Path
    settings: list[SiteSettings]
    sites: list[SyntheticSite]


def prepare_study(
    scenario: Scenario,
    out: Path,
    *,
    architecture: str = "logistic",
    dataset: FeatureTable | None = None,
    unapproved: Collection[str] = (),
    progress: Progress | None = None,
    adapt: bool = False,
    histogram_edges: tuple[float, ...] | None = None,
    score_bins: ScoreBins = "logit",
) -> PreparedStudy:
    """Build the sites, develop and bundle the model, register the protocol, lay out sites.

    Each site's cases, policy, approvals and ledger go under ``out/site-data/<site>/``.
    ``histogram_edges`` replaces the default score bins (:data:`HISTOGRAM_BINS` steps of
    log-odds) in the protocol; ``score_bins="development-quantiles"`` instead puts the
    edges at quantiles of the model's scores on the development site's training cases,
    one bin per :data:`~site_agent.disclosure.policy.DEFAULT_MIN_CELL` cases at most.
    """
    say = progress or (lambda _: None)
    out.mkdir(parents=True, exist_ok=True)
    dataset = dataset if dataset is not None else load_public_dataset()
    say(f"building {len(scenario.sites)} synthetic sites from {dataset.n_cases} public cases")
    sites = build_sites(scenario, dataset)
    development = sites[scenario.development_index]
    train, held_out = development_split(development, seed=scenario.seed)
    say(f"developing a {architecture} model at {development.name} on {len(train)} cases")
    developed = develop_model(train, architecture, seed=scenario.seed, site=development.name)
    bundle_path = out / "model" / "model-bundle.zip"
    bundle_path.parent.mkdir(parents=True, exist_ok=True)
    sha256 = save_bundle(developed.model, developed.manifest, bundle_path)
    if histogram_edges is None and score_bins == "development-quantiles":
        histogram_edges = _development_quantile_edges(bundle_path, sha256, train)
    protocol = StudyProtocol(
        study_id=f"rehearsal-{scenario.seed}",
        title=f"Rehearsal of an external validation across {len(sites)} invented hospitals",
        model=ModelReference(
            name=developed.manifest.name, architecture=architecture, sha256=sha256
        ),
        evaluation=EvaluationPlan(
            thresholds=DEFAULT_THRESHOLDS,
            histogram_edges=(edges := histogram_edges or logit_edges(HISTOGRAM_BINS)),
            calibration_edges=nested_calibration_edges(edges),
            subgroups=DEFAULT_SUBGROUPS,
        ),
        quorum=max(2, len(sites) // 2),
        operations=(Operation.EVALUATE, Operation.FINE_TUNE) if adapt else (Operation.EVALUATE,),
        adaptation=REHEARSAL_ADAPTATION if adapt else None,
    )
    settings = _prepare_sites(
        sites, development, held_out, protocol, out / "site-data", set(unapproved)
    )
    return PreparedStudy(protocol, bundle_path, settings, sites)


def rehearse(
    scenario: Scenario,
    out: Path,
    *,
    engine: Engine = "inprocess",
    architecture: str = "logistic",
    dataset: FeatureTable | None = None,
    unapproved: Collection[str] = (),
    progress: Progress | None = None,
    adapt: bool = False,
    histogram_edges: tuple[float, ...] | None = None,
    score_bins: ScoreBins = "logit",
) -> RehearsalOutput:
    """Run a rehearsal of ``scenario`` and write its results, exports and report to ``out``.

    Every site gets its own disclosure policy (small cells merged, subgroups by scanner
    vendor allowed), approves the protocol by its hash, and keeps a release ledger, all
    under ``out/site-data/<site>/``. Sites named in ``unapproved`` do not approve the
    protocol, so they decline, as a hospital whose ethics board has not yet signed would.

    Raises
    ------
    InputError
        If the scenario cannot be built from the dataset.
    DeploymentError
        If the engine fails or fewer sites than the quorum release statistics.
    """
    say = progress or (lambda _: None)
    started = time.perf_counter()
    out = Path(out)
    study = prepare_study(
        scenario,
        out,
        architecture=architecture,
        dataset=dataset,
        unapproved=unapproved,
        progress=say,
        adapt=adapt,
        histogram_edges=histogram_edges,
        score_bins=score_bins,
    )
    protocol, bundle_path, settings, sites = (
        study.protocol,
        study.bundle_path,
        study.settings,
        study.sites,
    )
    development = sites[scenario.development_index]
    say(f"running the evaluation round on the {engine} engine")
    outcome = run_study(
        protocol, bundle_path, settings, engine=engine, workdir=out / "run", progress=say
    )
    info = {
        site.name: SiteInfo(
            role="development" if site is development else "external",
            attributes={
                "main scanner vendor": max(
                    site.spec.vendor_mix, key=site.spec.vendor_mix.__getitem__
                )
            },
            description=site.shift_description,
            resampled=site.n_resampled,
        )
        for site in sites
    }
    say("pooling the releases and writing the report")
    results = build_results(
        protocol, outcome.rounds[-1], engine=engine, sites=info, notes=_notes(sites)
    )
    if outcome.fine_tuning is not None:
        say("adding the adaptation curves and the four reference lines")
        results = with_reference_lines(
            results, protocol, outcome.fine_tuning, bundle_path, settings
        )
    truth = cohort_truth(results, bundle_path, protocol, settings)
    if truth is not None:
        results = results.model_copy(update={"simulation_checks": [truth]})
    return write_outputs(results, out, started)


def _development_quantile_edges(
    bundle_path: Path, sha256: str, train: pd.DataFrame
) -> tuple[float, ...]:
    """Edges at quantiles of the developed model's scores on its own training cases."""
    from site_agent.training.model_bundle import load_bundle

    model = load_bundle(bundle_path.read_bytes(), expected_sha256=sha256)
    scores = model.predict(train)
    bins = min(HISTOGRAM_BINS, len(scores) // DEFAULT_MIN_CELL)
    return quantile_edges(scores.tolist(), bins, min_cell=DEFAULT_MIN_CELL)


def _prepare_sites(
    sites: list[SyntheticSite],
    development: SyntheticSite,
    held_out: pd.DataFrame,
    protocol: StudyProtocol,
    directory: Path,
    unapproved: set[str],
) -> list[SiteSettings]:
    """Lay out each site as a hospital would: its table, policy, approvals and ledger.

    The development site keeps only its held-out cases, so no site evaluates on a case
    the model was trained on.
    """
    settings = []
    policy = SitePolicy(
        small_cells=SmallCellAction.MERGE,
        allowed_subgroup_attributes=DEFAULT_SUBGROUPS,
        allowed_operations=protocol.operations,
        # Federated rounds release weight updates: the rehearsal's invented sites allow them.
        updates=UpdateRelease(allowed=Operation.FINE_TUNE in protocol.operations),
    )
    for site in sites:
        home = directory / site.spec.slug
        home.mkdir(parents=True, exist_ok=True)
        table = held_out if site is development else site.table
        table.to_csv(home / "cases.csv", index=False)
        (home / "policy.json").write_text(policy.model_dump_json(indent=2))
        approvals = home / policy.approvals_file
        approvals.unlink(missing_ok=True)
        if site.name not in unapproved:
            approve(protocol, approvals)
        ledger = home / "ledger.jsonl"
        settings.append(
            SiteSettings(
                site=site.name,
                data_path=home / "cases.csv",
                policy_path=home / "policy.json",
                ledger_path=ledger,
            )
        )
    return settings


def _notes(sites: list[SyntheticSite]) -> list[str]:
    notes = [
        "Rehearsal on invented hospitals: sites are synthetic partitions of the Wisconsin "
        "Diagnostic Breast Cancer data with simulated acquisition and population shifts; "
        "no result here describes a real hospital.",
        "The development site is evaluated only on patients held out from model training.",
    ]
    corrupted = [s.name for s in sites if s.spec.acquisition.corruption_sd > 0]
    if corrupted:
        notes.append(
            "Adaptation curves: at "
            + ", ".join(corrupted)
            + " the scenario makes some features unreliable (a multiplicative error per "
            "case), which a refit on a few cases cannot undo; fine-tuning has to shift the "
            "model's weight to other features. Where that costs the model much AUC, the "
            "curve keeps rising over tens to about a hundred local cases, more where more "
            "features are affected; where it costs little, no local cases are needed."
        )
    for site in sites:
        if site.n_resampled:
            notes.append(
                f"{site.name} asked for more cases than the public data holds for it: "
                f"{site.n_resampled} cases are resampled duplicates with small Gaussian jitter."
            )
    return notes
