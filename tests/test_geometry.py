"""Box geometry and non-maximum suppression.

References: pycocotools' ``mask.iou`` (bounding-box IoU), OpenCV's ``cv2.dnn.NMSBoxes`` (greedy
NMS), a pixel-counting IoU on integer boxes, and hand-worked examples.
"""

import cv2
import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from pycocotools import mask as coco_mask

from detector.geometry import _nms_numba, _nms_numpy, as_boxes, box_area, iou, iou_one_to_many, nms

FAST = settings(max_examples=40, deadline=None)


def random_boxes(rng, n, spread=60.0, clustered=True):
    """Float boxes, often overlapping: centres around a few cluster points when ``clustered``."""
    centres = rng.uniform(0, spread, size=(max(1, n // 4), 2))
    c = centres[rng.integers(0, len(centres), n)] if clustered else rng.uniform(0, spread, (n, 2))
    c = c + rng.normal(0, 4.0, size=(n, 2))
    wh = rng.uniform(3.0, 30.0, size=(n, 2))
    return np.column_stack([c - wh / 2, wh])


# ---------------------------------------------------------------- as_boxes / box_area


def test_as_boxes_shapes():
    assert as_boxes([1, 2, 3, 4]).shape == (1, 4)
    assert as_boxes(np.zeros((0, 4))).shape == (0, 4)
    assert as_boxes([]).dtype == np.float64
    with pytest.raises(ValueError):
        as_boxes([1, 2, 3])
    with pytest.raises(ValueError):
        as_boxes(np.zeros((2, 8)))


def test_box_area_hand():
    # 10 * 10 = 100; 2.5 * 4 = 10
    assert box_area([[0, 0, 10, 10], [5, 5, 2.5, 4]]).tolist() == [100.0, 10.0]


# ---------------------------------------------------------------- IoU


def test_iou_hand_worked():
    a = [[0, 0, 10, 10]]
    b = [
        [5, 0, 10, 10],   # overlap 5 x 10 = 50, union 100 + 100 - 50 = 150 -> 1/3
        [2, 2, 5, 5],     # inside: 25 / 100 = 0.25
        [10, 0, 10, 10],  # touching edge: no area -> 0
        [0, 0, 10, 5],    # half: 50 / 100 = 0.5
        [2.5, 2.5, 10, 10],  # 7.5 * 7.5 = 56.25 / (200 - 56.25) = 0.391304...
    ]
    out = iou(a, b)
    assert out.shape == (1, 5) and out.dtype == np.float64
    np.testing.assert_allclose(out[0], [1 / 3, 0.25, 0.0, 0.5, 56.25 / 143.75], rtol=0, atol=1e-15)


def test_iou_zero_area_is_zero_not_nan():
    assert iou([[0, 0, 0, 0]], [[0, 0, 0, 0]]).tolist() == [[0.0]]


def test_iou_empty_shapes():
    assert iou(np.zeros((0, 4)), [[0, 0, 1, 1]]).shape == (0, 1)
    assert iou([[0, 0, 1, 1]], np.zeros((0, 4))).shape == (1, 0)


@FAST
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(1, 12), m=st.integers(1, 12))
def test_iou_equals_pycocotools(seed, n, m):
    # reference: pycocotools mask.iou on [x, y, w, h] boxes, iscrowd = 0 (no +1 in its areas);
    # same arithmetic order, so equal to the last bit
    rng = np.random.default_rng(seed)
    a, b = random_boxes(rng, n), random_boxes(rng, m)
    ref = coco_mask.iou(a.tolist(), b.tolist(), [0] * m)
    np.testing.assert_array_equal(iou(a, b), np.asarray(ref, dtype=np.float64).reshape(n, m))


@FAST
@given(seed=st.integers(0, 2**32 - 1))
def test_iou_equals_pixel_count_on_integer_boxes(seed):
    # reference: count the pixels of two painted integer boxes on a grid (independent of the formula)
    rng = np.random.default_rng(seed)
    x, y = rng.integers(0, 20, size=2), rng.integers(0, 20, size=2)
    w, h = rng.integers(1, 15, size=2), rng.integers(1, 15, size=2)
    grids = np.zeros((2, 40, 40), dtype=bool)
    for k in range(2):
        grids[k, y[k]:y[k] + h[k], x[k]:x[k] + w[k]] = True
    inter = np.logical_and(*grids).sum()
    union = np.logical_or(*grids).sum()
    got = iou([[x[0], y[0], w[0], h[0]]], [[x[1], y[1], w[1], h[1]]])[0, 0]
    assert got == pytest.approx(inter / union, abs=1e-15)


@FAST
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(1, 10), m=st.integers(1, 10))
def test_iou_properties(seed, n, m):
    rng = np.random.default_rng(seed)
    a, b = random_boxes(rng, n), random_boxes(rng, m)
    ab = iou(a, b)
    np.testing.assert_array_equal(ab, iou(b, a).T)  # symmetric
    assert ((ab >= 0) & (ab <= 1)).all()
    np.testing.assert_allclose(np.diag(iou(a, a)), 1.0, atol=1e-15)
    # translating both sets together changes nothing (up to rounding)
    shift = np.array([13.25, -7.5, 0, 0])
    np.testing.assert_allclose(iou(a + shift, b + shift), ab, atol=1e-12)
    for i in range(n):
        np.testing.assert_array_equal(iou_one_to_many(a[i], b), ab[i])


# ---------------------------------------------------------------- NMS


def opencv_nms(boxes, scores, threshold):
    """Reference: OpenCV's greedy NMS. Its score_threshold must be >= 0 and drops scores not above
    it, so every score given here is > 0 and the threshold is 0."""
    if len(boxes) == 0:
        return []
    assert np.min(scores) > 0
    kept = cv2.dnn.NMSBoxes(np.asarray(boxes).tolist(), np.asarray(scores).tolist(), 0.0,
                            float(threshold))
    return np.asarray(kept, dtype=np.int64).reshape(-1).tolist()


def test_nms_hand_worked():
    boxes = [[0, 0, 10, 10], [0, 0, 10, 5], [30, 30, 10, 10], [1, 0, 10, 10]]
    scores = [0.9, 0.8, 0.7, 0.95]
    # order by score: 3, 0, 1, 2. Keep 3. IoU(3, 0) = 90 / 110 = 0.818 > 0.3 -> drop 0.
    # IoU(3, 1) = 45 / (100 + 50 - 45) = 0.4286 > 0.3 -> drop 1. Box 2 is far -> keep.
    assert nms(boxes, scores, 0.3).tolist() == [3, 2]
    # at threshold 0.5: box 0 still dropped (0.818), box 1 kept (0.4286 <= 0.5)
    assert nms(boxes, scores, 0.5).tolist() == [3, 1, 2]
    assert opencv_nms(boxes, scores, 0.5) == [3, 1, 2]


def test_nms_threshold_is_inclusive_like_opencv():
    # IoU exactly 0.5 (50 / 100) with threshold 0.5: kept, since only IoU > threshold suppresses
    boxes, scores = [[0, 0, 10, 10], [0, 0, 10, 5]], [0.9, 0.8]
    assert nms(boxes, scores, 0.5).tolist() == [0, 1] == opencv_nms(boxes, scores, 0.5)
    assert nms(boxes, scores, 0.49).tolist() == [0] == opencv_nms(boxes, scores, 0.49)


def test_nms_ties_lower_index_first():
    boxes = [[0, 0, 10, 10], [1, 0, 10, 10], [50, 50, 5, 5]]
    assert nms(boxes, [0.5, 0.5, 0.5], 0.3).tolist() == [0, 2] == opencv_nms(boxes, [0.5] * 3, 0.3)
    assert nms(boxes[::-1], [0.5, 0.5, 0.5], 0.3).tolist() == [0, 1]


@pytest.mark.parametrize("seed", range(4))
def test_nms_many_ties_equal_opencv(seed):
    """Hundreds of boxes sharing four score values: equal scores must be visited lower index
    first. OpenCV's ``cv2.dnn.NMSBoxes`` sorts the scores with ``std::stable_sort`` (its
    ``GetMaxScoreIndex``), so it is the reference for the order of ties. A handful of tied boxes
    cannot tell a stable sort from numpy's quicksort (below 17 elements it is an insertion sort,
    which keeps ties in order), so the set is large and clustered: most boxes overlap a tied
    neighbour, and which of the two is kept depends on the order."""
    rng = np.random.default_rng(seed)
    n = 240
    boxes = random_boxes(rng, n)
    scores = rng.integers(1, 5, n) / 4.0  # 0.25, 0.5, 0.75, 1.0: exact in float32 as well
    ov = iou(boxes, boxes)
    # OpenCV rounds the overlap to float32: no pair within 1e-6 of the threshold (none in these sets)
    assert not (np.abs(ov - 0.3) < 1e-6)[~np.eye(n, dtype=bool)].any()
    kept = nms(boxes, scores, 0.3).tolist()
    assert kept == opencv_nms(boxes, scores, 0.3)
    # the same rule written out: descending score, ties by index, keep while IoU <= 0.3
    order = sorted(range(n), key=lambda i: (-scores[i], i))
    expected = []
    for i in order:
        if all(ov[i, j] <= 0.3 for j in expected):
            expected.append(i)
    assert kept == expected


def test_nms_edges():
    out = nms(np.zeros((0, 4)), np.zeros(0))
    assert out.dtype == np.int64 and out.shape == (0,)
    assert nms([[0, 0, 5, 5], [0, 0, 5, 5]], [0.1, 0.2], 1.0).tolist() == [1, 0]
    with pytest.raises(ValueError):
        nms([[0, 0, 5, 5]], [0.1, 0.2])
    with pytest.raises(ValueError):
        nms([[0, 0, 5, 5]], [0.1], 1.5)


@settings(max_examples=60, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(0, 40),
       threshold=st.sampled_from([0.0, 0.1, 0.2, 0.3, 0.45, 0.5, 0.7, 0.9]),
       clustered=st.booleans())
def test_nms_equals_opencv(seed, n, threshold, clustered):
    # reference: cv2.dnn.NMSBoxes (Rect2d boxes, float32 scores, keeps while IoU <= threshold)
    rng = np.random.default_rng(seed)
    boxes = random_boxes(rng, n, clustered=clustered)
    # distinct scores that stay distinct in OpenCV's float32
    scores = (rng.permutation(n).astype(np.float32) / np.float32(max(n, 1)) + np.float32(0.01))
    scores = scores.astype(np.float64)
    # OpenCV rounds the overlap to float32: leave out sets with an IoU within 1e-6 of the threshold
    ov = iou(boxes, boxes)
    assume(not (np.abs(ov - threshold) < 1e-6)[~np.eye(n, dtype=bool)].any())
    assert nms(boxes, scores, threshold).tolist() == opencv_nms(boxes, scores, threshold)


@FAST
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(1, 30))
def test_nms_properties(seed, n):
    rng = np.random.default_rng(seed)
    boxes = random_boxes(rng, n)
    scores = rng.uniform(size=n)
    kept = nms(boxes, scores, 0.4)
    # kept boxes overlap each other by at most the threshold, and come in descending score
    ov = iou(boxes[kept], boxes[kept])
    assert (ov[~np.eye(len(kept), dtype=bool)] <= 0.4).all()
    assert (np.diff(scores[kept]) <= 0).all()
    # every suppressed box overlaps some kept box with a higher score by more than the threshold
    for j in set(range(n)) - set(kept.tolist()):
        better = kept[scores[kept] >= scores[j]]
        assert (iou_one_to_many(boxes[j], boxes[better]) > 0.4).any()


@settings(max_examples=60, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(0, 60),
       threshold=st.sampled_from([0.0, 0.2, 0.3, 0.5, 0.8, 1.0]), tied=st.booleans())
def test_nms_compiled_loop_equals_numpy_twin(seed, n, threshold, tied):
    # the numba kernel and its plain-numpy twin keep the same boxes in the same order, ties included
    rng = np.random.default_rng(seed)
    boxes = random_boxes(rng, n)
    if tied and n:
        boxes[rng.integers(0, n, n // 3)] = boxes[0]  # exact duplicates: IoU exactly 1
    scores = rng.integers(0, 4, n).astype(np.float64) if tied else rng.uniform(size=n)
    order = np.argsort(-scores, kind="stable").astype(np.int64)
    np.testing.assert_array_equal(_nms_numba(boxes, order, threshold), _nms_numpy(boxes, order, threshold))
