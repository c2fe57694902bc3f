"""Evaluation rounds over real Flower messages (in-process grid, the real site ClientApp).

References: each release is checked against ``evaluate_site`` called directly on the
site's file under the site's policy (``apply_policy``); fault codes against flwr 1.42's
``flwr.common.constant.ErrorCode``.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from pathlib import Path

import pytest
from flwr.app import Context, Message, RecordDict
from flwr.clientapp import ClientApp
from flwr.common.constant import ErrorCode
from flwr.serverapp import Grid, ServerApp

from coordinator.runs.inprocess import FIRST_NODE_ID, run_inprocess
from coordinator.runs.rounds import (
    RoundOutcome,
    StudyOutcome,
    run_evaluation_round,
    run_study_rounds,
)
from site_agent import client_app
from site_agent.contract.protocol import StudyProtocol
from site_agent.contract.release import SiteRelease
from site_agent.contract.wire import SITE_ACTION
from site_agent.disclosure.approvals import approve
from site_agent.disclosure.ledger import ReleaseLedger
from site_agent.exceptions import DeploymentError
from site_agent.service import SiteSettings

# Cell values of the broken table: none may appear in what the site sends back.
_BROKEN_VALUES = ("p-7731", "0.7x3", "maybe", "ZX-99")


def _broken_table(path: Path) -> Path:
    path.write_text(
        "case_id,patient_id,label,score\nZX-99,p-7731,1,0.41\nZX-98,p-7731,maybe,0.7x3\n"
    )
    return path


def _one_round(
    protocol: StudyProtocol,
    sites: Sequence[SiteSettings],
    apps: ClientApp | Sequence[ClientApp] = client_app.app,
) -> RoundOutcome:
    outcomes: list[RoundOutcome] = []
    server = ServerApp()

    @server.main()
    def main(grid: Grid, context: Context) -> None:
        outcomes.append(run_evaluation_round(grid, protocol, None, 1))

    run_inprocess(server, apps, [s.to_node_config() for s in sites], {})
    return outcomes[0]


def test_round_collects_every_release_by_site_name(
    study_protocol: StudyProtocol,
    three_sites: list[SiteSettings],
    expected_release: Callable[[SiteSettings, StudyProtocol], SiteRelease],
) -> None:
    """Each site's release is filed under its name and equals the direct computation."""
    outcome = _one_round(study_protocol, three_sites)

    assert sorted(outcome.releases) == sorted(s.site for s in three_sites)
    assert outcome.nodes_asked == 3
    for i, site in enumerate(three_sites):
        assert outcome.releases[site.site] == expected_release(site, study_protocol)
        assert outcome.node_of_site[site.site] == FIRST_NODE_ID + i


def test_broken_site_declines_without_data_values_and_round_continues(
    tmp_path: Path,
    study_protocol: StudyProtocol,
    three_sites: list[SiteSettings],
    make_site: Callable[[str, Path], SiteSettings],
) -> None:
    """A site with a broken table declines with a scrubbed reason; the quorum still holds."""
    broken = make_site("fenwick-cottage", _broken_table(tmp_path / "b.csv"))

    outcome = _one_round(study_protocol, [*three_sites[:2], broken])

    assert len(outcome.releases) == 2
    (decline,) = outcome.declines
    assert decline.site == "fenwick-cottage"
    assert decline.reason.startswith("site_data_invalid")
    assert not any(value in decline.reason for value in _BROKEN_VALUES)


def test_round_below_quorum_raises_deployment_error(
    tmp_path: Path,
    study_protocol: StudyProtocol,
    three_sites: list[SiteSettings],
    make_site: Callable[[str, Path], SiteSettings],
) -> None:
    """Two failing sites of three leave one release, below the quorum of two."""
    sites = [
        three_sites[0],
        make_site("broken-one", _broken_table(tmp_path / "1.csv")),
        make_site("broken-two", tmp_path / "absent.csv"),
    ]

    with pytest.raises(DeploymentError, match=r"1 of 3 sites released .* quorum is 2"):
        _one_round(study_protocol, sites)


def _app(handler: Callable[[Message, Context], Message]) -> ClientApp:
    app = ClientApp()
    app.evaluate(SITE_ACTION)(handler)
    return app


def test_flower_errors_and_bad_replies_are_node_faults(
    study_protocol: StudyProtocol, three_sites: list[SiteSettings]
) -> None:
    """A crashing node is a fault with Flower's code 2, a reply we cannot read a fault too."""

    def crash(msg: Message, context: Context) -> Message:
        raise RuntimeError("site agent crashed")

    def garble(msg: Message, context: Context) -> Message:
        return Message(RecordDict(), reply_to=msg)

    protocol = study_protocol.model_copy(update={"quorum": 1})
    for site in three_sites:
        assert site.policy_path is not None
        approve(protocol, site.policy_path.parent / "approvals.json")
    apps = [client_app.app, _app(crash), _app(garble)]

    outcome = _one_round(protocol, three_sites, apps)

    assert list(outcome.releases) == [three_sites[0].site]
    codes = {f.node_id: f.code for f in outcome.faults}
    assert codes == {
        FIRST_NODE_ID + 1: ErrorCode.CLIENT_APP_RAISED_EXCEPTION,
        FIRST_NODE_ID + 2: None,
    }
    assert "sitepool.reply" in outcome.faults[1].reason


def test_two_nodes_claiming_one_site_name_release_once(
    study_protocol: StudyProtocol, three_sites: list[SiteSettings]
) -> None:
    """A second node answering for an already-answered site is a fault, not a second release."""
    twin = three_sites[0].model_copy(update={"data_path": three_sites[1].data_path})

    outcome = _one_round(study_protocol, [three_sites[0], twin, three_sites[2]])

    assert sorted(outcome.releases) == sorted([three_sites[0].site, three_sites[2].site])
    (fault,) = outcome.faults
    assert fault.node_id == FIRST_NODE_ID + 1
    assert "already answered" in fault.reason


def test_study_outcome_survives_a_json_round_trip(
    study_protocol: StudyProtocol, three_sites: list[SiteSettings]
) -> None:
    """What is written to disk reads back equal."""
    outcomes: list[StudyOutcome] = []
    server = ServerApp()

    @server.main()
    def main(grid: Grid, context: Context) -> None:
        outcomes.append(run_study_rounds(grid, study_protocol, None))

    run_inprocess(server, client_app.app, [s.to_node_config() for s in three_sites], {})

    assert StudyOutcome.model_validate_json(outcomes[0].model_dump_json()) == outcomes[0]


def test_round_keeps_each_sites_ledger_anchor(
    study_protocol: StudyProtocol, three_sites: list[SiteSettings]
) -> None:
    """The entry hash kept per site is the last entry of that site's own ledger file."""
    outcome = _one_round(study_protocol, three_sites)

    for site in three_sites:
        assert site.ledger_path is not None
        last = ReleaseLedger(site.ledger_path).entries()[-1]
        kept = outcome.disclosures[site.site]
        assert (kept.ledger_sequence, kept.ledger_entry_hash) == (last.sequence, last.entry_hash)
        assert kept.note is not None and kept.note.min_cell == 5
