"""Reader, writer, sample data and the manifest."""

from __future__ import annotations

from importlib import resources

import numpy as np
import pandas as pd
import pytest

from tenfold.napari_plugin._reader import napari_get_reader
from tenfold.napari_plugin._sample_data import load_sample, sample_names

HIGH_DOSE = "decagonal_haadf_high_dose"


def _truth(name: str) -> dict:
    import json

    return json.loads((resources.files("tenfold.sample_images") / f"{name}_truth.json").read_text())


def test_calibrated_sample_opens_in_nm(sample_path, notes):
    path = str(sample_path(HIGH_DOSE))
    reader = napari_get_reader(path)
    assert callable(reader)
    (data, kwargs, kind), = reader(path)
    px = _truth(HIGH_DOSE)["pixel_size_nm"]  # the generator's recorded calibration, written into the TIFF
    assert kind == "image"
    assert kwargs["scale"] == pytest.approx((px, px))
    assert kwargs["units"] == ("nm", "nm")
    assert kwargs["metadata"]["tenfold_meta"]["pixel_size_nm"] == pytest.approx(px)
    assert kwargs["name"] == HIGH_DOSE
    assert data.shape == tuple(_truth(HIGH_DOSE)["shape"])
    assert notes["warning"] == [] and notes["error"] == []


def test_viewer_scale_bar_reads_nm(make_napari_viewer, sample_path):
    viewer = make_napari_viewer()
    layer, = viewer.open(str(sample_path(HIGH_DOSE)), plugin="tenfold")
    viewer.canvas.overlays.scale_bar.visible = True
    assert [str(u) for u in layer.units] == ["nanometer", "nanometer"]
    assert layer.scale[-1] == pytest.approx(_truth(HIGH_DOSE)["pixel_size_nm"])


def test_uncalibrated_png_opens_in_pixels_with_warning(tmp_path, notes):
    import imageio.v3 as iio

    path = tmp_path / "plain.png"
    iio.imwrite(path, (np.arange(64 * 64).reshape(64, 64) % 251).astype(np.uint8))
    reader = napari_get_reader(str(path))
    (data, kwargs, _), = reader(str(path))
    assert kwargs["scale"] == (1.0, 1.0)
    assert kwargs["name"] == "plain (uncalibrated)"
    assert "units" not in kwargs
    assert len(notes["warning"]) == 1 and "pixel size" in notes["warning"][0]


@pytest.mark.parametrize("name", ["notes.txt", "table.csv", "folder_without_suffix"])
def test_reader_declines_other_files(tmp_path, name):
    path = tmp_path / name
    path.write_text("not an image")
    assert napari_get_reader(str(path)) is None
    assert napari_get_reader([str(path), str(path)]) is None
    assert napari_get_reader(str(tmp_path)) is None


def test_bad_tiff_gives_notification_not_traceback(tmp_path, notes):
    path = tmp_path / "broken.tif"
    path.write_bytes(b"II*\x00 this is not really a TIFF")
    reader = napari_get_reader(str(path))
    assert reader(str(path)) == [(None,)]
    assert len(notes["error"]) == 1 and "broken.tif" in notes["error"][0]


def test_every_bundled_sample_loads():
    names = sample_names()
    assert HIGH_DOSE in names
    for name in names:
        (data, kwargs, _), = load_sample(name)
        assert kwargs["scale"][0] == pytest.approx(_truth(name)["pixel_size_nm"])


def test_manifest_valid_and_matches_package():
    from npe2 import PluginManifest

    from tenfold.analysis.io import supported_suffixes

    path = resources.files("tenfold.napari_plugin") / "napari.yaml"
    manifest = PluginManifest.from_file(str(path))
    manifest.validate_imports()  # every python_name imports and exists
    assert manifest.name == "tenfold"
    patterns = set(manifest.contributions.readers[0].filename_patterns)
    assert patterns == {f"*{s}" for s in supported_suffixes()}
    assert {s.key for s in manifest.contributions.sample_data} == set(sample_names())


def test_npe2_validate_command():
    import subprocess
    import sys

    out = subprocess.run([sys.executable, "-m", "npe2", "validate", "tenfold"], capture_output=True, text=True)
    assert out.returncode == 0, out.stdout + out.stderr
    assert "valid" in out.stdout


def test_writer_round_trip(tmp_path, make_napari_viewer):
    from tenfold.napari_plugin._writer import write_columns, write_motifs

    viewer = make_napari_viewer()
    feats = pd.DataFrame({"id": [3, 7, 9], "species": [0, 1, 1], "intensity": [10.5, 20.25, 30.0]})
    pts = viewer.add_points(np.array([[1.0, 2.0], [3.5, 4.25], [10.0, 0.5]]), features=feats, name="columns")
    data, attrs, _ = pts.as_layer_data_tuple()
    out, = write_columns(str(tmp_path / "cols"), data, attrs)
    back = pd.read_csv(out)
    assert back["id"].tolist() == [3, 7, 9]
    assert back["intensity"].tolist() == [10.5, 20.25, 30.0]
    assert back["x_px"].tolist() == [2.0, 4.25, 0.5] and back["y_px"].tolist() == [1.0, 3.5, 10.0]

    square = np.array([[0.0, 0.0], [0.0, 2.0], [2.0, 2.0], [2.0, 0.0]])
    shp = viewer.add_shapes([square], shape_type="polygon",
                            features=pd.DataFrame({"motif_id": [5], "kind": ["ring10"]}), name="motifs")
    data, attrs, _ = shp.as_layer_data_tuple()
    out, = write_motifs(str(tmp_path / "motifs.csv"), data, attrs)
    back = pd.read_csv(out)
    assert back.loc[0, "motif_id"] == 5 and back.loc[0, "kind"] == "ring10"
    xy = np.array([p.split() for p in back.loc[0, "vertices_px"].split(";")], float)
    np.testing.assert_allclose(xy, square[:, ::-1])


def test_qt_binding_keeps_python_singletons_alive(qapp):
    """Emitting Qt signals from Python must not drain the reference counts of True / None.

    PySide6 6.12 on Python 3.11 drops one reference per emit (immortal singletons only arrived in Python 3.12),
    which aborts the interpreter after enough signals; pyproject.toml therefore pins PySide6 < 6.12. This test
    fails on an affected binding.
    """
    import sys

    from qtpy.QtCore import QObject, Signal

    class Emitter(QObject):
        ping = Signal(float, str)

    e = Emitter()
    got = []
    e.ping.connect(lambda f, m: got.append(f))
    before_true, before_none = sys.getrefcount(True), sys.getrefcount(None)
    for _ in range(20_000):
        e.ping.emit(0.5, "x")
    assert len(got) == 20_000
    if sys.version_info < (3, 12):
        assert sys.getrefcount(True) > before_true - 1000 and sys.getrefcount(None) > before_none - 1000


def test_motif_outlines_are_the_closed_polygons():
    # the vectorised outline segments against a plain loop over each polygon's edges (slow, obvious oracle)
    from tenfold.napari_plugin._layers import _outline_vectors

    rng = np.random.default_rng(0)
    polys = [rng.uniform(0, 100, (n, 2)) for n in (5, 10, 3, 12)]
    vectors, owner = _outline_vectors(polys)
    expect, who = [], []
    for k, p in enumerate(polys):
        for i in range(len(p)):
            a, b = p[i], p[(i + 1) % len(p)]
            expect.append([[a[1], a[0]], [b[1] - a[1], b[0] - a[0]]])  # (row, col) start and displacement
            who.append(k)
    np.testing.assert_allclose(vectors, np.array(expect))
    assert owner.tolist() == who
    assert _outline_vectors([])[0].shape == (0, 2, 2)


def test_species_colours_by_value_not_by_first_appearance():
    import pandas as pd
    from matplotlib.colors import to_rgba

    from tenfold.napari_plugin._layers import SPECIES_PALETTE, UNCLASSIFIED_COLOUR, colour_kwargs

    table = pd.DataFrame({"species": [2, 0, 1, -1, 0]})
    face = colour_kwargs(table, "species")["face_color"]
    for row, sp in zip(face, table["species"]):
        np.testing.assert_allclose(row, to_rgba(SPECIES_PALETTE[sp] if sp >= 0 else UNCLASSIFIED_COLOUR))
