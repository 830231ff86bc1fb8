"""Model inspection: importance heat map, feature ranking, the report, the pictures and
`patchwood inspect`.

Outside references: cv2 (PNG decoding, ``cv2.matchTemplate`` to find each panel unresampled inside a
picture), numpy (means), and plain-Python reference computations written out beside the checks.
"""

import json
import sys

import cv2
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from cli import inspect_model
from cli import main as cli_main
from detector.classifier import PatchClassifier
from detector.errors import InputError
from detector.harvest import KIND_BACKGROUND, KIND_OBJECT, PatchBank, save_bank
from detector.reporting.inspection import (
    NEGATIVE_RGB,
    NEUTRAL_GREY,
    POSITIVE_RGB,
    display_scale,
    feature_panel,
    heat_map_panel,
    importance_heat_map,
    mean_object_patch,
    model_importances,
    model_report,
    render_heat_map,
    render_top_features,
    report_lines,
    top_features,
    write_png,
)
from detector.model import Model, load_model, save_model

if "inspect" not in {c.name for c in cli_main.app.registered_commands}:
    cli_main.app.command("inspect")(inspect_model.inspect)

runner = CliRunner()


def _feature(*rects):
    rows = [list(r) for r in rects] + [[0] * 5] * (4 - len(rects))
    return rows


def _model(features, importances=None, window=(4, 3), **kw):
    n = len(features)
    nodes = kw.pop("node_features", [[0]])
    thresholds = kw.pop("node_thresholds", [[0.5] * len(nodes[0])] * len(nodes))
    leaves = kw.pop("leaf_values", [[0.0] * (len(nodes[0]) + 1)] * len(nodes))
    assert n >= 1
    return Model(window, np.array(features, np.int32), nodes, thresholds, leaves,
                 [-np.inf] * len(nodes), "bagged", feature_importances=importances, **kw)


def _found(picture, panel) -> bool:
    """True when ``panel`` appears pixel for pixel somewhere in ``picture`` (cv2.matchTemplate)."""
    if panel.shape[0] > picture.shape[0] or panel.shape[1] > picture.shape[1]:
        return False
    sq = cv2.matchTemplate(picture.astype(np.float32), panel.astype(np.float32), cv2.TM_SQDIFF)
    # float32 sums are not exactly 0 at the match: check the 20 best places exactly
    h, w = panel.shape[:2]
    for flat in np.argsort(sq, axis=None)[:20]:
        y, x = np.unravel_index(flat, sq.shape)
        if (picture[y:y + h, x:x + w] == panel).all():
            return True
    return False


# ----------------------------------------------------------------------------------------------
# heat map


def test_heat_map_of_a_hand_built_two_feature_model():
    # window 4 x 3 (width x height)
    # feature A, importance 0.6: (0,0,1,2,-1) and (1,0,1,2,+1): each rectangle has area 2, so each
    #   of its pixels gets |±1| * 0.6 / 2 = 0.3 -> columns 0 and 1 of rows 0..1 get 0.3
    # feature B, importance 0.3: (1,0,3,1,-1), (1,1,3,1,+2), (1,2,3,1,-1): area 3 each, so
    #   row 0 cols 1..3 get 1 * 0.3 / 3 = 0.1, row 1 cols 1..3 get 2 * 0.3 / 3 = 0.2,
    #   row 2 cols 1..3 get 0.1
    # sum:  row 0: 0.3, 0.3 + 0.1 = 0.4, 0.1, 0.1
    #       row 1: 0.3, 0.3 + 0.2 = 0.5, 0.2, 0.2
    #       row 2: 0.0, 0.1, 0.1, 0.1          total 0.9 + 1.2 + 0.3 = 2.4 = 0.6 * 2 + 0.3 * 4
    m = _model([_feature((0, 0, 1, 2, -1), (1, 0, 1, 2, 1)),
                _feature((1, 0, 3, 1, -1), (1, 1, 3, 1, 2), (1, 2, 3, 1, -1))],
               importances=[0.6, 0.3])
    imp, source = model_importances(m)
    heat = importance_heat_map(m.features, imp, m.window)
    assert heat.dtype == np.float64 and heat.shape == (3, 4)
    np.testing.assert_allclose(heat, [[0.3, 0.4, 0.1, 0.1],
                                      [0.3, 0.5, 0.2, 0.2],
                                      [0.0, 0.1, 0.1, 0.1]], rtol=1e-12, atol=1e-15)
    assert heat.sum() == pytest.approx(2.4, rel=1e-12)
    assert "information gain" in source


@st.composite
def _feature_sets(draw):
    width = draw(st.integers(1, 30))
    height = draw(st.integers(1, 30))
    n = draw(st.integers(1, 8))
    features = np.zeros((n, 4, 5), np.int32)
    for i in range(n):
        for r in range(draw(st.integers(1, 4))):
            x = draw(st.integers(0, width - 1))
            y = draw(st.integers(0, height - 1))
            w = draw(st.integers(1, width - x))
            h = draw(st.integers(1, height - y))
            weight = draw(st.integers(-4, 4).filter(bool))
            features[i, r] = (x, y, w, h, weight)
    # importances are 0 or normal floats (a subnormal one divided by an area underflows to 0)
    importances = draw(st.lists(st.one_of(st.just(0.0), st.floats(1e-6, 10)), min_size=n, max_size=n))
    return features, np.array(importances), (width, height)


@settings(max_examples=50, deadline=None)
@given(_feature_sets())
def test_heat_map_total_is_importance_times_summed_weights(case):
    features, importances, window = case
    heat = importance_heat_map(features, importances, window)
    expected = sum(importances[i] * np.abs(features[i, :, 4]).sum() for i in range(len(features)))
    assert heat.shape == (window[1], window[0])
    assert heat.sum() == pytest.approx(expected, rel=1e-9, abs=1e-12)
    assert (heat >= 0).all()
    covered = np.zeros_like(heat, bool)  # pixels under some rectangle of a feature with importance > 0
    for i, f in enumerate(features):
        for x, y, w, h, weight in f:
            if weight and importances[i] > 0:
                covered[y:y + h, x:x + w] = True
    assert (heat[~covered] == 0).all()
    assert (heat[covered] > 0).all()


def test_heat_map_refuses_bad_input():
    f = np.array([_feature((0, 0, 2, 1, 1))], np.int32)
    with pytest.raises(InputError, match="outside"):
        importance_heat_map(f, [1.0], (1, 1))
    with pytest.raises(InputError, match=">= 0"):
        importance_heat_map(f, [-1.0], (2, 1))
    with pytest.raises(InputError, match="shape"):
        importance_heat_map(f, [1.0, 2.0], (2, 1))


# ----------------------------------------------------------------------------------------------
# ranking


def test_top_features_ranks_by_importance_then_index_and_drops_zero():
    one = _feature((0, 0, 1, 1, 1))
    m = _model([one] * 5, importances=[0.2, 0.0, 0.7, 0.2, 0.5])
    assert top_features(m).tolist() == [2, 4, 0, 3]  # 0.7, 0.5, 0.2 (index 0), 0.2 (index 3)
    assert top_features(m, k=2).tolist() == [2, 4]
    assert top_features(m, k=0).tolist() == []


def test_top_features_without_stored_importances_counts_real_splits():
    # tree 0: three real splits on features 1, 0, 2 (node 1 has threshold 0.3, so it is no padding)
    # tree 1: a root split on feature 1 whose children are padding (feature 0, threshold 0, equal
    #         leaves): split counts are feature 0: 1, feature 1: 2, feature 2: 1
    one = _feature((0, 0, 1, 1, 1))
    m = _model([one] * 3, node_features=[[1, 0, 2], [1, 0, 0]],
               node_thresholds=[[0.5, 0.3, 0.7], [0.5, 0.0, 0.0]],
               leaf_values=[[0.0, 0.2, 0.6, 1.0], [0.1, 0.1, 0.9, 0.9]])
    imp, source = model_importances(m)
    assert imp.tolist() == [1.0, 2.0, 1.0]
    assert "real splits" in source
    assert top_features(m).tolist() == [1, 0, 2]


@settings(max_examples=40, deadline=None)
@given(st.lists(st.sampled_from([0.0, 0.25, 0.5, 1.0, 3.0]), min_size=1, max_size=20),
       st.integers(0, 25))
def test_top_features_matches_a_sorted_reference(values, k):
    m = _model([_feature((0, 0, 1, 1, 1))] * len(values), importances=values)
    reference = [i for i in sorted(range(len(values)), key=lambda i: (-values[i], i)) if values[i] > 0][:k]
    assert top_features(m, k=k).tolist() == reference


# ----------------------------------------------------------------------------------------------
# panels and pictures


def test_feature_panel_pixels():
    # 3 x 2 window, scale 10: rectangle (0,0,1,2,-1) covers panel columns 0..9, rows 0..19;
    # (1,0,2,2,+1) covers columns 10..29. Fill = rint(0.6 * 128 + 0.4 * colour), outline 2 px.
    f = np.array(_feature((0, 0, 1, 2, -1), (1, 0, 2, 2, 1)))
    p = feature_panel(f, np.full((2, 3), 77), scale=10)  # a constant background is drawn neutral
    assert p.shape == (20, 30, 3) and p.dtype == np.uint8
    neg_fill = np.rint(0.6 * NEUTRAL_GREY + 0.4 * np.array(NEGATIVE_RGB)).tolist()
    pos_fill = np.rint(0.6 * NEUTRAL_GREY + 0.4 * np.array(POSITIVE_RGB)).tolist()
    assert p[0, 0].tolist() == list(NEGATIVE_RGB) and p[1, 5].tolist() == list(NEGATIVE_RGB)
    assert p[2, 2].tolist() == neg_fill and p[17, 7].tolist() == neg_fill
    assert p[0, 10].tolist() == list(POSITIVE_RGB) and p[19, 29].tolist() == list(POSITIVE_RGB)
    assert p[2, 12].tolist() == pos_fill
    # the + sign of the 20 x 20 positive rectangle sits at its centre (19, 9): light on dark
    assert p[9, 19].tolist() == [255, 255, 255]
    # the two colours differ clearly from each other and from black and white
    for rgb in (POSITIVE_RGB, NEGATIVE_RGB):
        assert 40 < np.mean(rgb) < 215
    assert np.abs(np.subtract(POSITIVE_RGB, NEGATIVE_RGB)).sum() > 300


def test_feature_panel_over_a_patch_stretches_its_contrast():
    patch = np.array([[10.0, 20.0], [30.0, 50.0]])  # 10..50 -> 0..255: 20 -> 63.75 -> 64
    f = np.array(_feature((1, 1, 1, 1, 1)))
    p = feature_panel(f, patch, scale=3)
    assert p[0, 0].tolist() == [0, 0, 0] and p[0, 3].tolist() == [64, 64, 64]
    # at scale 3 the outline is 1 px: rectangle pixels 3..5, outline at 3 and 5, fill at 4 over 255
    assert p[3, 3].tolist() == list(POSITIVE_RGB) and p[5, 5].tolist() == list(POSITIVE_RGB)
    assert p[4, 4].tolist() == np.rint(0.6 * 255 + 0.4 * np.array(POSITIVE_RGB)).tolist()


def test_heat_map_panel_uses_the_colour_map_blockwise():
    import matplotlib

    heat = np.array([[0.0, 1.0], [2.0, 4.0]])
    p = heat_map_panel(heat, scale=5)
    cmap = matplotlib.colormaps["inferno"]
    for (r, c), v in np.ndenumerate(heat):
        block = p[5 * r:5 * r + 5, 5 * c:5 * c + 5].reshape(-1, 3)
        assert (block == np.array(cmap((v / 4.0) ** 0.5, bytes=True)[:3])).all()  # square-root scale
    linear = heat_map_panel(heat, scale=1, gamma=1.0)
    assert linear[0, 1].tolist() == list(cmap(0.25, bytes=True)[:3])


def test_render_pictures_hold_their_panels_unresampled():
    window = (24, 24)
    f = np.array([_feature((2, 3, 4, 10, -1), (6, 3, 4, 10, 1)), _feature((0, 0, 24, 12, -1),
                                                                         (0, 12, 24, 12, 1))])
    imp = np.array([0.25, 0.75])
    heat = importance_heat_map(f, imp, window)
    patch = np.random.default_rng(0).integers(0, 255, (24, 24)).astype(np.float64)
    pic = render_heat_map(heat, patch=patch)
    assert display_scale(window) == 10
    assert _found(pic, heat_map_panel(heat, 10))
    assert _found(pic, heat_map_panel(heat, 10, patch=patch))
    top = render_top_features(f, imp, [1, 0], window, background=patch)
    assert top.shape[0] >= 240 and top.shape[1] >= 480
    assert _found(top, feature_panel(f[1], patch, 10)) and _found(top, feature_panel(f[0], patch, 10))
    grey = render_top_features(f, imp, [1], window)
    assert _found(grey, feature_panel(f[1], np.full((24, 24), NEUTRAL_GREY), 10))


def test_mean_object_patch_is_the_numpy_mean_of_label_one():
    rng = np.random.default_rng(1)
    p = rng.integers(0, 256, (9, 5, 4)).astype(np.uint8)
    y = np.array([1, 0, 1, 1, 0, 0, 1, 0, 1])
    np.testing.assert_allclose(mean_object_patch(p, y), p[y == 1].astype(np.float64).mean(0))
    with pytest.raises(InputError, match="no object"):
        mean_object_patch(p, np.zeros(9))


# ----------------------------------------------------------------------------------------------
# a tiny trained model and its bank


def _random_patches(seed=0):
    """Noisy windows with a faint brighter square (objects) against plain noise (background)."""
    rng = np.random.default_rng(seed)
    obj = rng.integers(0, 120, (60, 24, 24))
    obj[:, 6:18, 6:18] += 50
    bg = rng.integers(0, 170, (120, 24, 24))
    patches = np.clip(np.concatenate([obj, bg]), 0, 255).astype(np.uint8)
    return patches, np.r_[np.ones(60, np.uint8), np.zeros(120, np.uint8)]


@pytest.fixture(scope="module")
def trained(tmp_path_factory):
    folder = tmp_path_factory.mktemp("inspect")
    patches, y = _random_patches()
    clf = PatchClassifier(n_trees=10, pool=500, random_state=0).fit(patches, y)
    model_path = folder / "nuts.npz"
    save_model(model_path, clf.model_)
    n = len(y)
    bank = PatchBank(window=(24, 24), patches=patches, labels=y,
                     kinds=np.where(y == 1, KIND_OBJECT, KIND_BACKGROUND).astype(np.uint8),
                     image_index=np.zeros(n, np.int32), images=["frame.png"],
                     boxes=np.tile(np.array([0, 0, 24, 24], np.float32), (n, 1)),
                     augmentation=np.tile(np.array([0, 0, 1, 0, 0, 1, 0], np.float32), (n, 1)))
    bank_path = folder / "bank.npz"
    save_bank(bank_path, bank)
    return {"folder": folder, "model": model_path, "bank": bank_path, "patches": patches, "y": y,
            "loaded": load_model(model_path)}


def test_model_report_figures_come_from_the_model(trained):
    m = trained["loaded"]
    r = model_report(m)
    assert r["window"] == {"width": 24, "height": 24}
    assert (r["trees"], r["depth"], r["mode"]) == (10, 2, "bagged")
    assert r["features_used"] == len(m.features)
    assert sum(r["rectangles_per_feature"].values()) == len(m.features)
    assert r["early_exit"]["calibration"] == m.metadata["calibration"]
    assert r["early_exit"]["trees_with_exit"] == int(np.isfinite(m.exit_thresholds).sum())
    assert r["training"]["oob_error"] == m.metadata["oob_error"]
    assert r["training"]["versions"] == m.metadata["versions"]
    assert [row["feature"] for row in r["importance"]["top"]] == top_features(m).tolist()
    assert r["importance"]["total"] == pytest.approx(m.feature_importances.sum())
    shares = [row["share"] for row in r["importance"]["top"]]
    assert shares == sorted(shares, reverse=True) and sum(shares) <= 1 + 1e-12
    json.dumps(r, allow_nan=False)  # JSON-ready
    text = "\n".join(report_lines(r))
    assert "mean trees evaluated per window" in text


def test_report_lines_show_mining_history_and_bank_counts():
    md = {"date": "2025-05-06", "oob_error": 0.0125, "margin": 0.1,
          "calibration": {"exit_recall": 0.99, "objects": 20, "mean_trees_objects": 7.25,
                          "mean_trees_background": 1.5, "background_source": "held-out frames"},
          "bank": {"sha256": "ab" * 32, "counts": {"objects": 160, "object": 32, "augmented": 128,
                                                    "background": 700, "mined": 20}},
          "mining": [{"round": 0, "false_alarms_per_image": 1.5, "recall": 0.9, "added": 120},
                     {"round": 1, "false_alarms_per_image": 0.25, "recall": 0.95, "added": 0}],
          "versions": {"numpy": "9.9"}}
    m = _model([_feature((0, 0, 1, 1, 1))], importances=[1.0], metadata=md)
    text = "\n".join(report_lines(model_report(m)))
    assert "mining round 0: 1.5 false alarms per image, recall 0.9, 120 background patches added" in text
    assert "mining round 1: 0.25 false alarms per image, recall 0.95, 0 background patches added" in text
    assert "bank: 160 object patches (32 as labelled, 128 augmented), 700 background patches (20 from mining)" in text
    assert f"bank sha256: {'ab' * 32}" in text
    assert "mean trees evaluated per window (of 1): objects 7.25, background 1.50 (held-out frames)" in text
    # a model trained before the budget had its name states its recall: 1 - 0.99 = 0.01
    assert "calibrated with an exit budget of 0.01 on 20 held-out object patches" in text
    assert "out-of-bag error: 1.25 %" in text and "trained: 2025-05-06" in text
    assert "versions: numpy 9.9" in text


def test_cli_prints_the_figures_and_writes_both_pictures(trained, tmp_path):
    m = trained["loaded"]
    out = tmp_path / "pictures"
    result = runner.invoke(cli_main.app, ["inspect", str(trained["model"]), "--out", str(out)])
    assert result.exit_code == 0, result.output
    text = result.output
    cal = m.metadata["calibration"]
    assert "window: 24 x 24 pixels" in text
    assert "mode: bagged (random forest)" in text
    assert "trees: 10 of depth 2" in text
    assert f"features used: {len(m.features)} of a pool of 500" in text
    assert (f"mean trees evaluated per window (of 10): objects {cal['mean_trees_objects']:.2f}, "
            f"background {cal['mean_trees_background']:.2f}") in text
    assert f"out-of-bag error: {100 * m.metadata['oob_error']:.2f} %" in text
    assert f"trained: {m.metadata['date']}" in text
    assert "mining: none" in text and "scikit-learn" in text
    assert "neutral grey" in text

    heat_png = cv2.imread(str(out / "heat-map.png"), cv2.IMREAD_COLOR)[:, :, ::-1]
    top_png = cv2.imread(str(out / "top-features.png"), cv2.IMREAD_COLOR)[:, :, ::-1]
    imp = m.feature_importances
    heat = importance_heat_map(m.features, imp, m.window)
    assert heat_png.shape[0] >= 240 and heat_png.shape[1] >= 240
    assert _found(heat_png, heat_map_panel(heat, 10))
    ranked = top_features(m)
    n = len(ranked)
    assert top_png.shape[0] >= 240 * ((n + 3) // 4) and top_png.shape[1] >= 240 * min(4, n)
    grey = np.full((24, 24), NEUTRAL_GREY)
    assert _found(top_png, feature_panel(m.features[ranked[0]], grey, 10))
    assert _found(top_png, feature_panel(m.features[ranked[-1]], grey, 10))


def test_cli_with_a_bank_draws_over_the_mean_object_patch(trained, tmp_path):
    m = trained["loaded"]
    out = tmp_path / "with-bank"
    result = runner.invoke(cli_main.app, ["inspect", str(trained["model"]), "--out", str(out),
                                          "--bank", str(trained["bank"]), "--top-features", "3"])
    assert result.exit_code == 0, result.output
    mean = trained["patches"][trained["y"] == 1].astype(np.float64).mean(0)
    top_png = cv2.imread(str(out / "top-features.png"), cv2.IMREAD_COLOR)[:, :, ::-1]
    for i in top_features(m, 3):
        assert _found(top_png, feature_panel(m.features[i], mean, 10))
    heat_png = cv2.imread(str(out / "heat-map.png"), cv2.IMREAD_COLOR)[:, :, ::-1]
    heat = importance_heat_map(m.features, m.feature_importances, m.window)
    assert _found(heat_png, heat_map_panel(heat, 10, patch=mean))


def test_cli_default_folder_and_refusing_to_overwrite(trained, tmp_path):
    model = tmp_path / "belt-model.npz"
    model.write_bytes(trained["model"].read_bytes())
    first = runner.invoke(cli_main.app, ["inspect", str(model)])
    assert first.exit_code == 0, first.output
    folder = tmp_path / "belt-model_inspect"
    before = {p.name: p.read_bytes() for p in folder.iterdir()}
    assert sorted(before) == ["heat-map.png", "top-features.png"]
    again = runner.invoke(cli_main.app, ["inspect", str(model)])
    assert again.exit_code != 0
    assert isinstance(again.exception, InputError) and "--force" in str(again.exception)
    assert {p.name: p.read_bytes() for p in folder.iterdir()} == before
    forced = runner.invoke(cli_main.app, ["inspect", str(model), "--force"])
    assert forced.exit_code == 0, forced.output
    assert {p.name: p.read_bytes() for p in folder.iterdir()} == before  # same model, same pictures


def test_cli_json(trained, tmp_path):
    result = runner.invoke(cli_main.app, ["inspect", str(trained["model"]), "--out",
                                          str(tmp_path / "j"), "--json"])
    assert result.exit_code == 0, result.output
    data = json.loads(result.stdout)
    m = trained["loaded"]
    assert data["trees"] == 10 and data["depth"] == 2 and data["features_used"] == len(m.features)
    assert data["early_exit"]["calibration"] == m.metadata["calibration"]
    assert data["pictures"]["heat_map"].endswith("heat-map.png")
    assert data["pictures"]["background"] == "neutral grey"


def _run(monkeypatch, capsys, *args):
    monkeypatch.setattr(sys, "argv", ["patchwood", *args])
    with pytest.raises(SystemExit) as stop:
        cli_main.run()
    captured = capsys.readouterr()
    return stop.value.code, captured.err


def test_cli_bank_given_as_model_is_one_line_error(trained, monkeypatch, capsys, tmp_path):
    code, err = _run(monkeypatch, capsys, "inspect", str(trained["bank"]), "--out", str(tmp_path / "x"))
    assert code == 1
    assert err.count("\n") == 1 and "Traceback" not in err
    assert err.startswith(f"error: {trained['bank']}: this is a patch bank, not a model")
    assert not (tmp_path / "x").exists()


def test_cli_model_given_as_bank_and_wrong_window(trained, monkeypatch, capsys, tmp_path):
    code, err = _run(monkeypatch, capsys, "inspect", str(trained["model"]), "--bank",
                     str(trained["model"]), "--out", str(tmp_path / "x"))
    assert code == 1 and err.count("\n") == 1
    assert err.startswith(f"error: {trained['model']}: not a patch bank")
    small = PatchBank(window=(12, 12), patches=np.zeros((2, 12, 12), np.uint8),
                      labels=np.array([1, 0], np.uint8), kinds=np.array([0, 2], np.uint8),
                      image_index=np.zeros(2, np.int32), images=["a.png"],
                      boxes=np.zeros((2, 4), np.float32),
                      augmentation=np.tile(np.array([0, 0, 1, 0, 0, 1, 0], np.float32), (2, 1)))
    save_bank(tmp_path / "small.npz", small)
    code, err = _run(monkeypatch, capsys, "inspect", str(trained["model"]), "--bank",
                     str(tmp_path / "small.npz"), "--out", str(tmp_path / "x"))
    assert code == 1 and err.count("\n") == 1
    assert err.startswith(f"error: {tmp_path / 'small.npz'}: the bank's window 12x12 is not the model's 24x24")


def test_write_png_round_trips_through_cv2(tmp_path):
    img = np.zeros((5, 7, 3), np.uint8)
    img[1, 2] = (200, 10, 30)
    write_png(tmp_path / "a.png", img)
    back = cv2.imread(str(tmp_path / "a.png"), cv2.IMREAD_COLOR)[:, :, ::-1]
    assert (back == img).all()
