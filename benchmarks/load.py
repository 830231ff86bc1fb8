"""Load: a folder of 1,000 frames through `patchwood scan` with --jobs 1, --jobs 2 and --cluster.

    .venv/bin/python benchmarks/load.py                        # trains the default model first
    .venv/bin/python benchmarks/load.py --model /tmp/model.npz  # from scan.py --save-model
    .venv/bin/python benchmarks/load.py --frames 1000 --size 320x240 --interval 0.2
    .venv/bin/python benchmarks/load.py --model /tmp/model.npz --dask-log-length 10

The model is the default one (``patchwood train``'s defaults on a bank harvested from the default
demo scenario, seed 0, as in ``benchmarks/scan.py``; about 1.5 minutes to train here), or loaded
from ``--model``. The folder holds ``--frames`` frames of ``--size`` (default 1,000 of 320 x 240,
the demo scenario's frame size: about a minute per setting at the scan speed measured when this
was written): a quarter of them rendered with ``synthetic_images.render_frame`` (every tenth
without nuts), each written as drawn, mirrored left-right, upside down and turned half a turn.

Each setting runs the real command line as a subprocess (the installed ``patchwood`` entry point,
or ``python -m cli.main``) with the scan options at their defaults:

    patchwood scan MODEL FRAMES --out one.csv                   # one process
    patchwood scan MODEL FRAMES --out jobs.csv --jobs 2         # two worker processes
    patchwood scan MODEL FRAMES --out cluster.csv --cluster ADDRESS

where ADDRESS is the scheduler of a ``distributed.LocalCluster`` of 2 worker processes (one thread
each) started by this script in a process of its own before the run, so the scheduler's and the
workers' memory can be told apart from the command's.

Printed per setting: wall seconds of the command (Python start-up included) and images per
second, and the rate the command itself reports (scanning only); the exact peak resident set of
the largest single process of the command's tree (``ru_maxrss`` from ``wait4``); and the resident
set (VmRSS, read from ``/proc/<pid>/status`` every ``--interval`` seconds) of the command, of its
worker processes, and of the cluster's scheduler and of its workers, shown when 10 %, 20 %, ...,
100 % of the images were done (read from the detections file, which the command rewrites after
every batch), with the peak of all samples and the growth from 10 % done to the end (start-up and
loading the kernels come before 10 %). The growth is set against what keeping every decoded frame
would cost (frames x width x height bytes). Sums over processes count pages shared after a fork
once per process. Then whether the three detection files are byte for byte identical.

On a cluster, distributed itself keeps, for debugging, the last ``low-level-log-length`` message
batches (default 1000) of every batched connection (``distributed.batched.BatchedSend.
recent_message_log``, read in its source). patchwood sends each image's bytes by ``scatter`` and
only their key in the task, so that log holds no images; ``--dask-log-length N`` (through the
``DASK_DISTRIBUTED__ADMIN__LOW_LEVEL_LOG_LENGTH`` environment variable of the command and the
cluster) is there to check that a growth is not that log's.

Goals: the three files identical, covering every frame with no failures; memory flat, here read as
a growth from 10 % done to the end below a quarter of the cost of keeping every frame, in every
group of processes measured. Linux only (it reads /proc). The machine is shared, so the output
reports the load average before and after.
"""

from __future__ import annotations

import os

for _name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ.setdefault(_name, "1")

import argparse  # noqa: E402
import csv  # noqa: E402
import platform  # noqa: E402
import re  # noqa: E402
import shlex  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import cv2  # noqa: E402
import numpy as np  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from detector.io.labels import read_detections  # noqa: E402
from detector.model import load_model, save_model  # noqa: E402
from synthetic_images import render_frame  # noqa: E402

from _machine import cpu_name, load  # noqa: E402  (benchmarks/ is on the path when run as a script)

SHOWN_SAMPLES = 10
FLAT_SHARE = 0.25  # of the bytes of every frame kept: the most a flat run may grow after 10 %

# A LocalCluster in a process of its own: prints its scheduler address, serves until its standard
# input closes.
# The default model is trained in a child process: a process started from this one inherits its
# peak resident set until it executes the command (Linux keeps the old address space's peak at
# exec), so a fat benchmark process would be counted as the command's peak.
TRAIN_PROGRAM = """
import sys
from pathlib import Path
sys.path[:0] = [sys.argv[1], sys.argv[2]]
from scan import default_model
from detector.model import save_model
save_model(sys.argv[4], default_model(Path(sys.argv[3]), int(sys.argv[5])))
"""

CLUSTER_PROGRAM = """
import sys
from distributed import LocalCluster
if __name__ == "__main__":
    with LocalCluster(n_workers=int(sys.argv[1]), threads_per_worker=1, processes=True,
                      dashboard_address=None) as cluster:
        print(cluster.scheduler_address, flush=True)
        sys.stdin.read()
"""


# ---------------------------------------------------------------- memory of process trees

def status_kib(pid: int, key: str) -> int:
    """A ``kB`` field of ``/proc/<pid>/status`` (e.g. ``VmRSS``, ``VmHWM``); 0 once it is gone."""
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                if line.startswith(key + ":"):
                    return int(line.split()[1])
    except (OSError, ValueError, IndexError):
        pass
    return 0


def descendants(root: int) -> list[int]:
    """Every living process below ``root`` (children, their children, ...), from /proc/*/stat."""
    children: dict[int, list[int]] = {}
    for entry in os.scandir("/proc"):
        if not entry.name.isdigit():
            continue
        try:
            with open(f"/proc/{entry.name}/stat") as fh:
                stat = fh.read()
        except OSError:
            continue
        ppid = int(stat[stat.rindex(")") + 2:].split()[1])  # the field after the state
        children.setdefault(ppid, []).append(int(entry.name))
    out, todo = [], [root]
    while todo:
        for child in children.get(todo.pop(), []):
            out.append(child)
            todo.append(child)
    return out


def images_done(path: Path) -> int:
    """Images already in a detections file (the command rewrites it after every batch)."""
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            rows = list(csv.reader(fh))[1:]
    except (OSError, UnicodeDecodeError, csv.Error):
        return 0
    return len({row[0] for row in rows if row})


class TreeSampler:
    """Resident set of named groups of processes, sampled together with the images done.

    ``groups`` maps a name to a callable giving the pids of that group at sampling time;
    ``progress`` gives the number of images done.
    """

    def __init__(self, groups: dict, progress):
        self.groups = groups
        self.progress = progress
        self.done: list[int] = []
        self.rss: dict[str, list[int]] = {name: [] for name in groups}  # bytes, summed

    def sample(self) -> None:
        done = self.progress()
        values = {}
        for name, pids in self.groups.items():
            values[name] = sum(status_kib(pid, "VmRSS") * 1024 for pid in pids())
        if values[next(iter(self.groups))] == 0:
            return  # the command has ended (a zombie has no resident set): not a sample
        self.done.append(done)
        for name, v in values.items():
            self.rss[name].append(v)

    def at_shares(self, name: str, total: int, n: int = SHOWN_SAMPLES) -> list:
        """The group's resident set when 1/n, 2/n, ... n/n of the images were first seen done
        (None where no sample fell)."""
        done = np.asarray(self.done)
        out = []
        for k in range(1, n + 1):
            hit = np.flatnonzero(done >= total * k / n)
            out.append(self.rss[name][hit[0]] if len(hit) else None)
        return out

    def growth(self, name: str, total: int) -> int | None:
        """Largest rise from the first sample with 10 % of the images done to any later sample."""
        hit = np.flatnonzero(np.asarray(self.done) >= 0.1 * total)
        if not len(hit):
            return None
        rss = np.asarray(self.rss[name][hit[0]:])
        return int(rss.max() - rss[0])


# ---------------------------------------------------------------- the runs

def patchwood_command() -> list[str]:
    """The installed entry point beside this interpreter, else the module."""
    script = Path(sys.executable).with_name("patchwood")
    return [str(script)] if script.exists() else [sys.executable, "-m", "cli.main"]


def child_env() -> dict:
    """The environment of the command and of the cluster."""
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    if DASK_LOG_LENGTH is not None:
        env["DASK_DISTRIBUTED__ADMIN__LOW_LEVEL_LOG_LENGTH"] = str(DASK_LOG_LENGTH)
    return env


DASK_LOG_LENGTH: int | None = None  # --dask-log-length


def run_scan(args: list[str], out_file: Path, interval: float, extra_groups: dict | None = None):
    """Run ``patchwood scan ARGS`` (writing ``out_file``), sampling memory; (seconds, exit code,
    stdout, stderr, sampler, exact peak RSS of the largest process in the command's tree)."""
    env = child_env()
    with tempfile.TemporaryFile("w+") as out, tempfile.TemporaryFile("w+") as err:
        start = time.perf_counter()
        proc = subprocess.Popen([*patchwood_command(), "scan", *args], stdout=out, stderr=err,
                                cwd=ROOT, env=env)
        sampler = TreeSampler({"command": lambda: [proc.pid],
                               "its workers": lambda: descendants(proc.pid),
                               **(extra_groups or {})},
                              progress=lambda: images_done(out_file))
        while True:
            sampler.sample()
            pid, status, usage = os.wait4(proc.pid, os.WNOHANG)
            if pid:
                break
            time.sleep(interval)
        seconds = time.perf_counter() - start
        proc.returncode = os.waitstatus_to_exitcode(status)
        out.seek(0)
        err.seek(0)
        peak = usage.ru_maxrss * 1024  # KiB on Linux
        return seconds, proc.returncode, out.read(), err.read(), sampler, peak


def start_cluster(workers: int):
    """A LocalCluster of ``workers`` processes in a process of its own: (process, address)."""
    env = child_env()
    proc = subprocess.Popen([sys.executable, "-c", CLUSTER_PROGRAM, str(workers)],
                            stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                            stderr=subprocess.DEVNULL, text=True, cwd=ROOT, env=env)
    address = proc.stdout.readline().strip()
    if not address:
        proc.kill()
        raise RuntimeError("the LocalCluster did not start")
    from distributed import Client

    with Client(address, timeout="60s", set_as_default=False) as client:
        client.wait_for_workers(workers, timeout=120)
    return proc, address


def stop_cluster(proc):
    proc.stdin.close()
    try:
        proc.wait(timeout=30)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()


def render_folder(folder: Path, n: int, width: int, height: int, seed: int) -> None:
    """``n`` frames: a quarter rendered, each written in four orientations."""
    folder.mkdir(parents=True)
    k = 0
    for i in range((n + 3) // 4):
        g = render_frame(seed * 100_000 + 20_000 + i, width, height, empty=(i % 10 == 0)).image
        for view in (g, g[:, ::-1], g[::-1], g[::-1, ::-1]):
            if k < n:
                cv2.imwrite(str(folder / f"frame_{k:05d}.png"), np.ascontiguousarray(view))
                k += 1


def mb(v) -> str:
    return f"{v / 1e6:,.1f}"


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--model", type=Path, help="model file to use instead of training one")
    parser.add_argument("--save-model", type=Path, help="keep the trained model here")
    parser.add_argument("--frames", type=int, default=1000)
    parser.add_argument("--size", default="320x240", help="frame width x height")
    parser.add_argument("--workers", type=int, default=2,
                        help="--jobs of the second setting and processes of the cluster")
    parser.add_argument("--interval", type=float, default=0.2, help="seconds between samples")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--dask-log-length", type=int,
                        help="distributed.admin.low-level-log-length for the command and the "
                             "cluster (default: distributed's own, 1000)")
    args = parser.parse_args(argv)
    global DASK_LOG_LENGTH
    DASK_LOG_LENGTH = args.dask_log_length
    width, height = (int(v) for v in args.size.lower().split("x"))

    import dask
    import distributed
    import numba

    print("command:", shlex.join([Path(sys.executable).name, *sys.argv]))
    print(f"machine: {cpu_name()}; {os.cpu_count()} logical cores, "
          f"{len(os.sched_getaffinity(0)) if hasattr(os, 'sched_getaffinity') else '?'} usable; "
          f"{platform.system()} {platform.machine()}")
    print(f"versions: python {platform.python_version()}, numpy {np.__version__}, "
          f"numba {numba.__version__}, opencv {cv2.__version__}, "
          f"distributed {distributed.__version__}")
    print(f"load average (1, 5, 15 min) before: {load()}")

    with tempfile.TemporaryDirectory(prefix="patchwood-load-") as tmp:
        work = Path(tmp)
        print("\nmodel:")
        model_path = work / "model.npz"
        if args.model is not None:
            model = load_model(args.model)
            print(f"  loaded {args.model}")
        else:
            trained = work / "trained.npz"
            subprocess.run([sys.executable, "-c", TRAIN_PROGRAM, str(ROOT),
                            str(Path(__file__).resolve().parent), str(work), str(trained),
                            str(args.seed)], check=True, cwd=ROOT)
            model = load_model(trained)
            if args.save_model is not None:
                save_model(args.save_model, model)
                print(f"  saved to {args.save_model}")
        save_model(model_path, model)
        for line in model.summary():
            print(f"  {line}")

        folder = work / "frames"
        start = time.perf_counter()
        render_folder(folder, args.frames, width, height, args.seed)
        on_disk = sum(p.stat().st_size for p in folder.iterdir())
        frame_bytes = args.frames * width * height
        flat_bound = FLAT_SHARE * frame_bytes
        print(f"\nfolder: {args.frames:,} frames of {width} x {height} ({mb(on_disk)} MB of PNG, "
              f"rendered in {time.perf_counter() - start:.1f} s); keeping every decoded frame "
              f"would take {mb(frame_bytes)} MB, so 'flat' below means a growth under "
              f"{mb(flat_bound)} MB")
        print(f"command: {shlex.join(patchwood_command())} scan MODEL FRAMES --out OUT.csv "
              f"[--jobs {args.workers} | --cluster ADDRESS]; scan options at their defaults; "
              f"memory sampled every {args.interval:g} s; distributed's low-level log length "
              + (f"{args.dask_log_length} (set)" if args.dask_log_length is not None else
                 f"{dask.config.get('distributed.admin.low-level-log-length')} "
                 "(its default)"))

        settings = [("one process", "one", []),
                    (f"--jobs {args.workers}", "jobs", ["--jobs", str(args.workers)]),
                    (f"--cluster (LocalCluster, {args.workers} worker processes)", "cluster", None)]
        outputs, all_flat, all_ok = {}, True, True
        for title, key, options in settings:
            cluster = None
            extra = {}
            if options is None:
                start = time.perf_counter()
                cluster, address = start_cluster(args.workers)
                options = ["--cluster", address]
                extra = {"cluster scheduler": lambda: [cluster.pid],
                         "cluster workers": lambda: descendants(cluster.pid)}
                print(f"\n{title}: started in {time.perf_counter() - start:.1f} s at {address}")
            else:
                print(f"\n{title}:")
            out = work / f"{key}.csv"
            try:
                seconds, code, stdout, stderr, sampler, peak = run_scan(
                    [str(model_path), str(folder), "--out", str(out), *options], out,
                    args.interval, extra)
            finally:
                if cluster is not None:
                    stop_cluster(cluster)
            outputs[key] = out
            rate = re.search(r"\(([\d.]+) images/s\)", stdout)
            scanned = re.search(r"images scanned: (\d+)", stdout)
            failures = re.search(r"failures: (\d+)", stdout)
            ok = (code == 0 and scanned is not None and int(scanned.group(1)) == args.frames
                  and failures is not None and failures.group(1) == "0")
            if ok:
                ok = len(read_detections(out)) == args.frames
            all_ok &= ok
            print(f"  {seconds:.1f} s wall, {args.frames / seconds:.1f} images/s "
                  f"(the command reports {rate.group(1) if rate else '?'} images/s scanning); "
                  f"exit {code}; {'all' if ok else 'NOT all'} {args.frames:,} frames in the file, "
                  f"{failures.group(1) if failures else '?'} failures")
            if not ok:
                print("  " + (stderr.strip().splitlines() or ["(no error output)"])[-1])
            print(f"  peak resident set of the largest process of the command's tree: {mb(peak)} "
                  "MB (exact, wait4)")
            print(f"  resident set in MB ({len(sampler.done)} samples) when a share of the images "
                  "was done (- : no sample, or the processes had ended); the peak of all "
                  "samples; the growth from 10 % done to the end:")
            shares = " ".join(f"{100 * k // SHOWN_SAMPLES:5d}%"
                              for k in range(1, SHOWN_SAMPLES + 1))
            print(f"    {'images done':18s} {shares}")
            for name in sampler.rss:
                values = np.asarray(sampler.rss[name])
                if not values.any():
                    print(f"    {name:18s} (no such processes)")
                    continue
                growth = sampler.growth(name, args.frames)
                flat = growth is not None and growth < flat_bound
                all_flat &= flat
                row = " ".join("     -" if not v else f"{v / 1e6:6.1f}"
                               for v in sampler.at_shares(name, args.frames))
                print(f"    {name:18s} {row} | peak {mb(values.max())} | "
                      + ("no sample after 10 %" if growth is None else
                         f"{'+' if growth >= 0 else ''}{mb(growth)} "
                         f"{'flat' if flat else 'NOT flat'}"))

        reference = outputs["one"].read_bytes()
        same = {key: outputs[key].read_bytes() == reference for key in ("jobs", "cluster")}
        print(f"\nsame detections file as one process: --jobs {args.workers} "
              f"{'yes' if same['jobs'] else 'NO'}, --cluster {'yes' if same['cluster'] else 'NO'} "
              f"({len(reference):,} bytes, {len(read_detections(outputs['one'])):,} images)")

    identical = all(same.values()) and all_ok
    print("\ngoals:")
    print(f"  three identical detection files covering all {args.frames:,} frames, no failures: "
          f"{'met' if identical else 'NOT met'}")
    print(f"  memory flat in every process measured (growth after 10 % under "
          f"{mb(flat_bound)} MB): {'met' if all_flat else 'NOT met'}")
    print(f"load average (1, 5, 15 min) after: {load()}")
    return 0 if (identical and all_flat) else 1


if __name__ == "__main__":
    sys.exit(main())
