"""The `patchwood` command: thin Typer commands that parse, call the library and print.

Each command lives in its own module under ``cli/`` and is listed in ``COMMANDS``; its module is
imported only when the command is used. Library errors of
type :class:`detector.errors.InputError` become one line on stderr and exit status 1; usage errors
(bad options) are Typer's, exit status 2.
"""

from __future__ import annotations

import sys

import typer

from detector.errors import InputError
from detector.io.files import display_name

#: Every command: (module under cli/, function, one-line summary for `patchwood --help`). The
#: module is imported only when its command runs or shows its own help, so `patchwood --help`
#: stays quick (the library pulls in scikit-learn, numba and scipy).
COMMANDS = {
    "synth": ("synth", "synth", "Render the demo scenario: hex nuts on a conveyor belt, split into train/ and test/."),
    "harvest": ("harvest", "harvest", "Cut object patches (with augmented copies) and background patches into a patch bank."),
    "train": ("train", "train", "Grow a forest of shallow trees on a patch bank; optional mining rounds."),
    "scan": ("scan", "scan", "Find objects in image files and folders with a model: multi-scale, early exit, NMS."),
    "score": ("score", "score", "Score detections against labels: PR curve, AP, miss rate, an HTML report."),
    "tune": ("tune", "tune", "Search the training settings by cross-validation, scored by held-out detection AP."),
    "audit": ("audit", "audit", "List labels the forest finds suspicious: likely mislabelled or missing boxes."),
    "review": ("review", "review", "Look at detections against labels in the browser and fix the labels in place."),
    "inspect": ("inspect_model", "inspect", "Summarise a model and draw where its features look."),
    "demo": ("demo", "demo", "Run the whole workflow on the demo scenario, ending in a report."),
}


#: Every command answers ``-h`` as well as ``--help``.
CONTEXT = {"help_option_names": ["-h", "--help"]}


def _version(value: bool) -> None:
    if value:
        from importlib.metadata import version

        typer.echo(f"patchwood {version('patchwood')}")
        raise typer.Exit()


#: Commands whose arguments are really optional. (``audit``'s are not: it needs IMAGES_DIR and
#: LABELS unless it is given ``--bank``, which its help says.)
OPTIONAL_ARGUMENTS: set = set()


def _plain_argument(param, optional: bool = False) -> None:
    """Show an argument as its upper-case name (``IMAGES_DIR``, ``PATHS...``) in the usage line,
    as errors name it, without Typer's braces; in brackets only where it is optional."""
    name = param.metavar or param.name.upper()
    param.metavar = name
    text = name + ("..." if param.nargs == -1 else "")
    param.get_usage_pieces = lambda *args, **kwargs: [f"[{text}]" if optional else text]


class LazyCommands(typer.core.TyperGroup):
    """A command group that imports a command's module only when that command is used."""

    def list_commands(self, ctx):
        return list(COMMANDS) + [n for n in super().list_commands(ctx) if n not in COMMANDS]

    def get_command(self, ctx, name):
        if name in self.commands or name not in COMMANDS:
            return super().get_command(ctx, name)
        import importlib

        module, function = COMMANDS[name][:2]
        single = typer.Typer(add_completion=False, pretty_exceptions_enable=False,
                             rich_markup_mode=None)
        single.command(name, context_settings=CONTEXT)(
            getattr(importlib.import_module(f"cli.{module}"), function))
        command = typer.main.get_command(single)
        for param in command.params:
            if param.param_type_name == "argument":
                _plain_argument(param, optional=name in OPTIONAL_ARGUMENTS)
        self.commands[name] = command
        return command

    def format_commands(self, ctx, formatter):
        rows = [(name, COMMANDS[name][2]) for name in COMMANDS]
        rows += [(name, self.commands[name].get_short_help_str(70))
                 for name in self.list_commands(ctx) if name not in COMMANDS]
        with formatter.section("Commands"):
            formatter.write_dl(rows)


app = typer.Typer(
    name="patchwood",
    cls=LazyCommands,
    help=(
        "Train fast single-class object detectors on the CPU, scan folders of images with them, "
        "and score what they find. Start with `patchwood demo`."
    ),
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
    context_settings=CONTEXT,
)


@app.callback()
def _group(
    version: bool = typer.Option(False, "--version", callback=_version, is_eager=True,
                                 help="Print patchwood's version and exit."),
) -> None:
    """Train fast single-class object detectors on the CPU, scan folders of images with them, and
    score what they find. Start with `patchwood demo`."""


#: Options renamed so that one word has one meaning across the commands: (command, old) -> new.
RENAMED = {
    ("synth", "--images"): "--frames", ("synth", "--train-images"): "--train-frames",
    ("synth", "--test-images"): "--test-frames", ("demo", "--images"): "--frames",
    ("score", "--report"): "--out", ("train", "--threshold"): "--mine-threshold",
    ("inspect", "--top"): "--top-features",
}


def renamed_hint(command_path: str, message: str) -> str | None:
    """The usage error for an option that was renamed, naming the new word; None otherwise.

    >>> renamed_hint("patchwood score", "No such option: --report")
    'score --report is now --out'
    >>> renamed_hint("patchwood scan", "No such option: --report") is None
    True
    """
    prefix = "No such option: "
    if not message.startswith(prefix):
        return None
    old = message[len(prefix):].split()[0].split("=")[0]
    new = RENAMED.get((command_path.split()[-1], old))
    return None if new is None else f"{command_path.split()[-1]} {old} is now {new}"


# Typer ships its own copy of click; reach its exception classes through Typer's public names.
_UsageError = typer.BadParameter.__bases__[0]
_ClickError = _UsageError.__bases__[0]


def run() -> None:
    """Console entry point: one-line errors for bad input, never a traceback."""
    try:
        code = app(standalone_mode=False, prog_name="patchwood")
    except _UsageError as err:
        if type(err).__name__ == "NoArgsIsHelpError":  # bare `patchwood`: show the help
            typer.echo(err.format_message())
            sys.exit(0)
        where = err.ctx.command_path if err.ctx is not None else "patchwood"
        message = renamed_hint(where, err.format_message()) or err.format_message()
        typer.echo(f"error: {message} (see '{where} --help')", err=True)
        sys.exit(2)
    except _ClickError as err:
        typer.echo(f"error: {err.format_message()}", err=True)
        sys.exit(err.exit_code or 1)
    except typer.Abort:
        typer.echo("aborted", err=True)
        sys.exit(1)
    except InputError as err:
        typer.echo(display_name(f"error: {err}"), err=True)
        sys.exit(1)
    except KeyboardInterrupt:
        typer.echo("interrupted", err=True)
        sys.exit(130)
    except OSError as err:
        # file-system trouble the library did not turn into an InputError: still one line, and
        # naming the file whenever the error knows it
        where = f"{err.filename}: " if err.filename else ""
        reason = " ".join(str(err.strerror or err).split())
        typer.echo(display_name(f"error: {where}{reason}"), err=True)
        sys.exit(1)
    sys.exit(code if isinstance(code, int) else 0)


if __name__ == "__main__":
    run()
