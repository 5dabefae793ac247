"""Suspect training labels: plots whose label the out-of-fold predictions of several learners reject.

Photo-interpreted and field plots carry label errors.  Brodley & Friedl (1999) filter them with a set of
learning algorithms of different bias: each is trained on the other folds of an m-fold cross-validation
and classifies the held-out instances; an instance is *suspect* when every filter misclassifies it
(consensus filter, conservative: it keeps good data at the cost of missing some bad) or when more than
half do (majority filter).  Here the instances are plots, not pixels: a filter's class for a plot is the
argmax of its mean probability over the plot's pixels, and the folds are the run's spatial folds, so that
no filter sees the plot (or its neighbours, in a blocked design) while judging it.

The filters are the run's own classifier (its out-of-fold probabilities are reused, not recomputed),
k-nearest neighbours and linear discriminant analysis on standardised features: a tree ensemble, an
instance-based and a linear learner, the same three kinds of bias as the paper's decision tree,
nearest-neighbour and linear-machine filters.  Suspects are listed and mapped, never dropped silently.

References
----------
Brodley, C. E., Friedl, M. A. (1999). Identifying mislabeled training data. Journal of Artificial
Intelligence Research 11, 131-167. arXiv 1106.0219
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd
from sklearn.base import clone

from ..errors import ParameterError

__all__ = ["RULES", "default_filters", "label_filter"]

RULES = ("consensus", "majority")
SOURCE = ("Brodley & Friedl (1999), Identifying mislabeled training data, Journal of Artificial Intelligence "
          "Research 11, 131-167, arXiv 1106.0219")


def default_filters() -> dict[str, Any]:
    """k-NN (k = 5, common practice, no source) and LDA, each after median imputation and standardisation."""
    from sklearn.discriminant_analysis import LinearDiscriminantAnalysis
    from sklearn.impute import SimpleImputer
    from sklearn.neighbors import KNeighborsClassifier
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    def prep():
        return [SimpleImputer(strategy="median", keep_empty_features=True), StandardScaler()]

    return {"knn": make_pipeline(*prep(), KNeighborsClassifier(n_neighbors=5)),
            "lda": make_pipeline(*prep(), LinearDiscriminantAnalysis())}


def _oof(estimator: Any, X: np.ndarray, y: np.ndarray, folds: np.ndarray, classes: list[str]) -> np.ndarray:
    """Out-of-fold probabilities of ``estimator`` in ``classes`` order (0 for a class a fold lacks)."""
    out = np.zeros((len(y), len(classes)))
    for f in np.unique(folds):
        test = folds == f
        train = ~test
        if len(np.unique(y[train])) < 2:
            continue
        est = clone(estimator)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # collinear features in LDA, ties in k-NN: not the user's concern
            est.fit(X[train], y[train])
            p = est.predict_proba(X[test])
        cols = [classes.index(str(c)) for c in est.classes_]
        out[np.ix_(np.flatnonzero(test), cols)] = p
    return out


def label_filter(X: Any, y: Sequence[Any], plots: Sequence[Any], folds: Sequence[Any], classes: Sequence[Any],
                 *, filters: Mapping[str, Any] | None = None,
                 precomputed: Mapping[str, np.ndarray] | None = None,
                 rule: str = "consensus") -> pd.DataFrame:
    """Flag plots whose label the filters reject (Brodley & Friedl 1999), one row per plot.

    Parameters
    ----------
    X : array (n_pixels, n_features)
    y, plots, folds : arrays (n_pixels,)
        Label, plot id and cross-validation fold of each pixel; a plot must lie in one fold.
    classes : sequence of str
        Column order of the probabilities.
    filters : mapping name -> unfitted scikit-learn classifier, optional
        Default :func:`default_filters`.
    precomputed : mapping name -> array (n_pixels, n_classes), optional
        Out-of-fold probabilities already computed over the same folds (the run's model).
    rule : "consensus" or "majority"

    Returns
    -------
    pandas.DataFrame
        ``plot_id, label, n_pixels, fold``, per filter ``<name>_class``, then per filter ``<name>_p_label``
        (its mean probability of the label), then ``min_p_label``, ``n_reject`` (filters rejecting the label), ``suspect`` (bool) and
        ``rule``; suspects first, then by ``min_p_label``.
    """
    if rule not in RULES:
        raise ParameterError(f"rule must be one of {RULES}, got {rule!r}")
    X = np.asarray(X, dtype=np.float64)
    y = np.asarray(y).astype(str)
    plots = np.asarray(plots)
    folds = np.asarray(folds)
    classes = [str(c) for c in classes]
    probs = {k: np.asarray(v, dtype=np.float64) for k, v in (precomputed or {}).items()}
    for name, est in (default_filters() if filters is None else filters).items():
        probs[name] = _oof(est, X, y, folds, classes)
    if not probs:
        raise ParameterError("no filter: give filters or precomputed probabilities")
    plot_codes, inverse = np.unique(plots, return_inverse=True)
    n = np.bincount(inverse)
    first = np.zeros(len(plot_codes), dtype=np.int64)
    first[inverse[::-1]] = np.arange(len(y))[::-1]  # each plot's first pixel
    label = y[first]
    lab_idx = np.array([classes.index(c) for c in label])
    table = pd.DataFrame({"plot_id": plot_codes, "label": label, "n_pixels": n, "fold": folds[first]})
    rejects = np.zeros(len(plot_codes), dtype=np.int64)
    p_label = []
    for name, p in probs.items():
        mean = np.zeros((len(plot_codes), len(classes)))
        np.add.at(mean, inverse, p)
        mean /= n[:, None]
        table[f"{name}_class"] = np.array(classes)[np.argmax(mean, axis=1)]
        table[f"{name}_p_label"] = mean[np.arange(len(plot_codes)), lab_idx]
        p_label.append(table[f"{name}_p_label"].to_numpy())
        rejects += table[f"{name}_class"].to_numpy() != label
    k = len(probs)
    table["min_p_label"] = np.min(p_label, axis=0)
    table["n_reject"] = rejects
    table["suspect"] = rejects == k if rule == "consensus" else rejects > k / 2
    table["rule"] = f"{rule} of {k}: {', '.join(probs)}"
    base = ["plot_id", "label", "n_pixels", "fold"]
    per = [f"{n}_class" for n in probs] + [f"{n}_p_label" for n in probs]
    table = table[base + per + [c for c in table.columns if c not in base + per]]
    return table.sort_values(["suspect", "min_p_label"], ascending=[False, True]).reset_index(drop=True)
