"""Reading images safely into grayscale arrays, finding image files, and cheap size look-ups.

Every function here raises :class:`detector.errors.InputError` (and nothing else) for a file that is
missing, empty, truncated, not an image, or too large, so that the command line can print one line
and stop.

Decoding is done by OpenCV (``cv2.imdecode``) on the file's bytes, which works for any path the
operating system accepts (spaces, non-ASCII characters) because Python opens the file, not OpenCV.
The flags ``IMREAD_ANYDEPTH | IMREAD_ANYCOLOR`` keep 16-bit samples, drop an alpha channel, expand
palettes, and apply the orientation tag (JPEG APP1 or PNG ``eXIf`` EXIF, TIFF tag 274), so the
array is the picture the way a viewer shows it, and label boxes refer to that picture.

Images above a size limit (100 megapixels, or ``PATCHWOOD_MAX_MEGAPIXELS``) are refused from their
header, before any pixel is decoded; a folder scan counts them among the files it could not read.
Only regular files are read (a named pipe or a device named like an image is refused before a
byte is read, :func:`detector.io.files.open_regular`), and never more bytes than an image within the
limit can take (:func:`max_file_bytes`).
"""

from __future__ import annotations

from typing import Iterable

import io
import math
import os
import struct
import threading
from contextlib import contextmanager
from dataclasses import dataclass

import cv2
import numpy as np

from detector.errors import InputError
from detector.io.files import FileTooLargeError, display_name, open_regular, read_at_most

IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".bmp", ".tif", ".tiff")
DEFAULT_MAX_PIXELS = 100_000_000
#: Environment variable that sets the default size limit of :func:`read_gray`, in megapixels.
MAX_MEGAPIXELS_VARIABLE = "PATCHWOOD_MAX_MEGAPIXELS"

_PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
# JPEG start-of-frame markers that carry the frame size (ITU-T T.81, table B.1): all SOFn except
# DHT (C4), JPG (C8) and DAC (CC).
_JPEG_SOF = frozenset(range(0xC0, 0xD0)) - {0xC4, 0xC8, 0xCC}
# EXIF orientations 5-8 turn the picture by a quarter turn, so width and height swap (EXIF 2.3,
# tag 0x0112).
_SWAPS_AXES = frozenset({5, 6, 7, 8})


_LOGGING = getattr(getattr(cv2, "utils", None), "logging", None)
_quiet_lock = threading.Lock()
_quiet_depth = 0
_saved_level = None


@contextmanager
def _quiet_decoder():
    """Keep OpenCV's own log lines off stderr while decoding: a bad file gets one InputError line.

    The previous log level is restored when the last decode running in the process ends."""
    global _quiet_depth, _saved_level
    if _LOGGING is None:
        yield
        return
    with _quiet_lock:
        if _quiet_depth == 0:
            _saved_level = _LOGGING.getLogLevel()
            _LOGGING.setLogLevel(_LOGGING.LOG_LEVEL_SILENT)
        _quiet_depth += 1
    try:
        yield
    finally:
        with _quiet_lock:
            _quiet_depth -= 1
            if _quiet_depth == 0:
                _LOGGING.setLogLevel(_saved_level)


def _fail(reason: str, path) -> InputError:
    return InputError(f"cannot read image: {reason}", path=path)


def _os_reason(err: OSError) -> str:
    if isinstance(err, FileTooLargeError):
        return (f"{err.strerror} (what an image of the size limit can take; set "
                f"{MAX_MEGAPIXELS_VARIABLE} to raise it)")
    if isinstance(err, FileNotFoundError):
        return "no such file"
    if isinstance(err, IsADirectoryError):
        return "it is a folder, not a file"
    if isinstance(err, PermissionError):
        return "permission denied"
    return (err.strerror or str(err)).strip() or type(err).__name__


@dataclass
class _Probe:
    """What the first bytes of a file say: format, displayed size, and whether it ends early."""

    kind: str
    width: int | None = None
    height: int | None = None
    truncated: bool = False


def _exif_orientation(tiff: bytes) -> int:
    """Orientation (1-8) from a TIFF-structured EXIF block; 1 when absent or unreadable."""
    if len(tiff) < 8 or tiff[:2] not in (b"II", b"MM"):
        return 1
    order = "<" if tiff[:2] == b"II" else ">"
    try:
        (magic, ifd) = struct.unpack(order + "HI", tiff[2:8])
        if magic != 42:
            return 1
        (count,) = struct.unpack(order + "H", tiff[ifd:ifd + 2])
        for k in range(count):
            at = ifd + 2 + 12 * k
            tag, kind = struct.unpack(order + "HH", tiff[at:at + 4])
            if tag == 0x0112 and kind == 3:  # SHORT
                (value,) = struct.unpack(order + "H", tiff[at + 8:at + 10])
                return value if 1 <= value <= 8 else 1
    except struct.error:
        return 1
    return 1


def _oriented(width: int, height: int, orientation: int) -> tuple[int, int]:
    return (height, width) if orientation in _SWAPS_AXES else (width, height)


def _probe_png(fh, total: int) -> _Probe:
    probe = _Probe("png", truncated=True)
    orientation = 1
    size = None
    while True:
        head = fh.read(8)
        if len(head) < 8:
            break
        length, kind = struct.unpack(">I4s", head)
        if kind == b"IHDR":
            data = fh.read(length)
            if len(data) < 8:
                break
            size = struct.unpack(">II", data[:8])
            rest = 4
        elif kind == b"eXIf" and length <= (1 << 20):
            data = fh.read(length)
            if len(data) < length:
                break
            orientation = _exif_orientation(data)
            rest = 4
        else:
            rest = length + 4
        here = fh.tell()
        if total < here + rest:
            break
        fh.seek(here + rest)
        if kind == b"IEND":
            probe.truncated = False
            break
    if size is not None:
        probe.width, probe.height = _oriented(size[0], size[1], orientation)
    return probe


def _probe_jpeg(fh) -> _Probe:
    probe = _Probe("jpeg")
    orientation = None
    size = None
    while True:
        byte = fh.read(1)
        if not byte:
            break
        if byte != b"\xff":  # segments follow each other directly; anything else is damage
            break
        marker = fh.read(1)
        while marker == b"\xff":  # fill bytes
            marker = fh.read(1)
        if not marker:
            break
        m = marker[0]
        if m in (0x01, 0xD8) or 0xD0 <= m <= 0xD7:  # stand-alone markers
            continue
        if m in (0xD9, 0xDA):  # end of image, start of scan: no more header segments
            break
        raw = fh.read(2)
        if len(raw) < 2:
            break
        (length,) = struct.unpack(">H", raw)
        if length < 2:
            break
        if m == 0xE1 and orientation is None:
            data = fh.read(length - 2)
            if data.startswith(b"Exif\x00\x00"):
                orientation = _exif_orientation(data[6:])
        elif m in _JPEG_SOF and size is None:
            data = fh.read(length - 2)
            if len(data) >= 5:
                height, width = struct.unpack(">HH", data[1:5])
                size = (width, height)
        else:
            fh.seek(length - 2, io.SEEK_CUR)
    if size is not None:
        probe.width, probe.height = _oriented(size[0], size[1], orientation or 1)
    return probe


def _probe_bmp(fh) -> _Probe:
    probe = _Probe("bmp")
    head = fh.read(26)
    if len(head) >= 18:
        (dib,) = struct.unpack("<I", head[14:18])
        if dib == 12 and len(head) >= 22:  # BITMAPCOREHEADER: 16-bit sizes
            probe.width, probe.height = struct.unpack("<HH", head[18:22])
        elif dib >= 40 and len(head) >= 26:  # BITMAPINFOHEADER and later: signed 32-bit sizes
            width, height = struct.unpack("<ii", head[18:26])
            probe.width, probe.height = abs(width), abs(height)
    return probe


# TIFF 6.0 field types that hold an integer (BYTE, SHORT, LONG, SBYTE, SSHORT, SLONG): struct
# code and size; the decoder (libtiff) accepts any of them for the fields read here
_TIFF_INTEGER = {1: ("B", 1), 3: ("H", 2), 4: ("I", 4), 6: ("b", 1), 8: ("h", 2), 9: ("i", 4)}
_TIFF_MAX_ENTRIES = 4096


def _probe_tiff(fh, total: int) -> _Probe:
    """Size (and orientation) of the first image of a classic TIFF file (TIFF 6.0, section 2:
    ImageWidth 256, ImageLength 257, Orientation 274 in the first IFD); what ``cv2.imdecode``
    decodes is that first image, turned by its orientation."""
    probe = _Probe("tiff")
    head = fh.read(8)
    order = "<" if head[:2] == b"II" else ">"
    try:
        (ifd,) = struct.unpack(order + "I", head[4:8])
        if not 8 <= ifd <= total - 2:
            return probe
        fh.seek(ifd)
        (count,) = struct.unpack(order + "H", fh.read(2))
        entries = fh.read(12 * min(count, _TIFF_MAX_ENTRIES))
        fields = {}
        for k in range(len(entries) // 12):
            tag, kind, n = struct.unpack(order + "HHI", entries[12 * k:12 * k + 8])
            if tag in (256, 257, 274) and kind in _TIFF_INTEGER and n == 1:
                code, size = _TIFF_INTEGER[kind]
                at = 12 * k + 8  # a value that fits in 4 bytes sits in the entry itself
                (fields[tag],) = struct.unpack(order + code, entries[at:at + size])
    except struct.error:
        return probe
    if fields.get(256, -1) >= 0 and fields.get(257, -1) >= 0:
        orientation = fields.get(274, 1)
        probe.width, probe.height = _oriented(fields[256], fields[257],
                                              orientation if 1 <= orientation <= 8 else 1)
    return probe


def _probe(fh) -> _Probe:
    """Identify the format and read the displayed size from the header, without decoding pixels.

    Sizes are known for PNG, JPEG, BMP and classic TIFF (the orientation tag of PNG, JPEG and TIFF
    is taken into account); for other files ``width`` and ``height`` stay None.
    """
    start = fh.read(8)
    total = fh.seek(0, io.SEEK_END)
    fh.seek(0)
    if start.startswith(_PNG_SIGNATURE):
        fh.seek(8)
        return _probe_png(fh, total)
    if start.startswith(b"\xff\xd8"):
        fh.seek(2)
        return _probe_jpeg(fh)
    if start.startswith(b"BM"):
        return _probe_bmp(fh)
    if start[:4] in (b"II*\x00", b"MM\x00*"):
        return _probe_tiff(fh, total)
    return _Probe("unknown")


def max_pixels_limit() -> int:
    """The largest image :func:`read_gray` reads by default, in pixels.

    ``PATCHWOOD_MAX_MEGAPIXELS`` (a number of megapixels, decimals allowed) when set, else
    ``DEFAULT_MAX_PIXELS`` (100 megapixels: a 10000 x 10000 frame, 100 MB as 8-bit gray).

    Raises
    ------
    InputError
        The variable is set to something other than a number > 0.

    Examples
    --------
    >>> os.environ["PATCHWOOD_MAX_MEGAPIXELS"] = "2.5"; max_pixels_limit()
    2500000
    >>> del os.environ["PATCHWOOD_MAX_MEGAPIXELS"]; max_pixels_limit()
    100000000
    """
    text = os.environ.get(MAX_MEGAPIXELS_VARIABLE, "").strip()
    if not text:
        return DEFAULT_MAX_PIXELS
    try:
        megapixels = float(text)
    except ValueError:
        megapixels = math.nan
    if not (math.isfinite(megapixels) and megapixels > 0):
        raise InputError(f"the environment variable {MAX_MEGAPIXELS_VARIABLE} must be a number of "
                         f"megapixels > 0, got {text[:40]!r}")
    return max(1, int(round(megapixels * 1e6)))


#: What an image file may hold beyond its pixels (headers, colour profiles, EXIF, thumbnails).
FILE_SLACK_BYTES = 64 * 2**20


def max_file_bytes(max_pixels: int | None) -> int | None:
    """The most bytes :func:`read_gray` reads from one file for images of up to ``max_pixels``:
    8 bytes a pixel (16-bit samples, four channels, stored without compression) plus
    ``FILE_SLACK_BYTES``; None for no limit. A larger file is refused before it is read.

    >>> max_file_bytes(100_000_000)  # the default limit: 8 * 10**8 + 64 * 2**20
    867108864
    """
    if max_pixels is None:
        return None
    return 8 * int(max_pixels) + FILE_SLACK_BYTES


def _check_pixels(width: int, height: int, max_pixels: int | None, from_environment: bool,
                  path) -> None:
    if max_pixels is not None and width * height > max_pixels:
        hint = ""
        if from_environment:
            hint = (f" ({max_pixels / 1e6:g} megapixels; set {MAX_MEGAPIXELS_VARIABLE} to raise "
                    "it)")
        raise _fail(f"{width} x {height} pixels is more than the limit of {max_pixels:,} pixels"
                    + hint, path)


def _to_gray(img: np.ndarray) -> np.ndarray:
    if img.ndim == 3:
        channels = img.shape[2]
        if channels == 1:
            img = img[:, :, 0]
        elif channels == 3:
            img = cv2.cvtColor(img, cv2.COLOR_BGR2GRAY)
        elif channels == 4:
            img = cv2.cvtColor(img, cv2.COLOR_BGRA2GRAY)
        else:  # gray + alpha, or an unusual layout: the first channel is the picture
            img = img[:, :, 0]
    return img


def _stretch(img: np.ndarray) -> np.ndarray:
    values = img.astype(np.float64)
    finite = np.isfinite(values)
    if not finite.any():
        return np.zeros(img.shape, np.uint8)
    lo, hi = values[finite].min(), values[finite].max()
    values = np.where(finite, values, lo)
    if hi == lo:
        return np.zeros(img.shape, np.uint8)
    return np.floor((values - lo) * (255.0 / (hi - lo)) + 0.5).astype(np.uint8)


def _to_uint8(img: np.ndarray, depth_scaling: str) -> np.ndarray:
    if img.dtype == np.uint8:
        return img
    if depth_scaling == "range":
        return _stretch(img)
    if img.dtype == np.uint16:
        return (img >> 8).astype(np.uint8)
    if img.dtype.kind == "f":
        values = np.nan_to_num(img.astype(np.float64), nan=0.0, posinf=1.0, neginf=0.0)
        return np.floor(np.clip(values, 0.0, 1.0) * 255.0 + 0.5).astype(np.uint8)
    return _stretch(img)


def _read_options(max_pixels, depth_scaling: str):
    """``(max_pixels as a number or None, whether it came from the environment)``; a bad
    argument is a ValueError (a programming error, not bad input)."""
    if depth_scaling not in ("shift", "range"):
        raise ValueError(f"depth_scaling must be 'shift' or 'range', not {depth_scaling!r}")
    if isinstance(max_pixels, str):
        if max_pixels != "auto":
            raise ValueError(f"max_pixels must be an int, None or 'auto', not {max_pixels!r}")
        return max_pixels_limit(), True
    return max_pixels, False


def read_gray(path: str | os.PathLike, max_pixels: int | str | None = "auto",
              depth_scaling: str = "shift") -> np.ndarray:
    """Read an image file as an 8-bit grayscale array, the way a viewer would show it.

    The rules, so that label boxes, harvested patches and scans all refer to the same pixels:

    - orientation: the EXIF orientation tag (JPEG APP1, PNG ``eXIf``, TIFF tag 274) is applied,
      as ``cv2.imdecode`` does by default; a phone picture stored sideways with orientation 6
      comes out upright, and :func:`image_size` reports that upright size, so boxes are drawn
      (and checked) on the picture a viewer shows;
    - colour: converted with ``cv2.cvtColor`` (ITU-R BT.601 luma weights 0.299 R + 0.587 G +
      0.114 B); an alpha channel is dropped (the colour under it is kept, not blended); palette
      images are expanded through their palette first;
    - depth: 16-bit samples keep their high byte (``depth_scaling="shift"``, 65535 -> 255,
      256 -> 1, 255 -> 0), floating-point samples map 0..1 to 0..255 (see ``depth_scaling``);
    - size: images above ``max_pixels`` are refused before their pixels are decoded (PNG, JPEG,
      BMP and TIFF headers are read first).

    Parameters
    ----------
    path : str or os.PathLike
        A PNG, JPEG, BMP or TIFF file. Spaces and non-ASCII characters in the path are fine:
        Python opens the file and OpenCV decodes its bytes.
    max_pixels : int, None or "auto", optional
        Refuse images with more pixels than this; None for no limit. ``"auto"`` (default) takes
        the limit from the environment variable ``PATCHWOOD_MAX_MEGAPIXELS`` (in megapixels),
        or 100 megapixels when it is not set (see :func:`max_pixels_limit`).
    depth_scaling : {"shift", "range"}, optional
        How samples wider than 8 bits become 8 bits. ``"shift"`` (default) keeps the high byte of
        16-bit samples (``value >> 8``, what ``cv2.imread`` does by default) and maps floating-point
        samples from 0..1 to 0..255 (clipped), so the same scene gives the same values in every
        frame. ``"range"`` stretches each image's own minimum..maximum to 0..255, which suits
        cameras that store 10 or 12 bits in a 16-bit file.

    Returns
    -------
    ndarray of uint8, shape (H, W)

    Raises
    ------
    InputError
        ``"<path>: cannot read image: <reason>"`` for a missing, empty, truncated, unrecognised
        or too large file. Nothing else is raised for a bad file.

    Examples
    --------
    >>> import tempfile, pathlib, cv2, numpy as np
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> bgr = np.zeros((2, 3, 3), np.uint8); bgr[..., 2] = 200  # pure red
    >>> _ = cv2.imwrite(str(folder / "red frame.png"), bgr)
    >>> read_gray(folder / "red frame.png")  # 0.299 * 200 = 59.8
    array([[60, 60, 60],
           [60, 60, 60]], dtype=uint8)
    """
    max_pixels, from_environment = _read_options(max_pixels, depth_scaling)
    limit = max_file_bytes(max_pixels)
    try:
        with open_regular(path, limit) as fh:
            probe = _probe(fh)  # the header only: a huge image is refused before it is read
            _check_probe(probe, max_pixels, from_environment, path)
            fh.seek(0)
            data = read_at_most(fh, limit)
            if limit is not None and len(data) > limit:
                raise FileTooLargeError(path, limit)
    except OSError as err:
        raise _fail(_os_reason(err), path) from None
    except MemoryError:
        raise _fail("not enough memory to read it", path) from None
    return _decode(data, probe, max_pixels, from_environment, depth_scaling, path)


def _check_probe(probe: _Probe, max_pixels, from_environment: bool, path) -> None:
    if probe.width is not None:
        if probe.width == 0 or probe.height == 0:
            raise _fail(f"the header gives a size of {probe.width} x {probe.height} pixels",
                        path)
        _check_pixels(probe.width, probe.height, max_pixels, from_environment, path)


def decode_gray(data: bytes, name: str, max_pixels: int | str | None = "auto",
                depth_scaling: str = "shift") -> np.ndarray:
    """:func:`read_gray` of an image's bytes (a file sent to a cluster worker, say): the same
    checks, the same pixels, and messages that name ``name``.

    Examples
    --------
    >>> import cv2
    >>> ok, png = cv2.imencode(".png", np.full((2, 3), 7, np.uint8))
    >>> decode_gray(png.tobytes(), "frame.png").tolist()
    [[7, 7, 7], [7, 7, 7]]
    >>> decode_gray(b"GIF89a", "old.gif")
    Traceback (most recent call last):
    ...
    detector.errors.InputError: old.gif: cannot read image: not a PNG, JPEG, BMP or TIFF file (unrecognised content)
    """
    max_pixels, from_environment = _read_options(max_pixels, depth_scaling)
    data = bytes(data)
    limit = max_file_bytes(max_pixels)
    if limit is not None and len(data) > limit:
        raise _fail(_os_reason(FileTooLargeError(name, limit)), name)
    probe = _probe(io.BytesIO(data))
    _check_probe(probe, max_pixels, from_environment, name)
    return _decode(data, probe, max_pixels, from_environment, depth_scaling, name)


def _decode(data: bytes, probe: _Probe, max_pixels, from_environment: bool, depth_scaling: str,
            path) -> np.ndarray:
    if not data:
        raise _fail("the file is empty (0 bytes)", path)
    if probe.truncated:
        raise _fail("the PNG data ends early (truncated file)", path)
    if probe.kind == "jpeg" and data.rfind(b"\xff\xd9") < data.rfind(b"\xff\xda"):
        raise _fail("the JPEG data ends early (truncated file)", path)
    try:
        with _quiet_decoder():
            img = cv2.imdecode(np.frombuffer(data, np.uint8),
                               cv2.IMREAD_ANYDEPTH | cv2.IMREAD_ANYCOLOR)
    except cv2.error as err:
        lines = [s for s in str(err).splitlines() if s.strip()]
        raise _fail(f"the decoder failed ({lines[-1].strip() if lines else 'no reason given'})",
                    path) from None
    except MemoryError:
        raise _fail("not enough memory to decode it", path) from None
    if img is None:
        if probe.kind == "unknown":
            reason = "not a PNG, JPEG, BMP or TIFF file (unrecognised content)"
        else:
            reason = f"the {probe.kind.upper()} data is corrupt or uses a variant the decoder lacks"
        raise _fail(reason, path)
    if img.size == 0:
        raise _fail("the image has no pixels", path)
    _check_pixels(img.shape[1], img.shape[0], max_pixels, from_environment, path)
    return np.ascontiguousarray(_to_uint8(_to_gray(img), depth_scaling))


def image_size(path: str | os.PathLike) -> tuple[int, int]:
    """Width and height of an image as :func:`read_gray` would return it, read cheaply.

    PNG, JPEG, BMP and TIFF sizes come from the file header (with the orientation tag applied, so
    a JPEG turned by a quarter turn reports its displayed size); other files are decoded. Returns
    ``(width, height)``; raises :class:`InputError` as :func:`header_size` does.

    Examples
    --------
    >>> import tempfile, pathlib, cv2, numpy as np
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "frame.png"
    >>> _ = cv2.imwrite(str(path), np.zeros((48, 64), np.uint8))
    >>> image_size(path)
    (64, 48)
    """
    size = header_size(path)
    if size is not None:
        return size
    img = read_gray(path, max_pixels=None)
    return int(img.shape[1]), int(img.shape[0])


def header_size(path: str | os.PathLike) -> tuple[int, int] | None:
    """Width and height as :func:`read_gray` would return them, from the file header alone.

    Parameters
    ----------
    path : str or os.PathLike
        The image file.

    Returns
    -------
    (width, height) : tuple of int, or None
        None when the header does not tell (not a PNG, JPEG, BMP or classic TIFF file, a damaged
        header, or a size of zero).

    Raises
    ------
    InputError
        ``"<path>: cannot read image: <reason>"`` when the file cannot be opened or read.

    Examples
    --------
    >>> import tempfile, pathlib, cv2, numpy as np
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "frame.bmp"
    >>> _ = cv2.imwrite(str(path), np.zeros((48, 64), np.uint8))
    >>> header_size(path)
    (64, 48)
    >>> _ = path.write_text("not a picture"); header_size(path) is None
    True
    """
    try:
        with open_regular(path) as fh:
            probe = _probe(fh)
    except OSError as err:
        raise _fail(_os_reason(err), path) from None
    if probe.width is not None and probe.width > 0 and probe.height > 0:
        return int(probe.width), int(probe.height)
    return None


def _is_image_name(name: str) -> bool:
    return name.lower().endswith(IMAGE_SUFFIXES)


def list_images(paths: Iterable[str | os.PathLike], failures: list | None = None,
                skipped_names: list | None = None) -> tuple[list[tuple[str, str]], int]:
    """Find the image files among files and folders, in a fixed order.

    Folders are walked recursively; files and sub-folders whose names start with a dot are left
    out (they are not counted). Image files are recognised by their suffix (``IMAGE_SUFFIXES``,
    any letter case). Whether a file can be read is the reader's business: a named pipe called
    ``x.png`` is listed, and :func:`read_gray` refuses it.

    Parameters
    ----------
    paths : str, os.PathLike, or sequence of them
        Image files and folders.
    failures : list, optional
        Where to note folders that cannot be read (no permission, vanished while listed): as
        ``(display_name + "/", reason)``, so that a scan lists them among its failures. Without
        it, such a folder is an :class:`InputError`; it is never skipped silently.
    skipped_names : list, optional
        Where to note the files left out (display names, in the order found).

    Returns
    -------
    images : list of (path, display_name)
        ``path`` opens the file. ``display_name`` is what the detections CSV writes in its
        ``image`` column: for a file found in a folder, its path relative to that folder with
        forward slashes (so that a scan of ``test/images`` matches ``test/labels.csv``); for a
        file given by itself, the path as given. Bytes of a name that are not UTF-8 are written
        ``%XX`` (:func:`detector.io.files.display_name`). Each folder's images are sorted by display
        name; the folders and files keep the order given.
    skipped : int
        Files with other suffixes (in the folders, or given by themselves) that were left out.

    Raises
    ------
    InputError
        A path that does not exist; a folder that cannot be read, when ``failures`` is not given.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> root = pathlib.Path(tempfile.mkdtemp())
    >>> (root / "day 2").mkdir()
    >>> for name in ("day 2/b.png", "a.JPG", "notes.txt"):
    ...     _ = (root / name).write_bytes(b"")
    >>> found, skipped = list_images([root])
    >>> [name for _, name in found], skipped
    (['a.JPG', 'day 2/b.png'], 1)
    """
    if isinstance(paths, (str, os.PathLike)):
        paths = [paths]
    found: list[tuple[str, str]] = []
    skipped = 0
    for given in paths:
        text = os.fspath(given)
        if os.path.isdir(text):
            names = []

            def unreadable(err: OSError, top=text):
                where = err.filename if err.filename is not None else top
                rel = os.path.relpath(where, top)
                shown = display_name(os.fspath(top) if rel == "." else rel.replace(os.sep, "/"))
                reason = f"cannot read the folder: {_os_reason(err)}"
                if failures is None:
                    raise InputError(reason, path=display_name(where))
                failures.append((shown.rstrip("/") + "/", reason))

            for folder, dirs, files in os.walk(text, onerror=unreadable):
                dirs[:] = [d for d in dirs if not d.startswith(".")]
                rel_folder = os.path.relpath(folder, text)
                for name in files:
                    if name.startswith("."):
                        continue
                    if not _is_image_name(name):
                        skipped += 1
                        if skipped_names is not None:
                            rel = name if rel_folder == "." else os.path.join(rel_folder, name)
                            skipped_names.append(display_name(rel.replace(os.sep, "/")))
                        continue
                    rel = name if rel_folder == "." else os.path.join(rel_folder, name)
                    names.append((rel.replace(os.sep, "/"), os.path.join(folder, name)))
            for display, full in sorted(names):
                found.append((full, display_name(display)))
        elif os.path.exists(text):
            if _is_image_name(text):
                found.append((text, display_name(text)))
            else:
                skipped += 1
                if skipped_names is not None:
                    skipped_names.append(display_name(text))
        else:
            raise InputError("no such file or folder", path=text)
    return found, skipped
