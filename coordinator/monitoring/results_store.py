"""Where the coordinator keeps each site's per-window releases between monitoring runs.

:class:`ResultsStore` is the interface; :class:`SqliteResultsStore` implements it on one
SQLite file with the standard library. A server database could implement the same
interface for a coordinator shared by several studies: every rule below is one
conditional write in one transaction.

One current release per window. A release is kept as the JSON text the site sent, keyed
by study, site and time window, with the number of its cases whose label is known
(``labelled_cases``) and still pending (``pending_cases``). Labels mature after a window
closes, so a window may be fetched again; ``put_window`` then applies one rule:

- the window is not stored yet: the release is stored (:attr:`WindowWrite.STORED`);
- the same JSON is stored already: nothing changes (:attr:`WindowWrite.UNCHANGED`);
- the new release has *at least as many* labelled cases as the stored one: it replaces
  it, the window's ``revisions`` count goes up by one and ``revised_at`` records when
  (:attr:`WindowWrite.REVISED`);
- it has fewer labelled cases (labels withdrawn, or a site's data restored from an older
  copy): the stored release is kept and a warning logged (:attr:`WindowWrite.KEPT`).

Re-running a monitoring round therefore never duplicates a window, and a window's history
only moves towards more known labels. ``stored_at`` stays the time of the first release.

Schema versions: 1 had no label counts and no revisions; opening a version-1 file adds
the columns in one transaction and fills the counts from each stored release's
``statistics`` (``n_positive + n_negative`` labelled, ``n_pending`` pending, as
:class:`site_agent.contract.release.SiteRelease` writes them; 0 where a release lacks them).

Durability: the database runs in write-ahead-log mode with ``synchronous=FULL`` and each
write is one transaction, so a window is either fully stored or absent after a crash.
"""

from __future__ import annotations

import json
import logging
import sqlite3
from datetime import UTC, date, datetime
from enum import StrEnum
from pathlib import Path
from types import TracebackType
from typing import Protocol, Self

from pydantic import BaseModel, ConfigDict, Field

from site_agent.exceptions import InputError

SCHEMA_VERSION = 2
"""Version of the table layout written by this module (see the module docstring)."""
BUSY_TIMEOUT_S = 10.0
"""How long a writer waits for another connection's lock before giving up."""

_logger = logging.getLogger(__name__)

_VERSION_TABLE = "CREATE TABLE IF NOT EXISTS schema_version (version INTEGER NOT NULL)"
_WINDOWS_TABLE = """
CREATE TABLE windows (
    study_id       TEXT    NOT NULL,
    site           TEXT    NOT NULL,
    window_start   TEXT    NOT NULL,
    window_end     TEXT    NOT NULL,
    round_id       INTEGER NOT NULL,
    release_json   TEXT    NOT NULL,
    stored_at      TEXT    NOT NULL,
    labelled_cases INTEGER NOT NULL DEFAULT 0,
    pending_cases  INTEGER NOT NULL DEFAULT 0,
    revisions      INTEGER NOT NULL DEFAULT 0,
    revised_at     TEXT,
    UNIQUE (study_id, site, window_start, window_end)
)
"""
_MIGRATE_1_TO_2 = (
    "ALTER TABLE windows ADD COLUMN labelled_cases INTEGER NOT NULL DEFAULT 0",
    "ALTER TABLE windows ADD COLUMN pending_cases INTEGER NOT NULL DEFAULT 0",
    "ALTER TABLE windows ADD COLUMN revisions INTEGER NOT NULL DEFAULT 0",
    "ALTER TABLE windows ADD COLUMN revised_at TEXT",
    "UPDATE windows SET "
    "labelled_cases = COALESCE(json_extract(release_json, '$.statistics.n_positive'), 0) "
    "+ COALESCE(json_extract(release_json, '$.statistics.n_negative'), 0), "
    "pending_cases = COALESCE(json_extract(release_json, '$.statistics.n_pending'), 0)",
)
_COLUMNS = (
    "study_id, site, window_start, window_end, round_id, release_json, stored_at, "
    "labelled_cases, pending_cases, revisions, revised_at"
)


class WindowWrite(StrEnum):
    """What :meth:`ResultsStore.put_window` did with a release (see the module docstring)."""

    STORED = "stored"
    REVISED = "revised"
    UNCHANGED = "unchanged"
    KEPT = "kept"


class WindowRecord(BaseModel):
    """One site's release for one time window ``[window_start, window_end)``."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    study_id: str = Field(min_length=1)
    site: str = Field(min_length=1)
    window_start: date
    window_end: date
    round_id: int = Field(ge=0, description="Round that fetched the current release.")
    release_json: str
    stored_at: datetime = Field(description="When the window's first release was stored.")
    labelled_cases: int = Field(ge=0)
    pending_cases: int = Field(ge=0)
    revisions: int = Field(default=0, ge=0, description="Times the release was replaced.")
    revised_at: datetime | None = Field(default=None, description="Last replacement.")

    @property
    def label_completeness(self) -> float | None:
        """Share of the released cases whose label is known; None without any case."""
        known = self.labelled_cases + self.pending_cases
        return self.labelled_cases / known if known else None


class ResultsStore(Protocol):
    """Storage of per-window site releases, keyed by (study, site, window)."""

    def put_window(
        self,
        study_id: str,
        site: str,
        window_start: date,
        window_end: date,
        release_json: str,
        *,
        round_id: int,
        labelled_cases: int,
        pending_cases: int,
    ) -> WindowWrite:
        """Store, replace or keep one window's release by the rule of the module docstring."""
        ...

    def windows(self, study_id: str, site: str | None = None) -> list[WindowRecord]:
        """Return the stored windows of a study, by site then window start."""
        ...

    def sites(self, study_id: str) -> list[str]:
        """Return the sites that have at least one stored window, sorted."""
        ...

    def close(self) -> None:
        """Release the store's resources; the store is unusable afterwards."""
        ...


def _count(name: str, value: int) -> None:
    if isinstance(value, bool) or not isinstance(value, int) or value < 0:
        raise InputError(f"{name} must be a non-negative integer, got {value!r}")


def _check_window(
    study_id: str, site: str, window_start: date, window_end: date, release_json: str, round_id: int
) -> None:
    if not study_id or not site:
        raise InputError("study_id and site must be non-empty")
    if isinstance(window_start, datetime) or isinstance(window_end, datetime):
        raise InputError("window bounds must be dates, not datetimes")
    if not isinstance(window_start, date) or not isinstance(window_end, date):
        raise InputError("window bounds must be dates")
    if window_end <= window_start:
        raise InputError(f"window_end {window_end} must come after window_start {window_start}")
    _count("round_id", round_id)
    try:
        json.loads(release_json)
    except (TypeError, ValueError) as error:
        raise InputError(f"release_json is not valid JSON: {error}") from None


class SqliteResultsStore:
    """A :class:`ResultsStore` in one SQLite file (WAL mode, one transaction per write).

    Parameters
    ----------
    path
        Database file; created with its tables if it does not exist.

    Raises
    ------
    InputError
        If the file is not a SQLite database or was written by a newer schema version.
    """

    def __init__(self, path: str | Path):
        self._path = Path(path)
        try:
            # isolation_level=None: no implicit transactions; each write opens its own.
            self._connection = sqlite3.connect(
                self._path, isolation_level=None, timeout=BUSY_TIMEOUT_S
            )
        except sqlite3.Error as error:
            raise InputError(f"cannot open results store {self._path.name}: {error}") from None
        try:
            self._prepare()
        except sqlite3.DatabaseError as error:
            self._connection.close()
            raise InputError(f"{self._path.name} is not a usable results store: {error}") from None
        except InputError:
            self._connection.close()
            raise

    def _prepare(self) -> None:
        connection = self._connection
        connection.execute("PRAGMA journal_mode = WAL")
        connection.execute("PRAGMA synchronous = FULL")
        connection.execute("BEGIN IMMEDIATE")
        try:
            connection.execute(_VERSION_TABLE)
            version = connection.execute("SELECT MAX(version) FROM schema_version").fetchone()[0]
            if version is None:
                connection.execute(_WINDOWS_TABLE)
                connection.execute(
                    "INSERT INTO schema_version (version) VALUES (?)", (SCHEMA_VERSION,)
                )
            elif version > SCHEMA_VERSION:
                raise InputError(
                    f"{self._path.name} has schema version {version}; "
                    f"this sitepool reads up to version {SCHEMA_VERSION}"
                )
            elif version == 1:
                for statement in _MIGRATE_1_TO_2:
                    connection.execute(statement)
                connection.execute("UPDATE schema_version SET version = 2")
                _logger.info("%s: results store migrated to schema version 2", self._path.name)
            connection.execute("COMMIT")
        except BaseException:
            connection.execute("ROLLBACK")
            raise

    def put_window(
        self,
        study_id: str,
        site: str,
        window_start: date,
        window_end: date,
        release_json: str,
        *,
        round_id: int,
        labelled_cases: int,
        pending_cases: int,
    ) -> WindowWrite:
        """Store, replace or keep one window's release (rule in the module docstring).

        Parameters
        ----------
        study_id, site
            Which study and which site released the window.
        window_start, window_end
            The window ``[window_start, window_end)`` as dates.
        release_json
            The site's release, as JSON text; stored unchanged.
        round_id
            The coordinator round that fetched the release.
        labelled_cases, pending_cases
            Cases of the release whose label is known, and still pending.
        """
        _check_window(study_id, site, window_start, window_end, release_json, round_id)
        _count("labelled_cases", labelled_cases)
        _count("pending_cases", pending_cases)
        now = datetime.now(UTC).isoformat()
        key = (study_id, site, window_start.isoformat(), window_end.isoformat())
        connection = self._connection
        connection.execute("BEGIN IMMEDIATE")
        try:
            existing = connection.execute(
                "SELECT release_json, labelled_cases FROM windows WHERE study_id = ? "
                "AND site = ? AND window_start = ? AND window_end = ?",
                key,
            ).fetchone()
            if existing is None:
                connection.execute(
                    f"INSERT INTO windows ({_COLUMNS}) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, 0, NULL)",
                    (*key, round_id, release_json, now, labelled_cases, pending_cases),
                )
                write = WindowWrite.STORED
            elif existing[0] == release_json:
                write = WindowWrite.UNCHANGED
            elif labelled_cases < existing[1]:
                write = WindowWrite.KEPT
            else:
                connection.execute(
                    "UPDATE windows SET round_id = ?, release_json = ?, labelled_cases = ?, "
                    "pending_cases = ?, revisions = revisions + 1, revised_at = ? "
                    "WHERE study_id = ? AND site = ? AND window_start = ? AND window_end = ?",
                    (round_id, release_json, labelled_cases, pending_cases, now, *key),
                )
                write = WindowWrite.REVISED
            connection.execute("COMMIT")
        except BaseException:
            connection.execute("ROLLBACK")
            raise
        if write is WindowWrite.KEPT:
            _logger.warning(
                "study %s, site %s, window %s to %s: the new release has fewer labelled "
                "cases than the stored one, which is kept",
                study_id,
                site,
                window_start,
                window_end,
            )
        return write

    def windows(self, study_id: str, site: str | None = None) -> list[WindowRecord]:
        """Return the stored windows of a study (one site, or all), by site then start."""
        query = f"SELECT {_COLUMNS} FROM windows WHERE study_id = ?"
        parameters: tuple[str, ...] = (study_id,)
        if site is not None:
            query += " AND site = ?"
            parameters += (site,)
        rows = self._connection.execute(
            query + " ORDER BY site, window_start, window_end", parameters
        ).fetchall()
        return [
            WindowRecord(
                study_id=row[0],
                site=row[1],
                window_start=date.fromisoformat(row[2]),
                window_end=date.fromisoformat(row[3]),
                round_id=row[4],
                release_json=row[5],
                stored_at=datetime.fromisoformat(row[6]),
                labelled_cases=row[7],
                pending_cases=row[8],
                revisions=row[9],
                revised_at=None if row[10] is None else datetime.fromisoformat(row[10]),
            )
            for row in rows
        ]

    def sites(self, study_id: str) -> list[str]:
        """Return the sites with at least one stored window in a study, sorted."""
        rows = self._connection.execute(
            "SELECT DISTINCT site FROM windows WHERE study_id = ? ORDER BY site", (study_id,)
        ).fetchall()
        return [row[0] for row in rows]

    def close(self) -> None:
        """Close the database connection."""
        self._connection.close()

    def __enter__(self) -> Self:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        traceback: TracebackType | None,
    ) -> None:
        self.close()
