"""A real Flower deployment on 127.0.0.1: one SuperLink and three SuperNodes.

References: the releases are checked against the direct computation without Flower
(``evaluate_site`` then ``apply_policy`` on each site's file) and against the in-process
engine; teardown against the kernel's process table (``/proc``).
"""

from __future__ import annotations

import os
from collections.abc import Callable
from pathlib import Path

import pytest

from coordinator.runs.engines import run_study
from site_agent.contract.protocol import StudyProtocol
from site_agent.contract.release import SiteRelease
from site_agent.exceptions import DeploymentError
from site_agent.service import SiteSettings

pytestmark = pytest.mark.loopback


def _processes_with_env(key: str, value: str) -> list[int]:
    marker = f"{key}={value}".encode()
    found = []
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit() and int(entry.name) != os.getpid():
            try:
                if marker in (entry / "environ").read_bytes().split(b"\0"):
                    found.append(int(entry.name))
            except OSError:
                continue
    return found


def test_loopback_study_equals_inprocess_and_direct_and_leaves_no_process(
    tmp_path: Path,
    study_protocol: StudyProtocol,
    three_sites: list[SiteSettings],
    expected_release: Callable[[SiteSettings, StudyProtocol], SiteRelease],
) -> None:
    """Three SuperNodes release what the in-process engine and the direct computation give."""
    steps: list[str] = []

    loopback = run_study(
        study_protocol,
        None,
        three_sites,
        engine="loopback",
        workdir=tmp_path / "loopback",
        progress=steps.append,
        timeout_s=300.0,
    )
    inprocess = run_study(
        study_protocol, None, three_sites, engine="inprocess", workdir=tmp_path / "inprocess"
    )

    (round_one,) = loopback.rounds
    assert round_one.declines == [] and round_one.faults == []
    assert round_one.releases == inprocess.rounds[0].releases
    for site in three_sites:
        assert round_one.releases[site.site] == expected_release(site, study_protocol)
    flwr_home = tmp_path / "loopback" / "flower" / "home"
    assert _processes_with_env("FLWR_HOME", str(flwr_home)) == []
    assert any("finished" in step for step in steps)


def test_loopback_timeout_raises_with_log_tail_and_leaves_no_process(
    tmp_path: Path, study_protocol: StudyProtocol, three_sites: list[SiteSettings]
) -> None:
    """A run that outlives its timeout raises DeploymentError and is torn down all the same."""
    with pytest.raises(DeploymentError, match=r"(?s)gave no results within 1 s.*--- superlink ---"):
        run_study(
            study_protocol,
            None,
            three_sites,
            engine="loopback",
            workdir=tmp_path / "loopback",
            timeout_s=1.0,
        )

    flwr_home = tmp_path / "loopback" / "flower" / "home"
    assert _processes_with_env("FLWR_HOME", str(flwr_home)) == []
