"""Fine-tuning at the site: the local split, the training loop, and what it releases.

A site's labelled cases are split once, seeded by the protocol's
:class:`~site_agent.contract.protocol.AdaptationPlan`, into a local *training pool* and a held-out
*test set*, by whole patients and stratified by label
(:func:`site_agent.training.splits.grouped_train_test_split`). Every training step, site-local or
federated, sees pool cases only; every released metric is computed on the test set; no
choice (steps, learning rate, penalty) is made by looking at either, since the plan fixes
them in advance.

Training is full fine-tuning of the bundle's small model from its weights, by full-batch
Adam for a fixed number of steps on the mean cross-entropy plus two optional quadratic
pulls: ``l2_to_initial / 2 · ||w − w₀||²`` towards the starting weights (site-local
adaptation, the "L2-SP" regulariser) and ``μ / 2 · ||w − wᵗ||²`` towards the round's global
weights (FedProx). Inputs are standardised with the bundle's own means and SDs. Training
runs on one CPU thread; it is deterministic for a seed.

References
----------
X. Li, Y. Grandvalet, F. Davoine (2018). Explicit inductive bias for transfer learning with
convolutional networks. ICML, PMLR 80:2825-2834 (L2-SP). arXiv: 1802.01483
T. Li, A.K. Sahu, M. Zaheer, M. Sanjabi, A. Talwalkar, V. Smith (2020). Federated
optimization in heterogeneous networks. MLSys 2:429-450 (FedProx). arXiv: 1812.06127
D.P. Kingma, J. Ba (2015). Adam: a method for stochastic optimization. ICLR. arXiv: 1412.6980
"""

from __future__ import annotations

import copy
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
import pandas as pd
import torch

from site_agent.contract.adaptation_release import (
    AdaptationPoint,
    AdaptationRelease,
    AucChange,
    Performance,
    ThresholdPerformance,
)
from site_agent.contract.protocol import AdaptationPlan
from site_agent.contract.release import AucRecord, EstimateRecord
from site_agent.exceptions import InputError
from site_agent.statistics.proportions import wilson
from site_agent.statistics.roc import delong, paired_delong
from site_agent.training.model_bundle import ModelBundle, single_thread, standardise
from site_agent.training.splits import IndexArray, grouped_subsample, grouped_train_test_split

TrainingObserver = Callable[[npt.NDArray[np.str_]], None]
"""Called with the case ids of every training step (tests use it to audit the split)."""
State = dict[str, npt.NDArray[np.float32]]
"""A model's weights by parameter name, as numpy arrays (what crosses the wire)."""


@dataclass(frozen=True)
class LocalData:
    """A site's labelled cases, standardised for the bundle, and their local split.

    Attributes
    ----------
    x, y
        Standardised features and 0/1 labels of the labelled cases, in table order.
    case_ids, patient_ids
        Identifiers of those cases; they never leave the site.
    pool, test
        Row indices (into ``x``) of the local training pool and the held-out test set.
    """

    x: torch.Tensor
    y: torch.Tensor
    case_ids: npt.NDArray[np.str_]
    patient_ids: npt.NDArray[np.str_]
    pool: IndexArray
    test: IndexArray


def local_data(frame: pd.DataFrame, bundle: ModelBundle, plan: AdaptationPlan) -> LocalData:
    """Standardise a site's labelled cases for ``bundle`` and split them as ``plan`` says.

    Cases without a 0/1 label (reference standard pending) are left out. Without a
    ``patient_id`` column every case is its own patient.

    Raises
    ------
    InputError
        If ``label`` or a feature column is missing or invalid, or fewer than two
        patients are labelled.
    """
    if "label" not in frame.columns:
        raise InputError("the site table has no 'label' column")
    labels = pd.to_numeric(frame["label"], errors="coerce")
    labelled = frame.loc[labels.isin([0, 1]).to_numpy()].reset_index(drop=True)
    y = labels[labels.isin([0, 1])].to_numpy(dtype=np.int64)
    index = np.arange(len(labelled)).astype(str)
    case_ids = labelled["case_id"].astype(str).to_numpy() if "case_id" in labelled else index
    patients = (
        labelled["patient_id"].astype(str).to_numpy() if "patient_id" in labelled else case_ids
    )
    pool, test = grouped_train_test_split(y, patients, plan.test_fraction, plan.seed)
    return LocalData(
        x=standardise(labelled, bundle.manifest),
        y=torch.from_numpy(y.astype(np.float32)),
        case_ids=case_ids.astype(np.str_),
        patient_ids=patients.astype(np.str_),
        pool=pool,
        test=test,
    )


def get_state(model: torch.nn.Module) -> State:
    """Return a model's weights as float32 numpy arrays (copies), by parameter name."""
    return {
        k: v.detach().cpu().numpy().astype(np.float32).copy() for k, v in model.state_dict().items()
    }


def with_state(
    bundle: ModelBundle, state: Mapping[str, npt.NDArray[np.floating]]
) -> torch.nn.Module:
    """Return a copy of the bundle's model carrying ``state`` instead of its own weights.

    Raises
    ------
    InputError
        If ``state`` does not fit the bundle's architecture or holds non-finite values.
    """
    model = copy.deepcopy(bundle.model)
    expected = model.state_dict()
    if set(state) != set(expected) or any(
        tuple(np.shape(state[k])) != tuple(v.shape) for k, v in expected.items()
    ):
        raise InputError("the weights sent do not fit the model bundle's architecture")
    if not all(np.all(np.isfinite(state[k])) for k in expected):
        raise InputError("the weights sent contain non-finite values")
    model.load_state_dict(
        {k: torch.as_tensor(np.asarray(state[k], dtype=np.float32)) for k in expected}
    )
    model.eval()
    return model


def fine_tune(
    model: torch.nn.Module,
    data: LocalData,
    rows: IndexArray,
    *,
    steps: int,
    learning_rate: float,
    l2_to_initial: float = 0.0,
    proximal_mu: float = 0.0,
    observe: TrainingObserver | None = None,
) -> torch.nn.Module:
    """Fine-tune ``model`` in place on the pool rows ``rows`` of ``data``; return it.

    Both quadratic pulls are towards ``model``'s weights at the call: site-local adaptation
    starts from the bundle, a federated round from the global weights (see module doc).

    Raises
    ------
    InputError
        If a row is not in the training pool (the test set is never trained on).
    """
    if not np.all(np.isin(rows, data.pool)):
        raise InputError("fine-tuning was asked to use cases outside the training pool")
    if rows.size == 0 or steps == 0:
        return model
    x, y, ids = data.x[rows], data.y[rows], data.case_ids[rows]
    start = [p.detach().clone() for p in model.parameters()]
    pull = l2_to_initial + proximal_mu
    bce = torch.nn.BCEWithLogitsLoss()
    model.train()
    with single_thread():
        optimizer = torch.optim.Adam(model.parameters(), lr=learning_rate)
        for _ in range(steps):
            if observe is not None:
                observe(ids)
            optimizer.zero_grad()
            loss: torch.Tensor = bce(model(x), y)
            if pull > 0:
                # (λ + μ)/2 · ||w − w₀||²: L2-SP (Li et al. 2018) and FedProx (Li et al. 2020)
                distance = sum(
                    (
                        (p - p0).pow(2).sum()
                        for p, p0 in zip(model.parameters(), start, strict=True)
                    ),
                    torch.zeros(()),
                )
                loss = loss + 0.5 * pull * distance
            loss.backward()  # type: ignore[no-untyped-call]
            optimizer.step()
    model.eval()
    return model


def held_out_scores(model: torch.nn.Module, data: LocalData) -> npt.NDArray[np.float64]:
    """Return the model's scores (probabilities) on the held-out test set, in row order."""
    with single_thread(), torch.no_grad():
        return torch.sigmoid(model(data.x[data.test])).numpy().astype(np.float64)


def auc_change(
    after: torch.nn.Module, before: torch.nn.Module, data: LocalData, confidence: float = 0.95
) -> AucChange:
    """Return the paired DeLong difference of AUCs, ``after − before``, on the test set.

    References
    ----------
    DeLong ER, DeLong DM, Clarke-Pearson DL (1988). Biometrics 44:837-845, eqs. 5-6
    (see :func:`site_agent.statistics.roc.paired_delong`).
    """
    labels = data.y[data.test].numpy().astype(np.int64)
    # DeLong et al. (1988) eqs. 5-6: both models scored on the same held-out cases.
    difference = paired_delong(
        held_out_scores(after, data), held_out_scores(before, data), labels, confidence
    )
    return AucChange.of(difference)


def performance(
    model: torch.nn.Module, data: LocalData, thresholds: Sequence[float], confidence: float = 0.95
) -> Performance:
    """Return the model's DeLong AUC and Wilson sensitivity/specificity on the test set.

    A case is called positive when its score is ``>= threshold`` (common practice, as in
    :mod:`site_agent.statistics.summaries`).

    References
    ----------
    DeLong ER, DeLong DM, Clarke-Pearson DL (1988). Biometrics 44:837-845 (see
    :func:`site_agent.statistics.roc.delong`). Wilson EB (1927). JASA 22:209-212 (see
    :func:`site_agent.statistics.proportions.wilson`).
    """
    scores = held_out_scores(model, data)
    labels = data.y[data.test].numpy().astype(np.int64)
    positive, negative = labels == 1, labels == 0
    rows = []
    for t in sorted(set(thresholds)):
        called = scores >= t
        tp, fn = int((positive & called).sum()), int((positive & ~called).sum())
        fp, tn = int((negative & called).sum()), int((negative & ~called).sum())
        rows.append(
            ThresholdPerformance(
                threshold=t,
                tp=tp,
                fp=fp,
                fn=fn,
                tn=tn,
                sensitivity=EstimateRecord.of(wilson(tp, tp + fn, confidence)),
                specificity=EstimateRecord.of(wilson(tn, tn + fp, confidence)),
            )
        )
    return Performance(
        auc=AucRecord.of(delong(scores, labels, confidence)), at_thresholds=tuple(rows)
    )


def adapt_site(
    data: LocalData,
    bundle: ModelBundle,
    plan: AdaptationPlan,
    thresholds: Sequence[float],
    *,
    site: str,
    protocol_hash: str,
    observe: TrainingObserver | None = None,
) -> AdaptationRelease:
    """Fine-tune on every (case count, seed) of ``plan`` and measure each on the test set.

    A case count larger than the pool is skipped (it is not in the release). Repeat ``r``
    draws its cases with seed ``plan.seed + r`` by
    :func:`site_agent.training.splits.grouped_subsample`.
    Each fine-tuned point carries the paired DeLong difference after − before
    (:func:`auc_change`) on the same held-out cases.
    """
    before = performance(bundle.model, data, thresholds)
    counts: list[int | None] = [n for n in plan.case_counts if n <= data.pool.size]
    if plan.include_all:
        counts.append(None)
    points = []
    for requested in counts:
        for r in range(plan.repeats):
            seed = plan.seed + r
            if requested == 0:
                points.append(AdaptationPoint(n_requested=0, n_used=0, seed=seed, after=before))
                continue
            rows = _training_rows(data, requested, seed)
            model = _adapted(bundle, data, rows, plan, observe)
            points.append(
                AdaptationPoint(
                    n_requested=requested,
                    n_used=int(rows.size),
                    seed=seed,
                    after=performance(model, data, thresholds),
                    change=auc_change(model, bundle.model, data),
                )
            )
    return _release(data, site, protocol_hash, "bundle", before, tuple(points))


def local_update(
    data: LocalData,
    bundle: ModelBundle,
    plan: AdaptationPlan,
    *,
    observe: TrainingObserver | None = None,
) -> State:
    """Return the site-local update, fine-tuned minus initial weights, of the plan's last point.

    The update is that of the grid's largest training set with the plan's first seed: the
    whole pool when ``plan.include_all``, else the largest case count the pool holds. The
    training is the grid's own (deterministic), so it is the model measured at that point.

    Raises
    ------
    InputError
        If the plan trains on no case at this site.
    """
    counts = [n for n in plan.case_counts if 0 < n <= data.pool.size]
    if not plan.include_all and not counts:
        raise InputError("the adaptation plan trains on no case at this site")
    requested = None if plan.include_all else max(counts)
    rows = _training_rows(data, requested, plan.seed)
    initial = get_state(bundle.model)
    adapted = get_state(_adapted(bundle, data, rows, plan, observe))
    return {k: adapted[k] - initial[k] for k in initial}


def evaluate_state(
    data: LocalData,
    bundle: ModelBundle,
    state: Mapping[str, npt.NDArray[np.floating]],
    thresholds: Sequence[float],
    *,
    site: str,
    protocol_hash: str,
) -> AdaptationRelease:
    """Measure weights sent by the coordinator (e.g. a federated model) on the test set."""
    before = performance(with_state(bundle, state), data, thresholds)
    return _release(data, site, protocol_hash, "sent", before, ())


def train_round(
    data: LocalData,
    bundle: ModelBundle,
    state: Mapping[str, npt.NDArray[np.floating]],
    plan: AdaptationPlan,
    *,
    proximal_mu: float = 0.0,
    observe: TrainingObserver | None = None,
) -> tuple[State, int]:
    """Run one federated round's local training on the whole pool; return weights and n."""
    model = fine_tune(
        with_state(bundle, state),
        data,
        data.pool,
        steps=plan.local_epochs,
        learning_rate=plan.learning_rate,
        proximal_mu=proximal_mu,
        observe=observe,
    )
    return get_state(model), int(data.pool.size)


def _training_rows(data: LocalData, requested: int | None, seed: int) -> IndexArray:
    """Pool rows for one grid point: the whole pool (None) or ``requested`` cases by patient."""
    if requested is None:
        return data.pool
    y_pool = data.y[data.pool].numpy().astype(np.int64)
    chosen = grouped_subsample(y_pool, data.patient_ids[data.pool], requested, seed)
    return data.pool[chosen]


def _adapted(
    bundle: ModelBundle,
    data: LocalData,
    rows: IndexArray,
    plan: AdaptationPlan,
    observe: TrainingObserver | None,
) -> torch.nn.Module:
    return fine_tune(
        copy.deepcopy(bundle.model),
        data,
        rows,
        steps=plan.epochs,
        learning_rate=plan.learning_rate,
        l2_to_initial=plan.l2_to_initial,
        observe=observe,
    )


def _release(
    data: LocalData,
    site: str,
    protocol_hash: str,
    weights: str,
    before: Performance,
    points: tuple[AdaptationPoint, ...],
) -> AdaptationRelease:
    y_test = data.y[data.test]
    n_positive = int(y_test.sum().item())
    return AdaptationRelease(
        site=site,
        protocol_hash=protocol_hash,
        weights=weights,
        n_pool=int(data.pool.size),
        n_test=int(data.test.size),
        n_test_positive=n_positive,
        n_test_negative=int(data.test.size) - n_positive,
        before=before,
        points=points,
    )
