"""Reading the curve: the reachable threshold that meets a target precision or recall, recall at
a number of false alarms per image and back, and the operating-point policy of the score report
(:func:`choose_operating_point`: a target, or the best-F1 threshold).
"""

from __future__ import annotations

import math

import numpy as np

from detector._validation import check_real, finite_or_none
from detector.errors import InputError
from detector.evaluation.curves import reachable
from detector.evaluation.results import Evaluation, Figures, OperatingPoint

__all__ = ["check_targets", "choose_operating_point", "fppi_at_recall", "operating_point", "recall_at_fppi"]

# --------------------------------------------------------------------------------------------
# reading the curve


def _reachable_points(figures: Figures) -> np.ndarray:
    return np.flatnonzero(reachable(np.asarray(figures.thresholds)))


def operating_point(figures: Figures, target_precision: float | None = None,
                    target_recall: float | None = None) -> OperatingPoint | None:
    """The score threshold that meets a target precision or a target recall.

    Give exactly one target. Only thresholds a score cut can produce are considered (the last
    point of each tie of scores).

    Parameters
    ----------
    figures : Figures or Evaluation
    target_precision : float, optional
        Returns the threshold of highest recall whose precision is at least this (the highest
        such threshold when several give that recall).
    target_recall : float, optional
        Returns the highest threshold whose recall is at least this.

    Returns
    -------
    OperatingPoint or None
        ``None`` when no threshold meets the target (or recall is undefined).

    Examples
    --------
    >>> from detector.evaluation import evaluate
    >>> ev = evaluate({"a.png": ([[0, 0, 10, 10], [40, 0, 10, 10], [20, 0, 10, 10]], [0.9, 0.8, 0.7])},
    ...               {"a.png": [[0, 0, 10, 10], [20, 0, 10, 10]]}, size_buckets=None)
    >>> operating_point(ev, target_precision=0.6)
    OperatingPoint(threshold=0.7, precision=0.6666666666666666, recall=1.0, false_alarms_per_image=1.0)
    >>> operating_point(ev, target_recall=0.5).threshold
    0.9
    """
    if (target_precision is None) == (target_recall is None):
        raise ValueError("operating_point: give exactly one of target_precision and target_recall")
    idx = _reachable_points(figures)
    precision = np.asarray(figures.precision)[idx]
    recall = np.asarray(figures.recall)[idx]
    if len(idx) == 0 or np.isnan(recall).any():
        return None
    if target_precision is not None:
        ok = precision >= target_precision
        if not ok.any():
            return None
        best = recall[ok].max()
        i = idx[np.flatnonzero(ok & (recall == best))[0]]
    else:
        ok = recall >= target_recall
        if not ok.any():
            return None
        i = idx[np.flatnonzero(ok)[0]]
    return OperatingPoint(threshold=float(figures.thresholds[i]), precision=float(figures.precision[i]),
                          recall=float(figures.recall[i]),
                          false_alarms_per_image=float(figures.false_alarms_per_image[i]))


def recall_at_fppi(figures: Figures, fppi: float) -> float:
    """Recall at the reachable threshold of largest FPPI not exceeding ``fppi``.

    The same reading rule as :func:`log_average_miss_rate`, so that
    ``1 - recall_at_fppi(f)`` is the miss rate it reads at ``f``.

    Parameters
    ----------
    figures : Figures or Evaluation
    fppi : float
        False alarms per image allowed.

    Returns
    -------
    float
        0 when every threshold exceeds ``fppi`` (keep nothing); ``nan`` without ground truth.

    Examples
    --------
    >>> from detector.evaluation import evaluate
    >>> ev = evaluate({"a.png": ([[0, 0, 10, 10], [40, 0, 10, 10], [20, 0, 10, 10]], [0.9, 0.8, 0.7])},
    ...               {"a.png": [[0, 0, 10, 10], [20, 0, 10, 10]]}, size_buckets=None)
    >>> recall_at_fppi(ev, 0.5), recall_at_fppi(ev, 1.0)
    (0.5, 1.0)
    """
    if figures.objects == 0 or figures.images == 0:
        return math.nan
    idx = _reachable_points(figures)
    f = np.asarray(figures.false_alarms_per_image)[idx]
    ok = np.flatnonzero(f <= fppi)
    return float(np.asarray(figures.recall)[idx[ok[-1]]]) if len(ok) else 0.0


def fppi_at_recall(figures: Figures, recall: float) -> float | None:
    """False alarms per image at the highest reachable threshold whose recall is at least ``recall``.

    Parameters
    ----------
    figures : Figures or Evaluation
    recall : float
        Target recall, e.g. 0.9.

    Returns
    -------
    float or None
        ``None`` when the recall is never reached (or is undefined).

    Examples
    --------
    >>> from detector.evaluation import evaluate
    >>> ev = evaluate({"a.png": ([[0, 0, 10, 10], [40, 0, 10, 10], [20, 0, 10, 10]], [0.9, 0.8, 0.7])},
    ...               {"a.png": [[0, 0, 10, 10], [20, 0, 10, 10]]}, size_buckets=None)
    >>> fppi_at_recall(ev, 0.9), fppi_at_recall(ev, 0.5)
    (1.0, 0.0)
    """
    point = operating_point(figures, target_recall=recall)
    return None if point is None else point.false_alarms_per_image


# --------------------------------------------------------------------------------------------
# the operating-point policy: which threshold a report recommends


def _check_target(name: str, value) -> float | None:
    if value is None:
        return None
    return check_real(value, f"the target {name}", low=0, high=1, low_open=True)


def check_targets(target_precision: float | None = None,
                  target_recall: float | None = None) -> tuple[float | None, float | None]:
    """The targets of :func:`choose_operating_point` as floats, checked: each None or in (0, 1],
    not both given (else one :class:`~detector.errors.InputError`).

    Examples
    --------
    >>> check_targets(target_recall="0.9")
    (None, 0.9)
    """
    p_target = _check_target("precision", target_precision)
    r_target = _check_target("recall", target_recall)
    if p_target is not None and r_target is not None:
        raise InputError("give a target precision or a target recall, not both")
    return p_target, r_target


def choose_operating_point(evaluation: Evaluation, target_precision: float | None = None,
                           target_recall: float | None = None) -> dict:
    """The score threshold to recommend: one that meets a target, or the best-F1 one.

    Parameters
    ----------
    evaluation : Evaluation
    target_precision : float, optional
        Recommend the threshold of highest recall whose precision is at least this.
    target_recall : float, optional
        Recommend the highest threshold whose recall is at least this.
        With neither target, the threshold of best F1 is recommended.

    Returns
    -------
    dict
        ``threshold``, ``precision``, ``recall``, ``false_alarms_per_image`` (``None`` when the
        rule cannot be met), ``f1``, ``rule`` (the rule in words), ``met`` (bool) and ``note``
        (one line saying what was found, or why nothing meets the rule).

    Raises
    ------
    InputError
        Both targets given, or a target outside (0, 1].

    Examples
    --------
    Scores 0.9 (hit), 0.8 (false alarm), 0.7 (hit) on one image with two objects:

    >>> from detector.evaluation import evaluate
    >>> ev = evaluate({"a.png": ([[0, 0, 10, 10], [40, 0, 10, 10], [20, 0, 10, 10]],
    ...                          [0.9, 0.8, 0.7])},
    ...               {"a.png": [[0, 0, 10, 10], [20, 0, 10, 10]]}, size_buckets=None)
    >>> choose_operating_point(ev)["threshold"]  # F1: 0.667, 0.5, 0.8
    0.7
    >>> choose_operating_point(ev, target_precision=0.9)["threshold"]
    0.9
    >>> point = choose_operating_point(ev, target_recall=1.0, target_precision=None)
    >>> point["rule"], round(point["precision"], 3)
    ('highest threshold with recall >= 1', 0.667)
    """
    p_target, r_target = check_targets(target_precision, target_recall)
    empty = dict(threshold=None, precision=None, recall=None, false_alarms_per_image=None,
                 f1=None)
    if p_target is None and r_target is None:
        rule = "best F1"
        t = finite_or_none(evaluation.best_f1_threshold)
        if t is None:
            why = ("there are no labelled objects" if evaluation.objects == 0
                   else "there are no detections on labelled images")
            return dict(empty, rule=rule, met=False, note=f"no threshold to recommend: {why}")
        point = dict(threshold=t, precision=finite_or_none(evaluation.best_f1_precision),
                     recall=finite_or_none(evaluation.best_f1_recall),
                     false_alarms_per_image=finite_or_none(evaluation.best_f1_false_alarms_per_image),
                     f1=finite_or_none(evaluation.best_f1))
        return dict(point, rule=rule, met=True,
                    note=f"threshold {t:.4g} gives the best F1 ({point['f1']:.3f})")
    if p_target is not None:
        rule = f"highest recall with precision >= {p_target:g}"
        found = operating_point(evaluation, target_precision=p_target)
    else:
        rule = f"highest threshold with recall >= {r_target:g}"
        found = operating_point(evaluation, target_recall=r_target)
    if found is None:
        if evaluation.objects == 0:
            why = "there are no labelled objects"
        elif evaluation.detections == 0:
            why = "there are no detections on labelled images"
        elif p_target is not None:
            best = float(np.max(np.asarray(evaluation.precision)[reachable(np.asarray(evaluation.thresholds))]))
            why = f"no threshold reaches precision {p_target:g} (the highest is {best:.3f})"
        else:
            best = float(np.nanmax(evaluation.recall))
            why = f"no threshold reaches recall {r_target:g} (the highest is {best:.3f})"
        return dict(empty, rule=rule, met=False, note=f"cannot be met: {why}")
    p, r = found.precision, found.recall
    f1 = 2 * p * r / (p + r) if p + r > 0 else 0.0
    return dict(threshold=found.threshold, precision=p, recall=r,
                false_alarms_per_image=finite_or_none(found.false_alarms_per_image), f1=f1, rule=rule,
                met=True, note=f"threshold {found.threshold:.4g} gives precision {p:.3f}, "
                               f"recall {r:.3f}")
