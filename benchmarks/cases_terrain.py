"""Benchmark cases for terrain: flow routing (D8 and MFD chains) and MRVBF.

Work is counted in pixels, so every throughput is in Mpx/s.  The routing
cases compare wetlandflow with pysheds, a general-purpose DEM-hydrology
library, on the same DEM.  pysheds is not a wetlandflow dependency: install
it into the benchmark environment (``pip install pysheds``) to get the
comparison; without it those variants report an error row and the rest of
the suite runs.

Each variant compiles or warms up on a small DEM first and then times one
run at full size, so the peak memory the harness reports is that of one run
(plus building the DEM).
"""

from __future__ import annotations

import time
from collections.abc import Callable

import numpy as np
from _harness import case

WARM_N = 64  # warm-up size: enough to compile every numba kernel, too small to matter for memory


def _size(quick: bool) -> int:
    return 1024 if quick else 4096


def _smooth(noise: np.ndarray, sigma: float) -> np.ndarray:
    """``gaussian_filter(noise, sigma)`` as its two 1-D passes, dropping each input as soon as it is used."""
    from scipy.ndimage import gaussian_filter1d

    rows = gaussian_filter1d(noise, sigma, axis=0)
    del noise
    return gaussian_filter1d(rows, sigma, axis=1)


def _dem(n: int):
    """Rough synthetic terrain on a tilted plane, float32, 10 m pixels.

    The values are those of ``(gaussian(N1, 12) * 400 + gaussian(N2, 2) * 5) + 0.02 x + 0.01 y``
    with ``scipy.ndimage.gaussian_filter``; it is applied one axis at a time
    and the sums are formed in place so that building the DEM holds at most
    three float64 grids (the harness's peak memory includes this step).
    """
    import xarray as xr

    rng = np.random.default_rng(2)
    z = _smooth(rng.normal(size=(n, n)), 12)
    z *= 400
    fine = _smooth(rng.normal(size=(n, n)), 2)
    fine *= 5
    z += fine
    del fine
    z += 0.002 * np.arange(n)[None, :] * 10
    z += 0.001 * np.arange(n)[:, None] * 10
    return xr.DataArray(z.astype(np.float32), dims=("y", "x"),
                        coords={"y": 1e6 - np.arange(n) * 10.0 - 5, "x": np.arange(n) * 10.0 + 5})


def _time_once(run: Callable[[object], object], n: int) -> tuple[int, float]:
    """Warm ``run`` up on a small DEM, then time it once on the n x n DEM."""
    run(_dem(WARM_N))
    dem = _dem(n)
    t0 = time.perf_counter()
    run(dem)
    return n * n, time.perf_counter() - t0


# -- wetlandflow -----------------------------------------------------------------------------------------------
def _wetlandflow(method: str) -> Callable[[object], object]:
    from wetlandflow.features.terrain import flow_accumulation

    return lambda dem: flow_accumulation(dem, method=method).values


# -- pysheds (optional, for the side-by-side figure) ------------------------------------------------------------
def _pysheds_chain(routing: str) -> Callable[[object], object]:
    """pysheds' documented conditioning and routing chain on a DEM given as an xarray.DataArray.

    fill_pits, fill_depressions, resolve_flats, flowdir and accumulation,
    with ``routing="d8"`` or ``"mfd"``.  pysheds 0.5 still calls
    ``numpy.in1d``, which numpy 2.4 removed; ``numpy.isin`` is its documented
    replacement, so it is put back for the duration of the call only.
    """
    try:
        from affine import Affine
        from pysheds.grid import Grid
        from pysheds.sview import Raster, ViewFinder
    except ImportError as exc:
        raise ImportError(
            f"pysheds is not installed ({exc}); it is only needed for this comparison: "
            "pip install pysheds into the benchmark environment."
        ) from exc

    def run(dem):
        z = np.asarray(dem.values, dtype=np.float64)
        step = float(dem.x[1] - dem.x[0])
        top = float(dem.y[0]) + step / 2
        left = float(dem.x[0]) - step / 2
        view = ViewFinder(affine=Affine(step, 0.0, left, 0.0, -step, top), shape=z.shape, nodata=np.nan)
        raster = Raster(z, viewfinder=view)
        grid = Grid.from_raster(raster)
        had_in1d = hasattr(np, "in1d")
        if not had_in1d:
            np.in1d = np.isin
        try:
            conditioned = grid.resolve_flats(grid.fill_depressions(grid.fill_pits(raster)))
            fdir = grid.flowdir(conditioned, routing=routing)
            return np.asarray(grid.accumulation(fdir, routing=routing))
        finally:
            if not had_in1d:
                del np.in1d

    return run


routing = case("routing", unit="Mpx/s", baseline="pysheds d8",
               description="D8 chain: depression filling + D8 directions + accumulation on an n x n DEM "
                           "(n = 4096, quick 1024); pysheds: fill_pits, fill_depressions, resolve_flats, "
                           "flowdir, accumulation")


@routing.variant("wetlandflow d8")
def _routing_d8(quick: bool, repeat: int):
    return _time_once(_wetlandflow("d8"), _size(quick))


@routing.variant("pysheds d8")
def _routing_pysheds_d8(quick: bool, repeat: int):
    return _time_once(_pysheds_chain("d8"), _size(quick))


routing_mfd = case("routing_mfd", unit="Mpx/s", baseline="pysheds mfd",
                   description="multiple-flow-direction chain: depression filling + MFD accumulation "
                               "(Freeman 1991, wetlandflow; pysheds' mfd routing) on an n x n DEM "
                               "(n = 4096, quick 1024)")


@routing_mfd.variant("wetlandflow mfd")
def _routing_mfd(quick: bool, repeat: int):
    return _time_once(_wetlandflow("mfd"), _size(quick))


@routing_mfd.variant("pysheds mfd")
def _routing_pysheds_mfd(quick: bool, repeat: int):
    return _time_once(_pysheds_chain("mfd"), _size(quick))


# -- MRVBF -----------------------------------------------------------------------------------------------------
mrvbf = case("mrvbf", unit="Mpx/s", baseline="wetlandflow",
             description="MRVBF (Gallant & Dowling 2003) on an n x n DEM (n = 4096, quick 1024)")


@mrvbf.variant("wetlandflow")
def _mrvbf(quick: bool, repeat: int):
    from wetlandflow.features.mrvbf import mrvbf as mrvbf_fn

    return _time_once(lambda dem: mrvbf_fn(dem).values, _size(quick))
