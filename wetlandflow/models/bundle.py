"""The model bundle: a fitted classifier saved in its library's own format plus a JSON sidecar, and loaded again.

A flat :class:`~wetlandflow.models.classifier.WetlandClassifier` is one estimator file and ``bundle.json``; a
:class:`~wetlandflow.models.hierarchy.HierarchicalClassifier` is one flat bundle per level.  This module also
checks that a table's or cube's features match the ones a bundle was trained on.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import ModelError
from ..inputs.io import atomic_path, write_json
from .classifier import ClassScheme, WetlandClassifier
from .hierarchy import HierarchicalClassifier, _Constant


def save_bundle(model: Any, folder: str | Path, *, features: list[str], scheme: ClassScheme,
                training_hash: str, extra: dict | None = None) -> Path:
    """Save the model in the estimator library's own format plus a JSON sidecar.

    A :class:`WetlandClassifier` gives ``model.ubj`` (XGBoost) or ``model.joblib`` (forest) and
    ``bundle.json``.  A :class:`~wetlandflow.models.hierarchy.HierarchicalClassifier` gives one sub-folder per
    fitted level (``level_top/``, ``level_<parent>/``), each a flat bundle of that level's classifier, and a
    ``bundle.json`` (``"structure": "hierarchical"``) that records the tree: leaf classes, parents,
    top-level classes, the priors of every parent's children, the gate threshold, each level's folder and
    training rows.  A level with fewer than two children in the training data has no model: its priors are
    its conditional probabilities and it gets no folder.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    if isinstance(model, HierarchicalClassifier):
        return _save_hierarchical(model, folder, features=features, scheme=scheme,
                                  training_hash=training_hash, extra=extra)
    _remove_stale(folder, hierarchical=False)
    model_file = _save_estimator(model, folder)
    sidecar = {
        "model_file": model_file, "kind": model.kind, "features": list(features), "scheme": scheme.to_dict(),
        "present_classes": model.present_.tolist(), "params": model.get_params(),
        "training_data_sha256": training_hash, "versions": _versions(), **(extra or {}),
    }
    write_json(sidecar, folder / "bundle.json")
    return folder


def _versions() -> dict[str, str]:
    import sklearn
    import xgboost

    return {"xgboost": xgboost.__version__, "scikit-learn": sklearn.__version__}


def _save_estimator(model: WetlandClassifier, folder: Path) -> str:
    """The fitted estimator in its library's own format; returns the file name."""
    if model.kind == "xgboost":
        with atomic_path(folder / "model.ubj") as tmp:
            model.model_.get_booster().save_model(str(tmp.with_suffix(".ubj")))
            tmp.with_suffix(".ubj").rename(tmp)
        return "model.ubj"
    import joblib

    with atomic_path(folder / "model.joblib") as tmp:
        joblib.dump(model.model_, tmp)
    return "model.joblib"


def _remove_stale(folder: Path, *, hierarchical: bool) -> None:
    """A folder holds one bundle: drop the parts of a bundle saved there before that the new one does not
    rewrite (a flat estimator file under a hierarchy; level folders, which the new bundle writes afresh)."""
    import shutil

    if hierarchical:
        for name in ("model.ubj", "model.joblib"):
            (folder / name).unlink(missing_ok=True)
    for sub in folder.glob("level_*"):
        if (sub / "bundle.json").is_file():
            shutil.rmtree(sub)


def _level_folder(name: str, taken: set[str]) -> str:
    """``level_<name>`` with characters other than letters, digits, '-' and '_' replaced (unique)."""
    import re

    base = "level_" + (re.sub(r"[^A-Za-z0-9_-]", "_", name) or "_")
    out, i = base, 1
    while out in taken:
        i += 1
        out = f"{base}_{i}"
    taken.add(out)
    return out


def _save_hierarchical(model: Any, folder: Path, *, features: list[str], scheme: ClassScheme,
                       training_hash: str, extra: dict | None) -> Path:
    if not hasattr(model, "top_model_"):
        raise ModelError("save_bundle needs a fitted HierarchicalClassifier; call fit(X, y) first")
    _remove_stale(folder, hierarchical=True)
    rows = getattr(model, "level_rows_", {})
    taken: set[str] = set()
    levels: dict[str, dict[str, Any]] = {}
    entries = [("top", model.top_model_, tuple(model.top_classes_))]
    entries += [(p, model.child_models_[p], tuple(model.parents_[p])) for p in model.parents_]
    for name, level, classes in entries:
        record: dict[str, Any] = {"classes": list(classes), "n_rows": rows.get(name)}
        if isinstance(level, WetlandClassifier):
            sub = _level_folder(name, taken)
            save_bundle(level, folder / sub, features=features, scheme=ClassScheme(classes, {}),
                        training_hash=training_hash,
                        extra={"level": name,
                               "trained_on": "all rows" if name == "top" else f"rows of {name!r}"})
            record["folder"] = sub
        else:  # fewer than two children in training: the priors are the conditional probabilities
            record["folder"] = None
        levels[name] = record
    base = model.base_params or {}
    sidecar = {
        "structure": "hierarchical", "kind": base.get("kind", "xgboost"), "features": list(features),
        "scheme": scheme.to_dict(), "present_classes": model.present_leaves(),
        "params": {"classes": list(model.scheme_),
                   "parents": {p: list(c) for p, c in model.parents_.items()},
                   "base_params": {k: v for k, v in base.items() if k != "classes"},
                   "gate_threshold": float(model.gate_threshold)},
        "hierarchy": {"classes": list(model.scheme_), "top_classes": list(model.top_classes_),
                      "parents": {p: list(c) for p, c in model.parents_.items()},
                      "priors": {p: [float(v) for v in pr] for p, pr in model.priors_.items()},
                      "gate_threshold": float(model.gate_threshold), "levels": levels},
        "training_data_sha256": training_hash, "versions": _versions(), **(extra or {}),
    }
    write_json(sidecar, folder / "bundle.json")
    return folder


def load_bundle(folder: str | Path) -> tuple[Any, dict]:
    """Load a bundle written by :func:`save_bundle`; returns the classifier and its sidecar.

    The classifier knows its feature names (``feature_names_in_``, the
    sidecar's order), so a DataFrame given to ``predict_proba`` is aligned by
    name; bring a cube or a bare array into that order with
    :func:`align_features` first.  A hierarchical bundle gives a fitted
    :class:`~wetlandflow.models.hierarchy.HierarchicalClassifier` whose levels are
    loaded from their sub-folders (it reads its input by position: align a
    DataFrame with :func:`align_features` first).
    """
    folder = Path(folder)
    side_path = folder / "bundle.json"
    if not side_path.exists():
        raise ModelError(f"{folder}: no bundle.json; is this a model folder written by wetlandflow?")
    side = json.loads(side_path.read_text())
    if side.get("structure") == "hierarchical":
        return _load_hierarchical(folder, side), side
    params = {k: v for k, v in side["params"].items() if k in WetlandClassifier().get_params()}
    if params.get("classes") is not None:
        params["classes"] = tuple(params["classes"])
    clf = WetlandClassifier(**params)
    # a model fitted without a scheme (classes=None) has the sorted training labels as its scheme
    own = params.get("classes")
    clf.scheme_ = np.array(own if own is not None else side["present_classes"])
    clf.classes_ = np.unique(clf.scheme_)
    clf.present_ = np.array(side["present_classes"])
    clf.n_features_in_ = len(side["features"])
    clf.feature_names_in_ = np.array(side["features"], dtype=object)
    if side["kind"] == "xgboost":
        from xgboost import XGBClassifier

        m = XGBClassifier()
        m.load_model(str(folder / side["model_file"]))
    else:
        import joblib

        m = joblib.load(folder / side["model_file"])
    clf.model_ = m
    return clf, side


def _load_hierarchical(folder: Path, side: dict) -> Any:
    h = side["hierarchy"]
    parents = {p: tuple(c) for p, c in h["parents"].items()}
    model = HierarchicalClassifier(classes=tuple(h["classes"]), parents=parents,
                                   base_params=dict(side["params"].get("base_params", {})),
                                   gate_threshold=float(h["gate_threshold"]))
    model.scheme_ = np.array(h["classes"])
    model.classes_ = np.unique(model.scheme_)
    model.parents_ = parents
    model.top_classes_ = np.array(h["top_classes"])
    model.priors_ = {p: np.asarray(v, dtype=np.float64) for p, v in h["priors"].items()}

    def level(name: str) -> Any:
        rec = h["levels"].get(name)
        if rec is None:
            raise ModelError(f"{folder / 'bundle.json'}: the hierarchy lists no level {name!r}; the bundle "
                             "is incomplete, save the model again")
        if rec["folder"] is None:
            return _Constant(model.priors_[name])
        sub = folder / rec["folder"]
        if not (sub / "bundle.json").exists():
            raise ModelError(f"{sub}: the level {name!r} of the hierarchical bundle is missing; copy the "
                             "whole model folder, or save the model again")
        return load_bundle(sub)[0]

    model.top_model_ = level("top")
    model.child_models_ = {p: level(p) for p in parents}
    model.level_rows_ = {name: rec["n_rows"] for name, rec in h["levels"].items()
                         if rec.get("n_rows") is not None}
    model.n_features_in_ = len(side["features"])
    return model
