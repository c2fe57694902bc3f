"""The command surface: the research-tool caution once at the top, not in every help line."""

from __future__ import annotations

from typer.testing import CliRunner

from simulations.cli import app
from site_agent.notices import RESEARCH_NOTICE


def _flat(text: str) -> str:
    return " ".join(text.split())


def test_root_help_states_the_caution_once_at_the_top() -> None:
    """`sitepool --help` carries the caution once, before the command list."""
    result = CliRunner().invoke(app, ["--help"], terminal_width=400)
    assert result.exit_code == 0
    text = _flat(result.stdout)
    assert text.count(RESEARCH_NOTICE) == 1
    assert text.index(RESEARCH_NOTICE) < text.index("Commands")


def test_command_lists_do_not_repeat_the_caution() -> None:
    """A group's help page states the caution at most once, however many commands it lists."""
    runner = CliRunner()
    for group in ([], ["site"], ["site", "ledger"], ["coordinator"], ["plan"]):
        result = runner.invoke(app, [*group, "--help"], terminal_width=400)
        assert result.exit_code == 0, group
        assert _flat(result.stdout).count("not a medical device") == 1, group
