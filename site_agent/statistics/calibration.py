"""Calibration of predicted probabilities: Brier score, ECE, calibration intercept and slope.

References
----------
Brier GW (1950). Verification of forecasts expressed in terms of probability. Monthly
Weather Review 78:1–3. doi:10.1175/1520-0493(1950)078<0001:VOFEIT>2.0.CO;2
Naeini MP, Cooper GF, Hauskrecht M (2015). Obtaining well calibrated probabilities using
Bayesian binning. Proceedings of the AAAI Conference on Artificial Intelligence 29:2901–2907.
Cox DR (1958). Two further applications of a model for binary regression. Biometrika
45:562–565. doi:10.1093/biomet/45.3-4.562
Van Calster B, Nieboer D, Vergouwe Y, De Cock B, Pencina MJ, Steyerberg EW (2016). A
calibration hierarchy for risk models was defined: from utopia to empirical data. Journal of
Clinical Epidemiology 74:167–176. doi:10.1016/j.jclinepi.2015.12.005
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
import statsmodels.api as sm
from numpy.typing import ArrayLike, NDArray
from statsmodels.tools.sm_exceptions import (
    ConvergenceWarning,
    PerfectSeparationError,
    PerfectSeparationWarning,
)

from site_agent.exceptions import InputError
from site_agent.statistics.estimates import Estimate, two_sided_z
from site_agent.statistics.roc import validate_scores_labels

SCORE_CLIP = 1e-6
"""Scores are clipped to [SCORE_CLIP, 1 − SCORE_CLIP] before taking the logit."""


@dataclass(frozen=True, slots=True)
class CalibrationFit:
    """Logistic recalibration: calibration-in-the-large intercept and calibration slope.

    A perfectly calibrated model has intercept 0 and slope 1. ``reason`` says why the
    estimates are NaN, or is ``None``.
    """

    intercept: Estimate
    slope: Estimate
    reason: str | None = None


def _check_probabilities(
    scores: ArrayLike, labels: ArrayLike
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    s, y = validate_scores_labels(scores, labels)
    if np.any(s < 0.0) or np.any(s > 1.0):
        raise InputError("calibration needs scores that are probabilities in [0, 1]")
    return s, y.astype(np.float64)


def brier(scores: ArrayLike, labels: ArrayLike) -> float:
    """Return the Brier score, the mean squared difference between score and outcome.

    NaN when there are no cases.

    References
    ----------
    Brier GW (1950). Monthly Weather Review 78:1–3.
    """
    s, y = _check_probabilities(scores, labels)
    if s.size == 0:
        return math.nan
    return float(np.mean((s - y) ** 2))  # Brier (1950): (1/N) Σ (f_i − o_i)²


def expected_calibration_error(
    counts: ArrayLike, score_sums: ArrayLike, label_sums: ArrayLike
) -> float:
    """Return the expected calibration error from per-bin sums.

    ``ECE = Σ_b (n_b / N)·|mean score_b − observed rate_b|`` over non-empty bins, which is
    ``Σ_b |score_sum_b − label_sum_b| / N``. The sums are mergeable across sites. NaN when
    every bin is empty.

    Parameters
    ----------
    counts
        Number of cases per bin.
    score_sums
        Sum of the scores of the cases in each bin.
    label_sums
        Number of positive cases in each bin.

    References
    ----------
    Naeini MP, Cooper GF, Hauskrecht M (2015). AAAI 29:2901–2907, section "Calibration
    measures" (ECE).
    """
    n = np.asarray(counts, dtype=float)
    s = np.asarray(score_sums, dtype=float)
    o = np.asarray(label_sums, dtype=float)
    if n.ndim != 1 or n.shape != s.shape or n.shape != o.shape:
        raise InputError("counts, score sums and label sums must be 1-D of the same length")
    if not (np.all(np.isfinite(n)) and np.all(np.isfinite(s)) and np.all(np.isfinite(o))):
        raise InputError("calibration bin sums must be finite")
    if np.any(n < 0) or np.any(o < 0) or np.any(o > n) or np.any(s < 0) or np.any(s > n):
        raise InputError("calibration bin sums must lie between 0 and the bin count")
    total = float(n.sum())
    if total == 0.0:
        return math.nan
    # Naeini et al. (2015): ECE = Σ_b P(b)·|o_b − e_b| with P(b) = n_b/N, so the n_b cancel.
    return float(np.sum(np.abs(s - o)) / total)


def _undefined_fit(n: int, reason: str, confidence: float) -> CalibrationFit:
    return CalibrationFit(
        Estimate.undefined("logistic-recalibration", n, reason, confidence),
        Estimate.undefined("logistic-recalibration", n, reason, confidence),
        reason,
    )


def _fit_glm(
    y: NDArray[np.float64], exog: NDArray[np.float64], offset: NDArray[np.float64] | None
) -> tuple[NDArray[np.float64], NDArray[np.float64]] | str:
    """Fit a binomial GLM; return (params, bse) or a reason why the fit is not usable."""
    separation = "perfect separation: the logistic recalibration is undefined"
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            result = sm.GLM(y, exog, family=sm.families.Binomial(), offset=offset).fit()
        except PerfectSeparationError:
            return separation
        except (np.linalg.LinAlgError, ValueError, OverflowError):
            return "the logistic recalibration model could not be fitted"
    for w in caught:
        if issubclass(w.category, PerfectSeparationWarning):
            return separation
        if issubclass(w.category, (ConvergenceWarning, RuntimeWarning)):
            return "the logistic recalibration did not converge"
    params = np.asarray(result.params, dtype=np.float64)
    bse = np.asarray(result.bse, dtype=np.float64)
    if not (np.all(np.isfinite(params)) and np.all(np.isfinite(bse))):
        return "the logistic recalibration did not converge"
    return params, bse


def calibration_intercept_slope(
    scores: ArrayLike, labels: ArrayLike, confidence: float = 0.95
) -> CalibrationFit:
    """Return the calibration intercept and slope by logistic recalibration on logit(score).

    The slope ``b`` comes from ``logit P(y = 1) = a + b·logit(p)``; the intercept
    (calibration-in-the-large) from ``logit P(y = 1) = a + offset(logit(p))``, i.e. with the
    slope fixed at 1 (Van Calster et al. 2016). Intervals are Wald intervals from the
    binomial GLM. Scores are clipped to [1e-6, 1 − 1e-6]. NaN with a reason when a class is
    absent, the classes are perfectly separated, or the fit does not converge.

    References
    ----------
    Cox DR (1958). Biometrika 45:562–565. doi:10.1093/biomet/45.3-4.562
    Van Calster B et al. (2016). Journal of Clinical Epidemiology 74:167–176.
    doi:10.1016/j.jclinepi.2015.12.005
    """
    z = two_sided_z(confidence)
    s, y = _check_probabilities(scores, labels)
    n = int(s.size)
    n_pos = int(y.sum())
    if n_pos == 0 or n_pos == n:
        return _undefined_fit(n, "a single outcome class: recalibration undefined", confidence)
    clipped = np.clip(s, SCORE_CLIP, 1.0 - SCORE_CLIP)
    logit = np.log(clipped / (1.0 - clipped))
    ones = np.ones((n, 1))
    # Cox (1958): slope b from logit P(y) = a + b·logit(p).
    slope_fit = (
        _fit_glm(y, np.column_stack([ones, logit]), None)
        if np.ptp(logit) > 0.0
        else "all scores are equal: the calibration slope is undefined"
    )
    # Van Calster et al. (2016): calibration-in-the-large a from logit P(y) = a + logit(p).
    intercept_fit = _fit_glm(y, ones, logit)
    method = "logistic-recalibration"

    def estimate(fit: tuple[NDArray[np.float64], NDArray[np.float64]] | str, i: int) -> Estimate:
        if isinstance(fit, str):
            return Estimate.undefined(method, n, fit, confidence)
        value, se = float(fit[0][i]), float(fit[1][i])
        return Estimate(value, value - z * se, value + z * se, se, method, n, confidence)

    intercept = estimate(intercept_fit, 0)
    slope = estimate(slope_fit, 1)
    return CalibrationFit(intercept, slope, slope.reason or intercept.reason)
