"""Fixtures of the transport tests: invented hospital sites with tables, policies and ledgers.

The hospitals, the study and every number are invented for tests only.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest

from site_agent.contract.protocol import EvaluationPlan, StudyProtocol, uniform_edges
from site_agent.contract.release import SiteRelease
from site_agent.data.predictions import load_predictions
from site_agent.disclosure.approvals import approve
from site_agent.disclosure.policy import SitePolicy
from site_agent.disclosure.small_cells import apply_policy
from site_agent.evaluation import evaluate_site
from site_agent.service import SiteSettings

INVENTED_SITES = ("larkspur-general", "quarry-hill-clinic", "saltmarsh-infirmary")
SITE_POLICY = SitePolicy(allowed_subgroup_attributes=("scanner_vendor",))
"""Every invented site's policy: the defaults (min cell 5, no noise) plus one attribute."""


def write_site_table(path: Path, seed: int, n_cases: int = 60) -> Path:
    """Write a scored predictions CSV: two cases per patient, a vendor attribute."""
    rng = np.random.default_rng(seed)
    label = (rng.random(n_cases) < 0.4).astype(int)
    score = np.clip(rng.beta(2 + 3 * label, 5 - 3 * label), 0.0, 1.0)
    vendor = rng.choice(["vendor-a", "vendor-b"], size=n_cases)
    lines = ["case_id,patient_id,label,score,scanner_vendor"]
    for i in range(n_cases):
        lines.append(f"c{seed}-{i},p{seed}-{i // 2},{label[i]},{score[i]:.6f},{vendor[i]}")
    path.write_text("\n".join(lines) + "\n")
    return path


def _expected_release(site: SiteSettings, protocol: StudyProtocol) -> SiteRelease:
    """Compute the reference: the site's release computed directly, without Flower.

    ``evaluate_site`` on the site's file, then the site's disclosure policy as
    ``site_agent.disclosure.small_cells.apply_policy`` applies it (no noise, so deterministic).
    """
    release = evaluate_site(
        load_predictions(site.data_path),
        protocol.evaluation,
        site=site.site,
        protocol_hash=protocol.content_hash(),
    )
    return apply_policy(release, SITE_POLICY)[0]


@pytest.fixture
def expected_release() -> Callable[[SiteSettings, StudyProtocol], SiteRelease]:
    """Return ``expected_release(site, protocol)``, the direct computation without Flower."""
    return _expected_release


@pytest.fixture
def study_protocol() -> StudyProtocol:
    """Return an invented study in which sites bring their own scores."""
    return StudyProtocol(
        study_id="chest-nodule-transfer-2031",
        title="External validation of an invented nodule classifier",
        evaluation=EvaluationPlan(
            thresholds=(0.3, 0.5), histogram_edges=uniform_edges(20), subgroups=("scanner_vendor",)
        ),
        quorum=2,
        reply_timeout_s=60.0,
    )


@pytest.fixture
def make_site(tmp_path: Path, study_protocol: StudyProtocol) -> Callable[[str, Path], SiteSettings]:
    """Return ``make_site(name, table)``: a site with that table that approved the protocol."""

    def make(name: str, table: Path) -> SiteSettings:
        home = tmp_path / "sites" / name
        home.mkdir(parents=True, exist_ok=True)
        policy = home / "policy.json"
        policy.write_text(SITE_POLICY.model_dump_json())
        approve(study_protocol, home / "approvals.json")
        return SiteSettings(
            site=name, data_path=table, policy_path=policy, ledger_path=home / "ledger.jsonl"
        )

    return make


@pytest.fixture
def three_sites(
    tmp_path: Path, make_site: Callable[[str, Path], SiteSettings]
) -> list[SiteSettings]:
    """Return three invented hospitals, each with a table, policy, approval and ledger."""
    data = tmp_path / "site-data"
    data.mkdir()
    return [
        make_site(name, write_site_table(data / f"{name}.csv", seed=11 + i))
        for i, name in enumerate(INVENTED_SITES)
    ]
