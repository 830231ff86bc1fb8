"""The data behind the report's threshold slider: every detection on a labelled image with its
score and what it matched, and every labelled image's count of objects, small enough to embed in
``report.html`` so that the page recounts at any threshold without a server.

Matching is greedy in descending score (:func:`detector.evaluation.match_image`'s rule, as
:func:`detector.evaluation.evaluate` applies it), so a threshold keeps a prefix of that order and a
detection's outcome is the same at every threshold: the counts at ``t`` need only the scores.
:func:`counts_at` is the reference reading of the data; ``assets/threshold-slider.js`` reads it the
same way in the browser.

The data (JSON)::

    {"format": 1, "iou_threshold": 0.5, "start": 0.6, "recommended": 0.6, "rule": "best F1",
     "images": ["a.png", "b.png"], "objects": [2, 1],
     "detections": {"image": [0, 0, 1], "score": [0.9, 0.6, 0.8], "match": [0, -1, -1]}}

``images`` are the labelled images (sorted, as :attr:`Evaluation.per_image`), ``objects`` the
labelled boxes each counts; ``detections`` is one column per field, grouped by image in the
detections file's order: the image's index, the score, and the index of the labelled box the
detection is a true detection of, -1 for a false alarm, -2 for one counted neither way (matched to
an ignore region, or outside the size range; :attr:`Evaluation.matches`). Detections on images
that are not labelled are left out, as they are from every figure.
"""

from __future__ import annotations

import math

import numpy as np

from detector.evaluation import FALSE_ALARM, Evaluation

__all__ = ["counts_at", "threshold_data"]


def threshold_data(evaluation: Evaluation, detections: dict, point: dict | None = None) -> dict:
    """The slider's data, ready for ``json.dumps``.

    Parameters
    ----------
    evaluation : Evaluation
        From :func:`detector.evaluation.evaluate` on ``detections``.
    detections : dict of str to (boxes, scores)
        What ``evaluation`` was computed from (only the scores are used).
    point : dict, optional
        The operating point (:func:`detector.evaluation.choose_operating_point`); the slider
        starts at its threshold, or at 0 (every detection) when it has none.

    Returns
    -------
    dict
        See the module notes.

    Examples
    --------
    >>> from detector.evaluation import evaluate
    >>> ev = evaluate({"a.png": ([[0, 0, 10, 10], [1, 0, 10, 10]], [0.6, 0.9])},
    ...               {"a.png": [[0, 0, 10, 10]], "b.png": []}, size_buckets=None)
    >>> data = threshold_data(ev, {"a.png": ([[0, 0, 10, 10], [1, 0, 10, 10]], [0.6, 0.9])})
    >>> data["images"], data["objects"], data["detections"]
    (['a.png', 'b.png'], [1, 0], {'image': [0, 0], 'score': [0.6, 0.9], 'match': [-1, 0]})
    """
    images = [row.image for row in evaluation.per_image]
    image_col: list[int] = []
    score_col: list[float] = []
    match_col: list[int] = []
    for k, name in enumerate(images):
        outcome = evaluation.matches.get(name, np.zeros(0, dtype=np.int64))
        scores = np.asarray(detections.get(name, ((), ()))[1], dtype=np.float64).reshape(-1)
        if len(scores) != len(outcome):
            raise ValueError(f"image {name!r}: {len(scores)} scores but the evaluation matched "
                             f"{len(outcome)} detections; give the detections it was computed from")
        image_col += [k] * len(scores)
        score_col += [float(s) for s in scores]
        match_col += [int(m) for m in outcome]
    threshold = None if point is None else point.get("threshold")
    return {
        "format": 1,
        "iou_threshold": float(evaluation.iou_threshold),
        "start": 0.0 if threshold is None else float(threshold),
        "recommended": None if threshold is None else float(threshold),
        "rule": None if point is None else point.get("rule"),
        "images": images,
        "objects": [int(row.objects) for row in evaluation.per_image],
        "detections": {"image": image_col, "score": score_col, "match": match_col},
    }


def counts_at(data: dict, threshold: float) -> dict:
    """The counts the slider shows at ``threshold``: the detections scoring ``threshold`` or more.

    Returns
    -------
    dict
        ``true_detections``, ``false_alarms``, ``misses``, ``detections`` (kept, those counted
        neither way included), ``precision`` (``nan`` when nothing counted is kept), ``recall``
        (``nan`` without objects), and ``per_image``: one dict per image with the same counts
        and ``objects``.

    Examples
    --------
    One object; 0.9 finds it, 0.6 is a second detection of it (a false alarm):

    >>> data = {"images": ["a.png"], "objects": [1],
    ...         "detections": {"image": [0, 0], "score": [0.6, 0.9], "match": [-1, 0]}}
    >>> c = counts_at(data, 0.5)
    >>> c["true_detections"], c["false_alarms"], c["misses"], c["precision"], c["recall"]
    (1, 1, 0, 0.5, 1.0)
    >>> counts_at(data, 0.95)["misses"]
    1
    """
    per_image = [{"image": name, "objects": int(n), "detections": 0, "true_detections": 0,
                  "false_alarms": 0} for name, n in zip(data["images"], data["objects"])]
    cols = data["detections"]
    for k, score, match in zip(cols["image"], cols["score"], cols["match"]):
        if score >= threshold:
            row = per_image[k]
            row["detections"] += 1
            if match >= 0:
                row["true_detections"] += 1
            elif match == FALSE_ALARM:
                row["false_alarms"] += 1
    for row in per_image:
        row["misses"] = row["objects"] - row["true_detections"]
    true = sum(r["true_detections"] for r in per_image)
    false = sum(r["false_alarms"] for r in per_image)
    objects = sum(r["objects"] for r in per_image)
    return {"true_detections": true, "false_alarms": false, "misses": objects - true,
            "detections": sum(r["detections"] for r in per_image),
            "precision": true / (true + false) if true + false else math.nan,
            "recall": true / objects if objects else math.nan, "per_image": per_image}
