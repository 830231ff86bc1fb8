"""What gradient channels cost a scan, per frame: the integral images of a 640 x 480 frame (padded
as the scan pads it) with and without the seven gradient channels, and the scan of a grey model
against a channel model trained on the same bank with the same settings, the two routes taking
turns in one process (this machine is shared: ratios, not absolute times, are what to read).

    .venv/bin/python benchmarks/channels.py [--repeats 15] [--trees 100]
"""

from __future__ import annotations

import os

os.environ.setdefault("NUMBA_NUM_THREADS", "1")

import argparse  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from detector.features import N_CHANNELS  # noqa: E402
from detector.classifier import PatchClassifier  # noqa: E402
from detector.harvest import harvest  # noqa: E402
from detector.io.labels import read_labels  # noqa: E402
from detector.scan import (Engine, ScanSettings, channel_frame_integrals,  # noqa: E402
                           frame_integrals, integral_dtype)
from synthetic_images import render_frame, render_scenario  # noqa: E402


def turns(routes, repeats):
    """Median seconds of each route, the routes taking turns."""
    times = {name: [] for name in routes}
    for _ in range(repeats):
        for name, call in routes.items():
            t = time.perf_counter()
            call()
            times[name].append(time.perf_counter() - t)
    return {name: float(np.median(v)) for name, v in times.items()}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--repeats", type=int, default=15)
    ap.add_argument("--trees", type=int, default=100)
    args = ap.parse_args(argv)
    print("command: python benchmarks/channels.py " + " ".join(argv or sys.argv[1:]))
    print(f"load average: {os.getloadavg()[0]:.1f} (machine shared: read the ratios)")
    gray = render_frame(7, 640, 480).image
    pad = 63  # the scan's padding of a 640 x 480 frame at the default overhang (DEVELOPERS.md)
    padded = np.pad(gray, pad, mode="edge")
    h, w = padded.shape
    grey_buffers = (np.empty((h + 1, w + 1), integral_dtype(h, w)), np.empty((h + 1, w + 1)))
    channel_buffers = (np.empty((N_CHANNELS, h + 1, w + 1), integral_dtype(h, w)),
                       np.empty((h + 1, w + 1)))
    frame_integrals(padded, grey_buffers)
    channel_frame_integrals(padded, channel_buffers)
    t = turns({"grey": lambda: frame_integrals(padded, grey_buffers),
               "channels": lambda: channel_frame_integrals(padded, channel_buffers)},
              args.repeats)
    print(f"integral images of the padded frame ({w} x {h}): grey + squared {1000 * t['grey']:.2f} ms,"
          f" with the 7 gradient channels {1000 * t['channels']:.2f} ms "
          f"({t['channels'] / t['grey']:.1f}x)")

    with tempfile.TemporaryDirectory() as root:
        render_scenario(root, train_images=40, test_images=1, seed=3)
        items = list(read_labels(Path(root) / "train" / "labels.csv", Path(root) / "train" / "images"))
        bank = harvest(Path(root) / "train" / "images", items, window=(24, 24),
                       negatives_per_image=60, seed=0)
    models = {}
    for channels in ("grey", "gradient"):
        clf = PatchClassifier(n_trees=args.trees, pool=4000, mode="boosted", random_state=0,
                              channels=channels)
        models[channels] = clf.fit(bank.patches, bank.labels,
                                   margin=bank.margin).model_
    engines = {name: Engine(m, ScanSettings(min_object=20.0, max_object=200.0))
               for name, m in models.items()}
    results = {name: e.scan(gray) for name, e in engines.items()}
    t = turns({name: (lambda e=e: e.scan(gray)) for name, e in engines.items()}, args.repeats)
    megapixels = gray.size / 1e6
    for name in engines:
        r = results[name]
        print(f"scan of the 640 x 480 frame, {name} model ({args.trees} boosted trees): "
              f"{1000 * t[name]:.1f} ms ({1000 * t[name] / megapixels:.0f} ms per megapixel), "
              f"{r.mean_trees:.2f} trees per window, {len(r.scores)} detections")
    print(f"ratio channels / grey: {t['gradient'] / t['grey']:.2f}x")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
