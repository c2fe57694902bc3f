"""A two-site image study on a real Flower deployment on 127.0.0.1 equals the in-process run.

The sites are two of the image rehearsal's invented hospitals, scaled down: Northgate keeps
NumPy images and develops the CNN, Riverside keeps DICOM files whose maker the site maps to
a vendor category. Each SuperNode reads its own manifest, image configuration and images;
the reference is the in-process engine, which runs the same site agents without Flower's
processes (its equality with direct computation is tested in ``test_inprocess.py``).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from coordinator.runs.engines import run_study
from simulations.image_rehearsal import ImageScenario, default_image_scenario, prepare_image_study

pytestmark = pytest.mark.loopback


def test_two_image_sites_release_over_loopback_what_inprocess_gives(tmp_path: Path) -> None:
    """Both SuperNodes score their images with the bundle; releases equal in-process ones."""
    base = default_image_scenario()
    sites = (
        base.sites[0].model_copy(update={"n_cases": 120}),
        base.sites[1].model_copy(update={"n_cases": 80}),
    )
    scenario = ImageScenario(sites=sites, train_epochs=5)
    study = prepare_image_study(scenario, tmp_path / "study", adapt=False)

    loopback = run_study(
        study.protocol,
        study.bundle_path,
        study.settings,
        engine="loopback",
        workdir=tmp_path / "loopback",
        timeout_s=240.0,
    )
    inprocess = run_study(
        study.protocol,
        study.bundle_path,
        study.settings,
        engine="inprocess",
        workdir=tmp_path / "inprocess",
    )

    (round_one,) = loopback.rounds
    assert round_one.declines == [] and round_one.faults == []
    assert sorted(round_one.releases) == sorted(s.name for s in sites)
    assert round_one.releases == inprocess.rounds[0].releases
    riverside = round_one.releases["Riverside Infirmary"]
    assert "vendor_m" in riverside.model_dump_json()
