"""Integral images (summed-area tables), window sums, and window mean and variance.

An integral image ``ii`` of an image ``I`` with H rows and W columns has shape ``(H + 1, W + 1)``
and a leading zero row and column::

    ii[r, c] = sum(I[:r, :c])

so that the sum of any axis-aligned rectangle costs four look-ups (Crow 1984, "Summed-area tables
for texture mapping"; used for rectangle features by Viola and Jones 2001)::

    sum(I[y:y+h, x:x+w]) = ii[y+h, x+w] - ii[y, x+w] - ii[y+h, x] + ii[y, x]

The squared integral image holds the sums of squared pixels, which gives the variance of any window
in O(1) as well. Integer images are summed in ``int64``, which is exact for 8-bit images far beyond
4000 x 3000 pixels (255**2 * 12e6 = 7.8e11 < 2**63); floating-point images are summed in
``float64``.

Coordinates follow the project's convention: ``x`` to the right (columns), ``y`` down (rows),
``width`` and ``height`` in pixels.
"""

from __future__ import annotations

import numpy as np

from detector.errors import InputError

__all__ = [
    "integral_image",
    "squared_integral_image",
    "integral_images",
    "squared_integral_images",
    "pixel_sums",
    "window_sum",
    "window_mean_var",
]


def _sum_dtype(dtype: np.dtype, what: str) -> np.dtype:
    """The accumulator dtype for an image of ``dtype``: int64 for integers, float64 for floats."""
    if dtype == np.bool_ or np.issubdtype(dtype, np.integer):
        return np.dtype(np.int64)
    if np.issubdtype(dtype, np.floating):
        return np.dtype(np.float64)
    raise InputError(f"{what} must hold integers or real numbers, got dtype {dtype}")


def _as_stack(images, ndim: int, what: str) -> np.ndarray:
    array = np.asarray(images)
    if array.ndim != ndim:
        shape = "(height, width)" if ndim == 2 else "(count, height, width)"
        raise InputError(f"{what} must be a {ndim}-d array {shape}, got shape {array.shape}")
    return array


def _cumulate(values: np.ndarray, dtype: np.dtype, square: bool = False) -> np.ndarray:
    """Zero-padded cumulative sum over the last two axes, in ``dtype`` (of the squares if asked).

    Everything happens in place inside the output, so the peak memory is one output array.
    """
    out = np.zeros(values.shape[:-2] + (values.shape[-2] + 1, values.shape[-1] + 1), dtype=dtype)
    body = out[..., 1:, 1:]
    body[...] = values
    if square:
        np.multiply(body, body, out=body)
    np.cumsum(body, axis=-2, out=body)
    np.cumsum(body, axis=-1, out=body)
    return out


def integral_image(image) -> np.ndarray:
    """Integral image with a leading zero row and column.

    Parameters
    ----------
    image : (H, W) array_like of integers or reals
        A grayscale image. Integer (and boolean) images are summed exactly in ``int64``; floating
        point images in ``float64``.

    Returns
    -------
    ii : (H + 1, W + 1) ndarray of int64 or float64
        ``ii[r, c]`` is the sum of ``image[:r, :c]``; row 0 and column 0 are zero.

    Examples
    --------
    >>> integral_image(np.array([[1, 2], [3, 4]], dtype=np.uint8))
    array([[ 0,  0,  0],
           [ 0,  1,  3],
           [ 0,  4, 10]])
    """
    array = _as_stack(image, 2, "image")
    return _cumulate(array, _sum_dtype(array.dtype, "image"))


def squared_integral_image(image) -> np.ndarray:
    """Integral image of the squared pixels, with a leading zero row and column.

    Parameters
    ----------
    image : (H, W) array_like of integers or reals
        A grayscale image. Integer images are squared and summed exactly in ``int64``.

    Returns
    -------
    sq : (H + 1, W + 1) ndarray of int64 or float64
        ``sq[r, c]`` is the sum of ``image[:r, :c] ** 2``.

    Examples
    --------
    >>> squared_integral_image(np.array([[1, 2], [3, 4]], dtype=np.uint8))
    array([[ 0,  0,  0],
           [ 0,  1,  5],
           [ 0, 10, 30]])
    """
    array = _as_stack(image, 2, "image")
    dtype = _sum_dtype(array.dtype, "image")
    return _cumulate(array, dtype, square=True)


def integral_images(patches, out=None) -> np.ndarray:
    """Integral images of a stack of patches, each with a leading zero row and column.

    Parameters
    ----------
    patches : (N, h, w) array_like of integers or reals
        A stack of equally sized grayscale patches.
    out : (N, h + 1, w + 1) C-contiguous ndarray of int64, optional
        Where the integral images of an 8-bit stack are written (and returned), for a caller
        that makes many stacks of one size: a fresh array of a patch bank's size is mostly page
        faults (5,482 patches of 49 x 40: 18 ms into a new array, 5 ms into one already used).
        Other dtypes ignore it.

    Returns
    -------
    ii : (N, h + 1, w + 1) ndarray of int64 or float64
        ``ii[n]`` equals ``integral_image(patches[n])``.

    Notes
    -----
    8-bit stacks (every patch bank) go through one compiled pass
    (:func:`detector.features._integral_kernels.integral_stack`, 5x faster than the two
    ``np.cumsum`` passes of :func:`integral_images_numpy`, which every other dtype takes).

    Examples
    --------
    >>> integral_images(np.ones((2, 1, 2), dtype=np.uint8))[:, -1, -1]
    array([2, 2])
    """
    array = _as_stack(patches, 3, "patches")
    if array.dtype == np.uint8 and array.size:
        from detector.features._integral_kernels import integral_stack

        n, h, w = array.shape
        if out is None:
            out = np.empty((n, h + 1, w + 1), np.int64)
        elif not (isinstance(out, np.ndarray) and out.dtype == np.int64 and out.flags.c_contiguous
                  and out.shape == (n, h + 1, w + 1)):
            got = (out.shape, out.dtype) if isinstance(out, np.ndarray) else type(out).__name__
            raise InputError(f"out must be a C-contiguous int64 array of shape {(n, h + 1, w + 1)},"
                             f" got {got}")
        return integral_stack(np.ascontiguousarray(array), out)
    return _cumulate(array, _sum_dtype(array.dtype, "patches"))


def pixel_sums(patches) -> tuple[np.ndarray, np.ndarray]:
    """Every patch's pixel sum and sum of squared pixels, as float64 (exact for integer patches:
    8-bit sums stay far below 2**53).

    Parameters
    ----------
    patches : (N, h, w) array_like of integers or reals

    Returns
    -------
    totals, square_totals : (N,) ndarray of float64

    Notes
    -----
    8-bit stacks go through one compiled pass
    (:func:`detector.features._integral_kernels.patch_moments`), where numpy's ``sum`` and
    ``einsum`` (:func:`pixel_sums_numpy`, every other dtype) take two: 3 against 12 ms on 5,482
    patches of 49 x 40. Training needs them for every block of its feature pool (the contrast
    normalisation), calibration for the contrast gate.

    Examples
    --------
    >>> pixel_sums(np.array([[[1, 2], [3, 4]]], np.uint8))
    (array([10.]), array([30.]))
    """
    array = _as_stack(patches, 3, "patches")
    if array.dtype == np.uint8 and array.size:
        from detector.features._integral_kernels import patch_moments

        n = len(array)
        totals, squares = patch_moments(np.ascontiguousarray(array), np.empty(n, np.int64),
                                        np.empty(n, np.int64))
        return totals.astype(np.float64), squares.astype(np.float64)
    return pixel_sums_numpy(array)


def pixel_sums_numpy(patches) -> tuple[np.ndarray, np.ndarray]:
    """Plain-numpy twin of :func:`pixel_sums`.

    >>> pixel_sums_numpy(np.array([[[1, 2], [3, 4]]], np.uint8))
    (array([10.]), array([30.]))
    """
    array = _as_stack(patches, 3, "patches")
    flat = array.reshape(len(array), int(np.prod(array.shape[1:])))  # N may be 0
    exact = _sum_dtype(array.dtype, "patches")
    return (flat.sum(axis=1, dtype=exact).astype(np.float64),
            np.einsum("ij,ij->i", flat, flat, dtype=exact).astype(np.float64))


def integral_images_numpy(patches) -> np.ndarray:
    """Plain-numpy twin of :func:`integral_images` (the route of every dtype but uint8).

    >>> integral_images_numpy(np.ones((2, 1, 2), dtype=np.uint8))[:, -1, -1]
    array([2, 2])
    """
    array = _as_stack(patches, 3, "patches")
    return _cumulate(array, _sum_dtype(array.dtype, "patches"))


def squared_integral_images(patches) -> np.ndarray:
    """Squared integral images of a stack of patches (as :func:`integral_images`, of the squared
    values): ``sq[n]``, of shape (h + 1, w + 1), equals ``squared_integral_image(patches[n])``.

    Examples
    --------
    >>> int(squared_integral_images(np.full((1, 2, 2), 3, dtype=np.uint8))[0, -1, -1])
    36
    """
    array = _as_stack(patches, 3, "patches")
    dtype = _sum_dtype(array.dtype, "patches")
    return _cumulate(array, dtype, square=True)


def _check_window(ii: np.ndarray, x, y, w, h):
    if ii.ndim < 2:
        raise InputError(f"integral image must have at least 2 dimensions, got shape {ii.shape}")
    rows, cols = ii.shape[-2] - 1, ii.shape[-1] - 1
    x, y, w, h = (np.asarray(v) for v in (x, y, w, h))
    for name, v in (("x", x), ("y", y), ("width", w), ("height", h)):
        if not (v.dtype == np.bool_ or np.issubdtype(v.dtype, np.integer)):
            raise InputError(f"window {name} must be an integer, got dtype {v.dtype}")
        if v.size and v.min() < 0:
            raise InputError(f"window {name} must be >= 0, got {v.min()}")
    right, bottom = x + w, y + h
    if right.size and right.max() > cols:
        raise InputError(f"window reaches column {right.max()} but the image has {cols} columns")
    if bottom.size and bottom.max() > rows:
        raise InputError(f"window reaches row {bottom.max()} but the image has {rows} rows")
    return x, y, right, bottom


def window_sum(ii, x, y, w, h):
    """Sum of the pixels in windows, from an integral image, in O(1) per window.

    Parameters
    ----------
    ii : (H + 1, W + 1) or (..., H + 1, W + 1) ndarray
        Integral image(s) from :func:`integral_image` or :func:`integral_images` (or their squared
        forms, to sum squared pixels).
    x, y : int or array_like of int
        Left column and top row of each window.
    w, h : int or array_like of int
        Width and height of each window (0 gives an empty window with sum 0). ``x``, ``y``, ``w``
        and ``h`` broadcast against each other.

    Returns
    -------
    total : scalar or ndarray, dtype of ``ii``
        Shape ``ii.shape[:-2] + broadcast(x, y, w, h).shape``.

    Raises
    ------
    InputError
        If a window leaves the image or a coordinate is negative.

    Examples
    --------
    >>> ii = integral_image(np.arange(12, dtype=np.uint8).reshape(3, 4))
    >>> int(window_sum(ii, 1, 1, 2, 2))     # 5 + 6 + 9 + 10
    30
    >>> window_sum(ii, [0, 2], 0, 2, 3)     # columns 0-1: 0+1+4+5+8+9; 2-3: 2+3+6+7+10+11
    array([27, 39])
    """
    ii = np.asarray(ii)
    x, y, right, bottom = _check_window(ii, x, y, w, h)
    return ii[..., bottom, right] - ii[..., y, right] - ii[..., bottom, x] + ii[..., y, x]


def window_mean_var(ii, sq, x, y, w, h):
    """Mean and variance of the pixels in windows, in O(1) per window.

    The variance is the population variance ``E[I**2] - E[I]**2``, computed in float64 and clipped
    at 0 (rounding can otherwise make it slightly negative on flat windows).

    Parameters
    ----------
    ii, sq : ndarray
        Integral image and squared integral image of the same image(s).
    x, y, w, h : int or array_like of int
        Windows as in :func:`window_sum`; ``w`` and ``h`` must be >= 1.

    Returns
    -------
    mean, var : float or ndarray of float64

    Examples
    --------
    >>> image = np.array([[1, 2], [3, 4]], dtype=np.uint8)
    >>> mean, var = window_mean_var(integral_image(image), squared_integral_image(image), 0, 0, 2, 2)
    >>> float(mean), float(var)     # mean 10/4; var 30/4 - 2.5**2
    (2.5, 1.25)
    """
    ii, sq = np.asarray(ii), np.asarray(sq)
    if ii.shape != sq.shape:
        raise InputError(f"integral image {ii.shape} and squared integral image {sq.shape} differ")
    area = np.asarray(w, dtype=np.int64) * np.asarray(h, dtype=np.int64)
    if area.size and area.min() < 1:
        raise InputError("window width and height must be >= 1 for a mean and variance")
    area = area.astype(np.float64)
    mean = window_sum(ii, x, y, w, h) / area
    var = np.maximum(window_sum(sq, x, y, w, h) / area - mean * mean, 0.0)
    return mean, var
