"""Benchmark of federated fine-tuning: rounds to reach centralized training, time, bytes.

Run with ``python -m simulations.benchmarks.adaptation [--rounds R] [--loopback-rounds L]``.
On the default rehearsal scenario (invented hospitals) it measures:

- rounds needed for FedAvg's global model to come within 0.01 of the AUC of centralized
  training on the pooled training pools (mean over sites of the held-out test-set AUC;
  centralized gets the same number of full-batch steps as the federated run in total);
- wall time per round on the in-process engine and on a loopback deployment (real
  SuperLink and SuperNodes on 127.0.0.1; skipped with ``--loopback-rounds 0``);
- bytes per update (the array payload of one site's reply).

Figures are printed as a table; they belong in the README, never in tests. Simulation
only: the per-round AUCs use every site's test set, which no coordinator sees in a study.
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
import time
from pathlib import Path

import pandas as pd
from flwr.app import ArrayRecord, Context, MetricRecord
from flwr.serverapp import Grid, ServerApp

from coordinator.adaptation.federated import FederatedRun, run_federated, state_of
from coordinator.runs.engines import run_study
from coordinator.runs.inprocess import run_inprocess
from simulations.references import centralized_reference
from simulations.rehearsal import PreparedStudy, prepare_study
from simulations.scenario import default_scenario
from site_agent import client_app
from site_agent.contract.protocol import StudyProtocol
from site_agent.disclosure.approvals import approve
from site_agent.notices import RESEARCH_NOTICE
from site_agent.training.local_training import local_data, performance, with_state
from site_agent.training.model_bundle import load_bundle

TOLERANCE = 0.01


def main() -> None:
    """Run the benchmark and print its table."""
    parser = argparse.ArgumentParser(
        description=f"Federated fine-tuning benchmark. {RESEARCH_NOTICE}"
    )
    parser.add_argument("--rounds", type=int, default=20)
    parser.add_argument("--loopback-rounds", type=int, default=2)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        study = prepare_study(default_scenario(), work / "study", adapt=True)
        assert study.protocol.adaptation is not None
        plan = study.protocol.adaptation.model_copy(update={"federated_rounds": args.rounds})
        protocol = study.protocol.model_copy(update={"adaptation": plan})
        for site in study.settings:
            assert site.policy_path is not None
            approve(protocol, site.policy_path.parent / "approvals.json")
        bundle_bytes = study.bundle_path.read_bytes()
        bundle = load_bundle(bundle_bytes)
        tables = {s.site: pd.read_csv(s.data_path) for s in study.settings}
        datas = {site: local_data(t, bundle, plan) for site, t in tables.items()}
        thresholds = protocol.evaluation.thresholds
        per_round: dict[int, float] = {}

        def evaluate_fn(server_round: int, arrays: ArrayRecord) -> MetricRecord | None:
            model = with_state(bundle, state_of(arrays))
            aucs = [performance(model, d, thresholds).auc.auc or 0.0 for d in datas.values()]
            per_round[server_round] = statistics.fmean(aucs)
            return None

        runs: list[FederatedRun] = []
        app = ServerApp()

        @app.main()
        def _main(grid: Grid, context: Context) -> None:
            runs.append(run_federated(grid, protocol, bundle_bytes, evaluate_fn=evaluate_fn))

        run_inprocess(app, client_app.app, [s.to_node_config() for s in study.settings], {})
        central = centralized_reference(tables, study.bundle_path, protocol)
        central_mean = statistics.fmean(a.auc or 0.0 for a in central.values())
        reached = next(
            (r for r in sorted(per_round) if r > 0 and per_round[r] >= central_mean - TOLERANCE),
            None,
        )
        inproc = [r.seconds for r in runs[0].rounds]
        loop = _loopback(protocol, study, work, args.loopback_rounds)
    print(f"{'measure':58s} value")
    print(f"{'sites':58s} {len(study.settings)}")
    print(f"{'mean test AUC, bundle (round 0)':58s} {per_round.get(0, float('nan')):.4f}")
    print(
        f"{'mean test AUC, FedAvg after ' + str(args.rounds) + ' rounds':58s} "
        f"{per_round.get(args.rounds, float('nan')):.4f}"
    )
    print(f"{'mean test AUC, centralized (same total steps)':58s} {central_mean:.4f}")
    print(
        f"{'rounds to within 0.01 AUC of centralized':58s} "
        f"{reached if reached is not None else 'not within ' + str(args.rounds)}"
    )
    print(f"{'wall time per round, in-process (median s)':58s} {statistics.median(inproc):.3f}")
    if loop:
        print(f"{'wall time per round, loopback (median s)':58s} {statistics.median(loop):.3f}")
    print(f"{'bytes per update (array payload)':58s} {runs[0].rounds[0].update_bytes}")
    print(RESEARCH_NOTICE)


def _loopback(
    protocol: StudyProtocol, study: PreparedStudy, work: Path, rounds: int
) -> list[float]:
    if rounds < 1:
        return []
    assert protocol.adaptation is not None
    plan = protocol.adaptation.model_copy(
        update={"federated_rounds": rounds, "case_counts": (0,), "include_all": False, "repeats": 1}
    )
    small = protocol.model_copy(update={"adaptation": plan})
    for site in study.settings:
        assert site.policy_path is not None
        approve(small, site.policy_path.parent / "approvals.json")
    started = time.perf_counter()
    outcome = run_study(
        small, study.bundle_path, study.settings, engine="loopback", workdir=work / "loop"
    )
    print(f"loopback run took {time.perf_counter() - started:.1f} s in all")
    assert outcome.fine_tuning is not None and outcome.fine_tuning.federated is not None
    return [r.seconds for r in outcome.fine_tuning.federated.rounds]


if __name__ == "__main__":
    main()
