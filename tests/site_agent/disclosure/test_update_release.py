"""The weight-update gate: a federated reply leaves only as arrays and ``num-examples``.

Hospitals, the study and every number are invented for these tests. Train messages travel
as real Flower messages through the in-process engine into a ClientApp whose mod list
holds :func:`site_agent.disclosure.gate.disclosure_mod`, which hands them to the update gate.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
from flwr.app import (
    Array,
    ArrayRecord,
    ConfigRecord,
    Context,
    Message,
    MessageType,
    MetricRecord,
    RecordDict,
)
from flwr.clientapp import ClientApp
from flwr.serverapp import Grid, ServerApp

from coordinator.runs.inprocess import run_inprocess
from site_agent.contract.node_config import LEDGER_PATH_KEY, POLICY_PATH_KEY, SITE_NAME_KEY
from site_agent.contract.protocol import AdaptationPlan, EvaluationPlan, Operation, StudyProtocol
from site_agent.contract.wire import SiteRequest
from site_agent.disclosure.approvals import approve
from site_agent.disclosure.gate import disclosure_mod
from site_agent.disclosure.ledger import ReleaseLedger
from site_agent.disclosure.policy import SitePolicy, UpdateRelease
from site_agent.disclosure.refusals import RefusalCode, refusal_reason
from site_agent.disclosure.update_release import (
    DECLINED_ERROR_CODE,
    NUM_EXAMPLES,
    TRAIN_ARRAYS,
    TRAIN_CONFIG,
    TRAIN_METRICS,
    train_config,
)

SITE = "fernbrook-county-hospital"
SECRET = "PAT-SECRET-0042"


def _site(tmp_path: Path) -> tuple[dict[str, bool | int | float | str], SiteRequest, Path]:
    protocol = StudyProtocol(
        study_id="FERN-PNEUMO-2031",
        title="Invented federated fine-tuning of a pneumonia classifier",
        operations=(Operation.EVALUATE, Operation.FINE_TUNE),
        evaluation=EvaluationPlan(),
        adaptation=AdaptationPlan(),
        quorum=1,
    )
    policy = SitePolicy(
        allowed_operations=(Operation.EVALUATE, Operation.FINE_TUNE),
        updates=UpdateRelease(allowed=True),
    )
    policy_path = tmp_path / "policy.json"
    policy_path.write_text(policy.model_dump_json())
    approve(protocol, SitePolicy.load(policy_path).approvals_file)
    request = SiteRequest(
        operation=Operation.FINE_TUNE,
        protocol_json=protocol.canonical_json(),
        protocol_hash=protocol.content_hash(),
        round_number=1,
        request_id="round-1",
    )
    ledger = tmp_path / "release-ledger.jsonl"
    node_config: dict[str, bool | int | float | str] = {
        SITE_NAME_KEY: SITE,
        POLICY_PATH_KEY: str(policy_path),
        LEDGER_PATH_KEY: str(ledger),
    }
    return node_config, request, ledger


def _train_once(tmp_path: Path, extra: ConfigRecord | None) -> tuple[Message, Path]:
    """Send one real train message to a ClientApp behind the site's mod; return the reply."""
    node_config, request, ledger = _site(tmp_path)
    client = ClientApp(mods=[disclosure_mod])

    @client.train()
    def train(msg: Message, context: Context) -> Message:
        content = RecordDict(
            {
                TRAIN_ARRAYS: ArrayRecord({"w": Array(np.full(3, 0.1, dtype=np.float32))}),
                TRAIN_METRICS: MetricRecord({NUM_EXAMPLES: 40}),
            }
        )
        if extra is not None:
            content["leak"] = extra
        return Message(content, reply_to=msg)

    server = ServerApp()
    replies: list[Message] = []

    @server.main()
    def main(grid: Grid, context: Context) -> None:
        content = RecordDict(
            {
                TRAIN_ARRAYS: ArrayRecord({"w": Array(np.zeros(3, dtype=np.float32))}),
                TRAIN_CONFIG: train_config(request, b"invented bundle bytes"),
            }
        )
        (node,) = grid.get_node_ids()
        message = Message(content, node, MessageType.TRAIN)
        replies.extend(grid.send_and_receive([message], timeout=30.0))

    run_inprocess(server, client, [node_config], {})
    (reply,) = replies
    return reply, ledger


def test_update_with_only_arrays_and_num_examples_is_released_and_ledgered(
    tmp_path: Path,
) -> None:
    """A well-formed update passes the gate and is recorded by digest, not by values."""
    out, ledger = _train_once(tmp_path, None)

    assert not out.has_error()
    (entry,) = ReleaseLedger(ledger).entries()
    assert entry.outcome.value == "released"
    assert isinstance(entry.released, dict) and entry.released[NUM_EXAMPLES] == 40


def test_update_reply_carrying_a_config_record_is_declined(tmp_path: Path) -> None:
    """A reply with any ConfigRecord beside the update is declined: text could carry data."""
    leak = ConfigRecord({"note": f"patient {SECRET} has score 0.8731"})

    out, ledger = _train_once(tmp_path, leak)

    assert out.has_error()
    assert out.error.code == DECLINED_ERROR_CODE
    assert out.error.reason == refusal_reason(RefusalCode.SITE_ERROR)
    assert not out.has_content()
    (entry,) = ReleaseLedger(ledger).entries()
    assert entry.reason == RefusalCode.SITE_ERROR.value
    assert SECRET not in json.dumps(entry.model_dump(mode="json"))
