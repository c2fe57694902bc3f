"""Censored cells through pooling and the report, against scikit-learn on the real data.

The Wisconsin diagnostic breast cancer data (scikit-learn's ``load_breast_cancer``; Street,
Wolberg & Mangasarian 1993) is split into three pseudo-sites with invented names; a
logistic regression fitted at the first is evaluated at all three, and each site applies
a minimum cell size of 10, large enough to censor cells at the low threshold. The
unsuppressed values come from scikit-learn (recall, confusion matrix, ROC AUC).
"""

from __future__ import annotations

import math
from functools import cache
from pathlib import Path

import numpy as np
import pandas as pd
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import confusion_matrix, recall_score, roc_auc_score
from sklearn.preprocessing import StandardScaler

from coordinator.pooling.assemble import build_results
from coordinator.pooling.sites import POOLED, SiteInfo
from coordinator.pooling.study_results import StudyResults
from coordinator.report.findings_list import study_finding_lines
from coordinator.report.study_report import render_report
from coordinator.runs.rounds import RoundOutcome
from site_agent.contract.protocol import EvaluationPlan, StudyProtocol, uniform_edges
from site_agent.data.predictions import validate_predictions
from site_agent.disclosure.policy import SitePolicy
from site_agent.disclosure.small_cells import apply_policy
from site_agent.evaluation import evaluate_site
from site_agent.statistics.censored import CensoredCount, cell_range

SITES = ("Brackenridge Infirmary", "Coldharbour Clinic", "Ashgrove Hospital")
THRESHOLD = 0.3
PLAN = EvaluationPlan(histogram_edges=uniform_edges(20), thresholds=(THRESHOLD,))
PROTOCOL = StudyProtocol(study_id="censor-demo", title="Invented study", evaluation=PLAN)
POLICY = SitePolicy(min_cell=10)


@cache
def _tables() -> dict[str, pd.DataFrame]:
    data = load_breast_cancer()
    x, y = data.data[:, [0, 1, 4]], 1 - data.target  # scikit-learn codes 0 = malignant
    parts = np.array_split(np.random.default_rng(5).permutation(len(y)), 3)
    scaler = StandardScaler().fit(x[parts[0]])
    model = LogisticRegression(max_iter=1000).fit(scaler.transform(x[parts[0]]), y[parts[0]])
    out = {}
    for name, idx in zip(SITES, parts, strict=True):
        scores = model.predict_proba(scaler.transform(x[idx]))[:, 1]
        out[name] = pd.DataFrame(
            {
                "case_id": [f"c{i}" for i in idx],
                "patient_id": [f"p{i}" for i in idx],
                "label": y[idx],
                "score": scores.round(6),
            }
        )
    return out


@cache
def _results() -> StudyResults:
    releases = {}
    for name, table in _tables().items():
        raw = evaluate_site(
            validate_predictions(table), PLAN, site=name, protocol_hash=PROTOCOL.content_hash()
        )
        releases[name] = apply_policy(raw, POLICY)[0]
    outcome = RoundOutcome(
        round_number=1,
        protocol_hash=PROTOCOL.content_hash(),
        nodes_asked=3,
        releases=releases,
        node_of_site={n: i for i, n in enumerate(releases)},
        declines=[],
        faults=[],
    )
    return build_results(
        PROTOCOL, outcome, engine="test", sites={SITES[0]: SiteInfo(role="development")}
    )


def _true_cells(table: pd.DataFrame) -> dict[str, int]:
    called = (table["score"] >= THRESHOLD).astype(int)
    tn, fp, fn, tp = confusion_matrix(table["label"], called, labels=[0, 1]).ravel()
    return {"tp": int(tp), "fp": int(fp), "fn": int(fn), "tn": int(tn)}


def test_released_and_pooled_cells_hold_scikit_learn_counts() -> None:
    """Each 2x2 cell, exact or a range, holds scikit-learn's count; some are censored."""
    results = _results()
    union = pd.concat(_tables().values())
    truth = {**{n: _true_cells(t) for n, t in _tables().items()}, POOLED: _true_cells(union)}

    censored = 0
    for t in results.two_by_two:
        for name in ("tp", "fp", "fn", "tn"):
            cell = getattr(t, name)
            low, high = cell_range(cell)
            assert low <= truth[t.site][name] <= high
            censored += isinstance(cell, CensoredCount)
    assert censored >= 2  # the policy censored at least one class pair


def test_sensitivity_on_a_censored_cell_is_a_range_holding_recall() -> None:
    """No point sensitivity on a censored cell; its range holds scikit-learn's recall."""
    results = _results()
    tables = {**_tables(), POOLED: pd.concat(_tables().values())}
    ranged = 0
    for row in results.metrics:
        if row.metric != "sensitivity" or row.method != "wilson" or row.subgroup:
            continue
        t = tables[row.site]
        recall = recall_score(t["label"], (t["score"] >= THRESHOLD).astype(int))
        if row.estimate_low is None:
            assert math.isclose(row.estimate, recall)
            continue
        ranged += 1
        assert math.isnan(row.estimate)
        assert row.estimate_high is not None
        assert row.estimate_low <= recall <= row.estimate_high
    assert ranged >= 1


def test_report_shows_censored_cells_and_says_which_sites_meta_analysis_left_out(
    tmp_path: Path,
) -> None:
    """The 2x2 tables show censored cells as such; the meta-analysis names the site left out.

    A cell censored by the small-cell rule reads "<10"; one whose threshold the
    one-partition rule withheld reads as the range between the neighbouring released
    thresholds ("12–30"). Either way it is the cell's own text, never a count.
    """
    results = _results()
    html = render_report(results, tmp_path / "report.html").read_text()

    censored = [
        cell.text()
        for t in results.two_by_two
        for cell in (t.tp, t.fp, t.fn, t.tn)
        if isinstance(cell, CensoredCount)
    ]
    assert censored
    assert all(text.replace("<", "&lt;") in html for text in censored)
    left_out = [
        t.site for t in results.two_by_two if t.site != POOLED and isinstance(t.fp, CensoredCount)
    ]
    kept = [t.site for t in results.two_by_two if t.site != POOLED and t.site not in left_out]
    assert left_out and len(kept) >= 2
    rows = [m for m in results.meta if m.metric == f"specificity@{THRESHOLD:g}"]
    assert rows and all(m.k == len(kept) for m in rows)
    for m in rows:
        assert m.note is not None
        assert "left out, cells censored by the site's minimum cell size" in m.note
        assert all(site in m.note for site in left_out)
        assert not any(site in m.note for site in kept)


def test_findings_list_opens_with_the_development_auc_of_scikit_learn() -> None:
    """The first finding is the development site's AUC, equal to scikit-learn's ROC AUC."""
    results = _results()
    lines = study_finding_lines(results)
    dev = _tables()[SITES[0]]

    assert lines[0].label == f"Development site ({SITES[0]})"
    assert lines[0].text.startswith(f"AUC {roc_auc_score(dev['label'], dev['score']):.3f} (")
    assert lines[1].label.startswith("Worst external site")


def test_sites_csv_gives_the_range_of_a_censored_sensitivity_not_a_number() -> None:
    """sites.csv: a censored sensitivity has no value, its range in _low/_high holds the truth.

    The unsuppressed sensitivity is scikit-learn's recall_score on the site's own table.
    """
    from coordinator.report.exports import sites_frame

    results = _results()
    frame = sites_frame(results).set_index("site")
    censored = [
        t.site
        for t in results.two_by_two
        if t.site != POOLED and t.threshold == THRESHOLD and isinstance(t.tp, CensoredCount)
    ]
    exact = [s for s in SITES if s not in censored]
    tables = _tables()
    assert censored  # the invented split censors tp at 0.3 at every site

    for site in censored:
        truth = recall_score(tables[site]["label"], tables[site]["score"] >= THRESHOLD)
        assert pd.isna(frame.loc[site, "sensitivity"])
        assert frame.loc[site, "sensitivity_low"] <= truth <= frame.loc[site, "sensitivity_high"]
    for site in exact:
        assert pd.isna(frame.loc[site, "sensitivity_low"])
        assert not pd.isna(frame.loc[site, "sensitivity"])
