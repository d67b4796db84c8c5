"""Conversions between napari layers and Tenfold records, with no Qt in them.

Layer data are kept in image pixel coordinates (row, col) = (y_px, x_px) and every result layer gets the image
layer's ``scale`` and ``translate``, so results overlay the image in nm and a point's data coordinates are its
pixel position. Anything drawn by the user in another frame is converted through world coordinates.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from tenfold.analysis._image import ImageMeta, Micrograph

__all__ = [
    "META_KEY",
    "VALID_KEY",
    "PALETTE",
    "image_layer_tuple",
    "frame_of",
    "world_to_frame",
    "layer_to_frame",
    "result_layers",
    "micrograph_from_layer",
    "data_to_data",
    "regions_from_shapes",
    "columns_from_points",
    "columns_layer_kwargs",
    "motifs_layer_kwargs",
    "centres_layer_kwargs",
    "network_layer_kwargs",
    "phason_layer_kwargs",
    "motif_polygons",
    "spectrum_layer_kwargs",
]

#: Layer-metadata key of the :class:`ImageMeta` record (as a dict) of an image opened by Tenfold.
META_KEY = "tenfold_meta"
#: Layer-metadata key of the boolean validity mask (False where the file had NaN/inf).
VALID_KEY = "tenfold_valid"

#: Our colour-blind-safe set: hues spaced so that the common red-green deficiencies still separate them,
#: with lightness varied too (chosen for Tenfold; checked by eye in a deuteranopia simulation).
PALETTE = (
    "#2f7fc1",  # blue
    "#f09a36",  # orange
    "#2aa58a",  # teal green
    "#f2d64b",  # yellow
    "#c8553d",  # brick red
    "#a774b8",  # violet
    "#8cc6ea",  # sky
    "#7a7a7a",  # grey
)
#: Motif kinds to colours: rings blue, pentagons orange, other ring orders teal; incomplete ones are dashed by
#: a lighter edge and a transparent face.
KIND_COLOURS = {"ring": PALETTE[0], "pentagon": PALETTE[1], "other": PALETTE[2]}


def _layer_scale(meta: ImageMeta) -> tuple[float, float]:
    s = meta.pixel_size_nm if meta.pixel_size_nm is not None else 1.0
    return (float(s), float(s))


def image_layer_tuple(micrograph: Micrograph, name: str) -> tuple:
    """napari layer-data tuple for a micrograph: scale in nm when calibrated, metadata record attached."""
    meta = micrograph.meta
    kwargs = {
        "name": name if meta.calibrated else f"{name} (uncalibrated)",
        "scale": _layer_scale(meta),
        "metadata": {META_KEY: meta.to_dict(), VALID_KEY: micrograph.valid},
        "colormap": "gray",
    }
    if meta.calibrated:
        kwargs["units"] = ("nm", "nm")
    return (micrograph.data, kwargs, "image")


def micrograph_from_layer(layer, *, pixel_size_nm: float | None = None) -> Micrograph:
    """Build the :class:`Micrograph` the pipeline needs from a napari image layer.

    The calibration comes from the Tenfold metadata record when the layer was opened by Tenfold; otherwise from
    the layer scale only when its units are nm (a bare scale of 1 is napari's default, never a calibration).
    ``pixel_size_nm`` overrides both.
    """
    from tenfold.analysis._errors import TenfoldInputError

    data = np.asarray(layer.data)
    if data.ndim == 3 and data.shape[-1] in (3, 4):
        data = data[..., :3].astype(np.float32) @ np.array([0.2125, 0.7154, 0.0721], np.float32)
    if data.ndim != 2:
        raise TenfoldInputError(
            f"image layer {layer.name!r}: needs a 2-D image, got shape {data.shape}; pick one frame first"
        )
    stored = dict(layer.metadata.get(META_KEY) or {})
    valid = layer.metadata.get(VALID_KEY)
    if pixel_size_nm is not None:
        px, source = float(pixel_size_nm), "user"
    elif stored:
        px, source = stored.get("pixel_size_nm"), stored.get("calibration_source", "none")
    elif tuple(str(u) for u in getattr(layer, "units", ())) [-1:] in (("nanometer",), ("nm",)):
        px, source = float(layer.scale[-1]), "napari-layer"
    else:
        px, source = None, "none"
    meta = ImageMeta(
        path=stored.get("path", ""),
        pixel_size_nm=px,
        calibration_source=source if px is not None else "none",
        original_dtype=stored.get("original_dtype", str(data.dtype)),
        shape=tuple(data.shape),
        frames=stored.get("frames", ""),
        converted_from_rgb=bool(stored.get("converted_from_rgb", False)),
        masked_fraction=float(stored.get("masked_fraction", 0.0)),
        sha256=stored.get("sha256", ""),
        notes=list(stored.get("notes", [])),
    )
    if valid is not None and np.shape(valid) != data.shape:
        valid = None
    return Micrograph(data=np.ascontiguousarray(data, dtype=np.float32), meta=meta, valid=valid)


def _affine_of(layer) -> tuple[np.ndarray, np.ndarray]:
    """(matrix, offset) of the layer's data -> world map, recovered through its public ``data_to_world``."""
    nd = layer.ndim
    origin = np.asarray(layer.data_to_world(np.zeros(nd)), float)
    matrix = np.stack(
        [np.asarray(layer.data_to_world(np.eye(nd)[i]), float) - origin for i in range(nd)], axis=1
    )
    return matrix, origin


def data_to_data(coords: np.ndarray, source, target) -> np.ndarray:
    """Map (N, D) data coordinates of layer ``source`` into data coordinates of layer ``target`` (vectorised)."""
    coords = np.asarray(coords, float).reshape(-1, source.ndim)
    m_s, o_s = _affine_of(source)
    m_t, o_t = _affine_of(target)
    world = coords @ m_s.T + o_s
    return np.linalg.solve(m_t, (world - o_t).T).T


def regions_from_shapes(shapes_layer, image_layer) -> list:
    """One :class:`tenfold.analysis.region.Region` per rectangle, polygon or ellipse of a Shapes layer.

    Vertices are converted into the image's pixel frame (x, y) through world coordinates, so a Shapes layer
    drawn with any scale or translate lands on the right pixels. Lines and paths enclose nothing and are
    refused with a one-line message.
    """
    from tenfold.analysis._errors import TenfoldInputError
    from tenfold.analysis.region import Region

    regions = []
    for i, (verts, kind) in enumerate(zip(shapes_layer.data, shapes_layer.shape_type)):
        if kind not in ("rectangle", "polygon", "ellipse"):
            raise TenfoldInputError(
                f"regions layer {shapes_layer.name!r}: shape {i + 1} is a {kind}; use rectangles, polygons or "
                "ellipses to mark regions"
            )
        rc = data_to_data(np.asarray(verts)[:, -2:], shapes_layer, image_layer)
        regions.append(Region(label=i + 1, kind=kind, vertices_px=rc[:, ::-1].copy()))
    return regions


def columns_from_points(points_layer, frame: dict) -> pd.DataFrame:
    """The (possibly hand-edited) columns of a Points layer as a table with x_px, y_px and the kept features.

    Points the user added have NaN/default features; ``rerun_from_columns`` fills their id and species.
    """
    rc = layer_to_frame(np.asarray(points_layer.data), points_layer, frame)
    table = pd.DataFrame(points_layer.features).reset_index(drop=True).copy()
    if len(table) != len(rc):
        table = pd.DataFrame(index=range(len(rc)))
    table["x_px"] = rc[:, 1]
    table["y_px"] = rc[:, 0]
    if "id" in table:
        ids = pd.to_numeric(table["id"], errors="coerce")
        # napari gives an added point the feature defaults of an existing one, id included: keep the first
        # row of each id and clear everything measured on the others, which rerun_from_columns then fills
        added = ids.duplicated().to_numpy()
        if added.any():
            measured = [c for c in table.columns if c not in ("x_px", "y_px")]
            table[measured] = table[measured].astype(object)
            table.loc[added, measured] = np.nan
        table["id"] = pd.to_numeric(table["id"], errors="coerce")
    return table


def frame_of(image_layer, *, offset_px=(0, 0)) -> dict:
    """The pixel frame results are drawn in: the image layer's scale, translate and units, plus the (row, col)
    offset of the analysed crop inside the image (non-zero for a preview)."""
    scale = np.asarray(image_layer.scale[-2:], float)
    translate = np.asarray(image_layer.translate[-2:], float) + np.asarray(offset_px, float) * scale
    units = tuple(str(u) for u in image_layer.units[-2:])
    return {"scale": tuple(scale), "translate": tuple(translate), "units": units,
            "shape": tuple(image_layer.data.shape[-2:]), "offset_px": tuple(offset_px)}


def world_to_frame(coords_world: np.ndarray, frame: dict) -> np.ndarray:
    """(N, 2) world coordinates to (row, col) pixels of a result frame."""
    return (np.asarray(coords_world, float) - np.asarray(frame["translate"])) / np.asarray(frame["scale"])


def layer_to_frame(coords: np.ndarray, layer, frame: dict) -> np.ndarray:
    """(N, 2) data coordinates of any layer to (row, col) pixels of a result frame, through world space."""
    coords = np.asarray(coords, float).reshape(-1, layer.ndim)
    m, o = _affine_of(layer)
    return world_to_frame((coords @ m.T + o)[:, -2:], frame)


def _frame_kwargs(frame: dict) -> dict:
    return {"scale": frame["scale"], "translate": frame["translate"], "units": frame["units"]}


def columns_layer_kwargs(columns: pd.DataFrame, frame: dict, *, colour_by: str = "species") -> dict:
    """Data and keyword arguments of the 'columns' Points layer (features = the columns table)."""
    data = columns[["y_px", "x_px"]].to_numpy(float) if len(columns) else np.zeros((0, 2))
    kwargs = dict(
        data=data,
        features=columns.reset_index(drop=True),
        size=_point_size(frame),
        symbol="disc",
        border_width=0.0,
        opacity=0.9,
        name="columns",
        **_frame_kwargs(frame),
    )
    kwargs.update(colour_kwargs(columns, colour_by))
    return kwargs


def _point_size(frame: dict) -> float:
    """Marker size in px: 0.6 x the median nearest-neighbour column distance of the result (set by
    :func:`result_layers`), else a few pixels."""
    return float(frame.get("marker_px") or max(3.0, min(frame["shape"]) / 170.0))


def colour_kwargs(table: pd.DataFrame, prop: str) -> dict:
    """face_color arguments colouring points by one feature: categories from PALETTE, numbers on 'viridis'."""
    if prop not in table or len(table) == 0:
        return {"face_color": PALETTE[6]}
    values = table[prop]
    numeric = pd.api.types.is_numeric_dtype(values) and not pd.api.types.is_bool_dtype(values)
    if numeric and (prop != "species" and values.nunique() > len(PALETTE)):
        return {"face_color": prop, "face_colormap": "viridis"}
    cats = sorted(pd.unique(values.astype(str)))
    if prop == "species":
        # the same species colours as the exported figures (tenfold.analysis.export.SPECIES_COLOURS, checked for
        # colour-blind separation there); unclassified (-1) grey
        from matplotlib.colors import to_rgba_array

        from tenfold.analysis.export import SPECIES_COLOURS

        # one explicit colour per point: a colour cycle would be assigned in order of first appearance, so
        # species 0 would not always get the first colour
        table_colours = np.array(list(SPECIES_COLOURS) + [PALETTE[7]])
        sp = values.to_numpy().astype(np.int64)
        idx = np.where(sp >= 0, sp % len(SPECIES_COLOURS), len(SPECIES_COLOURS))
        return {"face_color": to_rgba_array(table_colours[idx])}
    cycle = [PALETTE[i % len(PALETTE)] for i in range(len(cats))]
    return {"face_color": prop, "face_color_cycle": cycle}


def motif_polygons(motifs: pd.DataFrame, columns: pd.DataFrame) -> list[np.ndarray]:
    """Member polygons (row, col) of each motif, vertices in the table's angular order.

    Members missing from ``columns`` (deleted by hand) are skipped; a motif with fewer than 3 left falls back
    to a regular polygon of its radius and orientation, so every motif row keeps exactly one shape.
    """
    pos = pd.DataFrame({"x": columns["x_px"].to_numpy(), "y": columns["y_px"].to_numpy()},
                       index=columns["id"].to_numpy() if "id" in columns else None)
    member_lists = [np.array(str(m).split(), dtype=np.int64) for m in motifs["members"]]
    flat = np.concatenate(member_lists) if member_lists else np.zeros(0, np.int64)
    known = np.isin(flat, pos.index.to_numpy())
    xy = np.full((len(flat), 2), np.nan)
    xy[known] = pos.loc[flat[known], ["y", "x"]].to_numpy()
    bounds = np.cumsum([0] + [len(m) for m in member_lists])
    out = []
    for k, (a, b) in enumerate(zip(bounds[:-1], bounds[1:])):
        verts = xy[a:b]
        verts = verts[np.isfinite(verts[:, 0])]
        if len(verts) < 3:
            row = motifs.iloc[k]
            n = int(row["order"]) if row["order"] > 2 else 10
            ang = np.deg2rad(row["orientation_deg"] if np.isfinite(row["orientation_deg"]) else 0.0)
            t = ang + 2 * np.pi * np.arange(n) / n
            verts = np.c_[row["centre_y_px"] + row["radius_px"] * np.sin(t),
                          row["centre_x_px"] + row["radius_px"] * np.cos(t)]
        out.append(verts)
    return out


def _kind_colours(motifs: pd.DataFrame) -> np.ndarray:
    from matplotlib.colors import to_rgba

    kinds = motifs["kind"].astype(str)
    hexes = np.where(kinds.str.startswith("ring"), KIND_COLOURS["ring"],
                     np.where(kinds == "pentagon", KIND_COLOURS["pentagon"], KIND_COLOURS["other"]))
    rgba = np.array([to_rgba(h) for h in hexes]) if len(hexes) else np.zeros((0, 4))
    return rgba


def motifs_layer_kwargs(motifs: pd.DataFrame, columns: pd.DataFrame, frame: dict) -> dict:
    """Data and keyword arguments of the 'motifs' Shapes layer: rings and pentagons as polygons.

    Edge colour by kind (rings blue, pentagons orange), edge opacity by score; incomplete motifs get a thin
    brick-red edge so vacancies stand out.
    """
    polys = motif_polygons(motifs, columns) if len(motifs) else []
    edge = _kind_colours(motifs)
    if len(motifs):
        score = np.clip(motifs["score"].to_numpy(float), 0, 1)
        edge[:, 3] = 0.45 + 0.55 * np.nan_to_num(score)
        incomplete = ~motifs["complete"].to_numpy(bool)
        from matplotlib.colors import to_rgba

        edge[incomplete] = to_rgba(PALETTE[4])
    face = edge.copy()
    face[:, 3] = 0.08
    width = 0.18 * _point_size(frame)
    return dict(
        data=polys,
        shape_type="polygon",
        features=motifs.reset_index(drop=True),
        edge_color=edge if len(motifs) else "white",
        face_color=face if len(motifs) else "transparent",
        edge_width=width,
        name="motifs",
        **_frame_kwargs(frame),
    )


def centres_layer_kwargs(motifs: pd.DataFrame, frame: dict) -> dict:
    """The 'motif centres' Points layer: a cross per motif, coloured by kind."""
    data = motifs[["centre_y_px", "centre_x_px"]].to_numpy(float) if len(motifs) else np.zeros((0, 2))
    return dict(
        data=data,
        features=motifs[["motif_id", "kind", "complete", "score"]].reset_index(drop=True)
        if len(motifs) else pd.DataFrame(),
        symbol="cross",
        size=1.4 * _point_size(frame),
        face_color=_kind_colours(motifs) if len(motifs) else PALETTE[0],
        border_width=0.0,
        name="motif centres",
        **_frame_kwargs(frame),
    )


def network_layer_kwargs(network: pd.DataFrame, motifs: pd.DataFrame, frame: dict) -> dict:
    """The 'network' Vectors layer: one segment per edge between motif centres (yellow).

    A Vectors layer (start + displacement per edge) draws tens of thousands of segments as one mesh; as Shapes
    lines the same network took seconds to triangulate.
    """
    centres = motifs.set_index("motif_id")[["centre_y_px", "centre_x_px"]] if len(motifs) else None
    if len(network) and centres is not None:
        ok = network["motif_a"].isin(centres.index) & network["motif_b"].isin(centres.index)
        network = network[ok].reset_index(drop=True)
        a = centres.loc[network["motif_a"]].to_numpy()
        b = centres.loc[network["motif_b"]].to_numpy()
        vectors = np.stack([a, b - a], axis=1)
    else:
        vectors, network = np.zeros((0, 2, 2)), network.iloc[0:0]
    return dict(
        data=vectors,
        features=network.reset_index(drop=True),
        edge_color=PALETTE[3],
        edge_width=0.12 * _point_size(frame),
        opacity=0.8,
        name="network",
        vector_style="line",
        **_frame_kwargs(frame),
    )


def phason_layer_kwargs(phason_map: pd.DataFrame, edge_px: float | None, frame: dict) -> dict:
    """The 'phason field' Vectors layer: at every lifted tiling vertex, its residual perpendicular displacement
    (drawn at half an edge length per edge length of displacement), red at phason-flip sites."""
    if len(phason_map):
        start = phason_map[["y_px", "x_px"]].to_numpy(float)
        scale = 0.5 * float(edge_px or 1.0)
        disp = phason_map[["dy_perp", "dx_perp"]].to_numpy(float) * scale
        vectors = np.stack([start, disp], axis=1)
        flip = phason_map["flip"].to_numpy(bool)
        colours = np.where(flip[:, None], np.array([[0.85, 0.15, 0.15, 1.0]]), np.array([[0.2, 0.8, 0.9, 1.0]]))
    else:
        vectors, colours = np.zeros((0, 2, 2)), np.zeros((0, 4))
    return dict(
        data=vectors,
        features=phason_map.reset_index(drop=True),
        edge_color=colours,
        edge_width=0.15 * _point_size(frame),
        name="phason field",
        vector_style="arrow",
        **_frame_kwargs(frame),
    )


def spectrum_layer_kwargs(spectrum: np.ndarray, k_step: float, calibrated: bool) -> dict:
    """The 'power spectrum' image layer: centred, scale in 1/nm (1/px when uncalibrated)."""
    n_rows, n_cols = spectrum.shape
    unit = "1/nm" if calibrated else "1/pixel"
    return dict(
        data=spectrum,
        name="power spectrum",
        scale=(k_step, k_step),
        translate=(-(n_rows // 2) * k_step, -(n_cols // 2) * k_step),
        units=(unit, unit),
        colormap="magma",
        metadata={"k_per_px_step": k_step, "unit": unit},
    )


def result_layers(result, frame: dict, *, columns: bool = True, colour_by: str = "species") -> list:
    """napari layers ('columns', 'motifs', 'motif centres', 'network') for a result, built but not added.

    Building them is the slow part (polygon triangulation), so the widget calls this in its worker thread and
    only inserts the finished layers on the GUI thread. ``columns=False`` leaves the (hand-edited) columns
    layer alone after a re-run from columns.
    """
    from napari.layers import Points, Shapes, Vectors

    from scipy.spatial import cKDTree

    cols = result.tables["columns"]
    motifs = result.tables["motifs"]
    if len(cols) >= 2 and "marker_px" not in frame:
        xy = cols[["x_px", "y_px"]].to_numpy(float)
        d, _ = cKDTree(xy).query(xy, k=2)
        frame = {**frame, "marker_px": max(2.0, 0.6 * float(np.median(d[:, 1])))}
    out = []
    if columns:
        out.append(Points(**columns_layer_kwargs(cols, frame, colour_by=colour_by)))
    out.append(_chunked_shapes(motifs_layer_kwargs(motifs, cols, frame)))
    out.append(Points(**centres_layer_kwargs(motifs, frame)))
    out.append(Vectors(**network_layer_kwargs(result.tables["network"], motifs, frame)))
    phason_map = result.tables.get("phason_map")
    if phason_map is not None and len(phason_map):
        edge = (result.summary.get("tiling") or {}).get("edge_px")
        out.append(Vectors(**phason_layer_kwargs(phason_map, edge, frame)))
    return out


def _chunked_shapes(kwargs: dict, chunk: int = 500):
    """A Shapes layer built ``chunk`` shapes at a time, pausing 1 ms in between.

    napari's Shapes constructor holds the GIL for long stretches on thousands of shapes (the GUI thread then
    stalls although the work runs in a worker); built in chunks with a pause, the longest stall drops from
    ~160 ms to ~30 ms per 6000 polygons (and the build is faster too, see benchmarks/bench_gui.py).
    """
    import time

    from napari.layers import Shapes

    data = kwargs["data"]
    n = len(data)
    if n <= chunk:
        return Shapes(**kwargs)

    def part(value, lo, hi):
        return value[lo:hi] if isinstance(value, np.ndarray) and len(value) == n else value

    colours = {k: kwargs[k] for k in ("edge_color", "face_color") if k in kwargs}
    first = {**kwargs, "data": data[:chunk], "features": kwargs["features"].iloc[:chunk],
             **{k: part(v, 0, chunk) for k, v in colours.items()}}
    layer = Shapes(**first)
    for lo in range(chunk, n, chunk):
        time.sleep(0.001)  # let the GUI thread take the GIL
        hi = min(lo + chunk, n)
        layer.add(data[lo:hi], shape_type=kwargs["shape_type"], edge_width=kwargs["edge_width"],
                  **{k: part(v, lo, hi) for k, v in colours.items()})
    layer.features = kwargs["features"]
    return layer
