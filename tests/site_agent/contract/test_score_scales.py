"""Score scales of the protocol: log-odds edges and development-site quantile edges."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from site_agent.contract.protocol import EvaluationPlan, StudyProtocol
from site_agent.contract.score_scales import logit_edges, quantile_edges


def test_logit_edges_are_equal_steps_of_log_odds_between_the_limits() -> None:
    """Inner edges map back to −16, −15, …, 16 under log(p / (1 − p)) (33 inner edges)."""
    edges = logit_edges(34, limit=16.0)

    inner = np.array(edges[1:-1])
    assert edges[0] == 0.0 and edges[-1] == 1.0
    assert np.log(inner / (1.0 - inner)) == pytest.approx(np.arange(-16, 17), abs=1e-5)


def test_logit_edges_keep_near_certain_scores_apart() -> None:
    """Scores 0.9999 and 0.999999 (log-odds 9.2 and 13.8) fall in different bins."""
    edges = np.array(logit_edges(100))

    bins = np.searchsorted(edges, [0.9999, 0.999999], side="right")

    assert bins[0] != bins[1]


def test_default_protocol_bins_on_the_logit_scale_and_validates() -> None:
    """A protocol written without edges gets the logit scale, accepted by the plan checks."""
    plan = StudyProtocol(study_id="ELM-01", title="Invented study").evaluation

    assert plan.histogram_edges == logit_edges(100)
    assert EvaluationPlan(histogram_edges=plan.histogram_edges).histogram_edges[0] == 0.0


def test_logit_edges_survive_a_json_round_trip_unchanged() -> None:
    """Rounded to 12 significant digits, the edges hash the same after JSON (common practice)."""
    protocol = StudyProtocol(study_id="ELM-01", title="Invented study")

    again = StudyProtocol.from_json(protocol.canonical_json())

    assert again.content_hash() == protocol.content_hash()


def test_quantile_edges_put_equal_shares_of_development_scores_in_each_bin() -> None:
    """Each of 4 bins holds 25 of 100 distinct development scores (numpy quantiles)."""
    scores = (np.arange(100) + 0.5) / 100

    edges = quantile_edges(scores, 4, min_cell=5)

    counts, _ = np.histogram(scores, bins=np.array(edges))
    assert counts.tolist() == [25, 25, 25, 25]


def test_quantile_edges_refuse_bins_finer_than_the_minimum_cell() -> None:
    """60 development scores allow at most 12 bins of 5 cases: 13 is refused."""
    with pytest.raises(ValueError, match="at most 12 bins of 5 cases"):
        quantile_edges(np.linspace(0.01, 0.99, 60), 13, min_cell=5)


def test_quantile_edges_drop_repeated_edges_of_tied_scores() -> None:
    """Half the scores tied at 0.5: repeated quantiles give one edge, edges stay increasing."""
    scores = np.r_[np.full(50, 0.5), np.linspace(0.6, 0.9, 50)]

    edges = quantile_edges(scores, 10, min_cell=5)

    assert all(b > a for a, b in itertools.pairwise(edges))
    assert edges.count(0.5) == 1 and not math.isnan(sum(edges))
