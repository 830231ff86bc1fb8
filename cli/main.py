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
    from cli import audit, demo, harvest, inspect_model, scan, score, synth, train, tune

    app.command("synth")(synth.synth)
    app.command("harvest")(harvest.harvest)
    app.command("train")(train.train)
    app.command("scan")(scan.scan)
    app.command("score")(score.score)
    app.command("tune")(tune.tune)
    app.command("audit")(audit.audit)
    app.command("inspect")(inspect_model.inspect)
    app.command("demo")(demo.demo)


_register()


# Typer ships its own copy of click; reach its exception classes through Typer's public names.
_UsageError = typer.BadParameter.__bases__[0]
_ClickError = _UsageError.__bases__[0]


def run() -> None:
    """Console entry point: one-line errors for bad input, never a traceback."""
    try:
        code = app(standalone_mode=False)
    except _UsageError as err:
        if type(err).__name__ == "NoArgsIsHelpError":  # bare `patchwood`: show the help
            typer.echo(err.format_message())
            sys.exit(0)
        where = err.ctx.command_path if err.ctx is not None else "patchwood"
        typer.echo(f"error: {err.format_message()} (see '{where} --help')", err=True)
        sys.exit(2)
    except _ClickError as err:
        typer.echo(f"error: {err.format_message()}", err=True)
        sys.exit(err.exit_code or 1)
    except typer.Abort:
        typer.echo("aborted", err=True)
        sys.exit(1)
    except InputError as err:
        typer.echo(f"error: {err}", err=True)
        sys.exit(1)
    except KeyboardInterrupt:
        typer.echo("interrupted", err=True)
        sys.exit(130)
    except OSError as err:
        # file-system trouble the library did not turn into an InputError: still one line
        typer.echo(f"error: {err.filename or ''}: {err.strerror or err}", err=True)
        sys.exit(1)
    sys.exit(code if isinstance(code, int) else 0)


if __name__ == "__main__":
    run()
