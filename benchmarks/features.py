"""Feature evaluation speed: a 10,000-feature pool on 10,000 patches of 24 x 24.

    .venv/bin/python benchmarks/features.py
    .venv/bin/python benchmarks/features.py --patches 2000 --features 5000 --repeats 3

Times :func:`detector.features.evaluate_features` end to end (integral images from the uint8
patches, patch statistics, the compiled loop, the float32 result), median of ``--repeats`` runs
after a warm-up that compiles the numba kernel, in three forms:

* normalised, ``(F, N)`` (``transpose=True``, the layout the tree learner asks for);
* normalised, ``(N, F)``;
* raw (``normalize=False``), ``(N, F)``: the same quantity the reference computes.

Reference: ``skimage.feature.haar_like_feature`` (scikit-image) on the same features (given as
``feature_coord``/``feature_type``) with ``skimage.transform.integral_image``, one patch at a time as
it works. It is far too slow to run on all patches, so it runs on ``--reference-patches`` of them
and the time is scaled to the full count (the output says so); its values are checked against ours
on those patches.

Goals: at least 50x faster than the reference and under 5 s on one core (the kernel is serial; the
script asks BLAS/OpenMP for one thread). The patches are uniform random uint8 (the content does not
change the work). The machine is shared, so the output reports the load average before and after.
"""

from __future__ import annotations

import os

for _name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ.setdefault(_name, "1")

import argparse  # noqa: E402
import platform  # noqa: E402
import shlex  # noqa: E402
import statistics  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numba  # noqa: E402
import numpy as np  # noqa: E402
import skimage  # noqa: E402
from skimage.feature import haar_like_feature  # noqa: E402
from skimage.transform import integral_image as skimage_integral_image  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from detector.features import evaluate_features, evaluate_features_numpy, random_pool  # noqa: E402

from detector.features import pixel_sums  # noqa: E402
from detector.features._integral import (integral_images, integral_images_numpy,  # noqa: E402
                                         pixel_sums_numpy)
from detector.features._rectangles import skimage_coordinates  # noqa: E402
from _machine import cpu_name, load  # noqa: E402  (benchmarks/ is on the path when run as a script)


def timed(call, repeats):
    """Median, min and max wall seconds, and the median CPU seconds of this process."""
    seconds, cpu = [], []
    for _ in range(repeats):
        start, start_cpu = time.perf_counter(), time.process_time()
        call()
        seconds.append(time.perf_counter() - start)
        cpu.append(time.process_time() - start_cpu)
    return statistics.median(seconds), min(seconds), max(seconds), statistics.median(cpu)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--patches", type=int, default=10_000)
    parser.add_argument("--features", type=int, default=10_000)
    parser.add_argument("--window", type=int, nargs=2, default=(24, 24), metavar=("W", "H"))
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--reference-patches", type=int, default=20)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args(argv)
    width, height = args.window

    print("command:", shlex.join([Path(sys.executable).name, *sys.argv]))
    print(f"machine: {cpu_name()}; {os.cpu_count()} logical cores, "
          f"{len(os.sched_getaffinity(0)) if hasattr(os, 'sched_getaffinity') else '?'} usable; "
          f"{platform.system()} {platform.machine()}")
    print(f"versions: python {platform.python_version()}, numpy {np.__version__}, "
          f"numba {numba.__version__}, scikit-image {skimage.__version__}")
    print(f"load average (1, 5, 15 min) before: {load()}")

    rng = np.random.default_rng(args.seed)
    patches = rng.integers(0, 256, (args.patches, height, width)).astype(np.uint8)
    pool = random_pool(width, height, args.features, random_state=args.seed)
    n, f = len(patches), len(pool)
    print(f"work: {f:,} features x {n:,} patches of {width} x {height} = {n * f:,} values "
          f"({n * f * 4 / 1e6:,.0f} MB of float32)")

    for normalize in (True, False):      # warm-up: compile (or load) every kernel specialisation
        for transpose in (True, False):
            evaluate_features(pool[:100], patches[:100], normalize=normalize, transpose=transpose)

    out_fn = np.empty((f, n), dtype=np.float32)
    out_nf = np.empty((n, f), dtype=np.float32)
    runs = {
        "normalised (F, N)": lambda: evaluate_features(pool, patches, transpose=True, out=out_fn),
        "normalised (N, F)": lambda: evaluate_features(pool, patches, out=out_nf),
        "raw (N, F)": lambda: evaluate_features(pool, patches, normalize=False, out=out_nf),
    }
    figures = {}
    print(f"\npatchwood evaluate_features, wall seconds over {args.repeats} runs (median, min .. max), "
          f"and median CPU seconds of this process:")
    for name, call in runs.items():
        figures[name] = timed(call, args.repeats)
        med, low, high, cpu = figures[name]
        print(f"  {name:<20} {med:7.3f}  ({low:.3f} .. {high:.3f})  cpu {cpu:.3f}   "
              f"{med / (n * f) * 1e9:5.2f} ns per value")
    allocated = timed(lambda: evaluate_features(pool, patches, transpose=True), 1)[0]
    print(f"  {'normalised (F, N), new output array':<20} {allocated:7.3f}  (one run; includes "
          f"page faults of a fresh {n * f * 4 / 1e6:,.0f} MB array)")

    # the integral images alone: training makes them again for every block of its pool
    integral_images(patches[:10])
    compiled = timed(lambda: integral_images(patches), args.repeats)[0]
    plain = timed(lambda: integral_images_numpy(patches), args.repeats)[0]
    print(f"  integral images of the {n:,} patches (part of each run above): compiled "
          f"{compiled * 1e3:.1f} ms, numpy twin (two cumsum passes) {plain * 1e3:.1f} ms, "
          f"{plain / compiled:.1f}x")
    # ... into an array already used (as training's per-thread work space, integral_scratch), and
    # the patches' pixel sums and squared sums (every block's contrast normalisation)
    scratch = np.empty((n, patches.shape[1] + 1, patches.shape[2] + 1), np.int64)
    integral_images(patches, out=scratch)
    reused = timed(lambda: integral_images(patches, out=scratch), args.repeats)[0]
    sums = timed(lambda: pixel_sums(patches), args.repeats)[0]
    sums_plain = timed(lambda: pixel_sums_numpy(patches), args.repeats)[0]
    print(f"  the same into one array used before: {reused * 1e3:.1f} ms; "
          f"pixel sums and squared sums: compiled {sums * 1e3:.1f} ms, numpy twin "
          f"{sums_plain * 1e3:.1f} ms, {sums_plain / sums:.1f}x")

    k = min(args.reference_patches, n)
    twin_patches = min(n, 500)
    twin = timed(lambda: evaluate_features_numpy(pool, patches[:twin_patches]), 1)[0]
    print(f"  numpy twin, normalised (N, F): {twin:.3f} s on {twin_patches} patches, "
          f"scaled to {n:,}: {twin * n / twin_patches:.1f} s")

    coords, types = skimage_coordinates(pool)
    ours = evaluate_features(pool, patches[:k], normalize=False)

    def reference():
        return np.stack([haar_like_feature(skimage_integral_image(p), 0, 0, width, height,
                                           feature_type=types, feature_coord=coords)
                         for p in patches[:k]])

    theirs = reference()      # warm-up and value check
    agree = np.array_equal(ours, theirs.astype(np.float32))
    ref_repeats = max(1, min(3, args.repeats))
    ref_seconds, _, _, ref_cpu = timed(reference, ref_repeats)
    ref_full = ref_seconds * n / k
    print("\nreference skimage.feature.haar_like_feature (+ integral_image), one patch at a time:")
    print(f"  measured on {k} patches: {ref_seconds:.3f} s wall, {ref_cpu:.3f} s cpu (median of "
          f"{ref_repeats}); scaled to {n:,} patches: {ref_full:.1f} s wall, "
          f"{ref_cpu * n / k:.1f} s cpu")
    print(f"  raw values equal to ours on those {k} patches: {'yes' if agree else 'NO'}")

    raw = figures["raw (N, F)"][0]
    main_route = figures["normalised (F, N)"][0]
    worst = max(figures[name][0] for name in runs)
    cpu_ratio = ref_cpu * n / k / figures["raw (N, F)"][3]
    print("\nratios (reference seconds / ours):")
    print(f"  same work (raw values), cpu seconds:   {cpu_ratio:8.1f}x")
    print(f"  same work (raw values), wall seconds:  {ref_full / raw:8.1f}x")
    print(f"  normalised (F, N), wall seconds (more work than the reference): "
          f"{ref_full / main_route:.1f}x")
    ratio_ok = ref_full / worst >= 50
    time_ok = worst < 5.0
    print("\ngoals:")
    print(f"  >= 50x faster than the reference (slowest of our three forms, {ref_full / worst:.1f}x): "
          f"{'met' if ratio_ok else 'NOT met'}")
    print(f"  under 5 s on one core (slowest of our three forms, {worst:.3f} s): "
          f"{'met' if time_ok else 'NOT met'}")
    print(f"load average (1, 5, 15 min) after: {load()}")
    return 0 if (ratio_ok and time_ok and agree) else 1


if __name__ == "__main__":
    sys.exit(main())
