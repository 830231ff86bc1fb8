"""Training from a patch bank: the classifier fit plus what the model file must carry from the
bank (context margin, bank hash, patch counts)."""

from __future__ import annotations

import numpy as np

from detector.io import npzfile
from detector.patch_forest import PatchForest
from detector.errors import InputError
from detector.harvest import PatchBank


def train_model(bank: PatchBank, params: dict, bank_path=None, progress=None, binned=None):
    """Fit a :class:`~detector.patch_forest.PatchForest` (the fit of
    :class:`~detector.classifier.PatchClassifier` without scikit-learn) on a bank; return
    ``(model, forest)``.

    The model's metadata gains the bank's context margin (the scan reports the box inside the
    window), its SHA-256, its harvest parameters and its patch counts.

    Raises
    ------
    InputError
        The bank lacks object or background patches (the message names ``bank_path``).

    ``binned`` is a :class:`~detector.patch_forest.BinnedPool` of this bank's patches (see
    :func:`train_with_mining`).
    """
    counts = bank.counts()
    if counts["objects"] == 0:
        raise InputError("the bank holds no object patches; training needs both object and "
                         "background patches", path=bank_path)
    if counts["background"] == 0:
        raise InputError("the bank holds no background patches; training needs both (harvest "
                         "again with --negatives-per-image or --near-negatives above 0)",
                         path=bank_path)
    clf = PatchForest(**params)
    clf.fit(bank.patches, bank.labels, progress=progress, margin=float(bank.margin), binned=binned)
    model = clf.model_
    model.metadata["bank"] = {
        "sha256": npzfile.file_sha256(bank_path) if bank_path is not None else None,
        "counts": bank.counts(),
        "harvest": {k: v for k, v in bank.metadata.items() if k != "counts"},
    }
    sizes = bank.metadata.get("object_sizes")
    if isinstance(sizes, dict) and sizes.get("smallest") and sizes.get("largest"):
        model.object_range = np.array([sizes["smallest"], sizes["largest"]], np.float64)
    return model, clf


def bank_to_xy(bank: PatchBank):
    """Patches and labels of a bank as ``(X uint8 (N,h,w), y int64 (N,))``."""
    return bank.patches, bank.labels.astype(np.int64)


#: ``patchwood train``'s model parameters unless told otherwise, in tune's words (``tune`` starts
#: its search here). ``features_per_node`` is capped at the pool (:func:`default_features_per_node`);
#: 1000 rather than the square root of the pool (141) raised the mean AP50 of the cross-data sets
#: over five harvest and model seeds (DEVELOPERS.md, "Defaults that follow the data").
DEFAULT_TRAIN = {"trees": 300, "depth": 2, "mode": "boosted", "pool": 20000,
                 "features_per_node": 1000, "sample_fraction": 1.0, "weight_trim": 0.0,
                 "channels": "gradient"}


def default_features_per_node(pool: int) -> int:
    """``patchwood train``'s features per node for a pool of ``pool`` features.

    >>> default_features_per_node(20000), default_features_per_node(400)
    (1000, 400)
    """
    return int(min(DEFAULT_TRAIN["features_per_node"], int(pool)))


#: Hard-negative mining rounds of ``patchwood train`` unless told otherwise (chosen on the
#: cross-data benchmark, ``benchmarks/cross_data.py``; README, "Speed and accuracy").
DEFAULT_MINE_ROUNDS = 2
#: The models that only mine (every round but the last) grow this share of the trees: they need to
#: find false alarms, not to rank them finely, and their training time goes on feature values and growing.
MINE_TREE_SHARE = 0.25
#: ... from the same share of the feature pool, but no fewer features than this.
MINE_POOL_MIN = 2000


def mining_source(bank: PatchBank, bank_path=None):
    """``(images_dir, labels_path)`` the bank was harvested from (absolute paths the harvest
    recorded), for mining them by default; ``(None, None)`` for a bank that does not record them.

    Raises
    ------
    InputError
        The recorded folder or labels file is gone (naming ``bank_path``).
    """
    source = bank.metadata.get("source")
    if not isinstance(source, dict) or not source.get("images") or not source.get("labels"):
        return None, None
    import os

    for what in ("images", "labels"):
        path = source[what]
        if not isinstance(path, str) or not os.path.exists(path):
            raise InputError(f"the {what} {'folder' if what == 'images' else 'file'} this bank was "
                             f"harvested from is gone ({path}); mining needs it: give "
                             f"--mine-images and --mine-labels, or --mine-rounds 0", path=bank_path)
    return source["images"], source["labels"]


def mining_params(params: dict, share: float = MINE_TREE_SHARE) -> dict:
    """The parameters of a model that only mines: ``share`` of the trees (at least 10) drawn from
    ``share`` of the feature pool (at least :data:`MINE_POOL_MIN` features): computing the pool's
    values on every patch is most of a model's training time. Its nodes try the square root of
    its pool (``features_per_node`` None) whatever the final model tries: finding false alarms
    needs no finer splits, and growing with 1000 per node cost the mining models most of the
    extra time without raising AP50 (DEVELOPERS.md, "Defaults that follow the data").

    >>> mining_params({"n_trees": 200, "mode": "boosted", "pool": 20000, "features_per_node": 1000})
    {'n_trees': 50, 'mode': 'boosted', 'pool': 5000, 'features_per_node': None}
    >>> p = mining_params({"n_trees": 12, "pool": 1500}); p["n_trees"], p["pool"]
    (10, 1500)
    """
    trees = params["n_trees"]
    out = {**params, "n_trees": max(min(trees, 10), int(round(trees * share)))}
    if "features_per_node" in params:
        out["features_per_node"] = None
    if "pool" in params:
        pool = int(params["pool"])
        out["pool"] = max(min(pool, MINE_POOL_MIN), int(round(pool * share)))
    return out


#: Mining ends early when a round's false alarms add less than this share to the bank's
#: background patches: the next model would train on nearly the bank the last one did. Our own
#: choice; on the cross-data sets at seed 0 only cups stays below it (45 of 4,589, 1.0 %), the
#: others add 17-37 % a round (DEVELOPERS.md, "Defaults that follow the data").
MINING_STOP_SHARE = 0.02


def train_with_mining(bank: PatchBank, params: dict, *, rounds: int = 0, images_dir=None,
                      items=None, settings=None, per_image: int = 20, per_round: int = 4000,
                      bank_path=None, progress_factory=None, report=None,
                      mine_params: dict | None = None):
    """Train, then ``rounds`` times: scan the mining images, add the false alarms to the bank as
    background patches, and train again.

    Parameters
    ----------
    bank : PatchBank
    params : dict
        :class:`~detector.classifier.PatchClassifier` parameters.
    rounds : int
        Mining rounds at most (0 = plain training): mining ends early when a round adds fewer
        patches than :data:`MINING_STOP_SHARE` of the bank's background (the round's
        ``MiningRound.last`` is then True, and the next model is the final one).
    images_dir, items :
        The mining images: folder and their labels (list of ImageLabels).
    settings : detector.scan.ScanSettings
        Scan settings for mining (their threshold is where recall and false alarms are counted).
    per_image, per_round : int
        Caps on new background patches per image and per round.
    progress_factory : callable(description, total) -> context manager yielding update(done, total)
    report : callable(round, MiningRound, bank_counts)
        Called after each scan of the mining images: round 0 is the first model, the last call
        the final one (whose false alarms are not added: ``MiningRound.counted_only``).
    mine_params : dict, optional
        Parameters of the models that only mine (rounds before the last); default ``params``.
        :func:`mining_params` gives a cheaper set.

    Returns
    -------
    (model, classifier, bank)
        The final model, its classifier, and the bank with every mined patch.

    Notes
    -----
    The models that only mine share one feature pool, computed once on the bank (a
    :class:`~detector.patch_forest.BinnedPool`); each round only adds its mined patches' values,
    binned with the first bank's cuts. The final model computes its own pool on the final bank:
    sharing it too (its bins cut on the first bank) lost AP50 on the cross-data benchmark (seed 0:
    galaxies 0.626 -> 0.465, horses 0.720 -> 0.695, mean of six sets 0.799 -> 0.752), where the
    mined patches are up to a third of the final bank.
    """
    from contextlib import nullcontext

    from detector.harvest import KIND_MINED
    from detector.training._mining import FrameCache, mine

    def bar(description, total):
        if progress_factory is None:
            return nullcontext(None)
        return progress_factory(description, total)

    history = []
    pool = None
    frames = FrameCache()  # every round scans the same images
    miner = mine_params or params
    if rounds and miner.get("max_bins", 256) is not None and \
            miner.get("grower", "histogram") == "histogram":
        from detector.patch_forest import BinnedPool

        counts = bank.counts()
        if counts["objects"] and counts["background"]:  # else train_model says what is missing
            with bar("feature values", miner.get("pool", PatchForest().pool)) as up:
                pool = BinnedPool(miner, bank.patches, bank.labels, progress=up)
    final = rounds  # the round whose model is the final one
    for r in range(rounds + 1):
        grow = params if r == final else miner
        # the models that only mine share one pool; the final model computes its own, with the
        # cuts of the whole final bank (see Notes)
        binned = pool if r < final else None
        with bar(f"growing trees (round {r})" if rounds else "growing trees", grow["n_trees"]) as up:
            model, clf = train_model(bank, grow, bank_path=bank_path, progress=up, binned=binned)
        if rounds == 0:
            break
        with bar(f"mining round {r + 1}" if r < final else "checking final model", len(items)) as up:
            found = mine(model, images_dir, items, settings=settings, per_image=per_image,
                         per_round=per_round, progress=up, count_only=r == final,
                         n_jobs=params.get("n_jobs"), frames=frames)
        if r < final and len(found.patches) < MINING_STOP_SHARE * bank.counts()["background"]:
            final, found.last = r + 1, True
        history.append({"round": r, "false_alarms_per_image": found.false_alarms_per_image,
                        "recall": found.recall, "added": 0 if r == final else len(found.patches)})
        if report is not None:
            report(r, found, bank.counts())
        if r == final:
            break
        if len(found.patches):
            bank = bank.extend(found.patches, found.boxes, np.arange(len(found.patches)),
                               KIND_MINED, images=found.images)
            if pool is not None and r + 1 < final:
                pool.extend(found.patches)
    if rounds:
        model.metadata["mining"] = history
    return model, clf, bank
