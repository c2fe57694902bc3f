"""Read a MedMNIST-format ``.npz`` file that a user downloaded; nothing is fetched here.

The layout (Yang et al. 2023, MedMNIST v2, Scientific Data 10:41) is one NumPy archive with
``train_images``, ``train_labels``, ``val_images``, ``val_labels``, ``test_images`` and
``test_labels``: images ``(n, h, w)`` (greyscale) or ``(n, h, w, 3)`` (colour, averaged to
grey here), labels ``(n, 1)`` or ``(n, k)``. A binary task is made by naming the classes
that count as positive.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Literal

import numpy as np
import numpy.typing as npt

from site_agent.exceptions import InputError

Split = Literal["train", "val", "test"]
SPLITS: tuple[Split, ...] = ("train", "val", "test")


@dataclass(frozen=True)
class ImageSplit:
    """One split: greyscale images ``(n, h, w)`` as float64 and binary labels."""

    images: npt.NDArray[np.float64]
    labels: npt.NDArray[np.int64]


def load_medmnist(
    path: Path | str, *, positive: tuple[int, ...] = (1,), label_column: int = 0
) -> dict[Split, ImageSplit]:
    """Return the three splits of a MedMNIST-format file as binary tasks.

    Raises
    ------
    InputError
        If the file is unreadable, a key is missing, or images and labels disagree.
    """
    path = Path(path)
    try:
        with np.load(path, allow_pickle=False) as archive:
            data = {key: archive[key] for key in archive.files}
    except (OSError, ValueError) as exc:
        raise InputError(f"cannot read {path.name} as a NumPy .npz archive") from exc
    out: dict[Split, ImageSplit] = {}
    for split in SPLITS:
        for key in (f"{split}_images", f"{split}_labels"):
            if key not in data:
                raise InputError(f"{path.name} has no {key!r} array (MedMNIST layout)")
        images = np.asarray(data[f"{split}_images"], dtype=np.float64)
        labels = np.asarray(data[f"{split}_labels"]).reshape(len(images), -1)
        if images.ndim == 4:
            images = images.mean(axis=-1)
        if images.ndim != 3 or labels.shape[0] != images.shape[0]:
            raise InputError(f"{split}: images must be (n, h, w[, 3]) with one label row each")
        if not 0 <= label_column < labels.shape[1]:
            raise InputError(f"{split}: label column {label_column} is out of range")
        binary = np.isin(labels[:, label_column], positive).astype(np.int64)
        out[split] = ImageSplit(images=images, labels=binary)
    return out
