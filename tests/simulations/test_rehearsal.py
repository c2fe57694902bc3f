"""End-to-end rehearsals on the in-process engine: the whole job, on the public dataset."""

from __future__ import annotations

import io
import json
import logging
from pathlib import Path

import pandas as pd
import pytest
from sklearn.metrics import roc_auc_score

from coordinator.pooling.study_results import StudyResults
from simulations.rehearsal import rehearse
from simulations.scenario import default_scenario
from site_agent.disclosure.ledger import verify_ledger
from site_agent.notices import RESEARCH_NOTICE


@pytest.fixture(scope="module")
def default_run(tmp_path_factory: pytest.TempPathFactory) -> tuple[StudyResults, Path]:
    out = tmp_path_factory.mktemp("rehearsal")
    output = rehearse(default_scenario(), out)
    return output.results, out


def test_rehearsal_writes_results_sites_csv_and_report(
    default_run: tuple[StudyResults, Path],
) -> None:
    """results.json, sites.csv and a report naming every site are written."""
    results, out = default_run
    assert (
        StudyResults.read_json(out / "results.json").model_dump_json() == results.model_dump_json()
    )
    sites = pd.read_csv(out / "sites.csv")
    assert set(sites["site"]) == {s.name for s in default_scenario().sites}
    html = (out / "report.html").read_text()
    for site in default_scenario().sites:
        assert site.name in html
    assert RESEARCH_NOTICE in html


def test_rehearsal_site_auc_matches_sklearn_on_the_site_table(
    default_run: tuple[StudyResults, Path],
) -> None:
    """Each site's released DeLong AUC equals scikit-learn's AUC of the model on its table."""
    from site_agent.training.model_bundle import load_bundle

    results, out = default_run
    bundle = load_bundle(out / "model" / "model-bundle.zip")
    for spec in default_scenario().sites:
        table = pd.read_csv(out / "site-data" / spec.slug / "cases.csv")
        expected = roc_auc_score(table["label"], bundle.predict(table))  # scikit-learn reference
        row = next(
            m
            for m in results.metrics
            if m.site == spec.name
            and m.metric == "auc"
            and m.method == "delong"
            and m.subgroup is None
        )
        assert row.estimate == pytest.approx(expected, abs=1e-12)


def test_default_scenario_shows_degradation_at_shifted_sites(
    default_run: tuple[StudyResults, Path],
) -> None:
    """High AUC at the development site, and external sites whose CI lies below it."""
    results, _ = default_run
    auc = {
        m.site: m
        for m in results.metrics
        if m.metric == "auc" and m.method == "delong" and m.subgroup is None
    }
    development = default_scenario().development_site
    assert auc[development].estimate > 0.95
    below = [s for s, m in auc.items() if s != development and m.upper < auc[development].estimate]
    assert len(below) >= 3
    assert any("measurably worse" in f for f in results.findings)


def test_every_site_ledger_verifies_after_the_rehearsal(
    default_run: tuple[StudyResults, Path],
) -> None:
    """Each site recorded its release in a ledger whose hash chain verifies."""
    _, out = default_run
    for spec in default_scenario().sites:
        check = verify_ledger(out / "site-data" / spec.slug / "ledger.jsonl")
        assert check.ok and check.entries == 1


def test_rehearsal_completes_with_one_site_declining(tmp_path: Path) -> None:
    """A site that never approved the protocol declines; the study goes on with the rest."""
    scenario = default_scenario()
    refusing = scenario.sites[2].name
    output = rehearse(scenario, tmp_path, unapproved={refusing})
    outcome = {s.site: s for s in output.results.sites}
    assert outcome[refusing].status == "declined"
    assert outcome[refusing].reason is not None and "approv" in outcome[refusing].reason
    assert all(s.status == "released" for name, s in outcome.items() if name != refusing)
    assert refusing in (tmp_path / "report.html").read_text()
    ledger = (tmp_path / "site-data" / scenario.sites[2].slug / "ledger.jsonl").read_text()
    assert json.loads(ledger.splitlines()[-1])["outcome"] == "declined"


def test_rehearse_command_takes_a_user_feature_table(tmp_path: Path) -> None:
    """--data runs the rehearsal on a user's table (here scikit-learn's copy, re-labelled).

    Flower's own log of the federated rounds goes to rehearsal.log, not to the terminal.
    """
    from sklearn.datasets import load_breast_cancer
    from typer.testing import CliRunner

    from simulations.cli import app

    data = load_breast_cancer()
    frame = pd.DataFrame(
        data.data, columns=[f"feature_{n.replace(' ', '_')}" for n in data.feature_names]
    )
    frame["diagnosis"] = 1 - data.target  # scikit-learn codes 0 = malignant
    path = tmp_path / "features.csv"
    frame.to_csv(path, index=False)
    out = tmp_path / "out"
    terminal = io.StringIO()
    flower_console = logging.getLogger("flwr").handlers[0]
    assert isinstance(flower_console, logging.StreamHandler)
    previous = flower_console.setStream(terminal)  # what Flower would print on the terminal
    try:
        result = CliRunner().invoke(
            app,
            ["rehearse", "--out", str(out), "--data", str(path), "--label-column", "diagnosis"],
        )
    finally:
        flower_console.setStream(previous)
    assert result.exit_code == 0, result.output
    assert (out / "report.html").exists()
    assert "configure_train" in (out / "rehearsal.log").read_text()  # Flower's round log
    assert "configure_train" not in terminal.getvalue() + result.output
    bad = CliRunner().invoke(app, ["rehearse", "--out", str(out), "--data", str(path)])
    assert bad.exit_code == 2 and "no label column 'label'" in bad.output


def test_rehearsal_site_aucs_from_released_bins_are_within_0_01_of_exact(
    default_run: tuple[StudyResults, Path],
) -> None:
    """Logit-scale bins: each site's AUC from its released (merged) bins is within 0.01.

    The one-partition rule (site_agent.disclosure.partition) merges bins until each class
    count per cell is 0 or at least 5; each class keeps its own bins. The exact AUC is the
    site's released DeLong point estimate (checked against scikit-learn above); the
    binned AUC spreads cases evenly in log-odds within a bin
    (site_agent.statistics.binned_auc), the target 0.01 is issue 12's.
    """
    results, _ = default_run
    for spec in default_scenario().sites:
        rows = {
            m.method: m
            for m in results.metrics
            if m.site == spec.name and m.metric == "auc" and m.subgroup is None
        }
        assert abs(rows["histogram"].estimate - rows["delong"].estimate) <= 0.01, spec.name


def test_rehearsal_site_roc_curves_have_many_operating_points(
    default_run: tuple[StudyResults, Path],
) -> None:
    """Every site's ROC curve from released bins has 20 or more distinct points.

    Issue 12's goal. Points come at every edge of either class; at least 10 of them rest
    on released counts of both classes (exact), the rest interpolate one coordinate.
    """
    results, _ = default_run
    for spec in default_scenario().sites:
        (curve,) = (c for c in results.curves if c.site == spec.name and c.kind == "roc")
        assert len(set(zip(curve.x, curve.y, strict=True))) >= 20, spec.name
        assert curve.exact is not None and sum(curve.exact) >= 10, spec.name


def test_rehearsal_one_cohort_auc_bound_holds_and_covers_the_true_value(
    default_run: tuple[StudyResults, Path],
) -> None:
    """The one-cohort AUC's binning bound is below 0.035 and covers the simulated truth.

    The goal set for this bound is 0.02 and is not met: with each class merged to cells
    of 0 or at least 5 cases at each site, the bound is about 0.029 (it was 0.05 with one
    set of bins for both classes). This pins what holds now. The true value is
    scikit-learn's AUC of all released sites' cases, recomputed here from the site tables.
    """
    from site_agent.training.model_bundle import load_bundle

    results, out = default_run
    (check,) = results.simulation_checks
    bundle = load_bundle(out / "model" / "model-bundle.zip")
    tables = [
        pd.read_csv(out / "site-data" / spec.slug / "cases.csv")
        for spec in default_scenario().sites
    ]
    scores = pd.concat([pd.Series(bundle.predict(t)) for t in tables], ignore_index=True)
    labels = pd.concat([t["label"] for t in tables], ignore_index=True)
    truth = roc_auc_score(labels, scores)  # scikit-learn reference

    assert check.bound is not None and check.bound <= 0.035
    assert check.true_value == pytest.approx(truth, abs=1e-12)
    assert abs(check.estimate - truth) <= check.bound


def test_development_quantile_bins_are_quantiles_of_the_training_scores(
    tmp_path: Path,
) -> None:
    """--score-bins development-quantiles: inner edges are numpy quantiles k/38 of the scores."""
    import numpy as np

    from simulations.dataset import load_public_dataset
    from simulations.rehearsal import prepare_study
    from simulations.sites import build_sites, development_split
    from site_agent.training.model_bundle import load_bundle

    scenario = default_scenario()
    study = prepare_study(scenario, tmp_path, score_bins="development-quantiles")
    development = build_sites(scenario, load_public_dataset())[scenario.development_index]
    train, _ = development_split(development, seed=scenario.seed)
    scores = load_bundle(study.bundle_path).predict(train)
    bins = len(train) // 5  # one bin per minimum cell of training cases

    edges = study.protocol.evaluation.histogram_edges

    expected = np.quantile(scores, np.arange(1, bins) / bins)  # numpy reference
    assert edges[0] == 0.0 and edges[-1] == 1.0
    assert np.array(edges[1:-1]) == pytest.approx(np.unique(expected), rel=1e-9)
