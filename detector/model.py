"""The model file: a trained forest with its features and early-exit thresholds, saved and loaded
safely.

One ``.npz`` archive (written by :func:`detector.io.npzfile.save_npz`, deterministic and atomic) that
``numpy.load(path, allow_pickle=False)`` opens:

=====================  =================  =====================================================
array                  dtype, shape       meaning
=====================  =================  =====================================================
``format_version``     int64, ()          5 (files of versions 1 to 4 are read too, see
                                          :func:`load_model`)
``kind``               str, ()            ``"model"``
``window``             int32, (2,)        window width and height in pixels
``features``           int32, (F, 4, 5)   rectangles ``(x0, y0, x1, y1, weight)`` of the
                                          features the trees use: the pixels ``x0 <= x < x1``,
                                          ``y0 <= y < y1`` of the window (corner form; unused
                                          slots all zero)
``feature_channels``   int8, (F,)         the channel each feature reads (0 grey, 1..7 the
                                          gradient channels of :mod:`detector.features`, 8
                                          the gradient magnitude not contrast-normalised);
                                          absent: all grey (format 1; optional)
``node_features``      int32, (T, 2**D-1) index into ``features``, heap order
``node_thresholds``    float32, (T, 2**D-1)  go left when ``value <= threshold``
``leaf_values``        float32, (T, 2**D)    added to the running score
``exit_thresholds``    float32, (T,)      drop a window after tree t when ``s_t < exit[t]``
                                          (``-inf``: never)
``exit_levels``        float32, (L,)      score thresholds (0..1, rising) that have exit
                                          thresholds of their own (optional)
``exit_table``         float32, (L, T)    row l: the exit thresholds for a scan whose threshold is
                                          at least ``exit_levels[l]`` (optional)
``feature_importances``  float64, (F,)    summed impurity decrease per feature (optional)
``mode``               str, ()            ``"bagged"`` or ``"boosted"``
``normalize``          bool, ()           per-window contrast normalisation of the features
``margin``             float64, ()        context margin of the patches, a fraction of the object
                                          box on every side: the scan reports the window shrunk
                                          by it
``score_temperature``  float64, ()        temperature of the boosted score (> 0; 1 for bagged)
``exit_min_sigma``     float64, ()        the contrast gate: windows whose grey-level standard
                                          deviation is below it are dropped before any tree
``object_range``       float64, (2,)      shorter side of the smallest and the largest labelled
                                          training object, pixels: the object sizes a scan looks
                                          for by default (optional)
``metadata``           str, ()            JSON: parameters, bank hash, training figures, date,
                                          library versions (only reported: nothing the scan
                                          computes with)
=====================  =================  =====================================================

Versions 1 (grey features) and 2 (with ``feature_channels``) kept ``margin``,
``score_temperature`` and ``exit_min_sigma`` in the metadata JSON (and the object range in the
bank's harvest record there); :func:`load_model` converts them to the typed values of version 3.
Versions 1 to 3 stored each rectangle as ``(x, y, width, height, weight)``; version 4 stores its
corners, and :func:`load_model` converts the older form (``x1 = x + width``, exact). Version 5
added the edge-strength channel (code 8): a version-4 patchwood refuses the newer files rather than
scan code 8 as something else. In memory
(:class:`Model`, :mod:`detector.features`) a rectangle is ``(x, y, width, height, weight)``, the
form the feature enumeration and the scan plans compute with; only the file holds corners.

See :mod:`detector.forest` for the tree layout, the running score and the final score.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import os
from dataclasses import dataclass, field

import numpy as np

from detector._validation import json_safe
from detector.io import npzfile
from detector.errors import InputError
from detector.features import MAX_WINDOW_SIDE, MIN_WINDOW_SIDE, from_corners, to_corners
from detector.forest import (MODES, FlatForest, final_score, forest_leaf_scores,
                             forest_running_scores, tree_depth)

__all__ = ["FORMAT_VERSION", "CHANNELS_FORMAT_VERSION", "Model", "MODEL_SPEC", "describe", "exit_budget_of",
           "save_model", "load_model", "training_date", "library_versions", "model_arrays", "metadata_text",
           "metadata_sha256", "old_format_note", "CORNERS_FORMAT_VERSION",
           "EDGE_STRENGTH_FORMAT_VERSION", "edge_strength_note"]

#: Version 3 keeps the values the scan computes with (margin, temperature, contrast gate) as typed
#: arrays instead of metadata JSON; version 4 stores rectangles by their corners.
FORMAT_VERSION = 5
#: The first version whose rectangles are ``(x0, y0, x1, y1, weight)``.
CORNERS_FORMAT_VERSION = 4
#: Files with channel features (``feature_channels``) are version 2 or later, so that a patchwood
#: that does not know channels refuses them instead of scanning their features as grey ones.
CHANNELS_FORMAT_VERSION = 2
#: Files with edge-strength features (channel code 8) are version 5 or later.
EDGE_STRENGTH_FORMAT_VERSION = 5
#: The versions before 3, whose scan settings :func:`load_model` takes from the metadata.
METADATA_SETTINGS_VERSIONS = (1, CHANNELS_FORMAT_VERSION)
READ_VERSIONS = (*METADATA_SETTINGS_VERSIONS, 3, CORNERS_FORMAT_VERSION, FORMAT_VERSION)
#: The scan settings: model array (and metadata key before version 3) -> default.
SCAN_SETTINGS = {"margin": 0.0, "score_temperature": 1.0, "exit_min_sigma": 0.0}

MODEL_SPEC = {
    "format_version": npzfile.ArraySpec("integer", ()),
    "kind": npzfile.ArraySpec("str", ()),
    "window": npzfile.ArraySpec("int32", (2,)),
    "features": npzfile.ArraySpec("int32", ("F", 4, 5)),
    "feature_channels": npzfile.ArraySpec("int8", ("F",), required=False),
    "node_features": npzfile.ArraySpec("int32", ("T", "nodes")),
    "node_thresholds": npzfile.ArraySpec("float32", ("T", "nodes")),
    "leaf_values": npzfile.ArraySpec("float32", ("T", "leaves")),
    "exit_thresholds": npzfile.ArraySpec("float32", ("T",)),
    "exit_levels": npzfile.ArraySpec("float32", ("L",), required=False),
    "exit_table": npzfile.ArraySpec("float32", ("L", "T"), required=False),
    "feature_importances": npzfile.ArraySpec("float64", ("F",), required=False),
    "mode": npzfile.ArraySpec("str", ()),
    "normalize": npzfile.ArraySpec("bool", ()),
    "margin": npzfile.ArraySpec("float64", (), required=False),
    "score_temperature": npzfile.ArraySpec("float64", (), required=False),
    "exit_min_sigma": npzfile.ArraySpec("float64", (), required=False),
    "object_range": npzfile.ArraySpec("float64", (2,), required=False),
    "metadata": npzfile.ArraySpec("str", ()),
}


def training_date() -> str:
    """UTC day ``YYYY-MM-DD`` for the metadata; ``SOURCE_DATE_EPOCH`` wins when set.

    ``SOURCE_DATE_EPOCH`` (seconds since 1970-01-01 UTC) is the reproducible-builds.org convention,
    so that the same seed and bank give byte-identical model files on any day.

    Examples
    --------
    >>> os.environ["SOURCE_DATE_EPOCH"] = "0"; training_date()
    '1970-01-01'
    >>> del os.environ["SOURCE_DATE_EPOCH"]
    """
    value = os.environ.get("SOURCE_DATE_EPOCH")
    if value is not None and value.strip():
        try:
            seconds = int(value.strip())
            when = _dt.datetime.fromtimestamp(seconds, tz=_dt.timezone.utc)
        except (ValueError, OverflowError, OSError):
            raise InputError(f"SOURCE_DATE_EPOCH must be whole seconds since 1970, got {value!r}") from None
    else:
        when = _dt.datetime.now(tz=_dt.timezone.utc)
    return when.strftime("%Y-%m-%d")


library_versions = npzfile.library_versions


@dataclass
class Model:
    """A trained detector: window, features, flat trees, early-exit thresholds, metadata.

    Attributes
    ----------
    window : tuple of int
        ``(width, height)`` in pixels.
    features : ndarray of int32, shape (F, 4, 5)
        The features the trees use.
    node_features, node_thresholds, leaf_values : ndarray
        The flat trees (see :mod:`detector.forest`); ``node_features`` index ``features``.
    exit_thresholds : ndarray of float32, shape (T,)
        The exits that keep the calibration objects at any score.
    mode : {"bagged", "boosted"}
    normalize : bool
    metadata : dict
    feature_importances : ndarray of float64, shape (F,), optional
    exit_levels : ndarray of float32, shape (L,), optional
    exit_table : ndarray of float32, shape (L, T), optional
        Exits for scans at a given score threshold or above (see :meth:`exits_for`).
    feature_channels : ndarray of int8, shape (F,), optional
        The channel each feature reads (:mod:`detector.features`); None (or all 0): grey only.
    margin : float >= 0
        Context margin of the training patches, a fraction of the object box on every side: the
        scan reports a window shrunk by it (:func:`detector.geometry.window_box_to_object_box`).
    temperature : float > 0
        Temperature of the boosted score (:func:`detector.cascade.fit_temperature`; 1.0 for
        bagged forests).
    exit_min_sigma : float >= 0
        The contrast gate: windows whose grey-level standard deviation is below it are dropped
        before any tree (0 = no gate; always 0 without contrast normalisation).
    object_range : ndarray of float64, shape (2,), optional
        Shorter side of the smallest and the largest labelled training object in pixels (see
        :func:`detector.harvest.object_sizes`): what a scan looks for by default. None: unknown.

    Examples
    --------
    >>> m = Model((2, 2), np.array([[[0, 0, 2, 1, -1], [0, 1, 2, 1, 1]] + [[0] * 5] * 2], np.int32),
    ...           [[0]], [[0.0]], [[0.0, 1.0]], [-np.inf], "bagged", normalize=False)
    >>> m.score(np.array([[[9, 9], [1, 1]], [[1, 1], [9, 9]]], np.uint8)).tolist()   # -(18)+2, -2+18
    [0.0, 1.0]
    """

    window: tuple[int, int]
    features: np.ndarray
    node_features: np.ndarray
    node_thresholds: np.ndarray
    leaf_values: np.ndarray
    exit_thresholds: np.ndarray
    mode: str = "bagged"
    normalize: bool = True
    metadata: dict = field(default_factory=dict)
    feature_importances: np.ndarray | None = None
    exit_levels: np.ndarray | None = None
    exit_table: np.ndarray | None = None
    feature_channels: np.ndarray | None = None
    margin: float = 0.0
    temperature: float = 1.0
    exit_min_sigma: float = 0.0
    object_range: np.ndarray | None = None
    #: The format version of the file the model was read from (None: not read from a file).
    file_version: int | None = field(default=None, compare=False)

    def __post_init__(self):
        self.window = tuple(int(v) for v in self.window)
        self.features = np.ascontiguousarray(self.features, dtype=np.int32)
        self.node_features = np.ascontiguousarray(self.node_features, dtype=np.int32)
        self.node_thresholds = np.ascontiguousarray(self.node_thresholds, dtype=np.float32)
        self.leaf_values = np.ascontiguousarray(self.leaf_values, dtype=np.float32)
        self.exit_thresholds = np.ascontiguousarray(self.exit_thresholds, dtype=np.float32)
        self.normalize = bool(self.normalize)
        if self.feature_importances is not None:
            self.feature_importances = np.ascontiguousarray(self.feature_importances, dtype=np.float64)
        if (self.exit_levels is None) != (self.exit_table is None):
            raise ValueError("exit_levels and exit_table go together")
        if self.exit_levels is not None:
            self.exit_levels = np.ascontiguousarray(self.exit_levels, dtype=np.float32).reshape(-1)
            self.exit_table = np.ascontiguousarray(self.exit_table, dtype=np.float32).reshape(
                len(self.exit_levels), -1)
        if self.mode not in MODES:
            raise ValueError(f"mode must be one of {MODES}, got {self.mode!r}")
        if self.feature_channels is not None:
            channels = np.ascontiguousarray(self.feature_channels, dtype=np.int8).reshape(-1)
            if len(channels) != len(self.features):
                raise ValueError("feature_channels needs one channel per feature")
            self.feature_channels = channels if channels.any() else None
        self.margin, self.temperature = float(self.margin), float(self.temperature)
        self.exit_min_sigma = float(self.exit_min_sigma) if self.normalize else 0.0
        if not (math.isfinite(self.margin) and self.margin >= 0):
            raise ValueError(f"margin must be a number >= 0, got {self.margin!r}")
        if not (math.isfinite(self.temperature) and self.temperature > 0):
            raise ValueError(f"temperature must be a number > 0, got {self.temperature!r}")
        if not (math.isfinite(self.exit_min_sigma) and self.exit_min_sigma >= 0):
            raise ValueError(f"exit_min_sigma must be a number >= 0, got {self.exit_min_sigma!r}")
        if self.object_range is not None:
            self.object_range = np.asarray(self.object_range, dtype=np.float64).reshape(2)
            if not _object_range_ok(self.object_range):
                raise ValueError("object_range must be two sizes > 0, the smaller first, "
                                 f"got {self.object_range.tolist()}")

    @classmethod
    def from_forest(cls, window, pool, forest: FlatForest, exit_thresholds=None, *, normalize=True,
                    metadata=None, pool_channels=None, margin: float = 0.0,
                    temperature: float = 1.0, exit_min_sigma: float = 0.0) -> "Model":
        """Model from a forest grown on a feature pool: keeps only the features the trees use.

        Parameters
        ----------
        window : (int, int)
        pool : ndarray of int32, shape (P, 4, 5)
            The pool ``forest.node_features`` index.
        forest : FlatForest
        exit_thresholds : ndarray of float32, shape (T,), optional
            Default ``-inf`` (never exit).
        normalize : bool
        metadata : dict, optional
        pool_channels : ndarray of int8, shape (P,), optional
        margin, temperature, exit_min_sigma : float
            The scan settings (see :class:`Model`).
        """
        used, small = forest.reindex()
        exits = np.full(small.n_trees, -np.inf, np.float32) if exit_thresholds is None else exit_thresholds
        channels = None if pool_channels is None else np.asarray(pool_channels)[used]
        return cls(window, np.asarray(pool)[used], small.node_features, small.node_thresholds,
                   small.leaf_values, exits, small.mode, normalize, dict(metadata or {}),
                   small.importances, feature_channels=channels, margin=margin,
                   temperature=temperature, exit_min_sigma=exit_min_sigma)

    def exits_for(self, threshold: float) -> np.ndarray:
        """The exit thresholds for a scan that keeps scores of at least ``threshold``.

        A window the scan reports must end at or above the threshold, so the exits need only keep
        the calibration objects that do (direct backward pruning; Zhang and Viola, NIPS 2007): the
        row of ``exit_table`` with the highest level not above ``threshold``, or
        ``exit_thresholds`` (every calibration object) when there is none.

        Examples
        --------
        >>> m = Model((2, 2), np.array([[[0, 0, 2, 1, -1], [0, 1, 2, 1, 1]] + [[0] * 5] * 2], np.int32),
        ...           [[0]], [[0.0]], [[0.0, 1.0]], [-np.inf], "bagged", normalize=False,
        ...           exit_levels=[0.5], exit_table=[[1.0]])
        >>> m.exits_for(0.3).tolist(), m.exits_for(0.5).tolist()
        ([-inf], [1.0])
        """
        if self.exit_levels is None:
            return self.exit_thresholds
        row = int(np.searchsorted(self.exit_levels, np.float32(threshold), side="right")) - 1
        return self.exit_thresholds if row < 0 else self.exit_table[row]

    @property
    def n_trees(self) -> int:
        return len(self.node_features)

    @property
    def depth(self) -> int:
        return tree_depth(self.node_features)

    @property
    def forest(self) -> FlatForest:
        """The trees as a :class:`detector.forest.FlatForest` (indices into ``features``)."""
        return FlatForest(self.mode, self.node_features, self.node_thresholds, self.leaf_values,
                          importances=self.feature_importances)

    def feature_values(self, patches) -> np.ndarray:
        """Values of the model's features on patches (N, h, w): float32 (N, F)."""
        from detector.features import evaluate_features

        patches = np.asarray(patches)
        if patches.ndim != 3 or patches.shape[1:] != (self.window[1], self.window[0]):
            raise InputError(
                f"patches of shape {patches.shape[1:]} do not fit the model's window "
                f"{self.window[0]}x{self.window[1]} (width x height)"
            )
        return evaluate_features(self.features, patches, normalize=self.normalize,
                                 channels=self.feature_channels)

    def running_scores(self, patches) -> np.ndarray:
        """Running scores after each tree, float64 (N, T) (no early exit)."""
        return forest_running_scores(self, self.feature_values(patches))

    def leaf_scores(self, patches) -> np.ndarray:
        """The leaf value each patch gets from each tree, float32 (N, T)."""
        return forest_leaf_scores(self, self.feature_values(patches))

    def score(self, patches) -> np.ndarray:
        """Scores in 0..1 of patches (N, h, w), without early exit: float64 (N,)."""
        return final_score(self.mode, self.running_scores(patches)[:, -1], self.n_trees,
                           self.temperature)

    @property
    def object_sizes(self) -> dict | None:
        """The object sizes a scan looks for by default: ``smallest`` and ``largest`` shorter side
        of the training objects (:attr:`object_range`) and ``window_object_side``, the object
        side the window itself holds at scale 1 (its shorter side less the context margin), in
        pixels; None for a model that does not know its objects' sizes."""
        if self.object_range is None:
            return None
        return {"smallest": float(self.object_range[0]), "largest": float(self.object_range[1]),
                "window_object_side": min(self.window) / (1.0 + 2.0 * self.margin)}

    def summary(self) -> list[str]:
        """Human-readable lines: window, mode, trees, features, OOB error, early exit, date, bank
        (the facts of :func:`describe`).

        Examples
        --------
        >>> m = Model((24, 24), np.zeros((1, 4, 5), np.int32), [[0]], [[0.0]], [[0.0, 1.0]],
        ...           [-np.inf], "bagged", metadata={"date": "2025-01-02"})
        >>> m.summary()[0]
        'window: 24 x 24 pixels (width x height)'
        """
        d = describe(self)
        kind = "random forest (bagged)" if self.mode == "bagged" else "Gentle AdaBoost (boosted)"
        lines = [
            f"window: {d['window']['width']} x {d['window']['height']} pixels (width x height)",
            f"trees: {d['trees']} of depth {d['depth']}, {kind}",
        ]
        pool = d["pool"]
        used = f"features used: {d['features_used']}"
        lines.append(used + (f" of a pool of {_plain(pool)}" if pool else "") +
                     f" ({'contrast-normalised' if d['normalize'] else 'raw'} values"
                     + edge_strength_note(d) + ")")
        oob = d["training"]["oob_error"]
        lines.append("out-of-bag error: " + ("n/a" if oob is None else f"{100 * oob:.2f} %"))
        ee = d["early_exit"]
        cal = ee["calibration"]
        text = f"early exit: {ee['trees_with_exit']} of {d['trees']} trees have an exit threshold"
        budget = exit_budget_of(cal)
        if budget is not None:
            text += (f", calibrated to give up at most {_plain(round(100 * budget, 6))} % of "
                     f"{_plain(_real(cal.get('objects')) or 0)} held-out objects")
        if ee["levels"]:
            text += (f"; tighter exits for scan thresholds from {ee['levels'][0]:g} "
                     f"to {ee['levels'][-1]:g}")
        lines.append(text)
        gate = d["scan"]["exit_min_sigma"]
        if gate:
            lines.append(f"contrast gate: windows with a grey-level standard deviation below "
                         f"{gate:.1f} are dropped before any tree")
        objects = _real(cal.get("mean_trees_objects"))
        if objects is not None:
            background = _real(cal.get("mean_trees_background"))
            lines.append(
                f"mean trees evaluated per window: objects {objects:.1f}, "
                f"background {math.nan if background is None else background:.1f}"
            )
        bank = d["training"]["bank_sha256"]
        date = d["training"]["date"]
        lines.append(f"trained: {date if isinstance(date, str) and date else 'unknown date'}"
                     + (f", bank sha256 {bank[:12]}" if isinstance(bank, str) and bank else ""))
        return lines


def describe(model: Model) -> dict:
    """The facts of a model a person checks first, as one JSON-ready dict: the one describer that
    :meth:`Model.summary` (and ``patchwood inspect``'s report) show.

    Returns
    -------
    dict
        ``window`` (``width``, ``height``), ``mode``, ``method``, ``trees``, ``depth``, ``splits``
        (real split nodes), ``features_used``, ``pool``, ``features_per_node``, ``normalize``,
        ``edge_strength_features`` (features on channel code 8),
        ``scan`` (the typed values the scan computes with: ``margin``, ``score_temperature``,
        ``exit_min_sigma``, ``object_range``), ``early_exit`` (``trees_with_exit``, ``first_exit_after_tree``,
        ``levels``, ``calibration``: the calibration record as stored) and ``training``
        (``date``, ``parameters``, ``bank_sha256``, ``bank_counts``, ``patches``, ``oob_error``,
        ``mining``, ``versions``). A hand-edited metadata record may hold anything: what does not
        make sense is None or empty.

    Examples
    --------
    >>> m = Model((24, 24), np.zeros((1, 4, 5), np.int32), [[0]], [[0.0]], [[0.0, 1.0]],
    ...           [-np.inf], "bagged", metadata={"date": "2025-01-02", "oob_error": "?"})
    >>> d = describe(m)
    >>> d["trees"], d["depth"], d["splits"], d["early_exit"]["trees_with_exit"]
    (1, 1, 1, 0)
    >>> d["training"]["oob_error"], d["scan"]
    (None, {'margin': 0.0, 'score_temperature': 1.0, 'exit_min_sigma': 0.0, 'object_range': None})
    """
    md = _mapping(model.metadata)
    params = _mapping(md.get("parameters"))
    bank = _mapping(md.get("bank"))
    exits = np.isfinite(model.exit_thresholds)
    levels = [] if model.exit_levels is None else [float(v) for v in model.exit_levels]
    versions = md.get("versions")
    return json_safe({
        "window": {"width": int(model.window[0]), "height": int(model.window[1])},
        "mode": model.mode,
        "method": "random forest" if model.mode == "bagged" else "Gentle AdaBoost",
        "trees": model.n_trees,
        "depth": model.depth,
        "splits": int(model.forest.split_mask.sum()),
        "features_used": int(len(model.features)),
        "pool": _real(md.get("pool_drawn")) or _real(params.get("pool")),
        "features_per_node": md.get("features_per_node", params.get("features_per_node")),
        "normalize": bool(model.normalize),
        "edge_strength_features": _edge_strength_count(model),
        "scan": {"margin": model.margin, "score_temperature": model.temperature,
                 "exit_min_sigma": model.exit_min_sigma, "object_range": model.object_range},
        "early_exit": {
            "trees_with_exit": int(exits.sum()),
            "first_exit_after_tree": int(np.argmax(exits)) + 1 if exits.any() else None,
            "levels": levels,
            "calibration": _mapping(md.get("calibration")),
        },
        "training": {
            "date": md.get("date"),
            "parameters": params,
            "bank_sha256": md.get("bank_sha256") or bank.get("sha256"),
            "bank_counts": bank.get("counts"),
            "patches": md.get("patches"),
            "oob_error": _real(md.get("oob_error")),
            "mining": md.get("mining") if isinstance(md.get("mining"), list) else [],
            "versions": versions if isinstance(versions, dict) else {},
        },
    })


def _edge_strength_count(model) -> int:
    """How many of the model's features are edge-strength features (channel code 8)."""
    from detector.features import EDGE_STRENGTH

    channels = model.feature_channels
    return 0 if channels is None else int((np.asarray(channels) == EDGE_STRENGTH).sum())


def edge_strength_note(d: dict) -> str:
    """``"; N of edge strength, not normalised"`` for a :func:`describe` (or an inspection report)
    with any, else "": what ``train``'s and ``inspect``'s features lines add."""
    n = d.get("edge_strength_features") or 0
    return f"; {n} of edge strength, not normalised" if n and d["normalize"] else ""


def _mapping(value) -> dict:
    return value if isinstance(value, dict) else {}


def _real(value) -> float | None:
    """A finite number from the metadata, else None."""
    return value if _is_real(value) else None


def _plain(value: float) -> str:
    """A count as a whole number (20000), anything else as Python writes it (0.995)."""
    return str(int(value)) if float(value).is_integer() and abs(value) < 2**53 else str(value)


def metadata_text(model: Model) -> str:
    """The model's metadata as the model file stores it: JSON, keys sorted, no NaN."""
    return json.dumps(json_safe(model.metadata), sort_keys=True, allow_nan=False)


def metadata_sha256(model: Model) -> str:
    """Hex SHA-256 (FIPS 180-4) of :func:`metadata_text`: names the training (parameters, bank
    hash, figures, date) whatever file the model was copied to.

    >>> m = Model((2, 2), np.array([[[0, 0, 1, 2, -1], [1, 0, 1, 2, 1]] + [[0] * 5] * 2], np.int32),
    ...           [[0]], [[0.0]], [[0.0, 1.0]], [-np.inf], "bagged", metadata={"seed": 1})
    >>> metadata_sha256(m) == __import__("hashlib").sha256(b'{"seed": 1}').hexdigest()
    True
    """
    import hashlib

    return hashlib.sha256(metadata_text(model).encode("utf-8")).hexdigest()


def exit_budget_of(calibration: dict) -> float | None:
    """The exit budget a model's calibration record states: ``exit_budget``, or, in models
    trained before the budget had that name, ``1 - exit_recall``; None when neither is a number.

    >>> exit_budget_of({"exit_budget": 0.01}), exit_budget_of({"exit_recall": 0.995})
    (0.01, 0.005)
    """
    budget = _real(calibration.get("exit_budget"))
    if budget is None:
        recall = _real(calibration.get("exit_recall"))
        budget = None if recall is None else round(1.0 - recall, 12)
    return budget


def model_arrays(model: Model) -> dict[str, np.ndarray]:
    """The arrays of the model file (see the module docstring)."""
    arrays = {
        **npzfile.header_arrays("model", FORMAT_VERSION, model.window),
        "features": to_corners(model.features),
        "node_features": model.node_features,
        "node_thresholds": model.node_thresholds,
        "leaf_values": model.leaf_values,
        "exit_thresholds": model.exit_thresholds,
        "mode": np.array(model.mode),
        "normalize": np.array(model.normalize, dtype=bool),
        "margin": np.array(model.margin, dtype=np.float64),
        "score_temperature": np.array(model.temperature, dtype=np.float64),
        "exit_min_sigma": np.array(model.exit_min_sigma, dtype=np.float64),
        "metadata": np.array(metadata_text(model)),
    }
    if model.feature_importances is not None:
        arrays["feature_importances"] = model.feature_importances
    if model.feature_channels is not None:
        arrays["feature_channels"] = model.feature_channels
    if model.object_range is not None:
        arrays["object_range"] = model.object_range
    if model.exit_levels is not None:
        arrays["exit_levels"] = model.exit_levels
        arrays["exit_table"] = model.exit_table
    return arrays


def save_model(path: str | os.PathLike, model: Model) -> None:
    """Write the model file (deterministic bytes, atomic replace).

    Examples
    --------
    >>> import tempfile
    >>> p = os.path.join(tempfile.mkdtemp(), "m.npz")
    >>> m = Model((4, 4), np.array([[[0, 0, 2, 4, -1], [2, 0, 2, 4, 1]] + [[0] * 5] * 2], np.int32),
    ...           [[0]], [[0.0]], [[0.0, 1.0]], [-np.inf], "bagged")
    >>> save_model(p, m); load_model(p).window
    (4, 4)
    """
    arrays = model_arrays(model)
    validate_model(dict(arrays), path)
    npzfile.save_npz(path, arrays)


def file_features(a: dict[str, np.ndarray]) -> np.ndarray:
    """The rectangles of a model file's arrays in the in-memory form ``(x, y, width, height,
    weight)``: converted from the corners of format 4 and later, as they are before."""
    if int(a["format_version"]) >= CORNERS_FORMAT_VERSION:
        return from_corners(a["features"])
    return np.asarray(a["features"])


def validate_model(a: dict[str, np.ndarray], path: str | os.PathLike) -> tuple[dict, dict]:
    """Check a model's arrays beyond dtypes and shapes; returns the parsed metadata and the scan
    settings (:data:`SCAN_SETTINGS`: from the arrays, or from the metadata before version 3)."""
    sizes = npzfile.check_arrays(a, MODEL_SPEC, path, kind="model")
    t, nodes, leaves, n_features = sizes["T"], sizes["nodes"], sizes["leaves"], sizes["F"]
    if t < 1:
        raise InputError("model has no trees", path=path)
    if nodes < 1 or (nodes + 1) & nodes or leaves != nodes + 1:
        raise InputError(f"model trees have {nodes} nodes and {leaves} leaves; a tree of depth D "
                         "has 2**D - 1 nodes and 2**D leaves", path=path)
    if n_features < 1:
        raise InputError("model has no features", path=path)
    width, height = (int(v) for v in a["window"])
    if width < 1 or height < 1:
        raise InputError(f"model window {width}x{height} is empty", path=path)
    if not (MIN_WINDOW_SIDE <= width <= MAX_WINDOW_SIDE
            and MIN_WINDOW_SIDE <= height <= MAX_WINDOW_SIDE):
        raise InputError(f"model window {width}x{height} is outside the sides a window may have "
                         f"({MIN_WINDOW_SIDE}..{MAX_WINDOW_SIDE} pixels, as harvest allows)",
                         path=path)
    nf = a["node_features"]
    if nf.min() < 0 or nf.max() >= n_features:
        raise InputError(f"model node feature index out of range (0..{n_features - 1}): "
                         f"{int(nf.min() if nf.min() < 0 else nf.max())}", path=path)
    if not np.isfinite(a["node_thresholds"]).all():
        raise InputError("model node thresholds must be finite", path=path)
    if not np.isfinite(a["leaf_values"]).all():
        raise InputError("model leaf values must be finite", path=path)
    ex = a["exit_thresholds"]
    if np.isnan(ex).any() or np.isposinf(ex).any():
        raise InputError("model exit thresholds must be finite or -inf", path=path)
    f = file_features(a).astype(np.int64)
    used = f[:, :, 4] != 0
    if (f[~used] != 0).any():
        raise InputError("model feature has a rectangle with weight 0 that is not all zeros", path=path)
    if not used.any(axis=1).all():
        raise InputError("model feature has no rectangle", path=path)
    r = f[used]
    if ((r[:, 0] < 0) | (r[:, 1] < 0) | (r[:, 2] < 1) | (r[:, 3] < 1)
            | (r[:, 0] + r[:, 2] > width) | (r[:, 1] + r[:, 3] > height)).any():
        raise InputError(f"model feature rectangle lies outside the {width}x{height} window", path=path)
    if ("exit_levels" in a) != ("exit_table" in a):
        raise InputError("model arrays 'exit_levels' and 'exit_table' must come together", path=path)
    if "exit_levels" in a:
        levels, table = a["exit_levels"], a["exit_table"]
        if not np.isfinite(levels).all() or (levels < 0).any() or (levels > 1).any() \
                or (np.diff(levels) <= 0).any():
            raise InputError("model exit levels must be scores in 0..1, rising", path=path)
        if np.isnan(table).any() or np.isposinf(table).any():
            raise InputError("model exit table must be finite or -inf", path=path)
    if "feature_channels" in a:
        from detector.features import EDGE_STRENGTH, N_FEATURE_CHANNELS

        channels = a["feature_channels"]
        if channels.min() < 0 or channels.max() >= N_FEATURE_CHANNELS:
            raise InputError(f"model feature channels must be in 0..{N_FEATURE_CHANNELS - 1}",
                             path=path)
        if int(a["format_version"]) < CHANNELS_FORMAT_VERSION:
            raise InputError(f"model array 'feature_channels' needs format version "
                             f"{CHANNELS_FORMAT_VERSION}", path=path)
        if (channels == EDGE_STRENGTH).any() and \
                int(a["format_version"]) < EDGE_STRENGTH_FORMAT_VERSION:
            raise InputError(f"model feature channel {EDGE_STRENGTH} (edge strength) needs format "
                             f"version {EDGE_STRENGTH_FORMAT_VERSION}", path=path)
    if "feature_importances" in a and not np.isfinite(a["feature_importances"]).all():
        raise InputError("model feature importances must be finite", path=path)
    mode = str(a["mode"])
    if mode not in MODES:
        raise InputError(f"model mode {mode!r} is not one of {', '.join(MODES)}", path=path)
    try:
        metadata = json.loads(str(a["metadata"]))
    except (json.JSONDecodeError, RecursionError):
        raise InputError("model metadata is not valid JSON", path=path) from None
    if not isinstance(metadata, dict):
        raise InputError("model metadata is not a JSON object", path=path)
    if mode == "bagged":
        leaves = a["leaf_values"]
        if leaves.min() < 0 or leaves.max() > 1:
            raise InputError("bagged model leaf values must be object fractions in 0..1", path=path)
    # the values the scan computes with (the rest of the metadata is only reported)
    version = int(a["format_version"])
    if version in METADATA_SETTINGS_VERSIONS:
        where, settings = "metadata", {k: metadata.pop(k, v) for k, v in SCAN_SETTINGS.items()}
        # the bank's record of the labelled sizes (a hand-edited one that makes no sense: unknown)
        sizes = _mapping(_mapping(_mapping(metadata.get("bank")).get("harvest")).get("object_sizes"))
        pair = [sizes.get("smallest"), sizes.get("largest")]
        settings["object_range"] = (np.array(pair, np.float64)
                                    if all(_is_real(v) for v in pair)
                                    and _object_range_ok(np.array(pair, np.float64)) else None)
    else:
        missing = [k for k in SCAN_SETTINGS if k not in a]
        if missing:
            raise InputError(f"model array {missing[0]!r} is missing (format version {version} "
                             "needs it)", path=path)
        where, settings = "array", {k: a[k].item() for k in SCAN_SETTINGS}
        settings["object_range"] = a.get("object_range")
        if settings["object_range"] is not None and not _object_range_ok(settings["object_range"]):
            raise InputError("model array 'object_range' must hold two sizes > 0, the smaller "
                             "first", path=path)
    margin, temperature, gate = (settings[k] for k in SCAN_SETTINGS)
    if not _is_real(margin) or margin < 0:
        raise InputError(f"model {where} 'margin' must be a number >= 0, got {_shown(margin)}",
                         path=path)
    if min(width, height) / (1.0 + 2.0 * margin) < 1.0:
        raise InputError(f"model {where} 'margin' {margin:g} leaves less than one pixel of the "
                         f"object in the {width}x{height} window", path=path)
    if not _is_real(temperature) or temperature <= 0:
        raise InputError(f"model {where} 'score_temperature' must be a number > 0, got "
                         f"{_shown(temperature)}", path=path)
    if not _is_real(gate) or gate < 0:
        raise InputError(f"model {where} 'exit_min_sigma' must be a number >= 0, got "
                         f"{_shown(gate)}", path=path)
    return metadata, settings


def _object_range_ok(pair: np.ndarray) -> bool:
    """Two finite sizes > 0, the smaller first."""
    return bool(np.isfinite(pair).all() and pair[0] > 0 and pair[0] <= pair[1])


def _is_real(value) -> bool:
    """A finite JSON number (not a boolean)."""
    return (isinstance(value, (int, float)) and not isinstance(value, bool)
            and math.isfinite(value))


def _shown(value) -> str:
    """A metadata value, shortened for a one-line message."""
    text = json.dumps(value)
    return text if len(text) <= 40 else text[:37] + "..."


def load_model(path: str | os.PathLike, data: bytes | None = None) -> Model:
    """Read and validate a model file; every problem is one :class:`InputError` naming the file.

    Refuses: a file that is not an ``.npz`` archive or is truncated or damaged, object arrays
    (never unpickled), a patch bank or other file given instead of a model, an unknown format
    version, missing arrays, wrong dtypes or shapes, inconsistent tree sizes, node feature indices
    out of range, rectangles outside the window, non-finite thresholds or leaf values. With
    ``data``, the file's bytes are read instead of ``path`` (which names them in messages).

    Examples
    --------
    >>> load_model("no/such/model.npz")
    Traceback (most recent call last):
    ...
    detector.errors.InputError: no/such/model.npz: no such model file
    """
    a = npzfile.read_npz(path, kind="model", spec=MODEL_SPEC, data=data)
    kind = a.get("kind")
    if kind is not None and kind.dtype.kind == "U" and kind.ndim == 0 and str(kind) != "model":
        if str(kind) == "patch-bank":
            raise InputError("this is a patch bank, not a model (train one with "
                             "`patchwood train BANK.npz --out MODEL.npz`)", path=path)
        raise InputError(f"this file holds a {str(kind)[:40]!r}, not a model", path=path)
    if kind is None and "node_features" not in a and "patches" in a:
        raise InputError("this looks like a patch bank, not a model", path=path)
    version = a.get("format_version")
    if version is None:
        raise InputError("not a model file: array 'format_version' is missing", path=path)
    if version.ndim != 0 or version.dtype.kind not in "iu":
        raise InputError("model array 'format_version' must be one integer", path=path)
    if int(version) not in READ_VERSIONS:
        raise InputError(f"unsupported model format version {int(version)} (this patchwood reads "
                         f"{', '.join(map(str, READ_VERSIONS[:-1]))} and {READ_VERSIONS[-1]}; "
                         "train the model again with `patchwood train`)", path=path)
    metadata, settings = validate_model(a, path)
    return Model(
        window=tuple(int(v) for v in a["window"]),
        features=file_features(a),
        node_features=a["node_features"],
        node_thresholds=a["node_thresholds"],
        leaf_values=a["leaf_values"],
        exit_thresholds=a["exit_thresholds"],
        mode=str(a["mode"]),
        normalize=bool(a["normalize"]),
        metadata=metadata,
        feature_importances=a.get("feature_importances"),
        exit_levels=a.get("exit_levels"),
        exit_table=a.get("exit_table"),
        feature_channels=a.get("feature_channels"),
        margin=settings["margin"],
        temperature=settings["score_temperature"],
        exit_min_sigma=settings["exit_min_sigma"],
        object_range=settings["object_range"],
        file_version=int(version),
    )


def old_format_note(model: Model, path) -> str | None:
    """One line for a model read from a file of an older format (converted in memory, the file left
    as it is); None for a current one.

    >>> m = Model((2, 2), np.zeros((1, 4, 5), np.int32), [[0]], [[0.0]], [[0.0, 1.0]], [-np.inf],
    ...           file_version=3)
    >>> old_format_note(m, "old.npz")
    'note: old.npz is a format 3 model file (rectangles as x, y, width, height); it was converted on reading and left as it is (patchwood train writes format 5)'
    """
    version = model.file_version
    # a format 4 file differs only in what it cannot hold (edge-strength features): nothing to say
    if version is None or version >= CORNERS_FORMAT_VERSION:
        return None
    return (f"note: {path} is a format {version} model file (rectangles as x, y, width, height); "
            f"it was converted on reading and left as it is (patchwood train writes format "
            f"{FORMAT_VERSION})")
