"""Retraining from a review: the command lines to harvest, train and scan again from the corrected
labels, and a background job that runs them one after another.

The commands are fixed by the review (its images folder and labels file, and the scan settings of
the detections under review, read from their provenance side file); nothing in a request reaches
them. Each job writes into a new folder ``RUNS_DIR/retrain-N`` (never an existing one): the bank,
the model, and the new scan of the images folder, which the page can then open as the comparison
run. Progress comes from the commands' own output (with ``PATCHWOOD_PROGRESS_LINES`` set, their
progress bars print a line at most once a second when not on a terminal).
"""

from __future__ import annotations

import os
import shlex
import subprocess
import sys
import threading
import time
from pathlib import Path

__all__ = ["Retrainer", "scan_options"]

#: Lines of the running command's output kept for the page.
TAIL = 12
#: Command-line options of ``patchwood scan`` by provenance setting name.
_SCAN_OPTIONS = {"threshold": "--threshold", "scale_step": "--scale-step", "stride": "--stride",
                 "min_object": "--min-object", "max_object": "--max-object",
                 "nms_iou": "--nms-iou", "overhang": "--overhang", "exit_level": "--exit-level"}


def scan_options(settings: dict | None) -> list[str]:
    """The ``patchwood scan`` options that repeat a recorded scan's settings (a provenance
    record's ``settings``), so the retrained model is scanned as the run under review was.

    >>> scan_options({"scale_step": 1.2, "stride": 2.0, "min_object": None, "max_object": 60.0,
    ...               "threshold": 0.05, "nms_iou": 0.3, "early_exit": False, "overhang": 0.25,
    ...               "exit_level": None})
    ['--threshold', '0.05', '--scale-step', '1.2', '--stride', '2', '--max-object', '60', '--nms-iou', '0.3', '--overhang', '0.25', '--no-early-exit']
    >>> scan_options(None)
    ['--threshold', '0.05']
    """
    if not settings:
        return ["--threshold", "0.05"]  # the curve's scan, as the README's worked example
    args = []
    for name, option in _SCAN_OPTIONS.items():
        if settings.get(name) is not None:
            args += [option, f"{float(settings[name]):g}"]
    if settings.get("early_exit") is False:
        args.append("--no-early-exit")
    return args


class Retrainer:
    """Harvest, train and scan again from the labels under review, as a background job.

    Parameters
    ----------
    images_dir, labels : path
        The review's images folder and labels file.
    runs_dir : path
        Where each job makes its own new folder ``retrain-N``; created at the first job.
    scan_settings : dict or None
        The settings of the scan under review (its provenance), repeated by the new scan.
    program : list of str, optional
        How to run ``patchwood`` (default: this Python with ``-m cli.main``).
    """

    def __init__(self, images_dir, labels, runs_dir, scan_settings=None, program=None):
        # absolute, so the command lines work from any folder a person pastes them into
        self.images_dir = Path(images_dir).resolve()
        self.labels = Path(labels).resolve()
        self.runs_dir = Path(runs_dir).resolve()
        self.scan_settings = scan_settings
        self.program = list(program) if program else [sys.executable, "-m", "cli.main"]
        self._lock = threading.Lock()
        self._process = None
        self._cancelled = False
        self.status = {"state": "idle", "step": 0, "steps": 3, "command": None, "tail": [],
                       "seconds": 0.0, "folder": None, "detections": None, "error": None,
                       "labels_version": None}
        self._started = None

    def _next_folder(self) -> Path:
        n = 1
        while (self.runs_dir / f"retrain-{n}").exists():
            n += 1
        return self.runs_dir / f"retrain-{n}"

    def commands(self, folder: Path | None = None) -> list[list[str]]:
        """The three commands (arguments after ``patchwood``) of a job writing into ``folder``
        (default: the folder the next job would make)."""
        folder = folder or self._next_folder()
        bank, model, dets = folder / "bank.npz", folder / "model.npz", folder / "detections.csv"
        return [["harvest", str(self.images_dir), str(self.labels), "--out", str(bank)],
                ["train", str(bank), "--out", str(model)],
                ["scan", str(model), str(self.images_dir), "--out", str(dets),
                 *scan_options(self.scan_settings)]]

    def command_lines(self, folder: Path | None = None) -> list[str]:
        """The commands as a person types them."""
        return ["patchwood " + shlex.join(c) for c in self.commands(folder)]

    def snapshot(self) -> dict:
        with self._lock:
            status = dict(self.status, tail=list(self.status["tail"]))
            if status["state"] == "running" and self._started is not None:
                status["seconds"] = round(time.monotonic() - self._started, 1)
        status["commands"] = self.command_lines(Path(status["folder"])
                                                if status["state"] == "running" else None)
        return status

    def start(self, labels_version: int | None = None) -> bool:
        """Start a job; False when one is already running."""
        with self._lock:
            if self.status["state"] == "running":
                return False
            self.runs_dir.mkdir(parents=True, exist_ok=True)
            folder = self._next_folder()
            folder.mkdir()
            self._cancelled = False
            self._started = time.monotonic()
            self.status.update(state="running", step=0, command=None, tail=[], seconds=0.0,
                               folder=str(folder), detections=None, error=None,
                               labels_version=labels_version)
        threading.Thread(target=self._run, args=(folder,), daemon=True).start()
        return True

    def cancel(self) -> bool:
        with self._lock:
            if self.status["state"] != "running":
                return False
            self._cancelled = True
            if self._process is not None:
                self._process.terminate()
        return True

    def wait(self, timeout: float | None = None) -> dict:
        """Block until the job is no longer running (for tests and scripts)."""
        end = None if timeout is None else time.monotonic() + timeout
        while self.status["state"] == "running":
            if end is not None and time.monotonic() > end:
                break
            time.sleep(0.05)
        return self.snapshot()

    def _run(self, folder: Path) -> None:
        env = dict(os.environ, PATCHWOOD_PROGRESS_LINES="1", PYTHONUNBUFFERED="1")
        for step, args in enumerate(self.commands(folder), start=1):
            with self._lock:
                if self._cancelled:
                    break
                self.status.update(step=step, command="patchwood " + shlex.join(args))
                process = subprocess.Popen(self.program + args, stdout=subprocess.PIPE,
                                           stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
                                           text=True, errors="replace", env=env)
                self._process = process
            for line in process.stdout:
                line = line.rstrip()
                if line:
                    with self._lock:
                        self.status["tail"] = (self.status["tail"] + [line])[-TAIL:]
            code = process.wait()
            if code != 0 or self._cancelled:
                with self._lock:
                    last = self.status["tail"][-1] if self.status["tail"] else ""
                    self.status.update(state="cancelled" if self._cancelled else "failed",
                                       error="cancelled" if self._cancelled else
                                       f"step {step} stopped with exit code {code}: {last}")
                    self.status["seconds"] = round(time.monotonic() - self._started, 1)
                    self._process = None
                return
        with self._lock:
            self._process = None
            self.status["seconds"] = round(time.monotonic() - self._started, 1)
            if self._cancelled:
                self.status.update(state="cancelled", error="cancelled")
            else:
                self.status.update(state="done", detections=str(folder / "detections.csv"))
