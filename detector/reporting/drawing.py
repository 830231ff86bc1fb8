"""How boxes are drawn, the same in the galleries, the plots and the legends: the marks of
the score report (:data:`BOX_STYLES`), :func:`draw_box` over a dark outline, gallery
:func:`thumbnail` s and their crop (:func:`crop_around`), and :func:`write_png`.

Matched detections solid, false alarms dashed, missed objects dotted, in three hues taken from
the colour-blind-safe set of Okabe & Ito (2008, "Color Universal Design"). Every box is drawn
over a dark outline so that it stays visible on light and dark backgrounds.
"""

from __future__ import annotations

import os
from typing import Callable, Sequence

import numpy as np

from detector.errors import InputError
from detector.io.files import write_bytes

__all__ = [
    "BOX_STYLES",
    "THUMBNAIL_SIZE",
    "bgr",
    "crop_around",
    "draw_box",
    "hex_colour",
    "thumbnail",
    "write_png",
]

#: Side of a gallery thumbnail, in pixels.
THUMBNAIL_SIZE = 128


#: How boxes are drawn: kind -> (RGB colour, line style, legend text). Hues from Okabe & Ito
#: (2008): bluish green, vermillion and yellow; the line styles tell them apart in gray print too.
BOX_STYLES = {
    "matched": ((0, 158, 115), "solid", "matched detection"),
    "false alarm": ((213, 94, 0), "dashed", "false alarm"),
    "missed": ((240, 228, 66), "dotted", "missed object"),
}


_OUTLINE_BGR = (24, 24, 24)


def hex_colour(rgb: tuple[int, int, int]) -> str:
    return "#{:02x}{:02x}{:02x}".format(*rgb)


def bgr(rgb: tuple[int, int, int]) -> tuple[int, int, int]:
    return int(rgb[2]), int(rgb[1]), int(rgb[0])


def _dash_segments(p0, p1, on: float, off: float):
    p0, p1 = np.asarray(p0, dtype=np.float64), np.asarray(p1, dtype=np.float64)
    length = float(np.hypot(*(p1 - p0)))
    if length == 0:
        return
    step = (p1 - p0) / length
    t = 0.0
    while t < length:
        yield p0 + step * t, p0 + step * min(t + on, length)
        t += on + off


def draw_box(img: np.ndarray, box: Sequence[float], rgb: tuple[int, int, int], style: str,
             thickness: int) -> None:
    """Draw an ``x, y, width, height`` box (pixel coordinates of ``img``) in a line style, over a
    dark outline."""
    import cv2

    x, y, w, h = (float(v) for v in box)
    corners = [(x, y), (x + w, y), (x + w, y + h), (x, y + h)]
    edges = list(zip(corners, corners[1:] + corners[:1]))
    colour = bgr(rgb)

    def pt(p):
        return int(round(p[0])), int(round(p[1]))

    for layer, (col, extra) in enumerate(((_OUTLINE_BGR, 2), (colour, 0))):
        t = thickness + extra
        if style == "solid":
            cv2.rectangle(img, pt(corners[0]), pt(corners[2]), col, t, cv2.LINE_AA)
        elif style == "dashed":
            for a, b in edges:
                for s0, s1 in _dash_segments(a, b, on=6.0, off=5.0):
                    cv2.line(img, pt(s0), pt(s1), col, t, cv2.LINE_AA)
        elif style == "dotted":
            radius = max(1, (t + 1) // 2)
            for a, b in edges:
                for s0, _ in _dash_segments(a, b, on=0.0, off=max(5.0, 2.5 * t)):
                    cv2.circle(img, pt(s0), radius, col, -1, cv2.LINE_AA)
        else:
            raise ValueError(f"unknown line style {style!r}")


def crop_around(gray: np.ndarray, box: Sequence[float], size: int,
                context: float) -> tuple[np.ndarray, Callable]:
    """Square crop around ``box``: ``1 + 2 * context`` times its longer side (at least 32 pixels
    across), scaled to ``size`` by an affine warp so that parts outside the image (dark gray)
    and sub-pixel offsets are exact.

    Returns
    -------
    (ndarray of uint8, shape (size, size, 3), callable)
        The crop in BGR, and a function mapping an ``x, y, width, height`` box of the image
        to the crop's pixels.

    Examples
    --------
    >>> crop, local = crop_around(np.zeros((64, 64), np.uint8), (24, 24, 16, 16), 96, 1.0)
    >>> crop.shape, local((24, 24, 16, 16))   # the crop is 48 pixels wide, scaled by 2
    ((96, 96, 3), (32.0, 32.0, 32.0, 32.0))
    """
    import cv2

    x, y, w, h = (float(v) for v in box)
    side = max(32.0, max(w, h) * (1.0 + 2.0 * float(context)))
    x0, y0 = x + w / 2 - side / 2, y + h / 2 - side / 2
    scale = size / side
    matrix = np.array([[scale, 0.0, -x0 * scale], [0.0, scale, -y0 * scale]], dtype=np.float64)
    interp = cv2.INTER_AREA if scale < 1 else cv2.INTER_LINEAR
    crop = cv2.warpAffine(np.ascontiguousarray(gray, dtype=np.uint8), matrix, (size, size),
                          flags=interp, borderMode=cv2.BORDER_CONSTANT, borderValue=40)

    def local(b):
        bx, by, bw, bh = (float(v) for v in b)
        return ((bx - x0) * scale, (by - y0) * scale, bw * scale, bh * scale)

    return cv2.cvtColor(crop, cv2.COLOR_GRAY2BGR), local


def thumbnail(gray: np.ndarray, subject: tuple[Sequence[float], str],
              boxes: Sequence[tuple[Sequence[float], str]] = (), size: int = THUMBNAIL_SIZE,
              context: float = 1.0) -> np.ndarray:
    """A square colour thumbnail around one box, with the boxes near it drawn in their styles.

    Parameters
    ----------
    gray : ndarray of uint8, shape (H, W)
        The whole image.
    subject : tuple of (box, kind)
        The box the thumbnail is about (``x, y, width, height``) and its kind, a key of
        :data:`BOX_STYLES`; drawn thicker than the others.
    boxes : sequence of (box, kind)
        Other boxes of the image; drawn where they fall inside the thumbnail.
    size : int, default 128
        Side of the thumbnail, in pixels.
    context : float, default 1.0
        Margin around the subject on each side, as a share of its longer side (the crop is
        ``(1 + 2 * context)`` times the longer side, at least 32 pixels). Parts outside the image
        are dark gray.

    Returns
    -------
    ndarray of uint8, shape (size, size, 3)
        BGR, as cv2 writes it.

    Examples
    --------
    A 16-pixel box with the default context: the crop is 48 pixels wide, scaled by 128 / 48.

    >>> img = np.full((64, 64), 128, np.uint8)
    >>> thumb = thumbnail(img, ((24, 24, 16, 16), "matched"))
    >>> thumb.shape, thumb.dtype, tuple(int(v) for v in thumb[64, 64])  # middle: untouched gray
    ((128, 128, 3), dtype('uint8'), (128, 128, 128))
    """
    box, kind = subject
    out, local = crop_around(gray, box, size, context)
    for other, other_kind in boxes:
        lb = local(other)
        if lb[0] > size or lb[1] > size or lb[0] + lb[2] < 0 or lb[1] + lb[3] < 0:
            continue
        rgb, style, _ = BOX_STYLES[other_kind]
        draw_box(out, lb, rgb, style, 1)
    rgb, style, _ = BOX_STYLES[kind]
    draw_box(out, local(box), rgb, style, 2)
    return out


def write_png(path: str | os.PathLike, image: np.ndarray) -> None:
    """Write a BGR (as cv2 makes it) or gray uint8 picture as PNG, atomically
    (:func:`detector.io.files.write_bytes`)."""
    import cv2

    ok, data = cv2.imencode(".png", image)
    if not ok:  # pragma: no cover - cv2 encodes any uint8 BGR array
        raise InputError("cannot encode the picture", path=path)
    write_bytes(path, data.tobytes())
