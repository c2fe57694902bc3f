"""Federated fine-tuning through Flower's FedAvg/FedProx on the in-process engine.

Real Flower messages, the real site ClientApp with its disclosure mod, real files.
References: the FedAvg aggregate is the example-weighted mean of the sites' weights
(McMahan et al. 2017, AISTATS, algorithm 1), computed here with numpy from each site's
own training step run directly; data from scikit-learn's WDBC copy (an open dataset).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from flwr.app import Context
from flwr.serverapp import Grid, ServerApp
from sklearn.datasets import load_breast_cancer

from coordinator.federated import FederatedRun, run_federated
from coordinator.inprocess import run_inprocess
from simulations.development import develop_model
from site_agent import client_app
from site_agent.approvals import approve
from site_agent.exceptions import DeploymentError
from site_agent.local_training import get_state, local_data, train_round
from site_agent.model_bundle import bundle_bytes, bundle_sha256, load_bundle
from site_agent.policy import SitePolicy
from site_agent.protocol import (
    AdaptationPlan,
    FederatedStrategy,
    ModelReference,
    Operation,
    StudyProtocol,
)
from site_agent.service import SiteSettings


def wdbc_table(rows: slice, prefix: str) -> pd.DataFrame:
    """Return a slice of WDBC as a site table; two consecutive cases share a patient."""
    data = load_breast_cancer()
    frame = pd.DataFrame(data.data[rows], columns=[f"feature_{i}" for i in range(30)])
    n = len(frame)
    frame.insert(0, "label", (data.target[rows] == 0).astype(int))  # 1 = malignant
    frame.insert(0, "patient_id", [f"{prefix}-p{i // 2}" for i in range(n)])
    frame.insert(0, "case_id", [f"{prefix}-c{i}" for i in range(n)])
    return frame


SITES = ("alder-bay-infirmary", "brightwater-clinic", "cold-harbour-general")


def _bundle() -> bytes:
    developed = develop_model(wdbc_table(slice(0, 170), "dev"), "logistic", seed=0)
    return bundle_bytes(developed.model, developed.manifest)


def _protocol(bundle: bytes, **plan: object) -> StudyProtocol:
    return StudyProtocol(
        study_id="wdbc-federated-test",
        title="Invented federated fine-tuning test",
        model=ModelReference(
            name="logistic", architecture="logistic", sha256=bundle_sha256(bundle)
        ),
        operations=(Operation.EVALUATE, Operation.FINE_TUNE),
        adaptation=AdaptationPlan(federated_rounds=1, local_epochs=3, **plan),  # type: ignore[arg-type]
        quorum=2,
        reply_timeout_s=60.0,
    )


def _sites(
    tmp_path: Path, protocol: StudyProtocol, forbid: str | None = None
) -> list[SiteSettings]:
    out = []
    for i, name in enumerate(SITES):
        home = tmp_path / name
        home.mkdir()
        wdbc_table(slice(170 + 130 * i, 300 + 130 * i), name).to_csv(
            home / "cases.csv", index=False
        )
        allowed = (Operation.EVALUATE,) if name == forbid else protocol.operations
        (home / "policy.json").write_text(SitePolicy(allowed_operations=allowed).model_dump_json())
        approve(protocol, home / "approvals.json")
        out.append(
            SiteSettings(
                site=name,
                data_path=home / "cases.csv",
                policy_path=home / "policy.json",
                ledger_path=home / "ledger.jsonl",
            )
        )
    return out


def _run(protocol: StudyProtocol, bundle: bytes, sites: list[SiteSettings]) -> FederatedRun:
    runs: list[FederatedRun] = []
    app = ServerApp()

    @app.main()
    def main(grid: Grid, context: Context) -> None:
        runs.append(run_federated(grid, protocol, bundle))

    run_inprocess(app, client_app.app, [s.to_node_config() for s in sites], {})
    return runs[0]


def test_fedavg_aggregate_is_the_example_weighted_mean_of_site_weights(tmp_path: Path) -> None:
    """One FedAvg round through Flower equals numpy's example-weighted mean of local steps."""
    bundle = _bundle()
    protocol = _protocol(bundle)
    sites = _sites(tmp_path, protocol)
    assert protocol.adaptation is not None

    run = _run(protocol, bundle, sites)

    model = load_bundle(bundle)
    states, weights = [], []
    for site in sites:
        data = local_data(pd.read_csv(site.data_path), model, protocol.adaptation)
        state, n = train_round(data, model, get_state(model.model), protocol.adaptation)
        states.append(state)
        weights.append(n)
    w = np.asarray(weights, dtype=float) / sum(weights)
    (round_one,) = run.rounds
    assert round_one.sites_trained == sorted(SITES)
    assert round_one.examples == sum(weights)
    for key in states[0]:
        expected = sum(wi * s[key].astype(np.float64) for wi, s in zip(w, states, strict=True))
        # float32 arithmetic in Flower's aggregate: agree to float32 precision
        np.testing.assert_allclose(run.final_weights[key], expected.ravel(), rtol=1e-5, atol=1e-6)
    assert run.evaluation is not None and set(run.evaluation.releases) == set(SITES)


def test_site_whose_policy_forbids_fine_tune_declines_and_is_ledgered(tmp_path: Path) -> None:
    """A forbidding site sends an Error and ledgers a decline; FedProx goes on with the quorum."""
    bundle = _bundle()
    protocol = _protocol(bundle, strategy=FederatedStrategy.FEDPROX, proximal_mu=0.5)
    sites = _sites(tmp_path, protocol, forbid=SITES[1])

    run = _run(protocol, bundle, sites)

    (round_one,) = run.rounds
    assert round_one.sites_trained == [SITES[0], SITES[2]]
    assert len(round_one.nodes_declined) == 1
    assert run.evaluation is not None and set(run.evaluation.releases) == {SITES[0], SITES[2]}
    entries = [
        json.loads(x) for x in (tmp_path / SITES[1] / "ledger.jsonl").read_text().splitlines()
    ]
    assert any(
        e["outcome"] == "declined"
        and e["operation"] == "fine_tune"
        and e["reason"] == "operation_not_allowed"
        for e in entries
    )
    allowed = [
        json.loads(x) for x in (tmp_path / SITES[0] / "ledger.jsonl").read_text().splitlines()
    ]
    assert any(e["outcome"] == "released" and e["operation"] == "fine_tune" for e in allowed)


def test_round_that_misses_the_quorum_stops_the_run(tmp_path: Path) -> None:
    """With a quorum of 3 and one site forbidding fine_tune, round 1 raises."""
    bundle = _bundle()
    protocol = _protocol(bundle).model_copy(update={"quorum": 3})
    sites = _sites(tmp_path, protocol, forbid=SITES[2])

    with pytest.raises(DeploymentError, match="federated round 1: 2 sites sent an update"):
        _run(protocol, bundle, sites)
