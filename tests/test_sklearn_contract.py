"""The classifiers keep scikit-learn's classifier contract, so its scorers and model-selection tools read
their probabilities correctly.

Reference: scikit-learn itself (Pedregosa et al. 2011, Scikit-learn: Machine Learning in Python, JMLR 12,
2825-2830): its estimator checks (``sklearn.utils.estimator_checks``) and its metrics computed by hand on
explicitly aligned columns.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.base import clone
from sklearn.datasets import make_classification
from sklearn.exceptions import NotFittedError
from sklearn.metrics import get_scorer, log_loss, roc_auc_score
from sklearn.model_selection import StratifiedKFold, cross_val_predict
from sklearn.utils.estimator_checks import parametrize_with_checks

from wetlandflow.errors import ModelError
from wetlandflow.models.calibration import CalibratedWetlandClassifier
from wetlandflow.models.classifier import WetlandClassifier, scheme_proba
from wetlandflow.models.hierarchy import HierarchicalClassifier

# A scheme whose order is not alphabetical: the case that made the scorers wrong.
SCHEME = ("upland", "open_water", "marsh", "fen")
PARENTS = {"wetland": ("marsh", "fen")}
SMALL = {"n_estimators": 15, "max_depth": 3}


def labelled(n=240, seed=0, scheme=SCHEME):
    X, code = make_classification(n_samples=n, n_features=5, n_informative=4, n_redundant=0,
                                  n_classes=len(scheme), n_clusters_per_class=1, class_sep=1.2,
                                  random_state=seed)
    return X.astype(np.float32), np.asarray(scheme)[code]


def aligned(model, X):
    """Scheme-order probabilities with their columns re-ordered here, by name, to the lexicographic label
    order that log_loss and roc_auc_score document for ``labels``: the alignment done by hand."""
    p_scheme = scheme_proba(model, X)  # columns: SCHEME order
    labels = sorted(SCHEME)
    return p_scheme[:, [SCHEME.index(c) for c in labels]], labels


# Checks that do not apply, each with its reason; everything else must pass.
_WEIGHTS = ("with class_weighting=True the balancing weights are recomputed from the class counts, so "
            "repeating a row is not the same as doubling its weight (intended: rare classes keep their say)")
_BOOTSTRAP = ("random-forest bootstrap draws rows, not weights; scikit-learn lists the same exception for "
              "its own RandomForestClassifier")


def _expected_failures(estimator):
    if estimator.kind == "random_forest" or estimator.class_weighting:
        reason = _BOOTSTRAP if estimator.kind == "random_forest" else _WEIGHTS
        return {"check_sample_weight_equivalence_on_dense_data": reason}
    return {}


@pytest.mark.reference
@parametrize_with_checks(
    [WetlandClassifier(n_estimators=10),
     WetlandClassifier(n_estimators=10, class_weighting=False),
     WetlandClassifier(kind="random_forest", n_estimators=10)],
    expected_failed_checks=_expected_failures,
)
def test_check_estimator(estimator, check):
    """scikit-learn's own estimator checks (sklearn.utils.estimator_checks), with NaN allowed."""
    check(estimator)


@pytest.mark.reference
@pytest.mark.parametrize("kind", ["xgboost", "random_forest"])
def test_probability_scorers_equal_the_metrics_on_aligned_columns(kind):
    """neg_log_loss and roc_auc_ovr from scikit-learn's scorers equal log_loss / roc_auc_score computed
    on the scheme-order probabilities with the columns given explicitly (labels=scheme)."""
    X, y = labelled()
    train, test = next(StratifiedKFold(4, shuffle=True, random_state=0).split(X, y))
    m = WetlandClassifier(classes=SCHEME, kind=kind, **SMALL).fit(X[train], y[train])
    p, labels = aligned(m, X[test])
    by_hand_loss = log_loss(y[test], p, labels=labels)
    by_hand_auc = roc_auc_score(y[test], p, labels=labels, multi_class="ovr")
    assert get_scorer("neg_log_loss")(m, X[test], y[test]) == pytest.approx(-by_hand_loss, rel=1e-6)
    assert get_scorer("roc_auc_ovr")(m, X[test], y[test]) == pytest.approx(by_hand_auc, rel=1e-6)
    assert by_hand_auc > 0.8  # the fixture is separable: a misaligned column order would score near 0.5


@pytest.mark.reference
def test_hierarchical_and_calibrated_scorers_equal_the_metrics():
    X, y = labelled()
    train, test = next(StratifiedKFold(4, shuffle=True, random_state=1).split(X, y))
    cv = StratifiedKFold(3, shuffle=True, random_state=0)
    models = [HierarchicalClassifier(SCHEME, PARENTS, base_params=SMALL),
              CalibratedWetlandClassifier(WetlandClassifier(classes=SCHEME, **SMALL), cv=cv)]
    for m in models:
        m.fit(X[train], y[train])
        assert list(m.classes_) == sorted(SCHEME) and list(m.scheme_) == list(SCHEME)
        p, labels = aligned(m, X[test])
        assert get_scorer("neg_log_loss")(m, X[test], y[test]) == pytest.approx(
            -log_loss(y[test], p, labels=labels), rel=1e-6)
        assert get_scorer("roc_auc_ovr")(m, X[test], y[test]) == pytest.approx(
            roc_auc_score(y[test], p, labels=labels, multi_class="ovr"), rel=1e-6)


def test_classes_sorted_and_scheme_kept():
    X, y = labelled()
    keep = y != "open_water"  # a scheme class absent from training
    m = WetlandClassifier(classes=SCHEME, **SMALL).fit(X[keep], y[keep])
    assert list(m.classes_) == sorted(SCHEME) and list(m.scheme_) == list(SCHEME)
    p, ps = m.predict_proba(X), m.predict_scheme_proba(X)
    for j, c in enumerate(m.classes_):
        np.testing.assert_array_equal(p[:, j], ps[:, SCHEME.index(c)])
    assert np.all(ps[:, SCHEME.index("open_water")] == 0)
    np.testing.assert_array_equal(m.predict(X), m.classes_[np.argmax(p, axis=1)])
    assert list(m.predict_frame(X).columns) == list(SCHEME)


def test_integer_labels_accepted():
    X, y = labelled()
    codes = np.searchsorted(np.array(sorted(SCHEME)), y) + 10
    m = WetlandClassifier(**SMALL).fit(X, codes)
    assert m.classes_.tolist() == [10, 11, 12, 13] and m.predict(X).dtype.kind == "i"
    assert (m.predict(X) == codes).mean() > 0.8
    # the same model over names: the same probabilities, column for column
    named = WetlandClassifier(**SMALL).fit(X, y)
    np.testing.assert_allclose(m.predict_proba(X), named.predict_proba(X), atol=1e-6)


def test_integer_labels_against_a_scheme_of_names_are_refused_with_the_fix():
    X, y = labelled()
    with pytest.raises(ModelError, match=r"not in the class scheme.*classes=None"):
        WetlandClassifier(classes=SCHEME, **SMALL).fit(X, np.searchsorted(sorted(SCHEME), y))


@pytest.mark.parametrize("make", [
    lambda: WetlandClassifier(classes=SCHEME, **SMALL),
    lambda: HierarchicalClassifier(SCHEME, PARENTS, base_params=SMALL),
    lambda: CalibratedWetlandClassifier(WetlandClassifier(classes=SCHEME, **SMALL),
                                        cv=StratifiedKFold(3)),
])
def test_not_fitted_error_before_fit(make):
    X, _ = labelled(n=20)
    for method in ("predict", "predict_proba"):
        with pytest.raises(NotFittedError):
            getattr(make(), method)(X)


def test_cross_val_predict_predict_proba():
    """scikit-learn label-encodes y for method='predict_proba'; the out-of-fold columns must follow the
    sorted labels, and equal a fold-by-fold loop."""
    X, y = labelled()
    cv = StratifiedKFold(3, shuffle=True, random_state=0)
    m = WetlandClassifier(**SMALL)
    oof = cross_val_predict(m, X, y, cv=cv, method="predict_proba")
    by_hand = np.zeros_like(oof)
    for train, test in cv.split(X, y):
        by_hand[test] = clone(m).fit(X[train], y[train]).predict_proba(X[test])
    np.testing.assert_allclose(oof, by_hand, atol=1e-6)
    assert log_loss(y, oof, labels=sorted(SCHEME)) < 1.0


def test_scheme_proba_maps_any_classifier_by_name():
    from sklearn.linear_model import LogisticRegression

    X, y = labelled()
    lr = LogisticRegression(max_iter=500).fit(X, y)
    p = scheme_proba(lr, X[:5], ["bog", *SCHEME])
    np.testing.assert_array_equal(p[:, 0], 0)
    ref = lr.predict_proba(X[:5])
    for c in SCHEME:
        np.testing.assert_array_equal(p[:, 1 + SCHEME.index(c)], ref[:, list(lr.classes_).index(c)])
    with pytest.raises(ModelError, match="not in the scheme"):
        scheme_proba(lr, X[:5], ["upland"])
