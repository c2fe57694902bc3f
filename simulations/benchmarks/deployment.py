"""Benchmark: latency of a real Flower deployment on 127.0.0.1 (SuperLink, SuperNodes, sites).

For 3 and 10 synthetic sites (the default scenario's hospitals, scored by the model bundle
at each site), one study of ``--rounds`` evaluation rounds runs on the loopback engine:
one SuperLink, one SuperNode per site in process isolation, and each site's task runner
(:mod:`site_agent.deployment.task_runner`) answering in one warm process. Reported per site count:

* ``start``: from starting the processes to the run's submission (SuperLink listening);
* ``to results``: from the start to the results file (includes the ServerApp's own
  process start and its wait for every SuperNode to connect);
* ``wait for sites``: the ServerApp's wait until every SuperNode is connected;
* ``per wave``: the evaluation rounds' wall time divided by the rounds, as the ServerApp
  measured it around its rounds, and the first and later waves apart.

The SuperNode's idle poll (a fixed 3 s sleep in flwr 1.42 when no message is waiting) and
its 0.5 s wait for a reply are Flower's and bound a wave from below on average.

With ``--federated``, the default rehearsal's adaptation also runs at 3 sites on the
loopback deployment: the site-local fine-tuning wave, the plan's FedAvg rounds (10) and the
measurement of the federated model; its wall time in the ServerApp is reported.

Run with ``python -m simulations.benchmarks.deployment`` (CPU only). Figures vary with the
machine and its load; the README quotes one run.
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

from coordinator.runs.engines import RESULTS_FILE, run_study
from coordinator.runs.server_app import RunRecord
from simulations.rehearsal import prepare_study
from simulations.scenario import default_scenario
from site_agent.disclosure.approvals import approve
from site_agent.disclosure.policy import SitePolicy

DEFAULT_SITE_COUNTS = (3, 10)


def measure(n_sites: int, rounds: int, workdir: Path) -> dict[str, float]:
    """Run one loopback study of ``rounds`` evaluation rounds at ``n_sites`` sites; time it."""
    study = prepare_study(default_scenario().with_sites(n_sites), workdir / f"sites-{n_sites}")
    protocol = study.protocol.model_copy(update={"rounds": rounds})
    for site in study.settings:
        assert site.policy_path is not None  # rehearsal sites always have a policy
        approve(protocol, SitePolicy.load(site.policy_path).approvals_file)
    steps: list[tuple[float, str]] = []
    run_dir = workdir / f"run-{n_sites}-{rounds}"
    started = time.perf_counter()
    run_study(
        protocol,
        study.bundle_path,
        study.settings,
        engine="loopback",
        workdir=run_dir,
        progress=lambda line: steps.append((time.perf_counter(), line)),
    )
    finished = time.perf_counter()
    submitted = next(t for t, line in steps if line.endswith("submitted"))
    seconds = RunRecord.read(run_dir / RESULTS_FILE).seconds
    return {
        "sites": n_sites,
        "rounds": rounds,
        "start_s": submitted - started,
        "to_results_s": finished - started,
        "wait_s": seconds.get("waiting_for_sites", float("nan")),
        "per_wave_s": seconds.get("evaluation_rounds", float("nan")) / rounds,
        "first_wave_s": seconds.get("round_1", float("nan")),
        "later_wave_s": (
            sum(seconds.get(f"round_{r}", float("nan")) for r in range(2, rounds + 1))
            / (rounds - 1)
            if rounds > 1
            else float("nan")
        ),
    }


def measure_federated(n_sites: int, workdir: Path) -> dict[str, float]:
    """Run the default rehearsal's adaptation (site-local, then 10 FedAvg rounds) on loopback."""
    study = prepare_study(
        default_scenario().with_sites(n_sites), workdir / f"adapt-{n_sites}", adapt=True
    )
    run_dir = workdir / f"adapt-run-{n_sites}"
    started = time.perf_counter()
    run_study(study.protocol, study.bundle_path, study.settings, engine="loopback", workdir=run_dir)
    finished = time.perf_counter()
    record = RunRecord.read(run_dir / RESULTS_FILE)
    plan = study.protocol.adaptation
    outcome = record.unwrap().fine_tuning
    federated = None if outcome is None else outcome.federated
    return {
        "sites": n_sites,
        "federated_rounds": 0 if plan is None else plan.federated_rounds,
        "rounds_run": 0 if federated is None else len(federated.rounds),
        "to_results_s": finished - started,
        "fine_tuning_s": record.seconds.get("fine_tuning", float("nan")),
        "federated_s": record.seconds.get("federated", float("nan")),
    }


def main(argv: list[str] | None = None) -> None:
    """Print the benchmark table."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sites", type=int, nargs="+", default=list(DEFAULT_SITE_COUNTS))
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument(
        "--federated", action="store_true", help="Also time the adaptation with FedAvg rounds."
    )
    args = parser.parse_args(argv)
    print(
        "sites  rounds  start (s)  to results (s)  wait for sites (s)  per wave (s)  "
        "first wave (s)  later waves (s)"
    )
    with tempfile.TemporaryDirectory() as tmp:
        for n in args.sites:
            row = measure(n, args.rounds, Path(tmp))
            print(
                f"{row['sites']:>5}  {row['rounds']:>6}  {row['start_s']:>9.1f}  "
                f"{row['to_results_s']:>14.1f}  {row['wait_s']:>18.1f}  "
                f"{row['per_wave_s']:>12.2f}  {row['first_wave_s']:>14.2f}  "
                f"{row['later_wave_s']:>15.2f}",
                flush=True,
            )
        if args.federated:
            row = measure_federated(3, Path(tmp))
            print(
                f"adaptation at 3 sites (site-local fine-tuning, {row['federated_rounds']:.0f} "
                f"FedAvg rounds planned, {row['rounds_run']:.0f} run, final measurement): "
                f"{row['fine_tuning_s']:.1f} s in the ServerApp, of which the FedAvg rounds "
                f"{row['federated_s']:.1f} s; "
                f"{row['to_results_s']:.1f} s from start to results",
                flush=True,
            )


if __name__ == "__main__":
    main()
