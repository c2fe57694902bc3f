"""A site's image manifest: one row per observation, pointing at an image the site holds.

The manifest is a CSV or Parquet table with the columns of a predictions table
(:mod:`site_agent.data.predictions`: ``case_id``, ``patient_id``, ``label``, optional
``acquired_on`` and case attributes) plus ``image``: the path of the observation's image,
relative to the manifest's folder or absolute. An image is one of

- a DICOM file (``.dcm`` or any file with the DICOM preamble, read with pydicom);
- a DICOM series folder (every readable DICOM file in it; the middle slice by position);
- a PNG file (read with Pillow, as greyscale);
- a NumPy ``.npy`` array, 2D or 3D (the middle slice along the first axis).

A ``score`` column is optional: without one, the model bundle of the study scores the images.

Acquisition attributes (vendor, field strength, slice thickness, modality) are read from
DICOM headers and mapped *at the site*, by the rules of the site's
:class:`ImageSiteConfig`, to coarse categories the site itself named. Only those category
names become case attributes; no header value, UID or patient identifier is kept, and a
header value that matches no rule becomes the rule's ``other`` category.

Validation errors name the 1-based data row and the column, never a value or a path (a folder
name can be a patient's name). pydicom's own warnings and log records, which can quote header
values, are silenced while a file is read.
"""

from __future__ import annotations

import logging
import tomllib
import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from enum import StrEnum
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd
from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from site_agent.data.predictions import IMAGE_COLUMN, MISSING_LEVEL, read_table
from site_agent.exceptions import InputError, PredictionsError

IMAGE_SUFFIXES = (".dcm", ".png", ".npy")
"""Suffixes of single image files; a folder is read as a DICOM series."""
DEFAULT_OTHER = "other"
MAX_SERIES_FILES = 2000

FloatImage = npt.NDArray[np.float64]


class DicomKeyword(StrEnum):
    """The DICOM attributes a site may map to subgroups (PS3.6 keywords)."""

    MANUFACTURER = "Manufacturer"
    MANUFACTURER_MODEL = "ManufacturerModelName"
    FIELD_STRENGTH = "MagneticFieldStrength"
    SLICE_THICKNESS = "SliceThickness"
    MODALITY = "Modality"


class AcquisitionRule(BaseModel):
    """How one DICOM attribute becomes one coarse case attribute, decided by the site.

    Text attributes use ``categories``: a header value is given the first category one of
    whose patterns it contains (case-insensitive). Numeric attributes use ``cut_points``
    and ``bin_names``: a value ``v`` falls in bin ``i`` when ``cut_points[i-1] <= v <
    cut_points[i]``. A value that matches nothing goes to ``other``; a missing value to the
    missing level.
    """

    model_config = ConfigDict(frozen=True, extra="forbid")

    attribute: str = Field(pattern=r"^[a-z][a-z0-9_]{0,39}$", description="Case attribute name.")
    keyword: DicomKeyword
    categories: dict[str, tuple[str, ...]] = Field(default_factory=dict)
    cut_points: tuple[float, ...] = ()
    bin_names: tuple[str, ...] = ()
    other: str = Field(default=DEFAULT_OTHER, min_length=1, max_length=40)

    @model_validator(mode="after")
    def _one_kind(self) -> AcquisitionRule:
        if bool(self.categories) == bool(self.cut_points):
            raise ValueError("a rule has either categories (text) or cut_points (numbers)")
        if self.cut_points and len(self.bin_names) != len(self.cut_points) + 1:
            raise ValueError("bin_names needs one name more than cut_points")
        if list(self.cut_points) != sorted(set(self.cut_points)):
            raise ValueError("cut_points must be strictly increasing")
        names = (*self.categories, *self.bin_names, self.other)
        if any(not 1 <= len(n) <= 40 for n in names):
            raise ValueError("category names must have 1 to 40 characters")
        return self

    def category(self, value: object) -> str:
        """Return the site's category for a header value (the value itself is never kept)."""
        if value is None or (isinstance(value, str) and value.strip() == ""):
            return MISSING_LEVEL
        if self.cut_points:
            try:
                number = float(value)  # type: ignore[arg-type]
            except (TypeError, ValueError):
                return self.other
            if not np.isfinite(number):
                return self.other
            return self.bin_names[int(np.searchsorted(self.cut_points, number, side="right"))]
        text = str(value).casefold()
        for name, patterns in self.categories.items():
            if any(p.casefold() in text for p in patterns):
                return name
        return self.other


class ImageSiteConfig(BaseModel):
    """The site's image settings: which acquisition attributes become subgroups, and how."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    acquisition: tuple[AcquisitionRule, ...] = ()

    @model_validator(mode="after")
    def _unique(self) -> ImageSiteConfig:
        names = [r.attribute for r in self.acquisition]
        if len(set(names)) != len(names):
            raise ValueError("each acquisition attribute may be defined once")
        return self

    @classmethod
    def load(cls, path: Path | str) -> ImageSiteConfig:
        """Read a JSON or TOML configuration file.

        Raises
        ------
        InputError
            If the file is unreadable or invalid (the message names the field).
        """
        path = Path(path)
        try:
            text = path.read_text(encoding="utf-8")
            data: Any = tomllib.loads(text) if path.suffix.lower() == ".toml" else None
            if data is None:
                return cls.model_validate_json(text)
            return cls.model_validate(data)
        except OSError as exc:
            raise InputError(f"cannot read image configuration {path.name}") from exc
        except tomllib.TOMLDecodeError as exc:
            raise InputError(f"image configuration {path.name} is not valid TOML") from exc
        except ValidationError as exc:
            first = exc.errors()[0]
            where = ".".join(str(p) for p in first["loc"]) or "configuration"
            raise InputError(f"image configuration is invalid at {where}: {first['msg']}") from exc


DEFAULT_IMAGE_CONFIG = ImageSiteConfig(
    acquisition=(
        AcquisitionRule(
            attribute="scanner_vendor",
            keyword=DicomKeyword.MANUFACTURER,
            categories={
                "vendor_a": ("GE",),
                "vendor_b": ("SIEMENS",),
                "vendor_c": ("PHILIPS",),
                "vendor_d": ("TOSHIBA", "CANON"),
            },
        ),
        AcquisitionRule(
            attribute="modality",
            keyword=DicomKeyword.MODALITY,
            categories={"CT": ("CT",), "MR": ("MR",), "radiograph": ("CR", "DX")},
        ),
        AcquisitionRule(
            attribute="slice_thickness",
            keyword=DicomKeyword.SLICE_THICKNESS,
            cut_points=(2.5,),
            bin_names=("thin", "thick"),
        ),
    )
)
"""An example mapping (vendor letters, modality, thin/thick slices); sites write their own."""


def load_site_table(path: Path | str, config: ImageSiteConfig | None = None) -> pd.DataFrame:
    """Read a site's table: a predictions table as it is, an image manifest checked.

    A table with an ``image`` column is an image manifest (:func:`load_image_table`).
    """
    frame = read_table(path)
    if IMAGE_COLUMN not in frame.columns:
        return frame
    return _with_images(frame, Path(path), config)


def load_image_table(path: Path | str, config: ImageSiteConfig | None = None) -> pd.DataFrame:
    """Read an image manifest, check every image path, and add the acquisition categories.

    The returned frame holds the manifest's columns with ``image`` as absolute paths, plus
    one column per rule of ``config`` (taken from DICOM headers; images without a header,
    PNG or NumPy, get the missing level unless the manifest already has that column).

    Raises
    ------
    PredictionsError
        If the ``image`` column is missing, a path is empty, missing, of an unknown kind, or
        a DICOM header cannot be read (row and column named, never the path).
    """
    frame = read_table(path)
    if IMAGE_COLUMN not in frame.columns:
        raise PredictionsError("required column is missing", column=IMAGE_COLUMN)
    return _with_images(frame, Path(path), config)


def _with_images(frame: pd.DataFrame, path: Path, config: ImageSiteConfig | None) -> pd.DataFrame:
    root = path.resolve().parent
    images = [_resolve(root, value, row) for row, value in enumerate(frame[IMAGE_COLUMN], 1)]
    out = frame.assign(**{IMAGE_COLUMN: [str(p) for p in images]})
    rules = () if config is None else config.acquisition
    if rules:
        headers = [_header(p, row, rules) for row, p in enumerate(images, 1)]
        for rule in rules:
            mapped = [rule.category(h.get(rule.keyword)) if h else None for h in headers]
            given = out[rule.attribute] if rule.attribute in out.columns else None
            column = [
                m if m is not None else (MISSING_LEVEL if given is None else str(given.iloc[i]))
                for i, m in enumerate(mapped)
            ]
            out[rule.attribute] = column
    return out


def read_image(path: Path | str, *, row: int | None = None) -> FloatImage:
    """Return a 2D float64 image from a DICOM file or series folder, PNG or ``.npy`` file.

    DICOM pixel values are passed through the modality LUT (rescale slope and intercept), so
    CT images are in Hounsfield units.

    Raises
    ------
    PredictionsError
        If the file cannot be read as its kind says (``row`` is named, never the path).
    """
    path = Path(path)
    try:
        if path.is_dir():
            image = _series_slice(path, row)
        elif path.suffix.lower() == ".png":
            image = _png(path)
        elif path.suffix.lower() == ".npy":
            image = _npy(path)
        else:
            image = _dicom_pixels(path)
    except PredictionsError as exc:
        raise PredictionsError(_bare(exc), row=row, column=IMAGE_COLUMN) from None
    except Exception:
        # Library messages can quote header values or paths: drop them, keep the row.
        raise PredictionsError("image cannot be read", row=row, column=IMAGE_COLUMN) from None
    if image.ndim != 2 or min(image.shape) < 2 or not np.all(np.isfinite(image)):
        raise PredictionsError(
            "image must be a finite 2D array of at least 2x2 pixels", row=row, column=IMAGE_COLUMN
        )
    return image


def read_images(paths: list[str]) -> list[FloatImage]:
    """Read every image of a checked manifest (see :func:`read_image`), in row order.

    Decoded images are kept in a process-local cache (:class:`_DecodedCache`), keyed by the
    file's path, size and modification time, so a site answering several requests of one
    study in one process (fine-tuning grid, federated rounds, the in-process engine) decodes
    each file once. A changed file is read again. The cache never leaves the process.
    """
    return [_DECODED.get(p, row) for row, p in enumerate(paths, start=1)]


MAX_CACHED_BYTES = 256 * 1024 * 1024
"""Largest total size of decoded images kept in memory by :func:`read_images`."""


class _DecodedCache:
    """Decoded images by (path, size, mtime); oldest entries dropped beyond the byte cap."""

    def __init__(self, max_bytes: int) -> None:
        self._max_bytes = max_bytes
        self._bytes = 0
        self._items: dict[tuple[str, int, int], FloatImage] = {}

    def get(self, path: str, row: int) -> FloatImage:
        try:
            stat = Path(path).stat()
        except OSError:
            return read_image(path, row=row)  # raises the row-named error
        key = (path, stat.st_size, stat.st_mtime_ns)
        cached = self._items.get(key)
        if cached is None:
            cached = read_image(path, row=row)
            cached.setflags(write=False)
            self._items[key] = cached
            self._bytes += cached.nbytes
            while self._bytes > self._max_bytes and self._items:
                oldest = next(iter(self._items))
                self._bytes -= self._items.pop(oldest).nbytes
        return cached


_DECODED = _DecodedCache(MAX_CACHED_BYTES)


@contextmanager
def quiet_pydicom() -> Iterator[None]:
    """Silence pydicom's warnings and log records, which can quote header values."""
    pydicom_logger = logging.getLogger("pydicom")
    was_disabled = pydicom_logger.disabled
    pydicom_logger.disabled = True
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            yield
    finally:
        pydicom_logger.disabled = was_disabled


# Private helpers below: paths are resolved and exist; callers translate errors.


def _bare(exc: PredictionsError) -> str:
    return str(exc.args[0]) if exc.args else "image cannot be read"


def _resolve(root: Path, value: object, row: int) -> Path:
    text = "" if value is None or (isinstance(value, float) and np.isnan(value)) else str(value)
    if text.strip() == "":
        raise PredictionsError("image path must not be empty", row=row, column=IMAGE_COLUMN)
    candidate = Path(text.strip())
    resolved = candidate if candidate.is_absolute() else root / candidate
    if resolved.is_dir():
        return resolved
    if not resolved.is_file():
        raise PredictionsError("image file not found", row=row, column=IMAGE_COLUMN)
    if resolved.suffix.lower() not in IMAGE_SUFFIXES and not _has_dicom_preamble(resolved):
        raise PredictionsError(
            f"image must be DICOM, {', '.join(IMAGE_SUFFIXES)} or a DICOM series folder",
            row=row,
            column=IMAGE_COLUMN,
        )
    return resolved


def _has_dicom_preamble(path: Path) -> bool:
    try:
        with path.open("rb") as handle:
            head = handle.read(132)
    except OSError:
        return False
    return len(head) == 132 and head[128:] == b"DICM"


def _is_dicom(path: Path) -> bool:
    return path.suffix.lower() == ".dcm" or _has_dicom_preamble(path)


def _header(path: Path, row: int, rules: tuple[AcquisitionRule, ...]) -> dict[str, object]:
    """Return the raw values of the rules' keywords; they stay inside this module."""
    if path.is_dir():
        files = _series_files(path)
        if not files:
            raise PredictionsError(
                "series folder holds no DICOM file", row=row, column=IMAGE_COLUMN
            )
        path = files[0]
    elif not _is_dicom(path):
        return {}
    import pydicom

    try:
        with quiet_pydicom():
            ds = pydicom.dcmread(path, stop_before_pixels=True)
            return {r.keyword: _plain(ds.get(r.keyword.value)) for r in rules}
    except Exception:
        raise PredictionsError(
            "DICOM header cannot be read", row=row, column=IMAGE_COLUMN
        ) from None


def _plain(value: object) -> object:
    """Reduce a pydicom value (multi-valued, DSfloat, PersonName) to a str or float."""
    if value is None:
        return None
    if isinstance(value, list | tuple) or type(value).__name__ == "MultiValue":
        items = list(value)  # type: ignore[call-overload]
        return _plain(items[0]) if items else None
    if isinstance(value, int | float):
        return float(value)
    return str(value)


def _dicom_pixels(path: Path) -> FloatImage:
    import pydicom
    from pydicom.pixels.processing import apply_modality_lut

    with quiet_pydicom():
        ds = pydicom.dcmread(path)
        pixels = np.asarray(apply_modality_lut(ds.pixel_array, ds), dtype=np.float64)
    if pixels.ndim == 3 and int(ds.get("SamplesPerPixel", 1) or 1) == 1:
        pixels = pixels[pixels.shape[0] // 2]
    elif pixels.ndim == 3:
        pixels = pixels.mean(axis=-1)
    return pixels


def _series_files(folder: Path) -> list[Path]:
    files = sorted(p for p in folder.iterdir() if p.is_file() and _is_dicom(p))
    return files[:MAX_SERIES_FILES]


def _series_slice(folder: Path, row: int | None) -> FloatImage:
    """Return the middle slice of a series, ordered by position along the slice normal."""
    import pydicom

    files = _series_files(folder)
    if not files:
        raise PredictionsError("series folder holds no DICOM file")
    with quiet_pydicom():
        headers = [pydicom.dcmread(p, stop_before_pixels=True) for p in files]
    keys = [_slice_position(h, i) for i, h in enumerate(headers)]
    ordered = [files[i] for i in np.argsort(keys, kind="stable")]
    return _dicom_pixels(ordered[len(ordered) // 2])


def _slice_position(ds: Any, fallback: int) -> float:
    position = ds.get("ImagePositionPatient")
    if position is not None and len(position) == 3:
        return float(position[2])
    number = ds.get("InstanceNumber")
    return float(number) if number is not None else float(fallback)


def _png(path: Path) -> FloatImage:
    from PIL import Image

    with Image.open(path) as img:
        mode = "I;16" if img.mode.startswith("I;16") else "L"
        grey = img if img.mode in ("L", "I", "F", "I;16") else img.convert(mode)
        return np.asarray(grey, dtype=np.float64)


def _npy(path: Path) -> FloatImage:
    array = np.load(path, allow_pickle=False)
    if array.ndim == 3:
        array = array[array.shape[0] // 2]
    return np.asarray(array, dtype=np.float64)
