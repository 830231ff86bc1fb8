"""`patchwood inspect MODEL.npz`: the model's summary, and two pictures of where its features look."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Optional

import typer

from cli.common import echo, human_path
from detector.errors import InputError
from detector.reporting.inspection import (
    display_scale,
    importance_heat_map,
    mean_object_patch,
    model_importances,
    model_report,
    render_heat_map,
    render_top_features,
    report_lines,
    top_features,
    write_png,
)
from detector.model import load_model, old_format_note

#: The pictures written into the output folder.
HEAT_MAP_FILE = "heat-map.png"
TOP_FEATURES_FILE = "top-features.png"


def default_output_folder(model_path: Path) -> Path:
    """``<model stem>_inspect/`` beside the model file."""
    model_path = Path(model_path)
    return model_path.with_name(f"{model_path.stem}_inspect")


def _prepare_folder(folder: Path, force: bool) -> list[Path]:
    """Create the output folder if needed; refuse to replace the pictures without ``force``."""
    if folder.exists() and not folder.is_dir():
        raise InputError("the output folder is a file", path=folder)
    outputs = [folder / HEAT_MAP_FILE, folder / TOP_FEATURES_FILE]
    for path in outputs:
        if path.is_dir():
            raise InputError("picture to write is a folder", path=path)
        if path.exists() and not force:
            raise InputError("picture exists; add --force to replace it", path=path)
    if not folder.exists():
        parent = folder.parent if str(folder.parent) else Path(".")
        if not parent.is_dir():
            raise InputError("folder for the output folder does not exist", path=parent)
        try:
            folder.mkdir()
        except OSError as exc:
            raise InputError(f"cannot create the output folder ({exc.strerror or exc})", path=folder) from None
    return outputs


def inspect(
    model: Path = typer.Argument(..., help="Model file from `patchwood train`."),
    out: Optional[Path] = typer.Option(
        None, "--out",
        help="Folder for heat-map.png and top-features.png [default: <model stem>_inspect/ beside "
             "the model]; created if missing."),
    bank: Optional[Path] = typer.Option(
        None, "--bank",
        help="Patch bank whose mean object patch the features are drawn over (without it: a "
             "neutral grey window)."),
    top: int = typer.Option(12, "--top-features", min=1, max=48, help="How many of the most important "
                            "features to list and draw."),
    as_json: bool = typer.Option(False, "--json", help="Print the summary as JSON (for scripts)."),
    force: bool = typer.Option(False, "--force", help="Replace existing pictures."),
) -> None:
    """Summarise a model (window, mode, trees, features, early exit, training record) and draw
    where its features look: an importance heat map over the window and its most important
    features over the mean object patch."""
    m = load_model(model)
    note = old_format_note(m, human_path(model))
    if note:
        typer.echo(note, err=True)
    mean_patch = None
    bank_note = None
    if bank is not None:
        from detector.harvest import load_bank

        b = load_bank(bank)
        if tuple(b.window) != tuple(m.window):
            raise InputError(f"the bank's window {b.window[0]}x{b.window[1]} is not the model's "
                             f"{m.window[0]}x{m.window[1]}", path=bank)
        if not (b.labels == 1).any():
            raise InputError("the bank holds no object patches to average", path=bank)
        mean_patch = mean_object_patch(b.patches, b.labels)
        n_objects = int((b.labels == 1).sum())
        bank_note = (f"over the mean of {n_objects} object patches of {human_path(bank)} "
                     "(contrast stretched)")
    folder = Path(out) if out is not None else default_output_folder(model)
    heat_path, top_path = _prepare_folder(folder, force)

    report = model_report(m, top=top)
    importances, source = model_importances(m)
    heat = importance_heat_map(m.features, importances, m.window)
    scale = display_scale(m.window)
    w, h = m.window
    subtitle = (f"{w}x{h} window shown {scale}x; {len(m.features)} features of {m.n_trees} trees\n"
                "each rectangle spreads |weight| x importance over its pixels\n"
                f"importance: {source}")
    write_png(heat_path, render_heat_map(heat, scale=scale, patch=mean_patch, subtitle=subtitle,
                                         unit="importance per pixel"))
    ranked = top_features(m, top)
    if bank_note is None:
        bank_note = ("over a neutral grey window: no patch bank given\n"
                     "(--bank BANK.npz draws them over the mean object patch)")
    write_png(top_path, render_top_features(
        m.features, importances, ranked, m.window, background=mean_patch, scale=scale,
        title=(f"The {len(ranked)} most important features of {human_path(model)}" if len(ranked)
               else f"No feature of {human_path(model)} has an importance above 0"),
        note=bank_note))

    pictures = {"heat_map": str(heat_path), "top_features": str(top_path),
                "background": "mean object patch" if mean_patch is not None else "neutral grey"}
    if as_json:
        report = {"model": str(model), **report, "pictures": pictures}
        if bank is not None:
            report["pictures"]["bank"] = str(bank)
        echo(json.dumps(report, indent=2, sort_keys=False, allow_nan=False, default=str))
        return
    echo(f"model: {human_path(model)}")
    for line in report_lines(report):
        echo(line)
    echo(f"wrote {human_path(heat_path)}")
    echo(f"wrote {human_path(top_path)}" + ("" if mean_patch is not None
                                             else " (over a neutral grey window: no --bank given)"))
