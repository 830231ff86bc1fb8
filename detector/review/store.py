"""The labels file a review edits: every edit saved at once, undoable across reloads.

One :class:`LabelStore` owns one labels file (the labels CSV contract or COCO JSON; see
:func:`detector.io.labels.read_labels`) and two files beside it, the only other files a review
writes:

- ``LABELS.bak``: the file as it was before the first edit, written once and never replaced;
- ``LABELS.journal.jsonl``: one JSON line per edit (what changed and how to take it back, with the
  SHA-256 of the labels file after it), and one per undo.

Every edit rewrites the labels file atomically in its own format (a CSV stays a CSV, COCO stays
COCO), and bumps :attr:`LabelStore.version`. An edit names the version it was made on; when the
file has moved on since (another tab, another window), it is refused with :class:`Conflict`, so
no edit is ever lost by being written over.
"""

from __future__ import annotations

import hashlib
import json
import threading
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from detector.errors import InputError
from detector.io.files import read_bytes, write_bytes
from detector.io.labels import ImageLabels, read_labels, write_coco, write_labels_csv

__all__ = ["LabelStore", "Conflict", "EDITS"]

#: The edits :meth:`LabelStore.apply` knows.
EDITS = ("add", "delete", "move", "object-free", "reviewed")


class Conflict(Exception):
    """An edit made on a version of the labels that is no longer the current one."""


def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _box(value) -> list[float]:
    """A box ``[x, y, width, height]`` of finite numbers with positive size, or InputError."""
    try:
        box = [float(v) for v in value]
    except (TypeError, ValueError):
        raise InputError(f"a box is four numbers x, y, width, height; got {value!r}") from None
    if len(box) != 4 or not all(np.isfinite(box)) or box[2] <= 0 or box[3] <= 0:
        raise InputError(f"a box is four finite numbers x, y, width > 0, height > 0; got {value!r}")
    return box


@dataclass
class _Image:
    boxes: list            # [x, y, w, h] per label
    classes: list          # class name per label ("" for none)
    reviewed: bool = False


class LabelStore:
    """Labels of a folder of images, edited one step at a time (see the module's text).

    Parameters
    ----------
    path : path
        The labels file: CSV or COCO JSON (a Pascal VOC folder is refused: convert it first).
    images : iterable of str, optional
        Image names to list even when the file has no row for them (they start unlabelled and
        are written as object-free only once marked so).
    """

    def __init__(self, path, images=()):
        self.path = Path(path)
        if self.path.is_dir() or self.path.suffix.lower() == ".xml":
            raise InputError(f"{self.path}: review edits a labels CSV or COCO JSON file; "
                             "Pascal VOC annotations are read-only here")
        data = read_bytes(self.path)
        self.format = "coco" if data.lstrip()[:1] in (b"{", b"[") or \
            self.path.suffix.lower() == ".json" else "csv"
        labels = read_labels(self.path)
        self.image_sizes = dict(labels.image_sizes)
        self.images: dict[str, _Image] = {}
        self.listed: set[str] = set()  # images the file names (with boxes or object-free)
        for it in labels.items:
            self.images[it.image] = _Image([list(map(float, b)) for b in np.asarray(it.boxes)],
                                           [c or "" for c in (it.classes or [""] * len(it.boxes))])
            self.listed.add(it.image)
        for name in images:
            self.images.setdefault(name, _Image([], []))
        self.backup = self.path.with_name(self.path.name + ".bak")
        self.journal = self.path.with_name(self.path.name + ".journal.jsonl")
        self._lock = threading.Lock()
        self._stack: list[dict] = []  # edits that undo may take back, oldest first
        self.version = 0
        self._load_journal(_sha256(data))

    # -- journal -------------------------------------------------------------------------------
    def _load_journal(self, current_sha: str) -> None:
        """Rebuild the undo stack from the journal, if the labels file is still the one the
        journal's last line wrote (an edit by hand since then starts a new stack)."""
        if not self.journal.exists():
            return
        entries = []
        for number, line in enumerate(read_bytes(self.journal).decode("utf-8").splitlines(), 1):
            if not line.strip():
                continue
            try:
                entries.append(json.loads(line))
            except json.JSONDecodeError:
                raise InputError(f"{self.journal}, line {number}: not a JSON line") from None
        if not entries or entries[-1].get("sha256") != current_sha:
            return
        stack: list[dict] = []
        for e in entries:
            if e.get("undo"):
                if stack:
                    stack.pop()
            else:
                stack.append(e)
        self._stack = stack
        self.version = len(entries)
        for e in entries:  # reviewed flags live in the journal only
            if e.get("edit") == "reviewed" and e["image"] in self.images:
                self.images[e["image"]].reviewed = bool(e["after"])
            elif e.get("undo") and e.get("edit") == "reviewed" and e["image"] in self.images:
                self.images[e["image"]].reviewed = bool(e["before"])

    def _append_journal(self, entry: dict) -> None:
        old = read_bytes(self.journal) if self.journal.exists() else b""
        write_bytes(self.journal, old + (json.dumps(entry, sort_keys=True) + "\n").encode("utf-8"))

    # -- reading -------------------------------------------------------------------------------
    def labels_of(self, name: str) -> list:
        return [list(b) for b in self.images[name].boxes]

    def items(self) -> list[ImageLabels]:
        """What the labels file holds: every image it named, and every image with a box."""
        out = []
        for name, im in self.images.items():
            if name in self.listed or im.boxes:
                out.append(ImageLabels(name, np.asarray(im.boxes, np.float64).reshape(-1, 4),
                                       list(im.classes)))
        return out

    # -- writing -------------------------------------------------------------------------------
    def _write(self) -> str:
        if not self.backup.exists():
            write_bytes(self.backup, read_bytes(self.path))
        if self.format == "coco":
            write_coco(self.path, self.items(), self.image_sizes)
        else:
            write_labels_csv(self.path, self.items())
        return _sha256(read_bytes(self.path))

    def _check(self, version: int) -> None:
        if int(version) != self.version:
            raise Conflict(f"the labels changed since this page loaded them (version {version}, "
                           f"now {self.version}): reload to see the other edits, then edit again")

    def _image(self, name: str) -> _Image:
        if name not in self.images:
            raise InputError(f"no image {name!r} in this review")
        return self.images[name]

    def apply(self, version: int, edit: str, image: str, **args) -> int:
        """Apply one edit made on ``version`` and save it; returns the new version.

        Edits: ``add`` (``box``, optional ``cls``), ``delete`` (``index``), ``move`` (``index``,
        ``box``), ``object-free`` (every box of the image removed; the image written as
        object-free), ``reviewed`` (``value`` true or false; kept in the journal only).
        """
        with self._lock:
            self._check(version)
            im = self._image(image)
            entry = {"edit": edit, "image": image}
            if edit == "add":
                box = _box(args.get("box"))
                cls = str(args.get("cls") or (im.classes[0] if im.classes else ""))
                im.boxes.append(box)
                im.classes.append(cls)
                entry.update(index=len(im.boxes) - 1, box=box, cls=cls)
            elif edit in ("delete", "move"):
                index = int(args.get("index", -1))
                if not 0 <= index < len(im.boxes):
                    raise InputError(f"{image}: no label {index}")
                entry.update(index=index, before=im.boxes[index], cls=im.classes[index])
                if edit == "delete":
                    del im.boxes[index]
                    del im.classes[index]
                else:
                    im.boxes[index] = entry["box"] = _box(args.get("box"))
            elif edit == "object-free":
                entry.update(before=im.boxes, classes=im.classes, listed=image in self.listed)
                im.boxes, im.classes = [], []
                self.listed.add(image)
            elif edit == "reviewed":
                entry.update(before=im.reviewed, after=bool(args.get("value", True)))
                im.reviewed = entry["after"]
            else:
                raise InputError(f"unknown edit {edit!r}; one of {', '.join(EDITS)}")
            entry["sha256"] = self._write() if edit != "reviewed" else \
                _sha256(read_bytes(self.path))
            self._append_journal(entry)
            self._stack.append(entry)
            self.version += 1
            return self.version

    def undo(self, version: int) -> tuple[int, str | None]:
        """Take back the latest edit not yet taken back; returns (new version, its image) or
        (version, None) when there is nothing to undo."""
        with self._lock:
            self._check(version)
            if not self._stack:
                return self.version, None
            e = self._stack.pop()
            im = self._image(e["image"])
            if e["edit"] == "add":
                del im.boxes[e["index"]]
                del im.classes[e["index"]]
            elif e["edit"] == "delete":
                im.boxes.insert(e["index"], e["before"])
                im.classes.insert(e["index"], e["cls"])
            elif e["edit"] == "move":
                im.boxes[e["index"]] = e["before"]
            elif e["edit"] == "object-free":
                im.boxes, im.classes = list(e["before"]), list(e["classes"])
                if not e["listed"]:
                    self.listed.discard(e["image"])
            elif e["edit"] == "reviewed":
                im.reviewed = e["before"]
            sha = self._write() if e["edit"] != "reviewed" else _sha256(read_bytes(self.path))
            self._append_journal({"undo": True, "edit": e["edit"], "image": e["image"],
                                  "before": e.get("before"), "sha256": sha})
            self.version += 1
            return self.version, e["image"]
