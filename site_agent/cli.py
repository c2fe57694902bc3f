"""``sitepool site ...``: commands a hospital runs beside its own data."""

from __future__ import annotations

import typer

from site_agent.notices import RESEARCH_NOTICE

site_app = typer.Typer(
    name="site",
    help=f"Commands run at a hospital, beside its data. {RESEARCH_NOTICE}",
    no_args_is_help=True,
    add_completion=False,
)
