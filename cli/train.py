"""`patchwood train BANK.npz --out MODEL.npz`."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Optional

import typer

from cli.common import check_not_an_input, check_output_file, echo, human_path, progress_bar
from detector.harvest import load_bank, save_bank
from detector.labels import read_labels
from detector.model import save_model
from detector.scan import ScanSettings
from detector.training import train_with_mining


def train(
    bank: Path = typer.Argument(..., help="Patch bank from `patchwood harvest`."),
    out: Path = typer.Option(..., "--out", help="Model file to write (.npz)."),
    trees: int = typer.Option(200, "--trees", min=1, max=10000, help="Number of trees."),
    depth: int = typer.Option(2, "--depth", min=1, max=8, help="Depth of every tree."),
    mode: str = typer.Option("bagged", "--mode", help="bagged (random forest) or boosted (Gentle AdaBoost)."),
    pool: int = typer.Option(20000, "--pool", min=1, help="Size of the random feature pool drawn from every rectangle-difference feature of the window."),
    features_per_node: Optional[int] = typer.Option(None, "--features-per-node", min=1, help="Pool features tried at every node. Default: the square root of the pool."),
    sample_fraction: float = typer.Option(1.0, "--sample-fraction", min=0.01, max=1.0, help="Bootstrap sample size (bagged) or per-stage subsample (boosted), as a fraction of the patches."),
    exit_recall: float = typer.Option(0.995, "--exit-recall", min=0.5, max=1.0, help="Share of held-out object patches that must survive every early exit."),
    normalize: bool = typer.Option(True, "--normalize/--no-normalize", help="Contrast-normalise every patch (and every scanned window)."),
    seed: int = typer.Option(0, "--seed", min=0, help="Random seed; the same seed and bank give a byte-identical model."),
    jobs: int = typer.Option(1, "--jobs", min=1, help="Threads growing trees (the model does not depend on it)."),
    mine_rounds: int = typer.Option(0, "--mine-rounds", min=0, max=10, help="Hard-negative mining rounds: scan --mine-images, add the false alarms as background, train again."),
    mine_images: Optional[Path] = typer.Option(None, "--mine-images", help="Folder of labelled images to mine false alarms from."),
    mine_labels: Optional[Path] = typer.Option(None, "--mine-labels", help="Labels of --mine-images (CSV or COCO JSON); objects there are never mined."),
    mine_per_image: int = typer.Option(20, "--mine-per-image", min=1, help="Most new background patches from one image per round."),
    mine_per_round: int = typer.Option(4000, "--mine-per-round", min=1, help="Most new background patches per round (the highest-scoring are kept)."),
    threshold: float = typer.Option(0.5, "--threshold", min=0.0, max=1.0, help="Score at which mining counts recall and false alarms."),
    mine_overhang: float = typer.Option(0.25, "--mine-overhang", min=0.0, max=0.5, help="How far the mining scan's windows may reach past the image's edges (as `patchwood scan --overhang`; mine at least as far as you will scan)."),
    save_bank_to: Optional[Path] = typer.Option(None, "--save-bank", help="Also write the bank with the mined patches added."),
    force: bool = typer.Option(False, "--force", help="Replace existing output files."),
) -> None:
    """Grow a forest of shallow trees on the bank's patches and write the model file."""
    if mode not in ("bagged", "boosted"):
        raise typer.BadParameter(f"--mode must be bagged or boosted, got {mode!r}")
    if mine_rounds and (mine_images is None or mine_labels is None):
        raise typer.BadParameter("--mine-rounds needs --mine-images and --mine-labels")
    if save_bank_to is not None and os.path.abspath(save_bank_to) == os.path.abspath(out):
        raise typer.BadParameter("--save-bank names the same file as --out")
    inputs = [bank, mine_labels]
    check_output_file(out, force, "model", inputs=inputs)
    if save_bank_to is not None:
        check_output_file(save_bank_to, force, "patch bank", inputs=inputs + [out])
    items = None
    if mine_rounds:
        items = read_labels(mine_labels, images_dir=mine_images).items
        for target, what in ((out, "model"), (save_bank_to, "patch bank")):
            if target is not None:
                check_not_an_input(target, [mine_images / it.image for it in items], what)
    b = load_bank(bank)
    c = b.counts()
    echo(f"bank: {human_path(bank)}: {c['objects']} object and {c['background']} background patches "
         f"of {b.window[0]}x{b.window[1]}")
    params = dict(n_trees=trees, depth=depth, mode=mode, pool=pool,
                  features_per_node=features_per_node, sample_fraction=sample_fraction,
                  exit_recall=exit_recall, normalize=normalize, random_state=seed,
                  n_jobs=jobs)

    def report(r, found, counts):
        what = "first model" if r == 0 else f"after round {r}"
        added = "" if r == mine_rounds else f"; adding {len(found.patches)} false alarms as background"
        echo(f"mining images, {what}: {found.false_alarms_per_image:.2f} false alarms per image, "
             f"recall {found.recall:.3f} at score {threshold:g}{added}")

    model, clf, final_bank = train_with_mining(
        b, params, rounds=mine_rounds, images_dir=mine_images, items=items,
        settings=ScanSettings(threshold=threshold, overhang=mine_overhang), per_image=mine_per_image,
        per_round=mine_per_round, bank_path=bank,
        progress_factory=lambda d, n: progress_bar(d, n, "trees" if d.startswith("growing") else "images"),
        report=report)
    save_model(out, model)
    if save_bank_to is not None:
        save_bank(save_bank_to, final_bank)
        echo(f"wrote {human_path(save_bank_to)}")
    for line in model.summary():
        echo(line)
    t = clf.timings_
    echo(f"time: {t['evaluate_seconds']:.1f} s feature values, {t['grow_seconds']:.1f} s growing, "
         f"{t['calibrate_seconds']:.1f} s early-exit calibration")
    echo(f"wrote {human_path(out)}")
