"""`patchwood demo [--out DIR]`: the whole workflow on the built-in hex-nut scenario."""

from __future__ import annotations

from pathlib import Path

import typer

from synthetic_images import render_scenario


def demo(
    out: Path = typer.Option(Path("demo_output"), "--out", help="Folder for everything the demo writes."),
    seed: int = typer.Option(0, "--seed", min=0, help="Seed for the scenario and for training."),
    force: bool = typer.Option(False, "--force", help="Reuse an existing demo folder, replacing what the demo wrote there."),
) -> None:
    """Run the workflow on the demo scenario (hex nuts on a conveyor belt): render the frames and
    print what was written."""
    typer.echo(f"[1] rendering the demo scenario into {out}")
    summary = render_scenario(out / "scenario", seed=seed, force=force)
    for split in ("train", "test"):
        s = summary[split]
        typer.echo(f"    {split:5s} {s['frames']} frames ({s['frames_without_nuts']} without nuts), "
                   f"{s['nuts']} nuts labelled -> {s['labels']}")
