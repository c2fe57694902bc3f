"""Drift monitoring on image-derived score distributions (invented phantom sites).

``sitepool rehearse-drift --images`` runs the image monitoring rehearsal: Riverside's
scanner changes (blur, resolution loss, noise) from 3 July (61% of its year), injected by the
scenario, so the expected answer is known by construction: alarms at Riverside from the
first changed window, and none at the three sites whose acquisition does not change
(PSI and binned KS with the monitoring thresholds as they are). Invented images of
invented hospitals.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from typer.testing import CliRunner

from simulations.cli import app
from site_agent.notices import RESEARCH_NOTICE

DRIFTING = "Riverside Infirmary"
STABLE = ("Northgate General", "Lowmoor Community Hospital", "Kestrel Valley Clinic")


@pytest.mark.slow
def test_only_the_site_that_changes_scanner_alarms(tmp_path: Path) -> None:
    """Riverside alarms on its score distribution within 2 windows of the change (window 4).

    Stable sites stay quiet. The target of 2 windows is the drift monitor's (as in the
    feature-table drift rehearsal); the change lands in window 4.
    """
    result = CliRunner().invoke(app, ["rehearse-drift", "--images", "--out", str(tmp_path)])

    assert result.exit_code == 0, result.output
    findings = json.loads((tmp_path / "drift.json").read_text())
    alarmed = {a["site"] for a in findings["alarms"]}
    assert alarmed == {DRIFTING}
    distribution = [a for a in findings["alarms"] if a["metric"] == "score_distribution"]
    assert distribution and 4 <= min(a["window_number"] for a in distribution) < 4 + 2
    page = (tmp_path / "drift-report.html").read_text()
    assert f"Injected: {DRIFTING} changes scanner from window 4" in page
    assert " ".join(result.output.split()).endswith(" ".join(RESEARCH_NOTICE.split()))
