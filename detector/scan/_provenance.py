"""Provenance: the side file written with every detections file, saying what made it.

``patchwood scan --out DETECTIONS.csv`` writes ``DETECTIONS.provenance.json`` beside it (the
detections file's name without its extension, as the failures side file
``DETECTIONS.failures.csv``), rewritten atomically after the detections file every time that is
rewritten. A COCO detections file carries the same record under its ``info``::

    {
      "format": "patchwood scan provenance",
      "version": 1,
      "detections": {"file": "detections.csv", "sha256": "...", "images": 40},
      "model": {"file": "/abs/model.npz", "sha256": "...", "metadata_sha256": "...",
                "mode": "boosted", "trees": 300, "window": [24, 24], "trained": "2026-12-02"},
      "settings": {"scale_step": 1.2, "stride": 2.0, ..., "threshold": 0.05, "exit_level": null},
      "inputs": ["/abs/scenario/test/images"],
      "patchwood": "0.1.0",
      "libraries": {"python": "3.11.2", "numpy": "...", "numba": "...", "opencv": "..."}
    }

``model.sha256`` is the model file's SHA-256 (FIPS 180-4); ``model.metadata_sha256`` that of the
model's metadata (:func:`detector.model.metadata_sha256`: parameters, bank hash, training figures),
which names the training even when the file was copied or saved again. ``settings`` holds every
field of :class:`detector.scan.ScanSettings`. ``detections.sha256`` ties the side file to the
detections file it describes: ``score`` uses the record only while the two agree.

Three readers check it: ``scan --resume`` (:func:`check_same_scan`: the output must have been made
with the same model and settings), ``score`` (:func:`provenance_of`: copied into ``summary.json``
and shown in the report) and ``scan --threshold-from`` (:func:`model_differences`: the summary
must come from this model's detections).
"""

from __future__ import annotations

import dataclasses
import json
import os
import platform
from pathlib import Path

from detector.errors import InputError

__all__ = ["PROVENANCE_FORMAT", "PROVENANCE_VERSION", "provenance_path", "model_record",
           "scan_record", "write_provenance", "read_provenance", "provenance_of",
           "settings_differences", "model_differences", "check_summary_model", "check_same_scan",
           "describe_settings"]

#: Identifies a provenance record (``["format"]``), with its version.
PROVENANCE_FORMAT = "patchwood scan provenance"
PROVENANCE_VERSION = 1
#: The settings that decide which detections a scan gives (every ScanSettings field).
_SETTING_NAMES = ("scale_step", "stride", "min_object", "max_object", "threshold", "nms_iou",
                  "early_exit", "overhang", "exit_level", "box_voting")
#: Settings added after version 1 records were first written, with the value a record without
#: them was scanned with.
_LATER_SETTINGS = {"box_voting": None}


def provenance_path(detections_path) -> Path:
    """The side file of a detections file: ``DETECTIONS.provenance.json``.

    >>> provenance_path("out/detections.csv").as_posix()
    'out/detections.provenance.json'
    """
    path = Path(detections_path)
    return path.with_name(path.stem + ".provenance.json")


def _library_versions() -> dict:
    import importlib.metadata

    import cv2
    import numpy as np

    # numba's version from its package metadata: a scan that runs kernels compiled ahead of time
    # never imports numba (detector._jit)
    return {"python": platform.python_version(), "numpy": np.__version__,
            "numba": importlib.metadata.version("numba"), "opencv": cv2.__version__}


def model_record(model_path, model) -> dict:
    """What identifies a model: its file's SHA-256, its metadata's SHA-256, and a few facts a
    person reads (mode, trees, window, training date)."""
    from detector.model import metadata_sha256
    from detector.io.npzfile import file_sha256

    return {"file": os.path.abspath(model_path), "sha256": file_sha256(model_path),
            "metadata_sha256": metadata_sha256(model), "mode": model.mode,
            "trees": int(model.n_trees), "window": [int(v) for v in model.window],
            "trained": model.metadata.get("date")}


def scan_record(model_path, model, settings, inputs=(), threshold_from=None) -> dict:
    """The provenance of a scan with ``settings`` (a :class:`detector.scan.ScanSettings`) of the
    model file ``model_path`` (``model``, loaded from it) over ``inputs`` (files and folders),
    its threshold taken from the summary ``threshold_from`` if given; :func:`write_provenance`
    adds the detections file's part."""
    import detector

    given = dataclasses.asdict(settings)
    return {"format": PROVENANCE_FORMAT, "version": PROVENANCE_VERSION, "detections": None,
            "model": model_record(model_path, model),
            "settings": {name: given[name] for name in _SETTING_NAMES},
            "threshold_from": None if threshold_from is None else os.path.abspath(threshold_from),
            "inputs": [os.path.abspath(p) for p in inputs],
            "patchwood": detector.__version__, "libraries": _library_versions()}


def write_provenance(detections_path, record: dict, images: int) -> dict:
    """Write the side file of ``detections_path`` (atomically), with the detections file's name,
    SHA-256 and image count added to ``record``; returns the record written."""
    from detector.io.files import atomic_write
    from detector.io.npzfile import file_sha256

    full = dict(record, detections={"file": Path(detections_path).name,
                                    "sha256": file_sha256(detections_path),
                                    "images": int(images)})
    with atomic_write(provenance_path(detections_path), "w") as fh:
        json.dump(full, fh, indent=2, ensure_ascii=False, allow_nan=False)
        fh.write("\n")
    return full


def _check_record(doc, path) -> dict:
    """The record if it is one this version reads; one-line errors otherwise."""
    if not isinstance(doc, dict) or doc.get("format") != PROVENANCE_FORMAT:
        raise InputError(f"not a provenance record (expected \"format\": \"{PROVENANCE_FORMAT}\")",
                         path=path)
    if doc.get("version") != PROVENANCE_VERSION:
        raise InputError(f"provenance version {doc.get('version')!r} is not one this patchwood "
                         f"reads ({PROVENANCE_VERSION})", path=path)
    model, settings = doc.get("model"), doc.get("settings")
    if not isinstance(model, dict) or not isinstance(model.get("sha256"), str):
        raise InputError("the provenance names no model file SHA-256", path=path)
    if isinstance(settings, dict):
        for name, value in _LATER_SETTINGS.items():
            settings.setdefault(name, value)
    if not isinstance(settings, dict) or any(name not in settings for name in _SETTING_NAMES):
        missing = [n for n in _SETTING_NAMES if not isinstance(settings, dict) or n not in settings]
        raise InputError(f"the provenance lacks the scan setting {missing[0]!r}", path=path)
    return doc


def read_provenance(detections_path) -> dict | None:
    """The provenance record of a detections file: from its side file, or from the ``info`` of a
    COCO detections file that has no side file; None when there is neither.

    Raises
    ------
    InputError
        One line naming the side file: not UTF-8, not JSON, or not a provenance record.
    """
    from detector.io.labels import _json_document

    side = provenance_path(detections_path)
    if side.exists():
        try:
            text = side.read_bytes().decode("utf-8-sig")
        except UnicodeDecodeError:
            raise InputError("the provenance side file is not UTF-8 text", path=side) from None
        except OSError as err:
            raise InputError(f"cannot read the provenance side file: {err.strerror or err}",
                             path=side) from None
        return _check_record(_json_document(text, side), side)
    info = _coco_info(detections_path)
    if isinstance(info, dict) and info.get("format") == PROVENANCE_FORMAT:
        return _check_record(info, detections_path)
    return None


def _coco_info(path):
    """The ``info`` object of a COCO JSON detections file, or None (any other file, or a file
    the detections reader will report on)."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(64).lstrip(b"\xef\xbb\xbf \t\r\n")
            if head[:1] != b"{":
                return None
            fh.seek(0)
            doc = json.loads(fh.read().decode("utf-8-sig"))
    except (OSError, ValueError, RecursionError):
        return None
    return doc.get("info") if isinstance(doc, dict) else None


def provenance_of(detections_path) -> tuple[dict | None, str | None]:
    """The provenance that describes a detections file as it is now, for ``score``: ``(record,
    None)``, or ``(None, note)`` saying in one line why there is none (no side file, or a side
    file written for other contents of the file, e.g. by a later run of another program).

    A COCO file's ``info`` travels inside the file, so it always describes it."""
    from detector.io.npzfile import file_sha256

    record = read_provenance(detections_path)
    name = os.fspath(detections_path)
    if record is None:
        return None, (f"{name}: no provenance side file ({provenance_path(name).name}); the "
                      "report cannot say which model and settings made these detections")
    if provenance_path(detections_path).exists():
        made = (record.get("detections") or {}).get("sha256")
        if made != file_sha256(detections_path):
            return None, (f"{provenance_path(name)}: written for other contents of {name} (its "
                          "SHA-256 differs); the report does not say which model made them")
    return record, None


def settings_differences(recorded: dict, settings) -> list[str]:
    """The settings of a recorded scan that differ from ``settings`` (a ScanSettings or a dict),
    as ``"name A (recorded B)"``.

    >>> from detector.scan import ScanSettings
    >>> settings_differences({"stride": 2.0, "threshold": 0.5}, ScanSettings(stride=4.0))
    ['stride 4.0 (recorded 2.0)']
    """
    given = settings if isinstance(settings, dict) else dataclasses.asdict(settings)
    return [f"{name} {given.get(name)!r} (recorded {recorded[name]!r})"
            for name in _SETTING_NAMES if name in recorded and recorded[name] != given.get(name)]


def model_differences(recorded_model: dict, model_path) -> list[str]:
    """How the model recorded in a provenance differs from the model file ``model_path``: an
    empty list when the file's SHA-256 is the same (the bytes decide: a model trained again with
    the same seed and bank is byte-identical, so it passes too), else one line naming both."""
    from detector.io.npzfile import file_sha256

    here = file_sha256(model_path)
    if recorded_model.get("sha256") == here:
        return []
    return [f"{recorded_model.get('file')} (sha256 {str(recorded_model.get('sha256'))[:12]}), "
            f"not {os.path.abspath(model_path)} (sha256 {here[:12]})"]


def check_summary_model(record: dict, model_path, summary_path, force: bool = False) -> list[str]:
    """Refuse a threshold from a summary whose detections another model made (``scan
    --threshold-from``): the summary's operating point holds for that model only. With
    ``force``, the refusal becomes a returned warning line.

    Raises
    ------
    InputError
        One line naming the summary and both models.
    """
    other = model_differences(record.get("model") or {}, model_path)
    if not other:
        return []
    if force:
        return [f"{os.fspath(summary_path)}: its detections were made with another model "
                f"({other[0]}); its threshold is used anyway (--force)"]
    raise InputError(f"the summary's detections were made with another model ({other[0]}); "
                     "its precision and recall do not hold for this one; score this model's "
                     "own curve scan, or add --force", path=summary_path)


def check_same_scan(out, model_path, settings) -> dict:
    """Refuse to continue the output ``out`` unless its provenance says it was made by the model
    file ``model_path`` with ``settings`` (``scan --resume``); returns the record.

    Raises
    ------
    InputError
        One line naming the output: no side file, a side file written for other contents, another
        model, or other settings (the first difference named).
    """
    from detector.io.npzfile import file_sha256

    record = read_provenance(out)
    side = provenance_path(out)
    if record is None:
        raise InputError(f"no provenance side file ({side.name}) says which model and settings "
                         "made this output, so --resume cannot continue it; scan again with "
                         "--force", path=out)
    made = (record.get("detections") or {}).get("sha256")
    if made is not None and made != file_sha256(out):
        raise InputError(f"the output changed after the scan that wrote {side.name}; --resume "
                         "cannot continue it; scan again with --force", path=out)
    other = model_differences(record["model"], model_path)
    if other:
        raise InputError(f"--resume: the output was made with another model ({other[0]}); "
                         "scan again with --force or choose another --out", path=out)
    changed = settings_differences(record["settings"], settings)
    if changed:
        raise InputError(f"--resume: the output was made with other settings: {changed[0]}"
                         + (f" and {len(changed) - 1} more" if len(changed) > 1 else "")
                         + "; give the same settings, or scan again with --force", path=out)
    return record


def describe_settings(settings: dict) -> str:
    """The scan settings of a record in one line, as the report shows them.

    >>> describe_settings({"scale_step": 1.2, "stride": 2.0, "min_object": None,
    ...                    "max_object": None, "threshold": 0.05, "nms_iou": 0.3,
    ...                    "early_exit": True, "overhang": 0.25, "exit_level": None})
    'threshold 0.05, scale step 1.2, stride 2, NMS IoU 0.3, overhang 0.25, early exit on (exits for every threshold)'
    >>> describe_settings({"threshold": 0.5, "box_voting": 0.5}).split(", ")[-1]
    'box voting 0.5'
    """
    def number(v):
        return "any" if v is None else f"{v:g}"

    parts = [f"threshold {number(settings.get('threshold'))}",
             f"scale step {number(settings.get('scale_step'))}",
             f"stride {number(settings.get('stride'))}"]
    if settings.get("min_object") is not None or settings.get("max_object") is not None:
        parts.append(f"objects {number(settings.get('min_object'))} to "
                     f"{number(settings.get('max_object'))} px")
    parts.append(f"NMS IoU {number(settings.get('nms_iou'))}")
    parts.append(f"overhang {number(settings.get('overhang'))}")
    if not settings.get("early_exit", True):
        parts.append("early exit off")
    elif settings.get("exit_level") is None:
        parts.append("early exit on (exits for every threshold)")
    else:
        parts.append(f"early exit on (tighter exits for scans at {settings['exit_level']:g} "
                     "or above)")
    if settings.get("box_voting") is not None:
        parts.append(f"box voting {settings['box_voting']:g}")
    return ", ".join(parts)
