"""A scikit-learn style classifier of fixed-size grey patches: object (1) or background (0).

:class:`PatchClassifier` is :class:`detector.patch_forest.PatchForest` as a scikit-learn
estimator: it draws a random pool of rectangle-difference features, evaluates it on the patches,
grows a forest of shallow trees (:func:`detector.forest.grow_forest`), keeps only the features the
trees use, and calibrates the early-exit thresholds on object patches held out from growing. The
result is a :class:`detector.model.Model`, the same object the model file stores and the scanning
engine reads, so ``clone``, ``cross_val_score`` and parameter searches of scikit-learn work on
exactly what ``patchwood train`` ships.
"""

from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator, ClassifierMixin
from sklearn.utils.validation import check_is_fitted

from detector.patch_forest import (CHANNEL_SHARE, VALUE_BLOCK, BinnedPool, PatchForest,
                                   check_patches)

__all__ = ["PatchClassifier", "BinnedPool", "check_patches", "CHANNEL_SHARE", "VALUE_BLOCK"]


class PatchClassifier(ClassifierMixin, BaseEstimator, PatchForest):
    __doc__ = (PatchForest.__doc__.replace(
        "Forest of shallow trees over rectangle-difference features.",
        "Forest of shallow trees over rectangle-difference features, as a scikit-learn "
        "classifier.").replace("PatchForest(", "PatchClassifier("))

    def _raw(self, patches) -> np.ndarray:
        check_is_fitted(self, "model_")
        return super()._raw(patches)
