"""`patchwood tune IMAGES_DIR LABELS`: cross-validated parameter search on held-out images."""

from __future__ import annotations

import json
import time
from pathlib import Path
from typing import Literal, Optional

import typer

from cli.common import (harvest_option, quiet_option, jobs_option, channels_option, check_channels_option, echo, human_path,
                        parse_window_option, progress_bar)
from detector.errors import InputError
from detector.io.files import write_text
from detector.harvest import save_bank
from detector.io.labels import read_labels
from detector.scan import ScanSettings
from detector.training import (DEFAULT_MINE_ROUNDS, SearchSpace, describe, plot_trials,
                               prepare_folds, search, train_command, write_trials_csv)

#: Files the command writes into --out.
TRIALS_FILE = "trials.csv"
PLOT_FILE = "ap50-by-parameter.png"
BANK_FILE = "bank.npz"
BEST_FILE = "best.json"
#: `patchwood train` takes --depth up to this.
TRAIN_MAX_DEPTH = 8


def parse_range(text: str, kind, option: str, low=None, high=None):
    """``"LOW..HIGH"`` or a single value -> ``(low, high)``; a bad value is a usage error.

    >>> parse_range("20..300", int, "--trees")
    (20, 300)
    >>> parse_range("0.5", float, "--sample-fraction")
    (0.5, 0.5)
    """
    parts = str(text).replace(" ", "").split("..")
    try:
        if len(parts) == 1:
            lo = hi = kind(parts[0])
        elif len(parts) == 2:
            lo, hi = kind(parts[0]), kind(parts[1])
        else:
            raise ValueError
    except ValueError:
        what = "whole numbers" if kind is int else "numbers"
        raise typer.BadParameter(f"{option} takes a value or a range LOW..HIGH of {what}, "
                                 f"got {text!r}") from None
    if lo > hi:
        raise typer.BadParameter(f"{option}: LOW must not exceed HIGH, got {text!r}")
    if (low is not None and lo < low) or (high is not None and hi > high):
        span = f"{low}..{high}" if high is not None else f"at least {low}"
        raise typer.BadParameter(f"{option}: values must be {span}, got {text!r}")
    return lo, hi


def parse_modes(text: str):
    """``"bagged,boosted"`` -> ``("bagged", "boosted")``."""
    modes = tuple(m for m in str(text).replace(" ", "").split(",") if m)
    if not modes or any(m not in ("bagged", "boosted") for m in modes):
        raise typer.BadParameter(f"--mode takes bagged, boosted or bagged,boosted, got {text!r}")
    return tuple(dict.fromkeys(modes))


def tune(
    images_dir: Path = typer.Argument(..., help="Folder the labels' image paths are relative to."),
    labels: Path = typer.Argument(..., help="Labels CSV (image,x,y,width,height[,label]) or COCO JSON."),
    out: Path = typer.Option(Path("tuning"), "--out", help=f"Folder for {TRIALS_FILE}, {PLOT_FILE}, {BANK_FILE} and {BEST_FILE}; created when missing."),
    folds: int = typer.Option(3, "--folds", min=2, max=20, help="Cross-validation folds; each holds out whole images."),
    seed: int = typer.Option(0, "--seed", min=0, help="Seed of the folds, the harvest, the search and every model."),
    budget_minutes: float = typer.Option(10.0, "--budget-minutes", min=0.0, help="No new trial starts after this many minutes (counted from the start); the first trial always runs."),
    trials: Optional[int] = typer.Option(None, "--trials", min=1, help="Most trials to run. Default: as many as the budget allows."),
    trees: str = typer.Option("20..300", "--trees", help="Number of trees: a value or a range LOW..HIGH (searched on a log scale)."),
    depth: str = typer.Option("1..4", "--depth", help=f"Depth of every tree: a value or a range LOW..HIGH (at most {TRAIN_MAX_DEPTH})."),
    mode: str = typer.Option("bagged,boosted", "--mode", help="Modes to try: bagged, boosted, or bagged,boosted."),
    pool: str = typer.Option("1000..20000", "--pool", help="Feature pool size: a value or a range LOW..HIGH (log scale; capped at the features the window holds)."),
    features_per_node: str = typer.Option("100..3000", "--features-per-node", help="Pool features tried at every node: a value or a range LOW..HIGH (log scale; capped at the pool)."),
    sample_fraction: str = typer.Option("0.3..1", "--sample-fraction", help="Bootstrap or subsample fraction: a value or a range LOW..HIGH within 0.01..1."),
    channels: Literal["gradient", "grey"] = channels_option(),
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
    mine_rounds: int = typer.Option(DEFAULT_MINE_ROUNDS, "--mine-rounds", min=0, max=10, help="Hard-negative mining rounds inside every fold, on that fold's training images only (as many as train mines by default; the models before the last grow a quarter of the trees, as train's do)."),
    scale_step: float = typer.Option(1.2, "--scale-step", min=1.01, max=3.0, help="Ratio between neighbouring scales of the held-out scans."),
    stride: float = typer.Option(2.0, "--stride", min=0.5, max=64.0, help="Step between windows of the held-out scans, in pixels at the window's own size."),
    min_object: Optional[float] = typer.Option(None, "--min-object", min=1.0, help="Shorter side of the smallest object to look for, in pixels."),
    max_object: Optional[float] = typer.Option(None, "--max-object", min=1.0, help="Shorter side of the largest object to look for, in pixels."),
    overhang: float = typer.Option(0.25, "--overhang", min=0.0, max=0.5, help="How far a window of the held-out scans may reach past the image's edges, as a share of its size (as `patchwood scan --overhang`)."),
    jobs: int = jobs_option(),
    quiet: bool = quiet_option(),
    force: bool = typer.Option(False, "--force", help="Replace files an earlier tune wrote into --out."),
) -> None:
    """Search the forest's parameters by cross-validation over images: every trial trains on
    some images and is scored by the AP50 of its detections on the others."""
    started = time.perf_counter()
    size = parse_window_option(window)
    check_channels_option(channels)
    space = SearchSpace(
        trees=parse_range(trees, int, "--trees", low=1, high=10000),
        depth=parse_range(depth, int, "--depth", low=1, high=TRAIN_MAX_DEPTH),
        modes=parse_modes(mode),
        pool=parse_range(pool, int, "--pool", low=1),
        features_per_node=parse_range(features_per_node, int, "--features-per-node", low=1),
        sample_fraction=parse_range(sample_fraction, float, "--sample-fraction", low=0.01, high=1.0),
    ).check()
    if min_object is not None and max_object is not None and min_object > max_object:
        raise typer.BadParameter("--min-object must not exceed --max-object")
    files = {name: out / name for name in (TRIALS_FILE, PLOT_FILE, BANK_FILE, BEST_FILE)}
    if out.exists() and not out.is_dir():
        raise InputError("--out must be a folder, but this is a file", path=out)
    for path in files.values():
        if path.is_dir():
            raise InputError("output must be a file, but this is a folder", path=path)
        if path.exists() and not force:
            raise InputError("exists; add --force to replace it", path=path)

    lf = read_labels(labels, images_dir=images_dir, label=label)
    n_boxes = sum(len(it.boxes) for it in lf)
    echo(f"labels: {len(lf)} images, {n_boxes} boxes from {human_path(labels)}")
    with progress_bar("harvesting", len(lf), "images") as update:
        bank, fold_data = prepare_folds(images_dir, lf.items, folds, seed, labels_path=labels,
                                        progress=update, window=size, margin=margin,
                                        copies=copies, jitter=jitter, mirror=mirror,
                                        rotate=rotate, brightness=brightness, contrast=contrast,
                                        negatives_per_image=negatives_per_image,
                                        near_negatives=near_negatives,
                                        max_background_iou=background_iou)
    out.mkdir(parents=True, exist_ok=True)
    save_bank(files[BANK_FILE], bank)
    c = bank.counts()
    echo(f"bank: {c['objects']} object and {c['background']} background patches of "
         f"{bank.window[0]}x{bank.window[1]} -> {human_path(files[BANK_FILE])}")
    for f in fold_data:
        held_boxes = sum(len(it.boxes) for it in f.test_items)
        echo(f"fold {f.number}: train on {len(f.train_items)} images ({len(f.bank)} patches), "
             f"hold out {len(f.test_items)} images with {held_boxes} objects")
    settings = ScanSettings(scale_step=scale_step, stride=stride, min_object=min_object,
                            max_object=max_object, overhang=overhang)
    limit = f"/{trials}" if trials else ""

    def report(record, result):
        best = result.best
        best_text = f"{best.mean:.3f} (trial {best.number})" if best is not None else "none yet"
        echo(f"trial {record.number}{limit}: {describe(record.values)} -> AP50 {record.mean:.3f} "
             f"± {record.spread:.3f} over {folds} folds, {record.seconds:.1f} s; best {best_text}")
        write_trials_csv(files[TRIALS_FILE], result.trials, folds)

    result = search(fold_data, space=space, trials=trials, budget_seconds=60.0 * budget_minutes,
                    seed=seed, started=started, settings=settings, mine_rounds=mine_rounds,
                    n_jobs=jobs, on_trial=report, channels=channels)
    plot_trials(files[PLOT_FILE], result.trials, modes=space.modes)
    echo(f"wrote {human_path(files[TRIALS_FILE])} and {human_path(files[PLOT_FILE])}")
    why = "trial limit reached" if result.stopped == "trials" else "time budget used"
    echo(f"{len(result.trials)} trials in {result.seconds:.0f} s ({why})")
    best = result.best
    if best is None:
        raise InputError("no trial gave a defined AP50 (the held-out images hold no object)",
                         path=labels)
    command = train_command(best.values, human_path(files[BANK_FILE]),
                            human_path(out / "model.npz"), seed=seed, mine_rounds=mine_rounds,
                            images_dir=human_path(images_dir), labels_path=human_path(labels),
                            channels=channels)
    summary = {"trial": best.number, "parameters": best.values, "ap50_mean": best.mean,
               "ap50_per_fold": [float(a) for a in best.per_fold], "ap50_sd": best.spread,
               "folds": folds, "seed": seed, "trials": len(result.trials),
               "stopped": result.stopped, "train_command": command}
    write_text(files[BEST_FILE], json.dumps(summary, indent=2, sort_keys=True) + "\n")
    echo(f"best: trial {best.number}, AP50 {best.mean:.3f} ± {best.spread:.3f} over {folds} folds "
         f"({describe(best.values)})")
    echo("train the final model on every image with:")
    echo(f"  {command}")
