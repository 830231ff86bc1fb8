"""Memory: the peak resident set of `patchwood scan` per megapixel of the frame scanned.

    .venv/bin/python benchmarks/memory.py                        # trains a small model first
    .venv/bin/python benchmarks/memory.py --model /tmp/model.npz --sizes 1,4,16,36
    .venv/bin/python benchmarks/memory.py --min-object 12        # frames enlarged twice

Each frame is one PNG of the given megapixels (4:3), in two kinds: ``textured``, a demo frame
(``synthetic_images.render_frame``, seed 0) resized to the size, so that windows pass the contrast
gate and reach the trees, and ``flat``, one grey level, so that the gate drops every window. Each
runs the real command line in a process of its own (``python -m cli.main scan MODEL FRAME --out
...`` with the scan options at their defaults, plus ``--min-object`` when given), and the exact
peak resident set of that process is read from ``wait4`` (``ru_maxrss``). The same command on a
320 x 240 frame gives the base (Python, the libraries, the compiled kernels, the model), which is
subtracted: what is left is what the frame costs, printed in MB and in bytes per pixel; the
largest of those over the sizes is the bound the README states (with the base beside it).

The model is trained here on the demo scenario unless ``--model`` is given (about half a minute:
``patchwood train``'s defaults but 20 trees and a pool of 1,000; the scan's buffers depend on the
frame, not on the model). Linux or macOS (``wait4``). The machine is shared: the peak resident
set does not depend on the load, the seconds printed beside it do.
"""

from __future__ import annotations

import os

for _name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ.setdefault(_name, "1")

import argparse  # noqa: E402
import platform  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import cv2  # noqa: E402
import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from benchmarks._machine import cpu_name, load  # noqa: E402


def frame(kind: str, megapixels: float) -> np.ndarray:
    """A 4:3 frame of about ``megapixels``: the demo frame resized, or one grey level."""
    height = max(24, int(round((megapixels * 1e6 * 3 / 4) ** 0.5)))
    width = max(24, int(round(height * 4 / 3)))
    if kind == "flat":
        return np.full((height, width), 128, np.uint8)
    from synthetic_images.render import render_frame

    small = render_frame(np.random.default_rng(0), 320, 240).image
    return cv2.resize(small, (width, height), interpolation=cv2.INTER_LINEAR)


def peak_of(command: list[str]) -> tuple[int, float, int, str]:
    """Run ``command``; (peak resident set in bytes, wall seconds, exit status, stderr tail)."""
    start = time.perf_counter()
    proc = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(proc.pid, 0)
    seconds = time.perf_counter() - start
    err = proc.stderr.read().decode("utf-8", "replace").strip().splitlines()
    proc.stderr.close()
    proc.returncode = os.waitstatus_to_exitcode(status)
    scale = 1 if platform.system() == "Darwin" else 1024  # ru_maxrss: bytes on macOS, KiB on Linux
    return usage.ru_maxrss * scale, seconds, proc.returncode, (err[-1] if err else "")


def train_small_model(folder: Path) -> Path:
    run = [sys.executable, "-m", "cli.main"]
    subprocess.run(run + ["synth", str(folder / "scenario")], check=True, capture_output=True)
    train = folder / "scenario" / "train"
    subprocess.run(run + ["harvest", str(train / "images"), str(train / "labels.csv"),
                          "--out", str(folder / "bank.npz")], check=True, capture_output=True)
    subprocess.run(run + ["train", str(folder / "bank.npz"), "--out", str(folder / "model.npz"),
                          "--trees", "20", "--pool", "1000"], check=True, capture_output=True)
    return folder / "model.npz"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--model", type=Path, help="model file (default: train a small one)")
    parser.add_argument("--sizes", default="1,4,9,16,36",
                        help="frame sizes in megapixels, comma-separated (default 1,4,9,16,36)")
    parser.add_argument("--kinds", default="textured,flat", help="textured, flat or both")
    parser.add_argument("--min-object", type=float, help="passed to patchwood scan")
    args = parser.parse_args()
    sizes = [float(s) for s in args.sizes.split(",")]
    kinds = [k.strip() for k in args.kinds.split(",")]
    print("command: " + " ".join([Path(sys.argv[0]).as_posix()] + sys.argv[1:]))
    print(f"machine: {cpu_name()}, {os.cpu_count()} cores; load before: {load()}")
    with tempfile.TemporaryDirectory(prefix="patchwood-memory-") as tmp:
        tmp = Path(tmp)
        model = args.model or train_small_model(tmp)
        base_cmd = [sys.executable, "-m", "cli.main", "scan", str(model)]
        extra = [] if args.min_object is None else ["--min-object", f"{args.min_object:g}"]

        def scan(image: np.ndarray, name: str):
            path = tmp / f"{name}.png"
            cv2.imwrite(str(path), image)
            out = tmp / f"{name}.csv"
            result = peak_of(base_cmd + [str(path), "--out", str(out), "--force"] + extra)
            path.unlink()
            return result

        scan(frame("textured", 0.0768), "warm-up")  # compiled kernels loaded from the cache after
        base, seconds, status, _ = scan(frame("textured", 0.0768), "base")
        print(f"base (a 320 x 240 frame): {base / 2**20:.0f} MB peak, {seconds:.1f} s")
        print(f"{'kind':9} {'frame':>13} {'MP':>6} {'peak MB':>8} {'frame MB':>9} "
              f"{'bytes/pixel':>11} {'s':>6}")
        worst = 0.0
        for kind in kinds:
            for mp in sizes:
                image = frame(kind, mp)
                pixels = image.size
                peak, seconds, status, tail = scan(image, f"{kind}-{mp:g}")
                per_pixel = (peak - base) / pixels
                worst = max(worst, per_pixel)
                note = "" if status == 0 else f"  exit {status}: {tail}"
                print(f"{kind:9} {image.shape[1]:>6}x{image.shape[0]:<6} {pixels / 1e6:6.1f} "
                      f"{peak / 2**20:8.0f} {(peak - base) / 2**20:9.0f} {per_pixel:11.1f} "
                      f"{seconds:6.1f}{note}")
        print(f"bound: base {base / 2**20:.0f} MB + {worst:.1f} bytes per pixel "
              f"({worst:.1f} MB per megapixel; a 100-megapixel frame: "
              f"{(base + worst * 1e8) / 2**30:.2f} GiB)")
    print(f"load after: {load()}")


if __name__ == "__main__":
    main()
