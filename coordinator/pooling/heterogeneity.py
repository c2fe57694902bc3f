"""Between-site variance tau² and the heterogeneity measures I² and H².

The estimators of tau² behind :func:`~coordinator.pooling.meta_analysis.meta_analyze`:
DerSimonian-Laird (moment estimator), Paule-Mandel (generalized Q set to its expected
value), REML (Fisher scoring), and the Q-profile confidence interval for tau² (the
generalized Q set to chi² quantiles). I² and H² follow Higgins & Thompson (2002).
Private to the pooling package: inputs are assumed validated by ``meta_analyze``
(one-dimensional, finite, positive variances, at least two sites).

References
----------
Cochran WG (1954). The combination of estimates from different experiments.
    Biometrics 10(1):101-129. doi:10.2307/3001666
DerSimonian R, Laird N (1986). Meta-analysis in clinical trials. Controlled Clinical
    Trials 7(3):177-188. doi:10.1016/0197-2456(86)90046-2
Paule RC, Mandel J (1982). Consensus values and weighting factors. Journal of Research
    of the National Bureau of Standards 87(5):377-385. doi:10.6028/jres.087.022
DerSimonian R, Kacker R (2007). Random-effects model for meta-analysis of clinical
    trials: an update. Contemporary Clinical Trials 28(2):105-114.
    doi:10.1016/j.cct.2006.04.004
Viechtbauer W (2005). Bias and efficiency of meta-analytic variance estimators in the
    random-effects model. Journal of Educational and Behavioral Statistics 30(3):261-293.
    doi:10.3102/10769986030003261
Viechtbauer W (2007). Confidence intervals for the amount of heterogeneity in
    meta-analysis. Statistics in Medicine 26(1):37-52. doi:10.1002/sim.2514
Higgins JPT, Thompson SG (2002). Quantifying heterogeneity in a meta-analysis.
    Statistics in Medicine 21(11):1539-1558. doi:10.1002/sim.1186
"""

from __future__ import annotations

import numpy as np
from scipy import optimize

from coordinator.pooling.effect_sizes import FloatArray

REML_MAX_ITERATIONS = 500
_REML_TOLERANCE = 1e-12
_NAN = float("nan")


def tau2_dersimonian_laird(y: FloatArray, v: FloatArray) -> float:
    """DerSimonian & Laird (1986): tau² = max(0, (Q - (k-1)) / (S1 - S2 / S1))."""
    w = 1.0 / v
    mu = np.sum(w * y) / np.sum(w)
    q = float(np.sum(w * (y - mu) ** 2))
    c = float(np.sum(w) - np.sum(w**2) / np.sum(w))
    return max(0.0, (q - (y.size - 1)) / c)


def _generalized_q(y: FloatArray, v: FloatArray, tau2: float) -> float:
    """Generalized Q: sum w_i (y_i - mu)² with w_i = 1 / (v_i + tau²); decreasing in tau²."""
    w = 1.0 / (v + tau2)
    mu = np.sum(w * y) / np.sum(w)
    return float(np.sum(w * (y - mu) ** 2))


def solve_generalized_q(y: FloatArray, v: FloatArray, target: float) -> float:
    """Return tau² >= 0 with generalized Q(tau²) = target, or 0 if Q(0) <= target.

    With target ``k - 1`` this is the Paule & Mandel (1982) estimator (DerSimonian &
    Kacker 2007); with chi² quantiles it gives the Q-profile bounds (Viechtbauer 2007).
    """
    if _generalized_q(y, v, 0.0) <= target:
        return 0.0
    high = max(float(np.var(y)), float(np.max(v)), 1e-8)
    while _generalized_q(y, v, high) > target:  # Q -> 0 as tau² -> infinity
        high *= 2.0
    root = optimize.brentq(
        lambda t: _generalized_q(y, v, t) - target, 0.0, high, xtol=1e-14, rtol=1e-14
    )
    return float(root)


def tau2_reml(y: FloatArray, v: FloatArray) -> float:
    """REML tau² by Fisher scoring (Viechtbauer 2005), truncated at 0; NaN if no convergence.

    Score: ½ [sum w² (y - mu)² - sum w + sum w² / sum w];
    expected information: ½ tr(P²) = ½ [sum w² - 2 sum w³ / sum w + (sum w² / sum w)²],
    with w = 1 / (v + tau²) and P = W - W 1 1' W / sum w.
    """
    tau2 = tau2_dersimonian_laird(y, v)
    for _ in range(REML_MAX_ITERATIONS):
        w = 1.0 / (v + tau2)
        s1, s2, s3 = float(np.sum(w)), float(np.sum(w**2)), float(np.sum(w**3))
        mu = float(np.sum(w * y)) / s1
        score = float(np.sum(w**2 * (y - mu) ** 2)) - s1 + s2 / s1
        information = s2 - 2.0 * s3 / s1 + (s2 / s1) ** 2
        updated = max(0.0, tau2 + score / information)
        if abs(updated - tau2) <= _REML_TOLERANCE * max(1.0, tau2):
            return updated
        tau2 = updated
    return _NAN


def i2_h2(v: FloatArray, tau2: float, q: float, df: int, *, fixed: bool) -> tuple[float, float]:
    """I² and H² (Higgins & Thompson 2002).

    Fixed effect: I² = max(0, (Q - df) / Q), H² = Q / df. Otherwise
    I² = tau² / (tau² + s²), H² = (tau² + s²) / s², with the typical within-site
    variance s² = (k - 1) sum w / ((sum w)² - sum w²), w = 1 / v.
    """
    if fixed:
        i2 = max(0.0, (q - df) / q) if q > 0 else 0.0
        return i2, q / df
    w = 1.0 / v
    s2 = df * float(np.sum(w)) / (float(np.sum(w)) ** 2 - float(np.sum(w**2)))
    return tau2 / (tau2 + s2), (tau2 + s2) / s2
