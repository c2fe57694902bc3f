"""The in-process engine against the direct computation without Flower (and Flower's own rules).

Reference for every release: ``site_agent.evaluation.evaluate_site`` called directly on
each site's file, then the site's policy
(``site_agent.disclosure.small_cells.apply_policy``), with no Flower message in between.
Flower behaviour is checked against flwr 1.42's own runtime
(``flwr/supernode/runtime/run_clientapp.py``: a raising ClientApp yields error code 2).
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import pytest
from flwr.app import ConfigRecord, Context, Message, RecordDict
from flwr.clientapp import ClientApp
from flwr.common.constant import ErrorCode
from flwr.serverapp import Grid, ServerApp
from flwr.supercore.task_identity import TaskIdentity

from coordinator.runs.engines import run_study
from coordinator.runs.inprocess import FIRST_NODE_ID, run_inprocess
from site_agent.contract.protocol import StudyProtocol
from site_agent.contract.release import SiteRelease
from site_agent.disclosure.approvals import approve
from site_agent.exceptions import DeploymentError
from site_agent.service import SiteSettings


def test_inprocess_study_releases_equal_direct_evaluation_at_each_site(
    tmp_path: Path,
    study_protocol: StudyProtocol,
    three_sites: list[SiteSettings],
    expected_release: Callable[[SiteSettings, StudyProtocol], SiteRelease],
) -> None:
    """Three sites through Flower messages release exactly what is computed directly."""
    outcome = run_study(
        study_protocol, None, three_sites, engine="inprocess", workdir=tmp_path / "run"
    )

    (round_one,) = outcome.rounds
    assert round_one.declines == [] and round_one.faults == []
    for site in three_sites:
        assert round_one.releases[site.site] == expected_release(site, study_protocol)


def test_inprocess_study_runs_every_round_of_the_protocol(
    tmp_path: Path, study_protocol: StudyProtocol, three_sites: list[SiteSettings]
) -> None:
    """A three-round protocol yields three rounds with equal releases (the data do not change)."""
    protocol = study_protocol.model_copy(update={"rounds": 3})
    for site in three_sites:
        assert site.policy_path is not None
        approve(protocol, site.policy_path.parent / "approvals.json")

    outcome = run_study(protocol, None, three_sites, engine="inprocess", workdir=tmp_path)

    assert [r.round_number for r in outcome.rounds] == [1, 2, 3]
    assert outcome.rounds[0].releases == outcome.rounds[2].releases
    assert outcome.protocol_hash == protocol.content_hash()


def _echo_app() -> ClientApp:
    app = ClientApp()

    @app.query("echo")
    def echo(msg: Message, context: Context) -> Message:
        text = str(msg.content.config_records["in"]["text"])
        site = str(context.node_config["site-name"])
        out = ConfigRecord({"text": text, "site": site, "node": context.node_id})
        return Message(RecordDict({"out": out}), reply_to=msg)

    @app.query("crash")
    def crash(msg: Message, context: Context) -> Message:
        raise RuntimeError("boom")

    return app


def _ask(grid: Grid, action: str, node_ids: list[int]) -> list[Message]:
    content = RecordDict({"in": ConfigRecord({"text": "hello"})})
    messages = [Message(content, node, f"query.{action}", group_id="1") for node in node_ids]
    return list(grid.send_and_receive(messages, timeout=5.0))


def test_inprocess_grid_gives_each_node_its_own_node_config() -> None:
    """Each node answers with the site name from its own node_config, under its own node id."""
    server = ServerApp()
    seen: list[tuple[int, str, int]] = []

    @server.main()
    def main(grid: Grid, context: Context) -> None:
        for reply in _ask(grid, "echo", list(grid.get_node_ids())):
            record = reply.content.config_records["out"]
            seen.append((reply.metadata.src_node_id, str(record["site"]), int(record["node"])))

    run_inprocess(server, _echo_app(), [{"site-name": "a"}, {"site-name": "b"}], {}, run_id=7)

    assert seen == [
        (FIRST_NODE_ID, "a", FIRST_NODE_ID),
        (FIRST_NODE_ID + 1, "b", FIRST_NODE_ID + 1),
    ]


def test_inprocess_grid_turns_a_clientapp_exception_into_flower_error_code_2() -> None:
    """As a SuperNode does (flwr 1.42 run_clientapp), a raising ClientApp yields error code 2."""
    server = ServerApp()
    replies: list[Message] = []

    @server.main()
    def main(grid: Grid, context: Context) -> None:
        replies.extend(_ask(grid, "crash", list(grid.get_node_ids())))

    run_inprocess(server, _echo_app(), [{"site-name": "a"}], {})

    (reply,) = replies
    assert reply.has_error()
    assert reply.error.code == ErrorCode.CLIENT_APP_RAISED_EXCEPTION
    assert reply.metadata.src_node_id == FIRST_NODE_ID


def test_inprocess_grid_drops_messages_to_unknown_nodes_like_a_superlink() -> None:
    """A message to a node that does not exist gets no id and no reply."""
    server = ServerApp()
    replies: list[Message] = []

    @server.main()
    def main(grid: Grid, context: Context) -> None:
        replies.extend(_ask(grid, "echo", [FIRST_NODE_ID, 999]))

    run_inprocess(server, _echo_app(), [{"site-name": "a"}], {})

    assert [r.metadata.src_node_id for r in replies] == [FIRST_NODE_ID]


def test_inprocess_grid_delivers_a_copy_made_through_protobuf() -> None:
    """The ClientApp never sees the ServerApp's own message object, only its protobuf copy."""
    sent: list[Message] = []
    received: list[Message] = []
    client = ClientApp()

    @client.query("keep")
    def keep(msg: Message, context: Context) -> Message:
        received.append(msg)
        return Message(RecordDict(), reply_to=msg)

    server = ServerApp()

    @server.main()
    def main(grid: Grid, context: Context) -> None:
        content = RecordDict({"in": ConfigRecord({"blob": b"\x00\x01", "n": [1, 2]})})
        sent.append(Message(content, FIRST_NODE_ID, "query.keep"))
        list(grid.send_and_receive(sent, timeout=1.0))

    run_inprocess(server, client, [{"site-name": "a"}], {})

    assert received[0] is not sent[0]
    assert received[0].content.config_records["in"]["blob"] == b"\x00\x01"
    assert received[0].metadata.message_id == sent[0].metadata.message_id != ""


def test_inprocess_run_restores_flower_task_identity() -> None:
    """The process-global task identity is restored after the run, also when it fails."""
    server = ServerApp()

    @server.main()
    def main(grid: Grid, context: Context) -> None:
        raise DeploymentError("stop")

    before = (TaskIdentity._run_id, TaskIdentity._node_id, TaskIdentity._task_id)
    with pytest.raises(DeploymentError, match="stop"):
        run_inprocess(server, _echo_app(), [{"site-name": "a"}], {}, run_id=5)

    assert (TaskIdentity._run_id, TaskIdentity._node_id, TaskIdentity._task_id) == before
