"""Forests of shallow trees over a feature pool, flattened into arrays the scanning engine reads.

Two ways of growing them, with scikit-learn's exact tree learners (``splitter="best"``) or, on
binned features, the compiled histogram grower that grows the same trees
(``_histogram``; ``grow_forest(grower="histogram")``):

``mode="bagged"``
    The random forest ("Random Forests", Machine Learning 45, 2001): every tree is grown on a
    bootstrap sample of the patches, drawn as per-patch counts passed as ``sample_weight`` (no copy of the feature
    matrix; scikit-learn's ``RandomForestClassifier`` does the same), with a fresh random subset of
    ``features_per_node`` pool columns at every node, thresholds at the midpoints between
    consecutive distinct projected values (scikit-learn's rule), chosen by the largest information
    gain (``criterion="entropy"``). A leaf holds the class histogram of its in-bag patches; the
    flat tree stores its object fraction, and the forest's score is the average over the trees.
``mode="boosted"``
    Gentle AdaBoost (Friedman, Hastie and Tibshirani, "Additive logistic regression", Ann. Statist.
    2000, Algorithm 4): stage by stage, a regression tree fitted by weighted least squares to
    ``y`` in {-1, +1} (leaf = weighted mean), then the weights multiplied by ``exp(-y f(x))``. Per
    stage only a random ``sample_fraction`` of the patches (drawn without replacement) carries
    weight, as in stochastic gradient boosting (Friedman, Comput. Stat. Data Anal. 2002), and every
    node sees a random subset of the pool. The score is the logistic link ``1 / (1 + exp(-2 F))``
    of the summed leaf values ``F``.

Flat trees
    Every tree is a complete binary tree of depth ``D``: ``node_features`` int32 ``(T, 2**D - 1)``,
    ``node_thresholds`` float32 ``(T, 2**D - 1)``, ``leaf_values`` float32 ``(T, 2**D)``, nodes in
    heap order (children of node ``i`` are ``2i+1`` and ``2i+2``; past the last level, node ``i``'s
    children are leaves ``2i+1-(2**D-1)`` and ``+1``); go left when ``x <= threshold``. A
    scikit-learn leaf above depth ``D`` is padded with feature 0, threshold 0.0 and identical leaves
    below it. Each threshold is the largest float32 not above scikit-learn's float64 threshold, so
    that float32 inputs take exactly scikit-learn's decisions.

Binned growing (optional)
    scikit-learn's exact splitter sorts the node's samples for every candidate feature and scores
    every distinct value, which costs about 0.2 us per sample and feature here. Replacing each pool
    column by its bin index among at most 256 quantile bins (:func:`quantile_cuts`,
    :func:`bin_columns`; the approach of histogram-based tree learners such as LightGBM, Ke et al.,
    NIPS 2017, and scikit-learn's HistGradientBoosting) leaves at most 256 distinct values per
    column, and :func:`thresholds_from_bins` turns the trees' bin-index thresholds back into feature
    values: the exported tree sends a feature value left exactly when its bin goes left. On bins,
    the histogram grower (``grower="histogram"``) replaces the sort by one pass that adds every
    sample into its bin, and a scan over the 256 bins, per node and candidate feature.

Running scores
    The running score after tree ``t`` is ``s_t = s_{t-1} + leaf_values[t, leaf]`` (``s_0 = 0``;
    the float32 leaf values summed in float64, in tree order); the early exit that stops a window
    once ``s_t`` falls below a threshold is calibrated in :mod:`detector.cascade`.

Modules (private; their public names are re-exported here):

- ``_flat``: the flat trees, their export from scikit-learn, leaves, running and final scores;
- ``_growing``: :func:`grow_forest` (both modes, both growers) and the out-of-bag scores;
- ``_binning``: quantile cuts, bin indices, thresholds mapped back to feature values;
- ``_histogram`` and ``_tree_kernels``: the histogram tree grower and its compiled loops (numba),
  with numpy twins.
"""

from detector.forest._binning import (bin_columns, bin_columns_numpy, quantile_cuts,
                                      quantile_cuts_numpy, thresholds_from_bins)
from detector.forest._flat import (MAX_DEPTH, MODES, FlatForest, final_score, flatten_tree,
                                   float32_thresholds, forest_leaf_scores, forest_leaves,
                                   forest_running_scores, forest_score, tree_depth)
from detector.forest._growing import (GROWERS, forest_oob_scores, grow_forest, oob_scores,
                                      seed_sequence, trimmed_weights, worker_count)
from detector.forest._histogram import grow_histogram_tree

__all__ = [
    "FlatForest", "grow_forest", "flatten_tree", "float32_thresholds", "forest_leaves",
    "forest_leaf_scores", "forest_running_scores", "forest_score", "final_score", "seed_sequence",
    "quantile_cuts", "quantile_cuts_numpy", "bin_columns", "bin_columns_numpy",
    "thresholds_from_bins", "forest_oob_scores", "oob_scores", "grow_histogram_tree", "MODES",
    "GROWERS", "MAX_DEPTH", "tree_depth", "worker_count", "trimmed_weights",
]
