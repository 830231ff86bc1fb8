"""`patchwood scan MODEL.npz PATH... --out DETECTIONS.csv`."""

from __future__ import annotations

from pathlib import Path
from typing import List, Optional

import typer

from cli.common import check_not_an_input, echo, human_path, progress_bar
from detector.batch import scan_paths
from detector.scan import ScanSettings


def scan(
    model: Path = typer.Argument(..., help="Model file from `patchwood train`."),
    paths: List[Path] = typer.Argument(..., help="Image files and folders (searched recursively for png, jpg, jpeg, bmp, tif, tiff)."),
    out: Path = typer.Option(..., "--out", help="Detections file to write: CSV (image,x,y,width,height,score), or COCO JSON with --format coco."),
    format: str = typer.Option("csv", "--format", help="csv or coco."),
    scale_step: float = typer.Option(1.2, "--scale-step", min=1.01, max=3.0, help="Ratio between neighbouring scales."),
    stride: float = typer.Option(2.0, "--stride", min=0.5, max=64.0, help="Step between windows in pixels at the window's own size; it grows with the scale."),
    min_object: Optional[float] = typer.Option(None, "--min-object", min=1.0, help="Shorter side of the smallest object to look for, pixels (default: the model's window). Smaller than the window enlarges the image."),
    max_object: Optional[float] = typer.Option(None, "--max-object", min=1.0, help="Shorter side of the largest object to look for, pixels (default: as large as the image allows)."),
    threshold: float = typer.Option(0.5, "--threshold", min=0.0, max=1.0, help="Keep detections scoring at least this (0..1)."),
    threshold_from: Optional[Path] = typer.Option(None, "--threshold-from", help="Take the threshold from a summary.json written by `patchwood score` (its recommended operating point)."),
    nms_iou: float = typer.Option(0.3, "--nms-iou", min=0.0, max=1.0, help="Non-maximum suppression: drop a box overlapping a better one by more than this IoU."),
    early_exit: bool = typer.Option(True, "--early-exit/--no-early-exit", help="Drop windows early with the model's calibrated exit thresholds."),
    overhang: float = typer.Option(0.25, "--overhang", min=0.0, max=0.5, help="How far a window may reach past the image's edges, as a share of its size (border pixels repeated there), so that objects cut by the edge are found: 0.25 finds objects about four fifths inside, 0.5 those at least half inside; 0 keeps windows inside."),
    draw: Optional[Path] = typer.Option(None, "--draw", help="Also write annotated copies of the images into this folder (never into an input folder)."),
    jobs: int = typer.Option(1, "--jobs", min=1, max=256, help="Worker processes."),
    cluster: Optional[str] = typer.Option(None, "--cluster", help="Run the images on a Dask distributed cluster at this scheduler address (e.g. tcp://10.0.0.5:8786)."),
    resume: bool = typer.Option(False, "--resume", help="Continue an interrupted run: keep the images already in --out and scan the rest."),
    force: bool = typer.Option(False, "--force", help="Replace an existing --out and its failures side file (never an input)."),
) -> None:
    """Find objects in images: a multi-scale sliding-window scan with early exit and non-maximum
    suppression. Files that cannot be read (damaged, not an image, above the size limit set by
    PATCHWOOD_MAX_MEGAPIXELS, default 100, not a regular file such as a named pipe) and folders
    that cannot be listed are counted, listed at the end and in DETECTIONS.failures.csv, and the
    run goes on. Names that are not UTF-8 are written with %XX for each such byte. One run at a
    time writes an output: a second one on the same --out stops, naming the first.

    Exit status: 0 when the run finished, even with some files listed as failures; 1 when no
    image could be read, or for bad input (model, paths, --out); 2 for a usage error."""
    if format not in ("csv", "coco"):
        raise typer.BadParameter(f"--format must be csv or coco, got {format!r}")
    if min_object and max_object and min_object > max_object:
        raise typer.BadParameter("--min-object is larger than --max-object")
    if threshold_from is not None:
        from detector.report import threshold_from_summary

        check_not_an_input(out, [threshold_from])

        threshold = threshold_from_summary(threshold_from)
        echo(f"threshold {threshold:.4f} from {human_path(threshold_from)}")
    settings = ScanSettings(scale_step=scale_step, stride=stride, min_object=min_object,
                            max_object=max_object, threshold=threshold, nms_iou=nms_iou,
                            early_exit=early_exit, overhang=overhang)
    with progress_bar("scanning", None, "images") as update:
        s = scan_paths(model, paths, out, settings=settings, jobs=jobs, cluster=cluster,
                       resume=resume, force=force, draw_dir=draw, fmt=format, progress=update)
    echo(f"images scanned: {s.images}" + (f" (+{s.resumed} kept from the earlier run)" if s.resumed else ""))
    echo(f"detections: {s.detections} at score >= {threshold:g}")
    echo(f"failures: {len(s.failures)}" + (f" (listed in {human_path(s.failures_file)})" if s.failures else ""))
    for image, reason in s.failures[:10]:
        echo(f"  {image}: {reason}")
    if len(s.failures) > 10:
        echo(f"  ... and {len(s.failures) - 10} more")
    if s.skipped_files:
        echo(f"other files skipped: {s.skipped_files}")
    echo(f"time: {s.seconds:.1f} s ({s.images_per_second:.1f} images/s), "
         f"mean trees per window: {s.mean_trees:.2f}")
    if draw is not None:
        echo(f"annotated images: {s.drawn} in {human_path(draw)}")
    echo(f"wrote {human_path(out)}")
    if s.images and len(s.failures) == s.images:
        raise typer.Exit(1)
