"""Matching, precision-recall, average precision and miss-rate figures.

References, named at each test: pycocotools' COCOeval (COCO AP; Lin et al., 2014),
sklearn.metrics.average_precision_score (non-interpolated AP), hand-worked PASCAL VOC all-point
(Everingham et al., IJCV 2010) and 11-point (VOC 2007) examples, and a hand-worked log-average miss
rate (Dollar et al., PAMI 2012).
"""

import contextlib
import io
import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pycocotools.coco import COCO
from pycocotools.cocoeval import COCOeval
from sklearn.metrics import average_precision_score

from detector.errors import InputError
from detector.evaluation import (
    COCO_RECALL_POINTS,
    Evaluation,
    average_precision,
    evaluate,
    fppi_at_recall,
    log_average_miss_rate,
    match_image,
    operating_point,
    recall_at_fppi,
)


# ---------------------------------------------------------------- matching rules


def test_match_duplicates_are_false_alarms():
    gt = [[0, 0, 10, 10]]
    det = [[0, 0, 10, 10], [1, 0, 10, 10], [0, 1, 10, 10]]
    matched, overlap = match_image(det, [0.9, 0.8, 0.7], gt)
    assert matched.tolist() == [0, -1, -1]
    # a duplicate still reports how well it overlaps: 9 * 10 / (200 - 90) = 0.8181...
    np.testing.assert_allclose(overlap, [1.0, 90 / 110, 90 / 110])


def test_match_visits_detections_by_score_not_input_order():
    gt = [[0, 0, 10, 10]]
    matched, _ = match_image([[1, 0, 10, 10], [0, 0, 10, 10]], [0.6, 0.9], gt)
    assert matched.tolist() == [-1, 0]  # the 0.9 detection takes the box although listed second


def test_match_each_ground_truth_once_and_best_unmatched():
    gts = [[0, 0, 10, 10], [4, 0, 10, 10]]
    # detection A = (3, 0, 10, 10): IoU with gt0 = 70 / 130 = 0.538, with gt1 = 90 / 110 = 0.818
    # detection B = (0, 0, 10, 10): IoU with gt0 = 1, with gt1 = 60 / 140 = 0.429
    # A (higher score) takes gt1, its best; B then takes gt0
    matched, overlap = match_image([[3, 0, 10, 10], [0, 0, 10, 10]], [0.9, 0.8], gts)
    assert matched.tolist() == [1, 0]
    np.testing.assert_allclose(overlap, [90 / 110, 1.0])
    # if B scores higher it takes gt0 and A falls back to gt1 (still unmatched, 0.818 >= 0.5)
    matched, _ = match_image([[3, 0, 10, 10], [0, 0, 10, 10]], [0.8, 0.9], gts)
    assert matched.tolist() == [1, 0]
    # with a single ground-truth box, the second detection of it is a false alarm
    matched, _ = match_image([[3, 0, 10, 10], [0, 0, 10, 10]], [0.8, 0.9], gts[:1])
    assert matched.tolist() == [-1, 0]


def test_match_threshold_is_inclusive():
    # IoU exactly 0.5: (0, 0, 10, 5) inside (0, 0, 10, 10) covers 50 / 100
    assert match_image([[0, 0, 10, 5]], [1.0], [[0, 0, 10, 10]], iou_threshold=0.5)[0].tolist() == [0]
    assert match_image([[0, 0, 10, 5]], [1.0], [[0, 0, 10, 10]], iou_threshold=0.51)[0].tolist() == [-1]


def test_match_equal_iou_goes_to_later_box():
    # detection (5, 0, 10, 10) overlaps both boxes by 50 / 150 = 1/3: the later box (index 1) wins
    matched, _ = match_image([[5, 0, 10, 10]], [1.0], [[0, 0, 10, 10], [10, 0, 10, 10]], 0.3)
    assert matched.tolist() == [1]


def test_match_no_ground_truth_and_no_detections():
    m, o = match_image([[0, 0, 5, 5]], [0.5], np.zeros((0, 4)))
    assert m.tolist() == [-1] and o.tolist() == [0.0]
    m, o = match_image(np.zeros((0, 4)), np.zeros(0), [[0, 0, 5, 5]])
    assert m.shape == (0,) and m.dtype == np.int64 and o.shape == (0,)


def test_match_bad_input():
    with pytest.raises(InputError, match="2 boxes but 1 scores"):
        match_image([[0, 0, 5, 5], [1, 1, 5, 5]], [0.5], [[0, 0, 5, 5]])
    with pytest.raises(InputError, match="IoU threshold"):
        match_image([[0, 0, 5, 5]], [0.5], [[0, 0, 5, 5]], iou_threshold=0.0)


# ---------------------------------------------------------------- hand-worked AP


def five_detection_example():
    """One image, four objects in a row; detections in score order: true, false, true, false, true.

    Object k is (30k, 0, 20, 20); its detection is the same box shifted by 1 px (IoU 380/420);
    false alarms sit far below. Object 3 is never found.
    """
    gt = np.array([[30.0 * k, 0, 20, 20] for k in range(4)])
    det = np.array([gt[0] + [1, 0, 0, 0], [0, 200, 20, 20], gt[1] + [1, 0, 0, 0],
                    [40, 200, 20, 20], gt[2] + [1, 0, 0, 0]])
    scores = np.array([0.9, 0.8, 0.7, 0.6, 0.5])
    return {"belt/frame_0001.png": (det, scores)}, {"belt/frame_0001.png": gt}


def test_average_precision_hand_worked_voc():
    # precision 1/1, 1/2, 2/3, 2/4, 3/5 at recall 1/4, 1/4, 2/4, 2/4, 3/4
    ev = evaluate(*five_detection_example(), size_buckets=None)
    np.testing.assert_allclose(ev.precision, [1, 1 / 2, 2 / 3, 2 / 4, 3 / 5])
    np.testing.assert_allclose(ev.recall, [1 / 4, 1 / 4, 2 / 4, 2 / 4, 3 / 4])
    # envelope (max precision at recall >= r): 1 up to 1/4, 2/3 up to 2/4, 3/5 up to 3/4, 0 after.
    # PASCAL VOC all-point: 1/4 * 1 + 1/4 * 2/3 + 1/4 * 3/5 + 1/4 * 0 = 15/60 + 10/60 + 9/60 = 17/30
    assert ev.average_precision == pytest.approx(17 / 30, abs=1e-15)
    # PASCAL VOC 2007 11-point: r = 0, .1, .2 -> 1; r = .3, .4, .5 -> 2/3; r = .6, .7 -> 3/5;
    # r = .8, .9, 1 -> 0.  (3 + 3 * 2/3 + 2 * 3/5) / 11 = 6.2 / 11
    assert ev.average_precision_11_point == pytest.approx(6.2 / 11, abs=1e-15)
    # COCO 101-point: r = 0 .. .25 (26 points) -> 1, .26 .. .50 (25) -> 2/3, .51 .. .75 (25) -> 3/5,
    # .76 .. 1 (25) -> 0.  (26 + 25 * 2/3 + 25 * 3/5) / 101
    assert ev.average_precision_101_point == pytest.approx((26 + 50 / 3 + 15) / 101, abs=1e-15)
    assert (ev.true_detections, ev.false_alarms, ev.misses, ev.objects) == (3, 2, 1, 4)
    # the same numbers from the curve alone
    assert average_precision(ev.precision, ev.recall) == pytest.approx(17 / 30, abs=1e-15)


def test_average_precision_11_point_uses_exact_tenths():
    # one object of ten found by the only detection: recall exactly 3/10 is reached at point 0.3
    # (np.arange(0, 1.1, 0.1)[3] = 0.30000000000000004 would miss it). Precision 1 at recall 0.3:
    # points 0, .1, .2, .3 -> 1, the other 7 -> 0: 4 / 11
    assert average_precision([1.0], [3 / 10], "11-point") == pytest.approx(4 / 11, abs=1e-15)


def test_average_precision_all_point_envelope_hand():
    # precision rises after a false alarm: 1, 1/2, 2/3 at recall 1/2, 1/2, 1 (two objects)
    # envelope: 1 up to 1/2, 2/3 up to 1 -> 1/2 * 1 + 1/2 * 2/3 = 5/6
    assert average_precision([1, 1 / 2, 2 / 3], [1 / 2, 1 / 2, 1]) == pytest.approx(5 / 6, abs=1e-15)
    assert average_precision([], []) == 0.0
    assert math.isnan(average_precision([0.0], [np.nan]))
    with pytest.raises(ValueError):
        average_precision([1.0], [1.0], "13-point")


# ---------------------------------------------------------------- sklearn: non-interpolated AP


def one_candidate_scene(labels, seed):
    """Objects far apart, each with exactly one candidate detection (IoU 380/420); false alarms far
    from every object. ``labels[i]`` says whether the i-th detection (in descending score) is true.
    Every object is detected, so recall reaches 1."""
    rng = np.random.default_rng(seed)
    n_true = int(sum(labels))
    gt = np.array([[40.0 * k, 0, 20, 20] for k in range(n_true)])
    det, k_true, k_false = [], 0, 0
    for is_true in labels:
        if is_true:
            det.append(gt[k_true] + [1, 0, 0, 0])
            k_true += 1
        else:
            det.append([40.0 * k_false, 300, 20, 20])
            k_false += 1
    scores = np.sort(rng.uniform(0.01, 1.0, len(labels)))[::-1]
    perm = rng.permutation(len(labels))  # input order does not matter
    return np.array(det)[perm], scores[perm], gt, np.array(labels, dtype=int)[perm]


@settings(max_examples=50, deadline=None)
@given(labels=st.lists(st.booleans(), min_size=1, max_size=14).filter(any),
       seed=st.integers(0, 2**31))
def test_ap_against_sklearn(labels, seed):
    # reference: sklearn.metrics.average_precision_score, the step sum AP = sum_n (R_n - R_n-1) P_n
    # without interpolation. With one candidate per object, no duplicates and recall reaching 1,
    # the detections are a ranked binary classification, so:
    #  (a) the step sum over our own curve equals sklearn's AP exactly (checks our precision/recall);
    #  (b) our all-point AP (interpolated envelope) is >= sklearn's AP, with equality exactly when
    #      the precision at the true detections never rises along the ranking (then the envelope
    #      equals the precision at each recall step).
    det, scores, gt, y_true = one_candidate_scene(labels, seed)
    ev = evaluate({"a.png": (det, scores)}, {"a.png": gt}, size_buckets=None)
    reference = average_precision_score(y_true, scores)
    assert ev.recall[-1] == 1.0
    step_sum = float(np.sum(np.diff(np.concatenate([[0.0], ev.recall])) * ev.precision))
    assert step_sum == pytest.approx(reference, abs=1e-12)
    assert ev.average_precision >= reference - 1e-12
    at_true = ev.precision[np.diff(np.concatenate([[0.0], ev.recall])) > 0]
    monotone = bool(np.all(np.diff(at_true) <= 1e-15))
    assert monotone == (abs(ev.average_precision - reference) < 1e-12)


def test_ap_equals_sklearn_when_precision_monotone():
    # reference: sklearn.metrics.average_precision_score. Ranking T T F T F: precision at the true
    # detections 1, 1, 3/4 never rises, so interpolation changes nothing: AP = (1 + 1 + 3/4) / 3
    det, scores, gt, y_true = one_candidate_scene([True, True, False, True, False], seed=3)
    ev = evaluate({"a.png": (det, scores)}, {"a.png": gt}, size_buckets=None)
    assert ev.average_precision == pytest.approx(average_precision_score(y_true, scores), abs=1e-15)
    assert ev.average_precision == pytest.approx(11 / 12, abs=1e-15)


# ---------------------------------------------------------------- pycocotools


def coco_stats(detections, ground_truth):
    """Reference: pycocotools COCOeval (iouType='bbox', iscrowd=0, maxDets [1, 10, 100]).

    Its summary reads stats[0] at exactly 100 detections per image, so maxDets keeps 100; the
    scenes here have at most 13 detections per image, so nothing is cut.

    Image ids follow the sorted image names; ground-truth 'area' is width * height as in the
    detection results that COCO.loadRes builds. pycocotools' box IoU has no +1 (checked in
    test_boxes). Returns stats[0, 1, 3, 4, 5]: AP50:95, AP50, small, medium, large (-1 = none).
    """
    names = sorted(ground_truth)
    ids = {n: i + 1 for i, n in enumerate(names)}
    anns = []
    for n in names:
        for b in np.asarray(ground_truth[n]).reshape(-1, 4):
            anns.append(dict(id=len(anns) + 1, image_id=ids[n], category_id=1,
                             bbox=[float(v) for v in b], area=float(b[2] * b[3]), iscrowd=0))
    results = [dict(image_id=ids[n], category_id=1, bbox=[float(v) for v in b], score=float(s))
               for n in names if n in detections for b, s in zip(*detections[n])]
    with contextlib.redirect_stdout(io.StringIO()):
        gt = COCO()
        gt.dataset = dict(images=[dict(id=ids[n]) for n in names], annotations=anns,
                          categories=[dict(id=1, name="nut")])
        gt.createIndex()
        run = COCOeval(gt, gt.loadRes(results), iouType="bbox")
        run.params.maxDets = [1, 10, 100]
        run.evaluate()
        run.accumulate()
        run.summarize()
    return run.stats[[0, 1, 3, 4, 5]]


def random_scene(seed, n_images, tied_scores):
    """Hex-nut-sized and larger boxes with jittered, duplicated and stray detections."""
    rng = np.random.default_rng(seed)
    dets, gts = {}, {}
    for i in range(n_images):
        name = f"belt/frame_{i:04d}.png"
        n_obj = int(rng.integers(0, 6))
        side = np.exp(rng.uniform(np.log(8), np.log(160), n_obj))
        aspect = np.exp(rng.uniform(-0.5, 0.5, n_obj))
        wh = np.column_stack([side * aspect, side / aspect])
        gt = np.column_stack([rng.uniform(0, 400, (n_obj, 2)), wh])
        det = []
        for b in gt:
            for _ in range(int(rng.integers(0, 3))):  # 0, 1 or 2 detections of this object
                c = b[:2] + b[2:] / 2 + rng.normal(0, 0.12, 2) * b[2:]
                s = b[2:] * np.exp(rng.normal(0, 0.15, 2))
                det.append([*(c - s / 2), *s])
        for _ in range(int(rng.integers(0, 4))):  # strays
            s = np.exp(rng.uniform(np.log(8), np.log(160), 2))
            det.append([*rng.uniform(0, 400, 2), *s])
        det = np.array(det).reshape(-1, 4)
        scores = rng.uniform(0, 1, len(det))
        if tied_scores:
            scores = np.round(scores, 1)
        gts[name] = gt
        if len(det) or rng.uniform() < 0.5:
            dets[name] = (det, scores)
    return dets, gts


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 2**31), n_images=st.integers(1, 6), tied_scores=st.booleans())
def test_coco_ap_equals_pycocotools(seed, n_images, tied_scores):
    # reference: pycocotools COCOeval stats (AP50:95, AP50, and small / medium / large AP50:95,
    # 101 recall points); none of the random areas lands exactly on 32**2 or 96**2, where
    # pycocotools' closed ranges and our half-open buckets differ
    dets, gts = random_scene(seed, n_images, tied_scores)
    if not any(len(d[0]) for d in dets.values()):
        dets = {next(iter(gts)): ([[0.0, 0.0, 30.0, 30.0]], [0.5])}  # loadRes needs one result
    ref = coco_stats(dets, gts)
    ev = evaluate(dets, gts)
    ours = [ev.average_precision_50_to_95, ev.average_precision_101_point,
            ev.buckets["small"].average_precision_50_to_95,
            ev.buckets["medium"].average_precision_50_to_95,
            ev.buckets["large"].average_precision_50_to_95]
    ours = [-1.0 if math.isnan(v) else v for v in ours]
    np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-12)


def test_coco_tie_in_iou_goes_to_later_box_like_pycocotools():
    # reference: pycocotools COCOeval. Detection A = (0, 0, 20, 10) overlaps gt0 = (0, 0, 15, 10)
    # by 150 / 200 and gt1 = (5, 0, 15, 10) by 150 / 200: a tie. pycocotools gives it the later box
    # (gt1), so detection B = gt0 exactly (lower score) matches gt0 with IoU 1 at every threshold:
    # AP 1 at IoU 0.5..0.75 (A matches 0.75 >= t) and AP 1/2 at 0.8..0.95 (A fails): mean 0.8.
    # Had A taken gt0, B would overlap gt1 by only 100 / 200 = 0.5.
    dets = {"a.png": ([[0, 0, 20, 10], [0, 0, 15, 10]], [0.9, 0.8])}
    gts = {"a.png": [[0, 0, 15, 10], [5, 0, 15, 10]]}
    ref = coco_stats(dets, gts)
    ev = evaluate(dets, gts)
    assert ev.average_precision_50_to_95 == pytest.approx(ref[0], abs=1e-12)
    # hand: 0.5..0.75 (6 thresholds): both true, AP 1. 0.8..0.95 (4): A false then B true:
    # precision 0, 1/2 at recall 0, 1/2 -> 51 recall points (0 .. .5) at precision 1/2 -> 51 / 202
    assert ev.average_precision_50_to_95 == pytest.approx((6 * 1 + 4 * 51 / 202) / 10, abs=1e-12)


# ---------------------------------------------------------------- size buckets


def test_size_buckets_hand_worked():
    # small object (20 x 20, area 400 < 32**2) and large object (100 x 100 >= 96**2)
    gts = {"a.png": [[0, 0, 20, 20], [200, 200, 100, 100]]}
    det = [[0, 0, 20, 20],        # 0.9 hits the small object
           [500, 500, 120, 120],  # 0.8 large stray
           [500, 0, 10, 10],      # 0.7 small stray
           [200, 200, 100, 100]]  # 0.6 hits the large object
    ev = evaluate({"a.png": (det, [0.9, 0.8, 0.7, 0.6])}, gts)
    small, medium, large = ev.buckets["small"], ev.buckets["medium"], ev.buckets["large"]
    # small: the large stray is outside the bucket (ignored), the large hit matched an ignored
    # object (ignored): kept 0.9 true, 0.7 false -> precision 1, 1/2 at recall 1, 1 -> AP 1
    assert (small.objects, small.detections, small.true_detections, small.false_alarms) == (1, 2, 1, 1)
    assert small.average_precision == 1.0
    # large: 0.9 matched an ignored object, 0.7 is small: kept 0.8 false, 0.6 true ->
    # precision 0, 1/2 at recall 0, 1 -> AP 1/2
    assert (large.objects, large.detections, large.true_detections) == (1, 2, 1)
    np.testing.assert_allclose(large.precision, [0.0, 0.5])
    assert large.average_precision == 0.5
    # medium: no objects and every detection ignored; AP undefined
    assert (medium.objects, medium.detections) == (0, 0) and math.isnan(medium.average_precision)
    assert large.size_range == (96.0, math.inf)
    # all sizes: true, false, false, true -> precision 1, 1/2, 1/3, 1/2 at recall 1/2, 1/2, 1/2, 1
    # envelope 1 up to 1/2, 1/2 up to 1 -> AP 3/4
    assert ev.average_precision == pytest.approx(0.75)
    assert evaluate({"a.png": (det, [0.9, 0.8, 0.7, 0.6])}, gts, size_buckets=None).buckets == {}


def test_bucket_matching_prefers_boxes_inside_the_bucket_like_pycocotools():
    # reference: pycocotools COCOeval (its 'medium' AP). Small box S = (0, 0, 30, 30) (area 900) and
    # medium box M = (0, 0, 34, 34) (area 1156); the detection D = (0, 0, 31, 31) overlaps S by
    # 900 / 961 = 0.937 and M by 961 / 1156 = 0.831. In the medium bucket S is ignored, so D takes
    # M (regular boxes first) at IoU 0.50..0.80 (7 thresholds, AP 1); at 0.85 and 0.90 it falls back
    # to the ignored S and is ignored; at 0.95 it matches nothing and its area is outside the bucket,
    # so it is ignored too (3 thresholds, AP 0): medium AP50:95 = 7 / 10.
    dets = {"a.png": ([[0, 0, 31, 31]], [0.9])}
    gts = {"a.png": [[0, 0, 30, 30], [0, 0, 34, 34]]}
    ref = coco_stats(dets, gts)
    ev = evaluate(dets, gts)
    assert ev.buckets["medium"].average_precision_50_to_95 == pytest.approx(0.7, abs=1e-12)
    assert ev.buckets["medium"].average_precision_50_to_95 == pytest.approx(ref[3], abs=1e-12)
    assert ev.buckets["small"].average_precision_50_to_95 == pytest.approx(ref[2], abs=1e-12)


# ---------------------------------------------------------------- miss rate vs FPPI


def test_log_average_miss_rate_hand_worked():
    # Dollar et al., PAMI 2012. References 10**(-2 + k/4): 0.01, 0.0178, 0.0316, 0.0562, 0.1,
    # 0.178, 0.316, 0.562, 1. Largest FPPI not above each: 0, 0, 0.02, 0.05, 0.05, 0.05, 0.2, 0.5,
    # 0.5 -> miss rates .8 .8 .6 .5 .5 .5 .4 .3 .3; product .64 * .6 * .125 * .4 * .09 = 0.001728
    # = 0.12**3, so the geometric mean is 0.12 ** (1/3) = 0.4932...
    fppi = [0, 0.02, 0.05, 0.2, 0.5, 2.0]
    miss = [0.8, 0.6, 0.5, 0.4, 0.3, 0.1]
    assert log_average_miss_rate(fppi, miss) == pytest.approx(0.12 ** (1 / 3), rel=1e-12)
    # no point at or below a reference: the first (highest) miss rate is used
    fppi2 = [0.05, 0.2, 0.5, 2.0]
    miss2 = [0.8, 0.4, 0.3, 0.1]
    # readings: 0.01, 0.0178, 0.0316 -> none -> 0.8; 0.0562, 0.1, 0.178 -> 0.8; 0.316 -> 0.4;
    # 0.562, 1 -> 0.3.  product 0.8**6 * 0.4 * 0.3**2
    expected = (0.8 ** 6 * 0.4 * 0.3 ** 2) ** (1 / 9)
    assert log_average_miss_rate(fppi2, miss2) == pytest.approx(expected, rel=1e-12)
    assert log_average_miss_rate([], []) == 1.0
    # a zero miss rate is clamped at 1e-10 rather than giving log(0)
    assert log_average_miss_rate([0.0], [0.0]) == pytest.approx(1e-10)


def test_miss_rate_curve_from_evaluate():
    # five-detection example: FPPI (one image) 0, 1, 1, 2, 2; miss rate 3/4, 3/4, 1/2, 1/2, 1/4.
    # References below 1 read the last point at FPPI 0 (3/4); reference 1 reads the last point at
    # FPPI 1 (1/2): LAMR = (0.75**8 * 0.5) ** (1/9)
    ev = evaluate(*five_detection_example(), size_buckets=None)
    np.testing.assert_allclose(ev.false_alarms_per_image, [0, 1, 1, 2, 2])
    np.testing.assert_allclose(ev.miss_rate, [0.75, 0.75, 0.5, 0.5, 0.25])
    assert ev.log_average_miss_rate == pytest.approx((0.75 ** 8 * 0.5) ** (1 / 9), rel=1e-12)
    assert recall_at_fppi(ev, 1.0) == 0.5
    assert recall_at_fppi(ev, 0.5) == 0.25
    assert fppi_at_recall(ev, 0.75) == 2.0
    assert fppi_at_recall(ev, 0.9) is None


# ---------------------------------------------------------------- operating points and ties


def test_best_f1_and_operating_points():
    ev = evaluate(*five_detection_example(), size_buckets=None)
    # F1 = 2PR / (P + R): (1, 1/4) -> 0.4; (1/2, 1/4) -> 1/3; (2/3, 1/2) -> 4/7; (1/2, 1/2) -> 1/2;
    # (3/5, 3/4) -> 2/3: best at the last point, threshold 0.5, 2 false alarms in 1 image
    assert ev.best_f1 == pytest.approx(2 / 3)
    assert (ev.best_f1_threshold, ev.best_f1_false_alarms_per_image) == (0.5, 2.0)
    assert (ev.best_f1_precision, ev.best_f1_recall) == (pytest.approx(0.6), 0.75)
    # precision >= 0.6: points 1 (r 1/4), 3 (2/3, r 1/2), 5 (3/5, r 3/4): highest recall at 0.5
    assert operating_point(ev, target_precision=0.6).threshold == 0.5
    assert operating_point(ev, target_precision=0.7).threshold == 0.9
    assert operating_point(ev, target_recall=0.5).threshold == 0.7
    assert operating_point(ev, target_recall=0.8) is None
    with pytest.raises(ValueError):
        operating_point(ev)


def test_tied_scores_only_reachable_thresholds():
    # scores 0.9 true, 0.8 true, 0.8 false; three objects. Points: (P 1, R 1/3), (1, 2/3), (2/3, 2/3)
    # but a threshold of 0.8 keeps both 0.8 detections, so the middle point cannot be chosen.
    gt = [[0, 0, 10, 10], [50, 0, 10, 10], [100, 0, 10, 10]]
    det = [[0, 0, 10, 10], [50, 0, 10, 10], [300, 300, 10, 10]]
    ev = evaluate({"a.png": (det, [0.9, 0.8, 0.8])}, {"a.png": gt}, size_buckets=None)
    np.testing.assert_allclose(ev.precision, [1, 1, 2 / 3])
    point = operating_point(ev, target_precision=0.9)
    assert (point.threshold, point.recall) == (0.9, pytest.approx(1 / 3))
    # best F1 over reachable points: (1, 1/3) -> 1/2; (2/3, 2/3) -> 2/3
    assert ev.best_f1 == pytest.approx(2 / 3) and ev.best_f1_threshold == 0.8


def test_true_flags_are_exposed_per_curve_point():
    # hand-worked: a.png has objects A=[0,0,10,10] and B=[50,0,10,10]; b.png has none.
    # descending score: 0.9 hits A (true), 0.8 on b.png (false), 0.7 duplicates A (false),
    # 0.6 hits B (true) -> flags T F F T, precision 1, 1/2, 1/3, 2/4
    ev = evaluate({"a.png": ([[0, 0, 10, 10], [1, 0, 10, 10], [50, 0, 10, 10]], [0.9, 0.7, 0.6]),
                   "b.png": ([[5, 5, 10, 10]], [0.8])},
                  {"a.png": [[0, 0, 10, 10], [50, 0, 10, 10]], "b.png": []}, size_buckets=None)
    assert ev.is_true.tolist() == [True, False, False, True]
    np.testing.assert_allclose(ev.precision, [1, 1 / 2, 1 / 3, 2 / 4])
    assert "is_true" not in ev.to_dict()  # the curves already carry it; summary.json is unchanged


@settings(max_examples=40, deadline=None)
@given(st.integers(0, 2**32 - 1), st.integers(1, 4))
def test_true_flags_agree_with_per_image_matching(seed, n_images):
    """Property: the pooled flags are the per-image matches (match_image) put in score order, and
    they rebuild precision exactly; each size bucket carries flags of its own length."""
    rng = np.random.default_rng(seed)
    dets, gts, pooled = {}, {}, []
    for i in range(n_images):
        gt = np.column_stack([rng.integers(0, 80, (3, 2)), rng.integers(8, 40, (3, 2))]).astype(float)
        det = np.column_stack([rng.integers(0, 80, (5, 2)), rng.integers(8, 40, (5, 2))]).astype(float)
        det[:2] = gt[:2] + rng.integers(-2, 3, (2, 4))  # some near hits
        scores = rng.random(5)
        name = f"{i}.png"
        dets[name], gts[name] = (det, scores), gt
        matched, _ = match_image(det, scores, gt, 0.5)
        pooled += [(-s, name, k, m >= 0) for k, (s, m) in enumerate(zip(scores, matched))]
    ev = evaluate(dets, gts)
    flags = [t for _, _, _, t in sorted(pooled, key=lambda p: p[:3])]
    assert ev.is_true.tolist() == flags
    np.testing.assert_array_equal(np.cumsum(ev.is_true) / np.arange(1, len(flags) + 1), ev.precision)
    for figures in ev.buckets.values():
        assert len(figures.is_true) == figures.detections


def test_score_ties_keep_image_then_input_order():
    # equal scores: image 'a' (false alarm) before image 'b' (true), whatever the dict order
    gts = {"b.png": [[0, 0, 10, 10]], "a.png": []}
    dets = {"b.png": ([[0, 0, 10, 10]], [0.5]), "a.png": ([[0, 0, 10, 10]], [0.5])}
    ev = evaluate(dets, gts, size_buckets=None)
    np.testing.assert_allclose(ev.precision, [0.0, 0.5])
    # within one image, equal scores keep the input order: false alarm listed first comes first
    ev = evaluate({"a.png": ([[90, 90, 5, 5], [0, 0, 10, 10]], [0.5, 0.5])},
                  {"a.png": [[0, 0, 10, 10]]}, size_buckets=None)
    np.testing.assert_allclose(ev.precision, [0.0, 0.5])


# ---------------------------------------------------------------- error lists and edge cases


def test_per_image_rows_and_galleries():
    gts = {"belt/frame_0001.png": [[0, 0, 10, 10], [50, 0, 10, 10]],
           "belt/frame_0002.png": [],
           "belt/frame_0003.png": [[0, 0, 10, 10]]}
    dets = {"belt/frame_0001.png": ([[0, 0, 10, 10], [1, 0, 10, 10], [49, 0, 2, 2]], [0.9, 0.4, 0.7]),
            "belt/frame_0002.png": ([[5, 5, 10, 10]], [0.95]),
            "elsewhere/x.png": ([[0, 0, 1, 1], [2, 2, 1, 1]], [0.5, 0.5])}
    ev = evaluate(dets, gts)
    rows = [(r.image, r.objects, r.detections, r.true_detections, r.false_alarms, r.misses)
            for r in ev.per_image]
    assert rows == [("belt/frame_0001.png", 2, 3, 1, 2, 1),
                    ("belt/frame_0002.png", 0, 1, 0, 1, 0),
                    ("belt/frame_0003.png", 1, 0, 0, 0, 1)]
    assert [(a.image, a.score) for a in ev.false_alarm_list] == [
        ("belt/frame_0002.png", 0.95), ("belt/frame_0001.png", 0.7), ("belt/frame_0001.png", 0.4)]
    # the duplicate overlaps the found box by 9 * 10 / (200 - 90); the 2 x 2 box overlaps the missed
    # one by 1 * 2 / (4 + 100 - 2)
    assert ev.false_alarm_list[2].iou == pytest.approx(90 / 110)
    assert ev.false_alarm_list[1].iou == pytest.approx(2 / 102)
    assert [(m.image, m.box.tolist()) for m in ev.miss_list] == [
        ("belt/frame_0001.png", [50.0, 0.0, 10.0, 10.0]), ("belt/frame_0003.png", [0.0, 0.0, 10.0, 10.0])]
    assert ev.miss_list[0].best_score == 0.7 and math.isnan(ev.miss_list[1].best_score)
    assert ev.unlabelled_images == ["elsewhere/x.png"] and ev.unlabelled_detections == 2
    assert (ev.images, ev.objects, ev.detections) == (3, 3, 4)
    # 3 false alarms over 3 images at the end of the curve
    assert ev.false_alarms_per_image[-1] == 1.0


def test_no_detections():
    ev = evaluate({}, {"a.png": [[0, 0, 10, 10]], "b.png": []})
    assert ev.average_precision == 0.0 and ev.average_precision_50_to_95 == 0.0
    assert ev.average_precision_11_point == 0.0 and ev.average_precision_101_point == 0.0
    for curve in (ev.precision, ev.recall, ev.thresholds, ev.false_alarms_per_image, ev.miss_rate):
        assert curve.shape == (0,) and curve.dtype == np.float64
    assert ev.log_average_miss_rate == 1.0 and ev.best_f1 == 0.0 and ev.misses == 1
    assert recall_at_fppi(ev, 1.0) == 0.0 and operating_point(ev, target_recall=0.1) is None


def test_no_ground_truth_gives_nan():
    # AP is undefined without objects: nan (pycocotools reports -1); precision is still defined
    ev = evaluate({"a.png": ([[0, 0, 10, 10]], [0.5])}, {"a.png": []})
    assert ev.objects == 0 and ev.false_alarms == 1 and ev.precision.tolist() == [0.0]
    for v in (ev.average_precision, ev.average_precision_11_point, ev.average_precision_101_point,
              ev.average_precision_50_to_95, ev.log_average_miss_rate, ev.best_f1):
        assert math.isnan(v)
    assert np.isnan(ev.recall).all() and ev.false_alarms_per_image.tolist() == [1.0]
    assert operating_point(ev, target_precision=0.0) is None
    empty = evaluate({}, {})
    assert empty.images == 0 and math.isnan(empty.average_precision)


def test_to_dict_is_json_ready():
    dets, gts = five_detection_example()
    gts["empty.png"] = []
    ev = evaluate(dets, gts)
    d = ev.to_dict()
    text = json.dumps(d, allow_nan=False)  # nan / inf became None
    back = json.loads(text)
    assert back["average_precision"] == pytest.approx(17 / 30)
    assert back["buckets"]["large"]["size_range"] == [96.0, None]
    assert back["buckets"]["medium"]["average_precision"] is None
    assert len(back["precision"]) == 5 and back["per_image"][0]["misses"] == 1
    assert back["false_alarm_list"][0]["box"] == [0.0, 200.0, 20.0, 20.0]
    assert isinstance(ev, Evaluation)


def test_bad_input_names_the_image():
    with pytest.raises(InputError, match="frame_7.png.*2 boxes but 1 scores"):
        evaluate({"frame_7.png": ([[0, 0, 5, 5], [1, 1, 5, 5]], [0.5])}, {"frame_7.png": []})
    with pytest.raises(InputError, match="frame_8.png.*width and height"):
        evaluate({}, {"frame_8.png": [[0, 0, -5, 5]]})
    with pytest.raises(InputError, match="finite"):
        evaluate({"a.png": ([[0, 0, 5, 5]], [np.nan])}, {"a.png": []})
    with pytest.raises(InputError, match="size bucket"):
        evaluate({}, {}, size_buckets={"odd": (50, 10)})
    with pytest.raises(InputError, match="IoU threshold"):
        evaluate({}, {}, iou_threshold=1.5)


def test_recall_points_match_pycocotools_grid():
    # the 101 points are built the way pycocotools builds them, so searchsorted ties agree
    assert np.array_equal(COCO_RECALL_POINTS, np.linspace(0.0, 1.0, int(np.round(1.0 / 0.01)) + 1))


# ------------------------------------------------------------------ ignore regions, size range

def test_ignore_regions_by_hand():
    """PASCAL VOC's rule for difficult objects (Everingham et al., IJCV 2010): a detection on an
    ignore region is neither found nor a false alarm, and the region is never missed. Labels: A
    (regular) and B (ignore). Detections by score: on A (0.9), on B (0.8), on B again (0.7),
    nowhere (0.6). Without the flag: A and B found, the second hit on B and the stray one false:
    precision 1, 1, 2/3, 2/4 at recall 1/2, 1, 1, 1. With it: only A counts (1 object); the two
    hits on B are left out; the stray one is a false alarm: precision 1, 1/2 at recall 1, 1, AP 1."""
    det = {"a.png": ([[0, 0, 10, 10], [50, 50, 10, 10], [51, 50, 10, 10], [90, 0, 10, 10]],
                     [0.9, 0.8, 0.7, 0.6])}
    gt = {"a.png": [[0, 0, 10, 10], [50, 50, 10, 10]]}
    plain = evaluate(det, gt, size_buckets=None)
    assert plain.precision.tolist() == [1.0, 1.0, 2 / 3, 0.5] and plain.objects == 2
    ev = evaluate(det, gt, size_buckets=None, ignore={"a.png": [False, True]})
    assert (ev.objects, ev.true_detections, ev.false_alarms, ev.misses) == (1, 1, 1, 0)
    assert ev.precision.tolist() == [1.0, 0.5] and ev.recall.tolist() == [1.0, 1.0]
    assert ev.average_precision == 1.0
    assert [a.score for a in ev.false_alarm_list] == [0.6] and ev.miss_list == []
    image = ev.per_image[0]
    assert (image.objects, image.true_detections, image.false_alarms, image.misses) == (1, 1, 1, 0)
    # an ignore region nothing hits is not a miss either
    alone = evaluate({"a.png": ([[0, 0, 10, 10]], [0.9])}, gt, size_buckets=None,
                     ignore={"a.png": [False, True]})
    assert (alone.misses, alone.recall.tolist()) == (0, [1.0])


def test_size_range_restricts_the_headline_as_a_bucket_does():
    """Objects of sqrt(area) 10 and 50, range [20, 100): the small one is ignored, a detection on
    it matched only to it is left out, and a stray 8-pixel detection (outside the range, matching
    nothing) too; the figures equal those of the same range given as a bucket, which the tests
    above hold to pycocotools' area ranges."""
    det = {"a.png": ([[0, 0, 10, 10], [100, 100, 50, 50], [200, 0, 8, 8]], [0.9, 0.8, 0.7])}
    gt = {"a.png": [[0, 0, 10, 10], [100, 100, 50, 50]]}
    ev = evaluate(det, gt, size_buckets={"mid": (20, 100)}, size_range=(20, 100))
    assert (ev.objects, ev.true_detections, ev.false_alarms) == (1, 1, 0)
    assert ev.precision.tolist() == [1.0] and ev.average_precision == 1.0
    assert ev.size_range == (20.0, 100.0)
    assert ev.average_precision == ev.buckets["mid"].average_precision
    assert ev.average_precision_50_to_95 == ev.buckets["mid"].average_precision_50_to_95
