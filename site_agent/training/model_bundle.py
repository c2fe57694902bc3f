"""The model bundle: one file holding a small classifier for feature tables, with its manifest.

A bundle is a ZIP archive with exactly two members:

``manifest.json``
    A :class:`BundleManifest`: architecture, feature names in order, the standardisation
    (means and SDs) the model expects, a training summary and the torch version.
``weights.pt``
    The model's ``state_dict`` written by :func:`torch.save` and read back with
    ``weights_only=True``, so loading never runs pickled code.

The SHA-256 of the whole file identifies the model in a study protocol. A site checks that
hash *before* anything in the file is parsed; a mismatch or a damaged file raises
:class:`~site_agent.exceptions.BundleError`. Bundles are written byte-for-byte
reproducibly (fixed ZIP timestamps, sorted JSON), so the same weights give the same hash.

Two architectures map standardised features to one logit: ``logistic`` (a single linear
layer) and ``mlp`` (one hidden ReLU layer of configurable width). Two more read images
(:mod:`site_agent.training.image_models`): ``cnn``, the project's small 2D CNN, and
``torchscript``, a model a team brings as a TorchScript file, stored unchanged as the
``weights.pt`` member. Both carry their :class:`ImagePreprocessing` in the manifest, so the
preprocessing is hashed with the weights, and read the images named by a table's ``image``
column (:mod:`site_agent.data.images`).

Prediction runs on CPU with torch limited to one thread for the duration of the call (and
restored after): small models gain nothing from more threads, and one thread
makes results bit-for-bit repeatable and keeps the agent from competing with its host.
"""

from __future__ import annotations

import hashlib
import io
import json
import warnings
import zipfile
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from enum import StrEnum
from pathlib import Path

import numpy as np
import numpy.typing as npt
import pandas as pd
import torch
from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from site_agent.data.predictions import IMAGE_COLUMN
from site_agent.exceptions import BundleError, InputError
from site_agent.training.image_models import (
    DEFAULT_CHANNELS,
    FineTuneLayers,
    ImagePreprocessing,
    build_cnn,
    freeze_for_fine_tuning,
    preprocess,
)

BUNDLE_FORMAT_VERSION = 1
DEFAULT_HIDDEN_WIDTH = 16
MAX_BUNDLE_BYTES = 64 * 1024 * 1024
"""Largest bundle a site will read; the models here are a few kilobytes."""

_MANIFEST_MEMBER = "manifest.json"
_WEIGHTS_MEMBER = "weights.pt"
_ZIP_DATE = (1980, 1, 1, 0, 0, 0)


class Architecture(StrEnum):
    """Model architectures a bundle may declare."""

    LOGISTIC = "logistic"
    MLP = "mlp"
    CNN = "cnn"
    TORCHSCRIPT = "torchscript"

    @property
    def reads_images(self) -> bool:
        """Whether the model's inputs are images rather than feature columns."""
        return self in (Architecture.CNN, Architecture.TORCHSCRIPT)


class TrainingSummary(BaseModel):
    """How the weights were obtained; descriptive, never row-level."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    site: str = Field(description="Name of the site whose data trained the model.")
    n_cases: int = Field(ge=0, description="Training cases (observations).")
    n_positive: int = Field(ge=0, description="Training cases with label 1.")
    optimizer: str
    iterations: int = Field(ge=0)
    weight_decay: float = Field(ge=0.0)
    seed: int
    final_loss: float = Field(description="Mean training cross-entropy at the end.")


class BundleManifest(BaseModel):
    """What a bundle declares about its model."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    format_version: int = Field(default=BUNDLE_FORMAT_VERSION, ge=1)
    name: str = Field(min_length=1, max_length=120)
    architecture: Architecture
    hidden_width: int | None = Field(
        default=None, ge=1, le=4096, description="Hidden units; only for the mlp architecture."
    )
    feature_names: tuple[str, ...] = Field(default=(), description="Input columns, in order.")
    feature_means: tuple[float, ...] = Field(
        default=(), description="Subtracted from each input column."
    )
    feature_sds: tuple[float, ...] = Field(
        default=(), description="Each centred column is divided by this."
    )
    image: ImagePreprocessing | None = Field(
        default=None, description="Image models only: preprocessing of every input image."
    )
    cnn_channels: tuple[int, int, int] | None = Field(
        default=None, description="cnn only: channels of the three convolution blocks."
    )
    fine_tune_layers: FineTuneLayers = Field(
        default=FineTuneLayers.ALL,
        description="Weights fine-tuning may change: 'head' (last layer) or 'all'.",
    )
    training: TrainingSummary | None = None
    torch_version: str = Field(default_factory=lambda: str(torch.__version__))

    @model_validator(mode="after")
    def _consistent(self) -> BundleManifest:
        n = len(self.feature_names)
        if self.architecture.reads_images:
            if self.image is None or n or self.feature_means or self.feature_sds:
                raise ValueError("image models need image preprocessing and take no features")
            if (self.architecture is Architecture.CNN) != (self.cnn_channels is not None):
                raise ValueError("cnn_channels goes with (only) the cnn architecture")
        elif n == 0 or self.image is not None or self.cnn_channels is not None:
            raise ValueError("feature models need feature names and take no image settings")
        if len(set(self.feature_names)) != n:
            raise ValueError("feature names must be unique")
        if len(self.feature_means) != n or len(self.feature_sds) != n:
            raise ValueError("feature_means and feature_sds need one value per feature")
        if not all(np.isfinite(self.feature_means)):
            raise ValueError("feature_means must be finite")
        if not all(np.isfinite(s) and s > 0 for s in self.feature_sds):
            raise ValueError("feature_sds must be finite and positive")
        if self.format_version != BUNDLE_FORMAT_VERSION:
            raise ValueError(f"unsupported bundle format version {self.format_version}")
        if any(c < 1 or c > 256 for c in self.cnn_channels or ()):
            raise ValueError("cnn_channels must be between 1 and 256")
        if self.architecture is Architecture.MLP and self.hidden_width is None:
            raise ValueError("the mlp architecture needs hidden_width")
        if self.architecture is not Architecture.MLP and self.hidden_width is not None:
            raise ValueError("only the mlp architecture takes hidden_width")
        return self


def build_model(
    architecture: Architecture | str, n_features: int, hidden_width: int | None = None
) -> torch.nn.Module:
    """Return an untrained model mapping ``(n, n_features)`` standardised inputs to ``(n,)`` logits.

    Parameters
    ----------
    architecture
        ``"logistic"`` (one linear layer) or ``"mlp"`` (linear, ReLU, linear).
    n_features
        Number of input columns.
    hidden_width
        Hidden units of the ``mlp``; ignored for ``logistic``.
    """
    arch = Architecture(architecture)
    if arch.reads_images:
        raise InputError("image models are built with build_image_model")
    if n_features < 1:
        raise InputError("a model needs at least one feature")
    if arch is Architecture.LOGISTIC:
        net: torch.nn.Module = torch.nn.Linear(n_features, 1)
    else:
        width = DEFAULT_HIDDEN_WIDTH if hidden_width is None else hidden_width
        net = torch.nn.Sequential(
            torch.nn.Linear(n_features, width), torch.nn.ReLU(), torch.nn.Linear(width, 1)
        )
    return torch.nn.Sequential(net, torch.nn.Flatten(start_dim=0))


def build_image_model(manifest: BundleManifest) -> torch.nn.Module:
    """Return an untrained ``cnn`` of the manifest's channels (TorchScript comes as a file)."""
    if manifest.architecture is not Architecture.CNN:
        raise InputError("only the cnn architecture is built from a manifest")
    return build_cnn(manifest.cnn_channels or DEFAULT_CHANNELS)


def _build(manifest: BundleManifest) -> torch.nn.Module:
    if manifest.architecture.reads_images:
        return build_image_model(manifest)
    return build_model(manifest.architecture, len(manifest.feature_names), manifest.hidden_width)


@contextmanager
def single_thread() -> Iterator[None]:
    """Run torch on one CPU thread inside the block, then restore the previous setting."""
    previous = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        yield
    finally:
        torch.set_num_threads(previous)


def standardise(frame: pd.DataFrame, manifest: BundleManifest) -> torch.Tensor:
    """Return the manifest's feature columns of ``frame``, standardised, as a float32 tensor.

    Raises
    ------
    InputError
        If a feature column is missing, or holds missing or non-numeric values.
    """
    if manifest.architecture.reads_images:
        return image_inputs(frame, manifest)
    for name in manifest.feature_names:
        if name not in frame.columns:
            raise InputError(f"feature column {name!r} is missing")
    values = np.empty((len(frame), len(manifest.feature_names)), dtype=np.float64)
    for j, name in enumerate(manifest.feature_names):
        column = pd.to_numeric(frame[name], errors="coerce").to_numpy(dtype=np.float64)
        if not np.all(np.isfinite(column)):
            raise InputError(f"feature column {name!r} has missing or non-numeric values")
        values[:, j] = column
    means = np.asarray(manifest.feature_means, dtype=np.float64)
    sds = np.asarray(manifest.feature_sds, dtype=np.float64)
    return torch.from_numpy(((values - means) / sds).astype(np.float32))


def image_inputs(frame: pd.DataFrame, manifest: BundleManifest) -> torch.Tensor:
    """Read the images of ``frame``'s ``image`` column and preprocess them as ``manifest`` says.

    Raises
    ------
    InputError
        If the column is missing or an image cannot be read (row named, never the path).
    """
    from site_agent.data.images import read_images

    if IMAGE_COLUMN not in frame.columns or manifest.image is None:
        raise InputError(f"an image model needs an {IMAGE_COLUMN!r} column of image paths")
    return preprocess(read_images([str(p) for p in frame[IMAGE_COLUMN]]), manifest.image)


@dataclass(frozen=True)
class ModelBundle:
    """A loaded, hash-verified model with its manifest.

    Attributes
    ----------
    manifest
        The declared architecture, features and standardisation.
    model
        The torch module (in eval mode) returning logits for standardised inputs.
    sha256
        Hex SHA-256 of the bundle file this was loaded from.
    """

    manifest: BundleManifest
    model: torch.nn.Module
    sha256: str
    _raw: bytes

    def predict(self, frame: pd.DataFrame) -> npt.NDArray[np.float64]:
        """Return the predicted probability of disease (label 1) for each row of ``frame``.

        Columns are taken by name from the manifest; other columns are ignored.

        Raises
        ------
        InputError
            If a feature column is missing or holds missing or non-numeric values.
        """
        x = standardise(frame, self.manifest)
        self.model.eval()
        with single_thread(), torch.no_grad():
            probabilities = torch.sigmoid(self.model(x))
        return probabilities.numpy().astype(np.float64)

    def to_bytes(self) -> bytes:
        """Return the bundle file's bytes, exactly as hashed."""
        return self._raw


def bundle_bytes(model: torch.nn.Module, manifest: BundleManifest) -> bytes:
    """Serialise ``model`` and ``manifest`` into bundle bytes (deterministic for equal weights).

    Raises
    ------
    BundleError
        If the model's weights do not fit the manifest's architecture and features.
    """
    weights = io.BytesIO()
    if manifest.architecture is Architecture.TORCHSCRIPT:
        if not isinstance(model, torch.jit.ScriptModule):
            raise BundleError("a torchscript bundle needs a scripted or traced model")
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", "`torch.jit", DeprecationWarning)
            torch.jit.save(model, weights)
    else:
        state = {k: v.detach().cpu().clone() for k, v in model.state_dict().items()}
        _check_state(state, manifest)
        torch.save(state, weights)
    return _archive(manifest, weights.getvalue())


def wrap_torchscript(torchscript: Path | str, manifest: BundleManifest, path: Path | str) -> str:
    """Wrap a TorchScript file, unchanged, with ``manifest`` into a bundle; return its SHA-256.

    Raises
    ------
    BundleError
        If the manifest is not a torchscript one, or the file does not load as TorchScript.
    """
    if manifest.architecture is not Architecture.TORCHSCRIPT:
        raise BundleError("wrap_torchscript needs a manifest of the torchscript architecture")
    payload = _read(Path(torchscript))
    _load_torchscript(payload)
    raw = _archive(manifest, payload)
    try:
        Path(path).write_bytes(raw)
    except OSError as exc:
        raise BundleError(f"cannot write model bundle {path}: {exc.strerror}") from exc
    return bundle_sha256(raw)


def _archive(manifest: BundleManifest, weights: bytes) -> bytes:
    manifest_json = json.dumps(manifest.model_dump(mode="json"), sort_keys=True, indent=2)
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w", compression=zipfile.ZIP_DEFLATED) as archive:
        for member, payload in (
            (_MANIFEST_MEMBER, manifest_json.encode()),
            (_WEIGHTS_MEMBER, weights),
        ):
            info = zipfile.ZipInfo(member, date_time=_ZIP_DATE)
            info.compress_type = zipfile.ZIP_DEFLATED
            info.external_attr = 0o644 << 16
            archive.writestr(info, payload)
    return out.getvalue()


def save_bundle(model: torch.nn.Module, manifest: BundleManifest, path: Path | str) -> str:
    """Write ``model`` and ``manifest`` as one bundle file and return its SHA-256 hex digest."""
    raw = bundle_bytes(model, manifest)
    try:
        Path(path).write_bytes(raw)
    except OSError as exc:
        raise BundleError(f"cannot write model bundle {path}: {exc.strerror}") from exc
    return bundle_sha256(raw)


def bundle_sha256(source: Path | str | bytes) -> str:
    """Return the SHA-256 hex digest of a bundle file or of bundle bytes."""
    raw = source if isinstance(source, bytes) else _read(Path(source))
    return hashlib.sha256(raw).hexdigest()


def load_bundle(source: Path | str | bytes, expected_sha256: str | None = None) -> ModelBundle:
    """Read a bundle, verifying its hash before anything in it is parsed.

    Parameters
    ----------
    source
        Path of a bundle file, or its bytes.
    expected_sha256
        Hex digest the bundle must have; ``None`` skips the check (development use only).

    Raises
    ------
    BundleError
        If the file is unreadable, too large, fails the hash check, or is not a valid bundle.
    """
    raw = source if isinstance(source, bytes) else _read(Path(source))
    if len(raw) > MAX_BUNDLE_BYTES:
        raise BundleError(f"model bundle is larger than {MAX_BUNDLE_BYTES} bytes")
    digest = hashlib.sha256(raw).hexdigest()
    if expected_sha256 is not None and digest != expected_sha256.lower():
        raise BundleError("model bundle SHA-256 does not match the expected hash")
    manifest, weights_bytes = _unpack(raw)
    if manifest.architecture is Architecture.TORCHSCRIPT:
        model = _load_torchscript(weights_bytes)
    else:
        state = _state(weights_bytes, manifest)
        model = _build(manifest)
        try:
            model.load_state_dict(state, strict=True)
        except RuntimeError as exc:
            raise BundleError("model bundle weights do not fit its declared architecture") from exc
    if manifest.architecture.reads_images:
        freeze_for_fine_tuning(model, manifest.fine_tune_layers)
    model.eval()
    return ModelBundle(manifest=manifest, model=model, sha256=digest, _raw=raw)


def _read(path: Path) -> bytes:
    try:
        size = path.stat().st_size
        if size > MAX_BUNDLE_BYTES:
            raise BundleError(f"model bundle is larger than {MAX_BUNDLE_BYTES} bytes")
        return path.read_bytes()
    except OSError as exc:
        raise BundleError(f"cannot read model bundle {path}: {exc.strerror}") from exc


def _unpack(raw: bytes) -> tuple[BundleManifest, bytes]:
    """Parse hash-verified bytes into a manifest and the weights member's bytes."""
    try:
        with zipfile.ZipFile(io.BytesIO(raw)) as archive:
            infos = {info.filename: info for info in archive.infolist()}
            if sorted(infos) != sorted((_MANIFEST_MEMBER, _WEIGHTS_MEMBER)):
                raise BundleError("model bundle must hold exactly manifest.json and weights.pt")
            if sum(info.file_size for info in infos.values()) > MAX_BUNDLE_BYTES:
                raise BundleError(f"model bundle unpacks to more than {MAX_BUNDLE_BYTES} bytes")
            manifest_bytes = archive.read(_MANIFEST_MEMBER)
            weights_bytes = archive.read(_WEIGHTS_MEMBER)
    except (zipfile.BadZipFile, zipfile.LargeZipFile, EOFError, ValueError) as exc:
        raise BundleError("model bundle is not a readable archive") from exc
    try:
        manifest = BundleManifest.model_validate_json(manifest_bytes)
    except ValidationError as exc:
        first = exc.errors()[0]
        where = ".".join(str(part) for part in first["loc"]) or "manifest"
        raise BundleError(f"model bundle manifest is invalid at {where}: {first['msg']}") from exc
    return manifest, weights_bytes


def _load_torchscript(payload: bytes) -> torch.nn.Module:
    try:
        with warnings.catch_warnings():
            # torch 2.13 deprecates TorchScript; teams still bring such files, so we read them.
            warnings.filterwarnings("ignore", "`torch.jit", DeprecationWarning)
            model: torch.nn.Module = torch.jit.load(  # type: ignore[no-untyped-call]
                io.BytesIO(payload), map_location="cpu"
            )
    except Exception as exc:  # torch raises many types for damaged archives
        raise BundleError("model bundle holds no loadable TorchScript model") from exc
    if not all(bool(torch.isfinite(p).all()) for p in model.parameters()):
        raise BundleError("model bundle weights contain non-finite values")
    return model


def _state(weights_bytes: bytes, manifest: BundleManifest) -> dict[str, torch.Tensor]:
    try:
        loaded = torch.load(io.BytesIO(weights_bytes), map_location="cpu", weights_only=True)
    except Exception as exc:  # torch raises many types for damaged or unsafe pickles
        raise BundleError("model bundle weights cannot be read safely") from exc
    if not isinstance(loaded, dict) or not all(
        isinstance(k, str) and isinstance(v, torch.Tensor) for k, v in loaded.items()
    ):
        raise BundleError("model bundle weights are not a tensor dictionary")
    _check_state(loaded, manifest)
    return loaded


def _check_state(state: dict[str, torch.Tensor], manifest: BundleManifest) -> None:
    expected = _build(manifest).state_dict()
    if set(state) != set(expected):
        raise BundleError("model bundle weights do not fit its declared architecture")
    for key, tensor in expected.items():
        if tuple(state[key].shape) != tuple(tensor.shape):
            raise BundleError("model bundle weights do not fit its declared architecture")
        if not bool(torch.isfinite(state[key]).all()):
            raise BundleError("model bundle weights contain non-finite values")
