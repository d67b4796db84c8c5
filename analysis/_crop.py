"""Analyse only the bounding box of the regions, then put the result back in whole-image pixels.

For a small region of a large image, ``run_pipeline`` works on the regions' bounding box (plus a margin, so
columns on the region border are fitted with their neighbours) and shifts the tables back, so every ``*_px``
value the user sees or exports refers to the full image.
"""

from __future__ import annotations

import dataclasses

import numpy as np

__all__ = ["MARGIN_PX", "crop_to_regions", "shift_result"]

#: Extra pixels kept around the regions' bounding box.
MARGIN_PX = 24

_XY = (("x_px", "y_px", "x_nm", "y_nm"), ("centre_x_px", "centre_y_px", "centre_x_nm", "centre_y_nm"),
       ("x_raw_px", "y_raw_px", None, None))


def crop_to_regions(micrograph, regions):
    """(cropped micrograph, shifted regions, (row0, col0)); the micrograph itself when it is not worth it."""
    from .region import Region

    rows, cols = micrograph.data.shape
    xy = np.concatenate([r.vertices_px for r in regions])
    c0, r0 = np.floor(xy.min(axis=0)).astype(int) - MARGIN_PX
    c1, r1 = np.ceil(xy.max(axis=0)).astype(int) + MARGIN_PX + 1
    r0, c0, r1, c1 = max(r0, 0), max(c0, 0), min(r1, rows), min(c1, cols)
    if r1 - r0 < 16 or c1 - c0 < 16 or (r1 - r0) * (c1 - c0) > 0.6 * rows * cols:
        return micrograph, regions, (0, 0)
    meta = dataclasses.replace(micrograph.meta, shape=(r1 - r0, c1 - c0), notes=list(micrograph.meta.notes))
    crop = dataclasses.replace(
        micrograph, data=np.ascontiguousarray(micrograph.data[r0:r1, c0:c1]),
        valid=np.ascontiguousarray(micrograph.valid[r0:r1, c0:c1]), meta=meta,
    )
    shifted = [Region(label=r.label, kind=r.kind, vertices_px=r.vertices_px - [c0, r0]) for r in regions]
    return crop, shifted, (r0, c0)


def shift_result(result, full, offset) -> None:
    """Shift a result computed on a crop back into the pixel frame of the full micrograph ``full`` (in place)."""
    r0, c0 = offset
    ps = full.meta.pixel_size_nm
    for name in ("columns", "motifs", "phason_map"):  # every table holding image positions
        table = result.tables.get(name)
        if table is None or not len(table):
            continue
        table = table.copy()
        for x, y, x_nm, y_nm in _XY:
            if x in table:
                table[x] = table[x] + c0
                table[y] = table[y] + r0
                if x_nm is not None:
                    table[x_nm] = table[x] * ps if ps else np.nan
                    table[y_nm] = table[y] * ps if ps else np.nan
        result.tables[name] = table
    correction = result.summary.get("distortion_correction")
    if isinstance(correction, dict) and correction.get("centre_px") is not None:
        correction["centre_px"] = [correction["centre_px"][0] + c0, correction["centre_px"][1] + r0]
    box = tuple(int(v) for v in result.meta.shape)
    result.meta = dataclasses.replace(result.meta, shape=full.meta.shape)
    result.image = full.data
    inp = result.summary.get("input")
    if isinstance(inp, dict):
        inp["shape"] = list(full.meta.shape)
    result.summary["analysed_box_px"] = {
        "row0": int(r0), "col0": int(c0), "rows": box[0], "cols": box[1], "margin_px": MARGIN_PX,
        "note": "the regions' bounding box was analysed; positions (columns, motifs, phason map) are whole-image px; "
                "Fourier spots are of that box",
    }
