"""Run a study from a protocol file against the sites connected to a running hub.

The run is a Flower run on the hub's SuperLink, submitted with ``flwr run`` (the same
app directory and helpers as :mod:`coordinator.runs.loopback`); its ServerApp is
:mod:`coordinator.runs.server_app` with a study state (:mod:`coordinator.runs.study_state`),
so a coordinator killed at any moment resumes where it stopped: run the same command
again. A run of the same study still active at the hub is stopped first, so that two
ServerApps never ask the sites at once.

When the run's results arrive, the study is pooled and reported exactly as a rehearsal
is: ``results.json``, the CSV exports and ``report.html`` in the output directory.

A mixed study adds sites that cannot connect: a folder of their signed release files and
a folder of their public keys (``<site>.pub``) are handed to the ServerApp, which adds each
round's checked files to the releases gathered over Flower before the quorum check
(:mod:`coordinator.pooling.release_files`); the report lists both kinds of site alike.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from coordinator.deployment.defaults import DEFAULT_NODE_WAIT_S, DEFAULT_STUDY_TIMEOUT_S
from coordinator.deployment.hub import CONNECTION, HubState
from coordinator.pooling.assemble import build_results
from coordinator.pooling.release_files import file_sites, read_release_folder
from coordinator.pooling.sites import SiteInfo
from coordinator.pooling.study_results import StudyResults
from coordinator.report.exports import write_exports
from coordinator.report.study_report import render_report
from coordinator.runs.loopback import flwr_command, submit_run, wait_for_results, write_app
from coordinator.runs.server_app import RunRecord, StudyRunConfig
from coordinator.runs.study_state import SqliteStudyState
from site_agent.contract.protocol import StudyProtocol
from site_agent.exceptions import InputError

ENGINE = "deployment"
RESULTS_FILE = "results.json"
REPORT_FILE = "report.html"
_ACTIVE_RUN_FILE = "active-run.json"
_DEPLOYMENT_NOTE = (
    "Run on connected hospital sites: each site computed its statistics on its own "
    "server and released only what its disclosure policy allowed."
)

_FILES_NOTE = (
    "Sites without a connection answered by signed release files; each file's signature, "
    "site key and protocol hash were checked before its release was pooled."
)


@dataclass(frozen=True, slots=True)
class StudyFiles:
    """Where a deployed study wrote its results, exports and report."""

    results: StudyResults
    results_path: Path
    report_path: Path
    exports: tuple[Path, ...]


def run_deployed_study(
    state: HubState,
    protocol_path: Path,
    out: Path,
    *,
    bundle_path: Path | None = None,
    release_files: Path | None = None,
    release_keys: Path | None = None,
    timeout_s: float = DEFAULT_STUDY_TIMEOUT_S,
    node_wait_s: float = DEFAULT_NODE_WAIT_S,
    progress: Callable[[str], None] | None = None,
) -> StudyFiles:
    """Run every round of the protocol at the admitted, connected sites; write the report.

    Parameters
    ----------
    state
        The running hub's state directory.
    protocol_path
        The study protocol (JSON).
    out
        Directory for results.json, the CSV exports and report.html.
    bundle_path
        The model bundle file, or None when every site brings its own scores.
    release_files
        A folder of signed release files of sites that cannot connect, or None.
    release_keys
        The file-based sites' public keys, ``<site>.pub`` each (needed with release_files).
    timeout_s
        Longest wait for the whole run.
    node_wait_s
        Longest wait at the start for every admitted site to be connected; the protocol's
        quorum decides whether the study can go on without the others.

    Raises
    ------
    InputError
        If the protocol cannot be read or no site is admitted.
    DeploymentError
        If quorum fails in a round (the message names each missing site and why), the
        run fails, or ``timeout_s`` passes.
    """
    say = progress or (lambda _: None)
    protocol = StudyProtocol.load(protocol_path)
    if (release_files is None) != (release_keys is None):
        raise InputError("give the release files' folder and their sites' keys together")
    for folder in (release_files, release_keys):
        if folder is not None and not Path(folder).is_dir():
            raise InputError(f"{folder} is not a folder")
    sites = state.sites()
    if not sites:
        raise InputError("no site is admitted: admit the sites' public keys first")
    out = Path(out).resolve()
    run_dir = out / "run"
    run_dir.mkdir(parents=True, exist_ok=True)
    copy = run_dir / "protocol.json"
    copy.write_text(protocol.model_dump_json(indent=2))
    config = StudyRunConfig(
        protocol_path=copy,
        bundle_path=None if bundle_path is None else Path(bundle_path).resolve(),
        results_path=run_dir / "study-outcome.json",
        expected_sites=len(sites),
        node_wait_s=node_wait_s,
        state_path=state.study_state,
        site_names=tuple(site.name for site in sites),
        release_files=None if release_files is None else Path(release_files).resolve(),
        release_keys=None if release_keys is None else Path(release_keys).resolve(),
    )
    config.results_path.unlink(missing_ok=True)
    env = state.env()
    run_id = submit_hub_run(state, config, protocol.content_hash(), say)
    say(f"study {protocol.study_id}: run {run_id} submitted to {len(sites)} admitted sites")

    def stored() -> str:
        with SqliteStudyState(state.study_state) as study_state:
            counts = [
                len(study_state.releases(protocol.content_hash(), number))
                for number in range(1, protocol.rounds + 1)
            ]
        return ", ".join(f"round {n}: {c} releases" for n, c in enumerate(counts, start=1))

    wait_for_results(config.results_path, run_id, CONNECTION, env, timeout_s, say, status=stored)
    finish_hub_run(state)
    outcome = RunRecord.read(config.results_path).unwrap()
    say(f"run {run_id} finished: pooling the releases and writing the report")
    invited = {site.name: SiteInfo() for site in sites}
    notes = [_DEPLOYMENT_NOTE]
    if config.release_files is not None and config.release_keys is not None:
        files = read_release_folder(
            config.release_files,
            config.release_keys,
            protocol_hash=protocol.content_hash(),
            round_number=protocol.rounds,
            skip_other_rounds=True,
        )
        invited |= file_sites(files)
        notes.append(_FILES_NOTE)
    results = build_results(protocol, outcome.rounds[-1], engine=ENGINE, sites=invited, notes=notes)
    results_path = out / RESULTS_FILE
    results.write_json(results_path)
    exports = tuple(write_exports(results, out))
    report_path = render_report(results, out / REPORT_FILE)
    return StudyFiles(results, results_path, report_path, exports)


def submit_hub_run(
    state: HubState, config: StudyRunConfig, protocol_hash: str, say: Callable[[str], None]
) -> int:
    """Submit a run of the ServerApp with ``config`` to the hub; return its run id.

    A run of the same protocol left active by a coordinator that was killed is stopped
    first, so that two ServerApps never ask the sites at once; the new run is remembered
    as active until :func:`finish_hub_run`.
    """
    env = state.env()
    _stop_previous_run(state, env, protocol_hash, say)
    app_dir = write_app(state.root / "app", config)
    run_id = submit_run(app_dir, CONNECTION, env, state.tmp)
    (state.root / _ACTIVE_RUN_FILE).write_text(
        json.dumps({"run_id": run_id, "protocol_hash": protocol_hash})
    )
    return run_id


def finish_hub_run(state: HubState) -> None:
    """Forget the active run once its results are in."""
    (state.root / _ACTIVE_RUN_FILE).unlink(missing_ok=True)


def _stop_previous_run(
    state: HubState, env: dict[str, str], protocol_hash: str, say: Callable[[str], None]
) -> None:
    """Stop a run of this study left active by a coordinator that was killed."""
    path = state.root / _ACTIVE_RUN_FILE
    if not path.exists():
        return
    try:
        previous = json.loads(path.read_text())
        run_id = int(previous["run_id"])
        same_study = previous["protocol_hash"] == protocol_hash
    except (ValueError, KeyError, TypeError):
        path.unlink(missing_ok=True)
        return
    if not same_study:
        raise InputError(
            f"run {run_id} of another study may still be active at the hub; stop it with "
            f"flwr stop, or remove {path}"
        )
    done = flwr_command(["stop", str(run_id), CONNECTION, "--format", "json"], env, state.tmp)
    if '"success": true' in done.stdout:
        say(f"stopped run {run_id} left active by an earlier coordinator; resuming the study")
    path.unlink(missing_ok=True)
