"""``summary.json``: every figure of a scoring run as plain JSON, the operating point that
``scan --threshold-from`` reads back, and the short table the command line prints.
"""

from __future__ import annotations

from typing import Iterable

import json
import math
import os

import numpy as np

from detector._validation import finite_or_none
from detector.errors import InputError
from detector.evaluation import Evaluation, fppi_at_recall
from detector.io.files import read_bytes
from detector.scan import describe_settings

__all__ = [
    "SUMMARY_FORMAT",
    "ap_name",
    "build_summary",
    "fmt",
    "percent",
    "read_summary_point",
    "summary_table",
    "threshold_from_summary",
]

#: Identifies a summary file written here (``summary.json["format"]``), with its version.
SUMMARY_FORMAT = "patchwood score summary"


SUMMARY_VERSION = 1


def build_summary(evaluation: Evaluation, point: dict, inputs: dict | None = None,
                  notes: Iterable[str] = (), errors: Evaluation | None = None,
                  provenance: dict | None = None, warnings: Iterable[str] = ()) -> dict:
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
        The detections file's provenance record (:mod:`detector.scan`): which model and
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
    >>> from detector.evaluation import choose_operating_point, evaluate
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


def threshold_from_summary(path: str | os.PathLike) -> float:
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


def read_summary_point(path: str | os.PathLike) -> tuple[float, dict | None]:
    """``(threshold, provenance)`` from a ``summary.json`` written by ``score``: the recommended
    score threshold, and the provenance record of the detections it was computed from (None
    when the summary has none: detections made by another program or an older patchwood).

    Raises
    ------
    InputError
        As :func:`threshold_from_summary`, and for a provenance entry that is not a record.
    """
    from detector.scan._provenance import _check_record

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


def fmt(value: float | None, digits: int = 3) -> str:
    v = finite_or_none(value)
    return "n/a" if v is None else f"{v:.{digits}f}"


def percent(value: float | None) -> str:
    v = finite_or_none(value)
    return "n/a" if v is None else f"{100 * v:.1f}%"


def ap_name(iou_threshold: float) -> str:
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


def summary_table(summary: dict,
                  report_path: str | os.PathLike | None = None) -> list[tuple[str, str]]:
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
    >>> from detector.evaluation import choose_operating_point, evaluate
    >>> ev = evaluate({"a.png": ([[0, 0, 10, 10]], [0.8])}, {"a.png": [[0, 0, 10, 10]]})
    >>> dict(summary_table(build_summary(ev, choose_operating_point(ev))))["AP50 (all-point)"]
    '1.000'
    """
    ap = ap_name(summary.get("iou_threshold", 0.5))
    point = summary.get("operating_point") or {}
    rule = point.get("rule", "best F1")
    if point.get("threshold") is None:
        point_row = [(f"operating point ({rule})", point.get("note") or "cannot be met")]
    else:
        point_row = [(f"operating point ({rule})",
                      f"threshold {fmt(point['threshold'], 4)}: precision "
                      f"{fmt(point.get('precision'))}, recall {fmt(point.get('recall'))}")]
    f09 = summary.get("fppi_at_recall_0.9")
    rows = [
        (f"{ap} (all-point)", fmt(summary.get("average_precision"))),
        (f"{ap} (11-point)", fmt(summary.get("average_precision_11_point"))),
        ("AP50:95 (101-point)", fmt(summary.get("average_precision_50_to_95"))),
        ("best F1: precision / recall", f"{fmt(summary.get('best_f1_precision'))} / "
                                        f"{fmt(summary.get('best_f1_recall'))}"),
        ("best F1: threshold", fmt(summary.get("best_f1_threshold"), 4)),
        *point_row,
        ("FPPI at recall 0.9", "not reached" if f09 is None else fmt(f09)),
        ("log-average miss rate", percent(summary.get("log_average_miss_rate"))),
        ("images / objects", f"{summary.get('images', 0)} / {summary.get('objects', 0)}"),
        ("detections / true", f"{summary.get('detections', 0)} / "
                              f"{summary.get('true_detections', 0)}"),
        ("false alarms / misses", f"{summary.get('false_alarms', 0)} / "
                                  f"{summary.get('misses', 0)}"),
    ]
    at = summary.get("at_operating_point")
    if at:
        rows.append((f"at {fmt(at['threshold'], 4)}: detections / true",
                     f"{at['detections']} / {at['true_detections']}"))
        rows.append((f"at {fmt(at['threshold'], 4)}: false alarms / misses",
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
