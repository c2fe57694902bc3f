"""Tests of site_agent.statistics.metrics against scikit-learn, statsmodels and slow references.

Random tables are invented for tests only. The reference library is named beside each check.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.metrics import (
    accuracy_score,
    brier_score_loss,
    cohen_kappa_score,
    f1_score,
    precision_score,
    recall_score,
    roc_auc_score,
)
from statsmodels.stats.proportion import proportion_confint

from site_agent.contract.protocol import EvaluationPlan, uniform_edges
from site_agent.contract.release import EstimateRecord
from site_agent.data.predictions import Predictions, load_predictions, validate_predictions
from site_agent.statistics.metrics import MetricsSummary, summarize
from site_agent.statistics.proportions import clustered_proportion
from site_agent.statistics.summaries import compute_statistics

EXAMPLE = Path(__file__).parents[3] / "examples" / "northgate_predictions.csv"
PLAN = EvaluationPlan(thresholds=(0.3, 0.5, 0.7), histogram_edges=uniform_edges(50))


def _random_table(seed: int, n: int = 300, pending: float = 0.1) -> Predictions:
    """Invent a table: correlated scores, two to three cases per patient, two readers."""
    rng = np.random.default_rng(seed)
    label = (rng.random(n) < 0.35).astype(int)
    score = np.clip(rng.beta(2 + 3 * label, 4 - 2 * label), 0, 1).round(3)
    labels = np.where(rng.random(n) < pending, "", label.astype(str))
    frame = pd.DataFrame(
        {
            "case_id": [f"c{i}" for i in range(n)],
            "patient_id": [f"p{i // 3}" for i in range(n)],
            "label": labels,
            "score": score.astype(str),
            "category": np.clip(np.round(score * 5 + 0.5), 1, 5).astype(int).astype(str),
            "reader_a": np.where(rng.random(n) < 0.8, label, 1 - label).astype(str),
            "reader_b": np.clip(label * 2 + rng.integers(1, 4, n), 1, 5).astype(str),
        }
    )
    return validate_predictions(frame)


def _interval(e: EstimateRecord) -> tuple[float, float]:
    assert e.lower is not None and e.upper is not None
    return e.lower, e.upper


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_threshold_metrics_match_sklearn_and_statsmodels(seed: int) -> None:
    """Sensitivity, specificity, PPV, NPV, accuracy, F1 and their intervals match references."""
    p = _random_table(seed)
    summary = summarize(compute_statistics(p, PLAN))
    known = p.labelled
    y, s = p.label[known], p.score[known]
    for t in summary.thresholds:
        call = (s >= t.threshold).astype(int)
        # scikit-learn 1.x recall_score / precision_score / accuracy_score / f1_score.
        assert t.sensitivity.wilson.estimate == pytest.approx(recall_score(y, call))
        assert t.specificity.wilson.estimate == pytest.approx(recall_score(1 - y, 1 - call))
        assert t.ppv.wilson.estimate == pytest.approx(precision_score(y, call))
        assert t.npv.wilson.estimate == pytest.approx(precision_score(1 - y, 1 - call))
        assert t.accuracy.estimate == pytest.approx(accuracy_score(y, call))
        assert t.f1.value == pytest.approx(f1_score(y, call))
        # statsmodels proportion_confint, methods "wilson" and "beta" (Clopper–Pearson).
        for name in ("sensitivity", "specificity", "ppv", "npv"):
            prop = getattr(t, name)
            wil = proportion_confint(prop.successes, prop.total, alpha=0.05, method="wilson")
            exact = proportion_confint(prop.successes, prop.total, alpha=0.05, method="beta")
            assert _interval(prop.wilson) == pytest.approx(wil, abs=1e-9)
            assert _interval(prop.clopper_pearson) == pytest.approx(exact, abs=1e-9)


def test_clustered_interval_from_moments_equals_interval_from_patient_counts() -> None:
    """The clustered sensitivity from released moments equals the one from per-patient counts."""
    p = _random_table(7)
    summary = summarize(compute_statistics(p, PLAN))
    known = p.labelled
    frame = pd.DataFrame(
        {"patient": p.patient_id[known], "y": p.label[known], "hit": p.score[known] >= 0.5}
    )
    per_patient = frame[frame["y"] == 1].groupby("patient")["hit"].agg(["sum", "size"])
    expected = clustered_proportion(per_patient["sum"], per_patient["size"])
    got = summary.thresholds[1].sensitivity.clustered
    assert got.estimate == pytest.approx(expected.estimate)
    assert got.se == pytest.approx(expected.se)
    assert _interval(got) == pytest.approx((expected.lower, expected.upper))


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 10_000), k=st.integers(1, 4))
def test_pooled_histogram_auc_is_within_bound_of_exact_auc(seed: int, k: int) -> None:
    """Histogram AUC of merged site statistics lies within its bound of the exact pooled AUC."""
    p = _random_table(seed, n=120)
    site = np.random.default_rng(seed).integers(0, k, len(set(p.patient_id.tolist())))
    patient_index = np.array([int(pid[1:]) for pid in p.patient_id])
    stats = [compute_statistics(p.subset(site[patient_index] == i), PLAN) for i in range(k)]
    pooled = stats[0]
    for other in stats[1:]:
        pooled = pooled.merge(other)
    auc = summarize(pooled).auc
    known = p.labelled
    exact = roc_auc_score(p.label[known], p.score[known])  # scikit-learn as the reference AUC
    assert auc.auc is not None and auc.bound is not None
    assert abs(auc.auc - exact) <= auc.bound + 1e-12


def test_brier_and_ece_match_references() -> None:
    """Brier equals scikit-learn's; ECE equals a slow per-bin computation."""
    p = _random_table(11)
    summary = summarize(compute_statistics(p, PLAN))
    known = p.labelled
    y, s = p.label[known], p.score[known]
    # scikit-learn brier_score_loss.
    assert summary.brier.value == pytest.approx(brier_score_loss(y, s))
    # ECE = Σ_b (n_b / N)·|mean score_b − observed rate_b| over 10 equal-width bins
    # (Naeini, Cooper & Hauskrecht 2015, AAAI), computed slowly here.
    bins = np.minimum((s * 10).astype(int), 9)
    ece = sum(
        (bins == b).sum() / len(s) * abs(s[bins == b].mean() - y[bins == b].mean())
        for b in range(10)
        if (bins == b).any()
    )
    assert summary.ece.value == pytest.approx(ece)


def test_kappas_match_sklearn() -> None:
    """Unweighted, linear and quadratic kappas match scikit-learn's cohen_kappa_score."""
    p = _random_table(5)
    summary = summarize(compute_statistics(p, PLAN))
    by_raters = {k.raters: k for k in summary.agreement}
    assert p.category is not None
    ordinal = by_raters[("model_category", "reader_b")]
    binary = by_raters[("model@0.5", "reader_a")]
    for weights, field in ((None, "unweighted"), ("linear", "linear"), ("quadratic", "quadratic")):
        # scikit-learn cohen_kappa_score(weights=None | "linear" | "quadratic").
        expected = cohen_kappa_score(p.category, p.readers["reader_b"], weights=weights)
        assert getattr(ordinal, field).estimate == pytest.approx(expected)
    model_calls = (p.score >= 0.5).astype(int)
    expected = cohen_kappa_score(model_calls, p.readers["reader_a"])
    assert binary.unweighted.estimate == pytest.approx(expected)


def test_no_positive_cases_gives_none_with_reasons_not_a_crash() -> None:
    """A site without diseased cases yields undefined metrics with reasons, and valid JSON."""
    frame = pd.DataFrame(
        {
            "case_id": ["a", "b", "c"],
            "patient_id": ["p", "q", "r"],
            "label": ["0", "0", ""],
            "score": ["0.2", "0.7", "0.9"],
        }
    )
    summary = summarize(compute_statistics(validate_predictions(frame), PLAN))
    t = summary.thresholds[1]
    assert t.sensitivity.wilson.estimate is None and t.sensitivity.wilson.reason
    assert t.specificity.wilson.estimate == pytest.approx(0.5)
    assert summary.auc.auc is None and summary.auc.reason
    assert summary.roc.fpr == () and summary.roc.reason
    text = summary.model_dump_json()
    assert "NaN" not in text and "Infinity" not in text
    assert MetricsSummary.model_validate_json(text) == summary


def test_all_pending_table_summarises_without_crash() -> None:
    """A table whose labels are all pending yields None metrics and no labelled counts."""
    frame = pd.DataFrame(
        {
            "case_id": ["a", "b"],
            "patient_id": ["p", "p"],
            "label": ["", ""],
            "score": ["0.2", "0.7"],
        }
    )
    summary = summarize(compute_statistics(validate_predictions(frame), PLAN))
    assert summary.n_pending == 2
    assert summary.brier.value is None and summary.brier.reason == "no labelled cases"
    assert summary.prevalence.estimate is None


def test_example_summary_round_trips_through_json() -> None:
    """The example site's summary serialises to standard JSON and reads back equal."""
    summary = summarize(compute_statistics(load_predictions(EXAMPLE), EvaluationPlan()))
    text = summary.model_dump_json()
    json.loads(text)  # standard JSON: no NaN or Infinity literals
    assert MetricsSummary.model_validate_json(text) == summary
    assert all(v is None or math.isfinite(v) for v in summary.roc.thresholds), (
        "thresholds are finite or None"
    )
