"""find_columns end to end on synthetic images with known columns (matched by KD-tree)."""

import warnings

import numpy as np
import pytest
from scipy.spatial import cKDTree

from tenfold.analysis import _schema
from tenfold.analysis._errors import TenfoldInputError, TenfoldWarning
from tenfold.analysis.columns import find_columns
from tenfold.analysis.region import Region
from tenfold.analysis.synthetic import (AL_LATTICE_NM, counts_from_z, decagonal_model, fcc_al_001_columns,
                                        make_sample, render_image, SPECIES_Z_EFF)

PX, SIGMA = 0.04, 0.06


def _deca(brightest, bg, size=512, seed=7, **kw):
    m = decagonal_model(width_nm=size * PX, height_nm=size * PX, angle_deg=7.0, rng=seed)
    counts = counts_from_z(SPECIES_Z_EFF, brightest_counts=brightest)
    return make_sample(m, pixel_size_nm=PX, sigma_nm=SIGMA, counts_by_species=counts, background=bg, rng=seed,
                       **kw)


def _match(cols, truth, r):
    t = np.c_[truth.columns["x_px"], truth.columns["y_px"]]
    d, i = cKDTree(t).query(np.c_[cols["x_px"], cols["y_px"]])
    ok = d < r
    return ok.mean(), np.unique(i[ok]).size / len(t), i, ok


def test_high_dose_decagonal_recall_precision_species():
    img, truth = _deca(8000.0, 40.0)
    before = img.copy()
    cols, info = find_columns(img, pixel_size_nm=PX)
    np.testing.assert_array_equal(img, before)
    assert list(cols.columns[:len(_schema.COLUMNS)]) == [f.name for f in _schema.COLUMNS]
    # matching radius 0.5 x the minimum ring spacing 2 r sin 18 deg = 0.278 nm
    prec, rec, i, ok = _match(cols, truth, 0.5 * 0.278 / PX)
    assert prec >= 0.995 and rec >= 0.995
    assert info["species"]["n_species"] == 3
    assert (cols["species"].to_numpy()[ok] == truth.columns["species"].to_numpy()[i[ok]]).mean() > 0.99
    np.testing.assert_allclose(cols["x_nm"], cols["x_px"] * PX)
    assert info["calibrated"] is True


def test_low_dose_decagonal_recall_precision():
    img, truth = _deca(600.0, 4.0)
    cols, _ = find_columns(img, pixel_size_nm=PX)
    prec, rec, _, _ = _match(cols, truth, 0.5 * 0.278 / PX)
    assert prec >= 0.98 and rec >= 0.98


def test_fcc_al_001_nearest_neighbour_spacing():
    ps = 0.02
    c = fcc_al_001_columns(a_nm=AL_LATTICE_NM, width_nm=6, height_nm=6)
    img = render_image(c["x_nm"] / ps + 6, c["y_nm"] / ps + 6, 4000.0, shape=(312, 312), sigma_px=2.0,
                       background=30.0, rng=2)
    cols, info = find_columns(img, pixel_size_nm=ps, n_species=0)
    xy = cols[["x_nm", "y_nm"]].to_numpy()
    # The spacing is the first peak of the pair distances: the mean over every first-shell pair. (The median of
    # each column's *minimum* distance would be biased low by the position noise: a minimum of four noisy values.)
    tree = cKDTree(xy)
    pairs = tree.query_pairs(0.6 * AL_LATTICE_NM, output_type="ndarray")
    d = np.linalg.norm(xy[pairs[:, 0]] - xy[pairs[:, 1]], axis=1)
    # projected fcc [001] column spacing a/2; Al a = 0.40495 nm at room temperature (handbook value from memory,
    # e.g. CRC Handbook / Wyckoff; see synthetic.AL_LATTICE_NM)
    assert d.mean() == pytest.approx(AL_LATTICE_NM / 2, rel=1e-3)
    assert info["automatic"]["spacing"]["value_px"] * ps == pytest.approx(AL_LATTICE_NM / 2, rel=0.05)
    assert len(cols) == len(c)


def _square(dark=False, bg=20.0, counts=3000.0, n=24, a=10.0):
    g = np.arange(n) * a + 10
    x, y = np.meshgrid(g, g)
    shape = (int(n * a + 20),) * 2
    img = render_image(x.ravel(), y.ravel(), counts, shape=shape, sigma_px=1.6, background=bg, rng=3,
                       dark_columns=dark)
    return img, np.c_[x.ravel(), y.ravel()]


def test_dark_columns_and_polarity_warning():
    img, xy = _square(dark=True, bg=1500.0, counts=20000.0)
    cols, info = find_columns(img, dark_columns=True, n_species=0)
    d, _ = cKDTree(xy).query(cols[["x_px", "y_px"]].to_numpy())
    assert len(cols) == len(xy) and d.max() < 0.5
    assert np.isnan(cols["x_nm"]).all() and info["calibrated"] is False
    with pytest.warns(TenfoldWarning, match="dark_columns"):
        find_columns(img, dark_columns=False, n_species=0)


def _tilted():
    img, xy = _square(bg=0.0, counts=3000.0)
    yy, xx = np.mgrid[0:img.shape[0], 0:img.shape[1]]
    tilted = np.random.default_rng(4).poisson(
        render_image(xy[:, 0], xy[:, 1], 3000.0, shape=img.shape, sigma_px=1.6, background=0.0, noise=False)
        + 5.0 + 1.5 * xx).astype(np.float32)
    return tilted, xy


@pytest.mark.xfail(strict=True, reason="known: the gap-level background of a crowded image reads about 1.5 counts low "
                   "in the empty 20 px border strip of this flattened, strongly tilted image, so one noise maximum in "
                   "its corner passes the cut (z 4.97 for 4.81); docs/columns.md, round three")
def test_flatten_tilted_illumination():
    tilted, xy = _tilted()
    cols, _ = find_columns(tilted, flatten=True, n_species=0)
    d, _ = cKDTree(xy).query(cols[["x_px", "y_px"]].to_numpy())
    assert len(cols) == len(xy) and d.max() < 0.5


def test_tilted_illumination_mask_and_regions():
    tilted, xy = _tilted()
    # NaN block: no column inside or touching it
    masked = tilted.copy()
    masked[50:120, 60:130] = np.nan
    cols, _ = find_columns(masked, n_species=0)
    x, y = cols["x_px"].to_numpy(), cols["y_px"].to_numpy()
    assert not np.any((x > 60 - 3.7) & (x < 129 + 3.7) & (y > 50 - 3.7) & (y < 119 + 3.7))
    assert len(cols) > 0.7 * len(xy)
    regs = [Region(1, "rectangle", np.array([[0, 0], [105, 105]])), Region(2, "ellipse", np.array([[150, 150],
                                                                                                   [240, 240]]))]
    cols, info = find_columns(tilted, regions=regs, n_species=0)
    inside1 = (xy[:, 0] <= 105) & (xy[:, 1] <= 105)
    c = xy - 195.0
    inside2 = (c[:, 0] ** 2 + c[:, 1] ** 2) <= 45.0**2
    assert (cols["region"] == 1).sum() == inside1.sum() and (cols["region"] == 2).sum() == inside2.sum()


def test_edge_case_battery():
    with pytest.raises(TenfoldInputError):
        find_columns(np.full((64, 64), 3.0))
    with pytest.raises(TenfoldInputError):
        find_columns(np.zeros((3, 3)))
    with pytest.raises(TenfoldInputError):
        find_columns(np.zeros((64, 64, 3)))
    img, xy = _square()
    with pytest.raises(TenfoldInputError, match="pixel"):
        find_columns(img, column_spacing_nm=0.2)
    # everything filtered out: a huge min_mass gives an empty, schema-conform table, not an error
    cols, info = find_columns(img, min_mass=1e12, n_species=0)
    assert len(cols) == 0 and list(cols.columns[:len(_schema.COLUMNS)]) == [f.name for f in _schema.COLUMNS]
    assert "no columns survived the filters" in info["notes"]
    # tiny image with given scale; columns on the border are not reported as fits
    tiny = img[:30, :30]
    cols, _ = find_columns(tiny, pixel_size_nm=0.02, column_spacing_nm=0.2, column_diameter_nm=0.144, n_species=0)
    assert 4 <= len(cols) <= 9 and (cols["fit_status"] == "ok").all()


def test_bundled_dark_sample_recall_precision():
    import pandas as pd
    import tifffile
    from importlib.resources import files

    base = files("tenfold.sample_images")
    img = tifffile.imread(str(base / "decagonal_hrtem_dark.tif"))
    truth = pd.read_csv(str(base / "decagonal_hrtem_dark_columns.csv"))
    cols, info = find_columns(img, pixel_size_nm=PX, dark_columns=True, n_species=0)
    t = np.c_[truth["x_px"], truth["y_px"]]
    d, i = cKDTree(t).query(np.c_[cols["x_px"], cols["y_px"]])
    ok = d < 0.5 * 0.278 / PX  # half the minimum ring spacing 2 r sin 18 deg (r = 0.45 nm)
    assert ok.mean() >= 0.98 and np.unique(i[ok]).size / len(t) >= 0.98


@pytest.mark.parametrize("probe, widened", [("gaussian", False), ("core_tail", True)], ids=["gaussian", "core-tail"])
def test_errors_widened_only_where_the_model_misfits(probe, widened, monkeypatch):
    # A Gaussian column model describes Gaussian columns: Pearson chi2/dof ~ 1, errors untouched. A probe with 30 %
    # of its current in a wide tail is not a Gaussian: chi2/dof of the fits stands significantly above 1 and the
    # errors are scaled by its square root (reduced chi-square scaling; Bevington & Robinson 2003, from memory).
    # The learned core + tail profile is switched off here (no tail is ever significant): the Gaussian misfits.
    from tenfold.analysis import refine
    from tenfold.analysis import synthetic as S

    monkeypatch.setattr(refine, "TAIL_MIN_FRACTION", 1.0)

    cond = S.StressCondition(structure="decagonal", size_px=384, probe=probe)
    img, truth, params = S.stress_sample(cond, rng=5)
    cols, info = find_columns(img, pixel_size_nm=params["pixel_size_nm"], n_species=0)
    rec = info["automatic"]["misfit"]["species"]["-1"]
    assert (rec["error_factor"] > 1.0) == widened
    if widened:
        assert rec["error_factor"] == pytest.approx(rec["chi2_per_dof_median"] ** 0.5)
        assert any("misfits its columns" in n for n in info["notes"])
    else:
        assert abs(rec["chi2_per_dof_median"] - 1.0) < 0.05


def test_tail_profile_is_what_the_gaussian_leaves_out(monkeypatch):
    # Known answers: Gaussian columns leave nothing beyond their fitted Gaussians; a probe with 30 % of its current in
    # a tail 3 and 8 core widths wide (the stress generator's core-tail probe) leaves a clear tail, which the
    # significance test of a candidate then subtracts with the neighbour's Gaussian. The columns are 20 widths
    # apart: a tail that fills the space between columns is indistinguishable from background. The learned core +
    # tail profile is switched off (no tail is ever significant): this is what a Gaussian model leaves.
    from tenfold.analysis import refine
    from tenfold.analysis import synthetic as S

    monkeypatch.setattr(refine, "TAIL_MIN_FRACTION", 1.0)

    tails = {}
    for probe in ("gaussian", "core_tail"):
        cond = S.StressCondition(structure="square", size_px=512, sigma_over_spacing=0.05, probe=probe,
                                 peak_counts=2000.0)
        img, truth, params = S.stress_sample(cond, rng=2)
        cols, info = find_columns(img, pixel_size_nm=params["pixel_size_nm"], n_species=0)
        prof = info["automatic"]["tail_profile"]
        r, extra = np.asarray(prof["r_px"]), np.asarray(prof["extra_per_peak"])
        sigma = params["sigma_px"]
        tails[probe] = float(extra[(r >= 1.5 * sigma) & (r <= 3.0 * sigma)].max())
    assert tails["gaussian"] < 0.003
    assert tails["core_tail"] > 0.01
