"""Tests for wetlandflow.explain.attribution and wetlandflow.explain.plots.

Reference checks: local accuracy of TreeSHAP and
agreement with the reference library ``shap`` (PyPI), after
Lundberg, S. M. et al. (2020) From local explanations to global understanding with
explainable AI for trees. Nature Machine Intelligence 2(1), 56-67; and
Chen, T., Guestrin, C. (2016) XGBoost: A Scalable Tree Boosting System. Proc. KDD, 785-794.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from wetlandflow.errors import BudgetError, ParameterError
from wetlandflow.explain.attribution import (
    CLUSTER_NOTE,
    _shap_layout,
    _xgb_contribs_layout,
    cluster_importance,
    domain_importance,
    explain_budget,
    global_importance,
    ranking_stability,
    shap_interactions,
    shap_map,
    shap_values,
    stratified_subsample,
    write_shap_map,
)
from wetlandflow.models.classifier import WetlandClassifier

SCHEME = ("upland", "open_water", "marsh", "bog")  # open_water is never in the training labels
FEATURES = ["signal_a", "signal_b", "noise_1", "noise_2", "noise_3"]


def _data(n: int = 400, seed: int = 0) -> tuple[pd.DataFrame, np.ndarray]:
    rng = np.random.default_rng(seed)
    X = pd.DataFrame(rng.normal(size=(n, len(FEATURES))).astype(np.float32), columns=FEATURES)
    y = np.where(X["signal_a"] > 0.3, "marsh", np.where(X["signal_b"] > 0.0, "bog", "upland"))
    return X, y


@pytest.fixture(scope="module")
def data():
    return _data()


@pytest.fixture(scope="module")
def xgb_model(data):
    X, y = data
    return WetlandClassifier(classes=SCHEME, n_estimators=30, max_depth=3).fit(X.to_numpy(), y)


@pytest.fixture(scope="module")
def rf_model(data):
    X, y = data
    return WetlandClassifier(classes=SCHEME, kind="random_forest", n_estimators=25, max_depth=5).fit(
        X.to_numpy(), y)


@pytest.fixture(scope="module")
def xgb_sv(xgb_model, data):
    return shap_values(xgb_model, data[0], features=FEATURES)


# --------------------------------------------------------------------------- reference checks


@pytest.mark.reference
def test_local_accuracy_xgboost_margin(xgb_model, xgb_sv, data):
    """base + sum phi = raw margin per class (Lundberg et al. 2020, local accuracy; xgboost docs:
    pred_contribs rows sum to the output_margin prediction).  atol 1e-4 for float32 (DERIVED)."""
    from xgboost import DMatrix

    margin = xgb_model.model_.get_booster().predict(DMatrix(data[0].to_numpy()), output_margin=True)
    recon = (xgb_sv["base_value"] + xgb_sv["values"].sum("feature")).sel({"class": list(xgb_model.present_)})
    assert xgb_sv.attrs["output_scale"] == "margin"
    np.testing.assert_allclose(recon.transpose("sample", "class").values, margin, atol=1e-4)


@pytest.mark.reference
def test_local_accuracy_random_forest_probability(rf_model, data):
    """For a forest explained on the probability scale, base + sum phi = predict_proba
    (Lundberg et al. 2020, local accuracy), absent class included (0 + 0 = 0)."""
    sv = shap_values(rf_model, data[0], features=FEATURES)
    recon = (sv["base_value"] + sv["values"].sum("feature")).transpose("sample", "class").values
    assert sv.attrs["output_scale"] == "probability"
    np.testing.assert_allclose(recon, rf_model.predict_scheme_proba(data[0].to_numpy()), atol=1e-5)


@pytest.mark.reference
def test_xgboost_contribs_match_shap_tree_explainer(xgb_model, xgb_sv, data):
    """Booster pred_contribs agree with shap.TreeExplainer (tree-path-dependent), reference library from PyPI
    (Lundberg et al. 2020, Nature Machine Intelligence 2, 56-67)."""
    import shap

    ref = _shap_layout(shap.TreeExplainer(xgb_model.model_).shap_values(data[0].to_numpy()),
                       len(data[0]), len(xgb_model.present_), len(FEATURES))
    ours = xgb_sv["values"].sel({"class": list(xgb_model.present_)}).transpose("sample", "feature", "class")
    np.testing.assert_allclose(ours.values, ref, atol=1e-5)


def _tree_tables(booster) -> list[pd.DataFrame]:
    df = booster.trees_to_dataframe()
    return [t.set_index("ID") for _, t in df.groupby("Tree", sort=True)]


def _cond_expectation(tree: pd.DataFrame, node: str, x: np.ndarray, known: set[int]) -> float:
    """E[tree(x) | x_S] with the cover-weighted (tree-path-dependent) expectation of Lundberg et al. 2020, Alg. 1."""
    row = tree.loc[node]
    if row["Feature"] == "Leaf":
        return float(row["Gain"])
    j = int(row["Feature"][1:])
    if j in known:
        v = x[j]
        nxt = row["Missing"] if np.isnan(v) else (row["Yes"] if v < row["Split"] else row["No"])
        return _cond_expectation(tree, nxt, x, known)
    yes, no = tree.loc[row["Yes"]], tree.loc[row["No"]]
    w = yes["Cover"] + no["Cover"]
    return (yes["Cover"] * _cond_expectation(tree, row["Yes"], x, known)
            + no["Cover"] * _cond_expectation(tree, row["No"], x, known)) / w


@pytest.mark.reference
def test_xgboost_contribs_match_brute_force_shapley():
    """Exact Shapley values by enumerating all feature subsets with the tree-path-dependent value function
    (Lundberg et al. 2020, Nature Machine Intelligence 2, 56-67, Algorithm 1 and the Shapley formula);
    independent of both xgboost's and shap's TreeSHAP code."""
    X, y = _data(200, seed=4)
    Xs = X.to_numpy()[:, :4]
    feats = FEATURES[:4]
    model = WetlandClassifier(classes=("upland", "marsh", "bog"), n_estimators=3, max_depth=3).fit(Xs, y)
    sv = shap_values(model, Xs[:3], features=feats)["values"]
    trees, m, k = _tree_tables(model.model_.get_booster()), 4, 3
    for r, c, i in itertools.product(range(3), range(k), range(m)):
        x, others = Xs[r], [j for j in range(m) if j != i]
        phi = 0.0
        for size in range(m):
            weight = math.factorial(size) * math.factorial(m - size - 1) / math.factorial(m)
            for s in itertools.combinations(others, size):
                for tree in trees[c::k]:  # multi-class boosting: tree t belongs to class t mod K
                    root = tree.index[0]
                    phi += weight * (_cond_expectation(tree, root, x, {*s, i})
                                     - _cond_expectation(tree, root, x, set(s)))
        assert sv.values[r, i, c] == pytest.approx(phi, abs=1e-4)


@pytest.mark.reference
def test_interactions_sum_to_shap_values(xgb_model, xgb_sv, data):
    """Rows of the SHAP interaction matrix sum to the SHAP values (Lundberg et al. 2020, interaction values)."""
    inter = shap_interactions(xgb_model, data[0].iloc[:40], features=FEATURES)
    np.testing.assert_allclose(inter.sum("feature_2").values, xgb_sv["values"].isel(sample=slice(0, 40)).values,
                               atol=1e-4)


# --------------------------------------------------------------------------- layout


def test_layout_scheme_order_with_absent_class(xgb_sv, xgb_model):
    assert xgb_sv["values"].dims == ("sample", "feature", "class")
    assert list(xgb_sv["class"].values) == list(SCHEME)
    assert list(xgb_sv["feature"].values) == FEATURES
    absent = xgb_sv["values"].sel({"class": "open_water"})
    assert float(np.abs(absent).max()) == 0.0
    assert np.isneginf(float(xgb_sv["base_value"].sel({"class": "open_water"})))
    assert xgb_sv["present"].values.tolist() == [True, False, True, True]
    assert float(np.abs(xgb_sv["values"].sel({"class": "marsh"})).max()) > 0


def test_array_input_equals_dataframe_input(xgb_model, xgb_sv, data):
    sv = shap_values(xgb_model, data[0].to_numpy(), features=FEATURES, chunk_rows=77)
    np.testing.assert_array_equal(sv["values"].values, xgb_sv["values"].values)


def test_layout_helpers_accept_older_layouts():
    rng = np.random.default_rng(1)
    new = rng.normal(size=(5, 3, 7))
    np.testing.assert_array_equal(_xgb_contribs_layout(new.reshape(5, 21), 5, 3, 6), new)
    np.testing.assert_array_equal(_xgb_contribs_layout(new.transpose(0, 2, 1), 5, 3, 6), new)
    vals = rng.normal(size=(5, 6, 3))
    np.testing.assert_array_equal(_shap_layout([vals[..., c] for c in range(3)], 5, 3, 6), vals)
    np.testing.assert_array_equal(_shap_layout(vals, 5, 3, 6), vals)


# --------------------------------------------------------------------------- budget


def test_budget_estimate_and_refusal(xgb_model, data):
    plan = explain_budget(xgb_model, 1000)
    assert plan["bytes"] == 1000 * 5 * 4 * 4
    inter = explain_budget(xgb_model, 1000, interactions=True)
    assert inter["bytes"] == 1000 * 5 * 5 * 4 * 4
    mb = 400 * 5 * 5 * 4 * 4 / 2**20
    with pytest.raises(BudgetError, match=rf"{mb:.0f} MB") as err:
        shap_interactions(xgb_model, data[0], features=FEATURES, memory_budget_mb=0.01)
    assert "0 MB" in str(err.value) and "stratified_subsample" in str(err.value)


# --------------------------------------------------------------------------- subsample


def test_stratified_subsample_balances_classes_and_blocks():
    rng = np.random.default_rng(2)
    n = 3000
    samples = pd.DataFrame({"x": rng.uniform(0, 4000, n), "y": rng.uniform(0, 4000, n),
                            "class": rng.choice(["upland", "marsh", "fen"], n, p=[0.9, 0.08, 0.02])})
    sub = stratified_subsample(samples, n=150, seed=5, block_size_m=2000.0)
    counts = sub["class"].value_counts()
    assert len(sub) == 150 and set(counts.index) == {"upland", "marsh", "fen"}
    assert counts.max() - counts.min() <= 1 or counts["fen"] == (samples["class"] == "fen").sum()
    per_block = sub[sub["class"] == "upland"].groupby("block").size()
    assert per_block.size == 4 and per_block.max() - per_block.min() <= 1
    again = stratified_subsample(samples, n=150, seed=5, block_size_m=2000.0)
    pd.testing.assert_frame_equal(sub, again)
    assert len(stratified_subsample(samples, n=10_000, seed=0)) == n


# --------------------------------------------------------------------------- summaries


def test_informative_feature_beats_noise(xgb_sv):
    table = global_importance(xgb_sv)
    assert table.loc["signal_a", "marsh"] > table.loc[["noise_1", "noise_2", "noise_3"], "marsh"].max()
    assert table.loc["signal_b", "bog"] > table.loc[["noise_1", "noise_2", "noise_3"], "bog"].max()
    assert table.index[0] in {"signal_a", "signal_b"}


def test_domain_and_cluster_importance(xgb_sv):
    domains = {"signal_a": "optical", "signal_b": "sar", "noise_1": "terrain", "noise_2": "terrain",
               "noise_3": "terrain"}
    table = domain_importance(xgb_sv, domains)
    present = table[table["class"] != "open_water"]
    np.testing.assert_allclose(present.groupby("class")["share"].sum(), 1.0)
    marsh = table[table["class"] == "marsh"].set_index("domain")["share"]
    assert marsh["optical"] > marsh["terrain"]
    with pytest.raises(ParameterError, match="noise_3"):
        domain_importance(xgb_sv, {k: v for k, v in domains.items() if k != "noise_3"})
    clusters = cluster_importance(xgb_sv, {f: i for i, f in enumerate(FEATURES)})
    assert clusters.attrs["note"] == CLUSTER_NOTE and "share credit" in CLUSTER_NOTE


def test_ranking_stability_matrix(data):
    X, y = data

    def fit(X, y, seed):
        return WetlandClassifier(classes=SCHEME, n_estimators=15, max_depth=3, random_state=seed).fit(
            X.to_numpy(), y)

    rho = ranking_stability(fit, X, y, seeds=[0, 1, 2])
    assert rho.shape == (3, 3)
    np.testing.assert_allclose(np.diag(rho), 1.0)
    np.testing.assert_allclose(rho.to_numpy(), rho.to_numpy().T)
    assert -1.0 <= rho.attrs["mean_rho"] <= 1.0


# --------------------------------------------------------------------------- figures


def test_figures_return_figures(xgb_sv, data):
    from matplotlib.figure import Figure

    from wetlandflow.explain.plots import (
        plot_beeswarm,
        plot_dependence,
        plot_domain_importance,
        plot_importance,
        plot_waterfall,
    )

    domains = dict(zip(FEATURES, ["optical", "sar", "terrain", "terrain", "terrain"], strict=True))
    figs = [plot_importance(global_importance(xgb_sv), top=3),
            plot_beeswarm(xgb_sv, data[0], "marsh", top=4),
            plot_dependence(xgb_sv, data[0], "signal_a", "marsh", color_by="signal_b"),
            plot_domain_importance(domain_importance(xgb_sv, domains)),
            plot_waterfall(xgb_sv["values"].isel(sample=0), xgb_sv["base_value"], "marsh", top=2),
            plot_waterfall(xgb_sv["values"].isel(sample=slice(0, 9)), xgb_sv["base_value"], "bog")]
    assert all(isinstance(f, Figure) for f in figs)
    assert len(figs[4].axes[0].patches) == 3  # two features plus the merged rest
    with pytest.raises(ParameterError, match="absent"):
        plot_waterfall(xgb_sv["values"].isel(sample=0), xgb_sv["base_value"], "open_water")


# --------------------------------------------------------------------------- maps


def _cube(data, ny=12, nx=10) -> xr.Dataset:
    import rioxarray  # noqa: F401

    X = data[0].to_numpy()[: ny * nx].copy()
    coords = {"y": 5000.0 - 10.0 * np.arange(ny) - 5.0, "x": 1000.0 + 10.0 * np.arange(nx) + 5.0}
    cube = xr.Dataset({f: (("y", "x"), X[:, j].reshape(ny, nx).copy()) for j, f in enumerate(FEATURES)}, coords=coords)
    cube["noise_1"][0, 4] = np.nan  # a partly missing pixel: the model routes NaN itself
    for f in FEATURES:
        cube[f][1, 3] = np.nan
    return cube.rio.write_crs("EPSG:32633")


def test_shap_map_equals_flattened_window(xgb_model, data, tmp_path):
    cube = _cube(data)
    win = (slice(0, 6), slice(2, 9))
    m = shap_map(xgb_model, cube, FEATURES, "marsh", window=win, feature="signal_a")
    flat = cube[FEATURES].isel(y=win[0], x=win[1]).to_dataarray("feature").transpose("y", "x", "feature")
    X = flat.values.reshape(-1, len(FEATURES))
    sv = shap_values(xgb_model, X, features=FEATURES)["values"].sel(feature="signal_a", **{"class": "marsh"})
    expected = sv.values.reshape(6, 7)
    expected[1, 1] = np.nan  # grid pixel (1, 3) has no feature at all
    np.testing.assert_allclose(m.values, expected, atol=1e-6)
    np.testing.assert_array_equal(m["x"].values, cube["x"].values[2:9])
    assert m.rio.crs is not None and m.rio.crs.to_epsg() == 32633
    assert m.attrs["units"] == "log-odds" and "Lundberg" in m.attrs["reference"]
    domains = {"signal_a": "optical", "signal_b": "optical", "noise_1": "sar", "noise_2": "sar", "noise_3": "sar"}
    d = shap_map(xgb_model, cube, FEATURES, "marsh", window=win, domain="optical", domains=domains)
    both = shap_values(xgb_model, X, features=FEATURES)["values"].sel(
        feature=["signal_a", "signal_b"], **{"class": "marsh"}).sum("feature").values.reshape(6, 7)
    np.testing.assert_allclose(d.values[0], both[0], atol=1e-6)
    path = write_shap_map(m, tmp_path / "shap.tif")
    import rasterio

    with rasterio.open(path) as src:
        np.testing.assert_allclose(src.read(1), m.values, atol=1e-6)
        assert src.crs.to_epsg() == 32633


@pytest.mark.reference
def test_window_contributions_add_up_to_the_margin_of_every_pixel_and_class(xgb_model, xgb_sv, data):
    """Local accuracy on a map window: base value + contributions = XGBoost's margin, per pixel and class.

    Property (local accuracy) from Lundberg, Erion, Chen et al. (2020) From local explanations to global
    understanding with explainable AI for trees, Nature Machine Intelligence 2, 56-67; the margin comes
    from XGBoost itself (``output_margin=True``).
    """
    from wetlandflow.explain.attribution import contribution_map, window_contributions

    cube = _cube(data)
    win = (slice(2, 10), slice(0, 10))
    contrib = window_contributions(xgb_model, cube, FEATURES, window=win)
    assert contrib.dims == ("feature", "class", "y", "x") and contrib.shape[2:] == (8, 10)
    X = cube[FEATURES].isel(y=win[0], x=win[1]).to_dataarray("feature").transpose("y", "x", "feature")
    X = X.values.reshape(-1, len(FEATURES)).astype(np.float32)
    margin = xgb_model.model_.predict(X, output_margin=True)
    present = list(xgb_model.present_)
    total = (xgb_sv["base_value"] + contrib.sum("feature")).sel({"class": present})
    total = total.transpose("y", "x", "class").values.reshape(-1, len(present))
    ok = np.isfinite(X).any(axis=1)
    np.testing.assert_allclose(total[ok], margin[ok], atol=1e-4)
    # a domain map is the sum of its features' maps
    domains = {"signal_a": "optical", "signal_b": "optical"}
    d = contribution_map(contrib, cube, "bog", domain="optical", domains=domains)
    parts = [contribution_map(contrib, cube, "bog", feature=f) for f in ("signal_a", "signal_b")]
    np.testing.assert_allclose(d.values, (parts[0] + parts[1]).values, atol=1e-6)
    with pytest.raises(ParameterError, match="class_name"):
        contribution_map(contrib, cube, "no_such_class", feature="signal_a")


# --------------------------------------------------------------------------- hierarchical models


def _hierarchy(kind: str = "xgboost"):
    from wetlandflow.models.hierarchy import HierarchicalClassifier

    X, y = _data(300, seed=2)
    base = {"kind": kind, "n_estimators": 15, "max_depth": 3, "n_threads": 1}
    model = HierarchicalClassifier(SCHEME, {"wetland": ("marsh", "bog")}, base_params=base)
    return model.fit(X.to_numpy(), y), X


@pytest.fixture(scope="module")
def hier():
    return _hierarchy()


def _interventional_shapley(f, x: np.ndarray, background: np.ndarray) -> np.ndarray:
    """Shapley values by the definition, phi_i = sum_S |S|!(M-|S|-1)!/M! [v(S + i) - v(S)], with the
    interventional value function v(S) = mean_b f(x_S, b_rest) over the background rows (Shapley 1953;
    Lundberg & Lee 2017, eq. 8-11); written here independently of shap's code."""
    m = x.size

    def v(subset):
        Z = background.copy()
        Z[:, list(subset)] = x[list(subset)]
        return f(Z).mean(axis=0)

    phi = np.zeros((m, f(x[None]).shape[1]))
    for i in range(m):
        others = [j for j in range(m) if j != i]
        for size in range(m):
            weight = math.factorial(size) * math.factorial(m - size - 1) / math.factorial(m)
            for s in itertools.combinations(others, size):
                phi[i] += weight * (v((*s, i)) - v(s))
    return phi


@pytest.mark.reference
@pytest.mark.parametrize("method", ["exact", "permutation"])
def test_combined_values_add_up_to_the_leaf_probabilities(hier, method):
    """Local accuracy (Lundberg & Lee 2017, A unified approach to interpreting model predictions, NeurIPS 30,
    property 1): base value + sum of the attributions = the model output, here P(leaf) of the whole
    hierarchy for every class; the base value is the mean output over the background (shap library's
    ExactExplainer / PermutationExplainer).  atol 1e-6: float32 storage of the values (DERIVED)."""
    from wetlandflow.explain.attribution import combined_shap_values

    model, X = hier
    rows = X.iloc[:12]
    sv = combined_shap_values(model, rows, features=FEATURES, background=X.iloc[100:120], method=method,
                              seed=3)
    recon = (sv["base_value"] + sv["values"].sum("feature")).transpose("sample", "class").values
    assert sv.attrs["output_scale"] == "probability" and sv.attrs["explainer"] == method
    assert list(sv["class"].values) == list(SCHEME)
    np.testing.assert_allclose(recon, model.predict_scheme_proba(rows), atol=1e-6)
    bg = X.iloc[100:120].to_numpy(np.float32)
    np.testing.assert_allclose(sv["base_value"].values, model.predict_scheme_proba(bg).mean(axis=0), atol=1e-9)
    # open_water never trained: probability 0 everywhere, nothing to attribute
    assert not bool(sv["present"].sel({"class": "open_water"}))
    np.testing.assert_array_equal(sv["values"].sel({"class": "open_water"}).values, 0.0)


@pytest.mark.reference
def test_combined_exact_values_match_the_shapley_formula(hier):
    """The exact method against Shapley values computed here from the definition (Shapley 1953) with the
    interventional value function of Lundberg & Lee (2017), same background; atol 1e-6 for float32."""
    from wetlandflow.explain.attribution import combined_shap_values

    model, X = hier
    bg = X.iloc[200:215].to_numpy(np.float32)
    rows = X.iloc[:3].to_numpy(np.float32)
    sv = combined_shap_values(model, rows, features=FEATURES, background=bg, method="exact")
    for r in range(len(rows)):
        expected = _interventional_shapley(model.predict_scheme_proba, rows[r].astype(np.float64),
                                           bg.astype(np.float64))
        np.testing.assert_allclose(sv["values"].values[r], expected, atol=1e-6)


@pytest.mark.reference
@pytest.mark.parametrize("kind", ["xgboost", "random_forest"])
def test_per_level_values_add_up_to_each_level_output(kind):
    """Per level, exact TreeSHAP local accuracy as for a flat model (Lundberg et al. 2020): base + sum phi =
    the level's raw margin (XGBoost; xgboost docs: pred_contribs rows sum to output_margin) or its
    predict_proba (forest), for the top level and for the child model, on every row."""
    from xgboost import DMatrix

    from wetlandflow.explain.attribution import hierarchical_shap_values

    model, X = _hierarchy(kind)
    rows = X.iloc[:30]
    out = hierarchical_shap_values(model, rows, features=FEATURES, combined=False)
    assert set(out) == {"top", "wetland"}
    for name, level in (("top", model.top_model_), ("wetland", model.child_models_["wetland"])):
        sv = out[name]
        assert sv.attrs["level"] == name and list(sv["class"].values) == list(level.scheme_)
        present = list(level.present_)
        recon = (sv["base_value"] + sv["values"].sum("feature")).sel({"class": present})
        recon = recon.transpose("sample", "class")
        if kind == "xgboost":
            booster = level.model_.get_booster()
            expected = booster.predict(DMatrix(rows.to_numpy(np.float32)), output_margin=True)
            np.testing.assert_allclose(recon.values, expected, atol=1e-4)
        else:
            expected = level.predict_scheme_proba(rows.to_numpy(np.float32))[:, [list(level.scheme_).index(c)
                                                                                 for c in present]]
            np.testing.assert_allclose(recon.values, expected, atol=1e-5)


def test_model_shap_values_dispatch_and_refusals(hier, xgb_model, data):
    from wetlandflow.errors import ModelError
    from wetlandflow.explain.attribution import hierarchical_shap_values, model_shap_values

    model, X = hier
    combined = model_shap_values(model, X.iloc[:4], features=FEATURES, method="exact")
    assert combined.attrs["level"] == "combined"
    flat = model_shap_values(xgb_model, data[0].iloc[:4], features=FEATURES)
    assert flat.attrs["output_scale"] == "margin"
    with pytest.raises(ModelError, match="HierarchicalClassifier"):
        hierarchical_shap_values(xgb_model, data[0], features=FEATURES)
    with pytest.raises(ParameterError, match="method"):
        model_shap_values(model, X.iloc[:4], features=FEATURES, method="kernel")
    state = np.random.get_state()[1].copy()  # noqa: NPY002 - the global generator shap uses
    model_shap_values(model, X.iloc[:4], features=FEATURES, method="permutation", seed=5)
    np.testing.assert_array_equal(np.random.get_state()[1], state)  # noqa: NPY002 - shap's seeding undone


def test_ranking_stability_of_two_seeds_is_a_two_by_two_matrix(data):
    X, y = data

    def fit(X, y, seed):
        return WetlandClassifier(classes=SCHEME, n_estimators=10, max_depth=3, random_state=seed).fit(
            X.to_numpy(), y)

    rho = ranking_stability(fit, X, y, seeds=[0, 1])
    assert rho.shape == (2, 2) and rho.iloc[0, 1] == rho.iloc[1, 0] == rho.attrs["mean_rho"]
