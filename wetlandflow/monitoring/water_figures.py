"""Figures of the surface-water series: water area per polygon through time, water frequency per period."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import DataQualityError

__all__ = ["water_area_figure", "water_frequency_figure"]

_MAX_LINES = 12


def water_area_figure(table: pd.DataFrame, *, polygons: Sequence[Any] | None = None) -> Any:
    """Water area per polygon through time, from :func:`~.water_series.water_area_series`.

    Dates where less than half of a polygon was observed are drawn as open markers (their area is a
    lower bound: unobserved pixels may be wet).

    Parameters
    ----------
    table : pandas.DataFrame
        Columns ``polygon``, ``date``, ``water_ha``, ``observed_share``.
    polygons : sequence, optional
        Polygon ids to draw (default: all, at most 12, the largest water areas first).

    Returns
    -------
    matplotlib.figure.Figure

    Examples
    --------
    >>> t = pd.DataFrame({"polygon": ["a", "a"], "date": pd.to_datetime(["2024-01-01", "2024-02-01"]),
    ...                   "water_ha": [1.0, 2.0], "observed_share": [1.0, 0.2]})
    >>> len(water_area_figure(t).axes)
    1
    """
    import matplotlib.pyplot as plt

    missing = {"polygon", "date", "water_ha", "observed_share"} - set(table.columns)
    if missing:
        raise DataQualityError(
            f"the water-area table lacks columns {sorted(missing)}; pass the table from water_area_series."
        )
    if polygons is None:
        polygons = list(
            table.groupby("polygon")["water_ha"].max().sort_values(ascending=False).index[:_MAX_LINES]
        )
    fig, ax = plt.subplots(figsize=(8, 4), layout="constrained")
    for pid in polygons:
        rows = table[table["polygon"] == pid].sort_values("date")
        (line,) = ax.plot(rows["date"], rows["water_ha"], marker="o", ms=3, label=str(pid))
        poor = rows[rows["observed_share"] < 0.5]
        ax.plot(poor["date"], poor["water_ha"], "o", mfc="white", mec=line.get_color(), ms=5)
    ax.set(xlabel="date", ylabel="water area (ha)", title="Water area per polygon")
    ax.legend(
        fontsize="small", ncols=2, title="polygon (open marker: < 50 % observed)", title_fontsize="small"
    )
    return fig


def water_frequency_figure(freq: xr.DataArray) -> Any:
    """One map per period of :func:`~.water_series.water_frequency`, with one shared colour scale (0 to 1).

    Parameters
    ----------
    freq : xarray.DataArray
        ``(period, y, x)`` water frequency.

    Returns
    -------
    matplotlib.figure.Figure

    Examples
    --------
    >>> f = xr.DataArray(np.random.default_rng(0).random((2, 4, 4)), dims=("period", "y", "x"),
    ...                  coords={"period": ["2023", "2024"], "n_obs": ("period", [3, 4])})
    >>> len(water_frequency_figure(f).axes)
    3
    """
    import matplotlib.pyplot as plt

    if tuple(freq.dims) != ("period", "y", "x"):
        raise DataQualityError(
            f"expected a (period, y, x) frequency from water_frequency; received {freq.dims}."
        )
    n = freq.sizes["period"]
    cols = min(n, 4)
    rows = int(np.ceil(n / cols))
    fig, axes = plt.subplots(
        rows, cols, figsize=(3 * cols + 1, 3 * rows), squeeze=False, layout="constrained"
    )
    image = None
    for i, ax in enumerate(axes.ravel()):
        if i >= n:
            ax.remove()
            continue
        layer = freq.isel(period=i)
        image = ax.imshow(np.asarray(layer.values), vmin=0, vmax=1, cmap="Blues", interpolation="nearest")
        n_obs = f", {int(layer['n_obs'])} dates" if "n_obs" in layer.coords else ""
        ax.set_title(f"{layer['period'].item()}{n_obs}", fontsize="small")
        ax.set_axis_off()
    fig.colorbar(image, ax=list(axes.ravel()[:n]), shrink=0.8, label="water frequency (share of valid dates)")
    return fig
