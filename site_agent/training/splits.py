"""Patient-grouped splits of a site's cases: k-fold, train/test, and subsamples.

Every split keeps all observations of a patient (group) on one side, so that no patient
is both trained on and tested on, and stratifies on the label so that each part keeps the
site's prevalence as far as whole patients allow. A patient's label for stratification is
the maximum of its observation labels (a patient with any positive observation is a
positive patient). All splits are deterministic given ``seed``.

References
----------
Kohavi R (1995). A study of cross-validation and bootstrap for accuracy estimation and
model selection. Proceedings of IJCAI 14:1137–1143 (stratified k-fold).
Pedregosa F et al. (2011). Scikit-learn: machine learning in Python. Journal of Machine
Learning Research 12:2825–2830 (``StratifiedGroupKFold``).
"""

from __future__ import annotations

import warnings

import numpy as np
from numpy.typing import ArrayLike, NDArray
from sklearn.model_selection import StratifiedGroupKFold, train_test_split

from site_agent.exceptions import InputError

IndexArray = NDArray[np.intp]


def _check(labels: ArrayLike, groups: ArrayLike) -> tuple[NDArray[np.int64], NDArray[np.intp]]:
    """Validate labels (0/1) and groups; return labels and a dense group index per row."""
    y = np.asarray(labels)
    g = np.asarray(groups)
    if y.ndim != 1 or g.ndim != 1 or y.shape != g.shape:
        raise InputError("labels and groups must be 1-D arrays of the same length")
    if y.size == 0:
        raise InputError("there are no cases to split")
    if y.dtype.kind not in "biuf" or not np.all((y == 0) | (y == 1)):
        raise InputError("labels must be 0 or 1")
    try:
        _, group_index = np.unique(g, return_inverse=True)
    except TypeError:
        raise InputError("group identifiers must be comparable with each other") from None
    return y.astype(np.int64), group_index.reshape(-1).astype(np.intp)


def _patient_labels(y: NDArray[np.int64], group_index: NDArray[np.intp]) -> NDArray[np.int64]:
    n_groups = int(group_index.max()) + 1
    out = np.zeros(n_groups, dtype=np.int64)
    np.maximum.at(out, group_index, y)
    return out


def _check_seed(seed: int) -> None:
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or seed < 0:
        raise InputError("seed must be a non-negative integer")


def grouped_kfold(
    labels: ArrayLike, groups: ArrayLike, k: int, seed: int
) -> list[tuple[IndexArray, IndexArray]]:
    """Return ``k`` (train, test) index pairs, grouped by patient and stratified by label.

    Uses scikit-learn's ``StratifiedGroupKFold`` with shuffling. Every observation is in
    exactly one test fold; no patient appears in both parts of a pair.

    Raises
    ------
    InputError
        If ``k < 2``, ``k`` exceeds the number of patients, or the inputs are malformed.
    """
    _check_seed(seed)
    y, group_index = _check(labels, groups)
    n_groups = int(group_index.max()) + 1
    if isinstance(k, bool) or not isinstance(k, int | np.integer) or k < 2:
        raise InputError("k must be an integer of at least 2")
    if k > n_groups:
        raise InputError("k exceeds the number of patients")
    splitter = StratifiedGroupKFold(n_splits=int(k), shuffle=True, random_state=int(seed))
    with warnings.catch_warnings():
        # sklearn warns when a class has fewer members than folds; folds are still valid.
        warnings.filterwarnings("ignore", message="The least populated class", category=UserWarning)
        folds = [
            (np.sort(train).astype(np.intp), np.sort(test).astype(np.intp))
            for train, test in splitter.split(np.zeros(y.size), y, group_index)
        ]
    if any(test.size == 0 for _, test in folds):  # pragma: no cover - sklearn guarantees this
        raise InputError("a fold is empty: use fewer folds")
    return folds


def grouped_train_test_split(
    labels: ArrayLike, groups: ArrayLike, test_fraction: float, seed: int
) -> tuple[IndexArray, IndexArray]:
    """Return (train, test) observation indices with about ``test_fraction`` of patients in test.

    Patients are split, stratified by patient label when each class has at least two
    patients; both parts get at least one patient.

    Raises
    ------
    InputError
        If ``test_fraction`` is not in (0, 1), there are fewer than two patients, or the
        inputs are malformed.
    """
    _check_seed(seed)
    y, group_index = _check(labels, groups)
    if not 0.0 < test_fraction < 1.0:
        raise InputError("test_fraction must lie strictly between 0 and 1")
    patient_y = _patient_labels(y, group_index)
    n_groups = patient_y.size
    if n_groups < 2:
        raise InputError("at least two patients are needed for a train/test split")
    n_test = min(max(round(test_fraction * n_groups), 1), n_groups - 1)
    counts = np.bincount(patient_y, minlength=2)
    can_stratify = bool(np.all(counts >= 2)) and min(n_test, n_groups - n_test) >= 2
    _, test_groups = train_test_split(
        np.arange(n_groups),
        test_size=n_test,
        random_state=int(seed),
        stratify=patient_y if can_stratify else None,
    )
    in_test = np.isin(group_index, test_groups)
    return np.flatnonzero(~in_test).astype(np.intp), np.flatnonzero(in_test).astype(np.intp)


def grouped_subsample(labels: ArrayLike, groups: ArrayLike, n_cases: int, seed: int) -> IndexArray:
    """Return sorted indices of whole patients totalling about ``n_cases`` observations.

    Patients are drawn at random within two strata, positive and negative patients; each
    next patient comes from the stratum furthest below its share of ``n_cases``, so the
    subsample keeps the site's mix of positive and negative patients' observations. Drawing
    stops at the first patient that brings the total to ``n_cases`` or more.

    Raises
    ------
    InputError
        If ``n_cases`` is less than 1 or more than the number of observations, or the
        inputs are malformed.
    """
    _check_seed(seed)
    y, group_index = _check(labels, groups)
    if isinstance(n_cases, bool) or not isinstance(n_cases, int | np.integer) or n_cases < 1:
        raise InputError("n_cases must be a positive integer")
    if n_cases > y.size:
        raise InputError("n_cases exceeds the number of observations")
    patient_y = _patient_labels(y, group_index)
    sizes = np.bincount(group_index)
    rng = np.random.default_rng(int(seed))
    queues = [list(rng.permutation(np.flatnonzero(patient_y == c))) for c in (0, 1)]
    share = np.array([sizes[patient_y == c].sum() for c in (0, 1)], dtype=float) / y.size
    target = share * n_cases
    taken = np.zeros(2)
    chosen: list[int] = []
    while taken.sum() < n_cases:
        deficits = [target[c] - taken[c] if queues[c] else -np.inf for c in (0, 1)]
        stratum = int(np.argmax(deficits))
        patient = int(queues[stratum].pop())
        chosen.append(patient)
        taken[stratum] += sizes[patient]
    return np.flatnonzero(np.isin(group_index, chosen)).astype(np.intp)
