"""One entry point for a study run, on either engine.

``inprocess`` runs the ServerApp and every site's ClientApp in this process
(:mod:`coordinator.runs.inprocess`); ``loopback`` starts a real SuperLink and one SuperNode per
site on 127.0.0.1 (:mod:`coordinator.runs.loopback`). Both run the same
:data:`coordinator.runs.server_app.app` and :data:`site_agent.client_app.app`, with the same
run config, and both hand back what the ServerApp wrote to the results file.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from datetime import date
from pathlib import Path
from typing import Literal

from coordinator.monitoring.rounds import MonitoringOutcome
from coordinator.runs import server_app
from coordinator.runs.inprocess import run_inprocess
from coordinator.runs.loopback import DEFAULT_RUN_TIMEOUT_S, run_loopback
from coordinator.runs.rounds import StudyOutcome
from coordinator.runs.server_app import RunRecord, StudyRunConfig
from site_agent import client_app
from site_agent.contract.protocol import StudyProtocol
from site_agent.exceptions import InputError
from site_agent.service import SiteSettings

Engine = Literal["inprocess", "loopback"]
PROTOCOL_FILE = "protocol.json"
RESULTS_FILE = "study-outcome.json"


def run_study(
    protocol: StudyProtocol,
    bundle_path: Path | None,
    sites: Sequence[SiteSettings],
    *,
    engine: Engine,
    workdir: Path,
    progress: Callable[[str], None] | None = None,
    timeout_s: float = DEFAULT_RUN_TIMEOUT_S,
) -> StudyOutcome:
    """Run every round of ``protocol`` at ``sites`` on the chosen engine.

    Parameters
    ----------
    protocol
        The pre-registered study protocol.
    bundle_path
        The model bundle file, or None when every site brings its own scores.
    sites
        One entry per site: its name and where its data lies.
    engine
        ``"inprocess"`` or ``"loopback"``.
    workdir
        Directory for the protocol copy, the results file and (loopback) Flower's files.
    progress
        Called with a short line at each step of a loopback run.
    timeout_s
        Loopback only: longest wait for the run's results.

    Raises
    ------
    InputError
        If no site is given, two sites share a name, or the engine is unknown.
    DeploymentError
        If the quorum is not met in a round, or the deployment fails.
    """
    config = _configured(protocol, bundle_path, sites, workdir, store_path=None)
    _deploy(config, sites, engine=engine, workdir=workdir, progress=progress, timeout_s=timeout_s)
    return RunRecord.read(config.results_path).unwrap()


def run_monitoring(
    protocol: StudyProtocol,
    bundle_path: Path | None,
    sites: Sequence[SiteSettings],
    *,
    store_path: Path,
    engine: Engine,
    workdir: Path,
    as_of: date | None = None,
    progress: Callable[[str], None] | None = None,
    timeout_s: float = DEFAULT_RUN_TIMEOUT_S,
) -> MonitoringOutcome:
    """Run one monitoring round per window of ``protocol.monitoring`` on the chosen engine.

    Each window's releases go into the SQLite results store at ``store_path``; windows
    whose stored release is final there are skipped, and windows still awaiting labels
    are asked again (see :mod:`coordinator.monitoring.rounds`). ``as_of`` is the day taken as
    today for the plan's label horizon (None: today). Other parameters and errors are
    those of :func:`run_study`.
    """
    if protocol.monitoring is None:
        raise InputError("the protocol has no monitoring plan")
    config = _configured(
        protocol, bundle_path, sites, workdir, store_path=Path(store_path).resolve()
    ).model_copy(update={"as_of": as_of})
    _deploy(config, sites, engine=engine, workdir=workdir, progress=progress, timeout_s=timeout_s)
    return RunRecord.read(config.results_path).unwrap_monitoring()


def _configured(
    protocol: StudyProtocol,
    bundle_path: Path | None,
    sites: Sequence[SiteSettings],
    workdir: Path,
    *,
    store_path: Path | None,
) -> StudyRunConfig:
    """Check the sites, write the protocol copy, and return the ServerApp's run config."""
    if not sites:
        raise InputError("a study needs at least one site")
    names = [site.site for site in sites]
    if len(set(names)) != len(names):
        raise InputError("two sites share a name")
    workdir = Path(workdir).resolve()
    workdir.mkdir(parents=True, exist_ok=True)
    protocol_path = workdir / PROTOCOL_FILE
    protocol_path.write_text(protocol.model_dump_json(indent=2))
    config = StudyRunConfig(
        protocol_path=protocol_path,
        bundle_path=None if bundle_path is None else Path(bundle_path).resolve(),
        results_path=workdir / RESULTS_FILE,
        expected_sites=len(sites),
        store_path=store_path,
    )
    config.results_path.unlink(missing_ok=True)
    return config


def _deploy(
    config: StudyRunConfig,
    sites: Sequence[SiteSettings],
    *,
    engine: Engine,
    workdir: Path,
    progress: Callable[[str], None] | None,
    timeout_s: float,
) -> None:
    """Run the ServerApp with ``config`` against ``sites`` on the chosen engine."""
    sites = [_absolute(site) for site in sites]
    workdir = Path(workdir).resolve()
    if engine == "inprocess":
        run_inprocess(
            server_app.app,
            client_app.app,
            [site.to_node_config() for site in sites],
            config.to_run_config(),
        )
    elif engine == "loopback":
        run_loopback(config, sites, workdir=workdir, timeout_s=timeout_s, progress=progress)
    else:
        raise InputError(f"unknown engine {engine!r} (use 'inprocess' or 'loopback')")


def _absolute(site: SiteSettings) -> SiteSettings:
    """Resolve a site's paths: Flower's processes do not share our working directory."""
    paths = {
        name: getattr(site, name).resolve()
        for name in ("data_path", "policy_path", "ledger_path", "image_config_path")
        if getattr(site, name) is not None
    }
    return site.model_copy(update=paths)
