"""Compiled loops of the early-exit calibration (:mod:`detector.cascade`), which holds their
orchestration and the plain-numpy twin of :func:`greedy_order`."""

from __future__ import annotations

from detector._jit import kernel
import numpy as np

__all__ = ["exit_earlier", "greedy_order"]


@kernel(cache=True, nogil=True)
def exit_earlier(b, first, cols, bounds, out):
    """Tree evaluations saved when the exits after trees ``cols`` (rising) rise to ``bounds``: a
    window that now leaves after tree ``first[j]`` leaves after the first of ``cols`` before that
    where its running score is below the new bound. With ``out``, the new exit trees are written
    there (it may be ``first`` itself)."""
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
