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
    "stack_layer_tuple",
    "frame_of",
    "world_to_frame",
    "layer_to_frame",
    "result_layers",
    "micrograph_from_layer",
    "layer_source",
    "micrograph_from_source",
    "crop_centre",
    "crop_offset",
    "is_stack",
    "FRAMES_KEY",
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
    "parse_frames",
    "draw_selection",
    "layer_name",
    "RESULT_KINDS",
    "display_maps",
    "readable",
    "MotifPicker",
    "set_quietly",
    "update_layer",
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
#: Numeric features are coloured on this part of matplotlib's 'viridis': from its mid blue (relative luminance
#: about 0.1, still visible on a dark background, with the dark marker outline on bright columns) to its yellow end.
NUMERIC_RANGE = (0.3, 1.0)
#: Motif kinds to colours, apart from the species colours of the column markers: rings white, pentagons yellow
#: (Okabe & Ito 2008), other ring orders cyan; incomplete motifs magenta (cyan and magenta from Paul Tol's
#: "vibrant" set, 2021, SRON/EPS/TN/09-002); the network cyan too, thinner.
KIND_COLOURS = {"ring": "#f5f5f5", "pentagon": "#F0E442", "other": "#33BBEE", "incomplete": "#EE3377"}
NETWORK_COLOUR = "#33BBEE"
#: Segments sampled for a Vectors layer's thumbnail in napari's layer list (napari's default is 1024).
THUMBNAIL_SEGMENTS = 128


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


def stack_layer_tuple(stack: np.ndarray, meta: ImageMeta, name: str) -> tuple:
    """napari layer-data tuple for a frame series (frames first), opened as a stack: the frame axis unscaled, the
    image axes in nm when calibrated, the first frame's :class:`ImageMeta` record attached."""
    px = _layer_scale(meta)
    kwargs = {
        "name": name if meta.calibrated else f"{name} (uncalibrated)",
        "scale": (1.0, *px),
        "metadata": {META_KEY: meta.to_dict()},
        "colormap": "gray",
    }
    if meta.calibrated:
        kwargs["units"] = ("pixel", "nm", "nm")
    return (stack, kwargs, "image")


def parse_frames(text: str) -> tuple[int | None, tuple[int, int] | None]:
    """(frame, frame_range) of the dock's 'Stack frames' field: '' -> none, 'K' -> frame K, 'A:B' -> the mean of
    frames A..B-1 (0-based, as ``tenfold analyze --frame/--frames``); raises TenfoldInputError naming the field."""
    from tenfold.analysis._errors import TenfoldInputError

    text = (text or "").strip()
    if not text:
        return None, None
    try:
        if ":" in text:
            a, b = (int(v) for v in text.split(":"))
            if not 0 <= a < b:
                raise ValueError
            return None, (a, b)
        k = int(text)
        if k < 0:
            raise ValueError
        return k, None
    except ValueError:
        raise TenfoldInputError(f"'Stack frames': {text!r} is not a frame K or a range A:B (0-based, A < B); "
                                "leave it empty for a single image") from None


#: Layer-metadata key of a frame series' alignment (its ``table`` and ``info``), kept on the aligned-mean layer.
FRAMES_KEY = "tenfold_frames"
#: Provenance fields a 2-D layer's stored record keeps (an aligned mean's frames and noise model among them);
#: a stack layer's frame fields are computed anew from the frames chosen.
_KEPT = ("path", "original_dtype", "frames", "frames_averaged", "frames_hold_counts", "converted_from_rgb", "sha256")
_KEPT_FOR_STACK = ("path", "original_dtype", "sha256")


def is_stack(layer) -> bool:
    """True for a 3-D image layer that is not RGB: a frame series (frames first)."""
    return np.ndim(layer.data) == 3 and not getattr(layer, "rgb", False)


def layer_source(layer, *, pixel_size_nm: float | None = None, frames: str = "", align: bool = True,
                 nonrigid: bool = False) -> dict:
    """What the helper process needs to build the :class:`Micrograph` of an image layer (see
    :func:`micrograph_from_source`), checked here so a bad choice is named as the dock labels it.

    The calibration comes from the Tenfold metadata record when the layer was opened by Tenfold; otherwise from
    the layer scale only when its units are nm (a bare scale of 1 is napari's default, never a calibration).
    ``pixel_size_nm`` overrides both. A stack layer (3-D, not RGB) needs ``frames`` ('K' or 'A:B', see
    :func:`parse_frames`); 'A:B' frames are aligned before they are averaged unless ``align`` is False.
    """
    from tenfold.analysis._errors import TenfoldInputError

    data = layer.data
    frame, frame_range = parse_frames(frames)
    stack = is_stack(layer)
    if stack and frame is None and frame_range is None:
        raise TenfoldInputError(
            f"image layer {layer.name!r}: is a stack of {np.shape(data)[0]} frames; give 'Stack frames' (a frame K "
            "or a range A:B to align and average)")
    if stack and max(frame if frame is not None else 0, (frame_range or (0, 0))[1] - 1) >= np.shape(data)[0]:
        last = frame if frame is not None else frame_range[1] - 1
        raise TenfoldInputError(f"'Stack frames': {frames!r} asks for frames up to {last}, but image layer "
                                f"{layer.name!r} has {np.shape(data)[0]} (0-{np.shape(data)[0] - 1})")
    if not stack:
        frame = frame_range = None  # a single image: the field does not apply
    if np.ndim(data) not in (2, 3):  # (a 3-D layer that is no stack is an RGB(A) image)
        raise TenfoldInputError(f"image layer {layer.name!r}: needs a 2-D image or a stack of frames, got shape "
                                f"{np.shape(data)}")
    stored = dict(layer.metadata.get(META_KEY) or {})
    if pixel_size_nm is not None:
        px, source = float(pixel_size_nm), "user"
    elif stored:
        px, source = stored.get("pixel_size_nm"), stored.get("calibration_source", "none")
    elif tuple(str(u) for u in getattr(layer, "units", ()))[-1:] in (("nanometer",), ("nm",)):
        px, source = float(layer.scale[-1]), "napari-layer"
    else:
        px, source = None, "none"
    valid = layer.metadata.get(VALID_KEY)
    return {"data": np.asarray(data), "name": layer.name, "pixel_size_nm": px, "calibration_source": source,
            "frame": frame, "frame_range": frame_range, "align": bool(align), "nonrigid": bool(nonrigid),
            "stored": stored, "valid": None if stack or valid is None else np.asarray(valid),
            "frames_record": None if stack else layer.metadata.get(FRAMES_KEY)}


def micrograph_from_source(source: dict, *, progress=None) -> Micrograph:
    """The :class:`Micrograph` of a :func:`layer_source` record, through ``io.micrograph_from_array`` (frame
    choice, alignment of a frame range, checks), with the layer's stored provenance put back: the file's path,
    checksum and calibration source, the validity mask, and for an aligned-mean layer its frames (so the run
    reports the frames table and the noise model knows how many frames the image averages)."""
    from tenfold.analysis.frames import FrameAlignment
    from tenfold.analysis.io import micrograph_from_array

    stack = source["frame"] is not None or source["frame_range"] is not None
    micrograph = micrograph_from_array(
        source["data"], pixel_size_nm=source["pixel_size_nm"], name=source["name"], frame=source["frame"],
        frame_range=source["frame_range"], align=source["align"], nonrigid=source["nonrigid"], progress=progress)
    meta, stored = micrograph.meta, source["stored"]
    for key in (_KEPT_FOR_STACK if stack else _KEPT):
        if key in stored:
            setattr(meta, key, stored[key])
    meta.calibration_source = source["calibration_source"] if meta.pixel_size_nm is not None else "none"
    own = [n for n in meta.notes if not n.startswith(f"array {source['name']!r}: uncalibrated")]
    meta.notes = list(dict.fromkeys(list(stored.get("notes", [])) + own))
    valid = source.get("valid")
    if valid is not None and np.shape(valid) == micrograph.data.shape:
        micrograph.valid = micrograph.valid & valid
        meta.masked_fraction = float(1 - micrograph.valid.mean())
    record = source.get("frames_record")
    if record is not None and micrograph.alignment is None:
        micrograph.alignment = FrameAlignment(mean=micrograph.data, valid=micrograph.valid,
                                              table=pd.DataFrame(record["table"]), info=dict(record["info"]))
    return micrograph


def micrograph_from_layer(layer, *, pixel_size_nm: float | None = None, frames: str = "", align: bool = True,
                          nonrigid: bool = False, progress=None) -> Micrograph:
    """The :class:`Micrograph` of an image layer, built here (scripts and tests; the dock builds it in its helper
    process): :func:`micrograph_from_source` of :func:`layer_source`."""
    return micrograph_from_source(layer_source(layer, pixel_size_nm=pixel_size_nm, frames=frames, align=align,
                                               nonrigid=nonrigid), progress=progress)


def crop_centre(micrograph: Micrograph, size_px: int) -> tuple[Micrograph, tuple[int, int]]:
    """The central ``size_px`` square of a micrograph (a preview), with a note, and its (row, col) offset."""
    r0, c0 = crop_offset(micrograph.data.shape, size_px)
    sl = np.s_[r0:r0 + size_px, c0:c0 + size_px]
    micrograph.data = np.ascontiguousarray(micrograph.data[sl])
    micrograph.valid = np.ascontiguousarray(micrograph.valid[sl])
    micrograph.meta.shape = micrograph.data.shape
    micrograph.alignment = None  # its frames table describes the whole field
    micrograph.meta.notes = micrograph.meta.notes + [
        f"preview: central {micrograph.data.shape[0]} x {micrograph.data.shape[1]} px from row {r0}, col "
        f"{c0}, without the Fourier stage (a crop this small cannot judge the scan distortion; Run does)"
    ]
    return micrograph, (r0, c0)


def crop_offset(shape, size_px: int) -> tuple[int, int]:
    """(row, col) of the central ``size_px`` square of an image of ``shape`` (as :func:`crop_centre`)."""
    rows, cols = shape[-2:]
    return max(0, (rows - size_px) // 2), max(0, (cols - size_px) // 2)


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
    coords = np.asarray(coords, float)
    k = coords.shape[-1] if coords.ndim else source.ndim
    coords = coords.reshape(-1, k)
    # the trailing k axes of each layer: a stack's frame axis (or a 3-D shape's) is left out
    m_s, o_s = (a[-k:, -k:] if a.ndim == 2 else a[-k:] for a in _affine_of(source))
    m_t, o_t = (a[-k:, -k:] if a.ndim == 2 else a[-k:] for a in _affine_of(target))
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


def columns_from_points(points_layer, frame: dict, table: pd.DataFrame | None = None) -> pd.DataFrame:
    """The (possibly hand-edited) columns of a Points layer as a table with x_px, y_px and the kept measurements.

    The layer carries only the column ``id`` as its feature; the other values come from ``table`` (the run's
    columns table), looked up by id. Points the user added (no id, or an id given twice: napari copies the last
    selected point's features to a new point) keep their position only, with ``fit_status`` 'added', which
    ``rerun_from_columns`` then fits. Positions are taken back into the frame of the run's tables (the corrected
    frame when the run corrected the scan distortion; the layer is drawn in the image's frame).
    """
    rc = layer_to_frame(np.asarray(points_layer.data), points_layer, frame)
    xy = display_maps(frame)[1](rc[:, ::-1]) if len(rc) else np.zeros((0, 2))
    feats = pd.DataFrame(points_layer.features).reset_index(drop=True)
    ids = pd.to_numeric(feats["id"], errors="coerce") if "id" in feats and len(feats) == len(rc) \
        else pd.Series(np.full(len(rc), np.nan))
    ids = ids.where(~ids.duplicated(), np.nan).to_numpy(float)
    if table is not None and "id" in table and len(table):
        known = np.isin(ids, table["id"].to_numpy())
        out = table.set_index("id").reindex(ids).reset_index()
        out.loc[~known, [c for c in out.columns if c != "id"]] = np.nan
    else:
        known = np.zeros(len(ids), bool)
        out = pd.DataFrame({"id": ids})
    if "fit_status" in out:
        out["fit_status"] = out["fit_status"].astype(object)
    out.loc[~known, "fit_status"] = ADDED_STATUS
    out["id"] = np.where(known, ids, -1).astype(np.int64)
    out["x_px"] = xy[:, 0]
    out["y_px"] = xy[:, 1]
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


#: What a result layer takes over from a freshly built one of its type when it is updated in place.
_UPDATED = {"Points": ("data", "features", "size", "symbol", "face_color", "border_color", "border_width"),
            "Vectors": ("data", "features", "edge_width", "edge_color")}


def set_quietly(layer, *, announce_features: bool = False, **values) -> None:
    """Set several properties of a layer with one redraw.

    Every setter of a napari layer emits its own events (each one re-uploads the whole visual and, with napari's
    features table open on this layer, rebuilds that table cell by cell) and refreshes the layer (slice and
    thumbnail). Here the layer's events and refreshes are held while ``values`` are set in the given order,
    then the layer is refreshed once, which uploads data, colours, sizes and symbols to its visual together.
    ``announce_features`` emits the one ``features`` event napari's features table needs when the features
    changed.
    """
    from contextlib import ExitStack, nullcontext

    with ExitStack() as stack:
        for owner in (layer, getattr(layer, "_face", None), getattr(layer, "_border", None),
                      getattr(layer, "_edge", None)):
            if owner is not None:
                stack.enter_context(owner.events.blocker_all())
        # napari's private switch: without it every setter slices the layer and redraws its thumbnail again
        stack.enter_context(getattr(layer, "_block_refresh", nullcontext)())
        for name, value in values.items():
            setattr(layer, name, value)
    layer.refresh()
    if announce_features:
        layer.events.features()


def update_layer(old, new) -> None:
    """Give an existing result layer the content of a freshly built one of the same type, in place.

    Replacing the layer instead makes napari build a new visual (and compile its shaders), a new layer-control
    widget and a new row of the layer list, and move the layer selection twice (each move rebuilds napari's
    features table, if open): 0.3-0.6 s of frozen viewer per layer with software OpenGL. Here only the data
    move, with one redraw; the user's visibility and opacity of the layer are kept. The ``features`` event is
    emitted only when the features changed.
    """
    if len(old.data) and len(getattr(old, "selected_data", ())):
        old.selected_data = set()  # indices of the old content
    values = {name: getattr(new, name) for name in _UPDATED[type(old).__name__]}
    if not len(new.data):  # napari refuses an empty colour array; there is nothing to colour anyway
        values = {name: value for name, value in values.items() if not name.endswith("color")}
    changed = not old.features.equals(new.features)
    set_quietly(old, announce_features=changed, **values)
    for name in ("scale", "translate"):  # a preview's crop is drawn with its own offset
        if not np.allclose(getattr(old, name), getattr(new, name)):
            setattr(old, name, getattr(new, name))
    old.metadata.update(new.metadata)


def _frame_kwargs(frame: dict) -> dict:
    return {"scale": frame["scale"], "translate": frame["translate"], "units": frame["units"]}




def display_maps(frame_or_summary: dict):
    """(to_raw, to_corrected) maps of (N, 2) x, y px between the image's frame, where every layer is drawn, and
    the frame of the run's tables (corrected when the run corrected the scan distortion; identities otherwise).
    Takes a result frame (with its 'correction' record) or a run summary."""
    from tenfold.analysis.pipeline import _distortion_maps

    record = frame_or_summary.get("correction") if "correction" in frame_or_summary else \
        frame_or_summary.get("distortion_correction")
    return _distortion_maps({"distortion_correction": record or {}})


#: Result layers of one image, in drawing order (bottom first); names are ``'<kind> [<image>]'``.
RESULT_KINDS = ("network", "phason field", "motif centres", "rings", "pentagons", "columns", "selected")


def layer_name(kind: str, image: str | None) -> str:
    """Name of a result layer: the kind and the image it belongs to, so each image keeps its own results."""
    return f"{kind} [{image}]" if image else kind


def kind_of(name: str) -> tuple[str, str | None]:
    """(kind, image) of a result layer name (image None for a name without one)."""
    if name.endswith("]") and " [" in name:
        kind, image = name[:-1].split(" [", 1)
        return kind, image
    return name, None


#: Readable names and units of the values the inspector shows ('{u}' becomes nm, or px when uncalibrated).
READABLE = {
    "id": ("column id", ""), "x": ("x", "{u}"), "y": ("y", "{u}"), "sigma": ("width sigma", "{u}"),
    "pos_err": ("position error (1 sigma)", "{u}"), "intensity": ("integrated intensity", "image units px\u00b2"),
    "amplitude": ("peak height", "image units"), "background": ("local background", "image units"),
    "residual": ("fit residual (rms)", "image units"), "species": ("species", ""),
    "species_prob": ("species probability", ""), "fit_status": ("fit", ""), "region": ("region", ""),
    "motif_id": ("motif id", ""), "kind": ("kind", ""), "complete": ("complete", ""),
    "n_members": ("members", ""), "radius": ("radius", "{u}"), "radial_rms": ("radial spread (rms)", "{u}"),
    "edge": ("mean edge", "{u}"), "score": ("score (0-1)", ""), "psi_n": ("order |psi_n| (0-1)", ""),
    "orientation_deg": ("orientation", "deg"), "centre_x": ("centre x", "{u}"), "centre_y": ("centre y", "{u}"),
    "primary": ("primary shell", ""), "parent_ring": ("inside ring", ""),
}
_INSPECT_COLUMNS = ("id", "x", "y", "species", "species_prob", "intensity", "sigma", "pos_err", "fit_status",
                    "residual", "region")
_INSPECT_MOTIFS = ("motif_id", "kind", "complete", "n_members", "centre_x", "centre_y", "radius", "radial_rms",
                   "edge", "orientation_deg", "psi_n", "score", "parent_ring", "region")


def _fmt(v) -> str:
    if isinstance(v, (bool, np.bool_)):
        return "yes" if v else "no"
    if isinstance(v, (float, np.floating)):
        return "-" if not np.isfinite(v) else f"{v:.4g}"
    return str(v)


def readable(row: pd.Series, *, pixel_size_nm: float | None, kind: str = "column") -> list[tuple[str, str]]:
    """(label with unit, value) pairs of one column or motif row, in one length unit (nm when calibrated)."""
    unit = "nm" if pixel_size_nm else "px"
    out = []
    for key in (_INSPECT_COLUMNS if kind == "column" else _INSPECT_MOTIFS):
        label, u = READABLE[key]
        name = key
        if u == "{u}":
            name = f"{key}_{unit}" if f"{key}_{unit}" in row else f"{key}_px"
            if name.endswith("_px") and unit == "nm" and pixel_size_nm:
                value = row.get(name, np.nan) * pixel_size_nm
            else:
                value = row.get(name, np.nan)
            u = unit
        else:
            value = row.get(name, np.nan)
        if name not in row and not (u == unit and f"{key}_px" in row):
            continue
        out.append((f"{label} ({u})" if u else label, _fmt(value)))
    return out


def _marker_px(columns: pd.DataFrame, frame: dict) -> float:
    """Marker size in px: 0.6 x the median nearest-neighbour column distance, else a few pixels."""
    if len(columns) >= 2:
        from scipy.spatial import cKDTree

        xy = columns[["x_px", "y_px"]].to_numpy(float)
        xy = xy[np.all(np.isfinite(xy), axis=1)]
        if len(xy) >= 2:
            d, _ = cKDTree(xy).query(xy, k=2)
            return max(2.0, 0.6 * float(np.median(d[:, 1])))
    return max(3.0, min(frame["shape"]) / 170.0)


def _rc(xy: np.ndarray) -> np.ndarray:
    return np.asarray(xy, float)[:, ::-1] if len(xy) else np.zeros((0, 2))


def columns_layer_kwargs(columns: pd.DataFrame, frame: dict, *, colour_by: str = "species", name="columns") -> dict:
    """Data and keyword arguments of the columns Points layer, drawn in the image's frame.

    The layer's only feature is the column ``id`` (the full table stays with the dock): napari's own features
    table redraws every cell of the selected layer on every edit, which froze the viewer for seconds. Markers
    carry a dark outline and one symbol per species, so they read on bright columns and dark background alike
    and colour is never the only cue.
    """
    to_raw = display_maps(frame)[0]
    data = _rc(to_raw(columns[["x_px", "y_px"]].to_numpy(float))) if len(columns) else np.zeros((0, 2))
    kwargs = dict(
        data=data,
        features=pd.DataFrame({"id": columns["id"].to_numpy(np.int64)}) if len(columns) else None,
        size=frame.get("marker_px") or _marker_px(columns, frame),
        symbol=species_symbols(columns) if len(columns) else "disc",
        border_width=0.12,
        border_width_is_relative=True,
        border_color=BORDER_COLOUR,
        opacity=0.9,
        name=name,
        **_frame_kwargs(frame),
    )
    kwargs["face_color"] = colour_kwargs(columns, colour_by)["face_color"]
    return kwargs


def species_symbols(table: pd.DataFrame) -> np.ndarray:
    """One marker symbol per row by species (unclassified and added columns: a disc)."""
    if "species" not in table:
        return np.full(len(table), "disc", dtype=object)
    sp = pd.to_numeric(table["species"], errors="coerce").fillna(-1).to_numpy().astype(np.int64)
    return np.where(sp >= 0, np.array(SPECIES_SYMBOLS, dtype=object)[np.maximum(sp, 0) % len(SPECIES_SYMBOLS)],
                    "disc")


def species_colours(species) -> np.ndarray:
    """(N, 4) RGBA of species numbers from :data:`SPECIES_PALETTE` (by value; -1 / NaN: unclassified grey)."""
    from matplotlib.colors import to_rgba_array

    sp = pd.to_numeric(pd.Series(np.asarray(species)), errors="coerce").fillna(-1).to_numpy().astype(np.int64)
    table = to_rgba_array(list(SPECIES_PALETTE) + [UNCLASSIFIED_COLOUR])
    return table[np.where(sp >= 0, sp % len(SPECIES_PALETTE), len(SPECIES_PALETTE))]


def colour_kwargs(table: pd.DataFrame, prop: str) -> dict:
    """``face_color`` (an explicit (N, 4) RGBA array) colouring points by one feature, and its legend.

    Species by value from :data:`SPECIES_PALETTE`; other categories from :data:`PALETTE`; numbers on the
    :data:`NUMERIC_RANGE` part of 'viridis', scaled between this feature's own 2nd and 98th percentiles (so each
    feature gets its own gradient); NaN (e.g. hand-added columns) grey. Explicit colours, not napari's colour
    cycles or colormaps, so a later choice never inherits an earlier one's contrast limits.

    Returns
    -------
    dict
        'face_color'; 'limits' (lo, hi) for numbers; 'legend': list of (label, hex colour) for categories, or
        for numbers the colours of the low and high ends.
    """
    from matplotlib import colormaps
    from matplotlib.colors import to_hex, to_rgba, to_rgba_array

    n = len(table)
    if prop not in table or n == 0:
        return {"face_color": np.tile(to_rgba(UNCLASSIFIED_COLOUR), (n, 1)) if n else UNCLASSIFIED_COLOUR,
                "legend": []}
    values = table[prop]
    if prop == "species":
        sp = pd.to_numeric(values, errors="coerce").fillna(-1).astype(np.int64)
        legend = [(f"species {k}" if k >= 0 else "unclassified / added",
                   to_hex(species_colours([k])[0])) for k in sorted(sp.unique())]
        return {"face_color": species_colours(values), "legend": legend}
    numeric = pd.api.types.is_numeric_dtype(values) and not pd.api.types.is_bool_dtype(values)
    if numeric and values.nunique() > len(PALETTE):
        v = values.to_numpy(float)
        ok = np.isfinite(v)
        lo, hi = np.percentile(v[ok], [2, 98]) if ok.any() else (0.0, 1.0)
        if not hi > lo and ok.any():  # most values equal (e.g. probabilities near 1): use the full range
            lo, hi = v[ok].min(), v[ok].max()
        t = np.clip((v - lo) / (hi - lo), 0, 1) if hi > lo else np.full(n, 0.5)
        lo_c, hi_c = NUMERIC_RANGE
        cmap = colormaps["viridis"]
        rgba = cmap(lo_c + (hi_c - lo_c) * np.nan_to_num(t))
        rgba[~ok] = to_rgba(UNCLASSIFIED_COLOUR)
        return {"face_color": rgba, "limits": (float(lo), float(hi)),
                "legend": [(f"{lo:.3g}", to_hex(cmap(lo_c))), (f"{hi:.3g}", to_hex(cmap(hi_c)))]}
    text = values.astype(str).to_numpy()
    cats = sorted(pd.unique(text))
    colours = [PALETTE[i % len(PALETTE)] for i in range(len(cats))]
    lookup = to_rgba_array(colours)
    return {"face_color": lookup[np.searchsorted(cats, text)], "legend": list(zip(cats, colours))}


#: Features of a column the user adds by hand: nothing is measured yet (NaN), species unclassified, status 'added'.
ADDED_STATUS = "added"


def added_row_values(features: pd.DataFrame, rows: np.ndarray) -> pd.DataFrame:
    """``features`` with ``rows`` given new unique ids (napari would otherwise copy the last selected point's
    id), and every other feature of those rows cleared."""
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
        elif pd.api.types.is_float_dtype(col):
            new = col.to_numpy(copy=True)
            new[rows] = np.nan
            feats[name] = new
        else:
            feats[name] = col.astype(object)
            feats.loc[rows, name] = np.nan
    return feats


def motif_polygons(motifs: pd.DataFrame, columns: pd.DataFrame) -> list[np.ndarray]:
    """Member polygons (x, y px) of each motif, vertices in the table's angular order.

    Members missing from ``columns`` (deleted by hand) are skipped; a motif with fewer than 3 left falls back
    to a regular polygon of its radius and orientation, so every motif row keeps exactly one polygon.
    """
    pos = pd.DataFrame({"x": columns["x_px"].to_numpy(), "y": columns["y_px"].to_numpy()},
                       index=columns["id"].to_numpy() if "id" in columns else None)
    pos = pos[~pos.index.duplicated()]
    member_lists = [np.array(str(m).split(), dtype=np.int64) for m in motifs["members"]]
    flat = np.concatenate(member_lists) if member_lists else np.zeros(0, np.int64)
    known = np.isin(flat, pos.index.to_numpy())
    xy = np.full((len(flat), 2), np.nan)
    xy[known] = pos.loc[flat[known], ["x", "y"]].to_numpy()
    bounds = np.cumsum([0] + [len(m) for m in member_lists])
    out = []
    for k, (a, b) in enumerate(zip(bounds[:-1], bounds[1:])):  # one slice per motif; the geometry is vectorised
        verts = xy[a:b]
        verts = verts[np.isfinite(verts[:, 0])]
        if len(verts) < 3:
            row = motifs.iloc[k]
            n = int(row["order"]) if row["order"] > 2 else 10
            ang = np.deg2rad(row["orientation_deg"] if np.isfinite(row["orientation_deg"]) else 0.0)
            t = ang + 2 * np.pi * np.arange(n) / n
            verts = np.c_[row["centre_x_px"] + row["radius_px"] * np.cos(t),
                          row["centre_y_px"] + row["radius_px"] * np.sin(t)]
        out.append(verts)
    return out


def _outline_vectors(polygons: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """(vectors (E, 2, 2) in (row, col), owner (E,)) of the closed outlines: one segment per polygon edge.

    A Vectors layer draws all segments as one mesh with no triangulation (a Shapes layer of the same polygons
    took seconds to build and held the GUI for the first shape while numba compiled napari's triangulation)."""
    if not polygons:
        return np.zeros((0, 2, 2)), np.zeros(0, np.int64)
    lengths = np.array([len(p) for p in polygons])
    start = np.concatenate(polygons)
    offsets = np.cumsum(lengths) - lengths
    nxt = np.arange(len(start)) + 1
    last = offsets + lengths - 1
    nxt[last] = offsets
    end = start[nxt]
    owner = np.repeat(np.arange(len(polygons)), lengths)
    return np.stack([_rc(start), _rc(end - start)], axis=1), owner


def _motif_colours(motifs: pd.DataFrame) -> np.ndarray:
    """(N, 4) RGBA per motif: kind colour, opacity by score, incomplete motifs magenta."""
    from matplotlib.colors import to_rgba, to_rgba_array

    if not len(motifs):
        return np.zeros((0, 4))
    kinds = motifs["kind"].astype(str)
    hexes = np.where(kinds.str.startswith("ring"), KIND_COLOURS["ring"],
                     np.where(kinds == "pentagon", KIND_COLOURS["pentagon"], KIND_COLOURS["other"]))
    rgba = to_rgba_array(list(hexes))
    rgba[:, 3] = 0.5 + 0.5 * np.nan_to_num(np.clip(motifs["score"].to_numpy(float), 0, 1))
    rgba[~motifs["complete"].to_numpy(bool)] = to_rgba(KIND_COLOURS["incomplete"])
    return rgba


def motif_layer_kwargs(motifs: pd.DataFrame, columns: pd.DataFrame, frame: dict, *, name: str,
                       width_factor: float = 0.2) -> dict:
    """A Vectors layer of motif outlines (one per kind: rings, pentagons), edges coloured by kind and score,
    incomplete motifs magenta. ``features`` holds the ``motif_id`` of each segment's motif."""
    to_raw = display_maps(frame)[0]
    polys = [to_raw(p) for p in motif_polygons(motifs, columns)] if len(motifs) else []
    vectors, owner = _outline_vectors(polys)
    colours = _motif_colours(motifs)[owner] if len(owner) else np.zeros((0, 4))
    return dict(
        data=vectors,
        features=pd.DataFrame({"motif_id": motifs["motif_id"].to_numpy()[owner]}) if len(owner) else None,
        edge_color=colours if len(owner) else "white",
        edge_width=width_factor * frame["marker_px"],
        vector_style="line",
        name=name,
        **_frame_kwargs(frame),
    )


def centres_layer_kwargs(motifs: pd.DataFrame, frame: dict, *, name="motif centres") -> dict:
    """The motif-centres Points layer: a thin hollow ring per motif, coloured by kind, wide enough to leave a
    column at the centre visible inside it (it is drawn below the columns layer too)."""
    to_raw = display_maps(frame)[0]
    data = _rc(to_raw(motifs[["centre_x_px", "centre_y_px"]].to_numpy(float))) if len(motifs) else np.zeros((0, 2))
    return dict(
        data=data,
        symbol="ring",
        size=2.4 * frame["marker_px"],
        face_color=_motif_colours(motifs) if len(motifs) else KIND_COLOURS["ring"],
        border_width=0.0,
        opacity=0.7,
        name=name,
        **_frame_kwargs(frame),
    )


def network_layer_kwargs(network: pd.DataFrame, motifs: pd.DataFrame, frame: dict, *, name="network") -> dict:
    """The network Vectors layer: one segment per edge between motif centres (one mesh for any number)."""
    to_raw = display_maps(frame)[0]
    centres = motifs.set_index("motif_id")[["centre_x_px", "centre_y_px"]] if len(motifs) else None
    if len(network) and centres is not None:
        centres = centres[~centres.index.duplicated()]
        ok = network["motif_a"].isin(centres.index) & network["motif_b"].isin(centres.index)
        network = network[ok].reset_index(drop=True)
        a = to_raw(centres.loc[network["motif_a"]].to_numpy())
        b = to_raw(centres.loc[network["motif_b"]].to_numpy())
        vectors = np.stack([_rc(a), _rc(b - a)], axis=1)
    else:
        vectors = np.zeros((0, 2, 2))
    return dict(
        data=vectors,
        edge_color=NETWORK_COLOUR,
        edge_width=0.1 * frame["marker_px"],
        opacity=0.7,
        name=name,
        vector_style="line",
        **_frame_kwargs(frame),
    )


def phason_layer_kwargs(phason_map: pd.DataFrame, edge_px: float | None, frame: dict, *,
                        name="phason field") -> dict:
    """The phason-field Vectors layer: at every lifted tiling vertex, its residual perpendicular displacement
    (drawn at half an edge length per edge length of displacement), red at phason-flip sites."""
    to_raw = display_maps(frame)[0]
    if len(phason_map):
        start = _rc(to_raw(phason_map[["x_px", "y_px"]].to_numpy(float)))
        scale = 0.5 * float(edge_px or 1.0)
        disp = phason_map[["dy_perp", "dx_perp"]].to_numpy(float) * scale
        vectors = np.stack([start, disp], axis=1)
        flip = phason_map["flip"].to_numpy(bool)
        colours = np.where(flip[:, None], np.array([[0.85, 0.15, 0.15, 1.0]]), np.array([[0.2, 0.8, 0.9, 1.0]]))
    else:
        vectors, colours = np.zeros((0, 2, 2)), np.zeros((0, 4))
    return dict(
        data=vectors,
        features=phason_map[["motif_id", "flip"]].reset_index(drop=True) if len(phason_map) else None,
        edge_color=colours,
        edge_width=0.15 * frame.get("marker_px", 3.0),
        name=name,
        vector_style="arrow",
        **_frame_kwargs(frame),
    )


#: Colour of the selection highlight (not used by any other overlay).
HIGHLIGHT_COLOUR = "#39ff14"


def highlight_vectors(polygons: list[np.ndarray]) -> np.ndarray:
    """Outline segments (row, col) of the polygons (x, y px, display frame) to highlight."""
    return _outline_vectors([np.asarray(p, float) for p in polygons])[0]


def circle(x: float, y: float, r: float, n: int = 16) -> np.ndarray:
    t = 2 * np.pi * np.arange(n) / n
    return np.c_[x + r * np.cos(t), y + r * np.sin(t)]


def result_layers(result, frame: dict, *, image: str | None = None, columns: bool = True,
                  colour_by: str = "species") -> list:
    """napari layers of one result ('columns', 'rings', 'pentagons', 'motif centres', 'network', 'phason field',
    'selected', each named ``'<kind> [<image>]'``), built but not added, in drawing order (bottom first).

    Every layer is drawn in the image's frame: when the run corrected the scan distortion, positions are mapped
    back with the inverse of the applied matrix, so markers sit on the atoms of the (unresampled) image.
    ``columns=False`` leaves the (hand-edited) columns layer alone after a re-run from columns.
    """
    from napari.layers import Points, Vectors

    cols = result.tables["columns"]
    motifs = result.tables["motifs"]
    frame = {**frame, "correction": result.summary.get("distortion_correction")}
    frame.setdefault("marker_px", _marker_px(cols, frame))
    kinds = motifs["kind"].astype(str) if len(motifs) else pd.Series([], dtype=str)
    rings = motifs[kinds.str.startswith("ring").to_numpy()] if len(motifs) else motifs
    others = motifs[~kinds.str.startswith("ring").to_numpy()] if len(motifs) else motifs
    out = [Vectors(**network_layer_kwargs(result.tables["network"], motifs, frame,
                                          name=layer_name("network", image)))]
    phason_map = result.tables.get("phason_map")
    if phason_map is not None and len(phason_map):
        edge = (result.summary.get("tiling") or {}).get("edge_px")
        out.append(Vectors(**phason_layer_kwargs(phason_map, edge, frame, name=layer_name("phason field", image))))
    out.append(Points(**centres_layer_kwargs(motifs, frame, name=layer_name("motif centres", image))))
    out.append(Vectors(**motif_layer_kwargs(rings, cols, frame, name=layer_name("rings", image))))
    out.append(Vectors(**motif_layer_kwargs(others, cols, frame, name=layer_name("pentagons", image),
                                            width_factor=0.1)))
    if columns:
        out.append(Points(**columns_layer_kwargs(cols, frame, colour_by=colour_by, name=layer_name("columns", image))))
    out.append(Vectors(data=np.zeros((0, 2, 2)), edge_color=HIGHLIGHT_COLOUR, edge_width=0.3 * frame["marker_px"],
                       vector_style="line", name=layer_name("selected", image), **_frame_kwargs(frame)))
    for layer in out:
        layer.metadata["tenfold_frame"] = frame
        if isinstance(layer, Vectors):
            # napari draws a layer-list thumbnail of up to 1024 sampled segments in a Python loop (about 40 ms,
            # on the GUI thread, at every insertion and update); a 32 px icon shows the pattern with far fewer
            layer._max_vectors_thumbnail = THUMBNAIL_SEGMENTS
    return out


class MotifPicker:
    """Which motif a click means: the motifs whose outline contains the point, innermost first.

    The rule: a click inside a pentagon that sits in a ring picks the pentagon; the same click again picks the
    ring around it (and so on outwards, then back to the innermost). With the 'rings' or 'pentagons' layer active,
    only motifs of that layer are considered, so a click anywhere inside a ring picks the ring at once.
    """

    def __init__(self, motifs: pd.DataFrame, columns: pd.DataFrame) -> None:
        from scipy.spatial import cKDTree

        self.motifs = motifs.reset_index(drop=True)
        self.polygons = motif_polygons(self.motifs, columns) if len(self.motifs) else []
        centres = self.motifs[["centre_x_px", "centre_y_px"]].to_numpy(float) if len(self.motifs) else np.zeros((0, 2))
        self.tree = cKDTree(centres) if len(centres) else None
        self.reach = float(np.nanmax(self.motifs["radius_px"])) * 1.3 if len(self.motifs) else 0.0
        self.last: tuple | None = None

    def containing(self, x: float, y: float, kinds: str | None = None) -> np.ndarray:
        """Rows of the motifs whose outline contains (x, y), smallest area first."""
        from matplotlib.path import Path

        if self.tree is None:
            return np.zeros(0, np.int64)
        near = np.asarray(self.tree.query_ball_point([x, y], self.reach), np.int64)
        if kinds is not None and len(near):
            is_ring = self.motifs["kind"].astype(str).str.startswith("ring").to_numpy()[near]
            near = near[is_ring] if kinds == "rings" else near[~is_ring]
        inside = [k for k in near if Path(self.polygons[k]).contains_point((x, y))]
        area = [0.5 * abs(np.dot(p[:, 0], np.roll(p[:, 1], 1)) - np.dot(p[:, 1], np.roll(p[:, 0], 1)))
                for p in (self.polygons[k] for k in inside)]
        return np.asarray(inside, np.int64)[np.argsort(area, kind="stable")] if inside else np.zeros(0, np.int64)

    def pick(self, x: float, y: float, kinds: str | None = None) -> int | None:
        """The row of the motif meant by a click at (x, y) px (tables' frame), or None."""
        hits = self.containing(x, y, kinds)
        if not len(hits):
            self.last = None
            return None
        k = 0
        if self.last is not None and np.hypot(x - self.last[0], y - self.last[1]) < 0.25 * self.reach / 1.3 \
                and self.last[2] in hits.tolist():
            k = (hits.tolist().index(self.last[2]) + 1) % len(hits)
        self.last = (x, y, int(hits[k]))
        return int(hits[k])


def draw_selection(viewer, record, kind: str | None, row: int | None) -> None:
    """Outline the selected motif (its member polygon) or column (a circle) in the record's 'selected' layer."""
    if record is None:
        return
    name = layer_name("selected", record.image)
    if name not in viewer.layers:
        return
    layer = viewer.layers[name]
    frame = layer.metadata.get("tenfold_frame") or record.frame
    to_raw = display_maps(frame)[0]
    result = record.result
    polys = []
    if kind == "motif" and row is not None and row < len(result.tables["motifs"]):
        polys = motif_polygons(result.tables["motifs"].iloc[[row]], result.tables["columns"])
    elif kind == "column" and row is not None and row < len(result.tables["columns"]):
        c = result.tables["columns"].iloc[row]
        polys = [circle(c["x_px"], c["y_px"], 0.9 * frame.get("marker_px", 3.0))]
    layer.data = highlight_vectors([to_raw(p) for p in polys]) if polys else np.zeros((0, 2, 2))
    layer.edge_color = HIGHLIGHT_COLOUR
