"""No DICOM header value, UID or patient identifier leaves a site, or reaches a log or error.

The images are pydicom's shipped test files ``CT_small.dcm`` and ``MR_small.dcm`` (pydicom
3.0), copied with their identifying fields set to sentinel strings. A whole study runs on
them through the in-process engine (evaluation and fine-tuning, the disclosure gate and the
ledger), and the site commands run on them; then every output is searched: the study
outcome file, the ledger, captured log records, captured stdout/stderr, command output
and raised error texts. The hospital "Kestrel Valley" and the study are invented.
"""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np
import pydicom
import pytest
import torch
from pydicom.data import get_testdata_file
from typer.testing import CliRunner

from coordinator.runs.engines import run_study
from simulations.cli import app
from site_agent.contract.protocol import (
    AdaptationPlan,
    EvaluationPlan,
    ModelReference,
    Operation,
    StudyProtocol,
    uniform_edges,
)
from site_agent.data.images import DEFAULT_IMAGE_CONFIG, load_image_table, read_images
from site_agent.disclosure.approvals import approve
from site_agent.disclosure.policy import SitePolicy, UpdateRelease
from site_agent.exceptions import SitepoolError
from site_agent.service import SiteSettings
from site_agent.training.image_models import FineTuneLayers, ImagePreprocessing, build_cnn
from site_agent.training.model_bundle import Architecture, BundleManifest, save_bundle

UID_ROOT = "1.2.826.0.1.3680043.99.7770"
SENTINELS = {
    "PatientName": "SENTINELNAME^ZEBULON",
    "PatientID": "SENTINEL-PID-4411",
    "PatientBirthDate": "19010203",
    "AccessionNumber": "SENTINELACC77",
    "InstitutionName": "SENTINEL INSTITUTION",
    "ReferringPhysicianName": "SENTINELDOC^Y",
    "StationName": "SENTINELSTATION",
    "Manufacturer": "SENTINELVENDOR GE",
    "ManufacturerModelName": "SENTINELMODEL",
    "DeviceSerialNumber": "SENTINELSERIAL",
}
ORIGINAL_VALUES = ("CompressedSamples", "1CT1", "4MR1", "GE MEDICAL", "TOSHIBA")
"""Identifying values of the shipped files themselves (read from them with pydicom 3.0.2)."""


def _write_cases(folder: Path, n: int = 40) -> Path:
    rng = np.random.default_rng(5)
    rows = ["case_id,patient_id,label,acquired_on,image"]
    for i in range(n):
        name = "CT_small.dcm" if i % 2 else "MR_small.dcm"
        source = get_testdata_file(name)
        assert isinstance(source, str)
        ds = pydicom.dcmread(source)
        label = int(rng.random() < 0.5)
        pixels = ds.pixel_array.astype(np.float64)
        pixels += rng.normal(0.0, 40.0 + 200.0 * label, size=pixels.shape)
        ds.PixelData = np.clip(pixels, -1000, 3000).astype(np.int16).tobytes()
        for keyword, value in SENTINELS.items():
            setattr(ds, keyword, value)
        ds.StudyInstanceUID = f"{UID_ROOT}.1.{i}"
        ds.SeriesInstanceUID = f"{UID_ROOT}.2.{i}"
        ds.SOPInstanceUID = f"{UID_ROOT}.3.{i}"
        ds.file_meta.MediaStorageSOPInstanceUID = ds.SOPInstanceUID
        # The folder name itself identifies the patient: paths must not leak either.
        home = folder / f"SENTINELNAME_ZEBULON_{i}"
        home.mkdir(parents=True)
        ds.save_as(home / "image.dcm")
        rows.append(f"c{i},p{i // 2},{label},2031-0{1 + i % 3}-15,{home / 'image.dcm'}")
    manifest = folder / "manifest.csv"
    manifest.write_text("\n".join(rows) + "\n")
    return manifest


def _bundle(path: Path) -> str:
    torch.manual_seed(0)
    manifest = BundleManifest(
        name="invented-image-model",
        architecture=Architecture.CNN,
        image=ImagePreprocessing(size=16),
        cnn_channels=(4, 8, 8),
        fine_tune_layers=FineTuneLayers.HEAD,
    )
    return save_bundle(build_cnn((4, 8, 8)), manifest, path)


def _leaks(text: str) -> list[str]:
    needles = [*SENTINELS.values(), UID_ROOT, "SENTINEL", *ORIGINAL_VALUES]
    return [n for n in needles if n.casefold() in text.casefold()]


def test_no_header_value_reaches_any_output(
    tmp_path: Path, caplog: pytest.LogCaptureFixture, capfd: pytest.CaptureFixture[str]
) -> None:
    """A study and the site commands on sentinel-tagged DICOM files never show a sentinel."""
    caplog.set_level(logging.DEBUG)
    manifest = _write_cases(tmp_path / "images")
    sha = _bundle(tmp_path / "model.zip")
    protocol = StudyProtocol(
        study_id="kestrel-images-2031",
        title="Invented image study",
        model=ModelReference(name="invented-image-model", architecture="cnn", sha256=sha),
        evaluation=EvaluationPlan(
            thresholds=(0.5,),
            histogram_edges=uniform_edges(8),
            subgroups=("scanner_vendor", "modality"),
        ),
        operations=(Operation.EVALUATE, Operation.FINE_TUNE),
        adaptation=AdaptationPlan(
            case_counts=(0,), repeats=1, epochs=3, federated_rounds=1, local_epochs=2
        ),
        quorum=1,
        reply_timeout_s=120.0,
    )
    home = tmp_path / "site"
    home.mkdir()
    policy = home / "policy.json"
    policy.write_text(
        SitePolicy(
            allowed_subgroup_attributes=("scanner_vendor", "modality"),
            allowed_operations=protocol.operations,
            updates=UpdateRelease(allowed=True),
        ).model_dump_json()
    )
    approve(protocol, home / "approvals.json")
    config = tmp_path / "images.json"
    config.write_text(DEFAULT_IMAGE_CONFIG.model_dump_json())
    site = SiteSettings(
        site="kestrel-valley",
        data_path=manifest,
        policy_path=policy,
        ledger_path=home / "ledger.jsonl",
        image_config_path=config,
    )

    outcome = run_study(
        protocol, tmp_path / "model.zip", [site], engine="inprocess", workdir=tmp_path / "run"
    )
    protocol_path = tmp_path / "protocol.json"
    protocol_path.write_text(protocol.model_dump_json())
    runner = CliRunner()
    evaluate = runner.invoke(
        app,
        [
            *("site", "evaluate", str(manifest), "--json"),
            *("--bundle", str(tmp_path / "model.zip"), "--protocol", str(protocol_path)),
            *("--image-config", str(config)),
        ],
    )
    tune = runner.invoke(
        app,
        [
            *("site", "fine-tune", str(manifest), "--protocol", str(protocol_path)),
            *("--bundle", str(tmp_path / "model.zip"), "--image-config", str(config)),
        ],
    )
    broken = tmp_path / "images" / "SENTINELNAME_ZEBULON_3" / "image.dcm"
    broken.write_bytes(broken.read_bytes()[:400])
    with pytest.raises(SitepoolError) as damaged:
        read_images(list(load_image_table(manifest, DEFAULT_IMAGE_CONFIG)["image"]))

    assert outcome.rounds and outcome.fine_tuning is not None
    assert evaluate.exit_code == 0 and tune.exit_code == 0, evaluate.output + tune.output
    captured = capfd.readouterr()
    outputs = {
        "study outcome": (tmp_path / "run" / "study-outcome.json").read_text(),
        "ledger": (home / "ledger.jsonl").read_text(),
        "logs": caplog.text,
        "stdout/stderr": captured.out + captured.err,
        "site evaluate": evaluate.output,
        "site fine-tune": tune.output,
        "error": str(damaged.value),
    }
    assert "vendor_a" in outputs["site evaluate"]  # the site's category, not the header value
    assert {name: _leaks(text) for name, text in outputs.items()} == {k: [] for k in outputs}
