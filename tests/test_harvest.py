"""Harvesting the patch bank (detector/harvest.py) and `patchwood harvest`.

Outside references used here: OpenCV's ``cv2.resize(..., interpolation=cv2.INTER_AREA)`` on the plain
array slice and ``numpy.pad(mode="edge")`` for the border; scikit-image's
``skimage.transform.downscale_local_mean`` for a whole-factor shrink; ``numpy.rot90`` and
``[:, ::-1]`` for rotation and mirroring; ``detector.geometry.iou`` (held equal to pycocotools in
tests/test_boxes.py) beside an IoU coded by hand in this file; ``numpy.load(allow_pickle=False)``
for the file format. Everything else is worked by hand in the comments.
"""

import json
import os
import sys
import zipfile
from pathlib import Path

import cv2
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from skimage.transform import downscale_local_mean
from typer.testing import CliRunner

import cli.main
from detector.io import npzfile
from detector.geometry import iou
from detector.errors import InputError
from detector.harvest import (AUGMENTATION_COLUMNS, KIND_AUGMENTED, KIND_BACKGROUND, KIND_MINED,
                              KIND_OBJECT, PatchBank, crop_region, harvest, infer_window,
                              window_short_side,
                              load_bank, object_box_to_window_box, overlaps, parse_window, sample_background,
                              sample_near_background, save_bank, window_box_to_object_box)
from detector.io.images import read_gray
from detector.io.labels import read_labels
from detector.model import Model, save_model

MARGIN = 0.25  # with the boxes below, every grown box has whole-pixel corners and sides
COPIES = 3
# 96 x 72 frames. Box -> box grown by 0.25 of its size on every side (x - w/4, y - h/4, 1.5w, 1.5h):
#   a.png (20,16,16,16) -> (16,12,24,24): the window itself, no resizing
#   a.png (48, 8,32,32) -> (40, 0,48,48): exactly 2 x 2 pixels per window pixel
#   c.png (10,20,24,16) -> ( 4,16,36,24): 1.5 x 1 per window pixel
#   c.png ( 0,50,20,20) -> (-5,45,30,30): leaves the frame on the left and the bottom (72 < 75)
#   c.png (70,30,1.5,5) is narrower than 2 pixels: skipped
#   b.png has no objects
LABELS_CSV = """image,x,y,width,height
a.png,20,16,16,16
a.png,48,8,32,32
b.png,,,,,
c.png,10,20,24,16
c.png,0,50,20,20
c.png,70,30,1.5,5
"""
VALID_BOXES = 4
FRAME = (96, 72)  # width, height


def smooth_frame(seed: int) -> np.ndarray:
    """Blurred noise stretched to 0..255: every place looks different, and sub-pixel sampling
    changes grey levels by little."""
    rng = np.random.default_rng(seed)
    img = cv2.GaussianBlur(rng.normal(0, 1, (FRAME[1], FRAME[0])), (0, 0), 2.0)
    img = (img - img.min()) / (img.max() - img.min()) * 255
    return np.round(img).astype(np.uint8)


def hand_iou(a, b) -> float:
    """IoU of two (x, y, width, height) boxes, coded from the definition (continuous areas)."""
    ix = max(0.0, min(a[0] + a[2], b[0] + b[2]) - max(a[0], b[0]))
    iy = max(0.0, min(a[1] + a[3], b[1] + b[3]) - max(a[1], b[1]))
    inter = ix * iy
    union = a[2] * a[3] + b[2] * b[3] - inter
    return inter / union if union > 0 else 0.0


def grown_crop(img, box, margin, window):
    """The labelled box grown by the margin, cut from the edge-padded frame and shrunk with
    cv2.INTER_AREA: an independent route to an object patch (whole-pixel grown boxes only)."""
    x, y, w, h = box
    gx, gy, gw, gh = x - margin * w, y - margin * h, w * (1 + 2 * margin), h * (1 + 2 * margin)
    assert all(float(v).is_integer() for v in (gx, gy, gw, gh))
    gx, gy, gw, gh = int(gx), int(gy), int(gw), int(gh)
    pad = 16
    padded = np.pad(img, pad, mode="edge")
    piece = padded[gy + pad:gy + pad + gh, gx + pad:gx + pad + gw]
    if piece.shape != (window[1], window[0]):
        piece = cv2.resize(piece, window, interpolation=cv2.INTER_AREA)
    return piece


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    root = tmp_path_factory.mktemp("harvest")
    (root / "images").mkdir()
    for k, name in enumerate(("a.png", "b.png", "c.png")):
        assert cv2.imwrite(str(root / "images" / name), smooth_frame(k))
    (root / "labels.csv").write_text(LABELS_CSV)
    return root


@pytest.fixture(scope="module")
def labels(folder):
    return read_labels(folder / "labels.csv", images_dir=folder / "images")


def _harvest(folder, labels, **kw):
    args = dict(window=(24, 24), margin=MARGIN, copies=COPIES, negatives_per_image=30,
                near_negatives=4, seed=0, labels_path=folder / "labels.csv")
    args.update(kw)
    return harvest(folder / "images", labels.items, **args)


@pytest.fixture(scope="module")
def bank(folder, labels):
    return _harvest(folder, labels)


@pytest.fixture(scope="module")
def frames(folder):
    return {n: read_gray(folder / "images" / n) for n in ("a.png", "b.png", "c.png")}


# ----------------------------------------------------------------------------- crop_region


def test_crop_region_plain_slice_and_area_resize():
    img = smooth_frame(7)
    # an axis-aligned whole-pixel region at its own size is the plain slice
    got = crop_region(img, (10 + 12, 7 + 9), (24, 18), (24, 18))
    np.testing.assert_array_equal(got, img[7:25, 10:34])
    # shrunk: equal to cv2.resize(INTER_AREA) of the slice, for whole and fractional factors
    for size, window in (((48, 36), (24, 18)), ((30, 20), (12, 8)), ((36, 24), (24, 24))):
        got = crop_region(img, (10 + size[0] / 2, 7 + size[1] / 2), size, window)
        ref = cv2.resize(img[7:7 + size[1], 10:10 + size[0]], window, interpolation=cv2.INTER_AREA)
        np.testing.assert_array_equal(got, ref)
    # a 2 x shrink is the mean of 2 x 2 blocks (scikit-image), up to rounding of the mean
    got = crop_region(img, (10 + 24, 7 + 18), (48, 36), (24, 18)).astype(float)
    ref = downscale_local_mean(img[7:43, 10:58].astype(float), (2, 2))
    assert np.abs(got - ref).max() <= 0.5 + 1e-9


def test_crop_region_border_repeats_edge_pixels():
    img = smooth_frame(8)
    # region (-3, -2, 10, 10): three columns and two rows outside the frame
    got = crop_region(img, (-3 + 5, -2 + 5), (10, 10), (10, 10))
    ref = np.pad(img, 4, mode="edge")[4 - 2:4 + 8, 4 - 3:4 + 7]
    np.testing.assert_array_equal(got, ref)


def test_crop_region_rotation_and_mirror_are_exact_array_moves():
    img = smooth_frame(9)
    for n in (20, 21):  # even and odd sides: the rotation centre lands on or between pixels
        x, y = 11, 6
        piece = img[y:y + n, x:x + n]
        centre = (x + n / 2, y + n / 2)
        # +90 degrees turns the content counter-clockwise as displayed, like numpy.rot90
        np.testing.assert_array_equal(crop_region(img, centre, (n, n), (n, n), angle=90),
                                      np.rot90(piece))
        np.testing.assert_array_equal(crop_region(img, centre, (n, n), (n, n), angle=-90),
                                      np.rot90(piece, -1))
        np.testing.assert_array_equal(crop_region(img, centre, (n, n), (n, n), angle=180),
                                      np.rot90(piece, 2))
        np.testing.assert_array_equal(crop_region(img, centre, (n, n), (n, n), mirror=True),
                                      piece[:, ::-1])
    # mirroring commutes with the area shrink (both work on whole columns)
    got = crop_region(img, (10 + 24, 4 + 24), (48, 48), (24, 24), mirror=True)
    ref = cv2.resize(img[4:52, 10:58], (24, 24), interpolation=cv2.INTER_AREA)[:, ::-1]
    np.testing.assert_array_equal(got, ref)


@settings(max_examples=40, deadline=None)
@given(x=st.integers(0, 60), y=st.integers(0, 40), w=st.integers(1, 36), h=st.integers(1, 32),
       mirror=st.booleans())
def test_crop_region_whole_pixel_regions_property(x, y, w, h, mirror):
    img = smooth_frame(10)
    piece = np.pad(img, 40, mode="edge")[40 + y:40 + y + h, 40 + x:40 + x + w]
    got = crop_region(img, (x + w / 2, y + h / 2), (w, h), (w, h), mirror=mirror)
    np.testing.assert_array_equal(got, piece[:, ::-1] if mirror else piece)


# ------------------------------------------------------------------------ window choice


def test_infer_window_hand_examples():
    # width/height ratios 2, 2, 1 -> median 2 -> 24 * 2 = 48 wide, 24 high
    assert infer_window(np.array([[0, 0, 40, 20], [5, 5, 60, 30], [1, 1, 10, 10]])) == (48, 24)
    # ratios 0.5, 0.5, 1 -> median 0.5 -> 24 wide, 24 / 0.5 = 48 high
    assert infer_window(np.array([[0, 0, 20, 40], [0, 0, 15, 30], [0, 0, 9, 9]])) == (24, 48)
    # two boxes: the median of 1 and 2 is 1.5 -> 36 x 24
    assert infer_window(np.array([[0, 0, 10, 10], [0, 0, 20, 10]])) == (36, 24)
    # ratio 1.3 -> 24 * 1.3 = 31.2 -> 31 x 24
    assert infer_window(np.array([[0, 0, 13, 10]])) == (31, 24)
    # shorter side 20 and ratio 0.8 -> 20 wide, 20 / 0.8 = 25 high
    assert infer_window(np.array([[0, 0, 8, 10]]), short_side=20) == (20, 25)
    assert infer_window(np.array([[3, 4, 17, 17]])) == (24, 24)
    # objects large enough for the larger window: shorter side 40, the aspect as before
    assert infer_window(np.array([[0, 0, 80, 40], [0, 0, 120, 60]])) == (80, 40)


def test_window_short_side_hand_examples():
    """40 when at most 20 % of the boxes' shorter sides are below its object side,
    ``40 / (1 + 2 margin)``; else 24."""
    big = [[0, 0, 50, 50]]
    # 2 of 10 boxes at 30 (shorter side): below 40 / 1.2 = 33.33, 20 %, allowed
    assert window_short_side(np.array(big * 8 + [[0, 0, 36, 30]] * 2)) == 40
    # 3 of 10: 30 %
    assert window_short_side(np.array(big * 7 + [[0, 0, 36, 30]] * 3)) == 24
    # with margin 0.25 the object side is 40 / 1.5 = 26.67: 30 is above it
    assert window_short_side(np.array(big * 7 + [[0, 0, 36, 30]] * 3), margin=0.25) == 40
    # a shorter side equal to the object side is not below it: 40 / (1 + 2 * 0.3) = 25
    assert window_short_side(np.array([[0, 0, 25, 30]] * 5), margin=0.3) == 40
    assert window_short_side(np.array([[0, 0, 24.5, 30]] * 5), margin=0.3) == 24


@given(sides=st.lists(st.floats(2.0, 200.0), min_size=1, max_size=40),
       margin=st.floats(0.0, 1.0))
@settings(max_examples=200, deadline=None)
def test_window_short_side_property(sides, margin):
    """Property: 40 exactly when the boxes below its object side number at most a fifth of all
    (counted one by one), else 24; the window infer_window makes has that shorter side."""
    boxes = np.array([[0.0, 0.0, s * 1.5, s] for s in sides])
    below = sum(1 for s in sides if s < 40 / (1.0 + 2.0 * margin))
    expected = 40 if 5 * below <= len(sides) else 24
    assert window_short_side(boxes, margin) == expected
    assert min(infer_window(boxes, margin=margin)) == expected


def test_parse_window():
    assert parse_window("24x24") == (24, 24)
    assert parse_window("32X16") == (32, 16)
    assert parse_window(" 40 x 20 ") == (40, 20)
    assert parse_window("4x512") == (4, 512)
    for bad in ("24", "24x", "x24", "24x24x3", "axb", "-4x24", "24x-4", "3x24", "24x513",
                "24.5x24", "0x0", "", "²x4", "２４x24"):
        with pytest.raises(ValueError):
            parse_window(bad)


# ------------------------------------------------------------------------- the harvest


def test_object_patches_are_the_boxes_grown_by_the_margin(bank, labels, frames):
    originals = np.flatnonzero(bank.kinds == KIND_OBJECT)
    expected_boxes = [(it.image, tuple(b)) for it in labels.items for b in it.boxes if min(b[2:]) >= 2]
    assert len(originals) == VALID_BOXES
    for k, (image, box) in zip(originals, expected_boxes):
        assert bank.images[bank.image_index[k]] == image
        np.testing.assert_array_equal(bank.boxes[k], np.float32(box))
        np.testing.assert_array_equal(bank.patches[k], grown_crop(frames[image], box, MARGIN, (24, 24)))
    # the 2 x case once more against scikit-image: 2 x 2 block means of frame[0:48, 40:88]
    k = originals[1]
    ref = downscale_local_mean(frames["a.png"][0:48, 40:88].astype(float), (2, 2))
    assert np.abs(bank.patches[k] - ref).max() <= 0.5 + 1e-9


def test_counts_and_provenance(bank, labels):
    n_obj = VALID_BOXES * (1 + COPIES)  # 4 usable boxes, each with 3 copies: 16 object patches
    c = bank.counts()
    assert c["object"] == VALID_BOXES and c["augmented"] == VALID_BOXES * COPIES
    assert c["objects"] == n_obj and np.sum(bank.labels == 1) == n_obj
    assert c["mined"] == 0 and c["background"] == np.sum(bank.kinds == KIND_BACKGROUND) > 0
    assert c["background"] == np.sum(bank.labels == 0)
    assert bank.metadata["counts"] == c
    assert len(bank) == len(bank.patches) == len(bank.boxes) == len(bank.augmentation)
    assert bank.patches.dtype == np.uint8 and bank.patches.shape[1:] == (24, 24)
    assert bank.images == [it.image for it in labels.items] == ["a.png", "b.png", "c.png"]
    # labels follow kinds
    np.testing.assert_array_equal(bank.labels, (bank.kinds <= KIND_AUGMENTED).astype(np.uint8))
    # every box comes first as itself, then its copies, all pointing at the same image and box
    obj = np.flatnonzero(bank.labels == 1)
    kinds = bank.kinds[obj].reshape(VALID_BOXES, 1 + COPIES)
    assert (kinds[:, 0] == KIND_OBJECT).all() and (kinds[:, 1:] == KIND_AUGMENTED).all()
    groups = obj.reshape(VALID_BOXES, 1 + COPIES)
    for g in groups:
        assert len(set(bank.image_index[g])) == 1
        assert (bank.boxes[g] == bank.boxes[g[0]]).all()
    assert [bank.images[i] for i in bank.image_index[groups[:, 0]]] == ["a.png", "a.png", "c.png", "c.png"]
    # augmentation rows: identity for originals and background
    identity = np.array([0, 0, 1, 0, 0, 1, 0], np.float32)
    assert len(AUGMENTATION_COLUMNS) == 7
    assert (bank.augmentation[bank.kinds != KIND_AUGMENTED] == identity).all()
    aug = bank.augmentation[bank.kinds == KIND_AUGMENTED]
    shift_x, shift_y, scale, rotate, mirror, gain, bias = aug.T
    jitter, max_rotate, brightness, contrast = 0.05, 10.0, 20.0, 0.2  # harvest()'s defaults
    assert np.abs(np.r_[shift_x, shift_y]).max() <= jitter
    assert np.abs(scale - 1).max() <= jitter
    assert np.abs(rotate).max() <= max_rotate and np.abs(rotate).max() > 0
    assert np.abs(gain - 1).max() <= contrast and np.abs(bias).max() <= brightness
    # every second copy (copies 1 and 3 of 0..2 -> copy index 1) is mirrored
    np.testing.assert_array_equal(mirror.reshape(VALID_BOXES, COPIES), [[0, 1, 0]] * VALID_BOXES)
    # no object patch from the object-free frame
    assert not np.any((bank.image_index == 1) & (bank.labels == 1))


def test_augmented_copies_follow_their_augmentation_rows(bank, frames):
    """Rebuild each copy from its recorded shift, scale, rotation, mirror, gain and bias."""
    for k in np.flatnonzero(bank.kinds == KIND_AUGMENTED):
        x, y, w, h = (float(v) for v in bank.boxes[k])
        dx, dy, sc, ang, mir, gain, bias = (float(v) for v in bank.augmentation[k])
        size = (w * (1 + 2 * MARGIN) * sc, h * (1 + 2 * MARGIN) * sc)
        p = crop_region(frames[bank.images[bank.image_index[k]]], (x + w / 2 + dx * w, y + h / 2 + dy * h),
                        size, (24, 24), angle=ang, mirror=bool(mir))
        p = np.clip(p * np.float32(gain) + np.float32(bias), 0, 255).round()
        assert np.abs(p - bank.patches[k]).max() <= 1  # the row is stored as float32


def test_background_overlaps_no_labelled_box(bank, labels, frames):
    gt = {it.image: it.boxes for it in labels.items}
    background = np.flatnonzero(bank.labels == 0)
    assert len(background) > 0
    touching = 0
    for k in background:
        image = bank.images[bank.image_index[k]]
        box = bank.boxes[k].astype(np.float64)
        if len(gt[image]):
            assert iou(box[None], gt[image]).max() < 0.3
            assert max(hand_iou(box, g) for g in gt[image]) < 0.3
            touching += any(hand_iou(box, g) > 0 for g in gt[image])
        # the patch is the window that reports this box, cut from its frame
        wx, wy, ww, wh = object_box_to_window_box(*box, MARGIN)
        again = crop_region(frames[image], (wx + ww / 2, wy + wh / 2), (ww, wh), (24, 24))
        assert np.abs(again.astype(int) - bank.patches[k]).max() <= 1  # boxes stored as float32
    # near negatives (inside or around a box) do touch the labelled boxes
    assert touching > 0
    # the object-free frame gives background windows too, fully inside it at scale >= 1
    from_b = background[bank.image_index[background] == 1]
    assert len(from_b) == 30
    for k in from_b:
        wx, wy, ww, wh = object_box_to_window_box(*bank.boxes[k].astype(np.float64), MARGIN)
        assert ww >= 24 - 1e-3 and wx >= -1e-3 and wy >= -1e-3
        assert wx + ww <= FRAME[0] + 1e-3 and wy + wh <= FRAME[1] + 1e-3


@pytest.mark.parametrize("jobs", [2, 3])
def test_the_bank_does_not_depend_on_jobs(folder, labels, bank, jobs):
    """Images are read and patches cut on ``jobs`` threads, a few images ahead, while the random
    draws stay in image order on the calling thread: every array of the bank is the one-thread
    bank's, row for row (three images, so the threads' read-ahead and the draining both run)."""
    threaded = _harvest(folder, labels, jobs=jobs)
    for name in ("patches", "labels", "kinds", "image_index", "boxes", "augmentation"):
        np.testing.assert_array_equal(getattr(threaded, name), getattr(bank, name))
    assert threaded.images == bank.images


def test_background_iou_option(folder, labels):
    strict = _harvest(folder, labels, max_background_iou=0.05, copies=0, negatives_per_image=20)
    gt = {it.image: it.boxes for it in labels.items}
    for k in np.flatnonzero(strict.labels == 0):
        g = gt[strict.images[strict.image_index[k]]]
        if len(g):
            assert max(hand_iou(strict.boxes[k].astype(float), b) for b in g) < 0.05


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 2**31), max_iou=st.sampled_from([0.0, 0.1, 0.3, 0.5]),
       n_boxes=st.integers(0, 4), margin=st.sampled_from([0.0, 0.1, 0.25]))
def test_background_sampling_property(seed, max_iou, n_boxes, margin):
    rng = np.random.default_rng(seed)
    gray = smooth_frame(seed % 5)
    wh = rng.uniform(8, 40, (n_boxes, 2))
    xy = rng.uniform(0, 1, (n_boxes, 2)) * (np.array(FRAME) - wh)
    gt = np.hstack([xy, wh])
    for sampler, count in ((sample_background, 25), (sample_near_background, 3)):
        patches, boxes = sampler(gray, gt, (16, 16), margin, count, rng, max_iou)
        assert patches.dtype == np.uint8 and patches.shape[1:] == (16, 16)
        assert len(patches) == len(boxes) and boxes.dtype == np.float32
        for box in boxes.astype(np.float64):
            for g in gt:
                assert hand_iou(box, g) < max_iou
            if n_boxes:
                assert iou(box[None], gt).max() < max_iou
    # the margin maps a window to its box and back
    x, y, w, h = window_box_to_object_box(*object_box_to_window_box(3.0, 4.0, 10.0, 6.0, margin), margin)
    np.testing.assert_allclose((x, y, w, h), (3.0, 4.0, 10.0, 6.0))


def test_inferred_window_is_recorded(folder, labels):
    b = _harvest(folder, labels, window=None, copies=0, negatives_per_image=2, near_negatives=0)
    # valid boxes' ratios 1, 1, 1.5, 1 -> median 1 -> 24 x 24
    assert b.window == (24, 24) and b.metadata["window"] == [24, 24]
    assert b.metadata["window_inferred"] is True
    b = _harvest(folder, labels, window=(32, 16), copies=0, negatives_per_image=2, near_negatives=0)
    assert b.patches.shape[1:] == (16, 32) and b.metadata["window_inferred"] is False


def test_progress_and_determinism(folder, labels, tmp_path):
    calls = []
    one = _harvest(folder, labels, progress=lambda done, total: calls.append((done, total)))
    assert calls == [(1, 3), (2, 3), (3, 3)]
    save_bank(tmp_path / "one.npz", one)
    save_bank(tmp_path / "two.npz", _harvest(folder, labels))
    assert (tmp_path / "one.npz").read_bytes() == (tmp_path / "two.npz").read_bytes()
    other = _harvest(folder, labels, seed=1)
    save_bank(tmp_path / "three.npz", other)
    assert (tmp_path / "one.npz").read_bytes() != (tmp_path / "three.npz").read_bytes()
    assert not np.array_equal(one.augmentation, other.augmentation)
    # the unaugmented object patches do not depend on the seed
    np.testing.assert_array_equal(one.patches[one.kinds == KIND_OBJECT], other.patches[other.kinds == KIND_OBJECT])


# --------------------------------------------------------------------------- the file


def test_bank_round_trip_and_plain_numpy_load(bank, tmp_path):
    path = tmp_path / "bank.npz"
    save_bank(path, bank)
    back = load_bank(path)
    assert back.window == bank.window and back.images == bank.images
    for name in ("patches", "labels", "kinds", "image_index", "boxes", "augmentation"):
        a, b = getattr(back, name), getattr(bank, name)
        assert a.dtype == b.dtype
        np.testing.assert_array_equal(a, b)
    assert back.metadata == json.loads(json.dumps(bank.metadata))
    assert back.margin == MARGIN
    with np.load(path, allow_pickle=False) as z:
        assert str(z["kind"]) == "patch-bank" and int(z["format_version"]) == 1
        assert z["patches"].dtype == np.uint8
        np.testing.assert_array_equal(z["patches"], bank.patches)
        assert [str(s) for s in z["images"]] == bank.images
    with zipfile.ZipFile(path) as zf:  # compressed: the demo scenario's patches deflate well
        assert all(i.compress_type == zipfile.ZIP_DEFLATED for i in zf.infolist())
        assert sum(i.compress_size for i in zf.infolist()) < sum(i.file_size for i in zf.infolist())


def test_extend_appends_mined_background(bank):
    n = len(bank)
    more = bank.extend(np.zeros((2, 24, 24), np.uint8), [[1, 2, 3, 4], [5, 6, 7, 8]], [0, 1],
                       KIND_MINED, images=["c.png", "new.png"])
    assert len(more) == n + 2 and more.images == ["a.png", "b.png", "c.png", "new.png"]
    assert more.image_index[-2:].tolist() == [2, 3] and more.labels[-2:].tolist() == [0, 0]
    assert more.counts()["mined"] == 2 and len(bank) == n


def _arrays(bank):
    """The arrays save_bank writes, read back plainly."""
    return {k: v for k, v in npzfile.read_npz(bank, kind="patch bank").items()}


@pytest.fixture(scope="module")
def small_bank_file(bank, tmp_path_factory):
    keep = np.r_[np.flatnonzero(bank.labels == 1)[:3], np.flatnonzero(bank.labels == 0)[:3]]
    small = PatchBank(bank.window, bank.patches[keep], bank.labels[keep], bank.kinds[keep],
                      bank.image_index[keep], bank.images, bank.boxes[keep], bank.augmentation[keep],
                      {"margin": MARGIN})
    path = tmp_path_factory.mktemp("small") / "small.npz"
    save_bank(path, small)
    return path


UNPICKLED = []


def _note_unpickled():
    UNPICKLED.append(True)
    return "unpickled"


class _Tripwire:
    def __reduce__(self):
        return (_note_unpickled, ())


def _refused(path, words):
    with pytest.raises(InputError) as err:
        load_bank(path)
    text = str(err.value)
    assert text.startswith(str(path) + ": ") and "\n" not in text
    assert words in text, text


def test_loader_refuses_bad_files(small_bank_file, tmp_path):
    good = _arrays(small_bank_file)

    def variant(name, **changes):
        arrays = dict(good)
        for k, v in changes.items():
            if v is None:
                del arrays[k]
            else:
                arrays[k] = v
        path = tmp_path / name
        npzfile.save_npz(path, arrays)
        return path

    data = small_bank_file.read_bytes()
    cut = tmp_path / "truncated.npz"
    cut.write_bytes(data[: len(data) // 2])
    _refused(cut, "truncated")
    _refused(tmp_path / "missing.npz", "no such patch bank file")
    model = tmp_path / "model.npz"
    save_model(model, Model((24, 24), np.array([[[0, 0, 2, 1, -1], [0, 1, 2, 1, 1]] + [[0] * 5] * 2], np.int32),
                            [[0]], [[0.0]], [[0.0, 1.0]], [-np.inf], "bagged"))
    _refused(model, "not a patch bank (this file holds a model)")
    _refused(variant("v9.npz", format_version=np.array(9, np.int64)), "unsupported patch bank format version 9")
    _refused(variant("float.npz", patches=good["patches"].astype(np.float32)), "dtype float32")
    _refused(variant("window.npz", window=np.array([20, 24], np.int32)), "do not fit the window 20x24")
    index = good["image_index"].copy()
    index[0] = len(good["images"])
    _refused(variant("index.npz", image_index=index), "image index out of range")
    _refused(variant("negindex.npz", image_index=-index - 1), "image index out of range")
    labels = good["labels"].copy()
    labels[0] = 0
    _refused(variant("labels.npz", labels=labels), "labels disagree with kinds")
    _refused(variant("nolabels.npz", labels=None), "'labels' is missing")
    _refused(variant("count.npz", labels=good["labels"][:-1]), "size 5 along axis 0")
    boxes = good["boxes"].copy()
    boxes[1, 2] = np.nan
    _refused(variant("nan.npz", boxes=boxes), "non-finite")
    _refused(variant("json.npz", metadata=np.array("{not json")), "metadata is not valid JSON")
    _refused(variant("margin.npz", metadata=np.array('{"margin": "wide"}')), "metadata margin")
    # object arrays are refused before anything is unpickled (numpy's own writer, which pickles them)
    pickled = tmp_path / "pickled.npz"
    np.savez(pickled, **{**good, "patches": np.array([_Tripwire()], dtype=object)})
    UNPICKLED.clear()
    _refused(pickled, "holds Python objects")
    assert UNPICKLED == []
    with pytest.raises(ValueError):  # and numpy.load(allow_pickle=False) agrees that it needs pickle
        np.load(pickled, allow_pickle=False)["patches"]
    assert UNPICKLED == []


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_loader_fuzz_gives_only_input_errors(small_bank_file, tmp_path, data):
    raw = bytearray(small_bank_file.read_bytes())
    edits = data.draw(st.lists(st.tuples(st.integers(0, len(raw) - 1), st.integers(0, 255)),
                               min_size=1, max_size=6))
    for pos, value in edits:
        raw[pos] = value
    if data.draw(st.booleans()):
        raw = raw[: data.draw(st.integers(0, len(raw)))]
    path = tmp_path / "fuzz.npz"
    path.write_bytes(bytes(raw))
    try:
        back = load_bank(path)
    except InputError as err:
        assert "\n" not in str(err) and str(err).startswith(str(path))
        return
    assert back.patches.shape[1:] == (back.window[1], back.window[0])
    assert back.image_index.max() < len(back.images)


@settings(max_examples=50, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(name=st.sampled_from(["window", "patches", "labels", "kinds", "image_index", "images",
                             "boxes", "augmentation", "metadata", "format_version", "kind"]),
       dtype=st.sampled_from(["uint8", "int32", "int64", "float32", "float64", "bool", "<U3"]),
       shape=st.lists(st.integers(0, 6), min_size=0, max_size=3), seed=st.integers(0, 2**16))
def test_loader_fuzz_replaced_arrays(small_bank_file, tmp_path, name, dtype, shape, seed):
    """Any one array swapped for another of random dtype, shape and values (numpy's own writer)."""
    rng = np.random.default_rng(seed)
    values = rng.integers(-3, 30, size=shape)
    arr = values.astype(str).astype(dtype) if dtype == "<U3" else values.astype(dtype)
    arrays = _arrays(small_bank_file)
    arrays[name] = arr
    path = tmp_path / "replaced.npz"
    np.savez(path, **arrays)
    try:
        back = load_bank(path)
    except InputError as err:
        assert "\n" not in str(err) and str(err).startswith(str(path))
        return
    assert back.patches.dtype == np.uint8
    assert back.patches.shape[1:] == (back.window[1], back.window[0])
    assert len(back.labels) == len(back.patches) == len(back.boxes)


# ------------------------------------------------------------------------------- errors


def _one_line(err: InputError, path) -> str:
    text = str(err)
    assert "\n" not in text and text.startswith(str(path) + ": ")
    return text


def test_harvest_errors_name_the_labels_file(folder, labels, tmp_path):
    path = folder / "labels.csv"
    empty = [type(it)(it.image) for it in labels.items]  # the same frames, none with a box
    with pytest.raises(InputError) as err:
        harvest(folder / "images", empty, labels_path=path)
    assert "no labelled boxes" in _one_line(err.value, path)
    tiny = [type(it)(it.image, [[1, 1, 1.5, 9], [5, 5, 9, 1]]) for it in labels.items]
    with pytest.raises(InputError) as err:
        harvest(folder / "images", tiny, labels_path=path)
    assert "smaller than 2 pixels" in _one_line(err.value, path)
    calls = []
    with pytest.raises(InputError) as err:
        harvest(folder / "images", labels.items, window=(100, 50), labels_path=path,
                progress=lambda d, t: calls.append(d))
    assert "window 100x50 is larger than every image (the largest is 96x72)" in _one_line(err.value, path)
    assert calls == []  # refused from the image headers, before any frame was cut


def run_cli(monkeypatch, capsys, *args):
    """`patchwood ARGS` in this process, through the console entry point: (exit code, out, err)."""
    monkeypatch.setattr(sys, "argv", ["patchwood", *map(str, args)])
    with pytest.raises(SystemExit) as stop:
        cli.main.run()
    captured = capsys.readouterr()
    return stop.value.code, captured.out, captured.err


@pytest.mark.parametrize("margin", [-0.5, float("nan"), float("inf"), "0.1", True])
def test_harvest_refuses_a_bad_margin(folder, labels, margin):
    """A margin that is not a finite number >= 0 is refused by name before any image is read
    (a margin of -0.5 would make the window's object side a division by zero)."""
    with pytest.raises(InputError, match="margin must be a number >= 0"):
        harvest(folder / "images", labels.items, margin=margin)


def _small_harvest(folder, tmp_path, monkeypatch, capsys, rows):
    """``patchwood harvest`` of the fixture's images with these label rows (one copy, 5 background
    windows an image): (labels path, bank path, exit code, stdout, stderr)."""
    labels = tmp_path / "rows.csv"
    labels.write_text("image,x,y,width,height\n" + "".join(row + "\n" for row in rows))
    out = tmp_path / "bank.npz"
    code, text, err = run_cli(monkeypatch, capsys, "harvest", folder / "images", labels,
                              "--out", out, "--copies", 1, "--negatives-per-image", 5)
    return labels, out, code, text, err


def test_harvest_command_says_why_the_larger_window(folder, tmp_path, monkeypatch, capsys):
    """Boxes of shorter side 40, 45 and 36 on the same frames: none is below the 40-pixel
    window's object side, 40 / 1.2 = 33.3, so the window is 40 on its shorter side, the median
    aspect ratio (40 / 40, 45 / 45, 50 / 36 -> 1.0) making it 40 x 40."""
    labels, out, code, text, err = _small_harvest(
        folder, tmp_path, monkeypatch, capsys,
        ["a.png,4,4,40,40", "b.png,30,20,45,45", "c.png,40,30,50,36"])
    assert code == 0, err
    assert ("window: 40x40 (inferred: the labels' median aspect ratio; shorter side 40, as 0% of "
            "the labelled objects are smaller than a 40-pixel window's object side of 33.3 pixels, "
            "at most the 20% it allows)") in text
    assert load_bank(out).window == (40, 40)
    # a window given is a window given
    code, text, err = run_cli(monkeypatch, capsys, "harvest", folder / "images", labels,
                              "--out", out, "--copies", 1, "--negatives-per-image", 5, "--window",
                              "24x24", "--force")
    assert code == 0, err
    assert "window: 24x24 (from --window)" in text
    assert "window_rule" not in load_bank(out).metadata


def test_harvest_command_notes_objects_below_the_window(folder, tmp_path, monkeypatch, capsys):
    """Five boxes of shorter side 40, 45, 50, 42 and 30: one of five (20 %) is below the 40-pixel
    window's object side, 40 / 1.2 = 33.33, which the rule allows; the note names that one and
    the object side as the window line rounds it (33.3, not 33.3333)."""
    _, _, code, text, err = _small_harvest(
        folder, tmp_path, monkeypatch, capsys,
        ["a.png,4,4,40,40", "a.png,50,10,45,45", "b.png,30,10,50,50", "c.png,2,2,42,42",
         "c.png,50,30,30,30"])
    assert code == 0, err
    assert "window: 40x40 (inferred:" in text and "as 20% of the labelled objects" in text
    assert ("note: 1 labelled object is smaller than the window's object side of 33.3 pixels; "
            "the scan enlarges images to find them") in text


def test_harvest_command(folder, tmp_path, monkeypatch, capsys):
    out = tmp_path / "bank.npz"
    code, text, err = run_cli(monkeypatch, capsys, "harvest", folder / "images", folder / "labels.csv",
                              "--out", out, "--margin", MARGIN, "--copies", COPIES,
                              "--negatives-per-image", 30)
    assert code == 0, err
    # the boxes' shorter sides 16, 32, 16, 20 with margin 0.25: three of four are below the
    # larger window's object side, 40 / 1.5 = 26.7
    assert ("window: 24x24 (inferred: the labels' median aspect ratio; shorter side 24, as 75% of "
            "the labelled objects are smaller than a 40-pixel window's object side of 26.7 pixels, "
            "more than the 20% it allows)") in text
    rule = load_bank(out).metadata["window_rule"]
    assert rule == {"short_side": 24, "larger_side": 40, "share_below_larger": 0.75,
                    "larger_object_side": 40 / 1.5, "share_allowed": 0.2}
    assert "16 object (4 boxes + 12 augmented copies)" in text
    assert "harvesting: 3/3 images" in err  # the progress bar's closing line off a terminal
    # the command writes what the library makes with the same settings
    lib = harvest(folder / "images", read_labels(folder / "labels.csv", images_dir=folder / "images").items,
                  margin=MARGIN, copies=COPIES, negatives_per_image=30, labels_path=folder / "labels.csv")
    np.testing.assert_array_equal(load_bank(out).patches, lib.patches)
    # --window is reported as such
    code, text, _ = run_cli(monkeypatch, capsys, "harvest", folder / "images", folder / "labels.csv",
                            "--out", tmp_path / "b2.npz", "--window", "32x16", "--copies", 0,
                            "--no-mirror", "--rotate", 0)  # options that ask for no copies
    assert code == 0 and "window: 32x16 (from --window)" in text
    assert load_bank(tmp_path / "b2.npz").patches.shape[1:] == (16, 32)
    # an existing bank is refused and left as it was
    before = out.read_bytes()
    code, text, err = run_cli(monkeypatch, capsys, "harvest", folder / "images", folder / "labels.csv",
                              "--out", out, "--seed", 5)
    assert code == 1 and err == f"error: {out}: patch bank exists; add --force to replace it\n"
    assert out.read_bytes() == before
    code, _, _ = run_cli(monkeypatch, capsys, "harvest", folder / "images", folder / "labels.csv",
                         "--out", out, "--seed", 5, "--force")
    assert code == 0 and out.read_bytes() != before


def test_harvest_command_errors(folder, tmp_path, monkeypatch, capsys):
    images, out = folder / "images", tmp_path / "bank.npz"
    (tmp_path / "none.csv").write_text("image,x,y,width,height\na.png,,,,,\nb.png,,,,,\n")
    (tmp_path / "tiny.csv").write_text("image,x,y,width,height\na.png,3,3,1.5,5\nc.png,4,4,8,1\n")
    cases = [
        (["harvest", images, tmp_path / "none.csv", "--out", out], 1,
         f"error: {tmp_path / 'none.csv'}: no labelled boxes to learn from (every image is object-free)"),
        (["harvest", images, tmp_path / "tiny.csv", "--out", out], 1,
         f"error: {tmp_path / 'tiny.csv'}: every labelled box is smaller than 2 pixels"),
        (["harvest", images, folder / "labels.csv", "--out", out, "--window", "200x40"], 1,
         f"error: {folder / 'labels.csv'}: window 200x40 is larger than every image (the largest is 96x72)"),
    ]
    for args, want_code, want in cases:
        code, _, err = run_cli(monkeypatch, capsys, *args)
        assert (code, err) == (want_code, want + "\n")
        assert not out.exists()
    for bad in ("24", "2x2", "24x24x1"):
        code, _, err = run_cli(monkeypatch, capsys, "harvest", images, folder / "labels.csv",
                               "--out", out, "--window", bad)
        assert code == 2 and err.count("\n") == 1 and "window" in err
    # through Typer's test runner the library error is the exception itself
    result = CliRunner().invoke(cli.main.app, ["harvest", str(images), str(tmp_path / "none.csv"),
                                               "--out", str(out)])
    assert isinstance(result.exception, InputError) and result.exception.path == str(tmp_path / "none.csv")
    assert not out.exists()


_coordinate = st.floats(-50, 150, width=32)
_side = st.one_of(st.floats(0, 80, width=32), st.sampled_from([0.0, 1e-30, 10.0]))


@settings(max_examples=300, deadline=None)
@given(st.tuples(_coordinate, _coordinate, _side, _side),
       st.lists(st.tuples(_coordinate, _coordinate, _side, _side), max_size=6),
       st.sampled_from([0.0, 0.1, 0.3, 1 / 3, 0.5, 1.0]))
def test_overlaps_decides_as_the_iou_matrix_does(box, others, max_iou):
    """The harvest's per-box check against detector.geometry.iou (numpy, pycocotools' order of
    arithmetic): the same decision for every box, shared edges, zero areas and a threshold of 0
    (where iou's 0 for boxes that do not meet is >= 0). The box is float32 on both sides, as the
    bank stores it and plan_background passes it (a side of 1e-30 as a double is another number
    than as a float32, and then IoU 1 with a box of that double side is not 1 with the other)."""
    box32 = np.asarray([box], np.float32)
    expected = bool(len(others)) and bool(np.max(iou(box32, others)) >= max_iou)
    assert overlaps(box32[0].tolist(), [tuple(float(v) for v in o) for o in others], max_iou) == expected


def test_overlaps_on_touching_and_nested_boxes():
    # nested: 4 x 4 inside 8 x 8 is 16 / 64 = 0.25; touching edges share no area
    assert overlaps((2.0, 2.0, 4.0, 4.0), [(0.0, 0.0, 8.0, 8.0)], 0.25)
    assert not overlaps((2.0, 2.0, 4.0, 4.0), [(0.0, 0.0, 8.0, 8.0)], 0.2501)
    assert not overlaps((8.0, 0.0, 4.0, 4.0), [(0.0, 0.0, 8.0, 8.0)], 1e-9)
    assert not overlaps((0.0, 0.0, 4.0, 4.0), [], 0.0)
