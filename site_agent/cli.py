"""``sitepool site ...``: commands a hospital runs beside its own data."""

from __future__ import annotations

import json
from pathlib import Path
from typing import TYPE_CHECKING, Annotated

import typer
from rich.console import Console
from rich.table import Table

from site_agent.contract.node_config import DEFAULT_APPROVALS_FILE, DEFAULT_LEDGER_FILE
from site_agent.deployment.cli import add_connection_commands
from site_agent.exceptions import InputError, SitepoolError
from site_agent.notices import RESEARCH_NOTICE

if TYPE_CHECKING:
    import pandas as pd

    from site_agent.contract.adaptation_release import Performance
    from site_agent.contract.release import AucRecord, EstimateRecord, SiteRelease
    from site_agent.statistics.metrics import MetricsSummary


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
    from site_agent.contract.protocol import EvaluationPlan, StudyProtocol
    from site_agent.contract.release import UNREGISTERED_PROTOCOL
    from site_agent.data.predictions import validate_predictions
    from site_agent.disclosure.policy import SitePolicy
    from site_agent.disclosure.small_cells import apply_policy
    from site_agent.evaluation import evaluate_site
    from site_agent.site_output import site_evaluation_output
    from site_agent.statistics.metrics import summarize

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
    from site_agent.statistics.metrics import AGREEMENT_WITHHELD_REASON

    level = int(summary.confidence * 100)
    console.print(f"[bold]Site evaluation: {release.site}[/bold]")
    console.print(f"protocol: {release.protocol_hash}")
    pending: object = summary.n_pending
    if release.statistics.pending_withheld:
        pending = "withheld (at least 1, not in the case count)"
    console.print(
        f"cases {summary.n_observations} · patients {summary.n_patients} · "
        f"disease {summary.n_positive} · no disease {summary.n_negative} · "
        f"reference pending {pending} · prevalence {_ci(summary.prevalence)}"
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
    for label, m in (("Brier score", summary.brier), ("expected calibration error", summary.ece)):
        text = _number(m.value)
        if m.low is not None and m.high is not None:
            text = f"{m.low:.3f} to {m.high:.3f} ({m.reason})"
        cal.add_row(label, text)
    console.print(cal)

    if summary.agreement or summary.withheld_agreement:
        kappa = Table(title=f"Agreement, Cohen's kappa ({level}% intervals)")
        for column in ("raters", "cases", "unweighted", "linear", "quadratic"):
            kappa.add_column(column)
        for k in summary.agreement:
            weighted = k.scale == "ordinal"
            kappa.add_row(
                " vs ".join(k.raters),
                f"≥ {k.n} (cells withheld)" if k.censored else str(k.n),
                _ci(k.unweighted),
                _ci(k.linear) if weighted else "",
                _ci(k.quadratic) if weighted else "",
            )
        for raters in summary.withheld_agreement:
            kappa.add_row(" vs ".join(raters), "—", f"— ({AGREEMENT_WITHHELD_REASON})", "", "")
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
    from site_agent.contract.protocol import StudyProtocol
    from site_agent.disclosure.approvals import approve

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
    from site_agent.disclosure.approvals import list_approvals

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
    from site_agent.disclosure.policy import policy_json_schema

    typer.echo(json.dumps(policy_json_schema(), indent=2))


@ledger_app.command("show", help="Print every ledger entry.", epilog=RESEARCH_NOTICE)
def ledger_show_command(
    ledger: Annotated[Path, _LEDGER_OPTION] = DEFAULT_LEDGER_FILE,
    as_json: Annotated[bool, typer.Option("--json", help="One JSON entry per line.")] = False,
) -> None:
    """Print the ledger, one line per entry."""
    from site_agent.disclosure.ledger import ReleaseLedger

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
    from site_agent.disclosure.ledger import verify_ledger

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
    from site_agent.contract.protocol import StudyProtocol
    from site_agent.disclosure.policy import SitePolicy

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
