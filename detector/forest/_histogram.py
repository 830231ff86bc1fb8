"""Growing one shallow tree on binned features with per-node histograms (compiled).

The route :func:`detector.forest.grow_forest` takes with ``grower="histogram"``. It grows the
trees scikit-learn's ``DecisionTreeClassifier(criterion="entropy")`` and
``DecisionTreeRegressor(criterion="squared_error")`` (``splitter="best"``, ``max_depth=D``,
``max_features=K``) grow on the same bin indices and weights, only faster: instead of sorting the
node's samples for every candidate feature, it adds each sample's weight and weighted target into
the feature's (at most 256) bins and scans the bins once (the histogram method of LightGBM, Ke et
al., NIPS 2017, and scikit-learn's HistGradientBoosting). Per node, as scikit-learn does:

* samples with weight 0 take no part (bootstrap counts of 0, patches outside a boosting stage);
* a node with fewer than 2 samples or an impurity ``<= eps`` (float64) is a leaf;
* ``K`` features are drawn without replacement in random order; features with a single non-empty
  bin in the node cannot split it, and when every drawn feature is like that, more are drawn (in
  random order) until one can or none is left;
* every split between two consecutive non-empty bins ``k < k'`` is scored by the criterion's proxy
  (:mod:`detector.forest`); the largest wins, the first of equal ones in draw order;
* the threshold on bin indices is ``(k + k') / 2``, scikit-learn's midpoint between the two values
  (:func:`detector.forest.thresholds_from_bins` maps it back to a feature value);
* a leaf's value is the node's weighted mean target (the object fraction for classification);
* a feature's importance gains ``W * I - W_l * I_l - W_r * I_r`` at each of its splits (``I`` the
  node impurity: entropy in bits, or the weighted variance).

The random draws come from the tree's own :class:`numpy.random.Generator`, so a seed fixes the
tree whatever the number of threads; they differ from scikit-learn's own stream, so the two routes
grow the same trees only where no draw is involved (``K`` = all features, tested).
"""

from __future__ import annotations

import numpy as np

from detector.forest import _tree_kernels as _k

__all__ = ["grow_histogram_tree", "COMPILED", "NUMPY"]

#: ``(node_sums, best_split)`` of the compiled route and of its plain-numpy twin.
COMPILED = (_k.node_sums, _k.best_split)
NUMPY = (_k.node_sums_numpy, _k.best_split_numpy)
EPSILON = np.finfo(np.float64).eps


def _impurity(criterion, w, s, q):
    """Node impurity from its sums, as scikit-learn's ``node_impurity``."""
    if criterion == _k.SQUARED_ERROR:
        mean = s / w
        return q / w - mean * mean
    h = 0.0
    for c in (s / w, (w - s) / w):
        if c > 0.0:
            h -= c * (np.log(c) / _k._LN2)
    return float(h)


def _split_in_parts(split, executor, parts, bins, samples, weight, target, candidates, criterion, w, s,
                    scratch):
    """:func:`best_split` over every candidate, the candidates cut into ``parts`` consecutive runs
    examined at once on ``executor``'s threads. Their results combine in candidate order, a later
    run's best winning only when strictly better, which is what one run over all of them does."""
    runs = np.array_split(candidates, parts)
    results = list(executor.map(
        lambda k: split(bins, samples, weight, target, runs[k], runs[k].size, criterion, w, s, *scratch[k]),
        range(parts)))
    best = results[0]
    for r in results[1:]:
        if r[0] > best[0]:
            best = r
    return (best[0], best[1], best[2], best[3], sum(r[4] for r in results), sum(r[5] for r in results))


def grow_histogram_tree(bins, weight, target, *, criterion, depth, features_per_node, rng,
                        kernels=COMPILED, executor=None, parts=1):
    """Grow one complete tree of depth ``depth`` on binned features.

    Parameters
    ----------
    bins : ndarray of uint8, shape (F, N)
        Bin index of every feature (row) for every sample (column), C-contiguous.
    weight : ndarray of float64, shape (N,)
        Sample weights (>= 0; samples of weight 0 take no part).
    target : ndarray of float64, shape (N,)
        0/1 class for ``ENTROPY``, the regression target for ``SQUARED_ERROR``.
    criterion : int
        :data:`detector.forest._tree_kernels.ENTROPY` or
        :data:`detector.forest._tree_kernels.SQUARED_ERROR`.
    depth : int
    features_per_node : int
    rng : numpy.random.Generator
        Draws the candidate features of every node.
    kernels : tuple
        :data:`COMPILED` or :data:`NUMPY` (the twin, for tests).
    executor : concurrent.futures.Executor, optional
        With ``parts > 1``: threads that examine ``parts`` runs of a node's candidates at once
        (the compiled loops release the GIL); the tree does not depend on it.
    parts : int, default=1

    Returns
    -------
    features : int32 (2**depth - 1,)
    thresholds : float32 (2**depth - 1,)
        On bin indices: ``(k + k') / 2``.
    leaves : float32 (2**depth,)
    split_mask : bool (2**depth - 1,)
    gains : list of (feature, weighted impurity decrease)
        One entry per split, in heap order.
    leaf_of : intp (N,)
        The leaf each sample of positive weight ends in (below a leaf above the last level: the
        first of its equal leaves); -1 for samples of weight 0.

    Examples
    --------
    >>> bins = np.array([[0, 0, 3, 3], [1, 2, 1, 2]], np.uint8)
    >>> f, thr, leaves, mask, gains, leaf_of = grow_histogram_tree(
    ...     bins, np.ones(4), np.array([0., 0., 1., 1.]), criterion=1, depth=1,
    ...     features_per_node=2, rng=np.random.default_rng(0))
    >>> f.tolist(), thr.tolist(), leaves.tolist(), gains   # 1 bit of information on 4 samples
    ([0], [1.5], [0.0, 1.0], [(0, 4.0)])
    """
    sums, split = kernels
    n_features = bins.shape[0]
    n_nodes = (1 << depth) - 1
    features = np.zeros(n_nodes, np.int32)
    thresholds = np.zeros(n_nodes, np.float32)
    leaves = np.zeros(n_nodes + 1, np.float32)
    mask = np.zeros(n_nodes, bool)
    gains = []
    leaf_of = np.full(weight.shape[0], -1, np.intp)
    root = np.flatnonzero(weight > 0).astype(np.int64)
    parts = max(1, min(int(parts), features_per_node)) if executor is not None else 1
    scratch = [(np.empty(_k.N_BINS), np.empty(_k.N_BINS), np.empty(root.size), np.empty(root.size))
               for _ in range(parts)]
    everything = np.arange(n_features, dtype=np.int64)
    # level by level in heap order; a node's samples (None below a leaf), and its sums
    level = [(0, root, sums(root, weight, target))]
    root_w = level[0][2][0]
    while level:
        below = []
        for i, samples, (w, s, q) in level:
            if i >= n_nodes:  # a leaf of the last level
                leaves[i - n_nodes] = s / w
                leaf_of[samples] = i - n_nodes
                continue
            impurity = _impurity(criterion, w, s, q)
            found = None
            if samples.size >= 2 and impurity > EPSILON:
                candidates = rng.choice(n_features, features_per_node, replace=False).astype(np.int64)
                if parts > 1:
                    found = _split_in_parts(split, executor, parts, bins, samples, weight, target,
                                            candidates, criterion, w, s, scratch)
                else:
                    found = split(bins, samples, weight, target, candidates, features_per_node,
                                  criterion, w, s, *scratch[0])
                if found[5] == 0 and features_per_node < n_features:
                    # every drawn feature is constant here: draw on until one is not
                    rest = rng.permutation(np.setdiff1d(everything, candidates, assume_unique=True))
                    found = split(bins, samples, weight, target, rest, 1, criterion, w, s, *scratch[0])
                if found[1] < 0:
                    found = None
            if found is not None:
                f, left_bin, right_bin = int(found[1]), int(found[2]), int(found[3])
                go_left = bins[f][samples] <= left_bin
                left, right = samples[go_left], samples[~go_left]
                left_sums, right_sums = sums(left, weight, target), sums(right, weight, target)
                i_l = _impurity(criterion, *left_sums)
                i_r = _impurity(criterion, *right_sums)
                w_l, w_r = left_sums[0], right_sums[0]
                decrease = impurity - w_r / w * i_r - w_l / w * i_l
                if decrease * (w / root_w) + EPSILON < 0.0:  # scikit-learn's improvement check
                    found = None
            if found is None:  # a leaf above the last level: every leaf below it holds its value
                span = 1 << (depth - ((i + 1).bit_length() - 1))
                first = (i + 1) * span - (n_nodes + 1)
                leaves[first : first + span] = s / w
                leaf_of[samples] = first
                continue
            features[i] = f
            thresholds[i] = left_bin / 2.0 + right_bin / 2.0
            mask[i] = True
            gains.append((f, w * impurity - w_l * i_l - w_r * i_r))
            below.append((2 * i + 1, left, left_sums))
            below.append((2 * i + 2, right, right_sums))
        level = below
    return features, thresholds, leaves, mask, gains, leaf_of

