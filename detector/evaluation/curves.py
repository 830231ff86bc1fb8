"""Summaries of a precision-recall curve: average precision (all-point, 11-point, 101-point) and
the log-average miss rate; which curve points a score threshold can reach.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from numpy.typing import ArrayLike

import math

import numpy as np

from detector.evaluation.results import COCO_RECALL_POINTS, LOG_AVERAGE_FPPI, VOC2007_RECALL_POINTS

__all__ = ["average_precision", "log_average_miss_rate", "reachable"]

# --------------------------------------------------------------------------------------------
# curve summaries


def average_precision(precision: ArrayLike, recall: ArrayLike, method: str = "all-points") -> float:
    """Average precision of a precision-recall curve.

    Parameters
    ----------
    precision, recall : array_like, shape (D,)
        One point per detection in descending score (recall non-decreasing).
    method : {"all-points", "11-point", "101-point"}
        - ``"all-points"``: PASCAL VOC from 2010 (Everingham et al., IJCV 2010): the area under the
          interpolated envelope ``p_interp(r) = max(precision at recall >= r)``, summed over the
          recall steps; recall beyond the last point adds 0.
        - ``"11-point"``: PASCAL VOC 2007: the mean of ``p_interp`` at recall 0, 0.1, ..., 1
          (0 where recall never reaches the point).
        - ``"101-point"``: COCO (Lin et al., 2014): the same mean at recall 0, 0.01, ..., 1.

    Returns
    -------
    float
        0 for an empty curve; ``nan`` if recall is undefined (no ground truth).

    Examples
    --------
    Four objects; detections true, false, true, false, true. Precision 1, 1/2, 2/3, 2/4, 3/5 at
    recall 1/4, 1/4, 2/4, 2/4, 3/4; the envelope is 1 up to 1/4, 2/3 up to 1/2, 3/5 up to 3/4:
    all-point AP = 1/4 * 1 + 1/4 * 2/3 + 1/4 * 3/5 = 17/30.

    >>> p = [1, 1/2, 2/3, 2/4, 3/5]; r = [1/4, 1/4, 2/4, 2/4, 3/4]
    >>> round(average_precision(p, r), 6), round(average_precision(p, r, "11-point"), 6)
    (0.566667, 0.563636)
    """
    p = np.asarray(precision, dtype=np.float64).reshape(-1)
    r = np.asarray(recall, dtype=np.float64).reshape(-1)
    if len(p) != len(r):
        raise ValueError(f"average_precision: {len(p)} precision values but {len(r)} recall values")
    if np.isnan(r).any():
        return math.nan
    if len(p) == 0:
        return 0.0
    if method == "all-points":
        mrec = np.concatenate([[0.0], r, [1.0]])
        mpre = np.concatenate([[0.0], p, [0.0]])
        mpre = np.maximum.accumulate(mpre[::-1])[::-1]
        i = np.flatnonzero(mrec[1:] != mrec[:-1]) + 1
        return float(np.sum((mrec[i] - mrec[i - 1]) * mpre[i]))
    if method == "11-point":
        points = VOC2007_RECALL_POINTS
    elif method == "101-point":
        points = COCO_RECALL_POINTS
    else:
        raise ValueError(f"average_precision: unknown method {method!r}; "
                         "use 'all-points', '11-point' or '101-point'")
    return _sampled_ap(p, r, points)


def _sampled_ap(p: np.ndarray, r: np.ndarray, points: np.ndarray) -> float:
    """Mean of the interpolated precision at the given recall points (0 beyond the curve)."""
    if len(p) == 0:
        return 0.0
    envelope = np.maximum.accumulate(p[::-1])[::-1]
    idx = np.searchsorted(r, points, side="left")
    reached = idx < len(p)
    q = np.where(reached, envelope[np.minimum(idx, len(p) - 1)], 0.0)
    return float(np.mean(q))


def log_average_miss_rate(false_alarms_per_image: ArrayLike, miss_rate: ArrayLike,
                          reference: ArrayLike | None = None) -> float:
    """Log-average miss rate (Dollar et al., PAMI 2012).

    For each reference FPPI value ``f`` (by default nine values evenly spaced in log space from
    0.01 to 1) take the miss rate of the curve point with the largest FPPI not exceeding ``f``
    (the last such point in curve order, i.e. the lowest miss rate at that FPPI); if no point
    qualifies, the miss rate of the curve's first point (its highest). The result is the geometric
    mean of those nine miss rates, each clamped below at 1e-10 so that a zero miss rate does not
    take the log to minus infinity (the clamp is the usual one, from memory).

    :func:`evaluate` passes the curve of reachable thresholds preceded by the point
    ``(FPPI 0, miss rate 1)`` of keeping no detection, so that a reference FPPI smaller than every
    point's FPPI reads a miss rate of 1.

    Parameters
    ----------
    false_alarms_per_image, miss_rate : array_like, shape (D,)
        The curve in descending score (FPPI non-decreasing).
    reference : array_like, optional
        Reference FPPI values; default :data:`LOG_AVERAGE_FPPI`.

    Returns
    -------
    float
        1 for an empty curve (nothing detected); ``nan`` if the miss rate is undefined.

    Examples
    --------
    A curve through (FPPI 0, 0.8), (0.02, 0.6), (0.05, 0.5), (0.2, 0.4), (0.5, 0.3), (2, 0.1):
    the nine references 0.01, 0.018, 0.032, 0.056, 0.1, 0.18, 0.32, 0.56, 1 read 0.8, 0.8, 0.6,
    0.5, 0.5, 0.5, 0.4, 0.3, 0.3, whose product is 0.001728 = 0.12**3, so the geometric mean is
    0.12 ** (1/3):

    >>> lamr = log_average_miss_rate([0, 0.02, 0.05, 0.2, 0.5, 2], [0.8, 0.6, 0.5, 0.4, 0.3, 0.1])
    >>> round(lamr, 6), round(0.12 ** (1 / 3), 6)
    (0.493242, 0.493242)
    """
    f = np.asarray(false_alarms_per_image, dtype=np.float64).reshape(-1)
    m = np.asarray(miss_rate, dtype=np.float64).reshape(-1)
    if len(f) != len(m):
        raise ValueError(f"log_average_miss_rate: {len(f)} FPPI values but {len(m)} miss rates")
    ref = LOG_AVERAGE_FPPI if reference is None else np.asarray(reference, dtype=np.float64)
    if np.isnan(m).any() or np.isnan(f).any():
        return math.nan
    if len(f) == 0:
        return 1.0
    # index of the last point with FPPI <= reference (FPPI is non-decreasing along the curve)
    idx = np.searchsorted(f, ref, side="right") - 1
    at = np.where(idx >= 0, m[np.maximum(idx, 0)], m[0])
    return float(np.exp(np.mean(np.log(np.maximum(at, 1e-10)))))


def reachable(thresholds: np.ndarray) -> np.ndarray:
    """Mask of the curve points a score threshold can produce: the last point of each tie."""
    n = len(thresholds)
    if n == 0:
        return np.zeros(0, dtype=bool)
    return np.concatenate([thresholds[:-1] != thresholds[1:], [True]])
