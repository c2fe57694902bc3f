"""Connect a site to a coordinator's hub and answer its requests until stopped.

:func:`connect_site` first dials the hub once with Python's ``ssl`` module against the
consortium's CA certificate, so that a wrong CA, an expired or mismatched server
certificate or an unreachable hub is named in one line before anything else starts.
It then starts Flower's ``flower-supernode`` with TLS and the site's authentication key
(:mod:`site_agent.deployment.keys`) in ``--isolation process`` mode, with the site's data, policy
and
ledger in its node configuration, and beside it the site's own task runner
(:mod:`site_agent.deployment.task_runner`): in that mode the SuperNode never installs nor imports a
run's app bundle; the runner checks each bundle (:mod:`site_agent.deployment.app_bundle`), ledgers a
refusal, and answers accepted runs with this installed site agent's ClientApp. The
SuperNode only connects out to the hub; its local Runtime API, which the runner dials,
listens on 127.0.0.1.

The site serves until SIGINT (Ctrl-C) or SIGTERM, then stops every process it started;
if either the SuperNode or the runner ends, the other is stopped too.
A key the coordinator has not admitted ends the SuperNode at once: that is reported as
one line naming the key's fingerprint, never the key.

Hook for app-bundle checks: :data:`BEFORE_SERVE` is called with the settings before the
SuperNode starts (a site-side rule about which runs it accepts plugs in there).
"""

from __future__ import annotations

import json
import signal
import socket
import ssl
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from types import FrameType

from site_agent.deployment.app_bundle import load_approved_bundles
from site_agent.deployment.keys import check_private_key, private_fingerprint
from site_agent.deployment.processes import (
    LOOPBACK,
    flower_environment,
    flower_tool,
    free_port,
    process_groups,
    site_runner_command,
)
from site_agent.exceptions import DeploymentError, InputError
from site_agent.service import SiteSettings

DIAL_TIMEOUT_S = 10.0
REFUSED_MARKERS = ("Failed to activate SuperNode", "code: 2004")
"""Lines Flower 1.42's SuperNode logs when the hub refuses its key (exit code 305)."""
_CHECK_EVERY_S = 0.5


@dataclass(frozen=True, slots=True)
class SiteConnection:
    """Everything a site needs to connect to a hub."""

    hub: str
    ca_cert: Path
    private_key: Path
    settings: SiteSettings
    state: Path
    approved_bundles: Path | None = None
    """The site's approved app-bundle hashes (JSON); None approves no bundle with code."""


BEFORE_SERVE: list[Callable[[SiteConnection], None]] = []
"""Checks run before the SuperNode starts; each raises to refuse."""


def parse_address(address: str) -> tuple[str, int]:
    """Split ``host:port`` (IPv6 in brackets).

    Raises
    ------
    InputError
        If there is no port or it is not a number.
    """
    host, _, port = address.rpartition(":")
    if not host or not port.isdigit():
        raise InputError(f"the hub address must be host:port, got {address!r}")
    return host.strip("[]"), int(port)


def check_hub(address: str, ca_cert: Path, *, timeout_s: float = DIAL_TIMEOUT_S) -> None:
    """Dial the hub once and check its TLS certificate against the consortium CA.

    Raises
    ------
    DeploymentError
        One line: the hub is unreachable, its certificate is expired, not for this
        address, or not signed by the CA given.
    """
    host, port = parse_address(address)
    try:
        context = ssl.create_default_context(cafile=str(ca_cert))
    except (OSError, ssl.SSLError) as exc:
        raise DeploymentError(f"cannot read the CA certificate {Path(ca_cert).name}") from exc
    try:
        with (
            socket.create_connection((host, port), timeout=timeout_s) as raw,
            context.wrap_socket(raw, server_hostname=host),
        ):
            return
    except ssl.SSLCertVerificationError as exc:
        reason = exc.verify_message or "verification failed"
        if "expired" in reason:
            cause = "the hub's certificate has expired"
        elif "issuer" in reason or "self-signed" in reason or "self signed" in reason:
            cause = f"the hub's certificate is not signed by the CA {Path(ca_cert).name}"
        elif "mismatch" in reason or "match" in reason:
            cause = f"the hub's certificate is not issued for {host}"
        else:
            cause = f"the hub's certificate failed verification ({reason})"
        raise DeploymentError(f"TLS check of {address} failed: {cause}") from exc
    except (ssl.SSLError, OSError) as exc:
        raise DeploymentError(
            f"cannot reach the hub at {address}: {exc.__class__.__name__}"
        ) from exc


def connect_site(
    connection: SiteConnection,
    *,
    ready: Callable[[str], None] | None = None,
    stop_after_s: float | None = None,
) -> None:
    """Start the site's SuperNode and serve until stopped (SIGINT, SIGTERM, ``stop_after_s``).

    Raises
    ------
    InputError
        If the key, the approved-bundles file or the site settings are invalid.
    DeploymentError
        If the TLS check fails, the hub refuses the key, or the SuperNode dies.
    """
    check_private_key(connection.private_key)
    load_approved_bundles(connection.approved_bundles)  # a damaged file is named before start
    check_hub(connection.hub, connection.ca_cert)
    for check in BEFORE_SERVE:
        check(connection)
    state = Path(connection.state).resolve()
    home, tmp, logs = state / "flower-home", state / "tmp", state / "logs"
    for path in (home, tmp, logs):
        path.mkdir(parents=True, exist_ok=True)
    env = flower_environment(home, tmp)
    node_config = state / "node-config.toml"
    node_config.write_text(
        "".join(
            f"{key} = {json.dumps(value)}\n"
            for key, value in connection.settings.to_node_config().items()
        )
    )
    log = logs / "supernode.log"
    runner_log = logs / "site-runner.log"
    runtime_address = f"{LOOPBACK}:{free_port()}"
    stopping: list[int] = []

    def stop(signum: int, _frame: FrameType | None) -> None:
        stopping.append(signum)

    previous = signal.signal(signal.SIGTERM, stop)
    try:
        with process_groups(env) as processes:
            node = processes.start(
                "supernode",
                [
                    flower_tool("flower-supernode"),
                    "--root-certificates",
                    str(Path(connection.ca_cert).resolve()),
                    "--superlink",
                    connection.hub,
                    "--auth-supernode-private-key",
                    str(Path(connection.private_key).resolve()),
                    "--host",
                    LOOPBACK,
                    "--port",
                    runtime_address.rsplit(":", 1)[1],
                    "--node-config",
                    str(node_config),
                    # No app bundle is installed or imported: the site's runner takes the tasks.
                    "--isolation",
                    "process",
                ],
                log,
            )
            runner = processes.start(
                "site-runner",
                site_runner_command(runtime_address, connection.approved_bundles),
                runner_log,
            )
            if ready is not None:
                ready(log.as_posix())
            started = time.monotonic()
            while not stopping:
                if node.poll() is not None:
                    raise DeploymentError(
                        _exit_reason(log, node.returncode, connection.private_key)
                    )
                if runner.poll() is not None:
                    raise DeploymentError(
                        f"the site's task runner stopped (exit code {runner.returncode}); "
                        f"see {runner_log}"
                    )
                if stop_after_s is not None and time.monotonic() - started > stop_after_s:
                    break
                time.sleep(_CHECK_EVERY_S)
    except KeyboardInterrupt:
        pass
    finally:
        signal.signal(signal.SIGTERM, previous)


def _exit_reason(log: Path, code: int | None, private_key: Path) -> str:
    """One line on why the SuperNode ended, read from its log (which holds no key bytes)."""
    try:
        text = log.read_text(errors="replace")
    except OSError:
        text = ""
    if any(marker in text for marker in REFUSED_MARKERS):
        return (
            "the hub refused this site's key (not admitted): ask the coordinator to admit "
            f"the public key with fingerprint {private_fingerprint(private_key)}"
        )
    if "CERTIFICATE_VERIFY_FAILED" in text:
        return "the hub's TLS certificate failed verification against the CA given"
    return f"the site's Flower SuperNode stopped (exit code {code}); see {log}"
