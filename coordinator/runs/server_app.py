"""The coordinator's Flower ServerApp: run a study's rounds and write what came back.

The run config names the protocol file, the model bundle file (empty for sites that bring
their own scores), where to write the results and how many sites to wait for. The app
waits until that many nodes are connected (or the wait runs out), runs
:func:`~coordinator.runs.rounds.run_study_rounds` and writes a :class:`RunRecord` as JSON: the
study outcome, or the error that stopped the run. Both engines run this same app.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from datetime import date
from pathlib import Path

from flwr.app import Context
from flwr.serverapp import Grid, ServerApp
from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from coordinator.adaptation.fine_tuning import run_fine_tuning
from coordinator.monitoring.results_store import SqliteResultsStore
from coordinator.monitoring.rounds import MonitoringOutcome, run_monitoring_rounds
from coordinator.pooling.release_files import FileReleases, read_release_folder
from coordinator.runs.quick_grid import QuickPollGrid
from coordinator.runs.rounds import StudyOutcome, run_study_rounds
from coordinator.runs.study_state import SqliteStudyState, run_resumable_study_rounds
from site_agent.contract.protocol import Operation, StudyProtocol
from site_agent.exceptions import DeploymentError, InputError

PROTOCOL_PATH_KEY = "protocol-path"
BUNDLE_PATH_KEY = "bundle-path"
RESULTS_PATH_KEY = "results-path"
EXPECTED_SITES_KEY = "expected-sites"
NODE_WAIT_KEY = "node-wait-s"
STORE_PATH_KEY = "store-path"
AS_OF_KEY = "as-of"
STATE_PATH_KEY = "study-state-path"
SITE_NAMES_KEY = "expected-site-names"
RELEASE_FILES_KEY = "release-files-dir"
RELEASE_KEYS_KEY = "release-files-keys-dir"
"""Keys of the run config this app reads; a store path switches the app to monitoring
(:func:`~coordinator.monitoring.rounds.run_monitoring_rounds`, one round per time window), and
``as-of`` (an ISO date) is the day a monitoring run takes as today. A study-state path
makes a study run resumable (:mod:`coordinator.runs.study_state`); the expected site names
(comma-separated) are those a deployment admitted, so that absent ones are named. A
release-files folder (with the directory of the file-based sites' public keys) adds the
signed release files of each round to a resumable study before its quorum check."""

DEFAULT_NODE_WAIT_S = 60.0
_NODE_POLL_S = 0.5


class StudyRunConfig(BaseModel):
    """What the ServerApp needs to run one study."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    protocol_path: Path
    bundle_path: Path | None = None
    results_path: Path
    expected_sites: int = Field(ge=1)
    node_wait_s: float = Field(default=DEFAULT_NODE_WAIT_S, gt=0)
    store_path: Path | None = Field(
        default=None, description="Results store of a monitoring run; None for a study run."
    )
    as_of: date | None = Field(
        default=None, description="Monitoring only: the day taken as today; None: today."
    )
    state_path: Path | None = Field(
        default=None, description="Study state of a resumable study run; None: not resumable."
    )
    site_names: tuple[str, ...] = Field(
        default=(), description="Sites a deployment admitted (named in the report if absent)."
    )
    release_files: Path | None = Field(
        default=None, description="Folder of signed release files pooled with the network's."
    )
    release_keys: Path | None = Field(
        default=None, description="Public keys of the file-based sites, <site>.pub each."
    )

    @model_validator(mode="after")
    def _files_need_keys(self) -> StudyRunConfig:
        if (self.release_files is None) != (self.release_keys is None):
            raise ValueError("release files and their sites' keys go together")
        if self.release_files is not None and self.state_path is None:
            raise ValueError("release files are pooled in resumable study runs only")
        return self

    @classmethod
    def from_run_config(cls, run_config: dict[str, bool | int | float | str]) -> StudyRunConfig:
        """Read the settings from a Flower run config.

        Raises
        ------
        InputError
            If a key is missing or a value is invalid.
        """
        keys = {
            "protocol_path": PROTOCOL_PATH_KEY,
            "bundle_path": BUNDLE_PATH_KEY,
            "results_path": RESULTS_PATH_KEY,
            "expected_sites": EXPECTED_SITES_KEY,
            "node_wait_s": NODE_WAIT_KEY,
            "store_path": STORE_PATH_KEY,
            "as_of": AS_OF_KEY,
            "state_path": STATE_PATH_KEY,
            "release_files": RELEASE_FILES_KEY,
            "release_keys": RELEASE_KEYS_KEY,
        }
        values: dict[str, object] = {
            field: run_config[key]
            for field, key in keys.items()
            if key in run_config and run_config[key] != ""
        }
        names = str(run_config.get(SITE_NAMES_KEY, ""))
        values["site_names"] = tuple(name for name in names.split(",") if name)
        try:
            return cls.model_validate(values)
        except ValidationError as exc:
            first = exc.errors()[0]
            raise InputError(f"invalid run config: {first['loc']}: {first['msg']}") from exc

    def to_run_config(self) -> dict[str, bool | int | float | str]:
        """Return the run config :meth:`from_run_config` reads back."""
        config: dict[str, bool | int | float | str] = {
            PROTOCOL_PATH_KEY: str(self.protocol_path),
            BUNDLE_PATH_KEY: "" if self.bundle_path is None else str(self.bundle_path),
            RESULTS_PATH_KEY: str(self.results_path),
            EXPECTED_SITES_KEY: self.expected_sites,
            NODE_WAIT_KEY: self.node_wait_s,
        }
        if self.store_path is not None:
            config[STORE_PATH_KEY] = str(self.store_path)
        if self.as_of is not None:
            config[AS_OF_KEY] = self.as_of.isoformat()
        if self.state_path is not None:
            config[STATE_PATH_KEY] = str(self.state_path)
        if self.site_names:
            config[SITE_NAMES_KEY] = ",".join(self.site_names)
        if self.release_files is not None and self.release_keys is not None:
            config[RELEASE_FILES_KEY] = str(self.release_files)
            config[RELEASE_KEYS_KEY] = str(self.release_keys)
        return config


class RunRecord(BaseModel):
    """The results file: the study's outcome, or the error that stopped it."""

    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=True)

    outcome: StudyOutcome | None = None
    monitoring: MonitoringOutcome | None = None
    error_class: str | None = None
    error: str | None = None
    seconds: dict[str, float] = Field(
        default_factory=dict,
        description="Wall time of the run's steps (waiting for sites, rounds), for benchmarks.",
    )

    def unwrap(self) -> StudyOutcome:
        """Return the outcome, or raise :class:`DeploymentError` with the recorded error."""
        if self.outcome is None:
            raise DeploymentError(f"the study run failed: {self.error_class}: {self.error}")
        return self.outcome

    def unwrap_monitoring(self) -> MonitoringOutcome:
        """Return the monitoring outcome, or raise :class:`DeploymentError` with the error."""
        if self.monitoring is None:
            raise DeploymentError(f"the monitoring run failed: {self.error_class}: {self.error}")
        return self.monitoring

    @classmethod
    def read(cls, path: Path) -> RunRecord:
        """Read a results file written by this app."""
        try:
            return cls.model_validate_json(path.read_text())
        except (OSError, ValidationError) as exc:
            raise DeploymentError(f"cannot read the study results file {path.name}") from exc


app = ServerApp()


@app.main()
def main(grid: Grid, context: Context) -> None:
    """Run the study named in the run config and write its :class:`RunRecord`."""
    config = StudyRunConfig.from_run_config(context.run_config)
    grid = QuickPollGrid(grid)  # replies collected every 0.1 s, not Flower's every 3 s
    seconds: dict[str, float] = {}
    try:
        if config.store_path is not None:
            record = RunRecord(monitoring=run_configured_monitoring(grid, config))
        else:
            record = RunRecord(outcome=run_configured_study(grid, config, seconds), seconds=seconds)
    except Exception as exc:  # recorded for the engine that waits on the file, then re-raised
        _write(config.results_path, RunRecord(error_class=type(exc).__name__, error=str(exc)))
        raise
    _write(config.results_path, record)


def run_configured_study(
    grid: Grid, config: StudyRunConfig, seconds: dict[str, float] | None = None
) -> StudyOutcome:
    """Load the protocol and bundle, wait for the sites, run every round.

    ``seconds``, if given, receives the wall time of each step (``waiting_for_sites``,
    ``evaluation_rounds``, ``fine_tuning``).
    """
    timed = seconds if seconds is not None else {}
    protocol = StudyProtocol.load(config.protocol_path)
    bundle = None if config.bundle_path is None else _read_bundle(config.bundle_path)
    started = time.perf_counter()
    _wait_for_nodes(grid, config.expected_sites, config.node_wait_s)
    timed["waiting_for_sites"] = time.perf_counter() - started
    started = time.perf_counter()
    if config.state_path is None:
        outcome = run_study_rounds(grid, protocol, bundle, timed)
    else:
        with SqliteStudyState(config.state_path) as state:
            outcome = run_resumable_study_rounds(
                grid,
                protocol,
                bundle,
                state,
                expected_sites=config.site_names,
                file_releases=_file_releases(config, protocol),
            )
    timed["evaluation_rounds"] = time.perf_counter() - started
    if Operation.FINE_TUNE in protocol.operations and bundle is not None:
        started = time.perf_counter()
        fine_tuning = run_fine_tuning(grid, protocol, bundle, timed)
        timed["fine_tuning"] = time.perf_counter() - started
        outcome = outcome.model_copy(update={"fine_tuning": fine_tuning})
    return outcome


def run_configured_monitoring(grid: Grid, config: StudyRunConfig) -> MonitoringOutcome:
    """Load the protocol and bundle, wait for the sites, run one round per window."""
    assert config.store_path is not None  # checked by the caller
    protocol = StudyProtocol.load(config.protocol_path)
    bundle = None if config.bundle_path is None else _read_bundle(config.bundle_path)
    _wait_for_nodes(grid, config.expected_sites, config.node_wait_s)
    with SqliteResultsStore(config.store_path) as store:
        return run_monitoring_rounds(grid, protocol, bundle, store, as_of=config.as_of)


def _file_releases(
    config: StudyRunConfig, protocol: StudyProtocol
) -> Callable[[int], FileReleases] | None:
    """Return the reader of each round's signed release files, or None without a folder."""
    folder, keys = config.release_files, config.release_keys
    if folder is None or keys is None:
        return None

    def read(number: int) -> FileReleases:
        return read_release_folder(
            folder,
            keys,
            protocol_hash=protocol.content_hash(),
            round_number=number,
            skip_other_rounds=True,
        )

    return read


def _read_bundle(path: Path) -> bytes:
    try:
        return path.read_bytes()
    except OSError as exc:
        raise InputError(f"cannot read model bundle {path.name}: {exc.strerror}") from exc


def _wait_for_nodes(grid: Grid, expected: int, wait_s: float) -> None:
    """Return once ``expected`` nodes are connected or ``wait_s`` has passed (quorum decides)."""
    deadline = time.monotonic() + wait_s
    while len(list(grid.get_node_ids())) < expected and time.monotonic() < deadline:
        time.sleep(_NODE_POLL_S)


def _write(path: Path, record: RunRecord) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    partial = path.with_name(path.name + ".partial")
    partial.write_text(record.model_dump_json(indent=2))
    partial.replace(path)
