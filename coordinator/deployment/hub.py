"""The coordinator's hub: a Flower SuperLink with TLS and site authentication, and its state.

Everything the hub keeps lies under one state directory the tool owns::

    <state>/hub.json           address, TLS files, listening host and port
    <state>/sites.json         admitted sites: name, Flower node id, key fingerprint
    <state>/superlink.db       Flower's own database (admitted keys, runs, messages)
    <state>/study-state.sqlite releases by (protocol hash, round, site): resumable studies
    <state>/flower-home/       FLWR_HOME: the connection the ``flwr`` CLI uses
    <state>/tmp/               TMPDIR of every Flower process
    <state>/logs/              one log per process

:func:`serve_hub` starts the SuperLink (TLS on, ``--enable-supernode-auth``, Flower's
offline switches set) and keeps it until stopped. :func:`admit_site`, :func:`list_sites`
and :func:`remove_site` register, list and unregister site keys through Flower's own CLI
(``flwr supernode register/list/unregister``); the site names are kept by the hub, since
Flower's list does not show them. Sites only connect out to the hub's port; the hub never
connects to a site.
"""

from __future__ import annotations

import json
import signal
import time
from collections.abc import Callable
from pathlib import Path
from types import FrameType
from typing import Any

from pydantic import BaseModel, ConfigDict, Field, ValidationError

from coordinator.deployment.certificates import check_server_files
from coordinator.deployment.defaults import DEFAULT_PORT
from coordinator.runs.loopback import flwr_command, toml_string
from site_agent.deployment.keys import fingerprint, read_public_key
from site_agent.deployment.processes import (
    LOOPBACK,
    flower_environment,
    flower_tool,
    process_groups,
    wait_for_port,
)
from site_agent.exceptions import DeploymentError, InputError

CONNECTION = "sitepool-hub"
HUB_FILE = "hub.json"
SITES_FILE = "sites.json"
STUDY_STATE_FILE = "study-state.sqlite"
START_TIMEOUT_S = 60.0
_SITE_NAME = r"^[A-Za-z0-9._ -]+$"


class HubSettings(BaseModel):
    """How the hub listens and which TLS files it uses (``hub.json``)."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    host: str = LOOPBACK
    port: int = Field(default=DEFAULT_PORT, ge=1, le=65535)
    ca_cert: Path
    server_cert: Path
    server_key: Path

    @property
    def local_address(self) -> str:
        """Where the coordinator's own commands reach the hub."""
        host = LOOPBACK if self.host in ("0.0.0.0", "::", "") else self.host
        return f"{host}:{self.port}"


class AdmittedSite(BaseModel):
    """A site whose public key the hub admitted."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    name: str = Field(min_length=1, max_length=80, pattern=_SITE_NAME)
    node_id: int
    fingerprint: str


class HubState:
    """Paths of a hub's state directory (see the module docstring)."""

    def __init__(self, root: Path) -> None:
        self.root = Path(root).resolve()
        self.home = self.root / "flower-home"
        self.tmp = self.root / "tmp"
        self.logs = self.root / "logs"
        self.database = self.root / "superlink.db"
        self.study_state = self.root / STUDY_STATE_FILE

    def prepare(self) -> None:
        """Create the directories."""
        for path in (self.home, self.tmp, self.logs):
            path.mkdir(parents=True, exist_ok=True)

    def env(self) -> dict[str, str]:
        """Flower's environment for every process of this hub."""
        self.prepare()
        return flower_environment(self.home, self.tmp)

    def settings(self) -> HubSettings:
        """Read ``hub.json``.

        Raises
        ------
        InputError
            If the hub was never started with this state directory.
        """
        try:
            return HubSettings.model_validate_json((self.root / HUB_FILE).read_text())
        except (OSError, ValidationError) as exc:
            raise InputError(
                f"no hub settings in {self.root}: start the coordinator there first"
            ) from exc

    def write_settings(self, settings: HubSettings) -> None:
        """Write ``hub.json`` and the ``flwr`` connection the coordinator's commands use."""
        self.prepare()
        (self.root / HUB_FILE).write_text(settings.model_dump_json(indent=2))
        (self.home / "config.toml").write_text(
            "[superlink]\n"
            f"default = {toml_string(CONNECTION)}\n\n"
            f"[superlink.{CONNECTION}]\n"
            f"address = {toml_string(settings.local_address)}\n"
            f"root-certificates = {toml_string(str(settings.ca_cert))}\n"
        )

    def sites(self) -> list[AdmittedSite]:
        """Return the admitted sites, by name."""
        path = self.root / SITES_FILE
        if not path.exists():
            return []
        try:
            raw = json.loads(path.read_text())
            sites = [AdmittedSite.model_validate(item) for item in raw]
        except (ValueError, ValidationError) as exc:
            raise InputError(f"{path.name} is damaged: {exc.__class__.__name__}") from exc
        return sorted(sites, key=lambda s: s.name)

    def write_sites(self, sites: list[AdmittedSite]) -> None:
        """Replace the list of admitted sites (written whole, then renamed)."""
        path = self.root / SITES_FILE
        partial = path.with_name(path.name + ".partial")
        partial.write_text(json.dumps([s.model_dump() for s in sites], indent=2))
        partial.replace(path)


def serve_hub(
    state: HubState,
    settings: HubSettings,
    *,
    ready: Callable[[str], None] | None = None,
    stop_after_s: float | None = None,
) -> None:
    """Start the SuperLink and keep it running until SIGINT/SIGTERM (or ``stop_after_s``).

    Raises
    ------
    DeploymentError
        If the TLS files fail their check (one line naming the cause) or the SuperLink
        does not start.
    """
    check_server_files(settings.ca_cert, settings.server_cert, settings.server_key)
    state.write_settings(settings)
    env = state.env()
    stopping: list[int] = []

    def stop(signum: int, _frame: FrameType | None) -> None:
        stopping.append(signum)

    previous = signal.signal(signal.SIGTERM, stop)
    try:
        with process_groups(env) as processes:
            processes.start(
                "superlink",
                [
                    flower_tool("flower-superlink"),
                    "--ssl-ca-certfile",
                    str(settings.ca_cert),
                    "--ssl-certfile",
                    str(settings.server_cert),
                    "--ssl-keyfile",
                    str(settings.server_key),
                    "--enable-supernode-auth",
                    "--database",
                    str(state.database),
                    "--host",
                    settings.host,
                    "--port",
                    str(settings.port),
                    "--disable-runtime-dependency-installation",
                ],
                state.logs / "superlink.log",
            )
            wait_for_port(settings.port, START_TIMEOUT_S, processes, host=LOOPBACK)
            if ready is not None:
                ready(f"{settings.host}:{settings.port}")
            started = time.monotonic()
            while not stopping:
                processes.check_alive()
                if stop_after_s is not None and time.monotonic() - started > stop_after_s:
                    break
                time.sleep(0.5)
    except KeyboardInterrupt:
        pass
    finally:
        signal.signal(signal.SIGTERM, previous)


def admit_site(state: HubState, name: str, public_key: Path) -> AdmittedSite:
    """Register a site's public key under ``name`` with the running hub.

    Raises
    ------
    InputError
        If the name is taken, the name is invalid or the file is not a site's public key.
    DeploymentError
        If Flower refused the registration (the hub not running, the key registered).
    """
    read_public_key(public_key)
    sites = state.sites()
    if any(site.name == name for site in sites):
        raise InputError(f"a site named {name!r} is already admitted")
    try:
        AdmittedSite(name=name, node_id=0, fingerprint="-")
    except ValidationError as exc:
        raise InputError(f"invalid site name {name!r}: letters, digits, . _ - and spaces") from exc
    answer = _flwr_json(
        state,
        ["supernode", "register", str(Path(public_key).resolve()), CONNECTION, "--name", name],
    )
    site = AdmittedSite(
        name=name, node_id=int(answer["node-id"]), fingerprint=fingerprint(public_key)
    )
    state.write_sites([*sites, site])
    return site


def list_sites(state: HubState) -> list[tuple[AdmittedSite, str]]:
    """Return each admitted site with its status at the hub (``online``, ``offline``, ...)."""
    answer = _flwr_json(state, ["supernode", "list", CONNECTION])
    status = {int(node["node-id"]): str(node.get("status", "")) for node in answer.get("nodes", [])}
    return [(site, status.get(site.node_id, "unknown")) for site in state.sites()]


def remove_site(state: HubState, name: str) -> AdmittedSite:
    """Unregister a site's key: the hub refuses its connections from now on.

    Raises
    ------
    InputError
        If no site of that name is admitted.
    """
    sites = state.sites()
    match = [site for site in sites if site.name == name]
    if not match:
        raise InputError(f"no admitted site is named {name!r}")
    _flwr_json(state, ["supernode", "unregister", str(match[0].node_id), CONNECTION])
    state.write_sites([site for site in sites if site.name != name])
    return match[0]


def _flwr_json(state: HubState, args: list[str]) -> dict[str, Any]:
    """Run a ``flwr`` command against the hub and return its JSON answer.

    Raises
    ------
    DeploymentError
        One line: the hub is not reachable, or Flower's own error text (never key bytes:
        Flower's answers name node ids and files only).
    """
    state.settings()
    done = flwr_command([*args, "--format", "json"], state.env(), state.tmp, timeout_s=60.0)
    try:
        answer = json.loads(done.stdout)
    except ValueError:
        answer = None
    if isinstance(answer, dict) and answer.get("success") is True:
        return answer
    detail = answer.get("error-message", "") if isinstance(answer, dict) else ""
    text = " ".join(str(detail or done.stderr or done.stdout).split())[:300]
    raise DeploymentError(f"flwr {' '.join(args[:2])} failed: {text or 'no answer from the hub'}")
