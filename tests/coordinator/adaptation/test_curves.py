"""Adaptation-curve rows and adequate case counts against Rubin's rules written out directly.

Reference: Rubin DB (1987), Multiple imputation for nonresponse in surveys, Wiley,
section 3.1 (combined estimate and variance) and 3.3 (degrees of freedom), written out
below with numpy and scipy.stats.t; the logistic transform is numpy's.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from coordinator.adaptation.combination import combine_differences
from coordinator.adaptation.curves import AUC_CHANGE, adaptation_rows, adequate_cases
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


def test_change_rows_and_findings_cover_every_degraded_site() -> None:
    """Every site below the reference minus margin gets a finding with its change and CI."""
    releases = {
        "alder-bay": _with_changes(
            _release("alder-bay", {0: [0.7], 10: [0.8, 0.82]}), [(0.1, 0.001), (0.12, 0.002)]
        ),
        "brightwater": _with_changes(
            _release("brightwater", {0: [0.7], 10: [0.69, 0.66]}), [(-0.01, 0.001), (-0.04, 0.001)]
        ),
        "cedar-point": _with_changes(
            _release("cedar-point", {0: [0.7], 10: [0.6, 0.58]}), [(-0.1, 0.0004), (-0.12, 0.0004)]
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
    assert set(changes) == {"alder-bay", "brightwater", "cedar-point"}  # not pooled
    for site, pairs in (
        ("alder-bay", [(0.1, 0.001), (0.12, 0.002)]),
        ("brightwater", [(-0.01, 0.001), (-0.04, 0.001)]),
        ("cedar-point", [(-0.1, 0.0004), (-0.12, 0.0004)]),
    ):
        expected = combine_differences([p[0] for p in pairs], [p[1] for p in pairs])
        assert changes[site].estimate == pytest.approx(np.mean([p[0] for p in pairs]))
        assert (changes[site].lower, changes[site].upper) == pytest.approx(
            (expected.lower, expected.upper)
        )
    a, b, c = changes["alder-bay"], changes["brightwater"], changes["cedar-point"]
    # A direction is stated only when the interval excludes 0 (common practice).
    assert a.lower > 0 and b.lower < 0 < b.upper and c.upper < 0
    tail = "paired DeLong on its held-out test set, n = 10 local cases, 2 seeds)."
    assert found == [
        f"Local adaptation raised AUC at alder-bay by {a.estimate:.3f} (95% CI {a.lower:+.3f} "
        f"to {a.upper:+.3f}; {tail}",
        f"Local adaptation did not measurably change AUC at brightwater: {b.estimate:+.3f}, "
        f"an interval that includes no change (95% CI {b.lower:+.3f} to {b.upper:+.3f}; {tail}",
        f"Local adaptation lowered AUC at cedar-point by {-c.estimate:.3f} (95% CI "
        f"{c.lower:+.3f} to {c.upper:+.3f}; {tail}",
    ]
    # a site at the reference is not degraded: no finding for it
    assert change_findings(rows, lines, reference=0.81, margin=0.02) == []
