"""Detection sets for the cross-data benchmark, built from open images that ship inside packages
patchwood already installs: nothing is downloaded, at build time or at run time.

    .venv/bin/python benchmarks/datasets.py                    # builds every set into the cache
    .venv/bin/python benchmarks/datasets.py --sets coins digits --seed 1 --cache DIR
    .venv/bin/python benchmarks/datasets.py --list             # the sets and their labelling rules

Every set is one kind of object, written in the project's labels CSV contract (GLOSSARY.md):
``NAME-seedS/train/images/*.png`` + ``train/labels.csv`` and the same for ``test/``, split by
image, with a ``set.json`` beside them (rule, counts, sources, builder version). The same seed gives
the same files. A set already in the cache with the same builder version and seed is reused.

Sources, all read from the installed packages' own folders (never through a fetcher that could
reach the network; :func:`source_path` refuses a file that is not there):

* scikit-image's bundled images (``skimage/data``): ``coins.png`` (Greek coins, a photograph),
  ``hubble_deep_field.jpg`` (Hubble Space Telescope, NASA / ESA), ``coffee.png`` (a cup on a
  saucer, a photograph), ``horse.png`` (a horse silhouette), the textures ``brick.png``,
  ``grass.png``, ``gravel.png``, and ``moon.png``, ``rocket.jpg``, ``chelsea.png``,
  ``motorcycle_left.png`` as distractors and backgrounds. The images of people that ship there
  (``astronaut``, ``camera``, the ``lfw_subset`` faces) are not used, as objects or otherwise.
* scikit-learn's ``load_sample_images`` (``china.jpg``, ``flower.jpg``, two photographs) and
  ``load_digits`` (1,797 handwritten digits of 8 x 8 pixels, UCI ML hand-written digits).

The sets (``--list`` prints the labelling rules in full):

=========  ===========================================================  ==========  ========
name       what                                                         image size  labels
=========  ===========================================================  ==========  ========
coins      the coins photograph, rotated, enlarged, relit, cropped      320 x 240   noisy
galaxies   crops of the Hubble deep field, enlarged                     480 x 360   noisy
digits     one handwritten digit among nine others, on photographs      320 x 240   exact
cups       a cup on its saucer among photograph crops, on textures      480 x 360   exact
horses     horse silhouettes among other shapes, on textures            400 x 300   exact
coin-crops coins cut from the photograph, on textures and photographs   400 x 300   exact
=========  ===========================================================  ==========  ========

Train and test come from different pixels wherever the sources allow: the two photographs' sets
take their training images from one part of the photograph and their test images from the rest
(so the test coins and galaxies are never seen in training); the digits are split by sample; the
backgrounds of the composites are cut from different rows of their source images. The cup and
the horse exist once each in the sources, so both splits show the same object under different
scale, turn, mirror, light and background: a limitation of what ships with the packages.

Every split has 80 training and 40 test images by default (``--train-images``,
``--test-images``), about 200 training boxes, and some images without objects.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import shutil
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path

import cv2
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from detector.io.labels import ImageLabels, write_labels_csv  # noqa: E402

#: Bump when a builder changes what it writes: cached sets of another version are rebuilt.
BUILDER_VERSION = 1

DEFAULT_TRAIN_IMAGES = 80
DEFAULT_TEST_IMAGES = 40


def default_cache() -> Path:
    """``$PATCHWOOD_BENCH_CACHE``, else ``$XDG_CACHE_HOME/patchwood/cross-data``, else
    ``~/.cache/patchwood/cross-data``."""
    if os.environ.get("PATCHWOOD_BENCH_CACHE"):
        return Path(os.environ["PATCHWOOD_BENCH_CACHE"])
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "patchwood" / "cross-data"


# ---- sources ---------------------------------------------------------------------------------

def source_path(package: str, name: str) -> Path:
    """A data file bundled inside an installed package (``"skimage"`` or ``"sklearn"``).

    Raises FileNotFoundError when the file is not inside the package: the sets never fetch.

    >>> source_path("skimage", "coins.png").name
    'coins.png'
    """
    if package == "skimage":
        import skimage.data

        folder = Path(skimage.data.__file__).parent
    elif package == "sklearn":
        import sklearn.datasets

        folder = Path(sklearn.datasets.__file__).parent / "images"
    else:
        raise ValueError(f"unknown package {package!r}")
    path = folder / name
    if not path.is_file():
        raise FileNotFoundError(f"{path}: not bundled with this {package} (the sets never download)")
    return path


def read_source(package: str, name: str, gray: bool = True) -> np.ndarray:
    """A bundled image as uint8 grey (H, W) or RGB (H, W, 3); alpha is dropped."""
    from skimage.io import imread

    image = np.asarray(imread(source_path(package, name)))
    if image.ndim == 3 and image.shape[2] == 4:
        image = image[..., :3]
    if gray and image.ndim == 3:
        image = cv2.cvtColor(image, cv2.COLOR_RGB2GRAY)
    return np.ascontiguousarray(image.astype(np.uint8))


def load_digit_images() -> tuple[np.ndarray, np.ndarray]:
    """scikit-learn's bundled handwritten digits: images (1797, 8, 8) in 0..16 and their classes."""
    from sklearn.datasets import load_digits

    d = load_digits()
    return d.images.astype(np.float32), d.target.astype(np.int64)


# ---- small image tools ------------------------------------------------------------------------

def boxes_of_mask(mask: np.ndarray, min_area: int = 1) -> np.ndarray:
    """Bounding boxes ``(x, y, width, height)`` of the 8-connected components of a binary mask
    with at least ``min_area`` pixels, in scan order of their first pixel.

    >>> m = np.zeros((6, 8), bool); m[1:3, 1:4] = True; m[4, 6] = True
    >>> boxes_of_mask(m).tolist(), boxes_of_mask(m, 2).tolist()
    ([[1.0, 1.0, 3.0, 2.0], [6.0, 4.0, 1.0, 1.0]], [[1.0, 1.0, 3.0, 2.0]])
    """
    n, _, stats, _ = cv2.connectedComponentsWithStats(mask.astype(np.uint8), connectivity=8)
    rows = [stats[k, :4] for k in range(1, n) if stats[k, cv2.CC_STAT_AREA] >= min_area]
    return np.asarray(rows, np.float64).reshape(-1, 4)


def clip_box(box, width: int, height: int):
    """The part of ``box`` inside a ``width`` x ``height`` image, and the share of its area that
    is inside.

    >>> clip_box([-10, 0, 20, 10], 100, 100)
    ((0.0, 0.0, 10.0, 10.0), 0.5)
    """
    x, y, w, h = (float(v) for v in box)
    x0, y0 = max(x, 0.0), max(y, 0.0)
    x1, y1 = min(x + w, float(width)), min(y + h, float(height))
    if x1 <= x0 or y1 <= y0:
        return (0.0, 0.0, 0.0, 0.0), 0.0
    return (x0, y0, x1 - x0, y1 - y0), (x1 - x0) * (y1 - y0) / (w * h)


def _relight(image: np.ndarray, rng, gain=(0.75, 1.25), bias=(-25, 25), ramp=40.0,
             noise=(0.0, 6.0)) -> np.ndarray:
    """Gain, bias, a linear illumination ramp of up to ``ramp`` grey levels across the image in a
    random direction, and Gaussian noise; back to uint8."""
    h, w = image.shape[:2]
    out = image.astype(np.float32) * rng.uniform(*gain) + rng.uniform(*bias)
    a = rng.uniform(0, 2 * math.pi)
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    r = (xx - w / 2) * math.cos(a) + (yy - h / 2) * math.sin(a)
    r = r / max(1.0, float(np.abs(r).max())) * rng.uniform(0, ramp) / 2
    out += r[..., None] if out.ndim == 3 else r
    out += rng.normal(0, rng.uniform(*noise), out.shape).astype(np.float32)
    return np.clip(np.rint(out), 0, 255).astype(np.uint8)


def _rotate_quarter(image: np.ndarray, k: int) -> np.ndarray:
    return np.ascontiguousarray(np.rot90(image, k))


def _region(image: np.ndarray, rows=(0.0, 1.0), cols=(0.0, 1.0)) -> np.ndarray:
    """The part of an image between the given shares of its rows and columns."""
    h, w = image.shape[:2]
    return image[int(round(rows[0] * h)):int(round(rows[1] * h)),
                 int(round(cols[0] * w)):int(round(cols[1] * w))]


def _random_crop(image: np.ndarray, size, rng, scale=(1.0, 1.0)) -> np.ndarray:
    """Resize by a random factor in ``scale``, mirror-pad if still smaller than ``size=(W, H)``,
    flip at random and cut a random ``W x H`` crop."""
    W, H = size
    s = rng.uniform(*scale)
    img = cv2.resize(image, None, fx=s, fy=s,
                     interpolation=cv2.INTER_AREA if s < 1 else cv2.INTER_LINEAR)
    h, w = img.shape[:2]
    if h < H or w < W:
        img = cv2.copyMakeBorder(img, 0, max(0, H - h), 0, max(0, W - w), cv2.BORDER_REFLECT_101)
        h, w = img.shape[:2]
    if rng.random() < 0.5:
        img = img[:, ::-1]
    y = int(rng.integers(0, h - H + 1))
    x = int(rng.integers(0, w - W + 1))
    return np.ascontiguousarray(img[y:y + H, x:x + W])


# ---- the two photographs ------------------------------------------------------------------------

def coin_label_rule(gray: np.ndarray) -> np.ndarray:
    """The coins set's labelling rule, applied to every generated image as it is written.

    Otsu's threshold (``skimage.filters.threshold_otsu``) of the image smoothed by a Gaussian of
    sigma 1; holes filled (``scipy.ndimage.binary_fill_holes``); each 8-connected component of at
    least 600 pixels is one coin, its box the component's bounding box. The rule is what a
    technician without a labelling tool might run, and it errs the way such rules do: under
    uneven light a bright patch of background joins a coin or becomes a box of its own, dark
    coins lose their rim or vanish, touching coins merge. That noise is the point of the set.
    """
    from scipy import ndimage as ndi
    from skimage.filters import threshold_otsu

    smooth = cv2.GaussianBlur(gray, (0, 0), 1.0)
    mask = ndi.binary_fill_holes(smooth > threshold_otsu(smooth))
    return boxes_of_mask(mask, min_area=600)


def _coins(split: str, n: int, rng) -> list[tuple[np.ndarray, np.ndarray]]:
    photo = read_source("skimage", "coins.png")
    # the left two thirds (16 coins) for training, the right third (8 coins) for testing
    part = _region(photo, cols=(0.0, 2 / 3) if split == "train" else (2 / 3, 1.0))
    out = []
    for _ in range(n):
        img = _rotate_quarter(part, int(rng.choice([1, 3])))  # the test strip is too narrow upright
        img = _random_crop(img, (320, 240), rng, scale=(2.2, 2.8))
        img = _relight(img, rng, ramp=70.0)
        out.append((img, coin_label_rule(img)))
    return out


def galaxy_label_rule(rgb: np.ndarray) -> np.ndarray:
    """The galaxies set's labelling rule, applied once to the whole Hubble deep field.

    Grey level (``cv2.COLOR_RGB2GRAY``) smoothed by a Gaussian of sigma 1.5; pixels above 60 of
    255; each 8-connected component whose bounding box is at least 10 pixels on its shorter side
    (in the original image) is one object, its box the bounding box. Faint and small galaxies are
    left unlabelled and close pairs share one box: the rule's noise, which the detector meets as
    'false alarms' on real objects.
    """
    gray = cv2.GaussianBlur(cv2.cvtColor(rgb, cv2.COLOR_RGB2GRAY), (0, 0), 1.5)
    boxes = boxes_of_mask(gray > 60)
    return boxes[np.minimum(boxes[:, 2], boxes[:, 3]) >= 10]


def _galaxies(split: str, n: int, rng) -> list[tuple[np.ndarray, np.ndarray]]:
    photo = read_source("skimage", "hubble_deep_field.jpg", gray=False)
    boxes = galaxy_label_rule(photo)
    h, w = photo.shape[:2]
    top = int(round(0.6 * h))  # rows above for training, below for testing
    if split == "train":
        y0, y1 = 0, top
    else:
        y0, y1 = top, h
    W, H = 480, 360
    out = []
    for _ in range(n):
        s = rng.uniform(2.0, 3.0)
        cw, ch = W / s, H / s
        x = rng.uniform(0, w - cw)
        y = rng.uniform(y0, y1 - ch)
        m = np.array([[s, 0, -x * s], [0, s, -y * s]], np.float64)
        img = cv2.warpAffine(photo, m, (W, H), flags=cv2.INTER_LINEAR,
                             borderMode=cv2.BORDER_REFLECT_101)
        b = boxes.copy()
        b[:, 0] = (b[:, 0] - x) * s
        b[:, 1] = (b[:, 1] - y) * s
        b[:, 2:] *= s
        kept = []
        for box in b:
            clipped, inside = clip_box(box, W, H)
            if inside >= 0.5:  # an object mostly outside the crop is left unlabelled
                kept.append(clipped)
        kept = np.asarray(kept, np.float64).reshape(-1, 4)
        # the sky has no up: a half turn and a mirror at random (the image stays landscape)
        if rng.random() < 0.5:
            img, kept = img[::-1, ::-1], _turn_boxes_half(kept, W, H)
        if rng.random() < 0.5:
            img = img[:, ::-1]
            kept = kept.copy()
            kept[:, 0] = W - kept[:, 0] - kept[:, 2]
        img = _relight(img, rng, gain=(0.85, 1.15), bias=(-8, 8), ramp=10.0, noise=(0.0, 4.0))
        out.append((np.ascontiguousarray(img), kept))
    return out


def _turn_boxes_half(boxes: np.ndarray, width: int, height: int) -> np.ndarray:
    """Boxes in an image turned by 180 degrees.

    >>> _turn_boxes_half(np.array([[1.0, 2.0, 3.0, 4.0]]), 10, 20).tolist()
    [[6.0, 14.0, 3.0, 4.0]]
    """
    b = boxes.copy()
    b[:, 0] = width - boxes[:, 0] - boxes[:, 2]
    b[:, 1] = height - boxes[:, 1] - boxes[:, 3]
    return b


# ---- composites ---------------------------------------------------------------------------------

@dataclass
class Sprite:
    """A cut-out: grey levels and an alpha mask in 0..1 of the same shape (float32)."""

    gray: np.ndarray
    alpha: np.ndarray


def transform_sprite(sprite: Sprite, height: float, angle: float = 0.0, mirror: bool = False,
                     stretch: float = 1.0) -> Sprite:
    """Scale a sprite so that its alpha's bounding box (before turning) is ``height`` pixels tall,
    stretch its width by ``stretch``, mirror it and turn it by ``angle`` degrees about its centre,
    on a canvas large enough to hold the result.

    >>> s = Sprite(np.full((10, 20), 100, np.float32), np.ones((10, 20), np.float32))
    >>> t = transform_sprite(s, 30.0)
    >>> t.alpha.shape, float(t.alpha.max())
    ((32, 62), 1.0)
    """
    ys, xs = np.nonzero(sprite.alpha > 0.5)
    bh = (ys.max() - ys.min() + 1) if len(ys) else sprite.alpha.shape[0]
    s = height / bh
    sx, sy = s * stretch, s
    h, w = sprite.alpha.shape
    a = math.radians(angle)
    ca, sa = math.cos(a), math.sin(a)
    fx = -sx if mirror else sx
    m = np.array([[fx * ca, -sy * sa], [fx * sa, sy * ca]])
    corners = np.array([[0, 0], [w, 0], [0, h], [w, h]], np.float64) - [w / 2, h / 2]
    moved = corners @ m.T
    out_w = int(math.ceil(np.ptp(moved[:, 0]))) + 2
    out_h = int(math.ceil(np.ptp(moved[:, 1]))) + 2
    affine = np.zeros((2, 3))
    affine[:, :2] = m
    affine[:, 2] = np.array([out_w / 2, out_h / 2]) - m @ np.array([w / 2, h / 2])
    interp = cv2.INTER_AREA if s < 1 else cv2.INTER_LINEAR
    gray = cv2.warpAffine(sprite.gray, affine, (out_w, out_h), flags=interp,
                          borderMode=cv2.BORDER_REPLICATE)
    alpha = cv2.warpAffine(sprite.alpha, affine, (out_w, out_h), flags=cv2.INTER_LINEAR,
                           borderMode=cv2.BORDER_CONSTANT, borderValue=0)
    return Sprite(gray.astype(np.float32), np.clip(alpha, 0, 1).astype(np.float32))


def paste(canvas: np.ndarray, sprite: Sprite, x: int, y: int) -> np.ndarray:
    """Blend a sprite into a float32 canvas with its top-left corner at ``(x, y)`` (in place);
    returns the box of its alpha >= 0.5 in canvas pixels, clipped to the canvas.

    >>> c = np.zeros((10, 10), np.float32)
    >>> paste(c, Sprite(np.full((2, 3), 200, np.float32), np.ones((2, 3), np.float32)), 8, 1)
    (8.0, 1.0, 2.0, 2.0)
    >>> float(c[1, 9]), float(c[1, 7])
    (200.0, 0.0)
    """
    H, W = canvas.shape
    h, w = sprite.alpha.shape
    x0, y0, x1, y1 = max(x, 0), max(y, 0), min(x + w, W), min(y + h, H)
    if x1 <= x0 or y1 <= y0:
        return (0.0, 0.0, 0.0, 0.0)
    a = sprite.alpha[y0 - y:y1 - y, x0 - x:x1 - x]
    g = sprite.gray[y0 - y:y1 - y, x0 - x:x1 - x]
    region = canvas[y0:y1, x0:x1]
    region *= 1 - a
    region += a * g
    ys, xs = np.nonzero(a >= 0.5)
    if not len(ys):
        return (0.0, 0.0, 0.0, 0.0)
    return (float(x0 + xs.min()), float(y0 + ys.min()), float(xs.max() - xs.min() + 1),
            float(ys.max() - ys.min() + 1))


def _overlap(a, b) -> float:
    """Intersection over the smaller box's area."""
    x0, y0 = max(a[0], b[0]), max(a[1], b[1])
    x1, y1 = min(a[0] + a[2], b[0] + b[2]), min(a[1] + a[3], b[1] + b[3])
    if x1 <= x0 or y1 <= y0:
        return 0.0
    return (x1 - x0) * (y1 - y0) / max(1e-9, min(a[2] * a[3], b[2] * b[3]))


@dataclass
class CompositeRecipe:
    """How a composite set draws its images (see :func:`composite_image`)."""

    size: tuple[int, int]
    objects: list  # Sprites of the object class (this split's)
    distractors: list  # Sprites of other things
    backgrounds: list  # grey uint8 images (this split's parts)
    object_height: tuple[float, float]  # labelled object height range, pixels
    distractor_height: tuple[float, float]
    objects_per_image: tuple[int, int] = (1, 4)
    distractors_per_image: tuple[int, int] = (2, 6)
    empty_share: float = 0.1  # share of images without objects
    angle: float = 15.0  # largest turn, degrees
    stretch: float = 0.1  # largest relative change of width
    background_scale: tuple[float, float] = (0.7, 1.4)
    blur: float = 0.8  # largest Gaussian blur sigma of the whole image
    mirror: bool = True  # mirror half of the sprites (not for digits: a mirrored 3 is no 3)
    recolor: object = None  # f(sprite, rng, background_mean) -> sprite, or None


def composite_image(recipe: CompositeRecipe, rng) -> tuple[np.ndarray, np.ndarray]:
    """One composite image and its labelled boxes.

    Background: a random crop of one of the recipe's backgrounds. Then distractors and objects
    in random order, each at a random size, turn, mirror and place where it overlaps no earlier
    sprite by more than 10 % of the smaller one's box (up to 60 tries, else left out). The
    label rule: **an object's box is the bounding box of its alpha >= 0.5 as pasted**; every
    object lies wholly inside the image. Last, the whole image is relit, given noise and blurred a
    little (:func:`_relight`).
    """
    W, H = recipe.size
    bg = recipe.backgrounds[int(rng.integers(len(recipe.backgrounds)))]
    canvas = _random_crop(bg, (W, H), rng, scale=recipe.background_scale).astype(np.float32)
    n_obj = 0 if rng.random() < recipe.empty_share else int(rng.integers(
        recipe.objects_per_image[0], recipe.objects_per_image[1] + 1))
    n_dis = int(rng.integers(recipe.distractors_per_image[0], recipe.distractors_per_image[1] + 1))
    todo = [True] * n_obj + [False] * n_dis
    rng.shuffle(todo)
    placed, boxes = [], []
    for is_object in todo:
        pool = recipe.objects if is_object else recipe.distractors
        lo, hi = recipe.object_height if is_object else recipe.distractor_height
        sprite = pool[int(rng.integers(len(pool)))]
        t = transform_sprite(sprite, math.exp(rng.uniform(math.log(lo), math.log(hi))),
                             angle=rng.uniform(-recipe.angle, recipe.angle),
                             mirror=recipe.mirror and bool(rng.random() < 0.5),
                             stretch=math.exp(rng.uniform(-recipe.stretch, recipe.stretch)))
        h, w = t.alpha.shape
        ys, xs = np.nonzero(t.alpha >= 0.5)
        if w >= W or h >= H or not len(ys):
            continue
        bx, by, bw, bh = xs.min(), ys.min(), xs.max() - xs.min() + 1, ys.max() - ys.min() + 1
        for _ in range(60):
            x, y = int(rng.integers(0, W - w + 1)), int(rng.integers(0, H - h + 1))
            box = (x + bx, y + by, bw, bh)
            if all(_overlap(box, p) <= 0.1 for p in placed):
                break
        else:
            continue
        if recipe.recolor is not None:
            under = canvas[y:y + h, x:x + w][t.alpha >= 0.5]
            t = recipe.recolor(t, rng, float(under.mean()))
        # each cut-out under its own light: gain and bias
        t = Sprite(t.gray * rng.uniform(0.8, 1.2) + rng.uniform(-20, 20), t.alpha)
        pasted = paste(canvas, t, x, y)
        placed.append(pasted)
        if is_object:
            boxes.append(pasted)
    img = np.clip(np.rint(canvas), 0, 255).astype(np.uint8)
    img = _relight(img, rng, gain=(0.85, 1.15), bias=(-15, 15), ramp=40.0, noise=(0.0, 5.0))
    sigma = rng.uniform(0, recipe.blur)
    if sigma > 0.3:
        img = cv2.GaussianBlur(img, (0, 0), sigma)
    return img, np.asarray(boxes, np.float64).reshape(-1, 4)


def _ellipse_sprite(gray: np.ndarray, center, axes, feather: float = 3.0) -> Sprite:
    """A cut-out of ``gray`` inside an ellipse (``center=(x, y)``, half-axes ``(a, b)``), its edge
    softened over ``feather`` pixels."""
    cx, cy = center
    a, b = axes
    x0, x1 = int(max(0, cx - a - feather)), int(min(gray.shape[1], cx + a + feather + 1))
    y0, y1 = int(max(0, cy - b - feather)), int(min(gray.shape[0], cy + b + feather + 1))
    yy, xx = np.mgrid[y0:y1, x0:x1].astype(np.float32)
    r = np.sqrt(((xx - cx) / a) ** 2 + ((yy - cy) / b) ** 2)
    alpha = np.clip((1 - r) * min(a, b) / feather + 0.5, 0, 1)
    return Sprite(gray[y0:y1, x0:x1].astype(np.float32), alpha.astype(np.float32))


def _photo_crops(rng, count: int, names) -> list[Sprite]:
    """Elliptical cut-outs at random places of bundled photographs: distractors that carry real
    edges and textures."""
    out = []
    photos = [read_source(*n) for n in names]
    for _ in range(count):
        g = photos[int(rng.integers(len(photos)))]
        h, w = g.shape
        a = rng.uniform(0.06, 0.2) * w
        b = a * math.exp(rng.uniform(-0.5, 0.5))
        b = min(b, 0.3 * h)
        cx, cy = rng.uniform(a, w - a), rng.uniform(b, h - b)
        out.append(_ellipse_sprite(g, (cx, cy), (a, b)))
    return out


def _texture_parts(split: str, names) -> list[np.ndarray]:
    """Rows 0-60 % of each background image for training, 60-100 % for testing."""
    rows = (0.0, 0.6) if split == "train" else (0.6, 1.0)
    return [np.ascontiguousarray(_region(read_source(*n), rows=rows)) for n in names]


def _digit_sprites(images: np.ndarray) -> list[Sprite]:
    out = []
    for d in images:
        big = cv2.resize(d / 16.0, (32, 32), interpolation=cv2.INTER_CUBIC)
        alpha = np.clip(big, 0, 1).astype(np.float32)
        out.append(Sprite(np.zeros_like(alpha), alpha))  # ink colour chosen when drawn
    return out


def _ink(sprite: Sprite, rng, under: float) -> Sprite:
    """The digits' recolour rule: one grey level per digit, at least 60 levels darker or lighter
    than the mean of the background it is written on (dark ink where there is room below)."""
    if under >= 100:
        level = rng.uniform(0, under - 60)
    else:
        level = rng.uniform(under + 60, 255)
    return Sprite(np.full_like(sprite.alpha, level), sprite.alpha)


DIGIT_CLASS = 3  # the object class of the digits set


def _digits(split: str, n: int, rng) -> list[tuple[np.ndarray, np.ndarray]]:
    images, target = load_digit_images()
    first = split == "train"
    half = len(images) * 6 // 10  # samples 0-60 % for training, the rest for testing
    sel = slice(0, half) if first else slice(half, None)
    images, target = images[sel], target[sel]
    recipe = CompositeRecipe(
        size=(320, 240),
        objects=_digit_sprites(images[target == DIGIT_CLASS]),
        distractors=_digit_sprites(images[target != DIGIT_CLASS]),
        backgrounds=_texture_parts(split, [("sklearn", "china.jpg"), ("sklearn", "flower.jpg")]),
        object_height=(28, 64), distractor_height=(28, 64),
        objects_per_image=(1, 4), distractors_per_image=(3, 7), angle=12.0, mirror=False,
        recolor=_ink)
    return [composite_image(recipe, rng) for _ in range(n)]


def cup_sprite() -> Sprite:
    """The cup on its saucer from skimage's ``coffee.png``, cut along the saucer's rim (an ellipse
    fitted by eye: centre (278, 228), half-axes 202 x 160 pixels)."""
    return _ellipse_sprite(read_source("skimage", "coffee.png"), (278, 228), (202, 160), 4.0)


def _table_crops(rng, count: int) -> list[Sprite]:
    """Elliptical cut-outs of the wooden table around the saucer in ``coffee.png``: the object's
    own surroundings, as distractors."""
    g = read_source("skimage", "coffee.png")
    out = []
    spots = [(60, 330), (540, 330), (520, 60), (50, 150), (560, 200)]
    for _ in range(count):
        cx, cy = spots[int(rng.integers(len(spots)))]
        a = rng.uniform(25, 45)
        b = a * rng.uniform(0.6, 1.0)
        cx = float(np.clip(cx + rng.uniform(-10, 10), a, g.shape[1] - a))
        cy = float(np.clip(cy + rng.uniform(-10, 10), b, g.shape[0] - b))
        out.append(_ellipse_sprite(g, (cx, cy), (a, b)))
    return out


def _cups(split: str, n: int, rng) -> list[tuple[np.ndarray, np.ndarray]]:
    local = np.random.default_rng(1234 if split == "train" else 5678)
    distractors = (_photo_crops(local, 40, [("skimage", "rocket.jpg"), ("skimage", "chelsea.png"),
                                             ("skimage", "motorcycle_left.png"),
                                             ("skimage", "moon.png"), ("sklearn", "china.jpg")])
                   + _table_crops(local, 12) + _coin_sprites(split))
    recipe = CompositeRecipe(
        size=(480, 360), objects=[cup_sprite()], distractors=distractors,
        backgrounds=_texture_parts(split, [("skimage", "brick.png"), ("skimage", "grass.png"),
                                           ("skimage", "gravel.png")]),
        object_height=(40, 110), distractor_height=(30, 120),
        objects_per_image=(1, 4), distractors_per_image=(3, 8), angle=25.0, stretch=0.15,
        background_scale=(0.8, 1.6), blur=1.2)
    return [composite_image(recipe, rng) for _ in range(n)]


def horse_sprite() -> Sprite:
    """skimage's ``horse.png`` silhouette (dark pixels of its grey level) as an alpha mask."""
    g = read_source("skimage", "horse.png")
    alpha = (g < 128).astype(np.float32)
    ys, xs = np.nonzero(alpha)
    alpha = alpha[ys.min():ys.max() + 1, xs.min():xs.max() + 1]
    alpha = np.pad(alpha, 4)
    return Sprite(np.zeros_like(alpha), cv2.GaussianBlur(alpha, (0, 0), 0.7))


def _shape_sprites(rng, count: int) -> list[Sprite]:
    """Other silhouettes: ellipses, rectangles, triangles and four-legged blobs (an ellipse body
    on four bars), drawn with cv2 on a 120 x 100 canvas."""
    out = []
    for k in range(count):
        c = np.zeros((100, 120), np.uint8)
        kind = k % 4
        if kind == 0:
            cv2.ellipse(c, (60, 50), (int(rng.integers(20, 55)), int(rng.integers(15, 45))),
                        0, 0, 360, 255, -1)
        elif kind == 1:
            w, h = int(rng.integers(30, 110)), int(rng.integers(25, 90))
            cv2.rectangle(c, (60 - w // 2, 50 - h // 2), (60 + w // 2, 50 + h // 2), 255, -1)
        elif kind == 2:
            pts = rng.integers([5, 5], [115, 95], (3, 2)).astype(np.int32)
            cv2.fillPoly(c, [pts], 255)
        else:  # a table-like or animal-like blob: a body on legs
            cv2.ellipse(c, (60, 40), (int(rng.integers(30, 50)), int(rng.integers(12, 22))),
                        0, 0, 360, 255, -1)
            for lx in np.linspace(30, 90, int(rng.integers(2, 5))):
                cv2.rectangle(c, (int(lx) - 3, 40), (int(lx) + 3, int(rng.integers(75, 98))), 255, -1)
        alpha = cv2.GaussianBlur(c.astype(np.float32) / 255, (0, 0), 0.7)
        ys, xs = np.nonzero(alpha > 0.5)
        alpha = np.pad(alpha[ys.min():ys.max() + 1, xs.min():xs.max() + 1], 4)
        out.append(Sprite(np.zeros_like(alpha), alpha))
    return out


def _textured_fill(textures):
    """Recolour rule of the horses set: fill a silhouette with a random crop of a texture at a
    random grey offset, so that shape, not grey level, tells objects apart."""
    def recolor(sprite: Sprite, rng, under: float) -> Sprite:
        t = textures[int(rng.integers(len(textures)))]
        h, w = sprite.alpha.shape
        fill = _random_crop(t, (w, h), rng, scale=(0.3, 0.8)).astype(np.float32)
        fill = (fill - fill.mean()) * rng.uniform(0.3, 0.8) + rng.uniform(20, 235)
        return Sprite(fill, sprite.alpha)
    return recolor


def _horses(split: str, n: int, rng) -> list[tuple[np.ndarray, np.ndarray]]:
    local = np.random.default_rng(4321 if split == "train" else 8765)
    textures = _texture_parts(split, [("skimage", "gravel.png"), ("skimage", "moon.png")])
    recipe = CompositeRecipe(
        size=(400, 300), objects=[horse_sprite()], distractors=_shape_sprites(local, 40),
        backgrounds=_texture_parts(split, [("skimage", "grass.png"), ("skimage", "brick.png"),
                                           ("skimage", "moon.png"), ("sklearn", "flower.jpg")]),
        object_height=(30, 90), distractor_height=(25, 100), objects_per_image=(1, 4),
        distractors_per_image=(2, 6), angle=15.0, stretch=0.15, recolor=_textured_fill(textures))
    return [composite_image(recipe, rng) for _ in range(n)]


def _coin_sprites(split: str) -> list[Sprite]:
    """Coins cut from ``coins.png`` along the region-based segmentation of the scikit-image
    gallery (Sobel elevation map, watershed from markers below 30 and above 150, holes filled,
    components of at least 100 pixels): the 16 in the left two thirds of the photograph for
    training, the 8 in the right third for testing."""
    from scipy import ndimage as ndi
    from skimage.filters import sobel
    from skimage.segmentation import watershed

    photo = read_source("skimage", "coins.png")
    markers = np.zeros(photo.shape, np.int32)
    markers[photo < 30] = 1
    markers[photo > 150] = 2
    mask = ndi.binary_fill_holes(watershed(sobel(photo), markers) == 2)
    n, lab, stats, centres = cv2.connectedComponentsWithStats(mask.astype(np.uint8), connectivity=8)
    out = []
    for k in range(1, n):
        if stats[k, cv2.CC_STAT_AREA] < 100:
            continue
        if (centres[k, 0] < photo.shape[1] * 2 / 3) != (split == "train"):
            continue
        x, y, w, h = stats[k, :4]
        pad = 3
        y0, y1 = max(0, y - pad), min(photo.shape[0], y + h + pad)
        x0, x1 = max(0, x - pad), min(photo.shape[1], x + w + pad)
        alpha = cv2.GaussianBlur((lab[y0:y1, x0:x1] == k).astype(np.float32), (0, 0), 0.8)
        out.append(Sprite(photo[y0:y1, x0:x1].astype(np.float32), alpha))
    return out


def _coin_crops(split: str, n: int, rng) -> list[tuple[np.ndarray, np.ndarray]]:
    local = np.random.default_rng(2468 if split == "train" else 1357)
    distractors = _photo_crops(local, 30, [("skimage", "moon.png"), ("skimage", "rocket.jpg"),
                                           ("skimage", "chelsea.png")])
    recipe = CompositeRecipe(
        size=(400, 300), objects=_coin_sprites(split), distractors=distractors,
        backgrounds=_texture_parts(split, [("skimage", "gravel.png"), ("skimage", "moon.png"),
                                           ("sklearn", "china.jpg"), ("skimage", "brick.png")]),
        object_height=(30, 80), distractor_height=(25, 90), objects_per_image=(1, 4),
        distractors_per_image=(1, 4), angle=180.0, stretch=0.05)
    return [composite_image(recipe, rng) for _ in range(n)]


# ---- the catalogue ------------------------------------------------------------------------------

@dataclass(frozen=True)
class SetSpec:
    name: str
    kind: str  # "photograph" or "composite"
    difficulty: str
    rule: str
    build: object  # f(split, n, rng) -> list of (image, boxes)


SETS = {s.name: s for s in [
    SetSpec("coins", "photograph", "noisy labels",
            "the coins photograph (skimage coins.png), turned a quarter, enlarged 2.2-2.8x, relit "
            "with a ramp and noise, cropped to 320x240; training from the left two thirds, test "
            "from the right third. Labels: Otsu threshold of the image smoothed at sigma 1, holes "
            "filled, components of >= 600 pixels (coin_label_rule): noisy by construction",
            _coins),
    SetSpec("galaxies", "photograph", "noisy labels, small and varied objects",
            "the Hubble deep field (skimage hubble_deep_field.jpg), enlarged 2-3x, cropped to "
            "480x360, turned or mirrored; training from the top 60 % of rows, test from the rest. "
            "Labels: grey level smoothed at sigma 1.5 above 60, components whose box is >= 10 "
            "pixels on its shorter side in the original, kept where >= half inside the crop "
            "(galaxy_label_rule)",
            _galaxies),
    SetSpec("digits", "composite", "medium: look-alike distractors",
            f"handwritten digits {DIGIT_CLASS} (sklearn load_digits, samples 0-60 % for training) "
            "among other digits, 28-64 pixels tall, dark or light ink, on crops of the sklearn "
            "sample photographs (china, flower; rows 0-60 % for training). Label: the pasted "
            "digit's ink (alpha >= 0.5) bounding box",
            _digits),
    SetSpec("cups", "composite", "hard: busy textures",
            "the cup on its saucer (skimage coffee.png, cut along the saucer) among elliptical "
            "crops of photographs, of the same table and of coins, on brick, grass and gravel "
            "(skimage textures), 40-110 pixels tall, turned up to 25 degrees, 480x360. Label: "
            "the pasted cut-out's alpha >= 0.5 bounding box",
            _cups),
    SetSpec("horses", "composite", "medium-hard: shape only",
            "the horse silhouette (skimage horse.png) among drawn shapes (ellipses, rectangles, "
            "triangles, bodies on legs), all filled with texture at random grey levels, on "
            "grass, brick, moon and flower backgrounds, 30-90 pixels tall, 400x300. Label: the "
            "pasted silhouette's alpha >= 0.5 bounding box",
            _horses),
    SetSpec("coin-crops", "composite", "easy-medium",
            "coins cut from skimage coins.png by the scikit-image gallery's watershed "
            "segmentation (16 for training, the other 8 for testing), turned freely, 30-80 "
            "pixels tall, among photograph crops, on gravel, moon, china and brick, 400x300. "
            "Label: the pasted coin's alpha >= 0.5 bounding box",
            _coin_crops),
]}


def build_set(name: str, cache=None, seed: int = 0, train_images: int = DEFAULT_TRAIN_IMAGES,
              test_images: int = DEFAULT_TEST_IMAGES, force: bool = False) -> Path:
    """Build one set into ``cache/NAME-seedS[-TRAINxTEST]`` (reused when already there) and return
    that folder, which holds ``train/`` and ``test/`` (each ``images/`` + ``labels.csv``) and
    ``set.json``."""
    if name not in SETS:
        raise KeyError(f"unknown set {name!r}; known: {', '.join(SETS)}")
    spec = SETS[name]
    cache = Path(cache) if cache is not None else default_cache()
    tag = f"{name}-seed{seed}"
    if (train_images, test_images) != (DEFAULT_TRAIN_IMAGES, DEFAULT_TEST_IMAGES):
        tag += f"-{train_images}x{test_images}"
    root = cache / tag
    info = root / "set.json"
    if info.is_file() and not force:
        try:
            meta = json.loads(info.read_text())
            if meta.get("builder_version") == BUILDER_VERSION:
                return root
        except (OSError, ValueError):
            pass
    cache.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{tag}-", dir=cache))
    counts = {}
    try:
        for k, (split, n) in enumerate((("train", train_images), ("test", test_images))):
            rng = np.random.default_rng([seed, list(SETS).index(name), k])
            images = spec.build(split, n, rng)
            folder = tmp / split / "images"
            folder.mkdir(parents=True)
            items = []
            for i, (img, boxes) in enumerate(images):
                fname = f"{name}_{split}_{i:03d}.png"
                bgr = img if img.ndim == 2 else cv2.cvtColor(img, cv2.COLOR_RGB2BGR)
                if not cv2.imwrite(str(folder / fname), bgr):
                    raise OSError(f"could not write {folder / fname}")
                items.append(ImageLabels(fname, np.round(np.asarray(boxes, np.float64), 2)))
            write_labels_csv(tmp / split / "labels.csv", items)
            sizes = [np.sqrt(b[2] * b[3]) for it in items for b in it.boxes]
            counts[split] = {"images": len(items), "boxes": int(sum(len(it.boxes) for it in items)),
                             "empty_images": int(sum(len(it.boxes) == 0 for it in items)),
                             "object_size_px": [float(np.min(sizes)) if sizes else None,
                                                float(np.median(sizes)) if sizes else None,
                                                float(np.max(sizes)) if sizes else None]}
        (tmp / "set.json").write_text(json.dumps({
            "name": name, "seed": seed, "builder_version": BUILDER_VERSION, "kind": spec.kind,
            "difficulty": spec.difficulty, "rule": spec.rule, "counts": counts}, indent=1) + "\n")
        if root.exists():
            shutil.rmtree(root)
        os.replace(tmp, root)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return root


def set_info(root) -> dict:
    """The ``set.json`` of a built set."""
    return json.loads((Path(root) / "set.json").read_text())


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--sets", nargs="+", default=list(SETS), choices=list(SETS), metavar="NAME",
                    help=f"sets to build (default: all: {' '.join(SETS)})")
    ap.add_argument("--cache", type=Path, default=None,
                    help=f"folder of the built sets (default: {default_cache()})")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--train-images", type=int, default=DEFAULT_TRAIN_IMAGES)
    ap.add_argument("--test-images", type=int, default=DEFAULT_TEST_IMAGES)
    ap.add_argument("--force", action="store_true", help="rebuild even when cached")
    ap.add_argument("--list", action="store_true", help="print the sets and their rules, build none")
    args = ap.parse_args(argv)
    if args.list:
        for s in SETS.values():
            print(f"{s.name} ({s.kind}; {s.difficulty}):\n  {s.rule}")
        return 0
    for name in args.sets:
        root = build_set(name, args.cache, args.seed, args.train_images, args.test_images,
                         args.force)
        c = set_info(root)["counts"]
        print(f"{name:<11} {root}")
        for split in ("train", "test"):
            s = c[split]
            lo, med, hi = s["object_size_px"]
            print(f"  {split:<5} {s['images']:>3} images ({s['empty_images']} without objects), "
                  f"{s['boxes']:>4} boxes, object size sqrt(w*h) {lo:.0f} / {med:.0f} / {hi:.0f} px "
                  f"(min / median / max)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
