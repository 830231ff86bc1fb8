"""`patchwood scan MODEL.npz PATH... --out DETECTIONS.csv`."""

from __future__ import annotations

from pathlib import Path
from typing import List, Literal, Optional

import typer

from cli.common import (quiet_option, jobs_option, check_not_an_input, echo, given, human_path, progress_bar,
                        refuse_together, usage_error)
from detector.scan import FORMATS, scan_paths
from detector.scan import ScanSettings


def scan(
    ctx: typer.Context,
    model: Path = typer.Argument(..., help="Model file from `patchwood train`."),
    paths: List[Path] = typer.Argument(..., help="Image files and folders (searched recursively for png, jpg, jpeg, bmp, tif, tiff)."),
    out: Path = typer.Option(..., "--out", help="Detections file to write: CSV (image,x,y,width,height,score), or COCO JSON with --format coco or coco-results."),
    format: Literal["csv", "coco", "coco-results"] = typer.Option("csv", "--format", help="csv; coco (a COCO JSON object: the images scanned and the detections as scored annotations); or coco-results (the COCO results list, [{image_id, category_id, bbox, score}, ...], that pycocotools' COCO.loadRes and COCOeval read; image ids from --labels)."),
    box_format: Literal["xywh", "corners"] = typer.Option("xywh", "--box-format", help="Box columns of the CSV: x,y,width,height, or corners x_min,y_min,x_max,y_max (score and harvest read either by the header)."),
    labels: Optional[Path] = typer.Option(None, "--labels", help="With --format coco-results: the COCO labels file (JSON) the results are for; its image ids, matched by file name, and its category id are written (without it, images are numbered 1, 2, ... in the order written). With --draw: the labels (CSV, COCO or VOC) of the images, drawn beside the detections: matched, false alarm and missed, each in its own colour and line style."),
    label: Optional[str] = typer.Option(None, "--label", help="With --labels: the category the detections are for, when the labels file has several."),
    scale_step: float = typer.Option(1.2, "--scale-step", min=1.01, max=3.0, help="Ratio between neighbouring scales."),
    stride: float = typer.Option(2.0, "--stride", min=0.5, max=64.0, help="Step between windows in pixels at the window's own size; it grows with the scale."),
    min_object: Optional[float] = typer.Option(None, "--min-object", min=1.0, help="Shorter side of the smallest object to look for, pixels (default: the smallest labelled object in training, less a quarter). Smaller than the window enlarges the image."),
    max_object: Optional[float] = typer.Option(None, "--max-object", min=1.0, help="Shorter side of the largest object to look for, pixels (default: the largest labelled object in training, plus a quarter; for older models, as large as the image allows)."),
    threshold: float = typer.Option(0.5, "--threshold", min=0.0, max=1.0, help="Keep detections scoring at least this (0..1)."),
    threshold_from: Optional[Path] = typer.Option(None, "--threshold-from", help="Take the threshold from a summary.json written by `patchwood score` (its recommended operating point)."),
    nms_iou: float = typer.Option(0.3, "--nms-iou", min=0.0, max=1.0, help="Non-maximum suppression: drop a box overlapping a better one by more than this IoU."),
    early_exit: bool = typer.Option(True, "--early-exit/--no-early-exit", help="Drop windows early with the model's calibrated exit thresholds."),
    exit_level: Optional[float] = typer.Option(None, "--exit-level", min=0.0, max=1.0, metavar="LEVEL", help="Speed option: use the tighter early exits calibrated for scans at LEVEL or above (fewer trees per window). They may drop objects that would score LEVEL or more, so scan the curve you score with the same --exit-level; --threshold-from then reuses it. Default: the exits for every threshold, so that a scan keeps exactly the detections a scan at a lower threshold finds at or above its own."),
    box_voting: float = typer.Option(0.5, "--box-voting", min=0.0, max=1.0, metavar="SHARE", help="Box voting: move each detection's box to the score-weighted mean of the boxes of the windows that overlap it (IoU 0.5 or more) and score at least SHARE times its score. The detections and their scores stay the same; the boxes fit the objects better (AP50:95 up by 0.03-0.28 on five of the six cross-data sets, 0.12 on the demo scenario). 0 turns it off: each box is its window's."),
    overhang: float = typer.Option(0.25, "--overhang", min=0.0, max=0.5, help="How far a window may reach past the image's edges, as a share of its size (border pixels repeated there), so that objects cut by the edge are found: 0.25 finds objects about four fifths inside, 0.5 those at least half inside; 0 keeps windows inside."),
    draw: Optional[Path] = typer.Option(None, "--draw", help="Also write annotated copies of the images into this folder (never into an input folder), with the detections at the operating threshold: --draw-threshold, else the threshold --threshold-from gives, else the larger of --threshold and 0.5."),
    draw_threshold: Optional[float] = typer.Option(None, "--draw-threshold", min=0.0, max=1.0, help="With --draw: draw the detections scoring at least this (at least --threshold)."),
    jobs: int = jobs_option(),
    cluster: Optional[str] = typer.Option(None, "--cluster", help="Run the images on a Dask distributed cluster at this scheduler address (e.g. tcp://10.0.0.5:8786)."),
    resume: bool = typer.Option(False, "--resume", help="Continue an interrupted run: keep the images already in --out and scan the rest (only when its provenance side file names this model and these settings)."),
    quiet: bool = quiet_option(),
    force: bool = typer.Option(False, "--force", help="Replace an existing --out and its failures side file (never an input); with --threshold-from, also use a summary made from another model's detections."),
) -> None:
    """Find objects in images: a multi-scale sliding-window scan with early exit and non-maximum
    suppression. Files that cannot be read (damaged, not an image, above the size limit set by
    PATCHWOOD_MAX_MEGAPIXELS, default 100, not a regular file such as a named pipe) and folders
    that cannot be listed are counted, listed at the end and in DETECTIONS.failures.csv, and the
    run goes on. Names that are not UTF-8 are written with %XX for each such byte. One run at a
    time writes an output: a second one on the same --out stops, naming the first.

    Every detections file gets a provenance side file, DETECTIONS.provenance.json (the model's
    SHA-256, every setting, the versions), which --resume, --threshold-from and `patchwood score`
    read.

    Exit status: 0 when the run finished, even with some files listed as failures; 1 when no
    image could be read, or for bad input (model, paths, --out, --labels, a summary made from
    another model's detections); 2 for a usage error (options that contradict each other)."""
    if format not in FORMATS:
        raise typer.BadParameter(f"--format must be {', '.join(FORMATS[:-1])} or {FORMATS[-1]}, "
                                 f"got {format!r}")
    if labels is not None and format != "coco-results" and draw is None:
        raise typer.BadParameter("--labels gives image ids to --format coco-results, or labels "
                                 "to the frames --draw draws")
    if draw_threshold is not None and draw is None:
        raise typer.BadParameter("--draw-threshold goes with --draw")
    if label is not None and labels is None:
        raise typer.BadParameter("--label chooses a category of the --labels file; give that file")
    if min_object and max_object and min_object > max_object:
        raise typer.BadParameter("--min-object is larger than --max-object")
    refuse_together(ctx, "threshold", "threshold_from",
                    "--threshold-from sets the threshold; give one of them")
    refuse_together(ctx, "resume", "force",
                    "--resume continues --out, --force replaces it; give one of them")
    refuse_together(ctx, "jobs", "cluster",
                    "with --cluster the cluster's workers scan, not local processes; give one")
    if resume and format != "csv":
        usage_error(f"--resume continues CSV output only; --format {format} writes a new file")
    if exit_level is not None and not early_exit:
        usage_error("--exit-level chooses early exits; it has no effect with --no-early-exit")
    recorded = None
    if threshold_from is not None:
        from detector.scan import check_summary_model, settings_differences
        from detector.reporting.summary import read_summary_point

        check_not_an_input(out, [threshold_from])

        threshold, recorded = read_summary_point(threshold_from)
        if recorded is not None:
            for line in check_summary_model(recorded, model, threshold_from, force):
                typer.echo(f"warning: {line}", err=True)
            level = recorded["settings"]["exit_level"]
            if given(ctx, "exit_level") and exit_level != level:
                usage_error(
                    f"--exit-level {exit_level:g} differs from the exit level the summary's "
                    f"detections were made with ({'none' if level is None else f'{level:g}'}); "
                    "leave --exit-level out to reuse theirs")
            if early_exit:
                exit_level = level
        echo(f"threshold {threshold:g} from {human_path(threshold_from)}"
             + (f", early exits for scans at {exit_level:g} or above"
                if exit_level is not None else ""))
        if recorded is None:
            typer.echo(f"warning: {human_path(threshold_from)} does not say which model and "
                       "settings made its detections (no provenance); cannot check them",
                       err=True)
    settings = ScanSettings(scale_step=scale_step, stride=stride, min_object=min_object,
                            max_object=max_object, threshold=threshold, nms_iou=nms_iou,
                            early_exit=early_exit, overhang=overhang, exit_level=exit_level,
                            box_voting=box_voting or None)
    if recorded is not None:
        other = settings_differences(
            {k: v for k, v in recorded["settings"].items() if k != "threshold"}, settings)
        if other:
            typer.echo(f"warning: the report's detections were made with other settings: "
                       f"{', '.join(other)}; its precision and recall hold for those",
                       err=True)
    from detector.model import load_model, old_format_note
    from detector.scan import skipped_sizes_note

    loaded = load_model(model)
    for note in (old_format_note(loaded, human_path(model)), skipped_sizes_note(loaded, settings)):
        if note:
            echo(note)
    drawer = None
    if draw is not None:
        import functools

        from detector.io.labels import read_labels
        from detector.reporting.drawing import draw_frame

        shown = draw_threshold if draw_threshold is not None else (
            threshold if threshold_from is not None else max(threshold, 0.5))
        truth = None
        if labels is not None:
            truth = {it.image: it.boxes for it in read_labels(labels, label=label)}
        drawer = functools.partial(draw_frame, threshold=max(shown, threshold), truth=truth)
        echo(f"drawing detections at score >= {max(shown, threshold):g}"
             + (f" against {human_path(labels)}" if labels is not None else ""))
    with progress_bar("scanning", None, "images") as update:
        s = scan_paths(model, paths, out, settings=settings, jobs=jobs, cluster=cluster,
                       resume=resume, force=force, draw_dir=draw, fmt=format,
                       labels=labels if format == "coco-results" else None,
                       box_format=box_format, drawer=drawer,
                       label=label if format == "coco-results" else None, progress=update,
                       threshold_from=threshold_from)
    echo(f"images scanned: {s.images}" + (f" (+{s.resumed} kept from the earlier run)" if s.resumed else ""))
    echo(f"detections: {s.detections} at score >= {threshold:g}")
    if labels is not None and format == "coco-results":
        echo(f"image ids: from {human_path(labels)}")
    echo(f"failures: {len(s.failures)}" + (f" (listed in {human_path(s.failures_file)})" if s.failures else ""))
    for image, reason in s.failures[:10]:
        echo(f"  {image}: {reason}")
    if len(s.failures) > 10:
        echo(f"  ... and {len(s.failures) - 10} more")
    if s.skipped_files:
        from detector._validation import named_list

        echo(f"other files skipped: {s.skipped_files} ({named_list(s.skipped_names)})")
    echo(f"time: {s.seconds:.1f} s ({s.images_per_second:.1f} images/s), "
         f"mean trees per window: {s.mean_trees:.2f}")
    if draw is not None:
        echo(f"annotated images: {s.drawn} in {human_path(draw)}")
    echo(f"wrote {human_path(out)}")
    if s.images and len(s.failures) == s.images:
        raise typer.Exit(1)
