"""Scoring detections against labelled boxes: matching, precision-recall, average precision, miss
rate against false positives per image, per-size figures, and the per-image error lists.

Everything here works on plain per-image arrays (boxes ``(K, 4)`` of ``x, y, width, height`` and
scores ``(K,)``); reading files is the job of :mod:`detector.io.labels` and the command line.

Conventions, stated once:

- Matching (COCO style; Lin et al., 2014, as implemented by pycocotools): within an image the
  detections are visited in descending score; each is matched to the *still unmatched* ground-truth
  box of highest IoU **at or above** the IoU threshold; a ground-truth box is matched at most once,
  so a second detection of the same object is a false alarm. Equal IoUs go to the later
  ground-truth box in the image's list, as pycocotools does. (The PASCAL VOC devkit differs: it
  takes the best ground truth over *all* boxes and calls the detection a false alarm when that box
  is already taken.)
- Order of detections: descending score; equal scores keep the order of the images (sorted by
  name) and, within an image, the order of the input list (stable sorts, as pycocotools does with
  its merge sorts). The precision-recall curve has one point per detection in that order.
- A threshold ``t`` keeps the detections with ``score >= t``. With tied scores only the last point
  of a tie is reachable by a threshold; the best-F1 point, :func:`operating_point`,
  :func:`recall_at_fppi`, :func:`fppi_at_recall` and the log-average miss rate use those
  reachable points only.
- Undefined figures are ``nan``: every recall-based figure (recall, miss rate, average precision,
  best F1, log-average miss rate) when there is no ground-truth box at all (pycocotools reports
  -1 there); with ground truth but no detections, average precision is 0, the curves are empty
  arrays and the log-average miss rate is 1.
- Object sizes (COCO's limits): a box is *small* when ``width * height < 32**2``, *medium* when
  ``32**2 <= width * height < 96**2`` and *large* when ``width * height >= 96**2``, i.e. by the square
  root of the area in pixels. The buckets here are half-open so that they split the objects;
  pycocotools uses closed ranges, so a box of area exactly ``32**2`` or ``96**2`` counts in two of
  its buckets. Within a bucket, ground truth outside the bucket is ignored (a detection matched to
  it counts neither way, and regular boxes are preferred when matching), and unmatched detections
  whose area is outside the bucket are ignored, as pycocotools does.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Mapping

import numpy as np

from detector.boxes import as_boxes, iou
from detector._validation import check_real, json_safe
from detector.errors import InputError

__all__ = [
    "COCO_IOU_THRESHOLDS",
    "COCO_RECALL_POINTS",
    "DEFAULT_SIZE_BUCKETS",
    "LOG_AVERAGE_FPPI",
    "VOC2007_RECALL_POINTS",
    "Evaluation",
    "FalseAlarm",
    "Figures",
    "ImageErrors",
    "Miss",
    "OperatingPoint",
    "average_precision",
    "evaluate",
    "fppi_at_recall",
    "log_average_miss_rate",
    "match_image",
    "operating_point",
    "recall_at_fppi",
]

#: IoU thresholds 0.50:0.05:0.95 of the COCO average precision, built exactly as pycocotools builds
#: them (``np.linspace``), so that threshold comparisons agree bit for bit.
COCO_IOU_THRESHOLDS = np.linspace(0.5, 0.95, 10)
#: The 101 recall points 0:0.01:1 of COCO's interpolated precision (built as pycocotools does).
COCO_RECALL_POINTS = np.linspace(0.0, 1.0, 101)
#: The 11 recall points 0, 0.1, ..., 1 of PASCAL VOC 2007. Written as ``k / 10`` so that a recall
#: such as 3/10 compares equal to the point 0.3 (``np.arange(0, 1.1, 0.1)`` gives 0.30000000000000004).
VOC2007_RECALL_POINTS = np.arange(11) / 10.0
#: Nine false-positives-per-image values evenly spaced in log space from 0.01 to 1
#: (Dollar et al., PAMI 2012, log-average miss rate).
LOG_AVERAGE_FPPI = np.logspace(-2.0, 0.0, 9)
#: Object-size buckets by the square root of the box area, in pixels: ``name -> (low, high)``,
#: half-open ``low <= sqrt(area) < high``; COCO's limits 32 and 96.
DEFAULT_SIZE_BUCKETS = {"small": (0.0, 32.0), "medium": (32.0, 96.0), "large": (96.0, math.inf)}


# --------------------------------------------------------------------------------------------
# result types


@dataclass
class OperatingPoint:
    """A reachable score threshold and what it gives.

    Attributes
    ----------
    threshold : float
        Keep detections with ``score >= threshold``.
    precision, recall, false_alarms_per_image : float
    """

    threshold: float
    precision: float
    recall: float
    false_alarms_per_image: float

    def to_dict(self) -> dict:
        """Plain JSON-ready types (``nan`` becomes ``None``)."""
        return json_safe(self)


@dataclass
class ImageErrors:
    """One row of the per-image error table (at the evaluation's IoU threshold, every size)."""

    image: str
    objects: int
    detections: int
    true_detections: int
    false_alarms: int
    misses: int

    def to_dict(self) -> dict:
        """Plain JSON-ready types."""
        return json_safe(self)


@dataclass
class FalseAlarm:
    """A detection that matched no ground-truth box.

    ``iou`` is its highest IoU with any ground-truth box of the image (0 when there is none), which
    tells a badly placed box (high) from a detection of background (zero) or a duplicate.
    """

    image: str
    box: np.ndarray
    score: float
    iou: float

    def to_dict(self) -> dict:
        """Plain JSON-ready types."""
        return json_safe(self)


@dataclass
class Miss:
    """A ground-truth box that no detection matched.

    ``best_score`` is the highest score among detections overlapping it with any IoU > 0
    (``nan`` when none does), which tells a weak detection from no detection at all.
    """

    image: str
    box: np.ndarray
    best_score: float

    def to_dict(self) -> dict:
        """Plain JSON-ready types."""
        return json_safe(self)


@dataclass
class Figures:
    """Counts, curves and summary figures for one set of objects (all of them, or one size bucket).

    Attributes
    ----------
    iou_threshold : float
        IoU at or above which a detection matches a ground-truth box.
    size_range : tuple of float or None
        ``(low, high)`` bounds on ``sqrt(width * height)`` for a size bucket, ``None`` for all sizes.
    images : int
        Labelled images (every one counts, with or without detections).
    objects : int
        Ground-truth boxes.
    detections : int
        Detections taken into account (in a size bucket, those not ignored).
    true_detections, false_alarms, misses : int
        At the IoU threshold, keeping every detection.
    thresholds, precision, recall, false_alarms_per_image, miss_rate : ndarray of float64
        The curves, one point per detection in descending score; point ``i`` is what keeping the
        first ``i + 1`` detections gives. ``miss_rate = 1 - recall``.
    average_precision : float
        All-point interpolated AP (PASCAL VOC from 2010; Everingham et al., IJCV 2010).
    average_precision_11_point : float
        11-point interpolated AP (PASCAL VOC 2007).
    average_precision_101_point : float
        101-point interpolated AP at ``iou_threshold`` (COCO's sampling; "AP50" at 0.5).
    average_precision_50_to_95 : float
        101-point AP averaged over the IoU thresholds 0.50:0.05:0.95 (COCO; Lin et al., 2014).
    best_f1, best_f1_threshold, best_f1_precision, best_f1_recall,
    best_f1_false_alarms_per_image : float
        The reachable threshold of highest F1 (the highest such threshold on ties).
    log_average_miss_rate : float
        Dollar et al. (PAMI 2012); see :func:`log_average_miss_rate`.
    """

    iou_threshold: float
    size_range: tuple | None
    images: int
    objects: int
    detections: int
    true_detections: int
    false_alarms: int
    misses: int
    thresholds: np.ndarray
    precision: np.ndarray
    recall: np.ndarray
    false_alarms_per_image: np.ndarray
    miss_rate: np.ndarray
    average_precision: float
    average_precision_11_point: float
    average_precision_101_point: float
    average_precision_50_to_95: float
    best_f1: float
    best_f1_threshold: float
    best_f1_precision: float
    best_f1_recall: float
    best_f1_false_alarms_per_image: float
    log_average_miss_rate: float

    def to_dict(self) -> dict:
        """Plain JSON-ready types: arrays become lists, ``nan`` and infinity become ``None``."""
        return json_safe(self)


@dataclass
class Evaluation(Figures):
    """Everything :func:`evaluate` measures.

    Attributes
    ----------
    (all of :class:`Figures`, for objects of every size)
    buckets : dict of str to Figures
        The same figures per object-size bucket.
    per_image : list of ImageErrors
        One row per labelled image, sorted by image name.
    false_alarm_list : list of FalseAlarm
        Every false alarm, highest score first.
    miss_list : list of Miss
        Every missed ground-truth box, by image name and then label order.
    unlabelled_images : list of str
        Images that have detections but are not in the ground truth (left out of every figure).
    unlabelled_detections : int
        The detections on those images.
    """

    buckets: dict = field(default_factory=dict)
    per_image: list = field(default_factory=list)
    false_alarm_list: list = field(default_factory=list)
    miss_list: list = field(default_factory=list)
    unlabelled_images: list = field(default_factory=list)
    unlabelled_detections: int = 0


# --------------------------------------------------------------------------------------------
# matching


def _greedy_match(ious: np.ndarray, order: np.ndarray, thresholds: np.ndarray,
                  regular: np.ndarray | None = None) -> np.ndarray:
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
        taken[rows[hit], j[hit]] = True
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


def match_image(det_boxes, det_scores, gt_boxes, iou_threshold: float = 0.5):
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


# --------------------------------------------------------------------------------------------
# curve summaries


def average_precision(precision, recall, method: str = "all-points") -> float:
    """Average precision of a precision-recall curve.

    Parameters
    ----------
    precision, recall : array_like, shape (D,)
        One point per detection in descending score (recall non-decreasing).
    method : {"all-points", "11-point", "101-point"}
        - ``"all-points"``: PASCAL VOC from 2010 (Everingham et al., IJCV 2010): the area under the
          interpolated envelope ``p_interp(r) = max(precision at recall >= r)``, summed over the
          recall steps; recall beyond the last point adds 0.
        - ``"11-point"``: PASCAL VOC 2007: the mean of ``p_interp`` at recall 0, 0.1, ..., 1
          (0 where recall never reaches the point).
        - ``"101-point"``: COCO (Lin et al., 2014): the same mean at recall 0, 0.01, ..., 1.

    Returns
    -------
    float
        0 for an empty curve; ``nan`` if recall is undefined (no ground truth).

    Examples
    --------
    Four objects; detections true, false, true, false, true. Precision 1, 1/2, 2/3, 2/4, 3/5 at
    recall 1/4, 1/4, 2/4, 2/4, 3/4; the envelope is 1 up to 1/4, 2/3 up to 1/2, 3/5 up to 3/4:
    all-point AP = 1/4 * 1 + 1/4 * 2/3 + 1/4 * 3/5 = 17/30.

    >>> p = [1, 1/2, 2/3, 2/4, 3/5]; r = [1/4, 1/4, 2/4, 2/4, 3/4]
    >>> round(average_precision(p, r), 6), round(average_precision(p, r, "11-point"), 6)
    (0.566667, 0.563636)
    """
    p = np.asarray(precision, dtype=np.float64).reshape(-1)
    r = np.asarray(recall, dtype=np.float64).reshape(-1)
    if len(p) != len(r):
        raise ValueError(f"average_precision: {len(p)} precision values but {len(r)} recall values")
    if np.isnan(r).any():
        return math.nan
    if len(p) == 0:
        return 0.0
    if method == "all-points":
        mrec = np.concatenate([[0.0], r, [1.0]])
        mpre = np.concatenate([[0.0], p, [0.0]])
        mpre = np.maximum.accumulate(mpre[::-1])[::-1]
        i = np.flatnonzero(mrec[1:] != mrec[:-1]) + 1
        return float(np.sum((mrec[i] - mrec[i - 1]) * mpre[i]))
    if method == "11-point":
        points = VOC2007_RECALL_POINTS
    elif method == "101-point":
        points = COCO_RECALL_POINTS
    else:
        raise ValueError(f"average_precision: unknown method {method!r}; "
                         "use 'all-points', '11-point' or '101-point'")
    return _sampled_ap(p, r, points)


def _sampled_ap(p: np.ndarray, r: np.ndarray, points: np.ndarray) -> float:
    """Mean of the interpolated precision at the given recall points (0 beyond the curve)."""
    if len(p) == 0:
        return 0.0
    envelope = np.maximum.accumulate(p[::-1])[::-1]
    idx = np.searchsorted(r, points, side="left")
    reached = idx < len(p)
    q = np.where(reached, envelope[np.minimum(idx, len(p) - 1)], 0.0)
    return float(np.mean(q))


def log_average_miss_rate(false_alarms_per_image, miss_rate, reference=None) -> float:
    """Log-average miss rate (Dollar et al., PAMI 2012).

    For each reference FPPI value ``f`` (by default nine values evenly spaced in log space from
    0.01 to 1) take the miss rate of the curve point with the largest FPPI not exceeding ``f``
    (the last such point in curve order, i.e. the lowest miss rate at that FPPI); if no point
    qualifies, the miss rate of the curve's first point (its highest). The result is the geometric
    mean of those nine miss rates, each clamped below at 1e-10 so that a zero miss rate does not
    take the log to minus infinity (the clamp is the usual one, from memory).

    :func:`evaluate` passes the curve of reachable thresholds preceded by the point
    ``(FPPI 0, miss rate 1)`` of keeping no detection, so that a reference FPPI smaller than every
    point's FPPI reads a miss rate of 1.

    Parameters
    ----------
    false_alarms_per_image, miss_rate : array_like, shape (D,)
        The curve in descending score (FPPI non-decreasing).
    reference : array_like, optional
        Reference FPPI values; default :data:`LOG_AVERAGE_FPPI`.

    Returns
    -------
    float
        1 for an empty curve (nothing detected); ``nan`` if the miss rate is undefined.

    Examples
    --------
    A curve through (FPPI 0, 0.8), (0.02, 0.6), (0.05, 0.5), (0.2, 0.4), (0.5, 0.3), (2, 0.1):
    the nine references 0.01, 0.018, 0.032, 0.056, 0.1, 0.18, 0.32, 0.56, 1 read 0.8, 0.8, 0.6,
    0.5, 0.5, 0.5, 0.4, 0.3, 0.3, whose product is 0.001728 = 0.12**3, so the geometric mean is
    0.12 ** (1/3):

    >>> lamr = log_average_miss_rate([0, 0.02, 0.05, 0.2, 0.5, 2], [0.8, 0.6, 0.5, 0.4, 0.3, 0.1])
    >>> round(lamr, 6), round(0.12 ** (1 / 3), 6)
    (0.493242, 0.493242)
    """
    f = np.asarray(false_alarms_per_image, dtype=np.float64).reshape(-1)
    m = np.asarray(miss_rate, dtype=np.float64).reshape(-1)
    if len(f) != len(m):
        raise ValueError(f"log_average_miss_rate: {len(f)} FPPI values but {len(m)} miss rates")
    ref = LOG_AVERAGE_FPPI if reference is None else np.asarray(reference, dtype=np.float64)
    if np.isnan(m).any() or np.isnan(f).any():
        return math.nan
    if len(f) == 0:
        return 1.0
    # index of the last point with FPPI <= reference (FPPI is non-decreasing along the curve)
    idx = np.searchsorted(f, ref, side="right") - 1
    at = np.where(idx >= 0, m[np.maximum(idx, 0)], m[0])
    return float(np.exp(np.mean(np.log(np.maximum(at, 1e-10)))))


# --------------------------------------------------------------------------------------------
# figures from matched detections


def _reachable(thresholds: np.ndarray) -> np.ndarray:
    """Mask of the curve points a score threshold can produce: the last point of each tie."""
    n = len(thresholds)
    if n == 0:
        return np.zeros(0, dtype=bool)
    return np.concatenate([thresholds[:-1] != thresholds[1:], [True]])


def _figures(scores, is_true, coco_true, n_objects, n_images, iou_threshold, size_range) -> dict:
    """Counts, curves and summaries from detections already sorted by descending score.

    ``is_true`` are the true-detection flags at ``iou_threshold``; ``coco_true`` is a list of flag
    arrays, one per COCO IoU threshold, over the detections taken into account at that threshold.
    """
    n = len(scores)
    tp = np.cumsum(is_true, dtype=np.float64)
    kept = np.arange(1, n + 1, dtype=np.float64)
    fp = kept - tp
    precision = tp / kept if n else np.zeros(0)
    if n_objects > 0:
        recall = tp / n_objects
    else:
        recall = np.full(n, np.nan)
    fppi = fp / n_images if n_images > 0 else np.full(n, np.nan)
    miss = 1.0 - recall
    n_true = int(tp[-1]) if n else 0

    def ap101(flags):
        if n_objects == 0:
            return math.nan
        t = np.cumsum(flags, dtype=np.float64)
        k = np.arange(1, len(flags) + 1, dtype=np.float64)
        return _sampled_ap(t / k, t / n_objects, COCO_RECALL_POINTS)

    reach = _reachable(scores)
    if n_objects == 0:
        best = dict(best_f1=math.nan, best_f1_threshold=math.nan, best_f1_precision=math.nan,
                    best_f1_recall=math.nan, best_f1_false_alarms_per_image=math.nan)
    elif not reach.any():
        best = dict(best_f1=0.0, best_f1_threshold=math.nan, best_f1_precision=math.nan,
                    best_f1_recall=0.0, best_f1_false_alarms_per_image=0.0)
    else:
        idx = np.flatnonzero(reach)
        p, r = precision[idx], recall[idx]
        f1 = np.zeros(len(idx))
        np.divide(2 * p * r, p + r, out=f1, where=(p + r) > 0)
        i = idx[int(np.argmax(f1))]
        best = dict(best_f1=float(f1.max()), best_f1_threshold=float(scores[i]),
                    best_f1_precision=float(precision[i]), best_f1_recall=float(recall[i]),
                    best_f1_false_alarms_per_image=float(fppi[i]))
    if n_objects and n_images:  # the curve starts at "keep nothing": FPPI 0, miss rate 1
        lamr = log_average_miss_rate(np.concatenate([[0.0], fppi[reach]]),
                                     np.concatenate([[1.0], miss[reach]]))
    else:
        lamr = math.nan
    return dict(
        iou_threshold=float(iou_threshold), size_range=size_range, images=int(n_images),
        objects=int(n_objects), detections=int(n), true_detections=n_true,
        false_alarms=int(n - n_true), misses=int(n_objects - n_true),
        thresholds=np.asarray(scores, dtype=np.float64), precision=precision, recall=recall,
        false_alarms_per_image=fppi, miss_rate=miss,
        average_precision=(average_precision(precision, recall, "all-points")
                           if n_objects else math.nan),
        average_precision_11_point=(average_precision(precision, recall, "11-point")
                                    if n_objects else math.nan),
        average_precision_101_point=ap101(is_true),
        average_precision_50_to_95=(float(np.mean([ap101(c) for c in coco_true]))
                                    if n_objects else math.nan),
        log_average_miss_rate=lamr, **best)


def evaluate(detections: Mapping, ground_truth: Mapping, iou_threshold: float = 0.5,
             size_buckets: Mapping | None = DEFAULT_SIZE_BUCKETS) -> Evaluation:
    """Score detections against ground truth over a set of images.

    Parameters
    ----------
    detections : mapping of str to (boxes, scores)
        Per image, boxes ``(K, 4)`` and scores ``(K,)``; images may be missing or have K = 0.
    ground_truth : mapping of str to boxes
        Per labelled image, boxes ``(G, 4)``; G = 0 for an object-free image. Every labelled image
        counts (in the number of images that FPPI divides by, and with its objects) whether or
        not it has detections. Detections on images not in ``ground_truth`` are counted in
        ``unlabelled_images`` / ``unlabelled_detections`` and left out of every figure.
    iou_threshold : float, default 0.5
        IoU at or above which a detection matches; used for the curves, the all-point, 11-point
        and 101-point AP, best F1, the miss-rate figures and the error lists. The 0.50:0.95
        average always uses :data:`COCO_IOU_THRESHOLDS`.
    size_buckets : mapping of str to (low, high), optional
        Object-size buckets by ``sqrt(width * height)`` in pixels, half-open ``[low, high)``;
        default :data:`DEFAULT_SIZE_BUCKETS` (COCO's limits 32 and 96). ``None`` or ``{}`` for none.

    Returns
    -------
    Evaluation
        See the module notes for the matching rule, tie order and undefined values.

    Raises
    ------
    InputError
        Malformed arrays (naming the image) or an IoU threshold outside (0, 1].

    Examples
    --------
    One image with two objects; a hit, a duplicate of it, and nothing on the second object:

    >>> ev = evaluate({"a.png": ([[0, 0, 10, 10], [1, 1, 10, 10]], [0.9, 0.8])},
    ...               {"a.png": [[0, 0, 10, 10], [50, 50, 10, 10]]}, size_buckets=None)
    >>> ev.true_detections, ev.false_alarms, ev.misses, ev.precision.tolist(), ev.recall.tolist()
    (1, 1, 1, [1.0, 0.5], [0.5, 0.5])
    >>> ev.average_precision
    0.5
    """
    t = _check_threshold(iou_threshold)
    buckets = dict(size_buckets or {})
    for name, rng in buckets.items():
        try:
            lo, hi = (float(v) for v in rng)
        except (TypeError, ValueError):
            raise InputError(f"size bucket {name!r}: give (low, high) in pixels, got {rng!r}") from None
        if not 0.0 <= lo < hi:
            raise InputError(f"size bucket {name!r}: need 0 <= low < high, got ({lo}, {hi})")
        buckets[name] = (lo, hi)

    labelled = sorted(ground_truth)
    unlabelled = sorted(set(detections) - set(ground_truth))
    unlabelled_count = 0
    for name in unlabelled:
        value = detections[name]
        if not (isinstance(value, (tuple, list)) and len(value) == 2):
            raise InputError(f"image {name!r}: detections must be a pair (boxes, scores)")
        unlabelled_count += len(_image_arrays(name, *value)[0])

    thresholds = np.concatenate([[t], COCO_IOU_THRESHOLDS])
    n_thr = len(thresholds)
    configs = [None] + list(buckets.values())  # None: every size
    n_rows = n_thr * len(configs)
    row_thresholds = np.tile(thresholds, len(configs))

    per_scores, per_true, per_ignored = [], [], []
    n_objects = np.zeros(len(configs), dtype=np.int64)
    per_image, false_alarms, misses = [], [], []
    for name in labelled:
        gt = _image_arrays(name, ground_truth[name])
        value = detections.get(name, (np.zeros((0, 4)), np.zeros(0)))
        if not (isinstance(value, (tuple, list)) and len(value) == 2):
            raise InputError(f"image {name!r}: detections must be a pair (boxes, scores)")
        det, scores = _image_arrays(name, *value)
        order = np.argsort(-scores, kind="stable")
        ious = iou(det, gt)
        gt_area, det_area = gt[:, 2] * gt[:, 3], det[:, 2] * det[:, 3]
        regular = np.ones((n_rows, len(gt)), dtype=bool)
        outside = np.zeros((n_rows, len(det)), dtype=bool)
        for c, rng in enumerate(configs):
            if rng is None:
                n_objects[c] += len(gt)
                continue
            lo2, hi2 = rng[0] ** 2, rng[1] ** 2
            inside_gt = (gt_area >= lo2) & (gt_area < hi2)
            n_objects[c] += int(inside_gt.sum())
            regular[c * n_thr:(c + 1) * n_thr] = inside_gt
            outside[c * n_thr:(c + 1) * n_thr] = ~((det_area >= lo2) & (det_area < hi2))
        matched = _greedy_match(ious, order, row_thresholds, regular)
        hit = matched >= 0
        hit_regular = hit & np.take_along_axis(regular, np.maximum(matched, 0), axis=1) \
            if len(gt) else hit
        ignored = (hit & ~hit_regular) | (~hit & outside)
        per_scores.append(scores[order])
        per_true.append(hit_regular[:, order])
        per_ignored.append(ignored[:, order])

        # error rows and galleries: every size, at the evaluation's threshold (row 0)
        m0 = matched[0]
        n_true = int((m0 >= 0).sum())
        per_image.append(ImageErrors(image=name, objects=len(gt), detections=len(det),
                                     true_detections=n_true, false_alarms=len(det) - n_true,
                                     misses=len(gt) - n_true))
        best_iou = ious.max(axis=1) if len(gt) else np.zeros(len(det))
        for d in order:
            if m0[d] < 0:
                false_alarms.append(FalseAlarm(image=name, box=det[d].copy(), score=float(scores[d]),
                                               iou=float(best_iou[d])))
        found = np.zeros(len(gt), dtype=bool)
        found[m0[m0 >= 0]] = True
        for g in np.flatnonzero(~found):
            near = ious[:, g] > 0
            misses.append(Miss(image=name, box=gt[g].copy(),
                               best_score=float(scores[near].max()) if near.any() else math.nan))

    if per_scores:
        all_scores = np.concatenate(per_scores)
        all_true = np.concatenate(per_true, axis=1)
        all_ignored = np.concatenate(per_ignored, axis=1)
    else:
        all_scores = np.zeros(0)
        all_true = np.zeros((n_rows, 0), dtype=bool)
        all_ignored = np.zeros((n_rows, 0), dtype=bool)
    order = np.argsort(-all_scores, kind="stable")
    all_scores, all_true, all_ignored = all_scores[order], all_true[:, order], all_ignored[:, order]

    results = []
    for c, rng in enumerate(configs):
        r0 = c * n_thr
        keep0 = ~all_ignored[r0]
        coco_true = [all_true[r][~all_ignored[r]] for r in range(r0 + 1, r0 + n_thr)]
        results.append(_figures(all_scores[keep0], all_true[r0][keep0], coco_true,
                                int(n_objects[c]), len(labelled), t, rng))

    false_alarms.sort(key=lambda a: -a.score)  # stable: image order, then score order within
    return Evaluation(
        **results[0],
        buckets={name: Figures(**res) for name, res in zip(buckets, results[1:])},
        per_image=per_image, false_alarm_list=false_alarms, miss_list=misses,
        unlabelled_images=unlabelled, unlabelled_detections=unlabelled_count)


# --------------------------------------------------------------------------------------------
# reading the curve


def _reachable_points(figures: Figures) -> np.ndarray:
    return np.flatnonzero(_reachable(np.asarray(figures.thresholds)))


def operating_point(figures: Figures, target_precision: float | None = None,
                    target_recall: float | None = None) -> OperatingPoint | None:
    """The score threshold that meets a target precision or a target recall.

    Give exactly one target. Only thresholds a score cut can produce are considered (the last
    point of each tie of scores).

    Parameters
    ----------
    figures : Figures or Evaluation
    target_precision : float, optional
        Returns the threshold of highest recall whose precision is at least this (the highest
        such threshold when several give that recall).
    target_recall : float, optional
        Returns the highest threshold whose recall is at least this.

    Returns
    -------
    OperatingPoint or None
        ``None`` when no threshold meets the target (or recall is undefined).

    Examples
    --------
    >>> ev = evaluate({"a.png": ([[0, 0, 10, 10], [40, 0, 10, 10], [20, 0, 10, 10]], [0.9, 0.8, 0.7])},
    ...               {"a.png": [[0, 0, 10, 10], [20, 0, 10, 10]]}, size_buckets=None)
    >>> operating_point(ev, target_precision=0.6)
    OperatingPoint(threshold=0.7, precision=0.6666666666666666, recall=1.0, false_alarms_per_image=1.0)
    >>> operating_point(ev, target_recall=0.5).threshold
    0.9
    """
    if (target_precision is None) == (target_recall is None):
        raise ValueError("operating_point: give exactly one of target_precision and target_recall")
    idx = _reachable_points(figures)
    precision = np.asarray(figures.precision)[idx]
    recall = np.asarray(figures.recall)[idx]
    if len(idx) == 0 or np.isnan(recall).any():
        return None
    if target_precision is not None:
        ok = precision >= target_precision
        if not ok.any():
            return None
        best = recall[ok].max()
        i = idx[np.flatnonzero(ok & (recall == best))[0]]
    else:
        ok = recall >= target_recall
        if not ok.any():
            return None
        i = idx[np.flatnonzero(ok)[0]]
    return OperatingPoint(threshold=float(figures.thresholds[i]), precision=float(figures.precision[i]),
                          recall=float(figures.recall[i]),
                          false_alarms_per_image=float(figures.false_alarms_per_image[i]))


def recall_at_fppi(figures: Figures, fppi: float) -> float:
    """Recall at the reachable threshold of largest FPPI not exceeding ``fppi``.

    The same reading rule as :func:`log_average_miss_rate`, so that
    ``1 - recall_at_fppi(f)`` is the miss rate it reads at ``f``.

    Parameters
    ----------
    figures : Figures or Evaluation
    fppi : float
        False alarms per image allowed.

    Returns
    -------
    float
        0 when every threshold exceeds ``fppi`` (keep nothing); ``nan`` without ground truth.

    Examples
    --------
    >>> ev = evaluate({"a.png": ([[0, 0, 10, 10], [40, 0, 10, 10], [20, 0, 10, 10]], [0.9, 0.8, 0.7])},
    ...               {"a.png": [[0, 0, 10, 10], [20, 0, 10, 10]]}, size_buckets=None)
    >>> recall_at_fppi(ev, 0.5), recall_at_fppi(ev, 1.0)
    (0.5, 1.0)
    """
    if figures.objects == 0 or figures.images == 0:
        return math.nan
    idx = _reachable_points(figures)
    f = np.asarray(figures.false_alarms_per_image)[idx]
    ok = np.flatnonzero(f <= fppi)
    return float(np.asarray(figures.recall)[idx[ok[-1]]]) if len(ok) else 0.0


def fppi_at_recall(figures: Figures, recall: float) -> float | None:
    """False alarms per image at the highest reachable threshold whose recall is at least ``recall``.

    Parameters
    ----------
    figures : Figures or Evaluation
    recall : float
        Target recall, e.g. 0.9.

    Returns
    -------
    float or None
        ``None`` when the recall is never reached (or is undefined).

    Examples
    --------
    >>> ev = evaluate({"a.png": ([[0, 0, 10, 10], [40, 0, 10, 10], [20, 0, 10, 10]], [0.9, 0.8, 0.7])},
    ...               {"a.png": [[0, 0, 10, 10], [20, 0, 10, 10]]}, size_buckets=None)
    >>> fppi_at_recall(ev, 0.9), fppi_at_recall(ev, 0.5)
    (1.0, 0.0)
    """
    point = operating_point(figures, target_recall=recall)
    return None if point is None else point.false_alarms_per_image
