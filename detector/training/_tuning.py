"""Cross-validated parameter search scored by detection on held-out images.

The objective is what a user cares about: average precision at IoU 0.5 (AP50, all-point
interpolation as in PASCAL VOC 2010+, Everingham et al., IJCV 2010) of the detections the scanning
engine finds on images the model never saw, not the accuracy of the classifier on patches.

- Folds are groups of whole images (:func:`image_folds`): every patch of an image, object or
  background, augmented copy or mined false alarm, sits on the same side of a fold as the image,
  so a held-out image contributes nothing to the model it is scored with. Images with objects and
  object-free images are dealt to the folds separately (a stratified split, common practice), so
  every fold holds out some objects.
- The patch bank is harvested once over all the images (:func:`prepare_folds`); a fold's training
  bank is the patches whose ``image_index`` points at one of its training images. The window is
  chosen once, from ``--window`` or the median box shape of all the labels, as the final
  ``patchwood harvest`` would choose it. Mining rounds inside a fold scan only that fold's
  training images.
- The search is Bayesian optimisation with the tree-structured Parzen estimator (Bergstra et al.,
  "Algorithms for Hyper-Parameter Optimization", NIPS 2011) as Optuna implements it
  (``optuna.samplers.TPESampler``, seeded), within a wall-clock budget: no trial starts once the
  budget is used, and at least one trial always runs.
"""

from __future__ import annotations

import math
import os
import shlex
import time
from dataclasses import dataclass, field

import numpy as np

from detector._validation import as_generator
from detector.errors import InputError
from detector.io.files import atomic_write
from detector.evaluation import evaluate
from detector.features import count_features
from detector.harvest import PatchBank, harvest
from detector.io.labels import csv_writer
from detector.io.images import read_gray
from detector.cascade import EXIT_BUDGET
from detector.scan import Engine, ScanSettings
from detector.training._train import DEFAULT_TRAIN

__all__ = [
    "EVALUATION_THRESHOLD",
    "PARAMETERS",
    "FoldData",
    "SearchResult",
    "SearchSpace",
    "TrialRecord",
    "bank_subset",
    "classifier_params",
    "describe",
    "effective_values",
    "evaluate_params",
    "fold_average_precision",
    "image_folds",
    "plot_trials",
    "prepare_folds",
    "search",
    "train_command",
    "trials_columns",
    "write_trials_csv",
]

#: The searched parameters, in the project's option words (``--trees`` ... ``--sample-fraction``).
PARAMETERS = ("trees", "depth", "mode", "pool", "features_per_node", "sample_fraction")
#: Score from which held-out detections are kept: low, so that the precision-recall curve reaches
#: far down in score and the AP is not cut short by the operating threshold.
EVALUATION_THRESHOLD = 0.05
#: Score at which mining rounds inside a fold count false alarms (``patchwood train``'s default).
MINING_THRESHOLD = 0.5


# --------------------------------------------------------------------------------------------
# folds


def image_folds(items, k: int = 3, seed: int = 0) -> list[tuple[np.ndarray, np.ndarray]]:
    """Split images into ``k`` folds; every image is held out exactly once.

    The images are shuffled (seeded), then the images with objects and after them the object-free
    images are dealt to the folds in turn, so fold sizes differ by at most one and so do their
    numbers of images with objects.

    Parameters
    ----------
    items : sequence of ImageLabels
        One per image (an object-free image has no boxes).
    k : int
        Number of folds, 2 to ``len(items)``.
    seed : int
        Seed of the shuffle.

    Returns
    -------
    list of (train_idx, test_idx)
        Sorted int64 indices into ``items``; the test sets partition ``range(len(items))`` and each
        training set is the complement of its test set.

    Examples
    --------
    >>> from detector.io.labels import ImageLabels
    >>> items = [ImageLabels(f"{i}.png", [[0, 0, 5, 5]] if i < 4 else []) for i in range(6)]
    >>> folds = image_folds(items, k=2, seed=0)
    >>> sorted(int(i) for _, test in folds for i in test)
    [0, 1, 2, 3, 4, 5]
    >>> [int(sum(i < 4 for i in test)) for _, test in folds]   # two images with objects each
    [2, 2]
    """
    n = len(items)
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 2:
        raise InputError(f"folds must be an integer of at least 2, got {k!r}")
    if k > n:
        raise InputError(f"{k} folds need at least {k} images, found {n}")
    order = as_generator(seed).permutation(n)
    has = np.array([len(items[i].boxes) > 0 for i in order], dtype=bool)
    dealt = np.concatenate([order[has], order[~has]])
    fold_of = np.empty(n, dtype=np.int64)
    fold_of[dealt] = np.arange(n) % k
    return [(np.flatnonzero(fold_of != f).astype(np.int64), np.flatnonzero(fold_of == f).astype(np.int64))
            for f in range(k)]


def bank_subset(bank: PatchBank, image_ids) -> PatchBank:
    """The patches of ``bank`` cut from the images ``image_ids`` (indices into ``bank.images``).

    The image list and every patch's ``image_index`` are kept as they are, so provenance still
    reads against ``bank.images``.

    Examples
    --------
    >>> import numpy as np
    >>> from detector.harvest import PatchBank
    >>> b = PatchBank((4, 4), np.zeros((3, 4, 4), np.uint8), np.array([1, 0, 0], np.uint8),
    ...               np.array([0, 2, 2], np.uint8), np.array([0, 1, 0], np.int32), ["a", "b"],
    ...               np.zeros((3, 4), np.float32), np.zeros((3, 7), np.float32))
    >>> bank_subset(b, [0]).image_index.tolist()
    [0, 0]
    """
    keep = np.isin(bank.image_index, np.asarray(image_ids, dtype=np.int64))
    metadata = dict(bank.metadata)
    return PatchBank(
        window=bank.window,
        patches=bank.patches[keep],
        labels=bank.labels[keep],
        kinds=bank.kinds[keep],
        image_index=bank.image_index[keep],
        images=list(bank.images),
        boxes=bank.boxes[keep],
        augmentation=bank.augmentation[keep],
        metadata=metadata,
    )


@dataclass
class FoldData:
    """What one fold needs, built once and reused by every trial.

    Attributes
    ----------
    number : int
        1-based fold number.
    images_dir : str
        Folder the image names are relative to.
    train_items, test_items : list of ImageLabels
        The fold's training and held-out images.
    bank : PatchBank
        Patches of the training images only (see :func:`bank_subset`).
    """

    number: int
    images_dir: str
    train_items: list
    test_items: list
    bank: PatchBank


def prepare_folds(images_dir, items, k: int = 3, seed: int = 0, *, bank: PatchBank | None = None,
                  labels_path=None, progress=None, **harvest_options):
    """Harvest the bank once over all images and split it into ``k`` image-grouped folds.

    Parameters
    ----------
    images_dir : path
    items : list of ImageLabels
    k : int
        Number of folds.
    seed : int
        Seed of the fold split and of the harvest.
    bank : PatchBank, optional
        An already harvested bank of exactly these images (in this order); skips the harvest.
    labels_path : path, optional
        Named in error messages.
    progress : callable(done, total), optional
        Harvest progress.
    **harvest_options
        Passed to :func:`detector.harvest.harvest` (``window``, ``copies``,
        ``negatives_per_image``, ...).

    Returns
    -------
    (PatchBank, list of FoldData)
        The bank of all images and the folds.
    """
    items = list(items)
    folds = image_folds(items, k, seed)
    with_objects = sum(1 for it in items if len(it.boxes))
    if with_objects < k:
        raise InputError(f"{k} folds need at least {k} images with objects, found {with_objects}",
                         path=labels_path)
    if bank is None:
        bank = harvest(images_dir, items, seed=seed, labels_path=labels_path, progress=progress,
                       **harvest_options)
    elif list(bank.images) != [it.image for it in items]:
        raise InputError("the patch bank was not harvested from these images", path=labels_path)
    out = []
    for f, (train_idx, test_idx) in enumerate(folds):
        sub = bank_subset(bank, train_idx)
        if not np.any(sub.labels == 1) or not np.any(sub.labels == 0):
            raise InputError(f"fold {f + 1}: its training images gave no object or no background "
                             "patches", path=labels_path)
        out.append(FoldData(number=f + 1, images_dir=os.fspath(images_dir),
                            train_items=[items[i] for i in train_idx],
                            test_items=[items[i] for i in test_idx], bank=sub))
    return bank, out


# --------------------------------------------------------------------------------------------
# the objective


def classifier_params(values: dict, seed: int = 0, n_jobs=None, exit_budget: float = EXIT_BUDGET,
                      channels: str | None = None) -> dict:
    """Tune's parameter words -> :class:`detector.classifier.PatchClassifier` parameters, with the
    features ``channels`` (default: ``patchwood train``'s).

    >>> p = classifier_params({"trees": 50, "depth": 2, "mode": "bagged", "pool": 800,
    ...                        "features_per_node": 30, "sample_fraction": 0.5}, seed=3)
    >>> p["n_trees"], p["random_state"]
    (50, 3)
    """
    return dict(n_trees=int(values["trees"]), depth=int(values["depth"]), mode=str(values["mode"]),
                pool=int(values["pool"]), features_per_node=int(values["features_per_node"]),
                sample_fraction=float(values["sample_fraction"]),
                weight_trim=DEFAULT_TRAIN["weight_trim"], exit_budget=float(exit_budget),
                random_state=int(seed), n_jobs=n_jobs,
                channels=DEFAULT_TRAIN["channels"] if channels is None else str(channels))


def _scan_settings(settings: ScanSettings | None, threshold: float) -> ScanSettings:
    base = settings or ScanSettings()
    return ScanSettings(**{**base.__dict__, "threshold": threshold})


def fold_average_precision(fold: FoldData, params: dict, *, settings: ScanSettings | None = None,
                           mine_rounds: int = 0, mining_threshold: float = MINING_THRESHOLD) -> float:
    """Train on the fold's training bank, scan its held-out images, return their AP50.

    Parameters
    ----------
    fold : FoldData
    params : dict
        :class:`~detector.classifier.PatchClassifier` parameters (see :func:`classifier_params`).
    settings : ScanSettings, optional
        Scale step, stride, object sizes and NMS of the scan; its threshold is replaced by
        :data:`EVALUATION_THRESHOLD` for the held-out images and by ``mining_threshold`` for
        mining.
    mine_rounds : int
        Mining rounds on the fold's training images (never the held-out ones).

    Returns
    -------
    float
        All-point average precision at IoU 0.5 (:func:`detector.evaluation.evaluate`); nan when
        the held-out images hold no object.
    """
    from detector.training._train import mining_params, train_with_mining

    # the mining models are the cheaper ones `patchwood train` grows, so that the train line
    # printed for the best trial trains what the trial measured
    model, _, _ = train_with_mining(
        fold.bank, params, rounds=int(mine_rounds), images_dir=fold.images_dir,
        items=fold.train_items, settings=_scan_settings(settings, mining_threshold),
        mine_params=mining_params(params))
    engine = Engine(model, _scan_settings(settings, EVALUATION_THRESHOLD))
    detections, truth = {}, {}
    for it in fold.test_items:
        found = engine.scan(read_gray(os.path.join(fold.images_dir, it.image)))
        detections[it.image] = (found.boxes, found.scores)
        truth[it.image] = it.boxes
    return float(evaluate(detections, truth, iou_threshold=0.5, size_buckets=None).average_precision)


def evaluate_params(folds, params: dict, *, settings: ScanSettings | None = None,
                    mine_rounds: int = 0, mining_threshold: float = MINING_THRESHOLD):
    """Cross-validated AP50 of one parameter set: ``(mean, per_fold)``.

    Parameters
    ----------
    folds : list of FoldData
        From :func:`prepare_folds`.
    params : dict
        :class:`~detector.classifier.PatchClassifier` parameters.
    settings, mine_rounds, mining_threshold :
        See :func:`fold_average_precision`.

    Returns
    -------
    (float, ndarray of float64)
        Mean AP50 over the folds and the AP50 of each fold.
    """
    per_fold = np.array([fold_average_precision(f, params, settings=settings,
                                                mine_rounds=mine_rounds,
                                                mining_threshold=mining_threshold)
                         for f in folds], dtype=np.float64)
    return float(np.mean(per_fold)), per_fold


# --------------------------------------------------------------------------------------------
# the search


def _pair(value, kind, name):
    try:
        lo, hi = value
        lo, hi = kind(lo), kind(hi)
    except (TypeError, ValueError):
        raise InputError(f"{name}: give a (low, high) pair, got {value!r}") from None
    if kind is int and (lo != value[0] or hi != value[1]):
        raise InputError(f"{name}: give whole numbers, got {value!r}")
    if not lo <= hi:
        raise InputError(f"{name}: low must not exceed high, got {value!r}")
    return lo, hi


@dataclass
class SearchSpace:
    """The ranges the search draws from; a range whose ends are equal fixes the parameter.

    ``trees``, ``pool`` and ``features_per_node`` are drawn on a log scale, ``depth`` and
    ``sample_fraction`` on a linear one, ``mode`` from ``modes``. ``features_per_node`` is capped
    at the trial's pool, and the pool at the number of features the window holds (as training
    caps them); the trial records the values actually used.
    """

    trees: tuple = (20, 300)
    depth: tuple = (1, 4)
    modes: tuple = ("bagged", "boosted")
    pool: tuple = (1000, 20000)
    features_per_node: tuple = (100, 3000)
    sample_fraction: tuple = (0.3, 1.0)

    def check(self) -> "SearchSpace":
        """Validate the ranges; raise :class:`InputError` naming the bad one."""
        from detector.forest import MAX_DEPTH, MODES

        for name, low in (("trees", 1), ("depth", 1), ("pool", 1), ("features_per_node", 1)):
            lo, hi = _pair(getattr(self, name), int, name)
            if lo < low:
                raise InputError(f"{name}: must be at least {low}, got {lo}")
            if name == "depth" and hi > MAX_DEPTH:
                raise InputError(f"depth: at most {MAX_DEPTH}, got {hi}")
        lo, hi = _pair(self.sample_fraction, float, "sample_fraction")
        if not 0.0 < lo <= hi <= 1.0:
            raise InputError(f"sample_fraction: must lie in (0, 1], got {self.sample_fraction!r}")
        modes = tuple(self.modes)
        if not modes or any(m not in MODES for m in modes) or len(set(modes)) != len(modes):
            raise InputError(f"modes: choose from {', '.join(MODES)}, got {', '.join(modes) or 'none'}")
        return self

    def start(self, defaults: dict | None = None) -> dict:
        """``patchwood train``'s defaults moved into the ranges: the first trial, so the search
        starts where a user who does not tune would be (``defaults`` default
        :data:`detector.training.DEFAULT_TRAIN`; features per node is capped at the pool, and None
        there is the square root of the pool, as the library's classifier has it).

        >>> SearchSpace().start()
        {'trees': 300, 'depth': 2, 'mode': 'boosted', 'pool': 20000, 'features_per_node': 1000, 'sample_fraction': 1.0}
        >>> SearchSpace(trees=(5, 50), depth=(3, 4), modes=("bagged",), pool=(100, 400),
        ...             features_per_node=(10, 300), sample_fraction=(0.3, 0.5)).start()
        {'trees': 50, 'depth': 3, 'mode': 'bagged', 'pool': 400, 'features_per_node': 300, 'sample_fraction': 0.5}
        """
        d = dict(DEFAULT_TRAIN if defaults is None else defaults)

        def clip(value, pair):
            return min(max(value, pair[0]), pair[1])

        pool = int(clip(d["pool"], self.pool))
        per_node = min(d["features_per_node"] or max(1, round(math.sqrt(pool))), pool)
        return {"trees": int(clip(d["trees"], self.trees)), "depth": int(clip(d["depth"], self.depth)),
                "mode": d["mode"] if d["mode"] in self.modes else tuple(self.modes)[0],
                "pool": pool,
                "features_per_node": int(clip(per_node, self.features_per_node)),
                "sample_fraction": float(clip(d["sample_fraction"], self.sample_fraction))}

    def suggest(self, trial) -> dict:
        """Draw one parameter set from an Optuna trial (the values as drawn, before capping)."""
        return {
            "trees": trial.suggest_int("trees", *self.trees, log=True),
            "depth": trial.suggest_int("depth", *self.depth),
            "mode": trial.suggest_categorical("mode", list(self.modes)),
            "pool": trial.suggest_int("pool", *self.pool, log=True),
            "features_per_node": trial.suggest_int("features_per_node", *self.features_per_node,
                                                   log=True),
            "sample_fraction": trial.suggest_float("sample_fraction", *self.sample_fraction),
        }


def effective_values(values: dict, window) -> dict:
    """The values training will use: pool capped at the window's feature count, features per
    node at the pool, sample fraction rounded to 3 decimals (as printed and written; at least
    0.001).

    >>> v = effective_values({"trees": 9, "depth": 1, "mode": "bagged", "pool": 10**9,
    ...                       "features_per_node": 10**8, "sample_fraction": 0.123456}, (4, 4))
    >>> v["pool"] == count_features(4, 4), v["features_per_node"] == v["pool"], v["sample_fraction"]
    (True, True, 0.123)
    """
    out = dict(values)
    out["pool"] = int(min(int(values["pool"]), count_features(int(window[0]), int(window[1]))))
    out["features_per_node"] = int(min(int(values["features_per_node"]), out["pool"]))
    out["sample_fraction"] = max(round(float(values["sample_fraction"]), 3), 0.001)
    out["trees"] = int(values["trees"])
    out["depth"] = int(values["depth"])
    return out


@dataclass
class TrialRecord:
    """One finished trial.

    Attributes
    ----------
    number : int
        1-based trial number.
    values : dict
        The parameters used (see :func:`effective_values`), keyed by :data:`PARAMETERS`.
    mean : float
        Mean AP50 over the folds.
    per_fold : ndarray of float64
    seconds : float
        Wall time of the trial.
    """

    number: int
    values: dict
    mean: float
    per_fold: np.ndarray
    seconds: float

    @property
    def spread(self) -> float:
        """Sample standard deviation of the per-fold AP50 (0 for a single fold)."""
        return float(np.std(self.per_fold, ddof=1)) if len(self.per_fold) > 1 else 0.0


@dataclass
class SearchResult:
    """The trials in the order they ran, the best one, and why the search stopped
    (``"trials"``: the trial limit, ``"budget"``: the time budget)."""

    trials: list = field(default_factory=list)
    best: TrialRecord | None = None
    stopped: str = ""
    seconds: float = 0.0


def _better(a: float, b: float) -> bool:
    """``a`` beats ``b``; nan never wins."""
    return not math.isnan(a) and (math.isnan(b) or a > b)


def search(folds, *, space: SearchSpace | None = None, trials: int | None = None,
           budget_seconds: float = 600.0, seed: int = 0, started: float | None = None,
           settings: ScanSettings | None = None, mine_rounds: int = 0,
           mining_threshold: float = MINING_THRESHOLD, exit_budget: float = EXIT_BUDGET,
           n_jobs=None, on_trial=None, channels: str | None = None) -> SearchResult:
    """Bayesian search (Optuna's seeded TPE sampler) for the parameters of best mean AP50. The first
    trial is ``patchwood train``'s defaults moved into the ranges (:meth:`SearchSpace.start`).

    Parameters
    ----------
    folds : list of FoldData
        From :func:`prepare_folds`; the same folds score every trial.
    space : SearchSpace, optional
        Default :class:`SearchSpace()`.
    trials : int, optional
        Most trials to run (None: until the budget is used).
    budget_seconds : float
        No trial starts once this much wall time has passed since ``started``; the first trial
        always runs.
    seed : int
        Seeds the sampler and every model (``random_state``): the same seed, folds and space
        give the same trials.
    started : float, optional
        ``time.perf_counter()`` value the budget counts from (default: now), so a caller can
        include its harvest in the budget.
    settings, mine_rounds, mining_threshold :
        See :func:`fold_average_precision`.
    exit_budget, n_jobs, channels :
        Passed to every classifier (:func:`classifier_params`).
    on_trial : callable(TrialRecord, SearchResult), optional
        Called after every trial (for a progress line).

    Returns
    -------
    SearchResult

    Examples
    --------
    Two trials on a fixed tiny space (``folds`` from :func:`prepare_folds`)::

        result = search(folds, space=SearchSpace(trees=(5, 5), depth=(1, 2), modes=("bagged",),
                        pool=(200, 200), features_per_node=(10, 10), sample_fraction=(1, 1)),
                        trials=2)
        result.best.values, result.best.mean
    """
    import optuna

    space = (space or SearchSpace()).check()
    if trials is not None and int(trials) < 1:
        raise InputError(f"trials must be at least 1, got {trials}")
    if not folds:
        raise InputError("no folds to score on")
    window = folds[0].bank.window
    t0 = time.perf_counter() if started is None else float(started)
    verbosity = optuna.logging.get_verbosity()
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    try:
        study = optuna.create_study(direction="maximize",
                                    sampler=optuna.samplers.TPESampler(seed=int(seed)))
        study.enqueue_trial(space.start())  # the first trial: train's defaults (within the ranges)
        result = SearchResult()
        while True:
            if trials is not None and len(result.trials) >= int(trials):
                result.stopped = "trials"
                break
            if result.trials and time.perf_counter() - t0 >= budget_seconds:
                result.stopped = "budget"
                break
            trial = study.ask()
            values = effective_values(space.suggest(trial), window)
            begun = time.perf_counter()
            params = classifier_params(values, seed=seed, n_jobs=n_jobs, exit_budget=exit_budget,
                                       channels=channels)
            mean, per_fold = evaluate_params(folds, params, settings=settings,
                                             mine_rounds=mine_rounds,
                                             mining_threshold=mining_threshold)
            # a trial without a defined AP (no held-out object) is reported as failed to the sampler
            if math.isnan(mean):
                study.tell(trial, state=optuna.trial.TrialState.FAIL)
            else:
                study.tell(trial, mean)
            record = TrialRecord(len(result.trials) + 1, values, mean, per_fold,
                                 time.perf_counter() - begun)
            result.trials.append(record)
            if result.best is None or _better(record.mean, result.best.mean):
                result.best = record
            if on_trial is not None:
                on_trial(record, result)
        result.seconds = time.perf_counter() - t0
        return result
    finally:
        optuna.logging.set_verbosity(verbosity)


# --------------------------------------------------------------------------------------------
# outputs


def trials_columns(folds: int) -> list[str]:
    """Columns of ``trials.csv`` for ``folds`` folds.

    >>> trials_columns(2)
    ['trial', 'trees', 'depth', 'mode', 'pool', 'features_per_node', 'sample_fraction', 'ap50_mean', 'ap50_fold_1', 'ap50_fold_2', 'seconds']
    """
    return (["trial", *PARAMETERS, "ap50_mean"] + [f"ap50_fold_{i + 1}" for i in range(folds)]
            + ["seconds"])


def _row(record: TrialRecord) -> list:
    v = record.values
    return ([record.number, v["trees"], v["depth"], v["mode"], v["pool"], v["features_per_node"],
             f"{v['sample_fraction']:.3f}", f"{record.mean:.6f}"]
            + [f"{a:.6f}" for a in record.per_fold] + [f"{record.seconds:.2f}"])


def write_trials_csv(path, records, folds: int) -> None:
    """Write one row per trial (see :func:`trials_columns`); AP values with 6 decimals.

    Written through :func:`detector.io.files.atomic_write`, so an interrupted run leaves either the
    previous complete file or the new one.
    """
    with atomic_write(path, "w", newline="") as fh:
        w = csv_writer(fh)
        w.writerow(trials_columns(folds))
        for r in records:
            w.writerow(_row(r))


_LOG_PARAMETERS = ("trees", "pool", "features_per_node")
_LABELS = {"trees": "trees", "depth": "depth", "mode": "mode", "pool": "pool size",
           "features_per_node": "features per node", "sample_fraction": "sample fraction"}
_TRIAL_COLOUR = "#3b6ea5"
_BEST_COLOUR = "#d1495b"


def plot_trials(path, records, modes=("bagged", "boosted")) -> None:
    """One small panel per parameter: each trial's mean AP50 (bar: ± one standard deviation over
    the folds) against the parameter's value, the best trial marked. Writes a PNG (Agg canvas).
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D
    from matplotlib.ticker import FuncFormatter, MaxNLocator, NullFormatter

    fig = Figure(figsize=(10.5, 6.2), dpi=100)
    FigureCanvasAgg(fig)
    axes = fig.subplots(2, 3, sharey=True)
    scored = [r for r in records if not math.isnan(r.mean)]
    best = max(scored, key=lambda r: r.mean) if scored else None
    modes = list(dict.fromkeys(list(modes) + [r.values["mode"] for r in records]))
    for ax, name in zip(axes.ravel(), PARAMETERS):
        if name == "mode":
            # categorical: one column per mode, trials spread a little sideways to stay visible
            xs = [modes.index(r.values["mode"]) + 0.12 * (((r.number * 7) % 5) - 2) / 2 for r in scored]
            ax.set_xticks(range(len(modes)))
            ax.set_xticklabels(modes)
            ax.set_xlim(-0.6, len(modes) - 0.4)
        else:
            xs = [float(r.values[name]) for r in scored]
            if name in _LOG_PARAMETERS and xs and max(xs) > 3 * min(xs):
                ax.set_xscale("log")
                ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
                ax.xaxis.set_minor_formatter(NullFormatter())
            elif name != "sample_fraction":
                ax.xaxis.set_major_locator(MaxNLocator(integer=True))
        ys = [r.mean for r in scored]
        es = [r.spread for r in scored]
        if scored:
            ax.errorbar(xs, ys, yerr=es, fmt="o", color=_TRIAL_COLOUR, ecolor="#9db7d5",
                        markersize=4, elinewidth=0.8, capsize=2)
            b = scored.index(best)
            ax.plot([xs[b]], [ys[b]], marker="*", markersize=13, color=_BEST_COLOUR,
                    markeredgecolor="black", linestyle="none")
        else:
            ax.text(0.5, 0.5, "no trial with a defined AP50", ha="center", va="center",
                    transform=ax.transAxes, color="#555555")
        ax.set_xlabel(_LABELS[name])
        ax.set_ylim(-0.02, 1.02)
        ax.grid(True, color="#dddddd", linewidth=0.6)
    for ax in axes[:, 0]:
        ax.set_ylabel("AP50 on held-out images")
    handles = [Line2D([], [], marker="o", color=_TRIAL_COLOUR, linestyle="none",
                      label="trial (mean, bar: ± sd over folds)"),
               Line2D([], [], marker="*", markersize=12, color=_BEST_COLOUR,
                      markeredgecolor="black", linestyle="none", label="best trial")]
    fig.legend(handles=handles, loc="upper center", ncol=2, frameon=False)
    fig.subplots_adjust(left=0.07, right=0.98, bottom=0.09, top=0.9, hspace=0.35, wspace=0.08)
    with atomic_write(path) as fh:
        fig.savefig(fh, format="png", metadata={"Software": None})


def train_command(values: dict, bank_path, model_path, seed: int = 0, mine_rounds: int = 0,
                  images_dir=None, labels_path=None, channels: str | None = None) -> str:
    """A ready-to-run ``patchwood train`` line for ``values`` (paths quoted for a POSIX shell),
    with the features ``channels`` (default: ``patchwood train``'s).

    >>> train_command({"trees": 80, "depth": 2, "mode": "boosted", "pool": 5000,
    ...                "features_per_node": 70, "sample_fraction": 0.8}, "b.npz", "m.npz", seed=1,
    ...               channels="grey")
    'patchwood train b.npz --out m.npz --trees 80 --depth 2 --mode boosted --pool 5000 --features-per-node 70 --sample-fraction 0.8 --channels grey --seed 1 --mine-rounds 0'
    """
    q = shlex.quote
    parts = ["patchwood", "train", q(os.fspath(bank_path)), "--out", q(os.fspath(model_path)),
             "--trees", str(int(values["trees"])), "--depth", str(int(values["depth"])),
             "--mode", str(values["mode"]), "--pool", str(int(values["pool"])),
             "--features-per-node", str(int(values["features_per_node"])),
             "--sample-fraction", f"{float(values['sample_fraction']):g}",
             "--channels", DEFAULT_TRAIN["channels"] if channels is None else str(channels),
             "--seed", str(int(seed))]
    parts += ["--mine-rounds", str(int(mine_rounds))]
    if mine_rounds:
        parts += ["--mine-images", q(os.fspath(images_dir)), "--mine-labels", q(os.fspath(labels_path))]
    return " ".join(parts)


def describe(values: dict) -> str:
    """Short one-line form of a parameter set for progress lines.

    >>> describe({"trees": 80, "depth": 2, "mode": "boosted", "pool": 5000,
    ...           "features_per_node": 70, "sample_fraction": 0.8})
    'trees 80, depth 2, boosted, pool 5000, features/node 70, sample 0.80'
    """
    return (f"trees {values['trees']}, depth {values['depth']}, {values['mode']}, "
            f"pool {values['pool']}, features/node {values['features_per_node']}, "
            f"sample {float(values['sample_fraction']):.2f}")

