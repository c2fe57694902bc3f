"""Disclosure rule 7: attribute counts of a monitoring window pool small levels.

Invented hospital data, for tests only. The pooling rule is primary and secondary cell
suppression as statistical offices apply it to tables (common practice).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from site_agent.contract.protocol import EvaluationPlan, uniform_edges
from site_agent.contract.release import POOLED_LEVELS, SiteRelease
from site_agent.data.predictions import validate_predictions
from site_agent.disclosure.gate import apply_policy
from site_agent.disclosure.policy import SitePolicy
from site_agent.evaluation import evaluate_site
from site_agent.exceptions import DisclosureRefused

PLAN = EvaluationPlan(thresholds=(0.5,), histogram_edges=uniform_edges(4))
POLICY = SitePolicy(allowed_subgroup_attributes=("scanner_vendor",))


def _release(vendors: dict[str, int]) -> SiteRelease:
    vendor = [name for name, n in vendors.items() for _ in range(n)]
    rng = np.random.default_rng(3)
    n = len(vendor)
    frame = pd.DataFrame(
        {
            "case_id": [f"c{i}" for i in range(n)],
            "patient_id": [f"p{i}" for i in range(n)],
            "label": (np.arange(n) % 2).astype(str),
            "score": rng.random(n).round(6),
            "scanner_vendor": vendor,
        }
    )
    return evaluate_site(
        validate_predictions(frame),
        PLAN,
        site="saltmarsh-infirmary",
        protocol_hash="unregistered",
        mix_attributes=("scanner_vendor",),
    )


def test_small_levels_are_pooled_and_large_ones_kept() -> None:
    """Two small vendors (3 and 2 cases) leave only as one pooled level of 5."""
    release, note = apply_policy(_release({"vendor-a": 60, "vendor-b": 3, "vendor-c": 2}), POLICY)

    assert release.attribute_counts[0].as_dict() == {"vendor-a": 60, POOLED_LEVELS: 5}
    assert note.merged == ("attribute_counts[0]",)


def test_a_small_pooled_level_takes_the_next_smallest_level_with_it() -> None:
    """A lone small vendor cannot be recovered by subtraction: the next level joins it."""
    release, _ = apply_policy(_release({"vendor-a": 60, "vendor-b": 3, "vendor-d": 20}), POLICY)

    counts = release.attribute_counts[0].as_dict()
    assert counts == {"vendor-a": 60, POOLED_LEVELS: 23}
    assert all(c == 0 or c >= POLICY.min_cell for c in counts.values())


def test_counts_of_an_attribute_the_policy_does_not_allow_are_refused() -> None:
    """A release counting an attribute outside the policy's list is refused as a whole."""
    with pytest.raises(DisclosureRefused, match="subgroup_attribute_not_allowed"):
        apply_policy(_release({"vendor-a": 40, "vendor-b": 40}), SitePolicy())
