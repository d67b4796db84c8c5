"""Motifs that say what they are: pentagon species and ring half, flip state, every ring shell, free pentagons only
where no ring explains them; ladder uncertainties and agreement; notes that say why a stage is empty.

Structures from tests/_structures.py (Penrose vertex sets from de Bruijn's pentagrid, N. G. de Bruijn, Indag. Math.
84 (1981) 39-66; ground truth known exactly). tau = (1 + sqrt 5) / 2.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import _structures as S
from tenfold.analysis._stage_notes import structure_notes
from tenfold.analysis.ladder import TAU, fit_ladder, ladder_agreement
from tenfold.analysis.motifs import SHELL_RULE, find_motifs
from tenfold.analysis.tiling import build_network, edge_phase

TOL_PX = 2.0  # centre match radius, px (0.08 nm at 0.04 nm/px)


@pytest.fixture(scope="module")
def decagonal():
    cols, truth = S.decagonal(10.0, angle_deg=10.0, rng=4)
    motifs, info = find_motifs(cols, pixel_size_nm=S.PX_NM)
    return cols, truth, motifs, info


@pytest.fixture(scope="module")
def fivefold():
    cols, truth = S.fivefold(10.0, angle_deg=10.0, rng=5)
    motifs, info = find_motifs(cols, pixel_size_nm=S.PX_NM)
    return cols, truth, motifs, info


def _truth(truth, **sel):
    t = truth["motifs"]
    for k, v in sel.items():
        t = t[t[k] == v]
    return t


def _assert_orientation(err_deg, radius_nm):
    # statistical limit of arg(psi_5)/5 from five members with tangential jitter s at radius R: s / (R sqrt 5) rad
    limit = np.rad2deg(S.JITTER_NM / (radius_nm * np.sqrt(5)))
    assert np.median(np.abs(err_deg)) < 1.0
    assert np.sqrt(np.mean(err_deg ** 2)) <= 1.25 * limit


# --------------------------------------------------------------------------------------------- identity
def test_both_ring_halves_with_species_half_and_flip(decagonal):
    _, truth, motifs, info = decagonal
    pent = motifs[motifs["kind"] == "pentagon"]
    for half, sp in (("brighter", 1), ("dimmer", 0)):
        found = pent[pent["half"] == half]
        assert (found["species"] == sp).all()
        m = S.match_motifs(found, _truth(truth, kind="pentagon", species=sp), TOL_PX)
        assert m["recall"] >= 0.98 and m["precision"] >= 0.98
        _assert_orientation(m["orientation_err_deg"], S.RING_NM)
        assert m["flip_ok"].mean() >= 0.98
    assert info["pentagons"]["in_ring_brighter"] == info["pentagons"]["in_ring_dimmer"]
    # the reference phase is the tiling's edge direction: 10 deg (mod 36) by construction
    assert info["flip_reference"]["phase_deg"] == pytest.approx(10.0, abs=0.5)


def test_rings_carry_mixed_species_minus_one(decagonal):
    _, _, motifs, _ = decagonal
    rings = motifs[motifs["kind"] == "ring10"]
    assert len(rings) and (rings["species"] == -1).all()  # alternating species 0 / 1


def test_halves_do_not_depend_on_the_species_split(decagonal):
    # the classifier merged everything into one class: both halves still come out, told apart by intensity
    cols, truth, _, _ = decagonal
    merged = cols.assign(species=0, intensity=np.where(cols["species"] == 1, 2.0, 1.0))
    motifs, _ = find_motifs(merged, pixel_size_nm=S.PX_NM)
    pent = motifs[motifs["kind"] == "pentagon"]
    bright = pent[pent["half"] == "brighter"]
    assert (pent["species"] == 0).all()
    m = S.match_motifs(bright, _truth(truth, kind="pentagon", species=1), TOL_PX)
    assert m["recall"] >= 0.98 and m["precision"] >= 0.98 and m["flip_ok"].mean() >= 0.98


def test_flip_state_follows_the_given_edge_phase(decagonal):
    cols, _, _, _ = decagonal
    motifs, info = find_motifs(cols, pixel_size_nm=S.PX_NM, edge_phase_deg=10.0 + 36.0)  # same lines, mod 36
    bright = motifs[motifs["half"] == "brighter"]
    assert info["flip_reference"]["source"] == "given"
    assert (bright["flip_state"] == "up").mean() >= 0.98


def test_edge_phase_of_a_penrose_vertex_set():
    # pentagrid edges run along angle + 72 j (de Bruijn 1981): the ten-fold phase is the angle mod 36
    _, truth = S.decagonal(8.0, angle_deg=25.0, rng=2)
    ph, how = edge_phase(truth["centres"])
    assert ph == pytest.approx(25.0, abs=0.3) and "links" in how
    assert edge_phase(truth["centres"][:3])[0] is None


# --------------------------------------------------------------------------------------------- shells
def test_fivefold_reports_both_shells_and_picks_the_bright_one(fivefold):
    _, truth, motifs, info = fivefold
    shells = [s for s in info["shells"] if s["kind"] == "pentagon"]
    radii = sorted(round(s["radius_nm"], 2) for s in shells)
    assert radii == [0.30, 0.48]
    prim = motifs[motifs["primary"] & (motifs["kind"] == "pentagon")]
    assert prim["radius_nm"].median() == pytest.approx(0.48, abs=0.005)
    assert (prim["species"] == 1).all()
    m = S.match_motifs(prim, _truth(truth, kind="pentagon", species=1), TOL_PX)
    assert m["recall"] >= 0.98 and m["precision"] >= 0.98
    _assert_orientation(m["orientation_err_deg"], 0.48)
    assert m["flip_ok"].mean() >= 0.98
    inner = motifs[~motifs["primary"] & (motifs["kind"] == "pentagon")]
    mi = S.match_motifs(inner, _truth(truth, kind="pentagon", species=0), TOL_PX)
    assert mi["recall"] >= 0.98 and (inner["flip_state"] == "down").mean() >= 0.98
    assert "brightest" in info["shell_rule"] and info["shell_rule"] == SHELL_RULE


def test_fivefold_without_species_picks_the_larger_shell(fivefold):
    cols, _, _, _ = fivefold
    motifs, _ = find_motifs(cols.drop(columns="species"), pixel_size_nm=S.PX_NM)
    prim = motifs[motifs["primary"]]
    assert prim["radius_nm"].median() == pytest.approx(0.48, abs=0.005)


def test_network_uses_the_primary_shell_only(fivefold):
    _, truth, motifs, _ = fivefold
    _, _, t_info = build_network(motifs, vertex_kind="pentagon", pixel_size_nm=S.PX_NM)
    assert t_info["n_vertices"] == int(motifs["primary"].sum())
    assert t_info["edge_nm"] == pytest.approx(S.EDGE_NM, rel=0.01)


def test_decagonal_ring_shell_is_primary(decagonal):
    _, truth, motifs, info = decagonal
    rings = motifs[(motifs["kind"] == "ring10") & motifs["primary"]]
    m = S.match_motifs(rings, _truth(truth, kind="ring10"), TOL_PX)
    assert m["recall"] >= 0.98 and m["precision"] >= 0.98
    assert any(s["kind"] == "ring10" and s["primary"] for s in info["shells"])


# --------------------------------------------------------------------------------------------- free pentagons
def _mixed_fivefold():
    cols, truth = S.fivefold(6.0, angle_deg=0.0, rng=6)
    # every outer pentagon gets one column of the other species
    outer = cols.index[: len(truth["centres"]) * 5]
    sp = cols["species"].to_numpy().copy()
    sp[outer[::5]] = 0  # two odd members of five: mixed (one would be a classification slip)
    sp[outer[1::5]] = 0
    return cols.assign(species=sp), truth


def test_mixed_species_free_pentagons_only_when_asked():
    cols, truth = _mixed_fivefold()
    motifs, info = find_motifs(cols, pixel_size_nm=S.PX_NM)
    outer = motifs[(motifs["kind"] == "pentagon") & (motifs["radius_nm"] > 0.4)]
    assert len(outer) == 0 and info["free_pentagons"]["dropped_mixed_species"] >= 0.98 * len(truth["centres"])
    motifs, _ = find_motifs(cols, pixel_size_nm=S.PX_NM, mixed_pentagons=True)
    outer = motifs[(motifs["kind"] == "pentagon") & (motifs["radius_nm"] > 0.4)]
    assert len(outer) >= 0.98 * len(truth["centres"]) and (outer["species"] == -1).all()


def test_free_pentagons_explained_by_rings_are_dropped():
    # ring order 5 at the bright radius: the same five columns are then a ring5 row, not also a free pentagon
    cols, truth = S.fivefold(6.0, rng=7)
    motifs, info = find_motifs(cols, ring_order=5, ring_radius_px=0.48 / S.PX_NM, pixel_size_nm=S.PX_NM)
    assert (motifs["kind"] == "ring5").sum() >= 0.98 * len(truth["centres"])
    free = motifs[motifs["kind"] == "pentagon"]
    assert (free["radius_nm"] < 0.4).all()  # only the inner shell is left as free pentagons
    assert info["free_pentagons"]["dropped_explained_by_rings"] >= 0.98 * len(truth["centres"])


def test_shared_column_rings_and_halves():
    cols, truth = S.shared(12)
    motifs, info = find_motifs(cols, pixel_size_nm=S.PX_NM)
    rings = motifs[motifs["kind"] == "ring10"]
    m = S.match_motifs(rings, _truth(truth, kind="ring10"), TOL_PX)
    assert m["recall"] == 1.0 and m["precision"] == 1.0
    assert (rings["overlaps"] > 0).mean() > 0.9  # neighbouring rings share an edge
    bright = motifs[motifs["half"] == "brighter"]
    mb = S.match_motifs(bright, _truth(truth, kind="pentagon", species=1), TOL_PX)
    assert mb["recall"] == 1.0 and mb["precision"] == 1.0
    assert info["pentagons"]["free"] == 0
    # ring orientation 18 deg from the lattice edges: halfway between 'up' and 'down', so undecided
    assert (bright["flip_state"] == "").all()


@pytest.mark.parametrize("maker", [S.square, S.hexagonal], ids=["square", "hexagonal"])
def test_periodic_controls_have_no_motifs(maker):
    cols, _ = maker()
    motifs, info = find_motifs(cols)
    assert len(motifs) == 0 and info["counts"]["ring10"] == 0


# --------------------------------------------------------------------------------------------- ladder
def test_rung_uncertainty_comes_from_image_blocks(decagonal):
    cols, *_ = decagonal
    lad, pk, info = fit_ladder(cols["x_px"], cols["y_px"], pixel_size_nm=S.PX_NM)
    assert "image blocks" in info["uncertainty"]["method"]
    assert (lad["position_uncertainty_pct"] > 0).all()
    assert np.allclose(lad["expanded_uncertainty_pct"], 2 * lad["position_uncertainty_pct"])
    assert (lad["uncertainty_pct"] >= lad["estimator_spread_pct"] - 1e-12).all()


def test_centre_rungs_within_uncertainty_of_the_penrose_distances():
    # jittered Penrose vertices (0.25 px per axis): rungs d0 tau^n with d0 = the edge (de Bruijn 1981); the measured
    # rungs lie within their expanded (k = 2, about 95 %; JCGM 100:2008) uncertainty for nearly all rungs
    hits, n = 0, 0
    for seed in range(8):
        _, truth = S.decagonal(10.0, angle_deg=3.0 * seed, rng=seed)
        v = truth["centres"] + np.random.default_rng(seed).normal(0.0, 0.25, truth["centres"].shape)
        lad, _, info = fit_ladder(v[:, 0], v[:, 1], point_set="centres")
        exact = S.EDGE_NM / S.PX_NM * TAU ** lad["rung"]
        err = 100 * np.abs(lad["measured_px"] / exact - 1)
        hits += int((err <= lad["expanded_uncertainty_pct"]).sum())
        n += len(lad)
    assert n >= 30 and hits / n >= 0.85


def test_nearest_neighbour_rung_is_unbiased():
    # the ring edge 2 R sin 18 deg is a single distance; with 0.01 nm jitter the g(r) peak sits s^2 / (2 D) low
    # (Rice 1944) and the corrected rung must agree with 2 R sin 18 within its expanded uncertainty
    exact = 2 * S.RING_NM / S.PX_NM * np.sin(np.deg2rad(18.0))
    for seed in range(4):
        cols, _ = S.decagonal(8.0, angle_deg=3.0 * seed, rng=seed)
        lad, _, _ = fit_ladder(cols["x_px"], cols["y_px"], d0_px=exact)
        row = lad[lad["rung"] == 0].iloc[0]
        assert abs(row["measured_px"] / exact - 1) * 100 <= row["expanded_uncertainty_pct"]


def test_unresolved_peak_gets_a_larger_uncertainty():
    # two distances 1.5 % apart, unresolved at this jitter, make one broad peak: its estimator spread is larger
    g = np.random.default_rng(3)
    cols, _ = S.decagonal(8.0, rng=1)
    lad, pk, _ = fit_ladder(cols["x_px"], cols["y_px"])
    narrow = pk.nsmallest(3, "width_px")["position_sd_px"] / pk.nsmallest(3, "width_px")["distance_px"]
    broad = pk[pk["width_px"] > 2.5 * pk["width_px"].min()]
    assert len(broad) and (broad["position_sd_px"] / broad["distance_px"]).min() > narrow.max()
    del g


def test_ladders_of_one_structure_agree(decagonal):
    cols, _, motifs, _ = decagonal
    rings = motifs[(motifs["kind"] == "ring10") & motifs["primary"]]
    lc, pc, _ = fit_ladder(cols["x_px"], cols["y_px"], ladder_r_max_px=90.0)
    lr, pr, _ = fit_ladder(rings["centre_x_px"], rings["centre_y_px"], point_set="centres")
    ag = ladder_agreement(pd.concat([lc, lr]), pd.concat([pc, pr]))
    assert ag["compared"] >= 1 and ag["agree"] and ag["note"] == ""
    assert ladder_agreement(lc, pc)["reason"] == "no centre ladder"


def test_ladder_on_the_fivefold_centres_holds(fivefold):
    # the cluster centres are Penrose vertices: rungs edge / tau, edge, tau edge (de Bruijn 1981)
    _, _, motifs, _ = fivefold
    prim = motifs[motifs["primary"]]
    lad, _, info = fit_ladder(prim["centre_x_px"], prim["centre_y_px"], point_set="centres")
    assert info["holds"]
    assert np.abs(lad["deviation_pct"]).max() < 0.5
    k = np.log(info["d0_px"] / (S.EDGE_NM / S.PX_NM)) / np.log(TAU)  # d0 is the edge times a power of tau
    assert abs(k - round(k)) < 0.02


# --------------------------------------------------------------------------------------------- notes
def test_notes_say_why_the_network_is_empty():
    cols, _ = S.decagonal(1.2, rng=2)  # a handful of clusters
    motifs, m_info = find_motifs(cols, pixel_size_nm=S.PX_NM)
    _, _, t_info = build_network(motifs.iloc[:3], pixel_size_nm=S.PX_NM)
    lad, pk, l_info = fit_ladder(cols["x_px"], cols["y_px"])
    notes = structure_notes(n_columns=len(cols), columns_info={"automatic": {"spacing": {"value_px": 12.0}}},
                            motifs=motifs, motifs_info=m_info, ladder_info={"columns": l_info},
                            tiling_info=t_info, pair_peaks=pk)
    text = " ".join(notes)
    assert "tiling: network empty or tiny" in text and "too few ring centres (3)" in text
    first = pk["distance_px"].min()
    assert f"{100 * (12.0 / first - 1):.0f} % above the first pair-distance peak" in text


def test_no_notes_when_every_stage_is_full(decagonal):
    cols, _, motifs, m_info = decagonal
    _, _, t_info = build_network(motifs, pixel_size_nm=S.PX_NM)
    lad, pk, l_info = fit_ladder(cols["x_px"], cols["y_px"])
    notes = structure_notes(n_columns=len(cols), columns_info={"automatic": {"spacing": {"value_px": 7.0}}},
                            motifs=motifs, motifs_info=m_info, ladder_info={"columns": l_info},
                            tiling_info=t_info, pair_peaks=pk)
    assert notes == []


def test_notes_say_why_motifs_are_empty():
    cols, _ = S.square(30)
    motifs, m_info = find_motifs(cols)
    notes = structure_notes(n_columns=len(cols), columns_info=None, motifs=motifs, motifs_info=m_info,
                            ladder_info={}, tiling_info={"n_vertices": 0, "n_faces": 0,
                                                         "message": "too few ring centres (0)"})
    assert any(n.startswith("motifs: no motifs") for n in notes)


# --------------------------------------------------------------------------------------------- pipeline
def _rerun(cols):
    from tenfold.analysis._image import ImageMeta
    from tenfold.analysis._result import AnalysisResult
    from tenfold.analysis._schema import COLUMNS, empty_table
    from tenfold.analysis.pipeline import Parameters, rerun_from_columns

    base = AnalysisResult(meta=ImageMeta(pixel_size_nm=S.PX_NM), parameters=Parameters(fourier=False).to_dict(),
                          tables={"columns": empty_table(COLUMNS)})
    return rerun_from_columns(base, cols[["x_px", "y_px", "species"]])


def test_pipeline_fivefold_network_on_the_primary_shell():
    cols, truth = S.fivefold(6.0, angle_deg=5.0, rng=8)
    res = _rerun(cols)
    t = res.summary["tiling"]
    assert res.summary["cluster_vertices"] == "pentagon"
    assert t["n_vertices"] == pytest.approx(len(truth["centres"]), rel=0.02)  # one vertex per cluster, not two
    tiles = res.tables["tiles"].set_index("tile")["count"]
    assert tiles["thick_rhombus"] / tiles["thin_rhombus"] == pytest.approx(TAU, rel=0.25)  # small patch
    assert res.summary["ladder"]["centres"]["holds"]
    assert "agreement" in res.summary["ladder"]
    assert not any(n.startswith("tiling:") for n in res.summary["notes"])


def test_pipeline_notes_an_empty_network():
    cols, _ = S.square(25)
    res = _rerun(cols)
    notes = " ".join(res.summary["notes"])
    assert "motifs: no motifs" in notes and "tiling: network empty or tiny" in notes


def test_cli_line_points_at_the_tiling_note():
    from tenfold.analysis.cli import _na_why

    assert _na_why({"notes": ["tiling: network empty or tiny: too few ring centres (0)"]}) == \
        "n/a (see the tiling note below)"
    assert _na_why({"notes": []}) == "n/a"


def test_ladder_holds_with_broader_column_errors():
    # columns measured less precisely (0.014 nm per axis in all, as on a noisy HRTEM-like image): peaks broaden
    # and a weak distance on a strong one's shoulder must not be read as one shifted peak; the decagonal model
    # still wins (Kass & Raftery 1995 scale)
    cols, _ = S.decagonal(10.0, angle_deg=5.0, rng=3)
    g = np.random.default_rng(1)
    x = cols["x_px"].to_numpy() + g.normal(0.0, 0.25, len(cols))
    y = cols["y_px"].to_numpy() + g.normal(0.0, 0.25, len(cols))
    _, pk, info = fit_ladder(x, y)
    assert info["holds"], info["evidence"]["verdict"]
    sq, _ = S.square(60)
    assert not fit_ladder(sq["x_px"] + g.normal(0.0, 0.25, len(sq)), sq["y_px"] + g.normal(0.0, 0.25, len(sq)))[2][
        "holds"]
