"""Cases needed to validate a binary-outcome prediction model externally (Riley et al. 2021).

Three criteria, each asking for a precise estimate of one measure of performance at
the anticipated outcome proportion ``phi`` and C-statistic ``C``:

1. **Calibration-in-the-large, O/E.** ``SE(ln(O/E)) = sqrt((1 - phi) / (n phi))``, so
   ``n = (1 - phi) / (phi SE²)``; the target SE comes from the wanted width ``w`` of the
   interval ``O/E · exp(± z SE)``: ``w = 2 (O/E) sinh(z SE)``.
2. **Calibration slope.** For a model that is well calibrated in the new population
   (intercept 0, slope 1 on its linear predictor ``LP``), the variance of the fitted
   slope is ``I_aa / (n (I_aa I_bb - I_ab²))`` with per-case Fisher information
   ``I_aa = E[p(1 - p)]``, ``I_ab = E[LP p(1 - p)]``, ``I_bb = E[LP² p(1 - p)]``,
   ``p = expit(LP)``; the target SE is ``w / (2z)`` for an interval of width ``w``.
3. **C-statistic.** Newcombe's (2006) form of the Hanley-McNeil variance with
   ``n/2`` cases in each class: ``Var(C) = C(1 - C)[1 + (n/2 - 1)(1 - C)/(2 - C) +
   (n/2 - 1) C/(1 + C)] / (n² phi (1 - phi))``; target SE ``w / (2z)``.

The expectations of criterion 2 need the distribution of ``LP`` in the validation
population. Riley et al. (2021) take it from what is known of the model: in their
worked example the linear predictor distribution published with the model. Three ways
are offered here, in that order of preference:

* ``lp_values``: values of the linear predictor (a previous cohort's, or a fine quantile
  grid of a published distribution), each weighted equally;
* ``lp_mean`` and ``lp_sd``: a published normal distribution, integrated by quadrature;
* neither: ``LP ~ Normal(mu, sigma²)`` with ``mu`` and ``sigma`` chosen so that the mean
  risk is ``phi`` and the C-statistic is ``C``, the marginal-normal assumption of Pavlou
  et al. (2021), solved here exactly by quadrature and root finding
  (:func:`linear_predictor_distribution`).

The three can disagree a lot: a published distribution need not be consistent with the
anticipated ``phi`` and ``C`` (the heart-valve example of Riley et al. 2021, as the
pmvalsampsize documentation gives it: ``LP`` about ``Normal(-5, 2.5²)``, whose mean risk
is 0.05 and C 0.93, against ``phi`` 0.018 and C 0.8), and the criterion follows the spread
of ``LP`` where ``p(1 - p)`` is not small. The study needs the largest of the three
criteria.

References
----------
Riley RD, Debray TPA, Collins GS, Archer L, Ensor J, van Smeden M, Snell KIE (2021).
    Minimum sample size for external validation of a clinical prediction model with a
    binary outcome. Statistics in Medicine 40(19):4230-4251. doi:10.1002/sim.9025
Pavlou M et al. (2021). Estimation of required sample size for external validation of
    risk models for binary outcomes. Statistical Methods in Medical Research.
    doi:10.1177/09622802211007522 (the R package sampsizeval implements it)
Newcombe RG (2006). Confidence intervals for an effect size measure based on the
    Mann-Whitney statistic. Part 2: asymptotic methods and evaluation. Statistics in
    Medicine 25(4):559-573. doi:10.1002/sim.2324
Hanley JA, McNeil BJ (1982). Radiology 143(1):29-36. doi:10.1148/radiology.143.1.7063747
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import optimize, stats

from coordinator.planning.sample_size import (
    SampleSize,
    check_fraction,
    check_positive,
    smallest_n,
)
from site_agent.exceptions import InputError
from site_agent.statistics.estimates import two_sided_z

SOURCE = "Riley et al. (2021)"
_GRID = 4001
_SPAN = 9.0  # grid covers mu ± 9 sigma


@dataclass(frozen=True, slots=True)
class ExternalValidationSize:
    """The three criteria of Riley et al. (2021) and the number that satisfies them all."""

    observed_expected: SampleSize
    calibration_slope: SampleSize
    c_statistic: SampleSize
    lp_mean: float
    lp_sd: float

    @property
    def n_total(self) -> int:
        """Cases meeting every criterion: the largest of the three."""
        return max(c.n_total for c in self.criteria)

    @property
    def criteria(self) -> tuple[SampleSize, SampleSize, SampleSize]:
        """The three criteria in the paper's order."""
        return (self.observed_expected, self.calibration_slope, self.c_statistic)


def linear_predictor_distribution(prevalence: float, c_statistic: float) -> tuple[float, float]:
    """Return ``(mu, sigma)`` of a normal ``LP`` with mean risk ``phi`` and C-statistic ``C``.

    ``E[expit(LP)] = phi`` and ``P(LP_case > LP_non-case) = C``: the marginal-normal
    linear predictor of Pavlou et al. (2021), whose equations (7)-(8) approximate
    ``mu`` and ``sigma``; solved here exactly by quadrature and root finding.

    Raises
    ------
    InputError
        ``prevalence`` outside (0, 1) or ``c_statistic`` outside (0.5, 0.99].
    """
    check_fraction(prevalence, "prevalence")
    if not (math.isfinite(c_statistic) and 0.5 < c_statistic <= 0.99):
        raise InputError(f"c_statistic must lie in (0.5, 0.99], got {c_statistic}")

    def mean_for(sigma: float) -> float:
        return float(
            optimize.brentq(lambda mu: _mean_risk(mu, sigma) - prevalence, -40.0, 40.0, xtol=1e-12)
        )

    def c_gap(sigma: float) -> float:
        return _c_statistic(mean_for(sigma), sigma) - c_statistic

    sigma = float(optimize.brentq(c_gap, 1e-3, 15.0, xtol=1e-10))
    return mean_for(sigma), sigma


def cases_for_observed_expected(
    prevalence: float, ci_width: float = 0.2, *, oe: float = 1.0, confidence: float = 0.95
) -> SampleSize:
    """Return the cases for an O/E interval of width ``ci_width`` (criterion 1).

    References
    ----------
    Riley RD et al. (2021). Stat Med 40(19):4230-4251, criterion 1.
    """
    check_fraction(prevalence, "prevalence")
    check_positive(ci_width, "ci_width")
    check_positive(oe, "oe")
    z = two_sided_z(confidence)
    target_se = math.asinh(ci_width / (2.0 * oe)) / z  # width = 2 (O/E) sinh(z SE)

    def se(n: int) -> float:
        return math.sqrt((1.0 - prevalence) / (n * prevalence))  # SE(ln O/E), Riley et al.

    n = smallest_n(se, target_se)
    return SampleSize(
        criterion=f"O/E {confidence:.0%} CI width <= {ci_width:g} (O/E {oe:g})",
        n_total=n,
        n_events=math.ceil(n * prevalence),
        target=target_se,
        achieved=se(n),
        source=SOURCE,
        notes=(f"SE of ln(O/E) at most {target_se:.4f}; outcome proportion {prevalence:g}",),
    )


def calibration_slope_variance(n: float, lp_mean: float, lp_sd: float) -> float:
    """Return the variance of the calibration slope at ``n`` cases, ``LP`` normal (criterion 2).

    References
    ----------
    Riley RD et al. (2021). Stat Med 40(19):4230-4251, criterion 2.
    """
    x, w = _normal_grid(lp_mean, lp_sd)
    return _slope_variance_per_case(x, w) / n


def calibration_slope_variance_of_values(n: float, lp_values: ArrayLike) -> float:
    """Return the variance of the calibration slope at ``n`` cases for a given ``LP`` sample.

    The expectations of the Fisher information are means over ``lp_values`` (each value
    weighted equally), as pmvalsampsize takes them over a simulated sample.

    References
    ----------
    Riley RD et al. (2021). Stat Med 40(19):4230-4251, criterion 2.
    """
    x = _checked_values(lp_values)
    return _slope_variance_per_case(x, np.full(x.size, 1.0 / x.size)) / n


def cases_for_calibration_slope(
    prevalence: float,
    c_statistic: float,
    ci_width: float = 0.2,
    *,
    confidence: float = 0.95,
    lp_mean: float | None = None,
    lp_sd: float | None = None,
    lp_values: ArrayLike | None = None,
) -> SampleSize:
    """Return the cases for a calibration-slope interval of width ``ci_width`` (criterion 2).

    The linear predictor's distribution is ``lp_values`` if given, else
    ``Normal(lp_mean, lp_sd²)`` if both are given, else the normal distribution with mean
    risk ``prevalence`` and C-statistic ``c_statistic`` (module docstring).
    ``prevalence`` also gives the expected number of events.

    Raises
    ------
    InputError
        Only one of ``lp_mean`` and ``lp_sd``, both a normal and ``lp_values``, or a
        value out of range.

    References
    ----------
    Riley RD et al. (2021). Stat Med 40(19):4230-4251, criterion 2.
    """
    check_fraction(prevalence, "prevalence")
    lp = _linear_predictor(prevalence, c_statistic, lp_mean, lp_sd, lp_values)
    return _slope_size(prevalence, lp, ci_width, confidence)


def _slope_size(
    prevalence: float, lp: _LinearPredictor, ci_width: float, confidence: float
) -> SampleSize:
    check_positive(ci_width, "ci_width")
    z = two_sided_z(confidence)
    target_se = ci_width / (2.0 * z)
    n = math.ceil(lp.per_case / target_se**2 - 1e-9)
    return SampleSize(
        criterion=f"calibration slope {confidence:.0%} CI width <= {ci_width:g}",
        n_total=n,
        n_events=math.ceil(n * prevalence),
        target=target_se,
        achieved=math.sqrt(lp.per_case / n),
        source=SOURCE,
        notes=(f"linear predictor {lp.description}; slope 1 assumed",),
    )


def c_statistic_variance(c_statistic: float, n: float, prevalence: float) -> float:
    """Return Newcombe's (2006) variance of the C-statistic at ``n`` cases (criterion 3).

    References
    ----------
    Newcombe RG (2006). Stat Med 25(4):559-573.
    Riley RD et al. (2021). Stat Med 40(19):4230-4251, criterion 3.
    """
    c, half = c_statistic, n / 2.0 - 1.0
    return (c * (1.0 - c) * (1.0 + half * (1.0 - c) / (2.0 - c) + half * c / (1.0 + c))) / (
        n * n * prevalence * (1.0 - prevalence)
    )


def cases_for_c_statistic(
    prevalence: float, c_statistic: float, ci_width: float = 0.1, *, confidence: float = 0.95
) -> SampleSize:
    """Return the cases for a C-statistic interval of width ``ci_width`` (criterion 3).

    References
    ----------
    Riley RD et al. (2021). Stat Med 40(19):4230-4251, criterion 3.
    """
    check_fraction(prevalence, "prevalence")
    check_fraction(c_statistic, "c_statistic")
    check_positive(ci_width, "ci_width")
    z = two_sided_z(confidence)
    target_se = ci_width / (2.0 * z)

    def se(n: int) -> float:
        return math.sqrt(c_statistic_variance(c_statistic, n, prevalence))

    n = smallest_n(se, target_se, start=4)
    return SampleSize(
        criterion=f"C-statistic {confidence:.0%} CI width <= {ci_width:g}",
        n_total=n,
        n_events=math.ceil(n * prevalence),
        target=target_se,
        achieved=se(n),
        source=SOURCE,
        notes=(f"Newcombe (2006) variance at C {c_statistic:g}",),
    )


def external_validation_size(
    prevalence: float,
    c_statistic: float,
    *,
    oe_ci_width: float = 0.2,
    slope_ci_width: float = 0.2,
    c_ci_width: float = 0.1,
    confidence: float = 0.95,
    lp_mean: float | None = None,
    lp_sd: float | None = None,
    lp_values: ArrayLike | None = None,
) -> ExternalValidationSize:
    """Return all three criteria of Riley et al. (2021); default widths are the paper's.

    ``lp_mean``/``lp_sd`` or ``lp_values`` give the linear predictor's distribution for
    the calibration slope, as in :func:`cases_for_calibration_slope`.

    References
    ----------
    Riley RD et al. (2021). Stat Med 40(19):4230-4251.
    """
    check_fraction(prevalence, "prevalence")
    lp = _linear_predictor(prevalence, c_statistic, lp_mean, lp_sd, lp_values)
    return ExternalValidationSize(
        observed_expected=cases_for_observed_expected(
            prevalence, oe_ci_width, confidence=confidence
        ),
        calibration_slope=_slope_size(prevalence, lp, slope_ci_width, confidence),
        c_statistic=cases_for_c_statistic(
            prevalence, c_statistic, c_ci_width, confidence=confidence
        ),
        lp_mean=lp.mean,
        lp_sd=lp.sd,
    )


@dataclass(frozen=True, slots=True)
class _LinearPredictor:
    mean: float
    sd: float
    per_case: float  # slope variance at n = 1
    description: str


def _linear_predictor(
    prevalence: float,
    c_statistic: float,
    lp_mean: float | None,
    lp_sd: float | None,
    lp_values: ArrayLike | None,
) -> _LinearPredictor:
    """Return the linear predictor the slope criterion integrates over (module docstring)."""
    normal_given = lp_mean is not None or lp_sd is not None
    if lp_values is not None:
        if normal_given:
            raise InputError("give either lp_values or lp_mean and lp_sd, not both")
        x = _checked_values(lp_values)
        per_case = _slope_variance_per_case(x, np.full(x.size, 1.0 / x.size))
        mean, sd = float(x.mean()), float(x.std())
        return _LinearPredictor(
            mean, sd, per_case, f"from {x.size} given values (mean {mean:.3f}, SD {sd:.3f})"
        )
    if normal_given:
        if lp_mean is None or lp_sd is None:
            raise InputError("lp_mean and lp_sd go together: give both or neither")
        if not math.isfinite(lp_mean):
            raise InputError(f"lp_mean must be a finite number, got {lp_mean}")
        check_positive(lp_sd, "lp_sd")
        mu, sigma = lp_mean, lp_sd
        how = f"Normal({mu:.3f}, {sigma:.3f}²) as given"
    else:
        mu, sigma = linear_predictor_distribution(prevalence, c_statistic)
        how = f"Normal({mu:.3f}, {sigma:.3f}²): mean risk {prevalence:g}, C {c_statistic:g}"
    x, w = _normal_grid(mu, sigma)
    return _LinearPredictor(mu, sigma, _slope_variance_per_case(x, w), how)


def _checked_values(lp_values: ArrayLike) -> NDArray[np.float64]:
    x = np.asarray(lp_values, dtype=np.float64).ravel()
    if x.size < 2 or not np.all(np.isfinite(x)) or float(x.std()) == 0.0:
        raise InputError("lp_values must hold at least two finite, not all equal, numbers")
    return x


def _slope_variance_per_case(x: NDArray[np.float64], w: NDArray[np.float64]) -> float:
    """``I_aa / (I_aa I_bb - I_ab²)``: the slope element of the inverse information, n = 1."""
    p = _expit(x)
    v = p * (1.0 - p)
    i_aa = float(np.sum(w * v))
    i_ab = float(np.sum(w * x * v))
    i_bb = float(np.sum(w * x * x * v))
    return i_aa / (i_aa * i_bb - i_ab * i_ab)


def _expit(x: NDArray[np.float64]) -> NDArray[np.float64]:
    out: NDArray[np.float64] = 0.5 * (1.0 + np.tanh(0.5 * x))  # overflow-free logistic
    return out


def _normal_grid(mu: float, sigma: float) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Grid over mu ± 9 sigma with weights summing to 1 (normal density, midpoint rule)."""
    x = np.linspace(mu - _SPAN * sigma, mu + _SPAN * sigma, _GRID)
    w = stats.norm.pdf(x, mu, sigma)
    return x, w / w.sum()


def _mean_risk(mu: float, sigma: float) -> float:
    x, w = _normal_grid(mu, sigma)
    return float(np.sum(w * _expit(x)))


def _c_statistic(mu: float, sigma: float) -> float:
    """P(LP of a case > LP of a non-case), ties on the grid counted half."""
    x, w = _normal_grid(mu, sigma)
    p = _expit(x)
    cases = w * p
    non_cases = w * (1.0 - p)
    cases /= cases.sum()
    non_cases /= non_cases.sum()
    below = np.cumsum(non_cases) - 0.5 * non_cases  # non-cases below each grid point
    return float(np.sum(cases * below))
