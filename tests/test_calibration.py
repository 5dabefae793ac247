"""Calibration measures against scikit-learn and closed forms; spatially fitted recalibration."""

from __future__ import annotations

import numpy as np
import pytest
from matplotlib.figure import Figure
from sklearn.calibration import CalibratedClassifierCV, calibration_curve
from sklearn.metrics import brier_score_loss

from wetlandflow.errors import ModelError, ParameterError
from wetlandflow.models.calibration import (
    CalibratedWetlandClassifier,
    ProbabilityCalibrator,
    brier_score,
    expected_calibration_error,
    plot_reliability,
    plot_reliability_comparison,
    reliability_table,
)
from wetlandflow.models.classifier import WetlandClassifier
from wetlandflow.validation.splitters import SpatialBlockKFold

CLASSES = ("upland", "open_water", "marsh", "swamp", "fen", "bog")


def calibrated_sample(n=20000, k=4, seed=0, sharpen=1.0):
    """Labels drawn from the probabilities themselves: calibrated by construction.

    ``sharpen > 1`` reports p**sharpen (renormalised) instead: more confident than the truth.
    """
    rng = np.random.default_rng(seed)
    p = rng.dirichlet(np.full(k, 0.7), size=n)
    u = rng.random(n)[:, None]
    y_idx = (u > np.cumsum(p, axis=1)).sum(axis=1)
    q = p**sharpen
    q /= q.sum(axis=1, keepdims=True)
    classes = [f"c{i}" for i in range(k)]
    return np.array(classes)[y_idx], q, classes


@pytest.mark.reference
def test_brier_matches_scikit_learn():
    """scikit-learn's brier_score_loss: binary (positive-class) score = Brier's two-class sum / 2;
    for a probability matrix with scale_by_half=False it is Brier's (1950) multi-class sum
    (formula as restated in scikit-learn's and mlr3measures' docs, VERIFIED-2nd)."""
    y, p, classes = calibrated_sample(n=500, k=2, seed=1)
    assert brier_score(y, p, classes) == pytest.approx(2 * brier_score_loss(y == "c1", p[:, 1]), rel=1e-12)
    y, p, classes = calibrated_sample(n=500, k=4, seed=2)
    ref = brier_score_loss(y, p, labels=classes, scale_by_half=False)
    assert brier_score(y, p, classes) == pytest.approx(ref, rel=1e-12)
    onehot = (y[:, None] == np.array(classes)).astype(float)
    assert brier_score(y, onehot, classes) == 0.0
    assert brier_score(y, onehot[:, [1, 2, 3, 0]], classes) == 2.0  # confidently wrong: the maximum, 2


@pytest.mark.reference
def test_reliability_table_matches_calibration_curve():
    """scikit-learn's calibration_curve(strategy='uniform') for one class and for the top label."""
    y, p, classes = calibrated_sample(n=3000, seed=3)
    t = reliability_table(y, p, classes, n_bins=10)
    assert set(t["target"]) == {*classes, "top_label"} and (t.groupby("target").size() == 10).all()
    one = t[(t["target"] == "c2") & (t["n"] > 0)]
    prob_true, prob_pred = calibration_curve(y == "c2", p[:, 2], n_bins=10, strategy="uniform")
    np.testing.assert_allclose(one["observed_frequency"], prob_true, atol=1e-12)
    np.testing.assert_allclose(one["mean_predicted"], prob_pred, atol=1e-12)
    top = t[(t["target"] == "top_label") & (t["n"] > 0)]
    hit = np.array(classes)[p.argmax(axis=1)] == y
    prob_true, prob_pred = calibration_curve(hit, p.max(axis=1), n_bins=10, strategy="uniform")
    np.testing.assert_allclose(top["observed_frequency"], prob_true, atol=1e-12)
    np.testing.assert_allclose(top["mean_predicted"], prob_pred, atol=1e-12)


@pytest.mark.reference
def test_ece_closed_form():
    """Guo et al. (2017), On calibration of modern neural networks, eq. (3): one bin with
    confidence 0.9 and accuracy 0.7 gives ECE = |0.7 - 0.9| = 0.2; two equal bins average their gaps."""
    y = np.array(["a"] * 7 + ["b"] * 3)
    p = np.tile([0.9, 0.1], (10, 1))
    assert expected_calibration_error(y, p, ["a", "b"]) == pytest.approx(0.2, abs=1e-12)
    y2 = np.r_[y, ["a"] * 6 + ["b"] * 4]
    p2 = np.r_[p, np.tile([0.6, 0.4], (10, 1))]
    assert expected_calibration_error(y2, p2, ["a", "b"]) == pytest.approx((0.2 + 0.0) / 2, abs=1e-12)


@pytest.mark.reference
def test_ece_near_zero_when_calibrated_and_larger_when_overconfident():
    """Analytic: labels drawn from p make p calibrated, so ECE -> 0 as n grows (Guo et al. 2017);
    the bound 0.02 allows for the sampling noise of 20000 draws over 15 bins."""
    y, p, classes = calibrated_sample()
    ece = expected_calibration_error(y, p, classes)
    assert ece < 0.02
    y, q, classes = calibrated_sample(sharpen=2.0)
    assert expected_calibration_error(y, q, classes) > max(0.05, 3 * ece)


@pytest.mark.reference
def test_reliability_of_a_calibrated_generator_lies_on_the_diagonal():
    """Analytic: for calibrated p the observed frequency in a bin has mean = mean predicted
    probability and binomial standard error; allow 4 standard errors."""
    y, p, classes = calibrated_sample(seed=4)
    t = reliability_table(y, p, classes, n_bins=10)
    t = t[t["n"] >= 100]
    se = np.sqrt(t["mean_predicted"] * (1 - t["mean_predicted"]) / t["n"])
    assert ((t["observed_frequency"] - t["mean_predicted"]).abs() <= 4 * se + 1e-3).all()
    assert isinstance(plot_reliability(reliability_table(y, p, classes)), Figure)


def landscape(n_plots=60, per_plot=6, seed=0, classes=("upland", "marsh", "fen", "bog")):
    rng = np.random.default_rng(seed)
    plot_class = rng.choice(classes, n_plots)
    y = np.repeat(plot_class, per_plot)
    groups = np.repeat(np.arange(n_plots), per_plot)
    centre = {c: i * 1.2 for i, c in enumerate(classes)}
    X = np.c_[np.array([centre[c] for c in y]) + rng.normal(0, 0.8, y.size), rng.normal(size=y.size)]
    xy = rng.uniform(0, 4000, (n_plots, 2))[groups] + rng.normal(0, 15, (y.size, 2))
    return X.astype(np.float32), y, groups, xy


def base(classes=CLASSES):
    return WetlandClassifier(classes=classes, n_estimators=30, max_depth=2, n_threads=1)


@pytest.mark.reference
@pytest.mark.parametrize("method", ["isotonic", "sigmoid"])
def test_calibrated_classifier_keeps_scheme_order(method):
    """Checked against scikit-learn's CalibratedClassifierCV fitted on the same spatial splits."""
    X, y, groups, xy = landscape()
    cv = SpatialBlockKFold(3, block_size_m=1000, random_state=0, coords=xy, on_class_missing="ignore")
    m = CalibratedWetlandClassifier(base(), method=method, cv=cv).fit(X, y, groups)
    p = m.predict_scheme_proba(X)
    assert list(m.scheme_) == list(CLASSES) and p.shape == (len(y), len(CLASSES))
    assert list(m.classes_) == sorted(CLASSES)
    np.testing.assert_array_equal(m.predict_proba(X), p[:, [CLASSES.index(c) for c in m.classes_]])
    np.testing.assert_allclose(p.sum(axis=1), 1.0, atol=1e-9)
    np.testing.assert_array_equal(p[:, [1, 3]], 0.0)  # open_water, swamp: absent from training
    splits = list(cv.split(X, y, groups))
    ref = CalibratedClassifierCV(base(tuple(sorted(set(y)))), method=method, cv=splits).fit(X, y)
    cols = [CLASSES.index(c) for c in ref.classes_]
    np.testing.assert_allclose(p[:, cols], ref.predict_proba(X), atol=1e-6)
    assert (m.predict(X) == y).mean() > 0.5


def test_binary_scheme_in_unsorted_order():
    classes = ("upland", "marsh")  # scheme order is not alphabetical
    X, y, groups, xy = landscape(classes=classes)
    cv = SpatialBlockKFold(3, block_size_m=1000, random_state=0, coords=xy)
    p = CalibratedWetlandClassifier(base(classes), cv=cv).fit(X, y, groups).predict_scheme_proba(X)
    assert p[y == "marsh", 1].mean() > p[y == "upland", 1].mean() + 0.3
    np.testing.assert_allclose(p.sum(axis=1), 1.0, atol=1e-9)


# --------------------------------------------------------------------------- calibrating probabilities


def _inner_oof(make, X, y, folds):
    """Out-of-fold probabilities, one model per fold (what CalibratedClassifierCV(ensemble=False) fits on)."""
    out = np.zeros((len(y), len(make().classes)))
    for k in np.unique(folds):
        test = folds == k
        out[test] = make().fit(X[~test], y[~test]).predict_proba(X[test])
    return out


@pytest.mark.reference
@pytest.mark.parametrize("method", ["isotonic", "sigmoid"])
@pytest.mark.parametrize("classes", [("upland", "marsh", "fen", "bog"), ("upland", "marsh")])
def test_probability_calibrator_matches_scikit_learn(method, classes):
    """scikit-learn's CalibratedClassifierCV(ensemble=False) on the same folds: out-of-fold predictions,
    one-vs-rest isotonic (Zadrozny & Elkan 2002) or Platt (1999) sigmoid maps, rows normalised; binary
    problems calibrate one column.  Ours is fitted on probabilities and works in scheme order."""
    from sklearn.model_selection import PredefinedSplit

    X, y, groups, _ = landscape(classes=classes)
    folds = groups % 4
    present = tuple(sorted(set(y)))
    make = lambda: base(present)  # noqa: E731  sklearn's calibrator needs sorted classes
    test = folds == 3
    Xtr, ytr, ftr = X[~test], y[~test], folds[~test]
    # cross_val_predict (inside ensemble=False) integer-encodes labels in sorted order: the reference
    # model learns its classes from those codes (classes=None).
    ref = CalibratedClassifierCV(base(None), method=method, cv=PredefinedSplit(ftr), ensemble=False)
    expected = ref.fit(Xtr, np.searchsorted(present, ytr)).predict_proba(X[test])
    raw = make().fit(Xtr, ytr).predict_proba(X[test])
    cal = ProbabilityCalibrator(present, method).fit(_inner_oof(make, Xtr, ytr, ftr), ytr)
    np.testing.assert_allclose(cal.transform(raw), expected, atol=1e-6 if method == "isotonic" else 2e-4)
    # scheme order in, scheme order out (the scheme is not alphabetical)
    cols = [present.index(c) for c in classes]
    scheme_cal = ProbabilityCalibrator(classes, method).fit(_inner_oof(make, Xtr, ytr, ftr)[:, cols], ytr)
    np.testing.assert_allclose(scheme_cal.transform(raw[:, cols]), expected[:, cols], atol=2e-4)


@pytest.mark.reference
def test_platt_fit_recovers_a_known_sigmoid():
    """Platt (1999): labels drawn from P = 1 / (1 + exp(A f + B)) give back A, B as n grows
    (maximum likelihood; the smoothed targets shift the estimate by O(1/n))."""
    rng = np.random.default_rng(2)
    f = rng.uniform(0, 1, 40000)
    p_true = 1.0 / (1.0 + np.exp(-6.0 * f + 3.0))  # A = -6, B = 3
    hit = rng.random(f.size) < p_true
    y = np.where(hit, "b", "a")
    cal = ProbabilityCalibrator(("a", "b"), "sigmoid").fit(np.c_[1 - f, f], y)
    sig = cal.maps_["b"]
    assert sig.a == pytest.approx(-6.0, abs=0.25) and sig.b == pytest.approx(3.0, abs=0.15)


def test_recalibration_lowers_ece_of_an_overconfident_model():
    """Sharpened probabilities (over-confident, see calibrated_sample) recalibrated on independent
    draws from the same generator: the ECE falls."""
    y_fit, q_fit, classes = calibrated_sample(n=8000, seed=5, sharpen=2.5)
    y_new, q_new, _ = calibrated_sample(n=8000, seed=6, sharpen=2.5)
    before = expected_calibration_error(y_new, q_new, classes)
    for method in ("isotonic", "sigmoid"):
        fixed = ProbabilityCalibrator(classes, method).fit(q_fit, y_fit).transform(q_new)
        np.testing.assert_allclose(fixed.sum(axis=1), 1.0, atol=1e-9)
        assert expected_calibration_error(y_new, fixed, classes) < before / 2


def test_probability_calibrator_refuses_bad_input():
    y, p, classes = calibrated_sample(n=50)
    with pytest.raises(ParameterError, match="method"):
        ProbabilityCalibrator(classes, "beta").fit(p, y)
    with pytest.raises(ModelError, match="not fitted"):
        ProbabilityCalibrator(classes).transform(p)
    with pytest.raises(ModelError, match="two classes"):
        ProbabilityCalibrator(classes).fit(p, np.full(50, "c0"))
    with pytest.raises(ParameterError, match="4 columns"):
        ProbabilityCalibrator(classes).fit(p, y).transform(p[:, :3])


def test_reliability_comparison_figure():
    y, p, classes = calibrated_sample(n=500)
    tables = {"a": reliability_table(y, p, classes), "b": reliability_table(y, p**2, classes)}
    fig = plot_reliability_comparison(tables, calibrated={"a": reliability_table(y, p, classes)})
    assert isinstance(fig, Figure) and len(fig.axes) == 2
    assert [len(ax.lines) for ax in fig.axes] == [3, 2]  # the diagonal plus one curve per model
    assert fig.axes[0].lines[1].get_color() == fig.axes[1].lines[1].get_color()  # same model, same colour
