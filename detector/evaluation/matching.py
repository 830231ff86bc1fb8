"""Matching detections to labelled boxes within one image (COCO's greedy rule; see
:mod:`detector.evaluation` for the conventions).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from numpy.typing import ArrayLike

import numpy as np

from detector._validation import check_real
from detector.geometry import as_boxes, iou
from detector.errors import InputError

__all__ = ["match_image"]

# --------------------------------------------------------------------------------------------
# matching


def _greedy_match(ious: np.ndarray, order: np.ndarray, thresholds: np.ndarray,
                  regular: np.ndarray | None = None,
                  reusable: np.ndarray | None = None) -> np.ndarray:
    """Greedy matching of one image for several (threshold, ignore-mask) rows at once.

    Parameters
    ----------
    ious : (K, G) float64
    order : (K,) int
        Detection indices in the order they are matched (descending score).
    thresholds : (R,) float64
    regular : (R, G) bool, optional
        ``False`` marks ground truth to ignore in that row: a detection is matched to the best
        regular box if it can be, and only otherwise to the best ignored one (pycocotools' rule).
    reusable : (G,) bool, optional
        Ground truth that any number of detections may match (ignore regions: the PASCAL VOC
        protocol's ``difficult`` objects, whose every detection is left out of the counts).

    Returns
    -------
    (R, K) int64
        Matched ground-truth index per row and detection, -1 for none.
    """
    n_rows = len(thresholds)
    n_det, n_gt = ious.shape
    matched = np.full((n_rows, n_det), -1, dtype=np.int64)
    if n_det == 0 or n_gt == 0:
        return matched
    taken = np.zeros((n_rows, n_gt), dtype=bool)
    thr = np.asarray(thresholds, dtype=np.float64)[:, None]
    lowest = thr.min()
    rows = np.arange(n_rows)
    for d in order:
        row = ious[d]
        if row.max() < lowest:  # matches nothing in any row: a false alarm everywhere
            continue
        ok = (row[None, :] >= thr) & ~taken
        if regular is not None:
            ok_regular = ok & regular
            ok = np.where(ok_regular.any(axis=1)[:, None], ok_regular, ok)
        candidate = np.where(ok, row[None, :], -1.0)
        # the last index of the highest IoU: equal IoUs go to the later box, as in pycocotools
        j = n_gt - 1 - np.argmax(candidate[:, ::-1], axis=1)
        hit = ok[rows, j]
        matched[hit, d] = j[hit]
        keep = hit if reusable is None else hit & ~reusable[j]
        taken[rows[keep], j[keep]] = True
    return matched


def _check_threshold(iou_threshold: float) -> float:
    return check_real(iou_threshold, "the IoU threshold", low=0, high=1, low_open=True)


def _image_arrays(name, boxes, scores=None):
    """Validated float64 boxes (and scores) of one image; InputError naming the image otherwise."""
    try:
        b = as_boxes(boxes)
    except ValueError as exc:
        raise InputError(f"image {name!r}: {exc}") from None
    if not np.isfinite(b).all():
        raise InputError(f"image {name!r}: box values must be finite numbers")
    if (b[:, 2:] <= 0).any():
        raise InputError(f"image {name!r}: box width and height must be > 0")
    if scores is None:
        return b
    s = np.asarray(scores, dtype=np.float64).reshape(-1)
    if len(s) != len(b):
        raise InputError(f"image {name!r}: {len(b)} boxes but {len(s)} scores")
    if not np.isfinite(s).all():
        raise InputError(f"image {name!r}: scores must be finite numbers")
    return b, s


def match_image(det_boxes: ArrayLike, det_scores: ArrayLike, gt_boxes: ArrayLike,
                iou_threshold: float = 0.5) -> tuple[np.ndarray, np.ndarray]:
    """Match the detections of one image to its ground-truth boxes.

    Detections are visited in descending score (equal scores in input order); each takes the still
    unmatched ground-truth box of highest IoU at or above ``iou_threshold`` (equal IoUs: the later
    box); each ground-truth box is matched at most once, so duplicates are false alarms.

    Parameters
    ----------
    det_boxes : array_like, shape (K, 4)
    det_scores : array_like, shape (K,)
    gt_boxes : array_like, shape (G, 4)
    iou_threshold : float, default 0.5
        In ``(0, 1]``; inclusive.

    Returns
    -------
    matched : ndarray of int64, shape (K,)
        Per detection (input order), the index of its ground-truth box, or -1 for a false alarm.
    overlap : ndarray of float64, shape (K,)
        Per detection, the IoU with its matched box; for a false alarm, its highest IoU with any
        ground-truth box (0 when the image has none).

    Examples
    --------
    Two detections of the same box: the higher-scoring one takes it, the other is a duplicate.

    >>> m, o = match_image([[0, 0, 10, 10], [1, 0, 10, 10]], [0.6, 0.9], [[0, 0, 10, 10]])
    >>> m.tolist(), o.round(3).tolist()
    ([-1, 0], [1.0, 0.818])
    """
    det_b, det_s = _image_arrays("<detections>", det_boxes, det_scores)
    gt_b = _image_arrays("<ground truth>", gt_boxes)
    t = _check_threshold(iou_threshold)
    ious = iou(det_b, gt_b)
    order = np.argsort(-det_s, kind="stable")
    matched = _greedy_match(ious, order, np.array([t]))[0]
    if gt_b.shape[0] == 0:
        return matched, np.zeros(len(det_b), dtype=np.float64)
    best = ious.max(axis=1) if len(det_b) else np.zeros(0)
    hit = matched >= 0
    overlap = best.copy()
    overlap[hit] = ious[np.flatnonzero(hit), matched[hit]]
    return matched, overlap
