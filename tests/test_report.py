"""The score stage as a library: reading the two files, the name-mismatch hint, the operating point,
the summary, thumbnails, the report folder and reading a threshold back.

References, named at each test: hand-worked counts (arithmetic in the comments), a brute-force
re-matching at every threshold (hypothesis), pixel positions worked by hand for thumbnails, and
COCO JSON files (Lin et al., 2014) written by hand.
"""

import json
import math
import os
from pathlib import Path

import cv2
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from detector.errors import InputError
from detector.evaluation import choose_operating_point, evaluate, match_image
from detector.reporting.drawing import BOX_STYLES, thumbnail
from detector.reporting.inputs import check_image_names, read_score_inputs
from detector.reporting.score_report import score_files
from detector.reporting.summary import build_summary, summary_table, threshold_from_summary

LABELS_CSV = """image,x,y,width,height
a.png,4,4,16,16
a.png,36,20,16,16
b.png,10,10,20,20
c.png,,,,
e.png,20,10,16,16
"""
# a.png: two objects, a hit (0.9), a hit at IoU 16*15/(256+256-240) = 0.882 (0.6), a false alarm
# (0.7); b.png: a false alarm (0.8), its object missed; c.png: object-free, a false alarm (0.5);
# d.png: not labelled; e.png: labelled, never scanned, its object missed.
DETECTIONS_CSV = """image,x,y,width,height,score
a.png,4,4,16,16,0.9
a.png,30,2,10,10,0.7
a.png,36,21,16,16,0.6
b.png,40,30,12,12,0.8
c.png,0,0,8,8,0.5
d.png,1,1,5,5,0.95
"""


def write(path, text):
    path.write_text(text, encoding="utf-8")
    return path


@pytest.fixture
def files(tmp_path):
    return write(tmp_path / "detections.csv", DETECTIONS_CSV), write(tmp_path / "labels.csv",
                                                                     LABELS_CSV)


# ---------------------------------------------------------------- reading the inputs


def test_read_score_inputs_keeps_every_labelled_image(files):
    inputs = read_score_inputs(*files)
    assert sorted(inputs.ground_truth) == ["a.png", "b.png", "c.png", "e.png"]
    assert inputs.ground_truth["c.png"].shape == (0, 4)
    assert sorted(inputs.detections) == ["a.png", "b.png", "c.png", "d.png"]
    boxes, scores = inputs.detections["a.png"]
    assert boxes.tolist() == [[4, 4, 16, 16], [30, 2, 10, 10], [36, 21, 16, 16]]
    assert scores.tolist() == [0.9, 0.7, 0.6]


def test_coco_inputs_give_the_same_summary_as_csv(files, tmp_path):
    # the same labels and detections, written by hand as COCO JSON (Lin et al., 2014): a dataset
    # object for the labels, and for the detections both forms the reader accepts
    labels = {
        "images": [{"id": 11, "file_name": "a.png"}, {"id": 12, "file_name": "b.png"},
                   {"id": 13, "file_name": "c.png"}, {"id": 15, "file_name": "e.png"}],
        "annotations": [
            {"id": 1, "image_id": 11, "bbox": [4, 4, 16, 16], "category_id": 1},
            {"id": 2, "image_id": 11, "bbox": [36, 20, 16, 16], "category_id": 1},
            {"id": 3, "image_id": 12, "bbox": [10, 10, 20, 20], "category_id": 1},
            {"id": 4, "image_id": 15, "bbox": [20, 10, 16, 16], "category_id": 1}],
        "categories": [{"id": 1, "name": "nut"}]}
    results = [{"image_id": 11, "bbox": [4, 4, 16, 16], "score": 0.9},
               {"image_id": 11, "bbox": [30, 2, 10, 10], "score": 0.7},
               {"image_id": 11, "bbox": [36, 21, 16, 16], "score": 0.6},
               {"image_id": 12, "bbox": [40, 30, 12, 12], "score": 0.8},
               {"image_id": 13, "bbox": [0, 0, 8, 8], "score": 0.5}]
    dataset = {"images": labels["images"] + [{"id": 16, "file_name": "d.png"}],
               "annotations": [dict(r, id=k, category_id=1) for k, r in enumerate(
                   results + [{"image_id": 16, "bbox": [1, 1, 5, 5], "score": 0.95}], 1)]}
    labels_json = write(tmp_path / "labels.json", json.dumps(labels))
    dataset_json = write(tmp_path / "detections.json", json.dumps(dataset))
    results_json = write(tmp_path / "results.json", json.dumps(results))

    def summary(det, lab):
        inputs = read_score_inputs(det, lab)
        ev = evaluate(inputs.detections, inputs.ground_truth)
        return build_summary(ev, choose_operating_point(ev))

    from_csv = summary(*files)
    assert summary(dataset_json, labels_json) == from_csv
    # a results list has no d.png: everything but the unlabelled counts is the same
    from_results = summary(results_json, labels_json)
    assert from_results["unlabelled_image_count"] == 0
    for key in ("unlabelled_image_count", "unlabelled_images", "unlabelled_detections"):
        from_results.pop(key), from_csv.pop(key)
    assert from_results == from_csv


def test_coco_results_list_needs_coco_labels(tmp_path):
    det = write(tmp_path / "results.json", '[{"image_id": 1, "bbox": [0, 0, 5, 5], "score": 0.5}]')
    with pytest.raises(InputError, match="names its images by id") as err:
        read_score_inputs(det, write(tmp_path / "labels.csv", LABELS_CSV))
    assert err.value.path == str(det)


@pytest.mark.parametrize("content", ["", "\n  \n", "image,x,y,width,height,score\n"])
def test_empty_detections_file_means_no_detections(tmp_path, content):
    det = write(tmp_path / "detections.csv", content)
    inputs = read_score_inputs(det, write(tmp_path / "labels.csv", LABELS_CSV))
    assert inputs.detections == {}
    assert len(inputs.ground_truth) == 4
    assert any("empty" in n for n in inputs.notes) == (not content.strip())


def test_labels_without_images_refused(tmp_path):
    det = write(tmp_path / "detections.csv", DETECTIONS_CSV)
    lab = write(tmp_path / "labels.csv", "image,x,y,width,height\n")
    with pytest.raises(InputError, match="labels file lists no images") as err:
        read_score_inputs(det, lab)
    assert err.value.path == str(lab)


def test_malformed_row_names_file_and_line(tmp_path):
    det = write(tmp_path / "detections.csv",
                "image,x,y,width,height,score\na.png,1,2,3,4,0.5\na.png,1,2,three,4,0.5\n")
    with pytest.raises(InputError) as err:
        read_score_inputs(det, write(tmp_path / "labels.csv", LABELS_CSV))
    assert str(err.value).startswith(f"{det}:3: ")


# ---------------------------------------------------------------- names that differ in folder or case


def test_names_differing_in_folder_get_a_hint():
    with pytest.raises(InputError) as err:
        check_image_names(["Test/images/frame_0001.png", "Test/images/frame_0002.png"],
                          ["frame_0001.png", "frame_0002.png"], "detections.csv")
    text = str(err.value)
    assert text.startswith("detections.csv: no detection image matches a labelled image")
    assert "folder" in text and "'Test/images/frame_0001.png' vs 'frame_0001.png'" in text
    assert "\n" not in text


def test_names_differing_in_case_get_a_hint():
    with pytest.raises(InputError, match=r"letter case, e.g. 'A.PNG' vs 'a.png'"):
        check_image_names(["A.PNG"], ["a.png", "b.png"])
    with pytest.raises(InputError, match=r"folder and letter case, e.g. 'scan/A.PNG' vs 'belt/a.png'"):
        check_image_names(["scan/A.PNG"], ["belt/a.png"])


def test_names_without_a_near_match_are_just_unlabelled():
    check_image_names(["x.png"], ["a.png"])  # nothing in common: counted as unlabelled, no error
    check_image_names(["a.png", "Images/B.png"], ["a.png", "b.png"])  # one exact match is enough
    check_image_names([], ["a.png"])  # empty detections


def test_read_score_inputs_applies_the_hint(tmp_path):
    det = write(tmp_path / "detections.csv",
                "image,x,y,width,height,score\ntest/images/a.png,4,4,16,16,0.9\n")
    with pytest.raises(InputError, match="differ in folder"):
        read_score_inputs(det, write(tmp_path / "labels.csv", LABELS_CSV))


# ---------------------------------------------------------------- the operating point


def test_operating_point_hand_worked(files):
    inputs = read_score_inputs(*files)
    ev = evaluate(inputs.detections, inputs.ground_truth)
    # descending score over labelled images: 0.9 T, 0.8 F, 0.7 F, 0.6 T, 0.5 F; 4 objects, 4 images
    # precision 1, .5, .333, .5, .4; recall .25, .25, .25, .5, .5
    # F1 = 2pr/(p+r): .4, .333, .286, .5, .444 -> best at 0.6 with P .5, R .5, FPPI 2/4
    best = choose_operating_point(ev)
    assert best == dict(threshold=0.6, precision=0.5, recall=0.5, false_alarms_per_image=0.5,
                        f1=0.5, rule="best F1", met=True,
                        note="threshold 0.6 gives the best F1 (0.500)")
    # precision >= 0.9 only at 0.9 (P 1, R .25)
    point = choose_operating_point(ev, target_precision=0.9)
    assert (point["threshold"], point["precision"], point["recall"]) == (0.9, 1.0, 0.25)
    # recall >= 0.5 first at 0.6; recall 0.75 never reached
    assert choose_operating_point(ev, target_recall=0.5)["threshold"] == 0.6
    unmet = choose_operating_point(ev, target_recall=0.75)
    assert unmet["threshold"] is None and unmet["met"] is False
    assert "highest is 0.500" in unmet["note"]


def test_operating_point_unreachable_precision():
    # the top detection is a false alarm, then one hit: precision 0, 0.5 -> 0.8 is out of reach
    ev = evaluate({"a.png": ([[40, 40, 10, 10], [0, 0, 10, 10]], [0.9, 0.8])},
                  {"a.png": [[0, 0, 10, 10]]})
    point = choose_operating_point(ev, target_precision=0.8)
    assert point["threshold"] is None and point["precision"] is None and not point["met"]
    assert point["note"] == ("cannot be met: no threshold reaches precision 0.8 "
                             "(the highest is 0.500)")


def test_operating_point_refuses_bad_targets(files):
    ev = evaluate({}, {"a.png": [[0, 0, 10, 10]]})
    with pytest.raises(InputError, match="not both"):
        choose_operating_point(ev, target_precision=0.5, target_recall=0.5)
    with pytest.raises(InputError, match=r"in \(0, 1\]"):
        choose_operating_point(ev, target_recall=1.5)
    assert choose_operating_point(ev)["note"] == (
        "no threshold to recommend: there are no detections on labelled images")


boxes = st.tuples(st.integers(0, 40), st.integers(0, 40), st.integers(4, 20), st.integers(4, 20))


@settings(max_examples=40, deadline=None)
@given(images=st.lists(st.tuples(st.lists(boxes, max_size=3),
                                 st.lists(st.tuples(boxes, st.sampled_from([0.2, 0.4, 0.6, 0.8, 1.0])),
                                          max_size=4)),
                       min_size=1, max_size=4),
       target=st.sampled_from([0.3, 0.5, 0.75, 1.0]))
def test_operating_point_matches_brute_force(images, target):
    gt = {f"{k}.png": np.array(g, dtype=float).reshape(-1, 4) for k, (g, _) in enumerate(images)}
    det = {f"{k}.png": (np.array([b for b, _ in d], dtype=float).reshape(-1, 4),
                        np.array([s for _, s in d], dtype=float)) for k, (_, d) in enumerate(images)}
    ev = evaluate(det, gt)
    n_obj = sum(len(g) for g in gt.values())
    # brute force: keep score >= t, match each image again, count (matching is greedy by score,
    # so the kept detections match as they would alone)
    table = []
    for t in sorted({s for _, s in det.values() for s in s.tolist()}, reverse=True):
        tp = n = 0
        for name in gt:
            b, s = det[name]
            keep = s >= t
            m, _ = match_image(b[keep], s[keep], gt[name])
            tp, n = tp + int((m >= 0).sum()), n + int(keep.sum())
        table.append((t, tp / n, tp / n_obj if n_obj else math.nan))
    point = choose_operating_point(ev, target_precision=target)
    ok = [row for row in table if row[1] >= target] if n_obj else []
    if not ok:
        assert point["threshold"] is None
    else:
        best_recall = max(r for _, _, r in ok)
        t, p, r = max((row for row in ok if row[2] == best_recall), key=lambda row: row[0])
        assert point["threshold"] == t
        assert point["precision"] == pytest.approx(p) and point["recall"] == pytest.approx(r)
    best = choose_operating_point(ev)
    if n_obj and table:
        f1 = [(2 * p * r / (p + r) if p + r else 0.0, t) for t, p, r in table]
        top = max(f for f, _ in f1)
        assert best["f1"] == pytest.approx(top)
        assert best["threshold"] == max(t for f, t in f1 if math.isclose(f, top))
    else:
        assert best["threshold"] is None


# ---------------------------------------------------------------- summary and threshold file


def test_summary_and_table_hand_worked(files):
    inputs = read_score_inputs(*files)
    ev = evaluate(inputs.detections, inputs.ground_truth)
    summary = build_summary(ev, choose_operating_point(ev), {"labels": "labels.csv"})
    json.dumps(summary, allow_nan=False)  # plain JSON, no NaN
    assert summary["operating_point"]["threshold"] == 0.6
    assert summary["fppi_at_recall_0.9"] is None  # recall never exceeds 0.5
    assert summary["unlabelled_image_count"] == 1 and summary["unlabelled_detections"] == 1
    rows = dict(summary_table(summary, "out/report.html"))
    # all-point AP = 0.25 * 1 + 0.25 * 0.5 = 0.375; 11-point = (3 * 1 + 3 * 0.5) / 11 = 0.409
    assert rows["AP50 (all-point)"] == "0.375" and rows["AP50 (11-point)"] == "0.409"
    assert rows["FPPI at recall 0.9"] == "not reached"
    assert rows["false alarms / misses"] == "3 / 2"
    assert rows["unlabelled images (left out)"] == "1 with 1 detections"
    assert rows["report"] == "out/report.html"


def test_threshold_from_summary_reads_the_key(tmp_path):
    path = write(tmp_path / "summary.json", json.dumps({"operating_point": {"threshold": 0.4375}}))
    assert threshold_from_summary(path) == 0.4375


@pytest.mark.parametrize("content, message", [
    (None, "cannot read the summary: no such file"),
    ('{"operating_point": {"threshold": 0.5,}}', "not valid JSON"),
    ('{\n"operating_point":\n  {"threshold": }\n}', "not valid JSON"),
    ('[1, 2]', "no operating point"),
    ('{"average_precision": 0.5}', "no operating point"),
    ('{"operating_point": {"threshold": null, "rule": "highest recall with precision >= 0.99"}}',
     "no threshold: highest recall with precision >= 0.99 could not be met"),
    ('{"operating_point": {"threshold": "0.5"}}', "not a number"),
    ('{"operating_point": {"threshold": 1.5}}', "threshold 1.5 is not a score in 0..1"),
    ('{"operating_point": {"threshold": -0.01}}', "threshold -0.01 is not a score in 0..1"),
    ('{"operating_point": {"threshold": 0.5}, "provenance": {"format": "other"}}',
     "not a provenance record"),
])
def test_threshold_from_summary_errors(tmp_path, content, message):
    path = tmp_path / "summary.json"
    if content is not None:
        write(path, content)
    with pytest.raises(InputError) as err:
        threshold_from_summary(path)
    text = str(err.value)
    assert text.startswith(str(path)) and message in text and "\n" not in text
    if content and content.startswith('{\n'):
        assert err.value.line == 3  # the JSON parser's line of the bad value


# ---------------------------------------------------------------- thumbnails


def _near(pixels, bgr, tolerance=60):
    """Indices of the pixels (K, 3) within ``tolerance`` (summed over B, G, R) of a colour."""
    return np.flatnonzero(np.abs(pixels.astype(int) - np.asarray(bgr)).sum(axis=1) < tolerance)


def test_thumbnail_places_boxes_by_hand():
    """Where the box lands, not the exact pixels of OpenCV's anti-aliased lines: the edges are
    found as the green pixels across the middle row and column, within a pixel and a half of
    where the arithmetic puts them (the line is 2 pixels wide, drawn over a 4-pixel outline)."""
    img = np.full((64, 64), 128, np.uint8)
    # box (24, 24, 16, 16): crop side = 16 * (1 + 2) = 48 from (8, 8), scale 128 / 48 = 8 / 3;
    # the box edges land at (24 - 8) * 8/3 = 42.7 and (40 - 8) * 8/3 = 85.3
    thumb = thumbnail(img, ((24, 24, 16, 16), "matched"))
    assert thumb.shape == (128, 128, 3) and thumb.dtype == np.uint8
    green = BOX_STYLES["matched"][0][::-1]
    for line in (thumb[:, 64], thumb[64, :]):  # down the middle column, across the middle row
        found = _near(line, green)
        near_first = found[np.abs(found - 42.7) <= 1.5]
        near_second = found[np.abs(found - 85.3) <= 1.5]
        assert len(near_first) and len(near_second), found
        assert len(near_first) + len(near_second) == len(found), found  # nowhere else
        # inside the box and outside it the picture is the untouched grey (within 2 levels)
        for inside in (line[50:78], line[:36], line[93:]):
            assert (np.abs(inside.astype(int) - 128) <= 2).all()
    # outside the image: dark grey, 40 (box near the corner, crop starts at 2 - 16 = -14)
    corner = thumbnail(img, ((2, 2, 8, 8), "missed"), size=64)
    assert (np.abs(corner[0, 0].astype(int) - 40) <= 2).all()


def test_thumbnail_line_styles_differ():
    img = np.full((64, 64), 128, np.uint8)
    share = {}
    for kind, (rgb, _, _) in BOX_STYLES.items():
        thumb = thumbnail(img, ((24, 24, 16, 16), kind))
        row = thumb[43, 50:80].astype(int)  # along the top edge, away from the corners
        share[kind] = np.mean(np.abs(row - np.array(rgb[::-1])).sum(axis=1) < 60)
    # solid: all of the edge; dashed (6 on, 5 off, plus the rounded ends of each dash): less;
    # dotted (dots 3 px wide every 5 px): less again
    assert share["matched"] == 1.0
    assert 0.4 < share["false alarm"] < 0.9
    assert share["missed"] < share["false alarm"]


# ---------------------------------------------------------------- the report folder


def test_report_refused_for_non_empty_folder(files, tmp_path):
    out = tmp_path / "report"
    out.mkdir()
    mine = write(out / "report.html", "my own notes")
    with pytest.raises(InputError, match="not empty; add --force") as err:
        score_files(*files, out)
    assert err.value.path == str(out)
    assert mine.read_text() == "my own notes" and os.listdir(out) == ["report.html"]
    not_a_folder = write(tmp_path / "file", "x")
    with pytest.raises(InputError, match="is a file"):
        score_files(*files, not_a_folder)


def test_empty_detections_still_give_a_report(tmp_path):
    det = write(tmp_path / "detections.csv", "image,x,y,width,height,score\n")
    lab = write(tmp_path / "labels.csv", LABELS_CSV)
    result = score_files(det, lab, tmp_path / "report")
    s = json.loads((tmp_path / "report" / "summary.json").read_text())
    assert s == result.summary
    assert s["average_precision"] == 0.0 and s["average_precision_11_point"] == 0.0
    assert (s["detections"], s["objects"], s["misses"]) == (0, 4, 4)
    assert s["log_average_miss_rate"] == 1.0  # nothing found at any FPPI
    assert s["operating_point"]["threshold"] is None
    assert any("galleries skipped: no images folder" in n for n in s["notes"])
    for name in ("report.html", "precision-recall.png", "miss-rate.png", "score-histogram.png"):
        assert (tmp_path / "report" / name).stat().st_size > 0
    assert cv2.imread(str(tmp_path / "report" / "miss-rate.png")) is not None


def test_pages_share_one_template_and_base_style_sheet():
    """The score report and the audit page are built from the same package files
    (detector/reporting/assets: page.html, base.css, one sheet per page), found through
    importlib.resources so an installed package has them; no page keeps CSS in Python code."""
    from importlib import resources

    from detector.reporting import _html

    assets = resources.files("detector.reporting").joinpath("assets")
    names = sorted(p.name for p in assets.iterdir())
    assert names == ["audit.css", "base.css", "page.html", "score-report.css", "sort-table.js",
                     "threshold-slider.js"]
    base = _html.asset("base.css")
    pages = {sheet: _html.page("t", sheet, ["<h1>x</h1>"]) for sheet in ("score-report.css", "audit.css")}
    for sheet, text in pages.items():
        assert text.startswith("<!DOCTYPE html>") and text.endswith("</main></body></html>\n")
        assert base in text and _html.asset(sheet) in text
        assert text.count("<style>") == 1
    # the page sheets hold only what differs: no rule of base.css is repeated in them
    rules = {r.strip() for r in base.split("}") if "{" in r}
    for sheet in ("score-report.css", "audit.css"):
        assert not rules & {r.strip() for r in _html.asset(sheet).split("}") if "{" in r}
    here = Path(__file__).resolve().parent.parent / "detector" / "reporting"
    for module in here.glob("*.py"):
        assert "box-sizing" not in module.read_text(encoding="utf-8"), module
