"""Folder runs: `patchwood scan` and detector.scan.scan_paths.

What is checked, and against what:
- the detections file holds, for every image, exactly what ``detector.scan.Engine.scan`` returns
  for that image read on its own (the file keeps 1/100 pixel and 6 digits of score), and every
  scanned image appears (one empty row when nothing was found), named as the labels CSV names it;
- COCO JSON output (the COCO detection results format, Lin et al., 2014) reads back to the same
  detections as the CSV;
- bad files (truncated, not an image, empty, a dangling link, above the size limit) are listed
  and the run goes on;
- an interrupted run leaves a valid file of complete images that --resume finishes into the very
  file an uninterrupted run writes; --jobs 2 and a dask.distributed cluster write the same bytes;
- the annotated copies, and the refusals: --draw inside an input folder, an existing --out
  without --force.
"""

from __future__ import annotations

import csv
import os
import shutil
import struct
import sys
import zlib
from pathlib import Path

import cv2
import numpy as np
import pytest
from typer.testing import CliRunner

import cli.main
from detector.reporting.drawing import BOX_STYLES, bgr
from detector.scan import failures_path, scan_paths
from detector.errors import InputError
from detector.io.images import read_gray
from detector.io.labels import read_detections
from detector.model import load_model
from detector.scan import Engine, ScanSettings
from shared import small_model

# the display names of the scan folder below, sorted as list_images gives them
NAMES = ["blank.png", "day 2/frame_0003.png", "day 2/frame_0004.png", "frame_0001.png",
         "frame_0002.png", "frame_0003.png", "frame_0004.png"]


@pytest.fixture(scope="session")
def trained(tmp_path_factory):
    """A 20-tree model trained on a small bank of a 12-frame scenario, saved to model.npz."""
    return small_model(tmp_path_factory.mktemp("batch-scenario"), train_images=12, test_images=4,
                       seed=2, negatives_per_image=60, n_trees=20, pool=2000).parent


@pytest.fixture(scope="session")
def folder(trained, tmp_path_factory):
    """images/: the 4 test frames, two of them again in "day 2/", a uniform blank frame (nothing
    to find) and a notes file (skipped)."""
    images = tmp_path_factory.mktemp("scan-input") / "images"
    (images / "day 2").mkdir(parents=True)
    for p in sorted((trained / "test" / "images").glob("*.png")):
        shutil.copy(p, images / p.name)
    for name in ("frame_0003.png", "frame_0004.png"):
        shutil.copy(images / name, images / "day 2" / name)
    cv2.imwrite(str(images / "blank.png"), np.full((240, 320), 128, np.uint8))
    (images / "notes.txt").write_text("camera 2, shift B\n")
    return images


@pytest.fixture(scope="session")
def reference(trained, folder):
    """What the engine finds in each image of the folder, scanned one by one."""
    engine = Engine(load_model(trained / "model.npz"), ScanSettings())
    out = {}
    for name in NAMES:
        out[name] = engine.scan(read_gray(folder / name))
    return out


def invoke(*args):
    return CliRunner().invoke(cli.main.app, ["scan", *[str(a) for a in args]])


def run_main(monkeypatch, capsys, *args):
    """`patchwood scan ...` through the console entry point: (exit code, stdout, stderr)."""
    monkeypatch.setattr(sys, "argv", ["patchwood", "scan", *[str(a) for a in args]])
    with pytest.raises(SystemExit) as exit_info:
        cli.main.run()
    captured = capsys.readouterr()
    return exit_info.value.code, captured.out, captured.err


def assert_matches_engine(detections, reference, names=NAMES):
    assert [d.image for d in detections] == list(names)
    for d in detections:
        ref = reference[d.image]
        assert len(d.scores) == len(ref.scores), d.image
        np.testing.assert_allclose(d.boxes, ref.boxes.reshape(-1, 4), rtol=0, atol=0.005 + 1e-9)
        np.testing.assert_allclose(d.scores, ref.scores, rtol=0, atol=5e-7 + 1e-12)


def make_bad_files(folder: Path) -> list[str]:
    good = (folder / "frame_0001.png").read_bytes()
    (folder / "broken.png").write_bytes(good[: len(good) // 2])  # truncated PNG
    (folder / "fake.jpg").write_text("this is a shopping list, not a picture\n")
    (folder / "empty.bmp").write_bytes(b"")
    os.symlink(folder / "moved-away.png", folder / "gone.png")  # a link to nothing
    # a PNG header (ISO/IEC 15948) claiming 20000 x 20000 pixels, above the 100-megapixel limit;
    # a cluster run refuses it before its bytes travel, in the same words
    ihdr = b"IHDR" + struct.pack(">IIBBBBB", 20000, 20000, 8, 0, 0, 0, 0)
    (folder / "huge.png").write_bytes(b"\x89PNG\r\n\x1a\n" + struct.pack(">I", 13) + ihdr
                                      + struct.pack(">I", zlib.crc32(ihdr)))
    return ["broken.png", "empty.bmp", "fake.jpg", "gone.png", "huge.png"]


# ------------------------------------------------------------------ the detections file

def test_folder_scan_writes_every_image_as_the_engine_finds_it(trained, folder, reference, tmp_path):
    out = tmp_path / "detections.csv"
    result = invoke(trained / "model.npz", folder, "--out", out)
    assert result.exit_code == 0, result.output
    detections = read_detections(out)
    assert_matches_engine(detections, reference)
    found = sum(len(r.scores) for r in reference.values())
    assert found > 0
    text = out.read_text()
    assert "\nblank.png,,,,,\n" in text  # nothing found: still recorded, one empty row
    assert "\nday 2/frame_0003.png," in text  # relative to the scanned folder, forward slashes
    # the summary: images, detections, failures, seconds, mean trees per window
    windows = sum(r.windows for r in reference.values())
    trees = sum(r.trees for r in reference.values())
    assert "images scanned: 7\n" in result.stdout
    assert f"detections: {found} at score >= 0.5\n" in result.stdout
    assert "failures: 0\n" in result.stdout
    assert "other files skipped: 1 (notes.txt)\n" in result.stdout  # named, not only counted
    assert f"mean trees per window: {trees / windows:.2f}\n" in result.stdout
    assert " s (" in result.stdout and "images/s)" in result.stdout


def test_scan_options_reach_the_engine_and_single_files_keep_their_path(trained, folder, tmp_path,
                                                                        monkeypatch):
    settings = ScanSettings(scale_step=1.3, stride=3.0, min_object=24.0, max_object=60.0,
                            threshold=0.3, nms_iou=0.5, overhang=0.5)
    engine = Engine(load_model(trained / "model.npz"), settings)
    expected = {name: engine.scan(read_gray(folder / name)) for name in ("frame_0002.png",
                                                                        "frame_0003.png")}
    monkeypatch.chdir(folder.parent)
    out = tmp_path / "detections.csv"
    absolute = folder / "frame_0003.png"
    result = invoke(trained / "model.npz", "images/frame_0002.png", absolute, "--out", out,
                    "--scale-step", 1.3, "--stride", 3, "--min-object", 24, "--max-object", 60,
                    "--threshold", 0.3, "--nms-iou", 0.5, "--overhang", 0.5)
    assert result.exit_code == 0, result.output
    names = ["images/frame_0002.png", str(absolute)]  # files given by themselves: as given
    expected = {names[0]: expected["frame_0002.png"], names[1]: expected["frame_0003.png"]}
    assert_matches_engine(read_detections(out), expected, names)
    # the options changed the outcome: the default settings find something else
    default = Engine(load_model(trained / "model.npz"), ScanSettings()).scan(read_gray(absolute))
    assert (len(default.scores), default.windows) != (len(expected[names[1]].scores),
                                                      expected[names[1]].windows)


def test_overhang_out_of_range_is_a_usage_error(trained, folder, tmp_path):
    result = invoke(trained / "model.npz", folder, "--out", tmp_path / "d.csv", "--overhang", 0.6)
    assert result.exit_code == 2 and "--overhang" in result.output
    assert not (tmp_path / "d.csv").exists()


def test_coco_output_holds_the_same_detections(trained, folder, tmp_path):
    csv_out, coco_out = tmp_path / "d.csv", tmp_path / "d.json"
    assert invoke(trained / "model.npz", folder, "--out", csv_out).exit_code == 0
    result = invoke(trained / "model.npz", folder, "--out", coco_out, "--format", "coco")
    assert result.exit_code == 0, result.output
    a, b = read_detections(csv_out), read_detections(coco_out)
    assert [d.image for d in b] == [d.image for d in a] == NAMES  # blank.png listed, no boxes
    for x, y in zip(a, b):
        np.testing.assert_allclose(y.boxes.reshape(-1, 4), x.boxes.reshape(-1, 4))
        np.testing.assert_allclose(y.scores, x.scores)
    pytest.importorskip("pycocotools")
    import json

    from pycocotools.coco import COCO

    doc = json.loads(coco_out.read_text())
    gt = COCO()
    gt.dataset = {"images": doc["images"], "annotations": [], "categories": doc["categories"]}
    gt.createIndex()
    res = gt.loadRes(doc["annotations"])  # a valid results list for pycocotools
    assert len(res.anns) == sum(len(d.scores) for d in a)


# ------------------------------------------------------------------ provenance

def test_every_detections_file_has_a_provenance_side_file(trained, folder, tmp_path):
    """DETECTIONS.provenance.json names the model (SHA-256 of its bytes and of its metadata
    string, both checked here with hashlib, FIPS 180-4), every scan setting, the versions, and
    the detections file it describes (its SHA-256 and image count); a COCO file carries the same
    record in its info (issue 16)."""
    import dataclasses
    import hashlib
    import json

    import numba

    from detector.scan import provenance_of, provenance_path

    model = trained / "model.npz"
    out = tmp_path / "daily.csv"
    result = invoke(model, folder, "--out", out, "--threshold", 0.3, "--stride", 3)
    assert result.exit_code == 0, result.output
    side = tmp_path / "daily.provenance.json"
    assert provenance_path(out) == side
    record = json.loads(side.read_text())
    assert record["format"] == "patchwood scan provenance" and record["version"] == 1
    assert record["model"]["sha256"] == hashlib.sha256(model.read_bytes()).hexdigest()
    stored = str(np.load(model, allow_pickle=False)["metadata"])
    assert record["model"]["metadata_sha256"] == hashlib.sha256(stored.encode()).hexdigest()
    assert record["model"]["file"] == str(model.resolve())
    assert record["settings"] == dataclasses.asdict(ScanSettings(threshold=0.3, stride=3.0))
    assert record["inputs"] == [str(folder)]
    assert record["libraries"]["numpy"] == np.__version__
    assert record["libraries"]["numba"] == numba.__version__
    assert record["libraries"]["opencv"] == cv2.__version__
    assert record["detections"] == {"file": "daily.csv", "images": 7,
                                    "sha256": hashlib.sha256(out.read_bytes()).hexdigest()}
    assert provenance_of(out) == (record, None)
    # the COCO file carries the same record under info (without its own hash)
    coco = tmp_path / "daily.json"
    assert invoke(model, folder, "--out", coco, "--format", "coco", "--threshold", 0.3,
                  "--stride", 3).exit_code == 0
    info = json.loads(coco.read_text())["info"]
    side_coco = json.loads((tmp_path / "daily.provenance.json").read_text())
    assert info == dict(side_coco, detections={"file": "daily.json", "images": 7})
    assert info["settings"] == record["settings"] and info["model"] == record["model"]
    # a side file written for other contents does not describe the file
    out.write_text(out.read_text() + "frame_0009.png,,,,,\n")
    found, why = provenance_of(out)
    assert found is None and "written for other contents" in why


def test_resume_refuses_an_output_made_another_way(trained, folder, tmp_path, monkeypatch,
                                                   capsys):
    """--resume continues only an output whose provenance names this model file and these
    settings; otherwise one line and exit 1, and the output is left as it was (issue 17, 6)."""
    from detector.model import save_model

    model = trained / "model.npz"
    other = tmp_path / "other.npz"
    changed = load_model(model)
    changed.metadata["note"] = "trained again"  # same trees, another file: another model
    save_model(other, changed)
    out = tmp_path / "d.csv"
    code, _, err = run_main(monkeypatch, capsys, model, folder, "--out", out, "--threshold", 0.3)
    assert code == 0, err
    before = out.read_bytes()
    cases = [
        ([other, folder, "--out", out, "--resume", "--threshold", 0.3],
         "--resume: the output was made with another model"),
        ([model, folder, "--out", out, "--resume"],
         "--resume: the output was made with other settings: threshold 0.5 (recorded 0.3)"),
        ([model, folder, "--out", out, "--resume", "--threshold", 0.3, "--exit-level", 0.5],
         "other settings: exit_level 0.5 (recorded None)"),
        ([model, folder, "--out", out, "--resume", "--threshold", 0.3, "--overhang", 0],
         "other settings: overhang 0.0 (recorded 0.25)"),
        ([model, folder, "--out", out, "--resume", "--threshold", 0.3, "--box-voting", 0],
         "other settings: box_voting None (recorded 0.5)"),
        ([model, folder, "--out", out, "--resume", "--threshold", 0.3, "--box-voting", 0.3],
         "other settings: box_voting 0.3 (recorded 0.5)"),
    ]
    for args, message in cases:
        code, _, err = run_main(monkeypatch, capsys, *args)
        assert code == 1 and err.count("\n") == 1, (args, err)
        assert err.startswith(f"error: {out}: ") and message in err, (args, err)
        assert out.read_bytes() == before
    # the same model and settings continue it
    code, stdout, err = run_main(monkeypatch, capsys, model, folder, "--out", out, "--resume",
                                 "--threshold", 0.3)
    assert code == 0, err
    assert "images scanned: 0 (+7 kept from the earlier run)" in stdout
    # an output changed since, or without a side file, cannot be checked: refused
    out.write_bytes(before + b"elsewhere.png,,,,,\n")
    code, _, err = run_main(monkeypatch, capsys, model, folder, "--out", out, "--resume",
                            "--threshold", 0.3)
    assert code == 1 and "the output changed after the scan that wrote d.provenance.json" in err
    (tmp_path / "d.provenance.json").unlink()
    code, _, err = run_main(monkeypatch, capsys, model, folder, "--out", out, "--resume",
                            "--threshold", 0.3)
    assert code == 1 and "no provenance side file (d.provenance.json)" in err


def test_box_voting_through_the_command(trained, folder, tmp_path):
    """`scan` votes by default (`--box-voting 0.5`): it writes the detections the engine gives
    with box_voting=0.5, the same rows and scores as `--box-voting 0` (off) with other boxes,
    records the setting in the provenance side file (None when off), and a side file written
    before the setting existed reads as without it."""
    import json

    from detector.io.labels import read_detections
    from detector.scan import provenance_of

    model = trained / "model.npz"
    plain, voted = tmp_path / "plain.csv", tmp_path / "voted.csv"
    assert invoke(model, folder, "--out", plain, "--threshold", 0.1, "--box-voting", 0).exit_code == 0
    result = invoke(model, folder, "--out", voted, "--threshold", 0.1)
    assert result.exit_code == 0, result.output
    a, b = read_detections(plain), read_detections(voted)
    assert [d.image for d in a] == [d.image for d in b]
    moved = 0
    engine = Engine(load_model(model), ScanSettings(threshold=0.1, box_voting=0.5))
    for da, db in zip(a, b):
        np.testing.assert_array_equal(da.scores, db.scores)
        moved += int(not np.array_equal(da.boxes, db.boxes))
        found = engine.scan(read_gray(folder / db.image))
        np.testing.assert_allclose(db.boxes, found.boxes, atol=5e-3)   # the file's decimals
    assert moved >= 1
    side = tmp_path / "voted.provenance.json"
    record = json.loads(side.read_text())
    assert record["settings"]["box_voting"] == 0.5
    assert json.loads((tmp_path / "plain.provenance.json").read_text())["settings"][
        "box_voting"] is None
    # a record from before the setting: read as without box voting
    old = json.loads((tmp_path / "plain.provenance.json").read_text())
    del old["settings"]["box_voting"]
    (tmp_path / "plain.provenance.json").write_text(json.dumps(old))
    found, why = provenance_of(plain)
    assert why is None and found["settings"]["box_voting"] is None


# ------------------------------------------------------------------ refusals

def test_existing_output_is_refused_without_force(trained, folder, tmp_path, monkeypatch, capsys):
    out = tmp_path / "detections.csv"
    out.write_text("my own notes\n")
    code, stdout, stderr = run_main(monkeypatch, capsys, trained / "model.npz", folder, "--out", out)
    assert code == 1
    assert stderr == f"error: {out}: output exists; add --force to replace it or --resume to continue it\n"
    assert out.read_text() == "my own notes\n"
    code, stdout, stderr = run_main(monkeypatch, capsys, trained / "model.npz", folder, "--out", out,
                                    "--force")
    assert code == 0, stderr
    assert [d.image for d in read_detections(out)] == NAMES


#: The colour of a detection in a frame drawn without labels (BGR; the project's palette).
DRAWN = bgr(BOX_STYLES["detection"][0])


def near(region, colour, tolerance=40) -> bool:
    """Some pixel of ``region`` within ``tolerance`` of ``colour`` (lines are anti-aliased)."""
    return bool((np.abs(region.astype(int) - np.array(colour)).sum(axis=-1) < tolerance).any())


def test_draw_writes_annotated_copies_and_never_into_the_inputs(trained, folder, reference, tmp_path):
    before = sorted(p.relative_to(folder) for p in folder.rglob("*"))
    inside = folder / "drawn"
    result = invoke(trained / "model.npz", folder, "--out", tmp_path / "refused.csv",
                    "--draw", inside)
    assert result.exit_code == 1
    assert isinstance(result.exception, InputError)
    assert "--draw folder lies inside an input folder" in str(result.exception)
    assert not inside.exists() and not (tmp_path / "refused.csv").exists()
    assert sorted(p.relative_to(folder) for p in folder.rglob("*")) == before

    drawn = tmp_path / "drawn"
    result = invoke(trained / "model.npz", folder, "--out", tmp_path / "d.csv", "--draw", drawn)
    assert result.exit_code == 0, result.output
    assert sorted(str(p.relative_to(drawn)) for p in drawn.rglob("*.png")) == NAMES
    assert "annotated images: 7" in result.stdout
    for name in NAMES:
        im = cv2.imread(str(drawn / name), cv2.IMREAD_UNCHANGED)
        assert im.shape[1:] == (320, 3) and im.shape[0] > 240   # the frame and the legend below
        boxes, scores = reference[name].boxes, reference[name].scores
        for x, y, w, h in boxes[scores >= 0.5]:  # drawn at the operating threshold (0.5 here)
            corner = im[int(round(y)) - 2:int(round(y)) + 3, int(round(x)) - 2:int(round(x)) + 3]
            assert near(corner, DRAWN), name
        # the legend strip below the frame carries the colour even when nothing was found
        assert near(im[240:, :24], DRAWN), name
    assert sorted(p.relative_to(folder) for p in folder.rglob("*")) == before


def test_existing_drawings_are_not_replaced_without_force(trained, folder, tmp_path):
    drawn = tmp_path / "drawn"
    (drawn / "day 2").mkdir(parents=True)
    (drawn / "day 2" / "frame_0003.png").write_bytes(b"someone's picture")
    result = invoke(trained / "model.npz", folder, "--out", tmp_path / "d.csv", "--draw", drawn)
    assert result.exit_code == 1
    assert isinstance(result.exception, InputError)
    assert "--force" in str(result.exception)
    assert (drawn / "day 2" / "frame_0003.png").read_bytes() == b"someone's picture"
    assert not (tmp_path / "d.csv").exists()


def test_draw_refuses_a_target_inside_the_folder_of_a_single_file(trained, folder, tmp_path,
                                                                  monkeypatch):
    """``images/frame_0001.png`` drawn into ``.`` would be ``./images/frame_0001.png``: the input."""
    monkeypatch.chdir(folder.parent)
    original = (folder / "frame_0001.png").read_bytes()
    with pytest.raises(InputError, match="would write images/frame_0001.png into an input folder"):
        scan_paths(trained / "model.npz", ["images/frame_0001.png"], tmp_path / "d.csv",
                   draw_dir=".", force=True)
    assert (folder / "frame_0001.png").read_bytes() == original


def test_drawings_of_same_named_images_stay_apart(trained, folder, tmp_path):
    two = tmp_path / "two"
    two.mkdir()
    gray = read_gray(folder / "frame_0001.png")
    cv2.imwrite(str(two / "x.png"), gray)
    cv2.imwrite(str(two / "x.jpg"), gray)
    summary = scan_paths(trained / "model.npz", [two], tmp_path / "d.csv", draw_dir=tmp_path / "drawn")
    assert summary.drawn == 2
    assert sorted(p.name for p in (tmp_path / "drawn").iterdir()) == ["x.jpg.png", "x.png"]


def test_two_inputs_giving_the_same_image_name_are_refused(trained, folder, tmp_path):
    other = tmp_path / "other"
    other.mkdir()
    shutil.copy(folder / "frame_0001.png", other / "frame_0001.png")
    with pytest.raises(InputError, match="frame_0001.png"):
        scan_paths(trained / "model.npz", [folder, other], tmp_path / "d.csv")
    assert not (tmp_path / "d.csv").exists()


# ------------------------------------------------------------------ bad files

def test_reading_ahead_gives_scan_ones_results_in_order(trained, folder, tmp_path, monkeypatch):
    """A single-worker run reads the next image while it scans this one: the results are
    scan_one's, image by image, failures in their place; at most one image is read ahead of the
    one being scanned, and a run that stops early stops reading."""
    from detector.io.images import list_images
    from detector.scan import _batch

    mixed = tmp_path / "mixed"
    shutil.copytree(folder, mixed)
    make_bad_files(mixed)
    todo = list_images([mixed])[0]
    engine = Engine(load_model(trained / "model.npz"), ScanSettings())
    want = [_batch.scan_one(engine, p, name) for p, name in todo]
    assert sum(r.error is not None for r in want) == 5

    reads, seen = [], []
    real_read = _batch.read_gray

    def counted_read(path):
        reads.append(path)
        return real_read(path)

    class Counting:
        def scan(self, gray):
            seen.append(len(reads))  # images read when this one's scan starts
            return engine.scan(gray)

    monkeypatch.setattr(_batch, "read_gray", counted_read)
    got = list(_batch.scan_reading_ahead(Counting(), todo))
    assert [r.image for r in got] == [name for _, name in todo]
    for g, w in zip(got, want):
        assert g.error == w.error
        np.testing.assert_array_equal(g.boxes, w.boxes)
        np.testing.assert_array_equal(g.scores, w.scores)
        assert (g.windows, g.trees) == (w.windows, w.trees)
    scanned = [k for k, r in enumerate(want) if r.error is None]
    assert len(seen) == len(scanned) and all(n <= k + 2 for n, k in zip(seen, scanned))
    assert len(reads) == len(todo)

    reads.clear()
    first = _batch.scan_reading_ahead(Counting(), todo)
    next(first)
    first.close()  # the run stops (an interrupt, say): the reader is waited for, nothing more
    assert len(reads) <= 2


def test_bad_files_are_listed_and_the_run_goes_on(trained, folder, reference, tmp_path,
                                                   monkeypatch, capsys):
    mixed = tmp_path / "mixed"
    shutil.copytree(folder, mixed)
    bad = make_bad_files(mixed)
    out = tmp_path / "detections.csv"
    code, stdout, stderr = run_main(monkeypatch, capsys, trained / "model.npz", mixed, "--out", out)
    assert code == 0, stderr
    assert "images scanned: 12\n" in stdout
    assert "failures: 5 (listed in " in stdout
    for name in bad:
        assert f"  {name}: cannot read image: " in stdout
    assert_matches_engine(read_detections(out), reference)  # the good images, all of them
    side = failures_path(out)
    assert side == tmp_path / "detections.failures.csv"
    lines = side.read_text().splitlines()
    assert lines[0] == "image,reason"
    assert [line.split(",")[0] for line in lines[1:]] == bad
    reasons = dict(csv.reader(lines[1:]))
    assert "truncated" in reasons["broken.png"]
    assert "empty" in reasons["empty.bmp"]
    assert "not a PNG, JPEG, BMP or TIFF" in reasons["fake.jpg"]
    assert "no such file" in reasons["gone.png"]
    assert reasons["huge.png"] == ("cannot read image: 20000 x 20000 pixels is more than the limit "
                                   "of 100,000,000 pixels (100 megapixels; set "
                                   "PATCHWOOD_MAX_MEGAPIXELS to raise it)")


def test_a_run_where_every_image_fails_exits_non_zero(trained, tmp_path, monkeypatch, capsys):
    only_bad = tmp_path / "only-bad"
    only_bad.mkdir()
    (only_bad / "frame_0001.png").write_bytes(b"\x89PNG\r\n\x1a\n" + b"\x00" * 10)
    (only_bad / "b.png").write_bytes(b"")
    code, stdout, stderr = run_main(monkeypatch, capsys, trained / "model.npz", only_bad,
                                    "--out", tmp_path / "d.csv")
    assert code == 1
    assert "failures: 2" in stdout


def test_a_stale_failures_file_goes_when_a_forced_rerun_has_none(trained, folder, tmp_path):
    mixed = tmp_path / "mixed"
    shutil.copytree(folder, mixed)
    make_bad_files(mixed)
    out = tmp_path / "d.csv"
    assert len(scan_paths(trained / "model.npz", [mixed], out).failures) == 5
    assert failures_path(out).exists()
    summary = scan_paths(trained / "model.npz", [folder], out, force=True)
    assert summary.failures == [] and summary.failures_file is None
    assert not failures_path(out).exists()


# ------------------------------------------------------------------ interrupted runs, workers

class Stop(KeyboardInterrupt):
    pass


def test_interrupted_run_resumes_into_the_uninterrupted_file(trained, folder, reference, tmp_path):
    model = trained / "model.npz"
    whole = tmp_path / "whole.csv"
    scan_paths(model, [folder], whole)
    out = tmp_path / "d.csv"
    seen = []

    def interrupt_after_five(result):
        seen.append(result.image)
        if len(seen) == 5:
            raise Stop()

    with pytest.raises(Stop):
        scan_paths(model, [folder], out, batch_images=2, on_image=interrupt_after_five)
    partial = read_detections(out)  # parses: a valid detections file
    assert_matches_engine(partial, reference, NAMES[:5])  # the images handled, each complete
    from detector.scan import provenance_of

    record, _ = provenance_of(out)  # its side file describes it as it is
    assert record is not None and record["detections"]["images"] == 5
    summary = scan_paths(model, [folder], out, resume=True)
    assert (summary.resumed, summary.images) == (5, 2)
    assert out.read_bytes() == whole.read_bytes()
    # the command line says what it kept
    result = invoke(model, folder, "--out", out, "--resume")
    assert result.exit_code == 0, result.output
    assert "images scanned: 0 (+7 kept from the earlier run)" in result.stdout
    assert out.read_bytes() == whole.read_bytes()


def test_jobs_and_cluster_write_the_same_bytes(trained, folder, tmp_path):
    mixed = tmp_path / "mixed"
    shutil.copytree(folder, mixed)
    make_bad_files(mixed)
    model = trained / "model.npz"
    outs = {}
    for label, options in (("one", []), ("jobs", ["--jobs", 2])):
        outs[label] = tmp_path / f"{label}.csv"
        result = invoke(model, mixed, "--out", outs[label], *options)
        assert result.exit_code == 0, result.output
    distributed = pytest.importorskip("distributed")
    # threads, not processes, in the test: quick to start and reliable under pytest-xdist; the
    # model and images still travel to the workers as bytes
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as cluster:
        outs["cluster"] = tmp_path / "cluster.csv"
        result = invoke(model, mixed, "--out", outs["cluster"], "--cluster", cluster.scheduler_address)
        assert result.exit_code == 0, result.output
    assert len(read_detections(outs["one"])) == 7
    for label in ("jobs", "cluster"):
        assert outs[label].read_bytes() == outs["one"].read_bytes(), label
        assert failures_path(outs[label]).read_bytes() == failures_path(outs["one"]).read_bytes()
