"""Gradient channels of grey images, for integral channel features (Dollár, Tu, Perona and
Belongie, "Integral Channel Features", BMVC 2009).

A grey image has :data:`N_CHANNELS` channels, each an 8-bit image of the same size:

=========  =====================================================================================
channel    content
=========  =====================================================================================
0          the grey image itself
1          gradient magnitude ``m = min(255, round(sqrt(gx**2 + gy**2)))``
2 .. 7     ``m`` where the gradient's orientation (modulo 180 degrees) lies in
           ``[30 (k - 2), 30 (k - 1))`` degrees, else 0 (hard binning into six orientations)
=========  =====================================================================================

``gx = I[y, x + 1] - I[y, x - 1]`` and ``gy = I[y + 1, x] - I[y - 1, x]``: central differences
(the ``[-1, 0, 1]`` masks, which Dalal and Triggs, CVPR 2005, found best for gradient histograms),
computed by ``cv2.Sobel`` with ``ksize=1`` (no smoothing), the border pixel repeated outside the
image. So ``m`` is twice the derivative in grey levels per pixel: a step of 255 between two pixels
gives 255, and only slopes steeper than 127 grey levels per pixel saturate (a diagonal black-white
step would be 361). The magnitude is an integer (``sqrt`` of an integer is never halfway between
two integers, so the rounding is exact) and the orientation bin is decided in integer arithmetic
(``tan 30 = 1 / sqrt(3)``: the angle of ``(gx, gy)`` is at least 30 degrees when
``3 gy**2 >= gx**2`` on the right half-plane, and so on), so every channel's integral image holds
exact integer sums and the compiled scan equals its numpy twin bit for bit.

A feature names the channel it reads by a code (``feature_channels`` in a model): codes 0..7 are
the planes above, and a feature on them is contrast-normalised as every grey feature is (divided
by the window's grey standard deviation; a window twice as contrasted gives the same value). Code
:data:`EDGE_STRENGTH` (8) reads the gradient magnitude plane too, but without that division: the
absolute edge strength of a rectangle, as aggregated channel features use their channels (Dollár,
Appel, Belongie and Perona, PAMI 2014). It lets the trees tell a faint object from a bright one
of the same shape, which normalised features cannot (:data:`FEATURE_PLANES` maps codes to planes).

The scan computes the channels on the whole (padded) frame; training computes them on each patch
(:func:`patch_channels`), where the gradient of the outermost ring of pixels would use the repeated
border instead of the true neighbour. Channel features therefore never touch that ring
(:func:`detector.features.channel_pool` draws them inside it), so that a window at scale 1 gives
exactly the training values of the patch cut from the frame.

Examples
--------
>>> ramp = np.tile(np.arange(0, 40, 4, dtype=np.uint8), (3, 1))    # +4 grey levels per column
>>> c = gradient_channels(ramp)
>>> c.shape, int(c[0, 1, 5]), int(c[1, 1, 5]), int(c[2, 1, 5])     # m = 8 at 0 degrees: bin 0
((7, 3, 10), 8, 8, 0)
"""

from __future__ import annotations

import numpy as np

__all__ = ["N_CHANNELS", "ORIENTATIONS", "CHANNEL_NAMES", "CHOICES", "EDGE_STRENGTH",
           "N_FEATURE_CHANNELS", "FEATURE_PLANES", "gradient_channels",
           "patch_channels", "patch_channels_numpy", "orientation_bins", "channel_integrals",
           "channel_integrals_numpy", "fill_channel_planes", "PLANE_BAND_BYTES"]

#: Orientation channels over 0..180 degrees.
ORIENTATIONS = 6
#: Grey, gradient magnitude and the orientation channels.
N_CHANNELS = 2 + ORIENTATIONS
CHANNEL_NAMES = ("grey", "gradient magnitude") + tuple(
    f"gradient {30 * k}-{30 * (k + 1)} degrees" for k in range(ORIENTATIONS)) + (
    "edge strength (gradient magnitude, not contrast-normalised)",)
#: The feature channel code of the gradient magnitude read without contrast normalisation.
EDGE_STRENGTH = N_CHANNELS
#: Feature channel codes: 0 .. N_FEATURE_CHANNELS - 1.
N_FEATURE_CHANNELS = N_CHANNELS + 1
#: The plane (0 .. N_CHANNELS - 1) each feature channel code reads.
FEATURE_PLANES = tuple(range(N_CHANNELS)) + (1,)
#: ``--channels`` choices: grey rectangle differences only, or with gradient channel features too.
CHOICES = ("grey", "gradient")

# patches whose channels patch_channels_numpy makes at once (bounds the work arrays' memory)
_PATCH_BATCH = 4096
# at least this many patches per thread of patch_channels
_THREAD_BLOCK = 256


def _differences(gray: np.ndarray):
    """Central differences along x and y (int16), border repeated (``cv2.Sobel``, ksize 1)."""
    import cv2

    gray = np.ascontiguousarray(gray, dtype=np.uint8)
    gx = cv2.Sobel(gray, cv2.CV_16S, 1, 0, ksize=1, borderType=cv2.BORDER_REPLICATE)
    gy = cv2.Sobel(gray, cv2.CV_16S, 0, 1, ksize=1, borderType=cv2.BORDER_REPLICATE)
    return gx, gy


def orientation_bins(gx, gy) -> np.ndarray:
    """Orientation bin 0..5 of each gradient ``(gx, gy)`` (integers), modulo 180 degrees:
    bin ``k`` holds angles in ``[30 k, 30 (k + 1))``, decided in exact integer arithmetic.

    The gradient is first turned into the upper half-plane (``gy > 0``, or ``gy == 0`` and
    ``gx >= 0``), where its angle is in ``[0, 180)``; the angle is at least 30 degrees when
    ``sqrt(3) gy >= gx``, at least 60 when ``gy >= sqrt(3) gx``, at least 90 when ``gx <= 0``, at
    least 120 when ``-gy >= sqrt(3) gx`` and at least 150 when ``-sqrt(3) gy >= gx``; squaring
    (with the signs checked) keeps these in integers.

    Examples
    --------
    >>> orientation_bins(np.array([1, 1, 0, -1, -5, 3, -3]), np.array([0, 1, 1, 1, 1, -3, 0])).tolist()
    [0, 1, 3, 4, 5, 4, 0]
    """
    gx = np.asarray(gx, np.int32)   # |gx|, |gy| <= 255: the products below fit in int32
    gy = np.asarray(gy, np.int32)
    flip = (gy < 0) | ((gy == 0) & (gx < 0))
    gx = np.where(flip, -gx, gx)
    gy = np.where(flip, -gy, gy)
    x2, y2 = gx * gx, gy * gy
    left = (gy > 0) & (gx <= 0)          # angle in [90, 180)
    right = (gy > 0) & (gx > 0)          # angle in (0, 90); gy == 0 is 0 degrees (or no gradient)
    bins = (left | (right & (3 * y2 >= x2))).astype(np.int8)      # >= 30 degrees
    bins += left | (right & (y2 >= 3 * x2))                       # >= 60
    bins += left                                                   # >= 90
    bins += left & (3 * x2 >= y2)                                  # >= 120
    bins += left & (x2 >= 3 * y2)                                  # >= 150
    return bins


def gradient_channels(gray, out=None) -> np.ndarray:
    """Channels 1..7 (magnitude and six orientations) of a grey image: uint8 ``(7, H, W)``.

    Parameters
    ----------
    gray : (H, W) array_like of uint8
    out : (7, H, W) ndarray of uint8, optional
        Written into and returned (a reused buffer saves the page faults of fresh memory).
    """
    gray = np.asarray(gray)
    gx, gy = _differences(gray)
    fx, fy = gx.astype(np.float32), gy.astype(np.float32)
    magnitude = np.minimum(np.rint(np.sqrt(fx * fx + fy * fy)), 255).astype(np.uint8)
    bins = orientation_bins(gx, gy)
    shape = (N_CHANNELS - 1,) + gray.shape
    if out is None or out.shape != shape or out.dtype != np.uint8:
        out = np.empty(shape, np.uint8)
    out[0] = magnitude
    for k in range(ORIENTATIONS):
        np.multiply(magnitude, bins == k, out=out[k + 1])
    return out


def patch_channels(patches, n_jobs: int = 1) -> np.ndarray:
    """Channels 1..7 of every patch of a stack, each computed on the patch alone (border
    repeated): uint8 ``(N, 7, h, w)``. The outermost ring of pixels differs from what the scan
    sees inside a frame; channel features do not read it (see the module notes).

    One compiled pass per patch (:func:`detector.features._channel_kernels.patch_channels`, the
    per-pixel rules of :func:`channel_integrals`), on ``n_jobs`` threads (an int >= 1) over
    blocks of patches; :func:`patch_channels_numpy` is its twin. On the cross-data benchmark's
    cups bank (5,559 patches of 39 x 32) the numpy route took 0.95 s of every ``train``, on one
    thread while the other waited.

    Examples
    --------
    >>> p = np.zeros((2, 4, 4), np.uint8); p[1, :, 2:] = 100          # a vertical edge
    >>> c = patch_channels(p)
    >>> c.shape, c[0].max().item(), c[1, 0, 1].tolist()                # columns 1 and 2 see it
    ((2, 7, 4, 4), 0, [0, 100, 100, 0])
    """
    from detector.features._channel_kernels import patch_channels as kernel

    patches = np.ascontiguousarray(patches, dtype=np.uint8)
    if patches.ndim != 3:
        raise ValueError(f"patches must be (N, h, w), got shape {patches.shape}")
    n, h, w = patches.shape
    out = np.empty((n, N_CHANNELS - 1, h, w), np.uint8)
    if n == 0 or h == 0 or w == 0:
        return out
    workers = max(1, min(int(n_jobs), n // _THREAD_BLOCK))
    if workers == 1:
        return kernel(patches, out, 0, n)
    from concurrent.futures import ThreadPoolExecutor

    bounds = np.linspace(0, n, workers + 1).astype(int)
    with ThreadPoolExecutor(max_workers=workers) as pool:
        list(pool.map(lambda k: kernel(patches, out, bounds[k], bounds[k + 1]), range(workers)))
    return out


def patch_channels_numpy(patches) -> np.ndarray:
    """Plain twin of :func:`patch_channels` (cv2.Sobel and numpy on the patches side by side).

    >>> p = np.zeros((2, 4, 4), np.uint8); p[1, :, 2:] = 100          # a vertical edge
    >>> patch_channels_numpy(p)[1, 0, 1].tolist()                      # columns 1 and 2 see it
    [0, 100, 100, 0]
    """
    patches = np.asarray(patches, dtype=np.uint8)
    n, h, w = patches.shape
    out = np.empty((n, N_CHANNELS - 1, h, w), np.uint8)
    for start in range(0, n, _PATCH_BATCH):
        part = patches[start:start + _PATCH_BATCH]
        m = len(part)
        # side by side in one image, each patch between copies of its first and last column, so
        # that the differences at its left and right edges see its own border repeated
        wide = np.empty((h, m, w + 2), np.uint8)
        wide[:, :, 1:-1] = part.transpose(1, 0, 2)
        wide[:, :, 0] = part[:, :, 0].T
        wide[:, :, -1] = part[:, :, -1].T
        channels = gradient_channels(wide.reshape(h, m * (w + 2)))
        out[start:start + m] = channels.reshape(N_CHANNELS - 1, h, m, w + 2)[..., 1:-1].transpose(
            2, 0, 1, 3)
    return out


#: Bytes of the uint8 gradient planes :func:`fill_channel_planes` makes at a time (seven per
#: pixel): a 640 x 480 frame's padded level at once, a larger one in bands of rows.
PLANE_BAND_BYTES = 4 << 20


def fill_channel_planes(gray, table, scratch=None, band_rows: int | None = None) -> np.ndarray:
    """Planes 1..7 of ``table`` (``(N_CHANNELS, H + 1, W + 1)``, int32, uint32 or float64): the
    integral images of the gradient channels of ``gray`` (uint8, H x W). Plane 0 is left to the
    caller. The channels are made by the compiled loop
    (:func:`detector.features._channel_kernels.gradient_planes`) as uint8 planes, a band of
    ``band_rows`` rows at a time (default: :data:`PLANE_BAND_BYTES` of them), and summed by
    ``cv2.integral`` into the table: each band's sums start from zero, so the row above the band
    is added to them. Sums are exact integers in every dtype (uint32 tables are filled through an
    int32 view: the bits of a sum below 2**32 are the same). ``scratch``: a uint8 buffer to make
    the planes in, used when it is large enough.

    >>> t = np.zeros((8, 3, 4), np.int32)
    >>> fill_channel_planes(np.array([[0, 10, 20], [0, 10, 20]], np.uint8), t, band_rows=1)[1].tolist()
    [[0, 0, 0, 0], [0, 10, 30, 40], [0, 20, 60, 80]]
    """
    import cv2

    from detector.features._channel_kernels import gradient_planes

    h, w = gray.shape
    if h == 0 or w == 0:
        table[1:] = 0
        return table
    rows = max(1, PLANE_BAND_BYTES // (7 * w)) if band_rows is None else int(band_rows)
    rows = min(rows, h)
    if scratch is None or scratch.size < 7 * rows * w:
        scratch = np.empty(7 * rows * w, np.uint8)
    if table.dtype == np.float64:
        depth, target = cv2.CV_64F, table
    else:
        depth, target = cv2.CV_32S, table.view(np.int32)
    for y0 in range(0, h, rows):
        y1 = min(h, y0 + rows)
        planes = gradient_planes(gray, y0, scratch[:7 * (y1 - y0) * w].reshape(7, y1 - y0, w))
        for c in range(7):
            sums = target[c + 1, y0:y1 + 1]
            above = sums[0].copy() if y0 else None
            cv2.integral(planes[c], sum=sums, sdepth=depth)
            if y0:
                sums[0] = above
                sums[1:] += above  # int32 views wrap as uint32 arithmetic does
    return table


def channel_integrals(gray, dtype=np.int32, out=None) -> np.ndarray:
    """Integral images of all :data:`N_CHANNELS` channels of a grey frame, stacked as planes:
    ``(N_CHANNELS, H + 1, W + 1)`` of ``dtype`` (int32 while ``255 * H * W`` fits, uint32 while
    it fits in 32 bits, else float64; exact integers either way). Plane 0 is the grey image's, the
    others :func:`fill_channel_planes`'; :func:`channel_integrals_numpy` is the twin.

    Examples
    --------
    >>> t = channel_integrals(np.array([[0, 10, 20]], np.uint8))
    >>> t.shape, t[0, 1].tolist(), t[1, 1].tolist()     # m = 10, 20, 10 (border repeated)
    ((8, 2, 4), [0, 0, 10, 30], [0, 10, 30, 40])
    """
    import cv2

    gray = np.ascontiguousarray(gray, dtype=np.uint8)
    h, w = gray.shape
    shape = (N_CHANNELS, h + 1, w + 1)
    if out is None or out.shape != shape or out.dtype != dtype:
        out = np.empty(shape, dtype)
    if dtype == np.float64:
        cv2.integral(gray, sum=out[0], sdepth=cv2.CV_64F)
    else:
        cv2.integral(gray, sum=out[0].view(np.int32), sdepth=cv2.CV_32S)
    return fill_channel_planes(gray, out)


def channel_integrals_numpy(gray, dtype=np.int32) -> np.ndarray:
    """Plain twin of :func:`channel_integrals`: :func:`gradient_channels`, then ``cv2.integral``
    plane by plane.

    >>> channel_integrals_numpy(np.array([[0, 10, 20]], np.uint8))[1, 1].tolist()
    [0, 10, 30, 40]
    """
    import cv2

    gray = np.ascontiguousarray(gray, dtype=np.uint8)
    h, w = gray.shape
    out = np.empty((N_CHANNELS, h + 1, w + 1), dtype)
    depth = cv2.CV_32S if dtype == np.int32 else cv2.CV_64F
    channels = gradient_channels(gray)
    for c in range(N_CHANNELS):
        cv2.integral(gray if c == 0 else channels[c - 1], sum=out[c], sdepth=depth)
    return out
