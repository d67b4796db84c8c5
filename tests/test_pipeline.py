"""The orchestrator: parameters, hand correction, cancellation."""

import copy

import numpy as np
import pandas as pd
import pytest

from tenfold.analysis import Cancelled, TenfoldInputError
from tenfold.analysis.io import read_micrograph
from tenfold.analysis.pipeline import Parameters, rerun_from_columns, run_pipeline
from pathlib import Path

SAMPLE = Path(__file__).resolve().parents[1] / "sample_images" / "decagonal_haadf_high_dose.tif"


@pytest.fixture(scope="module")
def small():
    mg = read_micrograph(SAMPLE)
    from tenfold.analysis.io import micrograph_from_array

    return micrograph_from_array(mg.data[:400, :400].copy(), pixel_size_nm=mg.meta.pixel_size_nm, name="crop")


@pytest.fixture(scope="module")
def result(small):
    return run_pipeline(small, Parameters(fourier=True))


@pytest.mark.parametrize(
    "kw, word",
    [({"column_diameter_nm": -1.0}, "column_diameter_nm"), ({"ring_order": 7}, "ring_order"),
     ({"n_species": 12}, "n_species"), ({"radius_tolerance": 0.9}, "radius_tolerance")],
)
def test_bad_parameters_name_themselves(kw, word):
    with pytest.raises(TenfoldInputError, match=word):
        Parameters(**kw).validate()
    with pytest.raises(TenfoldInputError, match="unknown parameter"):
        Parameters.from_dict({"ring_size": 3})


def test_result_tables_and_summary(result):
    assert set(result.tables) >= {"columns", "motifs", "ladder", "pair_peaks", "tiles", "network", "spots"}
    # ground truth of the bundled sample, restricted to the 400 x 400 px crop
    truth = pd.read_csv(SAMPLE.with_name("decagonal_haadf_high_dose_columns.csv"))
    inside = truth["x_px"].between(-0.5, 399.5) & truth["y_px"].between(-0.5, 399.5)
    assert result.summary["n_columns"] == len(result.tables["columns"])
    assert len(result.tables["columns"]) == pytest.approx(int(inside.sum()), rel=0.02)
    rings_t = pd.read_csv(SAMPLE.with_name("decagonal_haadf_high_dose_motifs.csv")).query("kind == 'ring10'")
    r = rings_t["radius_px"] + 3.0
    whole = (rings_t["centre_x_px"] - r >= 0) & (rings_t["centre_x_px"] + r < 400) & \
            (rings_t["centre_y_px"] - r >= 0) & (rings_t["centre_y_px"] + r < 400)
    rings = result.tables["motifs"].query("kind == 'ring10'")
    assert len(rings) >= 0.98 * int(whole.sum())
    # a decagonal pattern seen down its ten-fold axis gives ten-fold Fourier spot stars (Bendersky 1985)
    assert result.summary["fourier"]["rotational_order"] == 10


def test_deleting_a_ring_member_makes_the_ring_incomplete(result):
    motifs = result.tables["motifs"]
    ring = motifs[(motifs["kind"] == "ring10") & motifs["complete"]].iloc[0]
    victim = int(ring["members"].split()[0])
    cols = result.tables["columns"]
    edited = cols[cols["id"] != victim]
    new = rerun_from_columns(result, edited)
    m = new.tables["motifs"]
    rings = m[m["kind"] == "ring10"]
    d = np.hypot(rings["centre_x_px"] - ring["centre_x_px"], rings["centre_y_px"] - ring["centre_y_px"])
    same = rings[d < 1.0]
    assert len(same) == 1
    assert not bool(same["complete"].iloc[0]) and int(same["n_members"].iloc[0]) == 9
    assert str(victim) not in same["members"].iloc[0].split()
    assert new.summary["columns"]["hand_edited"]["removed"] == 1
    # the unedited run is untouched
    assert victim in set(result.tables["columns"]["id"])


def test_added_point_gets_a_fresh_id(result):
    cols = result.tables["columns"][["id", "x_px", "y_px"]].copy()
    extra = pd.DataFrame({"x_px": [10.0], "y_px": [10.0]})
    new = rerun_from_columns(result, pd.concat([cols, extra], ignore_index=True))
    c = new.tables["columns"]
    assert c["id"].is_unique
    assert (c["fit_status"] == "manual").sum() == 1
    assert new.summary["columns"]["hand_edited"]["added"] == 1


def test_cancel_stops_the_run(small):
    calls = []

    def progress(f, msg):
        calls.append(f)
        return False if f > 0.3 else None

    with pytest.raises(Cancelled):
        run_pipeline(small, progress=progress)
    assert calls and max(calls) <= 1.0


def test_progress_is_monotone_and_reaches_one(small):
    seen = []
    run_pipeline(small, Parameters(fourier=False), progress=lambda f, m: seen.append(f))
    assert seen[-1] == pytest.approx(1.0)
    assert all(b >= a - 1e-9 for a, b in zip(seen, seen[1:]))


def test_stage_done_sees_final_columns_and_ladder_tables(small):
    """What ``stage_done`` is shown after 'columns' and 'ladder' is what the run returns (the command line draws
    those figures early), and a cropped region run, whose tables are shifted at the end, shows nothing."""
    seen = {}

    def snapshot(stage, res):
        keys = {"columns": ("columns",), "ladder": ("ladder", "pair_peaks"), "tiling": ("motifs", "network", "tiles"),
                "phason": ("phason_map",), "fourier": ("spots", "columns")}[stage]
        summary = {"phason": res.summary.get("phason", {}).get("real_space"), "fourier": res.summary.get("fourier")}
        seen[stage] = ({k: res.tables[k].copy() for k in keys}, dict(res.curves), res.image,
                       copy.deepcopy(summary[stage] if stage in summary else None))

    final = run_pipeline(small, Parameters(fourier=True, correct_distortion=True), stage_done=snapshot)
    assert list(seen) == ["columns", "ladder", "tiling", "phason", "fourier"]
    for tables, curves, image, _ in seen.values():
        for name, table in tables.items():
            pd.testing.assert_frame_equal(table, final.tables[name])
        assert image is final.image
    assert set(seen["ladder"][1]) == {k for k in final.curves if k.startswith("pair_distribution")}
    assert seen["phason"][3] == final.summary["phason"]["real_space"]
    assert seen["fourier"][3] == final.summary["fourier"]
    from tenfold.analysis.region import Region

    seen.clear()
    box = [Region(1, "rectangle", np.array([[100.0, 100.0], [200.0, 200.0]]))]
    run_pipeline(small, Parameters(fourier=False), regions=box, stage_done=snapshot)
    assert seen == {}


def test_regions_of_a_large_image_are_analysed_in_their_box_and_shifted_back():
    from tenfold.analysis.region import Region

    mg = read_micrograph(SAMPLE)
    reg = [Region(1, "rectangle", np.array([[600.0, 500.0], [900.0, 800.0]]))]
    res = run_pipeline(mg, Parameters(fourier=False), regions=reg)
    cols = res.tables["columns"]
    truth = pd.read_csv(SAMPLE.with_name("decagonal_haadf_high_dose_columns.csv"))
    inside = truth["x_px"].between(600, 900) & truth["y_px"].between(500, 800)
    assert len(cols) == pytest.approx(int(inside.sum()), abs=3)
    # positions are whole-image pixels: they match the ground truth of the full image
    from scipy.spatial import cKDTree

    d, _ = cKDTree(truth[["x_px", "y_px"]].to_numpy()).query(cols[["x_px", "y_px"]].to_numpy())
    assert np.percentile(d, 99) < 0.5
    np.testing.assert_allclose(cols["x_nm"], cols["x_px"] * mg.meta.pixel_size_nm)
    assert res.summary["analysed_box_px"]["row0"] == 500 - 24
    assert list(res.meta.shape) == list(mg.data.shape) and res.image.shape == mg.data.shape


def test_pentagonal_clusters_without_rings_make_the_network():
    # five-fold view: only free-standing regular pentagons on the vertices of a Penrose tiling (de Bruijn 1981);
    # the clusters are then the pentagons, and the tiling of their centres is a rhombus tiling again
    from tenfold.analysis._image import ImageMeta
    from tenfold.analysis._pentagrid import pentagrid_tiling
    from tenfold.analysis._result import AnalysisResult
    from tenfold.analysis._schema import COLUMNS, empty_table

    g = np.random.default_rng(7)
    t = pentagrid_tiling(8.0, rng=g).scaled(2.0 / 0.04)
    v = t.vertices - t.vertices.min(axis=0) + 40.0
    a = np.deg2rad(10.0 + 72.0 * np.arange(5))
    pts = (v[:, None, :] + 8.75 * np.stack([np.cos(a), np.sin(a)], axis=-1)[None]).reshape(-1, 2)
    pts = pts + g.normal(0.0, 0.25, pts.shape)
    cols = pd.DataFrame({"x_px": pts[:, 0], "y_px": pts[:, 1]})
    base = AnalysisResult(meta=ImageMeta(pixel_size_nm=0.04), parameters=Parameters(fourier=False).to_dict(),
                          tables={"columns": empty_table(COLUMNS)})
    new = rerun_from_columns(base, cols)
    assert new.summary["cluster_vertices"] == "pentagon"
    assert (new.tables["motifs"]["kind"] == "pentagon").sum() >= 0.98 * len(v)
    tiles = new.tables["tiles"].set_index("tile")["count"]
    assert tiles.get("thick_rhombus", 0) > 0 and tiles.get("thin_rhombus", 0) > 0
    assert new.summary["tiling"]["edge_nm"] == pytest.approx(2.0, rel=0.01)


@pytest.fixture(scope="module")
def region_run():
    """A rectangle of 400 x 400 px well inside the 1024 px sample: the pipeline analyses its box (with a margin)."""
    from tenfold.analysis.region import Region

    mg = read_micrograph(SAMPLE)
    reg = [Region(1, "rectangle", np.array([[300.0, 300.0], [700.0, 300.0], [700.0, 700.0], [300.0, 700.0]]))]
    return mg, reg, run_pipeline(mg, Parameters(fourier=False), regions=reg)


def test_region_run_puts_the_phason_map_in_image_pixels(region_run):
    # the phason map's vertices are the cluster centres: in whole-image pixels they are the ground-truth centres
    # of the full sample (generator truth), never the same centres shifted by the analysed box's corner
    from scipy.spatial import cKDTree

    _, _, res = region_run
    pm = res.tables["phason_map"]
    assert len(pm) >= 10
    assert res.summary["analysed_box_px"]["col0"] == 300 - 24
    truth = pd.read_csv(SAMPLE.with_name("decagonal_haadf_high_dose_centres.csv"))
    d, _ = cKDTree(truth[["x_px", "y_px"]].to_numpy()).query(pm[["x_px", "y_px"]].to_numpy())
    assert np.percentile(d, 95) < 1.0
    assert pm["x_px"].between(290, 710).all() and pm["y_px"].between(290, 710).all()
    np.testing.assert_allclose(pm["x_nm"], pm["x_px"] * res.meta.pixel_size_nm)


def test_rerun_from_columns_keeps_the_phason_map_and_the_analysed_box(region_run):
    mg, reg, res = region_run
    new = rerun_from_columns(res, res.tables["columns"], regions=reg)
    assert new.summary["analysed_box_px"] == res.summary["analysed_box_px"]
    pm_old, pm_new = res.tables["phason_map"], new.tables["phason_map"]
    assert len(pm_new) == len(pm_old)
    np.testing.assert_allclose(np.sort(pm_new["x_px"].to_numpy()), np.sort(pm_old["x_px"].to_numpy()), atol=1e-6)
    assert new.summary["phason"]["real_space"]["ok"]


def test_a_column_added_by_hand_is_fitted_and_kept(result):
    # delete a detected column and place it again by eye, a pixel off: the re-run fits it like a detected one and
    # it lands on the generator's true position (the sample's ground truth), with a width and an intensity
    from scipy.spatial import cKDTree

    cols = result.tables["columns"]
    fitted = cols[cols["fit_status"].isin(["ok", "fixed_width"])]
    truth = pd.read_csv(SAMPLE.with_name("decagonal_haadf_high_dose_columns.csv"))
    picks = fitted.iloc[[len(fitted) // 3, len(fitted) // 2, 2 * len(fitted) // 3]]
    kept = cols[~cols["id"].isin(picks["id"])][["id", "x_px", "y_px"]]
    placed = pd.DataFrame({"x_px": picks["x_px"].to_numpy() + 0.8, "y_px": picks["y_px"].to_numpy() - 0.6})
    new = rerun_from_columns(result, pd.concat([kept, placed], ignore_index=True))
    c = new.tables["columns"]
    added = c[c["fit_status"] == "added"]
    assert len(added) == 3 and new.summary["columns"]["hand_edited"]["added_fitted"] == 3
    assert added[["sigma_px", "intensity", "pos_err_px"]].notna().all().all()
    d, _ = cKDTree(truth[["x_px", "y_px"]].to_numpy()).query(added[["x_px", "y_px"]].to_numpy())
    assert d.max() < 0.3
    np.testing.assert_allclose(np.sort(added["intensity"]), np.sort(picks["intensity"]), rtol=0.2)
