"""Study state that survives a coordinator restart: releases kept by protocol, round and site.

:class:`SqliteStudyState` keeps, in one SQLite file beside the coordinator's other state,

- every release a site sent, keyed by (protocol hash, round, site), stored the moment it
  arrives (the first release kept wins; a site is never asked for a stored one again);
- every round that finished, as its whole :class:`~coordinator.runs.rounds.RoundOutcome`.

:func:`run_resumable_study_rounds` runs a study's evaluation rounds on top of it. A round
already finished is read back, not run. In a round not finished, only connected sites
without a stored release are asked; the round's outcome is what is stored plus what comes
back. A coordinator killed at any moment and started again therefore asks each site at
most once per (protocol, round) for a release, and the pooled results equal those of an
uninterrupted run, since they are computed from the same releases.

Site identity: where the deployment authenticates nodes (Flower SuperNode
authentication), the name the coordinator admitted a node's key under is the site; a
reply that names another site is a fault and nothing of it is stored. Sites the study
expects (``expected_sites``) that are not connected when a round starts are faults named
for the site, so the report says which site is missing and why.

Mixed studies: sites that cannot connect answer into signed release files
(:mod:`coordinator.pooling.release_files`). ``file_releases`` gives, for a round, the
checked files of that round; their releases are added to the round *before* the quorum
check, so a connected site and a file-based site count alike, and a refused file is named
as a fault. They are read afresh at each (re)start, never stored as network releases.

Durability is that of :mod:`coordinator.monitoring.results_store`: write-ahead log,
``synchronous=FULL``, one transaction per write.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Callable, Sequence
from datetime import UTC, datetime
from pathlib import Path
from types import TracebackType
from typing import Self

from flwr.app import Message
from flwr.serverapp import Grid
from pydantic import ValidationError

from coordinator.pooling.release_files import FileReleases, with_file_releases
from coordinator.runs.rounds import (
    NodeFault,
    RoundOutcome,
    SiteDisclosure,
    StudyOutcome,
    ask_sites,
)
from site_agent.contract.protocol import Operation, StudyProtocol
from site_agent.contract.release import SiteRelease
from site_agent.contract.wire import ReplyStatus, decode_reply
from site_agent.disclosure.gate import read_disclosure
from site_agent.exceptions import DeploymentError, ProtocolError

BUSY_TIMEOUT_S = 10.0
_SCHEMA = (
    """CREATE TABLE IF NOT EXISTS releases (
        protocol_hash   TEXT    NOT NULL,
        round_number    INTEGER NOT NULL,
        site            TEXT    NOT NULL,
        node_id         TEXT    NOT NULL,
        release_json    TEXT    NOT NULL,
        disclosure_json TEXT    NOT NULL,
        stored_at       TEXT    NOT NULL,
        PRIMARY KEY (protocol_hash, round_number, site)
    )""",
    """CREATE TABLE IF NOT EXISTS rounds (
        protocol_hash TEXT    NOT NULL,
        round_number  INTEGER NOT NULL,
        outcome_json  TEXT    NOT NULL,
        closed_at     TEXT    NOT NULL,
        PRIMARY KEY (protocol_hash, round_number)
    )""",
)


class StoredRelease:
    """One release read back from the state: the site's node, release and disclosure."""

    __slots__ = ("disclosure", "node_id", "release")

    def __init__(self, node_id: int, release: SiteRelease, disclosure: SiteDisclosure) -> None:
        self.node_id = node_id
        self.release = release
        self.disclosure = disclosure


class SqliteStudyState:
    """Releases and finished rounds of studies, in one SQLite file (see the module docstring)."""

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self._db = sqlite3.connect(self.path, timeout=BUSY_TIMEOUT_S, isolation_level=None)
        self._db.execute("PRAGMA journal_mode=WAL")
        self._db.execute("PRAGMA synchronous=FULL")
        for statement in _SCHEMA:
            self._db.execute(statement)

    def put_release(
        self,
        protocol_hash: str,
        round_number: int,
        release: SiteRelease,
        node_id: int,
        disclosure: SiteDisclosure,
    ) -> bool:
        """Store a site's release unless one is stored already; return whether it was stored."""
        cursor = self._db.execute(
            "INSERT OR IGNORE INTO releases VALUES (?, ?, ?, ?, ?, ?, ?)",
            (
                protocol_hash,
                round_number,
                release.site,
                str(node_id),  # Flower node ids are unsigned 64-bit: beyond SQLite's INTEGER
                release.model_dump_json(),
                disclosure.model_dump_json(),
                datetime.now(UTC).isoformat(),
            ),
        )
        return cursor.rowcount == 1

    def releases(self, protocol_hash: str, round_number: int) -> dict[str, StoredRelease]:
        """Return the stored releases of one round, by site."""
        rows = self._db.execute(
            "SELECT site, node_id, release_json, disclosure_json FROM releases "
            "WHERE protocol_hash = ? AND round_number = ? ORDER BY site",
            (protocol_hash, round_number),
        ).fetchall()
        return {
            site: StoredRelease(
                int(node_id),
                SiteRelease.model_validate_json(release),
                SiteDisclosure.model_validate_json(disclosure),
            )
            for site, node_id, release, disclosure in rows
        }

    def close_round(self, outcome: RoundOutcome) -> None:
        """Record a finished round; a round is closed once and never rewritten."""
        self._db.execute(
            "INSERT OR IGNORE INTO rounds VALUES (?, ?, ?, ?)",
            (
                outcome.protocol_hash,
                outcome.round_number,
                outcome.model_dump_json(),
                datetime.now(UTC).isoformat(),
            ),
        )

    def closed_round(self, protocol_hash: str, round_number: int) -> RoundOutcome | None:
        """Return a finished round's outcome, or None if it has not finished."""
        row = self._db.execute(
            "SELECT outcome_json FROM rounds WHERE protocol_hash = ? AND round_number = ?",
            (protocol_hash, round_number),
        ).fetchone()
        return None if row is None else RoundOutcome.model_validate_json(row[0])

    def close(self) -> None:
        """Close the database connection."""
        self._db.close()

    def __enter__(self) -> Self:
        return self

    def __exit__(
        self,
        kind: type[BaseException] | None,
        value: BaseException | None,
        traceback: TracebackType | None,
    ) -> None:
        self.close()


def run_resumable_study_rounds(
    grid: Grid,
    protocol: StudyProtocol,
    bundle: bytes | None,
    state: SqliteStudyState,
    *,
    expected_sites: Sequence[str] = (),
    file_releases: Callable[[int], FileReleases] | None = None,
) -> StudyOutcome:
    """Run ``protocol.rounds`` evaluation rounds, resuming from ``state``.

    ``file_releases``, if given, returns the checked signed release files of a round
    number; they count towards the round's quorum (see the module docstring).

    Raises
    ------
    DeploymentError
        If a round ends with fewer releases than ``protocol.quorum``; the message names
        every missing site and why.
    """
    rounds = []
    for number in range(1, protocol.rounds + 1):
        outcome = state.closed_round(protocol.content_hash(), number)
        if outcome is None:
            files = None if file_releases is None else file_releases(number)
            outcome = _resumed_round(grid, protocol, bundle, state, number, expected_sites, files)
            state.close_round(outcome)
        rounds.append(outcome)
    return StudyOutcome(
        study_id=protocol.study_id, protocol_hash=protocol.content_hash(), rounds=rounds
    )


def _resumed_round(
    grid: Grid,
    protocol: StudyProtocol,
    bundle: bytes | None,
    state: SqliteStudyState,
    number: int,
    expected_sites: Sequence[str],
    files: FileReleases | None = None,
) -> RoundOutcome:
    protocol_hash = protocol.content_hash()
    names = {int(node.node_id): str(node.name) for node in grid.get_nodes()}
    stored = state.releases(protocol_hash, number)
    to_ask = sorted(node for node, name in names.items() if not name or name not in stored)

    def keep(reply: Message) -> None:
        release = _usable_release(reply, protocol_hash, names.get(reply.metadata.src_node_id))
        if release is not None:
            state.put_release(
                protocol_hash, number, release, reply.metadata.src_node_id, _disclosure(reply)
            )

    fresh = ask_sites(grid, protocol, bundle, number, Operation.EVALUATE, to_ask, on_reply=keep)
    kept = state.releases(protocol_hash, number)
    faults = [_named(fault, names) for fault in fresh.faults]
    for site, node in fresh.node_of_site.items():
        registered = names.get(node)
        if registered and registered != site:  # a node speaking for another site
            faults.append(
                NodeFault(node_id=node, site=registered, reason=f"reply named site {site!r}")
            )
    answered = set(kept) | {d.site for d in fresh.declines} | {f.site for f in faults}
    connected = set(names.values())
    by_file = set() if files is None else {envelope.site for envelope in files.accepted}
    faults += [
        NodeFault(node_id=0, site=site, reason="not connected when the round started")
        for site in sorted(set(expected_sites) - connected - answered - by_file)
    ]
    outcome = RoundOutcome(
        round_number=number,
        protocol_hash=protocol_hash,
        nodes_asked=len(to_ask) + len(stored),
        releases={site: item.release for site, item in sorted(kept.items())},
        node_of_site={site: item.node_id for site, item in sorted(kept.items())},
        declines=[d for d in fresh.declines if d.site not in kept],
        faults=sorted(faults, key=lambda f: (f.site or "", f.node_id)),
        disclosures={site: item.disclosure for site, item in sorted(kept.items())},
    )
    if files is not None:  # file-based sites count towards the quorum like connected ones
        outcome = with_file_releases(outcome, files)
    if len(outcome.releases) < protocol.quorum:
        missing = [f"{d.site} declined ({d.reason})" for d in outcome.declines]
        missing += [f"{f.site or f'node {f.node_id}'}: {f.reason}" for f in outcome.faults]
        raise DeploymentError(
            f"round {number}: {len(outcome.releases)} sites released statistics, the "
            f"protocol's quorum is {protocol.quorum}; missing: {'; '.join(missing) or 'none'}"
        )
    return outcome


def _usable_release(
    reply: Message, protocol_hash: str, registered: str | None
) -> SiteRelease | None:
    """Return the release a reply carries if it may be stored, else None."""
    if reply.has_error():
        return None
    try:
        answer = decode_reply(reply.content)
    except (ProtocolError, ValidationError):
        return None
    release = answer.release
    if answer.status is not ReplyStatus.RELEASED or release is None:
        return None
    if release.site != answer.site or release.protocol_hash != protocol_hash:
        return None
    if registered and registered != release.site:
        return None
    return release


def _disclosure(reply: Message) -> SiteDisclosure:
    try:
        note, sequence, digest = read_disclosure(reply)
    except ValidationError:
        return SiteDisclosure()
    return SiteDisclosure(note=note, ledger_sequence=sequence, ledger_entry_hash=digest)


def _named(fault: NodeFault, names: dict[int, str]) -> NodeFault:
    name = names.get(fault.node_id)
    return fault.model_copy(update={"site": name}) if name else fault
