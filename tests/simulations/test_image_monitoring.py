"""Drift monitoring on image-derived score distributions (invented phantom sites).

The drifting site's scanner change (blur, resolution loss, noise from 60% of its year on)
is injected by the test's scenario, so the expected direction is known by construction:
its later windows must show lower AUC than its baseline windows and an alarm on the
score distribution. Invented images of invented hospitals.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from simulations.image_monitoring import monitor_images


@pytest.mark.slow
def test_scanner_change_at_one_site_shows_in_its_windows(tmp_path: Path) -> None:
    """Riverside's post-change window has a lower AUC and a score-distribution alarm."""
    result = monitor_images(tmp_path)

    site = next(s for s in result.findings.sites if s.site == result.drifting_site)
    baseline = [w.auc for w in site.windows if w.baseline and w.auc is not None]
    last = site.windows[-1]
    alarms = [a for a in result.findings.alarms if a.site == result.drifting_site]
    assert baseline and last.auc is not None
    assert last.auc < min(baseline) - 0.2
    assert any(a.metric == "score_distribution" and a.window_number >= 3 for a in alarms)
