"""``sitepool coordinator ...``: run a hub for real hospital sites and run studies on it.

Commands: ``certs`` (a throwaway CA and server certificate), ``start`` (serve the hub
until Ctrl-C), ``admit``, ``sites``, ``remove`` (site keys), ``run`` (a study from a
protocol file, resumable), ``monitor`` (monitoring windows into a results store).
Every failure is one line ``error: ...`` on stderr with exit code 2; no key material is
ever printed.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path
from typing import Annotated

import typer

from coordinator.deployment.defaults import (
    DEFAULT_NODE_WAIT_S,
    DEFAULT_PORT,
    DEFAULT_STUDY_TIMEOUT_S,
    DEFAULT_VALID_DAYS,
)
from site_agent.exceptions import SitepoolError
from site_agent.notices import RESEARCH_NOTICE

EXIT_ERROR = 2
coordinator_app = typer.Typer(
    epilog=RESEARCH_NOTICE,
    name="coordinator",
    help=(
        "Run a hub that hospital sites connect to (TLS, admitted site keys only) and run "
        "studies on the connected sites."
    ),
    no_args_is_help=True,
    add_completion=False,
)
_STATE = typer.Option("--state", help="The hub's state directory (owned by this tool).")


def _fail(exc: SitepoolError) -> None:
    typer.echo(f"error: {' '.join(str(exc).split())}", err=True)
    raise typer.Exit(EXIT_ERROR)


@coordinator_app.command(
    "certs",
    help=(
        "Make a throwaway consortium CA and a server certificate for trying a study out "
        "(production: use the hospitals' own PKI)."
    ),
)
def certs_command(
    out: Annotated[Path, typer.Option("--out", help="Directory for ca.pem, server.pem, keys.")],
    name: Annotated[
        list[str] | None,
        typer.Option("--name", help="Host name or IP sites dial (repeatable); 127.0.0.1 always."),
    ] = None,
    days: Annotated[int, typer.Option("--days", help="Days of validity.")] = DEFAULT_VALID_DAYS,
) -> None:
    """Write ca.pem, ca.key, server.pem and server.key."""
    from coordinator.deployment.certificates import make_certificates

    try:
        files = make_certificates(out, names=tuple(name or ()), valid_days=days)
    except SitepoolError as exc:
        _fail(exc)
    typer.echo(f"CA certificate (give to every site): {files.ca_cert}")
    typer.echo(f"server certificate: {files.server_cert} for {', '.join(files.names)}")
    typer.echo(f"private keys (keep on this machine): {files.ca_key}, {files.server_key}")
    typer.echo(f"valid until {files.not_after:%Y-%m-%d %H:%M} UTC. {RESEARCH_NOTICE}")


@coordinator_app.command(
    "start",
    help="Start the hub and serve until Ctrl-C; sites connect to it.",
)
def start_command(
    state: Annotated[Path, _STATE],
    ca: Annotated[Path, typer.Option("--ca", help="Consortium CA certificate (PEM).")],
    cert: Annotated[Path, typer.Option("--cert", help="Server certificate (PEM).")],
    key: Annotated[Path, typer.Option("--key", help="Server private key (PEM).")],
    host: Annotated[
        str, typer.Option("--host", help="Address to listen on (0.0.0.0: every interface).")
    ] = "127.0.0.1",
    port: Annotated[int, typer.Option("--port", help="The one port sites dial.")] = DEFAULT_PORT,
) -> None:
    """Serve the hub until stopped."""
    from coordinator.deployment.hub import HubSettings, HubState, serve_hub

    settings = HubSettings(
        host=host,
        port=port,
        ca_cert=ca.resolve(),
        server_cert=cert.resolve(),
        server_key=key.resolve(),
    )
    hub = HubState(state)

    def ready(address: str) -> None:
        typer.echo(f"hub listening on {address} (TLS, admitted site keys only); Ctrl-C stops it")
        typer.echo(f"logs: {hub.logs}. {RESEARCH_NOTICE}")

    try:
        serve_hub(hub, settings, ready=ready)
    except SitepoolError as exc:
        _fail(exc)
    typer.echo("hub stopped")


@coordinator_app.command("admit", help="Admit a site: register its public key under its name.")
def admit_command(
    state: Annotated[Path, _STATE],
    site: Annotated[str, typer.Option("--site", help="The site's name in results and report.")],
    key: Annotated[Path, typer.Option("--key", help="The site's public key (site.key.pub).")],
) -> None:
    """Register a site's key with the running hub."""
    from coordinator.deployment.hub import HubState, admit_site

    try:
        admitted = admit_site(HubState(state), site, key)
    except SitepoolError as exc:
        _fail(exc)
    typer.echo(f"admitted {admitted.name}: key {admitted.fingerprint}, node {admitted.node_id}")
    typer.echo(RESEARCH_NOTICE)


@coordinator_app.command("sites", help="List admitted sites and whether they are connected.")
def sites_command(state: Annotated[Path, _STATE]) -> None:
    """Print one line per admitted site."""
    from coordinator.deployment.hub import HubState, list_sites

    try:
        rows = list_sites(HubState(state))
    except SitepoolError as exc:
        _fail(exc)
    if not rows:
        typer.echo("no site admitted yet")
    for site, status in rows:
        typer.echo(f"{site.name:<24} {status:<11} {site.fingerprint}")
    typer.echo(RESEARCH_NOTICE)


@coordinator_app.command("remove", help="Remove a site: the hub refuses its key from now on.")
def remove_command(
    state: Annotated[Path, _STATE],
    site: Annotated[str, typer.Option("--site", help="Name of the admitted site.")],
) -> None:
    """Unregister a site's key."""
    from coordinator.deployment.hub import HubState, remove_site

    try:
        removed = remove_site(HubState(state), site)
    except SitepoolError as exc:
        _fail(exc)
    typer.echo(f"removed {removed.name} (key {removed.fingerprint})")
    typer.echo(RESEARCH_NOTICE)


@coordinator_app.command(
    "run",
    help=(
        "Run a study from a protocol file on the connected sites and write results.json, "
        "CSV exports and report.html; run it again after a crash to resume."
    ),
    epilog=RESEARCH_NOTICE,
)
def run_command(
    state: Annotated[Path, _STATE],
    protocol: Annotated[Path, typer.Option("--protocol", help="Study protocol (JSON).")],
    out: Annotated[Path, typer.Option("--out", help="Directory for results and report.")],
    bundle: Annotated[
        Path | None, typer.Option("--bundle", help="Model bundle (omit if sites bring scores).")
    ] = None,
    release_files: Annotated[
        Path | None,
        typer.Option(
            "--release-files",
            help="Folder of signed release files from sites that cannot connect; pooled "
            "with the connected sites and counted towards the quorum.",
        ),
    ] = None,
    file_keys: Annotated[
        Path | None,
        typer.Option(
            "--file-site-keys",
            help="Public keys of the file-based sites, <site>.pub each (with --release-files).",
        ),
    ] = None,
    wait: Annotated[
        float, typer.Option("--wait", help="Seconds to wait for admitted sites to connect.")
    ] = DEFAULT_NODE_WAIT_S,
    timeout: Annotated[
        float, typer.Option("--timeout", help="Longest wait for the whole study, seconds.")
    ] = DEFAULT_STUDY_TIMEOUT_S,
) -> None:
    """Run the study and say where its report is."""
    from coordinator.deployment.hub import HubState
    from coordinator.deployment.study import run_deployed_study

    started = time.perf_counter()

    def progress(line: str) -> None:
        print(f"{time.perf_counter() - started:6.1f}s {line}", file=sys.stderr, flush=True)

    try:
        files = run_deployed_study(
            HubState(state),
            protocol,
            out,
            bundle_path=bundle,
            release_files=release_files,
            release_keys=file_keys,
            timeout_s=timeout,
            node_wait_s=wait,
            progress=progress,
        )
    except SitepoolError as exc:
        _fail(exc)
    for row in files.results.sites:
        typer.echo(f"  {row.site}: {row.status}" + (f" ({row.reason})" if row.reason else ""))
    typer.echo(f"results: {files.results_path}")
    typer.echo(f"report:  {files.report_path}  (open it in a browser)")
    typer.echo(RESEARCH_NOTICE)


@coordinator_app.command(
    "monitor",
    help=(
        "Run a protocol's monitoring windows at the connected sites into a results store "
        "(windows already final there are skipped); then read it with "
        "sitepool monitor --store."
    ),
    epilog=RESEARCH_NOTICE,
)
def monitor_command(
    state: Annotated[Path, _STATE],
    protocol: Annotated[
        Path, typer.Option("--protocol", help="Protocol with a monitoring plan (JSON).")
    ],
    store: Annotated[Path, typer.Option("--store", help="SQLite results store to fill.")],
    bundle: Annotated[
        Path | None, typer.Option("--bundle", help="Model bundle (omit if sites bring scores).")
    ] = None,
    as_of: Annotated[
        str | None,
        typer.Option("--as-of", help="Day taken as today for the label horizon (YYYY-MM-DD)."),
    ] = None,
    wait: Annotated[
        float, typer.Option("--wait", help="Seconds to wait for admitted sites to connect.")
    ] = DEFAULT_NODE_WAIT_S,
    timeout: Annotated[
        float, typer.Option("--timeout", help="Longest wait for the whole run, seconds.")
    ] = DEFAULT_STUDY_TIMEOUT_S,
) -> None:
    """Fetch the monitoring windows and say what was stored."""
    from datetime import date

    from coordinator.deployment.hub import HubState
    from coordinator.deployment.monitoring import run_deployed_monitoring
    from site_agent.exceptions import InputError

    started = time.perf_counter()

    def progress(line: str) -> None:
        print(f"{time.perf_counter() - started:6.1f}s {line}", file=sys.stderr, flush=True)

    try:
        try:
            today = None if as_of is None else date.fromisoformat(as_of)
        except ValueError as exc:
            raise InputError(f"--as-of must be a date YYYY-MM-DD, got {as_of!r}") from exc
        outcome = run_deployed_monitoring(
            HubState(state),
            protocol,
            store,
            bundle_path=bundle,
            as_of=today,
            timeout_s=timeout,
            node_wait_s=wait,
            progress=progress,
        )
    except SitepoolError as exc:
        _fail(exc)
    for window in outcome.windows:
        missing = [d.site for d in window.declines] + [f.site or "?" for f in window.faults]
        typer.echo(
            f"  window {window.window_number} ({window.window_start} to {window.window_end}): "
            + ("final, skipped" if window.skipped else f"{len(window.stored)} stored")
            + (f"; {len(window.revised)} revised" if window.revised else "")
            + (f"; no release from {', '.join(missing)}" if missing else "")
        )
    typer.echo(
        f"results store: {Path(store).resolve()} (study {outcome.study_id}); "
        f"report with: sitepool monitor --store {store} --study {outcome.study_id} --out DIR"
    )
    typer.echo(RESEARCH_NOTICE)
