"""Pascal VOC XML annotations: one file per image, as the PASCAL VOC challenge's data sets ship
them (Everingham, Van Gool, Williams, Winn and Zisserman, "The PASCAL Visual Object Classes (VOC)
Challenge", IJCV 2010; the development kit's annotation format).

What is read from each ``<annotation>``: ``<filename>`` (the image, relative to the images
folder), ``<size>`` (``<width>``, ``<height>``; optional) and every ``<object>`` with its
``<name>`` and ``<bndbox>`` (``<xmin>``, ``<ymin>``, ``<xmax>``, ``<ymax>``). Other elements
(``<folder>``, ``<source>``, ``<pose>``, ``<truncated>``, ...) are ignored.

Coordinates: the development kit numbers pixels from 1 and a box covers the pixels ``xmin`` to
``xmax`` inclusive, so a box is ``x = xmin - 1``, ``y = ymin - 1``, ``width = xmax - xmin + 1``,
``height = ymax - ymin + 1`` in the project's pixel-edge coordinates (GLOSSARY.md: ``x, y`` the
top-left corner, the first pixel's corner at 0); :func:`write_voc` writes the inverse. Objects
marked ``<difficult>1</difficult>`` are read as ignore regions (``ImageLabels.ignore``), as the
VOC protocol leaves them out of both misses and false alarms, and counted in a note.

Files are parsed with the standard library's ``xml.etree.ElementTree`` after refusing document
type declarations and entities (which is where XML's expansion attacks live) and files larger
than :data:`MAX_XML_BYTES`; every problem is one :class:`InputError` naming the file and line.
"""

from __future__ import annotations

import os
import re
import xml.etree.ElementTree as ET

from detector.errors import InputError
from detector.io.files import read_bytes, write_text
from detector.io.labels import ImageLabels, LabelFile, _assemble_labels, _Record

__all__ = ["MAX_XML_BYTES", "read_voc", "write_voc", "voc_files", "is_voc"]

#: The largest annotation file read (a VOC file is a few kilobytes).
MAX_XML_BYTES = 8 * 2**20

_DECLARATION = re.compile(rb"<!(DOCTYPE|ENTITY)", re.IGNORECASE)


def is_voc(path: str | os.PathLike) -> bool:
    """A folder (of ``.xml`` files) or an ``.xml`` file: what :func:`detector.io.labels.read_labels`
    reads as Pascal VOC."""
    text = os.fspath(path)
    return os.path.isdir(text) or text.lower().endswith(".xml")


def voc_files(path: str | os.PathLike) -> list[str]:
    """The annotation files: ``path`` itself, or the ``.xml`` files in the folder ``path`` and its
    sub-folders, sorted (dot files left out)."""
    text = os.fspath(path)
    if not os.path.isdir(text):
        return [text]
    found = []
    for folder, dirs, files in os.walk(text):
        dirs[:] = sorted(d for d in dirs if not d.startswith("."))
        found += [os.path.join(folder, f) for f in sorted(files)
                  if f.lower().endswith(".xml") and not f.startswith(".")]
    if not found:
        raise InputError("no .xml annotation files in the folder", path=path)
    return found


def _parse(path: str) -> ET.Element:
    try:
        data = read_bytes(path, max_bytes=MAX_XML_BYTES)
    except OSError as err:
        raise InputError(f"cannot read the file: {err.strerror or err}", path=path) from None
    except InputError:
        raise
    found = _DECLARATION.search(data)
    if found:
        line = data.count(b"\n", 0, found.start()) + 1
        raise InputError(f"{found.group(1).decode().upper()} declarations are not accepted in an "
                         "annotation file", path=path, line=line)
    try:
        root = ET.fromstring(data)
    except ET.ParseError as err:
        line = err.position[0] if err.position else None
        raise InputError(f"not well-formed XML: {err.msg if hasattr(err, 'msg') else err}",
                         path=path, line=line) from None
    if root.tag != "annotation":
        raise InputError(f"the root element is <{root.tag}>, not <annotation>", path=path, line=1)
    return root


def _number(element: ET.Element | None, name: str, path: str) -> float:
    child = None if element is None else element.find(name)
    if child is None or child.text is None:
        raise InputError(f"<{name}> is missing", path=path)
    try:
        value = float(child.text.strip())
    except ValueError:
        raise InputError(f"<{name}> is not a number: {child.text.strip()[:40]!r}", path=path) \
            from None
    if value != value or value in (float("inf"), float("-inf")):
        raise InputError(f"<{name}> must be a finite number", path=path)
    return value


def read_voc(path: str | os.PathLike, images_dir: str | os.PathLike | None = None,
             label: str | None = None, skip_missing: bool = False) -> LabelFile:
    """Read Pascal VOC annotations (a folder of ``.xml`` files, or one file) as a
    :class:`detector.io.labels.LabelFile`, checked as :func:`detector.io.labels.read_labels` checks
    a labels CSV (image names, boxes inside their images, ``label``, ``images_dir``,
    ``skip_missing``). An annotation with no ``<object>`` marks an object-free image.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> _ = (d / "a.xml").write_text("<annotation><filename>a.png</filename><size><width>64"
    ...     "</width><height>48</height></size><object><name>nut</name><bndbox><xmin>11</xmin>"
    ...     "<ymin>21</ymin><xmax>30</xmax><ymax>40</ymax></bndbox></object></annotation>")
    >>> lf = read_voc(d)
    >>> lf[0].image, lf[0].boxes.tolist(), lf[0].classes     # 11..30 inclusive: x 10, width 20
    ('a.png', [[10.0, 20.0, 20.0, 20.0]], ['nut'])
    """
    records: list[_Record] = []
    result = LabelFile(path=os.fspath(path))
    sizes: dict[str, tuple[int, int]] = {}
    difficult = 0
    for file in voc_files(path):
        root = _parse(file)
        name = root.findtext("filename")
        if not name or not name.strip():
            raise InputError("<filename> is missing", path=file)
        image = name.strip().replace("\\", "/")
        if image.startswith("/") or ".." in image.split("/"):
            raise InputError(f"<filename> must be relative to the images folder: {image!r}",
                             path=file)
        size = root.find("size")
        if size is not None and size.find("width") is not None:
            w, h = _number(size, "width", file), _number(size, "height", file)
            if w > 0 and h > 0:
                sizes[image] = (int(w), int(h))
        objects = root.findall("object")
        if not objects:
            records.append(_Record(image, None, where=f"{file}: "))
        for k, obj in enumerate(objects):
            box = obj.find("bndbox")
            if box is None:
                raise InputError(f"<object> {k + 1} has no <bndbox>", path=file)
            x0, y0, x1, y1 = (_number(box, t, file) for t in ("xmin", "ymin", "xmax", "ymax"))
            if x1 - x0 + 1.0 <= 0 or y1 - y0 + 1.0 <= 0:   # inclusive: width xmax - xmin + 1
                raise InputError(f"<object> {k + 1}: xmax/ymax leave no pixel after xmin/ymin",
                                 path=file)
            hard = (obj.findtext("difficult") or "0").strip() == "1"
            difficult += hard
            records.append(_Record(image, (x0 - 1.0, y0 - 1.0, x1 - x0 + 1.0, y1 - y0 + 1.0),
                                   cls=(obj.findtext("name") or "").strip(), ignore=hard,
                                   where=f"{os.path.basename(file)} <object> {k + 1}: "))
    if difficult:
        result.notes.append(f"{os.fspath(path)}: {difficult} object(s) marked difficult, read as "
                            "ignore regions")
    if images_dir is None:
        result.image_sizes = sizes
    else:
        result.image_sizes = {}
    has_labels = any(r.cls for r in records)
    return _assemble_labels(records, path, result, images_dir, label, has_labels, skip_missing)


def _element(parent: ET.Element, tag: str, text: str | None = None) -> ET.Element:
    child = ET.SubElement(parent, tag)
    if text is not None:
        child.text = text
    return child


def _coordinate(value: float) -> str:
    value = float(value)
    return str(int(value)) if value.is_integer() else repr(value)


def write_voc(folder: str | os.PathLike, items: list[ImageLabels],
              image_sizes: dict[str, tuple[int, int]] | None = None) -> list[str]:
    """Write one Pascal VOC annotation per image into ``folder`` (``belt/f1.png`` ->
    ``folder/belt/f1.xml``), each written atomically; returns the files written. A box's
    class is its ``<name>`` (``object`` when it has none); ``<size>`` is written where
    ``image_sizes`` knows it.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> _ = write_voc(d, [ImageLabels("a.png", [[10, 20, 20, 20]], ["nut"])], {"a.png": (64, 48)})
    >>> lf = read_voc(d)
    >>> lf[0].boxes.tolist(), lf.image_sizes
    ([[10.0, 20.0, 20.0, 20.0]], {'a.png': (64, 48)})
    """
    written = []
    for it in items:
        root = ET.Element("annotation")
        _element(root, "filename", it.image)
        size = (image_sizes or {}).get(it.image)
        if size is not None:
            s = _element(root, "size")
            _element(s, "width", str(int(size[0])))
            _element(s, "height", str(int(size[1])))
            _element(s, "depth", "1")
        for box, cls, hard in zip(it.boxes, it.classes, it.ignore):
            x, y, w, h = (float(v) for v in box)
            obj = _element(root, "object")
            _element(obj, "name", cls or "object")
            _element(obj, "difficult", "1" if hard else "0")
            b = _element(obj, "bndbox")
            for tag, value in (("xmin", x + 1), ("ymin", y + 1), ("xmax", x + w), ("ymax", y + h)):
                _element(b, tag, _coordinate(value))
        ET.indent(root)
        target = os.path.join(os.fspath(folder), *os.path.splitext(it.image)[0].split("/")) + ".xml"
        os.makedirs(os.path.dirname(target), exist_ok=True)
        write_text(target, ET.tostring(root, encoding="unicode") + "\n")
        written.append(target)
    return written
