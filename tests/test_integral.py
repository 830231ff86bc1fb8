"""Integral images, window sums and window statistics.

References: skimage.transform.integral_image and cv2.integral / cv2.integral2 (reference libraries),
numpy slicing sums and numpy.var for windows, exact Python integers for the overflow check.
"""

import cv2
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from skimage.transform import integral_image as skimage_integral_image

from detector.errors import InputError
from detector.features import (integral_image, integral_images, pixel_sums, squared_integral_image,
                               squared_integral_images, window_mean_var, window_sum)
from detector.features._integral import integral_images_numpy, pixel_sums_numpy

SETTINGS = settings(max_examples=40, deadline=None)
sides = st.integers(1, 24)
uint8_images = st.tuples(sides, sides).flatmap(lambda shape: arrays(np.uint8, shape))


@SETTINGS
@given(uint8_images)
def test_integral_image_matches_skimage_and_cv2(image):
    ii = integral_image(image)
    assert ii.dtype == np.int64 and ii.shape == (image.shape[0] + 1, image.shape[1] + 1)
    assert not ii[0].any() and not ii[:, 0].any()
    # skimage's integral image has no zero row and column; cv2's has them, like ours
    np.testing.assert_array_equal(ii[1:, 1:], skimage_integral_image(image))
    np.testing.assert_array_equal(ii, cv2.integral(image, sdepth=cv2.CV_64F))


@SETTINGS
@given(uint8_images)
def test_squared_integral_image_matches_cv2(image):
    sq = squared_integral_image(image)
    _, reference = cv2.integral2(image, sdepth=cv2.CV_64F, sqdepth=cv2.CV_64F)
    assert sq.dtype == np.int64
    np.testing.assert_array_equal(sq, reference)
    np.testing.assert_array_equal(sq[1:, 1:], skimage_integral_image(image.astype(np.int64) ** 2))


@SETTINGS
@given(st.tuples(sides, sides).flatmap(
    lambda shape: arrays(np.int16, shape, elements=st.integers(-2000, 2000))))
def test_signed_integer_images_match_cv2(image):
    ii = integral_image(image)
    sq = squared_integral_image(image)
    reference, reference_sq = cv2.integral2(image, sdepth=cv2.CV_64F, sqdepth=cv2.CV_64F)
    np.testing.assert_array_equal(ii, reference)
    np.testing.assert_array_equal(sq, reference_sq)


def test_float_images_give_float64_integrals_equal_to_references():
    image = np.random.default_rng(3).random((17, 23), dtype=np.float32)
    ii = integral_image(image)
    sq = squared_integral_image(image)
    assert ii.dtype == np.float64 and sq.dtype == np.float64
    np.testing.assert_allclose(ii[1:, 1:], skimage_integral_image(image.astype(np.float64)),
                               rtol=1e-12)
    reference, reference_sq = cv2.integral2(image.astype(np.float64), sdepth=cv2.CV_64F,
                                            sqdepth=cv2.CV_64F)
    np.testing.assert_allclose(ii, reference, rtol=1e-12)
    np.testing.assert_allclose(sq, reference_sq, rtol=1e-12)


def test_boolean_image_counts_true_pixels():
    image = np.random.default_rng(4).random((9, 13)) > 0.5
    np.testing.assert_array_equal(integral_image(image),
                                  cv2.integral(image.astype(np.uint8), sdepth=cv2.CV_64F))


def test_hand_worked_integral_image():
    # [[1, 2], [3, 4]]: ii[1,1] = 1, ii[1,2] = 1+2 = 3, ii[2,1] = 1+3 = 4, ii[2,2] = 10;
    # squares [[1, 4], [9, 16]]: 1, 1+4 = 5, 1+9 = 10, 30
    image = np.array([[1, 2], [3, 4]], dtype=np.uint8)
    np.testing.assert_array_equal(integral_image(image), [[0, 0, 0], [0, 1, 3], [0, 4, 10]])
    np.testing.assert_array_equal(squared_integral_image(image), [[0, 0, 0], [0, 1, 5], [0, 10, 30]])


def test_large_all_white_image_sums_exactly():
    # 3000 rows x 4000 columns of 255: totals exceed int32 (3.06e9 and 7.8e11)
    image = np.full((3000, 4000), 255, dtype=np.uint8)
    ii = integral_image(image)
    assert int(ii[-1, -1]) == 255 * 4000 * 3000 == 3_060_000_000
    assert int(window_sum(ii, 1000, 500, 2000, 1500)) == 255 * 2000 * 1500
    assert int(window_sum(ii, 3999, 2999, 1, 1)) == 255
    assert int(window_sum(ii, 0, 0, 4000, 1)) == 255 * 4000
    assert int(window_sum(ii, 1, 1, 3999, 2999)) == 255 * 3999 * 2999
    del ii
    sq = squared_integral_image(image)
    assert int(sq[-1, -1]) == 255 ** 2 * 4000 * 3000 == 780_300_000_000
    assert int(window_sum(sq, 17, 29, 3001, 2003)) == 255 ** 2 * 3001 * 2003


@settings(max_examples=25, deadline=None)
@given(st.tuples(st.integers(1, 6), sides, sides).flatmap(
    lambda shape: arrays(np.uint8, shape)))
def test_batch_forms_equal_single_forms(patches):
    ii = integral_images(patches)
    sq = squared_integral_images(patches)
    assert ii.shape == (patches.shape[0], patches.shape[1] + 1, patches.shape[2] + 1)
    np.testing.assert_array_equal(ii, np.stack([integral_image(p) for p in patches]))
    np.testing.assert_array_equal(sq, np.stack([squared_integral_image(p) for p in patches]))


@settings(max_examples=40, deadline=None)
@given(st.tuples(st.integers(0, 5), sides, sides).flatmap(
    lambda shape: arrays(np.uint8, shape)), st.booleans())
def test_compiled_stack_route_equals_cv2_and_the_numpy_twin(patches, strided):
    # uint8 stacks go through the compiled loop (detector.features._integral_kernels); cv2.integral
    # per patch and the two-cumsum twin are the references, also for a non-contiguous view
    if strided:
        patches = patches[:, :, ::2]
    ii = integral_images(patches)
    assert ii.dtype == np.int64
    assert ii.shape == (patches.shape[0], patches.shape[1] + 1, patches.shape[2] + 1)
    np.testing.assert_array_equal(ii, integral_images_numpy(patches))
    for one, table in zip(patches, ii):
        np.testing.assert_array_equal(table, cv2.integral(np.ascontiguousarray(one),
                                                          sdepth=cv2.CV_64F))


def test_integral_images_fill_the_array_given_and_refuse_a_wrong_one():
    patches = np.random.default_rng(3).integers(0, 256, (4, 7, 5), dtype=np.uint8)
    out = np.full((4, 8, 6), -1, np.int64)            # stale contents, the zero border included
    assert integral_images(patches, out=out) is out
    np.testing.assert_array_equal(out, integral_images_numpy(patches))
    for wrong in (np.empty((4, 8, 5), np.int64), np.empty((4, 8, 6), np.int32),
                  np.empty((4, 6, 8), np.int64).transpose(0, 2, 1), [[0]]):
        with pytest.raises(InputError, match="out must be a C-contiguous int64 array of shape"):
            integral_images(patches, out=wrong)
    # other dtypes take the numpy route and leave it alone
    floats = patches.astype(np.float64)
    np.testing.assert_array_equal(integral_images(floats, out=out), integral_images_numpy(floats))


@settings(max_examples=40, deadline=None)
@given(st.tuples(st.integers(0, 5), sides, sides).flatmap(
    lambda shape: arrays(np.uint8, shape)), st.booleans())
def test_compiled_patch_moments_equal_numpy(patches, strided):
    # the pixel sums and squared sums of the contrast normalisation: the compiled pass
    # (_integral_kernels.patch_moments) against numpy's sum and einsum, exact in float64
    if strided:
        patches = patches[:, ::2]
    total, square = pixel_sums(patches)
    pixels = patches.astype(np.int64)
    np.testing.assert_array_equal(total, pixels.sum(axis=(1, 2)))
    np.testing.assert_array_equal(square, (pixels ** 2).sum(axis=(1, 2)))
    for mine, twin in zip((total, square), pixel_sums_numpy(patches)):
        assert mine.dtype == twin.dtype == np.float64
        np.testing.assert_array_equal(mine, twin)


def test_patch_moments_of_white_patches_by_hand():
    # 64 x 64 pixels of 255: sum 255 * 4096 = 1,044,480, squares 255 ** 2 * 4096 = 266,342,400
    total, square = pixel_sums(np.full((2, 64, 64), 255, np.uint8))
    assert total.tolist() == [1_044_480.0] * 2 and square.tolist() == [266_342_400.0] * 2


def test_compiled_stack_route_sums_white_patches_exactly():
    # 64 x 64 patches of 255: every corner r, c holds 255 * r * c (the last 1,044,480)
    ii = integral_images(np.full((3, 64, 64), 255, np.uint8))
    r, c = np.meshgrid(np.arange(65), np.arange(65), indexing="ij")
    np.testing.assert_array_equal(ii, np.broadcast_to(255 * r * c, ii.shape))
    assert int(ii[2, 64, 64]) == 1_044_480


@st.composite
def image_and_windows(draw):
    image = draw(uint8_images)
    rows, columns = image.shape
    windows = []
    for _ in range(draw(st.integers(1, 5))):
        x = draw(st.integers(0, columns))
        y = draw(st.integers(0, rows))
        windows.append((x, y, draw(st.integers(0, columns - x)), draw(st.integers(0, rows - y))))
    return image, np.array(windows, dtype=np.int64)


@SETTINGS
@given(image_and_windows())
def test_window_sum_equals_slicing_sum(case):
    image, windows = case
    ii = integral_image(image)
    x, y, w, h = windows.T
    expected = [int(image[b:b + d, a:a + c].sum()) for a, b, c, d in windows]
    np.testing.assert_array_equal(window_sum(ii, x, y, w, h), expected)
    assert int(window_sum(ii, *windows[0])) == expected[0]


def test_window_sum_broadcasts_and_works_on_stacks():
    patches = np.random.default_rng(5).integers(0, 256, (3, 6, 8)).astype(np.uint8)
    ii = integral_images(patches)
    x = np.array([[0], [2]])         # (2, 1) against width (3,) -> (2, 3)
    w = np.array([1, 3, 6])
    result = window_sum(ii, x, 1, w, 4)
    assert result.shape == (3, 2, 3)
    for n in range(3):
        for i in range(2):
            for k in range(3):
                xi, wk = int(x[i, 0]), int(w[k])
                assert result[n, i, k] == patches[n, 1:5, xi:xi + wk].sum()


@SETTINGS
@given(image_and_windows())
def test_window_mean_var_equal_numpy(case):
    image, windows = case
    windows = windows[(windows[:, 2] > 0) & (windows[:, 3] > 0)]
    if not len(windows):
        return
    ii, sq = integral_image(image), squared_integral_image(image)
    x, y, w, h = windows.T
    mean, var = window_mean_var(ii, sq, x, y, w, h)
    assert mean.dtype == np.float64 and var.dtype == np.float64
    for i, (a, b, c, d) in enumerate(windows):
        region = image[b:b + d, a:a + c].astype(np.float64)
        np.testing.assert_allclose(mean[i], region.mean(), rtol=1e-12)
        np.testing.assert_allclose(var[i], region.var(), rtol=1e-9, atol=1e-9)
    assert (var >= 0).all()


def test_window_mean_var_hand_worked_and_flat():
    image = np.array([[1, 2], [3, 4]], dtype=np.uint8)
    # mean = 10 / 4 = 2.5; var = 30 / 4 - 2.5**2 = 7.5 - 6.25 = 1.25
    mean, var = window_mean_var(integral_image(image), squared_integral_image(image), 0, 0, 2, 2)
    assert (mean, var) == (2.5, 1.25)
    flat = np.full((5, 7), 201, dtype=np.uint8)
    mean, var = window_mean_var(integral_image(flat), squared_integral_image(flat), 1, 1, 5, 3)
    assert mean == 201.0 and var == 0.0


@pytest.mark.parametrize("call", [
    lambda: integral_image(np.zeros((2, 3, 4), np.uint8)),
    lambda: integral_image(np.zeros(5, np.uint8)),
    lambda: integral_image(np.zeros((3, 3), np.complex128)),
    lambda: integral_images(np.zeros((3, 3), np.uint8)),
    lambda: squared_integral_images(np.array([["a"]])),
    lambda: window_sum(integral_image(np.ones((4, 4), np.uint8)), 2, 0, 3, 1),      # past column 4
    lambda: window_sum(integral_image(np.ones((4, 4), np.uint8)), 0, 1, 1, 4),      # past row 4
    lambda: window_sum(integral_image(np.ones((4, 4), np.uint8)), -1, 0, 1, 1),
    lambda: window_sum(integral_image(np.ones((4, 4), np.uint8)), 0.5, 0, 1, 1),
    lambda: window_mean_var(integral_image(np.ones((4, 4), np.uint8)),
                            squared_integral_image(np.ones((4, 4), np.uint8)), 0, 0, 0, 2),
    lambda: window_mean_var(integral_image(np.ones((4, 4), np.uint8)),
                            squared_integral_image(np.ones((4, 5), np.uint8)), 0, 0, 1, 1),
])
def test_bad_input_raises_one_line_input_error(call):
    with pytest.raises(InputError) as error:
        call()
    assert "\n" not in str(error.value)
