"""`patchwood harvest IMAGES_DIR LABELS --out BANK.npz`."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from cli.common import (quiet_option, check_not_an_input, check_output_file, count, echo, given, human_path,
                        parse_window_option, progress_bar, usage_error)
from detector.harvest import harvest as harvest_bank, save_bank
from detector.io.labels import read_labels


#: Options that only shape the augmented copies: parameter name -> (option, the value that
#: asks for nothing, which is fine without copies).
COPY_OPTIONS = {"jitter": ("--jitter", 0.0), "mirror": ("--mirror", False),
                "rotate": ("--rotate", 0.0), "brightness": ("--brightness", 0.0),
                "contrast": ("--contrast", 0.0)}


def harvest(
    ctx: typer.Context,
    images_dir: Path = typer.Argument(..., help="Folder the labels' image paths are relative to."),
    labels: Path = typer.Argument(..., help="Labels CSV (image,x,y,width,height[,label]) or COCO JSON."),
    out: Path = typer.Option(..., "--out", help="Patch bank to write (.npz)."),
    window: Optional[str] = typer.Option(None, "--window", help="Patch size WxH, e.g. 24x24. Default: the median box aspect ratio with the shorter side 24."),
    label: Optional[str] = typer.Option(None, "--label", help="Keep only boxes of this class (when the labels have a label column)."),
    margin: float = typer.Option(0.1, "--margin", min=0.0, max=1.0, help="Context added around each box, as a fraction of its size on every side."),
    copies: int = typer.Option(4, "--copies", min=0, max=100, help="Augmented copies per box, besides the box itself."),
    jitter: float = typer.Option(0.05, "--jitter", min=0.0, max=0.5, help="Largest random shift and scale change of a copy, as a fraction of the box."),
    mirror: bool = typer.Option(True, "--mirror/--no-mirror", help="Mirror every second copy left to right."),
    rotate: float = typer.Option(10.0, "--rotate", min=0.0, max=180.0, help="Largest random rotation of a copy, degrees."),
    brightness: float = typer.Option(20.0, "--brightness", min=0.0, max=128.0, help="Largest random brightness change of a copy, grey levels."),
    contrast: float = typer.Option(0.2, "--contrast", min=0.0, max=0.9, help="Largest random relative contrast change of a copy."),
    negatives_per_image: int = typer.Option(50, "--negatives-per-image", min=0, help="Background windows drawn from each image."),
    near_negatives: int = typer.Option(4, "--near-negatives", min=0, max=100, help="Background windows per box drawn close to it: much smaller inside it, much larger around it."),
    background_iou: float = typer.Option(0.3, "--background-iou", min=0.0, max=1.0, help="A background window must overlap every labelled box less than this (IoU)."),
    seed: int = typer.Option(0, "--seed", min=0, help="Random seed; the same seed gives the same bank."),
    quiet: bool = quiet_option(),
    force: bool = typer.Option(False, "--force", help="Replace an existing bank file."),
) -> None:
    """Cut object patches (with augmented copies) from the labelled boxes and background patches
    from everywhere else, into one patch bank file."""
    unused = [option for name, (option, off) in COPY_OPTIONS.items()
              if given(ctx, name) and ctx.params[name] != off]
    if unused and copies == 0:
        usage_error(f"{', '.join(unused)} only shape{'s' if len(unused) == 1 else ''} the "
                    "augmented copies, and --copies 0 makes none; raise --copies or leave "
                    f"{'it' if len(unused) == 1 else 'them'} out")
    size = parse_window_option(window)
    check_output_file(out, force, "patch bank", inputs=[labels])
    lf = read_labels(labels, images_dir=images_dir, label=label)
    check_not_an_input(out, [images_dir / it.image for it in lf], "patch bank")
    n_boxes = sum(len(it.boxes) for it in lf)
    echo(f"labels: {count(len(lf), 'image')}, {count(n_boxes, 'box', 'boxes')} from "
         f"{human_path(labels)}"
         + (f" ({count(lf.clipped, 'box', 'boxes')} clipped to their image, "
            f"{count(lf.duplicates, 'duplicate row')} dropped)" if lf.warnings else ""))
    with progress_bar("harvesting", len(lf), "images") as update:
        bank = harvest_bank(images_dir, lf.items, window=size, margin=margin, copies=copies,
                            jitter=jitter, mirror=mirror, rotate=rotate, brightness=brightness,
                            contrast=contrast, negatives_per_image=negatives_per_image,
                            near_negatives=near_negatives,
                            max_background_iou=background_iou, seed=seed, labels_path=labels,
                            progress=update)
    W, H = bank.window
    how = "inferred from the median box aspect ratio, shorter side 24" if size is None else "from --window"
    echo(f"window: {W}x{H} ({how})")
    sizes = bank.metadata["object_sizes"]
    echo(f"object sizes: shorter side {sizes['smallest']:g} to {sizes['largest']:g} pixels "
         f"(median {sizes['median']:g}); the scan looks for these by default")
    if sizes["below_window"]:
        echo(f"note: {count(sizes['below_window'], 'labelled object is', 'labelled objects are')} "
             f"smaller than the window's object side of {sizes['window_object_side']:g} pixels; "
             f"the scan enlarges images to find them (slower; `--window` sets a smaller window)")
    c = bank.counts()
    echo(f"patches: {c['objects']} object ({c['object']} boxes + {c['augmented']} augmented copies), "
         f"{c['background']} background")
    if c["background"] == 0:
        echo("note: no background patches were cut; training needs some (raise "
             "--negatives-per-image or --near-negatives)")
    if bank.metadata.get("images_too_small"):
        small = bank.metadata["images_too_small"]
        echo(f"note: {count(small, 'image is', 'images are')} smaller than the window; "
             f"{'it gave' if small == 1 else 'they gave'} no background patches")
    save_bank(out, bank)
    echo(f"wrote {human_path(out)}")
