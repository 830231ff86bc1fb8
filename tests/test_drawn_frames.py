"""Drawn frames a person can read (detector.reporting.drawing.draw_frame and `scan --draw`):
score labels that never overlap (a property test), the drawn classes equal to the score's at the
same IoU and threshold (detector.evaluation, itself held to pycocotools), and a legend below the
frame instead of over it. Pixels are checked only coarsely (a colour present in a region), so
that no test depends on one library version's exact drawing."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings, strategies as st

from detector.evaluation import evaluate
from detector.reporting.drawing import BOX_STYLES, bgr, draw_frame, frame_marks, place_labels


@settings(max_examples=300, deadline=None)
@given(st.lists(st.tuples(st.integers(-20, 200), st.integers(-20, 150), st.integers(1, 80),
                          st.integers(1, 80), st.integers(6, 40), st.integers(6, 16)),
                max_size=25),
       st.integers(40, 240), st.integers(40, 180))
def test_placed_labels_never_overlap_and_stay_on_the_canvas(items, width, height):
    boxes = [b[:4] for b in items]
    sizes = [b[4:] for b in items]
    rects = place_labels(boxes, sizes, (width, height))
    assert len(rects) == len(items)
    placed = [r for r in rects if r is not None]
    for k, r in enumerate(placed):
        assert 0 <= r[0] < r[2] <= width and 0 <= r[1] < r[3] <= height
        for other in placed[k + 1:]:
            assert r[2] <= other[0] or other[2] <= r[0] or r[3] <= other[1] or other[3] <= r[1]
    for rect, (tw, th) in zip(rects, sizes):
        if rect is not None:
            assert (rect[2] - rect[0], rect[3] - rect[1]) == (tw, th)
    # a single label on an empty canvas always finds a place when it fits beside its box
    if items and rects[0] is None:
        x, y, w, h, tw, th = items[0]
        assert tw > width or th > height or not any(
            0 <= sx and sx + tw <= width and 0 <= sy and sy + th <= height
            for sx, sy in ((x, y - th), (x, y), (x, y + h), (x + w - tw, y - th),
                           (x + w - tw, y), (x + w - tw, y + h)))


@settings(max_examples=100, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 90), st.integers(0, 90), st.integers(5, 30),
                          st.integers(5, 30), st.floats(0.0, 1.0)), max_size=12),
       st.lists(st.tuples(st.integers(0, 90), st.integers(0, 90), st.integers(5, 30),
                          st.integers(5, 30)), max_size=6),
       st.floats(0.0, 1.0))
def test_drawn_classes_are_the_score_s(dets, gts, threshold):
    """At the drawing threshold, the matched / false alarm / missed marks count what
    detector.evaluation counts for the detections at or above it (IoU 0.5)."""
    boxes = np.array([d[:4] for d in dets], np.float64).reshape(-1, 4)
    scores = np.array([d[4] for d in dets], np.float64)
    gt = np.array(gts, np.float64).reshape(-1, 4)
    _, kept, kinds, missed = frame_marks(boxes, scores, threshold, gt)
    keep = scores >= threshold
    ev = evaluate({"a.png": (boxes[keep], scores[keep])}, {"a.png": gt}, size_buckets=None)
    assert kinds.count("matched") == ev.true_detections
    assert kinds.count("false alarm") == ev.false_alarms
    assert len(missed) == ev.misses
    assert (np.diff(kept) <= 0).all()


def test_frame_with_labels_has_its_legend_below_and_its_colours():
    gray = np.full((120, 200), 90, np.uint8)
    img = draw_frame(gray, "a.png", [[20, 30, 40, 40], [120, 30, 30, 30]], [0.9, 0.8],
                     threshold=0.5, truth={"a.png": [[20, 30, 40, 40], [150, 80, 30, 30]]})
    assert img.shape[1] == 200 and img.shape[0] > 120
    # the frame itself is untouched away from the boxes: the legend is not drawn over it
    assert (img[100:118, 60:110] == 90).all()

    def has(colour, region):
        return bool((np.abs(region.astype(int) - np.array(bgr(colour))).sum(axis=2) < 40).any())

    assert has(BOX_STYLES["matched"][0], img[28:72, 18:62])        # the matched box
    assert has(BOX_STYLES["false alarm"][0], img[28:62, 118:152])   # the false alarm
    assert has(BOX_STYLES["missed"][0], img[78:112, 148:182])       # the missed label
    assert has(BOX_STYLES["matched"][0], img[120:, :])              # and the legend below


def test_scan_draws_at_the_operating_threshold_with_labels(tmp_path):
    """`scan --draw` draws the detections at the larger of --threshold and 0.5 by default (a scan
    at 0.05 for the curve still draws what a daily scan would keep), --draw-threshold sets it, and
    --labels adds the labelled boxes; the drawing is the frame plus a legend strip."""
    import cv2
    from typer.testing import CliRunner

    from cli.main import app

    run = CliRunner()
    data = tmp_path / "s"
    assert run.invoke(app, ["synth", str(data), "--frames", "6"]).exit_code == 0
    train, test = data / "train", data / "test"
    assert run.invoke(app, ["harvest", str(train / "images"), str(train / "labels.csv"), "--out",
                            str(tmp_path / "b.npz"), "--copies", "1"]).exit_code == 0
    assert run.invoke(app, ["train", str(tmp_path / "b.npz"), "--out", str(tmp_path / "m.npz"),
                            "--trees", "5", "--pool", "200", "--mine-rounds", "0"]).exit_code == 0
    r = run.invoke(app, ["scan", str(tmp_path / "m.npz"), str(test / "images"), "--out",
                         str(tmp_path / "d.csv"), "--threshold", "0.05", "--draw",
                         str(tmp_path / "drawn"), "--labels", str(test / "labels.csv")])
    assert r.exit_code == 0, r.output
    assert "drawing detections at score >= 0.5 against" in r.output
    frame = next((test / "images").iterdir())
    drawn = cv2.imread(str(tmp_path / "drawn" / frame.name))
    assert drawn.shape[0] > 240 and drawn.shape[1] == 320
    r = run.invoke(app, ["scan", str(tmp_path / "m.npz"), str(test / "images"), "--out",
                         str(tmp_path / "d2.csv"), "--draw", str(tmp_path / "drawn2"),
                         "--draw-threshold", "0.8"])
    assert r.exit_code == 0 and "drawing detections at score >= 0.8\n" in r.output
    bad = run.invoke(app, ["scan", str(tmp_path / "m.npz"), str(test / "images"), "--out",
                           str(tmp_path / "d3.csv"), "--draw-threshold", "0.8"])
    assert bad.exit_code == 2
