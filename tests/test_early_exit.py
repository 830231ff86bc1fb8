"""Early exit: the greedy tree order and the misaligned calibration copies."""

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from detector.cascade import (calibrate_contrast_gate, calibrate_exit, calibrate_exit_table,
                              exit_kept, kept_objects, misaligned_copies, order_for_early_exit,
                              trees_evaluated)
from detector.classifier import PatchClassifier
from detector.forest import float32_thresholds
from detector.model import Model
from shared import calibration_copies, top_bright


def _dropped_after_first(o, b, t, exit_budget=0.0):
    thr = o[:, t].min()
    return int((b[:, t] < thr).sum())


@settings(max_examples=40, deadline=None)
@given(st.integers(1, 6), st.integers(1, 12), st.integers(1, 30), st.integers(0, 2**31 - 1))
def test_order_is_a_permutation_and_first_tree_drops_most(t, n_obj, n_bg, seed):
    rng = np.random.default_rng(seed)
    o = rng.integers(0, 5, (n_obj, t)).astype(float)
    b = rng.integers(0, 5, (n_bg, t)).astype(float)
    order = order_for_early_exit(o, b, exit_budget=0.0)
    assert sorted(order.tolist()) == list(range(t))
    # brute force: no tree drops more background at step one than the one chosen
    best = max(_dropped_after_first(o, b, k) for k in range(t))
    assert _dropped_after_first(o, b, int(order[0])) == best


@settings(max_examples=30, deadline=None)
@given(st.integers(2, 8), st.integers(0, 2**31 - 1))
def test_reordering_keeps_scores_and_never_costs_trees_on_first_exit(t, seed):
    """Leaves on a grid of eighths (exact in float32, so the exits calibrate_exit rounds down to
    float32 are the float64 minima the greedy order works with)."""
    rng = np.random.default_rng(seed)
    o = rng.integers(0, 9, (20, t)) / 8
    b = rng.integers(0, 7, (50, t)) / 8
    order = order_for_early_exit(o, b, exit_budget=0.0)
    # the final score is a sum: any order gives the same totals
    np.testing.assert_allclose(o[:, order].sum(axis=1), o.sum(axis=1))
    trees = {}
    for name, perm in (("given", np.arange(t)), ("greedy", order)):
        run_o = np.cumsum(o[:, perm], axis=1)
        thr = calibrate_exit(run_o, 0.0)
        # with exit thresholds calibrated for each order, no kept object is ever dropped
        assert (trees_evaluated(run_o, thr) == t).all()
        trees[name] = trees_evaluated(np.cumsum(b[:, perm], axis=1), thr)
    # the cost: background windows that go on past the first exit (each costs a second tree and
    # more) are never more with the greedy order than with the trees in their given order
    assert (trees["greedy"] > 1).sum() <= (trees["given"] > 1).sum()


def test_hand_worked_order():
    # objects always get 1 from every tree, so every exit threshold is the running count t.
    # tree 1 gives background rows 2 and 3 a 0 -> drops 2 windows; tree 2 then drops row 1.
    obj = np.ones((2, 3))
    bg = np.array([[1.0, 1.0, 0.0], [1.0, 0.0, 1.0], [1.0, 0.0, 0.0]])
    assert order_for_early_exit(obj, bg, exit_budget=0.0).tolist() == [1, 2, 0]


def test_misaligned_copies_follow_crop_region():
    from detector.geometry import crop_region

    # crop_region itself: scale 1 and a whole-pixel shift reduce to an edge-padded slice
    # (reference: numpy edge padding)
    rng = np.random.default_rng(3)
    p = rng.integers(0, 256, (2, 10, 12), dtype=np.uint8)
    padded = np.pad(p[0], 1, mode="edge")
    np.testing.assert_array_equal(crop_region(p[0], (6.0 + 1, 5.0 - 1), (12, 10), (12, 10)),
                                  padded[0:10, 2:14])
    # smooth patches (a 1-pixel shift keeps them alike), each with its own pattern
    yy, xx = np.mgrid[:10, :12]
    phases = rng.uniform(0, 2 * np.pi, (4, 2))
    p = np.stack([128 + 100 * np.sin(xx / 2.5 + a) * np.cos(yy / 3.0 + b) for a, b in phases])
    p = p.astype(np.uint8)
    copies = misaligned_copies(p, shift=1.0, scale=1.1, copies=5, random_state=7).reshape(4, 6, 10, 12)
    np.testing.assert_array_equal(copies[:, 0], p)  # the patch itself first
    # every copy is crop_region of its own patch around a centre moved by dx, dy (uniform in
    # [-1, 1]) at a size scaled by k (log-uniform in [1 / 1.1, 1.1]), drawn patch by patch in
    # that order from the seed
    draws = np.random.default_rng(7)
    for i in range(4):
        dx, dy = draws.uniform(-1, 1, 5), draws.uniform(-1, 1, 5)
        k = np.exp(draws.uniform(-np.log(1.1), np.log(1.1), 5))
        for j in range(5):
            np.testing.assert_array_equal(
                copies[i, j + 1], crop_region(p[i], (6 + dx[j], 5 + dy[j]), (12 * k[j], 10 * k[j]),
                                              (12, 10)))
    # ... and so looks like its own patch far more than like the others (correlation of pixels)
    corr = np.corrcoef(np.concatenate([p.reshape(4, -1), copies[:, 1:].reshape(20, -1)]))[4:, :4]
    own = corr[np.arange(20), np.repeat(np.arange(4), 5)]
    others = np.where(np.arange(4)[None, :] == np.repeat(np.arange(4), 5)[:, None], -1, corr)
    assert (own > 0.8).all() and (own > others.max(axis=1) + 0.1).all()
    # seeded: the same copies again
    np.testing.assert_array_equal(misaligned_copies(p, 1.0, 1.1, 5, random_state=7),
                                  misaligned_copies(p, 1.0, 1.1, 5, random_state=7))


def test_fitted_exit_keeps_every_kept_calibration_copy():
    patches, y = top_bright(0, 60, 120, spread=60, lift=150)
    clf = PatchClassifier(n_trees=15, pool=400, exit_budget=0.0, random_state=0).fit(patches, y)
    m = clf.model_
    cal = calibration_copies(clf, patches)
    run = m.running_scores(cal)
    # exit budget 0: no calibration copy may be dropped by any exit
    assert (trees_evaluated(run, m.exit_thresholds) == m.n_trees).all()
    assert m.metadata["calibration"]["copies_per_object"] == 9
    # ... nor by the contrast gate: every copy's standard deviation (numpy's population std of its
    # pixels) is at least the gate, and the gate is sqrt(0.5) of the lowest one (all are kept)
    sig = cal.reshape(len(cal), -1).astype(np.float64).std(axis=1)
    gate = m.exit_min_sigma
    assert gate == pytest.approx(np.sqrt(0.5) * sig.min(), rel=1e-12)
    assert (sig >= gate).all()


@given(st.lists(st.tuples(st.floats(0, 100), st.floats(-10, 10)), min_size=1, max_size=40),
       st.floats(0.0, 0.5), st.floats(0.0, 1.0))
@settings(max_examples=60, deadline=None)
def test_contrast_gate_never_drops_a_kept_object(pairs, exit_budget, fraction):
    sig, fin = (np.array(v) for v in zip(*pairs))
    gate = calibrate_contrast_gate(sig, fin, exit_budget, variance_fraction=fraction)
    kept = kept_objects(fin, exit_budget)
    # the same objects calibrate_exit keeps: none of them falls below the gate ...
    assert (sig[kept] >= gate).all()
    # ... and the gate is the stated fraction of the lowest of them (variance fraction -> sqrt)
    assert gate == pytest.approx(np.sqrt(fraction) * sig[kept].min())
    n_drop = int(np.floor(exit_budget * len(fin) + 1e-9))
    assert len(kept) == len(fin) - min(n_drop, len(fin) - 1)


@given(st.integers(1, 40), st.integers(1, 8), st.floats(0.0, 0.5), st.integers(0, 2**32 - 1))
@settings(max_examples=100, deadline=None)
def test_exit_table_keeps_every_object_that_reaches_its_level(n, t, exit_budget, seed):
    """Direct backward pruning (Zhang and Viola, NIPS 2007): at score level c, every calibration
    object that ends at or above c and that calibrate_exit keeps among those is never dropped."""
    rng = np.random.default_rng(seed)
    r = np.cumsum(rng.normal(size=(n, t)), axis=1)
    fin = 1 / (1 + np.exp(-r[:, -1]))
    levels, table = calibrate_exit_table(r, fin, exit_budget)
    assert table.shape == (len(levels), t)
    assert (np.diff(levels) > 0).all()
    for level, row in zip(levels, table):
        sel = fin >= np.float32(level)
        assert sel.any()  # a level is stored only while some object reaches it
        kept = r[sel][kept_objects(fin[sel], exit_budget)]
        assert (trees_evaluated(kept, row) == t).all()
        np.testing.assert_array_equal(row, calibrate_exit(r[sel], exit_budget))
    # levels no object reaches are left out
    assert len(levels) == sum(bool((fin >= np.float32(v)).any()) for v in
                              (0.05, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 0.95))


def _leaf_sums(rng, n, t, levels=3):
    """Running scores of ``n`` windows over ``t`` trees whose leaves take a few values (ties, as
    real leaves give)."""
    return np.cumsum(rng.integers(0, levels, (n, t)).astype(np.float64), axis=1)


@given(st.integers(1, 60), st.integers(1, 8), st.integers(0, 40), st.floats(0.0, 0.5),
       st.integers(0, 6), st.integers(0, 2**32 - 1))
@settings(max_examples=150, deadline=None)
def test_exit_kept_stays_within_budget_and_beats_the_plain_rule(n, t, n_bg, exit_budget, n_lost,
                                                                seed):
    rng = np.random.default_rng(seed)
    r = _leaf_sums(rng, n, t)
    bg = _leaf_sums(rng, n_bg, t) - 1.0
    lost = np.zeros(n, bool)
    lost[rng.choice(n, min(n_lost, n - 1), replace=False)] = True
    keep = exit_kept(r, bg, exit_budget, lost)
    plain = exit_kept(r, None, exit_budget, lost)
    budget = int(np.floor(exit_budget * n + 1e-9))
    for mask in (keep, plain):
        assert mask.dtype == bool and mask.shape == (n,)
        assert mask.any()
        assert not (mask & lost).any()                     # a lost object is never counted kept
        assert (~mask).sum() <= max(budget, lost.sum())    # the budget holds, lost ones first
        exits = float32_thresholds(r[mask].min(axis=0))
        assert (trees_evaluated(r[mask], exits) == t).all()   # no kept object is dropped
    # the plain rule without lost objects is kept_objects' set
    if not lost.any():
        assert set(np.flatnonzero(plain)) == set(kept_objects(r[:, -1], exit_budget).tolist())
    # on the background it was chosen for, never more tree evaluations than the plain rule
    if n_bg:
        spend = [trees_evaluated(bg, float32_thresholds(r[m].min(axis=0))).sum() for m in (keep, plain)]
        assert spend[0] <= spend[1]


def _exit_kept_by_brute_force(r, bg, exit_budget, lost, search_trees=64):
    """exit_kept's greedy search spelt out: every trial's exits from the minimum over all kept
    objects, every saving by counting the background's tree evaluations both ways."""
    n, t = r.shape
    lost = lost.copy()
    if lost.all():
        lost[:] = False
    plain = exit_kept(r, None, exit_budget, lost)
    if len(bg) == 0:
        return plain
    spent = lambda mask: trees_evaluated(bg, float32_thresholds(r[mask].min(axis=0))).sum()
    keep = ~lost
    budget = min(int(np.floor(exit_budget * n + 1e-9)), n - 1) - int(lost.sum())
    front = min(t, search_trees)
    while budget > 0 and keep.sum() > 1:
        at_min = (r[:, :front] == r[keep].min(axis=0)[:front]) & keep[:, None]
        sizes = at_min.sum(axis=0)
        best, tried = None, []
        for k in range(front):
            if not (sizes[k] <= budget and sizes[k] < keep.sum()):
                continue
            group = np.flatnonzero(at_min[:, k]).tolist()
            if group in tried:
                continue
            tried.append(group)
            trial = keep.copy()
            trial[group] = False
            saved = spent(keep) - spent(trial)
            if saved > 0 and (best is None or saved / len(group) > best[0]):
                best = (saved / len(group), group)
        if best is None:
            break
        keep[best[1]] = False
        budget -= len(best[1])
    return keep if spent(keep) < spent(plain) else plain


@given(st.integers(1, 60), st.integers(1, 8), st.integers(0, 40), st.floats(0.0, 0.5),
       st.integers(0, 6), st.integers(1, 4), st.integers(0, 2**32 - 1))
@settings(max_examples=150, deadline=None)
def test_exit_kept_equals_its_search_by_brute_force(n, t, n_bg, exit_budget, n_lost, levels,
                                                    seed):
    """The search keeps each tree's lowest scores sorted and recomputes only the exits whose
    holder a trial gives up (compiled: cascade's best_raise kernel; and its numpy twin); the
    brute-force search recomputes every exit and counts every saving. Few leaf values (ties
    everywhere) and a search window narrower than the trees included."""
    rng = np.random.default_rng(seed)
    r = _leaf_sums(rng, n, t, levels)
    bg = _leaf_sums(rng, n_bg, t, levels) - 1.0
    lost = np.zeros(n, bool)
    lost[rng.choice(n, min(n_lost, n - 1), replace=False)] = True
    for search in (64, 3):
        expected = _exit_kept_by_brute_force(r, bg, exit_budget, lost, search)
        # the compiled search step and its numpy twin
        for use_numpy in (False, True):
            np.testing.assert_array_equal(
                exit_kept(r, bg, exit_budget, lost, search_trees=search, use_numpy=use_numpy),
                expected)


def test_exit_kept_gives_up_a_tied_group_when_that_pays():
    """Hand-worked: objects 0 and 1 tie at the lowest score after tree 0 (0), object 2 alone holds
    tree 1's exit down. Budget 2 of 6 (exit budget 1/3): giving up the pair lifts exit 0 from 0 to
    1, which drops all three background windows (score 0.5) after one tree: 3 evaluations saved,
    1.5 per object. Giving up object 2 lifts exit 1 from 1 to 2: the windows would leave one tree
    later, nothing saved there."""
    r = np.array([[0., 3.], [0., 3.], [1., 1.], [1., 3.], [2., 3.], [2., 4.]])
    bg = np.array([[0.5, 0.5]] * 3)
    keep = exit_kept(r, bg, 1 / 3)
    assert keep.tolist() == [False, False, True, True, True, True]
    assert calibrate_exit(r, 1 / 3, bg).tolist() == [1.0, 1.0]
    # the plain rule gives up the two lowest final scores (object 2, then object 0 of the tied
    # 3s): exits 0 (object 1) and 3
    assert calibrate_exit(r, 1 / 3).tolist() == [0.0, 3.0]


@given(st.integers(2, 40), st.integers(1, 6), st.floats(0.0, 0.5), st.integers(0, 2**32 - 1))
@settings(max_examples=60, deadline=None)
def test_exit_table_with_background_keeps_its_budget_at_every_level(n, t, exit_budget, seed):
    rng = np.random.default_rng(seed)
    r = _leaf_sums(rng, n, t) - t
    fin = 1 / (1 + np.exp(-r[:, -1]))
    bg = _leaf_sums(rng, 30, t) - t - 1
    lost = rng.random(n) < 0.1
    levels, table = calibrate_exit_table(r, fin, exit_budget, background=bg, lost=lost)
    for level, row in zip(levels, table):
        sel = fin >= np.float32(level)
        dropped = (trees_evaluated(r[sel], row) < t) | lost[sel]
        assert dropped.sum() <= max(int(np.floor(exit_budget * sel.sum() + 1e-9)),
                                    lost[sel].sum())


def test_fitted_exit_gives_up_at_most_its_budget():
    """Exit budget 0.1: of the calibration copies (9 per held-out object), the contrast gate and
    every exit together drop at most a tenth, at every score level."""
    from detector.forest import final_score

    patches, y = top_bright(1, 80, 160, spread=90, lift=120)
    for mode in ("bagged", "boosted"):
        clf = PatchClassifier(n_trees=20, pool=400, mode=mode, exit_budget=0.1,
                              random_state=0).fit(patches, y)
        m = clf.model_
        cal = calibration_copies(clf, patches)
        run = m.running_scores(cal)
        gated = cal.reshape(len(cal), -1).astype(np.float64).std(axis=1) < m.exit_min_sigma
        rows = [(0.0, m.exit_thresholds)] + list(zip(m.exit_levels, m.exit_table))
        fin = final_score(m.mode, run[:, -1], m.n_trees, m.temperature)
        for level, row in rows:
            sel = fin >= np.float32(level)
            dropped = (trees_evaluated(run[sel], row) < m.n_trees) | gated[sel]
            assert dropped.sum() <= int(np.floor(0.1 * sel.sum() + 1e-9)), (mode, level)


@given(st.integers(1, 12), st.integers(1, 30), st.integers(0, 40), st.floats(0.0, 0.5),
       st.integers(0, 2**32 - 1))
@settings(max_examples=80, deadline=None)
def test_compiled_order_equals_the_numpy_form(t, n_obj, n_bg, exit_budget, seed):
    """The compiled greedy loop gives exactly the order of the plain-numpy one, ties included
    (leaves take few values, so many trees drop as many windows)."""
    from detector.cascade import _order_for_early_exit_numpy

    rng = np.random.default_rng(seed)
    o = rng.integers(-2, 3, (n_obj, t)) * 0.25
    b = rng.integers(-3, 2, (n_bg, t)) * 0.25
    np.testing.assert_array_equal(order_for_early_exit(o, b, exit_budget),
                                  _order_for_early_exit_numpy(o, b, exit_budget))


# ------------------------------------------------------------------ the scan's exit row

def _staircase_model(levels):
    """A hand-built model whose first tree sorts windows into 16 steps and whose exit table gives
    every score level its own first exit, so that the windows a scan keeps name the row it used.

    Window 1 x 2 pixels, one raw feature: bottom pixel minus top pixel. Tree 0 (depth 4) is a
    staircase on it: leaf k (value k / 16) holds the differences in (10k - 9.5, 10k + 0.5], leaf 0
    everything up to 0.5 and leaf 15 everything above 140.5. Trees 1..39 give every window 1.0, so a
    window's final score is (k / 16 + 39) / 40 >= 0.975: it clears every threshold up to 0.975 and
    only the exits can drop it. Exit rows: ``exit_thresholds`` never exits; row l of
    ``exit_table`` (level ``levels[l]``) drops, after tree 0, the windows below step l + 1."""
    depth, n_trees = 4, 40
    nodes = 2**depth - 1
    steps = [10.0 * k + 0.5 for k in range(15)]
    node_thresholds = np.zeros((n_trees, nodes), np.float32)
    for i in range(nodes):  # heap order: node i at level d, j-th from the left, splits its 2**(4-d)
        d = (i + 1).bit_length() - 1  # leaves in the middle
        j = i - (2**d - 1)
        span = 2 ** (depth - d)
        node_thresholds[0, i] = steps[j * span + span // 2 - 1]
    leaf_values = np.ones((n_trees, nodes + 1), np.float32)
    leaf_values[0] = np.arange(16) / 16
    table = np.full((len(levels), n_trees), -np.inf, np.float32)
    table[:, 0] = (np.arange(len(levels)) + 1) / 16
    feature = np.array([[[0, 0, 1, 1, -1], [0, 1, 1, 1, 1], [0] * 5, [0] * 5]], np.int32)
    return Model((1, 2), feature, np.zeros((n_trees, nodes), np.int32), node_thresholds,
                 leaf_values, np.full(n_trees, -np.inf, np.float32), "bagged", normalize=False,
                 exit_levels=levels, exit_table=table)


def test_scan_uses_the_exit_row_of_the_highest_level_not_above_its_threshold():
    """Direct backward pruning (Zhang and Viola, NIPS 2007): exits for score level c are the row
    calibrated for the highest level not above c (``exit_thresholds`` below the first level), at
    every level and between levels: ``Model.exits_for(c)`` gives it, and a scan given
    ``exit_level=c`` uses it, whether its own threshold is c or 0. The windows kept, and the
    trees they cost, show which row the compiled scan used."""
    from detector.cascade import EXIT_LEVELS
    from detector.scan import Engine, ScanSettings

    levels = np.array(EXIT_LEVELS, np.float32)
    model = _staircase_model(levels)
    # a 16 x 2 frame: column k is 0 over 10k (150 in the last column), so window k is on step k
    gray = np.zeros((2, 16), np.uint8)
    gray[1] = [10 * k for k in range(15)] + [150]
    # hand check of the staircase: the no-exit scores are (k / 16 + 39) / 40 for window k
    plain = Engine(model, ScanSettings(threshold=0.0, early_exit=False, stride=1, scale_step=2.0,
                                       overhang=0.0))
    boxes, raw, windows, _ = plain.candidates(gray)
    assert windows == 16 and boxes[:, 2:].tolist() == [[1.0, 2.0]] * 16
    assert dict(zip(boxes[:, 0].astype(int).tolist(), raw.tolist())) == \
        {k: k / 16 + 39 for k in range(16)}

    def row_of(c):  # the highest level not above c (compared in float32, as the levels are stored)
        rows = [r for r, level in enumerate(levels) if level <= np.float32(c)]
        return rows[-1] if rows else None

    between = [(a + b) / 2 for a, b in zip(levels[:-1].astype(float), levels[1:].astype(float))]
    thresholds = [0.0, 0.03, *levels.astype(float).tolist(), *between, 0.97]
    for c in thresholds:
        row = row_of(c)
        first_exit = -np.inf if row is None else (row + 1) / 16
        np.testing.assert_array_equal(model.exits_for(c), model.exit_thresholds if row is None
                                      else model.exit_table[row])
        for cutoff in (c, 0.0):
            engine = Engine(model, ScanSettings(threshold=cutoff, stride=1, scale_step=2.0,
                                                overhang=0.0, exit_level=c))
            boxes, raw, windows, trees = engine.candidates(gray)
            kept = sorted(boxes[:, 0].astype(int).tolist())
            expected = [k for k in range(16) if k / 16 >= first_exit and (k / 16 + 39) / 40 >= cutoff]
            assert kept == expected, (c, row)
            # a window dropped by the first exit costs 1 tree, any other all 40 (none of the
            # windows dropped here could have been dropped for its score: 39 / 40 >= 0.975)
            dropped = sum(1 for k in range(16) if k / 16 < first_exit)
            assert trees == dropped + 40 * (16 - dropped), (c, row)
    # without early exit no row is used, whatever the threshold
    boxes, _, _, trees = Engine(model, ScanSettings(threshold=0.5, early_exit=False, stride=1,
                                                    scale_step=2.0, overhang=0.0)).candidates(gray)
    assert len(boxes) == 16 and trees == 16 * 40


@pytest.mark.parametrize("mode", ["bagged", "boosted"])
def test_scan_gives_up_at_most_the_budget_of_calibration_objects_at_any_threshold(mode):
    """The promise of ``exit_budget``, kept by the compiled scan itself: the calibration copies
    (9 per held-out object), laid side by side in one frame so that each is one window of the
    scan, are scanned with early exit (contrast gate included) at thresholds below the first exit
    level, at every level, between levels and above the last. Of the copies whose score without
    early exit reaches the threshold, at most floor(0.1 * n) are dropped, n being the copies
    scoring at least the level whose exits the scan uses (``exit_level=c``: the highest level not
    above c, all of the copies below the first level)."""
    from detector.scan import Engine, ScanSettings, final_scores

    patches, y = top_bright(1, 80, 160, spread=90, lift=120)
    clf = PatchClassifier(n_trees=20, pool=400, mode=mode, exit_budget=0.1,
                          random_state=0).fit(patches, y)
    m = clf.model_
    cal = calibration_copies(clf, patches)
    cols = 12
    rows = -(-len(cal) // cols)
    tiles = np.zeros((rows * cols, 12, 12), np.uint8)
    tiles[:len(cal)] = cal
    # frame of rows x cols tiles of 12 x 12; at stride 12 and scale 1 each window is one tile
    gray = tiles.reshape(rows, cols, 12, 12).transpose(0, 2, 1, 3).reshape(rows * 12, cols * 12)
    grid = dict(stride=12.0, max_object=12.0, overhang=0.0, nms_iou=1.0)

    def kept_tiles(engine):
        boxes, raw, windows, _ = engine.candidates(gray)
        assert windows == rows * cols and (boxes[:, 2:] == 12).all()
        index = (boxes[:, 1] // 12 * cols + boxes[:, 0] // 12).astype(int)
        return dict(zip(index.tolist(), raw.tolist()))

    everything = kept_tiles(Engine(m, ScanSettings(threshold=0.0, early_exit=False, **grid)))
    if mode == "bagged":  # threshold 0 is the raw cutoff 0: no window is dropped
        assert len(everything) == rows * cols
    score = np.full(len(cal), -1.0)  # tiles past the last copy are not calibration objects
    for i, raw in everything.items():
        if i < len(cal):
            score[i] = final_scores(m, np.array([raw]))[0]
    assert (score >= 0).sum() > 0.9 * len(cal)
    levels = m.exit_levels.astype(float).tolist()
    assert len(levels) >= 3
    between = [(a + b) / 2 for a, b in zip(levels[:-1], levels[1:])]
    given_up = 0
    for c in [0.02, *levels, *between, min(0.99, levels[-1] + 0.02)]:
        with_exit = kept_tiles(Engine(m, ScanSettings(threshold=c, exit_level=c, **grid)))
        reach = {i for i in range(len(cal)) if score[i] >= c}
        dropped = reach - set(with_exit)
        row_level = max([level for level in levels if np.float32(level) <= np.float32(c)],
                        default=0.0)
        n = int((score >= np.float32(row_level)).sum())
        assert len(dropped) <= int(np.floor(0.1 * n + 1e-9)), (mode, c, len(dropped), n)
        given_up += len(dropped)
    assert given_up > 0  # the exits do spend their budget here: the bound is not idle


@pytest.mark.parametrize("mode", ["bagged", "boosted"])
def test_calibrate_is_what_fit_applies(mode):
    """``cascade.calibrate`` run again on a fitted forest (its trees already in the fitted order):
    the gate and the temperature depend only on final scores, so they are the fitted model's
    (the temperature the balanced fit on the calibration copies' and the background's totals);
    the order is a permutation of the trees and its exits keep the calibration copies the
    budget allows; without calibration objects the trees stay as grown, with no exit at all."""
    from detector.cascade import calibrate, fit_temperature
    from detector.forest import seed_sequence

    patches, y = top_bright(3, 60, 120, spread=60, lift=150)
    clf = PatchClassifier(n_trees=12, pool=400, mode=mode, random_state=0).fit(patches, y)
    m = clf.model_
    cal = calibration_copies(clf, patches)
    background = patches[np.setdiff1d(np.flatnonzero(y == 0), clf.calibration_indices_)]
    exit_ss = seed_sequence(0).spawn(6)[4]
    again = calibrate(m.leaf_scores, mode, patches[clf.calibration_indices_], background,
                      random_state=exit_ss)
    assert sorted(again.order.tolist()) == list(range(m.n_trees))
    assert again.min_sigma == m.exit_min_sigma and again.report["objects"] == 15  # 60 / 4
    totals = m.running_scores(cal)[:, -1], m.running_scores(background)[:, -1]
    assert again.temperature == m.temperature == (fit_temperature(*totals) if mode == "boosted"
                                                  else 1.0)
    # the exits of the returned order keep every calibration copy the budget keeps
    run = m.running_scores(cal)[:, again.order]
    kept = trees_evaluated(run, again.exit_thresholds) == m.n_trees
    assert kept.mean() >= 0.995 - 1.0 / len(cal)
    # without calibration objects: no exits, no gate, temperature 1, the trees as grown
    none = calibrate(m.leaf_scores, mode, patches[:0], background, random_state=exit_ss)
    assert none.order.tolist() == list(range(m.n_trees)) and np.isneginf(none.exit_thresholds).all()
    assert (none.min_sigma, none.temperature, none.exit_levels) == (0.0, 1.0, None)
