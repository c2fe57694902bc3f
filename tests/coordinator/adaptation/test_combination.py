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
