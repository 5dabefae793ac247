"""Model configurations compared under the same spatial folds.

:func:`compare_models` scores every combination of estimator (XGBoost, random
forest), structure (flat, or hierarchical with the class scheme's parents as
the top level) and feature set (all features, or a forward selection) on one
fixed set of spatial folds, so differences between rows are not fold noise.
Each configuration gives out-of-fold class probabilities for every sample,
from which come overall accuracy, per-class and macro F1, the Brier score, the
expected calibration error and reliability curves; optionally the
probabilities are recalibrated (isotonic or sigmoid) inside each training
fold.  :func:`write_comparison` writes the tables and figures into a folder,
and :func:`compare_run` does both for a finished run folder (also
``python -m wetlandflow.models.compare RUN_DIR``).

Feature selection follows Meyer et al. (2018): forward selection scored by
spatial CV.  With ``selection="nested"`` (the default) it runs inside each
training fold (:func:`~wetlandflow.models.selection.forward_selection_within_folds`),
so the after-selection score includes the selection step and is not
optimistic (Ambroise & McLachlan 2002).  One more selection on all folds gives
the selection curve and the set written to ``selected_features.txt``.

The scores pool the out-of-fold predictions of all samples (global validation,
as Linnenbrink et al. 2024 recommend for unbalanced folds).  They choose
between configurations; the map's accuracy and class areas come from an
independent probability sample.

References
----------
Meyer, H., Reudenbach, C., Hengl, T., Katurji, M., Nauss, T. (2018). Improving
performance of spatio-temporal machine learning models using forward feature
selection and target-oriented validation. Environmental Modelling & Software
101, 1-9.

Ambroise, C., McLachlan, G. J. (2002). Selection bias in gene extraction on the
basis of microarray gene-expression data. PNAS 99(10), 6562-6566.

Linnenbrink, J., Milà, C., Ludwig, M., Meyer, H. (2024). kNNDM CV: k-fold
nearest-neighbour distance matching cross-validation for map accuracy
estimation. Geoscientific Model Development 17, 5897-5912.
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from sklearn.metrics import precision_recall_fscore_support
from sklearn.model_selection import PredefinedSplit

from ..errors import ModelError, ParameterError
from ..inputs.io import atomic_path, write_figure, write_json, write_table
from .calibration import (
    ProbabilityCalibrator,
    brier_score,
    expected_calibration_error,
    plot_reliability,
    plot_reliability_comparison,
    reliability_table,
)
from .classifier import ClassScheme, WetlandClassifier, canonical_order, scheme_proba
from .hierarchy import HierarchicalClassifier
from .selection import (
    SelectionResult,
    forward_feature_selection,
    forward_selection_within_folds,
    write_selected_features,
)

__all__ = ["ComparisonResult", "compare_models", "compare_run", "load_run_inputs", "write_comparison"]

KINDS = ("xgboost", "random_forest")
STRUCTURES = ("flat", "hierarchical")
SELECTIONS = ("nested", "same_folds", "none")
CALIBRATIONS = (None, "isotonic", "sigmoid")

# Small models: the comparison fits each configuration once per fold (more with
# nested selection or calibration) and must run in minutes on two cores.
DEFAULT_PARAMS = {"xgboost": {"n_estimators": 80, "max_depth": 4, "learning_rate": 0.15},
                  "random_forest": {"n_estimators": 80, "max_depth": 0}}
QUICK_PARAMS = {"xgboost": {"n_estimators": 10, "max_depth": 3, "learning_rate": 0.3},
                "random_forest": {"n_estimators": 10, "max_depth": 8}}
DEFAULT_SELECTION = {"kind": "xgboost", "n_estimators": 20, "max_depth": 3, "learning_rate": 0.3,
                     "pool": 10, "max_features": 8, "scoring": "f1_macro", "tol": 0.0}
QUICK_SELECTION = {"kind": "xgboost", "n_estimators": 8, "max_depth": 3, "learning_rate": 0.4,
                   "pool": 5, "max_features": 4, "scoring": "f1_macro", "tol": 0.0}
_SEARCH_KEYS = ("pool", "max_features", "scoring", "tol", "min_features", "max_pairs")

@dataclass(frozen=True)
class ComparisonResult:
    """Scores, out-of-fold probabilities and selections of a model comparison.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per configuration: ``config, kind, structure, features,
        n_features`` (mean over folds), ``n_features_min, n_features_max,
        overall_accuracy, overall_accuracy_fold_sd, macro_f1, brier, ece``;
        with calibration also ``overall_accuracy_calibrated, brier_calibrated,
        ece_calibrated``; and ``seconds`` (wall time of the row).
    per_class : pandas.DataFrame
        ``config, class, precision, recall, f1, support`` (pooled out-of-fold).
    oof : dict of str to numpy.ndarray
        Configuration name to (n_samples, n_classes) out-of-fold probabilities,
        rows in the input order of ``samples``, columns in scheme order.
    calibrated : dict of str to numpy.ndarray
        Same for the recalibrated probabilities (empty without calibration).
    samples : pandas.DataFrame
        ``plot_id, class, x, y, fold`` of the samples, input order.
    classes : tuple of str
    selection : SelectionResult or None
        Selection on all folds: the curve and the set for the project file.
    fold_selections : dict of int to SelectionResult
        With ``selection="nested"``: the selection made inside each training fold.
    notes : tuple of str
        How the numbers were made; printed under the table.
    settings : dict
        Everything needed to rerun the comparison.
    """

    table: pd.DataFrame
    per_class: pd.DataFrame
    oof: dict[str, np.ndarray] = field(repr=False)
    calibrated: dict[str, np.ndarray] = field(repr=False)
    samples: pd.DataFrame = field(repr=False)
    classes: tuple[str, ...]
    selection: SelectionResult | None = field(repr=False)
    fold_selections: dict[int, SelectionResult] = field(repr=False)
    notes: tuple[str, ...]
    settings: dict[str, Any] = field(repr=False)

    def summary(self) -> str:
        """The table as Markdown (OA, macro F1, Brier, ECE per configuration) with the notes."""
        cols = ["config", "n_features", "overall_accuracy", "macro_f1", "brier", "ece"]
        cols += [c for c in ("brier_calibrated", "ece_calibrated") if c in self.table]
        lines = ["| " + " | ".join(cols) + " |", "|" + "---|" * len(cols)]
        for _, r in self.table.iterrows():
            cells = [r[c] if isinstance(r[c], str) else f"{r[c]:.3f}" for c in cols]
            cells[1] = f"{r['n_features']:.1f}"
            lines.append("| " + " | ".join(cells) + " |")
        return "\n".join(lines + [""] + [f"- {n}" for n in self.notes])

    def reliability_tables(self, calibrated: bool = False, n_bins: int = 10) -> dict[str, pd.DataFrame]:
        """:func:`~wetlandflow.models.calibration.reliability_table` of every configuration."""
        probs = self.calibrated if calibrated else self.oof
        y = self.samples["class"].to_numpy()
        return {k: reliability_table(y, p, self.classes, n_bins=n_bins) for k, p in probs.items()}


@dataclass(frozen=True)
class _Config:
    kind: str
    structure: str
    features: str

    @property
    def name(self) -> str:
        return f"{self.kind}/{self.structure}/{self.features}"


# --------------------------------------------------------------------------- checks


def _choices(name: str, value: Sequence[str], allowed: Sequence[Any]) -> tuple[str, ...]:
    vals = (value,) if isinstance(value, str) else tuple(value)
    bad = [v for v in vals if v not in allowed]
    if bad or not vals:
        raise ParameterError(f"{name} must be a non-empty selection of {tuple(allowed)}; got {value!r}.")
    return vals


def _check_inputs(samples: pd.DataFrame, features: Sequence[str], folds: np.ndarray, scheme: ClassScheme,
                  structures: tuple[str, ...], selection: str) -> None:
    need = ["plot_id", "class", "x", "y", *features]
    missing = [c for c in need if c not in samples.columns]
    if missing:
        raise ParameterError(f"samples lack column(s) {missing}; expected plot_id, class, x, y and the "
                             "features (the run folder's samples.parquet).")
    if folds.shape != (len(samples),) or (folds < 0).any():
        raise ParameterError(f"folds must give a test fold id >= 0 for each of the {len(samples)} samples; "
                             f"got shape {folds.shape} with {(folds < 0).sum()} negative id(s).")
    n_folds, least = np.unique(folds).size, 3 if selection == "nested" else 2
    if n_folds < least:
        raise ParameterError(f"{n_folds} fold(s) given; selection={selection!r} needs at least {least}.")
    unknown = sorted(set(samples["class"].astype(str)) - set(scheme.names))
    if unknown:
        raise ModelError(f"labels {unknown} are not in the class scheme {list(scheme.names)}")
    if "hierarchical" in structures and not scheme.parents:
        raise ParameterError("structures includes 'hierarchical' but the class scheme has no parents; add "
                             "[classes.parents] to the project file or use structures=('flat',).")


# --------------------------------------------------------------------------- models


def _settings(quick: bool, model_params: dict | None, selection_params: dict | None) -> tuple[dict, dict]:
    base = QUICK_PARAMS if quick else DEFAULT_PARAMS
    params = {k: {**base[k], **(model_params or {}).get(k, {})} for k in KINDS}
    sel = {**(QUICK_SELECTION if quick else DEFAULT_SELECTION), **(selection_params or {})}
    return params, sel


def _factory(kind: str, structure: str, scheme: ClassScheme, params: dict, seed: int) -> Callable[[], Any]:
    # One thread per model, folds in parallel processes: small fits gain little from threads.
    base = {"kind": kind, **params, "n_threads": 1, "random_state": seed}
    if structure == "flat":
        return lambda: WetlandClassifier(classes=scheme.names, **base)
    return lambda: HierarchicalClassifier(scheme.names, dict(scheme.parents), base_params=base)


def _fit_predict(make: Callable[[], Any], X_train: np.ndarray, y_train: np.ndarray,
                 X_test: np.ndarray) -> np.ndarray:
    return scheme_proba(make().fit(X_train, y_train), X_test)


def _oof(make: Callable[[], Any], X: pd.DataFrame, y: np.ndarray, folds: np.ndarray,
         columns: Callable[[int], list[str]], n_classes: int, n_jobs: int,
         on_fold: Callable[[int, int, int], None] | None = None) -> np.ndarray:
    """Out-of-fold probabilities: one model per fold, fitted on the other folds (folds in parallel).

    ``on_fold(i, n, k)`` is called as the ``i``-th of ``n`` folds (id ``k``) is predicted, in fold order.
    """
    from joblib import Parallel, delayed

    ids = np.unique(folds)
    jobs = []
    for k in ids:
        test, cols = folds == k, columns(int(k))
        jobs.append(delayed(_fit_predict)(make, X.loc[~test, cols].to_numpy(np.float32), y[~test],
                                          X.loc[test, cols].to_numpy(np.float32)))
    out = np.full((len(y), n_classes), np.nan)
    results = Parallel(n_jobs=n_jobs, return_as="generator")(jobs)
    for i, (k, p) in enumerate(zip(ids, results, strict=True), start=1):
        out[folds == k] = p
        if on_fold is not None:
            on_fold(i, len(ids), int(k))
    return out


def _calibrated_oof(make: Callable[[], Any], X: pd.DataFrame, y: np.ndarray, folds: np.ndarray,
                    columns: Callable[[int], list[str]], oof: np.ndarray, classes: tuple[str, ...],
                    method: str, n_jobs: int) -> np.ndarray:
    """Recalibrate each fold's out-of-fold probabilities with a map fitted inside its training folds.

    For test fold ``k`` the calibration data are the out-of-fold predictions
    of ``k``'s training samples under leave-one-fold-out over the other folds;
    fold ``k``'s labels are never used.
    """
    out = np.empty_like(oof)
    for k in np.unique(folds):
        train, cols = folds != k, columns(int(k))
        inner = _oof(make, X[train], y[train], folds[train], lambda _k, c=cols: c, len(classes), n_jobs)
        calibrator = ProbabilityCalibrator(classes, method).fit(inner, y[train])
        out[folds == k] = calibrator.transform(oof[folds == k])
    return out


# --------------------------------------------------------------------------- selection


def _run_selection(
    X: pd.DataFrame, y: np.ndarray, folds: np.ndarray, scheme: ClassScheme, sel: dict, seed: int,
    n_threads: int, nested: bool,
) -> tuple[SelectionResult, dict[int, SelectionResult]]:
    est_params = {k: v for k, v in sel.items() if k not in _SEARCH_KEYS}
    estimator = WetlandClassifier(classes=scheme.names, n_threads=1, random_state=seed, **est_params)
    search = {k: sel[k] for k in _SEARCH_KEYS if k in sel}
    per_fold = {}
    if nested:
        per_fold = forward_selection_within_folds(estimator, X, y, folds, n_jobs=n_threads, **search)
    full = forward_feature_selection(estimator, X, y, None, PredefinedSplit(folds), **search)
    return full, per_fold


def _selection_notes(selection: str, sel: dict, n_features: int) -> list[str]:
    est = ", ".join(f"{k}={sel[k]}" for k in sel if k not in _SEARCH_KEYS)
    pool = sel.get("pool")
    screen = (f"; candidates screened to the {pool} most important of {n_features} features by one fit "
              "(common practice, no source)") if pool and pool < n_features else ""
    how = {
        "nested": "Forward feature selection (Meyer et al. 2018) ran inside each training fold, scored by "
                  "leave-one-fold-out over the other folds; the held-out fold never took part, so the "
                  "'selected' rows include the selection step.",
        "same_folds": "Forward feature selection (Meyer et al. 2018) used the same folds that score the "
                      "'selected' rows: those scores are optimistic (Ambroise & McLachlan 2002).",
    }[selection]
    return [how, f"Features were selected once for all configurations, with a small model ({est}), scoring "
                 f"{sel['scoring']}, at most {sel.get('max_features')} features{screen}.",
            "The selection curve and selected_features.txt come from a selection on all folds; its scores "
            "are optimistic (the same folds chose the set)."]


# --------------------------------------------------------------------------- metrics


def _metrics(y: np.ndarray, proba: np.ndarray, classes: tuple[str, ...],
             folds: np.ndarray) -> tuple[dict[str, float], pd.DataFrame]:
    """Pooled OA, macro F1 over the classes present, Brier, ECE; per-class precision, recall, F1."""
    pred = np.asarray(classes)[np.argmax(proba, axis=1)]
    prec, rec, f1, sup = precision_recall_fscore_support(y, pred, labels=list(classes), zero_division=0)
    hit = pred == y
    per_fold = [hit[folds == k].mean() for k in np.unique(folds)]
    row = {"overall_accuracy": float(hit.mean()), "overall_accuracy_fold_sd": float(np.std(per_fold)),
           "macro_f1": float(f1[sup > 0].mean()), "brier": brier_score(y, proba, classes),
           "ece": expected_calibration_error(y, proba, classes)}
    per_class = pd.DataFrame({"class": list(classes), "precision": prec, "recall": rec, "f1": f1,
                              "support": sup.astype(int)})
    return row, per_class


def _n_features(cfg: _Config, features: list[str], per_fold: dict[int, list[str]]) -> dict[str, float]:
    sizes = [len(features)] if cfg.features == "all" else [len(v) for v in per_fold.values()]
    return {"n_features": float(np.mean(sizes)), "n_features_min": int(min(sizes)),
            "n_features_max": int(max(sizes))}


# --------------------------------------------------------------------------- the comparison


def compare_models(
    samples: pd.DataFrame,
    features: Sequence[str],
    folds: Any,
    scheme: ClassScheme,
    *,
    kinds: Sequence[str] = KINDS,
    structures: Sequence[str] = STRUCTURES,
    selection: str = "nested",
    calibration: str | None = None,
    model_params: dict[str, dict] | None = None,
    selection_params: dict[str, Any] | None = None,
    n_threads: int = 2,
    seed: int = 0,
    quick: bool = False,
    progress: bool = False,
) -> ComparisonResult:
    """Score estimator x structure x feature-set configurations under the same spatial folds.

    Parameters
    ----------
    samples : pandas.DataFrame
        ``plot_id, class, x, y`` and the feature columns (a run's ``samples.parquet``).
    features : sequence of str
        Feature columns to use ("all features").
    folds : array-like of int, shape (n_samples,)
        Test-fold id of every sample (a run's ``validation/folds.parquet``),
        e.g. from :func:`~wetlandflow.validation.splitters.assign_folds` with a spatial splitter.
    scheme : ClassScheme
        Class order of the probabilities; its ``parents`` give the
        hierarchical model's top level (e.g. upland, open_water, wetland).
    kinds : sequence of {"xgboost", "random_forest"}
    structures : sequence of {"flat", "hierarchical"}
    selection : {"nested", "same_folds", "none"}, default "nested"
        Adds "selected" rows.  "nested": forward selection inside each
        training fold (honest; about ``n_folds`` times the work);
        "same_folds": one selection on all folds, used by every fold
        (optimistic, said so in the notes); "none": all features only.
    calibration : {None, "isotonic", "sigmoid"}
        Recalibrate every configuration inside the training folds (adds
        ``*_calibrated`` columns; about ``n_folds`` times the fits).
    model_params : dict, optional
        Per kind overrides of ``DEFAULT_PARAMS``, e.g. ``{"xgboost": {"n_estimators": 200}}``.
    selection_params : dict, optional
        Overrides of ``DEFAULT_SELECTION``: the selection model (``kind``,
        ``n_estimators``, ...) and the search (``pool``, ``max_features``,
        ``scoring``, ``tol``).
    n_threads : int, default 2
        Worker processes: folds (and nested selections) run in parallel, each
        model single-threaded, so the result does not depend on this number.
    seed : int
        Seed of every model (deterministic mode).  Samples are put in
        :func:`~wetlandflow.models.classifier.canonical_order` first, so the result does
        not depend on the row order of the input either.
    quick : bool
        Tiny models and a small selection (tests, smoke runs).
    progress : bool

    Returns
    -------
    ComparisonResult
    """
    from ..progress import done_text, progress_bar, step_lines

    kinds, structures = _choices("kinds", kinds, KINDS), _choices("structures", structures, STRUCTURES)
    _choices("selection", selection, SELECTIONS)
    _choices("calibration", (calibration,), CALIBRATIONS)
    features, folds = [str(f) for f in features], np.asarray(folds).astype(int)
    _check_inputs(samples, features, folds, scheme, structures, selection)
    params, sel = _settings(quick, model_params, selection_params)

    order = canonical_order(samples.assign(_row=np.arange(len(samples)), _fold=folds))
    X, y, f = order[features], order["class"].astype(str).to_numpy(), order["_fold"].to_numpy()
    full, per_fold, fold_sel, notes = None, {}, {}, []
    if selection != "none":
        with step_lines(f"forward feature selection ({selection})", enabled=progress):
            full, fold_sel = _run_selection(X, y, f, scheme, sel, seed, n_threads, selection == "nested")
        per_fold = ({k: r.selected for k, r in fold_sel.items()} if selection == "nested"
                    else {int(k): full.selected for k in np.unique(f)})
        notes += _selection_notes(selection, sel, len(features))
    configs = [_Config(k, s, fs) for fs in (("all", "selected") if selection != "none" else ("all",))
               for k in kinds for s in structures]
    rows, per_class, oof, cal = [], [], {}, {}
    for i, cfg in enumerate(progress_bar(configs, desc="comparing", unit="config", disable=not progress), 1):
        tell = _teller(f"[{i}/{len(configs)}] {cfg.name}", progress)
        tell("fitting one model per fold")
        row, pc, oof[cfg.name], c = _score_config(cfg, X, y, f, scheme, params, per_fold, features,
                                                  calibration, seed, n_threads, tell=tell)
        tell(f"overall accuracy {row['overall_accuracy']:.3f}, macro F1 {row['macro_f1']:.3f}, "
             f"{done_text(row['seconds'])}")
        if c is not None:
            cal[cfg.name] = c
        rows.append(row)
        per_class.append(pc.assign(config=cfg.name))
    back = np.argsort(order["_row"].to_numpy())  # canonical order -> input order
    notes += _general_notes(np.unique(f).size, calibration, quick)
    return ComparisonResult(
        table=pd.DataFrame(rows), per_class=pd.concat(per_class, ignore_index=True)[
            ["config", "class", "precision", "recall", "f1", "support"]],
        oof={k: v[back] for k, v in oof.items()}, calibrated={k: v[back] for k, v in cal.items()},
        samples=samples[["plot_id", "class", "x", "y"]].reset_index(drop=True).assign(fold=folds),
        classes=tuple(scheme.names), selection=full,
        fold_selections=fold_sel, notes=tuple(notes),
        settings={"kinds": list(kinds), "structures": list(structures), "selection": selection,
                  "calibration": calibration, "model_params": params, "selection_params": sel,
                  "n_threads": n_threads, "seed": seed, "quick": quick, "features": features,
                  "scheme": scheme.to_dict(), "n_samples": len(samples), "n_folds": int(np.unique(f).size)})


def _teller(prefix: str, enabled: bool) -> Callable[[str], None]:
    """A function printing ``prefix: text`` lines on standard error (nothing when not ``enabled``)."""
    from ..progress import say

    return lambda text: say(f"{prefix}: {text}", enabled=enabled)


def _score_config(cfg: _Config, X: pd.DataFrame, y: np.ndarray, folds: np.ndarray, scheme: ClassScheme,
                  params: dict, per_fold: dict[int, list[str]], features: list[str], calibration: str | None,
                  seed: int, n_threads: int, tell: Callable[[str], None] | None = None
                  ) -> tuple[dict, pd.DataFrame, np.ndarray, np.ndarray | None]:
    t0 = time.perf_counter()
    make = _factory(cfg.kind, cfg.structure, scheme, params[cfg.kind], seed)
    columns = (lambda _k: features) if cfg.features == "all" else (lambda k: list(per_fold[k]))
    classes = tuple(scheme.names)
    on_fold = None if tell is None else (lambda i, n, k: tell(f"fold {i}/{n} (fold id {k}) predicted"))
    proba = _oof(make, X, y, folds, columns, len(classes), n_threads, on_fold=on_fold)
    row, per_class = _metrics(y, proba, classes, folds)
    row = {"config": cfg.name, "kind": cfg.kind, "structure": cfg.structure, "features": cfg.features,
           **_n_features(cfg, features, per_fold), **row}
    cal = None
    if calibration is not None:
        if tell is not None:
            tell(f"{calibration} calibration inside the training folds")
        cal = _calibrated_oof(make, X, y, folds, columns, proba, classes, calibration, n_threads)
        m, _ = _metrics(y, cal, classes, folds)
        row.update(overall_accuracy_calibrated=m["overall_accuracy"], brier_calibrated=m["brier"],
                   ece_calibrated=m["ece"])
    row["seconds"] = round(time.perf_counter() - t0, 2)
    return row, per_class, proba, cal


def _general_notes(n_folds: int, calibration: str | None, quick: bool) -> list[str]:
    notes = [f"Scores pool the out-of-fold predictions of all samples (pixels) over the same {n_folds} "
             "spatial folds for every configuration; they choose between configurations and are not the "
             "map's accuracy, which comes from an independent probability sample.",
             "Macro F1 averages the F1 of the classes present in the reference labels; Brier is the "
             "multi-class sum (0 best, 2 worst); ECE is top-label, 15 equal-width bins (Guo et al. 2017).",
             "Hierarchical: P(leaf) = P(parent) x P(leaf | parent), top level from the class scheme's "
             "parents."]
    if calibration:
        notes.append(f"Calibrated columns: one {calibration} map per outer fold, fitted on out-of-fold "
                     "predictions of that fold's training samples (leave-one-fold-out over the other "
                     "folds); with nested selection those inner predictions use the features chosen on the "
                     "whole training fold.")
    if quick:
        notes.append("quick mode: tiny models; the numbers show that the pipeline runs, not what the models "
                     "can do.")
    return notes


# --------------------------------------------------------------------------- output


def _selection_curve(result: ComparisonResult) -> pd.DataFrame:
    parts = [result.selection.history.assign(source="all folds")]
    parts += [r.history.assign(source=f"within fold {k}") for k, r in result.fold_selections.items()]
    cols = ["source", "step", "n_features", "added", "score", "score_sd", "features"]
    return pd.concat(parts, ignore_index=True)[cols]


def _plot_curve(result: ComparisonResult) -> Any:
    fig = result.selection.plot()
    ax = fig.axes[0]
    for i, r in enumerate(result.fold_selections.values()):
        h = r.history
        ax.plot(h["n_features"], h["score"], color="0.45", linewidth=0.8, alpha=0.7,
                label="within training folds" if i == 0 else None)
    ax.set_title("forward selection: spatial-CV score against number of features", fontsize="small")
    ax.legend(fontsize="x-small")
    return fig


def _oof_long(result: ComparisonResult, probs: dict[str, np.ndarray], kind: str) -> pd.DataFrame:
    base = result.samples[["plot_id", "class", "fold"]]
    names = np.asarray(result.classes)
    parts = [base.assign(config=k, probabilities=kind, predicted=names[p.argmax(1)],
                         **{f"p_{c}": p[:, i] for i, c in enumerate(names)}) for k, p in probs.items()]
    return pd.concat(parts, ignore_index=True)


def write_comparison(result: ComparisonResult, folder: str | Path) -> dict[str, Path]:
    """Write the comparison's tables and figures into ``folder``.

    Files: ``comparison.csv`` (one row per configuration), ``comparison.md``
    (the table and notes), ``comparison.json`` (settings, notes, table),
    ``per_class_f1.csv``, ``oof_probabilities.parquet``, ``reliability.csv``
    and ``reliability.png`` (top label, every configuration),
    ``reliability_classes.png`` (per class, best configuration by macro F1);
    with a selection also ``selection_curve.csv``, ``selection_curve.png``,
    ``selected_features.txt`` (one name per line, from the selection on all
    folds) and ``fold_selected_features.csv``.

    Returns
    -------
    dict of str to pathlib.Path
    """
    folder = Path(folder)
    out = {"table": write_table(result.table, folder / "comparison.csv"),
           "per_class": write_table(result.per_class, folder / "per_class_f1.csv"),
           "json": write_json({"settings": result.settings, "notes": list(result.notes),
                               "table": result.table.to_dict(orient="records")}, folder / "comparison.json")}
    with atomic_path(folder / "comparison.md") as tmp:
        tmp.write_text(result.summary() + "\n")
    out["markdown"] = folder / "comparison.md"
    parts = [_oof_long(result, result.oof, "raw")]
    if result.calibrated:
        parts.append(_oof_long(result, result.calibrated, "calibrated"))
    out["oof"] = write_table(pd.concat(parts, ignore_index=True), folder / "oof_probabilities.parquet")
    out.update(_write_reliability(result, folder))
    if result.selection is not None:
        out.update(_write_selection(result, folder))
    return out


def _write_reliability(result: ComparisonResult, folder: Path) -> dict[str, Path]:
    raw, cal = result.reliability_tables(), result.reliability_tables(calibrated=True)
    parts = [t.assign(config=k, probabilities="raw") for k, t in raw.items()]
    parts += [t.assign(config=k, probabilities="calibrated") for k, t in cal.items()]
    best = result.table.sort_values("macro_f1", ascending=False, kind="stable")["config"].iloc[0]
    fig = plot_reliability(raw[best])
    fig.suptitle(f"reliability per class: {best}", fontsize="small")
    return {"reliability": write_table(pd.concat(parts, ignore_index=True), folder / "reliability.csv"),
            "reliability_png": write_figure(plot_reliability_comparison(raw, cal or None),
                                            folder / "reliability.png"),
            "reliability_classes_png": write_figure(fig, folder / "reliability_classes.png")}


def _write_selection(result: ComparisonResult, folder: Path) -> dict[str, Path]:
    per_fold = pd.DataFrame([{"fold": k, "n_features": len(r.selected), "features": ";".join(r.selected),
                              "inner_score": r.score} for k, r in result.fold_selections.items()],
                            columns=["fold", "n_features", "features", "inner_score"])
    return {"curve": write_table(_selection_curve(result), folder / "selection_curve.csv"),
            "curve_png": write_figure(_plot_curve(result), folder / "selection_curve.png"),
            "selected": write_selected_features(result.selection.selected, folder / "selected_features.txt"),
            "fold_selected": write_table(per_fold, folder / "fold_selected_features.csv")}


# --------------------------------------------------------------------------- run folders


def load_run_inputs(run_dir: str | Path) -> dict[str, Any]:
    """Samples, feature names, folds, class scheme, seed and threads of a finished run folder.

    Returns
    -------
    dict
        ``samples, features, folds, scheme, seed, n_threads`` (keyword
        arguments for :func:`compare_models`).
    """
    run_dir = Path(run_dir)
    paths = {p: run_dir / p for p in ("samples.parquet", "validation/folds.parquet", "manifest.json")}
    absent = [p for p, path in paths.items() if not path.exists()]
    if absent:
        raise ModelError(f"{run_dir}: missing {absent}; run the project at least through its validation step "
                         "(wetlandflow run PROJECT.toml) first.")
    samples = pd.read_parquet(paths["samples.parquet"])
    folds = pd.read_parquet(paths["validation/folds.parquet"])
    if len(folds) != len(samples) or not (folds["plot_id"].to_numpy() == samples["plot_id"].to_numpy()).all():
        raise ModelError(f"{run_dir}: validation/folds.parquet does not follow samples.parquet row for row; "
                         "rerun the project so both come from the same run.")
    manifest = json.loads(paths["manifest.json"].read_text())
    project = manifest["project"]
    scheme = ClassScheme.from_dict(project["classes"])
    features = [c for c in samples.columns if c not in ("plot_id", "class", "x", "y")]
    threads = int(project.get("model", {}).get("n_threads", 2))
    return {"samples": samples, "features": features, "folds": folds["fold"].to_numpy(), "scheme": scheme,
            "seed": int(manifest.get("seed", 0)), "n_threads": threads}


def compare_run(
    run_dir: str | Path, *, out_dir: str | Path | None = None, **options: Any
) -> ComparisonResult:
    """Compare models on a run folder's samples and folds; write to ``out_dir`` (default ``RUN/comparison``).

    Parameters
    ----------
    run_dir : path
        A run folder with ``samples.parquet``, ``validation/folds.parquet`` and ``manifest.json``.
    out_dir : path, optional
    **options
        Keyword arguments of :func:`compare_models` (``quick``, ``calibration``, ...);
        ``seed`` and ``n_threads`` default to the run's.

    Returns
    -------
    ComparisonResult

    Examples
    --------
    >>> result = compare_run("runs/demo", calibration="isotonic")  # doctest: +SKIP
    >>> print(result.summary())  # doctest: +SKIP
    """
    inputs = {**load_run_inputs(run_dir), **options}
    result = compare_models(**inputs)
    write_comparison(result, Path(out_dir) if out_dir is not None else Path(run_dir) / "comparison")
    return result


def main(argv: Sequence[str] | None = None, *, prog: str = "python -m wetlandflow.models.compare") -> int:
    """Rerun the model comparison of a run folder: ``wetlandflow compare RUN_DIR [options]``."""
    import argparse

    ap = argparse.ArgumentParser(prog=prog, description=main.__doc__)
    ap.add_argument("run_dir", help="a run folder (after at least its validation step)")
    ap.add_argument("--out", default=None, help="output folder (default RUN_DIR/comparison)")
    ap.add_argument("--kinds", nargs="+", default=list(KINDS), choices=KINDS)
    ap.add_argument("--structures", nargs="+", default=list(STRUCTURES), choices=STRUCTURES)
    ap.add_argument("--selection", default="nested", choices=SELECTIONS)
    ap.add_argument("--calibration", default=None, choices=["isotonic", "sigmoid"])
    ap.add_argument("--quick", action="store_true", help="tiny models (smoke test)")
    a = ap.parse_args(argv)
    out = Path(a.out) if a.out else Path(a.run_dir) / "comparison"
    result = compare_run(a.run_dir, out_dir=out, kinds=a.kinds, structures=a.structures,
                         selection=a.selection, calibration=a.calibration, quick=a.quick, progress=True)
    print(result.summary())
    print(f"written to {out}; to train on the selected features, copy them from selected_features.txt "
          "into the project file as [model] features = [...]")
    return 0


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
