"""Image models: a small 2D CNN for CPU and the preprocessing a bundle stores with it.

The preprocessing is part of the model: it is written into the bundle's manifest and so
covered by the bundle's SHA-256, and every site applies exactly the same steps:

1. **Intensity** (:class:`IntensityMode`):
   ``window``: clip to ``[center - width/2, center + width/2]`` and scale to [0, 1] (the
   DICOM VOI linear window, PS3.3 C.11.2.1.2, in its simple form; CT in Hounsfield units);
   ``percentile``: scale each image between its own 1st and 99th percentiles, then clip
   to [0, 1] (common practice for MR, whose intensities have no absolute scale);
   ``fixed``: divide by ``scale`` (PNG images of 0-255 with ``scale = 255``).
2. **Resize** to ``size`` x ``size`` by bilinear interpolation with antialiasing
   (torch's ``interpolate``), so the result does not depend on the input's resolution
   beyond what the image holds.

The CNN (:func:`build_cnn`) has three 3x3 convolution blocks (ReLU, 2x2 max-pooling after
the first two), global average pooling and one linear layer giving a logit. Its
``head`` is the last linear layer; ``fine_tune_layers = "head"`` (the default in a
bundle) freezes everything before it, the usual light fine-tuning of a pretrained network
(Yosinski et al. 2014).

References
----------
J. Yosinski, J. Clune, Y. Bengio, H. Lipson (2014). How transferable are features in deep
neural networks? NeurIPS 27. arXiv: 1411.1792
"""

from __future__ import annotations

from collections.abc import Sequence
from enum import StrEnum

import numpy as np
import numpy.typing as npt
import torch
from pydantic import BaseModel, ConfigDict, Field, model_validator

DEFAULT_IMAGE_SIZE = 32
DEFAULT_CHANNELS = (8, 16, 32)


class IntensityMode(StrEnum):
    """How image intensities are brought to [0, 1] before the network."""

    WINDOW = "window"
    PERCENTILE = "percentile"
    FIXED = "fixed"


class FineTuneLayers(StrEnum):
    """Which weights fine-tuning may change."""

    HEAD = "head"
    ALL = "all"


class ImagePreprocessing(BaseModel):
    """Steps from a stored image to the network's input; stored in (and hashed with) a bundle."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    size: int = Field(default=DEFAULT_IMAGE_SIZE, ge=8, le=512, description="Output side.")
    intensity: IntensityMode = IntensityMode.PERCENTILE
    window_center: float | None = Field(default=None, description="window mode only.")
    window_width: float | None = Field(default=None, gt=0, description="window mode only.")
    scale: float | None = Field(default=None, gt=0, description="fixed mode only.")

    @model_validator(mode="after")
    def _consistent(self) -> ImagePreprocessing:
        window = self.window_center is not None and self.window_width is not None
        if (self.intensity is IntensityMode.WINDOW) != window:
            raise ValueError("window_center and window_width go with (only) the window mode")
        if (self.intensity is IntensityMode.FIXED) != (self.scale is not None):
            raise ValueError("scale goes with (only) the fixed mode")
        return self


def preprocess(
    images: Sequence[npt.NDArray[np.floating]], spec: ImagePreprocessing
) -> torch.Tensor:
    """Return ``(n, 1, size, size)`` float32 network inputs for 2D images.

    Private to the caller's validation: images are finite 2D arrays (as
    :func:`site_agent.data.images.read_image` returns them).
    """
    out = torch.empty((len(images), 1, spec.size, spec.size), dtype=torch.float32)
    for i, image in enumerate(images):
        scaled = torch.from_numpy(_intensity(np.asarray(image, dtype=np.float64), spec))
        out[i, 0] = torch.nn.functional.interpolate(
            scaled[None, None].float(),
            size=(spec.size, spec.size),
            mode="bilinear",
            align_corners=False,
            antialias=True,
        )[0, 0]
    return out


def _intensity(image: npt.NDArray[np.float64], spec: ImagePreprocessing) -> npt.NDArray[np.float64]:
    if spec.intensity is IntensityMode.WINDOW:
        assert spec.window_center is not None and spec.window_width is not None
        low = spec.window_center - spec.window_width / 2
        return np.clip((image - low) / spec.window_width, 0.0, 1.0)
    if spec.intensity is IntensityMode.FIXED:
        assert spec.scale is not None
        return np.clip(image / spec.scale, 0.0, 1.0)
    low, high = np.percentile(image, (1.0, 99.0))
    if not high > low:
        return np.zeros_like(image)
    scaled: npt.NDArray[np.float64] = np.clip((image - low) / (high - low), 0.0, 1.0)
    return scaled


def build_cnn(channels: Sequence[int] = DEFAULT_CHANNELS) -> torch.nn.Module:
    """Return an untrained CNN mapping ``(n, 1, s, s)`` images to ``(n,)`` logits."""
    c1, c2, c3 = channels
    return torch.nn.Sequential(
        torch.nn.Conv2d(1, c1, 3, padding=1),
        torch.nn.ReLU(),
        torch.nn.MaxPool2d(2),
        torch.nn.Conv2d(c1, c2, 3, padding=1),
        torch.nn.ReLU(),
        torch.nn.MaxPool2d(2),
        torch.nn.Conv2d(c2, c3, 3, padding=1),
        torch.nn.ReLU(),
        torch.nn.AdaptiveAvgPool2d(1),
        torch.nn.Flatten(),
        torch.nn.Linear(c3, 1),
        torch.nn.Flatten(start_dim=0),
    )


def freeze_for_fine_tuning(model: torch.nn.Module, layers: FineTuneLayers) -> None:
    """Let fine-tuning change only the head or every weight.

    The head is the submodule owning the last parameter in registration order (the final
    linear layer of :func:`build_cnn`; the same rule serves a TorchScript model).
    """
    names = [name for name, _ in model.named_parameters()]
    if not names:
        return
    owner = names[-1].rpartition(".")[0]
    for name, p in model.named_parameters():
        p.requires_grad_(layers is FineTuneLayers.ALL or name.rpartition(".")[0] == owner)
