"""Training from a patch bank: the classifier fit plus what the model file must carry from the
bank (context margin, bank hash, patch counts)."""

from __future__ import annotations

import numpy as np

from detector import npzfile
from detector.classifier import PatchClassifier
from detector.errors import InputError
from detector.harvest import PatchBank


def train_model(bank: PatchBank, params: dict, bank_path=None, progress=None):
    """Fit a :class:`~detector.classifier.PatchClassifier` on a bank; return ``(model, classifier)``.

    The model's metadata gains the bank's context margin (the scan reports the box inside the
    window), its SHA-256, its harvest parameters and its patch counts.

    Raises
    ------
    InputError
        The bank lacks object or background patches (the message names ``bank_path``).
    """
    counts = bank.counts()
    if counts["objects"] == 0:
        raise InputError("the bank holds no object patches; training needs both object and "
                         "background patches", path=bank_path)
    if counts["background"] == 0:
        raise InputError("the bank holds no background patches; training needs both (harvest "
                         "again with --negatives-per-image or --near-negatives above 0)",
                         path=bank_path)
    clf = PatchClassifier(**params)
    clf.fit(bank.patches, bank.labels, progress=progress)
    model = clf.model_
    model.metadata["margin"] = float(bank.margin)
    model.metadata["bank"] = {
        "sha256": npzfile.file_sha256(bank_path) if bank_path is not None else None,
        "counts": bank.counts(),
        "harvest": {k: v for k, v in bank.metadata.items() if k != "counts"},
    }
    return model, clf


def bank_to_xy(bank: PatchBank):
    """Patches and labels of a bank as ``(X uint8 (N,h,w), y int64 (N,))``."""
    return bank.patches, bank.labels.astype(np.int64)


def train_with_mining(bank: PatchBank, params: dict, *, rounds: int = 0, images_dir=None,
                      items=None, settings=None, per_image: int = 20, per_round: int = 4000,
                      bank_path=None, progress_factory=None, report=None):
    """Train, then ``rounds`` times: scan the mining images, add the false alarms to the bank as
    background patches, and train again.

    Parameters
    ----------
    bank : PatchBank
    params : dict
        :class:`~detector.classifier.PatchClassifier` parameters.
    rounds : int
        Mining rounds (0 = plain training).
    images_dir, items :
        The mining images: folder and their labels (list of ImageLabels).
    settings : detector.scan.ScanSettings
        Scan settings for mining (their threshold is where recall and false alarms are counted).
    per_image, per_round : int
        Caps on new background patches per image and per round.
    progress_factory : callable(description, total) -> context manager yielding update(done, total)
    report : callable(round, MiningRound, bank_counts)
        Called after each scan of the mining images: round 0 is the first model, round ``rounds``
        the final one (whose false alarms are not added).

    Returns
    -------
    (model, classifier, bank)
        The final model, its classifier, and the bank with every mined patch.
    """
    from contextlib import nullcontext

    from detector.harvest import KIND_MINED
    from detector.mining import mine

    def bar(description, total):
        if progress_factory is None:
            return nullcontext(None)
        return progress_factory(description, total)

    history = []
    for r in range(rounds + 1):
        with bar(f"growing trees (round {r})" if rounds else "growing trees", params["n_trees"]) as up:
            model, clf = train_model(bank, params, bank_path=bank_path, progress=up)
        if rounds == 0:
            break
        with bar(f"mining round {r + 1}" if r < rounds else "checking final model", len(items)) as up:
            found = mine(model, images_dir, items, settings=settings, per_image=per_image,
                         per_round=per_round, progress=up)
        history.append({"round": r, "false_alarms_per_image": found.false_alarms_per_image,
                        "recall": found.recall, "added": 0 if r == rounds else len(found.patches)})
        if report is not None:
            report(r, found, bank.counts())
        if r == rounds:
            break
        if len(found.patches):
            bank = bank.extend(found.patches, found.boxes, np.arange(len(found.patches)),
                               KIND_MINED, images=found.images)
    if rounds:
        model.metadata["mining"] = history
    return model, clf, bank
