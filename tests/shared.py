"""Helpers several test modules share (not a test module itself: pytest collects ``test_*.py``)."""

from __future__ import annotations

from html.parser import HTMLParser
from pathlib import Path

import numpy as np

from detector.harvest import harvest
from detector.io.labels import read_labels
from detector.model import save_model
from detector.training import train_model
from synthetic_images import render_scenario


class Links(HTMLParser):
    """Every ``src`` and ``href`` of an HTML page, in order (to check a report's links resolve)."""

    def __init__(self):
        super().__init__()
        self.links = []

    def handle_starttag(self, tag, attrs):
        self.links += [v for k, v in attrs if k in ("src", "href") and v is not None]


def small_model(root: Path, *, train_images: int, test_images: int, seed: int,
                negatives_per_image: int, n_trees: int, pool: int) -> Path:
    """Render a small scenario into ``root``, harvest its training split (24 x 24 window, seed 0),
    train a bagged model and save it as ``root / "model.npz"``; returns that path."""
    render_scenario(root, train_images=train_images, test_images=test_images, seed=seed)
    items = list(read_labels(root / "train" / "labels.csv", root / "train" / "images"))
    bank = harvest(root / "train" / "images", items, window=(24, 24),
                   negatives_per_image=negatives_per_image, seed=0)
    model, _ = train_model(bank, dict(n_trees=n_trees, pool=pool, random_state=0))
    save_model(root / "model.npz", model)
    return root / "model.npz"


def top_bright(seed, n_objects, n_background, spread, lift):
    """12 x 12 object patches whose top half is ``lift`` brighter than noise of ``spread`` grey
    levels, and plain noise patches as background: (patches, labels)."""
    rng = np.random.default_rng(seed)
    bright = rng.integers(0, spread, (n_objects, 12, 12))
    bright[:, :6] += lift
    dull = rng.integers(0, 210, (n_background, 12, 12))
    return (np.concatenate([bright, dull]).astype(np.uint8),
            np.r_[np.ones(n_objects), np.zeros(n_background)])


def calibration_copies(clf, patches, random_state=0):
    """The early-exit calibration copies a fitted PatchClassifier made (as its ``fit`` draws them
    from its seed, with the default shift 1 and scale 1.1)."""
    from detector.cascade import misaligned_copies
    from detector._validation import seed_sequence

    exit_ss = seed_sequence(random_state).spawn(5)[4]
    return misaligned_copies(patches[clf.calibration_indices_], 1.0, 1.1, random_state=exit_ss)
