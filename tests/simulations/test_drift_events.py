"""Drift events spliced into a site: the resampled duplicates a site reports are the ones it holds.

Data: scikit-learn's copy of the Wisconsin Diagnostic Breast Cancer data (an open dataset),
drawn into invented hospitals for tests only. The expected counts are pool arithmetic
(class sizes of the public table: 212 malignant, 357 benign).
"""

from __future__ import annotations

from datetime import date

from simulations.dataset import load_public_dataset
from simulations.drift_events import build_drifting_sites, event_start
from simulations.scenario import AcquisitionShift, DriftEvent, Scenario, SiteSpec

DATASET = load_public_dataset()


def _scenario() -> Scenario:
    return Scenario(
        seed=7,
        start_date=date(2023, 1, 1),
        months=12,
        development_site="Alpha",
        sites=(
            SiteSpec(name="Alpha", n_cases=200, prevalence=0.3),
            SiteSpec(name="Beta", n_cases=1000, prevalence=0.3),
        ),
        drift_events=(
            DriftEvent(
                site="Beta",
                from_month=7,
                acquisition=AcquisitionShift(intensity_gain=1.2),
                description="new scanner",
            ),
        ),
    )


def test_resampled_count_after_an_event_is_that_of_the_rows_kept() -> None:
    """The count is the kept resampled rows, at most the table size; no double counting."""
    scenario = _scenario()

    site = build_drifting_sites(scenario, DATASET)[1]

    # External pool: 106 malignant and 179 benign; Beta wants 300 and 700 per build, so
    # each whole build holds (300 - 106) + (700 - 179) = 715 duplicates. The site keeps
    # part of each build, so it cannot hold 2 x 715 = 1430 of its 1000 rows.
    assert site.n_resampled <= len(site.table)
    assert site.n_resampled == len(site.resampled_ids)
    assert site.resampled_ids <= set(site.table["case_id"])
    cutoff = event_start(scenario, scenario.drift_events[0]).strftime("%Y-%m-%d")
    after = site.table["acquired_on"] >= cutoff
    unique_after = int((~site.table.loc[after, "case_id"].isin(site.resampled_ids)).sum())
    unique_before = int((~site.table.loc[~after, "case_id"].isin(site.resampled_ids)).sum())
    # each part holds at most the 285 distinct pool cases once
    assert unique_before <= 106 + 179 and unique_after <= 106 + 179
    assert site.n_resampled == len(site.table) - unique_before - unique_after


def test_a_site_without_events_lists_exactly_its_duplicates() -> None:
    """Without events, resampled_ids has one id per duplicate row (the pool's excess)."""
    scenario = _scenario().model_copy(update={"drift_events": ()})

    site = build_drifting_sites(scenario, DATASET)[1]

    assert site.n_resampled == len(site.resampled_ids) == (300 - 106) + (700 - 179)
