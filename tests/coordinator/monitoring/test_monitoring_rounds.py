"""Monitoring rounds on the in-process engine: windows stored once, resumed, labels maturing.

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
from sklearn.metrics import recall_score, roc_auc_score

from coordinator.monitoring.analysis import DriftSettings, analyse_windows
from coordinator.monitoring.results_store import SqliteResultsStore
from coordinator.monitoring.rounds import MonitoringOutcome
from coordinator.runs.engines import run_monitoring
from site_agent.contract.protocol import (
    DEFAULT_LABEL_HORIZON_MONTHS,
    EvaluationPlan,
    MonitoringPlan,
    Operation,
    StudyProtocol,
    uniform_edges,
)
from site_agent.contract.release import SiteRelease
from site_agent.disclosure.approvals import approve
from site_agent.disclosure.ledger import ReleaseLedger
from site_agent.disclosure.policy import SitePolicy
from site_agent.service import SiteSettings

POLICY = SitePolicy(
    allowed_operations=(Operation.MONITOR,), allowed_subgroup_attributes=("scanner_vendor",)
)
UNSUPPRESSED = POLICY.model_copy(update={"min_cell": 1})
"""A policy that suppresses nothing, for checks of exact counts."""
SITES = ("larkspur-general", "quarry-hill-clinic")
EARLIER_HASH = "d20e1c2875c16c793c136b74f3246515b9eda0d695297efb2aba61ef571cb984"


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
    tmp_path: Path,
    protocol: StudyProtocol,
    sites: list[SiteSettings],
    store: Path,
    as_of: date | None = None,
) -> MonitoringOutcome:
    return run_monitoring(
        protocol,
        None,
        sites,
        store_path=store,
        engine="inprocess",
        workdir=tmp_path / "run",
        as_of=as_of,
    )


def _rewrite_tables(sites: list[SiteSettings], pending_from: str = "") -> None:
    """Write each site's table again as it stands later: same cases, labels as given."""
    for i, site in enumerate(sites):
        assert site.data_path is not None
        _table(20 + i, pending_from=pending_from).to_csv(site.data_path, index=False)


def _requests(sites: list[SiteSettings]) -> list[int]:
    """Count the monitor requests each site answered, from its release ledger."""
    return [
        sum(e.operation == "monitor" for e in ReleaseLedger(s.ledger_path).entries())
        for s in sites
        if s.ledger_path is not None
    ]


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


def test_a_window_fetched_with_pending_labels_is_updated_when_its_labels_arrive(
    tmp_path: Path,
) -> None:
    """Re-fetched once labels arrived, March is replaced, not duplicated; full months not asked."""
    protocol = _protocol()
    sites = _sites(tmp_path, protocol, UNSUPPRESSED, pending_from="2031-03-15")
    store = tmp_path / "store.sqlite"
    first = _run(tmp_path, protocol, sites, store, as_of=date(2031, 4, 1))
    asked_first = _requests(sites)
    _rewrite_tables(sites)  # a month later every label has come back

    second = _run(tmp_path, protocol, sites, store, as_of=date(2031, 5, 1))
    asked_second = _requests(sites)
    third = _run(tmp_path, protocol, sites, store, as_of=date(2031, 6, 1))

    assert [w.awaiting_labels for w in first.windows] == [[], [], list(SITES)]
    assert [w.skipped for w in second.windows] == [True, True, False]
    assert second.windows[2].revised == list(SITES) and second.windows[2].stored == []
    assert all(w.skipped for w in third.windows)
    # Requests each site received, counted in its own release ledger: three, then one more.
    assert asked_first == [3, 3]
    assert asked_second == _requests(sites) == [4, 4]
    with SqliteResultsStore(store) as opened:
        records = opened.windows(protocol.study_id)
    assert len(records) == len(SITES) * 3
    (march,) = [r for r in records if r.site == SITES[0] and r.window_start.month == 3]
    assert (march.revisions, march.pending_cases, march.label_completeness) == (1, 0, 1.0)
    table = pd.read_csv(sites[0].data_path, dtype=str, keep_default_na=False)
    cases = table[table["acquired_on"].str.startswith("2031-03")]
    labels, scores = cases["label"].astype(int), cases["score"].astype(float)
    release = SiteRelease.from_json(march.release_json)
    assert march.labelled_cases == len(cases)  # pandas row count of the month
    # Reference: scikit-learn's roc_auc_score and recall_score on every March case.
    assert release.exact.auc.auc == pytest.approx(roc_auc_score(labels, scores), abs=1e-12)
    findings = analyse_windows(protocol.study_id, records, DriftSettings(baseline_windows=1))
    window = next(s for s in findings.sites if s.site == SITES[0]).windows[2]
    expected_sensitivity = recall_score(labels, (scores >= 0.5).astype(int))
    assert window.sensitivity == pytest.approx(expected_sensitivity, abs=1e-12)
    assert (window.label_completeness, window.revisions) == (1.0, 1)


def test_a_window_past_the_label_horizon_is_final_and_not_asked_again(tmp_path: Path) -> None:
    """A year after March closed, its pending labels are no longer awaited (default horizon)."""
    protocol = _protocol()
    sites = _sites(tmp_path, protocol, UNSUPPRESSED, pending_from="2031-03-15")
    store = tmp_path / "store.sqlite"
    _run(tmp_path, protocol, sites, store, as_of=date(2031, 4, 1))
    _rewrite_tables(sites)

    # March ends 2031-04-01; the horizon adds the plan's 12 months (our default).
    late = _run(tmp_path, protocol, sites, store, as_of=date(2032, 4, 1))

    assert DEFAULT_LABEL_HORIZON_MONTHS == 12
    assert all(w.skipped for w in late.windows)
    assert _requests(sites) == [3, 3]


def test_a_plan_at_the_default_horizon_keeps_its_earlier_protocol_hash() -> None:
    """The horizon at its default leaves the hash of a protocol written before it existed."""
    protocol = _protocol()
    assert protocol.monitoring is not None
    plan = protocol.monitoring.model_copy(update={"label_horizon_months": 18})
    longer = protocol.model_copy(update={"monitoring": plan})

    # Reference: this protocol's hash under site_agent/contract/protocol.py of commit d9a8bdb, the
    # version before label_horizon_months existed.
    assert protocol.content_hash() == EARLIER_HASH
    assert "label_horizon_months" not in protocol.canonical_json()
    assert longer.content_hash() != EARLIER_HASH
