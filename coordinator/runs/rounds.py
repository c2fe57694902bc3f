"""Evaluation rounds over a Flower ``Grid``: one request per site, replies sorted by outcome.

A round sends one :class:`~site_agent.contract.wire.SiteRequest` to every connected node through
``grid.send_and_receive`` and sorts what comes back into three piles: releases by site,
declines (with the site's scrubbed reason) and node faults (no reply before the timeout,
a Flower error, or a reply that does not decode). The round then checks the protocol's
quorum, counted in releases: fewer released sites than ``protocol.quorum`` raises
:class:`~site_agent.exceptions.DeploymentError`.

Beside each answer the round keeps what the site's disclosure control reported: its note
of what the policy changed and the site's ledger sequence and entry hash, which anchor
the site's release ledger outside the site.

A site's identity is the name in its reply, tied to the node that sent it; a node that
names a site another node already answered for is a fault, not a second release.
"""

from __future__ import annotations

import time
import uuid
from collections.abc import Callable, Iterable, Sequence

from flwr.app import Message
from flwr.serverapp import Grid
from pydantic import BaseModel, ConfigDict, Field, ValidationError

from coordinator.adaptation.fine_tuning import FineTuningOutcome
from site_agent.contract.protocol import Operation, StudyProtocol
from site_agent.contract.release import SiteRelease
from site_agent.contract.wire import (
    EVALUATE_MESSAGE_TYPE,
    ReplyStatus,
    SiteReply,
    SiteRequest,
    TimeWindow,
    decode_reply,
    encode_request,
)
from site_agent.disclosure.gate import read_disclosure
from site_agent.disclosure.small_cells import DisclosureNote
from site_agent.exceptions import DeploymentError, ProtocolError

MAX_FAULT_REASON_CHARS = 200
"""Longest reason kept for a node fault (Flower's error text is cut to this)."""
REPLY_POLL_S = 0.3
"""Pause between two pulls of a round's replies in :func:`exchange`."""


class _Record(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=True)


class SiteDecline(_Record):
    """A site that answered but released nothing."""

    site: str
    node_id: int
    reason: str
    error_class: str | None = None


class NodeFault(_Record):
    """A node whose answer never arrived or could not be used."""

    node_id: int = Field(description="Flower node id; 0 for a site that was not connected.")
    code: int | None = Field(
        default=None, description="Flower error code; None for a timeout or a bad reply."
    )
    reason: str
    site: str | None = Field(
        default=None, description="The site's registered name, where the deployment knows it."
    )


class SiteDisclosure(_Record):
    """What a site's disclosure control reported beside its answer."""

    note: DisclosureNote | None = Field(
        default=None, description="What the site's policy changed in its release."
    )
    ledger_sequence: int | None = None
    ledger_entry_hash: str | None = Field(
        default=None, description="Anchors the site's release ledger outside the site."
    )


class RoundOutcome(_Record):
    """What one evaluation round produced."""

    round_number: int
    protocol_hash: str
    nodes_asked: int
    releases: dict[str, SiteRelease] = Field(description="Released statistics by site name.")
    node_of_site: dict[str, int] = Field(description="Flower node id of each answering site.")
    declines: list[SiteDecline]
    faults: list[NodeFault]
    disclosures: dict[str, SiteDisclosure] = Field(
        default_factory=dict, description="Disclosure notes and ledger anchors by site name."
    )


class StudyOutcome(_Record):
    """Every round of one study run."""

    study_id: str
    protocol_hash: str
    rounds: list[RoundOutcome]
    fine_tuning: FineTuningOutcome | None = Field(
        default=None, description="Site-local and federated fine-tuning, if the protocol asks."
    )


def ask_sites(
    grid: Grid,
    protocol: StudyProtocol,
    bundle: bytes | None,
    round_number: int,
    operation: Operation,
    node_ids: Sequence[int],
    *,
    window: TimeWindow | None = None,
    on_reply: Callable[[Message], None] | None = None,
) -> RoundOutcome:
    """Send one request per node, wait for the replies, and sort them by outcome.

    No quorum is checked here: evaluation rounds require one, monitoring rounds do not.
    ``on_reply``, if given, sees each reply as soon as it arrives (a resumable study
    stores each release then, so a coordinator killed mid-round keeps what came in).
    """
    protocol_hash = protocol.content_hash()
    requests: dict[int, SiteRequest] = {}
    messages: list[Message] = []
    for node_id in node_ids:
        request = SiteRequest(
            operation=operation,
            protocol_json=protocol.canonical_json(),
            protocol_hash=protocol_hash,
            round_number=round_number,
            request_id=uuid.uuid4().hex,
            window=window,
        )
        requests[node_id] = request
        messages.append(
            Message(
                encode_request(request, bundle),
                node_id,
                EVALUATE_MESSAGE_TYPE,
                group_id=str(round_number),
            )
        )
    if on_reply is None:
        replies = list(grid.send_and_receive(messages, timeout=protocol.reply_timeout_s))
    else:
        replies = exchange(grid, messages, protocol.reply_timeout_s, on_reply)
    return _sorted_replies(replies, requests, protocol_hash, round_number)


def run_evaluation_round(
    grid: Grid, protocol: StudyProtocol, bundle: bytes | None, round_number: int
) -> RoundOutcome:
    """Ask every connected node for its evaluation release and collect the answers.

    Raises
    ------
    DeploymentError
        If fewer sites than ``protocol.quorum`` released statistics.
    """
    node_ids = sorted(grid.get_node_ids())
    outcome = ask_sites(grid, protocol, bundle, round_number, Operation.EVALUATE, node_ids)
    if len(outcome.releases) < protocol.quorum:
        raise DeploymentError(
            f"round {round_number}: {len(outcome.releases)} of {len(node_ids)} sites released "
            f"statistics, the protocol's quorum is {protocol.quorum} "
            f"({len(outcome.declines)} declined, {len(outcome.faults)} faulted)"
        )
    return outcome


def run_study_rounds(
    grid: Grid,
    protocol: StudyProtocol,
    bundle: bytes | None,
    seconds: dict[str, float] | None = None,
) -> StudyOutcome:
    """Run ``protocol.rounds`` evaluation rounds; stop at the first that misses the quorum.

    ``seconds``, if given, receives each round's wall time under ``round_<n>``.
    """
    rounds = []
    for number in range(1, protocol.rounds + 1):
        started = time.perf_counter()
        rounds.append(run_evaluation_round(grid, protocol, bundle, number))
        if seconds is not None:
            seconds[f"round_{number}"] = time.perf_counter() - started
    return StudyOutcome(
        study_id=protocol.study_id, protocol_hash=protocol.content_hash(), rounds=rounds
    )


def exchange(
    grid: Grid,
    messages: Sequence[Message],
    timeout_s: float,
    on_reply: Callable[[Message], None],
) -> list[Message]:
    """Push ``messages``, then pull replies until all came back or ``timeout_s`` passed.

    Like ``Grid.send_and_receive``, but each reply is handed to ``on_reply`` as it
    arrives, and replies are pulled every :data:`REPLY_POLL_S` seconds.
    """
    pending = {message_id for message_id in grid.push_messages(messages) if message_id}
    replies: list[Message] = []
    deadline = time.monotonic() + timeout_s
    while pending:
        for reply in grid.pull_messages(list(pending)):
            pending.discard(reply.metadata.reply_to_message_id)
            replies.append(reply)
            on_reply(reply)
        if not pending or time.monotonic() >= deadline:
            break
        time.sleep(REPLY_POLL_S)
    return replies


def _sorted_replies(
    replies: Iterable[Message],
    requests: dict[int, SiteRequest],
    protocol_hash: str,
    round_number: int,
) -> RoundOutcome:
    """Sort a round's replies into releases, declines and faults, one answer per node asked.

    A reply from a node not in ``requests``, or a second reply from a node, is ignored; a
    node that did not answer is a fault. Used by every kind of round (evaluation,
    monitoring) so that they check replies the same way.
    """
    releases: dict[str, SiteRelease] = {}
    node_of_site: dict[str, int] = {}
    disclosures: dict[str, SiteDisclosure] = {}
    declines: list[SiteDecline] = []
    faults: list[NodeFault] = []
    answered: set[int] = set()
    for reply in replies:
        node_id = reply.metadata.src_node_id
        if node_id not in requests or node_id in answered:
            continue  # not a node we asked, or a duplicate: ignore
        answered.add(node_id)
        if reply.has_error():
            faults.append(
                NodeFault(
                    node_id=node_id, code=reply.error.code, reason=_short(reply.error.reason or "")
                )
            )
            continue
        try:
            answer = _checked_reply(reply, requests[node_id], node_of_site)
        except ProtocolError as exc:
            faults.append(NodeFault(node_id=node_id, reason=_short(str(exc))))
            continue
        node_of_site[answer.site] = node_id
        disclosures[answer.site] = _disclosure(reply)
        if answer.status is ReplyStatus.RELEASED and answer.release is not None:
            releases[answer.site] = answer.release
        else:
            declines.append(
                SiteDecline(
                    site=answer.site,
                    node_id=node_id,
                    reason=answer.reason or "",
                    error_class=answer.error_class,
                )
            )
    faults.extend(
        NodeFault(node_id=node_id, reason="no reply before the reply timeout")
        for node_id in sorted(set(requests) - answered)
    )
    return RoundOutcome(
        round_number=round_number,
        protocol_hash=protocol_hash,
        nodes_asked=len(requests),
        releases=dict(sorted(releases.items())),
        node_of_site=dict(sorted(node_of_site.items())),
        declines=sorted(declines, key=lambda d: d.site),
        faults=sorted(faults, key=lambda f: f.node_id),
        disclosures=dict(sorted(disclosures.items())),
    )


def _checked_reply(reply: Message, request: SiteRequest, node_of_site: dict[str, int]) -> SiteReply:
    answer = decode_reply(reply.content)
    if answer.request_id and answer.request_id != request.request_id:
        raise ProtocolError("reply answers a different request")
    if answer.site in node_of_site:
        raise ProtocolError(f"site {answer.site!r} already answered from another node")
    if answer.release is not None and answer.release.site != answer.site:
        raise ProtocolError("release names a different site than its reply")
    if answer.release is not None and answer.release.protocol_hash != request.protocol_hash:
        raise ProtocolError("release was computed under a different protocol")
    return answer


def _disclosure(reply: Message) -> SiteDisclosure:
    """Read the disclosure record beside a reply; an unreadable one counts as absent."""
    try:
        note, sequence, digest = read_disclosure(reply)
    except ValidationError:
        return SiteDisclosure()
    return SiteDisclosure(note=note, ledger_sequence=sequence, ledger_entry_hash=digest)


def _short(text: str) -> str:
    text = " ".join(text.split())
    if len(text) <= MAX_FAULT_REASON_CHARS:
        return text
    return text[: MAX_FAULT_REASON_CHARS - 3] + "..."
