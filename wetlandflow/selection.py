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
(Ambroise & McLachlan 2002); report an independent or nested estimate as the
map accuracy.

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
from sklearn.model_selection import cross_val_score

from .errors import ModelError, ParameterError
from .io import write_json, write_table

__all__ = ["SelectionResult", "forward_feature_selection", "recursive_elimination", "write_selection"]

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
    """

    selected: list[str]
    history: pd.DataFrame
    candidates: pd.DataFrame = field(repr=False)
    method: str
    scoring: str

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


class _Scorer:
    """CV score of a feature subset on fixed folds."""

    def __init__(self, estimator: Any, X: pd.DataFrame, y: Any, groups: Any, cv: Any, scoring: str):
        self.estimator, self.X, self.scoring = estimator, X, scoring
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
        E.g. :class:`~wetlandflow.validation.SpatialBlockKFold` with ``coords``
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
                           "forward", scoring)


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
    return SelectionResult(selected, hist, cand, "recursive_elimination", scoring)


# --------------------------------------------------------------------------- output


def write_selection(result: SelectionResult, folder: str | Path) -> dict[str, Path]:
    """Write ``selected_features.json`` and ``selection_history.csv`` into ``folder``.

    Returns
    -------
    dict of str to pathlib.Path
        ``{"selected": ..., "history": ...}``.
    """
    folder = Path(folder)
    doc = {"method": result.method, "scoring": result.scoring, "selected": list(result.selected),
           "n_selected": len(result.selected),
           "score": float(result.history.loc[result.history["features"] == ";".join(result.selected),
                                             "score"].max())}
    return {"selected": write_json(doc, folder / "selected_features.json"),
            "history": write_table(result.history, folder / "selection_history.csv")}
