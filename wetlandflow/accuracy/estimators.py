"""Error matrices, accuracy measures and error-adjusted (stratified) area estimates.

Conventions
-----------
* An error matrix is a square :class:`pandas.DataFrame` of **counts** with rows = map (predicted)
  classes and columns = reference classes, both in the same class order (index name ``"map"``,
  columns name ``"reference"``).
* Area estimation follows the stratified estimator of Olofsson et al. (2013, 2014) with the map classes
  as strata (the usual design).  Strata that differ from the map classes (Stehman 2014) are not
  handled here.
* Every standard error comes from one engine: each accuracy or area measure is a ratio of two
  (stratified) means of unit-level indicators, and its variance is the Taylor-linearised ratio
  variance of Cochran (1977, ch. 5-6), with the finite population correction ignored.  With the map
  classes as strata this engine reproduces, term by term, the Olofsson et al. (2014) formulas for
  area proportions, user's, producer's and overall accuracy.
* ``*_ci`` columns are **half-widths**: the interval is ``value +/- ci`` (normal approximation, as in
  Olofsson et al. 2014).  Intervals are not truncated at 0 or 1; a lower area bound below zero says
  the sample is too small for that class.

References
----------
Cochran, W. G. (1977). *Sampling Techniques*, 3rd ed. Wiley.
Olofsson, P., Foody, G. M., Stehman, S. V., Woodcock, C. E. (2013). Making better use of accuracy data
in land change studies: Estimating accuracy and area and quantifying uncertainty using stratified
estimation. *Remote Sensing of Environment* 129, 122-131.
Olofsson, P., Foody, G. M., Herold, M., Stehman, S. V., Woodcock, C. E., Wulder, M. A. (2014). Good
practices for estimating area and assessing accuracy of land change. *Remote Sensing of Environment*
148, 42-57.
Pontius, R. G., Millones, M. (2011). Death to Kappa: birth of quantity disagreement and allocation
disagreement for accuracy assessment. *International Journal of Remote Sensing* 32(15).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
from scipy.stats import norm

from ..errors import OutputError, ValidationDesignError
from ..inputs.io import write_table

if TYPE_CHECKING:
    from matplotlib.figure import Figure

__all__ = [
    "KAPPA_NOTE",
    "AreaAccuracyResult",
    "Estimate",
    "accuracy_measures",
    "collapse_matrix",
    "disagreement",
    "error_matrix",
    "plot_areas",
    "plot_error_matrix",
    "proportion_interval",
    "simple_random_estimates",
    "stratified_estimates",
    "write_area_table",
]

KAPPA_NOTE = (
    "Kappa is reported only on request. Good practice discourages it: its baseline of random "
    "agreement is not a useful reference for a map, and as a single ratio it hides whether the errors "
    "come from the quantity or the allocation of classes (Pontius & Millones 2011, Death to Kappa, "
    "IJRS 32(15)). Olofsson et al. (2014, RSE 148) recommend against it and ask for the error matrix "
    "in area proportions, overall, user's and producer's accuracy, and error-adjusted areas instead."
)

SRS_NOTE = (
    "Standard errors assume a simple random sample of the counts in the matrix (each sample unit drawn "
    "with equal probability). For a stratified sample use stratified_estimates, which weights each "
    "stratum by its mapped area."
)

_POSTSTRATIFIED_NOTE = (
    "Simple random sample analysed with the stratified estimator, using the map classes as post-strata "
    "(Olofsson et al. 2013: the stratified estimator applies to simple random and systematic designs, "
    "where it is a post-stratified estimator). Sample sizes per map class are random, so every map class "
    "needs at least 2 sample units."
)

_SYSTEMATIC_NOTE = (
    "Systematic sample analysed as if it were a simple random sample (post-stratified by map class). "
    "No unbiased variance estimator exists for a single systematic sample; the simple-random formula "
    "is usually conservative (overstates the variance) on spatially autocorrelated maps (Cochran 1977, "
    "ch. 8; not verified in the original)."
)


@dataclass(frozen=True, slots=True)
class Estimate:
    """A point estimate with its standard error and confidence-interval half-width.

    Parameters
    ----------
    value, se : float
        Estimate and its standard error.
    ci : float
        Half-width of the confidence interval (``value +/- ci``).
    """

    value: float
    se: float
    ci: float

    @property
    def low(self) -> float:
        """Lower end of the confidence interval."""
        return self.value - self.ci

    @property
    def high(self) -> float:
        """Upper end of the confidence interval."""
        return self.value + self.ci


@dataclass(frozen=True, eq=False)
class AreaAccuracyResult:
    """Error-adjusted areas and accuracies from a probability sample.

    Attributes
    ----------
    area_table : pandas.DataFrame
        One row per class: ``class, mapped_area_ha, mapped_proportion, estimated_proportion,
        se_proportion, estimated_area_ha, se_area_ha, ci_low_ha, ci_high_ha, ci_half_width_ha, note``
        (``ci_half_width_ha`` is the larger side when a zero-error class widened the interval on one
        side; ``note`` says why, else empty).
    accuracy_table : pandas.DataFrame
        One row per class: ``class, users, users_se, users_ci, producers, producers_se,
        producers_ci, f1, f1_se, f1_ci, users_ci_low, users_ci_high, producers_ci_low,
        producers_ci_high, note`` (``*_ci`` are half-widths; the bounds are ``value +/- ci`` except for
        a class without observed errors, see ``note``).
    overall : Estimate
        Overall accuracy.
    proportion_matrix : pandas.DataFrame
        Estimated error matrix in area proportions (rows map, columns reference; sums to 1).
    disagreement : dict
        ``{"quantity": Q, "allocation": A}`` from the proportion matrix (Pontius & Millones 2011).
    confidence : float
        Confidence level of every interval.
    design : str
        ``"stratified"``, ``"simple_random"`` or ``"systematic"``.
    notes : tuple of str
        Plain-language notes on the design and its assumptions.
    """

    area_table: pd.DataFrame
    accuracy_table: pd.DataFrame
    overall: Estimate
    proportion_matrix: pd.DataFrame
    disagreement: dict[str, float]
    confidence: float
    design: str
    notes: tuple[str, ...]


# -- error matrix -------------------------------------------------------------------------------------


def error_matrix(reference: Sequence[Any], predicted: Sequence[Any], classes: Sequence[Any]) -> pd.DataFrame:
    """Count sample units by map (predicted) class and reference class.

    Parameters
    ----------
    reference, predicted : array-like
        Reference and map labels of the same sample units, in the same order.
    classes : sequence
        All classes of the legend, in reporting order (classes with no sample unit get zero rows and
        columns).

    Returns
    -------
    pandas.DataFrame
        Integer counts, rows = map classes (index ``"map"``), columns = reference classes
        (``"reference"``).  This is the transpose of :func:`sklearn.metrics.confusion_matrix`.

    Raises
    ------
    ValidationDesignError
        If a label is not in ``classes``, ``classes`` repeats a class, or the lengths differ.

    Examples
    --------
    >>> error_matrix(["a", "b", "b"], ["a", "a", "b"], ["a", "b"]).to_numpy().tolist()
    [[1, 1], [0, 1]]
    """
    labels = pd.Index(list(classes))
    if labels.has_duplicates:
        raise ValidationDesignError(
            f"classes repeats {sorted(map(str, labels[labels.duplicated()].unique()))}; "
            "give each class once, in reporting order."
        )
    ref, pred = np.asarray(reference, dtype=object), np.asarray(predicted, dtype=object)
    if ref.shape != pred.shape or ref.ndim != 1:
        raise ValidationDesignError(
            f"reference and predicted must be 1-D and of equal length, got shapes {ref.shape} and "
            f"{pred.shape}; pass one label per sample unit in each."
        )
    ri, pi = labels.get_indexer(ref), labels.get_indexer(pred)
    for what, values, idx in (("reference", ref, ri), ("predicted", pred, pi)):
        if (idx < 0).any():
            bad = sorted({str(v) for v in values[idx < 0]})
            raise ValidationDesignError(
                f"{what} labels {bad} are not in classes {[str(c) for c in labels]}; fix the labels or "
                "add the classes to the legend."
            )
    k = len(labels)
    counts = np.bincount(pi * k + ri, minlength=k * k).reshape(k, k)
    return _frame(counts, labels)


def _frame(values: np.ndarray, labels: Sequence[Any]) -> pd.DataFrame:
    index = pd.Index(list(labels), name="map")
    return pd.DataFrame(values, index=index, columns=pd.Index(list(labels), name="reference"))


def _as_counts(matrix: pd.DataFrame | np.ndarray) -> tuple[np.ndarray, list[Any]]:
    """Validate an error matrix of counts; return (float array, class labels)."""
    if isinstance(matrix, pd.DataFrame):
        if list(matrix.index) != list(matrix.columns):
            if set(matrix.index) != set(matrix.columns):
                raise ValidationDesignError(
                    f"the error matrix rows {list(matrix.index)} and columns {list(matrix.columns)} "
                    "name different classes; build it with error_matrix(reference, predicted, classes)."
                )
            matrix = matrix.loc[:, list(matrix.index)]
        labels, values = list(matrix.index), matrix.to_numpy(dtype=float)
    else:
        values = np.asarray(matrix, dtype=float)
        labels = list(range(values.shape[0])) if values.ndim == 2 else []
    if values.ndim != 2 or values.shape[0] != values.shape[1] or values.shape[0] < 2:
        raise ValidationDesignError(
            f"an error matrix must be square with at least 2 classes, got shape {values.shape}."
        )
    if not np.isfinite(values).all() or (values < 0).any():
        raise ValidationDesignError(
            "the error matrix holds negative or non-finite values; it must hold counts."
        )
    if not np.allclose(values, np.round(values)):
        raise ValidationDesignError(
            "the error matrix holds non-integer values; standard errors need sample counts, not area "
            "proportions. Pass the matrix of sample counts (rows map, columns reference)."
        )
    return values, labels


# -- the one variance engine ----------------------------------------------------------------------------


def _ratio_estimates(
    counts: np.ndarray, weights: np.ndarray, num: np.ndarray, den: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Stratified ratio estimates and linearised standard errors (Cochran 1977, ch. 5-6).

    ``counts`` (H, C): sample units per stratum h and unit category c.  ``weights`` (H,): stratum
    weights W_h (sum 1).  ``num``/``den`` (m, H, C): the indicator values y and x of a unit of category
    c in stratum h for each of m ratios R = sum_h W_h ybar_h / sum_h W_h xbar_h.  The variance is
    sum_h W_h^2 s2_dh / n_h / X^2 with d = y - R x; strata with fewer than 2 units add nothing.
    """
    n_h = counts.sum(axis=1)
    share = np.divide(counts, n_h[:, None], out=np.zeros_like(counts, dtype=float), where=n_h[:, None] > 0)
    x_tot = np.einsum("h,hc,mhc->m", weights, share, den)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.einsum("h,hc,mhc->m", weights, share, num) / x_tot
        d = num - ratio[:, None, None] * den
        d_mean = np.einsum("hc,mhc->mh", share, d)
        spread = np.einsum("hc,mhc->mh", share, (d - d_mean[..., None]) ** 2)
        # spread / (n_h - 1) is s2_dh / n_h: the n_h/(n_h-1) correction makes s2 unbiased.
        per_stratum = np.where(n_h > 1, weights**2 * spread / np.maximum(n_h - 1, 1), 0.0)
        se = np.sqrt(per_stratum.sum(axis=1)) / x_tot
    return ratio, se


def _targets(rows: np.ndarray, cols: np.ndarray) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Unit indicators (num, den) for every reported measure.

    ``rows`` (H, G) / ``cols`` (J, G): membership of map stratum h / reference class j in reporting
    class g (identity unless classes are collapsed).  Arrays are (G or 1, H, J).
    """
    shape = (rows.shape[1], rows.shape[0], cols.shape[0])
    in_map = np.broadcast_to(rows.T[:, :, None], shape)
    in_ref = np.broadcast_to(cols.T[:, None, :], shape)
    hit = in_map * in_ref
    one = np.ones_like(hit)
    return {
        "proportion": (in_ref, one),
        "users": (hit, in_map),
        "producers": (hit, in_ref),
        "f1": (2 * hit, in_map + in_ref),
        "overall": (hit.sum(axis=0, keepdims=True), one[:1]),
    }


def _z(confidence: float) -> float:
    if not 0 < confidence < 1:
        raise ValidationDesignError(f"confidence must lie in (0, 1), got {confidence!r}; e.g. 0.95.")
    return float(norm.ppf(0.5 + confidence / 2))


def _measure_columns(estimates: dict[str, tuple[np.ndarray, np.ndarray]], z: float) -> dict[str, Any]:
    cols: dict[str, Any] = {}
    for key in ("users", "producers", "f1"):
        value, se = estimates[key]
        cols.update({key: value, f"{key}_se": se, f"{key}_ci": z * se})
    return cols


# -- simple random sample of counts ----------------------------------------------------------------------


def accuracy_measures(
    matrix: pd.DataFrame | np.ndarray, *, kappa: bool = False, confidence: float = 0.95
) -> dict[str, Any]:
    """Accuracy measures of an error matrix of counts from a **simple random sample**.

    Parameters
    ----------
    matrix : pandas.DataFrame or ndarray
        Counts, rows = map, columns = reference (see :func:`error_matrix`).
    kappa : bool
        Also report Cohen's kappa with its delta-method standard error and a note on why good
        practice discourages it.
    confidence : float
        Confidence level of the normal-approximation intervals.

    Returns
    -------
    dict
        ``n``; ``overall`` (:class:`Estimate`); ``per_class`` (DataFrame: ``class, n_map,
        n_reference, users, users_se, users_ci, producers, producers_se, producers_ci, f1, f1_se,
        f1_ci``); ``quantity_disagreement`` and ``allocation_disagreement`` (Pontius & Millones 2011);
        ``note``; and with ``kappa=True`` also ``kappa`` (:class:`Estimate`) and ``kappa_note``.

    Notes
    -----
    Each measure is a ratio of two sample means over the n sampled units; its variance is the
    linearised ratio variance of a simple random sample (Cochran 1977, ch. 6), e.g.
    V(U_i) = n U_i (1 - U_i) / ((n - 1) n_i+) and V(O) = O (1 - O) / (n - 1).  For a stratified
    sample these are wrong: use :func:`stratified_estimates`.

    Examples
    --------
    >>> m = error_matrix(list("aabbb"), list("aabba"), ["a", "b"])
    >>> round(accuracy_measures(m)["overall"].value, 2)
    0.8
    """
    counts, labels = _as_counts(matrix)
    z = _z(confidence)
    k = len(labels)
    eye = np.eye(k)
    num_den = _targets(eye, eye)
    flat = {
        key: (num.reshape(num.shape[0], 1, k * k), den.reshape(den.shape[0], 1, k * k))
        for key, (num, den) in num_den.items()
    }
    est = {key: _ratio_estimates(counts.reshape(1, -1), np.ones(1), *nd) for key, nd in flat.items()}
    per_class = pd.DataFrame(
        {
            "class": labels,
            "n_map": counts.sum(1).astype(int),
            "n_reference": counts.sum(0).astype(int),
            **_measure_columns(est, z),
        }
    )
    overall, overall_se = est["overall"][0][0], est["overall"][1][0]
    out: dict[str, Any] = {
        "n": int(counts.sum()),
        "overall": Estimate(float(overall), float(overall_se), float(z * overall_se)),
        "per_class": per_class,
        **{f"{key}_disagreement": value for key, value in disagreement(counts).items()},
        "note": SRS_NOTE,
    }
    if kappa:
        value, se = _kappa(counts)
        out["kappa"] = Estimate(value, se, z * se)
        out["kappa_note"] = KAPPA_NOTE
    return out


def _kappa(counts: np.ndarray) -> tuple[float, float]:
    """Cohen's kappa and its delta-method SE (Bishop, Fienberg & Holland 1975, as in Congalton & Green)."""
    n = counts.sum()
    p = counts / n
    rows, cols = p.sum(axis=1), p.sum(axis=0)
    t1, t2 = np.trace(p), float(rows @ cols)
    t3 = float(np.diag(p) @ (rows + cols))
    # theta4 pairs cell (i, j) with the row total of j and the column total of i.
    t4 = float((p * (rows[None, :] + cols[:, None]) ** 2).sum())
    kappa = (t1 - t2) / (1 - t2)
    var = (
        t1 * (1 - t1) / (1 - t2) ** 2
        + 2 * (1 - t1) * (2 * t1 * t2 - t3) / (1 - t2) ** 3
        + (1 - t1) ** 2 * (t4 - 4 * t2**2) / (1 - t2) ** 4
    ) / n
    return float(kappa), float(np.sqrt(var))


def disagreement(matrix: pd.DataFrame | np.ndarray) -> dict[str, float]:
    """Quantity and allocation disagreement (Pontius & Millones 2011).

    Parameters
    ----------
    matrix : pandas.DataFrame or ndarray
        Error matrix of counts or of area proportions (it is normalised to sum 1).

    Returns
    -------
    dict
        ``{"quantity": Q, "allocation": A}``; Q + A = 1 - overall accuracy.

    Examples
    --------
    >>> {k: round(v, 3) for k, v in disagreement([[8, 2], [0, 10]]).items()}
    {'quantity': 0.1, 'allocation': 0.0}
    """
    p = np.asarray(matrix, dtype=float)
    p = p / p.sum()
    rows, cols, diag = p.sum(axis=1), p.sum(axis=0), np.diag(p)
    quantity = np.abs(rows - cols).sum() / 2
    allocation = np.minimum(rows - diag, cols - diag).sum()  # sum of 2 min(...) / 2
    return {"quantity": float(quantity), "allocation": float(allocation)}


def collapse_matrix(matrix: pd.DataFrame, parents: Mapping[str, Sequence[Any]]) -> pd.DataFrame:
    """Merge classes of an error matrix into coarser parent classes (e.g. wetland vs upland).

    Parameters
    ----------
    matrix : pandas.DataFrame
        Error matrix (counts or proportions), rows = map, columns = reference.
    parents : dict
        ``{parent: [child classes]}``; every class must belong to exactly one parent.

    Returns
    -------
    pandas.DataFrame
        The collapsed matrix, classes in the order of ``parents``.

    Notes
    -----
    Summing counts is valid for a simple random sample.  For a **stratified** sample the summed counts
    are not a stratified sample of the merged strata: collapse ``result.proportion_matrix`` for point
    estimates, or pass ``collapse=parents`` to :func:`stratified_estimates` for correct standard errors.

    Examples
    --------
    >>> m = error_matrix(["fen", "bog", "upland"], ["bog", "bog", "upland"], ["fen", "bog", "upland"])
    >>> collapse_matrix(m, {"wetland": ["fen", "bog"], "upland": ["upland"]}).to_numpy().tolist()
    [[2, 0], [0, 1]]
    """
    labels = list(matrix.index)
    member = _membership(labels, parents)
    values = member.T @ matrix.loc[labels, labels].to_numpy() @ member
    if np.issubdtype(matrix.to_numpy().dtype, np.integer):
        values = values.astype(int)
    return _frame(values, list(parents))


def _membership(labels: Sequence[Any], parents: Mapping[str, Sequence[Any]] | None) -> np.ndarray:
    """(K, G) 0/1 matrix: class k belongs to parent g; identity when ``parents`` is None."""
    if parents is None:
        return np.eye(len(labels))
    children = [c for kids in parents.values() for c in kids]
    unknown = sorted({str(c) for c in children} - {str(c) for c in labels})
    repeated = sorted({str(c) for c in children if children.count(c) > 1})
    missing = [str(c) for c in labels if c not in children]
    if unknown or repeated or missing:
        raise ValidationDesignError(
            f"parents must place every class in exactly one parent; unknown classes {unknown}, "
            f"classes in more than one parent {repeated}, classes in no parent {missing}. "
            f"The classes are {[str(c) for c in labels]}."
        )
    index = {c: i for i, c in enumerate(labels)}
    member = np.zeros((len(labels), len(parents)))
    for g, kids in enumerate(parents.values()):
        member[[index[c] for c in kids], g] = 1.0
    return member


# -- stratified estimation ---------------------------------------------------------------------------


def stratified_estimates(
    counts_matrix: pd.DataFrame,
    mapped_area_px_or_ha: Mapping[Any, float] | pd.Series | Sequence[float],
    *,
    pixel_area_ha: float | None = None,
    confidence: float = 0.95,
    collapse: Mapping[str, Sequence[Any]] | None = None,
    zero_error: str = "wilson",
) -> AreaAccuracyResult:
    """Error-adjusted areas and accuracies from a stratified random sample (Olofsson et al. 2014).

    Parameters
    ----------
    counts_matrix : pandas.DataFrame
        Sample counts, rows = map classes = strata, columns = reference classes.
    mapped_area_px_or_ha : dict, Series or sequence
        Mapped area of each map class: in pixels when ``pixel_area_ha`` is given, else in hectares.
        Keyed by class (or in the matrix's row order).
    pixel_area_ha : float, optional
        Area of one pixel in hectares (0.09 for 30 m pixels, 0.01 for 10 m pixels).
    confidence : float
        Confidence level of the normal-approximation intervals.
    collapse : dict, optional
        ``{parent: [classes]}`` to report at a coarser level; the variances still use the original
        strata (unlike summing the counts with :func:`collapse_matrix`).
    zero_error : {"wilson", "exact"}
        Interval for a class without observed commission or omission errors, where the
        normal approximation has zero width: Wilson (1927) score or Clopper & Pearson (1934) exact
        interval of the unobserved error rate, carried into the area interval and said in the
        tables' ``note`` column (see :func:`proportion_interval` and docs/validation.md).

    Returns
    -------
    AreaAccuracyResult

    Raises
    ------
    ValidationDesignError
        If a stratum with mapped area has fewer than 2 sample units, a stratum without mapped area has
        samples, or the areas do not match the classes.

    Notes
    -----
    With W_i the mapped area proportion and n_i. the sample size of stratum i, the estimated area
    proportion of cell (i, j) is W_i n_ij / n_i. and of class j the column sum; user's accuracy is
    n_ii / n_i.; producer's and overall accuracy follow from the proportion matrix.  Standard errors are
    the stratified ratio variances (Cochran 1977), which equal the formulas printed by Olofsson et al.
    (2014).  The map classes must be the strata.

    Examples
    --------
    >>> m = error_matrix(list("aaabbb"), list("aaabbb"), ["a", "b"])
    >>> res = stratified_estimates(m, {"a": 30.0, "b": 70.0})
    >>> res.area_table["estimated_area_ha"].tolist()
    [30.0, 70.0]
    """
    counts, labels = _as_counts(counts_matrix)
    areas = _mapped_areas(mapped_area_px_or_ha, labels, pixel_area_ha)
    _check_strata(counts, areas, labels)
    return _estimate(counts, areas, labels, confidence, collapse, "stratified", (), zero_error)


def simple_random_estimates(
    counts_matrix: pd.DataFrame,
    mapped_area_px_or_ha: Mapping[Any, float] | pd.Series | Sequence[float],
    *,
    pixel_area_ha: float | None = None,
    confidence: float = 0.95,
    systematic: bool = False,
    collapse: Mapping[str, Sequence[Any]] | None = None,
    zero_error: str = "wilson",
) -> AreaAccuracyResult:
    """Error-adjusted areas and accuracies from a simple random (or systematic) sample.

    The stratified estimator is applied with the map classes as post-strata (Olofsson et al. 2013).
    A systematic sample is analysed as a simple random sample; the variance is then usually
    conservative (see ``result.notes``).

    Parameters
    ----------
    counts_matrix, mapped_area_px_or_ha, pixel_area_ha, confidence, collapse, zero_error
        As in :func:`stratified_estimates`.
    systematic : bool
        The sample is systematic (a regular grid with a random start).

    Returns
    -------
    AreaAccuracyResult

    Raises
    ------
    ValidationDesignError
        If a map class with mapped area received fewer than 2 sample units (post-strata need 2).

    Examples
    --------
    >>> m = error_matrix(list("aabbbb"), list("aabbbb"), ["a", "b"])
    >>> simple_random_estimates(m, {"a": 1.0, "b": 2.0}).design
    'simple_random'
    """
    counts, labels = _as_counts(counts_matrix)
    areas = _mapped_areas(mapped_area_px_or_ha, labels, pixel_area_ha)
    _check_strata(counts, areas, labels)
    design = "systematic" if systematic else "simple_random"
    note = _SYSTEMATIC_NOTE if systematic else _POSTSTRATIFIED_NOTE
    return _estimate(counts, areas, labels, confidence, collapse, design, (note,), zero_error)


def _mapped_areas(values: Any, labels: list[Any], pixel_area_ha: float | None) -> np.ndarray:
    if isinstance(values, Mapping | pd.Series):
        keys = list(values.keys())
        missing = [str(c) for c in labels if c not in keys]
        extra = [str(c) for c in keys if c not in labels]
        if missing or extra:
            raise ValidationDesignError(
                f"mapped areas must be given for exactly the matrix classes {[str(c) for c in labels]}; "
                f"missing {missing}, not in the matrix {extra}."
            )
        areas = np.array([values[c] for c in labels], dtype=float)
    else:
        areas = np.asarray(values, dtype=float)
        if areas.shape != (len(labels),):
            raise ValidationDesignError(
                f"got {areas.size} mapped areas for {len(labels)} classes; give one per matrix row, in order."
            )
    if not np.isfinite(areas).all() or (areas < 0).any() or areas.sum() <= 0:
        raise ValidationDesignError(f"mapped areas must be finite, >= 0 and not all 0, got {areas.tolist()}.")
    if pixel_area_ha is not None:
        if not pixel_area_ha > 0:
            raise ValidationDesignError(f"pixel_area_ha must be > 0, got {pixel_area_ha!r}.")
        areas = areas * pixel_area_ha
    return areas


def _check_strata(counts: np.ndarray, areas: np.ndarray, labels: list[Any]) -> None:
    n_h = counts.sum(axis=1)
    thin = [f"{c} (n={int(n)})" for c, n, a in zip(labels, n_h, areas, strict=True) if a > 0 and n < 2]
    if thin:
        raise ValidationDesignError(
            f"strata {thin} have mapped area but fewer than 2 sample units, so their variance cannot be "
            "estimated. Sample at least 2 (better 50 or more) units in every mapped class, or merge the "
            "class into a neighbour with collapse_matrix before sampling."
        )
    orphans = [str(c) for c, n, a in zip(labels, n_h, areas, strict=True) if a == 0 and n > 0]
    if orphans:
        raise ValidationDesignError(
            f"strata {orphans} have sample units but zero mapped area; the sample cannot come from this "
            "map. Check that the mapped areas and the matrix rows refer to the same map."
        )


def _estimate(
    counts: np.ndarray,
    areas: np.ndarray,
    labels: list[Any],
    confidence: float,
    collapse: Mapping[str, Sequence[Any]] | None,
    design: str,
    notes: tuple[str, ...],
    zero_error: str = "wilson",
) -> AreaAccuracyResult:
    if zero_error not in ZERO_ERROR_METHODS:
        raise ValidationDesignError(f"zero_error must be one of {ZERO_ERROR_METHODS} (Wilson 1927 score or "
                                    f"Clopper & Pearson 1934 exact interval); got {zero_error!r}.")
    z = _z(confidence)
    total = areas.sum()
    weights = areas / total
    member = _membership(labels, collapse)
    names = list(collapse) if collapse is not None else labels
    est = {
        key: _ratio_estimates(counts, weights, num, den)
        for key, (num, den) in _targets(member, member).items()
    }
    n_h = counts.sum(axis=1, keepdims=True)
    fine = weights[:, None] * np.divide(counts, n_h, out=np.zeros_like(counts), where=n_h > 0)
    proportions = _frame(member.T @ fine @ member, names)
    overall, overall_se = float(est["overall"][0][0]), float(est["overall"][1][0])
    accuracy = pd.DataFrame({"class": names, **_measure_columns(est, z)})
    for key in ("users", "producers"):
        accuracy[f"{key}_ci_low"] = accuracy[key] - accuracy[f"{key}_ci"]
        accuracy[f"{key}_ci_high"] = accuracy[key] + accuracy[f"{key}_ci"]
    accuracy["note"] = ""
    result = AreaAccuracyResult(
        area_table=_area_table(names, member.T @ areas, total, *est["proportion"], z),
        accuracy_table=accuracy,
        overall=Estimate(overall, overall_se, z * overall_se),
        proportion_matrix=proportions,
        disagreement=disagreement(proportions),
        confidence=confidence,
        design=design,
        notes=(*notes, f"Intervals are {confidence:.0%} normal-approximation intervals (value +/- z SE)."),
    )
    return _zero_error_adjust(result, counts, areas, member, zero_error)


def _area_table(
    names: list[Any], mapped: np.ndarray, total: float, prop: np.ndarray, se: np.ndarray, z: float
) -> pd.DataFrame:
    area, area_se = total * prop, total * se
    return pd.DataFrame(
        {
            "class": names,
            "mapped_area_ha": mapped,
            "mapped_proportion": mapped / total,
            "estimated_proportion": prop,
            "se_proportion": se,
            "estimated_area_ha": area,
            "se_area_ha": area_se,
            "ci_low_ha": area - z * area_se,
            "ci_high_ha": area + z * area_se,
            "ci_half_width_ha": z * area_se,
            "note": "",
        }
    )




# -- strata without observed errors ------------------------------------------------------------------


ZERO_ERROR_METHODS = ("wilson", "exact")
_INTERVAL_LABEL = {"wilson": "Wilson (1927) score", "exact": "Clopper-Pearson (1934) exact"}


def proportion_interval(successes: Any, n: Any, confidence: float = 0.95, method: str = "wilson"
                        ) -> tuple[np.ndarray, np.ndarray]:
    """Confidence interval of a binomial proportion that stays informative at 0 or n successes.

    Parameters
    ----------
    successes, n : int or array of int
        Successes and trials (``n > 0``).
    confidence : float
    method : {"wilson", "exact"}
        ``"wilson"``: the score interval of Wilson (1927); ``"exact"``: the
        Clopper & Pearson (1934) interval from the beta quantiles (never below
        the nominal coverage, wider).

    Returns
    -------
    (low, high) : arrays of float

    References
    ----------
    Wilson, E. B. (1927). Probable inference, the law of succession, and statistical inference.
    *Journal of the American Statistical Association* 22(158), 209-212.
    Clopper, C. J., Pearson, E. S. (1934). The use of confidence or fiducial limits illustrated in the
    case of the binomial. *Biometrika* 26(4), 404-413.

    Examples
    --------
    >>> low, high = proportion_interval(50, 50)
    >>> round(float(low), 4), float(high)
    (0.9287, 1.0)
    """
    if method not in ZERO_ERROR_METHODS:
        raise ValidationDesignError(f"method must be one of {ZERO_ERROR_METHODS} (Wilson 1927 score interval "
                                    f"or Clopper & Pearson 1934 exact interval); got {method!r}.")
    k, n = np.asarray(successes, dtype=float), np.asarray(n, dtype=float)
    if (n <= 0).any() or (k < 0).any() or (k > n).any():
        raise ValidationDesignError(f"a proportion needs 0 <= successes <= n and n > 0; got successes "
                                    f"{k.tolist()} of n {n.tolist()}.")
    z = _z(confidence)
    if method == "wilson":
        p, z2 = k / n, z * z
        centre = (p + z2 / (2 * n)) / (1 + z2 / n)
        half = z * np.sqrt(p * (1 - p) / n + z2 / (4 * n * n)) / (1 + z2 / n)
        return np.clip(centre - half, 0.0, 1.0), np.clip(centre + half, 0.0, 1.0)
    from scipy.stats import beta

    alpha = 1 - confidence
    # beta quantiles with shape 0 are undefined: the bound is 0 (no success) or 1 (all successes)
    low = np.where(k > 0, beta.ppf(alpha / 2, np.maximum(k, 1), n - k + 1), 0.0)
    high = np.where(k < n, beta.ppf(1 - alpha / 2, k + 1, np.maximum(n - k, 1)), 1.0)
    return low, high


def _zero_error_adjust(result: AreaAccuracyResult, counts: np.ndarray, areas: np.ndarray, member: np.ndarray,
                       method: str) -> AreaAccuracyResult:
    """Intervals that do not collapse for reporting classes without observed errors (docs/validation.md).

    ``counts`` (H, H): sample counts, rows = strata (map classes); ``member`` (H, G): stratum / class h
    belongs to reporting class g.  For a class g with no commission error in the sample (every unit of its
    strata is of class g in the reference), the user's accuracy gets the area-weighted mean of its
    strata's ``method`` lower bounds for a proportion observed at n of n, and the area's lower bound moves
    down by the largest commission those bounds allow, sum_h mapped_h (1 - low_h).  For a class with no
    omission error (no unit of another stratum is of class g), the area's upper bound moves up by the
    largest omission the other sampled strata allow, sum_h mapped_h high_h with high_h the upper bound of a
    proportion observed at 0 of n_h; the producer's accuracy lower bound is then area / (area + that
    shift).  Each shift adds to the normal-approximation bound (conservative).
    """
    conf, n_h = result.confidence, counts.sum(axis=1)
    in_g = counts @ member  # (H, G) units of stratum h that are of class g in the reference
    own = member.astype(bool)  # (H, G)
    sampled = n_h > 0
    row_free = []
    for g in range(member.shape[1]):
        rows = own[:, g] & sampled
        row_free.append(bool(rows.any() and np.all(in_g[rows, g] == n_h[rows])))
    col_free = [bool(in_g[own[:, g], g].sum() > 0 and np.all(in_g[~own[:, g], g] == 0))
                for g in range(member.shape[1])]
    if not (any(row_free) or any(col_free)):
        return result
    safe_n = np.maximum(n_h, 1)
    all_low, _ = proportion_interval(safe_n, safe_n, conf, method)
    _, none_high = proportion_interval(np.zeros_like(safe_n), safe_n, conf, method)
    label = _INTERVAL_LABEL[method]
    area, acc = result.area_table.copy(), result.accuracy_table.copy()
    notes = [""] * member.shape[1]
    for g in range(member.shape[1]):
        said = []
        strata = own[:, g] & sampled & (areas > 0)
        if row_free[g] and strata.any():
            shift = float((areas[strata] * (1.0 - all_low[strata])).sum())
            low = 1.0 - shift / float(areas[strata].sum())
            acc.loc[g, ["users_ci_low", "users_ci_high"]] = [low, 1.0]
            area.loc[g, "ci_low_ha"] -= shift
            said.append(f"no commission error among {int(n_h[strata].sum())} sample units: user's accuracy "
                        f"{conf:.0%} interval [{low:.3f}, 1] ({label}); area lower bound lowered by "
                        f"{shift:,.1f} ha")
        others = ~own[:, g] & sampled & (areas > 0)
        if col_free[g]:
            shift = float((areas[others] * none_high[others]).sum())
            est = float(area.loc[g, "estimated_area_ha"])
            low = est / (est + shift) if est + shift > 0 else 0.0
            acc.loc[g, ["producers_ci_low", "producers_ci_high"]] = [low, 1.0]
            area.loc[g, "ci_high_ha"] += shift
            said.append(f"no omission error in the sample: producer's accuracy {conf:.0%} interval "
                        f"[{low:.3f}, 1]; area upper bound raised by {shift:,.1f} ha (the largest share "
                        f"of each other stratum that may be of this class: {label} bound of 0 of n)")
        notes[g] = "; ".join(said)
    area["ci_half_width_ha"] = np.maximum(area["estimated_area_ha"] - area["ci_low_ha"],
                                          area["ci_high_ha"] - area["estimated_area_ha"])
    for key in ("users", "producers"):
        acc[f"{key}_ci"] = np.maximum(acc[key] - acc[f"{key}_ci_low"], acc[f"{key}_ci_high"] - acc[key])
    area["note"], acc["note"] = notes, notes
    kinds = {"commission": row_free, "omission": col_free}
    flagged = [f"{c} ({' and '.join(k for k, free in kinds.items() if free[g])})"
               for g, c in enumerate(area["class"]) if notes[g]]
    note = (f"Error rates observed as zero in the sample: {', '.join(flagged)}. The normal-approximation "
            f"interval has zero width there, so the {label} interval of the unobserved error rate is "
            "reported and carried into the area interval (see the 'note' column of the tables).")
    return dataclasses.replace(result, area_table=area, accuracy_table=acc, notes=(*result.notes, note))


# -- figures and files ------------------------------------------------------------------------------


def plot_error_matrix(
    matrix: pd.DataFrame, *, normalize: str | None = None, title: str | None = None
) -> Figure:
    """Draw an error matrix as an annotated heat map.

    Parameters
    ----------
    matrix : pandas.DataFrame
        Rows = map, columns = reference (counts or area proportions).
    normalize : {None, "map", "reference", "all"}
        Shade by share of each map row (user's view), reference column (producer's view) or the total.
    title : str, optional
        Figure title.

    Returns
    -------
    matplotlib.figure.Figure
        A figure not registered with pyplot (display it in a notebook or call ``fig.savefig``).
    """
    from matplotlib.figure import Figure

    values = matrix.to_numpy(dtype=float)
    axis = {None: None, "all": None, "map": 1, "reference": 0}
    if normalize not in axis:
        raise ValidationDesignError(f"normalize must be one of {list(axis)}, got {normalize!r}.")
    with np.errstate(invalid="ignore", divide="ignore"):
        shade = values / (
            values.sum() if axis[normalize] is None else values.sum(axis=axis[normalize], keepdims=True)
        )
    k = values.shape[0]
    fig = Figure(figsize=(1.0 + 0.7 * k, 0.8 + 0.6 * k), layout="constrained")
    ax = fig.add_subplot()
    image = ax.imshow(shade, cmap="Blues", vmin=0)
    integral = np.allclose(values, np.round(values))
    for (i, j), v in np.ndenumerate(values):  # one label per cell, not per pixel
        text = f"{v:.0f}" if integral else f"{v:.3f}"
        dark = np.nan_to_num(shade[i, j]) > 0.6 * np.nanmax(shade)
        ax.text(j, i, text, ha="center", va="center", fontsize=8, color="white" if dark else "black")
    ax.set_xticks(range(k), [str(c) for c in matrix.columns], rotation=45, ha="right")
    ax.set_yticks(range(k), [str(c) for c in matrix.index])
    ax.set_xlabel("reference")
    ax.set_ylabel("map")
    fig.colorbar(image, ax=ax, label="share" if normalize else "share of total")
    if title:
        ax.set_title(title)
    return fig


def plot_areas(area_table: pd.DataFrame | AreaAccuracyResult, *, title: str | None = None) -> Figure:
    """Bar chart of mapped versus error-adjusted areas with confidence-interval error bars.

    Parameters
    ----------
    area_table : pandas.DataFrame or AreaAccuracyResult
        ``result.area_table`` (needs ``class``, ``mapped_area_ha``, ``estimated_area_ha`` and
        ``ci_low_ha``/``ci_high_ha``, or ``ci_half_width_ha``).  A class whose interval was widened on
        one side for an error rate observed as zero gets an asymmetric bar, marked with an asterisk.
    title : str, optional
        Figure title.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.figure import Figure

    table = area_table.area_table if isinstance(area_table, AreaAccuracyResult) else area_table
    pos = np.arange(len(table))
    est = table["estimated_area_ha"].to_numpy(float)
    if {"ci_low_ha", "ci_high_ha"} <= set(table.columns):
        low, high = table["ci_low_ha"].to_numpy(float), table["ci_high_ha"].to_numpy(float)
        yerr = np.vstack([est - low, high - est])
    else:
        yerr = table["ci_half_width_ha"].to_numpy(float)
    flagged = _has_note(table)
    fig = Figure(figsize=(1.5 + 0.9 * len(table), 3.5), layout="constrained")
    ax = fig.add_subplot()
    ax.bar(pos - 0.2, table["mapped_area_ha"], width=0.4, label="mapped (pixel count)", color="0.7")
    ax.bar(
        pos + 0.2,
        table["estimated_area_ha"],
        width=0.4,
        yerr=yerr,
        capsize=3,
        label="error-adjusted (CI)",
        color="tab:blue",
    )
    ax.set_xticks(pos, [f"{c}*" if f else str(c) for c, f in zip(table["class"], flagged, strict=True)],
                  rotation=30, ha="right")
    ax.set_ylabel("area (ha)")
    if flagged.any():
        ax.annotate("* no error observed in the sample: interval from the unobserved error rate (see notes)",
                    (0, 0), xycoords="figure fraction", xytext=(4, 2), textcoords="offset points", fontsize=7)
    ax.legend()
    if title:
        ax.set_title(title)
    return fig


def _has_note(table: pd.DataFrame) -> np.ndarray:
    """Rows whose ``note`` column holds text (a CSV read back gives NaN for the empty ones)."""
    if "note" not in table.columns:
        return np.zeros(len(table), dtype=bool)
    return np.array([isinstance(v, str) and bool(v.strip()) for v in table["note"]])


def write_area_table(result: AreaAccuracyResult, path: str | Path) -> Path:
    """Write the area table (mapped and error-adjusted areas with CI per class) to CSV.

    Parameters
    ----------
    result : AreaAccuracyResult
        From :func:`stratified_estimates` or :func:`simple_random_estimates`.
    path : str or Path
        A folder (the file is then ``areas.csv`` inside it) or a ``.csv`` file path.

    Returns
    -------
    Path
        The file written.
    """
    path = Path(path)
    target = path / "areas.csv" if path.is_dir() or path.suffix == "" else path
    try:
        write_table(result.area_table, target)  # atomic: renamed only when complete
    except OSError as exc:
        if isinstance(exc, OutputError):
            raise
        raise OutputError(
            f"cannot write the area table to {target}: {exc}. Choose a writable folder."
        ) from exc
    return target
