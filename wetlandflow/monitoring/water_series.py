"""Surface water through time: per-date water maps from SAR or optical scenes, their frequency, hydroperiod.

The per-date maps are ``(time, y, x)`` float32 with 1 water, 0 dry and NaN no data (clouds, SAR border),
so every later statistic counts valid observations only.  Thresholds are global per date: they are
computed at call time on a strided subsample (one date in memory at a time), the maps stay lazy.  The split
threshold is in :mod:`.water_threshold`, the area per polygon in :mod:`.water_area`, the store that appends
dates without recomputing the others in :mod:`.water_store`, the figures in :mod:`.water_figures`.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

import numpy as np
import xarray as xr

from ..errors import DataQualityError, ParameterError
from ..features._kernels import raw_db
from ..features.water import _require_pol_stack, otsu_threshold
from ._attrs import result_attrs
from ._periods import Period, periods
from .water_threshold import MARTINIS_2009, OTSU_1979, _split_info, _warn_fallback

__all__ = [
    "hydroperiod_days",
    "optical_water",
    "sar_water",
    "water_frequency",
]

XU_2006 = (
    "Xu, H. (2006). Modification of normalised difference water index (NDWI) to enhance open water "
    "features in remotely sensed imagery. International Journal of Remote Sensing 27(14), 3025-3033"
)


# -- per-date water maps -------------------------------------------------------------------------------------
def _subsample_step(da: xr.DataArray, max_pixels: int) -> int:
    return max(1, int(np.ceil(np.sqrt(da.sizes["y"] * da.sizes["x"] / max_pixels))))


def _per_date(
    sample: xr.DataArray, rule: Callable[[np.ndarray, str], dict[str, Any]]
) -> list[dict[str, Any]]:
    """``rule`` applied to each date of a (time, y, x) sample, one date in memory at a time."""
    return [
        rule(np.asarray(sample.isel(time=i).values), str(sample["time"].values[i])[:10])
        for i in range(sample.sizes["time"])
    ]


def _sar_rule(threshold: str | float, tile_px: int, kwargs: dict[str, Any]) -> Callable[..., dict[str, Any]]:
    def rule(img: np.ndarray, date: str) -> dict[str, Any]:
        if not np.isfinite(img).any():
            return {"threshold": np.nan, "method": "no_data", "tiles_kept": 0}
        if threshold == "otsu":
            return {
                "threshold": otsu_threshold(img, kwargs.get("nbins", 256)),
                "method": "otsu",
                "tiles_kept": 0,
            }
        if threshold != "split":
            return {"threshold": float(threshold), "method": "fixed", "tiles_kept": 0}
        info = _split_info(
            img,
            tile_px,
            kwargs.get("min_ashman_d", 2.0),
            kwargs.get("min_share", 0.1),
            kwargs.get("nbins", 256),
        )
        if info["method"] != "split":
            _warn_fallback(info, f"date {date}")
        return info

    return rule


def _check_threshold(threshold: str | float, allowed: tuple[str, ...]) -> None:
    if isinstance(threshold, str) and threshold not in allowed:
        raise ParameterError(f"threshold must be one of {allowed} or a number; received {threshold!r}.")


def sar_water(
    stack: xr.DataArray,
    *,
    pol: str = "VV",
    threshold: str | float = "split",
    max_pixels: int = 4_000_000,
    **kwargs: Any,
) -> xr.DataArray:
    """Open water per date from SAR backscatter: ``dB <= threshold`` with a threshold per date.

    ``threshold="split"`` uses :func:`split_threshold` (Martinis et al. 2009) on each date, ``"otsu"`` the
    scene's Otsu threshold, a number a fixed threshold in dB.  Thresholds are computed at call time on a
    strided subsample of at most ``max_pixels`` pixels per date; tiles keep their ground size on the
    subsample (``tile_px // step`` subsample pixels, at least 16).  The maps stay lazy.

    Parameters
    ----------
    stack : xarray.DataArray
        SAR stack ``("time", "pol", "y", "x")`` in linear power.
    pol : str
        Polarisation to threshold.
    threshold : {"split", "otsu"} or float
        Threshold rule.
    max_pixels : int
        Pixels sampled per date for the thresholds.
    **kwargs
        ``tile_px``, ``min_ashman_d``, ``min_share``, ``nbins`` for :func:`split_threshold`.

    Returns
    -------
    xarray.DataArray
        ``water``, float32 ``(time, y, x)``: 1 water, 0 dry, NaN no data.  Coordinates along time:
        ``threshold_db``, ``threshold_method`` ("split", "scene_otsu_fallback", "otsu", "fixed",
        "no_data") and ``tiles_kept``.  attrs from ``result_attrs``; ``fallback_dates`` lists the dates
        whose split threshold fell back to the scene Otsu.

    Examples
    --------
    >>> import pandas as pd
    >>> rng = np.random.default_rng(0)
    >>> db = rng.normal(-8, 1, (2, 1, 128, 128))
    >>> db[:, :, :32, :32] = -20
    >>> stack = xr.DataArray(10 ** (db / 10), dims=("time", "pol", "y", "x"),
    ...                      coords={"time": pd.date_range("2024-01-01", periods=2), "pol": ["VV"]})
    >>> float(sar_water(stack).isel(time=0)[:32, :32].mean())
    1.0
    """
    _check_threshold(threshold, ("split", "otsu"))
    unknown = set(kwargs) - {"tile_px", "min_ashman_d", "min_share", "nbins"}
    if unknown:
        raise ParameterError(
            f"sar_water got unknown options {sorted(unknown)}; allowed: tile_px, "
            "min_ashman_d, min_share, nbins."
        )
    _require_pol_stack(stack, pol)
    db = raw_db(stack.sel(pol=pol, drop=True))
    step = _subsample_step(db, max_pixels)
    tile_px = max(16, kwargs.get("tile_px", 64) // step)
    infos = _per_date(
        db.isel(y=slice(None, None, step), x=slice(None, None, step)), _sar_rule(threshold, tile_px, kwargs)
    )
    thr = xr.DataArray(np.array([i["threshold"] for i in infos], dtype=np.float32), dims="time")
    water = (db <= thr).astype(np.float32).where(db.notnull() & thr.notnull())
    water = water.assign_coords(
        threshold_db=("time", thr.values.astype(np.float64)),
        threshold_method=("time", [i["method"] for i in infos]),
        tiles_kept=("time", [i["tiles_kept"] for i in infos]),
    )
    fallback = [
        str(t)[:10]
        for t, i in zip(db["time"].values, infos, strict=True)
        if i["method"] == "scene_otsu_fallback"
    ]
    out = water.transpose("time", "y", "x").rename("water")
    out.attrs = result_attrs(
        long_name=f"Open water (1) per date from {pol} backscatter",
        units="1",
        method=f"{pol} dB <= per-date threshold ({threshold})",
        reference=MARTINIS_2009 if threshold == "split" else (OTSU_1979 if threshold == "otsu" else ""),
        parameters={
            "pol": pol,
            "threshold": threshold,
            "max_pixels": max_pixels,
            "subsample_step": step,
            **kwargs,
        },
    )
    out.attrs["fallback_dates"] = ", ".join(fallback)
    return out


def optical_water(
    mndwi: xr.DataArray,
    *,
    threshold: str | float = "otsu",
    valid: xr.DataArray | None = None,
    max_pixels: int = 4_000_000,
) -> xr.DataArray:
    """Open water per date from MNDWI (Xu 2006): ``MNDWI > threshold``; NaN where clouded or invalid.

    Parameters
    ----------
    mndwi : xarray.DataArray
        ``(time, y, x)`` MNDWI = (green - SWIR) / (green + SWIR); NaN is no data.
    threshold : "otsu" or float
        Otsu per date (on a strided subsample of the valid pixels) or a fixed value (0 is the usual
        choice, common practice, no source).
    valid : xarray.DataArray, optional
        Boolean, ``(time, y, x)`` or ``(y, x)``: False where clouds, shadows or other invalid pixels are.
    max_pixels : int
        Pixels sampled per date for the Otsu thresholds.

    Returns
    -------
    xarray.DataArray
        ``water``, float32 ``(time, y, x)``: 1 water, 0 dry, NaN no data; coordinate ``threshold`` along
        time (NaN for a date without a valid pixel); lazy.

    Examples
    --------
    >>> import pandas as pd
    >>> m = np.full((2, 8, 8), -0.4)
    >>> m[:, :3] = 0.5
    >>> da = xr.DataArray(m, dims=("time", "y", "x"), coords={"time": pd.date_range("2024-05-01", periods=2)})
    >>> int(optical_water(da).isel(time=0).sum())
    24
    """
    _check_threshold(threshold, ("otsu",))
    if set(mndwi.dims) != {"time", "y", "x"}:
        raise DataQualityError(
            f"optical_water expects MNDWI with dims (time, y, x); received {mndwi.dims}. "
            "Select one index and transpose to (time, y, x)."
        )
    index = mndwi.transpose("time", "y", "x")
    if valid is not None:
        index = index.where(valid.astype(bool))
    step = _subsample_step(index, max_pixels)

    def rule(img: np.ndarray, _date: str) -> dict[str, Any]:
        if not np.isfinite(img).any():
            return {"threshold": np.nan}
        return {"threshold": otsu_threshold(img) if threshold == "otsu" else float(threshold)}

    infos = _per_date(index.isel(y=slice(None, None, step), x=slice(None, None, step)), rule)
    thr = xr.DataArray(np.array([i["threshold"] for i in infos]), dims="time")
    water = (index > thr).astype(np.float32).where(index.notnull() & thr.notnull())
    out = water.assign_coords(threshold=("time", thr.values)).rename("water")
    out.attrs = result_attrs(
        long_name="Open water (1) per date from MNDWI",
        units="1",
        method=f"MNDWI > per-date threshold ({threshold})",
        reference=XU_2006 + ("; " + OTSU_1979 if threshold == "otsu" else ""),
        parameters={"threshold": threshold, "max_pixels": max_pixels, "subsample_step": step},
    )
    return out


# -- frequency and hydroperiod -------------------------------------------------------------------------------
def _require_series(water: xr.DataArray) -> None:
    if tuple(water.dims) != ("time", "y", "x") or not np.issubdtype(water["time"].dtype, np.datetime64):
        raise DataQualityError(
            f"expected water maps with dims ('time', 'y', 'x') and datetime times; received {water.dims}. "
            "Use sar_water / optical_water or WaterSeriesStore.open()."
        )


def _stack_periods(layers: list[xr.DataArray], found: list[Period]) -> xr.DataArray:
    out = xr.concat(layers, dim="period", coords="minimal", compat="override")
    return out.assign_coords(
        period=("period", [p.label for p in found]),
        period_start=("period", np.array([p.start for p in found], dtype="datetime64[ns]")),
        period_end=("period", np.array([p.end for p in found], dtype="datetime64[ns]")),
        n_obs=("period", [int(p.index.size) for p in found]),
    ).transpose("period", "y", "x")


def water_frequency(
    water: xr.DataArray, *, period: str = "year", seasons: Mapping[str, tuple[str, str]] | None = None
) -> xr.DataArray:
    """Share of valid observations that are water, per pixel and period.

    Parameters
    ----------
    water : xarray.DataArray
        ``(time, y, x)`` water maps (1 / 0 / NaN).
    period : {"year", "season", "month", "all"}
        Grouping of the dates; ``"season"`` needs ``seasons``.
    seasons : mapping of str to (str, str), optional
        Month-day windows, e.g. ``{"spring": ("04-01", "06-10")}``; a window whose start is later than
        its end wraps over the new year and belongs to the year it starts in.

    Returns
    -------
    xarray.DataArray
        ``water_frequency``, float32 ``(period, y, x)`` in [0, 1], NaN where a pixel has no valid
        observation in the period.  Coordinates along period: ``period`` (label), ``period_start``,
        ``period_end`` (exclusive) and ``n_obs`` (dates in the period); lazy.

    Examples
    --------
    >>> import pandas as pd
    >>> t = pd.to_datetime(["2023-03-01", "2023-06-01", "2024-03-01", "2024-06-01"])
    >>> w = xr.DataArray(np.array([1, 0, 1, np.nan], dtype="float32").reshape(4, 1, 1),
    ...                  dims=("time", "y", "x"), coords={"time": t})
    >>> water_frequency(w).values.ravel().tolist()
    [0.5, 1.0]
    """
    _require_series(water)
    found = periods(water["time"].values, period, seasons)
    layers = []
    for p in found:
        sub = water.isel(time=p.index)
        n_valid = sub.notnull().sum("time")
        layers.append((sub.sum("time", skipna=True) / n_valid.where(n_valid > 0)).astype(np.float32))
    out = _stack_periods(layers, found).rename("water_frequency")
    out.attrs = result_attrs(
        long_name="Surface-water frequency (share of valid observations that are water)",
        units="1",
        method="sum(water) / count(valid observations) per period",
        parameters={"period": period, "seasons": dict(seasons or {})},
    )
    return out


def _halfway_days(w: np.ndarray, t: np.ndarray, length: float) -> np.ndarray:
    """Days inundated from water states ``w`` (..., time) observed at ``t`` (days from the period start).

    Each valid observation stands for the span from halfway to the previous valid observation to halfway
    to the next one; the first and last valid observations extend to the period's bounds.  The
    neighbours are found per pixel with running max / min of the valid indices (no loop over pixels).
    """
    n = w.shape[-1]
    valid = np.isfinite(w)
    order = np.arange(n)
    last = np.maximum.accumulate(np.where(valid, order, -1), axis=-1)
    first = np.minimum.accumulate(np.where(valid, order, n)[..., ::-1], axis=-1)[..., ::-1]
    prev = np.concatenate([np.full(w.shape[:-1] + (1,), -1), last[..., :-1]], axis=-1)
    nxt = np.concatenate([first[..., 1:], np.full(w.shape[:-1] + (1,), n)], axis=-1)
    tt = np.append(t, np.nan)  # index n (no next) maps to NaN and is replaced below
    left = np.where(prev >= 0, (tt[np.maximum(prev, 0)] + t) / 2, 0.0)
    right = np.where(nxt < n, (tt[nxt] + t) / 2, length)
    days = np.where(valid, np.where(valid, w, 0) * (right - left), 0.0).sum(-1)
    return np.where(valid.any(-1), days, np.nan).astype(np.float32)


def hydroperiod_days(
    water: xr.DataArray, *, period: str = "year", seasons: Mapping[str, tuple[str, str]] | None = None
) -> xr.DataArray:
    """Days a pixel is inundated per period, estimated from the observation dates.

    Each valid observation of a pixel stands for the days from halfway to its previous valid observation
    to halfway to its next one within the period (nearest observation in time); the first and last
    valid observations extend to the period's start and end, so the days of a pixel with any valid
    observation add up to the period's length.  Assumptions: the water state changes only at the
    midpoints between observations; observations outside the period are not used; a cloud-covered or
    no-data observation is skipped per pixel (its neighbours cover its span); sparse observations give
    coarse estimates (the error is up to half the gap between observations at each change of state).

    Parameters
    ----------
    water : xarray.DataArray
        ``(time, y, x)`` water maps (1 / 0 / NaN).
    period : {"year", "season", "month", "all"}
        Grouping, as in :func:`water_frequency` (``"all"`` spans the first to the last observation day).
    seasons : mapping of str to (str, str), optional
        Month-day windows for ``period="season"``.

    Returns
    -------
    xarray.DataArray
        ``hydroperiod_days``, float32 ``(period, y, x)``, units "d", NaN where a pixel has no valid
        observation in the period; coordinates ``period``, ``period_start``, ``period_end``, ``n_obs``
        and ``period_days``; lazy.

    Examples
    --------
    >>> import pandas as pd
    >>> w = xr.DataArray(np.array([0, 1, 0], dtype="float32").reshape(3, 1, 1), dims=("time", "y", "x"),
    ...                  coords={"time": pd.to_datetime(["2023-01-01", "2023-07-01", "2023-12-31"])})
    >>> float(hydroperiod_days(w).squeeze())
    182.0
    """
    _require_series(water)
    found = periods(water["time"].values, period, seasons)
    layers = []
    for p in found:
        sub = water.isel(time=p.index)
        sub = sub.chunk({"time": -1}) if sub.chunks is not None else sub
        t = ((sub["time"].values - np.datetime64(p.start, "ns")) / np.timedelta64(1, "D")).astype(np.float64)
        layers.append(
            xr.apply_ufunc(
                _halfway_days,
                sub,
                input_core_dims=[["time"]],
                kwargs={"t": t, "length": p.days},
                dask="parallelized",
                output_dtypes=[np.float32],
            )
        )
    out = _stack_periods(layers, found).rename("hydroperiod_days")
    out = out.assign_coords(period_days=("period", [p.days for p in found]))
    out.attrs = result_attrs(
        long_name="Days inundated per period (observations stand for the days halfway to their neighbours)",
        units="d",
        method="sum over valid observations of water * (midpoint to next - midpoint to previous); "
        "first and last observations extend to the period bounds",
        parameters={"period": period, "seasons": dict(seasons or {})},
    )
    return out
