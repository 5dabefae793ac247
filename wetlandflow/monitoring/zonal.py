"""Per-polygon series from dated rasters: zone ids on the grid, zonal means per date, one value per year.

The polygons (inventory polygons, the AOI, or a user's sites) are burnt once onto the series' grid; each
date is then reduced with ``numpy.bincount`` over the zone ids, so the cost is one pass over the pixels per
date whatever the number of polygons.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import MonitoringDesignError
from ._attrs import result_attrs

AGGREGATES = ("median", "mean", "max", "min")


def zone_ids(polygons, like: xr.DataArray, *, id_field: str) -> tuple[np.ndarray, list[str]]:
    """Burn ``polygons`` onto the grid of ``like`` (dims ending in ``y``, ``x``): zone ``k`` is polygon
    ``names[k - 1]``, 0 lies outside every polygon.  Where polygons overlap, the later one wins.

    Parameters
    ----------
    polygons : geopandas.GeoDataFrame
        In the grid's CRS.
    like : xarray.DataArray
        Carries the ``x`` and ``y`` pixel-centre coordinates of a regular grid.
    id_field : str
        Column naming each polygon.

    Examples
    --------
    >>> import geopandas as gpd, shapely
    >>> da = xr.DataArray(np.zeros((4, 4)), dims=("y", "x"), coords={"y": [3.5, 2.5, 1.5, 0.5],
    ...                   "x": [0.5, 1.5, 2.5, 3.5]})
    >>> ids, names = zone_ids(gpd.GeoDataFrame({"n": ["a"]}, geometry=[shapely.box(0, 0, 2, 2)]), da,
    ...                       id_field="n")
    >>> int((ids == 1).sum()), names
    (4, ['a'])
    """
    from rasterio.features import rasterize
    from rasterio.transform import from_origin

    x, y = like["x"].values, like["y"].values
    dx, dy = float(x[1] - x[0]), float(y[0] - y[1])
    transform = from_origin(float(x[0]) - dx / 2, float(y[0]) + dy / 2, dx, dy)
    names = [str(v) for v in polygons[id_field]]
    shapes = [(geom, k + 1) for k, geom in enumerate(polygons.geometry)
              if geom is not None and not geom.is_empty]
    ids = rasterize(shapes, out_shape=(len(y), len(x)), transform=transform, fill=0, dtype="int32")
    return ids, names


def zonal_series(stack: xr.DataArray, ids: np.ndarray, names: Sequence[str], *, metric: str,
                 pixel_area_ha: float | None = None) -> pd.DataFrame:
    """Mean of ``stack`` (``time, y, x``; NaN = not observed) per zone and date.

    Returns a long table: ``polygon``, ``date``, ``metric``, ``value`` (mean over the polygon's observed
    pixels), ``observed_share`` (observed share of the polygon's pixels) and, with ``pixel_area_ha``,
    ``area_ha`` (the polygon's area on the grid).  Dates on which a polygon has no observed pixel are
    kept with NaN values, so gaps stay visible.
    """
    n = len(names) + 1
    size = np.bincount(ids.ravel(), minlength=n)[1:].astype(float)
    rows = []
    for t in range(stack.sizes["time"]):
        values = np.asarray(stack.isel(time=t).values, dtype=float).ravel()
        seen = np.isfinite(values)
        count = np.bincount(ids.ravel()[seen], minlength=n)[1:].astype(float)
        total = np.bincount(ids.ravel()[seen], weights=values[seen], minlength=n)[1:]
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(count > 0, total / count, np.nan)
            share = np.where(size > 0, count / size, np.nan)
        date = pd.Timestamp(stack["time"].values[t])
        rows.append(pd.DataFrame({"polygon": list(names), "date": date, "metric": metric, "value": mean,
                                  "observed_share": share}))
    table = pd.concat(rows, ignore_index=True)
    if pixel_area_ha is not None:
        table["area_ha"] = np.tile(size * pixel_area_ha, stack.sizes["time"])
    table.attrs = result_attrs(long_name=f"{metric} per polygon and date", units=stack.attrs.get("units", ""),
                               method="mean of the polygon's observed pixels (zone ids burnt once)")
    return table


def in_window(dates: pd.Series | pd.DatetimeIndex, window: Sequence[str] = ()) -> np.ndarray:
    """True for dates inside an inclusive month-day window ``("06-01", "09-15")`` (every date when empty)."""
    dates = pd.to_datetime(pd.Series(dates))
    if not window:
        return np.ones(len(dates), bool)
    (m0, d0), (m1, d1) = (tuple(int(v) for v in w.split("-")) for w in window)
    md = dates.dt.month * 100 + dates.dt.day
    return ((md >= m0 * 100 + d0) & (md <= m1 * 100 + d1)).to_numpy()


def annual_table(table: pd.DataFrame, *, how: str = "median", season: Sequence[str] = (),
                 min_observed: float = 0.5) -> pd.DataFrame:
    """One value per polygon, metric and year from a :func:`zonal_series` table.

    Only dates inside ``season`` (month-day window, inclusive) and with at least ``min_observed`` of the
    polygon observed count; ``how`` aggregates the rest.  Columns: ``polygon``, ``metric``, ``year``,
    ``value``, ``n_dates``.  The aggregation is recorded in ``attrs``.
    """
    if how not in AGGREGATES:
        raise MonitoringDesignError(f"aggregate {how!r} is not one of {', '.join(AGGREGATES)}; set "
                                    "monitor.aggregate to one of these")
    keep = in_window(table["date"], season) & (table["observed_share"].to_numpy() >= min_observed)
    kept = table[keep & np.isfinite(table["value"].to_numpy())].assign(year=lambda t: t["date"].dt.year)
    out = (kept.groupby(["polygon", "metric", "year"], sort=True)["value"].agg([how, "size"])
           .rename(columns={how: "value", "size": "n_dates"}).reset_index())
    window = f"{season[0]} to {season[1]}" if season else "every date"
    out.attrs = result_attrs(long_name="annual value per polygon", units=table.attrs.get("units", ""),
                             method=f"{how} of the dated values per year ({window}; dates with at least "
                                    f"{min_observed:.0%} of the polygon observed)",
                             parameters={"how": how, "season": list(season), "min_observed": min_observed})
    return out


def year_of(date: dt.date | str | pd.Timestamp) -> int:
    """The calendar year of a date given as a date, ISO string or timestamp."""
    return int(pd.Timestamp(date).year)
