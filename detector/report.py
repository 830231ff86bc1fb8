"""Scoring files of detections against labels, and the report a person reads: plots, galleries of
false alarms and missed objects, a per-image table, all in one folder that opens offline.

The stage after ``scan``: :func:`score_files` reads a detections file and a labels file (CSV or
COCO JSON, through :mod:`detector.io.labels`), scores them with :func:`detector.evaluation.evaluate`,
picks an operating point and writes the report folder::

    DIR/report.html            headline figures, plots, galleries, per-image table (no external assets)
    DIR/summary.json           every figure, machine-readable; "operating_point" feeds `scan`
    DIR/precision-recall.png   DIR/miss-rate.png   DIR/score-histogram.png
    DIR/gallery/false-alarm-01.png ...   DIR/gallery/missed-01.png ...

The pieces are public too: :func:`read_score_inputs`, :func:`check_image_names`,
:func:`choose_operating_point`, :func:`build_summary`, the three ``plot_*`` functions,
:func:`thumbnail`, :func:`write_report`, :func:`summary_table` and :func:`threshold_from_summary`.

Pictures use the project's own marks, the same in the galleries, the plots and the legend:
matched detections solid, false alarms dashed, missed objects dotted, in three hues taken from the
colour-blind-safe set of Okabe & Ito (2008, "Color Universal Design"). Every box is drawn over a
dark outline so that it stays visible on light and dark backgrounds.
"""

from __future__ import annotations

import html
import json
import math
import os
import posixpath
import re
from dataclasses import dataclass, field
from pathlib import Path
from urllib.parse import quote

import numpy as np

from detector._validation import finite_or_none
from detector.errors import InputError
from detector.io.files import atomic_write, read_bytes, same_file, write_bytes, write_text
from detector.evaluation import (Evaluation, check_targets, choose_operating_point, evaluate,
                                 fppi_at_recall, match_image)
from detector.evaluation.curves import reachable
from detector.io.npzfile import file_sha256
from detector.provenance import describe_settings, provenance_of

__all__ = [
    "BOX_STYLES",
    "GALLERY_SIZE",
    "REPORT_FILES",
    "SUMMARY_FORMAT",
    "ScoreInputs",
    "ScoreResult",
    "at_threshold",
    "build_summary",
    "check_image_names",
    "check_report_folder",
    "name_mismatches",
    "plot_miss_rate",
    "plot_precision_recall",
    "plot_score_histogram",
    "read_score_inputs",
    "read_summary_point",
    "score_files",
    "summary_table",
    "threshold_from_summary",
    "thumbnail",
    "write_report",
]

#: Identifies a summary file written here (``summary.json["format"]``), with its version.
SUMMARY_FORMAT = "patchwood score summary"
SUMMARY_VERSION = 1
#: Thumbnails per gallery.
GALLERY_SIZE = 24
#: Side of a gallery thumbnail, in pixels.
THUMBNAIL_SIZE = 128
#: The files a report consists of (the galleries add ``gallery/false-alarm-NN.png`` and
#: ``gallery/missed-NN.png``).
REPORT_FILES = ("report.html", "summary.json", "precision-recall.png", "miss-rate.png",
                "score-histogram.png")
_GALLERY_FILE = re.compile(r"(false-alarm|missed)-\d+\.png")

#: How boxes are drawn: kind -> (RGB colour, line style, legend text). Hues from Okabe & Ito
#: (2008): bluish green, vermillion and yellow; the line styles tell them apart in gray print too.
BOX_STYLES = {
    "matched": ((0, 158, 115), "solid", "matched detection"),
    "false alarm": ((213, 94, 0), "dashed", "false alarm"),
    "missed": ((240, 228, 66), "dotted", "missed object"),
}
_CURVE_RGB = (0, 114, 178)  # Okabe & Ito blue, for curves
_OUTLINE_BGR = (24, 24, 24)


def _hex(rgb) -> str:
    return "#{:02x}{:02x}{:02x}".format(*rgb)


def _bgr(rgb) -> tuple[int, int, int]:
    return int(rgb[2]), int(rgb[1]), int(rgb[0])


# --------------------------------------------------------------------------------------------
# reading the inputs


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


def check_image_names(detection_images, labelled_images, path=None) -> None:
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


def name_mismatches(detection_images, labelled_images, detections_path=None,
                    labels_path=None) -> list[str]:
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


def read_score_inputs(detections_path, labels_path, label: str | None = None) -> ScoreInputs:
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

    labels = read_labels(labels_path, label=label)
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
                       labels_path=os.fspath(labels_path), label=label, notes=notes)


# --------------------------------------------------------------------------------------------
# the summary


def build_summary(evaluation: Evaluation, point: dict, inputs: dict | None = None,
                  notes=(), errors: Evaluation | None = None, provenance: dict | None = None,
                  warnings=()) -> dict:
    """Every figure of a scoring run as plain JSON-ready types (the content of ``summary.json``).

    Parameters
    ----------
    evaluation : Evaluation
    point : dict
        From :func:`choose_operating_point`.
    inputs : dict, optional
        What was scored and how (file names, IoU, label, targets).
    notes : sequence of str
        Lines worth knowing, kept in the file.
    errors : Evaluation, optional
        The evaluation of the detections at or above the operating point's threshold
        (:func:`at_threshold`): its counts, per-image rows and error lists go under
        ``at_operating_point``.
    provenance : dict, optional
        The detections file's provenance record (:mod:`detector.provenance`): which model and
        settings made them. ``scan --threshold-from`` checks it.
    warnings : sequence of str
        Mismatches between the detections and the labels (:func:`name_mismatches`).

    Returns
    -------
    dict
        ``format``, ``version``, ``inputs``, ``provenance``, ``operating_point`` (``threshold``,
        ``precision``, ``recall``, ``rule``, ...), ``at_operating_point`` (``threshold``, counts,
        ``per_image``, ``false_alarm_list``, ``miss_list`` of the detections kept there),
        ``fppi_at_recall_0.9``, ``unlabelled_image_count``, ``warnings``, ``notes``, then
        everything of ``evaluation.to_dict()`` (figures, curves, size buckets, and per-image rows,
        false alarm and miss lists of every detection in the file).

    Examples
    --------
    >>> from detector.evaluation import evaluate
    >>> ev = evaluate({"a.png": ([[0, 0, 10, 10]], [0.8])}, {"a.png": [[0, 0, 10, 10]]})
    >>> s = build_summary(ev, choose_operating_point(ev))
    >>> s["average_precision"], s["operating_point"]["threshold"], s["fppi_at_recall_0.9"]
    (1.0, 0.8, 0.0)
    """
    at_point = None
    if errors is not None:
        e = errors.to_dict()
        at_point = {"threshold": point.get("threshold"), "detections": errors.detections,
                    "true_detections": errors.true_detections,
                    "false_alarms": errors.false_alarms, "misses": errors.misses,
                    "per_image": e["per_image"], "false_alarm_list": e["false_alarm_list"],
                    "miss_list": e["miss_list"]}
    summary = {
        "format": SUMMARY_FORMAT,
        "version": SUMMARY_VERSION,
        "inputs": dict(inputs or {}),
        "provenance": provenance,
        "operating_point": {k: (finite_or_none(v) if isinstance(v, (float, np.floating)) else v)
                            for k, v in point.items()},
        "at_operating_point": at_point,
        "fppi_at_recall_0.9": finite_or_none(fppi_at_recall(evaluation, 0.9)),
        "unlabelled_image_count": len(evaluation.unlabelled_images),
        "warnings": list(warnings),
        "notes": list(notes),
    }
    summary.update(evaluation.to_dict())
    return summary


def _summary_text(summary: dict) -> str:
    """One top-level key per line, values compact: readable, diffable and still small."""
    lines = [f"  {json.dumps(k)}: {json.dumps(v, allow_nan=False, ensure_ascii=False)}"
             for k, v in summary.items()]
    return "{\n" + ",\n".join(lines) + "\n}\n"


#: The most bytes :func:`threshold_from_summary` reads (a summary.json is a few kilobytes).
SUMMARY_MAX_BYTES = 16 * 2**20


def threshold_from_summary(path) -> float:
    """The recommended score threshold stored in a ``summary.json`` written by ``score`` (see
    :func:`read_summary_point`, which also gives the provenance of the scored detections).

    Parameters
    ----------
    path : str or os.PathLike
        The summary file.

    Returns
    -------
    float
        ``summary["operating_point"]["threshold"]``.

    Raises
    ------
    InputError
        One line naming the file: it is missing or unreadable, is not valid JSON (with the line),
        has no operating point, its threshold is null (the rule could not be met) or is not a
        score in 0..1.

    Examples
    --------
    >>> import tempfile, pathlib, json
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "summary.json"
    >>> _ = path.write_text(json.dumps({"operating_point": {"threshold": 0.62, "rule": "best F1"}}))
    >>> threshold_from_summary(path)
    0.62
    """
    return read_summary_point(path)[0]


def read_summary_point(path) -> tuple[float, dict | None]:
    """``(threshold, provenance)`` from a ``summary.json`` written by ``score``: the recommended
    score threshold, and the provenance record of the detections it was computed from (None
    when the summary has none: detections made by another program or an older patchwood).

    Raises
    ------
    InputError
        As :func:`threshold_from_summary`, and for a provenance entry that is not a record.
    """
    from detector.provenance import _check_record

    try:
        data = read_bytes(path, max_bytes=SUMMARY_MAX_BYTES)
    except OSError as err:
        reason = "no such file" if isinstance(err, FileNotFoundError) else (
            err.strerror or str(err))
        raise InputError(f"cannot read the summary: {reason}", path=path) from None
    try:
        doc = json.loads(data.decode("utf-8-sig"))
    except UnicodeDecodeError:
        raise InputError("the summary is not UTF-8 text", path=path) from None
    except json.JSONDecodeError as err:
        raise InputError(f"the summary is not valid JSON: {err.msg}", path=path,
                         line=err.lineno) from None
    except (RecursionError, ValueError):
        raise InputError("the summary is not valid JSON", path=path) from None
    point = doc.get("operating_point") if isinstance(doc, dict) else None
    if not isinstance(point, dict) or "threshold" not in point:
        raise InputError("no operating point in the file (expected the summary.json that "
                         "`patchwood score` writes)", path=path)
    t = point["threshold"]
    if t is None:
        rule = point.get("rule") or "the rule"
        raise InputError(f"the operating point has no threshold: {rule} could not be met; "
                         "score again with another target", path=path)
    if isinstance(t, bool) or not isinstance(t, (int, float)) or not math.isfinite(t):
        raise InputError(f"the operating point's threshold is not a number: {t!r}", path=path)
    if not 0.0 <= t <= 1.0:
        raise InputError(f"the operating point's threshold {t!r} is not a score in 0..1",
                         path=path)
    record = doc.get("provenance")
    if record is not None:
        record = _check_record(record, path)
    return float(t), record


def _fmt(value, digits: int = 3) -> str:
    v = finite_or_none(value)
    return "n/a" if v is None else f"{v:.{digits}f}"


def _percent(value) -> str:
    v = finite_or_none(value)
    return "n/a" if v is None else f"{100 * v:.1f}%"


def _ap_name(iou_threshold) -> str:
    t = float(iou_threshold)
    return "AP50" if t == 0.5 else f"AP at IoU {t:.2f}"


def _near_path(path) -> str:
    """A recorded absolute path as the user would type it: relative to the working folder when
    inside it."""
    text = str(path)
    try:
        rel = os.path.relpath(text)
    except ValueError:
        return text
    return text if rel.startswith("..") else rel


def summary_table(summary: dict, report_path=None) -> list[tuple[str, str]]:
    """The short summary the terminal prints: ``(name, value)`` rows.

    Parameters
    ----------
    summary : dict
        From :func:`build_summary` (or a loaded ``summary.json``).
    report_path : str or os.PathLike, optional
        Added as the last row.

    Returns
    -------
    list of (str, str)

    Examples
    --------
    >>> from detector.evaluation import evaluate
    >>> ev = evaluate({"a.png": ([[0, 0, 10, 10]], [0.8])}, {"a.png": [[0, 0, 10, 10]]})
    >>> dict(summary_table(build_summary(ev, choose_operating_point(ev))))["AP50 (all-point)"]
    '1.000'
    """
    ap = _ap_name(summary.get("iou_threshold", 0.5))
    point = summary.get("operating_point") or {}
    rule = point.get("rule", "best F1")
    if point.get("threshold") is None:
        point_row = [(f"operating point ({rule})", point.get("note") or "cannot be met")]
    else:
        point_row = [(f"operating point ({rule})",
                      f"threshold {_fmt(point['threshold'], 4)}: precision "
                      f"{_fmt(point.get('precision'))}, recall {_fmt(point.get('recall'))}")]
    f09 = summary.get("fppi_at_recall_0.9")
    rows = [
        (f"{ap} (all-point)", _fmt(summary.get("average_precision"))),
        (f"{ap} (11-point)", _fmt(summary.get("average_precision_11_point"))),
        ("AP50:95 (101-point)", _fmt(summary.get("average_precision_50_to_95"))),
        ("best F1: precision / recall", f"{_fmt(summary.get('best_f1_precision'))} / "
                                        f"{_fmt(summary.get('best_f1_recall'))}"),
        ("best F1: threshold", _fmt(summary.get("best_f1_threshold"), 4)),
        *point_row,
        ("FPPI at recall 0.9", "not reached" if f09 is None else _fmt(f09)),
        ("log-average miss rate", _percent(summary.get("log_average_miss_rate"))),
        ("images / objects", f"{summary.get('images', 0)} / {summary.get('objects', 0)}"),
        ("detections / true", f"{summary.get('detections', 0)} / "
                              f"{summary.get('true_detections', 0)}"),
        ("false alarms / misses", f"{summary.get('false_alarms', 0)} / "
                                  f"{summary.get('misses', 0)}"),
    ]
    at = summary.get("at_operating_point")
    if at:
        rows.append((f"at {_fmt(at['threshold'], 4)}: detections / true",
                     f"{at['detections']} / {at['true_detections']}"))
        rows.append((f"at {_fmt(at['threshold'], 4)}: false alarms / misses",
                     f"{at['false_alarms']} / {at['misses']}"))
    if summary.get("unlabelled_image_count"):
        rows.append(("unlabelled images (left out)",
                     f"{summary['unlabelled_image_count']} with "
                     f"{summary.get('unlabelled_detections', 0)} detections"))
    record = summary.get("provenance")
    if record:
        model = record.get("model") or {}
        rows.append(("model", f"{_near_path(model.get('file'))} (sha256 "
                              f"{str(model.get('sha256'))[:12]})"))
        rows.append(("scan settings", describe_settings(record.get("settings") or {})))
    if report_path is not None:
        rows.append(("report", os.fspath(report_path)))
    return rows


# --------------------------------------------------------------------------------------------
# plots (matplotlib, Agg canvas: no display needed)


def _figure(width=5.4, height=4.2):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=110)
    FigureCanvasAgg(fig)
    # fixed margins (in inches, so both figure sizes look alike): a layout engine draws twice
    fig.subplots_adjust(left=0.75 / width, right=1 - 0.15 / width, bottom=0.55 / height,
                        top=1 - 0.35 / height)
    return fig


def _save(fig, path) -> None:
    with atomic_write(path) as fh:
        fig.savefig(fh, format="png", metadata={"Software": None})


def _nothing_to_draw(ax, text: str) -> None:
    ax.text(0.5, 0.5, text, ha="center", va="center", transform=ax.transAxes, color="#555555")


def plot_precision_recall(evaluation: Evaluation, path, point: dict | None = None) -> None:
    """Draw the precision-recall curve with its AP in the legend and the operating point marked.

    The raw curve (one point per detection in descending score) is drawn with the interpolated
    precision (the highest precision at any recall at least as large; its area is the all-point
    AP) and faint lines of equal F1.

    Parameters
    ----------
    evaluation : Evaluation
    path : str or os.PathLike
        The PNG to write.
    point : dict, optional
        From :func:`choose_operating_point`; marked when it has a threshold.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> from detector.evaluation import evaluate
    >>> ev = evaluate({"a.png": ([[0, 0, 10, 10]], [0.8])}, {"a.png": [[0, 0, 10, 10]]})
    >>> out = pathlib.Path(tempfile.mkdtemp()) / "pr.png"
    >>> plot_precision_recall(ev, out, choose_operating_point(ev)); out.stat().st_size > 0
    True
    """
    fig = _figure()
    ax = fig.add_subplot()
    ax.set_xlim(0, 1.0)
    ax.set_ylim(0, 1.03)
    ax.set_xlabel("recall (share of objects found)")
    ax.set_ylabel("precision (share of detections that are right)")
    ax.set_title(f"Precision-recall at IoU {evaluation.iou_threshold:.2f}", fontsize=11)
    ax.grid(True, color="#dddddd", linewidth=0.6)
    r_grid = np.linspace(0.01, 1.0, 200)
    for f in (0.2, 0.4, 0.6, 0.8):  # precision on the curve of equal F1: p = f r / (2 r - f)
        with np.errstate(divide="ignore", invalid="ignore"):
            p = f * r_grid / (2 * r_grid - f)
        ok = (r_grid > f / 2) & (p <= 1.03) & (p > 0)
        ax.plot(r_grid[ok], p[ok], color="#bbbbbb", linewidth=0.7, linestyle=":")
        if ok.any():
            ax.text(r_grid[ok][-1], p[ok][-1] + 0.01, f"F1={f:.1f}", fontsize=7, color="#999999",
                    ha="right", va="bottom")
    recall = np.asarray(evaluation.recall, dtype=np.float64)
    precision = np.asarray(evaluation.precision, dtype=np.float64)
    colour = _hex(_CURVE_RGB)
    if evaluation.objects == 0:
        _nothing_to_draw(ax, "no labelled objects: recall is undefined")
    elif len(recall) == 0:
        _nothing_to_draw(ax, "no detections on labelled images (AP 0)")
    else:
        envelope = np.maximum.accumulate(precision[::-1])[::-1]
        ax.plot(np.concatenate([[0.0], recall]), np.concatenate([[envelope[0]], envelope]),
                drawstyle="steps-pre", color=colour, linewidth=2.0, alpha=0.35,
                label="interpolated precision (area = AP)")
        ax.plot(recall, precision, color=colour, linewidth=1.2,
                label=f"{_ap_name(evaluation.iou_threshold)} all-point = "
                      f"{evaluation.average_precision:.3f}")
        ax.plot([], [], " ", label=f"11-point AP = {evaluation.average_precision_11_point:.3f}")
    if point and point.get("threshold") is not None:
        ax.plot([point["recall"]], [point["precision"]], marker="o", markersize=9,
                markerfacecolor=_hex(BOX_STYLES["false alarm"][0]), markeredgecolor="black",
                linestyle="none",
                label=f"threshold {point['threshold']:.3g} ({point['rule']}):\n"
                      f"precision {point['precision']:.3f}, recall {point['recall']:.3f}")
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc="lower left", fontsize=8, framealpha=0.92)
    _save(fig, path)


def plot_miss_rate(evaluation: Evaluation, path, point: dict | None = None) -> None:
    """Draw miss rate against false alarms per image (FPPI) on log axes.

    The curve is read as the log-average miss rate reads it (Dollar et al., PAMI 2012): at each
    FPPI, the miss rate of the threshold with the largest FPPI not above it; it starts at
    "keep nothing" (miss rate 1) and stays flat past the last threshold. Thresholds with no false
    alarm sit on the left edge. The shaded band is the FPPI range 0.01..1 that the log-average
    miss rate (in the legend) averages over.

    Parameters
    ----------
    evaluation : Evaluation
    path : str or os.PathLike
        The PNG to write.
    point : dict, optional
        From :func:`choose_operating_point`; marked when it has a threshold.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> from detector.evaluation import evaluate
    >>> ev = evaluate({"a.png": ([[0, 0, 10, 10]], [0.8])}, {"a.png": [[0, 0, 10, 10]]})
    >>> out = pathlib.Path(tempfile.mkdtemp()) / "miss.png"
    >>> plot_miss_rate(ev, out); out.stat().st_size > 0
    True
    """
    from matplotlib.ticker import FixedLocator, NullFormatter, NullLocator

    fig = _figure()
    ax = fig.add_subplot()
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("false alarms per image (FPPI)")
    ax.set_ylabel("miss rate (share of objects missed)")
    ax.set_title(f"Miss rate against FPPI at IoU {evaluation.iou_threshold:.2f}", fontsize=11)
    fppi = np.asarray(evaluation.false_alarms_per_image, dtype=np.float64)
    miss = np.asarray(evaluation.miss_rate, dtype=np.float64)
    reach = reachable(np.asarray(evaluation.thresholds))
    fppi, miss = fppi[reach], miss[reach]
    positive = fppi[fppi > 0]
    x_low = min(1e-3, positive.min() / 2) if len(positive) else 1e-3
    x_high = max(10.0, fppi.max() * 2) if len(fppi) else 10.0
    y_low = 0.01
    if len(miss) and np.isfinite(miss).all() and miss.min() > 0:
        y_low = min(0.01, miss.min() / 1.5)
    ax.set_xlim(x_low, x_high)
    ax.set_ylim(y_low, 1.05)
    ticks = [t for t in (0.01, 0.02, 0.05, 0.1, 0.2, 0.3, 0.5, 0.8, 1.0) if t >= y_low]
    ax.yaxis.set_major_locator(FixedLocator(ticks))
    ax.yaxis.set_minor_formatter(NullFormatter())
    ax.set_yticklabels([f"{t:g}" for t in ticks])
    x_ticks = [10.0 ** k for k in range(int(np.floor(np.log10(x_low))),
                                        int(np.ceil(np.log10(x_high))) + 1)]
    x_ticks = [t for t in x_ticks if x_low <= t <= x_high]
    ax.xaxis.set_major_locator(FixedLocator(x_ticks))
    ax.xaxis.set_minor_locator(NullLocator())
    ax.set_xticklabels([f"{t:g}" for t in x_ticks])  # plain numbers, no exponents
    ax.grid(True, which="major", color="#dddddd", linewidth=0.6)
    ax.axvspan(0.01, 1.0, color="#eeeeee", zorder=0, label="FPPI range averaged (0.01..1)")
    colour = _hex(_CURVE_RGB)
    if evaluation.objects == 0:
        _nothing_to_draw(ax, "no labelled objects: miss rate is undefined")
    else:
        xs = np.concatenate([[x_low], np.maximum(fppi, x_low), [x_high]])
        ys = np.concatenate([[1.0], miss, [miss[-1] if len(miss) else 1.0]])
        ys = np.maximum(ys, y_low)  # a miss rate of 0 sits on the bottom edge
        ax.plot(xs, ys, drawstyle="steps-post", color=colour, linewidth=1.6,
                label=f"log-average miss rate = {_percent(evaluation.log_average_miss_rate)}")
        if len(fppi) == 0:
            ax.text(0.5, 0.3, "no detections on labelled images", ha="center",
                    transform=ax.transAxes, color="#555555")
    if point and point.get("threshold") is not None and point.get("recall") is not None:
        ax.plot([max(point["false_alarms_per_image"], x_low)],
                [max(1.0 - point["recall"], y_low)], marker="o", markersize=9,
                markerfacecolor=_hex(BOX_STYLES["false alarm"][0]), markeredgecolor="black",
                linestyle="none", label=f"threshold {point['threshold']:.3g} ({point['rule']})")
    ax.legend(loc="lower left", fontsize=8, framealpha=0.92)
    _save(fig, path)


def plot_score_histogram(evaluation: Evaluation, path, threshold: float | None = None) -> None:
    """Draw histograms of the scores of true detections and of false alarms.

    Parameters
    ----------
    evaluation : Evaluation
    path : str or os.PathLike
        The PNG to write.
    threshold : float, optional
        The recommended threshold, drawn as a vertical line.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> from detector.evaluation import evaluate
    >>> ev = evaluate({"a.png": ([[0, 0, 10, 10], [30, 0, 9, 9]], [0.8, 0.3])},
    ...               {"a.png": [[0, 0, 10, 10]]})
    >>> out = pathlib.Path(tempfile.mkdtemp()) / "hist.png"
    >>> plot_score_histogram(ev, out, 0.8); out.stat().st_size > 0
    True
    """
    from matplotlib.ticker import MaxNLocator

    fig = _figure(5.4, 3.6)
    ax = fig.add_subplot()
    scores = np.asarray(evaluation.thresholds, dtype=np.float64)
    true = np.asarray(evaluation.is_true, dtype=bool)
    bins = np.linspace(0.0, 1.0, 26)
    ax.set_xlim(0, 1)
    ax.set_xlabel("score")
    ax.set_ylabel("detections")
    ax.set_title("Scores of true detections and false alarms", fontsize=11)
    ax.grid(True, axis="y", color="#dddddd", linewidth=0.6)
    ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    if len(scores) == 0:
        ax.set_ylim(0, 1)
        _nothing_to_draw(ax, "no detections on labelled images")
    for flag, kind in ((True, "matched"), (False, "false alarm")):
        rgb, style, _ = BOX_STYLES[kind]
        chosen = scores[true == flag]
        name = "true detections" if flag else "false alarms"
        ax.hist(chosen, bins=bins, histtype="stepfilled", color=_hex(rgb), alpha=0.35,
                edgecolor=_hex(rgb), linewidth=1.4, linestyle=style,
                label=f"{name} ({len(chosen)})")
    if threshold is not None and finite_or_none(threshold) is not None:
        ax.axvline(threshold, color="black", linewidth=1.2, label=f"threshold {threshold:.3g}")
    ax.legend(loc="upper left", fontsize=8, framealpha=0.92)
    _save(fig, path)


# --------------------------------------------------------------------------------------------
# thumbnails


def _dash_segments(p0, p1, on: float, off: float):
    p0, p1 = np.asarray(p0, dtype=np.float64), np.asarray(p1, dtype=np.float64)
    length = float(np.hypot(*(p1 - p0)))
    if length == 0:
        return
    step = (p1 - p0) / length
    t = 0.0
    while t < length:
        yield p0 + step * t, p0 + step * min(t + on, length)
        t += on + off


def _draw_box(img: np.ndarray, box, rgb, style: str, thickness: int) -> None:
    """Draw an ``x, y, width, height`` box (pixel coordinates of ``img``) in a line style, over a
    dark outline."""
    import cv2

    x, y, w, h = (float(v) for v in box)
    corners = [(x, y), (x + w, y), (x + w, y + h), (x, y + h)]
    edges = list(zip(corners, corners[1:] + corners[:1]))
    colour = _bgr(rgb)

    def pt(p):
        return int(round(p[0])), int(round(p[1]))

    for layer, (col, extra) in enumerate(((_OUTLINE_BGR, 2), (colour, 0))):
        t = thickness + extra
        if style == "solid":
            cv2.rectangle(img, pt(corners[0]), pt(corners[2]), col, t, cv2.LINE_AA)
        elif style == "dashed":
            for a, b in edges:
                for s0, s1 in _dash_segments(a, b, on=6.0, off=5.0):
                    cv2.line(img, pt(s0), pt(s1), col, t, cv2.LINE_AA)
        elif style == "dotted":
            radius = max(1, (t + 1) // 2)
            for a, b in edges:
                for s0, _ in _dash_segments(a, b, on=0.0, off=max(5.0, 2.5 * t)):
                    cv2.circle(img, pt(s0), radius, col, -1, cv2.LINE_AA)
        else:
            raise ValueError(f"unknown line style {style!r}")


def thumbnail(gray: np.ndarray, subject, boxes=(), size: int = THUMBNAIL_SIZE,
              context: float = 1.0) -> np.ndarray:
    """A square colour thumbnail around one box, with the boxes near it drawn in their styles.

    Parameters
    ----------
    gray : ndarray of uint8, shape (H, W)
        The whole image.
    subject : tuple of (box, kind)
        The box the thumbnail is about (``x, y, width, height``) and its kind, a key of
        :data:`BOX_STYLES`; drawn thicker than the others.
    boxes : sequence of (box, kind)
        Other boxes of the image; drawn where they fall inside the thumbnail.
    size : int, default 128
        Side of the thumbnail, in pixels.
    context : float, default 1.0
        Margin around the subject on each side, as a share of its longer side (the crop is
        ``(1 + 2 * context)`` times the longer side, at least 32 pixels). Parts outside the image
        are dark gray.

    Returns
    -------
    ndarray of uint8, shape (size, size, 3)
        BGR, as cv2 writes it.

    Examples
    --------
    A 16-pixel box with the default context: the crop is 48 pixels wide, scaled by 128 / 48.

    >>> img = np.full((64, 64), 128, np.uint8)
    >>> thumb = thumbnail(img, ((24, 24, 16, 16), "matched"))
    >>> thumb.shape, thumb.dtype, tuple(int(v) for v in thumb[64, 64])  # middle: untouched gray
    ((128, 128, 3), dtype('uint8'), (128, 128, 128))
    """
    import cv2

    box, kind = subject
    x, y, w, h = (float(v) for v in box)
    side = max(32.0, max(w, h) * (1.0 + 2.0 * float(context)))
    x0, y0 = x + w / 2 - side / 2, y + h / 2 - side / 2
    scale = size / side
    # the crop, by an affine warp so that parts outside the image and sub-pixel offsets are exact
    matrix = np.array([[scale, 0.0, -x0 * scale], [0.0, scale, -y0 * scale]], dtype=np.float64)
    interp = cv2.INTER_AREA if scale < 1 else cv2.INTER_LINEAR
    crop = cv2.warpAffine(np.ascontiguousarray(gray, dtype=np.uint8), matrix, (size, size),
                          flags=interp, borderMode=cv2.BORDER_CONSTANT, borderValue=40)
    out = cv2.cvtColor(crop, cv2.COLOR_GRAY2BGR)

    def local(b):
        bx, by, bw, bh = (float(v) for v in b)
        return ((bx - x0) * scale, (by - y0) * scale, bw * scale, bh * scale)

    for other, other_kind in boxes:
        lb = local(other)
        if lb[0] > size or lb[1] > size or lb[0] + lb[2] < 0 or lb[1] + lb[3] < 0:
            continue
        rgb, style, _ = BOX_STYLES[other_kind]
        _draw_box(out, lb, rgb, style, 1)
    rgb, style, _ = BOX_STYLES[kind]
    _draw_box(out, local(box), rgb, style, 2)
    return out


def _write_png(path, image: np.ndarray) -> None:
    import cv2

    ok, data = cv2.imencode(".png", image)
    if not ok:  # pragma: no cover - cv2 encodes any uint8 BGR array
        raise InputError("cannot encode the picture", path=path)
    write_bytes(path, data.tobytes())


def _image_boxes(name, detections, ground_truth, iou_threshold):
    """Every box of one image with its kind, by the evaluation's matching rule."""
    gt = np.asarray(ground_truth.get(name, np.zeros((0, 4))), dtype=np.float64).reshape(-1, 4)
    det, scores = detections.get(name, (np.zeros((0, 4)), np.zeros(0)))
    det = np.asarray(det, dtype=np.float64).reshape(-1, 4)
    matched, _ = match_image(det, np.asarray(scores, dtype=np.float64), gt, iou_threshold)
    found = set(int(m) for m in matched if m >= 0)
    out = [(tuple(b), "matched" if m >= 0 else "false alarm") for b, m in zip(det, matched)]
    out += [(tuple(b), "missed") for g, b in enumerate(gt) if g not in found]
    return out


def _nearest_scores(misses, detections) -> None:
    """Give each miss the highest score of any detection in the file overlapping it (IoU > 0),
    also those below the operating point's threshold: a miss just below it reads differently
    from one no window came near."""
    from detector.boxes import iou

    for m in misses:
        boxes, scores = detections.get(m.image, (np.zeros((0, 4)), np.zeros(0)))
        boxes = np.asarray(boxes, dtype=np.float64).reshape(-1, 4)
        scores = np.asarray(scores, dtype=np.float64).reshape(-1)
        near = iou(boxes, np.asarray(m.box, dtype=np.float64).reshape(1, 4))[:, 0] > 0 \
            if len(boxes) else np.zeros(0, dtype=bool)
        m.best_score = float(scores[near].max()) if near.any() else math.nan


def _galleries(evaluation, detections, ground_truth, images_dir, out_dir, count, notes,
               threshold=None):
    """Write the thumbnails; return {"false alarm": [...], "missed": [...]} of entries."""
    from detector.io.images import read_gray

    misses = sorted(evaluation.miss_list,
                    key=lambda m: (math.isnan(m.best_score),
                                   0.0 if math.isnan(m.best_score) else -m.best_score, m.image))
    chosen = {"false alarm": evaluation.false_alarm_list[:count], "missed": misses[:count]}
    prefix = {"false alarm": "false-alarm", "missed": "missed"}
    gallery_dir = Path(out_dir) / "gallery"
    # visit the items image by image so that each image is read once and only one is held
    jobs = sorted(((item.image, kind, rank, item) for kind, items in chosen.items()
                   for rank, item in enumerate(items)), key=lambda j: (j[0], j[1], j[2]))
    made: dict = {"false alarm": {}, "missed": {}}
    current, gray = None, None
    for name, kind, rank, item in jobs:
        if name != current:
            current = name
            full = os.path.join(os.fspath(images_dir), *name.split("/"))
            try:
                gray = read_gray(full)
            except InputError as err:
                gray = None
                notes.append(f"gallery: {err}")
        if gray is None:
            continue
        subject = tuple(float(v) for v in item.box)
        others = [(b, k) for b, k in _image_boxes(name, detections, ground_truth,
                                                   evaluation.iou_threshold)
                  if not (k == kind and np.allclose(b, subject))]
        made[kind][rank] = (item, thumbnail(gray, (subject, kind), others))
    result = {"false alarm": [], "missed": []}
    for kind in result:
        for rank in sorted(made[kind]):
            item, thumb = made[kind][rank]
            gallery_dir.mkdir(exist_ok=True)
            file_name = f"{prefix[kind]}-{len(result[kind]) + 1:02d}.png"
            _write_png(gallery_dir / file_name, thumb)
            if kind == "false alarm":
                detail = [f"score {item.score:.3f}",
                          f"IoU {item.iou:.2f}" if item.iou > 0 else "no object overlaps"]
            else:
                below = threshold is not None and item.best_score < threshold
                detail = [f"{item.box[2]:.0f} x {item.box[3]:.0f} px",
                          "no detection overlaps" if math.isnan(item.best_score)
                          else f"nearest score {item.best_score:.3f}"
                          + (", below the threshold" if below else "")]
            result[kind].append({"file": f"gallery/{file_name}", "image": item.image,
                                 "detail": detail})
    return result


# --------------------------------------------------------------------------------------------
# the report folder


def check_report_folder(report_dir, force: bool = False) -> None:
    """Refuse a report folder that is a file, or that holds files, unless ``force``.

    Parameters
    ----------
    report_dir : str or os.PathLike
    force : bool, default False
        Allow writing into a folder that holds files; only the report's own files are replaced.

    Raises
    ------
    InputError
        One line naming the folder.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> check_report_folder(d)  # empty: fine
    >>> _ = (d / "notes.txt").write_text("mine")
    >>> try:
    ...     check_report_folder(d)
    ... except InputError as err:
    ...     print(err.message)
    the report folder is not empty; add --force to replace the report in it
    >>> check_report_folder(d, force=True)  # allowed; only the report's own files get replaced
    """
    path = Path(report_dir)
    if path.exists() and not path.is_dir():
        raise InputError("the report folder is a file; name a folder", path=path)
    if path.is_dir() and not force and any(path.iterdir()):
        raise InputError("the report folder is not empty; add --force to replace the report in it",
                         path=path)


def _check_inputs_outside_report(out_dir: Path, inputs) -> None:
    """Refuse (even with --force) an input that is one of the files the report writes or
    removes: ``report.html`` given as the labels, say."""
    if not out_dir.is_dir():
        return
    own = [out_dir / name for name in REPORT_FILES]
    gallery = out_dir / "gallery"
    if gallery.is_dir():
        own += [entry for entry in gallery.iterdir() if _GALLERY_FILE.fullmatch(entry.name)]
    for given in inputs:
        for target in own:
            if same_file(target, given):
                raise InputError(f"the report would replace its own input ({os.fspath(given)}); "
                                 "choose another report folder", path=target)


def _clear_old_report(out_dir: Path) -> None:
    """With --force: remove the report's own files of an earlier run, nothing else."""
    gallery = out_dir / "gallery"
    if gallery.is_dir():
        for entry in gallery.iterdir():
            if entry.is_file() and _GALLERY_FILE.fullmatch(entry.name):
                entry.unlink()


def write_report(report_dir, evaluation: Evaluation, point: dict, detections: dict | None = None,
                 ground_truth: dict | None = None, images_dir=None, inputs: dict | None = None,
                 notes=(), force: bool = False, gallery_size: int = GALLERY_SIZE,
                 provenance: dict | None = None, warnings=()) -> dict:
    """Write the report folder: ``report.html``, ``summary.json``, plots and galleries.

    The curves, AP and the figures of the headline describe every detection in the file; the
    per-image table, the galleries and the boxes drawn in them describe the operating point: the
    detections scoring at least its threshold (every detection when the rule has no threshold),
    which is what a scan at that threshold gives (``scan --threshold-from``).

    Parameters
    ----------
    report_dir : str or os.PathLike
        Created when missing; refused when it holds files, unless ``force``.
    evaluation : Evaluation
    point : dict
        From :func:`choose_operating_point`.
    detections, ground_truth : dict, optional
        What ``evaluation`` was computed from; needed for the galleries (to draw the other boxes
        near each false alarm or miss).
    images_dir : str or os.PathLike, optional
        The folder the image names are relative to; without it (or without ``detections`` and
        ``ground_truth``) the galleries are left out. Images that cannot be read are skipped
        with a note.
    inputs : dict, optional
        Recorded in the summary and shown at the top of the page.
    notes : sequence of str
        Shown on the page and kept in the summary (the gallery's own notes are added).
    force : bool, default False
        Write into a folder that holds files; the report's own files are replaced.
    gallery_size : int, default 24
        Thumbnails per gallery.
    provenance : dict, optional
        The detections file's provenance record (model and scan settings), kept in the summary
        and shown at the top of the page.
    warnings : sequence of str
        Mismatches of image names (:func:`name_mismatches`), shown first on the page.

    Returns
    -------
    dict
        The summary, as written to ``summary.json``.

    Raises
    ------
    InputError
        The folder is a file, or is not empty and ``force`` is not set.
    """
    out = Path(report_dir)
    check_report_folder(out, force)
    out.mkdir(parents=True, exist_ok=True)
    _clear_old_report(out)
    notes = list(notes)
    plot_precision_recall(evaluation, out / "precision-recall.png", point)
    plot_miss_rate(evaluation, out / "miss-rate.png", point)
    plot_score_histogram(evaluation, out / "score-histogram.png", point.get("threshold"))
    errors, shown = evaluation, detections
    if detections is not None and ground_truth is not None and point.get("threshold") is not None:
        shown = at_threshold(detections, point["threshold"])
        errors = evaluate(shown, ground_truth, evaluation.iou_threshold, size_buckets=None)
        _nearest_scores(errors.miss_list, detections)
    galleries = None
    if images_dir is not None and detections is not None and ground_truth is not None:
        galleries = _galleries(errors, shown, ground_truth, images_dir, out, int(gallery_size),
                               notes, point.get("threshold"))
    summary = build_summary(evaluation, point, inputs, notes,
                            errors=errors if errors is not evaluation else None,
                            provenance=provenance, warnings=warnings)
    write_text(out / "summary.json", _summary_text(summary))
    write_text(out / "report.html", _html(summary, evaluation, galleries, errors))
    return summary


@dataclass
class ScoreResult:
    """What :func:`score_files` did.

    Attributes
    ----------
    summary : dict
        The content of ``summary.json``.
    evaluation : Evaluation
    report : str
        Path of ``report.html``.
    notes : list of str
    warnings : list of str
        Mismatches of image names between the two files (:func:`name_mismatches`).
    """

    summary: dict
    evaluation: Evaluation
    report: str
    notes: list
    warnings: list = field(default_factory=list)


def score_files(detections_path, labels_path, report_dir, iou_threshold: float = 0.5,
                images_dir=None, label: str | None = None, target_precision: float | None = None,
                target_recall: float | None = None, force: bool = False,
                gallery_size: int = GALLERY_SIZE, strict: bool = False) -> ScoreResult:
    """Score a detections file against a labels file and write the report folder.

    Parameters
    ----------
    detections_path, labels_path : str or os.PathLike
        CSV or COCO JSON each (see :func:`read_score_inputs`).
    report_dir : str or os.PathLike
        See :func:`write_report`.
    iou_threshold : float, default 0.5
        IoU at or above which a detection matches a labelled box.
    images_dir : str or os.PathLike, optional
        The folder the labels' image names are relative to, for the galleries. Default:
        ``images/`` beside the labels file (the layout ``patchwood synth`` writes); when that
        does not exist the galleries are skipped with a note. A folder given here must exist.
    label : str, optional
        Keep only labelled boxes of this class.
    target_precision, target_recall : float, optional
        The operating point's rule (at most one); default best F1.
    force : bool, default False
        Replace the report in a folder that holds files.
    gallery_size : int, default 24
    strict : bool, default False
        Refuse (before writing anything) when labelled images have no rows in the detections
        file or detected images are not in the labels (:func:`name_mismatches`); without it
        they are warnings, in ``ScoreResult.warnings`` and on the page.

    Returns
    -------
    ScoreResult

    Raises
    ------
    InputError
        Bad input files (naming file and line), names that differ only in folder or case, a
        non-empty report folder without ``force``, bad targets or IoU, a missing ``images_dir``,
        a provenance side file that cannot be read, and with ``strict`` a mismatch of names.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> _ = (d / "labels.csv").write_text("image,x,y,width,height\\na.png,0,0,10,10\\n")
    >>> _ = (d / "det.csv").write_text("image,x,y,width,height,score\\na.png,0,0,10,10,0.7\\n")
    >>> result = score_files(d / "det.csv", d / "labels.csv", d / "report")
    >>> result.summary["average_precision"], result.summary["operating_point"]["threshold"]
    (1.0, 0.7)
    """
    out = Path(report_dir)
    check_report_folder(out, force)  # before any work: refuse early
    _check_inputs_outside_report(out, (detections_path, labels_path))
    p_target, r_target = check_targets(target_precision, target_recall)
    notes: list[str] = []
    if images_dir is not None:
        if not os.path.isdir(images_dir):
            raise InputError("no such images folder", path=images_dir)
        folder = os.fspath(images_dir)
    else:
        folder = os.path.join(os.path.dirname(os.path.abspath(labels_path)), "images")
        if not os.path.isdir(folder):
            notes.append(f"galleries skipped: no images folder at {folder} "
                         "(give --images DIR)")
            folder = None
    inputs = read_score_inputs(detections_path, labels_path, label=label)
    notes = inputs.notes + notes
    warnings = name_mismatches(list(inputs.detections), list(inputs.ground_truth),
                               detections_path, labels_path)
    if strict and warnings:
        raise InputError(warnings[0] + " (--strict)")
    provenance, why = provenance_of(detections_path)
    if why is not None:
        notes.append(why)
    level = None if provenance is None else provenance["settings"].get("exit_level")
    if level is not None and provenance["settings"]["early_exit"]:
        notes.append(f"the detections were made with the tighter early exits for scans at "
                     f"{level:g} or above (--exit-level {level:g}); below {level:g} the curve "
                     "lacks objects those exits give up; a scan with the same exits (scan "
                     "--threshold-from reuses them) reproduces the operating point")
    evaluation = evaluate(inputs.detections, inputs.ground_truth, iou_threshold)
    point = choose_operating_point(evaluation, p_target, r_target)
    if not point["met"]:
        notes.append(f"operating point ({point['rule']}): {point['note']}")
    record = {
        "detections": os.path.abspath(detections_path),
        "labels": os.path.abspath(labels_path),
        "images_dir": None if folder is None else os.path.abspath(folder),
        "iou_threshold": float(iou_threshold),
        "label": label,
        "target_precision": p_target,
        "target_recall": r_target,
        "labelled_images": len(inputs.ground_truth),
        "detection_images": len(inputs.detections),
        "detections_sha256": file_sha256(detections_path),
    }
    summary = write_report(out, evaluation, point, inputs.detections, inputs.ground_truth,
                           folder, record, notes, force=True, gallery_size=gallery_size,
                           provenance=provenance, warnings=warnings)
    return ScoreResult(summary=summary, evaluation=evaluation, report=str(out / "report.html"),
                       notes=list(summary["notes"]), warnings=warnings)


# --------------------------------------------------------------------------------------------
# HTML

_CSS = """
:root { --ink: #1d2430; --muted: #5b6472; --line: #dde1e6; --card: #f5f7f9; }
* { box-sizing: border-box; }
body { margin: 0; font: 15px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, sans-serif;
       color: var(--ink); background: #fff; }
main { max-width: 1180px; margin: 0 auto; padding: 24px 28px 48px; }
h1 { font-size: 1.55rem; margin: 0 0 4px; }
h2 { font-size: 1.2rem; margin: 36px 0 6px; padding-bottom: 4px; border-bottom: 2px solid var(--line); }
h3 { font-size: 1rem; margin: 18px 0 6px; }
.inputs { color: var(--muted); font-size: 0.85rem; margin: 0 0 16px; word-break: break-all; }
.inputs code { color: var(--ink); }
.cards { display: flex; flex-wrap: wrap; gap: 10px; margin: 10px 0; }
.card { background: var(--card); border-radius: 8px; padding: 10px 14px; min-width: 128px; flex: 1 1 128px; }
.card .value { font-size: 1.9rem; font-weight: 650; line-height: 1.1; font-variant-numeric: tabular-nums; }
.card .name { font-size: 0.8rem; color: var(--muted); margin-top: 2px; }
.card.point { background: #fff4e5; }
.card.count .value { font-size: 1.5rem; }
.read { color: var(--muted); font-size: 0.88rem; max-width: 900px; margin: 4px 0 12px; }
.notes { background: #fffbe6; border-left: 4px solid #e0c200; padding: 8px 14px; margin: 14px 0;
         font-size: 0.88rem; }
.notes li { margin: 2px 0; word-break: break-word; }
.warnings { background: #fff1ec; border-left-color: #d55e00; }
.plots { display: flex; flex-wrap: wrap; gap: 18px; }
.plots figure { margin: 0; flex: 1 1 340px; max-width: 600px; }
.plots img { width: 100%; height: auto; border: 1px solid var(--line); border-radius: 4px; }
figcaption { font-size: 0.84rem; color: var(--muted); margin-top: 4px; }
.legend { display: flex; flex-wrap: wrap; gap: 18px; font-size: 0.88rem; margin: 8px 0 4px; }
.swatch { display: inline-block; width: 30px; height: 14px; vertical-align: -2px; margin-right: 6px;
          border-width: 3px; background: #777; outline: 1px solid #181818; }
.gallery { display: grid; grid-template-columns: repeat(auto-fill, minmax(136px, 1fr)); gap: 10px; }
.gallery figure { margin: 0; }
.gallery img { width: 128px; height: 128px; image-rendering: auto; display: block; border-radius: 3px; }
.gallery figcaption { font-size: 0.74rem; line-height: 1.3; overflow: hidden; }
.gallery .image { display: block; white-space: nowrap; overflow: hidden; text-overflow: ellipsis;
                  color: var(--ink); max-width: 130px; }
table { border-collapse: collapse; font-size: 0.86rem; font-variant-numeric: tabular-nums; }
th, td { padding: 3px 10px; border-bottom: 1px solid var(--line); text-align: right; }
th { background: var(--card); position: sticky; top: 0; }
td:first-child, th:first-child { text-align: left; }
tr.bad td { background: #fff1ec; }
tr.clean td { color: var(--muted); }
.empty { color: var(--muted); font-style: italic; }
"""


def _esc(value) -> str:
    return html.escape(str(value), quote=True)


def _card(value: str, name: str, cls: str = "") -> str:
    return (f'<div class="card {cls}"><div class="value">{_esc(value)}</div>'
            f'<div class="name">{_esc(name)}</div></div>')


def _swatch(kind: str) -> str:
    rgb, style, text = BOX_STYLES[kind]
    return (f'<span><span class="swatch" style="background:none;border:3px {style} {_hex(rgb)}">'
            f'</span>{_esc(text)}</span>')


def _provenance_html(record: dict | None) -> str:
    """Which model and settings made the detections: one paragraph."""
    if not record:
        return ('<p class="inputs">made by: <span class="empty">unknown (the detections file has '
                'no provenance side file)</span></p>')
    model = record.get("model") or {}
    parts = [f'model <code>{_esc(model.get("file"))}</code> (SHA-256 '
             f'<code>{_esc(str(model.get("sha256"))[:16])}</code>, {_esc(model.get("mode"))}, '
             f'{_esc(model.get("trees"))} trees, trained {_esc(model.get("trained"))})',
             f'scan: {_esc(describe_settings(record.get("settings") or {}))}',
             f'patchwood {_esc(record.get("patchwood"))}']
    return f'<p class="inputs">made by: {" &middot; ".join(parts)}</p>'


def _html(summary: dict, evaluation: Evaluation, galleries, errors: Evaluation | None = None) -> str:
    errors = evaluation if errors is None else errors
    inputs = summary.get("inputs") or {}
    point = summary["operating_point"]
    ap = _ap_name(evaluation.iou_threshold)
    f09 = summary.get("fppi_at_recall_0.9")
    parts = ['<!DOCTYPE html>', '<html lang="en"><head><meta charset="utf-8">',
             '<meta name="viewport" content="width=device-width, initial-scale=1">',
             '<title>patchwood score report</title>', f'<style>{_CSS}</style></head><body><main>',
             '<h1>Detection score report</h1>']
    described = []
    for key, name in (("detections", "detections"), ("labels", "labels"),
                      ("images_dir", "images")):
        if inputs.get(key):
            described.append(f"{name} <code>{_esc(inputs[key])}</code>")
    described.append(f"IoU &ge; {evaluation.iou_threshold:.2f}")
    if inputs.get("label"):
        described.append(f"label <code>{_esc(inputs['label'])}</code>")
    parts.append(f'<p class="inputs">{" &middot; ".join(described)}</p>')
    parts.append(_provenance_html(summary.get("provenance")))
    warnings = summary.get("warnings") or []
    if warnings:
        parts.append('<ul class="notes warnings">' + "".join(f"<li>warning: {_esc(w)}</li>"
                                                            for w in warnings) + '</ul>')

    # headline
    parts.append('<div class="cards">')
    parts.append(_card(_fmt(evaluation.average_precision), f"{ap}, all-point AP"))
    parts.append(_card(_fmt(evaluation.average_precision_11_point), f"{ap}, 11-point AP"))
    parts.append(_card(_fmt(evaluation.average_precision_50_to_95), "AP50:95 (101-point)"))
    if point.get("threshold") is not None:
        parts.append(_card(_fmt(point["precision"]), "precision at the threshold", "point"))
        parts.append(_card(_fmt(point["recall"]), "recall at the threshold", "point"))
        parts.append(_card(f"{point['threshold']:.3g}", f"threshold ({point['rule']})", "point"))
    else:
        parts.append(_card("none", f"threshold ({point['rule']}): cannot be met", "point"))
    parts.append(_card("not reached" if f09 is None else _fmt(f09, 2), "FPPI at recall 0.9"))
    parts.append(_card(_percent(evaluation.log_average_miss_rate), "log-average miss rate"))
    parts.append('</div><div class="cards">')
    at = "" if point.get("threshold") is None else " at the threshold"
    for value, name in ((errors.images, "labelled images"), (errors.objects, "objects"),
                        (errors.detections, "detections" + at),
                        (errors.true_detections, "true detections" + at),
                        (errors.false_alarms, "false alarms" + at), (errors.misses, "misses" + at)):
        parts.append(_card(str(value), name, "count"))
    parts.append('</div>')
    if point.get("threshold") is None:
        counted = ('The counts, the galleries and the table keep every detection in the file '
                   '(there is no recommended threshold).')
    else:
        counted = (f'The counts, the galleries and the per-image table describe the operating '
                   f'point: the {errors.detections} detections scoring {point["threshold"]:.6g} '
                   f'or more, what a scan at that threshold gives; the AP and the curves use all '
                   f'{evaluation.detections} detections in the file.')
    parts.append('<p class="read">How to read this: AP is the area under the precision-recall '
                 'curve, 1.0 when every object is found before any false alarm. The orange cards '
                 f'are the recommended score threshold: {_esc(point["note"])}. '
                 'FPPI is false alarms per image; the log-average miss rate is the share of '
                 'objects missed, averaged over 0.01 to 1 false alarms per image (lower is '
                 f'better). {_esc(counted)}</p>')
    notes = summary.get("notes") or []
    if notes:
        parts.append('<ul class="notes">' + "".join(f"<li>{_esc(n)}</li>" for n in notes)
                     + '</ul>')

    # plots
    parts.append('<h2>Curves</h2>')
    parts.append('<p class="read">How to read this: each point of a curve is one score '
                 'threshold. Precision-recall: up and to the right is better; the dot is the '
                 'recommended threshold. Miss rate against FPPI: down and to the left is better; '
                 'read off how many objects are missed for a given number of false alarms per '
                 'image. Score histograms: the further the two humps are apart, the easier a '
                 'threshold separates objects from false alarms.</p>')
    parts.append('<div class="plots">')
    for name, caption in (("precision-recall.png", "Precision against recall."),
                          ("miss-rate.png", "Miss rate against false alarms per image."),
                          ("score-histogram.png", "Scores of true detections and false alarms.")):
        parts.append(f'<figure><img src="{quote(name)}" alt="{_esc(caption)}">'
                     f'<figcaption>{_esc(caption)}</figcaption></figure>')
    parts.append('</div>')

    # size buckets
    if evaluation.buckets:
        parts.append('<h3>By object size</h3>')
        parts.append('<p class="read">How to read this: objects split by the square root of '
                     'their area in pixels (the COCO limits 32 and 96). A low AP in one row '
                     'points at a size the detector does not cover well.</p>')
        parts.append('<table><tr><th>size</th><th>pixels</th><th>objects</th><th>found</th>'
                     '<th>missed</th><th>all-point AP</th><th>AP50:95</th></tr>')
        for name, fig in evaluation.buckets.items():
            lo, hi = fig.size_range
            span = f"{lo:g} to {hi:g}" if math.isfinite(hi) else f"{lo:g} and up"
            parts.append(f'<tr><td>{_esc(name)}</td><td>{span}</td><td>{fig.objects}</td>'
                         f'<td>{fig.true_detections}</td><td>{fig.misses}</td>'
                         f'<td>{_fmt(fig.average_precision)}</td>'
                         f'<td>{_fmt(fig.average_precision_50_to_95)}</td></tr>')
        parts.append('</table>')

    # galleries
    parts.append('<h2>Errors, one by one</h2>')
    if galleries is None:
        parts.append('<p class="empty">No galleries: the images folder was not found '
                     '(give <code>--images DIR</code>).</p>')
    else:
        parts.append('<div class="legend">' + "".join(_swatch(k) for k in BOX_STYLES)
                     + '<span>thick line: the box the thumbnail is about</span></div>')
        if point.get("threshold") is not None:
            parts.append(f'<p class="read">The errors at the recommended threshold '
                         f'{point["threshold"]:.6g}: the boxes drawn are the detections scoring '
                         'that or more; a missed object\'s nearest score counts every detection '
                         'in the file, so "below the threshold" marks an object the scan saw '
                         'but the threshold drops.</p>')
        sections = (
            ("false alarm", "Highest-scoring false alarms", errors.false_alarms,
             "How to read this: the detections the model was surest of that match no labelled "
             "object, highest score first. IoU is the best overlap with a labelled object: a "
             "high IoU means a badly placed box or a second detection of the same object; no "
             "overlap means the model fires on background (candidates for mining rounds) - or "
             "the object is not labelled."),
            ("missed", "Missed objects", errors.misses,
             "How to read this: labelled objects that no detection matched. Those with a "
             "nearby detection come first (highest nearby score first): the model saw something "
             "but placed the box too poorly or scored it too low. Those with no detection at all "
             "show what the model does not know (size, pose, lighting) - or a doubtful label."),
        )
        for kind, title, total, note in sections:
            shown = galleries[kind]
            parts.append(f'<h3>{_esc(title)} ({len(shown)} of {total})</h3>')
            parts.append(f'<p class="read">{_esc(note)}</p>')
            if not shown:
                parts.append('<p class="empty">None.</p>')
                continue
            parts.append('<div class="gallery">')
            for entry in shown:
                detail = " &middot; ".join(_esc(d) for d in entry["detail"])
                parts.append(f'<figure><img src="{quote(entry["file"])}" '
                             f'alt="{_esc(kind)} in {_esc(entry["image"])}">'
                             f'<figcaption><span class="image" title="{_esc(entry["image"])}">'
                             f'{_esc(entry["image"])}</span>{detail}</figcaption></figure>')
            parts.append('</div>')

    # per-image table
    rows = sorted(errors.per_image,
                  key=lambda r: (-(r.false_alarms + r.misses), -r.misses, r.image))
    parts.append('<h2>Per image</h2>')
    which = ("counts keep every detection in the file" if point.get("threshold") is None else
             f'counts are those of the detections scoring {point["threshold"]:.6g} or more')
    parts.append('<p class="read">How to read this: one row per labelled image, the images '
                 f'with the most errors (false alarms plus misses) first; {_esc(which)}. '
                 'Shaded rows have errors.</p>')
    parts.append('<table><tr><th>image</th><th>objects</th><th>detections</th><th>true</th>'
                 '<th>false alarms</th><th>misses</th></tr>')
    for r in rows:
        cls = "bad" if r.false_alarms + r.misses else "clean"
        parts.append(f'<tr class="{cls}"><td>{_esc(r.image)}</td><td>{r.objects}</td>'
                     f'<td>{r.detections}</td><td>{r.true_detections}</td>'
                     f'<td>{r.false_alarms}</td><td>{r.misses}</td></tr>')
    parts.append('</table>')
    if evaluation.unlabelled_images:
        parts.append(f'<h3>Detected images not in the labels '
                     f'({len(evaluation.unlabelled_images)}, left out of every figure)</h3>')
        parts.append('<p class="read">' + ", ".join(_esc(n) for n in
                                                    evaluation.unlabelled_images[:200])
                     + (" ..." if len(evaluation.unlabelled_images) > 200 else "") + '</p>')
    parts.append('<p class="read">Matching: detections in descending score each take the '
                 'unmatched labelled box of highest IoU at or above the threshold (COCO rule, '
                 'Lin et al., 2014); all-point and 11-point AP as in PASCAL VOC (Everingham et '
                 'al., 2010); log-average miss rate as in Dollar et al. (PAMI 2012). Every figure '
                 'is in summary.json beside this page.</p>')
    parts.append('</main></body></html>\n')
    return "\n".join(parts)
