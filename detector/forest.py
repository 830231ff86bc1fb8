"""Forests of shallow trees over a feature pool, flattened into arrays the scanning engine reads.

Two ways of growing them, with scikit-learn's exact tree learners (``splitter="best"``) or, on
binned features, the compiled histogram grower that grows the same trees
(:mod:`detector.histogram_trees`; ``grow_forest(grower="histogram")``):

``mode="bagged"``
    The random forest ("Random Forests", Machine Learning 45, 2001): every tree is grown on a
    bootstrap sample of the patches, drawn as per-patch counts passed as ``sample_weight`` (no copy of the feature
    matrix; scikit-learn's ``RandomForestClassifier`` does the same), with a fresh random subset of
    ``features_per_node`` pool columns at every node, thresholds at the midpoints between
    consecutive distinct projected values (scikit-learn's rule), chosen by the largest information
    gain (``criterion="entropy"``). A leaf holds the class histogram of its in-bag patches; the
    flat tree stores its object fraction, and the forest's score is the average over the trees.
``mode="boosted"``
    Gentle AdaBoost (Friedman, Hastie and Tibshirani, "Additive logistic regression", Ann. Statist.
    2000, Algorithm 4): stage by stage, a regression tree fitted by weighted least squares to
    ``y`` in {-1, +1} (leaf = weighted mean), then the weights multiplied by ``exp(-y f(x))``. Per
    stage only a random ``sample_fraction`` of the patches (drawn without replacement) carries
    weight, as in stochastic gradient boosting (Friedman, Comput. Stat. Data Anal. 2002), and every
    node sees a random subset of the pool. The score is the logistic link ``1 / (1 + exp(-2 F))``
    of the summed leaf values ``F``.

Flat trees
    Every tree is a complete binary tree of depth ``D``: ``node_features`` int32 ``(T, 2**D - 1)``,
    ``node_thresholds`` float32 ``(T, 2**D - 1)``, ``leaf_values`` float32 ``(T, 2**D)``, nodes in
    heap order (children of node ``i`` are ``2i+1`` and ``2i+2``; past the last level, node ``i``'s
    children are leaves ``2i+1-(2**D-1)`` and ``+1``); go left when ``x <= threshold``. A
    scikit-learn leaf above depth ``D`` is padded with feature 0, threshold 0.0 and identical leaves
    below it. Each threshold is the largest float32 not above scikit-learn's float64 threshold, so
    that float32 inputs take exactly scikit-learn's decisions.

Binned growing (optional)
    scikit-learn's exact splitter sorts the node's samples for every candidate feature and scores
    every distinct value, which costs about 0.2 us per sample and feature here. Replacing each pool
    column by its bin index among at most 256 quantile bins (:func:`quantile_cuts`,
    :func:`bin_columns`; the approach of histogram-based tree learners such as LightGBM, Ke et al.,
    NIPS 2017, and scikit-learn's HistGradientBoosting) leaves at most 256 distinct values per
    column, and :func:`thresholds_from_bins` turns the trees' bin-index thresholds back into feature
    values: the exported tree sends a feature value left exactly when its bin goes left. On bins,
    the histogram grower (``grower="histogram"``) replaces the sort by one pass that adds every
    sample into its bin, and a scan over the 256 bins, per node and candidate feature.

Running scores
    The running score after tree ``t`` is ``s_t = s_{t-1} + leaf_values[t, leaf]`` (``s_0 = 0``;
    the float32 leaf values summed in float64, in tree order); the early exit that stops a window
    once ``s_t`` falls below a threshold is calibrated in :mod:`detector.cascade`.
"""

from __future__ import annotations

import numbers
import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field, replace
from functools import partial

import numba
import numpy as np
from sklearn.tree import DecisionTreeClassifier, DecisionTreeRegressor

from detector._tree_kernels import ENTROPY, SQUARED_ERROR
from detector.histogram_trees import grow_histogram_tree

__all__ = [
    "FlatForest",
    "grow_forest",
    "flatten_tree",
    "float32_thresholds",
    "forest_leaves",
    "forest_leaf_scores",
    "forest_running_scores",
    "forest_score",
    "final_score",
    "seed_sequence",
    "quantile_cuts",
    "quantile_cuts_numpy",
    "bin_columns",
    "bin_columns_numpy",
    "thresholds_from_bins",
    "MODES",
    "GROWERS",
]

MODES = ("bagged", "boosted")
GROWERS = ("sklearn", "histogram")
MAX_DEPTH = 12


def seed_sequence(random_state) -> np.random.SeedSequence:
    """A :class:`numpy.random.SeedSequence` from any scikit-learn style ``random_state``.

    Parameters
    ----------
    random_state : None, int, SeedSequence, Generator or RandomState
        None draws fresh entropy; an int gives a reproducible sequence; a generator is consumed
        once.

    Examples
    --------
    >>> seed_sequence(7).generate_state(1) == seed_sequence(7).generate_state(1)
    array([ True])
    """
    if random_state is None:
        return np.random.SeedSequence()
    if isinstance(random_state, np.random.SeedSequence):
        return random_state
    if isinstance(random_state, numbers.Integral) and not isinstance(random_state, bool):
        if random_state < 0:
            raise ValueError(f"random_state must be >= 0, got {random_state}")
        return np.random.SeedSequence(int(random_state))
    if isinstance(random_state, np.random.Generator):
        return np.random.SeedSequence(int(random_state.integers(0, 2**63)))
    if isinstance(random_state, np.random.RandomState):
        return np.random.SeedSequence(int(random_state.randint(0, 2**31 - 1)))
    raise ValueError(f"random_state must be None, an int or a numpy generator, got {random_state!r}")


@dataclass
class FlatForest:
    """A forest of complete binary trees of one depth, as flat arrays.

    Attributes
    ----------
    mode : {"bagged", "boosted"}
    node_features : ndarray of int32, shape (T, 2**D - 1)
        Column of the feature matrix each node compares.
    node_thresholds : ndarray of float32, shape (T, 2**D - 1)
        Go left when ``x <= threshold``.
    leaf_values : ndarray of float32, shape (T, 2**D)
        Bagged: the object fraction of the leaf's in-bag patches; boosted: the leaf's weighted mean
        of ``y`` in {-1, +1}.
    split_mask : ndarray of bool, shape (T, 2**D - 1)
        True for real splits, False for padding nodes.
    importances : ndarray of float64, shape (n_features,)
        Per column, the weighted impurity decrease of its splits summed over all trees and divided
        by the number of patches N (information gain in bits for bagged trees, squared-error
        decrease for boosted ones); with ``sample_fraction=1`` each tree's share equals
        scikit-learn's ``tree_.compute_feature_importances(normalize=False)``.
    oob_error : float or None
        Bagged: fraction of patches misclassified by the trees that did not draw them (score > 0.5
        means object); None for boosted forests or when no patch was ever out of bag.
    estimators : list or None
        The scikit-learn trees (only with ``keep_estimators=True``).
    in_bag : ndarray of int32, shape (T, N) or None
        Bootstrap counts (bagged) or stage sample masks (boosted), only with
        ``keep_estimators=True``.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> X = rng.normal(size=(60, 4)).astype(np.float32); y = (X[:, 1] > 0).astype(int)
    >>> f = grow_forest(X, y, n_trees=5, depth=2, random_state=0)
    >>> f.node_features.shape, f.leaf_values.shape, f.depth
    ((5, 3), (5, 4), 2)
    """

    mode: str
    node_features: np.ndarray
    node_thresholds: np.ndarray
    leaf_values: np.ndarray
    split_mask: np.ndarray | None = None
    importances: np.ndarray | None = None
    oob_error: float | None = None
    estimators: list | None = field(default=None, repr=False)
    in_bag: np.ndarray | None = field(default=None, repr=False)

    def __post_init__(self):
        if self.mode not in MODES:
            raise ValueError(f"mode must be one of {MODES}, got {self.mode!r}")
        self.node_features = np.ascontiguousarray(self.node_features, dtype=np.int32)
        self.node_thresholds = np.ascontiguousarray(self.node_thresholds, dtype=np.float32)
        self.leaf_values = np.ascontiguousarray(self.leaf_values, dtype=np.float32)
        t, n = self.node_features.shape
        if self.node_thresholds.shape != (t, n) or self.leaf_values.shape != (t, n + 1):
            raise ValueError("node and leaf arrays disagree in shape")
        if n < 1 or (n + 1) & n:
            raise ValueError(f"{n} nodes per tree is not 2**D - 1")
        if self.split_mask is None:
            self.split_mask = _infer_split_mask(self)
        self.split_mask = np.ascontiguousarray(self.split_mask, dtype=bool)

    @property
    def n_trees(self) -> int:
        return int(self.node_features.shape[0])

    @property
    def depth(self) -> int:
        return int(self.node_features.shape[1] + 1).bit_length() - 1

    def reindex(self) -> tuple[np.ndarray, "FlatForest"]:
        """The columns the trees use, and the forest re-indexed into them.

        Returns
        -------
        used : ndarray of int64, shape (F_used,)
            Sorted column indices of real splits (``[0]`` when no tree splits at all, so the
            feature array is never empty).
        forest : FlatForest
            Same trees with ``node_features`` indexing into ``used`` (padding nodes point at 0)
            and ``importances`` restricted to ``used``.

        Examples
        --------
        >>> f = FlatForest("bagged", [[7, 3, 7]], [[0.5, 1, 2]], [[0, 0, 1, 1]])
        >>> used, g = f.reindex()
        >>> used.tolist(), g.node_features.tolist()
        ([3, 7], [[1, 0, 1]])
        """
        used = np.unique(self.node_features[self.split_mask]).astype(np.int64)
        if used.size == 0:
            used = np.zeros(1, np.int64)
        nf = np.searchsorted(used, self.node_features).astype(np.int32)
        nf[~self.split_mask] = 0
        nf = np.minimum(nf, used.size - 1)
        imp = None if self.importances is None else np.asarray(self.importances)[used]
        return used, replace(self, node_features=nf, importances=imp, estimators=None, in_bag=None)


def _infer_split_mask(flat: FlatForest) -> np.ndarray:
    """Padding nodes are the ones whose two subtrees are the same (feature 0, threshold 0)."""
    t, n = flat.node_features.shape
    d = flat.depth
    mask = np.ones((t, n), bool)
    for i in range(n):
        level = (i + 1).bit_length() - 1
        span = 1 << (d - level)  # leaves under node i
        first = (i + 1) * span - (n + 1)
        left = flat.leaf_values[:, first : first + span // 2]
        right = flat.leaf_values[:, first + span // 2 : first + span]
        pad = (flat.node_features[:, i] == 0) & (flat.node_thresholds[:, i] == 0) & (left == right).all(1)
        mask[:, i] = ~pad
    return mask


def float32_thresholds(thresholds) -> np.ndarray:
    """The largest float32 not above each float64 threshold.

    With it, ``x <= t32`` equals ``x <= t64`` for every float32 ``x``: a plain cast rounds to the
    nearest float32 and may round up, past a float32 value that should go right.

    Examples
    --------
    >>> a = np.nextafter(np.float32(1), np.float32(2)); b = np.nextafter(a, np.float32(2))
    >>> mid = (float(a) + float(b)) / 2   # halfway; a plain cast rounds to the even one, b
    >>> bool(np.float32(mid) == b), bool(float32_thresholds([mid])[0] == a)
    (True, True)
    """
    t64 = np.asarray(thresholds, dtype=np.float64)
    with np.errstate(over="ignore"):
        t32 = t64.astype(np.float32)
    up = t32.astype(np.float64) > t64
    t32[up] = np.nextafter(t32[up], np.float32(-np.inf))
    return t32


def flatten_tree(estimator, depth: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Export a fitted scikit-learn tree into complete heap-ordered arrays of depth ``depth``.

    Parameters
    ----------
    estimator : DecisionTreeClassifier or DecisionTreeRegressor
        Fitted with ``max_depth <= depth``; a classifier must have ``classes_ == [0, 1]`` (its leaf
        value is the class-1 fraction, i.e. ``predict_proba[:, 1]``), a regressor one output.
    depth : int

    Returns
    -------
    features : ndarray of int32, shape (2**depth - 1,)
    thresholds : ndarray of float32, shape (2**depth - 1,)
    leaves : ndarray of float32, shape (2**depth,)
    split_mask : ndarray of bool, shape (2**depth - 1,)

    Examples
    --------
    >>> X = np.array([[0.0], [1.0], [2.0], [3.0]], np.float32)
    >>> t = DecisionTreeClassifier(max_depth=2).fit(X, [0, 0, 1, 1])
    >>> f, thr, leaves, m = flatten_tree(t, 2)
    >>> thr.tolist(), leaves.tolist(), m.tolist()     # root is the only split; both sides padded
    ([1.5, 0.0, 0.0], [0.0, 0.0, 1.0, 1.0], [True, False, False])
    """
    tree = estimator.tree_
    n_nodes = (1 << depth) - 1
    if tree.max_depth > depth:
        raise ValueError(f"tree of depth {tree.max_depth} does not fit depth {depth}")
    if hasattr(estimator, "classes_"):
        if list(np.asarray(estimator.classes_).tolist()) != [0, 1]:
            raise ValueError("classifier trees must have classes [0, 1]")
        value = tree.value[:, 0, 1].astype(np.float64)
    else:
        value = tree.value[:, 0, 0].astype(np.float64)
    left, right = tree.children_left, tree.children_right
    sk_feature = tree.feature
    sk_threshold = float32_thresholds(tree.threshold)

    features = np.zeros(n_nodes, np.int32)
    thresholds = np.zeros(n_nodes, np.float32)
    leaves = np.zeros(n_nodes + 1, np.float32)
    mask = np.zeros(n_nodes, bool)
    # walk (scikit-learn node, heap index) pairs; a leaf above the last level fills both children
    stack = [(0, 0)]
    while stack:
        node, i = stack.pop()
        if i >= n_nodes:
            leaves[i - n_nodes] = value[node]
            continue
        if left[node] == -1:  # a leaf above the last level: pad
            stack.append((node, 2 * i + 1))
            stack.append((node, 2 * i + 2))
            continue
        features[i] = sk_feature[node]
        thresholds[i] = sk_threshold[node]
        mask[i] = True
        stack.append((left[node], 2 * i + 1))
        stack.append((right[node], 2 * i + 2))
    if not np.isfinite(thresholds).all():
        raise ValueError("a tree threshold is not finite: feature values must be finite")
    return features, thresholds, leaves, mask


def forest_leaves(flat, X, chunk: int = 8192) -> np.ndarray:
    """Leaf reached in every tree by every row of ``X`` (numpy reference).

    Parameters
    ----------
    flat : FlatForest or Model-like
        Anything with ``node_features``, ``node_thresholds``, ``leaf_values``.
    X : ndarray of float32, shape (N, F)
        Feature values; ``node_features`` index its columns (any memory order).
    chunk : int
        Rows per block (bounds temporary memory to about ``chunk * T * 24`` bytes).

    Returns
    -------
    ndarray of intp, shape (N, T)
        Leaf index in ``0 .. 2**D - 1``.

    Examples
    --------
    >>> f = FlatForest("bagged", [[0, 0, 0]], [[0.5, 0.25, 0.75]], [[0, .2, .6, 1]])
    >>> forest_leaves(f, np.array([[0.2], [0.3], [0.7], [0.9]], np.float32)).ravel().tolist()
    [0, 1, 2, 3]
    """
    nf = np.asarray(flat.node_features)
    thr = np.asarray(flat.node_thresholds)
    t, n_nodes = nf.shape
    depth = (n_nodes + 1).bit_length() - 1
    X = np.asarray(X)
    n = X.shape[0]
    out = np.empty((n, t), np.intp)
    tcols = np.arange(t)[None, :]
    for a in range(0, n, chunk):
        b = min(n, a + chunk)
        rows = np.arange(a, b)[:, None]
        idx = np.zeros((b - a, t), np.intp)
        for _ in range(depth):
            x = X[rows, nf[tcols, idx]]
            idx = 2 * idx + 1 + (x > thr[tcols, idx])
        out[a:b] = idx - n_nodes
    return out


def forest_leaf_scores(flat, X) -> np.ndarray:
    """The leaf value every row of ``X`` gets from every tree: float32 (N, T). Their cumulative
    sum in float64, in any order of the trees, is :func:`forest_running_scores` of the forest
    with its trees in that order.

    >>> f = FlatForest("bagged", [[0], [0]], [[0.5], [0.0]], [[0, 1], [0.25, 0.75]])
    >>> forest_leaf_scores(f, np.array([[0.2], [0.9]], np.float32)).tolist()
    [[0.0, 0.75], [1.0, 0.75]]
    """
    leaves = forest_leaves(flat, X)
    lv = np.asarray(flat.leaf_values, dtype=np.float32)
    return lv[np.arange(lv.shape[0])[None, :], leaves]


def forest_running_scores(flat, X) -> np.ndarray:
    """Running scores ``s_t`` after each tree: float32 leaf values summed in float64, tree order.

    Parameters
    ----------
    flat : FlatForest or Model-like
    X : ndarray of float32, shape (N, F)

    Returns
    -------
    ndarray of float64, shape (N, T)

    Examples
    --------
    >>> f = FlatForest("bagged", [[0], [0]], [[0.5], [0.0]], [[0, 1], [0.25, 0.75]])
    >>> forest_running_scores(f, np.array([[0.2], [0.9]], np.float32)).tolist()
    [[0.0, 0.75], [1.0, 1.75]]
    """
    return np.cumsum(forest_leaf_scores(flat, X), axis=1, dtype=np.float64)


#: Smallest boosting weight, relative to the mean weight 1.
BOOST_WEIGHT_FLOOR = 1e-10


def final_score(mode: str, total, n_trees: int, temperature: float = 1.0) -> np.ndarray:
    """Running score after the last tree -> score in 0..1 (float64).

    Bagged: ``total / n_trees``. Boosted: ``1 / (1 + exp(-2 total / temperature))``, the logistic
    link of boosting with a temperature (see :func:`detector.cascade.fit_temperature`) so that confident scores do not
    all round to 1.

    Examples
    --------
    >>> final_score("bagged", [3.0], 4).tolist(), final_score("boosted", [0.0], 4).tolist()
    ([0.75], [0.5])
    >>> final_score("boosted", [1.0], 4, temperature=2.0).tolist() == final_score("boosted", [0.5], 4).tolist()
    True
    """
    total = np.asarray(total, dtype=np.float64)
    if mode == "bagged":
        return total / n_trees
    with np.errstate(over="ignore"):
        return 1.0 / (1.0 + np.exp(-2.0 * total / float(temperature)))


def forest_score(flat, X) -> np.ndarray:
    """The forest's score in 0..1 for every row of ``X`` (no early exit).

    Bagged: mean leaf object fraction ``s_T / T``. Boosted: ``1 / (1 + exp(-2 s_T))``, the
    logistic link of Gentle/Real AdaBoost (Friedman, Hastie and Tibshirani, Ann. Statist. 2000).

    Parameters
    ----------
    flat : FlatForest or Model-like (with ``mode``)
    X : ndarray of float32, shape (N, F)

    Returns
    -------
    ndarray of float64, shape (N,)

    Examples
    --------
    >>> f = FlatForest("bagged", [[0], [0]], [[0.5], [0.0]], [[0, 1], [0.25, 0.75]])
    >>> forest_score(f, np.array([[0.2], [0.9]], np.float32)).tolist()
    [0.375, 0.875]
    """
    running = forest_running_scores(flat, X)
    return final_score(flat.mode, running[:, -1], running.shape[1])


# ---------------------------------------------------------------------------------------------
# binned growing


def _column_cuts(v: np.ndarray, max_bins: int) -> tuple[np.ndarray, np.ndarray]:
    """Plain-numpy twin of :func:`_cut_pairs_kernel` for one sorted sample: (low, high) pairs."""
    distinct = v[np.r_[True, v[1:] != v[:-1]]]
    if distinct.size <= max_bins:
        return distinct[:-1], distinct[1:]
    q = np.unique(v[(np.arange(1, max_bins) * v.size) // max_bins])
    above = np.searchsorted(distinct, q, side="right")
    keep = above < distinct.size
    return q[keep], distinct[above[keep]]


@numba.njit(cache=True, nogil=True)
def _cut_pairs_kernel(samples, max_bins, low, high, counts):
    """For every sorted row of ``samples``: the (value, next distinct value) pairs to cut between.

    Every pair of consecutive distinct values when there are at most ``max_bins`` of them; else the
    ``k / max_bins`` quantiles (k = 1 .. max_bins - 1, repeats dropped), each with the next distinct
    value above it.
    """
    for j in range(samples.shape[0]):
        v = samples[j]
        m = v.shape[0]
        distinct = 1
        for i in range(1, m):
            if v[i] != v[i - 1]:
                distinct += 1
        c = 0
        if distinct <= max_bins:
            for i in range(1, m):
                if v[i] != v[i - 1]:
                    low[j, c] = v[i - 1]
                    high[j, c] = v[i]
                    c += 1
        else:
            for k in range(1, max_bins):
                p = (k * m) // max_bins
                q = v[p]
                if c > 0 and q <= low[j, c - 1]:
                    continue
                r = p + 1
                while r < m and v[r] == q:
                    r += 1
                if r >= m:
                    break
                low[j, c] = q
                high[j, c] = v[r]
                c += 1
        counts[j] = c


def quantile_cuts(X, max_bins: int = 256, sample_rows: int = 4096, random_state=None, block: int = 1024):
    """Per-column cut points between at most ``max_bins`` quantile bins.

    Columns with at most ``max_bins`` distinct values in the sample get a cut between every two
    consecutive distinct values; others get cuts after the ``k / max_bins`` quantiles. Every cut is
    the largest float32 not above the midpoint between a sampled value and the next distinct one,
    so it lies in a gap of the data (as scikit-learn's thresholds do).

    Parameters
    ----------
    X : ndarray of float32, shape (N, F)
    max_bins : int in 2..256, default=256
    sample_rows : int, default=4096
        Rows (drawn without replacement) the quantiles are taken from.
    random_state : None, int or numpy generator
    block : int
        Columns sorted at once (bounds the temporary copy to ``sample_rows * block`` values).

    Returns
    -------
    cuts : ndarray of float32, shape (F, W)
        Increasing cut points per column (at most ``max_bins - 1``), padded with ``+inf`` to ``W``,
        the smallest power of two ``>= max_bins``.
    n_cuts : ndarray of int32, shape (F,)

    Examples
    --------
    >>> X = np.array([[0.0], [1.0], [1.0], [3.0]], np.float32)
    >>> cuts, n = quantile_cuts(X, max_bins=4)
    >>> cuts[0, : n[0]].tolist(), bool(np.isinf(cuts[0, n[0]:]).all())
    ([0.5, 2.0], True)
    """
    X = np.asarray(X)
    if not 2 <= int(max_bins) <= 256:
        raise ValueError(f"max_bins must be in 2..256, got {max_bins!r}")
    n, n_features = X.shape
    rows = np.arange(n)
    if n > sample_rows:
        rows = np.sort(np.random.default_rng(seed_sequence(random_state)).choice(n, sample_rows, replace=False))
    low = np.zeros((n_features, max_bins - 1), np.float32)
    high = np.zeros((n_features, max_bins - 1), np.float32)
    n_cuts = np.zeros(n_features, np.int32)
    for a in range(0, n_features, block):
        b = min(n_features, a + block)
        sample = np.ascontiguousarray(X[rows, a:b].T)
        sample.sort(axis=1)
        _cut_pairs_kernel(sample, int(max_bins), low[a:b], high[a:b], n_cuts[a:b])
    filled = np.arange(max_bins - 1)[None, :] < n_cuts[:, None]
    cuts = np.full((n_features, _cut_width(max_bins)), np.inf, np.float32)
    cuts[:, : max_bins - 1][filled] = float32_thresholds((low[filled].astype(np.float64) + high[filled]) / 2)
    return cuts, n_cuts


def _cut_width(max_bins: int) -> int:
    return 1 << (int(max_bins) - 1).bit_length()


def quantile_cuts_numpy(X, max_bins: int = 256, sample_rows: int = 4096, random_state=None):
    """Plain-numpy twin of :func:`quantile_cuts` (same rows, same cuts)."""
    X = np.asarray(X)
    n, n_features = X.shape
    rows = np.arange(n)
    if n > sample_rows:
        rows = np.sort(np.random.default_rng(seed_sequence(random_state)).choice(n, sample_rows, replace=False))
    cuts = np.full((n_features, _cut_width(max_bins)), np.inf, np.float32)
    n_cuts = np.zeros(n_features, np.int32)
    for f in range(n_features):
        lo, hi = _column_cuts(np.sort(X[rows, f]), max_bins)
        cuts[f, : lo.size] = float32_thresholds((lo.astype(np.float64) + hi) / 2)
        n_cuts[f] = lo.size
    return cuts, n_cuts


#: Rows searched together by the binning kernel: their independent searches overlap in the CPU.
BIN_ROWS = 256


@numba.njit(cache=True, nogil=True)
def _bin_columns_kernel(columns, cuts, start, stop):
    """Replace columns[f, i] by the number of cuts[f] below it, for f in start..stop.

    Branch-free binary search over the ``+inf``-padded row of cuts, whose length ``W`` is a power
    of two: ``log2(W)`` halving steps, each a ``select``; the steps run over ``BIN_ROWS`` rows at a
    time so that independent searches overlap (about 3 times faster than one row after another).
    NaN compares false and becomes bin 0; callers check finiteness first.
    """
    width = cuts.shape[1]
    n = columns.shape[1]
    bases = np.zeros(BIN_ROWS, np.int64)
    for f in range(start, stop):
        c = cuts[f]
        row = columns[f]
        for a in range(0, n, BIN_ROWS):
            m = min(BIN_ROWS, n - a)
            for r in range(m):
                bases[r] = 0
            half = width >> 1
            while half > 0:
                for r in range(m):
                    bases[r] += half if c[bases[r] + half - 1] < row[a + r] else 0
                half >>= 1
            for r in range(m):
                row[a + r] = bases[r]


def bin_columns(X, cuts, n_cuts=None, n_jobs=None) -> np.ndarray:
    """Overwrite ``X`` (N, F) with bin indices in place: bin = number of cuts below the value.

    So ``x <= cuts[f, k]`` exactly when ``bin <= k``. Compiled loop over columns, run on
    ``n_jobs`` threads; :func:`bin_columns_numpy` is its plain-numpy twin.

    Parameters
    ----------
    X : ndarray of float32, shape (N, F)
        Fortran order is fastest (each column contiguous).
    cuts : ndarray of float32, shape (F, W)
        Increasing per row, padded with ``+inf`` to a power-of-two width ``W`` larger than the
        number of cuts (as :func:`quantile_cuts` returns them).
    n_cuts : ignored
        Accepted for symmetry with :func:`quantile_cuts`' return value.
    n_jobs : int, optional

    Examples
    --------
    >>> X = np.array([[0.0], [1.0], [1.0], [3.0]], np.float32)
    >>> bin_columns(X, *quantile_cuts(X, max_bins=4)).ravel().tolist()
    [0.0, 1.0, 1.0, 2.0]
    """
    columns = X.T
    cuts = np.ascontiguousarray(cuts, dtype=np.float32)
    width = cuts.shape[1]
    if width & (width - 1) or width < 2:
        raise ValueError(f"cuts must be padded to a power-of-two width >= 2, got {width}")
    F = columns.shape[0]
    workers = min(_n_jobs(n_jobs), max(1, F))
    bounds = np.linspace(0, F, workers + 1).astype(int)
    if workers == 1:
        _bin_columns_kernel(columns, cuts, 0, F)
    else:
        with ThreadPoolExecutor(max_workers=workers) as pool:
            list(pool.map(lambda k: _bin_columns_kernel(columns, cuts, bounds[k], bounds[k + 1]),
                          range(workers)))
    return X


def bin_columns_numpy(X, cuts, n_cuts=None) -> np.ndarray:
    """Plain-numpy twin of :func:`bin_columns` (``np.searchsorted`` per column)."""
    for f in range(X.shape[1]):
        X[:, f] = np.searchsorted(cuts[f], X[:, f], side="left")
    return X


def thresholds_from_bins(forest: FlatForest, cuts) -> FlatForest:
    """Turn thresholds on bin indices into thresholds on feature values.

    A tree grown on bin indices splits at some ``t`` between two integers; a bin goes left when
    ``bin <= floor(t)``, i.e. when the value is ``<= cuts[f, floor(t)]``.

    Examples
    --------
    >>> f = FlatForest("bagged", [[0]], [[1.5]], [[0, 1]])
    >>> thresholds_from_bins(f, np.array([[0.5, 2.0, np.inf]], np.float32)).node_thresholds.tolist()
    [[2.0]]
    """
    thr = forest.node_thresholds.copy()
    m = forest.split_mask
    k = np.floor(thr[m]).astype(np.int64)
    values = np.asarray(cuts)[forest.node_features[m], k]
    if not np.isfinite(values).all():
        raise ValueError("a tree splits above the last cut of its feature")
    thr[m] = values
    return replace(forest, node_thresholds=thr)


def _check_finite(X: np.ndarray, block: int = 256) -> bool:
    """All values finite, checked in column (Fortran) or row (C) blocks to bound temporaries."""
    if X.flags.f_contiguous and not X.flags.c_contiguous:
        return all(np.isfinite(X[:, a : a + block]).all() for a in range(0, X.shape[1], block))
    return all(np.isfinite(X[a : a + block]).all() for a in range(0, X.shape[0], block))


def _validate(X, y, mode, n_trees, depth, features_per_node, sample_fraction):
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
    if mode not in MODES:
        raise ValueError(f"mode must be one of {MODES}, got {mode!r}")
    if not isinstance(n_trees, numbers.Integral) or n_trees < 1:
        raise ValueError(f"n_trees must be a positive integer, got {n_trees!r}")
    if not isinstance(depth, numbers.Integral) or not 1 <= depth <= MAX_DEPTH:
        raise ValueError(f"depth must be an integer in 1..{MAX_DEPTH}, got {depth!r}")
    if features_per_node is None:
        features_per_node = max(1, int(round(np.sqrt(n_features))))
    if not isinstance(features_per_node, numbers.Integral) or features_per_node < 1:
        raise ValueError(f"features_per_node must be a positive integer, got {features_per_node!r}")
    features_per_node = int(min(features_per_node, n_features))
    if not 0.0 < float(sample_fraction) <= 1.0:
        raise ValueError(f"sample_fraction must be in (0, 1], got {sample_fraction!r}")
    if n_features < 1:
        raise ValueError("X has no feature columns")
    if X.dtype != np.uint8 and not _check_finite(X):
        raise ValueError("X holds non-finite feature values")
    return X, y, int(n_trees), int(depth), features_per_node, float(sample_fraction)


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
        the compiled histogram grower (:mod:`detector.histogram_trees`), for bin indices 0..255
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
    X, y, n_trees, depth, fpn, fraction = _validate(
        X, y, mode, n_trees, depth, features_per_node, sample_fraction
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
        entropy_tree = partial(DecisionTreeClassifier, criterion="entropy")

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
        squared_tree = partial(DecisionTreeRegressor, criterion="squared_error")
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
            known = store(t, grow_one(tree_ss, stage_weight, signed, SQUARED_ERROR, squared_tree, node_pool))
            if in_bag is not None:
                in_bag[t] = stage_weight > 0
            f_t = leaf_values_of(t, known).astype(np.float64)
            weights = weights * np.exp(-signed * f_t)
            weights /= weights.mean()
            # keep every weight above a floor: after hundreds of stages the easy patches' weights
            # would underflow to 0, and a leaf holding only such patches has no defined value
            # (weight trimming; Friedman, Hastie and Tibshirani 2000, section 9)
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


# ---------------------------------------------------------------------------------------------
# out-of-bag scores


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


def oob_scores(
    X,
    y,
    *,
    n_trees: int = 200,
    depth: int = 2,
    features_per_node: int | None = None,
    sample_fraction: float = 1.0,
    random_state=None,
    progress=None,
    n_jobs: int | None = None,
) -> tuple[np.ndarray, np.ndarray, FlatForest]:
    """Grow a bagged forest and score every patch with the trees that did not draw it.

    Parameters
    ----------
    X : ndarray of float32, shape (N, F)
    y : ndarray of int, shape (N,)
        1 for object patches, 0 for background.
    n_trees, depth, features_per_node, sample_fraction, random_state, progress, n_jobs
        As for :func:`grow_forest` (``mode="bagged"``).

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
    forest = grow_forest(X, y, mode="bagged", n_trees=n_trees, depth=depth,
                         features_per_node=features_per_node, sample_fraction=sample_fraction,
                         random_state=random_state, progress=progress, n_jobs=n_jobs,
                         keep_estimators=True)
    scores, trees_out = forest_oob_scores(forest, X)
    return scores, trees_out, forest


__all__ += ["forest_oob_scores", "oob_scores"]
