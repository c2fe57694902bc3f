"""Disclosure control: the one gate every reply of a site passes before it leaves.

:func:`disclosure_mod` is a Flower client mod wrapped around every handler of the site's
ClientApp. Before the handler runs it checks the request
(:func:`site_agent.disclosure.request_check.check_request`); after, it applies the site's
policy to the release (:func:`site_agent.disclosure.small_cells.apply_policy`, whose module
states the rules on a release and their limits), compares it with the site's earlier
releases (:mod:`site_agent.disclosure.release_history`, whose history file beside the
ledger it extends), records the outcome in the release ledger, and sends either the
controlled release or a ``declined`` reply whose reason is one of our fixed
:class:`~site_agent.disclosure.refusals.RefusalCode` texts, never an error's own text.
Fine-tuning metrics pass the minimum cell size
(:func:`site_agent.disclosure.adaptation_control.control_adaptation`).

Weight updates (rule 8 of the disclosure rules; rules 1-7 bear on a release and are
stated in :mod:`site_agent.disclosure.small_cells`): a site-local update asked for beside
fine-tuning metrics, and every federated reply, leave only when the policy's
``updates.allowed`` is on; otherwise the request is refused before any data is read.
Clipping and noise on updates, their epsilon charge and their ledger record are in
:mod:`site_agent.disclosure.update_release`, whose gate this mod hands every ``train``
message.
"""

from __future__ import annotations

import json
import logging
from collections.abc import Callable
from pathlib import Path
from typing import Any

from flwr.app import ConfigRecord, Context, Message, MessageType

from site_agent.contract.node_config import (
    LEDGER_PATH_KEY,
    POLICY_PATH_KEY,
    SITE_NAME_KEY,
    UNNAMED_SITE,
)
from site_agent.contract.protocol import StudyProtocol
from site_agent.contract.wire import (
    LOCAL_UPDATE_RECORD,
    ReplyStatus,
    SiteReply,
    SiteRequest,
    decode_reply,
    decode_request,
    encode_reply,
)
from site_agent.disclosure.adaptation_control import control_adaptation
from site_agent.disclosure.ledger import LedgerEntry, LedgerSession, Outcome, ReleaseLedger
from site_agent.disclosure.policy import SitePolicy
from site_agent.disclosure.privacy_budget import check_budget
from site_agent.disclosure.refusals import (
    RefusalCode,
    error_class_code,
    refusal,
    refusal_code,
    refusal_reason,
)
from site_agent.disclosure.release_history import ReleaseHistory, release_footprints
from site_agent.disclosure.repeat_answer import (
    data_fingerprint,
    find_earlier_answer,
    ledger_repeat,
    repeated_reply,
    request_key,
)
from site_agent.disclosure.request_check import COORDINATOR_NAME_KEY, check_request
from site_agent.disclosure.small_cells import DisclosureNote, apply_policy
from site_agent.disclosure.update_release import (
    charge_update,
    released_local_update,
    update_disclosure,
)
from site_agent.exceptions import DisclosureRefused

logger = logging.getLogger(__name__)

DISCLOSURE_RECORD = "sitepool.disclosure"
"""ConfigRecord of a reply that carries the :class:`DisclosureNote` and the ledger receipt."""
_NOTE_KEY = "json"
_SEQUENCE_KEY = "ledger_sequence"
_HASH_KEY = "ledger_entry_hash"


def read_disclosure(message: Message) -> tuple[DisclosureNote | None, int | None, str | None]:
    """Return the note, ledger sequence and ledger entry hash a site's reply carries."""
    if not message.has_content() or DISCLOSURE_RECORD not in message.content.config_records:
        return None, None, None
    record = message.content.config_records[DISCLOSURE_RECORD]
    text = record.get(_NOTE_KEY)
    note = DisclosureNote.model_validate_json(text) if isinstance(text, str) else None
    sequence = record.get(_SEQUENCE_KEY)
    digest = record.get(_HASH_KEY)
    return (
        note,
        sequence if isinstance(sequence, int) else None,
        digest if isinstance(digest, str) else None,
    )


def disclosure_mod(
    msg: Message, context: Context, call_next: Callable[[Message, Context], Message]
) -> Message:
    """Flower client mod: the site's disclosure policy on every reply (see module doc).

    Reads ``policy-path`` and ``ledger-path`` from ``context.node_config``. Without both,
    every request is declined (fail closed). Never raises.
    """
    site = (str(context.node_config.get(SITE_NAME_KEY, "")) or UNNAMED_SITE)[:80]
    request_id = ""
    ledger: ReleaseLedger | None = None
    request: SiteRequest | None = None
    study_id: str | None = None
    key: str | None = None
    if msg.metadata.message_type == MessageType.TRAIN:
        # Weight updates for Flower's strategies pass their own gate.
        return update_disclosure(msg, context, call_next)
    try:
        policy_path = str(context.node_config.get(POLICY_PATH_KEY, ""))
        ledger_path = str(context.node_config.get(LEDGER_PATH_KEY, ""))
        if not policy_path or not ledger_path:
            raise refusal(RefusalCode.POLICY_UNAVAILABLE)
        ledger = ReleaseLedger(Path(ledger_path))
        try:
            policy = SitePolicy.load(Path(policy_path))
        except Exception as exc:
            raise refusal(RefusalCode.POLICY_UNAVAILABLE) from exc
        try:
            request, _ = decode_request(msg.content)
        except Exception as exc:
            raise refusal(RefusalCode.REQUEST_UNREADABLE) from exc
        request_id = request.request_id
        coordinator = context.run_config.get(COORDINATOR_NAME_KEY)
        protocol = check_request(
            request, policy, coordinator=None if coordinator is None else str(coordinator)
        )
        study_id = protocol.study_id
        key = request_key(request, data_fingerprint(context.node_config))
        earlier = find_earlier_answer(ledger, key)
        if earlier is not None:  # asked again: the same answer, charged once (repeat_answer)
            return _repeated(msg, earlier, ledger, request, study_id, key)
        reply = call_next(msg, context)
        if reply.has_error():
            raise refusal(RefusalCode.SITE_ERROR)
        answered = decode_reply(reply.content)
        if answered.status is ReplyStatus.DECLINED or (
            answered.release is None and answered.adaptation is None
        ):
            raise refusal(error_class_code(answered.error_class))
        if answered.adaptation is not None:
            return _released_adaptation(
                msg, reply, answered, policy, ledger, request, protocol, key
            )
        return _released(msg, answered, policy, ledger, request, study_id, key)
    except Exception as exc:  # every failure is declined with a fixed reason code only
        code = refusal_code(exc)
        if isinstance(exc, DisclosureRefused):  # the policy working as meant: no traceback
            logger.warning("site %s refused a request: %s", site, code.value)
        else:
            logger.error("site %s declined a request: %s", site, code.value, exc_info=exc)
        return _declined(msg, site, request_id, code, ledger, request, study_id, answer_key=key)


def _released(
    msg: Message,
    answered: SiteReply,
    policy: SitePolicy,
    ledger: ReleaseLedger,
    request: SiteRequest,
    study_id: str,
    key: str,
) -> Message:
    assert answered.release is not None  # checked by the caller
    operation = request.operation.value
    with ledger.session() as session:
        epsilon: float | None = None
        if policy.privacy.enabled:
            budget = check_budget(session.epsilon_spent(study_id), policy.privacy)
            if not budget.allowed:
                raise refusal(RefusalCode.PRIVACY_BUDGET_EXHAUSTED, operation)
            epsilon = policy.privacy.release_epsilon
        try:
            release, note = apply_policy(answered.release, policy, epsilon=epsilon)
        except DisclosureRefused as exc:
            if epsilon is None:
                raise
            # Decided on noisy counts, the refusal itself is a DP output: it is charged.
            code = refusal_code(exc)
            logger.info("site %s declined a noisy release: %s", answered.site, code.value)
            return _declined(
                msg,
                answered.site,
                answered.request_id,
                code,
                session,
                request,
                study_id,
                epsilon,
                answer_key=key,
            )
        history, footprints = ReleaseHistory(ledger.path), None
        if epsilon is None:  # under differential privacy the budget bounds what releases add
            footprints = release_footprints(answered.release, release, note)
            history.check(
                session,
                study_id=study_id,
                window=request.window,
                footprints=footprints,
                policy=policy,
            )
        out = answered.model_copy(update={"release": release})
        out = SiteReply.model_validate(out.model_dump())
        content = encode_reply(out)
        note_json = note.model_dump_json()
        released = {
            "reply": json.loads(out.model_dump_json()),
            "disclosure": json.loads(note_json),
        }
        entry = session.append(
            outcome=Outcome.RELEASED,
            study_id=study_id,
            protocol_hash=request.protocol_hash,
            operation=operation,
            released=released,
            epsilon_spent=epsilon or 0.0,
            request_key=key,
        )
        if footprints is not None:
            history.record(
                session, entry, study_id=study_id, window=request.window, footprints=footprints
            )
    content[DISCLOSURE_RECORD] = ConfigRecord(
        {_NOTE_KEY: note_json, _SEQUENCE_KEY: entry.sequence, _HASH_KEY: entry.entry_hash}
    )
    return Message(content, reply_to=msg)


def _released_adaptation(
    msg: Message,
    reply: Message,
    answered: SiteReply,
    policy: SitePolicy,
    ledger: ReleaseLedger,
    request: SiteRequest,
    protocol: StudyProtocol,
    key: str,
) -> Message:
    """Release a fine_tune reply under the minimum cell size; ledger it.

    No differential privacy covers the metrics, so a site with noise on counts refuses.
    When the request asked for the site-local update (``check_request`` has made sure the
    policy allows it), the update is clipped and noised if the policy or protocol says so
    (:func:`~site_agent.disclosure.update_release.released_local_update`), charged to the study's
    epsilon budget, and ledgered by its SHA-256 and L2 norm, never by its values.
    """
    assert answered.adaptation is not None  # checked by the caller
    study_id = protocol.study_id
    if policy.privacy.enabled:
        raise refusal(RefusalCode.NOT_COVERED_BY_PRIVACY, request.operation.value)
    adaptation, suppressed = control_adaptation(answered.adaptation, policy)
    note = DisclosureNote(
        min_cell=policy.min_cell, small_cells=policy.small_cells, suppressed=suppressed
    )
    out = answered.model_copy(update={"adaptation": adaptation})
    out = SiteReply.model_validate(out.model_dump())
    content = encode_reply(out)
    note_json = note.model_dump_json()
    released: dict[str, Any] = {
        "reply": json.loads(out.model_dump_json()),
        "disclosure": json.loads(note_json),
    }
    update, noise = None, None
    if request.return_update:
        update, summary, noise = released_local_update(reply.content, policy, protocol)
        released["update"] = summary
    with ledger.session() as session:
        epsilon = charge_update(session, study_id, noise, policy) if update is not None else 0.0
        entry = session.append(
            outcome=Outcome.RELEASED,
            study_id=study_id,
            protocol_hash=request.protocol_hash,
            operation=request.operation.value,
            released=released,
            epsilon_spent=epsilon,
            request_key=key,
        )
    if update is not None:
        content[LOCAL_UPDATE_RECORD] = update
    content[DISCLOSURE_RECORD] = ConfigRecord(
        {_NOTE_KEY: note_json, _SEQUENCE_KEY: entry.sequence, _HASH_KEY: entry.entry_hash}
    )
    return Message(content, reply_to=msg)


def _repeated(
    msg: Message,
    earlier: LedgerEntry,
    ledger: ReleaseLedger,
    request: SiteRequest,
    study_id: str,
    key: str,
) -> Message:
    """Send the ledgered answer ``earlier`` again with its own receipt; ledger the repeat."""
    content = encode_reply(repeated_reply(earlier, request))
    ledger_repeat(ledger, earlier, request, study_id, key)
    record = ConfigRecord({_SEQUENCE_KEY: earlier.sequence, _HASH_KEY: earlier.entry_hash})
    released = earlier.released
    if isinstance(released, dict) and "disclosure" in released:
        record[_NOTE_KEY] = json.dumps(released["disclosure"])
    content[DISCLOSURE_RECORD] = record
    return Message(content, reply_to=msg)


def _declined(
    msg: Message,
    site: str,
    request_id: str,
    code: RefusalCode,
    ledger: ReleaseLedger | LedgerSession | None,
    request: SiteRequest | None,
    study_id: str | None,
    epsilon_spent: float = 0.0,
    *,
    answer_key: str | None = None,
) -> Message:
    reply = SiteReply(
        site=site,
        request_id=request_id,
        status=ReplyStatus.DECLINED,
        reason=refusal_reason(code),
        error_class=DisclosureRefused.__name__,
    )
    content = encode_reply(reply)
    if ledger is not None:
        try:
            entry = ledger.append(
                outcome=Outcome.DECLINED,
                study_id=study_id,
                protocol_hash=request.protocol_hash if request is not None else None,
                operation=request.operation.value if request is not None else None,
                reason=code.value,
                released=json.loads(reply.model_dump_json()),
                epsilon_spent=epsilon_spent,
                request_key=answer_key,
            )
            content[DISCLOSURE_RECORD] = ConfigRecord(
                {_SEQUENCE_KEY: entry.sequence, _HASH_KEY: entry.entry_hash}
            )
        except Exception as exc:  # the decline is sent even if the ledger cannot take it
            logger.error("site %s could not record a decline in its ledger", site, exc_info=exc)
    return Message(content, reply_to=msg)
