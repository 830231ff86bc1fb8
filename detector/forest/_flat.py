"""Flat trees and their evaluation: the complete binary trees as arrays (see :mod:`detector.forest`,
"Flat trees"), their export from scikit-learn, the leaves and running scores of a forest on
feature rows, and the final score in 0..1."""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

__all__ = [
    "MODES", "MAX_DEPTH", "FlatForest", "float32_thresholds", "flatten_tree", "forest_leaves",
    "forest_leaf_scores", "forest_running_scores", "final_score", "forest_score", "tree_depth",
]

MODES = ("bagged", "boosted")
MAX_DEPTH = 12


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
    >>> from detector.forest import grow_forest
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
        return tree_depth(self.node_features)

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


def tree_depth(node_features: np.ndarray) -> int:
    """The depth ``D`` of flat trees from their ``(T, 2**D - 1)`` node array.

    >>> tree_depth(np.zeros((5, 7), np.int32))
    3
    """
    return int(node_features.shape[1] + 1).bit_length() - 1


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
    >>> from sklearn.tree import DecisionTreeClassifier
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
