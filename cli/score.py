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
    result = score_files(detections, labels, out, iou_threshold=iou, images_dir=images,
                         label=label, target_precision=target_precision,
                         target_recall=target_recall, force=force, strict=strict)
    for warning in result.warnings:
        typer.echo(f"warning: {warning}", err=True)
    rows = summary_table(result.summary, result.report)
    width = max(len(name) for name, _ in rows)
    for name, value in rows:
        typer.echo(f"  {name:<{width}}  {value}")
    for note in result.notes:
        typer.echo(f"note: {note}")
