"""Classifiers with a class scheme that travels with them, and the feature check against a fitted model.

:class:`WetlandClassifier` is a scikit-learn estimator over XGBoost (multi-class
softprob, ``hist``) or scikit-learn's random forest.  It keeps scikit-learn's
classifier contract (``classes_`` sorted, ``predict_proba`` columns in that
order); the class scheme's own order, the order of a run's bands and tables, is
``scheme_`` and comes from :meth:`WetlandClassifier.predict_scheme_proba` or
:func:`scheme_proba` whatever subset of classes the training data held.  A class
map (code, name, colour) travels with the fitted model.
"""

from __future__ import annotations

import hashlib
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from sklearn.base import BaseEstimator, ClassifierMixin
from sklearn.exceptions import NotFittedError
from sklearn.utils.class_weight import compute_sample_weight
from sklearn.utils.validation import _check_sample_weight

from ..errors import ModelError

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


SENTINELS = (-9999.0, -32768.0, 65535.0, -3.4028235e38)


def check_no_sentinels(X: np.ndarray, features: Sequence[str]) -> None:
    """Missing values must be NaN; a leftover sentinel (-9999, -32768, 65535, -FLT_MAX) is an error.

    Raises
    ------
    ModelError
        Naming the features that hold a sentinel and the value found.
    """
    for s in SENTINELS:
        hit = np.any(X == np.float32(s), axis=0)
        if hit.any():
            names = [f for f, h in zip(features, hit, strict=True) if h]
            raise ModelError(f"feature(s) {names} contain the no-data sentinel {s:g}; convert it to NaN on "
                             "reading (set the layer's nodata in the project file)")


def _column_names(X: Any, n: int) -> list[str]:
    return [str(c) for c in X.columns] if hasattr(X, "columns") else [f"column {i}" for i in range(n)]


def canonical_order(samples: pd.DataFrame) -> pd.DataFrame:
    """Samples sorted by plot id, then y, then x (stable): the row order of the deterministic mode.

    Histogram-based boosting sums gradients in row order, so the same samples
    in another order can give a model that differs in the last float bits.
    Sorting first makes the model a function of the sample *set*.

    Parameters
    ----------
    samples : pandas.DataFrame
        With ``plot_id``, ``x`` and ``y`` columns.

    Returns
    -------
    pandas.DataFrame
        A new frame with a fresh 0..n-1 index.
    """
    missing = [c for c in ("plot_id", "x", "y") if c not in samples.columns]
    if missing:
        raise ModelError(f"canonical_order needs columns plot_id, x and y; {missing} missing from "
                         f"{list(samples.columns)[:8]}...")
    keys = samples[["plot_id", "y", "x"]].astype({"plot_id": str})
    order = np.lexsort((keys["x"].to_numpy(), keys["y"].to_numpy(), keys["plot_id"].to_numpy()))
    return samples.iloc[order].reset_index(drop=True)


class SchemePredictMixin:
    """``predict_proba`` and ``predict`` from ``predict_scheme_proba`` (columns in scheme order).

    For a classifier with ``scheme_`` (the class scheme's order) and ``classes_`` (sorted, scikit-learn's
    order) that implements ``predict_scheme_proba``: the flat, calibrated and hierarchical classifiers.
    """

    def predict_proba(self, X: Any) -> np.ndarray:
        """Class probabilities, one column per class of ``classes_`` (sorted), as scikit-learn expects.

        Returns
        -------
        numpy.ndarray, shape (n_samples, n_classes)
        """
        return self.predict_scheme_proba(X)[:, _positions(self.scheme_, self.classes_)]

    def predict(self, X: Any) -> np.ndarray:
        """The most probable class per row (ties go to the first in scheme order)."""
        p = self.predict_scheme_proba(X)  # first: it raises NotFittedError on an unfitted model
        return self.scheme_[np.argmax(p, axis=1)]


class WetlandClassifier(SchemePredictMixin, ClassifierMixin, BaseEstimator):
    """Per-class probabilities over XGBoost or a random forest, with the class scheme kept beside them.

    The estimator follows scikit-learn's classifier contract: ``classes_`` is
    sorted as :func:`numpy.unique` sorts the labels, and the columns of
    :meth:`predict_proba` follow ``classes_``, so scikit-learn's probability
    scorers (``neg_log_loss``, ``roc_auc_ovr``), ``cross_val_predict(...,
    method="predict_proba")`` and calibration read them correctly.  The class
    scheme's own order (the order of output bands and tables) is ``scheme_``;
    :meth:`predict_scheme_proba` (or :func:`scheme_proba` for any classifier)
    gives the columns in that order.

    Parameters
    ----------
    classes : sequence of labels, optional
        The class scheme, in order (``scheme_``).  Classes of the scheme absent
        from the training labels get probability 0 in their own column.  ``None``
        (default): the scheme is the sorted labels seen in ``fit``, as for any
        scikit-learn classifier; labels may then be integers or strings.
    kind : {"xgboost", "random_forest"}
    n_estimators, max_depth, learning_rate : model size and step (learning_rate ignored by the forest)
    class_weighting : bool
        Weight samples inversely to class frequency (rare wetland classes count as much as upland).
    n_threads : int
        Fixed thread count (with ``random_state``, the same inputs give the same model).
    random_state : int

    Attributes
    ----------
    classes_ : ndarray
        ``numpy.unique`` of the scheme: the column order of :meth:`predict_proba`.
    scheme_ : ndarray
        The class scheme in its own order: the column order of :meth:`predict_scheme_proba`.
    present_ : ndarray
        Scheme classes seen in training, scheme order (the internal model's classes).
    n_features_in_ : int
    feature_names_in_ : ndarray of str
        Only when ``X`` in ``fit`` was a DataFrame.

    Examples
    --------
    >>> X = np.array([[0.0], [0.1], [1.0], [1.1]])
    >>> m = WetlandClassifier(classes=("upland", "fen"), n_estimators=5).fit(X, ["upland"] * 2 + ["fen"] * 2)
    >>> m.classes_.tolist(), m.scheme_.tolist()
    (['fen', 'upland'], ['upland', 'fen'])
    """

    def __init__(self, classes=None, kind="xgboost", n_estimators=300, max_depth=6,
                 learning_rate=0.1, class_weighting=True, n_threads=2, random_state=0):
        self.classes = classes
        self.kind = kind
        self.n_estimators = n_estimators
        self.max_depth = max_depth
        self.learning_rate = learning_rate
        self.class_weighting = class_weighting
        self.n_threads = n_threads
        self.random_state = random_state

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.input_tags.allow_nan = True  # missing values are routed natively by both model kinds
        return tags

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

    def fit(self, X: Any, y: Any, sample_weight: Any = None) -> WetlandClassifier:
        """Fit on samples; NaN is missing (routed natively), a no-data sentinel is an error.

        Parameters
        ----------
        X : array-like or pandas.DataFrame of shape (n_samples, n_features)
            A DataFrame's column names are kept (``feature_names_in_``) and
            later DataFrames are aligned to them by name.
        y : array-like of str or int
            Labels from ``classes`` (any labels when ``classes`` is None).
        sample_weight : array-like, optional
            Multiplied with the class weights.

        Returns
        -------
        WetlandClassifier
            ``self``.
        """
        has_names = hasattr(X, "columns")
        names = [str(c) for c in X.columns] if has_names else None
        y = _check_labels(y)
        X = _check_matrix(X, type(self).__name__)
        if y.shape[0] != X.shape[0]:
            raise ModelError(f"X has {X.shape[0]} rows but y has {y.shape[0]} labels; give one label per "
                             "sample.")
        names = names if names is not None else _column_names(X, X.shape[1])
        check_no_sentinels(X, names)
        scheme = _scheme_labels(self.classes, y)
        self.scheme_ = scheme
        self.classes_ = np.unique(scheme)
        seen = set(y.tolist())
        self.present_ = scheme[[c in seen for c in scheme.tolist()]]
        if len(self.present_) < 2:
            raise ModelError(f"{type(self).__name__} needs at least 2 classes in the training labels; got "
                             f"only {self.present_.tolist()} in {len(y)} samples. Add samples of another "
                             "class.")
        code = {c: i for i, c in enumerate(self.present_.tolist())}
        yi = np.array([code[c] for c in y.tolist()])
        w = compute_sample_weight("balanced", yi) if self.class_weighting else None
        if sample_weight is not None:
            sw = _check_sample_weight(sample_weight, X)
            w = sw * (w if w is not None else 1.0)
        self.model_ = self._make(len(self.present_))
        with openmp_threads(self.n_threads):
            self.model_.fit(X, yi, sample_weight=w)
        self.n_features_in_ = X.shape[1]
        # As in scikit-learn: names are learned only from a table that has them.
        if has_names:
            self.feature_names_in_ = np.array(names, dtype=object)
        elif hasattr(self, "feature_names_in_"):
            del self.feature_names_in_
        # predict_proba's columns: each sorted class's position in the scheme
        self._sorted_columns_ = np.array([scheme.tolist().index(c) for c in self.classes_.tolist()])
        return self

    def _present_proba(self, X: np.ndarray) -> np.ndarray:
        if self.kind == "xgboost":
            p = self.model_.get_booster().inplace_predict(X)
            p = np.asarray(p).reshape(X.shape[0], -1)
        else:
            p = self.model_.predict_proba(X)  # scikit-learn >= 1.4 forests route NaN natively
        return p

    def _matrix(self, X: Any) -> np.ndarray:
        """Features as float32, aligned by name when both sides carry names."""
        require_fitted(self, "model_")
        names = getattr(self, "feature_names_in_", None)
        if hasattr(X, "columns") and names is not None:
            # names were learned as strings (a frame with integer column labels has them too)
            X = align_features(X.set_axis([str(c) for c in X.columns], axis=1), list(names))
        Xa = _check_matrix(X, type(self).__name__)
        if Xa.shape[1] != self.n_features_in_:
            raise ModelError(f"X has {Xa.shape[1]} features, but {type(self).__name__} is expecting "
                             f"{self.n_features_in_} features as input: expected {self.n_features_in_} "
                             f"features, got an array of shape {Xa.shape}; pass the features the model was "
                             "trained on (see align_features)")
        check_no_sentinels(Xa, list(names) if names is not None else _column_names(Xa, Xa.shape[1]))
        return Xa

    def predict_scheme_proba(self, X: Any) -> np.ndarray:
        """Class probabilities, one column per scheme class in scheme order (``scheme_``; absent classes 0).

        The order of the output bands and tables of a run.

        Returns
        -------
        numpy.ndarray of float32, shape (n_samples, n_classes)
        """
        X = self._matrix(X)
        p = self._present_proba(X)
        if len(self.present_) == len(self.scheme_):
            return p.astype(np.float32)
        out = np.zeros((X.shape[0], len(self.scheme_)), dtype=np.float32)
        out[:, _positions(self.scheme_, self.present_)] = p
        return out

    def predict_frame(self, X: Any) -> pd.DataFrame:
        """Scheme-order probabilities as a DataFrame, columns named by class (index follows ``X``)."""
        index = X.index if isinstance(X, pd.DataFrame) else None
        return pd.DataFrame(self.predict_scheme_proba(X), columns=list(self.scheme_), index=index)



class NotFittedModelError(ModelError, NotFittedError):
    """A model was asked to predict before ``fit`` (scikit-learn's ``NotFittedError`` too)."""


def require_fitted(model: Any, attribute: str) -> None:
    """Raise :class:`NotFittedModelError` unless ``model`` has the fitted ``attribute``."""
    if not hasattr(model, attribute):
        name = type(model).__name__
        raise NotFittedModelError(f"this {name} is not fitted yet (it has no {attribute}); call fit(X, y) "
                                  f"first, or load a fitted model with load_bundle.")


class FeatureTypeError(ModelError, TypeError):
    """Features of a type that is not a number (a dict, a string, a sparse matrix without support)."""


def _positions(order: np.ndarray, labels: np.ndarray) -> np.ndarray:
    """For each label, its position in ``order``."""
    where = {c: i for i, c in enumerate(np.asarray(order).tolist())}
    return np.array([where[c] for c in np.asarray(labels).tolist()], dtype=np.int64)


def _check_matrix(X: Any, owner: str) -> np.ndarray:
    """A 2-D float32 matrix, checked like scikit-learn (NaN allowed; inf, complex, sparse, empty refused)."""
    from sklearn.utils.validation import check_array

    try:
        return check_array(X, dtype=np.float32, ensure_all_finite="allow-nan", estimator=owner)
    except (TypeError, ValueError) as exc:
        kind = FeatureTypeError if isinstance(exc, TypeError) else ModelError
        raise kind(f"{owner}: the features are not a usable matrix: {exc}. Pass a 2-D table of "
                         "numbers (one row per sample, one column per feature; NaN marks a missing value)."
                         ) from exc


def _check_labels(y: Any) -> np.ndarray:
    """1-D class labels (strings or integers; continuous targets refused), one per row of X."""
    from sklearn.utils.multiclass import check_classification_targets
    from sklearn.utils.validation import column_or_1d

    if y is None:
        raise ModelError("fit requires y to be passed, but the target y is None; pass one class label per "
                         "sample.")
    y = column_or_1d(y, warn=True)
    check_classification_targets(y)
    return y.astype(str) if y.dtype.kind in "OUS" else y


def _scheme_labels(classes: Any, y: np.ndarray) -> np.ndarray:
    """The scheme as an array of the labels' kind; every label must be in it."""
    if classes is None:
        return np.unique(y)
    scheme = np.asarray(list(classes))
    if scheme.dtype.kind in "OUS":
        scheme = scheme.astype(str)
    if len(set(scheme.tolist())) != scheme.size:
        raise ModelError(f"the class scheme {scheme.tolist()} names a class twice; list each class once.")
    unknown = sorted(set(y.tolist()) - set(scheme.tolist()), key=str)
    if unknown:
        encoded = y.dtype.kind in "iu" and scheme.dtype.kind == "U"
        hint = (" Integer labels against a scheme of names usually come from scikit-learn encoding the "
                "labels (cross_val_predict with method='predict_proba'); use WetlandClassifier(classes=None) "
                "there, or compute out-of-fold probabilities fold by fold." if encoded else "")
        raise ModelError(f"labels {unknown} are not in the class scheme {scheme.tolist()}; add them to "
                         "the scheme ([classes] names in the project file) or correct the labels." + hint)
    return scheme


def scheme_proba(model: Any, X: Any, scheme: Sequence[Any] | None = None) -> np.ndarray:
    """Probabilities of any fitted classifier with columns in a class scheme's order, mapped by name.

    Parameters
    ----------
    model : fitted classifier
        With ``predict_proba`` and ``classes_`` (scikit-learn contract); a
        wetlandflow classifier also has ``scheme_``.
    X : array-like
    scheme : sequence, optional
        The column order wanted; default the model's ``scheme_`` (else ``classes_``).
        A scheme class the model does not know gets probability 0.

    Returns
    -------
    numpy.ndarray, shape (n_samples, len(scheme))
    """
    own = getattr(model, "scheme_", None)
    if scheme is None or (own is not None and list(scheme) == own.tolist()):
        if hasattr(model, "predict_scheme_proba"):
            return model.predict_scheme_proba(X)
        scheme = own if own is not None else model.classes_
    p = np.asarray(model.predict_proba(X))
    names = [c.item() if isinstance(c, np.generic) else c for c in scheme]
    missing = [c for c in np.asarray(model.classes_).tolist() if c not in names]
    if missing:
        raise ModelError(f"the model predicts classes {missing} that are not in the scheme {names}; pass the "
                         "scheme the model was trained with.")
    out = np.zeros((p.shape[0], len(names)), dtype=p.dtype)
    out[:, _positions(np.asarray(names, dtype=object), model.classes_)] = p
    return out


def openmp_threads(n: int):
    """A context in which OpenMP runs ``n`` threads, whatever ``OMP_NUM_THREADS`` says.

    XGBoost caps its ``nthread`` at OpenMP's thread limit, and a histogram summed over another number of
    threads gives another model (measured: a 30-round model fitted with ``n_threads=2`` under
    ``OMP_NUM_THREADS=1`` equals the one-thread model, not the two-thread one).  ``OMP_NUM_THREADS=1`` is
    common in batch jobs and is set by ``dask.distributed`` in the process that starts a cluster, and in
    every process started from it; so the fixed ``n_threads`` of the deterministic mode is applied here.
    """
    from threadpoolctl import threadpool_limits

    return threadpool_limits(limits=int(n), user_api="openmp")


def data_hash(samples: pd.DataFrame, features: list[str]) -> str:
    """SHA-256 of the training table (labels, groups, coordinates and features, in order)."""
    cols = ["plot_id", "class", "x", "y", *features]
    h = hashlib.sha256(pd.util.hash_pandas_object(samples[cols], index=False).values.tobytes())
    return h.hexdigest()


# --------------------------------------------------------------------------- feature alignment


class FeatureAlignmentWarning(UserWarning):
    """Features the model does not use were found next to the ones it does, and are ignored."""


_ON_EXTRA = ("warn", "ignore", "raise")


@dataclass(frozen=True)
class FeatureCheck:
    """How a table's or cube's features relate to a model's.

    Attributes
    ----------
    expected : tuple of str
        The model's features, in its order.
    missing : tuple of str
        Expected but absent (prediction is impossible).
    ignored : tuple of str
        Present but not used by the model.
    reordered : bool
        The shared features come in another order than the model's.
    """

    expected: tuple[str, ...]
    missing: tuple[str, ...]
    ignored: tuple[str, ...]
    reordered: bool

    @property
    def note(self) -> str:
        """One line for a log or a manifest ('' when the features match exactly)."""
        parts = []
        if self.missing:
            parts.append(f"missing: {', '.join(self.missing)}")
        if self.reordered:
            parts.append("columns reordered by name to the model's order")
        if self.ignored:
            parts.append(f"ignored (not used by the model): {', '.join(self.ignored)}")
        return "; ".join(parts)


def _expected_features(bundle_meta: Any) -> list[str]:
    """The feature list of a sidecar dict, a fitted classifier or a plain list of names."""
    if isinstance(bundle_meta, Mapping):
        if "features" not in bundle_meta:
            raise ModelError(f"bundle metadata has no 'features' entry (keys: {sorted(bundle_meta)}); pass "
                             "the dict returned by load_bundle or read from model/bundle.json")
        feats = bundle_meta["features"]
    elif hasattr(bundle_meta, "feature_names_in_"):
        feats = bundle_meta.feature_names_in_
    elif isinstance(bundle_meta, Sequence) and not isinstance(bundle_meta, str):
        feats = bundle_meta
    else:
        raise ModelError("bundle_meta must be the bundle sidecar dict, a fitted classifier with feature "
                         f"names, or a list of feature names; got {type(bundle_meta).__name__}")
    return [str(f) for f in feats]


def _available(X: Any) -> list[str]:
    import xarray as xr

    if isinstance(X, xr.Dataset):
        return [str(v) for v in X.data_vars]
    if isinstance(X, pd.DataFrame):
        cols = [str(c) for c in X.columns]
        dup = sorted({c for c in cols if cols.count(c) > 1})
        if dup:
            raise ModelError(f"the table has duplicate feature columns {dup}; drop the copies before "
                             "predicting")
        return cols
    raise ModelError(f"align_features needs a pandas DataFrame (one column per feature) or an xarray Dataset "
                     f"(one variable per feature); got {type(X).__name__}. A bare array carries no names, so "
                     "its order cannot be checked: wrap it as pd.DataFrame(X, columns=names).")


def check_features(X: Any, bundle_meta: Any) -> FeatureCheck:
    """Compare the features of a table or cube with a model's, by name (nothing is changed).

    Parameters
    ----------
    X : pandas.DataFrame or xarray.Dataset
    bundle_meta : dict, WetlandClassifier or sequence of str
        The sidecar returned by :func:`load_bundle`, a classifier fitted on a
        DataFrame, or the feature names in model order.

    Returns
    -------
    FeatureCheck
    """
    expected = _expected_features(bundle_meta)
    have = _available(X)
    present = set(have)
    shared = [f for f in have if f in set(expected)]
    return FeatureCheck(tuple(expected), tuple(f for f in expected if f not in present),
                        tuple(f for f in have if f not in set(expected)), shared != expected)


def align_features(X: Any, bundle_meta: Any, *, on_extra: str = "warn") -> Any:
    """Bring a table or cube to a model's features: select and order them by name.

    * a feature the model needs is absent: :class:`~wetlandflow.errors.ModelError`
      naming the missing features and the two ways out;
    * the features come in another order: reordered to the model's order;
    * features the model does not use: dropped, with a
      :class:`FeatureAlignmentWarning` (``on_extra="warn"``), silently
      (``"ignore"``) or refused (``"raise"``).

    Parameters
    ----------
    X : pandas.DataFrame or xarray.Dataset
        Samples (one column per feature) or a feature cube (one variable per feature).
    bundle_meta : dict, WetlandClassifier or sequence of str
        See :func:`check_features`.
    on_extra : {"warn", "ignore", "raise"}, default "warn"

    Returns
    -------
    pandas.DataFrame or xarray.Dataset
        Same type as ``X``, exactly the model's features in the model's order
        (a Dataset stays lazy).

    Examples
    --------
    >>> X = pd.DataFrame({"b": [1.0], "a": [2.0], "c": [3.0]})
    >>> list(align_features(X, ["a", "b"], on_extra="ignore").columns)
    ['a', 'b']
    """
    if on_extra not in _ON_EXTRA:
        raise ModelError(f"on_extra must be one of {_ON_EXTRA}; got {on_extra!r}")
    chk = check_features(X, bundle_meta)
    if chk.missing:
        n_have = len(chk.expected) - len(chk.missing) + len(chk.ignored)
        raise ModelError(
            f"the data lack {len(chk.missing)} feature(s) the model was trained on: {list(chk.missing)} "
            f"(the model uses {len(chk.expected)} features; the data hold {n_have}). "
            "Rebuild the feature cube with the feature selection the model was trained with (the run's "
            "project file, [features] select), or retrain the model on the features available."
        )
    if chk.ignored and on_extra == "raise":
        raise ModelError(f"the data hold feature(s) the model does not use: {list(chk.ignored)}; drop them, "
                         "or call align_features with on_extra='warn' or 'ignore'")
    if chk.ignored and on_extra == "warn":
        warnings.warn(f"{len(chk.ignored)} feature(s) not used by the model are ignored: {list(chk.ignored)}",
                      FeatureAlignmentWarning, stacklevel=2)
    return X[list(chk.expected)]
