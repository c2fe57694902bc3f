"""What crosses a site's boundary: the request a coordinator sends and the reply a site returns.

This is the one schema module of the transport. A request carries the pre-registered
protocol (its canonical JSON and the hash the site checks it against), the round number
and a request id; the model bundle's bytes travel beside it in the same Flower message.
A reply carries the site's name, the request id it answers, a status of our own
(:class:`ReplyStatus`) and either the site's aggregate
:class:`~site_agent.contract.release.SiteRelease`
or a scrubbed reason for declining. Nothing row-level is representable in either model.
A site-local fine_tune reply may carry one more record, :data:`LOCAL_UPDATE_RECORD` (an
``ArrayRecord`` shaped like the model's weights), only when the request asked for it and the
site's policy allows updates (:mod:`site_agent.disclosure.gate` enforces both).

In a Flower message the pydantic JSON travels as one string value of a ``ConfigRecord``
(and the bundle as a bytes value of another), so Flower's own serialisation checks every
value's type. Decoding anything malformed raises :class:`~site_agent.exceptions.ProtocolError`.
"""

from __future__ import annotations

from datetime import date
from enum import StrEnum
from typing import TypeVar

from flwr.app import ConfigRecord, RecordDict
from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from site_agent.contract.adaptation_release import AdaptationRelease
from site_agent.contract.protocol import Operation
from site_agent.contract.release import SiteRelease
from site_agent.exceptions import ProtocolError

SITE_ACTION = "sitepool"
"""Name of our action under Flower's message categories (``evaluate.sitepool``)."""
EVALUATE_MESSAGE_TYPE = f"evaluate.{SITE_ACTION}"
"""Flower message type of an evaluation request."""

REQUEST_RECORD = "sitepool.request"
REPLY_RECORD = "sitepool.reply"
BUNDLE_RECORD = "sitepool.bundle"
WEIGHTS_RECORD = "sitepool.weights"
"""ArrayRecord of model weights sent with a fine_tune request (e.g. a federated model)."""
LOCAL_UPDATE_RECORD = "sitepool.local-update"
"""ArrayRecord beside a fine_tune reply: the site-local update (fine-tuned minus initial)."""
_JSON_KEY = "json"
_BUNDLE_KEY = "bundle"

MAX_REASON_CHARS = 300
"""Longest reason a declined reply may carry."""


class ReplyStatus(StrEnum):
    """What a site did with a request."""

    RELEASED = "released"
    """The site computed and released its aggregate statistics."""
    DECLINED = "declined"
    """The site released nothing; ``reason`` says why, without any value from its data."""


class _Wire(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


class TimeWindow(_Wire):
    """Acquisition dates ``[start, end)`` a request is limited to (monitoring rounds)."""

    start: date
    end: date

    @model_validator(mode="after")
    def _ordered(self) -> TimeWindow:
        if self.end <= self.start:
            raise ValueError("a time window must end after it starts")
        return self


class SiteRequest(_Wire):
    """One instruction from the coordinator to one site."""

    operation: Operation
    protocol_json: str = Field(min_length=2, description="Canonical JSON of the study protocol.")
    protocol_hash: str = Field(pattern=r"^[0-9a-f]{64}$", description="SHA-256 it must match.")
    round_number: int = Field(ge=1)
    request_id: str = Field(min_length=1, max_length=64, pattern=r"^[A-Za-z0-9._-]+$")
    window: TimeWindow | None = Field(
        default=None, description="Evaluate only cases acquired in this window (monitoring)."
    )
    return_update: bool = Field(
        default=False,
        description=(
            "fine_tune only: also return the site-local weight update beside the metrics "
            "(released only if the site's policy allows updates)."
        ),
    )


class SiteReply(_Wire):
    """A site's answer to one :class:`SiteRequest`."""

    site: str = Field(min_length=1, max_length=80)
    request_id: str = Field(
        max_length=64, description="The request answered; empty if the request was unreadable."
    )
    status: ReplyStatus
    release: SiteRelease | None = None
    adaptation: AdaptationRelease | None = Field(
        default=None, description="A fine_tune reply's release, instead of ``release``."
    )
    reason: str | None = Field(default=None, max_length=MAX_REASON_CHARS)
    error_class: str | None = Field(
        default=None, max_length=80, description="Class of the error that caused a decline."
    )

    @model_validator(mode="after")
    def _status_matches_payload(self) -> SiteReply:
        payloads = (self.release is not None) + (self.adaptation is not None)
        if self.status is ReplyStatus.RELEASED and (payloads != 1 or self.reason):
            raise ValueError("a released reply carries a release (one kind only) and no reason")
        if self.status is ReplyStatus.DECLINED and (payloads or not self.reason):
            raise ValueError("a declined reply carries a reason and no release")
        return self


_WireT = TypeVar("_WireT", bound=_Wire)


def encode_request(request: SiteRequest, bundle: bytes | None) -> RecordDict:
    """Pack a request (and the model bundle's bytes, if any) into Flower message content."""
    content = RecordDict({REQUEST_RECORD: ConfigRecord({_JSON_KEY: request.model_dump_json()})})
    if bundle is not None:
        content[BUNDLE_RECORD] = ConfigRecord({_BUNDLE_KEY: bundle})
    return content


def decode_request(content: RecordDict) -> tuple[SiteRequest, bytes | None]:
    """Unpack a request and the bundle bytes travelling with it.

    Raises
    ------
    ProtocolError
        If the content is not a well-formed sitepool request.
    """
    request = _validated(SiteRequest, _json_value(content, REQUEST_RECORD))
    bundle: bytes | None = None
    if BUNDLE_RECORD in content.config_records:
        value = content.config_records[BUNDLE_RECORD].get(_BUNDLE_KEY)
        if not isinstance(value, bytes):
            raise ProtocolError("malformed request: the model bundle is not a byte string")
        bundle = value
    return request, bundle


def encode_reply(reply: SiteReply) -> RecordDict:
    """Pack a reply into Flower message content."""
    return RecordDict({REPLY_RECORD: ConfigRecord({_JSON_KEY: reply.model_dump_json()})})


def decode_reply(content: RecordDict) -> SiteReply:
    """Unpack a site's reply.

    Raises
    ------
    ProtocolError
        If the content is not a well-formed sitepool reply.
    """
    return _validated(SiteReply, _json_value(content, REPLY_RECORD))


def _json_value(content: RecordDict, record: str) -> str:
    if record not in content.config_records:
        raise ProtocolError(f"malformed message: no {record!r} record")
    value = content.config_records[record].get(_JSON_KEY)
    if not isinstance(value, str):
        raise ProtocolError(f"malformed message: {record!r} holds no JSON text")
    return value


def _validated(model: type[_WireT], text: str) -> _WireT:
    try:
        return model.model_validate_json(text)
    except ValidationError as exc:
        first = exc.errors()[0]
        where = ".".join(str(p) for p in first["loc"]) or "message"
        raise ProtocolError(f"malformed {model.__name__}: {where}: {first['msg']}") from exc
