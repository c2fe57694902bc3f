"""Answer a protocol into a signed release file, for a site that cannot connect.

The request is answered by the same code as a request that arrives over Flower: a Flower
message goes into :data:`site_agent.client_app.app`, so the site's disclosure gate
(:func:`site_agent.disclosure.gate.disclosure_mod`) checks the protocol approval, applies
the policy, charges any privacy budget and ledgers the answer exactly as for a connected
site. Asked again for the same round, the gate gives the ledgered answer again, uncharged
(:mod:`site_agent.disclosure.repeat_answer`). The reply that came out of the gate is then
signed with the site's key (:mod:`site_agent.contract.signed_release`).

Private Flower touches, pinned to ``flwr==1.42.0`` and kept in this module only (the
coordinator's in-process engine does the same for the same reason): ``Message(...)`` reads
the process's task identity from ``TaskIdentity``, which a Flower runtime sets when it starts
an app process; and a message id is set through ``Metadata.__dict__["_message_id"]``.
"""

from __future__ import annotations

import uuid
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, datetime
from pathlib import Path

from flwr.app import Context, Message, RecordDict
from flwr.common.constant import SUPERLINK_NODE_ID
from flwr.supercore.task_identity import TaskIdentity

from site_agent.contract.protocol import Operation, StudyProtocol
from site_agent.contract.signed_release import SignedRelease, load_private_key, sign_release
from site_agent.contract.wire import (
    EVALUATE_MESSAGE_TYPE,
    SiteRequest,
    decode_reply,
    encode_request,
)
from site_agent.disclosure.gate import read_disclosure
from site_agent.disclosure.request_check import COORDINATOR_NAME_KEY
from site_agent.exceptions import DeploymentError
from site_agent.service import SiteSettings

OFFLINE_NODE_ID = 1
"""Node id the site plays under when it answers into a file (no SuperLink assigns one)."""
_RUN_ID = 1
_TASK_ID = 1


def answer_into_file(
    protocol: StudyProtocol,
    settings: SiteSettings,
    private_key: Path,
    *,
    round_number: int = 1,
    operation: Operation = Operation.EVALUATE,
    bundle: bytes | None = None,
    coordinator: str | None = None,
) -> SignedRelease:
    """Answer one round of ``protocol`` through the site's gate and sign the reply.

    Parameters
    ----------
    protocol
        The study protocol (the site must have approved it, as for a connected run).
    settings
        The site's name, data, policy and ledger (policy and ledger are required: without
        them the gate declines, as it does for a connected site).
    private_key
        The site's OpenSSH ECDSA P-384 private key.
    round_number, operation
        What is answered.
    bundle
        The model bundle's bytes, when the site's table has no scores.
    coordinator
        The coordinator's name, checked against the policy's ``allowed_coordinators``.

    Returns
    -------
    SignedRelease
        The signed answer: a release, or a decline with its reason code.

    Raises
    ------
    InputError
        If the key cannot be loaded (before anything is computed or ledgered).
    """
    key = load_private_key(private_key)
    from site_agent.client_app import app  # the site's own ClientApp, gate and all

    request = SiteRequest(
        operation=operation,
        protocol_json=protocol.canonical_json(),
        protocol_hash=protocol.content_hash(),
        round_number=round_number,
        request_id=f"file-{uuid.uuid4().hex}",
    )
    run_config: dict[str, bool | int | float | str] = {}
    if coordinator is not None:
        run_config[COORDINATOR_NAME_KEY] = coordinator
    context = Context(
        run_id=_RUN_ID,
        node_id=OFFLINE_NODE_ID,
        node_config=dict(settings.to_node_config()),
        state=RecordDict(),
        run_config=run_config,
    )
    with _task_identity():
        message = Message(encode_request(request, bundle), OFFLINE_NODE_ID, EVALUATE_MESSAGE_TYPE)
        message.metadata.__dict__["_message_id"] = uuid.uuid4().hex  # private, see module doc
        reply = app(message, context)
    if reply.has_error():  # the gate never raises; an error here is Flower's, not the site's
        raise DeploymentError("the site's ClientApp returned a Flower error for a file answer")
    answered = decode_reply(reply.content)
    note, sequence, digest = read_disclosure(reply)
    unsigned = SignedRelease(
        site=settings.site,
        protocol_hash=request.protocol_hash,
        operation=operation,
        round_number=round_number,
        signed_at=datetime.now(UTC),
        key_fingerprint="SHA256:" + "A" * 43,  # replaced by sign_release
        reply=answered,
        disclosure=None if note is None else note.model_dump(mode="json"),
        ledger_sequence=sequence,
        ledger_entry_hash=digest,
    )
    return sign_release(unsigned, key)


@contextmanager
def _task_identity() -> Iterator[None]:
    """Set Flower's process-global task identity for the block, then restore it (private)."""
    saved = (TaskIdentity._run_id, TaskIdentity._node_id, TaskIdentity._task_id)
    TaskIdentity.run_id, TaskIdentity.node_id = _RUN_ID, SUPERLINK_NODE_ID
    TaskIdentity.task_id = _TASK_ID
    try:
        yield
    finally:
        TaskIdentity._run_id, TaskIdentity._node_id, TaskIdentity._task_id = saved
