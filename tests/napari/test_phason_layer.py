"""The phason controls of the analysis dock and the 'phason field' layer."""

from __future__ import annotations

import numpy as np
import pandas as pd

from tenfold.analysis._pentagrid import pentagrid_tiling
from tenfold.analysis.phason import phason_from_network
from tenfold.napari_plugin._layers import phason_layer_kwargs
from tenfold.napari_plugin._widget import PipelineWidget


def test_checkboxes_reach_the_parameters(make_napari_viewer):
    widget = PipelineWidget(make_napari_viewer())
    p = widget.parameters()
    assert not p.correct_distortion and p.phason
    widget.correct_distortion.setChecked(True)
    widget.phason.setChecked(False)
    p = widget.parameters()
    assert p.correct_distortion and not p.phason


def test_phason_layer_draws_one_arrow_per_vertex_flips_in_red(make_napari_viewer):
    from napari.layers import Vectors

    t = pentagrid_tiling(6.0, rng=1).scaled(40.0)
    net = pd.DataFrame({"motif_a": t.edges[:, 0], "motif_b": t.edges[:, 1]})
    mot = pd.DataFrame({"motif_id": np.arange(len(t.vertices)), "centre_x_px": t.vertices[:, 0],
                        "centre_y_px": t.vertices[:, 1]})
    tab, _ = phason_from_network(net, mot, n_boot=5)
    tab.loc[0, "flip"] = True
    layer = Vectors(**phason_layer_kwargs(tab, 40.0, {"scale": (1.0, 1.0), "translate": (0.0, 0.0), "units": ("px", "px"), "marker_px": 6.0}))
    assert layer.name == "phason field" and len(layer.data) == len(tab)
    # start at the vertex (row, col); displacement half an edge per edge length of perpendicular displacement
    np.testing.assert_allclose(layer.data[:, 0], tab[["y_px", "x_px"]].to_numpy())
    np.testing.assert_allclose(layer.data[:, 1], tab[["dy_perp", "dx_perp"]].to_numpy() * 20.0)
    assert layer.edge_color[0][0] > 0.8 and layer.edge_color[1][0] < 0.3
    make_napari_viewer().add_layer(layer)
