"""An invented phantom image set: lesion-like objects whose two classes differ in shape and texture.

Every image is drawn by this module from a seed; nothing is fetched. Invented data for
rehearsal only, not images of any patient. Each ``size`` x ``size`` image holds a smooth
"tissue" background (Gaussian-filtered noise on an elliptical body) and one lesion with a
soft edge whose outline and inside are set by two per-lesion amplitudes:

``lobulation``
    Depth of the outline's lobes (radius modulated by 5-8 harmonics and a fine 17th one),
    relative to the radius.
``texture``
    Amplitude of a fine granular texture inside the lesion (Gaussian-filtered noise,
    sigma 0.8 pixel), relative to the lesion's mean intensity 0.45.

Class 0 ("smooth") draws both amplitudes from low ranges, class 1 ("irregular") from higher
ranges that *overlap* them (:data:`DEFAULT_CLASSES`): some irregular lesions look smooth and
some smooth ones look irregular, so no classifier reaches an AUC of 1 (a CNN trained on a
few hundred of them reaches about 0.85-0.9). Both classes share the lesion size, shape
stretch and mean contrast, so the classifier has to use shape and texture, not brightness.
Intensities are in arbitrary units around 0-1 before any acquisition shift
(:mod:`simulations.image_shifts`); the fine texture is the cue that blur and resolution
loss there take away.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy import ndimage

DEFAULT_SIZE = 40

FloatImages = npt.NDArray[np.float64]


@dataclass(frozen=True)
class ClassRanges:
    """Uniform ranges of the two lesion amplitudes of one class (see the module doc)."""

    lobulation: tuple[float, float]
    texture: tuple[float, float]


DEFAULT_CLASSES = (
    ClassRanges(lobulation=(0.0, 0.10), texture=(0.0, 0.20)),
    ClassRanges(lobulation=(0.10, 0.35), texture=(0.15, 0.50)),
)
"""Class 0 (smooth) and class 1 (irregular); the texture ranges overlap on 0.15-0.20."""


@dataclass(frozen=True)
class PhantomSet:
    """Phantom images ``(n, size, size)`` and their 0/1 classes."""

    images: FloatImages
    labels: npt.NDArray[np.int64]


def phantom_set(
    n: int,
    *,
    seed: int,
    prevalence: float = 0.4,
    size: int = DEFAULT_SIZE,
    classes: tuple[ClassRanges, ClassRanges] = DEFAULT_CLASSES,
) -> PhantomSet:
    """Draw ``n`` phantom images, class 1 with probability ``prevalence``."""
    rng = np.random.default_rng(seed)
    labels = (rng.random(n) < prevalence).astype(np.int64)
    images = np.stack([_phantom(classes[int(y)], size, rng) for y in labels])
    return PhantomSet(images=images, labels=labels)


def _phantom(ranges: ClassRanges, size: int, rng: np.random.Generator) -> FloatImages:
    yy, xx = np.mgrid[0:size, 0:size].astype(np.float64)
    centre = (size - 1) / 2
    body = ((yy - centre) / (0.46 * size)) ** 2 + ((xx - centre) / (0.42 * size)) ** 2 <= 1.0
    tissue = ndimage.gaussian_filter(rng.normal(0.0, 1.0, (size, size)), sigma=size / 12)
    image = body * (0.35 + 0.08 * tissue / (np.abs(tissue).max() + 1e-9))
    cy, cx = centre + rng.uniform(-0.12, 0.12, 2) * size
    radius = rng.uniform(0.12, 0.20) * size
    angle = np.arctan2(yy - cy, xx - cx)
    distance = np.hypot(yy - cy, xx - cx)
    lobulation = rng.uniform(*ranges.lobulation)
    texture_amplitude = rng.uniform(*ranges.texture)
    lobes = rng.integers(5, 9)
    phase = rng.uniform(0, 2 * np.pi)
    stretch = rng.uniform(0.8, 1.2)
    ellipse = radius * stretch / np.sqrt((np.cos(angle) * stretch) ** 2 + np.sin(angle) ** 2)
    outline = ellipse * (
        1 + lobulation * np.sin(lobes * angle + phase) + 0.4 * lobulation * np.sin(17 * angle)
    )
    texture = ndimage.gaussian_filter(rng.normal(0.0, 1.0, (size, size)), sigma=0.8)
    inside = 1.0 / (1.0 + np.exp((distance - outline) / 0.7))
    lesion = inside * (0.45 + texture_amplitude * texture / (np.abs(texture).max() + 1e-9))
    out: FloatImages = np.maximum(image, 0.0) + lesion
    return out
