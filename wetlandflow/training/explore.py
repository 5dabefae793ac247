"""Look at the training data before modelling: class separability and redundant predictors.

Separability measures treat each class as a Gaussian in the chosen features
(mean vector and covariance estimated from its samples) and score each class
pair; low scores flag pairs the features will struggle to tell apart.

Conventions
-----------
* Jeffries-Matusita (JM) is returned on the **[0, 2] scale**,
  ``JM = 2 (1 - exp(-B))``, the form many remote-sensing texts use (where
  JM > 1.9 is read as good separability: common practice, no source).  The square
  root form ``sqrt(2 (1 - exp(-B)))`` ranges over [0, sqrt(2)]; ask for it with
  ``jm_scale="0-sqrt2"``.
* Transformed divergence is on [0, 2000]: ``TD = 2000 (1 - exp(-D / 8))``.
* Sample covariances are regularised with a small ridge: ``ridge * trace(S) / p``
  is added to the diagonal (default ``ridge = 1e-6``) so that singular
  covariances (constant features, fewer samples than features, collinear
  indices) still give finite values.  The closed-form functions apply no ridge
  unless asked.

References
----------
Swain, P. H., Davis, S. M. (eds.) (1978). Remote Sensing: The Quantitative
Approach. McGraw-Hill (transformed divergence; the D and TD formulas here are
not verified against that source).
Kaufman, Y. J., Remer, L. A. (1994). Detection of forests using mid-IR
reflectance: an application for aerosol studies. IEEE Transactions on
Geoscience and Remote Sensing 32(3), 672-683 (M statistic; citation details
not verified in the original).

The Bhattacharyya formula for Gaussians and the sqrt JM form were checked in a
source; the [0, 2] JM form is not verified in a source, and the usual cut-offs
(JM 1.9, TD 1900 / 1700) are common practice, no source.
"""

from __future__ import annotations

import warnings
from typing import Any, NamedTuple

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike
from scipy.cluster.hierarchy import dendrogram, fcluster, linkage
from scipy.spatial.distance import squareform

from ..errors import SamplesError

__all__ = [
    "RedundancyResult",
    "bhattacharyya_gaussian",
    "class_separability",
    "divergence_gaussian",
    "hard_pairs",
    "jeffries_matusita_gaussian",
    "m_statistic",
    "plot_class_distributions",
    "plot_correlation",
    "plot_separability",
    "predictor_correlation",
    "redundant_predictors",
    "separability_by_feature",
    "separability_summary",
    "transformed_divergence_gaussian",
]

MEASURES = ("jm", "td", "m", "bhattacharyya")
JM_SCALES = ("0-2", "0-sqrt2")
_LONG_NAMES = {
    "jm": "Jeffries-Matusita",
    "td": "transformed divergence",
    "m": "M statistic",
    "bhattacharyya": "Bhattacharyya distance",
}


# --------------------------------------------------------------------------- closed forms


def _mv(mu: ArrayLike, cov: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
    m = np.atleast_1d(np.asarray(mu, dtype=float))
    s = np.atleast_2d(np.asarray(cov, dtype=float))
    if s.shape != (m.size, m.size):
        raise ValueError(
            f"covariance must be {m.size} x {m.size} for a mean of length {m.size}; got {s.shape}."
        )
    return m, s


def bhattacharyya_gaussian(mu1: ArrayLike, S1: ArrayLike, mu2: ArrayLike, S2: ArrayLike) -> float:
    """Bhattacharyya distance between two Gaussians.

    ``B = 1/8 d' P^-1 d + 1/2 ln(det P / sqrt(det S1 det S2))`` with
    ``d = mu1 - mu2`` and ``P = (S1 + S2) / 2``.  Scalars are read as 1-D
    means and variances.

    Examples
    --------
    >>> round(bhattacharyya_gaussian(0.0, 1.0, 1.0, 1.0), 6)
    0.125
    """
    m1, s1 = _mv(mu1, S1)
    m2, s2 = _mv(mu2, S2)
    p = (s1 + s2) / 2
    d = m1 - m2
    logdet = [np.linalg.slogdet(a)[1] for a in (p, s1, s2)]  # log-determinants avoid under/overflow
    return float(d @ np.linalg.solve(p, d) / 8 + 0.5 * (logdet[0] - 0.5 * (logdet[1] + logdet[2])))


def _check_scale(jm_scale: str) -> None:
    if jm_scale not in JM_SCALES:
        raise ValueError(f"jm_scale must be one of {JM_SCALES}; got {jm_scale!r}.")


def _jm_from_b(b: Any, jm_scale: str) -> Any:
    jm2 = 2.0 * (1.0 - np.exp(-np.asarray(b)))
    return jm2 if jm_scale == "0-2" else np.sqrt(jm2)


def jeffries_matusita_gaussian(
    mu1: ArrayLike, S1: ArrayLike, mu2: ArrayLike, S2: ArrayLike, *, jm_scale: str = "0-2"
) -> float:
    """Jeffries-Matusita distance from the Bhattacharyya distance B.

    ``jm_scale="0-2"`` (default): ``2 (1 - exp(-B))``; ``"0-sqrt2"``:
    ``sqrt(2 (1 - exp(-B)))``.
    """
    _check_scale(jm_scale)
    return float(_jm_from_b(bhattacharyya_gaussian(mu1, S1, mu2, S2), jm_scale))


def divergence_gaussian(mu1: ArrayLike, S1: ArrayLike, mu2: ArrayLike, S2: ArrayLike) -> float:
    """Divergence D between two Gaussians.

    ``D = 1/2 tr[(S1 - S2)(S2^-1 - S1^-1)] + 1/2 tr[(S1^-1 + S2^-1) d d']``.
    """
    m1, s1 = _mv(mu1, S1)
    m2, s2 = _mv(mu2, S2)
    i1, i2 = np.linalg.inv(s1), np.linalg.inv(s2)
    d = m1 - m2
    return float(0.5 * np.trace((s1 - s2) @ (i2 - i1)) + 0.5 * d @ (i1 + i2) @ d)


def transformed_divergence_gaussian(mu1: ArrayLike, S1: ArrayLike, mu2: ArrayLike, S2: ArrayLike) -> float:
    """Transformed divergence ``TD = 2000 (1 - exp(-D / 8))``, range [0, 2000] (Swain & Davis 1978)."""
    return float(2000.0 * (1.0 - np.exp(-divergence_gaussian(mu1, S1, mu2, S2) / 8.0)))


def m_statistic(mu1: float, sd1: float, mu2: float, sd2: float) -> float:
    """M statistic ``|mu1 - mu2| / (sd1 + sd2)`` for one feature (Kaufman & Remer 1994).

    M > 1 is read as good separation, M < 1 as substantial histogram overlap.
    """
    return float(abs(mu1 - mu2) / (sd1 + sd2))


# --------------------------------------------------------------------------- from samples


def _features_list(samples: pd.DataFrame, features: str | list[str], *, need_class: bool = True) -> list[str]:
    if need_class and "class" not in samples.columns:
        raise SamplesError(f"the samples table has no 'class' column; columns are {list(samples.columns)}.")
    feats = [features] if isinstance(features, str) else list(features)
    missing = [f for f in feats if f not in samples.columns]
    if missing or not feats:
        raise SamplesError(
            f"features {missing or feats} are not columns of the samples table; available: "
            f"{[c for c in samples.columns if c not in ('plot_id', 'class', 'x', 'y')]}."
        )
    return feats


def _class_stats(samples, feats, classes, ridge):
    """Per class: mean, regularised covariance and sample count (NaN rows dropped)."""
    data = samples.dropna(subset=feats)
    out = {}
    for c in classes:
        v = data.loc[data["class"] == c, feats].to_numpy(float)
        if v.shape[0] < 2:
            out[c] = None
            continue
        s = np.atleast_2d(np.cov(v, rowvar=False))
        scale = np.trace(s) / len(feats)
        s = s + ridge * (scale if scale > 0 else 1.0) * np.eye(len(feats))
        out[c] = (v.mean(axis=0), s, v.shape[0])
    return out


def _pair_value(a, b, measure: str, jm_scale: str) -> float:
    (m1, s1, _), (m2, s2, _) = a, b
    if measure == "m":
        return m_statistic(m1[0], np.sqrt(s1[0, 0]), m2[0], np.sqrt(s2[0, 0]))
    if measure == "td":
        return transformed_divergence_gaussian(m1, s1, m2, s2)
    bd = bhattacharyya_gaussian(m1, s1, m2, s2)
    return bd if measure == "bhattacharyya" else float(_jm_from_b(bd, jm_scale))


def _check_measure(measure: str, feats: list[str], jm_scale: str) -> None:
    if measure not in MEASURES:
        raise ValueError(f"measure must be one of {MEASURES}; got {measure!r}.")
    _check_scale(jm_scale)
    if measure == "m" and len(feats) != 1:
        raise ValueError(
            f"the M statistic is defined for one feature; received {len(feats)} ({feats}). "
            f"Use separability_by_feature(samples, features, measure='m') for a per-feature table."
        )


def class_separability(
    samples: pd.DataFrame,
    features: str | list[str],
    classes: list[str] | None = None,
    measure: str = "jm",
    *,
    jm_scale: str = "0-2",
    ridge: float = 1e-6,
) -> pd.DataFrame:
    """Square class-by-class separability matrix for one feature or a feature set.

    Parameters
    ----------
    samples : pandas.DataFrame
        Samples table with a ``class`` column and the feature columns.
    features : str or list of str
        Feature column(s); samples with NaN in any of them are left out.
    classes : list of str, optional
        Classes to compare (default: those present, sorted).
    measure : {"jm", "td", "m", "bhattacharyya"}, default "jm"
        Jeffries-Matusita, transformed divergence, M statistic (one feature
        only) or Bhattacharyya distance, each under the Gaussian assumption.
    jm_scale : {"0-2", "0-sqrt2"}, default "0-2"
        JM convention (see the module notes).
    ridge : float, default 1e-6
        Relative covariance regularisation.

    Returns
    -------
    pandas.DataFrame
        Symmetric, zero diagonal, NaN for classes with fewer than 2 samples.
        ``attrs`` records the measure, scale, features and upper bound.
    """
    feats = _features_list(samples, features)
    _check_measure(measure, feats, jm_scale)
    classes = sorted(samples["class"].dropna().unique()) if classes is None else list(classes)
    stats = _class_stats(samples, feats, classes, ridge)
    few = [c for c in classes if stats[c] is None]
    if few:
        warnings.warn(
            f"classes {few} have fewer than 2 complete samples in {feats}; their separability is NaN.",
            UserWarning,
            stacklevel=2,
        )
    mat = pd.DataFrame(np.nan, index=pd.Index(classes, name="class"), columns=pd.Index(classes, name="class"))
    for i, a in enumerate(classes):
        for b in classes[i:]:
            if stats[a] is not None and stats[b] is not None:
                v = 0.0 if a == b else _pair_value(stats[a], stats[b], measure, jm_scale)
                mat.loc[a, b] = mat.loc[b, a] = v
    upper = {"jm": 2.0 if jm_scale == "0-2" else np.sqrt(2.0), "td": 2000.0}.get(measure, np.inf)
    mat.attrs.update(
        measure=measure, jm_scale=jm_scale, features=feats, upper_bound=float(upper), ridge=ridge
    )
    return mat


def separability_by_feature(
    samples: pd.DataFrame,
    features: list[str],
    classes: list[str] | None = None,
    measure: str = "m",
    **kwargs: Any,
) -> pd.DataFrame:
    """Long table of one-feature separabilities: ``feature, class_a, class_b, value``."""
    rows = []
    for f in _features_list(samples, features):
        mat = class_separability(samples, f, classes, measure, **kwargs)
        iu = np.triu_indices(len(mat), k=1)
        for i, j in zip(*iu, strict=True):
            rows.append((f, mat.index[i], mat.columns[j], mat.iat[i, j]))
    return pd.DataFrame(rows, columns=["feature", "class_a", "class_b", "value"])


# --------------------------------------------------------------------------- reading the matrix


def _default_threshold(sep: pd.DataFrame) -> float:
    """Usual 'good separability' cut-offs (common practice, no source; see the module notes).

    JM 1.9 on [0, 2] (sqrt(1.9) on [0, sqrt 2]); TD 1900; M 1; for B, ln 20,
    the B at which JM = 1.9.
    """
    measure = sep.attrs.get("measure")
    if measure is None:
        raise ValueError("the matrix carries no 'measure' attr; pass threshold= explicitly.")
    if measure == "jm":
        return 1.9 if sep.attrs.get("jm_scale", "0-2") == "0-2" else float(np.sqrt(1.9))
    return {"td": 1900.0, "m": 1.0, "bhattacharyya": float(np.log(20.0))}[measure]


def hard_pairs(sep_matrix: pd.DataFrame, threshold: float | None = None) -> list[tuple[Any, Any, float]]:
    """Class pairs scoring below ``threshold``, hardest first.

    ``threshold`` defaults to the measure's usual "good separability" cut-off
    (common practice, no source): JM 1.9 on [0, 2] (sqrt 1.9 on [0, sqrt 2]), TD
    1900, M 1, and for B ln 20 (the B at which JM = 1.9).  Pairs with NaN
    scores are not listed.

    Returns
    -------
    list of (class_a, class_b, value)
    """
    t = _default_threshold(sep_matrix) if threshold is None else float(threshold)
    iu = np.triu_indices(len(sep_matrix), k=1)
    vals = sep_matrix.to_numpy()[iu]
    pairs = [
        (sep_matrix.index[i], sep_matrix.columns[j], float(v))
        for i, j, v in zip(*iu, vals, strict=True)
        if np.isfinite(v) and v < t
    ]
    return sorted(pairs, key=lambda p: p[2])


def separability_summary(sep_matrix: pd.DataFrame, threshold: float | None = None) -> str:
    """Plain-language summary of which class pairs look hard to separate."""
    t = _default_threshold(sep_matrix) if threshold is None else float(threshold)
    a = sep_matrix.attrs
    measure = _LONG_NAMES.get(a.get("measure"), "separability")
    scale = f", {a['jm_scale'].replace('sqrt2', 'sqrt(2)')} scale" if a.get("measure") == "jm" else ""
    feats = ", ".join(a.get("features", [])) or "the chosen features"
    iu = np.triu_indices(len(sep_matrix), k=1)
    vals = sep_matrix.to_numpy()[iu]
    n_ok = int(np.isfinite(vals).sum())
    hard = hard_pairs(sep_matrix, t)
    head = f"With {feats} ({measure}{scale}; pairs below {t:.3g} count as hard to separate): "
    if not hard:
        text = head + f"all {n_ok} assessed class pairs are above the threshold."
    else:
        listed = "; ".join(f"{x} vs {y} ({v:.3g})" for x, y, v in hard)
        text = head + f"{len(hard)} of {n_ok} assessed class pairs look hard to separate: {listed}."
    if n_ok < vals.size:
        text += f" {vals.size - n_ok} pair(s) could not be assessed (a class has fewer than 2 samples)."
    return text


# --------------------------------------------------------------------------- redundancy


def predictor_correlation(
    samples: pd.DataFrame, features: list[str], method: str = "spearman"
) -> pd.DataFrame:
    """Correlation matrix of the features (pairwise-complete samples; pandas ``DataFrame.corr``)."""
    if method not in ("spearman", "pearson", "kendall"):
        raise ValueError(f"method must be 'spearman', 'pearson' or 'kendall'; got {method!r}.")
    corr = samples[_features_list(samples, features, need_class=False)].astype(float).corr(method=method)
    corr.attrs["method"] = method
    return corr


class RedundancyResult(NamedTuple):
    """Clusters of mutually correlated predictors and one row of flags per predictor.

    ``table`` columns: ``cluster`` (int), ``keep`` (the first-listed member of
    each cluster, so order features by preference), ``redundant`` (not kept)
    and ``kept_member`` (the representative of the predictor's cluster).
    """

    clusters: list[list[str]]
    table: pd.DataFrame


def _abs_distance(corr: pd.DataFrame) -> np.ndarray:
    """Condensed 1 - |r|; undefined correlations (constant features) count as 0."""
    r = np.nan_to_num(np.abs(corr.to_numpy(float)), nan=0.0)
    d = np.clip(1.0 - (r + r.T) / 2.0, 0.0, 1.0)
    np.fill_diagonal(d, 0.0)
    return squareform(d, checks=False)


def redundant_predictors(
    corr: pd.DataFrame, threshold: float = 0.9, *, method: str = "complete"
) -> RedundancyResult:
    """Group predictors whose absolute correlations reach ``threshold``.

    Hierarchical clustering (``scipy.cluster.hierarchy.linkage``) on
    ``1 - |r|``, cut at ``1 - threshold``.  With complete linkage (default)
    every pair inside a cluster has ``|r| >= threshold``.
    """
    names = list(corr.columns)
    if len(names) == 1:
        labels = np.array([1])
    else:
        labels = fcluster(
            linkage(_abs_distance(corr), method=method), t=1.0 - threshold, criterion="distance"
        )
    order = {lab: i for i, lab in enumerate(dict.fromkeys(labels))}  # number clusters by first member
    cluster = np.array([order[lab] for lab in labels])
    members = [[n for n, c in zip(names, cluster, strict=True) if c == k] for k in range(len(order))]
    kept = [m[0] for m in members]
    table = pd.DataFrame(
        {"cluster": cluster, "keep": [n in kept for n in names]}, index=pd.Index(names, name="feature")
    )
    table["redundant"] = ~table["keep"]
    table["kept_member"] = [kept[c] for c in cluster]
    return RedundancyResult([m for m in members if len(m) > 1], table)


# --------------------------------------------------------------------------- figures


def _new_axes(ax: Any, size: tuple[float, float]):
    from matplotlib.figure import Figure

    if ax is not None:
        return ax.figure, ax
    fig = Figure(figsize=size, layout="constrained")
    return fig, fig.subplots()


def plot_separability(sep_matrix: pd.DataFrame, *, ax: Any = None, annotate: bool = True):
    """Heat map of a :func:`class_separability` matrix; returns a Figure (never shown)."""
    n = len(sep_matrix)
    fig, ax = _new_axes(ax, (1.2 + 0.7 * n, 1.0 + 0.6 * n))
    vals = sep_matrix.to_numpy(float)
    upper = sep_matrix.attrs.get("upper_bound", np.nanmax(vals))
    im = ax.imshow(vals, cmap="viridis", vmin=0.0, vmax=upper if np.isfinite(upper) else np.nanmax(vals))
    ax.set_xticks(range(n), [str(c) for c in sep_matrix.columns], rotation=45, ha="right")
    ax.set_yticks(range(n), [str(c) for c in sep_matrix.index])
    if annotate:
        for i in range(n):
            for j in range(n):
                if np.isfinite(vals[i, j]):
                    ax.text(j, i, f"{vals[i, j]:.3g}", ha="center", va="center", fontsize=7, color="w")
    fig.colorbar(im, ax=ax, label=_LONG_NAMES.get(sep_matrix.attrs.get("measure"), "separability"))
    return fig


def plot_class_distributions(
    samples: pd.DataFrame,
    feature: str,
    classes: list[str] | None = None,
    *,
    kind: str = "violin",
    ax: Any = None,
):
    """Violin (or box) plot of one feature per class; NaN values left out. Returns a Figure."""
    if kind not in ("violin", "box"):
        raise ValueError(f"kind must be 'violin' or 'box'; got {kind!r}.")
    _features_list(samples, feature)
    classes = sorted(samples["class"].dropna().unique()) if classes is None else list(classes)
    data = [samples.loc[samples["class"] == c, feature].dropna().to_numpy(float) for c in classes]
    shown = [(c, d) for c, d in zip(classes, data, strict=True) if d.size]
    fig, ax = _new_axes(ax, (1.5 + 0.8 * len(classes), 4))
    pos = np.arange(1, len(shown) + 1)
    if kind == "violin":
        ax.violinplot([d for _, d in shown], positions=pos, showmedians=True)
    else:
        ax.boxplot([d for _, d in shown], positions=pos)
    ax.set_xticks(pos, [f"{c}\n(n={d.size})" for c, d in shown])
    ax.set_ylabel(feature)
    return fig


def plot_correlation(corr: pd.DataFrame, *, method: str = "average"):
    """Correlation heat map with rows and columns in dendrogram order (1 - |r|). Returns a Figure."""
    from matplotlib.figure import Figure

    n = len(corr)
    fig = Figure(figsize=(2 + 0.4 * n, 2.8 + 0.4 * n), layout="constrained")
    top, heat = fig.subplots(2, 1, height_ratios=[1, 4])
    if n > 1:
        tree = dendrogram(
            linkage(_abs_distance(corr), method=method),
            ax=top,
            no_labels=True,
            color_threshold=0,
            above_threshold_color="0.3",
        )
        order = tree["leaves"]
    else:
        order = [0]
    top.set_axis_off()
    vals = corr.to_numpy(float)[np.ix_(order, order)]
    im = heat.imshow(vals, cmap="RdBu_r", vmin=-1, vmax=1, aspect="auto")
    names = [str(corr.columns[i]) for i in order]
    heat.set_xticks(range(n), names, rotation=90)
    heat.set_yticks(range(n), names)
    fig.colorbar(im, ax=heat, label=f"{corr.attrs.get('method', '')} correlation".strip())
    return fig
