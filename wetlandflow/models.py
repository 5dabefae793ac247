"""Classifiers with a class scheme that travels with them, and the model bundle.

:class:`WetlandClassifier` is a scikit-learn estimator over XGBoost (multi-class
softprob, ``hist``) or scikit-learn's random forest.  Probabilities always come
in the class scheme's order, whatever subset of classes the training data held,
and a class map (code, name, colour) travels with the fitted model.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from sklearn.base import BaseEstimator, ClassifierMixin
from sklearn.utils.class_weight import compute_sample_weight

from .errors import ModelError
from .io import atomic_path, write_json

# Our own palette: muted, colour-blind-aware hues chosen for this project.
PALETTE = {
    "upland": "#c9b98f",
    "open_water": "#2f5f8a",
    "marsh": "#7fbf7b",
    "swamp": "#3d6b35",
    "fen": "#c2a5cf",
    "bog": "#8c5a3c",
}
_FALLBACK = ["#999999", "#e0a458", "#5aa9a4", "#a45a8c", "#6b6bd6", "#d6d66b"]


@dataclass(frozen=True)
class ClassScheme:
    """Ordered class names with raster codes (1-based; 0 = nodata) and colours."""

    names: tuple[str, ...]
    parents: dict[str, tuple[str, ...]]

    @property
    def codes(self) -> dict[str, int]:
        return {n: i + 1 for i, n in enumerate(self.names)}

    @property
    def colours(self) -> dict[str, str]:
        return {n: PALETTE.get(n, _FALLBACK[i % len(_FALLBACK)]) for i, n in enumerate(self.names)}

    def table(self) -> pd.DataFrame:
        parent_of = {c: p for p, cs in self.parents.items() for c in cs}
        return pd.DataFrame({"code": [self.codes[n] for n in self.names], "name": list(self.names),
                             "colour": [self.colours[n] for n in self.names],
                             "parent": [parent_of.get(n, n) for n in self.names]})

    def to_dict(self) -> dict[str, Any]:
        return {"names": list(self.names), "parents": {k: list(v) for k, v in self.parents.items()}}

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> ClassScheme:
        return cls(tuple(d["names"]), {k: tuple(v) for k, v in d.get("parents", {}).items()})


def check_no_sentinels(X: np.ndarray, features: list[str]) -> None:
    """Missing values must be NaN; a leftover sentinel (-9999, -32768, 65535) is an error."""
    for s in (-9999.0, -32768.0, 65535.0, -3.4028235e38):
        hit = np.any(X == s, axis=0)
        if hit.any():
            names = [f for f, h in zip(features, hit, strict=True) if h]
            raise ModelError(f"feature(s) {names} contain the no-data sentinel {s:g}; convert it to NaN on reading "
                             "(set the layer's nodata in the project file)")


class WetlandClassifier(ClassifierMixin, BaseEstimator):
    """Per-class probabilities in a fixed class order, over XGBoost or a random forest.

    Parameters
    ----------
    classes : sequence of str
        The class scheme, in order; ``predict_proba`` columns follow it.
    kind : {"xgboost", "random_forest"}
    n_estimators, max_depth, learning_rate : model size and step (learning_rate ignored by the forest)
    class_weighting : bool
        Weight samples inversely to class frequency (rare wetland classes count as much as upland).
    n_threads : int
        Fixed thread count (with ``random_state``, the same inputs give the same model).
    random_state : int
    """

    def __init__(self, classes=("upland", "wetland"), kind="xgboost", n_estimators=300, max_depth=6,
                 learning_rate=0.1, class_weighting=True, n_threads=2, random_state=0):
        self.classes = classes
        self.kind = kind
        self.n_estimators = n_estimators
        self.max_depth = max_depth
        self.learning_rate = learning_rate
        self.class_weighting = class_weighting
        self.n_threads = n_threads
        self.random_state = random_state

    def _make(self, n_classes: int):
        if self.kind == "xgboost":
            from xgboost import XGBClassifier

            return XGBClassifier(n_estimators=self.n_estimators, max_depth=self.max_depth,
                                 learning_rate=self.learning_rate, tree_method="hist",
                                 objective="multi:softprob", num_class=n_classes, n_jobs=self.n_threads,
                                 random_state=self.random_state, eval_metric="mlogloss")
        if self.kind == "random_forest":
            from sklearn.ensemble import RandomForestClassifier

            return RandomForestClassifier(n_estimators=self.n_estimators, max_depth=self.max_depth or None,
                                          n_jobs=self.n_threads, random_state=self.random_state,
                                          min_samples_leaf=2)
        raise ModelError(f"model kind must be 'xgboost' or 'random_forest', got {self.kind!r}")

    def fit(self, X, y, sample_weight=None):
        X = np.asarray(X, dtype=np.float32)
        y = np.asarray(y).astype(str)
        unknown = sorted(set(y) - set(self.classes))
        if unknown:
            raise ModelError(f"labels {unknown} are not in the class scheme {list(self.classes)}")
        self.classes_ = np.array(self.classes)
        present = [c for c in self.classes if c in set(y)]
        self.present_ = np.array(present)
        code = {c: i for i, c in enumerate(present)}
        yi = np.array([code[c] for c in y])
        w = compute_sample_weight("balanced", yi) if self.class_weighting else None
        if sample_weight is not None:
            w = np.asarray(sample_weight) * (w if w is not None else 1.0)
        self.model_ = self._make(len(present))
        self.model_.fit(X, yi, sample_weight=w)
        self.n_features_in_ = X.shape[1]
        return self

    def _present_proba(self, X: np.ndarray) -> np.ndarray:
        if self.kind == "xgboost":
            p = self.model_.get_booster().inplace_predict(X)
            p = np.asarray(p).reshape(X.shape[0], -1)
        else:
            p = self.model_.predict_proba(X)  # scikit-learn >= 1.4 forests route NaN natively
        return p

    def predict_proba(self, X):
        X = np.asarray(X, dtype=np.float32)
        if X.shape[1] != self.n_features_in_:
            raise ModelError(f"expected {self.n_features_in_} features, got {X.shape[1]}")
        p = self._present_proba(X)
        if len(self.present_) == len(self.classes_):
            return p.astype(np.float32)
        out = np.zeros((X.shape[0], len(self.classes_)), dtype=np.float32)
        idx = [list(self.classes_).index(c) for c in self.present_]
        out[:, idx] = p
        return out

    def predict(self, X):
        return self.classes_[np.argmax(self.predict_proba(X), axis=1)]


def data_hash(samples: pd.DataFrame, features: list[str]) -> str:
    """SHA-256 of the training table (labels, groups, coordinates and features, in order)."""
    cols = ["plot_id", "class", "x", "y", *features]
    h = hashlib.sha256(pd.util.hash_pandas_object(samples[cols], index=False).values.tobytes())
    return h.hexdigest()


def save_bundle(model: WetlandClassifier, folder: str | Path, *, features: list[str], scheme: ClassScheme,
                training_hash: str, extra: dict | None = None) -> Path:
    """Save the model in the estimator library's own format plus a JSON sidecar."""
    import sklearn
    import xgboost

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    if model.kind == "xgboost":
        with atomic_path(folder / "model.ubj") as tmp:
            model.model_.get_booster().save_model(str(tmp.with_suffix(".ubj")))
            tmp.with_suffix(".ubj").rename(tmp)
        model_file = "model.ubj"
    else:
        import joblib

        with atomic_path(folder / "model.joblib") as tmp:
            joblib.dump(model.model_, tmp)
        model_file = "model.joblib"
    sidecar = {
        "model_file": model_file, "kind": model.kind, "features": list(features), "scheme": scheme.to_dict(),
        "present_classes": model.present_.tolist(), "params": model.get_params(), "training_data_sha256": training_hash,
        "versions": {"xgboost": xgboost.__version__, "scikit-learn": sklearn.__version__}, **(extra or {}),
    }
    write_json(sidecar, folder / "bundle.json")
    return folder


def load_bundle(folder: str | Path) -> tuple[WetlandClassifier, dict]:
    """Load a bundle written by :func:`save_bundle`; returns the classifier and its sidecar."""
    folder = Path(folder)
    side_path = folder / "bundle.json"
    if not side_path.exists():
        raise ModelError(f"{folder}: no bundle.json; is this a model folder written by wetlandflow?")
    side = json.loads(side_path.read_text())
    params = {k: v for k, v in side["params"].items() if k in WetlandClassifier().get_params()}
    params["classes"] = tuple(params["classes"])
    clf = WetlandClassifier(**params)
    clf.classes_ = np.array(side["scheme"]["names"])
    clf.present_ = np.array(side["present_classes"])
    clf.n_features_in_ = len(side["features"])
    if side["kind"] == "xgboost":
        from xgboost import XGBClassifier

        m = XGBClassifier()
        m.load_model(str(folder / side["model_file"]))
    else:
        import joblib

        m = joblib.load(folder / side["model_file"])
    clf.model_ = m
    return clf, side

