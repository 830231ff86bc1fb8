"""`patchwood score` end to end on handmade files and a few tiny PNGs written here.

References: the figures are checked against detector.evaluation.evaluate computed directly and
against counts worked by hand in the comments (PASCAL VOC all-point and 11-point AP, Everingham
et al., 2010; COCO 101-point AP, Lin et al., 2014; log-average miss rate, Dollar et al., PAMI 2012).
"""

import json
import re
from pathlib import Path

import cv2
import numpy as np
import pytest
import typer
from typer.testing import CliRunner

from cli.score import score
from detector.errors import InputError
from detector.evaluation import evaluate
from detector.reporting.summary import threshold_from_summary
from shared import Links

app = typer.Typer()
app.command()(score)

LABELS_CSV = """image,x,y,width,height,label
a.png,4,4,16,16,nut
a.png,36,20,16,16,nut
a.png,2,30,10,10,washer
b.png,10,10,20,20,nut
c.png,,,,,
e.png,20,10,16,16,nut
"""
DETECTIONS_CSV = """image,x,y,width,height,score
a.png,4,4,16,16,0.9
a.png,30,2,10,10,0.7
a.png,36,21,16,16,0.6
b.png,40,30,12,12,0.8
c.png,0,0,8,8,0.5
d.png,1,1,5,5,0.95
"""
# the same boxes as arrays, for evaluate() called directly (the washer is left out by --label nut)
GROUND_TRUTH = {"a.png": [[4, 4, 16, 16], [36, 20, 16, 16]], "b.png": [[10, 10, 20, 20]],
                "c.png": np.zeros((0, 4)), "e.png": [[20, 10, 16, 16]]}
DETECTIONS = {"a.png": ([[4, 4, 16, 16], [30, 2, 10, 10], [36, 21, 16, 16]], [0.9, 0.7, 0.6]),
              "b.png": ([[40, 30, 12, 12]], [0.8]), "c.png": ([[0, 0, 8, 8]], [0.5]),
              "d.png": ([[1, 1, 5, 5]], [0.95])}


def make_folder(root: Path) -> Path:
    """labels.csv, detections.csv and images/ with tiny 64 x 48 PNGs (d.png is not labelled)."""
    root.mkdir(parents=True, exist_ok=True)
    (root / "labels.csv").write_text(LABELS_CSV)
    (root / "detections.csv").write_text(DETECTIONS_CSV)
    (root / "images").mkdir(exist_ok=True)
    rng = np.random.default_rng(0)
    for name in ("a.png", "b.png", "c.png", "e.png"):
        img = rng.integers(60, 200, size=(48, 64), dtype=np.uint8)
        assert cv2.imwrite(str(root / "images" / name), img)
    return root


def run(*args):
    return CliRunner().invoke(app, [str(a) for a in args])


@pytest.fixture(scope="module")
def scored(tmp_path_factory):
    root = make_folder(tmp_path_factory.mktemp("score"))
    result = run(root / "detections.csv", root / "labels.csv", "--out", root / "report",
                 "--label", "nut")
    assert result.exit_code == 0, (result.output, result.exception)
    return root, result


def test_summary_matches_evaluate_and_hand_count(scored):
    root, _ = scored
    s = json.loads((root / "report" / "summary.json").read_text())
    direct = evaluate(DETECTIONS, GROUND_TRUTH, 0.5).to_dict()
    for key in ("average_precision", "average_precision_11_point", "average_precision_101_point",
                "average_precision_50_to_95", "log_average_miss_rate", "best_f1",
                "best_f1_threshold", "precision", "recall", "false_alarms_per_image", "per_image",
                "false_alarm_list", "miss_list", "buckets"):
        assert s[key] == direct[key], key
    # by hand: over labelled images, descending score 0.9 T, 0.8 F, 0.7 F, 0.6 T (IoU 0.882), 0.5 F
    # with 4 objects and 4 labelled images (a, b, c, e; e never scanned still counts)
    assert (s["images"], s["objects"], s["detections"]) == (4, 4, 5)
    assert (s["true_detections"], s["false_alarms"], s["misses"]) == (2, 3, 2)
    # all-point AP: recall .25 at precision 1, .5 at precision .5 -> .25 * 1 + .25 * .5 = 0.375
    assert s["average_precision"] == 0.375
    # 11-point: recall points 0, .1, .2 give 1; .3, .4, .5 give .5; the rest 0 -> 4.5 / 11
    assert s["average_precision_11_point"] == pytest.approx(4.5 / 11)
    # AP50:95 (101 points): 0.9 keeps IoU 0.882 only up to 0.85 (8 thresholds):
    # 8 * (26 + 25 * .5) / 101 + 2 * 26 / 101, averaged over 10 -> 360 / 1010
    assert s["average_precision_50_to_95"] == pytest.approx(360 / 1010)
    # log-average miss rate: (FPPI, miss) at 0.9 (0, .75), 0.8 (.25, .75), 0.7 (.5, .75),
    # 0.6 (.5, .5), 0.5 (.75, .5); the 9 reference FPPIs .01 ... .316 read .75 (7 of them),
    # .562 and 1 read .5 -> exp((7 ln .75 + 2 ln .5) / 9) = 0.68538
    assert s["log_average_miss_rate"] == pytest.approx(0.6853775, abs=1e-6)
    # best F1 = .5 at threshold 0.6 (F1 .4, .333, .286, .5, .444), FPPI 2 / 4
    assert s["operating_point"] == {"threshold": 0.6, "precision": 0.5, "recall": 0.5,
                                    "false_alarms_per_image": 0.5, "f1": 0.5, "rule": "best F1",
                                    "met": True, "note": "threshold 0.6 gives the best F1 (0.500)"}
    assert s["fppi_at_recall_0.9"] is None
    # d.png is not labelled: counted, reported, left out
    assert s["unlabelled_image_count"] == 1 and s["unlabelled_images"] == ["d.png"]
    assert s["unlabelled_detections"] == 1
    assert s["inputs"]["label"] == "nut" and s["inputs"]["iou_threshold"] == 0.5
    assert threshold_from_summary(root / "report" / "summary.json") == 0.6


def test_terminal_summary(scored):
    root, result = scored
    out = result.output
    lines = {m.group(1).strip(): m.group(2).strip()
             for m in re.finditer(r"^  (.+?)  +(\S.*)$", out, flags=re.M)}
    assert lines["AP50 (all-point)"] == "0.375"
    assert lines["AP50 (11-point)"] == "0.409"
    assert lines["AP50:95 (101-point)"] == "0.356"
    assert lines["best F1: precision / recall"] == "0.500 / 0.500"
    assert lines["best F1: threshold"] == "0.6000"
    assert lines["FPPI at recall 0.9"] == "not reached"
    assert lines["log-average miss rate"] == "68.5%"
    assert lines["images / objects"] == "4 / 4"
    assert lines["detections / true"] == "5 / 2"
    assert lines["false alarms / misses"] == "3 / 2"
    # at the recommended 0.6: 0.9 T, 0.8 F, 0.7 F, 0.6 T kept; 0.5 on c.png dropped
    assert lines["at 0.6000: detections / true"] == "4 / 2"
    assert lines["at 0.6000: false alarms / misses"] == "2 / 2"
    assert lines["report"] == str(root / "report" / "report.html")
    # handmade detections have no provenance side file: the report says it cannot tell
    assert "note: " + str(root / "detections.csv") + ": no provenance side file" in out
    # e.png is labelled and has no row; d.png has rows and no label: one warning line each
    warnings = [line for line in result.stderr.splitlines() if line.startswith("warning: ")]
    assert warnings == [
        f"warning: {root / 'detections.csv'}: 1 of 4 labelled images has no rows in it (not "
        "scanned: another folder or a typo?); scored as finding nothing there: 'e.png'",
        f"warning: {root / 'detections.csv'}: 1 image has rows but is not in "
        f"{root / 'labels.csv'}; left out of every figure: 'd.png'"]


def test_report_html_is_offline_and_links_exist(scored):
    root, _ = scored
    report = root / "report"
    text = (report / "report.html").read_text(encoding="utf-8")
    assert not re.search(r"https?://", text)
    # two scripts inlined from the package (the per-image table's sorting, the threshold slider)
    # and the slider's data as JSON: nothing fetched
    assert text.lower().count("<script") == 3 and "<script src" not in text.lower()
    assert text.count('<script type="application/json" id="threshold-data">') == 1
    from detector.reporting._html import asset

    assert asset("sort-table.js") in text and asset("threshold-slider.js") in text
    table = text[text.index('<table class="sortable" id="per-image">'):]
    table = table[:table.index("</table>")]
    assert table.count('<th data-type="number">') == 5 and "<thead>" in table and "<tbody>" in table
    parser = Links()
    parser.feed(text)
    assert len(parser.links) >= 3 + 2 + 2  # plots, false alarms and misses at the threshold
    for link in parser.links:
        assert not link.startswith(("/", "file:")), link
        assert (report / link).is_file(), link
    # the headline comes before the plots, the plots before the galleries, then the table
    order = [text.index(s) for s in ('class="cards"', "precision-recall.png",
                                     "gallery/false-alarm-01.png", "<h2>Per image</h2>")]
    assert order == sorted(order)
    # every section opens with its "How to read this" note: the headline figures, the curves,
    # the size table (when there is one), both galleries and the per-image table; no other
    headings = ["<h2>Curves</h2>", '<h2 id="choose-threshold">Choose a threshold</h2>',
                "<h3>Highest-scoring false alarms", "<h3>Missed objects",
                "<h2>Per image</h2>"] + (["<h3>By object size</h3>"]
                                         if "<h3>By object size</h3>" in text else [])
    for heading in headings:
        after = text[text.index(heading):].split("</h", 1)[1].split(">", 1)[1]
        assert after.lstrip().startswith('<p class="read">How to read this:'), heading
    assert text.count("How to read this") == len(headings) + 1
    # the per-image table is sorted by errors at the threshold 0.6: b.png (1 false alarm + 1
    # miss) first; c.png's only detection (0.5) is below it, so c.png is clean
    table = text[text.index("<h2>Per image</h2>"):]
    rows = re.findall(r"<tr class=\"(\w+)\"(?: data-index=\"\d+\")?><td>([^<]+)</td>", table)
    assert rows[:1] == [("bad", "b.png")]
    assert sorted(rows, key=lambda r: r[1]) == [("bad", "a.png"), ("bad", "b.png"),
                                                ("clean", "c.png"), ("bad", "e.png")]
    # the mismatches of names are on the page too
    assert text.count("<li>warning: ") == 2 and "&#x27;e.png&#x27;" in text


def test_report_pictures_are_valid_pngs(scored):
    root, _ = scored
    report = root / "report"
    pngs = sorted(report.rglob("*.png"))
    names = {p.relative_to(report).as_posix() for p in pngs}
    # at the threshold 0.6: 2 false alarms (0.8 and 0.7; 0.5 is below), 2 misses (b.png's and
    # e.png's objects); the curves keep all 3 false alarms
    assert names == {"precision-recall.png", "miss-rate.png", "score-histogram.png",
                     "gallery/false-alarm-01.png", "gallery/false-alarm-02.png",
                     "gallery/missed-01.png", "gallery/missed-02.png"}
    for p in pngs:
        img = cv2.imread(str(p), cv2.IMREAD_UNCHANGED)
        assert img is not None and img.ndim == 3 and min(img.shape[:2]) >= 100, p
    assert cv2.imread(str(report / "gallery" / "missed-01.png")).shape == (128, 128, 3)


def test_report_folder_refused_then_forced(tmp_path):
    root = make_folder(tmp_path / "data")
    out = tmp_path / "report"
    out.mkdir()
    (out / "my notes.txt").write_text("keep me")
    (out / "gallery").mkdir()
    (out / "gallery" / "missed-99.png").write_bytes(b"old report picture")
    args = [root / "detections.csv", root / "labels.csv", "--out", out, "--label", "nut",
            "--target-recall", "0.8"]
    refused = run(*args)
    assert refused.exit_code == 1 and isinstance(refused.exception, InputError)
    assert str(refused.exception) == f"{out}: the report folder is not empty; add --force to " \
                                     "replace the report in it"
    assert sorted(p.name for p in out.rglob("*")) == ["gallery", "missed-99.png", "my notes.txt"]
    assert (out / "gallery" / "missed-99.png").read_bytes() == b"old report picture"

    done = run(*args, "--force")
    assert done.exit_code == 0, (done.output, done.exception)
    assert (out / "my notes.txt").read_text() == "keep me"  # other files are left alone
    assert not (out / "gallery" / "missed-99.png").exists()  # the old report's picture is gone
    # recall along the curve: .25, .25, .25, .5, .5 -> 0.8 is never reached
    point = json.loads((out / "summary.json").read_text())["operating_point"]
    assert point["threshold"] is None and point["met"] is False
    assert point["rule"] == "highest threshold with recall >= 0.8"
    assert "cannot be met: no threshold reaches recall 0.8 (the highest is 0.500)" in done.output
    with pytest.raises(InputError, match="could not be met"):
        threshold_from_summary(out / "summary.json")


def test_unreachable_target_precision(tmp_path):
    root = make_folder(tmp_path / "data")
    # the top detection of a.png is now a false alarm: precision 0, .5, .67 ... never 0.9
    (root / "detections.csv").write_text("image,x,y,width,height,score\n"
                                         "a.png,40,30,8,8,0.99\na.png,4,4,16,16,0.9\n")
    (root / "images" / "b.png").unlink()  # a missing picture costs its thumbnail, not the report
    result = run(root / "detections.csv", root / "labels.csv", "--out", tmp_path / "r",
                 "--images", root / "images", "--target-precision", "0.9")
    assert result.exit_code == 0, (result.output, result.exception)
    assert "cannot be met: no threshold reaches precision 0.9 (the highest is 0.500)" in result.output
    summary = json.loads((tmp_path / "r" / "summary.json").read_text())
    point = summary["operating_point"]
    assert point["threshold"] is None and point["precision"] is None
    missing = [n for n in summary["notes"] if n.startswith("gallery: ")]
    assert len(missing) == 1 and "b.png" in missing[0] and "note: gallery: " in result.output
    # misses: a.png's second nut and washer, b.png's and e.png's nuts; b.png's has no picture
    assert summary["misses"] == 4
    assert len(list((tmp_path / "r" / "gallery").glob("missed-*.png"))) == 3


def test_mismatched_names_hint(tmp_path):
    root = make_folder(tmp_path)
    (root / "detections.csv").write_text("image,x,y,width,height,score\n"
                                         "Test/images/A.png,4,4,16,16,0.9\n")
    result = run(root / "detections.csv", root / "labels.csv", "--out", root / "report")
    assert result.exit_code == 1 and isinstance(result.exception, InputError)
    message = str(result.exception)
    assert message.startswith(f"{root / 'detections.csv'}: no detection image matches")
    assert "'Test/images/A.png' vs 'a.png'" in message
    assert not (root / "report").exists()


def test_bad_row_names_file_and_line(tmp_path):
    root = make_folder(tmp_path)
    (root / "labels.csv").write_text("image,x,y,width,height\na.png,1,2,3,4\na.png,1,2,0,4\n")
    result = run(root / "detections.csv", root / "labels.csv", "--out", root / "report")
    assert result.exit_code == 1
    assert str(result.exception) == f"{root / 'labels.csv'}:3: width must be > 0, found 0"


@pytest.mark.parametrize("extra, message", [
    (["--target-precision", "0.9", "--target-recall", "0.5"], "not both"),
    (["--iou", "0"], "IoU threshold must be in (0, 1]"),
    (["--target-recall", "1.5"], "a target must be in (0, 1]"),
])
def test_usage_errors(tmp_path, extra, message):
    root = make_folder(tmp_path)
    result = run(root / "detections.csv", root / "labels.csv", "--out", root / "r", *extra)
    assert result.exit_code == 2
    assert message in result.output
    assert not (root / "r").exists()


def test_missing_images_folder_is_an_error(tmp_path):
    root = make_folder(tmp_path)
    result = run(root / "detections.csv", root / "labels.csv", "--out", root / "r",
                 "--images", root / "nowhere")
    assert result.exit_code == 1 and "no such images folder" in str(result.exception)


def test_strict_turns_the_name_warnings_into_an_error(tmp_path):
    """--strict: labelled images without rows (e.png) stop the run with one line naming the file
    and the count, before any report file is written (issue 16)."""
    root = make_folder(tmp_path / "data")
    out = tmp_path / "report"
    result = run(root / "detections.csv", root / "labels.csv", "--out", out, "--strict")
    assert result.exit_code == 1 and isinstance(result.exception, InputError)
    assert str(result.exception) == (
        f"{root / 'detections.csv'}: 1 of 4 labelled images has no rows in it (not scanned: "
        "another folder or a typo?); scored as finding nothing there: 'e.png' (--strict)")
    assert not out.exists()
    # detections of unlabelled images alone are refused the same way
    (root / "labels.csv").write_text(LABELS_CSV + "e.png,,,,,\n".replace("e.png", "z.png"))
    (root / "detections.csv").write_text(DETECTIONS_CSV + "e.png,,,,,\nz.png,,,,,\n")
    result = run(root / "detections.csv", root / "labels.csv", "--out", out, "--strict")
    assert result.exit_code == 1
    assert str(result.exception).endswith("1 image has rows but is not in "
                                          f"{root / 'labels.csv'}; left out of every figure: "
                                          "'d.png' (--strict)")
    # with every name matched, --strict scores as usual
    (root / "detections.csv").write_text(
        "\n".join(line for line in (DETECTIONS_CSV + "e.png,,,,,\nz.png,,,,,\n").splitlines()
                  if not line.startswith("d.png")) + "\n")
    result = run(root / "detections.csv", root / "labels.csv", "--out", out, "--strict")
    assert result.exit_code == 0, result.output
    assert "warning" not in result.stderr


def test_many_missing_images_are_counted_and_the_first_few_named(tmp_path):
    """A detections file of another folder: every labelled image lacks rows; the one warning
    line counts them and names the first three."""
    root = make_folder(tmp_path / "data")
    (root / "detections.csv").write_text("image,x,y,width,height,score\n"
                                         "other.png,1,1,5,5,0.5\n")
    result = run(root / "detections.csv", root / "labels.csv", "--out", tmp_path / "r")
    assert result.exit_code == 0, result.output
    lines = result.stderr.splitlines()
    assert lines[0] == (f"warning: {root / 'detections.csv'}: 4 of 4 labelled images have no "
                        "rows in it (not scanned: another folder or a typo?); scored as finding "
                        "nothing there: 'a.png', 'b.png', 'c.png' and 1 more")
    summary = json.loads((tmp_path / "r" / "summary.json").read_text())
    assert summary["warnings"][0] == lines[0][len("warning: "):]


def test_table_and_galleries_describe_the_operating_point(tmp_path):
    """Two objects; a hit at 0.9, three false alarms at 0.8, 0.7, 0.6 and a hit at 0.3. Best F1:
    at 0.9 F1 = 2 * 1 * .5 / 1.5 = .667; at 0.3 precision 2 / 5, recall 1, F1 = .571 (the other
    thresholds are lower), so T = 0.9. At T the table has 1 detection, 1 true, 0 false alarms and
    1 miss; the missed object's nearest score is 0.3, below T; the curves keep all 5 (issue 16)."""
    (tmp_path / "images").mkdir()
    cv2.imwrite(str(tmp_path / "images" / "a.png"), np.full((100, 100), 90, np.uint8))
    (tmp_path / "labels.csv").write_text("image,x,y,width,height\na.png,0,0,10,10\n"
                                         "a.png,40,0,10,10\n")
    (tmp_path / "d.csv").write_text("image,x,y,width,height,score\na.png,0,0,10,10,0.9\n"
                                    "a.png,80,80,10,10,0.8\na.png,60,60,10,10,0.7\n"
                                    "a.png,20,60,10,10,0.6\na.png,40,0,10,10,0.3\n")
    result = run(tmp_path / "d.csv", tmp_path / "labels.csv", "--out", tmp_path / "r")
    assert result.exit_code == 0, result.output
    s = json.loads((tmp_path / "r" / "summary.json").read_text())
    assert s["operating_point"]["threshold"] == 0.9
    assert (s["detections"], s["false_alarms"], s["misses"]) == (5, 3, 0)  # the whole file
    at = s["at_operating_point"]
    assert (at["detections"], at["true_detections"], at["false_alarms"], at["misses"]) == \
        (1, 1, 0, 1)
    assert at["per_image"] == [{"image": "a.png", "objects": 2, "detections": 1,
                                "true_detections": 1, "false_alarms": 0, "misses": 1}]
    assert at["miss_list"] == [{"image": "a.png", "box": [40.0, 0.0, 10.0, 10.0],
                                "best_score": 0.3}]
    html = (tmp_path / "r" / "report.html").read_text()
    assert "nearest score 0.300, below the threshold" in html
    assert "Highest-scoring false alarms (0 of 0)" in html and "Missed objects (1 of 1)" in html
    assert sorted(p.name for p in (tmp_path / "r" / "gallery").iterdir()) == ["missed-01.png"]


def test_ignore_label_and_size_range_reach_the_report(tmp_path):
    """--label nut --ignore-label washer: the washer at (2, 30) becomes an ignore region, so the
    detection at (30, 2, 10, 10) that misses everything stays a false alarm, and the figures equal
    evaluate() with the washer flagged; --min-size 15 leaves out the 8-pixel detection on c.png
    and the 10-pixel ones, as evaluate's size_range does; --size-buckets names the buckets."""
    root = make_folder(tmp_path / "s")
    result = run(root / "detections.csv", root / "labels.csv", "--out", tmp_path / "r",
                 "--label", "nut", "--ignore-label", "washer", "--min-size", 15,
                 "--size-buckets", "tiny:0-12,big:12-")
    assert result.exit_code == 0, result.output
    summary = json.loads((tmp_path / "r" / "summary.json").read_text())
    gt = dict(GROUND_TRUTH)
    gt["a.png"] = [[4, 4, 16, 16], [36, 20, 16, 16], [2, 30, 10, 10]]
    expected = evaluate(DETECTIONS, gt, size_buckets={"tiny": (0, 12), "big": (12, float("inf"))},
                        size_range=(15, float("inf")),
                        ignore={"a.png": [False, False, True]})
    assert summary["average_precision"] == pytest.approx(expected.average_precision, abs=1e-12)
    assert summary["inputs"]["ignore_label"] == "washer"
    assert summary["inputs"]["ignore_regions"] == 1
    assert summary["inputs"]["size_range"] == [15.0, None]   # no upper limit
    assert set(summary["buckets"]) == {"tiny", "big"}
    bad = run(root / "detections.csv", root / "labels.csv", "--out", tmp_path / "r2",
              "--size-buckets", "small:32-0")
    assert bad.exit_code == 2 and "--size-buckets takes NAME:LOW-HIGH" in bad.output
