"""Scoring files of detections against labels, and the report a person reads: plots, galleries of
false alarms and missed objects, a per-image table, all in one folder that opens offline.

The stage after ``scan``: :func:`score_files` reads a detections file and a labels file (CSV or
COCO JSON, through :mod:`detector.io.labels`), scores them with :func:`detector.evaluation.evaluate`,
picks an operating point and writes the report folder::

    DIR/report.html            headline figures, plots, a threshold slider, galleries, per-image
                               table with links to ``patchwood review`` (no external assets)
    DIR/summary.json           every figure, machine-readable; "operating_point" feeds `scan`
    DIR/precision-recall.png   DIR/miss-rate.png   DIR/score-histogram.png
    DIR/gallery/false-alarm-01.png ...   DIR/gallery/missed-01.png ...

The pieces live beside this module in :mod:`detector.reporting`: :mod:`~detector.reporting.inputs`
(reading and checking the two files), :mod:`~detector.reporting.summary` (``summary.json`` and the
printed table), :mod:`~detector.reporting.threshold_data` (the slider's data),
:mod:`~detector.reporting.plots`, :mod:`~detector.reporting.drawing` (box marks and
thumbnails) and :mod:`~detector.reporting._html` (the page template and style sheets); the
operating-point policy is :func:`detector.evaluation.choose_operating_point`.
"""

from __future__ import annotations

from typing import Iterable

import math
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from urllib.parse import quote

import numpy as np

from detector.errors import InputError
from detector.evaluation import DEFAULT_SIZE_BUCKETS, Evaluation, check_targets, choose_operating_point, evaluate, match_image
from detector.io.files import same_file, write_text
from detector.io.npzfile import file_sha256
from detector.scan import describe_settings, provenance_of
from detector.reporting._html import card, esc, json_script, page, swatch
from detector.reporting.drawing import BOX_STYLES, thumbnail, write_png
from detector.reporting.inputs import at_threshold, name_mismatches, read_score_inputs
from detector.reporting.plots import plot_miss_rate, plot_precision_recall, plot_score_histogram
from detector.reporting.summary import _summary_text, ap_name, build_summary, fmt, percent
from detector.reporting.threshold_data import counts_at, threshold_data

__all__ = [
    "GALLERY_SIZE",
    "REPORT_FILES",
    "ScoreResult",
    "check_report_folder",
    "score_files",
    "write_report",
]

#: Thumbnails per gallery.
GALLERY_SIZE = 24


#: The files a report consists of (the galleries add ``gallery/false-alarm-NN.png`` and
#: ``gallery/missed-NN.png``).
REPORT_FILES = ("report.html", "summary.json", "precision-recall.png", "miss-rate.png",
                "score-histogram.png")


_GALLERY_FILE = re.compile(r"(false-alarm|missed)-\d+\.png")


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
    from detector.geometry import iou

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
            write_png(gallery_dir / file_name, thumb)
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


def check_report_folder(report_dir: str | os.PathLike, force: bool = False) -> None:
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


def write_report(report_dir: str | os.PathLike, evaluation: Evaluation, point: dict,
                 detections: dict | None = None, ground_truth: dict | None = None,
                 images_dir: str | os.PathLike | None = None, inputs: dict | None = None,
                 notes: Iterable[str] = (), force: bool = False, gallery_size: int = GALLERY_SIZE,
                 provenance: dict | None = None, warnings: Iterable[str] = (),
                 ignore: dict | None = None) -> dict:
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
        errors = evaluate(shown, ground_truth, evaluation.iou_threshold, size_buckets=None,
                          size_range=evaluation.size_range, ignore=ignore)
        _nearest_scores(errors.miss_list, detections)
    galleries = None
    if images_dir is not None and detections is not None and ground_truth is not None:
        galleries = _galleries(errors, shown, ground_truth, images_dir, out, int(gallery_size),
                               notes, point.get("threshold"))
    summary = build_summary(evaluation, point, inputs, notes,
                            errors=errors if errors is not evaluation else None,
                            provenance=provenance, warnings=warnings)
    write_text(out / "summary.json", _summary_text(summary))
    slider = None if detections is None else threshold_data(evaluation, detections, point)
    write_text(out / "report.html", _html(summary, evaluation, galleries, errors, slider))
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


def score_files(detections_path: str | os.PathLike, labels_path: str | os.PathLike,
                report_dir: str | os.PathLike, iou_threshold: float = 0.5,
                images_dir: str | os.PathLike | None = None, label: str | None = None,
                target_precision: float | None = None, target_recall: float | None = None,
                force: bool = False, gallery_size: int = GALLERY_SIZE,
                strict: bool = False, size_range=None, size_buckets=DEFAULT_SIZE_BUCKETS,
                ignore_label: str | None = None) -> ScoreResult:
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
    inputs = read_score_inputs(detections_path, labels_path, label=label,
                               ignore_label=ignore_label)
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
    evaluation = evaluate(inputs.detections, inputs.ground_truth, iou_threshold,
                          size_buckets=size_buckets, size_range=size_range, ignore=inputs.ignore)
    if size_range is not None:
        lo, hi = size_range
        notes.append(f"every figure counts objects of {lo:g} to "
                     f"{'any size' if math.isinf(hi) else f'under {hi:g}'} pixels (square root of "
                     "the box's area) only; labels outside are ignored, as are detections outside "
                     "that match nothing")
    regions = sum(int(f.sum()) for f in inputs.ignore.values())
    if regions:
        notes.append(f"{regions} labelled box{'es are' if regions != 1 else ' is an'} ignore "
                     f"region{'s' if regions != 1 else ''}: never missed, and detections on "
                     f"{'them' if regions != 1 else 'it'} count neither as found nor as false "
                     "alarms")
    point = choose_operating_point(evaluation, p_target, r_target)
    if not point["met"]:
        notes.append(f"operating point ({point['rule']}): {point['note']}")
    record = {
        "detections": os.path.abspath(detections_path),
        "labels": os.path.abspath(labels_path),
        "images_dir": None if folder is None else os.path.abspath(folder),
        "iou_threshold": float(iou_threshold),
        "label": label,
        "ignore_label": ignore_label,
        "ignore_regions": int(sum(int(f.sum()) for f in inputs.ignore.values())),
        "size_range": None if size_range is None else [
            None if math.isinf(float(v)) else float(v) for v in size_range],   # None: no limit
        "target_precision": p_target,
        "target_recall": r_target,
        "labelled_images": len(inputs.ground_truth),
        "detection_images": len(inputs.detections),
        "detections_sha256": file_sha256(detections_path),
    }
    summary = write_report(out, evaluation, point, inputs.detections, inputs.ground_truth,
                           folder, record, notes, force=True, gallery_size=gallery_size,
                           provenance=provenance, warnings=warnings, ignore=inputs.ignore)
    return ScoreResult(summary=summary, evaluation=evaluation, report=str(out / "report.html"),
                       notes=list(summary["notes"]), warnings=warnings)


def _provenance_html(record: dict | None) -> str:
    """Which model and settings made the detections: one paragraph."""
    if not record:
        return ('<p class="inputs">made by: <span class="empty">unknown (the detections file has '
                'no provenance side file)</span></p>')
    model = record.get("model") or {}
    parts = [f'model <code>{esc(model.get("file"))}</code> (SHA-256 '
             f'<code>{esc(str(model.get("sha256"))[:16])}</code>, {esc(model.get("mode"))}, '
             f'{esc(model.get("trees"))} trees, trained {esc(model.get("trained"))})',
             f'scan: {esc(describe_settings(record.get("settings") or {}))}',
             f'patchwood {esc(record.get("patchwood"))}']
    return f'<p class="inputs">made by: {" &middot; ".join(parts)}</p>'


def _threshold_html(data: dict | None, point: dict) -> list[str]:
    """The threshold slider's section: the slider, the counts at its threshold (written here at
    the start value, so the page reads right without scripts too), the curve's place, the data."""
    parts = ['<h2 id="choose-threshold">Choose a threshold</h2>']
    if data is None:
        return parts + ['<p class="empty">No slider: the report was written without the '
                        'detections themselves.</p>']
    start = data["start"]
    counts = counts_at(data, start)
    where = ("the recommended threshold" if data["recommended"] is not None
             else "0 (there is no recommended threshold)")
    parts.append('<p class="read">How to read this: move the slider (or focus it and use the '
                 'arrow keys, steps of 0.01) to see what a scan at another threshold would give: '
                 'the detections scoring the threshold or more, matched to the labels at IoU '
                 f'{data["iou_threshold"]:.2f} as above. It starts at {esc(where)}. The dot on the '
                 "curve is the slider's threshold, the ring the recommended one; the per-image "
                 'table below follows the slider. The page recounts from the scores and matches '
                 'written into it; nothing is sent anywhere.</p>')
    shown = f"{start:.6g}" + (" (recommended)" if data["recommended"] is not None else "")
    parts.append('<div class="chooser"><div class="controls">'
                 f'<label for="threshold">score threshold <output id="threshold-value">'
                 f'{esc(shown)}</output></label>'
                 f'<input id="threshold" type="range" min="0" max="1" step="0.01" '
                 f'value="{start!r}">')
    if data["recommended"] is not None:
        parts.append('<button type="button" id="to-recommended">back to the recommended '
                     'threshold</button>')
    parts.append('<table class="counts">')
    for key, name in (("detections", "detections kept"), ("true_detections", "true detections"),
                      ("false_alarms", "false alarms"), ("misses", "misses"),
                      ("precision", "precision"), ("recall", "recall")):
        value = counts[key]
        text = fmt(value) if key in ("precision", "recall") else str(value)
        parts.append(f'<tr><th scope="row">{name}</th><td id="at-{key.replace("_", "-")}">'
                     f'{text}</td></tr>')
    parts.append('</table></div>')
    parts.append('<svg id="threshold-curve" viewBox="0 0 330 260" role="img" '
                 'aria-label="precision against recall: the dot is the slider\'s threshold, the '
                 'ring the recommended one"></svg></div>')
    parts.append('<noscript><p class="empty">The slider needs JavaScript; the counts shown are at '
                 'the start value.</p></noscript>')
    parts.append(json_script("threshold-data", data))
    return parts


def _html(summary: dict, evaluation: Evaluation, galleries,
          errors: Evaluation | None = None, slider: dict | None = None) -> str:
    errors = evaluation if errors is None else errors
    inputs = summary.get("inputs") or {}
    point = summary["operating_point"]
    ap = ap_name(evaluation.iou_threshold)
    f09 = summary.get("fppi_at_recall_0.9")
    parts = ['<h1>Detection score report</h1>']
    described = []
    for key, name in (("detections", "detections"), ("labels", "labels"),
                      ("images_dir", "images")):
        if inputs.get(key):
            described.append(f"{name} <code>{esc(inputs[key])}</code>")
    described.append(f"IoU &ge; {evaluation.iou_threshold:.2f}")
    if inputs.get("label"):
        described.append(f"label <code>{esc(inputs['label'])}</code>")
    parts.append(f'<p class="inputs">{" &middot; ".join(described)}</p>')
    parts.append(_provenance_html(summary.get("provenance")))
    warnings = summary.get("warnings") or []
    if warnings:
        parts.append('<ul class="notes warnings">' + "".join(f"<li>warning: {esc(w)}</li>"
                                                            for w in warnings) + '</ul>')

    # headline
    parts.append('<div class="cards">')
    parts.append(card(fmt(evaluation.average_precision), f"{ap}, all-point AP"))
    parts.append(card(fmt(evaluation.average_precision_11_point), f"{ap}, 11-point AP"))
    parts.append(card(fmt(evaluation.average_precision_50_to_95), "AP50:95 (101-point)"))
    if point.get("threshold") is not None:
        parts.append(card(fmt(point["precision"]), "precision at the threshold", "point"))
        parts.append(card(fmt(point["recall"]), "recall at the threshold", "point"))
        parts.append(card(f"{point['threshold']:.3g}", f"threshold ({point['rule']})", "point"))
    else:
        parts.append(card("none", f"threshold ({point['rule']}): cannot be met", "point"))
    parts.append(card("not reached" if f09 is None else fmt(f09, 2), "FPPI at recall 0.9"))
    parts.append(card(percent(evaluation.log_average_miss_rate), "log-average miss rate"))
    parts.append('</div><div class="cards">')
    at = "" if point.get("threshold") is None else " at the threshold"
    for value, name in ((errors.images, "labelled images"), (errors.objects, "objects"),
                        (errors.detections, "detections" + at),
                        (errors.true_detections, "true detections" + at),
                        (errors.false_alarms, "false alarms" + at), (errors.misses, "misses" + at)):
        parts.append(card(str(value), name, "count"))
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
                 f'are the recommended score threshold: {esc(point["note"])}. '
                 'FPPI is false alarms per image; the log-average miss rate is the share of '
                 'objects missed, averaged over 0.01 to 1 false alarms per image (lower is '
                 f'better). {esc(counted)}</p>')
    notes = summary.get("notes") or []
    if notes:
        parts.append('<ul class="notes">' + "".join(f"<li>{esc(n)}</li>" for n in notes)
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
        parts.append(f'<figure><img src="{quote(name)}" alt="{esc(caption)}">'
                     f'<figcaption>{esc(caption)}</figcaption></figure>')
    parts.append('</div>')

    parts += _threshold_html(slider, point)

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
            parts.append(f'<tr><td>{esc(name)}</td><td>{span}</td><td>{fig.objects}</td>'
                         f'<td>{fig.true_detections}</td><td>{fig.misses}</td>'
                         f'<td>{fmt(fig.average_precision)}</td>'
                         f'<td>{fmt(fig.average_precision_50_to_95)}</td></tr>')
        parts.append('</table>')

    # galleries
    parts.append('<h2>Errors, one by one</h2>')
    if galleries is None:
        parts.append('<p class="empty">No galleries: the images folder was not found '
                     '(give <code>--images DIR</code>).</p>')
    else:
        parts.append('<div class="legend">' + "".join(swatch(*BOX_STYLES[k]) for k in BOX_STYLES)
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
            parts.append(f'<h3>{esc(title)} ({len(shown)} of {total})</h3>')
            parts.append(f'<p class="read">{esc(note)}</p>')
            if not shown:
                parts.append('<p class="empty">None.</p>')
                continue
            parts.append('<div class="gallery">')
            for entry in shown:
                detail = " &middot; ".join(esc(d) for d in entry["detail"])
                parts.append(f'<figure><img src="{quote(entry["file"])}" '
                             f'alt="{esc(kind)} in {esc(entry["image"])}">'
                             f'<figcaption><span class="image" title="{esc(entry["image"])}">'
                             f'{esc(entry["image"])}</span>{detail}</figcaption></figure>')
            parts.append('</div>')

    # per-image table
    rows = sorted(errors.per_image,
                  key=lambda r: (-(r.false_alarms + r.misses), -r.misses, r.image))
    parts.append('<h2>Per image</h2>')
    if slider is not None:
        which = ("counts follow the threshold slider above; at its start they are those of the "
                 + ("detections scoring {:.6g} or more".format(point["threshold"])
                    if point.get("threshold") is not None else "every detection in the file"))
    elif point.get("threshold") is None:
        which = "counts keep every detection in the file"
    else:
        which = f'counts are those of the detections scoring {point["threshold"]:.6g} or more'
    parts.append('<p class="read">How to read this: one row per labelled image, the images '
                 f'with the most errors (false alarms plus misses) first; {esc(which)}. '
                 'Shaded rows have errors. Click a column\'s header to sort by it.</p>')
    parts.append('<div class="review-address"><label for="review-address">Address of '
                 '<code>patchwood review</code></label> '
                 '<input id="review-address" type="url" spellcheck="false" autocomplete="off" '
                 'placeholder="the address it printed, with ?token=..."> '
                 '<span id="review-state">no address given: the "open in review" links are '
                 'inactive</span></div>')
    parts.append('<p class="read">To open an image in <code>patchwood review</code>: run it on '
                 'the same images and labels, and paste the address it printed above. The report '
                 'cannot know it (the port and token change with every run). The address is kept '
                 'in this browser\'s local storage, never in the report folder; empty the field '
                 'to forget it.</p>')
    if slider is not None:
        parts.append('<p><button type="button" id="sort-errors">most errors first</button></p>')
    index = {name: k for k, name in enumerate(slider["images"])} if slider is not None else {}
    parts.append('<table class="sortable" id="per-image"><thead><tr><th>image</th>'
                 + "".join(f'<th data-type="number">{name}</th>' for name in
                           ("objects", "detections", "true", "false alarms", "misses"))
                 + '<th data-type="none">review</th></tr></thead><tbody>')
    for r in rows:
        cls = "bad" if r.false_alarms + r.misses else "clean"
        at = f' data-index="{index[r.image]}"' if r.image in index else ""
        parts.append(f'<tr class="{cls}"{at}><td>{esc(r.image)}</td><td>{r.objects}</td>'
                     f'<td>{r.detections}</td><td>{r.true_detections}</td>'
                     f'<td>{r.false_alarms}</td><td>{r.misses}</td>'
                     f'<td><a class="review-link" data-image="{esc(r.image)}" '
                     f'aria-disabled="true">open in review</a></td></tr>')
    parts.append('</tbody></table>')
    if evaluation.unlabelled_images:
        parts.append(f'<h3>Detected images not in the labels '
                     f'({len(evaluation.unlabelled_images)}, left out of every figure)</h3>')
        parts.append('<p class="read">' + ", ".join(esc(n) for n in
                                                    evaluation.unlabelled_images[:200])
                     + (" ..." if len(evaluation.unlabelled_images) > 200 else "") + '</p>')
    parts.append('<p class="read">Matching: detections in descending score each take the '
                 'unmatched labelled box of highest IoU at or above the threshold (COCO rule, '
                 'Lin et al., 2014); all-point and 11-point AP as in PASCAL VOC (Everingham et '
                 'al., 2010); log-average miss rate as in Dollar et al. (PAMI 2012). Every figure '
                 'is in summary.json beside this page.</p>')
    return page("patchwood score report", "score-report.css", parts,
                script=("sort-table.js", "threshold-slider.js"))
