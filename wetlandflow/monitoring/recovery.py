"""Recovery of a disturbed patch from an annual series of one metric (NDVI, NBR, water share ...).

With ``V_y`` the value in year ``y``, ``y0`` the disturbance year and ``m = post_years`` (5 as published):

* baseline ``B`` = mean of ``V`` over the ``pre_years`` years before ``y0`` (two as published: White et
  al. 2017 and Frazier et al. 2018 take the mean of the two years before the disturbance);
* disturbance magnitude = ``B - V_y0`` (positive for a drop);
* RRI, the relative recovery indicator of Kennedy et al. (2012) in the short-term form of Frazier et al.
  (2018): ``(max(V_{y0+m-1}, V_{y0+m}) - V_y0) / (V_{y0-1} - V_y0)``, the regrowth by years 4-5 relative
  to the drop from the year before;
* R80P (Frazier et al. 2018): ``max(V_{y0+m-1}, V_{y0+m}) / (0.8 B)``; 1 or more means the patch is back
  to 80 % of its baseline;
* YrYr (Frazier et al. 2018): ``(V_{y0+m} - V_y0) / m``, the mean annual change over the first m years;
* years to recovery (White et al. 2017): years from ``y0`` until ``V`` first reaches ``0.8 B``.

Metrics that need a year the series does not have are NaN and ``reason`` says why.  The metrics assume the
disturbance lowers the value and the baseline is positive (R80P and the 80 % threshold are ratios).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import MonitoringDesignError, ParameterError
from ._attrs import result_attrs
from .changepoint import pettitt

__all__ = ["recovery_metrics", "detect_disturbance", "recovery_table", "recovery_figure"]

RECOVERY_SHARE = 0.8
_REFERENCES = (
    "Kennedy, R. E., Yang, Z., Cohen, W. B., Pfaff, E., Braaten, J. & Nelson, P. (2012). Spatial and "
    "temporal patterns of forest disturbance and regrowth within the area of the Northwest Forest Plan. "
    "Remote Sensing of Environment, 122, 117-133; Frazier, R. J., Coops, N. C., Wulder, M. A., Hermosilla, "
    "T. & White, J. C. (2018). Analyzing spatial and temporal variability in short-term rates of post-fire "
    "vegetation return from Landsat time series. Remote Sensing of Environment, 205, 32-45; White, J. C., "
    "Wulder, M. A., Hermosilla, T., Coops, N. C. & Hobart, G. W. (2017). A nationwide annual "
    "characterization of 25 years of forest disturbance and recovery for Canada using Landsat time series. "
    "Remote Sensing of Environment, 194, 303-321.")
METRIC_KEYS = ["disturbance_year", "baseline", "disturbance_value", "magnitude", "rri", "r80p", "yryr",
               "years_to_recovery", "recovered_year", "reason"]


def _annual(series: pd.Series) -> pd.Series:
    """The series indexed by integer year, NaN dropped (a date index is reduced to its year)."""
    values = series.dropna()
    index = values.index.year if isinstance(values.index, pd.DatetimeIndex) else values.index
    if pd.Index(index).has_duplicates:
        duplicated = sorted(set(index[pd.Index(index).duplicated()]))[:5]
        raise ParameterError(
            "recovery: the series has more than one value in a year; received duplicated years "
            f"{duplicated}. Expected one value per year. Fix: aggregate to annual values first "
            "(e.g. series.groupby(series.index.year).median()).")
    return pd.Series(values.to_numpy(float), index=np.asarray(index, dtype=int)).sort_index()


def _baseline(v: pd.Series, y0: int, pre_years: int) -> tuple[float, list[str]]:
    pre = v[(v.index >= y0 - pre_years) & (v.index < y0)]
    if pre.empty:
        raise MonitoringDesignError(
            f"recovery: no value in the {pre_years} years before the disturbance year {y0}; received years "
            f"{v.index.min()}-{v.index.max()}. Expected at least one year (as published, {pre_years}) "
            "before the disturbance for a baseline. Fix: extend the series back or check the disturbance "
            "year.")
    short = len(pre) < pre_years
    notes = [f"baseline from {len(pre)} of {pre_years} pre-disturbance years"] if short else []
    return float(pre.mean()), notes


def _short_term(v: pd.Series, y0: int, post_years: int,
                baseline: float) -> tuple[dict[str, float], list[str]]:
    """RRI, R80P and YrYr of Frazier et al. (2018), NaN with a reason where a year is missing."""
    needed = [y0 + post_years - 1, y0 + post_years]
    if not all(year in v.index for year in needed):
        return ({"rri": np.nan, "r80p": np.nan, "yryr": np.nan},
                [f"no value in year {' or '.join(str(y) for y in needed if y not in v.index)} "
                 f"({post_years} years after the disturbance): RRI, R80P and YrYr undefined"])
    late, v0, notes = max(v[needed[0]], v[needed[1]]), v[y0], []
    drop = v.get(y0 - 1, np.nan) - v0
    if not np.isfinite(drop) or drop == 0:
        notes.append(f"no drop from {y0 - 1} to {y0}: RRI undefined")
    rri = (late - v0) / drop if np.isfinite(drop) and drop != 0 else np.nan
    r80p = late / (RECOVERY_SHARE * baseline) if baseline > 0 else np.nan
    return {"rri": float(rri), "r80p": float(r80p), "yryr": float((v[needed[1]] - v0) / post_years)}, notes


def _years_to_recovery(v: pd.Series, y0: int, baseline: float) -> tuple[float, float, list[str]]:
    after = v[v.index > y0]
    reached = after[after >= RECOVERY_SHARE * baseline]
    if reached.empty:
        last = after.index.max() if not after.empty else y0
        return np.nan, np.nan, [f"not back to 80 % of the baseline by {last}"]
    year = int(reached.index[0])
    return float(year - y0), float(year), []


def recovery_metrics(series: pd.Series, disturbance_year: int, *, pre_years: int = 2,
                     post_years: int = 5) -> dict[str, Any]:
    """Baseline, disturbance magnitude, RRI, R80P, YrYr and years to recovery of an annual series.

    Parameters
    ----------
    series : pandas.Series
        One value per year, indexed by year (int) or by date (reduced to its year).  NaN is dropped.
    disturbance_year : int
        The year of the disturbance (the first year at the lowered level).
    pre_years : int
        Years before the disturbance averaged into the baseline (2 as in White et al. 2017 and Frazier et
        al. 2018).
    post_years : int
        ``m`` of the short-term metrics (5 as in Frazier et al. 2018: years 4 and 5 after the disturbance).

    Returns
    -------
    dict
        ``disturbance_year``, ``baseline``, ``disturbance_value``, ``magnitude`` (baseline minus the
        disturbance value, metric units), ``rri`` (1), ``r80p`` (1), ``yryr`` (metric units per year),
        ``years_to_recovery`` (years), ``recovered_year`` and ``reason`` ("" when every metric is defined).

    Raises
    ------
    MonitoringDesignError
        No value before the disturbance or none in the disturbance year.

    References
    ----------
    Kennedy et al. (2012), Remote Sensing of Environment 122; Frazier et al. (2018), Remote Sensing of
    Environment 205; White et al. (2017), Remote Sensing of Environment 194.

    Examples
    --------
    >>> import pandas as pd
    >>> s = pd.Series([0.8, 0.8, 0.2, 0.4, 0.5, 0.6, 0.7, 0.7], index=range(2000, 2008))
    >>> m = recovery_metrics(s, 2002)
    >>> m["years_to_recovery"], round(m["r80p"], 2), round(m["rri"], 2), round(m["yryr"], 2)
    (4.0, 1.09, 0.83, 0.1)
    """
    if pre_years < 1 or post_years < 1:
        raise ParameterError(f"recovery_metrics: pre_years={pre_years} and post_years={post_years}; expected "
                             "both >= 1 (2 and 5 as published).")
    v, y0 = _annual(series), int(disturbance_year)
    if y0 not in v.index:
        raise MonitoringDesignError(
            f"recovery: no value in the disturbance year {y0}; received years "
            f"{v.index.min()}-{v.index.max()} without {y0}; expected a value in the disturbance year. "
            "Fix: check the year or fill the gap before computing recovery.")
    baseline, notes = _baseline(v, y0, pre_years)
    short, more = _short_term(v, y0, post_years, baseline)
    years, recovered, last = _years_to_recovery(v, y0, baseline)
    return {"disturbance_year": y0, "baseline": baseline, "disturbance_value": float(v[y0]),
            "magnitude": baseline - float(v[y0]), **short, "years_to_recovery": years,
            "recovered_year": recovered, "reason": "; ".join(notes + more + last)}


def detect_disturbance(series: pd.Series, *, alpha: float = 0.05) -> int | None:
    """The disturbance year of the largest downward change found by Pettitt's test, or None.

    Parameters
    ----------
    series : pandas.Series
        One value per year (index: year or date).
    alpha : float
        Significance level of the Pettitt test.

    Returns
    -------
    int or None
        The first year after the change point (the first year at the lowered level); None when the
        change is not significant at ``alpha`` or goes upward.

    Notes
    -----
    Pettitt's test looks for one persistent shift in the median.  A drop followed by a recovery that
    fills most of the years after it is not such a shift and may go undetected (None); give the year
    from records in that case.

    Examples
    --------
    >>> import pandas as pd
    >>> values = [0.8, 0.82, 0.79, 0.81, 0.8, 0.3, 0.32, 0.35, 0.31, 0.33, 0.34, 0.3]
    >>> s = pd.Series(values, index=range(2000, 2012))
    >>> detect_disturbance(s)
    2005
    """
    v = _annual(series)
    result = pettitt(xr.DataArray(v.to_numpy(), dims="year", coords={"year": v.index}), dim="year")
    if not (float(result["p"]) < alpha and float(result["shift"]) < 0):
        return None
    return int(v.index[int(result["change_index"]) + 1])


def _table_row(polygon: pd.Series, year: int | None, pre_years: int, post_years: int) -> dict[str, Any]:
    if year is None:
        return {"disturbance_year": np.nan, "reason": "no significant downward change (Pettitt)"}
    try:
        return recovery_metrics(polygon, year, pre_years=pre_years, post_years=post_years)
    except MonitoringDesignError as error:  # one polygon's design problem is reported on its row
        return {"disturbance_year": year, "reason": str(error)}


def recovery_table(table: pd.DataFrame, *, id_col: str, year_col: str, metric: str,
                   disturbance: Mapping[str, int | None], pre_years: int = 2, post_years: int = 5,
                   alpha: float = 0.05) -> pd.DataFrame:
    """Recovery metrics per polygon of a long per-polygon, per-year table.

    Parameters
    ----------
    table : pandas.DataFrame
        Long table with ``id_col``, ``year_col`` and ``metric``.
    id_col, year_col, metric : str
        Column names.
    disturbance : mapping
        Polygon id -> disturbance year, or None to detect it with :func:`detect_disturbance`.
    pre_years, post_years, alpha : see :func:`recovery_metrics` and :func:`detect_disturbance`.

    Returns
    -------
    pandas.DataFrame
        One row per polygon of ``disturbance``: ``id_col``, ``source`` ("given" or "detected"), then the
        keys of :func:`recovery_metrics`; a polygon whose design fails has NaN metrics and the message in
        ``reason``.  ``attrs`` from ``result_attrs``.

    Examples
    --------
    >>> import pandas as pd
    >>> t = pd.DataFrame({"id": "p1", "year": range(2000, 2010),
    ...                   "ndvi": [0.8, 0.8, 0.2, 0.4, 0.5, 0.6, 0.7, 0.8, 0.8, 0.8]})
    >>> rows = recovery_table(t, id_col="id", year_col="year", metric="ndvi", disturbance={"p1": 2002})
    >>> rows["source"].iloc[0], float(rows["years_to_recovery"].iloc[0])
    ('given', 4.0)
    """
    rows = []
    for polygon_id, year in disturbance.items():
        polygon = table.loc[table[id_col] == polygon_id].set_index(year_col)[metric]
        source = "given" if year is not None else "detected"
        year = year if year is not None else detect_disturbance(polygon, alpha=alpha)
        rows.append({id_col: polygon_id, "source": source,
                     **_table_row(polygon, year, pre_years, post_years)})
    out = pd.DataFrame(rows).reindex(columns=[id_col, "source", *METRIC_KEYS])
    out.attrs = result_attrs(long_name=f"recovery of {metric} after disturbance", units="see column docs",
                             method="baseline, RRI, R80P, YrYr, years to 80 % of baseline",
                             reference=_REFERENCES,
                             parameters={"pre_years": pre_years, "post_years": post_years, "alpha": alpha})
    return out


def recovery_figure(series: pd.Series, metrics: Mapping[str, Any], *, title: str = ""):
    """The annual curve with its baseline, the 80 % line, the disturbance and the recovery year.

    Parameters
    ----------
    series : pandas.Series
        The annual series given to :func:`recovery_metrics`.
    metrics : mapping
        Its result.
    title : str
        Figure title.

    Returns
    -------
    matplotlib.figure.Figure

    Examples
    --------
    >>> import pandas as pd
    >>> s = pd.Series([0.8, 0.8, 0.2, 0.4, 0.5, 0.6, 0.7, 0.8], index=range(2000, 2008))
    >>> fig = recovery_figure(s, recovery_metrics(s, 2002), title="patch 1")
    """
    import matplotlib.pyplot as plt

    v = _annual(series)
    fig, ax = plt.subplots(figsize=(7, 3.5))
    ax.plot(v.index, v.to_numpy(), "o-", color="C0", label="value")
    ax.axhline(metrics["baseline"], color="C2", label="pre-disturbance baseline")
    ax.axhline(RECOVERY_SHARE * metrics["baseline"], color="C2", linestyle="--", label="80 % of baseline")
    ax.axvline(metrics["disturbance_year"], color="C3", linestyle=":", label="disturbance")
    if np.isfinite(metrics.get("recovered_year", np.nan)):
        ax.axvline(metrics["recovered_year"], color="C1", linestyle="-.", label="back to 80 %")
    ax.set_xlabel("year")
    ax.set_title(title)
    ax.legend(loc="best", fontsize="small")
    fig.tight_layout()
    return fig
