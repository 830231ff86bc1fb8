"""Training speed and memory on a bank the size of a real one.

    .venv/bin/python benchmarks/train.py                # 5,000 object + 25,000 background 24x24
    .venv/bin/python benchmarks/train.py --objects 1000 --background 5000 --jobs 1
    .venv/bin/python benchmarks/train.py --objects 3000 --background 17000 --pool 10000 \
        --mode boosted --trees 300 --compare-growers 2   # the two growers, taking turns

Renders a synthetic bank of the demo scenario's kind (hex-nut-like object patches; belt texture,
edges, washers, square nuts and cut-off nuts as background), trains ``PatchClassifier`` with
default settings (200 trees of depth 2, a pool of 20,000 features), and prints:

* wall seconds for drawing and evaluating the pool, growing the forest, calibrating the exit;
* peak memory: ``resource.getrusage(RUSAGE_SELF).ru_maxrss`` for the whole process, and the
  tracemalloc peak of numpy allocations during ``fit`` (numpy reports its buffers to tracemalloc);
* the size of the pool matrix (N x pool float32) for scale, and the ratio of peak memory to it;
* out-of-bag error, ROC AUC on a fresh bank (sklearn.metrics.roc_auc_score), mean trees per window;
* the column-gather order check: seconds per tree with the pool matrix Fortran-ordered (as fit
  hands it to scikit-learn) against C-ordered, on a subset, medians of several trees.

Goals (2-core machine): fit at most 60 s and at most 3 GB peak.

Measured here (2 cores shared with other work, load average about 1.8; numpy 2.4, scikit-learn 1.9;
the histogram column: this version, load average 0.6-1.8, ``--order-check-patches 0``):

=====================================  ==========  ==========  ==========
``benchmarks/train.py`` (defaults)     histogram   binned,     exact
                                       grower      sklearn     (``--max-bins 0``)
                                       (default)   (256 bins)
=====================================  ==========  ==========  ==========
fit, wall seconds                      31.2        55.6        126.8
  pool values (+ binning)              21.5        12.8        5.9
  growing 200 trees, 2 threads         5.2         42.2        120.2
peak RSS, GB                           1.43        2.85        2.77
tracemalloc peak during fit, GB        1.20        2.56        2.47
OOB error                              0.0254      0.0257      0.0256
ROC AUC, fresh 1000 + 5000 patches     0.9947      0.9945      0.9945
=====================================  ==========  ==========  ==========

The pool matrix (29,500 x 20,000 float32) is 2.36 GB, so the scikit-learn routes hold about 1.1 times
it at their peak; the histogram route bins it 2,048 features at a time into bytes (0.59 GB).
The pool values took 12.8 s in the older run and 21.5 s in this one; binning the whole matrix at
once measured the same as the blocks here (5.8-5.9 s for 6,144 features), so the difference is
the machine's drift or an older version, not the blocks.
Growers taking turns (``--objects 3000 --background 17000 --pool 10000 --mode boosted --trees 300
--compare-growers 2``, load average 1.3-1.9): histogram 3.9 and 2.4 s, sklearn 86.9 and 84.9 s
(22.4x, 35.0x).
Column order, 6,000 patches: Fortran 204 ms per tree, C 237 ms (C / Fortran = 1.16).
"""

from __future__ import annotations

import argparse
import math
import os
import resource
import sys
import time
import tracemalloc
from pathlib import Path

import cv2
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from sklearn.metrics import roc_auc_score  # noqa: E402
from sklearn.tree import DecisionTreeClassifier  # noqa: E402

from detector import features  # noqa: E402
from detector.classifier import PatchClassifier  # noqa: E402
from detector.forest import bin_columns, grow_forest, quantile_cuts  # noqa: E402


def _grid(size):
    c = (np.arange(size) + 0.5) - size / 2
    return np.meshgrid(c, c)  # x, y


def _hexagon_inside(x, y, cx, cy, radius, angle):
    """Signed margin inside a regular hexagon (positive inside), vectorised over patches."""
    u, v = x[None] - cx[:, None, None], y[None] - cy[:, None, None]
    apothem = radius * math.cos(math.pi / 6)
    worst = np.full(u.shape, -np.inf)
    for k in range(3):
        t = angle[:, None, None] + math.pi / 6 + k * math.pi / 3
        worst = np.maximum(worst, np.abs(u * np.cos(t) + v * np.sin(t)))
    return apothem[:, None, None] - worst


def _belt(n, size, rng):
    """Belt texture: a level, a lighting gradient, fine vertical grain, noise."""
    x, y = _grid(size)
    level = rng.uniform(40, 120, n)[:, None, None]
    gx, gy = rng.normal(0, 1.5, (2, n))
    grain = rng.normal(0, 6, (n, 1, size)) * np.ones((1, size, 1))
    return level + gx[:, None, None] * x + gy[:, None, None] * y + grain


def _nut(canvas, x, y, cx, cy, radius, angle, rng):
    n = len(canvas)
    inside = np.clip(_hexagon_inside(x, y, cx, cy, radius, angle) + 0.5, 0, 1)
    light = rng.uniform(140, 230, n)[:, None, None]
    shade = rng.normal(0, 1.2, (2, n))
    face = light + shade[0][:, None, None] * (x[None] - cx[:, None, None]) \
        + shade[1][:, None, None] * (y[None] - cy[:, None, None])
    r_hole = rng.uniform(0.35, 0.5, n) * radius
    d = np.hypot(x[None] - cx[:, None, None], y[None] - cy[:, None, None])
    hole = np.clip(r_hole[:, None, None] - d + 0.5, 0, 1)
    face = face * (1 - hole) + rng.uniform(20, 70, n)[:, None, None] * hole
    return canvas * (1 - inside) + face * inside


def _finish(canvas, rng):
    canvas = canvas + rng.normal(0, 1, canvas.shape) * rng.uniform(2, 9, len(canvas))[:, None, None]
    out = np.clip(np.round(canvas), 0, 255).astype(np.uint8)
    for i in np.flatnonzero(rng.random(len(out)) < 0.5):
        out[i] = cv2.GaussianBlur(out[i], (3, 3), 0.8)
    return out


def make_bank(n_objects, n_background, size=24, seed=0):
    """Synthetic patches: (patches uint8 (N, size, size), y int (N,))."""
    rng = np.random.default_rng(seed)
    x, y = _grid(size)
    # object patches: a hex nut filling most of the window, jittered, rotated, lit differently
    cx, cy = rng.uniform(-1.5, 1.5, (2, n_objects))
    radius = rng.uniform(0.36, 0.44, n_objects) * size
    objects = _nut(_belt(n_objects, size, rng), x, y, cx, cy, radius,
                   rng.uniform(0, math.pi / 3, n_objects), rng)
    # background: plain belt, rail edges, washers, square nuts, nuts cut off by the window edge
    canvas = _belt(n_background, size, rng)
    kind = rng.integers(0, 5, n_background)
    rail = kind == 1
    edge = rng.uniform(-size / 2, size / 2, n_background)
    canvas[rail] = np.where(y[None] < edge[rail, None, None], canvas[rail] + rng.uniform(60, 120), canvas[rail])
    washer = np.flatnonzero(kind == 2)
    d = np.hypot(x[None] - rng.uniform(-3, 3, (len(washer), 1, 1)), y[None] - rng.uniform(-3, 3, (len(washer), 1, 1)))
    r = rng.uniform(5, 10, (len(washer), 1, 1))
    ring = (d < r) & (d > 0.45 * r)
    canvas[washer] = np.where(ring, rng.uniform(130, 220, (len(washer), 1, 1)), canvas[washer])
    square = np.flatnonzero(kind == 3)
    half = rng.uniform(5, 10, (len(square), 1, 1))
    t = rng.uniform(0, math.pi / 2, (len(square), 1, 1))
    u, v = x[None] * np.cos(t) + y[None] * np.sin(t), -x[None] * np.sin(t) + y[None] * np.cos(t)
    canvas[square] = np.where(np.maximum(abs(u), abs(v)) < half, rng.uniform(130, 220, (len(square), 1, 1)),
                              canvas[square])
    cut = np.flatnonzero(kind == 4)
    off = rng.uniform(0.45, 0.9, len(cut)) * size * rng.choice([-1, 1], len(cut))
    along = rng.uniform(-4, 4, len(cut))
    horizontal = rng.random(len(cut)) < 0.5
    ccx, ccy = np.where(horizontal, off, along), np.where(horizontal, along, off)
    canvas[cut] = _nut(canvas[cut], x, y, ccx, ccy, rng.uniform(0.36, 0.44, len(cut)) * size,
                       rng.uniform(0, math.pi / 3, len(cut)), rng)
    patches = np.concatenate([_finish(objects, rng), _finish(canvas, rng)])
    labels = np.r_[np.ones(n_objects, np.int64), np.zeros(n_background, np.int64)]
    order = rng.permutation(len(labels))
    return patches[order], labels[order]


def peak_rss_gb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024 / 1e9  # Linux: kilobytes


def order_check(patches, labels, pool_size, trees, seed=0):
    """Seconds per tree, Fortran- vs C-ordered pool matrix (same data, same trees)."""
    h, w = patches.shape[1:]
    pool = features.random_pool(w, h, pool_size, random_state=seed)
    values = features.evaluate_features(pool, patches, transpose=True)
    X_f = values.T
    X_c = np.ascontiguousarray(X_f)
    fpn = max(1, round(math.sqrt(pool_size)))
    times = {"fortran": [], "c": []}
    n = len(labels)
    for t in range(trees):
        counts = np.bincount(np.random.default_rng(t).integers(0, n, n), minlength=n).astype(np.float64)
        for name, X in (("fortran", X_f), ("c", X_c)):
            est = DecisionTreeClassifier(criterion="entropy", max_depth=2, max_features=fpn, random_state=t)
            start = time.perf_counter()
            est.fit(X, labels, sample_weight=counts, check_input=False)
            times[name].append(time.perf_counter() - start)
    return float(np.median(times["fortran"])), float(np.median(times["c"]))


def grower_turns(patches, labels, args):
    """Seconds growing the same forest on the same bins with each grower, the two taking turns.

    The pool values are computed and binned once (256 quantile bins, as ``fit`` does); then
    ``--compare-growers`` turns each grow the whole forest with the histogram grower and with
    scikit-learn's tree learners. Returns ``{grower: [seconds per turn]}``.
    """
    h, w = patches.shape[1:]
    pool = features.random_pool(w, h, min(args.pool, features.count_features(w, h)), random_state=args.seed)
    values = features.evaluate_features(pool, patches, transpose=True)
    cuts, n_cuts = quantile_cuts(values.T, 256, random_state=args.seed)
    bin_columns(values.T, cuts, n_cuts, n_jobs=args.jobs)
    inputs = {"histogram": values.astype(np.uint8).T, "sklearn": values.T}
    # compile the kernels outside the timed region
    grow_forest(inputs["histogram"][:50], labels[:50], n_trees=1, grower="histogram", random_state=0)
    seconds = {"histogram": [], "sklearn": []}
    for turn in range(args.compare_growers):
        for grower in ("histogram", "sklearn"):
            start = time.perf_counter()
            grow_forest(inputs[grower], labels, mode=args.mode, n_trees=args.trees, depth=args.depth,
                        random_state=args.seed, n_jobs=args.jobs, grower=grower)
            seconds[grower].append(time.perf_counter() - start)
        print(f"turn {turn + 1}: growing {args.trees} {args.mode} trees: histogram "
              f"{seconds['histogram'][-1]:.1f} s, sklearn {seconds['sklearn'][-1]:.1f} s, sklearn / "
              f"histogram = {seconds['sklearn'][-1] / seconds['histogram'][-1]:.1f}x "
              f"(load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores)", flush=True)
    return seconds


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--objects", type=int, default=5000)
    ap.add_argument("--background", type=int, default=25000)
    ap.add_argument("--size", type=int, default=24)
    ap.add_argument("--trees", type=int, default=200)
    ap.add_argument("--depth", type=int, default=2)
    ap.add_argument("--pool", type=int, default=20000)
    ap.add_argument("--mode", default="bagged", choices=("bagged", "boosted"))
    ap.add_argument("--jobs", type=int, default=2, help="threads growing bagged trees")
    ap.add_argument("--max-bins", type=int, default=256, help="0 grows on the feature values themselves")
    ap.add_argument("--grower", choices=("histogram", "sklearn"), default="histogram",
                    help="how fit grows the trees on the bins (default %(default)s)")
    ap.add_argument("--compare-growers", type=int, default=0, metavar="TURNS",
                    help="instead of fit: grow the forest on the same bins with each grower, "
                         "taking turns TURNS times")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--order-check-patches", type=int, default=6000,
                    help="patches for the Fortran/C comparison (0 skips it)")
    ap.add_argument("--order-check-trees", type=int, default=5)
    ap.add_argument("--no-tracemalloc", action="store_true")
    args = ap.parse_args(argv)
    print("command:", " ".join([Path(sys.executable).name] + sys.argv))

    start = time.perf_counter()
    patches, labels = make_bank(args.objects, args.background, args.size, args.seed)
    test_patches, test_labels = make_bank(1000, 5000, args.size, args.seed + 1)
    print(f"bank: {args.objects} object + {args.background} background patches of "
          f"{args.size}x{args.size}, rendered in {time.perf_counter() - start:.1f} s")
    # compile the numba kernels outside the timed region
    features.evaluate_features(features.random_pool(args.size, args.size, 8, random_state=0), patches[:4])
    if args.compare_growers:
        seconds = grower_turns(patches, labels, args)
        ratios = np.array(seconds["sklearn"]) / np.array(seconds["histogram"])
        print(f"growing, median of {args.compare_growers} turns: histogram "
              f"{np.median(seconds['histogram']):.1f} s, sklearn {np.median(seconds['sklearn']):.1f} s; "
              f"sklearn / histogram per turn {', '.join(f'{r:.1f}x' for r in ratios)}")
        return

    clf = PatchClassifier(n_trees=args.trees, depth=args.depth, mode=args.mode, pool=args.pool,
                          max_bins=args.max_bins or None, grower=args.grower, random_state=args.seed,
                          n_jobs=args.jobs)
    rss_before = peak_rss_gb()
    if not args.no_tracemalloc:
        tracemalloc.start()
    start, cpu_start = time.perf_counter(), time.process_time()
    clf.fit(patches, labels)
    fit_seconds, fit_cpu = time.perf_counter() - start, time.process_time() - cpu_start
    traced_peak = tracemalloc.get_traced_memory()[1] / 1e9 if tracemalloc.is_tracing() else float("nan")
    tracemalloc.stop()
    rss_peak = peak_rss_gb()

    n_grow = clf.model_.metadata["patches"]["objects"] + clf.model_.metadata["patches"]["background"]
    matrix_gb = n_grow * min(args.pool, features.count_features(args.size, args.size)) * 4 / 1e9
    tm = clf.timings_
    print(f"fit: {fit_seconds:.1f} s total (goal <= 60 s): evaluate pool {tm['evaluate_seconds']:.1f} s, "
          f"grow {tm['grow_seconds']:.1f} s ({args.trees} trees, {args.jobs} thread(s), "
          f"{args.grower if args.max_bins else 'sklearn on values'}, "
          f"{tm['grow_seconds'] / args.trees * 1e3:.0f} ms per tree), calibrate {tm['calibrate_seconds']:.2f} s; "
          f"CPU {fit_cpu:.1f} s (load average at the end {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores)")
    print(f"memory: peak RSS {rss_peak:.2f} GB (goal <= 3 GB; {rss_before:.2f} GB before fit), "
          f"tracemalloc peak during fit {traced_peak:.2f} GB; pool matrix {n_grow} x {args.pool} "
          f"float32 = {matrix_gb:.2f} GB, traced peak / matrix = {traced_peak / matrix_gb:.2f}")
    md = clf.model_.metadata
    auc = roc_auc_score(test_labels, clf.predict_proba(test_patches)[:, 1])
    print(f"model: {len(clf.model_.features)} features used; OOB error {clf.oob_error_:.4f}; "
          f"ROC AUC on a fresh bank of 1000 + 5000 patches {auc:.4f}")
    cal = md["calibration"]
    print(f"early exit: mean trees per window {cal['mean_trees_objects']:.1f} on {cal['objects']} "
          f"held-out objects, {cal['mean_trees_background']:.2f} on background")

    if args.order_check_patches:
        m = min(args.order_check_patches, len(labels))
        f_s, c_s = order_check(patches[:m], labels[:m], args.pool, args.order_check_trees, args.seed)
        print(f"column order ({m} patches x {args.pool} features, median of {args.order_check_trees} "
              f"trees): Fortran {f_s * 1e3:.0f} ms/tree, C {c_s * 1e3:.0f} ms/tree, C / Fortran = "
              f"{c_s / f_s:.2f}")


if __name__ == "__main__":
    main()
