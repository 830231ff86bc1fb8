"""The compiled histogram grower against scikit-learn's tree learners and against its numpy twin.

Reference library: scikit-learn's DecisionTreeClassifier (criterion="entropy") and
DecisionTreeRegressor (criterion="squared_error"), grown by ``grow_forest(grower="sklearn")`` on
the same bin indices with the same bootstrap counts or boosting weights. Where every feature is a
candidate at every node (``features_per_node`` = all), no random draw is involved and the two
routes must grow the same trees: same features, same thresholds, same leaf values (float32).
"""

from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from detector.forest import _tree_kernels as K
from detector.forest import (FlatForest, bin_columns, forest_leaves, grow_forest, quantile_cuts,
                             thresholds_from_bins)
from detector.forest import grow_histogram_tree
from detector.forest._histogram import COMPILED, NUMPY


def _binned(n=2000, f=8, seed=0, max_bins=64):
    """Continuous features in quantile bins. With nodes of hundreds of samples no two candidate
    splits of a node tie (small nodes tie often: several features may cut off the same few
    samples, and then only the order of the random draw decides)."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, f))
    y = ((X[:, 1] - 0.6 * X[:, 4] + 0.5 * rng.normal(size=n)) > 0.1).astype(np.int64)
    X = np.asfortranarray(X, dtype=np.float32)
    cuts, n_cuts = quantile_cuts(X, max_bins=max_bins, random_state=0)
    return X, bin_columns(X.copy(order="F"), cuts, n_cuts), y, cuts


def _without_idle_splits(forest):
    """The forest with every split whose leaves below are all equal made padding (feature 0,
    threshold 0): it changes no prediction. scikit-learn makes such splits when rounding leaves a
    pure node an impurity above its tolerance (seen: 4.7e-14 on a node of 219 targets +1, split
    into two leaves of value 1); the histogram grower computes a pure node's impurity as exactly 0
    and makes it a leaf."""
    f, thr, mask = forest.node_features.copy(), forest.node_thresholds.copy(), forest.split_mask.copy()
    n_nodes = f.shape[1]
    for i in range(n_nodes):
        span = 1 << (forest.depth - ((i + 1).bit_length() - 1))
        first = (i + 1) * span - (n_nodes + 1)
        below = forest.leaf_values[:, first : first + span]
        idle = (below == below[:, :1]).all(axis=1)
        f[idle, i], thr[idle, i], mask[idle, i] = 0, 0.0, False
    return f, thr, mask


def _assert_same_forest(a, b, Xb=None, in_bag=None):
    """Equal trees: leaves, and every split's feature and threshold. Given the bins and the
    per-tree sample counts, a split may differ where the two splits cut the node's samples the
    same way: a tie between features that only the order of the random draw breaks (small nodes:
    several features cut off the same few samples). Returns the number of such ties."""
    (fa, ta, ma), (fb, tb, mb) = _without_idle_splits(a), _without_idle_splits(b)
    np.testing.assert_array_equal(ma, mb)
    mirrored = np.flatnonzero((a.leaf_values != b.leaf_values).any(axis=1))
    if len(mirrored):
        # a tie between two splits that cut the node's samples into the same two sets, the other
        # way round (equal gains, broken by the last bit of a sum that differs between builds of
        # the libraries): the leaves below swap places and every sample still gets the same leaf
        # value, so the trees compute the same function
        assert Xb is not None, f"trees {mirrored.tolist()} have other leaves"
        from detector.forest._flat import forest_leaf_scores

        np.testing.assert_array_equal(forest_leaf_scores(a, Xb)[:, mirrored],
                                      forest_leaf_scores(b, Xb)[:, mirrored])
    ties = 0
    same = (fa == fb) & (ta == tb)
    same[mirrored] = True  # counted once below, as one tie each
    for t, i in np.argwhere(~same):
        assert Xb is not None, f"tree {t} node {i}: feature {fa[t, i]} at {ta[t, i]} against {fb[t, i]} at {tb[t, i]}"
        inside = in_bag[t] > 0
        node = i
        while node > 0:  # the node's samples: walk up the heap, applying each ancestor's test
            parent = (node - 1) // 2
            goes_left = Xb[:, fa[t, parent]] <= ta[t, parent]
            inside &= goes_left if node == 2 * parent + 1 else ~goes_left
            node = parent
        np.testing.assert_array_equal(Xb[inside, fa[t, i]] <= ta[t, i], Xb[inside, fb[t, i]] <= tb[t, i])
        ties += 1
    ties += len(mirrored)
    if ties == 0:
        np.testing.assert_allclose(a.importances, b.importances, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(a.importances.sum(), b.importances.sum(), rtol=1e-9)
    return ties


@pytest.mark.parametrize("depth", [1, 2, 3])
def test_bagged_trees_equal_sklearns_on_the_same_bins(depth):
    X, Xb, y, cuts = _binned(seed=depth)
    kw = dict(mode="bagged", n_trees=10, depth=depth, features_per_node=X.shape[1], random_state=4)
    sk = grow_forest(Xb, y, grower="sklearn", keep_estimators=True, **kw)
    ours = grow_forest(Xb, y, grower="histogram", keep_estimators=True, **kw)
    assert sk.split_mask.sum() > 5 * depth  # real trees, not stumps of padding
    np.testing.assert_array_equal(ours.in_bag, sk.in_bag)
    assert _assert_same_forest(ours, sk, Xb, sk.in_bag) <= sk.split_mask.sum() // 20
    assert ours.oob_error == sk.oob_error
    # and on the feature values, once the thresholds are mapped back
    on_values = thresholds_from_bins(ours, cuts)
    np.testing.assert_array_equal(on_values.node_thresholds, thresholds_from_bins(sk, cuts).node_thresholds)
    np.testing.assert_array_equal(forest_leaves(on_values, X), forest_leaves(ours, Xb))


@pytest.mark.parametrize("fraction", [1.0, 0.6])
@pytest.mark.parametrize("depth", [1, 2, 3])
def test_boosted_trees_equal_sklearns_on_the_same_bins(depth, fraction):
    """Gentle AdaBoost: each stage's weights come from the previous trees' float32 leaves, so equal
    trees stage after stage mean equal weights all along."""
    _, Xb, y, _ = _binned(seed=10 + depth)
    kw = dict(mode="boosted", n_trees=12, depth=depth, features_per_node=Xb.shape[1],
              sample_fraction=fraction, random_state=6)
    sk = grow_forest(Xb, y, grower="sklearn", keep_estimators=True, **kw)
    ours = grow_forest(Xb, y, grower="histogram", keep_estimators=True, **kw)
    np.testing.assert_array_equal(ours.in_bag, sk.in_bag)
    assert _assert_same_forest(ours, sk, Xb, sk.in_bag) <= sk.split_mask.sum() // 20


@pytest.mark.parametrize("fraction, trim", [(1.0, 0.1), (0.6, 0.05), (1.0, 0.3)])
@pytest.mark.parametrize("depth", [1, 2])
def test_trimmed_boosting_equals_sklearns_on_the_same_bins(depth, fraction, trim):
    """The same with weight trimming: the patches a stage leaves out are walked down its tree to be
    reweighted, so both routes must leave out the same patches stage after stage. No tie is
    allowed here: a tie between two splits that cut the stage's patches alike may still send the
    left-out ones different ways, and the weights part from there on (deeper trees, with their
    small nodes, do meet such ties)."""
    _, Xb, y, _ = _binned(seed=10 + depth)
    kw = dict(mode="boosted", n_trees=12, depth=depth, features_per_node=Xb.shape[1],
              sample_fraction=fraction, weight_trim=trim, random_state=6)
    sk = grow_forest(Xb, y, grower="sklearn", keep_estimators=True, **kw)
    ours = grow_forest(Xb, y, grower="histogram", keep_estimators=True, **kw)
    np.testing.assert_array_equal(ours.in_bag, sk.in_bag)
    assert (sk.in_bag == 0).sum() > (1.0 - fraction) * sk.in_bag.size + 12  # patches were trimmed
    assert _assert_same_forest(ours, sk, Xb, sk.in_bag) == 0


def test_uint8_bins_and_float_bins_grow_the_same_forest():
    _, Xb, y, _ = _binned(seed=3)
    a = grow_forest(Xb, y, grower="histogram", n_trees=6, random_state=1)
    b = grow_forest(Xb.astype(np.uint8), y, grower="histogram", n_trees=6, random_state=1)
    _assert_same_forest(a, b)
    # the scikit-learn route takes uint8 bins too (as float32)
    c = grow_forest(Xb.astype(np.uint8), y, n_trees=6, random_state=1)
    _assert_same_forest(c, grow_forest(Xb, y, n_trees=6, random_state=1))


def test_constant_features_are_skipped_as_sklearn_skips_them():
    """Only feature 5 varies. scikit-learn draws on past constant features until one can split
    (``sklearn/tree/_splitter.pyx``), so with one feature per node both routes split on feature 5
    at every node that can split, whatever their (different) random draws."""
    rng = np.random.default_rng(0)
    Xb = np.zeros((300, 9), np.float32)
    Xb[:, 5] = rng.permutation(300) % 40
    y = (Xb[:, 5] + rng.normal(0, 8, 300) > 20).astype(int)
    for mode in ("bagged", "boosted"):
        kw = dict(mode=mode, n_trees=5, depth=3, features_per_node=1, random_state=2)
        sk = grow_forest(Xb, y, grower="sklearn", **kw)
        ours = grow_forest(Xb, y, grower="histogram", **kw)
        assert (ours.node_features[ours.split_mask] == 5).all()
        _assert_same_forest(ours, sk)


def test_same_seed_same_forest_whatever_the_threads():
    _, Xb, y, _ = _binned(n=600, f=30, seed=7)
    kw = dict(mode="bagged", n_trees=16, depth=3, grower="histogram")
    a = grow_forest(Xb, y, random_state=11, n_jobs=1, **kw)
    b = grow_forest(Xb, y, random_state=11, n_jobs=2, **kw)
    c = grow_forest(Xb, y, random_state=12, n_jobs=2, **kw)
    _assert_same_forest(a, b)
    np.testing.assert_array_equal(a.importances, b.importances)
    assert a.oob_error == b.oob_error
    assert not np.array_equal(a.node_features, c.node_features)
    # boosting: the threads share each node's candidates, in runs combined in candidate order
    kw = dict(mode="boosted", n_trees=8, depth=2, grower="histogram", random_state=3)
    _assert_same_forest(grow_forest(Xb, y, n_jobs=1, **kw), grow_forest(Xb, y, n_jobs=3, **kw))


def test_bad_input_for_the_histogram_grower():
    X, _, y, _ = _binned(n=50)
    with pytest.raises(ValueError, match="bin indices 0..255"):
        grow_forest(X, y, grower="histogram")  # raw feature values, not bins
    with pytest.raises(ValueError, match="grower must be one of"):
        grow_forest(X, y, grower="fast")


def _brute_force_root(Xb, weight, target, criterion):
    """Largest weighted impurity decrease over every feature and every cut between non-empty
    bins, written directly from the definitions (weighted variance; entropy in bits)."""
    keep = weight > 0
    Xb, w, t = Xb[keep], weight[keep], target[keep]

    def impurity(m):
        W = w[m].sum()
        mean = (w[m] * t[m]).sum() / W
        if criterion == K.SQUARED_ERROR:
            return (w[m] * (t[m] - mean) ** 2).sum() / W
        p = np.array([mean, 1 - mean])
        p = p[p > 0]
        return -(p * np.log2(p)).sum()

    every = np.ones(len(w), bool)
    parent = impurity(every) * w.sum()
    best = -np.inf
    for f in range(Xb.shape[1]):
        for k in np.unique(Xb[:, f])[:-1]:
            left = Xb[:, f] <= k
            best = max(best, parent - impurity(left) * w[left].sum() - impurity(~left) * w[~left].sum())
    return best


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(2, 60), f=st.integers(1, 6),
       n_bins=st.integers(1, 8), depth=st.integers(1, 3), criterion=st.sampled_from([0, 1]),
       fpn=st.integers(1, 6), zero_weights=st.booleans())
def test_compiled_grower_equals_its_numpy_twin(seed, n, f, n_bins, depth, criterion, fpn, zero_weights):
    """Few bins and small nodes make ties and constant features common: the compiled loops and the
    numpy twin must still take the same decisions, bit for bit."""
    rng = np.random.default_rng(seed)
    bins = rng.integers(0, n_bins, (f, n)).astype(np.uint8) * np.uint8(255 // max(1, n_bins - 1))
    if criterion == K.ENTROPY:
        weight = rng.integers(0 if zero_weights else 1, 4, n).astype(np.float64)
        target = rng.integers(0, 2, n).astype(np.float64)
    else:
        weight = rng.exponential(size=n) * (rng.random(n) > 0.3 if zero_weights else 1)
        target = rng.choice([-1.0, 1.0], n)
    if not (weight > 0).any():
        weight[0] = 1.0
    kw = dict(criterion=criterion, depth=depth, features_per_node=min(fpn, f))
    a = grow_histogram_tree(bins, weight, target, rng=np.random.default_rng(seed), kernels=COMPILED, **kw)
    b = grow_histogram_tree(bins, weight, target, rng=np.random.default_rng(seed), kernels=NUMPY, **kw)
    with ThreadPoolExecutor(2) as pool:  # candidates in runs on threads: the same tree
        c = grow_histogram_tree(bins, weight, target, rng=np.random.default_rng(seed), executor=pool,
                                parts=3, **kw)
    for other in (b, c):
        for x, z in zip(a[:4] + a[5:], other[:4] + other[5:]):
            np.testing.assert_array_equal(x, z)
        assert a[4] == other[4]
    # the leaves the grower reports are the ones the flat tree sends its samples to (by value:
    # below a leaf above the last level all leaves are equal)
    weighted = weight > 0
    flat = FlatForest("bagged", a[0][None], a[1][None], a[2][None], a[3][None])
    reached = forest_leaves(flat, bins.T)[:, 0]
    np.testing.assert_array_equal(a[2][a[5][weighted]], a[2][reached[weighted]])
    assert (a[5][~weighted] == -1).all()
    # with every feature a candidate, the root's split is the best one there is
    if a[3][0] and fpn >= f:
        gain = a[4][0][1]
        assert gain == pytest.approx(_brute_force_root(bins.T, weight, target, criterion), rel=1e-9, abs=1e-12)


@settings(max_examples=60, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(1, 80), f=st.integers(1, 9),
       n_bins=st.integers(1, 256), criterion=st.sampled_from([0, 1]), stop_after=st.integers(1, 9))
def test_best_split_kernel_equals_its_numpy_twin(seed, n, f, n_bins, criterion, stop_after):
    """The compiled split (candidates binned two at a time, then scanned in order: pairs, a
    single at the end, stops between the two of a pair) against np.bincount."""
    rng = np.random.default_rng(seed)
    bins = rng.integers(0, n_bins, (f, 2 * n)).astype(np.uint8)
    samples = np.sort(rng.choice(2 * n, n, replace=False)).astype(np.int64)
    weight = rng.integers(1, 5, 2 * n).astype(np.float64) if criterion else rng.exponential(size=2 * n) + 1e-3
    target = rng.integers(0, 2, 2 * n).astype(np.float64) if criterion else rng.normal(size=2 * n)
    candidates = rng.permutation(f).astype(np.int64)
    w, s, _ = K.node_sums(samples, weight, target)
    assert (w, s) == K.node_sums_numpy(samples, weight, target)[:2]
    scratch = (np.empty(256), np.empty(256), np.empty(n), np.empty(n))
    a = K.best_split(bins, samples, weight, target, candidates, stop_after, criterion, w, s, *scratch)
    b = K.best_split_numpy(bins, samples, weight, target, candidates, stop_after, criterion, w, s)
    # the same split; its gain to the last bits only up to rounding: the entropy's logarithms come
    # from LLVM's math library in the kernel and numpy's in the twin (hypothesis found one gain
    # 1 ulp apart: -136.1240720048781 against -136.12407200487806)
    assert tuple(a[1:]) == tuple(b[1:])
    assert a[0] == pytest.approx(b[0], rel=1e-12, abs=1e-12)
    if a[1] >= 0:  # the split lies between two non-empty bins of the node, nothing in between
        row = bins[a[1]][samples]
        assert (row == a[2]).any() and (row == a[3]).any() and not ((row > a[2]) & (row < a[3])).any()


def test_a_worked_entropy_split():
    """Four samples, classes 0 0 1 1: feature 0 separates them (bins 0 | 3), feature 1 does not
    (bins 1 2 1 2). Root entropy 1 bit; the split leaves two pure halves: gain 4 x 1 = 4 (weighted
    by the 4 samples), threshold (0 + 3) / 2 = 1.5, leaves 0 and 1."""
    bins = np.array([[0, 0, 3, 3], [1, 2, 1, 2]], np.uint8)
    f, thr, leaves, mask, gains, _ = grow_histogram_tree(
        bins, np.ones(4), np.array([0.0, 0, 1, 1]), criterion=K.ENTROPY, depth=2,
        features_per_node=2, rng=np.random.default_rng(0))
    assert f.tolist() == [0, 0, 0] and thr.tolist() == [1.5, 0, 0] and mask.tolist() == [True, False, False]
    assert leaves.tolist() == [0, 0, 1, 1] and gains == [(0, 4.0)]
