"""Pettitt's rank test for a single change point, on one series or per pixel of a dated stack.

Pettitt (1979) ranks the series and, for every split ``t`` (``t`` observations before, ``n - t`` after),
forms the Mann-Whitney-type statistic

    U_t = sum_{i <= t} sum_{j > t} sign(x_i - x_j),

so ``U_t > 0`` when the values before the split are larger (a downward change).  The change point is the
first ``t`` with the largest ``|U_t|``, the statistic is ``K = max_t |U_t|``, and its two-sided
significance is approximated by ``p = 2 exp(-6 K^2 / (n^3 + n^2))`` (clipped to 1; the approximation is
good for ``p <= 0.5``).

Convention for the location: ``change_index`` is the 0-based position along ``dim`` of the **last
observation before the change**, and ``change_coord`` is that observation's coordinate (year or date).
The first observation of the new level is the next valid one.
"""

from __future__ import annotations

import numba
import numpy as np
import xarray as xr

from ..errors import ParameterError
from ._attrs import result_attrs

__all__ = ["pettitt"]

_REFERENCE = ("Pettitt, A. N. (1979). A non-parametric approach to the change-point problem. "
              "Journal of the Royal Statistical Society, Series C (Applied Statistics), 28(2), 126-135.")
_STATS = ("k", "change_index", "p", "shift", "n")


@numba.njit(cache=True)
def _pettitt_rows(values):
    """Per row of ``values`` (pixels, time): K, change index (original position), p, shift, n valid."""
    n_rows, n_time = values.shape
    out = np.full((n_rows, 5), np.nan)
    for r in range(n_rows):
        row = values[r]
        where = np.flatnonzero(~np.isnan(row))
        n = where.size
        out[r, 4] = n
        if n < 2:
            continue
        x = row[where]
        best, best_t, u = -1.0, 0, 0.0
        # U_t = U_{t-1} + sum_j sign(x_t - x_j): one pass over the splits, O(n^2) in all
        for t in range(n - 1):
            for j in range(n):
                u += np.sign(x[t] - x[j])
            if abs(u) > best:
                best, best_t = abs(u), t
        p = 2.0 * np.exp(-6.0 * best * best / (n ** 3 + n ** 2))
        out[r, 0] = best
        out[r, 1] = where[best_t]
        out[r, 2] = min(p, 1.0)
        out[r, 3] = np.median(x[best_t + 1:]) - np.median(x[:best_t + 1])
    return out


def _pettitt_block(values: np.ndarray) -> np.ndarray:
    """Flatten the leading dims for the kernel and restore them, with the statistics last."""
    flat = np.ascontiguousarray(values, dtype=np.float64).reshape(-1, values.shape[-1])
    return _pettitt_rows(flat).reshape(values.shape[:-1] + (len(_STATS),))


def _coord_lookup(index: np.ndarray, coord: np.ndarray) -> np.ndarray:
    """The coordinate at each change index; NaN (or NaT) where there is no change point."""
    valid = np.isfinite(index)
    picked = coord[np.where(valid, index, 0).astype(np.int64)]
    if np.issubdtype(coord.dtype, np.datetime64):
        return np.where(valid, picked, np.datetime64("NaT"))
    return np.where(valid, picked.astype(np.float64), np.nan)


def _check_dim(series: xr.DataArray, dim: str) -> None:
    if dim not in series.dims:
        raise ParameterError(
            f"pettitt: dim {dim!r} is not a dimension of the series; received dims {series.dims}. "
            f"Expected the time dimension; pass dim=<one of {list(series.dims)}>.")
    if series.chunks is not None and len(series.chunksizes[dim]) > 1:
        raise ParameterError(
            f"pettitt: the series is split into {len(series.chunksizes[dim])} chunks along {dim!r}; the test "
            f"needs the whole series of a pixel in one chunk. Fix: series.chunk({{{dim!r}: -1}}).")


def pettitt(series: xr.DataArray, *, dim: str = "year") -> xr.Dataset:
    """Pettitt's (1979) test for one change point in the median, per series or per pixel.

    Parameters
    ----------
    series : xarray.DataArray
        A 1-D series along ``dim`` or a stack ``(dim, y, x)`` (any other dims are treated per element).
        NaN observations are dropped per pixel.  Under dask the stack stays lazy; ``dim`` must be in one
        chunk.
    dim : str
        The time dimension (years or dates).

    Returns
    -------
    xarray.Dataset
        Same dims as ``series`` without ``dim``, with variables ``k`` (``max_t |U_t|``), ``change_index``
        (0-based position along ``dim`` of the last observation before the change; NaN if fewer than two
        valid observations), ``change_coord`` (its coordinate value: float for years, datetime64 for
        dates), ``p`` (two-sided approximation ``2 exp(-6 K^2 / (n^3 + n^2))`` clipped to 1), ``shift``
        (median after minus median before, in the series' units; read it as ``ds["shift"]``, since
        ``ds.shift`` is the Dataset method) and ``n`` (valid observations).  Every variable carries
        ``result_attrs``.

    References
    ----------
    Pettitt, A. N. (1979). A non-parametric approach to the change-point problem. Applied Statistics,
    28(2), 126-135.

    Examples
    --------
    >>> import numpy as np, xarray as xr
    >>> s = xr.DataArray(np.r_[np.zeros(6), np.ones(6)], dims="year", coords={"year": np.arange(2000, 2012)})
    >>> int(pettitt(s)["change_coord"])
    2005
    """
    _check_dim(series, dim)
    stats = xr.apply_ufunc(
        _pettitt_block, series, input_core_dims=[[dim]], output_core_dims=[["stat"]],
        dask="parallelized", output_dtypes=[np.float64],
        dask_gufunc_kwargs={"output_sizes": {"stat": len(_STATS)}})
    ds = xr.Dataset({name: stats.isel(stat=i, drop=True) for i, name in enumerate(_STATS)})
    coord = series[dim].values
    ds["change_coord"] = xr.apply_ufunc(
        _coord_lookup, ds["change_index"], kwargs={"coord": coord}, dask="parallelized",
        output_dtypes=[coord.dtype if np.issubdtype(coord.dtype, np.datetime64) else np.float64])
    return _with_attrs(ds, series, dim)


def _with_attrs(ds: xr.Dataset, series: xr.DataArray, dim: str) -> xr.Dataset:
    units = series.attrs.get("units", "")
    method = "Pettitt rank test for a single change point (NaN dropped per pixel)"
    described = {
        "k": ("Pettitt statistic K = max |U_t|", "1"),
        "change_index": (f"position along {dim} of the last observation before the change", "1"),
        "change_coord": (f"{dim} of the last observation before the change", ""),
        "p": ("approximate two-sided p of the change point, 2 exp(-6K^2/(n^3+n^2))", "1"),
        "shift": ("median after the change minus median before", units),
        "n": ("valid observations", "1"),
    }
    for name, (long_name, unit) in described.items():
        ds[name].attrs = result_attrs(long_name=long_name, units=unit, method=method, reference=_REFERENCE,
                                      parameters={"dim": dim})
    return ds
