"""`patchwood audit IMAGES_DIR LABELS` (or `--bank BANK.npz`): labels a bagged forest finds
suspicious by their out-of-bag scores, as a CSV and an offline HTML gallery."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from cli.common import quiet_option, jobs_option, echo, given, human_path, parse_window_option, progress_bar, usage_error
from detector.reporting.audit import (BACKGROUND_CALLED_OBJECT, DEFAULT_PARAMS, OBJECT_CALLED_BACKGROUND,
                            audit_bank, check_audit_folder, harvest_for_audit, write_audit)
from detector.harvest import load_bank
from detector.io.labels import read_labels

#: Findings printed on the terminal (the CSV and the page hold all listed ones).
PRINTED = 10


def _count(n: int, noun: str) -> str:
    return f"{n} {noun}" + ("" if n == 1 else "s")


def _table(listed) -> list[str]:
    rows = [("rank", "kind", "score", "image", "x", "y", "width", "height")]
    for rank, f in enumerate(listed[:PRINTED], 1):
        rows.append((str(rank), f.kind, f"{f.score:.3f}", f.image,
                     *(f"{round(v, 1):g}" for v in f.box)))
    widths = [max(len(r[c]) for r in rows) for c in range(len(rows[0]))]
    left = {1, 3}
    return ["  " + "  ".join(cell.ljust(w) if c in left else cell.rjust(w)
                             for c, (cell, w) in enumerate(zip(r, widths))).rstrip()
            for r in rows]


def audit(
    ctx: typer.Context,
    images_dir: Optional[Path] = typer.Argument(
        None, help="Folder the labels' image paths are relative to (with --bank: optional, for "
                   "thumbnails in the whole image)."),
    labels: Optional[Path] = typer.Argument(
        None, help="Labels CSV (image,x,y,width,height[,label]) or COCO JSON."),
    bank: Optional[Path] = typer.Option(
        None, "--bank", help="Audit this patch bank instead of harvesting one (augmented copies "
                             "are set aside)."),
    out: Path = typer.Option(Path("audit"), "--out", help="Folder for the CSV, the page and the "
                                                          "thumbnails; created if missing."),
    top: int = typer.Option(50, "--top", min=1, help="Most findings listed."),
    min_suspicion: float = typer.Option(
        0.5, "--min-suspicion", min=0.0, max=1.0,
        help="List only findings whose suspicion (1 - score for objects, the score for "
             "background) is above this; 0.5 lists every patch the forest's verdict contradicts."),
    trees: int = typer.Option(DEFAULT_PARAMS["n_trees"], "--trees", min=1, max=10000,
                              help="Number of trees (more trees score every patch more often)."),
    depth: int = typer.Option(DEFAULT_PARAMS["depth"], "--depth", min=1, max=8,
                              help="Depth of every tree."),
    pool: int = typer.Option(DEFAULT_PARAMS["pool"], "--pool", min=1,
                             help="Size of the random feature pool."),
    features_per_node: Optional[int] = typer.Option(
        None, "--features-per-node", min=1, help="Pool features tried at every node. Default: "
                                                 "the square root of the pool."),
    seed: int = typer.Option(0, "--seed", min=0, help="Random seed (harvest and forest)."),
    label: Optional[str] = typer.Option(None, "--label", help="Audit only boxes of this class."),
    window: Optional[str] = typer.Option(None, "--window", help="Patch size WxH. Default: as "
                                                                "`harvest` infers it from the boxes."),
    negatives_per_image: int = typer.Option(
        50, "--negatives-per-image", min=0,
        help="Background windows drawn from each image; more of them give an unlabelled object "
             "more chances to show up."),
    jobs: int = jobs_option(),
    quiet: bool = quiet_option(),
    force: bool = typer.Option(False, "--force", help="Replace the files of an earlier audit in "
                                                      "the folder."),
) -> None:
    """List the labels a bagged forest finds suspicious: labelled objects it calls background and
    background windows it calls object, each judged only by the trees that did not train on it
    (out-of-bag scores). Writes suspicious-labels.csv and audit.html with thumbnails."""
    negatives_given = given(ctx, "negatives_per_image")
    if bank is None:
        if images_dir is None or labels is None:
            raise typer.BadParameter("give IMAGES_DIR and LABELS, or --bank BANK.npz")
    else:
        if labels is not None:
            raise typer.BadParameter("give IMAGES_DIR and LABELS, or --bank BANK.npz (with "
                                     "IMAGES_DIR only for thumbnails), not both")
        shaping = [name for name, value in (("--label", label), ("--window", window))
                   if value is not None] + (["--negatives-per-image"] if negatives_given else [])
        if shaping:
            raise typer.BadParameter(f"{', '.join(shaping)} shape a new harvest; a --bank is "
                                     "already harvested")
    if features_per_node is not None and features_per_node > pool:
        usage_error(f"--features-per-node {features_per_node} is larger than --pool {pool}: a "
                    "node cannot try more features than the pool holds")
    size = parse_window_option(window)
    check_audit_folder(out, force)

    if bank is None:
        lf = read_labels(labels, images_dir=images_dir, label=label)
        n_boxes = sum(len(it.boxes) for it in lf)
        echo(f"labels: {len(lf)} images, {n_boxes} boxes from {human_path(labels)}")
        with progress_bar("harvesting", len(lf), "images") as update:
            patches = harvest_for_audit(
                images_dir, lf.items, window=size,
                negatives_per_image=negatives_per_image,
                seed=seed, labels_path=labels, progress=update)
        inputs = {"labels": human_path(labels), "images": human_path(images_dir)}
    else:
        patches = load_bank(bank)
        inputs = {"bank": human_path(bank),
                  "images": None if images_dir is None else human_path(images_dir)}
    c = patches.counts()
    W, H = patches.window
    echo(f"patches: {c['object']} object and {c['background'] + c['mined']} background of "
         f"{W}x{H}" + (f" ({c['augmented']} augmented copies set aside: copies of one box would "
                       "vouch for each other out of bag)" if c["augmented"] else ""))

    params = dict(n_trees=trees, depth=depth, pool=pool, features_per_node=features_per_node,
                  random_state=seed, n_jobs=jobs)
    with progress_bar("growing trees", trees, "trees") as update:
        result = audit_bank(patches, params, progress=update)
    objects_wrong = sum(1 for f in result if f.kind == OBJECT_CALLED_BACKGROUND and f.suspicion > 0.5)
    background_wrong = sum(1 for f in result if f.kind == BACKGROUND_CALLED_OBJECT and f.suspicion > 0.5)
    oob = "n/a" if result.oob_error is None else f"{100 * result.oob_error:.1f}%"
    echo(f"out-of-bag error {oob} over {len(result)} scored patches: "
         f"{_count(objects_wrong, 'labelled object')} called background, "
         f"{_count(background_wrong, 'background window')} called object")
    missing = result.not_scored
    if missing["objects"] or missing["background"]:
        echo(f"not scored: {missing['objects']} object and {missing['background']} background "
             "patches were in every tree's bootstrap sample (more --trees scores them)")

    listed = result.suspicious(top=top, min_suspicion=min_suspicion)
    with progress_bar("thumbnails", len(listed), "thumbnails") as update:
        written = write_audit(out, result, patches, top=top, min_suspicion=min_suspicion,
                              images_dir=images_dir, inputs=inputs, force=force, progress=update)
    if listed:
        shown = f"top {min(PRINTED, len(listed))} of {len(listed)} listed" if len(listed) > PRINTED else f"{len(listed)} listed"
        echo(f"most suspicious ({shown}, suspicion above {min_suspicion:g}):")
        for line in _table(listed):
            echo(line)
    else:
        echo(f"no finding above suspicion {min_suspicion:g}: the forest backs every label")
    for note in written["notes"]:
        echo(f"note: {note}")
    echo(f"wrote {human_path(written['csv'])} ({len(listed)} findings)")
    echo(f"wrote {human_path(written['html'])}")
