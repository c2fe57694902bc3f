"""The closed list of refusal reasons: every code has its fixed text, every mapped error exists.

What leaves a site when it declines is chosen from this list, never an error's own text
(common practice: error messages may quote the data they failed on).
"""

from __future__ import annotations

import pytest

from site_agent import exceptions
from site_agent.disclosure.refusals import (
    REFUSAL_TEXT,
    RefusalCode,
    error_class_code,
    refusal,
    refusal_code,
    refusal_reason,
)
from site_agent.exceptions import DisclosureRefused, SitepoolError


@pytest.mark.parametrize("code", list(RefusalCode))
def test_every_code_has_one_fixed_line_that_starts_with_the_code(code: RefusalCode) -> None:
    """A declined reply's reason is ``<code>: <text>`` on one line, for every code."""
    reason = refusal_reason(code)

    assert reason == f"{code.value}: {REFUSAL_TEXT[code]}"
    assert "\n" not in reason


@pytest.mark.parametrize(
    ("error_class", "code"),
    [
        ("ProtocolError", RefusalCode.PROTOCOL_INVALID),
        ("BundleError", RefusalCode.MODEL_BUNDLE_INVALID),
        ("InputError", RefusalCode.SITE_DATA_INVALID),
        ("PredictionsError", RefusalCode.SITE_DATA_INVALID),
        ("EmptyWindowError", RefusalCode.WINDOW_WITHOUT_CASES),
    ],
)
def test_a_decline_by_one_of_our_errors_leaves_as_its_code(
    error_class: str, code: RefusalCode
) -> None:
    """Each mapped name is a class of our error hierarchy, and maps to its own code."""
    assert issubclass(getattr(exceptions, error_class), SitepoolError)
    assert error_class_code(error_class) is code


@pytest.mark.parametrize("error_class", [None, "", "RuntimeError", "KeyError"])
def test_any_other_decline_leaves_as_a_site_error(error_class: str | None) -> None:
    """A decline naming no error, or an error not ours, says only ``site_error``."""
    assert error_class_code(error_class) is RefusalCode.SITE_ERROR


def test_a_failure_maps_to_its_refusal_code_or_to_site_error() -> None:
    """A refusal keeps its code; an unknown reason or any other exception is a site error."""
    assert refusal_code(refusal(RefusalCode.CASE_LEVEL_OUTPUT)) is RefusalCode.CASE_LEVEL_OUTPUT
    assert refusal_code(DisclosureRefused("patient p7 has score 0.87")) is RefusalCode.SITE_ERROR
    assert refusal_code(ValueError("anything")) is RefusalCode.SITE_ERROR
