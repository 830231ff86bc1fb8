"""Cross-data benchmark (project issue 15): patchwood against two classical peers on detection sets
it was not made for, in one run.

    .venv/bin/python benchmarks/cross_data.py                           # every set, every method
    .venv/bin/python benchmarks/cross_data.py --sets digits cups --methods defaults hog
    .venv/bin/python benchmarks/cross_data.py --methods defaults \\
        --harvest-args "--copies 8" --train-args "--mode boosted --trees 300"   # a candidate default
    .venv/bin/python benchmarks/cross_data.py --json figures.json

The sets come from ``benchmarks/datasets.py`` (built into its cache on first use; ``--list`` there
prints their labelling rules). For each set, on the same train/test split:

``defaults``
    patchwood as a new user runs it, through its command line, with the defaults:
    ``patchwood harvest TRAIN/images TRAIN/labels.csv --out bank.npz``, ``patchwood train
    bank.npz --out model.npz``, ``patchwood scan model.npz TEST/images --out detections.csv
    --threshold 0.05``. ``--harvest-args``, ``--train-args`` and ``--scan-args`` add options to
    these three commands (and to nothing else), so that candidate defaults are measured without
    editing this script.
``recipe``
    the README's worked example: ``harvest ... --copies 8 --jitter 0.08 --negatives-per-image
    100``, ``train ... --mode boosted --trees 300 --pool 10000 --mine-rounds 3 --mine-images
    TRAIN/images --mine-labels TRAIN/labels.csv`` (three mining rounds on the training images; the
    README shows one, and three measured best on the demo scenario), the same scan. The rotation
    stays at the harvest's default: the sets' objects are not all turned freely.
``hog``
    ``benchmarks/baseline.py``'s HOG + linear SVM (Dalal and Triggs, CVPR 2005) with two mining
    rounds, trained on a patch bank cut by ``detector.harvest.harvest`` with the recipe's
    augmentation (8 copies, jitter 0.08, 100 background windows per image; the inferred window,
    shorter side 24).
``channels``
    ``benchmarks/channel_peer.py``: aggregated channel features + scikit-learn's
    HistGradientBoostingClassifier of depth-2 trees with three mining rounds (Dollár, Appel,
    Belongie and Perona, PAMI 2014), on a bank cut the same way with its own window (the labels'
    median aspect, shorter side 32, whole 4-pixel blocks).

Figures, all from ``detector.evaluation.evaluate`` on the test split's labels (the project's tests
hold its AP arithmetic to pycocotools'), so that every method is scored alike:
AP50 (all-point, PASCAL VOC 2010), AP50:95 (101-point, COCO), FPPI at recall 0.9 (false alarms
per image at the highest score cut reaching recall 0.9; "n/r" when never reached), training
seconds (wall time from the labelled images on disk to the model, the harvest and every mining
round included, each method in processes of its own, start-up included: patchwood's two commands,
each peer's ``benchmarks/peer_train.py``; until 2026-12-04 the peers trained inside this process,
from training images it had already read, with their libraries already imported), and scan milliseconds per
megapixel (one pass over the decoded test images on one thread, after a warm-up image; patchwood's
through ``detector.scan.Engine`` with the scan command's defaults at threshold 0.05, whose
detections are checked against the command's file).

Training uses ``--jobs`` threads (default 2) for every method that can use them: patchwood's
``harvest --jobs`` and ``train --jobs`` (the bank and the model do not depend on it) and the gradient boosting's OpenMP threads; the
linear SVM uses one. This machine is shared and its speed drifts: the seconds are for scale,
the AP figures do not depend on them.

The verdict is issue 15's goal for the defaults: AP50 at least the better peer's minus 0.005 on
every set, and on average at least the HOG peer's plus 0.05.
"""

from __future__ import annotations

import os

_USER_ENVIRONMENT = dict(os.environ)  # the command-line routes run with the user's environment
for _name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ.setdefault(_name, "1")  # scans in this process are timed on one thread

import argparse  # noqa: E402
import json  # noqa: E402
import platform  # noqa: E402
import shlex  # noqa: E402
import shutil  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))

import channel_peer  # noqa: E402
import datasets  # noqa: E402
from detector.io.files import write_text  # noqa: E402

METHODS = ("defaults", "recipe", "hog", "channels")
METHOD_NAMES = {"defaults": "patchwood defaults", "recipe": "patchwood recipe",
                "hog": "HOG + linear SVM", "channels": "channel features"}
RECIPE_HARVEST = ["--copies", "8", "--jitter", "0.08", "--negatives-per-image", "100"]
RECIPE_TRAIN = ["--mode", "boosted", "--trees", "300", "--pool", "10000", "--mine-rounds", "3"]
SCAN_THRESHOLD = 0.05
GOAL_MARGIN = 0.005  # defaults' AP50 >= better peer's - this, on every set
GOAL_OVER_HOG = 0.05  # mean AP50 of the defaults >= the HOG peer's + this


def patchwood_command() -> list[str]:
    """How to call the `patchwood` command of this environment."""
    beside = Path(sys.executable).with_name("patchwood")
    if beside.exists():
        return [str(beside)]
    found = shutil.which("patchwood")
    if found:
        return [found]
    return [sys.executable, "-c", "from cli.main import run; run()"]


class RouteFailed(RuntimeError):
    pass


def _run(cmd: list[str], log: Path) -> float:
    """Run a command with the user's environment, output to ``log``; wall seconds."""
    start = time.perf_counter()
    with open(log, "a") as fh:
        fh.write("$ " + shlex.join(cmd) + "\n")
        fh.flush()
        done = subprocess.run(cmd, stdout=fh, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
                              env=_USER_ENVIRONMENT)
    if done.returncode != 0:
        tail = log.read_text().strip().splitlines()[-3:]
        raise RouteFailed(f"{shlex.join(cmd[:2])} exited {done.returncode}: " + " | ".join(tail))
    return time.perf_counter() - start


def _figures(detections: dict, truth: dict) -> dict:
    from detector.evaluation import evaluate, fppi_at_recall

    ev = evaluate(detections, truth)
    f = fppi_at_recall(ev, 0.9)
    return {"ap50": float(ev.average_precision), "ap50_95": float(ev.average_precision_50_to_95),
            "fppi_at_recall_0.9": None if f is None else float(f),
            "recall_at_0.05": float(ev.recall[-1]) if len(ev.recall) else 0.0,
            "detections": int(ev.detections), "objects": int(ev.objects)}


def _timed_pass(scan_one, frames: dict):
    """Warm up on the first frame, then one timed pass: (seconds, results per frame)."""
    first = next(iter(frames.values()))
    scan_one(first)
    start = time.perf_counter()
    results = {k: scan_one(g) for k, g in frames.items()}
    return time.perf_counter() - start, results


def run_patchwood(method: str, root: Path, work: Path, test_frames: dict, truth: dict, args) -> dict:
    from detector.io.labels import read_detections
    from detector.model import load_model
    from detector.scan import Engine, ScanSettings

    pw = patchwood_command()
    train_dir, test_dir = root / "train", root / "test"
    bank, model, dets = work / "bank.npz", work / "model.npz", work / "detections.csv"
    log = work / "log.txt"
    harvest = [*pw, "harvest", str(train_dir / "images"), str(train_dir / "labels.csv"),
               "--out", str(bank), "--seed", str(args.seed), "--jobs", str(args.jobs)]
    train = [*pw, "train", str(bank), "--out", str(model), "--seed", str(args.seed),
             "--jobs", str(args.jobs)]
    scan = [*pw, "scan", str(model), str(test_dir / "images"), "--out", str(dets),
            "--threshold", f"{SCAN_THRESHOLD:g}"]
    if method == "recipe":
        harvest += RECIPE_HARVEST
        train += RECIPE_TRAIN + ["--mine-images", str(train_dir / "images"),
                                 "--mine-labels", str(train_dir / "labels.csv")]
    else:
        harvest += shlex.split(args.harvest_args)
        train += shlex.split(args.train_args)
        scan += shlex.split(args.scan_args)
    seconds = _run(harvest, log) + _run(train, log)
    _run(scan, log)
    found = {d.image: (d.boxes, d.scores) for d in read_detections(dets)}
    out = _figures(found, truth)
    out["train_seconds"] = seconds
    out["commands"] = [shlex.join(c) for c in (harvest, train, scan)]
    # the scan's time, in this process on one thread, at the scan command's defaults
    settings = ScanSettings(threshold=SCAN_THRESHOLD)
    engine = Engine(load_model(model), settings)
    secs, results = _timed_pass(engine.scan, test_frames)
    out["scan_seconds"] = secs
    none = (np.zeros((0, 4)), np.zeros(0))
    same = all(len(results[k].scores) == len(found.get(k, none)[1])
               and np.allclose(results[k].scores, found.get(k, none)[1], atol=1e-6)
               for k in test_frames)
    out["library_scan_matches_command"] = bool(same) if method == "recipe" or not args.scan_args else None
    return out


def run_peer(method: str, root: Path, work: Path, test_frames: dict, truth: dict, args) -> dict:
    """Train a peer in a process of its own (``benchmarks/peer_train.py``: imports, the reading of
    the training images, the harvest and every mining round, timed as patchwood's two commands
    are), then scan the test split in this process."""
    import pickle

    from threadpoolctl import threadpool_limits

    out_file, log = work / "detector.pkl", work / "log.txt"
    cmd = [sys.executable, str(HERE / "peer_train.py"), method, str(root), str(out_file),
           "--seed", str(args.seed), "--jobs", str(args.jobs)]
    seconds = _run(cmd, log)
    channel_peer._baseline()  # the HOG detector's class, under the name it was pickled with
    with open(out_file, "rb") as fh:
        trained = pickle.load(fh)
    det = trained["detector"]
    with threadpool_limits(limits=1):
        secs, results = _timed_pass(det.scan, test_frames)
    out = _figures({k: (r[0], r[1]) for k, r in results.items()}, truth)
    out.update(train_seconds=seconds, train_phases=trained["phases"], scan_seconds=secs,
               mined=trained["mined"], window=[int(v) for v in det.window])
    return out


def _fmt(v, spec=".3f", none="n/r"):
    return none if v is None else format(v, spec)


def verdict(results: dict) -> dict | None:
    """Issue 15's goal for the defaults, from per-set AP50s; None without the three methods.

    >>> r = {"a": {"defaults": {"ap50": 0.9}, "hog": {"ap50": 0.8}, "channels": {"ap50": 0.904}},
    ...      "b": {"defaults": {"ap50": 0.7}, "hog": {"ap50": 0.6}, "channels": {"ap50": 0.75}}}
    >>> v = verdict(r); v["per_set"]["a"]["met"], v["per_set"]["b"]["met"], v["met"]
    (True, False, False)
    >>> round(v["mean_defaults"] - v["mean_hog"], 3), v["over_hog_met"]
    (0.1, True)
    """
    need = ("defaults", "hog", "channels")
    sets = {k: v for k, v in results.items() if all(m in v and "ap50" in v[m] for m in need)}
    if not sets:
        return None
    per = {}
    for name, r in sets.items():
        better = max(r["hog"]["ap50"], r["channels"]["ap50"])
        per[name] = {"defaults": r["defaults"]["ap50"], "better_peer": better,
                     "met": r["defaults"]["ap50"] >= better - GOAL_MARGIN}
    mean_d = float(np.mean([r["defaults"]["ap50"] for r in sets.values()]))
    mean_h = float(np.mean([r["hog"]["ap50"] for r in sets.values()]))
    over = mean_d >= mean_h + GOAL_OVER_HOG
    return {"per_set": per, "mean_defaults": mean_d, "mean_hog": mean_h, "over_hog_met": over,
            "met": over and all(p["met"] for p in per.values())}


def print_table(results: dict, methods) -> dict | None:
    """The table of every set and method, and the verdict; returns the verdict."""
    print("\nAP50 | AP50:95 | FPPI at recall 0.9 | training s | scan ms per megapixel")
    header = f"{'set':<11}" + "".join(f" | {METHOD_NAMES[m]:^34}" for m in methods)
    print(header)
    print("-" * len(header))
    for name, per in results.items():
        cells = []
        for m in methods:
            r = per.get(m, {})
            if "ap50" not in r:
                cells.append(f"{'failed' if 'error' in r else 'not run':^34}")
                continue
            cells.append(f"{r['ap50']:.3f} {r['ap50_95']:.3f} {_fmt(r['fppi_at_recall_0.9'], '6.2f'):>6}"
                         f" {r['train_seconds']:5.0f} {r['scan_ms_per_megapixel']:6.0f}")
        print(f"{name:<11}" + "".join(f" | {c:>34}" for c in cells))
    means = []
    for m in methods:
        aps = [per[m]["ap50"] for per in results.values() if "ap50" in per.get(m, {})]
        means.append(f"mean AP50 {np.mean(aps):.3f}" if aps else "")
    print(f"{'':<11}" + "".join(f" | {c:^34}" for c in means))
    mism = [f"{n}/{m}" for n, per in results.items() for m, r in per.items()
            if r.get("library_scan_matches_command") is False]
    if mism:
        print("note: the library's scan at the scan command's defaults did not give the command's "
              f"detections for {', '.join(mism)}: its ms per megapixel may not be the command's")

    v = verdict(results)
    if v is None:
        print("\ngoal (issue 15): needs the methods defaults, hog and channels")
    else:
        print(f"\ngoal (issue 15): the defaults' AP50 >= the better peer's - {GOAL_MARGIN:g} on "
              f"every set, and on average >= the HOG peer's + {GOAL_OVER_HOG:g}")
        for name, p in v["per_set"].items():
            print(f"  {name:<11} {p['defaults']:.3f} vs {p['better_peer']:.3f}: "
                  f"{'met' if p['met'] else 'NOT met'}")
        print(f"  mean        {v['mean_defaults']:.3f} vs HOG {v['mean_hog']:.3f} + "
              f"{GOAL_OVER_HOG:g}: {'met' if v['over_hog_met'] else 'NOT met'}")
        print(f"  overall: {'met' if v['met'] else 'NOT met'}")
    return v


def from_json(paths, methods) -> int:
    """Print the table and the verdict of the figures in one or more ``--json`` files."""
    results = {}
    for path in paths:
        doc = json.loads(Path(path).read_text())
        print(f"{path}: {doc['command']}\n  machine: {doc['machine']}\n  load before "
              f"{doc['load_before']}, after {doc.get('load_after')}; "
              + (f"{doc['seconds'] / 60:.1f} min" if doc.get("seconds") else "incomplete"))
        for name, entry in doc["sets"].items():
            results.setdefault(name, {}).update(entry["methods"])
    print_table(results, methods)
    return 0


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--sets", nargs="+", default=list(datasets.SETS), choices=list(datasets.SETS),
                    metavar="NAME", help=f"sets (default all: {' '.join(datasets.SETS)})")
    ap.add_argument("--methods", nargs="+", default=list(METHODS), choices=METHODS,
                    metavar="METHOD", help=f"methods (default all: {' '.join(METHODS)})")
    ap.add_argument("--harvest-args", default="", help="extra options of the defaults' harvest")
    ap.add_argument("--train-args", default="", help="extra options of the defaults' train")
    ap.add_argument("--scan-args", default="", help="extra options of the defaults' scan")
    ap.add_argument("--seed", type=int, default=0,
                    help="seed of the sets, the harvests and the models (default 0)")
    ap.add_argument("--jobs", type=int, default=2, help="training threads (default 2)")
    ap.add_argument("--cache", type=Path, default=None,
                    help=f"where the sets are built (default {datasets.default_cache()})")
    ap.add_argument("--train-images", type=int, default=datasets.DEFAULT_TRAIN_IMAGES)
    ap.add_argument("--test-images", type=int, default=datasets.DEFAULT_TEST_IMAGES)
    ap.add_argument("--keep", type=Path, default=None,
                    help="keep the banks, models, detections and logs in this folder")
    ap.add_argument("--json", type=Path, default=None, help="write every figure to this file")
    ap.add_argument("--from-json", type=Path, nargs="+", default=None, metavar="JSON",
                    help="print the table and verdict of earlier runs' --json files (sets split "
                         "over several runs), run nothing")
    args = ap.parse_args(argv)
    if args.from_json:
        return from_json(args.from_json, args.methods)
    if args.jobs < 1:
        ap.error("--jobs must be at least 1")
    for opt in ("harvest_args", "train_args", "scan_args"):
        try:
            shlex.split(getattr(args, opt))
        except ValueError as exc:
            ap.error(f"--{opt.replace('_', '-')}: {exc}")
    if args.json is not None and args.json.exists() and args.json.is_dir():
        ap.error(f"--json {args.json}: is a folder")

    import cv2
    import sklearn
    import skimage

    from _machine import cpu_name, load
    from detector.io.images import read_gray
    from detector.io.labels import read_labels

    started = time.perf_counter()
    command = shlex.join(["python", "benchmarks/cross_data.py", *(sys.argv[1:] if argv is None
                                                                   else argv)])
    machine = (f"{cpu_name()}; {os.cpu_count()} logical cores, "
               f"{len(os.sched_getaffinity(0)) if hasattr(os, 'sched_getaffinity') else '?'} "
               f"usable; {platform.system()} {platform.machine()}")
    versions = (f"python {platform.python_version()}, numpy {np.__version__}, scikit-image "
                f"{skimage.__version__}, scikit-learn {sklearn.__version__}, opencv {cv2.__version__}")
    load_before = load()
    print("command:", command)
    print("machine:", machine)
    print("versions:", versions)
    print(f"load average (1, 5, 15 min) before: {load_before}")
    print("training and scan times are wall times on a machine shared with other work: for "
          "scale only (AP figures do not depend on them)", flush=True)

    results, infos = {}, {}

    def write_json(seconds=None, load_after=None, v=None):
        doc = {"command": command, "machine": machine, "versions": versions,
               "load_before": load_before, "load_after": load_after, "seconds": seconds,
               "harvest_args": args.harvest_args, "train_args": args.train_args,
               "scan_args": args.scan_args, "seed": args.seed, "jobs": args.jobs,
               "methods": list(args.methods),
               "sets": {n: {"info": infos[n], "methods": results[n]} for n in results},
               "verdict": v, "complete": seconds is not None}
        write_text(args.json, json.dumps(doc, indent=1) + "\n")

    work_root = args.keep or Path(tempfile.mkdtemp(prefix="patchwood-cross-data-"))
    try:
        for name in args.sets:
            root = datasets.build_set(name, args.cache, args.seed, args.train_images,
                                      args.test_images)
            info = datasets.set_info(root)
            infos[name] = info
            c = info["counts"]
            print(f"\n== {name} ({info['kind']}; {info['difficulty']}): train "
                  f"{c['train']['images']} images / {c['train']['boxes']} boxes, test "
                  f"{c['test']['images']} / {c['test']['boxes']}; {root}", flush=True)
            test = read_labels(root / "test" / "labels.csv", images_dir=root / "test" / "images")
            truth = {it.image: it.boxes for it in test}
            test_frames = {it.image: read_gray(root / "test" / "images" / it.image) for it in test}
            results[name] = {}
            for method in args.methods:
                work = work_root / name / method
                work.mkdir(parents=True, exist_ok=True)
                try:
                    if method in ("defaults", "recipe"):
                        r = run_patchwood(method, root, work, test_frames, truth, args)
                    else:
                        r = run_peer(method, root, work, test_frames, truth, args)
                except RouteFailed as exc:
                    r = {"error": str(exc)}
                    print(f"  {METHOD_NAMES[method]:<19} FAILED: {exc}", flush=True)
                    results[name][method] = r
                    continue
                mp = sum(g.size for g in test_frames.values()) / 1e6
                r["scan_ms_per_megapixel"] = r["scan_seconds"] * 1e3 / mp
                results[name][method] = r
                print(f"  {METHOD_NAMES[method]:<19} AP50 {r['ap50']:.3f}  AP50:95 "
                      f"{r['ap50_95']:.3f}  FPPI@0.9 {_fmt(r['fppi_at_recall_0.9'])}  "
                      f"train {r['train_seconds']:.0f} s  scan "
                      f"{r['scan_ms_per_megapixel']:.0f} ms/MP", flush=True)
                for line in r.get("commands", []):
                    print(f"    {line}")
                if args.json is not None:  # after every method: a long run that stops keeps its figures
                    write_json()
    finally:
        if args.keep is None:
            shutil.rmtree(work_root, ignore_errors=True)

    v = print_table(results, args.methods)
    total = time.perf_counter() - started
    load_after = load()
    print(f"whole run: {total / 60:.1f} min; load average (1, 5, 15 min) after: {load_after}")
    if args.json is not None:
        write_json(total, load_after, v)
        print(f"wrote {args.json}")
    failed = any("error" in r for per in results.values() for r in per.values())
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
