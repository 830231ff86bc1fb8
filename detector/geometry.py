"""Box and window geometry: areas, intersection over union, greedy non-maximum suppression, the
window that stands for an object box (and back), and cutting a region out of an image.

Boxes are float64 arrays of shape ``(K, 4)`` holding ``x, y, width, height`` in pixels, with
``x, y`` the top-left corner (the glossary's convention). Areas are continuous, ``width * height``,
with no ``+1`` pixel convention, so a box ``(0, 0, 10, 10)`` covers 100 square pixels; this is the
convention of pycocotools' bounding-box IoU and of ``cv2.Rect2d``.
"""

from __future__ import annotations

import math

import cv2
from detector._jit import kernel
import numpy as np
from numpy.typing import ArrayLike

__all__ = ["as_boxes", "box_area", "iou", "iou_one_to_many", "nms", "crop_region",
           "window_box_to_object_box", "object_box_to_window_box"]


def as_boxes(boxes: ArrayLike) -> np.ndarray:
    """Return ``boxes`` as a float64 array of shape ``(K, 4)``.

    Parameters
    ----------
    boxes : array_like
        Anything that reshapes to rows of ``x, y, width, height``; an empty input gives ``(0, 4)``.

    Returns
    -------
    ndarray of float64, shape (K, 4)

    Raises
    ------
    ValueError
        If the input is neither one box of four values nor rows of four values.

    Examples
    --------
    >>> as_boxes([1, 2, 3, 4]).tolist()
    [[1.0, 2.0, 3.0, 4.0]]
    >>> as_boxes([]).shape
    (0, 4)
    """
    a = np.asarray(boxes, dtype=np.float64)
    if a.size == 0:
        return np.zeros((0, 4), dtype=np.float64)
    if not ((a.ndim == 1 and a.size == 4) or (a.ndim == 2 and a.shape[1] == 4)):
        raise ValueError(f"boxes must be rows of four values (x, y, width, height), got shape {a.shape}")
    return a.reshape(-1, 4)


def box_area(boxes: ArrayLike) -> np.ndarray:
    """Continuous area ``width * height`` of each box.

    Parameters
    ----------
    boxes : array_like, shape (K, 4)

    Returns
    -------
    ndarray of float64, shape (K,)

    Examples
    --------
    >>> box_area([[0, 0, 10, 10], [5, 5, 2.5, 4]]).tolist()
    [100.0, 10.0]
    """
    b = as_boxes(boxes)
    return b[:, 2] * b[:, 3]


def iou(a: ArrayLike, b: ArrayLike) -> np.ndarray:
    """Intersection over union of every box in ``a`` with every box in ``b``.

    The intersection width is ``min(xa + wa, xb + wb) - max(xa, xb)`` (zero when negative), the
    union is ``area_a + area_b - intersection``. This is the same arithmetic, in the same order, as
    pycocotools' bounding-box IoU, so the two agree to the last bit. Two boxes of zero area have
    IoU 0 (not NaN).

    Parameters
    ----------
    a : array_like, shape (N, 4)
    b : array_like, shape (M, 4)

    Returns
    -------
    ndarray of float64, shape (N, M)

    Examples
    --------
    Two 10 x 10 squares shifted by half a side share 50 of 150 square pixels:

    >>> iou([[0, 0, 10, 10]], [[5, 0, 10, 10], [20, 20, 5, 5]]).round(4).tolist()
    [[0.3333, 0.0]]
    """
    a = as_boxes(a)
    b = as_boxes(b)
    ax, ay, aw, ah = (a[:, i, None] for i in range(4))
    bx, by, bw, bh = (b[None, :, i] for i in range(4))
    w = np.minimum(ax + aw, bx + bw) - np.maximum(ax, bx)
    h = np.minimum(ay + ah, by + bh) - np.maximum(ay, by)
    inter = np.where((w > 0) & (h > 0), w * h, 0.0)
    union = (aw * ah + bw * bh) - inter
    out = np.zeros(inter.shape, dtype=np.float64)
    np.divide(inter, union, out=out, where=union > 0)
    return out


def iou_one_to_many(box: ArrayLike, boxes: ArrayLike) -> np.ndarray:
    """Intersection over union of one box with each of ``boxes``.

    Parameters
    ----------
    box : array_like, shape (4,)
    boxes : array_like, shape (M, 4)

    Returns
    -------
    ndarray of float64, shape (M,)

    See Also
    --------
    iou : all pairs.

    Examples
    --------
    >>> iou_one_to_many([0, 0, 10, 10], [[0, 0, 10, 5], [0, 0, 10, 10]]).tolist()
    [0.5, 1.0]
    """
    box = np.asarray(box, dtype=np.float64).reshape(4)
    return iou(box[None, :], boxes)[0]


def nms(boxes: ArrayLike, scores: ArrayLike, iou_threshold: float = 0.3) -> np.ndarray:
    """Greedy non-maximum suppression.

    Boxes are visited in descending score; a box is kept when its IoU with every box kept before it
    is at most ``iou_threshold``, and suppressed when the IoU with some kept box is strictly
    greater. Equal scores are visited in index order (a stable sort), lower index first. This is
    the behaviour of OpenCV's ``cv2.dnn.NMSBoxes`` (its loop keeps a box while
    ``overlap <= nms_threshold``, after a stable sort of the scores), which the tests hold this
    function equal to. ``iou_threshold=1`` keeps everything; ``iou_threshold=0`` keeps only boxes
    that share no area with any kept box. The loop is compiled with numba; ``_nms_numpy`` is its
    plain-numpy twin.

    Parameters
    ----------
    boxes : array_like, shape (K, 4)
        ``x, y, width, height``.
    scores : array_like, shape (K,)
        Higher is more object-like.
    iou_threshold : float, default 0.3
        In ``[0, 1]``.

    Returns
    -------
    ndarray of int64
        Indices into ``boxes`` of the kept boxes, in descending score (the order they were kept).

    Examples
    --------
    Box 1 overlaps box 0 by IoU 0.5 and is suppressed; box 2 is far away:

    >>> nms([[0, 0, 10, 10], [0, 0, 10, 5], [30, 30, 10, 10]], [0.9, 0.8, 0.7]).tolist()
    [0, 2]
    >>> nms([[0, 0, 10, 10], [0, 0, 10, 5]], [0.9, 0.8], iou_threshold=0.5).tolist()
    [0, 1]
    """
    b = as_boxes(boxes)
    s = np.asarray(scores, dtype=np.float64).reshape(-1)
    if len(s) != len(b):
        raise ValueError(f"nms: {len(b)} boxes but {len(s)} scores")
    if not 0.0 <= iou_threshold <= 1.0:
        raise ValueError(f"nms: iou_threshold must be in [0, 1], got {iou_threshold}")
    if np.isnan(s).any():
        raise ValueError("nms: scores contain NaN")
    order = np.argsort(-s, kind="stable").astype(np.int64)
    return _nms_numba(np.ascontiguousarray(b), order, float(iou_threshold))


@kernel(cache=True)
def _nms_numba(boxes, order, iou_threshold):  # pragma: no cover - compiled; held equal to _nms_numpy
    """Greedy suppression over boxes already ordered by descending score (compiled loop).

    Same arithmetic as :func:`iou` for each pair; a box is dropped when its IoU with a kept box is
    greater than ``iou_threshold``. Returns the kept indices in the order they were kept.
    """
    n = order.shape[0]
    suppressed = np.zeros(n, dtype=np.bool_)
    keep = np.empty(n, dtype=np.int64)
    k = 0
    for a in range(n):
        if suppressed[a]:
            continue
        i = order[a]
        keep[k] = i
        k += 1
        xi1 = boxes[i, 0]
        yi1 = boxes[i, 1]
        xi2 = xi1 + boxes[i, 2]
        yi2 = yi1 + boxes[i, 3]
        area_i = boxes[i, 2] * boxes[i, 3]
        for c in range(a + 1, n):
            if suppressed[c]:
                continue
            j = order[c]
            xj1 = boxes[j, 0]
            yj1 = boxes[j, 1]
            w = min(xi2, xj1 + boxes[j, 2]) - max(xi1, xj1)
            if not w > 0:
                continue
            h = min(yi2, yj1 + boxes[j, 3]) - max(yi1, yj1)
            if not h > 0:
                continue
            inter = w * h
            union = (area_i + boxes[j, 2] * boxes[j, 3]) - inter
            if union > 0 and inter / union > iou_threshold:
                suppressed[c] = True
    return keep[:k]


def _nms_numpy(boxes, order, iou_threshold):
    """Plain-numpy twin of :func:`_nms_numba` (the tests hold the two equal)."""
    x1, y1 = boxes[:, 0], boxes[:, 1]
    x2, y2 = x1 + boxes[:, 2], y1 + boxes[:, 3]
    area = boxes[:, 2] * boxes[:, 3]
    keep = []
    # Each pass keeps the best remaining box and drops every remaining box that overlaps it by more
    # than the threshold. The survivors overlap no kept box by more than the threshold, so the next
    # best survivor is exactly the box the one-at-a-time greedy loop would keep next.
    while order.size:
        i = order[0]
        keep.append(i)
        rest = order[1:]
        w = np.minimum(x2[i], x2[rest]) - np.maximum(x1[i], x1[rest])
        h = np.minimum(y2[i], y2[rest]) - np.maximum(y1[i], y1[rest])
        inter = np.where((w > 0) & (h > 0), w * h, 0.0)
        union = (area[i] + area[rest]) - inter
        overlap = np.zeros(inter.shape, dtype=np.float64)
        np.divide(inter, union, out=overlap, where=union > 0)
        order = rest[overlap <= iou_threshold]
    return np.asarray(keep, dtype=np.int64)


def crop_region(image: np.ndarray, center: tuple[float, float], size: tuple[float, float],
                window: tuple[int, int], angle: float = 0.0,
                mirror: bool = False) -> np.ndarray:
    """Cut a (possibly rotated) region of ``size=(width, height)`` around ``center`` and resize it
    to ``window=(W, H)`` with area averaging. Pixels outside the image repeat the border.

    The region is first warped at its own resolution (bilinear, only when rotated or at sub-pixel
    position), then shrunk with ``cv2.INTER_AREA``.

    >>> img = np.arange(100, dtype=np.uint8).reshape(10, 10)
    >>> crop_region(img, (5.0, 5.0), (4, 4), (4, 4)).tolist()[0]
    [33, 34, 35, 36]
    """
    W, H = window
    rw = max(1, int(round(size[0])))
    rh = max(1, int(round(size[1])))
    cx, cy = float(center[0]), float(center[1])
    # affine map from region pixel centres to image coordinates: rotate about the centre
    a = math.radians(angle)
    ca, sa = math.cos(a), math.sin(a)
    sx, sy = size[0] / rw, size[1] / rh
    # region pixel (u, v) centre -> offset from region centre
    m = np.array(
        [
            [ca * sx, -sa * sy, 0.0],
            [sa * sx, ca * sy, 0.0],
        ]
    )
    ou, ov = (rw - 1) / 2.0, (rh - 1) / 2.0
    m[0, 2] = cx - 0.5 - (m[0, 0] * ou + m[0, 1] * ov)
    m[1, 2] = cy - 0.5 - (m[1, 0] * ou + m[1, 1] * ov)
    region = cv2.warpAffine(
        image,
        m,
        (rw, rh),
        flags=cv2.INTER_LINEAR | cv2.WARP_INVERSE_MAP,
        borderMode=cv2.BORDER_REPLICATE,
    )
    if mirror:
        region = region[:, ::-1]
    if (rw, rh) != (W, H):
        interp = cv2.INTER_AREA if rw >= W and rh >= H else cv2.INTER_LINEAR
        region = cv2.resize(np.ascontiguousarray(region), (W, H), interpolation=interp)
    return np.ascontiguousarray(region, dtype=np.uint8)


def window_box_to_object_box(x: float, y: float, w: float, h: float,
                             margin: float) -> tuple[float, float, float, float]:
    """The object box a window stands for: the window shrunk by the context margin.

    >>> window_box_to_object_box(0.0, 0.0, 12.0, 12.0, 0.25)
    (2.0, 2.0, 8.0, 8.0)
    """
    k = 1.0 + 2.0 * margin
    bw, bh = w / k, h / k
    return x + (w - bw) / 2.0, y + (h - bh) / 2.0, bw, bh


def object_box_to_window_box(x: float, y: float, w: float, h: float,
                             margin: float) -> tuple[float, float, float, float]:
    """The window that stands for an object box: the box grown by the context margin."""
    ww, wh = w * (1.0 + 2.0 * margin), h * (1.0 + 2.0 * margin)
    return x - (ww - w) / 2.0, y - (wh - h) / 2.0, ww, wh
