"""Sample weights for plot-labelled training data: class balance and a per-plot cap.

Pixels sampled from polygons are not independent observations: a large plot
contributes hundreds of near-identical pixels and a small one a handful, so
an unweighted model learns mostly from the few biggest polygons of each
class.  :func:`sample_weights` fixes two things at once:

* **class totals**: with ``balance_classes=True`` every class carries the same
  total weight; otherwise each class keeps the total it has in the samples
  (its pixel count), so only the redistribution inside the class changes;
* **plot cap**: inside each class no plot carries more than ``max_plot_share``
  of the class's total weight.  Plots below the cap keep equal per-pixel
  weights; plots above it are cut down to the cap and their pixels share it
  equally ("water filling": the least change that meets the cap).

What weighting does to predicted class priors
---------------------------------------------
A probabilistic classifier fitted with weights estimates class probabilities
for a training population in which class ``c`` has prior
``pi_w(c) = (total weight of c) / (total weight)`` (:func:`weighted_priors`),
not the prior of the landscape.  By Bayes' theorem the two posteriors differ
by the ratio of priors,
``p_w(c | x) = p(c | x) * pi_w(c) / pi(c) / sum_k [p(k | x) * pi_w(k) / pi(k)]``,
so balanced weights push probabilities towards rare classes: rare wetland
classes are found more often (higher producer's accuracy) at the cost of more
false alarms, and the map's pixel counts overstate rare classes.  Neither the
mapped shares nor the mean predicted probabilities are area estimates.  Class
areas and their confidence intervals come from the error-adjusted estimators
of an independent probability sample (:mod:`wetlandflow.accuracy.estimators`; Olofsson
et al. 2014).  :func:`adjust_priors` moves probabilities to other priors when
they are known, e.g. for a calibrated probability of a class at a site.

References
----------
King, G., Zeng, L. (2001). Logistic regression in rare events data.
Political Analysis 9(2), 137-163 (the "balanced" weights n / (K n_c), as
in scikit-learn's ``compute_sample_weight``; citation not verified in the original).

Saerens, M., Latinne, P., Decaestecker, C. (2002). Adjusting the outputs of a
classifier to new a priori probabilities: a simple procedure. Neural
Computation 14(1), 21-41 (citation not verified in the original).

Olofsson, P., Foody, G. M., Herold, M., Stehman, S. V., Woodcock, C. E.,
Wulder, M. A. (2014). Good practices for estimating area and assessing
accuracy of land change. Remote Sensing of Environment 148, 42-57.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike

from ..errors import ParameterError, SamplesError

__all__ = ["PlotCapWarning", "adjust_priors", "sample_weights", "weight_summary", "weighted_priors"]

_POLICIES = ("raise", "warn", "ignore")


class PlotCapWarning(UserWarning):
    """A class has too few plots for the plot cap, so its plots get equal weight instead."""


def _labels_and_plots(y: ArrayLike, plots: ArrayLike | None) -> tuple[np.ndarray, np.ndarray]:
    """Class labels and plot ids as 1-D arrays of equal length; one plot per sample if ``plots`` is None."""
    y_arr = np.asarray(y)
    if y_arr.ndim != 1:
        raise SamplesError(f"y must be one class label per sample (1-D); received shape {y_arr.shape}.")
    if plots is None:
        return y_arr, np.arange(y_arr.size)
    p_arr = np.asarray(plots)
    if p_arr.shape != y_arr.shape:
        raise SamplesError(f"plots must hold one plot id per sample ({y_arr.size}); received shape "
                           f"{p_arr.shape}. Pass samples['plot_id'] aligned with samples['class'].")
    return y_arr, p_arr


def _as_weights(weights: ArrayLike, n: int) -> np.ndarray:
    w = np.asarray(weights, dtype=float)
    if w.shape != (n,) or not (np.isfinite(w).all() and (w >= 0).all()):
        raise SamplesError(f"weights must be one finite value >= 0 per sample ({n}); received shape {w.shape}"
                           f"{'' if w.shape != (n,) else ' with negative or non-finite values'}.")
    return w


def _check_one_class_per_plot(y: np.ndarray, plots: np.ndarray) -> None:
    n_labels = pd.Series(y).groupby(plots, sort=False).nunique()
    bad = n_labels[n_labels > 1].index.tolist()
    if bad:
        raise SamplesError(f"plot(s) {bad[:10]} carry more than one class label; a plot is one labelled "
                           "unit. Give each plot a single label, or split it into plots with their own ids.")


def _check_share(max_plot_share: float | None) -> None:
    if max_plot_share is None:
        return
    ok = np.isscalar(max_plot_share) and np.isfinite(max_plot_share) and 0 < max_plot_share <= 1
    if not ok:
        raise ParameterError(f"The 'max_plot_share' parameter of sample_weights must be a share in (0, 1] "
                             f"or None (no cap); got {max_plot_share!r}.")


def _capped_totals(sizes: np.ndarray, share: float) -> np.ndarray:
    """Water filling: totals ``min(size, t)`` with ``t = share * sum(min(size, t))``.

    ``sizes`` are the pixel counts of one class's plots and ``share * len(sizes) > 1``.
    The root ``t`` of the concave, piecewise-linear ``share * sum(min(size, t)) - t``
    lies in the segment where the ``j`` largest plots are capped; it is found by
    trying every ``j`` at once.
    """
    m = sizes.size
    a = np.sort(sizes.astype(float))
    j = np.arange(m)  # number of capped plots, from the largest
    uncapped_sum = np.cumsum(a)[m - 1 - j]
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(share * j < 1, share * uncapped_sum / (1 - share * j), np.inf)
    below = a[m - 1 - j] <= t * (1 + 1e-12)
    above = np.concatenate([[True], t[1:] <= a[m - j[1:]] * (1 + 1e-12)])
    hit = np.flatnonzero(below & above)
    return np.minimum(sizes, t[hit[0]])


def _plot_totals(sizes: np.ndarray, share: float | None, cls: object, on_infeasible: str) -> np.ndarray:
    """Total weight per plot of one class before scaling to the class total."""
    m = sizes.size
    if share is None:
        return sizes.astype(float)
    if abs(share * m - 1) <= 1e-12:  # the cap is met only by equal plots
        return np.ones(m)
    if share * m < 1:
        name = cls.item() if isinstance(cls, np.generic) else cls
        message = (f"class {name!r} has {m} plot(s), too few for max_plot_share={share} (needs at least "
                   f"{int(np.ceil(1 / share - 1e-9))}); each of its plots gets an equal share 1/{m} instead. "
                   "Collect more plots of this class, merge it with a similar class, or raise "
                   "max_plot_share.")
        if on_infeasible == "raise":
            raise SamplesError(message)
        if on_infeasible == "warn":
            warnings.warn(message, PlotCapWarning, stacklevel=4)
        return np.ones(m)
    return _capped_totals(sizes, share)


def sample_weights(
    y: ArrayLike,
    plots: ArrayLike | None,
    *,
    balance_classes: bool = True,
    max_plot_share: float | None = 0.1,
    on_infeasible: str = "warn",
) -> np.ndarray:
    """Per-sample weights that balance classes and cap the weight of any one plot.

    Parameters
    ----------
    y : array-like of shape (n,)
        Class label per sample.
    plots : array-like of shape (n,) or None
        Plot id per sample (the grouping unit); ``None`` treats every sample as
        its own plot.  A plot must carry one class label.
    balance_classes : bool, default True
        If True every class carries total weight ``n / K`` (``K`` classes
        present); if False each class keeps total weight ``n_c``, its number
        of samples, so class priors stay those of the samples.
    max_plot_share : float in (0, 1] or None, default 0.1
        Largest share of its class's total weight that one plot may carry;
        ``None`` disables the cap.  The default lets no plot count for more
        than a tenth of its class (common practice, no source).
    on_infeasible : {"warn", "raise", "ignore"}, default "warn"
        What to do when a class has fewer than ``1 / max_plot_share`` plots, so
        that the cap cannot be met: its plots then get equal totals (``1/m``
        each, the most even split possible) and a :class:`PlotCapWarning` or a
        :class:`~wetlandflow.errors.SamplesError` says so.

    Returns
    -------
    numpy.ndarray of float64, shape (n,)
        Positive weights summing to ``n`` (mean 1, so that weight-based
        settings such as XGBoost's ``min_child_weight`` keep their scale).
        Pixels of one plot share equal weights; the result is a pure function
        of the inputs (no randomness).

    Notes
    -----
    Inside class ``c`` with plot sizes ``a_p`` the plot totals are
    ``W_p = min(a_p, t_c)``, with ``t_c`` the solution of
    ``t_c = s * sum_p min(a_p, t_c)`` for ``s = max_plot_share``: plots below
    the cap keep their pixel count as weight and capped plots carry exactly
    the share ``s``.  The totals are then scaled to the class total and split
    equally among each plot's pixels.  With ``max_plot_share=None`` and
    ``balance_classes=True`` the weights equal scikit-learn's
    ``compute_sample_weight("balanced", y)``, ``n / (K n_c)``.

    Weighting changes the class priors the model learns (module notes): use
    the probability-sample estimators of :mod:`wetlandflow.accuracy.estimators`, not
    the map's pixel counts, for class areas.  :class:`~wetlandflow.models.classifier.WetlandClassifier`
    with ``class_weighting=True`` multiplies any ``sample_weight`` by balanced
    class weights again, which unbalances the totals set here; fit it with
    ``class_weighting=False`` when passing these weights.

    Examples
    --------
    >>> y = ["bog"] * 6 + ["fen"] * 2
    >>> plots = ["a", "a", "a", "a", "b", "c", "d", "e"]
    >>> w = sample_weights(y, plots, max_plot_share=0.5)
    >>> float(w.sum()), float(w[:6].sum()), float(w[:4].sum())
    (8.0, 4.0, 2.0)
    """
    y_arr, p_arr = _labels_and_plots(y, plots)
    _check_share(max_plot_share)
    if on_infeasible not in _POLICIES:
        raise ParameterError(f"The 'on_infeasible' parameter of sample_weights must be one of {_POLICIES}; "
                             f"got {on_infeasible!r}.")
    n = y_arr.size
    if n == 0:
        return np.zeros(0)
    _check_one_class_per_plot(y_arr, p_arr)
    classes, cls_idx = np.unique(y_arr, return_inverse=True)
    plot_codes, plot_idx = np.unique(p_arr, return_inverse=True)
    sizes = np.bincount(plot_idx, minlength=plot_codes.size)
    plot_class = np.zeros(plot_codes.size, dtype=int)
    plot_class[plot_idx] = cls_idx
    plot_total = np.zeros(plot_codes.size)
    for c, name in enumerate(classes):
        members = np.flatnonzero(plot_class == c)
        totals = _plot_totals(sizes[members], max_plot_share, name, on_infeasible)
        class_total = n / classes.size if balance_classes else sizes[members].sum()
        plot_total[members] = totals * (class_total / totals.sum())
    return plot_total[plot_idx] / sizes[plot_idx]


def weighted_priors(y: ArrayLike, weights: ArrayLike | None = None) -> pd.Series:
    """Class priors of the (weighted) training population: total weight per class over total weight.

    These are the priors a probabilistic model fitted with ``weights``
    implicitly assumes (see the module notes); with ``weights=None`` they are
    the class shares of the samples.

    Returns
    -------
    pandas.Series
        Indexed by class (sorted), summing to 1.
    """
    y_arr = np.asarray(y)
    w = np.ones(y_arr.size) if weights is None else _as_weights(weights, y_arr.size)
    totals = pd.Series(w).groupby(y_arr).sum()
    return (totals / totals.sum()).rename("prior").rename_axis("class")


def adjust_priors(
    proba: ArrayLike, classes: ArrayLike, trained: Mapping[str, float], target: Mapping[str, float]
) -> np.ndarray:
    """Move class probabilities from the training priors to other priors (Bayes' theorem).

    ``p'(c | x) = p(c | x) * target(c) / trained(c)``, renormalised over the
    classes (Saerens et al. 2002).  Use it when a probability for known
    landscape priors is wanted; class areas still come from the
    probability-sample estimators.

    Parameters
    ----------
    proba : array-like of shape (..., K)
        Probabilities with the classes on the last axis, in the order ``classes``.
    classes : array-like of K str
        Class names of the last axis.
    trained, target : mapping of class name to prior
        Priors the model was fitted under (e.g. :func:`weighted_priors`) and
        the priors wanted; each must give a positive value for every class.

    Returns
    -------
    numpy.ndarray
        Same shape as ``proba``; rows sum to 1.
    """
    p = np.asarray(proba, dtype=float)
    names = [str(c) for c in np.asarray(classes)]
    if p.shape[-1] != len(names):
        raise ParameterError(f"proba has {p.shape[-1]} classes on its last axis but {len(names)} class names "
                             "were given; pass the names in the column order of proba.")
    for label, priors in (("trained", trained), ("target", target)):
        bad = [c for c in names if not float(priors.get(c, 0.0)) > 0]
        if bad:
            raise ParameterError(f"The {label!r} priors must be positive for every class; missing or not "
                                 f"positive for {bad}. Expected a mapping over {names}.")
    ratio = np.array([float(target[c]) / float(trained[c]) for c in names])
    shifted = p * ratio
    return shifted / shifted.sum(axis=-1, keepdims=True)


def weight_summary(y: ArrayLike, plots: ArrayLike | None, weights: ArrayLike) -> pd.DataFrame:
    """Per class: samples, plots, weight share, the largest plot's share and the effective number of plots.

    The effective number of plots is Kish's ``(sum W_p)^2 / sum W_p^2`` over
    plot totals ``W_p`` (Kish 1965, Survey Sampling; not verified in the original): it equals
    the plot count when plots weigh the same and drops towards 1 when one
    plot dominates.

    Returns
    -------
    pandas.DataFrame
        Columns ``class``, ``samples``, ``plots``, ``weight_share``,
        ``max_plot_share``, ``effective_plots``.
    """
    y_arr, p_arr = _labels_and_plots(y, plots)
    w = _as_weights(weights, y_arr.size)
    per_plot = pd.DataFrame({"class": y_arr, "plot": p_arr, "w": w}).groupby(["class", "plot"])["w"].agg(
        ["sum", "size"])
    g = per_plot.groupby(level="class")
    out = pd.DataFrame({
        "samples": g["size"].sum(),
        "plots": g.size(),
        "weight_share": g["sum"].sum() / w.sum(),
        "max_plot_share": g["sum"].max() / g["sum"].sum(),
        "effective_plots": g["sum"].sum() ** 2 / g["sum"].apply(lambda s: float((s**2).sum())),
    })
    return out.reset_index()
