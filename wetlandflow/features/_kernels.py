"""Numba reducers shared by the optical and SAR feature modules.

Per-pixel order statistics over the leading (time) axis of an image stack:
NaN-aware median and quantiles that equal :func:`numpy.nanmedian` and
:func:`numpy.nanquantile` (``method="linear"``) bit for bit on float32 input,
parallel over pixels.

Why a kernel: ``np.nanmedian`` along a short axis goes through masked arrays
and sorts the whole stack, about 1 Mpx/s for a dozen dates.  Here a block of
pixels is copied into a small (time, pixel) buffer with NaN replaced by +inf,
sorted by a fixed comparator network (branch-free min/max, vectorised over
the pixels), and each pixel's statistics are read at positions below its
count of valid values.  Real +inf values stay exact: they sort among the
stand-ins and are equal to them.

The xarray runners move the reduced dimension last (``xr.apply_ufunc`` core
dimension) and view the chunk as ``(pixels, time)`` without copying; the
kernel accepts any strides.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

import numba
import numpy as np
import xarray as xr

# Pixels per parallel work item: a (time, block) float32 buffer of a few dozen
# kB stays in L1/L2 cache, and the inner loops over the block vectorise.
_BLOCK = 256


def batcher_pairs(n: int) -> np.ndarray:
    """Comparator pairs ``(i, j)``, ``i < j``, of Batcher's odd-even merge sort for ``n`` inputs.

    Built for the next power of two; comparators that touch a padding position
    are dropped, which is exact because padding behaves as +inf (already the
    largest, so such a comparator never exchanges).  Batcher, K. E. (1968),
    Sorting networks and their applications, AFIPS Spring Joint Computer
    Conference 32, 307-314 (citation not verified in the original; correctness of the network
    is checked exhaustively on 0/1 inputs in the tests, the 0-1 principle).
    """
    size = 1
    while size < n:
        size *= 2
    pairs = []
    p = 1
    while p < size:
        k = p
        while k >= 1:
            for j in range(k % p, size - k, 2 * k):
                for i in range(min(k, size - j - k)):
                    a, b = i + j, i + j + k
                    if a // (2 * p) == b // (2 * p) and b < n:
                        pairs.append((a, b))
            k //= 2
        p *= 2
    return np.array(pairs, dtype=np.int64).reshape(-1, 2)


@numba.njit(cache=True)
def _sort_block(buf, pairs, m):
    """Sort each column of ``buf[:, :m]`` with the comparator network ``pairs``.

    Branch-free min/max over a block of pixels per comparator: the pixel loop
    vectorises, and random NaN patterns cause no branch mispredictions.
    """
    for c in range(pairs.shape[0]):
        lo = buf[pairs[c, 0]]
        hi = buf[pairs[c, 1]]
        for i in range(m):
            x = lo[i]
            y = hi[i]
            lo[i] = min(x, y)
            hi[i] = max(x, y)


@numba.njit(cache=True)
def _median_sorted(col, n):
    """Median of sorted ``col[:n]`` the way NumPy computes it: (low + high) / 2 in the input dtype."""
    h = n // 2
    if n % 2 == 1:
        return col[h]
    # col[h-1] + col[h] stays in the input dtype; halving is exact, so the
    # float64 division and the store back round exactly like NumPy's.
    return (col[h - 1] + col[h]) / 2


@numba.njit(cache=True)
def _quantile_sorted(col, n, q, cast):
    """Linear-interpolated quantile of sorted ``col[:n]``, replicating NumPy's ``_lerp``.

    NumPy forms the virtual index ``(n - 1) * q`` in float64, then interpolates in
    the input dtype from below when the weight is < 0.5 and from above otherwise
    (which keeps the result monotone in ``q``).  ``cast`` is a length-1 scratch
    array of the input dtype, used to round the weight to that dtype first.
    """
    virtual = (n - 1) * q
    lo = int(np.floor(virtual))
    hi = min(lo + 1, n - 1)
    gamma = virtual - lo
    a = col[lo]
    b = col[hi]
    diff = b - a
    if gamma >= 0.5:
        cast[0] = 1.0 - gamma
        return b - diff * cast[0]
    cast[0] = gamma
    return a + diff * cast[0]


@numba.njit(cache=True, parallel=True)
def _order_stats_tp(values, pairs, qs, with_median):
    """Order statistics of each column of ``values`` (time, pixels), NaN ignored.

    Returns ``(k, pixels)`` with the median first when ``with_median`` is
    true, then one row per quantile in ``qs``; all-NaN pixels give NaN.
    Fastest when the pixel axis has unit stride (a time-first stack).
    """
    nt, npix = values.shape
    first = 1 if with_median else 0
    out = np.empty((first + qs.shape[0], npix), dtype=values.dtype)
    # Each work item: copy a run of pixels into a (time, pixel) buffer with
    # NaN as +inf, sort every column with the network, read the statistics.
    for blk in numba.prange((npix + _BLOCK - 1) // _BLOCK):
        p0 = blk * _BLOCK
        m = min(_BLOCK, npix - p0)
        buf = np.empty((max(nt, 1), _BLOCK), dtype=values.dtype)
        count = np.zeros(_BLOCK, dtype=np.int64)
        cast = np.empty(1, dtype=values.dtype)
        # Load inline (not in a helper) so the compiler sees that buf, count
        # and values cannot alias, and vectorises the pixel loop.
        for t in range(nt):
            for i in range(m):
                v = values[t, p0 + i]
                missing = v != v
                buf[t, i] = np.inf if missing else v
                count[i] += 0 if missing else 1
        _sort_block(buf, pairs, m)
        for i in range(m):
            n = count[i]
            if n == 0:
                for j in range(out.shape[0]):
                    out[j, p0 + i] = np.nan
                continue
            col = buf[:, i]  # a strided view, no copy
            if with_median:
                out[0, p0 + i] = _median_sorted(col, n)
            for j in range(qs.shape[0]):
                out[first + j, p0 + i] = _quantile_sorted(col, n, qs[j], cast)
    return out


def order_stats(
    values: np.ndarray, qs: Sequence[float] = (), *, with_median: bool = True, axis: int = 0
) -> np.ndarray:
    """NaN-aware median and quantiles over one axis of a NumPy array.

    Parameters
    ----------
    values : numpy.ndarray
        Float array; any strides (a time-first C-contiguous stack is read without a copy).
    qs : sequence of float
        Quantiles in [0, 1] (linear interpolation, NumPy's default method).
    with_median : bool
        Put the median (NumPy's ``(low + high) / 2`` form) in the first output slot.
    axis : int
        Axis to reduce.

    Returns
    -------
    numpy.ndarray
        ``(k, ...)``: the statistics first (``k = with_median + len(qs)``), then
        the other axes in order; same float dtype as ``values``.

    Examples
    --------
    >>> import numpy as np
    >>> order_stats(np.array([[1.0], [np.nan], [3.0], [4.0]], dtype="float32"), [0.5])
    array([[3.],
           [3.]], dtype=float32)
    """
    values = np.asarray(values)
    if values.dtype not in (np.float32, np.float64):
        values = values.astype(np.float64)
    q = np.asarray(qs, dtype=np.float64).reshape(-1)
    if q.size and (np.any(q < 0) or np.any(q > 1) or np.any(np.isnan(q))):
        raise ValueError(f"quantiles must lie in [0, 1]; received {q.tolist()}")
    moved = np.moveaxis(values, axis, 0)
    nt, rest = moved.shape[0], moved.shape[1:]
    flat = moved.reshape(nt, -1)  # a view for a time-first stack; else one copy in time-first order
    out = _order_stats_tp(flat, batcher_pairs(nt), q, with_median)
    return out.reshape((out.shape[0],) + rest)


def _median_block(block: np.ndarray) -> np.ndarray:
    return order_stats(block, (), with_median=True)[0]


def _stats_block(block: np.ndarray, qs: tuple[float, ...], with_median: bool) -> np.ndarray:
    return order_stats(block, qs, with_median=with_median)


def quiet_call(func: Callable[..., np.ndarray], *arrays: np.ndarray) -> np.ndarray:
    """Call ``func`` with floating-point warnings off.

    For compiled ufuncs that already return NaN where a result is undefined:
    the compiler may evaluate both sides of a branch (dividing by zero in a
    lane whose result is discarded), and NumPy would report the hardware flag
    as a RuntimeWarning.
    """
    with np.errstate(all="ignore"):
        return func(*arrays)


@numba.vectorize(["float32(float32)", "float64(float64)"], cache=True)
def _db_ufunc(x):  # pragma: no cover - compiled
    # log10 of zero or a negative number is undefined: NaN (run under errstate
    # by quiet_call, so no warning either).
    if x > 0:
        return 10.0 * np.log10(x)
    return np.nan


# Module level, not a closure: dask tokenises the function it maps, and a
# pickled closure would carry, and recompile, the numba ufunc.
def _db_block(x: np.ndarray) -> np.ndarray:
    return quiet_call(_db_ufunc, x)


def raw_db(da: xr.DataArray) -> xr.DataArray:
    """``10 * log10(da)``, NaN where ``da <= 0``, without attrs; float32 stays float32, lazy on dask.

    Shared by the SAR statistics and the water masks; callers add provenance.
    """
    dtype = da.dtype if da.dtype in (np.float32, np.float64) else np.dtype(np.float64)
    return xr.apply_ufunc(_db_block, da.astype(dtype, copy=False), dask="parallelized", output_dtypes=[dtype])


def _time_first(da: xr.DataArray, dim: str) -> xr.DataArray:
    """``da`` with ``dim`` first and, if dask-backed, in a single chunk along it.

    A reduction over time needs each pixel's whole series; keeping time first
    (free for the usual (time, ...) stacks) lets the kernel read chunks as
    they are, without the transpose that ``xr.apply_ufunc`` core dims imply.
    """
    if dim not in da.dims:
        raise ValueError(f"dimension {dim!r} not in the array's dims {da.dims}; pass dim= one of them")
    da = da.transpose(dim, ...)
    if da.chunks is not None and len(da.chunksizes[dim]) > 1:
        da = da.chunk({dim: -1})
    if da.dtype not in (np.float32, np.float64):
        da = da.astype(np.float64)
    return da


def _reduce_time(da: xr.DataArray, dim: str, qs: tuple[float, ...], with_median: bool) -> xr.DataArray:
    """Run the kernel lazily (dask ``map_blocks``) or directly; the stats dim ``stat`` comes first."""
    da = _time_first(da, dim)
    k = int(with_median) + len(qs)
    if da.chunks is not None:
        data = da.data.map_blocks(
            _stats_block, qs, with_median, chunks=((k,),) + da.data.chunks[1:], dtype=da.dtype
        )
    else:
        data = _stats_block(np.asarray(da.data), qs, with_median)
    rest = [d for d in da.dims if d != dim]
    coords = {n: c for n, c in da.coords.items() if dim not in c.dims}
    return xr.DataArray(data, dims=["stat", *rest], coords=coords)


def nanmedian_time(da: xr.DataArray, dim: str = "time") -> xr.DataArray:
    """Per-pixel median over ``dim`` ignoring NaN; lazy on dask input.

    Equals ``da.reduce(np.nanmedian, dim)`` exactly (pixels without any valid
    value give NaN, without a warning).

    Parameters
    ----------
    da : xarray.DataArray
        Float array holding ``dim`` (other dims are kept, in their order).
    dim : str
        Dimension to reduce; rechunked to a single chunk if needed.

    Returns
    -------
    xarray.DataArray
        Same dims minus ``dim``; no attrs (callers add provenance).
    """
    src = _time_first(da, dim)
    if src.chunks is not None:
        data = src.data.map_blocks(_median_block, drop_axis=0, dtype=src.dtype)
    else:
        data = _median_block(np.asarray(src.data))
    coords = {n: c for n, c in src.coords.items() if dim not in c.dims}
    return xr.DataArray(data, dims=src.dims[1:], coords=coords, name=da.name)


def nanquantile_time(da: xr.DataArray, q: Sequence[float], dim: str = "time") -> xr.DataArray:
    """Per-pixel quantiles over ``dim`` ignoring NaN (linear interpolation); lazy on dask input.

    Parameters
    ----------
    da : xarray.DataArray
        Float array holding ``dim``.
    q : sequence of float
        Quantiles in [0, 1]; they become a leading ``quantile`` dimension.
    dim : str
        Dimension to reduce.

    Returns
    -------
    xarray.DataArray
        ``quantile`` then the dims of ``da`` minus ``dim``; equals ``np.nanquantile``.
    """
    qs = tuple(float(v) for v in q)
    out = _reduce_time(da, dim, qs, False).rename(stat="quantile")
    return out.assign_coords(quantile=list(qs))


def nan_order_stats_time(da: xr.DataArray, q: Sequence[float], dim: str = "time") -> xr.DataArray:
    """Median and quantiles over ``dim`` in one sort per pixel; lazy on dask input.

    Parameters
    ----------
    da : xarray.DataArray
        Float array holding ``dim``.
    q : sequence of float
        Quantiles in [0, 1] (linear interpolation).
    dim : str
        Dimension to reduce.

    Returns
    -------
    xarray.DataArray
        A leading ``stat`` dim labelled ``"median"`` then ``"q<value>"``, then
        the dims of ``da`` minus ``dim``; the median equals ``np.nanmedian``
        and the quantiles ``np.nanquantile``.
    """
    qs = tuple(float(v) for v in q)
    out = _reduce_time(da, dim, qs, True)
    return out.assign_coords(stat=["median"] + [f"q{v:g}" for v in qs])


# ---------------------------------------------------------------------------
# Local (window) statistics for speckle filters
# ---------------------------------------------------------------------------


@numba.njit(cache=True, parallel=True)
def _lee_3d(images, half, noise_var):
    """Lee (1980) MMSE filter of each image of ``images`` (n, y, x), multiplicative model.

    Window statistics ignore NaN and windows are truncated at the array edge,
    so padding a block with NaN is the same as cutting the window there: this
    is what makes dask blocks (padded with NaN at the outer border, with real
    neighbours inside) agree exactly with a whole-array run.
    """
    n, ny, nx = images.shape
    out = np.empty_like(images)
    for row in numba.prange(n * ny):
        k = row // ny
        i = row % ny
        i0, i1 = max(0, i - half), min(ny, i + half + 1)
        for j in range(nx):
            z = images[k, i, j]
            if z != z:
                out[k, i, j] = np.nan
                continue
            cnt = 0
            s = 0.0
            s2 = 0.0
            for ii in range(i0, i1):
                for jj in range(max(0, j - half), min(nx, j + half + 1)):
                    v = images[k, ii, jj]
                    if v == v:
                        cnt += 1
                        s += v
                        s2 += v * v
            mean = s / cnt
            var_z = max(s2 / cnt - mean * mean, 0.0)
            # var(x) = (var(z) - mean^2 sigma_v^2) / (1 + sigma_v^2), clipped at 0
            var_x = max((var_z - mean * mean * noise_var) / (1.0 + noise_var), 0.0)
            gain = var_x / var_z if var_z > 0 else 0.0
            out[k, i, j] = mean + gain * (z - mean)
    return out


@numba.njit(cache=True, parallel=True)
def _box_mean_3d(images, half):
    """NaN-ignoring boxcar mean of each image of ``images`` (n, y, x), windows truncated at the edge."""
    n, ny, nx = images.shape
    out = np.empty_like(images)
    for row in numba.prange(n * ny):
        k = row // ny
        i = row % ny
        i0, i1 = max(0, i - half), min(ny, i + half + 1)
        for j in range(nx):
            cnt = 0
            s = 0.0
            for ii in range(i0, i1):
                for jj in range(max(0, j - half), min(nx, j + half + 1)):
                    v = images[k, ii, jj]
                    if v == v:
                        cnt += 1
                        s += v
            out[k, i, j] = s / cnt if cnt > 0 else np.nan
    return out


def lee_block(block: np.ndarray, half: int, noise_var: float) -> np.ndarray:
    """Lee filter over the last two axes of ``block`` (any leading dims)."""
    flat = np.ascontiguousarray(block).reshape((-1,) + block.shape[-2:])
    return _lee_3d(flat, int(half), float(noise_var)).reshape(block.shape)


def box_mean_block(block: np.ndarray, half: int) -> np.ndarray:
    """NaN-ignoring boxcar mean over the last two axes of ``block``."""
    flat = np.ascontiguousarray(block).reshape((-1,) + block.shape[-2:])
    return _box_mean_3d(flat, int(half)).reshape(block.shape)


EDGES = ("truncate", "symmetric")


def run_windowed(da: xr.DataArray, block_func: Any, depth_px: int, edge: str, **kwargs: Any) -> xr.DataArray:
    """Run a neighbourhood block function over (y, x), via ``map_overlap`` on dask input.

    ``edge="truncate"`` cuts windows at the image border (the border is padded
    with NaN, which the window statistics ignore); ``"symmetric"`` mirrors the
    image including the edge pixel (``np.pad`` mode "symmetric", dask "reflect").
    """
    if edge not in EDGES:
        raise ValueError(f"edge must be one of {EDGES}, received {edge!r}")
    if "y" not in da.dims or "x" not in da.dims:
        raise ValueError(f"expected dims 'y' and 'x', received {da.dims}")
    order = [d for d in da.dims if d not in ("y", "x")] + ["y", "x"]
    da = da.transpose(*order)
    if da.dtype not in (np.float32, np.float64):
        da = da.astype(np.float32)
    lead = da.ndim - 2
    if da.chunks is not None:
        depth = {i: 0 for i in range(lead)} | {lead: depth_px, lead + 1: depth_px}
        outer = np.nan if edge == "truncate" else "reflect"
        boundary = {i: "none" for i in range(lead)} | dict.fromkeys((lead, lead + 1), outer)
        data = da.data.map_overlap(block_func, depth=depth, boundary=boundary, dtype=da.dtype, **kwargs)
    elif edge == "symmetric":
        h = depth_px
        pad = [(0, 0)] * lead + [(h, h), (h, h)]
        inner = (Ellipsis, slice(h, -h or None), slice(h, -h or None))
        data = block_func(np.pad(np.asarray(da.data), pad, mode="symmetric"), **kwargs)[inner]
    else:
        data = block_func(np.asarray(da.data), **kwargs)
    return da.copy(data=data)


def half_window(window: int) -> int:
    """Half-width of an odd ``window`` (>= 3), validated."""
    if int(window) != window or window < 3 or window % 2 == 0:
        raise ValueError(f"window must be an odd integer >= 3, received {window!r}")
    return int(window) // 2
