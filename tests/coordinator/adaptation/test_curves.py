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

from coordinator.adaptation.curves import (
    AUC_CHANGE,
    adaptation_rows,
    adequate_cases,
    auc_logit,
    combine_auc_over_seeds,
    combine_differences,
    combine_over_seeds,
    combine_over_sites,
)
from coordinator.adaptation.fine_tuning import change_findings
from coordinator.pooling.study_results import AdaptationRow, ReferenceLine
from site_agent.contract.adaptation_release import (
    AdaptationPoint,
    AdaptationRelease,
    AucChange,
    Performance,
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


def _with_changes(
    release: AdaptationRelease, changes: list[tuple[float, float]]
) -> AdaptationRelease:
    """Attach (difference, variance) pairs to the release's fine-tuned points, in order."""
    trained = [i for i, p in enumerate(release.points) if p.n_requested != 0]
    points = list(release.points)
    for i, (d, v) in zip(trained, changes, strict=True):
        half = 1.959963984540054 * math.sqrt(v)  # normal 97.5% quantile (scipy.stats.norm.ppf)
        points[i] = points[i].model_copy(
            update={
                "change": AucChange(
                    difference=d,
                    variance=v,
                    lower=d - half,
                    upper=d + half,
                    p_value=None,
                    confidence=0.95,
                )
            }
        )
    return release.model_copy(update={"points": tuple(points)})


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


def test_change_rows_and_findings_cover_every_degraded_site() -> None:
    """Both sites below the reference minus margin get a finding with their change and CI."""
    releases = {
        "alder-bay": _with_changes(
            _release("alder-bay", {0: [0.7], 10: [0.8, 0.82]}), [(0.1, 0.001), (0.12, 0.002)]
        ),
        "brightwater": _with_changes(
            _release("brightwater", {0: [0.7], 10: [0.69, 0.66]}), [(-0.01, 0.001), (-0.04, 0.001)]
        ),
    }
    # both before AUCs are 0.8 (see _release); reference 0.9 and margin 0.02 make both degraded
    lines = [
        ReferenceLine(site=s, line="none", estimate=0.8, lower=0.7, upper=0.9, method="delong")
        for s in releases
    ]

    rows = adaptation_rows(releases, thresholds=())
    found = change_findings(rows, lines, reference=0.9, margin=0.02)

    changes = {r.site: r for r in rows if r.metric == AUC_CHANGE}
    assert set(changes) == {"alder-bay", "brightwater"}  # not pooled
    for site, pairs in (
        ("alder-bay", [(0.1, 0.001), (0.12, 0.002)]),
        ("brightwater", [(-0.01, 0.001), (-0.04, 0.001)]),
    ):
        expected = combine_differences([p[0] for p in pairs], [p[1] for p in pairs])
        assert changes[site].estimate == pytest.approx(np.mean([p[0] for p in pairs]))
        assert (changes[site].lower, changes[site].upper) == pytest.approx(
            (expected.lower, expected.upper)
        )
    a, b = changes["alder-bay"], changes["brightwater"]
    assert found == [
        f"Local adaptation raised AUC at alder-bay by {a.estimate:.3f} (95% CI {a.lower:+.3f} "
        f"to {a.upper:+.3f}; paired DeLong on its held-out test set, n = 10 local cases, "
        "2 seeds).",
        f"Local adaptation lowered AUC at brightwater by {-b.estimate:.3f} (95% CI "
        f"{b.lower:+.3f} to {b.upper:+.3f}; paired DeLong on its held-out test set, n = 10 "
        "local cases, 2 seeds).",
    ]
    # a site at the reference is not degraded: no finding for it
    assert change_findings(rows, lines, reference=0.81, margin=0.02) == []
