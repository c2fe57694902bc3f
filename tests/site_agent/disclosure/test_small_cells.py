"""Small-cell control of a release: suppression, merging and pooling before it leaves.

Invented hospital data, for tests only. The rules are primary and secondary (complementary)
cell suppression as statistical offices apply them to tables (common practice); attribute
counts of a monitoring window pool small levels (disclosure rule 7).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from site_agent.contract.protocol import EvaluationPlan, uniform_edges
from site_agent.contract.release import POOLED_LEVELS, SiteRelease
from site_agent.data.predictions import validate_predictions
from site_agent.disclosure.policy import SitePolicy
from site_agent.disclosure.small_cells import apply_policy
from site_agent.evaluation import evaluate_site
from site_agent.exceptions import DisclosureRefused
from site_agent.statistics.censored import CensoredCount
from site_agent.statistics.metrics import summarize

SITE = "fernbrook-county-hospital"

# ----------------------------------------------------------------- confusion, histogram, pending


def _release_with_one_small_cell() -> SiteRelease:
    """40 positives (37 score 0.97, 3 score 0.55) and 40 negatives (score 0.05), invented."""
    scores = [0.97] * 37 + [0.55] * 3 + [0.05] * 40
    labels = [1] * 40 + [0] * 40
    frame = pd.DataFrame(
        {
            "case_id": [f"c{i}" for i in range(80)],
            "patient_id": [f"p{i}" for i in range(80)],
            "label": labels,
            "score": scores,
        }
    )
    plan = EvaluationPlan(histogram_edges=uniform_edges(10), thresholds=(0.5, 0.9))
    return evaluate_site(validate_predictions(frame), plan, site=SITE, protocol_hash="unregistered")


def test_small_confusion_cell_is_censored_with_its_class_partner() -> None:
    """A false-negative count of 3 goes with tp, which would give it back as n_positive − tp."""
    release = _release_with_one_small_cell()
    policy = SitePolicy(min_cell=5)

    controlled, note = apply_policy(release, policy)

    at_09 = controlled.statistics.confusion[1]
    assert (release.statistics.confusion[1].tp, release.statistics.confusion[1].fn) == (37, 3)
    # Censored, never 0. The cut at 0.9 splits off 3 positives, so the one-partition rule
    # withholds it for positives: tp and fn become ranges between the neighbouring kept
    # thresholds (here the ends of the score axis), each holding the true count.
    assert isinstance(at_09.fn, CensoredCount) and isinstance(at_09.tp, CensoredCount)
    assert at_09.fn.class_total == at_09.tp.class_total == 40
    assert at_09.fn.low <= 3 <= at_09.fn.high and at_09.tp.low <= 37 <= at_09.tp.high
    assert (at_09.fp, at_09.tn) == (0, 40)
    # Complementary suppression (common practice): the released numbers leave every value
    # of 1..m−1 possible for the small cell, so it cannot be recovered by subtraction.
    assert at_09.fn.low <= 1 and at_09.fn.high >= policy.min_cell - 1
    assert {"statistics.confusion[1].tp", "statistics.confusion[1].fn"} <= set(note.suppressed)


def test_suppressed_histogram_cell_cannot_be_recovered_from_the_class_total() -> None:
    """A lone small bin is suppressed with another, so n_positive − Σ kept is not small."""
    release = _release_with_one_small_cell()

    controlled, note = apply_policy(release, SitePolicy(min_cell=5))

    stats = controlled.statistics
    for total, row in (
        (stats.n_positive, stats.histogram.positive),
        (stats.n_negative, stats.histogram.negative),
    ):
        hidden = total - sum(row)
        # Secondary suppression (common practice): what is hidden is 0 or >= min_cell.
        assert hidden == 0 or hidden >= 5
    hidden_count = stats.n_positive + stats.n_negative - sum(stats.calibration.count)
    assert hidden_count == 0 or hidden_count >= 5
    assert "statistics.histogram.positive[5]" in note.suppressed


def test_a_small_pending_count_is_not_recoverable_from_the_agreement_tables() -> None:
    """Two pending cases: withheld, and so are the agreement tables that counted them."""
    rng = np.random.default_rng(11)
    n = 60
    labels = rng.integers(0, 2, n).astype(str).astype(object)
    labels[:2] = ""  # two cases whose reference standard is pending
    frame = pd.DataFrame(
        {
            "case_id": [f"c{i}" for i in range(n)],
            "patient_id": [f"p{i}" for i in range(n)],
            "label": labels,
            "score": rng.random(n).round(4).astype(str),
            "reader_a": rng.integers(0, 2, n).astype(str),
        }
    )
    plan = EvaluationPlan(histogram_edges=uniform_edges(4), thresholds=(0.5,))
    release = evaluate_site(validate_predictions(frame), plan, site=SITE, protocol_hash="0" * 64)
    assert release.statistics.agreement  # the unpoliced release has the reader table
    assert sum(map(sum, release.statistics.agreement[0].counts)) == n  # it counts pending cases

    policed, note = apply_policy(release, SitePolicy(min_cell=5))

    # Small-cell rule (min cell 5, common practice): the table total minus the released
    # case count would give the withheld pending count, so the tables leave with it.
    assert policed.statistics.n_pending == 0
    assert policed.statistics.agreement == ()
    # Withheld by the pending rule, or already by the partition rule (tables at a
    # threshold are not released beside pending cases).
    assert any(path.startswith("statistics.agreement") for path in note.withheld)


# ----------------------------------------------------------------- attribute counts (rule 7)

PLAN = EvaluationPlan(thresholds=(0.5,), histogram_edges=uniform_edges(4))
POLICY = SitePolicy(allowed_subgroup_attributes=("scanner_vendor",))


def _release_with_vendors(vendors: dict[str, int]) -> SiteRelease:
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
    release, note = apply_policy(
        _release_with_vendors({"vendor-a": 60, "vendor-b": 3, "vendor-c": 2}), POLICY
    )

    assert release.attribute_counts[0].as_dict() == {"vendor-a": 60, POOLED_LEVELS: 5}
    assert note.merged == ("attribute_counts[0]",)


def test_a_small_pooled_level_takes_the_next_smallest_level_with_it() -> None:
    """A lone small vendor cannot be recovered by subtraction: the next level joins it."""
    release, _ = apply_policy(
        _release_with_vendors({"vendor-a": 60, "vendor-b": 3, "vendor-d": 20}), POLICY
    )

    counts = release.attribute_counts[0].as_dict()
    assert counts == {"vendor-a": 60, POOLED_LEVELS: 23}
    assert all(c == 0 or c >= POLICY.min_cell for c in counts.values())


def test_counts_of_an_attribute_the_policy_does_not_allow_are_refused() -> None:
    """A release counting an attribute outside the policy's list is refused as a whole."""
    with pytest.raises(DisclosureRefused, match="subgroup_attribute_not_allowed"):
        apply_policy(_release_with_vendors({"vendor-a": 40, "vendor-b": 40}), SitePolicy())


def test_small_agreement_cell_is_withheld_as_null_in_every_linked_table() -> None:
    """Readers disagree on 3 cases: that cell leaves as null (unknown), never as 0.

    The site's table is the sum of its levels' tables, so the cell goes from every level
    too (complementary suppression across linked tables, common practice in statistical
    disclosure control), every table with a withheld cell is marked censored, and no
    kappa is derived from it. Invented cases.
    """
    n = 120
    reader_a = np.array([i % 2 for i in range(n)])
    reader_b = reader_a.copy()
    reader_b[[1, 3, 5]] = 0  # reader b calls 0 where reader a called 1: a cell of 3
    frame = pd.DataFrame(
        {
            "case_id": [f"c{i}" for i in range(n)],
            "patient_id": [f"p{i}" for i in range(n)],
            "label": (np.arange(n) % 3 == 0).astype(int).astype(str),
            "score": np.linspace(0.01, 0.99, n).round(4).astype(str),
            "reader_a": reader_a.astype(str),
            "reader_b": reader_b.astype(str),
            "sex": ["F" if i < n // 2 else "M" for i in range(n)],
        }
    )
    plan = EvaluationPlan(thresholds=(0.5,), histogram_edges=uniform_edges(4), subgroups=("sex",))
    release = evaluate_site(validate_predictions(frame), plan, site=SITE, protocol_hash="0" * 64)

    policed, note = apply_policy(
        release, SitePolicy(min_cell=5, allowed_subgroup_attributes=("sex",))
    )

    populations = [policed.statistics, *(s.statistics for s in policed.subgroups)]
    for stats in populations:
        (table,) = [t for t in stats.agreement if t.raters == ("reader_a", "reader_b")]
        assert table.counts[1][0] is None and table.censored
        assert all(v is None or v == 0 or v >= 5 for row in table.counts for v in row)
        (kappa,) = [k for k in summarize(stats).agreement if k.raters == table.raters]
        assert kappa.unweighted.estimate is None
    assert sum(p.endswith("counts[1][0]") for p in note.suppressed) == len(populations)
