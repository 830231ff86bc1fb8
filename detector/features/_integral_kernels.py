"""Compiled loop for the integral images of a stack of 8-bit patches (:mod:`detector.features`).

Its plain-numpy twin is :func:`detector.features._integral.integral_images_numpy` (two
``np.cumsum`` passes in place); ``tests/test_integral.py`` holds the two equal. Integer sums are
exact in any order, so the two agree bit for bit. One pass per patch, row by row: each row's running
sum added to the row above. On the cross-data cups bank (5,559 patches of 39 x 32) the numpy route
took 45-55 ms a stack, about as long as evaluating 2,048 features on it, and training makes the
stack again for every block of its feature pool (``benchmarks/features.py`` prints both).
"""

from __future__ import annotations

from detector._jit import kernel


@kernel(cache=True, nogil=True)
def integral_stack(patches, out):
    """Integral images of ``patches`` ((N, h, w) uint8, C-contiguous) into ``out`` ((N, h + 1,
    w + 1) int64): ``out[n, r, c] = patches[n, :r, :c].sum()``, row 0 and column 0 zero."""
    n, h, w = patches.shape
    for k in range(n):
        image = patches[k]
        table = out[k]
        for c in range(w + 1):
            table[0, c] = 0
        for y in range(h):
            row = image[y]
            above = table[y]
            here = table[y + 1]
            here[0] = 0
            run = 0
            for x in range(w):
                run += row[x]
                here[x + 1] = above[x + 1] + run
    return out
