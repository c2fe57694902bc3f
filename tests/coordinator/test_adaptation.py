"""Adaptation-curve summaries against a direct numpy/scipy computation of Rubin's rules.

Reference: Rubin DB (1987), Multiple imputation for nonresponse in surveys, Wiley,
section 3.1 (combined estimate and variance) and 3.3 (degrees of freedom), written out
below with numpy and scipy.stats.t; the logistic transform is numpy's.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from coordinator.adaptation import (
    adaptation_rows,
    adequate_cases,
    auc_logit,
    combine_over_seeds,
    combine_over_sites,
)
from coordinator.study_results import AdaptationRow
from site_agent.adaptation_release import AdaptationPoint, AdaptationRelease, Performance
from site_agent.release import AucRecord


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


def _release(site: str, aucs: dict[int | None, list[float]]) -> AdaptationRelease:
    before = Performance(auc=_auc(0.8, 0.002), at_thresholds=())
    points = tuple(
        AdaptationPoint(
            n_requested=n,
            n_used=n or 100,
            seed=s,
            after=Performance(auc=_auc(a, 0.001 + 0.0005 * s), at_thresholds=()),
        )
        for n, values in aucs.items()
        for s, a in enumerate(values)
    )
    return AdaptationRelease(
        site=site,
        protocol_hash="unregistered",
        weights="bundle",
        n_pool=100,
        n_test=70,
        n_test_positive=30,
        n_test_negative=40,
        before=before,
        points=points,
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


def test_pooled_rows_are_the_mean_of_site_logits() -> None:
    """Pooled estimate = expit(mean of sites' combined logits); variance = sum(T)/k^2."""
    releases = {
        "alder-bay": _release("alder-bay", {0: [0.8, 0.8], 10: [0.82, 0.86]}),
        "brightwater": _release("brightwater", {0: [0.7, 0.7], 10: [0.75, 0.71]}),
    }

    rows = adaptation_rows(releases, thresholds=())

    at10 = {r.site: r for r in rows if r.metric == "auc" and r.n_cases == 10}
    site_logits = []
    site_t = []
    for values, release in (
        (np.array([0.82, 0.86]), "alder-bay"),
        (np.array([0.75, 0.71]), "brightwater"),
    ):
        q = np.log(values / (1 - values))
        u = np.array([0.001, 0.0015]) / (values * (1 - values)) ** 2
        site_logits.append(q.mean())
        site_t.append(u.mean() + 1.5 * q.var(ddof=1))
        assert at10[release].estimate == pytest.approx(1 / (1 + np.exp(-q.mean())))
    pooled_logit = np.mean(site_logits)
    half = stats.norm.ppf(0.975) * np.sqrt(np.sum(site_t) / 4)
    assert at10["pooled"].estimate == pytest.approx(1 / (1 + np.exp(-pooled_logit)))
    assert at10["pooled"].upper == pytest.approx(1 / (1 + np.exp(-(pooled_logit + half))))
    assert at10["alder-bay"].seed_min == 0.82 and at10["alder-bay"].seed_max == 0.86


def test_adequate_cases_is_the_smallest_count_within_the_margin() -> None:
    """Counts in order, whole pool last; none adequate gives None with a reason."""

    def row(site: str, n: int | None, estimate: float) -> AdaptationRow:
        return AdaptationRow(
            site=site,
            metric="auc",
            n_cases=n,
            n_used=n or 99,
            estimate=estimate,
            lower=estimate - 0.05,
            upper=estimate + 0.05,
            seed_min=estimate,
            seed_max=estimate,
        )

    rows = [
        row("alder-bay", 0, 0.80),
        row("alder-bay", 10, 0.89),
        row("alder-bay", 25, 0.91),
        row("brightwater", 0, 0.70),
        row("brightwater", None, 0.91),
        row("cold-harbour", 0, 0.60),
        row("cold-harbour", None, 0.70),
    ]

    found = {a.site: a for a in adequate_cases(rows, reference_auc=0.93, margin=0.02)}

    assert found["alder-bay"].n_cases == 25
    assert found["brightwater"].n_cases is None and found["brightwater"].whole_pool
    assert found["cold-harbour"].n_cases is None and found["cold-harbour"].reason


def test_combine_over_sites_without_defined_sites_is_nan_with_reason() -> None:
    """No defined site gives NaN and a reason, not an error."""
    empty = combine_over_seeds([], [])

    pooled = combine_over_sites([empty])

    assert math.isnan(pooled.estimate) and pooled.reason
