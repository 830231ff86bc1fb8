"""Growing a forest (bagged or boosted, with scikit-learn's tree learners or the histogram
grower), and the out-of-bag scores of a bagged one."""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import replace
from functools import partial

import numpy as np

from detector._validation import check_choice, check_int, check_real, seed_sequence
from detector.forest._flat import MAX_DEPTH, MODES, FlatForest, flatten_tree, forest_leaves
from detector.forest._histogram import grow_histogram_tree
from detector.forest._tree_kernels import ENTROPY, SQUARED_ERROR

__all__ = ["GROWERS", "seed_sequence", "grow_forest", "forest_oob_scores", "oob_scores",
           "trimmed_weights"]

GROWERS = ("sklearn", "histogram")


#: Smallest boosting weight, relative to the mean weight 1.
BOOST_WEIGHT_FLOOR = 1e-10


def trimmed_weights(weights: np.ndarray, share: float) -> np.ndarray:
    """``weights`` with the lightest samples set to 0, as many as together hold at most ``share``
    of the total weight (weight trimming; Friedman, Hastie and Tibshirani 2000, section 9: late
    boosting stages put almost all the weight on a few hard samples, and the rest can sit a stage
    out). Ties are broken by index, so the result does not depend on anything but the weights.

    >>> trimmed_weights(np.array([5.0, 1.0, 2.0, 2.0]), 0.3)   # 1 + 2 = 3 <= 0.3 * 10
    array([5., 0., 0., 2.])
    >>> trimmed_weights(np.array([5.0, 1.0, 2.0, 2.0]), 0.25)  # 1 <= 2.5 < 1 + 2
    array([5., 0., 2., 2.])
    """
    if share <= 0.0:
        return weights
    order = np.argsort(weights, kind="stable")
    mass = np.cumsum(weights[order])
    k = int(np.searchsorted(mass, share * float(np.sum(weights)), side="right"))
    out = weights.copy()
    out[order[:k]] = 0.0
    return out


def _check_finite(X: np.ndarray, block: int = 256) -> bool:
    """All values finite, checked in column (Fortran) or row (C) blocks to bound temporaries."""
    if X.flags.f_contiguous and not X.flags.c_contiguous:
        return all(np.isfinite(X[:, a : a + block]).all() for a in range(0, X.shape[1], block))
    return all(np.isfinite(X[a : a + block]).all() for a in range(0, X.shape[0], block))


def _validate(X, y, mode, n_trees, depth, features_per_node, sample_fraction, weight_trim=0.0):
    X = np.asarray(X)
    if X.ndim != 2:
        raise ValueError(f"X must be 2-D (patches x features), got shape {X.shape}")
    if X.dtype not in (np.float32, np.uint8) or not (X.flags.f_contiguous or X.flags.c_contiguous):
        X = np.asfortranarray(X, dtype=np.float32)
    n, n_features = X.shape
    y = np.asarray(y)
    if y.shape != (n,):
        raise ValueError(f"y must have shape ({n},), got {y.shape}")
    if y.dtype == bool:
        y = y.astype(np.int64)
    if not np.isin(y, (0, 1)).all():
        raise ValueError("y must hold 0 (background) and 1 (object) only")
    y = y.astype(np.int64)
    if y.min(initial=1) == y.max(initial=0) or n < 2:
        raise ValueError("y must hold both object (1) and background (0) patches")
    # the parameters: one set of checks and one error type with the classifier's (_validation)
    check_choice(mode, "mode", MODES)
    n_trees = check_int(n_trees, "n_trees", low=1)
    depth = check_int(depth, "depth", low=1, high=MAX_DEPTH)
    if features_per_node is None:
        features_per_node = max(1, int(round(np.sqrt(n_features))))
    features_per_node = min(check_int(features_per_node, "features_per_node", low=1), n_features)
    sample_fraction = check_real(sample_fraction, "sample_fraction", low=0.0, high=1.0,
                                 low_open=True)
    weight_trim = check_real(weight_trim, "weight_trim", low=0.0, high=0.5)
    if n_features < 1:
        raise ValueError("X has no feature columns")
    if X.dtype != np.uint8 and not _check_finite(X):
        raise ValueError("X holds non-finite feature values")
    return (X, y, int(n_trees), int(depth), features_per_node, float(sample_fraction),
            float(weight_trim))


def _as_bins(X) -> np.ndarray:
    """Bin indices ``X`` (N, F) as the histogram grower reads them: uint8 (F, N), C-contiguous."""
    if X.dtype == np.uint8:
        return np.ascontiguousarray(X.T)
    bins = np.empty((X.shape[1], X.shape[0]), np.uint8)
    for a in range(0, X.shape[1], 256):  # blocks of columns bound the temporaries
        block = X[:, a : a + 256].T
        if not ((block >= 0) & (block <= 255) & (block == np.floor(block))).all():
            raise ValueError("the histogram grower needs bin indices 0..255 (see bin_columns)")
        bins[a : a + 256] = block
    return bins


def _sklearn_tree(name: str, criterion: str):
    """scikit-learn's tree learner ``name`` with ``criterion``, imported only for the scikit-learn
    route (the import takes a second or more: it pulls in scipy.stats)."""
    import sklearn.tree

    return partial(getattr(sklearn.tree, name), criterion=criterion)


def worker_count(n_jobs) -> int:
    """Threads for ``n_jobs``, by scikit-learn's convention: None 1, -1 every core, -2 all but one.

    >>> worker_count(None), worker_count(3)
    (1, 3)
    """
    return _n_jobs(n_jobs)


def _n_jobs(n_jobs) -> int:
    if n_jobs is None:
        return 1
    if n_jobs < 0:
        return max(1, (os.cpu_count() or 1) + 1 + n_jobs)
    return max(1, int(n_jobs))


def grow_forest(
    X,
    y,
    *,
    mode: str = "bagged",
    n_trees: int = 200,
    depth: int = 2,
    features_per_node: int | None = None,
    sample_fraction: float = 1.0,
    weight_trim: float = 0.0,
    random_state=None,
    progress=None,
    n_jobs: int | None = None,
    keep_estimators: bool = False,
    grower: str = "sklearn",
) -> FlatForest:
    """Grow a bagged or boosted forest of shallow trees and flatten it.

    Parameters
    ----------
    X : ndarray of float32, shape (N, F)
        Feature matrix (pool values of every patch). Pass it Fortran-ordered (e.g. the transpose of
        ``evaluate_features(..., transpose=True)``): scikit-learn's splitter gathers
        ``X[samples, f]`` one column at a time. Float32 C- or Fortran-contiguous input is used
        without any copy; other input is converted once.
    y : ndarray of int, shape (N,)
        1 for object patches, 0 for background.
    mode : {"bagged", "boosted"}, default="bagged"
        Random forest ("Random Forests", Machine Learning 45, 2001) or Gentle AdaBoost (Friedman, Hastie and Tibshirani 2000);
        see the module docstring.
    n_trees : int, default=200
    depth : int, default=2
        Depth of every (complete) tree.
    features_per_node : int, optional
        Pool columns drawn at random at every node; default ``round(sqrt(F))`` (common practice for
        random forests).
    sample_fraction : float in (0, 1], default=1.0
        Bagged: bootstrap draws per tree as a fraction of N (with replacement). Boosted: fraction of
        patches (without replacement) that carry weight in each stage.
    weight_trim : float in [0, 0.5], default=0.0
        Boosted only: each stage grows on the patches left when the lightest ones, together
        holding at most this share of the weight, sit it out (:func:`trimmed_weights`); every
        patch is still reweighted after every stage, so a trimmed patch that becomes hard takes
        part again. 0 keeps every patch.
    random_state : None, int or numpy generator
        Every tree gets its own child of one :class:`numpy.random.SeedSequence`; the same seed gives
        the same forest, whatever ``n_jobs``.
    progress : callable(done, total), optional
        Called after every tree.
    n_jobs : int, optional
        Threads growing bagged trees at once (scikit-learn's tree builder and the histogram
        grower's compiled loops release the GIL);
        None means 1, -1 all cores. Boosting is sequential; there the histogram grower's threads
        share each node's candidate features instead.
    keep_estimators : bool, default=False
        Keep the scikit-learn trees (``grower="sklearn"``) and the per-tree sample counts (for
        tests and inspection).
    grower : {"sklearn", "histogram"}, default="sklearn"
        ``"sklearn"``: scikit-learn's exact tree learners on any feature values. ``"histogram"``:
        the compiled histogram grower (:mod:`detector.forest`), for bin indices 0..255
        (``X`` of uint8, or of float32 holding such integers, as :func:`bin_columns` leaves it);
        the same trees as scikit-learn's on those bins up to the random choice of features, and
        many times faster. Thresholds stay on bin indices (:func:`thresholds_from_bins`).

    Returns
    -------
    FlatForest

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> X = rng.normal(size=(200, 6)).astype(np.float32); y = (X[:, 2] + X[:, 4] > 0).astype(int)
    >>> f = grow_forest(X, y, n_trees=20, random_state=0)
    >>> bool(f.oob_error < 0.2), int(np.argmax(f.importances)) in (2, 4)
    (True, True)
    """
    if grower not in GROWERS:
        raise ValueError(f"grower must be one of {GROWERS}, got {grower!r}")
    X, y, n_trees, depth, fpn, fraction, trim = _validate(
        X, y, mode, n_trees, depth, features_per_node, sample_fraction, weight_trim
    )
    n, n_features = X.shape
    if grower == "histogram":
        bins = _as_bins(X)
        X = bins.T  # (N, F) view for the leaf look-ups below
    elif X.dtype == np.uint8:
        X = np.asfortranarray(X, dtype=np.float32)
    children = seed_sequence(random_state).spawn(n_trees)
    n_nodes = (1 << depth) - 1
    node_features = np.zeros((n_trees, n_nodes), np.int32)
    node_thresholds = np.zeros((n_trees, n_nodes), np.float32)
    leaf_values = np.zeros((n_trees, n_nodes + 1), np.float32)
    split_mask = np.zeros((n_trees, n_nodes), bool)
    importances = np.zeros(n_features, np.float64)
    estimators = [] if keep_estimators else None
    in_bag = np.zeros((n_trees, n), np.int32) if keep_estimators else None

    def grow_one(tree_ss, weight, target, criterion, learner, executor=None):
        """One tree on the chosen route: (features, thresholds, leaves, split mask, importance
        gains or the scikit-learn tree)."""
        if grower == "histogram":
            return grow_histogram_tree(bins, weight, target, criterion=criterion, depth=depth,
                                       features_per_node=fpn, rng=np.random.default_rng(tree_ss),
                                       executor=executor, parts=_n_jobs(n_jobs))
        est = learner(splitter="best", max_depth=depth, max_features=fpn,
                      random_state=int(tree_ss.generate_state(1)[0]))
        est.fit(X, target if criterion == SQUARED_ERROR else y, sample_weight=weight, check_input=False)
        return (*flatten_tree(est, depth), est)

    def store(t, grown):
        """Keep tree t; return the leaf of every sample it was grown on (-1 for the others), when
        the grower knows them."""
        f, thr, lv, m, extra = grown[:5]
        node_features[t], node_thresholds[t], leaf_values[t], split_mask[t] = f, thr, lv, m
        if grower == "histogram":
            for feature, gain in extra:
                importances[feature] += gain / n
            return grown[5]
        root_weight = extra.tree_.weighted_n_node_samples[0]
        importances[:] += extra.tree_.compute_feature_importances(normalize=False) * root_weight / n
        if estimators is not None:
            estimators.append(extra)

    def tree_leaves(t, rows):
        """Leaf of tree t reached by each of ``rows`` (as :func:`forest_leaves`, for one tree)."""
        node = np.zeros(rows.size, np.intp)
        for _ in range(depth):
            node = 2 * node + 1 + (X[rows, node_features[t][node]] > node_thresholds[t][node])
        return node - n_nodes

    def leaf_values_of(t, known):
        """Tree t's leaf value for every sample; ``known`` holds the leaves the grower saw."""
        leaves = np.full(n, -1, np.intp) if known is None else known
        missing = np.flatnonzero(leaves < 0)
        if missing.size:
            leaves = leaves.copy()
            leaves[missing] = tree_leaves(t, missing)
        return leaf_values[t][leaves]

    oob_error = None
    if mode == "bagged":
        n_draw = max(1, int(round(fraction * n)))
        classes = y.astype(np.float64)
        entropy_tree = _sklearn_tree("DecisionTreeClassifier", "entropy") \
            if grower == "sklearn" else None

        def fit_one(t):
            boot_ss, tree_ss = children[t].spawn(2)
            draws = np.random.default_rng(boot_ss).integers(0, n, n_draw)
            counts = np.bincount(draws, minlength=n)
            return grow_one(tree_ss, counts.astype(np.float64), classes, ENTROPY, entropy_tree), counts

        oob_sum = np.zeros(n, np.float64)
        oob_count = np.zeros(n, np.int64)
        workers = _n_jobs(n_jobs)
        pool = ThreadPoolExecutor(max_workers=workers) if workers > 1 else None
        try:
            results = pool.map(fit_one, range(n_trees)) if pool else map(fit_one, range(n_trees))
            for t, (grown, counts) in enumerate(results):
                store(t, grown)
                out = np.flatnonzero(counts == 0)
                if out.size:
                    oob_sum[out] += leaf_values[t][tree_leaves(t, out)]
                    oob_count[out] += 1
                if in_bag is not None:
                    in_bag[t] = counts
                if progress is not None:
                    progress(t + 1, n_trees)
        finally:
            if pool:
                pool.shutdown(cancel_futures=True)
        seen = oob_count > 0
        if seen.any():
            predicted = (oob_sum[seen] / oob_count[seen]) > 0.5
            oob_error = float(np.mean(predicted != (y[seen] == 1)))
    else:
        signed = np.where(y == 1, 1.0, -1.0)
        squared_tree = _sklearn_tree("DecisionTreeRegressor", "squared_error") \
            if grower == "sklearn" else None
        weights = np.ones(n, np.float64)
        n_sub = max(1, int(round(fraction * n)))
        # boosting is sequential: the histogram grower's threads share each node's candidates
        node_pool = ThreadPoolExecutor(_n_jobs(n_jobs)) if grower == "histogram" and _n_jobs(n_jobs) > 1 else None
        for t in range(n_trees):
            sub_ss, tree_ss = children[t].spawn(2)
            if n_sub < n:
                chosen = np.random.default_rng(sub_ss).choice(n, n_sub, replace=False)
                stage_weight = np.zeros(n, np.float64)
                stage_weight[chosen] = weights[chosen]
            else:
                stage_weight = weights
            stage_weight = trimmed_weights(stage_weight, trim)
            known = store(t, grow_one(tree_ss, stage_weight, signed, SQUARED_ERROR, squared_tree, node_pool))
            if in_bag is not None:
                in_bag[t] = stage_weight > 0
            f_t = leaf_values_of(t, known).astype(np.float64)
            weights = weights * np.exp(-signed * f_t)
            weights /= weights.mean()
            # keep every weight above a floor: after hundreds of stages the easy patches' weights
            # would underflow to 0, and a leaf holding only such patches has no defined value
            # (a floor, not weight trimming: trimming, above, leaves a stage's lightest patches
            # out on purpose and only when asked to)
            np.maximum(weights, BOOST_WEIGHT_FLOOR, out=weights)
            if progress is not None:
                progress(t + 1, n_trees)
        if node_pool is not None:
            node_pool.shutdown()

    return FlatForest(
        mode=mode,
        node_features=node_features,
        node_thresholds=node_thresholds,
        leaf_values=leaf_values,
        split_mask=split_mask,
        importances=importances,
        oob_error=oob_error,
        estimators=estimators,
        in_bag=in_bag,
    )


def forest_oob_scores(forest: FlatForest, X, chunk: int = 4096) -> tuple[np.ndarray, np.ndarray]:
    """Out-of-bag score of every patch of a bagged forest grown with ``keep_estimators=True``.

    Patch ``i``'s score is the mean leaf object fraction over the trees whose bootstrap did not
    draw it (``forest.in_bag[t, i] == 0``), the same bookkeeping :func:`grow_forest` uses for
    ``oob_error`` ("Random Forests", Machine Learning 45, 2001, section 3.1): a patch is then
    judged only by trees that never saw it, so its own label cannot vouch for itself.

    Parameters
    ----------
    forest : FlatForest
        Bagged, with ``in_bag`` recorded (``grow_forest(..., keep_estimators=True)``).
    X : ndarray of float32, shape (N, F)
        The feature matrix the forest was grown on (the same rows, in the same order).
    chunk : int
        Rows per block (bounds temporary memory to about ``chunk * T * 24`` bytes).

    Returns
    -------
    scores : ndarray of float64, shape (N,)
        In 0..1; NaN for a patch that every tree drew (never out of bag).
    trees_out : ndarray of int64, shape (N,)
        How many trees each score averages.

    Examples
    --------
    Two stumps on one feature; tree 0 drew patch 0 twice, tree 1 drew patches 0 and 1.

    >>> f = FlatForest("bagged", [[0], [0]], [[0.5], [0.5]], [[0.0, 1.0], [0.25, 0.75]])
    >>> f.in_bag = np.array([[2, 0, 0], [1, 1, 0]], np.int32)
    >>> s, k = forest_oob_scores(f, np.array([[0.2], [0.9], [0.7]], np.float32))
    >>> s.tolist(), k.tolist()   # patch 1: tree 0 only; patch 2: (1.0 + 0.75) / 2
    ([nan, 1.0, 0.875], [0, 1, 2])
    """
    if forest.mode != "bagged":
        raise ValueError("out-of-bag scores need a bagged forest")
    if forest.in_bag is None:
        raise ValueError("the forest has no bootstrap record: grow it with keep_estimators=True")
    X = np.asarray(X)
    in_bag = np.asarray(forest.in_bag)
    n = X.shape[0]
    if in_bag.shape != (forest.n_trees, n):
        raise ValueError(f"in_bag has shape {in_bag.shape}; expected ({forest.n_trees}, {n})")
    total = np.zeros(n, np.float64)
    count = np.zeros(n, np.int64)
    trees = np.arange(forest.n_trees)[None, :]
    for a in range(0, n, chunk):
        b = min(n, a + chunk)
        leaves = forest_leaves(forest, X[a:b])
        values = forest.leaf_values[trees, leaves].astype(np.float64)
        out = in_bag[:, a:b].T == 0
        total[a:b] = np.where(out, values, 0.0).sum(axis=1)
        count[a:b] = out.sum(axis=1)
    scores = np.full(n, np.nan)
    seen = count > 0
    scores[seen] = total[seen] / count[seen]
    return scores, count


def oob_scores(X, y, **options) -> tuple[np.ndarray, np.ndarray, FlatForest]:
    """Grow a bagged forest and score every patch with the trees that did not draw it.

    Parameters
    ----------
    X : ndarray of float32, shape (N, F)
    y : ndarray of int, shape (N,)
        1 for object patches, 0 for background.
    **options
        Keywords of :func:`grow_forest` (``n_trees``, ``depth``, ``features_per_node``,
        ``sample_fraction``, ``random_state``, ``progress``, ``n_jobs``, ``grower``), with its
        defaults; the forest is always bagged and keeps its estimators.

    Returns
    -------
    scores : ndarray of float64, shape (N,)
        Out-of-bag scores in 0..1; NaN where a patch was never out of bag (likely only with few
        trees: a patch is in a bootstrap of N draws with probability about 1 - 1/e = 0.63, so it
        is in all of T of them with probability about 0.63**T).
    trees_out : ndarray of int64, shape (N,)
        Trees behind each score.
    forest : FlatForest
        The forest, with its bootstrap counts in ``in_bag``; ``oob_error`` is the error of
        ``scores > 0.5`` against ``y`` over the scored patches.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> X = rng.normal(size=(200, 4)).astype(np.float32); y = (X[:, 1] > 0).astype(int)
    >>> s, k, f = oob_scores(X, y, n_trees=30, random_state=0)
    >>> bool(np.mean((s > 0.5) == (y == 1)) > 0.9), int(k.min()) > 0
    (True, True)
    """
    for fixed in ("mode", "keep_estimators"):
        if fixed in options:
            raise TypeError(f"oob_scores grows a bagged forest that keeps its trees; {fixed} is fixed")
    forest = grow_forest(X, y, mode="bagged", keep_estimators=True, **options)
    scores, trees_out = forest_oob_scores(forest, X)
    return scores, trees_out, forest
