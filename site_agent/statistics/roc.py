"""ROC analysis: the area under the ROC curve, its variance, and ROC curves.

(Over 500 lines for a reason: DeLong, Obuchowski, the paired and batched forms and the
curve from histograms share the placement values and tie handling written once here.)

Scores are "higher means more likely positive"; labels are 0 (negative) or 1 (positive).
A positive–negative pair counts 1 when the positive scores higher, 1/2 when tied, 0
otherwise (the Mann–Whitney kernel ψ); the AUC is the mean of ψ over all pairs.

References
----------
Hanley JA, McNeil BJ (1982). The meaning and use of the area under a receiver operating
characteristic (ROC) curve. Radiology 143:29–36. doi:10.1148/radiology.143.1.7063747
DeLong ER, DeLong DM, Clarke-Pearson DL (1988). Comparing the areas under two or more
correlated receiver operating characteristic curves: a nonparametric approach.
Biometrics 44:837–845. doi:10.2307/2531595
Sun X, Xu W (2014). Fast implementation of DeLong's algorithm for comparing the areas
under correlated receiver operating characteristic curves. IEEE Signal Processing
Letters 21:1389–1393. doi:10.1109/LSP.2014.2337313
Obuchowski NA (1997). Nonparametric analysis of clustered ROC curve data.
Biometrics 53:567–578. doi:10.2307/2533958
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.stats import norm, rankdata

from site_agent.exceptions import InputError
from site_agent.statistics.estimates import Estimate, two_sided_z

NAN = math.nan
FloatArray = NDArray[np.float64]


@dataclass(frozen=True, slots=True)
class AucEstimate:
    """An AUC with its variance and two confidence intervals.

    ``lower``/``upper`` are the normal interval ``auc ± z·se`` clipped to [0, 1];
    ``logit_lower``/``logit_upper`` are the interval on the logit scale, back-transformed.
    ``reason`` says why any field is NaN (``None`` when every field is defined).
    """

    auc: float
    variance: float
    se: float
    lower: float
    upper: float
    logit_lower: float
    logit_upper: float
    n_positive: int
    n_negative: int
    method: str
    reason: str | None = None
    confidence: float = 0.95

    def to_estimate(self, scale: Literal["normal", "logit"] = "normal") -> Estimate:
        """Return the AUC as an :class:`Estimate` with the normal or logit-scale interval."""
        n = self.n_positive + self.n_negative
        if scale == "logit":
            return Estimate(
                self.auc,
                self.logit_lower,
                self.logit_upper,
                self.se,
                f"{self.method}-logit",
                n,
                self.confidence,
                self.reason,
            )
        return Estimate(
            self.auc, self.lower, self.upper, self.se, self.method, n, self.confidence, self.reason
        )


@dataclass(frozen=True, slots=True)
class AucDifference:
    """The difference ``auc_a − auc_b`` of two correlated AUCs with a z test and interval."""

    auc_a: float
    auc_b: float
    difference: float
    variance: float
    se: float
    z: float
    p_value: float
    lower: float
    upper: float
    reason: str | None = None
    confidence: float = 0.95


@dataclass(frozen=True, slots=True)
class HistogramAuc:
    """An AUC computed from binned scores, with a bound on its distance to the exact AUC."""

    auc: float
    bound: float
    n_positive: int
    n_negative: int
    reason: str | None = None


@dataclass(frozen=True, slots=True)
class RocCurve:
    """ROC points in order of decreasing threshold, from (0, 0) to (1, 1).

    A case is called positive when its score is ``>= threshold``; the first threshold is
    ``inf`` (nothing called positive). Empty tuples and a ``reason`` when a class is absent.
    """

    fpr: tuple[float, ...]
    tpr: tuple[float, ...]
    thresholds: tuple[float, ...]
    reason: str | None = None

    def area(self) -> float:
        """Return the trapezoidal area under the curve (NaN when the curve is undefined)."""
        if not self.fpr:
            return NAN
        return float(np.trapezoid(self.tpr, self.fpr))


# --------------------------------------------------------------------------- validation


def validate_scores_labels(
    scores: ArrayLike, labels: ArrayLike
) -> tuple[FloatArray, NDArray[np.bool_]]:
    """Return ``(scores, labels)`` as a float array and a boolean array, after checking them.

    Raises
    ------
    InputError
        If the arrays are not 1-D of equal length, a score is not finite, or a label is
        not 0/1 (or ``False``/``True``).
    """
    s = np.asarray(scores)
    y = np.asarray(labels)
    if s.ndim != 1 or y.ndim != 1:
        raise InputError("scores and labels must be one-dimensional")
    if s.shape != y.shape:
        raise InputError("scores and labels must have the same length")
    if s.dtype.kind not in "biuf":
        raise InputError("scores must be numbers")
    s = s.astype(np.float64)
    if not np.all(np.isfinite(s)):
        raise InputError("scores must be finite numbers")
    if y.dtype.kind == "b":
        return s, y
    if y.dtype.kind not in "iuf" or not np.all((y == 0) | (y == 1)):
        raise InputError("labels must be 0 or 1")
    return s, y.astype(bool)


def _split(scores: FloatArray, labels: NDArray[np.bool_]) -> tuple[FloatArray, FloatArray]:
    return scores[labels], scores[~labels]


def _missing_class_reason(n_pos: int, n_neg: int) -> str | None:
    if n_pos == 0 and n_neg == 0:
        return "no cases"
    if n_pos == 0:
        return "no positive cases: AUC undefined"
    if n_neg == 0:
        return "no negative cases: AUC undefined"
    return None


# --------------------------------------------------------------------------- point AUC


def auc(scores: ArrayLike, labels: ArrayLike) -> float:
    """Return the empirical AUC (Mann–Whitney U / (m·n), ties counted half).

    NaN when one class is absent.

    References
    ----------
    Hanley JA, McNeil BJ (1982). Radiology 143:29–36, eq. 1 (AUC = U / (m·n)).
    """
    s, y = validate_scores_labels(scores, labels)
    n_pos = int(y.sum())
    n_neg = y.size - n_pos
    if n_pos == 0 or n_neg == 0:
        return NAN
    ranks = rankdata(s)  # midranks: ties share the average rank
    # U = R₁ − m(m + 1)/2 with R₁ the rank sum of the positives; AUC = U / (m·n).
    u = float(ranks[y].sum()) - n_pos * (n_pos + 1) / 2.0
    return u / (n_pos * n_neg)


def _placements(positives: FloatArray, negatives: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Return the structural components V10 (per positive) and V01 (per negative).

    Sun & Xu (2014) eqs. 6–7: V10_i = (T_Z,i − T_X,i)/n and V01_j = 1 − (T_Z,m+j − T_Y,j)/m,
    where T_X, T_Y and T_Z are midranks within positives, within negatives and in both.
    Accepts 2-D arrays (one row per modality); ranks are taken along the last axis.
    """
    m = positives.shape[-1]
    n = negatives.shape[-1]
    tx = rankdata(positives, axis=-1)
    ty = rankdata(negatives, axis=-1)
    tz = rankdata(np.concatenate([positives, negatives], axis=-1), axis=-1)
    v10 = (tz[..., :m] - tx) / n
    v01 = 1.0 - (tz[..., m:] - ty) / m
    return v10, v01


def _intervals(
    value: float, variance: float, z: float
) -> tuple[float, float, float, float, float, str | None]:
    """Return se, normal interval clipped to [0, 1], logit interval, and a reason for NaNs."""
    if not math.isfinite(variance):
        return NAN, NAN, NAN, NAN, NAN, None
    se = math.sqrt(max(variance, 0.0))
    lower = max(value - z * se, 0.0)
    upper = min(value + z * se, 1.0)
    if value <= 0.0 or value >= 1.0:
        return se, lower, upper, NAN, NAN, "AUC is 0 or 1: the logit interval is undefined"
    # Delta method: se(logit θ̂) = se(θ̂) / (θ̂(1 − θ̂)); back-transform with the logistic function.
    logit = math.log(value / (1.0 - value))
    logit_se = se / (value * (1.0 - value))
    logit_lower = 1.0 / (1.0 + math.exp(-(logit - z * logit_se)))
    logit_upper = 1.0 / (1.0 + math.exp(-(logit + z * logit_se)))
    return se, lower, upper, logit_lower, logit_upper, None


def _undefined_auc(n_pos: int, n_neg: int, method: str, reason: str, conf: float) -> AucEstimate:
    return AucEstimate(NAN, NAN, NAN, NAN, NAN, NAN, NAN, n_pos, n_neg, method, reason, conf)


def _auc_estimate(
    value: float,
    variance: float,
    n_pos: int,
    n_neg: int,
    method: str,
    reason: str | None,
    confidence: float,
) -> AucEstimate:
    z = two_sided_z(confidence)
    se, lower, upper, logit_lower, logit_upper, logit_reason = _intervals(value, variance, z)
    return AucEstimate(
        value,
        variance,
        se,
        lower,
        upper,
        logit_lower,
        logit_upper,
        n_pos,
        n_neg,
        method,
        reason or logit_reason,
        confidence,
    )


# --------------------------------------------------------------------------- DeLong


def delong(scores: ArrayLike, labels: ArrayLike, confidence: float = 0.95) -> AucEstimate:
    """Return the empirical AUC with DeLong's nonparametric variance.

    ``var = S10/m + S01/n`` where S10 and S01 are the sample variances of the structural
    components over the m positives and the n negatives, computed in O(N log N) from
    midranks (Sun & Xu 2014). NaN with a reason when a class is absent; the variance is NaN
    when a class has a single case (its sample variance is undefined).

    References
    ----------
    DeLong ER, DeLong DM, Clarke-Pearson DL (1988). Biometrics 44:837–845, eqs. 2–4.
    doi:10.2307/2531595
    Sun X, Xu W (2014). IEEE Signal Processing Letters 21:1389–1393.
    doi:10.1109/LSP.2014.2337313
    """
    two_sided_z(confidence)
    s, y = validate_scores_labels(scores, labels)
    positives, negatives = _split(s, y)
    m, n = positives.size, negatives.size
    reason = _missing_class_reason(m, n)
    if reason is not None:
        return _undefined_auc(m, n, "delong", reason, confidence)
    v10, v01 = _placements(positives, negatives)
    value = float(v10.mean())
    if m < 2 or n < 2:
        reason = "a class has a single case: the DeLong variance is undefined"
        return _auc_estimate(value, NAN, m, n, "delong", reason, confidence)
    # DeLong et al. (1988) eq. 4 for one modality: var = S10/m + S01/n.
    variance = float(np.var(v10, ddof=1) / m + np.var(v01, ddof=1) / n)
    return _auc_estimate(value, variance, m, n, "delong", None, confidence)


def delong_batch(positives: ArrayLike, negatives: ArrayLike) -> tuple[FloatArray, FloatArray]:
    """Return the AUC and DeLong variance of many score sets of one shape at once.

    Row ``i`` of ``positives`` (shape ``(r, m)``) and of ``negatives`` (``(r, n)``) is one
    data set; the answer equals :func:`delong` row by row, without its per-call checks
    and intervals. Used where thousands of simulated sites are evaluated (planning).

    Raises
    ------
    InputError
        Arrays that are not 2-D with the same number of rows, fewer than two cases in a
        class, or non-finite scores.

    References
    ----------
    DeLong ER, DeLong DM, Clarke-Pearson DL (1988). Biometrics 44:837–845, eq. 4.
    Sun X, Xu W (2014). IEEE Signal Processing Letters 21:1389–1393.
    """
    pos = np.asarray(positives, dtype=np.float64)
    neg = np.asarray(negatives, dtype=np.float64)
    if pos.ndim != 2 or neg.ndim != 2 or pos.shape[0] != neg.shape[0]:
        raise InputError("positives and negatives must be 2-D with the same number of rows")
    if pos.shape[1] < 2 or neg.shape[1] < 2:
        raise InputError("each class needs at least two cases for the DeLong variance")
    if not (np.all(np.isfinite(pos)) and np.all(np.isfinite(neg))):
        raise InputError("scores must be finite")
    v10, v01 = _placements(pos, neg)
    value = v10.mean(axis=1)
    # DeLong et al. (1988) eq. 4, one modality per row: var = S10/m + S01/n.
    variance = v10.var(axis=1, ddof=1) / pos.shape[1] + v01.var(axis=1, ddof=1) / neg.shape[1]
    return value, variance


def paired_delong(
    scores_a: ArrayLike, scores_b: ArrayLike, labels: ArrayLike, confidence: float = 0.95
) -> AucDifference:
    """Compare two AUCs measured on the same cases (DeLong's test for correlated AUCs).

    ``scores_b`` may be a second model's scores or a reader's binary or ordinal calls.
    ``var(θ̂_a − θ̂_b) = c'(S10/m + S01/n)c`` with ``c = (1, −1)`` and S10, S01 the 2×2
    sample covariance matrices of the structural components. The test is two-sided.

    References
    ----------
    DeLong ER, DeLong DM, Clarke-Pearson DL (1988). Biometrics 44:837–845, eqs. 5–6.
    doi:10.2307/2531595
    """
    z_crit = two_sided_z(confidence)
    sa, y = validate_scores_labels(scores_a, labels)
    sb, _ = validate_scores_labels(scores_b, labels)
    m = int(y.sum())
    n = y.size - m
    reason = _missing_class_reason(m, n)
    if reason is not None:
        return AucDifference(NAN, NAN, NAN, NAN, NAN, NAN, NAN, NAN, NAN, reason, confidence)
    stacked = np.vstack([sa, sb])
    v10, v01 = _placements(stacked[:, y], stacked[:, ~y])
    auc_a, auc_b = (float(x) for x in v10.mean(axis=1))
    difference = auc_a - auc_b
    if m < 2 or n < 2:
        reason = "a class has a single case: the DeLong variance is undefined"
        return AucDifference(
            auc_a, auc_b, difference, NAN, NAN, NAN, NAN, NAN, NAN, reason, confidence
        )
    # DeLong et al. (1988) eq. 5: S = S10/m + S01/n; var of the contrast c = (1, −1): c'Sc.
    cov = np.cov(v10, ddof=1) / m + np.cov(v01, ddof=1) / n
    variance = float(cov[0, 0] + cov[1, 1] - 2.0 * cov[0, 1])
    variance = max(variance, 0.0)
    se = math.sqrt(variance)
    lower = difference - z_crit * se
    upper = difference + z_crit * se
    if se == 0.0:
        reason = "the two score sets rank the cases identically: the variance is zero"
        return AucDifference(
            auc_a, auc_b, difference, variance, se, NAN, NAN, lower, upper, reason, confidence
        )
    # DeLong et al. (1988) eq. 6: z = (θ̂_a − θ̂_b) / sqrt(c'Sc), two-sided normal p-value.
    z = difference / se
    p_value = float(2.0 * norm.sf(abs(z)))
    return AucDifference(
        auc_a, auc_b, difference, variance, se, z, p_value, lower, upper, None, confidence
    )


# --------------------------------------------------------------------------- Obuchowski


def obuchowski(
    scores: ArrayLike, labels: ArrayLike, clusters: ArrayLike, confidence: float = 0.95
) -> AucEstimate:
    """Return the AUC of clustered data (several observations per patient) with its variance.

    Each cluster (patient) may hold positives, negatives or both. With ``M`` positives and
    ``N`` negatives in ``I`` clusters, ``I10`` of them holding a positive and ``I01`` a
    negative, and V10_i, V01_i the cluster sums of the structural components:
    ``var = S10/M + S01/N + 2·S11/(M·N)``. With one observation per cluster this equals
    the DeLong variance.

    References
    ----------
    Obuchowski NA (1997). Nonparametric analysis of clustered ROC curve data.
    Biometrics 53:567–578, section 2. doi:10.2307/2533958
    """
    two_sided_z(confidence)
    s, y = validate_scores_labels(scores, labels)
    c = np.asarray(clusters)
    if c.ndim != 1 or c.shape != s.shape:
        raise InputError("clusters must be one-dimensional and as long as the scores")
    _, cluster_index = np.unique(c, return_inverse=True)
    cluster_index = cluster_index.reshape(-1)
    n_clusters = int(cluster_index.max()) + 1 if cluster_index.size else 0
    big_m = int(y.sum())
    big_n = y.size - big_m
    reason = _missing_class_reason(big_m, big_n)
    if reason is not None:
        return _undefined_auc(big_m, big_n, "obuchowski", reason, confidence)
    v10, v01 = _placements(s[y], s[~y])
    theta = float(v10.mean())
    pos_cluster = cluster_index[y]
    neg_cluster = cluster_index[~y]
    m_i = np.bincount(pos_cluster, minlength=n_clusters).astype(float)
    n_i = np.bincount(neg_cluster, minlength=n_clusters).astype(float)
    v10_i = np.bincount(pos_cluster, weights=v10, minlength=n_clusters)
    v01_i = np.bincount(neg_cluster, weights=v01, minlength=n_clusters)
    i10 = int(np.count_nonzero(m_i))
    i01 = int(np.count_nonzero(n_i))
    if i10 < 2 or i01 < 2:
        reason = "fewer than two clusters hold a case of each class: variance undefined"
        return _auc_estimate(theta, NAN, big_m, big_n, "obuchowski", reason, confidence)
    dx = v10_i - m_i * theta
    dy = v01_i - n_i * theta
    # Obuchowski (1997) section 2:
    #   S10 = I10/((I10 − 1)M) Σ(V10_i − m_i θ̂)²,  S01 = I01/((I01 − 1)N) Σ(V01_i − n_i θ̂)²,
    #   S11 = I/(I − 1) Σ(V10_i − m_i θ̂)(V01_i − n_i θ̂),  var = S10/M + S01/N + 2·S11/(MN).
    s10 = i10 / ((i10 - 1) * big_m) * float(np.dot(dx, dx))
    s01 = i01 / ((i01 - 1) * big_n) * float(np.dot(dy, dy))
    s11 = n_clusters / (n_clusters - 1) * float(np.dot(dx, dy))
    variance = s10 / big_m + s01 / big_n + 2.0 * s11 / (big_m * big_n)
    return _auc_estimate(theta, variance, big_m, big_n, "obuchowski", None, confidence)


# --------------------------------------------------------------------------- histograms


def _check_counts(
    positive_counts: ArrayLike, negative_counts: ArrayLike
) -> tuple[FloatArray, FloatArray]:
    pos = np.asarray(positive_counts, dtype=float)
    neg = np.asarray(negative_counts, dtype=float)
    if pos.ndim != 1 or neg.ndim != 1 or pos.shape != neg.shape or pos.size == 0:
        raise InputError("positive and negative counts must be 1-D, non-empty, same length")
    if not (np.all(np.isfinite(pos)) and np.all(np.isfinite(neg))):
        raise InputError("histogram counts must be finite")
    if np.any(pos < 0) or np.any(neg < 0):
        raise InputError("histogram counts must not be negative")
    return pos, neg


def histogram_auc(positive_counts: ArrayLike, negative_counts: ArrayLike) -> HistogramAuc:
    """Return the AUC from class-conditional counts on the same ordered score bins.

    Bin ``b`` holds lower scores than bin ``b + 1``. A positive in a higher bin than a
    negative counts 1, a pair in the same bin counts 1/2:
    ``AUC = Σ_b pos_b·(Σ_{c<b} neg_c + neg_b/2) / (P·N)``.

    ``bound = Σ_b pos_b·neg_b / (2·P·N)`` bounds ``|AUC_binned − AUC_exact|`` for the
    underlying scores. Proof: bins are disjoint intervals, so a pair in different bins is
    ordered the same way by the bins and by the scores and contributes the same ψ to both;
    a pair in the same bin contributes 1/2 here and ψ ∈ {0, 1/2, 1} exactly, an error of at
    most 1/2, and there are ``Σ_b pos_b·neg_b`` such pairs out of ``P·N``.

    References
    ----------
    Hanley JA, McNeil BJ (1982). Radiology 143:29–36 (AUC of rating data, ties half).
    """
    pos, neg = _check_counts(positive_counts, negative_counts)
    big_p = float(pos.sum())
    big_n = float(neg.sum())
    n_pos, n_neg = round(big_p), round(big_n)
    reason = _missing_class_reason(int(big_p > 0), int(big_n > 0))
    if reason is not None:
        return HistogramAuc(NAN, NAN, n_pos, n_neg, reason)
    below = np.cumsum(neg) - neg
    value = float(np.dot(pos, below + 0.5 * neg)) / (big_p * big_n)
    bound = 0.5 * float(np.dot(pos, neg)) / (big_p * big_n)
    return HistogramAuc(value, bound, n_pos, n_neg, None)


def mixed_histogram_auc(
    positive: Sequence[tuple[Sequence[float], Sequence[float]]],
    negative: Sequence[tuple[Sequence[float], Sequence[float]]],
) -> HistogramAuc:
    """Return the AUC from histograms whose bin edges may differ, with its error bound.

    ``positive`` and ``negative`` hold ``(edges, counts)`` pairs, e.g. one per site, each
    binning scores on ``[0, 1]`` with its own edges (a site's disclosure step may merge
    bins). A positive in bin ``[a, b)`` and a negative in ``[c, d)`` are ordered for
    certain when the bins do not overlap (``a >= d``: 1; ``b <= c``: 0); a pair whose
    bins overlap counts 1/2. With one common set of edges this is :func:`histogram_auc`.

    ``bound = Σ_overlapping pos·neg / (2·P·N)`` bounds ``|AUC_binned − AUC_exact|``, by the
    argument of :func:`histogram_auc`: only pairs in overlapping bins can be misordered,
    each by at most 1/2.

    References
    ----------
    Hanley JA, McNeil BJ (1982). Radiology 143:29–36 (AUC of rating data, ties half).
    """
    pos_lo, pos_hi, pos_n = _bins(positive)
    neg_lo, neg_hi, neg_n = _bins(negative)
    big_p, big_n = float(pos_n.sum()), float(neg_n.sum())
    n_pos, n_neg = round(big_p), round(big_n)
    reason = _missing_class_reason(int(big_p > 0), int(big_n > 0))
    if reason is not None:
        return HistogramAuc(NAN, NAN, n_pos, n_neg, reason)
    above = pos_lo[:, None] >= neg_hi[None, :]  # positive bin wholly above the negative bin
    below = pos_hi[:, None] <= neg_lo[None, :]
    overlap = ~(above | below)
    pairs = pos_n[:, None] * neg_n[None, :]
    value = float((pairs * above).sum() + 0.5 * (pairs * overlap).sum()) / (big_p * big_n)
    bound = 0.5 * float((pairs * overlap).sum()) / (big_p * big_n)
    return HistogramAuc(value, bound, n_pos, n_neg, None)


def _bins(
    histograms: Sequence[tuple[Sequence[float], Sequence[float]]],
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Stack ``(edges, counts)`` pairs into bin lower edges, upper edges and counts."""
    lows, highs, counts = [], [], []
    for edges, values in histograms:
        e = np.asarray(edges, dtype=float)
        c = np.asarray(values, dtype=float)
        if e.ndim != 1 or c.ndim != 1 or e.size != c.size + 1 or np.any(np.diff(e) <= 0):
            raise InputError("each histogram needs increasing edges, one more than its counts")
        if np.any(c < 0) or not np.all(np.isfinite(c)):
            raise InputError("histogram counts must be finite and not negative")
        lows.append(e[:-1])
        highs.append(e[1:])
        counts.append(c)
    if not counts:
        raise InputError("at least one histogram is needed")
    return np.concatenate(lows), np.concatenate(highs), np.concatenate(counts)


def hanley_mcneil_se(auc_value: float, n_positive: int, n_negative: int) -> float:
    """Return the standard error of an AUC from the AUC and the class sizes alone.

    ``Var = [A(1−A) + (P−1)(Q1−A²) + (N−1)(Q2−A²)] / (P·N)`` with ``Q1 = A/(2−A)`` and
    ``Q2 = 2A²/(1+A)``, which assumes exponential-shaped score distributions. Used where
    only binned counts with differing bins are at hand (the pooled cohort); NaN when a
    class is empty or the AUC is undefined.

    References
    ----------
    Hanley JA, McNeil BJ (1982). The meaning and use of the area under a receiver operating
    characteristic (ROC) curve. Radiology 143:29–36, equation (1).
    doi:10.1148/radiology.143.1.7063747
    """
    a, p, n = auc_value, n_positive, n_negative
    if p < 1 or n < 1 or not math.isfinite(a):
        return NAN
    q1 = a / (2.0 - a)
    q2 = 2.0 * a * a / (1.0 + a)
    variance = (a * (1.0 - a) + (p - 1) * (q1 - a * a) + (n - 1) * (q2 - a * a)) / (p * n)
    return math.sqrt(max(variance, 0.0))


def _curve_from_counts(pos: FloatArray, neg: FloatArray, thresholds: FloatArray) -> RocCurve:
    """Build a curve from counts ordered by decreasing threshold (cumulated here)."""
    big_p = float(pos.sum())
    big_n = float(neg.sum())
    reason = _missing_class_reason(int(big_p > 0), int(big_n > 0))
    if reason is not None:
        return RocCurve((), (), (), reason.replace("AUC", "ROC curve"))
    tpr = np.concatenate([[0.0], np.cumsum(pos) / big_p])
    fpr = np.concatenate([[0.0], np.cumsum(neg) / big_n])
    tpr[-1] = fpr[-1] = 1.0  # exact end point despite rounding in the cumulative sums
    all_thresholds = np.concatenate([[math.inf], thresholds])
    return RocCurve(
        tuple(float(v) for v in fpr),
        tuple(float(v) for v in tpr),
        tuple(float(v) for v in all_thresholds),
    )


def histogram_roc(
    positive_counts: ArrayLike, negative_counts: ArrayLike, edges: ArrayLike
) -> RocCurve:
    """Return the ROC curve of binned scores, one point per bin edge.

    The threshold at the lower edge of bin ``b`` calls every case in bins ``>= b``
    positive. ``edges`` has one more entry than the counts and increases strictly.
    """
    pos, neg = _check_counts(positive_counts, negative_counts)
    e = np.asarray(edges, dtype=float)
    if e.ndim != 1 or e.size != pos.size + 1:
        raise InputError("edges must have exactly one more entry than the counts")
    if not np.all(np.isfinite(e)) or np.any(np.diff(e) <= 0):
        raise InputError("edges must be finite and strictly increasing")
    return _curve_from_counts(pos[::-1], neg[::-1], e[:-1][::-1])


def empirical_roc(scores: ArrayLike, labels: ArrayLike) -> RocCurve:
    """Return the exact empirical ROC curve, one point per distinct score.

    Agrees with ``sklearn.metrics.roc_curve(..., drop_intermediate=False)``.
    """
    s, y = validate_scores_labels(scores, labels)
    distinct, inverse = np.unique(s, return_inverse=True)
    inverse = inverse.reshape(-1)
    pos = np.bincount(inverse[y], minlength=distinct.size).astype(float)
    neg = np.bincount(inverse[~y], minlength=distinct.size).astype(float)
    return _curve_from_counts(pos[::-1], neg[::-1], distinct[::-1])
