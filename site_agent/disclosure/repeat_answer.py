"""Re-asked requests: a site asked again for an answer it already gave sends the same answer.

A coordinator restarted mid-study, or a reply lost on the way, makes the coordinator ask a
site again for the same thing: the same operation, under the same protocol hash, in the same
round (and time window, for monitoring). Computing the answer again would be wasteful and,
with differential privacy on, harmful: a fresh noisy release of the same statistics is a
second draw that is charged again and, averaged with the first, narrows the noise. So the
gate answers a re-asked request from its ledger:

* the ledger entry of the first answer carries the request's :func:`request_key`, which
  includes the SHA-256 of the site's data file: on changed data (labels that arrived,
  a corrected table) the same question is a new one, answered and charged afresh;
* a later request with the same key gets the ledgered reply again (with the new request id),
  the ledger receipt of the first answer (its sequence and entry hash), and no new charge;
* the repeat itself is ledgered, with ``epsilon_spent`` 0 and a pointer to the first entry,
  so the site's record shows every time something left.

What is repeated: a release, and a decline that was charged epsilon (a decision made on
noisy counts is itself a differentially private output). A decline that cost nothing
(a missing file, an unapproved protocol) is decided afresh: the cause may have been fixed.
A fine_tune answer that carried a weight update is not repeated (the ledger keeps only the
update's hash and norm, not its values); a re-ask of it is answered afresh and charged again.
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping
from typing import Any

from site_agent.contract.node_config import DATA_PATH_KEY
from site_agent.contract.wire import SiteReply, SiteRequest
from site_agent.disclosure.ledger import (
    LedgerEntry,
    Outcome,
    ReleaseLedger,
    canonical_json,
    verify_ledger,
)
from site_agent.exceptions import LedgerError

REPEAT_KEY = "repeat_of"
"""Key of a repeat entry's ``released`` object: the sequence of the entry it repeats."""
_REPEAT_HASH_KEY = "repeat_of_entry_hash"


def data_fingerprint(node_config: Mapping[str, bool | int | float | str]) -> str | None:
    """Return the SHA-256 of the site's data file, or None when it cannot be read.

    Part of the key: the same question on changed data (labels that arrived, a corrected
    table) is a new question and is answered afresh.
    """
    path = str(node_config.get(DATA_PATH_KEY, ""))
    if not path:
        return None
    digest = hashlib.sha256()
    try:
        with open(path, "rb") as handle:
            for block in iter(lambda: handle.read(1 << 20), b""):
                digest.update(block)
    except OSError:
        return None
    return digest.hexdigest()


def request_key(request: SiteRequest, data: str | None = None) -> str:
    """Return the SHA-256 that names what ``request`` asks for, whatever its request id.

    Two requests have the same key when they ask for the same operation under the same
    protocol hash, in the same round and time window, both with or without a weight update,
    of the same data (``data``: :func:`data_fingerprint`).
    """
    asked = {
        "data": data,
        "operation": request.operation.value,
        "protocol_hash": request.protocol_hash,
        "round_number": request.round_number,
        "window": None if request.window is None else request.window.model_dump(mode="json"),
        "return_update": request.return_update,
    }
    return hashlib.sha256(canonical_json(asked).encode()).hexdigest()


def _repeatable(entry: LedgerEntry) -> bool:
    released = entry.released
    if not isinstance(released, dict) or REPEAT_KEY in released or "update" in released:
        return False
    if entry.outcome is Outcome.RELEASED:
        return isinstance(released.get("reply"), dict)
    return entry.epsilon_spent > 0  # a charged decline: its decision is a DP output


def earlier_answer(entries: list[LedgerEntry], key: str) -> LedgerEntry | None:
    """Return the latest first answer ledgered under ``key`` that may be sent again, or None."""
    for entry in reversed(entries):
        if entry.request_key == key and _repeatable(entry):
            return entry
    return None


def repeated_reply(entry: LedgerEntry, request: SiteRequest) -> SiteReply:
    """Return the reply ledgered in ``entry``, addressed to ``request`` (its request id)."""
    released = entry.released
    assert isinstance(released, dict)  # checked by earlier_answer
    reply: Any = released.get("reply", released)  # a decline ledgers the reply itself
    ledgered = SiteReply.model_validate(reply)
    return ledgered.model_copy(update={"request_id": request.request_id})


def ledger_repeat(
    ledger: ReleaseLedger,
    entry: LedgerEntry,
    request: SiteRequest,
    study_id: str | None,
    key: str,
) -> LedgerEntry:
    """Record that the answer of ``entry`` was sent again, charging nothing; return the record."""
    return ledger.append(
        outcome=entry.outcome,
        study_id=study_id,
        protocol_hash=request.protocol_hash,
        operation=request.operation.value,
        reason=entry.reason,
        released={REPEAT_KEY: entry.sequence, _REPEAT_HASH_KEY: entry.entry_hash},
        epsilon_spent=0.0,
        request_key=key,
    )


def find_earlier_answer(ledger: ReleaseLedger, key: str) -> LedgerEntry | None:
    """Return the ledgered first answer under ``key`` (:func:`request_key`), or None.

    The hash chain is verified first: an answer read back from a ledger that was altered
    is no answer, and the request is declined as ``ledger_unverified`` instead.

    Raises
    ------
    LedgerError
        If the ledger fails verification.
    """
    if ledger.path.exists():
        check = verify_ledger(ledger.path)
        if not check.ok:
            raise LedgerError("the release ledger failed verification; run verify")
    return earlier_answer(ledger.entries(), key)
