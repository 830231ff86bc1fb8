"""The cross-data benchmark's second peer: aggregated channel features and boosted depth-2 trees
(ACF; Dollár, Appel, Belongie and Perona, "Fast Feature Pyramids for Object Detection", PAMI
2014), assembled from numpy, opencv and scikit-learn.

* channels: the grey level, the normalised gradient magnitude and 6 orientation channels (the
  magnitude split by unsigned orientation into 6 bins of 30 degrees), 8 in all; the image is
  smoothed by a [1 2 1] / 4 triangle filter first, the magnitude is normalised by its own
  triangle-smoothed value (radius 5, + 0.005), as in the paper's ACF;
* aggregation: each channel summed over 4 x 4 pixel blocks, then smoothed by [1 2 1] / 4: a window
  of W x H pixels is W/4 x H/4 x 8 numbers (8 x 8 x 8 = 512 for a 32 x 32 window);
* classifier: ``sklearn.ensemble.HistGradientBoostingClassifier(max_depth=2)`` (gradient-boosted
  depth-2 trees on the log loss; the paper uses AdaBoost with depth-2 trees), retrained after
  each of 3 rounds of hard-negative mining with more trees each time (64, 128, 256, 512: the
  paper's schedule of growing stages, halved);
* scan: an image pyramid at the same scales as the other detectors (``detector.scan.scales_for``,
  step 1.2): each level is the frame resized with ``cv2.INTER_AREA``, its channels computed and
  aggregated once, and every window at a stride of one block (4 level pixels) read from the block
  grid; the paper's approximated pyramid (channels extrapolated between octaves) is not used, the
  channels are computed at every scale. Windows are mapped to frame boxes, shrunk by the patch
  bank's context margin and thinned by greedy non-maximum suppression at IoU 0.3
  (``detector.geometry.nms``), as the HOG peer's (``benchmarks/baseline.py``, whose pyramid, box and
  mining helpers this module reuses).

Where training and scanning differ: a training patch's channels are computed on the patch alone
(the border repeated), a scanned window's on the whole level; the usual price of a dense scan.

    >>> rng = np.random.default_rng(0)
    >>> patches = rng.integers(0, 40, (60, 32, 32)).astype(np.uint8)
    >>> patches[:30, 8:24, 8:24] = 220                        # 30 bright squares, 30 dark noise
    >>> det = ChannelBoost(n_trees=(20,)).fit(patches, np.r_[np.ones(30), np.zeros(30)])
    >>> bool((det.decision_function(patches[:30]) > 0).all())
    True
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import cv2
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from detector.scan import scales_for  # noqa: E402


def _baseline():
    """benchmarks/baseline.py as a module (benchmarks/ is not a package)."""
    name = "patchwood_baseline_benchmark"
    if name in sys.modules:
        return sys.modules[name]
    spec = importlib.util.spec_from_file_location(name, Path(__file__).with_name("baseline.py"))
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    return module


SHRINK = 4  # pixels per aggregation block side (the paper's shrink factor)
ORIENTATIONS = 6  # unsigned orientation bins over 0-180 degrees (the paper: 6)
CHANNELS = 2 + ORIENTATIONS  # grey, gradient magnitude, 6 orientations
NORM_RADIUS = 5  # gradient normalisation: triangle filter radius (the paper's toolbox default)
NORM_CONST = 0.005
TREES = (64, 128, 256, 512)  # trees before and after each of 3 mining rounds
SHORT_SIDE = 32  # the peer's window: the labels' median aspect, shorter side 32 pixels


def _triangle(images: np.ndarray, radius: int, axes=(-2, -1)) -> np.ndarray:
    """Separable triangle filter of the given radius (radius 1: [1 2 1] / 4) along two axes of a
    float32 array, the border repeated; every image of a stack on its own.

    >>> _triangle(np.array([[0, 0, 4, 0, 0]], np.float32), 1).tolist()
    [[0.0, 1.0, 2.0, 1.0, 0.0]]
    """
    k = np.r_[np.arange(1, radius + 2), np.arange(radius, 0, -1)].astype(np.float32)
    k /= k.sum()
    out = np.asarray(images, np.float32)
    for axis in axes:
        axis = axis % out.ndim
        pad = [(0, 0)] * out.ndim
        pad[axis] = (radius, radius)
        padded = np.pad(out, pad, mode="edge")
        n = out.shape[axis]
        acc = np.zeros_like(out)
        for j, w in enumerate(k):
            acc += w * np.take(padded, np.arange(j, j + n), axis=axis)
        out = acc
    return out


def channels(gray: np.ndarray) -> np.ndarray:
    """The 8 channels of a grey image (H, W) or a stack of them (N, H, W), float32 (..., H, W, 8):
    grey in 0..1, normalised gradient magnitude, and the magnitude in 6 unsigned orientation bins
    (hard assignment). Each image of a stack is computed on its own, its border repeated.

    >>> c = channels(np.tile(np.arange(0, 200, 10, dtype=np.uint8), (12, 1)))  # a ramp along x
    >>> c.shape, int(np.argmax(c[6, 10, 2:]))                # all gradient in the bin around 0 degrees
    ((12, 20, 8), 0)
    """
    g = _triangle(np.asarray(gray, np.float32) / 255.0, 1)
    pad = [(0, 0)] * (g.ndim - 2)
    p = np.pad(g, pad + [(1, 1), (1, 1)], mode="edge")
    gx = (p[..., 1:-1, 2:] - p[..., 1:-1, :-2]) / 2  # central differences [-1 0 1] / 2
    gy = (p[..., 2:, 1:-1] - p[..., :-2, 1:-1]) / 2
    mag = np.sqrt(gx * gx + gy * gy)
    mag = mag / (_triangle(mag, NORM_RADIUS) + NORM_CONST)
    angle = np.arctan2(gy, gx) % np.float32(np.pi)  # unsigned, in [0, pi)
    bins = np.minimum((angle * np.float32(ORIENTATIONS / np.pi)).astype(np.int64),
                      ORIENTATIONS - 1)
    out = np.empty(g.shape + (CHANNELS,), np.float32)
    out[..., 0] = g
    out[..., 1] = mag
    for b in range(ORIENTATIONS):
        out[..., 2 + b] = mag * (bins == b)
    return out


def aggregate(ch: np.ndarray) -> np.ndarray:
    """Sum-pool channels (..., H, W, C) over SHRINK x SHRINK blocks (rows and columns past the
    last whole block are dropped), then smooth each by [1 2 1] / 4: (..., H // 4, W // 4, C).

    >>> aggregate(np.ones((8, 9, 1), np.float32))[..., 0].tolist()
    [[16.0, 16.0], [16.0, 16.0]]
    """
    *lead, h, w, c = ch.shape
    hb, wb = h // SHRINK, w // SHRINK
    pooled = ch[..., :hb * SHRINK, :wb * SHRINK, :].reshape(
        *lead, hb, SHRINK, wb, SHRINK, c).sum(axis=(-4, -2))
    return _triangle(pooled, 1, axes=(-3, -2))


def patch_features(patches) -> np.ndarray:
    """Feature rows (N, H/4 * W/4 * 8) of equal-sized grey patches, in block-row, block-column,
    channel order (the order :meth:`ChannelBoost.candidates` reads windows in)."""
    patches = np.asarray(patches)
    n = len(patches)
    h, w = patches.shape[1:]
    d = (h // SHRINK) * (w // SHRINK) * CHANNELS
    out = np.empty((n, d), np.float32)
    for k in range(0, n, 2048):  # bounded memory
        part = patches[k:k + 2048]
        out[k:k + len(part)] = aggregate(channels(part)).reshape(len(part), d)
    return out


def tree_arrays(nodes):
    """One fitted tree (a ``TreePredictor``'s ``nodes``) as ``(features (3,), thresholds (3,),
    leaf values (4,))``: the root, its left and its right child; the leaves left-left, left-right,
    right-left, right-right. A row goes right where its value is above the threshold (scikit-learn
    sends ``x <= threshold`` left). A leaf above depth 2 becomes a split that always goes left
    (threshold +inf) onto two copies of its value."""
    if np.any(nodes["depth"] > 2):
        raise ValueError("only trees of depth 2 at most")
    f, t, v = np.zeros(3, np.int64), np.full(3, np.inf), np.zeros(4)
    root = nodes[0]
    if root["is_leaf"]:
        v[:] = root["value"]
        return f, t, v
    f[0], t[0] = root["feature_idx"], root["num_threshold"]
    for slot, child in ((1, root["left"]), (2, root["right"])):
        nd = nodes[child]
        base = 2 * (slot - 1)
        if nd["is_leaf"]:
            v[base] = v[base + 1] = nd["value"]
        else:
            f[slot], t[slot] = nd["feature_idx"], nd["num_threshold"]
            v[base], v[base + 1] = nodes[nd["left"]]["value"], nodes[nd["right"]]["value"]
    return f, t, v


class FlatTrees:
    """The depth-2 trees of a fitted binary ``HistGradientBoostingClassifier`` as flat arrays,
    evaluated for many windows at once with numpy: the same decision values as its
    ``decision_function`` (a test holds them equal), some 20x faster on a frame's windows, where
    scikit-learn walks each tree over every row in turn.

    A node that is a leaf above depth 2 is padded into a split that always goes left (threshold
    +inf) onto two copies of its value.
    """

    def __init__(self, clf):
        if len(clf._predictors[0]) != 1:
            raise ValueError("FlatTrees reads binary classifiers only")
        trees = [tree_arrays(pred.nodes) for (pred,) in clf._predictors]
        self.features = np.asarray([t[0] for t in trees], np.int64).reshape(-1, 3)
        self.thresholds = np.asarray([t[1] for t in trees], np.float64).reshape(-1, 3)
        self.values = np.asarray([t[2] for t in trees], np.float64).reshape(-1, 4)
        self.baseline = float(np.ravel(clf._baseline_prediction)[0])

    def decision(self, X: np.ndarray, chunk: int = 4096) -> np.ndarray:
        """Sum of leaf values + the baseline (log-odds) for rows ``X (N, D)``."""
        X = np.asarray(X)
        out = np.empty(len(X))
        f, t, v = self.features, self.thresholds, self.values
        cols = np.arange(len(f))[:, None]
        for k in range(0, len(X), chunk):
            xt = np.ascontiguousarray(X[k:k + chunk].T)  # (D, n): each feature's row is contiguous
            right = xt[f[:, 0]] > t[:, 0, None]  # (T, n)
            left_go = xt[f[:, 1]] > t[:, 1, None]
            right_go = xt[f[:, 2]] > t[:, 2, None]
            leaf = np.where(right, 2 + right_go, left_go)
            out[k:k + xt.shape[1]] = v[cols, leaf].sum(axis=0) + self.baseline
        return out


def peer_window(boxes, short_side: int = SHORT_SIDE) -> tuple[int, int]:
    """The peer's window: the median box aspect ratio, shorter side ``short_side``, both sides
    rounded to whole blocks.

    >>> peer_window(np.array([[0, 0, 40, 20], [0, 0, 60, 30]]))
    (64, 32)
    """
    b = np.asarray(boxes, np.float64).reshape(-1, 4)
    aspect = float(np.median(b[:, 2] / b[:, 3]))
    w, h = (short_side * aspect, short_side) if aspect >= 1 else (short_side, short_side / aspect)
    return (max(2, int(round(w / SHRINK))) * SHRINK, max(2, int(round(h / SHRINK))) * SHRINK)


class ChannelBoost:
    """Aggregated channel features + gradient-boosted depth-2 trees, sliding over a pyramid.

    The interface is that of ``benchmarks/baseline.py``'s ``HogLinearSvm`` (``window``,
    ``margin``, ``candidates``, ``detections``, ``scan``), so its mining helper serves both.

    Parameters
    ----------
    window : (int, int)
        ``(W, H)``, multiples of 4.
    margin : float
        The patch bank's context margin.
    n_trees : tuple of int
        Trees of each successive fit (the first fit uses ``n_trees[0]``, the k-th refit
        ``n_trees[k]``; the last entry is reused).
    learning_rate : float
    scale_step, min_object, max_object, nms_iou :
        As ``detector.scan.ScanSettings``.
    threshold : float
        Keep windows whose decision value (log-odds) is at least this.
    random_state : int
    """

    def __init__(self, window=(32, 32), margin: float = 0.1, n_trees=TREES,
                 learning_rate: float = 0.1, scale_step: float = 1.2, min_object=None,
                 max_object=None, threshold: float = -1.0, nms_iou: float = 0.3,
                 random_state: int = 0):
        self.window = window
        self.margin = margin
        self.n_trees = n_trees
        self.learning_rate = learning_rate
        self.scale_step = scale_step
        self.min_object = min_object
        self.max_object = max_object
        self.threshold = threshold
        self.nms_iou = nms_iou
        self.random_state = random_state

    # ---- training ---------------------------------------------------------------------------
    def fit_features(self, X, y, stage: int = 0) -> "ChannelBoost":
        from sklearn.ensemble import HistGradientBoostingClassifier

        W, H = self.window
        if W % SHRINK or H % SHRINK:
            raise ValueError(f"the window {W}x{H} must be whole {SHRINK}-pixel blocks")
        trees = self.n_trees[min(stage, len(self.n_trees) - 1)]
        clf = HistGradientBoostingClassifier(max_depth=2, max_iter=int(trees),
                                             learning_rate=self.learning_rate,
                                             early_stopping=False, random_state=self.random_state)
        clf.fit(np.asarray(X, np.float32), np.asarray(y).astype(np.int64))
        self.clf_ = clf
        self.trees_ = FlatTrees(clf)
        return self

    def fit(self, patches, labels, stage: int = 0) -> "ChannelBoost":
        """Fit on patches (N, H, W) uint8 and labels (1 object, 0 background)."""
        return self.fit_features(self.features(patches), labels, stage)

    def features(self, patches) -> np.ndarray:
        W, H = self.window
        patches = np.asarray(patches)
        if patches.shape[1:] != (H, W):
            raise ValueError(f"patches must be {W}x{H}, got {patches.shape[2]}x{patches.shape[1]}")
        return patch_features(patches)

    def decision_function(self, patches) -> np.ndarray:
        return self.trees_.decision(self.features(patches))

    # ---- scanning ---------------------------------------------------------------------------
    def scales(self, frame_size) -> list[float]:
        W, H = self.window
        short = min(W, H) / (1.0 + 2.0 * self.margin)
        lo = 1.0 if self.min_object is None else self.min_object / short
        hi = None if self.max_object is None else self.max_object / short
        return scales_for(tuple(frame_size), (W, H), self.scale_step, lo, hi)

    def candidates(self, gray: np.ndarray, threshold: float | None = None):
        """Windows scoring at least ``threshold`` over the pyramid:
        ``(window boxes (K, 4) in frame pixels, decision values (K,), windows scanned)``."""
        from numpy.lib.stride_tricks import sliding_window_view

        bl = _baseline()
        threshold = self.threshold if threshold is None else threshold
        gray = np.asarray(gray)
        ih, iw = gray.shape
        W, H = self.window
        wc, hc = W // SHRINK, H // SHRINK
        boxes, values, windows = [], [], 0
        for _, lw, lh, fx, fy in bl.pyramid_levels((iw, ih), self.scales((iw, ih))):
            if lw < W or lh < H:
                continue
            level = gray if (lw, lh) == (iw, ih) else cv2.resize(
                gray, (lw, lh), interpolation=cv2.INTER_AREA if lw <= iw else cv2.INTER_LINEAR)
            grid = aggregate(channels(level))
            if grid.shape[0] < hc or grid.shape[1] < wc:
                continue
            view = sliding_window_view(grid, (hc, wc), axis=(0, 1))  # (ny, nx, C, hc, wc)
            ny, nx = view.shape[:2]
            X = np.ascontiguousarray(view.transpose(0, 1, 3, 4, 2)).reshape(ny * nx, -1)
            scores = self.trees_.decision(X).reshape(ny, nx)
            windows += scores.size
            rows, cols = np.nonzero(scores >= threshold)
            if len(rows):
                lvl = np.column_stack([cols * SHRINK, rows * SHRINK, np.full(len(rows), W),
                                       np.full(len(rows), H)]).astype(np.float64)
                boxes.append(bl.level_box_to_frame(lvl, fx, fy))
                values.append(scores[rows, cols].astype(np.float64))
        if boxes:
            return np.concatenate(boxes), np.concatenate(values), windows
        return np.zeros((0, 4)), np.zeros(0), windows

    def detections(self, window_boxes, decisions, nms_iou=None):
        """Window boxes -> object boxes (the margin removed) after greedy non-maximum
        suppression, best first: the HOG peer's method, the same arithmetic."""
        return _baseline().HogLinearSvm.detections(self, window_boxes, decisions, nms_iou)

    def scan(self, gray: np.ndarray):
        """Detections in one grey frame: ``(boxes (K, 4), scores (K,), windows)``."""
        return _baseline().HogLinearSvm.scan(self, gray)


def train_channel_peer(bank, frames, ground_truth, *, mining_rounds: int = 3, n_trees=TREES,
                       mine_threshold: float = -1.0, random_state: int = 0, **scan_options):
    """Fit the peer on a patch bank (its window a whole number of blocks), then ``mining_rounds``
    times: scan ``frames`` for windows scoring at least ``mine_threshold`` away from the labelled
    boxes (``benchmarks/baseline.py``'s ``mine_hard_negatives``: IoU < 0.3, at most 20 a frame and
    4,000 a round), add them as background and refit with the next stage's trees.

    Returns
    -------
    (ChannelBoost, list of int)
        The detector and the number of patches each mining round added.
    """
    bl = _baseline()
    det = ChannelBoost(window=tuple(bank.window), margin=bank.margin, n_trees=tuple(n_trees),
                       random_state=random_state, **scan_options)
    X = det.features(bank.patches)
    y = bank.labels.astype(np.int64)
    det.fit_features(X, y, stage=0)
    added = []
    for r in range(mining_rounds):
        patches = bl.mine_hard_negatives(det, frames, ground_truth, threshold=mine_threshold)[0]
        added.append(len(patches))
        if len(patches):
            X = np.concatenate([X, det.features(patches)])
            y = np.concatenate([y, np.zeros(len(patches), np.int64)])
        det.fit_features(X, y, stage=r + 1)
    return det, added
