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
import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import ExitStack, contextmanager
from pathlib import Path

from coordinator.runs.server_app import StudyRunConfig
from site_agent.exceptions import DeploymentError
from site_agent.service import SiteSettings

LOOPBACK = "127.0.0.1"
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
    env = _environment(layout)
    with ExitStack() as stack:
        processes = stack.enter_context(_process_groups(env))
        link_port = free_port()
        processes.start(
            "superlink",
            [
                _tool("flower-superlink"),
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
                    _tool("flower-supernode"),
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
        _wait_for_port(link_port, SUPERLINK_START_TIMEOUT_S, processes)
        say(f"SuperLink listening on {LOOPBACK}:{link_port}; {len(sites)} SuperNodes started")
        _write_connection(layout, link_port)
        app_dir = _write_app(layout, config)
        run_id = _submit(app_dir, env, layout, processes)
        say(f"run {run_id} submitted")
        _wait_for_results(config.results_path, run_id, env, processes, timeout_s, say)
        say(f"run {run_id} finished")


def site_runner_command(runtime_api_address: str) -> list[str]:
    """Return the command that starts a site's task runner (:mod:`site_agent.task_runner`)."""
    return [
        sys.executable,
        "-m",
        "site_agent.task_runner",
        "--runtime-api-address",
        runtime_api_address,
    ]


def free_port() -> int:
    """Return a TCP port on 127.0.0.1 that was free a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind((LOOPBACK, 0))
        return int(probe.getsockname()[1])


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
        path.write_text("".join(f"{key} = {_toml_string(v)}\n" for key, v in values.items()))
        return path


class _Processes:
    """Processes started in their own sessions, remembered for teardown."""

    def __init__(self, env: dict[str, str]) -> None:
        self.env = env
        self.started: dict[str, tuple[subprocess.Popen[bytes], Path]] = {}

    def start(self, name: str, command: list[str], log: Path) -> None:
        with log.open("wb") as sink:
            process = subprocess.Popen(
                command,
                env=self.env,
                stdin=subprocess.DEVNULL,
                stdout=sink,
                stderr=subprocess.STDOUT,
                start_new_session=True,
            )
        self.started[name] = (process, log)

    def check_alive(self) -> None:
        for name, (process, _) in self.started.items():
            if process.poll() is not None:
                raise DeploymentError(
                    f"{name} exited with code {process.returncode}\n{self.log_tails()}"
                )

    def log_tails(self) -> str:
        parts = []
        for name, (_, log) in self.started.items():
            try:
                lines = log.read_text(errors="replace").splitlines()[-_LOG_TAIL_LINES:]
            except OSError:
                lines = ["(no log)"]
            parts.append(f"--- {name} ---\n" + "\n".join(lines))
        return "\n".join(parts)

    def stop_all(self) -> None:
        """Stop every process group we started, and any group carrying our ``FLWR_HOME``."""
        own = os.getpgid(0)
        for _ in range(2):  # a second pass catches a child started while we were stopping
            groups = {process.pid for process, _ in self.started.values()}
            groups |= _groups_with_env("FLWR_HOME", self.env["FLWR_HOME"])
            groups.discard(own)
            for group in groups:
                _signal_group(group, signal.SIGTERM)
            deadline = time.monotonic() + _STOP_GRACE_S
            while _live_groups(groups) and time.monotonic() < deadline:
                for process, _ in self.started.values():
                    process.poll()  # reap our children, or they stay in the table as zombies
                time.sleep(0.1)
            for group in _live_groups(groups):
                _signal_group(group, signal.SIGKILL)
            for process, _ in self.started.values():
                try:
                    process.wait(timeout=_STOP_GRACE_S)
                except subprocess.TimeoutExpired:
                    pass


@contextmanager
def _process_groups(env: dict[str, str]) -> Iterator[_Processes]:
    processes = _Processes(env)
    try:
        yield processes
    finally:  # also runs on KeyboardInterrupt
        processes.stop_all()


def _signal_group(group: int, sig: signal.Signals) -> None:
    try:
        os.killpg(group, sig)
    except (ProcessLookupError, PermissionError):
        pass


def _live_groups(groups: set[int]) -> set[int]:
    """Return those of ``groups`` that still have a process that is not a zombie."""
    live: set[int] = set()
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            fields = (entry / "stat").read_text().rsplit(")", 1)[1].split()
        except (OSError, IndexError):
            continue
        state, group = fields[0], int(fields[2])  # fields after "(comm)": state ppid pgrp
        if group in groups and state not in ("Z", "X"):
            live.add(group)
    return live


def _groups_with_env(key: str, value: str) -> set[int]:
    """Return process-group ids of live processes whose environment has ``key=value``."""
    marker = f"{key}={value}".encode()
    groups: set[int] = set()
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            environ = (entry / "environ").read_bytes()
            if marker in environ.split(b"\0"):
                groups.add(os.getpgid(int(entry.name)))
        except (OSError, ProcessLookupError):
            continue
    return groups


def _environment(layout: _Layout) -> dict[str, str]:
    env = dict(os.environ)
    tools = str(Path(sys.executable).parent)
    env.update(
        {
            "PATH": tools + os.pathsep + env.get("PATH", ""),
            "FLWR_HOME": str(layout.home),
            "FLWR_TELEMETRY_ENABLED": "0",
            "FLWR_DISABLE_UPDATE_CHECK": "1",
            "FLWR_DISABLE_RUNTIME_DEPENDENCY_INSTALLATION": "1",
            "TMPDIR": str(layout.tmp),
            "TORCHINDUCTOR_CACHE_DIR": str(layout.tmp / "torchinductor"),
            "PYTHONUNBUFFERED": "1",
        }
    )
    return env


def _tool(name: str) -> str:
    path = Path(sys.executable).parent / name
    if not path.exists():
        raise DeploymentError(f"Flower command {name} not found next to the Python interpreter")
    return str(path)


def _wait_for_port(port: int, timeout_s: float, processes: _Processes) -> None:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        processes.check_alive()
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
            probe.settimeout(_POLL_S)
            if probe.connect_ex((LOOPBACK, port)) == 0:
                return
        time.sleep(_POLL_S)
    raise DeploymentError(
        f"SuperLink did not listen on port {port} within {timeout_s:.0f} s\n{processes.log_tails()}"
    )


def _write_connection(layout: _Layout, port: int) -> None:
    (layout.home / "config.toml").write_text(
        "[superlink]\n"
        f"default = {_toml_string(CONNECTION_NAME)}\n\n"
        f"[superlink.{CONNECTION_NAME}]\n"
        f"address = {_toml_string(f'{LOOPBACK}:{port}')}\n"
        "insecure = true\n"
    )


def _write_app(layout: _Layout, config: StudyRunConfig) -> Path:
    run_config = "".join(
        f"{key} = {_toml_value(value)}\n" for key, value in config.to_run_config().items()
    )
    (layout.app / "pyproject.toml").write_text(
        '[build-system]\nrequires = ["hatchling"]\nbuild-backend = "hatchling.build"\n\n'
        '[project]\nname = "sitepool-study"\nversion = "1.0.0"\n'
        'description = "A sitepool study run (research tool, not a medical device)."\n'
        'license = "Apache-2.0"\ndependencies = []\n\n'
        '[tool.flwr.app]\npublisher = "sitepool"\n\n'
        "[tool.flwr.app.components]\n"
        f"serverapp = {_toml_string(_SERVER_COMPONENT)}\n"
        f"clientapp = {_toml_string(_CLIENT_COMPONENT)}\n\n"
        f"[tool.flwr.app.config]\n{run_config}"
    )
    return layout.app


def _flwr(args: list[str], env: dict[str, str], cwd: Path) -> subprocess.CompletedProcess[str]:
    try:
        return subprocess.run(
            [_tool("flwr"), *args],
            env=env,
            cwd=cwd,
            capture_output=True,
            text=True,
            timeout=120,
            start_new_session=True,
            check=False,
        )
    except subprocess.TimeoutExpired as exc:
        raise DeploymentError(f"flwr {args[0]} did not return within 120 s") from exc


def _submit(app_dir: Path, env: dict[str, str], layout: _Layout, processes: _Processes) -> int:
    done = _flwr(["run", str(app_dir), CONNECTION_NAME, "--format", "json"], env, layout.root)
    try:
        answer = json.loads(done.stdout)
        if answer.get("success") is True:
            return int(answer["run-id"])
    except (ValueError, KeyError, TypeError):
        pass
    raise DeploymentError(
        f"flwr run failed (exit {done.returncode}): {done.stdout.strip()[-800:]} "
        f"{done.stderr.strip()[-800:]}\n{processes.log_tails()}"
    )


def _wait_for_results(
    results: Path,
    run_id: int,
    env: dict[str, str],
    processes: _Processes,
    timeout_s: float,
    say: Callable[[str], None],
) -> None:
    start = time.monotonic()
    next_status = start + _STATUS_EVERY_S
    while not results.exists():
        now = time.monotonic()
        if now - start > timeout_s:
            raise DeploymentError(
                f"run {run_id} gave no results within {timeout_s:.0f} s\n{processes.log_tails()}"
            )
        processes.check_alive()
        if now >= next_status:
            status = _run_status(run_id, env, processes.env["TMPDIR"])
            say(f"run {run_id}: {status or 'status unknown'}")
            if status.startswith("finished") and not results.exists():
                time.sleep(_POLL_S)  # the file is written before the run is marked finished
                if not results.exists():
                    raise DeploymentError(
                        f"run {run_id} ended ({status}) without results\n{processes.log_tails()}"
                    )
            next_status = time.monotonic() + _STATUS_EVERY_S
        time.sleep(_POLL_S)


def _run_status(run_id: int, env: dict[str, str], cwd: str) -> str:
    """Return the run's status as ``flwr list`` reports it (``""`` if it cannot be read)."""
    done = _flwr(
        ["list", CONNECTION_NAME, "--run-id", str(run_id), "--format", "json"], env, Path(cwd)
    )
    try:
        runs = json.loads(done.stdout).get("runs", [])
        return str(runs[0].get("status", "")) if runs else ""
    except (ValueError, AttributeError, IndexError, TypeError):
        return ""


def _toml_string(value: str) -> str:
    """Quote ``value`` as a TOML basic string (JSON's escapes are valid TOML escapes)."""
    return json.dumps(value)


def _toml_value(value: bool | int | float | str) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float):
        return repr(value)
    return _toml_string(value)
