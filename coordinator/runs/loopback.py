"""A real Flower deployment on 127.0.0.1: one SuperLink, one SuperNode per site, one run.

Everything lives under a work directory: Flower's home (``FLWR_HOME``), a temp dir, the
generated app directory, one node-config file per site and one log per process. Each
process starts in its own session and is stopped by process group in a ``finally``, and
also on ``KeyboardInterrupt``. Flower's SuperLink starts a helper in a session of its own,
so teardown also stops every process group whose environment carries this deployment's
``FLWR_HOME``. Nothing listens beyond loopback: the SuperLink and each SuperNode bind
127.0.0.1 on free ports found by binding port 0.

The run is submitted with ``flwr run <app-dir> <connection> --format json``; the app's
components are the installed :mod:`coordinator.runs.server_app` and :mod:`site_agent.client_app`,
the same objects the in-process engine runs. The engine waits for the ServerApp's results
file, checking now and then that the processes are alive and the run has not failed.
"""

from __future__ import annotations

import json
import subprocess
import time
from collections.abc import Callable, Mapping, Sequence
from contextlib import ExitStack
from pathlib import Path

from coordinator.runs.server_app import StudyRunConfig
from site_agent.deployment.processes import (
    LOOPBACK,
    flower_environment,
    flower_tool,
    free_port,
    process_groups,
    site_runner_command,
    wait_for_port,
)
from site_agent.exceptions import DeploymentError
from site_agent.service import SiteSettings

CONNECTION_NAME = "sitepool-loopback"
DEFAULT_RUN_TIMEOUT_S = 600.0
SUPERLINK_START_TIMEOUT_S = 30.0
_POLL_S = 0.5
_STATUS_EVERY_S = 15.0
_STOP_GRACE_S = 5.0
_LOG_TAIL_LINES = 25

_SERVER_COMPONENT = "coordinator.runs.server_app:app"
_CLIENT_COMPONENT = "site_agent.client_app:app"


def run_loopback(
    config: StudyRunConfig,
    sites: Sequence[SiteSettings],
    *,
    workdir: Path,
    timeout_s: float = DEFAULT_RUN_TIMEOUT_S,
    progress: Callable[[str], None] | None = None,
) -> None:
    """Run one study on a loopback SuperLink with one SuperNode per site; wait for results.

    Returns when the ServerApp has written ``config.results_path``.

    Raises
    ------
    DeploymentError
        If a process fails to start or dies, the run fails, or ``timeout_s`` passes;
        the message ends with the tail of the logs.
    """
    say = progress or (lambda _: None)
    layout = _Layout(workdir)
    env = flower_environment(layout.home, layout.tmp)
    with ExitStack() as stack:
        processes = stack.enter_context(process_groups(env))
        link_port = free_port()
        processes.start(
            "superlink",
            [
                flower_tool("flower-superlink"),
                "--insecure",
                "--host",
                LOOPBACK,
                "--port",
                str(link_port),
                "--disable-runtime-dependency-installation",
            ],
            layout.log("superlink"),
        )
        # SuperNodes retry until the SuperLink answers: start them now, not after it listens.
        for index, site in enumerate(sites):
            node_config = layout.node_config(index, site.to_node_config())
            runtime_port = free_port()
            processes.start(
                f"supernode-{index}",
                [
                    flower_tool("flower-supernode"),
                    "--insecure",
                    "--superlink",
                    f"{LOOPBACK}:{link_port}",
                    "--host",
                    LOOPBACK,
                    "--port",
                    str(runtime_port),
                    "--node-config",
                    str(node_config),
                    # The site's own task runner takes the tasks (no app bundle is installed).
                    "--isolation",
                    "process",
                ],
                layout.log(f"supernode-{index}"),
            )
            processes.start(
                f"site-runner-{index}",
                site_runner_command(f"{LOOPBACK}:{runtime_port}"),
                layout.log(f"site-runner-{index}"),
            )
        wait_for_port(link_port, SUPERLINK_START_TIMEOUT_S, processes)
        say(f"SuperLink listening on {LOOPBACK}:{link_port}; {len(sites)} SuperNodes started")
        _write_connection(layout, link_port)
        app_dir = write_app(layout.app, config)
        run_id = submit_run(app_dir, CONNECTION_NAME, env, layout.root, processes.log_tails)
        say(f"run {run_id} submitted")
        wait_for_results(
            config.results_path,
            run_id,
            CONNECTION_NAME,
            env,
            timeout_s,
            say,
            check=processes.check_alive,
            describe=processes.log_tails,
        )
        say(f"run {run_id} finished")


class _Layout:
    """Paths of one deployment under its work directory."""

    def __init__(self, workdir: Path) -> None:
        self.root = Path(workdir).resolve() / "flower"
        self.home = self.root / "home"
        self.tmp = self.root / "tmp"
        self.app = self.root / "app"
        self.logs = self.root / "logs"
        self.nodes = self.root / "nodes"
        for path in (self.home, self.tmp, self.app, self.logs, self.nodes):
            path.mkdir(parents=True, exist_ok=True)

    def log(self, name: str) -> Path:
        return self.logs / f"{name}.log"

    def node_config(self, index: int, values: Mapping[str, str]) -> Path:
        path = self.nodes / f"site-{index}.toml"
        path.write_text("".join(f"{key} = {toml_string(v)}\n" for key, v in values.items()))
        return path


def _write_connection(layout: _Layout, port: int) -> None:
    (layout.home / "config.toml").write_text(
        "[superlink]\n"
        f"default = {toml_string(CONNECTION_NAME)}\n\n"
        f"[superlink.{CONNECTION_NAME}]\n"
        f"address = {toml_string(f'{LOOPBACK}:{port}')}\n"
        "insecure = true\n"
    )


def write_app(app_dir: Path, config: StudyRunConfig) -> Path:
    """Write the Flower app directory of a study run: components and run config only.

    The app names the installed ServerApp and ClientApp; it carries no code of its own.
    """
    app_dir.mkdir(parents=True, exist_ok=True)
    run_config = "".join(
        f"{key} = {_toml_value(value)}\n" for key, value in config.to_run_config().items()
    )
    (app_dir / "pyproject.toml").write_text(
        '[build-system]\nrequires = ["hatchling"]\nbuild-backend = "hatchling.build"\n\n'
        '[project]\nname = "sitepool-study"\nversion = "1.0.0"\n'
        'description = "A sitepool study run (research tool, not a medical device)."\n'
        'license = "Apache-2.0"\ndependencies = []\n\n'
        '[tool.flwr.app]\npublisher = "sitepool"\n\n'
        "[tool.flwr.app.components]\n"
        f"serverapp = {toml_string(_SERVER_COMPONENT)}\n"
        f"clientapp = {toml_string(_CLIENT_COMPONENT)}\n\n"
        f"[tool.flwr.app.config]\n{run_config}"
    )
    return app_dir


def flwr_command(
    args: list[str], env: dict[str, str], cwd: Path, *, timeout_s: float = 120.0
) -> subprocess.CompletedProcess[str]:
    """Run ``flwr ARGS`` with ``env`` (Flower's home and switches), capturing its output."""
    try:
        return subprocess.run(
            [flower_tool("flwr"), *args],
            env=env,
            cwd=cwd,
            capture_output=True,
            text=True,
            timeout=timeout_s,
            start_new_session=True,
            check=False,
        )
    except subprocess.TimeoutExpired as exc:
        raise DeploymentError(f"flwr {args[0]} did not return within {timeout_s:.0f} s") from exc


def submit_run(
    app_dir: Path,
    connection: str,
    env: dict[str, str],
    cwd: Path,
    describe: Callable[[], str] = str,
) -> int:
    """Submit the app with ``flwr run`` on ``connection``; return the run id.

    Raises
    ------
    DeploymentError
        If Flower did not accept the run; ``describe()`` is appended (log tails).
    """
    done = flwr_command(["run", str(app_dir), connection, "--format", "json"], env, cwd)
    try:
        answer = json.loads(done.stdout)
        if answer.get("success") is True:
            return int(answer["run-id"])
    except (ValueError, KeyError, TypeError):
        pass
    raise DeploymentError(
        f"flwr run failed (exit {done.returncode}): {done.stdout.strip()[-800:]} "
        f"{done.stderr.strip()[-800:]}\n{describe()}"
    )


def wait_for_results(
    results: Path,
    run_id: int,
    connection: str,
    env: dict[str, str],
    timeout_s: float,
    say: Callable[[str], None],
    *,
    check: Callable[[], None] = lambda: None,
    describe: Callable[[], str] = str,
    status: Callable[[], str] = str,
) -> None:
    """Wait until the run writes ``results``; every so often say how it goes.

    ``check`` raises if a process the run needs has died; ``describe`` gives log tails
    for error messages; ``status`` adds a line of the caller's own to each progress line.

    Raises
    ------
    DeploymentError
        If the run ends without results or ``timeout_s`` passes.
    """
    start = time.monotonic()
    next_status = start + _STATUS_EVERY_S
    while not results.exists():
        now = time.monotonic()
        if now - start > timeout_s:
            raise DeploymentError(
                f"run {run_id} gave no results within {timeout_s:.0f} s\n{describe()}"
            )
        check()
        if now >= next_status:
            flower = run_status(run_id, connection, env)
            extra = status()
            say(f"run {run_id}: {flower or 'status unknown'}" + (f"; {extra}" if extra else ""))
            if flower.startswith("finished") and not results.exists():
                time.sleep(_POLL_S)  # the file is written before the run is marked finished
                if not results.exists():
                    raise DeploymentError(
                        f"run {run_id} ended ({flower}) without results\n{describe()}"
                    )
            next_status = time.monotonic() + _STATUS_EVERY_S
        time.sleep(_POLL_S)


def run_status(run_id: int, connection: str, env: dict[str, str]) -> str:
    """Return the run's status as ``flwr list`` reports it (``""`` if it cannot be read)."""
    done = flwr_command(
        ["list", connection, "--run-id", str(run_id), "--format", "json"],
        env,
        Path(env["TMPDIR"]),
    )
    try:
        runs = json.loads(done.stdout).get("runs", [])
        return str(runs[0].get("status", "")) if runs else ""
    except (ValueError, AttributeError, IndexError, TypeError):
        return ""


def toml_string(value: str) -> str:
    """Quote ``value`` as a TOML basic string (JSON's escapes are valid TOML escapes)."""
    return json.dumps(value)


def _toml_value(value: bool | int | float | str) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float):
        return repr(value)
    return toml_string(value)
