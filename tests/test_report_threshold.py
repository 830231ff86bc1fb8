"""The data behind report.html's threshold slider (detector/reporting/threshold_data.py), read back
from the page: its counts at a threshold are those of detector.evaluation.evaluate run on the
detections scoring that threshold or more.

References: counts worked by hand (arithmetic in the comments) and the project's evaluation code
(evaluate on the detections a threshold keeps, reference for every count); the prefix rule the data
rests on is COCO's greedy matching in descending score (Lin et al., 2014, as pycocotools does it).
"""

import json
import math
import re

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from detector.evaluation import evaluate
from detector.reporting.inputs import at_threshold, read_score_inputs
from detector.reporting.score_report import score_files, write_report
from detector.reporting.threshold_data import counts_at, threshold_data

# the example of tests/test_report.py: a.png: a hit (0.9), a false alarm (0.7), a hit at IoU
# 16*15/(256+256-240) = 0.882 (0.6); b.png: a false alarm (0.8), its object missed; c.png:
# object-free, a false alarm (0.5); d.png: not labelled; e.png: labelled, never scanned.
from test_report import DETECTIONS_CSV, LABELS_CSV  # noqa: E402


def embedded(report_html):
    """The slider's data as the page holds it."""
    text = report_html.read_text(encoding="utf-8")
    found = re.search(r'<script type="application/json" id="threshold-data">(.*?)</script>', text,
                      re.S)
    assert found, "no threshold data in the page"
    return json.loads(found.group(1))


def evaluated_counts(detections, ground_truth, t, **kwargs):
    """The reference: evaluate() on the detections scoring t or more, alone."""
    ev = evaluate(at_threshold(detections, t), ground_truth, size_buckets=None, **kwargs)
    rows = [(r.image, r.objects, r.detections, r.true_detections, r.false_alarms, r.misses)
            for r in ev.per_image]
    return (ev.true_detections, ev.false_alarms, ev.misses), rows, ev


def slider_counts(data, t):
    c = counts_at(data, t)
    rows = [(r["image"], r["objects"], r["detections"], r["true_detections"], r["false_alarms"],
             r["misses"]) for r in c["per_image"]]
    return (c["true_detections"], c["false_alarms"], c["misses"]), rows, c


@pytest.fixture
def report(tmp_path):
    (tmp_path / "labels.csv").write_text(LABELS_CSV, encoding="utf-8")
    (tmp_path / "detections.csv").write_text(DETECTIONS_CSV, encoding="utf-8")
    result = score_files(tmp_path / "detections.csv", tmp_path / "labels.csv", tmp_path / "r")
    inputs = read_score_inputs(tmp_path / "detections.csv", tmp_path / "labels.csv")
    return tmp_path / "r" / "report.html", inputs, result


def test_embedded_data_hand_worked(report):
    page, _, result = report
    data = embedded(page)
    # best F1 (tests/test_report.py works it out): 0.6
    assert result.summary["operating_point"]["threshold"] == 0.6
    assert data["start"] == data["recommended"] == 0.6 and data["iou_threshold"] == 0.5
    assert data["images"] == ["a.png", "b.png", "c.png", "e.png"]
    assert data["objects"] == [2, 1, 0, 1]
    # grouped by image in file order; d.png (not labelled) left out; a.png's 0.6 found label 1
    assert data["detections"] == {"image": [0, 0, 0, 1, 2], "score": [0.9, 0.7, 0.6, 0.8, 0.5],
                                  "match": [0, -1, 1, -1, -1]}


# threshold -> (true, false alarms, misses), by hand over 0.9 T, 0.8 F, 0.7 F, 0.6 T, 0.5 F and
# 4 objects: 0.6 keeps four (T 2, F 2, missed 4 - 2); 0.71 keeps 0.9 and 0.8; 0.81 keeps 0.9;
# 0.5 keeps all five; 0.91 keeps none (all 4 missed)
HAND = {0.0: (2, 3, 2), 0.5: (2, 3, 2), 0.6: (2, 2, 2), 0.71: (1, 1, 3), 0.81: (1, 0, 3),
        0.91: (0, 0, 4), 1.0: (0, 0, 4)}


@pytest.mark.parametrize("t", sorted(HAND))
def test_counts_at_a_threshold_equal_the_evaluation(report, t):
    page, inputs, _ = report
    data = embedded(page)
    totals, rows, c = slider_counts(data, t)
    assert totals == HAND[t]
    ref_totals, ref_rows, ev = evaluated_counts(inputs.detections, inputs.ground_truth, t)
    assert totals == ref_totals and rows == ref_rows
    # precision and recall: the last point of the evaluation's curve at that threshold
    if ev.detections:
        assert c["precision"] == ev.precision[-1] and c["recall"] == ev.recall[-1]
    else:
        assert math.isnan(c["precision"]) and c["recall"] == 0.0


def test_page_starts_at_the_recommended_threshold(report):
    """The counts written into the page (before any script runs) are the report's own at the
    operating point: 2 true, 2 false alarms, 2 misses (see HAND), precision 2/4, recall 2/4."""
    page, _, result = report
    text = page.read_text(encoding="utf-8")
    written = dict(re.findall(r'<td id="at-([a-z-]+)">([^<]*)</td>', text))
    s = result.summary
    assert written == {"detections": "4", "true-detections": "2", "false-alarms": "2",
                       "misses": "2", "precision": "0.500", "recall": "0.500"}
    assert (s["operating_point"]["precision"], s["operating_point"]["recall"]) == (0.5, 0.5)
    assert 'value="0.6"' in text and 'id="threshold" type="range" min="0" max="1"' in text
    # one inactive review link per labelled image, none with an address in it
    links = re.findall(r'<a class="review-link" data-image="([^"]*)" aria-disabled="true">', text)
    assert sorted(links) == ["a.png", "b.png", "c.png", "e.png"]
    assert "href" not in text.split('id="per-image"')[1].split("</table>")[0]


def test_greedy_duplicates_and_ignore_regions_hand_worked():
    """One image: label 0 at (0, 0, 20, 20), label 1 an ignore region at (40, 0, 20, 20).
    0.9 at (2, 0, 20, 20): IoU 18*20 / (400 + 400 - 360) = 0.818 with label 0, takes it;
    0.8 at (0, 0, 20, 20): IoU 1 with label 0, but it is taken: a false alarm (greedy by score);
    0.7 on the ignore region: counted neither way (-2)."""
    gt = {"a.png": [[0, 0, 20, 20], [40, 0, 20, 20]]}
    det = {"a.png": ([[2, 0, 20, 20], [0, 0, 20, 20], [40, 0, 20, 20]], [0.9, 0.8, 0.7])}
    ignore = {"a.png": [False, True]}
    ev = evaluate(det, gt, size_buckets=None, ignore=ignore)
    data = threshold_data(ev, det)
    assert data["detections"]["match"] == [0, -1, -2] and data["objects"] == [1]
    # t -> (true, false alarms, misses, detections kept)
    for t, hand in ((0.0, (1, 1, 0, 3)), (0.75, (1, 1, 0, 2)), (0.85, (1, 0, 0, 1)),
                    (0.95, (0, 0, 1, 0))):
        totals, rows, c = slider_counts(data, t)
        assert totals + (c["detections"],) == hand
        ref_totals, ref_rows, _ = evaluated_counts(det, gt, t, ignore=ignore)
        assert totals == ref_totals and rows == ref_rows


def test_report_without_detections_has_no_slider(tmp_path):
    gt = {"a.png": [[0, 0, 10, 10]]}
    det = {"a.png": ([[0, 0, 10, 10]], [0.7])}
    ev = evaluate(det, gt)
    from detector.evaluation import choose_operating_point

    write_report(tmp_path / "r", ev, choose_operating_point(ev))
    text = (tmp_path / "r" / "report.html").read_text(encoding="utf-8")
    assert "No slider" in text and 'type="application/json"' not in text


def test_data_needs_the_detections_it_was_computed_from():
    ev = evaluate({"a.png": ([[0, 0, 10, 10]], [0.7])}, {"a.png": [[0, 0, 10, 10]]})
    with pytest.raises(ValueError, match="1 detections"):
        threshold_data(ev, {"a.png": (np.zeros((0, 4)), np.zeros(0))})


boxes = st.tuples(st.integers(0, 40), st.integers(0, 40), st.integers(4, 24), st.integers(4, 24))


@settings(max_examples=60, deadline=None)
@given(images=st.lists(st.tuples(st.lists(st.tuples(boxes, st.booleans()), max_size=4),
                                 st.lists(st.tuples(boxes, st.sampled_from([0.1, 0.3, 0.5, 0.7, 0.9])),
                                          max_size=5)),
                       min_size=1, max_size=4),
       size_range=st.sampled_from([None, (0.0, 12.0), (12.0, math.inf)]),
       iou_threshold=st.sampled_from([0.3, 0.5]))
def test_counts_equal_the_evaluation_at_every_threshold(images, size_range, iou_threshold):
    """Property: with ignore regions, a size range and tied scores, the slider's counts at any
    threshold are evaluate()'s on the detections scoring that or more."""
    gt = {f"{k}.png": np.array([b for b, _ in g], dtype=float).reshape(-1, 4)
          for k, (g, _) in enumerate(images)}
    ignore = {f"{k}.png": np.array([f for _, f in g], dtype=bool) for k, (g, _) in enumerate(images)}
    det = {f"{k}.png": (np.array([b for b, _ in d], dtype=float).reshape(-1, 4),
                        np.array([s for _, s in d], dtype=float)) for k, (_, d) in enumerate(images)}
    kwargs = dict(ignore=ignore, size_range=size_range, iou_threshold=iou_threshold)
    ev = evaluate(det, gt, size_buckets=None, **kwargs)
    data = json.loads(json.dumps(threshold_data(ev, det)))   # as the page carries it
    for t in (0.0, 0.1, 0.2, 0.3, 0.5, 0.69, 0.7, 0.9, 0.95):
        totals, rows, c = slider_counts(data, t)
        ref_totals, ref_rows, ref = evaluated_counts(det, gt, t, **kwargs)
        assert totals == ref_totals and rows == ref_rows, t
        if ref.detections:
            assert c["precision"] == ref.precision[-1]
