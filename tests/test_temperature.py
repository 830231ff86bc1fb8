"""The boosted score's temperature, held to scikit-learn.

References: scikit-learn's ``LogisticRegression(class_weight="balanced", fit_intercept=False)``
without penalty on the one input ``2F`` minimises the class-balanced log-loss of
``1 / (1 + exp(-w 2F))``, so ``1 / w`` is the temperature :func:`detector.cascade.fit_temperature`
must find (temperature scaling; Guo et al., ICML 2017); scikit-learn's own fitted regression trees
(``DecisionTreeRegressor.predict``, kept by ``grow_forest(..., keep_estimators=True)``) give the
boosted sum ``F`` without the project's flat export, and the scan's scores must be
``1 / (1 + exp(-2F / T))`` of it.
"""

from __future__ import annotations

import inspect

import numpy as np
import pytest
from sklearn.linear_model import LogisticRegression

from detector.cascade import fit_temperature
from detector.classifier import PatchClassifier
from detector.features import evaluate_features, random_pool
from detector.forest import grow_forest
from detector.model import Model
from detector.scan import Engine, ScanSettings
from shared import calibration_copies, top_bright


#: No penalty: ``C=inf`` where scikit-learn has deprecated ``penalty`` (1.8 on), else
#: ``penalty=None`` (1.2 to 1.7).
UNPENALISED = (dict(C=np.inf) if inspect.signature(LogisticRegression).parameters["penalty"].default
               == "deprecated" else dict(penalty=None))


def sklearn_temperature(object_totals, background_totals, class_weight="balanced") -> float:
    """1 / w of scikit-learn's unpenalised logistic regression of the class on 2F, no intercept."""
    x = 2.0 * np.r_[object_totals, background_totals][:, None]
    y = np.r_[np.ones(len(object_totals)), np.zeros(len(background_totals))]
    fit = LogisticRegression(class_weight=class_weight, fit_intercept=False, tol=1e-12,
                             max_iter=100_000, **UNPENALISED).fit(x, y)
    return 1.0 / float(fit.coef_[0, 0])


@pytest.mark.parametrize("seed, n_objects, n_background", [(0, 40, 400), (1, 180, 1700),
                                                            (2, 500, 60)])
def test_fit_temperature_equals_balanced_logistic_regression(seed, n_objects, n_background):
    """Boosted sums pushed far out (objects around +4, background around -5, overlapping a
    little): the class-balanced fit softens them (T > 1) to the temperature scikit-learn finds,
    to the 6 decimals the model stores. The class counts differ tenfold either way, so the
    unbalanced loss would give another temperature (checked here, so that this test can tell)."""
    rng = np.random.default_rng(seed)
    o = rng.normal(4.0, 2.5, n_objects)
    b = rng.normal(-5.0, 3.0, n_background)
    t = fit_temperature(o, b)
    reference = sklearn_temperature(o, b)
    assert reference > 1.2
    assert t == pytest.approx(reference, rel=2e-6, abs=0)
    assert abs(sklearn_temperature(o, b, class_weight=None) - reference) > 1e-3 * reference


@pytest.mark.parametrize("seed", range(6))
def test_fit_temperature_is_the_bounded_minimum_scipy_finds(seed):
    """Against scipy.optimize's bounded scalar minimiser (``minimize_scalar(method="bounded")``,
    tolerance 1e-12 in log T) on the same loss over T in [1, 1000]: sums of every spread, some
    nearly separable (the fit sharpens: T stays 1), some overlapping with huge values (the minimum
    sits at the bound T = 1000), the rest in between; equal to the 6 decimals the model stores."""
    from scipy.optimize import minimize_scalar

    rng = np.random.default_rng(seed)
    for _ in range(20):
        shift, spread = rng.choice([0.0, 2.0, 8.0, 300.0]), rng.choice([0.3, 3.0, 2000.0])
        o = rng.normal(shift, spread, rng.integers(1, 400))
        b = rng.normal(-shift, spread, rng.integers(1, 400))

        def loss(log_t):
            t = np.exp(log_t)
            return (np.logaddexp(0.0, -2.0 * o / t).mean() + np.logaddexp(0.0, 2.0 * b / t).mean()) / 2

        best = float(np.exp(minimize_scalar(loss, bounds=(0.0, np.log(1000.0)), method="bounded",
                                            options={"xatol": 1e-12}).x))
        expected = 1.0 if best < 1.0 + 1e-3 else best
        assert fit_temperature(o, b) == pytest.approx(expected, rel=1e-6, abs=0)


def test_fit_temperature_never_sharpens():
    """Sums already soft (the balanced fit would want T < 1, sharper scores): T stays 1."""
    o, b = np.array([0.2, 0.3, 0.1, 0.25]), np.array([-0.2, -0.1, -0.3])
    assert sklearn_temperature(o, b) < 1.0
    assert fit_temperature(o, b) == 1.0


def test_trained_temperature_is_the_balanced_fit_on_calibration_and_background():
    """``PatchClassifier.fit`` (boosted) stores as ``score_temperature`` the balanced fit on the
    boosted sums of its calibration copies (the held-out objects and their misaligned copies) and of
    its background patches; scikit-learn finds the same on the same sums."""
    patches, y = top_bright(1, 80, 400, spread=90, lift=120)
    clf = PatchClassifier(n_trees=20, pool=400, mode="boosted", random_state=0).fit(patches, y)
    m = clf.model_
    objects = m.running_scores(calibration_copies(clf, patches))[:, -1]
    background = m.running_scores(patches[y == 0])[:, -1]
    t = m.temperature
    assert t > 1.2
    assert t == pytest.approx(sklearn_temperature(objects, background), rel=2e-6, abs=0)


def test_boosted_scan_scores_follow_the_temperature_on_sklearn_sums():
    """A boosted forest grown by the project (Gentle AdaBoost on scikit-learn regression trees),
    given a temperature T = 2.5, scanned over a frame of object-like and background patches: every
    window's score is 1 / (1 + exp(-2F / T)), F the sum of the scikit-learn trees' predictions on
    the window's pool features (the feature values training computes, on the window cut by hand).
    The flat trees store float32 leaves, scikit-learn float64 ones: scores agree to 1e-6."""
    patches, y = top_bright(2, 120, 240, spread=90, lift=120)
    pool = random_pool(12, 12, 300, random_state=1)
    X = evaluate_features(pool, patches)
    forest = grow_forest(X, y.astype(int), mode="boosted", n_trees=10, depth=2, random_state=0,
                         keep_estimators=True)
    temperature = 2.5
    model = Model.from_forest((12, 12), pool, forest, temperature=temperature)
    # a 60 x 60 frame: the first 25 patches (objects) and 11 backgrounds in a 6 x 6 mosaic of
    # 10 x 10 cells cut from them, so that windows see whole patches, parts and seams
    rng = np.random.default_rng(4)
    chosen = np.r_[np.arange(25), 120 + rng.choice(240, 11, replace=False)]
    gray = patches[chosen][:, 1:11, 1:11].reshape(6, 6, 10, 10).transpose(0, 2, 1, 3).reshape(60, 60)
    engine = Engine(model, ScanSettings(threshold=0.0, early_exit=False, stride=3.0, nms_iou=1.0,
                                        max_object=12.0, overhang=0.0, box_voting=None))
    result = engine.scan(gray)
    assert len(result.scores) == 17 * 17  # (60 - 12) / 3 + 1 = 17 windows a side, all at scale 1
    assert (result.boxes[:, 2:] == 12).all()  # margin 0: the object box is the window
    xs, ys = result.boxes[:, 0].astype(int), result.boxes[:, 1].astype(int)
    windows = np.stack([gray[y:y + 12, x:x + 12] for x, y in zip(xs, ys)])
    F = sum(est.predict(evaluate_features(pool, windows)) for est in forest.estimators)
    reference = 1.0 / (1.0 + np.exp(-2.0 * F / temperature))
    np.testing.assert_allclose(result.scores, reference, rtol=0, atol=1e-6)
    # the frame holds confident windows both ways, where T matters most
    assert reference.min() < 0.05 and reference.max() > 0.95
    assert np.abs(reference - 1.0 / (1.0 + np.exp(-2.0 * F))).max() > 0.05
