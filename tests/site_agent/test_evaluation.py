"""Tests of site_agent.evaluation on the invented example site and small invented tables."""

from __future__ import annotations

from functools import reduce
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import roc_auc_score

from site_agent.contract.protocol import EvaluationPlan
from site_agent.contract.release import UNREGISTERED_PROTOCOL
from site_agent.data.predictions import MISSING, load_predictions, validate_predictions
from site_agent.evaluation import evaluate_site
from site_agent.exceptions import InputError

EXAMPLE = Path(__file__).parents[2] / "examples" / "northgate_predictions.csv"
PLAN = EvaluationPlan(thresholds=(0.5,), subgroups=("scanner_vendor", "sex"))


def test_exact_aucs_match_sklearn_on_labelled_cases() -> None:
    """Site and reader AUCs equal scikit-learn's roc_auc_score on the labelled cases."""
    p = load_predictions(EXAMPLE)
    release = evaluate_site(p, PLAN, site="northgate", protocol_hash=UNREGISTERED_PROTOCOL)
    known = p.labelled
    # scikit-learn roc_auc_score as the reference AUC.
    assert release.exact.auc.auc == pytest.approx(roc_auc_score(p.label[known], p.score[known]))
    assert release.exact.clustered_auc.auc == pytest.approx(release.exact.auc.auc)
    for comparison in release.exact.readers:
        calls = p.readers[comparison.reader]
        both = known & (calls != MISSING)
        assert comparison.auc_reader == pytest.approx(roc_auc_score(p.label[both], calls[both]))
        assert comparison.auc_model == pytest.approx(roc_auc_score(p.label[both], p.score[both]))


def test_pending_cases_only_in_label_free_counts() -> None:
    """Pending-label cases are in the label-free histogram but in no label metric."""
    frame = pd.read_csv(EXAMPLE)  # pandas as the independent count
    p = load_predictions(EXAMPLE)
    stats = evaluate_site(p, PLAN, site="northgate", protocol_hash=UNREGISTERED_PROTOCOL).statistics
    assert sum(stats.histogram.all) == len(frame)
    assert (
        sum(stats.histogram.positive) + sum(stats.histogram.negative)
        == frame["label"].notna().sum()
    )
    assert sum(stats.calibration.count) == frame["label"].notna().sum()
    c = stats.confusion[0]
    assert c.tp + c.fp + c.fn + c.tn == frame["label"].notna().sum()
    assert stats.n_pending == frame["label"].isna().sum()


def test_subgroup_statistics_merge_back_to_the_site() -> None:
    """The statistics of an attribute's levels merge to the whole site's statistics."""
    p = load_predictions(EXAMPLE)
    release = evaluate_site(p, PLAN, site="northgate", protocol_hash=UNREGISTERED_PROTOCOL)
    vendor = [g for g in release.subgroups if g.attribute == "scanner_vendor"]
    assert [g.level for g in vendor] == sorted(set(p.attributes["scanner_vendor"].tolist()))
    merged = reduce(lambda a, b: a.merge(b), [g.statistics for g in vendor])
    whole = release.statistics
    assert merged.confusion == whole.confusion
    assert merged.histogram == whole.histogram
    assert merged.agreement == whole.agreement
    assert np.allclose(merged.calibration.score_sum, whole.calibration.score_sum)
    for g in vendor:
        mask = (p.attributes["scanner_vendor"] == g.level) & p.labelled
        assert g.auc.auc == pytest.approx(roc_auc_score(p.label[mask], p.score[mask]))


def test_missing_subgroup_attribute_is_an_input_error() -> None:
    """Asking for a subgroup attribute the table lacks raises InputError naming the column."""
    p = load_predictions(EXAMPLE)
    plan = EvaluationPlan(subgroups=("ward",))
    with pytest.raises(InputError, match="'ward' is not a case attribute"):
        evaluate_site(p, plan, site="northgate", protocol_hash=UNREGISTERED_PROTOCOL)


def test_invalid_site_name_is_an_input_error() -> None:
    """A site name with characters outside the allowed set is refused."""
    p = load_predictions(EXAMPLE)
    with pytest.raises(InputError, match="site"):
        evaluate_site(p, PLAN, site="north/gate", protocol_hash=UNREGISTERED_PROTOCOL)


def test_single_class_site_releases_undefined_auc_with_reason() -> None:
    """A site with no diseased cases releases None AUCs with reasons instead of failing."""
    frame = pd.DataFrame(
        {
            "case_id": ["a", "b", "c"],
            "patient_id": ["p", "q", "q"],
            "label": ["0", "0", "0"],
            "score": ["0.1", "0.6", "0.3"],
            "reader_a": ["0", "1", ""],
        }
    )
    release = evaluate_site(
        validate_predictions(frame), EvaluationPlan(), site="tiny", protocol_hash="0" * 64
    )
    assert release.exact.auc.auc is None and release.exact.auc.reason
    assert release.exact.clustered_auc.auc is None
    assert release.exact.readers[0].difference is None and release.exact.readers[0].reason
    assert release.exact.calibration.slope.estimate is None
