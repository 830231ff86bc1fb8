"""Reading images: grayscale conversion, bit depths, EXIF orientation, bad files, finding files.

References: OpenCV (cv2.imencode / cv2.imdecode / cv2.cvtColor) for pixels and sizes; the PNG
specification (ISO/IEC 15948) for the hand-built PNG files, TIFF 6.0 for the hand-built TIFF
headers; EXIF 2.3 (tag 0x0112) and TIFF 6.0 (tag 274) for the orientation table; ITU-R BT.601
luma weights (0.299, 0.587, 0.114) for hand-worked gray values.
"""

from __future__ import annotations

import struct
import zlib

import cv2
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from detector.errors import InputError
from detector.io.images import (IMAGE_SUFFIXES, header_size, image_size, list_images,
                             max_pixels_limit, read_gray)


def _write(path, img, ext=".png", params=()):
    ok, buf = cv2.imencode(ext, img, list(params))
    assert ok
    path.write_bytes(buf.tobytes())
    return path


def _chunk(kind: bytes, data: bytes) -> bytes:
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))


def _png(width, height, bit_depth, color_type, rows: list[bytes], extra=b"") -> bytes:
    """A PNG file put together by hand (ISO/IEC 15948): filter type 0 on every row."""
    ihdr = struct.pack(">IIBBBBB", width, height, bit_depth, color_type, 0, 0, 0)
    raw = b"".join(b"\x00" + row for row in rows)
    return (b"\x89PNG\r\n\x1a\n" + _chunk(b"IHDR", ihdr) + extra
            + _chunk(b"IDAT", zlib.compress(raw)) + _chunk(b"IEND", b""))


def _exif_tiff(orientation: int, little_endian: bool) -> bytes:
    """A TIFF-structured EXIF block with one IFD entry: Orientation (0x0112), SHORT, count 1."""
    o = "<" if little_endian else ">"
    return ((b"II" if little_endian else b"MM") + struct.pack(o + "HI", 42, 8)
            + struct.pack(o + "H", 1) + struct.pack(o + "HHIHH", 0x0112, 3, 1, orientation, 0)
            + struct.pack(o + "I", 0))


def _with_app1(jpeg: bytes, orientation: int, little_endian: bool) -> bytes:
    """The JPEG with an APP1 'Exif' segment inserted right after the SOI marker."""
    payload = b"Exif\x00\x00" + _exif_tiff(orientation, little_endian)
    return jpeg[:2] + b"\xff\xe1" + struct.pack(">H", len(payload) + 2) + payload + jpeg[2:]


# How a viewer turns the stored pixels for each EXIF orientation value (EXIF 2.3, tag 0x0112).
ORIENT = {
    1: lambda a: a,
    2: np.fliplr,
    3: lambda a: np.rot90(a, 2),
    4: np.flipud,
    5: lambda a: a.T,  # transpose
    6: lambda a: np.rot90(a, -1),  # a quarter turn clockwise
    7: lambda a: np.rot90(a, 2).T,  # transverse
    8: lambda a: np.rot90(a, 1),  # a quarter turn counter-clockwise
}


def _scene(h=24, w=40, seed=0):
    rng = np.random.default_rng(seed)
    return rng.integers(0, 256, (h, w, 3), dtype=np.uint8)


# ---------------------------------------------------------------------------------------------
# pixels


def test_color_png_matches_cv2_cvtcolor(tmp_path):
    bgr = _scene()
    bgr[0, 0] = (10, 100, 200)  # B, G, R
    gray = read_gray(_write(tmp_path / "c.png", bgr))
    assert gray.dtype == np.uint8 and gray.shape == (24, 40)
    np.testing.assert_array_equal(gray, cv2.cvtColor(bgr, cv2.COLOR_BGR2GRAY))  # reference: cv2
    # BT.601 by hand: 0.299 * 200 + 0.587 * 100 + 0.114 * 10 = 59.8 + 58.7 + 1.14 = 119.64 -> 120
    assert gray[0, 0] == 120


def test_gray_png_is_returned_unchanged(tmp_path):
    img = _scene()[:, :, 0]
    np.testing.assert_array_equal(read_gray(_write(tmp_path / "g.png", img)), img)


def test_rgba_png_drops_alpha(tmp_path):
    bgr = _scene(seed=1)
    alpha = np.random.default_rng(2).integers(0, 256, bgr.shape[:2], dtype=np.uint8)
    bgra = np.dstack([bgr, alpha])
    gray = read_gray(_write(tmp_path / "a.png", bgra))
    np.testing.assert_array_equal(gray, cv2.cvtColor(bgr, cv2.COLOR_BGR2GRAY))


def test_gray_plus_alpha_png_keeps_the_gray(tmp_path):
    # color type 4 (gray + alpha), 8 bits: rows of (gray, alpha) pairs
    rows = [bytes([v, 128] * 4) for v in (10, 20, 30)]
    path = tmp_path / "ga.png"
    path.write_bytes(_png(4, 3, 8, 4, rows))
    np.testing.assert_array_equal(read_gray(path), np.repeat([[10], [20], [30]], 4, axis=1))


def test_palette_png(tmp_path):
    # color type 3 with a PLTE of four RGB entries; gray by BT.601:
    # red 0.299*255 = 76.2 -> 76; green 0.587*255 = 149.7 -> 150; blue 0.114*255 = 29.1 -> 29;
    # (10, 20, 30): 2.99 + 11.74 + 3.42 = 18.15 -> 18
    plte = _chunk(b"PLTE", bytes([255, 0, 0, 0, 255, 0, 0, 0, 255, 10, 20, 30]))
    index = [[0, 1, 2, 3], [3, 2, 1, 0]]
    path = tmp_path / "palette.png"
    path.write_bytes(_png(4, 2, 8, 3, [bytes(r) for r in index], extra=plte))
    np.testing.assert_array_equal(read_gray(path), [[76, 150, 29, 18], [18, 29, 150, 76]])


def test_16_bit_png_shift_and_range(tmp_path):
    img = np.array([[1000, 2000, 3000], [65535, 256, 255]], np.uint16)
    path = _write(tmp_path / "deep.png", img)
    # shift: the high byte, value >> 8: 1000 >> 8 = 3, 2000 >> 8 = 7, 3000 >> 8 = 11, 65535 -> 255
    np.testing.assert_array_equal(read_gray(path), [[3, 7, 11], [255, 1, 0]])
    # same as what cv2.imread gives for a 16-bit PNG by default (reference: cv2)
    np.testing.assert_array_equal(read_gray(path), cv2.imdecode(np.fromfile(path, np.uint8),
                                                                cv2.IMREAD_GRAYSCALE))
    # range: (v - 255) * 255 / (65535 - 255), rounded: 1000 -> 2.91 -> 3; 2000 -> 6.82 -> 7;
    # 3000 -> 10.72 -> 11; 256 -> 0.0039 -> 0; 65535 -> 255; 255 -> 0
    np.testing.assert_array_equal(read_gray(path, depth_scaling="range"), [[3, 7, 11], [255, 0, 0]])
    small = _write(tmp_path / "twelve.png", np.array([[0, 2048, 4095]], np.uint16))
    # a 12-bit camera: range keeps the contrast, 4095 * 255 / 4095 = 255, 2048 * 255/4095 = 127.5
    np.testing.assert_array_equal(read_gray(small, depth_scaling="range"), [[0, 128, 255]])
    np.testing.assert_array_equal(read_gray(small), [[0, 8, 15]])


def test_16_bit_color_png(tmp_path):
    img = np.random.default_rng(3).integers(0, 65536, (6, 5, 3), dtype=np.uint16)
    gray = read_gray(_write(tmp_path / "c16.png", img))
    np.testing.assert_array_equal(gray, cv2.cvtColor(img, cv2.COLOR_BGR2GRAY) >> 8)


def test_float_tiff_is_taken_as_0_to_1(tmp_path):
    img = np.array([[0.0, 0.5, 1.0, 2.0, -1.0]], np.float32)
    # 0.5 * 255 = 127.5 -> 128; values outside 0..1 are clipped
    np.testing.assert_array_equal(read_gray(_write(tmp_path / "f.tif", img, ".tif")),
                                  [[0, 128, 255, 255, 0]])


@pytest.mark.parametrize("ext", [".bmp", ".tif", ".jpg"])
def test_other_formats(tmp_path, ext):
    bgr = _scene(seed=4)
    path = _write(tmp_path / f"frame{ext}", bgr, ext)
    reference = cv2.cvtColor(cv2.imdecode(np.fromfile(path, np.uint8), cv2.IMREAD_COLOR),
                             cv2.COLOR_BGR2GRAY)
    np.testing.assert_array_equal(read_gray(path), reference)
    assert image_size(path) == (40, 24)


@pytest.mark.parametrize("orientation", range(1, 9))
def test_exif_orientation_of_jpeg(tmp_path, orientation):
    ok, buf = cv2.imencode(".jpg", _scene(seed=5), [cv2.IMWRITE_JPEG_QUALITY, 95])
    plain = tmp_path / "plain.jpg"
    plain.write_bytes(buf.tobytes())
    turned = tmp_path / "turned.jpg"
    turned.write_bytes(_with_app1(buf.tobytes(), orientation, little_endian=orientation % 2 == 0))
    stored = read_gray(plain)
    shown = read_gray(turned)
    # the decoder output is the same; only the arrangement of the pixels differs
    np.testing.assert_array_equal(shown, ORIENT[orientation](stored))
    assert image_size(turned) == (shown.shape[1], shown.shape[0])
    assert image_size(turned) == ((24, 40) if orientation >= 5 else (40, 24))


def test_exif_orientation_of_png(tmp_path):
    img = _scene(seed=6)[:, :, 1]
    rows = [r.tobytes() for r in img]
    exif = _chunk(b"eXIf", _exif_tiff(6, little_endian=False))
    path = tmp_path / "turned.png"
    path.write_bytes(_png(40, 24, 8, 0, rows, extra=exif))
    np.testing.assert_array_equal(read_gray(path), np.rot90(img, -1))
    assert image_size(path) == (24, 40)


def test_non_ascii_path_with_spaces(tmp_path):
    folder = tmp_path / "naïve Ördner"
    folder.mkdir()
    path = folder / "frame 1 – ü.png"
    img = _scene(seed=7)[:, :, 2]
    path.write_bytes(cv2.imencode(".png", img)[1].tobytes())
    np.testing.assert_array_equal(read_gray(path), img)
    assert image_size(path) == (40, 24)


# ---------------------------------------------------------------------------------------------
# bad files: one InputError, "<path>: cannot read image: <reason>"


def _message(path, **kw) -> str:
    with pytest.raises(InputError) as info:
        read_gray(path, **kw)
    return str(info.value)


def test_zero_byte_file(tmp_path):
    path = tmp_path / "empty.png"
    path.write_bytes(b"")
    assert _message(path) == f"{path}: cannot read image: the file is empty (0 bytes)"


def test_truncated_png(tmp_path):
    path = _write(tmp_path / "cut.png", _scene(seed=8))
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    assert _message(path) == f"{path}: cannot read image: the PNG data ends early (truncated file)"


def test_truncated_jpeg(tmp_path):
    path = _write(tmp_path / "cut.jpg", _scene(seed=8), ".jpg")
    data = path.read_bytes()
    path.write_bytes(data[:-2])  # only the end-of-image marker is gone
    assert _message(path) == (f"{path}: cannot read image: the JPEG data ends early "
                              "(truncated file)")


def test_text_file_named_png(tmp_path):
    path = tmp_path / "notes.png"
    path.write_text("this is not an image\n")
    assert _message(path) == (f"{path}: cannot read image: not a PNG, JPEG, BMP or TIFF file "
                              "(unrecognised content)")


def test_missing_file_and_folder(tmp_path):
    missing = tmp_path / "nope.png"
    assert _message(missing) == f"{missing}: cannot read image: no such file"
    assert _message(tmp_path) == f"{tmp_path}: cannot read image: it is a folder, not a file"
    with pytest.raises(InputError, match="no such file"):
        image_size(tmp_path / "nope.png")


def test_size_cap(tmp_path):
    path = _write(tmp_path / "big.png", _scene())  # 40 x 24 = 960 pixels
    assert _message(path, max_pixels=959) == (f"{path}: cannot read image: 40 x 24 pixels is more "
                                              "than the limit of 959 pixels")
    assert read_gray(path, max_pixels=960).shape == (24, 40)
    tif = _write(tmp_path / "big.tif", _scene(), ".tif")  # from the TIFF header too
    assert "40 x 24 pixels is more than the limit" in _message(tif, max_pixels=100)


def test_size_cap_from_the_environment(tmp_path, monkeypatch):
    path = _write(tmp_path / "big.png", _scene())  # 40 x 24 = 960 pixels
    monkeypatch.setenv("PATCHWOOD_MAX_MEGAPIXELS", "0.0009")  # 900 pixels
    assert max_pixels_limit() == 900
    assert _message(path) == (f"{path}: cannot read image: 40 x 24 pixels is more than the limit "
                              "of 900 pixels (0.0009 megapixels; set PATCHWOOD_MAX_MEGAPIXELS to "
                              "raise it)")
    assert read_gray(path, max_pixels=None).shape == (24, 40)  # an explicit limit wins
    monkeypatch.setenv("PATCHWOOD_MAX_MEGAPIXELS", " 0.00096 ")  # 960 pixels: just fits
    assert read_gray(path).shape == (24, 40)
    monkeypatch.delenv("PATCHWOOD_MAX_MEGAPIXELS")
    assert max_pixels_limit() == 100_000_000
    for bad in ("many", "0", "-2", "inf", "nan", "1e400"):
        monkeypatch.setenv("PATCHWOOD_MAX_MEGAPIXELS", bad)
        with pytest.raises(InputError) as info:
            read_gray(path)
        assert str(info.value) == ("the environment variable PATCHWOOD_MAX_MEGAPIXELS must be a "
                                   f"number of megapixels > 0, got {bad!r}")


def _tiff_claiming(width: int, height: int, orientation: int = 1) -> bytes:
    """A little-endian TIFF (TIFF 6.0) whose first IFD claims a size (LONG) and an orientation
    (SHORT), with no usable strips."""
    entries = [(256, 4, width), (257, 4, height), (274, 3, orientation)]
    ifd = struct.pack("<H", len(entries)) + b"".join(
        struct.pack("<HHI", tag, kind, 1) + (struct.pack("<I", v) if kind == 4
                                             else struct.pack("<HH", v, 0))
        for tag, kind, v in entries) + struct.pack("<I", 0)
    return b"II*\x00" + struct.pack("<I", 8) + ifd


def test_tiff_header_size_claim_is_checked_before_decoding(tmp_path):
    path = tmp_path / "bomb.tif"
    path.write_bytes(_tiff_claiming(30000, 20000))
    assert "30000 x 20000 pixels is more than the limit of 100,000,000" in _message(path)
    assert header_size(path) == (30000, 20000)
    path.write_bytes(_tiff_claiming(300, 200, orientation=6))  # a quarter turn: sides swap
    assert header_size(path) == (200, 300)


@pytest.mark.parametrize("orientation", range(1, 9))
def test_tiff_orientation(tmp_path, orientation):
    from PIL import Image, TiffImagePlugin

    img = _scene(seed=10)[:, :, 0]
    info = TiffImagePlugin.ImageFileDirectory_v2()
    info[274] = orientation  # TIFF 6.0 Orientation: the same table as EXIF 2.3 tag 0x0112
    path = tmp_path / "turned.tif"
    Image.fromarray(img).save(path, tiffinfo=info)  # Pillow only writes the file here
    shown = read_gray(path)
    np.testing.assert_array_equal(shown, ORIENT[orientation](img))  # the table above
    assert image_size(path) == header_size(path) == (shown.shape[1], shown.shape[0])


def test_header_size_claim_is_checked_before_decoding(tmp_path):
    # an IHDR claiming 50000 x 50000 (2.5 gigapixels) with a few bytes of data
    path = tmp_path / "bomb.png"
    path.write_bytes(_png(50000, 50000, 8, 0, [b"\x00" * 4]))
    assert "50000 x 50000 pixels is more than the limit of 100,000,000" in _message(path)


@settings(max_examples=40, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.binary(max_size=300), suffix=st.sampled_from(IMAGE_SUFFIXES))
def test_random_bytes_raise_only_input_error(tmp_path, data, suffix):
    path = tmp_path / f"fuzz{suffix}"
    path.write_bytes(data)
    try:
        img = read_gray(path)
    except InputError as err:
        assert str(err).startswith(f"{path}: cannot read image: ")
    else:
        assert img.dtype == np.uint8 and img.ndim == 2


@settings(max_examples=40, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(ext=st.sampled_from([".png", ".jpg", ".bmp", ".tif"]), cut=st.integers(0, 2000),
       flips=st.lists(st.tuples(st.integers(0, 2000), st.integers(0, 255)), max_size=4))
def test_damaged_images_raise_only_input_error(tmp_path, ext, cut, flips):
    data = bytearray(cv2.imencode(ext, _scene(16, 16, seed=9))[1].tobytes())
    for at, value in flips:
        data[at % len(data)] = value
    path = tmp_path / f"damaged{ext}"
    path.write_bytes(bytes(data[: max(1, len(data) - cut)]))
    try:
        img = read_gray(path)
        w, h = image_size(path)
    except InputError as err:
        assert str(err).startswith(f"{path}: cannot read image: ")
    else:
        assert img.dtype == np.uint8 and img.ndim == 2
        assert min(w, h) > 0


# ---------------------------------------------------------------------------------------------
# sizes and file lists


@pytest.mark.parametrize("ext", [".png", ".jpg", ".bmp", ".tif"])
@pytest.mark.parametrize("shape", [(1, 1), (7, 300), (301, 5)])
def test_image_size_matches_the_decoder(tmp_path, ext, shape):
    path = _write(tmp_path / f"s{ext}", np.zeros(shape + (3,), np.uint8), ext)
    decoded = cv2.imdecode(np.fromfile(path, np.uint8), cv2.IMREAD_COLOR)  # reference: cv2
    assert image_size(path) == (decoded.shape[1], decoded.shape[0]) == (shape[1], shape[0])


def test_list_images_walks_folders_in_order(tmp_path):
    root = tmp_path / "test images"
    for name in ["b.png", "a.JPG", "sub/c.tiff", "sub/deeper/d.bmp", "sub/readme.txt",
                 "notes.csv", ".hidden/e.png", ".f.png", "Z.jpeg"]:
        (root / name).parent.mkdir(parents=True, exist_ok=True)
        (root / name).write_bytes(b"")
    alone = tmp_path / "alone.png"
    alone.write_bytes(b"")
    (tmp_path / "x.txt").write_text("")
    found, skipped = list_images([root, str(alone), tmp_path / "x.txt"])
    names = [name for _, name in found]
    # sorted by code point: upper case before lower case; a file alone keeps its path as given
    assert names == ["Z.jpeg", "a.JPG", "b.png", "sub/c.tiff", "sub/deeper/d.bmp", str(alone)]
    assert skipped == 3  # sub/readme.txt, notes.csv, x.txt (dot files are not counted)
    for path, name in found:
        assert open(path, "rb").read() == b""
        if name != str(alone):
            assert path == str(root / name)


def test_list_images_missing_path(tmp_path):
    with pytest.raises(InputError) as info:
        list_images([tmp_path / "missing"])
    assert str(info.value) == f"{tmp_path / 'missing'}: no such file or folder"
