"""``sitepool site keys`` and ``sitepool site connect``: join a study from the hospital.

Also ``answer-into-file`` (a site that cannot connect), ``run-tasks`` (the task runner
beside the SuperNode) and ``approve-bundle``. Registered on the ``site`` command group by
:func:`add_connection_commands`. Failures print one line ``error: ...`` on stderr and exit
with code 2; keys are never printed, only their fingerprints.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer
from pydantic import ValidationError

from site_agent.contract.protocol import StudyProtocol
from site_agent.exceptions import InputError, SitepoolError
from site_agent.notices import RESEARCH_NOTICE

EXIT_ERROR = 2
_LEDGER_OPTION = typer.Option("--ledger", help="The site's release ledger (JSON Lines).")


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


def answer_into_file_command(
    protocol: Annotated[Path, typer.Argument(help="Study protocol JSON the site approved.")],
    site: Annotated[str, typer.Option("--site", help="This site's name, as admitted.")],
    data: Annotated[Path, typer.Option("--data", help="The site's predictions table.")],
    policy: Annotated[Path, typer.Option("--policy", help="The site's disclosure policy.")],
    ledger: Annotated[Path, _LEDGER_OPTION],
    key: Annotated[Path, typer.Option("--key", help="The site's OpenSSH ECDSA P-384 private key.")],
    out: Annotated[
        Path,
        typer.Option("--out", help="File to write; its name must end in .signed-release.json."),
    ],
    round_number: Annotated[int, typer.Option("--round", min=1, help="Round answered.")] = 1,
    bundle: Annotated[
        Path | None,
        typer.Option("--bundle", help="Model bundle, when the table has no score column."),
    ] = None,
    coordinator: Annotated[
        str | None,
        typer.Option("--coordinator", help="Coordinator name, if the policy names allowed ones."),
    ] = None,
) -> None:
    """Answer a protocol into a signed release file."""
    from site_agent.contract.signed_release import SIGNED_RELEASE_SUFFIX
    from site_agent.deployment.offline_answer import answer_into_file
    from site_agent.service import SiteSettings

    try:
        if not out.name.endswith(SIGNED_RELEASE_SUFFIX):
            raise InputError(f"--out must end in {SIGNED_RELEASE_SUFFIX}")
        settings = SiteSettings(site=site, data_path=data, policy_path=policy, ledger_path=ledger)
        signed = answer_into_file(
            StudyProtocol.load(protocol),
            settings,
            key,
            round_number=round_number,
            bundle=None if bundle is None else bundle.read_bytes(),
            coordinator=coordinator,
        )
    except (SitepoolError, ValidationError, OSError) as exc:
        typer.echo(f"error: {_one_line(exc)}", err=True)
        raise typer.Exit(code=2) from exc
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(signed.to_json())
    reply = signed.reply
    typer.echo(f"{reply.status.value}: {reply.reason or 'statistics released'}")
    typer.echo(f"ledger entry {signed.ledger_sequence}, signed by {signed.key_fingerprint}")
    typer.echo(f"wrote {out}")
    typer.echo(RESEARCH_NOTICE)


def _one_line(exc: BaseException) -> str:
    if isinstance(exc, ValidationError):
        first = exc.errors()[0]
        return f"invalid {'.'.join(str(p) for p in first['loc'])}: {first['msg']}"
    if isinstance(exc, OSError):
        return f"cannot read {exc.filename}: {exc.strerror}"
    return str(exc)


def run_tasks_command(
    runtime_api_address: Annotated[
        str,
        typer.Option(
            "--runtime-api-address", help="The SuperNode's --host:--port, e.g. 127.0.0.1:9094."
        ),
    ],
    approved_bundles: Annotated[
        Path | None,
        typer.Option("--approved-bundles", help="The site's approved app-bundle hashes (JSON)."),
    ] = None,
) -> None:
    """Serve the SuperNode's tasks until interrupted."""
    import logging

    from site_agent.deployment.task_runner import run_tasks

    logging.getLogger("httpx").setLevel(logging.WARNING)
    typer.echo(RESEARCH_NOTICE)
    run_tasks(runtime_api_address, approved_bundles=approved_bundles)


def approve_bundle_command(
    sha256: Annotated[str, typer.Argument(help="The bundle's SHA-256 (64 hex digits).")],
    store: Annotated[
        Path, typer.Option("--store", help="The site's approved-bundles file.")
    ] = Path("approved-bundles.json"),
) -> None:
    """Record an app bundle's hash as approved."""
    from site_agent.deployment.app_bundle import approve_bundle

    if len(sha256) != 64 or any(c not in "0123456789abcdefABCDEF" for c in sha256):
        typer.echo("error: a bundle hash is 64 hexadecimal digits", err=True)
        raise typer.Exit(code=2)
    approve_bundle(sha256, store)
    typer.echo(f"approved app bundle {sha256.lower()} in {store}")
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
    app.command(
        "answer-into-file",
        help=(
            "For a site that cannot connect: answer one round of a study protocol through the "
            "site's disclosure gate (approval, policy, privacy budget, ledger, exactly as a "
            "connected answer) and write the reply, signed with the site's key, to a file the "
            "coordinator can pool."
        ),
        epilog=RESEARCH_NOTICE,
    )(answer_into_file_command)
    app.command(
        "run-tasks",
        help=(
            "Answer the tasks of this site's SuperNode (started with --isolation process) in one "
            "process, with the site agent installed here only: a run whose app bundle carries "
            "code, unless its hash was approved, is refused before any of it is installed or "
            "imported, and the refusal is ledgered. Runs until stopped."
        ),
        epilog=RESEARCH_NOTICE,
    )(run_tasks_command)
    app.command(
        "approve-bundle",
        help=(
            "Approve a run's app bundle by its SHA-256, so a bundle that carries code is "
            "accepted (the site still answers with its own installed ClientApp)."
        ),
        epilog=RESEARCH_NOTICE,
    )(approve_bundle_command)
