"""Compiled loop for evaluating rectangle-difference features on a stack of integral images.

The plain-numpy twin of :func:`evaluate_tiles` is :func:`detector.features.evaluate_features_numpy`;
``tests/test_features.py`` holds the two equal.

Layout (measured in ``benchmarks/features.py``): the integral images of a tile of ``TILE`` patches
are copied into a corner-major buffer ``buffer[tile, corner, patch]``, so that one corner of one
feature over a tile is a contiguous run of ``TILE`` values and the inner loop is a vectorised
multiply-add. Each feature is a short list of flat corner offsets (``corner = y * (w + 1) + x``)
with integer coefficients, in which the corners that neighbouring rectangles share are already
merged (6 look-ups for two rectangles, 8 for three, 9 for four). A chunk of tiles (the buffer's
first axis: ``(h + 1) * (w + 1) * TILE`` values a tile, 160 KB for a 24 x 24 window in float32)
stays in the cache while a block of ``BLOCK`` features runs over it, and the block's values are
written out in contiguous runs. The caller picks the chunk: one tile for the ``(F, N)`` layout
(training's), :data:`CHUNK` tiles for ``(N, F)``.
"""

from __future__ import annotations

from detector._jit import kernel
import numpy as np

#: Patches evaluated together. 64 lets LLVM's loop vectorizer turn the inner loop into packed
#: multiply-adds (numba leaves the SLP vectorizer off, so a fully unrolled 16-wide loop stays scalar).
TILE = 64

#: Tiles whose buffers are filled at once for the (N, F) layout; every block of features runs over
#: all of them before the next block. The (F, N) layout takes one tile a chunk: its output rows are
#: written in 64-value runs either way, and one tile's buffer stays in the first caches (2,048
#: features on the cross-data cups bank, 39 x 32: 33 against 41 ms with 8 tiles; 29 x 24 and 49 x
#: 40 windows alike), where the (N, F) layout ran 38 against 47 ms with 8.
CHUNK = 8

#: Features evaluated together over a chunk; their values are gathered in a small block before
#: they are written to ``out``.
BLOCK = 64


# error_model="numpy": no zero-division check, so the division vectorises (divisors are >= 1);
# nogil: training evaluates blocks of its feature pool on several threads
@kernel(cache=True, nogil=True, error_model="numpy")
def evaluate_tiles(integrals, indptr, offsets, coefficients, weighted_area, mean, scale,
                   normalize, transpose, buffer, first, out):
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
    buffer : (C, (h + 1) * (w + 1), TILE) ndarray, float32 or float64
        Work space for a chunk of C tiles; float32 only when every partial sum is an integer below
        2**24 (exact).
    first : int
        Index in ``out`` of the first patch (``out`` may hold more patches than ``integrals``).
    out : (N_out, F) or (F, N_out) float32 ndarray
    """
    n_patches, n_cells = integrals.shape
    n_features = indptr.shape[0] - 1
    accumulator = np.zeros(TILE, dtype=buffer.dtype)
    chunk = buffer.shape[0]
    shift = np.zeros((chunk, TILE), dtype=np.float64)
    divisor = np.ones((chunk, TILE), dtype=np.float64)
    block = np.zeros((BLOCK, TILE), dtype=np.float32)
    for chunk_start in range(0, n_patches, chunk * TILE):
        n_tiles = min(chunk, (n_patches - chunk_start + TILE - 1) // TILE)
        for t in range(n_tiles):  # corner-major copies of the integral images of this chunk
            for j in range(TILE):
                n = chunk_start + t * TILE + j
                if n < n_patches:
                    for cell in range(n_cells):
                        buffer[t, cell, j] = integrals[n, cell]
                    if normalize:
                        shift[t, j] = mean[n]
                        divisor[t, j] = scale[n]
                else:
                    for cell in range(n_cells):
                        buffer[t, cell, j] = 0
        for feature_start in range(0, n_features, BLOCK):
            size = min(BLOCK, n_features - feature_start)
            for t in range(n_tiles):
                start = chunk_start + t * TILE
                count = min(TILE, n_patches - start)
                tile = buffer[t]
                tile_shift = shift[t]
                tile_divisor = divisor[t]
                for b in range(size):
                    f = feature_start + b
                    for j in range(TILE):
                        accumulator[j] = 0
                    for k in range(indptr[f], indptr[f + 1]):
                        c = coefficients[k]
                        row = tile[offsets[k]]
                        for j in range(TILE):
                            accumulator[j] += c * row[j]
                    values = block[b]
                    if normalize:
                        area = weighted_area[f]
                        for j in range(TILE):
                            values[j] = (np.float64(accumulator[j]) - tile_shift[j] * area) \
                                / tile_divisor[j]
                    else:
                        for j in range(TILE):
                            values[j] = accumulator[j]
                column = first + start
                if transpose:
                    for b in range(size):
                        target = out[feature_start + b]
                        for j in range(count):
                            target[column + j] = block[b, j]
                else:
                    for j in range(count):
                        target = out[column + j]
                        for b in range(size):
                            target[feature_start + b] = block[b, j]
    return out
