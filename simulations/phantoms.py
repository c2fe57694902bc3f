"""An invented phantom image set: lesion-like objects whose two classes differ in shape and texture.

Every image is drawn by this module from a seed; nothing is fetched. Invented data for
rehearsal only, not images of any patient. Each ``size`` x ``size`` image holds a smooth
"tissue" background (Gaussian-filtered noise on an elliptical body) and one lesion:

- class 0 ("smooth"): an ellipse with a soft edge and homogeneous intensity;
- class 1 ("irregular"): a lobulated, spiculated outline (radius modulated by
  ``lobes`` harmonics) with a coarse granular texture inside.

Both classes share the lesion size and mean contrast distributions, so the classifier
has to use shape and texture, not brightness. Intensities are in arbitrary units around
0-1 before any acquisition shift (:mod:`simulations.image_shifts`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy import ndimage

DEFAULT_SIZE = 48

FloatImages = npt.NDArray[np.float64]


@dataclass(frozen=True)
class PhantomSet:
    """Phantom images ``(n, size, size)`` and their 0/1 classes."""

    images: FloatImages
    labels: npt.NDArray[np.int64]


def phantom_set(
    n: int, *, seed: int, prevalence: float = 0.4, size: int = DEFAULT_SIZE
) -> PhantomSet:
    """Draw ``n`` phantom images, class 1 with probability ``prevalence``."""
    rng = np.random.default_rng(seed)
    labels = (rng.random(n) < prevalence).astype(np.int64)
    images = np.stack([_phantom(int(y), size, rng) for y in labels])
    return PhantomSet(images=images, labels=labels)


def _phantom(label: int, size: int, rng: np.random.Generator) -> FloatImages:
    yy, xx = np.mgrid[0:size, 0:size].astype(np.float64)
    centre = (size - 1) / 2
    body = ((yy - centre) / (0.46 * size)) ** 2 + ((xx - centre) / (0.42 * size)) ** 2 <= 1.0
    tissue = ndimage.gaussian_filter(rng.normal(0.0, 1.0, (size, size)), sigma=size / 12)
    image = body * (0.35 + 0.08 * tissue / (np.abs(tissue).max() + 1e-9))
    cy, cx = centre + rng.uniform(-0.12, 0.12, 2) * size
    radius = rng.uniform(0.10, 0.18) * size
    angle = np.arctan2(yy - cy, xx - cx)
    distance = np.hypot(yy - cy, xx - cx)
    if label == 1:
        lobes = rng.integers(5, 9)
        phase = rng.uniform(0, 2 * np.pi)
        outline = radius * (1 + 0.28 * np.sin(lobes * angle + phase) + 0.12 * np.sin(17 * angle))
        texture = ndimage.gaussian_filter(rng.normal(0.0, 1.0, (size, size)), sigma=0.8)
        inside = np.clip(outline - distance + 0.5, 0.0, 1.0)
        lesion = inside * (0.45 + 0.25 * texture / (np.abs(texture).max() + 1e-9))
    else:
        stretch = rng.uniform(0.8, 1.2)
        outline = radius * stretch / np.sqrt((np.cos(angle) * stretch) ** 2 + np.sin(angle) ** 2)
        inside = 1.0 / (1.0 + np.exp((distance - outline) / 0.9))
        lesion = inside * 0.45
    out: FloatImages = np.maximum(image, 0.0) + lesion
    return out
