"""Tests of site_agent.statistics.calibration against sklearn, scipy and worked examples."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import brentq
from scipy.special import expit, logit
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import brier_score_loss

from site_agent.exceptions import InputError
from site_agent.statistics.calibration import (
    brier,
    calibration_intercept_slope,
    expected_calibration_error,
)


def _calibrated_cases(seed: int, n: int = 4000) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    p = rng.uniform(0.02, 0.98, size=n)
    return p, (rng.random(n) < p).astype(int)


@pytest.mark.parametrize("seed", [0, 1])
def test_brier_matches_sklearn(seed: int) -> None:
    """The Brier score equals sklearn brier_score_loss."""
    scores, labels = _calibrated_cases(seed, n=300)
    # Reference library: sklearn.metrics.brier_score_loss.
    assert brier(scores, labels) == pytest.approx(brier_score_loss(labels, scores), rel=1e-12)


def test_brier_rejects_scores_outside_unit_interval() -> None:
    """Scores must be probabilities."""
    with pytest.raises(InputError, match="probabilities"):
        brier([0.2, 1.3], [0, 1])


def test_ece_of_a_two_bin_worked_example() -> None:
    """Two bins each off by 0.1 give an ECE of 0.1."""
    # Worked by hand from the definition of Naeini, Cooper & Hauskrecht (2015) AAAI:
    # bin 1: 10 cases, mean score 0.2, 3 positives (|0.2 − 0.3| = 0.1);
    # bin 2: 30 cases, mean score 0.7, 18 positives (|0.7 − 0.6| = 0.1); ECE = 0.1.
    assert expected_calibration_error([10, 30], [2.0, 21.0], [3, 18]) == pytest.approx(0.1)


def test_ece_from_bin_sums_matches_per_case_definition() -> None:
    """ECE from mergeable bin sums equals the weighted mean gap computed case by case."""
    scores, labels = _calibrated_cases(2, n=500)
    scores = scores**1.5  # miscalibrate
    edges = np.linspace(0, 1, 11)
    bins = np.clip(np.digitize(scores, edges[1:-1]), 0, 9)
    counts = np.bincount(bins, minlength=10)
    score_sums = np.bincount(bins, weights=scores, minlength=10)
    label_sums = np.bincount(bins, weights=labels, minlength=10)
    # Naeini et al. (2015): ECE = Σ_b (n_b/N)·|mean score_b − positive rate_b|, non-empty bins.
    expected = sum(
        counts[b] / scores.size * abs(scores[bins == b].mean() - labels[bins == b].mean())
        for b in range(10)
        if counts[b] > 0
    )
    assert expected_calibration_error(counts, score_sums, label_sums) == pytest.approx(expected)


def test_ece_of_empty_bins_is_nan() -> None:
    """No cases at all: ECE undefined."""
    assert math.isnan(expected_calibration_error([0, 0], [0.0, 0.0], [0, 0]))


def test_ece_rejects_more_positives_than_cases() -> None:
    """A bin cannot hold more positives than cases."""
    with pytest.raises(InputError, match="between 0 and the bin count"):
        expected_calibration_error([2], [1.0], [3])


def test_slope_matches_sklearn_unpenalised_logistic_regression() -> None:
    """The calibration slope equals the coefficient of an unpenalised sklearn fit."""
    scores, labels = _calibrated_cases(3, n=800)
    scores = expit(1.7 * logit(scores))  # overconfident scores
    fit = calibration_intercept_slope(scores, labels)
    # Reference library: sklearn LogisticRegression without penalty on logit(score).
    ref = LogisticRegression(C=np.inf, tol=1e-10, max_iter=1000)
    ref.fit(logit(scores).reshape(-1, 1), labels)
    assert fit.slope.estimate == pytest.approx(ref.coef_[0, 0], rel=1e-5)


def test_intercept_solves_the_offset_score_equation_with_fisher_se() -> None:
    """Calibration-in-the-large solves Σ(y − expit(a + logit p)) = 0; SE from Fisher info."""
    scores, labels = _calibrated_cases(4, n=600)
    scores = np.clip(scores + 0.1, 0, 0.99)  # over-predicts risk
    fit = calibration_intercept_slope(scores, labels)
    offset = logit(scores)
    # Independent reference: scipy brentq on the likelihood score equation of the
    # intercept-only logistic model with offset (Van Calster et al. 2016 J Clin Epidemiol).
    a = brentq(lambda t: float(np.sum(labels - expit(t + offset))), -5, 5, xtol=1e-14)
    p_hat = expit(a + offset)
    assert fit.intercept.estimate == pytest.approx(a, abs=1e-7)
    assert fit.intercept.se == pytest.approx(1 / math.sqrt(np.sum(p_hat * (1 - p_hat))), rel=1e-6)
    assert fit.intercept.estimate < 0  # over-prediction gives a negative intercept


def test_calibrated_scores_give_intercept_zero_and_slope_one_within_interval() -> None:
    """Scores drawn as true risks have intercept near 0 and slope near 1."""
    scores, labels = _calibrated_cases(5)
    fit = calibration_intercept_slope(scores, labels)
    # Van Calster et al. (2016) J Clin Epidemiol 74:167: perfect calibration ⇔ a = 0, b = 1.
    assert fit.intercept.lower < 0 < fit.intercept.upper
    assert fit.slope.lower < 1 < fit.slope.upper
    assert fit.reason is None


def test_overconfident_scores_give_slope_near_one_half() -> None:
    """Doubling the logit of true risks gives a calibration slope of about 1/2."""
    scores, labels = _calibrated_cases(6, n=20000)
    fit = calibration_intercept_slope(expit(2 * logit(scores)), labels)
    # logit P(y) = logit(p) = 0.5·logit(p') by construction (Cox 1958 Biometrika 45:562).
    assert fit.slope.estimate == pytest.approx(0.5, abs=3 * fit.slope.se)


def test_single_class_gives_nan_with_reason() -> None:
    """All outcomes negative: recalibration undefined."""
    fit = calibration_intercept_slope([0.1, 0.4, 0.7], [0, 0, 0])
    assert math.isnan(fit.slope.estimate) and math.isnan(fit.intercept.estimate)
    assert fit.reason is not None and "single outcome class" in fit.reason


def test_perfect_separation_gives_nan_slope_with_reason_and_no_warning() -> None:
    """Separated classes: NaN slope and a reason; statsmodels' warning is absorbed."""
    fit = calibration_intercept_slope([0.1, 0.2, 0.3, 0.7, 0.8, 0.9], [0, 0, 0, 1, 1, 1])
    assert math.isnan(fit.slope.estimate)
    assert fit.reason is not None and "separation" in fit.reason
    assert math.isfinite(fit.intercept.estimate)


def test_equal_scores_give_nan_slope_but_an_intercept() -> None:
    """A constant score has no slope; calibration-in-the-large is still defined."""
    fit = calibration_intercept_slope([0.3] * 10, [1, 0, 0, 1, 0, 0, 0, 1, 0, 0])
    assert math.isnan(fit.slope.estimate)
    # Intercept-only with offset logit(0.3): a = logit(0.3 observed) − logit(0.3) = 0.
    assert fit.intercept.estimate == pytest.approx(0.0, abs=1e-8)
