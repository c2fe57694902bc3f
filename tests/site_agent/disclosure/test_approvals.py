from pathlib import Path

import pytest

from site_agent.contract.protocol import EvaluationPlan, StudyProtocol
from site_agent.disclosure.approvals import (
    ApprovalStatus,
    approval_status,
    approve,
    is_approved,
    list_approvals,
)
from site_agent.exceptions import InputError

# Invented study for the demo scenario.
STUDY = StudyProtocol(
    study_id="PNEUMO-EXT-01",
    title="External validation of an invented chest X-ray pneumonia classifier",
)


def test_unapproved_protocol_is_not_approved(tmp_path: Path) -> None:
    """A protocol never approved at the site is reported as not approved."""
    store = tmp_path / "approvals.json"

    assert not is_approved(STUDY, store)
    assert approval_status(STUDY.content_hash(), STUDY.study_id, store) is (
        ApprovalStatus.NOT_APPROVED
    )


def test_approved_protocol_is_approved_and_listed(tmp_path: Path) -> None:
    """Approving records the protocol's hash, study id and title in the store."""
    store = tmp_path / "approvals.json"

    approval = approve(STUDY, store)

    assert is_approved(STUDY, store)
    assert list_approvals(store) == [approval]
    assert approval.protocol_hash == STUDY.content_hash()
    assert approval.title == STUDY.title


def test_protocol_edited_after_approval_is_reported_as_changed(tmp_path: Path) -> None:
    """Editing a protocol after approval changes its hash, so the edit is not approved."""
    store = tmp_path / "approvals.json"
    approve(STUDY, store)
    edited = STUDY.model_copy(update={"evaluation": EvaluationPlan(subgroups=("sex",))})

    assert not is_approved(edited, store)
    assert approval_status(edited.content_hash(), edited.study_id, store) is (
        ApprovalStatus.CHANGED
    )


def test_approving_twice_keeps_one_record(tmp_path: Path) -> None:
    """Approving the same protocol again does not add a second record."""
    store = tmp_path / "approvals.json"
    first = approve(STUDY, store)

    assert approve(STUDY, store) == first
    assert len(list_approvals(store)) == 1


def test_damaged_approvals_file_is_an_input_error(tmp_path: Path) -> None:
    """An approvals file that is not valid is refused, never read as empty."""
    store = tmp_path / "approvals.json"
    store.write_text('{"approvals": [{"study_id": 3}]}')

    with pytest.raises(InputError, match="is not valid"):
        list_approvals(store)


def test_cli_approve_records_the_protocol_and_lists_it(tmp_path: Path) -> None:
    """`site approve PROTOCOL --store FILE` records the hash; `site approvals` lists it."""
    from typer.testing import CliRunner

    from site_agent.cli import site_app

    protocol_file = tmp_path / "protocol.json"
    protocol_file.write_text(STUDY.canonical_json())
    store = tmp_path / "approvals.json"
    runner = CliRunner()

    approved = runner.invoke(site_app, ["approve", str(protocol_file), "--store", str(store)])
    listed = runner.invoke(site_app, ["approvals", "--store", str(store)])

    assert approved.exit_code == 0
    assert "not a medical device" in approved.output
    assert is_approved(STUDY, store)
    assert STUDY.content_hash() in listed.output
