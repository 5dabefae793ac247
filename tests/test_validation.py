"""Tests for wetlandflow.validation.splitters, .nndm, .variogram and .nested (spatial CV designs)."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.spatial.distance import cdist
from sklearn.ensemble import RandomForestClassifier
from sklearn.model_selection import (
    GridSearchCV,
    GroupKFold,
    KFold,
    ShuffleSplit,
    cross_val_predict,
    cross_val_score,
)

from wetlandflow.errors import BudgetError, ValidationDesignError
from wetlandflow.validation import nested, variogram
from wetlandflow.validation import splitters as validation
from wetlandflow.validation.nested import spatial_grid_search, subset_splitter
from wetlandflow.validation.splitters import (
    KNNDM,
    NNDM,
    BufferedSplitter,
    FewPlotsWarning,
    SpatialBlockKFold,
    assign_folds,
    block_ids,
    check_folds,
    cv_distance_diagnostics,
    fold_class_counts,
    knndm_folds,
    nn_distances,
    nndm_train_sets,
    plot_distance_ecdf,
    plot_folds,
    random_pixel_kfold,
    wasserstein_w,
)
from wetlandflow.validation.variogram import suggest_block_size

CLASSES = np.array(["bog", "fen", "marsh", "upland"])


def make_samples(
    n_plots: int = 60, per_plot: int = 4, extent: float = 10_000.0, seed: int = 0
) -> pd.DataFrame:
    """Synthetic samples table: plots of a few pixels, class loosely tied to position."""
    rng = np.random.default_rng(seed)
    centres = rng.uniform(0, extent, size=(n_plots, 2))
    cls = CLASSES[np.arange(n_plots) % CLASSES.size]
    plot = np.repeat(np.arange(n_plots), per_plot)
    xy = centres[plot] + rng.normal(0, 15, size=(plot.size, 2))
    label = cls[plot]
    code = np.searchsorted(CLASSES, label)
    f1 = code + rng.normal(0, 0.7, plot.size) + xy[:, 0] / extent
    f2 = rng.normal(0, 1, plot.size) + 0.5 * code
    return pd.DataFrame(
        {
            "plot_id": [f"p{p}" for p in plot],
            "class": label,
            "x": xy[:, 0],
            "y": xy[:, 1],
            "f1": f1.astype(np.float32),
            "f2": f2.astype(np.float32),
        }
    )


def arrays(s: pd.DataFrame):
    return (
        s[["f1", "f2"]].to_numpy(),
        s["class"].to_numpy(),
        s["plot_id"].to_numpy(),
        s[["x", "y"]].to_numpy(),
    )


def check_splitter_invariants(cv, X, y, groups, xy, *, kfold: bool = True, buffer_m: float | None = None):
    """Invariants every splitter here must keep (in the spirit of scikit-learn's splitter tests)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FewPlotsWarning)
        splits = list(cv.split(X, y, groups))
        again = list(cv.split(X, y, groups))
    n = len(X)
    assert len(splits) == cv.get_n_splits(X, y, groups)
    tested = np.zeros(n, dtype=int)
    g = np.asarray(groups)
    for (train, test), (train2, test2) in zip(splits, again, strict=True):
        assert train.dtype.kind == "i" and test.dtype.kind == "i"
        assert np.intersect1d(train, test).size == 0, "train and test overlap"
        assert np.unique(train).size == train.size and np.unique(test).size == test.size
        assert train.min() >= 0 and test.max() < n and test.size > 0 and train.size > 0
        assert not set(g[train]) & set(g[test]), "a plot is on both sides"
        if buffer_m is not None:
            assert cdist(xy[train], xy[test]).min() > buffer_m, "training sample inside the buffer"
        np.testing.assert_array_equal(train, train2)  # deterministic for a seed
        np.testing.assert_array_equal(test, test2)
        tested[test] += 1
    if kfold:
        assert (tested == 1).all(), "k-fold designs test every sample exactly once"
    return splits


# --------------------------------------------------------------------------- blocks


def test_block_ids_follow_grid_definition():
    x = np.array([0.0, 99.9, 100.0, 250.0, 0.0])
    y = np.array([0.0, 0.0, 0.0, 120.0, 310.0])
    ids = block_ids(x, y, 100.0)
    # col = floor(x / 100), row = floor(y / 100), id = row * n_cols + col with n_cols = 3
    np.testing.assert_array_equal(ids, [0, 0, 1, 5, 9])
    np.testing.assert_array_equal(block_ids(x + 1e5, y - 7e5, 100.0), ids)  # origin follows the data
    assert block_ids(x, y, 100.0, origin=(-50.0, 0.0))[0] == 0
    with pytest.raises(ValidationDesignError, match="block_size_m"):
        block_ids(x, y, 0.0)


def test_spatial_block_kfold_invariants_and_balance():
    s = make_samples()
    X, y, g, xy = arrays(s)
    cv = SpatialBlockKFold(n_splits=4, block_size_m=1500, random_state=1, coords=xy)
    check_splitter_invariants(cv, X, y, g, xy)
    folds = assign_folds(cv, X, y, g)
    table = fold_class_counts(y, folds, g)
    plots = table["plots"]
    assert (plots > 0).all().all()  # every class tested in every fold (15 plots per class, 4 folds)
    assert (plots.max(axis=1) - plots.min(axis=1)).max() <= 3
    assert table["samples"].to_numpy().sum() == len(s)


def test_whole_blocks_and_majority_plots_stay_together():
    s = make_samples(n_plots=40, seed=3)
    X, y, g, xy = arrays(s)
    # one plot whose pixels straddle a block edge: 3 pixels in one block, 1 in the next
    xy = xy.copy()
    first = np.flatnonzero(g == "p0")
    xy[first] = [[990.0, 10.0], [995.0, 10.0], [998.0, 12.0], [1004.0, 10.0]]
    cv = SpatialBlockKFold(
        n_splits=3, block_size_m=1000, random_state=0, coords=xy, origin=(0.0, 0.0), on_class_missing="ignore"
    )
    folds = assign_folds(cv, X, y, g)
    assert np.unique(folds[first]).size == 1
    blocks = block_ids(xy[:, 0], xy[:, 1], 1000, origin=(0.0, 0.0))
    others = np.setdiff1d(np.arange(len(s)), first)
    per_block = pd.Series(folds[others]).groupby(blocks[others]).nunique()
    assert (per_block == 1).all()  # no block is split across folds
    assert folds[first[0]] == pd.Series(folds).groupby(blocks).first()[blocks[first[0]]]


def test_seed_changes_assignment_and_fixed_seed_repeats():
    X, y, g, xy = arrays(make_samples())
    a = assign_folds(SpatialBlockKFold(4, 1000, random_state=0, coords=xy), X, y, g)
    b = assign_folds(SpatialBlockKFold(4, 1000, random_state=0, coords=xy), X, y, g)
    c = assign_folds(SpatialBlockKFold(4, 1000, random_state=7, coords=xy), X, y, g)
    np.testing.assert_array_equal(a, b)
    assert (a != c).any()


def test_sklearn_integration_cross_val_score_and_grid_search():
    X, y, g, xy = arrays(make_samples())
    cv = SpatialBlockKFold(n_splits=3, block_size_m=2000, random_state=0, coords=xy)
    scores = cross_val_score(RandomForestClassifier(n_estimators=10, random_state=0), X, y, groups=g, cv=cv)
    assert scores.shape == (3,) and np.isfinite(scores).all()
    pred = cross_val_predict(RandomForestClassifier(n_estimators=10, random_state=0), X, y, groups=g, cv=cv)
    assert pred.shape == y.shape
    search = GridSearchCV(
        RandomForestClassifier(n_estimators=5, random_state=0), {"max_depth": [2, 4]}, cv=cv
    )
    search.fit(X, y, groups=g)
    assert search.best_params_["max_depth"] in (2, 4)
    assert "SpatialBlockKFold" in repr(cv)


def test_constructor_stores_parameters_and_split_validates():
    cv = SpatialBlockKFold(n_splits=1, block_size_m=-5)
    assert cv.n_splits == 1 and cv.block_size_m == -5 and cv.coords is None  # nothing checked at construction
    X, y, g, xy = arrays(make_samples(20))
    with pytest.raises(ValidationDesignError, match="'n_splits' parameter of SpatialBlockKFold"):
        list(SpatialBlockKFold(n_splits=1, coords=xy).split(X, y, g))
    with pytest.raises(ValidationDesignError, match="no coordinates"):
        list(SpatialBlockKFold().split(X, y, g))
    with pytest.raises(ValidationDesignError, match="X has 19 rows but coords has 80"):
        list(SpatialBlockKFold(coords=xy).split(X[:19], y[:19], g[:19]))
    with pytest.raises(ValidationDesignError, match="fewer than n_splits"):
        list(SpatialBlockKFold(n_splits=5, block_size_m=1e6, coords=xy).split(X, y, g))


# --------------------------------------------------------------------------- class checks


def test_class_with_one_plot_raises_naming_the_class():
    s = make_samples(40)
    s.loc[s["plot_id"] == "p1", "class"] = "swamp"  # 'swamp' now has exactly one plot
    X, y, g, xy = arrays(s)
    cv = SpatialBlockKFold(n_splits=3, block_size_m=1500, random_state=0, coords=xy)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FewPlotsWarning)
        with pytest.raises(
            ValidationDesignError, match=r"class 'swamp' \(1 plot\(s\) in total\).*training side"
        ) as e:
            list(cv.split(X, y, g))
    assert "Merge 'swamp'" in str(e.value) and "fewer folds" in str(e.value)


def test_few_plots_warns():
    s = make_samples(40)
    s.loc[s["plot_id"].isin(["p1", "p5"]), "class"] = "swamp"  # two plots, three folds
    X, y, g, xy = arrays(s)
    cv = SpatialBlockKFold(n_splits=3, block_size_m=1500, random_state=0, coords=xy)
    with pytest.warns(FewPlotsWarning, match="'swamp' has 2 plot"):
        list(cv.split(X, y, g))


def test_check_folds_flags_class_missing_from_test_side():
    y = np.array(["a"] * 6 + ["b"] * 6)
    groups = np.arange(12)
    folds = np.array([0, 1, 2, 0, 1, 2, 0, 0, 1, 1, 0, 1])  # 'b' has 6 plots, none tested in fold 2
    with pytest.raises(ValidationDesignError, match="class 'b' .* test side of fold 2"):
        check_folds(y, folds, groups)
    table = check_folds(y, folds, groups, on_missing="ignore")
    assert table.loc["b", ("plots", 0)] == 3


def test_random_pixel_kfold_refuses_unless_allowed():
    with pytest.raises(ValidationDesignError, match="leaks information"):
        random_pixel_kfold(5)
    cv = random_pixel_kfold(5, random_state=0, allow_random_pixels=True)
    assert isinstance(cv, KFold) and cv.get_n_splits() == 5


def test_assign_folds_rejects_overlapping_test_sets():
    X = np.zeros((20, 1))
    f = assign_folds(GroupKFold(4), X, groups=np.arange(20) // 2)
    assert set(f) == {0, 1, 2, 3}
    with pytest.raises(ValidationDesignError, match="more than once"):
        assign_folds(ShuffleSplit(5, test_size=0.5, random_state=0), X)


# --------------------------------------------------------------------------- buffers


def test_buffered_splitter_removes_training_samples_near_test():
    X, y, g, xy = arrays(make_samples())
    base = SpatialBlockKFold(n_splits=4, block_size_m=2000, random_state=0, coords=xy)
    cv = BufferedSplitter(base, buffer_m=800.0)
    splits = check_splitter_invariants(cv, X, y, g, xy, buffer_m=800.0)
    full = list(base.split(X, y, g))
    assert sum(len(t) for t, _ in splits) < sum(len(t) for t, _ in full)
    cv2 = BufferedSplitter(GroupKFold(4), buffer_m=300.0, coords=xy)
    check_splitter_invariants(cv2, X, y, g, xy, buffer_m=300.0)
    with pytest.raises(ValidationDesignError, match="removes every training sample"):
        list(BufferedSplitter(base, buffer_m=1e6).split(X, y, g))


# --------------------------------------------------------------------------- property tests


@st.composite
def point_sets(draw):
    n_plots = draw(st.integers(6, 30))
    seed = draw(st.integers(0, 2**16))
    rng = np.random.default_rng(seed)
    per = rng.integers(1, 4, n_plots)
    plot = np.repeat(np.arange(n_plots), per)
    centres = rng.uniform(0, 5000, (n_plots, 2))
    xy = centres[plot] + rng.uniform(-30, 30, (plot.size, 2))
    y = rng.choice(["a", "b", "c"], n_plots)[plot]
    return xy, y, plot, draw(st.floats(300, 2000)), draw(st.integers(2, 4)), draw(st.floats(0, 400))


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(point_sets())
def test_property_block_and_buffer_invariants(data):
    xy, y, plot, block, k, buffer_m = data
    X = np.zeros((len(y), 1))
    cv = SpatialBlockKFold(
        n_splits=k, block_size_m=block, random_state=0, coords=xy, on_class_missing="ignore"
    )
    try:
        check_splitter_invariants(cv, X, y, plot, xy)
        check_splitter_invariants(
            BufferedSplitter(cv, buffer_m, on_class_missing="ignore"), X, y, plot, xy, buffer_m=buffer_m
        )
    except ValidationDesignError as e:  # too few blocks, or a buffer that empties a fold: both are reported
        assert "fewer than n_splits" in str(e) or "removes every training sample" in str(e)


@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(point_sets())
def test_property_nndm_knndm_invariants(data):
    xy, y, plot, _, k, _ = data
    X = np.zeros((len(y), 1))
    pred = np.random.default_rng(1).uniform(0, 5000, (200, 2))
    kcv = KNNDM(pred, n_splits=k, coords=xy, n_candidates=10, random_state=0, max_fold_frac=0.9)
    check_splitter_invariants(kcv, X, y, plot, xy)
    splits = check_splitter_invariants(NNDM(pred, coords=xy), X, y, plot, xy, kfold=True)
    n_units = np.unique(plot).size
    assert all(np.unique(plot[tr]).size > 0.5 * n_units - 1 for tr, _ in splits)  # min_train = 0.5


# --------------------------------------------------------------------------- NNDM / kNNDM


def clustered_points(n_clusters=8, per=25, extent=10_000.0, spread=150.0, seed=0):
    rng = np.random.default_rng(seed)
    centres = rng.uniform(0.1 * extent, 0.9 * extent, (n_clusters, 2))
    return np.repeat(centres, per, axis=0) + rng.normal(0, spread, (n_clusters * per, 2))


def random_kfold_w(xy, pred, k, seeds=range(5)):
    gij = nn_distances(xy, pred)
    ws = []
    for s in seeds:
        folds = np.random.default_rng(s).permutation(np.resize(np.arange(k), len(xy)))
        d = np.concatenate([nn_distances(xy[folds != f], xy[folds == f]) for f in range(k)])
        ws.append(wasserstein_w(d, gij))
    return float(np.mean(ws)), d


@pytest.mark.reference
def test_wasserstein_w_analytic():
    """W between point masses at a and b is |a - b|; between U(0,1) samples and their shift by c it is c.

    Source: definition of the first Wasserstein distance as the integral of |F - G| (the statistic of
    Linnenbrink et al. 2024, kNNDM CV, Geosci. Model Dev. 17, 5897-5912).
    """
    assert wasserstein_w([2.0, 2.0], [5.0]) == pytest.approx(3.0)
    u = np.linspace(0, 1, 1001)
    assert wasserstein_w(u, u + 0.25) == pytest.approx(0.25)


@pytest.mark.reference
def test_knndm_uniform_training_matches_random_kfold():
    """DERIVED (Linnenbrink et al. 2024, kNNDM CV, Geosci. Model Dev. 17, 5897-5912): with training points
    sampled uniformly over the prediction area, kNNDM's configuration has W close to random k-fold's."""
    rng = np.random.default_rng(2)
    xy = rng.uniform(0, 10_000, (300, 2))
    pred = rng.uniform(0, 10_000, (2000, 2))
    w_random, _ = random_kfold_w(xy, pred, 5)
    res = knndm_folds(xy, pred, 5, random_if_not_clustered=False, n_candidates=40, random_state=0)
    assert res.W <= 1.25 * w_random
    assert np.isfinite(res.candidates["W"]).any()
    # Training on a regular grid is more dispersed than the prediction task (LOO distance = spacing,
    # prediction distances <= spacing / sqrt 2), so the one-sided KS test finds no clustering and random
    # k-fold is returned.
    g = np.arange(250.0, 10_000, 500.0)
    grid = np.column_stack([a.ravel() for a in np.meshgrid(g, g)])
    shortcut = knndm_folds(grid, pred, 5, random_state=0)
    assert shortcut.method == "random" and shortcut.n_clusters is None


@pytest.mark.reference
def test_knndm_clustered_training_gives_longer_cv_distances():
    """Linnenbrink et al. (2024), kNNDM CV: for clustered training data and a uniform prediction area, kNNDM
    folds raise test-to-train distances towards the prediction-to-train distances (smaller W than random)."""
    xy = clustered_points()
    pred = np.random.default_rng(5).uniform(0, 10_000, (2000, 2))
    w_random, d_random = random_kfold_w(xy, pred, 5)
    res = knndm_folds(xy, pred, 5, random_state=0, n_candidates=40)
    assert res.method == "hierarchical"
    assert np.median(res.cv_distances) > 3 * np.median(d_random)
    assert res.W < 0.5 * w_random
    assert np.bincount(res.folds).max() <= 0.5 * len(xy)
    km = knndm_folds(xy, pred, 5, clustering="kmeans", random_state=0, n_candidates=15)
    assert km.W < w_random


@pytest.mark.reference
def test_nndm_moves_loo_towards_prediction_distances():
    """Milà et al. (2022), NNDM LOO CV (Methods Ecol. Evol. 13, 1304-1316): exclusion radii grow so the CV
    NN-distance ECDF approaches the prediction ECDF, keeping > min_train of the data for training."""
    xy = clustered_points(per=15)
    pred = np.random.default_rng(5).uniform(0, 10_000, (1500, 2))
    res = nndm_train_sets(xy, pred)
    assert res.W < 0.5 * res.W_loo
    d = cdist(xy, xy)
    np.fill_diagonal(d, np.inf)
    assert (res.radius >= d.min(axis=1)).all()
    assert ((d >= res.radius[:, None]).sum(axis=1) > 0.5 * len(xy) - 1).all()
    assert np.mean(res.radius > d.min(axis=1)) > 0.5  # most clustered points lose their near neighbours
    # Uniform training data: LOO distances already follow the prediction distances, so few radii grow.
    u = np.random.default_rng(6).uniform(0, 10_000, (120, 2))
    du = cdist(u, u)
    np.fill_diagonal(du, np.inf)
    assert np.mean(nndm_train_sets(u, pred).radius > du.min(axis=1)) < 0.25


def test_nndm_splitter_uses_plots_and_guards_size():
    s = make_samples(30)
    X, y, g, xy = arrays(s)
    pred = np.random.default_rng(0).uniform(0, 10_000, (300, 2))
    cv = NNDM(pred, coords=xy)
    assert cv.get_n_splits(X, y, g) == 30
    check_splitter_invariants(cv, X, y, g, xy)
    with pytest.raises(BudgetError, match="max_points"):
        list(NNDM(pred, coords=xy, max_points=10).split(X, y))


def test_knndm_splitter_in_cross_val_predict():
    s = make_samples(40)
    X, y, g, xy = arrays(s)
    pred = np.random.default_rng(0).uniform(0, 10_000, (500, 2))
    cv = KNNDM(pred, n_splits=4, coords=xy, random_state=0, n_candidates=20)
    check_splitter_invariants(cv, X, y, g, xy)
    out = cross_val_predict(RandomForestClassifier(n_estimators=5, random_state=0), X, y, groups=g, cv=cv)
    assert out.shape == y.shape


# --------------------------------------------------------------------------- diagnostics and figures


def test_cv_distance_diagnostics_and_figures():
    s = make_samples()
    X, y, g, xy = arrays(s)
    pred = np.random.default_rng(0).uniform(0, 10_000, (800, 2))
    blocks = assign_folds(SpatialBlockKFold(4, 2500, random_state=0, coords=xy), X, y, g)
    pixels = assign_folds(random_pixel_kfold(4, random_state=0, allow_random_pixels=True), X)
    diag = cv_distance_diagnostics(xy, {"random pixels": pixels, "blocks": blocks}, pred)
    med = diag.groupby("what")["distance"].median()
    assert set(med.index) == {"sample-to-sample", "prediction-to-sample", "CV: random pixels", "CV: blocks"}
    assert med["CV: blocks"] > 5 * med["CV: random pixels"]  # random pixels sit next to their plot-mates
    assert (diag.groupby("what").size()["CV: blocks"]) == len(s)
    fig = plot_distance_ecdf(diag)
    assert len(fig.axes[0].lines) == 4
    fig2 = plot_folds(s, blocks, block_size_m=2500)
    assert fig2.axes[0].get_xlabel() == "x (m)"


def test_nn_distances_simple_geometry():
    np.testing.assert_allclose(nn_distances([[0, 0], [10, 0]], [[3, 4], [10, 1]]), [5.0, 1.0])


# --------------------------------------------------------------------------- block size from a variogram


def exponential_field(n=40, spacing=10.0, range_param=40.0, seed=0):
    """Gaussian field with covariance exp(-h / range_param), simulated by Cholesky factorisation."""
    g = np.arange(n) * spacing
    xx, yy = np.meshgrid(g, g)
    xy = np.column_stack([xx.ravel(), yy.ravel()])
    cov = np.exp(-cdist(xy, xy) / range_param)
    chol = np.linalg.cholesky(cov + 1e-10 * np.eye(len(xy)))
    return xy, chol @ np.random.default_rng(seed).standard_normal(len(xy))


@pytest.mark.reference
def test_variogram_recovers_exponential_range():
    """Analytic check: a field with covariance exp(-h/a) has variogram 1 - exp(-h/a) (Matheron's
    semivariogram of a stationary field, gamma(h) = C(0) - C(h)); the fitted range parameter must be
    within 30 % of a, and the practical range (95 % of the sill) is 3a."""
    a = 25.0
    fitted, sills = [], []
    for seed in range(5):  # one realisation is noisy; the median over five is the estimate checked
        xy, z = exponential_field(range_param=a, seed=seed)
        sug = suggest_block_size(xy[:, 0], xy[:, 1], z, model="exponential", max_lag=150.0, n_lags=20)
        fitted.append(sug.fit["range_param_m"])
        sills.append(sug.fit["nugget"] + sug.fit["partial_sill"])
        assert sug.block_size_m == pytest.approx(3 * sug.fit["range_param_m"])
    assert np.median(fitted) == pytest.approx(a, rel=0.3)
    assert np.median(sills) == pytest.approx(1.0, rel=0.3)  # C(0) = 1
    assert {"lag", "gamma", "n_pairs", "fitted"} <= set(sug.variogram.columns)


def test_suggest_block_size_on_feature_stack_uses_first_pc():
    xy, z = exponential_field(n=25, seed=4)
    rng = np.random.default_rng(0)
    stack = np.column_stack([z, 2 * z + 0.1 * rng.standard_normal(z.size), -z])
    stack[3, 1] = np.nan
    sug = suggest_block_size(xy[:, 0], xy[:, 1], stack, max_lag=120.0)
    assert sug.fit["source"] == "first principal component"
    assert sug.fit["model"] in ("spherical", "exponential") and sug.block_size_m > 0


# --------------------------------------------------------------------------- nested tuning


def test_spatial_grid_search_passes_groups_and_subset_coords():
    s = make_samples(48)
    X, y, g, xy = arrays(s)
    outer = SpatialBlockKFold(3, 2500, random_state=0, coords=xy)
    inner = SpatialBlockKFold(2, 2500, random_state=0, coords=xy, on_class_missing="ignore")
    res = spatial_grid_search(
        RandomForestClassifier(n_estimators=5, random_state=0),
        {"max_depth": [2, 3]},
        X,
        y,
        g,
        outer=outer,
        inner=inner,
    )
    assert res.scores.shape == (3,) and all(p["max_depth"] in (2, 3) for p in res.best_params)
    assert (res.folds >= 0).all() and set(res.predictions) <= set(y)
    sub = subset_splitter(BufferedSplitter(inner, 100.0, coords=xy), np.arange(10))
    assert sub.coords.shape == (10, 2) and sub.base_splitter.coords.shape == (10, 2)
    assert inner.coords.shape == xy.shape  # the original is untouched
    # every candidate's inner score is kept; the chosen one has rank 1 in its outer fold
    assert len(res.candidates) == 3 * 2
    for f, best in enumerate(res.best_params):
        chosen = res.candidates[(res.candidates["outer_fold"] == f) & (res.candidates["rank"] == 1)]
        assert str(best) in set(chosen["params"])


@pytest.mark.reference
def test_spatial_early_stopping_scores_the_given_folds_like_scikit_learn_log_loss():
    """The stopping curve is the fold-mean of scikit-learn's ``log_loss`` of models fitted on the other folds.

    Checked against scikit-learn's ``log_loss`` (a general-purpose reference library) and XGBoost's own
    training API; the stopping rule is xgboost.cv's (the last history row is the best round).
    """
    import xgboost as xgb
    from sklearn.metrics import log_loss

    from wetlandflow.validation.nested import spatial_early_stopping

    s = make_samples(60)
    X, y, g, xy = arrays(s)
    folds = SpatialBlockKFold(3, 2500, random_state=0, coords=xy, on_class_missing="ignore").split(X, y, g)
    fold_of = np.empty(len(y), int)
    for k, (_, test) in enumerate(folds):
        fold_of[test] = k
    params = {"max_depth": 2, "learning_rate": 0.3, "nthread": 1}
    best, hist = spatial_early_stopping(X, y, fold_of, params=params, max_rounds=40, patience=5)
    assert best == len(hist) and 1 <= best <= 40
    assert hist["test-mlogloss-mean"].iloc[-1] == hist["test-mlogloss-mean"].min()
    labels, yi = np.unique(y, return_inverse=True)
    losses = []
    for k in np.unique(fold_of):
        tr, te = fold_of != k, fold_of == k
        booster = xgb.train({"tree_method": "hist", **params, "objective": "multi:softprob",
                             "num_class": labels.size, "seed": 0},
                            xgb.DMatrix(X[tr], label=yi[tr]), num_boost_round=best)
        p = booster.predict(xgb.DMatrix(X[te]))
        losses.append(log_loss(yi[te], p, labels=np.arange(labels.size)))
    assert np.mean(losses) == pytest.approx(hist["test-mlogloss-mean"].iloc[-1], rel=1e-3)


def test_moved_functions_are_re_exported_by_validation():
    """The variogram and nested-tuning code moved to their own modules; validation still offers them."""
    for module in (variogram, nested):
        for name in module.__all__:
            assert getattr(validation, name) is getattr(module, name)
            assert name in validation.__all__

