"""Harvest the patch bank: object patches cut from labelled boxes (with augmentation) and background
patches cut from everywhere else.

The object crop is the box grown by a context margin on every side (``margin``, a fraction of the
box size) and resized to the window with area averaging (``cv2.INTER_AREA``), which is what the
scanning engine's rectangle sums on integral images amount to at larger scales. The margin is
recorded in the bank and carried into the model, so the scan can report the inner box rather than
the whole window.

Background windows are drawn at random positions and log-uniform random scales from every image
(object-free images included); a window is kept only when the box it would report has IoU below
``max_background_iou`` with every labelled box.
"""

from __future__ import annotations

import json
import math
import numbers
import os
import re
from dataclasses import dataclass, field

import numpy as np

from detector._validation import as_generator
from detector.io import npzfile
from detector.errors import InputError
from detector.features import MAX_WINDOW_SIDE, MIN_WINDOW_SIDE
from detector.geometry import crop_region, iou, object_box_to_window_box, window_box_to_object_box
from detector.io.images import image_size, read_gray
from detector.io.labels import ImageLabels

BANK_FORMAT_VERSION = 1
#: An inferred window's shorter side, in pixels: the first (24 x 24 is common practice for
#: rectangle-feature detectors) or the second, for objects large enough (40: on the cross-data
#: benchmark with box voting it gave a higher mean AP50 than 32 or 36 at three seeds; DEVELOPERS.md,
#: "Defaults that follow the data") ...
SHORT_SIDES = (24, 40)
#: ... the second when at most this share of the labelled objects is smaller than its object side
#: (objects that training enlarges and the scan finds only by enlarging the image). Chosen on the
#: cross-data benchmark (DEVELOPERS.md, "The window follows the labels").
SMALL_SHARE = 0.2

KIND_OBJECT = 0  # a labelled box as labelled
KIND_AUGMENTED = 1  # an augmented copy of a labelled box
KIND_BACKGROUND = 2  # a random background window
KIND_MINED = 3  # a false alarm added by a mining round
KIND_NAMES = ("object", "augmented", "background", "mined")

# augmentation columns: shift x and y (fractions of the box), scale, rotation (degrees),
# mirrored (0/1), gain, bias (grey levels)
AUGMENTATION_COLUMNS = ("shift_x", "shift_y", "scale", "rotate", "mirror", "gain", "bias")


@dataclass
class PatchBank:
    """Harvested patches with their provenance.

    Attributes
    ----------
    window : tuple of int
        ``(width, height)`` of every patch.
    patches : ndarray of uint8, shape (N, height, width)
    labels : ndarray of uint8, shape (N,)
        1 for object patches, 0 for background.
    kinds : ndarray of uint8, shape (N,)
        ``KIND_OBJECT``, ``KIND_AUGMENTED``, ``KIND_BACKGROUND`` or ``KIND_MINED``.
    image_index : ndarray of int32, shape (N,)
        Index into ``images`` of the image each patch was cut from.
    images : list of str
        Image names as the labels file writes them.
    boxes : ndarray of float32, shape (N, 4)
        The box each patch stands for, in image pixels (``x, y, width, height``): the labelled box for
        object patches, the box the scan would report for background windows.
    augmentation : ndarray of float32, shape (N, 7)
        See ``AUGMENTATION_COLUMNS``; identity for unaugmented patches.
    metadata : dict
        Parameters, counts, margin, labels hash.
    """

    window: tuple[int, int]
    patches: np.ndarray
    labels: np.ndarray
    kinds: np.ndarray
    image_index: np.ndarray
    images: list[str]
    boxes: np.ndarray
    augmentation: np.ndarray
    metadata: dict = field(default_factory=dict)

    @property
    def margin(self) -> float:
        return float(self.metadata.get("margin", 0.0))

    def __len__(self) -> int:
        return len(self.labels)

    def counts(self) -> dict:
        """Number of patches of each kind, and the totals."""
        out = {name: int(np.sum(self.kinds == k)) for k, name in enumerate(KIND_NAMES)}
        out["objects"] = int(np.sum(self.labels == 1))
        out["background"] = int(np.sum(self.labels == 0))
        return out

    def extend(self, patches, boxes, image_index, kind, images=None) -> "PatchBank":
        """A new bank with extra background (``label 0``) patches appended."""
        n = len(patches)
        names = list(self.images)
        if images is not None:
            remap = []
            for name in images:
                if name not in names:
                    names.append(name)
                remap.append(names.index(name))
            image_index = np.asarray(remap, dtype=np.int32)[np.asarray(image_index, dtype=np.int64)]
        ident = np.tile(_IDENTITY, (n, 1))
        return PatchBank(
            window=self.window,
            patches=np.concatenate([self.patches, np.asarray(patches, np.uint8)]),
            labels=np.concatenate([self.labels, np.zeros(n, np.uint8)]),
            kinds=np.concatenate([self.kinds, np.full(n, kind, np.uint8)]),
            image_index=np.concatenate([self.image_index, np.asarray(image_index, np.int32)]),
            images=names,
            boxes=np.concatenate([self.boxes, np.asarray(boxes, np.float32).reshape(-1, 4)]),
            augmentation=np.concatenate([self.augmentation, ident]),
            metadata=dict(self.metadata),
        )


_IDENTITY = np.array([0, 0, 1, 0, 0, 1, 0], dtype=np.float32)


def parse_window(text: str) -> tuple[int, int]:
    """Parse ``"WxH"`` into ``(W, H)``.

    >>> parse_window("24x24")
    (24, 24)
    """
    match = re.fullmatch(r"([0-9]+)x([0-9]+)", str(text).lower().replace(" ", ""))
    if match is None:
        raise ValueError(f"window must look like 24x24, got {text!r}")
    w, h = int(match.group(1)), int(match.group(2))
    if not (MIN_WINDOW_SIDE <= w <= MAX_WINDOW_SIDE and MIN_WINDOW_SIDE <= h <= MAX_WINDOW_SIDE):
        raise ValueError(f"window sides must be {MIN_WINDOW_SIDE}..{MAX_WINDOW_SIDE} pixels, got "
                         f"{text!r}")
    return w, h


def window_short_side(boxes: np.ndarray, margin: float = 0.1) -> int:
    """The inferred window's shorter side: the larger of :data:`SHORT_SIDES` when at most
    :data:`SMALL_SHARE` of the boxes have a shorter side below its object side
    (``side / (1 + 2 margin)``), else the smaller.

    The larger window sees more of an object's detail: on the cross-data benchmark it raised AP50
    on the sets of large objects (32 against 24 on average over seven draws: coins by 0.02,
    horses by 0.05, coin-crops by 0.08; 40 against 32 at three seeds: horses by 0.03-0.05,
    coin-crops by 0.03-0.05). But an object smaller than the window's object side is enlarged to
    it, in training and in the scan, and the two sets where a quarter or more of the objects are
    (galaxies, digits) lost AP50 with it on average.

    >>> window_short_side(np.array([[0, 0, 50, 50]] * 8 + [[0, 0, 36, 30]] * 2))   # 2 of 10 below 33.3
    40
    >>> window_short_side(np.array([[0, 0, 50, 50]] * 7 + [[0, 0, 36, 30]] * 3))   # 3 of 10
    24
    """
    small, large = SHORT_SIDES
    return large if share_below(boxes, large, margin) <= SMALL_SHARE else small


def share_below(boxes: np.ndarray, short_side: float, margin: float = 0.1) -> float:
    """Share of the boxes whose shorter side is below the object side of a window with this
    shorter side, ``short_side / (1 + 2 margin)``.

    >>> share_below(np.array([[0, 0, 30, 25], [0, 0, 40, 40]]), 32)   # 25 < 26.67 <= 40
    0.5
    """
    boxes = np.asarray(boxes, dtype=np.float64).reshape(-1, 4)
    shorter = np.minimum(boxes[:, 2], boxes[:, 3])
    return float(np.mean(shorter < short_side / (1.0 + 2.0 * margin)))


def infer_window(boxes: np.ndarray, short_side: int | None = None,
                 margin: float = 0.1) -> tuple[int, int]:
    """Window with the median box aspect ratio and the shorter side ``short_side`` (default
    :func:`window_short_side` of the boxes and the margin).

    >>> infer_window(np.array([[0, 0, 40, 20], [0, 0, 60, 30], [0, 0, 10, 10]]))   # small: 24
    (48, 24)
    >>> infer_window(np.array([[0, 0, 80, 40], [0, 0, 120, 60]]))   # large objects: 40
    (80, 40)
    """
    boxes = np.asarray(boxes, dtype=np.float64).reshape(-1, 4)
    if short_side is None:
        short_side = window_short_side(boxes, margin)
    aspect = float(np.median(boxes[:, 2] / boxes[:, 3]))
    if aspect >= 1:
        return int(round(short_side * aspect)), short_side
    return short_side, int(round(short_side / aspect))


def object_sizes(boxes, window, margin: float) -> dict:
    """What the labelled boxes say about the sizes to scan for: the shorter side of the smallest,
    median and largest box (pixels), and how many boxes are smaller than the window's object side
    (the window's shorter side less the context margin), which the scan finds only by enlarging
    the image.

    >>> object_sizes(np.array([[0, 0, 12, 30], [0, 0, 40, 50], [5, 5, 25, 20]]), (24, 24), 0.1)
    {'smallest': 12.0, 'median': 20.0, 'largest': 40.0, 'window_object_side': 20.0, 'below_window': 1}
    """
    boxes = np.asarray(boxes, dtype=np.float64).reshape(-1, 4)
    shorter = np.minimum(boxes[:, 2], boxes[:, 3])
    side = min(window) / (1.0 + 2.0 * margin)
    return {"smallest": float(shorter.min()), "median": float(np.median(shorter)),
            "largest": float(shorter.max()), "window_object_side": float(side),
            "below_window": int(np.sum(shorter < side))}


def _adjust(patch: np.ndarray, gain: float, bias: float) -> np.ndarray:
    if gain == 1.0 and bias == 0.0:
        return patch
    return np.clip(patch.astype(np.float32) * gain + bias, 0, 255).round().astype(np.uint8)


def overlaps(box, gt_rows, max_iou: float) -> bool:
    """Whether ``box`` (x, y, w, h) has IoU ``>= max_iou`` with any of ``gt_rows`` (a list of
    float tuples): :func:`detector.geometry.iou`'s arithmetic in the same order, on Python floats
    (IEEE doubles, as numpy's float64), one box against a few without numpy's per-call cost (a
    harvest tries thousands of background windows).

    >>> overlaps((0.0, 0.0, 10.0, 10.0), [(5.0, 0.0, 10.0, 10.0)], 0.3)    # 50 / 150
    True
    >>> overlaps((0.0, 0.0, 10.0, 10.0), [(5.0, 0.0, 10.0, 10.0)], 0.34)
    False
    """
    ax, ay, aw, ah = (float(v) for v in box)
    for bx, by, bw, bh in gt_rows:
        w = min(ax + aw, bx + bw) - max(ax, bx)
        h = min(ay + ah, by + bh) - max(ay, by)
        inter = w * h if (w > 0 and h > 0) else 0.0
        union = (aw * ah + bw * bh) - inter
        if (inter / union if union > 0 else 0.0) >= max_iou:
            return True
    return False


def plan_background(shape, gt_boxes, window: tuple[int, int], margin: float, count: int,
                    rng: np.random.Generator, max_iou: float = 0.3,
                    max_tries_factor: int = 20) -> tuple[list, np.ndarray]:
    """The random background windows :func:`sample_background` cuts from an image of ``shape``
    (rows, columns): ``([(center, size), ...], boxes (n,4) float32)``. The draws depend on the
    labels and the image's size only, not on its pixels."""
    W, H = window
    ih, iw = shape
    max_scale = min(iw / W, ih / H)
    if max_scale < 1 or count <= 0:
        return [], np.zeros((0, 4), np.float32)
    regions, boxes = [], []
    gt = [tuple(row) for row in np.asarray(gt_boxes, dtype=np.float64).reshape(-1, 4).tolist()]
    tries = 0
    while len(regions) < count and tries < count * max_tries_factor:
        tries += 1
        s = math.exp(rng.uniform(0.0, math.log(max_scale))) if max_scale > 1 else 1.0
        ww, wh = W * s, H * s
        x = rng.uniform(0.0, iw - ww)
        y = rng.uniform(0.0, ih - wh)
        obj = np.asarray(window_box_to_object_box(x, y, ww, wh, margin), np.float32)
        if overlaps(obj.tolist(), gt, max_iou):  # the box as the bank stores it (float32)
            continue
        regions.append(((x + ww / 2, y + wh / 2), (ww, wh)))
        boxes.append(obj)
    return regions, np.asarray(boxes, np.float32).reshape(-1, 4)


def _cut(gray, regions, window) -> np.ndarray:
    W, H = window
    if not regions:
        return np.zeros((0, H, W), np.uint8)
    return np.stack([crop_region(gray, center, size, window) for center, size in regions])


def sample_background(gray: np.ndarray, gt_boxes, window: tuple[int, int], margin: float,
                      count: int, rng: np.random.Generator, max_iou: float = 0.3,
                      max_tries_factor: int = 20) -> tuple[np.ndarray, np.ndarray]:
    """Random background windows from one image whose reported box overlaps no labelled box.

    Returns ``(patches (n,H,W) uint8, boxes (n,4) float32)`` with ``n <= count``.
    """
    regions, boxes = plan_background(gray.shape, gt_boxes, window, margin, count, rng, max_iou,
                                     max_tries_factor)
    return _cut(gray, regions, window), boxes


def plan_near_background(shape, gt_boxes, window: tuple[int, int], margin: float, per_box: int,
                         rng: np.random.Generator, max_iou: float = 0.3) -> tuple[list, np.ndarray]:
    """The windows :func:`sample_near_background` cuts from an image of ``shape`` (rows,
    columns): ``([(center, size), ...], boxes (n,4) float32)``, drawn from the labels and the
    image's size only."""
    W, H = window
    ih, iw = shape
    gt = np.asarray(gt_boxes, dtype=np.float64).reshape(-1, 4)
    regions, boxes = [], []
    for x, y, bw, bh in gt:
        for k in range(per_box):
            # alternate: smaller inside, larger around
            f = rng.uniform(0.3, 0.6) if k % 2 == 0 else rng.uniform(1.8, 3.0)
            ow, oh = bw * f, bh * f
            cx = x + bw / 2 + rng.uniform(-0.4, 0.4) * bw
            cy = y + bh / 2 + rng.uniform(-0.4, 0.4) * bh
            obj = np.array([cx - ow / 2, cy - oh / 2, ow, oh], np.float32)
            wx, wy, ww, wh = object_box_to_window_box(*(float(v) for v in obj), margin)
            if ww < W or wh < H or ww > iw or wh > ih:
                continue
            if np.max(iou(obj[None], gt)) >= max_iou:  # the box as the bank stores it
                continue
            regions.append(((cx, cy), (ww, wh)))
            boxes.append(obj)
    return regions, np.asarray(boxes, np.float32).reshape(-1, 4)


def sample_near_background(gray: np.ndarray, gt_boxes, window: tuple[int, int], margin: float,
                           per_box: int, rng: np.random.Generator,
                           max_iou: float = 0.3) -> tuple[np.ndarray, np.ndarray]:
    """Background windows close to the labelled boxes, where a detector goes wrong most: windows
    much smaller than a box inside it (a hole or a corner of the object) and windows much larger
    than it (the object with too much around it). Kept only when the reported box has IoU below
    ``max_iou`` with every labelled box.

    Returns ``(patches (n,H,W) uint8, boxes (n,4) float32)``.
    """
    regions, boxes = plan_near_background(gray.shape, gt_boxes, window, margin, per_box, rng,
                                          max_iou)
    return _cut(gray, regions, window), boxes


def harvest(
    images_dir,
    items: list[ImageLabels],
    *,
    window=None,
    margin: float = 0.1,
    copies: int = 4,
    jitter: float = 0.05,
    mirror: bool = True,
    rotate: float = 10.0,
    brightness: float = 20.0,
    contrast: float = 0.2,
    negatives_per_image: int = 50,
    near_negatives: int = 4,
    max_background_iou: float = 0.3,
    seed: int = 0,
    labels_path=None,
    progress=None,
    jobs: int = 1,
) -> PatchBank:
    """Cut object and background patches from labelled images.

    Parameters
    ----------
    images_dir : path
        Folder the labels' image paths are relative to.
    items : list of ImageLabels
        From :func:`detector.io.labels.read_labels`.
    window : (int, int) or None
        Patch size; None infers it from the boxes (:func:`infer_window`).
    margin : float
        Context added on every side of a box, as a fraction of its width and height.
    copies : int
        Augmented copies per box, besides the box itself.
    jitter : float
        Largest random shift (fraction of the box) and scale change (fraction) of a copy.
    mirror : bool
        Mirror half of the copies left to right.
    rotate : float
        Largest random in-plane rotation of a copy, degrees.
    brightness, contrast : float
        Largest random bias (grey levels) and relative gain change of a copy.
    negatives_per_image : int
        Background windows drawn from each image.
    near_negatives : int
        Background windows per box drawn close to it (see :func:`sample_near_background`).
    max_background_iou : float
        A background window's reported box must have IoU below this with every labelled box.
    seed : int
        Makes the harvest reproducible.
    jobs : int, default=1
        Threads that read the images and cut the patches; the bank does not depend on it.

    Returns
    -------
    PatchBank

    Raises
    ------
    InputError
        Naming ``labels_path``: no labelled boxes at all, every box narrower or lower than 2
        pixels, or a window larger than every image (found from the image headers, before any
        patch is cut).
    """
    if isinstance(margin, bool) or not isinstance(margin, numbers.Real) \
            or not math.isfinite(margin) or margin < 0:
        raise InputError(f"margin must be a number >= 0, got {margin!r}")

    def objects(it):   # ignore regions (ImageLabels.ignore) are no objects to learn from
        flags = getattr(it, "ignore", None)
        return it.boxes if flags is None or not np.any(flags) else it.boxes[~np.asarray(flags)]

    all_boxes = [b for it in items for b in objects(it)]
    if not all_boxes:
        raise InputError("no labelled boxes to learn from (every image is object-free)",
                         path=labels_path)
    all_boxes = np.asarray(all_boxes, dtype=np.float64)
    valid = (all_boxes[:, 2] >= 2) & (all_boxes[:, 3] >= 2)
    if not valid.any():
        raise InputError("every labelled box is smaller than 2 pixels", path=labels_path)
    chosen = tuple(window) if window is not None else infer_window(all_boxes[valid], margin=margin)
    W, H = chosen
    # image sizes from the file headers first, so a window that fits no image fails before any work
    sizes = [image_size(os.path.join(os.fspath(images_dir), it.image)) for it in items]
    too_small = sum(1 for iw, ih in sizes if iw < W or ih < H)
    if sizes and too_small == len(sizes):
        big_w, big_h = max(sizes, key=lambda s: s[0] * s[1])
        raise InputError(f"window {W}x{H} is larger than every image (the largest is "
                         f"{big_w}x{big_h})", path=labels_path)
    rng = as_generator(seed)
    patches, labels, kinds, index, boxes, aug = [], [], [], [], [], []
    names = [it.image for it in items]

    def plan(i, it, shape):
        """Every patch of image i: what to cut ((center, size, angle, mirror, gain, bias) or
        None for an adjustment-free cut) and its bank rows, drawn from ``rng`` in the same order
        whatever ``jobs``: the draws need the labels and the image's size, never its pixels."""
        cuts, rows = [], []
        # background windows stay off every labelled box, ignore regions included
        for box in objects(it):
            x, y, bw, bh = (float(v) for v in box)
            if bw < 2 or bh < 2:
                continue
            cx, cy = x + bw / 2, y + bh / 2
            size = (bw * (1 + 2 * margin), bh * (1 + 2 * margin))
            cuts.append(((cx, cy), size, 0.0, False, None))
            rows.append((1, KIND_OBJECT, box, _IDENTITY))
            for c in range(copies):
                dx, dy = rng.uniform(-jitter, jitter, 2)
                sc = 1.0 + rng.uniform(-jitter, jitter)
                ang = rng.uniform(-rotate, rotate) if rotate > 0 else 0.0
                mir = bool(mirror and c % 2 == 1)
                gain = 1.0 + rng.uniform(-contrast, contrast)
                bias = rng.uniform(-brightness, brightness)
                cuts.append(((cx + dx * bw, cy + dy * bh), (size[0] * sc, size[1] * sc), ang, mir,
                             (gain, bias)))
                rows.append((1, KIND_AUGMENTED, box,
                             np.array([dx, dy, sc, ang, float(mir), gain, bias], np.float32)))
        regions, negboxes = plan_background(shape, it.boxes, chosen, margin, negatives_per_image,
                                            rng, max_background_iou)
        if near_negatives and len(it.boxes):
            near, nearboxes = plan_near_background(shape, it.boxes, chosen, margin,
                                                   near_negatives, rng, max_background_iou)
            regions = regions + near
            negboxes = np.concatenate([negboxes, nearboxes])
        cuts.extend((center, size, 0.0, False, None) for center, size in regions)
        rows.extend((0, KIND_BACKGROUND, box, _IDENTITY) for box in negboxes)
        return cuts, rows

    def cut(gray, cuts):
        out = []
        for center, size, angle, mir, adjust in cuts:
            if adjust is None:
                out.append(crop_region(gray, center, size, chosen))
            else:
                out.append(_adjust(crop_region(gray, center, size, chosen, angle=angle,
                                               mirror=mir), *adjust))
        return out

    def read(it):
        return read_gray(os.path.join(os.fspath(images_dir), it.image))

    def add(i, cut_patches, rows):
        patches.extend(cut_patches)
        for label, kind, box, a in rows:
            labels.append(label)
            kinds.append(kind)
            index.append(i)
            boxes.append(box)
            aug.append(a)

    workers = max(1, int(jobs))
    if workers == 1:
        for i, it in enumerate(items):
            gray = read(it)
            cuts, rows = plan(i, it, gray.shape)
            add(i, cut(gray, cuts), rows)
            if progress is not None:
                progress(i + 1, len(items))
    else:
        # images read and patches cut on threads (OpenCV releases the GIL), a few images ahead;
        # the draws stay on this thread, in image order, so the bank is the same for any jobs
        from concurrent.futures import ThreadPoolExecutor

        ahead = 2 * workers
        with ThreadPoolExecutor(workers) as pool:
            reading = {k: pool.submit(read, items[k]) for k in range(min(ahead, len(items)))}
            cutting = []
            for i, it in enumerate(items):
                gray = reading.pop(i).result()
                if i + ahead < len(items):
                    reading[i + ahead] = pool.submit(read, items[i + ahead])
                cuts, rows = plan(i, it, gray.shape)
                cutting.append((i, pool.submit(cut, gray, cuts), rows))
                del gray
                while len(cutting) > ahead:  # bound the images held in memory
                    k, done, rows_done = cutting.pop(0)
                    add(k, done.result(), rows_done)
                if progress is not None:
                    progress(i + 1, len(items))
            for k, done, rows_done in cutting:
                add(k, done.result(), rows_done)
    if not any(labels):
        raise InputError("no object patches could be cut", path=labels_path)
    labels_hash = None
    if labels_path is not None and os.path.isfile(labels_path):
        labels_hash = npzfile.file_sha256(labels_path)
    metadata = {
        "window": [W, H],
        "window_inferred": window is None,
        "margin": margin,
        "copies": copies,
        "jitter": jitter,
        "mirror": mirror,
        "rotate": rotate,
        "brightness": brightness,
        "contrast": contrast,
        "negatives_per_image": negatives_per_image,
        "near_negatives": near_negatives,
        "max_background_iou": max_background_iou,
        "seed": seed,
        "labels_sha256": labels_hash,
        "images_too_small": too_small,
        "versions": npzfile.library_versions(),
        # where the patches came from, so that training can mine these images by default
        "source": {"images": os.path.abspath(os.fspath(images_dir)),
                   "labels": (os.path.abspath(os.fspath(labels_path))
                              if labels_path is not None else None)},
        "object_sizes": object_sizes(all_boxes[valid], chosen, margin),
    }
    if window is None:  # how the window was chosen (window_short_side), for the record and harvest's line
        large = SHORT_SIDES[1]
        metadata["window_rule"] = {"short_side": int(min(chosen)), "larger_side": large,
                                   "share_below_larger": share_below(all_boxes[valid], large, margin),
                                   "larger_object_side": large / (1.0 + 2.0 * margin),
                                   "share_allowed": SMALL_SHARE}
    bank = PatchBank(
        window=chosen,
        patches=np.stack(patches).astype(np.uint8),
        labels=np.asarray(labels, np.uint8),
        kinds=np.asarray(kinds, np.uint8),
        image_index=np.asarray(index, np.int32),
        images=names,
        boxes=np.asarray(boxes, np.float32).reshape(-1, 4),
        augmentation=np.asarray(aug, np.float32).reshape(-1, len(AUGMENTATION_COLUMNS)),
        metadata=metadata,
    )
    bank.metadata["counts"] = bank.counts()
    return bank


def _bank_spec():
    A = npzfile.ArraySpec
    return {
        "format_version": A("integer", ()),
        "kind": A("str", ()),
        "window": A("int32", (2,)),
        "patches": A("uint8", ("N", None, None)),
        "labels": A("uint8", ("N",)),
        "kinds": A("uint8", ("N",)),
        "image_index": A("int32", ("N",)),
        "images": A("str", (None,)),
        "boxes": A("float32", ("N", 4)),
        "augmentation": A("float32", ("N", len(AUGMENTATION_COLUMNS))),
        "metadata": A("str", ()),
    }


def save_bank(path, bank: PatchBank) -> None:
    """Write the bank as one compressed ``.npz`` (no pickle), atomically."""
    images = np.array(bank.images if bank.images else [""], dtype=np.str_)
    npzfile.save_npz(
        path,
        {
            **npzfile.header_arrays("patch-bank", BANK_FORMAT_VERSION, bank.window),
            "patches": bank.patches,
            "labels": bank.labels,
            "kinds": bank.kinds,
            "image_index": bank.image_index,
            "images": images,
            "boxes": bank.boxes,
            "augmentation": bank.augmentation,
            "metadata": np.array(json.dumps(bank.metadata, sort_keys=True)),
        },
    )


def load_bank(path, data: bytes | None = None) -> PatchBank:
    """Read and validate a patch bank written by :func:`save_bank` (never unpickles; declared
    sizes are checked before any array data is read). With ``data``, the file's bytes are read
    instead of ``path`` (which names them in messages)."""
    a = npzfile.read_npz(path, kind="patch bank", spec=_bank_spec(), data=data)
    kind = a.get("kind")
    if kind is None or kind.dtype.kind != "U" or kind.ndim != 0 or str(kind) != "patch-bank":
        what = f"a {kind}" if kind is not None and kind.dtype.kind == "U" and kind.ndim == 0 else "no bank"
        raise InputError(f"not a patch bank (this file holds {what})", path=path)
    version = a.get("format_version")
    if version is None or version.ndim != 0 or version.dtype.kind not in "iu":
        raise InputError("not a patch bank: no format version", path=path)
    if int(version) != BANK_FORMAT_VERSION:
        raise InputError(
            f"unsupported patch bank format version {int(version)} "
            f"(this patchwood reads {BANK_FORMAT_VERSION})", path=path)
    npzfile.check_arrays(a, _bank_spec(), path, kind="patch bank")
    W, H = (int(v) for v in a["window"])
    p = a["patches"]
    n = len(p)
    if not (MIN_WINDOW_SIDE <= W <= MAX_WINDOW_SIDE and MIN_WINDOW_SIDE <= H <= MAX_WINDOW_SIDE):
        raise InputError(f"window {W}x{H} is outside the sides a window may have "
                         f"({MIN_WINDOW_SIDE}..{MAX_WINDOW_SIDE} pixels)", path=path)
    if p.shape[1:] != (H, W):
        raise InputError(f"patches of shape {p.shape[1:]} do not fit the window {W}x{H}", path=path)
    if n and (a["labels"].max() > 1 or a["kinds"].max() >= len(KIND_NAMES)):
        raise InputError("labels or kinds out of range", path=path)
    if np.any(a["labels"] != (a["kinds"] <= KIND_AUGMENTED)):
        raise InputError("labels disagree with kinds (object kinds must have label 1, "
                         "background kinds label 0)", path=path)
    images = [str(s) for s in a["images"]]
    if n and (a["image_index"].min() < 0 or a["image_index"].max() >= len(images)):
        raise InputError("image index out of range", path=path)
    if not np.all(np.isfinite(a["boxes"])) or not np.all(np.isfinite(a["augmentation"])):
        raise InputError("boxes or augmentation hold non-finite values", path=path)
    try:
        metadata = json.loads(str(a["metadata"]))
    except (ValueError, RecursionError):
        raise InputError("metadata is not valid JSON", path=path) from None
    if not isinstance(metadata, dict):
        raise InputError("metadata is not a JSON object", path=path)
    margin = metadata.get("margin", 0.0)
    if (isinstance(margin, bool) or not isinstance(margin, (int, float))
            or not math.isfinite(margin) or margin < 0):
        raise InputError(f"metadata margin must be a number >= 0, got {margin!r}", path=path)
    if min(W, H) / (1.0 + 2.0 * margin) < 1.0:
        raise InputError(f"metadata margin {margin:g} leaves less than one pixel of the object in "
                         f"the {W}x{H} window", path=path)
    return PatchBank(
        window=(W, H),
        patches=p,
        labels=a["labels"],
        kinds=a["kinds"],
        image_index=a["image_index"],
        images=images,
        boxes=a["boxes"],
        augmentation=a["augmentation"],
        metadata=metadata,
    )
