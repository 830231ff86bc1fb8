"""Label files: the labels CSV contract (see the glossary) and COCO JSON.

Core types live here; readers and validation follow.
"""

from __future__ import annotations

import csv
import os
from dataclasses import dataclass, field

import numpy as np

LABEL_COLUMNS = ("image", "x", "y", "width", "height")


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
    """

    image: str
    boxes: np.ndarray = field(default_factory=lambda: np.zeros((0, 4)))
    classes: list[str] = field(default_factory=list)

    def __post_init__(self):
        self.boxes = np.asarray(self.boxes, dtype=np.float64).reshape(-1, 4)
        if not self.classes:
            self.classes = [""] * len(self.boxes)
        if len(self.classes) != len(self.boxes):
            raise ValueError("one class name per box")


def _number(v: float) -> str:
    """Shortest text that reads back to the same float64 ('112' for 112.0, '64.5' for 64.5)."""
    v = float(v)
    return str(int(v)) if v.is_integer() and abs(v) < 2**53 else repr(v)


def write_labels_csv(path: str | os.PathLike, items: list[ImageLabels]) -> None:
    """Write the labels CSV contract: header, one row per box, one empty row per object-free image.

    A ``label`` column is written only when some box has a class name.
    """
    with_label = any(c for it in items for c in it.classes)
    header = list(LABEL_COLUMNS) + (["label"] if with_label else [])
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(header)
        for it in items:
            if len(it.boxes) == 0:
                w.writerow([it.image, "", "", "", ""] + ([""] if with_label else []))
            for box, cls in zip(it.boxes, it.classes):
                row = [it.image] + [_number(v) for v in box]
                w.writerow(row + ([cls] if with_label else []))
