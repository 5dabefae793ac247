"""Classifiers: class order, bundles, determinism, missing values."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.base import clone
from sklearn.model_selection import GroupKFold, cross_val_score

from wetlandflow.errors import ModelError
from wetlandflow.models.bundle import load_bundle, save_bundle
from wetlandflow.models.classifier import (
    ClassScheme,
    FeatureAlignmentWarning,
    WetlandClassifier,
    align_features,
    canonical_order,
    check_features,
    check_no_sentinels,
)

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
    p = m.predict_scheme_proba(X)
    assert p.shape == (len(X), 4)
    np.testing.assert_allclose(p.sum(1), 1, atol=1e-5)
    assert np.all(p[:, 1] == 0)  # a class absent from training gets probability 0, in its own column
    # predict_proba: the same columns in sorted order (scikit-learn's contract)
    assert list(m.classes_) == sorted(CLASSES) and list(m.scheme_) == list(CLASSES)
    np.testing.assert_array_equal(m.predict_proba(X), p[:, [CLASSES.index(c) for c in m.classes_]])
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


def test_threads_are_fixed_whatever_the_openmp_limit():
    """A one-thread OpenMP limit (``OMP_NUM_THREADS=1``, as dask.distributed sets it) does not change the
    model fitted with ``n_threads=2``; a one-thread model is another model, so the check can fail."""
    from threadpoolctl import threadpool_limits

    rng = np.random.default_rng(0)
    X = rng.normal(size=(3000, 12)).astype(np.float32)
    y = np.array(CLASSES)[rng.integers(0, len(CLASSES), 3000)]
    make = lambda n: WetlandClassifier(classes=CLASSES, n_estimators=20, n_threads=n)  # noqa: E731
    raw = lambda m: bytes(m.model_.get_booster().save_raw("ubj"))  # noqa: E731
    free = raw(make(2).fit(X, y))
    with threadpool_limits(limits=1, user_api="openmp"):
        limited = raw(make(2).fit(X, y))
    assert limited == free
    assert raw(make(1).fit(X, y)) != free


@pytest.mark.parametrize("kind", ["xgboost", "random_forest"])
def test_nan_handled_the_same_at_fit_and_predict(kind):
    X, y = data()
    X[::7, 1] = np.nan
    m = WetlandClassifier(classes=CLASSES, kind=kind, n_estimators=20, max_depth=3).fit(X, y)
    assert np.isfinite(m.predict_proba(X)).all()


def test_bundle_round_trip(tmp_path):
    X, y = data()
    m = WetlandClassifier(classes=CLASSES, n_estimators=25).fit(X, y)
    save_bundle(m, tmp_path / "model", features=["a", "b"], scheme=ClassScheme(CLASSES, {}),
                training_hash="x")
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


# --------------------------------------------------------------------------- deterministic mode


def _model_bytes(model, folder):
    save_bundle(model, folder, features=["a", "b"], scheme=ClassScheme(CLASSES, {}), training_hash="x")
    side = (folder / "bundle.json").read_text()
    return (folder / ("model.ubj" if model.kind == "xgboost" else "model.joblib")).read_bytes(), side


@pytest.mark.parametrize("kind", ["xgboost", "random_forest"])
def test_deterministic_mode_gives_the_same_model_file(kind, tmp_path):
    """Fixed threads and seed, same inputs: byte-identical model files (not only equal predictions)."""
    X, y = data()
    make = lambda: WetlandClassifier(classes=CLASSES, kind=kind, n_estimators=15, max_depth=4,  # noqa: E731
                                     n_threads=2, random_state=7)
    a, side_a = _model_bytes(make().fit(X, y), tmp_path / "a")
    b, side_b = _model_bytes(make().fit(X, y), tmp_path / "b")
    assert a == b and side_a == side_b
    other = WetlandClassifier(classes=CLASSES, kind=kind, n_estimators=15, max_depth=4, n_threads=2,
                              random_state=8).fit(X, y)
    if kind == "random_forest":  # the seed matters to the forest (bootstrap), so the check can fail
        assert _model_bytes(other, tmp_path / "c")[0] != a


def test_canonical_order_makes_the_model_independent_of_row_order(tmp_path):
    X, y = data()
    rng = np.random.default_rng(1)
    samples = pd.DataFrame({"plot_id": np.arange(len(y)) // 10, "class": y, "x": rng.uniform(0, 1e4, len(y)),
                            "y": rng.uniform(0, 1e4, len(y)), "a": X[:, 0], "b": X[:, 1]})
    shuffled = samples.sample(frac=1.0, random_state=3)
    fits = []
    for i, s in enumerate((samples, shuffled)):
        s = canonical_order(s)
        m = WetlandClassifier(classes=CLASSES, n_estimators=15, n_threads=2).fit(s[["a", "b"]], s["class"])
        fits.append(_model_bytes(m, tmp_path / str(i))[0])
    assert fits[0] == fits[1]
    assert canonical_order(shuffled).equals(canonical_order(samples))


def test_sentinel_at_predict_time_is_an_error():
    X, y = data()
    m = WetlandClassifier(classes=CLASSES, n_estimators=5).fit(pd.DataFrame(X, columns=["a", "b"]), y)
    X[3, 0] = -32768
    with pytest.raises(ModelError, match=r"\['a'\].*-32768"):
        m.predict_proba(X)


# --------------------------------------------------------------------------- feature alignment


@pytest.fixture(scope="module")
def bundle(tmp_path_factory):
    X, y = data()
    folder = tmp_path_factory.mktemp("bundle") / "model"
    m = WetlandClassifier(classes=CLASSES, n_estimators=25, max_depth=3).fit(X, y)
    save_bundle(m, folder, features=["a", "b"], scheme=ClassScheme(CLASSES, {}), training_hash="x")
    model, side = load_bundle(folder)
    return model, side, pd.DataFrame(X, columns=["a", "b"]), m.predict_proba(X)


def test_reordered_features_are_put_back_in_model_order(bundle):
    model, side, frame, expected = bundle
    swapped = frame[["b", "a"]]
    chk = check_features(swapped, side)
    assert chk.reordered and not chk.missing and not chk.ignored and "reordered" in chk.note
    assert list(align_features(swapped, side).columns) == ["a", "b"]
    np.testing.assert_allclose(model.predict_proba(swapped), expected, atol=1e-6)
    # a plain array in the wrong order cannot be detected, so the names matter: the result differs
    assert not np.allclose(model.predict_proba(swapped.to_numpy()), expected, atol=1e-3)


def test_missing_feature_is_refused_with_names_and_the_fix(bundle):
    model, side, frame, _ = bundle
    with pytest.raises(ModelError, match=r"lack 1 feature.*\['b'\].*Rebuild the feature cube.*retrain"):
        align_features(frame[["a"]], side)
    with pytest.raises(ModelError, match=r"\['b'\]"):
        model.predict_proba(frame[["a"]].assign(c=1.0))


def test_extra_features_are_ignored_with_a_note(bundle):
    model, side, frame, expected = bundle
    wider = frame.assign(extra=0.5)[["extra", "b", "a"]]
    with pytest.warns(FeatureAlignmentWarning, match="extra"):
        out = align_features(wider, side)
    assert list(out.columns) == ["a", "b"]
    assert check_features(wider, side).ignored == ("extra",)
    with pytest.warns(FeatureAlignmentWarning):
        np.testing.assert_allclose(model.predict_proba(wider), expected, atol=1e-6)
    with pytest.raises(ModelError, match="does not use"):
        align_features(wider, side, on_extra="raise")


def test_cube_alignment_stays_lazy_and_keeps_the_order(bundle):
    import dask.array as da
    import xarray as xr

    _, side, _, _ = bundle
    grid = {"y": np.arange(4.0), "x": np.arange(5.0)}
    cube = xr.Dataset({n: (("y", "x"), da.ones((4, 5), chunks=2) * i) for i, n in enumerate(["c", "b", "a"])},
                      coords=grid)
    with pytest.warns(FeatureAlignmentWarning):
        out = align_features(cube, side)
    assert list(out.data_vars) == ["a", "b"] and out["a"].chunks is not None
    with pytest.raises(ModelError, match=r"\['a'\]"):
        align_features(cube[["b", "c"]], side)
    with pytest.raises(ModelError, match="DataFrame"):
        align_features(np.ones((3, 2)), side)
