"""Refusals: the fixed reasons a site gives when it releases nothing.

A declined reply, a declined weight update and a ledger entry of a refusal carry one
:class:`RefusalCode` and its fixed text (:func:`refusal_reason`), never the text of an
error: an exception raised while a site's data was read may quote a value from it, so
what leaves is chosen from this closed list. A handler that declined by one of our own
errors is mapped to a code by the error's class name (:func:`error_class_code`); anything
else is ``site_error``.
"""

from __future__ import annotations

from collections.abc import Mapping
from enum import StrEnum

from site_agent.exceptions import DisclosureRefused, LedgerError


class RefusalCode(StrEnum):
    """Why a site released nothing; the only reasons a declined reply carries."""

    POLICY_UNAVAILABLE = "policy_unavailable"
    REQUEST_UNREADABLE = "request_unreadable"
    COORDINATOR_NOT_ALLOWED = "coordinator_not_allowed"
    PROTOCOL_NOT_APPROVED = "protocol_not_approved"
    PROTOCOL_CHANGED = "protocol_changed_since_approval"
    OPERATION_NOT_ALLOWED = "operation_not_allowed"
    SUBGROUP_ATTRIBUTE_NOT_ALLOWED = "subgroup_attribute_not_allowed"
    CASE_LEVEL_OUTPUT = "case_level_output"
    TOTAL_BELOW_MIN_CELL = "total_below_min_cell"
    SUBGROUP_BELOW_MIN_CELL = "subgroup_below_min_cell"
    SUBGROUP_DIFFERENCE_BELOW_MIN_CELL = "subgroup_difference_below_min_cell"
    PRIVACY_BUDGET_EXHAUSTED = "privacy_budget_exhausted"
    PROTOCOL_INVALID = "protocol_invalid"
    MODEL_BUNDLE_INVALID = "model_bundle_invalid"
    SITE_DATA_INVALID = "site_data_invalid"
    SITE_ERROR = "site_error"
    WINDOW_WITHOUT_CASES = "window_without_cases"
    NOT_COVERED_BY_PRIVACY = "not_covered_by_privacy"
    UPDATE_NOT_ALLOWED = "update_release_not_allowed"
    LEDGER_UNVERIFIED = "ledger_unverified"
    SUBGROUP_DESIGN_TOO_BROAD = "subgroup_design_too_broad"
    RELEASE_DIFFERENCE_BELOW_MIN_CELL = "release_difference_below_min_cell"
    WINDOW_OVERLAPS_EARLIER_RELEASE = "window_overlaps_earlier_release"


REFUSAL_TEXT: Mapping[RefusalCode, str] = {
    RefusalCode.SUBGROUP_DESIGN_TOO_BROAD: (
        "the release has more subgroup attributes than the site's combination check covers"
    ),
    RefusalCode.RELEASE_DIFFERENCE_BELOW_MIN_CELL: (
        "compared with an earlier release, this one would isolate fewer cases than the "
        "minimum cell size"
    ),
    RefusalCode.WINDOW_OVERLAPS_EARLIER_RELEASE: (
        "the time window overlaps a window the site already released without matching it"
    ),
    RefusalCode.UPDATE_NOT_ALLOWED: "the site's policy does not let weight updates leave",
    RefusalCode.NOT_COVERED_BY_PRIVACY: (
        "the site's differential privacy does not cover this output, so it is not released"
    ),
    RefusalCode.POLICY_UNAVAILABLE: "the site's policy or ledger is not configured or readable",
    RefusalCode.REQUEST_UNREADABLE: "the request is not a well-formed sitepool request",
    RefusalCode.COORDINATOR_NOT_ALLOWED: "the site's policy does not allow this coordinator",
    RefusalCode.PROTOCOL_NOT_APPROVED: "the site has not approved this study protocol",
    RefusalCode.PROTOCOL_CHANGED: "the protocol differs from the version the site approved",
    RefusalCode.OPERATION_NOT_ALLOWED: "the site's policy does not allow this operation",
    RefusalCode.SUBGROUP_ATTRIBUTE_NOT_ALLOWED: "a subgroup attribute is not allowed by policy",
    RefusalCode.CASE_LEVEL_OUTPUT: "the requested output would resolve individual cases",
    RefusalCode.TOTAL_BELOW_MIN_CELL: "a site total is below the site's minimum cell size",
    RefusalCode.SUBGROUP_BELOW_MIN_CELL: "a subgroup is below the site's minimum cell size",
    RefusalCode.SUBGROUP_DIFFERENCE_BELOW_MIN_CELL: (
        "differences between subgroups would isolate fewer cases than the minimum cell size"
    ),
    RefusalCode.PRIVACY_BUDGET_EXHAUSTED: "the study's privacy budget at this site is spent",
    RefusalCode.PROTOCOL_INVALID: "the protocol or request failed the site's checks",
    RefusalCode.MODEL_BUNDLE_INVALID: "the model bundle failed the site's checks",
    RefusalCode.SITE_DATA_INVALID: "the site's data failed validation; see the site's log",
    RefusalCode.SITE_ERROR: "the site agent failed; details are in the site's own log",
    RefusalCode.WINDOW_WITHOUT_CASES: "no case at this site was acquired in the time window",
    RefusalCode.LEDGER_UNVERIFIED: (
        "the site's release ledger failed verification, so its privacy budget cannot be read"
    ),
}

_ERROR_CODES: Mapping[str, RefusalCode] = {
    "ProtocolError": RefusalCode.PROTOCOL_INVALID,
    "BundleError": RefusalCode.MODEL_BUNDLE_INVALID,
    "InputError": RefusalCode.SITE_DATA_INVALID,
    "PredictionsError": RefusalCode.SITE_DATA_INVALID,
    "EmptyWindowError": RefusalCode.WINDOW_WITHOUT_CASES,
}
"""Class names of our own errors a handler declines with, and the code each leaves as."""


def refusal_reason(code: RefusalCode) -> str:
    """Return the one line a declined reply carries for ``code``."""
    return f"{code.value}: {REFUSAL_TEXT[code]}"


def refusal(code: RefusalCode, operation: str | None = None) -> DisclosureRefused:
    """Return the error that refuses a request or release with ``code`` (for ``raise``)."""
    return DisclosureRefused(code.value, operation=operation)


def refusal_code(exc: BaseException) -> RefusalCode:
    """Return the code a failure leaves as: a refusal's own, else ``site_error``.

    A ledger that fails verification while a budget is read leaves as
    ``ledger_unverified``: the site knows why it released nothing, and says so.
    """
    if isinstance(exc, LedgerError):
        return RefusalCode.LEDGER_UNVERIFIED
    if isinstance(exc, DisclosureRefused):
        try:
            return RefusalCode(exc.reason)
        except ValueError:
            return RefusalCode.SITE_ERROR
    return RefusalCode.SITE_ERROR


def error_class_code(error_class: str | None) -> RefusalCode:
    """Return the code of a handler's decline, by the class name of the error it named."""
    return _ERROR_CODES.get(error_class or "", RefusalCode.SITE_ERROR)
