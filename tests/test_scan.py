"""The sliding-window engine (detector.scan): compiled loop against its numpy twin, scan scores
against the classifier's scores on patches cut by hand, the scale property, early exit.

References: scikit-learn-style estimator scores (``PatchClassifier.predict_proba``, which evaluates
the features with ``detector.features.evaluate_features`` on each patch) are the slow reference the
scan must reproduce window by window; the scale property is exact arithmetic (a rectangle mean on
an image whose pixels are repeated 2x2 with ``np.kron`` equals the mean on the small image); a
hand-built one-tree model is worked through by hand. Greedy NMS is checked against cv2.dnn.NMSBoxes
in tests/test_boxes.py and not repeated here.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from detector.classifier import PatchClassifier
from detector.geometry import window_box_to_object_box
from detector.harvest import harvest
from detector.io.labels import read_labels
from detector.model import Model
from detector.scan import (Engine, ScanSettings, clip_boxes, detection_scores, final_scores,
                           first_use_order)
from synthetic_images import render_frame, render_scenario

WINDOW = (24, 24)


@pytest.fixture(scope="session")
def bank(tmp_path_factory):
    """A small harvested bank of a 12-frame scenario (about 900 patches of 24 x 24)."""
    root = tmp_path_factory.mktemp("scan-scenario")
    render_scenario(root, train_images=12, test_images=2, seed=11)
    items = list(read_labels(root / "train" / "labels.csv", root / "train" / "images"))
    return harvest(root / "train" / "images", items, window=WINDOW, negatives_per_image=60, seed=0)


def _fit(bank, mode):
    clf = PatchClassifier(n_trees=20, pool=2000, mode=mode, random_state=0)
    clf.fit(bank.patches, bank.labels, margin=bank.margin)
    return clf.model_


@pytest.fixture(scope="session")
def bagged(bank):
    return _fit(bank, "bagged")


@pytest.fixture(scope="session")
def boosted(bank):
    return _fit(bank, "boosted")


@pytest.fixture(params=["bagged", "boosted"])
def model(request):
    return request.getfixturevalue(request.param)


def frame(seed=3, width=160, height=160):
    """A scenario frame, the smallest size the renderer makes (160 x 160)."""
    return render_frame(seed, width, height).image


def every_window(model, **kw):
    """Settings that keep every window: threshold 0, no early exit, boxes as the windows scored
    them (unless asked)."""
    kw.setdefault("threshold", 0.0)
    kw.setdefault("early_exit", False)
    kw.setdefault("box_voting", None)
    return Engine(model, ScanSettings(**kw))


def as_dict(boxes, raw):
    return {tuple(b): r for b, r in zip(boxes.tolist(), raw.tolist())}


# ------------------------------------------------------------------ compiled loop vs numpy twin

@pytest.mark.parametrize("early_exit", [False, True])
def test_compiled_scan_equals_numpy_twin(model, early_exit):
    rng = np.random.default_rng(5)
    images = [rng.integers(0, 256, (61, 83), dtype=np.uint8),  # noise, odd sizes
              np.repeat(rng.integers(0, 256, (1, 90), dtype=np.uint8), 50, axis=0),  # stripes
              frame(3)]
    for gray in images:
        engine = every_window(model, early_exit=early_exit, threshold=0.3, scale_step=1.25)
        b1, r1, w1, t1 = engine.candidates(gray)
        b2, r2, w2, t2 = engine.candidates(gray, use_numpy=True)
        assert (w1, t1) == (w2, t2)
        np.testing.assert_array_equal(b1, b2)
        np.testing.assert_allclose(r1, r2, rtol=0, atol=1e-9)


@pytest.mark.parametrize("depth", [1, 3])
@pytest.mark.parametrize("early_exit", [False, True])
def test_compiled_scan_equals_numpy_twin_at_other_depths(bank, depth, early_exit):
    """Depths other than 2 take the kernel's general tree walk; a 160 x 160 frame at stride 2
    spans several chunks of windows (more than the kernel's CHUNK of 1,024 at scale 1)."""
    from detector.scan import _kernels

    clf = PatchClassifier(n_trees=12, pool=1500, depth=depth, mode="boosted", random_state=2)
    clf.fit(bank.patches, bank.labels, margin=bank.margin)
    engine = every_window(clf.model_, early_exit=early_exit, threshold=0.3)
    gray = frame(4)
    b1, r1, w1, t1 = engine.candidates(gray)
    b2, r2, w2, t2 = engine.candidates(gray, use_numpy=True)
    assert w1 > 4 * _kernels.CHUNK
    assert (w1, t1) == (w2, t2)
    np.testing.assert_array_equal(b1, b2)
    np.testing.assert_allclose(r1, r2, rtol=0, atol=1e-9)


@pytest.mark.parametrize("settings", [dict(), dict(overhang=0.5, nms_iou=0.6),
                                      dict(overhang=0.0, stride=3.0), dict(min_object=12.0),
                                      dict(threshold=0.0, early_exit=False),
                                      dict(box_voting=0.5), dict(box_voting=0.3, overhang=0.5)])
def test_scan_equals_candidates_then_detections(model, settings):
    """The compiled finish (kernels.finish: window boxes, margin, clipping, suppression in one
    call) gives exactly what candidates() and detections() give with numpy: same boxes, same
    scores, same order; with box voting, the finish of the windows at or above the threshold and
    the votes of every window kept equal detections() with its threshold and voting. min_object 12 enlarges the frame: the window's object side is
    24 / (1 + 2 * 0.1) = 20 pixels (the bank's margin 0.1), so the smallest scale is 12 / 20 = 0.6
    and the frame grows by 1 / 0.6 = 1.67.

    How many detections a small trained model makes at 0.05 depends on the exact pixels of its
    bank (the harvest's resampling), so the test does not count them, except where the count is
    certain: a bagged score is never below the cutoff 0, so at threshold 0 without early exit
    every window is a candidate, every image has at least one detection, and the suppression
    meets ties for certain: every window of the flat frame (the last image) sees the same pixels
    and so has the same score; their order (window order, as detector.geometry.nms visits them) is
    checked too."""
    rng = np.random.default_rng(8)
    images = [frame(3), frame(4, 200, 160), rng.integers(0, 256, (47, 71), dtype=np.uint8),
              np.full((30, 30), 128, np.uint8)]
    settings = {"threshold": 0.05, "box_voting": None, **settings}   # voting takes numpy's way
    engine = Engine(model, ScanSettings(**settings))
    every = model.mode == "bagged" and settings["threshold"] == 0.0 and not settings.get(
        "early_exit", True)
    for gray in images:
        result = engine.scan(gray)
        wboxes, raw, windows, trees = engine.candidates(gray)
        boxes, scores = engine.detections(
            wboxes, raw, image_size=gray.shape[::-1], box_voting=engine.voting,
            threshold=engine.threshold if engine.voting else None)
        assert (result.windows, result.trees) == (windows, trees)
        np.testing.assert_array_equal(result.boxes, boxes)
        np.testing.assert_array_equal(result.scores, scores)
        numpy_route = engine.scan(gray, use_numpy=True)
        np.testing.assert_array_equal(numpy_route.boxes, boxes)
        np.testing.assert_allclose(numpy_route.scores, scores, rtol=0, atol=1e-12)
        if every:
            assert len(raw) == windows > 0 and 1 <= len(scores) < windows
    if every:  # the flat frame's windows all see the same pixels: one tied score, suppressed
        assert len(np.unique(raw)) == 1 < len(raw)  # in window order


@given(st.integers(1, 30), st.integers(0, 2**32 - 1), st.sampled_from([1, 3, 7]))
@settings(max_examples=60, deadline=None)
def test_first_use_order_renumbers_without_changing_the_trees(n_features, seed, nodes):
    """The engine's feature order: every node still reads the same feature, the renumbered
    features appear in the flattened trees as 0, 1, 2, ... at their first use, and every feature
    keeps exactly one place."""
    rng = np.random.default_rng(seed)
    nf = rng.integers(0, n_features, (int(rng.integers(1, 6)), nodes))
    order, renumbered = first_use_order(nf, n_features)
    assert sorted(order.tolist()) == list(range(n_features))
    np.testing.assert_array_equal(order[renumbered], nf)
    flat = renumbered.ravel()
    firsts = [v for i, v in enumerate(flat.tolist()) if v not in flat[:i]]
    assert firsts == list(range(len(firsts)))
    unused = np.setdiff1d(np.arange(n_features), nf)
    np.testing.assert_array_equal(order[len(firsts):], unused)


# ------------------------------------------------------------------ against patches cut by hand

@pytest.mark.parametrize("overhang", [0.0, 0.5])
def test_scan_scores_equal_classifier_scores_at_scale_one(model, overhang):
    """Every scale-1 window: the scan's score == predict_proba of the patch gray[y:y+24, x:x+24]
    cut by hand, with the border pixels repeated (np.pad, mode "edge") where the window reaches past
    the image's edge."""
    gray = frame(4)  # holds a nut of 20.5 x 18 pixels, about the window's object size
    engine = every_window(model, stride=3, overhang=overhang)
    boxes, raw, windows, trees = engine.candidates(gray)
    at1 = (boxes[:, 2] == WINDOW[0]) & (boxes[:, 3] == WINDOW[1])
    xs, ys = boxes[at1, 0].astype(int), boxes[at1, 1].astype(int)
    if overhang == 0:
        # all windows at stride 3 on 160 x 160: 1 + (160 - 24) // 3 = 46 per row and column
        expected = 46 * 46
    else:
        # up to floor(0.5 * 24) = 12 pixels past each edge, on the same grid: -12, -9, ..., 147
        # (the last start with 147 + 24 <= 160 + 12): 1 + (147 - (-12)) // 3 = 54 per side
        expected = 54 * 54
        assert xs.min() == ys.min() == -12 and xs.max() == ys.max() == 147
    if model.mode == "bagged":  # cutoff 0: a bagged score is never below it, nothing is dropped
        assert at1.sum() == expected
    else:  # threshold 0 is the raw cutoff 0.5 * log(1e-12) = -13.8 for boosted
        assert at1.sum() <= expected
    padded = np.pad(gray, 12, mode="edge")
    patches = np.stack([padded[y + 12:y + 36, x + 12:x + 36] for x, y in zip(xs, ys)])
    reference = PatchClassifier.from_model(model).predict_proba(patches)[:, 1]
    np.testing.assert_allclose(final_scores(model, raw[at1]), reference, rtol=0, atol=1e-9)
    assert reference.max() - reference.min() > 0.5  # object-like and background windows alike


def test_windows_inside_the_image_do_not_depend_on_the_overhang(model):
    """The overhang only adds windows at the edges: the windows inside the image and their scores
    are those of a scan that keeps every window inside."""
    gray = frame(6, 176, 164)
    inside = every_window(model, overhang=0.0)
    edges = every_window(model, overhang=0.5)
    b0, r0, w0, _ = inside.candidates(gray)
    b1, r1, w1, _ = edges.candidates(gray)
    within = (b1[:, 0] >= 0) & (b1[:, 1] >= 0) & (b1[:, 0] + b1[:, 2] <= 176) & \
             (b1[:, 1] + b1[:, 3] <= 164)
    assert w1 > w0 and not within.all()
    np.testing.assert_array_equal(b1[within], b0)
    np.testing.assert_array_equal(r1[within], r0)
    assert inside.padding((176, 164)) == 0 < edges.padding((176, 164))


@pytest.mark.parametrize("voting", [None, 0.5])
def test_detections_are_clipped_to_the_image(model, voting):
    """Boxes reported never reach past the frame, also when box voting averages boxes that end
    at its edge (a mean of x and of w may end an ulp past it: clipped again)."""
    gray = frame(6, 176, 164)
    engine = every_window(model, overhang=0.5, box_voting=voting)
    result = engine.scan(gray)
    wboxes, raw, _, _ = engine.candidates(gray)
    assert (wboxes[:, 0] < 0).any()  # some windows reach past the edge ...
    b = result.boxes  # ... the boxes reported never do
    assert len(b) and (b[:, :2] >= 0).all() and (b[:, 2:] > 0).all()
    assert (b[:, 0] + b[:, 2] <= 176).all() and (b[:, 1] + b[:, 3] <= 164).all()


def test_overhang_must_stay_within_half_a_window():
    for bad in (-0.1, 0.51, float("nan")):
        with pytest.raises(ValueError, match="overhang"):
            ScanSettings(overhang=bad)


def test_scan_objects_are_window_boxes_shrunk_by_margin(bagged):
    """scan() = candidates -> object boxes (window shrunk by the bank's margin 0.1) -> cut to the
    frame -> NMS. At threshold 0 without early exit a bagged model keeps every window (a bagged
    score is never below the cutoff 0), so detections are certain whatever the bank's pixels. A
    box within the frame keeps the object box's width and height exactly (20 at scale 1, not a
    clipped difference that may be one ulp off); boxes at the edges are cut as clip_boxes cuts."""
    gray = frame(7)
    engine = Engine(bagged, ScanSettings(threshold=0.0, early_exit=False, overhang=0.5,
                                         box_voting=None))
    result = engine.scan(gray)
    wboxes, raw, windows, trees = engine.candidates(gray)
    assert (result.windows, result.trees) == (windows, trees) and len(raw) == windows
    assert len(result.scores) > 0 and np.all(np.diff(result.scores) <= 0)
    # a 24 x 24 window with margin 0.1 stands for a box of 24 / 1.2 = 20 pixels, 2 inside
    assert window_box_to_object_box(0.0, 0.0, 24.0, 24.0, 0.1) == (2.0, 2.0, 20.0, 20.0)
    obj = np.stack(window_box_to_object_box(*wboxes.T, 0.1), axis=1)
    inside = (obj[:, 0] >= 0) & (obj[:, 1] >= 0) & (obj[:, 0] + obj[:, 2] <= 160) & \
        (obj[:, 1] + obj[:, 3] <= 160)
    assert inside.any() and not inside.all()
    found = as_dict(clip_boxes(obj, (160, 160)), detection_scores(bagged, raw))
    exact = as_dict(obj[inside], detection_scores(bagged, raw[inside]))
    for box, score in zip(result.boxes.tolist(), result.scores.tolist()):
        assert found[tuple(box)] == pytest.approx(score, abs=1e-12)
        x, y, w, h = box
        if x > 0 and y > 0 and x + w < 160 and y + h < 160:  # wholly inside: not clipped
            assert tuple(box) in exact


# ------------------------------------------------------------------ the scale property

@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(seed=st.integers(0, 2**32 - 1), width=st.integers(24, 40), height=st.integers(24, 36),
       smooth=st.booleans())
def test_scale_two_on_repeated_pixels_equals_scale_one(bagged, seed, width, height, smooth):
    """Scan a small image at scale 1 (stride 1) and np.kron(small, ones(2, 2)) at scale 2 (stride
    1 * 2): window (x, y) of the small image and window (2x, 2y) of the big one see the same
    rectangle means (each scaled rectangle holds every small pixel 4 times, and is divided by its
    4 times larger pixel count), the same window mean and variance, so the same raw scores."""
    rng = np.random.default_rng(seed)
    small = rng.integers(0, 256, (height, width)).astype(np.uint8)
    if smooth:  # object-like blobs as well as noise
        yy, xx = np.mgrid[:height, :width]
        small = (128 + 100 * np.sin(xx / 3.0 + seed % 7) * np.cos(yy / 4.0)).astype(np.uint8)
    big = np.kron(small, np.ones((2, 2), np.uint8))
    # scale step 2: the scales are 1, 2, 4, ... so scale 2 is scanned exactly
    b1, r1, _, _ = every_window(bagged, stride=1, scale_step=2.0, overhang=0.5).candidates(small)
    b2, r2, _, _ = every_window(bagged, stride=1, scale_step=2.0, overhang=0.5).candidates(big)
    one = as_dict(b1[b1[:, 2] == 24], r1[b1[:, 2] == 24])
    two = {(x / 2, y / 2): r for (x, y, w, h), r in as_dict(b2, r2).items() if w == 48}
    # windows start up to floor(0.5 * 24) = 12 pixels outside: x = -12 .. width - 12, so
    # width + 1 positions (and 2x = -24 .. 2 width - 24 at scale 2, in steps of 2)
    assert len(one) == (width + 1) * (height + 1)
    assert {k[:2] for k in one} == set(two)
    for (x, y, w, h), r in one.items():
        assert two[(x, y)] == pytest.approx(r, abs=1e-9)


def test_hand_worked_one_tree_model():
    """One feature, bottom row minus top row of a 2 x 2 window (raw values), one tree of depth 1:
    value <= 0 -> leaf 0.0, value > 0 -> leaf 1.0; margin 0, so object box = window."""
    model = Model((2, 2), np.array([[[0, 0, 2, 1, -1], [0, 1, 2, 1, 1]] + [[0] * 5] * 2], np.int32),
                  [[0]], [[0.0]], [[0.0, 1.0]], [-np.inf], "bagged", normalize=False)
    gray = np.array([[0, 0, 9],
                     [5, 5, 0],
                     [1, 1, 1]], np.uint8)
    # windows at stride 1 (row-major), bottom sum - top sum:
    # (0,0): (5+5) - (0+0) = 10 -> 1;  (1,0): (5+0) - (0+9) = -4 -> 0
    # (0,1): (1+1) - (5+5) = -8 -> 0;  (1,1): (1+1) - (5+0) = -3 -> 0
    engine = every_window(model, stride=1, scale_step=2.0, overhang=0.0)
    boxes, raw, windows, trees = engine.candidates(gray)
    assert windows == 4 and trees == 4  # the 3 x 3 image fits no 4 x 4 window at scale 2
    assert as_dict(boxes, raw) == {(0, 0, 2, 2): 1.0, (1, 0, 2, 2): 0.0,
                                   (0, 1, 2, 2): 0.0, (1, 1, 2, 2): 0.0}
    # threshold 0.5 keeps only the bright-bottom window
    result = Engine(model, ScanSettings(stride=1, scale_step=2.0, threshold=0.5,
                                        overhang=0.0)).scan(gray)
    assert result.boxes.tolist() == [[0.0, 0.0, 2.0, 2.0]] and result.scores.tolist() == [1.0]
    # at scale 2 on the pixels repeated 2 x 2, windows (0,0) and (2,0) of 4 x 4 (stride 1 * 2)
    # see row means, the same values: window (0,0) is the small (0,0) -> 1, (2,0) the small (1,0) -> 0
    big = np.kron(gray, np.ones((2, 2), np.uint8))
    boxes, raw, _, _ = every_window(model, stride=1, scale_step=2.0, overhang=0.0).candidates(big)
    at2 = as_dict(boxes[boxes[:, 2] == 4], raw[boxes[:, 2] == 4])
    assert at2 == {(0, 0, 4, 4): 1.0, (2, 0, 4, 4): 0.0, (0, 2, 4, 4): 0.0, (2, 2, 4, 4): 0.0}
    # overhang 0.5: windows may start floor(0.5 * 2) = 1 pixel outside, so x and y run -1 .. 2 and
    # the image is seen with its border repeated (rows -1 .. 3, columns -1 .. 3):
    #   row -1: 0 0 0 9 9 | row 0: 0 0 0 9 9 | row 1: 5 5 5 0 0 | rows 2 and 3: 1 1 1 1 1
    # the windows whose bottom row outweighs the top row: (-1,0): (5+5)-(0+0) = 10, (0,0): 10,
    # (2,1): (1+1)-(0+0) = 2; every other one is <= 0, e.g. (1,0): (5+0)-(0+9) = -4, (2,0):
    # (0+0)-(9+9) = -18, (-1,1): (1+1)-(5+5) = -8, and rows -1/0 or 2/3 are equal: 0
    boxes, raw, windows, _ = every_window(model, stride=1, scale_step=2.0,
                                          overhang=0.5).candidates(gray)
    assert windows == 16
    assert {k for k, v in as_dict(boxes, raw).items() if v == 1.0} == \
        {(-1, 0, 2, 2), (0, 0, 2, 2), (2, 1, 2, 2)}


# ------------------------------------------------------------------ early exit

def test_early_exit_keeps_exact_scores_and_saves_trees(model):
    gray = frame(9)
    full = every_window(model, threshold=0.5)
    b_off, r_off, windows, trees_off = full.candidates(gray)
    b_on, r_on, windows_on, trees_on = every_window(model, threshold=0.5,
                                                    early_exit=True).candidates(gray)
    assert windows_on == windows
    kept_off = as_dict(b_off, r_off)
    assert len(r_on) > 0
    for box, r in as_dict(b_on, r_on).items():  # every window it keeps: the same running score
        assert kept_off[box] == pytest.approx(r, abs=1e-12)
    n_trees = model.leaf_values.shape[0]
    assert trees_on / windows <= trees_off / windows <= n_trees
    assert trees_on < trees_off  # the calibrated exits do drop background


def test_cutoff_bound_is_exact_without_early_exit(model):
    """With early exit off, windows are still dropped once they can no longer reach the threshold
    (the running score plus the most the remaining trees can add); that must change nothing: the
    kept set equals "score every window with every tree, keep score >= 0.5"."""
    gray = frame(9)
    b_all, r_all, windows, trees_all = every_window(model, threshold=0.0).candidates(gray)
    b, r, _, trees = every_window(model, threshold=0.5).candidates(gray)
    scores = detection_scores(model, r_all)
    if model.mode == "bagged":
        assert trees_all == windows * model.leaf_values.shape[0]  # nothing dropped at threshold 0
    expected = as_dict(b_all[scores >= 0.5], r_all[scores >= 0.5])
    assert as_dict(b, r).keys() == expected.keys()
    assert trees < trees_all


# ------------------------------------------------------------------ threshold invariance

#: Scan settings the invariance property draws from (exit levels: the model's own rows).
SETTINGS_DRAWN = st.fixed_dictionaries({
    "stride": st.sampled_from([1.5, 2.0, 3.0]),
    "scale_step": st.sampled_from([1.15, 1.25, 1.5]),
    "overhang": st.sampled_from([0.0, 0.25, 0.5]),
    "nms_iou": st.sampled_from([0.2, 0.3, 0.5]),
    "early_exit": st.booleans(),
    "exit_level": st.sampled_from([None, None, 0.05, 0.3, 0.5, 0.9]),
    "box_voting": st.sampled_from([None, None, 0.3, 0.5, 1.0]),
})


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(mode=st.sampled_from(["bagged", "boosted"]), image=st.sampled_from([3, 4, 9]),
       chosen=SETTINGS_DRAWN, low=st.floats(0.0, 0.9), data=st.data())
def test_scan_at_a_threshold_is_the_lower_scan_cut_there(bagged, boosted, mode, image, chosen,
                                                          low, data):
    """For T' < T, the scan at T gives exactly the detections of the scan at T' that score T or
    more: same boxes, same scores, same order (issue 16). Greedy NMS visits boxes in descending
    score, so a box at or above T is only ever suppressed by one at or above T; what remains to
    prove is that nothing else in the scan depends on the threshold. T is drawn between T' and 1,
    often exactly at one of the lower scan's scores (the case `score` recommends), and the exits
    drawn include the tighter rows of --exit-level (the same at both thresholds)."""
    model = bagged if mode == "bagged" else boosted
    if not chosen["early_exit"]:
        chosen = dict(chosen, exit_level=None)
    gray = frame(image, 160, 160)
    lower = Engine(model, ScanSettings(threshold=low, **chosen)).scan(gray)
    above = np.unique(lower.scores[lower.scores > low])
    if len(above) and data.draw(st.booleans(), label="at a score"):
        high = float(data.draw(st.sampled_from(above.tolist()), label="T"))
    else:
        high = data.draw(st.floats(low, 1.0, exclude_min=True), label="T")
    upper = Engine(model, ScanSettings(threshold=high, **chosen)).scan(gray)
    cut = lower.scores >= high
    np.testing.assert_array_equal(upper.boxes, lower.boxes[cut])
    np.testing.assert_array_equal(upper.scores, lower.scores[cut])
    assert upper.windows == lower.windows and upper.trees <= lower.trees


def test_threshold_invariance_holds_on_the_numpy_route_and_on_candidates(model):
    """The same property through the numpy twin, and for the windows before suppression: the
    candidates of a scan at 0.5 are those of the scan at 0.05 whose score is 0.5 or more, in the
    same window order."""
    gray = frame(9)
    lo, hi = (Engine(model, ScanSettings(threshold=t, box_voting=None)) for t in (0.05, 0.5))
    b_lo, r_lo, _, _ = lo.candidates(gray)
    b_hi, r_hi, _, _ = hi.candidates(gray)
    keep = detection_scores(model, r_lo) >= 0.5
    assert keep.any() and not keep.all()
    np.testing.assert_array_equal(b_hi, b_lo[keep])
    np.testing.assert_array_equal(r_hi, r_lo[keep])
    d_lo, d_hi = lo.scan(gray, use_numpy=True), hi.scan(gray, use_numpy=True)
    cut = d_lo.scores >= 0.5
    np.testing.assert_array_equal(d_hi.boxes, d_lo.boxes[cut])
    np.testing.assert_array_equal(d_hi.scores, d_lo.scores[cut])


def test_box_voting_moves_only_the_boxes(model):
    """With box_voting=0.5 a scan at 0.1 keeps the plain scan's detections, scores and order;
    each box is the score-weighted mean of the object boxes of the windows (candidates of a plain
    scan at 0.05, half the threshold) that overlap the plain box by IoU >= 0.5 (geometry.iou) and
    score at least half of it, recomputed here one by one; the numpy route gives the same."""
    from detector.geometry import iou

    gray = frame(9)
    plain = Engine(model, ScanSettings(threshold=0.1, box_voting=None)).scan(gray)
    engine = Engine(model, ScanSettings(threshold=0.1, box_voting=0.5))
    voted = engine.scan(gray)
    assert len(plain.scores) >= 2
    np.testing.assert_array_equal(voted.scores, plain.scores)
    wb, raw, _, _ = Engine(model, ScanSettings(threshold=0.05, box_voting=None)).candidates(gray)
    scores = detection_scores(model, raw)
    x, y, w, h = window_box_to_object_box(wb[:, 0], wb[:, 1], wb[:, 2], wb[:, 3], engine.margin)
    boxes = clip_boxes(np.stack([x, y, w, h], axis=1), gray.shape[::-1])
    moved = 0
    for box, score, got in zip(plain.boxes, plain.scores, voted.boxes):
        votes = (iou(box[None], boxes)[0] >= 0.5) & (scores >= 0.5 * score)
        assert votes.sum() >= 1
        expected = (scores[votes, None] * boxes[votes]).sum(axis=0) / scores[votes].sum()
        np.testing.assert_allclose(got, expected, rtol=1e-12, atol=1e-9)
        moved += int(votes.sum() > 1)
    assert moved >= 1 and not np.array_equal(voted.boxes, plain.boxes)
    again = engine.scan(gray, use_numpy=True)
    np.testing.assert_array_equal(again.scores, voted.scores)
    np.testing.assert_allclose(again.boxes, voted.boxes, rtol=1e-12, atol=1e-9)
    for bad in (0.0, -0.5, 1.5):
        with pytest.raises(ValueError, match="box_voting"):
            ScanSettings(box_voting=bad)


def test_default_exits_are_the_models_own_and_the_level_picks_a_row(model):
    """By default the scan uses exit_thresholds (every calibration object the exit keeps) at any
    threshold; exit_level=L takes the exit_table row of the highest level not above L
    (Model.exits_for); a level needs the early exit."""
    for t in (0.05, 0.5, 0.95):
        np.testing.assert_array_equal(Engine(model, ScanSettings(threshold=t)).exits,
                                      model.exit_thresholds)
    row = int(np.searchsorted(model.exit_levels, np.float32(0.5), side="right")) - 1
    np.testing.assert_array_equal(Engine(model, ScanSettings(threshold=0.05, exit_level=0.5)).exits,
                                  model.exit_table[row])
    assert (model.exit_table[row] >= model.exit_thresholds).all()
    with pytest.raises(ValueError, match="needs early_exit"):
        ScanSettings(exit_level=0.5, early_exit=False)
    for bad in (-0.1, 1.5):
        with pytest.raises(ValueError, match="exit_level"):
            ScanSettings(exit_level=bad)
    with pytest.raises(ValueError, match="threshold"):
        ScanSettings(threshold=1.01)


def test_scores_are_rounded_as_the_file_writes_them(model):
    """The engine's scores have six decimals, the detections file's precision, so a threshold
    equal to a score read from a file keeps that detection."""
    result = Engine(model, ScanSettings(threshold=0.05)).scan(frame(3))
    assert len(result.scores)
    np.testing.assert_array_equal(result.scores, np.round(result.scores, 6))
    for s in result.scores[:5]:
        as_read = float(repr(float(s)))  # the detections file writes repr(), "0.80255"
        again = Engine(model, ScanSettings(threshold=as_read)).scan(frame(3))
        assert as_read in again.scores


def test_small_objects_enlarge_the_image(bagged):
    """--min-object below the window's object size (24 / 1.2 = 20 px) scans an enlarged image;
    the boxes come back in the frame's own pixels."""
    gray = frame(4)
    boxes, raw, windows, trees = every_window(bagged, min_object=10.0, overhang=0.0).candidates(gray)
    # scale 10 / 20 = 0.5: the image is enlarged 2x and scanned from a 24-pixel window up, which
    # is a 12-pixel window (a 10-pixel object) in the frame
    assert boxes[:, 2].min() == 12.0 and boxes[:, 3].min() == 12.0
    assert boxes[:, 0].min() == 0 and boxes[:, 1].min() == 0
    assert np.all(boxes[:, 0] + boxes[:, 2] <= 160) and np.all(boxes[:, 1] + boxes[:, 3] <= 160)
    # 2x enlarged frame 320 x 320 at scale 1, stride 2: 1 + (320 - 24) // 2 = 149 per side
    assert np.sum(boxes[:, 2] == 12.0) == 149 * 149


def test_max_object_applies_when_the_image_is_enlarged(bagged):
    gray = frame(4)
    boxes, _, _, _ = every_window(bagged, min_object=10.0, max_object=40.0).candidates(gray)
    objects = boxes[:, 2] / 1.2  # the object box a window stands for (margin 0.1)
    assert objects.min() == pytest.approx(10.0)
    # the scales grow by 1.2, so the largest object looked for is within a step of max_object
    assert 40.0 / 1.2 < objects.max() <= 40.0 + 1e-6


def test_contrast_gate_drops_exactly_the_flat_windows(model):
    """With the gate the scan keeps exactly the windows it keeps without it whose grey-level
    variance (numpy's population variance of the window's pixels) reaches the gate squared."""
    import copy

    gray = frame(9)
    gated = copy.deepcopy(model)
    gated.exit_thresholds[:] = -np.inf  # early exit on, but the gate is its only exit
    gated.exit_min_sigma = 30.0  # well inside the frame's range of window contrasts
    plain = copy.deepcopy(gated)
    plain.exit_min_sigma = 0.0
    b0, r0, w0, t0 = every_window(plain, threshold=0.0, early_exit=True).candidates(gray)
    b1, r1, w1, t1 = every_window(gated, threshold=0.0, early_exit=True).candidates(gray)
    b2, r2, _, t2 = every_window(gated, threshold=0.0, early_exit=True).candidates(gray, use_numpy=True)
    at1 = (b0[:, 2] == WINDOW[0]) & (b0[:, 3] == WINDOW[1])
    padded = np.pad(gray, 12, mode="edge")  # windows reach up to 12 pixels past the edges
    var = np.array([padded[y + 12:y + 36, x + 12:x + 36].astype(np.float64).var()
                    for x, y in b0[at1, :2].astype(int)])
    expected = as_dict(b0[at1][var >= 900.0], r0[at1][var >= 900.0])
    at1_gated = (b1[:, 2] == WINDOW[0]) & (b1[:, 3] == WINDOW[1])
    assert as_dict(b1[at1_gated], r1[at1_gated]) == pytest.approx(expected, abs=1e-12)
    assert 0 < len(expected) < at1.sum()  # the gate drops some windows and keeps some
    assert w1 == w0 and t1 < t0  # every window is counted; dropped ones cost no tree
    np.testing.assert_array_equal(b1, b2)  # the numpy twin gates the same windows
    assert t1 == t2
    # early exit off switches the gate off too
    assert every_window(gated, threshold=0.0).candidates(gray)[3] == \
        every_window(plain, threshold=0.0).candidates(gray)[3]


@given(st.floats(width=32, allow_nan=False), st.lists(st.floats(allow_nan=False), max_size=20),
       st.integers(-3, 3))
@settings(max_examples=200, deadline=None)
def test_split_bounds_reproduce_float32_comparison(t, others, steps):
    """``v > split_bounds(t)`` equals numpy's ``np.float32(v) > t`` (IEEE 754 rounding to nearest,
    ties to even) on random values and on the float64 values right around the bound."""
    from detector.scan import split_bounds

    t32 = np.float32(t)
    b = split_bounds(np.array([t32]))[0]
    near = [b]
    for direction in (np.inf, -np.inf):
        v = b
        for _ in range(abs(steps) + 1):
            v = np.nextafter(v, direction)
            near.append(v)
    with np.errstate(over="ignore"):
        above = float(np.nextafter(t32, np.float32(np.inf)))
    for v in [*near, *others, float(t32), above]:
        v = np.float64(v)
        if not np.isfinite(v):
            continue
        with np.errstate(over="ignore"):
            expected = bool(np.float32(v) > t32)
        assert bool(v > b) == expected, (t32, v, b)


@given(st.integers(1, 40), st.integers(1, 40), st.integers(0, 2**32 - 1))
@settings(max_examples=40, deadline=None)
def test_frame_integrals_equal_the_project_integrals(h, w, seed):
    """cv2.integral2 (the scan's fast path for 8-bit frames) == detector.features.integral_image,
    exactly."""
    from detector.features import integral_image, squared_integral_image
    from detector.scan import frame_integrals

    gray = np.random.default_rng(seed).integers(0, 256, (h, w), dtype=np.uint8)
    ii, sq = frame_integrals(gray)
    assert ii.dtype == np.int32 and sq.dtype == np.float64  # small frames: int32 sums
    np.testing.assert_array_equal(ii, integral_image(gray).ravel())
    np.testing.assert_array_equal(sq, squared_integral_image(gray).ravel())
    # the general path (any other dtype: here the same pixels as uint16) gives the same numbers
    ii2, sq2 = frame_integrals(gray.astype(np.uint16))
    np.testing.assert_array_equal(ii2, ii)
    np.testing.assert_array_equal(sq2, sq)
    # reused buffers (the scan's workspace) hold the same numbers, whatever they held before;
    # buffers of another shape or dtype are not used
    out = (np.full((h + 1, w + 1), -9, np.int32), np.full((h + 1, w + 1), -7.0))
    ii3, sq3 = frame_integrals(gray, out)
    assert np.shares_memory(ii3, out[0]) and np.shares_memory(sq3, out[1])
    np.testing.assert_array_equal(ii3, ii)
    np.testing.assert_array_equal(sq3, sq)
    for wrong in [(np.zeros((h + 2, w + 1), np.int32), np.zeros((h + 2, w + 1))),
                  (np.zeros((h + 1, w + 1)), np.zeros((h + 1, w + 1)))]:
        ii4, _ = frame_integrals(gray, wrong)
        assert not np.shares_memory(ii4, wrong[0])
        np.testing.assert_array_equal(ii4, ii)


def test_integral_image_switches_to_float64_where_int32_would_overflow(monkeypatch):
    """An all-white frame one pixel above the int32 limit gets uint32 sums, one above the uint32
    limit float64 sums; at the limits, int32 and uint32. (The limits are lowered here so that the
    frames stay small; the arithmetic is the same: 255 * pixels against 2**31 - 1, 2**32 - 1.)"""
    from detector.scan import _engine as scan
    from detector.features import integral_image

    assert scan.INT32_PIXELS * 255 <= 2**31 - 1 < (scan.INT32_PIXELS + 1) * 255
    assert scan.UINT32_PIXELS * 255 <= 2**32 - 1 < (scan.UINT32_PIXELS + 1) * 255
    monkeypatch.setattr(scan, "INT32_PIXELS", 12 * 10)
    monkeypatch.setattr(scan, "UINT32_PIXELS", 12 * 12)
    for h, w, dtype in [(12, 10, np.int32), (11, 11, np.uint32), (12, 12, np.uint32),
                        (13, 12, np.float64)]:
        gray = np.full((h, w), 255, np.uint8)
        ii, _ = scan.frame_integrals(gray)
        assert ii.dtype == dtype
        np.testing.assert_array_equal(ii, integral_image(gray).ravel())


def test_one_engine_reuses_its_buffers_across_sizes_and_threads(bagged):
    """The engine keeps its integral images and output arrays from frame to frame (per thread);
    frames of other sizes in any order, and two threads at once, get what a fresh engine gives."""
    from concurrent.futures import ThreadPoolExecutor

    settings_ = ScanSettings(threshold=0.05)
    frames = [frame(seed=s, width=w, height=h)
              for s, (w, h) in enumerate([(160, 160), (240, 160), (160, 160), (160, 200)] * 2)]
    fresh = [Engine(bagged, settings_).scan(f) for f in frames]
    shared = Engine(bagged, settings_)
    for f, want in zip(frames, fresh):
        got = shared.scan(f)
        np.testing.assert_array_equal(got.boxes, want.boxes)
        np.testing.assert_array_equal(got.scores, want.scores)
        assert got.trees == want.trees
    with ThreadPoolExecutor(2) as pool:
        results = list(pool.map(shared.scan, frames * 3))
    for got, want in zip(results, fresh * 3):
        np.testing.assert_array_equal(got.boxes, want.boxes)
        np.testing.assert_array_equal(got.scores, want.scores)


@pytest.mark.parametrize("limits, dtype", [((100, 100), np.float64), ((100, 10**9), np.uint32)])
def test_scan_gives_the_same_with_float64_and_uint32_sums(bagged, monkeypatch, limits, dtype):
    """Frames above the int32 limit are scanned on uint32 sums, above the uint32 limit on float64
    sums: the same windows and scores, by the compiled kernel and by its numpy twin."""
    from detector.scan import _engine as scan

    gray = frame(seed=6)
    want = every_window(bagged, threshold=0.2).candidates(gray)
    monkeypatch.setattr(scan, "INT32_PIXELS", limits[0])
    monkeypatch.setattr(scan, "UINT32_PIXELS", limits[1])
    engine = every_window(bagged, threshold=0.2)
    assert engine._work.tables(gray.shape)[0].dtype == dtype
    for use_numpy in (False, True):
        got = engine.candidates(gray, use_numpy=use_numpy)
        np.testing.assert_array_equal(got[0], want[0])
        np.testing.assert_allclose(got[1], want[1], rtol=0, atol=1e-9 if use_numpy else 0)
        assert got[2:] == want[2:]


def test_uint32_integral_images_hold_sums_past_two_to_the_31():
    """A frame whose pixel sum passes 2**31 (a white 2,920 x 2,960 frame with a noisy band of 20
    rows: about 255 * 8.64 million - 20 * 2,960 * 127.5 = 2.196e9) but stays below 2**32 gets a
    uint32 integral image, equal to numpy's exact int64 cumulative sums (the check that
    OpenCV's int32 additions wrap around), in a reused buffer and in a fresh one."""
    from detector.scan import frame_integrals
    from detector.scan._engine import INT32_PIXELS, UINT32_PIXELS

    gray = np.full((2920, 2960), 255, np.uint8)
    gray[1000:1020] = np.random.default_rng(5).integers(0, 256, (20, 2960), dtype=np.uint8)
    assert INT32_PIXELS < gray.size <= UINT32_PIXELS and 2**31 < int(gray.sum()) < 2**32
    exact = np.zeros((2921, 2961), np.int64)
    exact[1:, 1:] = gray.astype(np.int64).cumsum(0).cumsum(1)
    for out in ((np.full((2921, 2961), 7, np.uint32), np.zeros((2921, 2961))), None):
        ii, sq = frame_integrals(gray, out)
        assert ii.dtype == np.uint32
        np.testing.assert_array_equal(ii.reshape(2921, 2961), exact)


# ------------------------------------------------------------------ non-integer scales, slowly

REFERENCE_WINDOW = (20, 16)
#: Hand-picked features of a 20 x 16 window (x, y, width, height, weight): odd sizes, a column one
#: pixel wide, three and four rectangles, two single pixels that do not touch; at scales 1.2**k their
#: rounded corners give rectangles whose pixel counts are far from scale**2 times the area.
REFERENCE_FEATURES = np.array([
    [[3, 2, 5, 7, -1], [8, 2, 5, 7, 1], [0] * 5, [0] * 5],
    [[9, 1, 1, 6, -1], [9, 7, 1, 6, 1], [0] * 5, [0] * 5],
    [[1, 5, 3, 4, -1], [4, 5, 3, 4, 1], [7, 5, 3, 4, -1], [0] * 5],
    [[11, 3, 4, 5, -1], [15, 3, 4, 5, 1], [15, 8, 4, 5, -1], [11, 8, 4, 5, 1]],
    [[0, 0, 20, 8, -1], [0, 8, 20, 8, 1], [0] * 5, [0] * 5],
    [[0, 15, 1, 1, -1], [19, 0, 1, 1, 1], [0] * 5, [0] * 5],
], np.int32)


def round_half_up(v: float) -> int:
    return int(np.floor(v + 0.5))


def slow_window_value(padded, pad, x, y, scale, feature, normalize):
    """One feature on one window at ``scale``, pixel by pixel, as DEVELOPERS.md describes the scan:
    the window is round(20 s) x round(16 s) pixels at (x, y); every rectangle corner is scaled and
    rounded half up on its own; each rectangle's pixel sum is divided by its own rounded pixel
    count, and weighted by its unscaled area. Normalised: sum_i w_i A_i (mean_i - mu) / (sigma W H),
    with the window's mean mu and population standard deviation sigma (at least 1 grey level); raw:
    sum_i w_i A_i mean_i. At scale 1 both are the training values."""
    W, H = REFERENCE_WINDOW
    ws, hs = round_half_up(W * scale), round_half_up(H * scale)
    win = padded[y + pad:y + pad + hs, x + pad:x + pad + ws].astype(np.float64)
    assert win.shape == (hs, ws)
    mu = win.sum() / win.size
    sigma = max(np.sqrt(max((win * win).sum() / win.size - mu * mu, 0.0)), 1.0)
    total = 0.0
    for rx, ry, rw, rh, weight in feature.tolist():
        if weight == 0:
            continue
        x0, x1 = round_half_up(rx * scale), round_half_up((rx + rw) * scale)
        y0, y1 = round_half_up(ry * scale), round_half_up((ry + rh) * scale)
        mean = win[y0:y1, x0:x1].sum() / ((x1 - x0) * (y1 - y0))
        total += weight * rw * rh * ((mean - mu) if normalize else mean)
    return total / (W * H * sigma) if normalize else total


def safe_threshold(values, q):
    """A float32 split threshold near the q-quantile of ``values`` that lies in a gap between them,
    so that rounding (float64 here, the scan's own order of operations there, float32 in the split
    test) cannot move a value across it."""
    v = np.unique(values)
    for i in sorted(range(len(v) - 1), key=lambda i: abs(i - q * len(v))):
        lo, hi = v[i], v[i + 1]
        t = np.float32((lo + hi) / 2)
        margin = 1e-5 * max(1.0, abs(float(t)))
        if lo + margin < float(t) < hi - margin:
            return t
    raise AssertionError("no gap")


def reference_frames():
    rng = np.random.default_rng(21)
    noise = rng.integers(0, 256, (60, 70), dtype=np.uint8)
    yy, xx = np.mgrid[:60, :70]
    blobs = (128 + 90 * np.sin(xx / 4.0) * np.cos(yy / 5.0) + rng.normal(0, 12, (60, 70)))
    return [noise, np.clip(blobs, 0, 255).astype(np.uint8), frame(5, 160, 160)[40:100, 30:100]]


@pytest.mark.parametrize("normalize", [True, False])
@pytest.mark.parametrize("overhang", [0.0, 0.25])
def test_scan_at_scales_of_1_2_to_the_k_equals_a_slow_per_window_reference(normalize, overhang):
    """The compiled scan against the slow reference above, window by window, at the scales a real
    scan uses (1.2**k, k = 0..6, of which only the first is an integer), through a one-feature
    model (15 stumps on the one-pixel-wide feature at its quantiles: the raw score counts the
    thresholds a window's value exceeds) and a multi-feature one (12 trees of depth 2 over all six
    features, leaves 0, 0.25, 0.5, 0.75: the raw score sums the leaves each window reaches). Every
    split threshold lies in a gap between the reference values, so the scan must reach the very
    same leaves. Windows past the edges see the border repeated (np.pad, mode "edge")."""
    W, H = REFERENCE_WINDOW
    scales = [1.0]
    while len(scales) < 7:
        scales.append(scales[-1] * 1.2)  # as the scan steps: 1.2, 1.44, 1.728, 2.0736, ...
    sizes = {(round_half_up(W * s), round_half_up(H * s)): s for s in scales}
    assert len(sizes) == 7  # 20x16, 24x19, 29x23, 35x28, 41x33, 50x40, 60x48
    stumps = 15
    for gray in reference_frames():
        settings_ = dict(stride=2.0, scale_step=1.2, overhang=overhang, threshold=0.0,
                         early_exit=False, nms_iou=1.0)
        probe = Model(REFERENCE_WINDOW, REFERENCE_FEATURES, [[0]], [[0.0]], [[0.0, 1.0]],
                      [-np.inf], "bagged", normalize=normalize)
        boxes, _, windows, _ = Engine(probe, ScanSettings(**settings_)).candidates(gray)
        assert len(boxes) == windows  # bagged at threshold 0: every window is reported
        assert {(int(w), int(h)) for w, h in boxes[:, 2:]} == set(sizes)
        if overhang == 0.0:  # every window inside, at steps of round(2 s) from the corner
            for (ws, hs), s in sizes.items():
                step = round_half_up(2 * s)
                count = ((70 - ws) // step + 1) * ((60 - hs) // step + 1)
                assert ((boxes[:, 2] == ws) & (boxes[:, 3] == hs)).sum() == count
        pad = 20
        padded = np.pad(gray, pad, mode="edge")
        windows_ = [(int(x), int(y), sizes[(int(w), int(h))]) for x, y, w, h in boxes]
        values = np.array([[slow_window_value(padded, pad, x, y, s, f, normalize)
                            for f in REFERENCE_FEATURES] for x, y, s in windows_])

        # one feature: a staircase of stumps on feature 1
        thr = [safe_threshold(values[:, 1], q) for q in np.linspace(0.05, 0.95, stumps)]
        one = Model(REFERENCE_WINDOW, REFERENCE_FEATURES[1:2], np.zeros((stumps, 1), np.int32),
                    np.array(thr, np.float32)[:, None], np.tile([[0.0, 1.0]], (stumps, 1)),
                    np.full(stumps, -np.inf), "bagged", normalize=normalize)
        expected = (values[:, 1:2] > np.array(thr, np.float64)[None, :]).sum(axis=1)
        b1, r1, _, _ = Engine(one, ScanSettings(**settings_)).candidates(gray)
        np.testing.assert_array_equal(b1, boxes)
        np.testing.assert_array_equal(r1, expected)
        assert len(np.unique(expected)) > 10  # the staircase spreads the windows out

        # six features: depth-2 trees, root on feature t % 6, children on the next two
        n_trees = 12
        nf = np.array([[t % 6, (t + 1) % 6, (t + 2) % 6] for t in range(n_trees)], np.int32)
        qs = np.linspace(0.2, 0.8, n_trees)
        nt = np.array([[safe_threshold(values[:, f], q) for f in row] for row, q in zip(nf, qs)],
                      np.float32)
        leaves = np.tile(np.array([[0.0, 0.25, 0.5, 0.75]], np.float32), (n_trees, 1))
        many = Model(REFERENCE_WINDOW, REFERENCE_FEATURES, nf, nt, leaves, np.full(n_trees, -np.inf),
                     "bagged", normalize=normalize)
        expected = np.zeros(len(values))
        for t in range(n_trees):
            right = values[:, nf[t, 0]] > nt[t, 0]  # node 0; children 1 (left) and 2 (right)
            child = np.where(right, nf[t, 2], nf[t, 1])
            child_t = np.where(right, nt[t, 2], nt[t, 1])
            second = values[np.arange(len(values)), child] > child_t
            expected += leaves[t, 2 * right + second]
        b2, r2, _, _ = Engine(many, ScanSettings(**settings_)).candidates(gray)
        np.testing.assert_array_equal(b2, boxes)
        np.testing.assert_array_equal(r2, expected)


@pytest.mark.parametrize("settings", [dict(), dict(overhang=0.5, nms_iou=0.6),
                                      dict(overhang=0.0, stride=3.0), dict(min_object=12.0)])
def test_numpy_route_scan_equals_the_compiled_scan(model, settings):
    """Engine.scan(use_numpy=True) (the numpy twin of the kernel, then candidates -> detections
    with numpy) gives the compiled route's detections box for box, in the same order, with the
    same scores (to 1e-12: the raw sums agree to 1e-9 or better, see the twin tests above), on a
    scenario frame, a wider one, noise and a flat frame, at the settings of the finish test and
    threshold 0, so that every window is a candidate (and the bagged zeros tie by the thousand)."""
    rng = np.random.default_rng(8)
    images = [frame(3), frame(4, 200, 160), rng.integers(0, 256, (47, 71), dtype=np.uint8),
              np.full((30, 30), 128, np.uint8)]
    engine = Engine(model, ScanSettings(threshold=0.0, **settings))  # every window a candidate
    found = 0
    for gray in images:
        compiled = engine.scan(gray)
        numpy_route = engine.scan(gray, use_numpy=True)
        assert (numpy_route.windows, numpy_route.trees) == (compiled.windows, compiled.trees)
        np.testing.assert_array_equal(numpy_route.boxes, compiled.boxes)
        np.testing.assert_allclose(numpy_route.scores, compiled.scores, rtol=0, atol=1e-12)
        found += len(compiled.scores)
    assert found > 0  # at threshold 0 (the flat frame aside, which the contrast gate empties)


# --- the pyramid's levels: area averaging read off the frame's integral image ---------------------

def _integral(img, dtype):
    ii = np.zeros((img.shape[0] + 1, img.shape[1] + 1), dtype)
    ii[1:, 1:] = img.astype(np.int64).cumsum(0).cumsum(1)
    return ii


def test_area_shrink_by_hand():
    from detector.scan import area_shrink_numpy, level_edges
    from detector.scan._kernels import area_shrink

    # 4 x 2 halved along x: block means (0 + 1 + 4 + 5) / 4 = 2.5 -> 2 (ties to even),
    # (2 + 3 + 6 + 7) / 4 = 4.5 -> 4
    img = np.arange(8, dtype=np.uint8).reshape(2, 4)
    for shrink in (area_shrink, area_shrink_numpy):
        out = shrink(_integral(img, np.int32), level_edges(4, 2), level_edges(2, 1),
                     np.empty((1, 2), np.uint8))
        assert out.tolist() == [[2, 4]]
    # 3 x 1 to 2 x 1: pixels 30, 60, 90; edges 0, 1.5, 3: (30 + 60 / 2) / 1.5 = 40 and
    # (60 / 2 + 90) / 1.5 = 80
    img = np.array([[30, 60, 90]], np.uint8)
    for shrink in (area_shrink, area_shrink_numpy):
        out = shrink(_integral(img, np.float64), level_edges(3, 2), level_edges(1, 1),
                     np.empty((1, 2), np.uint8))
        assert out.tolist() == [[40, 80]]


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(h=st.integers(2, 40), w=st.integers(2, 40), data=st.data(),
       dtype=st.sampled_from([np.int32, np.uint32, np.float64]))
def test_area_shrink_kernel_equals_its_numpy_twin(h, w, data, dtype):
    from detector.scan import area_shrink_numpy, level_edges
    from detector.scan._kernels import area_shrink

    lh = data.draw(st.integers(1, h))
    lw = data.draw(st.integers(1, w))
    seed = data.draw(st.integers(0, 2**16))
    img = np.random.default_rng(seed).integers(0, 256, (h, w)).astype(np.uint8)
    ii = _integral(img, dtype)
    xe, ye = level_edges(w, lw), level_edges(h, lh)
    a = area_shrink(ii, xe, ye, np.empty((lh, lw), np.uint8))
    b = area_shrink_numpy(ii, xe, ye, np.empty((lh, lw), np.uint8))
    np.testing.assert_array_equal(a, b)


def _exact_area_mean(img, size, u, v):
    """The area mean of level pixel (u, v) in exact rational arithmetic."""
    from fractions import Fraction
    from math import ceil, floor

    h, w = img.shape
    x0, x1 = Fraction(u * w, size[0]), Fraction((u + 1) * w, size[0])
    y0, y1 = Fraction(v * h, size[1]), Fraction((v + 1) * h, size[1])
    total = Fraction(0)
    for j in range(floor(y0), ceil(y1)):
        oy = min(y1, j + 1) - max(y0, j)
        for i in range(floor(x0), ceil(x1)):
            total += oy * (min(x1, i + 1) - max(x0, i)) * int(img[j, i])
    return total / ((x1 - x0) * (y1 - y0))


@pytest.mark.parametrize("size", [(345, 259), (287, 216), (200, 150), (96, 72), (80, 60), (13, 7)])
def test_shrunk_levels_agree_with_cv2_inter_area(size):
    """Reference library: ``cv2.resize(..., interpolation=cv2.INTER_AREA)`` computes the same area
    means (in float32). The two may only part where the exact mean is a tie, k + 1/2, which
    either may round either way; everywhere else they are equal. The exact means are checked in
    rational arithmetic."""
    import cv2

    from detector.scan import frame_integrals, level_edges, shrink_level

    rng = np.random.default_rng(size[0])
    # texture and flat regions: noise, a ramp (many exact ties), and a constant block
    img = rng.integers(0, 256, (480, 640)).astype(np.uint8)
    img[:, :200] = np.tile(np.linspace(0, 255, 200).astype(np.uint8), (480, 1))
    img[300:, 400:] = 77
    ii = frame_integrals(img)[0].reshape(481, 641)
    ours = shrink_level(ii, (level_edges(640, size[0]), level_edges(480, size[1])))
    ref = cv2.resize(img, size, interpolation=cv2.INTER_AREA)
    assert np.abs(ours.astype(int) - ref).max() <= 1
    differ = np.argwhere(ours != ref)
    assert len(differ) < 0.03 * ours.size
    for v, u in differ[:: max(1, len(differ) // 200)]:  # at most about 200, spread over the level
        mean = _exact_area_mean(img, size, int(u), int(v))
        assert mean - int(mean) == 0.5, (u, v, mean)
    # a sample of the pixels where they agree: ours is the exact mean rounded
    for v, u in rng.integers(0, [size[1], size[0]], (100, 2)):
        mean = _exact_area_mean(img, size, int(u), int(v))
        if mean - int(mean) != 0.5:
            assert ours[v, u] == round(mean), (u, v, mean)
