"""COCO interop end to end: `patchwood scan --format coco-results --labels GT.json` writes the
results list that pycocotools reads, with the labels file's image and category ids.

References: pycocotools (``COCO``, ``COCO.loadRes`` and ``COCOeval``, iouType "bbox"; Lin et al.,
ECCV 2014), whose 101-point AP50 and AP50:95 on the scan's own output must equal, to 4 digits, the
figures `patchwood score` reports for the same file; hand-worked id lookups.
"""

from __future__ import annotations

import contextlib
import io
import json

import numpy as np
import pytest
from pycocotools.coco import COCO
from pycocotools.cocoeval import COCOeval
from typer.testing import CliRunner

import cli.main
from detector.errors import InputError
from detector.io.labels import (ImageDetections, coco_result_ids, read_detections,
                             read_labels, write_coco, write_detections_coco_results)
from shared import small_model


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    """A 20-tree model trained on a 10-frame scenario, its 6 test frames, and their labels
    converted to COCO JSON (ids 1..6 in the labels' order, one category)."""
    root = tmp_path_factory.mktemp("coco-results")
    small_model(root, train_images=10, test_images=6, seed=5, negatives_per_image=60, n_trees=20,
                pool=2000)
    labels = read_labels(root / "test" / "labels.csv", root / "test" / "images")
    write_coco(root / "gt.json", labels, category="nut")
    return root


def invoke(*args):
    return CliRunner().invoke(cli.main.app, [str(a) for a in args])


def run_main(monkeypatch, capsys, *args):
    """The command as a user runs it (errors become one line on stderr): (status, stderr)."""
    monkeypatch.setattr("sys.argv", ["patchwood", *[str(a) for a in args]])
    with pytest.raises(SystemExit) as stop:
        cli.main.run()
    return stop.value.code, capsys.readouterr().err


def quiet(call, *args, **kwargs):
    """A pycocotools call with its progress prints kept off the test output."""
    with contextlib.redirect_stdout(io.StringIO()):
        return call(*args, **kwargs)


def test_scan_results_evaluate_in_pycocotools_as_patchwood_scores_them(scenario, tmp_path):
    root = scenario
    out = tmp_path / "results.json"
    result = invoke("scan", root / "model.npz", root / "test" / "images", "--out", out,
                    "--format", "coco-results", "--labels", root / "gt.json", "--threshold", "0.05")
    assert result.exit_code == 0, result.output
    assert f"image ids: from {root / 'gt.json'}" in result.output
    results = json.loads(out.read_text())
    gt_doc = json.loads((root / "gt.json").read_text())
    ids = {im["file_name"]: im["id"] for im in gt_doc["images"]}
    assert isinstance(results, list) and len(results) > 0
    for r in results:
        assert set(r) == {"image_id", "category_id", "bbox", "score"}
        assert r["category_id"] == gt_doc["categories"][0]["id"]
    # the same detections as the CSV output, under the labels' ids
    csv_out = tmp_path / "results.csv"
    assert invoke("scan", root / "model.npz", root / "test" / "images", "--out", csv_out,
                  "--threshold", "0.05").exit_code == 0
    by_image = {d.image: d for d in read_detections(csv_out)}
    for image, image_id in ids.items():
        mine = [r for r in results if r["image_id"] == image_id]
        np.testing.assert_array_equal([r["bbox"] for r in mine],
                                      by_image[image].boxes.reshape(-1, 4))
        np.testing.assert_array_equal([r["score"] for r in mine], by_image[image].scores)
        assert len(mine) <= 100  # pycocotools keeps at most 100 detections per image

    # pycocotools on the file the scan wrote, against the labels converted to COCO
    gt = quiet(COCO, str(root / "gt.json"))
    run = COCOeval(gt, quiet(gt.loadRes, str(out)), iouType="bbox")
    quiet(run.evaluate)
    quiet(run.accumulate)
    quiet(run.summarize)
    coco_ap50_95, coco_ap50 = float(run.stats[0]), float(run.stats[1])

    # patchwood score on the same file and the same labels
    report = tmp_path / "report"
    scored = invoke("score", out, root / "gt.json", "--out", report)
    assert scored.exit_code == 0, scored.output
    summary = json.loads((report / "summary.json").read_text())
    assert summary["objects"] == sum(len(it.boxes) for it in read_labels(root / "test" / "labels.csv"))
    assert coco_ap50 > 0.1  # a real figure, not an empty evaluation
    assert round(summary["average_precision_101_point"], 4) == round(coco_ap50, 4)
    assert round(summary["average_precision_50_to_95"], 4) == round(coco_ap50_95, 4)


def test_an_image_missing_from_the_labels_is_a_one_line_error(scenario, tmp_path, monkeypatch,
                                                              capsys):
    root = scenario
    gt = json.loads((root / "gt.json").read_text())
    missing = gt["images"].pop(2)["file_name"]
    gt["annotations"] = [a for a in gt["annotations"] if a["image_id"] != 3]
    partial = tmp_path / "partial.json"
    partial.write_text(json.dumps(gt))
    out = tmp_path / "results.json"
    code, err = run_main(monkeypatch, capsys, "scan", root / "model.npz", root / "test" / "images",
                         "--out", out, "--format", "coco-results", "--labels", partial)
    assert code == 1
    assert err == (f"error: {partial}: image {missing!r} is not among the images of this COCO "
                   "labels file (matched by file name)\n")
    assert not out.exists()  # refused before any image was scanned


@pytest.mark.parametrize("args, message", [
    (["--format", "csv", "--labels", "GT"], "--labels gives image ids to --format coco-results, or labels to the frames --draw draws"),
    (["--format", "coco-results", "--label", "nut"], "--label chooses a category of the --labels"),
    (["--format", "coco-result"], "'coco-result' is not one of 'csv', 'coco', 'coco-results'"),
])
def test_labels_options_are_usage_errors_elsewhere(scenario, tmp_path, args, message):
    root = scenario
    args = [root / "gt.json" if a == "GT" else a for a in args]
    result = invoke("scan", root / "model.npz", root / "test" / "images", "--out",
                    tmp_path / "d.json", *args)
    assert result.exit_code == 2 and message in " ".join(result.output.split())
    assert not (tmp_path / "d.json").exists()


def test_result_ids_from_a_labels_file(tmp_path):
    doc = {"images": [{"id": 11, "file_name": "belt/a.png"}, {"id": "x7", "file_name": "b.png"}],
           "annotations": [],
           "categories": [{"id": 4, "name": "washer"}, {"id": 9, "name": "nut"}]}
    path = tmp_path / "gt.json"
    path.write_text(json.dumps(doc))
    with pytest.raises(InputError, match=r"has 2 categories \('washer', 'nut'\); choose"):
        coco_result_ids(path)
    ids = coco_result_ids(path, label="nut")
    assert ids.category_id == 9 and ids.image_ids == {"belt/a.png": 11, "b.png": "x7"}
    # names as the detections file writes them, exactly; folders are never guessed at
    assert ids.image_id("belt/a.png") == 11 and ids.image_id("b.png") == "x7"
    for name, listed in [("scans/belt/a.png", "belt/a.png"), ("a.png", "belt/a.png"),
                         ("other/b.png", "b.png")]:
        with pytest.raises(InputError) as err:
            ids.image_id(name)
        assert str(err.value) == (f"{path}: image {name!r} is not among the images of this COCO "
                                  f"labels file (matched by file name; it lists {listed!r}: scan "
                                  "the folder its file names are relative to)")
    for name in ("c.png", "xbelt/a.png", "b.png/a.png"):  # folders must match whole
        with pytest.raises(InputError, match=rf"{name!r} is not among the images of this COCO "
                                             r"labels file \(matched by file name\)$"):
            ids.image_id(name)
    with pytest.raises(InputError, match="no category named 'bolt'"):
        coco_result_ids(path, label="bolt")
    csv = tmp_path / "labels.csv"
    csv.write_text("image,x,y,width,height\na.png,1,2,3,4\n")
    with pytest.raises(InputError, match="not a CSV one"):
        coco_result_ids(csv)


def test_results_writer_reads_back_through_the_detections_reader(tmp_path):
    """What the writer puts in the list is what read_detections (given the labels' ids) and
    pycocotools' loadRes read from it; images without detections leave no entry."""
    path = tmp_path / "results.json"
    items = [ImageDetections("a.png", [[0, 0, 24, 24], [5, 5, 10.5, 12]], [0.25, 0.75]),
             ImageDetections("b.png"), ImageDetections("c.png", [[1, 2, 3, 4]], [0.5])]
    write_detections_coco_results(path, items, {"a.png": 3, "b.png": 1, "c.png": 2}, 7)
    doc = json.loads(path.read_text())
    assert doc == [
        {"image_id": 3, "category_id": 7, "bbox": [5.0, 5.0, 10.5, 12.0], "score": 0.75},
        {"image_id": 3, "category_id": 7, "bbox": [0.0, 0.0, 24.0, 24.0], "score": 0.25},
        {"image_id": 2, "category_id": 7, "bbox": [1.0, 2.0, 3.0, 4.0], "score": 0.5},
    ]
    back = read_detections(path, images={3: "a.png", 1: "b.png", 2: "c.png"})
    assert {d.image: d.scores.tolist() for d in back} == {"a.png": [0.75, 0.25], "b.png": [],
                                                          "c.png": [0.5]}
    gt = COCO()
    gt.dataset = {"images": [{"id": i} for i in (1, 2, 3)], "annotations": [],
                  "categories": [{"id": 7, "name": "nut"}]}
    quiet(gt.createIndex)
    res = quiet(gt.loadRes, str(path))
    # loadRes adds the area (width x height) of each box: 10.5 * 12 = 126
    assert sorted(a["area"] for a in res.anns.values()) == [12.0, 126.0, 576.0]
    with pytest.raises(InputError, match="'c.png' has no id"):
        write_detections_coco_results(path, items, {"a.png": 3, "b.png": 1})


def test_resume_is_refused_for_a_results_list(scenario, tmp_path, monkeypatch, capsys):
    """A results list has no record of the images scanned without detections, so a run cannot
    be continued from it: refused in one line, the file left as it was."""
    root = scenario
    out = tmp_path / "results.json"
    out.write_text("[]\n")
    code, err = run_main(monkeypatch, capsys, "scan", root / "model.npz", root / "test" / "images",
                         "--out", out, "--format", "coco-results", "--labels", root / "gt.json",
                         "--resume")
    # a usage error (exit status 2), before anything is read or written
    assert code == 2 and err.count("\n") == 1
    assert "--resume continues CSV output only; --format coco-results writes a new file" in err
    assert out.read_text() == "[]\n"
