"""``sitepool meta``: pool per-site results from a file by random-effects meta-analysis.

Register the command on a typer app with :func:`add_meta_command`. The command reads a
file (see :mod:`coordinator.pooling.meta_inputs`), runs the fixed-effect model and the chosen
random-effects model (:mod:`coordinator.pooling.meta_analysis`), and prints a table or JSON.
Invalid input prints one line ``error: ...`` on stderr and exits with code 2.
"""

from __future__ import annotations

from enum import StrEnum
from pathlib import Path
from typing import TYPE_CHECKING, Annotated

import typer

from site_agent.exceptions import InputError
from site_agent.notices import RESEARCH_NOTICE

if TYPE_CHECKING:
    from coordinator.pooling.meta_analysis import Method
    from coordinator.pooling.meta_inputs import Measure

EXIT_INPUT_ERROR = 2
META_HELP = (
    "Pool per-site results from a CSV or Parquet file: per-site estimates with weights, "
    "fixed and random effects, tau², I², H², Q and a prediction interval for a new site. "
    "Columns: site with estimate and se (or variance); or auc and auc_se; or tp, fp, fn, "
    "tn."
)


class TauMethod(StrEnum):
    """Between-site variance estimators offered on the command line."""

    REML = "reml"
    DL = "dl"
    PM = "pm"


class MeasureChoice(StrEnum):
    """Measures offered on the command line (see :data:`~.meta_inputs.Measure`)."""

    ESTIMATE = "estimate"
    AUC = "auc"
    SENSITIVITY = "sensitivity"
    SPECIFICITY = "specificity"
    DOR = "dor"


_METHODS: dict[TauMethod, Method] = {
    TauMethod.REML: "reml",
    TauMethod.DL: "dl",
    TauMethod.PM: "pm",
}
_MEASURES: dict[MeasureChoice, Measure] = {
    MeasureChoice.ESTIMATE: "estimate",
    MeasureChoice.AUC: "auc",
    MeasureChoice.SENSITIVITY: "sensitivity",
    MeasureChoice.SPECIFICITY: "specificity",
    MeasureChoice.DOR: "dor",
}


def meta_command(
    estimates: Annotated[Path, typer.Argument(help="CSV or Parquet file, one row per site.")],
    method: Annotated[
        TauMethod, typer.Option(help="Between-site variance estimator.")
    ] = TauMethod.REML,
    hksj: Annotated[
        bool,
        typer.Option("--hksj", help="Hartung-Knapp-Sidik-Jonkman interval (t, k-1 df)."),
    ] = False,
    measure: Annotated[
        MeasureChoice | None,
        typer.Option(help="What to pool; needed for 2x2 counts. Default: from the columns."),
    ] = None,
    json_output: Annotated[bool, typer.Option("--json", help="Print JSON, not a table.")] = False,
) -> None:
    """Pool per-site results from a file (see ``META_HELP``)."""
    from coordinator.pooling.meta_command import render_table, run_meta
    from coordinator.pooling.meta_inputs import read_site_results

    try:
        inputs = read_site_results(
            estimates, measure=None if measure is None else _MEASURES[measure]
        )
        result = run_meta(inputs, source=estimates.name, method=_METHODS[method], hksj=hksj)
    except InputError as exc:
        typer.echo(f"error: {exc}", err=True)
        raise typer.Exit(EXIT_INPUT_ERROR) from None
    if json_output:
        typer.echo(result.model_dump_json(indent=2))
    else:
        typer.echo("\n".join(render_table(result)))


def add_meta_command(app: typer.Typer, name: str = "meta") -> None:
    """Register ``meta`` on ``app`` with its help text (which carries the notice)."""
    app.command(name, help=META_HELP, epilog=RESEARCH_NOTICE, no_args_is_help=True)(meta_command)
