"""The simulation-based planning grid: reproducible, honest about bounds, checked."""

from __future__ import annotations

import json
import math
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pytest
from pydantic import ValidationError
from scipy import stats

from coordinator.pooling.study_results import MetaRow, ParticipantFlow, StudyResults
from simulations.planning import (
    PlanSettings,
    Targets,
    plan_grid,
    simulate_cell,
    tau_from_results,
)
from site_agent.exceptions import InputError

SMALL = PlanSettings(site_counts=(3, 6), cases_per_site=(60, 150), replicates=40, seed=5)


def test_a_cell_is_reproduced_from_its_seed_whatever_the_grid() -> None:
    """One design gives the same numbers alone, inside a larger grid, and on two processes."""
    alone = simulate_cell(SMALL, 6, 150)
    grid = plan_grid(SMALL, workers=1)
    parallel = plan_grid(SMALL, workers=2)
    # Compared as JSON: NaN (an unknown upper bound) is written null and compares equal.
    assert grid.cell(6, 150).model_dump_json() == alone.model_dump_json()
    assert [c.model_dump_json() for c in parallel.cells] == [
        c.model_dump_json() for c in grid.cells
    ]


def test_another_seed_gives_other_numbers() -> None:
    """The seed is what the numbers depend on."""
    other = SMALL.model_copy(update={"seed": 6})
    first, second = simulate_cell(other, 6, 150), simulate_cell(SMALL, 6, 150)
    assert first.pooled_ci_width.estimate != second.pooled_ci_width.estimate


def test_progress_reports_every_design() -> None:
    """One progress line per design, counting up to the grid size."""
    lines: list[str] = []
    plan_grid(SMALL, progress=lines.append)
    assert len(lines) == 4
    assert lines[-1].startswith("[4/4]")


def test_pooled_interval_narrows_with_sites_and_cases() -> None:
    """More sites or more cases per site give a narrower pooled interval (common practice)."""
    result = plan_grid(SMALL)
    width = {(c.sites, c.cases_per_site): c.pooled_ci_width.estimate for c in result.cells}
    assert width[(6, 60)] < width[(3, 60)]
    assert width[(6, 150)] < width[(6, 60)]


def test_site_auc_spread_matches_the_hanley_mcneil_variance_bound() -> None:
    """With tau 0 the simulated site AUCs scatter no more than Hanley-McNeil predicts."""
    # Hanley & McNeil (1982) Radiology 143:29-36, eq. 1: for binormal scores the formula
    # is mildly conservative (observed in tests/coordinator/planning), so the SD of the
    # pooled estimate over replicates must not exceed HM / sqrt(k) by more than MC error.
    settings = PlanSettings(
        site_counts=(10,), cases_per_site=(200,), replicates=300, tau=0.0, seed=1
    )
    from coordinator.planning.auc_precision import auc_variance

    cell = simulate_cell(settings, 10, 200)
    hm_half = 1.96 * math.sqrt(auc_variance(0.8, 60, 140) / 10)
    # HKSJ uses t(9) and an estimated scale: its mean width is near 2·t(9)·SE, which with
    # a conservative SE bounds it from above.
    assert cell.pooled_ci_width.estimate < 2 * hm_half * stats.t.ppf(0.975, 9) / 1.96 * 1.05
    assert cell.pooled_ci_width.estimate > 0.5 * 2 * hm_half


@pytest.mark.slow
def test_false_alarm_rate_is_near_alpha_with_many_sites() -> None:
    """A new site like the others is flagged about alpha of the time (20 sites, tau 0.3)."""
    # The prediction bound of Higgins, Thompson & Spiegelhalter (2009) J R Stat Soc A
    # 172:137-159 keeps near-nominal coverage with 20 studies and moderate tau under REML
    # (Partlett & Riley 2017, Stat Med 36:301-317; recalled from memory). One-sided 5%.
    settings = PlanSettings(
        site_counts=(20,), cases_per_site=(200,), replicates=600, tau=0.3, seed=3
    )
    cell = simulate_cell(settings, 20, 200)
    assert cell.false_alarm.lower <= 0.05 + 0.02
    assert cell.false_alarm.upper >= 0.05 - 0.02
    assert cell.power.estimate > cell.false_alarm.estimate


def test_prediction_width_is_unknown_with_two_sites() -> None:
    """Two sites leave the prediction interval undefined: NaN, written as null."""
    settings = PlanSettings(site_counts=(2,), cases_per_site=(100,), replicates=20)
    result = plan_grid(settings, Targets(max_prediction_width=0.3))
    cell = result.cells[0]
    assert math.isnan(cell.prediction_width.estimate)
    assert cell.verdicts["prediction_width"] == "undefined"
    assert cell.meets_targets is False
    assert json.loads(result.model_dump_json())["cells"][0]["prediction_width"]["estimate"] is None


def test_delay_without_alarm_is_a_lower_bound_not_a_guess() -> None:
    """Replicates that never alarm make the mean delay 'at least', its upper end unknown."""
    settings = PlanSettings(
        site_counts=(3,), cases_per_site=(100,), replicates=20, drop=0.01, horizon_windows=2
    )
    delay = simulate_cell(settings, 3, 100).detection_delay
    assert delay.bound == "at least"
    assert delay.censored > 0
    assert math.isnan(delay.upper)
    assert delay.estimate <= 2


def test_recommendation_is_the_cheapest_design_meeting_every_target() -> None:
    """Among designs whose whole Monte Carlo interval meets the target, fewest cases wins."""
    result = plan_grid(SMALL, Targets(max_ci_width=0.25))
    meeting = [c for c in result.cells if c.meets_targets]
    assert meeting
    assert all(c.pooled_ci_width.upper <= 0.25 for c in meeting)
    best = min(meeting, key=lambda c: (c.sites * c.cases_per_site, c.sites))
    assert result.recommended == (best.sites, best.cases_per_site)


def test_tau_is_read_from_a_previous_studys_results(tmp_path: Path) -> None:
    """Tau = sqrt(REML tau²) of the logit AUC; prevalence from the flow of every site."""
    meta = dict(
        scale="logit", lower=0.7, upper=0.9, prediction_lower=0.6, prediction_upper=0.95,
        i2=0.3, h2=1.4, q=5.0, q_pvalue=0.2, k=4,
    )  # fmt: skip
    results = StudyResults(
        study_id="demo-northgate",
        title="Invented study at Northgate and Riverside",
        protocol_hash="0" * 64,
        created_at=datetime(2026, 1, 1, tzinfo=UTC),
        engine="inprocess",
        sites=[],
        metrics=[],
        meta=[
            MetaRow(metric="auc", method="dl", estimate=0.81, tau2=0.5, **meta),
            MetaRow(metric="auc", method="reml", estimate=0.82, tau2=0.09, **meta),
        ],
        flow=[
            ParticipantFlow(
                site=name,
                observations=100,
                patients=90,
                with_reference_standard=100,
                pending_reference_standard=0,
                positives=positives,
                negatives=100 - positives,
            )
            for name, positives in (("Northgate", 20), ("Riverside", 40))
        ],
    )
    path = tmp_path / "results.json"
    results.write_json(path)
    tau, auc, prevalence = tau_from_results(path)
    assert tau == pytest.approx(0.3)
    assert auc == pytest.approx(0.82)
    assert prevalence == pytest.approx(0.3)


def test_tau_from_a_file_that_is_not_results_is_invalid_input(tmp_path: Path) -> None:
    """A file without a REML AUC meta-analysis cannot give tau."""
    path = tmp_path / "results.json"
    path.write_text("{}")
    with pytest.raises(InputError, match="cannot read study results"):
        tau_from_results(path)


def test_settings_refuse_a_site_with_too_few_cases_of_a_class() -> None:
    """Ten cases at prevalence 0.1 leave one diseased case: no DeLong variance."""
    with pytest.raises(ValidationError, match="fewer than two cases"):
        PlanSettings(site_counts=(3,), cases_per_site=(10,), prevalence=0.1)


def test_monte_carlo_interval_of_a_width_is_mean_plus_minus_its_standard_error() -> None:
    """The interval of a mean is mean ± 1.96·SD/sqrt(R) (Morris et al. 2019)."""
    from simulations.planning import _mean

    values = list(np.linspace(0.1, 0.3, 50))
    result = _mean(values, 1.959963984540054)
    half = 1.959963984540054 * float(np.std(values, ddof=1)) / math.sqrt(50)
    assert result.lower == pytest.approx(result.estimate - half)
    assert result.upper == pytest.approx(result.estimate + half)
