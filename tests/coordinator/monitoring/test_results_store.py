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

import numpy as np
import pandas as pd
import pytest

from coordinator.monitoring.results_store import (
    SCHEMA_VERSION,
    ResultsStore,
    SqliteResultsStore,
    WindowWrite,
)
from site_agent.contract.protocol import EvaluationPlan, uniform_edges
from site_agent.data.predictions import validate_predictions
from site_agent.evaluation import evaluate_site
from site_agent.exceptions import InputError

JAN = (date(2031, 1, 1), date(2031, 2, 1))
FEB = (date(2031, 2, 1), date(2031, 3, 1))
SCHEMA_1 = """
CREATE TABLE schema_version (version INTEGER NOT NULL);
CREATE TABLE windows (
    study_id     TEXT    NOT NULL,
    site         TEXT    NOT NULL,
    window_start TEXT    NOT NULL,
    window_end   TEXT    NOT NULL,
    round_id     INTEGER NOT NULL,
    release_json TEXT    NOT NULL,
    stored_at    TEXT    NOT NULL,
    UNIQUE (study_id, site, window_start, window_end)
);
INSERT INTO schema_version (version) VALUES (1);
"""
"""The table layout of schema version 1, as the previous release of the store wrote it."""


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


def test_put_window_keeps_one_release_per_window_replaced_only_by_more_labels(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    """Same JSON: unchanged; at least as many labels: replaced; fewer: kept, with a warning."""
    with SqliteResultsStore(tmp_path / "results.sqlite") as store:
        first = store.put_window("study-7", "north", *JAN, _release(1), round_id=1,
                                 labelled_cases=10, pending_cases=5)  # fmt: skip
        same = store.put_window("study-7", "north", *JAN, _release(1), round_id=2,
                                labelled_cases=10, pending_cases=5)  # fmt: skip
        more = store.put_window("study-7", "north", *JAN, _release(2), round_id=3,
                                labelled_cases=15, pending_cases=0)  # fmt: skip
        as_many = store.put_window("study-7", "north", *JAN, _release(3), round_id=4,
                                   labelled_cases=15, pending_cases=0)  # fmt: skip
        with caplog.at_level(logging.WARNING, logger="coordinator.monitoring.results_store"):
            fewer = store.put_window("study-7", "north", *JAN, _release(4), round_id=5,
                                     labelled_cases=12, pending_cases=3)  # fmt: skip
        records = store.windows("study-7")

    assert [first, same, more, as_many, fewer] == [
        WindowWrite.STORED,
        WindowWrite.UNCHANGED,
        WindowWrite.REVISED,
        WindowWrite.REVISED,
        WindowWrite.KEPT,
    ]
    (record,) = records
    assert record.release_json == _release(3)
    assert (record.round_id, record.labelled_cases, record.pending_cases) == (4, 15, 0)
    assert record.revisions == 2
    assert record.revised_at is not None and record.revised_at >= record.stored_at
    assert "fewer labelled cases" in caplog.text


def test_a_schema_1_store_opens_migrates_and_accepts_a_revision(tmp_path: Path) -> None:
    """A version-1 file gains the label counts of its stored release (pandas counts)."""
    path = tmp_path / "results.sqlite"
    rng = np.random.default_rng(5)
    table = pd.DataFrame(
        {
            "case_id": [f"c{i}" for i in range(60)],
            "patient_id": [f"p{i}" for i in range(60)],
            "label": [str(v) for v in rng.integers(0, 2, 60)],
            "score": np.round(rng.random(60), 6),
        }
    )
    table.loc[45:, "label"] = ""  # fifteen reference standards still pending
    release = evaluate_site(
        validate_predictions(table),
        EvaluationPlan(histogram_edges=uniform_edges(4)),
        site="north",
        protocol_hash="0" * 64,
    ).model_dump_json()
    connection = sqlite3.connect(path)
    with connection:
        connection.executescript(SCHEMA_1)
        connection.execute(
            "INSERT INTO windows VALUES ('study-7', 'north', '2031-01-01', '2031-02-01', 1, ?, "
            "'2031-02-02T00:00:00+00:00')",
            (release,),
        )
    connection.close()

    with SqliteResultsStore(path) as store:
        (migrated,) = store.windows("study-7")
        write = store.put_window("study-7", "north", *JAN, _release(1), round_id=2,
                                 labelled_cases=60, pending_cases=0)  # fmt: skip
        (revised,) = store.windows("study-7")
    connection = sqlite3.connect(path)
    try:
        versions = connection.execute("SELECT version FROM schema_version").fetchall()
    finally:
        connection.close()

    # Reference: pandas counts of known and blank labels in the table evaluated.
    assert migrated.labelled_cases == int((table["label"] != "").sum()) == 45
    assert migrated.pending_cases == int((table["label"] == "").sum()) == 15
    assert (migrated.revisions, migrated.revised_at, migrated.release_json) == (0, None, release)
    assert write is WindowWrite.REVISED
    assert (revised.revisions, revised.label_completeness) == (1, 1.0)
    assert versions == [(SCHEMA_VERSION,)]


def test_windows_are_listed_by_site_then_start_and_filtered_by_study(tmp_path: Path) -> None:
    """Windows come back ordered by site and start date, one study at a time."""
    with SqliteResultsStore(tmp_path / "results.sqlite") as store:
        store.put_window(
            "study-7", "south", *FEB, _release(4), round_id=2, labelled_cases=10, pending_cases=0
        )
        store.put_window(
            "study-7", "north", *FEB, _release(2), round_id=2, labelled_cases=10, pending_cases=0
        )
        store.put_window(
            "study-7", "north", *JAN, _release(1), round_id=1, labelled_cases=10, pending_cases=0
        )
        store.put_window(
            "study-8", "east", *JAN, _release(9), round_id=1, labelled_cases=10, pending_cases=0
        )

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
    store.put_window(
        "study-7", "north", *JAN, _release(1), round_id=1, labelled_cases=10, pending_cases=0
    )
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
        from coordinator.monitoring.results_store import SqliteResultsStore
        store = SqliteResultsStore(sys.argv[1])
        start = date(2031, 1, 1)
        for i in range(100_000):
            release = json.dumps({"index": i, "padding": "x" * 5000})
            store.put_window("study-7", "north", start + timedelta(days=i),
                             start + timedelta(days=i + 1), release, round_id=i,
                             labelled_cases=1, pending_cases=0)
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
        store.put_window(
            "study-7", "north", *JAN, _release(1), round_id=1, labelled_cases=10, pending_cases=0
        )
    child = _child(
        """
        import sqlite3, sys, time
        connection = sqlite3.connect(sys.argv[1], isolation_level=None)
        connection.execute("BEGIN IMMEDIATE")
        connection.execute(
            "INSERT INTO windows (study_id, site, window_start, window_end, round_id, "
            "release_json, stored_at) VALUES ('study-7', 'north', '2031-02-01', "
            "'2031-03-01', 2, '{\\"partial\\": true}', '2031-03-02T00:00:00+00:00')"
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
        stored = store.put_window(
            "study-7", "north", *FEB, _release(2), round_id=2, labelled_cases=10, pending_cases=0
        )
        after = [r.release_json for r in store.windows("study-7")]

    assert before == [JAN[0]]
    assert stored is WindowWrite.STORED
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
            store.put_window(
                "study-7",
                "north",
                start,
                end,
                release,
                round_id=1,
                labelled_cases=10,
                pending_cases=0,
            )
        assert store.windows("study-7") == []
