"""Write the demo scenario to disk: ``train/`` and ``test/``, each ``images/`` + ``labels.csv``.

Seeds: ``numpy.random.SeedSequence(seed)`` spawns one child per split (train, test); each split's
child spawns one sequence that picks the frames without nuts and one per frame. The same seed and
counts therefore give byte-identical files, and train and test never share a frame.
"""

from __future__ import annotations

import os
import re
from pathlib import Path

import cv2
import numpy as np

from detector.errors import InputError
from detector.io.files import write_bytes
from detector.io.labels import ImageLabels, write_labels_csv
from synthetic_images.render import FRAME_LIMITS, render_frame

EMPTY_SHARE = 0.15
"""Share of frames in each split that show no nuts (rounded to a whole count)."""

TEST_SHARE = 0.2
"""Share of ``--frames`` that goes to ``test/`` when only a total is given."""

SPLITS = ("train", "test")

_FRAME_NAME = re.compile(r"frame_\d+\.png")


def frame_name(index: int) -> str:
    """File name of the ``index``-th frame (1-based).

    Examples
    --------
    >>> frame_name(1)
    'frame_0001.png'
    """
    return f"frame_{index:04d}.png"


def split_counts(images: int) -> tuple[int, int]:
    """Split a total frame count into train and test counts, ``TEST_SHARE`` going to test.

    Examples
    --------
    >>> split_counts(200)
    (160, 40)
    >>> split_counts(2)
    (1, 1)
    """
    images = int(images)
    if images < 2:
        raise InputError(f"need at least 2 images (one for train, one for test), got {images}")
    test = min(images - 1, max(1, int(np.floor(TEST_SHARE * images + 0.5))))
    return images - test, test


def empty_count(frames: int) -> int:
    """Number of frames without nuts in a split of ``frames`` frames.

    Examples
    --------
    >>> empty_count(40), empty_count(160), empty_count(3)
    (6, 24, 0)
    """
    return int(np.floor(EMPTY_SHARE * frames + 0.5))


def _check_target(folder: Path, force: bool) -> None:
    if folder.exists() and not folder.is_dir():
        raise InputError("exists and is not a folder", path=folder)
    if folder.is_dir() and any(folder.iterdir()) and not force:
        raise InputError("folder is not empty; use --force to replace the demo frames in it", path=folder)
    images = folder / "images"
    if images.exists() and not images.is_dir():
        raise InputError("exists and is not a folder", path=images)
    labels = folder / "labels.csv"
    if labels.exists() and not labels.is_file():
        raise InputError("exists and is not a file", path=labels)


def _write_split(folder: Path, frames: int, seq: np.random.SeedSequence, size: tuple[int, int]) -> dict:
    width, height = size
    empty_seq, *frame_seqs = seq.spawn(frames + 1)
    empty = np.zeros(frames, dtype=bool)
    empty[np.random.default_rng(empty_seq).permutation(frames)[:empty_count(frames)]] = True
    images = folder / "images"
    images.mkdir(parents=True, exist_ok=True)
    items, written = [], set()
    nuts = hidden = 0
    for i in range(frames):
        frame = render_frame(np.random.default_rng(frame_seqs[i]), width, height, empty=bool(empty[i]))
        name = frame_name(i + 1)
        ok, png = cv2.imencode(".png", frame.image)
        if not ok:  # pragma: no cover - cv2 encodes any uint8 2-D array
            raise InputError("could not encode the frame as PNG", path=images / name)
        write_bytes(images / name, png.tobytes())
        written.add(name)
        items.append(ImageLabels(image=name, boxes=frame.boxes, classes=["nut"] * len(frame.boxes)))
        nuts += len(frame.boxes)
        hidden += len(frame.nuts) - len(frame.boxes)
    # frames of an earlier, longer run would otherwise sit unlabelled beside the new ones
    for old in images.iterdir():
        if _FRAME_NAME.fullmatch(old.name) and old.name not in written and old.is_file():
            old.unlink()
    labels = folder / "labels.csv"
    write_labels_csv(labels, items)
    return {
        "folder": str(folder),
        "images": str(images),
        "labels": str(labels),
        "frames": frames,
        "frames_without_nuts": sum(1 for it in items if len(it.boxes) == 0),
        "nuts": nuts,
        "hidden_nuts": hidden,
    }


def render_scenario(
    out_dir: str | os.PathLike,
    train_images: int = 160,
    test_images: int = 40,
    seed: int = 0,
    size: tuple[int, int] = (320, 240),
    force: bool = False,
) -> dict:
    """Render the demo scenario into ``out_dir/train`` and ``out_dir/test``.

    Each split gets ``images/frame_0001.png ...`` (uint8 grayscale PNG) and ``labels.csv`` in the
    labels CSV contract, class ``nut``; about ``EMPTY_SHARE`` of the frames show no nuts.

    Parameters
    ----------
    out_dir : str or os.PathLike
        Folder to write into; created when missing.
    train_images, test_images : int
        Frames per split (each at least 1).
    seed : int
        Non-negative seed; the same seed and counts give byte-identical files.
    size : tuple of int
        Frame ``(width, height)`` in pixels, each side within ``FRAME_LIMITS``.
    force : bool
        Write into split folders that already hold files, replacing earlier ``frame_*.png`` files
        and ``labels.csv``; other files there are left alone.

    Returns
    -------
    dict
        ``out_dir``, ``seed``, ``size`` and per split (``"train"``, ``"test"``): ``folder``,
        ``images``, ``labels`` (paths), ``frames``, ``frames_without_nuts``, ``nuts`` (labelled),
        ``hidden_nuts`` (drawn but more than half hidden, so not labelled).

    Raises
    ------
    detector.errors.InputError
        Bad counts, seed or size, a non-empty split folder without ``force``, or a path that
        cannot be written.

    Examples
    --------
    >>> import tempfile
    >>> summary = render_scenario(tempfile.mkdtemp(), train_images=2, test_images=1, seed=3)
    >>> summary["train"]["frames"], summary["test"]["frames"]
    (2, 1)
    """
    for name, count in (("train_images", train_images), ("test_images", test_images)):
        if int(count) != count or count < 1:
            raise InputError(f"{name} must be a whole number >= 1, got {count}")
    if int(seed) != seed or seed < 0:
        raise InputError(f"seed must be a whole number >= 0, got {seed}")
    width, height = (int(v) for v in size)
    lo, hi = FRAME_LIMITS
    if not (lo <= width <= hi and lo <= height <= hi):
        raise InputError(f"frame size {width}x{height} must be {lo} to {hi} pixels per side")
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InputError("exists and is not a folder", path=out)
    for split in SPLITS:
        _check_target(out / split, force)
    seqs = np.random.SeedSequence(int(seed)).spawn(len(SPLITS))
    summary = {"out_dir": str(out), "seed": int(seed), "size": (width, height)}
    try:
        for split, frames, seq in zip(SPLITS, (int(train_images), int(test_images)), seqs):
            summary[split] = _write_split(out / split, frames, seq, (width, height))
    except OSError as err:
        where = err.filename if err.filename is not None else out
        raise InputError(f"cannot write: {err.strerror or err}", path=where) from None
    return summary
