"""The `patchwood` command: thin Typer commands that parse, call the library and print.

Each command lives in its own module under ``cli/`` and is registered here. Library errors of
type :class:`detector.errors.InputError` become one line on stderr and exit status 1; usage errors
(bad options) are Typer's, exit status 2.
"""

from __future__ import annotations

import sys

import typer

from detector.errors import InputError

app = typer.Typer(
    name="patchwood",
    help=(
        "Train fast single-class object detectors on the CPU, scan folders of images with them, "
        "and score what they find. Start with `patchwood demo`."
    ),
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
)


def _register() -> None:
    from cli import synth, demo

    app.command("synth")(synth.synth)
    app.command("demo")(demo.demo)


_register()


def run() -> None:
    """Console entry point: one-line errors for bad input, never a traceback."""
    try:
        app(standalone_mode=True)
    except InputError as err:
        typer.echo(f"error: {err}", err=True)
        sys.exit(1)
    except KeyboardInterrupt:
        typer.echo("interrupted", err=True)
        sys.exit(130)


if __name__ == "__main__":
    run()
