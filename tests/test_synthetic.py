"""The demo scenario renderer (synthetic_images) and `patchwood synth`."""

from __future__ import annotations

import csv
import functools
import math
import sys

import cv2
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from skimage.draw import polygon2mask
from typer.testing import CliRunner

from detector.errors import InputError
from synthetic_images import (
    LABELLED_SHARE,
    NUT_SIZES,
    frame_name,
    render_frame,
    render_scenario,
    split_counts,
)
from synthetic_images.geometry import (
    box_around,
    clip_polygon,
    hexagon_box_side,
    hexagon_corners,
    polygon_area,
    visible_fraction,
)
from synthetic_images.render import _convex_cover

SEEDS = st.integers(min_value=0, max_value=2**32 - 1)
FEW = settings(max_examples=25, deadline=None)


@functools.lru_cache(maxsize=1)
def _frames():
    """Frames of seeds 0..39, shared by the tests that look at many nuts."""
    return tuple(render_frame(seed) for seed in range(40))


def _mask_bounds(mask):
    """Pixel-edge bounds x0, x1, y0, y1 of a mask's pixels (pixel c spans [c, c + 1))."""
    rows = np.nonzero(mask.any(axis=1))[0]
    cols = np.nonzero(mask.any(axis=0))[0]
    return cols[0], cols[-1] + 1, rows[0], rows[-1] + 1


def _read_labels(path):
    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    return rows[0], rows[1:]


# ---------------------------------------------------------------------------------------------
# geometry, against hand-worked values


def test_hexagon_area_and_box_side_hand_worked():
    # regular hexagon, circumradius R: area = (3 * sqrt(3) / 2) * R^2; R = 10 -> 259.8076...
    corners = hexagon_corners(5.0, 7.0, 10.0, 0.4)
    assert polygon_area(corners) == pytest.approx(1.5 * math.sqrt(3.0) * 100.0, rel=1e-12)
    # corner on +x at angle 0: box 2R wide, sqrt(3) R high -> longer side 2R
    assert hexagon_box_side(0.0) == pytest.approx(2.0)
    # at 15 degrees the box is square: both sides 2 R cos(15 deg) = 1.93185...
    c = hexagon_corners(0.0, 0.0, 1.0, math.radians(15.0))
    assert np.ptp(c[:, 0]) == pytest.approx(2.0 * math.cos(math.radians(15.0)))
    assert np.ptp(c[:, 1]) == pytest.approx(2.0 * math.cos(math.radians(15.0)))


def test_clip_and_box_hand_worked():
    square = np.array([[-1.0, -1.0], [3.0, -1.0], [3.0, 3.0], [-1.0, 3.0]])
    # the 4x4 square clipped to [0, 2] x [0, 5] keeps [0, 2] x [0, 3]: area 6
    assert polygon_area(clip_polygon(square, 0.0, 0.0, 2.0, 5.0)) == pytest.approx(6.0)
    assert len(clip_polygon(square, 5.0, 5.0, 9.0, 9.0)) == 0
    # a hexagon centred on the rectangle's edge is cut in half (central symmetry)
    assert visible_fraction(hexagon_corners(50.0, 20.0, 12.0, 1.1), 0.0, 20.0, 100.0, 90.0) == pytest.approx(0.5)
    # rounding outward to 0.5 px: 10.2 -> 10.0, 20.7 -> 21.0, 5.0 stays, 9.1 -> 9.5
    pts = np.array([[10.2, 5.0], [20.7, 5.0], [15.0, 9.1]])
    np.testing.assert_allclose(box_around(pts), [10.0, 5.0, 11.0, 4.5])


@FEW
@given(
    cx=st.floats(-20, 120), cy=st.floats(-20, 120), radius=st.floats(2, 60),
    angle=st.floats(0, 2 * math.pi), cut=st.floats(-30, 130),
)
def test_clip_splits_area_exactly(cx, cy, radius, angle, cut):
    # property: the parts left and right of a vertical line add up to the whole hexagon
    hexagon = hexagon_corners(cx, cy, radius, angle)
    big = 1e6
    left = polygon_area(clip_polygon(hexagon, -big, -big, cut, big))
    right = polygon_area(clip_polygon(hexagon, cut, -big, big, big))
    assert left + right == pytest.approx(polygon_area(hexagon), rel=1e-9, abs=1e-9)
    inside = clip_polygon(hexagon, 0.0, 10.0, 100.0, 90.0)
    if len(inside):
        assert inside[:, 0].min() >= 0.0 and inside[:, 0].max() <= 100.0
        assert inside[:, 1].min() >= 10.0 and inside[:, 1].max() <= 90.0


def test_convex_cover_sums_to_hexagon_area():
    # supersampled coverage (16 points per pixel) of a hexagon with R = 20 must add up to
    # (3 sqrt(3) / 2) * 400 = 1039.23 px^2 within 0.5 %
    polygon = hexagon_corners(40.3, 37.8, 20.0, 0.3)
    cover = _convex_cover((0, 0, 80, 80), polygon)
    assert cover.min() >= 0.0 and cover.max() <= 1.0
    assert cover.sum() == pytest.approx(1.5 * math.sqrt(3.0) * 400.0, rel=5e-3)


# ---------------------------------------------------------------------------------------------
# frames: labels against the drawn pixels


@FEW
@given(seed=SEEDS)
def test_boxes_enclose_drawn_nut_pixels_within_one_pixel(seed):
    frame = render_frame(seed)
    height, width = frame.image.shape
    top, bottom = frame.belt_rows
    assert len(frame.boxes) == len(frame.masks) == sum(n.labelled for n in frame.nuts)
    for (x, y, w, h), mask in zip(frame.boxes, frame.masks):
        assert mask.any(), "a box without drawn nut pixels"
        x0, x1, y0, y1 = _mask_bounds(mask)
        # the box encloses the drawn pixels, and is tight, within 1 px on every side
        assert x - 1 <= x0 <= x + 1 and x + w - 1 <= x1 <= x + w + 1
        assert y - 1 <= y0 <= y + 1 and y + h - 1 <= y1 <= y + h + 1
        # nothing drawn or labelled outside the frame or on the rails
        assert 0 <= x and x + w <= width and top <= y and y + h <= bottom
        # a hexagon fills between 0.698 (at 15 deg: 2.598 / 1.932^2) and 0.75 of its box;
        # clipped pieces and edge pixels stay above 0.6
        assert mask.sum() >= 0.6 * w * h
        # and it leaves a mark: dark hole against the face and specular ring
        pixels = frame.image[mask].astype(float)
        assert np.percentile(pixels, 95) - np.percentile(pixels, 5) > 25.0


@FEW
@given(seed=SEEDS)
def test_nut_masks_agree_with_skimage_polygon_raster(seed):
    # reference: skimage.draw.polygon2mask marks pixels whose centre lies inside the polygon
    # (pixel centres at integer coordinates there, at c + 0.5 here)
    frame = render_frame(seed)
    top, bottom = frame.belt_rows
    for nut in frame.nuts:
        ref = polygon2mask(frame.image.shape, (nut.polygon - 0.5)[:, ::-1])
        ref[:top] = False
        ref[bottom:] = False
        assert not (ref & ~nut.mask).any(), "a pixel centre inside the nut is not in its mask"
        grown = cv2.dilate(ref.astype(np.uint8), np.ones((3, 3), np.uint8)).astype(bool)
        assert not (nut.mask & ~grown).any(), "mask reaches more than one pixel past the outline"


def test_more_than_half_hidden_nuts_are_drawn_but_not_labelled():
    hidden = partly_visible = 0
    for frame in _frames():
        height, width = frame.image.shape
        top, bottom = frame.belt_rows
        labelled_boxes = {tuple(b) for b in frame.boxes}
        for nut in frame.nuts:
            # outside check of the visible share: count the pixel centres of the hexagon drawn
            # 2x larger with skimage.draw.polygon2mask, and those of them on the visible belt
            k = 2
            lo = np.floor(nut.polygon.min(axis=0)) - 1.0
            shape = tuple(int(v) for v in (np.ceil(np.ptp(nut.polygon, axis=0)) + 3.0)[::-1] * k)
            full = polygon2mask(shape, ((nut.polygon - lo) * k - 0.5)[:, ::-1])
            ys = lo[1] + (np.arange(shape[0]) + 0.5) / k
            xs = lo[0] + (np.arange(shape[1]) + 0.5) / k
            seen = ((ys >= top) & (ys < bottom))[:, None] & ((xs >= 0) & (xs < width))[None, :]
            share = (full & seen).sum() / full.sum()
            assert nut.visible_fraction == pytest.approx(share, abs=0.01)
            if abs(share - LABELLED_SHARE) > 0.01:
                assert nut.labelled == (share >= LABELLED_SHARE)
            assert (tuple(nut.box) in labelled_boxes) == nut.labelled
            hidden += not nut.labelled
            partly_visible += nut.labelled and nut.visible_fraction < 0.95
    # the rule was exercised both ways (seeds 0-39 hold 10 hidden and 10 partly visible nuts)
    assert hidden >= 2 and partly_visible >= 2


def test_nut_sizes_within_20_to_120_pixels():
    sizes = []
    for frame in _frames():
        for nut in frame.nuts:
            assert NUT_SIZES[0] <= nut.size <= NUT_SIZES[1]
            # size is the longer side of the unclipped hexagon's box
            assert nut.size == pytest.approx(max(np.ptp(nut.polygon, axis=0)), rel=1e-9)
            if nut.visible_fraction == 1.0:
                # the label box is that box rounded outward to 0.5 px: at most 1 px longer
                longer = max(nut.box[2], nut.box[3])
                assert nut.size <= longer <= nut.size + 1.0
            sizes.append(nut.size)
    # log-uniform over [20, 120]: both ends of the range turn up in ~120 nuts
    assert min(sizes) < 30.0 and max(sizes) > 80.0


def test_frame_is_deterministic_and_empty_frames_have_no_nuts():
    a, b = render_frame(11), render_frame(np.random.default_rng(11))
    assert np.array_equal(a.image, b.image) and np.array_equal(a.boxes, b.boxes)
    assert not np.array_equal(a.image, render_frame(12).image)
    empty = render_frame(5, empty=True)
    assert empty.boxes.shape == (0, 4) and empty.nuts == [] and empty.masks == []
    big = render_frame(5, 640, 480)
    assert big.image.shape == (480, 640) and big.image.dtype == np.uint8
    with pytest.raises(ValueError):
        render_frame(0, 100, 240)


# ---------------------------------------------------------------------------------------------
# the scenario on disk


def _files(root):
    return {p.relative_to(root).as_posix(): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


def test_same_seed_gives_byte_identical_files_and_other_seed_differs(tmp_path):
    a = render_scenario(tmp_path / "a", train_images=4, test_images=2, seed=9)
    render_scenario(tmp_path / "b", train_images=4, test_images=2, seed=9)
    render_scenario(tmp_path / "c", train_images=4, test_images=2, seed=10)
    fa, fb, fc = _files(tmp_path / "a"), _files(tmp_path / "b"), _files(tmp_path / "c")
    assert sorted(fa) == [
        "test/images/frame_0001.png", "test/images/frame_0002.png", "test/labels.csv",
        "train/images/frame_0001.png", "train/images/frame_0002.png", "train/images/frame_0003.png",
        "train/images/frame_0004.png", "train/labels.csv",
    ]
    assert fa == fb
    assert all(fa[k] != fc[k] for k in fa if k.endswith(".png"))
    # train and test come from different seed streams
    assert fa["train/images/frame_0001.png"] != fa["test/images/frame_0001.png"]
    img = cv2.imread(str(tmp_path / "a" / "train" / "images" / "frame_0001.png"), cv2.IMREAD_UNCHANGED)
    assert img.dtype == np.uint8 and img.shape == (240, 320)
    assert a["train"]["frames"] == 4 and a["test"]["frames"] == 2


def test_written_labels_follow_the_contract_and_empty_share(tmp_path):
    summary = render_scenario(tmp_path, train_images=20, test_images=14, seed=1)
    for split, n in (("train", 20), ("test", 14)):
        header, rows = _read_labels(tmp_path / split / "labels.csv")
        assert header == ["image", "x", "y", "width", "height", "label"]
        names = {frame_name(i) for i in range(1, n + 1)}
        assert {r[0] for r in rows} == names
        assert {p.name for p in (tmp_path / split / "images").iterdir()} == names
        empty = {r[0] for r in rows if r[1:5] == ["", "", "", ""]}
        assert all(r[5] == "" for r in rows if r[0] in empty)
        assert all(r[5] == "nut" and float(r[3]) > 0 and float(r[4]) > 0 for r in rows if r[0] not in empty)
        # 15 % of frames without nuts: 3 of 20, 2 of 14 (14.3 %) -- within the required 10-20 %
        assert 0.10 <= len(empty) / n <= 0.20
        assert summary[split]["frames_without_nuts"] == len(empty)
        assert summary[split]["nuts"] == len(rows) - len(empty)
        # boxes lie inside the frame; values are multiples of 0.5 px
        for r in rows:
            if r[0] not in empty:
                x, y, w, h = map(float, r[1:5])
                assert 0 <= x and x + w <= 320 and 0 <= y and y + h <= 240
                assert all((2 * v).is_integer() for v in (x, y, w, h))


def test_refuses_non_empty_folder_unless_forced(tmp_path):
    render_scenario(tmp_path, train_images=3, test_images=1, seed=0)
    keep = tmp_path / "train" / "notes.txt"
    keep.write_text("mine")
    with pytest.raises(InputError) as err:
        render_scenario(tmp_path, train_images=2, test_images=1, seed=0)
    assert str(tmp_path / "train") in str(err.value) and "\n" not in str(err.value)
    render_scenario(tmp_path, train_images=2, test_images=1, seed=0, force=True)
    # earlier frames beyond the new count are gone, the user's own file stays
    assert sorted(p.name for p in (tmp_path / "train" / "images").iterdir()) == [
        "frame_0001.png", "frame_0002.png"]
    assert keep.read_text() == "mine"
    (tmp_path / "blocked").write_text("a file")
    with pytest.raises(InputError, match="not a folder"):
        render_scenario(tmp_path / "blocked", train_images=1, test_images=1)
    with pytest.raises(InputError):
        render_scenario(tmp_path / "x", train_images=0, test_images=1)
    with pytest.raises(InputError):
        render_scenario(tmp_path / "x", size=(320, 50))


def test_split_counts():
    assert split_counts(200) == (160, 40)
    assert split_counts(10) == (8, 2)
    assert split_counts(2) == (1, 1)
    with pytest.raises(InputError):
        split_counts(1)


# ---------------------------------------------------------------------------------------------
# the command


def _app():
    from cli.main import app  # the real command line: an import error here is a failure

    return app


def test_cli_synth_writes_and_reports(tmp_path):
    out = tmp_path / "demo"
    result = CliRunner().invoke(_app(), ["synth", str(out), "--frames", "3", "--seed", "3", "--size", "640x480"])
    assert result.exit_code == 0, result.output
    # 3 images split 80/20 -> round(0.6) = 1 test, 2 train
    assert "train 2 frames (0 without nuts)" in result.output
    assert "test  1 frame (0 without nuts)" in result.output
    assert len(list((out / "train" / "images").glob("frame_*.png"))) == 2
    img = cv2.imread(str(out / "test" / "images" / "frame_0001.png"), cv2.IMREAD_UNCHANGED)
    assert img.shape == (480, 640)
    result = CliRunner().invoke(_app(), ["synth", str(tmp_path / "d2"), "--train-frames", "2", "--test-frames", "2"])
    assert result.exit_code == 0, result.output
    assert len(list((tmp_path / "d2" / "test" / "images").glob("*.png"))) == 2


@pytest.mark.parametrize("size", ["320", "320x", "axb", "64x48", "320x240x3"])
def test_cli_bad_size_is_a_usage_error(tmp_path, size):
    result = CliRunner().invoke(_app(), ["synth", str(tmp_path / "o"), "--size", size])
    assert result.exit_code == 2
    errors = [line for line in result.output.splitlines() if "Invalid value for '--size'" in line]
    assert len(errors) == 1 and repr(size) in errors[0]
    assert not (tmp_path / "o").exists()


def test_cli_non_empty_folder_is_a_one_line_error(tmp_path, monkeypatch, capsys):
    import cli.main as main
    render_scenario(tmp_path, train_images=1, test_images=1)
    monkeypatch.setattr(sys, "argv", ["patchwood", "synth", str(tmp_path), "--frames", "2"])
    with pytest.raises(SystemExit) as stop:
        main.run()
    assert stop.value.code == 1
    err = capsys.readouterr().err.strip()
    assert "\n" not in err and str(tmp_path / "train") in err and "--force" in err
