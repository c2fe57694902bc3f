"""Parts a site's policy withheld whole read as withheld, never as 0 or as nothing.

The site is the invented Northgate example table with the trial protocol and policy of
``examples/`` (real files). Reference counts come from the table itself, read by pandas:
18 of its cases have no reference standard yet, and the scanner-vendor levels split them
so that one level's count is small, so the site withholds all of them (and with them the
agreement tables, which count them too).
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from coordinator.pooling.assemble import build_results
from coordinator.pooling.study_results import StudyResults
from coordinator.report.study_report import render_report
from coordinator.runs.rounds import RoundOutcome
from site_agent.contract.protocol import StudyProtocol
from site_agent.contract.release import SiteRelease
from site_agent.data.predictions import load_predictions
from site_agent.disclosure.policy import SitePolicy
from site_agent.disclosure.small_cells import apply_policy
from site_agent.evaluation import evaluate_site
from site_agent.statistics.metrics import AGREEMENT_WITHHELD_REASON

EXAMPLES = Path(__file__).parents[3] / "examples"
SITE = "Northgate"


def _release_and_results() -> tuple[SiteRelease, SiteRelease, StudyResults]:
    """Return the site's release before and after its policy, and the study results."""
    protocol = StudyProtocol.load(EXAMPLES / "trial_protocol.json")
    policy = SitePolicy.load(EXAMPLES / "trial_policy.toml")
    raw = evaluate_site(
        load_predictions(EXAMPLES / "northgate_predictions.csv"),
        protocol.evaluation,
        site=SITE,
        protocol_hash=protocol.content_hash(),
    )
    release, _ = apply_policy(raw, policy)
    outcome = RoundOutcome(
        round_number=1,
        protocol_hash=protocol.content_hash(),
        nodes_asked=1,
        releases={SITE: release},
        node_of_site={SITE: 1},
        declines=[],
        faults=[],
    )
    return raw, release, build_results(protocol, outcome, engine="test")


def test_withheld_pending_cases_are_marked_and_counted_out(tmp_path: Path) -> None:
    frame = pd.read_csv(EXAMPLES / "northgate_predictions.csv")
    pending = int(frame["label"].isna().sum())
    raw, release, results = _release_and_results()
    assert pending == 18 and raw.statistics.n_pending == pending  # pandas reference
    stats = release.statistics
    assert stats.pending_withheld and stats.n_pending == 0
    assert stats.n_observations + pending == len(frame)
    flow = next(f for f in results.flow if f.site == SITE)
    assert flow.pending_reference_standard is None  # withheld, not 0
    html = render_report(results, tmp_path / "report.html").read_text()
    assert f"≥ {stats.n_observations + 1}" in html  # observations: a lower bound
    assert "withheld: site policy" in html


def test_withheld_agreement_tables_give_kappa_rows_with_the_reason(tmp_path: Path) -> None:
    raw, release, results = _release_and_results()
    withheld = {t.raters for t in raw.statistics.agreement}
    assert withheld and set(release.statistics.withheld_agreement) == withheld
    assert not release.statistics.agreement
    for first, second in withheld:
        rows = [
            r
            for r in results.metrics
            if r.site == SITE and r.metric == f"kappa {first} vs {second}" and not r.subgroup
        ]
        assert len(rows) == 3  # unweighted, linear, quadratic
        assert all(r.reason == AGREEMENT_WITHHELD_REASON for r in rows)
    html = render_report(results, tmp_path / "report.html").read_text()
    assert AGREEMENT_WITHHELD_REASON in html
