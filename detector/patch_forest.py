"""The forest fit of fixed-size grey patches, object (1) or background (0), without scikit-learn.

:class:`PatchForest` draws a random pool of rectangle-difference features, evaluates it on the
patches, grows a forest of shallow trees (:func:`detector.forest.grow_forest`), keeps only the
features the trees use, and calibrates the early-exit thresholds on object patches held out from
growing. The result is a :class:`detector.model.Model`, the same object the model file stores and
the scanning engine reads. :class:`detector.classifier.PatchClassifier` is the same fit as a
scikit-learn estimator; training uses this class directly, so that ``patchwood train`` does not
spend a second or more importing scikit-learn (which pulls in scipy.stats).
"""

from __future__ import annotations

import math
import numbers
import time
import threading

import numpy as np
from numpy.typing import ArrayLike
import inspect

from detector import features as _features
from detector.features import CHOICES as CHANNEL_CHOICES
from detector.errors import InputError
from detector.cascade import EXIT_BUDGET, calibrate, calibration_count
from detector.forest import (GROWERS, MAX_DEPTH, MODES, bin_columns, final_score,
                             forest_leaf_scores, grow_forest, quantile_cuts, seed_sequence,
                             thresholds_from_bins, worker_count)
from detector.model import Model, library_versions, training_date

__all__ = ["PatchForest", "BinnedPool", "check_patches", "NotFitted"]

#: With ``channels="gradient"``, the share of the pool drawn as channel features (the rest are
#: grey rectangle differences, as without channels).
CHANNEL_SHARE = 0.5
#: Pool features evaluated and binned at a time for the histogram grower (their float32 values
#: take ``4 * VALUE_BLOCK * N`` bytes, 0.25 GB for 30,000 patches; the bins of the whole pool
#: ``P * N``). Blocks of 1,024 cost 1.1-1.3x the CPU time of binning the whole matrix at once
#: (pool 5,000 on 10,000 patches, three turns each), 4,096 about the same as whole.
VALUE_BLOCK = 2048


def check_patches(patches: ArrayLike, window: tuple[int, int] | None = None) -> np.ndarray:
    """Validate grey patches: a (N, height, width) array of grey levels 0..255 -> uint8.

    Parameters
    ----------
    patches : array_like
    window : (int, int), optional
        Required ``(width, height)``.

    Examples
    --------
    >>> check_patches(np.zeros((2, 3, 4), np.int64)).dtype
    dtype('uint8')
    """
    patches = np.asarray(patches)
    if patches.ndim != 3:
        raise InputError(f"patches must be a (N, height, width) array, got shape {patches.shape}")
    if patches.dtype != np.uint8:
        if patches.dtype.kind not in "iu" or (patches.size and (patches.min() < 0 or patches.max() > 255)):
            raise InputError(f"patches must be uint8 grey levels (0..255), got dtype {patches.dtype}")
        patches = patches.astype(np.uint8)
    if window is not None and patches.shape[1:] != (window[1], window[0]):
        raise InputError(f"patches are {patches.shape[2]}x{patches.shape[1]}; the model's window is "
                         f"{window[0]}x{window[1]} (width x height)")
    return patches


class NotFitted(ValueError, AttributeError):
    """A prediction asked of a forest not fitted yet (both a ValueError and an AttributeError, as
    scikit-learn's NotFittedError is)."""


class PatchForest:
    """Forest of shallow trees over rectangle-difference features.

    Parameters
    ----------
    n_trees : int, default=200
    depth : int, default=2
        Depth of every tree.
    mode : {"bagged", "boosted"}, default="bagged"
        Random forest ("Random Forests", Machine Learning 45, 2001) or Gentle AdaBoost (Friedman, Hastie and Tibshirani 2000).
    pool : int, default=20000
        Size of the random feature pool (capped at the number of features the window holds).
    features_per_node : int, optional
        Pool features tried at every node; default ``round(sqrt(pool))``.
    sample_fraction : float in (0, 1], default=1.0
        Bootstrap size (bagged) or per-stage subsample (boosted), as a fraction of the patches.
    weight_trim : float in [0, 0.5], default=0.0
        Boosted: each stage grows without the lightest patches that together hold at most this
        share of the weight (weight trimming, Friedman, Hastie and Tibshirani 2000;
        :func:`detector.forest.trimmed_weights`). Ignored for bagged forests.
    normalize : bool, default=True
        Contrast-normalise feature values per patch.
    exit_budget : float in [0, 1), default=EXIT_BUDGET
        Share of the held-out object patches (and their copies) that the contrast gate and all
        the early exits together may give up (:data:`detector.cascade.EXIT_BUDGET`).
    exit_shift : float >= 0, default=1.0
        The early exit is calibrated on every held-out object patch and on 8 copies of it shifted
        by up to this many pixels (at the window's size) along x and y, ...
    exit_scale : float >= 1, default=1.1
        ... and scaled by up to this factor up or down: how far the scan's nearest window can be
        from an object at the scan's default stride (2, so at most 1 pixel off) and scale step
        (1.2, so at most its square root, about 1.1, off).
    channels : {"grey", "gradient"}, default="grey"
        ``"gradient"``: draw :data:`CHANNEL_SHARE` of the pool as channel features, rectangles and
        rectangle differences over the gradient magnitude and six orientation channels
        (:func:`detector.features.channel_pool`; Integral Channel Features, Dollár, Tu, Perona and
        Belongie, BMVC 2009); the rest stay grey rectangle differences.
    max_bins : int in 2..256 or None, default=256
        Grow on quantile-bin indices of every pool feature (at most ``max_bins`` distinct values per
        feature; see :mod:`detector.forest`, "Binned growing"), then map the thresholds back to
        feature values. None grows on the feature values themselves (with scikit-learn).
    grower : {"histogram", "sklearn"}, default="histogram"
        How trees grow on the bins: the compiled histogram grower
        (:mod:`detector.forest`), or scikit-learn's tree learners, the reference it is
        tested against (the same trees up to the random choice of features at each node).
        Ignored when ``max_bins`` is None.
    random_state : None, int or numpy generator
        Same seed and same patches give the same model, byte for byte in the model file.
    n_jobs : int, optional
        Threads growing bagged trees (None: 1, -1: all cores); the result does not depend on it.

    Attributes
    ----------
    model_ : detector.model.Model
    classes_ : ndarray, ``[0, 1]``
    oob_error_ : float
        Out-of-bag error of a bagged forest (nan for boosted).
    feature_importances_ : ndarray of float64, shape (F_used,)
        Summed impurity decrease of each of ``model_.features``, normalised to sum to 1.
    calibration_indices_ : ndarray of int
        Indices (into the patches given to ``fit``) of the object patches held out from growing to
        calibrate the early exit.
    timings_ : dict
        Wall seconds of the last fit: ``evaluate_seconds`` (pool draw and feature values),
        ``grow_seconds``, ``calibrate_seconds`` (kept out of the model file, which stays
        byte-identical between runs).

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> bright = rng.integers(0, 60, (40, 12, 12)); bright[:, :6] += 150   # top half brighter
    >>> dull = rng.integers(0, 210, (40, 12, 12))
    >>> patches = np.concatenate([bright, dull]).astype(np.uint8); y = np.r_[np.ones(40), np.zeros(40)]
    >>> clf = PatchForest(n_trees=20, pool=500, random_state=0).fit(patches, y)
    >>> bool((clf.predict(patches) == y).mean() > 0.95)
    True
    """

    def __init__(
        self,
        n_trees=200,
        depth=2,
        mode="bagged",
        pool=20000,
        features_per_node=None,
        sample_fraction=1.0,
        weight_trim=0.0,
        normalize=True,
        exit_budget=EXIT_BUDGET,
        exit_shift=1.0,
        exit_scale=1.1,
        max_bins=256,
        grower="histogram",
        random_state=None,
        n_jobs=None,
        channels="grey",
    ):
        self.n_trees = n_trees
        self.depth = depth
        self.mode = mode
        self.pool = pool
        self.features_per_node = features_per_node
        self.sample_fraction = sample_fraction
        self.weight_trim = weight_trim
        self.normalize = normalize
        self.exit_budget = exit_budget
        self.exit_shift = exit_shift
        self.exit_scale = exit_scale
        self.max_bins = max_bins
        self.grower = grower
        self.random_state = random_state
        self.n_jobs = n_jobs
        self.channels = channels

    def get_params(self, deep=True) -> dict:
        """The constructor's parameters and their values (scikit-learn's convention)."""
        names = [p for p in inspect.signature(PatchForest.__init__).parameters if p != "self"]
        return {name: getattr(self, name) for name in names}

    def _check_parameters(self):
        def integer(name, low, high=None):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, numbers.Integral) or v < low or (high and v > high):
                span = f"{low}..{high}" if high else f">= {low}"
                raise InputError(f"{name} must be an integer {span}, got {v!r}")

        integer("n_trees", 1)
        integer("depth", 1, MAX_DEPTH)
        integer("pool", 1)
        if self.features_per_node is not None:
            integer("features_per_node", 1)
        if self.max_bins is not None:
            integer("max_bins", 2, 256)
        if self.mode not in MODES:
            raise InputError(f"mode must be one of {', '.join(MODES)}, got {self.mode!r}")
        if self.channels not in CHANNEL_CHOICES:
            raise InputError(f"channels must be one of {', '.join(CHANNEL_CHOICES)}, got "
                             f"{self.channels!r}")
        if self.grower not in GROWERS:
            raise InputError(f"grower must be one of {', '.join(GROWERS)}, got {self.grower!r}")
        shift = self.exit_shift
        if isinstance(shift, bool) or not isinstance(shift, numbers.Real) or not 0.0 <= shift <= 8.0:
            raise InputError(f"exit_shift must be a number in [0, 8], got {shift!r}")
        scale = self.exit_scale
        if isinstance(scale, bool) or not isinstance(scale, numbers.Real) or not 1.0 <= scale <= 2.0:
            raise InputError(f"exit_scale must be a number in [1, 2], got {scale!r}")
        v = self.sample_fraction
        if isinstance(v, bool) or not isinstance(v, numbers.Real) or not 0.0 < v <= 1.0:
            raise InputError(f"sample_fraction must be a number in (0, 1], got {v!r}")
        v = self.weight_trim
        if isinstance(v, bool) or not isinstance(v, numbers.Real) or not 0.0 <= v <= 0.5:
            raise InputError(f"weight_trim must be a number in [0, 0.5], got {v!r}")
        v = self.exit_budget
        if isinstance(v, bool) or not isinstance(v, numbers.Real) or not 0.0 <= v < 1.0:
            raise InputError(f"exit_budget must be a number in [0, 1), got {v!r}")

    def fit(self, patches, y, *, progress=None, metadata=None, margin: float = 0.0,
            binned: "BinnedPool | None" = None):
        """Grow the forest on grey patches.

        Parameters
        ----------
        patches : ndarray of uint8, shape (N, height, width)
        y : array_like of {0, 1}, shape (N,)
            1 for object patches, 0 for background; both must occur.
        progress : callable(done, total), optional
            Called after every tree.
        metadata : dict, optional
            Extra entries for the model's metadata, JSON-serialisable: for example ``bank_sha256``
            (:func:`detector.io.npzfile.file_sha256` of the patch bank file).
        margin : float >= 0, default=0.0
            The context margin the patches were cut with (the bank's ``margin``): the model's
            :attr:`~detector.model.Model.margin`, with which the scan turns a window into the object
            box it reports.
        binned : BinnedPool, optional
            The pool's bin indices on exactly these patches, already computed (hard-negative
            mining refits on a bank that only grows: :class:`BinnedPool`). Its pool replaces this
            classifier's own draw; the rest of the fit is the same.

        Returns
        -------
        self
        """
        started = time.perf_counter()
        self._check_parameters()
        patches = check_patches(patches)
        y = np.asarray(y)
        if y.shape != (len(patches),):
            raise InputError(f"y must hold one label per patch ({len(patches)}), got shape {y.shape}")
        if y.dtype.kind not in "biuf" or not np.isin(y, (0, 1)).all():
            raise InputError("y must hold 0 (background) and 1 (object) only")
        y = y.astype(np.int64)
        if y.min(initial=1) == y.max(initial=0):
            raise InputError("training needs both object (1) and background (0) patches")
        height, width = patches.shape[1:]
        if isinstance(margin, bool) or not isinstance(margin, numbers.Real) or not margin >= 0.0:
            raise InputError(f"margin must be a number >= 0, got {margin!r}")
        margin = float(margin)

        pool_ss, split_ss, forest_ss, bin_ss, exit_ss, channel_ss = _seeds(self.random_state)
        if binned is None:
            pool, pool_channels = self._draw_pool(width, height, pool_ss, channel_ss)
        else:
            pool, pool_channels = binned.pool, binned.channels
        pool_size = len(pool)

        held, grow = _calibration_split(y, split_ss)
        grow_patches = patches[grow]
        grow_y = y[grow]

        grower = "sklearn" if self.max_bins is None else self.grower
        if binned is not None:
            if grower != "histogram" or binned.max_bins != self.max_bins \
                    or binned.normalize != bool(self.normalize):
                raise InputError("a BinnedPool serves the histogram grower with its own max_bins "
                                 "and normalisation")
            if binned.bins.shape[1] != len(grow_patches):
                raise InputError(f"the BinnedPool holds {binned.bins.shape[1]} patches to grow "
                                 f"on, these patches {len(grow_patches)}")
            values, cuts = binned.bins, binned.cuts
        elif grower == "histogram":
            values, cuts = self._binned_values(pool, grow_patches, bin_ss, pool_channels)
        else:
            # (P, N) C-ordered, so X = values.T is Fortran-ordered: contiguous pool columns
            values = _features.evaluate_features(pool, grow_patches, normalize=bool(self.normalize),
                                                 transpose=True, channels=pool_channels)
            if self.max_bins is not None:
                cuts, n_cuts = quantile_cuts(values.T, int(self.max_bins), random_state=bin_ss)
                bin_columns(values.T, cuts, n_cuts, n_jobs=self.n_jobs)
        evaluated = time.perf_counter()
        forest = grow_forest(
            values.T, grow_y, mode=self.mode, n_trees=int(self.n_trees), depth=int(self.depth),
            features_per_node=self.features_per_node, sample_fraction=float(self.sample_fraction),
            weight_trim=float(self.weight_trim) if self.mode == "boosted" else 0.0,
            random_state=forest_ss, progress=progress, n_jobs=self.n_jobs, grower=grower,
        )
        grown = time.perf_counter()
        background_leaves = None
        if self.max_bins is not None:
            # the background's leaf values, read off the bins the trees were grown on (a value is
            # <= cuts[f, k] exactly when its bin is <= k, and a padding node's two sides hold the
            # same leaves): calibrate need not compute the background's feature values again
            bin_used, bin_forest = forest.reindex()
            background_leaves = forest_leaf_scores(
                bin_forest, values[bin_used][:, grow_y == 0].T)
        del values
        if self.max_bins is not None:
            forest = thresholds_from_bins(forest, cuts)
        used, small = forest.reindex()

        grown_model = Model(
            window=(width, height), features=pool[used], node_features=small.node_features,
            node_thresholds=small.node_thresholds, leaf_values=small.leaf_values,
            exit_thresholds=np.full(small.n_trees, -np.inf, np.float32), mode=self.mode,
            normalize=bool(self.normalize),
            feature_channels=None if pool_channels is None else pool_channels[used],
        )
        cascade = calibrate(grown_model.leaf_scores, self.mode, patches[held],
                            grow_patches[grow_y == 0], exit_budget=float(self.exit_budget),
                            shift=float(self.exit_shift), scale=float(self.exit_scale),
                            contrast_gate=bool(self.normalize), random_state=exit_ss,
                            background_leaves=background_leaves)
        order = cascade.order
        model = Model(
            window=(width, height), features=pool[used], node_features=small.node_features[order],
            node_thresholds=small.node_thresholds[order], leaf_values=small.leaf_values[order],
            exit_thresholds=cascade.exit_thresholds, mode=self.mode,
            normalize=bool(self.normalize), feature_importances=small.importances,
            exit_levels=cascade.exit_levels, exit_table=cascade.exit_table,
            feature_channels=grown_model.feature_channels, margin=margin,
            temperature=cascade.temperature, exit_min_sigma=cascade.min_sigma,
        )
        model.metadata = {
            "kind": "model",
            "parameters": {k: v for k, v in self.get_params().items()
                           if k not in ("n_jobs",) and (k != "random_state" or v is None
                                                         or isinstance(v, numbers.Integral))},
            "features_per_node": int(min(pool_size, self.features_per_node or max(1, round(math.sqrt(pool_size))))),
            "pool_drawn": int(pool_size),
            "patches": {"objects": int((grow_y == 1).sum()), "background": int((grow_y == 0).sum()),
                        "window": [int(width), int(height)]},
            "oob_error": forest.oob_error,
            "calibration": {
                "exit_budget": float(self.exit_budget),
                "objects": cascade.report["objects"],
                "copies_per_object": cascade.report["copies_per_object"],
                "shift": float(self.exit_shift),
                "scale": float(self.exit_scale),
                "mean_trees_objects": cascade.report["mean_trees_objects"],
                "mean_trees_background": cascade.report["mean_trees_background"],
                "contrast_gate_min_sigma": cascade.min_sigma,
                "background_dropped_by_contrast_gate":
                    cascade.report["background_dropped_by_contrast_gate"],
                "background_source": "training background patches",
            },
            "date": training_date(),
            "versions": library_versions(),
        }
        model.metadata.update(metadata or {})
        self.timings_ = {
            "evaluate_seconds": evaluated - started,  # pool draw, feature values, binning
            "grow_seconds": grown - evaluated,
            "calibrate_seconds": time.perf_counter() - grown,
        }
        self.calibration_indices_ = held
        self.model_ = model
        self.classes_ = np.array([0, 1])
        self.oob_error_ = float("nan") if forest.oob_error is None else float(forest.oob_error)
        imp = small.importances
        total = imp.sum()
        self.feature_importances_ = imp / total if total > 0 else np.full(len(imp), 1.0 / len(imp))
        return self

    def _draw_pool(self, width, height, pool_ss, channel_ss):
        """The random feature pool of a fit: grey rectangle differences, then (with
        ``channels="gradient"``) :data:`CHANNEL_SHARE` of the pool on the gradient channels;
        ``(pool, pool_channels or None)``."""
        # a sixth seed for the channel pool leaves the first five as they were without channels
        channel_size = 0
        if self.channels == "gradient":
            channel_size = int(round(CHANNEL_SHARE * int(self.pool)))
        pool_size = min(int(self.pool) - channel_size, _features.count_features(width, height))
        pool = _features.random_pool(width, height, pool_size,
                                     random_state=int(pool_ss.generate_state(1)[0]))
        pool_channels = None
        if channel_size:
            extra, extra_channels = _features.channel_pool(
                width, height, channel_size, random_state=int(channel_ss.generate_state(1)[0]))
            pool = np.concatenate([pool, extra])
            pool_channels = np.concatenate([np.zeros(pool_size, np.int8), extra_channels])
        return pool, pool_channels

    def _binned_values(self, pool, patches, bin_ss, channels=None, progress=None):
        """Bin indices of the pool's values, uint8 (P, N), and the cuts (P, W), computed
        ``VALUE_BLOCK`` features at a time: the float32 values of the whole pool never exist at
        once. The same bins as binning the whole matrix: every feature's values and cuts are its
        own, and the cuts' sample rows depend only on N and the seed.

        A block holds features of one channel only (the pool's features grouped by channel, in
        pool order within a channel): each call then makes one channel's integral images of the
        patches once, where blocks in pool order made all seven for every block (on the
        cross-data benchmark's cups, 20,000 features on 5,600 patches, 35 integral-image passes
        became 7)."""
        n_pool, n = len(pool), len(patches)
        bins = np.empty((n_pool, n), np.uint8)
        cuts = np.full((n_pool, 1 << (int(self.max_bins) - 1).bit_length()), np.inf, np.float32)
        # the channel images of the patches, made once for every block
        made = (_features.patch_channels(patches, worker_count(self.n_jobs))
                if channels is not None and np.any(channels) else None)
        order = np.arange(n_pool) if channels is None else np.argsort(channels, kind="stable")
        groups = [order] if channels is None else \
            np.split(order, np.flatnonzero(np.diff(channels[order])) + 1)
        blocks = [group[a:a + VALUE_BLOCK] for group in groups
                  for a in range(0, len(group), VALUE_BLOCK)]

        # each thread evaluates into one block-sized buffer of its own, and makes the blocks'
        # integral images in another: a new 45 MB array every block (2,048 features x 5,559
        # patches) cost 15-25 ms of page faults, a quarter of the block's evaluation, and a new
        # 90 MB array of integral images (5,482 patches of 49 x 40) 18 ms against 5 in a used one
        buffers = threading.local()

        def value_block(idx):
            if getattr(buffers, "values", None) is None:
                buffers.values = np.empty((min(VALUE_BLOCK, n_pool), n), np.float32)
                buffers.integrals = _features.integral_scratch(n, *patches.shape[1:])
            block = _features.evaluate_features(
                pool[idx], patches, normalize=bool(self.normalize), transpose=True,
                channels=None if channels is None else channels[idx], channel_images=made,
                out=buffers.values[:len(idx)], scratch=buffers.integrals)
            block_cuts, n_cuts = quantile_cuts(block.T, int(self.max_bins), random_state=bin_ss)
            bin_columns(block.T, block_cuts, n_cuts, n_jobs=1)
            bins[idx], cuts[idx] = block, block_cuts  # rows of their own: no two blocks share one
            return len(idx)

        # blocks on n_jobs threads (the compiled loops and numpy's sort release the GIL); the
        # result does not depend on how many
        workers = min(worker_count(self.n_jobs), len(blocks))
        done = 0
        if workers <= 1:
            finished = map(value_block, blocks)
        else:
            from concurrent.futures import ThreadPoolExecutor

            pool_of_threads = ThreadPoolExecutor(workers)
            finished = (f.result() for f in
                        [pool_of_threads.submit(value_block, idx) for idx in blocks])
        try:
            for count in finished:
                done += count
                if progress is not None:
                    progress(done, n_pool)
        finally:
            if workers > 1:
                pool_of_threads.shutdown(cancel_futures=True)
        return bins, cuts

    def _raw(self, patches) -> np.ndarray:
        if not hasattr(self, "model_"):
            raise NotFitted(f"this {type(self).__name__} is not fitted yet: call fit first")
        patches = check_patches(patches, self.model_.window)
        return self.model_.running_scores(patches)[:, -1]

    def decision_function(self, patches) -> np.ndarray:
        """Signed confidence, > 0 for objects.

        Bagged: mean leaf object fraction minus 0.5. Boosted: the additive model ``F(x)``, the sum
        of the leaf values (half the log-odds).
        """
        raw = self._raw(patches)
        if self.model_.mode == "bagged":
            return raw / self.model_.n_trees - 0.5
        return raw

    def predict_proba(self, patches) -> np.ndarray:
        """Scores as ``[[1 - s, s], ...]`` for classes ``[0, 1]``; ``s`` is the forest's score in 0..1
        (no early exit)."""
        raw = self._raw(patches)
        s = final_score(self.model_.mode, raw, self.model_.n_trees, self.model_.temperature)
        return np.column_stack([1.0 - s, s])

    def predict(self, patches) -> np.ndarray:
        """1 where the score exceeds 0.5, else 0."""
        return self.classes_[(self.predict_proba(patches)[:, 1] > 0.5).astype(np.intp)]

    @classmethod
    def from_model(cls, model: Model) -> "PatchForest":
        """A fitted classifier around a loaded model (for scoring patches with a model file).

        Examples
        --------
        >>> m = Model((2, 2), np.array([[[0, 0, 2, 1, -1], [0, 1, 2, 1, 1]] + [[0] * 5] * 2], np.int32),
        ...           [[0]], [[0.0]], [[0.0, 1.0]], [-np.inf], "bagged", normalize=False)
        >>> PatchForest.from_model(m).predict(np.array([[[9, 9], [1, 1]]], np.uint8)).tolist()
        [0]
        """
        params = dict(model.metadata.get("parameters", {}))
        clf = cls(**{k: v for k, v in params.items() if k in cls().get_params()})
        clf.model_ = model
        clf.classes_ = np.array([0, 1])
        oob = model.metadata.get("oob_error")
        clf.oob_error_ = float("nan") if oob is None else float(oob)
        imp = model.feature_importances
        if imp is not None and imp.sum() > 0:
            clf.feature_importances_ = imp / imp.sum()
        return clf


def _seeds(random_state):
    """The six seeds of a fit: pool, calibration split, forest, bins, exits, channel pool."""
    return seed_sequence(random_state).spawn(6)


def _calibration_split(y, split_ss):
    """``(held, grow)``: the object patches held out to calibrate the early exits (sorted
    indices), and the mask of the patches the trees grow on. Held objects depend only on the
    object patches' positions, so background patches appended to a bank leave them as they were."""
    objects = np.flatnonzero(y == 1)
    n_cal = calibration_count(len(objects))
    held = np.sort(np.random.default_rng(split_ss).choice(objects, n_cal, replace=False))
    grow = np.ones(len(y), bool)
    grow[held] = False
    if not (y[grow] == 1).any():
        held, grow[:] = held[:0], True
    return held, grow


class BinnedPool:
    """A classifier's feature pool binned on the patches its trees grow on, kept across refits of
    a bank that only grows (hard-negative mining appends background patches).

    Computing the pool's values is most of a fit's time. The models that only mine refit on the
    same bank plus the patches each round mined, so their pool is computed once, on the bank it
    starts from, with the cuts of that bank (a fit on that bank is unchanged, bit for bit), and
    mined patches are binned with the same cuts (:meth:`extend`). The final model computes its
    own pool (:func:`detector.training.train_with_mining`, Notes).

    Parameters
    ----------
    params : dict
        The :class:`PatchForest` parameters of the models to grow.
    patches : ndarray of uint8 (N, h, w)
    y : array_like of {0, 1}
    progress : callable(done, total), optional
        Called after every block of features.
    """

    def __init__(self, params: dict, patches, y, progress=None):
        clf = PatchForest(**params)
        clf._check_parameters()
        if clf.max_bins is None or clf.grower != "histogram":
            raise InputError("a BinnedPool needs the histogram grower (max_bins set)")
        patches = check_patches(patches)
        y = np.asarray(y).astype(np.int64)
        height, width = patches.shape[1:]
        pool_ss, split_ss, _, bin_ss, _, channel_ss = _seeds(clf.random_state)
        self.pool, self.channels = clf._draw_pool(width, height, pool_ss, channel_ss)
        self.max_bins, self.normalize = clf.max_bins, bool(clf.normalize)
        _, grow = _calibration_split(y, split_ss)
        self.bins, self.cuts = clf._binned_values(self.pool, patches[grow], bin_ss, self.channels,
                                                  progress=progress)

    def extend(self, patches) -> None:
        """Append background patches (the rows a mining round adds to the end of the bank)."""
        patches = check_patches(patches)
        if not len(patches):
            return
        values = _features.evaluate_features(self.pool, patches, normalize=self.normalize,
                                             transpose=True, channels=self.channels)
        bin_columns(values.T, self.cuts)
        self.bins = np.concatenate([self.bins, values.astype(np.uint8)], axis=1)
