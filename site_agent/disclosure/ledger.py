"""The release ledger: an append-only, hash-chained record of everything a site answered.

Each line of the ledger file is one JSON entry (JSON Lines). An entry's ``entry_hash``
is the SHA-256 of the canonical JSON (sorted keys, no whitespace) of all its other
fields, and ``previous_hash`` is the hash of the entry before it (64 zeros for the
first), so editing, removing or reordering any entry breaks the chain at that entry.

Durability: an append takes an exclusive ``flock`` on the ledger, writes one line,
flushes and ``fsync``s it, then atomically replaces a small *head* file
(``<ledger>.head``) that records the last acknowledged sequence and hash. A crash
mid-write can leave at most one incomplete last line; earlier lines are never
rewritten. The head file lets :func:`verify_ledger` detect a ledger cut short.

Limits: someone who can rewrite both the ledger and its head file can drop trailing
entries unnoticed at the site. The coordinator keeps the entry hash each reply reports,
which anchors the chain outside the site.
"""

from __future__ import annotations

import contextlib
import fcntl
import hashlib
import json
import os
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import UTC, datetime
from enum import StrEnum
from pathlib import Path
from typing import IO, Any

from pydantic import BaseModel, ConfigDict, Field, JsonValue, ValidationError

from site_agent.exceptions import LedgerError

GENESIS_HASH = "0" * 64
HEAD_SUFFIX = ".head"


class Outcome(StrEnum):
    """Whether a request's answer left the site."""

    RELEASED = "released"
    DECLINED = "declined"


def canonical_json(data: Any) -> str:
    """Return ``data`` as JSON with sorted keys, no whitespace and ASCII only (what is hashed)."""
    return json.dumps(data, sort_keys=True, separators=(",", ":"), ensure_ascii=True)


def _digest(fields: dict[str, Any]) -> str:
    body = {k: v for k, v in fields.items() if k != "entry_hash"}
    return hashlib.sha256(canonical_json(body).encode()).hexdigest()


class LedgerEntry(BaseModel):
    """One answer of the site: what was asked, whether it left, and exactly what left."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    sequence: int = Field(ge=1)
    time: datetime
    study_id: str | None = None
    protocol_hash: str | None = None
    operation: str | None = None
    outcome: Outcome
    reason: str | None = Field(default=None, description="Reason code of a refusal.")
    released: JsonValue = Field(default=None, description="The exact JSON that left the site.")
    epsilon_spent: float = Field(default=0.0, ge=0)
    request_key: str | None = Field(
        default=None,
        pattern=r"^[0-9a-f]{64}$",
        description="What was asked (site_agent.disclosure.repeat_answer.request_key).",
    )
    previous_hash: str = Field(pattern=r"^[0-9a-f]{64}$")
    entry_hash: str = Field(pattern=r"^[0-9a-f]{64}$")


@dataclass(frozen=True, slots=True)
class LedgerVerification:
    """Result of :func:`verify_ledger`.

    Parameters
    ----------
    ok
        Whether every entry is intact and the chain is unbroken.
    entries
        Number of complete entries read.
    bad_sequence
        1-based position of the first entry at fault, or ``None`` when ``ok``.
    problem
        One line saying what is wrong, or ``None`` when ``ok``.
    """

    ok: bool
    entries: int
    bad_sequence: int | None = None
    problem: str | None = None


class _Head(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")

    sequence: int = Field(ge=0)
    entry_hash: str


def _parse_line(line: str, position: int) -> LedgerEntry:
    try:
        return LedgerEntry.model_validate_json(line)
    except ValidationError as exc:
        raise LedgerError(f"ledger entry {position} is not a valid entry") from exc


def _raw_lines(data: bytes) -> tuple[list[str], bool]:
    """Split ledger bytes into complete lines and say whether a partial last line follows."""
    text = data.decode("utf-8", errors="replace")
    parts = text.split("\n")
    tail = parts.pop()
    return [p for p in parts if p.strip()], bool(tail.strip())


class ReleaseLedger:
    """The ledger file of one site.

    Parameters
    ----------
    path
        The JSON Lines ledger file; created on first append.
    """

    def __init__(self, path: Path) -> None:
        self.path = Path(path)
        self.head_path = self.path.with_name(self.path.name + HEAD_SUFFIX)

    def entries(self) -> list[LedgerEntry]:
        """Return all complete entries in order (no chain check; see :func:`verify_ledger`)."""
        if not self.path.exists():
            return []
        lines, _ = _raw_lines(self.path.read_bytes())
        return [_parse_line(line, i) for i, line in enumerate(lines, start=1)]

    def _read_head(self) -> _Head | None:
        if not self.head_path.exists():
            return None
        try:
            return _Head.model_validate_json(self.head_path.read_text())
        except ValidationError as exc:
            raise LedgerError("ledger head file is damaged") from exc

    @contextlib.contextmanager
    def session(self) -> Iterator[LedgerSession]:
        """Hold the ledger's exclusive lock; read totals and append inside one session.

        Checks that depend on earlier entries (such as a privacy budget) must run in the
        same session as the append they guard, so two processes cannot both pass them.
        """
        self.path.parent.mkdir(parents=True, exist_ok=True)
        with open(self.path, "a+b") as handle:
            fcntl.flock(handle.fileno(), fcntl.LOCK_EX)
            try:
                yield LedgerSession(self, handle)
            finally:
                fcntl.flock(handle.fileno(), fcntl.LOCK_UN)

    def append(
        self,
        *,
        outcome: Outcome,
        study_id: str | None = None,
        protocol_hash: str | None = None,
        operation: str | None = None,
        reason: str | None = None,
        released: JsonValue = None,
        epsilon_spent: float = 0.0,
        request_key: str | None = None,
    ) -> LedgerEntry:
        """Append one entry in its own session and return it."""
        with self.session() as session:
            return session.append(
                outcome=outcome,
                study_id=study_id,
                protocol_hash=protocol_hash,
                operation=operation,
                reason=reason,
                released=released,
                epsilon_spent=epsilon_spent,
                request_key=request_key,
            )


class LedgerSession:
    """Reads and appends under the ledger's lock; made by :meth:`ReleaseLedger.session`."""

    def __init__(self, ledger: ReleaseLedger, handle: IO[bytes]) -> None:
        self._ledger = ledger
        self._handle = handle
        self._entries = self._load()

    def _load(self) -> list[LedgerEntry]:
        self._handle.seek(0)
        data = self._handle.read()
        lines, partial = _raw_lines(data)
        entries = [_parse_line(line, i) for i, line in enumerate(lines, start=1)]
        self._lines = lines
        head = self._ledger._read_head()
        acknowledged = head.sequence if head is not None else 0
        if partial:
            if len(entries) < acknowledged:
                raise LedgerError(
                    f"ledger entry {len(entries) + 1} is incomplete but was acknowledged; "
                    "run verify"
                )
            # A torn write that was never acknowledged: nothing was released for it.
            cut = data.rfind(b"\n") + 1
            self._handle.truncate(cut)
            self._handle.flush()
            os.fsync(self._handle.fileno())
        elif len(entries) < acknowledged:
            # Whole acknowledged entries are gone. Appending would rewrite the head and
            # hide the cut from verify_ledger, so refuse instead of repairing.
            raise LedgerError(
                f"ledger entry {len(entries) + 1} is missing but was acknowledged; run verify"
            )
        if entries and entries[-1].sequence != len(entries):
            raise LedgerError(f"ledger entry {len(entries)} is out of sequence; run verify")
        if (
            head is not None
            and acknowledged >= 1
            and (entries[acknowledged - 1].entry_hash != head.entry_hash)
        ):
            raise LedgerError(f"ledger entry {acknowledged} differs from the head file; run verify")
        return entries

    @property
    def entries(self) -> list[LedgerEntry]:
        """Entries present when the session opened plus those appended in it."""
        return list(self._entries)

    def verify_chain(self) -> None:
        """Check every entry's own hash and its link to the entry before it.

        The lines are re-hashed as read under the lock, so an entry edited on disk (say,
        its ``epsilon_spent`` lowered) or a line removed from the middle is found before
        any total is read from the ledger.

        Raises
        ------
        LedgerError
            Naming the first entry that was changed or does not follow the one before.
        """
        previous = GENESIS_HASH
        for position, line in enumerate(self._lines, start=1):
            fields = json.loads(line)
            entry = self._entries[position - 1]
            if _digest(fields) != entry.entry_hash:
                raise LedgerError(f"ledger entry {position} was changed; run verify")
            if entry.previous_hash != previous:
                raise LedgerError(
                    f"ledger entry {position} does not follow the entry before it; run verify"
                )
            previous = entry.entry_hash

    def epsilon_spent(self, study_id: str) -> float:
        """Return the total epsilon charged to ``study_id`` (sequential composition).

        Declines count too: a decline decided on noisy counts is charged its epsilon.
        The hash chain is verified first (:meth:`verify_chain`): a budget summed from a
        ledger that was edited would not be the budget that was spent.

        Raises
        ------
        LedgerError
            If the chain does not verify; the caller releases nothing.
        """
        self.verify_chain()
        return sum(e.epsilon_spent for e in self._entries if e.study_id == study_id)

    def append(
        self,
        *,
        outcome: Outcome,
        study_id: str | None = None,
        protocol_hash: str | None = None,
        operation: str | None = None,
        reason: str | None = None,
        released: JsonValue = None,
        epsilon_spent: float = 0.0,
        request_key: str | None = None,
    ) -> LedgerEntry:
        """Write one entry durably (write, flush, fsync, then update the head file).

        ``request_key`` is written only when given, so entries written before the field
        existed keep their hashes.
        """
        previous = self._entries[-1].entry_hash if self._entries else GENESIS_HASH
        fields: dict[str, Any] = {
            "sequence": len(self._entries) + 1,
            "time": datetime.now(UTC).isoformat().replace("+00:00", "Z"),
            "study_id": study_id,
            "protocol_hash": protocol_hash,
            "operation": operation,
            "outcome": Outcome(outcome).value,
            "reason": reason,
            "released": released,
            "epsilon_spent": float(epsilon_spent),
            "previous_hash": previous,
        }
        if request_key is not None:
            fields["request_key"] = request_key
        fields["entry_hash"] = _digest(fields)
        entry = LedgerEntry.model_validate(fields)
        text = canonical_json(fields)
        line = (text + "\n").encode()
        self._handle.seek(0, os.SEEK_END)
        self._handle.write(line)
        self._handle.flush()
        os.fsync(self._handle.fileno())
        _write_atomically(
            self._ledger.head_path,
            _Head(sequence=entry.sequence, entry_hash=entry.entry_hash).model_dump_json(),
        )
        self._entries.append(entry)
        self._lines.append(text)
        return entry


def _write_atomically(path: Path, text: str) -> None:
    """Write ``text`` to a temporary sibling, fsync it, and rename it over ``path``."""
    tmp = path.with_name(path.name + ".tmp")
    with open(tmp, "w") as handle:
        handle.write(text)
        handle.flush()
        os.fsync(handle.fileno())
    os.replace(tmp, path)
    dir_fd = os.open(path.parent, os.O_RDONLY)
    try:
        os.fsync(dir_fd)
    finally:
        os.close(dir_fd)


def verify_ledger(path: Path) -> LedgerVerification:
    """Check every entry's hash, the chain, the sequence and the head file.

    Returns a failed :class:`LedgerVerification` naming the first entry at fault when
    any entry was changed, removed, reordered, cut short or appended without the chain.
    """
    ledger = ReleaseLedger(path)
    if not ledger.path.exists():
        return LedgerVerification(ok=False, entries=0, problem="ledger file does not exist")
    lines, partial = _raw_lines(ledger.path.read_bytes())
    previous = GENESIS_HASH
    for position, line in enumerate(lines, start=1):
        try:
            fields = json.loads(line)
            entry = LedgerEntry.model_validate(fields)
        except (json.JSONDecodeError, ValidationError):
            return _failed(position - 1, position, "is not a valid entry")
        if entry.sequence != position:
            return _failed(
                position - 1, position, f"carries sequence {entry.sequence} (removed or reordered)"
            )
        if _digest(fields) != entry.entry_hash:
            return _failed(position - 1, position, "was changed (its hash does not match)")
        if entry.previous_hash != previous:
            return _failed(position - 1, position, "does not follow the entry before it")
        previous = entry.entry_hash
    count = len(lines)
    if partial:
        return _failed(count, count + 1, "is incomplete (interrupted or cut write)")
    try:
        head = ledger._read_head()
    except LedgerError:
        return _failed(count, count, "cannot be checked: the head file is damaged")
    if head is not None:
        if head.sequence > count:
            return _failed(
                count, count + 1, f"is missing: the head records {head.sequence} entries"
            )
        if head.sequence >= 1 and lines:
            recorded = LedgerEntry.model_validate_json(lines[head.sequence - 1]).entry_hash
            if recorded != head.entry_hash:
                return _failed(count, head.sequence, "differs from the hash in the head file")
    return LedgerVerification(ok=True, entries=count)


def _failed(count: int, position: int, what: str) -> LedgerVerification:
    return LedgerVerification(
        ok=False, entries=count, bad_sequence=position, problem=f"entry {position} {what}"
    )
