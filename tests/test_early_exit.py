"""Early exit: the greedy tree order and the misaligned calibration copies."""

import numpy as np
from hypothesis import given, settings, strategies as st

from detector.classifier import PatchClassifier, misaligned_copies
from detector.forest import calibrate_exit, order_for_early_exit, trees_evaluated


def _dropped_after_first(o, b, t, exit_recall=1.0):
    thr = o[:, t].min()
    return int((b[:, t] < thr).sum())


@settings(max_examples=40, deadline=None)
@given(st.integers(1, 6), st.integers(1, 12), st.integers(1, 30), st.integers(0, 2**31 - 1))
def test_order_is_a_permutation_and_first_tree_drops_most(t, n_obj, n_bg, seed):
    rng = np.random.default_rng(seed)
    o = rng.integers(0, 5, (n_obj, t)).astype(float)
    b = rng.integers(0, 5, (n_bg, t)).astype(float)
    order = order_for_early_exit(o, b, exit_recall=1.0)
    assert sorted(order.tolist()) == list(range(t))
    # brute force: no tree drops more background at step one than the one chosen
    best = max(_dropped_after_first(o, b, k) for k in range(t))
    assert _dropped_after_first(o, b, int(order[0])) == best


@settings(max_examples=30, deadline=None)
@given(st.integers(2, 8), st.integers(0, 2**31 - 1))
def test_reordering_keeps_scores_and_never_costs_trees_on_first_exit(t, seed):
    rng = np.random.default_rng(seed)
    o = rng.random((20, t))
    b = rng.random((50, t)) * 0.8
    order = order_for_early_exit(o, b, exit_recall=1.0)
    # the final score is a sum: any order gives the same totals
    np.testing.assert_allclose(o[:, order].sum(axis=1), o.sum(axis=1))
    # with exit thresholds calibrated for each order, no kept object is ever dropped
    for perm in (np.arange(t), order):
        run_o = np.cumsum(o[:, perm], axis=1)
        thr = calibrate_exit(run_o, 1.0)
        assert (trees_evaluated(run_o, thr) == t).all()


def test_hand_worked_order():
    # objects always get 1 from every tree, so every exit threshold is the running count t.
    # tree 1 gives background rows 2 and 3 a 0 -> drops 2 windows; tree 2 then drops row 1.
    obj = np.ones((2, 3))
    bg = np.array([[1.0, 1.0, 0.0], [1.0, 0.0, 1.0], [1.0, 0.0, 0.0]])
    assert order_for_early_exit(obj, bg, exit_recall=1.0).tolist() == [1, 2, 0]


def test_misaligned_copies_shift_equals_edge_padded_slice():
    rng = np.random.default_rng(3)
    p = rng.integers(0, 256, (2, 10, 12), dtype=np.uint8)
    copies = misaligned_copies(p, shift=1.0, scale=1.1).reshape(2, 27, 10, 12)
    # copy order: scale 1 first, dy in (0, -1, +1), dx in (0, -1, +1)
    padded = np.pad(p, ((0, 0), (1, 1), (1, 1)), mode="edge")  # reference: numpy edge padding
    for k, (dy, dx) in enumerate([(dy, dx) for dy in (0, -1, 1) for dx in (0, -1, 1)]):
        want = padded[:, 1 + dy:11 + dy, 1 + dx:13 + dx]
        np.testing.assert_array_equal(copies[:, k], want)
    # scaled copies differ from the patch but keep its mean roughly (area sampling)
    assert not np.array_equal(copies[:, 9], p)
    assert abs(copies[:, 9].mean() - p.mean()) < 10


def test_fitted_exit_keeps_every_kept_calibration_copy():
    rng = np.random.default_rng(0)
    bright = rng.integers(0, 60, (60, 12, 12))
    bright[:, :6] += 150
    dull = rng.integers(0, 210, (120, 12, 12))
    patches = np.concatenate([bright, dull]).astype(np.uint8)
    y = np.r_[np.ones(60), np.zeros(120)]
    clf = PatchClassifier(n_trees=15, pool=400, exit_recall=1.0, random_state=0).fit(patches, y)
    m = clf.model_
    cal = misaligned_copies(patches[clf.calibration_indices_], 1.0, 1.1)
    run = m.running_scores(cal)
    # exit_recall 1.0: no calibration copy may be dropped by any exit
    assert (trees_evaluated(run, m.exit_thresholds) == m.n_trees).all()
    assert m.metadata["calibration"]["copies_per_object"] == 27
