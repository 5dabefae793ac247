"""Feature selection judged by spatial cross-validation.

Features that let a model recognise *where* a sample is (rather than *what* it
is) raise a random-CV score and lower the score on new places.  Meyer et al.
(2018) therefore select features by the score of a target-oriented (spatial)
cross-validation: start from the best pair, add one feature at a time while the
spatial-CV score improves.  :func:`forward_feature_selection` follows that
scheme; :func:`recursive_elimination` is the backward counterpart driven by the
model's own importances (Guyon et al. 2002).

Every candidate set is scored on the *same* folds: the splitter is run once,
with the groups, and the resulting ``(train, test)`` list is handed to
``cross_val_score``, so differences between candidates are not fold noise.

The score of the chosen set is optimistic, because the same folds chose it
(Ambroise & McLachlan 2002).  :func:`forward_selection_within_folds` runs the
whole selection inside each training fold (the held-out fold never takes part),
so that a model refitted on each fold's own selection gives an honest
after-selection score; :mod:`wetlandflow.models.compare` uses it.

References
----------
Meyer, H., Reudenbach, C., Hengl, T., Katurji, M., Nauss, T. (2018). Improving
performance of spatio-temporal machine learning models using forward feature
selection and target-oriented validation. Environmental Modelling & Software
101, 1-9.

Guyon, I., Weston, J., Barnhill, S., Vapnik, V. (2002). Gene selection for
cancer classification using support vector machines. Machine Learning 46,
389-422.

Ambroise, C., McLachlan, G. J. (2002). Selection bias in gene extraction on the
basis of microarray gene-expression data. PNAS 99(10), 6562-6566.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from sklearn.base import clone
from sklearn.metrics import f1_score, make_scorer
from sklearn.model_selection import PredefinedSplit, cross_val_score

from ..errors import ModelError, ParameterError
from ..inputs.io import atomic_path, write_json, write_table

__all__ = [
    "SelectionResult",
    "forward_feature_selection",
    "forward_selection_within_folds",
    "importance_ranking",
    "read_selected_features",
    "recursive_elimination",
    "write_selection",
]

_SCORINGS = ("accuracy", "f1_macro")
_HISTORY_COLUMNS = ["step", "n_features", "added", "removed", "score", "score_sd", "features"]


@dataclass(frozen=True)
class SelectionResult:
    """Outcome of a feature selection.

    Attributes
    ----------
    selected : list of str
        The chosen features, in the order they were added (forward) or in the
        input order (elimination).
    history : pandas.DataFrame
        One row per accepted step: ``step, n_features, added, removed, score,
        score_sd, features`` (score = mean over folds, score_sd = their
        standard deviation; ``features`` is the ``;``-joined set).
    candidates : pandas.DataFrame
        Every feature set scored: ``step, n_features, features, score, score_sd``.
    method : str
        ``"forward"`` or ``"recursive_elimination"``.
    scoring : str
    pool : tuple of str
        The features the search could choose from (all columns unless a
        ``pool`` size screened them by importance first).
    """

    selected: list[str]
    history: pd.DataFrame
    candidates: pd.DataFrame = field(repr=False)
    method: str
    scoring: str
    pool: tuple[str, ...] = ()

    @property
    def score(self) -> float:
        """Mean CV score of the selected set (on the folds that chose it: optimistic)."""
        h = self.history
        return float(h.loc[h["features"] == ";".join(self.selected), "score"].max())

    def plot(self, ax: Any = None) -> Any:
        """Spatial-CV score against the number of features.

        Accepted steps are drawn as a line with +-1 SD bars, every scored
        candidate as a grey dot.  Builds a ``matplotlib.figure.Figure`` without
        pyplot (nothing is shown; notebooks display the returned figure).

        Returns
        -------
        matplotlib.figure.Figure
        """
        from matplotlib.figure import Figure

        if ax is None:
            fig = Figure(figsize=(5.5, 3.5), layout="constrained")
            ax = fig.add_subplot()
        else:
            fig = ax.figure
        ax.scatter(self.candidates["n_features"], self.candidates["score"], s=10, color="0.7",
                   label="candidate sets")
        h = self.history
        ax.errorbar(h["n_features"], h["score"], yerr=h["score_sd"], marker="o", capsize=3,
                    color="#2f5f8a", label=f"{self.method} path")
        n_sel = len(self.selected)
        ax.axvline(n_sel, color="#8c5a3c", linestyle=":", label=f"selected ({n_sel})")
        ax.set_xlabel("number of features")
        ax.set_ylabel(f"spatial-CV {self.scoring}")
        ax.legend(fontsize="small")
        return fig


# --------------------------------------------------------------------------- scoring


def _check_inputs(X: Any, scoring: str, min_features: int, max_features: int | None) -> None:
    if not isinstance(X, pd.DataFrame):
        raise ParameterError(
            f"X must be a pandas DataFrame with one named column per feature; received {type(X).__name__}. "
            "Wrap it: pd.DataFrame(X, columns=feature_names)."
        )
    if scoring not in _SCORINGS:
        raise ParameterError(f"scoring must be one of {_SCORINGS}; received {scoring!r}.")
    n = X.shape[1]
    if not (isinstance(min_features, (int, np.integer)) and 1 <= min_features <= n):
        raise ParameterError(
            f"min_features must be an int in [1, {n}] (the number of columns); got {min_features!r}."
        )
    if max_features is not None and not (min_features <= max_features):
        raise ParameterError(
            f"max_features must be None or >= min_features ({min_features}); got {max_features!r}."
        )


def _scoring(scoring: str) -> Any:
    """A scorer; macro F1 counts a class never predicted in a fold as F1 = 0, without a warning."""
    if scoring == "f1_macro":
        return make_scorer(f1_score, average="macro", zero_division=0)
    return scoring


class _Scorer:
    """CV score of a feature subset on fixed folds."""

    def __init__(self, estimator: Any, X: pd.DataFrame, y: Any, groups: Any, cv: Any, scoring: str):
        self.estimator, self.X, self.scoring = estimator, X, _scoring(scoring)
        self.y = np.asarray(y)
        self.groups = None if groups is None else np.asarray(groups)
        # The splitter runs once, with the groups: every candidate sees the same folds.
        self.splits = list(cv.split(X, self.y, self.groups))

    def __call__(self, features: list[str]) -> tuple[float, float]:
        s = cross_val_score(clone(self.estimator), self.X[list(features)].to_numpy(), self.y,
                            groups=self.groups, cv=self.splits, scoring=self.scoring)
        return float(np.mean(s)), float(np.std(s))


def _row(step: int, feats: list[str], score: tuple[float, float], added: str = "", removed: str = "") -> dict:
    return {"step": step, "n_features": len(feats), "added": added, "removed": removed,
            "score": score[0], "score_sd": score[1], "features": ";".join(feats)}


def _candidates_frame(rows: list[dict]) -> pd.DataFrame:
    return pd.DataFrame(rows, columns=["step", "n_features", "features", "score", "score_sd"])


# --------------------------------------------------------------------------- forward


def _screen(features: list[str], score: _Scorer, max_pairs: int, cand: list[dict]) -> list[str]:
    """Features allowed into the starting pair.

    All features when the pairs number at most ``max_pairs``; otherwise the
    ``m`` best by single-feature CV score, with ``m`` the largest count whose
    pairs fit in ``max_pairs``.
    """
    n = len(features)
    if n * (n - 1) // 2 <= max_pairs:
        return list(features)
    singles = []
    for f in features:
        s = score([f])
        cand.append({"step": -1, "n_features": 1, "features": f, "score": s[0], "score_sd": s[1]})
        singles.append((s[0], f))
    m = int((1 + np.sqrt(1 + 8 * max_pairs)) // 2)
    ranked = [f for _, f in sorted(singles, key=lambda t: -t[0])]
    return [f for f in features if f in set(ranked[:m])]


def _best_of(
    sets: list[list[str]], score: _Scorer, step: int, cand: list[dict]
) -> tuple[list[str], tuple[float, float]]:
    """The highest-scoring feature set (ties: the first in the given order)."""
    best, best_s = None, (-np.inf, 0.0)
    for feats in sets:
        s = score(feats)
        cand.append({"step": step, "n_features": len(feats), "features": ";".join(feats),
                     "score": s[0], "score_sd": s[1]})
        if s[0] > best_s[0]:
            best, best_s = feats, s
    return best, best_s


def forward_feature_selection(
    estimator: Any,
    X: pd.DataFrame,
    y: Any,
    groups: Any,
    cv: Any,
    *,
    scoring: str = "accuracy",
    min_features: int = 2,
    max_features: int | None = None,
    tol: float = 0.0,
    max_pairs: int = 190,
    pool: int | None = None,
) -> SelectionResult:
    """Forward feature selection under spatial CV (Meyer et al. 2018).

    1. Score every pair of features; keep the best.
    2. Add, one at a time, the feature that raises the CV score most.
    3. Stop when the best addition gains no more than ``tol`` (once at least
       ``min_features`` are chosen), or at ``max_features``.

    Parameters
    ----------
    estimator : scikit-learn classifier
        Cloned for every fit (e.g. ``WetlandClassifier(n_estimators=30)``).
    X : pandas.DataFrame
        One named column per feature.
    y : array-like of shape (n_samples,)
    groups : array-like of shape (n_samples,) or None
        Plot ids, handed to the splitter and to ``cross_val_score``.
    cv : splitter
        E.g. :class:`~wetlandflow.validation.splitters.SpatialBlockKFold` with ``coords``
        aligned with ``X``.  Run once; all candidates use its folds.
    scoring : {"accuracy", "f1_macro"}
    min_features : int, default 2
        Grow to at least this many features even without a gain (>= 2: the
        search starts from a pair).
    max_features : int, optional
        Stop at this many features.
    tol : float, default 0.0
        Smallest gain in mean CV score that justifies a new feature.
    max_pairs : int, default 190
        Budget for step 1.  With more than ``max_pairs`` pairs (more than 20
        features at the default), step 1 is run only among the features with
        the best single-feature CV scores, as many as keep the pair count
        within budget (a screen; common practice, no source).
    pool : int, optional
        Search only among the ``pool`` features ranked highest by
        :func:`importance_ranking` (one fit on ``X``, ``y``): a cheap screen
        for many features, where every step would otherwise fit one model per
        remaining feature and fold (common practice, no source).  ``None``:
        all columns.

    Returns
    -------
    SelectionResult
    """
    _check_inputs(X, scoring, min_features, max_features)
    if X.shape[1] < 2 or min_features < 2:
        raise ParameterError(
            f"forward selection starts from a pair: X needs >= 2 columns and min_features >= 2; "
            f"got {X.shape[1]} column(s), min_features={min_features}."
        )
    if pool is not None:
        if not (isinstance(pool, (int, np.integer)) and pool >= 2):
            raise ParameterError(f"pool must be None or an int >= 2; got {pool!r}.")
        if pool < X.shape[1]:
            top = set(importance_ranking(estimator, X, y).index[:pool])
            X = X[[c for c in X.columns if c in top]]
    score = _Scorer(estimator, X, y, groups, cv, scoring)
    features, cand = list(X.columns), []
    pool = _screen(features, score, max_pairs, cand)
    chosen, best = _best_of([list(p) for p in itertools.combinations(pool, 2)], score, 0, cand)
    history = [_row(0, chosen, best, added=";".join(chosen))]
    cap = len(features) if max_features is None else min(max_features, len(features))
    while len(chosen) < cap:
        rest = [f for f in features if f not in chosen]
        trial, s = _best_of([[*chosen, f] for f in rest], score, len(history), cand)
        if s[0] <= best[0] + tol and len(chosen) >= min_features:
            break
        chosen, best = trial, s
        history.append(_row(len(history), chosen, best, added=trial[-1]))
    return SelectionResult(chosen, pd.DataFrame(history, columns=_HISTORY_COLUMNS), _candidates_frame(cand),
                           "forward", scoring, tuple(features))


def forward_selection_within_folds(
    estimator: Any, X: pd.DataFrame, y: Any, folds: Any, *, n_jobs: int = 1, **options: Any
) -> dict[int, SelectionResult]:
    """Forward selection run inside each training fold, for an honest after-selection score.

    For every fold ``k`` of ``folds`` the selection sees only the samples
    outside ``k`` and scores its candidates by leave-one-fold-out over the
    *other* folds (``PredefinedSplit`` on their fold ids), so neither the
    features nor the labels of fold ``k`` take part in choosing fold ``k``'s
    features.  A model fitted on fold ``k``'s training samples with its
    selected set and tested on fold ``k`` then scores the whole procedure
    (selection included), as nested CV does (Ambroise & McLachlan 2002).

    Parameters
    ----------
    estimator, X, y
        As in :func:`forward_feature_selection`.
    folds : array-like of int, shape (n_samples,)
        Test-fold id per sample (e.g. from
        :func:`~wetlandflow.validation.splitters.assign_folds`); at least 3 folds, so
        that each training set still has 2 folds to score candidates on.
    n_jobs : int, default 1
        Folds selected in parallel worker processes (joblib).  The result does
        not depend on it as long as the estimator's own thread count is fixed.
    **options
        Passed to :func:`forward_feature_selection` (``scoring``, ``tol``,
        ``max_features``, ``pool``, ...).

    Returns
    -------
    dict of int to SelectionResult
        One selection per fold id.
    """
    folds = np.asarray(folds)
    ids = np.unique(folds[folds >= 0])
    if ids.size < 3 or folds.shape[0] != len(X):
        raise ParameterError(
            f"folds must hold one fold id per row of X ({len(X)} rows) and at least 3 folds; got "
            f"{folds.shape[0]} ids and {ids.size} fold(s). Use more folds or forward_feature_selection."
        )
    from joblib import Parallel, delayed

    y = np.asarray(y)
    trains = [np.flatnonzero((folds != k) & (folds >= 0)) for k in ids]
    results = Parallel(n_jobs=n_jobs)(
        delayed(forward_feature_selection)(estimator, X.iloc[t], y[t], None, PredefinedSplit(folds[t]),
                                           **options)
        for t in trains
    )
    return {int(k): r for k, r in zip(ids, results, strict=True)}


def importance_ranking(estimator: Any, X: pd.DataFrame, y: Any) -> pd.Series:
    """Features ranked by the importances of one fit of ``estimator`` on ``X``, ``y`` (highest first).

    Returns
    -------
    pandas.Series
        Importance per feature name, sorted descending (ties keep column order).
    """
    fitted = clone(estimator).fit(X.to_numpy(np.float32), np.asarray(y))
    imp = pd.Series(_importances(fitted), index=list(X.columns), name="importance")
    return imp.sort_values(ascending=False, kind="stable")


# --------------------------------------------------------------------------- backward


def _importances(fitted: Any) -> np.ndarray:
    """Impurity/gain importances of a fitted model (ours wraps the library model in ``model_``)."""
    for obj in (fitted, getattr(fitted, "model_", None)):
        imp = getattr(obj, "feature_importances_", None)
        if imp is not None:
            return np.asarray(imp, dtype=float)
        coef = getattr(obj, "coef_", None)
        if coef is not None:
            return np.abs(np.atleast_2d(coef)).sum(axis=0)
    raise ModelError(
        f"{type(fitted).__name__} exposes no feature_importances_ or coef_ (nor does its model_); "
        "recursive_elimination needs a model that ranks its features, e.g. WetlandClassifier."
    )


def recursive_elimination(
    estimator: Any,
    X: pd.DataFrame,
    y: Any,
    groups: Any,
    cv: Any,
    *,
    scoring: str = "accuracy",
    min_features: int = 2,
    max_features: int | None = None,
    tol: float = 0.0,
) -> SelectionResult:
    """Backward elimination by model importance, CV score recorded at each size.

    At each step the model is fitted on all samples with the current features,
    the least important feature is dropped, and the spatial-CV score of the
    remaining set is recorded, down to ``min_features``.  The selected set is
    the smallest one whose score is within ``tol`` of the best score seen (so
    ``tol=0`` picks the best, fewer features on a tie).

    Parameters
    ----------
    estimator, X, y, groups, cv, scoring
        As in :func:`forward_feature_selection`.
    min_features : int, default 2
        Smallest set scored.
    max_features : int, optional
        Sets larger than this are scored but cannot be selected.
    tol : float, default 0.0

    Returns
    -------
    SelectionResult
    """
    _check_inputs(X, scoring, min_features, max_features)
    score = _Scorer(estimator, X, y, groups, cv, scoring)
    current, history = list(X.columns), []
    s = score(current)
    history.append(_row(0, current, s))
    while len(current) > min_features:
        fitted = clone(estimator).fit(X[current].to_numpy(), np.asarray(y))
        drop = current[int(np.argmin(_importances(fitted)))]
        current = [f for f in current if f != drop]
        history.append(_row(len(history), current, score(current), removed=drop))
    hist = pd.DataFrame(history, columns=_HISTORY_COLUMNS)
    allowed = hist if max_features is None else hist[hist["n_features"] <= max_features]
    good = allowed[allowed["score"] >= allowed["score"].max() - tol]
    pick = good.loc[good["n_features"].idxmin(), "features"].split(";")
    selected = [f for f in X.columns if f in set(pick)]
    cand = hist[["step", "n_features", "features", "score", "score_sd"]].copy()
    return SelectionResult(selected, hist, cand, "recursive_elimination", scoring, tuple(X.columns))


# --------------------------------------------------------------------------- output


def write_selection(result: SelectionResult, folder: str | Path) -> dict[str, Path]:
    """Write the selected set and the selection path into ``folder``.

    Files: ``selected_features.json`` (method, scoring, set, score),
    ``selected_features.txt`` (one feature name per line, in selection order;
    read it back with :func:`read_selected_features`) and
    ``selection_history.csv``.

    Returns
    -------
    dict of str to pathlib.Path
        ``{"selected": ..., "text": ..., "history": ...}``.
    """
    folder = Path(folder)
    doc = {"method": result.method, "scoring": result.scoring, "selected": list(result.selected),
           "n_selected": len(result.selected), "score": result.score, "pool": list(result.pool),
           "note": "score on the folds that chose the set (optimistic)"}
    return {"selected": write_json(doc, folder / "selected_features.json"),
            "text": write_selected_features(result.selected, folder / "selected_features.txt"),
            "history": write_table(result.history, folder / "selection_history.csv")}


def write_selected_features(features: list[str], path: str | Path) -> Path:
    """Feature names, one per line, nothing else (so any tool can read the file)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    with atomic_path(path) as tmp:
        tmp.write_text("".join(f"{f}\n" for f in features))
    return path


def read_selected_features(path: str | Path) -> list[str]:
    """Feature names from a ``selected_features.txt`` (blank lines and ``#`` comments skipped).

    Raises
    ------
    ModelError
        If the file lists no feature.
    """
    path = Path(path)
    names = [ln.strip() for ln in path.read_text().splitlines()]
    names = [n for n in names if n and not n.startswith("#")]
    if not names:
        raise ModelError(f"{path}: no feature names found; expected one feature name per line.")
    return names
