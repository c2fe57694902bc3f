"""The adaptation request round: one ``fine_tune`` request per site, and what came back.

:func:`request_adaptation` sends every site one ``fine_tune`` request; the protocol's
:class:`~site_agent.contract.protocol.AdaptationPlan` is the whole grid (case counts x seeds), so
one message per site suffices. Sent with weights (a federated model), the same request
asks the site only to measure those weights on its held-out test set. With
``return_update`` the request also asks for each site's site-local update (fine-tuned minus
initial weights), which a site returns only if its policy allows updates
(:class:`LocalUpdate`; a site that does not allow it declines the whole request).

The releases are summarised into adaptation curves by :mod:`coordinator.adaptation.curves`.
"""

from __future__ import annotations

import uuid
from collections.abc import Iterable, Mapping

import numpy as np
import numpy.typing as npt
from flwr.app import Array, ArrayRecord, Message
from flwr.serverapp import Grid
from pydantic import BaseModel, ConfigDict, Field

from site_agent.contract.adaptation_release import AdaptationRelease
from site_agent.contract.protocol import Operation, StudyProtocol
from site_agent.contract.wire import (
    EVALUATE_MESSAGE_TYPE,
    LOCAL_UPDATE_RECORD,
    WEIGHTS_RECORD,
    ReplyStatus,
    SiteRequest,
    decode_reply,
    encode_request,
)
from site_agent.disclosure.update_release import update_digest, update_norm
from site_agent.exceptions import DeploymentError, ProtocolError

MAX_REASON_CHARS = 200


class _Record(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=True)


class AdaptationDecline(_Record):
    """A node that did not release: declined (with the site's reason) or faulted."""

    node_id: int
    site: str | None = None
    reason: str


class LocalUpdate(_Record):
    """A site-local update as the site released it (clipped and noised if its policy says)."""

    sha256: str = Field(description="SHA-256 of names and bytes, as in the site's ledger.")
    l2_norm: float = Field(description="L2 norm over all arrays, as in the site's ledger.")
    shapes: dict[str, list[int]]
    weights: dict[str, list[float]] = Field(description="The update, flattened, by name.")

    def arrays(self) -> dict[str, npt.NDArray[np.float32]]:
        """Return the update as float32 arrays of their shapes."""
        return {
            k: np.asarray(v, dtype=np.float32).reshape(self.shapes[k])
            for k, v in self.weights.items()
        }


class AdaptationRound(_Record):
    """What one round of ``fine_tune`` requests produced."""

    weights: str = Field(description="'bundle' (the grid) or 'sent' (measure sent weights).")
    releases: dict[str, AdaptationRelease]
    node_of_site: dict[str, int]
    declines: list[AdaptationDecline] = Field(default_factory=list)
    updates: dict[str, LocalUpdate] = Field(
        default_factory=dict, description="Site-local updates, when they were asked for."
    )


def request_adaptation(
    grid: Grid,
    protocol: StudyProtocol,
    bundle: bytes,
    *,
    weights: Mapping[str, npt.NDArray[np.floating]] | None = None,
    quorum: int | None = None,
    return_update: bool = False,
) -> AdaptationRound:
    """Send every connected node one ``fine_tune`` request and collect the releases.

    With ``return_update`` (not with ``weights``) each site is also asked for its
    site-local update; a release that comes without one counts as a decline.

    Raises
    ------
    ProtocolError
        If the protocol has no adaptation plan or does not list ``fine_tune``.
    DeploymentError
        If fewer sites than ``quorum`` (default: the protocol's) released.
    """
    if protocol.adaptation is None or Operation.FINE_TUNE not in protocol.operations:
        raise ProtocolError("the protocol lists no fine_tune operation with an adaptation plan")
    protocol_hash = protocol.content_hash()
    requests: dict[int, SiteRequest] = {}
    messages = []
    for node_id in sorted(grid.get_node_ids()):
        request = SiteRequest(
            operation=Operation.FINE_TUNE,
            protocol_json=protocol.canonical_json(),
            protocol_hash=protocol_hash,
            round_number=1,
            request_id=uuid.uuid4().hex,
            return_update=return_update,
        )
        requests[node_id] = request
        content = encode_request(request, bundle)
        if weights is not None:
            content[WEIGHTS_RECORD] = ArrayRecord(
                {k: Array(np.asarray(v, dtype=np.float32)) for k, v in weights.items()}
            )
        messages.append(Message(content, node_id, EVALUATE_MESSAGE_TYPE, group_id="fine-tune"))
    replies = grid.send_and_receive(messages, timeout=protocol.reply_timeout_s)
    outcome = _sorted(replies, requests, "sent" if weights is not None else "bundle", return_update)
    needed = protocol.quorum if quorum is None else quorum
    if len(outcome.releases) < needed:
        raise DeploymentError(
            f"fine_tune: {len(outcome.releases)} of {len(requests)} sites released, "
            f"the quorum is {needed}"
        )
    return outcome


def _sorted(
    replies: Iterable[Message],
    requests: Mapping[int, SiteRequest],
    weights: str,
    return_update: bool = False,
) -> AdaptationRound:
    releases: dict[str, AdaptationRelease] = {}
    updates: dict[str, LocalUpdate] = {}
    node_of_site: dict[str, int] = {}
    declines: list[AdaptationDecline] = []
    answered: set[int] = set()
    for reply in replies:
        node_id = reply.metadata.src_node_id
        if node_id not in requests or node_id in answered:
            continue
        answered.add(node_id)
        if reply.has_error():
            declines.append(
                AdaptationDecline(node_id=node_id, reason=_short(reply.error.reason or "error"))
            )
            continue
        try:
            answer = decode_reply(reply.content)
        except ProtocolError as exc:
            declines.append(AdaptationDecline(node_id=node_id, reason=_short(str(exc))))
            continue
        release = answer.adaptation
        valid = (
            answer.request_id == requests[node_id].request_id
            and answer.site not in node_of_site
            and (release is None or release.site == answer.site)
        )
        if not valid:
            declines.append(AdaptationDecline(node_id=node_id, reason="inconsistent reply"))
            continue
        node_of_site[answer.site] = node_id
        arrays = reply.content.array_records.get(LOCAL_UPDATE_RECORD)
        if answer.status is ReplyStatus.RELEASED and return_update and arrays is None:
            declines.append(
                AdaptationDecline(node_id=node_id, site=answer.site, reason="no update returned")
            )
        elif answer.status is ReplyStatus.RELEASED and release is not None:
            releases[answer.site] = release
            if return_update and arrays is not None:
                updates[answer.site] = _local_update(arrays)
        else:
            declines.append(
                AdaptationDecline(node_id=node_id, site=answer.site, reason=answer.reason or "")
            )
    declines.extend(
        AdaptationDecline(node_id=n, reason="no reply before the reply timeout")
        for n in sorted(set(requests) - answered)
    )
    return AdaptationRound(
        weights=weights,
        releases=dict(sorted(releases.items())),
        node_of_site=dict(sorted(node_of_site.items())),
        declines=declines,
        updates=dict(sorted(updates.items())),
    )


def _local_update(arrays: ArrayRecord) -> LocalUpdate:
    return LocalUpdate(
        sha256=update_digest(arrays),
        l2_norm=update_norm(arrays),
        shapes={k: list(v.shape) for k, v in arrays.items()},
        weights={k: [float(x) for x in v.numpy().ravel()] for k, v in arrays.items()},
    )


def _short(text: str) -> str:
    text = " ".join(text.split())
    return text if len(text) <= MAX_REASON_CHARS else text[: MAX_REASON_CHARS - 3] + "..."
