"""One frame of the demo scenario: an inspection camera looking down on a conveyor belt.

The belt runs left to right between two guard rails (top and bottom of the frame). On it lie hex
nuts (the labelled class) among look-alikes that are never labelled: washers, square nuts, screw
heads (slotted, cross or hex socket) and debris (blobs, chips, wire bits). The camera adds a
lighting gradient, mild optical blur and sensor noise.

Shapes are shaded at pixel centres and anti-aliased by their distance to the edge; a nut's outline
is covered exactly: pixels along the hexagon's edges are supersampled with ``SUPERSAMPLE x
SUPERSAMPLE`` points, which also gives the set of pixels the nut was drawn into (its mask). Nut boxes come from the exact hexagon clipped to the visible
belt (the rails hide what lies under them, the frame edge cuts the rest), rounded outward to 0.5 px.
A nut with less than half of its area visible is drawn but not labelled.

Coordinates are continuous pixel-edge coordinates (see :mod:`synthetic_images.geometry`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import cv2
import numpy as np

from synthetic_images.geometry import (
    box_around,
    clip_polygon,
    hexagon_box_side,
    hexagon_corners,
    visible_fraction,
)

SUPERSAMPLE = 4
"""Sample points per pixel side along a nut's outline (16 samples per pixel)."""

NUT_SIZES = (20.0, 120.0)
"""Smallest and largest nut size in pixels: the longer side of a fully visible nut's box."""

LABELLED_SHARE = 0.5
"""A nut is labelled when at least this share of its area is visible."""

FRAME_LIMITS = (160, 4096)
"""Smallest and largest frame side in pixels."""

_REFERENCE_AREA = 320.0 * 240.0
_NORMALS = np.deg2rad(np.arange(30.0, 360.0, 60.0))  # hexagon edge normals, local frame


@dataclass(frozen=True)
class PlacedNut:
    """One hex nut drawn in a frame, labelled or not.

    Attributes
    ----------
    center : tuple of float
        ``x, y`` of the centre (pixel-edge coordinates; may lie outside the frame).
    size : float
        Longer side of the nut's box if it were fully visible, in pixels.
    angle : float
        In-plane rotation in radians.
    polygon : ndarray of float64, shape (6, 2)
        The hexagon's corners before clipping.
    visible_fraction : float
        Share of the hexagon's area on the visible belt (not under a rail, inside the frame).
    labelled : bool
        ``visible_fraction >= LABELLED_SHARE``.
    mask : ndarray of bool, shape (height, width)
        The visible pixels the nut was drawn into.
    box : ndarray of float64, shape (4,)
        ``x, y, width, height`` around the visible part of the hexagon, rounded outward to 0.5 px
        (all zeros when nothing is visible).
    """

    center: tuple[float, float]
    size: float
    angle: float
    polygon: np.ndarray
    visible_fraction: float
    labelled: bool
    mask: np.ndarray
    box: np.ndarray


@dataclass(frozen=True)
class RenderedFrame:
    """A rendered frame with its labels and the ground truth behind them.

    Attributes
    ----------
    image : ndarray of uint8, shape (height, width)
        The grayscale frame.
    boxes : ndarray of float64, shape (K, 4)
        ``x, y, width, height`` of the labelled nuts (K may be 0).
    masks : list of ndarray of bool, shape (height, width)
        Drawn visible pixels of each labelled nut, in the order of ``boxes``.
    nuts : list of PlacedNut
        Every nut drawn, including those hidden more than half (not labelled).
    belt_rows : tuple of int
        First belt row and one past the last; rows outside are guard rail.
    """

    image: np.ndarray
    boxes: np.ndarray
    masks: list
    nuts: list
    belt_rows: tuple[int, int]


# ----------------------------------------------------------------------------------------------
# drawing: shading at pixel centres, exact coverage of polygon edges


def _patch(cx: float, cy: float, reach: float, width: int, height: int):
    """Pixel bounds ``(x0, y0, x1, y1)`` of the frame area within ``reach`` of a centre, or None."""
    x0 = max(0, int(math.floor(cx - reach)) - 1)
    y0 = max(0, int(math.floor(cy - reach)) - 1)
    x1 = min(width, int(math.ceil(cx + reach)) + 1)
    y1 = min(height, int(math.ceil(cy + reach)) + 1)
    if x0 >= x1 or y0 >= y1:
        return None
    return x0, y0, x1, y1


def _local(bounds, cx: float, cy: float, angle: float):
    """Pixel centres of a patch in an object's own frame: ``u`` along its angle, ``v`` across."""
    x0, y0, x1, y1 = bounds
    xs = np.arange(x0, x1, dtype=np.float64) + 0.5 - cx
    ys = np.arange(y0, y1, dtype=np.float64) + 0.5 - cy
    c, s = math.cos(angle), math.sin(angle)
    u = xs[None, :] * c + ys[:, None] * s
    v = -xs[None, :] * s + ys[:, None] * c
    return u, v


def _inside(signed_distance: np.ndarray) -> np.ndarray:
    """Approximate pixel coverage of the region where a signed distance is negative."""
    return np.clip(0.5 - signed_distance, 0.0, 1.0)


def _mix(a, b, t):
    return a + (b - a) * t


def _convex_cover(bounds, polygon: np.ndarray) -> np.ndarray:
    """Exact supersampled coverage of each pixel by a convex polygon (corners counter-clockwise
    or clockwise), ``SUPERSAMPLE x SUPERSAMPLE`` sample points per pixel.

    Pixels farther than 0.75 px from every edge line are wholly in or out (the half-plane
    distances bound the distance to the polygon), so only the band along the outline is sampled.
    """
    x0, y0, x1, y1 = bounds
    p = np.asarray(polygon, dtype=np.float64)
    q = np.roll(p, -1, axis=0)
    edge = q - p
    normal = np.stack([edge[:, 1], -edge[:, 0]], axis=1)
    normal /= np.hypot(normal[:, 0], normal[:, 1])[:, None]
    centre = p.mean(axis=0)
    sign = np.where(((centre - p) * normal).sum(axis=1) > 0.0, -1.0, 1.0)  # outward normals
    normal *= sign[:, None]
    offset = (normal * p).sum(axis=1)

    def distance(x, y):
        d = None
        for (nx, ny), c in zip(normal, offset):
            e = x * nx + y * ny - c
            d = e if d is None else np.maximum(d, e)
        return d

    xs = np.arange(x0, x1, dtype=np.float64) + 0.5
    ys = np.arange(y0, y1, dtype=np.float64) + 0.5
    d = distance(xs[None, :], ys[:, None])
    cover = (d <= -0.75).astype(np.float64)
    band = np.abs(d) < 0.75
    if band.any():
        sub = (np.arange(SUPERSAMPLE, dtype=np.float64) + 0.5) / SUPERSAMPLE - 0.5
        ox, oy = np.meshgrid(sub, sub)
        rows, cols = np.nonzero(band)
        sx = xs[cols][:, None] + ox.ravel()[None, :]
        sy = ys[rows][:, None] + oy.ravel()[None, :]
        cover[rows, cols] = (distance(sx, sy) <= 0.0).mean(axis=1)
    return cover


def _paint(canvas: np.ndarray, bounds, cover: np.ndarray, value: np.ndarray) -> None:
    """Composite ``value`` over ``canvas`` with per-pixel ``cover`` in 0..1."""
    x0, y0, x1, y1 = bounds
    region = canvas[y0:y1, x0:x1]
    region += (value - region) * cover


def _darken(canvas: np.ndarray, bounds, strength: np.ndarray) -> None:
    """Multiply ``canvas`` by ``1 - strength``."""
    x0, y0, x1, y1 = bounds
    canvas[y0:y1, x0:x1] *= 1.0 - strength


def _soft(signed_distance: np.ndarray, soft: float) -> np.ndarray:
    """1 well inside, 0 well outside, a linear ramp ``2 * soft`` pixels wide across the edge."""
    return np.clip((soft - signed_distance) / (2.0 * soft), 0.0, 1.0)


def _hex_distance(u: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Largest projection on the six edge normals of a hexagon centred at ``u = v = 0`` whose
    corners lie on the ``u`` axis and every 60 degrees; it is <= the apothem inside."""
    c, s = math.cos(math.pi / 6.0), math.sin(math.pi / 6.0)
    # opposite edges share a normal up to sign: three projections suffice
    d = np.abs(v)
    d = np.maximum(d, np.abs(u * c + v * s))
    return np.maximum(d, np.abs(u * c - v * s))


def _facet_shade(u: np.ndarray, v: np.ndarray, dist: np.ndarray, light_angle: float) -> np.ndarray:
    """``cos`` of the angle between the lamp and the outward normal of the nearest hexagon edge."""
    shade = np.full(u.shape, math.cos(_NORMALS[0] - light_angle))
    for n in _NORMALS[1:]:
        proj = u * math.cos(n) + v * math.sin(n)
        shade = np.where(proj >= dist, math.cos(n - light_angle), shade)
    return shade


def _light_local(light: float, angle: float):
    a = light - angle
    return math.cos(a), math.sin(a)


def _ridge(x: np.ndarray, half_width: float) -> np.ndarray:
    """A triangular bump of height 1 at ``x == 0``, ``half_width`` pixels to either side."""
    return np.clip(1.0 - np.abs(x) / half_width, 0.0, 1.0)


def _metal_top(u, v, radius, base, light, angle, rng, hole, chamfer):
    """Shading shared by hex and square nuts: flat top face, chamfer, specular ring, threaded hole."""
    lx, ly = _light_local(light, angle)
    r = np.hypot(u, v)
    lit = (u * lx + v * ly) / radius  # -1..1 across the part, towards the lamp
    shine = max(0.35 * base, 45.0)
    turning = 1.0 + 0.025 * np.sin(r * (2.0 * math.pi / max(3.5, 0.08 * radius)))
    face = base * (1.0 + 0.10 * lit) * turning
    # conical chamfer outside the chamfer circle: brightness follows the surface direction
    cone = base * (0.72 + 0.34 * (u * lx + v * ly) / np.maximum(r, 1e-9))
    value = _mix(face, cone, _inside(chamfer - r))
    ring = max(1.2, 0.05 * radius)
    value = value + shine * _ridge(r - chamfer + 0.5 * ring, ring) * (0.6 + 0.4 * lit)
    # threaded hole: dark thread ring, bright lip on the far side, shadowed belt seen through it
    thread = base * 0.42 * (0.85 + 0.15 * np.sin(r * (2.0 * math.pi / max(3.0, 0.06 * radius))))
    thread = thread * (1.0 - 0.25 * lit)
    inner = rng.uniform(14.0, 40.0)
    in_hole = _mix(thread, inner, _inside(r - 0.78 * hole))
    value = _mix(value, in_hole, _inside(r - hole))
    return value + 0.6 * shine * _ridge(r - hole, ring) * np.clip(-2.0 * lit, 0.0, 1.0)


def _draw_hex_nut(canvas, rng, cx, cy, radius, angle, base, light, width, height):
    """Draw one hex nut with its cast shadow; return its exact coverage and the patch bounds."""
    apothem = radius * math.cos(math.pi / 6.0)
    offset = 0.1 * radius
    soft = max(1.0, 0.05 * radius)
    bounds = _patch(cx, cy, radius + offset + soft + 1.0, width, height)
    if bounds is None:
        return None, None
    su, sv = _local(bounds, cx - offset * math.cos(light), cy - offset * math.sin(light), angle)
    _darken(canvas, bounds, rng.uniform(0.25, 0.45) * _soft(_hex_distance(su, sv) - apothem, soft))
    u, v = _local(bounds, cx, cy, angle)
    dist = _hex_distance(u, v)
    r = np.hypot(u, v)
    hole = apothem * rng.uniform(0.50, 0.62)
    chamfer = apothem * rng.uniform(0.90, 0.99)
    value = _metal_top(u, v, radius, base, light, angle, rng, hole, chamfer)
    # the six flats catch the light differently: one shade per facet along the outline
    lx, ly = _light_local(light, angle)
    facet_light = _facet_shade(u, v, dist, math.atan2(ly, lx))
    near_edge = _inside(apothem - max(1.0, 0.07 * radius) - dist) * (r > hole)
    value = value * _mix(1.0, 0.85 + 0.2 * facet_light, near_edge)
    cover = _convex_cover(bounds, hexagon_corners(cx, cy, radius, angle))
    _paint(canvas, bounds, cover, value)
    return cover, bounds


def _draw_square_nut(canvas, rng, cx, cy, size, angle, base, light, width, height):
    half = size / 2.0
    radius = half * math.sqrt(2.0)
    off = 0.05 * size
    bounds = _patch(cx, cy, radius + off + 2.0, width, height)
    if bounds is None:
        return
    su, sv = _local(bounds, cx - off * math.cos(light), cy - off * math.sin(light), angle)
    _darken(canvas, bounds, 0.3 * _soft(np.maximum(np.abs(su), np.abs(sv)) - half, 1.0))
    u, v = _local(bounds, cx, cy, angle)
    value = _metal_top(u, v, radius, base, light, angle, rng, half * rng.uniform(0.45, 0.6),
                       half * rng.uniform(0.95, 1.15))
    _paint(canvas, bounds, _inside(np.maximum(np.abs(u), np.abs(v)) - half), value)


def _draw_washer(canvas, rng, cx, cy, radius, angle, base, light, width, height):
    off = 0.04 * radius
    bounds = _patch(cx, cy, radius + off + 2.0, width, height)
    if bounds is None:
        return
    hole = radius * rng.uniform(0.38, 0.55)
    su, sv = _local(bounds, cx - off * math.cos(light), cy - off * math.sin(light), 0.0)
    sr = np.hypot(su, sv)
    _darken(canvas, bounds, 0.3 * _soft(sr - radius, 1.0) * _soft(hole - sr, 1.0))
    u, v = _local(bounds, cx, cy, angle)
    r = np.hypot(u, v)
    lx, ly = _light_local(light, angle)
    lit = (u * lx + v * ly) / radius
    cos2 = 2.0 * ((u * lx + v * ly) / np.maximum(r, 1e-9)) ** 2 - 1.0  # brushed sheen, twofold
    value = base * (0.9 + 0.14 * cos2 + 0.08 * lit)
    shine = max(0.3 * base, 40.0)
    w = max(1.2, 0.06 * radius)
    value = value + shine * _ridge(r - radius + w, w) * np.clip(lit + 0.3, 0.0, 1.0)
    value = value + shine * _ridge(r - hole - w, w) * np.clip(0.3 - lit, 0.0, 1.0)
    _paint(canvas, bounds, _inside(r - radius) * _inside(hole - r), value)


def _draw_screw_head(canvas, rng, cx, cy, radius, angle, base, light, width, height):
    off = 0.08 * radius
    soft = max(1.0, 0.08 * radius)
    bounds = _patch(cx, cy, radius + off + soft + 1.0, width, height)
    if bounds is None:
        return
    su, sv = _local(bounds, cx - off * math.cos(light), cy - off * math.sin(light), 0.0)
    _darken(canvas, bounds, 0.4 * _soft(np.hypot(su, sv) - radius, soft))
    u, v = _local(bounds, cx, cy, angle)
    r = np.hypot(u, v)
    lx, ly = _light_local(light, angle)
    dome = np.sqrt(np.clip(1.0 - (r / radius) ** 2, 0.0, 1.0))
    value = base * (0.55 + 0.45 * dome)
    hx, hy = 0.4 * radius * lx, 0.4 * radius * ly
    spot = np.exp(-((u - hx) ** 2 + (v - hy) ** 2) / (2.0 * (0.22 * radius) ** 2))
    value = value + max(0.5 * base, 50.0) * spot
    kind = rng.integers(3)
    t = max(0.8, 0.09 * radius)
    slot = np.maximum(np.abs(v) - t, np.abs(u) - 0.85 * radius)
    if kind == 0:  # slot
        recess = slot
    elif kind == 1:  # cross
        recess = np.minimum(np.maximum(np.abs(v) - t, np.abs(u) - 0.6 * radius),
                            np.maximum(np.abs(u) - t, np.abs(v) - 0.6 * radius))
    else:  # hex socket
        recess = _hex_distance(u, v) - 0.32 * radius
    value = _mix(value, base * 0.22 + 8.0, _inside(recess))
    _paint(canvas, bounds, _inside(r - radius), value)


def _draw_debris(canvas, rng, cx, cy, radius, angle, base, light, width, height):
    bounds = _patch(cx, cy, radius * 1.7 + 2.0, width, height)
    if bounds is None:
        return
    u, v = _local(bounds, cx, cy, angle)
    if rng.random() < 0.55:  # blob: dirt, a drop of oil, a crumb
        phi = np.arctan2(v, u)
        edge = np.full_like(phi, radius)
        for m in (2, 3, 4, 5):
            edge = edge + radius * rng.uniform(-0.18, 0.18) * np.cos(m * phi + rng.uniform(0, 2 * math.pi))
        cover = _inside(np.hypot(u, v) - edge)
        value = base * (0.85 + 0.25 * (u * rng.uniform(-1, 1) + v * rng.uniform(-1, 1)) / radius)
    else:  # chip or bit of wire: a thin rotated bar
        half_len = radius * rng.uniform(1.0, 1.6)
        half_w = max(0.7, radius * rng.uniform(0.12, 0.3))
        cover = _inside(np.maximum(np.abs(u) - half_len, np.abs(v) - half_w))
        value = base * (0.75 + 0.5 * _ridge(v + 0.3 * half_w, half_w))
    _paint(canvas, bounds, cover, value)


# ----------------------------------------------------------------------------------------------
# belt, rails, camera


def _smooth_noise(rng, shape_small, width, height, interpolation=cv2.INTER_CUBIC):
    small = rng.standard_normal(size=shape_small, dtype=np.float32)
    return cv2.resize(small, (width, height), interpolation=interpolation).astype(np.float64)


def _belt(rng, width: int, height: int, level: float) -> np.ndarray:
    """Textured belt: low-frequency patches, horizontal streaks, a faint weave, a few stains."""
    sx = max(2, width // 48)
    sy = max(2, height // 48)
    belt = level + rng.uniform(4.0, 9.0) * _smooth_noise(rng, (sy, sx), width, height)
    belt += rng.uniform(2.0, 5.0) * _smooth_noise(rng, (height, max(2, width // 24)), width, height,
                                                  cv2.INTER_LINEAR)
    px, py = rng.uniform(3.0, 6.0), rng.uniform(3.0, 6.0)
    weave_x = np.sin(2.0 * math.pi * (np.arange(width) + 0.5) / px)
    weave_y = np.sin(2.0 * math.pi * (np.arange(height) + 0.5) / py)
    belt += rng.uniform(0.5, 2.0) * weave_y[:, None] * weave_x[None, :]
    for _ in range(rng.poisson(2.0 * width * height / _REFERENCE_AREA)):
        x, y = rng.uniform(0, width), rng.uniform(0, height)
        sxx, syy = rng.uniform(4.0, 25.0), rng.uniform(3.0, 12.0)
        b = _patch(x, y, 3.0 * max(sxx, syy), width, height)
        if b is None:
            continue
        u, v = _local(b, x, y, 0.0)
        stain = np.exp(-(u**2 / (2.0 * sxx**2) + v**2 / (2.0 * syy**2)))
        belt[b[1]:b[3], b[0]:b[2]] -= rng.uniform(4.0, 14.0) * stain
    return belt


def _rails(canvas: np.ndarray, rng, top: int, bottom: int) -> None:
    """Paint the guard rails over rows ``[0, top)`` and ``[bottom, height)``, with their shadows."""
    height, width = canvas.shape
    level = rng.uniform(32.0, 62.0)
    streaks = rng.uniform(2.0, 5.0) * _smooth_noise(rng, (height, max(2, width // 40)), width, height,
                                                    cv2.INTER_LINEAR)
    for start, stop, lip_at_end in ((0, top, True), (bottom, height, False)):
        rows = np.arange(start, stop, dtype=np.float64) + 0.5
        t = (rows - start) / max(1, stop - start)
        profile = level * (0.75 + 0.45 * np.sin(math.pi * t) ** 0.7)
        band = profile[:, None] + streaks[start:stop]
        # bright lip along the edge that faces the belt, a dark seam right at the edge
        lip_rows = np.arange(stop - start)
        dist_to_edge = (stop - start - 1 - lip_rows) if lip_at_end else lip_rows
        band += rng.uniform(45.0, 80.0) * np.exp(-((dist_to_edge - 2.0) ** 2) / 2.0)[:, None]
        band[dist_to_edge == 0] *= 0.55
        canvas[start:stop] = band
        # rivets along the middle of the rail
        spacing = rng.uniform(50.0, 80.0)
        r = max(1.5, 0.18 * (stop - start))
        cy = (start + stop) / 2.0
        for cx in np.arange(rng.uniform(0.0, spacing), width, spacing):
            b = _patch(cx, cy, r + 1.0, width, height)
            if b is None:
                continue
            u, v = _local(b, cx, cy, 0.0)
            rr = np.hypot(u, v)
            head = np.sqrt(np.clip(1.0 - (rr / r) ** 2, 0.0, 1.0))
            _paint(canvas, b, _inside(rr - r), level * (0.7 + 0.9 * head) - 10.0 * v / r)
    # shadow of each rail on the belt next to it
    depth = rng.uniform(0.25, 0.45)
    reach = int(rng.integers(3, 8))
    ramp = depth * (1.0 - (np.arange(reach) + 0.5) / reach)
    n = min(reach, bottom - top)
    canvas[top:top + n] *= (1.0 - ramp[:n])[:, None]
    canvas[bottom - n:bottom] *= (1.0 - ramp[:n][::-1])[:, None]


def _lighting(rng, width: int, height: int) -> np.ndarray:
    """Multiplicative lamp field: a tilt across the frame and a fall-off towards one corner."""
    xx = (np.arange(width, dtype=np.float64) + 0.5) / width - 0.5
    yy = (np.arange(height, dtype=np.float64) + 0.5) / height - 0.5
    ax, ay = rng.uniform(-0.3, 0.3, size=2)
    fx, fy = rng.uniform(-0.3, 0.3, size=2)
    fall = rng.uniform(0.0, 0.6)
    field = 1.0 + ax * xx[None, :] + ay * yy[:, None]
    field -= fall * ((xx[None, :] - fx) ** 2 + (yy[:, None] - fy) ** 2)
    return field


# ----------------------------------------------------------------------------------------------
# placement


def _log_uniform(rng, lo: float, hi: float) -> float:
    return float(math.exp(rng.uniform(math.log(lo), math.log(hi))))


def _free(placed, cx, cy, radius, is_nut) -> bool:
    """Nuts never overlap each other (circumscribed circles apart); other objects may touch."""
    for px, py, pr, p_nut in placed:
        d = math.hypot(cx - px, cy - py)
        if is_nut and p_nut:
            if d < pr + radius + 1.0:
                return False
        elif d < 0.85 * (pr + radius):
            return False
    return True


def _position(rng, half_w, half_h, width, top, bottom, straddle: bool):
    """A centre fully on the visible belt, or (straddle) near a rail or frame edge."""
    lo_x, hi_x = half_w, width - half_w
    lo_y, hi_y = top + half_h, bottom - half_h
    x = rng.uniform(lo_x, hi_x) if hi_x > lo_x else width / 2.0
    y = rng.uniform(lo_y, hi_y) if hi_y > lo_y else (top + bottom) / 2.0
    if straddle:
        side = rng.choice(4, p=[0.35, 0.35, 0.15, 0.15])
        # from 0.6 of a half-extent beyond the edge to just fully inside
        if side == 0:
            y = top + half_h * rng.uniform(-0.6, 1.0)
        elif side == 1:
            y = bottom - half_h * rng.uniform(-0.6, 1.0)
        elif side == 2:
            x = half_w * rng.uniform(-0.6, 1.0)
        else:
            x = width - half_w * rng.uniform(-0.6, 1.0)
    return float(x), float(y)


_DISTRACTORS = ("washer", "square nut", "screw head", "debris")
_DISTRACTOR_SHARES = (0.27, 0.2, 0.27, 0.26)


def _draw_distractor(kind, canvas, rng, cx, cy, radius, angle, base, light, width, height):
    if kind == "washer":
        _draw_washer(canvas, rng, cx, cy, radius, angle, base, light, width, height)
    elif kind == "square nut":
        _draw_square_nut(canvas, rng, cx, cy, radius * math.sqrt(2.0), angle, base, light, width, height)
    elif kind == "screw head":
        _draw_screw_head(canvas, rng, cx, cy, radius, angle, base, light, width, height)
    else:
        _draw_debris(canvas, rng, cx, cy, radius, angle, base, light, width, height)


def _object_level(rng, belt_level: float) -> float:
    """Brightness of a part: most are lighter than the belt, about a quarter darker."""
    if rng.random() < 0.25:
        return float(rng.uniform(30.0, max(35.0, belt_level - 25.0)))
    return float(rng.uniform(min(belt_level + 30.0, 200.0), 215.0))


# ----------------------------------------------------------------------------------------------


def render_frame(rng=None, width: int = 320, height: int = 240, *, empty: bool = False) -> RenderedFrame:
    """Render one grayscale frame of hex nuts and look-alikes on a conveyor belt.

    Parameters
    ----------
    rng : numpy.random.Generator or int or None
        Source of randomness; an int is a seed for ``numpy.random.default_rng``.
    width, height : int
        Frame size in pixels, each in ``FRAME_LIMITS``.
    empty : bool
        Draw no nuts at all (only belt, rails and look-alikes).

    Returns
    -------
    RenderedFrame
        The uint8 image, the labelled boxes, their masks and a record of every nut drawn.

    Raises
    ------
    ValueError
        A frame side outside ``FRAME_LIMITS``.

    Examples
    --------
    >>> frame = render_frame(7)
    >>> frame.image.shape, frame.image.dtype, frame.boxes.shape[1]
    ((240, 320), dtype('uint8'), 4)
    """
    rng = np.random.default_rng(rng)
    width, height = int(width), int(height)
    lo, hi = FRAME_LIMITS
    if not (lo <= width <= hi and lo <= height <= hi):
        raise ValueError(f"frame size {width}x{height} outside {lo}..{hi} pixels per side")
    scale = width * height / _REFERENCE_AREA

    top = int(round(height * rng.uniform(0.07, 0.11)))
    bottom = height - int(round(height * rng.uniform(0.07, 0.11)))
    belt_level = float(rng.uniform(85.0, 120.0))
    light = float(rng.uniform(0.0, 2.0 * math.pi))
    canvas = _belt(rng, width, height, belt_level)

    largest = min(NUT_SIZES[1], 0.8 * (bottom - top))
    placed = []  # (cx, cy, circumradius, is_nut)
    nut_plan = []
    n_nuts = 0 if empty else int(min(1 + rng.poisson(1.6 * scale), max(2, round(8 * scale))))
    for i in range(n_nuts):
        for _ in range(40):
            size = _log_uniform(rng, NUT_SIZES[0], largest)
            angle = float(rng.uniform(0.0, 2.0 * math.pi))
            radius = size / hexagon_box_side(angle)
            corners = hexagon_corners(0.0, 0.0, radius, angle)
            half_w, half_h = corners[:, 0].max(), corners[:, 1].max()
            straddle = i > 0 and rng.random() < 0.25
            cx, cy = _position(rng, half_w, half_h, width, top, bottom, straddle)
            if _free(placed, cx, cy, radius, True):
                placed.append((cx, cy, radius, True))
                nut_plan.append((cx, cy, size, angle, radius))
                break

    n_other = int(rng.poisson(3.5 * scale))
    other_plan = []
    for _ in range(n_other):
        kind = _DISTRACTORS[rng.choice(len(_DISTRACTORS), p=_DISTRACTOR_SHARES)]
        for _ in range(20):
            if kind == "debris":
                radius = _log_uniform(rng, 2.0, 14.0)
            else:
                radius = _log_uniform(rng, 8.0, 0.5 * largest)
            straddle = rng.random() < 0.25
            cx, cy = _position(rng, radius, radius, width, top, bottom, straddle)
            if _free(placed, cx, cy, radius, False):
                placed.append((cx, cy, radius, False))
                other_plan.append((kind, cx, cy, radius, float(rng.uniform(0.0, 2.0 * math.pi))))
                break

    for kind, cx, cy, radius, angle in other_plan:
        base = _object_level(rng, belt_level)
        _draw_distractor(kind, canvas, rng, cx, cy, radius, angle, base, light, width, height)

    nuts = []
    for cx, cy, size, angle, radius in nut_plan:
        base = _object_level(rng, belt_level)
        cover, bounds = _draw_hex_nut(canvas, rng, cx, cy, radius, angle, base, light, width, height)
        mask = np.zeros((height, width), dtype=bool)
        if cover is not None:
            x0, y0, x1, y1 = bounds
            mask[y0:y1, x0:x1] = cover > 0.0
        mask[:top] = False
        mask[bottom:] = False
        polygon = hexagon_corners(cx, cy, radius, angle)
        share = visible_fraction(polygon, 0.0, float(top), float(width), float(bottom))
        seen = clip_polygon(polygon, 0.0, float(top), float(width), float(bottom))
        box = box_around(seen) if len(seen) else np.zeros(4)
        nuts.append(PlacedNut((cx, cy), size, angle, polygon, share, share >= LABELLED_SHARE, mask, box))

    _rails(canvas, rng, top, bottom)
    canvas *= _lighting(rng, width, height)
    canvas = cv2.GaussianBlur(canvas, (0, 0), float(rng.uniform(0.5, 1.0)))
    noise_floor, shot = rng.uniform(1.5, 3.0), rng.uniform(0.01, 0.04)
    sigma = np.sqrt(noise_floor**2 + shot * np.clip(canvas, 0.0, None))
    canvas += sigma * rng.standard_normal(canvas.shape)
    image = np.clip(np.rint(canvas), 0, 255).astype(np.uint8)

    labelled = [n for n in nuts if n.labelled]
    boxes = np.array([n.box for n in labelled], dtype=np.float64).reshape(-1, 4)
    return RenderedFrame(image, boxes, [n.mask for n in labelled], nuts, (top, bottom))
