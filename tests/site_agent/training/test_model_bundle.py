import hashlib
import io
import zipfile
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import torch
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression
from sklearn.preprocessing import StandardScaler

from site_agent.exceptions import BundleError, InputError
from site_agent.training.model_bundle import (
    Architecture,
    BundleManifest,
    build_model,
    bundle_bytes,
    bundle_sha256,
    load_bundle,
    save_bundle,
    single_thread,
)


def _wdbc() -> tuple[pd.DataFrame, np.ndarray]:
    # Wisconsin Diagnostic Breast Cancer data as shipped with scikit-learn
    # (Street, Wolberg & Mangasarian 1993); sklearn codes 0 = malignant.
    bunch = load_breast_cancer(as_frame=True)
    frame = bunch.data.copy()
    frame.columns = [f"f{i}" for i in range(frame.shape[1])]
    return frame, (bunch.target.to_numpy() == 0).astype(int)


def _sklearn_bundle() -> tuple[torch.nn.Module, BundleManifest, pd.DataFrame, np.ndarray]:
    """Return a logistic bundle whose weights are scikit-learn's fitted coefficients."""
    frame, y = _wdbc()
    scaler = StandardScaler().fit(frame.to_numpy())
    reference = LogisticRegression(max_iter=1000).fit(scaler.transform(frame.to_numpy()), y)
    model = build_model("logistic", frame.shape[1])
    with torch.no_grad():
        linear = model[0]
        linear.weight.copy_(torch.tensor(reference.coef_, dtype=torch.float32))
        linear.bias.copy_(torch.tensor(reference.intercept_, dtype=torch.float32))
    manifest = BundleManifest(
        name="sklearn-logistic",
        architecture=Architecture.LOGISTIC,
        feature_names=tuple(frame.columns),
        feature_means=tuple(float(v) for v in scaler.mean_),
        feature_sds=tuple(float(v) for v in scaler.scale_),
    )
    expected = reference.predict_proba(scaler.transform(frame.to_numpy()))[:, 1]
    return model, manifest, frame, expected


def _mlp_bundle(width: int = 8) -> tuple[torch.nn.Module, BundleManifest]:
    torch.manual_seed(3)
    model = build_model("mlp", 4, width)
    manifest = BundleManifest(
        name="tiny-mlp",
        architecture=Architecture.MLP,
        hidden_width=width,
        feature_names=("a", "b", "c", "d"),
        feature_means=(0.0, 1.0, 2.0, 3.0),
        feature_sds=(1.0, 2.0, 3.0, 4.0),
    )
    return model, manifest


def test_predict_matches_sklearn_logistic_regression_probabilities() -> None:
    """A logistic bundle carrying scikit-learn's coefficients reproduces predict_proba."""
    model, manifest, frame, expected = _sklearn_bundle()
    bundle = load_bundle(bundle_bytes(model, manifest))
    # Reference: sklearn.linear_model.LogisticRegression.predict_proba (float64); the
    # bundle computes in float32, hence the tolerance.
    np.testing.assert_allclose(bundle.predict(frame), expected, atol=1e-5)


def test_predict_equals_torch_model_output_on_standardised_features() -> None:
    """Predictions equal sigmoid of the torch model applied to (x - mean) / sd."""
    model, manifest = _mlp_bundle()
    rng = np.random.default_rng(0)
    frame = pd.DataFrame(rng.normal(size=(50, 4)) * 3 + 1, columns=["a", "b", "c", "d"])
    bundle = load_bundle(bundle_bytes(model, manifest))
    x = (frame.to_numpy() - np.array(manifest.feature_means)) / np.array(manifest.feature_sds)
    with torch.no_grad():
        direct = torch.sigmoid(model(torch.tensor(x, dtype=torch.float32))).numpy()
    np.testing.assert_allclose(bundle.predict(frame), direct, rtol=0, atol=1e-7)


def test_predict_uses_columns_by_name_and_ignores_extra_columns() -> None:
    """Reordering columns and adding unrelated ones does not change predictions."""
    model, manifest, frame, _ = _sklearn_bundle()
    bundle = load_bundle(bundle_bytes(model, manifest))
    shuffled = frame[list(reversed(frame.columns))].assign(label=1, case_id="x")
    np.testing.assert_array_equal(bundle.predict(shuffled), bundle.predict(frame))


def test_probabilities_lie_in_unit_interval() -> None:
    """Every prediction is a probability in [0, 1], even for extreme inputs."""
    model, manifest = _mlp_bundle()
    frame = pd.DataFrame({"a": [1e6, -1e6, 0.0], "b": 0.0, "c": 0.0, "d": 0.0})
    probabilities = load_bundle(bundle_bytes(model, manifest)).predict(frame)
    assert np.all((probabilities >= 0) & (probabilities <= 1))


def test_missing_feature_column_raises_input_error_naming_it() -> None:
    """A frame lacking a feature column is refused with the column's name."""
    model, manifest = _mlp_bundle()
    frame = pd.DataFrame({"a": [1.0], "b": [1.0], "d": [1.0]})
    with pytest.raises(InputError, match="feature column 'c' is missing"):
        load_bundle(bundle_bytes(model, manifest)).predict(frame)


def test_non_numeric_feature_value_raises_without_quoting_it() -> None:
    """A non-numeric cell is refused by column name; the value itself is not echoed."""
    model, manifest = _mlp_bundle()
    frame = pd.DataFrame({"a": ["secret-value"], "b": [1.0], "c": [1.0], "d": [1.0]})
    with pytest.raises(InputError, match="'a' has missing or non-numeric") as caught:
        load_bundle(bundle_bytes(model, manifest)).predict(frame)
    assert "secret-value" not in str(caught.value)


def test_save_returns_sha256_of_written_file(tmp_path: Path) -> None:
    """save_bundle's digest equals hashlib's SHA-256 of the file and bundle_sha256 of it."""
    model, manifest = _mlp_bundle()
    path = tmp_path / "model.bundle"
    digest = save_bundle(model, manifest, path)
    # Reference: Python's hashlib.sha256 (FIPS 180-4).
    assert digest == hashlib.sha256(path.read_bytes()).hexdigest()
    assert bundle_sha256(path) == digest == bundle_sha256(path.read_bytes())


def test_same_weights_give_identical_bundle_bytes() -> None:
    """Serialising the same model twice gives byte-identical bundles (stable hash)."""
    model, manifest = _mlp_bundle()
    assert bundle_bytes(model, manifest) == bundle_bytes(model, manifest)


def test_hash_changes_when_one_weight_changes() -> None:
    """Nudging a single weight changes the bundle's SHA-256."""
    model, manifest = _mlp_bundle()
    before = bundle_sha256(bundle_bytes(model, manifest))
    with torch.no_grad():
        model[0][0].weight[0, 0] += 1e-3
    assert bundle_sha256(bundle_bytes(model, manifest)) != before


def test_load_round_trips_through_file_and_bytes(tmp_path: Path) -> None:
    """Loading by path or by bytes gives the same manifest, hash, bytes and predictions."""
    model, manifest = _mlp_bundle()
    path = tmp_path / "m.bundle"
    digest = save_bundle(model, manifest, path)
    from_path = load_bundle(path, expected_sha256=digest)
    from_bytes = load_bundle(path.read_bytes(), expected_sha256=digest.upper())
    frame = pd.DataFrame(np.eye(4), columns=["a", "b", "c", "d"])
    assert from_path.manifest == manifest == from_bytes.manifest
    assert from_path.sha256 == digest and from_path.to_bytes() == path.read_bytes()
    np.testing.assert_array_equal(from_path.predict(frame), from_bytes.predict(frame))


def test_tampered_bytes_are_refused_by_hash_check() -> None:
    """Flipping one byte makes loading with the expected hash fail."""
    model, manifest = _mlp_bundle()
    raw = bundle_bytes(model, manifest)
    digest = bundle_sha256(raw)
    tampered = bytearray(raw)
    tampered[len(tampered) // 2] ^= 0xFF
    with pytest.raises(BundleError, match="does not match"):
        load_bundle(bytes(tampered), expected_sha256=digest)


def test_corrupt_bytes_are_refused_without_hash() -> None:
    """Bytes that are not a bundle archive raise BundleError, not a library error."""
    with pytest.raises(BundleError, match="not a readable archive"):
        load_bundle(b"this is not a zip file")


def _zip(members: dict[str, bytes]) -> bytes:
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w") as archive:
        for name, payload in members.items():
            archive.writestr(name, payload)
    return out.getvalue()


class _NotATensor:
    pass


def test_pickled_objects_in_weights_are_refused() -> None:
    """Weights holding an arbitrary pickled object are refused (weights_only loading)."""
    _, manifest = _mlp_bundle()
    payload = io.BytesIO()
    torch.save({"x": _NotATensor()}, payload)
    raw = _zip(
        {"manifest.json": manifest.model_dump_json().encode(), "weights.pt": payload.getvalue()}
    )
    with pytest.raises(BundleError, match="cannot be read safely"):
        load_bundle(raw)


def test_extra_archive_member_is_refused() -> None:
    """A bundle with a member besides manifest.json and weights.pt is refused."""
    model, manifest = _mlp_bundle()
    with zipfile.ZipFile(io.BytesIO(bundle_bytes(model, manifest))) as archive:
        members = {n: archive.read(n) for n in archive.namelist()}
    members["run_me.py"] = b"print('hi')"
    with pytest.raises(BundleError, match=r"exactly manifest\.json and weights\.pt"):
        load_bundle(_zip(members))


def test_weights_not_fitting_manifest_are_refused() -> None:
    """Weights for a different number of features than the manifest declares are refused."""
    model, _ = _mlp_bundle()
    _, wrong = _mlp_bundle()
    wrong = wrong.model_copy(update={"hidden_width": 9})
    with pytest.raises(BundleError, match="do not fit"):
        bundle_bytes(model, wrong)


def test_invalid_manifest_is_refused_naming_the_field() -> None:
    """A manifest with a bad field raises BundleError naming where."""
    model, manifest = _mlp_bundle()
    with zipfile.ZipFile(io.BytesIO(bundle_bytes(model, manifest))) as archive:
        members = {n: archive.read(n) for n in archive.namelist()}
    members["manifest.json"] = members["manifest.json"].replace(b'"mlp"', b'"forest"')
    with pytest.raises(BundleError, match="manifest is invalid at architecture"):
        load_bundle(_zip(members))


def test_manifest_rejects_inconsistent_standardisation() -> None:
    """A manifest with too few SDs or a zero SD is rejected at construction."""
    with pytest.raises(ValueError, match="one value per feature"):
        BundleManifest(
            name="x",
            architecture=Architecture.LOGISTIC,
            feature_names=("a", "b"),
            feature_means=(0.0, 0.0),
            feature_sds=(1.0,),
        )
    with pytest.raises(ValueError, match="finite and positive"):
        BundleManifest(
            name="x",
            architecture=Architecture.LOGISTIC,
            feature_names=("a",),
            feature_means=(0.0,),
            feature_sds=(0.0,),
        )


def test_predict_restores_torch_thread_count() -> None:
    """Prediction runs single-threaded and leaves torch's thread setting as it was."""
    model, manifest = _mlp_bundle()
    before = torch.get_num_threads()
    with single_thread():
        assert torch.get_num_threads() == 1
    load_bundle(bundle_bytes(model, manifest)).predict(
        pd.DataFrame(np.eye(4), columns=list("abcd"))
    )
    assert torch.get_num_threads() == before
