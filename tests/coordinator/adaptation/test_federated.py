"""Federated fine-tuning through Flower's FedAvg/FedProx on the in-process engine.

Real Flower messages, the real site ClientApp with its disclosure mod, real files.
References: the FedAvg aggregate is the example-weighted mean of the sites' weights
(McMahan et al. 2017, AISTATS, algorithm 1), computed here with numpy from each site's
own training step run directly; data from scikit-learn's WDBC copy (an open dataset).
"""

from __future__ import annotations

import json
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from flwr.app import ArrayRecord, Context
from flwr.serverapp import Grid, ServerApp
from scipy import stats
from sklearn.datasets import load_breast_cancer

from coordinator.adaptation.federated import FederatedRun, run_federated
from coordinator.adaptation.requests import AdaptationRound, request_adaptation
from coordinator.runs.inprocess import run_inprocess
from simulations.development import develop_model
from site_agent import client_app
from site_agent.contract.protocol import (
    AdaptationPlan,
    FederatedStrategy,
    ModelReference,
    Operation,
    StudyProtocol,
    UpdateNoise,
)
from site_agent.disclosure.approvals import approve
from site_agent.disclosure.policy import PrivacySettings, SitePolicy, UpdateRelease
from site_agent.exceptions import DeploymentError
from site_agent.service import SiteSettings
from site_agent.training.local_training import get_state, local_data, local_update, train_round
from site_agent.training.model_bundle import bundle_bytes, bundle_sha256, load_bundle


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
ALLOW_UPDATES = UpdateRelease(allowed=True)


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
        adaptation=AdaptationPlan(**{"federated_rounds": 1, "local_epochs": 3, **plan}),  # type: ignore[arg-type]
        quorum=2,
        reply_timeout_s=60.0,
    )


def _sites(
    tmp_path: Path,
    protocol: StudyProtocol,
    forbid: str | None = None,
    *,
    updates: UpdateRelease = ALLOW_UPDATES,
    no_updates: str | None = None,
    names: tuple[str, ...] = SITES,
    **policy: object,
) -> list[SiteSettings]:
    out = []
    for i, name in enumerate(names):
        home = tmp_path / name
        home.mkdir()
        wdbc_table(slice(170 + 130 * i, 300 + 130 * i), name).to_csv(
            home / "cases.csv", index=False
        )
        allowed = (Operation.EVALUATE,) if name == forbid else protocol.operations
        site_updates = UpdateRelease() if name == no_updates else updates
        written = SitePolicy(allowed_operations=allowed, updates=site_updates, **policy)  # type: ignore[arg-type]
        (home / "policy.json").write_text(written.model_dump_json())
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


# --------------------------------------------------------------------------- update release


def _ledger(site: SiteSettings) -> list[dict[str, object]]:
    assert site.ledger_path is not None
    return [json.loads(x) for x in site.ledger_path.read_text().splitlines()]


def _serve(sites: list[SiteSettings], main_fn: Callable[[Grid], object]) -> object:
    out: list[object] = []
    app = ServerApp()

    @app.main()
    def main(grid: Grid, context: Context) -> None:
        out.append(main_fn(grid))

    run_inprocess(app, client_app.app, [s.to_node_config() for s in sites], {})
    return out[0]


def _clipped(update: dict[str, np.ndarray], norm: float) -> dict[str, np.ndarray]:
    """FlatClip (Andrew et al. 2019 / McMahan et al. 2018): scale by min(1, C / ||u||)."""
    total = np.sqrt(sum(float(np.sum(v.astype(np.float64) ** 2)) for v in update.values()))
    return {k: v.astype(np.float64) * min(1.0, norm / total) for k, v in update.items()}


def _norm(state: dict[str, np.ndarray]) -> float:
    return float(np.sqrt(sum(np.sum(np.asarray(v, np.float64) ** 2) for v in state.values())))


def test_site_that_allows_fine_tune_but_not_updates_declines_every_round(tmp_path: Path) -> None:
    """fine_tune allowed, updates not: the site sends an Error and ledgers the refusal."""
    bundle = _bundle()
    protocol = _protocol(bundle)
    sites = _sites(tmp_path, protocol, no_updates=SITES[2])

    run = _run(protocol, bundle, sites)

    (round_one,) = run.rounds
    assert round_one.sites_trained == [SITES[0], SITES[1]]
    assert len(round_one.nodes_declined) == 1
    assert any(
        e["outcome"] == "declined" and e["reason"] == "update_release_not_allowed"
        for e in _ledger(sites[2])
    )
    assert not any(
        e["outcome"] == "released" and e["operation"] == "fine_tune" and "round" in e["released"]  # type: ignore[operator]
        for e in _ledger(sites[2])
    )


def test_released_federated_update_never_exceeds_the_clipping_norm(tmp_path: Path) -> None:
    """With LocalDpMod at negligible noise, the released update is the clipped local step."""
    bundle = _bundle()
    protocol = _protocol(bundle).model_copy(update={"quorum": 1})
    clip = 0.05
    noise = UpdateNoise(clipping_norm=clip, sensitivity=1.0, epsilon=1e6, delta=1e-5)
    sites = _sites(
        tmp_path,
        protocol,
        names=SITES[:1],
        updates=UpdateRelease(allowed=True, noise=noise),
        privacy=PrivacySettings(study_epsilon=1e7),
    )
    assert protocol.adaptation is not None
    model = load_bundle(bundle)
    initial = get_state(model.model)
    # Flower's Gaussian noise draws from numpy's legacy global generator: seed that one
    np.random.seed(11)  # noqa: NPY002

    run = _serve(sites, lambda grid: run_federated(grid, protocol, bundle, evaluate=False))

    assert isinstance(run, FederatedRun)
    released = {k: np.asarray(v) - initial[k].ravel() for k, v in run.final_weights.items()}
    # the unclipped update, by running the site's training step directly
    data = local_data(pd.read_csv(sites[0].data_path), model, protocol.adaptation)
    trained, _ = train_round(data, model, initial, protocol.adaptation)
    raw = {k: (trained[k] - initial[k]).ravel() for k in initial}
    assert _norm(raw) > 2 * clip  # clipping had to act
    # noise sd = sqrt(2 ln(1.25e5)) / 1e6 ~ 4.9e-6 per weight; 2e-4 leaves > 7 noise norms
    assert _norm(released) <= clip + 2e-4
    assert _norm(released) == pytest.approx(clip, abs=2e-4)
    flat_raw = np.concatenate([raw[k] for k in raw])
    flat_released = np.concatenate([released[k] for k in raw])
    cosine = flat_raw @ flat_released / (np.linalg.norm(flat_raw) * np.linalg.norm(flat_released))
    assert cosine > 0.999  # FlatClip scales, it does not turn the update
    (entry,) = [e for e in _ledger(sites[0]) if e["outcome"] == "released"]
    assert entry["epsilon_spent"] == 1e6
    summary = entry["released"]
    assert isinstance(summary, dict)
    assert summary["update_l2_norm"] == pytest.approx(_norm(released), abs=1e-5)


def test_federated_update_noise_has_the_standard_deviation_the_mechanism_documents(
    tmp_path: Path,
) -> None:
    """Ten noisy rounds: released − clipped local step is N(0, σ²), σ = Δ√(2 ln(1.25/δ))/ε."""
    bundle = _bundle()
    protocol = _protocol(bundle, federated_rounds=10).model_copy(update={"quorum": 1})
    noise = UpdateNoise(clipping_norm=0.05, sensitivity=0.05, epsilon=0.5, delta=1e-5)
    sites = _sites(
        tmp_path,
        protocol,
        names=SITES[:1],
        updates=UpdateRelease(allowed=True, noise=noise),
        privacy=PrivacySettings(study_epsilon=10.0),
    )
    assert protocol.adaptation is not None
    model = load_bundle(bundle)
    seen: dict[int, dict[str, np.ndarray]] = {}

    def keep(server_round: int, arrays: ArrayRecord) -> None:
        seen[server_round] = {k: v.numpy().copy() for k, v in arrays.items()}

    np.random.seed(12)  # noqa: NPY002 (Flower's noise uses numpy's legacy global generator)
    _serve(
        sites,
        lambda grid: run_federated(grid, protocol, bundle, evaluate=False, evaluate_fn=keep),
    )

    assert sorted(seen) == list(range(11))
    data = local_data(pd.read_csv(sites[0].data_path), model, protocol.adaptation)
    residuals = []
    for r in range(1, 11):
        start = seen[r - 1]
        trained, _ = train_round(data, model, start, protocol.adaptation)
        clipped = _clipped({k: trained[k] - start[k] for k in start}, noise.clipping_norm)
        residuals += [(seen[r][k] - start[k] - clipped[k]).ravel() for k in start]
    x = np.concatenate(residuals)
    # Gaussian mechanism, Dwork & Roth (2014) Thm A.1, as Flower's LocalDpMod documents it
    sigma = noise.sensitivity * np.sqrt(2 * np.log(1.25 / noise.delta)) / noise.epsilon
    statistic = float(np.sum(x**2) / sigma**2)
    # sum of squares of n N(0, σ²) draws / σ² is chi-square(n); scipy's quantiles
    assert stats.chi2.ppf(1e-4, x.size) < statistic < stats.chi2.ppf(1 - 1e-4, x.size)
    assert abs(float(x.mean())) < 4 * sigma / np.sqrt(x.size)  # mean 0 (normal z bound)
    spent = [e["epsilon_spent"] for e in _ledger(sites[0]) if e["outcome"] == "released"]
    assert spent == [0.5] * 10  # sequential composition: each round charges its epsilon


def test_noisy_update_beyond_the_study_budget_is_declined_uncharged(tmp_path: Path) -> None:
    """Budget 0.7, 0.5 per round: round 2 is declined, and only round 1 is charged."""
    bundle = _bundle()
    protocol = _protocol(bundle, federated_rounds=2).model_copy(update={"quorum": 1})
    noise = UpdateNoise(clipping_norm=0.05, sensitivity=0.05, epsilon=0.5, delta=1e-5)
    sites = _sites(
        tmp_path,
        protocol,
        names=SITES[:1],
        updates=UpdateRelease(allowed=True, noise=noise),
        privacy=PrivacySettings(study_epsilon=0.7, release_epsilon=0.1),
    )

    with pytest.raises(DeploymentError, match="federated round 2: 0 sites sent an update"):
        _serve(sites, lambda grid: run_federated(grid, protocol, bundle, evaluate=False))

    entries = _ledger(sites[0])
    assert [e["reason"] for e in entries if e["outcome"] == "declined"] == [
        "privacy_budget_exhausted"
    ]
    assert sum(float(e["epsilon_spent"]) for e in entries) == 0.5  # type: ignore[arg-type]


def test_site_local_update_leaves_only_when_the_policy_allows_it(tmp_path: Path) -> None:
    """Default policy: declined and ledgered; allowed: the update, clipped, hash ledgered."""
    bundle = _bundle()
    protocol = _protocol(bundle, case_counts=(0, 20), repeats=2, epochs=20)
    clip = 0.02
    noise = UpdateNoise(clipping_norm=clip, sensitivity=1.0, epsilon=1e6, delta=1e-5)
    sites = _sites(
        tmp_path, protocol, no_updates=SITES[2], privacy=PrivacySettings(study_epsilon=1e7)
    )
    (tmp_path / SITES[1] / "policy.json").write_text(
        SitePolicy(
            allowed_operations=protocol.operations,
            updates=UpdateRelease(allowed=True, noise=noise),
            privacy=PrivacySettings(study_epsilon=1e7),
        ).model_dump_json()
    )
    assert protocol.adaptation is not None
    model = load_bundle(bundle)

    outcome = _serve(
        sites, lambda grid: request_adaptation(grid, protocol, bundle, return_update=True)
    )

    assert isinstance(outcome, AdaptationRound)
    assert set(outcome.releases) == set(outcome.updates) == {SITES[0], SITES[1]}
    (declined,) = outcome.declines
    assert declined.site == SITES[2] and "update_release_not_allowed" in declined.reason
    assert [e["reason"] for e in _ledger(sites[2])] == ["update_release_not_allowed"]
    # no noise at site 0: the update equals fine-tuned minus initial, computed directly
    data = local_data(pd.read_csv(sites[0].data_path), model, protocol.adaptation)
    direct = local_update(data, model, protocol.adaptation)
    got = outcome.updates[SITES[0]].arrays()
    for k, v in direct.items():
        np.testing.assert_array_equal(got[k], v)  # the same deterministic training
    for site in sites[:2]:
        (entry,) = [e for e in _ledger(site) if e["outcome"] == "released"]
        summary = entry["released"]["update"]  # type: ignore[index]
        update = outcome.updates[site.site]
        assert summary["update_sha256"] == update.sha256
        # L2 norm by numpy over the arrays the coordinator received
        assert summary["update_l2_norm"] == pytest.approx(_norm(update.arrays()), rel=1e-9)
        assert "weights" not in json.dumps(summary)
    # site 1 clipped its update (negligible noise): norm at most C
    data_1 = local_data(pd.read_csv(sites[1].data_path), model, protocol.adaptation)
    assert _norm(local_update(data_1, model, protocol.adaptation)) > 2 * clip
    assert _norm(outcome.updates[SITES[1]].arrays()) <= clip + 2e-4
