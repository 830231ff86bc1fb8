"""Scoring a set of images: :func:`evaluate` matches every image, pools the detections in score
order and computes the figures, per object size too.
"""

from __future__ import annotations

import math
from typing import Mapping

import numpy as np

from detector.geometry import iou
from detector.errors import InputError
from detector.evaluation.curves import _sampled_ap, average_precision, log_average_miss_rate, reachable
from detector.evaluation.matching import _check_threshold, _greedy_match, _image_arrays
from detector.evaluation.results import (COCO_IOU_THRESHOLDS, COCO_RECALL_POINTS, DEFAULT_SIZE_BUCKETS,
                                        FALSE_ALARM, LEFT_OUT, Evaluation, FalseAlarm, Figures, ImageErrors, Miss)

__all__ = ["evaluate"]

# --------------------------------------------------------------------------------------------
# figures from matched detections


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

    reach = reachable(scores)
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
        log_average_miss_rate=lamr, is_true=np.asarray(is_true, dtype=bool), **best)


def evaluate(detections: Mapping, ground_truth: Mapping, iou_threshold: float = 0.5,
             size_buckets: Mapping | None = DEFAULT_SIZE_BUCKETS, size_range=None,
             ignore: Mapping | None = None) -> Evaluation:
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
    size_range : (low, high), optional
        Restrict every headline figure to objects of ``sqrt(width * height)`` in ``[low, high)``
        pixels, as a bucket is: labelled boxes outside it are ignored and detections outside it
        that match nothing are left out (pycocotools' area ranges).
    ignore : mapping of str to bool array (G,), optional
        Per image, the labelled boxes that are ignore regions: never a miss, and every detection
        matched to one is left out of every count (neither true nor a false alarm), as the PASCAL
        VOC protocol treats ``difficult`` objects (Everingham et al., IJCV 2010).

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

    Per detection, the labelled box it found (-1: a false alarm); they hold at every threshold:

    >>> ev.matches["a.png"].tolist()
    [0, -1]
    """
    t = _check_threshold(iou_threshold)
    buckets = dict(size_buckets or {})
    if size_range is not None:
        buckets = {"__range__": size_range, **buckets}
    for name, rng in buckets.items():
        try:
            lo, hi = (float(v) for v in rng)
        except (TypeError, ValueError):
            raise InputError(f"size bucket {name!r}: give (low, high) in pixels, got {rng!r}") from None
        if not 0.0 <= lo < hi:
            raise InputError(f"size bucket {name!r}: need 0 <= low < high, got ({lo}, {hi})")
        buckets[name] = (lo, hi)
    headline = buckets.pop("__range__", None)

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
    configs = [headline] + list(buckets.values())  # None: every size
    n_rows = n_thr * len(configs)
    row_thresholds = np.tile(thresholds, len(configs))

    per_scores, per_true, per_ignored = [], [], []
    n_objects = np.zeros(len(configs), dtype=np.int64)
    per_image, false_alarms, misses, matches = [], [], [], {}
    for name in labelled:
        gt = _image_arrays(name, ground_truth[name])
        value = detections.get(name, (np.zeros((0, 4)), np.zeros(0)))
        if not (isinstance(value, (tuple, list)) and len(value) == 2):
            raise InputError(f"image {name!r}: detections must be a pair (boxes, scores)")
        det, scores = _image_arrays(name, *value)
        order = np.argsort(-scores, kind="stable")
        ious = iou(det, gt)
        gt_area, det_area = gt[:, 2] * gt[:, 3], det[:, 2] * det[:, 3]
        region = np.zeros(len(gt), dtype=bool)
        if ignore is not None and name in ignore:
            region = np.asarray(ignore[name], dtype=bool).reshape(-1)
            if region.shape != (len(gt),):
                raise InputError(f"image {name!r}: {len(region)} ignore flags for {len(gt)} boxes")
        regular = np.ones((n_rows, len(gt)), dtype=bool)
        outside = np.zeros((n_rows, len(det)), dtype=bool)
        for c, rng in enumerate(configs):
            if rng is None:
                regular[c * n_thr:(c + 1) * n_thr] = ~region
                n_objects[c] += int((~region).sum())
                continue
            lo2, hi2 = rng[0] ** 2, rng[1] ** 2
            inside_gt = (gt_area >= lo2) & (gt_area < hi2) & ~region
            n_objects[c] += int(inside_gt.sum())
            regular[c * n_thr:(c + 1) * n_thr] = inside_gt
            outside[c * n_thr:(c + 1) * n_thr] = ~((det_area >= lo2) & (det_area < hi2))
        matched = _greedy_match(ious, order, row_thresholds, regular,
                                region if region.any() else None)
        hit = matched >= 0
        hit_regular = hit & np.take_along_axis(regular, np.maximum(matched, 0), axis=1) \
            if len(gt) else hit
        ignored = (hit & ~hit_regular) | (~hit & outside)
        per_scores.append(scores[order])
        per_true.append(hit_regular[:, order])
        per_ignored.append(ignored[:, order])

        # error rows and galleries: the headline's sizes, at the evaluation's threshold (row 0)
        m0 = matched[0]
        true0, left_out0 = hit_regular[0], ignored[0]
        n_true = int(true0.sum())
        n_false = int((~true0 & ~left_out0).sum())
        n_regular = int(regular[0].sum())
        outcome = np.where(true0, m0, np.where(left_out0, LEFT_OUT, FALSE_ALARM))
        matches[name] = outcome.astype(np.int64)
        per_image.append(ImageErrors(image=name, objects=n_regular, detections=len(det),
                                     true_detections=n_true, false_alarms=n_false,
                                     misses=n_regular - n_true))
        best_iou = ious.max(axis=1) if len(gt) else np.zeros(len(det))
        for d in order:
            if not true0[d] and not left_out0[d]:
                false_alarms.append(FalseAlarm(image=name, box=det[d].copy(), score=float(scores[d]),
                                               iou=float(best_iou[d])))
        found = ~regular[0].copy()
        found[m0[true0]] = True
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
        unlabelled_images=unlabelled, unlabelled_detections=unlabelled_count, matches=matches)
