"""Conversions between napari layers and Tenfold records, with no Qt in them.

Layer data are kept in image pixel coordinates (row, col) = (y_px, x_px) and every result layer gets the image
layer's ``scale`` and ``translate``, so results overlay the image in nm and a point's data coordinates are its
pixel position. Anything drawn by the user in another frame is converted through world coordinates.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from tenfold.analysis._image import ImageMeta, Micrograph
from tenfold.analysis.export import SPECIES_COLOURS

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
    "SPECIES_PALETTE",
    "species_colours",
    "added_row_values",
    "fit_added",
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
#: Species colours in the viewer and the plots dock, dimmest class first: the colour-universal-design set of
#: Okabe & Ito (2008, "Color Universal Design", J*FLY) without its black and yellow, which vanish on the dark
#: background and on bright columns. Relative luminance 0.15-0.42 keeps every colour at a WCAG contrast of at
#: least 2:1 against both black and white; tests/napari/test_bugs.py checks that and the separation under
#: simulated protan, deutan and tritan vision.
SPECIES_PALETTE = SPECIES_COLOURS  # one palette for the viewer and the exported figures (analysis/export.py)
#: Marker symbol per species (so colour is never the only cue; the 7th and 8th species reuse colours).
SPECIES_SYMBOLS = ("disc", "square", "triangle_up", "diamond", "triangle_down", "star", "clobber", "cross")
#: Unclassified (-1) and hand-added columns: mid grey, visible on black and white alike.
UNCLASSIFIED_COLOUR = "#8c8c8c"
#: Dark outline of every column marker, so light markers stay visible on bright columns.
BORDER_COLOUR = "#141414"
#: Numeric features are coloured on this part of matplotlib's 'viridis' (its darkest and lightest ends vanish on a
#: HAADF background).
NUMERIC_RANGE = (0.15, 0.92)
#: Motif kinds to colours, apart from the species colours of the column markers: rings white, pentagons yellow
#: (Okabe & Ito 2008), other ring orders cyan; incomplete motifs magenta (cyan and magenta from Paul Tol's
#: "vibrant" set, 2021, SRON/EPS/TN/09-002); the network cyan too, thinner.
KIND_COLOURS = {"ring": "#f5f5f5", "pentagon": "#F0E442", "other": "#33BBEE", "incomplete": "#EE3377"}
NETWORK_COLOUR = "#33BBEE"


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


def fit_added(result, columns: pd.DataFrame, *, dark_columns: bool = False) -> pd.DataFrame:
    """Fit the hand-added columns (``fit_status`` 'added') of an edited table on the result's image.

    Each gets the same pixel-integrated Gaussian fit as detected columns (``refine.refine_columns``, started at
    the run's median column width); where the fit converges its position, width, intensity and uncertainty are
    filled in, elsewhere (e.g. a point on empty background) they stay NaN. The status stays 'added', species -1.
    """
    if "fit_status" not in columns or result.image is None:
        return columns
    added = columns["fit_status"].astype(str).to_numpy() == ADDED_STATUS
    old = result.tables.get("columns")
    good_old = old["fit_status"].isin(["ok", "fixed_width"]) & old["sigma_px"].notna() if old is not None else []
    if not added.any() or not np.any(good_old):
        return columns  # no measured width to start from: nothing is guessed
    from tenfold.analysis.refine import refine_columns

    image = np.asarray(result.image, np.float32)
    if dark_columns:
        image = np.nanmax(image) - image
    from scipy.spatial import cKDTree

    sigma = float(np.median(old.loc[good_old, "sigma_px"]))
    # fitted together with the columns around them, so that their neighbours' light is modelled, not taken
    # for background (as in detection)
    xy = columns[["x_px", "y_px"]].to_numpy(float)
    near = np.zeros(len(xy), bool)
    hits = cKDTree(xy[added]).query_ball_point(xy, r=12.0 * sigma, return_length=True)
    near[hits > 0] = True
    near &= np.all(np.isfinite(xy), axis=1)
    sub = np.flatnonzero(near)
    fit = refine_columns(image, xy[sub], sigma_px=sigma, counts=False, neighbour_passes=1,
                         fixed_width_fallback=False)
    fit = fit[added[sub]].reset_index(drop=True)
    ok = fit["fit_status"].eq("ok").to_numpy()
    out = columns.copy()
    rows = np.flatnonzero(added)[ok]
    for name in ("x_px", "y_px", "sigma_px", "amplitude", "background", "intensity", "residual", "pos_err_px"):
        values = out[name].to_numpy(float, copy=True) if name in out else np.full(len(out), np.nan)
        values[rows] = fit[name].to_numpy(float)[ok]
        out[name] = values
    return out


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
    """Data and keyword arguments of the 'columns' Points layer (features = the columns table).

    Markers carry a dark outline and one symbol per species, so they read on bright columns and dark background
    alike and colour is never the only cue.
    """
    data = columns[["y_px", "x_px"]].to_numpy(float) if len(columns) else np.zeros((0, 2))
    kwargs = dict(
        data=data,
        features=columns.reset_index(drop=True),
        size=_point_size(frame),
        symbol=species_symbols(columns) if len(columns) else "disc",
        border_width=0.12,
        border_width_is_relative=True,
        border_color=BORDER_COLOUR,
        opacity=0.9,
        name="columns",
        **_frame_kwargs(frame),
    )
    kwargs.update(colour_kwargs(columns, colour_by))
    return kwargs


def species_symbols(table: pd.DataFrame) -> np.ndarray:
    """One marker symbol per row by species (unclassified and added columns: a disc)."""
    if "species" not in table:
        return np.full(len(table), "disc", dtype=object)
    sp = pd.to_numeric(table["species"], errors="coerce").fillna(-1).to_numpy().astype(np.int64)
    return np.where(sp >= 0, np.array(SPECIES_SYMBOLS, dtype=object)[np.maximum(sp, 0) % len(SPECIES_SYMBOLS)],
                    "disc")


def _point_size(frame: dict) -> float:
    """Marker size in px: 0.6 x the median nearest-neighbour column distance of the result (set by
    :func:`result_layers`), else a few pixels."""
    return float(frame.get("marker_px") or max(3.0, min(frame["shape"]) / 170.0))


def species_colours(species) -> np.ndarray:
    """(N, 4) RGBA of species numbers from :data:`SPECIES_PALETTE` (by value; -1 / NaN: unclassified grey)."""
    from matplotlib.colors import to_rgba_array

    sp = pd.to_numeric(pd.Series(np.asarray(species)), errors="coerce").fillna(-1).to_numpy().astype(np.int64)
    table = to_rgba_array(list(SPECIES_PALETTE) + [UNCLASSIFIED_COLOUR])
    return table[np.where(sp >= 0, sp % len(SPECIES_PALETTE), len(SPECIES_PALETTE))]


def colour_kwargs(table: pd.DataFrame, prop: str) -> dict:
    """``face_color`` (an explicit (N, 4) RGBA array) colouring points by one feature.

    Species by value from :data:`SPECIES_PALETTE`; other categories from :data:`PALETTE`; numbers on the
    :data:`NUMERIC_RANGE` part of 'viridis', scaled between this feature's own 2nd and 98th percentiles (so each
    feature gets its own gradient); NaN (e.g. hand-added columns) grey. Explicit colours, not napari's colour
    cycles or colormaps, so a later choice never inherits an earlier one's contrast limits.
    """
    from matplotlib import colormaps
    from matplotlib.colors import to_rgba, to_rgba_array

    n = len(table)
    if prop not in table or n == 0:
        return {"face_color": np.tile(to_rgba(UNCLASSIFIED_COLOUR), (n, 1)) if n else UNCLASSIFIED_COLOUR}
    values = table[prop]
    if prop == "species":
        return {"face_color": species_colours(values)}
    numeric = pd.api.types.is_numeric_dtype(values) and not pd.api.types.is_bool_dtype(values)
    if numeric and values.nunique() > len(PALETTE):
        v = values.to_numpy(float)
        ok = np.isfinite(v)
        lo, hi = np.percentile(v[ok], [2, 98]) if ok.any() else (0.0, 1.0)
        if not hi > lo and ok.any():  # most values equal (e.g. probabilities near 1): use the full range
            lo, hi = v[ok].min(), v[ok].max()
        t = np.clip((v - lo) / (hi - lo), 0, 1) if hi > lo else np.full(n, 0.5)
        lo_c, hi_c = NUMERIC_RANGE
        rgba = colormaps["viridis"](lo_c + (hi_c - lo_c) * np.nan_to_num(t))
        rgba[~ok] = to_rgba(UNCLASSIFIED_COLOUR)
        return {"face_color": rgba, "limits": (float(lo), float(hi))}
    text = values.astype(str).to_numpy()
    cats = sorted(pd.unique(text))
    lookup = to_rgba_array([PALETTE[i % len(PALETTE)] for i in range(len(cats))])
    return {"face_color": lookup[np.searchsorted(cats, text)]}


#: Features of a column the user adds by hand: nothing is measured yet (NaN), species unclassified, status 'added'.
ADDED_STATUS = "added"


def added_row_values(features: pd.DataFrame, rows: np.ndarray) -> pd.DataFrame:
    """``features`` with ``rows`` reset to a hand-added column's values: a new unique id, NaN measurements,
    species -1, status 'added' (napari would otherwise copy the last selected point's features)."""
    feats = features.copy()
    rows = np.asarray(rows, np.int64)
    if not len(rows):
        return feats
    others = np.setdiff1d(np.arange(len(feats)), rows)
    for name in feats.columns:
        col = feats[name]
        if name == "id":
            ids = pd.to_numeric(col, errors="coerce")
            start = int(np.nanmax(ids.to_numpy(float)[others])) + 1 if len(others) and ids.iloc[others].notna().any() else 0
            new = col.to_numpy(copy=True)
            new[rows] = np.arange(start, start + len(rows))
            feats[name] = new
        elif name == "fit_status":
            feats[name] = feats[name].astype(object)
            feats.loc[rows, name] = ADDED_STATUS
        elif name in ("species", "region"):
            new = col.to_numpy(copy=True)
            new[rows] = -1 if name == "species" else 0
            feats[name] = new
        elif pd.api.types.is_float_dtype(col):
            new = col.to_numpy(copy=True)
            new[rows] = np.nan
            feats[name] = new
        else:
            feats[name] = col.astype(object)
            feats.loc[rows, name] = np.nan
    return feats


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
    from matplotlib.colors import to_rgba_array

    kinds = motifs["kind"].astype(str)
    hexes = np.where(kinds.str.startswith("ring"), KIND_COLOURS["ring"],
                     np.where(kinds == "pentagon", KIND_COLOURS["pentagon"], KIND_COLOURS["other"]))
    return to_rgba_array(list(hexes)) if len(hexes) else np.zeros((0, 4))


def motifs_layer_kwargs(motifs: pd.DataFrame, columns: pd.DataFrame, frame: dict) -> dict:
    """Data and keyword arguments of the 'motifs' Shapes layer: rings and pentagons as outlines (no fill).

    Edge colour by kind (:data:`KIND_COLOURS`), edge opacity by score; incomplete motifs magenta so vacancies
    stand out. Pentagons are drawn above the rings with half their line width, so both stay visible where they
    share edges.
    """
    from matplotlib.colors import to_rgba

    polys = motif_polygons(motifs, columns) if len(motifs) else []
    edge = _kind_colours(motifs)
    width = 0.2 * _point_size(frame)
    widths, z = width, 0
    if len(motifs):
        score = np.clip(motifs["score"].to_numpy(float), 0, 1)
        edge[:, 3] = 0.5 + 0.5 * np.nan_to_num(score)
        incomplete = ~motifs["complete"].to_numpy(bool)
        edge[incomplete] = to_rgba(KIND_COLOURS["incomplete"])
        pent = motifs["kind"].astype(str).to_numpy() == "pentagon"
        widths = np.where(pent, 0.5 * width, width).tolist()
        z = pent.astype(int).tolist()  # napari wants lists here
    return dict(
        data=polys,
        shape_type="polygon",
        features=motifs.reset_index(drop=True),
        edge_color=edge if len(motifs) else "white",
        face_color="transparent",
        edge_width=widths,
        z_index=z,
        name="motifs",
        **_frame_kwargs(frame),
    )


def centres_layer_kwargs(motifs: pd.DataFrame, frame: dict) -> dict:
    """The 'motif centres' Points layer: a hollow ring per motif, coloured by kind, wide enough to leave a
    column at the centre visible inside it."""
    data = motifs[["centre_y_px", "centre_x_px"]].to_numpy(float) if len(motifs) else np.zeros((0, 2))
    return dict(
        data=data,
        features=motifs[["motif_id", "kind", "complete", "score"]].reset_index(drop=True)
        if len(motifs) else pd.DataFrame(),
        symbol="ring",
        size=1.9 * _point_size(frame),
        face_color=_kind_colours(motifs) if len(motifs) else KIND_COLOURS["ring"],
        border_width=0.0,
        name="motif centres",
        **_frame_kwargs(frame),
    )


def network_layer_kwargs(network: pd.DataFrame, motifs: pd.DataFrame, frame: dict) -> dict:
    """The 'network' Vectors layer: one segment per edge between motif centres.

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
        edge_color=NETWORK_COLOUR,
        edge_width=0.1 * _point_size(frame),
        opacity=0.7,
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
        return value[lo:hi] if isinstance(value, (np.ndarray, list)) and len(value) == n else value

    per_shape = {k: kwargs[k] for k in ("edge_color", "face_color", "edge_width", "z_index") if k in kwargs}
    first = {**kwargs, "data": data[:chunk], "features": kwargs["features"].iloc[:chunk],
             **{k: part(v, 0, chunk) for k, v in per_shape.items()}}
    layer = Shapes(**first)
    for lo in range(chunk, n, chunk):
        time.sleep(0.001)  # let the GUI thread take the GIL
        hi = min(lo + chunk, n)
        layer.add(data[lo:hi], shape_type=kwargs["shape_type"],
                  **{k: part(v, lo, hi) for k, v in per_shape.items()})
    layer.features = kwargs["features"]
    return layer
