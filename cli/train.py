"""`patchwood train BANK.npz --out MODEL.npz`."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Literal, Optional

import typer

from cli.common import (quiet_option, jobs_option, channels_option, check_channels_option, check_not_an_input,
                        check_output_file, echo, given, human_path, mining_stop_line,
                        progress_bar, usage_error)
from detector.cascade import EXIT_BUDGET
from detector.harvest import load_bank, save_bank
from detector.io.labels import read_labels
from detector.model import save_model
from detector.scan import ScanSettings
from detector.training import (DEFAULT_MINE_ROUNDS, DEFAULT_TRAIN, MINING_STOP_SHARE,
                               default_features_per_node, mining_params, mining_source,
                               train_with_mining)


#: Options that only shape hard-negative mining (parameter name -> option).
MINING_OPTIONS = {"mine_images": "--mine-images", "mine_labels": "--mine-labels",
                  "mine_per_image": "--mine-per-image", "mine_per_round": "--mine-per-round",
                  "mine_overhang": "--mine-overhang", "mine_threshold": "--mine-threshold"}


def train(
    ctx: typer.Context,
    bank: Path = typer.Argument(..., help="Patch bank from `patchwood harvest`."),
    out: Path = typer.Option(..., "--out", help="Model file to write (.npz)."),
    trees: int = typer.Option(DEFAULT_TRAIN["trees"], "--trees", min=1, max=10000, help="Number of trees."),
    depth: int = typer.Option(DEFAULT_TRAIN["depth"], "--depth", min=1, max=8, help="Depth of every tree."),
    mode: Literal["boosted", "bagged"] = typer.Option(DEFAULT_TRAIN["mode"], "--mode", help="boosted (Gentle AdaBoost; the default: the stronger of the two on the cross-data benchmark) or bagged (random forest, with an out-of-bag error)."),
    pool: int = typer.Option(DEFAULT_TRAIN["pool"], "--pool", min=1, help="Size of the random feature pool drawn from every rectangle-difference feature of the window."),
    features_per_node: Optional[int] = typer.Option(None, "--features-per-node", min=1, help=f"Pool features tried at every node. Default: {DEFAULT_TRAIN['features_per_node']}, or the whole pool when it is smaller (the models that only mine try the square root of their pool)."),
    sample_fraction: float = typer.Option(DEFAULT_TRAIN["sample_fraction"], "--sample-fraction", min=0.01, max=1.0, help="Bootstrap sample size (bagged) or per-stage subsample (boosted), as a fraction of the patches."),
    weight_trim: float = typer.Option(DEFAULT_TRAIN["weight_trim"], "--weight-trim", min=0.0, max=0.5, help="Boosted: every tree grows without the lightest patches that together hold at most this share of the weight (weight trimming); they are still reweighted and come back when they become hard."),
    exit_budget: float = typer.Option(EXIT_BUDGET, "--exit-budget", min=0.0, max=0.5, help="Share of the held-out object patches that the contrast gate and all the early exits together may give up: a larger budget lets background leave after fewer trees."),
    exit_recall: Optional[float] = typer.Option(None, "--exit-recall", hidden=True),
    channels: Literal["gradient", "grey"] = channels_option(),
    normalize: bool = typer.Option(True, "--normalize/--no-normalize", help="Contrast-normalise every patch (and every scanned window)."),
    seed: int = typer.Option(0, "--seed", min=0, help="Random seed; the same seed and bank give a byte-identical model."),
    jobs: int = jobs_option(),
    mine_rounds: int = typer.Option(DEFAULT_MINE_ROUNDS, "--mine-rounds", min=0, max=10, help=f"Hard-negative mining rounds at most: scan the mining images, add the false alarms as background, train again (the models before the last grow a quarter of the trees); mining stops early after a round whose false alarms add less than {100 * MINING_STOP_SHARE:g} % to the background patches. Without --mine-images, the images the bank came from; none when the bank does not record them and this option is not given."),
    mine_images: Optional[Path] = typer.Option(None, "--mine-images", help="Folder of labelled images to mine false alarms from. Default: the images the bank was harvested from."),
    mine_labels: Optional[Path] = typer.Option(None, "--mine-labels", help="Labels of --mine-images (CSV or COCO JSON); objects there are never mined. Default: the labels the bank was harvested from."),
    mine_per_image: int = typer.Option(20, "--mine-per-image", min=1, help="Most new background patches from one image per round."),
    mine_per_round: int = typer.Option(4000, "--mine-per-round", min=1, help="Most new background patches per round (the highest-scoring are kept)."),
    mine_threshold: float = typer.Option(0.5, "--mine-threshold", min=0.0, max=1.0, help="Score at which mining counts recall and false alarms (a detection at or above it that matches no label is a false alarm to add)."),
    mine_overhang: float = typer.Option(0.25, "--mine-overhang", min=0.0, max=0.5, help="How far the mining scan's windows may reach past the image's edges (as `patchwood scan --overhang`; mine at least as far as you will scan)."),
    save_bank_to: Optional[Path] = typer.Option(None, "--save-bank", help="Also write the bank with the mined patches added."),
    quiet: bool = quiet_option(),
    force: bool = typer.Option(False, "--force", help="Replace existing output files."),
) -> None:
    """Grow a forest of shallow trees on the bank's patches and write the model file."""
    if mode not in ("bagged", "boosted"):
        raise typer.BadParameter(f"--mode must be bagged or boosted, got {mode!r}")
    check_channels_option(channels)
    if exit_recall is not None:
        usage_error(f"--exit-recall is now --exit-budget, the share of held-out objects all the "
                    f"exits together may give up: --exit-recall {exit_recall:g} is "
                    f"--exit-budget {round(1.0 - exit_recall, 6):g}")
    if (mine_images is None) != (mine_labels is None):
        raise typer.BadParameter("--mine-images and --mine-labels go together")
    unused = [option for name, option in MINING_OPTIONS.items() if given(ctx, name)]
    if unused and mine_rounds == 0:
        usage_error(f"{', '.join(unused)} only shape{'s' if len(unused) == 1 else ''} mining "
                    "rounds; leave out --mine-rounds 0 (mining is on by default) or "
                    f"{'it' if len(unused) == 1 else 'them'}")
    if mode == "bagged" and weight_trim > 0:
        usage_error(f"--weight-trim {weight_trim:g} trims boosting weights; bagged trees have none "
                    "(leave it out or use --mode boosted)")
    if features_per_node is not None and features_per_node > pool:
        usage_error(f"--features-per-node {features_per_node} is larger than --pool {pool}: a "
                    "node cannot try more features than the pool holds")
    if save_bank_to is not None and os.path.abspath(save_bank_to) == os.path.abspath(out):
        raise typer.BadParameter("--save-bank names the same file as --out")
    if features_per_node is None:
        features_per_node = default_features_per_node(pool)
    b = load_bank(bank)
    if mine_images is None and mine_rounds != 0:
        mine_images, mine_labels = mining_source(b, bank)
        if mine_images is None:
            if given(ctx, "mine_rounds"):
                raise typer.BadParameter("--mine-rounds needs --mine-images and --mine-labels "
                                         "(this bank does not record the images it came from)")
            echo("note: no mining (the bank does not record the images it came from; give "
                 "--mine-images and --mine-labels)")
            mine_rounds = 0
    inputs = [bank, mine_labels]
    check_output_file(out, force, "model", inputs=inputs)
    if save_bank_to is not None:
        check_output_file(save_bank_to, force, "patch bank", inputs=inputs + [out])
    items = None
    if mine_rounds:
        items = read_labels(mine_labels, images_dir=mine_images).items
        for target, what in ((out, "model"), (save_bank_to, "patch bank")):
            if target is not None:
                check_not_an_input(target, [Path(mine_images) / it.image for it in items], what)
    c = b.counts()
    echo(f"bank: {human_path(bank)}: {c['objects']} object and {c['background']} background patches "
         f"of {b.window[0]}x{b.window[1]}")
    params = dict(n_trees=trees, depth=depth, mode=mode, pool=pool,
                  features_per_node=features_per_node, sample_fraction=sample_fraction,
                  weight_trim=weight_trim, exit_budget=exit_budget, normalize=normalize, random_state=seed,
                  n_jobs=jobs, channels=channels)

    def report(r, found, counts):
        what = "first model" if r == 0 else f"after round {r}"
        added = "" if found.counted_only else f"; adding {len(found.patches)} false alarms as background"
        echo(f"mining images, {what}: {found.false_alarms_per_image:.2f} false alarms per image, "
             f"recall {found.recall:.3f} at score {mine_threshold:g}{added}")
        stop = mining_stop_line(r, found, counts, mine_rounds)
        if stop:
            echo(stop)

    model, clf, final_bank = train_with_mining(
        b, params, rounds=mine_rounds, images_dir=mine_images, items=items,
        settings=ScanSettings(threshold=mine_threshold, overhang=mine_overhang), per_image=mine_per_image,
        per_round=mine_per_round, bank_path=bank, mine_params=mining_params(params),
        progress_factory=lambda d, n: progress_bar(d, n, "trees" if d.startswith("growing") else "features" if d.startswith("feature") else "images"),
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
