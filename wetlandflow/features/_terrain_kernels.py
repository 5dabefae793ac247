"""Numba kernels behind :mod:`wetlandflow.features.terrain` and :mod:`wetlandflow.features.mrvbf`.

Conventions shared by every kernel:

* arrays are ``(row, col)`` with row 0 in the north (north-up rasters), so a
  step of ``+1`` row is a step south;
* NaN marks nodata; a NaN cell is never written to except to stay NaN;
* the eight neighbours are numbered clockwise from east:
  0 E, 1 SE, 2 S, 3 SW, 4 W, 5 NW, 6 N, 7 NE.

The kernels are plain loops compiled by numba (``cache=True`` keeps start-up
short after the first run).  The module also holds the DEM checks and the
small runners that apply kernels to numpy blocks or, through
``dask.array.map_overlap``, to dask chunks; the public functions live in
:mod:`wetlandflow.features.terrain`.
"""

from __future__ import annotations

from typing import Any

import numba
import numpy as np
import xarray as xr

from ..errors import DataQualityError, GridMismatchError

DI = np.array([0, 1, 1, 1, 0, -1, -1, -1], dtype=np.int64)
DJ = np.array([1, 1, 0, -1, -1, -1, 0, 1], dtype=np.int64)


@numba.njit(cache=True)
def _is_diagonal(k: int) -> bool:
    return k % 2 == 1


@numba.njit(cache=True)
def _neighbour_distances(dx: float, dy: float) -> np.ndarray:
    diag = np.sqrt(dx * dx + dy * dy)
    return np.array([dx, diag, dy, diag, dx, diag, dy, diag])


# --------------------------------------------------------------------------- heap
# A binary min-heap stored in two parallel arrays (keys, values); ``n`` is the
# current size and is passed in and returned because numba has no closures over
# mutable ints.


@numba.njit(cache=True)
def _heap_push(keys, vals, n, key, val):
    i = n
    while i > 0:
        parent = (i - 1) >> 1
        if keys[parent] <= key:
            break
        keys[i] = keys[parent]
        vals[i] = vals[parent]
        i = parent
    keys[i] = key
    vals[i] = val
    return n + 1


@numba.njit(cache=True)
def _heap_pop(keys, vals, n):
    top_key = keys[0]
    top_val = vals[0]
    n -= 1
    if n > 0:
        key = keys[n]
        val = vals[n]
        i = 0
        while True:
            child = 2 * i + 1
            if child >= n:
                break
            if child + 1 < n and keys[child + 1] < keys[child]:
                child += 1
            if keys[child] >= key:
                break
            keys[i] = keys[child]
            vals[i] = vals[child]
            i = child
        keys[i] = key
        vals[i] = val
    return top_key, top_val, n


# ------------------------------------------------------------ depression filling


@numba.njit(cache=True)
def _touches_edge(z, i, j):
    ny, nx = z.shape
    if i == 0 or j == 0 or i == ny - 1 or j == nx - 1:
        return True
    for k in range(8):
        if np.isnan(z[i + DI[k], j + DJ[k]]):
            return True
    return False


@numba.njit(cache=True)
def priority_flood(z, epsilon, hi, index_dummy):
    """Fill depressions of ``z`` in place (Barnes, Lehman & Mulla 2014, improved variant).

    Cells on the raster border or next to nodata seed a binary min-heap.  A
    neighbour that is not above the popped level is raised to that level (or
    to the next representable float above it when ``epsilon``) and goes to a
    FIFO "pit" queue instead of the heap.  The pit front is taken before the
    heap top unless the heap top is lower, which keeps the processing order
    exactly non-decreasing (the FIFO is sorted because each entry is pushed at
    the current level).  ``hi`` holds +inf in the dtype of ``z`` so
    ``nextafter`` steps in that dtype; ``index_dummy`` fixes the integer dtype
    of the queues (int32 saves memory below 2**31 cells).

    Measured alternatives that were slower here: an ascending "climb" that
    closes slope cells without the heap, and a radix heap on integer keys.
    """
    ny, nx = z.shape
    n = ny * nx
    zf = z.reshape(n)  # flat view for the FIFO test (z is C-contiguous)
    closed = np.zeros((ny, nx), dtype=np.bool_)
    keys = np.empty(n, dtype=np.float64)
    vals = np.empty(n, dtype=index_dummy.dtype)
    pit = np.empty(n, dtype=index_dummy.dtype)
    hn = 0
    head = 0
    tail = 0
    for i in range(ny):
        for j in range(nx):
            if np.isnan(z[i, j]):
                closed[i, j] = True
            elif _touches_edge(z, i, j):
                closed[i, j] = True
                hn = _heap_push(keys, vals, hn, np.float64(z[i, j]), i * nx + j)
    while hn > 0 or head < tail:
        if head < tail and (hn == 0 or zf[pit[head]] <= keys[0]):
            c = np.int64(pit[head])
            head += 1
        else:
            _, cv, hn = _heap_pop(keys, vals, hn)
            c = np.int64(cv)
        ci = c // nx
        cj = c - ci * nx
        level = z[ci, cj]
        if epsilon:
            level = np.nextafter(level, hi[0])
        for k in range(8):
            ni = ci + DI[k]
            nj = cj + DJ[k]
            if ni < 0 or nj < 0 or ni >= ny or nj >= nx or closed[ni, nj]:
                continue
            closed[ni, nj] = True
            if z[ni, nj] <= level:
                z[ni, nj] = level
                pit[tail] = ni * nx + nj
                tail += 1
            else:
                hn = _heap_push(keys, vals, hn, np.float64(z[ni, nj]), ni * nx + nj)
    return z


# ------------------------------------------------------------------ flow routing


@numba.njit(cache=True)
def d8_receivers(z, dx, dy):
    """Steepest-descent neighbour of every cell (O'Callaghan & Mark 1984).

    Returns int8 codes 0..7, -1 where no valid neighbour is strictly lower
    (flow leaves the grid or stops in a pit) and -2 on nodata.
    """
    ny, nx = z.shape
    dist = _neighbour_distances(dx, dy)
    rec = np.full((ny, nx), -2, dtype=np.int8)
    for i in range(ny):
        for j in range(nx):
            zc = z[i, j]
            if np.isnan(zc):
                continue
            best = 0.0
            bk = -1
            for k in range(8):
                ni = i + DI[k]
                nj = j + DJ[k]
                if ni < 0 or nj < 0 or ni >= ny or nj >= nx:
                    continue
                drop = (zc - z[ni, nj]) / dist[k]
                if drop > best:  # False for NaN neighbours
                    best = drop
                    bk = k
            rec[i, j] = bk
    return rec


@numba.njit(cache=True)
def d8_accumulate(rec, cell_area, index_dummy):
    """Upslope area along D8 receivers, in topological order (Kahn's algorithm, O(n)).

    Returns ``(area, order)``; ``order`` lists valid cells upstream before
    downstream, so reversing it visits every receiver before its donors.
    """
    ny, nx = rec.shape
    indeg = np.zeros((ny, nx), dtype=np.uint8)
    acc = np.full((ny, nx), np.nan)
    for i in range(ny):
        for j in range(nx):
            k = rec[i, j]
            if k >= -1:
                acc[i, j] = cell_area
            if k >= 0:
                indeg[i + DI[k], j + DJ[k]] += 1
    stack = np.empty(ny * nx, dtype=index_dummy.dtype)
    order = np.empty(ny * nx, dtype=index_dummy.dtype)
    top = 0
    for i in range(ny):
        for j in range(nx):
            if rec[i, j] >= -1 and indeg[i, j] == 0:
                stack[top] = i * nx + j
                top += 1
    count = 0
    while top > 0:
        top -= 1
        c = np.int64(stack[top])
        order[count] = c
        count += 1
        ci = c // nx
        cj = c - ci * nx
        k = rec[ci, cj]
        if k < 0:
            continue
        ri = ci + DI[k]
        rj = cj + DJ[k]
        acc[ri, rj] += acc[ci, cj]
        indeg[ri, rj] -= 1
        if indeg[ri, rj] == 0:
            stack[top] = ri * nx + rj
            top += 1
    return acc, order[:count]


@numba.njit(cache=True)
def mfd_accumulate(z, dx, dy, exponent, w_card, w_diag, cell_area, index_dummy):
    """Multiple-flow-direction upslope area (Freeman 1991; Quinn et al. 1991).

    Each cell sends its area to every strictly lower valid neighbour in
    proportion to ``tan(beta_k)**exponent * w_k`` (``w_k`` = contour-length
    weight: 1/1 for Freeman, 0.5/0.354 for Quinn).  The donors of a cell are
    exactly its strictly higher valid neighbours, so in-degrees are counted
    from elevations and no per-cell weights are stored (memory stays at a few
    bytes per cell besides the output).
    """
    ny, nx = z.shape
    dist = _neighbour_distances(dx, dy)
    indeg = np.zeros((ny, nx), dtype=np.uint8)
    acc = np.full((ny, nx), np.nan)
    stack = np.empty(ny * nx, dtype=index_dummy.dtype)
    top = 0
    for i in range(ny):
        for j in range(nx):
            zc = z[i, j]
            if np.isnan(zc):
                continue
            acc[i, j] = cell_area
            d = 0
            for k in range(8):
                ni = i + DI[k]
                nj = j + DJ[k]
                if 0 <= ni < ny and 0 <= nj < nx and z[ni, nj] > zc:
                    d += 1
            indeg[i, j] = d
            if d == 0:
                stack[top] = i * nx + j
                top += 1
    weights = np.empty(8)
    while top > 0:
        top -= 1
        c = np.int64(stack[top])
        ci = c // nx
        cj = c - ci * nx
        zc = z[ci, cj]
        total = 0.0
        for k in range(8):
            weights[k] = 0.0
            ni = ci + DI[k]
            nj = cj + DJ[k]
            if 0 <= ni < ny and 0 <= nj < nx and z[ni, nj] < zc:
                w = ((zc - z[ni, nj]) / dist[k]) ** exponent
                w *= w_diag if _is_diagonal(k) else w_card
                weights[k] = w
                total += w
        if total == 0.0:
            continue
        share = acc[ci, cj] / total
        for k in range(8):
            if weights[k] == 0.0:
                continue
            ni = ci + DI[k]
            nj = cj + DJ[k]
            acc[ni, nj] += share * weights[k]
            indeg[ni, nj] -= 1
            if indeg[ni, nj] == 0:
                stack[top] = ni * nx + nj
                top += 1
    return acc


@numba.njit(cache=True)
def hand_from_order(z, rec, channel, order):
    """Height above the nearest drainage along D8 paths (Renno et al. 2008).

    ``order`` is the upstream-first order from :func:`d8_accumulate`; walking
    it backwards sets each cell's drainage elevation from its receiver's.
    Paths that leave the grid without meeting a channel stay NaN.
    """
    ny, nx = z.shape
    ref = np.full((ny, nx), np.nan)
    for t in range(order.size - 1, -1, -1):
        c = np.int64(order[t])
        ci = c // nx
        cj = c - ci * nx
        if channel[ci, cj]:
            ref[ci, cj] = z[ci, cj]
        else:
            k = rec[ci, cj]
            if k >= 0:
                ref[ci, cj] = ref[ci + DI[k], cj + DJ[k]]
    return z - ref


@numba.njit(cache=True)
def _iheap_sift_up(heap, pos, key, i):
    c = heap[i]
    while i > 0:
        parent = (i - 1) >> 1
        if key[heap[parent]] <= key[c]:
            break
        heap[i] = heap[parent]
        pos[heap[i]] = i
        i = parent
    heap[i] = c
    pos[c] = i


@numba.njit(cache=True)
def _iheap_pop(heap, pos, key, n):
    top = heap[0]
    pos[top] = -1
    n -= 1
    if n > 0:
        c = heap[n]
        i = 0
        while True:
            child = 2 * i + 1
            if child >= n:
                break
            if child + 1 < n and key[heap[child + 1]] < key[heap[child]]:
                child += 1
            if key[heap[child]] >= key[c]:
                break
            heap[i] = heap[child]
            pos[heap[i]] = i
            i = child
        heap[i] = c
        pos[c] = i
    return top, n


@numba.njit(cache=True)
def cost_distance(cost, sources, dx, dy):
    """Accumulated cost from ``sources`` (Dijkstra on the 8-neighbour graph).

    A step between two cells costs the mean of their ``cost`` values times the
    step length.  An indexed heap with decrease-key keeps memory at two
    integers per cell.  Unreachable or nodata cells return NaN.
    """
    ny, nx = cost.shape
    n = ny * nx
    dist = _neighbour_distances(dx, dy)
    acc = np.full(n, np.inf)
    done = np.zeros(n, dtype=np.bool_)
    heap = np.empty(n, dtype=np.int64)
    pos = np.full(n, -1, dtype=np.int64)
    cf = cost.reshape(n)
    sf = sources.reshape(n)
    hn = 0
    for c in range(n):
        if sf[c] and not np.isnan(cf[c]):
            acc[c] = 0.0
            heap[hn] = c
            pos[c] = hn
            hn += 1  # all keys equal: already a heap
    while hn > 0:
        c, hn = _iheap_pop(heap, pos, acc, hn)
        done[c] = True
        ci = c // nx
        cj = c - ci * nx
        for k in range(8):
            ni = ci + DI[k]
            nj = cj + DJ[k]
            if ni < 0 or nj < 0 or ni >= ny or nj >= nx:
                continue
            m = ni * nx + nj
            if done[m] or np.isnan(cf[m]):
                continue
            nd = acc[c] + 0.5 * (cf[c] + cf[m]) * dist[k]
            if nd < acc[m]:
                acc[m] = nd
                if pos[m] < 0:
                    heap[hn] = m
                    pos[m] = hn
                    hn += 1
                _iheap_sift_up(heap, pos, acc, pos[m])
    for c in range(n):
        if not done[c]:
            acc[c] = np.nan
    return acc.reshape(ny, nx)


# --------------------------------------------------------------- 3 x 3 stencils


@numba.njit(cache=True)
def _window(a, i, j, w):
    """Fill ``w`` (9 values, rows north to south) around ``(i, j)``.

    A missing neighbour (outside the array or NaN) is replaced by linear
    extrapolation: a missing edge neighbour by ``2 * z5 - z_opposite`` (or the
    centre value when the opposite is missing too), then a missing corner by
    ``z_vertical + z_horizontal - z5`` from the two edge neighbours beside it.
    This keeps the stencils exact on planes at borders, corners and beside
    nodata instead of returning NaN there.
    """
    ny, nx = a.shape
    for di in range(3):
        for dj in range(3):
            ii = i + di - 1
            jj = j + dj - 1
            if 0 <= ii < ny and 0 <= jj < nx:
                w[3 * di + dj] = a[ii, jj]
            else:
                w[3 * di + dj] = np.nan
    z5 = w[4]
    for k in (1, 3, 5, 7):
        if np.isnan(w[k]):
            opp = w[8 - k]
            w[k] = z5 if np.isnan(opp) else 2.0 * z5 - opp
    for k in (0, 2, 6, 8):
        if np.isnan(w[k]):
            w[k] = w[3 * (k // 3) + 1] + w[3 + k % 3] - z5


@numba.njit(cache=True)
def horn_gradient(a, dx, dy):
    """dz/dx (east) and dz/dy (north) by the Horn (1981) 3 x 3 stencil."""
    ny, nx = a.shape
    p = np.full((ny, nx), np.nan)
    q = np.full((ny, nx), np.nan)
    w = np.empty(9)
    for i in range(ny):
        for j in range(nx):
            if np.isnan(a[i, j]):
                continue
            _window(a, i, j, w)
            p[i, j] = ((w[2] + 2 * w[5] + w[8]) - (w[0] + 2 * w[3] + w[6])) / (8 * dx)
            q[i, j] = ((w[0] + 2 * w[1] + w[2]) - (w[6] + 2 * w[7] + w[8])) / (8 * dy)
    return p, q


@numba.njit(cache=True)
def zt_curvatures(a, dx, dy):
    """Profile, plan and total curvature (Zevenbergen & Thorne 1987), in 1/m.

    Sign convention (the formulas as written in the module docstring):
    profile = -2(DG^2 + EH^2 + FGH)/(G^2 + H^2), plan = 2(DH^2 + EG^2 - FGH)/(G^2 + H^2),
    total = -2(D + E).  Profile and plan are set to 0 where G = H = 0.
    """
    ny, nx = a.shape
    prof = np.full((ny, nx), np.nan)
    plan = np.full((ny, nx), np.nan)
    tot = np.full((ny, nx), np.nan)
    w = np.empty(9)
    for i in range(ny):
        for j in range(nx):
            if np.isnan(a[i, j]):
                continue
            _window(a, i, j, w)
            d = ((w[3] + w[5]) / 2 - w[4]) / (dx * dx)
            e = ((w[1] + w[7]) / 2 - w[4]) / (dy * dy)
            f = (-w[0] + w[2] + w[6] - w[8]) / (4 * dx * dy)
            g = (w[5] - w[3]) / (2 * dx)
            h = (w[1] - w[7]) / (2 * dy)
            g2h2 = g * g + h * h
            tot[i, j] = -2 * (d + e)
            if g2h2 > 0:
                prof[i, j] = -2 * (d * g * g + e * h * h + f * g * h) / g2h2
                plan[i, j] = 2 * (d * h * h + e * g * g - f * g * h) / g2h2
            else:
                prof[i, j] = 0.0
                plan[i, j] = 0.0
    return prof, plan, tot


# ------------------------------------------------------------ percentile (MRVBF)


@numba.njit(cache=True)
def fraction_lower_in_circle(a, radius):
    """Share of valid cells within ``radius`` cells (centre excluded) strictly lower than the centre.

    This is the elevation percentile of Gallant & Dowling (2003).  Cells
    outside the array or NaN do not count; a cell with no valid neighbour gets 0.
    """
    ny, nx = a.shape
    r = int(np.floor(radius))
    out = np.full((ny, nx), np.nan)
    for i in range(ny):
        for j in range(nx):
            zc = a[i, j]
            if np.isnan(zc):
                continue
            n_valid = 0
            n_lower = 0
            for di in range(-r, r + 1):
                ii = i + di
                if ii < 0 or ii >= ny:
                    continue
                for dj in range(-r, r + 1):
                    jj = j + dj
                    if jj < 0 or jj >= nx or (di == 0 and dj == 0) or di * di + dj * dj > radius * radius:
                        continue
                    v = a[ii, jj]
                    if not np.isnan(v):
                        n_valid += 1
                        if v < zc:
                            n_lower += 1
            out[i, j] = n_lower / n_valid if n_valid > 0 else 0.0
    return out


# ------------------------------------------- block runners (numpy / dask map_overlap)


def horn_block(block: np.ndarray, *, dx: float, dy: float, what: str) -> np.ndarray:
    """Horn slope as tan(beta) (``what="slope"``) or downslope azimuth in degrees, NaN on flats."""
    p, q = horn_gradient(np.asarray(block, dtype=np.float64), dx, dy)
    if what == "slope":
        return np.hypot(p, q)
    azimuth = np.degrees(np.arctan2(-p, -q)) % 360.0
    return np.where((p == 0) & (q == 0), np.nan, azimuth)


def zt_block(block: np.ndarray, *, dx: float, dy: float, kind: str) -> np.ndarray:
    """One Zevenbergen & Thorne curvature of a block."""
    prof, plan, tot = zt_curvatures(np.asarray(block, dtype=np.float64), dx, dy)
    return {"profile": prof, "plan": plan, "total": tot}[kind]


def disk(radius_cells: float, inner_cells: float) -> np.ndarray:
    """Footprint of the cells with inner < distance <= radius (in cells)."""
    r = int(np.floor(radius_cells))
    ii, jj = np.mgrid[-r : r + 1, -r : r + 1]
    d = np.hypot(ii, jj)
    return ((d <= radius_cells) & (d > inner_cells)).astype(np.float64)


def tpi_block(block: np.ndarray, *, footprint: np.ndarray) -> np.ndarray:
    """Elevation minus the mean of the valid cells under ``footprint`` (centre excluded by it)."""
    from scipy import ndimage

    z = np.asarray(block, dtype=np.float64)
    valid = ~np.isnan(z)
    total = ndimage.correlate(np.where(valid, z, 0.0), footprint, mode="constant", cval=0.0)
    count = ndimage.correlate(valid.astype(np.float64), footprint, mode="constant", cval=0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = total / count
    return np.where(valid & (count > 0), z - mean, np.nan)


# ------------------------------------------------ DEM checks and xarray/dask plumbing


def _require_choice(name: str, value: Any, allowed: tuple[str, ...]) -> None:
    if value not in allowed:
        raise ValueError(f"{name} must be one of {allowed}, got {value!r}. Pass one of the listed values.")


def _check_dem(dem: xr.DataArray) -> None:
    if not isinstance(dem, xr.DataArray) or tuple(dem.dims) != ("y", "x"):
        got = tuple(dem.dims) if isinstance(dem, xr.DataArray) else type(dem).__name__
        raise GridMismatchError(
            f"a DEM must be an xarray.DataArray with dims ('y', 'x'), got {got}. "
            "Select one band and transpose, e.g. dem.squeeze('band', drop=True).transpose('y', 'x')."
        )
    if not np.issubdtype(dem.dtype, np.number):
        raise DataQualityError(f"DEM values must be numeric elevations in metres, got dtype {dem.dtype}.")


def _spacing(values: np.ndarray, dim: str) -> float:
    steps = np.diff(np.asarray(values, dtype=np.float64))
    step = float(np.median(steps))
    if not np.allclose(steps, step, rtol=1e-6, atol=1e-9 * max(abs(step), 1.0)):
        raise GridMismatchError(
            f"the {dim!r} coordinate is not regularly spaced (steps {steps.min()} to {steps.max()}). "
            "Resample the DEM onto the reference grid first."
        )
    return step


def grid_spacing(dem: xr.DataArray, cellsize: float | None = None) -> tuple[float, float]:
    """Return the pixel size ``(dx, dy)`` in metres of a north-up DEM.

    Parameters
    ----------
    dem : xarray.DataArray
        DEM with dims ``("y", "x")``.
    cellsize : float, optional
        Explicit square pixel size; required when a dimension has a single cell.

    Returns
    -------
    tuple of float
        Positive spacings along ``x`` and ``y``.
    """
    _check_dem(dem)
    if cellsize is not None:
        if not cellsize > 0:
            raise GridMismatchError(f"cellsize must be a positive number of metres, got {cellsize!r}.")
        return float(cellsize), float(cellsize)
    if dem.sizes["x"] < 2 or dem.sizes["y"] < 2:
        raise GridMismatchError(
            f"cannot infer the pixel size from a {dem.sizes['y']} x {dem.sizes['x']} DEM; pass cellsize=."
        )
    dx = _spacing(dem["x"].values, "x")
    dy = _spacing(dem["y"].values, "y")
    if dx <= 0 or dy >= 0:
        raise GridMismatchError(
            f"the DEM must be north-up (x increasing, y decreasing), got x step {dx} and y step {dy}. "
            "Use dem.sortby('x').sortby('y', ascending=False)."
        )
    return dx, -dy


def _square_cellsize(dem: xr.DataArray, cellsize: float | None) -> float:
    dx, dy = grid_spacing(dem, cellsize)
    if abs(dx - dy) > 1e-6 * dx:
        raise GridMismatchError(
            f"flow routing needs square pixels, got dx={dx} m and dy={dy} m. Resample to a square grid."
        )
    return dx


def _as_float_array(dem: xr.DataArray) -> np.ndarray:
    """Whole DEM in memory, float32 kept (so epsilon steps stay representable), ints as float64."""
    values = np.asarray(dem.data)
    dtype = values.dtype if values.dtype in (np.float32, np.float64) else np.float64
    return np.ascontiguousarray(values, dtype=dtype)


def _index_dummy(n: int) -> np.ndarray:
    return np.zeros(1, dtype=np.int32 if n < 2**31 - 1 else np.int64)


def _wrap(dem: xr.DataArray, values: Any) -> xr.DataArray:
    """Result on the DEM's coordinates; chunked like the DEM when that was dask-backed."""
    chunks = dem.chunks
    if chunks is not None and isinstance(values, np.ndarray):
        import dask.array as da

        values = da.from_array(values, chunks=chunks)
    return xr.DataArray(values, coords=dem.coords, dims=dem.dims)


def _map_stencil(dem: xr.DataArray, block_func: Any, depth: int, **kwargs: Any) -> xr.DataArray:
    """Run ``block_func`` on the whole array, or per chunk with a NaN-padded halo under dask."""
    data = dem.data
    if dem.chunks is not None:
        out = data.map_overlap(
            block_func, depth=depth, boundary=np.nan, meta=np.array((), np.float64), **kwargs
        )
    else:
        out = block_func(np.asarray(data), **kwargs)
    return xr.DataArray(out, coords=dem.coords, dims=dem.dims)
