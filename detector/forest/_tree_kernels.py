"""Compiled loops of the histogram tree grower (:mod:`detector.forest`), with numpy twins.

Every kernel here has a plain-numpy twin of the same name with ``_numpy`` appended; the two do the
same float64 operations in the same order (per-bin sums accumulated in sample order, left sums
accumulated in bin order), so tests hold them equal, ties included.

Criteria (as scikit-learn's tree learners compute them, ``sklearn/tree/_criterion.pyx``):

``SQUARED_ERROR`` (Gentle AdaBoost's weighted least squares)
    proxy of a split = ``S_l**2 / W_l + S_r**2 / W_r`` with ``W`` the summed weights and ``S`` the
    summed weighted targets of each side; the right side's sums are the node's minus the left's.
``ENTROPY`` (information gain of the random forest; targets 0 or 1)
    proxy = ``-W_r * H_r - W_l * H_l``, ``H = -sum_c p_c log2 p_c`` over the two classes with
    ``p_1 = S / W`` and ``p_0 = (W - S) / W``; logarithms as ``ln(x) / ln(2)``.

The larger proxy wins; a later candidate replaces the best only when strictly larger, so the
first of equal splits (in candidate order, then bin order) is kept, as in scikit-learn.
"""

from __future__ import annotations

import math

from detector._jit import kernel
import numpy as np

SQUARED_ERROR = 0
ENTROPY = 1
#: Bins per feature the kernels hold (bin indices are uint8).
N_BINS = 256
_LN2 = math.log(2.0)


@kernel(cache=True, nogil=True)
def _entropy_bits(w, s):
    """Entropy in bits of a side holding weight ``w``, of which ``s`` is class 1."""
    h = 0.0
    c = s / w
    if c > 0.0:
        h -= c * (math.log(c) / _LN2)
    c = (w - s) / w
    if c > 0.0:
        h -= c * (math.log(c) / _LN2)
    return h


@kernel(cache=True, nogil=True)
def _entropy_proxy(w_l, s_l, w_r, s_r):
    return -w_r * _entropy_bits(w_r, s_r) - w_l * _entropy_bits(w_l, s_l)


@kernel(cache=True, nogil=True)
def node_sums(samples, weight, target):
    """Summed weight, weighted target and weighted squared target of ``samples``, in their order."""
    w = 0.0
    s = 0.0
    q = 0.0
    for j in range(samples.shape[0]):
        i = samples[j]
        w += weight[i]
        s += weight[i] * target[i]
        q += weight[i] * target[i] * target[i]
    return w, s, q


def node_sums_numpy(samples, weight, target):
    """Plain-numpy twin of :func:`node_sums` (``np.cumsum`` adds in order, as the loop does)."""
    w = weight[samples]
    wy = w * target[samples]
    wyy = wy * target[samples]
    if len(samples) == 0:
        return 0.0, 0.0, 0.0
    return float(np.cumsum(w)[-1]), float(np.cumsum(wy)[-1]), float(np.cumsum(wyy)[-1])


@kernel(cache=True, nogil=True)
def best_split(bins, samples, weight, target, candidates, stop_after, criterion, total_w, total_s,
               hist_w, hist_s, node_w, node_s):
    """The best split of one node over candidate features, in candidate order.

    Parameters
    ----------
    bins : uint8 (F, N)
        Bin index of every feature (row) and sample (column).
    samples : int64 (n,)
        The node's samples (each with a positive weight).
    weight, target : float64 (N,)
    candidates : int64 (C,)
        Features to examine, in this order.
    stop_after : int
        Stop once this many candidates with at least two non-empty bins were examined.
    criterion : int
        ``SQUARED_ERROR`` or ``ENTROPY``.
    total_w, total_s : float
        The node's sums (:func:`node_sums`).
    hist_w, hist_s : float64 (N_BINS,), node_w, node_s : float64 (n,)
        Scratch buffers.

    Returns
    -------
    proxy : float
        The best split's proxy (``-inf`` when no candidate can split).
    feature, left_bin, right_bin : int
        The split sends bins ``<= left_bin`` left; ``right_bin`` is the next non-empty bin
        (``-1`` when no split).
    examined, splittable : int
        Candidates examined and those of them with two or more non-empty bins.
    """
    n = samples.shape[0]
    for j in range(n):
        i = samples[j]
        node_w[j] = weight[i]
        node_s[j] = weight[i] * target[i]
    # a second histogram: candidates are binned two at a time, in one pass over the node's
    # samples (their indices and weights are read once for both), then scanned one after the
    # other in candidate order, so the result is the one-at-a-time loop's exactly
    hist_w2 = np.empty(N_BINS)
    hist_s2 = np.empty(N_BINS)
    best = -np.inf
    best_f = -1
    best_l = -1
    best_r = -1
    examined = 0
    splittable = 0
    n_cand = candidates.shape[0]
    c = 0
    while c < n_cand:
        if splittable >= stop_after:
            break
        pair = c + 1 < n_cand
        row = bins[candidates[c]]
        for b in range(N_BINS):
            hist_w[b] = 0.0
            hist_s[b] = 0.0
        if pair:
            row2 = bins[candidates[c + 1]]
            for b in range(N_BINS):
                hist_w2[b] = 0.0
                hist_s2[b] = 0.0
            for j in range(n):
                i = samples[j]
                wj = node_w[j]
                sj = node_s[j]
                b = row[i]
                hist_w[b] += wj
                hist_s[b] += sj
                b2 = row2[i]
                hist_w2[b2] += wj
                hist_s2[b2] += sj
        else:
            for j in range(n):
                b = row[samples[j]]
                hist_w[b] += node_w[j]
                hist_s[b] += node_s[j]
        for second in range(2 if pair else 1):
            if second == 1 and splittable >= stop_after:
                break
            f = candidates[c + second]
            hw = hist_w2 if second == 1 else hist_w
            hs = hist_s2 if second == 1 else hist_s
            examined += 1
            lo = 0
            while lo < N_BINS and hw[lo] == 0.0:
                lo += 1
            hi = N_BINS - 1
            while hi > lo and hw[hi] == 0.0:
                hi -= 1
            if hi <= lo:
                continue
            splittable += 1
            w_l = 0.0
            s_l = 0.0
            for k in range(lo, hi):
                if hw[k] == 0.0:
                    continue
                w_l += hw[k]
                s_l += hs[k]
                w_r = total_w - w_l
                s_r = total_s - s_l
                if criterion == SQUARED_ERROR:
                    proxy = s_l * s_l / w_l + s_r * s_r / w_r
                else:
                    proxy = _entropy_proxy(w_l, s_l, w_r, s_r)
                if proxy > best:
                    best = proxy
                    best_f = f
                    best_l = k
                    r = k + 1
                    while hw[r] == 0.0:
                        r += 1
                    best_r = r
        c += 2
    return best, best_f, best_l, best_r, examined, splittable


def _entropy_proxy_numpy(w_l, s_l, w_r, s_r):
    def h(s, w):
        out = np.zeros_like(w)
        for c in (s / w, (w - s) / w):
            pos = c > 0.0
            out[pos] -= c[pos] * (np.log(c[pos]) / _LN2)
        return out

    return -w_r * h(s_r, w_r) - w_l * h(s_l, w_l)


def best_split_numpy(bins, samples, weight, target, candidates, stop_after, criterion, total_w, total_s,
                     hist_w=None, hist_s=None, node_w=None, node_s=None):
    """Plain-numpy twin of :func:`best_split` (``np.bincount`` per feature, cumulative sums over
    the non-empty bins); same arguments (the scratch buffers are ignored), same result."""
    w = weight[samples]
    s = w * target[samples]
    best, best_f, best_l, best_r = -np.inf, -1, -1, -1
    examined = splittable = 0
    for f in candidates:
        if splittable >= stop_after:
            break
        examined += 1
        b = bins[f][samples]
        hw = np.bincount(b, weights=w, minlength=N_BINS)
        hs = np.bincount(b, weights=s, minlength=N_BINS)
        full = np.flatnonzero(hw != 0.0)
        if full.size < 2:
            continue
        splittable += 1
        w_l = np.cumsum(hw[full])[:-1]
        s_l = np.cumsum(hs[full])[:-1]
        w_r = total_w - w_l
        s_r = total_s - s_l
        if criterion == SQUARED_ERROR:
            proxy = s_l * s_l / w_l + s_r * s_r / w_r
        else:
            proxy = _entropy_proxy_numpy(w_l, s_l, w_r, s_r)
        k = int(np.argmax(proxy))  # the first of equal maxima, as the loop keeps it
        if proxy[k] > best:
            best, best_f, best_l, best_r = float(proxy[k]), int(f), int(full[k]), int(full[k + 1])
    return best, best_f, best_l, best_r, examined, splittable
