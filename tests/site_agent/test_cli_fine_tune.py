"""``sitepool site fine-tune --policy`` shows the release as the disclosure gate would send it.

The images are invented NumPy arrays (noise whose level depends on the label) at an
invented site; the model is an untrained small CNN. Checks are against the gate's own
control (:func:`site_agent.disclosure.adaptation_control.control_adaptation`), which the
gate applies to every fine_tune reply.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import torch
from typer.testing import CliRunner

from simulations.cli import app
from site_agent.contract.adaptation_release import AdaptationRelease
from site_agent.contract.protocol import (
    AdaptationPlan,
    EvaluationPlan,
    ModelReference,
    Operation,
    StudyProtocol,
)
from site_agent.data.images import load_image_table
from site_agent.disclosure.adaptation_control import control_adaptation
from site_agent.disclosure.policy import SitePolicy
from site_agent.notices import RESEARCH_NOTICE
from site_agent.training.image_models import FineTuneLayers, ImagePreprocessing, build_cnn
from site_agent.training.model_bundle import (
    Architecture,
    BundleManifest,
    load_bundle,
    save_bundle,
)


def _site(tmp_path: Path, n: int = 120) -> tuple[Path, Path, Path]:
    """Write a manifest of invented .npy images, a CNN bundle and a fine-tuning protocol."""
    rng = np.random.default_rng(3)
    rows = ["case_id,patient_id,label,image"]
    (tmp_path / "images").mkdir()
    for i in range(n):
        label = int(i % 3 == 0)
        image = rng.normal(1.0, 0.1 + 0.4 * label, size=(16, 16))
        np.save(tmp_path / "images" / f"c{i}.npy", image)
        rows.append(f"c{i},p{i},{label},images/c{i}.npy")
    manifest = tmp_path / "manifest.csv"
    manifest.write_text("\n".join(rows) + "\n")
    torch.manual_seed(0)
    bundle_manifest = BundleManifest(
        name="invented-cnn",
        architecture=Architecture.CNN,
        image=ImagePreprocessing(size=16),
        cnn_channels=(4, 8, 8),
        fine_tune_layers=FineTuneLayers.HEAD,
    )
    bundle = tmp_path / "model.zip"
    sha = save_bundle(build_cnn((4, 8, 8)), bundle_manifest, bundle)
    protocol = StudyProtocol(
        study_id="fine-tune-preview",
        title="Invented fine-tuning preview",
        model=ModelReference(name="invented-cnn", architecture="cnn", sha256=sha),
        evaluation=EvaluationPlan(thresholds=_thresholds(manifest, bundle)),
        operations=(Operation.EVALUATE, Operation.FINE_TUNE),
        adaptation=AdaptationPlan(case_counts=(0, 10), repeats=1, epochs=3, include_all=False),
    )
    protocol_path = tmp_path / "protocol.json"
    protocol_path.write_text(protocol.canonical_json())
    return manifest, bundle, protocol_path


def _thresholds(manifest: Path, bundle: Path) -> tuple[float, ...]:
    """Thresholds at the 3rd, 50th and 97th centiles of the model's scores: some cells small."""
    scores = load_bundle(bundle).predict(load_image_table(manifest))
    return tuple(sorted({round(float(q), 6) for q in np.quantile(scores, (0.03, 0.5, 0.97))}))


def _policy(path: Path, **settings: object) -> Path:
    path.write_text(SitePolicy.model_validate(settings).model_dump_json())
    return path


def _fine_tune(manifest: Path, bundle: Path, protocol: Path, *extra: str) -> tuple[int, str]:
    result = CliRunner().invoke(
        app,
        ["site", "fine-tune", str(manifest), "--protocol", str(protocol),
         "--bundle", str(bundle), *extra],
    )  # fmt: skip
    return result.exit_code, result.output


def test_policy_preview_is_the_gates_control_of_the_release(tmp_path: Path) -> None:
    """With --policy the JSON is control_adaptation(release) and small cells are withheld."""
    manifest, bundle, protocol = _site(tmp_path)
    policy_path = _policy(
        tmp_path / "policy.json",
        min_cell=10,
        allowed_operations=["evaluate", "fine_tune"],
    )

    code_raw, raw = _fine_tune(manifest, bundle, protocol, "--json")
    code_pol, previewed = _fine_tune(
        manifest, bundle, protocol, "--json", "--policy", str(policy_path)
    )
    code_text, text = _fine_tune(manifest, bundle, protocol, "--policy", str(policy_path))

    assert (code_raw, code_pol, code_text) == (0, 0, 0), previewed + text
    expected, suppressed = control_adaptation(
        AdaptationRelease.model_validate_json(raw), SitePolicy.load(policy_path)
    )
    assert suppressed, "the invented site should have confusion cells below 10"
    assert json.loads(previewed) == json.loads(expected.model_dump_json())
    assert "disclosure policy applied: small cells withheld: " in text
    # A metric resting on a censored cell is shown as the range the released counts allow.
    assert "(range: censored cell)" in " ".join(text.split())
    assert " ".join(text.split()).endswith(" ".join(RESEARCH_NOTICE.split()))


def test_policy_without_fine_tune_refuses_as_the_gate_does(tmp_path: Path) -> None:
    """A policy that does not allow fine_tune gives the gate's refusal and exit code 2."""
    manifest, bundle, protocol = _site(tmp_path)
    policy_path = _policy(tmp_path / "policy.json", allowed_operations=["evaluate"])

    code, output = _fine_tune(manifest, bundle, protocol, "--policy", str(policy_path))

    assert code == 2
    assert "operation_not_allowed" in output
