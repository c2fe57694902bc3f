"""Confidence intervals for proportions: sensitivity, specificity, predictive values.

Single binomial proportions get the Wilson score interval or the exact Clopper–Pearson
interval. When a patient contributes several observations (several images, lesions or
studies) the observations are not independent, and :func:`clustered_proportion` gives a
cluster-robust (ratio-estimator) variance. The same variance can be computed from a few
mergeable per-cluster moments (:func:`cluster_moments`,
:func:`clustered_proportion_from_moments`), which is what a site releases and what the
coordinator pools.

References
----------
Newcombe RG (1998). Two-sided confidence intervals for the single proportion: comparison
of seven methods. Statistics in Medicine 17:857–872.
doi:10.1002/(SICI)1097-0258(19980430)17:8<857::AID-SIM777>3.0.CO;2-E
Clopper CJ, Pearson ES (1934). The use of confidence or fiducial limits illustrated in the
case of the binomial. Biometrika 26:404–413. doi:10.1093/biomet/26.4.404
Rao JNK, Scott AJ (1992). A simple method for the analysis of clustered binary data.
Biometrics 48:577–585. doi:10.2307/2532311
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike
from scipy.stats import beta

from site_agent.exceptions import InputError
from site_agent.statistics.estimates import Estimate, two_sided_z


def _check_count(successes: int, n: int) -> None:
    if isinstance(successes, bool) or isinstance(n, bool):
        raise InputError("counts must be integers, not booleans")
    if int(successes) != successes or int(n) != n:
        raise InputError("counts must be whole numbers")
    if n < 0 or successes < 0:
        raise InputError("counts must not be negative")
    if successes > n:
        raise InputError("successes must not exceed the number of trials")


def wilson(successes: int, n: int, confidence: float = 0.95) -> Estimate:
    """Return the proportion ``successes / n`` with its Wilson score interval.

    ``se`` is the binomial standard error ``sqrt(p(1 - p) / n)``; the interval is not
    ``p ± z·se`` but the score interval, which stays inside [0, 1] and keeps its coverage
    near 0 and 1.

    Parameters
    ----------
    successes
        Number of successes (e.g. true positives).
    n
        Number of trials (e.g. diseased cases). ``n == 0`` gives a NaN estimate.
    confidence
        Two-sided confidence level.

    References
    ----------
    Wilson EB (1927). Probable inference, the law of succession, and statistical inference.
    Journal of the American Statistical Association 22:209–212. doi:10.1080/01621459.1927.10502953
    Newcombe RG (1998). Statistics in Medicine 17:857–872, method 3.
    """
    _check_count(successes, n)
    z = two_sided_z(confidence)
    if n == 0:
        return Estimate.undefined("wilson", 0, "no trials (n = 0)", confidence)
    p = successes / n
    # Newcombe (1998) method 3: (2np + z² ± z·sqrt(z² + 4np(1 − p))) / (2(n + z²))
    centre = 2 * n * p + z * z
    half = z * math.sqrt(z * z + 4 * n * p * (1 - p))
    denominator = 2 * (n + z * z)
    lower = 0.0 if successes == 0 else (centre - half) / denominator
    upper = 1.0 if successes == n else (centre + half) / denominator
    se = math.sqrt(p * (1 - p) / n)
    return Estimate(p, lower, upper, se, "wilson", n, confidence)


def clopper_pearson(successes: int, n: int, confidence: float = 0.95) -> Estimate:
    """Return the proportion ``successes / n`` with its exact Clopper–Pearson interval.

    ``se`` is the binomial standard error ``sqrt(p(1 - p) / n)``.

    References
    ----------
    Clopper CJ, Pearson ES (1934). Biometrika 26:404–413. doi:10.1093/biomet/26.4.404
    Newcombe RG (1998). Statistics in Medicine 17:857–872, method 5 (beta quantiles).
    """
    _check_count(successes, n)
    two_sided_z(confidence)  # validates the level
    if n == 0:
        return Estimate.undefined("clopper-pearson", 0, "no trials (n = 0)", confidence)
    alpha = 1.0 - confidence
    p = successes / n
    # Limits are beta quantiles: Beta(x, n − x + 1) at α/2 and Beta(x + 1, n − x) at 1 − α/2.
    lower = 0.0 if successes == 0 else float(beta.ppf(alpha / 2, successes, n - successes + 1))
    upper = 1.0 if successes == n else float(beta.ppf(1 - alpha / 2, successes + 1, n - successes))
    se = math.sqrt(p * (1 - p) / n)
    return Estimate(p, lower, upper, se, "clopper-pearson", n, confidence)


@dataclass(frozen=True, slots=True)
class ClusterMoments:
    """Mergeable sufficient statistics of clustered binary data.

    With ``a_i`` successes among ``m_i`` trials in cluster ``i``: the number of clusters with
    at least one trial, ``Σa_i``, ``Σm_i``, ``Σa_i²``, ``Σa_i·m_i`` and ``Σm_i²``. Moments of
    disjoint sets of clusters add.
    """

    successes: int
    total: int
    clusters: int
    sum_a2: float
    sum_am: float
    sum_m2: float

    def __add__(self, other: ClusterMoments) -> ClusterMoments:
        return ClusterMoments(
            self.successes + other.successes,
            self.total + other.total,
            self.clusters + other.clusters,
            self.sum_a2 + other.sum_a2,
            self.sum_am + other.sum_am,
            self.sum_m2 + other.sum_m2,
        )


def cluster_moments(successes: ArrayLike, totals: ArrayLike) -> ClusterMoments:
    """Return the mergeable moments of per-cluster successes and trials.

    Clusters with no trials are dropped: they hold no observation of this proportion.

    Raises
    ------
    InputError
        If the arrays differ in length, hold negative or non-integer counts, or a cluster
        has more successes than trials.
    """
    a = np.asarray(successes, dtype=float)
    m = np.asarray(totals, dtype=float)
    if a.ndim != 1 or m.ndim != 1 or a.shape != m.shape:
        raise InputError("successes and totals must be 1-D arrays of the same length")
    if not (np.all(np.isfinite(a)) and np.all(np.isfinite(m))):
        raise InputError("cluster counts must be finite")
    if np.any(a < 0) or np.any(m < 0):
        raise InputError("cluster counts must not be negative")
    if np.any(a != np.round(a)) or np.any(m != np.round(m)):
        raise InputError("cluster counts must be whole numbers")
    if np.any(a > m):
        raise InputError("a cluster has more successes than trials")
    keep = m > 0
    a, m = a[keep], m[keep]
    return ClusterMoments(
        successes=int(a.sum()),
        total=int(m.sum()),
        clusters=int(keep.sum()),
        sum_a2=float(np.dot(a, a)),
        sum_am=float(np.dot(a, m)),
        sum_m2=float(np.dot(m, m)),
    )


def clustered_proportion(
    successes: ArrayLike, totals: ArrayLike, confidence: float = 0.95
) -> Estimate:
    """Return a proportion over clustered observations with a cluster-robust interval.

    Parameters
    ----------
    successes
        Successes per cluster (patient), ``a_i``.
    totals
        Trials per cluster, ``m_i``. Clusters with no trials are ignored.
    confidence
        Two-sided confidence level.

    Returns
    -------
    Estimate
        ``estimate = Σa_i / Σm_i``, ``n = Σm_i`` (observations), ``se`` from the
        ratio-estimator variance, method ``"cluster-ratio"``. The interval is described in
        :func:`clustered_proportion_from_moments`.

    References
    ----------
    Rao JNK, Scott AJ (1992). Biometrics 48:577–585. doi:10.2307/2532311
    """
    mo = cluster_moments(successes, totals)
    return clustered_proportion_from_moments(
        mo.successes, mo.total, mo.clusters, mo.sum_a2, mo.sum_am, mo.sum_m2, confidence
    )


def _ratio_variance(
    p: float, total: int, clusters: int, sum_a2: float, sum_am: float, sum_m2: float
) -> float:
    # Rao & Scott (1992) eq. 2: v = k/(k − 1) · Σ(a_i − p̂·m_i)² / (Σm_i)², with
    # Σ(a_i − p̂·m_i)² = Σa_i² − 2p̂·Σa_i·m_i + p̂²·Σm_i².
    residual_ss = max(sum_a2 - 2 * p * sum_am + p * p * sum_m2, 0.0)
    return clusters / (clusters - 1) * residual_ss / (total * total)


def design_effect(successes: ArrayLike, totals: ArrayLike) -> float:
    """Return the design effect of clustering: cluster-robust variance / binomial variance.

    ``d = v / (p̂(1 − p̂)/Σm_i)``. NaN when fewer than two clusters or when ``p̂`` is 0 or 1
    (both variances are zero).

    References
    ----------
    Rao JNK, Scott AJ (1992). Biometrics 48:577–585, eq. 3. doi:10.2307/2532311
    """
    mo = cluster_moments(successes, totals)
    return _design_effect(mo)


def _design_effect(mo: ClusterMoments) -> float:
    if mo.clusters < 2 or mo.total == 0:
        return math.nan
    p = mo.successes / mo.total
    binomial = p * (1 - p) / mo.total
    if binomial == 0.0:
        return math.nan
    v = _ratio_variance(p, mo.total, mo.clusters, mo.sum_a2, mo.sum_am, mo.sum_m2)
    return v / binomial


def clustered_proportion_from_moments(
    successes: int,
    total: int,
    clusters: int,
    sum_a2: float,
    sum_am: float,
    sum_m2: float,
    confidence: float = 0.95,
) -> Estimate:
    """Return the clustered proportion from mergeable moments (see :class:`ClusterMoments`).

    The variance is the ratio-estimator variance of Rao & Scott (1992),
    ``v = k/(k − 1) · Σ(a_i − p̂·m_i)² / (Σm_i)²``, expanded in the moments so that sites can
    release moments and the coordinator can pool them. The interval is the Wilson interval
    at the effective sample size ``n* = Σm_i / max(d, 1)``, where ``d`` is the design effect
    (Korn & Graubard 1998); the design effect is not allowed below 1 (common practice in
    survey reporting), and is taken as 1 when ``p̂`` is 0 or 1, where it is undefined.
    With a single cluster the variance is undefined: the estimate is returned with NaN
    ``se`` and interval and a reason.

    References
    ----------
    Rao JNK, Scott AJ (1992). Biometrics 48:577–585. doi:10.2307/2532311
    Korn EL, Graubard BI (1998). Confidence intervals for proportions with small expected
    number of positive counts estimated from survey data. Survey Methodology 24:193–201.
    """
    values = (successes, total, clusters)
    if any(isinstance(v, bool) or int(v) != v or v < 0 for v in values):
        raise InputError("successes, total and clusters must be non-negative whole numbers")
    if successes > total:
        raise InputError("successes must not exceed the total")
    if clusters > total or (total > 0 and clusters == 0):
        raise InputError("the number of clusters must lie between 1 and the total")
    if not all(math.isfinite(v) and v >= 0 for v in (sum_a2, sum_am, sum_m2)):
        raise InputError("cluster moments must be finite and non-negative")
    z = two_sided_z(confidence)
    method = "cluster-ratio"
    if total == 0:
        return Estimate.undefined(method, 0, "no trials (n = 0)", confidence)
    p = successes / total
    if clusters < 2:
        nan = math.nan
        reason = "one cluster only: the cluster-robust variance is undefined"
        return Estimate(p, nan, nan, nan, method, int(total), confidence, reason)
    v = _ratio_variance(p, int(total), int(clusters), sum_a2, sum_am, sum_m2)
    binomial = p * (1 - p) / total
    deff = 1.0 if binomial == 0.0 else max(v / binomial, 1.0)
    n_eff = total / deff
    # Wilson score interval (Newcombe 1998, method 3) at the effective sample size.
    centre = 2 * n_eff * p + z * z
    half = z * math.sqrt(z * z + 4 * n_eff * p * (1 - p))
    denominator = 2 * (n_eff + z * z)
    lower = 0.0 if successes == 0 else max((centre - half) / denominator, 0.0)
    upper = 1.0 if successes == total else min((centre + half) / denominator, 1.0)
    return Estimate(p, lower, upper, math.sqrt(v), method, int(total), confidence)
