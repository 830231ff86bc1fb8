"""`patchwood train` end to end on a tiny demo scenario (12 training frames, 4 mining frames).

Outside references: the mining figures are recounted with ``detector.evaluation.evaluate`` (COCO-style
matching at IoU 0.5, held equal to pycocotools in tests/test_evaluate.py) on detections made by
``detector.scan.Engine`` with the first-round model; SHA-256 (FIPS 180-4) via ``hashlib`` for the
bank hash; ``SOURCE_DATE_EPOCH`` (reproducible-builds.org) for byte-identical model files. The model
itself is compared with the library route (``detector.training.train_model``) on the same bank.
"""

import hashlib
import os
import re
import sys

import numpy as np
import pytest
from typer.testing import CliRunner

import cli.main
from cli.common import human_path
from detector.evaluation import evaluate
from detector.harvest import KIND_MINED, load_bank
from detector.io.images import read_gray
from detector.io.labels import read_labels
from detector.model import load_model
from detector.scan import Engine, ScanSettings
from detector.cascade import EXIT_BUDGET
from detector.training import DEFAULT_TRAIN, train_model
from synthetic_images import render_scenario

GROW = ["--trees", "10", "--pool", "500", "--mode", "bagged"]
TRAIN = [*GROW, "--mine-rounds", "0", "--mode", "bagged"]  # tests that are not about mining


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    root = tmp_path_factory.mktemp("train_cli")
    render_scenario(root / "scenario", train_images=12, test_images=4, seed=0)
    train = root / "scenario" / "train"
    bank = root / "bank.npz"
    result = CliRunner().invoke(cli.main.app, ["harvest", str(train / "images"), str(train / "labels.csv"),
                                               "--out", str(bank), "--seed", "0"])
    assert result.exit_code == 0, result.output
    return root


@pytest.fixture
def cli_env(monkeypatch, capsys):
    """Runs `patchwood ARGS` in this process through the console entry point, with a fixed
    SOURCE_DATE_EPOCH; returns (exit code, stdout, stderr)."""
    monkeypatch.setenv("SOURCE_DATE_EPOCH", "86400")  # 1970-01-02

    def run(*args):
        monkeypatch.setattr(sys, "argv", ["patchwood", *map(str, args)])
        with pytest.raises(SystemExit) as stop:
            cli.main.run()
        captured = capsys.readouterr()
        return stop.value.code, captured.out, captured.err

    return run


def test_train_writes_model_and_prints_summary(scenario, cli_env, tmp_path):
    bank, out = scenario / "bank.npz", tmp_path / "model.npz"
    code, text, err = cli_env("train", bank, "--out", out, *TRAIN, "--seed", 3)
    assert code == 0, err
    model = load_model(out)
    assert model.window == load_bank(bank).window and model.n_trees == 10 and model.depth == 2
    assert model.mode == "bagged"
    # the printed summary is the model's own, line for line, and it names window, trees, OOB error
    for line in model.summary():
        assert line in text.splitlines()
    assert "window: {} x {} pixels (width x height)".format(*model.window) in text
    assert "trees: 10 of depth 2, random forest (bagged)" in text
    oob = re.search(r"^out-of-bag error: (\d+\.\d\d) %$", text, re.M)
    assert oob and float(oob.group(1)) == round(100 * model.metadata["oob_error"], 2)
    assert text.splitlines()[-1] == f"wrote {human_path(out)}"
    assert "growing trees: 10/10 trees" in err  # the progress bar's closing line off a terminal
    # the bank's hash (hashlib), its margin and object sizes, and the fixed date
    assert model.metadata["bank"]["sha256"] == hashlib.sha256(bank.read_bytes()).hexdigest()
    assert model.margin == load_bank(bank).margin == 0.1
    sizes = load_bank(bank).metadata["object_sizes"]  # the labelled sizes: the scan's default range
    assert model.object_range.tolist() == [sizes["smallest"], sizes["largest"]]
    assert model.object_sizes["window_object_side"] == sizes["window_object_side"]
    assert model.metadata["date"] == "1970-01-02"
    # the command trains what the library trains with the same parameters
    # (features per node: the default 1000 capped at the pool of 500, so every pool feature)
    params = dict(n_trees=10, depth=2, mode="bagged", pool=500, features_per_node=500,
                  sample_fraction=1.0, weight_trim=DEFAULT_TRAIN["weight_trim"], exit_budget=EXIT_BUDGET,
                  normalize=True, random_state=3, n_jobs=1, channels=DEFAULT_TRAIN["channels"])
    lib, _ = train_model(load_bank(bank), params, bank_path=bank)
    for name in ("features", "node_features", "node_thresholds", "leaf_values", "exit_thresholds"):
        np.testing.assert_array_equal(getattr(model, name), getattr(lib, name))
    # and it has learned something: objects score above background on the training bank
    b = load_bank(bank)
    scores = model.score(b.patches)
    assert scores[b.labels == 1].mean() > scores[b.labels == 0].mean() + 0.3


def test_train_options_reach_the_model(scenario, cli_env, tmp_path):
    out = tmp_path / "boosted.npz"
    code, text, err = cli_env("train", scenario / "bank.npz", "--out", out, "--trees", 6, "--pool", 300,
                              "--depth", 3, "--mode", "boosted", "--features-per-node", 40,
                              "--sample-fraction", 0.5, "--exit-budget", 0.1, "--no-normalize",
                              "--weight-trim", 0.2)
    assert code == 0, err
    model = load_model(out)
    assert (model.n_trees, model.depth, model.mode, model.normalize) == (6, 3, "boosted", False)
    assert "trees: 6 of depth 3, Gentle AdaBoost (boosted)" in text
    p = model.metadata["parameters"]
    assert (p["pool"], p["features_per_node"], p["sample_fraction"], p["exit_budget"],
            p["weight_trim"]) == (300, 40, 0.5, 0.1, 0.2)
    # weight trimming is a boosting option: with bagged trees it is one line, not a silent no-op
    code, _, err = cli_env("train", scenario / "bank.npz", "--out", tmp_path / "bagged.npz",
                           "--mode", "bagged", "--weight-trim", 0.1)
    assert code == 2 and "--weight-trim 0.1 trims boosting weights" in err
    assert not (tmp_path / "bagged.npz").exists()
    # the option's old name, recall kept rather than budget given up, says what to write instead
    code, _, err = cli_env("train", scenario / "bank.npz", "--out", tmp_path / "old.npz",
                           "--exit-recall", 0.995)
    assert code == 2 and "--exit-recall is now --exit-budget" in err
    assert "--exit-recall 0.995 is --exit-budget 0.005" in err and "Traceback" not in err
    assert not (tmp_path / "old.npz").exists()


def test_bank_and_model_record_the_library_versions_that_made_them(scenario, cli_env, tmp_path):
    """Byte-identical retraining holds for one set of library versions (the lock file's), so the
    bank and the model say which: the versions importlib.metadata reports for this environment."""
    import importlib.metadata as md

    out = tmp_path / "model.npz"
    code, _, err = cli_env("train", scenario / "bank.npz", "--out", out, *TRAIN)
    assert code == 0, err
    for metadata in (load_bank(scenario / "bank.npz").metadata, load_model(out).metadata):
        versions = metadata["versions"]
        for name in ("numpy", "scikit-learn", "scikit-image", "opencv-python-headless", "numba"):
            assert versions[name] == md.version(name), name
        assert versions["patchwood"] == md.version("patchwood")


def test_same_seed_same_bytes_and_existing_output_refused(scenario, cli_env, tmp_path):
    bank = scenario / "bank.npz"
    one, two, other = tmp_path / "one.npz", tmp_path / "two.npz", tmp_path / "other.npz"
    for path, seed in ((one, 0), (two, 0), (other, 1)):
        code, _, err = cli_env("train", bank, "--out", path, *TRAIN, "--seed", seed)
        assert code == 0, err
    assert one.read_bytes() == two.read_bytes()
    assert one.read_bytes() != other.read_bytes()
    # an existing model is refused, in one line, and left untouched
    before, stamp = one.read_bytes(), os.stat(one).st_mtime_ns
    code, text, err = cli_env("train", bank, "--out", one, *TRAIN, "--seed", 1)
    assert code == 1 and err == f"error: {one}: model exists; add --force to replace it\n"
    assert one.read_bytes() == before and os.stat(one).st_mtime_ns == stamp
    code, _, _ = cli_env("train", bank, "--out", one, *TRAIN, "--seed", 1, "--force")
    assert code == 0 and one.read_bytes() == other.read_bytes()


def test_mining_round(scenario, cli_env, tmp_path):
    test = scenario / "scenario" / "test"
    bank, out, mined = scenario / "bank.npz", tmp_path / "mined.npz", tmp_path / "bank_mined.npz"
    code, text, err = cli_env("train", bank, "--out", out, *GROW, "--mine-rounds", 1,
                              "--mine-images", test / "images", "--mine-labels", test / "labels.csv",
                              "--save-bank", mined)
    assert code == 0, err
    lines = re.findall(r"^mining images, (first model|after round 1): (\d+\.\d\d) false alarms per "
                       r"image, recall (\d\.\d{3}|nan) at score 0\.5(?:; adding (\d+) false alarms as "
                       r"background)?$", text, re.M)
    assert [w for w, *_ in lines] == ["first model", "after round 1"]
    history = load_model(out).metadata["mining"]
    assert [h["round"] for h in history] == [0, 1]
    for (_, fa, recall, _), h in zip(lines, history):
        assert float(fa) == round(h["false_alarms_per_image"], 2)
        assert float(recall) == round(h["recall"], 3)
    added = int(lines[0][3])
    assert added == history[0]["added"] > 0 and history[1]["added"] == 0
    # the bank written beside the model holds exactly the mined patches, labelled background
    b = load_bank(mined)
    assert np.sum(b.kinds == KIND_MINED) == added and (b.labels[b.kinds == KIND_MINED] == 0).all()
    assert np.array_equal(b.patches[: len(load_bank(bank))], load_bank(bank).patches)
    assert {b.images[i] for i in b.image_index[b.kinds == KIND_MINED]} <= {
        it.image for it in read_labels(test / "labels.csv")}
    assert "checking final model: 4/4 images" in err
    assert first_round_recount(bank, test, ScanSettings(threshold=0.5)) == \
        (float(lines[0][1]), float(lines[0][2]))
    # the final model's check scans with the exits for its threshold (--exit-level 0.5), and
    # its figures are what such a scan of the written model gives, matched by detector.evaluation
    assert recount(load_model(out), test, ScanSettings(threshold=0.5, exit_level=0.5)) == \
        (float(lines[1][1]), float(lines[1][2]))


def recount(model, test, settings):
    """False alarms per image and recall of ``model`` scanned with ``settings`` on the test
    frames, matched with detector.evaluation (IoU 0.5), rounded as train prints them; boxes as
    the windows scored them, as mining counts them (no box voting)."""
    engine = Engine(model, ScanSettings(**{**settings.__dict__, "box_voting": None}))
    items = read_labels(test / "labels.csv", images_dir=test / "images").items
    dets = {}
    for it in items:
        found = engine.scan(read_gray(test / "images" / it.image))
        dets[it.image] = (found.boxes, found.scores)
    ev = evaluate(dets, {it.image: it.boxes for it in items})
    return round(ev.false_alarms / ev.images, 2), round(ev.true_detections / ev.objects, 3)


def first_round_recount(bank, test, settings, trees=10):
    """The first mining round's false alarms per image and recall, counted again: the first model
    is the plain model with the same seed; scan the mining frames with the loosest exits (as
    mining scans) and match with detector.evaluation (IoU 0.5)."""
    # (a model that only mines tries the square root of its pool at every node: None)
    first, _ = train_model(load_bank(bank), dict(n_trees=trees, depth=2, mode="bagged", pool=500,
                                                 features_per_node=None, sample_fraction=1.0,
                                                 exit_budget=EXIT_BUDGET, normalize=True, random_state=0,
                                                 n_jobs=1, channels=DEFAULT_TRAIN["channels"]),
                         bank_path=bank)
    return recount(first, test, settings)


def test_mining_scans_with_the_overhang_asked_for(scenario, cli_env, tmp_path):
    test = scenario / "scenario" / "test"
    bank = scenario / "bank.npz"
    counts = {}
    for overhang in (0.0, 0.5):
        code, text, err = cli_env("train", bank, "--out", tmp_path / f"m{overhang}.npz", *GROW,
                                  "--mine-rounds", 1, "--mine-images", test / "images",
                                  "--mine-labels", test / "labels.csv", "--mine-overhang", overhang)
        assert code == 0, err
        fa, recall = re.search(r"^mining images, first model: (\d+\.\d\d) false alarms per image, "
                               r"recall (\d\.\d{3}|nan)", text, re.M).groups()
        counts[overhang] = (float(fa), float(recall))
        assert first_round_recount(bank, test, ScanSettings(threshold=0.5, overhang=overhang)) == \
            counts[overhang]
    assert counts[0.0] != counts[0.5]  # the windows past the edges change what mining finds


def test_mining_is_on_by_default_on_the_images_the_bank_came_from(scenario, cli_env, tmp_path):
    """Without mining options, train mines the training images the harvest recorded: the mining
    history counts false alarms on exactly those images (recounted with detector.evaluation on the
    first model's scan, as in test_mining_round), and the models before the last grow a quarter
    of the trees (at least 10)."""
    from detector.training import DEFAULT_MINE_ROUNDS

    bank, out = scenario / "bank.npz", tmp_path / "model.npz"
    train = scenario / "scenario" / "train"
    assert load_bank(bank).metadata["source"] == {"images": str(train / "images"),
                                                  "labels": str(train / "labels.csv")}
    code, text, err = cli_env("train", bank, "--out", out, "--trees", 40, "--pool", 500,
                              "--mode", "bagged")
    assert code == 0, err
    history = load_model(out).metadata["mining"]
    assert [h["round"] for h in history] == list(range(DEFAULT_MINE_ROUNDS + 1))
    assert f"growing trees (round 0): 10/10 trees" in err  # 40 / 4 trees for the mining models
    assert f"growing trees (round {DEFAULT_MINE_ROUNDS}): 40/40 trees" in err
    first = history[0]
    fa, recall = first_round_recount(bank, train, ScanSettings(threshold=0.5, overhang=0.25),
                                     trees=10)
    assert (round(first["false_alarms_per_image"], 2), round(first["recall"], 3)) == (fa, recall)


def test_mining_by_default_needs_the_recorded_images(scenario, cli_env, tmp_path):
    """A bank whose images folder has gone: one line naming the bank and the folder, exit 1;
    --mine-rounds 0 trains without mining."""
    import shutil

    moved = tmp_path / "copy"
    shutil.copytree(scenario / "scenario" / "train", moved)
    bank, out = tmp_path / "bank.npz", tmp_path / "model.npz"
    code, _, err = cli_env("harvest", moved / "images", moved / "labels.csv", "--out", bank)
    assert code == 0, err
    shutil.rmtree(moved / "images")
    code, _, err = cli_env("train", bank, "--out", out, *GROW)
    assert code == 1 and err.count("\n") == 1 and not out.exists()
    assert err.startswith(f"error: {bank}: the images folder this bank was harvested from is gone "
                          f"({moved / 'images'})")
    assert cli_env("train", bank, "--out", out, *GROW, "--mine-rounds", 0)[0] == 0


def test_train_usage_and_input_errors(scenario, cli_env, tmp_path):
    bank, out = scenario / "bank.npz", tmp_path / "model.npz"
    test = scenario / "scenario" / "test"
    # mining images without their labels (or the reverse) is a usage error (exit 2), checked
    # before the output file
    out.write_bytes(b"keep me")
    for extra in (["--mine-labels", test / "labels.csv"], ["--mine-images", test / "images"]):
        code, _, err = cli_env("train", bank, "--out", out, "--mine-rounds", 1, *extra)
        assert code == 2 and err.count("\n") == 1
        assert "--mine-images and --mine-labels go together" in err
    code, _, err = cli_env("train", bank, "--out", out, "--mode", "stacked")
    assert code == 2 and "'stacked' is not one of 'boosted', 'bagged'" in err
    assert out.read_bytes() == b"keep me"
    out.unlink()
    # input errors: one line naming the file, exit 1, no model written
    code, _, err = cli_env("train", tmp_path / "nothing.npz", "--out", out)
    assert (code, err) == (1, f"error: {tmp_path / 'nothing.npz'}: no such patch bank file\n")
    model = tmp_path / "a_model.npz"
    assert cli_env("train", bank, "--out", model, "--trees", 2, "--pool", 100)[0] == 0
    code, _, err = cli_env("train", model, "--out", out)
    assert (code, err) == (1, f"error: {model}: not a patch bank (this file holds a model)\n")
    # a bank with no background patches (harvested with none asked for) names the bank
    train = scenario / "scenario" / "train"
    only = tmp_path / "objects_only.npz"
    code, text, _ = cli_env("harvest", train / "images", train / "labels.csv", "--out", only,
                            "--negatives-per-image", 0, "--near-negatives", 0, "--copies", 0)
    assert code == 0 and "note: no background patches were cut" in text
    code, _, err = cli_env("train", only, "--out", out, *TRAIN)
    assert code == 1 and err.startswith(f"error: {only}: the bank holds no background patches")
    assert err.count("\n") == 1
    assert not out.exists()


def small_mining_model(scenario):
    """``(test folder, a 10-tree model of the scenario's bank, the test split's labels)``."""
    test = scenario / "scenario" / "test"
    model, _ = train_model(load_bank(scenario / "bank.npz"),
                           dict(n_trees=10, depth=2, mode="bagged", pool=500, random_state=0,
                                channels=DEFAULT_TRAIN["channels"]))
    return test, model, read_labels(test / "labels.csv", images_dir=test / "images").items


def test_mining_on_two_threads_finds_what_one_finds(scenario):
    """`train --jobs 2` scans the mining images two at a time: the same patches, boxes, scores
    and counts, in the same order, as one at a time."""
    from detector.training import mine

    test, model, items = small_mining_model(scenario)
    one = mine(model, test / "images", items, n_jobs=1)
    two = mine(model, test / "images", items, n_jobs=2)
    assert len(one.patches) > 0 and one.images == two.images
    np.testing.assert_array_equal(one.patches, two.patches)
    np.testing.assert_array_equal(one.boxes, two.boxes)
    np.testing.assert_array_equal(one.scores, two.scores)
    assert (one.false_alarms_per_image, one.recall) == (two.false_alarms_per_image, two.recall)


def test_mining_rounds_read_each_image_once(scenario, monkeypatch):
    """Two rounds through one FrameCache: the second reads no image file, both find what a
    round without the cache finds, and the kept images are the pixels read_gray gives (a scan
    does not write into them)."""
    from detector.io.images import read_gray
    from detector.training import _mining
    from detector.training._mining import FrameCache, mine

    test, model, items = small_mining_model(scenario)
    plain = mine(model, test / "images", items, n_jobs=2)
    reads = []
    monkeypatch.setattr(_mining, "read_gray", lambda path: reads.append(path) or read_gray(path))
    cache = FrameCache()
    first = mine(model, test / "images", items, n_jobs=2, frames=cache)
    assert len(reads) == len(items) == len(cache.kept)
    second = mine(model, test / "images", items, n_jobs=2, frames=cache, count_only=True)
    assert len(reads) == len(items)
    again = mine(model, test / "images", items, n_jobs=2, frames=cache)
    assert len(reads) == len(items)
    for found in (first, again):
        assert found.images == plain.images and len(found.patches) > 0
        np.testing.assert_array_equal(found.patches, plain.patches)
        np.testing.assert_array_equal(found.scores, plain.scores)
    assert second.recall == mine(model, test / "images", items, count_only=True).recall
    for path, gray in cache.kept.items():
        np.testing.assert_array_equal(gray, read_gray(path))
    # a cache too small for one image keeps none and reads every time
    reads.clear()
    small = FrameCache(limit=100)
    mine(model, test / "images", items[:3], frames=small)
    mine(model, test / "images", items[:3], frames=small)
    assert small.kept == {} and len(reads) == 6


def test_mining_stops_after_a_round_that_adds_little(scenario, cli_env, tmp_path, monkeypatch):
    """A round whose false alarms add less than MINING_STOP_SHARE of the bank's background ends
    mining: its patches are added and the next model is the final one (the plain fit on that
    bank). With the share at 0 every round runs; at 1 the first round is the last; in between,
    the stop follows the count."""
    from detector.training import _train, mining_params, train_with_mining

    test = scenario / "scenario" / "test"
    params = dict(n_trees=12, depth=2, mode="boosted", pool=800, random_state=0,
                  channels=DEFAULT_TRAIN["channels"])
    items = read_labels(test / "labels.csv", images_dir=test / "images").items
    bank = load_bank(scenario / "bank.npz")
    background = bank.counts()["background"]
    runs = {}
    for share in (0.0, 1.0):
        monkeypatch.setattr(_train, "MINING_STOP_SHARE", share)
        calls = []
        model, _, final = train_with_mining(
            bank, params, rounds=3, images_dir=test / "images", items=items,
            settings=ScanSettings(threshold=0.5), mine_params=mining_params(params),
            report=lambda r, found, counts: calls.append((r, found.last, found.counted_only,
                                                         len(found.patches), counts)))
        runs[share] = (model, final, calls)
    model, final, calls = runs[0.0]
    assert [(r, last, only) for r, last, only, *_ in calls] == [
        (0, False, False), (1, False, False), (2, False, False), (3, False, True)]
    assert [h["round"] for h in model.metadata["mining"]] == [0, 1, 2, 3]
    model, final, calls = runs[1.0]
    assert [(r, last, only) for r, last, only, *_ in calls] == [(0, True, False), (1, False, True)]
    added = calls[0][3]
    assert added > 0 and calls[0][4]["background"] == background
    assert len(final) == len(bank) + added
    assert [(h["round"], h["added"]) for h in model.metadata["mining"]] == [(0, added), (1, 0)]
    plain, _ = train_model(final, params)
    for name in ("features", "node_features", "node_thresholds", "leaf_values", "exit_thresholds"):
        np.testing.assert_array_equal(getattr(model, name), getattr(plain, name))
    # between: the first round adds `added` patches; a share just above added / background stops
    # there, one just below does not
    for share, stops in ((added / background * 1.01, True), (added / background * 0.99, False)):
        monkeypatch.setattr(_train, "MINING_STOP_SHARE", share)
        calls = []
        train_with_mining(bank, params, rounds=1, images_dir=test / "images", items=items,
                          settings=ScanSettings(threshold=0.5), mine_params=mining_params(params),
                          report=lambda r, found, counts: calls.append(found.last))
        assert calls == [stops, False]
    # the command says so in one line
    monkeypatch.setattr(_train, "MINING_STOP_SHARE", 1.0)
    code, text, err = cli_env("train", scenario / "bank.npz", "--out", tmp_path / "m.npz", *GROW,
                              "--mine-rounds", 2, "--mine-images", test / "images",
                              "--mine-labels", test / "labels.csv")
    assert code == 0, err
    n = int(re.search(r"^mining images, first model: .*; adding (\d+) false alarms as background$",
                      text, re.M).group(1))
    assert (f"mining stops after round 1 of 2: its {n} false alarms add "
            f"{100 * n / background:.1f} % to the {background} background patches (another round "
            f"needs 100 %)") in text.splitlines()
    assert "mining images, after round 1: " in text and "after round 2" not in text
    assert [h["round"] for h in load_model(tmp_path / "m.npz").metadata["mining"]] == [0, 1]


def test_the_final_model_is_the_plain_fit_on_the_final_bank(scenario):
    """The models that only mine share one pool (BinnedPool); the final one must be exactly what
    a fit on the final bank gives (its bins cut on that bank), array for array."""
    from detector.training import mining_params, train_with_mining

    test = scenario / "scenario" / "test"
    params = dict(n_trees=12, depth=2, mode="boosted", pool=800, random_state=0,
                  channels=DEFAULT_TRAIN["channels"])
    items = read_labels(test / "labels.csv", images_dir=test / "images").items
    bank = load_bank(scenario / "bank.npz")
    model, _, final = train_with_mining(bank, params, rounds=2, images_dir=test / "images",
                                        items=items, settings=ScanSettings(threshold=0.5),
                                        mine_params=mining_params(params))
    assert len(final) > len(bank)   # the rounds mined something
    plain, _ = train_model(final, params)
    for name in ("features", "feature_channels", "node_features", "node_thresholds",
                 "leaf_values", "exit_thresholds"):
        np.testing.assert_array_equal(getattr(model, name), getattr(plain, name))
