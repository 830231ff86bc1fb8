"""Compiled loops of the sliding-window scan (numba, ``cache=True``), each with a plain-numpy twin in
:mod:`detector.scan` that the tests hold equal.

Layout the kernels read (built once per scale by :func:`detector.scan.scale_plan`):

- ``offsets`` int64 ``(F, K)``: for every used feature, the flat offsets (relative to the window's
  top-left corner) of the integral-image corners its rectangles need, corners shared by touching
  rectangles merged; ``counts[f]`` of them are used.
- ``weights`` float64 ``(F, K)``: the weight of each corner's integral value, so that
  ``value = (sum_k weights[f, k] * ii[base + offsets[f, k]] - consts[f] * mean) / sigma``.
- ``consts`` float64 ``(F,)``: the weight of the window mean.
- ``relative`` float64 ``(F,)``: 1.0 for a feature divided by the window's standard deviation, 0.0
  for an edge-strength feature, whose value is the corner sum alone
  (:func:`detector.scan.relative_features`); a tree picks its nodes' scale arrays once, so the
  window loops test nothing.
- ``win`` int64 ``(4,)``: the window's four corner offsets; ``inv_area`` its 1 / pixel count.

The loop runs breadth-first over a chunk of windows: first the mean, standard deviation and
contrast gate of every window of successive rows, until ``CHUNK`` windows have passed the gate,
then tree after tree over the windows of the chunk still alive, keeping a list of their indices
(packed after each tree; the windows' own data stays where it is). Windows are independent, so the
processor overlaps their work. Chunks of several rows rather than one row, and an index list
rather than moving six arrays after every tree, made the demo model's scan 1.09-1.13x faster on
the demo test split and the default model's 1.05-1.08x on the benchmark frame (two runs of each,
same scores). A tree of depth 2 goes in three passes without an unpredictable jump in them: the root
feature for every window, which writes each window's index to the left or the right list (both
writes happen, one counter moves); then the left child's feature over the left list and the right
child's over the right list. Two features per window instead of the three a branch-free pass would
compute: 1.11 to 1.15 times faster on the benchmark frame (``benchmarks/scan.py``'s frame, default
and demo models, same scores).

Split tests compare float64 values against ``split_bounds`` (see :func:`detector.scan.split_bounds`):
``v > bound`` is exactly ``float32(v) > threshold``, the test training used on its float32 features.
"""

from __future__ import annotations

from detector._jit import kernel
import numpy as np

from detector.geometry import _nms_numba


#: Windows (at least) gathered from successive rows before the trees run over them.
CHUNK = 1024


@kernel(cache=True, nogil=True, inline="always")
def _corner_sum(ii, base, offsets, weights, count, f):
    acc = 0.0
    for k in range(count):
        acc += weights[f, k] * ii[base + offsets[f, k]]
    return acc


@kernel(cache=True, nogil=True, inline="always")
def _gather_row(ii, sq, row, xs, y, w0, w1, w2, w3, inv_area, sigma_floor, min_var, normalize, n,
                base, mean, inv_sigma, score, xpos, ypos, alive):
    """Append the windows of one row that pass the contrast gate, with their mean and 1 / sigma;
    return the new count."""
    for i in range(xs.shape[0]):
        b = row + xs[i]
        m = (ii[b + w3] - ii[b + w1] - ii[b + w2] + ii[b + w0]) * inv_area
        inv = 1.0
        if normalize:
            var = (sq[b + w3] - sq[b + w1] - sq[b + w2] + sq[b + w0]) * inv_area - m * m
            if var < min_var:
                continue
            sigma = np.sqrt(var) if var > 0.0 else 0.0
            if sigma < sigma_floor:
                sigma = sigma_floor
            inv = 1.0 / sigma
        base[n] = b
        mean[n] = m
        inv_sigma[n] = inv
        score[n] = 0.0
        xpos[n] = xs[i]
        ypos[n] = y
        alive[n] = n
        n += 1
    return n


@kernel(cache=True, nogil=True, inline="always")
def _depth2_tree(ii, base, offsets, weights, mean, g0, g1, g2, score, alive, left, right, n,
                 nodes):
    """One tree of depth 2 over the ``n`` windows alive, in three passes (see the module's
    docstring); node ``i``'s value is scaled by ``g{i}[j]`` (the windows' ``1 / sigma``, or ones
    for an edge-strength feature)."""
    f0, f1, f2, c0, c1, c2, k0, k1, k2, s0, s1, s2, l0, l1, l2, l3 = nodes
    nl = 0
    nr = 0
    for q in range(n):
        j = alive[q]
        r = (_corner_sum(ii, base[j], offsets, weights, c0, f0) - k0 * mean[j]) * g0[j] > s0
        left[nl] = j
        right[nr] = j
        nl += 1 - np.int64(r)
        nr += np.int64(r)
    for q in range(nl):
        j = left[q]
        v = (_corner_sum(ii, base[j], offsets, weights, c1, f1) - k1 * mean[j]) * g1[j]
        score[j] += l1 if v > s1 else l0
    for q in range(nr):
        j = right[q]
        v = (_corner_sum(ii, base[j], offsets, weights, c2, f2) - k2 * mean[j]) * g2[j]
        score[j] += l3 if v > s2 else l2


@kernel(cache=True, nogil=True)
def scan_scale(ii, sq, row_stride, xs, ys, win, inv_area, sigma_floor, min_var, normalize,
               offsets, weights, counts, consts, relative, node_features, split_bounds,
               leaf_values, exit_thresholds, cutoff, bound, out_x, out_y, out_score):
    """Score every window of one scale; keep those whose running score reaches ``cutoff``.

    Parameters
    ----------
    ii, sq : 1-d
        Flattened integral image (int32, uint32 or float64; see
        :func:`detector.scan.integral_dtype`) and squared-integral image (float64); exact
        integers either way.
    row_stride : int
        Width of the integral image (image width + 1).
    xs, ys : int64 1-d
        Window top-left positions along x and y.
    min_var : float
        Contrast gate (used only with ``normalize``): a window whose grey-level variance is below
        this is dropped before any tree (``-inf`` disables).
    split_bounds : float64 (T, nodes)
        A window goes right at a node when its feature value is above the node's bound.
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
        Number of windows written to the outputs (row by row, x rising within a row).
    trees : int
        Trees evaluated over all windows (for the mean per window).
    """
    n_trees, n_nodes = node_features.shape
    depth = 0
    while (1 << depth) - 1 < n_nodes:
        depth += 1
    nx = xs.shape[0]
    ny = ys.shape[0]
    size = min(nx * ny, CHUNK + nx)
    base = np.empty(size, np.int64)
    mean = np.empty(size)
    inv_sigma = np.empty(size)
    score = np.empty(size)
    xpos = np.empty(size, np.int64)
    ypos = np.empty(size, np.int64)
    left = np.empty(size, np.int64)
    right = np.empty(size, np.int64)
    alive = np.empty(size, np.int64)
    ones = np.ones(size)  # the divisor-free scale of an edge-strength feature (relative 0)
    w0, w1, w2, w3 = win[0], win[1], win[2], win[3]
    kept = 0
    trees = 0
    yi = 0
    while yi < ny:
        # the windows of successive rows that pass the gate, until CHUNK of them wait for the trees
        n = 0
        while yi < ny and n < CHUNK:
            n = _gather_row(ii, sq, ys[yi] * row_stride, xs, ys[yi], w0, w1, w2, w3, inv_area,
                            sigma_floor, min_var, normalize, n, base, mean, inv_sigma, score,
                            xpos, ypos, alive)
            yi += 1
        for t in range(n_trees):
            if n == 0:
                break
            trees += n
            if depth == 2:
                f0 = node_features[t, 0]
                f1 = node_features[t, 1]
                f2 = node_features[t, 2]
                c0 = counts[f0]
                c1 = counts[f1]
                c2 = counts[f2]
                k0 = consts[f0]
                k1 = consts[f1]
                k2 = consts[f2]
                s0 = split_bounds[t, 0]
                s1 = split_bounds[t, 1]
                s2 = split_bounds[t, 2]
                l0 = leaf_values[t, 0]
                l1 = leaf_values[t, 1]
                l2 = leaf_values[t, 2]
                l3 = leaf_values[t, 3]
                if relative[f0] != 0.0 and relative[f1] != 0.0 and relative[f2] != 0.0:
                    # every node contrast-normalised (nearly every tree): _depth2_tree's loops
                    # written out on inv_sigma itself, as before edge-strength features existed
                    # (one process, the two kernels taking turns on the benchmark frames: the
                    # same time, 0.99-1.01x)
                    nl = 0
                    nr = 0
                    for q in range(n):
                        j = alive[q]
                        r = (_corner_sum(ii, base[j], offsets, weights, c0, f0)
                             - k0 * mean[j]) * inv_sigma[j] > s0
                        left[nl] = j
                        right[nr] = j
                        nl += 1 - np.int64(r)
                        nr += np.int64(r)
                    for q in range(nl):
                        j = left[q]
                        v = (_corner_sum(ii, base[j], offsets, weights, c1, f1)
                             - k1 * mean[j]) * inv_sigma[j]
                        score[j] += l1 if v > s1 else l0
                    for q in range(nr):
                        j = right[q]
                        v = (_corner_sum(ii, base[j], offsets, weights, c2, f2)
                             - k2 * mean[j]) * inv_sigma[j]
                        score[j] += l3 if v > s2 else l2
                else:
                    nodes = (f0, f1, f2, c0, c1, c2, k0, k1, k2, s0, s1, s2, l0, l1, l2, l3)
                    _depth2_tree(ii, base, offsets, weights, mean,
                                 inv_sigma if relative[f0] != 0.0 else ones,
                                 inv_sigma if relative[f1] != 0.0 else ones,
                                 inv_sigma if relative[f2] != 0.0 else ones,
                                 score, alive, left, right, n, nodes)
            else:
                for q in range(n):
                    j = alive[q]
                    b = base[j]
                    node = 0
                    for _ in range(depth):
                        f = node_features[t, node]
                        v = (_corner_sum(ii, b, offsets, weights, counts[f], f)
                             - consts[f] * mean[j]) * (inv_sigma[j] if relative[f] != 0.0 else 1.0)
                        node = 2 * node + 1 + np.int64(v > split_bounds[t, node])
                    score[j] += leaf_values[t, node - n_nodes]
            low = exit_thresholds[t]
            rest = bound[t]
            k = 0
            for q in range(n):
                j = alive[q]
                s = score[j]
                alive[k] = j
                k += np.int64(s >= low and s + rest >= cutoff)
            n = k
        for q in range(n):
            j = alive[q]
            if score[j] >= cutoff:
                out_x[kept] = xpos[j]
                out_y[kept] = ypos[j]
                out_score[kept] = score[j]
                kept += 1
    return kept, trees


@kernel(cache=True, nogil=True)
def scan_frame(ii, sq, row_stride, xs_all, x_start, ys_all, y_start, wins, inv_areas, sigma_floor,
               min_var, normalize, offsets_all, weights_all, counts_all, consts_all, relative,
               node_features, split_bounds, leaf_values, exit_thresholds, cutoff, bound, out_x,
               out_y, out_score, out_scale):
    """:func:`scan_scale` over every scale of a frame in one call (a small frame's scan spent a
    tenth of its time going in and out of the compiled code scale by scale).

    Scale ``s`` has the windows ``xs_all[x_start[s]:x_start[s + 1]]`` x
    ``ys_all[y_start[s]:y_start[s + 1]]``, the window corners ``wins[s]`` and the plan arrays
    ``offsets_all[s]`` ... ``consts_all[s]`` (padded to the largest corner count of any scale).
    The windows kept are written scale after scale; ``out_scale`` gets each one's scale index.

    Returns
    -------
    kept, trees : int
        As :func:`scan_scale`, summed over the scales.
    """
    kept = 0
    trees = 0
    for s in range(wins.shape[0]):
        k, t = scan_scale(ii, sq, row_stride, xs_all[x_start[s]:x_start[s + 1]],
                          ys_all[y_start[s]:y_start[s + 1]], wins[s], inv_areas[s], sigma_floor,
                          min_var, normalize, offsets_all[s], weights_all[s], counts_all[s],
                          consts_all[s], relative, node_features, split_bounds, leaf_values, exit_thresholds,
                          cutoff, bound, out_x[kept:], out_y[kept:], out_score[kept:])
        out_scale[kept:kept + k] = s
        kept += k
        trees += t
    return kept, trees


@kernel(cache=True, nogil=True)
def finish(out_x, out_y, out_scale, scores, sizes, pad, up, margin, width, height, nms_iou):
    """The windows a frame's scan kept -> its detections, in one call: what
    :meth:`detector.scan.Engine.candidates` and :meth:`detector.scan.Engine.detections` do with
    numpy, in the same arithmetic (the tests hold the two equal).

    Window ``i`` (the first ``len(scores)`` entries of the kernel's outputs) is the box
    ``((out_x[i] - pad) / up, (out_y[i] - pad) / up, sizes[out_scale[i]] / up)`` of the frame;
    it is shrunk by the context ``margin`` to its object box
    (:func:`detector.harvest.window_box_to_object_box`), cut to the ``width x height`` frame
    (:func:`detector.scan.clip_boxes`) and thinned by greedy non-maximum suppression at ``nms_iou``
    over the final ``scores``, visited in descending score, ties in window order
    (:func:`detector.geometry.nms`).

    Returns
    -------
    boxes : float64 (K, 4)
        The object boxes kept, in descending score.
    scores : float64 (K,)
    """
    n = scores.shape[0]
    k = 1.0 + 2.0 * margin
    boxes = np.empty((n, 4))
    for i in range(n):
        x = (out_x[i] - pad) / up
        y = (out_y[i] - pad) / up
        w = sizes[out_scale[i], 0] / up
        h = sizes[out_scale[i], 1] / up
        bw = w / k
        bh = h / k
        x = x + (w - bw) / 2.0
        y = y + (h - bh) / 2.0
        # cut to the frame only along an axis where the box leaves it (clip_boxes): a box
        # within the frame keeps its exact width and height
        boxes[i, 0] = x
        boxes[i, 1] = y
        boxes[i, 2] = bw
        boxes[i, 3] = bh
        if x < 0.0 or x + bw > width:
            x0 = min(max(x, 0.0), width)
            boxes[i, 0] = x0
            boxes[i, 2] = min(max(x + bw, 0.0), width) - x0
        if y < 0.0 or y + bh > height:
            y0 = min(max(y, 0.0), height)
            boxes[i, 1] = y0
            boxes[i, 3] = min(max(y + bh, 0.0), height) - y0
    order = np.argsort(-scores, kind="mergesort")
    keep = _nms_numba(boxes, order, nms_iou)
    out_boxes = np.empty((keep.shape[0], 4))
    out_scores = np.empty(keep.shape[0])
    for i in range(keep.shape[0]):
        out_boxes[i] = boxes[keep[i]]
        out_scores[i] = scores[keep[i]]
    return out_boxes, out_scores


@kernel(cache=True, nogil=True)
def area_shrink(ii, xe, ye, out):
    """``out[v, u]``: the mean grey level of the source image over the rectangle ``[xe[u], xe[u +
    1]) x [ye[v], ye[v + 1])`` (fractional pixel edges; a pixel counts by the share of it the
    rectangle covers: area averaging, what ``cv2.resize(..., INTER_AREA)`` computes when it
    shrinks), rounded to the nearest integer, ties to even, read off the source's integral image
    ``ii`` (``(H + 1, W + 1)``).

    The source is constant on each pixel, so its integral over ``[0, x) x [0, y)`` is bilinear in
    ``(x, y)`` between the integral image's integer corners: the bilinear interpolation of ``ii``
    at ``(x, y)`` is exact, and a level of the pyramid costs four reads per pixel of the level, not
    a pass over the whole frame. The numpy twin is :func:`detector.scan.area_shrink_numpy` (the
    same arithmetic in the same order).
    """
    h, w = out.shape
    rows, cols = ii.shape
    ix = np.empty(w + 1, np.int64)
    fx = np.empty(w + 1, np.float64)
    for u in range(w + 1):
        i = min(int(xe[u]), cols - 2)
        ix[u] = i
        fx[u] = xe[u] - i
    # the reciprocal of each column's width, once per level: a division per level pixel took
    # about half the loop's time (0.68 against 0.40 ms at 533 x 400, 0.31 against 0.16 at 320 x
    # 240, the same pixels on ten busy frames)
    inv_width = np.empty(w, np.float64)
    for u in range(w):
        inv_width[u] = 1.0 / (xe[u + 1] - xe[u])
    prev = np.empty(w + 1, np.float64)
    cur = np.empty(w + 1, np.float64)
    for v in range(h + 1):
        j = min(int(ye[v]), rows - 2)
        fy = ye[v] - j
        r0 = ii[j]
        r1 = ii[j + 1]
        for u in range(w + 1):
            i = ix[u]
            a = r0[i] + fx[u] * (np.float64(r0[i + 1]) - np.float64(r0[i]))
            b = r1[i] + fx[u] * (np.float64(r1[i + 1]) - np.float64(r1[i]))
            cur[u] = a + fy * (b - a)
        if v > 0:
            inv = 1.0 / (ye[v] - ye[v - 1])
            o = out[v - 1]
            for u in range(w):
                val = (cur[u + 1] - cur[u] - prev[u + 1] + prev[u]) * inv * inv_width[u]
                o[u] = np.uint8(min(max(np.rint(val), 0.0), 255.0))
        prev, cur = cur, prev
    return out
