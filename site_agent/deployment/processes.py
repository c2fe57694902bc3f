"""Flower's processes, started and stopped the way every sitepool deployment does it.

Each process starts in its own session with Flower's offline switches set
(:func:`flower_environment`) and its output in a log file; :class:`ProcessGroups`
remembers them and stops them by process group, also on ``KeyboardInterrupt``. Flower's
SuperLink and SuperNode start a helper (SuperExec) in a session of its own, so teardown
also stops every process group whose environment carries the deployment's ``FLWR_HOME``.

Used by the coordinator's loopback and deployment engines and by the site's connect
command, so it lives at the bottom of the import graph.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from pathlib import Path

from site_agent.exceptions import DeploymentError

LOOPBACK = "127.0.0.1"
_POLL_S = 0.5
_STOP_GRACE_S = 5.0
_LOG_TAIL_LINES = 25


def site_runner_command(
    runtime_api_address: str, approved_bundles: Path | None = None
) -> list[str]:
    """Return the command that starts a site's task runner (:mod:`.task_runner`).

    The runner takes the SuperNode's tasks in place of Flower's own ClientApp process,
    so that no code from a run's app bundle is loaded at the site. ``approved_bundles``
    is the site's approved-bundles file (None: no bundle with code is approved).
    """
    command = [
        sys.executable,
        "-m",
        "site_agent.deployment.task_runner",
        "--runtime-api-address",
        runtime_api_address,
    ]
    if approved_bundles is not None:
        command += ["--approved-bundles", str(Path(approved_bundles).resolve())]
    return command


def free_port() -> int:
    """Return a TCP port on 127.0.0.1 that was free a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind((LOOPBACK, 0))
        return int(probe.getsockname()[1])


def flower_environment(
    home: Path, tmp: Path, extra: Mapping[str, str] | None = None
) -> dict[str, str]:
    """Return this process's environment with Flower's home, temp dir and offline switches."""
    env = dict(os.environ)
    tools = str(Path(sys.executable).parent)
    env.update(
        {
            "PATH": tools + os.pathsep + env.get("PATH", ""),
            "FLWR_HOME": str(home),
            "FLWR_TELEMETRY_ENABLED": "0",
            "FLWR_DISABLE_UPDATE_CHECK": "1",
            "FLWR_DISABLE_RUNTIME_DEPENDENCY_INSTALLATION": "1",
            "TMPDIR": str(tmp),
            "TORCHINDUCTOR_CACHE_DIR": str(Path(tmp) / "torchinductor"),
            "PYTHONUNBUFFERED": "1",
        }
    )
    env.update(extra or {})
    return env


def flower_tool(name: str) -> str:
    """Return the path of a Flower command installed next to this Python interpreter."""
    path = Path(sys.executable).parent / name
    if not path.exists():
        raise DeploymentError(f"Flower command {name} not found next to the Python interpreter")
    return str(path)


class ProcessGroups:
    """Processes started in their own sessions, remembered for teardown."""

    def __init__(self, env: dict[str, str]) -> None:
        self.env = env
        self.started: dict[str, tuple[subprocess.Popen[bytes], Path]] = {}

    def start(self, name: str, command: list[str], log: Path) -> subprocess.Popen[bytes]:
        """Start ``command`` in a session of its own, its output going to ``log``."""
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
        return process

    def check_alive(self) -> None:
        """Raise :class:`DeploymentError` with the log tails if a started process exited."""
        for name, (process, _) in self.started.items():
            if process.poll() is not None:
                raise DeploymentError(
                    f"{name} exited with code {process.returncode}\n{self.log_tails()}"
                )

    def log_tails(self) -> str:
        """Return the last lines of every started process's log."""
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
def process_groups(env: dict[str, str]) -> Iterator[ProcessGroups]:
    """Yield a :class:`ProcessGroups` whose processes are all stopped on the way out."""
    processes = ProcessGroups(env)
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


def wait_for_port(
    port: int, timeout_s: float, processes: ProcessGroups, host: str = LOOPBACK
) -> None:
    """Return once something listens on ``host:port``; raise if a process dies or time runs out."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        processes.check_alive()
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
            probe.settimeout(_POLL_S)
            if probe.connect_ex((host, port)) == 0:
                return
        time.sleep(_POLL_S)
    raise DeploymentError(
        f"nothing listened on {host}:{port} within {timeout_s:.0f} s\n{processes.log_tails()}"
    )
