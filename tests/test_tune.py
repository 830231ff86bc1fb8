"""`patchwood tune` and the tuning of detector.training on a tiny demo scenario (12 frames of hex
nuts).

References: the objective is checked against the computation it stands for, done here step by
step with the library's parts (train on the fold's patches, scan the held-out frames, score with
detector.evaluation.evaluate, whose all-point AP is held in test_evaluate.py to hand-worked PASCAL VOC
examples and bounded by sklearn.metrics.average_precision_score, and whose matching and 101-point
COCO AP to pycocotools' COCOeval);
fold properties are checked with hypothesis; the printed `patchwood train` line is run through the
CLI and the model it writes is compared with one trained directly.
"""

from __future__ import annotations

import csv
import json
import os
import shlex
import sys

import cv2
import numpy as np
import pytest
import typer
from hypothesis import given, settings, strategies as st
from typer.testing import CliRunner

import cli.main as cli_main
from cli.tune import tune
from detector.classifier import PatchClassifier
from detector.errors import InputError
from detector.evaluation import evaluate
from detector.harvest import harvest, load_bank
from detector.io.images import read_gray
from detector.io.labels import ImageLabels, read_labels
from detector.model import load_model
from detector.scan import Engine, ScanSettings
from detector.training import DEFAULT_TRAIN, train_model
from detector.training import (EVALUATION_THRESHOLD, PARAMETERS, SearchSpace, bank_subset,
                               classifier_params, evaluate_params, image_folds, prepare_folds,
                               search, trials_columns)
from synthetic_images import render_scenario

SEED = 3
FOLDS = 3
HARVEST = dict(copies=2, negatives_per_image=20, rotate=30.0, jitter=0.08, mirror=False)
# a small fixed parameter set (a few tenths of a second per fold)
PARAMS = dict(n_trees=8, depth=2, mode="bagged", pool=300, features_per_node=15,
              sample_fraction=1.0, random_state=0)
TINY = SearchSpace(trees=(4, 10), depth=(1, 2), modes=("bagged", "boosted"), pool=(150, 300),
                   features_per_node=(8, 16), sample_fraction=(0.6, 1.0))
TINY_OPTIONS = ["--trees", "4..10", "--depth", "1..2", "--mode", "bagged,boosted",
                "--pool", "150..300", "--features-per-node", "8..16",
                "--sample-fraction", "0.6..1", "--copies", "2", "--negatives-per-image", "20",
                "--rotate", "30", "--jitter", "0.08", "--no-mirror"]   # as the README's harvest


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    """The demo scenario's train split, 12 frames (two of them without nuts)."""
    root = tmp_path_factory.mktemp("tune_scenario")
    render_scenario(root, train_images=12, test_images=1, seed=SEED)
    images = root / "train" / "images"
    labels = root / "train" / "labels.csv"
    return images, labels, read_labels(labels, images_dir=images).items


@pytest.fixture(scope="module")
def folds(scenario):
    images, labels, items = scenario
    return prepare_folds(images, items, FOLDS, SEED, labels_path=labels, **HARVEST)


def tune_app():
    app = typer.Typer()
    app.command("tune")(tune)
    return app


# --------------------------------------------------------------------------------------------
# folds


@settings(max_examples=50, deadline=None)
@given(n=st.integers(2, 40), empty_share=st.floats(0.0, 0.9), k=st.integers(2, 8),
       seed=st.integers(0, 2**32 - 1))
def test_image_folds_partition_the_images(n, empty_share, k, seed):
    k = min(k, n)
    empty = int(empty_share * n)
    items = [ImageLabels(f"{i}.png", [] if i < empty else [[0, 0, 8, 8]]) for i in range(n)]
    folds = image_folds(items, k, seed)
    assert len(folds) == k
    held = np.concatenate([test for _, test in folds])
    # every image held out exactly once
    assert sorted(held.tolist()) == list(range(n))
    for train, test in folds:
        assert train.dtype == np.int64 and test.dtype == np.int64
        # no image on both sides, and nothing left out
        assert not set(train.tolist()) & set(test.tolist())
        assert sorted(train.tolist() + test.tolist()) == list(range(n))
    sizes = [len(test) for _, test in folds]
    with_objects = [int(np.sum(test >= empty)) for _, test in folds]
    assert max(sizes) - min(sizes) <= 1
    assert max(with_objects) - min(with_objects) <= 1
    # the seed decides the split
    again = image_folds(items, k, seed)
    assert all(np.array_equal(a[1], b[1]) for a, b in zip(folds, again))


def test_image_folds_refuse_impossible_counts():
    items = [ImageLabels(f"{i}.png", [[0, 0, 8, 8]]) for i in range(3)]
    with pytest.raises(InputError, match="at least 2"):
        image_folds(items, 1)
    with pytest.raises(InputError, match="4 folds need at least 4 images, found 3"):
        image_folds(items, 4)


def test_prepare_folds_needs_objects_in_every_fold(scenario):
    images, labels, _ = scenario
    # two images with objects cannot give three folds that each hold out objects
    few = [ImageLabels(f"{i}.png", [[0, 0, 8, 8]] if i < 2 else []) for i in range(5)]
    with pytest.raises(InputError, match="3 folds need at least 3 images with objects, found 2"):
        prepare_folds(images, few, 3, SEED, labels_path=labels)


def test_fold_banks_hold_only_their_training_images(scenario, folds):
    images, labels, items = scenario
    bank, fold_data = folds
    names = [it.image for it in items]
    assert bank.images == names
    held = [it.image for f in fold_data for it in f.test_items]
    assert sorted(held) == sorted(names)  # every image held out exactly once
    for f in fold_data:
        train = {it.image for it in f.train_items}
        test = {it.image for it in f.test_items}
        assert not train & test and train | test == set(names)
        # provenance of every patch in the fold's bank: a training image, never a held-out one
        sources = {f.bank.images[i] for i in f.bank.image_index}
        assert sources <= train and not sources & test
        # and nothing of the training images is lost: same patches as in the whole bank
        mask = np.isin(bank.image_index, [names.index(n) for n in train])
        assert len(f.bank) == int(mask.sum())
        np.testing.assert_array_equal(f.bank.patches, bank.patches[mask])
        np.testing.assert_array_equal(f.bank.labels, bank.labels[mask])
        assert (f.bank.labels == 1).any() and (f.bank.labels == 0).any()
        assert sum(len(it.boxes) for it in f.test_items) > 0


def test_mining_inside_a_fold_scans_only_its_training_images(folds, monkeypatch):
    from detector.training import _mining

    _, fold_data = folds
    fold = fold_data[0]
    real_mine = _mining.mine
    seen = []

    def spy(model, images_dir, items, **kwargs):
        found = real_mine(model, images_dir, items, **kwargs)
        seen.append(([it.image for it in items], list(found.images)))
        return found

    monkeypatch.setattr(_mining, "mine", spy)
    mean, per_fold = evaluate_params([fold], PARAMS, mine_rounds=1)
    assert len(seen) == 2  # round 1 and the check of the final model
    train = sorted(it.image for it in fold.train_items)
    test = {it.image for it in fold.test_items}
    for scanned, mined_from in seen:
        assert sorted(scanned) == train
        assert not set(mined_from) & test
    assert seen[0][1], "the first model should raise some false alarms to mine"
    assert 0.0 <= mean <= 1.0 and per_fold.shape == (1,)


def test_bank_subset_keeps_provenance(folds):
    bank, _ = folds
    sub = bank_subset(bank, [0, 5])
    assert sub.images == bank.images
    assert set(np.unique(sub.image_index).tolist()) == {0, 5}
    assert len(sub) == int(np.sum((bank.image_index == 0) | (bank.image_index == 5)))


def test_prepare_folds_reuses_a_bank_of_the_same_images(scenario, folds):
    images, labels, items = scenario
    bank, fold_data = folds
    same_bank, again = prepare_folds(images, items, FOLDS, SEED, bank=bank)
    assert same_bank is bank
    for a, b in zip(fold_data, again):
        np.testing.assert_array_equal(a.bank.patches, b.bank.patches)
        assert [it.image for it in a.test_items] == [it.image for it in b.test_items]
    with pytest.raises(InputError, match="not harvested from these images"):
        prepare_folds(images, items[::-1], FOLDS, SEED, bank=bank, labels_path=labels)


# --------------------------------------------------------------------------------------------
# the objective


def test_objective_equals_direct_computation(scenario, folds):
    images, _, items = scenario
    bank, fold_data = folds
    mean, per_fold = evaluate_params(fold_data, PARAMS)
    direct = []
    for train_idx, test_idx in image_folds(items, FOLDS, SEED):
        keep = np.isin(bank.image_index, train_idx)
        model = PatchClassifier(**PARAMS).fit(bank.patches[keep], bank.labels[keep]).model_
        model.margin = bank.margin  # the scan reports the box inside the window
        # ... and looks for the labelled object sizes the harvest recorded
        sizes = bank.metadata["object_sizes"]
        model.object_range = np.array([sizes["smallest"], sizes["largest"]])
        engine = Engine(model, ScanSettings(threshold=EVALUATION_THRESHOLD))
        dets, truth = {}, {}
        for i in test_idx:
            found = engine.scan(read_gray(os.path.join(images, items[i].image)))
            dets[items[i].image] = (found.boxes, found.scores)
            truth[items[i].image] = items[i].boxes
        direct.append(evaluate(dets, truth, iou_threshold=0.5, size_buckets=None).average_precision)
    np.testing.assert_array_equal(per_fold, np.array(direct))
    assert mean == pytest.approx(float(np.mean(direct)), abs=1e-15)
    # a real detector: it finds most nuts on frames it never saw
    assert 0.3 < mean <= 1.0


def test_classifier_params_maps_the_option_words():
    values = {"trees": 7, "depth": 3, "mode": "boosted", "pool": 123, "features_per_node": 9,
              "sample_fraction": 0.75}
    p = classifier_params(values, seed=5, exit_budget=0.01)
    assert p == dict(n_trees=7, depth=3, mode="boosted", pool=123, features_per_node=9,
                     sample_fraction=0.75, weight_trim=DEFAULT_TRAIN["weight_trim"],
                     exit_budget=0.01, random_state=5, n_jobs=None,
                     channels=DEFAULT_TRAIN["channels"])  # train's features by default
    PatchClassifier(**p)._check_parameters()  # every key is a classifier parameter
    assert classifier_params(values, channels="grey")["channels"] == "grey"


# --------------------------------------------------------------------------------------------
# the search


def _in_space(values, space):
    for name in ("trees", "depth", "pool", "features_per_node", "sample_fraction"):
        lo, hi = getattr(space, name)
        assert lo <= values[name] <= hi, (name, values[name])
    assert values["mode"] in space.modes
    assert values["features_per_node"] <= values["pool"]


def test_search_is_seeded_and_stops_at_the_trial_limit(folds):
    _, fold_data = folds
    lines = []
    first = search(fold_data, space=TINY, trials=2, seed=1, budget_seconds=1e9,
                   on_trial=lambda r, res: lines.append((r.number, res.best.number)))
    second = search(fold_data, space=TINY, trials=2, seed=1, budget_seconds=1e9)
    assert first.stopped == "trials" and [r.number for r in first.trials] == [1, 2]
    assert [r.values for r in first.trials] == [r.values for r in second.trials]
    assert [r.mean for r in first.trials] == [r.mean for r in second.trials]
    assert first.trials[0].values != first.trials[1].values
    assert len(lines) == 2 and lines[0] == (1, 1)
    for r in first.trials:
        _in_space(r.values, TINY)
        assert r.per_fold.shape == (FOLDS,) and r.mean == pytest.approx(np.mean(r.per_fold))
        assert r.spread == pytest.approx(np.std(r.per_fold, ddof=1))
    assert first.best.mean == max(r.mean for r in first.trials)
    # the trial's mean is the objective of its parameters, recomputed
    best = first.best
    mean, _ = evaluate_params(fold_data, classifier_params(best.values, seed=1))
    assert mean == best.mean


def test_search_with_no_budget_runs_one_trial(folds):
    _, fold_data = folds
    result = search(fold_data, space=TINY, budget_seconds=0.0, seed=0)
    assert len(result.trials) == 1 and result.stopped == "budget"
    assert result.best is result.trials[0]


def test_search_space_check_names_the_bad_range():
    with pytest.raises(InputError, match="depth: low must not exceed high"):
        SearchSpace(depth=(3, 2)).check()
    with pytest.raises(InputError, match="sample_fraction: must lie in"):
        SearchSpace(sample_fraction=(0.0, 1.0)).check()
    with pytest.raises(InputError, match="modes: choose from bagged, boosted"):
        SearchSpace(modes=("forest",)).check()


# --------------------------------------------------------------------------------------------
# the command


def test_tune_command_writes_trials_plot_and_a_working_train_line(scenario, tmp_path, monkeypatch):
    images, labels, items = scenario
    monkeypatch.chdir(tmp_path)
    # without mining, so the printed line's model can be compared array by array with train_model
    result = CliRunner().invoke(tune_app(), [os.fspath(images), os.fspath(labels), "--out", "search",
                                             "--trials", "2", "--seed", str(SEED), *TINY_OPTIONS,
                                             "--mine-rounds", "0"])
    assert result.exit_code == 0, result.output
    out = tmp_path / "search"

    # trials.csv: the columns, one row per trial, the mean is the mean of the folds
    with open(out / "trials.csv", newline="") as fh:
        rows = list(csv.reader(fh))
    assert rows[0] == trials_columns(FOLDS)
    assert rows[0][1:7] == list(PARAMETERS)
    assert [r[0] for r in rows[1:]] == ["1", "2"]
    for r in rows[1:]:
        rec = dict(zip(rows[0], r))
        values = {k: (rec[k] if k == "mode" else float(rec[k])) for k in PARAMETERS}
        _in_space(values, TINY)
        folds_ap = [float(rec[f"ap50_fold_{i + 1}"]) for i in range(FOLDS)]
        assert float(rec["ap50_mean"]) == pytest.approx(np.mean(folds_ap), abs=2e-6)
        assert float(rec["seconds"]) > 0
    # one progress line per trial, with mean ± spread and the best so far
    trial_lines = [ln for ln in result.output.splitlines() if ln.startswith("trial ")]
    assert len(trial_lines) == 2 and trial_lines[0].startswith("trial 1/2: ")
    assert all(" ± " in ln and "best " in ln and " s; " in ln for ln in trial_lines)

    # the plot: a PNG of the size drawn (10.5 x 6.2 inches at 100 dpi)
    png = cv2.imread(os.fspath(out / "ap50-by-parameter.png"))
    assert png is not None and png.shape == (620, 1050, 3)

    # the bank is the harvest of every image with the options given
    bank = load_bank(out / "bank.npz")
    direct = harvest(images, items, seed=SEED, **HARVEST)
    np.testing.assert_array_equal(bank.patches, direct.patches)

    # the printed train line runs as it is and trains exactly the best parameters
    best = json.loads((out / "best.json").read_text())
    lines = [ln.strip() for ln in result.output.splitlines() if ln.strip().startswith("patchwood train ")]
    assert len(lines) == 1 and lines[0] == best["train_command"]
    argv = shlex.split(lines[0])
    trained = CliRunner().invoke(cli_main.app, argv[1:])
    assert trained.exit_code == 0, trained.output
    model = load_model(out / "model.npz")
    params = classifier_params(best["parameters"], seed=SEED)
    expected, _ = train_model(direct, params)
    assert model.metadata["parameters"]["n_trees"] == best["parameters"]["trees"]
    assert model.mode == best["parameters"]["mode"]
    np.testing.assert_array_equal(model.node_features, expected.node_features)
    np.testing.assert_array_equal(model.node_thresholds, expected.node_thresholds)
    np.testing.assert_array_equal(model.leaf_values, expected.leaf_values)
    np.testing.assert_array_equal(model.features, expected.features)
    # the best row of trials.csv is the one best.json names
    best_row = dict(zip(rows[0], rows[best["trial"]]))
    assert float(best_row["ap50_mean"]) == pytest.approx(best["ap50_mean"], abs=1e-6)
    assert float(best_row["ap50_mean"]) == max(float(r[rows[0].index("ap50_mean")]) for r in rows[1:])


def _run_main(argv, monkeypatch, capsys):
    """cli.main.run as the console script runs it: (exit status, stdout, stderr)."""
    if "tune" not in {c.name for c in cli_main.app.registered_commands}:
        cli_main.app.command("tune")(tune)
    monkeypatch.setattr(sys, "argv", ["patchwood", *argv])
    with pytest.raises(SystemExit) as stop:
        cli_main.run()
    out = capsys.readouterr()
    return stop.value.code, out.out, out.err


def test_zero_budget_runs_one_trial_and_existing_output_is_kept(scenario, tmp_path, monkeypatch,
                                                                 capsys):
    images, labels, _ = scenario
    out = tmp_path / "t"
    args = [os.fspath(images), os.fspath(labels), "--out", os.fspath(out), "--budget-minutes", "0",
            *TINY_OPTIONS]
    code, stdout, _ = _run_main(["tune", *args], monkeypatch, capsys)
    assert code == 0
    with open(out / "trials.csv", newline="") as fh:
        assert len(list(csv.reader(fh))) == 2  # header and one trial
    assert "1 trials in" in stdout and "time budget used" in stdout

    before = {p.name: p.read_bytes() for p in out.iterdir()}
    code, stdout, stderr = _run_main(["tune", *args], monkeypatch, capsys)
    assert code == 1 and stdout == ""
    assert stderr.strip().count("\n") == 0
    assert stderr.startswith("error: ") and "exists; add --force to replace it" in stderr
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before

    result = CliRunner().invoke(tune_app(), args)
    assert isinstance(result.exception, InputError)
    assert result.exception.path.startswith(os.fspath(out))

    result = CliRunner().invoke(tune_app(), [*args, "--force"])
    assert result.exit_code == 0, result.output


def test_bad_range_is_a_one_line_usage_error(scenario, tmp_path, monkeypatch, capsys):
    images, labels, _ = scenario
    code, stdout, stderr = _run_main(["tune", os.fspath(images), os.fspath(labels), "--out",
                                      os.fspath(tmp_path / "x"), "--trees", "5..many"],
                                     monkeypatch, capsys)
    assert code == 2 and stderr.strip().count("\n") == 0
    assert "--trees takes a value or a range LOW..HIGH of whole numbers" in stderr
    assert not (tmp_path / "x").exists()


def test_tune_starts_at_train_defaults_and_mines_as_train_does(scenario, tmp_path, monkeypatch):
    """By default every fold mines as many rounds as train does, the first trial is train's
    defaults moved into the ranges (SearchSpace.start), and the printed train line mines those
    rounds on the images tune harvested (recorded in its bank)."""
    from detector.training import DEFAULT_MINE_ROUNDS

    images, labels, _ = scenario
    monkeypatch.chdir(tmp_path)
    result = CliRunner().invoke(tune_app(), [os.fspath(images), os.fspath(labels), "--out", "search",
                                             "--trials", "2", "--seed", str(SEED), *TINY_OPTIONS])
    assert result.exit_code == 0, result.output
    with open(tmp_path / "search" / "trials.csv", newline="") as fh:
        first = next(r for r in csv.DictReader(fh))
    # train's defaults (200 trees, depth 2, boosted, pool 20000, sample fraction 1) clipped into
    # TINY: 10 trees, depth 2, boosted, pool 300 (or fewer: the window's features), per node 16
    # (sqrt(300) = 17.3 -> 17, clipped to 16), sample fraction 1.0
    assert (int(float(first["trees"])), int(float(first["depth"])), first["mode"]) == (10, 2, "boosted")
    assert int(float(first["features_per_node"])) == 16
    assert float(first["sample_fraction"]) == 1.0
    best = json.loads((tmp_path / "search" / "best.json").read_text())
    argv = shlex.split(best["train_command"])
    assert argv[argv.index("--mine-rounds") + 1] == str(DEFAULT_MINE_ROUNDS)
    trained = CliRunner().invoke(cli_main.app, argv[1:])
    assert trained.exit_code == 0, trained.output
    model = load_model(tmp_path / "search" / "model.npz")
    assert [h["round"] for h in model.metadata["mining"]] == list(range(DEFAULT_MINE_ROUNDS + 1))
    assert model.metadata["parameters"]["n_trees"] == best["parameters"]["trees"]
