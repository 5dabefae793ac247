"""Model comparison on the small demo: same folds for every configuration, nested selection, outputs."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import accuracy_score, f1_score, make_scorer
from sklearn.model_selection import PredefinedSplit, cross_val_predict, cross_val_score

from wetlandflow.errors import ModelError, ParameterError
from wetlandflow.models.classifier import ClassScheme, WetlandClassifier, canonical_order
from wetlandflow.models.compare import compare_models, compare_run, main, write_comparison
from wetlandflow.models.hierarchy import HierarchicalClassifier
from wetlandflow.models.selection import forward_feature_selection, read_selected_features

# A handful of the demo's features (water, vegetation, radar) keeps every test fast.
REAL = ["mndwi_summer", "ndvi_summer", "vh_mean_db", "water_frequency"]
REGISTERED = ["mndwi", "ndvi", "sar_temporal", "water_frequency"]  # the registry features computing them
NOISE = ["noise_pixel", "noise_plot", "noise_field"]
NESTED = REAL[:3] + NOISE[:2]  # fewer candidates for the nested selection, which repeats per fold


@pytest.fixture(scope="module")
def demo(small_demo):
    """The small demo's samples (the run's steps up to samples, no files written) and spatial folds."""
    from wetlandflow.features.cube import build_cube
    from wetlandflow.inputs.layers import load_inputs, project_grid, read_aoi
    from wetlandflow.inputs.project import load_project
    from wetlandflow.training.samples import drop_incomplete, extract_samples, plot_pixels, read_plots
    from wetlandflow.validation.splitters import SpatialBlockKFold, assign_folds

    p = load_project(small_demo)
    grid = project_grid(p)
    params = {k: v for k, v in p.features.params.items() if k in REGISTERED}
    cube = build_cube(load_inputs(p, grid), REGISTERED, params)[REAL]
    plots = read_plots(p.plots.path, class_field=p.plots.class_field, id_field=p.plots.id_field,
                       classes=p.classes.names, grid=grid, aoi=read_aoi(p))
    px = plot_pixels(plots, grid, max_pixels_per_plot=12, seed=p.project.seed)
    samples = drop_incomplete(extract_samples(cube, px, grid), REAL, policy="drop")
    samples = with_noise(samples, seed=p.project.seed)
    cv = SpatialBlockKFold(5, block_size_m=p.validation.block_size_m, random_state=p.project.seed,
                           coords=samples[["x", "y"]].to_numpy(), on_class_missing="ignore")
    folds = assign_folds(cv, samples[REAL].to_numpy(), samples["class"], samples["plot_id"])
    return samples, folds, ClassScheme(p.classes.names, p.classes.parents)


def with_noise(samples: pd.DataFrame, seed: int) -> pd.DataFrame:
    """Pure-noise features, independent of the labels: per pixel, constant per plot (identifies plots,
    which random CV would reward), and a smooth random field over space (identifies places)."""
    rng = np.random.default_rng(seed)
    plot_codes = pd.factorize(samples["plot_id"])[0]
    kx, ky, phase = rng.uniform(2 * np.pi / 1500, 2 * np.pi / 600, 2).tolist() + [rng.uniform(0, 2 * np.pi)]
    field = np.sin(kx * samples["x"] + phase) * np.cos(ky * samples["y"])
    return samples.assign(noise_pixel=rng.normal(size=len(samples)),
                          noise_plot=rng.normal(size=plot_codes.max() + 1)[plot_codes],
                          noise_field=field + rng.normal(0, 0.05, len(samples)))


def small(classes, **kw):
    """The comparison's quick xgboost model (single-threaded, as the comparison fits it)."""
    return WetlandClassifier(classes=classes, n_estimators=10, max_depth=3, learning_rate=0.3, n_threads=1,
                             **kw)


# Selection model of the tests: large enough that a noise column does not help it by chance.
SELECTOR = {"kind": "xgboost", "n_estimators": 30, "max_depth": 3, "learning_rate": 0.2}
# A feature must raise macro F1 by more than this to be added: noise columns gain up to about 0.006 on
# these folds by chance, real ones 0.02 and more (measured here; the threshold is common practice, no source).
TOL = 0.01


def test_noise_features_are_not_selected_and_the_spatial_score_holds(demo):
    """The issue's test: forward selection under the demo's spatial folds with pure-noise features
    added keeps none of them, and the spatial-CV score of the chosen set is not below that of all
    features (noise carries no information about the labels, so it can only add variance)."""
    samples, folds, scheme = demo
    X, y = samples[REAL + NOISE], samples["class"].to_numpy()
    cv = PredefinedSplit(folds)
    selector = WetlandClassifier(classes=scheme.names, n_threads=1, **SELECTOR)
    res = forward_feature_selection(selector, X, y, None, cv, scoring="f1_macro", tol=TOL)
    assert not set(res.selected) & set(NOISE)
    assert len(res.selected) >= 2
    macro_f1 = make_scorer(f1_score, average="macro", zero_division=0)
    full_score = cross_val_score(selector, X.to_numpy(np.float32), y, cv=cv, scoring=macro_f1).mean()
    assert res.score >= full_score - 0.005  # "does not drop": within half a percent of macro F1


@pytest.fixture(scope="module")
def comparison(demo):
    samples, folds, scheme = demo
    return compare_models(samples, NESTED, folds, scheme, structures=("flat", "hierarchical"),
                          kinds=("xgboost",), selection="nested", calibration="isotonic", quick=True,
                          selection_params={**SELECTOR, "pool": None, "max_features": 4, "tol": TOL})


def test_nested_selection_rejects_noise_in_every_training_fold(comparison):
    r = comparison
    assert set(r.fold_selections) == {0, 1, 2, 3, 4}
    for k, sel in r.fold_selections.items():
        assert not set(sel.selected) & set(NOISE), f"fold {k} chose noise: {sel.selected}"
    t = r.table.set_index("config")
    # Honest (nested) after-selection score: not below the all-features score by more than fold noise.
    assert t.loc["xgboost/flat/selected", "macro_f1"] >= t.loc["xgboost/flat/all", "macro_f1"] - 0.03
    assert t.loc["xgboost/flat/selected", "n_features_max"] <= 4
    assert any("inside each training fold" in n for n in r.notes)


@pytest.mark.reference
def test_flat_scores_equal_scikit_learn_on_the_same_folds(demo, comparison):
    """OA and macro F1 of the 'all features' flat row against scikit-learn's cross_val_predict,
    accuracy_score and f1_score on the same PredefinedSplit folds (pooled out-of-fold predictions)."""
    samples, folds, scheme = demo
    order = canonical_order(samples.assign(_f=folds))  # the comparison's deterministic row order
    pred = cross_val_predict(small(scheme.names, random_state=0), order[NESTED].to_numpy(np.float32),
                             order["class"].to_numpy(), cv=PredefinedSplit(order["_f"].to_numpy()))
    row = comparison.table.set_index("config").loc["xgboost/flat/all"]
    y = order["class"].to_numpy()
    assert row["overall_accuracy"] == pytest.approx(accuracy_score(y, pred), abs=1e-12)
    present = sorted(set(y))
    assert row["macro_f1"] == pytest.approx(f1_score(y, pred, labels=present, average="macro"), abs=1e-12)
    pc = comparison.per_class[comparison.per_class["config"] == "xgboost/flat/all"].set_index("class")
    np.testing.assert_allclose(pc.loc[present, "f1"], f1_score(y, pred, labels=present, average=None))


def test_hierarchical_rows_are_the_chain_rule_model_per_fold(demo, comparison):
    samples, folds, scheme = demo
    p = comparison.oof["xgboost/hierarchical/all"]
    np.testing.assert_allclose(p.sum(axis=1), 1.0, atol=1e-6)
    k = 2
    test = folds == k
    train = canonical_order(samples[~test])
    m = HierarchicalClassifier(scheme.names, dict(scheme.parents), base_params={
        "kind": "xgboost", "n_estimators": 10, "max_depth": 3, "learning_rate": 0.3, "n_threads": 1,
        "random_state": 0}).fit(train[NESTED].to_numpy(np.float32), train["class"])
    np.testing.assert_allclose(p[test], m.predict_scheme_proba(samples.loc[test, NESTED].to_numpy(np.float32)),
                               atol=1e-6)


def test_calibrated_probabilities_are_probabilities(comparison):
    r = comparison
    assert set(r.calibrated) == set(r.oof)
    for p in r.calibrated.values():
        assert np.isfinite(p).all() and (p >= 0).all()
        np.testing.assert_allclose(p.sum(axis=1), 1.0, atol=1e-9)
    assert {"brier_calibrated", "ece_calibrated"} <= set(r.table.columns)
    assert r.table["ece_calibrated"].between(0, 1).all()


def test_written_outputs(comparison, tmp_path):
    out = write_comparison(comparison, tmp_path)
    table = pd.read_csv(out["table"])
    assert len(table) == 4 and table["config"].is_unique
    assert set(pd.read_csv(out["per_class"])["config"]) == set(table["config"])
    assert read_selected_features(out["selected"]) == comparison.selection.selected
    curve = pd.read_csv(out["curve"], keep_default_na=False)
    assert {"all folds", "within fold 0"} <= set(curve["source"])
    oof = pd.read_parquet(out["oof"])
    assert set(oof["probabilities"]) == {"raw", "calibrated"}
    for key in ("curve_png", "reliability_png", "reliability_classes_png"):
        assert out[key].read_bytes()[:4] == b"\x89PNG"
    doc = json.loads(out["json"].read_text())
    assert doc["settings"]["selection"] == "nested" and doc["notes"] == list(comparison.notes)
    assert "| xgboost/flat/all |" in out["markdown"].read_text()


def test_deterministic_and_independent_of_row_order(demo):
    samples, folds, scheme = demo
    kw = {"kinds": ("xgboost", "random_forest"), "structures": ("flat",), "selection": "none", "quick": True}
    a = compare_models(samples, REAL, folds, scheme, **kw)
    perm = np.random.default_rng(0).permutation(len(samples))
    b = compare_models(samples.iloc[perm], REAL, folds[perm], scheme, **kw)
    cols = [c for c in a.table.columns if c != "seconds"]
    pd.testing.assert_frame_equal(a.table[cols], b.table[cols])
    for k in a.oof:
        np.testing.assert_array_equal(a.oof[k][perm], b.oof[k])


def test_compare_run_reads_a_run_folder(demo, tmp_path):
    samples, folds, scheme = demo
    run = tmp_path / "run"
    (run / "validation").mkdir(parents=True)
    samples[["plot_id", "class", "x", "y", *REAL]].to_parquet(run / "samples.parquet")
    samples[["plot_id", "x", "y"]].assign(fold=folds).to_parquet(run / "validation" / "folds.parquet")
    (run / "manifest.json").write_text(json.dumps({"seed": 0, "project": {"classes": scheme.to_dict(),
                                                                          "model": {"n_threads": 2}}}))
    r = compare_run(run, kinds=("random_forest",), structures=("flat",), selection="none", quick=True)
    assert (run / "comparison" / "comparison.csv").exists() and r.settings["features"] == REAL
    # the rerun command: python -m wetlandflow.models.compare RUN_DIR ...
    assert main([str(run), "--out", str(tmp_path / "cli"), "--quick", "--selection", "none",
                 "--kinds", "xgboost", "--structures", "flat"]) == 0
    assert pd.read_csv(tmp_path / "cli" / "comparison.csv")["config"].tolist() == ["xgboost/flat/all"]
    (run / "validation" / "folds.parquet").unlink()
    with pytest.raises(ModelError, match="validation/folds.parquet"):
        compare_run(run)


def test_bad_arguments_are_named(demo):
    samples, folds, scheme = demo
    with pytest.raises(ParameterError, match="kinds"):
        compare_models(samples, REAL, folds, scheme, kinds=("svm",))
    with pytest.raises(ParameterError, match="parents"):
        compare_models(samples, REAL, folds, ClassScheme(scheme.names, {}), structures=("hierarchical",))
    with pytest.raises(ParameterError, match="folds"):
        compare_models(samples, REAL, folds[:-1], scheme)
    with pytest.raises(ParameterError, match="lack column"):
        compare_models(samples, ["no_such_feature"], folds, scheme)


def test_progress_says_what_each_configuration_is_doing(demo, capsys):
    """With progress on, every configuration prints its name, each fold as it is predicted and its score when
    done (the scores printed are the table's), and the finished bar stays with its seconds."""
    import re

    samples, folds, scheme = demo
    r = compare_models(samples, REAL, folds, scheme, kinds=("random_forest", "xgboost"), structures=("flat",),
                       selection="none", quick=True, progress=True)
    err = capsys.readouterr().err
    n_folds = np.unique(folds).size
    for i, row in enumerate(r.table.itertuples(), start=1):
        prefix = f"[{i}/2] {row.config}: "
        assert f"{prefix}fitting one model per fold\n" in err
        for j in range(1, n_folds + 1):
            line = rf"{re.escape(prefix)}fold {j}/{n_folds} \(fold id \d+\) predicted\n"
            assert re.search(line, err), (i, j)
        assert (f"{prefix}overall accuracy {row.overall_accuracy:.3f}, macro F1 {row.macro_f1:.3f}, "
                f"done in {row.seconds:.1f} s\n") in err
    finals = [chunk.rsplit("\r", 1)[-1] for chunk in err.split("\n")]
    assert any(re.match(r"comparing: 100%.*2/2.*done in \d+\.\d s", line) for line in finals), finals


def test_no_progress_lines_when_progress_is_off(demo, capsys):
    samples, folds, scheme = demo
    compare_models(samples, REAL, folds, scheme, kinds=("random_forest",), structures=("flat",),
                   selection="none", quick=True, progress=False)
    assert capsys.readouterr().err == ""
