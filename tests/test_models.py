"""Classifiers: class order, bundles, determinism, missing values."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.base import clone
from sklearn.model_selection import GroupKFold, cross_val_score

from wetlandflow.errors import ModelError
from wetlandflow.models import ClassScheme, WetlandClassifier, check_no_sentinels, load_bundle, save_bundle

CLASSES = ("upland", "open_water", "fen", "bog")


def data(n=400, seed=0):
    rng = np.random.default_rng(seed)
    y = rng.choice(["upland", "fen", "bog"], size=n)  # open_water absent on purpose
    centre = {"upland": 0.0, "fen": 2.0, "bog": 4.0}
    X = np.stack([np.array([centre[c] for c in y]) + rng.normal(0, 0.7, n), rng.normal(size=n)], 1)
    return X.astype(np.float32), y


@pytest.mark.parametrize("kind", ["xgboost", "random_forest"])
def test_probabilities_follow_the_scheme_order(kind):
    X, y = data()
    m = WetlandClassifier(classes=CLASSES, kind=kind, n_estimators=30, max_depth=3).fit(X, y)
    p = m.predict_proba(X)
    assert p.shape == (len(X), 4)
    np.testing.assert_allclose(p.sum(1), 1, atol=1e-5)
    assert np.all(p[:, 1] == 0)  # a class absent from training gets probability 0, in its own column
    pred = m.predict(X)
    assert (pred == y).mean() > 0.8
    assert set(pred) <= {"upland", "fen", "bog"}


def test_sklearn_compatible():
    X, y = data()
    m = WetlandClassifier(classes=CLASSES, n_estimators=20, max_depth=2)
    assert clone(m).get_params() == m.get_params()
    groups = np.arange(len(y)) // 20
    scores = cross_val_score(m, X, y, groups=groups, cv=GroupKFold(4))
    assert scores.mean() > 0.7


def test_deterministic():
    X, y = data()
    a = WetlandClassifier(classes=CLASSES, n_estimators=20, random_state=3).fit(X, y).predict_proba(X)
    b = WetlandClassifier(classes=CLASSES, n_estimators=20, random_state=3).fit(X, y).predict_proba(X)
    np.testing.assert_array_equal(a, b)


@pytest.mark.parametrize("kind", ["xgboost", "random_forest"])
def test_nan_handled_the_same_at_fit_and_predict(kind):
    X, y = data()
    X[::7, 1] = np.nan
    m = WetlandClassifier(classes=CLASSES, kind=kind, n_estimators=20, max_depth=3).fit(X, y)
    assert np.isfinite(m.predict_proba(X)).all()


def test_bundle_round_trip(tmp_path):
    X, y = data()
    m = WetlandClassifier(classes=CLASSES, n_estimators=25).fit(X, y)
    save_bundle(m, tmp_path / "model", features=["a", "b"], scheme=ClassScheme(CLASSES, {}), training_hash="x")
    m2, side = load_bundle(tmp_path / "model")
    assert side["features"] == ["a", "b"] and side["scheme"]["names"] == list(CLASSES)
    np.testing.assert_allclose(m2.predict_proba(X), m.predict_proba(X), atol=1e-6)


def test_wrong_feature_count_refused():
    X, y = data()
    m = WetlandClassifier(classes=CLASSES, n_estimators=5).fit(X, y)
    with pytest.raises(ModelError, match="expected 2 features"):
        m.predict_proba(X[:, :1])


def test_unknown_label_refused():
    X, y = data()
    y[0] = "peat"
    with pytest.raises(ModelError, match="peat"):
        WetlandClassifier(classes=CLASSES, n_estimators=5).fit(X, y)


def test_sentinel_is_an_error():
    X = np.ones((5, 2), np.float32)
    X[2, 1] = -9999
    with pytest.raises(ModelError, match=r"\['b'\].*-9999"):
        check_no_sentinels(X, ["a", "b"])


def test_scheme_table_has_codes_colours_and_parents():
    t = ClassScheme(("upland", "fen", "bog"), {"wetland": ("fen", "bog")}).table()
    assert isinstance(t, pd.DataFrame)
    assert t["code"].tolist() == [1, 2, 3]
    assert t.set_index("name").loc["fen", "parent"] == "wetland"
    assert t["colour"].str.match(r"^#[0-9a-f]{6}$").all()
