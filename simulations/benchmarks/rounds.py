"""Benchmark: cost of an evaluation round on the in-process engine against a plain loop.

For 6, 20 and 100 synthetic sites, the same per-site work (read the table, score it with
the model bundle, compute the release, apply the site's disclosure policy, append to its
ledger) is timed twice: once directly in one Python loop without Flower, and once as an
evaluation round through the in-process engine (ServerApp, Grid, ClientApp, disclosure
mod, protobuf round trip of every message). The ratio is the engine's overhead. Bytes per
site reply are the compact JSON of the released reply, the payload Flower carries.

Run with ``python -m simulations.benchmarks.rounds`` (``make bench``). Figures vary with the
machine and its load; the README quotes one run.
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
import time
import uuid
from pathlib import Path

from coordinator.runs.engines import run_study
from simulations.rehearsal import PreparedStudy, prepare_study
from simulations.scenario import default_scenario
from site_agent.contract.protocol import Operation
from site_agent.contract.wire import ReplyStatus, SiteRequest
from site_agent.disclosure.ledger import Outcome, ReleaseLedger
from site_agent.disclosure.policy import SitePolicy
from site_agent.disclosure.request_check import check_request
from site_agent.disclosure.small_cells import apply_policy
from site_agent.exceptions import DisclosureRefused
from site_agent.service import answer

DEFAULT_SITE_COUNTS = (6, 20, 100)


def direct_round(study: PreparedStudy, bundle: bytes) -> list[int]:
    """Do every site's work in one loop, without Flower; return each reply's size in bytes."""
    protocol = study.protocol
    sizes = []
    for settings in study.settings:
        request = SiteRequest(
            operation=Operation.EVALUATE,
            protocol_json=protocol.canonical_json(),
            protocol_hash=protocol.content_hash(),
            round_number=1,
            request_id=uuid.uuid4().hex,
        )
        if settings.policy_path is None or settings.ledger_path is None:
            raise RuntimeError("rehearsal sites always have a policy and a ledger")
        policy = SitePolicy.load(settings.policy_path)
        check_request(request, policy)
        reply = answer(request, bundle, settings)
        if reply.status is not ReplyStatus.RELEASED or reply.release is None:
            continue  # the engine records a decline too
        try:
            release, _ = apply_policy(reply.release, policy)
        except DisclosureRefused:
            continue  # e.g. a small subgroup at a scaled-up site: declined on both paths
        released = reply.model_copy(update={"release": release})
        ReleaseLedger(settings.ledger_path).append(
            outcome=Outcome.RELEASED,
            study_id=protocol.study_id,
            protocol_hash=request.protocol_hash,
            operation=request.operation.value,
            released=released.model_dump(mode="json"),
        )
        sizes.append(len(released.model_dump_json().encode()))
    return sizes


def measure(n_sites: int, repeats: int, workdir: Path) -> dict[str, float]:
    """Time ``repeats`` direct loops and engine rounds at ``n_sites`` sites; medians."""
    scenario = default_scenario().with_sites(n_sites)
    study = prepare_study(scenario, workdir / f"sites-{n_sites}")
    bundle = study.bundle_path.read_bytes()
    direct_round(study, bundle)  # warm-up: imports, bundle load, file cache
    direct, engine, sizes = [], [], []
    for i in range(repeats):
        started = time.perf_counter()
        sizes = direct_round(study, bundle)
        direct.append(time.perf_counter() - started)
        started = time.perf_counter()
        run_study(
            study.protocol,
            study.bundle_path,
            study.settings,
            engine="inprocess",
            workdir=workdir / f"run-{n_sites}-{i}",
        )
        engine.append(time.perf_counter() - started)
    d, e = statistics.median(direct), statistics.median(engine)
    return {
        "sites": n_sites,
        "direct_s": d,
        "engine_s": e,
        "ratio": e / d,
        "reply_bytes_median": statistics.median(sizes),
        "reply_bytes_max": max(sizes),
    }


def main(argv: list[str] | None = None) -> None:
    """Print the benchmark table."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sites", type=int, nargs="+", default=list(DEFAULT_SITE_COUNTS))
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args(argv)
    print("sites  direct loop (s)  in-process engine (s)  ratio  bytes/reply (median, max)")
    with tempfile.TemporaryDirectory() as tmp:
        for n in args.sites:
            row = measure(n, args.repeats, Path(tmp))
            print(
                f"{row['sites']:>5}  {row['direct_s']:>15.2f}  {row['engine_s']:>21.2f}  "
                f"{row['ratio']:>5.2f}  {row['reply_bytes_median']:>8.0f}, "
                f"{row['reply_bytes_max']:.0f}",
                flush=True,
            )


if __name__ == "__main__":
    main()
