"""On the default rehearsal scenario, site-local fine-tuning recovers the most degraded site.

Data: the packaged scenario's invented hospitals, drawn from scikit-learn's copy of the
Wisconsin Diagnostic Breast Cancer data (an open dataset). The model is developed and each
site is split exactly as ``sitepool rehearse`` does it.
"""

from __future__ import annotations

import copy

import numpy as np
import pytest
import torch
from sklearn.metrics import roc_auc_score

from simulations.dataset import load_public_dataset
from simulations.development import develop_model
from simulations.rehearsal import REHEARSAL_ADAPTATION
from simulations.scenario import default_scenario
from simulations.sites import build_sites, development_split
from site_agent.statistics.roc import paired_delong
from site_agent.training.local_training import LocalData, fine_tune, local_data
from site_agent.training.model_bundle import bundle_bytes, load_bundle


def _test_scores(model: torch.nn.Module, data: LocalData) -> np.ndarray:
    with torch.no_grad():
        return torch.sigmoid(model(data.x[data.test])).numpy().astype(np.float64)


def test_local_adaptation_raises_auc_at_the_most_degraded_default_site() -> None:
    """Fine-tuning on the whole local pool raises test-set AUC by a paired DeLong test."""
    scenario = default_scenario()
    sites = build_sites(scenario, load_public_dataset())
    train, _ = development_split(sites[scenario.development_index], seed=scenario.seed)
    developed = develop_model(train, "logistic", seed=scenario.seed)
    bundle = load_bundle(bundle_bytes(developed.model, developed.manifest))
    plan = REHEARSAL_ADAPTATION  # the plan the rehearsal registers
    datas = {s.name: local_data(s.table, bundle, plan) for s in sites if not s.is_development}
    labels = {name: d.y[d.test].numpy().astype(np.int64) for name, d in datas.items()}
    before = {name: _test_scores(bundle.model, d) for name, d in datas.items()}
    # AUC by scikit-learn's roc_auc_score (reference implementation).
    worst = min(datas, key=lambda name: roc_auc_score(labels[name], before[name]))
    data = datas[worst]
    seen: list[np.ndarray] = []

    adapted = fine_tune(
        copy.deepcopy(bundle.model),
        data,
        data.pool,
        steps=plan.epochs,
        learning_rate=plan.learning_rate,
        l2_to_initial=plan.l2_to_initial,
        observe=seen.append,
    )
    after = _test_scores(adapted, data)

    # DeLong, DeLong & Clarke-Pearson (1988), Biometrics 44:837-845: paired test of two
    # correlated AUCs on the same held-out cases; a 95% CI of after - before above 0
    # is a two-sided test at the 5% level.
    change = paired_delong(after, before[worst], labels[worst])
    # both AUCs agree with scikit-learn's roc_auc_score (reference implementation)
    assert change.auc_b == pytest.approx(roc_auc_score(labels[worst], before[worst]), abs=1e-12)
    assert change.auc_a == pytest.approx(roc_auc_score(labels[worst], after), abs=1e-12)
    assert change.lower > 0.0
    assert change.p_value < 0.05
    # no held-out case took part in any training step
    trained = set(np.concatenate(seen))
    assert seen and trained.isdisjoint(data.case_ids[data.test])
