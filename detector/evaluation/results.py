"""What the evaluation returns: the reference constants (COCO, PASCAL VOC, log-average miss rate)
and the result types (:class:`Figures`, :class:`Evaluation`, the error rows).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from detector._validation import json_safe

__all__ = ["COCO_IOU_THRESHOLDS", "COCO_RECALL_POINTS", "DEFAULT_SIZE_BUCKETS", "FALSE_ALARM", "LEFT_OUT", "LOG_AVERAGE_FPPI", "VOC2007_RECALL_POINTS", "Evaluation", "FalseAlarm", "Figures", "ImageErrors", "Miss", "OperatingPoint"]

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
#: :attr:`Evaluation.matches` of a detection that matches no labelled box.
FALSE_ALARM = -1
#: :attr:`Evaluation.matches` of a detection counted neither as true nor as a false alarm.
LEFT_OUT = -2

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
    is_true : ndarray of bool
        Per point of the curve (detection in descending score), whether it is a true detection at
        ``iou_threshold``; ``precision[i] = is_true[:i + 1].sum() / (i + 1)``. Not written by
        :meth:`to_dict` (the curves carry the same information).
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
    is_true: np.ndarray = field(metadata={"json": False})

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
    matches : dict of str to ndarray of int64
        Per labelled image, per detection in the order given: the index of the labelled box it
        is a true detection of at ``iou_threshold``, :data:`FALSE_ALARM` (-1) or
        :data:`LEFT_OUT` (-2: matched to an ignore region, or outside ``size_range`` and matching
        nothing; counted neither way). Matching is greedy in descending score, so a score
        threshold keeps a prefix of that order and these outcomes hold at every threshold: the
        counts of the detections scoring ``t`` or more are those of :func:`evaluate` run on them
        alone. Not written by :meth:`to_dict`.
    """

    buckets: dict = field(default_factory=dict)
    per_image: list = field(default_factory=list)
    false_alarm_list: list = field(default_factory=list)
    miss_list: list = field(default_factory=list)
    unlabelled_images: list = field(default_factory=list)
    unlabelled_detections: int = 0
    matches: dict = field(default_factory=dict, metadata={"json": False})
