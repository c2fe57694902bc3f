"""Image-level acquisition shift: what a scanner, protocol or reconstruction does to an image.

Each synthetic site's :class:`ImageShift` lists the parameters below; every one is a
documented knob, and zero (or one, for multiplicative ones) means "no change". Transforms
use scikit-image where it has them; the k-space truncation is plain numpy FFT.

``bias_amplitude``
    Smooth multiplicative intensity bias field (MR coil sensitivity): the image is multiplied
    by ``1 + a * p(x, y)``, ``p`` a random 2nd-order polynomial scaled to [-1, 1].
``contrast``, ``gamma``
    Contrast stretch about the image mean, then ``skimage.exposure.adjust_gamma``.
``blur_sigma``
    Gaussian point-spread blur in pixels (``skimage.filters.gaussian``).
``resolution``
    Resolution loss: down-sampling by this factor (0 < r <= 1) and back
    (``skimage.transform.rescale`` / ``resize``, antialiased).
``ringing``
    Gibbs ringing: the fraction of k-space (per axis) removed at the edges before the inverse
    FFT (0: none).
``noise_sigma``, ``noise``
    Noise level relative to the image's 99th percentile; ``gaussian`` adds N(0, σ²); ``rician``
    takes the magnitude of a complex signal with Gaussian noise on both channels (MR magnitude
    images; Gudbjartsson & Patz 1995, Magn Reson Med 34:910-914).

Invented shifts for rehearsal only.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
import numpy.typing as npt
from pydantic import BaseModel, ConfigDict, Field
from skimage import exposure, filters, transform

FloatImage = npt.NDArray[np.float64]


class ImageShift(BaseModel):
    """A site's acquisition shift (see the module doc for each parameter)."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    bias_amplitude: float = Field(default=0.0, ge=0.0, le=0.9)
    contrast: float = Field(default=1.0, gt=0.0, le=5.0)
    gamma: float = Field(default=1.0, gt=0.0, le=5.0)
    blur_sigma: float = Field(default=0.0, ge=0.0, le=10.0)
    resolution: float = Field(default=1.0, gt=0.0, le=1.0)
    ringing: float = Field(default=0.0, ge=0.0, lt=0.5)
    noise_sigma: float = Field(default=0.0, ge=0.0, le=1.0)
    noise: Literal["gaussian", "rician"] = "gaussian"


def apply_shift(image: FloatImage, shift: ImageShift, rng: np.random.Generator) -> FloatImage:
    """Return ``image`` as the shifted site's scanner would show it (non-negative)."""
    out = np.asarray(image, dtype=np.float64)
    if shift.bias_amplitude > 0:
        out = out * (1.0 + shift.bias_amplitude * _polynomial_field(out.shape, rng))
    if shift.contrast != 1.0:
        out = out.mean() + shift.contrast * (out - out.mean())
    out = np.clip(out, 0.0, None)
    if shift.gamma != 1.0:
        top = float(out.max()) or 1.0
        out = exposure.adjust_gamma(out / top, shift.gamma) * top  # type: ignore[no-untyped-call]
    if shift.blur_sigma > 0:
        out = filters.gaussian(out, sigma=shift.blur_sigma, preserve_range=True)  # type: ignore[no-untyped-call]
    if shift.resolution < 1.0:
        small = transform.rescale(out, shift.resolution, anti_aliasing=True, preserve_range=True)
        out = transform.resize(  # type: ignore[no-untyped-call]
            small, out.shape, preserve_range=True, anti_aliasing=False
        )
    if shift.ringing > 0:
        out = _truncate_k_space(out, shift.ringing)
    if shift.noise_sigma > 0:
        sigma = shift.noise_sigma * float(np.percentile(out, 99) or 1.0)
        if shift.noise == "rician":
            out = np.hypot(out + rng.normal(0, sigma, out.shape), rng.normal(0, sigma, out.shape))
        else:
            out = out + rng.normal(0, sigma, out.shape)
    result: FloatImage = np.clip(out, 0.0, None)
    return result


def _polynomial_field(shape: tuple[int, ...], rng: np.random.Generator) -> FloatImage:
    yy, xx = np.mgrid[-1 : 1 : shape[0] * 1j, -1 : 1 : shape[1] * 1j]
    c = rng.normal(0.0, 1.0, 5)
    field = c[0] * xx + c[1] * yy + c[2] * xx * yy + c[3] * xx**2 + c[4] * yy**2
    scaled: FloatImage = field / (np.abs(field).max() + 1e-12)
    return scaled


def _truncate_k_space(image: FloatImage, fraction: float) -> FloatImage:
    k = np.fft.fftshift(np.fft.fft2(image))
    rows, cols = image.shape
    cut_r, cut_c = int(rows * fraction / 2), int(cols * fraction / 2)
    mask = np.zeros_like(k, dtype=bool)
    mask[cut_r : rows - cut_r, cut_c : cols - cut_c] = True
    out: FloatImage = np.abs(np.fft.ifft2(np.fft.ifftshift(np.where(mask, k, 0))))
    return out
