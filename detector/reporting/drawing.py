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
    "draw_frame",
    "frame_marks",
    "place_labels",
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
    # a drawn frame without labels: every detection the same, in Okabe & Ito's blue
    "detection": ((0, 114, 178), "solid", "detection"),
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


def _overlap(a, b) -> bool:
    return a[0] < b[2] and b[0] < a[2] and a[1] < b[3] and b[1] < a[3]


def place_labels(boxes, sizes, canvas: tuple[int, int]) -> list:
    """Where the text labels of boxes go, so that no two overlap and each stays on the canvas:
    for box ``k`` (in the order given, most important first) the first of these rectangles of size
    ``sizes[k]`` that lies inside ``canvas = (width, height)`` and overlaps no label placed before:
    just above the box's top-left corner, inside it at the top-left, just below its bottom-left
    corner, then the same three at its right edge; ``None`` when none fits (the box is drawn
    without its label). Rectangles are ``(x0, y0, x1, y1)`` in integer pixels, half-open.

    >>> place_labels([[10, 10, 20, 20], [12, 10, 20, 20]], [(16, 8), (16, 8)], (100, 100))
    [(10, 2, 26, 10), (12, 10, 28, 18)]
    """
    width, height = canvas
    placed, out = [], []
    for box, (tw, th) in zip(np.asarray(boxes, dtype=np.float64).reshape(-1, 4), sizes):
        x, y, w, h = (int(round(v)) for v in box)
        tw, th = int(tw), int(th)
        spots = [(x, y - th), (x, y), (x, y + h), (x + w - tw, y - th), (x + w - tw, y),
                 (x + w - tw, y + h)]
        chosen = None
        for sx, sy in spots:
            rect = (sx, sy, sx + tw, sy + th)
            if (rect[0] >= 0 and rect[1] >= 0 and rect[2] <= width and rect[3] <= height
                    and not any(_overlap(rect, other) for other in placed)):
                chosen = rect
                break
        if chosen is not None:
            placed.append(chosen)
        out.append(chosen)
    return out


def frame_marks(boxes, scores, threshold: float = 0.0, truth_boxes=None,
                iou_threshold: float = 0.5):
    """What :func:`draw_frame` draws: ``(boxes, scores, kinds, missed)``, the detections scoring
    ``threshold`` or more in descending score with the kind of each (``"detection"``, or with
    ``truth_boxes`` ``"matched"`` / ``"false alarm"`` as
    :func:`detector.evaluation.match_image` matches them), and the labelled boxes no drawn
    detection matches.

    >>> b, s, kinds, missed = frame_marks([[0, 0, 10, 10], [50, 50, 9, 9]], [0.9, 0.6], 0.5,
    ...                                   [[0, 0, 10, 10], [90, 0, 10, 10]])
    >>> kinds, missed.tolist()
    (['matched', 'false alarm'], [[90.0, 0.0, 10.0, 10.0]])
    """
    from detector.evaluation import match_image

    boxes = np.asarray(boxes, dtype=np.float64).reshape(-1, 4)
    scores = np.asarray(scores, dtype=np.float64).reshape(-1)
    keep = scores >= threshold
    boxes, scores = boxes[keep], scores[keep]
    order = np.argsort(-scores, kind="stable")
    boxes, scores = boxes[order], scores[order]
    kinds = ["detection"] * len(boxes)
    missed = np.zeros((0, 4))
    if truth_boxes is not None:
        gt = np.asarray(truth_boxes, dtype=np.float64).reshape(-1, 4)
        matched, _ = match_image(boxes, scores, gt, iou_threshold)
        kinds = ["matched" if m >= 0 else "false alarm" for m in matched]
        found = np.zeros(len(gt), bool)
        found[matched[matched >= 0]] = True
        missed = gt[~found]
    return boxes, scores, kinds, missed


def draw_frame(gray: np.ndarray, name: str, boxes, scores, threshold: float = 0.0,
               truth: dict | None = None, iou_threshold: float = 0.5) -> np.ndarray:
    """A frame as a person reads it: the detections scoring ``threshold`` or more, each with its
    score where no other score covers it (:func:`place_labels`), and a legend in a strip below the
    frame (the drawing is taller than the frame; nothing covers it). With ``truth`` (image name ->
    labelled boxes), detections are matched at ``iou_threshold`` as the score report matches them
    (:func:`detector.evaluation.match_image`): matched solid, false alarms dashed, missed objects
    dotted (:data:`BOX_STYLES`); without it every detection is drawn alike.

    >>> img = draw_frame(np.zeros((40, 60), np.uint8), "a.png", [[5., 5., 20., 20.]], [0.9])
    >>> img.shape[1], img.shape[0] > 40          # the legend strip below the frame
    (60, True)
    """
    import cv2

    boxes, scores, kinds, missed = frame_marks(
        boxes, scores, threshold, None if truth is None else truth.get(name, np.zeros((0, 4))),
        iou_threshold)
    h, w = gray.shape
    font_scale = max(0.35, min(w, h) / 900)
    thick = max(1, int(round(min(w, h) / 400)))
    (_, th), base = cv2.getTextSize("0.00", cv2.FONT_HERSHEY_SIMPLEX, font_scale, 1)
    row_height = th + base + 10
    # the legend's entries, laid out in rows that fit the frame's width
    shown = ["detection"] if truth is None else ["matched", "false alarm", "missed"]
    entries = [(kind, BOX_STYLES[kind][2]) for kind in shown] + [(None, f"score >= {threshold:g}")]
    layout, x, row = [], 4, 0
    for kind, text in entries:
        (tw, _), _ = cv2.getTextSize(text, cv2.FONT_HERSHEY_SIMPLEX, font_scale, 1)
        need = tw + (22 if kind else 4)
        if x > 4 and x + need > w:
            x, row = 4, row + 1
        layout.append((kind, text, x, row))
        x += need + 12
    strip = row_height * (row + 1)
    im = np.full((h + strip, w, 3), 32, np.uint8)
    im[:h] = cv2.cvtColor(np.ascontiguousarray(gray), cv2.COLOR_GRAY2BGR)
    for box in missed:
        rgb, style, _ = BOX_STYLES["missed"]
        draw_box(im, box, rgb, style, thick)
    for box, kind in zip(boxes, kinds):
        rgb, style, _ = BOX_STYLES[kind]
        draw_box(im, box, rgb, style, thick)
    texts = [f"{s:.2f}" for s in scores]
    sizes = []
    for t in texts:
        (tw, tth), b = cv2.getTextSize(t, cv2.FONT_HERSHEY_SIMPLEX, font_scale, 1)
        sizes.append((tw + 4, tth + b + 2))
    for text, rect, kind in zip(texts, place_labels(boxes, sizes, (w, h)), kinds):
        if rect is None:
            continue
        cv2.rectangle(im, rect[:2], (rect[2] - 1, rect[3] - 1), bgr(BOX_STYLES[kind][0]), -1)
        cv2.putText(im, text, (rect[0] + 2, rect[3] - base - 1), cv2.FONT_HERSHEY_SIMPLEX,
                    font_scale, (0, 0, 0), 1, cv2.LINE_AA)
    # the legend, below the frame
    for kind, text, x, row in layout:
        top = h + row * row_height
        if kind is not None:
            rgb, style, _ = BOX_STYLES[kind]
            draw_box(im, (x, top + 4, 14, row_height - 9), rgb, style, 1)
            x += 18
        cv2.putText(im, text, (x, top + row_height - base - 4), cv2.FONT_HERSHEY_SIMPLEX,
                    font_scale, (235, 235, 235), 1, cv2.LINE_AA)
    return im
