"""Tests of the SQLite results store: idempotent writes, ordering, restarts and crashes."""

from __future__ import annotations

import json
import logging
import signal
import sqlite3
import subprocess
import sys
import textwrap
from datetime import date, datetime
from pathlib import Path

import pytest

from coordinator.results_store import SCHEMA_VERSION, ResultsStore, SqliteResultsStore
from site_agent.exceptions import InputError

JAN = (date(2031, 1, 1), date(2031, 2, 1))
FEB = (date(2031, 2, 1), date(2031, 3, 1))


def _release(value: int) -> str:
    return json.dumps({"scores_histogram": [value, value + 1, value + 2], "pending_labels": 3})


def _child(script: str, path: Path) -> subprocess.Popen[str]:
    return subprocess.Popen(
        [sys.executable, "-c", textwrap.dedent(script), str(path)],
        stdout=subprocess.PIPE,
        text=True,
    )


def _kill(child: subprocess.Popen[str]) -> None:
    child.send_signal(signal.SIGKILL)
    child.wait(timeout=30)
    assert child.stdout is not None
    child.stdout.close()


def test_put_window_ignores_a_window_already_stored(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    """A second write of the same window returns False, keeps the first release and warns."""
    with SqliteResultsStore(tmp_path / "results.sqlite") as store:
        first = store.put_window("study-7", "north", *JAN, _release(1), round_id=1)
        again = store.put_window("study-7", "north", *JAN, _release(1), round_id=2)
        with caplog.at_level(logging.WARNING, logger="coordinator.results_store"):
            changed = store.put_window("study-7", "north", *JAN, _release(99), round_id=3)
        records = store.windows("study-7")

    assert (first, again, changed) == (True, False, False)
    assert len(records) == 1
    assert records[0].release_json == _release(1)
    assert records[0].round_id == 1
    assert "different release" in caplog.text


def test_windows_are_listed_by_site_then_start_and_filtered_by_study(tmp_path: Path) -> None:
    """Windows come back ordered by site and start date, one study at a time."""
    with SqliteResultsStore(tmp_path / "results.sqlite") as store:
        store.put_window("study-7", "south", *FEB, _release(4), round_id=2)
        store.put_window("study-7", "north", *FEB, _release(2), round_id=2)
        store.put_window("study-7", "north", *JAN, _release(1), round_id=1)
        store.put_window("study-8", "east", *JAN, _release(9), round_id=1)

        everything = store.windows("study-7")
        north = store.windows("study-7", site="north")
        sites = store.sites("study-7")

    assert [(r.site, r.window_start) for r in everything] == [
        ("north", JAN[0]),
        ("north", FEB[0]),
        ("south", FEB[0]),
    ]
    assert [r.window_end for r in north] == [JAN[1], FEB[1]]
    assert sites == ["north", "south"]


def test_store_survives_a_restart_and_uses_wal_mode(tmp_path: Path) -> None:
    """Closing and reopening keeps every window; the file is in write-ahead-log mode."""
    path = tmp_path / "results.sqlite"
    store: ResultsStore = SqliteResultsStore(path)
    store.put_window("study-7", "north", *JAN, _release(1), round_id=1)
    store.close()

    with SqliteResultsStore(path) as reopened:
        records = reopened.windows("study-7")
    connection = sqlite3.connect(path)
    try:
        mode = connection.execute("PRAGMA journal_mode").fetchone()[0]
        versions = connection.execute("SELECT version FROM schema_version").fetchall()
    finally:
        connection.close()

    assert [r.release_json for r in records] == [_release(1)]
    assert isinstance(records[0].stored_at, datetime)
    assert mode == "wal"
    assert versions == [(SCHEMA_VERSION,)]


def test_reopen_after_sigkill_mid_loop_keeps_every_committed_window(tmp_path: Path) -> None:
    """A writer killed with SIGKILL loses no reported window and leaves no partial one."""
    path = tmp_path / "results.sqlite"
    child = _child(
        """
        import json, sys
        from datetime import date, timedelta
        from coordinator.results_store import SqliteResultsStore
        store = SqliteResultsStore(sys.argv[1])
        start = date(2031, 1, 1)
        for i in range(100_000):
            release = json.dumps({"index": i, "padding": "x" * 5000})
            store.put_window("study-7", "north", start + timedelta(days=i),
                             start + timedelta(days=i + 1), release, round_id=i)
            print(i, flush=True)
        """,
        path,
    )
    try:
        assert child.stdout is not None
        reported = -1
        while reported < 40:
            line = child.stdout.readline()
            assert line, "writer stopped before reporting 40 windows"
            reported = int(line)
    finally:
        _kill(child)

    with SqliteResultsStore(path) as store:
        records = store.windows("study-7", site="north")

    indices = [json.loads(r.release_json)["index"] for r in records]
    assert indices[: reported + 1] == list(range(reported + 1))
    assert len(indices) in (reported + 1, reported + 2)  # the in-flight write: all or nothing
    for record, index in zip(records, indices, strict=True):
        assert json.loads(record.release_json) == {"index": index, "padding": "x" * 5000}
        assert record.round_id == index


def test_reopen_after_kill_inside_an_open_transaction_holds_no_partial_window(
    tmp_path: Path,
) -> None:
    """A transaction left uncommitted by a killed process is rolled back on reopen."""
    path = tmp_path / "results.sqlite"
    with SqliteResultsStore(path) as store:
        store.put_window("study-7", "north", *JAN, _release(1), round_id=1)
    child = _child(
        """
        import sqlite3, sys, time
        connection = sqlite3.connect(sys.argv[1], isolation_level=None)
        connection.execute("BEGIN IMMEDIATE")
        connection.execute(
            "INSERT INTO windows VALUES ('study-7', 'north', '2031-02-01', '2031-03-01', 2, "
            "'{\\"partial\\": true}', '2031-03-02T00:00:00+00:00')"
        )
        print("inserted", flush=True)
        time.sleep(60)
        """,
        path,
    )
    try:
        assert child.stdout is not None
        assert child.stdout.readline().strip() == "inserted"
    finally:
        _kill(child)

    with SqliteResultsStore(path) as store:
        before = [r.window_start for r in store.windows("study-7")]
        stored = store.put_window("study-7", "north", *FEB, _release(2), round_id=2)
        after = [r.release_json for r in store.windows("study-7")]

    assert before == [JAN[0]]
    assert stored is True
    assert after == [_release(1), _release(2)]


def test_newer_schema_version_is_refused(tmp_path: Path) -> None:
    """A store written by a newer schema version raises InputError naming both versions."""
    path = tmp_path / "results.sqlite"
    SqliteResultsStore(path).close()
    connection = sqlite3.connect(path)
    with connection:
        connection.execute("UPDATE schema_version SET version = 99")
    connection.close()

    with pytest.raises(InputError, match="schema version 99"):
        SqliteResultsStore(path)


def test_a_file_that_is_not_a_database_is_refused(tmp_path: Path) -> None:
    """Opening a text file as a results store raises InputError."""
    path = tmp_path / "notes.sqlite"
    path.write_text("these are not the windows you are looking for\n" * 100)

    with pytest.raises(InputError, match="not a usable results store"):
        SqliteResultsStore(path)


@pytest.mark.parametrize(
    ("start", "end", "release", "message"),
    [
        (FEB[0], JAN[0], _release(1), "must come after"),
        (JAN[0], JAN[1], "{not json", "not valid JSON"),
        (datetime(2031, 1, 1), JAN[1], _release(1), "not datetimes"),
    ],
)
def test_invalid_window_is_refused_and_nothing_is_stored(
    tmp_path: Path, start: date, end: date, release: str, message: str
) -> None:
    """Reversed windows, invalid JSON and datetimes raise InputError and store nothing."""
    with SqliteResultsStore(tmp_path / "results.sqlite") as store:
        with pytest.raises(InputError, match=message):
            store.put_window("study-7", "north", start, end, release, round_id=1)
        assert store.windows("study-7") == []
