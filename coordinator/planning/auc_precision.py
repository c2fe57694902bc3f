"""Cases needed to estimate an AUC to a given precision, one or several images per patient.

The variance of the empirical AUC (the Mann-Whitney statistic) with ``P`` diseased and
``N`` non-diseased cases is::

    Var(A) = [A(1 - A) + (P - 1)(Q1 - A²) + (N - 1)(Q2 - A²)] / (P N),
    Q1 = A / (2 - A),   Q2 = 2A² / (1 + A)                (Hanley & McNeil 1982, eq. 1)

exact when the scores of both classes are exponential-shaped, and close for binormal
scores. With ``m`` observations per patient, Obuchowski's (1997) variance replaces each
class's component variance by that of the patient sums, ``S10 / M`` by
``S10 (1 + (m - 1) r) / M``, where ``r`` is the correlation of the structural
components (placement values) of two observations of one patient. For patients whose
observations share one label (``S11 = 0``) the clustered variance is therefore the
Hanley-McNeil variance times the design effect ``1 + (m - 1) r`` (the planning form of
Obuchowski's estimator; ``r = 0``: independent images, ``r = 1``: copies of one image).

The interval planned for is the normal interval ``A ± z·SE``; :func:`cases_for_auc`
returns the smallest total that brings its half-width within the target, with the
diseased share of the cases fixed at the anticipated prevalence.

References
----------
Hanley JA, McNeil BJ (1982). The meaning and use of the area under a receiver operating
    characteristic (ROC) curve. Radiology 143(1):29-36, equation (1) and Table III.
    doi:10.1148/radiology.143.1.7063747
Obuchowski NA (1997). Nonparametric analysis of clustered ROC curve data. Biometrics
    53(2):567-578, section 2. doi:10.2307/2533958
Kish L (1965). Survey Sampling. Wiley, New York, section 5.4 (the design effect).
"""

from __future__ import annotations

import math

from coordinator.planning.sample_size import (
    SampleSize,
    check_fraction,
    check_positive,
    smallest_n,
)
from site_agent.exceptions import InputError
from site_agent.statistics.estimates import two_sided_z

SOURCE = "Hanley & McNeil (1982)"
CLUSTERED_SOURCE = "Hanley & McNeil (1982) with Obuchowski's (1997) clustered variance"


def auc_variance(auc: float, n_positive: float, n_negative: float) -> float:
    """Return Hanley & McNeil's (1982) variance of the empirical AUC.

    Class sizes may be expected (fractional) counts, as in planning. NaN when a class
    is empty.

    References
    ----------
    Hanley JA, McNeil BJ (1982). Radiology 143(1):29-36, equation (1).
    """
    a, p, n = auc, n_positive, n_negative
    if p <= 0 or n <= 0:
        return math.nan
    q1 = a / (2.0 - a)  # Hanley & McNeil (1982): Q1 = A / (2 - A)
    q2 = 2.0 * a * a / (1.0 + a)  # Q2 = 2A² / (1 + A)
    return (a * (1.0 - a) + (p - 1.0) * (q1 - a * a) + (n - 1.0) * (q2 - a * a)) / (p * n)


def clustered_auc_variance(
    auc: float,
    n_positive: float,
    n_negative: float,
    *,
    observations_per_patient: float = 1.0,
    correlation: float = 0.0,
) -> float:
    """Return the AUC variance with ``m`` correlated observations per patient.

    ``n_positive`` and ``n_negative`` count observations; the variance is the
    Hanley-McNeil variance times ``1 + (m - 1) r`` (module docstring).

    References
    ----------
    Obuchowski NA (1997). Biometrics 53(2):567-578, section 2.
    Kish L (1965). Survey Sampling, section 5.4.
    """
    _check_cluster(observations_per_patient, correlation)
    design_effect = 1.0 + (observations_per_patient - 1.0) * correlation
    return auc_variance(auc, n_positive, n_negative) * design_effect


def cases_for_auc(
    auc: float,
    prevalence: float,
    half_width: float,
    *,
    confidence: float = 0.95,
    observations_per_patient: float = 1.0,
    correlation: float = 0.0,
) -> SampleSize:
    """Return the cases (observations) that bring the AUC interval's half-width within target.

    Parameters
    ----------
    auc
        Anticipated AUC, in (0.5, 1).
    prevalence
        Share of diseased cases, in (0, 1).
    half_width
        Wanted half-width of the ``confidence`` interval ``A ± z·SE``.
    confidence
        Confidence level of the interval.
    observations_per_patient, correlation
        Clustered designs (Obuchowski 1997): ``m >= 1`` images per patient whose
        placement values correlate ``r`` in [0, 1].

    Raises
    ------
    InputError
        A value outside the ranges above.

    References
    ----------
    Hanley JA, McNeil BJ (1982). Radiology 143(1):29-36.
    Obuchowski NA (1997). Biometrics 53(2):567-578.
    """
    if not (math.isfinite(auc) and 0.5 <= auc < 1.0):
        raise InputError(f"auc must lie in [0.5, 1), got {auc}")
    check_fraction(prevalence, "prevalence")
    check_positive(half_width, "half_width")
    _check_cluster(observations_per_patient, correlation)
    z = two_sided_z(confidence)

    def half(n: int) -> float:
        variance = clustered_auc_variance(
            auc,
            n * prevalence,
            n * (1.0 - prevalence),
            observations_per_patient=observations_per_patient,
            correlation=correlation,
        )
        return z * math.sqrt(variance)

    start = max(2, math.ceil(1.0 / min(prevalence, 1.0 - prevalence)))
    n = smallest_n(half, half_width, start=start)
    clustered = observations_per_patient > 1.0 and correlation > 0.0
    notes = [
        f"diseased share {prevalence:g}; expected counts, normal interval A ± z·SE",
        "Hanley-McNeil variance: exact for exponential-shaped scores, close for binormal",
    ]
    if clustered:
        notes.append(
            f"{observations_per_patient:g} observations per patient correlated "
            f"{correlation:g}: variance times {1 + (observations_per_patient - 1) * correlation:g}"
        )
    return SampleSize(
        criterion=f"AUC {confidence:.0%} CI half-width <= {half_width:g}",
        n_total=n,
        n_events=math.ceil(n * prevalence),
        target=half_width,
        achieved=half(n),
        source=CLUSTERED_SOURCE if clustered else SOURCE,
        notes=tuple(notes),
    )


def _check_cluster(observations_per_patient: float, correlation: float) -> None:
    if not (math.isfinite(observations_per_patient) and observations_per_patient >= 1.0):
        raise InputError(
            f"observations_per_patient must be at least 1, got {observations_per_patient}"
        )
    if not (math.isfinite(correlation) and 0.0 <= correlation <= 1.0):
        raise InputError(f"correlation must lie in [0, 1], got {correlation}")
