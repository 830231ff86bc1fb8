"""Rectangle-difference features: counts, enumeration, random pools, evaluation.

References: skimage.feature.haar_like_feature_coord and skimage.feature.haar_like_feature (reference
library) for the feature set and its raw values; the count 162,336 for a 24 x 24 window (the count
widely quoted for these five shapes); brute-force nested loops and slow per-pixel sums written here;
hand-worked examples with the arithmetic in comments; the plain-numpy twin of the compiled kernel.
"""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from skimage.feature import haar_like_feature, haar_like_feature_coord
from skimage.transform import integral_image as skimage_integral_image

from detector.errors import InputError
from detector.features import (SHAPES, count_features, enumerate_features, evaluate_features,
                               evaluate_features_numpy, feature_corners, random_pool)
from detector.features import integral_images, integral_scratch, squared_integral_images

# skimage's name for each of our shapes, and the weights of its rectangles in its own order
# (found by fitting skimage 0.26's values to the rectangle sums: right minus left, bottom minus top,
# middle minus both sides, and for four rectangles listed TL, TR, BR, BL: -TL + TR - BR + BL).
SKIMAGE_TYPES = {
    "two-side-by-side": ("type-2-x", (-1, 1)),
    "two-stacked": ("type-2-y", (-1, 1)),
    "three-side-by-side": ("type-3-x", (-1, 1, -1)),
    "three-stacked": ("type-3-y", (-1, 1, -1)),
    "four-diagonal": ("type-4", (-1, 1, -1, 1)),
}
# each shape as (blocks across, blocks down, (block column, block row, weight) per rectangle),
# written out again here for the brute-force enumeration
BLOCKS = {
    "two-side-by-side": (2, 1, [(0, 0, -1), (1, 0, 1)]),
    "two-stacked": (1, 2, [(0, 0, -1), (0, 1, 1)]),
    "three-side-by-side": (3, 1, [(0, 0, -1), (1, 0, 1), (2, 0, -1)]),
    "three-stacked": (1, 3, [(0, 0, -1), (0, 1, 1), (0, 2, -1)]),
    "four-diagonal": (2, 2, [(0, 0, -1), (1, 0, 1), (1, 1, -1), (0, 1, 1)]),
}


def skimage_features(width, height, shape):
    """skimage's features of one shape as our (F, 4, 5) array, in skimage's order."""
    kind, weights = SKIMAGE_TYPES[shape]
    coords, _ = haar_like_feature_coord(width, height, kind)
    corners = np.array(coords.tolist(), dtype=np.int64)    # (F, k, 2 corners, (row, column))
    features = np.zeros((len(corners), 4, 5), dtype=np.int32)
    k = corners.shape[1]
    features[:, :k, 0] = corners[:, :, 0, 1]
    features[:, :k, 1] = corners[:, :, 0, 0]
    features[:, :k, 2] = corners[:, :, 1, 1] - corners[:, :, 0, 1] + 1
    features[:, :k, 3] = corners[:, :, 1, 0] - corners[:, :, 0, 0] + 1
    features[:, :k, 4] = weights
    return features


def brute_force(width, height, shape):
    """Every placement of a shape by nested loops, as a set of flattened feature tuples."""
    across, down, layout = BLOCKS[shape]
    found = set()
    for v in range(1, height + 1):
        for u in range(1, width + 1):
            for y in range(height):
                for x in range(width):
                    if x + across * u > width or y + down * v > height:
                        continue
                    rows = [(x + c * u, y + r * v, u, v, wt) for c, r, wt in layout]
                    rows += [(0, 0, 0, 0, 0)] * (4 - len(rows))
                    found.add(tuple(np.ravel(rows).tolist()))
    return found


def rows_of(features):
    return [tuple(row) for row in np.asarray(features).reshape(len(features), 20).tolist()]


def sort_rows(features):
    flat = np.asarray(features).reshape(len(features), 20)
    return flat[np.lexsort(flat.T[::-1])]


def random_patches(n, width, height, seed, dtype=np.uint8, low=0, high=256):
    rng = np.random.default_rng(seed)
    return rng.integers(low, high, (n, height, width)).astype(dtype)


# ----------------------------------------------------------------------------------------------
# counts and enumeration


def test_24x24_count_is_162336_and_rectangle_sets_equal_skimage_per_shape():
    assert count_features(24, 24) == 162_336
    everything = enumerate_features(24, 24)
    assert len(everything) == 162_336 and everything.dtype == np.int32
    per_shape = {"two-side-by-side": 43_200, "two-stacked": 43_200, "three-side-by-side": 27_600,
                 "three-stacked": 27_600, "four-diagonal": 20_736}
    start = 0
    for shape, expected in per_shape.items():
        theirs = skimage_features(24, 24, shape)
        ours = everything[start:start + expected]
        start += expected
        assert count_features(24, 24, [shape]) == len(theirs) == expected
        np.testing.assert_array_equal(sort_rows(ours), sort_rows(theirs))


@pytest.mark.parametrize("width, height", [(7, 5), (5, 9), (1, 6), (13, 2)])
def test_rectangle_sets_equal_skimage(width, height):
    for shape in SHAPES:
        ours = enumerate_features(width, height, [shape])
        assert ours.dtype == np.int32 and ours.shape[1:] == (4, 5)
        if not count_features(width, height, [shape]):
            assert len(ours) == 0
            continue
        np.testing.assert_array_equal(sort_rows(ours), sort_rows(skimage_features(width, height, shape)))


def test_small_windows_enumeration_matches_brute_force_count_and_pool():
    for width in range(1, 9):
        for height in range(1, 9):
            everything = enumerate_features(width, height)
            assert len(everything) == count_features(width, height)
            start = 0
            for shape in SHAPES:
                part = everything[start:start + count_features(width, height, [shape])]
                start += len(part)
                expected = brute_force(width, height, shape)
                assert len(part) == len(expected) and set(rows_of(part)) == expected
            # a pool of everything decodes every index: it must reproduce the enumeration order
            np.testing.assert_array_equal(random_pool(width, height, len(everything) + 3), everything)
            np.testing.assert_array_equal(
                random_pool(width, height, len(everything), random_state=5), everything)


def test_enumeration_order_is_documented_order():
    # 3 x 2 window, two-side-by-side (2 blocks across): u = 1 fits at x = 0, 1; v = 1 at y = 0, 1
    # and v = 2 at y = 0. Order: (v, y) slowest, then (u, x).
    features = enumerate_features(3, 2, ["two-side-by-side"])
    left = features[:, 0, :4].tolist()
    assert left == [[0, 0, 1, 1], [1, 0, 1, 1], [0, 1, 1, 1], [1, 1, 1, 1], [0, 0, 1, 2], [1, 0, 1, 2]]
    assert features[:, 1, 0].tolist() == [1, 2, 1, 2, 1, 2]      # right rectangle at x + u
    # shapes come in the order given
    both = enumerate_features(3, 2, ["two-stacked", "two-side-by-side"])
    np.testing.assert_array_equal(both[count_features(3, 2, ["two-stacked"]):], features)


def test_count_closed_form_for_large_windows():
    # along one axis of length L a shape b blocks long fits sum_{u=1}^{L//b} (L - b u + 1) ways;
    # 64 x 128 two-side-by-side: sum_{u=1}^{32} (65 - 2u) = 32 * 65 - 32 * 33 = 1024 across,
    # sum_{v=1}^{128} (129 - v) = 128 * 129 - 128 * 129 / 2 = 8256 down -> 8,454,144
    assert count_features(64, 128, ["two-side-by-side"]) == 1024 * 8256 == 8_454_144
    total = 0
    for across, down in [(2, 1), (1, 2), (3, 1), (1, 3), (2, 2)]:
        total += (sum(64 - across * u + 1 for u in range(1, 64 // across + 1))
                  * sum(128 - down * v + 1 for v in range(1, 128 // down + 1)))
    assert count_features(64, 128) == total


@pytest.mark.parametrize("call", [
    lambda: count_features(0, 24),
    lambda: count_features(24, 2.5),
    lambda: enumerate_features(24, 24, ["two-diagonal"]),
    lambda: enumerate_features(24, 24, ["two-stacked", "two-stacked"]),
    lambda: random_pool(24, 24, -1),
    lambda: random_pool(24, 24, 3.0),
    lambda: random_pool(24, 24, 10, random_state="seed"),
])
def test_bad_arguments_raise_one_line_input_error(call):
    with pytest.raises(InputError) as error:
        call()
    assert "\n" not in str(error.value)


# ----------------------------------------------------------------------------------------------
# random pools


def test_random_pool_is_a_sorted_unique_subset_and_seed_stable():
    everything = enumerate_features(24, 24)
    index_of = {row: i for i, row in enumerate(rows_of(everything))}
    pool = random_pool(24, 24, 20_000, random_state=11)
    assert pool.shape == (20_000, 4, 5) and pool.dtype == np.int32
    positions = np.array([index_of[row] for row in rows_of(pool)])      # KeyError if not a subset
    assert (np.diff(positions) > 0).all()          # unique and in enumeration order
    np.testing.assert_array_equal(pool, random_pool(24, 24, 20_000, random_state=11))
    np.testing.assert_array_equal(
        pool, random_pool(24, 24, 20_000, random_state=np.random.default_rng(11)))
    assert not np.array_equal(pool, random_pool(24, 24, 20_000, random_state=12))
    # uniform over the enumeration: 10 equal bins of indices each expect 2,000 draws; without
    # replacement the standard deviation is below sqrt(20000 * 0.1 * 0.9) = 42, so 5 sd = 212
    counts = np.bincount(positions * 10 // len(everything), minlength=10)
    assert np.abs(counts - 2000).max() < 212
    # and each shape gets its share of the count (43,200 / 162,336 = 26.6 % for two-rectangle ones)
    for shape in SHAPES:
        share = count_features(24, 24, [shape]) / 162_336
        drawn = _shape_mask(pool, shape).sum()
        assert abs(drawn - 20_000 * share) < 5 * np.sqrt(20_000 * share * (1 - share))


def _shape_mask(features, shape):
    """Which features have the block layout of ``shape`` (from their rectangle positions)."""
    across, down, layout = BLOCKS[shape]
    mask = np.ones(len(features), dtype=bool)
    for slot, (column, row, weight) in enumerate(layout):
        mask &= features[:, slot, 0] == features[:, 0, 0] + column * features[:, 0, 2]
        mask &= features[:, slot, 1] == features[:, 0, 1] + row * features[:, 0, 3]
        mask &= features[:, slot, 4] == weight
    mask &= (features[:, len(layout):, 4] == 0).all(axis=1)
    return mask


def test_random_pool_on_a_huge_enumeration_decodes_valid_features():
    width, height = 400, 300
    total = count_features(width, height)
    assert total > 2_000_000_000           # far too many to build
    pool = random_pool(width, height, 3000, random_state=2)
    assert pool.shape == (3000, 4, 5)
    assert len(np.unique(pool.reshape(3000, -1), axis=0)) == 3000
    used = pool[:, :, 4] != 0
    rectangles = pool[used]
    assert rectangles[:, :2].min() >= 0 and rectangles[:, 2:4].min() >= 1
    assert (rectangles[:, 0] + rectangles[:, 2]).max() <= width
    assert (rectangles[:, 1] + rectangles[:, 3]).max() <= height
    assert sum(_shape_mask(pool, shape).sum() for shape in SHAPES) == 3000


def test_random_pool_edge_sizes():
    assert random_pool(24, 24, 0, random_state=0).shape == (0, 4, 5)
    np.testing.assert_array_equal(random_pool(5, 4, 10**9), enumerate_features(5, 4))
    pool = random_pool(24, 24, 50, random_state=0, shapes=["four-diagonal"])
    assert _shape_mask(pool, "four-diagonal").all()


# ----------------------------------------------------------------------------------------------
# evaluation against skimage and by hand


@pytest.mark.parametrize("width, height, count", [(9, 7, 3), (6, 11, 3), (16, 12, 2)])
def test_raw_values_equal_skimage(width, height, count):
    patches = random_patches(count, width, height, seed=width)
    for shape in SHAPES:
        features = skimage_features(width, height, shape)
        if not len(features):
            continue
        ours = evaluate_features(features, patches, normalize=False)
        for n, patch in enumerate(patches):
            theirs = haar_like_feature(skimage_integral_image(patch), 0, 0, width, height,
                                       feature_type=SKIMAGE_TYPES[shape][0])
            np.testing.assert_array_equal(ours[n], theirs)


def test_raw_values_equal_skimage_on_signed_patches():
    patches = random_patches(2, 8, 9, seed=3, dtype=np.int16, low=-300, high=300)
    for shape in SHAPES:
        features = skimage_features(8, 9, shape)
        ours = evaluate_features(features, patches, normalize=False)
        for n, patch in enumerate(patches):
            theirs = haar_like_feature(skimage_integral_image(patch.astype(np.int64)), 0, 0, 8, 9,
                                       feature_type=SKIMAGE_TYPES[shape][0])
            np.testing.assert_array_equal(ours[n], theirs)


def test_hand_worked_two_by_two():
    # patch [[1, 2], [3, 4]], every feature of a 2 x 2 window in enumeration order:
    #   two-side-by-side  row 0:    -1 + 2 = 1;  row 1: -3 + 4 = 1;  both rows: -(1+3) + (2+4) = 2
    #   two-stacked       column 0: -1 + 3 = 2;  column 1: -2 + 4 = 2;  both: -(1+2) + (3+4) = 4
    #   four-diagonal     -TL + TR - BR + BL = -1 + 2 - 4 + 3 = 0     (no three-rectangle fits)
    patch = np.array([[[1, 2], [3, 4]]], dtype=np.uint8)
    features = enumerate_features(2, 2)
    assert len(features) == count_features(2, 2) == 7
    raw = evaluate_features(features, patch, normalize=False)
    np.testing.assert_array_equal(raw, [[1, 1, 2, 2, 2, 4, 0]])
    # mean 10/4 = 2.5, variance 30/4 - 2.5**2 = 1.25, sigma = 1.118034; the weighted areas are all
    # 0 (-1*A + 1*A), so normalised = raw / (sigma * 4) = raw / 4.472136: 1 -> 0.2236068
    normalised = evaluate_features(features, patch)
    np.testing.assert_allclose(normalised, raw / (np.sqrt(1.25) * 4), rtol=1e-6)
    assert normalised[0, 0] == pytest.approx(0.2236068, abs=1e-7)


def test_hand_worked_three_rectangles_use_the_weighted_area():
    # window 3 x 1, patch [1, 5, 3]: mean 3, variance (1+25+9)/3 - 9 = 8/3, sigma = 1.6329932
    # three-side-by-side: raw = -1 + 5 - 3 = 1; weighted area = -1 + 1 - 1 = -1
    #   normalised = (1 - 3 * (-1)) / (1.6329932 * 3) = 4 / 4.8989795 = 0.8164966
    # two-side-by-side at x = 0: raw -1 + 5 = 4 -> 4 / 4.8989795 = 0.8164966
    #                  at x = 1: raw -5 + 3 = -2 -> -0.4082483
    patch = np.array([[[1, 5, 3]]], dtype=np.uint8)
    features = enumerate_features(3, 1, ["two-side-by-side", "three-side-by-side"])
    np.testing.assert_array_equal(evaluate_features(features, patch, normalize=False), [[4, -2, 1]])
    np.testing.assert_allclose(evaluate_features(features, patch),
                               [[0.8164966, -0.4082483, 0.8164966]], rtol=1e-6)


#: The deviation floor of the slow reference, in grey levels: DEVELOPERS.md states the window's
#: standard deviation is "floored at 1 grey level" (kept here, not read from the module under test).
FLOOR = 1.0


def slow_normalised(features, patch):
    """Raw value on the standardised float patch, divided by the window area, pixel by pixel."""
    patch = patch.astype(np.float64)
    standard = (patch - patch.mean()) / max(patch.std(), FLOOR)
    values = []
    for feature in features:
        total = 0.0
        for x, y, w, h, weight in feature:
            total += weight * standard[y:y + h, x:x + w].sum()
        values.append(total / patch.size)
    return np.array(values)


def test_normalised_values_equal_slow_standardised_patch():
    rng = np.random.default_rng(7)
    patches = np.concatenate([
        random_patches(5, 10, 8, seed=8),
        np.full((1, 8, 10), 77, np.uint8),                                # flat: sigma 0 -> floor
        (100 + (rng.random((1, 8, 10)) < 0.1)).astype(np.uint8),          # sigma 0.3 < floor
        rng.integers(0, 2, (1, 8, 10)).astype(np.uint8) * 255,            # high contrast
    ])
    features = random_pool(10, 8, 300, random_state=9)
    values = evaluate_features(features, patches)
    for n, patch in enumerate(patches):
        np.testing.assert_allclose(values[n], slow_normalised(features, patch), rtol=1e-5, atol=1e-6)
    assert not values[5].any()          # a flat patch gives 0 everywhere
    assert evaluate_features(features, patches[5:6], normalize=False).any()


@settings(max_examples=30, deadline=None)
@given(st.integers(2, 10), st.integers(2, 10), st.integers(0, 2**32 - 1),
       st.sampled_from([1, 2, 3]), st.integers(0, 40))
def test_normalised_values_ignore_brightness_contrast_and_scale(width, height, seed, gain, offset):
    patch = random_patches(1, width, height, seed, high=70)
    if patch.std() < FLOOR:
        return
    features = random_pool(width, height, 50, random_state=seed)
    base = evaluate_features(features, patch)
    brighter = (patch.astype(np.int64) * gain + offset).astype(np.uint8)   # <= 69 * 3 + 40 = 247
    np.testing.assert_allclose(evaluate_features(features, brighter), base, rtol=1e-5, atol=1e-6)
    # the patch at twice the size with the rectangles scaled by 2 gives the same values
    doubled = np.kron(patch, np.ones((1, 2, 2), dtype=np.uint8))
    scaled = features.copy()
    scaled[:, :, :4] *= 2
    np.testing.assert_allclose(evaluate_features(scaled, doubled), base, rtol=1e-5, atol=1e-6)


# ----------------------------------------------------------------------------------------------
# compiled kernel against its numpy twin


@st.composite
def evaluation_cases(draw):
    width, height = draw(st.integers(1, 12)), draw(st.integers(1, 12))
    n = draw(st.integers(0, 140))          # crosses the 64-patch tiles of the kernel
    seed = draw(st.integers(0, 2**32 - 1))
    kind = draw(st.sampled_from(["uint8", "int16", "large", "float"]))
    rng = np.random.default_rng(seed)
    if kind == "uint8":
        patches = rng.integers(0, 256, (n, height, width)).astype(np.uint8)
    elif kind == "int16":
        patches = rng.integers(-1000, 1000, (n, height, width)).astype(np.int16)
    elif kind == "large":      # integral values beyond 2**24: the kernel's float64 path
        patches = rng.integers(0, 10**7, (n, height, width)).astype(np.int32)
    else:
        patches = (rng.random((n, height, width)) * 255).astype(np.float32)
    if draw(st.booleans()):
        features = random_pool(width, height, draw(st.integers(0, 150)), random_state=seed)
    else:      # arbitrary rectangles and weights, some slots unused
        f = draw(st.integers(0, 80))
        x = rng.integers(0, width, (f, 4))
        y = rng.integers(0, height, (f, 4))
        features = np.stack([x, y, rng.integers(1, width - x + 1), rng.integers(1, height - y + 1),
                             rng.integers(-3, 4, (f, 4))], axis=2).astype(np.int32)
        features[features[:, :, 4] == 0] = 0
    return patches, features, kind


def test_a_feature_whose_rectangles_cancel_is_zero_even_when_last():
    """Found by hypothesis (the case below): rectangles +2 and -2 on the same pixels cancel, so the
    last feature owns no corners; its value is 0 - 0 = 0, and the others are unaffected.
    The first feature: 3 * (pixel (0, 0) = 1) = 3."""
    patches = np.array([[[1, 2], [3, 4]]], np.uint8)
    features = np.zeros((2, 4, 5), np.int32)
    features[0, 0] = [0, 0, 1, 1, 3]
    features[1, 0] = [1, 1, 1, 1, 2]
    features[1, 1] = [1, 1, 1, 1, -2]
    for normalize in (False, True):
        values = evaluate_features(features, patches, normalize=normalize)
        np.testing.assert_array_equal(values, evaluate_features_numpy(features, patches,
                                                                      normalize=normalize))
        assert values[0, 1] == 0.0
    assert evaluate_features(features, patches, normalize=False)[0, 0] == 3.0


@settings(max_examples=40, deadline=None)
@given(evaluation_cases(), st.booleans(), st.booleans())
def test_kernel_equals_numpy_twin(case, normalize, transpose):
    patches, features, kind = case
    fast = evaluate_features(features, patches, normalize=normalize, transpose=transpose)
    slow = evaluate_features_numpy(features, patches, normalize=normalize, transpose=transpose)
    expected_shape = (len(features), len(patches)) if transpose else (len(patches), len(features))
    assert fast.shape == slow.shape == expected_shape and fast.dtype == np.float32
    if kind == "float":
        np.testing.assert_allclose(fast, slow, rtol=1e-5, atol=1e-5)
    else:      # integer sums are exact on both routes and the float64 arithmetic is the same
        np.testing.assert_array_equal(fast, slow)


def test_twin_raw_values_equal_direct_pixel_sums():
    patches = random_patches(3, 7, 6, seed=10, dtype=np.int32, high=10**7)
    features = random_pool(7, 6, 60, random_state=10)
    expected = np.array([[sum(int(w) * int(p[b:b + d, a:a + c].sum()) for a, b, c, d, w in f)
                          for f in features] for p in patches], dtype=np.float64)
    np.testing.assert_array_equal(evaluate_features_numpy(features, patches, normalize=False),
                                  expected.astype(np.float32))
    np.testing.assert_array_equal(evaluate_features(features, patches, normalize=False),
                                  expected.astype(np.float32))


# ----------------------------------------------------------------------------------------------
# interface details


def test_corners_are_merged_six_eight_nine():
    # two adjacent rectangles share 2 of their 8 corners, three share 4 of 12, four share 7 of 16
    for shape, corners in zip(SHAPES, [6, 6, 8, 8, 9]):
        indptr, offsets, coefficients, area = feature_corners(enumerate_features(8, 9, [shape]), 9)
        assert (np.diff(indptr) == corners).all()
        assert coefficients.all() and offsets.max() < 9 * 10
        assert (area == (-1 if shape.startswith("three") else 0)
                * enumerate_features(8, 9, [shape])[:, 0, 2]
                * enumerate_features(8, 9, [shape])[:, 0, 3]).all()


def test_integral_inputs_out_and_transpose():
    patches = random_patches(70, 12, 10, seed=12)
    features = random_pool(12, 10, 90, random_state=12)
    reference = evaluate_features(features, patches)
    ii, sq = integral_images(patches), squared_integral_images(patches)
    np.testing.assert_array_equal(evaluate_features(features, integrals=ii, squared=sq), reference)
    np.testing.assert_array_equal(evaluate_features(features, integrals=ii), reference)
    np.testing.assert_array_equal(evaluate_features(features, patches, integrals=ii), reference)
    out = np.full((90, 70), np.nan, dtype=np.float32)
    result = evaluate_features(features, patches, out=out, transpose=True)
    assert result is out
    np.testing.assert_array_equal(out, reference.T)
    # integral images made in a work space of stale contents (as training reuses one per thread)
    scratch = integral_scratch(70, 10, 12)                # 70 patches of 12 x 10
    scratch.fill(-7)
    np.testing.assert_array_equal(evaluate_features(features, patches, scratch=scratch), reference)
    for wrong in (integral_scratch(70, 11, 12), integral_scratch(69, 10, 12), scratch[:, :, :5]):
        with pytest.raises(InputError, match=r"scratch must be integral_scratch\(70, 10, 12\)"):
            evaluate_features(features, patches, scratch=wrong)
    assert evaluate_features(features[:0], patches).shape == (70, 0)
    assert evaluate_features(features, patches[:0]).shape == (0, 90)
    # contents of unused slots (weight 0) are ignored
    messy = features.copy()
    messy[:, 3, :4] = np.where(messy[:, 3, 4:5] == 0, 999, messy[:, 3, :4])
    np.testing.assert_array_equal(evaluate_features(messy, patches), reference)


def test_patches_are_evaluated_in_batches_with_the_same_values(monkeypatch):
    import detector.features._rectangles as module
    patches = random_patches(250, 9, 8, seed=14)
    features = random_pool(9, 8, 70, random_state=14)
    whole = evaluate_features_numpy(features, patches)
    monkeypatch.setattr(module, "_PATCH_BATCH", 100)      # batches of 100, 100 and 50 patches
    scratch = integral_scratch(250, 8, 9)                 # 250 patches of 9 x 8
    assert scratch.shape == (100, 9, 10)                  # one batch of integral images
    for transpose in (False, True):
        for work in (None, scratch):
            values = evaluate_features(features, patches, transpose=transpose, scratch=work)
            np.testing.assert_array_equal(values.T if transpose else values, whole)


@pytest.mark.parametrize("call", [
    lambda p: evaluate_features(np.zeros((3, 4)), p),
    lambda p: evaluate_features(np.array([[[0, 0, 13, 1, 1]] + [[0] * 5] * 3]), p),   # too wide
    lambda p: evaluate_features(np.array([[[0, 5, 1, 6, 1]] + [[0] * 5] * 3]), p),    # too low
    lambda p: evaluate_features(np.array([[[-1, 0, 1, 1, 1]] + [[0] * 5] * 3]), p),
    lambda p: evaluate_features(np.array([[[0, 0, 0, 1, 1]] + [[0] * 5] * 3]), p),
    lambda p: evaluate_features(np.zeros((2, 4, 5), np.float64) + 0.5, p),
    lambda p: evaluate_features(enumerate_features(2, 2)),
    lambda p: evaluate_features(enumerate_features(2, 2), p[0]),
    lambda p: evaluate_features(enumerate_features(2, 2), p, out=np.empty((3, 7), np.float64)),
    lambda p: evaluate_features(enumerate_features(2, 2), p, out=np.empty((7, 3), np.float32)),
    lambda p: evaluate_features(enumerate_features(2, 2), p, integrals=np.zeros((3, 5, 5))),
    lambda p: evaluate_features(enumerate_features(2, 2), p.astype(np.complex64)),
    lambda p: feature_corners(enumerate_features(4, 4), stride=4),     # needs rows of 5 columns
    lambda p: evaluate_features(enumerate_features(2, 2), p, squared=np.zeros((3, 11, 12))),
])
def test_bad_evaluation_input_raises_one_line_input_error(call):
    patches = random_patches(3, 12, 10, seed=13)
    with pytest.raises(InputError) as error:
        call(patches)
    assert "\n" not in str(error.value)
