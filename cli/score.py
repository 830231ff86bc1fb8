"""`patchwood score DETECTIONS LABELS --out DIR`: match detections to labels, print the headline
figures and write the report folder (report.html, summary.json, plots, galleries)."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from detector.reporting.score_report import score_files
from detector.reporting.summary import summary_table


def _iou(value: float) -> float:
    if not 0.0 < value <= 1.0:
        raise typer.BadParameter(f"the IoU threshold must be in (0, 1], got {value}")
    return value


def _target(value: Optional[float]) -> Optional[float]:
    if value is not None and not 0.0 < value <= 1.0:
        raise typer.BadParameter(f"a target must be in (0, 1], got {value}")
    return value


def parse_size_buckets(text: str) -> dict:
    """``"small:0-32,large:96-"`` -> ``{"small": (0.0, 32.0), "large": (96.0, inf)}``; ``none``
    -> ``{}``; anything else is a usage error.

    >>> parse_size_buckets("small:0-32,large:96-")
    {'small': (0.0, 32.0), 'large': (96.0, inf)}
    """
    if text.strip().lower() == "none":
        return {}
    buckets = {}
    for part in text.split(","):
        name, _, span = part.strip().partition(":")
        low, dash, high = span.partition("-")
        try:
            lo, hi = float(low), float(high) if high.strip() else float("inf")
        except ValueError:
            lo = hi = None
        if not name or not dash or lo is None or not 0 <= lo < hi:
            raise typer.BadParameter(f"--size-buckets takes NAME:LOW-HIGH,... with 0 <= LOW < "
                                     f"HIGH (HIGH may be empty), got {part.strip()!r}")
        buckets[name] = (lo, hi)
    return buckets


def score(
    detections: Path = typer.Argument(
        ..., help="Detections file (CSV or COCO JSON), as `patchwood scan` writes it."
    ),
    labels: Path = typer.Argument(..., help="Labels file (CSV or COCO JSON) of the same images."),
    out: Path = typer.Option(
        ..., "--out", help="Folder for report.html, summary.json and the pictures; created if missing."
    ),
    iou: float = typer.Option(
        0.5, "--iou", callback=_iou, help="IoU at or above which a detection matches a labelled box."
    ),
    images: Optional[Path] = typer.Option(
        None, "--images",
        help="Folder the labels' image names are relative to, for the galleries "
             "[default: images/ beside the labels file].",
    ),
    label: Optional[str] = typer.Option(None, "--label", help="Score only labelled boxes of this class."),
    ignore_label: Optional[str] = typer.Option(None, "--ignore-label", help="Labelled boxes of this class are ignore regions: never missed, and detections on them count neither as found nor as false alarms (as PASCAL VOC's difficult objects; a labels CSV can also flag boxes in an `ignore` column)."),
    min_size: Optional[float] = typer.Option(None, "--min-size", min=0.0, help="Score only objects at least this large, sqrt(width x height) in pixels; smaller labels and the detections that match nothing outside the range are left out (as COCO's area ranges)."),
    max_size: Optional[float] = typer.Option(None, "--max-size", min=0.0, help="Score only objects smaller than this, sqrt(width x height) in pixels."),
    size_buckets: str = typer.Option("small:0-32,medium:32-96,large:96-", "--size-buckets", help="Size buckets reported beside the headline figures, NAME:LOW-HIGH in pixels of sqrt(width x height), comma-separated, HIGH empty for no limit; 'none' for no buckets. The default uses COCO's limits 32 and 96 (a value from memory of the COCO detection evaluation)."),
    target_precision: Optional[float] = typer.Option(
        None, "--target-precision", callback=_target,
        help="Recommend the threshold of highest recall with at least this precision.",
    ),
    target_recall: Optional[float] = typer.Option(
        None, "--target-recall", callback=_target,
        help="Recommend the highest threshold with at least this recall.",
    ),
    force: bool = typer.Option(
        False, "--force", help="Replace the report in a folder that already holds files."
    ),
    strict: bool = typer.Option(
        False, "--strict",
        help="Stop with an error when labelled images have no rows in the detections file, or "
             "images with rows are not in the labels (without it: a warning, and the report).",
    ),
) -> None:
    """Score detections against labels: precision-recall, AP, miss rate against false alarms per
    image, galleries of errors, and a recommended score threshold (best F1 unless a target is
    given). Every labelled image counts, with or without detections; labelled images without
    rows in the detections file, and detected images without labels, are named in a warning.
    The curves use every detection; the per-image table and the galleries show the detections
    at or above the recommended threshold."""
    if target_precision is not None and target_recall is not None:
        raise typer.BadParameter("give --target-precision or --target-recall, not both")
    if min_size is not None and max_size is not None and min_size >= max_size:
        raise typer.BadParameter("--min-size must be smaller than --max-size")
    size_range = None
    if min_size is not None or max_size is not None:
        size_range = (min_size or 0.0, max_size if max_size is not None else float("inf"))
    result = score_files(detections, labels, out, iou_threshold=iou, images_dir=images,
                         label=label, target_precision=target_precision,
                         target_recall=target_recall, force=force, strict=strict,
                         size_range=size_range, size_buckets=parse_size_buckets(size_buckets),
                         ignore_label=ignore_label)
    for warning in result.warnings:
        typer.echo(f"warning: {warning}", err=True)
    rows = summary_table(result.summary, result.report)
    width = max(len(name) for name, _ in rows)
    for name, value in rows:
        typer.echo(f"  {name:<{width}}  {value}")
    for note in result.notes:
        typer.echo(f"note: {note}")
