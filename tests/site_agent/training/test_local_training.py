"""Site-local fine-tuning against its rules and against scikit-learn.

Data: scikit-learn's copy of the Wisconsin Diagnostic Breast Cancer data (an open
dataset, ``sklearn.datasets.load_breast_cancer``), cut into an invented hospital's table.
"""

from __future__ import annotations

import copy

import numpy as np
import pandas as pd
import pytest
import torch
from sklearn.datasets import load_breast_cancer
from sklearn.metrics import roc_auc_score

from simulations.development import develop_model
from site_agent.contract.protocol import AdaptationPlan
from site_agent.exceptions import InputError
from site_agent.training.local_training import (
    adapt_site,
    fine_tune,
    get_state,
    local_data,
    performance,
    train_round,
)
from site_agent.training.model_bundle import bundle_bytes, load_bundle

PLAN = AdaptationPlan(case_counts=(0, 10, 25), repeats=2, epochs=5, federated_rounds=1)


def wdbc_table(rows: slice, prefix: str) -> pd.DataFrame:
    """Return a slice of WDBC as a site table; two consecutive cases share a patient."""
    data = load_breast_cancer()
    x = data.data[rows]
    frame = pd.DataFrame(x, columns=[f"feature_{i}" for i in range(x.shape[1])])
    n = len(frame)
    frame.insert(0, "label", (data.target[rows] == 0).astype(int))  # 1 = malignant
    frame.insert(0, "patient_id", [f"{prefix}-p{i // 2}" for i in range(n)])
    frame.insert(0, "case_id", [f"{prefix}-c{i}" for i in range(n)])
    return frame


def wdbc_bundle() -> bytes:
    """Return a logistic bundle developed on the first 200 WDBC cases."""
    developed = develop_model(wdbc_table(slice(0, 200), "dev"), "logistic", seed=0)
    return bundle_bytes(developed.model, developed.manifest)


def test_no_test_case_is_ever_used_in_training() -> None:
    """Every training step of the grid and of a federated round sees pool cases only."""
    bundle = load_bundle(wdbc_bundle())
    data = local_data(wdbc_table(slice(200, 400), "site"), bundle, PLAN)
    seen: list[np.ndarray] = []

    adapt_site(
        data, bundle, PLAN, (0.5,), site="site", protocol_hash="unregistered", observe=seen.append
    )
    train_round(data, bundle, get_state(bundle.model), PLAN, observe=seen.append)

    held_out = set(data.case_ids[data.test])
    pool = set(data.case_ids[data.pool])
    trained = set(np.concatenate(seen))
    assert seen and trained.isdisjoint(held_out)
    assert trained <= pool
    # the split is by patient: no patient on both sides (common practice)
    assert set(data.patient_ids[data.test]).isdisjoint(data.patient_ids[data.pool])


def test_fine_tune_refuses_a_held_out_case() -> None:
    """Asking to train on a test-set row raises instead of training."""
    bundle = load_bundle(wdbc_bundle())
    data = local_data(wdbc_table(slice(200, 400), "site"), bundle, PLAN)

    with pytest.raises(InputError, match="outside the training pool"):
        fine_tune(bundle.model, data, data.test[:3], steps=1, learning_rate=0.01)


def test_performance_auc_and_counts_match_scikit_learn() -> None:
    """Test-set AUC equals sklearn's roc_auc_score; counts equal a direct tally."""
    bundle = load_bundle(wdbc_bundle())
    frame = wdbc_table(slice(200, 569), "site")
    data = local_data(frame, bundle, PLAN)

    perf = performance(bundle.model, data, (0.3, 0.5))

    scores = bundle.predict(frame.iloc[data.test])
    labels = frame["label"].to_numpy()[data.test]
    assert perf.auc.auc == pytest.approx(roc_auc_score(labels, scores), abs=1e-12)  # sklearn
    at_half = perf.at_thresholds[1]
    assert at_half.tp == int(((scores >= 0.5) & (labels == 1)).sum())
    assert at_half.tn == int(((scores < 0.5) & (labels == 0)).sum())


def test_adaptation_release_has_one_point_per_count_and_seed() -> None:
    """Counts 0, 10, 25 and the whole pool, two seeds each; count 0 equals 'before'."""
    bundle = load_bundle(wdbc_bundle())
    data = local_data(wdbc_table(slice(200, 400), "site"), bundle, PLAN)

    release = adapt_site(data, bundle, PLAN, (0.5,), site="site", protocol_hash="unregistered")

    assert [(p.n_requested, p.seed) for p in release.points] == [
        (n, s) for n in (0, 10, 25, None) for s in (0, 1)
    ]
    assert release.points[0].after == release.before
    assert release.n_pool + release.n_test == 200
    assert all(p.n_used >= (p.n_requested or 0) for p in release.points)


def _delong_variance_by_pairs(a: np.ndarray, b: np.ndarray, y: np.ndarray) -> float:
    """Slow reference: var(AUC_a − AUC_b) from DeLong's structural components, by loops.

    DeLong, DeLong & Clarke-Pearson (1988), Biometrics 44:837-845, eqs. 4-5.
    """
    pos, neg = np.flatnonzero(y == 1), np.flatnonzero(y == 0)

    def psi(x: float, z: float) -> float:
        return 1.0 if x > z else 0.5 if x == z else 0.0

    v10 = np.array([[np.mean([psi(s[i], s[j]) for j in neg]) for i in pos] for s in (a, b)])
    v01 = np.array([[np.mean([psi(s[i], s[j]) for i in pos]) for j in neg] for s in (a, b)])
    s10, s01 = np.cov(v10), np.cov(v01)
    c = np.array([1.0, -1.0])
    return float(c @ (s10 / pos.size + s01 / neg.size) @ c)


def test_each_fine_tuned_point_releases_the_paired_delong_change() -> None:
    """The change equals sklearn's AUC after minus before, with DeLong's paired variance."""
    bundle = load_bundle(wdbc_bundle())
    data = local_data(wdbc_table(slice(200, 400), "site"), bundle, PLAN)

    release = adapt_site(data, bundle, PLAN, (0.5,), site="site", protocol_hash="unregistered")

    labels = data.y[data.test].numpy().astype(int)
    with torch.no_grad():
        before = torch.sigmoid(bundle.model(data.x[data.test])).numpy().astype(np.float64)
    point = next(p for p in release.points if p.n_requested is None)
    model = fine_tune(
        copy.deepcopy(bundle.model),
        data,
        data.pool,
        steps=PLAN.epochs,
        learning_rate=PLAN.learning_rate,
        l2_to_initial=PLAN.l2_to_initial,
    )
    with torch.no_grad():
        after = torch.sigmoid(model(data.x[data.test])).numpy().astype(np.float64)
    assert point.change is not None and point.change.difference is not None
    # AUCs by scikit-learn's roc_auc_score (reference implementation)
    expected = roc_auc_score(labels, after) - roc_auc_score(labels, before)
    assert point.change.difference == pytest.approx(expected, abs=1e-12)
    assert point.change.variance == pytest.approx(
        _delong_variance_by_pairs(after, before, labels), rel=1e-9
    )
    assert all(p.change is None for p in release.points if p.n_requested == 0)
