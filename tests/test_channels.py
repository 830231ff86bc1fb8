"""Gradient channels and channel features (detector.features; Integral Channel Features, Dollár, Tu,
Perona and Belongie, BMVC 2009): the channel images against numpy references, the compiled
integral images against their numpy twin, channel feature values against the numpy twin, the
scan of channel models against its numpy twin and against the classifier on patches cut by hand,
the pyramid the scan reads channel models on (against patches cut by hand from frames shrunk
with ``cv2.resize``), and the model file.

References: the central differences and the magnitude are checked against numpy (``np.pad`` with
mode "edge", ``np.hypot``), the orientation bins against ``np.arctan2`` in degrees.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from detector.features import (EDGE_STRENGTH, FEATURE_PLANES, N_CHANNELS, channel_integrals,
                               channel_integrals_numpy,
                               gradient_channels, orientation_bins, patch_channels,
                               patch_channels_numpy)
from detector.classifier import PatchClassifier
from detector.errors import InputError
from detector.features import (channel_pool, evaluate_features, evaluate_features_numpy,
                               from_corners, integral_scratch, random_pool)
from detector.harvest import harvest
from detector.io.labels import read_labels
from detector.model import CHANNELS_FORMAT_VERSION, FORMAT_VERSION, load_model, model_arrays, \
    save_model
from detector.scan import (Engine, ScanSettings, channel_frame_integrals, final_scores,
                           integral_dtype)
from synthetic_images import render_frame, render_scenario

WINDOW = (24, 24)


def reference_channels(gray):
    """Channels 1..7 with numpy: central differences on the edge-padded image, np.hypot, and the
    orientation from np.arctan2 in degrees modulo 180, in bins of 30 degrees."""
    g = np.pad(gray.astype(np.int64), 1, mode="edge")
    gx = g[1:-1, 2:] - g[1:-1, :-2]
    gy = g[2:, 1:-1] - g[:-2, 1:-1]
    magnitude = np.minimum(np.rint(np.hypot(gx, gy)), 255).astype(np.uint8)
    angle = np.degrees(np.arctan2(gy, gx)) % 180.0
    bins = np.minimum(angle // 30, 5).astype(np.int64)
    out = np.zeros((7,) + gray.shape, np.uint8)
    out[0] = magnitude
    for k in range(6):
        out[k + 1] = np.where(bins == k, magnitude, 0)
    return out


@settings(max_examples=40, deadline=None)
@given(st.integers(1, 9), st.integers(1, 9), st.integers(0, 2**32 - 1), st.booleans())
def test_channels_equal_the_numpy_reference(height, width, seed, binary):
    rng = np.random.default_rng(seed)
    gray = (rng.integers(0, 2, (height, width)) * 255 if binary
            else rng.integers(0, 256, (height, width))).astype(np.uint8)
    np.testing.assert_array_equal(gradient_channels(gray), reference_channels(gray))


def test_orientation_bins_equal_arctan2_everywhere():
    """Every integer gradient the channels can meet (|gx|, |gy| <= 255) but (0, 0): the integer
    rules give floor((atan2(gy, gx) mod 180) / 30). No integer gradient lies on a boundary at
    30, 60, 120 or 150 degrees (tan 30 is irrational), so arctan2's rounding cannot matter."""
    gx, gy = np.meshgrid(np.arange(-255, 256), np.arange(-255, 256))
    gx, gy = gx.ravel(), gy.ravel()
    keep = (gx != 0) | (gy != 0)
    expected = (np.degrees(np.arctan2(gy, gx)) % 180.0) // 30
    np.testing.assert_array_equal(orientation_bins(gx[keep], gy[keep]), expected[keep])


@pytest.mark.parametrize("shape", [(1, 1), (1, 4), (5, 1), (2, 2), (13, 17), (61, 83)])
@pytest.mark.parametrize("dtype", [np.int32, np.float64])
def test_compiled_channel_integrals_equal_numpy_twin(shape, dtype):
    rng = np.random.default_rng(shape[0] * 100 + shape[1])
    for gray in (rng.integers(0, 256, shape).astype(np.uint8),
                 (rng.integers(0, 2, shape) * 255).astype(np.uint8)):
        a = channel_integrals(gray, dtype)
        b = channel_integrals_numpy(gray, dtype)
        assert a.dtype == b.dtype == dtype and a.shape == (N_CHANNELS,) + tuple(np.add(shape, 1))
        np.testing.assert_array_equal(a, b)
        # the scan's table: the same planes, flattened, and the squared grey integral
        table, sq = channel_frame_integrals(gray)
        if integral_dtype(*shape) == dtype:
            np.testing.assert_array_equal(table, a.ravel())
        g = gray.astype(np.int64)
        assert sq[-1] == (g * g).sum()


@pytest.mark.parametrize("band_rows", [1, 2, 5, 12, 13, 40])
@pytest.mark.parametrize("dtype", [np.int32, np.uint32, np.float64])
def test_channel_planes_made_in_bands_equal_the_numpy_twin(band_rows, dtype):
    """The gradient planes are made a band of rows at a time and summed by cv2.integral from
    zero, the row above each band added back: any band height gives the twin's exact sums, in
    every table dtype (uint32 through an int32 view)."""
    from detector.features import fill_channel_planes

    rng = np.random.default_rng(band_rows)
    gray = rng.integers(0, 256, (13, 17)).astype(np.uint8)
    want = channel_integrals_numpy(gray, np.float64)
    table = np.full((N_CHANNELS, 14, 18), 99, dtype)
    fill_channel_planes(gray, table, band_rows=band_rows)
    np.testing.assert_array_equal(table[1:].astype(np.float64), want[1:])
    assert (table[0] == 99).all()  # plane 0 is the caller's


def test_uint32_channel_tables_hold_every_plane(monkeypatch):
    """Above the int32 limit a frame's channel table is uint32 (limits lowered so that a small
    frame crosses them): the grey plane too is filled, not left as it was (cv2 cannot write a
    uint32 array; it is written through an int32 view)."""
    from detector.scan import _engine as scan

    monkeypatch.setattr(scan, "INT32_PIXELS", 100)
    gray = np.random.default_rng(3).integers(0, 256, (13, 17)).astype(np.uint8)
    stale = (np.full((N_CHANNELS, 14, 18), 7, np.uint32), np.zeros((14, 18)))
    for out in (stale, None):
        table, sq = channel_frame_integrals(gray, out)
        assert table.dtype == np.uint32
        np.testing.assert_array_equal(table.reshape(N_CHANNELS, 14, 18).astype(np.float64),
                                      channel_integrals_numpy(gray, np.float64))
    np.testing.assert_array_equal(channel_integrals(gray, np.uint32).astype(np.float64),
                                  channel_integrals_numpy(gray, np.float64))


def test_patch_channels_are_the_channels_of_each_patch_alone():
    rng = np.random.default_rng(1)
    patches = rng.integers(0, 256, (5, 6, 7)).astype(np.uint8)
    made = patch_channels(patches)
    for p, c in zip(patches, made):
        np.testing.assert_array_equal(c, reference_channels(p))


@settings(max_examples=40, deadline=None)
@given(st.integers(1, 9), st.integers(1, 9), st.integers(0, 600), st.integers(1, 3),
       st.integers(0, 2**32 - 1), st.booleans())
def test_compiled_patch_channels_equal_the_numpy_twin(height, width, n, jobs, seed, binary):
    """The compiled loop (on 1 to 3 threads: blocks of at least 256 patches each) against
    patch_channels_numpy (cv2.Sobel and numpy on the patches side by side) and, patch by patch,
    the arctan2 reference."""
    rng = np.random.default_rng(seed)
    patches = (rng.integers(0, 2, (n, height, width)) * 255 if binary
               else rng.integers(0, 256, (n, height, width))).astype(np.uint8)
    made = patch_channels(patches, n_jobs=jobs)
    assert made.shape == (n, N_CHANNELS - 1, height, width) and made.dtype == np.uint8
    np.testing.assert_array_equal(made, patch_channels_numpy(patches))
    for i in rng.choice(n, min(n, 3), replace=False) if n else []:
        np.testing.assert_array_equal(made[i], reference_channels(patches[i]))


def test_channel_pool_draws_inside_the_border_ring():
    features, channels = channel_pool(24, 20, 3000, random_state=4)
    used = features[:, :, 4] != 0
    r = features[used]
    assert r[:, 0].min() == 1 and r[:, 1].min() == 1
    assert (r[:, 0] + r[:, 2]).max() == 23 and (r[:, 1] + r[:, 3]).max() == 19
    assert channels.min() == 1 and channels.max() == EDGE_STRENGTH
    plane = np.asarray(FEATURE_PLANES)[channels]
    assert (np.diff(plane) >= 0).all()  # sorted by the plane read
    assert len(np.unique(np.c_[features.reshape(len(features), -1), channels], axis=0)) >= 2990
    single = used.sum(axis=1) == 1  # the one-rectangle shape, weight +1
    assert single.any() and (features[single, 0, 4] == 1).all()
    # edge strength: exactly the single rectangles on the gradient magnitude
    np.testing.assert_array_equal(channels == EDGE_STRENGTH, single & (plane == 1))
    again = channel_pool(24, 20, 3000, random_state=4)
    np.testing.assert_array_equal(again[0], features)
    np.testing.assert_array_equal(again[1], channels)
    # without edge strength: the same features, those on channel 1 normalised
    plain_features, plain = channel_pool(24, 20, 3000, random_state=4, edge_strength=False)
    np.testing.assert_array_equal(plain_features, features)
    np.testing.assert_array_equal(plain, plane)


@pytest.mark.parametrize("normalize", [True, False])
@pytest.mark.parametrize("transpose", [False, True])
def test_channel_features_compiled_equal_numpy_twin(normalize, transpose):
    rng = np.random.default_rng(2)
    patches = rng.integers(0, 256, (150, 24, 24)).astype(np.uint8)
    grey = random_pool(24, 24, 300, random_state=0)
    extra, channels = channel_pool(24, 24, 300, random_state=1)
    features = np.concatenate([grey, extra])
    channels = np.r_[np.zeros(300, np.int8), channels]
    a = evaluate_features(features, patches, channels=channels, normalize=normalize,
                          transpose=transpose)
    b = evaluate_features_numpy(features, patches, channels=channels, normalize=normalize,
                                transpose=transpose)
    np.testing.assert_allclose(a, b, rtol=1e-6, atol=1e-6)
    # the grey block is what it was without channels; any feature order gives the same columns
    plain = evaluate_features(grey, patches, normalize=normalize, transpose=transpose)
    np.testing.assert_array_equal(a[:300] if transpose else a[:, :300], plain)
    order = rng.permutation(600)
    c = evaluate_features(features[order], patches, channels=channels[order], normalize=normalize)
    np.testing.assert_array_equal(c, (a.T if transpose else a)[:, order])
    # channel images made once and passed in (as training does block by block): the same values
    made = patch_channels(patches)
    d = evaluate_features(features, patches, channels=channels, normalize=normalize,
                          transpose=transpose, channel_images=made)
    np.testing.assert_array_equal(d, a)
    # ... and their integral images made in one work space, channel after channel
    scratch = integral_scratch(len(patches), *patches.shape[1:])
    e = evaluate_features(features, patches, channels=channels, normalize=normalize,
                          transpose=transpose, channel_images=made, scratch=scratch)
    np.testing.assert_array_equal(e, a)
    with pytest.raises(InputError, match="channel images must have shape"):
        evaluate_features(features, patches, channels=channels, channel_images=made[:-1])


def test_channel_feature_value_by_hand():
    """A vertical step of 100 grey levels between columns 2 and 3 of a 6 x 6 patch: the central
    differences at columns 2 and 3 are 100 (orientation 0 degrees, channel 2), 0 elsewhere. The
    one-rectangle feature over columns 1..4, rows 1..4 sums 4 rows x 2 columns x 100 = 800.
    Normalised: the patch is half 0, half 100, so sigma = 50 and the value is 800 / (50 * 36)."""
    patch = np.zeros((1, 6, 6), np.uint8)
    patch[0, :, 3:] = 100
    feature = np.zeros((1, 4, 5), np.int32)
    feature[0, 0] = [1, 1, 4, 4, 1]
    for channel, raw in ((1, 800.0), (2, 800.0), (3, 0.0), (0, 800.0)):
        got = evaluate_features(feature, patch, channels=[channel], normalize=False)
        assert got[0, 0] == raw
    value = evaluate_features(feature, patch, channels=[2])[0, 0]
    assert value == pytest.approx(800 / (50 * 36), rel=1e-6)
    # edge strength (code 8): the gradient magnitude's raw sum, 800, normalised or not; the
    # numpy twin agrees
    for normalize in (True, False):
        assert evaluate_features(feature, patch, channels=[EDGE_STRENGTH],
                                 normalize=normalize)[0, 0] == 800.0
        assert evaluate_features_numpy(feature, patch, channels=[EDGE_STRENGTH],
                                       normalize=normalize)[0, 0] == 800.0


def test_edge_strength_sees_contrast_that_normalised_features_do_not():
    """The same step at a quarter of the contrast (25 grey levels instead of 100): every
    normalised feature gives the same value (sigma falls with the step), the edge-strength feature
    a quarter (4 rows x 2 columns x 25 = 200 against 800)."""
    strong = np.zeros((1, 6, 6), np.uint8)
    strong[0, :, 3:] = 100
    faint = (strong // 4).astype(np.uint8)
    feature = np.zeros((1, 4, 5), np.int32)
    feature[0, 0] = [1, 1, 4, 4, 1]
    for channel in (0, 1, 2):
        a = evaluate_features(feature, strong, channels=[channel])[0, 0]
        b = evaluate_features(feature, faint, channels=[channel])[0, 0]
        assert a == pytest.approx(b, rel=1e-6)
    assert evaluate_features(feature, strong, channels=[EDGE_STRENGTH])[0, 0] == 800.0
    assert evaluate_features(feature, faint, channels=[EDGE_STRENGTH])[0, 0] == 200.0


def test_channel_features_refuse_other_than_8_bit():
    feature, channels = channel_pool(4, 4, 3, random_state=0)
    with pytest.raises(InputError, match="8-bit"):
        evaluate_features(feature, np.full((1, 4, 4), 300, np.int64), channels=channels)
    with pytest.raises(InputError, match="channels must be in"):
        evaluate_features(feature, np.zeros((1, 4, 4), np.uint8), channels=[9, 0, 0])


# ------------------------------------------------------------------ the scan of channel models

@pytest.fixture(scope="module")
def bank(tmp_path_factory):
    root = tmp_path_factory.mktemp("channel-scenario")
    render_scenario(root, train_images=12, test_images=2, seed=11)
    items = list(read_labels(root / "train" / "labels.csv", root / "train" / "images"))
    return harvest(root / "train" / "images", items, window=WINDOW, negatives_per_image=60, seed=0)


@pytest.fixture(scope="module", params=["bagged", "boosted"])
def channel_model(request, bank):
    clf = PatchClassifier(n_trees=20, pool=2000, mode=request.param, random_state=0,
                          channels="gradient")
    clf.fit(bank.patches, bank.labels, margin=bank.margin)
    model = clf.model_
    assert model.feature_channels is not None and (model.feature_channels > 0).sum() >= 5
    # the scan tests below cover edge-strength features too
    assert (model.feature_channels == EDGE_STRENGTH).any()
    return model


def every_window(model, **kw):
    kw.setdefault("threshold", 0.0)
    kw.setdefault("early_exit", False)
    return Engine(model, ScanSettings(**kw))


@pytest.mark.parametrize("early_exit", [False, True])
def test_compiled_scan_equals_numpy_twin_with_channels(channel_model, early_exit):
    # trees with an edge-strength node and trees without: both of the kernel's routes
    edge = (channel_model.feature_channels == EDGE_STRENGTH)[channel_model.node_features]
    assert edge.any(axis=1).any() and not edge.any(axis=1).all()
    rng = np.random.default_rng(5)
    for gray in (rng.integers(0, 256, (61, 83), dtype=np.uint8), render_frame(3, 160, 160).image):
        engine = every_window(channel_model, early_exit=early_exit, threshold=0.3,
                              scale_step=1.25)
        b1, r1, w1, t1 = engine.candidates(gray)
        b2, r2, w2, t2 = engine.candidates(gray, use_numpy=True)
        assert (w1, t1) == (w2, t2)
        np.testing.assert_array_equal(b1, b2)
        np.testing.assert_array_equal(r1, r2)


@pytest.mark.parametrize("overhang", [0.0, 0.5])
def test_scan_scores_equal_classifier_scores_at_scale_one_with_channels(channel_model, overhang):
    """Every scale-1 window, edges included: the scan's score == predict_proba of the patch cut by
    hand (border repeated past the image's edge). Exact for every window, not only those whose
    surroundings repeat its border: the patch's channels differ from the frame's only in the
    window's outermost ring of pixels, which no channel feature reads."""
    gray = render_frame(4, 160, 160).image
    boxes, raw, _, _ = every_window(channel_model, stride=3, overhang=overhang).candidates(gray)
    at1 = (boxes[:, 2] == WINDOW[0]) & (boxes[:, 3] == WINDOW[1])
    xs, ys = boxes[at1, 0].astype(int), boxes[at1, 1].astype(int)
    padded = np.pad(gray, 12, mode="edge")
    patches = np.stack([padded[y + 12:y + 36, x + 12:x + 36] for x, y in zip(xs, ys)])
    reference = PatchClassifier.from_model(channel_model).predict_proba(patches)[:, 1]
    np.testing.assert_allclose(final_scores(channel_model, raw[at1]), reference, rtol=0, atol=1e-9)
    assert reference.max() - reference.min() > 0.5


def test_pyramid_scores_equal_classifier_scores_on_the_shrunk_frame(channel_model):
    """A model with channel features is scanned on an image pyramid: at every scale the frame is
    shrunk with area averaging (as harvest shrinks a labelled box with ``cv2.resize``, INTER_AREA;
    the scan reads the means off the frame's integral image, ``scan.shrink_level``, held to
    cv2's within one grey level in tests/test_scan.py) and its windows are the window's own size.
    So every window's score at every scale is predict_proba of the patch cut by hand from the
    frame shrunk to that level's size."""
    from detector.scan import level_edges, shrink_level

    gray = render_frame(4, 200, 170).image
    boxes, raw, _, _ = every_window(channel_model, stride=3, overhang=0.0,
                                    scale_step=1.3).candidates(gray)
    sizes = np.unique(np.round(boxes[:, 2], 9))
    assert len(sizes) >= 4                      # scales 1, 1.3, 1.69, 2.197, ...
    checked = 0
    for width in sizes[1:]:
        at = np.flatnonzero(np.isclose(boxes[:, 2], width))
        fx = boxes[at[0], 2] / WINDOW[0]
        fy = boxes[at[0], 3] / WINDOW[1]
        lw, lh = int(round(200 / fx)), int(round(170 / fy))   # the level's size
        ii = np.zeros((171, 201)); ii[1:, 1:] = gray.cumsum(0).cumsum(1)
        level = shrink_level(ii, (level_edges(200, lw), level_edges(170, lh)), use_numpy=True)
        xs = np.rint(boxes[at, 0] / fx).astype(int)
        ys = np.rint(boxes[at, 1] / fy).astype(int)
        np.testing.assert_allclose(xs * fx, boxes[at, 0], rtol=1e-12)  # on the level's grid
        patches = np.stack([level[y:y + WINDOW[1], x:x + WINDOW[0]] for x, y in zip(xs, ys)])
        reference = PatchClassifier.from_model(channel_model).predict_proba(patches)[:, 1]
        np.testing.assert_allclose(final_scores(channel_model, raw[at]), reference, rtol=0,
                                   atol=1e-9)
        checked += len(at)
    assert checked > 500


def test_pyramid_sees_the_gradient_training_saw():
    """Why channel models scan a pyramid: a textured object twice the window's size, shrunk to a
    patch with area averaging, shows less gradient than the same pixels read in the frame, where
    the fine texture is still there. Rectangle scaling (dividing the frame's gradient by the scale)
    would read 3.1 times the patch's mean gradient magnitude on this checkerboard of 2-pixel
    squares (contrast 40) over a ramp: shrunk twice, the squares become 1-pixel squares, which
    central differences do not see (``I[x + 1] - I[x - 1]`` compares two squares of one colour), so
    only the ramp and the noise are left (measured 1.5 to 3 times on the cross-data sets' textured
    objects); the level of the pyramid reads the patch's exactly."""
    import cv2

    rng = np.random.default_rng(0)
    yy, xx = np.mgrid[:48, :48]
    texture = ((xx // 2 + yy // 2) % 2) * 40 + rng.integers(0, 20, (48, 48))
    big = np.clip(60 + 2 * xx + texture, 0, 255).astype(np.uint8)
    patch = cv2.resize(big, WINDOW, interpolation=cv2.INTER_AREA)
    inner = (slice(1, -1), slice(1, -1))
    patch_mean = patch_channels(patch[None])[0, 0][inner].mean()
    frame_mean = gradient_channels(big)[0][2:-2, 2:-2].mean() / 2.0   # rectangle scaling
    assert frame_mean > 2.5 * patch_mean
    level_mean = gradient_channels(cv2.resize(big, WINDOW, interpolation=cv2.INTER_AREA))[0][inner]
    assert level_mean.mean() == patch_mean


# ------------------------------------------------------------------ the model file

def test_channel_model_file_round_trip(channel_model, tmp_path):
    path = tmp_path / "channels.npz"
    save_model(path, channel_model)
    with np.load(path, allow_pickle=False) as npz:
        assert int(npz["format_version"]) == FORMAT_VERSION >= CHANNELS_FORMAT_VERSION
        assert npz["feature_channels"].dtype == np.int8
    loaded = load_model(path)
    np.testing.assert_array_equal(loaded.feature_channels, channel_model.feature_channels)
    gray = render_frame(6, 160, 160).image
    a = Engine(channel_model, ScanSettings(threshold=0.2)).scan(gray)
    b = Engine(loaded, ScanSettings(threshold=0.2)).scan(gray)
    np.testing.assert_array_equal(a.boxes, b.boxes)
    np.testing.assert_array_equal(a.scores, b.scores)


def test_summary_and_inspection_count_the_edge_strength_features(channel_model):
    from detector.reporting.inspection import model_report, report_lines

    n = int((channel_model.feature_channels == EDGE_STRENGTH).sum())
    line = next(ln for ln in channel_model.summary() if ln.startswith("features used:"))
    assert line.endswith(f"(contrast-normalised values; {n} of edge strength, not normalised)")
    report = model_report(channel_model)
    assert report["edge_strength_features"] == n
    assert any(f"contrast-normalised values; {n} of edge strength, not normalised (" in ln
               for ln in report_lines(report))


def test_grey_models_keep_format_one_and_scan_as_before(bank, tmp_path):
    """A grey-only model is written without feature_channels,
    loads with no channels, and its scan reads the one-plane integral image."""
    clf = PatchClassifier(n_trees=10, pool=800, random_state=0).fit(
        bank.patches, bank.labels, margin=bank.margin)
    same = PatchClassifier(n_trees=10, pool=800, random_state=0, channels="grey").fit(
        bank.patches, bank.labels, margin=bank.margin)
    arrays = model_arrays(clf.model_)
    assert int(arrays["format_version"]) == FORMAT_VERSION and "feature_channels" not in arrays
    for name, value in model_arrays(same.model_).items():
        if name != "metadata":
            np.testing.assert_array_equal(value, arrays[name])
    path = tmp_path / "grey.npz"
    save_model(path, clf.model_)
    loaded = load_model(path)
    assert loaded.feature_channels is None
    engine = Engine(loaded, ScanSettings(threshold=0.2))
    assert engine.channels is None
    gray = render_frame(6, 160, 160).image
    a = engine.scan(gray)
    b = Engine(clf.model_, ScanSettings(threshold=0.2)).scan(gray, use_numpy=True)
    np.testing.assert_array_equal(a.boxes, b.boxes)
    np.testing.assert_allclose(a.scores, b.scores, rtol=0, atol=1e-12)


@pytest.mark.parametrize("change, message", [
    (dict(format_version=1), "model array 'feature_channels' needs format version 2"),
    (dict(feature_channels=9), "model feature channels must be in 0..8"),
    (dict(format_version=4), "model feature channel 8 \\(edge strength\\) needs format version 5"),
])
def test_bad_channel_files_are_refused(channel_model, tmp_path, change, message):
    arrays = model_arrays(channel_model)
    if change.get("format_version") == 4:  # corners, but no edge strength yet
        assert (arrays["feature_channels"] == EDGE_STRENGTH).any()
        arrays["format_version"] = np.array(4, np.int64)
    elif "format_version" in change:   # a format 1 file: rectangles as (x, y, width, height)
        arrays["format_version"] = np.array(change["format_version"], np.int64)
        arrays["features"] = from_corners(arrays["features"])
    else:
        arrays["feature_channels"] = arrays["feature_channels"].copy()
        arrays["feature_channels"][0] = change["feature_channels"]
    path = tmp_path / "bad.npz"
    np.savez(path, **arrays)
    with pytest.raises(InputError, match=message):
        load_model(path)


# ------------------------------------------------------- large levels scanned in bands of rows

@pytest.mark.parametrize("budget", [30_000, 90_000])
def test_levels_scanned_in_bands_find_what_the_whole_level_finds(channel_model, monkeypatch,
                                                                 budget):
    """A level whose tables exceed BAND_BYTES is scanned in bands of rows, each with its own
    tables (detector.scan.level_bands). The windows, their order, the trees evaluated and every
    window's box are those of the whole level's scan; the scores are the same up to float64
    rounding (a band's integral values are smaller, so the rectangle weights multiply other
    numbers; the window sums themselves are the same integers). The budgets here cut a 200 x 170
    frame's first levels into several bands."""
    import detector.scan._engine as engine_module

    gray = render_frame(6, 200, 170).image
    # every window kept (no exit, threshold 0), then the default exits at a low threshold
    for kw, least in ((dict(early_exit=False, threshold=0.0), 10_000),
                      (dict(early_exit=True, threshold=0.05), 30)):
        kw.update(stride=2, overhang=0.25, scale_step=1.3)
        monkeypatch.setattr(engine_module, "BAND_BYTES", 64 << 20)
        whole = every_window(channel_model, **kw)
        # the plans are made (and kept) on the first look at a frame size
        assert all(lv.bands is None for lv in whole._levels(gray.shape[::-1]))
        monkeypatch.setattr(engine_module, "BAND_BYTES", budget)
        banded = every_window(channel_model, **kw)
        levels = banded._levels(gray.shape[::-1])
        cut = [len(lv.bands[1]) for lv in levels if lv.bands is not None]
        assert len(cut) >= 2 and max(cut) >= 3
        b1, r1, w1, t1 = whole.candidates(gray)
        b2, r2, w2, t2 = banded.candidates(gray)
        assert (w1, t1) == (w2, t2) and len(r1) >= least
        np.testing.assert_array_equal(b1, b2)
        np.testing.assert_allclose(r2, r1, rtol=0, atol=1e-9)
        # the numpy twin on the same bands: the same numbers exactly
        b3, r3, w3, t3 = banded.candidates(gray, use_numpy=True)
        assert (w3, t3) == (w2, t2)
        np.testing.assert_array_equal(b3, b2)
        np.testing.assert_array_equal(r3, r2)


@settings(max_examples=60, deadline=None)
@given(height=st.integers(30, 400), window=st.integers(4, 40), step=st.integers(1, 5),
       first=st.integers(0, 6), row_bytes=st.integers(1, 50), budget=st.integers(1, 4000))
def test_level_bands_cover_every_window_once_with_a_row_of_context(height, window, step, first,
                                                                   row_bytes, budget):
    """Every window top lands in exactly one band, in order; every band has the same rows, lies
    inside the level, and holds its windows with one row above and below them (or the level's
    edge): the rows a window's gradient reads."""
    from detector.scan import level_bands

    ys = np.arange(first, height - window + 1, step)
    got = level_bands(ys, height, window, row_bytes, budget=budget)
    if got is None:
        assert (height + 1) * row_bytes <= budget or len(ys) == 0 or \
            max(4 * (window + 1), budget // row_bytes - 1) >= height
        return
    rows, bands = got
    assert 4 * (window + 1) <= rows < height
    seen = []
    for top, a, b in bands:
        assert 0 <= top and top + rows <= height and a < b
        inside = ys[a:b]
        assert inside[0] - 1 >= top or top == 0
        assert inside[-1] + window + 1 <= top + rows or top + rows == height
        seen.extend(range(a, b))
    assert seen == list(range(len(ys)))
