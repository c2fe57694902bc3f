"""Image model bundles: the CNN, its hashed preprocessing, TorchScript wrapping, head-only tuning.

Reference implementations: numpy's clip for the DICOM linear window (PS3.3 C.11.2.1.2, simple
form), torch's own TorchScript runtime for a wrapped model. Images are invented for tests.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import torch

from site_agent.exceptions import BundleError
from site_agent.training.image_models import (
    FineTuneLayers,
    ImagePreprocessing,
    IntensityMode,
    build_cnn,
    preprocess,
)
from site_agent.training.model_bundle import (
    Architecture,
    BundleManifest,
    bundle_sha256,
    load_bundle,
    save_bundle,
    wrap_torchscript,
)

WINDOW = ImagePreprocessing(
    size=16, intensity=IntensityMode.WINDOW, window_center=40.0, window_width=400.0
)


def _cnn_manifest(spec: ImagePreprocessing = WINDOW, **extra: object) -> BundleManifest:
    return BundleManifest.model_validate(
        {
            "name": "invented-cnn",
            "architecture": "cnn",
            "image": spec.model_dump(),
            "cnn_channels": (4, 8, 8),
            **extra,
        }
    )


def _images(tmp_path: Path, n: int = 6) -> pd.DataFrame:
    rng = np.random.default_rng(3)
    paths = []
    for i in range(n):
        path = tmp_path / f"img{i}.npy"
        np.save(path, rng.normal(0.0, 300.0, size=(20 + i, 24)))
        paths.append(str(path))
    return pd.DataFrame({"case_id": [f"c{i}" for i in range(n)], "image": paths})


def test_window_preprocessing_matches_a_clip_when_no_resize_is_needed() -> None:
    """At the output size already, the window equals clip((x - (c - w/2)) / w, 0, 1)."""
    image = np.linspace(-400.0, 500.0, 256).reshape(16, 16)
    expected = np.clip((image - (40.0 - 200.0)) / 400.0, 0.0, 1.0)

    out = preprocess([image], WINDOW)

    assert out.shape == (1, 1, 16, 16)
    np.testing.assert_allclose(out[0, 0].numpy(), expected, atol=1e-6)


def test_preprocessing_is_part_of_the_bundle_hash(tmp_path: Path) -> None:
    """The same weights with another window give another SHA-256."""
    torch.manual_seed(0)
    model = build_cnn((4, 8, 8))
    other = WINDOW.model_copy(update={"window_width": 350.0})

    first = save_bundle(model, _cnn_manifest(), tmp_path / "a.zip")
    second = save_bundle(model, _cnn_manifest(other), tmp_path / "b.zip")
    again = save_bundle(model, _cnn_manifest(), tmp_path / "c.zip")

    assert first != second
    assert first == again


def test_cnn_bundle_round_trip_scores_images(tmp_path: Path) -> None:
    """A loaded CNN bundle gives the same probabilities as the model it was saved from."""
    torch.manual_seed(1)
    model = build_cnn((4, 8, 8)).eval()
    digest = save_bundle(model, _cnn_manifest(), tmp_path / "m.zip")
    frame = _images(tmp_path)
    bundle = load_bundle(tmp_path / "m.zip", expected_sha256=digest)
    from site_agent.data.images import read_images

    with torch.no_grad():
        direct = torch.sigmoid(model(preprocess(read_images(list(frame["image"])), WINDOW)))

    np.testing.assert_allclose(bundle.predict(frame), direct.numpy(), rtol=1e-6)


def test_head_only_bundle_freezes_every_layer_but_the_last() -> None:
    """fine_tune_layers='head' leaves only the final linear layer trainable."""
    manifest = _cnn_manifest(fine_tune_layers=FineTuneLayers.HEAD)
    from site_agent.training.model_bundle import bundle_bytes

    raw = bundle_bytes(build_cnn((4, 8, 8)), manifest)
    model = load_bundle(raw).model

    trainable = [name for name, p in model.named_parameters() if p.requires_grad]
    assert trainable == ["10.weight", "10.bias"]


# torch 2.13 marks TorchScript deprecated; teams still ship TorchScript files, so we read them.
@pytest.mark.filterwarnings("ignore:`torch.jit.* is deprecated:DeprecationWarning")
def test_torchscript_file_is_wrapped_unchanged_and_checked_by_hash(tmp_path: Path) -> None:
    """A team's scripted model scores as torch's own runtime does; a changed hash is refused."""
    torch.manual_seed(2)
    scripted = torch.jit.script(build_cnn((4, 8, 8)).eval())
    ts_path = tmp_path / "team-model.pt"
    torch.jit.save(scripted, str(ts_path))
    manifest = BundleManifest(
        name="team-model", architecture=Architecture.TORCHSCRIPT, image=WINDOW
    )

    digest = wrap_torchscript(ts_path, manifest, tmp_path / "bundle.zip")
    frame = _images(tmp_path)
    bundle = load_bundle(tmp_path / "bundle.zip", expected_sha256=digest)
    from site_agent.data.images import read_images

    with torch.no_grad():
        reference = torch.sigmoid(
            torch.jit.load(str(ts_path))(preprocess(read_images(list(frame["image"])), WINDOW))
        )
    np.testing.assert_allclose(bundle.predict(frame), reference.numpy(), rtol=1e-6)
    assert digest == bundle_sha256(tmp_path / "bundle.zip")
    with pytest.raises(BundleError, match="does not match"):
        load_bundle(tmp_path / "bundle.zip", expected_sha256="0" * 64)


def test_image_manifest_refuses_feature_settings() -> None:
    """A cnn manifest with feature names is invalid (feature and image models do not mix)."""
    with pytest.raises(ValueError, match="image models need image preprocessing"):
        _cnn_manifest(feature_names=("feature_a",), feature_means=(0.0,), feature_sds=(1.0,))
