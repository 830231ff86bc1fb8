"""Reading what the score report scores: a detections file and a labels file (CSV or COCO
JSON, through :mod:`detector.io.labels`), checked against each other.
"""

from __future__ import annotations

from typing import Iterable

import os
import posixpath
from dataclasses import dataclass, field

import numpy as np

from detector.errors import InputError

__all__ = [
    "ScoreInputs",
    "at_threshold",
    "check_image_names",
    "name_mismatches",
    "read_score_inputs",
]

@dataclass
class ScoreInputs:
    """A detections file and a labels file, read and checked, ready for :func:`evaluate`.

    Attributes
    ----------
    detections : dict of str to (ndarray, ndarray)
        Image name -> boxes ``(K, 4)`` float64 and scores ``(K,)`` float64.
    ground_truth : dict of str to ndarray
        Labelled image name -> boxes ``(G, 4)`` float64 (G = 0 for an object-free image).
    detections_path, labels_path : str
    label : str or None
        The class picked from the labels file, if any.
    notes : list of str
        One line per thing worth knowing (clipped or repeated label rows, an empty detections
        file).
    """

    detections: dict
    ground_truth: dict
    detections_path: str
    labels_path: str
    label: str | None = None
    notes: list = field(default_factory=list)
    #: image name -> bool flags of its labelled boxes that are ignore regions
    ignore: dict = field(default_factory=dict)


def _looks_like_json(path) -> bool:
    if os.fspath(path).lower().endswith(".json"):
        return True
    try:
        with open(path, "rb") as fh:
            head = fh.read(64).lstrip(b"\xef\xbb\xbf \t\r\n")
    except OSError:
        return False
    return head[:1] in (b"{", b"[")


def _first_character(path) -> bytes:
    try:
        with open(path, "rb") as fh:
            return fh.read(4096).lstrip(b"\xef\xbb\xbf \t\r\n")[:1]
    except OSError:
        return b""  # the reader reports it


def _is_blank_file(path) -> bool:
    try:
        with open(path, "rb") as fh:
            data = fh.read(4096)
            more = fh.read(1)
    except OSError:
        return False  # the reader reports it
    return not more and not data.lstrip(b"\xef\xbb\xbf \t\r\n")


def check_image_names(detection_images: Iterable[str], labelled_images: Iterable[str],
                      path: str | os.PathLike | None = None) -> None:
    """Refuse detections whose image names can only match the labels by ignoring folder or case.

    When some detection images are given, none of them is a labelled image, but some are after
    taking the file name without its folder and/or lower-casing, the two files were written with
    different conventions (e.g. a scan of ``test/`` instead of ``test/images``): scoring them as
    they are would report every object missed.

    Parameters
    ----------
    detection_images, labelled_images : iterable of str
        Image names as the two files write them.
    path : str or os.PathLike, optional
        The detections file, named in the error.

    Raises
    ------
    InputError
        With one example pair of names.

    Examples
    --------
    >>> check_image_names(["frame_0001.png", "other.png"], ["frame_0001.png"])  # one matches: fine
    >>> check_image_names(["Test/images/frame_0001.png"], ["frame_0001.png"], "detections.csv")
    Traceback (most recent call last):
    ...
    detector.errors.InputError: detections.csv: no detection image matches a labelled image; \
they differ in folder, e.g. 'Test/images/frame_0001.png' vs 'frame_0001.png' — scan the images \
folder itself so names are relative to it
    """
    detected = list(dict.fromkeys(detection_images))
    labelled = list(dict.fromkeys(labelled_images))
    if not detected or not labelled or set(detected) & set(labelled):
        return
    forms = (
        ("letter case", str.lower,
         "write the names with the same letter case as the labels"),
        ("folder", posixpath.basename,
         "scan the images folder itself so names are relative to it"),
        ("folder and letter case", lambda s: posixpath.basename(s).lower(),
         "scan the images folder itself so names are relative to it, and check the letter case"),
    )
    for kind, form, advice in forms:
        index = {}
        for name in labelled:
            index.setdefault(form(name), name)
        for name in detected:
            other = index.get(form(name))
            if other is not None:
                raise InputError(f"no detection image matches a labelled image; they differ in "
                                 f"{kind}, e.g. {name!r} vs {other!r} — {advice}", path=path)


#: Image names a mismatch warning shows.
SHOWN_NAMES = 3


def _names(names) -> str:
    shown = ", ".join(repr(n) for n in names[:SHOWN_NAMES])
    return shown + (f" and {len(names) - SHOWN_NAMES} more" if len(names) > SHOWN_NAMES else "")


def name_mismatches(detection_images: Iterable[str], labelled_images: Iterable[str],
                    detections_path: str | os.PathLike | None = None,
                    labels_path: str | os.PathLike | None = None) -> list[str]:
    """One line per kind of mismatch between the images of a detections file and those of a
    labels file, naming how many and the first few.

    A labelled image without a row in the detections file is scored as if nothing was found in
    it (``patchwood scan`` writes a row for every image it scans, so the image was most likely
    not scanned: another folder, or a typo in a name). An image with rows but no labels is left
    out of every figure.

    Examples
    --------
    >>> for line in name_mismatches(["a.png", "x.png"], ["a.png", "b.png", "c.png"],
    ...                             "det.csv", "labels.csv"):
    ...     print(line)
    det.csv: 2 of 3 labelled images have no rows in it (not scanned: another folder or a typo?); scored as finding nothing there: 'b.png', 'c.png'
    det.csv: 1 image has rows but is not in labels.csv; left out of every figure: 'x.png'
    """
    detected = list(dict.fromkeys(detection_images))
    labelled = list(dict.fromkeys(labelled_images))
    seen, known = set(detected), set(labelled)
    missing = [n for n in labelled if n not in seen]
    extra = [n for n in detected if n not in known]
    where = "" if detections_path is None else f"{os.fspath(detections_path)}: "
    lines = []
    if missing:
        lines.append(f"{where}{len(missing)} of {len(labelled)} labelled images "
                     f"{'has' if len(missing) == 1 else 'have'} no rows in it (not scanned: "
                     f"another folder or a typo?); scored as finding nothing there: "
                     f"{_names(missing)}")
    if extra:
        other = "the labels" if labels_path is None else os.fspath(labels_path)
        lines.append(f"{where}{len(extra)} image{' has' if len(extra) == 1 else 's have'} rows but "
                     f"{'is' if len(extra) == 1 else 'are'} not in {other}; left out of every "
                     f"figure: {_names(extra)}")
    return lines


def at_threshold(detections: dict, threshold: float) -> dict:
    """The detections scoring ``threshold`` or more, image by image (every image stays).

    >>> at_threshold({"a.png": ([[0, 0, 5, 5], [9, 9, 5, 5]], [0.9, 0.2])}, 0.5)["a.png"][1]
    array([0.9])
    """
    out = {}
    for name, (boxes, scores) in detections.items():
        b = np.asarray(boxes, dtype=np.float64).reshape(-1, 4)
        sc = np.asarray(scores, dtype=np.float64).reshape(-1)
        keep = sc >= threshold
        out[name] = (b[keep], sc[keep])
    return out


def read_score_inputs(detections_path: str | os.PathLike, labels_path: str | os.PathLike,
                      label: str | None = None, ignore_label: str | None = None) -> ScoreInputs:
    """Read a detections file and a labels file (CSV or COCO JSON each) for scoring.

    A detections file that is empty (no bytes, or a header row only) means no detections: the
    score is then 0, not an error. A COCO results list of detections takes its image ids from the
    labels file when that is COCO JSON.

    Parameters
    ----------
    detections_path, labels_path : str or os.PathLike
    label : str, optional
        Keep only labelled boxes of this class (``--label``).

    Returns
    -------
    ScoreInputs

    Raises
    ------
    InputError
        Anything the readers of :mod:`detector.io.labels` refuse (naming file and line), a labels
        file without images, and names that differ only in folder or case
        (:func:`check_image_names`).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> _ = (d / "labels.csv").write_text("image,x,y,width,height\\na.png,0,0,10,10\\nb.png,,,,\\n")
    >>> _ = (d / "detections.csv").write_text("image,x,y,width,height,score\\n")
    >>> inputs = read_score_inputs(d / "detections.csv", d / "labels.csv")
    >>> sorted(inputs.ground_truth), inputs.detections
    (['a.png', 'b.png'], {})
    """
    from detector.io.labels import normalise_image_name, read_detections, read_labels

    if ignore_label is None:
        labels = read_labels(labels_path, label=label)
        ignore = {it.image: it.ignore for it in labels if it.ignore.any()}
    else:   # the ignore class is kept beside the class scored, and flagged
        labels = read_labels(labels_path)
        ignore = {}
        for it in labels:
            classes = np.array(it.classes, dtype=object)
            region = it.ignore | (classes == ignore_label)
            keep = region | (classes == label) if label is not None else np.ones(len(classes), bool)
            it.boxes, it.classes, it.ignore = it.boxes[keep], list(classes[keep]), region[keep]
            if it.ignore.any():
                ignore[it.image] = it.ignore
    if len(labels) == 0:
        raise InputError("the labels file lists no images", path=labels_path)
    notes = list(labels.notes[:20])
    if len(labels.notes) > 20:
        notes.append(f"... and {len(labels.notes) - 20} more notes about {os.fspath(labels_path)}")
    if labels.crowd:
        notes.append(f"{os.fspath(labels_path)}: {labels.crowd} crowd annotations left out")
    if _is_blank_file(detections_path):
        notes.append(f"{os.fspath(detections_path)}: the file is empty; scored as no detections")
        found = []
    else:
        labels_json = _looks_like_json(labels_path)
        if not labels_json and _first_character(detections_path) == b"[":
            raise InputError("a COCO results list names its images by id; score it against the "
                             "COCO labels file that defines those ids", path=detections_path)
        found = read_detections(detections_path, images=labels_path if labels_json else None)
    ground_truth = {it.image: it.boxes for it in labels}
    detections = {}
    for d in found:  # names as labels hold them (a detections file keeps them exactly)
        name = normalise_image_name(d.image)
        if name in detections:
            boxes, scores = detections[name]
            detections[name] = (np.concatenate([boxes, d.boxes]),
                                np.concatenate([scores, d.scores]))
        else:
            detections[name] = (d.boxes, d.scores)
    check_image_names(list(detections), list(ground_truth), detections_path)
    return ScoreInputs(detections=detections, ground_truth=ground_truth,
                       detections_path=os.fspath(detections_path),
                       labels_path=os.fspath(labels_path), label=label, notes=notes,
                       ignore=ignore)
