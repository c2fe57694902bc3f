"""Rubin's rules: combining an adaptation metric over seeds (and the sites' means).

Each seed of one site and case count gives an estimate and its variance; on the logit
scale (:func:`auc_logit`, :func:`proportion_logit`, :func:`metric_logit`) they are
combined by Rubin's rules (:func:`combine_over_seeds`): the mean of the seeds' logits, with
a variance that adds the mean within-seed variance (DeLong for the AUC, binomial for
sensitivity and specificity) and the between-seed variance. Paired AUC changes are
combined on their own scale (:func:`combine_differences`). Across sites
(:func:`combine_over_sites`) the sites' logit estimates are averaged with equal weights,
the sites treated as fixed.

References
----------
D.B. Rubin (1987). Multiple imputation for nonresponse in surveys. Wiley, New York.
Chapter 3 (combining rules, degrees of freedom). DOI: 10.1002/9780470316696
J.A. Hanley, B.J. McNeil (1982). Radiology 143:29-36 (AUC variance, used when the
DeLong variance is 0).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import stats

from site_agent.contract.adaptation_release import Performance
from site_agent.contract.release import AucRecord
from site_agent.statistics.censored import CensoredCount
from site_agent.statistics.estimates import two_sided_z
from site_agent.statistics.roc import hanley_mcneil_se


@dataclass(frozen=True, slots=True)
class Combined:
    """A metric combined over seeds (or sites) on the logit scale, back-transformed."""

    estimate: float
    lower: float
    upper: float
    logit: float
    variance: float
    df: float
    m: int
    reason: str | None = None


def _expit(x: float) -> float:
    return 1.0 / (1.0 + math.exp(-x))


def combine_over_seeds(
    logits: Sequence[float], variances: Sequence[float], confidence: float = 0.95
) -> Combined:
    """Combine per-seed logit estimates with Rubin's rules.

    ``q̄ = mean(q)``, ``W = mean(u)``, ``B = var(q, ddof=1)``, ``T = W + (1 + 1/m)·B``,
    ``df = (m − 1)·(1 + W / ((1 + 1/m)·B))²`` (infinite when ``B = 0``); the interval is
    ``q̄ ± t_df·√T``, back-transformed with the logistic function. NaN with a reason when
    no seed gave a finite value.

    References
    ----------
    D.B. Rubin (1987). Multiple imputation for nonresponse in surveys. Wiley. Section 3.1,
    equations (3.1.2)-(3.1.6) and the degrees of freedom of Section 3.3.
    """
    pooled = _rubin(logits, variances, confidence)
    if pooled is None:
        nan = math.nan
        return Combined(nan, nan, nan, nan, nan, nan, 0, "no seed gave a defined estimate")
    q_bar, total, df, half, m = pooled
    return Combined(_expit(q_bar), _expit(q_bar - half), _expit(q_bar + half), q_bar, total, df, m)


def combine_differences(
    differences: Sequence[float], variances: Sequence[float], confidence: float = 0.95
) -> Combined:
    """Combine per-seed AUC differences (after − before) with Rubin's rules on their scale.

    The same rules as :func:`combine_over_seeds`, without a transformation: a difference of
    AUCs lies in [−1, 1] and its paired DeLong variance is on that scale. ``logit`` holds
    the combined difference itself.

    References
    ----------
    D.B. Rubin (1987). Multiple imputation for nonresponse in surveys. Wiley. Section 3.1,
    equations (3.1.2)-(3.1.6) and Section 3.3. DeLong ER, DeLong DM, Clarke-Pearson DL
    (1988). Biometrics 44:837-845 (the per-seed variances).
    """
    pooled = _rubin(differences, variances, confidence)
    if pooled is None:
        nan = math.nan
        return Combined(nan, nan, nan, nan, nan, nan, 0, "no seed gave a defined difference")
    q_bar, total, df, half, m = pooled
    return Combined(q_bar, q_bar - half, q_bar + half, q_bar, total, df, m)


def combine_auc_over_seeds(
    records: Sequence[AucRecord], confidence: float = 0.95
) -> tuple[Combined, str]:
    """Combine the seeds' AUCs: on the logit scale, or on the AUC scale when a seed is at 0 or 1.

    While every seed's AUC lies strictly inside (0, 1) this is :func:`combine_over_seeds`
    on :func:`auc_logit` (method ``"rubin-logit"``). A seed whose AUC is exactly 1 (or 0)
    has no finite logit: the half-pair correction puts it at ``log(2·P·N)``, a value set by
    the sample size rather than the data, and the between-seed variance it creates can
    stretch the interval down to 0. Then Rubin's rules run on the AUC scale itself, each
    seed with its DeLong variance (Hanley-McNeil at the half-pair-corrected value where
    DeLong's is 0, as in :func:`auc_logit`), and the interval is truncated to [0, 1]
    (method ``"rubin-auc-truncated"``): its bound at 1 is a bound, not an estimate. The
    returned ``logit`` and ``variance`` are the delta-method transforms of that mean, so
    the pooled mean over sites (:func:`combine_over_sites`) still applies.

    References
    ----------
    D.B. Rubin (1987). Multiple imputation for nonresponse in surveys. Wiley. Section 3.1.
    J.A. Hanley, B.J. McNeil (1982). Radiology 143:29-36, equation (1).
    """
    defined = [r for r in records if r.auc is not None and r.n_positive and r.n_negative]
    if all(r.auc is not None and 0.0 < r.auc < 1.0 for r in defined):
        pairs = [auc_logit(r) for r in records]
        logit_method = combine_over_seeds([a for a, _ in pairs], [b for _, b in pairs], confidence)
        return logit_method, "rubin-logit"
    values = [float(r.auc) for r in defined if r.auc is not None]
    variances = [_auc_variance(r) for r in defined]
    pooled = _rubin(values, variances, confidence)
    assert pooled is not None  # at least one seed is defined on this branch
    q_bar, total, df, half, m = pooled
    pairs_min = min(r.n_positive * r.n_negative for r in defined)
    a = min(max(q_bar, 0.5 / pairs_min), 1.0 - 0.5 / pairs_min)
    combined = Combined(
        q_bar,
        max(0.0, q_bar - half),
        min(1.0, q_bar + half),
        math.log(a / (1.0 - a)),
        total / (a * (1.0 - a)) ** 2,  # delta method, as in auc_logit
        df,
        m,
    )
    return combined, "rubin-auc-truncated"


def _auc_variance(record: AucRecord) -> float:
    """DeLong's variance, or Hanley-McNeil's at the half-pair-corrected AUC where it is 0."""
    if record.variance:
        return float(record.variance)
    assert record.auc is not None  # callers pass defined records only
    pairs = record.n_positive * record.n_negative
    a = min(max(record.auc, 0.5 / pairs), 1.0 - 0.5 / pairs)
    return float(hanley_mcneil_se(a, record.n_positive, record.n_negative) ** 2)


def _rubin(
    estimates: Sequence[float], variances: Sequence[float], confidence: float
) -> tuple[float, float, float, float, int] | None:
    """Return ``q̄, T, df``, the interval's half-width and ``m``; None without finite input."""
    q = np.asarray(estimates, dtype=float)
    u = np.asarray(variances, dtype=float)
    keep = np.isfinite(q) & np.isfinite(u)
    q, u = q[keep], u[keep]
    m = int(q.size)
    if m == 0:
        return None
    q_bar = float(q.mean())
    within = float(u.mean())
    between = float(q.var(ddof=1)) if m > 1 else 0.0
    total = within + (1.0 + 1.0 / m) * between  # Rubin (1987) eq. 3.1.5
    if between > 0:
        df = (m - 1) * (1.0 + within / ((1.0 + 1.0 / m) * between)) ** 2  # Rubin (1987) 3.3
        quantile = float(stats.t.ppf(0.5 + confidence / 2.0, df))
    else:
        df = math.inf
        quantile = two_sided_z(confidence)
    return q_bar, total, df, quantile * math.sqrt(total), m


def combine_over_sites(combined: Sequence[Combined], confidence: float = 0.95) -> Combined:
    """Mean of the sites' logit estimates, each site weighted equally; variance ``ΣT/k²``.

    The sites are treated as fixed: the interval describes the mean over these sites.
    """
    defined = [c for c in combined if math.isfinite(c.logit) and math.isfinite(c.variance)]
    k = len(defined)
    if k == 0:
        nan = math.nan
        return Combined(nan, nan, nan, nan, nan, nan, 0, "no site gave a defined estimate")
    q_bar = sum(c.logit for c in defined) / k
    variance = sum(c.variance for c in defined) / k**2
    half = two_sided_z(confidence) * math.sqrt(variance)
    return Combined(
        _expit(q_bar), _expit(q_bar - half), _expit(q_bar + half), q_bar, variance, math.inf, k
    )


def auc_logit(record: AucRecord) -> tuple[float, float]:
    """Return an AUC's logit and the delta-method variance of that logit.

    ``Var(logit A) ≈ Var(A) / (A(1 − A))²``. An AUC of 0 or 1 is moved half a pair
    inside the unit interval, ``1/(2·P·N)`` (common practice, like the 0.5 correction
    of proportions), and where DeLong's variance is 0 the Hanley-McNeil variance at that
    value stands in. NaN for an undefined AUC.
    """
    if record.auc is None or record.n_positive < 1 or record.n_negative < 1:
        return math.nan, math.nan
    pairs = record.n_positive * record.n_negative
    a = min(max(record.auc, 0.5 / pairs), 1.0 - 0.5 / pairs)
    variance = record.variance if record.variance else 0.0
    if variance <= 0.0:
        variance = hanley_mcneil_se(a, record.n_positive, record.n_negative) ** 2
    return math.log(a / (1.0 - a)), variance / (a * (1.0 - a)) ** 2


def proportion_logit(successes: int, trials: int) -> tuple[float, float]:
    """Return ``logit(p̃)`` and ``1 / (n' p̃ (1 − p̃))`` with ``p̃ = (x + ½)/(n + 1)``.

    The ½ added to each cell (Haldane's correction; common practice) keeps 0 and 1 finite.
    NaN when there are no trials.
    """
    if trials < 1:
        return math.nan, math.nan
    n = trials + 1.0
    p = (successes + 0.5) / n
    return math.log(p / (1.0 - p)), 1.0 / (n * p * (1.0 - p))


def metric_logit(perf: Performance, metric: str, threshold: float | None) -> tuple[float, float]:
    """Return the logit and its variance of ``metric`` in one :class:`Performance`."""
    if metric == "auc":
        return auc_logit(perf.auc)
    for t in perf.at_thresholds:
        if t.threshold != threshold:
            continue
        right, wrong = (t.tp, t.fn) if metric == "sensitivity" else (t.tn, t.fp)
        if isinstance(right, CensoredCount) or isinstance(wrong, CensoredCount):
            return math.nan, math.nan  # censored by the site's minimum cell size: left out
        return proportion_logit(right, right + wrong)
    return math.nan, math.nan
