"""Agreement between two raters (e.g. the model's call and a radiologist's): Cohen's kappa.

References
----------
Cohen J (1960). A coefficient of agreement for nominal scales. Educational and
Psychological Measurement 20:37–46. doi:10.1177/001316446002000104
Cohen J (1968). Weighted kappa: nominal scale agreement with provision for scaled
disagreement or partial credit. Psychological Bulletin 70:213–220. doi:10.1037/h0026256
Fleiss JL, Cohen J, Everitt BS (1969). Large sample standard errors of kappa and weighted
kappa. Psychological Bulletin 72:323–327. doi:10.1037/h0028106
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray

from site_agent.exceptions import InputError
from site_agent.statistics.estimates import Estimate, two_sided_z

Weights = Literal["none", "linear", "quadratic"]


def contingency_table(
    a: ArrayLike, b: ArrayLike, categories: Sequence[object]
) -> NDArray[np.int64]:
    """Return the k×k table of counts: rows are rater A's category, columns rater B's.

    Raises
    ------
    InputError
        If ``a`` and ``b`` differ in length, the categories repeat, or a rating is not one
        of ``categories``.
    """
    xa = np.asarray(a, dtype=object)
    xb = np.asarray(b, dtype=object)
    if xa.ndim != 1 or xb.ndim != 1:
        raise InputError("ratings must be one-dimensional")
    if xa.size != xb.size:
        raise InputError("the two raters must rate the same number of cases")
    cats = list(categories)
    if not cats:
        raise InputError("at least one category is needed")
    index = {c: i for i, c in enumerate(cats)}
    if len(index) != len(cats):
        raise InputError("categories must be distinct")
    try:
        ia = np.fromiter((index[v] for v in xa), dtype=np.int64, count=xa.size)
        ib = np.fromiter((index[v] for v in xb), dtype=np.int64, count=xb.size)
    except (KeyError, TypeError):
        raise InputError("a rating is not one of the given categories") from None
    k = len(cats)
    table = np.zeros((k, k), dtype=np.int64)
    np.add.at(table, (ia, ib), 1)
    return table


def _agreement_weights(k: int, weights: Weights) -> NDArray[np.float64]:
    """Cohen (1968) agreement weights w_ij on k ordered categories (1 on the diagonal)."""
    i, j = np.indices((k, k))
    distance: NDArray[np.float64] = np.abs(i - j).astype(np.float64) / max(k - 1, 1)
    if weights == "none":
        return np.asarray(i == j, dtype=np.float64)
    if weights == "linear":
        return np.asarray(1.0 - distance, dtype=np.float64)
    if weights == "quadratic":
        return np.asarray(1.0 - distance**2, dtype=np.float64)
    raise InputError("weights must be 'none', 'linear' or 'quadratic'")


def cohen_kappa(table: ArrayLike, weights: Weights = "none", confidence: float = 0.95) -> Estimate:
    """Return Cohen's (weighted) kappa from a k×k table with a large-sample interval.

    ``κ_w = (p_o − p_e) / (1 − p_e)`` with ``p_o = Σ w_ij p_ij`` and
    ``p_e = Σ w_ij p_i. p_.j``; unweighted kappa uses the identity weights. The standard
    error is the non-null large-sample one of Fleiss, Cohen & Everitt (1969); the interval
    ``κ ± z·se`` is clipped to [−1, 1]. NaN with a reason when the table is empty or
    ``p_e = 1`` (both raters use a single category).

    Parameters
    ----------
    table
        Square table of non-negative counts; rows rater A, columns rater B, categories in
        the same (ordered, for weighted kappa) order on both axes.
    weights
        ``"none"`` (Cohen 1960), ``"linear"`` (``1 − |i − j|/(k − 1)``) or ``"quadratic"``
        (``1 − (i − j)²/(k − 1)²``), Cohen (1968).
    confidence
        Two-sided confidence level.

    References
    ----------
    Cohen J (1960). Educational and Psychological Measurement 20:37–46.
    Cohen J (1968). Psychological Bulletin 70:213–220. doi:10.1037/h0026256
    Fleiss JL, Cohen J, Everitt BS (1969). Psychological Bulletin 72:323–327, eq. 13.
    doi:10.1037/h0028106
    """
    z = two_sided_z(confidence)
    t = np.asarray(table, dtype=float)
    if t.ndim != 2 or t.shape[0] != t.shape[1] or t.shape[0] == 0:
        raise InputError("the agreement table must be square and non-empty")
    if not np.all(np.isfinite(t)) or np.any(t < 0):
        raise InputError("agreement table counts must be finite and non-negative")
    k = t.shape[0]
    w = _agreement_weights(k, weights)
    method = "cohen-kappa" if weights == "none" else f"cohen-kappa-{weights}"
    n_total = float(t.sum())
    n = round(n_total)
    if n_total == 0:
        return Estimate.undefined(method, 0, "no rated cases", confidence)
    p = t / n_total
    row = p.sum(axis=1)
    col = p.sum(axis=0)
    p_o = float(np.sum(w * p))
    p_e = float(row @ w @ col)
    if p_e >= 1.0 - 1e-12:
        reason = "chance agreement is 1 (a single category in use): kappa undefined"
        return Estimate.undefined(method, n, reason, confidence)
    kappa = (p_o - p_e) / (1.0 - p_e)  # Cohen (1968) eq. 4
    # Fleiss, Cohen & Everitt (1969) eq. 13 with w̄_i. = Σ_j p_.j w_ij, w̄_.j = Σ_i p_i. w_ij:
    # var = [Σ p_ij (w_ij − (w̄_i. + w̄_.j)(1 − κ))² − (κ − p_e(1 − κ))²] / (n (1 − p_e)²)
    w_row = w @ col
    w_col = row @ w
    inner = w - (w_row[:, None] + w_col[None, :]) * (1.0 - kappa)
    numerator = float(np.sum(p * inner**2)) - (kappa - p_e * (1.0 - kappa)) ** 2
    variance = max(numerator, 0.0) / (n_total * (1.0 - p_e) ** 2)
    se = math.sqrt(variance)
    lower = max(kappa - z * se, -1.0)
    upper = min(kappa + z * se, 1.0)
    return Estimate(kappa, lower, upper, se, method, n, confidence)
