"""The score report's plots (matplotlib, Agg canvas: no display needed): precision-recall,
miss rate against false alarms per image, and the score histograms.
"""

from __future__ import annotations

import os
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from matplotlib.figure import Figure

import numpy as np

from detector._validation import finite_or_none
from detector.evaluation import Evaluation
from detector.evaluation.curves import reachable
from detector.io.files import atomic_write
from detector.reporting.drawing import BOX_STYLES, hex_colour
from detector.reporting.summary import ap_name, percent

__all__ = [
    "new_figure",
    "plot_miss_rate",
    "plot_precision_recall",
    "plot_score_histogram",
    "save_figure",
]

_CURVE_RGB = (0, 114, 178)  # Okabe & Ito blue, for curves


def new_figure(width: float = 5.4, height: float = 4.2) -> Figure:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=110)
    FigureCanvasAgg(fig)
    # fixed margins (in inches, so both figure sizes look alike): a layout engine draws twice
    fig.subplots_adjust(left=0.75 / width, right=1 - 0.15 / width, bottom=0.55 / height,
                        top=1 - 0.35 / height)
    return fig


def save_figure(fig: Figure, path: str | os.PathLike) -> None:
    with atomic_write(path) as fh:
        fig.savefig(fh, format="png", metadata={"Software": None})


def _nothing_to_draw(ax, text: str) -> None:
    ax.text(0.5, 0.5, text, ha="center", va="center", transform=ax.transAxes, color="#555555")


def plot_precision_recall(evaluation: Evaluation, path: str | os.PathLike,
                          point: dict | None = None) -> None:
    """Draw the precision-recall curve with its AP in the legend and the operating point marked.

    The raw curve (one point per detection in descending score) is drawn with the interpolated
    precision (the highest precision at any recall at least as large; its area is the all-point
    AP) and faint lines of equal F1.

    Parameters
    ----------
    evaluation : Evaluation
    path : str or os.PathLike
        The PNG to write.
    point : dict, optional
        From :func:`choose_operating_point`; marked when it has a threshold.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> from detector.evaluation import choose_operating_point, evaluate
    >>> ev = evaluate({"a.png": ([[0, 0, 10, 10]], [0.8])}, {"a.png": [[0, 0, 10, 10]]})
    >>> out = pathlib.Path(tempfile.mkdtemp()) / "pr.png"
    >>> plot_precision_recall(ev, out, choose_operating_point(ev)); out.stat().st_size > 0
    True
    """
    fig = new_figure()
    ax = fig.add_subplot()
    ax.set_xlim(0, 1.0)
    ax.set_ylim(0, 1.03)
    ax.set_xlabel("recall (share of objects found)")
    ax.set_ylabel("precision (share of detections that are right)")
    ax.set_title(f"Precision-recall at IoU {evaluation.iou_threshold:.2f}", fontsize=11)
    ax.grid(True, color="#dddddd", linewidth=0.6)
    r_grid = np.linspace(0.01, 1.0, 200)
    for f in (0.2, 0.4, 0.6, 0.8):  # precision on the curve of equal F1: p = f r / (2 r - f)
        with np.errstate(divide="ignore", invalid="ignore"):
            p = f * r_grid / (2 * r_grid - f)
        ok = (r_grid > f / 2) & (p <= 1.03) & (p > 0)
        ax.plot(r_grid[ok], p[ok], color="#bbbbbb", linewidth=0.7, linestyle=":")
        if ok.any():
            ax.text(r_grid[ok][-1], p[ok][-1] + 0.01, f"F1={f:.1f}", fontsize=7, color="#999999",
                    ha="right", va="bottom")
    recall = np.asarray(evaluation.recall, dtype=np.float64)
    precision = np.asarray(evaluation.precision, dtype=np.float64)
    colour = hex_colour(_CURVE_RGB)
    if evaluation.objects == 0:
        _nothing_to_draw(ax, "no labelled objects: recall is undefined")
    elif len(recall) == 0:
        _nothing_to_draw(ax, "no detections on labelled images (AP 0)")
    else:
        envelope = np.maximum.accumulate(precision[::-1])[::-1]
        ax.plot(np.concatenate([[0.0], recall]), np.concatenate([[envelope[0]], envelope]),
                drawstyle="steps-pre", color=colour, linewidth=2.0, alpha=0.35,
                label="interpolated precision (area = AP)")
        ax.plot(recall, precision, color=colour, linewidth=1.2,
                label=f"{ap_name(evaluation.iou_threshold)} all-point = "
                      f"{evaluation.average_precision:.3f}")
        ax.plot([], [], " ", label=f"11-point AP = {evaluation.average_precision_11_point:.3f}")
    if point and point.get("threshold") is not None:
        ax.plot([point["recall"]], [point["precision"]], marker="o", markersize=9,
                markerfacecolor=hex_colour(BOX_STYLES["false alarm"][0]), markeredgecolor="black",
                linestyle="none",
                label=f"threshold {point['threshold']:.3g} ({point['rule']}):\n"
                      f"precision {point['precision']:.3f}, recall {point['recall']:.3f}")
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc="lower left", fontsize=8, framealpha=0.92)
    save_figure(fig, path)


def plot_miss_rate(evaluation: Evaluation, path: str | os.PathLike,
                   point: dict | None = None) -> None:
    """Draw miss rate against false alarms per image (FPPI) on log axes.

    The curve is read as the log-average miss rate reads it (Dollar et al., PAMI 2012): at each
    FPPI, the miss rate of the threshold with the largest FPPI not above it; it starts at
    "keep nothing" (miss rate 1) and stays flat past the last threshold. Thresholds with no false
    alarm sit on the left edge. The shaded band is the FPPI range 0.01..1 that the log-average
    miss rate (in the legend) averages over. Parameters as :func:`plot_precision_recall`'s.

    >>> import tempfile, pathlib
    >>> from detector.evaluation import evaluate
    >>> out = pathlib.Path(tempfile.mkdtemp()) / "miss.png"
    >>> plot_miss_rate(evaluate({"a.png": ([[0, 0, 10, 10]], [0.8])}, {"a.png": [[0, 0, 10, 10]]}),
    ...                out); out.stat().st_size > 0
    True
    """
    from matplotlib.ticker import FixedLocator, NullFormatter, NullLocator

    fig = new_figure()
    ax = fig.add_subplot()
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("false alarms per image (FPPI)")
    ax.set_ylabel("miss rate (share of objects missed)")
    ax.set_title(f"Miss rate against FPPI at IoU {evaluation.iou_threshold:.2f}", fontsize=11)
    fppi = np.asarray(evaluation.false_alarms_per_image, dtype=np.float64)
    miss = np.asarray(evaluation.miss_rate, dtype=np.float64)
    reach = reachable(np.asarray(evaluation.thresholds))
    fppi, miss = fppi[reach], miss[reach]
    positive = fppi[fppi > 0]
    x_low = min(1e-3, positive.min() / 2) if len(positive) else 1e-3
    x_high = max(10.0, fppi.max() * 2) if len(fppi) else 10.0
    y_low = 0.01
    if len(miss) and np.isfinite(miss).all() and miss.min() > 0:
        y_low = min(0.01, miss.min() / 1.5)
    ax.set_xlim(x_low, x_high)
    ax.set_ylim(y_low, 1.05)
    ticks = [t for t in (0.01, 0.02, 0.05, 0.1, 0.2, 0.3, 0.5, 0.8, 1.0) if t >= y_low]
    ax.yaxis.set_major_locator(FixedLocator(ticks))
    ax.yaxis.set_minor_formatter(NullFormatter())
    ax.set_yticklabels([f"{t:g}" for t in ticks])
    x_ticks = [10.0 ** k for k in range(int(np.floor(np.log10(x_low))),
                                        int(np.ceil(np.log10(x_high))) + 1)]
    x_ticks = [t for t in x_ticks if x_low <= t <= x_high]
    ax.xaxis.set_major_locator(FixedLocator(x_ticks))
    ax.xaxis.set_minor_locator(NullLocator())
    ax.set_xticklabels([f"{t:g}" for t in x_ticks])  # plain numbers, no exponents
    ax.grid(True, which="major", color="#dddddd", linewidth=0.6)
    ax.axvspan(0.01, 1.0, color="#eeeeee", zorder=0, label="FPPI range averaged (0.01..1)")
    colour = hex_colour(_CURVE_RGB)
    if evaluation.objects == 0:
        _nothing_to_draw(ax, "no labelled objects: miss rate is undefined")
    else:
        xs = np.concatenate([[x_low], np.maximum(fppi, x_low), [x_high]])
        ys = np.concatenate([[1.0], miss, [miss[-1] if len(miss) else 1.0]])
        ys = np.maximum(ys, y_low)  # a miss rate of 0 sits on the bottom edge
        ax.plot(xs, ys, drawstyle="steps-post", color=colour, linewidth=1.6,
                label=f"log-average miss rate = {percent(evaluation.log_average_miss_rate)}")
        if len(fppi) == 0:
            ax.text(0.5, 0.3, "no detections on labelled images", ha="center",
                    transform=ax.transAxes, color="#555555")
    if point and point.get("threshold") is not None and point.get("recall") is not None:
        ax.plot([max(point["false_alarms_per_image"], x_low)],
                [max(1.0 - point["recall"], y_low)], marker="o", markersize=9,
                markerfacecolor=hex_colour(BOX_STYLES["false alarm"][0]), markeredgecolor="black",
                linestyle="none", label=f"threshold {point['threshold']:.3g} ({point['rule']})")
    ax.legend(loc="lower left", fontsize=8, framealpha=0.92)
    save_figure(fig, path)


def plot_score_histogram(evaluation: Evaluation, path: str | os.PathLike,
                         threshold: float | None = None) -> None:
    """Draw histograms of the scores of true detections and of false alarms.

    Parameters
    ----------
    evaluation : Evaluation
    path : str or os.PathLike
        The PNG to write.
    threshold : float, optional
        The recommended threshold, drawn as a vertical line.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> from detector.evaluation import choose_operating_point, evaluate
    >>> ev = evaluate({"a.png": ([[0, 0, 10, 10], [30, 0, 9, 9]], [0.8, 0.3])},
    ...               {"a.png": [[0, 0, 10, 10]]})
    >>> out = pathlib.Path(tempfile.mkdtemp()) / "hist.png"
    >>> plot_score_histogram(ev, out, 0.8); out.stat().st_size > 0
    True
    """
    from matplotlib.ticker import MaxNLocator

    fig = new_figure(5.4, 3.6)
    ax = fig.add_subplot()
    scores = np.asarray(evaluation.thresholds, dtype=np.float64)
    true = np.asarray(evaluation.is_true, dtype=bool)
    bins = np.linspace(0.0, 1.0, 26)
    ax.set_xlim(0, 1)
    ax.set_xlabel("score")
    ax.set_title("Scores of true detections and false alarms", fontsize=11)
    ax.grid(True, axis="y", color="#dddddd", linewidth=0.6)
    if len(scores):
        # log counts: the few true detections stay visible beside thousands of low false alarms
        ax.set_yscale("log")
        ax.set_ylabel("detections (log scale)")
    else:
        ax.set_ylabel("detections")
        ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    if len(scores) == 0:
        ax.set_ylim(0, 1)
        _nothing_to_draw(ax, "no detections on labelled images")
    for flag, kind in ((True, "matched"), (False, "false alarm")):
        rgb, style, _ = BOX_STYLES[kind]
        chosen = scores[true == flag]
        name = "true detections" if flag else "false alarms"
        ax.hist(chosen, bins=bins, histtype="stepfilled", color=hex_colour(rgb), alpha=0.35,
                edgecolor=hex_colour(rgb), linewidth=1.4, linestyle=style,
                label=f"{name} ({len(chosen)})")
    if threshold is not None and finite_or_none(threshold) is not None:
        ax.axvline(threshold, color="black", linewidth=1.2, label=f"threshold {threshold:.3g}")
    ax.legend(loc="upper left", fontsize=8, framealpha=0.92)
    save_figure(fig, path)
