"""Cluster network and tiling: Penrose patches (known tile counts), face oracles, orientation domains, bad input."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

from tenfold.analysis._errors import TenfoldInputError
from tenfold.analysis._pentagrid import pentagrid_tiling
from tenfold.analysis._schema import NETWORK, TILES
from tenfold.analysis.motifs import find_motifs
from tenfold.analysis.tiling import TAU, _classify, build_network, faces, orientation_domains, tiling_figure
from test_motifs import EDGE_NM, PX_NM, decorated_pentagrid


def _as_motifs(xy: np.ndarray, orientation=None) -> pd.DataFrame:
    n = len(xy)
    return pd.DataFrame({"motif_id": np.arange(n) + 100, "kind": "ring10", "order": 10, "centre_x_px": xy[:, 0],
                         "centre_y_px": xy[:, 1], "region": np.zeros(n, np.int64),
                         "orientation_deg": np.zeros(n) if orientation is None else orientation})


@pytest.fixture(scope="module")
def penrose():
    t = pentagrid_tiling(22.0, rng=5).scaled(30.0, centre=(800.0, 800.0), angle_deg=7.0)
    assert len(t.rhombi) >= 2000
    net, tiles, info = build_network(_as_motifs(t.vertices))
    return t, net, tiles, info


def test_penrose_thick_thin_ratio_is_tau(penrose):
    t, net, tiles, info = penrose
    # thick : thin -> tau in a Penrose rhombus tiling (de Bruijn 1981; Penrose 1974)
    assert info["thick_thin_ratio"] == pytest.approx(TAU, rel=0.02)
    # and the faces are exactly the generator's rhombi
    assert info["tile_counts"]["thick_rhombus"] == int(t.thick.sum())
    assert info["tile_counts"]["thin_rhombus"] == int((~t.thick).sum())
    assert info["tile_counts"]["other"] == 0
    assert info["n_edges"] == len(t.edges)
    assert tiles["count"].sum() == len(t.rhombi)
    assert list(tiles.columns[: len(TILES)]) == [f.name for f in TILES]


def test_penrose_edge_choice_is_the_edge_not_the_short_diagonal(penrose):
    _, net, _, info = penrose
    assert info["edge_px"] == pytest.approx(30.0, rel=0.01)
    assert info["edge_source"] == "automatic"
    d = [c["distance_px"] for c in info["edge_choice"]["candidates"]]
    assert any(abs(x - 30.0 / TAU) < 0.5 for x in d)  # the short diagonal was a candidate and was rejected
    assert net["length_px"].to_numpy() == pytest.approx(30.0, rel=1e-9)
    assert list(net.columns[: len(NETWORK)]) == [f.name for f in NETWORK]


def test_penrose_edges_in_ten_directions(penrose):
    _, net, _, info = penrose
    eo = info["edge_orientation"]
    # edges of a Penrose rhombus tiling run along the five star vectors e_j and their opposites (de Bruijn 1981):
    # ten directions 36 deg apart, here rotated by 7 deg
    assert eo["share_within_5deg"] == 1.0
    peaks = np.sort(eo["peak_angles_deg"])
    assert np.allclose(np.diff(peaks), 36.0, atol=1e-6)
    off = np.mod(peaks[0] - 7.0 + 18.0, 36.0) - 18.0
    assert off == pytest.approx(0.0, abs=1e-6)


def test_decorated_rings_to_tiling():
    cols, truth = decorated_pentagrid(14.0, rng=9)
    motifs, _ = find_motifs(cols, pixel_size_nm=PX_NM)
    net, tiles, info = build_network(motifs, pixel_size_nm=PX_NM)
    t = truth["tiling"]
    assert info["edge_nm"] == pytest.approx(EDGE_NM, rel=0.01)
    assert info["tile_counts"]["thick_rhombus"] == pytest.approx(t.thick.sum(), abs=2)
    assert info["tile_counts"]["thin_rhombus"] == pytest.approx((~t.thick).sum(), abs=2)
    assert info["edge_orientation"]["share_within_5deg"] > 0.99
    assert net["length_nm"].to_numpy() == pytest.approx(net["length_px"].to_numpy() * PX_NM)
    dom = info["orientation_domains"]
    assert len(dom) == 1 and dom[0]["fraction"] == 1.0 and dom[0]["orientation_deg"] == pytest.approx(18.0, abs=0.2)


def test_given_edge(penrose):
    t = penrose[0]
    _, _, info = build_network(_as_motifs(t.vertices), tiling_edge_px=30.0)
    assert info["edge_source"] == "given" and info["tile_counts"]["thick_rhombus"] == int(t.thick.sum())


# --------------------------------------------------------------------------------------------- faces oracle
def test_faces_of_a_square_grid():
    n = 6
    i, j = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    xy = np.stack([i.ravel(), j.ravel()], axis=1).astype(float)
    idx = (i * n + j)
    e = np.concatenate([np.stack([idx[:-1].ravel(), idx[1:].ravel()], 1), np.stack([idx[:, :-1].ravel(), idx[:, 1:].ravel()], 1)])
    fc = faces(xy, e)
    inner = fc["interior"]
    # Euler: V - E + F = 2 for a connected planar graph; (n-1)^2 unit squares plus the outer face
    assert fc["n_faces"] == 2 - len(xy) + len(e) == (n - 1) ** 2 + 1
    assert inner.sum() == (n - 1) ** 2 and (fc["sides"][inner] == 4).all()
    assert np.allclose(np.abs(fc["area"][inner]), 1.0)
    assert np.allclose(fc["angles_deg"][np.isin(fc["face"], np.flatnonzero(inner))], 90.0)


def _polygon(angles_turn_deg):
    """Closed polygon with unit edges from its exterior turning angles."""
    h = np.deg2rad(np.cumsum([0.0] + list(angles_turn_deg[:-1])))
    p = np.concatenate([[[0.0, 0.0]], np.cumsum(np.stack([np.cos(h), np.sin(h)], 1), axis=0)[:-1]])
    e = np.stack([np.arange(len(p)), np.roll(np.arange(len(p)), -1)], 1)
    return p, e


@pytest.mark.parametrize("name, turns", [
    ("pentagon", [72] * 5),                                # regular pentagon, interior 108
    ("star", [-72, 144] * 5),                              # pentagram outline: 5 x 36 tips, 5 x 252 reflex
    ("thin_rhombus", [144, 36, 144, 36]),
    ("thick_rhombus", [108, 72, 108, 72]),
    ("hexagon", [108, 36, 36, 108, 36, 36]),              # 72 144 144 72 144 144
])
def test_tile_templates(name, turns):
    xy, e = _polygon(turns)
    fc = faces(xy, e)
    kind = _classify(fc)
    assert list(kind[fc["interior"]]) == [name]


# --------------------------------------------------------------------------------------------- domains
def test_orientation_domains_two_domains():
    g = np.random.default_rng(0)
    a = np.concatenate([g.normal(5.0, 0.5, 300), g.normal(23.0, 0.5, 700)]) % 36
    d = orientation_domains(a, period_deg=36.0)
    assert len(d) == 2
    assert d[0]["fraction"] == pytest.approx(0.7, abs=0.01) and d[0]["orientation_deg"] == pytest.approx(23.0, abs=0.2)
    assert d[1]["fraction"] == pytest.approx(0.3, abs=0.01)
    # wrap-around: a domain at 0 = 36 deg stays one domain
    w = orientation_domains(g.normal(0.0, 0.5, 500) % 36, period_deg=36.0)
    assert len(w) == 1 and w[0]["fraction"] == 1.0
    assert orientation_domains([]) == []


# --------------------------------------------------------------------------------------------- bad input
def _assert_empty(net, tiles, info):
    assert len(net) == 0 and list(net.columns) == [f.name for f in NETWORK]
    assert len(tiles) == 0 and list(tiles.columns) == [f.name for f in TILES]
    assert info["message"]


def test_too_few_and_collinear_centres():
    _assert_empty(*build_network(_as_motifs(np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0]]))))
    x = np.arange(50.0) * 10
    _assert_empty(*build_network(_as_motifs(np.stack([x, 3 * x], 1))))
    _assert_empty(*build_network(_as_motifs(np.zeros((0, 2)))))


def test_edge_that_links_nothing(penrose):
    _assert_empty(*build_network(_as_motifs(penrose[0].vertices), tiling_edge_px=3.0))


@pytest.mark.parametrize("kw", [{"tiling_edge_px": 0.0}, {"tiling_edge_px": -2.0}, {"edge_tolerance": 0.7}])
def test_bad_parameters_raise(kw):
    with pytest.raises(TenfoldInputError):
        build_network(_as_motifs(np.random.default_rng(0).random((10, 2))), **kw)
    with pytest.raises(TenfoldInputError, match="lacks"):
        build_network(pd.DataFrame({"x": [1]}))


# --------------------------------------------------------------------------------------------- figure
def test_tiling_figure(penrose):
    t, net, _, _ = penrose
    res = SimpleNamespace(tables={"network": net, "motifs": _as_motifs(t.vertices)},
                          meta=SimpleNamespace(pixel_size_nm=0.04))
    from matplotlib.figure import Figure

    fig = tiling_figure(res)
    assert isinstance(fig, Figure) and "uncalibrated" not in fig.axes[0].get_title()
    assert tiling_figure(SimpleNamespace(tables={"network": net.iloc[0:0], "motifs": None}, meta=None)) is None


def test_figure_registered():
    from tenfold.analysis import export
    assert export.FIGURES.get("cluster_network") is tiling_figure
