"""Nested spatial cross-validation: tuning inside spatial folds.

``cross_val_score(GridSearchCV(...), groups=g)`` hands neither the plot ids
nor the coordinates of the outer training subset to the inner splitter, so
the inner loop of a naive nested CV splits pixels at random and tunes for
leakage.  :func:`spatial_grid_search` runs the outer loop explicitly and gives
the inner splitter the subset's groups and coordinates
(:func:`subset_splitter`).
"""

from __future__ import annotations

import copy
from typing import Any, NamedTuple

import numpy as np
from numpy.typing import ArrayLike
from sklearn.base import clone
from sklearn.model_selection import GridSearchCV

__all__ = ["NestedCVResult", "spatial_grid_search", "subset_splitter"]


def subset_splitter(splitter: Any, idx: ArrayLike) -> Any:
    """Return a copy of ``splitter`` whose coordinates follow the rows ``idx``.

    Splitters that hold no coordinates (scikit-learn's own) are returned as
    copies unchanged.  Wrapped splitters (``base_splitter``) are subset too.
    """
    out = copy.copy(splitter)
    idx = np.asarray(idx)
    if getattr(out, "coords", None) is not None:
        out.coords = np.asarray(out.coords, dtype=float)[idx]
    if getattr(out, "base_splitter", None) is not None:
        out.base_splitter = subset_splitter(out.base_splitter, idx)
    return out


class NestedCVResult(NamedTuple):
    """Outer-loop scores, chosen parameters and out-of-fold predictions."""

    scores: np.ndarray
    best_params: list[dict]
    predictions: np.ndarray
    folds: np.ndarray


def _rows(X: Any, idx: np.ndarray) -> Any:
    return X.iloc[idx] if hasattr(X, "iloc") else np.asarray(X)[idx]


def spatial_grid_search(
    estimator: Any,
    param_grid: dict | list,
    X: Any,
    y: ArrayLike,
    groups: ArrayLike | None = None,
    *,
    outer: Any,
    inner: Any,
    scoring: Any = None,
    n_jobs: int | None = None,
) -> NestedCVResult:
    """Nested spatial CV: tune on inner spatial folds inside each outer fold.

    ``cross_val_score(GridSearchCV(...), groups=g)`` does not hand the groups,
    nor the subset coordinates, to the inner splitter.  This explicit outer
    loop fits ``GridSearchCV(cv=inner)`` on each outer training set with
    ``groups=groups[train]`` and an inner splitter whose coordinates follow
    that subset (:func:`subset_splitter`), then scores the refitted best
    model on the outer test fold.

    Returns
    -------
    NestedCVResult
        ``scores`` per outer fold, ``best_params`` per outer fold,
        ``predictions`` (out-of-fold ``predict`` output) and the outer ``folds``.
    """
    from sklearn.metrics import check_scoring

    y_arr = np.asarray(y)
    g = None if groups is None else np.asarray(groups)
    scorer = check_scoring(estimator, scoring=scoring)
    scores, params, preds = [], [], np.empty_like(y_arr)
    folds = np.full(y_arr.size, -1)
    for f, (train, test) in enumerate(outer.split(X, y_arr, g)):
        search = GridSearchCV(
            clone(estimator), param_grid, cv=subset_splitter(inner, train), scoring=scoring, n_jobs=n_jobs
        )
        search.fit(_rows(X, train), y_arr[train], groups=None if g is None else g[train])
        scores.append(scorer(search.best_estimator_, _rows(X, test), y_arr[test]))
        params.append(search.best_params_)
        preds[test] = search.best_estimator_.predict(_rows(X, test))
        folds[test] = f
    return NestedCVResult(np.asarray(scores), params, preds, folds)
