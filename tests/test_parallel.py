"""Tiled column finding, the dask cluster and memory-mapped reading (analysis/parallel.py)."""

import json

import numpy as np
import pytest
from scipy.spatial import cKDTree

from tenfold.analysis import TenfoldInputError
from tenfold.analysis.columns import find_columns
from tenfold.analysis.io import micrograph_from_array, read_micrograph, write_tiff
from tenfold.analysis.parallel import (Execution, find_columns_tiled, map_tasks, read_micrograph_mapped,
                                       tile_grid)
from tenfold.analysis.pipeline import run_pipeline
from tenfold.analysis.synthetic import render_image


def _grid_image(n, *, spacing=11.0, seed=1, extra=()):
    """Jittered grid of columns with three brightness levels and Poisson noise (ground truth returned)."""
    rng = np.random.default_rng(seed)
    g = np.arange(spacing / 2, n - spacing / 2, spacing)
    x, y = (v.ravel() for v in np.meshgrid(g, g))
    x = x + rng.uniform(-1.5, 1.5, x.size)
    y = y + rng.uniform(-1.5, 1.5, y.size)
    for ex, ey in extra:
        far = np.hypot(x - ex, y - ey) > spacing * 0.8
        x, y = np.r_[x[far], ex], np.r_[y[far], ey]
    counts = rng.choice([3000.0, 6000.0, 12000.0], x.size)
    img = render_image(x, y, counts, shape=(n, n), sigma_px=1.6, background=20.0, rng=seed + 1)
    return img, x, y


def _match(a, b):
    d, j = cKDTree(a[["x_px", "y_px"]].to_numpy()).query(b[["x_px", "y_px"]].to_numpy())
    return d, j


@pytest.fixture(scope="module")
def grid640():
    img, x, y = _grid_image(640)
    untiled, _ = find_columns(img, n_species=0)
    return img, x, y, untiled


def test_tile_grid_cores_cover_the_image_once():
    grid = tile_grid((280, 520), 128, 20)
    cover = np.zeros((280, 520), dtype=int)
    for (r0, r1, c0, c1), (h0, h1, g0, g1) in grid:
        cover[r0:r1, c0:c1] += 1
        assert h0 == max(0, r0 - 20) and h1 == min(280, r1 + 20) and g0 == max(0, c0 - 20) and g1 == min(520, c1 + 20)
    assert (cover == 1).all()
    # a remainder thinner than a quarter tile joins its neighbour: 280 = 128 + 152, 520 = 128 * 3 + 136
    assert sorted({(r1 - r0) for (r0, r1, _, _), _ in grid}) == [128, 152]
    assert sorted({(c1 - c0) for (_, _, c0, c1), _ in grid}) == [128, 136]


def test_tiled_equals_untiled_within_1e3_px(grid640):
    img, x, y, untiled = grid640
    tiled, info = find_columns_tiled(img, tile_size=256, n_species=0)
    # each column is kept by the one tile whose core holds its candidate pixel: no seam copies to remove
    assert info["tiling"]["n_tiles"] == 9 and info["tiling"]["seam_duplicates_removed"] == 0
    assert len(tiled) == len(untiled) == x.size
    d, j = _match(untiled, tiled)
    assert d.max() < 1e-3
    assert np.unique(j).size == len(j)  # one to one: nothing doubled, nothing lost
    np.testing.assert_allclose(tiled["sigma_px"], untiled["sigma_px"].to_numpy()[j], atol=1e-3)
    np.testing.assert_allclose(tiled["intensity"], untiled["intensity"].to_numpy()[j], rtol=1e-3)
    assert tiled["id"].tolist() == list(range(len(tiled)))


def test_column_on_a_seam_found_once():
    img, x, y = _grid_image(256, extra=[(127.5, 60.3), (127.6, 127.4)])
    tiled, _ = find_columns_tiled(img, tile_size=128, n_species=0)
    for ex, ey in [(127.5, 60.3), (127.6, 127.4)]:
        near = np.hypot(tiled["x_px"] - ex, tiled["y_px"] - ey) < 3.0
        assert near.sum() == 1


def test_species_classified_on_the_merged_table(grid640):
    img, *_ = grid640
    untiled, _ = find_columns(img, n_species=3, rng=0)
    tiled, info = find_columns_tiled(img, tile_size=256, n_species=3, rng=0)
    d, j = _match(untiled, tiled)
    assert (tiled["species"].to_numpy() == untiled["species"].to_numpy()[j]).mean() > 0.999
    assert info["species"]


def test_tiled_input_checks(grid640):
    img, *_ = grid640
    with pytest.raises(TenfoldInputError, match="flatten"):
        find_columns_tiled(img, tile_size=256, flatten=True)
    with pytest.raises(TenfoldInputError, match="tile size"):
        find_columns_tiled(img, tile_size=16)
    with pytest.raises(TenfoldInputError, match="workers"):
        Execution(workers=0)
    assert Execution(tile_size=0).tiles_for((99999, 99999)) is None
    assert Execution().tiles_for((4096, 4096)) is None and Execution().tiles_for((4097, 100)) == 2048


@pytest.mark.slow
def test_local_cluster_of_two_workers_equals_serial():
    img, x, y = _grid_image(320, seed=5)
    serial, _ = find_columns_tiled(img, tile_size=128, n_species=0)
    parallel, info = find_columns_tiled(img, tile_size=128, n_species=0, execution=Execution(workers=2))
    assert info["tiling"]["n_tiles"] == 9
    assert serial.equals(parallel)


def test_map_tasks_serial_keeps_order():
    out = list(map_tasks([(pow, (2, k)) for k in range(4)], Execution(workers=1)))
    assert out == [(0, 1), (1, 2), (2, 4), (3, 8)]


def test_pipeline_tiled_run(grid640, tmp_path):
    img, x, y, untiled = grid640
    mg = micrograph_from_array(img, pixel_size_nm=0.05)
    res = run_pipeline(mg, execution=Execution(tile_size=256, workers=1))
    assert res.summary["columns"]["tiling"]["n_tiles"] == 9
    d, _ = _match(untiled, res.tables["columns"])
    assert d.max() < 1e-3 and len(res.tables["columns"]) == len(untiled)


def test_memory_mapped_tiff_and_mrc(tmp_path):
    import mrcfile
    import tifffile

    img = np.random.default_rng(0).poisson(50.0, (96, 80)).astype(np.float32)
    raw = tmp_path / "raw.tif"
    tifffile.imwrite(raw, img, imagej=True, resolution=(1 / 0.05, 1 / 0.05), metadata={"unit": "nm"})
    mapped = read_micrograph_mapped(raw)
    whole = read_micrograph(raw)
    assert isinstance(mapped.data, np.memmap) and np.array_equal(mapped.data, whole.data)
    assert mapped.meta.pixel_size_nm == pytest.approx(whole.meta.pixel_size_nm)
    assert mapped.meta.sha256 == whole.meta.sha256 and mapped.valid.all()
    packed = write_tiff(tmp_path / "packed.tif", img, pixel_size_nm=0.05)
    with pytest.raises(TenfoldInputError, match="compressed"):
        read_micrograph_mapped(packed)
    mrc = tmp_path / "a.mrc"
    with mrcfile.new(mrc) as m:
        m.set_data(img)
        m.voxel_size = 0.5  # angstrom
    mm = read_micrograph_mapped(mrc)
    assert np.array_equal(mm.data, img) and mm.meta.pixel_size_nm == pytest.approx(0.05)
    assert read_micrograph_mapped(mrc, pixel_size_nm=0.1).meta.calibration_source == "user"


def test_cli_tiled_analyze(grid640, tmp_path):
    import tifffile

    from tenfold.analysis.cli import main

    img, x, y, untiled = grid640
    path = tmp_path / "big.tif"
    tifffile.imwrite(path, img.astype(np.float32))
    out = tmp_path / "res"
    assert main(["analyze", str(path), "--out", str(out), "--tile-size", "256", "--workers", "1", "--no-figures",
                 "--no-fourier", "--quiet"]) == 0
    s = json.loads((out / "summary.json").read_text())
    assert s["columns"]["tiling"]["n_tiles"] == 9 and s["n_columns"] == len(untiled)
    with pytest.raises(SystemExit) as e:
        main(["analyze", str(path), "--out", str(tmp_path / "o2"), "--tile-size", "10"])
    assert e.value.code == 2


def test_image_shape_from_headers_and_mapping_only_when_tiled(tmp_path):
    import mrcfile
    import tifffile

    from tenfold.analysis.parallel import image_shape, mapped_if_tiled

    img = np.zeros((70, 90), dtype=np.float32)
    tifffile.imwrite(tmp_path / "a.tif", img)
    with mrcfile.new(tmp_path / "a.mrc") as m:
        m.set_data(np.zeros((3, 70, 90), dtype=np.float32))
    assert image_shape(tmp_path / "a.tif") == (70, 90)
    assert image_shape(tmp_path / "a.mrc") == (3, 70, 90)
    assert image_shape(tmp_path / "none.png") is None
    assert mapped_if_tiled(tmp_path / "a.tif", Execution()) is None  # small: read whole
    mg = mapped_if_tiled(tmp_path / "a.tif", Execution(tile_size=64))
    assert mg is not None and isinstance(mg.data, np.memmap)
    assert mapped_if_tiled(tmp_path / "a.mrc", Execution(tile_size=64), frame=2).meta.frames == "frame 2"


def test_internal_tiles_of_a_large_untiled_image_change_nothing(grid640, monkeypatch):
    # an untiled image larger than INTERNAL_TILE_ABOVE_PX is computed in tiles whose detection runs in threads; the
    # result must be the one-window result (scaled down here: a 512 px sample, internal tiles of 256 px)
    from tenfold.analysis import columns as C

    img, x, y, _ = grid640
    monkeypatch.setattr(C, "SETTLE_PX", 512)
    monkeypatch.setattr(C, "INTERNAL_TILE_ABOVE_PX", 10**9)
    one, info_one = find_columns(img, n_species=0)
    monkeypatch.setattr(C, "INTERNAL_TILE_ABOVE_PX", 300)
    monkeypatch.setattr(C, "INTERNAL_TILE_PX", 256)
    tiles, info_tiles = find_columns(img, n_species=0)
    assert info_one["tiling"]["windows"] == 1 and info_tiles["tiling"]["windows"] == 9
    assert len(tiles) == len(one) == x.size and info_tiles["notes"] == info_one["notes"]
    d, j = _match(one, tiles)
    assert d.max() < 1e-3 and np.unique(j).size == len(j)
