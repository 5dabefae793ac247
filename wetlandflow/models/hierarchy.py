"""Two-level classification: class groups first, then the classes inside each group.

Wetland classes that look alike (marsh, swamp, fen, bog) are often easier to
separate from each other once the model already knows a sample is a wetland.
:class:`HierarchicalClassifier` fits one :class:`~wetlandflow.models.classifier.WetlandClassifier`
over the top level (each parent group is one class, e.g. ``"wetland"``; a class
under no parent stays itself, e.g. ``"upland"``) and one per parent over that
parent's children, trained on that parent's samples only (a "local classifier
per parent node" in the terms of Silla & Freitas 2011).  Leaf probabilities are
combined by the definition of conditional probability,
``P(leaf) = P(parent) * P(leaf | parent)``.

References
----------
Silla, C. N., Freitas, A. A. (2011). A survey of hierarchical classification
across different application domains. Data Mining and Knowledge Discovery
22(1-2), 31-72.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
from sklearn.base import BaseEstimator, ClassifierMixin

from ..errors import ModelError
from .classifier import SchemePredictMixin, WetlandClassifier, _check_labels, require_fitted

__all__ = ["HierarchicalClassifier"]

_RESERVED = ("top", "leaf")


def _top_of(classes: tuple[str, ...], parents: dict[str, tuple[str, ...]]) -> dict[str, str]:
    """Map each leaf to its top-level class (its parent, or itself)."""
    parent_of = {c: p for p, cs in parents.items() for c in cs}
    return {c: parent_of.get(c, c) for c in classes}


def _check_tree(classes: tuple[str, ...], parents: dict[str, tuple[str, ...]]) -> None:
    """A two-level tree: every child is a known leaf, under one parent only."""
    seen: dict[str, str] = {}
    for p, children in parents.items():
        if p in _RESERVED or p in classes:
            raise ModelError(
                f"parent name {p!r} clashes with a leaf class or a reserved level name {_RESERVED}; "
                f"received parents={parents!r}. Rename the parent group (e.g. 'wetland')."
            )
        if len(children) == 0:
            raise ModelError(f"parent {p!r} has no children; give it at least one class of {list(classes)}.")
        for c in children:
            if c not in classes:
                raise ModelError(
                    f"child {c!r} of parent {p!r} is not in the class scheme {list(classes)}; "
                    "list only scheme classes as children."
                )
            if c in seen:
                raise ModelError(f"class {c!r} is under two parents ({seen[c]!r} and {p!r}); keep one.")
            seen[c] = p


def _normalise(p: np.ndarray) -> np.ndarray:
    """Rows rescaled to sum to 1 in float64 (the base model returns float32)."""
    p = np.asarray(p, dtype=np.float64)
    return p / p.sum(axis=1, keepdims=True)


class _Constant:
    """A 'classifier' for a parent with fewer than two children in the training data."""

    def __init__(self, proba: np.ndarray):
        self.proba = proba

    def predict_scheme_proba(self, X: np.ndarray) -> np.ndarray:
        return np.tile(self.proba, (X.shape[0], 1))


class HierarchicalClassifier(SchemePredictMixin, ClassifierMixin, BaseEstimator):
    """Leaf probabilities from a top-level model times per-parent child models.

    Parameters
    ----------
    classes : sequence of str
        Leaf classes in scheme order (``scheme_``); :meth:`predict_scheme_proba`
        columns follow it, :meth:`predict_proba` columns follow the sorted
        ``classes_`` as scikit-learn expects.
    parents : dict of str to tuple of str
        Parent group name to its child classes (``{"wetland": ("marsh", "swamp",
        "fen", "bog")}``).  Classes under no parent are top-level classes.
    base_params : dict, optional
        Keyword arguments for every :class:`~wetlandflow.models.classifier.WetlandClassifier`
        (``kind``, ``n_estimators``, ...); ``classes`` is set per level.
    gate_threshold : float, default 0.0
        The gate, in [0, 1).  The second level (a parent's child model) is
        evaluated only for rows where ``P(parent) > gate_threshold``.  Elsewhere
        the parent's probability is shared among its children in proportion to
        the children's training frequencies (their priors), so no child model
        is run for rows that are clearly not in the group.  ``0.0`` turns the
        gate off: every row with a non-zero parent probability goes through the
        child model, and a row with ``P(parent) == 0`` gets 0 for every child
        either way.  The gate is read at prediction time, so
        ``set_params(gate_threshold=...)`` on a fitted model changes only what
        ``predict_proba`` computes, not the fitted levels.

    Notes
    -----
    Error bound of the gate.  By the law of total probability the children of
    a parent share its probability, ``sum_c P(c) = P(parent)``, so on a gated
    row the exact probability of every child class is itself at most
    ``P(parent) <= gate_threshold``.  The gated estimate ``P(parent) *
    prior(c)`` lies in the same interval ``[0, P(parent)]``, so each child's
    absolute error is ``P(parent) * |prior(c) - P(c | parent)| <= P(parent) <=
    gate_threshold``.  Top-level probabilities and the sum over each group are
    exact on every row, and every row still sums to 1.

    Inside ``cross_val_predict`` use ``method="predict"`` (the default):
    scikit-learn integer-encodes the labels for ``method="predict_proba"``, and
    the integers are not the names the tree is built from.  For out-of-fold
    probabilities loop over ``cv.split(X, y, groups)`` and call
    ``predict_proba`` per fold.

    Attributes
    ----------
    classes_ : ndarray of str
        Leaf classes sorted (``numpy.unique``): the columns of :meth:`predict_proba`.
    scheme_ : ndarray of str
        Leaf classes, scheme order: the columns of :meth:`predict_scheme_proba`.
    top_classes_ : ndarray of str
        Top-level classes, in order of their first leaf in the scheme.
    top_model_ : WetlandClassifier
    parents_ : dict of str to tuple of str
        The validated tree.
    child_models_ : dict of str to WetlandClassifier (or a constant model)
    priors_ : dict of str to ndarray
        Training frequency of each child within its parent.
    level_rows_ : dict of str to int
        Training rows each level was fitted on: ``"top"`` (all rows) and one
        entry per parent (that parent's rows).

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> y = rng.choice(["upland", "marsh", "bog"], 300)
    >>> X = np.c_[(y != "upland") * 2.0 + (y == "bog") * 1.0 + rng.normal(0, 0.3, 300)]
    >>> m = HierarchicalClassifier(("upland", "marsh", "bog"), {"wetland": ("marsh", "bog")},
    ...                            base_params={"n_estimators": 20, "max_depth": 2}).fit(X, y)
    >>> bool(np.allclose(m.predict_proba(X).sum(axis=1), 1.0))
    True
    """

    def __init__(
        self,
        classes: Any = ("upland", "open_water", "marsh", "swamp", "fen", "bog"),
        parents: Any = None,
        base_params: dict | None = None,
        gate_threshold: float = 0.0,
    ):
        self.classes = classes
        self.parents = parents
        self.base_params = base_params
        self.gate_threshold = gate_threshold

    # ------------------------------------------------------------------ fit

    def _base(self, classes: tuple[str, ...]) -> WetlandClassifier:
        params = {k: v for k, v in (self.base_params or {}).items() if k != "classes"}
        return WetlandClassifier(classes=classes, **params)

    def _validate(self) -> tuple[tuple[str, ...], dict[str, tuple[str, ...]]]:
        classes = tuple(self.classes)
        parents = {str(p): tuple(cs) for p, cs in (self.parents or {}).items()}
        _check_tree(classes, parents)
        self._gate()
        return classes, parents

    def _gate(self) -> float:
        """The validated gate (checked at fit and again at predict: it may be set on a fitted model)."""
        t = self.gate_threshold
        if not (np.isscalar(t) and not isinstance(t, (bool, str)) and 0.0 <= float(t) < 1.0):
            raise ModelError(
                "The 'gate_threshold' parameter of HierarchicalClassifier must be a float in [0, 1); "
                f"got {t!r}. Use 0.0 for no gate, or a small probability such as 0.02."
            )
        return float(t)

    def fit(self, X: Any, y: Any, sample_weight: Any = None) -> HierarchicalClassifier:
        """Fit the top-level model and one child model per parent.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
        y : array-like of str, shape (n_samples,)
            Leaf labels from ``classes``.
        sample_weight : array-like, optional
            Passed to every level (subset to each parent's rows).

        Returns
        -------
        HierarchicalClassifier
            ``self``.
        """
        classes, parents = self._validate()
        X = np.asarray(X, dtype=np.float32)
        y = _check_labels(y).astype(str)
        unknown = sorted(set(y) - set(classes))
        if unknown:
            raise ModelError(f"labels {unknown} are not in the class scheme {list(classes)}; the tree is "
                             "built from class names, so pass the labels as names (not integer codes).")
        w = None if sample_weight is None else np.asarray(sample_weight, dtype=float)
        top_of = _top_of(classes, parents)
        self.scheme_ = np.array(classes)
        self.classes_ = np.unique(self.scheme_)
        self.parents_ = parents
        self.top_classes_ = np.array(list(dict.fromkeys(top_of[c] for c in classes)))
        y_top = np.array([top_of[c] for c in y])
        self.top_model_ = self._base(tuple(self.top_classes_)).fit(X, y_top, sample_weight=w)
        self.child_models_, self.priors_ = {}, {}
        for p, children in parents.items():
            rows = y_top == p
            self._fit_child(p, children, X[rows], y[rows], None if w is None else w[rows])
        self.level_rows_ = {"top": int(len(y)), **{p: int((y_top == p).sum()) for p in parents}}
        self.n_features_in_ = X.shape[1]
        return self

    def _fit_child(self, parent: str, children: tuple[str, ...], X: np.ndarray, y: np.ndarray,
                   w: np.ndarray | None) -> None:
        counts = np.array([(y == c).sum() for c in children], dtype=float)
        # A parent absent from training gets uniform priors (nothing else is known about it).
        prior = counts / counts.sum() if counts.sum() > 0 else np.full(len(children), 1.0 / len(children))
        self.priors_[parent] = prior
        if (counts > 0).sum() < 2:
            # One child (or none) seen: its conditional probability is its prior; no model to fit.
            self.child_models_[parent] = _Constant(prior)
        else:
            self.child_models_[parent] = self._base(children).fit(X, y, sample_weight=w)

    # ------------------------------------------------------------------ predict

    def _levels(self, X: Any) -> tuple[np.ndarray, dict[str, np.ndarray], np.ndarray]:
        """Top probabilities, per-parent conditional probabilities and leaf probabilities."""
        require_fitted(self, "top_model_")
        gate = self._gate()
        Xa = np.asarray(X, dtype=np.float32)
        top = _normalise(self.top_model_.predict_scheme_proba(Xa))
        leaf = np.zeros((Xa.shape[0], len(self.scheme_)))
        conditional = {}
        col = {c: i for i, c in enumerate(self.scheme_)}
        for j, t in enumerate(self.top_classes_):
            if t not in self.child_models_:
                leaf[:, col[t]] = top[:, j]
                continue
            cond = self._conditional(t, Xa, top[:, j], gate)
            conditional[t] = cond
            for k, c in enumerate(self.parents_[t]):
                leaf[:, col[c]] = top[:, j] * cond[:, k]
        return top, conditional, leaf

    def _conditional(self, parent: str, X: np.ndarray, p_parent: np.ndarray, gate: float) -> np.ndarray:
        """P(child | parent): the child model where the gate is open, the priors elsewhere."""
        cond = np.tile(self.priors_[parent], (X.shape[0], 1))
        # Only the open rows are copied out and sent to the child model: that is the whole saving.
        open_rows = p_parent > gate
        if open_rows.any():
            cond[open_rows] = _normalise(self.child_models_[parent].predict_scheme_proba(X[open_rows]))
        return cond

    def predict_scheme_proba(self, X: Any) -> np.ndarray:
        """Leaf probabilities, columns in scheme order (``scheme_``), rows summing to 1 (float64)."""
        return self._levels(X)[2]

    def predict_proba_levels(self, X: Any) -> dict[str, pd.DataFrame]:
        """Probabilities at every level of the tree.

        Returns
        -------
        dict of str to pandas.DataFrame
            ``"top"``: P(top-level class); one entry per parent name: P(child |
            parent) (the priors on gated rows); ``"leaf"``: the joint leaf
            probabilities of :meth:`predict_scheme_proba`.  Indexes follow ``X``'s
            index when ``X`` is a DataFrame.
        """
        index = X.index if isinstance(X, pd.DataFrame) else None
        top, conditional, leaf = self._levels(X)
        out = {"top": pd.DataFrame(top, columns=list(self.top_classes_), index=index)}
        for p, cond in conditional.items():
            out[p] = pd.DataFrame(cond, columns=list(self.parents_[p]), index=index)
        out["leaf"] = pd.DataFrame(leaf, columns=list(self.scheme_), index=index)
        return out

    def present_leaves(self) -> list[str]:
        """Leaf classes the fitted model can give a non-zero probability, in scheme order.

        A leaf is absent when its top-level class was absent from the top level's training data,
        or, under a parent, when the child model never saw it (or its prior is 0).
        """
        require_fitted(self, "top_model_")
        top = set(self.top_model_.present_.tolist())
        parent_of = {c: p for p, cs in self.parents_.items() for c in cs}
        out = []
        for c in self.scheme_:
            p = parent_of.get(str(c))
            if p is None:
                ok = c in top
            else:
                child = self.child_models_[p]
                ok = p in top and (c in set(child.present_.tolist()) if hasattr(child, "present_")
                                   else self.priors_[p][list(self.parents_[p]).index(c)] > 0)
            if ok:
                out.append(str(c))
        return out
