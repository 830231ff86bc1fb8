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


# ------------------------------------------------------------------ options that contradict

CONFLICTS = [
    (["scan", "m.npz", "imgs", "--out", "d.csv", "--threshold", "0.4",
      "--threshold-from", "summary.json"],
     "--threshold and --threshold-from cannot go together"),
    (["scan", "m.npz", "imgs", "--out", "d.csv", "--resume", "--force"],
     "--resume and --force cannot go together"),
    (["scan", "m.npz", "imgs", "--out", "d.csv", "--jobs", "2", "--cluster", "tcp://h:8786"],
     "--jobs and --cluster cannot go together"),
    (["scan", "m.npz", "imgs", "--out", "d.csv", "--no-early-exit", "--exit-level", "0.5"],
     "--exit-level chooses early exits; it has no effect with --no-early-exit"),
    (["scan", "m.npz", "imgs", "--out", "d.json", "--format", "coco", "--resume"],
     "--resume continues CSV output only"),
    (["train", "bank.npz", "--out", "m.npz", "--mine-rounds", "0", "--mine-images", "imgs",
      "--mine-labels", "l.csv"],
     "--mine-images, --mine-labels only shape mining rounds; leave out --mine-rounds 0"),
    (["train", "bank.npz", "--out", "m.npz", "--mine-rounds", "0", "--threshold", "0.3"],
     "--threshold only shapes mining rounds"),
    (["train", "bank.npz", "--out", "m.npz", "--mine-images", "imgs"],
     "--mine-images and --mine-labels go together"),
    (["train", "bank.npz", "--out", "m.npz", "--mine-rounds", "0", "--mine-per-image", "5"],
     "--mine-per-image only shapes mining rounds"),
    (["train", "bank.npz", "--out", "m.npz", "--pool", "100", "--features-per-node", "200"],
     "--features-per-node 200 is larger than --pool 100"),
    (["audit", "imgs", "labels.csv", "--pool", "100", "--features-per-node", "200"],
     "--features-per-node 200 is larger than --pool 100"),
    (["harvest", "imgs", "labels.csv", "--out", "b.npz", "--copies", "0", "--rotate", "30",
      "--no-mirror", "--jitter", "0.1"],  # --no-mirror asks for nothing: not named
     "--jitter, --rotate only shape the augmented copies, and --copies 0 makes none"),
    (["synth", "out", "--images", "50", "--train-images", "30", "--test-images", "10"],
     "--images is split into train/ and test/, but --train-images and --test-images set both"),
]


def test_options_that_would_override_each_other_are_usage_errors(tmp_path, monkeypatch, capsys):
    """Every pair of options where one would silently override or void the other stops with one
    line and exit status 2 (a usage error) before anything is read or written (issue 16)."""
    import pytest

    import cli.main

    monkeypatch.chdir(tmp_path)
    for args, message in CONFLICTS:
        monkeypatch.setattr(sys, "argv", ["patchwood", *args])
        with pytest.raises(SystemExit) as stop:
            cli.main.run()
        err = capsys.readouterr().err
        assert stop.value.code == 2, (args, err)
        assert err.count("\n") == 1 and err.startswith("error: ") and message in err, (args, err)
        assert f"(see 'patchwood {args[0]} --help')" in err
    assert list(tmp_path.iterdir()) == []  # nothing written


def test_one_option_of_a_refused_pair_is_accepted(tmp_path):
    """The refusal is about the pair: --train-images with --test-images, or --images alone,
    render as asked."""
    runner = CliRunner()
    both = runner.invoke(app, ["synth", str(tmp_path / "a"), "--train-images", "3",
                               "--test-images", "2"])
    assert both.exit_code == 0, both.output
    assert len(list((tmp_path / "a" / "train" / "images").glob("*.png"))) == 3
    alone = runner.invoke(app, ["synth", str(tmp_path / "b"), "--images", "5"])
    assert alone.exit_code == 0, alone.output
    assert len(list((tmp_path / "b" / "test" / "images").glob("*.png"))) == 1  # 20 % of 5
