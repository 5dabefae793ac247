"""Benchmark case for the trend statistics: per-pixel Mann-Kendall + Hamed-Rao + Theil-Sen with its interval.

The stack is n x n pixels x 35 years of noise around a small trend with 5 % missing values (n = 1000,
quick 200).  wetlandflow computes every pixel; the baseline a user would otherwise write loops
``pymannkendall.hamed_rao_modification_test`` (test, slope, intercept) plus ``scipy.stats.theilslopes``
(the slope's interval) over a random sample of pixels, and its throughput is that of the sample (each pixel
costs the same, so the figure extrapolates per pixel).  Throughput in thousands of pixels per second.
"""

from __future__ import annotations

import time
import warnings

import numpy as np
from _harness import case, timed

N_YEARS = 35
SAMPLE = 300  # pixels the baseline loops over


def _size(quick: bool) -> int:
    return 200 if quick else 1000


def _stack(n: int):
    import xarray as xr

    rng = np.random.default_rng(4)
    values = rng.normal(size=(N_YEARS, n, n)) + 0.03 * np.arange(N_YEARS)[:, None, None]
    values[rng.random(values.shape) < 0.05] = np.nan
    return xr.DataArray(values, dims=("year", "y", "x"),
                        coords={"year": np.arange(1990, 1990 + N_YEARS), "y": np.arange(n) * -30.0,
                                "x": np.arange(n) * 30.0})


trends = case("trends", unit="kpx/s", per=1e3, baseline="pymannkendall + scipy (looped)",
              description=f"Mann-Kendall + Hamed-Rao + Sen slope and interval per pixel, n x n x {N_YEARS} "
                          "years, 5 % missing (n = 1000, quick 200); baseline looped over "
                          f"{SAMPLE} sampled pixels")


@trends.variant("pymannkendall + scipy (looped)")
def _baseline(quick: bool, repeat: int):
    import pymannkendall as pymk
    from scipy.stats import theilslopes

    stack = _stack(_size(quick))
    rng = np.random.default_rng(0)
    flat = stack.values.reshape(N_YEARS, -1)
    sample = flat[:, rng.choice(flat.shape[1], SAMPLE, replace=False)].T
    years = stack["year"].values.astype(float)

    def work():
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            for x in sample:
                pymk.hamed_rao_modification_test(x)
                ok = np.isfinite(x)
                theilslopes(x[ok], years[ok])

    return SAMPLE, timed(work, repeat)


def _wetlandflow(quick: bool, chunks: dict | None) -> tuple[int, float]:
    """Compile on a small stack, then time one full run (the full size takes tens of seconds)."""
    from wetlandflow.monitoring.trends import mann_kendall

    mann_kendall(_stack(20)).compute()
    stack = _stack(_size(quick))
    if chunks:
        stack = stack.chunk(chunks)
    t0 = time.perf_counter()
    mann_kendall(stack).compute()
    return stack.sizes["y"] * stack.sizes["x"], time.perf_counter() - t0


@trends.variant("wetlandflow")
def _numpy(quick: bool, repeat: int):
    return _wetlandflow(quick, None)


@trends.variant("wetlandflow (dask chunks, threads)")
def _dask(quick: bool, repeat: int):
    n = _size(quick)
    return _wetlandflow(quick, {"year": -1, "y": n // 4, "x": n // 2})
