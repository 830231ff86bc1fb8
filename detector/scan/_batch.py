"""Scanning many images: folders, worker processes, a Dask cluster, resumable atomic output.

A run never dies on one bad file: a file that cannot be read (damaged, not an image, too large, a
named pipe or a device, a folder that cannot be listed) is recorded as a failure (listed at the
end and in a side file) and the run goes on. The output file is rewritten atomically after every
batch of images (and once more when the run is interrupted), so an interrupted run leaves a valid
detections file of complete images that ``resume=True`` continues. A run holds an exclusive lock
on its output (:func:`detector.io.files.output_lock`), so that two runs never write the same file.
"""

from __future__ import annotations

import hashlib
import io
import os
import re
import threading
import time
from collections import deque
from dataclasses import dataclass, field
from pathlib import Path

import cv2
import numpy as np

from detector.errors import InputError
from detector._validation import named_list
from detector.io.files import output_lock, read_bytes, same_file, write_bytes, write_text
from detector.io.images import (decode_gray, header_size, list_images, max_file_bytes,
                             max_pixels_limit, read_gray)
from detector.io.labels import (ImageDetections, coco_result_ids, csv_writer, read_detections,
                             write_detections_coco, write_detections_coco_results,
                             write_detections_csv)
from detector.model import Model, load_model
from detector.scan._provenance import check_same_scan, scan_record, write_provenance
from detector.scan._engine import SCORE_DECIMALS, Engine, ScanSettings

# the project's own marks for drawn detections (BGR): a warm amber box, its score on a dark tab
DETECTION_COLOUR = (0, 176, 255)
TEXT_COLOUR = (20, 20, 20)


@dataclass
class ImageResult:
    """What scanning one image gave."""

    image: str  # display name (relative to the scanned folder)
    boxes: np.ndarray
    scores: np.ndarray
    windows: int = 0
    trees: int = 0
    error: str | None = None
    seconds: float = 0.0


@dataclass
class RunSummary:
    """Totals of a scan run."""

    images: int = 0
    resumed: int = 0
    detections: int = 0
    failures: list = field(default_factory=list)  # (image, reason)
    skipped_files: int = 0
    skipped_names: list = field(default_factory=list)  # the files left out (not images)
    seconds: float = 0.0
    windows: int = 0
    trees: int = 0
    out: str = ""
    failures_file: str | None = None
    drawn: int = 0

    @property
    def mean_trees(self) -> float:
        return self.trees / self.windows if self.windows else 0.0

    @property
    def images_per_second(self) -> float:
        return self.images / self.seconds if self.seconds > 0 else 0.0


# ---------------------------------------------------------------- workers

_ENGINES: dict = {}
_ENGINES_LOCK = threading.Lock()  # Dask workers run several tasks at once in threads


def _engine_from_bytes(model_bytes: bytes, settings: dict) -> Engine:
    key = (hashlib.sha256(model_bytes).hexdigest(), tuple(sorted(settings.items())))
    with _ENGINES_LOCK:
        engine = _ENGINES.get(key)
        if engine is None:
            engine = Engine(load_model("model sent by the client", data=model_bytes),
                            ScanSettings(**settings))
            _ENGINES.clear()
            _ENGINES[key] = engine
    return engine


def _failure(name: str, err: BaseException) -> ImageResult:
    """The failure an image becomes when reading or scanning it raised one of the errors that
    concern that image alone (:func:`_read_one`, :func:`scan_one`)."""
    if isinstance(err, InputError):
        reason = err.message
    elif isinstance(err, MemoryError):
        reason = "out of memory"
    else:  # cv2.error: an allocation OpenCV refuses, say
        lines = [t for t in str(err).splitlines() if t.strip()]
        reason = f"the image could not be scanned ({lines[-1].strip() if lines else 'no reason given'})"
    return ImageResult(name, np.zeros((0, 4)), np.zeros(0), error=reason)


#: The errors that make one image a failure instead of ending the run.
_IMAGE_ERRORS = (InputError, MemoryError, cv2.error)


def _read_one(path, name: str):
    """``(grey image or None, failure or None, seconds)``: one image read as :func:`scan_one`
    reads it, its errors turned into the image's failure."""
    start = time.perf_counter()
    try:
        gray = read_gray(path)
    except _IMAGE_ERRORS as err:
        return None, _failure(name, err), 0.0
    return gray, None, time.perf_counter() - start


def _scan_gray(engine: Engine, gray, name: str, seconds: float = 0.0) -> ImageResult:
    """Scan one image already read (``seconds``: the time its reading took, added to the scan's)."""
    start = time.perf_counter()
    try:
        r = engine.scan(gray)
    except _IMAGE_ERRORS as err:
        return _failure(name, err)
    return ImageResult(name, r.boxes, r.scores, r.windows, r.trees,
                       seconds=seconds + time.perf_counter() - start)


def scan_one(engine: Engine, path, name: str, data: bytes | None = None) -> ImageResult:
    """Scan one image; a file that cannot be read (or scanned) becomes a failure, not an
    exception."""
    if data is None:
        gray, failed, seconds = _read_one(path, name)
        return failed if failed is not None else _scan_gray(engine, gray, name, seconds)
    start = time.perf_counter()
    try:
        gray = decode_gray(data, name)
    except _IMAGE_ERRORS as err:
        return _failure(name, err)
    return _scan_gray(engine, gray, name, time.perf_counter() - start)


def scan_reading_ahead(engine: Engine, todo):
    """:func:`scan_one` over ``(path, name)`` pairs, in order, with the next image read on a
    second thread while this one is scanned (reading and decoding a file and the compiled scan
    both release the GIL, so on two cores the reading costs the run nothing; a 640 x 480 PNG takes
    2-2.5 ms, a tenth of a busy frame's scan). At most two images are in memory at once. Yields the
    results in ``todo``'s order, the same as :func:`scan_one`'s."""
    from concurrent.futures import ThreadPoolExecutor

    todo = list(todo)
    if not todo:
        return
    with ThreadPoolExecutor(1, thread_name_prefix="patchwood-read") as reader:
        pending = reader.submit(_read_one, *todo[0])
        for k, (_, name) in enumerate(todo):
            gray, failed, seconds = pending.result()
            if k + 1 < len(todo):
                pending = reader.submit(_read_one, *todo[k + 1])
            yield failed if failed is not None else _scan_gray(engine, gray, name, seconds)
            gray = None  # the next image, not this one, is what the reader fills now


def _scan_in_worker(args):
    path, name = args
    return scan_one(_WORKER["engine"], path, name)


_WORKER: dict = {}


def _init_worker(model_path: str, settings: dict):
    _WORKER["engine"] = Engine(load_model(model_path), ScanSettings(**settings))


def scan_bytes_batch(model_bytes: bytes, settings: dict, items) -> list[ImageResult]:
    """Task run on a Dask worker: the model and several ``(name, data)`` images travel as bytes,
    so workers need no shared file system; the results come back in order."""
    engine = _engine_from_bytes(model_bytes, settings)
    return [scan_one(engine, None, name, data) for name, data in items]


#: A cluster task carries up to this many images, or this many bytes of them: with one image per
#: task, Dask's round trips took most of a small frame's time (``benchmarks/load.py``, 320 x 240
#: frames: 37.8 images/s on a local cluster of 2 workers against 155.9 with ``--jobs 2``).
CLUSTER_BATCH_IMAGES = 8
CLUSTER_BATCH_BYTES = 8 * 2**20


# ---------------------------------------------------------------- drawing

def draw_detections(gray: np.ndarray, boxes, scores, title: str | None = None) -> np.ndarray:
    """A colour copy of ``gray`` with every detection boxed and scored, and a legend.

    >>> img = draw_detections(np.zeros((40, 60), np.uint8), np.array([[5., 5., 20., 20.]]), [0.9])
    >>> img.shape
    (40, 60, 3)
    """
    im = cv2.cvtColor(np.ascontiguousarray(gray), cv2.COLOR_GRAY2BGR)
    h, w = gray.shape
    scale = max(0.35, min(w, h) / 900)
    thick = max(1, int(round(min(w, h) / 400)))
    for (x, y, bw, bh), s in zip(np.asarray(boxes).reshape(-1, 4), scores):
        p0 = (int(round(x)), int(round(y)))
        p1 = (int(round(x + bw)), int(round(y + bh)))
        cv2.rectangle(im, p0, p1, DETECTION_COLOUR, thick, cv2.LINE_AA)
        label = f"{s:.2f}"
        (tw, th), base = cv2.getTextSize(label, cv2.FONT_HERSHEY_SIMPLEX, scale, 1)
        ty = max(th + 2, p0[1])
        cv2.rectangle(im, (p0[0], ty - th - 2), (p0[0] + tw + 2, ty), DETECTION_COLOUR, -1)
        cv2.putText(im, label, (p0[0] + 1, ty - 2), cv2.FONT_HERSHEY_SIMPLEX, scale, TEXT_COLOUR,
                    1, cv2.LINE_AA)
    legend = f"detection (score)  n={len(scores)}" + (f"  {title}" if title else "")
    (tw, th), _ = cv2.getTextSize(legend, cv2.FONT_HERSHEY_SIMPLEX, scale, 1)
    cv2.rectangle(im, (0, h - th - 8), (tw + 26, h), (30, 30, 30), -1)
    cv2.rectangle(im, (4, h - th - 4), (16, h - 4), DETECTION_COLOUR, thick)
    cv2.putText(im, legend, (22, h - 5), cv2.FONT_HERSHEY_SIMPLEX, scale, (235, 235, 235), 1,
                cv2.LINE_AA)
    return im


def _draw_path(draw_dir: Path, name: str) -> Path:
    """Where the annotated copy of image ``name`` goes: ``DIR/<name>`` as PNG (``a/x.png``), or
    with ``.png`` added to other names (``a/x.jpg.png``), so two images never share a drawing."""
    rel = Path(*[p for p in Path(name.replace("\\", "/")).parts
                 if p not in ("..", "/", "") and not p.endswith(":")])
    if rel.suffix.lower() != ".png":
        rel = rel.with_name(rel.name + ".png")
    return Path(draw_dir) / rel


def draw_folder(images_dir, detections: dict, draw_dir, threshold: float = 0.0) -> int:
    """Annotated copies of the images of a detections file, with the detections scoring
    ``threshold`` or more (by the threshold invariance of the scan, what a scan at that
    threshold would draw); ``detections`` maps image names (relative to ``images_dir``) to
    ``(boxes, scores)``. Images that cannot be read are skipped. Returns the number drawn."""
    drawn = 0
    for name, (boxes, scores) in detections.items():
        boxes = np.asarray(boxes, dtype=np.float64).reshape(-1, 4)
        scores = np.asarray(scores, dtype=np.float64).reshape(-1)
        keep = scores >= threshold
        try:
            gray = read_gray(Path(images_dir) / name)
        except InputError:
            continue
        dst = _draw_path(draw_dir, name)
        dst.parent.mkdir(parents=True, exist_ok=True)
        ok, buf = cv2.imencode(".png", draw_detections(gray, boxes[keep], scores[keep],
                                                       title=f"score >= {threshold:g}"))
        if ok:
            write_bytes(dst, buf.tobytes())
            drawn += 1
    return drawn


# ---------------------------------------------------------------- the run

def _inside(child: Path, parent: Path) -> bool:
    try:
        child.resolve().relative_to(parent.resolve())
        return True
    except ValueError:
        return False


def _input_folders(inputs) -> list[Path]:
    """The folders given, and the folder of every file given by itself."""
    return [Path(p) if Path(p).is_dir() else Path(p).parent for p in inputs]


def check_draw_dir(draw_dir, inputs) -> None:
    """Refuse a drawing folder inside an input folder (drawings never go among the inputs)."""
    for folder in _input_folders(inputs):
        if _inside(Path(draw_dir), folder):
            raise InputError("--draw folder lies inside an input folder; choose a folder outside "
                             "the images", path=draw_dir)


def _check_draw_targets(draw_dir, inputs, names, replace: bool) -> None:
    """Refuse drawings that would land inside an input folder (a file given as ``sub/x.png`` with
    ``--draw .``), or replace existing files unless ``replace``."""
    folders = [f.resolve() for f in _input_folders(inputs)]
    for name in names:
        target = _draw_path(draw_dir, name)
        parent = target.parent.resolve()
        if any(parent == f or f in parent.parents for f in folders):
            raise InputError(f"--draw would write {name} into an input folder; choose a folder "
                             "outside the images", path=target)
        if not replace and target.exists():
            raise InputError("--draw folder already holds this file; add --force to replace the "
                             "drawings", path=target)


#: The detections file formats :func:`scan_paths` writes.
FORMATS = ("csv", "coco", "coco-results")


def _write(out, fmt, results: list[ImageResult], record: dict, result_ids=None):
    """Write the detections file, then its provenance side file (each atomically), so the side
    file always describes the detections file that exists."""
    # 1/100 pixel is plenty and keeps the file readable; scores come with the six decimals the
    # engine rounds them to (detector.scan.SCORE_DECIMALS), so np.round changes nothing there
    items = [ImageDetections(r.image, np.round(r.boxes, 2), np.round(r.scores, SCORE_DECIMALS))
             for r in results]
    if fmt == "coco":
        info = dict(record, detections={"file": Path(out).name, "images": len(results)})
        write_detections_coco(out, items, info=info)
    elif fmt == "coco-results":
        if result_ids is None:
            write_detections_coco_results(out, items)
        else:
            write_detections_coco_results(out, items, {r.image: result_ids.image_id(r.image)
                                                       for r in results}, result_ids.category_id)
    else:
        write_detections_csv(out, items, "corners" if fmt == "csv-corners" else "xywh")
    write_provenance(out, record, len(results))


def failures_path(out) -> Path:
    """Side file listing images that could not be scanned: ``detections.failures.csv``."""
    out = Path(out)
    return out.with_name(out.stem + ".failures.csv")


_FAILURES_HEADER = ["image", "reason"]


def _write_failures(out, failures) -> str | None:
    """Write the side file (atomically); without failures, remove an earlier run's side file
    (the run was allowed to replace it: ``force`` or ``resume``)."""
    fp = failures_path(out)
    if not failures:
        try:
            with open(fp, encoding="utf-8") as fh:
                ours = fh.readline().rstrip("\r\n") == ",".join(_FAILURES_HEADER)
            if ours:
                fp.unlink()
        except (OSError, UnicodeDecodeError):
            pass
        return None
    buf = io.StringIO()
    w = csv_writer(buf)
    w.writerow(_FAILURES_HEADER)
    w.writerows(failures)
    write_text(fp, buf.getvalue())
    return str(fp)


def _check_unique_names(listed) -> None:
    """Two inputs that give the same image name would be one image in the detections file."""
    first: dict[str, str] = {}
    for path, name in listed:
        if name in first:
            raise InputError(f"two inputs give the same image name {name!r} ({first[name]} and "
                             f"{path}); scan them into separate output files", path=path)
        first[name] = path


def scan_paths(model_path, paths, out, *, settings: ScanSettings | None = None, jobs: int = 1,
               cluster: str | None = None, resume: bool = False, force: bool = False,
               draw_dir=None, fmt: str = "csv", labels=None, label: str | None = None,
               box_format: str = "xywh", drawer=None,
               batch_images: int = 16, batch_seconds: float = 2.0, progress=None,
               on_image=None, threshold_from=None) -> RunSummary:
    """Scan image files and folders with a model file; write the detections file.

    Image names in the output follow :func:`detector.io.images.list_images`: relative to the folder
    given (forward slashes), or the path as given for a file given by itself. The output is
    rewritten atomically after every batch of ``batch_images`` images or ``batch_seconds`` seconds
    (whichever comes first, and never so often that rewriting takes more than about a tenth of the
    run), and once more if the run is interrupted, so it always holds complete images only. Each
    time, the provenance side file (:func:`detector.scan.provenance_path`: the model's
    SHA-256 and metadata SHA-256, every scan setting, the inputs, the versions, the detections
    file's SHA-256) is rewritten after it; a COCO output also carries the record in its ``info``.

    Parameters
    ----------
    model_path : path
        Model file (.npz).
    paths : list of paths
        Image files and folders (searched recursively).
    out : path
        Detections file: the CSV contract; with ``fmt="coco"`` a COCO JSON object (images and
        scored annotations); with ``fmt="coco-results"`` the COCO results list that pycocotools'
        ``COCO.loadRes`` reads (see :func:`detector.io.labels.write_detections_coco_results`).
    settings : ScanSettings
    jobs : int
        Worker processes on this machine.
    cluster : str, optional
        Address of a Dask distributed scheduler; the images run there.
    resume : bool
        Keep the images already in ``out`` and scan only the rest; only when its provenance side
        file says it was made with this model file and these settings.
    force : bool
        Replace an existing ``out`` (and existing drawings in ``draw_dir``).
    draw_dir : path, optional
        Write annotated copies here (never inside an input folder; existing files are replaced
        only with ``force`` or ``resume``).
    drawer : callable(gray, name, boxes, scores) -> BGR image, optional
        How a frame is drawn into ``draw_dir`` (default :func:`draw_detections`: every
        detection of the scan).
    box_format : {"xywh", "corners"}
        The CSV's box columns: ``x,y,width,height`` or ``x_min,y_min,x_max,y_max``.
    fmt : {"csv", "coco", "coco-results"}
    labels : path, optional
        Only with ``fmt="coco-results"``: the COCO labels file whose image ids (matched by file
        name, :meth:`detector.io.labels.CocoResultIds.image_id`) and category id the results use;
        without it images are numbered 1..N in the order written.
    label : str, optional
        The category of ``labels`` the detections are for, when it has several.
    batch_images, batch_seconds : int, float
        How often the output is rewritten (see above).
    progress : callable(done, total), optional
    on_image : callable(ImageResult), optional
        Called after each image's result is recorded.
    threshold_from : path, optional
        The summary the threshold was taken from, recorded in the provenance.

    Returns
    -------
    RunSummary
        Files that could not be read are in ``failures`` (image, reason) and in the side file
        :func:`failures_path`; they do not stop the run.

    Raises
    ------
    InputError
        Before any image is scanned: a bad model file, an existing ``out`` (or its failures side
        file) without ``force`` or ``resume``, an output that is one of the inputs, another run
        writing the same output, a missing input path, no image files among the inputs, two
        inputs with the same image name, a drawing folder among the inputs, a bad cluster
        address, a bad ``PATCHWOOD_MAX_MEGAPIXELS``, or a ``labels`` file that is not COCO JSON or
        lacks one of the images; with ``resume``, an output without a provenance side file, or
        made with another model or other settings (:func:`detector.scan.check_same_scan`).
    """
    settings = settings or ScanSettings()
    out = Path(out)
    if fmt not in FORMATS:
        raise InputError(f"unknown output format {fmt!r} ({', '.join(FORMATS)})")
    if box_format not in ("xywh", "corners"):
        raise InputError(f"box format must be xywh or corners, got {box_format!r}")
    if box_format == "corners":
        if fmt != "csv":
            raise InputError(f"--box-format corners is for the CSV format; {fmt} boxes are "
                             "x, y, width, height")
        fmt = "csv-corners"
    if (labels is not None or label is not None) and fmt != "coco-results":
        raise InputError("a labels file gives image ids to the coco-results format only")
    if cluster:
        check_cluster_address(cluster)
    limit = max_pixels_limit()  # a bad PATCHWOOD_MAX_MEGAPIXELS stops the run, not every image
    model = load_model(model_path)
    if out.is_dir():
        raise InputError("output must be a file, but this is a folder", path=out)
    if not (out.parent if str(out.parent) else Path(".")).is_dir():
        raise InputError("folder for the output does not exist", path=out.parent)
    with output_lock(out):
        return _scan_locked(model, model_path, paths, out, settings, jobs, cluster, resume, force,
                            draw_dir, fmt, batch_images, batch_seconds, progress, on_image, limit,
                            labels, label, threshold_from, drawer)


def check_cluster_address(address: str) -> str:
    """Refuse a Dask scheduler address that is not ``PROTOCOL://HOST:PORT`` (or ``HOST:PORT``,
    which Dask reads as ``tcp://``), before any connection is tried.

    >>> check_cluster_address("tcp://10.0.0.5:8786")
    'tcp://10.0.0.5:8786'
    >>> check_cluster_address("not a url")
    Traceback (most recent call last):
    ...
    detector.errors.InputError: --cluster 'not a url' is not a scheduler address; give PROTOCOL://HOST:PORT, e.g. tcp://10.0.0.5:8786
    """
    text = str(address).strip()
    if re.fullmatch(r"inproc://\S+", text):  # a cluster inside this process (Dask's own tests)
        return text
    match = re.fullmatch(r"(?:(tcp|tls|ws|wss|ucx)://)?"
                         r"(\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9](?:[A-Za-z0-9.-]*[A-Za-z0-9])?)"
                         r"(?::([0-9]{1,5}))?/?", text)
    good = (match is not None and bool(match.group(1) or match.group(3))
            and (match.group(3) is None or 0 < int(match.group(3)) < 65536))
    if not good:
        shown = text if len(text) <= 60 else text[:57] + "..."
        raise InputError(f"--cluster {shown!r} is not a scheduler address; give "
                         "PROTOCOL://HOST:PORT, e.g. tcp://10.0.0.5:8786")
    return text


def _check_not_an_input(out: Path, model_path, listed) -> None:
    """Refuse an output (or its failures side file) that is one of the inputs: the model or an
    image to scan (the same file, by :func:`os.path.samefile`; through a link too)."""
    for target, what in ((out, "output"), (failures_path(out), "failures side file")):
        if not target.exists():
            continue
        if same_file(target, model_path):
            raise InputError(f"the {what} is the model file; choose another --out", path=target)
        for p, name in listed:
            if same_file(target, p):
                raise InputError(f"the {what} is one of the images to scan ({name}); choose "
                                 "another --out", path=target)


def _scan_locked(model, model_path, paths, out: Path, settings, jobs, cluster, resume, force,
                 draw_dir, fmt, batch_images, batch_seconds, progress, on_image,
                 limit, labels, label, threshold_from, drawer=None) -> RunSummary:
    """:func:`scan_paths` once it holds the output's lock."""
    if out.exists() and not (force or resume):
        raise InputError("output exists; add --force to replace it or --resume to continue it",
                         path=out)
    side = failures_path(out)
    if side.exists() and not (force or resume):
        raise InputError("the failures side file of this output exists; add --force to replace "
                         "it or --resume to continue the run", path=side)
    if side.is_dir():
        raise InputError("the failures side file of this output would go where a folder is",
                         path=side)
    if draw_dir is not None:
        check_draw_dir(draw_dir, paths)
    for p in paths:
        if not os.path.lexists(p):
            raise InputError("no such file or folder", path=p)
    folder_failures: list = []
    skipped_names: list = []
    listed, skipped = list_images(paths, failures=folder_failures, skipped_names=skipped_names)
    if not listed and not folder_failures and not (resume and out.exists()):
        others = (f"; {skipped} other file{'s' if skipped != 1 else ''} skipped "
                  f"({named_list(skipped_names)})" if skipped else "")
        where = paths[0] if len(paths) == 1 else None
        raise InputError("no image files to scan (png, jpg, jpeg, bmp, tif, tiff)" + others,
                         path=where)
    _check_unique_names(listed)
    _check_not_an_input(out, model_path, listed)
    result_ids = None
    if label is not None and labels is None:
        raise InputError("a category name (--label) needs the COCO labels file it is in (--labels)")
    if labels is not None:
        result_ids = coco_result_ids(labels, label)
        for _, name in listed:  # every image needs its id before any is scanned
            result_ids.image_id(name)
    summary = RunSummary(skipped_files=skipped, skipped_names=skipped_names, out=str(out))
    record = scan_record(model_path, model, settings, paths, threshold_from)
    done: list[ImageResult] = []
    if resume and out.exists():
        if fmt not in ("csv", "csv-corners"):
            raise InputError("--resume continues CSV output only", path=out)
        kept = read_detections(out)
        check_same_scan(out, model_path, settings)
        for d in kept:
            done.append(ImageResult(d.image, d.boxes, d.scores))
        summary.resumed = len(done)
    seen = {r.image for r in done}
    todo = [(p, name) for p, name in listed if name not in seen]
    if draw_dir is not None:
        _check_draw_targets(draw_dir, paths, [name for _, name in todo], replace=force or resume)
    source = {name: p for p, name in todo}
    total = len(todo) + len(folder_failures)
    start = time.perf_counter()
    results = [r for r in done if r.error is None]
    state = {"pending": 0, "last_write": start, "write_cost": 0.0}

    def write_now():
        t0 = time.perf_counter()
        _write(out, fmt, results, record, result_ids)
        now = time.perf_counter()
        state.update(pending=0, last_write=now, write_cost=now - t0)

    def handle(r: ImageResult):
        summary.images += 1
        if r.error is not None:
            summary.failures.append((r.image, r.error))
        else:
            results.append(r)
            summary.detections += len(r.scores)
            summary.windows += r.windows
            summary.trees += r.trees
            if draw_dir is not None:
                try:
                    gray = read_gray(source[r.image])
                    dst = _draw_path(draw_dir, r.image)
                    dst.parent.mkdir(parents=True, exist_ok=True)
                    image = (draw_detections(gray, r.boxes, r.scores) if drawer is None
                             else drawer(gray, r.image, r.boxes, r.scores))
                    ok, buf = cv2.imencode(".png", image)
                    if ok:
                        write_bytes(dst, buf.tobytes())
                        summary.drawn += 1
                except (InputError, OSError):
                    pass
        state["pending"] += 1
        since = time.perf_counter() - state["last_write"]
        # rewriting the whole file costs more as it grows: keep it under a tenth of the run
        if ((state["pending"] >= batch_images or since >= batch_seconds)
                and since >= 9.0 * state["write_cost"]):
            write_now()
        if on_image is not None:
            on_image(r)
        if progress is not None:
            progress(summary.images, total)

    settings_dict = dict(settings.__dict__)
    try:
        for name, reason in folder_failures:
            handle(ImageResult(name, np.zeros((0, 4)), np.zeros(0), error=reason))
        if cluster:
            _run_on_cluster(model_path, settings_dict, todo, cluster, handle, limit)
        elif jobs > 1 and len(todo) > 1:
            import multiprocessing as mp

            ctx = mp.get_context("fork") if hasattr(os, "fork") else mp.get_context("spawn")
            with ctx.Pool(jobs, initializer=_init_worker,
                          initargs=(str(model_path), settings_dict)) as pool:
                for r in pool.imap(_scan_in_worker, todo, chunksize=2):
                    handle(r)
        else:
            for r in scan_reading_ahead(Engine(model, settings), todo):
                handle(r)
    except BaseException:
        # interrupted (Ctrl-C, a lost cluster, ...): keep every complete image for --resume
        if state["pending"]:
            try:
                write_now()
                _write_failures(out, summary.failures)
            except Exception:
                pass
        raise
    write_now()
    summary.seconds = time.perf_counter() - start
    summary.failures_file = _write_failures(out, summary.failures)
    return summary


def _read_failure(path, err: OSError) -> str:
    """The reason :func:`detector.io.images.read_gray` gives for a file that cannot be opened, so a
    cluster run lists failures in the same words as a local one."""
    try:
        read_gray(path)
    except InputError as e:
        return e.message
    return f"cannot read image: {err.strerror or err}"


def _too_large(path, limit: int) -> str | None:
    """The reason :func:`detector.io.images.read_gray` gives for an image above ``limit`` pixels
    (known from its header), or None: such an image is refused here and never sent to a worker."""
    try:
        size = header_size(path)
    except InputError:
        return None  # the worker reports what is wrong with it
    if size is None or size[0] * size[1] <= limit:
        return None
    try:
        read_gray(path)  # refuses from the header, in the words a local run uses
    except InputError as e:
        return e.message
    return None


def _run_on_cluster(model_path, settings: dict, todo, address: str, handle, limit: int):
    """Send every image (as bytes) to a Dask distributed cluster; results come back in order.

    Images above the size limit of this machine (``limit`` pixels) are refused here, in the
    same words as a local run, before their bytes travel."""
    try:
        from distributed import Client
    except ImportError:  # pragma: no cover - dask[distributed] is a dependency
        raise InputError("--cluster needs dask[distributed]") from None
    address = check_cluster_address(address)
    model_bytes = read_bytes(model_path)
    try:
        client = Client(address, timeout="20s", set_as_default=False)
    except Exception as err:  # OSError, TimeoutError, ValueError, ...: one line, whichever
        raise InputError(f"cannot reach the Dask scheduler at {address}: {_one_line(err)}") from None
    try:
        _feed_cluster(client, model_bytes, settings, todo, handle, limit)
    except (InputError, KeyboardInterrupt):
        raise
    except Exception as err:  # a lost scheduler or worker, a task that failed there, ...
        raise InputError(f"the Dask cluster at {address} failed: {_one_line(err)}") from None
    finally:
        try:
            client.close(timeout=10)
        except Exception:
            pass


def _one_line(err: BaseException) -> str:
    text = " ".join(str(err).split())
    text = text if len(text) <= 200 else text[:197] + "..."
    return f"{type(err).__name__}: {text}" if text else type(err).__name__


def _feed_cluster(client, model_bytes: bytes, settings: dict, todo, handle, limit: int) -> None:
    """The cluster run proper: at most a few tasks in flight, results handled in order."""
    byte_limit = max_file_bytes(limit)
    model_future = client.scatter(model_bytes, broadcast=True)
    # at most `window` tasks in flight, each of up to CLUSTER_BATCH_IMAGES images; a handled
    # future is dropped at once, so the cluster forgets its result and memory stays flat
    # however long the run
    window = max(2, 2 * len(client.scheduler_info().get("workers", {})))
    futures = deque()  # a batch's future, or an image refused here, in the order of `todo`
    it = iter(todo)

    def submit(batch):
        # the bytes travel by scatter, the task message carries only their key: Dask keeps a
        # debugging log of recent task messages (distributed.admin.low-level-log-length),
        # which would otherwise hold up to a thousand images in the client and the scheduler
        data_future = client.scatter([batch], hash=False)[0]
        futures.append(client.submit(scan_bytes_batch, model_future, settings, data_future,
                                     pure=False))

    def submit_next():
        batch, size = [], 0
        while len(batch) < CLUSTER_BATCH_IMAGES and size < CLUSTER_BATCH_BYTES:
            try:
                p, name = next(it)
            except StopIteration:
                break
            reason = _too_large(p, limit)
            if reason is None:
                try:
                    data = read_bytes(p, byte_limit)
                except OSError as err:
                    reason = _read_failure(p, err)
            if reason is not None:  # keep the order: the batch so far goes first
                if batch:
                    submit(batch)
                futures.append(ImageResult(name, np.zeros((0, 4)), np.zeros(0), error=reason))
                return
            batch.append((name, data))
            size += len(data)
        if batch:
            submit(batch)

    for _ in range(window):
        submit_next()
    while futures:
        f = futures.popleft()
        results = [f] if isinstance(f, ImageResult) else f.result()
        del f
        for r in results:
            handle(r)
        submit_next()
