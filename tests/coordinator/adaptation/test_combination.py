"""Rubin's rules over seeds and the logit scale, against a direct numpy/scipy computation.

Reference: Rubin DB (1987), Multiple imputation for nonresponse in surveys, Wiley,
section 3.1 (combined estimate and variance) and 3.3 (degrees of freedom), written out
below with numpy and scipy.stats.t; the logistic transform is numpy's.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from coordinator.adaptation.combination import (
    auc_logit,
    combine_auc_over_seeds,
    combine_differences,
    combine_over_seeds,
    combine_over_sites,
)
from site_agent.contract.release import AucRecord


def _auc(value: float, variance: float) -> AucRecord:
    se = math.sqrt(variance)
    return AucRecord(
        auc=value,
        variance=variance,
        se=se,
        lower=value - 2 * se,
        upper=min(value + 2 * se, 1.0),
        logit_lower=None,
        logit_upper=None,
        n_positive=30,
        n_negative=40,
        method="delong",
        confidence=0.95,
    )


def test_combine_over_seeds_matches_rubins_rules_computed_with_numpy() -> None:
    """Estimate, interval and df equal Rubin's formulas written out directly."""
    q = np.array([0.9, 1.3, 1.1, 0.7])
    u = np.array([0.04, 0.05, 0.03, 0.06])

    c = combine_over_seeds(q, u)

    m = q.size
    b = q.var(ddof=1)
    t = u.mean() + (1 + 1 / m) * b  # Rubin (1987) 3.1.5
    df = (m - 1) * (1 + u.mean() / ((1 + 1 / m) * b)) ** 2  # Rubin (1987) 3.3
    half = stats.t.ppf(0.975, df) * np.sqrt(t)
    expit = lambda x: 1 / (1 + np.exp(-x))  # noqa: E731
    assert c.estimate == pytest.approx(expit(q.mean()), rel=1e-12)
    assert (c.lower, c.upper) == pytest.approx((expit(q.mean() - half), expit(q.mean() + half)))
    assert c.df == pytest.approx(df) and c.variance == pytest.approx(t)


def test_auc_logit_is_the_delta_method_variance() -> None:
    """Var(logit A) = Var(A) / (A(1-A))^2 (delta method, common practice)."""
    logit, variance = auc_logit(_auc(0.8, 0.0016))

    assert logit == pytest.approx(np.log(0.8 / 0.2))
    assert variance == pytest.approx(0.0016 / (0.8 * 0.2) ** 2)


def test_combine_over_sites_without_defined_sites_is_nan_with_reason() -> None:
    """No defined site gives NaN and a reason, not an error."""
    empty = combine_over_seeds([], [])

    pooled = combine_over_sites([empty])

    assert math.isnan(pooled.estimate) and pooled.reason


def test_combine_differences_is_rubins_rules_without_a_transformation() -> None:
    """Estimate, interval and df equal Rubin's formulas on the raw difference scale."""
    d = np.array([0.06, 0.09, 0.04])
    u = np.array([0.0009, 0.0012, 0.0010])

    c = combine_differences(d, u)

    m = d.size
    b = d.var(ddof=1)
    t = u.mean() + (1 + 1 / m) * b  # Rubin (1987) 3.1.5
    df = (m - 1) * (1 + u.mean() / ((1 + 1 / m) * b)) ** 2  # Rubin (1987) 3.3
    half = stats.t.ppf(0.975, df) * np.sqrt(t)  # scipy's t quantile
    assert c.estimate == pytest.approx(d.mean(), rel=1e-12)
    assert (c.lower, c.upper) == pytest.approx((d.mean() - half, d.mean() + half))
    assert c.variance == pytest.approx(t) and c.df == pytest.approx(df)


def _edge_auc(
    value: float, variance: float, n_positive: int = 12, n_negative: int = 23
) -> AucRecord:
    return AucRecord(
        auc=value,
        variance=variance,
        se=math.sqrt(variance),
        lower=None,
        upper=None,
        logit_lower=None,
        logit_upper=None,
        n_positive=n_positive,
        n_negative=n_negative,
        method="delong",
        confidence=0.95,
    )


def _hanley_mcneil_variance(a: float, p: int, n: int) -> float:
    """Hanley & McNeil (1982), Radiology 143:29-36, equation (1), written out again."""
    q1, q2 = a / (2 - a), 2 * a * a / (1 + a)
    return (a * (1 - a) + (p - 1) * (q1 - a * a) + (n - 1) * (q2 - a * a)) / (p * n)


def test_seeds_at_auc_1_give_a_truncated_interval_on_the_auc_scale() -> None:
    """With seeds at AUC 1 the interval is Rubin's on the AUC scale, cut at 1, and narrow.

    Before this rule, seeds at 1 sat at logit log(2PN) and the interval ran down to
    about 0.5 (a small development test set with 12 positives and 23 negatives).
    """
    aucs = [1.0, 1.0, 0.99, 0.985, 1.0]
    delong = [0.0, 0.0, 0.0001, 0.00015, 0.0]
    records = [_edge_auc(a, v) for a, v in zip(aucs, delong, strict=True)]

    combined, method = combine_auc_over_seeds(records)

    # Rubin (1987) 3.1.2-3.1.6 on the AUC scale; Hanley-McNeil variance at 1 - 1/(2PN)
    # where DeLong's is 0 (numpy and scipy.stats.t as the reference computation).
    corrected = 1 - 0.5 / (12 * 23)
    u = np.array([v or _hanley_mcneil_variance(corrected, 12, 23) for v in delong])
    q = np.array(aucs)
    m = q.size
    b = q.var(ddof=1)
    t = u.mean() + (1 + 1 / m) * b
    df = (m - 1) * (1 + u.mean() / ((1 + 1 / m) * b)) ** 2
    half = stats.t.ppf(0.975, df) * np.sqrt(t)
    assert method == "rubin-auc-truncated"
    assert combined.estimate == pytest.approx(q.mean())
    assert combined.lower == pytest.approx(q.mean() - half)
    assert combined.upper == 1.0  # q.mean() + half exceeds 1: the interval is cut there
    assert q.mean() + half > 1.0
    assert 0.9 < combined.lower < combined.estimate <= combined.upper <= 1.0
    # the logit-scale rule on the same seeds is what ran down towards 0.5
    logit_rule = combine_over_seeds(*zip(*(auc_logit(r) for r in records), strict=True))
    assert logit_rule.lower < 0.8


def test_every_seed_at_auc_1_keeps_an_interval_of_sampling_uncertainty() -> None:
    """All seeds at 1: the interval is [1 - t*se_HM, 1] with Hanley-McNeil's SE, not a point."""
    records = [_edge_auc(1.0, 0.0) for _ in range(5)]

    combined, _ = combine_auc_over_seeds(records)

    se = math.sqrt(_hanley_mcneil_variance(1 - 0.5 / (12 * 23), 12, 23))
    assert combined.estimate == 1.0 and combined.upper == 1.0
    assert combined.lower == pytest.approx(1.0 - stats.norm.ppf(0.975) * se)
    assert 0.95 < combined.lower < 1.0


def test_seeds_inside_the_unit_interval_keep_the_logit_rule() -> None:
    """No seed at 0 or 1: the result is combine_over_seeds of the logits, method rubin-logit."""
    records = [_edge_auc(a, 0.001) for a in (0.8, 0.85, 0.83)]

    combined, method = combine_auc_over_seeds(records)

    expected = combine_over_seeds(*zip(*(auc_logit(r) for r in records), strict=True))
    assert method == "rubin-logit"
    assert (combined.estimate, combined.lower, combined.upper) == pytest.approx(
        (expected.estimate, expected.lower, expected.upper)
    )
