"""Label files: the labels CSV contract (see the glossary) and COCO JSON; the detections files too.

Readers
-------
- :func:`read_labels` reads a labels CSV or a COCO JSON file into a :class:`LabelFile` (a list of
  :class:`ImageLabels` plus what was clipped or dropped), checking every row; with ``images_dir``
  it also checks that each image exists and that each box lies (at least partly) inside it.
- :func:`read_coco` is :func:`read_labels` for a COCO JSON file.
- :func:`read_detections` reads a detections CSV or COCO JSON into a list of
  :class:`ImageDetections`.

Writers
-------
:func:`write_labels_csv`, :func:`write_coco`, :func:`write_detections_csv`,
:func:`write_detections_coco` and :func:`write_detections_coco_results` (the COCO results list,
with the image and category ids of a COCO labels file: :func:`coco_result_ids`). Each writes
through :func:`detector.io.files.atomic_write` (a temporary file beside the target, synced and
renamed into place), so an interrupted run never leaves a half-written file.

Every problem in a file raises :class:`detector.errors.InputError` with a one-line message that
names the file and, for CSV, the 1-based line number (the header is line 1; a UTF-8 byte order
mark and CRLF line ends are accepted). COCO elements are named by position, e.g.
``annotations[3]``. The COCO layout follows the COCO data set paper (Lin et al., ECCV 2014)
and the results format read by pycocotools.
"""

from __future__ import annotations

from typing import IO, Iterable

import codecs
import csv
import io
import json
import math
import os
import posixpath
import re
from dataclasses import dataclass, field

import numpy as np

from detector.errors import InputError
from detector.io.files import atomic_write, read_bytes

LABEL_COLUMNS = ("image", "x", "y", "width", "height")
DETECTION_COLUMNS = ("image", "x", "y", "width", "height", "score")
BOX_COLUMNS = ("x", "y", "width", "height")
#: The box columns of a corner CSV (``--box-format corners``): the pixels ``x_min <= x < x_max``,
#: ``y_min <= y < y_max``; read whenever a header names them instead of ``x,y,width,height``.
CORNER_COLUMNS = ("x_min", "y_min", "x_max", "y_max")
#: ``--box-format`` choices for the CSV files the project writes.
BOX_FORMATS = ("xywh", "corners")


@dataclass
class ImageLabels:
    """The labelled boxes of one image.

    Attributes
    ----------
    image : str
        Path relative to the images folder, forward slashes.
    boxes : ndarray of float64, shape (K, 4)
        ``x, y, width, height`` of each box; K may be 0 (an object-free image).
    classes : list of str
        One class name per box ('' where the file has no label column).
    ignore : ndarray of bool, shape (K,)
        Ignore regions: boxes that are neither objects to find nor background (an ``ignore``
        column of 1, or a Pascal VOC ``difficult`` object); scoring leaves them and the
        detections on them out.
    """

    image: str
    boxes: np.ndarray = field(default_factory=lambda: np.zeros((0, 4)))
    classes: list[str] = field(default_factory=list)
    ignore: np.ndarray | None = None

    def __post_init__(self):
        self.boxes = np.asarray(self.boxes, dtype=np.float64).reshape(-1, 4)
        if not self.classes:
            self.classes = [""] * len(self.boxes)
        if len(self.classes) != len(self.boxes):
            raise ValueError("one class name per box")
        self.ignore = (np.zeros(len(self.boxes), bool) if self.ignore is None
                       else np.asarray(self.ignore, dtype=bool).reshape(-1))
        if len(self.ignore) != len(self.boxes):
            raise ValueError("one ignore flag per box")


@dataclass
class ImageDetections:
    """The detections in one scanned image.

    Attributes
    ----------
    image : str
        The image as the detections CSV names it (see the glossary).
    boxes : ndarray of float64, shape (K, 4)
        ``x, y, width, height`` of each detection; K may be 0 (scanned, nothing found).
    scores : ndarray of float64, shape (K,)
        Score of each detection, in 0..1.

    Examples
    --------
    >>> d = ImageDetections("a.png", [[1, 2, 3, 4]], [0.5])
    >>> d.boxes.shape, d.scores.dtype
    ((1, 4), dtype('float64'))
    """

    image: str
    boxes: np.ndarray = field(default_factory=lambda: np.zeros((0, 4)))
    scores: np.ndarray = field(default_factory=lambda: np.zeros(0))

    def __post_init__(self):
        self.boxes = np.asarray(self.boxes, dtype=np.float64).reshape(-1, 4)
        self.scores = np.asarray(self.scores, dtype=np.float64).reshape(-1)
        if len(self.scores) != len(self.boxes):
            raise ValueError("one score per box")


@dataclass
class LabelFile:
    """What :func:`read_labels` found in a labels file.

    It behaves as the list of its ``items`` (``len``, iteration, indexing), so it can be passed
    wherever a list of :class:`ImageLabels` is expected, e.g. to :func:`write_labels_csv`.

    Attributes
    ----------
    items : list of ImageLabels
        One per image, in order of first appearance; boxes in file order.
    path : str or None
        The file read.
    image_sizes : dict of str to (width, height)
        Image sizes, from the image files when ``images_dir`` was given, else from a COCO file's
        ``width``/``height`` where present.
    clipped : int
        Boxes that reached outside their image and were cut to it.
    duplicates : int
        Exact repeats of an earlier row (same image, box and label) that were dropped.
    crowd : int
        COCO annotations marked ``iscrowd`` that were left out (the project has no crowd regions).
    notes : list of str
        One line per clipped box or dropped row, naming the file and line.
    missing : list of str
        Labelled images not found in the images folder and left out (``skip_missing``).

    Examples
    --------
    >>> lf = LabelFile([ImageLabels("a.png", [[0, 0, 5, 5]])], clipped=1, duplicates=2)
    >>> len(lf), lf.warnings, lf.num_boxes
    (1, 3, 1)
    """

    items: list[ImageLabels] = field(default_factory=list)
    path: str | None = None
    image_sizes: dict[str, tuple[int, int]] = field(default_factory=dict)
    clipped: int = 0
    duplicates: int = 0
    crowd: int = 0
    notes: list[str] = field(default_factory=list)
    missing: list[str] = field(default_factory=list)

    @property
    def warnings(self) -> int:
        """Number of boxes clipped plus rows dropped (duplicates, crowd annotations)."""
        return self.clipped + self.duplicates + self.crowd

    @property
    def num_boxes(self) -> int:
        """Total number of boxes over all images."""
        return sum(len(it.boxes) for it in self.items)

    def __len__(self) -> int:
        return len(self.items)

    def __iter__(self):
        return iter(self.items)

    def __getitem__(self, index):
        return self.items[index]


# ----------------------------------------------------------------------------------------------
# shared reading machinery


@dataclass
class _Record:
    """One row (CSV) or one image/annotation (COCO), validated, with where it came from."""

    image: str
    box: tuple[float, float, float, float] | None
    cls: str = ""
    score: float | None = None
    line: int | None = None
    ignore: bool = False
    where: str = ""  # COCO element, e.g. "annotations[3]: "


def _error(message: str, path, rec: _Record | None = None) -> InputError:
    if rec is None:
        return InputError(message, path=path)
    return InputError(rec.where + message, path=path, line=rec.line)


#: The most bytes a labels or detections file may hold (COCO's largest published annotation
#: file, instances_train2017.json, is about 450 MB).
TEXT_MAX_BYTES = 2 * 2**30


def _read_text(path) -> str:
    """The file as text: UTF-8, an optional byte order mark dropped. Only a regular file is read,
    and at most ``TEXT_MAX_BYTES`` of it (:func:`detector.io.files.read_bytes`)."""
    try:
        data = read_bytes(path, max_bytes=TEXT_MAX_BYTES)
    except OSError as err:
        reason = "no such file" if isinstance(err, FileNotFoundError) else (
            err.strerror or str(err))
        raise InputError(f"cannot read the file: {reason}", path=path) from None
    if data.startswith(codecs.BOM_UTF8):
        data = data[len(codecs.BOM_UTF8):]
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as err:
        line = data.count(b"\n", 0, err.start) + 1
        raise InputError(f"not UTF-8 text (byte 0x{data[err.start]:02x}); save the file as UTF-8",
                         path=path, line=line) from None
    if not text.strip():
        raise InputError("the file is empty", path=path)
    return text


_NUMBER = re.compile(r"[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")


def _parse_number(text: str, column: str) -> float:
    """A decimal number; raises ValueError with a message for anything else (including NaN)."""
    if text.isascii() and "_" not in text:  # what float() accepts beyond decimals, bar nan/inf
        try:
            value = float(text)
        except ValueError:
            pass
        else:
            if math.isfinite(value):
                return value
    if not _NUMBER.fullmatch(text):
        low = text.lower().lstrip("+-")
        if low in ("nan", "inf", "infinity"):
            raise ValueError(f"{column} must be a finite number, found {text!r}")
        raise ValueError(f"{column} is not a number: {text!r}")
    value = float(text)
    if not math.isfinite(value):
        raise ValueError(f"{column} must be a finite number, found {text!r}")
    return value


def _normalise_image(name: str, inside_folder: bool) -> str:
    """Forward slashes, no '.' or repeated separators; with ``inside_folder`` also refuse paths that
    are absolute or climb out of the images folder. Raises ValueError with a message."""
    text = name.strip()
    if not text:
        raise ValueError("the image name is empty")
    if "\x00" in text:
        raise ValueError("the image name contains a NUL character")
    slashed = text.replace("\\", "/")
    absolute = slashed.startswith("/") or re.match(r"[A-Za-z]:", slashed) is not None
    if inside_folder and absolute:
        raise ValueError(f"image {text!r} is an absolute path; name it relative to the images "
                         "folder")
    norm = posixpath.normpath(slashed)
    if norm == ".":
        raise ValueError(f"image {text!r} names a folder, not a file")
    if inside_folder and (norm == ".." or norm.startswith("../")):
        raise ValueError(f"image {text!r} leads outside the images folder")
    return norm


def _check_box(box: tuple[float, float, float, float], path, rec: _Record) -> None:
    if box[2] <= 0:
        raise _error(f"width must be > 0, found {_number(box[2])}", path, rec)
    if box[3] <= 0:
        raise _error(f"height must be > 0, found {_number(box[3])}", path, rec)


def _check_score(score: float, path, rec: _Record, text: str | None = None) -> None:
    if not (math.isfinite(score) and 0.0 <= score <= 1.0):
        shown = text if text is not None else repr(score)
        raise _error(f"score must be a number in 0..1, found {shown}", path, rec)


def normalise_image_name(name: str) -> str:
    """An image name the way the labels readers hold it: surrounding spaces dropped, forward
    slashes, no ``.`` or repeated separators (a name that cannot be normalised is returned as it
    is). Detections keep their names exactly; scoring matches them to labels by this form.

    >>> normalise_image_name(" ./belt\\\\a.png ")
    'belt/a.png'
    """
    try:
        return _normalise_image(name, inside_folder=False)
    except ValueError:
        return name


def _exact_image(name: str) -> str:
    """A detections file's image name, kept exactly as written (RFC 4180: spaces are part of a
    field), so that names round-trip through the file; only an empty name or a NUL is refused."""
    if not name.strip():
        raise ValueError("the image name is empty")
    if "\x00" in name:
        raise ValueError("the image name contains a NUL character")
    return name


def _delimiter(text: str) -> str:
    """``;`` for a file whose first line is separated by semicolons (as spreadsheets write CSV
    where the decimal mark is a comma), else ``,``.

    >>> _delimiter("image;x;y;width;height"), _delimiter("image,x,y,width,height")
    (';', ',')
    """
    first = next((ln for ln in text.splitlines() if ln.strip()), "")
    fields = [f.strip().strip('"').lower() for f in first.split(";")]
    return ";" if len(fields) > 1 and "image" in fields else ","


def _csv_records(text: str, path, columns: tuple[str, ...], inside_folder: bool,
                 with_score: bool, notes: list | None = None) -> tuple[list[_Record], bool]:
    """Rows of a CSV with ``columns`` as validated records; also whether a label column exists.
    Labels' image names are normalised (:func:`normalise_image_name`); a detections file's
    (``with_score``) are kept exactly. A header that names ``x_min,y_min,x_max,y_max`` instead
    of ``x,y,width,height`` is read as corners; a file separated by semicolons is read as such,
    with decimal commas, and says so in ``notes``."""
    delimiter = _delimiter(text)
    if delimiter == ";" and notes is not None:
        notes.append(f"{os.fspath(path)}:1: the fields are separated by semicolons; read that way "
                     "(decimal commas accepted)")
    reader = csv.reader(io.StringIO(text, newline=""), strict=False, delimiter=delimiter)
    box_columns = BOX_COLUMNS
    header: list[str] | None = None
    header_line = 1
    records: list[_Record] = []
    index: dict[str, int] = {}
    names: dict[str, str] = {}  # image field -> normalised name
    while True:
        line = reader.line_num + 1
        try:
            row = next(reader)
        except StopIteration:
            break
        except csv.Error as err:
            raise InputError(f"cannot split the line into fields: {err}", path=path,
                             line=line) from None
        if not row or (len(row) == 1 and not row[0].strip()):
            continue  # blank line
        if header is None:
            header, header_line = [h.strip().lower() for h in row], line
            if all(c in header for c in CORNER_COLUMNS) and not any(
                    c in header for c in BOX_COLUMNS):
                box_columns = CORNER_COLUMNS
                columns = tuple(c for c in columns if c not in BOX_COLUMNS)[:1] + CORNER_COLUMNS \
                    + tuple(c for c in columns if c not in BOX_COLUMNS)[1:]
            for name in (*columns, "label"):  # repeats of ignored columns do no harm
                if header.count(name) > 1:
                    raise InputError(f"column {name!r} appears twice in the header", path=path,
                                     line=line)
            missing = [c for c in columns if c not in header]
            if len(missing) == len(columns):
                raise InputError("no header row: the first line must name the columns "
                                 + ",".join(columns), path=path, line=line)
            if missing:
                s = "s" if len(missing) > 1 else ""
                raise InputError(f"missing column{s} {', '.join(missing)} in the header (it must "
                                 f"name {','.join(columns)})", path=path, line=line)
            index = {name: k for k, name in enumerate(header)}
            continue
        rec = _Record("", None, line=line)
        if len(row) > len(header) and not any(f.strip() for f in row[len(header):]):
            row = row[:len(header)]  # trailing empty fields, as spreadsheets often write
        if len(row) != len(header):
            raise _error(f"{len(row)} fields, but the header on line {header_line} has "
                         f"{len(header)}", path, rec)
        raw = row[index["image"]]
        if raw not in names:
            try:
                names[raw] = (_exact_image(raw) if with_score
                              else _normalise_image(raw, inside_folder))
            except ValueError as err:
                raise _error(str(err), path, rec) from None
        rec.image = names[raw]
        fields = [row[index[c]].strip() for c in box_columns]
        if delimiter == ";":
            fields = [f.replace(",", ".") for f in fields]
        empty = [c for c, f in zip(box_columns, fields) if not f]
        if len(empty) not in (0, len(box_columns)):
            raise _error("the box fields must be all filled or all empty (empty here: "
                         f"{', '.join(empty)})", path, rec)
        score_text = row[index["score"]].strip() if with_score else ""
        if delimiter == ";":
            score_text = score_text.replace(",", ".")
        if not empty:
            try:
                box = tuple(_parse_number(f, c) for f, c in zip(fields, box_columns))
            except ValueError as err:
                raise _error(str(err), path, rec) from None
            if box_columns == CORNER_COLUMNS:  # x_min, y_min, x_max, y_max -> x, y, width, height
                box = (box[0], box[1], box[2] - box[0], box[3] - box[1])
            _check_box(box, path, rec)
            rec.box = box
            if with_score:
                if not score_text:
                    raise _error("the score is empty", path, rec)
                try:
                    rec.score = _parse_number(score_text, "score")
                except ValueError:
                    rec.score = math.nan
                _check_score(rec.score, path, rec, score_text)
        elif with_score and score_text:
            raise _error("a score without a box (the box fields are empty)", path, rec)
        if "label" in index:
            rec.cls = row[index["label"]].strip()
        if "ignore" in index:
            flag = row[index["ignore"]].strip().lower()
            if flag not in ("", "0", "1", "true", "false", "yes", "no"):
                raise _error(f"ignore must be 1 or 0 (or empty), found {flag!r}", path, rec)
            rec.ignore = flag in ("1", "true", "yes")
        records.append(rec)
    if header is None:
        raise InputError("the file is empty", path=path)
    return records, "label" in index


def _json_document(text: str, path):
    try:
        return json.loads(text)
    except json.JSONDecodeError as err:
        raise InputError(f"not valid JSON: {err.msg}", path=path, line=err.lineno) from None
    except RecursionError:
        raise InputError("not valid JSON: nested too deeply", path=path) from None
    except ValueError:  # an integer with more digits than Python converts
        raise InputError("not valid JSON: a number has too many digits", path=path) from None


def _is_number(value) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _is_finite(value) -> bool:
    """A JSON number that is a finite float64 (huge integers and NaN/Infinity are not)."""
    try:
        return _is_number(value) and math.isfinite(float(value))
    except OverflowError:
        return False


def _is_id(value) -> bool:
    return (isinstance(value, int) and not isinstance(value, bool)) or isinstance(value, str)


def _list_of_objects(doc: dict, key: str, path, required: bool = True) -> list[dict]:
    if key not in doc:
        if required:
            raise InputError(f"missing key {key!r} (a COCO file has 'images' and "
                             "'annotations')", path=path)
        return []
    value = doc[key]
    if not isinstance(value, list):
        raise InputError(f"{key!r} must be a list", path=path)
    for k, item in enumerate(value):
        if not isinstance(item, dict):
            raise InputError(f"{key}[{k}] must be an object", path=path)
    return value


def _coco_images(images: list[dict], path, inside_folder: bool
                 ) -> tuple[dict, list[_Record], dict[str, tuple[int, int]]]:
    """COCO ``images`` as: id -> name, one object-free record per image, and known sizes."""
    by_id: dict = {}
    by_name: dict[str, int] = {}
    records: list[_Record] = []
    sizes: dict[str, tuple[int, int]] = {}
    for k, entry in enumerate(images):
        rec = _Record("", None, where=f"images[{k}]: ")
        for key in ("id", "file_name"):
            if key not in entry:
                raise _error(f"missing key {key!r}", path, rec)
        if not _is_id(entry["id"]):
            raise _error("'id' must be an integer or a string", path, rec)
        if not isinstance(entry["file_name"], str):
            raise _error("'file_name' must be a string", path, rec)
        if entry["id"] in by_id:
            raise _error(f"image id {entry['id']!r} appears twice", path, rec)
        try:
            rec.image = _normalise_image(entry["file_name"], inside_folder)
        except ValueError as err:
            raise _error(str(err), path, rec) from None
        if rec.image in by_name:
            raise _error(f"file_name {rec.image!r} appears twice (also "
                         f"images[{by_name[rec.image]}])", path, rec)
        width, height = entry.get("width"), entry.get("height")
        if width is not None or height is not None:
            for key, v in (("width", width), ("height", height)):
                if not (_is_finite(v) and v > 0 and float(v).is_integer()):
                    raise _error(f"{key!r} must be a whole number > 0, found {v!r}", path, rec)
            sizes[rec.image] = (int(width), int(height))
        by_id[entry["id"]] = rec.image
        by_name[rec.image] = k
        records.append(rec)
    return by_id, records, sizes


def _coco_categories(doc: dict, path) -> dict | None:
    if "categories" not in doc:
        return None
    names = {}
    for k, entry in enumerate(_list_of_objects(doc, "categories", path)):
        where = f"categories[{k}]: "
        if not _is_id(entry.get("id")):
            raise InputError(where + "'id' must be an integer or a string", path=path)
        if not isinstance(entry.get("name"), str):
            raise InputError(where + "'name' must be a string", path=path)
        if entry["id"] in names:
            raise InputError(where + f"category id {entry['id']!r} appears twice", path=path)
        names[entry["id"]] = entry["name"].strip()
    return names


def _coco_annotation(entry: dict, where: str, image_of: dict, categories: dict | None, path,
                     with_score: bool) -> _Record:
    rec = _Record("", None, where=where)
    if "image_id" not in entry:
        raise _error("missing key 'image_id'", path, rec)
    image_id = entry["image_id"]
    if not _is_id(image_id) or image_id not in image_of:
        raise _error(f"image_id {image_id!r} is not the id of any image", path, rec)
    rec.image = image_of[image_id]
    bbox = entry.get("bbox")
    if not (isinstance(bbox, list) and len(bbox) == 4 and all(_is_number(v) for v in bbox)):
        raise _error("'bbox' must be a list of 4 numbers [x, y, width, height]", path, rec)
    if not all(_is_finite(v) for v in bbox):
        raise _error("'bbox' must hold finite numbers", path, rec)
    rec.box = tuple(float(v) for v in bbox)
    _check_box(rec.box, path, rec)
    if "category_id" in entry and categories is not None:
        cid = entry["category_id"]
        if not _is_id(cid) or cid not in categories:
            raise _error(f"category_id {cid!r} is not the id of any category", path, rec)
        rec.cls = categories[cid]
    if with_score:
        score = entry.get("score")
        if not _is_finite(score):
            raise _error(f"'score' must be a number in 0..1, found {score!r}", path, rec)
        rec.score = float(score)
        _check_score(rec.score, path, rec)
    return rec


def _check_coco_dataset(doc, path) -> None:
    """Refuse a JSON document that is not a COCO dataset object (a results list, or no object)."""
    if isinstance(doc, list):
        raise InputError("this is a COCO results list (detections), not a labels file with "
                         "'images' and 'annotations'", path=path)
    if not isinstance(doc, dict):
        raise InputError("a COCO file must be a JSON object with 'images' and 'annotations'",
                         path=path)


def _coco_records(doc, path, inside_folder: bool, with_score: bool):
    """Records (every image once, then every annotation) from a COCO dataset dictionary, the
    image sizes it gives, the number of crowd annotations left out, and whether it names
    categories."""
    _check_coco_dataset(doc, path)
    images = _list_of_objects(doc, "images", path)
    annotations = _list_of_objects(doc, "annotations", path)
    categories = _coco_categories(doc, path)
    image_of, records, sizes = _coco_images(images, path, inside_folder)
    crowd = 0
    for k, entry in enumerate(annotations):
        if entry.get("iscrowd") not in (None, 0, False):
            crowd += 1
            continue
        records.append(_coco_annotation(entry, f"annotations[{k}]: ", image_of, categories, path,
                                        with_score))
    return records, sizes, crowd, categories is not None


def _looks_like_json(path, text: str) -> bool:
    return os.fspath(path).lower().endswith(".json") or text.lstrip()[:1] in ("{", "[")


# ----------------------------------------------------------------------------------------------
# labels


def _place_box(box, size, path, rec: _Record):
    """The box cut to the image (origin always; right and bottom when the size is known).

    Returns (box, clipped); raises InputError when nothing of the box is inside the image."""
    x, y, w, h = box
    x1, y1 = x + w, y + h
    width, height = size if size is not None else (math.inf, math.inf)
    cx0, cy0 = max(x, 0.0), max(y, 0.0)
    cx1, cy1 = min(x1, width), min(y1, height)
    if cx1 <= cx0 or cy1 <= cy0:
        shown = " ".join(_number(v) for v in box)
        where = (f"the image ({width} x {height})" if size is not None
                 else "the image (it is left of or above the origin)")
        raise _error(f"box {shown} (x y width height) lies entirely outside {where}", path, rec)
    if cx0 == x and cy0 == y and cx1 == x1 and cy1 == y1:
        return box, False
    return (cx0, cy0, cx1 - cx0, cy1 - cy0), True


def _assemble_labels(records: list[_Record], path, result: LabelFile, images_dir, label,
                     has_labels: bool, skip_missing: bool = False) -> LabelFile:
    shown_path = os.fspath(path)

    def place(rec):  # "labels.csv:7" or "labels.json annotations[3]"
        return (f"{shown_path}:{rec.line}" if rec.line is not None
                else f"{shown_path} {rec.where.rstrip(': ')}")

    first: dict[str, _Record] = {}
    kept: dict[str, list[_Record]] = {}
    seen: set = set()
    for rec in records:
        key = (rec.image, rec.box, rec.cls)
        if key in seen:
            result.duplicates += 1
            result.notes.append(f"{place(rec)}: repeats an earlier row; dropped")
            continue
        seen.add(key)
        if rec.image not in first:
            first[rec.image] = rec
            kept[rec.image] = []
        if rec.box is not None:
            kept[rec.image].append(rec)

    if label is not None:
        label = str(label).strip()
        if not has_labels:
            csv_file = not records or records[0].line is not None
            raise InputError(f"the file has no {'label column' if csv_file else 'categories'} "
                             f"to pick label {label!r} from", path=path,
                             line=1 if csv_file else None)
        present = sorted({r.cls for boxes in kept.values() for r in boxes})
        if present and label not in present:
            shown = ", ".join(repr(p) for p in present[:10])
            raise InputError(f"no box has label {label!r} (labels in the file: {shown})",
                             path=path)
        kept = {image: [r for r in boxes if r.cls == label] for image, boxes in kept.items()}

    if images_dir is not None:
        from detector.io.images import image_size

        for image, rec in list(first.items()):
            full = os.path.join(os.fspath(images_dir), *image.split("/"))
            if not os.path.isfile(full):
                if skip_missing and not os.path.exists(full):
                    result.missing.append(image)
                    del first[image]
                    continue
                raise _error(f"image file not found: {full}", path, rec)
            try:
                result.image_sizes[image] = image_size(full)
            except InputError as err:
                raise _error(f"image {full}: {err.message}", path, rec) from None

    for image, rec in first.items():
        size = result.image_sizes.get(image)
        boxes, classes, flags = [], [], []
        for r in kept[image]:
            box, clipped = _place_box(r.box, size, path, r)
            if clipped:
                result.clipped += 1
                extent = f"{size[0]} x {size[1]}" if size is not None else "the origin"
                result.notes.append(f"{place(r)}: box reaches outside the image; clipped to "
                                    f"{extent}")
            boxes.append(box)
            classes.append(r.cls)
            flags.append(r.ignore)
        result.items.append(ImageLabels(image, np.array(boxes, np.float64).reshape(-1, 4),
                                        classes, np.array(flags, bool)))
    return result


def read_labels(path: str | os.PathLike, images_dir: str | os.PathLike | None = None,
                label: str | None = None, skip_missing: bool = False) -> LabelFile:
    """Read and check a labels file: the labels CSV contract, or COCO JSON.

    A folder, or a file ending in ``.xml``, is read as Pascal VOC annotations
    (:func:`detector.io.voc.read_voc`); a file ending in ``.json``, or whose first character is
    ``{`` or ``[``, as COCO JSON (see :func:`read_coco`); anything else as the labels CSV: a header naming at least
    ``image,x,y,width,height`` (any order, any letter case; an optional ``label`` column; other
    columns are ignored) and one row per box, with as many fields as the header (extra empty
    fields at the end of a row are tolerated). A row whose four box fields are empty marks an
    object-free image (ignored when the same image also has boxes). Rows of the same image are
    merged in order of first appearance; exact repeats of a row are dropped and counted.

    Parameters
    ----------
    path : str or os.PathLike
        The labels file (UTF-8; a byte order mark and CRLF line ends are accepted).
    images_dir : str or os.PathLike, optional
        The images folder. When given, every image must exist there, and its size (read from the
        file header) is used to check the boxes: a box entirely outside its image is an error, a
        box partly outside is clipped and counted in ``clipped``. Without it, boxes are still
        clipped at the image origin (x, y >= 0), and for COCO files at the ``width`` and
        ``height`` the file gives.
    label : str, optional
        Keep only boxes of this class (the ``label`` column, or the COCO category name); images
        keep their place even when no box is left, and then count as object-free.
    skip_missing : bool, default False
        With ``images_dir``: leave out labelled images that are not in the folder (listed in
        ``missing``) instead of stopping at the first.

    Returns
    -------
    LabelFile
        The images with their boxes, plus the counts of clipped boxes and dropped rows.

    Raises
    ------
    InputError
        ``"<file>:<line>: <problem>"`` for: an empty file, text that is not UTF-8, a missing
        header or missing columns (line of the header), a row with the wrong number of fields,
        a box field that is not a finite number, a partly empty box, width or height <= 0, an
        absolute image path or one leading out of the images folder, an image file that is not
        found or cannot be read, a box entirely outside its image, or a ``label`` that no box
        has.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "labels.csv"
    >>> _ = path.write_text("image,x,y,width,height,label\\n"
    ...                     "belt/f1.png,112.0,64.5,38,37,nut\\n"
    ...                     "belt/f1.png,-4,10,20,20,nut\\n"
    ...                     "belt/f2.png,,,,,\\n")
    >>> labels = read_labels(path)
    >>> [(it.image, it.boxes.tolist()) for it in labels]
    [('belt/f1.png', [[112.0, 64.5, 38.0, 37.0], [0.0, 10.0, 16.0, 20.0]]), ('belt/f2.png', [])]
    >>> labels.clipped
    1
    """
    from detector.io.voc import is_voc, read_voc

    if is_voc(path):   # a folder of Pascal VOC annotations, or one of them
        return read_voc(path, images_dir, label, skip_missing)
    text = _read_text(path)
    result = LabelFile(path=os.fspath(path))
    if _looks_like_json(path, text):
        records, result.image_sizes, result.crowd, has_labels = _coco_records(
            _json_document(text, path), path, inside_folder=True, with_score=False)
    else:
        records, has_labels = _csv_records(text, path, LABEL_COLUMNS, inside_folder=True,
                                           notes=result.notes,
                                           with_score=False)
    if images_dir is not None:
        result.image_sizes = {}
    return _assemble_labels(records, path, result, images_dir, label, has_labels, skip_missing)


def read_coco(path: str | os.PathLike, images_dir: str | os.PathLike | None = None,
              label: str | None = None) -> LabelFile:
    """Read labels from a COCO JSON file (Lin et al., 2014), checked like :func:`read_labels`.

    What is read: ``images`` (``id``, ``file_name``, optional ``width`` and ``height``),
    ``annotations`` (``image_id``, ``bbox`` as ``[x, y, width, height]``, optional
    ``category_id``; those with ``iscrowd`` set are left out and counted in ``crowd``), and the
    optional ``categories`` (``id``, ``name``), whose names become the box classes. An image
    without annotations is object-free. Other keys are ignored.

    Parameters
    ----------
    path : str or os.PathLike
        The COCO JSON file.
    images_dir, label
        As in :func:`read_labels`.

    Returns
    -------
    LabelFile

    Raises
    ------
    InputError
        Invalid JSON (with the line number from the JSON parser), a missing ``images`` or
        ``annotations`` key, an element of the wrong type (named like ``annotations[3]``), an
        annotation whose ``image_id`` or ``category_id`` matches nothing, repeated ids, and the
        box problems :func:`read_labels` reports.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "labels.json"
    >>> write_coco(path, [ImageLabels("a.png", [[1, 2, 3, 4]], ["nut"]), ImageLabels("b.png")])
    >>> [(it.image, it.boxes.tolist(), it.classes) for it in read_coco(path)]
    [('a.png', [[1.0, 2.0, 3.0, 4.0]], ['nut']), ('b.png', [], [])]
    """
    text = _read_text(path)
    result = LabelFile(path=os.fspath(path))
    records, result.image_sizes, result.crowd, has_labels = _coco_records(
        _json_document(text, path), path, inside_folder=True, with_score=False)
    if images_dir is not None:
        result.image_sizes = {}
    return _assemble_labels(records, path, result, images_dir, label, has_labels)


# ----------------------------------------------------------------------------------------------
# detections


def _coco_results(doc: list, path, images) -> list[_Record]:
    """Records from a COCO results list, with the image list taken from ``images``."""
    if images is None:
        raise InputError("a COCO results list refers to images by id: give the COCO file that "
                         "lists the images as well", path=path)
    if isinstance(images, dict):
        image_list = [{"id": k, "file_name": v} for k, v in images.items()]
        images_path = path
    else:
        images_path = images
        text = _read_text(images)
        doc_images = _json_document(text, images)
        if not isinstance(doc_images, dict):
            raise InputError("must be a JSON object with an 'images' list", path=images)
        image_list = _list_of_objects(doc_images, "images", images)
    image_of, records, _ = _coco_images(image_list, images_path, inside_folder=False)
    for k, entry in enumerate(doc):
        if not isinstance(entry, dict):
            raise InputError(f"[{k}] must be an object", path=path)
        records.append(_coco_annotation(entry, f"[{k}]: ", image_of, None, path,
                                        with_score=True))
    return records


def read_detections(path: str | os.PathLike,
                    images: Iterable[str] | None = None) -> list[ImageDetections]:
    """Read a detections file: the detections CSV contract, or COCO JSON.

    Accepted forms:

    - CSV with the header ``image,x,y,width,height,score`` (other columns ignored). A row whose box
      and score fields are all empty records an image scanned with no detections.
    - A COCO JSON object with ``images`` and ``annotations`` where every annotation has a
      ``score`` (what :func:`write_detections_coco` writes); every listed image counts as
      scanned.
    - A COCO results list ``[{"image_id", "bbox", "score"}, ...]`` (what pycocotools
      ``loadRes`` reads), together with ``images``: the COCO labels file that lists the images
      (or a dict of image id to file name). Every image listed there counts as scanned.

    A CSV's image names are kept exactly as written (spaces, backslashes and all: RFC 4180 counts
    spaces as part of a field), so a name written by :func:`write_detections_csv` reads back the
    same; :func:`normalise_image_name` gives the form labels use. COCO names get forward slashes.
    Unlike labels, absolute paths are allowed (a file scanned by itself keeps the path as given).
    Detections keep their file order within each image.

    Parameters
    ----------
    path : str or os.PathLike
        The detections file.
    images : str, os.PathLike or dict, optional
        Only for a COCO results list, see above.

    Returns
    -------
    list of ImageDetections
        One per image, in order of first appearance.

    Raises
    ------
    InputError
        As for :func:`read_labels`, and for a score that is empty, not a number, or outside 0..1.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "detections.csv"
    >>> _ = path.write_text("image,x,y,width,height,score\\n"
    ...                     "a.png,10,12,24,24,0.9\\n"
    ...                     "b.png,,,,,\\n")
    >>> [(d.image, d.scores.tolist()) for d in read_detections(path)]
    [('a.png', [0.9]), ('b.png', [])]
    """
    text = _read_text(path)
    if _looks_like_json(path, text):
        doc = _json_document(text, path)
        if isinstance(doc, list):
            records = _coco_results(doc, path, images)
        else:
            records = _coco_records(doc, path, inside_folder=False, with_score=True)[0]
    else:
        records, _ = _csv_records(text, path, DETECTION_COLUMNS, inside_folder=False,
                                  with_score=True)
    grouped: dict[str, tuple[list, list]] = {}
    for rec in records:
        boxes, scores = grouped.setdefault(rec.image, ([], []))
        if rec.box is not None:
            boxes.append(rec.box)
            scores.append(rec.score)
    return [ImageDetections(image, np.array(b, np.float64).reshape(-1, 4),
                            np.array(s, np.float64))
            for image, (b, s) in grouped.items()]


# ----------------------------------------------------------------------------------------------
# writers


class _CsvWriter:
    """``csv.writer`` rows with RFC 4180 quoting, ``\n`` line ends."""

    def __init__(self, fh):
        self.fh = fh

    def writerow(self, fields) -> None:
        self.fh.write(csv_line(fields))

    def writerows(self, rows) -> None:
        for row in rows:
            self.writerow(row)


def csv_line(fields: Iterable) -> str:
    """One CSV line as the project writes them (RFC 4180): fields joined by commas, a field that
    holds a comma, a double quote, a carriage return or a line feed put in double quotes (with its
    quotes doubled), and a line feed at the end. Unlike Python 3.11's ``csv.writer`` with
    ``lineterminator="\\n"``, a lone carriage return in a field (a legal file-name character) is
    quoted too, so the reader does not take it for a line end.

    >>> csv_line(["a\\rb.png", 'say "hi" twice', " x,y ", 1.5])
    '"a\\rb.png","say ""hi"" twice"," x,y ",1.5\\n'
    """
    out = []
    for field in fields:
        text = str(field)
        if any(c in text for c in ',"\r\n'):
            text = '"' + text.replace('"', '""') + '"'
        out.append(text)
    return ",".join(out) + "\n"


def csv_writer(fh: IO) -> _CsvWriter:
    """A writer of :func:`csv_line` rows on ``fh`` (``writerow``, ``writerows``)."""
    return _CsvWriter(fh)


def _number(v: float) -> str:
    """Shortest text that reads back to the same float64 ('112' for 112.0, '64.5' for 64.5)."""
    v = float(v)
    return str(int(v)) if v.is_integer() and abs(v) < 2**53 else repr(v)


def _box_fields(box, box_format: str) -> list[str]:
    """A box's CSV fields: ``x, y, width, height``, or with ``corners`` ``x_min, y_min, x_max,
    y_max`` (``x_max = x + width``, rounded once in float64)."""
    x, y, w, h = (float(v) for v in box)
    return [_number(v) for v in ((x, y, w, h) if box_format == "xywh" else (x, y, x + w, y + h))]


def _box_header(box_format: str) -> list[str]:
    if box_format not in BOX_FORMATS:
        raise InputError(f"box format must be {' or '.join(BOX_FORMATS)}, got {box_format!r}")
    return list(BOX_COLUMNS if box_format == "xywh" else CORNER_COLUMNS)


def write_labels_csv(path: str | os.PathLike, items: list[ImageLabels],
                     box_format: str = "xywh") -> None:
    """Write the labels CSV contract: header, one row per box, one empty row per object-free image.

    A ``label`` column is written only when some box has a class name. Numbers are written in
    the shortest form that reads back to the same float64. ``box_format="corners"`` writes
    ``image,x_min,y_min,x_max,y_max`` instead, which :func:`read_labels` reads by its header.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "labels.csv"
    >>> write_labels_csv(path, [ImageLabels("a.png", [[112.0, 64.5, 38, 37]]),
    ...                         ImageLabels("b.png")])
    >>> print(path.read_text(), end="")
    image,x,y,width,height
    a.png,112,64.5,38,37
    b.png,,,,
    """
    with_label = any(c for it in items for c in it.classes)
    with_ignore = any(np.any(getattr(it, "ignore", ())) for it in items)
    header = (["image"] + _box_header(box_format) + (["label"] if with_label else [])
              + (["ignore"] if with_ignore else []))
    with atomic_write(path, "w", newline="") as fh:
        w = csv_writer(fh)
        w.writerow(header)
        for it in items:
            if len(it.boxes) == 0:
                w.writerow([it.image, "", "", "", ""] + ([""] if with_label else [])
                           + ([""] if with_ignore else []))
            flags = getattr(it, "ignore", None)
            for k, (box, cls) in enumerate(zip(it.boxes, it.classes)):
                hard = bool(flags[k]) if flags is not None else False
                row = [it.image] + _box_fields(box, box_format)
                w.writerow(row + ([cls] if with_label else [])
                           + (["1" if hard else "0"] if with_ignore else []))


def _coco_image_entries(images: list[str], image_sizes, image_ids) -> list[dict]:
    entries = []
    for k, image in enumerate(images):
        image_id = k + 1 if image_ids is None else image_ids[image]
        entry = {"id": image_id, "file_name": image}
        if image_sizes and image in image_sizes:
            width, height = image_sizes[image]
            entry["width"], entry["height"] = int(width), int(height)
        entries.append(entry)
    return entries


def _bbox(box) -> tuple[list[float], float]:
    values = [float(v) for v in box]
    return values, values[2] * values[3]


def write_coco(path: str | os.PathLike, items: list[ImageLabels],
               image_sizes: dict[str, tuple[int, int]] | None = None,
               category: str = "object") -> None:
    """Write labels as a COCO JSON dataset (Lin et al., 2014).

    ``images`` get ids 1..N in the order given (``file_name``, and ``width``/``height`` where
    ``image_sizes`` knows them; items naming the same image are merged); ``annotations`` get ids
    1..M with ``bbox`` ``[x, y, width, height]``, ``area`` = width * height and ``iscrowd`` 0;
    ``categories`` lists the class names in order of first appearance, with boxes that have no
    class name under ``category``. Object-free images are images without annotations. Numbers
    keep every bit of their float64 value.

    Parameters
    ----------
    path : str or os.PathLike
        The file to write.
    items : list of ImageLabels or LabelFile
        The labels; a :class:`LabelFile` also supplies ``image_sizes`` when none are given.
    image_sizes : dict of str to (width, height), optional
        Sizes of the images, by image name.
    category : str, optional
        Category name for boxes without a class name.

    Examples
    --------
    >>> import tempfile, pathlib, json
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "labels.json"
    >>> write_coco(path, [ImageLabels("a.png", [[1, 2, 3, 4]])], image_sizes={"a.png": (64, 48)})
    >>> doc = json.loads(path.read_text())
    >>> doc["images"]
    [{'id': 1, 'file_name': 'a.png', 'width': 64, 'height': 48}]
    >>> doc["annotations"][0]["bbox"], doc["categories"]
    ([1.0, 2.0, 3.0, 4.0], [{'id': 1, 'name': 'object'}])
    """
    if image_sizes is None and isinstance(items, LabelFile):
        image_sizes = items.image_sizes
    merged: dict[str, list] = {}  # items naming the same image become one COCO image
    for it in items:
        merged.setdefault(it.image, []).extend(zip(it.boxes, it.classes))
    category_ids: dict[str, int] = {}
    annotations = []
    for image_id, pairs in enumerate(merged.values(), start=1):
        for box, cls in pairs:
            name = cls or category
            cid = category_ids.setdefault(name, len(category_ids) + 1)
            bbox, area = _bbox(box)
            annotations.append({"id": len(annotations) + 1, "image_id": image_id,
                                "category_id": cid, "bbox": bbox, "area": area, "iscrowd": 0})
    if not category_ids:
        category_ids[category] = 1
    doc = {"images": _coco_image_entries(list(merged), image_sizes, None),
           "annotations": annotations,
           "categories": [{"id": cid, "name": name} for name, cid in category_ids.items()]}
    with atomic_write(path, "w") as fh:
        json.dump(doc, fh, ensure_ascii=False)
        fh.write("\n")


def _merged_detections(items) -> list[tuple[str, np.ndarray, np.ndarray]]:
    """Items with the same image merged; detections of each image by descending score."""
    merged: dict[str, list] = {}
    for it in items:
        boxes, scores = merged.setdefault(it.image, [[], []])
        boxes.append(np.asarray(it.boxes, np.float64).reshape(-1, 4))
        scores.append(np.asarray(it.scores, np.float64).reshape(-1))
    out = []
    for image, (boxes, scores) in merged.items():
        b, s = np.concatenate(boxes), np.concatenate(scores)
        order = np.argsort(-s, kind="stable")
        out.append((image, b[order], s[order]))
    return out


def write_detections_csv(path: str | os.PathLike, items: list[ImageDetections],
                         box_format: str = "xywh") -> None:
    """Write the detections CSV contract: ``image,x,y,width,height,score`` (with
    ``box_format="corners"``: ``image,x_min,y_min,x_max,y_max,score``, which
    :func:`read_detections` reads by its header).

    Rows are grouped by image (in order of first appearance; items with the same image are
    merged), score descending; an image with no detections gets one row with empty box and score
    fields, so that every scanned image is recorded.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "detections.csv"
    >>> write_detections_csv(path, [ImageDetections("a.png", [[0, 0, 24, 24], [5, 5, 24, 24]],
    ...                                             [0.25, 0.75]), ImageDetections("b.png")])
    >>> print(path.read_text(), end="")
    image,x,y,width,height,score
    a.png,5,5,24,24,0.75
    a.png,0,0,24,24,0.25
    b.png,,,,,
    """
    with atomic_write(path, "w", newline="") as fh:
        w = csv_writer(fh)
        w.writerow(["image"] + _box_header(box_format) + ["score"])
        for image, boxes, scores in _merged_detections(items):
            if len(boxes) == 0:
                w.writerow([image, "", "", "", "", ""])
            for box, score in zip(boxes, scores):
                w.writerow([image] + _box_fields(box, box_format) + [_number(score)])


def write_detections_coco(path: str | os.PathLike, items: list[ImageDetections],
                          image_ids: dict[str, int] | None = None,
                          image_sizes: dict[str, tuple[int, int]] | None = None,
                          category: str = "object", info: dict | None = None) -> None:
    """Write detections as a COCO JSON object with ``images``, ``annotations`` and ``categories``.

    Each annotation has ``image_id``, ``category_id`` (1), ``bbox``, ``area``, ``iscrowd`` 0 and
    ``score``; images without detections are listed too, so the file records every scanned
    image. The ``annotations`` list is also a valid COCO results list for pycocotools
    (``COCO.loadRes``) when ``image_ids`` are those of the labels file.

    Parameters
    ----------
    path : str or os.PathLike
        The file to write.
    items : list of ImageDetections
        The detections (items with the same image are merged; boxes by descending score).
    image_ids : dict of str to int, optional
        The id of each image, e.g. from the labels' COCO file; default 1..N in order.
    image_sizes : dict of str to (width, height), optional
        Written as ``width``/``height`` where known.
    category : str, optional
        The one category's name.
    info : dict, optional
        Written as the file's ``info`` object, first (COCO's place for what made a data set;
        ``patchwood scan`` puts its provenance record there, see :mod:`detector.scan`).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "detections.json"
    >>> write_detections_coco(path, [ImageDetections("a.png", [[1, 2, 3, 4]], [0.5])])
    >>> [(d.image, d.boxes.tolist(), d.scores.tolist()) for d in read_detections(path)]
    [('a.png', [[1.0, 2.0, 3.0, 4.0]], [0.5])]
    """
    merged = _merged_detections(items)
    if image_ids is not None:
        unknown = [image for image, _, _ in merged if image not in image_ids]
        if unknown:
            raise InputError(f"image {unknown[0]!r} has no id in image_ids", path=path)
    annotations = []
    for k, (image, boxes, scores) in enumerate(merged):
        image_id = k + 1 if image_ids is None else image_ids[image]
        for box, score in zip(boxes, scores):
            bbox, area = _bbox(box)
            annotations.append({"id": len(annotations) + 1, "image_id": image_id,
                                "category_id": 1, "bbox": bbox, "area": area, "iscrowd": 0,
                                "score": float(score)})
    doc = {"info": info} if info is not None else {}
    doc.update({"images": _coco_image_entries([m[0] for m in merged], image_sizes, image_ids),
                "annotations": annotations,
                "categories": [{"id": 1, "name": category}]})
    with atomic_write(path, "w") as fh:
        json.dump(doc, fh, ensure_ascii=False)
        fh.write("\n")


# ----------------------------------------------------------------------------------------------
# the COCO results list


@dataclass
class CocoResultIds:
    """The ids a COCO results list uses for a COCO labels file (see :func:`coco_result_ids`).

    Attributes
    ----------
    path : str
        The labels file.
    image_ids : dict of str to int or str
        The id of every image of the labels file, by its ``file_name`` (forward slashes).
    category_id : int or str
        The category the detections are written under.
    """

    path: str
    image_ids: dict
    category_id: object

    def image_id(self, image: str):
        """The id of a scanned image: that of the labels' image whose ``file_name`` is the name
        the detections file gives it (relative to the folder scanned, forward slashes), the same
        rule by which ``patchwood score`` matches detections to labels. A name that differs only
        in its folders is not guessed at (two folders may hold different frames of the same
        name): the error says which labelled image has that file name.

        Raises :class:`InputError`, naming the labels file, when no image has that name.

        Examples
        --------
        >>> ids = CocoResultIds("gt.json", {"a.png": 7, "day2/a.png": 8}, 1)
        >>> ids.image_id("a.png"), ids.image_id("day2/a.png")
        (7, 8)
        >>> ids.image_id("test/images/day2/a.png")
        Traceback (most recent call last):
        ...
        detector.errors.InputError: gt.json: image 'test/images/day2/a.png' is not among the \
images of this COCO labels file (matched by file name; it lists 'day2/a.png': scan the folder its \
file names are relative to)
        """
        name = image.replace("\\", "/")
        if name in self.image_ids:
            return self.image_ids[name]
        near = [fn for fn in self.image_ids if name.endswith("/" + fn) or fn.endswith("/" + name)]
        hint = (f"; it lists {max(near, key=len)!r}: scan the folder its file names are relative "
                "to" if near else "")
        raise InputError(f"image {image!r} is not among the images of this COCO labels file "
                         f"(matched by file name{hint})", path=self.path)


def coco_result_ids(path: str | os.PathLike, label: str | None = None) -> CocoResultIds:
    """The image ids and the category id that detections written for a COCO labels file use.

    A COCO results list (what pycocotools' ``COCO.loadRes`` reads) names images and categories
    only by the ids of the labels file it is evaluated against, so those are taken from it: every
    image's ``id`` by ``file_name``, and the id of its one category, or of the category named
    ``label`` when it has several. A file without ``categories`` gets category id 1.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "gt.json"
    >>> _ = path.write_text('{"images": [{"id": 42, "file_name": "a.png"}], "annotations": [],'
    ...                     ' "categories": [{"id": 3, "name": "nut"}]}')
    >>> ids = coco_result_ids(path)
    >>> ids.image_ids, ids.category_id
    ({'a.png': 42}, 3)
    """
    text = _read_text(path)
    if not _looks_like_json(path, text):
        raise InputError("image ids come from a COCO JSON labels file (with 'images' and "
                         "'annotations'), not a CSV one", path=path)
    doc = _json_document(text, path)
    _check_coco_dataset(doc, path)
    image_of, _, _ = _coco_images(_list_of_objects(doc, "images", path), path,
                                  inside_folder=False)
    categories = _coco_categories(doc, path)
    if not categories:
        if label is not None:
            raise InputError(f"no category named {label!r}: the file lists no categories",
                             path=path)
        category = 1
    elif label is not None:
        named = [cid for cid, name in categories.items() if name == label.strip()]
        if not named:
            raise InputError(f"no category named {label!r} (the file has "
                             f"{', '.join(repr(n) for n in categories.values())})", path=path)
        category = named[0]
    elif len(categories) == 1:
        category = next(iter(categories))
    else:
        raise InputError(f"the file has {len(categories)} categories "
                         f"({', '.join(repr(n) for n in list(categories.values())[:5])}); choose "
                         "the one the detections are for with --label NAME", path=path)
    return CocoResultIds(os.fspath(path), {name: image_id for image_id, name in image_of.items()},
                         category)


def write_detections_coco_results(path: str | os.PathLike, items: list[ImageDetections],
                                  image_ids: dict | None = None, category_id: int = 1) -> None:
    """Write detections as a COCO results list: ``[{"image_id", "category_id", "bbox",
    "score"}, ...]``, the format pycocotools' ``COCO.loadRes`` and ``COCOeval`` read (Lin et al.,
    2014), images in the order given, each image's detections by descending score.

    The list names images only by id: pass the ids of the COCO labels file the results will be
    scored against (:func:`coco_result_ids`); without them the images are numbered 1..N in the
    order given, as :func:`write_detections_coco` numbers them. Images without detections leave
    no trace in a results list.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "results.json"
    >>> write_detections_coco_results(path, [ImageDetections("a.png", [[1, 2, 3, 4]], [0.5]),
    ...                                      ImageDetections("b.png")], {"a.png": 42, "b.png": 7}, 3)
    >>> print(path.read_text(), end="")
    [{"image_id": 42, "category_id": 3, "bbox": [1.0, 2.0, 3.0, 4.0], "score": 0.5}]
    """
    results = []
    for k, (image, boxes, scores) in enumerate(_merged_detections(items)):
        if image_ids is None:
            image_id = k + 1
        elif image in image_ids:
            image_id = image_ids[image]
        else:
            raise InputError(f"image {image!r} has no id in image_ids", path=path)
        for box, score in zip(boxes, scores):
            results.append({"image_id": image_id, "category_id": category_id,
                            "bbox": _bbox(box)[0], "score": float(score)})
    with atomic_write(path, "w") as fh:
        json.dump(results, fh, ensure_ascii=False)
        fh.write("\n")
