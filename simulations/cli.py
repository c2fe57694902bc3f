"""The ``sitepool`` command: one entry point over the three packages.

The root command lives at the top of the import graph (``simulations``), so it can
reach the site commands, the coordinator commands and the rehearsal alike.
"""

from __future__ import annotations

import typer

from site_agent.cli import site_app
from site_agent.notices import RESEARCH_NOTICE

app = typer.Typer(
    name="sitepool",
    help=(
        "Validate a diagnostic imaging model at several hospitals without moving any "
        f"patient data. {RESEARCH_NOTICE}"
    ),
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)
app.add_typer(site_app)


def main() -> None:
    """Run the ``sitepool`` command line."""
    app()
