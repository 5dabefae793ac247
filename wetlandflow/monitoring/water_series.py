"""Surface water through time: per-date water maps from SAR or optical scenes, their frequency, hydroperiod
and area per polygon.

The per-date maps are ``(time, y, x)`` float32 with 1 water, 0 dry and NaN no data (clouds, SAR border),
so every later statistic counts valid observations only.  Thresholds are global per date: they are
computed at call time on a strided subsample (one date in memory at a time), the maps stay lazy.  The
store that appends dates without recomputing the others is in :mod:`.water_store`, the figures in
:mod:`.water_figures`.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable, Mapping
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import DataQualityError, GridMismatchError, ParameterError, PlausibilityWarning
from ..features._kernels import raw_db
from ..features.water import _require_pol_stack, ashman_d, otsu_threshold
from ._attrs import result_attrs
from ._periods import Period, periods

__all__ = [
    "hydroperiod_days",
    "optical_water",
    "sar_water",
    "split_threshold",
    "water_area_series",
    "water_frequency",
]

MARTINIS_2009 = (
    "Martinis, S., Twele, A., Voigt, S. (2009). Towards operational near real-time flood detection "
    "using a split-based automatic thresholding procedure on high resolution TerraSAR-X data. "
    "Natural Hazards and Earth System Sciences 9, 303-314"
)
ASHMAN_1994 = (
    "Ashman, K. M., Bird, C. M., Zepf, S. E. (1994). Detecting bimodality in astronomical datasets. "
    "The Astronomical Journal 108, 2348-2361"
)
OTSU_1979 = "Otsu, N. (1979). A threshold selection method from gray-level histograms. IEEE SMC-9(1), 62-66"
XU_2006 = (
    "Xu, H. (2006). Modification of normalised difference water index (NDWI) to enhance open water "
    "features in remotely sensed imagery. International Journal of Remote Sensing 27(14), 3025-3033"
)

_EM_ITERATIONS = 200


# -- split-based threshold -----------------------------------------------------------------------------------
def _tiles(values: np.ndarray, tile_px: int) -> np.ndarray:
    """(n_tiles, tile_px**2) view of the whole tiles of a (y, x) array (the ragged right and bottom are left
    out of the tile statistics; they are still classified with the global threshold)."""
    ny, nx = values.shape[0] // tile_px, values.shape[1] // tile_px
    cropped = values[: ny * tile_px, : nx * tile_px]
    return cropped.reshape(ny, tile_px, nx, tile_px).transpose(0, 2, 1, 3).reshape(ny * nx, tile_px * tile_px)


def _tile_histograms(tiles: np.ndarray, nbins: int) -> tuple[np.ndarray, np.ndarray]:
    """Counts per tile on common bins over the finite range of all tiles (one bincount, no loop)."""
    finite = np.isfinite(tiles)
    lo, hi = float(tiles[finite].min()), float(tiles[finite].max())
    width = (hi - lo) / nbins or 1.0
    b = np.clip(((np.where(finite, tiles, lo) - lo) / width).astype(np.int64), 0, nbins - 1)
    b = np.where(finite, b, nbins)  # NaN goes to an overflow bin that is dropped
    flat = b + (nbins + 1) * np.arange(tiles.shape[0])[:, None]
    counts = np.bincount(flat.ravel(), minlength=tiles.shape[0] * (nbins + 1)).reshape(-1, nbins + 1)
    return counts[:, :nbins].astype(np.float64), lo + width * (np.arange(nbins) + 0.5)


def _fit_mixtures(hist: np.ndarray, centres: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Two-Gaussian mixtures fitted to every row of ``hist`` at once by EM on the binned values.

    A hard split at a threshold cannot be used for Ashman's D (the halves of one Gaussian already give
    D of about 2.6), so the components are fitted.  Started from the split at each tile's mean; the
    variance is kept at or above a bin's own (width**2 / 12), the resolution of the histogram.
    Returns means, sds and weights, each (n_tiles, 2).
    """
    n = hist.sum(1)
    floor = (centres[1] - centres[0]) ** 2 / 12 if centres.size > 1 else 1e-12
    high = centres[None, :] > ((hist * centres).sum(1) / n)[:, None]
    resp = np.stack([~high, high], axis=1).astype(np.float64)  # (tiles, 2, bins)
    mu = var = w = np.zeros((hist.shape[0], 2))
    for _ in range(_EM_ITERATIONS):
        rh = resp * hist[:, None, :]
        nk = np.maximum(rh.sum(2), 1e-12)
        new_mu = (rh * centres).sum(2) / nk
        var = np.maximum((rh * (centres - new_mu[..., None]) ** 2).sum(2) / nk, floor)
        w = nk / n[:, None]
        done = np.max(np.abs(new_mu - mu)) < 1e-6 * (centres[-1] - centres[0] + 1e-12)
        mu = new_mu
        if done:
            break
        logp = (np.log(w) - 0.5 * np.log(var))[..., None] - 0.5 * (centres - mu[..., None]) ** 2 / var[
            ..., None
        ]
        resp = np.exp(logp - logp.max(1, keepdims=True))
        resp /= resp.sum(1, keepdims=True)
    return mu, np.sqrt(var), w


def _split_info(db: Any, tile_px: int, min_ashman_d: float, min_share: float, nbins: int) -> dict[str, Any]:
    """Threshold, method and tile counts of :func:`split_threshold` (the attrs need all of them)."""
    values = np.asarray(db.values if isinstance(db, xr.DataArray) else db, dtype=np.float64)
    if values.ndim != 2 or not np.isfinite(values).any():
        raise DataQualityError(
            f"split_threshold needs one date as a (y, x) array with finite values; received shape "
            f"{values.shape} with {int(np.isfinite(values).sum())} finite values. Select one date and pol."
        )
    tiles = _tiles(values, tile_px) if min(values.shape) >= tile_px else np.empty((0, tile_px * tile_px))
    tiles = tiles[np.isfinite(tiles).sum(1) >= tiles.shape[1] / 2]  # mostly no-data tiles say little
    kept = np.zeros(len(tiles), dtype=bool)
    d = np.zeros(len(tiles))
    if len(tiles):
        hist, centres = _tile_histograms(tiles, nbins)
        mu, sd, w = _fit_mixtures(hist, centres)
        d = np.vectorize(ashman_d)(mu[:, 0], mu[:, 1], sd[:, 0], sd[:, 1])
        kept = (d >= min_ashman_d) & (w.min(1) >= min_share)
    info = {
        "tiles": int(len(tiles)),
        "tiles_kept": int(kept.sum()),
        "median_ashman_d": float(np.median(d[kept])) if kept.any() else float("nan"),
    }
    if kept.any():
        return {**info, "threshold": otsu_threshold(tiles[kept], nbins), "method": "split"}
    return {**info, "threshold": otsu_threshold(values, nbins), "method": "scene_otsu_fallback"}


def split_threshold(
    db: xr.DataArray,
    *,
    tile_px: int = 64,
    min_ashman_d: float = 2.0,
    min_share: float = 0.1,
    nbins: int = 256,
) -> float:
    """Split-based water threshold of one SAR date in dB, after Martinis, Twele & Voigt (2009).

    A global Otsu threshold fails when water covers a small share of the scene: the water mode is too
    small to move the cut.  Here the scene is split into ``tile_px`` square tiles; a two-Gaussian mixture
    is fitted to every tile's histogram at once (EM on common bins, vectorised over tiles) and a tile is
    kept when its histogram is bimodal: Ashman's D of the two components >= ``min_ashman_d`` and the
    smaller component holds >= ``min_share`` of the tile.  Otsu's threshold of the pooled values of the
    kept tiles is returned.  When no tile passes, the scene's Otsu threshold is returned with a
    :class:`~wetlandflow.errors.PlausibilityWarning`.  Tiles with more than half no data are skipped.

    Martinis et al. select tiles by their mean and coefficient of variation and threshold them with
    Kittler-Illingworth; the bimodality test used here (Ashman's D) and the pooled Otsu are this
    package's choices for the same idea (tile selection, then one global threshold).

    Parameters
    ----------
    db : xarray.DataArray or numpy.ndarray
        One date, ``(y, x)``, backscatter in dB; NaN is no data.
    tile_px : int
        Tile side in pixels.
    min_ashman_d : float
        Smallest Ashman's D of a kept tile (D > 2 is the rule of thumb for a clean separation).
    min_share : float
        Smallest weight of the smaller mixture component of a kept tile.
    nbins : int
        Histogram bins (tile histograms and Otsu).

    Returns
    -------
    float
        Threshold in dB; water is ``db <= threshold``.

    References
    ----------
    Martinis, Twele & Voigt (2009), NHESS 9, 303-314; Ashman, Bird & Zepf (1994), AJ 108, 2348-2361;
    Otsu (1979), IEEE SMC-9(1), 62-66.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> img = rng.normal(-8, 1, (128, 128))
    >>> img[:32, :32] = rng.normal(-20, 1, (32, 32))
    >>> -17 < split_threshold(xr.DataArray(img, dims=("y", "x"))) < -11
    True
    """
    info = _split_info(db, tile_px, min_ashman_d, min_share, nbins)
    if info["method"] != "split":
        _warn_fallback(info, "the scene")
    return info["threshold"]


def _warn_fallback(info: dict[str, Any], where: str) -> None:
    warnings.warn(
        f"split_threshold: none of the {info['tiles']} tiles of {where} has a bimodal histogram "
        f"(Ashman's D and mode share below their limits), so the scene's Otsu threshold "
        f"{info['threshold']:.2f} dB was used. Check that the date holds open water, or lower tile_px.",
        PlausibilityWarning,
        stacklevel=3,
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


# -- water area per polygon ----------------------------------------------------------------------------------
def _grid_of(water: xr.DataArray) -> tuple[Any, float]:
    """Affine transform (pixel corners) and pixel area from regular x / y coordinates (pixel centres)."""
    from affine import Affine

    x, y = np.asarray(water["x"].values, float), np.asarray(water["y"].values, float)
    if (
        x.size < 2
        or y.size < 2
        or not (np.allclose(np.diff(x), x[1] - x[0]) and np.allclose(np.diff(y), y[1] - y[0]))
    ):
        raise GridMismatchError(
            f"water_area_series needs regularly spaced x and y coordinates (pixel centres) of at least 2 "
            f"pixels; received {x.size} x and {y.size} y values. Put the maps on the run's grid first."
        )
    dx, dy = x[1] - x[0], y[1] - y[0]
    return Affine(dx, 0.0, x[0] - dx / 2, 0.0, dy, y[0] - dy / 2), abs(dx * dy)


def _labels(water: xr.DataArray, polygons: Any, id_field: str) -> tuple[np.ndarray, list[Any]]:
    """Polygon number (1..P, 0 outside) per pixel, rasterised once on the water grid (pixel-centre rule)."""
    from rasterio.features import rasterize

    if id_field not in polygons.columns:
        raise DataQualityError(
            f"id_field {id_field!r} is not a column of the polygons; columns are "
            f"{list(polygons.columns)}. Pass id_field= one of them."
        )
    ids = list(polygons[id_field])
    if len(set(ids)) != len(ids):
        raise DataQualityError(
            f"polygon ids in {id_field!r} must be unique; {len(ids) - len(set(ids))} repeat."
        )
    crs = water.rio.crs if "spatial_ref" in water.coords and _has_rio() else None
    if crs is not None and polygons.crs is not None and polygons.crs != crs:
        polygons = polygons.to_crs(crs)
    union_area = polygons.geometry.union_all().area
    if polygons.geometry.area.sum() > union_area * (1 + 1e-9) + 1e-9:
        raise DataQualityError(
            f"the polygons overlap (sum of areas {polygons.geometry.area.sum():.1f} > area of their union "
            f"{union_area:.1f}); a pixel can be counted for one polygon only. Split the overlapping ones "
            "into separate calls."
        )
    transform, _ = _grid_of(water)
    shape = (water.sizes["y"], water.sizes["x"])
    labels = rasterize(
        ((g, i + 1) for i, g in enumerate(polygons.geometry)),
        out_shape=shape,
        transform=transform,
        fill=0,
        dtype="int32",
    )
    return labels, ids


def _has_rio() -> bool:
    try:
        import rioxarray  # noqa: F401
    except ImportError:
        return False
    return True


def water_area_series(water: xr.DataArray, polygons: Any, *, id_field: str) -> pd.DataFrame:
    """Water area per polygon and date, from the per-date maps.

    The polygons are rasterised once on the water grid (pixel-centre rule, grid from the x / y
    coordinates, reprojected to the maps' CRS when both carry one); each date is then one bincount over
    the pixels inside the polygons' bounding box.  Areas are pixel counts times the pixel area, so the
    grid's units must be metres.

    Parameters
    ----------
    water : xarray.DataArray
        ``(time, y, x)`` water maps (1 / 0 / NaN).
    polygons : geopandas.GeoDataFrame
        Non-overlapping polygons in the maps' CRS (or with a CRS to reproject from).
    id_field : str
        Column with unique polygon ids.

    Returns
    -------
    pandas.DataFrame
        One row per polygon and date: ``polygon``, ``date``, ``water_ha``, ``observed_ha`` (valid pixels),
        ``observed_share`` (of the polygon's rasterised area), ``water_share`` (of the observed area; NaN
        when nothing was observed).  ``attrs`` from ``result_attrs`` plus ``polygon_ha`` per id.

    Examples
    --------
    >>> import geopandas as gpd
    >>> from shapely.geometry import box
    >>> w = xr.DataArray(np.ones((1, 4, 4), "float32"), dims=("time", "y", "x"),
    ...                  coords={"time": pd.to_datetime(["2024-05-01"]), "y": [35., 25., 15., 5.],
    ...                          "x": [5., 15., 25., 35.]})
    >>> gdf = gpd.GeoDataFrame({"id": ["a"]}, geometry=[box(0, 0, 20, 40)])
    >>> float(water_area_series(w, gdf, id_field="id")["water_ha"].iloc[0])
    0.08
    """
    _require_series(water)
    labels, ids = _labels(water, polygons, id_field)
    _, pixel_area = _grid_of(water)
    rows, cols = np.nonzero(labels)
    box = (
        {"y": slice(rows.min(), rows.max() + 1), "x": slice(cols.min(), cols.max() + 1)}
        if rows.size
        else None
    )
    sub_labels = labels[box["y"], box["x"]] if box else labels[:0, :0]
    n = len(ids) + 1
    per_poly = np.bincount(sub_labels.ravel(), minlength=n)[1:]
    observed, wet = [], []
    for i in range(water.sizes["time"]):  # one date in memory at a time
        img = np.asarray(water.isel(time=i, **box).values) if box else np.empty((0, 0))
        ok = np.isfinite(img)
        observed.append(np.bincount(sub_labels[ok], minlength=n)[1:])
        wet.append(np.bincount(sub_labels[ok], weights=img[ok], minlength=n)[1:])
    return _area_table(water, ids, np.array(observed), np.array(wet), per_poly, pixel_area)


def _area_table(
    water: xr.DataArray,
    ids: list[Any],
    observed: np.ndarray,
    wet: np.ndarray,
    per_poly: np.ndarray,
    pixel_area: float,
) -> pd.DataFrame:
    t, p = observed.shape
    obs_ha = observed * pixel_area / 1e4
    with np.errstate(invalid="ignore", divide="ignore"):
        table = pd.DataFrame(
            {
                "polygon": np.tile(ids, t),
                "date": np.repeat(pd.to_datetime(water["time"].values), p),
                "water_ha": (wet * pixel_area / 1e4).ravel(),
                "observed_ha": obs_ha.ravel(),
                "observed_share": (observed / np.where(per_poly > 0, per_poly, np.nan)).ravel(),
                "water_share": (wet / np.where(observed > 0, observed, np.nan)).ravel(),
            }
        )
    table.attrs = result_attrs(
        long_name="Water area per polygon and date",
        units="ha",
        method="polygons rasterised once on the water grid (pixel-centre rule); per date a bincount of valid "
        "and water pixels per polygon times the pixel area",
        parameters={"pixel_area_m2": pixel_area},
    )
    table.attrs["polygon_ha"] = {
        str(i): float(c * pixel_area / 1e4) for i, c in zip(ids, per_poly, strict=True)
    }
    return table
