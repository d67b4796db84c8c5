"""Property tests (hypothesis): every public call returns well-formed tables or raises TenfoldInputError with a
specific message; the readers survive truncated, bit-flipped and lying files; the same input gives the same bytes.

Bounded: few examples per property (the whole file runs in well under a minute on two cores); the example counts
are quoted in docs/guarantees.md.
"""

from __future__ import annotations

import io as _bytesio
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import tifffile
from hypothesis import event, example, given, HealthCheck, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from tenfold.analysis import _schema, _sanitize
from tenfold.analysis._errors import TenfoldInputError, TenfoldWarning
from tenfold.analysis.columns import find_columns
from tenfold.analysis.export import write_results
from tenfold.analysis.io import micrograph_from_array, read_micrograph
from tenfold.analysis.pipeline import Parameters, rerun_from_columns, run_pipeline
from tenfold.analysis.region import Region, label_points, parse_region

SAMPLE = Path(__file__).resolve().parents[1] / "sample_images" / "decagonal_haadf_vacancies.tif"
FAST = settings(max_examples=40, deadline=None, derandomize=True,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])


def _quiet(func, *args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TenfoldWarning)
        return func(*args, **kwargs)


def _well_formed(df: pd.DataFrame, fields) -> None:
    assert list(df.columns[: len(fields)]) == [f.name for f in fields]
    for f in fields:
        assert str(df[f.name].dtype) == f.dtype or f.dtype == "object", (f.name, df[f.name].dtype)


def _specific(exc: TenfoldInputError) -> None:
    event("TenfoldInputError")
    msg = str(exc)
    assert "\n" not in msg and len(msg) > 20, msg


@pytest.fixture(scope="module")
def sample():
    return read_micrograph(SAMPLE)


@pytest.fixture(scope="module")
def base_result(sample):
    crop = micrograph_from_array(sample.data[:160, :160], pixel_size_nm=0.04, name="crop")
    return _quiet(run_pipeline, crop, Parameters(fourier=False))


# ---------------------------------------------------------------------------------------------------------------
# images of every dtype, size and NaN/inf pattern

_DTYPES = st.sampled_from([np.uint8, np.uint16, np.int16, np.int32, np.float32, np.float64, np.bool_])
_ARRAYS = hnp.arrays(_DTYPES, hnp.array_shapes(min_dims=1, max_dims=3, min_side=0, max_side=40))


@FAST
@given(arr=_ARRAYS)
def test_micrograph_from_any_array(arr):
    try:
        mg = _quiet(micrograph_from_array, arr)
    except TenfoldInputError as exc:
        _specific(exc)
        return
    assert mg.data.dtype == np.float32 and mg.data.ndim == 2 and np.isfinite(mg.data).all()
    assert mg.valid.shape == mg.data.shape


@st.composite
def _damaged_images(draw):
    rows, cols = draw(st.integers(16, 128)), draw(st.integers(16, 128))
    kind = draw(st.sampled_from(["sample", "noise", "constant"]))
    rng = np.random.default_rng(draw(st.integers(0, 2**16)))
    if kind == "sample":
        r0, c0 = draw(st.integers(0, 600)), draw(st.integers(0, 600))
        img = read_micrograph(SAMPLE).data[r0 : r0 + rows, c0 : c0 + cols].astype(np.float64)
    elif kind == "noise":
        img = rng.normal(100, 10, (rows, cols))
    else:
        img = np.full((rows, cols), 7.0)
    pattern = draw(st.sampled_from(["none", "nan", "inf", "sparse_nan", "flat_block", "hot"]))
    if pattern == "nan":
        img[: rows // 2] = np.nan
    elif pattern == "inf":
        img[rng.random(img.shape) < 0.05] = np.inf
    elif pattern == "sparse_nan":
        img[rng.random(img.shape) < 0.02] = np.nan
    elif pattern == "flat_block":
        img[rows // 3 :, :] = 0.0
    elif pattern == "hot":
        img[rng.integers(0, rows, 5), rng.integers(0, cols, 5)] = 1e30
    return img.astype(draw(st.sampled_from([np.float32, np.float64])))


@pytest.fixture(scope="module")
def warm(sample):
    """One run before the examples: first imports and numba's cache load happen outside hypothesis's timing and
    recursion-limit bookkeeping."""
    _quiet(find_columns, sample.data[:96, :96])


@settings(max_examples=25, deadline=None, derandomize=True, suppress_health_check=list(HealthCheck))
@given(img=_damaged_images(), lengths=st.booleans())
def test_find_columns_well_formed_or_specific_error(warm, img, lengths):
    # the sample's column sigma is 1.5 px (sample_images/README.md), diameter 4.5 sigma; spacing about 7 px (what
    # estimate_scale finds on the whole sample)
    given = {"column_spacing_px": 7.0, "column_diameter_px": 6.75} if lengths else {}
    try:
        cols, info = _quiet(find_columns, img, **given)
    except TenfoldInputError as exc:
        _specific(exc)
        return
    _well_formed(cols, _schema.COLUMNS)
    assert info["n_columns"] == len(cols)
    assert np.isfinite(cols[["x_px", "y_px"]].to_numpy()).all()


# ---------------------------------------------------------------------------------------------------------------
# column sets: empty, single, duplicated, collinear, coincident


@st.composite
def _column_sets(draw):
    kind = draw(st.sampled_from(["random", "empty", "single", "duplicated", "collinear", "coincident"]))
    n = {"empty": 0, "single": 1}.get(kind, draw(st.integers(2, 60)))
    rng = np.random.default_rng(draw(st.integers(0, 2**16)))
    xy = rng.uniform(0, 159, (n, 2))
    if kind == "duplicated":
        xy = np.repeat(xy[: max(1, n // 2)], 2, axis=0)
    elif kind == "collinear":
        xy[:, 1] = 80.0
    elif kind == "coincident":
        xy[:] = [50.0, 50.0]
    return pd.DataFrame({"x_px": xy[:, 0], "y_px": xy[:, 1]})


@settings(max_examples=20, deadline=None, derandomize=True, suppress_health_check=list(HealthCheck))
@given(cols=_column_sets())
def test_rerun_from_any_column_set(base_result, cols):
    try:
        new = _quiet(rerun_from_columns, base_result, cols)
    except TenfoldInputError as exc:
        _specific(exc)
        return
    for key, fields in (("columns", _schema.COLUMNS), ("motifs", _schema.MOTIFS), ("ladder", _schema.LADDER),
                        ("tiles", _schema.TILES), ("network", _schema.NETWORK)):
        _well_formed(new.tables[key], fields)
    assert len(new.tables["columns"]) == len(cols)


# ---------------------------------------------------------------------------------------------------------------
# regions: outside, degenerate, self-intersecting; parameters at and beyond their bounds

_COORD = st.one_of(st.floats(-1e4, 1e4), st.sampled_from([float("nan"), float("inf"), -float("inf"), 1e300]))


@FAST
@given(corners=st.lists(_COORD, min_size=4, max_size=4), unit=st.sampled_from(["nm", "px"]))
def test_parse_region_any_corners(corners, unit):
    text = ",".join(repr(c) for c in corners)
    try:
        reg = parse_region(text, pixel_size_nm=0.04, unit=unit)
    except TenfoldInputError as exc:
        _specific(exc)
        return
    lab = label_points(np.array([0.0, 50.0]), np.array([0.0, 50.0]), [reg])
    assert lab.shape == (2,) and set(lab.tolist()) <= {0, reg.label}


@FAST
@given(pts=hnp.arrays(np.float64, st.tuples(st.integers(3, 8), st.just(2)), elements=st.floats(-50, 250)))
@example(pts=np.array([[0.0, 7.0], [7.0, 2.22507386e-313], [0.0, 0.0]]))  # a subnormal edge: overflow in the crossing
def test_polygon_regions_any_vertices(pts):
    try:
        reg = Region(label=1, kind="polygon", vertices_px=pts)  # self-intersecting ones included
    except TenfoldInputError as exc:
        _specific(exc)
        return
    lab = label_points(np.linspace(0, 200, 30), np.linspace(0, 200, 30), [reg])
    assert lab.dtype.kind == "i" and set(lab.tolist()) <= {0, 1}


_VALUES = st.one_of(st.none(), st.floats(allow_nan=True, allow_infinity=True), st.integers(-5, 20))


@FAST
@given(name=st.sampled_from(["pixel_size_nm", "column_diameter_nm", "column_spacing_px", "ring_radius_px",
                             "radius_tolerance", "n_species", "ring_order", "rng", "min_mass"]), value=_VALUES)
def test_parameters_validate_any_value(name, value):
    try:
        Parameters(**{name: value}).validate()
    except TenfoldInputError as exc:
        _specific(exc)
        assert name in str(exc)
    except TypeError:  # a comparison of None with a number in a bound check is a bug
        raise


# ---------------------------------------------------------------------------------------------------------------
# readers: truncated, bit-flipped, headers that lie


def _tiff_bytes() -> bytes:
    buf = _bytesio.BytesIO()
    img = (np.arange(48 * 48) % 251).astype(np.uint16).reshape(48, 48)
    tifffile.imwrite(buf, img, imagej=True, resolution=(25.0, 25.0), metadata={"unit": "nm"})
    return buf.getvalue()


def _mrc_bytes(tmp: Path) -> bytes:
    import mrcfile

    path = tmp / "seed.mrc"
    with mrcfile.new(path, overwrite=True) as m:
        m.set_data((np.arange(48 * 48) % 97).astype(np.float32).reshape(48, 48))
        m.voxel_size = 0.4
    return path.read_bytes()


def _png_bytes() -> bytes:
    import imageio.v3 as iio

    return iio.imwrite("<bytes>", (np.arange(48 * 48) % 251).astype(np.uint8).reshape(48, 48), extension=".png")


@pytest.fixture(scope="module")
def seeds(tmp_path_factory):
    return {".tif": _tiff_bytes(), ".mrc": _mrc_bytes(tmp_path_factory.mktemp("seed")), ".png": _png_bytes()}


@settings(max_examples=200, deadline=None, derandomize=True, suppress_health_check=list(HealthCheck))
@given(suffix=st.sampled_from([".tif", ".mrc", ".png"]), how=st.sampled_from(["truncate", "flip", "bytes"]),
       pos=st.floats(0, 1, exclude_max=True), bits=st.integers(0, 255), count=st.integers(1, 8))
def test_readers_survive_damaged_files(tmp_path_factory, seeds, monkeypatch, suffix, how, pos, bits, count):
    raw = bytearray(seeds[suffix])
    at = int(pos * len(raw))
    if how == "truncate":
        raw = raw[: max(at, 1)]
    elif how == "flip":
        for k in range(count):
            raw[(at + 37 * k) % len(raw)] ^= 1 << (bits % 8)
    else:
        raw[at : at + count] = bytes([bits]) * min(count, len(raw) - at)
    path = tmp_path_factory.mktemp("fuzz") / f"damaged{suffix}"
    path.write_bytes(bytes(raw))
    # bounded memory: whatever a damaged header claims, no more than 64 MB is ever decoded
    monkeypatch.setattr(_sanitize, "available_memory", lambda: 64 * 2**20)
    try:
        mg = _quiet(read_micrograph, path)
    except TenfoldInputError as exc:
        _specific(exc)
        assert str(path) in str(exc)
        return
    assert mg.data.ndim == 2 and np.isfinite(mg.data).all()


def test_mrc_header_claiming_huge_image_refused(tmp_path, seeds, monkeypatch):
    raw = bytearray(seeds[".mrc"])
    raw[0:8] = (100000).to_bytes(4, "little") * 2  # nx = ny = 100000
    path = tmp_path / "liar.mrc"
    path.write_bytes(bytes(raw))
    monkeypatch.setattr(_sanitize, "available_memory", lambda: 2**30)
    # the header's size exceeds the file's: a damaged header, not a huge image (issue 17)
    with pytest.raises(TenfoldInputError, match=r"liar\.mrc: corrupt MRC header: it gives 1 x 100000 x 100000"):
        read_micrograph(path)


# ---------------------------------------------------------------------------------------------------------------
# determinism


def test_same_input_gives_byte_identical_tables(sample, tmp_path):
    crop = micrograph_from_array(sample.data[:200, :200], pixel_size_nm=0.04, name="crop")
    outs = []
    for k in range(2):
        res = _quiet(run_pipeline, crop, Parameters(rng=3))
        out = tmp_path / f"run{k}"
        write_results(res, out, figures=False)
        outs.append({p.name: p.read_bytes() for p in out.glob("*.csv")})
    assert outs[0].keys() == outs[1].keys() and len(outs[0]) >= 7
    for name in outs[0]:
        assert outs[0][name] == outs[1][name], name
