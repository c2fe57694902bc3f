"""``sitepool site keys`` and ``sitepool site connect``: join a study from the hospital.

Registered on the ``site`` command group by :func:`add_connection_commands`. Failures
print one line ``error: ...`` on stderr and exit with code 2; keys are never printed,
only their fingerprints.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from site_agent.exceptions import SitepoolError
from site_agent.notices import RESEARCH_NOTICE

EXIT_ERROR = 2


def _fail(exc: SitepoolError) -> None:
    typer.echo(f"error: {' '.join(str(exc).split())}", err=True)
    raise typer.Exit(EXIT_ERROR)


def keys_command(
    out: Annotated[Path, typer.Option("--out", help="Directory for site.key and site.key.pub.")],
) -> None:
    """Make the site's key pair; give only site.key.pub to the coordinator."""
    from site_agent.deployment.keys import make_site_keys

    try:
        files = make_site_keys(out)
    except SitepoolError as exc:
        _fail(exc)
    typer.echo(f"private key (stays here, mode 0600): {files.private_key}")
    typer.echo(f"public key (send to the coordinator): {files.public_key}")
    typer.echo(f"fingerprint (read it to the coordinator): {files.fingerprint}")
    typer.echo(RESEARCH_NOTICE)


def connect_command(
    hub: Annotated[str, typer.Option("--hub", help="The coordinator's hub, host:port.")],
    ca: Annotated[Path, typer.Option("--ca", help="The consortium's CA certificate (PEM).")],
    key: Annotated[Path, typer.Option("--key", help="This site's private key (site.key).")],
    site: Annotated[str, typer.Option("--site", help="This site's name, as admitted.")],
    data: Annotated[Path, typer.Option("--data", help="Predictions table (CSV or Parquet).")],
    state: Annotated[
        Path, typer.Option("--state", help="Directory for the connection's logs and temp files.")
    ],
    policy: Annotated[
        Path | None, typer.Option("--policy", help="Disclosure policy (JSON).")
    ] = None,
    ledger: Annotated[Path | None, typer.Option("--ledger", help="Release ledger (JSONL).")] = None,
    image_config: Annotated[
        Path | None,
        typer.Option("--image-config", help="The site's image configuration (JSON or TOML)."),
    ] = None,
    approved_bundles: Annotated[
        Path | None,
        typer.Option(
            "--approved-bundles",
            help="App-bundle hashes this site approved (sitepool site approve-bundle); "
            "without it every bundle carrying code is refused.",
        ),
    ] = None,
) -> None:
    """Connect out to the hub and answer its requests until Ctrl-C."""
    from site_agent.deployment.connection import SiteConnection, connect_site
    from site_agent.service import SiteSettings

    try:
        settings = SiteSettings(
            site=site,
            data_path=data.resolve(),
            policy_path=None if policy is None else policy.resolve(),
            ledger_path=None if ledger is None else ledger.resolve(),
            image_config_path=None if image_config is None else image_config.resolve(),
        )
    except ValueError as exc:
        typer.echo(f"error: invalid site settings: {exc.__class__.__name__}", err=True)
        raise typer.Exit(EXIT_ERROR) from None
    connection = SiteConnection(
        hub=hub,
        ca_cert=ca,
        private_key=key,
        settings=settings,
        state=state,
        approved_bundles=approved_bundles,
    )

    def ready(log: str) -> None:
        typer.echo(f"{site}: TLS check of {hub} passed; connecting out (log: {log})")
        typer.echo(f"serving requests until Ctrl-C. {RESEARCH_NOTICE}")

    try:
        connect_site(connection, ready=ready)
    except SitepoolError as exc:
        _fail(exc)
    typer.echo(f"{site}: disconnected")
    typer.echo(RESEARCH_NOTICE)


def add_connection_commands(app: typer.Typer) -> None:
    """Register ``keys`` and ``connect`` on the site command group."""
    app.command("keys", help="Make this site's key pair (ECDSA P-384).", epilog=RESEARCH_NOTICE)(
        keys_command
    )
    app.command(
        "connect",
        help=(
            "Connect to a coordinator's hub (outbound only, TLS, site key) and answer "
            "its study requests with this site's data until Ctrl-C. Runs whose app bundle "
            "carries code are refused and ledgered; only the installed site agent answers."
        ),
        epilog=RESEARCH_NOTICE,
    )(connect_command)
