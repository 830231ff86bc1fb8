"""Plane geometry for the demo scenario: hexagon corners, polygon clipping, areas, label boxes.

Coordinates are continuous pixel-edge coordinates, the convention of the labels CSV: pixel
(row ``r``, column ``c``) covers ``x`` in ``[c, c + 1)`` and ``y`` in ``[r, r + 1)``, so its centre
is ``(c + 0.5, r + 0.5)`` and a box ``x, y, width, height`` starts at the top-left corner of its
first pixel.
"""

from __future__ import annotations

import math

import numpy as np

_CORNER_ANGLES = np.deg2rad(np.arange(0.0, 360.0, 60.0))


def hexagon_corners(cx: float, cy: float, radius: float, angle: float) -> np.ndarray:
    """Corners of a regular hexagon, in order around it.

    Parameters
    ----------
    cx, cy : float
        Centre, pixel-edge coordinates.
    radius : float
        Circumradius (centre to corner) in pixels.
    angle : float
        Rotation in radians; at 0 the first corner points along +x.

    Returns
    -------
    ndarray of float64, shape (6, 2)
        ``x, y`` of each corner.

    Examples
    --------
    >>> hexagon_corners(0.0, 0.0, 2.0, 0.0)[[0, 3]].round(12) + 0.0
    array([[ 2.,  0.],
           [-2.,  0.]])
    """
    a = float(angle) + _CORNER_ANGLES
    return np.stack([cx + radius * np.cos(a), cy + radius * np.sin(a)], axis=1).astype(np.float64)


def hexagon_box_side(angle: float) -> float:
    """Longer side of the bounding box of a hexagon with circumradius 1 at ``angle``.

    It lies between ``2 cos 15°`` (about 1.932) and 2: a regular hexagon's box is nearly square
    at every rotation.

    Examples
    --------
    >>> round(hexagon_box_side(0.0), 6)
    2.0
    """
    c = hexagon_corners(0.0, 0.0, 1.0, angle)
    return float(max(np.ptp(c[:, 0]), np.ptp(c[:, 1])))


def polygon_area(polygon: np.ndarray) -> float:
    """Area of a simple polygon by the shoelace formula (0 for fewer than 3 corners).

    Examples
    --------
    >>> polygon_area(np.array([[0.0, 0.0], [4.0, 0.0], [4.0, 3.0], [0.0, 3.0]]))
    12.0
    """
    p = np.asarray(polygon, dtype=np.float64).reshape(-1, 2)
    if len(p) < 3:
        return 0.0
    x, y = p[:, 0], p[:, 1]
    return float(abs(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1))) / 2.0)


def clip_polygon(polygon: np.ndarray, x0: float, y0: float, x1: float, y1: float) -> np.ndarray:
    """Clip a convex polygon to the rectangle ``[x0, x1] x [y0, y1]``.

    Sutherland-Hodgman clipping (Sutherland and Hodgman, "Reentrant polygon clipping",
    Communications of the ACM, 1974), one rectangle side at a time.

    Returns
    -------
    ndarray of float64, shape (M, 2)
        The clipped polygon; ``M == 0`` when nothing is left.

    Examples
    --------
    >>> square = np.array([[-1.0, -1.0], [1.0, -1.0], [1.0, 1.0], [-1.0, 1.0]])
    >>> polygon_area(clip_polygon(square, 0.0, 0.0, 5.0, 5.0))
    1.0
    """
    pts = [tuple(p) for p in np.asarray(polygon, dtype=np.float64).reshape(-1, 2)]
    # each side: (axis, bound, keep points with coordinate >= bound if sign > 0 else <=)
    for axis, bound, sign in ((0, x0, 1.0), (0, x1, -1.0), (1, y0, 1.0), (1, y1, -1.0)):
        if not pts:
            break
        out = []
        for i, cur in enumerate(pts):
            prev = pts[i - 1]
            cur_in = sign * (cur[axis] - bound) >= 0.0
            prev_in = sign * (prev[axis] - bound) >= 0.0
            if cur_in != prev_in:
                t = (bound - prev[axis]) / (cur[axis] - prev[axis])
                cross = (prev[0] + t * (cur[0] - prev[0]), prev[1] + t * (cur[1] - prev[1]))
                cross = (bound, cross[1]) if axis == 0 else (cross[0], bound)
                out.append(cross)
            if cur_in:
                out.append(cur)
        pts = out
    return np.asarray(pts, dtype=np.float64).reshape(-1, 2)


def box_around(polygon: np.ndarray, step: float = 0.5) -> np.ndarray:
    """Bounding box ``x, y, width, height`` of a polygon, rounded outward to a multiple of ``step``.

    Examples
    --------
    >>> box_around(np.array([[10.2, 5.0], [20.7, 5.0], [15.0, 9.1]]))
    array([10. ,  5. , 11. ,  4.5])
    """
    p = np.asarray(polygon, dtype=np.float64).reshape(-1, 2)
    lo = np.floor(p.min(axis=0) / step) * step
    hi = np.ceil(p.max(axis=0) / step) * step
    return np.array([lo[0], lo[1], hi[0] - lo[0], hi[1] - lo[1]], dtype=np.float64)


def visible_fraction(polygon: np.ndarray, x0: float, y0: float, x1: float, y1: float) -> float:
    """Share of a convex polygon's area that lies inside the rectangle ``[x0, x1] x [y0, y1]``.

    Examples
    --------
    >>> round(visible_fraction(hexagon_corners(0.0, 10.0, 5.0, 0.3), 0.0, 0.0, 50.0, 50.0), 6)
    0.5
    """
    full = polygon_area(polygon)
    if full <= 0.0 or not math.isfinite(full):
        return 0.0
    return polygon_area(clip_polygon(polygon, x0, y0, x1, y1)) / full
