import hashlib
import json
import subprocess
import sys
from pathlib import Path

import pytest

from site_agent.disclosure.ledger import GENESIS_HASH, Outcome, ReleaseLedger, verify_ledger
from site_agent.exceptions import LedgerError

HASH_A = "a" * 64


def _filled_ledger(tmp_path: Path, entries: int = 4) -> Path:
    path = tmp_path / "release-ledger.jsonl"
    ledger = ReleaseLedger(path)
    for i in range(entries):
        if i % 2:
            ledger.append(
                outcome=Outcome.DECLINED,
                study_id="PNEUMO-EXT-01",
                protocol_hash=HASH_A,
                operation="evaluate",
                reason="subgroup_below_min_cell",
            )
        else:
            ledger.append(
                outcome=Outcome.RELEASED,
                study_id="PNEUMO-EXT-01",
                protocol_hash=HASH_A,
                operation="evaluate",
                released={"confusion": [40 + i, 7, 9, 120]},
                epsilon_spent=0.25,
            )
    return path


def _lines(path: Path) -> list[str]:
    return path.read_text().splitlines()


def _write(path: Path, lines: list[str]) -> None:
    path.write_text("".join(line + "\n" for line in lines))


def test_untouched_ledger_verifies_ok(tmp_path: Path) -> None:
    """A ledger written only by appends verifies with every entry counted."""
    path = _filled_ledger(tmp_path)

    result = verify_ledger(path)

    assert result.ok
    assert result.entries == 4


def test_entry_hash_is_sha256_of_canonical_json_of_the_other_fields(tmp_path: Path) -> None:
    """Each stored hash equals hashlib's SHA-256 of the entry without its hash, chained."""
    path = _filled_ledger(tmp_path, entries=2)
    previous = GENESIS_HASH

    for line in _lines(path):
        fields = json.loads(line)
        stored = fields.pop("entry_hash")
        # SHA-256 (FIPS 180-4) from Python's hashlib over sorted-key, compact JSON.
        body = json.dumps(fields, sort_keys=True, separators=(",", ":")).encode()
        assert stored == hashlib.sha256(body).hexdigest()
        assert fields["previous_hash"] == previous
        previous = stored


def test_edited_entry_fails_verification_naming_it(tmp_path: Path) -> None:
    """Changing one released count makes verify fail at that entry."""
    path = _filled_ledger(tmp_path)
    lines = _lines(path)
    lines[2] = lines[2].replace('"confusion":[42,', '"confusion":[2,')
    _write(path, lines)

    result = verify_ledger(path)

    assert not result.ok
    assert result.bad_sequence == 3
    assert result.problem == "entry 3 was changed (its hash does not match)"


def test_edited_entry_with_recomputed_hash_breaks_the_chain_at_the_next(tmp_path: Path) -> None:
    """Recomputing an edited entry's own hash is caught by the next entry's link."""
    path = _filled_ledger(tmp_path)
    lines = _lines(path)
    fields = json.loads(lines[1])
    fields["outcome"] = "released"
    fields.pop("entry_hash")
    body = json.dumps(fields, sort_keys=True, separators=(",", ":"))
    fields["entry_hash"] = hashlib.sha256(body.encode()).hexdigest()
    lines[1] = json.dumps(fields, sort_keys=True, separators=(",", ":"))
    _write(path, lines)

    result = verify_ledger(path)

    assert not result.ok
    assert result.bad_sequence == 3
    assert "does not follow the entry before it" in str(result.problem)


def test_removed_entry_fails_verification_naming_the_gap(tmp_path: Path) -> None:
    """Deleting entry 2 makes verify fail at position 2."""
    path = _filled_ledger(tmp_path)
    lines = _lines(path)
    del lines[1]
    _write(path, lines)

    result = verify_ledger(path)

    assert not result.ok
    assert result.bad_sequence == 2
    assert "removed or reordered" in str(result.problem)


def test_reordered_entries_fail_verification(tmp_path: Path) -> None:
    """Swapping entries 2 and 3 makes verify fail at position 2."""
    path = _filled_ledger(tmp_path)
    lines = _lines(path)
    lines[1], lines[2] = lines[2], lines[1]
    _write(path, lines)

    result = verify_ledger(path)

    assert not result.ok
    assert result.bad_sequence == 2


def test_truncated_ledger_fails_verification_against_its_head(tmp_path: Path) -> None:
    """Dropping the last entry entirely is caught by the head file's sequence."""
    path = _filled_ledger(tmp_path)
    _write(path, _lines(path)[:-1])

    result = verify_ledger(path)

    assert not result.ok
    assert result.bad_sequence == 4
    assert result.problem == "entry 4 is missing: the head records 4 entries"


def test_ledger_cut_mid_line_fails_verification(tmp_path: Path) -> None:
    """A ledger cut inside its last line is reported as an incomplete entry."""
    path = _filled_ledger(tmp_path)
    data = path.read_bytes()
    path.write_bytes(data[:-40])

    result = verify_ledger(path)

    assert not result.ok
    assert result.bad_sequence == 4
    assert "incomplete" in str(result.problem)


def test_torn_unacknowledged_write_is_discarded_on_next_append(tmp_path: Path) -> None:
    """A half-written line never acknowledged in the head is dropped; earlier entries stay."""
    path = _filled_ledger(tmp_path, entries=2)
    with open(path, "ab") as handle:
        handle.write(b'{"sequence":3,"time":"2')  # a crash mid-write

    ReleaseLedger(path).append(outcome=Outcome.DECLINED, reason="operation_not_allowed")

    result = verify_ledger(path)
    assert result.ok
    assert result.entries == 3


def test_append_refuses_a_ledger_whose_acknowledged_entry_was_cut(tmp_path: Path) -> None:
    """A cut in an acknowledged entry is tampering: appending refuses rather than repairs."""
    path = _filled_ledger(tmp_path, entries=2)
    path.write_bytes(path.read_bytes()[:-10])

    with pytest.raises(LedgerError, match="entry 2 is incomplete but was acknowledged"):
        ReleaseLedger(path).append(outcome=Outcome.DECLINED, reason="operation_not_allowed")


def test_epsilon_spent_sums_the_entries_of_one_study(tmp_path: Path) -> None:
    """The study's spent epsilon is the sum over its own entries, not other studies'."""
    path = _filled_ledger(tmp_path)
    ReleaseLedger(path).append(
        outcome=Outcome.RELEASED, study_id="OTHER-STUDY", released={}, epsilon_spent=0.5
    )

    with ReleaseLedger(path).session() as session:
        assert session.epsilon_spent("PNEUMO-EXT-01") == pytest.approx(0.5)
        assert session.epsilon_spent("OTHER-STUDY") == pytest.approx(0.5)


def test_concurrent_appends_from_two_processes_keep_one_chain(tmp_path: Path) -> None:
    """Two processes appending at once produce one unbroken chain with every entry."""
    path = tmp_path / "release-ledger.jsonl"
    script = (
        "import sys\n"
        "from pathlib import Path\n"
        "from site_agent.disclosure.ledger import Outcome, ReleaseLedger\n"
        "ledger = ReleaseLedger(Path(sys.argv[1]))\n"
        "for _ in range(25):\n"
        "    ledger.append(outcome=Outcome.DECLINED, reason='operation_not_allowed')\n"
    )
    workers = [subprocess.Popen([sys.executable, "-c", script, str(path)]) for _ in range(2)]
    for worker in workers:
        assert worker.wait(timeout=120) == 0

    result = verify_ledger(path)

    assert result.ok
    assert result.entries == 50


def test_cli_verify_passes_an_untouched_ledger_and_fails_an_edited_one(tmp_path: Path) -> None:
    """`site ledger verify` exits 0 when intact and 1 naming the entry after an edit."""
    from typer.testing import CliRunner

    from site_agent.cli import site_app

    path = _filled_ledger(tmp_path)
    runner = CliRunner()

    intact = runner.invoke(site_app, ["ledger", "verify", "--ledger", str(path)])
    lines = _lines(path)
    lines[0] = lines[0].replace('"epsilon_spent":0.25', '"epsilon_spent":0.0')
    _write(path, lines)
    edited = runner.invoke(site_app, ["ledger", "verify", "--ledger", str(path)])

    assert intact.exit_code == 0 and "4 entries" in intact.output
    assert edited.exit_code == 1
    assert "entry 1 was changed" in edited.output


def test_cli_show_json_prints_each_entry_as_stored(tmp_path: Path) -> None:
    """`site ledger show --json` prints one parseable entry per line, hashes included."""
    from typer.testing import CliRunner

    from site_agent.cli import site_app

    path = _filled_ledger(tmp_path, entries=3)

    result = CliRunner().invoke(site_app, ["ledger", "show", "--ledger", str(path), "--json"])

    assert result.exit_code == 0
    shown = [json.loads(line) for line in result.output.splitlines()]
    stored = [json.loads(line) for line in _lines(path)]
    assert [e["entry_hash"] for e in shown] == [e["entry_hash"] for e in stored]


def test_append_refuses_a_ledger_whose_acknowledged_last_entry_was_dropped(
    tmp_path: Path,
) -> None:
    """Dropping whole acknowledged lines is refused, so the next append cannot hide the cut."""
    path = _filled_ledger(tmp_path, entries=4)
    _write(path, _lines(path)[:-1])  # the entry that charged epsilon is gone

    with pytest.raises(LedgerError, match="entry 4 is missing but was acknowledged"):
        ReleaseLedger(path).append(outcome=Outcome.DECLINED, reason="operation_not_allowed")

    result = verify_ledger(path)  # the head file still records the cut
    assert not result.ok and result.bad_sequence == 4


def test_append_refuses_a_ledger_whose_head_hash_does_not_match(tmp_path: Path) -> None:
    """A ledger rebuilt with a new chain under the old head is refused, not extended."""
    path = _filled_ledger(tmp_path, entries=2)
    head = path.with_name(path.name + ".head")
    rebuilt = tmp_path / "rebuilt.jsonl"
    other = ReleaseLedger(rebuilt)
    other.append(outcome=Outcome.DECLINED, reason="operation_not_allowed")
    other.append(outcome=Outcome.DECLINED, reason="operation_not_allowed")
    saved_head = head.read_text()
    path.write_bytes(rebuilt.read_bytes())  # a different, self-consistent chain
    head.write_text(saved_head)

    with pytest.raises(LedgerError, match="entry 2 differs from the head file"):
        ReleaseLedger(path).append(outcome=Outcome.DECLINED, reason="operation_not_allowed")


def test_budget_refuses_a_ledger_whose_spent_epsilon_was_lowered(tmp_path: Path) -> None:
    """An entry edited to charge ε = 0 makes the budget read raise instead of summing."""
    path = _filled_ledger(tmp_path)
    lines = _lines(path)
    lines[0] = lines[0].replace('"epsilon_spent":0.25', '"epsilon_spent":0.0')
    _write(path, lines)

    with ReleaseLedger(path).session() as session, pytest.raises(LedgerError, match="entry 1 "):
        session.epsilon_spent("PNEUMO-EXT-01")


def test_budget_refuses_a_rehashed_edit_in_the_middle_of_the_chain(tmp_path: Path) -> None:
    """Lowering ε and recomputing that entry's hash breaks the next entry's link."""
    path = _filled_ledger(tmp_path)
    lines = _lines(path)
    fields = json.loads(lines[2])
    fields["epsilon_spent"] = 0.0
    fields.pop("entry_hash")
    body = json.dumps(fields, sort_keys=True, separators=(",", ":"))
    fields["entry_hash"] = hashlib.sha256(body.encode()).hexdigest()
    lines[2] = json.dumps(fields, sort_keys=True, separators=(",", ":"))
    _write(path, lines)

    with (
        ReleaseLedger(path).session() as session,
        pytest.raises(LedgerError, match="entry 4 does not follow"),
    ):
        session.epsilon_spent("PNEUMO-EXT-01")


def test_budget_reads_entries_appended_in_the_same_session(tmp_path: Path) -> None:
    """Entries appended in a session join the verified chain: the sum includes them."""
    path = _filled_ledger(tmp_path)

    with ReleaseLedger(path).session() as session:
        session.append(outcome=Outcome.RELEASED, study_id="PNEUMO-EXT-01", epsilon_spent=0.25)
        assert session.epsilon_spent("PNEUMO-EXT-01") == pytest.approx(0.75)
