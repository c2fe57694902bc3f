"""Pooling releases into study results, checked against scikit-learn and statsmodels.

The sites are three partitions of scikit-learn's copy of the Wisconsin Diagnostic Breast
Cancer data (Street, Wolberg & Mangasarian 1993), scored by a logistic regression fitted on
a fourth partition; each site's release passes its disclosure policy (min cell 5, merged
bins), so sites release histograms on different bins.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import recall_score, roc_auc_score
from sklearn.preprocessing import StandardScaler
from statsmodels.stats.meta_analysis import combine_effects

from coordinator.pooling.assemble import build_results
from coordinator.pooling.cohort import merge_statistics
from coordinator.pooling.sites import POOLED, SiteInfo
from coordinator.pooling.study_results import COARSE_BINS_REASON, MetricRow
from coordinator.report.study_report import render_report
from coordinator.runs.rounds import RoundOutcome, SiteDecline
from site_agent.contract.protocol import EvaluationPlan, StudyProtocol, uniform_edges
from site_agent.contract.release import SiteRelease
from site_agent.data.predictions import validate_predictions
from site_agent.disclosure.policy import SitePolicy, SmallCellAction
from site_agent.disclosure.small_cells import apply_policy
from site_agent.evaluation import evaluate_site

SITES = ("Larkspur General", "Quarry Hill Clinic", "Saltmarsh Infirmary")
PLAN = EvaluationPlan(
    thresholds=(0.5,), histogram_edges=uniform_edges(40), subgroups=("scanner_vendor",)
)
PROTOCOL = StudyProtocol(study_id="pooling-test", title="Pooling test", evaluation=PLAN)


@pytest.fixture(scope="module")
def tables() -> dict[str, pd.DataFrame]:
    data = load_breast_cancer()
    x, y = data.data, 1 - data.target  # scikit-learn codes 0 = malignant
    order = np.random.default_rng(3).permutation(len(y))
    parts = np.array_split(order, 4)
    x = x[:, [1, 4, 8]]  # mean texture, smoothness, symmetry: a deliberately weak model
    scaler = StandardScaler().fit(x[parts[0]])
    model = LogisticRegression(max_iter=1000).fit(scaler.transform(x[parts[0]]), y[parts[0]])
    out = {}
    for name, idx in zip(SITES, parts[1:], strict=True):
        # A site-specific intensity gain: a crude acquisition shift of every feature.
        gain = {"Larkspur General": 1.0, "Quarry Hill Clinic": 1.15, "Saltmarsh Infirmary": 0.85}
        scores = model.predict_proba(scaler.transform(x[idx] * gain[name]))[:, 1]
        out[name] = pd.DataFrame(
            {
                "case_id": [f"{name[:2]}{i}" for i in idx],
                "patient_id": [f"{name[:2]}p{i // 2}" for i in range(len(idx))],
                "label": y[idx].astype(str),
                "score": scores.round(6).astype(str),
                "scanner_vendor": ["Vendor A" if i % 3 else "Vendor B" for i in idx],
            }
        )
    return out


@pytest.fixture(scope="module")
def raw_releases(tables: dict[str, pd.DataFrame]) -> dict[str, SiteRelease]:
    return {
        name: evaluate_site(
            validate_predictions(table), PLAN, site=name, protocol_hash=PROTOCOL.content_hash()
        )
        for name, table in tables.items()
    }


@pytest.fixture(scope="module")
def releases(raw_releases: dict[str, SiteRelease]) -> dict[str, SiteRelease]:
    return _controlled(raw_releases, SmallCellAction.MERGE)


def _controlled(
    raw: dict[str, SiteRelease], action: SmallCellAction = SmallCellAction.SUPPRESS
) -> dict[str, SiteRelease]:
    """Return each site's release after its policy (min cell 5, vendor subgroups allowed)."""
    policy = SitePolicy(
        min_cell=5, small_cells=action, allowed_subgroup_attributes=("scanner_vendor",)
    )
    return {name: apply_policy(r, policy)[0] for name, r in raw.items()}


def _outcome(releases: dict[str, SiteRelease], declines: list[SiteDecline]) -> RoundOutcome:
    return RoundOutcome(
        round_number=1,
        protocol_hash=PROTOCOL.content_hash(),
        nodes_asked=len(releases) + len(declines),
        releases=releases,
        node_of_site={name: i for i, name in enumerate(releases)},
        declines=declines,
        faults=[],
    )


def test_sites_release_histograms_on_different_bins(releases: dict[str, SiteRelease]) -> None:
    """The disclosure step merged bins differently at each site (the case pooling must handle)."""
    edges = {r.statistics.histogram.edges for r in releases.values()}
    assert len(edges) > 1


@pytest.mark.parametrize("action", list(SmallCellAction))
def test_pooled_auc_lies_within_its_bound_of_the_union_auc(
    tables: dict[str, pd.DataFrame],
    raw_releases: dict[str, SiteRelease],
    action: SmallCellAction,
) -> None:
    """The one-cohort AUC is within its reported binning bound of scikit-learn's on the union."""
    results = build_results(
        PROTOCOL, _outcome(_controlled(raw_releases, action), []), engine="test"
    )
    pooled = next(m for m in results.metrics if m.site == POOLED and m.metric == "auc")
    union = pd.concat(tables.values())
    exact = roc_auc_score(union["label"].astype(int), union["score"].astype(float))
    _holds(pooled, exact)
    if pooled.estimate_low is None:
        assert pooled.lower < pooled.estimate < pooled.upper


def _holds(row: MetricRow, exact: float) -> None:
    """Assert an AUC from bins is within its bound of the exact one, or a range holding it."""
    if row.estimate_low is not None and row.estimate_high is not None:
        assert row.reason == COARSE_BINS_REASON and math.isnan(row.estimate)
        assert row.estimate_low <= 0.5 <= row.estimate_high  # only then is it a range
        assert row.estimate_low <= exact <= row.estimate_high
        return
    assert row.bound is not None
    assert abs(row.estimate - exact) <= row.bound
    assert not row.estimate - row.bound <= 0.5 <= row.estimate + row.bound


def test_bins_too_coarse_to_tell_the_auc_from_chance_give_a_range_not_a_number(
    tables: dict[str, pd.DataFrame], tmp_path: Path
) -> None:
    """Two score bins split at 0.5: the bins allow AUCs on both sides of chance.

    Reference: scikit-learn ``roc_auc_score`` of the union lies in the range; the report
    shows the range and no estimate beside "all cases as one cohort".
    """
    plan = PLAN.model_copy(update={"histogram_edges": uniform_edges(2)})
    policy = SitePolicy(min_cell=5, allowed_subgroup_attributes=("scanner_vendor",))
    releases = {
        name: apply_policy(
            evaluate_site(validate_predictions(t), plan, site=name, protocol_hash="unregistered"),
            policy,
        )[0]
        for name, t in tables.items()
    }
    protocol = PROTOCOL.model_copy(update={"evaluation": plan})
    results = build_results(protocol, _outcome(releases, []), engine="test")
    pooled = next(m for m in results.metrics if m.site == POOLED and m.metric == "auc")
    union = pd.concat(tables.values())
    exact = roc_auc_score(union["label"].astype(int), union["score"].astype(float))
    assert pooled.estimate_low is not None  # the case under test
    _holds(pooled, exact)
    html = render_report(results, tmp_path / "report.html").read_text()
    assert "range the score bins allow" in html
    assert f"{pooled.estimate_low:.3f} to {pooled.estimate_high:.3f}" in html


@pytest.mark.parametrize("action", list(SmallCellAction))
def test_site_aucs_from_bins_lie_within_their_bound_of_scikit_learns(
    tables: dict[str, pd.DataFrame],
    raw_releases: dict[str, SiteRelease],
    action: SmallCellAction,
) -> None:
    """Each site's AUC from bins (spread by all sites' bins) is within its bound of the exact.

    Reference: scikit-learn ``roc_auc_score`` on the site's scores. Under either policy
    action: merged bins, or suppressed bins counted as unknown within their span.
    """
    results = build_results(
        PROTOCOL, _outcome(_controlled(raw_releases, action), []), engine="test"
    )
    for name, table in tables.items():
        row = next(
            m
            for m in results.metrics
            if m.site == name and m.metric == "auc" and m.method == "histogram" and not m.subgroup
        )
        exact = roc_auc_score(table["label"].astype(int), table["score"].astype(float))
        _holds(row, exact)


def test_pooled_sensitivity_equals_recall_on_the_union(
    tables: dict[str, pd.DataFrame], raw_releases: dict[str, SiteRelease]
) -> None:
    """Merged confusion counts give scikit-learn's recall of the union at the threshold."""
    merged = merge_statistics(list(raw_releases.values()))
    union = pd.concat(tables.values())
    called = (union["score"].astype(float) >= 0.5).astype(int)
    expected = recall_score(union["label"].astype(int), called)  # scikit-learn reference
    tp, fn = merged.confusion[0].tp, merged.confusion[0].fn
    assert tp / (tp + fn) == pytest.approx(expected)


# statsmodels takes sqrt of a negative between-study variance in its own unused branch.
@pytest.mark.filterwarnings("ignore:invalid value encountered in sqrt:RuntimeWarning")
def test_meta_analysis_of_site_aucs_matches_statsmodels(
    releases: dict[str, SiteRelease],
) -> None:
    """The DerSimonian-Laird row on logit AUC equals statsmodels' combine_effects."""
    results = build_results(PROTOCOL, _outcome(releases, []), engine="test")
    row = next(m for m in results.meta if m.metric == "auc" and m.method == "dl")
    aucs = np.array([r.exact.auc.auc for r in releases.values()], dtype=float)
    ses = np.array([r.exact.auc.se for r in releases.values()], dtype=float)
    y = np.log(aucs / (1 - aucs))
    v = (ses / (aucs * (1 - aucs))) ** 2  # delta method, common practice
    ref = combine_effects(y, v, method_re="dl")  # statsmodels reference
    # DerSimonian & Laird (1986) truncate tau² at zero; statsmodels 0.15 reports the
    # untruncated moment estimate, and with tau² = 0 the pooled mean is the fixed effect.
    tau2 = max(ref.tau2, 0.0)
    mean = ref.mean_effect_re if ref.tau2 > 0 else ref.mean_effect_fe
    assert row.estimate == pytest.approx(1 / (1 + np.exp(-mean)), rel=1e-9)
    assert row.tau2 == pytest.approx(tau2, rel=1e-9, abs=1e-12)


def test_declined_and_silent_sites_are_reported_with_reasons(
    releases: dict[str, SiteRelease],
) -> None:
    """A declined site keeps its reason; an invited site that never answered is silent."""
    kept = dict(list(releases.items())[:2])
    declined = SiteDecline(site=SITES[2], node_id=9, reason="protocol_not_approved: not approved")
    info = {name: SiteInfo() for name in (*SITES, "Tidewater Hospital")}
    results = build_results(PROTOCOL, _outcome(kept, [declined]), engine="test", sites=info)
    status = {s.site: s for s in results.sites}
    assert status[SITES[2]].status == "declined"
    assert status["Tidewater Hospital"].status == "silent"
    assert any("Tidewater Hospital" in f for f in results.findings)


def test_score_distribution_test_equals_scipy_kruskal_on_binned_scores(
    tables: dict[str, pd.DataFrame], raw_releases: dict[str, SiteRelease]
) -> None:
    """The across-site Kruskal–Wallis equals scipy.stats.kruskal on each case's score bin."""
    from scipy.stats import kruskal

    results = build_results(PROTOCOL, _outcome(raw_releases, []), engine="test")
    test = next(t for t in results.distribution_tests if t.cases == "all cases")
    edges = np.array(PLAN.histogram_edges)
    binned = [  # numpy.histogram's bins: [e_i, e_i+1), the last one closed
        np.clip(np.searchsorted(edges, t["score"].astype(float), side="right") - 1, 0, 39)
        for t in (tables[name] for name in sorted(tables))
    ]
    reference = kruskal(*binned)  # scipy reference, tie-corrected
    assert test.statistic == pytest.approx(reference.statistic, rel=1e-9)
    assert test.p_value == pytest.approx(reference.pvalue, rel=1e-9)
    assert test.reason is None  # nothing suppressed: every case is in the test


def test_score_distribution_test_says_how_many_suppressed_cases_it_leaves_out(
    raw_releases: dict[str, SiteRelease],
) -> None:
    """Under the suppress action the test runs on released bins and says what it lacks."""
    releases = _controlled(raw_releases)
    results = build_results(PROTOCOL, _outcome(releases, []), engine="test")
    left_out = []
    for test in results.distribution_tests:
        row = {"all cases": "all", "positives": "positive", "negatives": "negative"}[test.cases]
        total = {"all": "n_observations", "positive": "n_positive", "negative": "n_negative"}
        hidden = sum(
            getattr(r.statistics, total[row]) - sum(getattr(r.statistics.histogram, row))
            for r in releases.values()
        )
        assert test.n + hidden == sum(getattr(r.statistics, total[row]) for r in releases.values())
        if hidden:
            assert test.reason is not None and f"without {hidden} cases" in test.reason
        left_out.append(hidden)
    assert max(left_out) > 0  # the policy did suppress bins here


def test_pooled_subgroup_sensitivity_equals_recall_on_that_subgroup_of_the_union(
    tables: dict[str, pd.DataFrame], raw_releases: dict[str, SiteRelease]
) -> None:
    """Vendor B's cases from every site, pooled: scikit-learn's recall on the same cases."""
    results = build_results(PROTOCOL, _outcome(raw_releases, []), engine="test")
    row = next(
        m
        for m in results.metrics
        if m.site == POOLED
        and m.subgroup == "scanner_vendor=Vendor B"
        and m.metric == "sensitivity"
    )
    union = pd.concat(tables.values())
    vendor_b = union[union["scanner_vendor"] == "Vendor B"]
    called = (vendor_b["score"].astype(float) >= 0.5).astype(int)
    assert row.estimate == pytest.approx(recall_score(vendor_b["label"].astype(int), called))
    auc = next(
        m
        for m in results.metrics
        if m.site == POOLED and m.subgroup == "scanner_vendor=Vendor B" and m.metric == "auc"
    )
    exact = roc_auc_score(vendor_b["label"].astype(int), vendor_b["score"].astype(float))
    assert auc.bound is not None and abs(auc.estimate - exact) <= auc.bound + 1e-12


def test_site_attribute_subgroup_pools_only_the_external_sites(
    releases: dict[str, SiteRelease],
) -> None:
    """The role=external row pools exactly the external sites' logit AUCs (REML, HKSJ)."""
    from coordinator.pooling.effect_sizes import logit_auc
    from coordinator.pooling.meta_analysis import meta_analyze

    info = {SITES[0]: SiteInfo(role="development"), SITES[1]: SiteInfo(), SITES[2]: SiteInfo()}
    results = build_results(PROTOCOL, _outcome(releases, []), engine="test", sites=info)
    row = next(m for m in results.meta if m.subgroup == "role=external")
    external = [releases[SITES[1]], releases[SITES[2]]]
    effect = logit_auc(
        [float(r.exact.auc.auc or 0) for r in external],
        [float(r.exact.auc.se or 0) for r in external],
    )
    # REML checked against published BCG results in test_meta_analysis.py.
    expected = meta_analyze(
        effect.estimates, effect.variances, method="reml", hksj=True, transform="logit"
    )
    assert row.k == 2
    assert expected.back_transformed is not None
    assert row.estimate == pytest.approx(expected.back_transformed.estimate)
    assert np.isnan(row.prediction_lower)  # k < 3: no prediction interval (Higgins et al. 2009)
    assert not any(m.subgroup == "role=development" for m in results.meta)  # one site only


def test_pooled_calibration_shows_every_sites_bins_and_all_their_cases(
    tables: dict[str, pd.DataFrame], releases: dict[str, SiteRelease]
) -> None:
    """The pooled panel holds each site's released bins: together, every case and positive.

    Reference: the union of the sites' tables, counted by pandas (merged bins, nothing
    suppressed, so every labelled case is in a released bin).
    """
    results = build_results(PROTOCOL, _outcome(releases, []), engine="test")
    calibration = {c.site: c for c in results.curves if c.kind == "calibration"}
    pooled = calibration.pop(POOLED)
    site_points = sorted(
        p for c in calibration.values() for p in zip(c.x, c.y, c.counts or [], strict=True)
    )
    assert sorted(zip(pooled.x, pooled.y, pooled.counts or [], strict=True)) == site_points
    union = pd.concat(tables.values())
    labels = union["label"].astype(int)
    counts = pooled.counts or []
    assert sum(counts) == len(union)
    assert sum(n * y for n, y in zip(counts, pooled.y, strict=True)) == pytest.approx(labels.sum())
