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
    (["train", "bank.npz", "--out", "m.npz", "--mine-rounds", "0", "--mine-threshold", "0.3"],
     "--mine-threshold only shapes mining rounds"),
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
    (["synth", "out", "--frames", "50", "--train-frames", "30", "--test-frames", "10"],
     "--frames is split into train/ and test/, but --train-frames and --test-frames set both"),
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
    """The refusal is about the pair: --train-frames with --test-frames, or --frames alone,
    render as asked."""
    runner = CliRunner()
    both = runner.invoke(app, ["synth", str(tmp_path / "a"), "--train-frames", "3",
                               "--test-frames", "2"])
    assert both.exit_code == 0, both.output
    assert len(list((tmp_path / "a" / "train" / "images").glob("*.png"))) == 3
    alone = runner.invoke(app, ["synth", str(tmp_path / "b"), "--frames", "5"])
    assert alone.exit_code == 0, alone.output
    assert len(list((tmp_path / "b" / "test" / "images").glob("*.png"))) == 1  # 20 % of 5


# ------------------------------------------------------------------ renamed options

def _run_main(argv):
    code = (f"import sys; sys.argv = {['patchwood'] + argv!r}\nimport cli.main\ncli.main.run()")
    return subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)


def test_renamed_options_name_their_new_word():
    """An option renamed so that one word has one meaning (``cli.main.RENAMED``) is a one-line
    usage error that names the new word; the new word is an option of that command."""
    from cli.main import RENAMED

    for (command, old), new in RENAMED.items():
        out = _run_main([command, "x", old, "1"])
        assert out.returncode == 2, (command, old, out.stderr)
        assert out.stderr == (f"error: {command} {old} is now {new} "
                              f"(see 'patchwood {command} --help')\n")
        assert new in CliRunner().invoke(app, [command, "--help"]).output


# ------------------------------------------------------------------ one word, one meaning

#: Options that may differ between commands, and why:
#: - ``--out``: where each command writes (a bank file, a model file, a detections file, a
#:   folder), so each has its own default (or none);
#: - tune's search options take a value or a range LOW..HIGH to search (``--trees 20..300``,
#:   ``--mode bagged,boosted``), so their defaults are ranges; a single value means what it means
#:   to ``train``.
DIFFERENT_BY_DESIGN = {("--out", None)} | {
    (option, "tune") for option in ("--trees", "--depth", "--mode", "--pool",
                                    "--features-per-node", "--sample-fraction")}


def _options():
    """{option: [(command, default, min, max, is_flag), ...]} over every command."""
    import typer

    group = typer.main.get_command(app)
    ctx = typer.Context(group)
    found = {}
    for name in COMMANDS:
        command = group.get_command(ctx, name)
        for p in command.params:
            if p.param_type_name != "option" or p.hidden or p.name == "help":
                continue
            for opt in p.opts:
                found.setdefault(opt, []).append((name, p.default, p.min, p.max, p.is_flag))
    return found


def test_an_option_has_one_default_and_one_range_in_every_command():
    """Every option name that several commands take has the same default, range and kind in all
    of them, but for the differences listed (and explained) in DIFFERENT_BY_DESIGN."""
    problems = []
    for option, uses in _options().items():
        kept = [u for u in uses if (option, None) not in DIFFERENT_BY_DESIGN
                and (option, u[0]) not in DIFFERENT_BY_DESIGN]
        if len({repr(u[1:]) for u in kept}) > 1:
            problems.append(f"{option}: " + "; ".join(
                f"{u[0]} default {u[1]!r} range {u[2]}..{u[3]}" for u in kept))
    assert not problems, "\n".join(problems)


def test_the_walk_sees_the_shared_options():
    """The walk above reads real parameters: --jobs is one declaration (cli.common.jobs_option)
    in every command that runs workers, --seed is in every command that draws at random."""
    from cli.common import MAX_JOBS

    found = _options()
    assert {u[0] for u in found["--jobs"]} == {"harvest", "train", "scan", "tune", "audit", "demo"}
    assert {u[1:4] for u in found["--jobs"]} == {(1, 1, MAX_JOBS)}
    assert {"synth", "harvest", "train", "tune", "audit", "demo"} <= {u[0] for u in found["--seed"]}


def test_version_short_help_and_quiet(tmp_path):
    """``patchwood --version`` prints the installed version (importlib.metadata); ``-h`` is
    ``--help`` in every command; ``--quiet`` leaves out the progress lines, not the results."""
    from importlib.metadata import version

    out = _run_main(["--version"])
    assert (out.returncode, out.stdout) == (0, f"patchwood {version('patchwood')}\n")
    for name in COMMANDS:
        short = CliRunner().invoke(app, [name, "-h"])
        assert short.exit_code == 0 and short.output == CliRunner().invoke(app, [name, "--help"]).output
    data = tmp_path / "s"
    assert _run_main(["synth", str(data), "--frames", "3"]).returncode == 0
    args = ["harvest", str(data / "train" / "images"), str(data / "train" / "labels.csv"),
            "--copies", "1"]
    loud = _run_main(args + ["--out", str(tmp_path / "a.npz")])
    quiet = _run_main(args + ["--out", str(tmp_path / "b.npz"), "--quiet"])
    assert loud.returncode == quiet.returncode == 0
    assert "harvesting: " in loud.stderr and quiet.stderr == ""
    assert quiet.stdout == loud.stdout.replace("a.npz", "b.npz")


def test_usage_lines_name_arguments_as_errors_do():
    """IMAGES_DIR in the usage line is IMAGES_DIR in the error, with no braces around it."""
    usage = CliRunner().invoke(app, ["harvest", "-h"]).output.splitlines()[0]
    assert usage == "Usage: patchwood harvest [OPTIONS] IMAGES_DIR LABELS"
    assert "{" not in CliRunner().invoke(app, ["scan", "-h"]).output.splitlines()[0]
    out = _run_main(["harvest"])
    assert out.returncode == 2 and "Missing argument 'IMAGES_DIR'" in out.stderr


def test_harvest_is_strict_where_it_matters(tmp_path):
    """A missing folder says so; swapped arguments get a hint; a missing labelled image stops the
    harvest with a pointer to --skip-missing, which harvests the rest and names what it left out;
    images with no labels row are counted and named in a warning."""
    data = tmp_path / "s"
    assert _run_main(["synth", str(data), "--frames", "6"]).returncode == 0
    images, labels = data / "train" / "images", data / "train" / "labels.csv"
    out = tmp_path / "b.npz"
    gone = _run_main(["harvest", str(tmp_path / "nope"), str(labels), "--out", str(out)])
    assert gone.returncode == 1 and gone.stderr == f"error: {tmp_path / 'nope'}: the images folder does not exist\n"
    swapped = _run_main(["harvest", str(labels), str(images), "--out", str(out)])
    assert swapped.returncode == 1 and "the arguments look swapped" in swapped.stderr
    first = sorted(images.iterdir())[0]
    first.rename(tmp_path / first.name)
    stopped = _run_main(["harvest", str(images), str(labels), "--out", str(out)])
    assert stopped.returncode == 1 and stopped.stderr.count("\n") == 1
    assert f"image file not found: {first}" in stopped.stderr and "--skip-missing" in stopped.stderr
    assert not out.exists()
    (tmp_path / first.name).rename(images / "unlabelled.png")   # in the folder, in no row
    went_on = _run_main(["harvest", str(images), str(labels), "--out", str(out), "--skip-missing",
                         "--quiet"])
    assert went_on.returncode == 0 and out.exists()
    assert went_on.stderr.splitlines() == [
        f"warning: 1 labelled image not in {images}, left out: {first.name}",
        f"warning: 1 image in {images} has no row in {labels} and is not harvested (unlabelled "
        "objects there would go unseen): unlabelled.png"]
    named = {row.split(",")[0] for row in labels.read_text().splitlines()[1:]}
    assert f"labels: {len(named) - 1} images" in went_on.stdout   # less the missing one
