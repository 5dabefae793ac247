"""Benchmark case for explanations: exact TreeSHAP rows per second against XGBoost's own pred_contribs.

The model is the size of a production run (600 trees per class is the scale at
which the issue measured ~60-100 rows/s): 6 classes, 40 features, depth 6,
fitted once on synthetic rows and shared by the variants through a cached
model file, so each variant's subprocess times only the explanation.
Work is counted in rows; throughput is in rows/s.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np
from _harness import case, timed

N_FEATURES, N_CLASSES = 40, 6
CLASSES = ("upland", "open_water", "marsh", "swamp", "fen", "bog")
MODEL_FILE = Path(tempfile.gettempdir()) / "wetlandflow_bench_shap_model.ubj"


def _rows(n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, N_FEATURES)).astype(np.float32)
    X[rng.random(X.shape) < 0.02] = np.nan  # a few missing values, routed by the trees
    return X


def _model(quick: bool):
    """The WetlandClassifier used by both variants (fitted once, then loaded from MODEL_FILE)."""
    from xgboost import XGBClassifier

    from wetlandflow.models.classifier import WetlandClassifier

    n_trees = 100 if quick else 600
    path = MODEL_FILE.with_suffix(f".{n_trees}.ubj")
    clf = WetlandClassifier(classes=CLASSES, n_estimators=n_trees, max_depth=6, n_threads=2)
    X = _rows(6000, 0)
    y = np.array(CLASSES)[np.argmax(X[:, :N_CLASSES] + 0.5 * np.nan_to_num(X[:, 6:12]), axis=1)]
    if path.exists():
        booster = XGBClassifier()
        booster.load_model(path)
        clf.model_ = booster
        clf.classes_ = np.unique(CLASSES)
        clf.scheme_ = clf.present_ = np.array(CLASSES)
        clf.n_features_in_ = N_FEATURES
        return clf
    clf.fit(X, y)
    clf.model_.save_model(path)
    return clf


shap_case = case("shap", unit="rows/s", baseline="xgboost pred_contribs", per=1.0,
                 description="exact TreeSHAP of a 6-class XGBoost model (600 trees per class, depth 6, "
                             "40 features; quick: 100 trees) on 2000 rows (quick 500): wetlandflow's "
                             "shap_values (class-labelled layout, chunked) against Booster.predict("
                             "pred_contribs=True) on the same rows")


def _n(quick: bool) -> int:
    return 500 if quick else 2000


@shap_case.variant("xgboost pred_contribs")
def _contribs(quick: bool, repeat: int):
    from xgboost import DMatrix

    model = _model(quick)
    X = _rows(_n(quick), 1)
    booster = model.model_.get_booster()
    return len(X), timed(lambda: booster.predict(DMatrix(X, missing=np.nan), pred_contribs=True), repeat)


@shap_case.variant("wetlandflow shap_values")
def _wetlandflow(quick: bool, repeat: int):
    from wetlandflow.explain.attribution import shap_values

    model = _model(quick)
    X = _rows(_n(quick), 1)
    features = [f"f{i}" for i in range(N_FEATURES)]
    return len(X), timed(lambda: shap_values(model, X, features=features), repeat)
