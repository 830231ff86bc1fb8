"""Compiled loops for the gradient channels of a frame and of patches (:mod:`detector.features`).

:func:`gradient_planes` computes, in one branch-free loop that vectorises, each pixel's central
differences, its gradient magnitude and orientation bin, and writes the seven uint8 planes; the
integral images of the planes are then ``cv2.integral``'s (:func:`detector.features.channel_integrals`).
The plain-numpy twin is :func:`detector.features.channel_integrals_numpy` (cv2.Sobel, numpy and
cv2.integral, plane by plane); ``tests/test_channels.py`` holds the two equal. On a 640 x 480 frame
with the scan's padding (766 x 606): the numpy route 135 ms (a loaded machine), a first compiled
loop with the edge cases as branches and all planes row by row 30 ms; the gradient and the running
sums of each plane in one compiled loop, plane after plane, 2.4 ms; the planes here and
``cv2.integral`` 1.3 ms (quiet machine, the two taking turns, medians of 150 calls; 0.53 against
0.27 ms at 360 x 280).
"""

from __future__ import annotations

import math

from detector._jit import kernel
import numpy as np


@kernel(cache=True, nogil=True, inline="always")
def _gradient(gx, gy):
    """Magnitude (rounded, capped at 255) and orientation bin 0..5 of one gradient (int32), the
    rules of :mod:`detector.features` without a branch."""
    s = np.int32(1) - np.int32(2) * np.int32((gy < 0) | ((gy == 0) & (gx < 0)))
    gx = gx * s  # turned into the upper half-plane: the angle is in [0, 180)
    gy = gy * s
    x2 = gx * gx
    y2 = gy * gy
    # sqrt of an integer <= 130050 is never within 3.5e-4 of a half; float32 is 100x finer here
    m = np.int32(math.sqrt(np.float32(x2 + y2)) + np.float32(0.5))
    upper = np.int32(gy > 0)
    right = np.int32(gx > 0) * upper
    left = upper - right
    b = (right * (np.int32(3 * y2 >= x2) + np.int32(y2 >= 3 * x2))
         + left * (np.int32(3) + np.int32(3 * x2 >= y2) + np.int32(x2 >= 3 * y2)))
    return min(m, np.int32(255)), b


@kernel(cache=True, nogil=True)
def gradient_planes(gray, y0, out):
    """Channels 1..7 of rows ``y0 .. y0 + rows - 1`` of ``gray`` (uint8, H x W) into ``out``
    (uint8, 7 x rows x W): 0 the gradient magnitude, 1..6 the magnitude in its orientation bin,
    0 elsewhere (see :mod:`detector.features` for the exact rules; the rows above and below the
    band are read, the image's border repeated). :func:`detector.features.channel_integrals` sums
    them with ``cv2.integral``."""
    h, w = gray.shape
    for i in range(out.shape[1]):
        y = y0 + i
        up = gray[y - 1 if y > 0 else 0]
        mid = gray[y]
        down = gray[y + 1 if y < h - 1 else h - 1]
        o0 = out[0, i]
        o1 = out[1, i]
        o2 = out[2, i]
        o3 = out[3, i]
        o4 = out[4, i]
        o5 = out[5, i]
        o6 = out[6, i]
        for x in range(1, w - 1):
            m, b = _gradient(np.int32(mid[x + 1]) - np.int32(mid[x - 1]),
                             np.int32(down[x]) - np.int32(up[x]))
            o0[x] = m
            o1[x] = m * np.int32(b == 0)
            o2[x] = m * np.int32(b == 1)
            o3[x] = m * np.int32(b == 2)
            o4[x] = m * np.int32(b == 3)
            o5[x] = m * np.int32(b == 4)
            o6[x] = m * np.int32(b == 5)
        for x in (0, w - 1):  # the border pixel repeated outside the image
            m, b = _gradient(np.int32(mid[min(x + 1, w - 1)]) - np.int32(mid[max(x - 1, 0)]),
                             np.int32(down[x]) - np.int32(up[x]))
            o0[x] = m
            for k in range(6):
                out[1 + k, i, x] = m * np.int32(b == k)
    return out


@kernel(cache=True, nogil=True)
def patch_channels(patches, out, start, stop):
    """Channels 1..7 of patches ``start .. stop - 1`` of ``patches`` (uint8, N x h x w) into
    ``out`` (uint8, N x 7 x h x w), each patch on its own with its border repeated: the twin of
    :func:`detector.features.patch_channels_numpy` (``tests/test_channels.py``)."""
    n, h, w = patches.shape
    for i in range(start, stop):
        p = patches[i]
        o = out[i]
        for y in range(h):
            up = p[y - 1 if y > 0 else 0]
            mid = p[y]
            down = p[y + 1 if y < h - 1 else h - 1]
            for x in range(w):
                m, b = _gradient(np.int32(mid[x + 1 if x < w - 1 else w - 1])
                                 - np.int32(mid[x - 1 if x > 0 else 0]),
                                 np.int32(down[x]) - np.int32(up[x]))
                o[0, y, x] = m
                for k in range(6):
                    o[1 + k, y, x] = m if b == k else 0
    return out
