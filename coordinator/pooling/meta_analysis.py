"""Fixed- and random-effects meta-analysis of per-site estimates.

Each site contributes an estimate ``y_i`` and its within-site sampling variance ``v_i``
on a scale where a normal approximation is reasonable (identity, logit or log). The
pooled estimate weights sites by ``1 / (v_i + tau²)``; ``tau²`` is the between-site
variance, estimated by DerSimonian-Laird, REML or Paule-Mandel (``tau² = 0`` for the
fixed-effect model). Results are frozen pydantic models so they can be written to JSON:
NaN is written as ``null`` and read back as NaN.

Helpers put diagnostic measures on a scale fit for pooling: :func:`logit_auc`,
:func:`logit_sensitivity`, :func:`logit_specificity` and :func:`log_diagnostic_odds_ratio`.
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
Woolf B (1955). On estimating the relation between blood group and disease. Annals of
    Human Genetics 19(4):251-253. doi:10.1111/j.1469-1809.1955.tb01348.x
Glas AS, Lijmer JG, Prins MH, Bonsel GJ, Bossuyt PMM (2003). The diagnostic odds ratio:
    a single indicator of test performance. Journal of Clinical Epidemiology
    56(11):1129-1135. doi:10.1016/S0895-4356(03)00177-X
Simpson EH (1951). The interpretation of interaction in contingency tables. Journal of
    the Royal Statistical Society B 13(2):238-241. doi:10.1111/j.2517-6161.1951.tb00088.x
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Annotated, Any, Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from pydantic import BaseModel, BeforeValidator, ConfigDict
from scipy import optimize, stats

from site_agent.exceptions import InputError

Method = Literal["dl", "reml", "pm", "fixed"]
Transform = Literal["identity", "logit", "log"]
FloatArray = NDArray[np.float64]

METHOD_LABELS: dict[str, str] = {
    "fixed": "fixed effect (inverse variance)",
    "dl": "random effects, DerSimonian-Laird",
    "reml": "random effects, REML",
    "pm": "random effects, Paule-Mandel",
}
CONTINUITY_CORRECTION = 0.5
PREDICTION_CONVENTION = (
    "estimate ± t(k−2) · sqrt(tau² + SE²), SE without HKSJ adjustment "
    "(Higgins, Thompson & Spiegelhalter 2009)"
)
_REML_TOLERANCE = 1e-12
_REML_MAX_ITERATIONS = 500
_NAN = float("nan")


def _none_is_nan(value: Any) -> Any:
    return _NAN if value is None else value


Number = Annotated[float, BeforeValidator(_none_is_nan)]
"""A float written to JSON as ``null`` when undefined (NaN) and read back as NaN."""


class _Record(BaseModel):
    model_config = ConfigDict(
        frozen=True, extra="forbid", allow_inf_nan=True, ser_json_inf_nan="null"
    )


class SiteWeight(_Record):
    """One site's estimate, its confidence interval and its share of the pooled weight."""

    label: str
    estimate: float
    variance: float
    lower: float
    upper: float
    weight_percent: Number


class BackTransformed(_Record):
    """Pooled results mapped back from the analysis scale (expit for logit, exp for log)."""

    estimate: Number
    lower: Number
    upper: Number
    prediction_lower: Number
    prediction_upper: Number


class MetaAnalysis(_Record):
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


@dataclass(frozen=True, slots=True)
class EffectSizes:
    """Per-site estimates and variances on an analysis scale, ready for :func:`meta_analyze`.

    Parameters
    ----------
    estimates, variances
        One value per site, on the scale named by ``transform``.
    transform
        The scale of ``estimates``: pass it on as ``meta_analyze(..., transform=...)``.
    corrected
        Indices (0-based) of sites whose counts received the 0.5 continuity correction.
    notes
        How the values were derived, in words fit for a report.
    """

    estimates: tuple[float, ...]
    variances: tuple[float, ...]
    transform: Transform
    corrected: tuple[int, ...] = ()
    notes: tuple[str, ...] = ()


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
        tau2 = _tau2_dersimonian_laird(y, v)
    elif method == "pm":
        tau2 = _solve_generalized_q(y, v, float(df))
    elif method == "reml":
        tau2 = _tau2_reml(y, v)
        if math.isnan(tau2):
            notes.append(
                f"REML did not converge in {_REML_MAX_ITERATIONS} Fisher-scoring steps; "
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

    i2, h2 = _i2_h2(v, tau2, q, df, fixed=method == "fixed")
    tau2_lower, tau2_upper = _NAN, _NAN
    i2_note = "I² and H² from Q" if method == "fixed" else "I² and H² from tau²"
    notes.append(f"{i2_note} (Higgins & Thompson 2002)")
    if method == "fixed":
        notes.append("tau² is 0 by assumption of the fixed-effect model")
    else:
        # Q-profile interval: generalized Q(tau²) equals the chi² quantiles (Viechtbauer 2007).
        tau2_lower = _solve_generalized_q(y, v, float(stats.chi2.ppf(1.0 - alpha / 2.0, df)))
        tau2_upper = _solve_generalized_q(y, v, float(stats.chi2.ppf(alpha / 2.0, df)))

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


def logit_auc(auc: ArrayLike, se: ArrayLike) -> EffectSizes:
    """Put AUCs on the logit scale with delta-method variances.

    ``y = log(auc / (1 - auc))`` and ``Var(y) = se² / (auc (1 - auc))²``, the first-order
    delta method (common practice).

    Raises
    ------
    InputError
        An AUC outside (0, 1), a standard error that is not positive, non-finite values,
        or lengths that differ.
    """
    a = _as_vector(auc, "auc")
    s = _as_vector(se, "auc_se")
    if a.size != s.size:
        raise InputError(f"auc has {a.size} values but auc_se has {s.size}")
    if np.any((a <= 0.0) | (a >= 1.0)):
        raise InputError("every AUC must lie strictly between 0 and 1 to be put on the logit scale")
    if np.any(s <= 0.0):
        raise InputError("every AUC standard error must be positive")
    y = np.log(a / (1.0 - a))
    var = s**2 / (a * (1.0 - a)) ** 2  # delta method: d logit(p)/dp = 1 / (p (1 - p))
    return EffectSizes(
        estimates=tuple(float(x) for x in y),
        variances=tuple(float(x) for x in var),
        transform="logit",
        notes=("AUC analysed on the logit scale; variance by the delta method",),
    )


def logit_sensitivity(tp: ArrayLike, fn: ArrayLike) -> EffectSizes:
    """Logit sensitivity ``tp / (tp + fn)`` per site; see :func:`_logit_proportion`."""
    return _logit_proportion(tp, fn, "sensitivity", ("tp", "fn"))


def logit_specificity(tn: ArrayLike, fp: ArrayLike) -> EffectSizes:
    """Logit specificity ``tn / (tn + fp)`` per site; see :func:`_logit_proportion`."""
    return _logit_proportion(tn, fp, "specificity", ("tn", "fp"))


def log_diagnostic_odds_ratio(
    tp: ArrayLike, fp: ArrayLike, fn: ArrayLike, tn: ArrayLike
) -> EffectSizes:
    """Log diagnostic odds ratio ``log(tp·tn / (fp·fn))`` per site, with Woolf's variance.

    ``Var = 1/tp + 1/fp + 1/fn + 1/tn`` (Woolf 1955; Glas et al. 2003). A site with a
    zero cell gets 0.5 added to all four of its cells; other sites are left as they are.

    Raises
    ------
    InputError
        Counts that are negative, not whole numbers, or lengths that differ.

    References
    ----------
    Glas AS et al. (2003). J Clin Epidemiol 56(11):1129-1135.
    doi:10.1016/S0895-4356(03)00177-X
    """
    cells = [_counts(x, name) for x, name in ((tp, "tp"), (fp, "fp"), (fn, "fn"), (tn, "tn"))]
    _same_length(cells, ("tp", "fp", "fn", "tn"))
    table = np.vstack(cells)
    zero = np.any(table == 0, axis=0)
    table = table + CONTINUITY_CORRECTION * zero  # only sites with a zero cell
    a, b, c, d = table
    y = np.log(a * d / (b * c))
    var = 1.0 / a + 1.0 / b + 1.0 / c + 1.0 / d  # Woolf (1955)
    corrected = tuple(int(i) for i in np.flatnonzero(zero))
    return EffectSizes(
        estimates=tuple(float(x) for x in y),
        variances=tuple(float(x) for x in var),
        transform="log",
        corrected=corrected,
        notes=_correction_notes("diagnostic odds ratio analysed on the log scale", corrected),
    )


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


def _logit_proportion(
    events: ArrayLike, others: ArrayLike, what: str, names: tuple[str, str]
) -> EffectSizes:
    """Logit of ``events / (events + others)`` with variance ``1/events + 1/others``.

    A site with a zero cell gets 0.5 added to both of its cells (common practice);
    other sites are left as they are. A site with no cases at all is invalid input.
    """
    x = _counts(events, names[0])
    r = _counts(others, names[1])
    _same_length([x, r], names)
    if np.any(x + r == 0):
        raise InputError(f"{what} is undefined at a site where {names[0]} + {names[1]} is 0")
    zero = (x == 0) | (r == 0)
    x = x + CONTINUITY_CORRECTION * zero
    r = r + CONTINUITY_CORRECTION * zero
    y = np.log(x / r)
    var = 1.0 / x + 1.0 / r  # delta method for logit of a binomial proportion
    corrected = tuple(int(i) for i in np.flatnonzero(zero))
    return EffectSizes(
        estimates=tuple(float(v) for v in y),
        variances=tuple(float(v) for v in var),
        transform="logit",
        corrected=corrected,
        notes=_correction_notes(f"{what} analysed on the logit scale", corrected),
    )


def _correction_notes(first: str, corrected: tuple[int, ...]) -> tuple[str, ...]:
    if not corrected:
        return (first,)
    return (
        first,
        f"0.5 added to every cell of {len(corrected)} site(s) with a zero cell "
        "(continuity correction; other sites unchanged)",
    )


def _as_vector(values: ArrayLike, name: str) -> FloatArray:
    try:
        arr = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{name} must be numbers") from exc
    if arr.ndim != 1:
        raise InputError(f"{name} must be a one-dimensional sequence")
    if not np.all(np.isfinite(arr)):
        raise InputError(f"{name} contains a value that is not a finite number")
    return arr


def _counts(values: ArrayLike, name: str) -> FloatArray:
    arr = _as_vector(values, name)
    if np.any(arr < 0) or np.any(arr != np.round(arr)):
        raise InputError(f"{name} counts must be non-negative whole numbers")
    return arr


def _same_length(arrays: Sequence[FloatArray], names: Sequence[str]) -> None:
    if len({a.size for a in arrays}) > 1:
        raise InputError(f"{', '.join(names)} must have the same number of values")


def _validated(
    estimates: ArrayLike,
    variances: ArrayLike,
    labels: Sequence[str] | None,
    confidence: float,
) -> tuple[FloatArray, FloatArray, tuple[str, ...]]:
    y = _as_vector(estimates, "estimates")
    v = _as_vector(variances, "variances")
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


def _tau2_dersimonian_laird(y: FloatArray, v: FloatArray) -> float:
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


def _solve_generalized_q(y: FloatArray, v: FloatArray, target: float) -> float:
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


def _tau2_reml(y: FloatArray, v: FloatArray) -> float:
    """REML tau² by Fisher scoring (Viechtbauer 2005), truncated at 0; NaN if no convergence.

    Score: ½ [sum w² (y - mu)² - sum w + sum w² / sum w];
    expected information: ½ tr(P²) = ½ [sum w² - 2 sum w³ / sum w + (sum w² / sum w)²],
    with w = 1 / (v + tau²) and P = W - W 1 1' W / sum w.
    """
    tau2 = _tau2_dersimonian_laird(y, v)
    for _ in range(_REML_MAX_ITERATIONS):
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


def _i2_h2(v: FloatArray, tau2: float, q: float, df: int, *, fixed: bool) -> tuple[float, float]:
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
