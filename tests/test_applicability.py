"""Area of applicability: brute-force agreement, AOA behaviour, chunking, NaN policy, lazy maps.

Method: Meyer, H., Pebesma, E. (2021). Predicting into unknown space? Estimating the area of
applicability of spatial prediction models. Methods in Ecology and Evolution 12(9), 1620-1633.
Verified from the paper's abstract: DI = minimum distance to the training data in importance-weighted
predictor space; the threshold is the outlier-removed maximum of cross-validated training DI.
From memory (not checked in the paper): standardisation by training mean/SD, the normaliser
(mean of all pairwise training distances) and the whisker rule Q3 + 1.5 IQR.
"""

from __future__ import annotations

import dask.array as da
import numpy as np
import pytest
import xarray as xr
from scipy.spatial.distance import cdist, pdist

from wetlandflow.errors import ModelError, ParameterError, ValidationDesignError
from wetlandflow.inputs.grid import Grid
from wetlandflow.mapping.applicability import (
    AOA_NODATA,
    applicability_map,
    dissimilarity_index,
    fit_applicability,
    mean_pairwise_distance,
    share_outside,
    xgb_importance_weights,
)

RNG = np.random.default_rng(42)


def _training(n=60, f=4, k=4, seed=1):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, f)) * np.array([1.0, 5.0, 0.1, 2.0][:f]) + np.arange(f)
    folds = np.arange(n) % k
    weights = np.array([0.5, 2.0, 1.0, 0.0][:f])
    return X, weights, folds


def _brute(X, weights, folds, X_new):
    """Independent computation with scipy's dense distance routines (no KD-tree)."""
    Z = (X - X.mean(0)) / X.std(0, ddof=1) * weights
    Zn = (X_new - X.mean(0)) / X.std(0, ddof=1) * weights
    d_bar = pdist(Z).mean()
    D = cdist(Z, Z)
    D[folds[:, None] == folds[None, :]] = np.inf  # same fold (and self) excluded
    train_di = D.min(1) / d_bar
    q1, q3 = np.percentile(train_di, [25, 75])
    thr = train_di[train_di <= q3 + 1.5 * (q3 - q1)].max()
    return d_bar, train_di, thr, cdist(Zn, Z).min(1) / d_bar


@pytest.mark.reference
def test_matches_brute_force_pairwise_distances():
    """Meyer & Pebesma (2021) recipe (normaliser and whisker rule from memory), recomputed with
    scipy.spatial.distance.cdist/pdist on all pairs: DI, training DI and threshold agree."""
    X, w, folds = _training()
    X_new = RNG.normal(size=(200, 4)) * 3
    m = fit_applicability(X, w, folds)
    d_bar, train_di, thr, di = _brute(X, w, folds, X_new)
    np.testing.assert_allclose(m.mean_distance, d_bar, rtol=1e-12)
    np.testing.assert_allclose(m.train_di, train_di, rtol=1e-12)
    assert m.threshold == pytest.approx(thr, rel=1e-12)
    for search in ("kdtree", "scan"):  # both exact searches
        np.testing.assert_allclose(dissimilarity_index(m, X_new, search=search), di, rtol=1e-10)


@pytest.mark.reference
def test_mean_pairwise_distance_in_blocks_matches_pdist():
    """Blocked computation against scipy.spatial.distance.pdist (reference library); 2100 rows span
    more than one block."""
    Z = np.random.default_rng(3).normal(size=(2100, 5))
    assert mean_pairwise_distance(Z) == pytest.approx(pdist(Z).mean(), rel=1e-12)


@pytest.mark.reference
def test_outlier_is_removed_from_threshold():
    """Outlier-removed maximum (Meyer & Pebesma 2021, abstract): one far training point in its own
    region must not set the threshold; the whisker Q3 + 1.5 IQR (from memory) excludes it."""
    X, w, folds = _training(n=80)
    X[0] = X.mean(0) + 50 * X.std(0)
    m = fit_applicability(X, w, folds)
    assert m.train_di[0] == m.train_di.max()
    assert m.threshold < m.train_di[0]
    assert m.threshold == m.train_di[m.train_di <= m.threshold].max()


def test_far_points_outside_and_training_points_inside():
    X, w, folds = _training()
    m = fit_applicability(X, w, folds)
    far = X.mean(0) + 100 * X.std(0) * np.sign(RNG.normal(size=(10, 4)))
    assert np.all(dissimilarity_index(m, far) > m.threshold)
    di_train = dissimilarity_index(m, X)
    np.testing.assert_allclose(di_train, 0, atol=1e-12)  # the nearest training point is itself
    assert np.all(di_train <= m.threshold)


def test_weights_only_matter_by_ratio_and_zero_weight_ignores_feature():
    X, w, folds = _training()
    X_new = RNG.normal(size=(50, 4))
    a = fit_applicability(X, w, folds)
    b = fit_applicability(X, 7.5 * w, folds)
    np.testing.assert_allclose(dissimilarity_index(a, X_new), dissimilarity_index(b, X_new), rtol=1e-10)
    assert a.threshold == pytest.approx(b.threshold)
    shifted = X_new.copy()
    shifted[:, 3] += 1e6  # feature 3 has weight 0
    np.testing.assert_allclose(dissimilarity_index(a, shifted), dissimilarity_index(a, X_new), rtol=1e-10)


def test_chunked_equals_unchunked():
    X, w, folds = _training()
    m = fit_applicability(X, w, folds)
    X_new = RNG.normal(size=(1001, 4)) * 2
    np.testing.assert_array_equal(dissimilarity_index(m, X_new, chunk_rows=7),
                                  dissimilarity_index(m, X_new, chunk_rows=1_000_000))


def test_nan_policy_impute_mean_and_propagate():
    X, w, folds = _training()
    X_new = RNG.normal(size=(20, 4))
    holed = X_new.copy()
    holed[:5, 1] = np.nan
    filled = X_new.copy()
    filled[:5, 1] = X[:, 1].mean()
    m = fit_applicability(X, w, folds)
    np.testing.assert_allclose(dissimilarity_index(m, holed), dissimilarity_index(m, filled), rtol=1e-12)
    p = fit_applicability(X, w, folds, nan_policy="propagate")
    di = dissimilarity_index(p, holed)
    assert np.isnan(di[:5]).all() and np.isfinite(di[5:]).all()


def test_nan_in_training_is_imputed():
    X, w, folds = _training()
    X[3, 0] = np.nan
    m = fit_applicability(X, w, folds)
    assert np.isfinite(m.train_scaled).all()
    assert m.mean[0] == pytest.approx(np.nanmean(X[:, 0]))


def test_input_errors():
    X, w, folds = _training()
    with pytest.raises(ParameterError, match="non-negative"):
        fit_applicability(X, -w, folds)
    with pytest.raises(ParameterError, match="one importance weight per feature"):
        fit_applicability(X, w[:2], folds)
    with pytest.raises(ValidationDesignError, match="at least 2 CV folds"):
        fit_applicability(X, w, np.zeros(len(X)))
    with pytest.raises(ParameterError, match="nan_policy"):
        fit_applicability(X, w, folds, nan_policy="drop")
    m = fit_applicability(X, w, folds)
    with pytest.raises(ParameterError, match=r"\(n, 4\)"):
        dissimilarity_index(m, X[:, :3])


def _cube(chunks=None):
    grid = Grid.from_bbox((0, 0, 400, 300), crs="EPSG:32633", resolution=10)
    rng = np.random.default_rng(5)
    arrs = {f"f{i}": rng.normal(size=grid.shape) * (1 + 3 * (i == 1)) for i in range(4)}
    arrs["f0"][:, 30:] += 40  # an extrapolation zone on the right
    coords = grid.coords()
    ds = xr.Dataset({k: (("y", "x"), v) for k, v in arrs.items()}, coords=coords)
    valid = xr.DataArray(np.ones(grid.shape, bool), dims=("y", "x"), coords=coords)
    valid[:3, :3] = False
    if chunks:
        ds = ds.chunk(chunks)
    return ds, valid


def test_applicability_map_lazy_and_equal_to_array_result():
    X, w, folds = _training()
    m = fit_applicability(X, w, folds)
    eager, valid = _cube()
    lazy, _ = _cube({"y": 11, "x": 16})
    feats = [f"f{i}" for i in range(4)]
    out = applicability_map(m, lazy, feats, valid)
    assert isinstance(out["di"].data, da.Array) and isinstance(out["inside_aoa"].data, da.Array)
    res = out.compute()
    ref = applicability_map(m, eager, feats, valid)
    flat = np.stack([eager[f].values for f in feats], -1).reshape(-1, 4)
    di = dissimilarity_index(m, flat).reshape(eager["f0"].shape).astype(np.float32)
    di[~valid.values] = np.nan
    np.testing.assert_array_equal(res["di"].values, di)
    np.testing.assert_array_equal(ref["di"].values, di)
    assert res["di"].dtype == np.float32 and res["inside_aoa"].dtype == np.uint8
    flag = res["inside_aoa"].values
    assert (flag[:3, :3] == AOA_NODATA).all()
    assert (flag[3:, 30:] == 0).all()  # f0 shifted by 40 training SDs
    np.testing.assert_array_equal(flag[3:, :30], (di[3:, :30] <= m.threshold).astype(np.uint8))
    expected = np.mean(flag[flag != AOA_NODATA] == 0)
    assert share_outside(res) == pytest.approx(expected)
    assert 0.5 < share_outside(res) < 1
    assert res["di"].attrs["units"] == "1" and "Meyer" in res["di"].attrs["reference"]


def test_xgb_importance_weights_maps_by_index():
    from wetlandflow.models.classifier import WetlandClassifier

    rng = np.random.default_rng(0)
    X = rng.normal(size=(300, 4)).astype(np.float32)
    X[:, 2] = 1.0  # constant: never split on
    y = np.where(X[:, 1] > 0, "fen", "bog")
    clf = WetlandClassifier(classes=("fen", "bog"), n_estimators=20, max_depth=2).fit(X, y)
    feats = ["a", "b", "c", "d"]
    w = xgb_importance_weights(clf, feats)
    score = clf.model_.get_booster().get_score(importance_type="gain")
    assert w.shape == (4,) and w[2] == 0
    assert w[1] == pytest.approx(score["f1"]) and w[1] == w.max()
    m = fit_applicability(X, w, np.arange(300) % 5)
    assert m.weights[2] == 0
    with pytest.raises(ModelError, match="feature names"):
        xgb_importance_weights(clf, feats[:3])
    with pytest.raises(ModelError, match="kind='xgboost'"):
        xgb_importance_weights(WetlandClassifier(kind="random_forest"), feats)


@pytest.mark.reference
def test_near_ties_and_duplicates_match_scipy_brute_force():
    """The float32 ranking with its float64 re-ranking equals scipy's exact distances (cdist) also where
    many training points nearly tie: duplicated training rows and query points a hair from them."""
    rng = np.random.default_rng(7)
    X = rng.normal(size=(400, 40)) * 50.0 + 1000.0  # large offset and spread: stress cancellation
    X[200:260] = X[100:160]  # exact duplicates
    folds = np.arange(400) % 4
    model = fit_applicability(X, rng.uniform(0.5, 2.0, 40), folds)
    queries = np.vstack([X[:300] + rng.normal(scale=1e-6, size=(300, 40)), rng.normal(size=(300, 40)) * 50 + 1000])
    Z = (queries - model.mean) / model.sd * model.weights
    expected = cdist(Z, model.train_scaled).min(axis=1) / model.mean_distance
    for search in ("kdtree", "scan"):
        got = dissimilarity_index(model, queries, chunk_rows=97, search=search)
        np.testing.assert_allclose(got, expected, rtol=1e-9, atol=1e-12)


def test_search_follows_the_effective_dimensions_of_the_training_data():
    """Points near a 3-D subspace of 30 features take the KD-tree; 30 independent features the scan."""
    from wetlandflow.mapping.applicability import effective_dimensions, nearest_search

    rng = np.random.default_rng(3)
    low = rng.normal(size=(500, 3)) @ rng.normal(size=(3, 30)) + rng.normal(scale=1e-3, size=(500, 30))
    full = rng.normal(size=(500, 30))
    folds = np.arange(500) % 5
    low_model, full_model = (fit_applicability(X, np.ones(30), folds) for X in (low, full))
    assert effective_dimensions(low_model.train_scaled) == 3
    assert nearest_search(low_model) == "kdtree"
    assert effective_dimensions(full_model.train_scaled) > 20
    assert nearest_search(full_model) == "scan"
    with pytest.raises(ParameterError, match="search must be"):
        dissimilarity_index(low_model, low[:5], search="approximate")
