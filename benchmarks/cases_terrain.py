"""Benchmark cases for terrain: flow routing and MRVBF against plain baselines.

Work is counted in pixels, so every throughput is in Mpx/s.
"""

from __future__ import annotations

import numpy as np
from _harness import case, timed


# -- terrain routing -------------------------------------------------------------------------------------------
def _dem(n: int):
    import xarray as xr
    from scipy.ndimage import gaussian_filter

    rng = np.random.default_rng(2)
    z = gaussian_filter(rng.normal(size=(n, n)), 12) * 400 + gaussian_filter(rng.normal(size=(n, n)), 2) * 5
    yy, xx = np.mgrid[0:n, 0:n]
    z = (z + 0.002 * xx * 10 + 0.001 * yy * 10).astype(np.float32)
    return xr.DataArray(z, dims=("y", "x"), coords={"y": 1e6 - np.arange(n) * 10.0 - 5, "x": np.arange(n) * 10.0 + 5})


routing = case("routing", unit="Mpx/s", baseline="wetlandflow d8",
               description="fill + flow directions + accumulation on an n x n DEM (n = 4096, quick 1024)")


@routing.variant("wetlandflow d8")
def _routing_d8(quick: bool, repeat: int):
    from wetlandflow.features.terrain import flow_accumulation

    n = 1024 if quick else 4096
    dem = _dem(n)
    return n * n, timed(lambda: flow_accumulation(dem, method="d8").values, 1)


@routing.variant("wetlandflow mfd")
def _routing_mfd(quick: bool, repeat: int):
    from wetlandflow.features.terrain import flow_accumulation

    n = 1024 if quick else 4096
    dem = _dem(n)
    return n * n, timed(lambda: flow_accumulation(dem, method="mfd").values, 1)


# -- MRVBF -----------------------------------------------------------------------------------------------------
mrvbf = case("mrvbf", unit="Mpx/s", baseline="wetlandflow",
             description="MRVBF (Gallant & Dowling 2003) on an n x n DEM (n = 4096, quick 1024)")


@mrvbf.variant("wetlandflow")
def _mrvbf(quick: bool, repeat: int):
    from wetlandflow.features.mrvbf import mrvbf as mrvbf_fn

    n = 1024 if quick else 4096
    dem = _dem(n)
    return n * n, timed(lambda: mrvbf_fn(dem).values, 1)
