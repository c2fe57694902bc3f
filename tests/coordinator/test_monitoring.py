"""Monitoring rounds on the in-process engine: windows stored once, resumed, pending labels.

Invented hospitals and numbers, for tests only. Uses the real Flower ServerApp and
ClientApp, real SQLite, the sites' real policies and ledgers.
"""

from __future__ import annotations

import sqlite3
from datetime import date
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.stats import chi2_contingency
from sklearn.metrics import roc_auc_score

from coordinator.engines import run_monitoring
from coordinator.monitoring import MonitoringOutcome
from coordinator.results_store import SqliteResultsStore
from coordinator.window_drift import DriftSettings, analyse_windows
from site_agent.approvals import approve
from site_agent.policy import SitePolicy
from site_agent.protocol import (
    EvaluationPlan,
    MonitoringPlan,
    Operation,
    StudyProtocol,
    uniform_edges,
)
from site_agent.release import SiteRelease
from site_agent.service import SiteSettings

POLICY = SitePolicy(
    allowed_operations=(Operation.MONITOR,), allowed_subgroup_attributes=("scanner_vendor",)
)
UNSUPPRESSED = POLICY.model_copy(update={"min_cell": 1})
"""A policy that suppresses nothing, for checks of exact counts."""
SITES = ("larkspur-general", "quarry-hill-clinic")


def _protocol(windows: int = 3) -> StudyProtocol:
    return StudyProtocol(
        study_id="nodule-watch-2031",
        title="Invented monitoring study",
        evaluation=EvaluationPlan(thresholds=(0.5,), histogram_edges=uniform_edges(5)),
        operations=(Operation.MONITOR,),
        rounds=windows,
        quorum=1,
        reply_timeout_s=60.0,
        monitoring=MonitoringPlan(
            first_window_start=date(2031, 1, 1),
            windows=windows,
            baseline_windows=1,
            mix_attributes=("scanner_vendor",),
        ),
    )


def _table(seed: int, months: int = 3, per_month: int = 80, pending_from: str = "") -> pd.DataFrame:
    """Scored cases spread over ``months`` months of 2031; labels blank from ``pending_from``."""
    rng = np.random.default_rng(seed)
    n = months * per_month
    label = (rng.random(n) < 0.4).astype(int)
    score = np.clip(rng.beta(2 + 3 * label, 5 - 3 * label), 0.0, 1.0)
    month = np.repeat(np.arange(months), per_month)
    day = rng.integers(1, 28, size=n)
    frame = pd.DataFrame(
        {
            "case_id": [f"c{seed}-{i}" for i in range(n)],
            "patient_id": [f"p{seed}-{i}" for i in range(n)],
            "acquired_on": [f"2031-{m + 1:02d}-{d:02d}" for m, d in zip(month, day, strict=True)],
            "label": label.astype(object),
            "score": np.round(score, 6),
            "scanner_vendor": rng.choice(["vendor-a", "vendor-b"], size=n, p=[0.7, 0.3]),
        }
    )
    if pending_from:
        frame.loc[frame["acquired_on"] >= pending_from, "label"] = ""
    return frame


def _sites(
    tmp_path: Path, protocol: StudyProtocol, policy: SitePolicy = POLICY, pending_from: str = ""
) -> list[SiteSettings]:
    settings = []
    for i, name in enumerate(SITES):
        home = tmp_path / "sites" / name
        home.mkdir(parents=True)
        _table(20 + i, pending_from=pending_from).to_csv(home / "cases.csv", index=False)
        (home / "policy.json").write_text(policy.model_dump_json())
        approve(protocol, home / "approvals.json")
        settings.append(
            SiteSettings(
                site=name,
                data_path=home / "cases.csv",
                policy_path=home / "policy.json",
                ledger_path=home / "ledger.jsonl",
            )
        )
    return settings


def _run(
    tmp_path: Path, protocol: StudyProtocol, sites: list[SiteSettings], store: Path
) -> MonitoringOutcome:
    return run_monitoring(
        protocol, None, sites, store_path=store, engine="inprocess", workdir=tmp_path / "run"
    )


def test_each_window_is_stored_once_and_a_rerun_stores_nothing(tmp_path: Path) -> None:
    """Two runs of the same study leave one stored release per site and window."""
    protocol = _protocol()
    sites = _sites(tmp_path, protocol)
    store = tmp_path / "store.sqlite"

    first = _run(tmp_path, protocol, sites, store)
    second = _run(tmp_path, protocol, sites, store)

    assert [w.stored for w in first.windows] == [list(SITES)] * 3
    assert all(w.skipped for w in second.windows)
    with SqliteResultsStore(store) as opened:
        records = opened.windows(protocol.study_id)
    assert len(records) == len(SITES) * 3
    assert {(r.window_start.month, r.window_end.month) for r in records} == {(1, 2), (2, 3), (3, 4)}


def test_an_interrupted_study_resumes_at_the_first_window_not_stored(tmp_path: Path) -> None:
    """Windows lost in a crash are asked again; the window that was stored is skipped."""
    protocol = _protocol()
    sites = _sites(tmp_path, protocol)
    store = tmp_path / "store.sqlite"
    _run(tmp_path, protocol, sites, store)
    with sqlite3.connect(store) as connection:  # the crash: windows 2 and 3 never stored
        connection.execute("DELETE FROM windows WHERE window_start > '2031-01-01'")

    resumed = _run(tmp_path, protocol, sites, store)

    assert resumed.windows[0].skipped
    assert [w.stored for w in resumed.windows[1:]] == [list(SITES)] * 2


def test_window_release_counts_match_the_cases_acquired_in_the_window(tmp_path: Path) -> None:
    """A window's release counts exactly the table's cases of that month (pandas count)."""
    protocol = _protocol()
    sites = _sites(tmp_path, protocol)
    store = tmp_path / "store.sqlite"

    _run(tmp_path, protocol, sites, store)

    table = pd.read_csv(sites[0].data_path, dtype=str, keep_default_na=False)
    february = table[table["acquired_on"].str.startswith("2031-02")]
    with SqliteResultsStore(store) as opened:
        (record,) = [r for r in opened.windows(protocol.study_id, SITES[0]) if r.round_id == 2]
    release = SiteRelease.from_json(record.release_json)
    assert release.statistics.n_observations == len(february)
    # Reference: scikit-learn's roc_auc_score on the window's cases.
    labels = february["label"].astype(int)
    expected_auc = roc_auc_score(labels, february["score"].astype(float))
    assert release.exact.auc.auc == pytest.approx(expected_auc, abs=1e-12)
    vendors = february["scanner_vendor"].value_counts().to_dict()
    assert release.attribute_counts[0].as_dict() == vendors


def test_pending_labels_leave_label_metrics_and_count_in_completeness(tmp_path: Path) -> None:
    """Cases with a pending label are in the score histogram only; completeness counts them."""
    protocol = _protocol()
    sites = _sites(tmp_path, protocol, UNSUPPRESSED, pending_from="2031-03-15")
    store = tmp_path / "store.sqlite"

    _run(tmp_path, protocol, sites, store)
    with SqliteResultsStore(store) as opened:
        records = opened.windows(protocol.study_id)
    findings = analyse_windows(protocol.study_id, records, DriftSettings(baseline_windows=1))

    table = pd.read_csv(sites[0].data_path, dtype=str, keep_default_na=False)
    march = table[table["acquired_on"].str.startswith("2031-03")]
    known = march[march["label"] != ""]
    (record,) = [r for r in records if r.site == SITES[0] and r.round_id == 3]
    release = SiteRelease.from_json(record.release_json)
    assert release.statistics.n_pending == (march["label"] == "").sum()
    assert sum(release.statistics.histogram.all) == len(march)
    assert sum(release.statistics.histogram.positive) == (known["label"] == "1").sum()
    # Reference: scikit-learn's roc_auc_score on the labelled cases only.
    expected_auc = roc_auc_score(known["label"].astype(int), known["score"].astype(float))
    assert release.exact.auc.auc == pytest.approx(expected_auc, abs=1e-12)
    site = next(s for s in findings.sites if s.site == SITES[0])
    assert site.windows[2].label_completeness == pytest.approx(len(known) / len(march))
    assert site.windows[0].label_completeness == 1.0


def test_vendor_mix_statistic_matches_scipy_chi_square(tmp_path: Path) -> None:
    """The window's vendor-mix p-value is scipy's chi-square test on baseline vs window."""
    protocol = _protocol()
    sites = _sites(tmp_path, protocol)
    store = tmp_path / "store.sqlite"

    _run(tmp_path, protocol, sites, store)
    with SqliteResultsStore(store) as opened:
        records = opened.windows(protocol.study_id, SITES[1])
    findings = analyse_windows(protocol.study_id, records, DriftSettings(baseline_windows=1))

    table = pd.read_csv(sites[1].data_path, dtype=str, keep_default_na=False)
    month = table["acquired_on"].str[:7]
    counts = [
        table[month == m]["scanner_vendor"].value_counts().reindex(["vendor-a", "vendor-b"])
        for m in ("2031-01", "2031-02")
    ]
    # Reference: scipy.stats.chi2_contingency without continuity correction.
    expected = chi2_contingency(np.vstack(counts), correction=False).pvalue
    assert findings.sites[0].windows[1].mix_p_value == pytest.approx(expected, rel=1e-9)


def test_a_window_without_cases_is_declined_with_a_reason_and_not_stored(tmp_path: Path) -> None:
    """A fourth month with no case is declined as empty; nothing is stored for it."""
    protocol = _protocol(windows=4)
    sites = _sites(tmp_path, protocol)
    store = tmp_path / "store.sqlite"

    outcome = _run(tmp_path, protocol, sites, store)

    empty = outcome.windows[3]
    assert empty.stored == []
    assert [d.site for d in empty.declines] == list(SITES)
    assert all(d.reason.startswith("window_without_cases") for d in empty.declines)
