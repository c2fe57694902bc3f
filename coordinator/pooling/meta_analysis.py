"""Fixed- and random-effects meta-analysis of per-site estimates.

Each site contributes an estimate ``y_i`` and its within-site sampling variance ``v_i``
on a scale where a normal approximation is reasonable (identity, logit or log). The
pooled estimate weights sites by ``1 / (v_i + tau²)``; ``tau²`` is the between-site
variance, estimated by DerSimonian-Laird, REML or Paule-Mandel (``tau² = 0`` for the
fixed-effect model; the estimators and I²/H² are in
:mod:`coordinator.pooling.heterogeneity`). This module adds the Hartung-Knapp-Sidik-Jonkman
interval and the prediction interval for a new site. Results are frozen pydantic models
so they can be written to JSON: NaN is written as ``null`` and read back as NaN.

Helpers in :mod:`coordinator.pooling.effect_sizes` put diagnostic measures on a scale
fit for pooling (:func:`~coordinator.pooling.effect_sizes.logit_auc` and friends).
:func:`pooled_vs_meta_note` explains why the merged-counts estimate and the
random-effects estimate may differ.

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
Hartung J, Knapp G (2001). A refined method for the meta-analysis of controlled
    clinical trials with binary outcome. Statistics in Medicine 20(24):3875-3889.
    doi:10.1002/sim.1009
Sidik K, Jonkman JN (2002). A simple confidence interval for meta-analysis.
    Statistics in Medicine 21(21):3153-3159. doi:10.1002/sim.1262
IntHout J, Ioannidis JPA, Borm GF (2014). The Hartung-Knapp-Sidik-Jonkman method for
    random effects meta-analysis is straightforward and considerably outperforms the
    standard DerSimonian-Laird method. BMC Medical Research Methodology 14:25.
    doi:10.1186/1471-2288-14-25
Higgins JPT, Thompson SG (2002). Quantifying heterogeneity in a meta-analysis.
    Statistics in Medicine 21(11):1539-1558. doi:10.1002/sim.1186
Higgins JPT, Thompson SG, Spiegelhalter DJ (2009). A re-evaluation of random-effects
    meta-analysis. Journal of the Royal Statistical Society A 172(1):137-159.
    doi:10.1111/j.1467-985X.2008.00552.x
Simpson EH (1951). The interpretation of interaction in contingency tables. Journal of
    the Royal Statistical Society B 13(2):238-241. doi:10.1111/j.2517-6161.1951.tb00088.x
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy import stats

from coordinator.pooling.effect_sizes import FloatArray, Transform, as_vector
from coordinator.pooling.heterogeneity import (
    REML_MAX_ITERATIONS,
    i2_h2,
    solve_generalized_q,
    tau2_dersimonian_laird,
    tau2_reml,
)
from coordinator.pooling.records import Number, ResultRecord
from site_agent.exceptions import InputError

Method = Literal["dl", "reml", "pm", "fixed"]

METHOD_LABELS: dict[str, str] = {
    "fixed": "fixed effect (inverse variance)",
    "dl": "random effects, DerSimonian-Laird",
    "reml": "random effects, REML",
    "pm": "random effects, Paule-Mandel",
}
PREDICTION_CONVENTION = (
    "estimate ± t(k−2) · sqrt(tau² + SE²), SE without HKSJ adjustment "
    "(Higgins, Thompson & Spiegelhalter 2009)"
)
_NAN = float("nan")


class SiteWeight(ResultRecord):
    """One site's estimate, its confidence interval and its share of the pooled weight."""

    label: str
    estimate: float
    variance: float
    lower: float
    upper: float
    weight_percent: Number


class BackTransformed(ResultRecord):
    """Pooled results mapped back from the analysis scale (expit for logit, exp for log)."""

    estimate: Number
    lower: Number
    upper: Number
    prediction_lower: Number
    prediction_upper: Number


class MetaAnalysis(ResultRecord):
    """Result of :func:`meta_analyze`; all values are on the analysis scale ``scale``.

    ``i2`` is a fraction in [0, 1], not a percentage. ``lower``/``upper`` use the
    normal distribution, or t with ``k - 1`` df when ``hksj`` is set (``interval``
    says which). ``notes`` says why any value is NaN and what conventions were used.
    """

    method: Method
    hksj: bool
    confidence: float
    interval: str
    estimate: Number
    se: Number
    lower: Number
    upper: Number
    tau2: Number
    tau: Number
    tau2_lower: Number
    tau2_upper: Number
    i2: Number
    h2: Number
    q: float
    q_df: int
    q_pvalue: float
    prediction_lower: Number
    prediction_upper: Number
    prediction_convention: str
    k: int
    scale: Transform
    back_transformed: BackTransformed | None
    sites: tuple[SiteWeight, ...]
    notes: tuple[str, ...]


def meta_analyze(
    estimates: ArrayLike,
    variances: ArrayLike,
    *,
    labels: Sequence[str] | None = None,
    method: Method = "reml",
    hksj: bool = False,
    confidence: float = 0.95,
    transform: Transform = "identity",
) -> MetaAnalysis:
    """Pool per-site estimates with a fixed- or random-effects model.

    Parameters
    ----------
    estimates
        Site estimates ``y_i``, already on the analysis scale.
    variances
        Within-site sampling variances ``v_i`` (squared standard errors), on the same
        scale; must be positive.
    labels
        Site names for the weights table; default ``site 1``, ``site 2``, ...
    method
        ``"reml"`` (restricted maximum likelihood, Fisher scoring), ``"dl"``
        (DerSimonian-Laird), ``"pm"`` (Paule-Mandel) or ``"fixed"`` (``tau² = 0``).
    hksj
        Use the Hartung-Knapp-Sidik-Jonkman variance and t with ``k - 1`` df for the
        confidence interval of the pooled estimate. The scale factor is not truncated
        at 1, as in Hartung & Knapp (2001) and IntHout et al. (2014).
    confidence
        Two-sided level of every interval.
    transform
        The scale the estimates are already on: ``"identity"``, ``"logit"`` (pooled
        values are also reported through expit) or ``"log"`` (through exp). Use
        :func:`logit_auc` and friends to get estimates on these scales.

    Returns
    -------
    MetaAnalysis
        Pooled estimate, heterogeneity (``tau²`` with its Q-profile interval, I², H²,
        Cochran's Q), a prediction interval for a new site and the site weights.
        The prediction interval is ``estimate ± t_{k-2} · sqrt(tau² + SE²)`` with the
        unadjusted SE (Higgins, Thompson & Spiegelhalter 2009); it is NaN, with a
        reason in ``notes``, when ``k < 3`` or for the fixed-effect model. I² and H²
        come from ``tau²`` and the typical within-site variance (Higgins & Thompson
        2002), which for DerSimonian-Laird equal ``(Q - df) / Q`` and ``Q / df``; the
        fixed-effect model reports the Q-based values.

    Raises
    ------
    InputError
        Fewer than two sites, lengths that differ, non-finite values, variances that
        are not positive, or a confidence level outside (0, 1).

    References
    ----------
    See the module docstring: DerSimonian & Laird (1986); Viechtbauer (2005, 2007);
    Paule & Mandel (1982); DerSimonian & Kacker (2007); Hartung & Knapp (2001);
    Sidik & Jonkman (2002); IntHout et al. (2014); Higgins & Thompson (2002);
    Higgins, Thompson & Spiegelhalter (2009); Cochran (1954).
    """
    y, v, names = _validated(estimates, variances, labels, confidence)
    k = y.size
    df = k - 1
    notes: list[str] = []

    # Fixed effect: inverse-variance weights w_i = 1 / v_i; Cochran (1954) Q.
    w_fixed = 1.0 / v
    mu_fixed = float(np.sum(w_fixed * y) / np.sum(w_fixed))
    q = float(np.sum(w_fixed * (y - mu_fixed) ** 2))
    q_pvalue = float(stats.chi2.sf(q, df))

    if method == "fixed":
        tau2 = 0.0
    elif method == "dl":
        tau2 = tau2_dersimonian_laird(y, v)
    elif method == "pm":
        tau2 = solve_generalized_q(y, v, float(df))
    elif method == "reml":
        tau2 = tau2_reml(y, v)
        if math.isnan(tau2):
            notes.append(
                f"REML did not converge in {REML_MAX_ITERATIONS} Fisher-scoring steps; "
                "every random-effects value is undefined"
            )
    else:
        raise InputError(f"unknown method {method!r}; choose dl, reml, pm or fixed")

    # Random-effects weights w*_i = 1 / (v_i + tau²) (DerSimonian & Laird 1986).
    w = 1.0 / (v + tau2)
    w_sum = float(np.sum(w))
    mu = float(np.sum(w * y) / w_sum)
    se = math.sqrt(1.0 / w_sum)
    alpha = 1.0 - confidence
    if hksj:
        # Hartung & Knapp (2001), Sidik & Jonkman (2002): q = sum w*(y - mu)² / (k - 1),
        # Var(mu) = q / sum w*, interval from t with k - 1 df.
        scale_factor = float(np.sum(w * (y - mu) ** 2)) / df
        se_interval = math.sqrt(scale_factor / w_sum)
        crit = float(stats.t.ppf(1.0 - alpha / 2.0, df))
        interval = f"t, {df} df (HKSJ)"
        if scale_factor < 1.0 - 1e-9:  # Paule-Mandel makes it exactly 1
            notes.append(
                "HKSJ scale factor is below 1, so its interval is narrower than the "
                "unadjusted one; it is not truncated at 1"
            )
    else:
        se_interval = se
        crit = float(stats.norm.ppf(1.0 - alpha / 2.0))
        interval = "normal"

    i2, h2 = i2_h2(v, tau2, q, df, fixed=method == "fixed")
    tau2_lower, tau2_upper = _NAN, _NAN
    i2_note = "I² and H² from Q" if method == "fixed" else "I² and H² from tau²"
    notes.append(f"{i2_note} (Higgins & Thompson 2002)")
    if method == "fixed":
        notes.append("tau² is 0 by assumption of the fixed-effect model")
    else:
        # Q-profile interval: generalized Q(tau²) equals the chi² quantiles (Viechtbauer 2007).
        tau2_lower = solve_generalized_q(y, v, float(stats.chi2.ppf(1.0 - alpha / 2.0, df)))
        tau2_upper = solve_generalized_q(y, v, float(stats.chi2.ppf(alpha / 2.0, df)))

    prediction_lower, prediction_upper = _NAN, _NAN
    if method == "fixed":
        notes.append(
            "no prediction interval: the fixed-effect model assumes no between-site variation"
        )
    elif k < 3:
        notes.append("no prediction interval: it needs at least 3 sites (t with k−2 df)")
    else:
        # Higgins, Thompson & Spiegelhalter (2009): mu ± t_{k-2} sqrt(tau² + SE(mu)²).
        half = float(stats.t.ppf(1.0 - alpha / 2.0, k - 2)) * math.sqrt(tau2 + se**2)
        prediction_lower, prediction_upper = mu - half, mu + half

    lower, upper = mu - crit * se_interval, mu + crit * se_interval
    z_site = float(stats.norm.ppf(1.0 - alpha / 2.0))
    sites = tuple(
        SiteWeight(
            label=name,
            estimate=float(yi),
            variance=float(vi),
            lower=float(yi - z_site * math.sqrt(vi)),
            upper=float(yi + z_site * math.sqrt(vi)),
            weight_percent=float(100.0 * wi / w_sum) if math.isfinite(w_sum) else _NAN,
        )
        for name, yi, vi, wi in zip(names, y, v, w, strict=True)
    )
    back = None
    if transform != "identity":
        inv = inverse_transform
        back = BackTransformed(
            estimate=inv(mu, transform),
            lower=inv(lower, transform),
            upper=inv(upper, transform),
            prediction_lower=inv(prediction_lower, transform),
            prediction_upper=inv(prediction_upper, transform),
        )
    return MetaAnalysis(
        method=method,
        hksj=hksj,
        confidence=confidence,
        interval=interval,
        estimate=mu,
        se=se_interval,
        lower=lower,
        upper=upper,
        tau2=tau2,
        tau=math.sqrt(tau2) if tau2 >= 0 else _NAN,
        tau2_lower=tau2_lower,
        tau2_upper=tau2_upper,
        i2=i2,
        h2=h2,
        q=q,
        q_df=df,
        q_pvalue=q_pvalue,
        prediction_lower=prediction_lower,
        prediction_upper=prediction_upper,
        prediction_convention=PREDICTION_CONVENTION,
        k=k,
        scale=transform,
        back_transformed=back,
        sites=sites,
        notes=tuple(notes),
    )


def inverse_transform(value: float, transform: Transform) -> float:
    """Map a value from the analysis scale back to the measure's own scale.

    ``logit`` → expit (AUC, sensitivity, specificity); ``log`` → exp (odds ratios);
    ``identity`` → unchanged. NaN stays NaN.
    """
    if transform == "logit":
        return float(1.0 / (1.0 + math.exp(-value))) if math.isfinite(value) else value
    if transform == "log":
        return math.exp(value) if math.isfinite(value) else value
    return value


def pooled_vs_meta_note() -> str:
    """Explain why merged-counts and random-effects estimates can differ, for reports.

    References
    ----------
    Simpson EH (1951). J R Stat Soc B 13(2):238-241.
    Higgins JPT, Thompson SG, Spiegelhalter DJ (2009). J R Stat Soc A 172(1):137-159.
    """
    return (
        "The pooled estimate treats all sites' cases as one cohort: each case counts once, "
        "so large sites dominate it. The random-effects estimate is an average of the "
        "site estimates, weighted by 1 / (within-site variance + tau²); when sites differ "
        "(tau² > 0) small sites gain weight and the average moves toward them. The two "
        "answer different questions: performance on this particular mix of cases, versus "
        "the mean performance across sites like these. Merging counts can also mislead "
        "when sites differ in disease prevalence or case mix: an accuracy measure that "
        "depends on prevalence can be higher at every site and yet lower in the merged "
        "table (Simpson's paradox, Simpson 1951). When the two disagree, look at tau², "
        "I² and the prediction interval: they say how much performance varies between "
        "sites, which neither single number shows."
    )


def _validated(
    estimates: ArrayLike,
    variances: ArrayLike,
    labels: Sequence[str] | None,
    confidence: float,
) -> tuple[FloatArray, FloatArray, tuple[str, ...]]:
    y = as_vector(estimates, "estimates")
    v = as_vector(variances, "variances")
    if y.size != v.size:
        raise InputError(f"{y.size} estimates but {v.size} variances")
    if y.size < 2:
        raise InputError(f"a meta-analysis needs at least two sites, got {y.size}")
    if np.any(v <= 0.0):
        raise InputError("every variance must be positive")
    if not 0.0 < confidence < 1.0:
        raise InputError("confidence must lie strictly between 0 and 1")
    if labels is None:
        names = tuple(f"site {i + 1}" for i in range(y.size))
    else:
        names = tuple(str(label) for label in labels)
        if len(names) != y.size:
            raise InputError(f"{len(names)} labels for {y.size} sites")
    return y, v, names
