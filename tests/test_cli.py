"""The command group: every listed command loads, help is quick because modules load lazily."""

import subprocess
import sys

from typer.testing import CliRunner

from cli.main import COMMANDS, app


def test_every_listed_command_loads_and_has_help():
    runner = CliRunner()
    for name in COMMANDS:
        result = runner.invoke(app, [name, "--help"])
        assert result.exit_code == 0, (name, result.output)
        assert f"patchwood {name}" in result.output.replace("\n", " ") or "Usage:" in result.output


def test_top_level_help_lists_the_commands_without_loading_the_library():
    code = ("import sys; sys.argv = ['patchwood', '--help']\n"
            "import cli.main\n"
            "try:\n    cli.main.run()\nexcept SystemExit as e:\n    code = e.code\n"
            "print('LOADED' if 'sklearn' in sys.modules or 'numba' in sys.modules else 'LAZY', code)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip().endswith("LAZY 0"), out.stdout
    for name in COMMANDS:
        assert f"  {name} " in out.stdout


def test_unknown_command_is_one_line_exit_2():
    code = ("import sys; sys.argv = ['patchwood', 'nope']\nimport cli.main\ncli.main.run()")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert out.returncode == 2
    assert out.stderr.strip().count("\n") == 0 and "No such command 'nope'" in out.stderr
