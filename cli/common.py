"""Small pieces the commands share: output-file checks, progress bars, option parsing."""

from __future__ import annotations

import contextlib
import os
import sys
import time
from pathlib import Path

import typer

from detector.errors import InputError
from detector.io.files import display_name, same_file


def check_output_file(path: Path, force: bool, what: str = "output", inputs=()) -> None:
    """Refuse to replace an existing file unless ``force``; refuse a missing parent folder; and
    refuse, even with ``force``, an output that is one of the command's ``inputs`` (the same file,
    by ``os.path.samefile``, also through a link or another spelling of the path)."""
    path = Path(path)
    if path.is_dir():
        raise InputError(f"{what} must be a file, but this is a folder", path=path)
    check_not_an_input(path, inputs, what)
    if path.exists() and not force:
        raise InputError(f"{what} exists; add --force to replace it", path=path)
    parent = path.parent if str(path.parent) else Path(".")
    if not parent.is_dir():
        raise InputError(f"folder for the {what} does not exist", path=parent)


def given(ctx: typer.Context, name: str) -> bool:
    """Whether the option ``name`` (its parameter name) was given on the command line, rather
    than left at its default."""
    source = ctx.get_parameter_source(name)
    return source is not None and source.name not in ("DEFAULT", "DEFAULT_MAP")


#: click's usage error (exit status 2), reached through Typer's public names.
UsageError = typer.BadParameter.__bases__[0]


def usage_error(message: str) -> None:
    """Stop with a usage error: one line, exit status 2 (options that contradict each other)."""
    raise UsageError(message)


def refuse_together(ctx: typer.Context, first: str, second: str, why: str) -> None:
    """A usage error (exit 2) when both options were given: one would silently override the
    other. ``first`` and ``second`` are parameter names; the message names them as options."""
    if given(ctx, first) and given(ctx, second):
        names = [f"--{n.replace('_', '-')}" for n in (first, second)]
        usage_error(f"{names[0]} and {names[1]} cannot go together: {why}")


def check_not_an_input(path: Path, inputs, what: str = "output") -> None:
    """Refuse an output that is one of ``inputs`` (paths; None entries are ignored)."""
    if not os.path.exists(path):
        return
    for other in inputs:
        if other is not None and same_file(path, other):
            raise InputError(f"the {what} is an input of this command ({human_path(other)}); "
                             "choose another file to write", path=path)


def parse_window_option(text: str | None):
    """``--window WxH`` -> (W, H) or None; a bad value is a usage error (exit 2)."""
    if text is None:
        return None
    from detector.harvest import parse_window

    try:
        return parse_window(text)
    except ValueError as err:
        raise typer.BadParameter(str(err)) from None


def _rate_column(unit: str):
    """A progress-bar column: items per second since the start."""
    from rich.progress import TextColumn
    from rich.text import Text

    class Rate(TextColumn):
        def render(self, task):
            elapsed = task.elapsed or 0.0
            rate = task.completed / elapsed if elapsed > 0 else 0.0
            return Text(f"{rate:6.1f} {unit}/s")

    return Rate("")


#: ``--jobs`` everywhere: how many workers, of whatever kind the command runs.
MAX_JOBS = 256


# The harvest options, declared once for `harvest` and `tune` (tune harvests its folds).
HARVEST_OPTIONS = {
    "window": lambda: typer.Option(None, "--window", help="Patch size WxH, e.g. 24x24. Default: the median box aspect ratio; the shorter side 40 when at most 20% of the labelled objects are smaller than the window's object, else 24."),
    "label": lambda: typer.Option(None, "--label", help="Keep only boxes of this class (when the labels have a label column)."),
    "margin": lambda: typer.Option(0.1, "--margin", min=0.0, max=1.0, help="Context added around each box, as a fraction of its size on every side."),
    "copies": lambda: typer.Option(4, "--copies", min=0, max=100, help="Augmented copies per box, besides the box itself."),
    "jitter": lambda: typer.Option(0.05, "--jitter", min=0.0, max=0.5, help="Largest random shift and scale change of a copy, as a fraction of the box."),
    "mirror": lambda: typer.Option(True, "--mirror/--no-mirror", help="Mirror every second copy left to right."),
    "rotate": lambda: typer.Option(10.0, "--rotate", min=0.0, max=180.0, help="Largest random rotation of a copy, degrees."),
    "brightness": lambda: typer.Option(20.0, "--brightness", min=0.0, max=128.0, help="Largest random brightness change of a copy, grey levels."),
    "contrast": lambda: typer.Option(0.2, "--contrast", min=0.0, max=0.9, help="Largest random relative contrast change of a copy."),
    "negatives_per_image": lambda: typer.Option(50, "--negatives-per-image", min=0, help="Background windows drawn from each image."),
    "near_negatives": lambda: typer.Option(4, "--near-negatives", min=0, max=100, help="Background windows per box drawn close to it: much smaller inside it, much larger around it."),
    "background_iou": lambda: typer.Option(0.3, "--background-iou", min=0.0, max=1.0, help="A background window must overlap every labelled box less than this (IoU)."),
}


def harvest_option(name: str):
    """The declaration of the harvest option ``name`` (a key of :data:`HARVEST_OPTIONS`)."""
    return HARVEST_OPTIONS[name]()


def jobs_option():
    """``--jobs``, declared once for every command that takes it: one meaning, one default."""
    return typer.Option(1, "--jobs", min=1, max=MAX_JOBS, help="Workers: the threads that read images and cut patches or grow trees, and the processes that scan, whichever this command runs (results do not depend on it).")


def channels_option():
    """``--channels``, declared once for ``train`` and ``tune`` (the default is train's)."""
    from detector.training import DEFAULT_TRAIN

    return typer.Option(DEFAULT_TRAIN["channels"], "--channels", help="Features the pool draws: gradient (half of the pool as rectangles and rectangle differences over the gradient magnitude and six orientation channels, the single rectangles on the magnitude without contrast normalisation, so that the trees see how strong an edge is; the rest grey rectangle differences; scanned on an image pyramid) or grey (rectangle differences of the grey image only; scanned by scaling the rectangles, faster on busy frames).")


def check_channels_option(value: str) -> str:
    """The ``--channels`` value, or a usage error naming the choices."""
    from detector.features import CHOICES

    if value not in CHOICES:
        raise typer.BadParameter(f"--channels must be {' or '.join(CHOICES)}, got {value!r}")
    return value


#: Set by ``--quiet``: no progress bars or progress lines.
_QUIET = {"on": False}


def _set_quiet(value: bool) -> bool:
    _QUIET["on"] = bool(value)
    return value


def quiet_option():
    """``--quiet``, declared once for the commands that show progress."""
    return typer.Option(False, "--quiet", "-q", callback=_set_quiet, help="No progress bars or progress lines on stderr (results, warnings and errors are still printed).")


@contextlib.contextmanager
def progress_bar(description: str, total: int | None = None, unit: str = "items"):
    """A progress bar on stderr with rate and time left; yields ``update(done, total=None)``.

    Quiet when stderr is not a terminal except for one closing line, so logs stay readable (with
    the environment variable ``PATCHWOOD_PROGRESS_LINES`` set, also a line at most once a second:
    how ``patchwood review`` follows a retraining job); silent with ``--quiet``.
    """
    if _QUIET["on"]:
        yield lambda done, new_total=None: None
        return
    live = sys.stderr.isatty()
    start = time.perf_counter()
    state = {"done": 0, "total": total, "shown": start}
    lines = not live and bool(os.environ.get("PATCHWOOD_PROGRESS_LINES"))
    if live:
        # rich only for a bar on a terminal (30 ms of a command's start-up); else plain lines
        from rich.console import Console
        from rich.progress import (BarColumn, MofNCompleteColumn, Progress, TextColumn,
                                   TimeElapsedColumn, TimeRemainingColumn)

        bar = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                       _rate_column(unit), TimeElapsedColumn(), TextColumn("left"), TimeRemainingColumn(),
                       console=Console(stderr=True, highlight=False), transient=False)
        bar.start()
        task = bar.add_task(description, total=total)
    failed = False
    try:
        def update(done: int, new_total: int | None = None) -> None:
            state["done"] = done
            if new_total is not None:
                state["total"] = new_total
            if live:
                bar.update(task, completed=done, total=state["total"])
            elif lines and time.perf_counter() - state["shown"] >= 1.0:
                state["shown"] = time.perf_counter()
                of = f"/{state['total']}" if state["total"] else ""
                print(f"{description}: {done}{of} {unit}", file=sys.stderr, flush=True)

        yield update
    except BaseException:
        failed = True
        raise
    finally:
        if live:
            bar.stop()
        elif not failed:
            seconds = time.perf_counter() - start
            done = state["done"]
            rate = done / seconds if seconds > 0 else 0.0
            of = f"/{state['total']}" if state["total"] else ""
            print(f"{description}: {done}{of} {unit} in {seconds:.1f} s ({rate:.1f} {unit}/s)",
                  file=sys.stderr, flush=True)


def count(n: int, noun: str, plural: str | None = None) -> str:
    """``"1 image"``, ``"3 images"``: a number with its noun in the right form.

    >>> count(1, "box", "boxes"), count(0, "box", "boxes"), count(2, "image")
    ('1 box', '0 boxes', '2 images')
    """
    return f"{n} {noun if n == 1 else (plural or noun + 's')}"


def echo(text: str = "") -> None:
    """Print a line of results to stdout (a name that is not UTF-8 shown as the project writes
    it, :func:`detector.io.files.display_name`)."""
    typer.echo(display_name(text))


def fail(message: str, path=None) -> None:
    """Stop with a one-line input error."""
    raise InputError(message, path=path)


def human_path(path) -> str:
    """A path as the user would type it: relative to the working folder when inside it."""
    try:
        rel = os.path.relpath(path)
    except ValueError:
        return str(path)
    return rel if not rel.startswith("..") else str(path)


def flush() -> None:
    sys.stdout.flush()


def mining_stop_line(r: int, found, counts: dict, rounds: int) -> str | None:
    """The line saying that mining ended early after round ``r + 1`` (``found.last``), else None;
    ``counts``: the bank the round's model trained on.

    >>> from types import SimpleNamespace
    >>> mining_stop_line(0, SimpleNamespace(last=True, patches=[0] * 45), {"background": 4589}, 2)
    'mining stops after round 1 of 2: its 45 false alarms add 1.0 % to the 4589 background patches (another round needs 2 %)'
    """
    if not getattr(found, "last", False):
        return None
    from detector.training import _train  # the module's value: the one train_with_mining reads

    added, before = len(found.patches), counts["background"]
    return (f"mining stops after round {r + 1} of {rounds}: its {added} false alarms add "
            f"{100.0 * added / max(before, 1):.1f} % to the {before} background patches (another "
            f"round needs {100 * _train.MINING_STOP_SHARE:g} %)")
