"""The sliding-window engine: one frame in, scored boxes out.

Per frame: one integral image and one squared-integral image; per window: the mean and standard
deviation from them (the same contrast normalisation as training, see
:func:`detector.features.evaluate_features`); then the trees, evaluating only the features they use,
dropping the window as soon as its running score falls below the tree's early-exit threshold (soft
cascade; Bourdev and Brandt, CVPR 2005).

Multi-scale by scaling the feature rectangles, not by resampling the image: the integral images are
built once per frame and each scale only needs a new table of rectangle corner offsets (see
:func:`scale_plan`). A feature's value at scale ``s`` uses each rectangle's *mean* (its sum divided
by its own scaled pixel count), so rounding of scaled rectangles does not bias it, and equals the
training value exactly at ``s = 1``.

Windows may reach past the image's edges by up to ``ScanSettings.overhang`` of their size, so that
objects cut by the frame edge are found: the integral images are built on the frame with its border
pixels repeated around it (as :func:`detector.harvest.crop_region` repeats them for patches cut
near the edge), and the boxes reported are clipped to the image.
"""

from __future__ import annotations

import math
import threading
from dataclasses import dataclass

import numpy as np

from detector.scan import _kernels
from detector.geometry import iou, nms
from detector.errors import InputError
from detector.features import SIGMA_FLOOR
from detector.geometry import window_box_to_object_box
from detector.features import integral_image, squared_integral_image


def _round(v):
    """Round half up (``floor(v + 0.5)``), so that rounded adjacent rectangles stay adjacent."""
    return np.floor(np.asarray(v, dtype=np.float64) + 0.5).astype(np.int64)


@dataclass
class ScalePlan:
    """What the kernel needs for one scale (see :mod:`detector.scan`)."""

    scale: float
    window: tuple[int, int]  # scaled window width, height in pixels
    offsets: np.ndarray  # int64 (F, K): corner offsets in the flat integral image, merged
    weights: np.ndarray  # float64 (F, K): weight of each corner's integral value
    counts: np.ndarray  # int64 (F,): corners each feature uses (the rest of the row is padding)
    consts: np.ndarray  # float64 (F,)
    win: np.ndarray  # int64 (4,)
    inv_area: float


def _merge_corners(offsets, weights):
    """Per row: add the weights of equal offsets, drop zero weights, pack to the left.

    Rectangles of a feature that touch share corners (a two-rectangle feature needs 6 look-ups
    instead of 8, the four-rectangle one 9 instead of 16); corner-wise rounding of scaled rectangles
    keeps touching rectangles touching, so this holds at every scale.
    """
    F, n = offsets.shape
    idx = np.argsort(offsets, axis=1, kind="stable")
    off = np.take_along_axis(offsets, idx, axis=1)
    wt = np.take_along_axis(weights, idx, axis=1)
    start = np.ones_like(off, dtype=bool)
    start[:, 1:] = off[:, 1:] != off[:, :-1]
    group = np.cumsum(start, axis=1) - 1  # run index within the row
    summed = np.zeros_like(wt)
    np.add.at(summed, (np.repeat(np.arange(F), n).reshape(F, n), group), wt)
    first_off = np.zeros_like(off)
    first_off[np.repeat(np.arange(F), n).reshape(F, n)[start], group[start]] = off[start]
    keep = summed != 0.0
    counts = keep.sum(axis=1)
    width = max(1, int(counts.max()) if F else 1)
    out_off = np.zeros((F, width), np.int64)
    out_wt = np.zeros((F, width), np.float64)
    pos = np.cumsum(keep, axis=1) - 1
    rows = np.repeat(np.arange(F), n).reshape(F, n)
    out_off[rows[keep], pos[keep]] = first_off[keep]
    out_wt[rows[keep], pos[keep]] = summed[keep]
    return out_off, out_wt, counts.astype(np.int64)


def scale_plan(features: np.ndarray, window, scale: float, row_stride: int,
               normalize: bool = True, channels=None, plane: int = 0) -> ScalePlan:
    """Corner offsets and weights of ``features`` at ``scale`` in an integral image whose rows are
    ``row_stride`` long.

    Rectangle corners are scaled and rounded (half up) separately, so rectangles that touch in the
    window still touch after scaling. A rectangle's pixel sum is divided by its own scaled pixel
    count (its mean is what is compared across scales).

    ``channels`` (one per feature, 0 = grey; see :mod:`detector.features`): a feature on channel
    c reads plane c of a stack of integral images ``plane`` cells apart (its offsets grow by
    ``c * plane``) and subtracts no window mean (its const is 0). An edge-strength feature (code
    8) reads plane 1 with the weights of an unnormalised feature (the kernel does not divide it
    by the window's standard deviation either: :func:`relative_features`). Channel features are
    planned at scale 1 only: gradients do not scale with the rectangles (see :class:`LevelPlan`),
    so models with them are scanned on an image pyramid.

    Examples
    --------
    >>> f = np.zeros((1, 4, 5), np.int32); f[0, 0] = [0, 0, 2, 2, 1]
    >>> p = scale_plan(f, (4, 4), 2.0, row_stride=9, normalize=False)
    >>> p.window, p.offsets[0].tolist(), p.weights[0].tolist()   # 4 corners of an 4x4 rectangle
    ((8, 8), [0, 4, 36, 40], [0.25, -0.25, -0.25, 0.25])
    """
    W, H = window
    feats = np.asarray(features, dtype=np.int64)
    x0 = _round(feats[..., 0] * scale)
    y0 = _round(feats[..., 1] * scale)
    x1 = _round((feats[..., 0] + feats[..., 2]) * scale)
    y1 = _round((feats[..., 1] + feats[..., 3]) * scale)
    Ws, Hs = int(_round(W * scale)), int(_round(H * scale))
    weight = feats[..., 4].astype(np.float64)
    base_area = (feats[..., 2] * feats[..., 3]).astype(np.float64)
    scaled_area = ((x1 - x0) * (y1 - y0)).astype(np.float64)
    used = (weight != 0) & (scaled_area > 0)
    safe = np.where(scaled_area > 0, scaled_area, 1.0)
    if normalize:
        coefs = np.where(used, weight * base_area / (W * H * safe), 0.0)
        consts = np.sum(np.where(used, weight * base_area, 0.0), axis=1) / (W * H)
    else:
        coefs = np.where(used, weight * base_area / safe, 0.0)
        consts = np.zeros(len(feats))
    # S = I(y1,x1) - I(y0,x1) - I(y1,x0) + I(y0,x0)
    corners = np.stack([y0 * row_stride + x0, y0 * row_stride + x1,
                        y1 * row_stride + x0, y1 * row_stride + x1], axis=-1)
    if channels is not None:
        from detector.features import EDGE_STRENGTH, FEATURE_PLANES

        code = np.asarray(channels, dtype=np.int64)
        channel = np.asarray(FEATURE_PLANES, np.int64)[code]
        gradient = channel > 0
        if normalize:  # an edge-strength feature's value is its raw sum
            absolute = (code == EDGE_STRENGTH)[:, None]
            coefs = np.where(absolute, np.where(used, weight * base_area / safe, 0.0), coefs)
        if gradient.any() and scale != 1.0:
            raise ValueError("channel features are scanned at scale 1, on an image pyramid")
        consts = np.where(gradient, 0.0, consts)
        corners = corners + (channel * plane)[:, None, None]
    signs = np.array([1.0, -1.0, -1.0, 1.0])
    F = len(feats)
    offsets, weights, counts = _merge_corners(np.where(used[..., None], corners, 0).reshape(F, 16),
                                              (coefs[..., None] * signs).reshape(F, 16))
    win = np.array([0, Ws, Hs * row_stride, Hs * row_stride + Ws], dtype=np.int64)
    return ScalePlan(scale, (Ws, Hs), offsets, weights, counts, np.ascontiguousarray(consts), win,
                     1.0 / (Ws * Hs))


def relative_features(channels, n_features: int) -> np.ndarray:
    """float64 ``(F,)``: 1.0 for each feature whose value the scan divides by the window's
    standard deviation (contrast-normalised: grey and channels 1..7), 0.0 for an edge-strength
    feature (code 8, :data:`detector.features.EDGE_STRENGTH`), whose raw sum the trees compare;
    what the kernels' ``relative`` argument holds (all 1.0 without channels).

    >>> relative_features(None, 2).tolist(), relative_features([0, 8, 1], 3).tolist()
    ([1.0, 1.0], [1.0, 0.0, 1.0])
    """
    if channels is None:
        return np.ones(n_features)
    from detector.features import EDGE_STRENGTH

    return np.ascontiguousarray(np.asarray(channels) != EDGE_STRENGTH, dtype=np.float64)


def scales_for(image_size, window, scale_step=1.2, min_scale=1.0, max_scale=None):
    """The scales to scan: ``min_scale * scale_step**k`` while the window fits the image.

    >>> [round(s, 3) for s in scales_for((100, 60), (24, 24), 1.5)]
    [1.0, 1.5, 2.25]
    """
    if scale_step <= 1.0:
        raise ValueError("scale step must be greater than 1")
    iw, ih = image_size
    W, H = window
    fit = min(iw / W, ih / H)
    top = fit if max_scale is None else min(fit, max_scale)
    out = []
    s = min_scale
    while s <= top + 1e-9 and int(_round(W * s)) <= iw and int(_round(H * s)) <= ih:
        out.append(s)
        s *= scale_step
    return out


#: Largest :attr:`ScanSettings.overhang`: a window's centre stays inside the image.
MAX_OVERHANG = 0.5


def edge_positions(length: int, window: int, step: int, overhang: float) -> np.ndarray:
    """Top-left positions of the windows along one axis: every ``step`` from 0 while the window
    fits, extended on the same grid in both directions while the window reaches past the edge by
    at most ``overhang`` of its size (``floor(overhang * window)`` pixels).

    >>> edge_positions(100, 24, 2, 0.0).tolist()[-3:], len(edge_positions(100, 24, 2, 0.0))
    ([72, 74, 76], 39)
    >>> p = edge_positions(100, 24, 2, 0.5)      # up to 12 pixels out: -12 .. 88
    >>> p[:2].tolist(), p[-1].item(), len(p)
    ([-12, -10], 88, 51)
    """
    out = int(math.floor(overhang * window + 1e-9))
    first = -(out // step) * step
    return np.arange(first, length - window + out + 1, step, dtype=np.int64)


@dataclass
class ScanSettings:
    """How to scan. Sizes are in image pixels.

    Attributes
    ----------
    scale_step : float
        Ratio between neighbouring scales.
    stride : float
        Step between windows at the window's own size; it grows with the scale.
    min_object, max_object : float or None
        Shorter side of the smallest and largest object box to look for. None = the sizes the
        model's training labels hold, widened by :data:`SIZE_SLACK` either way (the smallest no
        more than :data:`MAX_DEFAULT_ENLARGEMENT` times below the window's object side); for a
        model that does not record them, the window's object side and the whole image.
    threshold : float
        Keep detections scoring at least this (0..1).
    nms_iou : float
        Non-maximum suppression: drop a box whose IoU with a better one exceeds this.
    early_exit : bool
        Use the model's early-exit thresholds (and its contrast gate).
    exit_level : float in [0, 1] or None
        None (the default): the exits that keep every calibration object the model was trained to
        keep, the same whatever the threshold, so that a scan at threshold T returns exactly the
        detections of a scan at any lower threshold that score T or more. A level: the tighter
        exits calibrated for scans at that level or above (``Model.exits_for``), a speed option
        (fewer trees per window at high thresholds); they may drop objects that would have
        scored at or above the level, so a report and the scans it is meant for must use the
        same level.
    overhang : float in [0, 0.5]
        How far a window may reach past each edge of the image, as a share of its width (height);
        the image's border pixels are repeated there, so objects cut by the frame's edge are found.
        0.25 (the default) reaches objects with about four fifths of their width inside at the
        default margin of 0.1 (the window is 1.2 object widths, a quarter of it is 0.3, of which
        0.1 is margin); 0.5, the most, lets a window's centre reach the edge, so objects at least
        half inside are looked for, whatever the margin; 0 keeps every window inside. Windows
        inside the image are the same whatever the overhang (the grid only grows outward).
    box_voting : float in (0, 1] or None
        A share ``rho``, 0.5 by default: each detection kept by non-maximum suppression moves to
        the score-weighted mean of the object boxes of every window with IoU >= :data:`VOTE_IOU`
        with it that scores at least ``rho`` times its score, itself included (box voting;
        Gidaris and Komodakis,
        ICCV 2015; Viola and Jones, IJCV 2004, averaged overlapping detections). The detections,
        their scores and their order are those without it; only boxes move, and the scan keeps
        its windows down to ``rho`` times the threshold, so a scan at threshold T still gives
        exactly the detections (and boxes) of a scan at a lower threshold that score T or more.
        None: a detection's box is the object box of the window that scored it (the compiled
        finish, a little faster). Mining always scans without it.
    """

    scale_step: float = 1.2
    stride: float = 2.0
    min_object: float | None = None
    max_object: float | None = None
    threshold: float = 0.5
    nms_iou: float = 0.3
    early_exit: bool = True
    overhang: float = 0.25
    exit_level: float | None = None
    box_voting: float | None = 0.5

    def __post_init__(self):
        if not 0.0 <= self.overhang <= MAX_OVERHANG:
            raise ValueError(f"overhang must be in [0, {MAX_OVERHANG}], got {self.overhang!r}")
        if not 0.0 <= self.threshold <= 1.0:
            raise ValueError(f"threshold must be in [0, 1], got {self.threshold!r}")
        if self.exit_level is not None:
            if not 0.0 <= self.exit_level <= 1.0:
                raise ValueError(f"exit_level must be in [0, 1], got {self.exit_level!r}")
            if not self.early_exit:
                raise ValueError("exit_level chooses early exits; it needs early_exit")
        if self.box_voting is not None and not 0.0 < self.box_voting <= 1.0:
            raise ValueError(f"box_voting must be in (0, 1], got {self.box_voting!r}")


#: Box voting (``ScanSettings.box_voting``): a window votes for a detection's box when its object
#: box has at least this IoU with the detection's (the overlap Gidaris and Komodakis use).
VOTE_IOU = 0.5


#: The scan looks for objects from the smallest labelled size divided by this to the largest
#: times this, unless told otherwise: one scale step of 1.2 beyond each end and a little more, for
#: objects a little smaller or larger than any in training (common practice; the value is ours).
SIZE_SLACK = 1.25
#: By default the image is enlarged at most this many times for objects smaller than the window
#: (an enlarged frame costs the square of it); ``--min-object`` goes further.
MAX_DEFAULT_ENLARGEMENT = 4.0


def default_object_range(model):
    """``(min_object, max_object)`` in pixels that a scan with neither set looks for: from the
    model's training labels (:attr:`detector.model.Model.object_sizes`), or ``(None, None)``.

    >>> class M: object_sizes = {"smallest": 10.0, "largest": 50.0, "window_object_side": 20.0}
    >>> default_object_range(M())
    (8.0, 62.5)
    >>> class Tiny: object_sizes = {"smallest": 2.0, "largest": 8.0, "window_object_side": 20.0}
    >>> default_object_range(Tiny())          # at most 4 times below 20 pixels
    (5.0, 10.0)
    """
    sizes = getattr(model, "object_sizes", None)
    if not sizes:
        return None, None
    lo = sizes["smallest"] / SIZE_SLACK
    side = sizes.get("window_object_side")
    if side:
        lo = max(lo, side / MAX_DEFAULT_ENLARGEMENT)
    return lo, sizes["largest"] * SIZE_SLACK


def skipped_sizes_note(model, settings) -> str | None:
    """One line when ``--min-object`` / ``--max-object`` leave out object sizes the model's
    training labels hold; None otherwise.

    >>> class M: object_sizes = {"smallest": 10.0, "largest": 50.0, "window_object_side": 20.0}
    >>> skipped_sizes_note(M(), ScanSettings(max_object=30.0))
    'note: --max-object 30 skips labelled objects up to 50 pixels (the training labels hold 10 to 50)'
    >>> skipped_sizes_note(M(), ScanSettings()) is None
    True
    """
    sizes = getattr(model, "object_sizes", None)
    if not sizes:
        return None
    lo, hi = sizes["smallest"], sizes["largest"]
    held = f"(the training labels hold {lo:g} to {hi:g})"
    if settings.min_object is not None and settings.min_object > lo:
        return (f"note: --min-object {settings.min_object:g} skips labelled objects down to "
                f"{lo:g} pixels {held}")
    if settings.max_object is not None and settings.max_object < hi:
        return (f"note: --max-object {settings.max_object:g} skips labelled objects up to "
                f"{hi:g} pixels {held}")
    return None


@dataclass
class FramePlan:
    """Every scale's windows and plan for one image size: per scale for reading and for the numpy
    twin, and stacked for :func:`detector.scan._kernels.scan_frame`, which scans them all in one call.
    Window positions are in the image padded by ``pad`` pixels on every side."""

    scales: list  # [(ScalePlan, xs, ys)] of the scales that have windows
    pad: int
    windows: int  # windows over all scales
    sizes: np.ndarray  # float64 (S, 2): each scale's window width, height
    xs_all: np.ndarray  # int64: the scales' x positions one after another
    x_start: np.ndarray  # int64 (S + 1,): where each scale's positions start in xs_all
    ys_all: np.ndarray
    y_start: np.ndarray
    wins: np.ndarray  # int64 (S, 4)
    inv_areas: np.ndarray  # float64 (S,)
    offsets: np.ndarray  # int64 (S, F, K), K the largest corner count of any scale (zero-padded)
    weights: np.ndarray  # float64 (S, F, K)
    counts: np.ndarray  # int64 (S, F)
    consts: np.ndarray  # float64 (S, F)

    @classmethod
    def stack(cls, scales, pad: int, n_features: int) -> "FramePlan":
        S = len(scales)
        K = max([plan.offsets.shape[1] for plan, _, _ in scales], default=1)
        offsets = np.zeros((S, n_features, K), np.int64)
        weights = np.zeros((S, n_features, K))
        for i, (plan, _, _) in enumerate(scales):
            offsets[i, :, :plan.offsets.shape[1]] = plan.offsets
            weights[i, :, :plan.weights.shape[1]] = plan.weights

        def joined(k):
            parts = [axes[k] for axes in scales]
            start = np.cumsum([0] + [len(v) for v in parts]).astype(np.int64)
            return (np.concatenate(parts) if parts else np.zeros(0, np.int64)), start

        xs_all, x_start = joined(1)
        ys_all, y_start = joined(2)
        return cls(
            scales=scales, pad=pad, windows=int(sum(len(xs) * len(ys) for _, xs, ys in scales)),
            sizes=np.array([plan.window for plan, _, _ in scales], np.float64).reshape(S, 2),
            xs_all=xs_all, x_start=x_start, ys_all=ys_all, y_start=y_start,
            wins=np.array([plan.win for plan, _, _ in scales], np.int64).reshape(S, 4),
            inv_areas=np.array([plan.inv_area for plan, _, _ in scales], np.float64),
            offsets=offsets, weights=weights,
            counts=np.array([plan.counts for plan, _, _ in scales], np.int64).reshape(S, n_features),
            consts=np.array([plan.consts for plan, _, _ in scales], np.float64).reshape(S, n_features),
        )


@dataclass
class LevelPlan:
    """One scale of a pyramid scan: the frame shrunk to ``size`` (area averaging, as ``cv2.resize``
    with ``INTER_AREA`` computes it, by :func:`shrink_level`; ``factor`` frame pixels per level
    pixel along x and y), padded by ``pad`` pixels of
    repeated border, and scanned at the window's own size (``plan`` is :func:`scale_plan` at scale
    1) at the positions ``xs``, ``ys`` of the padded level.

    Gradient channels are not scale-invariant the way grey means are: the same object seen in a
    frame shows more gradient per pixel than the patch ``harvest`` shrank it into, because the
    shrinking averages fine detail away. On the cross-data sets the mean gradient magnitude of a
    labelled box read in the frame (scaled by ``1 / scale``, what the rectangle scaling assumes)
    was 1.5 to 3 times the patch's at scales 1.4 to 5 on the textured objects (horses, coin
    crops), and 1.0 to 1.3 times on the smooth galaxies. Aggregated channel features compute the
    channels on every level of an image pyramid for this reason (Dollár, Appel, Belongie and
    Perona, "Fast Feature Pyramids for Object Detection", PAMI 2014, whose power law describes how
    channels change with scale); so does this scan for models with channel features.
    """

    scale: float
    size: tuple  # (width, height) of the level before padding
    factor: tuple  # frame pixels per level pixel, (x, y)
    pad: int
    plan: "ScalePlan"
    xs: np.ndarray
    ys: np.ndarray
    # the level's pixel edges in the frame, along x and y (level_edges), when it shrinks the
    # frame along both; None when it does not (a frame smaller than the window: cv2.resize)
    edges: tuple | None = None
    # a level too large for BAND_BYTES is scanned in bands of rows: (rows, bands, plan) with
    # level_bands' rows and bands and the corner plan of a band's tables; None: the whole level
    bands: tuple | None = None


@dataclass
class FrameResult:
    """Detections in one frame with the work it took."""

    boxes: np.ndarray  # float64 (K, 4) x, y, width, height
    scores: np.ndarray  # float64 (K,) in 0..1, descending
    windows: int
    trees: int

    @property
    def mean_trees(self) -> float:
        return self.trees / self.windows if self.windows else 0.0


def raw_cutoff(model, threshold: float) -> float:
    """The running-score value a window needs for a final score of ``threshold``."""
    T = model.leaf_values.shape[0]
    if model.mode == "boosted":
        t = min(max(threshold, 1e-12), 1 - 1e-12)
        return 0.5 * model.temperature * math.log(t / (1 - t))
    return threshold * T


def final_scores(model, raw):
    """Running score after the last tree -> score in 0..1."""
    from detector.forest import final_score

    return final_score(model.mode, raw, model.leaf_values.shape[0], model.temperature)


#: Decimals a detection's score keeps. The detections file holds scores to six decimals, and the
#: scan rounds them the same way *before* it compares them with its threshold and before
#: non-maximum suppression, so the scores the engine returns are the scores the file shows, and a
#: threshold read from a file (``score`` recommends a detection's score) keeps exactly the
#: detections the file shows at or above it.
SCORE_DECIMALS = 6


def detection_scores(model, raw) -> np.ndarray:
    """Running score after the last tree -> a detection's score: :func:`final_scores` rounded to
    :data:`SCORE_DECIMALS` decimals (``np.round``: monotone, so the order of windows by score
    never reverses; it may only tie them).

    >>> from detector.model import Model
    >>> m = Model((2, 2), np.array([[[0, 0, 2, 1, -1], [0, 1, 2, 1, 1]] + [[0] * 5] * 2], np.int32),
    ...           [[0]], [[0.0]], [[0.0, 1.0]], [-np.inf], "bagged", normalize=False)
    >>> detection_scores(m, [0.12345649, 0.12345651]).tolist()  # one tree: the score is the sum
    [0.123456, 0.123457]
    """
    return np.round(final_scores(model, raw), SCORE_DECIMALS)


def kernel_cutoff(model, threshold: float) -> float:
    """A running score below which no window can reach a detection score of ``threshold``.

    The compiled loop keeps the windows whose running score after the last tree is at least this
    (and drops a window early once even the largest leaves of the trees left cannot lift it
    there); the engine then keeps those whose :func:`detection_scores` reach ``threshold``, the
    exact rule. Aiming a millionth of a score below the threshold leaves room for the rounding of
    the scores and of the logistic link, so the loop never drops a window the exact rule keeps;
    the few windows in between cost nothing to check. ``-inf`` when the threshold is within a
    millionth of 0 (every window is kept).

    >>> from detector.model import Model
    >>> m = Model((2, 2), np.array([[[0, 0, 2, 1, -1], [0, 1, 2, 1, 1]] + [[0] * 5] * 2], np.int32),
    ...           [[0]] * 4, [[0.0]] * 4, [[0.0, 1.0]] * 4, [-np.inf] * 4, "bagged", normalize=False)
    >>> round(kernel_cutoff(m, 0.5), 9), kernel_cutoff(m, 0.0)   # 4 trees: 4 * (0.5 - 1e-6)
    (1.999996, -inf)
    """
    margin = 10.0 ** -SCORE_DECIMALS
    if threshold - margin <= 0.0:
        return -math.inf
    cut = raw_cutoff(model, threshold - margin)
    step = 1e-9 * (1.0 + abs(cut))
    # a guard only: with the margin above a computed score monotone in the running score never
    # reaches the threshold here
    while detection_scores(model, [cut])[0] >= threshold:
        cut -= step
        step *= 2.0
    return cut


#: An 8-bit frame's integral image is held as int32 while its sums fit (255 * pixels < 2**31, so
#: up to 8.4 megapixels): exact, half the memory of float64, and the kernel reads it faster
#: (1.065x on the demo's 320 x 240 frames, 1.04x at 640 x 480; ``benchmarks/scan.py`` frames).
INT32_PIXELS = (2**31 - 1) // 255

#: Above that, as uint32 while 255 * pixels < 2**32 (up to 16.8 megapixels: the padded frame of
#: an 8-megapixel camera picture, say), half the memory of float64 again; float64 beyond.
UINT32_PIXELS = (2**32 - 1) // 255


#: Bytes a pyramid level's integral tables may take before the level is scanned in bands of rows
#: (:func:`level_bands`): nine tables of a model with gradient channels (4 bytes a cell) and the
#: squared one (8) come to 44 bytes a pixel of the padded level, so a frame's memory would grow with
#: its pixels; in bands it is bounded by this much plus the frame itself.
BAND_BYTES = 64 << 20


def level_bands(ys, padded_height: int, window_height: int, row_bytes: int,
                budget: int | None = None):
    """Bands of rows a padded pyramid level of ``padded_height`` rows is scanned in, when its
    integral tables (``row_bytes`` per row of the level) would take more than ``budget`` bytes
    (:data:`BAND_BYTES`); None when the whole level fits.

    Returns ``(rows, bands)``: every band is an image of ``rows`` consecutive rows of the level,
    ``bands`` a list of ``(top, first, stop)``: the band's first row in the level and the
    windows ``ys[first:stop]`` scanned on it. Every band has the same number of rows (the last one
    starts higher), so one corner plan serves all. A band reaches one row above its first window
    and one below its last window's bottom row, unless it starts at the level's top or ends at its
    bottom: the gradient of a row reads the rows above and below, so every row a window covers has
    the gradient it has in the whole level, and every window sum is the same integer.

    >>> rows, bands = level_bands(np.arange(0, 200, 2), 224, 24, 1000, budget=120_000)
    >>> rows, bands[:2], bands[-1]   # 119 rows: 94 rows of window tops, a window, 1 row more
    (119, [(0, 0, 47), (93, 47, 94)], (105, 94, 100))
    """
    budget = BAND_BYTES if budget is None else int(budget)
    ys = np.asarray(ys)
    if (padded_height + 1) * row_bytes <= budget or len(ys) == 0:
        return None
    # rows of a band: as many as the budget holds, but at least four windows' worth, so that the
    # rows every band computes again (a window and a row above and below) stay a third of the
    # band or less on very wide levels
    rows = max(4 * (window_height + 1), budget // max(1, row_bytes) - 1)
    if rows >= padded_height:
        return None
    per_band = rows - window_height - 1  # window tops in a band
    bands = []
    first = 0
    while first < len(ys):
        start = int(ys[first])
        stop = int(np.searchsorted(ys, start + per_band, side="left"))
        top = min(max(start - 1, 0), padded_height - rows)
        bands.append((top, first, stop))
        first = stop
    return rows, bands


def integral_dtype(height: int, width: int):
    """dtype of the integral image :func:`frame_integrals` gives an 8-bit frame of this size.

    >>> [integral_dtype(h, w).__name__ for h, w in [(480, 640), (3000, 4000), (5000, 4000)]]
    ['int32', 'uint32', 'float64']
    """
    pixels = height * width
    if pixels <= INT32_PIXELS:
        return np.int32
    return np.uint32 if pixels <= UINT32_PIXELS else np.float64


def frame_integrals(gray: np.ndarray, out=None):
    """The frame's integral and squared-integral images, flattened: the squared one as float64,
    the plain one as :func:`integral_dtype` for 8-bit frames (float64 for other dtypes).

    The sums are integers below 2**53 for any image the readers accept (255**2 * 2**24 pixels is
    about 2**40), so float64 holds them exactly and the kernel multiplies without converting.
    For 8-bit frames ``cv2.integral2`` builds both in one pass (a tenth of the time of two numpy
    cumulative sums); other dtypes go through :mod:`detector.features`. Both give the same
    numbers (tests/test_scan.py). A uint32 integral image is computed by OpenCV as int32, whose
    additions wrap around past 2**31 - 1 (two's complement), and read as uint32: exact while the
    sums stay below 2**32. The last sum is checked against the frame's total; were an OpenCV
    build to saturate instead, the frame falls back to float64 sums.

    ``out``, optional: two arrays of shape ``(height + 1, width + 1)`` and those dtypes to write
    into. Reusing them from frame to frame saves most of the time: fresh memory of this size comes
    from the operating system page by page, and the page faults cost several times the sums
    themselves (4.4 against 0.55 ms for a 640 x 480 frame on the benchmark machine,
    ``benchmarks/scan.py``).
    """
    gray = np.asarray(gray)
    if gray.dtype == np.uint8 and gray.ndim == 2:
        import cv2

        shape = (gray.shape[0] + 1, gray.shape[1] + 1)
        dtype = integral_dtype(*gray.shape)
        depth = cv2.CV_64F if dtype == np.float64 else cv2.CV_32S
        gray = np.ascontiguousarray(gray)
        if (out is not None and out[0].shape == shape and out[0].dtype == dtype
                and out[1].shape == shape and out[1].dtype == np.float64):
            target = out[0].view(np.int32) if dtype == np.uint32 else out[0]
            ii, sq = cv2.integral2(gray, sum=target, sqsum=out[1], sdepth=depth,
                                   sqdepth=cv2.CV_64F)
        else:
            ii, sq = cv2.integral2(gray, sdepth=depth, sqdepth=cv2.CV_64F)
        if dtype == np.uint32:
            ii = ii.view(np.uint32)
            if int(ii[-1, -1]) != int(gray.sum(dtype=np.uint64)):  # pragma: no cover
                return (integral_image(gray).ravel().astype(np.float64), sq.ravel())
        return ii.ravel(), sq.ravel()
    return (integral_image(gray).ravel().astype(np.float64),
            squared_integral_image(gray).ravel().astype(np.float64))


def channel_frame_integrals(gray: np.ndarray, out=None, scratch=None):
    """The integral images of a frame's :data:`detector.features.N_CHANNELS` channels stacked as
    planes in one flat table (grey first, then the gradient channels; each plane
    ``(height + 1) * (width + 1)`` cells, :func:`integral_dtype`), and the squared-integral image
    (float64), flattened: what the scan of a model with channel features reads.

    ``out``, optional: a ``(N_CHANNELS, height + 1, width + 1)`` table and a ``(height + 1,
    width + 1)`` float64 array to write into (see :func:`frame_integrals`); ``scratch``, optional:
    a uint8 buffer for the gradient planes (:func:`detector.features.fill_channel_planes`).
    """
    import cv2

    from detector.features import N_CHANNELS, fill_channel_planes

    gray = np.asarray(gray)
    if gray.dtype != np.uint8:
        if gray.size and (gray.min() < 0 or gray.max() > 255):
            raise ValueError("channel features need an 8-bit grey frame")
        gray = gray.astype(np.uint8)
    gray = np.ascontiguousarray(gray)
    h, w = gray.shape
    dtype = integral_dtype(h, w)
    if (out is None or out[0].shape != (N_CHANNELS, h + 1, w + 1) or out[0].dtype != dtype
            or out[1].shape != (h + 1, w + 1)):
        out = (np.empty((N_CHANNELS, h + 1, w + 1), dtype), np.empty((h + 1, w + 1)))
    table, sq = out
    # a uint32 table is filled through an int32 view (the same bits for sums below 2**32)
    depth, grey = ((cv2.CV_64F, table[0]) if dtype == np.float64
                   else (cv2.CV_32S, table[0].view(np.int32)))
    cv2.integral2(gray, sum=grey, sqsum=sq, sdepth=depth, sqdepth=cv2.CV_64F)
    fill_channel_planes(gray, table, scratch)
    return table.ravel(), sq.ravel()


class _Workspace(threading.local):
    """Per-thread buffers the scan reuses from frame to frame (see :func:`frame_integrals`)."""

    def __init__(self):
        self.integrals = None
        self.integral = None
        self.size = 0
        self.outputs = None
        self.frame = None
        self.planes = None

    def scratch(self) -> np.ndarray:
        """The uint8 buffer :func:`channel_frame_integrals` makes a band of gradient planes in
        (:data:`detector.features.PLANE_BAND_BYTES`, made once per thread)."""
        if self.planes is None:
            from detector.features import PLANE_BAND_BYTES

            self.planes = np.empty(PLANE_BAND_BYTES, np.uint8)
        return self.planes

    def tables(self, gray_shape, planes: int = 1):
        """Buffers for :func:`frame_integrals` (``planes == 1``) or, with more planes, for
        :func:`channel_frame_integrals`: views of the front of two flat buffers that only grow,
        so the levels of a pyramid scan, each of another size, reuse the same memory (fresh
        memory costs a page fault per page on first write: 2-3 ms of a 640 x 480 frame's ten
        levels)."""
        shape = (gray_shape[0] + 1, gray_shape[1] + 1)
        dtype = np.dtype(integral_dtype(*gray_shape))
        cells = planes * shape[0] * shape[1]
        if self.integrals is None or self.integrals[0].nbytes < cells * dtype.itemsize \
                or self.integrals[1].size < shape[0] * shape[1]:
            self.integrals = None  # the old buffers go before the new ones are filled
            self.integrals = (np.empty(cells * dtype.itemsize, np.uint8),
                              np.empty(shape[0] * shape[1]))
        raw, sq = self.integrals
        table = (planes,) + shape if planes > 1 else shape
        return (raw[:cells * dtype.itemsize].view(dtype).reshape(table),
                sq[:shape[0] * shape[1]].reshape(shape))

    def source(self, gray):
        """The integral image of an 8-bit frame (:func:`integral_dtype`), in a reused buffer: what
        :func:`shrink_level` reads the levels of a pyramid off."""
        import cv2

        gray = np.ascontiguousarray(gray, np.uint8)
        shape = (gray.shape[0] + 1, gray.shape[1] + 1)
        dtype = integral_dtype(*gray.shape)
        if self.integral is None or self.integral.shape != shape or self.integral.dtype != dtype:
            self.integral = np.empty(shape, dtype)
        target = self.integral.view(np.int32) if dtype == np.uint32 else self.integral
        cv2.integral(gray, sum=target, sdepth=cv2.CV_64F if dtype == np.float64 else cv2.CV_32S)
        return self.integral

    def padded(self, gray, pad):
        """``gray`` with ``pad`` pixels of its border repeated on every side, in a reused buffer."""
        shape = (gray.shape[0] + 2 * pad, gray.shape[1] + 2 * pad)
        if gray.dtype != np.uint8 or gray.ndim != 2:
            return np.pad(gray, pad, mode="edge")
        import cv2

        if self.frame is None or self.frame.shape != shape:
            self.frame = np.empty(shape, np.uint8)
        return cv2.copyMakeBorder(np.ascontiguousarray(gray), pad, pad, pad, pad,
                                  cv2.BORDER_REPLICATE, dst=self.frame)

    def out(self, n):
        """Outputs for ``n`` windows: x, y, raw score and scale index of each window kept."""
        if n > self.size:
            self.size = n
            self.outputs = (np.empty(n, np.int64), np.empty(n, np.int64), np.empty(n, np.float64),
                            np.empty(n, np.int64))
        return self.outputs


def level_edges(n_in: int, n_out: int) -> np.ndarray:
    """The ``n_out + 1`` edges, in source pixels, of the pixels of a level ``n_out`` wide shrunk from
    ``n_in``: ``k * n_in / n_out``, the last exactly ``n_in``.

    >>> level_edges(5, 2).tolist()
    [0.0, 2.5, 5.0]
    """
    edges = np.arange(n_out + 1, dtype=np.float64) * (n_in / n_out)
    edges[-1] = n_in
    return edges


def area_shrink_numpy(ii, xe, ye, out):
    """The numpy twin of :func:`detector.scan._kernels.area_shrink`: the same arithmetic in the
    same order.

    >>> img = np.array([[0, 10, 20], [30, 40, 50]], np.uint8)   # 3 x 2 shrunk to 2 x 1
    >>> ii = np.zeros((3, 4)); ii[1:, 1:] = img.cumsum(0).cumsum(1)
    >>> area_shrink_numpy(ii, level_edges(3, 2), level_edges(2, 1), np.empty((1, 2), np.uint8))
    array([[18, 32]], dtype=uint8)

    (left pixel: (0 + 30 + (10 + 40) / 2) / 3 = 55 / 3 = 18.3; right: (20 + 50 + 25) / 3 = 31.7)
    """
    rows, cols = ii.shape
    ix = np.minimum(xe.astype(np.int64), cols - 2)
    fx = xe - ix
    iy = np.minimum(ye.astype(np.int64), rows - 2)
    fy = ye - iy
    r0 = ii[iy]
    r1 = ii[iy + 1]
    a = r0[:, ix] + fx * (r0[:, ix + 1].astype(np.float64) - r0[:, ix].astype(np.float64))
    b = r1[:, ix] + fx * (r1[:, ix + 1].astype(np.float64) - r1[:, ix].astype(np.float64))
    j = a + fy[:, None] * (b - a)
    inv = 1.0 / (ye[1:] - ye[:-1])
    inv_width = 1.0 / (xe[1:] - xe[:-1])
    val = (j[1:, 1:] - j[1:, :-1] - j[:-1, 1:] + j[:-1, :-1]) * inv[:, None] * inv_width
    out[:] = np.minimum(np.maximum(np.rint(val), 0.0), 255.0).astype(np.uint8)
    return out


def shrink_level(ii, edges, use_numpy: bool = False) -> np.ndarray:
    """A level of the pyramid: the frame whose integral image is ``ii`` shrunk with area
    averaging to the pixels whose edges are ``edges`` (``(x edges, y edges)``,
    :func:`level_edges`). Within one grey level of ``cv2.resize(frame, size,
    interpolation=cv2.INTER_AREA)``, which computes the same means in float32 (``tests/test_scan.py``:
    a few pixels in ten thousand differ), and about four times faster over a pyramid: it reads
    four corners per level pixel instead of the whole frame per level."""
    xe, ye = edges
    out = np.empty((len(ye) - 1, len(xe) - 1), np.uint8)
    return (area_shrink_numpy if use_numpy else _kernels.area_shrink)(ii, xe, ye, out)


def enlarged_size(shape, up: float) -> tuple[int, int]:
    """``(width, height)`` of a frame of ``shape`` (rows, columns) enlarged ``up`` times, as
    ``cv2.resize`` with ``fx = fy = up`` rounds it.

    >>> enlarged_size((240, 320), 20.0)
    (6400, 4800)
    """
    return int(round(shape[1] * up)), int(round(shape[0] * up))


def check_enlargement(shape, up: float, min_object=None) -> None:
    """Refuse, before anything is allocated, to enlarge a frame beyond the readers' size limit.

    An object smaller than the window is looked for by enlarging the frame (``min_object`` below
    the window's object size); the enlarged frame must stay within the limit
    :func:`detector.io.images.read_gray` applies to images (100 megapixels, or
    ``PATCHWOOD_MAX_MEGAPIXELS``), since the scan's memory grows with its pixels
    (README, "Memory").

    Raises
    ------
    InputError
        One line: the enlargement, the sizes and the limit.

    Examples
    --------
    >>> check_enlargement((240, 320), 2.0)          # 640 x 480: fine
    >>> check_enlargement((3000, 4000), 20.0, 1.0)
    Traceback (most recent call last):
    ...
    detector.errors.InputError: --min-object 1 enlarges this 4000 x 3000 image 20 times, to 80000 x 60000 pixels, more than the limit of 100,000,000 pixels (PATCHWOOD_MAX_MEGAPIXELS); look for larger objects or cut the image into parts
    """
    from detector.io.images import MAX_MEGAPIXELS_VARIABLE, max_pixels_limit

    limit = max_pixels_limit()
    width, height = enlarged_size(shape, up)
    if width * height > limit:
        what = "" if min_object is None else f"--min-object {min_object:g} "
        raise InputError(f"{what}enlarges this {shape[1]} x {shape[0]} image {up:g} times, to "
                         f"{width} x {height} pixels, more than the limit of {limit:,} pixels "
                         f"({MAX_MEGAPIXELS_VARIABLE}); look for larger objects or cut the image "
                         "into parts")


def split_bounds(thresholds) -> np.ndarray:
    """float64 bounds that make ``v > bound`` exactly ``float32(v) > threshold`` for every float64
    ``v`` (training compared float32 feature values; the scan computes in float64 and so skips the
    rounding to float32 in its inner loop).

    ``float32(v)`` rounds to nearest, ties to even (IEEE 754). The values that round to at most
    ``t`` are those up to the midpoint between ``t`` and the next float32 above it, the midpoint
    itself included when ``t`` is the even one of the pair; the midpoint is exact in float64.

    Examples
    --------
    >>> t = np.float32(0.1)
    >>> b = split_bounds(np.array([t]))[0]
    >>> v = np.nextafter(b, 1.0)                      # the first float64 above the bound ...
    >>> bool(np.float32(v) > t), bool(np.float32(b) > t)   # ... rounds above t; the bound does not
    (True, False)
    """
    t32 = np.asarray(thresholds, dtype=np.float32)
    t = t32.astype(np.float64)
    with np.errstate(invalid="ignore", over="ignore"):
        up = np.nextafter(t32, np.float32(np.inf)).astype(np.float64)
        down = np.nextafter(t32, np.float32(-np.inf)).astype(np.float64)
        mid = np.where(np.isinf(up) & np.isfinite(t), t + (t - down) / 2, (t + up) / 2)
    even = (t32.view(np.uint32) & 1) == 0
    bounds = np.where(np.isfinite(t), np.where(even, mid, np.nextafter(mid, -np.inf)), t)
    # float32(v) is -inf only from -(largest float32 + half its step) down (that tie goes to -inf)
    top = float(np.finfo(np.float32).max)
    step = top - float(np.nextafter(np.float32(top), np.float32(0)))
    return np.where(np.isneginf(t), -(top + step / 2), bounds)


def first_use_order(node_features, n_features: int):
    """The features renumbered in the order the trees first use them: tree after tree, each tree's
    nodes in heap order (root first); features no node uses go last, in their own order.

    The scan reads a feature's corner offsets and weights from its scale plan, one row per
    feature. A model's features are stored in the order of the pool they were drawn from, so the
    rows the first trees need (which every window reaches) lay scattered over the whole table, and
    the later trees' rows, which few windows reach, broke them apart in the cache. In first-use
    order the rows each tree needs sit next to those of the trees before it. Same scores; 1.17 to
    1.22 times faster on the demo test split at the baseline's stride (a one-off A/B in one
    process, three runs; DEVELOPERS.md has the benchmark figures).

    Returns
    -------
    order : int64 (n_features,)
        ``order[i]`` is the model's index of the engine's feature ``i``.
    node_features : int64, the shape of the input
        The same trees indexing the renumbered features.

    Examples
    --------
    >>> order, nf = first_use_order(np.array([[3, 1, 3], [0, 1, 2]]), 5)
    >>> order.tolist(), nf.tolist()          # 3 first, then 1, 0, 2; 4 is never used
    ([3, 1, 0, 2, 4], [[0, 1, 0], [2, 1, 3]])
    """
    flat = np.asarray(node_features, dtype=np.int64).ravel()
    used, first = np.unique(flat, return_index=True)
    order = used[np.argsort(first, kind="stable")]
    order = np.concatenate([order, np.setdiff1d(np.arange(n_features), order)]).astype(np.int64)
    rank = np.empty(n_features, np.int64)
    rank[order] = np.arange(n_features)
    return order, rank[flat].reshape(np.shape(node_features))


def _remaining_bound(leaf_values):
    """``bound[t]``: the most the trees after ``t`` can add to a running score, raised by a
    billionth of the largest total any running score can reach, so that rounding in the float
    sums (far smaller) never makes the bound drop a window that would have reached the cutoff."""
    top = leaf_values.max(axis=1).astype(np.float64)
    slack = 1e-9 * (1.0 + float(np.abs(leaf_values).max(axis=1).sum()))
    return np.concatenate([np.cumsum(top[::-1])[::-1][1:], [0.0]]) + slack


class Engine:
    """A model made ready for scanning: arrays in the kernel's dtypes, per-size plans cached.

    The detections of a scan at threshold ``T`` are exactly those of a scan with the same
    settings at any lower threshold whose score is ``T`` or more: same boxes, same scores, same
    order. Nothing the loop does depends on the threshold except the exact rule that drops a
    window once it can no longer reach it (:func:`kernel_cutoff`): the early exits are the
    model's ``exit_thresholds`` (or, with ``settings.exit_level``, the row for that level, the
    same at every threshold), and greedy non-maximum suppression visits boxes in descending score,
    so a box at or above ``T`` is only ever suppressed by another one at or above ``T``.

    Parameters
    ----------
    model : detector.model.Model
    settings : ScanSettings
    """

    def __init__(self, model, settings: ScanSettings | None = None):
        self.model = model
        self.settings = settings or ScanSettings()
        self.window = tuple(int(v) for v in model.window)
        self.margin = float(model.margin)
        # the plans hold the features in the order the trees first use them (see first_use_order)
        order, node_features = first_use_order(model.node_features, len(model.features))
        self.features = np.asarray(model.features)[order]
        # the channel of each feature (None: all grey, scanned exactly as before channels existed)
        channels = getattr(model, "feature_channels", None)
        self.channels = (np.asarray(channels, np.int64)[order]
                         if channels is not None and np.any(channels) else None)
        self.node_features = np.ascontiguousarray(node_features, np.int64)
        self.node_thresholds = np.ascontiguousarray(model.node_thresholds, np.float32)
        self.split_bounds = split_bounds(self.node_thresholds)
        self.leaf_values = np.ascontiguousarray(model.leaf_values, np.float64)
        T = self.leaf_values.shape[0]
        if not self.settings.early_exit:
            self.exits = np.full(T, -np.inf)
        elif self.settings.exit_level is None:
            self.exits = np.ascontiguousarray(model.exit_thresholds, np.float64)
        else:
            self.exits = np.ascontiguousarray(model.exits_for(self.settings.exit_level),
                                              np.float64)
        self.bound = _remaining_bound(self.leaf_values)
        # the contrast gate is part of the early exit (off with it)
        gate = model.exit_min_sigma if self.settings.early_exit else 0.0
        self.min_var = gate * gate if gate > 0 else -np.inf
        self.threshold = float(self.settings.threshold)
        self.voting = self.settings.box_voting
        # the windows a scan keeps: down to the threshold, or to the share of it whose windows
        # may vote for a detection's box
        self.keep_from = self.threshold * (self.voting if self.voting else 1.0)
        self.cutoff = kernel_cutoff(model, self.keep_from)
        self.normalize = bool(model.normalize)
        # a model with gradient channel features is scanned on an image pyramid (see LevelPlan);
        # a grey model by scaling its rectangles over one integral image
        self.pyramid = self.channels is not None
        self.relative = relative_features(self.channels, len(self.features))
        self._grids: dict = {}
        self._lock = threading.Lock()
        self._work = _Workspace()

    def object_scale_range(self):
        """(smallest, largest) scale from min_object / max_object."""
        W, H = self.window
        k = 1.0 + 2.0 * self.margin
        short = min(W, H) / k  # object box shorter side at scale 1
        st = self.settings
        low, high = default_object_range(self.model)
        smallest = st.min_object if st.min_object is not None else low
        largest = st.max_object if st.max_object is not None else high
        lo = 1.0 if smallest is None else smallest / short
        hi = None if largest is None else largest / short
        if hi is not None and hi < lo:  # one bound given, the other from the labels: keep one size
            lo, hi = (hi, hi) if st.max_object is not None else (lo, lo)
        return lo, hi

    def plans(self, image_size, enlarged: float = 1.0):
        """Scale plans for an image of ``(width, height)`` (already enlarged by ``enlarged`` when
        the smallest object is smaller than the window), cached by size. Thread-safe. Their corner
        offsets are for the image padded by :meth:`padding` on every side; their rows are the
        engine's ``features`` (the model's, in the order :func:`first_use_order` gives), which
        ``node_features`` index."""
        return [plan for plan, _, _ in self._grid(image_size, enlarged).scales]

    def padding(self, image_size, enlarged: float = 1.0) -> int:
        """Pixels of repeated border the scan adds on every side of an image of this size (the
        farthest any window reaches past an edge; 0 with ``overhang=0``)."""
        return self._grid(image_size, enlarged).pad

    def _cached(self, key, build):
        """``build()``, cached by ``key`` (16 entries at most, the oldest dropped). Thread-safe."""
        with self._lock:
            value = self._grids.get(key)
        if value is None:
            value = build()
            with self._lock:
                self._grids[key] = value
                while len(self._grids) > 16:
                    self._grids.pop(next(iter(self._grids)))
        return value

    def _scales(self, image_size, enlarged: float = 1.0) -> list:
        """The scales to scan in an image of ``(width, height)``, already enlarged ``enlarged``
        times: :func:`scales_for` between the object sizes looked for."""
        lo, hi = self.object_scale_range()
        start = max(lo * enlarged, 1.0)
        top = None if hi is None else hi * enlarged
        return scales_for(image_size, self.window, self.settings.scale_step, start, top)

    def _grid(self, image_size, enlarged: float = 1.0) -> FramePlan:
        """The :class:`FramePlan` of an image of this size: every scale's plan and the windows'
        top-left positions in the image padded by ``pad`` pixels on every side, cached by image
        size (a small frame spends a fifth of its scan on them otherwise)."""
        return self._cached((tuple(image_size), enlarged),
                            lambda: self._build_grid(image_size, enlarged))

    def _build_grid(self, image_size, enlarged: float) -> FramePlan:
        iw, ih = image_size
        W, H = self.window
        axes, pad = [], 0
        for s in self._scales(image_size, enlarged):
            Ws, Hs = int(_round(W * s)), int(_round(H * s))
            step = max(1, int(_round(self.settings.stride * s)))
            xs = edge_positions(iw, Ws, step, self.settings.overhang)
            ys = edge_positions(ih, Hs, step, self.settings.overhang)
            if len(xs) and len(ys):
                axes.append((s, xs, ys))
                # the farthest this scale's windows reach past any edge
                pad = max(pad, int(-xs[0]), int(-ys[0]), int(xs[-1]) + Ws - iw,
                          int(ys[-1]) + Hs - ih)
        plane = (iw + 2 * pad + 1) * (ih + 2 * pad + 1)
        return FramePlan.stack([(scale_plan(self.features, self.window, s, iw + 2 * pad + 1,
                                            self.normalize, self.channels, plane),
                                 xs + pad, ys + pad) for s, xs, ys in axes], pad,
                               len(self.features))

    def candidates(self, gray: np.ndarray, use_numpy: bool = False):
        """Every window whose score (:func:`detection_scores`) reaches the threshold (with box
        voting, the share of it whose windows vote): ``(boxes (K,4) window boxes, raw (K,),
        windows, trees)``, before the margin and non-maximum suppression. Window boxes may reach past the image's edges (see
        ``ScanSettings.overhang``)."""
        if self.pyramid:
            return self._pyramid_candidates(gray, use_numpy)
        grid, up, (out_x, out_y, out_s, out_scale), _, kept, trees = self._run(gray, use_numpy)
        if grid is None:
            return np.zeros((0, 4)), np.zeros(0), 0, 0
        return (_window_boxes(grid, up, out_x, out_y, out_scale, kept), out_s[:kept].copy(),
                grid.windows, int(trees))

    def _enlarged(self, gray):
        """``(gray, up)``: the frame enlarged ``up`` times (``cv2.resize``, bilinear) when the
        smallest object looked for is smaller than the window's, else as it is with ``up = 1``."""
        lo, _ = self.object_scale_range()
        up = 1.0
        if lo < 1.0:
            up = 1.0 / lo
            if self.settings.min_object is None:
                # the labelled sizes' enlargement is a default: it shrinks to fit the size limit
                # (the smallest objects are then not looked for) instead of failing the image
                from detector.io.images import max_pixels_limit

                fits = math.sqrt(max_pixels_limit() / float(gray.size))
                up = max(1.0, min(up, math.floor(fits * 1000) / 1000))
            check_enlargement(gray.shape, up, self.settings.min_object)
        if up > 1.0:
            import cv2

            gray = cv2.resize(gray, None, fx=up, fy=up, interpolation=cv2.INTER_LINEAR)
        return gray, up

    def _levels(self, image_size, enlarged: float = 1.0) -> list:
        """The :class:`LevelPlan` of every scale of an image of ``(width, height)`` (already
        enlarged ``enlarged`` times), cached by size like :meth:`_grid`."""
        return self._cached(("levels", tuple(image_size), enlarged),
                            lambda: self._build_levels(image_size, enlarged))

    def _build_levels(self, image_size, enlarged: float) -> list:
        iw, ih = image_size
        W, H = self.window
        step = max(1, int(_round(self.settings.stride)))
        levels = []
        for s in self._scales(image_size, enlarged):
            lw, lh = max(W, int(_round(iw / s))), max(H, int(_round(ih / s)))
            xs = edge_positions(lw, W, step, self.settings.overhang)
            ys = edge_positions(lh, H, step, self.settings.overhang)
            if not (len(xs) and len(ys)):
                continue
            pad = max(0, int(-xs[0]), int(-ys[0]), int(xs[-1]) + W - lw, int(ys[-1]) + H - lh)
            row = lw + 2 * pad + 1
            plan = scale_plan(self.features, self.window, 1.0, row, self.normalize, self.channels,
                              row * (lh + 2 * pad + 1))
            edges = ((level_edges(iw, lw), level_edges(ih, lh)) if lw <= iw and lh <= ih
                     and (lw, lh) != (iw, ih) else None)
            from detector.features import N_CHANNELS

            banded = level_bands(ys + pad, lh + 2 * pad, H, row * (4 * N_CHANNELS + 8))
            bands = None
            if banded is not None:
                rows, spans = banded
                bands = (rows, spans, scale_plan(self.features, self.window, 1.0, row,
                                                 self.normalize, self.channels, row * (rows + 1)))
            levels.append(LevelPlan(s, (lw, lh), (iw / lw, ih / lh), pad, plan, xs + pad, ys + pad,
                                    edges, bands))
        return levels

    def _pyramid_candidates(self, gray, use_numpy: bool = False):
        """:meth:`candidates` of a pyramid scan (see :class:`LevelPlan`): every level is the frame
        shrunk with area averaging, as ``harvest`` shrinks a labelled box to the window, and its
        windows are scored at the window's own size, as training scored the patches."""
        import cv2

        from detector.features import N_CHANNELS

        gray, up = self._enlarged(gray)
        ih, iw = gray.shape
        levels = self._levels((iw, ih), up)
        windows = sum(len(lv.xs) * len(lv.ys) for lv in levels)
        if not windows:
            return np.zeros((0, 4)), np.zeros(0), 0, 0
        # outputs for the largest kernel call (a level, or a band of one); each call's kept windows
        # are copied out, so memory does not grow with the frame's windows
        out_x, out_y, out_s, _ = self._work.out(max(
            len(lv.xs) * (len(lv.ys) if lv.bands is None
                          else max(stop - first for _, first, stop in lv.bands[1]))
            for lv in levels))
        rules = (SIGMA_FLOOR, self.min_var, self.normalize)
        trees_and_exits = (self.node_features, self.split_bounds, self.leaf_values, self.exits,
                           self.cutoff, self.bound)
        scan = scan_scale_numpy if use_numpy else _kernels.scan_scale
        found = []  # (x, y, raw score, level) of the windows kept, call after call
        trees = 0
        source = None  # the frame's integral image, which every shrunk level is read off
        for i, lv in enumerate(levels):
            level = gray
            if lv.edges is not None and gray.dtype == np.uint8:
                if source is None:
                    source = self._work.source(gray)
                level = shrink_level(source, lv.edges, use_numpy)
            elif lv.size != (iw, ih):
                level = cv2.resize(np.ascontiguousarray(gray), lv.size, interpolation=cv2.INTER_AREA)
            if lv.pad:
                level = self._work.padded(level, lv.pad)
            row = lv.size[0] + 2 * lv.pad + 1
            if lv.bands is None:
                calls = [(0, level, lv.plan, lv.ys)]
            else:  # bands of rows, each with its own (small) tables: see level_bands
                rows, spans, band_plan = lv.bands
                calls = [(top, level[top:top + rows], band_plan, lv.ys[first:stop] - top)
                         for top, first, stop in spans]
            for top, image, plan, ys in calls:
                if self.channels is None:
                    ii, sq = frame_integrals(image, self._work.tables(image.shape))
                else:
                    ii, sq = channel_frame_integrals(image,
                                                     self._work.tables(image.shape, N_CHANNELS),
                                                     self._work.scratch())
                k, t = scan(ii, sq, row, lv.xs, ys, plan.win, plan.inv_area, *rules,
                            plan.offsets, plan.weights, plan.counts, plan.consts,
                            self.relative,
                            *trees_and_exits, out_x, out_y, out_s)
                # the tables are views of the work space's buffers: let them go, so that a later
                # call needing larger buffers frees these before it allocates those
                ii = sq = None
                k = int(k)
                trees += int(t)
                if k:
                    found.append((out_x[:k].copy(), out_y[:k] + top, out_s[:k].copy(),
                                  np.full(k, i, np.int64)))
        if found:
            out_x, out_y, out_s, out_scale = (np.concatenate(parts) for parts in zip(*found))
        else:
            out_x = out_y = out_scale = np.zeros(0, np.int64)
            out_s = np.zeros(0)
        kept = len(out_s)
        scores = detection_scores(self.model, out_s[:kept])
        keep = np.flatnonzero(scores >= self.keep_from)
        index = out_scale[keep]
        pads = np.array([lv.pad for lv in levels], np.float64)[index]
        factors = np.array([lv.factor for lv in levels], np.float64).reshape(-1, 2)[index]
        W, H = self.window
        boxes = np.empty((len(keep), 4))
        boxes[:, 0] = (out_x[keep] - pads) * factors[:, 0] / up
        boxes[:, 1] = (out_y[keep] - pads) * factors[:, 1] / up
        boxes[:, 2] = W * factors[:, 0] / up
        boxes[:, 3] = H * factors[:, 1] / up
        return boxes, out_s[keep].copy(), windows, trees

    def _run(self, gray, use_numpy: bool = False):
        """Run the kernel (or its numpy twin) over one frame: ``(grid, up, outputs, scores, kept,
        trees)``, the windows kept being the first ``kept`` entries of the four ``outputs`` (x, y,
        raw score, scale index; :meth:`_Workspace.out`), in window order, and ``scores`` their
        detection scores, every one at least the threshold; ``grid`` None when the frame has no
        window."""
        gray, up = self._enlarged(gray)
        ih, iw = gray.shape
        grid = self._grid((iw, ih), up)
        pad = grid.pad
        if not grid.windows:
            return None, up, (None,) * 4, np.zeros(0), 0, 0
        if pad:
            gray = self._work.padded(gray, pad)
        if self.channels is None:
            ii, sq = frame_integrals(gray, self._work.tables(gray.shape))
        else:
            from detector.features import N_CHANNELS

            ii, sq = channel_frame_integrals(gray, self._work.tables(gray.shape, N_CHANNELS),
                                             self._work.scratch())
        out_x, out_y, out_s, out_scale = self._work.out(grid.windows)
        stride = iw + 2 * pad + 1
        rules = (SIGMA_FLOOR, self.min_var, self.normalize)
        trees_and_exits = (self.node_features, self.split_bounds, self.leaf_values, self.exits,
                           self.cutoff, self.bound)
        if use_numpy:
            kept = trees = 0
            for i, (plan, xs, ys) in enumerate(grid.scales):
                k, t = scan_scale_numpy(ii, sq, stride, xs, ys, plan.win, plan.inv_area, *rules,
                                        plan.offsets, plan.weights, plan.counts, plan.consts,
                            self.relative,
                                        *trees_and_exits, out_x[kept:], out_y[kept:],
                                        out_s[kept:])
                out_scale[kept:kept + k] = i
                kept, trees = kept + k, trees + t
        else:
            kept, trees = _kernels.scan_frame(
                ii, sq, stride, grid.xs_all, grid.x_start, grid.ys_all, grid.y_start, grid.wins,
                grid.inv_areas, *rules, grid.offsets, grid.weights, grid.counts, grid.consts,
                self.relative,
                *trees_and_exits, out_x, out_y, out_s, out_scale)
        kept = int(kept)
        # the exact rule: the loop kept every window that can score the threshold, and a few
        # just below it (kernel_cutoff)
        scores = detection_scores(self.model, out_s[:kept])
        reach = scores >= self.keep_from
        if not reach.all():
            keep = np.flatnonzero(reach)
            for out in (out_x, out_y, out_s, out_scale):
                out[:len(keep)] = out[keep]
            scores, kept = scores[keep], len(keep)
        return grid, up, (out_x, out_y, out_s, out_scale), scores, kept, int(trees)

    def scan(self, gray: np.ndarray, use_numpy: bool = False) -> FrameResult:
        """Detections in one grayscale frame: object boxes, scores in 0..1 (descending), after
        non-maximum suppression.

        The same as :meth:`candidates` followed by :meth:`detections` with the image's size (the
        numpy route takes that way, and the tests hold the two equal), but the compiled route turns
        the windows kept into detections in one compiled call (:func:`detector.scan._kernels.finish`):
        the two dozen numpy calls of that way cost a tenth of a small frame's scan. With box voting
        it finishes the windows at or above the threshold that way, then every window kept votes
        (:func:`vote_boxes`).
        """
        if use_numpy or self.pyramid:
            wboxes, raw, windows, trees = self.candidates(gray, use_numpy=use_numpy)
            boxes, scores = self.detections(
                wboxes, raw, image_size=gray.shape[::-1],
                threshold=self.threshold if self.voting else None, box_voting=self.voting)
            return FrameResult(boxes, scores, windows, trees)
        grid, up, (out_x, out_y, out_s, out_scale), scores, kept, trees = self._run(gray)
        empty = FrameResult(np.zeros((0, 4)), np.zeros(0), 0 if grid is None else grid.windows,
                            trees)
        if grid is None or not kept:
            return empty
        ih, iw = gray.shape
        finish_args = (grid.sizes, grid.pad, float(up), self.margin, float(iw), float(ih),
                       float(self.settings.nms_iou))
        if not self.voting:
            boxes, scores = _kernels.finish(out_x, out_y, out_scale, scores, *finish_args)
            return FrameResult(boxes, scores, grid.windows, trees)
        above = np.flatnonzero(scores >= self.threshold)
        if not len(above):
            return empty
        boxes, found = _kernels.finish(out_x[above], out_y[above], out_scale[above],
                                       scores[above], *finish_args)
        voters = self._object_boxes(_window_boxes(grid, up, out_x, out_y, out_scale, kept),
                                    (iw, ih))
        boxes = clip_boxes(vote_boxes(boxes, found, voters, scores, self.voting), (iw, ih))
        return FrameResult(boxes, found, grid.windows, trees)

    def detections(self, window_boxes, raw, nms_iou=None, threshold=None, image_size=None,
                   windows: bool = False, box_voting: float | None = None):
        """Candidates -> object boxes and 0..1 scores (:func:`detection_scores`), descending, after
        non-maximum suppression (at ``nms_iou``, default the settings'), keeping scores >=
        ``threshold`` (default: all).

        ``image_size=(width, height)``: clip the object boxes to the image first (a window that
        reaches past the edge stands for the part of the object inside, as labels do).
        ``windows=True``: also return the window box of each detection (what the scan scored).
        ``box_voting=rho``: move each detection's box to the score-weighted mean of the object
        boxes of the candidates (all of them, also those below ``threshold``) that score at least
        ``rho`` times its score and overlap it by IoU >= :data:`VOTE_IOU`
        (``ScanSettings.box_voting``; :func:`vote_boxes`).
        """
        all_scores = detection_scores(self.model, raw)
        empty = (np.zeros((0, 4)), np.zeros(0))
        if not len(window_boxes):
            return empty + (np.zeros((0, 4)),) if windows else empty
        # every candidate's object box when they all vote; else only those of the kept ones
        voters = None if box_voting is None else self._object_boxes(window_boxes, image_size)
        scores = all_scores
        if threshold is not None:
            keep = all_scores >= threshold
            window_boxes, scores = window_boxes[keep], all_scores[keep]
            obj = voters[keep] if voters is not None else self._object_boxes(window_boxes,
                                                                              image_size)
        else:
            obj = voters if voters is not None else self._object_boxes(window_boxes, image_size)
        if not len(obj):
            return empty + (np.zeros((0, 4)),) if windows else empty
        keep = nms(obj, scores, self.settings.nms_iou if nms_iou is None else nms_iou)
        order = keep[np.argsort(-scores[keep], kind="stable")]
        boxes = obj[order]
        if box_voting is not None:
            boxes = vote_boxes(boxes, scores[order], voters, all_scores, box_voting)
            if image_size is not None:  # a mean of x and of w may end an ulp past the edge
                boxes = clip_boxes(boxes, image_size)
        if windows:
            return boxes, scores[order], window_boxes[order]
        return boxes, scores[order]

    def _object_boxes(self, window_boxes, image_size=None) -> np.ndarray:
        """The object boxes that window boxes stand for (shrunk by the margin), cut to the image
        ``(width, height)`` when given."""
        x, y, w, h = window_box_to_object_box(window_boxes[:, 0], window_boxes[:, 1],
                                              window_boxes[:, 2], window_boxes[:, 3], self.margin)
        obj = np.stack([x, y, w, h], axis=1)
        return obj if image_size is None else clip_boxes(obj, image_size)


def _window_boxes(grid, up, out_x, out_y, out_scale, kept) -> np.ndarray:
    """The window boxes ``(x, y, w, h)`` of the first ``kept`` windows a grey model's scan kept,
    in the frame's pixels (before any enlargement ``up``)."""
    boxes = np.empty((kept, 4))
    boxes[:, 0] = (out_x[:kept] - grid.pad) / up
    boxes[:, 1] = (out_y[:kept] - grid.pad) / up
    boxes[:, 2:] = grid.sizes[out_scale[:kept]] / up
    return boxes


#: Detections :func:`vote_boxes` takes together against the windows that can meet them.
_VOTE_BLOCK = 32


def vote_boxes(boxes, scores, voter_boxes, voter_scores, share: float,
               min_iou: float = VOTE_IOU) -> np.ndarray:
    """Box voting: each of ``boxes`` (scored ``scores``) moved to the ``voter_scores``-weighted
    mean of the ``voter_boxes`` that score at least ``share`` times its score and have IoU >=
    ``min_iou`` with it (:func:`detector.geometry.iou`), summed in the voters' order. A box that is
    one of the voters votes for itself; a box with no voter stays where it is.

    A 0.75 detection at x = 0 (10 x 10) and three windows: its own, one scoring 0.5 four pixels
    to the right (IoU 60 / 140 = 0.43, too far to vote) and one scoring 0.25 two pixels to the
    right (IoU 80 / 120 = 0.67). With share 0.3 the first and the third vote, x = (0.75 * 0 +
    0.25 * 2) / (0.75 + 0.25) = 0.5; with share 0.5 (0.25 < 0.375) only its own window.

    >>> d = np.array([[0.0, 0.0, 10.0, 10.0]])
    >>> v = np.array([[0.0, 0, 10, 10], [4.0, 0, 10, 10], [2.0, 0, 10, 10]])
    >>> vote_boxes(d, [0.75], v, np.array([0.75, 0.5, 0.25]), 0.3).tolist()
    [[0.5, 0.0, 10.0, 10.0]]
    >>> vote_boxes(d, [0.75], v, np.array([0.75, 0.5, 0.25]), 0.5).tolist()
    [[0.0, 0.0, 10.0, 10.0]]
    """
    boxes = np.asarray(boxes, np.float64)
    out = boxes.copy()
    if not len(boxes) or not len(voter_boxes):
        return out
    voter_boxes = np.asarray(voter_boxes, np.float64)
    voter_scores = np.asarray(voter_scores, np.float64)
    scores = np.asarray(scores, np.float64)
    # only windows whose left edge lies within the widest window's width left of a box's left
    # edge and before its right edge can meet it: boxes taken in blocks along x, each against the
    # slice of the windows sorted by x that can meet one of them (the IoU of every box with every
    # window took 37 of a busy frame's 86 ms); each box then sums its voters in their own order
    by_x = np.argsort(voter_boxes[:, 0], kind="stable")
    left = voter_boxes[by_x, 0]
    widest = float(voter_boxes[:, 2].max())
    box_order = np.argsort(boxes[:, 0], kind="stable")
    for start in range(0, len(boxes), _VOTE_BLOCK):
        block = box_order[start:start + _VOTE_BLOCK]
        lo = np.searchsorted(left, boxes[block, 0].min() - widest, side="left")
        hi = np.searchsorted(left, (boxes[block, 0] + boxes[block, 2]).max(), side="left")
        near = np.sort(by_x[lo:hi])
        if not len(near):
            continue
        overlap = iou(boxes[block], voter_boxes[near])
        near_scores = voter_scores[near]
        for row, k in enumerate(block):
            votes = near[(overlap[row] >= min_iou) & (near_scores >= share * scores[k])]
            if len(votes):
                weights = voter_scores[votes]
                out[k] = (weights[:, None] * voter_boxes[votes]).sum(axis=0) / weights.sum()
    return out


def clip_boxes(boxes, image_size) -> np.ndarray:
    """``(x, y, width, height)`` boxes cut to the image ``(width, height)`` (pixel-edge coordinates).

    A box that lies within the image along an axis keeps its position and size on that axis
    exactly as given: no ``(x + w) - x`` round trip, which can differ from ``w`` in the last bit.

    >>> clip_boxes(np.array([[-4.0, 2.0, 10.0, 10.0], [95.0, 50.0, 10.0, 20.0]]), (100, 60)).tolist()
    [[0.0, 2.0, 6.0, 10.0], [95.0, 50.0, 5.0, 10.0]]
    >>> w = 20.0 / 1.2                              # 16.666666666666668
    >>> (17.5 + w) - 17.5 == w                      # the round trip loses the last bit here
    False
    >>> clip_boxes(np.array([[17.5, 17.5, w, w]]), (100, 60))[0, 2:].tolist() == [w, w]
    True
    """
    b = np.asarray(boxes, dtype=np.float64)
    out = b.copy()
    for axis, size in ((0, image_size[0]), (1, image_size[1])):
        lo, extent = b[:, axis], b[:, axis + 2]
        hi = lo + extent
        cut = (lo < 0.0) | (hi > size)
        lo0 = np.clip(lo[cut], 0.0, size)
        out[cut, axis] = lo0
        out[cut, axis + 2] = np.clip(hi[cut], 0.0, size) - lo0
    return out


def scan_scale_numpy(ii, sq, row_stride, xs, ys, win, inv_area, sigma_floor, min_var, normalize,
                     offsets, weights, counts, consts, relative, node_features, split_bounds,
                     leaf_values,
                     exit_thresholds, cutoff, bound, out_x, out_y, out_score):
    """Plain-numpy twin of :func:`detector.scan._kernels.scan_scale` (same arguments, same results),
    vectorised over all windows of the scale. For tests and as a readable reference."""
    gx, gy = np.meshgrid(xs, ys)  # row-major: y outer, x inner, as in the kernel
    gx, gy = gx.ravel(), gy.ravel()
    base = gy * row_stride + gx

    def rect(table, off):
        return table[base + off[3]] - table[base + off[1]] - table[base + off[2]] + table[base + off[0]]

    mean = rect(ii, win).astype(np.float64) * inv_area
    if normalize:
        var = rect(sq, win).astype(np.float64) * inv_area - mean * mean
        gated = var >= min_var
        gx, gy, base, mean, var = gx[gated], gy[gated], base[gated], mean[gated], var[gated]
        sigma = np.sqrt(np.maximum(var, 0.0))
        inv_sigma = 1.0 / np.maximum(sigma, sigma_floor)
    else:
        inv_sigma = np.ones_like(mean)
    used = np.unique(node_features)
    values = {}
    for f in used:
        acc = np.zeros(len(base))
        for k in range(counts[f]):
            acc += weights[f, k] * ii[base + offsets[f, k]].astype(np.float64)
        values[f] = (acc - consts[f] * mean) * (inv_sigma if relative[f] else 1.0)
    n_trees, n_nodes = node_features.shape
    depth = int(round(math.log2(n_nodes + 1)))
    score = np.zeros(len(base))
    alive = np.ones(len(base), dtype=bool)
    trees = 0
    for t in range(n_trees):
        trees += int(alive.sum())
        node = np.zeros(len(base), dtype=np.int64)
        for _ in range(depth):
            f = node_features[t, node]
            v = np.empty(len(base))
            for fu in np.unique(f):
                m = f == fu
                v[m] = values[fu][m]
            node = 2 * node + np.where(v > split_bounds[t, node], 2, 1)
        score = np.where(alive, score + leaf_values[t, node - n_nodes], score)
        alive &= ~((score < exit_thresholds[t]) | (score + bound[t] < cutoff))
    keep = alive & (score >= cutoff)
    k = int(keep.sum())
    out_x[:k] = gx[keep]
    out_y[:k] = gy[keep]
    out_score[:k] = score[keep]
    return k, trees
