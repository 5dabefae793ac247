"""Are the class probabilities honest?  Reliability, Brier score, ECE, recalibration.

A probability map is only as useful as its probabilities are calibrated: of the
pixels given 0.8 marsh, about 80 % should be marsh.  This module measures that
on held-out (ideally spatially held-out) predictions and refits a monotone map
from raw to calibrated probabilities within spatial folds: either as a wrapped
estimator (:class:`CalibratedWetlandClassifier`) or, on probabilities already
predicted out of fold, as :class:`ProbabilityCalibrator` (used by
:mod:`wetlandflow.models.compare` inside each training fold).

Binning convention (all functions): ``n_bins`` equal-width bins on [0, 1],
closed on the right, ``B_m = ((m-1)/M, m/M]``, with 0 in the first bin, as in
Guo et al. (2017) and scikit-learn's ``calibration_curve(strategy="uniform")``.

References
----------
Brier, G. W. (1950). Verification of forecasts expressed in terms of
probability. Monthly Weather Review 78(1), 1-3.

Naeini, M. P., Cooper, G. F., Hauskrecht, M. (2015). Obtaining well calibrated
probabilities using Bayesian binning. Proceedings of the AAAI Conference on
Artificial Intelligence 29, 2901-2907.

Guo, C., Pleiss, G., Sun, Y., Weinberger, K. Q. (2017). On calibration of modern
neural networks. Proceedings of the 34th International Conference on Machine
Learning, PMLR 70, 1321-1330.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
from sklearn.base import BaseEstimator, ClassifierMixin, clone

from ..errors import ModelError, ParameterError
from .classifier import SchemePredictMixin, require_fitted

__all__ = [
    "CalibratedWetlandClassifier",
    "ProbabilityCalibrator",
    "brier_score",
    "expected_calibration_error",
    "plot_reliability",
    "plot_reliability_comparison",
    "reliability_table",
]

TOP_LABEL = "top_label"


# --------------------------------------------------------------------------- inputs


def _check(y_true: Any, proba: Any, classes: Any) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """Labels, an (n, k) probability array and the class list, checked against each other."""
    y = np.asarray(y_true).astype(str)
    p = np.asarray(proba, dtype=np.float64)
    cls = [str(c) for c in classes]
    if p.ndim != 2 or p.shape != (y.size, len(cls)):
        raise ParameterError(
            f"proba must have shape (n_samples, n_classes) = ({y.size}, {len(cls)}); received {p.shape}. "
            "Pass the columns in the order of `classes`."
        )
    unknown = sorted(set(y) - set(cls))
    if unknown:
        raise ParameterError(f"labels {unknown} are not in classes {cls}; add them or drop those samples.")
    if not np.isfinite(p).all() or (p < -1e-9).any() or (p > 1 + 1e-9).any():
        raise ParameterError("proba must hold finite probabilities in [0, 1]; mask NaN rows before scoring.")
    return y, p, cls


def _bin_index(p: np.ndarray, n_bins: int) -> np.ndarray:
    """Bin of each probability, bins ((m-1)/M, m/M] with 0 in the first."""
    if not (isinstance(n_bins, (int, np.integer)) and n_bins >= 1):
        raise ParameterError(f"n_bins must be an int >= 1; got {n_bins!r}.")
    edges = np.linspace(0.0, 1.0, n_bins + 1)
    return np.searchsorted(edges[1:-1], p, side="left")


def _binned(conf: np.ndarray, hit: np.ndarray, n_bins: int, target: str) -> pd.DataFrame:
    """Per-bin counts, mean predicted probability and observed frequency."""
    b = _bin_index(conf, n_bins)
    n = np.bincount(b, minlength=n_bins)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_p = np.bincount(b, weights=conf, minlength=n_bins) / n
        obs = np.bincount(b, weights=hit.astype(float), minlength=n_bins) / n
    edges = np.linspace(0.0, 1.0, n_bins + 1)
    return pd.DataFrame({"target": target, "bin": np.arange(n_bins), "lower": edges[:-1], "upper": edges[1:],
                         "n": n, "mean_predicted": mean_p, "observed_frequency": obs})


# --------------------------------------------------------------------------- measures


def reliability_table(y_true: Any, proba: Any, classes: Any, n_bins: int = 10) -> pd.DataFrame:
    """Reliability-diagram data, one-vs-rest per class and for the top label.

    Parameters
    ----------
    y_true : array-like of str, shape (n,)
    proba : array-like, shape (n, k)
        Columns in the order of ``classes``.
    classes : sequence of str
    n_bins : int, default 10

    Returns
    -------
    pandas.DataFrame
        Columns ``target, bin, lower, upper, n, mean_predicted,
        observed_frequency``.  ``target`` is a class name (predicted = that
        class's probability, observed = label is that class) or ``"top_label"``
        (predicted = the highest probability, observed = the arg-max class is
        right).  Empty bins are kept with ``n = 0`` and NaN means, so every
        target has ``n_bins`` rows.
    """
    y, p, cls = _check(y_true, proba, classes)
    parts = [_binned(p[:, j], y == c, n_bins, c) for j, c in enumerate(cls)]
    top = np.argmax(p, axis=1)
    parts.append(_binned(p.max(axis=1), np.asarray(cls)[top] == y, n_bins, TOP_LABEL))
    return pd.concat(parts, ignore_index=True)


def brier_score(y_true: Any, proba: Any, classes: Any) -> float:
    """Multi-class Brier score, Brier's (1950) original definition.

    ``BS = (1/N) sum_i sum_c (p_ic - o_ic)^2`` with ``o_ic = 1`` if sample ``i``
    is of class ``c``; 0 is perfect, 2 the worst.  For two classes it is twice
    the common binary score (``sklearn.metrics.brier_score_loss``).

    Returns
    -------
    float
    """
    y, p, cls = _check(y_true, proba, classes)
    onehot = (y[:, None] == np.asarray(cls)[None, :]).astype(float)
    return float(np.mean(np.sum((p - onehot) ** 2, axis=1)))


def expected_calibration_error(y_true: Any, proba: Any, classes: Any, n_bins: int = 15) -> float:
    """Top-label expected calibration error, Guo et al. (2017), their eq. (3).

    ``ECE = sum_m |B_m| / n * |acc(B_m) - conf(B_m)|`` over ``n_bins``
    equal-width confidence bins, with confidence the highest class probability
    and accuracy the share of arg-max predictions that are right.  (Naeini et
    al. 2015 introduced the measure; Guo et al.'s top-label, equal-width form
    with M = 15 is the one followed here.)

    Returns
    -------
    float
        In [0, 1]; 0 means confidence equals accuracy in every bin.
    """
    t = reliability_table(y_true, proba, classes, n_bins=n_bins)
    t = t[(t["target"] == TOP_LABEL) & (t["n"] > 0)]
    gap = (t["observed_frequency"] - t["mean_predicted"]).abs()
    return float((t["n"] * gap).sum() / t["n"].sum())


def plot_reliability(table: pd.DataFrame, targets: Any = None) -> Any:
    """Reliability diagram (left) and bin counts (right) from :func:`reliability_table`.

    Parameters
    ----------
    table : pandas.DataFrame
    targets : sequence of str, optional
        Targets to draw; default all.  Empty bins are not drawn.

    Returns
    -------
    matplotlib.figure.Figure
        Built without pyplot; nothing is shown.
    """
    from matplotlib.figure import Figure

    from .classifier import PALETTE

    fig = Figure(figsize=(9, 4), layout="constrained")
    ax, axn = fig.subplots(1, 2, width_ratios=[3, 2])
    ax.plot([0, 1], [0, 1], color="0.6", linestyle="--", label="perfect calibration")
    for name in targets if targets is not None else table["target"].unique():
        t = table[(table["target"] == name) & (table["n"] > 0)]
        colour = "black" if name == TOP_LABEL else PALETTE.get(name)
        ax.plot(t["mean_predicted"], t["observed_frequency"], marker="o", label=name, color=colour)
        axn.step(t["upper"], t["n"], where="pre", color=colour, label=name)
    ax.set(xlim=(0, 1), ylim=(0, 1), xlabel="mean predicted probability", ylabel="observed frequency",
           aspect="equal")
    axn.set(xlim=(0, 1), xlabel="predicted probability (bin upper edge)", ylabel="samples per bin",
            yscale="log")
    ax.legend(fontsize="small")
    return fig


def plot_reliability_comparison(
    tables: dict[str, pd.DataFrame],
    calibrated: dict[str, pd.DataFrame] | None = None,
    target: str = TOP_LABEL,
) -> Any:
    """One reliability curve per model on shared axes (e.g. every configuration of a comparison).

    Parameters
    ----------
    tables : dict of str to pandas.DataFrame
        Model name to its :func:`reliability_table`.
    calibrated : dict of str to pandas.DataFrame, optional
        The same models after recalibration: drawn in a second panel, one
        colour per model in both panels.
    target : str, default "top_label"
        The target drawn for every model (a class name or ``"top_label"``).

    Returns
    -------
    matplotlib.figure.Figure
        Built without pyplot; nothing is shown.
    """
    from matplotlib import colormaps
    from matplotlib.figure import Figure

    panels = {"raw": tables, **({"recalibrated": calibrated} if calibrated else {})}
    fig = Figure(figsize=(4.2 * len(panels) + 2.8, 4.6), layout="constrained")
    axes = fig.subplots(1, len(panels), squeeze=False)[0]
    names = list(dict.fromkeys([*tables, *(calibrated or {})]))
    cmap = colormaps["tab10" if len(names) <= 10 else "tab20"]
    colour = {n: cmap(i % cmap.N) for i, n in enumerate(names)}
    label = "confidence (highest probability)" if target == TOP_LABEL else f"predicted P({target})"
    for ax, (title, group) in zip(axes, panels.items(), strict=True):
        ax.plot([0, 1], [0, 1], color="0.6", linestyle="--", label="perfect calibration")
        for name, table in group.items():
            t = table[(table["target"] == target) & (table["n"] > 0)]
            ax.plot(t["mean_predicted"], t["observed_frequency"], marker="o", markersize=3,
                    color=colour[name], label=name)
        ax.set(xlim=(0, 1), ylim=(0, 1), xlabel=label, ylabel="observed frequency", aspect="equal",
               title=f"{title}, {target.replace('_', ' ')}")
    handles, labels = axes[0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside right center", fontsize="x-small")
    return fig


# --------------------------------------------------------------------------- recalibration


def _platt(f: np.ndarray, hit: np.ndarray) -> tuple[float, float]:
    """Platt's (1999) sigmoid fit: P = 1 / (1 + exp(A f + B)), with his smoothed targets.

    Targets ``(N+ + 1) / (N+ + 2)`` for positives and ``1 / (N- + 2)`` for
    negatives (Platt 1999, section 2.2) keep the fit finite on separable data;
    the cross-entropy is convex in (A, B) and minimised by L-BFGS-B.
    """
    from scipy.optimize import minimize
    from scipy.special import expit

    n_pos = float(hit.sum())
    n_neg = hit.size - n_pos
    t = np.where(hit, (n_pos + 1.0) / (n_pos + 2.0), 1.0 / (n_neg + 2.0))

    def loss(ab: np.ndarray) -> tuple[float, np.ndarray]:
        z = -(ab[0] * f + ab[1])  # logit of P
        g = expit(z) - t  # d loss / d z
        return float(np.sum(np.logaddexp(0.0, z) - t * z)), np.array([-(g * f).sum(), -g.sum()])

    start = np.array([0.0, np.log((n_neg + 1.0) / (n_pos + 1.0))])
    res = minimize(loss, start, jac=True, method="L-BFGS-B",
                   options={"gtol": 1e-8, "ftol": 64 * np.finfo(float).eps})
    return float(res.x[0]), float(res.x[1])


class _Sigmoid:
    def __init__(self, f: np.ndarray, hit: np.ndarray):
        self.a, self.b = _platt(f, hit)

    def predict(self, f: np.ndarray) -> np.ndarray:
        from scipy.special import expit

        return expit(-(self.a * f + self.b))


class _Isotonic:
    def __init__(self, f: np.ndarray, hit: np.ndarray):
        from sklearn.isotonic import IsotonicRegression

        self.model = IsotonicRegression(out_of_bounds="clip").fit(f, hit.astype(float))

    def predict(self, f: np.ndarray) -> np.ndarray:
        return self.model.predict(f)


class ProbabilityCalibrator:
    """A monotone map from raw to calibrated class probabilities, fitted on held-out predictions.

    One-vs-rest: for each class seen in the labels, an isotonic regression
    (Zadrozny & Elkan 2002) or Platt's (1999) sigmoid maps that class's raw
    probability to the frequency of the class; rows are then rescaled to sum
    to 1 (uniform where every map gives 0).  With exactly two classes seen,
    one map is fitted on the probability of the second class in sorted order
    and the first gets the complement.  This is the rule of scikit-learn's
    ``CalibratedClassifierCV`` (``ensemble=False``), applied to probabilities
    instead of to a model, so it can be fitted on out-of-fold predictions.

    Parameters
    ----------
    classes : sequence of str
        Scheme order of the probability columns (input and output).
    method : {"isotonic", "sigmoid"}, default "isotonic"

    Notes
    -----
    Fit it on predictions the model made for samples it was not trained on,
    from folds other than the ones it will be applied to; classes absent from
    the fitting labels keep probability 0.

    Examples
    --------
    >>> p = np.array([[0.9, 0.1], [0.8, 0.2], [0.3, 0.7], [0.6, 0.4]])
    >>> cal = ProbabilityCalibrator(["a", "b"]).fit(p, ["a", "a", "b", "b"])
    >>> cal.transform(p).sum(axis=1).round(6).tolist()
    [1.0, 1.0, 1.0, 1.0]
    """

    def __init__(self, classes: Any, method: str = "isotonic"):
        self.classes = classes
        self.method = method

    def fit(self, proba: Any, y: Any) -> ProbabilityCalibrator:
        """Fit the per-class maps on held-out probabilities ``proba`` and labels ``y``."""
        if self.method not in ("isotonic", "sigmoid"):
            raise ParameterError(
                f"The 'method' parameter of ProbabilityCalibrator must be 'isotonic' or 'sigmoid'; "
                f"got {self.method!r}."
            )
        y, p, cls = _check(y, proba, self.classes)
        seen = sorted(set(y))
        if len(seen) < 2:
            raise ModelError(f"calibration needs labels of at least two classes; got only {seen}.")
        kind = _Isotonic if self.method == "isotonic" else _Sigmoid
        targets = seen[1:] if len(seen) == 2 else seen
        self.maps_ = {c: kind(p[:, cls.index(c)], y == c) for c in targets}
        self.seen_ = seen
        return self

    def transform(self, proba: Any) -> np.ndarray:
        """Calibrated probabilities, columns in ``classes`` order, rows summing to 1."""
        if not hasattr(self, "maps_"):
            raise ModelError("this ProbabilityCalibrator is not fitted yet; call fit(proba, y) first.")
        cls = [str(c) for c in self.classes]
        p = np.asarray(proba, dtype=np.float64)
        if p.ndim != 2 or p.shape[1] != len(cls):
            raise ParameterError(f"proba must have {len(cls)} columns (one per class of {cls}); "
                                 f"got {p.shape}.")
        out = np.zeros_like(p)
        for c, m in self.maps_.items():
            out[:, cls.index(c)] = m.predict(p[:, cls.index(c)])
        if len(self.seen_) == 2:
            out[:, cls.index(self.seen_[0])] = 1.0 - out[:, cls.index(self.seen_[1])]
            return out
        total = out.sum(axis=1, keepdims=True)
        uniform = np.zeros_like(out)
        uniform[:, [cls.index(c) for c in self.seen_]] = 1.0 / len(self.seen_)
        return np.divide(out, total, out=uniform, where=total > 0)


class CalibratedWetlandClassifier(SchemePredictMixin, ClassifierMixin, BaseEstimator):
    """Isotonic or sigmoid recalibration fitted within spatial folds.

    For each ``(train, test)`` fold of ``cv`` (computed once in :meth:`fit`,
    with the groups) a clone of ``base`` is fitted on ``train`` and a calibrator
    on its ``test`` predictions; ``predict_proba`` averages the fold models
    (scikit-learn's ``CalibratedClassifierCV`` with ``ensemble=True`` and
    ``cv=`` the list of splits).  Calibrating on spatially held-out data
    matters: calibrating on random folds would learn the over-confidence of
    near-duplicate neighbours.

    Parameters
    ----------
    base : WetlandClassifier (or any classifier with a ``classes`` parameter)
        Its ``classes`` give the scheme order of ``predict_scheme_proba``.
    method : {"isotonic", "sigmoid"}, default "isotonic"
        Isotonic regression (Zadrozny & Elkan 2002) needs more held-out samples
        per class than the two-parameter sigmoid (Platt 1999).
    cv : splitter
        E.g. :class:`~wetlandflow.validation.splitters.SpatialBlockKFold` with ``coords``
        aligned with the ``X`` given to :meth:`fit`.

    Notes
    -----
    scikit-learn's calibrator indexes the classes present in ``y`` in sorted
    order.  The base is therefore refitted over exactly those classes, and the
    output columns are mapped by name to the scheme order (``scheme_``, the
    columns of :meth:`predict_scheme_proba`; classes absent from training get
    probability 0) and to the sorted ``classes_`` (the columns of
    :meth:`predict_proba`, scikit-learn's contract); :meth:`fit` checks that
    mapping.

    References
    ----------
    Platt, J. C. (1999). Probabilistic outputs for support vector machines and
    comparisons to regularized likelihood methods. In: Advances in Large Margin
    Classifiers, MIT Press, 61-74.

    Zadrozny, B., Elkan, C. (2002). Transforming classifier scores into accurate
    multiclass probability estimates. Proc. 8th ACM SIGKDD, 694-699.
    """

    def __init__(self, base: Any = None, method: str = "isotonic", cv: Any = None):
        self.base = base
        self.method = method
        self.cv = cv

    def _validate(self) -> None:
        if self.method not in ("isotonic", "sigmoid"):
            raise ParameterError(
                f"The 'method' parameter of CalibratedWetlandClassifier must be 'isotonic' or 'sigmoid'; "
                f"got {self.method!r}."
            )
        if self.base is None or "classes" not in self.base.get_params():
            raise ParameterError(
                "The 'base' parameter of CalibratedWetlandClassifier must be a classifier with a 'classes' "
                f"parameter (e.g. WetlandClassifier); got {self.base!r}."
            )
        if self.cv is None or not hasattr(self.cv, "split"):
            raise ParameterError(
                "The 'cv' parameter of CalibratedWetlandClassifier must be a splitter with "
                f"split(X, y, groups), e.g. SpatialBlockKFold(coords=...); got {self.cv!r}."
            )

    def fit(self, X: Any, y: Any, groups: Any = None) -> CalibratedWetlandClassifier:
        """Fit base models and calibrators on the spatial folds.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
        y : array-like of str
        groups : array-like, optional
            Plot ids, handed to ``cv.split``.

        Returns
        -------
        CalibratedWetlandClassifier
            ``self``.
        """
        from sklearn.calibration import CalibratedClassifierCV

        self._validate()
        X = np.asarray(X, dtype=np.float32)
        y = np.asarray(y).astype(str)
        scheme = tuple(self.base.get_params()["classes"])
        unknown = sorted(set(y) - set(scheme))
        if unknown:
            raise ModelError(f"labels {unknown} are not in the class scheme {list(scheme)}")
        present = tuple(sorted(set(y)))
        splits = list(self.cv.split(X, y, None if groups is None else np.asarray(groups)))
        base = clone(self.base).set_params(classes=present)
        calibrator = CalibratedClassifierCV(base, method=self.method, cv=splits, ensemble=True)
        self.calibrated_ = calibrator.fit(X, y)
        self.scheme_ = np.array(scheme)
        self.classes_ = np.unique(self.scheme_)
        self.column_of_ = self._column_map(scheme)
        self.n_features_in_ = X.shape[1]
        return self

    def _column_map(self, scheme: tuple[str, ...]) -> np.ndarray:
        """For each scheme class, its column in the calibrator's output (-1: absent from training)."""
        cal = [str(c) for c in self.calibrated_.classes_]
        if cal != sorted(cal) or not set(cal) <= set(scheme):
            raise ModelError(
                f"the calibrator's class order {cal} does not map onto the scheme {list(scheme)}; "
                "expected a sorted subset of the scheme classes."
            )
        return np.array([cal.index(c) if c in cal else -1 for c in scheme])

    def predict_scheme_proba(self, X: Any) -> np.ndarray:
        """Calibrated probabilities, columns in scheme order (``scheme_``), rows summing to 1."""
        require_fitted(self, "calibrated_")
        raw = self.calibrated_.predict_proba(np.asarray(X, dtype=np.float32))
        out = np.zeros((raw.shape[0], self.scheme_.size))
        have = self.column_of_ >= 0
        out[:, have] = raw[:, self.column_of_[have]]
        return out / out.sum(axis=1, keepdims=True)

