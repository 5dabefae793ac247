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
from llvmlite import ir
from numba import types
from numba.core import cgutils
from numba.extending import intrinsic

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


# ------------------------------------------------------------ depression filling
# Filling and routing run on a copy of the DEM padded with one ring of NaN
# (:func:`pad_nan`): the raster border then needs no bounds checks, border
# cells are outlets for the same reason as cells next to nodata, and a
# neighbour is one flat-index offset away (:func:`_offsets`).


def pad_nan(values: np.ndarray) -> np.ndarray:
    """C-contiguous copy of ``values`` with one ring of NaN around it (same dtype)."""
    out = np.empty((values.shape[0] + 2, values.shape[1] + 2), dtype=values.dtype)
    out[0, :] = np.nan
    out[-1, :] = np.nan
    out[:, 0] = np.nan
    out[:, -1] = np.nan
    out[1:-1, 1:-1] = values
    return out


@numba.njit(cache=True)
def _offsets(row: int) -> np.ndarray:
    """Flat-index steps to the eight neighbours (E, SE, S, SW, W, NW, N, NE) on rows ``row`` long."""
    return np.array([1, row + 1, row, row - 1, -1, -row - 1, -row, -row + 1], dtype=np.int64)


_PREFETCH = "llvm.prefetch.p0i8" if getattr(ir, "ir_layer_typed_pointers_enabled", True) else "llvm.prefetch.p0"


@intrinsic
def _prefetch(typingctx, arr, index):
    """Hint the CPU to load ``arr[index]`` into cache (LLVM's prefetch; no effect on results).

    The flood jumps to a random place of the grid at every priority-queue
    pop; fetching the next pop's rows while the current cell is processed
    hides much of that memory latency.
    """
    sig = types.void(arr, index)

    def codegen(context, builder, signature, args):
        ary = context.make_array(signature.args[0])(context, builder, args[0])
        ptr = cgutils.get_item_pointer(context, builder, signature.args[0], ary, [args[1]], wraparound=False)
        i8p = ir.IntType(8).as_pointer()
        i32 = ir.IntType(32)
        fnty = ir.FunctionType(ir.VoidType(), [i8p, i32, i32, i32])
        fn = cgutils.get_or_insert_function(builder.module, fnty, _PREFETCH)
        # read access, high temporal locality, data cache
        builder.call(fn, [builder.bitcast(ptr, i8p), ir.Constant(i32, 0), ir.Constant(i32, 3), ir.Constant(i32, 1)])
        return context.get_dummy_value()

    return sig, codegen


@numba.njit(cache=True)
def _prefetch_rows(state, key, c, row):
    """Prefetch the three rows of the 3 x 3 neighbourhood of ``c`` in both flood arrays."""
    for r in (c - row, c, c + row):
        _prefetch(state, r)
        _prefetch(key, r)


@numba.njit(cache=True)
def _ctz(x):
    """Index of the lowest set bit of a non-zero uint64."""
    n = 0
    if (x & np.uint64(0xFFFFFFFF)) == 0:
        n += 32
        x >>= np.uint64(32)
    if (x & np.uint64(0xFFFF)) == 0:
        n += 16
        x >>= np.uint64(16)
    if (x & np.uint64(0xFF)) == 0:
        n += 8
        x >>= np.uint64(8)
    if (x & np.uint64(0xF)) == 0:
        n += 4
        x >>= np.uint64(4)
    if (x & np.uint64(0x3)) == 0:
        n += 2
        x >>= np.uint64(2)
    if (x & np.uint64(0x1)) == 0:
        n += 1
    return n


@numba.njit(cache=True)
def _radix_order(keys, idx):
    """Reorder ``idx`` by ascending ``keys`` (unsigned ints): stable LSD radix sort, 11-bit digits."""
    nv = keys.size
    passes = (keys.itemsize * 8 + 10) // 11
    hist = np.zeros((passes, 2049), dtype=np.int64)
    for t in range(nv):
        u = np.uint64(keys[t])
        for p in range(passes):
            hist[p, ((u >> np.uint64(11 * p)) & np.uint64(2047)) + 1] += 1
    k2 = np.empty_like(keys)
    i2 = np.empty_like(idx)
    for p in range(passes):
        h = hist[p]
        if h.max() == nv:  # every key has the same digit: the pass would not move anything
            continue
        for b in range(2048):
            h[b + 1] += h[b]
        shift = np.uint64(11 * p)
        for t in range(nv):
            b = (np.uint64(keys[t]) >> shift) & np.uint64(2047)
            d = h[b]
            h[b] = d + 1
            k2[d] = keys[t]
            i2[d] = idx[t]
        keys, k2 = k2, keys
        idx, i2 = i2, idx
    return idx


@numba.njit(cache=True)
def _to_ordered_keys(z, key, state, sign, nodata):
    """Replace the float bits of every valid cell by an unsigned int of the same order, in place.

    ``key`` is ``z`` viewed as unsigned ints of its width and ``sign`` that
    width's top bit.  Positive floats get the sign bit set, negative ones are
    bit-inverted, so integer order is float order and the next float up is
    ``key + 1``.  -0.0 becomes +0.0, so one step up from zero is the smallest
    positive float as with ``numpy.nextafter``.  NaN cells keep their bits and
    get ``state = nodata``.  Returns the valid keys and their flat indices.
    """
    n = z.size
    nv = 0
    for c in range(n):
        if np.isnan(z[c]):
            state[c] = nodata
        else:
            state[c] = 0
            nv += 1
    keys = np.empty(nv, dtype=key.dtype)
    idx = np.empty(nv, dtype=state.dtype)
    t = 0
    for c in range(n):
        if state[c] == nodata:
            continue
        u = key[c]
        if u == sign:
            u = sign ^ sign
        u = ~u if u & sign else u | sign
        key[c] = u
        keys[t] = u
        idx[t] = c
        t += 1
    return keys, idx


@numba.njit(cache=True)
def _from_ordered_keys(key, state, sign, nodata):
    """Inverse of :func:`_to_ordered_keys` on every cell whose state is not ``nodata``."""
    for c in range(key.size):
        if state[c] != nodata:
            u = key[c]
            key[c] = u & ~sign if u & sign else ~u


@numba.njit(cache=True)
def _bitset_add(words, summary, r):
    one = np.uint64(1)
    words[r >> 6] |= one << np.uint64(r & 63)
    summary[r >> 12] |= one << np.uint64((r >> 6) & 63)


@numba.njit(cache=True)
def _bitset_next(words, summary, r):
    """Clear bit ``r`` (the lowest set bit) and return the next set bit; the set must not become empty."""
    one = np.uint64(1)
    w = r >> 6
    words[w] &= ~(one << np.uint64(r & 63))
    if words[w] != 0:
        return (w << 6) + _ctz(words[w])
    s = w >> 6
    bit = np.uint64(w & 63)
    summary[s] &= ~(one << bit)
    rest = summary[s] & ~((one << bit) - one)
    while rest == 0:
        s += 1
        rest = summary[s]
    w = (s << 6) + _ctz(rest)
    return (w << 6) + _ctz(words[w])


@numba.njit(cache=True)
def _seed_outlets(state, nyp, nxp, nodata, words, summary):
    """Queue every valid cell next to nodata (the padding ring included); return (count, lowest rank)."""
    count = 0
    lowest = np.int64(state.size)
    for i in range(nyp):
        for j in range(nxp):
            if state[i * nxp + j] != nodata:
                continue
            for k in range(8):
                ni = i + DI[k]
                nj = j + DJ[k]
                if 0 <= ni < nyp and 0 <= nj < nxp and state[ni * nxp + nj] >= 0:
                    r = np.int64(state[ni * nxp + nj])
                    state[ni * nxp + nj] = ~state[ni * nxp + nj]
                    _bitset_add(words, summary, r)
                    count += 1
                    lowest = min(lowest, r)
    return count, lowest


@numba.njit(cache=True)
def _flood(key, state, order, nxp, epsilon, inf_key, words, summary, count, cursor):
    """The Priority-Flood loop on ordered keys; see :func:`priority_flood`."""
    off = _offsets(nxp)
    pit = np.empty(state.size, dtype=state.dtype)
    head = 0
    tail = 0
    one = np.ones_like(inf_key)[0]
    empty = np.int64(order.size)
    lowest = key[order[cursor]] if count > 0 else inf_key[0]  # key of the queue's minimum, kept in step
    while count > 0 or head < tail:
        if head < tail and (count == 0 or key[pit[head]] <= lowest):
            c = np.int64(pit[head])
            head += 1
        else:
            c = np.int64(order[cursor])
            count -= 1
            if count > 0:
                cursor = _bitset_next(words, summary, cursor)
                following = np.int64(order[cursor])
                _prefetch_rows(state, key, following, nxp)
                lowest = key[following]
            else:
                cursor = empty
        level = key[c]
        if epsilon and level != inf_key[0]:
            level += one  # the next representable float above the level
        for k in range(8):
            m = c + off[k]
            sm = state[m]
            if sm < 0:  # closed or nodata
                continue
            state[m] = ~sm
            if key[m] <= level:
                key[m] = level
                pit[tail] = m
                tail += 1
            else:
                _bitset_add(words, summary, np.int64(sm))
                count += 1
                if sm < cursor:
                    cursor = np.int64(sm)
                    lowest = key[m]


@numba.njit(cache=True)
def priority_flood(zp, epsilon, index_dummy, key_dummy, sign):
    """Fill depressions of the NaN-padded DEM ``zp`` in place.

    Priority-Flood (Barnes, Lehman & Mulla 2014, "improved" variant).
    Cells next to NaN (the padding ring included) are the outlets.  When a
    cell is taken at level ``L`` (its elevation, or the next representable
    float above it when ``epsilon``), each open neighbour at or below ``L``
    is raised to ``L`` and queued first-in first-out; each open neighbour
    above ``L`` joins the priority queue.  The FIFO front is taken unless
    the priority queue's lowest cell is lower, so cells are taken in
    non-decreasing order (the FIFO is sorted because entries are pushed at
    the current level).

    ``key_dummy`` is +inf in the DEM's dtype viewed as the unsigned int of
    the same width (uint32 or uint64) and ``sign`` that width's top bit.

    Two choices make it fast on large grids:

    * elevations are replaced in place by unsigned ints of the same order
      so one float step
      up is ``+ 1`` and comparisons are integer ones;
    * the priority queue is a bitset over the cells' ranks in a radix sort
      of the elevations: a cell above the current level always has a higher
      rank than every cell taken so far, so the queue's minimum only moves
      forward between pushes and is found by scanning words of the bitset
      (a two-level bitset skips empty stretches).  Only unraised cells enter
      it, and their keys are their own elevations.

    ``state`` holds per cell the rank while open, ``~rank`` once closed and
    the integer minimum on nodata: one array carries the closed flag and the
    queue index.  Queues use the integer dtype of ``index_dummy``.
    """
    nyp, nxp = zp.shape
    n = nyp * nxp
    z = zp.reshape(n)
    key = z.view(key_dummy.dtype)
    state = np.empty(n, dtype=index_dummy.dtype)
    nodata = np.iinfo(index_dummy.dtype).min
    top = sign[0]
    keys, idx = _to_ordered_keys(z, key, state, top, nodata)
    order = _radix_order(keys, idx)
    for r in range(order.size):
        state[order[r]] = r
    nwords = (order.size + 63) >> 6
    words = np.zeros(nwords, dtype=np.uint64)
    summary = np.zeros((nwords + 63) >> 6, dtype=np.uint64)
    count, cursor = _seed_outlets(state, nyp, nxp, nodata, words, summary)
    inf_key = key_dummy | top  # key_dummy holds the bits of +inf
    _flood(key, state, order, nxp, epsilon, inf_key, words, summary, count, cursor)
    _from_ordered_keys(key, state, top, nodata)
    return zp


# ------------------------------------------------------------------ flow routing


@numba.njit(cache=True)
def d8_receivers(zp, dx, dy):
    """Steepest-descent neighbour of every cell of a NaN-padded DEM (O'Callaghan & Mark 1984).

    Returns int8 codes 0..7 on the unpadded grid, -1 where no valid
    neighbour is strictly lower (flow leaves the grid or stops in a pit) and
    -2 on nodata.  Drops are computed in float64 whatever the DEM's dtype.
    """
    nyp, nxp = zp.shape
    z = zp.reshape(nyp * nxp)
    off = _offsets(nxp)
    dist = _neighbour_distances(dx, dy)
    rec = np.empty((nyp - 2, nxp - 2), dtype=np.int8)
    for i in range(nyp - 2):
        row = (i + 1) * nxp + 1
        for j in range(nxp - 2):
            c = row + j
            zc = np.float64(z[c])
            if np.isnan(zc):
                rec[i, j] = -2
                continue
            best = 0.0
            bk = -1
            for k in range(8):
                drop = (zc - np.float64(z[c + off[k]])) / dist[k]
                if drop > best:  # False for NaN neighbours
                    best = drop
                    bk = k
            rec[i, j] = bk
    return rec


@numba.njit(cache=True)
def _d8_indegree(rec, cell_area, acc, indeg, off):
    n = rec.size
    for c in range(n):
        k = rec[c]
        if k >= -1:
            acc[c] = cell_area
        else:
            acc[c] = np.nan
        if k >= 0:
            indeg[c + off[k]] += 1


@numba.njit(cache=True)
def d8_accumulate(rec, cell_area, index_dummy, want_order):
    """Upslope area along D8 receivers, in topological order, O(n) and without a queue.

    Every source cell (no donors) starts a walk downstream that adds the
    area carried so far to each receiver and goes on only while that
    receiver has no unfinished donor left (its in-degree drops to 0).  This
    is Kahn's topological sort with the queue replaced by the walk, which
    keeps memory accesses along flow paths.

    Returns ``(area, order)``; when ``want_order`` is True ``order`` lists
    valid cells upstream before downstream (so reversing it visits every
    receiver before its donors), otherwise it is empty.
    """
    ny, nx = rec.shape
    n = ny * nx
    r = rec.reshape(n)
    off = _offsets(nx)
    acc = np.empty((ny, nx))
    a = acc.reshape(n)
    indeg = np.zeros(n, dtype=np.uint8)
    _d8_indegree(r, cell_area, a, indeg, off)
    order = np.empty(n if want_order else 0, dtype=index_dummy.dtype)
    count = 0
    for s in range(n):
        if indeg[s] != 0 or r[s] < -1:
            continue
        c = s
        while True:
            indeg[c] = 255  # done: never a source again (in-degrees are at most 8)
            if want_order:
                order[count] = c
                count += 1
            k = r[c]
            if k < 0:
                break
            m = c + off[k]
            a[m] += a[c]
            indeg[m] -= 1
            if indeg[m] != 0:
                break
            c = m
    return acc, order[:count]


@numba.njit(cache=True)
def _mfd_indegree(z, cell_area, acc, indeg, stack, off):
    """Donor counts (strictly higher valid neighbours) and the initial sources; returns the stack size."""
    top = 0
    for c in range(z.size):
        zc = z[c]
        if np.isnan(zc):
            acc[c] = np.nan
            continue
        acc[c] = cell_area
        d = 0
        for k in range(8):
            if z[c + off[k]] > zc:  # valid cells never sit on the padding ring
                d += 1
        indeg[c] = d
        if d == 0:
            stack[top] = c
            top += 1
    return top


@numba.njit(cache=True)
def mfd_accumulate(zp, dx, dy, exponent, w_card, w_diag, cell_area, index_dummy):
    """Multiple-flow-direction upslope area on a NaN-padded DEM (Freeman 1991; Quinn et al. 1991).

    Each cell sends its area to every strictly lower valid neighbour in
    proportion to ``tan(beta_k)**exponent * w_k`` (``w_k`` = contour-length
    weight: 1/1 for Freeman, 0.5/0.354 for Quinn).  The donors of a cell are
    exactly its strictly higher valid neighbours, so in-degrees are counted
    from elevations and no per-cell weights are stored: memory is the
    float64 result plus one byte per cell and the stack of ready cells.
    Returns the area on the padded grid (NaN on the ring).
    """
    nyp, nxp = zp.shape
    n = nyp * nxp
    z = zp.reshape(n)
    off = _offsets(nxp)
    dist = _neighbour_distances(dx, dy)
    acc = np.empty((nyp, nxp))
    a = acc.reshape(n)
    indeg = np.zeros(n, dtype=np.uint8)
    stack = np.empty(n, dtype=index_dummy.dtype)
    top = _mfd_indegree(z, cell_area, a, indeg, stack, off)
    weights = np.empty(8)
    while top > 0:
        top -= 1
        c = np.int64(stack[top])
        zc = np.float64(z[c])
        total = 0.0
        for k in range(8):
            weights[k] = 0.0
            zn = np.float64(z[c + off[k]])
            if zn < zc:  # False for NaN neighbours
                w = ((zc - zn) / dist[k]) ** exponent
                w *= w_diag if _is_diagonal(k) else w_card
                weights[k] = w
                total += w
        if total == 0.0:
            continue
        share = a[c] / total
        for k in range(8):
            if weights[k] == 0.0:
                continue
            m = c + off[k]
            a[m] += share * weights[k]
            indeg[m] -= 1
            if indeg[m] == 0:
                stack[top] = m
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


# ------------------------------------------------------------------ MRVBF kernels
# Gallant & Dowling (2003).  Each step's flatness, lowness and combination are
# fused per pixel so a step holds no full-size temporaries, and the coarse
# grids are interpolated back to the base grid on the fly.


@numba.njit(cache=True)
def _nfun(x, t, p):
    """``N(x; t, p) = 1 / (1 + (x / t)^p)`` for a small integer shape ``p`` (repeated products)."""
    r = x / t
    y = 1.0
    for _ in range(p):
        y *= r
    return 1.0 / (1.0 + y)


@numba.njit(cache=True)
def _horn_slope_percent(p, q):
    return 100.0 * np.sqrt(p * p + q * q)


@numba.njit(cache=True)
def flatness(a, cs, t_slope):
    """``N(S; t, 4)`` with ``S`` the Horn (1981) slope in percent: the MRVBF flatness, NaN on nodata.

    Interior rows are computed as whole-row stencils (vectorised by the
    compiler); cells on the border or next to nodata are redone with the
    module's extrapolation edge policy (:func:`_window`).  Square pixels.
    """
    ny, nx = a.shape
    out = np.empty((ny, nx))
    for i in range(ny):
        o = out[i]
        if 0 < i < ny - 1:
            up = a[i - 1]
            mid = a[i]
            down = a[i + 1]
            for j in range(1, nx - 1):
                p = ((up[j + 1] + 2 * mid[j + 1] + down[j + 1]) - (up[j - 1] + 2 * mid[j - 1] + down[j - 1])) / (8 * cs)
                q = ((up[j - 1] + 2 * up[j] + up[j + 1]) - (down[j - 1] + 2 * down[j] + down[j + 1])) / (8 * cs)
                o[j] = _horn_slope_percent(p, q)
        w = np.empty(9)
        for j in range(nx):
            if np.isnan(a[i, j]):
                o[j] = np.nan
                continue
            if not (0 < i < ny - 1 and 0 < j < nx - 1) or np.isnan(o[j]):
                _window(a, i, j, w)
                p = ((w[2] + 2 * w[5] + w[8]) - (w[0] + 2 * w[3] + w[6])) / (8 * cs)
                q = ((w[0] + 2 * w[1] + w[2]) - (w[6] + 2 * w[7] + w[8])) / (8 * cs)
                o[j] = _horn_slope_percent(p, q)
            o[j] = _nfun(o[j], t_slope, 4)
    return out


@numba.njit(cache=True)
def _circle_spans(radius):
    """Half-width of each row of the disc ``di^2 + dj^2 <= radius^2``, for di = -r .. r."""
    r = int(np.floor(radius))
    half = np.empty(2 * r + 1, dtype=np.int64)
    for di in range(-r, r + 1):
        h = 0
        while (h + 1) * (h + 1) + di * di <= radius * radius:
            h += 1
        half[di + r] = h
    return half


@numba.njit(cache=True)
def _count_lower_row(a, i, half, lower, valid):
    """For every cell of row ``i``: valid cells and strictly lower cells in its disc, centre excluded.

    Loops over the disc's offsets outside and the row inside, so the inner
    loop runs over contiguous memory; a NaN neighbour is neither valid nor
    lower (NaN compares false), cells outside the array are skipped.
    """
    ny, nx = a.shape
    r = half.size // 2
    centre = a[i]
    lower[:] = 0
    valid[:] = 0
    for di in range(-r, r + 1):
        ii = i + di
        if ii < 0 or ii >= ny:
            continue
        row = a[ii]
        h = half[di + r]
        for dj in range(-h, h + 1):
            if di == 0 and dj == 0:
                continue
            lo = max(0, -dj)
            hi = min(nx, nx - dj)
            src = row[lo + dj : hi + dj]
            ctr = centre[lo:hi]
            low = lower[lo:hi]
            val = valid[lo:hi]
            for t in range(hi - lo):
                v = src[t]
                low[t] += v < ctr[t]
                val[t] += v == v


@numba.njit(cache=True, parallel=True)
def position(a, radius, t_pctl, ridge, combined):
    """Lowness ``N(PCTL; t, 3)`` (of ``1 - PCTL`` when ``ridge``), or a step's VF when ``combined`` is given.

    PCTL is the share of valid cells within ``radius`` cells (centre
    excluded) strictly lower than the centre (Gallant & Dowling 2003); cells
    outside the array or NaN do not count and a cell with no valid neighbour
    gets PCTL = 0.  With a non-empty ``combined`` (the combined flatness CF
    on the same grid) the result is ``VF = 1 - N(CF * N(PCTL); 0.3, 4)``
    instead.  NaN on nodata.
    """
    ny, nx = a.shape
    half = _circle_spans(radius)
    fused = combined.size > 0
    out = np.empty((ny, nx))
    for i in numba.prange(ny):
        lower = np.empty(nx, dtype=np.int32)
        valid = np.empty(nx, dtype=np.int32)
        _count_lower_row(a, i, half, lower, valid)
        for j in range(nx):
            if np.isnan(a[i, j]):
                out[i, j] = np.nan
                continue
            pctl = lower[j] / valid[j] if valid[j] > 0 else 0.0
            pos = _nfun(1.0 - pctl if ridge else pctl, t_pctl, 3)
            out[i, j] = _valley_flatness(combined[i, j], pos) if fused else pos
    return out


@numba.njit(cache=True)
def _valley_flatness(combined, pos):
    return 1.0 - _nfun(combined * pos, 0.3, 4)


@numba.njit(cache=True)
def _merge(index, vf, s):
    """MRVBF_s = w (s - 1 + VF_s) + (1 - w) MRVBF_(s-1), w = 1 - N(VF_s; 0.4, 6)."""
    w = 1.0 - _nfun(vf, 0.4, 6)
    return w * (s - 1 + vf) + (1.0 - w) * index


def axis_weights(size: int, n_base: int, offset: float, factor: int) -> tuple[np.ndarray, np.ndarray]:
    """Lower coarse index and weight of the linear interpolation at each of ``n_base`` base indices.

    Coarse cell ``k`` sits at base index ``offset + k * factor``; positions
    outside the coarse grid are clamped to its ends.
    """
    if size == 1:
        return np.zeros(n_base, dtype=np.int64), np.zeros(n_base)
    pos = np.clip((np.arange(n_base) - offset) / factor, 0, size - 1)
    i0 = np.minimum(np.floor(pos).astype(np.int64), size - 2)
    return i0, pos - i0


@numba.njit(cache=True)
def _interpolate_rows(c, start, ny, nx, i0, wy, out):
    """Linear interpolation between coarse rows ``i0`` and ``i0 + 1`` (clamped) of the grid ``c[start:]``."""
    i1 = min(i0 + 1, ny - 1)
    a = start + i0 * nx
    b = start + i1 * nx
    for t in range(nx):
        out[t] = c[a + t] * (1 - wy) + c[b + t] * wy


@numba.njit(cache=True, parallel=True)
def merge_steps(vf1, vf2, cf2, flats, positions, starts, shapes, yi, wy, xj, wx):
    """MRVBF from steps 1 and 2 on the base grid and every coarser step, written over ``vf1``.

    The coarse grids of steps 3, 4, ... lie one after the other in the flat
    arrays ``flats`` (their flatness F_s) and ``positions`` (their N(PCTL_s)),
    grid k starting at ``starts[k]`` with shape ``shapes[k]``; ``yi[k], wy[k]``
    and ``xj[k], wx[k]`` are its interpolation indices and weights along the
    base rows and columns (:func:`axis_weights`).
    Every pixel is independent, so all steps are merged in one pass with no
    base-size temporaries:
    ``CF_s = CF_(s-1) F_s``, ``VF_s = 1 - N(CF_s N(PCTL_s); 0.3, 4)`` and
    :func:`_merge`, with F_s and N(PCTL_s) interpolated bilinearly (rows
    first, once per base row, then columns).
    """
    ny, nx = vf1.shape
    nc = starts.size
    widest = shapes[:, 1].max() if nc > 0 else 1
    for i in numba.prange(ny):
        row_f = np.empty((nc, widest))
        row_p = np.empty((nc, widest))
        for k in range(nc):
            _interpolate_rows(flats, starts[k], shapes[k, 0], shapes[k, 1], yi[k, i], wy[k, i], row_f[k])
            _interpolate_rows(positions, starts[k], shapes[k, 0], shapes[k, 1], yi[k, i], wy[k, i], row_p[k])
        for j in range(nx):
            index = _merge(vf1[i, j], vf2[i, j], 2)
            cf = cf2[i, j]
            for k in range(nc):
                j0 = xj[k, j]
                j1 = min(j0 + 1, shapes[k, 1] - 1)
                u = wx[k, j]
                cf *= row_f[k, j0] * (1 - u) + row_f[k, j1] * u
                pos = row_p[k, j0] * (1 - u) + row_p[k, j1] * u
                index = _merge(index, _valley_flatness(cf, pos), k + 3)
            vf1[i, j] = index
    return vf1


# ------------------------------------------- block runners (numpy / dask map_overlap)


def fill_padded(values: np.ndarray, epsilon: bool) -> np.ndarray:
    """Priority-Flood fill of a float32 or float64 array, returned with its one-cell NaN ring.

    See :func:`priority_flood`; cells that were -0.0 and are still zero keep
    their sign (the kernel works on +0.0).
    """
    padded = pad_nan(values)
    width = np.uint32 if values.dtype == np.float32 else np.uint64
    inf_bits = np.array([np.inf], dtype=values.dtype).view(width)
    sign = np.array([1 << (8 * values.itemsize - 1)], dtype=width)
    negative_zero = np.flatnonzero((values == 0) & np.signbit(values))
    filled = priority_flood(padded, bool(epsilon), _index_dummy(padded.size), inf_bits, sign)
    if negative_zero.size:
        inner = filled[1:-1, 1:-1]
        rows, cols = np.unravel_index(negative_zero, values.shape)
        inner[rows, cols] = np.where(inner[rows, cols] == 0, -0.0, inner[rows, cols])
    return filled


def fill_array(values: np.ndarray, epsilon: bool) -> np.ndarray:
    """Priority-Flood fill of a float32 or float64 array (a new C-contiguous array, same dtype).

    Cells on the border and next to NaN are outlets.  ``epsilon=False`` gives
    the exact flat fill (the lowest surface without closed depressions that
    is never below ``values``); ``epsilon=True`` adds one float step per cell
    of fill so every filled or flat cell has a strictly lower neighbour.
    """
    return np.ascontiguousarray(fill_padded(values, epsilon)[1:-1, 1:-1])



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
