"""Looking inside a trained model: what it is, how it was trained, and where its features look.

The pieces behind ``patchwood inspect MODEL.npz``:

- :func:`model_report` gathers the facts a person checks first (window, mode, trees, depth, features
  used, early-exit statistics, training metadata) into one JSON-ready dict; :func:`report_lines`
  turns it into text.
- :func:`model_importances` gives each feature of the model one importance: the summed impurity
  decrease the model file stores (information gain for bagged trees, squared-error decrease for
  boosted ones; see :class:`detector.forest.FlatForest`), or, for a file without it, the number of
  real splits on the feature. :func:`top_features` ranks them.
- :func:`importance_heat_map` spreads every feature's importance over the pixels of its rectangles:
  a rectangle ``(x, y, w, h, weight)`` of a feature with importance ``I`` adds
  ``|weight| * I / (w * h)`` to each of its ``w * h`` pixels, so the map sums to
  ``sum over features of I * sum(|weight|)`` and shows where in the window the decisions come from.
- :func:`heat_map_panel` and :func:`feature_panel` draw the window itself, pixel-exact and enlarged
  by nearest-neighbour repetition; :func:`render_heat_map` and :func:`render_top_features` put
  titles, a colour bar or a legend around them (matplotlib, Agg canvas, no display needed) and
  return RGB ``uint8`` pictures; :func:`write_png` saves one atomically.

The rectangles are drawn in the project's own two colours from the colour-blind-safe set of
Okabe & Ito (2008, "Color Universal Design"): blue for positive weights, orange for negative ones,
each also marked with a ``+`` or ``-`` sign. The heat map uses matplotlib's perceptually uniform
``inferno`` colour map on a square-root scale (dark: no feature looks here; bright: the most
important pixels), so that a few small features, whose importance is concentrated on few pixels,
do not wash out the rest.
"""

from __future__ import annotations

from typing import Sequence
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from numpy.typing import ArrayLike
    from detector.model import Model

import math
import os

import numpy as np

from detector._validation import check_int, finite_or_none, json_safe
from detector.errors import InputError
from detector.reporting import drawing
from detector.model import describe, edge_strength_note, exit_budget_of

__all__ = [
    "HEAT_COLOUR_MAP",
    "HEAT_GAMMA",
    "NEGATIVE_RGB",
    "POSITIVE_RGB",
    "display_scale",
    "feature_panel",
    "heat_map_panel",
    "importance_heat_map",
    "mean_object_patch",
    "model_importances",
    "model_report",
    "render_heat_map",
    "render_top_features",
    "report_lines",
    "top_features",
    "write_png",
]

#: Rectangles with a positive weight (Okabe & Ito blue) ...
POSITIVE_RGB = (0, 114, 178)
#: ... and with a negative weight (Okabe & Ito orange).
NEGATIVE_RGB = (230, 159, 0)
#: matplotlib colour map of the heat map.
HEAT_COLOUR_MAP = "inferno"
#: Exponent of the heat map's colour scale (0.5: square root).
HEAT_GAMMA = 0.5
#: Grey level of the neutral window drawn when no mean object patch is given.
NEUTRAL_GREY = 128

_FILL_ALPHA = 0.4  # opacity of a rectangle's fill over the patch
_BORDER = 2  # rectangle outline, pixels inside the rectangle's edge
_SIGN_RGB = (255, 255, 255)
_SIGN_OUTLINE_RGB = (30, 30, 30)
_TEXT = "#222222"
_NOTE = "#555555"
_DPI = 100
_LINE = 16  # pixels per line of 9-point text


# ----------------------------------------------------------------------------------------------
# importances and the heat map


def _check_features(features) -> np.ndarray:
    f = np.asarray(features)
    if f.ndim != 3 or f.shape[1:] != (4, 5):
        raise InputError(f"features must have shape (F, 4, 5), got {f.shape}")
    if f.size and f.dtype.kind not in "iu":
        raise InputError(f"features must hold integers, got dtype {f.dtype}")
    return f.astype(np.int64)


def _check_window(window) -> tuple[int, int]:
    try:
        width, height = (int(v) for v in window)
    except (TypeError, ValueError):
        raise InputError(f"window must be (width, height), got {window!r}") from None
    if width < 1 or height < 1:
        raise InputError(f"window must be at least 1x1, got {width}x{height}")
    return width, height


def importance_heat_map(features: ArrayLike, importances: ArrayLike,
                        window: tuple[int, int]) -> np.ndarray:
    """Where in the window the features look, weighted by their importance.

    Every rectangle ``(x, y, w, h, weight)`` of feature ``i`` adds
    ``|weight| * importances[i] / (w * h)`` to each pixel it covers; rectangles with weight 0 are
    unused slots and add nothing. The map therefore sums to
    ``sum_i importances[i] * sum_r |weight_ir|``.

    Parameters
    ----------
    features : ndarray of int, shape (F, 4, 5)
        Rectangles ``(x, y, width, height, weight)`` per feature (see :mod:`detector.features`).
    importances : array_like of float, shape (F,)
        Non-negative importance of every feature.
    window : (int, int)
        ``(width, height)`` of the window.

    Returns
    -------
    ndarray of float64, shape (height, width)

    Raises
    ------
    InputError
        Shapes disagree, an importance is negative or not finite, or a rectangle leaves the window.

    Examples
    --------
    >>> f = np.array([[[0, 0, 1, 2, -1], [1, 0, 1, 2, 1], [0] * 5, [0] * 5]], np.int32)
    >>> importance_heat_map(f, [0.5], (3, 2)).tolist()     # |±1| * 0.5 / 2 on each of 2 pixels
    [[0.25, 0.25, 0.0], [0.25, 0.25, 0.0]]
    """
    f = _check_features(features)
    imp = np.asarray(importances, dtype=np.float64)
    if imp.shape != (len(f),):
        raise InputError(f"importances must have shape ({len(f)},), got {imp.shape}")
    if not np.isfinite(imp).all() or (imp < 0).any():
        raise InputError("importances must be finite and >= 0")
    width, height = _check_window(window)
    heat = np.zeros((height, width), np.float64)
    which, slot = np.nonzero(f[:, :, 4] != 0)
    rect = f[which, slot]
    if len(rect):
        x, y, w, h = rect[:, 0], rect[:, 1], rect[:, 2], rect[:, 3]
        if (x < 0).any() or (y < 0).any() or (w < 1).any() or (h < 1).any() \
                or (x + w > width).any() or (y + h > height).any():
            raise InputError(f"a feature rectangle lies outside the {width}x{height} window")
        value = np.abs(rect[:, 4]) * imp[which] / (w * h)
        for xi, yi, wi, hi, vi in zip(x.tolist(), y.tolist(), w.tolist(), h.tolist(), value.tolist()):
            if vi:
                heat[yi:yi + hi, xi:xi + wi] += vi
    return heat


def _importance_source(model) -> str:
    if model.feature_importances is None:
        return "real splits on the feature (the model file holds no importances)"
    if model.mode == "bagged":
        return "information gain in bits, summed over the trees (per patch)"
    return "squared-error decrease, summed over the stages (per patch)"


def model_importances(model: Model) -> tuple[np.ndarray, str]:
    """One importance per feature of a model, and what it measures.

    The summed impurity decrease stored in the model file (``model.feature_importances``); for a
    model file without it, the number of real (non-padding) tree nodes that split on the feature.

    Parameters
    ----------
    model : detector.model.Model

    Returns
    -------
    importances : ndarray of float64, shape (F,)
    source : str
        What the numbers are, in words.

    Examples
    --------
    >>> from detector.model import Model
    >>> f = np.array([[[0, 0, 1, 1, 1]] + [[0] * 5] * 3] * 2, np.int32)
    >>> m = Model((2, 2), f, [[1, 0, 0]], [[0.5, 0.0, 0.0]], [[0, 0, 1, 1]], [-np.inf], "bagged")
    >>> imp, source = model_importances(m); imp.tolist()     # one real split, on feature 1
    [0.0, 1.0]
    """
    if model.feature_importances is not None:
        imp = np.asarray(model.feature_importances, dtype=np.float64)
    else:
        forest = model.forest
        imp = np.bincount(forest.node_features[forest.split_mask],
                          minlength=len(model.features)).astype(np.float64)
    return imp, _importance_source(model)


def top_features(model: Model, k: int = 12) -> np.ndarray:
    """Indices of the model's ``k`` most important features, most important first.

    Ranked by :func:`model_importances`, ties by index (lower first). Features of importance 0
    change no decision and are left out, so fewer than ``k`` indices may come back.

    Parameters
    ----------
    model : detector.model.Model
    k : int, default=12

    Returns
    -------
    ndarray of intp, shape (min(k, number of features with importance > 0),)

    Examples
    --------
    >>> from detector.model import Model
    >>> f = np.array([[[0, 0, 1, 1, 1]] + [[0] * 5] * 3] * 4, np.int32)
    >>> m = Model((2, 2), f, [[0]], [[0.0]], [[0, 1]], [-np.inf], "bagged",
    ...           feature_importances=[0.2, 0.0, 0.7, 0.2])
    >>> top_features(m, k=3).tolist()
    [2, 0, 3]
    """
    check_int(k, "k", low=0)
    imp, _ = model_importances(model)
    order = np.lexsort((np.arange(len(imp)), -imp))
    order = order[imp[order] > 0]
    return order[:k].astype(np.intp)


def mean_object_patch(patches: ArrayLike, labels: ArrayLike) -> np.ndarray:
    """Pixel-wise mean of the object patches (label 1) of a patch bank.

    Parameters
    ----------
    patches : ndarray of uint8, shape (N, height, width)
    labels : array_like of int, shape (N,)
        1 for object patches, 0 for background.

    Returns
    -------
    ndarray of float64, shape (height, width)

    Examples
    --------
    >>> p = np.array([[[0, 10]], [[20, 30]], [[255, 255]]], np.uint8)
    >>> mean_object_patch(p, [1, 1, 0]).tolist()
    [[10.0, 20.0]]
    """
    patches = np.asarray(patches)
    labels = np.asarray(labels)
    if patches.ndim != 3 or labels.shape != (len(patches),):
        raise InputError(f"need patches (N, height, width) and N labels, got {patches.shape} "
                         f"and {labels.shape}")
    objects = labels == 1
    if not objects.any():
        raise InputError("there are no object patches to average")
    return patches[objects].mean(axis=0, dtype=np.float64)


# ----------------------------------------------------------------------------------------------
# the report


def _rectangles(feature) -> list[list[int]]:
    return [[int(v) for v in row] for row in np.asarray(feature) if row[4] != 0]


def model_report(model: Model, top: int = 12) -> dict:
    """The facts of a model a person checks first, as one JSON-ready dict.

    Parameters
    ----------
    model : detector.model.Model
    top : int, default=12
        How many of the most important features to list.

    Returns
    -------
    dict
        ``window`` (``width``, ``height``), ``mode``, ``method``, ``trees``, ``depth``,
        ``splits`` (real split nodes), ``features_used``, ``pool``, ``features_per_node``,
        ``normalize``, ``edge_strength_features`` (how many read the gradient magnitude without
        contrast normalisation), ``rectangles_per_feature`` (count of features with 2, 3 or 4
        rectangles),
        ``importance`` (``source``, ``total``, ``top``: rank, feature index, importance, share of
        the total, rectangles), ``early_exit`` (``trees_with_exit``, ``first_exit_after_tree``,
        ``calibration``: the model's calibration record as stored) and ``training`` (``date``,
        ``parameters``, ``bank_sha256``, ``bank_counts``, ``patches``, ``margin``, ``oob_error``,
        ``mining``, ``versions``; None or empty where the metadata has nothing).

    Examples
    --------
    >>> from detector.model import Model
    >>> f = np.array([[[0, 0, 1, 2, -1], [1, 0, 1, 2, 1]] + [[0] * 5] * 2], np.int32)
    >>> m = Model((2, 2), f, [[0]], [[0.0]], [[0, 1]], [-np.inf], "bagged",
    ...           metadata={"date": "2025-03-04"}, feature_importances=[0.9])
    >>> r = model_report(m)
    >>> r["trees"], r["depth"], r["features_used"], r["importance"]["top"][0]["share"]
    (1, 1, 1, 1.0)
    """
    # the model's facts come from the one describer (detector.model.describe); the report adds
    # the rectangles and importances, and keeps its own order of keys
    d = describe(model)
    imp, source = model_importances(model)
    total = float(imp.sum())
    ranked = top_features(model, top)
    n_rect = (model.features[:, :, 4] != 0).sum(axis=1)
    training = d["training"]
    return json_safe({
        **{k: d[k] for k in ("window", "mode", "method", "trees", "depth", "splits",
                             "features_used", "pool", "features_per_node", "normalize",
                             "edge_strength_features")},
        "rectangles_per_feature": {str(n): int((n_rect == n).sum()) for n in (2, 3, 4)
                                   if (n_rect == n).any()} | (
            {"other": int((~np.isin(n_rect, (2, 3, 4))).sum())}
            if (~np.isin(n_rect, (2, 3, 4))).any() else {}),
        "importance": {
            "source": source,
            "total": total,
            "top": [{"rank": r + 1, "feature": int(i), "importance": float(imp[i]),
                     "share": float(imp[i] / total) if total > 0 else None,
                     "rectangles": _rectangles(model.features[i])}
                    for r, i in enumerate(ranked)],
        },
        "early_exit": {k: d["early_exit"][k]
                       for k in ("trees_with_exit", "first_exit_after_tree", "calibration")},
        "training": {**{k: training[k] for k in ("date", "parameters", "bank_sha256",
                                                 "bank_counts", "patches")},
                     "margin": d["scan"]["margin"],
                     **{k: training[k] for k in ("oob_error", "mining", "versions")}},
    })


def _number(value, digits: int = 3) -> str:
    v = finite_or_none(value)
    return "n/a" if v is None else f"{v:.{digits}g}"


def report_lines(report: dict) -> list[str]:
    """The report of :func:`model_report` as lines of text.

    Examples
    --------
    >>> from detector.model import Model
    >>> f = np.array([[[0, 0, 1, 2, -1], [1, 0, 1, 2, 1]] + [[0] * 5] * 2], np.int32)
    >>> m = Model((2, 2), f, [[0]], [[0.0]], [[0, 1]], [-np.inf], "bagged")
    >>> report_lines(model_report(m))[0]
    'window: 2 x 2 pixels (width x height)'
    """
    r = report
    lines = [f"window: {r['window']['width']} x {r['window']['height']} pixels (width x height)",
             f"mode: {r['mode']} ({r['method']})",
             f"trees: {r['trees']} of depth {r['depth']} ({r['splits']} real splits)"]
    used = f"features used: {r['features_used']}"
    if r.get("pool"):
        used += f" of a pool of {r['pool']}"
    used += f", {'contrast-normalised' if r['normalize'] else 'raw'} values"
    used += edge_strength_note(r)
    shapes = ", ".join(f"{n} with {k} rectangles" if k != "other" else f"{n} other"
                       for k, n in r["rectangles_per_feature"].items())
    lines.append(used + (f" ({shapes})" if shapes else ""))
    if r.get("features_per_node"):
        lines.append(f"pool features tried per node: {r['features_per_node']}")

    ee = r["early_exit"]
    text = f"early exit: {ee['trees_with_exit']} of {r['trees']} trees have an exit threshold"
    if ee["first_exit_after_tree"] is not None:
        text += f", the first after tree {ee['first_exit_after_tree']}"
    lines.append(text)
    cal = ee["calibration"]
    if cal:
        parts = []
        budget = exit_budget_of(cal)
        if budget is not None:
            parts.append(f"an exit budget of {_number(budget, 4)}")
        if cal.get("objects") is not None:
            parts.append(f"{cal['objects']} held-out object patches")
        if parts:
            lines.append("  calibrated with " + " on ".join(parts))
        means = []
        if finite_or_none(cal.get("mean_trees_objects")) is not None:
            means.append(f"objects {cal['mean_trees_objects']:.2f}")
        if finite_or_none(cal.get("mean_trees_background")) is not None:
            bg = f"background {cal['mean_trees_background']:.2f}"
            if cal.get("background_source"):
                bg += f" ({cal['background_source']})"
            means.append(bg)
        if means:
            lines.append(f"  mean trees evaluated per window (of {r['trees']}): {', '.join(means)}")
        known = {"exit_budget", "exit_recall", "objects", "mean_trees_objects", "mean_trees_background",
                 "background_source"}
        for key in sorted(set(cal) - known):
            value = cal[key]
            shown = f"{value:.4g}" if isinstance(value, float) else value
            lines.append(f"  {key.replace('_', ' ')}: {shown}")
    else:
        lines.append("  no calibration figures in the model file")

    t = r["training"]
    lines.append(f"trained: {t['date'] or 'unknown date'}")
    if t["parameters"]:
        lines.append("  parameters: " + ", ".join(f"{k}={v}" for k, v in sorted(t["parameters"].items())))
    if t["bank_sha256"]:
        lines.append(f"  bank sha256: {t['bank_sha256']}")
    bank = t["bank_counts"]
    if isinstance(bank, dict) and "objects" in bank and "background" in bank:
        lines.append(f"  bank: {bank['objects']} object patches ({bank.get('object', '?')} as "
                     f"labelled, {bank.get('augmented', '?')} augmented), {bank['background']} "
                     f"background patches ({bank.get('mined', 0)} from mining)")
    grown = t["patches"]
    if isinstance(grown, dict) and "objects" in grown and "background" in grown:
        lines.append(f"  grown on: {grown['objects']} object and {grown['background']} "
                     "background patches")
    if t["margin"] is not None:
        lines.append(f"  context margin: {_number(t['margin'])}")
    lines.append("  out-of-bag error: " + ("n/a" if t["oob_error"] is None
                                          else f"{100 * t['oob_error']:.2f} %"))
    if t["mining"]:
        for step in t["mining"]:
            if not isinstance(step, dict):
                continue
            lines.append(f"  mining round {step.get('round', '?')}: "
                         f"{_number(step.get('false_alarms_per_image'))} false alarms per image, "
                         f"recall {_number(step.get('recall'))}, "
                         f"{step.get('added', 0)} background patches added")
    else:
        lines.append("  mining: none")
    if t["versions"]:
        lines.append("  versions: " + ", ".join(f"{k} {v}" for k, v in sorted(t["versions"].items())))

    imp = r["importance"]
    lines.append(f"importance: {imp['source']}; total {_number(imp['total'], 4)}")
    if imp["top"]:
        lines.append(f"  {'rank':>4}  {'feature':>7}  {'importance':>10}  {'share':>7}  rectangles (x, y, w, h, weight)")
        for row in imp["top"]:
            share = "n/a" if row["share"] is None else f"{100 * row['share']:.1f} %"
            rects = " ".join("({}, {}, {}, {}, {:+d})".format(*rc) for rc in row["rectangles"])
            lines.append(f"  {row['rank']:>4}  {row['feature']:>7}  {row['importance']:>10.4g}  "
                         f"{share:>7}  {rects}")
    return lines


# ----------------------------------------------------------------------------------------------
# pictures: pixel-exact panels


def display_scale(window: tuple[int, int], target: int = 240) -> int:
    """Nearest-neighbour enlargement that makes the window's longer side about ``target`` pixels.

    Between 1 and 20. A 24 x 24 window is shown 10 times larger.

    Examples
    --------
    >>> display_scale((24, 24)), display_scale((64, 32)), display_scale((8, 8))
    (10, 3, 20)
    """
    width, height = _check_window(window)
    return int(min(20, max(1, target // max(width, height))))


def _enlarge(image: np.ndarray, scale: int) -> np.ndarray:
    return np.repeat(np.repeat(image, scale, axis=0), scale, axis=1)


def _grey_rgb(patch, stretch: bool) -> np.ndarray:
    """A (H, W) grey patch as uint8 RGB; ``stretch`` maps its min..max to 0..255."""
    p = np.asarray(patch, dtype=np.float64)
    if stretch:
        low, high = float(p.min()), float(p.max())
        p = (p - low) * (255.0 / (high - low)) if high > low else np.full_like(p, NEUTRAL_GREY)
    g = np.clip(np.rint(p), 0, 255).astype(np.uint8)
    return np.repeat(g[:, :, None], 3, axis=2)


def _colour_map(values: np.ndarray) -> np.ndarray:
    """Values in 0..1 -> uint8 RGB by :data:`HEAT_COLOUR_MAP`."""
    import matplotlib

    rgba = matplotlib.colormaps[HEAT_COLOUR_MAP](np.clip(values, 0.0, 1.0), bytes=True)
    return np.ascontiguousarray(rgba[..., :3])


def heat_map_panel(heat: ArrayLike, scale: int = 10, vmax: float | None = None,
                   patch: ArrayLike | None = None, gamma: float = HEAT_GAMMA) -> np.ndarray:
    """A heat map as an RGB picture, each window pixel a ``scale`` x ``scale`` block.

    Parameters
    ----------
    heat : ndarray of float, shape (H, W)
        Non-negative values (see :func:`importance_heat_map`).
    scale : int, default=10
    vmax : float, optional
        Value shown brightest; default the map's maximum (an all-zero map is drawn dark).
    gamma : float, default=0.5
        Colour scale ``(heat / vmax) ** gamma`` (matplotlib's ``PowerNorm``); 0.5, a square-root
        scale, keeps a few small, concentrated features from washing out the rest of the map.
    patch : ndarray, shape (H, W), optional
        Grey patch to lay the heat over (contrast stretched): each pixel then blends the patch
        with the heat colour, the colour's opacity growing from 0 to 0.8 with the heat.

    Returns
    -------
    ndarray of uint8, shape (H * scale, W * scale, 3)

    Examples
    --------
    >>> heat_map_panel(np.array([[0.0, 2.0]]), scale=2).shape
    (2, 4, 3)
    """
    heat = np.asarray(heat, dtype=np.float64)
    if heat.ndim != 2:
        raise InputError(f"heat must be a 2-d array, got shape {heat.shape}")
    scale = int(scale)
    if scale < 1:
        raise InputError(f"scale must be >= 1, got {scale}")
    top = float(heat.max()) if vmax is None else float(vmax)
    if not gamma > 0:
        raise InputError(f"gamma must be > 0, got {gamma}")
    level = np.clip(heat / top, 0.0, 1.0) ** float(gamma) if top > 0 else np.zeros_like(heat)
    rgb = _colour_map(level)
    if patch is not None:
        patch = np.asarray(patch)
        if patch.shape != heat.shape:
            raise InputError(f"patch of shape {patch.shape} does not match the heat map {heat.shape}")
        alpha = 0.8 * np.clip(level, 0.0, 1.0)[:, :, None]
        rgb = np.rint(alpha * rgb + (1 - alpha) * _grey_rgb(patch, True)).astype(np.uint8)
    return _enlarge(rgb, scale)


def _blend(region: np.ndarray, rgb, alpha: float) -> None:
    region[...] = np.rint((1 - alpha) * region + alpha * np.asarray(rgb, np.float64)).astype(np.uint8)


def _sign(panel: np.ndarray, cx: int, cy: int, half: int, plus: bool) -> None:
    """A ``+`` or ``-`` of arm length ``half`` centred at (cx, cy), light on a dark outline."""
    for colour, grow in ((_SIGN_OUTLINE_RGB, 1), (_SIGN_RGB, 0)):
        t = 2 + grow  # the bars are 2 * t - 1 pixels thick
        a = half + grow
        panel[max(cy - t + 1, 0):cy + t, max(cx - a, 0):cx + a + 1] = colour
        if plus:
            panel[max(cy - a, 0):cy + a + 1, max(cx - t + 1, 0):cx + t] = colour


def feature_panel(feature: ArrayLike, background: ArrayLike | None, scale: int = 10,
                  stretch: bool = True) -> np.ndarray:
    """One feature's rectangles drawn over a grey window, each window pixel ``scale`` x ``scale``.

    Every rectangle is filled with its colour at opacity 0.4 (:data:`POSITIVE_RGB` for a positive
    weight, :data:`NEGATIVE_RGB` for a negative one), outlined 2 pixels wide just inside its edge
    (so neighbouring rectangles keep both outlines), and marked with a ``+`` or ``-`` at its centre
    when it is at least 12 pixels wide and high on screen.

    Parameters
    ----------
    feature : ndarray of int, shape (4, 5)
        Rectangles ``(x, y, width, height, weight)``; weight-0 rows are skipped.
    background : ndarray, shape (H, W)
        Grey window to draw over (for example the mean object patch).
    scale : int, default=10
    stretch : bool, default=True
        Map the background's min..max to 0..255 (a constant background is drawn neutral grey).

    Returns
    -------
    ndarray of uint8, shape (H * scale, W * scale, 3)

    Examples
    --------
    >>> f = np.array([[0, 0, 1, 1, -1], [1, 0, 1, 1, 1], [0] * 5, [0] * 5])
    >>> p = feature_panel(f, np.full((1, 2), 128), scale=4)
    >>> p.shape, p[0, 0].tolist(), p[0, 4].tolist()        # outlines: orange, then blue
    ((4, 8, 3), [230, 159, 0], [0, 114, 178])
    """
    f = np.asarray(feature)
    if f.shape != (4, 5):
        raise InputError(f"a feature must have shape (4, 5), got {f.shape}")
    background = np.asarray(background)
    if background.ndim != 2:
        raise InputError(f"background must be a 2-d grey window, got shape {background.shape}")
    scale = int(scale)
    if scale < 1:
        raise InputError(f"scale must be >= 1, got {scale}")
    height, width = background.shape
    panel = _enlarge(_grey_rgb(background, stretch), scale)
    rects = [(int(x), int(y), int(w), int(h), int(wt)) for x, y, w, h, wt in f if wt != 0]
    for x, y, w, h, wt in rects:
        if x < 0 or y < 0 or w < 1 or h < 1 or x + w > width or y + h > height:
            raise InputError(f"rectangle ({x}, {y}, {w}, {h}) lies outside the {width}x{height} window")
    boxes = [(x * scale, y * scale, (x + w) * scale, (y + h) * scale, wt) for x, y, w, h, wt in rects]
    for x0, y0, x1, y1, wt in boxes:
        _blend(panel[y0:y1, x0:x1], POSITIVE_RGB if wt > 0 else NEGATIVE_RGB, _FILL_ALPHA)
    border = min(_BORDER, max(1, scale // 2))
    for x0, y0, x1, y1, wt in boxes:
        colour = POSITIVE_RGB if wt > 0 else NEGATIVE_RGB
        panel[y0:y0 + border, x0:x1] = colour
        panel[y1 - border:y1, x0:x1] = colour
        panel[y0:y1, x0:x0 + border] = colour
        panel[y0:y1, x1 - border:x1] = colour
    for x0, y0, x1, y1, wt in boxes:
        side = min(x1 - x0, y1 - y0)
        if side >= 12:
            _sign(panel, (x0 + x1 - 1) // 2, (y0 + y1 - 1) // 2, min(8, side // 4), wt > 0)
    return panel


# ----------------------------------------------------------------------------------------------
# pictures: titles, legends and colour bars around the panels


def _figure(width_px: int, height_px: int):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width_px / _DPI, height_px / _DPI), dpi=_DPI, facecolor="white")
    FigureCanvasAgg(fig)
    return fig


def _pixels(fig, width_px: int, height_px: int) -> np.ndarray:
    """Draw the figure and return exactly ``height_px`` x ``width_px`` RGB pixels."""
    fig.canvas.draw()
    rgba = np.asarray(fig.canvas.buffer_rgba())
    out = np.full((height_px, width_px, 3), 255, np.uint8)
    h, w = min(height_px, rgba.shape[0]), min(width_px, rgba.shape[1])
    out[:h, :w] = rgba[:h, :w, :3]
    return out


def _text(fig, x_px, y_px, text, width_px, height_px, **kw):
    """Text at pixel (x, y) measured from the top-left corner."""
    kw.setdefault("color", _TEXT)
    kw.setdefault("va", "top")
    fig.text(x_px / width_px, 1 - y_px / height_px, text, **kw)


def _place(fig, panel: np.ndarray, x_px: int, y_px: int, height_px: int) -> None:
    """Put an RGB panel at pixel (x, y) from the top-left corner, unresampled."""
    fig.figimage(panel, xo=x_px, yo=height_px - y_px - panel.shape[0], origin="upper", zorder=1)


def render_heat_map(heat: ArrayLike, scale: int | None = None, patch: ArrayLike | None = None,
                    title: str = "Where the features look", subtitle: str = "",
                    unit: str = "importance per pixel", gamma: float = HEAT_GAMMA) -> np.ndarray:
    """A picture of a heat map with a title and a colour bar (and the map over a patch, if given).

    Parameters
    ----------
    heat : ndarray of float, shape (H, W)
        For example from :func:`importance_heat_map`.
    scale : int, optional
        Window pixels are shown as ``scale`` x ``scale`` blocks; default :func:`display_scale`.
    patch : ndarray, shape (H, W), optional
        A grey patch (for example the mean object patch); adds a second panel with the heat laid
        over it.
    title, subtitle, unit : str
        Text above the panels (the subtitle may hold several lines), and the colour bar's label.
    gamma : float, default=0.5
        Colour scale exponent (see :func:`heat_map_panel`); the colour bar shows the same scale.

    Returns
    -------
    ndarray of uint8, shape (rows, columns, 3)
        RGB. The panels (from :func:`heat_map_panel`) sit in it pixel for pixel.

    Examples
    --------
    >>> pic = render_heat_map(np.eye(4), scale=10)
    >>> pic.dtype, pic.shape[0] > 40, pic.shape[1] > 40
    (dtype('uint8'), True, True)
    """
    from matplotlib.cm import ScalarMappable
    from matplotlib.colors import PowerNorm

    heat = np.asarray(heat, dtype=np.float64)
    if heat.ndim != 2:
        raise InputError(f"heat must be a 2-d array, got shape {heat.shape}")
    scale = display_scale((heat.shape[1], heat.shape[0])) if scale is None else int(scale)
    vmax = float(heat.max()) if heat.size and heat.max() > 0 else 1.0
    panels = [("heat map over the window", heat_map_panel(heat, scale, vmax, gamma=gamma))]
    if patch is not None:
        panels.append(("over the mean object patch", heat_map_panel(heat, scale, vmax, patch=patch,
                                                                     gamma=gamma)))
    ph, pw = panels[0][1].shape[:2]
    cell = max(pw, 200)
    lines = subtitle.splitlines() if subtitle else []
    left, gap, caption, bar_w, bar_room, bottom = 24, 24, 22, 16, 110, 20
    top = 44 + _LINE * len(lines) + 12
    width = max(left + len(panels) * cell + (len(panels) - 1) * gap + gap + bar_room, 560)
    height = top + caption + max(ph, 120) + bottom
    fig = _figure(width, height)
    _text(fig, left, 12, title, width, height, fontsize=13, weight="bold")
    for n, line in enumerate(lines):
        _text(fig, left, 40 + _LINE * n, line, width, height, fontsize=9, color=_NOTE)
    for n, (name, panel) in enumerate(panels):
        x = left + n * (cell + gap) + (cell - pw) // 2
        _text(fig, x, top, name, width, height, fontsize=9)
        _place(fig, panel, x, top + caption, height)
    bar_x = left + len(panels) * (cell + gap)
    cax = fig.add_axes([bar_x / width, 1 - (top + caption + ph) / height, bar_w / width, ph / height])
    bar = fig.colorbar(ScalarMappable(norm=PowerNorm(gamma, 0.0, vmax), cmap=HEAT_COLOUR_MAP), cax=cax)
    kind = {0.5: "square-root scale", 1.0: "linear scale"}.get(float(gamma), f"power-{gamma:g} scale")
    bar.set_label(f"{unit} ({kind})", fontsize=8, color=_TEXT)
    bar.ax.tick_params(labelsize=7)
    return _pixels(fig, width, height)


def render_top_features(features: ArrayLike, importances: ArrayLike, indices: Sequence[int],
                        window: tuple[int, int], background: ArrayLike | None = None,
                        scale: int | None = None, columns: int = 4,
                        title: str = "Most important features",
                        note: str | None = None) -> np.ndarray:
    """A picture of the given features, one panel each, with rank and importance as titles.

    Parameters
    ----------
    features : ndarray of int, shape (F, 4, 5)
    importances : array_like of float, shape (F,)
        Shown per panel, with each one's share of their total.
    indices : sequence of int
        Features to draw, in rank order (for example :func:`top_features`).
    window : (int, int)
        ``(width, height)`` of the window.
    background : ndarray, shape (height, width), optional
        Grey window under the rectangles (for example :func:`mean_object_patch`), contrast
        stretched; default a neutral grey window.
    scale : int, optional
        Default :func:`display_scale`.
    columns : int, default=4
    title : str
    note : str, optional
        Line(s) under the title saying what the background is; default says which of the two.

    Returns
    -------
    ndarray of uint8, shape (rows, columns, 3)
        RGB, with a legend of the two rectangle colours. Each panel (from :func:`feature_panel`)
        sits in it pixel for pixel.

    Examples
    --------
    >>> f = np.array([[[0, 0, 2, 4, -1], [2, 0, 2, 4, 1], [0] * 5, [0] * 5]])
    >>> pic = render_top_features(f, [1.0], [0], (4, 4), scale=10)
    >>> pic.dtype, pic.ndim
    (dtype('uint8'), 3)
    """
    from matplotlib.patches import Patch

    f = _check_features(features)
    imp = np.asarray(importances, dtype=np.float64)
    if imp.shape != (len(f),):
        raise InputError(f"importances must have shape ({len(f)},), got {imp.shape}")
    indices = [int(i) for i in indices]
    if any(i < 0 or i >= len(f) for i in indices):
        raise InputError(f"feature indices must lie in 0..{len(f) - 1}")
    win_w, win_h = _check_window(window)
    if background is None:
        background = np.full((win_h, win_w), NEUTRAL_GREY, np.float64)
        note = "over a neutral grey window (no mean object patch given)" if note is None else note
    background = np.asarray(background, dtype=np.float64)
    if background.shape != (win_h, win_w):
        raise InputError(f"background of shape {background.shape} does not fit the "
                         f"{win_w}x{win_h} window")
    if note is None:
        note = "over the mean object patch (contrast stretched)"
    scale = display_scale((win_w, win_h)) if scale is None else int(scale)
    total = float(imp.sum())
    ph, pw = win_h * scale, win_w * scale
    columns = max(1, min(int(columns), len(indices) or 1))
    rows = max(1, math.ceil(len(indices) / columns))
    cell_w = max(pw, 190)
    lines = note.splitlines() + ["each panel: rank, feature index, importance (share of the total)"]
    left, gap, caption, bottom = 24, 20, 40, 16
    top = max(44 + _LINE * len(lines) + 16, 84)  # room for the legend at the top right
    width = max(left + columns * cell_w + (columns - 1) * gap + left, 560)
    height = top + rows * (caption + ph) + (rows - 1) * gap + bottom
    fig = _figure(width, height)
    _text(fig, left, 12, title, width, height, fontsize=13, weight="bold")
    for n, line in enumerate(lines):
        _text(fig, left, 40 + _LINE * n, line, width, height, fontsize=9, color=_NOTE)
    handles = [Patch(facecolor=np.r_[POSITIVE_RGB] / 255, edgecolor=np.r_[POSITIVE_RGB] / 255,
                     label="+ positive weight"),
               Patch(facecolor=np.r_[NEGATIVE_RGB] / 255, edgecolor=np.r_[NEGATIVE_RGB] / 255,
                     label="\u2212 negative weight")]
    fig.legend(handles=handles, loc="upper right", bbox_to_anchor=(1 - 12 / width, 1 - 8 / height),
               fontsize=9, frameon=True, edgecolor="#cccccc")
    if not indices:
        _text(fig, left, top, "no feature has an importance above 0", width, height,
              fontsize=10, color=_NOTE)
    for n, i in enumerate(indices):
        r, c = divmod(n, columns)
        x0 = left + c * (cell_w + gap)
        y0 = top + r * (caption + ph + gap)
        x = x0 + (cell_w - pw) // 2
        share = f" ({100 * imp[i] / total:.1f} %)" if total > 0 else ""
        _text(fig, x0 + cell_w / 2, y0, f"#{n + 1}  feature {i}", width, height, fontsize=10,
              weight="bold", ha="center")
        _text(fig, x0 + cell_w / 2, y0 + 18, f"importance {imp[i]:.4g}{share}", width, height,
              fontsize=9, ha="center")
        _place(fig, feature_panel(f[i], background, scale), x, y0 + caption, height)
    return _pixels(fig, width, height)


def write_png(path: str | os.PathLike, image: np.ndarray) -> None:
    """Write an RGB uint8 picture as PNG, atomically (:func:`detector.reporting.drawing.write_png`).

    Examples
    --------
    >>> import tempfile
    >>> p = os.path.join(tempfile.mkdtemp(), "x.png")
    >>> write_png(p, np.zeros((2, 3, 3), np.uint8)); os.path.getsize(p) > 0
    True
    """
    image = np.asarray(image)
    if image.dtype != np.uint8 or image.ndim != 3 or image.shape[2] != 3:
        raise InputError(f"a picture must be uint8 (rows, columns, 3), got {image.dtype} {image.shape}")
    drawing.write_png(path, np.ascontiguousarray(image[:, :, ::-1]))
