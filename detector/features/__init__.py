"""Features of a window, computed on integral images: the stage between the image and the trees.

- :mod:`~detector.features._integral`: integral images and window sums (exact integers);
- :mod:`~detector.features._channels`: the gradient channels of a grey image (magnitude and six
  orientations) and their stacked integral images;
- :mod:`~detector.features._rectangles`: rectangle-difference features (grey or on a channel):
  representation, enumeration, random pools and evaluation on patches;
- ``_feature_kernels`` and ``_channel_kernels``: the compiled loops (numba), each with a plain-numpy
  twin in the module above it.

The public names of all three are re-exported here (``from detector.features import
evaluate_features``).
"""

from detector.features._channels import (CHANNEL_NAMES, CHOICES, EDGE_STRENGTH, FEATURE_PLANES,
                                         N_CHANNELS, N_FEATURE_CHANNELS, ORIENTATIONS,
                                         PLANE_BAND_BYTES,
                                         channel_integrals, channel_integrals_numpy,
                                         fill_channel_planes, gradient_channels, orientation_bins, patch_channels,
                                         patch_channels_numpy)
from detector.features._integral import (integral_image, integral_images, pixel_sums,
                                         squared_integral_image, squared_integral_images,
                                         window_mean_var, window_sum)
from detector.features._rectangles import (CHANNEL_SHAPES, MAX_WINDOW_SIDE, MIN_WINDOW_SIDE,
                                           SHAPES, SIGMA_FLOOR, channel_pool, check_channels,
                                           count_features, enumerate_features, evaluate_features,
                                           evaluate_features_numpy, feature_corners, from_corners,
                                           integral_scratch, random_pool, to_corners)

__all__ = [
    # integral images
    "integral_image", "squared_integral_image", "integral_images", "squared_integral_images",
    "window_sum", "window_mean_var", "pixel_sums",
    # channels
    "N_CHANNELS", "ORIENTATIONS", "CHANNEL_NAMES", "CHOICES", "EDGE_STRENGTH",
    "N_FEATURE_CHANNELS", "FEATURE_PLANES", "gradient_channels",
    "patch_channels", "patch_channels_numpy", "orientation_bins", "channel_integrals", "channel_integrals_numpy",
    "fill_channel_planes", "PLANE_BAND_BYTES",
    # rectangle features
    "SHAPES", "SIGMA_FLOOR", "MIN_WINDOW_SIDE", "MAX_WINDOW_SIDE", "count_features",
    "enumerate_features", "random_pool", "feature_corners", "evaluate_features",
    "evaluate_features_numpy", "integral_scratch", "CHANNEL_SHAPES", "channel_pool", "check_channels", "to_corners",
    "from_corners",
]
