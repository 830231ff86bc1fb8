"""`patchwood harvest IMAGES_DIR LABELS --out BANK.npz`."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from detector.errors import InputError

from cli.common import (harvest_option, jobs_option, quiet_option, check_not_an_input, check_output_file, count, echo, given, human_path,
                        parse_window_option, progress_bar, usage_error)
from detector.harvest import harvest as harvest_bank, save_bank
from detector.io.labels import read_labels
from detector._validation import named_list


#: Options that only shape the augmented copies: parameter name -> (option, the value that
#: asks for nothing, which is fine without copies).
COPY_OPTIONS = {"jitter": ("--jitter", 0.0), "mirror": ("--mirror", False),
                "rotate": ("--rotate", 0.0), "brightness": ("--brightness", 0.0),
                "contrast": ("--contrast", 0.0)}


def check_image_folder(images_dir: Path, labels: Path) -> None:
    """IMAGES_DIR must be a folder: one line when it does not exist, is a file, or when the two
    arguments look swapped (a folder given as LABELS)."""
    if images_dir.is_dir():
        return
    if images_dir.is_file() and labels.is_dir():
        raise InputError(f"is a file and {human_path(labels)} a folder: the arguments look "
                         "swapped (give IMAGES_DIR first, then LABELS)", path=images_dir)
    if images_dir.exists():
        raise InputError("IMAGES_DIR must be a folder of images, but this is a file",
                         path=images_dir)
    raise InputError("the images folder does not exist", path=images_dir)


def unlabelled_images(images_dir: Path, lf) -> list[str]:
    """The images under IMAGES_DIR (as the labels name them) that have no row in the labels."""
    from detector.io.images import list_images

    named = {it.image for it in lf} | set(lf.missing)
    return [name for _, name in list_images([images_dir])[0] if name not in named]


def harvest(
    ctx: typer.Context,
    images_dir: Path = typer.Argument(..., help="Folder the labels' image paths are relative to."),
    labels: Path = typer.Argument(..., help="Labels CSV (image,x,y,width,height[,label]) or COCO JSON."),
    out: Path = typer.Option(..., "--out", help="Patch bank to write (.npz)."),
    window: Optional[str] = harvest_option("window"),
    label: Optional[str] = harvest_option("label"),
    margin: float = harvest_option("margin"),
    copies: int = harvest_option("copies"),
    jitter: float = harvest_option("jitter"),
    mirror: bool = harvest_option("mirror"),
    rotate: float = harvest_option("rotate"),
    brightness: float = harvest_option("brightness"),
    contrast: float = harvest_option("contrast"),
    negatives_per_image: int = harvest_option("negatives_per_image"),
    near_negatives: int = harvest_option("near_negatives"),
    background_iou: float = harvest_option("background_iou"),
    seed: int = typer.Option(0, "--seed", min=0, help="Random seed; the same seed gives the same bank."),
    skip_missing: bool = typer.Option(False, "--skip-missing", help="Harvest past labelled images that are not in IMAGES_DIR, naming them (without it the first one stops the harvest)."),
    jobs: int = jobs_option(),
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
    check_image_folder(images_dir, labels)
    check_output_file(out, force, "patch bank", inputs=[labels])
    try:
        lf = read_labels(labels, images_dir=images_dir, label=label, skip_missing=skip_missing)
    except InputError as err:
        if "image file not found" in err.message:
            raise InputError(f"{err.message} (--skip-missing harvests the others)", path=err.path,
                             line=err.line) from None
        raise

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
                            progress=update, jobs=jobs)
    W, H = bank.window
    rule = bank.metadata.get("window_rule")
    if rule is None:
        how = "from --window"
    else:
        share, side = rule["share_below_larger"], rule["larger_object_side"]
        how = (f"inferred: the labels' median aspect ratio; shorter side {rule['short_side']}, as "
               f"{share:.0%} of the labelled objects are smaller than a {rule['larger_side']}-pixel "
               f"window's object side of {side:.1f} pixels, "
               + ("at most" if share <= rule["share_allowed"] else "more than")
               + f" the {rule['share_allowed']:.0%} it allows")
    echo(f"window: {W}x{H} ({how})")
    sizes = bank.metadata["object_sizes"]
    echo(f"object sizes: shorter side {sizes['smallest']:g} to {sizes['largest']:g} pixels "
         f"(median {sizes['median']:g}); the scan looks for these by default")
    if sizes["below_window"]:
        echo(f"note: {count(sizes['below_window'], 'labelled object is', 'labelled objects are')} "
             f"smaller than the window's object side of {sizes['window_object_side']:.3g} pixels; "
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
    # after the harvest, so that a failure stays the one line it is
    if lf.missing:
        typer.echo(f"warning: {count(len(lf.missing), 'labelled image')} not in "
                   f"{human_path(images_dir)}, left out: {named_list(lf.missing)}", err=True)
    unlabelled = unlabelled_images(images_dir, lf)
    if unlabelled:
        typer.echo(f"warning: {count(len(unlabelled), 'image')} in {human_path(images_dir)} "
                   f"{'has' if len(unlabelled) == 1 else 'have'} no row in "
                   f"{human_path(labels)} and {'is' if len(unlabelled) == 1 else 'are'} not "
                   f"harvested (unlabelled objects there would go unseen): "
                   f"{named_list(unlabelled)}", err=True)
