import numpy as np
import pytest
from scipy.stats import binomtest
from sklearn.metrics import roc_auc_score

from simulations.readers import binary_calls, ordinal_scores, reader_columns
from simulations.scenario import ReaderSpec

N_PER_CLASS = 20_000
LABELS = np.repeat([1, 0], N_PER_CLASS).astype(np.int64)


def _covers(successes: int, n: int, value: float) -> bool:
    # Exact (Clopper-Pearson) 99.99 % interval from scipy.stats.binomtest; checking a set
    # rate against a binomial interval is common practice.
    interval = binomtest(successes, n).proportion_ci(confidence_level=0.9999)
    return bool(interval.low <= value <= interval.high)


@pytest.mark.parametrize(("sensitivity", "specificity"), [(0.9, 0.92), (0.6, 0.75)])
def test_binary_reader_hits_set_sensitivity_and_specificity(
    sensitivity: float, specificity: float
) -> None:
    """Empirical sensitivity and specificity fall in binomial intervals around set values."""
    calls = binary_calls(LABELS, sensitivity, specificity, np.random.default_rng(0))
    assert set(np.unique(calls)) == {0, 1}
    assert _covers(int(calls[LABELS == 1].sum()), N_PER_CLASS, sensitivity)
    assert _covers(int((calls[LABELS == 0] == 0).sum()), N_PER_CLASS, specificity)


@pytest.mark.parametrize(("sensitivity", "specificity"), [(0.82, 0.88), (0.7, 0.95)])
def test_ordinal_reader_score_3_or_more_has_set_operating_point(
    sensitivity: float, specificity: float
) -> None:
    """Scores are 1..5, all used, and 'score >= 3' has the set sensitivity and specificity."""
    scores = ordinal_scores(LABELS, sensitivity, specificity, np.random.default_rng(1))
    assert set(np.unique(scores)) == {1, 2, 3, 4, 5}
    positive_call = scores >= 3
    assert _covers(int(positive_call[LABELS == 1].sum()), N_PER_CLASS, sensitivity)
    assert _covers(int((~positive_call[LABELS == 0]).sum()), N_PER_CLASS, specificity)


def test_ordinal_reader_auc_is_below_its_continuous_binormal_auc() -> None:
    """Discretising to 5 levels loses some of the binormal AUC Phi(mu / sqrt 2), not all."""
    from scipy.stats import norm

    sensitivity, specificity = 0.82, 0.88
    mu = norm.ppf(specificity) + norm.ppf(sensitivity)
    continuous = norm.cdf(mu / np.sqrt(2))  # binormal AUC (Dorfman & Alf 1969)
    scores = ordinal_scores(LABELS, sensitivity, specificity, np.random.default_rng(2))
    empirical = roc_auc_score(LABELS, scores)  # reference: scikit-learn
    # Ties between equal scores cost AUC; 0.06 is our own bound on that loss for five
    # levels 0.75 latent SD apart, not a published value. SE of the AUC here is about 0.002.
    assert continuous - 0.06 < empirical < continuous


def test_reader_columns_are_named_and_typed_by_spec() -> None:
    """Each reader gives a reader_<name> column; ordinal readers score 1..5."""
    readers = (
        ReaderSpec(name="consultant", sensitivity=0.9, specificity=0.9),
        ReaderSpec(name="trainee", sensitivity=0.8, specificity=0.8, ordinal=True),
    )
    columns = reader_columns(LABELS[:100], readers, np.random.default_rng(0))
    assert list(columns) == ["reader_consultant", "reader_trainee"]
    assert set(np.unique(columns["reader_consultant"])) <= {0, 1}
    assert columns["reader_trainee"].min() >= 1 and columns["reader_trainee"].max() <= 5
