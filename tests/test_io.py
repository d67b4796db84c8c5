"""Reading stage: calibration conventions, stacks, RGB, masking and every kind of bad input."""

from __future__ import annotations

import importlib.util
import sys
import warnings

import numpy as np
import pytest
import tifffile

from tenfold.analysis import io
from tenfold.analysis._errors import TenfoldInputError, TenfoldWarning
from tenfold.analysis.io import micrograph_from_array, read_micrograph, supported_suffixes, write_tiff


def _image(rows=40, cols=48, seed=0):
    return np.random.default_rng(seed).random((rows, cols)).astype(np.float32)


def _raises(match_parts, func, *args, **kwargs):
    """Call and return the TenfoldInputError message after checking it contains every part."""
    with pytest.raises(TenfoldInputError) as info:
        func(*args, **kwargs)
    msg = str(info.value)
    for part in match_parts:
        assert part in msg, (part, msg)
    assert "\n" not in msg
    return msg


# ---------------------------------------------------------------------------------------------------------------
# write_tiff / ImageJ convention


@pytest.mark.parametrize("px", [0.0123456789, 0.005, 0.0732, 1.7])
def test_write_read_tiff_round_trip_keeps_pixel_size(tmp_path, px):
    img = _image()
    path = write_tiff(tmp_path / "a.tif", img, pixel_size_nm=px, description="demo alloy Xy-17")
    mg = read_micrograph(path)
    assert mg.meta.calibration_source == "imagej"
    assert mg.meta.pixel_size_nm == pytest.approx(px, rel=1e-6)
    np.testing.assert_array_equal(mg.data, img)
    assert mg.data.dtype == np.float32
    assert mg.meta.shape == img.shape
    assert mg.meta.original_dtype == "float32"
    assert len(mg.meta.sha256) == 64
    assert mg.valid.all()


def test_write_tiff_uses_imagej_convention_and_zlib(tmp_path):
    path = write_tiff(tmp_path / "a.tif", _image(), pixel_size_nm=0.02, description="note")
    with tifffile.TiffFile(path) as tf:
        page = tf.pages[0]
        assert tf.is_imagej
        assert tf.imagej_metadata["unit"] == "nm"
        assert tf.imagej_metadata["Info"] == "note"
        # ImageJ convention: resolution = pixels per unit (here 1 / 0.02 nm = 50 px/nm)
        assert page.get_resolution()[0] == pytest.approx(50.0, rel=1e-9)
        assert page.compression == tifffile.COMPRESSION.ADOBE_DEFLATE


def test_write_tiff_refuses_overwrite(tmp_path):
    path = write_tiff(tmp_path / "a.tif", _image(), pixel_size_nm=None)
    _raises(["a.tif", "already exists", "overwrite=True"], write_tiff, path, _image(), pixel_size_nm=0.1)
    write_tiff(path, _image(seed=3), pixel_size_nm=0.1, overwrite=True)
    assert read_micrograph(path).meta.pixel_size_nm == pytest.approx(0.1, rel=1e-9)


def test_write_tiff_uncalibrated_reads_uncalibrated(tmp_path):
    mg = read_micrograph(write_tiff(tmp_path / "u.tif", _image(), pixel_size_nm=None))
    assert mg.meta.pixel_size_nm is None and mg.meta.calibration_source == "none"
    assert not mg.meta.calibrated


@pytest.mark.parametrize("bad", [0, -1.0, float("nan"), float("inf"), "abc"])
def test_write_tiff_bad_pixel_size(tmp_path, bad):
    _raises(["pixel_size_nm", "positive"] if bad != "abc" else ["pixel_size_nm", "not a number"],
            write_tiff, tmp_path / "a.tif", _image(), pixel_size_nm=bad)


def test_write_tiff_rejects_non_2d(tmp_path):
    _raises(["a.tif", "2-D"], write_tiff, tmp_path / "a.tif", np.zeros((3, 20, 20)), pixel_size_nm=None)


# ---------------------------------------------------------------------------------------------------------------
# calibration conventions


# 1 um = 1000 nm, 1 A = 0.1 nm, 1 cm = 1e7 nm, 1 m = 1e9 nm (SI Brochure, 9th ed., BIPM 2019)
@pytest.mark.parametrize(
    "unit, per_unit, expected_nm",
    # ImageJ descriptions are ASCII: ImageJ writes micrometre and angstrom as unicode escapes
    [("nm", 50.0, 0.02), ("micron", 5000.0, 0.2), ("um", 2e4, 0.05), ("\\u00B5m", 2e4, 0.05),
     ("\\u00C5", 5.0, 0.02), ("A", 5.0, 0.02), ("cm", 1e8, 0.1), ("m", 1e9, 1.0)],
)
def test_imagej_units(tmp_path, unit, per_unit, expected_nm):
    path = tmp_path / "ij.tif"
    tifffile.imwrite(path, _image(), imagej=True, resolution=(per_unit, per_unit), metadata={"unit": unit})
    mg = read_micrograph(path)
    assert mg.meta.calibration_source == "imagej"
    assert mg.meta.pixel_size_nm == pytest.approx(expected_nm, rel=1e-9)


@pytest.mark.parametrize("unit, value, expected_nm", [("nm", 0.0173, 0.0173), ("\u00b5m", 1.73e-5, 0.0173)])
def test_ome_physical_size(tmp_path, unit, value, expected_nm):
    path = tmp_path / "a.ome.tif"
    tifffile.imwrite(path, _image(), metadata={"PhysicalSizeX": value, "PhysicalSizeXUnit": unit,
                                               "PhysicalSizeY": value, "PhysicalSizeYUnit": unit})
    mg = read_micrograph(path)
    assert mg.meta.calibration_source == "ome"
    assert mg.meta.pixel_size_nm == pytest.approx(expected_nm, rel=1e-9)


def test_ome_default_unit_is_micrometre(tmp_path):
    # OME-XML schema: PhysicalSizeXUnit defaults to micrometre (OME Data Model, 2016-06 schema)
    path = tmp_path / "b.ome.tif"
    tifffile.imwrite(path, _image(), metadata={"PhysicalSizeX": 2e-5, "PhysicalSizeY": 2e-5})
    assert read_micrograph(path).meta.pixel_size_nm == pytest.approx(0.02, rel=1e-9)


def test_tiff_resolution_cm_accepted(tmp_path):
    path = tmp_path / "cm.tif"
    tifffile.imwrite(path, _image(), resolution=(2e7, 2e7), resolutionunit="CENTIMETER")  # 0.5 nm pixels
    mg = read_micrograph(path)
    assert mg.meta.calibration_source == "tiff-resolution"
    assert mg.meta.pixel_size_nm == pytest.approx(0.5, rel=1e-9)


@pytest.mark.parametrize("dpi", [72, 96, 300])
def test_dpi_tag_is_not_a_calibration(tmp_path, dpi):
    # 1 inch = 25.4 mm exactly (international inch, 1959): 72 dpi is a 0.353 mm pixel, no micrograph scale
    path = tmp_path / "dpi.tif"
    tifffile.imwrite(path, _image(), resolution=(dpi, dpi), resolutionunit="INCH")
    with pytest.warns(TenfoldWarning, match="no micrograph calibration"):
        mg = read_micrograph(path)
    assert mg.meta.pixel_size_nm is None and mg.meta.calibration_source == "none"
    assert any("dpi" in n for n in mg.meta.notes)


def test_cm_scale_pixel_is_nonsense(tmp_path):
    path = tmp_path / "cmpx.tif"
    tifffile.imwrite(path, _image(), imagej=True, resolution=(0.5, 0.5), metadata={"unit": "cm"})  # 2 cm pixel
    with pytest.warns(TenfoldWarning, match="1 mm"):
        mg = read_micrograph(path)
    assert mg.meta.pixel_size_nm is None


def test_anisotropic_pixels_warn_and_use_mean(tmp_path):
    path = tmp_path / "an.tif"
    tifffile.imwrite(path, _image(), imagej=True, resolution=(1 / 0.020, 1 / 0.022), metadata={"unit": "nm"})
    with pytest.warns(TenfoldWarning, match="anisotropic"):
        mg = read_micrograph(path)
    assert mg.meta.pixel_size_nm == pytest.approx(0.021, rel=1e-9)
    assert any("anisotropic" in n and "mean" in n for n in mg.meta.notes)


def test_plain_tiff_without_unit_is_uncalibrated(tmp_path):
    path = tmp_path / "plain.tif"
    tifffile.imwrite(path, (_image() * 1000).astype(np.uint16))
    mg = read_micrograph(path)
    assert mg.meta.pixel_size_nm is None and mg.meta.calibration_source == "none"
    assert mg.meta.original_dtype == "uint16" and mg.data.dtype == np.float32


def test_pixel_size_override(tmp_path):
    path = write_tiff(tmp_path / "a.tif", _image(), pixel_size_nm=0.02)
    mg = read_micrograph(path, pixel_size_nm=0.031)
    assert mg.meta.pixel_size_nm == 0.031 and mg.meta.calibration_source == "user"
    for bad in (0.0, -0.1, float("nan"), float("inf")):
        _raises(["pixel_size_nm", "positive finite"], read_micrograph, path, pixel_size_nm=bad)


def test_mrc_round_trip_with_voxel_size(tmp_path):
    import mrcfile
    img = _image()
    path = tmp_path / "a.mrc"
    with mrcfile.new(path) as mrc:
        mrc.set_data(img)
        mrc.voxel_size = 1.25  # angstrom (MRC2014: Cheng et al., J. Struct. Biol. 192 (2015) 146)
    mg = read_micrograph(path)
    assert mg.meta.calibration_source == "mrc-voxel"
    assert mg.meta.pixel_size_nm == pytest.approx(0.125, rel=1e-6)
    np.testing.assert_array_equal(mg.data, img)


def test_mrc_zero_voxel_is_uncalibrated(tmp_path):
    import mrcfile

    path = tmp_path / "z.mrc"
    with mrcfile.new(path) as mrc:
        mrc.set_data(_image())
    mg = read_micrograph(path)
    assert mg.meta.pixel_size_nm is None and mg.meta.calibration_source == "none"


def test_png_is_uncalibrated(tmp_path):
    import imageio.v3 as iio

    img = (np.random.default_rng(1).random((30, 40)) * 255).astype(np.uint8)
    path = tmp_path / "a.png"
    iio.imwrite(path, img)
    mg = read_micrograph(path)
    assert mg.meta.calibration_source == "none" and mg.meta.pixel_size_nm is None
    np.testing.assert_array_equal(mg.data, img.astype(np.float32))
    assert read_micrograph(path, pixel_size_nm=0.05).meta.calibration_source == "user"


# ---------------------------------------------------------------------------------------------------------------
# stacks, RGB, masking


def _stack_file(tmp_path, n=5):
    stack = np.stack([_image(seed=k) for k in range(n)])
    path = tmp_path / "stack.tif"
    tifffile.imwrite(path, stack, imagej=True, resolution=(50.0, 50.0), metadata={"unit": "nm"})
    return path, stack


def test_stack_needs_a_choice(tmp_path):
    path, _ = _stack_file(tmp_path)
    _raises(["stack.tif", "stack of 5 frames", "frame=K", "frame_range=(a, b)"], read_micrograph, path)


def test_stack_frame(tmp_path):
    path, stack = _stack_file(tmp_path)
    mg = read_micrograph(path, frame=3)
    np.testing.assert_array_equal(mg.data, stack[3])
    assert mg.meta.frames == "frame 3"
    assert mg.meta.pixel_size_nm == pytest.approx(0.02)
    _raises(["stack.tif", "frame=5", "0..4"], read_micrograph, path, frame=5)


def test_stack_frame_range_is_mean(tmp_path):
    path, stack = _stack_file(tmp_path)
    mg = read_micrograph(path, frame_range=(1, 4), align=False)
    np.testing.assert_allclose(mg.data, stack[1:4].astype(np.float64).mean(axis=0), rtol=1e-6)
    assert mg.meta.frames == "mean of frames 1-3" and mg.meta.frames_averaged == 3 and mg.alignment is None
    assert any("without alignment" in n for n in mg.meta.notes)
    # aligned by default: these frames are noise without structure, which is refused with a way out
    _raises(["stack.tif", "no common structure", "--no-align"], read_micrograph, path, frame_range=(1, 4))
    _raises(["stack.tif", "frame_range=(3, 3)"], read_micrograph, path, frame_range=(3, 3))
    _raises(["stack.tif", "not both"], read_micrograph, path, frame=1, frame_range=(0, 2))


def test_frame_on_single_image_is_an_error(tmp_path):
    path = write_tiff(tmp_path / "one.tif", _image(), pixel_size_nm=None)
    _raises(["one.tif", "not a stack"], read_micrograph, path, frame=0)


def test_rgb_converts_with_warning(tmp_path):
    import imageio.v3 as iio

    rgb = np.zeros((30, 40, 3), np.uint8)
    rgb[..., 0] = 200
    rgb[:, :20, 1] = 100
    path = tmp_path / "c.png"
    iio.imwrite(path, rgb)
    with pytest.warns(TenfoldWarning, match="luminance"):
        mg = read_micrograph(path)
    assert mg.meta.converted_from_rgb
    # ITU-R BT.709 luma: Y = 0.2126 R + 0.7152 G + 0.0722 B
    assert mg.data[0, 0] == pytest.approx(0.2126 * 200 + 0.7152 * 100, rel=1e-6)
    assert mg.data[0, 39] == pytest.approx(0.2126 * 200, rel=1e-6)


def test_rgba_array_converts(tmp_path):
    rgba = np.zeros((20, 20, 4), np.uint8)
    rgba[..., 2] = 100
    rgba[:10, :, 0] = 50
    rgba[..., 3] = 255
    with pytest.warns(TenfoldWarning, match="RGBA"):
        mg = micrograph_from_array(rgba)
    assert mg.data[15, 0] == pytest.approx(7.22, rel=1e-6)
    _raises(["RGBA", "not a stack"], micrograph_from_array, rgba, frame=0)


def test_partly_nan_is_masked(tmp_path):
    img = _image().astype(np.float64)
    img[:4, :10] = np.nan
    img[10, 10] = np.inf
    original = img.copy()
    with pytest.warns(TenfoldWarning, match=r"2\.14% of pixels"):
        mg = micrograph_from_array(img, pixel_size_nm=0.02, name="demo")
    np.testing.assert_array_equal(img, original)  # input untouched (NaN compare equal here)
    assert mg.meta.masked_fraction == pytest.approx(41 / img.size)
    assert not mg.valid[:4, :10].any() and not mg.valid[10, 10] and mg.valid.sum() == img.size - 41
    assert np.isfinite(mg.data).all()
    assert mg.data[0, 0] == pytest.approx(np.median(img[np.isfinite(img)]), rel=1e-6)
    assert mg.meta.calibration_source == "user"


def test_partly_nan_file_is_masked(tmp_path):
    img = _image()
    img[5, :] = np.nan
    path = write_tiff(tmp_path / "n.tif", img, pixel_size_nm=0.02)
    with pytest.warns(TenfoldWarning, match="masked"):
        mg = read_micrograph(path)
    assert mg.meta.masked_fraction == pytest.approx(1 / 40)
    assert any("masked" in n for n in mg.meta.notes)


def test_array_input_not_modified():
    img = np.arange(40 * 40, dtype=np.uint16).reshape(40, 40)
    before = img.copy()
    mg = micrograph_from_array(img)
    mg.data[:] = 0
    np.testing.assert_array_equal(img, before)
    assert mg.meta.calibration_source == "none" and mg.meta.sha256 == ""


# ---------------------------------------------------------------------------------------------------------------
# bad input, each with its own message


def test_bad_arrays():
    _raises(["1-D"], micrograph_from_array, np.arange(100.0))
    _raises(["4-D"], micrograph_from_array, np.ones((2, 3, 20, 20)) * np.arange(20))
    _raises(["constant"], micrograph_from_array, np.full((30, 30), 7.0))
    _raises(["NaN"], micrograph_from_array, np.full((30, 30), np.nan))
    _raises(["10 x 40", "too small to hold several column spacings"], micrograph_from_array, _image(10, 40))
    _raises(["complex"], micrograph_from_array, _image() + 1j)
    _raises(["array 'x'", "stack of 3 frames"], micrograph_from_array, np.stack([_image()] * 3), name="x")


def test_missing_file(tmp_path):
    _raises(["nope.tif", "no such file"], read_micrograph, tmp_path / "nope.tif")


def test_directory(tmp_path):
    d = tmp_path / "folder.tif"
    d.mkdir()
    _raises(["folder.tif", "is a directory"], read_micrograph, d)


def test_unknown_suffix(tmp_path):
    p = tmp_path / "image.xyz"
    p.write_bytes(b"123")
    _raises(["image.xyz", "unknown file type", ".tif"], read_micrograph, p)


def test_empty_file(tmp_path):
    p = tmp_path / "empty.tif"
    p.write_bytes(b"")
    _raises(["empty.tif", "empty"], read_micrograph, p)


@pytest.mark.parametrize("suffix", [".tif", ".mrc", ".png", ".jpg"])
def test_random_bytes(tmp_path, suffix):
    p = tmp_path / f"noise{suffix}"
    p.write_bytes(np.random.default_rng(2).bytes(4096))
    _raises([f"noise{suffix}", "corrupt"], read_micrograph, p)


@pytest.mark.parametrize("compress", [True, False])
def test_truncated_tiff(tmp_path, compress):
    full = tmp_path / "full.tif"
    tifffile.imwrite(full, _image(200, 200), compression="zlib" if compress else None)
    data = full.read_bytes()
    p = tmp_path / "cut.tif"
    p.write_bytes(data[: len(data) // 2])
    _raises(["cut.tif", "truncated"], read_micrograph, p)


def test_truncated_mrc(tmp_path):
    import mrcfile

    full = tmp_path / "full.mrc"
    with mrcfile.new(full) as mrc:
        mrc.set_data(_image(64, 64))
    p = tmp_path / "cut.mrc"
    p.write_bytes(full.read_bytes()[:-5000])
    _raises(["cut.mrc", "truncated"], read_micrograph, p)


def test_unreadable_file_message(tmp_path, monkeypatch):
    p = write_tiff(tmp_path / "locked.tif", _image(), pixel_size_nm=None)

    def denied(path):
        raise PermissionError(13, "Permission denied", str(path))

    monkeypatch.setattr(io, "_sha256", denied)
    _raises(["locked.tif", "cannot be read", "Permission denied"], read_micrograph, p)


def test_thermo_fei_tiff_metadata(tmp_path):
    # Thermo Fisher/FEI TIFFs carry an INI-style text block in private tag 34682; PixelWidth is in metres
    ini = "[User]\r\nDate=12/01/2026\r\n[Scan]\r\nPixelWidth=1.5e-11\r\nPixelHeight=1.5e-11\r\n"
    path = tmp_path / "fei.tif"
    tifffile.imwrite(path, _image(), extratags=[(34682, "s", 0, ini, True)])
    mg = read_micrograph(path)
    assert mg.meta.calibration_source == "vendor"
    assert mg.meta.pixel_size_nm == pytest.approx(0.015, rel=1e-9)


def test_supported_suffixes():
    s = supported_suffixes()
    assert {".tif", ".tiff", ".mrc", ".png", ".jpg", ".bmp", ".dm3", ".dm4", ".emd", ".ser"} <= set(s)
    assert all(x.startswith(".") and x == x.lower() for x in s)


# ---------------------------------------------------------------------------------------------------------------
# vendor formats (optional, GPL-licensed reader: the extra 'vendor')


_HAVE_EMD = importlib.util.find_spec("rsciio") is not None and importlib.util.find_spec("h5py") is not None


@pytest.mark.skipif(not _HAVE_EMD, reason="optional extra 'vendor' (rosettasciio, h5py) not installed")
def test_emd_round_trip(tmp_path):
    from rsciio.emd import file_writer

    img = _image()
    axes = [{"name": n, "size": s, "scale": 0.4, "offset": 0.0, "units": "\u00c5", "navigate": False}
            for n, s in (("y", img.shape[0]), ("x", img.shape[1]))]
    path = tmp_path / "a.emd"
    file_writer(str(path), {"data": img, "axes": axes, "original_metadata": {},
                            "metadata": {"General": {"title": "demo"}, "Signal": {"signal_type": ""}}})
    mg = read_micrograph(path)
    assert mg.meta.calibration_source == "vendor"
    assert mg.meta.pixel_size_nm == pytest.approx(0.04, rel=1e-9)
    np.testing.assert_array_equal(mg.data, img)


@pytest.mark.skipif(importlib.util.find_spec("rsciio") is None, reason="optional extra 'vendor' not installed")
def test_vendor_corrupt_file(tmp_path):
    p = tmp_path / "junk.dm4"
    p.write_bytes(np.random.default_rng(3).bytes(4096))
    _raises(["junk.dm4", "corrupt"], read_micrograph, p)


@pytest.mark.parametrize("suffix", [".dm3", ".dm4", ".emd", ".ser"])
def test_vendor_reader_missing_says_which_extra(tmp_path, monkeypatch, suffix):
    # None in sys.modules makes the import fail as if the package were not installed
    monkeypatch.setitem(sys.modules, "rsciio", None)
    p = tmp_path / f"scan{suffix}"
    p.write_bytes(b"\0" * 64)
    _raises([f"scan{suffix}", "rosettasciio", "pip install 'tenfold[vendor]'"], read_micrograph, p)


def test_import_is_light():
    import subprocess

    code = ("import sys, tenfold.analysis.io; "
            "bad = [m for m in ('matplotlib', 'napari', 'tifffile', 'mrcfile', 'imageio', 'rsciio') "
            "if m in sys.modules]; print(bad)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"


def test_warnings_point_at_caller():
    img = _image()
    img[0, 0] = np.nan
    with warnings.catch_warnings(record=True) as rec:
        warnings.simplefilter("always")
        micrograph_from_array(img)
    assert rec and rec[0].filename == __file__


def test_read_stack_returns_the_frames_as_stored(tmp_path):
    from tenfold.analysis.io import read_stack

    path, stack = _stack_file(tmp_path)
    frames, first = read_stack(path)
    assert np.array_equal(frames, stack) and first.meta.frames == "frame 0"
    single = write_tiff(tmp_path / "one.tif", _image(), pixel_size_nm=0.05)
    none, mg = read_stack(single)
    assert none is None and mg.meta.pixel_size_nm == pytest.approx(0.05)
