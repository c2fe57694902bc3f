"""Monitoring windows over the sites connected to a running hub, into a results store.

:func:`run_deployed_monitoring` submits a monitoring run of the protocol to the hub (the
same ServerApp as every study run, switched to monitoring by the results store's path:
:func:`coordinator.monitoring.rounds.run_monitoring_rounds`, one round per time window).
Each window's releases are stored in the SQLite results store as they are pooled; windows
whose stored release is final are skipped, so running the command again each month asks
the sites only for what is new or still awaiting labels. ``sitepool monitor --store``
then reads the store and writes the drift report.

The results store lives on the coordinator's machine: the hub's run writes it, this
command only reads the run's outcome.
"""

from __future__ import annotations

from collections.abc import Callable
from datetime import date
from pathlib import Path

from coordinator.deployment.defaults import DEFAULT_NODE_WAIT_S, DEFAULT_STUDY_TIMEOUT_S
from coordinator.deployment.hub import CONNECTION, HubState
from coordinator.deployment.study import finish_hub_run, submit_hub_run
from coordinator.monitoring.rounds import MonitoringOutcome
from coordinator.runs.loopback import wait_for_results
from coordinator.runs.server_app import RunRecord, StudyRunConfig
from site_agent.contract.protocol import Operation, StudyProtocol
from site_agent.exceptions import InputError

OUTCOME_FILE = "monitoring-outcome.json"


def run_deployed_monitoring(
    state: HubState,
    protocol_path: Path,
    store: Path,
    *,
    bundle_path: Path | None = None,
    as_of: date | None = None,
    timeout_s: float = DEFAULT_STUDY_TIMEOUT_S,
    node_wait_s: float = DEFAULT_NODE_WAIT_S,
    progress: Callable[[str], None] | None = None,
) -> MonitoringOutcome:
    """Run the protocol's monitoring windows at the connected sites into ``store``.

    Parameters
    ----------
    state
        The running hub's state directory.
    protocol_path
        A protocol with a monitoring plan and the ``monitor`` operation (JSON).
    store
        The SQLite results store (created if missing).
    bundle_path
        The model bundle, or None when every site brings its own scores.
    as_of
        The day taken as today for the plan's label horizon; None: today.
    timeout_s, node_wait_s
        Longest wait for the whole run, and for the admitted sites to connect.

    Raises
    ------
    InputError
        If the protocol has no monitoring plan or no site is admitted.
    DeploymentError
        If the run fails or ``timeout_s`` passes.
    """
    say = progress or (lambda _: None)
    protocol = StudyProtocol.load(protocol_path)
    if protocol.monitoring is None or Operation.MONITOR not in protocol.operations:
        raise InputError("the protocol has no monitoring plan with the monitor operation")
    sites = state.sites()
    if not sites:
        raise InputError("no site is admitted: admit the sites' public keys first")
    run_dir = state.root / "monitoring" / protocol.content_hash()[:16]
    run_dir.mkdir(parents=True, exist_ok=True)
    copy = run_dir / "protocol.json"
    copy.write_text(protocol.model_dump_json(indent=2))
    store = Path(store).resolve()
    store.parent.mkdir(parents=True, exist_ok=True)
    config = StudyRunConfig(
        protocol_path=copy,
        bundle_path=None if bundle_path is None else Path(bundle_path).resolve(),
        results_path=run_dir / OUTCOME_FILE,
        expected_sites=len(sites),
        node_wait_s=node_wait_s,
        store_path=store,
        as_of=as_of,
        site_names=tuple(site.name for site in sites),
    )
    config.results_path.unlink(missing_ok=True)
    run_id = submit_hub_run(state, config, protocol.content_hash(), say)
    say(
        f"monitoring {protocol.study_id}: run {run_id} submitted to {len(sites)} admitted "
        f"sites, {protocol.monitoring.windows} windows"
    )
    wait_for_results(config.results_path, run_id, CONNECTION, state.env(), timeout_s, say)
    finish_hub_run(state)
    return RunRecord.read(config.results_path).unwrap_monitoring()
