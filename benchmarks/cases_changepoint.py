"""Benchmark case for the monitoring change-point test: Pettitt per pixel on an annual stack.

Work is counted in pixels (one whole series each), so throughput is in Mpx/s.  The baseline is the plain
vectorised numpy a user would write without NaN handling: ranks along time, ``U_t = 2 sum r - t (n + 1)``.
"""

from __future__ import annotations

import numpy as np
from _harness import case, timed

YEARS = 30


def _stack(n: int, seed: int = 0):
    import xarray as xr

    rng = np.random.default_rng(seed)
    data = rng.normal(size=(YEARS, n, n)).astype(np.float64)
    data[YEARS // 2:] -= 0.5
    return xr.DataArray(data, dims=("year", "y", "x"), coords={"year": np.arange(2000, 2000 + YEARS)})


pettitt_case = case("pettitt", unit="Mpx/s", baseline="numpy-ranks",
                    description=f"Pettitt change point per pixel of a {YEARS}-year n x n stack "
                                "(n = 1024, quick 512); wetlandflow: numba kernel, NaN dropped per pixel, "
                                "in memory and under dask (chunks 256 x 256)")


def _n(quick: bool) -> int:
    return 512 if quick else 1024


@pettitt_case.variant("numpy-ranks")
def _pettitt_numpy(quick: bool, repeat: int):
    from scipy.stats import rankdata

    x = _stack(_n(quick)).values
    t = np.arange(1, YEARS)[:, None, None]

    def work():
        u = 2 * rankdata(x, axis=0).cumsum(axis=0)[:-1] - t * (YEARS + 1)
        k = np.abs(u).max(axis=0)
        return k, np.abs(u).argmax(axis=0), 2 * np.exp(-6 * k ** 2 / (YEARS ** 3 + YEARS ** 2))

    return _n(quick) ** 2, timed(work, repeat)


@pettitt_case.variant("wetlandflow")
def _pettitt_wetlandflow(quick: bool, repeat: int):
    from wetlandflow.monitoring.changepoint import pettitt

    stack = _stack(_n(quick))
    return _n(quick) ** 2, timed(lambda: pettitt(stack), repeat)


@pettitt_case.variant("wetlandflow-dask")
def _pettitt_dask(quick: bool, repeat: int):
    from wetlandflow.monitoring.changepoint import pettitt

    stack = _stack(_n(quick)).chunk({"year": -1, "y": 256, "x": 256}).persist()
    return _n(quick) ** 2, timed(lambda: pettitt(stack).compute(), repeat)
