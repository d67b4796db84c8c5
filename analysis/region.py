"""User regions of interest: rectangles, polygons and ellipses in pixel coordinates, and point / pixel labelling.

Conventions: vertices are (x, y) in px, pixel (row 0, col 0) centre at (0, 0), x along columns, y down. A point
on a region's boundary counts as inside. Where regions overlap the first region in the list wins.

An ellipse is given by the four corners of its bounding box, in order around the box (like a rectangle; the box
may be rotated, as napari's ellipse shapes are), or by two opposite corners of an axis-aligned box.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._errors import TenfoldInputError
from ._lengths import check_pixel_size, uncalibrated

__all__ = ["Region", "parse_region", "label_points", "region_mask"]

_KINDS = ("rectangle", "polygon", "ellipse")


@dataclass
class Region:
    """One region of interest.

    Attributes
    ----------
    label : int
        Positive label written to the tables' ``region`` column (0 is reserved for "whole image").
    kind : {'rectangle', 'polygon', 'ellipse'}
        Shape type.
    vertices_px : (N, 2) array
        (x, y) vertices in px. Rectangle: 4 corners in order (may be rotated) or 2 opposite corners of an
        axis-aligned box. Polygon: N >= 3 vertices in order. Ellipse: its bounding box, given like a rectangle.
    """

    label: int
    kind: str
    vertices_px: np.ndarray

    def __post_init__(self) -> None:
        if self.kind not in _KINDS:
            raise TenfoldInputError(f"Region kind={self.kind!r} must be one of {_KINDS}")
        if int(self.label) != self.label or self.label < 1:
            raise TenfoldInputError(f"Region label={self.label!r} must be a positive integer (0 means whole image)")
        self.label = int(self.label)
        v = np.asarray(self.vertices_px, dtype=np.float64)
        if v.ndim != 2 or v.shape[1] != 2 or not np.all(np.isfinite(v)):
            raise TenfoldInputError(f"Region {self.label}: vertices_px must be a finite (N, 2) array of (x, y) px")
        if np.abs(v).max(initial=0.0) > _MAX_COORD_PX:
            raise TenfoldInputError(f"Region {self.label}: a vertex lies beyond {_MAX_COORD_PX:g} px from the image "
                                    "origin; check the corners and their unit (nm or px)")
        if self.kind in ("rectangle", "ellipse"):
            if v.shape[0] == 2:
                (x0, y0), (x1, y1) = v
                v = np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]], dtype=np.float64)
            if v.shape[0] != 4:
                raise TenfoldInputError(f"Region {self.label}: a {self.kind} needs 2 or 4 corner vertices, "
                                        f"got {v.shape[0]}")
        elif v.shape[0] < 3:
            raise TenfoldInputError(f"Region {self.label}: a polygon needs at least 3 vertices, got {v.shape[0]}")
        if not _area(v) >= _MIN_AREA_PX2:
            raise TenfoldInputError(f"Region {self.label}: the {self.kind} has (almost) zero area "
                                    f"({_area(v):.3g} px^2); give distinct corners")
        self.vertices_px = v

    def to_dict(self) -> dict:
        """JSON-safe description."""
        return {"label": self.label, "kind": self.kind, "vertices_px": self.vertices_px.tolist()}


#: a region smaller than a hundredth of a pixel holds no column; coordinates beyond a billion px are unit mistakes
_MIN_AREA_PX2 = 0.01
_MAX_COORD_PX = 1e9


def _area(v: np.ndarray) -> float:
    x, y = v[:, 0], v[:, 1]
    return 0.5 * abs(float(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1))))


def parse_region(text: str, *, pixel_size_nm=None, unit: str = "nm", label: int = 1) -> Region:
    """Parse ``'x0,y0,x1,y1'`` (two opposite corners of an axis-aligned rectangle) into a :class:`Region`.

    Parameters
    ----------
    text : str
        Four comma-separated numbers, e.g. ``'1.5,2,20,18.5'``.
    pixel_size_nm : float, optional
        Needed when ``unit='nm'`` to convert to px.
    unit : {'nm', 'px'}
        Unit of the numbers.
    label : int
        Label of the region.

    Returns
    -------
    Region
        A rectangle with corners in px.

    Examples
    --------
    >>> parse_region("0,0,10,5", unit="px").vertices_px.tolist()
    [[0.0, 0.0], [10.0, 0.0], [10.0, 5.0], [0.0, 5.0]]
    """
    if unit not in ("nm", "px"):
        raise TenfoldInputError(f"region unit={unit!r} must be 'nm' or 'px'")
    parts = [p.strip() for p in str(text).split(",")]
    try:
        vals = [float(p) for p in parts]
    except ValueError:
        vals = []
    if len(vals) != 4 or not all(np.isfinite(vals)):
        raise TenfoldInputError(f"--region {text!r}: expected four numbers x0,y0,x1,y1 separated by commas")
    if unit == "nm":
        ps = check_pixel_size(pixel_size_nm, plausible=False)
        if ps is None:
            raise uncalibrated(f"--region {text!r}", "the region in pixels (--region-unit px)", pixel_size="--pixel-size")
        vals = [v / ps for v in vals]
    x0, y0, x1, y1 = vals
    if x0 == x1 or y0 == y1:
        raise TenfoldInputError(f"--region {text!r}: the rectangle has zero width or height")
    return Region(label=label, kind="rectangle", vertices_px=np.array([[x0, y0], [x1, y1]]))


def _inside(x: np.ndarray, y: np.ndarray, region: Region) -> np.ndarray:
    v = region.vertices_px
    if region.kind == "ellipse":
        centre = v.mean(axis=0)
        e1 = 0.5 * (v[1] - v[0])  # half-axis vectors of the bounding box
        e2 = 0.5 * (v[3] - v[0])
        px, py = x - centre[0], y - centre[1]
        u = (px * e1[0] + py * e1[1]) / np.dot(e1, e1)
        w = (px * e2[0] + py * e2[1]) / np.dot(e2, e2)
        return u * u + w * w <= 1.0 + 1e-12
    # polygon / rectangle: even-odd crossing test, vectorised over points, one pass per edge; boundary points
    # are added explicitly so that they count as inside.
    inside = np.zeros(x.shape, dtype=bool)
    on_edge = np.zeros(x.shape, dtype=bool)
    n = v.shape[0]
    for i in range(n):  # loop over the few edges, not over points
        (xa, ya), (xb, yb) = v[i], v[(i + 1) % n]
        crosses = (ya > y) != (yb > y)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):  # a near-horizontal edge: +-inf
            xint = xa + (y - ya) * (xb - xa) / (yb - ya)
        inside ^= crosses & (x < xint)
        ex, ey = xb - xa, yb - ya
        t = np.clip(((x - xa) * ex + (y - ya) * ey) / max(ex * ex + ey * ey, 1e-300), 0.0, 1.0)  # repeated vertex
        on_edge |= np.hypot(x - (xa + t * ex), y - (ya + t * ey)) <= 1e-9 * max(1.0, abs(ex) + abs(ey))
    return inside | on_edge


def label_points(x_px, y_px, regions) -> np.ndarray:
    """Region label of every point: 0 outside all regions; the first region in the list wins on overlap.

    Parameters
    ----------
    x_px, y_px : (N,) arrays
        Point coordinates, px.
    regions : sequence of Region
        Regions in priority order.

    Returns
    -------
    (N,) int64 array
        Labels. NaN coordinates get 0.
    """
    x = np.asarray(x_px, dtype=np.float64).ravel()
    y = np.asarray(y_px, dtype=np.float64).ravel()
    if x.shape != y.shape:
        raise TenfoldInputError(f"label_points: x_px and y_px differ in length ({x.size} vs {y.size})")
    labels = np.zeros(x.shape, dtype=np.int64)
    for reg in regions or ():
        free = labels == 0
        if not free.any():
            break
        lo = reg.vertices_px.min(axis=0)
        hi = reg.vertices_px.max(axis=0)
        cand = free & (x >= lo[0] - 1e-9) & (x <= hi[0] + 1e-9) & (y >= lo[1] - 1e-9) & (y <= hi[1] + 1e-9)
        idx = np.flatnonzero(cand)
        if idx.size:
            labels[idx[_inside(x[idx], y[idx], reg)]] = reg.label
    return labels


def region_mask(shape, regions) -> np.ndarray:
    """Label image: each pixel gets the label of the first region containing its centre, else 0.

    Parameters
    ----------
    shape : (rows, cols)
        Image shape.
    regions : sequence of Region

    Returns
    -------
    (rows, cols) int64 array
    """
    h, w = (int(s) for s in shape)
    out = np.zeros((h, w), dtype=np.int64)
    for reg in regions or ():
        lo = np.floor(reg.vertices_px.min(axis=0)).astype(int)
        hi = np.ceil(reg.vertices_px.max(axis=0)).astype(int)
        c0, c1 = max(lo[0], 0), min(hi[0], w - 1)
        r0, r1 = max(lo[1], 0), min(hi[1], h - 1)
        if c0 > c1 or r0 > r1:
            continue
        yy, xx = np.mgrid[r0:r1 + 1, c0:c1 + 1]
        sub = out[r0:r1 + 1, c0:c1 + 1]
        hit = (sub == 0) & _inside(xx.astype(np.float64), yy.astype(np.float64), reg).reshape(sub.shape)
        sub[hit] = reg.label
    return out
