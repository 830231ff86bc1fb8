"""Compiled loops of the early-exit calibration (:mod:`detector.cascade`), which holds their
orchestration and the plain-numpy twin of :func:`greedy_order`."""

from __future__ import annotations

from detector._jit import kernel
import numpy as np

__all__ = ["best_raise", "exit_earlier", "greedy_order"]


@kernel(cache=True, nogil=True)
def exit_earlier(b, first, cols, bounds, out):
    """Tree evaluations saved when the exits after trees ``cols`` (rising) rise to ``bounds``: a
    window that now leaves after tree ``first[j]`` leaves after the first of ``cols`` before that
    where its running score is below the new bound, and evaluates ``first[j] - c`` trees fewer
    (a window that never leaves has ``first`` the last tree: it evaluates them all either way).
    With ``out``, the new exit trees are written there (it may be ``first`` itself)."""
    saved = 0
    for j in range(b.shape[0]):
        f = first[j]
        for q in range(cols.shape[0]):
            c = cols[q]
            if c >= f:
                break
            if b[j, c] < bounds[q]:
                saved += f - c
                f = c
                break
        if out is not None:
            out[j] = f
    return saved


@kernel(cache=True, nogil=True)
def greedy_order(o, b):
    """The loop of :func:`order_for_early_exit` (the same sums in the same order as its numpy
    form, so the same order; tests/test_early_exit.py holds them equal)."""
    n_o, T = o.shape
    n_b = b.shape[0]
    o_sum = np.zeros(n_o)
    b_sum = np.zeros(n_b)
    live = np.arange(n_b)
    n_live = n_b
    used = np.zeros(T, np.bool_)
    order = np.empty(T, np.int64)
    thr = np.empty(T)
    for step in range(T):
        for t in range(T):  # exit threshold each remaining tree would get
            if used[t]:
                continue
            m = np.inf
            for i in range(n_o):
                v = o_sum[i] + o[i, t]
                if v < m:
                    m = v
            thr[t] = m
        best = -1
        best_drop = -1
        for t in range(T):  # the first of the trees that drop the most living background
            if used[t]:
                continue
            d = 0
            for q in range(n_live):
                j = live[q]
                if b_sum[j] + b[j, t] < thr[t]:
                    d += 1
            if d > best_drop:
                best_drop = d
                best = t
        order[step] = best
        used[best] = True
        for i in range(n_o):
            o_sum[i] += o[i, best]
        for j in range(n_b):
            b_sum[j] += b[j, best]
        k = 0
        for q in range(n_live):
            j = live[q]
            if not b_sum[j] < thr[best]:
                live[k] = j
                k += 1
        n_live = k
    return order


@kernel(cache=True, nogil=True)
def best_raise(at_min, candidates, keep, holder, low, low_thr, exits, b, first):
    """The search step of :func:`detector.cascade.exit_kept`: among the groups of kept objects
    that hold the exit of tree ``candidates[i]`` down (column ``candidates[i]`` of ``at_min``),
    the one whose giving up saves the most background tree evaluations per object; the first of
    equal gains in candidate order. Returns ``i``, ``-1`` when no group saves anything.

    ``holder[c]`` is the kept object with tree ``c``'s lowest score; ``low`` / ``low_thr`` hold
    each tree's lowest scores' objects in rising order and those scores as float32 exits; a trial
    moves only the exits of the trees whose holder it gives up, to the next kept object's there.
    Groups equal to one already tried are skipped (they would gain the same). The plain-numpy
    twin is the loop in :func:`detector.cascade._best_raise_numpy`.
    """
    n = at_min.shape[0]
    t = exits.shape[0]
    k_low = low.shape[0]
    n_b = b.shape[0]
    # a random 64-bit key per object; a group's key is the sum of its members' (exact check on
    # equal keys)
    keys = np.empty(n, np.uint64)
    state = np.uint64(0x9E3779B97F4A7C15)
    for i in range(n):
        state = state * np.uint64(6364136223846793005) + np.uint64(1442695040888963407)
        keys[i] = state ^ (state >> np.uint64(29))
    tried_keys = np.empty(candidates.shape[0], np.uint64)
    tried_cols = np.empty(candidates.shape[0], np.int64)
    n_tried = 0
    changed = np.empty(t, np.int64)
    bounds = np.empty(t)
    best = -1
    best_gain = 0.0
    for ci in range(candidates.shape[0]):
        k = candidates[ci]
        key = np.uint64(0)
        size = 0
        for i in range(n):
            if at_min[i, k]:
                key += keys[i]
                size += 1
        seen = False
        for q in range(n_tried):
            if tried_keys[q] == key:
                same = True
                other = tried_cols[q]
                for i in range(n):
                    if at_min[i, k] != at_min[i, other]:
                        same = False
                        break
                if same:
                    seen = True
                    break
        if seen:
            continue
        tried_keys[n_tried] = key
        tried_cols[n_tried] = k
        n_tried += 1
        n_changed = 0
        for c in range(t):
            if not at_min[holder[c], k]:
                continue
            p = 0  # the first object still kept in the trial (as numpy's argmax finds it)
            for q in range(k_low):
                if keep[low[q, c]] and not at_min[low[q, c], k]:
                    p = q
                    break
            if low_thr[p, c] != exits[c]:
                changed[n_changed] = c
                bounds[n_changed] = np.float64(low_thr[p, c])
                n_changed += 1
        if n_changed == 0:
            continue
        saved = 0
        for j in range(n_b):
            f = first[j]
            for q in range(n_changed):
                c = changed[q]
                if c >= f:
                    break
                if b[j, c] < bounds[q]:
                    saved += f - c
                    break
        gain = saved / size
        if saved > 0 and (best < 0 or gain > best_gain):
            best = ci
            best_gain = gain
    return best
