"""Numba kernels behind :mod:`wetlandflow.monitoring.trends`: Mann-Kendall, Hamed-Rao, Theil-Sen per series.

One series is one row of a ``(n_series, n_times)`` float64 block; NaN marks a missing year and is dropped
before anything is computed.  ``t`` holds the time of each column (years, increasing, possibly with gaps).
Every statistic of a series is written to one row of the ``(n_series, len(STATS))`` output, in the order of
:data:`STATS`; a series with fewer than ``min_count`` valid values gets NaN throughout.

The kernel follows the conventions of pymannkendall (Hussain et al. 2019) so that the two agree to rounding:
the tie-corrected variance of S, the continuity-corrected z, Hamed & Rao's (1998) correction from the
autocorrelation of the ranks of the Sen-detrended series at the lags outside ``+-z(1-alpha/2)/sqrt(n)``, and
Conover's intercept ``median(x) - slope * median(t)``.  The confidence interval of the slope is Sen's (1968)
eq. 2.6 as written in ``scipy.stats.theilslopes`` (order statistics of the pairwise slopes, indices rounded
half to even).
"""

from __future__ import annotations

import math

import numba
import numpy as np

STATS = ("n", "s", "var_s", "var_s_corrected", "z", "p", "tau", "slope", "slope_lo", "slope_hi", "intercept")
N_STATS = len(STATS)


@numba.njit(cache=True, nogil=True)
def _select(a, lo, hi, k):
    """Move the k-th smallest of ``a[lo:hi]`` to ``a[k]`` (quickselect), in place.

    Afterwards every element left of k is <= a[k] and every element right of it is >= a[k], so further
    order statistics can be selected within one side only.  Each round splits the range three ways (< pivot,
    == pivot, > pivot) with branch-free swaps: the pairwise slopes are in random order, so a branching
    partition mispredicts about every other element, and the three-way split keeps tied slopes (a series
    with many equal values) linear instead of quadratic.
    """
    while hi - lo > 1:
        x, y, z = a[lo], a[(lo + hi) // 2], a[hi - 1]
        pivot = max(min(x, y), min(max(x, y), z))  # median of three
        store = lo
        for i in range(lo, hi):
            v = a[i]
            a[i] = a[store]
            a[store] = v
            store += v < pivot
        if k < store:
            hi = store
            continue
        equal = store
        for i in range(store, hi):  # everything here is >= pivot: gather the values equal to it
            v = a[i]
            a[i] = a[equal]
            a[equal] = v
            equal += v == pivot
        if k < equal:
            return
        lo = equal


@numba.njit(cache=True, nogil=True)
def _rank_after_median(a, m, r):
    """The r-th smallest of ``a[:m]`` once :func:`_median_of` has put its ``m // 2``-th in place.

    Then ``a[:k] <= a[k] <= a[k+1:m]`` with ``k = m // 2``, so the search stays on one side and never moves
    ``a[k]``: several order statistics can be taken in turn.
    """
    k = m // 2
    if r < k:
        _select(a, 0, k, r)
    elif r > k:
        _select(a, k + 1, m, r)
    return a[r]


@numba.njit(cache=True, nogil=True)
def _median_of(a, m):
    """Median of ``a[:m]`` (mean of the two middle values for even m); reorders ``a[:m]``."""
    k = m // 2
    _select(a, 0, m, k)
    upper = a[k]
    if m % 2 == 1:
        return upper
    lower = a[0]
    for i in range(1, k):  # after selection the (k-1)-th smallest is the maximum of the left side
        lower = max(lower, a[i])
    return 0.5 * (lower + upper)


@numba.njit(cache=True, nogil=True)
def _tie_term(v, n):
    """sum over tie groups of g (g - 1) (2 g + 5) of the sorted values ``v[:n]``."""
    total = 0.0
    g = 1
    for i in range(1, n + 1):
        if i < n and v[i] == v[i - 1]:
            g += 1
        else:
            total += g * (g - 1.0) * (2.0 * g + 5.0)
            g = 1
    return total


@numba.njit(cache=True, nogil=True)
def _average_ranks(d, n, order, ranks):
    """Ranks of ``d[:n]`` (1-based, ties get their average rank, as ``scipy.stats.rankdata``)."""
    # insertion sort of the indices: series are short (tens of years) and this allocates nothing
    for i in range(n):
        order[i] = i
    for i in range(1, n):
        o = order[i]
        j = i - 1
        while j >= 0 and d[order[j]] > d[o]:
            order[j + 1] = order[j]
            j -= 1
        order[j + 1] = o
    i = 0
    while i < n:
        j = i
        while j + 1 < n and d[order[j + 1]] == d[order[i]]:
            j += 1
        r = 0.5 * (i + j) + 1.0
        for k in range(i, j + 1):
            ranks[order[k]] = r
        i = j + 1


@numba.njit(cache=True, nogil=True)
def _hamed_rao_factor(tt, xx, n, slope, z_crit, max_lag, work, order, ranks):
    """n / n* of Hamed & Rao (1998): 1 + 2 / (n (n-1) (n-2)) sum_i (n-i)(n-i-1)(n-i-2) rho_s(i).

    rho_s(i) is the lag-i autocorrelation of the ranks of ``x - slope * t``; only lags outside the band
    ``+-z_crit / sqrt(n)`` count (pymannkendall's convention, as the paper suggests).  A series whose
    detrended values are all equal has no defined autocorrelation; it gets the factor 1.
    """
    # Time counted 1, 2, ... from the first valid year: the detrended values, and so the ranks of the pairs
    # whose difference defines the median slope (equal in exact arithmetic), are then computed with the same
    # rounding as in pymannkendall, which counts positions from 1.
    for i in range(n):
        work[i] = xx[i] - slope * (tt[i] - tt[0] + 1.0)
    _average_ranks(work, n, order, ranks)
    mean = 0.5 * (n + 1.0)
    acov0 = 0.0
    for i in range(n):
        acov0 += (ranks[i] - mean) ** 2
    if acov0 == 0.0:
        return 1.0
    band = z_crit / math.sqrt(n)
    last = n - 1 if max_lag < 0 else min(max_lag, n - 1)
    total = 0.0
    for lag in range(1, last + 1):
        acov = 0.0
        for i in range(n - lag):
            acov += (ranks[i] - mean) * (ranks[i + lag] - mean)
        rho = acov / acov0
        if rho > band or rho < -band:
            total += (n - lag) * (n - lag - 1.0) * (n - lag - 2.0) * rho
    return 1.0 + 2.0 / (n * (n - 1.0) * (n - 2.0)) * total


@numba.njit(cache=True, nogil=True)
def _sen(tt, xx, n, slopes, z_ci, var_s, median_x):
    """Theil-Sen slope, its Sen (1968) interval and Conover's intercept, on the valid ``tt``, ``xx``."""
    m = 0
    for i in range(n - 1):
        for j in range(i + 1, n):
            slopes[m] = (xx[j] - xx[i]) / (tt[j] - tt[i])
            m += 1
    sigma = math.sqrt(var_s)
    # indices as in scipy.stats.theilslopes (z_ci = norm.ppf(alpha / 2) < 0; np.rint rounds half to even)
    ru = min(int(np.rint((m - z_ci * sigma) / 2.0)), m - 1)
    rl = max(int(np.rint((m + z_ci * sigma) / 2.0)) - 1, 0)
    slope = _median_of(slopes, m)
    lo = _rank_after_median(slopes, m, rl)
    hi = _rank_after_median(slopes, m, ru)
    mt = tt[n // 2] if n % 2 == 1 else 0.5 * (tt[n // 2 - 1] + tt[n // 2])  # times are increasing
    return slope, lo, hi, median_x - slope * mt


@numba.njit(cache=True, nogil=True)
def _one_series(t, x, out, z_ci, z_crit, max_lag, hamed_rao, min_count, tt, xx, slopes, work, order, ranks):
    """All statistics of one series into ``out`` (see :data:`STATS`)."""
    n = 0
    for i in range(x.shape[0]):
        if not math.isnan(x[i]):
            tt[n] = t[i]
            xx[n] = x[i]
            n += 1
    if n < min_count:
        out[:] = np.nan
        out[0] = n
        return
    s_int = 0
    for i in range(n - 1):
        xi = xx[i]
        for j in range(i + 1, n):
            s_int += (xx[j] > xi) - (xx[j] < xi)  # branch-free sign: the signs are in random order
    s = float(s_int)
    work[:n] = xx[:n]
    work[:n].sort()  # once, for the tie groups and the median
    var_s = (n * (n - 1.0) * (2.0 * n + 5.0) - _tie_term(work, n)) / 18.0
    median_x = work[n // 2] if n % 2 == 1 else 0.5 * (work[n // 2 - 1] + work[n // 2])
    slope, lo, hi, intercept = _sen(tt, xx, n, slopes, z_ci, var_s, median_x)
    var_c = var_s * _hamed_rao_factor(tt, xx, n, slope, z_crit, max_lag, work, order, ranks) if hamed_rao \
        else var_s
    # continuity correction; a non-positive corrected variance leaves z and p undefined (NaN)
    if s == 0.0:
        z = 0.0
    elif var_c > 0.0:
        z = (s - math.copysign(1.0, s)) / math.sqrt(var_c)
    else:
        z = np.nan
    out[0] = n
    out[1] = s
    out[2] = var_s
    out[3] = var_c
    out[4] = z
    out[5] = math.erfc(abs(z) / math.sqrt(2.0))  # two-sided normal p, accurate far into the tail
    out[6] = s / (0.5 * n * (n - 1.0))
    out[7] = slope
    out[8] = lo
    out[9] = hi
    out[10] = intercept


@numba.njit(cache=True, nogil=True)
def trend_block(t, values, z_ci, z_crit, max_lag, hamed_rao, min_count):
    """Statistics of every row of ``values`` (``(n_series, n_times)``) -> ``(n_series, N_STATS)``.

    ``z_ci`` is ``norm.ppf(alpha / 2)`` (negative) for Sen's interval, ``z_crit`` is
    ``norm.ppf(1 - alpha / 2)`` for the autocorrelation band; ``max_lag < 0`` means every lag.  Scratch arrays
    are allocated once per block.
    """
    n_series, nt = values.shape
    out = np.empty((n_series, N_STATS))
    tt = np.empty(nt)
    xx = np.empty(nt)
    work = np.empty(nt)
    order = np.empty(nt, dtype=np.int64)
    ranks = np.empty(nt)
    slopes = np.empty(max(nt * (nt - 1) // 2, 1))
    for r in range(n_series):
        _one_series(t, values[r], out[r], z_ci, z_crit, max_lag, hamed_rao, min_count,
                    tt, xx, slopes, work, order, ranks)
    return out
