"""The audit folder's file contract, light enough for readers that do not grow forests.

``patchwood audit --out AUDIT_DIR`` writes :data:`CSV_NAME` (columns :data:`CSV_COLUMNS`: image,
x, y, width, height, kind, score; one row per listed finding, most suspicious first),
:data:`HTML_NAME` and :data:`THUMBNAIL_DIR`. :func:`read_audit_flags` reads the CSV back, for
``patchwood review --audit``.
"""

from __future__ import annotations

import csv
import io
import math
import os
from pathlib import Path

from detector.errors import InputError
from detector.io.files import display_name, read_bytes

__all__ = ["OBJECT_CALLED_BACKGROUND", "BACKGROUND_CALLED_OBJECT", "FINDING_KINDS", "CSV_NAME",
           "HTML_NAME", "THUMBNAIL_DIR", "CSV_COLUMNS", "AUDIT_STYLES", "read_audit_flags"]

OBJECT_CALLED_BACKGROUND = "object-called-background"
BACKGROUND_CALLED_OBJECT = "background-called-object"
#: Finding kind by label: index 0 for background patches, 1 for object patches.
FINDING_KINDS = (BACKGROUND_CALLED_OBJECT, OBJECT_CALLED_BACKGROUND)

CSV_NAME = "suspicious-labels.csv"
HTML_NAME = "audit.html"
THUMBNAIL_DIR = "thumbnails"
CSV_COLUMNS = ("image", "x", "y", "width", "height", "kind", "score")

#: How boxes are drawn: kind -> (RGB colour, line style, legend text). Hues from Okabe & Ito (2008).
AUDIT_STYLES = {
    OBJECT_CALLED_BACKGROUND: ((240, 228, 66), "dotted", "labelled object the forest calls background"),
    BACKGROUND_CALLED_OBJECT: ((213, 94, 0), "dashed", "background window the forest calls object"),
    "labelled": ((86, 180, 233), "solid", "other labelled object"),
}


def read_audit_flags(audit_dir: str | os.PathLike) -> dict[str, list[dict]]:
    """The findings an audit folder lists, by image: ``{image: [{"box", "kind", "score"}, ...]}``
    in the file's order (most suspicious first).

    Raises InputError naming the file (and the line) when the folder has no audit CSV or a row is
    not one.

    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> _ = (d / CSV_NAME).write_text("image,x,y,width,height,kind,score\\n"
    ...                               "a.png,1,2,3,4,background-called-object,0.9100\\n")
    >>> read_audit_flags(d)
    {'a.png': [{'box': [1.0, 2.0, 3.0, 4.0], 'kind': 'background-called-object', 'score': 0.91}]}
    """
    path = Path(audit_dir) / CSV_NAME
    if not Path(audit_dir).is_dir():
        raise InputError(f"{display_name(audit_dir)}: not an audit folder (no such folder)")
    if not path.is_file():
        raise InputError(f"{display_name(audit_dir)}: not an audit folder (no {CSV_NAME}; "
                         f"`patchwood audit --out` writes one)")
    try:
        text = read_bytes(path).decode("utf-8-sig")
    except UnicodeDecodeError:
        raise InputError(f"{display_name(path)}: not UTF-8 text") from None
    rows = csv.reader(io.StringIO(text))
    header = next(rows, None)
    if header is None or tuple(h.strip() for h in header) != CSV_COLUMNS:
        raise InputError(f"{display_name(path)}:1: expected the columns {','.join(CSV_COLUMNS)}")
    flags: dict[str, list[dict]] = {}
    for line, row in enumerate(rows, start=2):
        if not row:
            continue
        try:
            if len(row) != len(CSV_COLUMNS) or row[5] not in FINDING_KINDS:
                raise ValueError
            box = [float(v) for v in row[1:5]]
            score = float(row[6])
            if not all(map(math.isfinite, box + [score])) or box[2] <= 0 or box[3] <= 0:
                raise ValueError
        except ValueError:
            raise InputError(f"{display_name(path)}:{line}: expected image, x, y, width > 0, "
                             f"height > 0, a finding kind ({' or '.join(FINDING_KINDS)}) and a "
                             f"score") from None
        flags.setdefault(row[0], []).append({"box": box, "kind": row[5], "score": score})
    return flags
