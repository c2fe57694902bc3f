"""Agreement tables at several thresholds: the differencing attack, and the rule that stops it.

Invented hospital data, for tests only. Withholding a table whose difference to another
released table is small is complementary suppression across linked tables (Hundepool A
et al. (2012), Statistical Disclosure Control, Wiley, chapter 4; common practice).
"""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
from hypothesis import given, settings
from hypothesis import strategies as st

from site_agent.contract.protocol import EvaluationPlan, uniform_edges
from site_agent.contract.release import SiteRelease
from site_agent.data.predictions import validate_predictions
from site_agent.disclosure.policy import SitePolicy
from site_agent.disclosure.small_cells import apply_policy
from site_agent.evaluation import evaluate_site
from site_agent.statistics.summaries import AgreementTable, model_rater

SITE = "fernbrook-county-hospital"
READER = "reader_consultant"


def _release(scores: list[float], calls: list[int], thresholds: tuple[float, ...]) -> SiteRelease:
    n = len(scores)
    frame = pd.DataFrame(
        {
            "case_id": [f"c{i}" for i in range(n)],
            "patient_id": [f"p{i}" for i in range(n)],
            "label": [i % 2 for i in range(n)],
            "score": scores,
            READER: calls,
        }
    )
    plan = EvaluationPlan(histogram_edges=uniform_edges(4), thresholds=thresholds)
    return evaluate_site(validate_predictions(frame), plan, site=SITE, protocol_hash="unregistered")


def _threshold_tables(release: SiteRelease) -> dict[float, AgreementTable]:
    tables = {t.raters: t for t in release.statistics.agreement}
    return {
        c.threshold: tables[(model_rater(c.threshold), READER)]
        for c in release.statistics.confusion
        if (model_rater(c.threshold), READER) in tables
    }


def _two_cases_between_thresholds() -> SiteRelease:
    """60 invented cases: 2 of them score 0.51 (between 0.50 and 0.52) and the reader said 1."""
    scores = [0.9] * 20 + [0.51] * 2 + [0.1] * 38
    calls = [1] * 10 + [0] * 10 + [1] * 2 + [1] * 10 + [0] * 28
    return _release(scores, calls, (0.5, 0.52))


def test_two_tables_each_safe_alone_difference_into_two_cases() -> None:
    """The attack works on what the site computes: every cell >= 5, the difference is 2."""
    release = _two_cases_between_thresholds()
    tables = _threshold_tables(release)

    low, high = tables[0.5], tables[0.52]

    assert all(v == 0 or v >= 5 for t in (low, high) for row in t.counts for v in row)
    # Row 1 is "model positive": cases with 0.50 <= score < 0.52 by reader call.
    assert [a - b for a, b in zip(low.counts[1], high.counts[1], strict=True)] == [0, 2]


def test_release_withholds_the_table_that_would_isolate_the_two_cases() -> None:
    """After the policy, only one of the two tables leaves, and the note says which."""
    release = _two_cases_between_thresholds()

    controlled, note = apply_policy(release, SitePolicy(min_cell=5))

    released = _threshold_tables(controlled)
    assert len(released) == 1
    (withheld,) = {0.5, 0.52} - set(released)
    index = [t.raters for t in release.statistics.agreement].index((model_rater(withheld), READER))
    assert f"statistics.agreement[{index}]" in note.withheld


def test_tables_whose_difference_is_large_enough_are_all_released() -> None:
    """Ten cases between the thresholds (5 per class, all called 1) take nothing away.

    Both tables leave: per class the cut splits off 0 or >= 5 cases (the one-partition
    rule) and the tables differ by 10 (the rule of this module).
    """
    scores = [0.9] * 20 + [0.51] * 10 + [0.1] * 30
    calls = [1] * 10 + [0] * 10 + [1] * 10 + [1] * 10 + [0] * 20
    release = _release(scores, calls, (0.5, 0.52))

    controlled, note = apply_policy(release, SitePolicy(min_cell=5))

    assert list(_threshold_tables(controlled)) == [0.5, 0.52]
    assert not [w for w in note.withheld if "agreement" in w]


@settings(max_examples=60, deadline=None)
@given(
    seed=st.integers(0, 10_000),
    n=st.integers(40, 120),
    thresholds=st.lists(st.floats(0.05, 0.95), min_size=2, max_size=5, unique=True),
    min_cell=st.integers(2, 11),
)
def test_no_two_released_threshold_tables_difference_into_a_small_cell(
    seed: int, n: int, thresholds: list[float], min_cell: int
) -> None:
    """For random data and policies, every pair of released tables differs by 0 or >= m."""
    rng = np.random.default_rng(seed)
    scores = [float(s) for s in np.round(rng.random(n), 3)]
    calls = [int(c) for c in rng.integers(0, 2, n)]
    release = _release(scores, calls, tuple(sorted(round(t, 3) for t in thresholds)))
    computed = _threshold_tables(release)
    policy = SitePolicy(min_cell=min_cell)

    controlled, _ = apply_policy(release, policy)

    kept = sorted(_threshold_tables(controlled))
    for a, b in itertools.combinations(kept, 2):
        # Differences of the counts as computed, which an attacker would be after.
        for x, y in zip(computed[a].counts[1], computed[b].counts[1], strict=True):
            assert x - y == 0 or x - y >= min_cell
