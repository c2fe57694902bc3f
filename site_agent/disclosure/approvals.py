"""Protocol approval: the site's record of which exact study protocols it agreed to answer.

A site approves a protocol by its content hash (``StudyProtocol.content_hash``). A
request whose protocol hash is not in the approvals file is refused; if the study is
known but under another hash, the protocol was changed after approval and is refused
with its own reason. Approving again after a change is an explicit, recorded act.
"""

from __future__ import annotations

import json
import os
from datetime import UTC, datetime
from enum import StrEnum
from pathlib import Path

from pydantic import BaseModel, ConfigDict, Field, ValidationError

from site_agent.contract.protocol import StudyProtocol
from site_agent.exceptions import InputError


class Approval(BaseModel):
    """One approved protocol version."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    study_id: str
    title: str
    protocol_hash: str = Field(pattern=r"^[0-9a-f]{64}$")
    approved_at: datetime


class _ApprovalFile(BaseModel):
    model_config = ConfigDict(extra="forbid")

    approvals: list[Approval] = Field(default_factory=list)


class ApprovalStatus(StrEnum):
    """Where a protocol hash stands in a site's approvals file."""

    APPROVED = "approved"
    CHANGED = "changed_since_approval"
    NOT_APPROVED = "not_approved"


def list_approvals(store: Path) -> list[Approval]:
    """Return the approvals recorded in ``store`` (empty if the file does not exist).

    Raises
    ------
    InputError
        If the file exists but is not a valid approvals file.
    """
    store = Path(store)
    if not store.exists():
        return []
    try:
        return _ApprovalFile.model_validate_json(store.read_text()).approvals
    except ValidationError as exc:
        raise InputError(f"approvals file {store} is not valid") from exc
    except OSError as exc:
        raise InputError(f"cannot read approvals file {store}: {exc.strerror}") from exc


def approve(protocol: StudyProtocol, store: Path) -> Approval:
    """Record ``protocol``'s content hash, study id, title and time in ``store``.

    Approving a protocol already approved returns the earlier approval unchanged.
    """
    store = Path(store)
    approvals = list_approvals(store)
    digest = protocol.content_hash()
    for existing in approvals:
        if existing.protocol_hash == digest:
            return existing
    approval = Approval(
        study_id=protocol.study_id,
        title=protocol.title,
        protocol_hash=digest,
        approved_at=datetime.now(UTC),
    )
    approvals.append(approval)
    text = json.dumps(_ApprovalFile(approvals=approvals).model_dump(mode="json"), indent=2)
    store.parent.mkdir(parents=True, exist_ok=True)
    tmp = store.with_name(store.name + ".tmp")
    tmp.write_text(text + "\n")
    os.replace(tmp, store)
    return approval


def approval_status(protocol_hash: str, study_id: str | None, store: Path) -> ApprovalStatus:
    """Return whether ``protocol_hash`` is approved, changed since approval, or unknown."""
    approvals = list_approvals(store)
    if any(a.protocol_hash == protocol_hash for a in approvals):
        return ApprovalStatus.APPROVED
    if study_id is not None and any(a.study_id == study_id for a in approvals):
        return ApprovalStatus.CHANGED
    return ApprovalStatus.NOT_APPROVED


def is_approved(protocol: StudyProtocol, store: Path) -> bool:
    """Return whether this exact protocol (by content hash) is approved in ``store``."""
    status = approval_status(protocol.content_hash(), protocol.study_id, store)
    return status is ApprovalStatus.APPROVED
