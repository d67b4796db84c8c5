"""Regions of interest: parsing, point labels, label images (known geometric answers)."""

import numpy as np
import pytest

from tenfold.analysis._errors import TenfoldInputError
from tenfold.analysis.region import Region, label_points, parse_region, region_mask


def test_parse_region_px_and_nm():
    r = parse_region("1,2,11,7", unit="px")
    assert r.kind == "rectangle" and r.label == 1
    np.testing.assert_allclose(r.vertices_px, [[1, 2], [11, 2], [11, 7], [1, 7]])
    r = parse_region("0.1,0.2,1.1,0.7", pixel_size_nm=0.1, unit="nm", label=3)
    np.testing.assert_allclose(r.vertices_px, [[1, 2], [11, 2], [11, 7], [1, 7]])
    assert r.label == 3


@pytest.mark.parametrize("text,kw", [("1,2,3", {"unit": "px"}), ("a,b,c,d", {"unit": "px"}),
                                     ("0,0,1,1", {"unit": "nm"}), ("0,0,0,5", {"unit": "px"}),
                                     ("0,0,1,1", {"unit": "furlong"})])
def test_parse_region_bad(text, kw):
    with pytest.raises(TenfoldInputError):
        parse_region(text, **kw)


def test_label_points_rectangle_polygon_ellipse_first_wins():
    rect = Region(1, "rectangle", np.array([[0, 0], [10, 10]]))
    tri = Region(2, "polygon", np.array([[5, 5], [20, 5], [5, 20]]))
    ell = Region(3, "ellipse", np.array([[30, 0], [50, 10]]))  # centre (40, 5), half-axes 10 and 5
    x = np.array([5, 10, 12, 6, 40, 49.9, 40, 40, 100, np.nan])
    y = np.array([5, 10, 6, 12, 5, 5, 9.9, 10.1, 100, 1])
    lab = label_points(x, y, [rect, tri, ell])
    # (5,5) and the corner (10,10) belong to the rectangle (boundary inside, first region wins over the triangle)
    assert lab.tolist() == [1, 1, 2, 2, 3, 3, 3, 0, 0, 0]


def test_rotated_ellipse_by_corners():
    # 45-degree rotated box with half-axes 10*sqrt(2)/... : corners of a square rotated by 45 deg around (0, 0)
    c = np.array([[0, -10], [10, 0], [0, 10], [-10, 0]], float)
    ell = Region(1, "ellipse", c)  # circle of radius 5*sqrt(2) about the origin
    r = 5 * np.sqrt(2)
    lab = label_points(np.array([r - 1e-6, r + 1e-3, 0]), np.array([0, 0, 0]), [ell])
    assert lab.tolist() == [1, 0, 1]


def test_region_mask_matches_label_points():
    regs = [Region(1, "polygon", np.array([[2.2, 1.1], [17.5, 4.0], [9.0, 14.6]])),
            Region(2, "ellipse", np.array([[8, 8], [19, 15]]))]
    m = region_mask((16, 20), regs)
    yy, xx = np.mgrid[0:16, 0:20]
    lab = label_points(xx.ravel(), yy.ravel(), regs).reshape(16, 20)
    np.testing.assert_array_equal(m, lab)
    # triangle area by the shoelace formula: pixel count approximates it
    area = 0.5 * abs((17.5 - 2.2) * (14.6 - 1.1) - (9.0 - 2.2) * (4.0 - 1.1))
    assert abs((label_points(xx.ravel(), yy.ravel(), regs[:1]) == 1).sum() - area) < 0.15 * area


def test_region_validation():
    with pytest.raises(TenfoldInputError):
        Region(0, "rectangle", np.array([[0, 0], [1, 1]]))
    with pytest.raises(TenfoldInputError):
        Region(1, "circle", np.array([[0, 0], [1, 1]]))
    with pytest.raises(TenfoldInputError):
        Region(1, "polygon", np.array([[0, 0], [1, 1]]))
