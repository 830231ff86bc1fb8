"""Compiled loop for evaluating rectangle-difference features on a stack of integral images.

The plain-numpy twin of :func:`evaluate_tiles` is :func:`detector.features.evaluate_features_numpy`;
``tests/test_features.py`` holds the two equal.

Layout (measured in ``benchmarks/features.py``): the integral images of a tile of ``TILE`` patches are
copied into a corner-major buffer ``buffer[corner, patch]``, so that one corner of one feature is a
contiguous run of ``TILE`` values and the inner loop is a vectorised multiply-add. Each feature is a
short list of flat corner offsets (``corner = y * (w + 1) + x``) with integer coefficients, in which
the corners that neighbouring rectangles share are already merged. The buffer of one tile
(``(h + 1) * (w + 1) * TILE`` values, 40 kB for a 24 x 24 window in float32) stays in the first-level
cache while all features run over it.
"""

from __future__ import annotations

import numba
import numpy as np

#: Patches evaluated together. 64 lets LLVM's loop vectorizer turn the inner loop into packed
#: multiply-adds (numba leaves the SLP vectorizer off, so a fully unrolled 16-wide loop stays scalar).
TILE = 64

#: Features whose values are gathered in a small block before they are written to ``out``, so that
#: both output layouts are written in contiguous runs.
BLOCK = 64


@numba.njit(cache=True)
def evaluate_tiles(integrals, indptr, offsets, coefficients, weighted_area, mean, scale,
                   normalize, transpose, buffer, out):
    """Evaluate F features on N integral images; write float32 values into ``out``.

    Parameters
    ----------
    integrals : (N, (h + 1) * (w + 1)) ndarray, int64 or float64, C-contiguous
        Flattened integral images.
    indptr : (F + 1,) int64
        Feature ``f`` owns corners ``indptr[f]:indptr[f + 1]``.
    offsets : (K,) int32
        Flat corner offsets into one integral image.
    coefficients : (K,) ndarray, dtype of ``buffer``
        Integer coefficient of each corner.
    weighted_area : (F,) float64
        ``sum_i weight_i * area_i`` of each feature (for the normalisation).
    mean, scale : (N,) float64
        Window mean and ``max(sigma, SIGMA_FLOOR) * window area`` of each patch.
    normalize, transpose : bool
        Whether to normalise; whether ``out`` is ``(F, N)`` instead of ``(N, F)``.
    buffer : ((h + 1) * (w + 1), TILE) ndarray, float32 or float64
        Work space; float32 only when every partial sum is an integer below 2**24 (exact).
    out : (N, F) or (F, N) float32 ndarray
    """
    n_patches, n_cells = integrals.shape
    n_features = indptr.shape[0] - 1
    accumulator = np.zeros(TILE, dtype=buffer.dtype)
    shift = np.zeros(TILE, dtype=np.float64)
    divisor = np.ones(TILE, dtype=np.float64)
    block = np.zeros((BLOCK, TILE), dtype=np.float32)
    for start in range(0, n_patches, TILE):
        count = min(TILE, n_patches - start)
        for j in range(TILE):  # corner-major copy of this tile's integral images
            if j < count:
                for cell in range(n_cells):
                    buffer[cell, j] = integrals[start + j, cell]
                if normalize:
                    shift[j] = mean[start + j]
                    divisor[j] = scale[start + j]
            else:
                for cell in range(n_cells):
                    buffer[cell, j] = 0
        for first in range(0, n_features, BLOCK):
            size = min(BLOCK, n_features - first)
            for b in range(size):
                f = first + b
                for j in range(TILE):
                    accumulator[j] = 0
                for k in range(indptr[f], indptr[f + 1]):
                    c = coefficients[k]
                    row = buffer[offsets[k]]
                    for j in range(TILE):
                        accumulator[j] += c * row[j]
                values = block[b]
                if normalize:
                    area = weighted_area[f]
                    for j in range(TILE):
                        values[j] = (np.float64(accumulator[j]) - shift[j] * area) / divisor[j]
                else:
                    for j in range(TILE):
                        values[j] = accumulator[j]
            if transpose:
                for b in range(size):
                    for j in range(count):
                        out[first + b, start + j] = block[b, j]
            else:
                for j in range(count):
                    for b in range(size):
                        out[start + j, first + b] = block[b, j]
    return out
