"""Image manifests: reading DICOM, PNG and NumPy images, and mapping acquisition attributes.

Reference files: pydicom's shipped test files ``CT_small.dcm`` and ``MR_small.dcm``
(pydicom 3.0, ``pydicom.data.get_testdata_file``). Reference values come from pydicom's own
modality LUT and Pillow, used directly; invented manifests are for tests only.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pydicom
import pytest
from PIL import Image
from pydicom.data import get_testdata_file
from pydicom.pixels.processing import apply_modality_lut

from site_agent.data.images import (
    DEFAULT_IMAGE_CONFIG,
    AcquisitionRule,
    DicomKeyword,
    ImageSiteConfig,
    load_image_table,
    load_site_table,
    read_image,
)
from site_agent.data.predictions import MISSING_LEVEL
from site_agent.exceptions import InputError, PredictionsError


def _testdata(name: str) -> Path:
    found = get_testdata_file(name)
    assert isinstance(found, str)
    return Path(found)


def test_ct_dicom_is_read_in_hounsfield_units_like_pydicom() -> None:
    """CT_small.dcm pixels pass through the modality LUT exactly as pydicom applies it."""
    ds = pydicom.dcmread(_testdata("CT_small.dcm"))
    expected = apply_modality_lut(ds.pixel_array, ds).astype(np.float64)

    image = read_image(_testdata("CT_small.dcm"))

    assert image.shape == (128, 128)
    np.testing.assert_array_equal(image, expected)


def test_series_folder_gives_the_middle_slice_by_position(tmp_path: Path) -> None:
    """A folder of three slices yields the one in the middle along z, not in file order."""
    base = pydicom.dcmread(_testdata("MR_small.dcm")).pixel_array.copy()
    for name, z, offset in (("a.dcm", 30.0, 300), ("b.dcm", 10.0, 100), ("c.dcm", 20.0, 200)):
        ds = pydicom.dcmread(_testdata("MR_small.dcm"))
        ds.ImagePositionPatient = [0.0, 0.0, z]
        ds.PixelData = (base + offset).astype(np.int16).tobytes()
        ds.save_as(tmp_path / name)

    image = read_image(tmp_path)

    np.testing.assert_array_equal(image, base.astype(np.float64) + 200)


def test_png_and_npy_images_read_as_stored(tmp_path: Path) -> None:
    """A greyscale PNG (Pillow round trip) and a 3D .npy (middle slice) read back unchanged."""
    pixels = np.arange(64, dtype=np.uint8).reshape(8, 8)
    Image.fromarray(pixels).save(tmp_path / "x.png")
    volume = np.stack([np.full((4, 5), k, dtype=np.float32) for k in range(3)])
    np.save(tmp_path / "v.npy", volume)

    np.testing.assert_array_equal(read_image(tmp_path / "x.png"), pixels.astype(np.float64))
    np.testing.assert_array_equal(read_image(tmp_path / "v.npy"), np.full((4, 5), 1.0))


def _manifest(tmp_path: Path, rows: list[str]) -> Path:
    path = tmp_path / "manifest.csv"
    path.write_text("case_id,patient_id,label,image\n" + "\n".join(rows) + "\n")
    return path


def test_manifest_maps_dicom_headers_to_site_categories(tmp_path: Path) -> None:
    """CT_small (GE, 5 mm) and MR_small (Toshiba, 0.8 mm) get the site's category names."""
    # Header values recalled from the files themselves: Manufacturer "GE MEDICAL SYSTEMS",
    # SliceThickness 5.0; "TOSHIBA_MEC", 0.8 (read with pydicom 3.0.2).
    path = _manifest(
        tmp_path, [f"c1,p1,1,{_testdata('CT_small.dcm')}", f"c2,p2,0,{_testdata('MR_small.dcm')}"]
    )

    frame = load_image_table(path, DEFAULT_IMAGE_CONFIG)

    assert frame["scanner_vendor"].tolist() == ["vendor_a", "vendor_d"]
    assert frame["modality"].tolist() == ["CT", "MR"]
    assert frame["slice_thickness"].tolist() == ["thick", "thin"]


def test_unmatched_and_missing_header_values_get_other_and_missing_levels(tmp_path: Path) -> None:
    """A vendor no rule names becomes 'other'; an image without a header, the missing level."""
    np.save(tmp_path / "plain.npy", np.zeros((4, 4)))
    rule = AcquisitionRule(
        attribute="scanner_vendor", keyword=DicomKeyword.MANUFACTURER, categories={"x": ("ACME",)}
    )
    path = _manifest(tmp_path, [f"c1,p1,1,{_testdata('CT_small.dcm')}", "c2,p2,0,plain.npy"])

    frame = load_image_table(path, ImageSiteConfig(acquisition=(rule,)))

    assert frame["scanner_vendor"].tolist() == ["other", MISSING_LEVEL]


def test_numeric_rule_bins_field_strength_values() -> None:
    """Cut point 2.0 T puts 1.5 T in the first bin and 3 T in the second."""
    rule = AcquisitionRule(
        attribute="field_strength",
        keyword=DicomKeyword.FIELD_STRENGTH,
        cut_points=(2.0,),
        bin_names=("up_to_2T", "above_2T"),
    )

    assert [rule.category(v) for v in (1.5, 3.0, "3", None, "n/a")] == [
        "up_to_2T",
        "above_2T",
        "above_2T",
        MISSING_LEVEL,
        "other",
    ]


def test_missing_image_is_named_by_row_and_column_never_by_path(tmp_path: Path) -> None:
    """The error names row 2 and column 'image' but not the (possibly identifying) path."""
    np.save(tmp_path / "ok.npy", np.zeros((4, 4)))
    path = _manifest(tmp_path, ["c1,p1,1,ok.npy", "c2,p2,0,Doe_Jane_1970/slice.dcm"])

    with pytest.raises(PredictionsError, match=r"^row 2, column 'image': image file not found$"):
        load_image_table(path)


def test_unreadable_image_is_reported_without_library_text(tmp_path: Path) -> None:
    """A damaged DICOM file gives our fixed text, not pydicom's message."""
    (tmp_path / "bad.dcm").write_bytes(b"\x00" * 128 + b"DICM" + b"garbage")

    with pytest.raises(PredictionsError, match=r"^row 1, column 'image': image cannot be read$"):
        read_image(tmp_path / "bad.dcm", row=1)


def test_table_without_image_column_is_read_as_it_is(tmp_path: Path) -> None:
    """A predictions table (no image column) passes through load_site_table unchanged."""
    path = tmp_path / "t.csv"
    path.write_text("case_id,patient_id,label,score\nc1,p1,1,0.5\n")

    assert load_site_table(path, DEFAULT_IMAGE_CONFIG).columns.tolist() == [
        "case_id",
        "patient_id",
        "label",
        "score",
    ]


def test_config_file_errors_name_the_field(tmp_path: Path) -> None:
    """A rule with both categories and cut points is refused, naming where."""
    path = tmp_path / "images.toml"
    path.write_text(
        '[[acquisition]]\nattribute = "v"\nkeyword = "Manufacturer"\n'
        'categories = {a = ["A"]}\ncut_points = [1.0]\nbin_names = ["x", "y"]\n'
    )

    with pytest.raises(InputError, match=r"image configuration is invalid at acquisition\.0"):
        ImageSiteConfig.load(path)
