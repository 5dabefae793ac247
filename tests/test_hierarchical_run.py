"""The hierarchical model in a run: project keys, bundle, AOA weights, map signature, the run end to end."""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pandas as pd
import pytest
import rasterio
from conftest import project_variant

from wetlandflow.errors import ProjectFileError
from wetlandflow.mapping.applicability import xgb_importance_weights
from wetlandflow.mapping.predict import _model_signature
from wetlandflow.models.bundle import load_bundle, save_bundle
from wetlandflow.models.classifier import ClassScheme, WetlandClassifier
from wetlandflow.models.hierarchy import HierarchicalClassifier
from wetlandflow.pipeline.steps import importance_weights

CLASSES = ("upland", "open_water", "marsh", "swamp", "fen", "bog")
PARENTS = {"wetland": ("marsh", "swamp", "fen", "bog")}
BASE = {"kind": "xgboost", "n_estimators": 15, "max_depth": 3, "n_threads": 1}
FEATURES = ["f0", "f1", "noise"]


def data(seed: int = 0, n: int = 360):
    """f0 separates the top level, f1 the wetland classes, the third column is noise."""
    rng = np.random.default_rng(seed)
    y = rng.choice(CLASSES, n)
    f0 = np.array([{"upland": 0.0, "open_water": 3.0}.get(c, 6.0) for c in y]) + rng.normal(0, 0.6, n)
    f1 = np.array([{"marsh": 0.0, "swamp": 2.0, "fen": 4.0, "bog": 6.0}.get(c, 3.0) for c in y])
    X = np.c_[f0, f1 + rng.normal(0, 0.8, n), rng.normal(size=n)].astype(np.float32)
    return X, y


def fit(gate: float = 0.0, kind: str = "xgboost", y_filter=None, seed: int = 0) -> tuple:
    X, y = data(seed)
    if y_filter is not None:
        keep = y_filter(y)
        X, y = X[keep], y[keep]
    m = HierarchicalClassifier(CLASSES, PARENTS, base_params={**BASE, "kind": kind}, gate_threshold=gate)
    return m.fit(X, y), X, y


def save(model, folder):
    return save_bundle(model, folder, features=FEATURES, scheme=ClassScheme(CLASSES, PARENTS),
                       training_hash="x")


# --------------------------------------------------------------------------- bundle


@pytest.mark.parametrize(("gate", "kind"), [(0.0, "xgboost"), (0.2, "xgboost"), (0.0, "random_forest")])
def test_bundle_round_trip_predicts_identically(tmp_path, gate, kind):
    m, X, _ = fit(gate, kind)
    save(m, tmp_path / "model")
    m2, side = load_bundle(tmp_path / "model")
    assert isinstance(m2, HierarchicalClassifier)
    np.testing.assert_array_equal(m2.predict_proba(X), m.predict_proba(X))
    for a, b in zip(m.predict_proba_levels(X).values(), m2.predict_proba_levels(X).values(), strict=True):
        np.testing.assert_array_equal(a.to_numpy(), b.to_numpy())
    h = side["hierarchy"]
    assert side["structure"] == "hierarchical" and side["kind"] == kind and side["features"] == FEATURES
    assert h["classes"] == list(CLASSES) and h["parents"] == {"wetland": list(PARENTS["wetland"])}
    assert h["gate_threshold"] == gate and h["top_classes"] == ["upland", "open_water", "wetland"]
    np.testing.assert_array_equal(h["priors"]["wetland"], m.priors_["wetland"])
    estimator = "model.ubj" if kind == "xgboost" else "model.joblib"
    for level in ("top", "wetland"):  # each level is a flat bundle in the library's own format
        sub = tmp_path / "model" / h["levels"][level]["folder"]
        assert (sub / estimator).is_file() and json.loads((sub / "bundle.json").read_text())["level"] == level
    assert h["levels"]["top"]["n_rows"] == 360 == m2.level_rows_["top"]
    assert m2.level_rows_ == m.level_rows_ and m2.get_params() == m.get_params()
    assert _model_signature(m2) == _model_signature(m)


def test_parent_with_one_child_in_training_is_saved_as_its_priors(tmp_path):
    m, X, _ = fit(y_filter=lambda y: ~np.isin(y, ["swamp", "fen", "bog"]))  # only marsh under wetland
    assert not isinstance(m.child_models_["wetland"], WetlandClassifier)
    save(m, tmp_path / "model")
    m2, side = load_bundle(tmp_path / "model")
    assert side["hierarchy"]["levels"]["wetland"]["folder"] is None
    assert side["present_classes"] == ["upland", "open_water", "marsh"] == m2.present_leaves()
    np.testing.assert_array_equal(m2.predict_proba(X), m.predict_proba(X))
    assert importance_weights(m2, FEATURES).sum() == pytest.approx(1.0)  # the constant level takes no part


def test_flat_bundle_is_unchanged_and_one_folder_holds_one_bundle(tmp_path):
    X, y = data()
    flat = WetlandClassifier(classes=CLASSES, n_estimators=10, n_threads=1).fit(X, y)
    folder = tmp_path / "model"
    save(flat, folder)
    side = json.loads((folder / "bundle.json").read_text())
    assert "structure" not in side and side["model_file"] == "model.ubj"
    h, _, _ = fit()
    save(h, folder)  # a hierarchy replaces the flat bundle: no orphaned estimator file at the top
    assert not (folder / "model.ubj").exists() and (folder / "level_top" / "model.ubj").exists()
    save(flat, folder)  # and back: no orphaned level folders
    assert not list(folder.glob("level_*"))
    again, _ = load_bundle(folder)
    np.testing.assert_array_equal(again.predict_proba(X), flat.predict_proba(X))


def test_model_signature_is_deterministic_and_follows_the_gate():
    a, b = fit()[0], fit()[0]
    assert _model_signature(a) == _model_signature(b)
    assert _model_signature(a) != _model_signature(fit(gate=0.1)[0])
    assert _model_signature(a) != _model_signature(fit(seed=1)[0])


# --------------------------------------------------------------------------- AOA weights


def test_importance_weights_average_the_normalised_levels_by_training_rows():
    """The rule of the docstring, recomputed from the levels' own gain importances."""
    m, _, y = fit()
    top = xgb_importance_weights(m.top_model_, FEATURES)
    child = xgb_importance_weights(m.child_models_["wetland"], FEATURES)
    n_top, n_wet = len(y), int(np.isin(y, PARENTS["wetland"]).sum())
    assert m.level_rows_ == {"top": n_top, "wetland": n_wet}
    expected = (n_top * top / top.sum() + n_wet * child / child.sum()) / (n_top + n_wet)
    w = importance_weights(m, FEATURES)
    np.testing.assert_allclose(w, expected, rtol=1e-12)
    assert w.sum() == pytest.approx(1.0)
    # f0 drives the top level and f1 the child model: both count, the noise column least
    assert w[2] < min(w[0], w[1])


# --------------------------------------------------------------------------- project -> model


def test_make_model_builds_the_hierarchy_with_the_flat_settings(light_demo):
    from wetlandflow.inputs.project import load_project
    from wetlandflow.pipeline.run import make_model, training_weights

    project = load_project(light_demo)
    flat = make_model(project)
    hp = dataclasses.replace(project, model=dataclasses.replace(project.model, hierarchical=True,
                                                                 gate_threshold=0.05))
    h = make_model(hp)
    assert isinstance(h, HierarchicalClassifier) and h.gate_threshold == 0.05
    assert h.parents == dict(project.classes.parents) and tuple(h.classes) == project.classes.names
    flat_params = {k: v for k, v in flat.get_params().items() if k not in ("classes", "class_weighting")}
    assert {k: v for k, v in h.base_params.items() if k != "class_weighting"} == flat_params
    assert h.base_params["class_weighting"] is False  # training_weights balance the leaves instead
    assert make_model(hp, random_state=7).base_params["random_state"] == 7
    # without the plot cap a hierarchy still gets leaf-balanced weights (equal total per class)
    nocap = dataclasses.replace(hp, model=dataclasses.replace(hp.model, max_plot_share=0.0))
    y = np.array(["upland"] * 6 + ["marsh"] * 3 + ["bog"])
    samples = pd.DataFrame({"class": y, "plot_id": np.arange(y.size)})
    w = training_weights(nocap, samples)
    totals = pd.Series(w).groupby(y).sum()
    np.testing.assert_allclose(totals.to_numpy(), totals.iloc[0])
    no_parents = dataclasses.replace(hp, classes=dataclasses.replace(hp.classes, parents={}))
    with pytest.raises(ProjectFileError, match=r"model\.hierarchical.*\[classes\.parents\]") as info:
        make_model(no_parents)
    assert info.value.key == "model.hierarchical"


# --------------------------------------------------------------------------- end to end


@pytest.fixture(scope="module")
def hier_run(light_demo, light_run):
    """The light project with a hierarchical model, started from a copy of the flat run's folder: the
    feature and sample steps are reused (their keys do not depend on the model), the rest is recomputed."""
    import shutil

    from wetlandflow.pipeline.run import run_project

    shutil.copytree(light_run.run_dir, light_demo.parent / "runs" / "light_hier")
    pf = project_variant(light_demo, "light_hier", **{"model.hierarchical": True,
                                                      "project.output_dir": "runs/light_hier"})
    return run_project(pf, progress=False)


def test_hierarchical_run_writes_maps_whose_probabilities_sum_to_one(hier_run):
    d = hier_run.run_dir
    manifest = json.loads((d / "manifest.json").read_text())
    assert all(s["status"] == "done" for s in manifest["steps"].values())
    assert manifest["steps"]["features"].get("reused") and not manifest["steps"]["model"].get("reused")
    assert manifest["steps"]["model"]["hyperparameters"]["hierarchical"] is True
    side = json.loads((d / "model" / "bundle.json").read_text())
    assert side["structure"] == "hierarchical" and (d / "model" / "level_wetland" / "bundle.json").exists()
    with rasterio.open(d / "maps" / "probability.tif") as src:
        p = src.read()
    with rasterio.open(d / "maps" / "class.tif") as src:
        c = src.read(1)
    valid = c > 0
    assert valid.any()
    np.testing.assert_allclose(p[:, valid].sum(axis=0), 1.0, atol=1e-5)
    np.testing.assert_array_equal(c[valid], np.argmax(p[:, valid], axis=0) + 1)
    assert np.isnan(p[:, ~valid]).all()
    assert 0 <= manifest["steps"]["mapping"]["share_outside_applicability"] <= 1
    metrics = json.loads((d / "validation" / "metrics.json").read_text())
    assert 0 <= metrics["overall_accuracy"] <= 1


def test_explanations_of_a_hierarchical_run(hier_run):
    from wetlandflow.features.cube import open_cube
    from wetlandflow.inputs.project import load_project
    from wetlandflow.pipeline.run import refit_with_seed
    from wetlandflow.pipeline.steps import write_explanations

    d = hier_run.run_dir
    model, side = load_bundle(d / "model")
    samples = pd.read_parquet(d / "samples.parquet")
    features = side["features"]
    project = load_project(d.parent.parent / "light_hier.toml")
    out = d / "explain_test"
    rec = write_explanations(model, samples, features, open_cube(d / "features.zarr"), out, n_rows=36, seed=1,
                             block_size_m=300.0, window_px=12, stability_seeds=2,
                             refit=lambda s: refit_with_seed(project, samples, features, s))
    assert rec["structure"] == "hierarchical" and rec["output_scale"] == "probability"
    assert set(rec["levels"]) == {"top", "wetland"}
    assert set(rec["top_drivers"]) == set(CLASSES)
    for level in rec["levels"].values():
        assert (out / level["file"]).exists() and level["output_scale"] == "margin"
    assert set(rec["maps"]) == {*CLASSES, "wetland"}
    for name, m in rec["maps"].items():
        assert (out / m["file"]).exists()
        assert m["level"] == ("wetland" if name in PARENTS["wetland"] else "top")
    assert -1 <= rec["ranking_stability"]["mean_spearman_rho"] <= 1
    assert (out / "waterfall_centre.png").exists() and (out / "shap_maps.png").exists()
    # the long table holds the combined values: leaf probability minus their sum is one base value per
    # class, the same for every row (local accuracy, Lundberg & Lee 2017)
    shap = pd.read_parquet(out / "shap_values.parquet")
    total = shap.groupby(["sample", "class"])["shap"].sum().unstack()[list(CLASSES)]
    gap = model.predict_scheme_proba(samples.loc[total.index, features].to_numpy(np.float32)) - total.to_numpy()
    np.testing.assert_allclose(gap, np.broadcast_to(gap[0], gap.shape), atol=1e-5)
