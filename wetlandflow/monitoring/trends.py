"""Long-term trends of annual series: Mann-Kendall test, Sen's slope and false-discovery control.

A trend is tested per pixel on a ``(year, y, x)`` stack (lazily under dask, one numba kernel per pixel) or
per polygon on a long table, with the same kernel:

* the Mann-Kendall statistic S with its tie-corrected variance (Mann 1945; Kendall 1975);
* optionally Hamed & Rao's (1998) variance correction for serially correlated series;
* the Theil-Sen slope (Theil 1950; Sen 1968) with Sen's rank-based confidence interval and Conover's
  intercept;
* Benjamini-Hochberg (1995) q-values across the pixels of a map or the rows of a table, since thousands of
  tests at alpha = 0.05 flag hundreds of pixels on pure noise.

``annual_values`` turns dated values (scenes, per-date water maps) into the one-value-per-year series the
test expects; ``trend_series_figure`` and ``trend_map_figure`` draw the results.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import DataQualityError, MonitoringDesignError
from ..inputs.seasons import season_mask
from ._attrs import result_attrs
from ._trend_kernels import N_STATS, STATS, trend_block

MK_REFERENCE = ("Mann (1945) Econometrica 13; Kendall (1975) Rank Correlation Methods; Hamed & Rao (1998) "
                "A modified Mann-Kendall trend test for autocorrelated data, J. Hydrology 204")
SEN_REFERENCE = ("Theil (1950) Proc. KNAW 53; Sen (1968) Estimates of the regression coefficient based on "
                 "Kendall's tau, JASA 63; Conover (1980) Practical Nonparametric Statistics")
FDR_REFERENCES = {
    "bh": "Benjamini & Hochberg (1995) Controlling the false discovery rate, JRSS B 57",
    "by": ("Benjamini & Yekutieli (2001) The control of the false discovery rate under dependency, "
           "Ann. Stat. 29"),
}
AUTOCORRELATION = ("hamed_rao", "none")
HOW = ("median", "mean", "max", "min")
MIN_COUNT_FLOOR = 3  # Hamed & Rao's factor divides by n (n - 1) (n - 2)

# name -> (long name, units: "1", "x" for the series' units, "x/yr" for series units per year; method)
_DESCRIPTIONS = {
    "n": ("number of valid years in the series", "1", "count of finite values"),
    "s": ("Mann-Kendall statistic S", "1", "sum of sign(x_j - x_i) over pairs i < j"),
    "var_s": ("variance of S under no trend, tie-corrected", "1",
              "[n(n-1)(2n+5) - sum g(g-1)(2g+5)] / 18 over tie groups g"),
    "var_s_corrected": ("variance of S used for z", "1", "var_s times n/n* (Hamed & Rao 1998) or var_s"),
    "z": ("Mann-Kendall z score", "1", "(S - sign(S)) / sqrt(var_s_corrected)"),
    "p": ("two-sided p-value of the Mann-Kendall test", "1", "2 (1 - Phi(|z|))"),
    "tau": ("Mann-Kendall tau", "1", "S / (n (n - 1) / 2)"),
    "slope": ("Theil-Sen slope", "x/yr", "median of pairwise slopes (x_j - x_i) / (t_j - t_i)"),
    "slope_lo": ("lower confidence limit of the Theil-Sen slope", "x/yr",
                 "order statistic of the pairwise slopes, Sen (1968) eq. 2.6"),
    "slope_hi": ("upper confidence limit of the Theil-Sen slope", "x/yr",
                 "order statistic of the pairwise slopes, Sen (1968) eq. 2.6"),
    "intercept": ("intercept of the Theil-Sen line at the time origin", "x",
                  "median(x) - slope * median(t - origin) (Conover 1980)"),
}


# -- validation ---------------------------------------------------------------------------------------------
def _check_options(alpha: float, autocorrelation: str, lag: int | None, min_count: int) -> None:
    if not 0.0 < alpha < 1.0:
        raise MonitoringDesignError(f"alpha must lie strictly between 0 and 1, received {alpha!r}; "
                                    "pass e.g. alpha=0.05 for a 5 % two-sided test")
    if autocorrelation not in AUTOCORRELATION:
        raise MonitoringDesignError(f"autocorrelation must be one of {AUTOCORRELATION}, received "
                                    f"{autocorrelation!r}; use 'none' for the original Mann-Kendall test")
    if lag is not None and (isinstance(lag, bool) or not isinstance(lag, int | np.integer) or lag < 1):
        raise MonitoringDesignError(f"lag must be None (every lag) or a positive integer, received {lag!r}")
    if int(min_count) < MIN_COUNT_FLOOR:
        raise MonitoringDesignError(f"min_count must be at least {MIN_COUNT_FLOOR} (Hamed & Rao's correction "
                                    f"divides by n(n-1)(n-2)), received {min_count!r}")


def _time_axis(series: xr.DataArray, dim: str, min_count: int) -> xr.DataArray:
    """``series`` sorted along a numeric, duplicate-free ``dim`` with at least ``min_count`` positions."""
    if dim not in series.dims:
        raise MonitoringDesignError(f"the series has no dimension {dim!r}; its dimensions are {series.dims}. "
                                    "Pass dim= the name of the year dimension (annual_values makes 'year')")
    coord = series[dim].values
    if not np.issubdtype(coord.dtype, np.number):
        raise MonitoringDesignError(f"the {dim!r} coordinate must be numeric (years), received dtype "
                                    f"{coord.dtype}; aggregate dated values first with annual_values()")
    if np.unique(coord).size != coord.size:
        raise MonitoringDesignError(f"the {dim!r} coordinate repeats values ({coord.tolist()}); a trend "
                                    "needs one value per year: aggregate with annual_values() first")
    if coord.size < min_count:
        raise MonitoringDesignError(f"a trend test needs at least {min_count} years, the series has "
                                    f"{coord.size} along {dim!r}; use a longer series or lower min_count")
    return series if np.all(np.diff(coord) > 0) else series.sortby(dim)


# -- the kernel on blocks -----------------------------------------------------------------------------------
def _kernel_options(alpha: float, autocorrelation: str, lag: int | None, min_count: int) -> dict[str, Any]:
    from scipy.stats import norm

    return {"z_ci": float(norm.ppf(alpha / 2.0)), "z_crit": float(norm.ppf(1.0 - alpha / 2.0)),
            "max_lag": -1 if lag is None else int(lag), "hamed_rao": autocorrelation == "hamed_rao",
            "min_count": int(min_count)}


def _run_block(values: np.ndarray, t: np.ndarray, options: dict[str, Any]) -> np.ndarray:
    """``(..., n_times)`` -> ``(..., N_STATS)`` through the numba kernel (pixels flattened to rows)."""
    rows = np.ascontiguousarray(values.reshape(-1, values.shape[-1]), dtype=np.float64)
    out = trend_block(t, rows, options["z_ci"], options["z_crit"], options["max_lag"], options["hamed_rao"],
                      options["min_count"])
    return out.reshape(values.shape[:-1] + (N_STATS,))


def _variable_attrs(name: str, units: str, parameters: dict[str, Any]) -> dict[str, str]:
    long_name, unit_rule, method = _DESCRIPTIONS[name]
    series_units = units or "1"
    resolved = {"1": "1", "x": series_units, "x/yr": f"{series_units}/yr"}[unit_rule]
    reference = SEN_REFERENCE if name.startswith("slope") or name == "intercept" else MK_REFERENCE
    return result_attrs(long_name=long_name, units=resolved, method=method, reference=reference,
                        parameters=parameters)


def mann_kendall(series: xr.DataArray, *, dim: str = "year", alpha: float = 0.05,
                 autocorrelation: str = "hamed_rao", lag: int | None = None,
                 min_count: int = 4) -> xr.Dataset:
    """Mann-Kendall trend test and Theil-Sen slope of every series along ``dim``.

    Works on one series (1-D) or per pixel on a ``(dim, y, x)`` stack; under dask it stays lazy (``dim`` is
    brought into one chunk, the other dimensions keep their chunks).  Missing years (NaN) are dropped per
    pixel; the time of each value is the numeric coordinate of ``dim``, so gap years are honoured.

    Parameters
    ----------
    series : xarray.DataArray
        Annual values with a numeric, duplicate-free coordinate ``dim`` (years).
    dim : str
        The time dimension.
    alpha : float
        Level of the test: sets the (1 - alpha) confidence interval of the slope and, for Hamed-Rao, the
        band outside which an autocorrelation counts as significant.
    autocorrelation : {"hamed_rao", "none"}
        "hamed_rao" corrects var(S) for serial correlation (Hamed & Rao 1998); "none" is the original test.
    lag : int, optional
        Hamed-Rao only: use the first ``lag`` lags of the autocorrelation (None: every lag, as in
        pymannkendall).
    min_count : int
        Series with fewer valid years get NaN (``n`` is still reported).  With 4 years the smallest possible
        two-sided p is 0.089 (S = 6, z = 5 / sqrt(8.67)), so a trend can be significant at 0.05 from 5 years.

    Returns
    -------
    xarray.Dataset
        The dims of ``series`` without ``dim``; variables ``n`` (int32), ``s``, ``var_s``,
        ``var_s_corrected``, ``z``, ``p`` (two-sided), ``tau``, ``slope``, ``slope_lo``, ``slope_hi`` (series
        units per year) and ``intercept`` (series units, the Sen line at ``attrs["time_origin"]``, the first
        value of ``dim``), each with provenance attrs.

    Notes
    -----
    With ``autocorrelation="hamed_rao"`` the detrending uses the time coordinate, so with gap years the
    ranks may differ from pymannkendall, which counts positions after dropping missing values.  The slope's
    interval follows Sen (1968) under independence (as ``scipy.stats.theilslopes``), also with Hamed-Rao.
    Hamed & Rao's factor n/n* can come out negative (large negative rank autocorrelations, typically on short
    series); z and p are then NaN, as in pymannkendall, and ``var_s_corrected`` shows the negative value.

    References
    ----------
    Hamed, K.H. & Rao, A.R. (1998). A modified Mann-Kendall trend test for autocorrelated data. Journal of
    Hydrology 204, 182-196.  Sen, P.K. (1968). Estimates of the regression coefficient based on Kendall's
    tau. JASA 63, 1379-1389.

    Examples
    --------
    >>> import numpy as np, xarray as xr
    >>> s = xr.DataArray(np.arange(10.0), dims="year", coords={"year": np.arange(2001, 2011)})
    >>> float(mann_kendall(s)["slope"])
    1.0
    """
    _check_options(alpha, autocorrelation, lag, min_count)
    series = _time_axis(series, dim, int(min_count))
    if series.chunks is not None:
        series = series.chunk({dim: -1})
    coord = series[dim].values.astype(np.float64)
    t = coord - coord[0]
    options = _kernel_options(alpha, autocorrelation, lag, min_count)
    stats = xr.apply_ufunc(_run_block, series, kwargs={"t": t, "options": options},
                           input_core_dims=[[dim]], output_core_dims=[["trend_statistic"]],
                           dask="parallelized", output_dtypes=[np.float64],
                           dask_gufunc_kwargs={"output_sizes": {"trend_statistic": N_STATS}})
    parameters = {"dim": dim, "alpha": alpha, "autocorrelation": autocorrelation, "lag": lag,
                  "min_count": int(min_count), "time_origin": coord[0].item()}
    units = str(series.attrs.get("units", ""))
    ds = xr.Dataset({name: stats.isel(trend_statistic=i, drop=True) for i, name in enumerate(STATS)})
    ds["n"] = ds["n"].astype(np.int32)
    for name in STATS:
        ds[name].attrs = _variable_attrs(name, units, parameters)
    ds.attrs = {"time_origin": coord[0].item(), "first_year": coord[0].item(), "last_year": coord[-1].item(),
                "dim": dim, "alpha": alpha, "autocorrelation": autocorrelation}
    return ds


# -- false-discovery control --------------------------------------------------------------------------------
def _qvalues(p: np.ndarray, method: str) -> np.ndarray:
    """BH / BY q-values of the finite entries of ``p``; NaN stays NaN."""
    q = np.full(p.shape, np.nan)
    finite = np.isfinite(p)
    values = p[finite].astype(np.float64)
    if values.size == 0:
        return q
    if values.min() < 0.0 or values.max() > 1.0:
        raise DataQualityError(f"p-values must lie in [0, 1], received values from {values.min()} to "
                               f"{values.max()}; pass the 'p' variable of a trend test")
    m = values.size
    order = np.argsort(values)
    scaled = values[order] * m / np.arange(1, m + 1)
    if method == "by":
        scaled *= np.sum(1.0 / np.arange(1, m + 1))
    # the q-value of rank i is the smallest scaled p at ranks >= i (step-up procedure)
    adjusted = np.minimum(np.minimum.accumulate(scaled[::-1])[::-1], 1.0)
    out = np.empty(m)
    out[order] = adjusted
    q[finite] = out
    return q


def false_discovery(p: xr.DataArray, *, method: str = "bh") -> xr.DataArray:
    """Benjamini-Hochberg (or Benjamini-Yekutieli) q-values across every finite value of a p-value map.

    Parameters
    ----------
    p : xarray.DataArray
        p-values in [0, 1], any shape; NaN (no test) stays NaN and does not count as a test.
    method : {"bh", "by"}
        "bh": Benjamini & Hochberg (1995), for independent or positively dependent tests; "by": Benjamini &
        Yekutieli (2001), valid under any dependence, more conservative.

    Returns
    -------
    xarray.DataArray
        q-values on the grid of ``p`` (float64); lazy if ``p`` is (the map is ranked in one chunk).

    Examples
    --------
    >>> import numpy as np, xarray as xr
    >>> false_discovery(xr.DataArray([0.01, 0.04, np.nan, 0.03])).values.round(3).tolist()
    [0.03, 0.04, nan, 0.04]
    """
    if method not in FDR_REFERENCES:
        raise MonitoringDesignError(f"method must be one of {tuple(FDR_REFERENCES)}, received {method!r}")
    if p.chunks is None:
        data = _qvalues(np.asarray(p.values), method)
    else:  # ranking is global: one chunk for the ranking, the original chunks afterwards
        whole = p.data.rechunk(-1)
        data = whole.map_blocks(_qvalues, method, dtype=np.float64).rechunk(p.data.chunks)
    attrs = result_attrs(long_name="false-discovery-rate adjusted p-value (q-value)", units="1",
                         method=f"{method.upper()} step-up over the {p.name or 'p'} values of the map",
                         reference=FDR_REFERENCES[method], parameters={"method": method})
    return xr.DataArray(data, dims=p.dims, coords=p.coords, name="q", attrs=attrs)


# -- dated values to annual series --------------------------------------------------------------------------
def _season_dates(series: xr.DataArray, time_dim: str, season: tuple[str, str] | None) -> xr.DataArray:
    times = series[time_dim].values
    if not np.issubdtype(times.dtype, np.datetime64):
        raise MonitoringDesignError(f"the {time_dim!r} coordinate must hold dates (datetime64), received "
                                    f"dtype {times.dtype}; pass time_dim= the dated dimension")
    if season is None:
        return series
    start, end = season
    mask = season_mask(times, start, end)  # validates the 'MM-DD' strings
    if tuple(int(v) for v in start.split("-")) > tuple(int(v) for v in end.split("-")):
        raise MonitoringDesignError(f"season {season!r} wraps the year end, which annual_values does not "
                                    "support (a year's values would span two calendar years); pass a "
                                    "window with start <= end, e.g. ('05-01', '09-30')")
    if not mask.any():
        raise MonitoringDesignError(f"no date of the series falls in the season {season!r} (dates from "
                                    f"{times.min()} to {times.max()}); widen the window")
    return series.isel({time_dim: np.flatnonzero(mask)})


def annual_values(series: xr.DataArray, *, time_dim: str = "time", how: str = "median",
                  season: tuple[str, str] | None = None) -> xr.DataArray:
    """One value per year from dated values (per pixel), optionally only from the dates in a season.

    Parameters
    ----------
    series : xarray.DataArray
        Values with a datetime64 coordinate ``time_dim`` (e.g. per-date water maps ``(time, y, x)``).
    time_dim : str
        The dated dimension.
    how : {"median", "mean", "max", "min"}
        Aggregation of each year's dates; NaN dates are skipped per pixel (all NaN gives NaN).
    season : (str, str), optional
        Inclusive "MM-DD" window, e.g. ("05-01", "09-30"); it may not wrap the year end.

    Returns
    -------
    xarray.DataArray
        Dims ``("year", ...)`` with an int ``year`` coordinate (only years that have dates), a ``n_dates``
        coordinate along ``year`` (dates aggregated in each year), the units of ``series`` and provenance
        attrs (``method``, ``parameters`` with ``how`` and ``season``).  Lazy under dask.

    Examples
    --------
    >>> import numpy as np, pandas as pd, xarray as xr
    >>> t = pd.to_datetime(["2020-03-01", "2020-07-01", "2021-03-01", "2021-07-01"])
    >>> annual_values(xr.DataArray([1.0, 2, 3, 5], dims="time", coords={"time": t})).values.tolist()
    [1.5, 4.0]
    """
    if how not in HOW:
        raise MonitoringDesignError(f"how must be one of {HOW}, received {how!r}")
    if time_dim not in series.dims:
        raise MonitoringDesignError(f"the series has no dimension {time_dim!r}; its dimensions are "
                                    f"{series.dims}. Pass time_dim= the dated dimension")
    selected = _season_dates(series, time_dim, season)
    if selected.chunks is not None and how == "median":
        selected = selected.chunk({time_dim: -1})  # a median needs each pixel's dates in one chunk
    years = selected[time_dim].dt.year.rename("year")
    reduced = getattr(selected.groupby(years), how)(dim=time_dim, skipna=True)
    counts = years.groupby(years).count()
    out = reduced.transpose("year", ...).assign_coords(
        year=reduced["year"].values.astype(np.int64), n_dates=("year", counts.values.astype(np.int64)))
    units = str(series.attrs.get("units", "1"))
    out.attrs = result_attrs(long_name=f"annual {how} of {series.name or 'values'}", units=units,
                             method=f"{how} of each calendar year's dates"
                                    + (f" from {season[0]} to {season[1]}" if season else ""),
                             parameters={"how": how, "season": list(season) if season else None,
                                         "time_dim": time_dim})
    return out.rename(series.name)


# -- polygons -----------------------------------------------------------------------------------------------
def _year_matrix(table: pd.DataFrame, id_col: str, year_col: str, column: str, years: np.ndarray
                 ) -> pd.DataFrame:
    """(polygon, year) matrix of one metric on the full year axis, NaN where a polygon lacks a year."""
    return table.pivot(index=id_col, columns=year_col, values=column).reindex(columns=years).astype(float)


def _check_table(table: pd.DataFrame, id_col: str, year_col: str, value_cols: Sequence[str]) -> None:
    missing = [c for c in [id_col, year_col, *value_cols] if c not in table.columns]
    if missing:
        raise MonitoringDesignError(f"the table lacks the columns {missing}; it has {list(table.columns)}. "
                                    "Pass id_col=, year_col= and value_cols= naming existing columns")
    if not value_cols:
        raise MonitoringDesignError("value_cols is empty; name at least one metric column to test")
    duplicated = table.duplicated([id_col, year_col])
    if duplicated.any():
        first = table.loc[duplicated, [id_col, year_col]].iloc[0].tolist()
        raise DataQualityError(f"{int(duplicated.sum())} rows repeat a (polygon, year) pair, first {first}; "
                               "a trend needs one value per polygon and year: aggregate first "
                               "(e.g. table.groupby([id_col, year_col]).median())")


def _span(matrix: np.ndarray, years: np.ndarray) -> tuple[Any, Any]:
    """First and last year with a finite value, per row (missing where a row has none)."""
    finite = np.isfinite(matrix)
    has = finite.any(axis=1)
    first = np.where(has, years[np.argmax(finite, axis=1)], 0)
    last = np.where(has, years[matrix.shape[1] - 1 - np.argmax(finite[:, ::-1], axis=1)], 0)
    return (pd.Series(first).astype("Int64").where(has).to_numpy(),
            pd.Series(last).astype("Int64").where(has).to_numpy())


def polygon_trends(table: pd.DataFrame, *, id_col: str, year_col: str = "year", value_cols: Sequence[str],
                   alpha: float = 0.05, autocorrelation: str = "hamed_rao", lag: int | None = None,
                   min_count: int = 4) -> pd.DataFrame:
    """Mann-Kendall test and Sen slope per polygon and metric of a long table, with BH q-values.

    Parameters
    ----------
    table : pandas.DataFrame
        One row per polygon and year: ``id_col``, ``year_col`` and the metric columns.
    id_col, year_col : str
        Polygon id and year columns; a (polygon, year) pair may occur once.
    value_cols : sequence of str
        Metric columns, each tested separately.
    alpha, autocorrelation, lag, min_count
        As in :func:`mann_kendall`.

    Returns
    -------
    pandas.DataFrame
        One row per polygon and metric: ``id_col``, ``metric``, ``n``, ``s``, ``z``, ``p``, ``q`` (BH across
        all rows), ``tau``, ``slope``, ``slope_lo``, ``slope_hi`` (per year), ``intercept`` (the Sen line at
        ``attrs["time_origin"]``, the table's first year), ``first_year``, ``last_year`` (of the valid
        values).
        ``attrs["columns"]`` holds each statistic's provenance attrs.

    Examples
    --------
    >>> import pandas as pd
    >>> t = pd.DataFrame({"pid": [1] * 6, "year": range(2001, 2007), "area": [1.0, 2, 3, 5, 4, 6]})
    >>> polygon_trends(t, id_col="pid", value_cols=["area"])["slope"].tolist()
    [1.0]
    """
    _check_options(alpha, autocorrelation, lag, min_count)
    _check_table(table, id_col, year_col, value_cols)
    years = np.sort(pd.unique(table[year_col]))
    if years.size < min_count:
        raise MonitoringDesignError(f"a trend test needs at least {min_count} years, the table has "
                                    f"{years.size} ({years.tolist()}); use a longer series or lower "
                                    "min_count")
    t = years.astype(np.float64) - float(years[0])
    options = _kernel_options(alpha, autocorrelation, lag, min_count)
    parts = []
    for column in value_cols:  # a loop over metrics; the polygons of one metric go through the kernel at once
        matrix = _year_matrix(table, id_col, year_col, column, years)
        stats = pd.DataFrame(_run_block(matrix.to_numpy(), t, options), columns=list(STATS))
        first, last = _span(matrix.to_numpy(), years)
        stats.insert(0, "metric", column)
        stats.insert(0, id_col, matrix.index.to_numpy())
        parts.append(stats.assign(first_year=first, last_year=last))
    out = pd.concat(parts, ignore_index=True)
    out["n"] = out["n"].astype(np.int64)
    out["q"] = _qvalues(out["p"].to_numpy(), "bh")
    columns = [id_col, "metric", "n", "s", "z", "p", "q", "tau", "slope", "slope_lo", "slope_hi", "intercept",
               "first_year", "last_year"]
    out = out[columns]
    parameters = {"alpha": alpha, "autocorrelation": autocorrelation, "lag": lag, "min_count": int(min_count),
                  "time_origin": years[0].item()}
    column_attrs = {name: _variable_attrs(name, "", parameters) for name in STATS if name in columns}
    out.attrs = {"time_origin": years[0].item(), "alpha": alpha, "autocorrelation": autocorrelation,
                 "columns": column_attrs}
    out.attrs["columns"]["q"] = result_attrs(long_name="Benjamini-Hochberg q-value across the table's rows",
                                             units="1", method="BH step-up", reference=FDR_REFERENCES["bh"])
    return out


# -- figures ------------------------------------------------------------------------------------------------
def _as_xy(series: pd.Series | xr.DataArray) -> tuple[np.ndarray, np.ndarray, str]:
    if isinstance(series, xr.DataArray):
        if series.ndim != 1:
            raise MonitoringDesignError(f"trend_series_figure draws one series, received dims {series.dims}; "
                                        "select one pixel or polygon first")
        dim = series.dims[0]
        return (np.asarray(series[dim].values, float), np.asarray(series.values, float),
                str(series.attrs.get("units", "")))
    return np.asarray(series.index, float), np.asarray(series.to_numpy(), float), ""


def _scalar(result: xr.Dataset | Mapping[str, Any], name: str) -> float:
    value = result[name]
    return float(value.values) if isinstance(value, xr.DataArray) else float(value)


def trend_series_figure(series: pd.Series | xr.DataArray, result: xr.Dataset | Mapping[str, Any], *,
                        title: str = ""):
    """The annual values, the Sen line and the band of lines between the slope's confidence limits.

    Parameters
    ----------
    series : pandas.Series or xarray.DataArray
        The tested series (index or coordinate: years).
    result : xarray.Dataset or mapping
        Its trend statistics: a 1-D series' :func:`mann_kendall` result or a row of :func:`polygon_trends`.
    title : str
        Figure title.

    Returns
    -------
    matplotlib.figure.Figure

    Examples
    --------
    >>> import numpy as np, xarray as xr
    >>> s = xr.DataArray(np.arange(8.0), dims="year", coords={"year": np.arange(2001, 2009)})
    >>> fig = trend_series_figure(s, mann_kendall(s))
    """
    from matplotlib.figure import Figure

    t, x, units = _as_xy(series)
    valid = np.isfinite(x)
    slope, lo, hi = (_scalar(result, k) for k in ("slope", "slope_lo", "slope_hi"))
    # Conover's line passes through (median t, median x): the CI band pivots on that point
    t0, x0 = np.median(t[valid]), np.median(x[valid])
    grid = np.linspace(t.min(), t.max(), 50)
    fig = Figure(figsize=(6.5, 3.8), layout="constrained")
    ax = fig.add_subplot()
    ax.plot(t[valid], x[valid], "o", color="0.25", label="annual value")
    if math.isfinite(lo) and math.isfinite(hi):
        a, b = x0 + lo * (grid - t0), x0 + hi * (grid - t0)
        ax.fill_between(grid, np.minimum(a, b), np.maximum(a, b), color="tab:blue", alpha=0.2,
                        label=f"slopes {lo:.3g} to {hi:.3g}")
    if math.isfinite(slope):
        per = f" {units}/yr" if units else " /yr"
        ax.plot(grid, x0 + slope * (grid - t0), color="tab:blue",
                label=f"Sen slope {slope:.3g}{per}, p = {_scalar(result, 'p'):.3g}")
    ax.set_xlabel("year")
    ax.set_ylabel(units or "value")
    ax.set_title(title)
    ax.legend(loc="best", fontsize="small")
    return fig


def trend_map_figure(ds: xr.Dataset, *, q_max: float = 0.05):
    """Map of the Sen slope; pixels whose trend is not significant (q > q_max) are grey.

    Parameters
    ----------
    ds : xarray.Dataset
        A 2-D :func:`mann_kendall` result; its ``q`` variable is used if present, else BH q-values are
        computed from ``p``.
    q_max : float
        False-discovery level below which a pixel's trend is shown in colour.

    Returns
    -------
    matplotlib.figure.Figure

    Examples
    --------
    >>> import numpy as np, xarray as xr
    >>> stack = xr.DataArray(np.random.default_rng(0).normal(size=(8, 4, 5)), dims=("year", "y", "x"),
    ...                      coords={"year": np.arange(2001, 2009)})
    >>> fig = trend_map_figure(mann_kendall(stack))
    """
    from matplotlib.colors import ListedColormap
    from matplotlib.figure import Figure
    from matplotlib.patches import Patch

    slope = ds["slope"]
    if slope.ndim != 2:
        raise MonitoringDesignError(f"trend_map_figure draws a 2-D map, the slope has dims {slope.dims}")
    q = ds["q"] if "q" in ds else false_discovery(ds["p"])
    values, qv = np.asarray(slope.values, float), np.asarray(q.values, float)
    significant = np.isfinite(values) & (qv <= q_max)
    limit = float(np.nanmax(np.abs(values[significant]))) if significant.any() else 1.0
    fig = Figure(figsize=(6.5, 5.0), layout="constrained")
    ax = fig.add_subplot()
    grey = np.where(np.isfinite(values) & ~significant, 1.0, np.nan)
    ax.imshow(grey, cmap=ListedColormap(["0.75"]), interpolation="nearest")
    image = ax.imshow(np.where(significant, values, np.nan), cmap="RdBu", vmin=-limit, vmax=limit,
                      interpolation="nearest")
    fig.colorbar(image, ax=ax, label=f"Sen slope ({slope.attrs.get('units', '1/yr')})")
    ax.legend(handles=[Patch(color="0.75", label=f"not significant (q > {q_max:g})")], loc="lower right",
              fontsize="small")
    n_valid = int(np.isfinite(values).sum())
    ax.set_title(f"Trend, {int(significant.sum())} of {n_valid} pixels at q <= {q_max:g}")
    ax.set_axis_off()
    return fig
