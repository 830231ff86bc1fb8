"""The robustness suite: every awkward input run through the real command line, in one place.

Every case ends in one of two ways, and this file checks which, with the exit status:

- a one-line error on stderr (``error: <file>[:<line>]: <what is wrong>``, no traceback) and exit
  status 1 for bad input, 2 for a bad option; no output file is written or replaced;
- or, for a folder scan, a counted skip: the run completes, the files it cannot read are counted,
  printed and listed in ``<out stem>.failures.csv``, and the exit status is 0 (1 only when no
  image at all could be read), as ``patchwood scan --help`` documents.

The cases (deeper unit tests of the same readers: tests/test_images.py, test_labels.py,
test_model.py, test_harvest.py, test_batch.py):

images      truncated, zero-byte and non-image files with image suffixes; 16-bit PNG and TIFF,
            RGBA, palette and EXIF-rotated images; an image above the size limit (and the
            PATCHWOOD_MAX_MEGAPIXELS variable); an image smaller than the window; folders and
            files with spaces and non-ASCII characters (harvest, train, scan, --draw, score);
            an unreadable image met in a mining round, after work has begun
labels      a byte order mark, CRLF line ends, NaN, duplicate rows
model/bank  truncated, empty, not an archive, unknown format version, wrong dtype, an index out
            of range, object arrays (refused without unpickling), a bank given as a model and
            the other way round, impossible metadata; a damaged detections file to --resume
outputs     an existing --out (or report/audit/inspect/tune/synth folder files) without --force,
            for every command that writes
options     bad option values exit 2
hostile     named pipes and /dev/zero among the images, a 1 GiB file, names that are not
            UTF-8, names that must survive --resume, a --min-object that would enlarge past the
            limit, outputs onto inputs (scan, train, harvest, score), two runs on one output, the
            failures side file, a bank declaring a million patches, a model with a 100000 x
            100000 window, temporary files of killed runs, a full disk, bad --cluster addresses,
            an unreadable folder, and the one atomic writer (a source check and its behaviour)
fuzzing     hypothesis: the label reader on arbitrary bytes, CSV-like text and COCO-like JSON;
            the model loader on damaged copies of a real model file, on replaced arrays and on
            hand-edited metadata (it loads, and the model scans a frame and summarises itself,
            or it gives one InputError naming the file); every reader (images, labels, COCO,
            detections, bank, model, from damaged bytes) loads or raises InputError within a
            memory limit

References: OpenCV (``cv2.imdecode`` with ``IMREAD_GRAYSCALE``, ``cv2.cvtColor``) for how 16-bit
and RGBA pixels become 8-bit gray; Pillow (scikit-image's imaging dependency:
``Image.convert("L")`` with ITU-R 601-2 luma, ``ImageOps.exif_transpose``) for palette images and
the EXIF orientation (EXIF 2.3, tag 0x0112); the PNG specification (ISO/IEC 15948) for a
hand-built header; ``numpy.load(allow_pickle=True)`` as the control that shows the object-array
tripwire does fire when something unpickles.
"""

from __future__ import annotations

import csv
import io
import json
import os
import re
import shutil
import struct
import subprocess
import sys
import time
import zipfile
import zlib
from pathlib import Path
from types import SimpleNamespace

import cv2
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from PIL import Image, ImageOps

import cli.main
from detector.io import npzfile
from detector.scan import failures_path
from detector.errors import InputError
from detector.evaluation import evaluate
from detector.harvest import harvest, load_bank, save_bank
from detector.io.images import image_size, read_gray
from detector.io.labels import LabelFile, read_detections, read_labels
from detector.model import Model, load_model, save_model
from detector.scan import Engine, ScanSettings
from detector.training import train_model
from synthetic_images import render_scenario

REPO = Path(__file__).resolve().parents[1]


# ---------------------------------------------------------------------------------------------
# running the command line


def patchwood(monkeypatch, capsys, *args):
    """``patchwood ARGS...`` through the console entry point: (exit status, stdout, stderr)."""
    monkeypatch.setattr(sys, "argv", ["patchwood", *[str(a) for a in args]])
    with pytest.raises(SystemExit) as exit_info:
        cli.main.run()
    captured = capsys.readouterr()
    code = exit_info.value.code
    return (0 if code is None else code), captured.out, captured.err


def one_line_error(err: str, *expected: str) -> str:
    """The single error line on stderr; it must hold every ``expected`` piece."""
    assert "Traceback" not in err, err
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, err
    line = lines[0]
    assert line.startswith("error: "), line
    for piece in expected:
        assert piece in line, (piece, line)
    return line


def fails(monkeypatch, capsys, code, *args):
    """Run a command that must stop with a one-line error and ``code``; return the line."""
    got, out, err = patchwood(monkeypatch, capsys, *args)
    assert got == code, (got, out, err)
    return one_line_error(err)


# ---------------------------------------------------------------------------------------------
# files


def _chunk(kind: bytes, data: bytes) -> bytes:
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))


def png_claiming(width: int, height: int) -> bytes:
    """A PNG (ISO/IEC 15948) whose IHDR claims ``width x height`` 8-bit gray pixels, with only one
    tiny row of data: it must be refused from its header, before anything is decoded."""
    ihdr = struct.pack(">IIBBBBB", width, height, 8, 0, 0, 0, 0)
    return (b"\x89PNG\r\n\x1a\n" + _chunk(b"IHDR", ihdr)
            + _chunk(b"IDAT", zlib.compress(b"\x00" * 5)) + _chunk(b"IEND", b""))


def encode(ext: str, img: np.ndarray) -> bytes:
    ok, buf = cv2.imencode(ext, img)
    assert ok
    return buf.tobytes()


def write_labels(path: Path, rows, bom=False, newline="\n") -> Path:
    """A labels CSV (the glossary's contract) from ``(image, x, y, width, height)`` rows."""
    text = newline.join(["image,x,y,width,height"]
                        + [",".join(str(v) for v in row) for row in rows]) + newline
    path.write_bytes((b"\xef\xbb\xbf" if bom else b"") + text.encode("utf-8"))
    return path


def label_rows(lf: LabelFile, image: str, name: str):
    """The rows of ``image`` in a label file, renamed ``name`` (object-free: one empty row)."""
    boxes = next(it.boxes for it in lf if it.image == image)
    if len(boxes) == 0:
        return [(name, "", "", "", "")]
    return [(name, *(f"{v:g}" for v in box)) for box in boxes]


class Tripwire:
    """Unpickling this touches a marker file: proof that something ran pickled code."""

    def __init__(self, marker: Path):
        self.marker = marker

    def __reduce__(self):
        return (Path.touch, (Path(self.marker),))


# ---------------------------------------------------------------------------------------------
# the session's scenario, model and awkward files


@pytest.fixture(scope="session")
def trained(tmp_path_factory):
    """A 12/4-frame scenario, a small bank (24x24) and a 10-tree model trained on it."""
    root = tmp_path_factory.mktemp("robustness")
    render_scenario(root / "scenario", train_images=12, test_images=4, seed=1)
    train = root / "scenario" / "train"
    labels = read_labels(train / "labels.csv", images_dir=train / "images")
    bank = harvest(train / "images", labels.items, window=(24, 24), copies=1,
                   negatives_per_image=30, seed=0)
    save_bank(root / "bank.npz", bank)
    model, _ = train_model(bank, dict(n_trees=10, pool=500, random_state=0))
    save_model(root / "model.npz", model)
    return SimpleNamespace(root=root, train=train, test=root / "scenario" / "test",
                           labels=labels, bank=root / "bank.npz", model=root / "model.npz")


@pytest.fixture(scope="session")
def awkward(trained, tmp_path_factory):
    """A folder with spaces and non-ASCII characters in its name, holding training frames in
    awkward encodings (each with the gray picture it must read as), a frame smaller than the
    window, and four files that cannot be read; plus ``originals/`` with the same pictures as
    plain 8-bit PNGs, and labels for both."""
    base = tmp_path_factory.mktemp("awkward")
    folder = base / "nüsse und muttern"
    originals = base / "originals"
    folder.mkdir()
    originals.mkdir()
    frames = sorted(p.name for p in (trained.train / "images").glob("*.png"))
    gray = {name: cv2.imread(str(trained.train / "images" / name), cv2.IMREAD_GRAYSCALE)
            for name in frames}
    # the frame shown sideways: one with a labelled box right of x = 240, which a reader that
    # ignored the orientation (a 240 x 320 picture) would have to clip
    turned_frame = next(it.image for it in trained.labels
                        if len(it.boxes) and (it.boxes[:, 0] + it.boxes[:, 2] > 241).any())
    plain_frames = [f for f in frames if f != turned_frame and
                    len(next(it.boxes for it in trained.labels if it.image == f))][:4]
    rng = np.random.default_rng(7)
    names = {}  # awkward name -> training frame

    # 16-bit PNG: the frame in the high byte, noise in the low byte (which must not matter)
    g = gray[plain_frames[0]]
    deep = (g.astype(np.uint16) << 8) | rng.integers(0, 256, g.shape, dtype=np.uint16)
    (folder / "bild 1 (16 bit).png").write_bytes(encode(".png", deep))
    names["bild 1 (16 bit).png"] = plain_frames[0]
    # RGBA: equal colour channels under a random alpha (alpha dropped, not blended)
    g = gray[plain_frames[1]]
    bgra = np.dstack([g, g, g, rng.integers(0, 256, g.shape, dtype=np.uint8)])
    (folder / "bild 2 – rgba.png").write_bytes(encode(".png", bgra))
    names["bild 2 – rgba.png"] = plain_frames[1]
    # palette PNG (colour type 3): entry j shows gray level perm[j]
    g = gray[plain_frames[2]]
    perm = rng.permutation(256).astype(np.uint8)
    index = np.argsort(perm).astype(np.uint8)[g]
    pal = Image.frombytes("P", (g.shape[1], g.shape[0]), index.tobytes())
    pal.putpalette(np.repeat(perm, 3).tobytes())
    pal.save(folder / "bild 3 palette.png")
    assert (folder / "bild 3 palette.png").read_bytes()[25] == 3  # IHDR colour type: palette
    names["bild 3 palette.png"] = plain_frames[2]
    # 16-bit TIFF
    g = gray[plain_frames[3]]
    (folder / "Mutter №4.tif").write_bytes(encode(".tif", g.astype(np.uint16) * 257))
    names["Mutter №4.tif"] = plain_frames[3]
    # EXIF-rotated JPEG: stored a quarter turn counter-clockwise, orientation 6 turns it back;
    # the same JPEG without the EXIF block shows the stored (sideways) picture
    stored = Image.fromarray(np.ascontiguousarray(np.rot90(gray[turned_frame], 1)))
    exif = Image.Exif()
    exif[0x0112] = 6
    stored.save(folder / "gedreht 5.jpg", quality=95, exif=exif.tobytes())
    stored.save(base / "sideways.jpg", quality=95)
    names["gedreht 5.jpg"] = turned_frame
    # smaller than the 24 x 24 window
    (folder / "winzig.png").write_bytes(encode(".png", np.full((12, 10), 90, np.uint8)))
    # files that cannot be read
    whole = (trained.train / "images" / frames[0]).read_bytes()
    bad = {"abgeschnitten.png": "the PNG data ends early (truncated file)",
           "leer.png": "the file is empty (0 bytes)",
           "notiz.jpg": "not a PNG, JPEG, BMP or TIFF file (unrecognised content)",
           "riesig.png": ("20000 x 20000 pixels is more than the limit of 100,000,000 pixels "
                          "(100 megapixels; set PATCHWOOD_MAX_MEGAPIXELS to raise it)")}
    (folder / "abgeschnitten.png").write_bytes(whole[: len(whole) // 2])
    (folder / "leer.png").write_bytes(b"")
    (folder / "notiz.jpg").write_text("Schichtbuch: Band 2 stand von 14 bis 15 Uhr\n")
    (folder / "riesig.png").write_bytes(png_claiming(20000, 20000))

    # what each awkward image must read as: the frame, by the reference libraries' reading
    expected = {}
    for name, frame in names.items():
        expected[name] = gray[frame]
        if name.endswith(".jpg"):  # lossy: Pillow's decoding, turned upright by Pillow
            shown = ImageOps.exif_transpose(Image.open(folder / name)).convert("L")
            expected[name] = np.asarray(shown)
        cv2.imwrite(str(originals / (Path(name).stem + ".png")), expected[name])
    expected["winzig.png"] = np.full((12, 10), 90, np.uint8)

    good = list(names) + ["winzig.png"]
    rows = [r for name in names for r in label_rows(trained.labels, names[name], name)]
    rows.append(("winzig.png", "", "", "", ""))
    labels = write_labels(base / "Beschriftung ü.csv", rows)
    original_rows = [(Path(r[0]).stem + ".png", *r[1:]) for r in rows if r[0] != "winzig.png"]
    return SimpleNamespace(base=base, folder=folder, originals=originals, names=names,
                           good=good, bad=bad, expected=expected, rows=rows, labels=labels,
                           original_labels=write_labels(base / "originals.csv", original_rows),
                           sideways=base / "sideways.jpg", turned_frame=turned_frame)


# ---------------------------------------------------------------------------------------------
# images


def test_awkward_encodings_read_as_the_reference_libraries_read_them(awkward):
    f = awkward.folder
    # 16-bit: value >> 8 (65535 -> 255, 256 -> 1, 255 -> 0), as cv2's IMREAD_GRAYSCALE converts
    for name in ("bild 1 (16 bit).png", "Mutter №4.tif"):
        reference = cv2.imdecode(np.fromfile(f / name, np.uint8), cv2.IMREAD_GRAYSCALE)
        np.testing.assert_array_equal(read_gray(f / name), reference)
    # RGBA: alpha dropped, luma by cv2.cvtColor (BT.601)
    bgra = cv2.imdecode(np.fromfile(f / "bild 2 – rgba.png", np.uint8), cv2.IMREAD_UNCHANGED)
    assert bgra.shape[2] == 4 and bgra[..., 3].min() == 0  # some pixels fully transparent
    np.testing.assert_array_equal(read_gray(f / "bild 2 – rgba.png"),
                                  cv2.cvtColor(bgra, cv2.COLOR_BGRA2GRAY))
    # palette: expanded through the palette, then luma (Pillow's convert("L"), ITU-R 601-2)
    np.testing.assert_array_equal(read_gray(f / "bild 3 palette.png"),
                                  np.asarray(Image.open(f / "bild 3 palette.png").convert("L")))
    # EXIF orientation 6: the upright picture, as Pillow's exif_transpose shows it; the stored
    # picture is the same JPEG data without the tag, turned a quarter turn clockwise
    upright = read_gray(f / "gedreht 5.jpg")
    np.testing.assert_array_equal(upright, awkward.expected["gedreht 5.jpg"])
    np.testing.assert_array_equal(upright, np.rot90(read_gray(awkward.sideways), -1))
    assert image_size(f / "gedreht 5.jpg") == (320, 240)
    for name in awkward.good:
        np.testing.assert_array_equal(read_gray(f / name), awkward.expected[name])


def test_folder_scan_counts_unreadable_files_and_scans_the_rest(trained, awkward, tmp_path,
                                                                monkeypatch, capsys):
    out = tmp_path / "Ergebnis ü" / "erkannt 1.csv"
    out.parent.mkdir()
    drawn = tmp_path / "Zeichnungen ü"
    code, stdout, stderr = patchwood(monkeypatch, capsys, "scan", trained.model, awkward.folder,
                                     "--out", out, "--draw", drawn)
    assert code == 0, stderr
    assert "Traceback" not in stderr
    assert f"images scanned: {len(awkward.good) + len(awkward.bad)}\n" in stdout
    assert f"failures: {len(awkward.bad)} (listed in " in stdout
    for name, reason in awkward.bad.items():
        assert f"  {name}: cannot read image: {reason}\n" in stdout
    with open(failures_path(out), newline="", encoding="utf-8") as fh:
        listed = list(csv.reader(fh))
    assert listed[0] == ["image", "reason"]
    assert {row[0]: row[1] for row in listed[1:]} == {
        name: f"cannot read image: {reason}" for name, reason in awkward.bad.items()}

    # every readable image is in the file, found as the engine finds it in the reference picture
    engine = Engine(load_model(trained.model), ScanSettings())
    found = {d.image: d for d in read_detections(out)}
    assert sorted(found) == sorted(awkward.good)
    total = 0
    for name in awkward.good:
        ref = engine.scan(awkward.expected[name])
        np.testing.assert_allclose(found[name].boxes, ref.boxes.reshape(-1, 4), atol=0.005 + 1e-9)
        np.testing.assert_allclose(found[name].scores, ref.scores, atol=5e-7 + 1e-12)
        total += len(ref.scores)
    assert total > 0  # the comparison has detections to compare
    assert len(found["winzig.png"].scores) == 0  # smaller than the window: scanned, nothing found

    # drawings under non-ASCII names: one per readable image, the picture's width, in colour
    for name in awkward.good:
        target = drawn / (name if name.endswith(".png") else name + ".png")
        picture = cv2.imdecode(np.fromfile(target, np.uint8), cv2.IMREAD_UNCHANGED)
        h, w = awkward.expected[name].shape   # the frame, and a legend strip below it
        assert picture.shape[1:] == (w, 3) and picture.shape[0] > h
    assert not any(p.name.startswith(tuple(awkward.bad)) for p in drawn.iterdir())


def test_a_scan_where_no_image_can_be_read_exits_1(trained, awkward, tmp_path, monkeypatch,
                                                   capsys):
    only_bad = tmp_path / "nur kaputt"
    only_bad.mkdir()
    for name in awkward.bad:
        shutil.copy(awkward.folder / name, only_bad / name)
    code, stdout, stderr = patchwood(monkeypatch, capsys, "scan", trained.model, only_bad,
                                     "--out", tmp_path / "d.csv")
    assert code == 1 and "Traceback" not in stderr
    assert f"failures: {len(awkward.bad)} (listed in " in stdout


def test_a_folder_without_images_is_a_one_line_error(trained, tmp_path, monkeypatch, capsys):
    empty = tmp_path / "no pictures"
    empty.mkdir()
    (empty / "notes.txt").write_text("nothing here\n")
    line = fails(monkeypatch, capsys, 1, "scan", trained.model, empty, "--out", tmp_path / "d.csv")
    assert line == (f"error: {empty}: no image files to scan (png, jpg, jpeg, bmp, tif, tiff); "
                    "1 other file skipped (notes.txt)")
    assert not (tmp_path / "d.csv").exists()


def test_size_limit_from_the_environment(trained, tmp_path, monkeypatch, capsys):
    folder = tmp_path / "frames"
    folder.mkdir()
    frame = trained.test / "images" / "frame_0001.png"
    shutil.copy(frame, folder / "big.png")  # 320 x 240 = 76,800 pixels
    (folder / "small.png").write_bytes(encode(".png", np.zeros((100, 200), np.uint8)))  # 20,000
    monkeypatch.setenv("PATCHWOOD_MAX_MEGAPIXELS", "0.05")  # 50,000 pixels
    out = tmp_path / "d.csv"
    code, stdout, _ = patchwood(monkeypatch, capsys, "scan", trained.model, folder, "--out", out)
    assert code == 0
    assert ("  big.png: cannot read image: 320 x 240 pixels is more than the limit of 50,000 "
            "pixels (0.05 megapixels; set PATCHWOOD_MAX_MEGAPIXELS to raise it)\n") in stdout
    assert [d.image for d in read_detections(out)] == ["small.png"]
    monkeypatch.setenv("PATCHWOOD_MAX_MEGAPIXELS", "0.08")  # raised: 80,000 pixels
    code, stdout, _ = patchwood(monkeypatch, capsys, "scan", trained.model, folder, "--out", out,
                                "--force")
    assert code == 0 and "failures: 0\n" in stdout
    for value in ("lots", "-1", "0", "nan"):
        monkeypatch.setenv("PATCHWOOD_MAX_MEGAPIXELS", value)
        line = fails(monkeypatch, capsys, 1, "scan", trained.model, folder, "--out",
                     tmp_path / "other.csv")
        assert line == ("error: the environment variable PATCHWOOD_MAX_MEGAPIXELS must be a "
                        f"number of megapixels > 0, got {value!r}")
        assert not (tmp_path / "other.csv").exists()


@pytest.mark.parametrize("name", ["abgeschnitten.png", "leer.png", "notiz.jpg", "riesig.png"])
def test_harvest_stops_at_a_labelled_image_it_cannot_read(awkward, tmp_path, monkeypatch,
                                                          capsys, name):
    rows = [("bild 1 (16 bit).png", 10, 10, 30, 30), (name, 10, 10, 30, 30)]
    labels = write_labels(tmp_path / "labels.csv", rows)
    line = fails(monkeypatch, capsys, 1, "harvest", awkward.folder, labels, "--out",
                 tmp_path / "bank.npz")
    assert str(awkward.folder / name) in line
    assert awkward.bad[name] in line
    assert not (tmp_path / "bank.npz").exists()


def test_harvest_with_every_image_smaller_than_the_window(awkward, tmp_path, monkeypatch, capsys):
    labels = write_labels(tmp_path / "labels.csv", [("winzig.png", 1, 1, 8, 8)])
    line = fails(monkeypatch, capsys, 1, "harvest", awkward.folder, labels, "--out",
                 tmp_path / "bank.npz", "--window", "24x24")
    assert line == (f"error: {labels}: window 24x24 is larger than every image (the largest is "
                    "10x12)")


def test_awkward_encodings_harvest_the_patches_of_plain_pngs(awkward, tmp_path, monkeypatch,
                                                             capsys):
    """16-bit, RGBA, palette, 16-bit TIFF and the EXIF-turned JPEG give the very patches that
    8-bit PNGs of their reference pictures give, boxes placed on the upright picture."""
    banks = {}
    for key, folder, labels in (("awkward", awkward.folder, awkward.labels),
                                ("plain", awkward.originals, awkward.original_labels)):
        banks[key] = tmp_path / f"{key}.npz"
        code, stdout, stderr = patchwood(monkeypatch, capsys, "harvest", folder, labels,
                                         "--out", banks[key], "--window", "24x24", "--copies", "2",
                                         "--seed", "3")
        assert code == 0, stderr
        assert "clipped" not in stdout  # no box reached outside its (upright) picture
    a, b = load_bank(banks["awkward"]), load_bank(banks["plain"])
    assert a.counts()["object"] == len([r for r in awkward.rows if r[1] != ""])
    np.testing.assert_array_equal(a.patches[: len(b.patches)], b.patches)
    np.testing.assert_array_equal(a.boxes[: len(b.boxes)], b.boxes)
    # the tiny frame comes last in the awkward labels: it adds nothing (no box, no background)
    assert len(a.patches) == len(b.patches)
    # the turned JPEG's boxes reach right of x = 240: only the upright picture holds them
    lf = read_labels(awkward.labels, images_dir=awkward.folder)
    turned = next(it for it in lf if it.image == "gedreht 5.jpg")
    assert (turned.boxes[:, 0] + turned.boxes[:, 2] > 241).any() and lf.clipped == 0
    assert lf.image_sizes["gedreht 5.jpg"] == (320, 240)


def test_whole_workflow_in_folders_with_spaces_and_non_ascii_names(awkward, tmp_path,
                                                                   monkeypatch, capsys):
    """harvest -> train -> scan (with --draw) -> score, every path with spaces and umlauts, the
    labels file with a byte order mark, CRLF line ends and a duplicated row."""
    work = tmp_path / "Ergebnisse für Band 2"
    work.mkdir()
    rows = awkward.rows[:1] + awkward.rows  # the first row twice
    labels = write_labels(work / "Beschriftung ü.csv", rows, bom=True, newline="\r\n")
    bank, model = work / "Bank 1.npz", work / "Modell 1.npz"
    detections, report = work / "erkannt ü.csv", work / "Bericht ü"

    code, out, err = patchwood(monkeypatch, capsys, "harvest", awkward.folder, labels,
                               "--out", bank, "--window", "24x24", "--copies", "1",
                               "--negatives-per-image", "20")
    assert code == 0, err
    assert "(0 boxes clipped to their image, 1 duplicate row dropped)" in out
    assert "note: 1 image is smaller than the window; it gave no background patches" in out
    assert load_bank(bank).counts()["object"] == len([r for r in awkward.rows if r[1] != ""])

    code, out, err = patchwood(monkeypatch, capsys, "train", bank, "--out", model,
                               "--trees", "5", "--pool", "300")
    assert code == 0, err
    assert load_model(model).n_trees == 5

    code, out, err = patchwood(monkeypatch, capsys, "scan", model, awkward.folder,
                               "--out", detections, "--draw", work / "Zeichnungen")
    assert code == 0, err
    assert f"annotated images: {len(awkward.good)} in " in out

    code, out, err = patchwood(monkeypatch, capsys, "score", detections, labels,
                               "--out", report, "--images", awkward.folder)
    assert code == 0, err
    summary = json.loads((report / "summary.json").read_text(encoding="utf-8"))
    assert (report / "report.html").is_file()
    # the figures are those of evaluate() on the same files read back
    found = {d.image: (d.boxes, d.scores) for d in read_detections(detections)}
    truth = {it.image: it.boxes for it in read_labels(labels)}
    direct = evaluate(found, truth, iou_threshold=0.5)
    assert summary["average_precision"] == pytest.approx(direct.to_dict()["average_precision"])


def test_mining_stops_at_an_image_it_cannot_read(trained, tmp_path, monkeypatch, capsys):
    """An unreadable image met after work has begun (a mining round): the progress already
    shown stays, then one error line; no model file."""
    images = tmp_path / "mining images"
    shutil.copytree(trained.train / "images", images)
    data = (images / "frame_0003.png").read_bytes()
    (images / "frame_0003.png").write_bytes(data[: len(data) // 2])
    code, out, err = patchwood(monkeypatch, capsys, "train", trained.bank, "--out",
                               tmp_path / "model.npz", "--trees", "3", "--pool", "100",
                               "--mine-rounds", "1", "--mine-images", images,
                               "--mine-labels", trained.train / "labels.csv")
    assert code == 1 and "Traceback" not in err
    lines = err.splitlines()
    assert [line for line in lines if line.startswith("error: ")] == [lines[-1]]
    assert lines[-1] == (f"error: {images / 'frame_0003.png'}: cannot read image: the PNG data "
                         "ends early (truncated file)")
    assert not (tmp_path / "model.npz").exists()


def test_resuming_from_a_damaged_detections_file(trained, tmp_path, monkeypatch, capsys):
    out = tmp_path / "detections.csv"
    out.write_text("image,x,y,width,height,score\nframe_0001.png,1,2,3\n")
    line = fails(monkeypatch, capsys, 1, "scan", trained.model, trained.test / "images",
                 "--out", out, "--resume")
    assert line == f"error: {out}:2: 4 fields, but the header on line 1 has 6"
    assert out.read_text() == "image,x,y,width,height,score\nframe_0001.png,1,2,3\n"


# ---------------------------------------------------------------------------------------------
# labels


def test_labels_with_bom_and_crlf_keep_their_line_numbers(awkward, tmp_path, monkeypatch, capsys):
    rows = [awkward.rows[0], ("bild 1 (16 bit).png", "NaN", 10, 30, 30)]
    labels = write_labels(tmp_path / "labels.csv", rows, bom=True, newline="\r\n")
    line = fails(monkeypatch, capsys, 1, "harvest", awkward.folder, labels,
                 "--out", tmp_path / "bank.npz")
    assert line == f"error: {labels}:3: x must be a finite number, found 'NaN'"


@pytest.mark.parametrize("field, value, message", [
    ("y", "nan", "y must be a finite number, found 'nan'"),
    ("width", "inf", "width must be a finite number, found 'inf'"),
    ("height", "-3", "height must be > 0, found -3"),
    ("x", "12,5", "7 fields, but the header on line 1 has 6"),
])
def test_bad_label_rows_through_score(tmp_path, monkeypatch, capsys, field, value, message):
    box = {"x": "10", "y": "10", "width": "20", "height": "20"}
    box[field] = f'"{value}"' if "," not in value else value
    labels = tmp_path / "labels ü.csv"
    labels.write_text("image,x,y,width,height,label\n"
                      "a.png,1,1,20,20,nut\n"
                      f"a.png,{box['x']},{box['y']},{box['width']},{box['height']},nut\n",
                      encoding="utf-8")
    detections = tmp_path / "detections.csv"
    detections.write_text("image,x,y,width,height,score\na.png,1,1,20,20,0.9\n")
    line = fails(monkeypatch, capsys, 1, "score", detections, labels, "--out", tmp_path / "r")
    assert line == f"error: {labels}:3: {message}"
    assert not (tmp_path / "r").exists()


def test_bad_detection_rows_through_score(tmp_path, monkeypatch, capsys):
    labels = tmp_path / "labels.csv"
    labels.write_text("image,x,y,width,height\na.png,1,1,20,20\n")
    detections = tmp_path / "detections.csv"
    detections.write_bytes(b"\xef\xbb\xbfimage,x,y,width,height,score\r\n"
                           b"a.png,1,1,20,20,0.9\r\na.png,1,1,20,20,NaN\r\n")
    line = fails(monkeypatch, capsys, 1, "score", detections, labels, "--out", tmp_path / "r")
    assert line == f"error: {detections}:3: score must be a number in 0..1, found NaN"


def test_duplicate_rows_are_dropped_and_counted(awkward, tmp_path, monkeypatch, capsys):
    rows = [awkward.rows[0], awkward.rows[0], awkward.rows[0]]
    labels = write_labels(tmp_path / "labels.csv", rows)
    code, out, err = patchwood(monkeypatch, capsys, "harvest", awkward.folder, labels, "--out",
                               tmp_path / "bank.npz", "--window", "24x24", "--copies", "0")
    assert code == 0, err
    assert "labels: 1 image, 1 box from " in out and "2 duplicate rows dropped" in out
    assert load_bank(tmp_path / "bank.npz").counts()["object"] == 1


# ---------------------------------------------------------------------------------------------
# model and bank files


def _replaced(src: Path, dst: Path, **arrays) -> Path:
    a = npzfile.read_npz(src)
    for name, change in arrays.items():
        a[name] = change(a[name].copy())
    npzfile.save_npz(dst, a)
    return dst


def _set_first(value):
    def change(arr):
        arr.flat[0] = value
        return arr
    return change


def _damaged(kind: str, trained, folder: Path, marker: Path) -> tuple[Path, str]:
    """A damaged model (or bank) file and a piece of the message it must give."""
    model = kind.startswith("model")
    src = trained.model if model else trained.bank
    what = "model" if model else "patch bank"
    case = kind.split(":")[1]
    path = folder / f"{kind.replace(':', '-')}.npz"
    data = src.read_bytes()
    if case == "truncated":
        path.write_bytes(data[: len(data) // 2])
        return path, f"not a {what} file (not an .npz archive, or truncated)"
    if case == "empty":
        path.write_bytes(b"")
        return path, f"not a {what} file: the file is empty (0 bytes)"
    if case == "not-an-archive":
        path.write_text("image,x,y,width,height\n")
        return path, f"not a {what} file (not an .npz archive, or truncated)"
    if case == "version":
        _replaced(src, path, format_version=lambda v: np.array(99, np.int64))
        reads = "1, 2, 3, 4 and 5; train the model again" if model else "1)"
        return path, f"unsupported {what} format version 99 (this patchwood reads {reads}"
    if case == "dtype":
        name, want = ("node_features", "int32") if model else ("patches", "uint8")
        _replaced(src, path, **{name: lambda v: v.astype(np.float32)})
        return path, f"{what} array '{name}' has dtype float32; expected {want}"
    if case == "index":
        name = "node_features" if model else "image_index"
        _replaced(src, path, **{name: _set_first(999)})
        return path, "out of range"
    if case == "object-array":
        arrays = dict(np.load(src, allow_pickle=False))
        arrays["metadata"] = np.array([Tripwire(marker)], dtype=object)
        np.savez(path, **arrays)  # numpy pickles the object array into the archive
        return path, (f"refused {what} file: array 'metadata' holds Python objects (patchwood "
                      "never unpickles)")
    if case == "other-kind":
        shutil.copy(trained.bank if model else trained.model, path)
        return path, "this is a patch bank, not a model" if model else "not a patch bank"
    if case == "margin" and model:  # a typed array since format 3
        _replaced(src, path, margin=lambda v: np.array(-0.5))
        return path, "model array 'margin' must be a number >= 0, got -0.5"
    if case == "margin":
        a = npzfile.read_npz(src)
        metadata = json.loads(str(a["metadata"]))
        metadata["margin"] = "wide"
        a["metadata"] = np.array(json.dumps(metadata))
        npzfile.save_npz(path, a)
        return path, "metadata margin must be a number >= 0, got 'wide'"
    raise AssertionError(kind)


CASES = ["truncated", "empty", "not-an-archive", "version", "dtype", "index", "object-array",
         "other-kind", "margin"]


@pytest.mark.parametrize("case", CASES)
def test_damaged_model_files_give_one_line(trained, tmp_path, monkeypatch, capsys, case):
    marker = tmp_path / "unpickled"
    path, message = _damaged(f"model:{case}", trained, tmp_path, marker)
    before = path.read_bytes()
    test_images = trained.test / "images"
    for args in (["scan", path, test_images, "--out", tmp_path / "d.csv"],
                 ["inspect", path, "--out", tmp_path / "pictures"]):
        line = fails(monkeypatch, capsys, 1, *args)
        assert line.startswith(f"error: {path}: ") and message in line, line
    assert not (tmp_path / "d.csv").exists() and not (tmp_path / "pictures").exists()
    assert path.read_bytes() == before
    assert not marker.exists()  # nothing was unpickled
    if case == "object-array":  # the control: numpy's own reader with pickle allowed does run it
        np.load(path, allow_pickle=True)["metadata"]
        assert marker.exists()


@pytest.mark.parametrize("case", CASES)
def test_damaged_bank_files_give_one_line(trained, tmp_path, monkeypatch, capsys, case):
    marker = tmp_path / "unpickled"
    path, message = _damaged(f"bank:{case}", trained, tmp_path, marker)
    for args in (["train", path, "--out", tmp_path / "m.npz", "--trees", "2"],
                 ["audit", "--bank", path, "--out", tmp_path / "audit", "--trees", "2"],
                 ["inspect", trained.model, "--bank", path, "--out", tmp_path / "pictures"]):
        line = fails(monkeypatch, capsys, 1, *args)
        assert line.startswith(f"error: {path}: ") and message in line, line
    assert sorted(p.name for p in tmp_path.iterdir()) == [path.name]  # nothing written, no marker


def test_console_script_in_a_real_process(trained, tmp_path):
    """One run in a separate process, as a user types it, under the plain C locale: the exit
    status and the one stderr line (with its non-ASCII path) as promised. (harvest, because it
    starts fastest: it does not import scikit-learn.)"""
    folder = tmp_path / "nüsse und muttern"
    folder.mkdir()
    labels = write_labels(folder / "Beschriftung ü.csv",
                          [("frame_0001.png", 1, 1, 20, 20), ("frame_0002.png", "NaN", 1, 20, 20)],
                          bom=True, newline="\r\n")
    env = dict(os.environ, LC_ALL="C")
    command = [sys.executable, "-m", "cli.main", "harvest", str(trained.train / "images"),
               str(labels), "--out", str(folder / "bank.npz")]
    done = subprocess.run(command, cwd=REPO, capture_output=True, timeout=120, env=env)
    assert done.returncode == 1
    assert done.stderr.decode("utf-8") == (f"error: {labels}:3: x must be a finite number, "
                                           "found 'NaN'\n")
    assert done.stdout == b""
    assert sorted(p.name for p in folder.iterdir()) == ["Beschriftung ü.csv"]


# ---------------------------------------------------------------------------------------------
# outputs that exist already


def _existing_output_cases(trained, tmp_path):
    """(command line, file that exists already) for every command that writes."""
    t, imgs, labels = trained.train, trained.train / "images", trained.train / "labels.csv"
    folder = tmp_path / "out folder"
    folder.mkdir()
    target = tmp_path / "vorhanden.npz"
    return {
        "harvest": (["harvest", imgs, labels, "--out", target], target),
        "train": (["train", trained.bank, "--out", target], target),
        "train --save-bank": (["train", trained.bank, "--out", tmp_path / "new.npz",
                               "--save-bank", target], target),
        "scan": (["scan", trained.model, trained.test / "images", "--out", target], target),
        "scan --format coco": (["scan", trained.model, trained.test / "images", "--out", target,
                                "--format", "coco"], target),
        "score": (["score", _detections(trained, tmp_path), t / "labels.csv", "--out", folder],
                  folder / "report.html"),
        "synth": (["synth", folder, "--frames", "2"], folder / "train" / "labels.csv"),
        "tune": (["tune", imgs, labels, "--out", folder, "--trials", "1"],
                 folder / "trials.csv"),
        "audit": (["audit", imgs, labels, "--out", folder], folder / "suspicious-labels.csv"),
        "inspect": (["inspect", trained.model, "--out", folder], folder / "heat-map.png"),
    }


def _detections(trained, tmp_path) -> Path:
    path = tmp_path / "detections.csv"
    path.write_text("image,x,y,width,height,score\nframe_0001.png,1,1,20,20,0.9\n")
    return path


EXISTING = ["harvest", "train", "train --save-bank", "scan", "scan --format coco", "score",
            "synth", "tune", "audit", "inspect"]


@pytest.mark.parametrize("command", EXISTING)
def test_an_existing_output_is_never_replaced_without_force(trained, tmp_path, monkeypatch,
                                                            capsys, command):
    args, existing = _existing_output_cases(trained, tmp_path)[command]
    existing.parent.mkdir(parents=True, exist_ok=True)
    existing.write_bytes(b"results of last week, keep them\n")
    before = sorted(p.relative_to(tmp_path) for p in tmp_path.rglob("*"))
    line = fails(monkeypatch, capsys, 1, *args)
    assert "--force" in line and (str(existing) in line or str(existing.parent) in line), line
    assert existing.read_bytes() == b"results of last week, keep them\n"
    assert sorted(p.relative_to(tmp_path) for p in tmp_path.rglob("*")) == before  # nothing new


@pytest.mark.parametrize("command", ["harvest", "train", "scan", "score", "synth", "tune",
                                     "audit", "inspect"])
def test_an_output_that_is_in_the_way_is_a_one_line_error(trained, tmp_path, monkeypatch,
                                                          capsys, command):
    """A file where a folder goes (score, synth, tune, audit, inspect) or a folder where a file
    goes (harvest, train, scan)."""
    args = _existing_output_cases(trained, tmp_path)[command][0]
    wants_folder = command in ("score", "synth", "tune", "audit", "inspect")
    in_the_way = tmp_path / ("a file" if wants_folder else "a folder")
    if wants_folder:
        in_the_way.write_text("not a folder\n")
    else:
        in_the_way.mkdir()
    option = {"synth": None}.get(command, "--out")
    args = list(args)
    if option is None:
        args[1] = in_the_way
    else:
        args[args.index(option) + 1] = in_the_way
    line = fails(monkeypatch, capsys, 1, *args)
    assert str(in_the_way) in line
    if wants_folder:
        assert in_the_way.read_text() == "not a folder\n"
    else:
        assert list(in_the_way.iterdir()) == []


# ---------------------------------------------------------------------------------------------
# options


@pytest.mark.parametrize("args", [
    ["scan", "M.npz", "x.png", "--out", "d.csv", "--format", "xml"],
    ["scan", "M.npz", "x.png", "--out", "d.csv", "--threshold", "1.5"],
    ["harvest", "images", "labels.csv", "--out", "b.npz", "--window", "0x24"],
    ["train", "b.npz", "--out", "m.npz", "--mode", "stacked"],
    ["synth", "out", "--size", "5x5"],
    ["score", "d.csv", "labels.csv", "--out", "r", "--iou", "0"],
    ["tune", "images", "labels.csv", "--trees", "300..20"],
    ["audit", "images"],
    ["inspect", "m.npz", "--top-features", "0"],
    ["scan", "M.npz"],
])
def test_bad_options_exit_2_with_one_line(tmp_path, monkeypatch, capsys, args):
    monkeypatch.chdir(tmp_path)
    line = fails(monkeypatch, capsys, 2, *args)
    assert line.endswith(f" {args[0]} --help')"), line  # "(see 'patchwood scan --help')"
    assert list(tmp_path.iterdir()) == []


# ---------------------------------------------------------------------------------------------
# fuzzing


@pytest.fixture(scope="module")
def fuzz_folder(tmp_path_factory):
    folder = tmp_path_factory.mktemp("fuzz images")
    (folder / "a.png").write_bytes(encode(".png", np.zeros((40, 60), np.uint8)))
    (folder / "b c.png").write_bytes(b"")
    return folder


def _read_all_ways(path: Path, images: Path):
    """Every reader of label-like files; each returns or raises one InputError naming ``path``."""
    for call in (lambda: read_labels(path), lambda: read_labels(path, images_dir=images),
                 lambda: read_labels(path, label="nut"), lambda: read_detections(path)):
        try:
            result = call()
        except InputError as err:
            text = str(err)
            assert text.startswith(f"{path}:"), text
            assert "\n" not in text
        else:
            assert isinstance(result, (LabelFile, list))


FIELD = st.one_of(
    st.sampled_from(["", "a.png", "b c.png", "../a.png", "/etc/a.png", "nut", "NaN", "inf",
                     "-1", "0", "1e999", "12.5", " 7 ", '"3,4"', '"', "\x00", "ü.png", "a.png\t",
                     "C:\\a.png", "1_0", "٣"]),
    st.text(max_size=8),
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
)


@st.composite
def csv_like(draw):
    """Text that looks like a labels or detections CSV: a header of known and unknown column
    names, rows of tricky fields, any line end, maybe a byte order mark."""
    columns = draw(st.lists(st.sampled_from(["image", "x", "y", "width", "height", "label",
                                             "score", "Image", "extra", ""]),
                            min_size=0, max_size=8))
    if draw(st.booleans()):
        columns = ["image", "x", "y", "width", "height"] + columns[:2]
    rows = draw(st.lists(st.lists(FIELD, min_size=0, max_size=9), max_size=6))
    end = draw(st.sampled_from(["\n", "\r\n", "\r"]))
    text = end.join(",".join(row) for row in [columns] + rows) + draw(st.sampled_from(["", end]))
    data = text.encode("utf-8", "surrogatepass")
    return (b"\xef\xbb\xbf" if draw(st.booleans()) else b"") + data


@settings(max_examples=60, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.one_of(st.binary(max_size=400), csv_like()),
       suffix=st.sampled_from([".csv", ".json", ".txt"]))
def test_fuzz_label_reader(tmp_path, fuzz_folder, data, suffix):
    path = tmp_path / f"labels fuzz{suffix}"
    path.write_bytes(data)
    _read_all_ways(path, fuzz_folder)


@st.composite
def coco_like(draw):
    """JSON documents shaped roughly like COCO files, with wrong types in random places."""
    value = st.one_of(st.none(), st.booleans(), st.integers(-5, 10**20), st.text(max_size=6),
                      st.floats(allow_nan=False), st.just([1, 2, 3, 4]), st.just([1, 2, -3, 4]))
    images = draw(st.lists(st.fixed_dictionaries(
        {"id": st.one_of(st.integers(0, 3), value), "file_name": st.one_of(
            st.sampled_from(["a.png", "b c.png", "../x.png"]), value)},
        optional={"width": value, "height": value}), max_size=3))
    annotations = draw(st.lists(st.fixed_dictionaries(
        {"image_id": st.one_of(st.integers(0, 3), value),
         "bbox": st.one_of(st.lists(st.floats(-10, 100), min_size=4, max_size=4), value)},
        optional={"category_id": value, "score": value, "iscrowd": value}), max_size=4))
    doc = {"images": images, "annotations": annotations,
           "categories": [{"id": 1, "name": "nut"}]}
    if draw(st.booleans()):
        doc.pop(draw(st.sampled_from(sorted(doc))))
    return json.dumps(doc).encode()


@settings(max_examples=40, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=coco_like())
def test_fuzz_label_reader_coco(tmp_path, fuzz_folder, data):
    path = tmp_path / "labels fuzz.json"
    path.write_bytes(data)
    _read_all_ways(path, fuzz_folder)


@pytest.fixture(scope="module")
def model_members(tmp_path_factory):
    """The members of a small real model file (a 3-tree boosted forest on random patches)."""
    from detector.classifier import PatchClassifier

    rng = np.random.default_rng(0)
    patches = rng.integers(0, 256, (80, 12, 12), dtype=np.uint8)
    patches[:40, 3:9, 3:9] //= 3  # darker centres: the objects
    y = np.r_[np.ones(40, int), np.zeros(40, int)]
    clf = PatchClassifier(n_trees=3, depth=2, pool=200, mode="boosted", random_state=0)
    model = clf.fit(patches, y).model_
    model.margin = 0.1
    path = tmp_path_factory.mktemp("fuzz model") / "model.npz"
    save_model(path, model)
    with zipfile.ZipFile(path) as zf:
        members = {info.filename: zf.read(info) for info in zf.infolist()}
    return path.read_bytes(), members


FRAME = np.random.default_rng(1).integers(0, 256, (40, 52), dtype=np.uint8)


def _load_and_scan(path: Path):
    """Either InputError naming the file, or a model that scans a small frame into boxes inside
    it with scores in 0..1."""
    try:
        model = load_model(path)
    except InputError as err:
        assert str(err).startswith(f"{path}: ") and "\n" not in str(err), str(err)
        return None
    assert isinstance(model, Model)
    for settings_ in (ScanSettings(threshold=0.0), ScanSettings(min_object=10, early_exit=False)):
        found = Engine(model, settings_).scan(FRAME)
        assert np.isfinite(found.boxes).all() and (found.boxes[:, 2:] > 0).all()
        assert ((found.scores >= 0) & (found.scores <= 1)).all()
    model.summary()
    return model


@settings(max_examples=60, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_fuzz_model_loader_on_damaged_files(tmp_path, model_members, data):
    """Byte damage to the whole file (flip, cut, insert), and damage inside one ``.npy`` member
    behind an intact zip (where flips to the file alone would rarely reach: CRC checks)."""
    whole, members = model_members
    path = tmp_path / "fuzzed model.npz"
    how = data.draw(st.sampled_from(["flip", "cut", "insert", "member"]))
    if how == "member":
        name = data.draw(st.sampled_from(sorted(members)))
        payload = bytearray(members[name])
        for _ in range(data.draw(st.integers(1, 6))):
            at = data.draw(st.integers(0, len(payload) - 1))
            payload[at] = data.draw(st.integers(0, 255))
        buf = io.BytesIO()
        with zipfile.ZipFile(buf, "w") as zf:
            for n, p in members.items():
                zf.writestr(n, bytes(payload) if n == name else p)
        raw = buf.getvalue()
    else:
        raw = bytearray(whole)
        if how == "flip":
            for _ in range(data.draw(st.integers(1, 8))):
                raw[data.draw(st.integers(0, len(raw) - 1))] = data.draw(st.integers(0, 255))
        elif how == "cut":
            raw = raw[: data.draw(st.integers(0, len(raw) - 1))]
        else:
            at = data.draw(st.integers(0, len(raw)))
            raw[at:at] = data.draw(st.binary(min_size=1, max_size=64))
        raw = bytes(raw)
    path.write_bytes(raw)
    _load_and_scan(path)


ARRAY_NAMES = ["window", "features", "node_features", "node_thresholds", "leaf_values",
               "exit_thresholds", "format_version", "normalize", "mode", "metadata", "margin",
               "score_temperature", "exit_min_sigma"]


@st.composite
def replacement(draw):
    """A plausible-looking array: a real dtype, a small shape, extreme values included."""
    dtype = draw(st.sampled_from(["int32", "int64", "float32", "float64", "bool", "uint8",
                                  "<U8", ">i4", ">f4"]))
    shape = tuple(draw(st.lists(st.integers(0, 5), max_size=3)))
    kind = np.dtype(dtype).kind
    if kind == "U":
        values = st.sampled_from(["", "bagged", "boosted", "model", "{}", '{"margin": -1}',
                                  '{"score_temperature": 0}', "[]", "nan"])
    elif kind == "b":
        values = st.booleans()
    elif kind == "f":
        values = st.floats(width=32 if np.dtype(dtype).itemsize == 4 else 64)
    else:
        info = np.iinfo(dtype)
        values = st.one_of(st.integers(max(-2, info.min), 30),
                           st.integers(int(info.min), int(info.max)))
    flat = draw(st.lists(values, min_size=int(np.prod(shape)), max_size=int(np.prod(shape))))
    return np.array(flat, dtype=dtype).reshape(shape)


@settings(max_examples=60, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(name=st.sampled_from(ARRAY_NAMES), value=replacement(), also=st.booleans(),
       tweak=st.sampled_from(["set", "scale"]))
def test_fuzz_model_loader_on_replaced_arrays(tmp_path, model_members, name, value, also, tweak):
    """One array replaced by an arbitrary one (or a real array with one value changed): the
    loader refuses it in one line, or the model it accepts scans without error."""
    whole, _ = model_members
    src = tmp_path / "valid.npz"
    src.write_bytes(whole)
    arrays = npzfile.read_npz(src)
    if also and arrays[name].size and arrays[name].dtype.kind in "iuf" and value.size:
        changed = arrays[name].copy()  # keep dtype and shape, change one value
        new = value.ravel()[0] if tweak == "set" else changed.flat[0].item() * 1000
        try:
            with np.errstate(over="ignore", invalid="ignore"):
                changed.flat[0] = new
        except (OverflowError, ValueError, TypeError):
            pass
        arrays[name] = changed
    else:
        arrays[name] = value
    path = tmp_path / "replaced.npz"
    npzfile.save_npz(path, arrays)
    _load_and_scan(path)


METADATA_KEYS = ["margin", "score_temperature", "calibration", "parameters", "bank", "oob_error",
                 "date", "pool_drawn", "mining", "versions", "bank_sha256", "features_per_node"]
JSON_VALUES = st.recursive(
    st.none() | st.booleans() | st.integers(-10**20, 10**20)
    | st.floats(allow_nan=False, allow_infinity=False) | st.text(max_size=5),
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(
        st.sampled_from(METADATA_KEYS + ["sha256", "counts", "exit_recall", "objects",
                                         "mean_trees_objects", "mean_trees_background", "pool"]),
        inner, max_size=3),
    max_leaves=8)


@settings(max_examples=40, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(changes=st.dictionaries(st.sampled_from(METADATA_KEYS), JSON_VALUES, min_size=1,
                               max_size=3))
def test_fuzz_model_loader_on_odd_metadata(tmp_path, model_members, changes):
    """A hand-edited metadata record is only shown, by the summary and by `patchwood inspect`,
    whatever its type: the values the scan computes with are typed arrays (format 3), so the
    model always loads and scans."""
    from detector.reporting.inspection import model_report, report_lines

    whole, _ = model_members
    src = tmp_path / "valid.npz"
    src.write_bytes(whole)
    arrays = npzfile.read_npz(src)
    metadata = json.loads(str(arrays["metadata"]))
    metadata.update(changes)
    arrays["metadata"] = np.array(json.dumps(metadata))
    path = tmp_path / "edited.npz"
    npzfile.save_npz(path, arrays)
    model = _load_and_scan(path)
    assert model is not None and report_lines(model_report(model))


# ---------------------------------------------------------------------------------------------
# hostile and faulty inputs: no hang, no unbounded read, no lost file


def _run_cli(*args, timeout=180, env=None, prelude=""):
    """``patchwood ARGS...`` in a real process (``prelude``: Python run first, in that process):
    (exit status, stdout, stderr). The timeout turns a hang into a failure, not a stuck suite."""
    code = (prelude + "\nimport sys\nfrom cli.main import run\n"
            "sys.argv = ['patchwood'] + sys.argv[1:]\nrun()\n")
    done = subprocess.run([sys.executable, "-c", code, *[os.fspath(a) for a in args]], cwd=REPO,
                          capture_output=True, timeout=timeout, env=env)
    return done.returncode, done.stdout.decode("utf-8"), done.stderr.decode("utf-8")


def _one_frame(trained) -> bytes:
    return sorted((trained.test / "images").glob("*.png"))[0].read_bytes()


def _failures(out: Path) -> dict:
    with open(failures_path(out), newline="", encoding="utf-8") as fh:
        return {row["image"]: row["reason"] for row in csv.DictReader(fh)}


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="named pipes are POSIX")
def test_named_pipes_and_devices_are_listed_never_read(trained, tmp_path):
    """A named pipe called fifo.png (opening it to read waits for a writer: forever) and a link
    z.png to /dev/zero (a read never ends) in a scanned folder, and the pipe given by itself:
    each is a listed failure, the other image is scanned, the run ends. A real process under a
    timeout, so that a regression fails instead of hanging the suite."""
    folder = tmp_path / "frames"
    folder.mkdir()
    (folder / "good.png").write_bytes(_one_frame(trained))
    os.mkfifo(folder / "fifo.png")
    if os.path.exists("/dev/zero"):
        os.symlink("/dev/zero", folder / "z.png")
    out = tmp_path / "d.csv"
    code, stdout, err = _run_cli("scan", trained.model, folder, folder / "fifo.png", "--out", out)
    assert code == 0 and "Traceback" not in err, (stdout, err)
    failures = _failures(out)
    pipe = "cannot read image: not a regular file (a named pipe)"
    assert failures["fifo.png"] == pipe and failures[str(folder / "fifo.png")] == pipe
    if os.path.exists("/dev/zero"):
        assert failures["z.png"] == "cannot read image: not a regular file (a character device)"
    assert f"  fifo.png: {pipe}" in stdout
    assert [d.image for d in read_detections(out)] == ["good.png"]
    # the labels reader refuses a pipe too, in one line
    os.mkfifo(tmp_path / "labels.csv")
    code, _, err = _run_cli("harvest", folder, tmp_path / "labels.csv", "--out",
                            tmp_path / "bank.npz")
    assert code == 1
    one_line_error(err, f"{tmp_path / 'labels.csv'}: cannot read the file: not a regular file "
                        "(a named pipe)")


def test_reads_are_bounded_by_the_size_limit(trained, tmp_path, monkeypatch, capsys):
    """A 1 GiB (sparse) file named big.png is refused from its size, nothing of it read; the
    limit is 8 bytes a pixel of PATCHWOOD_MAX_MEGAPIXELS (1 megapixel here) plus 64 MiB:
    8 * 10**6 + 67,108,864 = 75,108,864 bytes. tracemalloc traces every buffer Python and numpy
    allocate: the run's peak stays far below what reading the file would take."""
    import tracemalloc

    from detector.io.files import FileTooLargeError, read_bytes

    folder = tmp_path / "frames"
    folder.mkdir()
    (folder / "good.png").write_bytes(_one_frame(trained))
    with open(folder / "big.png", "wb") as fh:
        fh.truncate(2**30)
    monkeypatch.setenv("PATCHWOOD_MAX_MEGAPIXELS", "1")
    out = tmp_path / "d.csv"
    tracemalloc.start()
    try:
        code, stdout, err = patchwood(monkeypatch, capsys, "scan", trained.model, folder,
                                      "--out", out)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert code == 0 and err.count("\n") <= 1, (stdout, err)
    assert _failures(out)["big.png"].startswith(
        "cannot read image: the file is larger than the limit of 75,108,864 bytes")
    assert peak < 2**28, peak  # 256 MiB, against the 1 GiB file
    # a file whose size says nothing (a /proc file reports 0 bytes) is still read only up to the
    # limit + 1 byte and refused
    if os.path.exists("/proc/self/status"):
        with pytest.raises(FileTooLargeError, match="larger than the limit of 16 bytes"):
            read_bytes("/proc/self/status", max_bytes=16)
        assert read_bytes("/proc/self/status", max_bytes=1 << 20).startswith(b"Name:")


def test_file_names_that_are_not_utf8_are_written_escaped(trained, tmp_path, monkeypatch,
                                                          capsys):
    """Names with bytes that are not UTF-8 (Latin-1 'é' as 0xE9, a folder with 0xFF) are scanned
    and written with %XX for those bytes: the detections and failures files stay UTF-8, the other
    images' results are kept, --resume and --draw work with the same names."""
    folder = tmp_path / "frames"
    folder.mkdir()
    frame = _one_frame(trained)
    (folder / "plain.png").write_bytes(frame)
    try:
        with open(os.fsencode(folder) + b"/caf\xe9 1.png", "wb") as fh:
            fh.write(frame)
        os.mkdir(os.fsencode(folder) + b"/sub\xff")
        with open(os.fsencode(folder) + b"/sub\xff/x.png", "wb") as fh:
            fh.write(b"not a picture")
    except (OSError, UnicodeError):
        pytest.skip("this file system refuses names that are not UTF-8")
    out, drawn = tmp_path / "d.csv", tmp_path / "drawn"
    code, stdout, err = patchwood(monkeypatch, capsys, "scan", trained.model, folder, "--out",
                                  out, "--threshold", "0.1", "--draw", drawn)
    assert code == 0 and err.count("\n") <= 1, (stdout, err)
    out.read_bytes().decode("utf-8")  # strict: valid UTF-8
    found = {d.image: d for d in read_detections(out)}
    assert sorted(found) == ["caf%E9 1.png", "plain.png"]
    np.testing.assert_array_equal(found["caf%E9 1.png"].scores, found["plain.png"].scores)
    assert len(found["plain.png"].scores) > 0
    assert _failures(out) == {"sub%FF/x.png": "cannot read image: not a PNG, JPEG, BMP or TIFF "
                                              "file (unrecognised content)"}
    assert "  sub%FF/x.png: cannot read image" in stdout
    assert (drawn / "caf%E9 1.png").is_file()
    # resume: a run stopped after its first image, continued: the same file again
    whole = out.read_bytes()
    interrupted_scan(trained.model, folder, out, 1, threshold=0.1)
    code, stdout, err = patchwood(monkeypatch, capsys, "scan", trained.model, folder, "--out",
                                  out, "--threshold", "0.1", "--resume")
    assert code == 0 and "(+1 kept from the earlier run)" in stdout, (stdout, err)
    assert out.read_bytes() == whole


def interrupted_scan(model, folder, out, after: int, **settings):
    """A real run of the folder (``detector.scan.scan_paths``, writing after every image) stopped
    after ``after`` images, as a killed run leaves it: a detections file and the provenance side
    file that describes it, which --resume checks."""
    from detector.scan import scan_paths
    from detector.scan import ScanSettings

    class Stop(KeyboardInterrupt):
        pass

    seen = []

    def stop(result):
        seen.append(result.image)
        if len(seen) == after:
            raise Stop()

    with pytest.raises(Stop):
        scan_paths(model, [folder], out, settings=ScanSettings(**settings), batch_images=1,
                   force=True, on_image=stop)
    assert len(read_detections(out)) == after


def test_names_round_trip_through_resume(trained, tmp_path, monkeypatch, capsys):
    """File names with a leading or trailing space, a comma, quotes, a backslash, a line break:
    an interrupted run continued with --resume writes exactly the file a clean run writes, with
    each image under its own name once."""
    folder = tmp_path / "frames"
    folder.mkdir()
    frames = sorted((trained.test / "images").glob("*.png"))
    names = [" lead.png", "trail .png", "a,b.png", 'say "q".png', "back\\slash.png",
             "two\nlines.png", "plain.png"]
    for k, name in enumerate(names):
        (folder / name).write_bytes(frames[k % len(frames)].read_bytes())
    clean, resumed = tmp_path / "clean.csv", tmp_path / "resumed.csv"
    args = ["scan", trained.model, folder, "--threshold", "0.1"]
    assert patchwood(monkeypatch, capsys, *args, "--out", clean)[0] == 0
    listed = [d.image for d in read_detections(clean)]
    assert sorted(listed) == sorted(names)  # every name exactly, once
    # the first three images done, the run interrupted: continue it
    interrupted_scan(trained.model, folder, resumed, 3, threshold=0.1)
    code, stdout, err = patchwood(monkeypatch, capsys, *args, "--out", resumed, "--resume")
    assert code == 0 and "(+3 kept from the earlier run)" in stdout, (stdout, err)
    assert resumed.read_bytes() == clean.read_bytes()


def test_a_small_min_object_cannot_enlarge_past_the_size_limit(trained, tmp_path, monkeypatch,
                                                               capsys):
    """--min-object 1 with the model's 24 x 24 window (margin 0.1: objects of 24 / 1.2 = 20
    pixels) enlarges a frame 20 times: a 4000 x 3000 image would become 80000 x 60000 pixels
    (4.8 gigapixels); it is a listed failure, refused before anything is allocated, and so is
    a 320 x 240 frame (6400 x 4800 = 30.72 megapixels) under a limit of 10 megapixels."""
    folder = tmp_path / "frames"
    folder.mkdir()
    (folder / "big.png").write_bytes(encode(".png", np.full((3000, 4000), 90, np.uint8)))
    out = tmp_path / "d.csv"
    code, stdout, err = patchwood(monkeypatch, capsys, "scan", trained.model, folder, "--out",
                                  out, "--min-object", "1")
    assert code == 1 and "Traceback" not in err, (stdout, err)  # no image could be scanned
    reason = ("--min-object 1 enlarges this 4000 x 3000 image 20 times, to 80000 x 60000 pixels, "
              "more than the limit of 100,000,000 pixels (PATCHWOOD_MAX_MEGAPIXELS); look for "
              "larger objects or cut the image into parts")
    assert _failures(out) == {"big.png": reason}
    assert f"  big.png: {reason}" in stdout
    monkeypatch.setenv("PATCHWOOD_MAX_MEGAPIXELS", "10")
    small = tmp_path / "small.png"
    small.write_bytes(_one_frame(trained))
    code, stdout, _ = patchwood(monkeypatch, capsys, "scan", trained.model, small, "--out",
                                tmp_path / "s.csv", "--min-object", "1")
    assert code == 1 and "to 6400 x 4800 pixels, more than the limit of 10,000,000" in stdout


def test_an_output_is_never_one_of_the_inputs(trained, tmp_path, monkeypatch, capsys):
    """--force replaces an earlier output, never an input: scan onto an image it scans (or onto
    the model, through a link), train onto its bank, harvest onto its labels or an image; the
    input is untouched."""
    folder = tmp_path / "frames"
    folder.mkdir()
    image = folder / "a.png"
    image.write_bytes(_one_frame(trained))
    bank, labels = tmp_path / "bank.npz", tmp_path / "labels.csv"
    shutil.copy(trained.bank, bank)
    shutil.copy(trained.train / "labels.csv", labels)
    link = tmp_path / "model-link.csv"
    os.symlink(trained.model, link)
    labelled = trained.train / "images" / sorted(it.image for it in trained.labels)[0]
    cases = [
        (["scan", trained.model, folder, "--out", image, "--force"], image,
         "the output is one of the images to scan (a.png)"),
        (["scan", trained.model, folder, "--out", link, "--force"], trained.model,
         "the output is the model file"),
        (["train", bank, "--out", bank, "--force", "--trees", "2"], bank,
         "the model is an input of this command"),
        (["train", bank, "--out", tmp_path / "m.npz", "--save-bank", bank, "--force"], bank,
         "the patch bank is an input of this command"),
        (["harvest", trained.train / "images", labels, "--out", labels, "--force"], labels,
         "the patch bank is an input of this command"),
    ]
    copy = tmp_path / "labelled copy"
    shutil.copytree(trained.train / "images", copy)
    cases.append((["harvest", copy, labels, "--out", copy / labelled.name, "--force"],
                  copy / labelled.name, "the patch bank is an input of this command"))
    for args, kept, message in cases:
        before = kept.read_bytes()
        line = fails(monkeypatch, capsys, 1, *args)
        assert message in line, line
        assert kept.read_bytes() == before


def test_two_runs_never_write_one_output(trained, tmp_path, monkeypatch, capsys):
    """While one run holds the output (a real second process here, holding the lock a scan
    takes), a scan to the same file refuses at once, in one line naming the first run, and
    writes nothing; when the first run ends, the output is free again."""
    out = tmp_path / "d.csv"
    holder = subprocess.Popen(
        [sys.executable, "-c",
         "import sys, time\nfrom detector.io.files import output_lock\n"
         "with output_lock(sys.argv[1], 'patchwood scan (the first run)'):\n"
         "    print('locked', flush=True)\n    time.sleep(300)\n", str(out)],
        cwd=REPO, stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "locked"
        line = fails(monkeypatch, capsys, 1, "scan", trained.model, trained.test / "images",
                     "--out", out, "--force")
        assert line.startswith(f"error: {out}: another run is writing this output (process "
                               f"{holder.pid} since "), line
        assert "patchwood scan (the first run)" in line
        assert not out.exists() and not failures_path(out).exists()
    finally:
        holder.kill()
        holder.wait()
        holder.stdout.close()
    code, _, _ = patchwood(monkeypatch, capsys, "scan", trained.model, trained.test / "images",
                           "--out", out)
    assert code == 0 and out.exists()
    assert not any(p.name.endswith(".lock") for p in tmp_path.iterdir())  # removed at the end


def test_the_failures_side_file_follows_the_outputs_rule(trained, tmp_path, monkeypatch, capsys):
    """An existing DETECTIONS.failures.csv is not replaced without --force (or --resume), even when
    the detections file itself is gone."""
    out = tmp_path / "d.csv"
    side = failures_path(out)
    side.write_text("image,reason\nlast week.png,kept for the record\n")
    line = fails(monkeypatch, capsys, 1, "scan", trained.model, trained.test / "images", "--out",
                 out)
    assert line == (f"error: {side}: the failures side file of this output exists; add --force "
                    "to replace it or --resume to continue the run")
    assert side.read_text() == "image,reason\nlast week.png,kept for the record\n"
    assert not out.exists()
    code, _, _ = patchwood(monkeypatch, capsys, "scan", trained.model, trained.test / "images",
                           "--out", out, "--force")
    assert code == 0 and not side.exists()  # replaced: this run had no failures


def _zip(members) -> bytes:
    """A zip archive (PKWARE APPNOTE 6.3, deflate) from ``(name, raw deflate data, crc, size)``,
    built by hand so that a member can be compressed in repeated pieces."""
    local, central = bytearray(), bytearray()
    for name, data, crc, size in members:
        name = name.encode()
        offset = len(local)
        head = struct.pack("<IHHHHHIIIHH", 0x04034B50, 20, 0, 8, 0, 0x21, crc, len(data), size,
                           len(name), 0)
        local += head + name + data
        central += struct.pack("<IHHHHHHIIIHHHHHII", 0x02014B50, 20, 20, 0, 8, 0, 0x21, crc,
                               len(data), size, len(name), 0, 0, 0, 0, 0, offset) + name
    end = struct.pack("<IHHHHIIH", 0x06054B50, 0, 0, len(members), len(members), len(central),
                      len(local), 0)
    return bytes(local + central + end)


def _deflated(parts) -> tuple[bytes, int, int]:
    """Raw deflate of the concatenated ``parts`` ((bytes, repeat) pairs), its CRC-32 and size.
    After a full flush the compressor starts afresh, so the same input gives the same bytes:
    one megabyte of zeros is compressed once and its output repeated."""
    out, crc, size = bytearray(), 0, 0
    for data, repeat in parts:
        c = zlib.compressobj(9, zlib.DEFLATED, -15)
        piece = c.compress(data) + c.flush(zlib.Z_FULL_FLUSH)
        for _ in range(repeat):
            out += piece
            crc = zlib.crc32(data, crc)
            size += len(data)
    out += zlib.compressobj(9, zlib.DEFLATED, -15).flush(zlib.Z_FINISH)
    return bytes(out), crc, size


def test_a_bank_declaring_a_million_patches_is_refused_from_its_headers(trained, tmp_path,
                                                                       monkeypatch, capsys):
    """A bank whose 'patches' entry declares (1000000, 24, 24) (576 MB of zeros, 0.56 MB
    compressed, a valid archive) beside the real labels: refused from the arrays' headers, in
    one line, before any array data is read (tracemalloc's peak stays far below 576 MB)."""
    import tracemalloc

    arrays = npzfile.read_npz(trained.bank, kind="patch bank")
    header = io.BytesIO()
    np.lib.format.write_array_header_1_0(header, {"descr": "|u1", "fortran_order": False,
                                                  "shape": (1000000, 24, 24)})
    members = [("patches.npy", *_deflated([(header.getvalue(), 1), (bytes(2**20), 549),
                                           (bytes(576000000 - 549 * 2**20), 1)]))]
    for name, value in sorted(arrays.items()):
        if name != "patches":
            buf = io.BytesIO()
            np.lib.format.write_array(buf, value, allow_pickle=False)
            members.append((name + ".npy", *_deflated([(buf.getvalue(), 1)])))
    bank = tmp_path / "crafted bank.npz"
    bank.write_bytes(_zip(members))
    assert bank.stat().st_size < 2**20
    with zipfile.ZipFile(bank) as zf:  # a valid archive: the reference reader finds no damage
        assert zf.getinfo("patches.npy").file_size == len(header.getvalue()) + 576000000
    tracemalloc.start()
    try:
        line = fails(monkeypatch, capsys, 1, "train", bank, "--out", tmp_path / "m.npz")
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    n = len(arrays["labels"])
    assert line == (f"error: {bank}: patch bank array 'labels' has size {n} along axis 0, but "
                    "array 'patches' says 1000000")
    assert peak < 2**27, peak  # 128 MiB
    assert not (tmp_path / "m.npz").exists()


def test_a_model_with_a_window_harvest_would_refuse_is_refused(trained, tmp_path, monkeypatch,
                                                               capsys):
    """A model claiming a 100000 x 100000 window (its rectangles inside it): refused on loading,
    by every command, instead of inspect allocating the window's picture (74.5 GiB)."""
    path = _replaced(trained.model, tmp_path / "huge window.npz",
                     window=lambda w: np.array([100000, 100000], np.int32))
    for args in (["inspect", path, "--out", tmp_path / "pictures"],
                 ["scan", path, trained.test / "images", "--out", tmp_path / "d.csv"]):
        line = fails(monkeypatch, capsys, 1, *args)
        assert line == (f"error: {path}: model window 100000x100000 is outside the sides a "
                        "window may have (4..512 pixels, as harvest allows)")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["huge window.npz"]


def test_a_killed_runs_temporary_files_are_removed_by_the_next(trained, tmp_path, monkeypatch,
                                                               capsys):
    """Temporary files a killed harvest left beside its bank (a process that no longer exists;
    an earlier version's scheme, untouched for two hours) go when a later harvest writes that
    bank; a live writer's (a process that exists) and other files' stay."""
    gone = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True).stdout.strip()
    alive = os.getppid()
    bank = tmp_path / "bank.npz"
    stale = [f".bank.npz.{gone}-0123abcd.part", ".bank.npz.k3j_9x2q.part"]
    kept = [f".bank.npz.{alive}-89abcdef.part", f".other.npz.{gone}-0123abcd.part", "notes.part"]
    for name in stale + kept:
        (tmp_path / name).write_bytes(b"half a bank")
    two_hours_ago = time.time() - 7200
    os.utime(tmp_path / ".bank.npz.k3j_9x2q.part", (two_hours_ago, two_hours_ago))
    code, _, err = patchwood(monkeypatch, capsys, "harvest", trained.train / "images",
                             trained.train / "labels.csv", "--out", bank, "--copies", "0",
                             "--negatives-per-image", "2")
    assert code == 0, err
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(kept + ["bank.npz"])


def test_a_full_disk_is_one_line_naming_the_file(trained, tmp_path, monkeypatch, capsys):
    """A write that fails for want of space ends scan, harvest and score with one line naming the
    file they were writing, and leaves no temporary file. Harvest in a real process under a
    file-size limit (RLIMIT_FSIZE: the write fails as on a full disk, with EFBIG instead of
    ENOSPC); scan and score with the sync of their writes failing with ENOSPC itself."""
    bank = tmp_path / "bank.npz"
    limit = ("import resource, signal\nsignal.signal(signal.SIGXFSZ, signal.SIG_IGN)\n"
             "resource.setrlimit(resource.RLIMIT_FSIZE, (2000, 2000))\n")
    code, _, err = _run_cli("harvest", trained.train / "images", trained.train / "labels.csv",
                            "--out", bank, prelude=limit)
    assert code == 1, err
    # the closing line of the progress bar ("harvesting: 12/12 images in 0.7 s (...)") comes first
    err = "".join(line for line in err.splitlines(keepends=True)
                  if not re.match(r"[a-z ]+: [0-9]+(/[0-9]+)? [a-z]+ in [0-9.]+ s ", line))
    assert one_line_error(err) == f"error: {bank}: cannot write the file: File too large"
    assert list(tmp_path.iterdir()) == []

    def full(fd):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "fsync", full)
    out = tmp_path / "full.csv"
    line = fails(monkeypatch, capsys, 1, "scan", trained.model, trained.test / "images", "--out",
                 out)
    assert line == f"error: {out}: cannot write the file: No space left on device"
    found = _detections(trained, tmp_path)
    line = fails(monkeypatch, capsys, 1, "score", found, trained.test / "labels.csv", "--out",
                 tmp_path / "report")
    assert re.fullmatch(f"error: {re.escape(str(tmp_path / 'report'))}/[^/]+: cannot write the "
                        "file: No space left on device", line), line
    assert [p.name for p in tmp_path.rglob("*") if p.is_file()] == ["detections.csv"]


@pytest.mark.parametrize("address", ["not a url", "http://10.0.0.5:8786", "tcp://host:99999"])
def test_a_bad_cluster_address_is_one_line_at_once(trained, tmp_path, monkeypatch, capsys,
                                                   address):
    line = fails(monkeypatch, capsys, 1, "scan", trained.model, trained.test / "images",
                 "--out", tmp_path / "d.csv", "--cluster", address)
    assert line == (f"error: --cluster {address!r} is not a scheduler address; give "
                    "PROTOCOL://HOST:PORT, e.g. tcp://10.0.0.5:8786")
    assert list(tmp_path.iterdir()) == []


def test_a_folder_that_cannot_be_read_is_a_listed_failure(trained, tmp_path, monkeypatch,
                                                          capsys):
    """A subfolder without read permission is listed among the failures like a file (for root,
    whom permissions do not stop, the listing is made to fail the way it fails for others)."""
    folder = tmp_path / "frames"
    locked = folder / "locked"
    locked.mkdir(parents=True)
    (folder / "a.png").write_bytes(_one_frame(trained))
    (locked / "b.png").write_bytes(_one_frame(trained))
    locked.chmod(0)
    try:
        if os.access(locked, os.R_OK):  # root
            real = os.scandir

            def scandir(path="."):
                if os.path.realpath(path) == os.path.realpath(locked):
                    raise PermissionError(13, "Permission denied", os.fspath(path))
                return real(path)

            monkeypatch.setattr(os, "scandir", scandir)
        out = tmp_path / "d.csv"
        code, stdout, err = patchwood(monkeypatch, capsys, "scan", trained.model, folder,
                                      "--out", out)
    finally:
        locked.chmod(0o755)
    assert code == 0 and err.count("\n") <= 1, (stdout, err)
    assert _failures(out) == {"locked/": "cannot read the folder: permission denied"}
    assert "  locked/: cannot read the folder: permission denied" in stdout
    assert [d.image for d in read_detections(out)] == ["a.png"]


def test_every_file_is_written_through_the_one_atomic_writer():
    """No module writes a file by itself: opening for writing, renaming into place, temporary
    files and encoders that write to a path live only in detector/io/files.py (the writer every
    other module calls; it syncs, renames and cleans up)."""
    patterns = [r"os\.replace\(", r"os\.rename\(", r"\.rename\(", r"mkstemp", r"NamedTemporaryFile",
                r"\.tofile\(", r"cv2\.imwrite\(", r"\.write_text\(", r"\.write_bytes\(",
                r"open\([^)]*[\"'][wax]b?\+?[\"']", r"savefig\((?!fh)", r"np\.savez?",
                r"\.to_csv\("]
    offenders = []
    for folder in ("detector", "cli", "synthetic_images"):
        for path in sorted((REPO / folder).rglob("*.py")):
            if path == REPO / "detector" / "io" / "files.py":
                continue
            for n, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
                code = line.split("#")[0]
                if code.lstrip().startswith(">>>") or code.lstrip().startswith("..."):
                    continue  # docstring examples make their own inputs
                if any(re.search(p, code) for p in patterns):
                    offenders.append(f"{path.relative_to(REPO)}:{n}: {line.strip()}")
    assert offenders == []


def test_the_atomic_writer_leaves_the_old_file_or_the_new(tmp_path):
    """A failure half-way (the report's PNG writer here: matplotlib raising mid-save) leaves the
    destination as it was and no temporary file; success replaces it in one step, with the
    permissions the umask gives a new file."""
    from detector.io.files import atomic_write, write_text
    from detector.reporting.plots import new_figure as _figure, save_figure as _save

    path = tmp_path / "plot.png"
    path.write_bytes(b"last week's plot")
    fig = _figure()
    fig.add_subplot().plot([0, 1], [0, 1])

    class Broken(Exception):
        pass

    with pytest.raises(Broken):
        with atomic_write(path) as fh:
            fig.savefig(fh, format="png")
            raise Broken
    assert path.read_bytes() == b"last week's plot"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["plot.png"]
    _save(fig, path)
    assert path.read_bytes().startswith(b"\x89PNG\r\n\x1a\n")
    umask = os.umask(0)
    os.umask(umask)
    write_text(tmp_path / "new.txt", "x\n")
    assert (tmp_path / "new.txt").stat().st_mode & 0o777 == 0o666 & ~umask
    assert sorted(p.name for p in tmp_path.iterdir()) == ["new.txt", "plot.png"]


# ---------------------------------------------------------------------------------------------
# every reader, fuzzed: it loads, or it raises the one input error, within a memory limit

#: The most memory one fuzzed input may make a reader allocate (traced by tracemalloc: every
#: buffer Python and numpy allocate, the arrays OpenCV returns included). The images are read
#: under a limit of 2 megapixels, so that a header claiming a large picture within the limit
#: stays below it too.
FUZZ_MEMORY = 64 * 2**20
FUZZ_PIXELS = 2_000_000


@pytest.fixture(scope="module")
def reader_seeds(model_members):
    """A valid input of every reader, small, for the fuzzer to damage."""
    from detector.harvest import PatchBank

    rng = np.random.default_rng(3)
    picture = rng.integers(0, 256, (20, 28), dtype=np.uint8)
    bank = PatchBank(window=(12, 12), patches=rng.integers(0, 256, (3, 12, 12), dtype=np.uint8),
                     labels=np.array([1, 0, 0], np.uint8), kinds=np.array([0, 2, 2], np.uint8),
                     image_index=np.zeros(3, np.int32), images=["a.png"],
                     boxes=np.ones((3, 4), np.float32),
                     augmentation=np.tile(np.array([0, 0, 1, 0, 0, 1, 0], np.float32), (3, 1)),
                     metadata={"margin": 0.1})
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as zf:  # save_bank's layout, without touching the disk
        from detector.harvest import BANK_FORMAT_VERSION
        arrays = {"format_version": np.array(BANK_FORMAT_VERSION, np.int64),
                  "kind": np.array("patch-bank"), "window": np.array(bank.window, np.int32),
                  "patches": bank.patches, "labels": bank.labels, "kinds": bank.kinds,
                  "image_index": bank.image_index, "images": np.array(bank.images),
                  "boxes": bank.boxes, "augmentation": bank.augmentation,
                  "metadata": np.array(json.dumps(bank.metadata))}
        for name, value in arrays.items():
            member = io.BytesIO()
            np.lib.format.write_array(member, value, allow_pickle=False)
            zf.writestr(name + ".npy", member.getvalue(), compress_type=zipfile.ZIP_DEFLATED)
    return {
        "png": encode(".png", picture), "jpeg": encode(".jpg", picture),
        "bmp": encode(".bmp", picture), "tiff": encode(".tif", picture.astype(np.uint16)),
        "labels csv": b"image,x,y,width,height,label\na.png,1,2,3,4,nut\nb.png,,,,,\n",
        "labels json": json.dumps({"images": [{"id": 1, "file_name": "a.png", "width": 28,
                                               "height": 20}],
                                   "annotations": [{"id": 1, "image_id": 1,
                                                    "bbox": [1, 2, 3, 4], "category_id": 1}],
                                   "categories": [{"id": 1, "name": "nut"}]}).encode(),
        "detections csv": b"image,x,y,width,height,score\na.png,1,2,3,4,0.5\nb.png,,,,,\n",
        "bank": buf.getvalue(),
        "model": model_members[0],
    }


def _read(kind: str, data: bytes, folder: Path):
    """Read ``data`` with the reader of ``kind``: images and npz files from bytes, text files
    from a file holding them (the readers of text take paths)."""
    from detector.harvest import load_bank
    from detector.io.images import decode_gray

    if kind in ("png", "jpeg", "bmp", "tiff"):
        return decode_gray(data, f"fuzz.{kind}", max_pixels=FUZZ_PIXELS)
    if kind == "bank":
        return load_bank("fuzz bank.npz", data=data)
    if kind == "model":
        return load_model("fuzz model.npz", data=data)
    path = folder / ("fuzz.json" if kind == "labels json" else "fuzz.csv")
    path.write_bytes(data)
    if kind == "detections csv":
        return read_detections(path)
    return read_labels(path)


@st.composite
def damaged_bytes(draw, seed: bytes):
    """``seed`` damaged the ways files get damaged or forged: bytes flipped, the end cut off,
    bytes inserted, a 16- or 32-bit field (a size, a count, an offset) set to an extreme value,
    or nothing of the seed at all."""
    raw = bytearray(seed)
    how = draw(st.sampled_from(["flip", "cut", "insert", "field", "random"]))
    if how == "random":
        return draw(st.binary(max_size=600))
    if how == "flip":
        for _ in range(draw(st.integers(1, 8))):
            raw[draw(st.integers(0, len(raw) - 1))] = draw(st.integers(0, 255))
    elif how == "cut":
        raw = raw[: draw(st.integers(0, len(raw) - 1))]
    elif how == "insert":
        at = draw(st.integers(0, len(raw)))
        raw[at:at] = draw(st.binary(min_size=1, max_size=64))
    else:
        width = draw(st.sampled_from([2, 4]))
        at = draw(st.integers(0, max(0, len(raw) - width)))
        value = draw(st.sampled_from([0, 1, 2**(8 * width) - 1, 2**(8 * width - 1),
                                      2**(8 * width - 2) + 7]))
        raw[at:at + width] = value.to_bytes(width, draw(st.sampled_from(["little", "big"])))
    return bytes(raw)


@settings(max_examples=120, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(data=st.data())
def test_fuzz_every_reader_loads_or_raises_input_error_within_memory(tmp_path, reader_seeds,
                                                                     data):
    """Images from bytes (PNG, JPEG, BMP, TIFF), labels CSV, COCO JSON, a detections CSV, a
    patch bank and a model (from bytes): whatever the damage, the reader returns, or raises
    detector.errors.InputError with one line, never anything else, and never allocates more
    than FUZZ_MEMORY on the way."""
    import tracemalloc

    kind = data.draw(st.sampled_from(sorted(reader_seeds)))
    raw = data.draw(damaged_bytes(reader_seeds[kind]))
    tracemalloc.start()
    try:
        try:
            _read(kind, raw, tmp_path)
        except InputError as err:
            assert "\n" not in str(err) and str(err).strip(), str(err)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < FUZZ_MEMORY, (kind, peak)


def test_a_report_never_replaces_its_inputs(trained, tmp_path, monkeypatch, capsys):
    """score --force replaces an earlier report's files, never its own input: labels named
    summary.json in the report folder stay as they are."""
    report = tmp_path / "report"
    report.mkdir()
    labels = report / "summary.json"
    shutil.copy(trained.test / "labels.csv", labels)
    before = labels.read_bytes()
    line = fails(monkeypatch, capsys, 1, "score", _detections(trained, tmp_path), labels,
                 "--out", report, "--force")
    assert line == (f"error: {labels}: the report would replace its own input ({labels}); "
                    "choose another report folder")
    assert labels.read_bytes() == before and sorted(p.name for p in report.iterdir()) == [
        "summary.json"]
