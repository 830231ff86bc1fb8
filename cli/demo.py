"""`patchwood demo [--out DIR]`: the whole workflow on the built-in hex-nut scenario."""

from __future__ import annotations

import time
from pathlib import Path
from typing import Literal

import typer

from cli.common import quiet_option, jobs_option, echo, human_path, mining_stop_line, progress_bar
from detector.scan import draw_folder, scan_paths
from detector.errors import InputError
from detector.harvest import harvest, save_bank
from detector.io.labels import read_detections, read_labels
from detector.model import save_model
from detector.reporting.score_report import score_files
from detector.reporting.summary import summary_table
from detector.scan import ScanSettings
from detector.training import (DEFAULT_MINE_ROUNDS, DEFAULT_TRAIN, default_features_per_node, mining_params,
                               train_with_mining)
from synthetic_images import render_scenario

#: What the demo writes inside its folder (and may replace with --force).
DEMO_ENTRIES = ("scenario", "bank.npz", "model.npz", "detections.csv", "detections.failures.csv",
                "detections.provenance.json", "drawn", "report")


def demo(
    out: Path = typer.Option(Path("demo_output"), "--out", help="Folder for everything the demo writes."),
    seed: int = typer.Option(0, "--seed", min=0, help="Seed for the scenario, the harvest and training."),
    frames: int = typer.Option(200, "--frames", min=2, max=5000, help="Frames to render, split 80/20 into training and test frames."),
    trees: int = typer.Option(DEFAULT_TRAIN["trees"], "--trees", min=1, max=10000, help="Trees in the forest."),
    mode: Literal["boosted", "bagged"] = typer.Option(DEFAULT_TRAIN["mode"], "--mode", help="bagged (random forest) or boosted (Gentle AdaBoost)."),
    pool: int = typer.Option(DEFAULT_TRAIN["pool"], "--pool", min=1, help="Random feature pool size."),
    mine_rounds: int = typer.Option(DEFAULT_MINE_ROUNDS, "--mine-rounds", min=0, max=10, help="Hard-negative mining rounds on the training images (as `patchwood train`: the models before the last grow a quarter of the trees)."),
    jobs: int = jobs_option(),
    quiet: bool = quiet_option(),
    force: bool = typer.Option(False, "--force", help="Replace what an earlier demo wrote in --out (other files there are left alone)."),
) -> None:
    """Run the whole workflow on the demo scenario (hex nuts on a conveyor belt): render frames,
    harvest patches, train with a mining round, scan the test frames, score them and write the
    report."""
    if mode not in ("bagged", "boosted"):
        raise typer.BadParameter(f"--mode must be bagged or boosted, got {mode!r}")
    started = time.perf_counter()
    if out.exists() and not out.is_dir():
        raise InputError("demo output must be a folder", path=out)
    if out.is_dir() and not force and any((out / e).exists() for e in DEMO_ENTRIES):
        raise InputError("holds an earlier demo; add --force to replace it", path=out)
    out.mkdir(parents=True, exist_ok=True)
    scenario = out / "scenario"
    train_dir, test_dir = scenario / "train", scenario / "test"

    echo(f"[1/5] rendering the demo scenario into {human_path(scenario)}")
    from synthetic_images import split_counts

    train_n, test_n = split_counts(frames)
    summary = render_scenario(scenario, train_n, test_n, seed=seed, force=force)
    for split in ("train", "test"):
        s = summary[split]
        echo(f"      {split:5s} {s['frames']} frames ({s['frames_without_nuts']} without nuts), "
             f"{s['nuts']} nuts labelled")

    echo("[2/5] harvesting patches from the training frames")
    train_labels = read_labels(train_dir / "labels.csv", images_dir=train_dir / "images")
    with progress_bar("      harvesting", len(train_labels), "images") as update:
        # hex nuts look the same every 60 degrees: copies turned by up to 30 degrees cover them
        bank = harvest(train_dir / "images", train_labels.items, seed=seed, rotate=30.0, copies=8,
                       jitter=0.08, negatives_per_image=100, labels_path=train_dir / "labels.csv", progress=update,
                       jobs=jobs)
    bank_path = out / "bank.npz"
    save_bank(bank_path, bank)
    c = bank.counts()
    echo(f"      window {bank.window[0]}x{bank.window[1]}; {c['objects']} object and "
         f"{c['background']} background patches -> {human_path(bank_path)}")

    echo(f"[3/5] training {trees} {mode} trees with {mine_rounds} mining round(s)")
    params = dict(n_trees=trees, depth=2, mode=mode, pool=pool,
                  features_per_node=default_features_per_node(pool),
                  weight_trim=DEFAULT_TRAIN["weight_trim"], random_state=seed, n_jobs=jobs,
                  channels=DEFAULT_TRAIN["channels"])

    def report(r, found, counts):
        what = "first model" if r == 0 else f"after round {r}"
        added = "" if found.counted_only else f"; {len(found.patches)} false alarms added as background"
        echo(f"      training frames, {what}: {found.false_alarms_per_image:.2f} false alarms per "
             f"image, recall {found.recall:.3f}{added}")
        stop = mining_stop_line(r, found, counts, mine_rounds)
        if stop:
            echo(f"      {stop}")

    model, clf, _ = train_with_mining(
        bank, params, rounds=mine_rounds, images_dir=train_dir / "images", items=train_labels.items,
        settings=ScanSettings(), bank_path=bank_path, mine_params=mining_params(params),
        progress_factory=lambda d, n: progress_bar("      " + d, n, "trees" if d.startswith("growing") else "features" if d.startswith("feature") else "images"),
        report=report)
    model_path = out / "model.npz"
    save_model(model_path, model)
    for line in model.summary():
        echo(f"      {line}")
    echo(f"      -> {human_path(model_path)}")

    echo("[4/5] scanning the test frames")
    detections = out / "detections.csv"
    drawn = out / "drawn"
    with progress_bar("      scanning", None, "images") as update:
        run = scan_paths(model_path, [test_dir / "images"], detections,
                         settings=ScanSettings(threshold=0.05), jobs=jobs, force=True,
                         progress=update)
    per_frame = 1000.0 * run.seconds * max(jobs, 1) / max(run.images, 1)
    echo(f"      {run.images} frames, {run.detections} detections at score >= 0.05, "
         f"{run.mean_trees:.2f} trees per window, about {per_frame:.0f} ms of CPU per frame")

    echo("[5/5] scoring against the test labels")
    result = score_files(detections, test_dir / "labels.csv", out / "report",
                         images_dir=test_dir / "images", force=True)
    for warning in result.warnings:
        typer.echo(f"warning: {warning}", err=True)
    width = max(len(k) for k, _ in summary_table(result.summary))
    for key, value in summary_table(result.summary):
        echo(f"      {key:<{width}}  {value}")
    # the frames drawn at the recommended threshold: what a daily scan at it finds
    threshold = result.summary["operating_point"]["threshold"]
    found = {d.image: (d.boxes, d.scores) for d in read_detections(detections)}
    count = draw_folder(test_dir / "images", found, drawn, 0.05 if threshold is None else threshold)
    echo(f"      {count} annotated frames in {human_path(drawn)}, detections at score >= "
         f"{0.05 if threshold is None else threshold:g}")
    echo("")
    echo(f"demo finished in {time.perf_counter() - started:.0f} s")
    echo(f"report: {human_path(result.report)}")
