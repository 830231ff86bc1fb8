"""PatchClassifier as a scikit-learn estimator, and its outside check on real faces.

Outside references: scikit-learn's clone / cross_val_score / roc_auc_score, and the Labeled Faces in
the Wild subset that scikit-image bundles (skimage.data.lfw_subset: 100 face and 100 non-face
patches of 25 x 25; Huang et al., "Labeled Faces in the Wild", UMass TR 07-49, 2007).
"""

import numpy as np
import pytest
from skimage.data import lfw_subset
from sklearn.base import clone
from sklearn.model_selection import StratifiedKFold, cross_val_score

from detector.cascade import calibration_count, trees_evaluated
from detector.classifier import PatchClassifier
from detector.errors import InputError


def _patches(n_objects=60, n_background=60, size=12, seed=0):
    """Bright ring on a darker ground (objects) against noisy ground with random bright blobs."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[:size, :size] - (size - 1) / 2
    r = np.hypot(xx, yy)
    ring = (r < size / 2.5) & (r > size / 6)
    obj = rng.normal(70, 20, (n_objects, size, size)) + rng.uniform(60, 120, (n_objects, 1, 1)) * ring
    bg = rng.normal(90, 30, (n_background, size, size))
    bg[: n_background // 2, : size // 2] += 80
    patches = np.clip(np.concatenate([obj, bg]), 0, 255).astype(np.uint8)
    y = np.r_[np.ones(n_objects, int), np.zeros(n_background, int)]
    order = rng.permutation(len(y))
    return patches[order], y[order]


def test_lfw_cross_validated_auc_with_default_settings():
    """Outside check: 5-fold ROC AUC on skimage's LFW subset is at least 0.99 (for scale, skimage
    Haar features (random 5,000) + sklearn RandomForestClassifier (200 trees, depth 2, entropy)
    reach 0.999 there)."""
    faces = np.round(lfw_subset() * 255).astype(np.uint8)
    y = np.r_[np.ones(100, int), np.zeros(100, int)]
    folds = StratifiedKFold(5, shuffle=True, random_state=0)
    auc = cross_val_score(PatchClassifier(random_state=0), faces, y, cv=folds, scoring="roc_auc")
    assert auc.mean() >= 0.99, auc


def test_clone_and_cross_val_score():
    patches, y = _patches()
    clf = PatchClassifier(n_trees=15, pool=300, depth=3, mode="boosted", random_state=1)
    twin = clone(clf)
    assert twin.get_params() == clf.get_params() and not hasattr(twin, "model_")
    accuracy = cross_val_score(twin, patches, y, cv=3)
    assert accuracy.mean() > 0.9
    auc = cross_val_score(clone(clf).set_params(mode="bagged"), patches, y, cv=3, scoring="roc_auc")
    assert auc.mean() > 0.95


def test_predictions_agree_with_each_other_and_the_model():
    patches, y = _patches(seed=2)
    for mode, bins in (("bagged", 256), ("boosted", 256), ("bagged", None), ("boosted", 8)):
        clf = PatchClassifier(n_trees=20, pool=300, mode=mode, max_bins=bins, random_state=0).fit(patches, y)
        proba = clf.predict_proba(patches)
        assert proba.shape == (len(y), 2) and np.allclose(proba.sum(axis=1), 1)
        assert ((proba >= 0) & (proba <= 1)).all()
        np.testing.assert_array_equal(proba[:, 1], clf.model_.score(patches))
        decision = clf.decision_function(patches)
        np.testing.assert_array_equal(clf.predict(patches), (decision > 0).astype(int))
        np.testing.assert_array_equal(clf.predict(patches), (proba[:, 1] > 0.5).astype(int))
        assert (clf.predict(patches) == y).mean() > 0.9
        assert clf.classes_.tolist() == [0, 1]
        imp = clf.feature_importances_
        assert imp.shape == (len(clf.model_.features),) and imp.sum() == pytest.approx(1) and (imp >= 0).all()
        if mode == "bagged":
            assert 0 <= clf.oob_error_ < 0.2
        else:
            assert np.isnan(clf.oob_error_)


def test_early_exit_keeps_the_calibration_objects():
    patches, y = _patches(n_objects=300, n_background=100, seed=3)
    clf = PatchClassifier(n_trees=30, pool=300, exit_budget=0.02, random_state=0).fit(patches, y)
    held = clf.calibration_indices_
    assert len(held) == calibration_count(300) == 30 and (y[held] == 1).all()
    # the calibration set: every held-out object and 8 misaligned copies of it (seeded stream 5)
    from detector.cascade import misaligned_copies
    from detector._validation import seed_sequence

    copies = misaligned_copies(patches[held], 1.0, 1.1, random_state=seed_sequence(0).spawn(5)[4])
    running = clf.model_.running_scores(copies)
    dropped = (running < clf.model_.exit_thresholds.astype(np.float64)).any(axis=1)
    assert dropped.sum() <= np.floor(0.02 * 270)  # floor((1 - 0.98) * 30 * 9) = 5 may be dropped
    cal = clf.model_.metadata["calibration"]
    assert cal["objects"] == 30
    assert cal["mean_trees_objects"] == pytest.approx(trees_evaluated(running, clf.model_.exit_thresholds).mean())
    # background leaves early on average: that is what the exit is for
    assert cal["mean_trees_background"] < 0.5 * cal["mean_trees_objects"]
    # held-out patches took no part in growing: the growing set's counts say so
    assert clf.model_.metadata["patches"] == {"objects": 270, "background": 100, "window": [12, 12]}


def test_same_seed_same_model_and_progress():
    patches, y = _patches(seed=4)
    calls = []
    a = PatchClassifier(n_trees=6, pool=200, random_state=9).fit(patches, y, progress=lambda d, t: calls.append(d))
    b = PatchClassifier(n_trees=6, pool=200, random_state=9, n_jobs=2).fit(patches, y)
    c = PatchClassifier(n_trees=6, pool=200, random_state=10).fit(patches, y)
    assert calls == [1, 2, 3, 4, 5, 6]
    np.testing.assert_array_equal(a.model_.features, b.model_.features)
    np.testing.assert_array_equal(a.model_.node_thresholds, b.model_.node_thresholds)
    np.testing.assert_array_equal(a.model_.exit_thresholds, b.model_.exit_thresholds)
    assert not np.array_equal(a.model_.features, c.model_.features)


@pytest.mark.parametrize("mode", ["bagged", "boosted"])
def test_both_growers_classify_well(mode):
    """The default histogram grower and the scikit-learn route it is tested against
    (tests/test_histogram_trees.py holds their trees equal where no random draw is involved; on
    these easy patches many features separate the classes equally well, so the draw order decides
    which one a node takes and the trees differ)."""
    patches, y = _patches(seed=5)
    kw = dict(n_trees=10, pool=60, depth=2, mode=mode, random_state=3)
    ours = PatchClassifier(**kw).fit(patches, y)
    sk = PatchClassifier(grower="sklearn", **kw).fit(patches, y)
    assert (ours.predict(patches) == y).mean() > 0.9 and (sk.predict(patches) == y).mean() > 0.9
    assert ours.model_.metadata["parameters"]["grower"] == "histogram"
    assert sk.model_.metadata["parameters"]["grower"] == "sklearn"


@pytest.mark.parametrize("channels", ["grey", "gradient"])
def test_pool_values_binned_in_blocks_equal_the_whole_pool_binned(monkeypatch, channels):
    """The histogram route evaluates and bins the pool a block of features at a time (with
    channels, a block of one channel at a time); the model must not depend on the block size
    (each feature's values and cuts are its own)."""
    import detector.patch_forest as classifier

    patches, y = _patches(seed=6)
    kw = dict(n_trees=8, pool=300, mode="boosted", random_state=2, channels=channels)
    whole = PatchClassifier(**kw).fit(patches, y)
    monkeypatch.setattr(classifier, "VALUE_BLOCK", 7)
    blocks = PatchClassifier(**kw).fit(patches, y)
    for name in ("features", "node_features", "node_thresholds", "leaf_values", "exit_thresholds"):
        np.testing.assert_array_equal(getattr(blocks.model_, name), getattr(whole.model_, name))


MODEL_ARRAYS = ("features", "feature_channels", "node_features", "node_thresholds", "leaf_values",
                "exit_thresholds")


def test_a_binned_pool_gives_the_fit_it_saves():
    """Mining computes the pool once (BinnedPool): on the bank it was made from, the fit is the
    same model, array for array, as the fit that computes its own pool."""
    from detector.classifier import BinnedPool

    patches, y = _patches(seed=7)
    kw = dict(n_trees=8, pool=300, mode="boosted", random_state=2, channels="gradient")
    plain = PatchClassifier(**kw).fit(patches, y)
    reused = PatchClassifier(**kw).fit(patches, y, binned=BinnedPool(kw, patches, y))
    for name in MODEL_ARRAYS:
        np.testing.assert_array_equal(getattr(reused.model_, name), getattr(plain.model_, name))


def test_a_binned_pool_grows():
    """Mined patches are binned with the first bank's cuts (bin = cuts below the value, as
    numpy's searchsorted counts them, on values from the plain-numpy evaluation)."""
    from detector.classifier import BinnedPool
    from detector.features import evaluate_features_numpy

    patches, y = _patches(seed=8)
    kw = dict(n_trees=8, pool=400, mode="boosted", random_state=3, channels="gradient")
    binned = BinnedPool(kw, patches, y)
    grown_on = binned.bins.shape[1]
    assert grown_on == len(y) - calibration_count(int(y.sum()))   # the held objects are left out
    new, _ = _patches(n_objects=0, n_background=9, seed=9)
    binned.extend(new)
    assert binned.bins.shape == (400, grown_on + 9)
    values = evaluate_features_numpy(binned.pool, new, channels=binned.channels)  # (9, P)
    expected = np.stack([np.searchsorted(binned.cuts[f], values[:, f], side="left")
                         for f in range(400)])
    np.testing.assert_array_equal(binned.bins[:, grown_on:], expected)
    # the bins fit the grown bank: a model grows on them (the held objects are the same)
    model = PatchClassifier(**kw).fit(np.concatenate([patches, new]), np.r_[y, np.zeros(9, int)],
                                      binned=binned)
    assert model.model_.metadata["pool_drawn"] == 400
    with pytest.raises(InputError, match=f"holds {grown_on + 9} patches to grow on, these patches {grown_on}"):
        PatchClassifier(**kw).fit(patches, y, binned=binned)


@pytest.mark.parametrize(
    "params, message",
    [
        (dict(mode="stacked"), "mode must be one of bagged, boosted"),
        (dict(n_trees=0), "n_trees must be an integer >= 1"),
        (dict(depth=13), "depth must be an integer 1..12"),
        (dict(sample_fraction=0.0), "sample_fraction must be a number in (0, 1]"),
        (dict(weight_trim=0.6), "weight_trim must be a number in [0, 0.5]"),
        (dict(exit_budget=1.0), "exit_budget must be a number in [0, 1)"),
        (dict(pool=2.5), "pool must be an integer >= 1"),
        (dict(max_bins=1), "max_bins must be an integer 2..256"),
        (dict(grower="fast"), "grower must be one of sklearn, histogram"),
    ],
)
def test_bad_parameters_are_refused_at_fit(params, message):
    patches, y = _patches(n_objects=10, n_background=10)
    clf = PatchClassifier(**params)  # stored unchanged; checked at fit, sklearn style
    assert all(clf.get_params()[k] == v for k, v in params.items())
    with pytest.raises(InputError) as err:
        clf.fit(patches, y)
    assert str(err.value) == message + f", got {next(iter(params.values()))!r}"


def test_bad_data_is_refused():
    patches, y = _patches(n_objects=10, n_background=10)
    with pytest.raises(InputError, match="both object"):
        PatchClassifier(n_trees=2, pool=50).fit(patches, np.ones(len(y)))
    with pytest.raises(InputError, match="0 .background. and 1 .object. only"):
        PatchClassifier(n_trees=2, pool=50).fit(patches, y * 2)
    with pytest.raises(InputError, match="uint8 grey levels"):
        PatchClassifier(n_trees=2, pool=50).fit(patches / 255.0, y)
    with pytest.raises(InputError, match=r"\(N, height, width\)"):
        PatchClassifier(n_trees=2, pool=50).fit(patches[:, 0], y)
    clf = PatchClassifier(n_trees=2, pool=50, random_state=0).fit(patches, y)
    with pytest.raises(InputError, match="window is 12x12"):
        clf.predict_proba(patches[:, :10, :10])


def test_from_model_scores_like_the_fitted_classifier(tmp_path):
    from detector.model import load_model, save_model

    patches, y = _patches(seed=6)
    clf = PatchClassifier(n_trees=10, pool=200, mode="boosted", random_state=0).fit(patches, y)
    save_model(tmp_path / "m.npz", clf.model_)
    again = PatchClassifier.from_model(load_model(tmp_path / "m.npz"))
    np.testing.assert_array_equal(again.predict_proba(patches), clf.predict_proba(patches))
    assert again.get_params()["mode"] == "boosted" and again.get_params()["n_trees"] == 10


def test_caller_metadata_reaches_the_model_file(tmp_path):
    from detector.model import load_model, save_model
    from detector.io.npzfile import file_sha256, save_npz

    patches, y = _patches(seed=7)
    bank = tmp_path / "bank.npz"
    save_npz(bank, {"patches": patches, "labels": y.astype(np.uint8)})
    digest = file_sha256(bank)
    clf = PatchClassifier(n_trees=4, pool=100, random_state=0).fit(
        patches, y, metadata={"bank_sha256": digest}, margin=0.1)
    save_model(tmp_path / "m.npz", clf.model_)
    back = load_model(tmp_path / "m.npz")
    assert back.metadata["bank_sha256"] == digest and back.margin == 0.1
    assert f"bank sha256 {digest[:12]}" in back.summary()[-1]


@pytest.mark.parametrize("mode,grower,channels,mined", [
    ("boosted", "histogram", "gradient", False), ("bagged", "histogram", "grey", False),
    ("boosted", "sklearn", "grey", False), ("boosted", "histogram", "gradient", True)])
def test_background_leaves_read_off_the_bins_are_the_models_own(monkeypatch, mode, grower,
                                                                channels, mined):
    """The fit hands calibrate the background's leaf values read off the bins it grew on (bin
    <= k exactly when value <= cuts[f, k]); they must be what the grown model's trees give the
    background patches from their feature values, tree for tree. ``mined``: bins of patches
    added to a BinnedPool with the first bank's cuts (as hard-negative mining adds them), where a
    value may fall exactly on a cut."""
    import detector.patch_forest as classifier
    from detector.classifier import BinnedPool

    seen = []
    calibrate = classifier.calibrate

    def checked(leaf_scores, mode_, objects, background, **kw):
        given = kw["background_leaves"]
        assert given is not None and given.shape == (len(background), leaf_scores(objects[:1]).shape[1])
        np.testing.assert_array_equal(given, leaf_scores(background))
        seen.append(len(background))
        return calibrate(leaf_scores, mode_, objects, background, **kw)

    monkeypatch.setattr(classifier, "calibrate", checked)
    patches, y = _patches(seed=11)
    kw = dict(n_trees=12, pool=300, mode=mode, random_state=4, channels=channels, grower=grower)
    binned = None
    if mined:
        binned = BinnedPool(kw, patches, y)
        new, _ = _patches(n_objects=0, n_background=30, seed=12)
        binned.extend(new)
        patches, y = np.concatenate([patches, new]), np.r_[y, np.zeros(30, int)]
    PatchClassifier(**kw).fit(patches, y, binned=binned)
    assert seen == [int((y == 0).sum())]   # every background patch grows (none is held out)


def test_calibration_computes_background_leaves_itself_when_not_given():
    """Without ``background_leaves`` calibrate evaluates the trees on the background itself,
    and the cascade is the same as with them given."""
    from detector.cascade import calibrate

    fitted = PatchClassifier(n_trees=10, pool=200, random_state=1).fit(*_patches(seed=13))
    model = fitted.model_
    patches, y = _patches(seed=14)
    objects, background = patches[y == 1][:20], patches[y == 0]
    plain = calibrate(model.leaf_scores, "boosted", objects, background, random_state=0)
    given = calibrate(model.leaf_scores, "boosted", objects, background, random_state=0,
                      background_leaves=model.leaf_scores(background))
    np.testing.assert_array_equal(plain.order, given.order)
    np.testing.assert_array_equal(plain.exit_thresholds, given.exit_thresholds)
    np.testing.assert_array_equal(plain.exit_table, given.exit_table)
    assert plain.min_sigma == given.min_sigma and plain.temperature == given.temperature
    with pytest.raises(ValueError, match="background_leaves holds 3 rows for 60"):
        calibrate(model.leaf_scores, "boosted", objects, background, random_state=0,
                  background_leaves=model.leaf_scores(background[:3]))
