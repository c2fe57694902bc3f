"""Tests of site_agent.contract.release: what leaves a site, and what cannot be represented in it.

The example site "Northgate General" and its data are invented for demos and tests.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from site_agent.contract.protocol import EvaluationPlan
from site_agent.contract.release import UNREGISTERED_PROTOCOL, SiteRelease
from site_agent.data.predictions import load_predictions
from site_agent.evaluation import evaluate_site
from site_agent.exceptions import InputError

EXAMPLE = Path(__file__).parents[3] / "examples" / "northgate_predictions.csv"


@pytest.fixture(scope="module")
def release() -> SiteRelease:
    plan = EvaluationPlan(thresholds=(0.3, 0.5), subgroups=("scanner_vendor",))
    return evaluate_site(
        load_predictions(EXAMPLE), plan, site="northgate", protocol_hash=UNREGISTERED_PROTOCOL
    )


def test_release_round_trips_through_json(release: SiteRelease) -> None:
    """from_json(to_json(r)) gives back an equal release."""
    assert SiteRelease.from_json(release.to_json()) == release


def test_release_json_is_standard_json_without_nan(release: SiteRelease) -> None:
    """The JSON parses with the standard library's strict parser: no NaN or Infinity."""

    def refuse(token: str) -> None:
        raise AssertionError(f"non-standard JSON constant {token}")

    json.loads(release.to_json(), parse_constant=refuse)


def test_release_carries_no_case_or_patient_identifiers(release: SiteRelease) -> None:
    """No case id, patient id or acquisition date of the table appears in the release."""
    predictions = load_predictions(EXAMPLE)
    text = release.to_json()
    assert not any(case in text for case in predictions.case_id)
    assert not any(patient in text for patient in predictions.patient_id)
    assert predictions.acquired_on is not None
    assert not any(str(day) in text for day in predictions.acquired_on if str(day) != "NaT")


def test_histogram_longer_than_its_bins_is_rejected(release: SiteRelease) -> None:
    """A release whose histogram lists more counts than bins (per-case smuggling) is refused."""
    data = json.loads(release.to_json())
    data["statistics"]["histogram"]["all"].append(1)
    with pytest.raises(InputError, match="histogram"):
        SiteRelease.from_json(json.dumps(data))


def test_extra_field_is_rejected(release: SiteRelease) -> None:
    """A release with an extra field (e.g. a list of scores) is refused."""
    data = json.loads(release.to_json())
    data["exact"]["scores"] = [0.1, 0.2]
    with pytest.raises(InputError, match="Extra inputs"):
        SiteRelease.from_json(json.dumps(data))


def test_nan_in_a_released_float_is_rejected(release: SiteRelease) -> None:
    """NaN cannot be stored in a released float: undefined values are None with a reason."""
    text = release.to_json().replace('"score_sum": [', '"score_sum": [NaN, ', 1)
    with pytest.raises(InputError):
        SiteRelease.from_json(text)


def test_malformed_protocol_hash_is_rejected(release: SiteRelease) -> None:
    """A protocol hash must be 64 hex digits or the unregistered marker."""
    data = json.loads(release.to_json())
    data["protocol_hash"] = "abc"
    with pytest.raises(InputError, match="protocol_hash"):
        SiteRelease.from_json(json.dumps(data))
