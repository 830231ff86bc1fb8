"""Growing and flattening forests: the flat trees must take scikit-learn's decisions exactly.

Reference library throughout: scikit-learn's DecisionTreeClassifier / DecisionTreeRegressor (the
fitted trees are kept with ``keep_estimators=True`` and compared with the flat arrays).
"""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from sklearn.metrics import roc_auc_score
from sklearn.tree import DecisionTreeClassifier, DecisionTreeRegressor

from detector.cascade import calibrate_exit, trees_evaluated
from detector.forest import (FlatForest, bin_columns, bin_columns_numpy, flatten_tree,
                             float32_thresholds, forest_leaves, forest_running_scores,
                             forest_score, grow_forest, quantile_cuts, quantile_cuts_numpy,
                             thresholds_from_bins, trimmed_weights)


def _data(n=300, f=24, seed=0, ties=False):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, f))
    if ties:  # few distinct values per column: thresholds fall between repeated values
        X = np.round(X * 3) / 7
    y = ((X[:, 3] - 0.5 * X[:, 7] + 0.3 * rng.normal(size=n)) > 0.2).astype(np.int64)
    return np.asfortranarray(X, dtype=np.float32), y


def _assert_same_partition(our_leaves, sk_leaves):
    """Every flat leaf is reached only by samples that share one scikit-learn leaf."""
    for leaf in np.unique(our_leaves):
        assert np.unique(sk_leaves[our_leaves == leaf]).size == 1


@pytest.mark.parametrize("ties", [False, True])
@pytest.mark.parametrize("depth", [1, 2, 3])
def test_bagged_export_matches_sklearn_exactly(depth, ties):
    X, y = _data(ties=ties, seed=depth)
    forest = grow_forest(X, y, mode="bagged", n_trees=12, depth=depth, random_state=3, keep_estimators=True)
    leaves = forest_leaves(forest, X)
    proba = np.empty((len(X), forest.n_trees))
    for t, est in enumerate(forest.estimators):
        p = est.predict_proba(X)[:, 1]
        proba[:, t] = p
        # the leaf values are scikit-learn's predict_proba, rounded once to float32
        np.testing.assert_array_equal(forest.leaf_values[t][leaves[:, t]], p.astype(np.float32))
        _assert_same_partition(leaves[:, t], est.apply(X))
    # the forest's score is the average of the trees' probabilities (their float32 values)
    np.testing.assert_allclose(forest_score(forest, X), proba.mean(axis=1), rtol=0, atol=1e-7)
    np.testing.assert_array_equal(forest_score(forest, X),
                                  proba.astype(np.float32).astype(np.float64).sum(axis=1) / forest.n_trees)


@pytest.mark.parametrize("fraction", [1.0, 0.6])
def test_boosted_export_matches_sklearn_exactly(fraction):
    X, y = _data(seed=5)
    forest = grow_forest(X, y, mode="boosted", n_trees=10, depth=2, sample_fraction=fraction,
                         random_state=1, keep_estimators=True)
    leaves = forest_leaves(forest, X)
    total = np.zeros(len(X))
    for t, est in enumerate(forest.estimators):
        p = est.predict(X)
        np.testing.assert_array_equal(forest.leaf_values[t][leaves[:, t]], p.astype(np.float32))
        _assert_same_partition(leaves[:, t], est.apply(X))
        total += p
    # logistic link of Gentle AdaBoost: 1 / (1 + exp(-2 F)) (Friedman, Hastie and Tibshirani 2000)
    np.testing.assert_allclose(forest_score(forest, X), 1 / (1 + np.exp(-2 * total)), atol=1e-6)
    assert roc_auc_score(y, forest_score(forest, X)) > 0.9  # sklearn's ROC AUC


def test_boosted_weights_follow_gentle_adaboost():
    """Refit every stage with weights from a slow loop over Algorithm 4 of Friedman, Hastie and
    Tibshirani (2000): w <- w * exp(-y f(x)), y in {-1, +1}; the trees must come out the same."""
    X, y = _data(n=200, seed=9)
    forest = grow_forest(X, y, mode="boosted", n_trees=6, depth=2, random_state=4, keep_estimators=True)
    signed = np.where(y == 1, 1.0, -1.0)
    w = np.ones(len(y))
    for est in forest.estimators:
        again = DecisionTreeRegressor(**est.get_params()).fit(X, signed, sample_weight=w)
        np.testing.assert_array_equal(again.tree_.feature, est.tree_.feature)
        np.testing.assert_array_equal(again.tree_.threshold, est.tree_.threshold)
        f = est.predict(X).astype(np.float32).astype(np.float64)
        for i in range(len(w)):
            w[i] = w[i] * np.exp(-signed[i] * f[i])
        w = w / w.mean()


def _trim_by_hand(w, beta):
    """Weight trimming as Friedman, Hastie and Tibshirani (2000, section 9) state it, one sample at
    a time: drop the lightest samples while the mass dropped stays at most beta of the total (ties:
    the lower index first)."""
    out, dropped, limit = w.copy(), 0.0, beta * w.sum()
    for i in sorted(range(len(w)), key=lambda i: (w[i], i)):
        if dropped + w[i] > limit:
            break
        dropped += w[i]
        out[i] = 0.0
    return out


def test_weight_trimming_follows_friedman_hastie_tibshirani():
    """Every stage refit by scikit-learn on the weights of a slow loop: Gentle AdaBoost's update on
    every sample, each stage fitted on the trimmed weights only. The trees must come out the same,
    and the stages must really leave samples out."""
    X, y = _data(n=240, seed=11)
    beta = 0.1
    forest = grow_forest(X, y, mode="boosted", n_trees=8, depth=2, weight_trim=beta,
                         random_state=4, keep_estimators=True)
    signed = np.where(y == 1, 1.0, -1.0)
    w = np.ones(len(y))
    left_out = []
    for t, est in enumerate(forest.estimators):
        stage = _trim_by_hand(w, beta)
        np.testing.assert_array_equal(forest.in_bag[t], stage > 0)
        left_out.append(int((stage == 0).sum()))
        again = DecisionTreeRegressor(**est.get_params()).fit(X, signed, sample_weight=stage)
        np.testing.assert_array_equal(again.tree_.feature, est.tree_.feature)
        np.testing.assert_array_equal(again.tree_.threshold, est.tree_.threshold)
        f = est.predict(X).astype(np.float32).astype(np.float64)
        w = w * np.exp(-signed * f)  # every sample, trimmed or not
        w = np.maximum(w / w.mean(), 1e-10)
    # the first stage's equal weights: 24 of 240 samples hold exactly 0.1 of the mass
    assert left_out[0] == 24 and max(left_out[1:]) > 24


@settings(max_examples=200, deadline=None)
@given(w=hnp.arrays(np.float64, st.integers(1, 40),
                    elements=st.sampled_from([1e-10, 0.001, 0.5, 1.0, 2.0, 7.25])),
       beta=st.sampled_from([0.0, 0.01, 0.05, 0.1, 0.3, 0.5]))
def test_trimmed_weights_drop_the_lightest_within_the_share(w, beta):
    out = trimmed_weights(w, beta)
    np.testing.assert_array_equal(out, _trim_by_hand(w, beta))
    dropped = out == 0
    # the dropped mass summed lightest first, as trimming adds it up (numpy's pairwise sum of the
    # same weights may round the other way: 12 x 1e-10 summed pairwise is 1.2000000000000002e-09)
    assert np.cumsum(np.sort(w[dropped]))[-1:].sum() <= beta * w.sum()
    if dropped.any() and (~dropped).any():
        assert w[dropped].max() <= w[~dropped].min()  # the lightest go first


def test_padding_of_a_leaf_above_the_last_level():
    # X = 0,1,2,3 with y = 0,0,1,1: one split at (1+2)/2 = 1.5 makes both children pure, so at
    # depth 2 nodes 1 and 2 are padding (feature 0, threshold 0) over identical leaves.
    X = np.array([[0.0, 5], [1, 5], [2, 5], [3, 5]], np.float32)
    est = DecisionTreeClassifier(max_depth=2, random_state=0).fit(X, [0, 0, 1, 1])
    f, thr, leaves, mask = flatten_tree(est, 2)
    assert f.tolist() == [0, 0, 0] and thr.tolist() == [1.5, 0.0, 0.0]
    assert leaves.tolist() == [0.0, 0.0, 1.0, 1.0] and mask.tolist() == [True, False, False]
    flat = FlatForest("bagged", f[None], thr[None], leaves[None], mask[None])
    probe = np.random.default_rng(0).uniform(-4, 4, size=(200, 2)).astype(np.float32)
    np.testing.assert_array_equal(forest_score(flat, probe), est.predict_proba(probe)[:, 1].astype(np.float32))


def test_padding_when_the_root_cannot_split():
    # a constant column cannot split: the root is a leaf with class fraction 2/4 = 0.5
    X = np.ones((4, 1), np.float32)
    est = DecisionTreeClassifier(max_depth=3).fit(X, [0, 1, 0, 1])
    f, thr, leaves, mask = flatten_tree(est, 3)
    assert not mask.any() and (f == 0).all() and (thr == 0).all()
    assert leaves.tolist() == [0.5] * 8
    flat = FlatForest("bagged", f[None], thr[None], leaves[None])
    assert not flat.split_mask.any()  # padding is recognised when the mask is not given
    used, g = flat.reindex()
    assert used.tolist() == [0] and g.node_features.tolist() == [[0] * 7]


def test_threshold_float32_rounding_edge_case():
    # a and b are neighbouring float32 values; a's last mantissa bit is 1, b's is 0, so the float64
    # midpoint (a+b)/2 is exactly halfway and a plain float32 cast rounds it to the even one, b.
    # (Near 3.0 the float32 spacing, 2.4e-7, exceeds scikit-learn's tie tolerance of 1e-7; near 1.0
    # it would not, and scikit-learn would treat a and b as one value.)
    a = np.nextafter(np.float32(3), np.float32(4))
    b = np.nextafter(a, np.float32(4))
    mid = (np.float64(a) + np.float64(b)) / 2
    assert np.float32(mid) == b  # the naive cast would send b to the left
    X = np.array([[a], [a], [b], [b]], np.float32)
    est = DecisionTreeClassifier(max_depth=1).fit(X, [0, 0, 1, 1])
    assert est.tree_.threshold[0] == mid  # scikit-learn's midpoint rule
    f, thr, leaves, _ = flatten_tree(est, 1)
    assert thr[0] == a
    flat = FlatForest("bagged", f[None], thr[None], leaves[None])
    np.testing.assert_array_equal(forest_score(flat, X), est.predict_proba(X)[:, 1].astype(np.float32))
    naive = FlatForest("bagged", f[None], np.float32([[mid]]), leaves[None])
    assert forest_score(naive, X)[2] != forest_score(flat, X)[2]


@settings(max_examples=60, deadline=None)
@given(hnp.arrays(np.float64, st.integers(1, 20),
                  elements=st.floats(-1e30, 1e30, allow_nan=False, allow_infinity=False)))
def test_float32_thresholds_is_the_largest_float32_not_above(t64):
    t32 = float32_thresholds(t64)
    assert t32.dtype == np.float32 and np.isfinite(t32).all()
    assert (t32.astype(np.float64) <= t64).all()
    above = np.nextafter(t32, np.float32(np.inf)).astype(np.float64)
    assert (above > t64).all()


def test_out_of_bag_error_matches_a_slow_direct_computation():
    X, y = _data(n=150, seed=2)
    forest = grow_forest(X, y, n_trees=15, depth=2, random_state=7, keep_estimators=True)
    wrong, seen = 0, 0
    for i in range(len(X)):
        votes = [est.predict_proba(X[i : i + 1])[0, 1].astype(np.float32)
                 for t, est in enumerate(forest.estimators) if forest.in_bag[t, i] == 0]
        if votes:
            seen += 1
            wrong += int((np.mean(np.float64(votes)) > 0.5) != (y[i] == 1))
    assert seen > 0.9 * len(X)  # with 15 trees nearly every patch is out of bag at least once
    assert forest.oob_error == pytest.approx(wrong / seen, abs=0)
    # bootstrap counts: n draws with replacement
    assert (forest.in_bag.sum(axis=1) == len(X)).all()


def test_same_seed_same_forest_and_threads_do_not_matter():
    X, y = _data(seed=4)
    a = grow_forest(X, y, n_trees=8, random_state=11, n_jobs=1)
    b = grow_forest(np.ascontiguousarray(X), y, n_trees=8, random_state=11, n_jobs=2)
    c = grow_forest(X, y, n_trees=8, random_state=12)
    for name in ("node_features", "node_thresholds", "leaf_values", "importances"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name))
    assert a.oob_error == b.oob_error
    assert not np.array_equal(a.node_thresholds, c.node_thresholds)


def test_importances_sum_sklearn_impurity_decreases():
    X, y = _data(seed=6)
    forest = grow_forest(X, y, n_trees=10, random_state=0, keep_estimators=True)
    expected = sum(est.tree_.compute_feature_importances(normalize=False) for est in forest.estimators)
    np.testing.assert_allclose(forest.importances, expected, rtol=1e-12)
    assert np.argmax(forest.importances) in (3, 7)  # y depends on columns 3 and 7


def test_progress_and_feature_subsets():
    X, y = _data(n=120, seed=1)
    calls = []
    forest = grow_forest(X, y, n_trees=5, features_per_node=1, random_state=0,
                         progress=lambda d, t: calls.append((d, t)), keep_estimators=True)
    assert calls == [(i, 5) for i in range(1, 6)]
    assert all(est.max_features_ == 1 for est in forest.estimators)
    default = grow_forest(X, y, n_trees=1, random_state=0, keep_estimators=True)
    assert default.estimators[0].max_features_ == round(np.sqrt(24))  # round(sqrt(F)) = 5


def test_reindex_keeps_scores():
    X, y = _data(seed=8)
    forest = grow_forest(X, y, n_trees=20, depth=3, random_state=2)
    used, small = forest.reindex()
    assert small.node_features.max() < used.size
    np.testing.assert_array_equal(forest_score(small, X[:, used]), forest_score(forest, X))
    np.testing.assert_array_equal(small.importances, forest.importances[used])


def test_bad_inputs_are_refused():
    X, y = _data(n=40)
    with pytest.raises(ValueError, match="both"):
        grow_forest(X, np.zeros(40, int))
    bad = X.copy()
    bad[3, 2] = np.nan
    with pytest.raises(ValueError, match="non-finite"):
        grow_forest(bad, y)
    with pytest.raises(ValueError, match="mode"):
        grow_forest(X, y, mode="stacked")
    with pytest.raises(ValueError, match="sample_fraction"):
        grow_forest(X, y, sample_fraction=1.5)
    with pytest.raises(ValueError, match="weight_trim"):
        grow_forest(X, y, mode="boosted", weight_trim=-0.1)


def test_running_scores_and_trees_evaluated_by_hand():
    # one feature, two depth-1 trees: leaves (0, 1) at 0.5 and (0.25, 0.75) at 0.0
    flat = FlatForest("bagged", [[0], [0]], [[0.5], [0.0]], [[0, 1], [0.25, 0.75]])
    X = np.array([[0.2], [0.9], [-1.0]], np.float32)
    # x=0.2: 0 then +0.75; x=0.9: 1 then +0.75; x=-1: 0 then +0.25
    np.testing.assert_array_equal(forest_running_scores(flat, X), [[0, 0.75], [1, 1.75], [0, 0.25]])
    # thresholds (0.0, 0.5): x=-1 is dropped after tree 2 (0.25 < 0.5)
    assert trees_evaluated(forest_running_scores(flat, X), [0.0, 0.5]).tolist() == [2, 2, 2]
    assert trees_evaluated(forest_running_scores(flat, X), [0.5, 0.5]).tolist() == [1, 2, 1]


@settings(max_examples=50, deadline=None)
@given(st.integers(1, 60), st.integers(1, 12), st.floats(0.0, 0.5), st.integers(0, 2**32 - 1))
def test_calibrated_exit_gives_up_at_most_its_budget(n, t, budget, seed):
    rng = np.random.default_rng(seed)
    running = np.cumsum(rng.normal(size=(n, t)).astype(np.float32), axis=1, dtype=np.float64)
    thr = calibrate_exit(running, budget)
    assert thr.dtype == np.float32
    dropped = (running < thr.astype(np.float64)).any(axis=1)
    assert dropped.sum() <= np.floor(budget * n + 1e-9)
    assert ((trees_evaluated(running, thr) < t) | (running[:, -1] < thr[-1]) == dropped).all()
    # tight: every threshold is the kept objects' minimum, rounded down to float32 (raising it to the
    # next float32 would drop one more object)
    kept = running[~dropped]
    assert (thr.astype(np.float64) <= kept.min(axis=0)).all()
    assert (np.nextafter(thr, np.float32(np.inf)).astype(np.float64) > kept.min(axis=0)).all()


def test_calibrate_exit_without_objects_never_exits():
    assert np.isneginf(calibrate_exit(np.zeros((0, 4), np.float32))).all()


# ---------------------------------------------------------------------------------------------
# binned growing


@pytest.mark.parametrize("max_bins", [2, 3, 16, 100, 256])
def test_binning_kernel_equals_its_numpy_twin(max_bins):
    X, _ = _data(n=700, f=9, seed=max_bins)
    X[:, 2] = np.round(X[:, 2])  # few distinct values
    X[:, 5] = 0.25  # constant
    cuts, n_cuts = quantile_cuts(X, max_bins=max_bins, sample_rows=500, random_state=1)
    cuts2, n_cuts2 = quantile_cuts_numpy(X, max_bins=max_bins, sample_rows=500, random_state=1)
    np.testing.assert_array_equal(cuts, cuts2)
    np.testing.assert_array_equal(n_cuts, n_cuts2)
    assert (n_cuts <= max_bins - 1).all() and n_cuts[5] == 0
    # values exactly on cuts (bin = cuts strictly below) and just above, in rows 700-706: the
    # kernel searches four rows at a time, so they fall in each of the four lanes and in the tail
    on_cuts = [cuts[:, k % cuts.shape[1]] for k in range(5)]
    probe = np.concatenate([X, np.stack(on_cuts).clip(-9, 9),
                            np.nextafter(cuts[:, :2].T, np.inf).clip(-9, 9)]).astype(np.float32)
    assert len(probe) - len(X) >= 5 and len(X) % 4 == 0
    for jobs in (1, 2):
        a = bin_columns(probe.copy(order="F"), cuts, n_cuts, n_jobs=jobs)
        b = bin_columns_numpy(probe.copy(), cuts, n_cuts)
        np.testing.assert_array_equal(a, b)
    assert a.max() <= max_bins - 1
    # cuts padded wider than quantile_cuts pads them (the kernel's step loop for any width)
    wide = np.pad(cuts, ((0, 0), (0, 512 - cuts.shape[1])), constant_values=np.inf)
    np.testing.assert_array_equal(bin_columns(probe.copy(order="F"), wide, n_cuts), b)


@settings(max_examples=60, deadline=None)
@given(hnp.arrays(np.float32, st.tuples(st.integers(1, 400), st.integers(1, 4)),
                  elements=st.one_of(st.floats(width=32, allow_nan=False), st.sampled_from(
                      [0.0, -0.0, 1.0, -1.0, 1e-40, -1e-40, 3.5, np.inf, -np.inf]))),
       st.integers(2, 256), st.integers(1, 500))
def test_compiled_sort_and_cuts_equal_the_numpy_twin(X, max_bins, sample_rows):
    """The Fortran-ordered float32 route (values read in place, radix-sorted on their bit
    patterns and cut in one compiled pass) against quantile_cuts_numpy (np.sort, np.unique,
    np.searchsorted): the same cuts, over signs, zeros of both signs, subnormals, infinities,
    repeats and huge magnitudes; and the same as the C-ordered route (numpy's sort)."""
    F = np.asfortranarray(X)
    cuts, n_cuts = quantile_cuts(F, max_bins=max_bins, sample_rows=sample_rows, random_state=3)
    cuts2, n_cuts2 = quantile_cuts_numpy(X, max_bins=max_bins, sample_rows=sample_rows,
                                         random_state=3)
    np.testing.assert_array_equal(n_cuts, n_cuts2)
    np.testing.assert_array_equal(cuts, cuts2)
    cuts3, n_cuts3 = quantile_cuts(np.ascontiguousarray(X), max_bins=max_bins,
                                   sample_rows=sample_rows, random_state=3)
    np.testing.assert_array_equal(cuts3, cuts)
    np.testing.assert_array_equal(n_cuts3, n_cuts)


def test_compiled_sort_of_no_rows_gives_no_cuts():
    for X in (np.zeros((0, 3), np.float32, order="F"), np.zeros((0, 3), np.float32)):
        cuts, n_cuts = quantile_cuts(X, max_bins=16)
        assert cuts.shape == (3, 16) and np.isinf(cuts).all() and (n_cuts == 0).all()


def test_compiled_sort_on_a_pool_sized_block():
    """4,096 sampled rows of 300 columns of normal values at several scales (every radix pass
    runs) and of a few values (the upper passes are skipped): the numpy twin's cuts."""
    rng = np.random.default_rng(5)
    X = rng.normal(size=(6000, 300)).astype(np.float32) * np.float32(10.0) ** rng.integers(
        -20, 20, 300).astype(np.float32)
    X[:, ::7] = np.round(X[:, ::7] / np.abs(X[:, ::7]).max(axis=0) * 3)
    X = np.asfortranarray(X)
    cuts, n_cuts = quantile_cuts(X, max_bins=256, random_state=0)
    cuts2, n_cuts2 = quantile_cuts_numpy(X, max_bins=256, random_state=0)
    np.testing.assert_array_equal(n_cuts, n_cuts2)
    np.testing.assert_array_equal(cuts, cuts2)
    assert n_cuts.max() == 255 and n_cuts[::7].max() <= 6


@settings(max_examples=40, deadline=None)
@given(hnp.arrays(np.float32, st.tuples(st.integers(2, 300), st.integers(1, 3)),
                  elements=st.floats(-100, 100, width=32)),
       st.integers(2, 40))
def test_bins_keep_order_and_cut_exactly(X, max_bins):
    cuts, n_cuts = quantile_cuts(X, max_bins=max_bins, sample_rows=128, random_state=0)
    binned = bin_columns(np.asfortranarray(X.copy()), cuts, n_cuts)
    for f in range(X.shape[1]):
        c = cuts[f, : n_cuts[f]]
        assert (np.diff(c) > 0).all()
        for k in range(c.size):  # x <= cut k exactly when bin <= k
            np.testing.assert_array_equal(X[:, f] <= c[k], binned[:, f] <= k)
        sampled = X[:, f] if len(X) <= 128 else None
        if sampled is not None and np.unique(sampled).size <= max_bins:
            # few distinct values: every distinct value has a bin of its own
            assert np.unique(binned[:, f]).size == np.unique(X[:, f]).size


@pytest.mark.parametrize("mode", ["bagged", "boosted"])
def test_trees_grown_on_bins_decide_on_values_exactly(mode):
    X, y = _data(n=2000, f=12, seed=11)
    cuts, n_cuts = quantile_cuts(X, max_bins=32, sample_rows=1000, random_state=0)
    Xb = bin_columns(X.copy(order="F"), cuts, n_cuts)
    forest = grow_forest(Xb, y, mode=mode, n_trees=6, depth=3, random_state=2, keep_estimators=True)
    on_values = thresholds_from_bins(forest, cuts)
    leaves = forest_leaves(on_values, X)  # the raw feature values, not the bins
    # same scores (leaf indices may differ below padding nodes, whose subtrees are identical)
    np.testing.assert_array_equal(forest_running_scores(on_values, X), forest_running_scores(forest, Xb))
    for t, est in enumerate(forest.estimators):
        sk = est.predict_proba(Xb)[:, 1] if mode == "bagged" else est.predict(Xb)
        np.testing.assert_array_equal(on_values.leaf_values[t][leaves[:, t]], sk.astype(np.float32))
        _assert_same_partition(leaves[:, t], est.apply(Xb))


def test_binning_is_lossless_with_few_distinct_values():
    """With at most max_bins distinct values per column (here multiples of 1/7, spaced far beyond
    scikit-learn's 1e-7 tie tolerance), the trees grown on bins equal the trees grown on values."""
    X, y = _data(n=400, f=10, seed=12, ties=True)
    assert max(np.unique(X[:, j]).size for j in range(X.shape[1])) <= 64
    cuts, n_cuts = quantile_cuts(X, max_bins=64)
    exact = grow_forest(X, y, n_trees=8, depth=2, random_state=5)
    binned = thresholds_from_bins(
        grow_forest(bin_columns(X.copy(order="F"), cuts, n_cuts), y, n_trees=8, depth=2, random_state=5), cuts)
    for name in ("node_features", "node_thresholds", "leaf_values"):
        np.testing.assert_array_equal(getattr(binned, name), getattr(exact, name))
    assert binned.oob_error == exact.oob_error


@pytest.mark.parametrize("bad,message", [
    (dict(depth=0), r"depth must be an integer 1\.\.\d+, got 0"),
    (dict(n_trees=0), "n_trees must be an integer >= 1, got 0"),
    (dict(mode="stacked"), "mode must be one of bagged, boosted, got 'stacked'"),
    (dict(sample_fraction=0.0), "sample_fraction"),
])
def test_grow_forest_checks_parameters_as_the_classifier_does(bad, message):
    """The forest's parameter checks are the one set in detector._validation: the same error
    type (InputError) and wording as PatchClassifier's."""
    from detector.errors import InputError
    from detector.forest import grow_forest

    X = np.arange(8, dtype=np.float32).reshape(4, 2)
    y = np.array([0, 1, 0, 1])
    params = dict(mode="bagged", n_trees=2, depth=1, sample_fraction=1.0)
    with pytest.raises(InputError, match=message):
        grow_forest(X, y, **{**params, **bad})
