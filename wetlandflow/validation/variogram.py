"""Block size for spatial cross-validation from the empirical variogram.

Spatial blocks should be larger than the range over which residuals (or, before
modelling, the features) stay correlated, so that a test block is not
predicted from near-copies of itself in the neighbouring training blocks.
This module estimates that range: the Matheron semivariogram of a variable at
the sample locations, a spherical or exponential model fitted to it, and the
model's effective range as the suggested block side.

References
----------
Roberts, D. R., et al. (2017). Cross-validation strategies for data with
temporal, spatial, hierarchical, or phylogenetic structure. Ecography 40(8),
913-929. doi:10.1111/ecog.02881
"""

from __future__ import annotations

import warnings
from typing import NamedTuple

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike
from scipy.optimize import curve_fit

from ..errors import ValidationDesignError

__all__ = ["BlockSizeSuggestion", "suggest_block_size", "variogram"]


def _spherical(h, nugget, psill, a):
    r = np.minimum(h / a, 1.0)
    return nugget + psill * (1.5 * r - 0.5 * r**3)


def _exponential(h, nugget, psill, a):
    return nugget + psill * (1.0 - np.exp(-h / a))


_MODELS = {"spherical": _spherical, "exponential": _exponential}


def variogram(
    x: ArrayLike,
    y: ArrayLike,
    values: ArrayLike,
    *,
    n_lags: int = 15,
    max_lag: float | None = None,
    max_points: int = 3000,
    random_state: int = 0,
) -> pd.DataFrame:
    """Empirical semivariogram (Matheron estimator) of ``values``.

    ``gamma(h) = mean over pairs in lag bin h of (z_i - z_j)^2 / 2``.  At most
    ``max_points`` points (random subset) are used, since all pairs are formed.
    ``max_lag`` defaults to half the largest pair distance (common practice,
    no source).

    Returns
    -------
    pandas.DataFrame
        Columns ``lag`` (mean pair distance in the bin, metres), ``gamma`` and
        ``n_pairs``; empty bins are dropped.
    """
    from scipy.spatial.distance import pdist

    xy = np.column_stack([np.asarray(x, float), np.asarray(y, float)])
    z = np.asarray(values, float)
    ok = np.isfinite(z) & np.isfinite(xy).all(axis=1)
    xy, z = xy[ok], z[ok]
    if z.size > max_points:
        keep = np.random.default_rng(random_state).choice(z.size, max_points, replace=False)
        xy, z = xy[keep], z[keep]
    if z.size < 10:
        raise ValidationDesignError(f"variogram needs at least 10 finite values; received {z.size}.")
    d, sq = pdist(xy), pdist(z[:, None], "sqeuclidean")
    top = d.max() / 2 if max_lag is None else float(max_lag)
    edges = np.linspace(0.0, top, n_lags + 1)
    b = np.digitize(d, edges[1:], right=True)
    inside = d <= top
    n = np.bincount(b[inside], minlength=n_lags)[:n_lags]
    lag = np.bincount(b[inside], weights=d[inside], minlength=n_lags)[:n_lags]
    gam = np.bincount(b[inside], weights=sq[inside], minlength=n_lags)[:n_lags] / 2
    table = pd.DataFrame({"lag": lag / np.maximum(n, 1), "gamma": gam / np.maximum(n, 1), "n_pairs": n})
    return table[table["n_pairs"] > 0].reset_index(drop=True)


def _fit_model(table: pd.DataFrame, model: str) -> tuple[np.ndarray, float]:
    h, g, n = (table[c].to_numpy(float) for c in ("lag", "gamma", "n_pairs"))
    p0 = [max(g[0] * 0.5, 0.0), max(g.max() - g[0] * 0.5, 1e-12), h.max() / 3]
    upper = [np.inf, np.inf, 10 * h.max()]
    # Weighting by pair counts trusts the well-populated bins (common practice, no source).
    par, _ = curve_fit(
        _MODELS[model], h, g, p0=p0, bounds=([0, 0, 1e-9], upper), sigma=1 / np.sqrt(n), maxfev=20000
    )
    sse = float(np.sum(n * (g - _MODELS[model](h, *par)) ** 2))
    return par, sse


def _first_pc(values: np.ndarray) -> np.ndarray:
    """Scores on the first principal component of standardised columns (NaN rows stay NaN)."""
    ok = np.isfinite(values).all(axis=1)
    v = values[ok]
    v = (v - v.mean(axis=0)) / np.where(v.std(axis=0) > 0, v.std(axis=0), 1.0)
    out = np.full(values.shape[0], np.nan)
    out[ok] = v @ np.linalg.svd(v, full_matrices=False)[2][0]
    return out


class BlockSizeSuggestion(NamedTuple):
    """Result of :func:`suggest_block_size`.

    ``block_size_m`` is the effective range of the fitted model (spherical:
    the range ``a``; exponential: the practical range ``3a``, where 95 % of the
    sill is reached); ``variogram`` is the empirical table with a ``fitted``
    column; ``fit`` holds the model name, parameters and the value source.
    """

    block_size_m: float
    variogram: pd.DataFrame
    fit: dict


def suggest_block_size(
    x: ArrayLike,
    y: ArrayLike,
    values: ArrayLike,
    *,
    model: str = "auto",
    n_lags: int = 15,
    max_lag: float | None = None,
    max_points: int = 3000,
    random_state: int = 0,
) -> BlockSizeSuggestion:
    """Block size from the autocorrelation range of a variable.

    Roberts et al. (2017) advise blocks larger than the range of spatial
    autocorrelation of the model residuals (block-size advice not verified in the original).
    Fit the variogram of the residuals of a first model where you can; before
    modelling, a key feature or the first principal component of the features
    is a proxy.

    Parameters
    ----------
    x, y : array-like of shape (n,)
        Coordinates in metres.
    values : array-like of shape (n,) or (n, p)
        A feature or residuals (1-D), or several features (2-D), reduced to
        the first principal component of the standardised columns.
    model : {"auto", "spherical", "exponential"}, default "auto"
        Variogram model fitted with ``scipy.optimize.curve_fit``; "auto" keeps
        the one with the smaller pair-weighted squared error.
    n_lags, max_lag, max_points, random_state
        Passed to :func:`variogram`.

    Returns
    -------
    BlockSizeSuggestion
    """
    if model not in ("auto", *_MODELS):
        raise ValidationDesignError(f"model must be 'auto', 'spherical' or 'exponential'; got {model!r}.")
    vals = np.asarray(values, float)
    source = "first principal component" if vals.ndim == 2 else "values"
    z = _first_pc(vals) if vals.ndim == 2 else vals
    table = variogram(
        x, y, z, n_lags=n_lags, max_lag=max_lag, max_points=max_points, random_state=random_state
    )
    fits = {}
    for name in _MODELS if model == "auto" else (model,):
        try:
            fits[name] = _fit_model(table, name)
        except RuntimeError:
            continue
    if not fits:
        raise ValidationDesignError(
            "no variogram model could be fitted; check that the values vary in space."
        )
    name = min(fits, key=lambda m: fits[m][1])
    par = fits[name][0]
    eff = float(par[2] * (3.0 if name == "exponential" else 1.0))
    if eff >= table["lag"].max():
        warnings.warn(
            f"the fitted range ({eff:.0f} m) reaches the largest lag ({table['lag'].max():.0f} m); "
            f"the true range may be longer. Treat the block size as a lower bound.",
            UserWarning,
            stacklevel=2,
        )
    table = table.assign(fitted=_MODELS[name](table["lag"].to_numpy(), *par))
    fit = {
        "model": name,
        "nugget": float(par[0]),
        "partial_sill": float(par[1]),
        "range_param_m": float(par[2]),
        "effective_range_m": eff,
        "source": source,
    }
    return BlockSizeSuggestion(eff, table, fit)


