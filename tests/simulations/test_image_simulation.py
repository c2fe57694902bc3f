"""The invented phantom set, image-level acquisition shifts and the MedMNIST-format loader.

References: the Rayleigh mean of Rician noise on zero signal, σ·sqrt(π/2) (Gudbjartsson &
Patz 1995, Magn Reson Med 34:910-914); scikit-image's own ``filters.gaussian`` for the blur;
the MedMNIST v2 file layout (Yang et al. 2023, Scientific Data 10:41), written here by the
test on tiny arrays.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from skimage import filters

from simulations.image_shifts import ImageShift, apply_shift
from simulations.medmnist import load_medmnist
from simulations.phantoms import DEFAULT_SIZE, phantom_set
from site_agent.exceptions import InputError


def test_phantoms_are_reproducible_and_have_both_classes() -> None:
    """The same seed draws the same images; both classes occur."""
    first, again = phantom_set(30, seed=4), phantom_set(30, seed=4)

    np.testing.assert_array_equal(first.images, again.images)
    assert set(first.labels.tolist()) == {0, 1}
    assert first.images.shape == (30, DEFAULT_SIZE, DEFAULT_SIZE)


def test_phantom_classes_differ_in_texture_not_brightness() -> None:
    """Lesion texture (local gradient energy) separates classes more than mean brightness."""
    phantoms = phantom_set(200, seed=1)
    grad = np.array([np.abs(np.diff(im, axis=0)).mean() for im in phantoms.images])
    mean = phantoms.images.mean(axis=(1, 2))
    y = phantoms.labels.astype(bool)

    def separation(v: np.ndarray) -> float:
        return float(abs(v[y].mean() - v[~y].mean()) / v.std())

    assert separation(grad) > 2 * separation(mean)


def test_default_shift_changes_nothing() -> None:
    """All parameters at their neutral values leave the image as it was."""
    image = phantom_set(1, seed=2).images[0]

    np.testing.assert_allclose(apply_shift(image, ImageShift(), np.random.default_rng(0)), image)


def test_blur_is_scikit_image_gaussian() -> None:
    """blur_sigma applies skimage.filters.gaussian with that sigma."""
    image = phantom_set(1, seed=3).images[0]
    expected = filters.gaussian(image, sigma=1.5, preserve_range=True)

    out = apply_shift(image, ImageShift(blur_sigma=1.5), np.random.default_rng(0))

    np.testing.assert_allclose(out, expected)


def test_rician_noise_on_zero_signal_has_the_rayleigh_mean() -> None:
    """On a flat zero background Rician noise has mean σ·sqrt(π/2) (Gudbjartsson & Patz 1995)."""
    image = np.zeros((200, 200))
    image[0, 0] = 1.0  # sets the 99th-percentile scale to 0 -> 1.0 fallback
    shift = ImageShift(noise_sigma=0.1, noise="rician")

    out = apply_shift(image, shift, np.random.default_rng(7))

    assert out[1:, 1:].mean() == pytest.approx(0.1 * np.sqrt(np.pi / 2), rel=0.02)


def test_ringing_removes_high_frequencies() -> None:
    """Truncating 40% of k-space leaves far less spectral energy outside the kept band."""
    image = phantom_set(1, seed=5, prevalence=1.0).images[0]

    out = apply_shift(image, ImageShift(ringing=0.4), np.random.default_rng(0))

    def outer_energy(im: np.ndarray) -> float:
        k = np.abs(np.fft.fftshift(np.fft.fft2(im - im.mean()))) ** 2
        band = np.ones_like(k, dtype=bool)
        band[10:38, 10:38] = False  # the kept centre is rows/cols 9..38 of 48
        return float(k[band].sum() / k.sum())

    assert outer_energy(out) < 0.5 * outer_energy(image)


def test_medmnist_layout_is_read_as_binary_splits(tmp_path: Path) -> None:
    """A tiny file in the MedMNIST layout gives greyscale images and 0/1 labels per split."""
    rng = np.random.default_rng(0)
    arrays = {}
    for split, n in (("train", 6), ("val", 2), ("test", 3)):
        arrays[f"{split}_images"] = rng.integers(0, 256, (n, 28, 28, 3), dtype=np.uint8)
        arrays[f"{split}_labels"] = rng.integers(0, 4, (n, 1), dtype=np.uint8)
    np.savez(tmp_path / "tiny.npz", **arrays)

    splits = load_medmnist(tmp_path / "tiny.npz", positive=(2, 3))

    assert splits["train"].images.shape == (6, 28, 28)
    np.testing.assert_allclose(splits["val"].images, arrays["val_images"].mean(axis=-1))
    np.testing.assert_array_equal(
        splits["test"].labels, np.isin(arrays["test_labels"][:, 0], (2, 3)).astype(int)
    )


def test_medmnist_missing_key_is_named(tmp_path: Path) -> None:
    """A file without the val split is refused, naming the missing array."""
    np.savez(tmp_path / "bad.npz", train_images=np.zeros((1, 2, 2)), train_labels=np.zeros((1, 1)))

    with pytest.raises(InputError, match="no 'val_images' array"):
        load_medmnist(tmp_path / "bad.npz")
