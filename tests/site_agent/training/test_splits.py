"""Tests of site_agent.training.splits: grouping, stratification, determinism and input errors."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from site_agent.exceptions import InputError
from site_agent.training.splits import grouped_kfold, grouped_subsample, grouped_train_test_split


def _site(seed: int, patients: int = 60) -> tuple[np.ndarray, np.ndarray]:
    """Patients with 1–4 images each; about a third of patients are positive."""
    rng = np.random.default_rng(seed)
    sizes = rng.integers(1, 5, size=patients)
    groups = np.repeat(np.arange(patients) * 7 + 100, sizes)  # non-contiguous patient ids
    patient_positive = rng.random(patients) < 0.33
    labels = np.repeat(patient_positive, sizes) & (rng.random(sizes.sum()) < 0.8)
    order = rng.permutation(groups.size)  # rows in no particular order
    return labels[order].astype(int), groups[order]


def _patients(groups: np.ndarray, idx: np.ndarray) -> set[int]:
    return set(groups[idx].tolist())


@pytest.mark.parametrize("k", [2, 5, 10])
def test_kfold_keeps_patients_whole_and_covers_every_case_once(k: int) -> None:
    """No patient is in both parts; test folds partition all observations."""
    labels, groups = _site(0)
    folds = grouped_kfold(labels, groups, k=k, seed=1)
    assert len(folds) == k
    for train, test in folds:
        assert not _patients(groups, train) & _patients(groups, test)
        assert train.size + test.size == labels.size
    np.testing.assert_array_equal(
        np.sort(np.concatenate([t for _, t in folds])), np.arange(labels.size)
    )


def test_kfold_folds_hold_both_classes_near_site_prevalence() -> None:
    """Each test fold holds positives and negatives, near the site prevalence."""
    labels, groups = _site(2, patients=100)
    prevalence = labels.mean()
    for _, test in grouped_kfold(labels, groups, k=5, seed=3):
        assert 0 < labels[test].sum() < test.size
        # Stratified k-fold keeps fold prevalence near the overall one (Kohavi 1995 IJCAI).
        assert abs(labels[test].mean() - prevalence) < 0.1


def test_kfold_is_deterministic_by_seed_and_varies_with_it() -> None:
    """The same seed gives the same folds; another seed gives other folds."""
    labels, groups = _site(4)
    a = grouped_kfold(labels, groups, k=4, seed=11)
    b = grouped_kfold(labels, groups, k=4, seed=11)
    c = grouped_kfold(labels, groups, k=4, seed=12)
    assert all(np.array_equal(x[1], y[1]) for x, y in zip(a, b, strict=True))
    assert not all(np.array_equal(x[1], y[1]) for x, y in zip(a, c, strict=True))


def test_kfold_rejects_more_folds_than_patients() -> None:
    """More folds than patients is invalid input."""
    with pytest.raises(InputError, match="exceeds the number of patients"):
        grouped_kfold([0, 1, 0, 1], ["p1", "p1", "p2", "p3"], k=4, seed=0)


def test_kfold_with_a_rare_class_raises_no_warning() -> None:
    """A class rarer than the number of folds still splits, without a warning."""
    labels = np.r_[np.zeros(20, int), 1]
    folds = grouped_kfold(labels, np.arange(21), k=5, seed=0)
    assert sum(labels[test].sum() for _, test in folds) == 1


def test_train_test_split_keeps_patients_whole_and_fraction_of_patients() -> None:
    """The test part holds about the requested fraction of patients and shares none."""
    labels, groups = _site(5, patients=80)
    train, test = grouped_train_test_split(labels, groups, test_fraction=0.25, seed=2)
    assert not _patients(groups, train) & _patients(groups, test)
    assert len(_patients(groups, test)) == 20
    assert train.size + test.size == labels.size
    assert 0 < labels[test].sum() < test.size


def test_train_test_split_is_deterministic_by_seed() -> None:
    """The same seed gives the same split."""
    labels, groups = _site(6)
    a = grouped_train_test_split(labels, groups, 0.3, seed=9)
    b = grouped_train_test_split(labels, groups, 0.3, seed=9)
    np.testing.assert_array_equal(a[1], b[1])


@pytest.mark.parametrize("fraction", [0.0, 1.0, -0.2])
def test_train_test_split_rejects_fraction_outside_unit_interval(fraction: float) -> None:
    """A test fraction of 0, 1 or below 0 is invalid input."""
    with pytest.raises(InputError, match="test_fraction"):
        grouped_train_test_split([0, 1, 0], [1, 2, 3], fraction, seed=0)


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 10_000), n_cases=st.integers(1, 150))
def test_subsample_takes_whole_patients_and_about_n_cases(seed: int, n_cases: int) -> None:
    """Subsamples hold whole patients and reach n_cases with less than one patient over."""
    labels, groups = _site(7)
    idx = grouped_subsample(labels, groups, n_cases=n_cases, seed=seed)
    chosen = _patients(groups, idx)
    assert idx.size == np.isin(groups, list(chosen)).sum()  # whole patients only
    assert n_cases <= idx.size < n_cases + 4  # patients hold at most 4 observations


def test_subsample_keeps_prevalence_near_the_site() -> None:
    """A subsample of a third of the cases keeps the site's prevalence within 0.08."""
    labels, groups = _site(8, patients=200)
    idx = grouped_subsample(labels, groups, n_cases=labels.size // 3, seed=4)
    # Stratified sampling keeps class shares (common practice).
    assert abs(labels[idx].mean() - labels.mean()) < 0.08


def test_subsample_is_deterministic_by_seed() -> None:
    """The same seed gives the same subsample."""
    labels, groups = _site(9)
    np.testing.assert_array_equal(
        grouped_subsample(labels, groups, 50, seed=3), grouped_subsample(labels, groups, 50, seed=3)
    )


def test_subsample_rejects_more_cases_than_available() -> None:
    """Asking for more observations than the site has is invalid input."""
    with pytest.raises(InputError, match="exceeds the number of observations"):
        grouped_subsample([0, 1], [1, 2], n_cases=3, seed=0)


def test_labels_other_than_zero_or_one_are_rejected() -> None:
    """Labels must be binary."""
    with pytest.raises(InputError, match="labels must be 0 or 1"):
        grouped_kfold([0, 2, 1, 0], [1, 2, 3, 4], k=2, seed=0)
