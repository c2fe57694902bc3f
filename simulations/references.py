"""The centralized reference: training on all sites' pooled data, possible only in simulation.

Federated fine-tuning is measured against the model one would get if every site's
training pool could be put in one place. :func:`centralized_reference` splits each
site's table exactly as its site agent does (:func:`site_agent.training.local_training.local_data`,
same plan, same seed), pools the training pools, fine-tunes the bundle's model on the pool
with the same optimiser and learning rate for as many full-batch steps as the federated
run takes in total (rounds x local steps), and measures it on each site's held-out test
set. In a real study no one may pool the cases; in a rehearsal the coordinator and the
sites are one program, so the upper reference can be drawn.

Invented data for rehearsal only; sitepool is a research tool, not a medical device.
"""

from __future__ import annotations

import copy
from collections.abc import Mapping
from pathlib import Path

import numpy as np
import pandas as pd
import torch

from coordinator.adaptation.fine_tuning import FineTuningOutcome, add_fine_tuning
from coordinator.pooling.study_results import StudyResults
from site_agent.contract.protocol import StudyProtocol
from site_agent.contract.release import AucRecord
from site_agent.exceptions import ProtocolError
from site_agent.service import SiteSettings, site_table
from site_agent.training.local_training import LocalData, fine_tune, local_data, performance
from site_agent.training.model_bundle import load_bundle


def pooled_pools(datas: Mapping[str, LocalData]) -> LocalData:
    """Return one :class:`LocalData` whose pool is every site's pool and whose test is empty."""
    parts = list(datas.items())
    x = torch.cat([d.x[d.pool] for _, d in parts])
    y = torch.cat([d.y[d.pool] for _, d in parts])
    case_ids = np.concatenate([np.char.add(f"{s}/", d.case_ids[d.pool]) for s, d in parts])
    patients = np.concatenate([np.char.add(f"{s}/", d.patient_ids[d.pool]) for s, d in parts])
    every = np.arange(len(y)).astype(np.intp)
    return LocalData(
        x=x,
        y=y,
        case_ids=case_ids.astype(np.str_),
        patient_ids=patients.astype(np.str_),
        pool=every,
        test=np.empty(0, dtype=np.intp),
    )


def centralized_reference(
    tables: Mapping[str, pd.DataFrame], bundle_path: Path, protocol: StudyProtocol
) -> dict[str, AucRecord]:
    """Return each site's test-set AUC of the model trained on all pooled training pools.

    Raises
    ------
    site_agent.exceptions.ProtocolError
        If the protocol has no adaptation plan or names no model.
    """
    plan = protocol.adaptation
    if plan is None or protocol.model is None:
        raise ProtocolError("the centralized reference needs a model and an adaptation plan")
    bundle = load_bundle(bundle_path, expected_sha256=protocol.model.sha256)
    datas = {site: local_data(table, bundle, plan) for site, table in tables.items()}
    pooled = pooled_pools(datas)
    model = fine_tune(
        copy.deepcopy(bundle.model),
        pooled,
        pooled.pool,
        steps=max(plan.federated_rounds, 1) * plan.local_epochs,
        learning_rate=plan.learning_rate,
    )
    thresholds = protocol.evaluation.thresholds
    return {site: performance(model, data, thresholds).auc for site, data in datas.items()}


def with_reference_lines(
    results: StudyResults,
    protocol: StudyProtocol,
    outcome: FineTuningOutcome,
    bundle_path: Path,
    sites: list[SiteSettings],
) -> StudyResults:
    """Return ``results`` with the fine-tuning stage and all four reference lines added.

    Reads each site's table where its site agent reads it; simulation only.
    """
    tables = {s.site: site_table(s) for s in sites if s.site in outcome.local.releases}
    centralized = centralized_reference(tables, bundle_path, protocol)
    return add_fine_tuning(results, protocol, outcome, centralized=centralized)
