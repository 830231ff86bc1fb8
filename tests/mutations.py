"""Mutation audit: put deliberate one-line bugs into a copy of the library and check that the tests
notice each of them. Not a test module (pytest collects ``test_*.py`` only); run it by hand:

    .venv/bin/python tests/mutations.py              # every mutation, a table at the end
    .venv/bin/python tests/mutations.py M3 G2        # only these
    .venv/bin/python tests/mutations.py --list       # what each mutation does and which tests run

For each mutation the script copies ``detector/``, ``cli/``, ``synthetic_images/``, ``tests/`` and
``pyproject.toml`` into a temporary folder, replaces one piece of text in one file (the text must
occur there exactly once, or the mutation is reported as not applying), and runs the tests named
for it with this Python, the copy first on ``PYTHONPATH``. A mutation is caught when pytest reports
failing tests (exit status 1); it survives when they pass. First the same tests run on an unmutated
copy: a mutation only counts as caught against tests that pass without it.

Exit status: 0 when every mutation is caught, 1 when one survives, 2 when one could not be run
(its text not found, the tests not passing unmutated, pytest not finishing).

Mutation testing is common practice (DeMillo, Lipton and Sayward, "Hints on test data selection",
IEEE Computer 1978). M2, M3, M5, M6 and M7 are the mutations an audit of this project found the
suite blind to (project issue 22); E1-E4 are one-line slips in the early-exit calibration and the
scan's exits, G1-G3 in the contrast gate; X1, B1, C1 and S1 in the exit search's count, the
banded scan, the calibration's background leaves and the binning search (S1 survived until the
binning test put values exactly on cuts in every lane of the four-at-a-time search). Where a mutation runs a ``-k`` selection of
tests/test_scan.py, the rest of that file is left out: it takes minutes in a fresh copy, and one
of its tests counts detections of a tiny trained model that vary between library versions.
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
COPIED = ("detector", "cli", "synthetic_images", "tests")


@dataclass(frozen=True)
class Mutation:
    key: str
    what: str
    path: str  # relative to the repository
    old: str
    new: str
    tests: tuple  # pytest arguments: files, node ids, -k expressions


MUTATIONS = (
    Mutation(
        "M2", "NMS visits tied scores in quicksort order instead of a stable order",
        "detector/geometry.py",
        'order = np.argsort(-s, kind="stable").astype(np.int64)',
        'order = np.argsort(-s, kind="quicksort").astype(np.int64)',
        ("tests/test_geometry.py",)),
    Mutation(
        "M3", "Model.exits_for picks the row of the next exit level up",
        "detector/model.py",
        "return self.exit_thresholds if row < 0 else self.exit_table[row]",
        "row = min(row + 1, len(self.exit_levels) - 1)\n"
        "        return self.exit_thresholds if row < 0 else self.exit_table[row]",
        ("tests/test_early_exit.py",)),
    Mutation(
        "M5", "scaled rectangles divided by the nominal area s*s*A instead of their rounded area",
        "detector/scan/_engine.py",
        "scaled_area = ((x1 - x0) * (y1 - y0)).astype(np.float64)",
        "scaled_area = base_area * scale * scale",
        ("tests/test_scan.py", "-k", "scale")),
    Mutation(
        "M6", "score temperature fitted with an unbalanced log-loss",
        "detector/cascade.py",
        "return (np.logaddexp(0.0, -2.0 * o / t).mean() + np.logaddexp(0.0, 2.0 * b / t).mean()) / 2",
        "return (np.logaddexp(0.0, -2.0 * o / t).sum() + np.logaddexp(0.0, 2.0 * b / t).sum()) / "
        "(len(o) + len(b))",
        ("tests/test_temperature.py",)),
    Mutation(
        "M7", "final_score ignores the temperature",
        "detector/forest/_flat.py",
        "return 1.0 / (1.0 + np.exp(-2.0 * total / float(temperature)))",
        "return 1.0 / (1.0 + np.exp(-2.0 * total))",
        ("tests/test_temperature.py",)),
    Mutation(
        "E1", "early exit: exit_kept gives up one calibration object more than the budget",
        "detector/cascade.py",
        "budget = min(int(np.floor(exit_budget * n + 1e-9)), max(n - 1, 0))",
        "budget = min(int(np.floor(exit_budget * n + 1e-9)) + 1, max(n - 1, 0))",
        ("tests/test_early_exit.py", "tests/test_forest.py")),
    Mutation(
        "E2", "early exit: the compiled scan drops a window whose running score equals the exit",
        "detector/scan/_kernels.py",
        "k += np.int64(s >= low and s + rest >= cutoff)",
        "k += np.int64(s > low and s + rest >= cutoff)",
        ("tests/test_early_exit.py",)),
    Mutation(
        "E3", "early exit: the any-threshold exits calibrated only on the objects scoring 0.5 or more",
        "detector/cascade.py",
        "running[exit_kept(running, bg_running[past_gate], share, lost)].min(axis=0))",
        "running[at][exit_kept(running[at], bg_running[past_gate], share, lost[at])].min(axis=0))",
        ("tests/test_early_exit.py",)),
    Mutation(
        "E4", "early exit: a level's exit row keeps only the objects scoring above the level, not at it",
        "detector/cascade.py",
        "sel = fin >= np.float32(level)",
        "sel = fin > np.float32(level)",
        ("tests/test_early_exit.py",)),
    Mutation(
        "G1", "contrast gate: the variance fraction applied to the standard deviation",
        "detector/cascade.py",
        "return float(sig[kept_objects(final_scores, exit_budget)].min() * math.sqrt(variance_fraction))",
        "return float(sig[kept_objects(final_scores, exit_budget)].min() * variance_fraction)",
        ("tests/test_early_exit.py",)),
    Mutation(
        "G2", "contrast gate: the scan compares the window variance with the gate unsquared",
        "detector/scan/_engine.py",
        "self.min_var = gate * gate if gate > 0 else -np.inf",
        "self.min_var = gate if gate > 0 else -np.inf",
        ("tests/test_scan.py", "-k", "gate")),
    Mutation(
        "G3", "contrast gate: calibrated on the sample standard deviation (n - 1), not the scan's",
        "detector/cascade.py",
        "var = (flat * flat).sum(axis=1) / area - mean * mean",
        "var = ((flat * flat).sum(axis=1) - area * mean * mean) / (area - 1)",
        ("tests/test_early_exit.py",)),
    Mutation(
        "X1", "early exit: a background window that never exits counted as leaving after tree T",
        "detector/cascade.py",
        "first = np.where(below.any(axis=1), np.argmax(below, axis=1), t - 1)",
        "first = np.where(below.any(axis=1), np.argmax(below, axis=1), t)",
        ("tests/test_early_exit.py", "-k", "exit_kept")),
    Mutation(
        "B1", "banded scan: a band starts at its first window's row, without the row of context",
        "detector/scan/_engine.py",
        "top = min(max(start - 1, 0), padded_height - rows)",
        "top = min(max(start, 0), padded_height - rows)",
        ("tests/test_channels.py", "-k", "band")),
    Mutation(
        "C1", "calibration: the background leaves read with the bins one step off",
        "detector/patch_forest.py",
        "bin_forest, values[bin_used][:, grow_y == 0].T)",
        "bin_forest, values[bin_used][:, grow_y == 0].T.astype(np.int16) + 1)",
        ("tests/test_classifier.py", "-k", "background_leaves")),
    Mutation(
        "S1", "binning: a value equal to a cut counted above it",
        "detector/forest/_binning.py",
        "b0 += h if c[b0 + h - 1] < x0 else 0",
        "b0 += h if c[b0 + h - 1] <= x0 else 0",
        ("tests/test_forest.py", "-k", "bin")),
)


def copy_repository(dest: str) -> None:
    ignore = shutil.ignore_patterns("__pycache__", "*.nbi", "*.nbc", ".hypothesis", ".pytest_cache")
    for name in COPIED:
        shutil.copytree(os.path.join(ROOT, name), os.path.join(dest, name), ignore=ignore)
    shutil.copy2(os.path.join(ROOT, "pyproject.toml"), dest)


def apply(m: Mutation, dest: str) -> str | None:
    """Patch the copy; an error message when the text is not there exactly once."""
    path = os.path.join(dest, m.path)
    with open(path, encoding="utf-8") as fh:
        text = fh.read()
    found = text.count(m.old)
    if found != 1:
        return f"{m.path}: the text to replace occurs {found} times, not once"
    with open(path, "w", encoding="utf-8") as fh:
        fh.write(text.replace(m.old, m.new))
    return None


def run_tests(python: str, dest: str, tests, timeout: float) -> tuple[int, str]:
    """pytest on the copy: (exit status, last lines of its output); status None on a timeout."""
    env = dict(os.environ, PYTHONPATH=dest, PYTHONDONTWRITEBYTECODE="1")
    env.pop("PYTEST_ADDOPTS", None)
    check = subprocess.run([python, "-c", "import detector, cli, synthetic_images as s; "
                            "print(detector.__file__, cli.__file__, s.__file__)"],
                           cwd=dest, env=env, capture_output=True, text=True)
    if check.returncode or any(not p.startswith(dest) for p in check.stdout.split()):
        return 2, "the copy's packages are not the ones imported: " + (check.stdout + check.stderr)
    cmd = [python, "-m", "pytest", "-q", "-x", "-p", "no:cacheprovider", "-p", "no:xdist",
           "--no-header", *tests]
    try:
        done = subprocess.run(cmd, cwd=dest, env=env, capture_output=True, text=True,
                              timeout=timeout)
    except subprocess.TimeoutExpired:
        return None, f"no result within {timeout:.0f} s"
    lines = [ln for ln in done.stdout.splitlines() if ln.strip()]
    return done.returncode, "\n".join(lines[-12:])


def summary_line(output: str) -> str:
    """pytest's closing line ('1 failed, 20 passed in 3.1s'), or the last line."""
    lines = output.splitlines()
    for ln in reversed(lines):
        if " passed" in ln or " failed" in ln or " error" in ln:
            return ln.strip("= ")
    return lines[-1] if lines else ""


def first_failure(output: str) -> str:
    for ln in output.splitlines():
        if ln.startswith("FAILED ") or ln.startswith("ERROR "):
            return ln.split(" - ")[0].split("::", 1)[-1]
    return ""


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("keys", nargs="*", help="mutations to run (default: all)")
    parser.add_argument("--list", action="store_true", help="list the mutations and stop")
    parser.add_argument("--python", default=sys.executable,
                        help="the Python whose packages run the tests (default: this one)")
    parser.add_argument("--timeout", type=float, default=900.0,
                        help="seconds allowed to each pytest run (default 900)")
    parser.add_argument("--keep", action="store_true", help="keep the temporary copies")
    args = parser.parse_args(argv)
    chosen = [m for m in MUTATIONS if not args.keys or m.key in args.keys]
    unknown = set(args.keys) - {m.key for m in MUTATIONS}
    if unknown:
        parser.error(f"no mutation {', '.join(sorted(unknown))} (see --list)")
    if args.list:
        for m in chosen:
            print(f"{m.key}  {m.what}\n    {m.path}: {m.old!r}\n    -> {m.new!r}\n"
                  f"    tests: {' '.join(m.tests)}")
        return 0
    print(f"$ {' '.join([os.path.basename(sys.executable), *sys.argv])}")
    print(f"repository {ROOT}, python {args.python}")
    work = tempfile.mkdtemp(prefix="patchwood-mutations-")
    rows, status = [], 0
    try:
        baseline = {}
        for m in chosen:
            if m.tests in baseline:
                continue
            dest = os.path.join(work, f"unmutated-{len(baseline)}")
            copy_repository(dest)
            started = time.perf_counter()
            code, out = run_tests(args.python, dest, m.tests, args.timeout)
            baseline[m.tests] = (code, out)
            print(f"unmutated: {' '.join(m.tests)}: {summary_line(out)} "
                  f"({time.perf_counter() - started:.0f} s)", flush=True)
        for m in chosen:
            dest = os.path.join(work, m.key)
            copy_repository(dest)
            started = time.perf_counter()
            error = apply(m, dest)
            code, out = (2, error) if error else run_tests(args.python, dest, m.tests, args.timeout)
            seconds = time.perf_counter() - started
            if baseline[m.tests][0] != 0:
                verdict, detail = "error", "the tests fail without the mutation"
            elif error:
                verdict, detail = "error", error
            elif code == 1:
                verdict, detail = "caught", first_failure(out)
            elif code == 0:
                verdict, detail = "NOT CAUGHT", summary_line(out)
            else:
                verdict, detail = "error", f"pytest exit status {code}: {summary_line(out or '')}"
            if verdict == "NOT CAUGHT":
                status = max(status, 1)
            elif verdict == "error":
                status = 2
            rows.append((m.key, m.what, verdict, detail, seconds))
            print(f"{m.key}: {verdict} ({seconds:.0f} s) {detail}", flush=True)
    finally:
        if args.keep:
            print(f"copies kept in {work}")
        else:
            shutil.rmtree(work, ignore_errors=True)
    print()
    print(f"| mutation | what | result | first failing test (or pytest's line) |")
    print(f"|---|---|---|---|")
    for key, what, verdict, detail, _ in rows:
        print(f"| {key} | {what} | {verdict} | {detail} |")
    caught = sum(r[2] == "caught" for r in rows)
    print(f"\n{caught} of {len(rows)} mutations caught")
    return status


if __name__ == "__main__":
    sys.exit(main())
