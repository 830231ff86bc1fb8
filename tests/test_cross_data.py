"""The cross-data benchmark's pieces: the data-set builders (benchmarks/datasets.py), the
channel-features peer (benchmarks/channel_peer.py) and the peers' training in a process of its own
(benchmarks/peer_train.py).

References: the labels CSV contract as ``detector.io.labels.read_labels`` checks it;
``skimage.measure.regionprops`` (bounding boxes of components); ``cv2.sepFilter2D`` (the triangle
filters); ``sklearn.ensemble.HistGradientBoostingClassifier.decision_function`` (the peer's flat
trees must give its values); the modules' own docstring examples, which run here because
``benchmarks/`` is outside the suite's doctest paths.
"""

from __future__ import annotations

import doctest
import importlib.util
import os
import sys
from pathlib import Path

import cv2
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from detector.io.labels import read_labels

BENCH = Path(__file__).resolve().parents[1] / "benchmarks"


def _load(name):
    # benchmarks/ is not a package; the peers set thread counts in os.environ when imported,
    # which must not leak into the other tests of this process
    saved = dict(os.environ)
    sys.path.insert(0, str(BENCH))
    try:
        spec = importlib.util.spec_from_file_location(f"patchwood_bench_{name}", BENCH / f"{name}.py")
        module = importlib.util.module_from_spec(spec)
        sys.modules[spec.name] = module  # dataclasses look their module up there
        spec.loader.exec_module(module)
        if name == "channel_peer":
            module._baseline()
    finally:
        sys.path.remove(str(BENCH))
        os.environ.clear()
        os.environ.update(saved)
    return module


@pytest.fixture(autouse=True)
def _one_thread():
    # scikit-learn's gradient boosting runs OpenMP threads, which spin badly on a busy 2-core
    # machine; these small fits need none
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1):
        yield


ds = _load("datasets")
cp = _load("channel_peer")
cd = _load("cross_data")
pt = _load("peer_train")


@pytest.mark.parametrize("module", [ds, cp, cd], ids=["datasets", "channel_peer", "cross_data"])
def test_docstring_examples(module):
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS)
    assert result.attempted > 0 and result.failed == 0


@pytest.mark.parametrize("name", list(ds.SETS))
def test_every_set_follows_the_labels_contract_and_its_seed(tmp_path, name):
    """Two builds with the same seed write the same bytes; another seed, other images. The labels
    read back through the project's reader with the images (every image exists, no box outside
    its image), the images are 320x240 to 640x480, and the split has the requested counts."""
    first = ds.build_set(name, tmp_path / "a", seed=3, train_images=3, test_images=2)
    again = ds.build_set(name, tmp_path / "b", seed=3, train_images=3, test_images=2)
    other = ds.build_set(name, tmp_path / "c", seed=4, train_images=3, test_images=2)
    for split, n in (("train", 3), ("test", 2)):
        labels = first / split / "labels.csv"
        assert labels.read_bytes() == (again / split / "labels.csv").read_bytes()
        lf = read_labels(labels, images_dir=first / split / "images")
        assert len(lf) == n and lf.clipped == 0 and lf.duplicates == 0
        for it in lf:
            a = (first / split / "images" / it.image).read_bytes()
            assert a == (again / split / "images" / it.image).read_bytes()
            w, h = lf.image_sizes[it.image]
            assert 320 <= w <= 640 and 240 <= h <= 480
            assert np.all(it.boxes[:, 2:] > 0)
    assert any((first / "train" / "images" / f).read_bytes()
               != (other / "train" / "images" / f).read_bytes()
               for f in os.listdir(first / "train" / "images"))
    info = ds.set_info(first)
    assert info["counts"]["train"]["images"] == 3 and info["rule"]
    # reused from the cache, not rebuilt
    stamp = (first / "set.json").stat().st_mtime_ns
    ds.build_set(name, tmp_path / "a", seed=3, train_images=3, test_images=2)
    assert (first / "set.json").stat().st_mtime_ns == stamp


def test_a_peer_trained_in_its_own_process_equals_one_trained_here(tmp_path):
    """benchmarks/peer_train.py, as cross_data runs it: the pickled HOG detector scans a test
    image as the same peer trained in this process does (same seed, same bank, same mining)."""
    import pickle
    import subprocess

    from detector.io.images import read_gray

    root = ds.build_set("cups", tmp_path / "set", seed=3, train_images=3, test_images=1)
    out = tmp_path / "hog.pkl"
    subprocess.run([sys.executable, str(BENCH / "peer_train.py"), "hog", str(root), str(out),
                    "--seed", "5", "--jobs", "1"], check=True, timeout=600,
                   stdin=subprocess.DEVNULL, capture_output=True)
    with open(out, "rb") as fh:
        child = pickle.load(fh)
    det, mined, phases = pt.train_peer("hog", root, 5, 1)
    assert child["mined"] == mined and len(mined) == pt.HOG_MINING_ROUNDS
    assert set(child["phases"]) == set(phases) == {"imports", "read", "harvest_and_train"}
    assert child["detector"].window == det.window == pt.hog_window(
        read_labels(root / "train" / "labels.csv").items)
    test_image = next((root / "test" / "images").iterdir())
    frame = read_gray(test_image)
    (boxes_a, scores_a, *_), (boxes_b, scores_b, *_) = child["detector"].scan(frame), det.scan(frame)
    np.testing.assert_array_equal(boxes_a, boxes_b)
    np.testing.assert_array_equal(scores_a, scores_b)


def test_sources_are_files_inside_the_packages():
    for package, name in [("skimage", "coins.png"), ("skimage", "brick.png"),
                          ("sklearn", "china.jpg")]:
        path = ds.source_path(package, name)
        assert path.is_file()
    with pytest.raises(FileNotFoundError):
        ds.source_path("skimage", "no_such_image.png")


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), min_area=st.integers(1, 6))
def test_boxes_of_mask_equal_skimage_regionprops(seed, min_area):
    from skimage.measure import label, regionprops

    mask = np.random.default_rng(seed).random((23, 31)) < 0.3
    ours = ds.boxes_of_mask(mask, min_area)
    ref = [(r.bbox[1], r.bbox[0], r.bbox[3] - r.bbox[1], r.bbox[2] - r.bbox[0])
           for r in regionprops(label(mask, connectivity=2)) if r.area >= min_area]
    assert sorted(map(tuple, ours.tolist())) == sorted(ref)


def test_paste_box_is_the_alpha_bounding_box():
    # a 5 x 7 alpha with its >= 0.5 part in rows 1-3, columns 2-5, pasted at (10, 20): the box is
    # x 10 + 2 = 12, y 20 + 1 = 21, width 4, height 3
    alpha = np.zeros((5, 7), np.float32)
    alpha[1:4, 2:6] = 1.0
    alpha[0, 0] = 0.4  # below one half: blended, not part of the box
    canvas = np.full((40, 40), 10.0, np.float32)
    box = ds.paste(canvas, ds.Sprite(np.full((5, 7), 210, np.float32), alpha), 10, 20)
    assert box == (12.0, 21.0, 4.0, 3.0)
    assert canvas[21, 12] == 210 and canvas[20, 10] == pytest.approx(10 * 0.6 + 210 * 0.4)


def test_triangle_filters_equal_cv2():
    rng = np.random.default_rng(1)
    image = rng.random((3, 17, 23)).astype(np.float32)
    for radius in (1, 5):
        k = np.r_[np.arange(1, radius + 2), np.arange(radius, 0, -1)].astype(np.float32)
        k /= k.sum()
        ref = np.stack([cv2.sepFilter2D(im, cv2.CV_32F, k, k, borderType=cv2.BORDER_REPLICATE)
                        for im in image])
        np.testing.assert_allclose(cp._triangle(image, radius), ref, rtol=1e-5, atol=1e-6)


def test_channels_of_a_stack_equal_channels_one_by_one_and_the_gradient_by_hand():
    rng = np.random.default_rng(2)
    stack = rng.integers(0, 256, (4, 16, 20)).astype(np.uint8)
    together = cp.channels(stack)
    for k in range(4):
        np.testing.assert_array_equal(together[k], cp.channels(stack[k]))
    c = together[0]
    # the orientation channels split the magnitude: they sum to it, and each pixel's magnitude
    # sits in one bin
    np.testing.assert_allclose(c[..., 2:].sum(-1), c[..., 1], rtol=1e-6)
    assert np.all((c[..., 2:] > 0).sum(-1) <= 1)
    # a vertical step edge: gradient along x only, orientation 0 degrees (bin 0)
    step = np.zeros((12, 12), np.uint8)
    step[:, 6:] = 255
    ch = cp.channels(step)
    assert ch[6, 6, 1] > 0 and ch[6, 6, 2] == ch[6, 6, 1] and np.all(ch[6, 6, 3:] == 0)
    # aggregation: 4 x 4 block sums before the [1 2 1] / 4 smoothing
    raw = c[:16, :20].reshape(4, 4, 5, 4, 8).sum(axis=(1, 3))
    expect = cp._triangle(raw, 1, axes=(0, 1))
    np.testing.assert_allclose(cp.aggregate(c), expect, rtol=1e-6)


def test_flat_trees_equal_sklearn_decision_function():
    from sklearn.ensemble import HistGradientBoostingClassifier

    rng = np.random.default_rng(3)
    X = rng.normal(size=(300, 12)).astype(np.float32)
    y = (X[:, 0] + 0.5 * X[:, 3] ** 2 + rng.normal(0, 0.5, 300) > 0.5).astype(int)
    # min_samples_leaf 40 leaves some children unsplit: leaves at depth 1 go through the padding
    clf = HistGradientBoostingClassifier(max_depth=2, max_iter=40, min_samples_leaf=40,
                                         random_state=0).fit(X, y)
    flat = cp.FlatTrees(clf)
    assert np.isinf(flat.thresholds[:, 1:]).any()  # the padding was exercised
    Xt = rng.normal(size=(500, 12)).astype(np.float32)
    np.testing.assert_allclose(flat.decision(Xt, chunk=128), clf.decision_function(Xt),
                               rtol=0, atol=1e-10)


def test_channel_peer_scan_reads_the_same_numbers_as_its_patches():
    """A window read from a frame's block grid equals the patch features of that crop where the
    crop's border effects do not reach: a frame made of one patch repeated scores its windows at
    block-aligned positions like the patch itself, up to the border cells."""
    rng = np.random.default_rng(4)
    patches = rng.integers(0, 60, (80, 32, 32)).astype(np.uint8)
    patches[:40, 8:24, 8:24] = 230
    labels = np.r_[np.ones(40), np.zeros(40)]
    det = cp.ChannelBoost(window=(32, 32), n_trees=(30,)).fit(patches, labels)
    frame = np.full((96, 128), 30, np.uint8)
    frame[40:56, 56:72] = 230  # a bright square where the window at (48, 32) sees it centred
    boxes, scores, windows = det.candidates(frame, threshold=-np.inf)
    assert windows == len(scores) > 0
    best = boxes[np.argmax(scores)]
    assert tuple(best[:2]) == (48.0, 32.0) and scores.max() > 0
