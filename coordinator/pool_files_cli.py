"""``sitepool pool-files``: pool a folder of signed release files into the study results.

The files come from sites that answered without a connection
(``sitepool site answer-into-file``). Each is checked against the coordinator's admitted
keys and the protocol (:mod:`coordinator.pooling.release_files`); refused files are listed,
one line each, and appear in the report as sites that did not answer, with the reason.
The results, exports and report are the same as for a connected study.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from site_agent.exceptions import SitepoolError
from site_agent.notices import RESEARCH_NOTICE

RESULTS_FILE = "results.json"
REPORT_FILE = "report.html"
ENGINE = "signed files"
"""How the releases reached the coordinator, as the results record it."""


def pool_files_command(
    folder: Annotated[
        Path, typer.Argument(help="Folder holding the sites' *.signed-release.json files.")
    ],
    protocol: Annotated[Path, typer.Option("--protocol", help="The study protocol JSON.")],
    admitted_keys: Annotated[
        Path,
        typer.Option(
            "--admitted-keys", help="Directory of admitted sites' public keys, <site>.pub each."
        ),
    ],
    out: Annotated[Path, typer.Option("--out", help="Directory for results and report.")],
    round_number: Annotated[int, typer.Option("--round", min=1, help="Round pooled.")] = 1,
) -> None:
    """Check and pool the signed release files of a folder; write results and report."""
    from coordinator.pooling.assemble import build_results
    from coordinator.pooling.release_files import file_round, file_sites, read_release_folder
    from coordinator.report.exports import write_exports
    from coordinator.report.study_report import render_report
    from site_agent.contract.protocol import StudyProtocol

    try:
        study = StudyProtocol.load(protocol)
        files = read_release_folder(
            folder, admitted_keys, protocol_hash=study.content_hash(), round_number=round_number
        )
        for refused in files.refused:
            typer.echo(refused.line(), err=True)
        outcome = file_round(study, files, round_number)
        results = build_results(study, outcome, engine=ENGINE, sites=file_sites(files))
        out.mkdir(parents=True, exist_ok=True)
        results.write_json(out / RESULTS_FILE)
        exports = write_exports(results, out)
        report = render_report(results, out / REPORT_FILE)
    except SitepoolError as exc:
        typer.echo(f"error: {exc}", err=True)
        raise typer.Exit(code=2) from exc
    typer.echo(
        f"pooled {len(outcome.releases)} site(s) from files; "
        f"{len(outcome.declines)} declined; {len(files.refused)} file(s) refused"
    )
    for path in (out / RESULTS_FILE, *exports, report):
        typer.echo(f"wrote {path}")
    typer.echo(RESEARCH_NOTICE)


def add_pool_files_command(app: typer.Typer, name: str = "pool-files") -> None:
    """Register :func:`pool_files_command` on ``app`` under ``name``."""
    app.command(
        name,
        help=(
            "Pool a folder of signed release files from sites that cannot connect: "
            "signatures checked against the admitted keys, protocol hash checked, then "
            "the same results, exports and report as a connected study."
        ),
        epilog=RESEARCH_NOTICE,
    )(pool_files_command)
