"""Label and detection files: the CSV contracts of the glossary and COCO JSON.

References: the COCO format (the COCO data set paper, Lin et al., ECCV 2014) as read by
pycocotools (COCO, COCO.loadRes, COCOeval) for interchange; RFC 4180 and Python's csv
module for quoting; hand-worked clipping arithmetic in the comments.
"""

from __future__ import annotations

import json
import os

import cv2
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from detector.errors import InputError
from detector.io.labels import (
    ImageDetections,
    ImageLabels,
    LabelFile,
    read_coco,
    read_detections,
    read_labels,
    write_coco,
    write_detections_coco,
    write_detections_csv,
    write_labels_csv,
)

FUZZ = settings(max_examples=50, deadline=None,
                suppress_health_check=[HealthCheck.function_scoped_fixture])


def _csv(tmp_path, text: str, name="labels.csv"):
    path = tmp_path / name
    path.write_bytes(text.encode("utf-8"))
    return path


def _error(call, *args, **kw) -> str:
    with pytest.raises(InputError) as info:
        call(*args, **kw)
    return str(info.value)


def _summary(items):
    return [(it.image, it.boxes.tolist(), list(it.classes)) for it in items]


# ---------------------------------------------------------------------------------------------
# reading the labels CSV

HEADER = "image,x,y,width,height,label\n"


def test_reads_merges_and_keeps_order(tmp_path):
    path = _csv(tmp_path, HEADER
                + "belt/f2.png,112.0,64.5,38.0,37.0,nut\n"
                + "belt/f1.png,,,,,\n"
                + "belt/f2.png,1e1,.5,2.,3,bolt\n"
                + "belt/f3.png,,,,,\n"
                + "belt/f3.png,5,6,7,8,nut\n")  # an empty row and a box row: the empty one is moot
    labels = read_labels(path)
    assert isinstance(labels, LabelFile) and labels.warnings == 0
    assert _summary(labels) == [
        ("belt/f2.png", [[112.0, 64.5, 38.0, 37.0], [10.0, 0.5, 2.0, 3.0]], ["nut", "bolt"]),
        ("belt/f1.png", [], []),
        ("belt/f3.png", [[5.0, 6.0, 7.0, 8.0]], ["nut"]),
    ]
    assert labels[0].boxes.dtype == np.float64 and labels.num_boxes == 3


def test_bom_and_crlf_are_accepted_and_lines_stay_right(tmp_path):
    text = ("\ufeffimage,x,y,width,height\r\n"
            "a.png,1,2,3,4\r\n"
            "\"b\r\nc.png\",1,2,3,4\r\n"  # a quoted field across two lines (RFC 4180)
            "\r\n"
            "d.png,1,2,x,4\r\n")
    path = _csv(tmp_path, text)
    # record 3 starts on line 3 and ends on line 4; line 5 is blank; the bad row is line 6
    assert _error(read_labels, path) == f"{path}:6: width is not a number: 'x'"
    path = _csv(tmp_path, text.replace("x,4", "3,4"))
    labels = read_labels(path)
    assert [it.image for it in labels] == ["a.png", "b\r\nc.png", "d.png"]
    assert labels[0].boxes.tolist() == [[1.0, 2.0, 3.0, 4.0]]


def test_header_in_any_order_and_case_with_extra_columns(tmp_path):
    path = _csv(tmp_path, "Height, note ,IMAGE,y,x,Width,note\n"
                          "4,hello,a.png,2,1,3,left\n")
    assert _summary(read_labels(path)) == [("a.png", [[1.0, 2.0, 3.0, 4.0]], [""])]


@pytest.mark.parametrize("body, line, message", [
    ("a.png,1,2,3,4\n", 1,
     "no header row: the first line must name the columns image,x,y,width,height"),
    ("image,x,y,w,h\na.png,1,2,3,4\n", 1,
     "missing columns width, height in the header (it must name image,x,y,width,height)"),
    ("image,x,y,width\n", 1, "missing column height in the header"),
    ("image,x,y,width,height,x\n", 1, "column 'x' appears twice in the header"),
    (HEADER + "a.png,1,2,3,4,nut\na.png,abc,2,3,4,nut\n", 3, "x is not a number: 'abc'"),
    (HEADER + "a.png,1,NaN,3,4,nut\n", 2, "y must be a finite number, found 'NaN'"),
    (HEADER + "a.png,1,2,inf,4,nut\n", 2, "width must be a finite number, found 'inf'"),
    (HEADER + "a.png,1,2,1_0,4,nut\n", 2, "width is not a number: '1_0'"),
    (HEADER + "a.png,\u0661,2,3,4,nut\n", 2, "x is not a number: '\u0661'"),  # Arabic-Indic 1
    (HEADER + "a.png,1,2,0,4,nut\n", 2, "width must be > 0, found 0"),
    (HEADER + "a.png,1,2,3,-2.5,nut\n", 2, "height must be > 0, found -2.5"),
    (HEADER + "a.png,1,,3,,nut\n", 2,
     "the box fields must be all filled or all empty (empty here: y, height)"),
    (HEADER + "a.png,1,2,3,4\n", 2, "5 fields, but the header on line 1 has 6"),
    (HEADER + "a.png,1,2,3,4,nut,x\n", 2, "7 fields, but the header on line 1 has 6"),
    (HEADER + ",1,2,3,4,nut\n", 2, "the image name is empty"),
    (HEADER + "a\x00.png,1,2,3,4,nut\n", 2, "the image name contains a NUL character"),
    (HEADER + "/data/a.png,1,2,3,4,nut\n", 2,
     "image '/data/a.png' is an absolute path; name it relative to the images folder"),
    (HEADER + "C:\\data\\a.png,1,2,3,4,nut\n", 2, "is an absolute path"),
    (HEADER + "../a.png,1,2,3,4,nut\n", 2, "image '../a.png' leads outside the images folder"),
    (HEADER + "a/../../b.png,1,2,3,4,nut\n", 2, "leads outside the images folder"),
    (HEADER + "a.png,-9,2,5,4,nut\n", 2,
     "box -9 2 5 4 (x y width height) lies entirely outside the image"),
])
def test_validation_names_file_and_line(tmp_path, body, line, message):
    path = _csv(tmp_path, body)
    err = _error(read_labels, path)
    assert err.startswith(f"{path}:{line}: "), err
    assert message in err, err


def test_empty_files(tmp_path):
    for text in ("", "\ufeff", "\n\r\n  \n"):
        path = _csv(tmp_path, text)
        assert _error(read_labels, path) == f"{path}: the file is empty"
    header_only = read_labels(_csv(tmp_path, "image,x,y,width,height\n"))
    assert len(header_only) == 0


def test_non_utf8_names_file_and_line(tmp_path):
    path = tmp_path / "latin1.csv"
    path.write_bytes("image,x,y,width,height\na.png,1,2,3,4\nb\xe4.png,1,2,3,4\n".encode("latin-1"))
    assert _error(read_labels, path) == (f"{path}:3: not UTF-8 text (byte 0xe4); save the file "
                                         "as UTF-8")


def test_missing_labels_file(tmp_path):
    assert _error(read_labels, tmp_path / "none.csv") == (f"{tmp_path / 'none.csv'}: cannot read "
                                                          "the file: no such file")


def test_image_names_are_normalised(tmp_path):
    path = _csv(tmp_path, "image,x,y,width,height\n"
                          "belt\\a.png,1,2,3,4\n"
                          "./belt//a.png,5,6,7,8\n"
                          " belt/b c.png ,,,,\n")
    assert [(it.image, len(it.boxes)) for it in read_labels(path)] == [("belt/a.png", 2),
                                                                       ("belt/b c.png", 0)]


def test_exact_duplicates_are_dropped_and_counted(tmp_path):
    path = _csv(tmp_path, HEADER
                + "a.png,1,2,3,4,nut\n"
                + "a.png,1.0,2,3,4,nut\n"  # the same numbers: a repeat
                + "a.png,1,2,3,4,bolt\n"  # another class: kept
                + "b.png,,,,,\n"
                + "b.png,,,,,\n")
    labels = read_labels(path)
    assert labels.duplicates == 2 and labels.warnings == 2
    assert _summary(labels) == [("a.png", [[1, 2, 3, 4], [1, 2, 3, 4]], ["nut", "bolt"]),
                                ("b.png", [], [])]
    assert labels.notes == [f"{path}:3: repeats an earlier row; dropped",
                            f"{path}:6: repeats an earlier row; dropped"]


def test_label_filter_keeps_every_image(tmp_path):
    path = _csv(tmp_path, HEADER
                + "a.png,1,2,3,4,nut\n"
                + "a.png,5,6,7,8,bolt\n"
                + "b.png,1,2,3,4,bolt\n"
                + "c.png,,,,,\n")
    labels = read_labels(path, label="nut")
    assert _summary(labels) == [("a.png", [[1, 2, 3, 4]], ["nut"]), ("b.png", [], []),
                                ("c.png", [], [])]
    assert _error(read_labels, path, label="washer") == (
        f"{path}: no box has label 'washer' (labels in the file: 'bolt', 'nut')")
    plain = _csv(tmp_path, "image,x,y,width,height\na.png,1,2,3,4\n", "plain.csv")
    assert _error(read_labels, plain, label="nut") == (
        f"{plain}:1: the file has no label column to pick label 'nut' from")


def test_clipping_at_origin_without_images(tmp_path):
    # (-4, 10, 20, 20) spans x -4..16: cut at 0 gives x 0..16, width 16
    path = _csv(tmp_path, "image,x,y,width,height\na.png,-4,10,20,20\n")
    labels = read_labels(path)
    assert labels[0].boxes.tolist() == [[0.0, 10.0, 16.0, 20.0]] and labels.clipped == 1
    assert labels.notes == [f"{path}:2: box reaches outside the image; clipped to the origin"]


def _images(tmp_path, sizes: dict[str, tuple[int, int]]):
    folder = tmp_path / "images"
    for name, (w, h) in sizes.items():
        (folder / name).parent.mkdir(parents=True, exist_ok=True)
        cv2.imwrite(str(folder / name), np.zeros((h, w), np.uint8))
    return folder


def test_images_folder_checks_and_clips(tmp_path):
    folder = _images(tmp_path, {"belt/a.png": (64, 48), "b.jpg": (32, 32)})
    path = _csv(tmp_path, "image,x,y,width,height\n"
                          "belt/a.png,10,10,20,20\n"
                          "belt/a.png,60,40,10,20\n"  # x 60..70 -> 60..64; y 40..60 -> 40..48
                          "b.jpg,-2,-3,40,10\n"  # x -2..38 -> 0..32; y -3..7 -> 0..7
                          "b.jpg,,,,,\n")  # a sixth, empty field at the end is tolerated
    labels = read_labels(path, images_dir=folder)
    assert _summary(labels) == [
        ("belt/a.png", [[10, 10, 20, 20], [60, 40, 4, 8]], ["", ""]),
        ("b.jpg", [[0, 0, 32, 7]], [""]),
    ]
    assert labels.clipped == 2 and labels.image_sizes == {"belt/a.png": (64, 48), "b.jpg": (32, 32)}
    assert labels.notes[0] == f"{path}:3: box reaches outside the image; clipped to 64 x 48"


@pytest.mark.parametrize("row, line, message", [
    ("a.png,64,0,5,5", 3, "box 64 0 5 5 (x y width height) lies entirely outside the image "
                          "(64 x 48)"),  # touches the right edge only
    ("a.png,0,48.5,5,5", 3, "lies entirely outside the image (64 x 48)"),
    ("missing.png,,,,", 3, "image file not found: "),
    ("broken.png,1,1,2,2", 3, "cannot read image: the file is empty (0 bytes)"),
])
def test_images_folder_errors(tmp_path, row, line, message):
    folder = _images(tmp_path, {"a.png": (64, 48)})
    (folder / "broken.png").write_bytes(b"")
    path = _csv(tmp_path, f"image,x,y,width,height\na.png,1,1,2,2\n{row}\n")
    err = _error(read_labels, path, images_dir=folder)
    assert err.startswith(f"{path}:{line}: ") and message in err, err
    if "not found" in message:
        assert err.endswith(os.path.join(str(folder), "missing.png"))


def test_unknown_image_is_reported_on_its_first_line(tmp_path):
    folder = _images(tmp_path, {"a.png": (8, 8)})
    path = _csv(tmp_path, "image,x,y,width,height\na.png,1,1,2,2\nz.png,1,1,2,2\nz.png,2,2,2,2\n")
    err = _error(read_labels, path, images_dir=folder)
    assert err.startswith(f"{path}:3: image file not found"), err


# ---------------------------------------------------------------------------------------------
# COCO JSON


def test_coco_written_is_read_by_pycocotools(tmp_path):
    pycoco = pytest.importorskip("pycocotools.coco")
    items = [ImageLabels("a.png", [[1.5, 2, 3, 4], [10, 20, 30, 40]], ["nut", "bolt"]),
             ImageLabels("sub/b.png"),
             ImageLabels("c.png", [[0, 0, 1, 1]], ["nut"])]
    path = tmp_path / "labels.json"
    write_coco(path, items, image_sizes={"a.png": (128, 96)})
    coco = pycoco.COCO(str(path))  # reference reader: pycocotools
    assert sorted(coco.getImgIds()) == [1, 2, 3]
    assert coco.imgs[1] == {"id": 1, "file_name": "a.png", "width": 128, "height": 96}
    assert coco.getAnnIds(imgIds=[2]) == []  # the object-free image is kept as an image
    anns = coco.loadAnns(coco.getAnnIds(imgIds=[1]))
    assert [a["bbox"] for a in anns] == [[1.5, 2.0, 3.0, 4.0], [10.0, 20.0, 30.0, 40.0]]
    assert [a["area"] for a in anns] == [12.0, 1200.0]
    assert [coco.cats[a["category_id"]]["name"] for a in anns] == ["nut", "bolt"]
    assert _summary(read_labels(path)) == _summary(items)


def test_coco_perfect_detections_score_ap_one_in_pycocotools(tmp_path):
    pycoco = pytest.importorskip("pycocotools.coco")
    cocoeval = pytest.importorskip("pycocotools.cocoeval")
    labels = [ImageLabels("a.png", [[10, 10, 40, 40], [60, 10, 40, 40]]),
              ImageLabels("b.png", [[5, 5, 50, 30]]), ImageLabels("c.png")]
    write_coco(tmp_path / "labels.json", labels,
               image_sizes={k: (128, 96) for k in ("a.png", "b.png", "c.png")})
    detections = [ImageDetections(it.image, it.boxes, np.linspace(0.9, 0.5, len(it.boxes)))
                  for it in labels]
    write_detections_coco(tmp_path / "detections.json", detections,
                          image_ids={"a.png": 1, "b.png": 2, "c.png": 3})
    gt = pycoco.COCO(str(tmp_path / "labels.json"))
    results = json.loads((tmp_path / "detections.json").read_text())["annotations"]
    run = cocoeval.COCOeval(gt, gt.loadRes(results), "bbox")
    run.evaluate()
    run.accumulate()
    run.summarize()
    assert run.stats[0] == pytest.approx(1.0)  # AP over IoU 0.50:0.95, every box found exactly


def test_coco_file_from_elsewhere(tmp_path):
    doc = {
        "info": {"year": 2024}, "licenses": [],
        "images": [{"id": 7, "file_name": "x/one.jpg", "width": 100, "height": 50},
                   {"id": "b", "file_name": "two.jpg", "width": 10, "height": 10}],
        "annotations": [
            {"id": 1, "image_id": 7, "category_id": 3, "bbox": [90, 40, 20, 20], "area": 400,
             "iscrowd": 0, "segmentation": [[90, 40, 110, 40, 110, 60]]},
            {"id": 2, "image_id": 7, "category_id": 3, "bbox": [0, 0, 5, 5], "iscrowd": 1},
            {"id": 3, "image_id": 7, "category_id": 4, "bbox": [1, 2, 3, 4]},
        ],
        "categories": [{"id": 3, "name": "nut"}, {"id": 4, "name": "bolt"}],
    }
    path = tmp_path / "export.json"
    path.write_text(json.dumps(doc, indent=2))
    labels = read_coco(path)
    # (90, 40, 20, 20) in a 100 x 50 image: x 90..110 -> 90..100, y 40..60 -> 40..50
    assert _summary(labels) == [("x/one.jpg", [[90, 40, 10, 10], [1, 2, 3, 4]], ["nut", "bolt"]),
                                ("two.jpg", [], [])]
    assert labels.crowd == 1 and labels.clipped == 1 and labels.warnings == 2
    assert labels.notes == [f"{path} annotations[0]: box reaches outside the image; clipped "
                            "to 100 x 50"]
    assert _summary(read_labels(path, label="bolt"))[0][1] == [[1, 2, 3, 4]]


@pytest.mark.parametrize("text, message", [
    ('{\n  "images": [\n  }\n', ":3: not valid JSON: Expecting value"),
    ('{"images": []}', ": missing key 'annotations'"),
    ('[' * 50000, ": not valid JSON: nested too deeply"),
    ('{"images": [{"id": 1, "file_name": "a.png", "width": 1' + "0" * 5000 + ', "height": 1}]}',
     ": not valid JSON: a number has too many digits"),
    ('{"images": {}, "annotations": []}', ": 'images' must be a list"),
    ('[{"image_id": 1, "bbox": [1, 2, 3, 4], "score": 0.5}]',
     ": this is a COCO results list (detections), not a labels file"),
    ('{"images": [{"id": 1}], "annotations": []}', ": images[0]: missing key 'file_name'"),
    ('{"images": [{"id": 1, "file_name": "a.png"}, {"id": 1, "file_name": "b.png"}],'
     ' "annotations": []}', ": images[1]: image id 1 appears twice"),
    ('{"images": [{"id": 1, "file_name": "/abs/a.png"}], "annotations": []}',
     ": images[0]: image '/abs/a.png' is an absolute path"),
    ('{"images": [{"id": 1, "file_name": "a.png", "width": 0, "height": 5}],'
     ' "annotations": []}', ": images[0]: 'width' must be a whole number > 0, found 0"),
    ('{"images": [{"id": 1, "file_name": "a.png"}],'
     ' "annotations": [{"image_id": 2, "bbox": [1, 2, 3, 4]}]}',
     ": annotations[0]: image_id 2 is not the id of any image"),
    ('{"images": [{"id": 1, "file_name": "a.png"}],'
     ' "annotations": [{"image_id": 1, "bbox": [1, 2, 3]}]}',
     ": annotations[0]: 'bbox' must be a list of 4 numbers"),
    ('{"images": [{"id": 1, "file_name": "a.png"}],'
     ' "annotations": [{"image_id": 1, "bbox": [1, 2, NaN, 4]}]}',
     ": annotations[0]: 'bbox' must hold finite numbers"),
    ('{"images": [{"id": 1, "file_name": "a.png"}],'
     ' "annotations": [{"image_id": 1, "bbox": [1, 2, 0, 4]}]}',
     ": annotations[0]: width must be > 0, found 0"),
    ('{"images": [{"id": 1, "file_name": "a.png"}], "categories": [{"id": 1, "name": "nut"}],'
     ' "annotations": [{"image_id": 1, "category_id": 9, "bbox": [1, 2, 3, 4]}]}',
     ": annotations[0]: category_id 9 is not the id of any category"),
])
def test_coco_errors_name_the_file(tmp_path, text, message):
    path = tmp_path / "labels.json"
    path.write_text(text)
    err = _error(read_labels, path)
    assert err.startswith(f"{path}{message}"), err


def test_write_coco_merges_items_of_one_image(tmp_path):
    path = tmp_path / "labels.json"
    write_coco(path, [ImageLabels("a.png", [[1, 2, 3, 4]]), ImageLabels("b.png"),
                      ImageLabels("a.png", [[5, 6, 7, 8]])])
    doc = json.loads(path.read_text())
    assert [im["file_name"] for im in doc["images"]] == ["a.png", "b.png"]
    assert [(a["image_id"], a["bbox"]) for a in doc["annotations"]] == [(1, [1, 2, 3, 4]),
                                                                      (1, [5, 6, 7, 8])]


def test_coco_is_recognised_by_content_too(tmp_path):
    path = tmp_path / "labels.txt"
    write_coco(tmp_path / "x.json", [ImageLabels("a.png", [[1, 2, 3, 4]])])
    path.write_text("\n  " + (tmp_path / "x.json").read_text())
    assert _summary(read_labels(path)) == [("a.png", [[1, 2, 3, 4]], ["object"])]


def test_writers_leave_no_partial_file(tmp_path):
    path = tmp_path / "labels.csv"
    write_labels_csv(path, [ImageLabels("a.png", [[1, 2, 3, 4]])])
    before = path.read_bytes()

    class Broken:
        image = "b.png"
        classes = ["nut"]

        @property
        def boxes(self):
            raise RuntimeError("disk full, say")

    with pytest.raises(RuntimeError):
        write_labels_csv(path, [ImageLabels("a.png", [[5, 6, 7, 8]], ["nut"]), Broken()])
    assert path.read_bytes() == before
    assert sorted(os.listdir(tmp_path)) == ["labels.csv"]
    assert _error(write_coco, tmp_path / "no such folder" / "x.json", []) == (
        f"{tmp_path / 'no such folder' / 'x.json'}: cannot write the file: its folder does not "
        "exist")


# ---------------------------------------------------------------------------------------------
# round trips (hypothesis)

_segment = st.from_regex(r"[a-z0-9](?:[a-z0-9 ,\"é_-]{0,6}[a-z0-9])?", fullmatch=True)
_image = st.lists(_segment, min_size=1, max_size=3).map(lambda parts: "/".join(parts) + ".png")
_coord = st.floats(0, 1e5, allow_nan=False, allow_infinity=False)
_extent = st.floats(1e-3, 1e5, allow_nan=False, allow_infinity=False)
_box = st.tuples(_coord, _coord, _extent, _extent)


@st.composite
def _label_sets(draw):
    with_classes = draw(st.booleans())
    cls = st.sampled_from(["nut", "bolt", "ring washer"]) if with_classes else st.just("")
    names = draw(st.lists(_image, min_size=1, max_size=5, unique=True))
    items = []
    for name in names:
        pairs = draw(st.lists(st.tuples(_box, cls), max_size=4, unique=True))
        items.append(ImageLabels(name, np.array([p[0] for p in pairs], np.float64).reshape(-1, 4),
                                 [p[1] for p in pairs]))
    return items


def _assert_same(got, want, classes=None):
    assert [it.image for it in got] == [it.image for it in want]
    for g, w in zip(got, want):
        np.testing.assert_array_equal(g.boxes, w.boxes)  # exactly, not approximately
        assert g.classes == (w.classes if classes is None else [c or classes for c in w.classes])


@FUZZ
@given(items=_label_sets())
def test_csv_coco_csv_round_trip_keeps_boxes_and_object_free_images(tmp_path, items):
    write_labels_csv(tmp_path / "one.csv", items)
    first = read_labels(tmp_path / "one.csv")
    _assert_same(first, items)
    write_coco(tmp_path / "labels.json", first)
    second = read_labels(tmp_path / "labels.json")
    _assert_same(second, items, classes="object")  # boxes with no class go under "object"
    write_labels_csv(tmp_path / "two.csv", second)
    third = read_labels(tmp_path / "two.csv")
    _assert_same(third, items, classes="object")
    assert first.warnings == second.warnings == third.warnings == 0
    object_free = {it.image for it in items if len(it.boxes) == 0}
    assert {it.image for it in third if len(it.boxes) == 0} == object_free


_score = st.floats(0, 1, allow_nan=False)


@st.composite
def _detection_sets(draw):
    names = draw(st.lists(_image, min_size=1, max_size=5, unique=True))
    items = []
    for name in names:
        pairs = draw(st.lists(st.tuples(_box, _score), max_size=4))
        items.append(ImageDetections(name, np.array([p[0] for p in pairs]).reshape(-1, 4),
                                     [p[1] for p in pairs]))
    return items


@FUZZ
@given(items=_detection_sets(), fmt=st.sampled_from(["csv", "json"]))
def test_detections_round_trip(tmp_path, items, fmt):
    path = tmp_path / f"detections.{fmt}"
    (write_detections_csv if fmt == "csv" else write_detections_coco)(path, items)
    got = read_detections(path)
    assert [d.image for d in got] == [d.image for d in items]
    for g, w in zip(got, items):
        order = np.argsort(-w.scores, kind="stable")  # written by score, high first
        np.testing.assert_array_equal(g.scores, w.scores[order])
        np.testing.assert_array_equal(g.boxes, w.boxes[order])
        assert np.all(np.diff(g.scores) <= 0)


# names a file system allows and a CSV must carry exactly: surrounding spaces, commas, quotes,
# backslashes, line breaks, and the %XX a name that is not UTF-8 is written with
_awkward_name = st.text(alphabet=st.sampled_from(list(' a,"\'\\\r\n\t%E9./ü')), min_size=1,
                        max_size=12).filter(lambda t: t.strip()).map(lambda t: t + ".png")


@FUZZ
@given(names=st.lists(_awkward_name, min_size=1, max_size=5, unique=True), data=st.data())
def test_detections_csv_names_round_trip_exactly(tmp_path, names, data):
    """A detections CSV gives back every image name exactly as written (RFC 4180: spaces are part
    of a field; the writer quotes commas, quotes and line breaks), so that --resume finds the
    images already done; scoring matches labels by normalise_image_name instead."""
    boxes = [np.array(data.draw(st.lists(_box, max_size=2))).reshape(-1, 4) for _ in names]
    items = [ImageDetections(name, b, np.linspace(1.0, 0.5, len(b)))
             for name, b in zip(names, boxes)]
    path = tmp_path / "detections.csv"
    write_detections_csv(path, items)
    got = read_detections(path)
    assert [d.image for d in got] == names
    path.read_bytes().decode("utf-8")  # valid UTF-8


def test_scoring_matches_detection_names_the_way_labels_are_read(tmp_path):
    """Labels normalise names (' ./belt\\a.png ' is 'belt/a.png'); detections keep them exactly,
    and the score matches them by the same normal form, merging names that agree on it."""
    from detector.reporting.inputs import read_score_inputs

    labels = _csv(tmp_path, "image,x,y,width,height\nbelt/a.png,0,0,10,10\n")
    found = _csv(tmp_path, "image,x,y,width,height,score\n"
                           "./belt\\a.png,0,0,10,10,0.9\n"
                           " belt/a.png ,20,0,10,10,0.4\n", "detections.csv")
    assert [d.image for d in read_detections(found)] == ["./belt\\a.png", " belt/a.png "]
    inputs = read_score_inputs(found, labels)
    assert list(inputs.detections) == ["belt/a.png"]
    assert inputs.detections["belt/a.png"][1].tolist() == [0.9, 0.4]


@FUZZ
@given(text=st.text(alphabet=st.sampled_from(list("ab.png/\\,\"'\r\n\t 0123456789-+eEnaifx\x00é")),
                    max_size=120),
       header=st.sampled_from(["", "image,x,y,width,height,label\n",
                               "image,x,y,width,height,score\n", "{", "["]))
def test_random_text_raises_only_input_error(tmp_path, text, header):
    path = _csv(tmp_path, header + text)
    for reader in (read_labels, read_detections):
        try:
            reader(path)
        except InputError as err:
            assert str(err).startswith(str(path)) and "\n" not in str(err)


_json_leaf = (st.none() | st.booleans() | st.integers() | st.floats()
              | st.sampled_from(["a.png", "../b.png", "", "x"]))
_json_key = st.sampled_from(["images", "annotations", "categories", "id", "file_name", "width",
                             "height", "image_id", "bbox", "category_id", "name", "score",
                             "iscrowd"])
_json = st.recursive(_json_leaf, lambda inner: st.lists(inner, max_size=4)
                     | st.dictionaries(_json_key, inner, max_size=5), max_leaves=25)


@FUZZ
@given(doc=_json)
def test_random_json_raises_only_input_error(tmp_path, doc):
    path = tmp_path / "fuzz.json"
    path.write_text(json.dumps(doc))
    for call in (read_labels, read_detections, lambda p: read_detections(p, images=path)):
        try:
            call(path)
        except InputError as err:
            assert str(err).startswith(str(path)) and "\n" not in str(err)


# ---------------------------------------------------------------------------------------------
# detections


def test_detections_csv_reading(tmp_path):
    path = _csv(tmp_path, "image,x,y,width,height,score\n"
                          "b.png,1,2,3,4,0.25\n"
                          "/abs/c.png,,,,,\n"
                          "b.png,5,6,7,8,1\n"
                          "a.png,0,0,1,1,0\n", "detections.csv")
    got = read_detections(path)
    assert [(d.image, d.boxes.tolist(), d.scores.tolist()) for d in got] == [
        ("b.png", [[1, 2, 3, 4], [5, 6, 7, 8]], [0.25, 1.0]),
        ("/abs/c.png", [], []),  # a file scanned by itself keeps its path
        ("a.png", [[0, 0, 1, 1]], [0.0]),
    ]


@pytest.mark.parametrize("row, message", [
    ("a.png,1,2,3,4,1.5", "score must be a number in 0..1, found 1.5"),
    ("a.png,1,2,3,4,-0.1", "score must be a number in 0..1, found -0.1"),
    ("a.png,1,2,3,4,nan", "score must be a number in 0..1, found nan"),
    ("a.png,1,2,3,4,high", "score must be a number in 0..1, found high"),
    ("a.png,1,2,3,4,", "the score is empty"),
    ("a.png,,,,,0.5", "a score without a box (the box fields are empty)"),
    ("a.png,1,2,3,0,0.5", "height must be > 0, found 0"),
])
def test_detections_validation(tmp_path, row, message):
    path = _csv(tmp_path, f"image,x,y,width,height,score\nok.png,1,1,1,1,0.5\n{row}\n",
                "detections.csv")
    assert _error(read_detections, path) == f"{path}:3: {message}"


def test_detections_csv_writing_groups_and_sorts(tmp_path):
    path = tmp_path / "detections.csv"
    write_detections_csv(path, [ImageDetections("a.png", [[0, 0, 8, 8], [1, 1, 8, 8]], [0.2, 0.7]),
                                ImageDetections("empty.png"),
                                ImageDetections("a.png", [[2, 2, 8, 8]], [0.5])])
    assert path.read_text().splitlines() == ["image,x,y,width,height,score",
                                             "a.png,1,1,8,8,0.7",
                                             "a.png,2,2,8,8,0.5",
                                             "a.png,0,0,8,8,0.2",
                                             "empty.png,,,,,"]


def test_coco_results_list_with_the_images_file(tmp_path):
    write_coco(tmp_path / "labels.json", [ImageLabels("a.png", [[1, 2, 3, 4]]),
                                          ImageLabels("b.png")])
    results = tmp_path / "results.json"
    results.write_text(json.dumps([{"image_id": 1, "category_id": 1, "bbox": [1, 2, 3, 4],
                                    "score": 0.75}]))
    got = read_detections(results, images=tmp_path / "labels.json")
    assert [(d.image, d.boxes.tolist(), d.scores.tolist()) for d in got] == [
        ("a.png", [[1, 2, 3, 4]], [0.75]), ("b.png", [], [])]
    by_id = read_detections(results, images={1: "a.png"})
    assert [d.image for d in by_id] == ["a.png"]
    assert _error(read_detections, results) == (
        f"{results}: a COCO results list refers to images by id: give the COCO file that lists "
        "the images as well")
    results.write_text(json.dumps([{"image_id": 1, "bbox": [1, 2, 3, 4], "score": 2}]))
    assert _error(read_detections, results, images={1: "a.png"}) == (
        f"{results}: [0]: score must be a number in 0..1, found 2.0")
