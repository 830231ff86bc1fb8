"""Compiled loops of the sliding-window scan (numba, ``cache=True``), each with a plain-numpy twin in
:mod:`detector.scan` that the tests hold equal.

Layout the kernels read (built once per scale by :func:`detector.scan.scale_plan`):

- ``offsets`` int64 ``(F, K)``: for every used feature, the flat offsets (relative to the window's
  top-left corner) of the integral-image corners its rectangles need, corners shared by touching
  rectangles merged; ``counts[f]`` of them are used.
- ``weights`` float64 ``(F, K)``: the weight of each corner's integral value, so that
  ``value = (sum_k weights[f, k] * ii[base + offsets[f, k]] - consts[f] * mean) / sigma``.
- ``consts`` float64 ``(F,)``: the weight of the window mean.
- ``win`` int64 ``(4,)``: the window's four corner offsets; ``inv_area`` its 1 / pixel count.
"""

from __future__ import annotations

import numba
import numpy as np


@numba.njit(cache=True, nogil=True, inline="always")
def _feature_value(ii, base, offsets, weights, counts, consts, f, mean, inv_sigma):
    acc = 0.0
    for k in range(counts[f]):
        acc += weights[f, k] * ii[base + offsets[f, k]]
    return (acc - consts[f] * mean) * inv_sigma


@numba.njit(cache=True, nogil=True)
def scan_scale(ii, sq, row_stride, xs, ys, win, inv_area, sigma_floor, min_var, normalize,
               offsets, weights, counts, consts, node_features, node_thresholds, leaf_values,
               exit_thresholds, cutoff, bound, out_x, out_y, out_score):
    """Score every window of one scale; keep those whose running score reaches ``cutoff``.

    Parameters
    ----------
    ii, sq : int64 1-d
        Flattened integral and squared-integral images.
    row_stride : int
        Width of the integral image (image width + 1).
    xs, ys : int64 1-d
        Window top-left positions along x and y.
    min_var : float
        Contrast gate (used only with ``normalize``): a window whose grey-level variance is below
        this is dropped before any tree (``-inf`` disables).
    exit_thresholds : float64 (T,)
        Drop a window when its running score after tree t is below ``exit_thresholds[t]``
        (``-inf`` disables).
    cutoff : float
        Raw score a window needs to be kept.
    bound : float64 (T,)
        ``bound[t]``: the most the trees after t can still add; a window whose running score plus
        this is below ``cutoff`` cannot be kept, and is dropped (exact, no change in results).
    out_x, out_y, out_score :
        Preallocated outputs (length ``len(xs) * len(ys)``).

    Returns
    -------
    kept : int
        Number of windows written to the outputs.
    trees : int
        Trees evaluated over all windows (for the mean per window).
    """
    n_trees, n_nodes = node_features.shape
    depth = 0
    while (1 << depth) - 1 < n_nodes:
        depth += 1
    kept = 0
    trees = 0
    for yi in range(ys.shape[0]):
        y = ys[yi]
        for xi in range(xs.shape[0]):
            base = y * row_stride + xs[xi]
            s = (ii[base + win[3]] - ii[base + win[1]] - ii[base + win[2]] + ii[base + win[0]])
            mean = s * inv_area
            inv_sigma = 1.0
            if normalize:
                q = (sq[base + win[3]] - sq[base + win[1]] - sq[base + win[2]]
                     + sq[base + win[0]])
                var = q * inv_area - mean * mean
                if var < min_var:
                    continue
                sigma = np.sqrt(var) if var > 0.0 else 0.0
                if sigma < sigma_floor:
                    sigma = sigma_floor
                inv_sigma = 1.0 / sigma
            score = 0.0
            alive = True
            for t in range(n_trees):
                node = 0
                for _ in range(depth):
                    f = node_features[t, node]
                    v = _feature_value(ii, base, offsets, weights, counts, consts, f, mean, inv_sigma)
                    # compare in float32, as training did on its float32 feature matrix
                    node = 2 * node + (1 if np.float32(v) <= node_thresholds[t, node] else 2)
                score += leaf_values[t, node - n_nodes]
                trees += 1
                if score < exit_thresholds[t] or score + bound[t] < cutoff:
                    alive = False
                    break
            if alive and score >= cutoff:
                out_x[kept] = xs[xi]
                out_y[kept] = y
                out_score[kept] = score
                kept += 1
    return kept, trees
