"""Hard-negative mining: scan images with the current model and turn its false alarms into new
background patches (common practice since Sung and Poggio, 1998, "bootstrapping"; Felzenszwalb et
al., PAMI 2010 call them hard negatives).
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

from detector.evaluation import evaluate
from detector.forest import worker_count
from detector.geometry import crop_region, iou
from detector.io.images import read_gray
from detector.scan import Engine, ScanSettings


@dataclass
class MiningRound:
    """What one mining round found.

    Attributes
    ----------
    patches : ndarray of uint8 (n, H, W)
        New background patches (the false alarms, cut as the scan saw them).
    boxes : ndarray of float32 (n, 4)
        The false alarms' object boxes.
    images : list of str
        Image name of each patch.
    scores : ndarray of float64 (n,)
    false_alarms_per_image : float
        At the scan threshold, after non-maximum suppression, before adding anything.
    recall : float
        Share of labelled objects found at the scan threshold (IoU >= 0.5).
    images_scanned : int
    counted_only : bool
        A final model's check: false alarms and recall counted, nothing collected.
    last : bool
        Set by :func:`~detector.training.train_with_mining` when mining ends after this round
        (its patches added, too few for another round).
    """

    patches: np.ndarray
    boxes: np.ndarray
    images: list
    scores: np.ndarray
    false_alarms_per_image: float
    recall: float
    images_scanned: int
    counted_only: bool = False
    last: bool = False


#: Bytes of grey images a :class:`FrameCache` keeps (mining rounds scan the same images).
FRAME_CACHE_BYTES = 256 << 20


class FrameCache:
    """Grey images read once for several mining rounds: up to ``limit`` bytes are kept, the
    rest read again each time (on the cross-data benchmark's cups, 80 images of 480 x 360, a
    round read them in 0.12 s of CPU).

    >>> cache = FrameCache(limit=10)
    >>> calls = []
    >>> read = lambda name: calls.append(name) or np.zeros((2, 3), np.uint8)
    >>> cache.get("a", read).shape, cache.get("a", read).shape, calls     # read once
    ((2, 3), (2, 3), ['a'])
    >>> _ = cache.get("b", read); _ = cache.get("b", read); calls          # 6 + 6 > 10 bytes
    ['a', 'b', 'b']
    """

    def __init__(self, limit: int = FRAME_CACHE_BYTES):
        import threading

        self.limit = int(limit)
        self.kept: dict = {}
        self.size = 0
        self._lock = threading.Lock()

    def get(self, name, read):
        found = self.kept.get(name)
        if found is not None:
            return found
        gray = read(name)
        with self._lock:
            if name not in self.kept and self.size + gray.nbytes <= self.limit:
                self.kept[name] = gray
                self.size += gray.nbytes
        return gray


def mine(model, images_dir, items, *, settings: ScanSettings | None = None, per_image: int = 20,
         per_round: int = 4000, max_iou: float = 0.3, mining_threshold: float = 0.3,
         progress=None, count_only: bool = False, n_jobs=None,
         frames: FrameCache | None = None) -> MiningRound:
    """Scan labelled images and collect the highest-scoring windows that overlap no labelled box.

    Parameters
    ----------
    model : detector.model.Model
    images_dir : path
        Folder the image names are relative to.
    items : list of ImageLabels
    settings : ScanSettings
        Scan settings (their ``threshold`` is where recall and false alarms are counted).
    per_image, per_round : int
        Caps on the new patches from one image and from the whole round (the highest-scoring
        ones are kept).
    max_iou : float
        A false alarm must have IoU below this with every labelled box.
    mining_threshold : float
        Windows scoring at least this are mining candidates (below the detection threshold, so a
        round also hardens the model against near misses).
    count_only : bool
        Only count false alarms and recall at ``settings.threshold``, with the exits for that
        threshold (``exit_level``), and collect no patches: the check of a final model, several
        times faster than a mining scan (on the cross-data benchmark's horses, 4.4 s against
        14.6 s for 80 images).
    n_jobs : int, optional
        Images scanned at once, on threads (the engine's compiled loops release the GIL and its
        work space is per thread); the result does not depend on it.
    frames : FrameCache, optional
        Grey images kept from an earlier round (and filled by this one).
    """
    settings = settings or ScanSettings()
    low = ScanSettings(**{**settings.__dict__, "threshold": min(mining_threshold, settings.threshold)})
    # the default exits keep every calibration object whatever the threshold, so a false alarm a
    # scan could report does not escape mining by exiting early here
    # (boxes as the windows scored them: mining cuts those windows, and voting would keep more
    # windows as candidates)
    engine = Engine(model, ScanSettings(**{**low.__dict__, "exit_level": None, "box_voting": None})
                    if not count_only else
                    ScanSettings(**{**settings.__dict__, "exit_level": settings.threshold,
                                    "box_voting": None}))
    W, H = engine.window

    def one(it):
        """The detections of one image, and its mining candidates: (patch, box, score) each."""
        path = os.path.join(os.fspath(images_dir), it.image)
        gray = read_gray(path) if frames is None else frames.get(path, read_gray)
        wboxes, raw, _, _ = engine.candidates(gray)
        size = gray.shape[::-1]
        found = engine.detections(wboxes, raw, threshold=settings.threshold, image_size=size)
        if count_only:
            return found, []
        # diverse candidates: looser suppression than detection, then away from every object
        cand, cand_scores, cand_windows = engine.detections(wboxes, raw, nms_iou=0.5,
                                                            image_size=size, windows=True)
        if len(cand) and len(it.boxes):
            far = iou(cand, it.boxes).max(axis=1) < max_iou
            cand, cand_scores, cand_windows = cand[far], cand_scores[far], cand_windows[far]
        # the window as the scan saw it (border pixels repeated past the image's edges)
        return found, [(crop_region(gray, (wx + ww / 2, wy + wh / 2), (ww, wh), (W, H)), box, score)
                       for box, score, (wx, wy, ww, wh) in zip(cand[:per_image],
                                                               cand_scores[:per_image],
                                                               cand_windows[:per_image])]

    patches, boxes, names, scores = [], [], [], []
    dets, gts = {}, {}
    workers = min(worker_count(n_jobs), max(1, len(items)))
    executor = ThreadPoolExecutor(workers) if workers > 1 else None
    try:
        results = map(one, items) if executor is None else executor.map(one, items)
        for i, (it, (found, candidates)) in enumerate(zip(items, results)):
            dets[it.image] = found
            gts[it.image] = it.boxes
            for patch, box, score in candidates:
                patches.append(patch)
                boxes.append(box)
                names.append(it.image)
                scores.append(score)
            if progress is not None:
                progress(i + 1, len(items))
    finally:
        if executor is not None:
            executor.shutdown(cancel_futures=True)
    ev = evaluate(dets, gts)
    order = np.argsort(-np.asarray(scores), kind="stable")[:per_round]
    return MiningRound(
        patches=np.stack([patches[k] for k in order]) if len(order) else np.zeros((0, H, W), np.uint8),
        boxes=np.asarray([boxes[k] for k in order], np.float32).reshape(-1, 4),
        images=[names[k] for k in order],
        scores=np.asarray([scores[k] for k in order], np.float64),
        false_alarms_per_image=ev.false_alarms / max(ev.images, 1),
        recall=(ev.true_detections / ev.objects) if ev.objects else float("nan"),
        images_scanned=len(items),
        counted_only=bool(count_only),
    )
