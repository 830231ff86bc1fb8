"""Scoring detections against labelled boxes: matching, precision-recall, average precision, miss
rate against false positives per image, per-size figures, the per-image error lists and the
operating-point policy.

Modules, in the order the data flows:

- :mod:`~detector.evaluation.results`: the reference constants and result types;
- :mod:`~detector.evaluation.matching`: one image, detections to labelled boxes (:func:`match_image`);
- :mod:`~detector.evaluation.curves`: average precision and log-average miss rate of a curve;
- :mod:`~detector.evaluation.scoring`: :func:`evaluate`, a whole set of images;
- :mod:`~detector.evaluation.operating_point`: reading the curve (:func:`operating_point`,
  :func:`recall_at_fppi`, :func:`fppi_at_recall`) and the threshold a report recommends
  (:func:`choose_operating_point`).

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

from detector.evaluation.curves import average_precision, log_average_miss_rate
from detector.evaluation.matching import match_image
from detector.evaluation.operating_point import (check_targets, choose_operating_point, fppi_at_recall,
                                                 operating_point, recall_at_fppi)
from detector.evaluation.results import (COCO_IOU_THRESHOLDS, COCO_RECALL_POINTS, DEFAULT_SIZE_BUCKETS,
                                         FALSE_ALARM, LEFT_OUT, LOG_AVERAGE_FPPI, VOC2007_RECALL_POINTS, Evaluation, FalseAlarm,
                                         Figures, ImageErrors, Miss, OperatingPoint)
from detector.evaluation.scoring import evaluate

__all__ = [
    "COCO_IOU_THRESHOLDS",
    "COCO_RECALL_POINTS",
    "DEFAULT_SIZE_BUCKETS",
    "FALSE_ALARM",
    "LEFT_OUT",
    "LOG_AVERAGE_FPPI",
    "VOC2007_RECALL_POINTS",
    "Evaluation",
    "FalseAlarm",
    "Figures",
    "ImageErrors",
    "Miss",
    "OperatingPoint",
    "average_precision",
    "check_targets",
    "choose_operating_point",
    "evaluate",
    "fppi_at_recall",
    "log_average_miss_rate",
    "match_image",
    "operating_point",
    "recall_at_fppi",
]
