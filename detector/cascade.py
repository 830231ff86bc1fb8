"""The early exit (a soft cascade; Bourdev and Brandt, CVPR 2005): everything that decides how soon
a scanned window stops evaluating trees, calibrated once after the forest is grown.

The running score after tree ``t`` is ``s_t = s_{t-1} + leaf_values[t, leaf]`` (``s_0 = 0``; the
float32 leaf values summed in float64, in tree order), and a window is dropped after tree ``t`` as
soon as ``s_t < exit_thresholds[t]``. :func:`calibrate` is the one entry point
:meth:`detector.classifier.PatchClassifier.fit` calls; from object patches held out of growing
(and misaligned copies of them, :func:`misaligned_copies`) and the training background it returns
a :class:`Cascade`:

- the contrast gate (:func:`calibrate_contrast_gate`): windows flatter than the calibration
  objects the exit keeps are dropped before any tree;
- the score temperature of a boosted forest (:func:`fit_temperature`), fitted once;
- the tree order (:func:`order_for_early_exit`) that lets background drop out soonest, for the
  objects a scan at :data:`ORDER_LEVEL` keeps, with the objects the exit gives up
  (:func:`exit_kept`) chosen again for each order (:data:`EXIT_ORDER_ROUNDS`);
- the exit thresholds (:func:`calibrate_exit`) and the table of tighter exits for scans at a
  score threshold or above (:func:`calibrate_exit_table`).

The forest itself is never changed here: the caller applies ``Cascade.order`` to its trees.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from detector._validation import as_generator
from detector._cascade_kernels import best_raise, exit_earlier, greedy_order
from detector.forest import final_score, float32_thresholds
from detector.geometry import crop_region

__all__ = [
    "Cascade",
    "calibrate",
    "calibration_count",
    "misaligned_copies",
    "window_sigma",
    "fit_temperature",
    "calibrate_exit",
    "calibrate_contrast_gate",
    "calibrate_exit_table",
    "EXIT_BUDGET",
    "EXIT_LEVELS",
    "exit_kept",
    "kept_objects",
    "order_for_early_exit",
    "trees_evaluated",
]

#: Share of the held-out calibration objects that the contrast gate and all the exits together
#: may give up (``patchwood train --exit-budget``), chosen by measurement (DEVELOPERS.md, "The
#: early exit's budget"): a budget, not a rate each exit must keep.
EXIT_BUDGET = 0.05

#: What seeds a random draw here (as scikit-learn's ``random_state``).
RandomState = int | np.random.SeedSequence | np.random.Generator | None

#: Fraction of object patches held out from growing to calibrate the early exit ...
CALIBRATION_FRACTION = 0.1
#: ... but at least this many when there are four times as many object patches.
CALIBRATION_MINIMUM = 20
#: Background patches (at most) the tree ordering and the exit calibration look at.
MAX_ORDERING_BACKGROUND = 5000
#: Rounds of ordering the trees for the objects the exit keeps, then choosing those objects again
#: (on the default model the second round lowered the trees a background window evaluates from
#: 1.97 to 1.84 and a third changed nothing).
EXIT_ORDER_ROUNDS = 2
#: The tree order is made for a scan at this score threshold (``ScanSettings``' default).
ORDER_LEVEL = 0.5


def calibration_count(n_objects: int) -> int:
    """How many object patches to hold out for the early-exit calibration.

    10 % of them, rounded up; at least 20 while that leaves three quarters for growing.

    Examples
    --------
    >>> [calibration_count(n) for n in (0, 3, 40, 80, 100, 5000)]
    [0, 0, 10, 20, 20, 500]
    """
    n_cal = math.ceil(CALIBRATION_FRACTION * n_objects)
    if n_cal < CALIBRATION_MINIMUM:
        n_cal = min(CALIBRATION_MINIMUM, n_objects // 4)
    return int(n_cal)


def misaligned_copies(patches: ArrayLike, shift: float = 1.0, scale: float = 1.1, copies: int = 8,
                      random_state: RandomState = None) -> np.ndarray:
    """Every patch as the scan's nearest window may see it: the patch itself, then ``copies``
    copies shifted by up to ``shift`` pixels along x and y and scaled by up to ``scale`` either way
    (uniform shifts, log-uniform scales: where an object falls between the scan's grid points and
    scales). Pixels outside the patch repeat its border. Returns ``(N * (copies + 1), h, w)``,
    the copies of each patch together, the patch first.

    Examples
    --------
    >>> p = np.arange(16, dtype=np.uint8).reshape(1, 4, 4)
    >>> c = misaligned_copies(p, 1.0, 1.0, copies=3, random_state=0)
    >>> c.shape, bool((c[0] == p[0]).all())
    ((4, 4, 4), True)
    """
    patches = np.asarray(patches, dtype=np.uint8)
    n, h, w = patches.shape
    rng = as_generator(random_state)
    out = np.empty((n, copies + 1, h, w), np.uint8)
    out[:, 0] = patches
    for i in range(n):
        dx = rng.uniform(-shift, shift, copies)
        dy = rng.uniform(-shift, shift, copies)
        k = np.exp(rng.uniform(-np.log(scale), np.log(scale), copies))
        for j in range(copies):
            out[i, j + 1] = crop_region(patches[i], (w / 2 + dx[j], h / 2 + dy[j]),
                                        (w * k[j], h * k[j]), (w, h))
    return out.reshape(n * (copies + 1), h, w)


def window_sigma(patches: ArrayLike) -> np.ndarray:
    """Grey-level standard deviation of each patch, as the scan computes it for a window
    (population variance from the exact integer sums of the pixels and of their squares).

    Examples
    --------
    >>> window_sigma(np.array([[[0, 2], [0, 2]], [[5, 5], [5, 5]]], np.uint8)).tolist()
    [1.0, 0.0]
    """
    from detector.features import pixel_sums

    p = np.asarray(patches)
    total, square_total = pixel_sums(p)
    area = float(np.prod(p.shape[1:]))
    mean = total / area
    var = square_total / area - mean * mean
    return np.sqrt(np.maximum(var, 0.0))


def fit_temperature(object_totals: ArrayLike, background_totals: ArrayLike) -> float:
    """Temperature scaling of the boosted score (Guo et al., ICML 2017, "On Calibration of Modern
    Neural Networks"): the ``T >= 1`` that minimises the class-balanced log-loss of
    ``1 / (1 + exp(-2 F / T))`` on object and background patches.

    Boosting pushes its sums far out (Niculescu-Mizil and Caruana, ICML 2005), so without it nearly
    every confident detection would score 1.0 to six digits and a threshold could not tell them
    apart. The order of scores, and so every AP, does not depend on ``T``.

    Examples
    --------
    >>> t = fit_temperature([8.0, 10.0, 12.0, 3.0], [-9.0, -11.0, 2.0, -12.0])
    >>> bool(t > 1.0)
    True
    >>> fit_temperature([0.2, 0.3], [-0.2, -0.1])   # already soft: no change
    1.0
    """
    o = np.asarray(object_totals, dtype=np.float64)
    b = np.asarray(background_totals, dtype=np.float64)
    if len(o) == 0 or len(b) == 0:
        return 1.0
    # In u = 1 / T the loss is (mean softplus(-2 o u) + mean softplus(2 b u)) / 2: a sum of
    # softplus of linear functions of u, so convex; its minimum on [1 / 1000, 1] is found by
    # Newton steps on the derivative, kept inside a shrinking bracket (bisection when a step
    # leaves it). A hand-written solver: scipy.optimize's import alone cost every train command
    # 0.19 s. tests/test_temperature.py holds it to scikit-learn's logistic regression.
    x = np.r_[-2.0 * o, 2.0 * b]
    share = np.r_[np.full(len(o), 0.5 / len(o)), np.full(len(b), 0.5 / len(b))]

    def slopes(u):
        """The loss's first and second derivative at ``u``."""
        p = 0.5 * (1.0 + np.tanh(0.5 * x * u))  # sigmoid(x u), without overflow
        return float(np.dot(share, x * p)), float(np.dot(share, x * x * p * (1.0 - p)))

    low, high = 1e-3, 1.0
    if slopes(high)[0] <= 0.0:  # still falling at T = 1: the scores are not sharper than the data
        return 1.0
    if slopes(low)[0] >= 0.0:
        return 1000.0
    u = 0.5 * (low + high)
    for _ in range(200):
        g, h = slopes(u)
        if g > 0.0:
            high = u
        else:
            low = u
        step = u - g / h if h > 0.0 else np.nan
        before, u = u, (step if low < step < high else 0.5 * (low + high))
        if g == 0.0 or abs(u - before) <= 1e-12 * before:
            break
    t = 1.0 / u
    return 1.0 if t < 1.0 + 1e-3 else round(t, 6)


def calibrate_exit(running_scores: ArrayLike, exit_budget: float = EXIT_BUDGET,
                   background: ArrayLike | None = None,
                   lost: ArrayLike | None = None) -> np.ndarray:
    """Early-exit thresholds from the running scores of held-out object patches.

    At most ``floor(exit_budget * N)`` objects are set aside (:func:`exit_kept`: the ones
    with the lowest final score, or, given background windows, the ones that hold the exits down
    most); each threshold is the minimum running score, after that tree, of the objects kept,
    rounded down to float32 (the common
    approach for soft cascades; Bourdev and Brandt, CVPR 2005, calibrate a rejection trace on
    positives). A window is dropped after tree ``t`` when ``s_t < thresholds[t]``, so no kept object
    is ever dropped and at most ``exit_budget`` of the calibration objects are dropped over the
    whole cascade.

    Parameters
    ----------
    running_scores : ndarray of float64, shape (N, T)
        From :func:`forest_running_scores` on object patches.
    exit_budget : float in [0, 1)
        Share of the calibration objects that all the exits together may give up.
    background : ndarray (M, T), optional
        Running scores of background windows past the contrast gate (see :func:`exit_kept`).
    lost : boolean ndarray (N,), optional
        Objects the contrast gate drops; they count against the budget.

    Returns
    -------
    ndarray of float32, shape (T,)
        ``-inf`` everywhere (never exit) when there are no calibration objects.

    Examples
    --------
    >>> r = np.array([[1, 2], [0, 3], [2, 1]], np.float32)   # final scores 2, 3, 1
    >>> calibrate_exit(r, exit_budget=0.5).tolist()            # floor(0.5*3)=1 dropped: row 3
    [0.0, 2.0]
    """
    r = np.asarray(running_scores, dtype=np.float64)
    if r.ndim != 2:
        raise ValueError("running_scores must be (N, T)")
    if not 0.0 <= exit_budget < 1.0:
        raise ValueError(f"exit_budget must be in [0, 1), got {exit_budget}")
    n, t = r.shape
    if n == 0:
        return np.full(t, -np.inf, np.float32)
    return float32_thresholds(r[exit_kept(r, background, exit_budget, lost)].min(axis=0))


#: Trees at the front of the order whose exits :func:`exit_kept` tries to raise.
EXIT_SEARCH_TREES = 64


def exit_kept(running_scores: ArrayLike, background_running: ArrayLike | None = None,
              exit_budget: float = EXIT_BUDGET, lost: ArrayLike | None = None,
              search_trees: int = EXIT_SEARCH_TREES, use_numpy: bool = False) -> np.ndarray:
    """Which calibration objects the early exit keeps (a boolean mask): all but at most
    ``floor(exit_budget * N)``, given up where that lets background windows exit soonest.

    A soft cascade may spread the misses it is allowed over its stages (Bourdev and Brandt,
    CVPR 2005, call the spread a rejection distribution vector). Here the objects are given up
    greedily, in groups: the exit after tree ``t`` is the lowest running score of the kept objects,
    so raising it means giving up the kept objects that sit exactly at that lowest score. Each step
    takes, among the first ``search_trees`` trees, the raise that saves the most background tree
    evaluations per object given up (counted exactly, with the contrast-gated background windows
    given), while the budget lasts and a raise saves anything. Objects in ``lost`` (dropped before
    any tree, by the contrast gate) count against the budget first.

    The result is never worse on the given background than the plain rule (:func:`kept_objects`:
    give up the objects with the lowest final score): the mask whose exits leave fewer background
    tree evaluations is returned, the plain one on a tie. Without background windows the plain rule
    is used.

    Parameters
    ----------
    running_scores : ndarray, shape (N, T)
        Running scores of the calibration objects.
    background_running : ndarray, shape (M, T), optional
        Running scores of background windows that pass the contrast gate.
    exit_budget : float in [0, 1)
    lost : boolean ndarray (N,), optional
        Objects lost anyway; never kept.
    search_trees : int
    use_numpy : bool
        Search with the plain-numpy twin of the compiled step (:func:`_best_raise_numpy`).

    Examples
    --------
    >>> r = np.array([[0., 6.], [2., 4.], [2., 5.], [3., 6.]])    # final scores 6, 4, 5, 6
    >>> bg = np.array([[1., 1.], [1., 1.], [1.5, 1.5], [5., 5.]])
    >>> sorted(kept_objects(r[:, -1], 0.25).tolist())   # budget 1: the lowest final score goes
    [0, 2, 3]
    >>> # giving up row 0 instead lifts the first exit from 0 to 2: three background windows
    >>> # leave after one tree (5 evaluations in all, against 8 with the plain rule's exits 0, 5)
    >>> exit_kept(r, bg, 0.25).tolist()
    [False, True, True, True]
    """
    r = np.asarray(running_scores, dtype=np.float64)
    n, t = r.shape
    lost = np.zeros(n, bool) if lost is None else np.asarray(lost, dtype=bool).copy()
    budget = min(int(np.floor(exit_budget * n + 1e-9)), max(n - 1, 0))
    if n and lost.all():
        lost[:] = False  # nothing would be left to calibrate on: keep every object
    # the plain rule: after the lost objects, the lowest final scores go while the budget lasts
    plain = ~lost
    alive = np.flatnonzero(plain)
    spare = min(budget - int(lost.sum()), len(alive) - 1)
    if spare > 0:
        plain[alive[np.argsort(r[alive, -1], kind="stable")[:spare]]] = False
    if background_running is None or len(background_running) == 0 or n == 0:
        return plain
    b = np.asarray(background_running, dtype=np.float64)
    # every mask below drops at most removable = K - 1 objects, so each tree's lowest kept score is
    # among its K lowest: keep those, sorted, and read minima from them (K x T, not N x T)
    removable = max(budget, int(lost.sum()))
    k_low = min(n, removable + 1)
    low = np.argsort(r, axis=0, kind="stable")[:k_low] if k_low == n else \
        np.argpartition(r, k_low - 1, axis=0)[:k_low]
    low_vals = np.take_along_axis(r, low, axis=0)
    o = np.argsort(low_vals, axis=0, kind="stable")
    low, low_vals = np.take_along_axis(low, o, axis=0), np.take_along_axis(low_vals, o, axis=0)
    cols = np.arange(t)

    def minima(mask):
        return low_vals[mask[low].argmax(axis=0), cols]

    def evaluations(mask):
        return float(trees_evaluated(b, float32_thresholds(minima(mask))).sum())

    keep = ~lost
    budget -= int(lost.sum())
    front = min(t, int(search_trees))
    exits = float32_thresholds(minima(keep))
    below = b < exits.astype(np.float64)[None, :]
    # the tree each window exits after; one that never exits evaluates all t trees, as one that
    # exits after the last tree does (counting it as t overstated every saving it took part in
    # by one tree, against trees_evaluated)
    first = np.where(below.any(axis=1), np.argmax(below, axis=1), t - 1)
    low_thr = float32_thresholds(low_vals)  # each candidate minimum as the exit it would give
    search = _best_raise_numpy if use_numpy else best_raise
    while budget > 0 and keep.sum() > 1:
        # the object each tree's lowest kept score belongs to (the first kept one in sorted
        # order): giving up a group moves only the exits of the trees whose holder is in it
        holder = low[keep[low].argmax(axis=0), cols]
        at_min = (r[:, :front] == minima(keep)[None, :front]) & keep[:, None]  # who holds
        sizes = at_min.sum(axis=0)                                              # each exit down
        candidates = np.flatnonzero((sizes <= budget) & (sizes < keep.sum()))
        i = search(at_min, candidates, keep, holder, low, low_thr, exits, b, first)
        if i < 0:
            break
        group = np.flatnonzero(at_min[:, candidates[i]])
        keep[group] = False
        new = float32_thresholds(minima(keep))
        changed = np.flatnonzero(new != exits)
        exit_earlier(b, first, changed, new[changed].astype(np.float64), first)
        exits = new
        budget -= len(group)
    return keep if evaluations(keep) < evaluations(plain) else plain


def _best_raise_numpy(at_min, candidates, keep, holder, low, low_thr, exits, b, first):
    """Plain-numpy twin of :func:`detector._cascade_kernels.best_raise` (the same groups in the
    same order, the same savings; tests/test_early_exit.py holds the two equal)."""
    best, best_gain, tried = -1, 0.0, set()
    for i, k in enumerate(candidates):
        group = np.flatnonzero(at_min[:, k])
        key = tuple(group.tolist())
        if key in tried:
            continue
        tried.add(key)
        trial = keep.copy()
        trial[group] = False
        moved = np.flatnonzero(~trial[holder])
        new = low_thr[trial[low[:, moved]].argmax(axis=0), moved]
        differs = new != exits[moved]
        changed = moved[differs]
        if not len(changed):
            continue
        saved = exit_earlier.py_func(b, first, changed, new[differs].astype(np.float64), None)
        gain = saved / len(group)
        if saved > 0 and (best < 0 or gain > best_gain):
            best, best_gain = i, gain
    return best


#: Score thresholds that get exit thresholds of their own (see :func:`calibrate_exit_table`).
EXIT_LEVELS = (0.05, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 0.95)


def calibrate_exit_table(running_scores: ArrayLike, final_scores: ArrayLike,
                         exit_budget: float = EXIT_BUDGET, levels: Sequence[float] = EXIT_LEVELS,
                         background: ArrayLike | None = None,
                         lost: ArrayLike | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Exit thresholds for scans at given score thresholds (direct backward pruning).

    A scan at score threshold ``c`` reports only windows that end at ``c`` or above, so its exits
    need to keep only the calibration objects that do (Zhang and Viola, "Multiple-instance pruning
    for learning efficient cascade detectors", NIPS 2007, call this direct backward pruning): row
    ``l`` is :func:`calibrate_exit` on the objects whose final score reaches ``levels[l]``.
    Levels above every object's score are left out.

    Parameters
    ----------
    running_scores : ndarray, shape (N, T)
    final_scores : ndarray, shape (N,)
        The objects' final scores in 0..1 (:func:`final_score` of the last running score).
    exit_budget : float in [0, 1)
    levels : sequence of float in 0..1, rising
    background, lost :
        As for :func:`calibrate_exit` (``lost`` indexes all N objects).

    Returns
    -------
    (levels float32 (L,), table float32 (L, T))

    Examples
    --------
    >>> r = np.array([[1, 2], [0, 3], [2, 1]], np.float64)      # final scores 0.9, 0.95, 0.2
    >>> lv, tab = calibrate_exit_table(r, np.array([0.9, 0.95, 0.2]), 0.0, levels=(0.5, 0.99))
    >>> lv.tolist(), tab.tolist()        # level 0.5 keeps rows 1 and 2: minima 0 and 2
    ([0.5], [[0.0, 2.0]])
    """
    r = np.asarray(running_scores, dtype=np.float64)
    fin = np.asarray(final_scores, dtype=np.float64)
    out_levels, rows = [], []
    for level in levels:
        sel = fin >= np.float32(level)
        if not sel.any():
            break
        out_levels.append(level)
        rows.append(calibrate_exit(r[sel], exit_budget, background,
                                   None if lost is None else np.asarray(lost, bool)[sel]))
    t = r.shape[1]
    return (np.asarray(out_levels, np.float32),
            np.asarray(rows, np.float32).reshape(len(rows), t))


def kept_objects(final_scores: ArrayLike, exit_budget: float = EXIT_BUDGET) -> np.ndarray:
    """Indices of the calibration objects the early exit promises to keep: all but the
    ``floor(exit_budget * N)`` with the lowest final score (at least one is kept).

    Examples
    --------
    >>> # floor(0.5 * 4) = 2 given up: the final scores 0.5 and 1.0; the rest in rising order
    >>> kept_objects(np.array([2.0, 3.0, 1.0, 0.5]), exit_budget=0.5).tolist()
    [0, 1]
    """
    final = np.asarray(final_scores, dtype=np.float64)
    n = len(final)
    n_drop = min(int(np.floor(exit_budget * n + 1e-9)), max(n - 1, 0))
    return np.argsort(final, kind="stable")[n_drop:]


#: The contrast gate keeps windows whose grey-level variance is at least this fraction of the lowest
#: variance among the kept calibration objects: half, as the variance filter of Kalal, Mikolajczyk and
#: Matas (TLD, IEEE TPAMI 2012) does, which leaves room for objects seen at lower contrast than in
#: training.
CONTRAST_GATE_VARIANCE_FRACTION = 0.5


def calibrate_contrast_gate(sigmas: ArrayLike, final_scores: ArrayLike, exit_budget: float = EXIT_BUDGET,
                            variance_fraction: float = CONTRAST_GATE_VARIANCE_FRACTION) -> float:
    """The lowest grey-level standard deviation a window may have and still be scored.

    A window of nearly flat grey (empty belt, shadow) cannot hold the object; the scan drops it
    before any tree when its standard deviation is below the value returned here: the lowest
    standard deviation among the calibration objects the early exit keeps (:func:`kept_objects`),
    times ``sqrt(variance_fraction)``.

    Parameters
    ----------
    sigmas : array_like, shape (N,)
        Grey-level standard deviation of each calibration object patch (as the scan computes it
        per window: population standard deviation of the pixels).
    final_scores : array_like, shape (N,)
        Their running score after the last tree.
    exit_budget : float in [0, 1)
    variance_fraction : float in [0, 1]

    Returns
    -------
    float
        0.0 (no gate) when there are no calibration objects.

    Examples
    --------
    >>> # kept: sigmas 20 and 30 (the lowest final score, sigma 4, is given up); 20 * sqrt(0.25) = 10
    >>> calibrate_contrast_gate([20.0, 4.0, 30.0], [1.0, -2.0, 3.0], 0.6, variance_fraction=0.25)
    10.0
    """
    sig = np.asarray(sigmas, dtype=np.float64)
    if len(sig) == 0:
        return 0.0
    if not 0.0 <= variance_fraction <= 1.0:
        raise ValueError(f"variance_fraction must be in [0, 1], got {variance_fraction}")
    return float(sig[kept_objects(final_scores, exit_budget)].min() * math.sqrt(variance_fraction))


def order_for_early_exit(object_leaves: ArrayLike, background_leaves: ArrayLike,
                         exit_budget: float = EXIT_BUDGET) -> np.ndarray:
    """A tree order that drops background windows as early as the exit rule allows.

    The final score is a sum over trees, so any order gives the same scores; only the early exit
    depends on it. Greedy, as in the soft cascade (Bourdev and Brandt, CVPR 2005, order their weak
    classifiers by how much they reject): at every step take the remaining tree that, with the exit
    threshold :func:`calibrate_exit` would give it (the lowest running score of the kept objects),
    drops the most background windows still alive; ties go to the lower index.

    Parameters
    ----------
    object_leaves : ndarray, shape (N_o, T)
        Leaf value each held-out object patch gets from each tree.
    background_leaves : ndarray, shape (N_b, T)
        The same for background patches.
    exit_budget : float in [0, 1)

    Returns
    -------
    ndarray of int64, shape (T,)
        The new order (a permutation of ``range(T)``).

    Examples
    --------
    >>> obj = np.array([[1.0, 1.0, 1.0], [1.0, 1.0, 1.0]])
    >>> bg = np.array([[1.0, 1.0, 0.0], [1.0, 0.0, 1.0], [1.0, 0.0, 0.0]])
    >>> order_for_early_exit(obj, bg, exit_budget=0.0).tolist()   # tree 1 drops 2, then tree 2 drops 1
    [1, 2, 0]
    """
    o, b = _ordering_inputs(object_leaves, background_leaves, exit_budget)
    if o is None:
        return np.arange(np.shape(object_leaves)[1])
    return greedy_order(np.ascontiguousarray(o), np.ascontiguousarray(b))


def _ordering_inputs(object_leaves, background_leaves, exit_budget):
    """float64 leaves of the objects the ordering keeps (all but the lowest sums the exit may give
    up) and of the background; ``(None, None)`` when either is empty."""
    o = np.asarray(object_leaves, dtype=np.float64)
    b = np.asarray(background_leaves, dtype=np.float64)
    if len(o) == 0 or len(b) == 0:
        return None, None
    if not 0.0 <= exit_budget < 1.0:
        raise ValueError(f"exit_budget must be in [0, 1), got {exit_budget}")
    n_drop = min(int(np.floor(exit_budget * len(o) + 1e-9)), len(o) - 1)
    return o[np.argsort(o.sum(axis=1), kind="stable")[n_drop:]], b


def _order_for_early_exit_numpy(object_leaves, background_leaves, exit_budget: float = EXIT_BUDGET):
    """Plain-numpy form of :func:`order_for_early_exit` (the tests hold the compiled loop equal to
    it)."""
    o, b = _ordering_inputs(object_leaves, background_leaves, exit_budget)
    T = np.shape(object_leaves)[1]
    if o is None:
        return np.arange(T)
    o_sum = np.zeros(len(o))
    b_sum = np.zeros(len(b))
    alive = np.ones(len(b), bool)
    remaining = list(range(T))
    order = []
    for _ in range(T):
        rem = np.asarray(remaining)
        thr = (o_sum[:, None] + o[:, rem]).min(axis=0)  # exit threshold each candidate would get
        live = np.flatnonzero(alive)
        if len(live):
            dropped = ((b_sum[live, None] + b[np.ix_(live, rem)]) < thr[None, :]).sum(axis=0)
        else:
            dropped = np.zeros(len(rem), np.int64)
        k = int(np.argmax(dropped))
        t = int(rem[k])
        order.append(t)
        remaining.remove(t)
        o_sum += o[:, t]
        b_sum += b[:, t]
        alive &= ~(b_sum < thr[k])
    return np.asarray(order, dtype=np.int64)


def trees_evaluated(running_scores: ArrayLike, exit_thresholds: ArrayLike) -> np.ndarray:
    """How many trees each window evaluates before it exits (T when it never exits).

    Examples
    --------
    >>> r = np.array([[1, 2, 3], [0, 3, 4], [2, 0, 5]], np.float32)
    >>> trees_evaluated(r, np.array([0.5, 1.0, 3.5], np.float32)).tolist()
    [3, 1, 2]
    """
    r = np.asarray(running_scores, dtype=np.float64)
    below = r < np.asarray(exit_thresholds, dtype=np.float32).astype(np.float64)[None, :]
    first = np.argmax(below, axis=1)
    return np.where(below.any(axis=1), first + 1, r.shape[1]).astype(np.int64)


@dataclass(frozen=True)
class Cascade:
    """The calibrated early exit of a forest (see :func:`calibrate`).

    Attributes
    ----------
    order : ndarray of int64, shape (T,)
        The tree order: tree ``k`` of the calibrated forest is tree ``order[k]`` of the grown one.
    exit_thresholds : ndarray of float32, shape (T,)
        Exits (in the new order) that keep the calibration objects at any score; ``-inf`` without
        calibration objects.
    exit_levels, exit_table : ndarray of float32, shapes (L,) and (L, T), or None
        Tighter exits for scans at a score threshold of at least ``exit_levels[l]``.
    min_sigma : float
        The contrast gate (0: none).
    temperature : float
        The boosted score's temperature (1.0 for bagged forests and without calibration objects).
    report : dict
        Figures for the model's metadata: objects, copies per object, mean trees evaluated per
        object and background window, the background share the gate drops.
    """

    order: np.ndarray
    exit_thresholds: np.ndarray
    exit_levels: np.ndarray | None
    exit_table: np.ndarray | None
    min_sigma: float
    temperature: float
    report: dict


def calibrate(leaf_scores: Callable[[np.ndarray], np.ndarray], mode: str, objects: np.ndarray,
              background: np.ndarray, *, exit_budget: float = EXIT_BUDGET, shift: float = 1.0,
              scale: float = 1.1, contrast_gate: bool = True,
              random_state: RandomState = None,
              background_leaves: np.ndarray | None = None) -> Cascade:
    """Calibrate the early exit of a grown forest.

    Parameters
    ----------
    leaf_scores : callable
        ``leaf_scores(patches) -> (N, T)`` float32: the leaf value each patch gets from each tree of
        the grown forest, in its growing order (:meth:`detector.model.Model.leaf_scores`).
    mode : {"bagged", "boosted"}
    objects : ndarray of uint8, shape (K, h, w)
        Object patches held out from growing (K may be 0: no exits, no gate, temperature 1).
    background : ndarray of uint8, shape (M, h, w)
        Background patches (those of growing).
    exit_budget : float in [0, 1)
        Share of the calibration objects (copies included) that the contrast gate and all the
        exits together may give up (:data:`EXIT_BUDGET` by default).
    shift, scale : float
        How far the misaligned copies of each object may be off (:func:`misaligned_copies`).
    contrast_gate : bool
        Calibrate the contrast gate (only meaningful with contrast-normalised features).
    random_state : None, int, SeedSequence or generator
        Seeds the misaligned copies.
    background_leaves : ndarray of float32, shape (M, T), optional
        ``leaf_scores(background)``, when the caller already knows it (the fit reads it off the
        bins the trees were grown on, without computing the background's feature values again).

    Examples
    --------
    >>> leaves = lambda p: np.c_[p[:, 0, 0] > 100, p[:, 0, 1] > 100].astype(np.float32)
    >>> obj = np.full((8, 4, 4), 200, np.uint8); obj[:, 1:] = 0
    >>> bg = np.zeros((8, 4, 4), np.uint8); bg[:, 2:] = 90
    >>> c = calibrate(leaves, "bagged", obj, bg, exit_budget=0.0, shift=0.0, scale=1.0,
    ...               random_state=0)
    >>> c.order.tolist(), c.exit_thresholds.tolist()    # objects score 1 then 2, background 0
    ([0, 1], [1.0, 2.0])
    >>> c.min_sigma > 45.0, c.report["background_dropped_by_contrast_gate"]   # background sigma 45
    (True, 1.0)
    >>> calibrate(leaves, "bagged", obj, bg, exit_budget=0.0, shift=0.0, scale=1.0,
    ...           contrast_gate=False, random_state=0).report["mean_trees_background"]
    1.0
    """
    share = float(exit_budget)
    bg_leaf = leaf_scores(background) if background_leaves is None else \
        np.asarray(background_leaves, dtype=np.float32)
    if len(bg_leaf) != len(background):
        raise ValueError(f"background_leaves holds {len(bg_leaf)} rows for {len(background)} "
                         "background patches")
    n_trees = bg_leaf.shape[1]
    # leaf values once; running scores in any tree order are their cumulative sums
    bg_running = np.cumsum(bg_leaf, axis=1, dtype=np.float64)
    bg_sigma = window_sigma(background)
    step = max(1, int(np.ceil(len(bg_running) / MAX_ORDERING_BACKGROUND)))
    order = np.arange(n_trees, dtype=np.int64)
    exits = np.full(n_trees, -np.inf, np.float32)
    levels = table = None
    mean_objects, gate, temperature, copies = None, 0.0, 1.0, 0
    if len(objects):
        calibration = misaligned_copies(objects, float(shift), float(scale),
                                        random_state=random_state)
        copies = len(calibration) // len(objects)
        cal_leaf = leaf_scores(calibration)
        running = np.cumsum(cal_leaf, axis=1, dtype=np.float64)
        cal_sigma = window_sigma(calibration)
        gate = calibrate_contrast_gate(cal_sigma, running[:, -1], share) if contrast_gate else 0.0
        lost = cal_sigma < gate  # dropped by the gate: they count against the exit's budget
        # the background windows the exit calibration counts trees on: those of the ordering
        # sample that pass the gate
        past_gate = np.flatnonzero(bg_sigma >= gate)
        past_gate = past_gate[past_gate % step == 0]
        # the final scores do not depend on the tree order, so neither does the temperature
        if mode == "boosted":
            temperature = fit_temperature(running[:, -1], bg_running[:, -1])
        # reorder the trees so that background drops out early (same final scores), for the
        # objects that a scan at the default threshold keeps (direct backward pruning, see
        # calibrate_exit_table); which objects the exit gives up depends on the order, and the
        # order on them: EXIT_ORDER_ROUNDS rounds
        at = final_score(mode, running[:, -1], n_trees, temperature) >= np.float32(ORDER_LEVEL)
        if not at.any():
            at[:] = True
        keep = exit_kept(running[at], None, share, lost[at])
        for _ in range(EXIT_ORDER_ROUNDS):
            step_order = order_for_early_exit(cal_leaf[at][keep].astype(np.float64),
                                              bg_leaf[::step].astype(np.float64), 0.0)
            order = order[step_order]
            cal_leaf, bg_leaf = cal_leaf[:, step_order], bg_leaf[:, step_order]
            running = np.cumsum(cal_leaf, axis=1, dtype=np.float64)
            bg_running = np.cumsum(bg_leaf, axis=1, dtype=np.float64)
            keep = exit_kept(running[at], bg_running[past_gate], share, lost[at])
        exits = float32_thresholds(
            running[exit_kept(running, bg_running[past_gate], share, lost)].min(axis=0))
        mean_objects = float(trees_evaluated(running, exits).mean())
        levels, table = calibrate_exit_table(
            running, final_score(mode, running[:, -1], n_trees, temperature),
            share, background=bg_running[past_gate], lost=lost)
    bg_gated = bg_sigma < gate
    mean_background = float(np.where(bg_gated, 0, trees_evaluated(bg_running, exits)).mean())
    report = {
        "objects": int(len(objects)),
        "copies_per_object": int(copies),
        "mean_trees_objects": mean_objects,
        "mean_trees_background": mean_background,
        "contrast_gate_min_sigma": gate,
        "background_dropped_by_contrast_gate": float(bg_gated.mean()) if len(bg_gated) else 0.0,
    }
    return Cascade(order=order, exit_thresholds=exits, exit_levels=levels, exit_table=table,
                   min_sigma=float(gate), temperature=float(temperature), report=report)
