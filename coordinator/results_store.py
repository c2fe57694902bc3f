"""Where the coordinator keeps each site's per-window releases between monitoring runs.

:class:`ResultsStore` is the interface; :class:`SqliteResultsStore` implements it on one
SQLite file with the standard library. A server database could implement the same
interface for a coordinator shared by several studies.

A release is kept as the JSON text the site sent, keyed by study, site and time window.
Writing a window that is already stored is *ignored*, not replaced: the first release
of a window wins and ``put_window`` returns ``False``. Re-running a monitoring round is
therefore harmless, and a changed release for the same window (which should not happen
under a fixed protocol) is logged and left out rather than silently overwriting history.

Durability: the database runs in write-ahead-log mode with ``synchronous=FULL`` and each
write is one transaction, so a window is either fully stored or absent after a crash.
"""

from __future__ import annotations

import json
import logging
import sqlite3
from datetime import UTC, date, datetime
from pathlib import Path
from types import TracebackType
from typing import Protocol, Self

from pydantic import BaseModel, ConfigDict, Field

from site_agent.exceptions import InputError

SCHEMA_VERSION = 1
"""Version of the table layout written by this module."""
BUSY_TIMEOUT_S = 10.0
"""How long a writer waits for another connection's lock before giving up."""

_logger = logging.getLogger(__name__)

_SCHEMA = """
CREATE TABLE IF NOT EXISTS schema_version (
    version INTEGER NOT NULL
);
CREATE TABLE IF NOT EXISTS windows (
    study_id     TEXT    NOT NULL,
    site         TEXT    NOT NULL,
    window_start TEXT    NOT NULL,
    window_end   TEXT    NOT NULL,
    round_id     INTEGER NOT NULL,
    release_json TEXT    NOT NULL,
    stored_at    TEXT    NOT NULL,
    UNIQUE (study_id, site, window_start, window_end)
);
"""


class WindowRecord(BaseModel):
    """One site's release for one time window ``[window_start, window_end)``."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    study_id: str = Field(min_length=1)
    site: str = Field(min_length=1)
    window_start: date
    window_end: date
    round_id: int = Field(ge=0)
    release_json: str
    stored_at: datetime


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
    ) -> bool:
        """Store one release; return ``False`` if that window was already stored."""
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
    if isinstance(round_id, bool) or not isinstance(round_id, int) or round_id < 0:
        raise InputError(f"round_id must be a non-negative integer, got {round_id!r}")
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
            for statement in _SCHEMA.split(";"):
                if statement.strip():
                    connection.execute(statement)
            row = connection.execute("SELECT MAX(version) FROM schema_version").fetchone()
            if row[0] is None:
                connection.execute(
                    "INSERT INTO schema_version (version) VALUES (?)", (SCHEMA_VERSION,)
                )
            elif row[0] > SCHEMA_VERSION:
                raise InputError(
                    f"{self._path.name} has schema version {row[0]}; "
                    f"this sitepool reads up to version {SCHEMA_VERSION}"
                )
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
    ) -> bool:
        """Store one release; return ``False`` (and store nothing) if the window exists.

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
        """
        _check_window(study_id, site, window_start, window_end, release_json, round_id)
        stored_at = datetime.now(UTC).isoformat()
        connection = self._connection
        connection.execute("BEGIN IMMEDIATE")
        try:
            cursor = connection.execute(
                "INSERT OR IGNORE INTO windows (study_id, site, window_start, window_end, "
                "round_id, release_json, stored_at) VALUES (?, ?, ?, ?, ?, ?, ?)",
                (
                    study_id,
                    site,
                    window_start.isoformat(),
                    window_end.isoformat(),
                    round_id,
                    release_json,
                    stored_at,
                ),
            )
            inserted = cursor.rowcount == 1
            existing = None
            if not inserted:
                existing = connection.execute(
                    "SELECT release_json FROM windows WHERE study_id = ? AND site = ? "
                    "AND window_start = ? AND window_end = ?",
                    (study_id, site, window_start.isoformat(), window_end.isoformat()),
                ).fetchone()
            connection.execute("COMMIT")
        except BaseException:
            connection.execute("ROLLBACK")
            raise
        if not inserted and existing is not None and existing[0] != release_json:
            _logger.warning(
                "study %s, site %s, window %s to %s is already stored with a different "
                "release; the stored one is kept",
                study_id,
                site,
                window_start,
                window_end,
            )
        return inserted

    def windows(self, study_id: str, site: str | None = None) -> list[WindowRecord]:
        """Return the stored windows of a study (one site, or all), by site then start."""
        query = (
            "SELECT study_id, site, window_start, window_end, round_id, release_json, stored_at "
            "FROM windows WHERE study_id = ?"
        )
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
