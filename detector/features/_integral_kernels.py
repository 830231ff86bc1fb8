"""Compiled loops over stacks of 8-bit patches (:mod:`detector.features`): their integral images
and their pixel sums and squared sums.

The integral images' plain-numpy twin is :func:`detector.features._integral.integral_images_numpy` (two
``np.cumsum`` passes in place); ``tests/test_integral.py`` holds the two equal. Integer sums are
exact in any order, so the two agree bit for bit. One pass per patch, row by row: each row's running
sum added to the row above. On the cross-data cups bank (5,559 patches of 39 x 32) the numpy route
took 45-55 ms a stack, about as long as evaluating 2,048 features on it, and training makes the
stack again for every block of its feature pool (``benchmarks/features.py`` prints both).
The sums' twin is numpy's ``sum`` and ``einsum`` (``detector.features._integral.pixel_sums_numpy``
takes that route for every dtype but uint8); ``tests/test_integral.py`` holds them equal.
"""

from __future__ import annotations

import numpy as np

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


@kernel(cache=True, nogil=True)
def patch_moments(patches, totals, square_totals):
    """Every patch's pixel sum and sum of squared pixels (``patches`` (N, h, w) uint8, C-contiguous;
    ``totals`` and ``square_totals`` (N,) int64, filled and returned): the patch statistics of
    the contrast normalisation in one pass, where numpy's ``sum`` and ``einsum`` take two
    (``pixel_sums``: 3 against 12 ms on 5,482 patches of 49 x 40; training needs them for every
    block of its feature pool)."""
    n, h, w = patches.shape
    for k in range(n):
        image = patches[k]
        total = 0
        square = 0
        for y in range(h):
            row = image[y]
            for x in range(w):
                v = np.int64(row[x])
                total += v
                square += v * v
        totals[k] = total
        square_totals[k] = square
    return totals, square_totals
