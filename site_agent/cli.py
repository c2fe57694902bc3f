"""``sitepool site ...``: commands a hospital runs beside its own data."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Annotated

import pandas as pd
import typer
from pydantic import ValidationError
from rich.console import Console
from rich.table import Table

from site_agent.contract.adaptation_release import Performance
from site_agent.contract.protocol import EvaluationPlan, StudyProtocol
from site_agent.contract.release import (
    UNREGISTERED_PROTOCOL,
    AucRecord,
    EstimateRecord,
    SiteRelease,
)
from site_agent.data.predictions import validate_predictions
from site_agent.deployment.cli import add_connection_commands
from site_agent.disclosure.approvals import approve, list_approvals
from site_agent.disclosure.ledger import DEFAULT_LEDGER_FILE, ReleaseLedger, verify_ledger
from site_agent.disclosure.policy import DEFAULT_APPROVALS_FILE, SitePolicy, policy_json_schema
from site_agent.disclosure.small_cells import apply_policy
from site_agent.evaluation import evaluate_site
from site_agent.exceptions import InputError, SitepoolError
from site_agent.notices import RESEARCH_NOTICE
from site_agent.site_output import site_evaluation_output
from site_agent.statistics.metrics import MetricsSummary, summarize

site_app = typer.Typer(
    epilog=RESEARCH_NOTICE,
    name="site",
    help="Commands run at a hospital, beside its data.",
    no_args_is_help=True,
    add_completion=False,
)
add_connection_commands(site_app)


@site_app.command(
    "evaluate",
    help="Evaluate a predictions table and show what would leave the site.",
    epilog=RESEARCH_NOTICE,
)
def evaluate_command(
    predictions: Annotated[
        Path,
        typer.Argument(
            help=(
                "Predictions table or image manifest, CSV or Parquet (one row per case; an "
                "'image' column of DICOM, PNG or .npy paths makes it an image manifest)."
            )
        ),
    ],
    as_json: Annotated[
        bool,
        typer.Option(
            "--json",
            help=(
                "Print JSON: 'leaves_the_site' (the release exactly as it would be sent, and "
                "the policy's note), 'stays_at_site' (the derived metrics with intervals and "
                "methods, not sent) and 'notice'."
            ),
        ),
    ] = False,
    protocol: Annotated[
        Path | None,
        typer.Option("--protocol", help="Study protocol JSON; default: the built-in plan."),
    ] = None,
    site: Annotated[
        str | None, typer.Option("--site", help="Site name; default: the file name's stem.")
    ] = None,
    policy: Annotated[
        Path | None,
        typer.Option(
            "--policy",
            help=(
                "The site's disclosure policy: apply it (small cells merged or suppressed, "
                "subgroup rules, one score partition) and show what the policy lets leave. "
                "Differential privacy noise is not drawn here, so nothing is charged to the "
                "budget; the comparison with earlier releases runs in the gate only."
            ),
        ),
    ] = None,
    bundle: Annotated[
        Path | None,
        typer.Option(
            "--bundle",
            help=(
                "Model bundle that scores a table without a score column (an image manifest "
                "or a feature table); checked against the protocol's model hash if one is given."
            ),
        ),
    ] = None,
    image_config: Annotated[
        Path | None,
        typer.Option(
            "--image-config",
            help="The site's image configuration (JSON or TOML): acquisition subgroup mapping.",
        ),
    ] = None,
) -> None:
    """Evaluate a predictions table and show what would leave the site."""
    try:
        if protocol is None:
            plan, protocol_hash = EvaluationPlan(), UNREGISTERED_PROTOCOL
            expected = None
        else:
            study = StudyProtocol.load(protocol)
            plan, protocol_hash = study.evaluation, study.content_hash()
            expected = None if study.model is None else study.model.sha256
        table = validate_predictions(_scored_table(predictions, bundle, image_config, expected))
        release = evaluate_site(
            table, plan, site=site or predictions.stem, protocol_hash=protocol_hash
        )
        note = None
        if policy is not None:
            release, note = apply_policy(release, SitePolicy.load(policy))
            if not as_json:
                typer.echo(f"disclosure policy applied: {note.model_dump_json()}")
        summary = summarize(release.statistics)
    except SitepoolError as exc:
        typer.echo(f"error: {exc}", err=True)
        raise typer.Exit(code=2) from exc
    if as_json:
        typer.echo(site_evaluation_output(release, note).model_dump_json(indent=2))
        return
    _render(release, summary, Console(width=120))


def _scored_table(
    table: Path, bundle: Path | None, image_config: Path | None, expected_sha256: str | None
) -> pd.DataFrame:
    """Read the site's table (image manifests checked) and score it with ``bundle`` if needed."""
    from site_agent.data.images import ImageSiteConfig, load_site_table

    config = None if image_config is None else ImageSiteConfig.load(image_config)
    frame = load_site_table(table, config)
    if "score" in frame.columns or bundle is None:
        return frame  # without a bundle, validation names the missing score column
    # Imported here: torch costs seconds to import, and tables with scores never need it.
    from site_agent.training.model_bundle import load_bundle

    return frame.assign(score=load_bundle(bundle, expected_sha256).predict(frame))


def _ci(e: EstimateRecord) -> str:
    if e.estimate_low is not None and e.estimate_high is not None:
        hull = "" if e.lower is None or e.upper is None else f" [{e.lower:.3f}, {e.upper:.3f}]"
        return f"{e.estimate_low:.3f} to {e.estimate_high:.3f}{hull} (range: censored cell)"
    if e.estimate is None:
        return f"— ({e.reason})"
    if e.lower is None or e.upper is None:
        return f"{e.estimate:.3f} (no interval: {e.reason})"
    return f"{e.estimate:.3f} [{e.lower:.3f}, {e.upper:.3f}]"


def _auc_text(a: AucRecord, *, logit: bool = False) -> str:
    if a.auc is None:
        return f"— ({a.reason})"
    lower, upper = (a.logit_lower, a.logit_upper) if logit else (a.lower, a.upper)
    if lower is None or upper is None:
        return f"{a.auc:.3f} (no interval: {a.reason})"
    return f"{a.auc:.3f} [{lower:.3f}, {upper:.3f}]"


def _at_thresholds(perf: Performance) -> str:
    """Sensitivity and specificity at each threshold; a withheld one shows its reason."""
    return "; ".join(
        f"at {t.threshold:g}: sensitivity {_ci(t.sensitivity)}, specificity {_ci(t.specificity)}"
        for t in perf.at_thresholds
    )


def _number(value: float | None) -> str:
    return "—" if value is None else f"{value:.3f}"


def _p_value(p: float | None) -> str:
    """``p < 0.001`` or ``p = 0.012``: the relation is part of the text."""
    if p is None:
        return "p not available"
    return "p < 0.001" if p < 0.001 else f"p = {p:.3f}"


def _render(release: SiteRelease, summary: MetricsSummary, console: Console) -> None:
    """Print the release as readable tables (the same numbers as ``--json``)."""
    level = int(summary.confidence * 100)
    console.print(f"[bold]Site evaluation: {release.site}[/bold]")
    console.print(f"protocol: {release.protocol_hash}")
    console.print(
        f"cases {summary.n_observations} · patients {summary.n_patients} · "
        f"disease {summary.n_positive} · no disease {summary.n_negative} · "
        f"reference pending {summary.n_pending} · prevalence {_ci(summary.prevalence)}"
    )

    table = Table(title=f"Operating points ({level}% intervals: Wilson; clustered by patient)")
    for column in ("threshold", "metric", "Wilson", "clustered", "Clopper–Pearson"):
        table.add_column(column)
    for t in summary.thresholds:
        for name in ("sensitivity", "specificity", "ppv", "npv"):
            p = getattr(t, name)
            table.add_row(
                f"{t.threshold:g}", name, _ci(p.wilson), _ci(p.clustered), _ci(p.clopper_pearson)
            )
        table.add_row(f"{t.threshold:g}", "accuracy", _ci(t.accuracy), "", "")
        f1 = _number(t.f1.value)
        if t.f1.low is not None and t.f1.high is not None:
            f1 = f"{t.f1.low:.3f} to {t.f1.high:.3f} (range: censored cell)"
        table.add_row(f"{t.threshold:g}", "F1", f1, "", "", end_section=True)
    console.print(table)

    exact = release.exact
    auc = Table(title=f"Discrimination ({level}% intervals)")
    auc.add_column("estimate")
    auc.add_column("value")
    auc.add_row("AUC, DeLong", _auc_text(exact.auc))
    auc.add_row("AUC, DeLong, logit interval", _auc_text(exact.auc, logit=True))
    auc.add_row("AUC, clustered by patient (Obuchowski)", _auc_text(exact.clustered_auc))
    hist = summary.auc
    auc.add_row(
        "AUC from released histogram",
        "—" if hist.auc is None else f"{hist.auc:.3f} (binning error ≤ {hist.bound:.4f})",
    )
    for r in exact.readers:
        difference = (
            f"— ({r.reason})"
            if r.difference is None
            else f"{r.difference:+.3f} [{_number(r.lower)}, {_number(r.upper)}], "
            f"{_p_value(r.p_value)}"
        )
        auc.add_row(f"model − {r.reader} (paired DeLong)", difference)
    console.print(auc)

    cal = Table(title="Calibration")
    cal.add_column("estimate")
    cal.add_column("value")
    cal.add_row("intercept", _ci(exact.calibration.intercept))
    cal.add_row("slope", _ci(exact.calibration.slope))
    cal.add_row("Brier score", _number(summary.brier.value))
    cal.add_row("expected calibration error", _number(summary.ece.value))
    console.print(cal)

    if summary.agreement:
        kappa = Table(title=f"Agreement, Cohen's kappa ({level}% intervals)")
        for column in ("raters", "cases", "unweighted", "linear", "quadratic"):
            kappa.add_column(column)
        for k in summary.agreement:
            weighted = k.scale == "ordinal"
            kappa.add_row(
                " vs ".join(k.raters),
                str(k.n),
                _ci(k.unweighted),
                _ci(k.linear) if weighted else "",
                _ci(k.quadratic) if weighted else "",
            )
        console.print(kappa)

    if release.subgroups:
        groups = Table(title="Subgroups")
        for column in ("attribute", "level", "cases", "disease", "AUC, DeLong"):
            groups.add_column(column)
        for g in release.subgroups:
            groups.add_row(
                g.attribute,
                g.level,
                str(g.statistics.n_observations),
                str(g.statistics.n_positive),
                _auc_text(g.auc),
            )
        console.print(groups)
    typer.echo(RESEARCH_NOTICE)


# --- approvals, release ledger and policy schema ------------------------------------------

ledger_app = typer.Typer(
    name="ledger",
    epilog=RESEARCH_NOTICE,
    help="Show or check the site's release ledger.",
    no_args_is_help=True,
    add_completion=False,
)
site_app.add_typer(ledger_app)

_STORE_OPTION = typer.Option("--store", help="The site's approvals file.")
_LEDGER_OPTION = typer.Option("--ledger", help="The site's release ledger (JSON Lines).")


@site_app.command(
    "approve",
    help="Approve a study protocol: record its content hash, title and time.",
    epilog=RESEARCH_NOTICE,
)
def approve_command(
    protocol: Annotated[Path, typer.Argument(help="Study protocol JSON to approve.")],
    store: Annotated[Path, _STORE_OPTION] = DEFAULT_APPROVALS_FILE,
) -> None:
    """Record a protocol's content hash in the site's approvals file."""
    try:
        approval = approve(StudyProtocol.load(protocol), store)
    except SitepoolError as exc:
        typer.echo(f"error: {exc}", err=True)
        raise typer.Exit(code=2) from exc
    typer.echo(f"approved {approval.study_id} ({approval.title})")
    typer.echo(f"protocol hash {approval.protocol_hash}")
    typer.echo(RESEARCH_NOTICE)


@site_app.command(
    "approvals", help="List the protocols this site approved.", epilog=RESEARCH_NOTICE
)
def approvals_command(store: Annotated[Path, _STORE_OPTION] = DEFAULT_APPROVALS_FILE) -> None:
    """List the approvals file."""
    try:
        approvals = list_approvals(store)
    except SitepoolError as exc:
        typer.echo(f"error: {exc}", err=True)
        raise typer.Exit(code=2) from exc
    for a in approvals:
        typer.echo(f"{a.approved_at.isoformat()}  {a.protocol_hash}  {a.study_id}  {a.title}")
    if not approvals:
        typer.echo("no approved protocols")
    typer.echo(RESEARCH_NOTICE)


@site_app.command(
    "policy-schema",
    help="Print the JSON Schema of the site policy file.",
    epilog=RESEARCH_NOTICE,
)
def policy_schema_command() -> None:
    """Print the policy's JSON Schema."""
    typer.echo(json.dumps(policy_json_schema(), indent=2))


@ledger_app.command("show", help="Print every ledger entry.", epilog=RESEARCH_NOTICE)
def ledger_show_command(
    ledger: Annotated[Path, _LEDGER_OPTION] = DEFAULT_LEDGER_FILE,
    as_json: Annotated[bool, typer.Option("--json", help="One JSON entry per line.")] = False,
) -> None:
    """Print the ledger, one line per entry."""
    try:
        entries = ReleaseLedger(ledger).entries()
    except SitepoolError as exc:
        typer.echo(f"error: {exc}", err=True)
        raise typer.Exit(code=2) from exc
    for e in entries:
        if as_json:
            typer.echo(e.model_dump_json())
            continue
        typer.echo(
            f"{e.sequence:>5}  {e.time.isoformat()}  {e.outcome.value:<8}  "
            f"{e.operation or '-':<9}  {e.study_id or '-'}  eps={e.epsilon_spent:g}  "
            f"{e.reason or ''}".rstrip()
        )
    if not as_json:
        typer.echo(RESEARCH_NOTICE)


@ledger_app.command(
    "verify",
    help="Check the ledger's hash chain; exit 1 naming the first bad entry.",
    epilog=RESEARCH_NOTICE,
)
def ledger_verify_command(ledger: Annotated[Path, _LEDGER_OPTION] = DEFAULT_LEDGER_FILE) -> None:
    """Verify the hash chain and exit 1 if any entry was changed, removed or reordered."""
    result = verify_ledger(ledger)
    if not result.ok:
        typer.echo(f"ledger check FAILED: {result.problem}", err=True)
        raise typer.Exit(code=1)
    typer.echo(f"ledger intact: {result.entries} entries, hash chain unbroken")
    typer.echo(RESEARCH_NOTICE)


# --- fine-tuning at the site ----------------------------------------------------------------


@site_app.command(
    "fine-tune",
    help=(
        "Fine-tune the protocol's model on this site's cases as its adaptation plan says, and "
        "show what would leave the site (held-out test-set performance only)."
    ),
    epilog=RESEARCH_NOTICE,
)
def fine_tune_command(
    table: Annotated[Path, typer.Argument(help="Image manifest or feature table, CSV or Parquet.")],
    protocol: Annotated[
        Path, typer.Option("--protocol", help="Study protocol JSON naming the model and plan.")
    ],
    bundle: Annotated[Path, typer.Option("--bundle", help="The protocol's model bundle.")],
    image_config: Annotated[
        Path | None,
        typer.Option("--image-config", help="The site's image configuration (JSON or TOML)."),
    ] = None,
    site: Annotated[
        str | None, typer.Option("--site", help="Site name; default: the file name's stem.")
    ] = None,
    save: Annotated[
        Path | None,
        typer.Option(
            "--save",
            help="Also write the model fine-tuned on the whole local pool as a new bundle "
            "(it stays at the site).",
        ),
    ] = None,
    as_json: Annotated[bool, typer.Option("--json", help="Print the release JSON.")] = False,
    policy: Annotated[
        Path | None,
        typer.Option(
            "--policy",
            help=(
                "The site's disclosure policy: pass the release through the control the "
                "disclosure gate applies to fine-tuning (operation allowed, minimum cell "
                "size) and show what the policy lets leave."
            ),
        ),
    ] = None,
) -> None:
    """Run the protocol's site-local fine-tuning grid and print the release."""
    try:
        study = StudyProtocol.load(protocol)
        if study.model is None or study.adaptation is None:
            raise InputError("fine-tuning needs a protocol with a model and an adaptation plan")
        from site_agent.data.images import ImageSiteConfig, load_site_table
        from site_agent.training.local_training import (
            adapt_site,
            get_state,
            local_data,
            local_update,
            with_state,
        )
        from site_agent.training.model_bundle import load_bundle, save_bundle

        model = load_bundle(bundle, study.model.sha256)
        config = None if image_config is None else ImageSiteConfig.load(image_config)
        data = local_data(load_site_table(table, config), model, study.adaptation)
        release = adapt_site(
            data,
            model,
            study.adaptation,
            study.evaluation.thresholds,
            site=site or table.stem,
            protocol_hash=study.content_hash(),
        )
        if policy is not None:
            from site_agent.disclosure.adaptation_control import preview_adaptation

            release, suppressed = preview_adaptation(release, SitePolicy.load(policy))
            if not as_json:
                cut = ", ".join(suppressed) if suppressed else "nothing"
                typer.echo(f"disclosure policy applied: small cells withheld: {cut}")
        if save is not None:
            update = local_update(data, model, study.adaptation)
            initial = get_state(model.model)
            tuned = with_state(model, {k: initial[k] + update[k] for k in initial})
            digest = save_bundle(tuned, model.manifest, save)
            if not as_json:
                typer.echo(f"fine-tuned bundle written, SHA-256 {digest}")
    except SitepoolError as exc:
        typer.echo(f"error: {exc}", err=True)
        raise typer.Exit(code=2) from exc
    if as_json:
        typer.echo(release.model_dump_json(indent=2))
        return
    typer.echo(f"site fine-tuning: {release.site}, protocol {release.protocol_hash}")
    typer.echo(
        f"training pool {release.n_pool} cases; held-out test {release.n_test} "
        f"({release.n_test_positive} disease, {release.n_test_negative} no disease)"
    )
    typer.echo(f"AUC before fine-tuning: {_auc_text(release.before.auc)}")
    typer.echo(f"  {_at_thresholds(release.before)}")
    for point in release.points:
        typer.echo(
            f"  {point.n_used:>5} cases, seed {point.seed}: AUC {_auc_text(point.after.auc)}; "
            f"{_at_thresholds(point.after)}"
        )
    typer.echo(RESEARCH_NOTICE)


@site_app.command(
    "answer-into-file",
    help=(
        "For a site that cannot connect: answer one round of a study protocol through the "
        "site's disclosure gate (approval, policy, privacy budget, ledger, exactly as a "
        "connected answer) and write the reply, signed with the site's key, to a file the "
        "coordinator can pool."
    ),
    epilog=RESEARCH_NOTICE,
)
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


@site_app.command(
    "run-tasks",
    help=(
        "Answer the tasks of this site's SuperNode (started with --isolation process) in one "
        "process, with the site agent installed here only: a run whose app bundle carries "
        "code, unless its hash was approved, is refused before any of it is installed or "
        "imported, and the refusal is ledgered. Runs until stopped."
    ),
    epilog=RESEARCH_NOTICE,
)
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


@site_app.command(
    "approve-bundle",
    help=(
        "Approve a run's app bundle by its SHA-256, so a bundle that carries code is "
        "accepted (the site still answers with its own installed ClientApp)."
    ),
    epilog=RESEARCH_NOTICE,
)
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
