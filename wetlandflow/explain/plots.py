"""Figures for SHAP explanations (matplotlib ``Figure`` objects, never shown).

Each function returns a new :class:`matplotlib.figure.Figure` built without
pyplot, so notebooks display it and scripts can save it; nothing is shown or
kept in global state.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import ParameterError
from .attribution import _values

__all__ = ["plot_beeswarm", "plot_dependence", "plot_domain_importance", "plot_importance", "plot_waterfall"]


def _figure(size: tuple[float, float]) -> tuple[Any, Any]:
    from matplotlib.figure import Figure

    fig = Figure(figsize=size, layout="constrained")
    return fig, fig.subplots()


def _scale_label(sv: xr.Dataset | xr.DataArray) -> str:
    scale = sv.attrs.get("output_scale", "")
    return {"margin": "SHAP value (log-odds)", "probability": "SHAP value (probability)"}.get(scale, "SHAP value")


def _class_values(sv: xr.Dataset | xr.DataArray, class_name: str) -> xr.DataArray:
    da = _values(sv)
    classes = [str(c) for c in da["class"].values]
    if class_name not in classes:
        raise ParameterError(f"class_name {class_name!r} is not among the explained classes {classes}")
    return da.sel({"class": class_name}).transpose("sample", "feature")


def _feature_frame(X: pd.DataFrame | np.ndarray, features: list[str]) -> pd.DataFrame:
    if isinstance(X, pd.DataFrame):
        return X[features].reset_index(drop=True)
    return pd.DataFrame(np.asarray(X), columns=features)


def plot_importance(table: pd.DataFrame, top: int = 15, *, column: str = "overall") -> Any:
    """Horizontal bars of a :func:`~wetlandflow.explain.attribution.global_importance` column (largest on top)."""
    if column not in table.columns:
        raise ParameterError(f"column {column!r} not in the importance table; choose from {list(table.columns)}")
    sel = table[column].sort_values(ascending=False).head(top)[::-1]
    fig, ax = _figure((6.0, 1.0 + 0.3 * len(sel)))
    ax.barh([str(i) for i in sel.index], sel.to_numpy(float), color="#4c72b0")
    ax.set_xlabel(f"mean |SHAP| ({column})")
    return fig


def _quantiles(values: np.ndarray) -> np.ndarray:
    """Rank of each value within its feature, scaled to [0, 1]; NaN stays NaN."""
    q = pd.Series(values).rank(pct=True).to_numpy()
    return q


def plot_beeswarm(sv: xr.Dataset | xr.DataArray, X: pd.DataFrame | np.ndarray, class_name: str, top: int = 12,
                  *, seed: int = 0) -> Any:
    """Jittered SHAP values per feature for one class, coloured by the feature value's quantile.

    Features are ordered by mean |SHAP| for ``class_name``; missing feature
    values are drawn grey.  The vertical jitter is random (``seed``), a simple
    stand-in for a packed swarm.
    """
    vals = _class_values(sv, class_name)
    features = [str(f) for f in vals["feature"].values]
    frame = _feature_frame(X, features)
    order = np.argsort(-np.abs(vals.values).mean(axis=0))[:top][::-1]
    fig, ax = _figure((7.0, 1.0 + 0.4 * len(order)))
    rng = np.random.default_rng(seed)
    sc = None
    for row, j in enumerate(order):  # a loop over features drawn, not samples
        phi = vals.values[:, j]
        q = _quantiles(frame.iloc[:, j].to_numpy(float))
        jitter = row + rng.uniform(-0.3, 0.3, size=phi.size)
        nan = np.isnan(q)
        ax.scatter(phi[nan], jitter[nan], s=6, color="#bbbbbb", linewidths=0)
        sc = ax.scatter(phi[~nan], jitter[~nan], s=6, c=q[~nan], cmap="coolwarm", vmin=0, vmax=1, linewidths=0)
    ax.set_yticks(range(len(order)), [features[j] for j in order])
    ax.axvline(0.0, color="k", lw=0.6)
    ax.set_xlabel(f"{_scale_label(sv)} for {class_name}")
    if sc is not None:
        fig.colorbar(sc, ax=ax, label="feature value quantile")
    return fig


def plot_dependence(sv: xr.Dataset | xr.DataArray, X: pd.DataFrame | np.ndarray, feature: str, class_name: str,
                    color_by: str | None = None) -> Any:
    """SHAP value of ``feature`` for ``class_name`` against the feature's value, optionally coloured."""
    vals = _class_values(sv, class_name)
    features = [str(f) for f in vals["feature"].values]
    for name in (feature, color_by):
        if name is not None and name not in features:
            raise ParameterError(f"feature {name!r} is not among the explained features {features[:8]}...")
    frame = _feature_frame(X, features)
    fig, ax = _figure((6.0, 4.0))
    phi = vals.sel(feature=feature).values
    if color_by is None:
        ax.scatter(frame[feature], phi, s=6, color="#4c72b0", linewidths=0)
    else:
        sc = ax.scatter(frame[feature], phi, s=6, c=frame[color_by], cmap="viridis", linewidths=0)
        fig.colorbar(sc, ax=ax, label=color_by)
    ax.axhline(0.0, color="k", lw=0.6)
    ax.set_xlabel(feature)
    ax.set_ylabel(f"{_scale_label(sv)} for {class_name}")
    return fig


def plot_domain_importance(table: pd.DataFrame) -> Any:
    """Stacked bars of each domain's (or cluster's) share of |SHAP| per class."""
    label = "domain" if "domain" in table.columns else "cluster"
    wide = table.pivot(index="class", columns=label, values="share").fillna(0.0)
    fig, ax = _figure((6.5, 1.2 + 0.4 * len(wide)))
    left = np.zeros(len(wide))
    for name in wide.columns:  # a loop over domains
        ax.barh([str(c) for c in wide.index], wide[name].to_numpy(), left=left, label=str(name))
        left += wide[name].to_numpy()
    ax.set_xlim(0, 1)
    ax.set_xlabel("share of mean |SHAP|")
    ax.legend(loc="lower right", fontsize=7)
    return fig


def _row_contributions(sv_row: xr.DataArray | pd.Series, class_name: str) -> pd.Series:
    """One pixel's (or the mean of a polygon's pixels') contributions to ``class_name``, by feature."""
    if isinstance(sv_row, pd.Series):
        return sv_row.astype(float)
    da = sv_row["values"] if isinstance(sv_row, xr.Dataset) else sv_row
    if "sample" in da.dims:
        da = da.mean("sample")  # a polygon: average its pixels' contributions
    if "class" in da.dims:
        da = da.sel({"class": class_name})
    return pd.Series(da.values.astype(float), index=[str(f) for f in da["feature"].values])


def plot_waterfall(sv_row: xr.DataArray | pd.Series, base_value: float | xr.DataArray, class_name: str,
                   top: int = 10) -> Any:
    """Waterfall from the base value to the model output for one pixel or a polygon's mean.

    The ``top`` largest |contributions| are drawn one by one; the rest are
    merged into one bar.  Bars run bottom-up from the base value.
    """
    phi = _row_contributions(sv_row, class_name)
    base = float(base_value.sel({"class": class_name})) if isinstance(base_value, xr.DataArray) else float(base_value)
    if not np.isfinite(base):
        raise ParameterError(f"the base value for {class_name!r} is {base}; the class was absent from training "
                             "and has nothing to explain")
    order = phi.abs().sort_values(ascending=False).index
    steps = phi[order[:top]]
    if len(order) > top:
        steps[f"{len(order) - top} other features"] = phi[order[top:]].sum()
    starts = base + np.concatenate([[0.0], np.cumsum(steps.to_numpy())[:-1]])
    fig, ax = _figure((6.5, 1.2 + 0.35 * len(steps)))
    colours = np.where(steps.to_numpy() >= 0, "#c44e52", "#4c72b0")
    ax.barh(range(len(steps)), steps.to_numpy(), left=starts, color=colours)
    ax.set_yticks(range(len(steps)), list(steps.index))
    ax.invert_yaxis()
    ax.axvline(base, color="k", lw=0.6, ls=":")
    ax.axvline(base + phi.sum(), color="k", lw=0.8)
    ax.set_xlabel(f"model output for {class_name} (base {base:.3g}, output {base + phi.sum():.3g})")
    return fig
