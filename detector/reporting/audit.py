"""Label audit: the labels a bagged forest finds suspicious, judged by out-of-bag scores.

Every patch of the bank is scored only by the trees whose bootstrap sample did not draw it (its
out-of-bag score; "Random Forests", Machine Learning 45, 2001, section 3.1), so a wrong label
cannot vouch for itself: a labelled object the other trees call background, or a background
window they call object, stands out. The suspicion of a patch is ``1 - score`` for an object and
``score`` for background; above 0.5 the forest's verdict contradicts the label.

    labelled object, low score       -> "object-called-background" (a wrong or sloppy box)
    background window, high score    -> "background-called-object" (likely a missing box)

One patch per labelled box
    Augmented copies of one box are near-duplicates: when a tree draws a copy, the box is in effect
    in its bootstrap even when the box's own patch is not, and the copy's (possibly wrong) label
    vouches for the box's out-of-bag score. :func:`harvest_for_audit` therefore harvests with
    ``copies=0``, and :func:`audit_bank` sets aside the augmented copies of a bank it is given.

The result is written by :func:`write_audit` into one folder that opens offline::

    DIR/suspicious-labels.csv      image,x,y,width,height,kind,score (most suspicious first)
    DIR/audit.html                 galleries of the listed findings, with a legend
    DIR/thumbnails/object-called-background-01.png ...  background-called-object-01.png ...

Pictures use the project's marks (as in the score report; hues from Okabe & Ito, 2008, "Color
Universal Design"): a labelled object the forest calls background is drawn like a missed object
(yellow, dotted), a background window it calls object like a false alarm (vermillion, dashed),
the other labelled objects near it in sky blue, solid and thin.
"""

from __future__ import annotations

from typing import Callable, Sequence
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from numpy.typing import ArrayLike
    from detector.io.labels import ImageLabels

import io
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from urllib.parse import quote

import numpy as np

from detector import features as _features
from detector._validation import check_int, seed_sequence
from detector.errors import InputError
from detector.io.files import write_bytes
from detector.forest import bin_columns, oob_scores, quantile_cuts
from detector.harvest import KIND_AUGMENTED, KIND_NAMES, KIND_OBJECT, PatchBank, harvest
from detector.io.labels import csv_writer
from detector.reporting._html import card, esc, page, swatch
from detector.reporting.audit_files import (AUDIT_STYLES, BACKGROUND_CALLED_OBJECT, CSV_COLUMNS,
                                            CSV_NAME, FINDING_KINDS, HTML_NAME,
                                            OBJECT_CALLED_BACKGROUND, THUMBNAIL_DIR)
from detector.training import DEFAULT_TRAIN
from detector.reporting.drawing import crop_around, draw_box, write_png

__all__ = [
    "AUDIT_STYLES",
    "CSV_NAME",
    "DEFAULT_PARAMS",
    "FINDING_KINDS",
    "HTML_NAME",
    "THUMBNAIL_DIR",
    "AuditResult",
    "Finding",
    "audit_bank",
    "audit_thumbnail",
    "check_audit_folder",
    "harvest_for_audit",
    "patch_oob_scores",
    "suspicion",
    "suspicion_order",
    "write_audit",
]

_THUMBNAIL_FILE = re.compile(r"(object-called-background|background-called-object)-\d+\.png")
THUMBNAIL_SIZE = 128

#: Forest parameters of the audit (names as for :class:`detector.classifier.PatchClassifier`):
#: the trees, depth and pool of ``patchwood train`` (one option, one default), grown bagged for
#: their out-of-bag scores.
DEFAULT_PARAMS = {
    "n_trees": DEFAULT_TRAIN["trees"],
    "depth": DEFAULT_TRAIN["depth"],
    "pool": DEFAULT_TRAIN["pool"],
    "features_per_node": None,
    "sample_fraction": 1.0,
    "normalize": True,
    "max_bins": 256,
    "random_state": 0,
    "n_jobs": None,
}


# --------------------------------------------------------------------------------------------
# scores and suspicion


def suspicion(scores: ArrayLike, labels: ArrayLike) -> np.ndarray:
    """How strongly the out-of-bag score contradicts the label: ``1 - s`` for objects, ``s`` for
    background; NaN where the score is NaN.

    Parameters
    ----------
    scores : array_like of float, shape (N,)
        Out-of-bag scores in 0..1 (NaN: never out of bag).
    labels : array_like of {0, 1}, shape (N,)

    Returns
    -------
    ndarray of float64, shape (N,)

    Examples
    --------
    >>> suspicion([0.9, 0.2, 0.7, np.nan], [1, 1, 0, 0]).round(2).tolist()
    [0.1, 0.8, 0.7, nan]
    """
    s = np.asarray(scores, dtype=np.float64)
    y = np.asarray(labels)
    if s.shape != y.shape:
        raise ValueError(f"scores {s.shape} and labels {y.shape} differ in shape")
    return np.where(y == 1, 1.0 - s, s)


def suspicion_order(scores: ArrayLike, labels: ArrayLike) -> np.ndarray:
    """Indices of the scored patches, most suspicious first; ties keep index order, NaN left out.

    Examples
    --------
    Suspicions 0.25, 0.75, 0.5, 0.25 and NaN: patch 1, then 2, then the tie 0 and 3 in index
    order.

    >>> suspicion_order([0.75, 0.25, 0.5, 0.25, np.nan], [1, 1, 0, 0, 1]).tolist()
    [1, 2, 0, 3]
    """
    sus = suspicion(scores, labels)
    scored = np.flatnonzero(~np.isnan(sus))
    return scored[np.argsort(-sus[scored], kind="stable")]


def _params(params) -> dict:
    from detector.classifier import PatchClassifier

    merged = dict(DEFAULT_PARAMS)
    for key, value in dict(params or {}).items():
        if key == "mode":
            if value != "bagged":
                raise InputError("the audit needs a bagged forest (out-of-bag scores); "
                                 f"mode {value!r} is not possible")
            continue
        if key not in merged:
            raise InputError(f"unknown audit parameter {key!r}; known: {', '.join(sorted(merged))}")
        merged[key] = value
    check = PatchClassifier(**{k: v for k, v in merged.items()})
    check._check_parameters()
    return merged


def patch_oob_scores(patches: ArrayLike, y: ArrayLike, params: dict | None = None,
                     progress: Callable[[int], None] | None = None) -> tuple[np.ndarray, dict]:
    """Out-of-bag scores of grey patches: a random feature pool, its values, then a bagged forest.

    The same steps as :class:`detector.classifier.PatchClassifier` (pool, contrast-normalised
    feature values, optional quantile binning), but every patch takes part in growing (none is held
    out for the early exit) and the forest keeps its bootstrap record.

    Parameters
    ----------
    patches : ndarray of uint8, shape (N, height, width)
    y : array_like of {0, 1}, shape (N,)
    params : dict, optional
        Keys of :data:`DEFAULT_PARAMS`; missing keys take the defaults.
    progress : callable(done, total), optional
        Called after every tree.

    Returns
    -------
    scores : ndarray of float64, shape (N,)
        NaN where a patch was never out of bag.
    trees_out : ndarray of int64, shape (N,)
    forest : detector.forest.FlatForest
        With thresholds on bin indices when ``max_bins`` is set.

    Notes
    -----
    The feature values take ``4 * N * pool`` bytes (200 MB for 10,000 patches and a pool of 5,000).

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> bright = rng.integers(0, 60, (30, 12, 12)); bright[:, :6] += 150   # top half brighter
    >>> dull = rng.integers(0, 210, (30, 12, 12))
    >>> patches = np.concatenate([bright, dull]).astype(np.uint8); y = np.r_[np.ones(30), np.zeros(30)]
    >>> s, k, f = patch_oob_scores(patches, y, {"n_trees": 20, "pool": 300})
    >>> bool(np.mean((s > 0.5) == (y == 1)) > 0.9)
    True
    """
    from detector.classifier import check_patches

    p = _params(params)
    patches = check_patches(patches)
    y = np.asarray(y)
    if y.shape != (len(patches),) or not np.isin(y, (0, 1)).all():
        raise InputError(f"labels must be one 0 or 1 per patch ({len(patches)})")
    y = y.astype(np.int64)
    if y.min(initial=1) == y.max(initial=0):
        raise InputError("the audit needs both object and background patches")
    height, width = patches.shape[1:]
    pool_ss, forest_ss, bin_ss = seed_sequence(p["random_state"]).spawn(3)
    pool_size = min(int(p["pool"]), _features.count_features(width, height))
    pool = _features.random_pool(width, height, pool_size,
                                 random_state=int(pool_ss.generate_state(1)[0]))
    values = _features.evaluate_features(pool, patches, normalize=bool(p["normalize"]),
                                         transpose=True)
    if p["max_bins"] is not None:
        cuts, n_cuts = quantile_cuts(values.T, int(p["max_bins"]), random_state=bin_ss)
        bin_columns(values.T, cuts, n_cuts, n_jobs=p["n_jobs"])
    return oob_scores(values.T, y, n_trees=int(p["n_trees"]), depth=int(p["depth"]),
                      features_per_node=p["features_per_node"],
                      sample_fraction=float(p["sample_fraction"]), random_state=forest_ss,
                      progress=progress, n_jobs=p["n_jobs"])


# --------------------------------------------------------------------------------------------
# the audit


@dataclass
class Finding:
    """One patch of the bank with its out-of-bag verdict.

    Attributes
    ----------
    image : str
        Image name as the labels file writes it.
    box : tuple of float
        ``x, y, width, height`` in image pixels: the labelled box of an object patch, the box the
        scan would report for a background window.
    kind : str
        ``"object-called-background"`` for object patches, ``"background-called-object"`` for
        background patches (the verdict contradicts the label when ``suspicion > 0.5``).
    score : float
        Out-of-bag score in 0..1 (higher is more object-like).
    suspicion : float
        ``1 - score`` for objects, ``score`` for background.
    patch : int
        Index of the patch in the bank.
    source : str
        How the patch came into the bank (``"object"``, ``"background"`` or ``"mined"``).
    trees : int
        Trees behind the score.
    """

    image: str
    box: tuple
    kind: str
    score: float
    suspicion: float
    patch: int
    source: str
    trees: int

    def row(self) -> list[str]:
        """The CSV row: image, x, y, width, height, kind, score."""
        return [self.image, *(_number(v) for v in self.box), self.kind, f"{self.score:.4f}"]


def _number(value: float) -> str:
    return f"{round(float(value), 2):g}"


@dataclass
class AuditResult:
    """What :func:`audit_bank` found. Behaves as the list of its ``findings``.

    Attributes
    ----------
    findings : list of Finding
        Every scored patch, most suspicious first (ties in bank order).
    scores : ndarray of float64, shape (N,)
        Out-of-bag score of every patch of the bank; NaN for patches never out of bag and for the
        augmented copies set aside.
    not_scored : dict
        ``{"objects": n, "background": n}``: patches every tree drew (never out of bag).
    audited : dict
        ``{"objects": n, "background": n}``: patches that took part.
    augmented_left_out : int
        Augmented copies set aside (see the module docstring).
    oob_error : float or None
        Share of scored patches whose verdict (score > 0.5 means object) contradicts the label.
    params : dict
        The forest parameters used.
    """

    findings: list = field(default_factory=list)
    scores: np.ndarray = field(default_factory=lambda: np.zeros(0))
    not_scored: dict = field(default_factory=dict)
    audited: dict = field(default_factory=dict)
    augmented_left_out: int = 0
    oob_error: float | None = None
    params: dict = field(default_factory=dict)

    def __len__(self) -> int:
        return len(self.findings)

    def __iter__(self):
        return iter(self.findings)

    def __getitem__(self, index):
        return self.findings[index]

    @property
    def disagreements(self) -> int:
        """Findings whose verdict contradicts their label (suspicion above 0.5)."""
        return sum(1 for f in self.findings if f.suspicion > 0.5)

    def suspicious(self, top: int | None = None, min_suspicion: float = 0.5) -> list:
        """The most suspicious findings: suspicion above ``min_suspicion``, at most ``top``.

        Examples
        --------
        >>> a = AuditResult([Finding("a.png", (0, 0, 4, 4), OBJECT_CALLED_BACKGROUND, s, 1 - s, i,
        ...                          "object", 9) for i, s in enumerate((0.1, 0.3, 0.6))])
        >>> [f.patch for f in a.suspicious()], [f.patch for f in a.suspicious(top=1)]
        ([0, 1], [0])
        """
        chosen = [f for f in self.findings if f.suspicion > min_suspicion]
        return chosen if top is None else chosen[: int(top)]


def harvest_for_audit(images_dir: str | os.PathLike, items: Sequence[ImageLabels], *,
                      window: tuple[int, int] | None = None, margin: float = 0.1,
                      negatives_per_image: int = 50, seed: int = 0,
                      labels_path: str | os.PathLike | None = None,
                      progress: Callable[[int], None] | None = None) -> PatchBank:
    """The bank an audit needs: one patch per labelled box, and random background windows.

    :func:`detector.harvest.harvest` with ``copies=0``: augmented copies of one box would leak
    into each other's out-of-bag estimates (a tree that drew a copy has in effect seen the box,
    so the box's own label vouches for it). ``near_negatives=0`` too: windows inside or around a
    labelled box are background by construction, so they say nothing about missing boxes.

    Parameters
    ----------
    images_dir : path
    items : list of ImageLabels
    window : (int, int), optional
        Patch size; None infers it from the boxes as ``harvest`` does.
    margin : float
        Context around each box, as a fraction of its size.
    negatives_per_image : int
        Random background windows per image; more of them give a missing box more chances to
        appear as a ``background-called-object`` finding.
    seed : int
    labels_path : path, optional
        Named in error messages.
    progress : callable(done, total), optional
        Called after every image.

    Returns
    -------
    PatchBank
    """
    return harvest(images_dir, items, window=window, margin=margin, copies=0,
                   negatives_per_image=negatives_per_image, near_negatives=0, seed=seed,
                   labels_path=labels_path, progress=progress)


def audit_bank(bank: PatchBank, params: dict | None = None,
               progress: Callable[[int], None] | None = None) -> AuditResult:
    """Score every patch of a bank out of bag and rank them by suspicion.

    Parameters
    ----------
    bank : PatchBank
        Object and background patches; augmented copies are set aside (see the module docstring),
        mined background patches take part.
    params : dict, optional
        Forest parameters, keys of :data:`DEFAULT_PARAMS` (``n_trees``, ``depth``, ``pool``,
        ``features_per_node``, ``sample_fraction``, ``normalize``, ``max_bins``,
        ``random_state``, ``n_jobs``); ``mode`` may only be ``"bagged"``.
    progress : callable(done, total), optional
        Called after every tree.

    Returns
    -------
    AuditResult
        Acts as the list of findings, most suspicious first.

    Raises
    ------
    InputError
        A parameter is out of range, or the bank lacks objects or background once augmented
        copies are set aside.

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> obj = rng.integers(0, 60, (40, 12, 12)); obj[:, 3:9, 3:9] += 180     # bright square
    >>> bg = rng.integers(0, 240, (40, 12, 12))
    >>> y = np.r_[np.ones(40), np.zeros(40)].astype(np.uint8); y[0] = 0     # one wrong label
    >>> bank = PatchBank((12, 12), np.concatenate([obj, bg]).astype(np.uint8), y,
    ...                  np.r_[np.zeros(40), np.full(40, 2)].astype(np.uint8),
    ...                  np.zeros(80, np.int32), ["a.png"], np.zeros((80, 4), np.float32),
    ...                  np.zeros((80, 7), np.float32))
    >>> result = audit_bank(bank, {"n_trees": 30, "pool": 400})
    >>> result[0].patch, result[0].kind
    (0, 'background-called-object')
    """
    p = _params(params)
    labels = np.asarray(bank.labels).astype(np.int64)
    kinds = np.asarray(bank.kinds)
    keep = np.flatnonzero(kinds != KIND_AUGMENTED)
    y = labels[keep]
    if not (y == 1).any() or not (y == 0).any():
        what = "object" if not (y == 1).any() else "background"
        raise InputError(f"the bank has no {what} patches besides augmented copies; the audit "
                         "needs both")
    scores_kept, trees_out, forest = patch_oob_scores(bank.patches[keep], y, p, progress)
    scores = np.full(len(labels), np.nan)
    scores[keep] = scores_kept
    sus = suspicion(scores_kept, y)
    findings = []
    for j in suspicion_order(scores_kept, y):
        i = int(keep[j])
        findings.append(Finding(
            image=bank.images[int(bank.image_index[i])],
            box=tuple(float(v) for v in bank.boxes[i]),
            kind=FINDING_KINDS[int(y[j])],
            score=float(scores_kept[j]),
            suspicion=float(sus[j]),
            patch=i,
            source=KIND_NAMES[int(kinds[i])],
            trees=int(trees_out[j]),
        ))
    missing = np.isnan(scores_kept)
    return AuditResult(
        findings=findings,
        scores=scores,
        not_scored={"objects": int((missing & (y == 1)).sum()),
                     "background": int((missing & (y == 0)).sum())},
        audited={"objects": int((y == 1).sum()), "background": int((y == 0).sum())},
        augmented_left_out=int(len(labels) - len(keep)),
        oob_error=forest.oob_error,
        params=p,
    )


# --------------------------------------------------------------------------------------------
# pictures


def audit_thumbnail(gray: np.ndarray, box: Sequence[float], kind: str,
                    others: Sequence[Sequence[float]] = (), size: int = THUMBNAIL_SIZE,
                    context: float = 0.5) -> np.ndarray:
    """A square colour thumbnail around a finding's box, the other labelled boxes drawn thin.

    Parameters
    ----------
    gray : ndarray of uint8, shape (H, W)
        The whole image, or (without the image) the patch itself with ``box`` in patch pixels.
    box : tuple of float
        ``x, y, width, height`` of the finding.
    kind : str
        A key of :data:`AUDIT_STYLES` other than ``"labelled"``.
    others : sequence of boxes
        Other labelled boxes of the image, drawn where they fall inside the thumbnail.
    size, context : int, float
        As :func:`detector.reporting.drawing.thumbnail` (here a margin of half the longer side by
        default); it returns the same BGR square.

    Examples
    --------
    >>> img = np.full((64, 64), 128, np.uint8)
    >>> t = audit_thumbnail(img, (24, 24, 16, 16), "background-called-object")
    >>> t.shape, tuple(int(v) for v in t[64, 64])    # the middle stays untouched gray
    ((128, 128, 3), (128, 128, 128))
    """
    out, local = crop_around(gray, box, size, context)
    rgb, style, _ = AUDIT_STYLES["labelled"]
    for other in others:
        lb = local(other)
        if lb[0] > size or lb[1] > size or lb[0] + lb[2] < 0 or lb[1] + lb[3] < 0:
            continue
        draw_box(out, lb, rgb, style, 1)
    rgb, style, _ = AUDIT_STYLES[kind]
    draw_box(out, local(box), rgb, style, 2)
    return out


def _patch_thumbnail(bank: PatchBank, finding: Finding, size: int) -> np.ndarray:
    """Thumbnail from the patch alone (no image folder): the whole window, scaled to fit and
    centred on dark gray, with the box inside it (the window less the context margin)."""
    import cv2

    W, H = bank.window
    scale = size / max(W, H)
    w, h = max(1, int(round(W * scale))), max(1, int(round(H * scale)))
    x0, y0 = (size - w) // 2, (size - h) // 2
    canvas = np.full((size, size), 40, np.uint8)
    canvas[y0:y0 + h, x0:x0 + w] = cv2.resize(np.ascontiguousarray(bank.patches[finding.patch]),
                                              (w, h), interpolation=cv2.INTER_LINEAR)
    out = cv2.cvtColor(canvas, cv2.COLOR_GRAY2BGR)
    k = 1.0 + 2.0 * bank.margin
    bw, bh = w / k, h / k
    rgb, style, _ = AUDIT_STYLES[finding.kind]
    draw_box(out, (x0 + (w - bw) / 2, y0 + (h - bh) / 2, bw, bh), rgb, style, 2)
    return out


# --------------------------------------------------------------------------------------------
# the audit folder


def _thumbnail_files(out_dir: Path) -> list[Path]:
    folder = out_dir / THUMBNAIL_DIR
    if not folder.is_dir():
        return []
    return [e for e in folder.iterdir() if e.is_file() and _THUMBNAIL_FILE.fullmatch(e.name)]


def check_audit_folder(out_dir: str | os.PathLike, force: bool = False) -> None:
    """Refuse to replace the files of an earlier audit unless ``force``; refuse a file as folder.

    Only the audit's own files count: ``suspicious-labels.csv``, ``audit.html`` and
    ``thumbnails/<kind>-NN.png``; anything else in the folder is left alone.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> check_audit_folder(d)
    >>> _ = (d / CSV_NAME).write_text("image")
    >>> try:
    ...     check_audit_folder(d)
    ... except InputError as err:
    ...     print(err.message)
    an audit is already here; add --force to replace it
    """
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InputError("the audit folder is a file; name a folder", path=out)
    for name in (CSV_NAME, HTML_NAME, THUMBNAIL_DIR):
        target = out / name
        if target.exists() and (name == THUMBNAIL_DIR) != target.is_dir():
            raise InputError("is in the way of the audit's own file of that name", path=target)
    if force:
        return
    for name in (CSV_NAME, HTML_NAME):
        if (out / name).exists():
            raise InputError("an audit is already here; add --force to replace it", path=out / name)
    existing = _thumbnail_files(out)
    if existing:
        raise InputError("an audit is already here; add --force to replace it",
                         path=sorted(existing)[0])


def _csv_text(findings) -> str:
    buf = io.StringIO()
    writer = csv_writer(buf)
    writer.writerow(CSV_COLUMNS)
    for f in findings:
        writer.writerow(f.row())
    return buf.getvalue()


def write_audit(out_dir: str | os.PathLike, result: AuditResult, bank: PatchBank, *, top: int = 50,
                min_suspicion: float = 0.5, images_dir: str | os.PathLike | None = None,
                inputs: dict | None = None, force: bool = False,
                progress: Callable[[int], None] | None = None) -> dict:
    """Write the audit folder: the CSV of the listed findings, thumbnails and ``audit.html``.

    Parameters
    ----------
    out_dir : str or os.PathLike
        Created when missing. The files of an earlier audit there are refused unless ``force``
        (see :func:`check_audit_folder`); with ``force`` they are replaced, other files stay.
    result : AuditResult
    bank : PatchBank
        The bank the audit scored (for image names, boxes and, without ``images_dir``, the
        patches themselves).
    top : int, default 50
        Most findings listed.
    min_suspicion : float, default 0.5
        List only findings whose suspicion is above this (0.5: the forest's out-of-bag verdict
        contradicts the label).
    images_dir : path, optional
        Folder of the bank's images; thumbnails then show the box in its image, with the other
        labelled boxes. Without it (or for an image that cannot be read) the thumbnail is the
        patch itself.
    inputs : dict, optional
        Shown at the top of the page (e.g. ``{"labels": ..., "images": ...}``).
    force : bool
    progress : callable(done, total), optional
        Called after every thumbnail.

    Returns
    -------
    dict
        ``csv`` and ``html`` (paths written), ``listed`` (the findings listed, in order) and
        ``notes`` (lines worth knowing: images that could not be read).
    """
    from detector.io.images import read_gray

    out = Path(out_dir)
    check_audit_folder(out, force)
    check_int(top, "top", low=1)
    listed = result.suspicious(top=top, min_suspicion=min_suspicion)
    out.mkdir(parents=True, exist_ok=True)
    for old in _thumbnail_files(out):
        old.unlink()

    # the other labelled boxes of each image (the bank's unaugmented object patches)
    labelled: dict[int, list] = {}
    for i in np.flatnonzero((np.asarray(bank.kinds) == KIND_OBJECT) & (np.asarray(bank.labels) == 1)):
        labelled.setdefault(int(bank.image_index[i]), []).append(tuple(float(v) for v in bank.boxes[i]))

    notes: list[str] = []
    pictures: dict[int, np.ndarray] = {}
    order = sorted(range(len(listed)), key=lambda r: (listed[r].image, r))
    current, gray = None, None
    for done, r in enumerate(order, 1):
        f = listed[r]
        thumb = None
        if images_dir is not None:
            if f.image != current:
                current = f.image
                try:
                    gray = read_gray(os.path.join(os.fspath(images_dir), *f.image.split("/")))
                except InputError as err:
                    gray = None
                    notes.append(f"thumbnail from the patch: {err}")
            if gray is not None:
                index = int(bank.image_index[f.patch])
                others = [b for b in labelled.get(index, []) if not np.allclose(b, f.box)]
                thumb = audit_thumbnail(gray, f.box, f.kind, others)
        if thumb is None:
            thumb = _patch_thumbnail(bank, f, THUMBNAIL_SIZE)
        pictures[r] = thumb
        if progress is not None:
            progress(done, len(listed))

    folder = out / THUMBNAIL_DIR
    entries = {k: [] for k in FINDING_KINDS[::-1]}
    width = max(2, len(str(len(listed))))
    for r, f in enumerate(listed):
        name = f"{f.kind}-{len(entries[f.kind]) + 1:0{width}d}.png"
        folder.mkdir(exist_ok=True)
        write_png(folder / name, pictures[r])
        entries[f.kind].append((r + 1, f, f"{THUMBNAIL_DIR}/{name}"))

    csv_path, html_path = out / CSV_NAME, out / HTML_NAME
    write_bytes(csv_path, _csv_text(listed).encode("utf-8"))
    text = _html(result, listed, entries, inputs or {}, notes, top, min_suspicion)
    write_bytes(html_path, text.encode("utf-8"))
    return {"csv": str(csv_path), "html": str(html_path), "listed": listed, "notes": notes}


# --------------------------------------------------------------------------------------------
# HTML

def _html(result: AuditResult, listed, entries, inputs, notes, top, min_suspicion) -> str:
    p = result.params
    parts = ['<h1>Label audit</h1>']
    described = [f"{esc(k)} <code>{esc(v)}</code>" for k, v in inputs.items() if v is not None]
    described.append(f"{p['n_trees']} trees of depth {p['depth']}, pool {p['pool']}, "
                     f"seed {esc(p['random_state'])}")
    parts.append(f'<p class="inputs">{" &middot; ".join(described)}</p>')
    by_kind = {k: sum(1 for f in result if f.kind == k and f.suspicion > 0.5) for k in FINDING_KINDS}
    oob = "n/a" if result.oob_error is None else f"{100 * result.oob_error:.1f}%"
    parts.append('<div class="cards">')
    parts.append(card(result.audited.get("objects", 0), "object patches audited"))
    parts.append(card(result.audited.get("background", 0), "background patches audited"))
    parts.append(card(oob, "out-of-bag error"))
    parts.append(card(by_kind[OBJECT_CALLED_BACKGROUND], "objects called background"))
    parts.append(card(by_kind[BACKGROUND_CALLED_OBJECT], "background called object"))
    parts.append(card(sum(result.not_scored.values()), "not scored"))
    parts.append('</div>')
    parts.append(
        '<p class="read">How to read this: every patch was scored only by the trees that did not '
        'draw it into their bootstrap sample (its out-of-bag score), so its own label could not '
        'vouch for it. A labelled object with a low score is a box the rest of the data does not '
        'back up: a wrong, shifted or sloppy box, or an object unlike the others. A background '
        'window with a high score looks like an object: often an object nobody labelled. '
        'When background patches far outnumber objects, the scores lean towards background and '
        'many objects fall below 0.5; read the list from the top, where the strongest '
        'contradictions are. '
        f'Listed: at most {int(top)} findings whose suspicion (1 - score for objects, the score '
        f'for background) is above {min_suspicion:g}, most suspicious first; all of them are in '
        f'<a href="{quote(CSV_NAME)}">{esc(CSV_NAME)}</a>.</p>')
    all_notes = list(notes)
    if sum(result.not_scored.values()):
        all_notes.insert(0, f"not scored: {result.not_scored['objects']} object and "
                            f"{result.not_scored['background']} background patches were drawn by "
                            "every tree (never out of bag); more trees score them")
    if result.augmented_left_out:
        all_notes.insert(0, f"{result.augmented_left_out} augmented copies were set aside: copies "
                            "of one box would vouch for each other's out-of-bag scores")
    if all_notes:
        parts.append('<ul class="notes">' + "".join(f"<li>{esc(n)}</li>" for n in all_notes)
                     + '</ul>')
    parts.append('<div class="legend">' + "".join(swatch(*AUDIT_STYLES[k]) for k in AUDIT_STYLES)
                 + '<span>thick line: the box the thumbnail is about</span></div>')
    titles = {OBJECT_CALLED_BACKGROUND: "Labelled objects the forest calls background",
              BACKGROUND_CALLED_OBJECT: "Background windows the forest calls object"}
    for kind in (OBJECT_CALLED_BACKGROUND, BACKGROUND_CALLED_OBJECT):
        shown = entries[kind]
        parts.append(f'<h2>{esc(titles[kind])} ({len(shown)} of {by_kind[kind]})</h2>')
        if not shown:
            parts.append('<p class="empty">None listed.</p>')
            continue
        parts.append('<div class="gallery">')
        for rank, f, src in shown:
            parts.append(
                f'<figure><img src="{quote(src)}" alt="{esc(kind)} in {esc(f.image)}">'
                f'<figcaption><span class="image" title="{esc(f.image)}">{esc(f.image)}</span>'
                f'#{rank} &middot; score {f.score:.3f}</figcaption></figure>')
        parts.append('</div>')
    parts.append('<h2>Listed findings</h2>')
    if not listed:
        parts.append('<p class="empty">None: the forest backs every label.</p>')
    else:
        parts.append('<table><tr><th>rank</th><th class="text">kind</th><th>score</th>'
                     '<th>suspicion</th><th>trees</th><th class="text">image</th><th>x</th>'
                     '<th>y</th><th>width</th><th>height</th></tr>')
        for rank, f in enumerate(listed, 1):
            box = "".join(f"<td>{_number(v)}</td>" for v in f.box)
            parts.append(f'<tr><td>{rank}</td><td class="text">{esc(f.kind)}</td>'
                         f'<td>{f.score:.3f}</td><td>{f.suspicion:.3f}</td><td>{f.trees}</td>'
                         f'<td class="text">{esc(f.image)}</td>{box}</tr>')
        parts.append('</table>')
    parts.append('<p class="read">Out-of-bag estimates as in "Random Forests" (Machine Learning '
                 '45, 2001); "trees" is how many trees each score averages.</p>')
    return page("patchwood label audit", "audit.css", parts)

