"""The wire schema through Flower's own serialisation.

Reference: Flower 1.42's protobuf conversion of a ``RecordDict``
(``flwr.common.serde.recorddict_to_proto`` / ``recorddict_from_proto``), i.e. exactly
what a SuperLink carries between coordinator and site.
"""

from __future__ import annotations

import uuid
from pathlib import Path

import pytest
from flwr.app import ConfigRecord, MetricRecord, RecordDict
from flwr.common.serde import recorddict_from_proto, recorddict_to_proto
from flwr.proto.recorddict_pb2 import RecordDict as ProtoRecordDict
from hypothesis import given
from hypothesis import strategies as st
from pydantic import ValidationError

from site_agent.contract.protocol import EvaluationPlan, Operation, StudyProtocol, uniform_edges
from site_agent.contract.release import SiteRelease
from site_agent.contract.wire import (
    REPLY_RECORD,
    REQUEST_RECORD,
    ReplyStatus,
    SiteReply,
    SiteRequest,
    decode_reply,
    decode_request,
    encode_reply,
    encode_request,
)
from site_agent.data.predictions import load_predictions
from site_agent.evaluation import evaluate_site
from site_agent.exceptions import ProtocolError

PROTOCOL = StudyProtocol(study_id="heron-bay-2030", title="An invented study", quorum=1)


def _over_the_wire(content: RecordDict) -> RecordDict:
    wire = recorddict_to_proto(content).SerializeToString()
    return recorddict_from_proto(ProtoRecordDict.FromString(wire))


def _request(round_number: int = 1) -> SiteRequest:
    return SiteRequest(
        operation=Operation.EVALUATE,
        protocol_json=PROTOCOL.canonical_json(),
        protocol_hash=PROTOCOL.content_hash(),
        round_number=round_number,
        request_id=uuid.uuid4().hex,
    )


def _release(tmp_path: Path) -> SiteRelease:
    table = tmp_path / "t.csv"
    rows = [f"c{i},p{i},{i % 2},{(i % 7) / 7:.3f}" for i in range(24)]
    table.write_text("case_id,patient_id,label,score\n" + "\n".join(rows) + "\n")
    plan = EvaluationPlan(histogram_edges=uniform_edges(4))
    return evaluate_site(
        load_predictions(table), plan, site="heron-bay", protocol_hash=PROTOCOL.content_hash()
    )


@given(
    round_number=st.integers(min_value=1, max_value=10_000),
    bundle=st.none() | st.binary(max_size=2048),
)
def test_request_and_bundle_survive_flower_serialisation(
    round_number: int, bundle: bytes | None
) -> None:
    """Any request, with or without bundle bytes, decodes to itself after Flower's protobuf."""
    request = _request(round_number)

    decoded, decoded_bundle = decode_request(_over_the_wire(encode_request(request, bundle)))

    assert decoded == request
    assert decoded_bundle == bundle


def test_released_reply_survives_flower_serialisation(tmp_path: Path) -> None:
    """A reply holding a real release decodes to an equal reply after Flower's protobuf."""
    reply = SiteReply(
        site="heron-bay", request_id="r1", status=ReplyStatus.RELEASED, release=_release(tmp_path)
    )

    assert decode_reply(_over_the_wire(encode_reply(reply))) == reply


@pytest.mark.parametrize(
    ("content", "match"),
    [
        (RecordDict(), "no 'sitepool.request' record"),
        (RecordDict({REQUEST_RECORD: ConfigRecord({"json": 3})}), "holds no JSON text"),
        (RecordDict({REQUEST_RECORD: ConfigRecord({"json": "{not json"})}), "SiteRequest"),
        (RecordDict({REQUEST_RECORD: MetricRecord({"json": 1})}), "no 'sitepool.request'"),
    ],
)
def test_malformed_request_raises_protocol_error(content: RecordDict, match: str) -> None:
    """Content that is not a sitepool request raises ProtocolError, not a library error."""
    with pytest.raises(ProtocolError, match=match):
        decode_request(content)


def test_request_with_invalid_field_names_the_field() -> None:
    """A request whose round number is 0 is refused, naming the field."""
    text = _request().model_dump_json().replace('"round_number":1', '"round_number":0')
    content = RecordDict({REQUEST_RECORD: ConfigRecord({"json": text})})

    with pytest.raises(ProtocolError, match="round_number"):
        decode_request(content)


def test_bundle_that_is_not_bytes_raises_protocol_error() -> None:
    """A bundle record holding text instead of bytes is malformed."""
    content = encode_request(_request(), None)
    content["sitepool.bundle"] = ConfigRecord({"bundle": "not bytes"})

    with pytest.raises(ProtocolError, match="not a byte string"):
        decode_request(content)


def test_malformed_reply_raises_protocol_error() -> None:
    """A reply record missing or holding a reply of the wrong shape raises ProtocolError."""
    with pytest.raises(ProtocolError, match=r"no 'sitepool\.reply' record"):
        decode_reply(RecordDict())
    bad = RecordDict({REPLY_RECORD: ConfigRecord({"json": '{"site": "x"}'})})
    with pytest.raises(ProtocolError, match="SiteReply"):
        decode_reply(bad)


def test_reply_status_must_match_its_payload(tmp_path: Path) -> None:
    """Released needs a release and no reason; declined needs a reason and no release."""
    with pytest.raises(ValidationError, match="released reply carries a release"):
        SiteReply(site="s", request_id="r", status=ReplyStatus.RELEASED)
    with pytest.raises(ValidationError, match="declined reply carries a reason"):
        SiteReply(site="s", request_id="r", status=ReplyStatus.DECLINED)
    with pytest.raises(ValidationError, match="declined reply carries a reason"):
        SiteReply(
            site="s",
            request_id="r",
            status=ReplyStatus.DECLINED,
            reason="x",
            release=_release(tmp_path),
        )
