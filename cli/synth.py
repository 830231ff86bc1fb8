"""`patchwood synth OUT_DIR`: render the demo scenario (hex nuts on a conveyor belt)."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Optional

import typer

from cli.common import given, usage_error
from synthetic_images import FRAME_LIMITS, render_scenario, split_counts

_SIZE = re.compile(r"\s*(\d+)\s*[xX]\s*(\d+)\s*")


def parse_size(text: str) -> tuple[int, int]:
    """Read ``WIDTHxHEIGHT`` (e.g. ``640x480``); a bad value is a usage error (exit status 2)."""
    m = _SIZE.fullmatch(text or "")
    lo, hi = FRAME_LIMITS
    if m is None:
        raise typer.BadParameter(f"expected WIDTHxHEIGHT such as 320x240 or 640x480, got {text!r}")
    width, height = int(m.group(1)), int(m.group(2))
    if not (lo <= width <= hi and lo <= height <= hi):
        raise typer.BadParameter(f"each side must be {lo} to {hi} pixels, got {text!r}")
    return width, height


def _check_size(text: str) -> str:
    parse_size(text)
    return text


def _count(n: int, word: str) -> str:
    return f"{n} {word}" + ("" if n == 1 else "s")


def synth(
    ctx: typer.Context,
    out_dir: Path = typer.Argument(
        ..., help="Folder to write train/ and test/ into (each: images/ + labels.csv); created if missing."
    ),
    frames: int = typer.Option(
        200, "--frames", min=2, max=5000, help="Total frames, split 80/20: 200 gives 160 in train/ and 40 in test/."
    ),
    train_frames: Optional[int] = typer.Option(
        None, "--train-frames", min=1, help="Frames in train/, overriding its 80% share of --frames."
    ),
    test_frames: Optional[int] = typer.Option(
        None, "--test-frames", min=1, help="Frames in test/, overriding its 20% share of --frames."
    ),
    seed: int = typer.Option(
        0, "--seed", min=0, help="Random seed; the same seed, counts and size give identical files."
    ),
    size: str = typer.Option(
        "320x240", "--size", callback=_check_size, help="Frame size WIDTHxHEIGHT, e.g. 320x240 or 640x480."
    ),
    force: bool = typer.Option(
        False, "--force", help="Write into train/ and test/ even if they hold files (earlier frames are replaced)."
    ),
) -> None:
    """Render the demo scenario: hex nuts among washers, square nuts, screw heads and debris on a
    conveyor belt, 15% of frames without nuts, nuts 20-120 px. Nuts more than half hidden under a
    guard rail or past the frame edge are drawn but not labelled."""
    if given(ctx, "frames") and train_frames is not None and test_frames is not None:
        usage_error("--frames is split into train/ and test/, but --train-frames and "
                    "--test-frames set both counts; give --frames or the two counts")
    width, height = parse_size(size)
    train_default, test_default = split_counts(frames)
    train_n = train_default if train_frames is None else train_frames
    test_n = test_default if test_frames is None else test_frames
    summary = render_scenario(out_dir, train_n, test_n, seed=seed, size=(width, height), force=force)
    typer.echo(f"demo scenario in {summary['out_dir']}  (seed {seed}, {width}x{height})")
    for split in ("train", "test"):
        s = summary[split]
        typer.echo(
            f"  {split:5s} {_count(s['frames'], 'frame')} ({s['frames_without_nuts']} without nuts), "
            f"{_count(s['nuts'], 'nut')} labelled, {s['hidden_nuts']} more drawn but hidden over half"
        )
        typer.echo(f"        images {s['images']}")
        typer.echo(f"        labels {s['labels']}")
