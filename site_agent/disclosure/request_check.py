"""The check every request passes before a site reads any of its data.

Both gates, :func:`site_agent.disclosure.gate.disclosure_mod` for replies and
:func:`site_agent.disclosure.update_release.update_disclosure` for federated weight
updates, call :func:`check_request` first. A request is refused, with one of the fixed
:class:`~site_agent.disclosure.refusals.RefusalCode` reasons, when

- the policy lists the coordinators it answers and the run's ``coordinator-name``
  (:data:`COORDINATOR_NAME_KEY`) is not one of them;
- its protocol does not parse, has not been approved at the site, or differs from the
  approved one (the hash the site checks is the hash of what it is asked to run, not the
  hash the request claims);
- the operation is not allowed by the policy;
- it asks for a site-local weight update beside anything but ``fine_tune``, or while the
  policy does not let updates leave (``updates.allowed``, rule 8 of the gate);
- a subgroup or case-mix attribute of the protocol is not allowed by the policy (rule 1
  of :mod:`site_agent.disclosure.small_cells`, applied before any data is read).
"""

from __future__ import annotations

from site_agent.contract.protocol import Operation, StudyProtocol
from site_agent.contract.wire import SiteRequest
from site_agent.disclosure.approvals import ApprovalStatus, approval_status
from site_agent.disclosure.policy import SitePolicy
from site_agent.disclosure.refusals import RefusalCode, refusal

COORDINATOR_NAME_KEY = "coordinator-name"
"""Run-config key naming the coordinator; checked against ``allowed_coordinators``."""


def check_request(
    request: SiteRequest, policy: SitePolicy, *, coordinator: str | None = None
) -> StudyProtocol:
    """Refuse a request the policy does not allow, before any site data is touched.

    Raises
    ------
    DisclosureRefused
        For a coordinator not allowed, an unapproved or changed protocol, an operation
        or a subgroup attribute the policy does not allow, or a request for a weight
        update the policy does not let leave (``updates.allowed``).
    """
    operation = request.operation.value
    if policy.allowed_coordinators and coordinator not in policy.allowed_coordinators:
        raise refusal(RefusalCode.COORDINATOR_NOT_ALLOWED, operation)
    try:
        protocol = StudyProtocol.from_json(request.protocol_json)
    except Exception as exc:
        raise refusal(RefusalCode.PROTOCOL_INVALID, operation) from exc
    # The hash the site approved is the hash of what it is asked to run, not a claim.
    status = approval_status(protocol.content_hash(), protocol.study_id, policy.approvals_file)
    if protocol.content_hash() != request.protocol_hash:
        status = ApprovalStatus.CHANGED
    if status is ApprovalStatus.CHANGED:
        raise refusal(RefusalCode.PROTOCOL_CHANGED, operation)
    if status is ApprovalStatus.NOT_APPROVED:
        raise refusal(RefusalCode.PROTOCOL_NOT_APPROVED, operation)
    if request.operation not in policy.allowed_operations:
        raise refusal(RefusalCode.OPERATION_NOT_ALLOWED, operation)
    if request.return_update and request.operation is not Operation.FINE_TUNE:
        raise refusal(RefusalCode.PROTOCOL_INVALID, operation)
    if request.return_update and not policy.updates.allowed:
        raise refusal(RefusalCode.UPDATE_NOT_ALLOWED, operation)
    if any(a not in policy.allowed_subgroup_attributes for a in protocol.evaluation.subgroups):
        raise refusal(RefusalCode.SUBGROUP_ATTRIBUTE_NOT_ALLOWED, operation)
    mix = protocol.monitoring.mix_attributes if protocol.monitoring is not None else ()
    if any(a not in policy.allowed_subgroup_attributes for a in mix):
        raise refusal(RefusalCode.SUBGROUP_ATTRIBUTE_NOT_ALLOWED, operation)
    return protocol
