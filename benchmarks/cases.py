"""The benchmark cases: wetlandflow's path against the plain baseline a user would otherwise write.

Work is counted in pixels, so every throughput is in Mpx/s.
"""

from __future__ import annotations

import numpy as np
from _harness import case, timed

BANDS = ("blue", "green", "red", "re1", "re2", "re3", "nir", "nir_narrow", "swir1", "swir2")
# ten normalised differences over the ten bands (the index set of a typical cube)
PAIRS = [("nir", "red"), ("green", "nir"), ("nir", "swir1"), ("green", "swir1"), ("nir", "re1"), ("nir", "re2"),
         ("nir", "re3"), ("nir_narrow", "re1"), ("swir1", "swir2"), ("re3", "red")]


def _reflectance(n: int, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return rng.uniform(0.01, 0.5, size=(len(BANDS), n, n)).astype(np.float32)


# -- ten normalised-difference indices --------------------------------------------------------------------------
indices = case("indices", unit="Mpx/s", baseline="numpy",
               description="ten normalised-difference indices on an n x n x 10-band reflectance array "
                           "(n = 4096, quick 2048); wetlandflow variants: dask chunks 1024 x 1024 x all bands "
                           "in memory, outputs stored into preallocated arrays")


@indices.variant("numpy")
def _indices_numpy(quick: bool, repeat: int):
    n = 2048 if quick else 4096
    r = _reflectance(n)
    idx = {b: i for i, b in enumerate(BANDS)}

    def work():
        return [(r[idx[a]] - r[idx[b]]) / (r[idx[a]] + r[idx[b]]) for a, b in PAIRS]

    return n * n, timed(work, repeat)


def _cube(n: int):
    import xarray as xr

    return xr.DataArray(_reflectance(n), dims=("band", "y", "x"),
                        coords={"band": list(BANDS), "y": np.arange(n) * -10.0, "x": np.arange(n) * 10.0})


def _chunked_cube(n: int, *, contiguous: bool):
    """The cube chunked 1024 x 1024 (all bands in one chunk), every chunk already in memory.

    ``contiguous``: each chunk is its own C-contiguous block, as chunks are in
    the pipeline (a composite block, a chunk read from Zarr).  Otherwise each
    chunk is a strided view into the one big array (rows 16 kB apart, bands
    64 MB apart), which is how ``DataArray.chunk`` slices an in-memory array;
    the copy that makes them contiguous is done here, outside the timing.
    """
    r = _cube(n).chunk({"band": -1, "y": 1024, "x": 1024})
    return r.copy(data=r.data.map_blocks(np.ascontiguousarray)).persist() if contiguous else r


def _stored(arrays, n: int):
    """``work`` that computes ``arrays`` into preallocated n x n outputs (``dask.array.store``).

    Writing the cube to Zarr also streams each chunk to its destination; the
    destinations are allocated once, outside the timing, and reused (like a
    store's buffers), so the figure is not dominated by fresh page faults and
    by dask's final concatenation of chunks, which ``.compute()`` adds.
    """
    import dask.array as da

    dest = [np.empty((n, n), dtype=np.float32) for _ in range(len(PAIRS))]
    return lambda: da.store(arrays(), dest)


def _indices_fused(quick: bool, repeat: int, *, contiguous: bool):
    from wetlandflow.features.optical import normalized_differences

    n = 2048 if quick else 4096
    r = _chunked_cube(n, contiguous=contiguous)
    pairs = {f"{a}_{b}": (a, b) for a, b in PAIRS}
    work = _stored(lambda: [v.data for v in normalized_differences(r, pairs).data_vars.values()], n)
    return n * n, timed(work, repeat)


@indices.variant("wetlandflow")
def _indices_cube(quick: bool, repeat: int):
    return _indices_fused(quick, repeat, contiguous=True)


@indices.variant("wetlandflow (strided chunk views)")
def _indices_cube_strided(quick: bool, repeat: int):
    return _indices_fused(quick, repeat, contiguous=False)


@indices.variant("wetlandflow, one call per index")
def _indices_separate(quick: bool, repeat: int):
    from wetlandflow.features.optical import normalized_difference

    n = 2048 if quick else 4096
    r = _chunked_cube(n, contiguous=True)
    work = _stored(lambda: [normalized_difference(r.sel(band=a), r.sel(band=b), name=f"{a}_{b}").data
                            for a, b in PAIRS], n)
    return n * n, timed(work, repeat)


@indices.variant("numba fused (in memory)")
def _indices_fused_kernel(quick: bool, repeat: int):
    from wetlandflow.features.optical import nd_fused_block

    n = 2048 if quick else 4096
    r = _reflectance(n)
    idx = {b: i for i, b in enumerate(BANDS)}
    ia = np.array([idx[a] for a, _ in PAIRS], dtype=np.int64)
    ib = np.array([idx[b] for _, b in PAIRS], dtype=np.int64)
    return n * n, timed(lambda: nd_fused_block(r, ia, ib), repeat)  # parallel over pixels


# -- per-pixel median of 12 dates, 30 % missing ------------------------------------------------------------------
median = case("median", unit="Mpx/s", baseline="np.nanmedian",
              description="per-pixel median over 12 dates with 30 % missing, n x n (n = 2048, quick 1024)")


def _stack(n: int) -> np.ndarray:
    rng = np.random.default_rng(1)
    s = rng.uniform(0, 1, size=(12, n, n)).astype(np.float32)
    s[rng.random(s.shape) < 0.3] = np.nan
    return s


@median.variant("np.nanmedian")
def _median_numpy(quick: bool, repeat: int):
    n = 1024 if quick else 2048
    s = _stack(n)
    return n * n, timed(lambda: np.nanmedian(s, axis=0), max(1, repeat - 2))


@median.variant("bottleneck")
def _median_bottleneck(quick: bool, repeat: int):
    import bottleneck as bn

    n = 1024 if quick else 2048
    s = _stack(n)
    return n * n, timed(lambda: bn.nanmedian(s, axis=0), repeat)


@median.variant("wetlandflow")
def _median_kernel(quick: bool, repeat: int):
    import xarray as xr

    from wetlandflow.features._kernels import nanmedian_time

    n = 1024 if quick else 2048
    da = xr.DataArray(_stack(n), dims=("time", "y", "x"))
    return n * n, timed(lambda: nanmedian_time(da).values, repeat)


# -- seasonal median composite ---------------------------------------------------------------------------------
composite = case("composite", unit="Mpx/s", baseline="np.nanmedian",
                 description="seasonal median composite of a 12-date x 10-band stack, 30 % missing, "
                             "one season of 5 dates, n x n (n = 2048, quick 1024)")

_SEASON = {"summer": ("06-01", "08-31")}


def _scenes(n: int):
    """12 monthly scenes x 10 bands; 5 of them (June to October 1) fall in the season."""
    import pandas as pd
    import xarray as xr

    rng = np.random.default_rng(3)
    s = rng.uniform(0.01, 0.5, size=(12, len(BANDS), n, n)).astype(np.float32)
    s[np.repeat(rng.random((12, 1, n, n)) < 0.3, len(BANDS), axis=1)] = np.nan  # clouds mask all bands
    times = pd.to_datetime(["2024-01-15", "2024-02-15", "2024-03-15", "2024-04-15", "2024-05-15", "2024-06-01",
                            "2024-06-20", "2024-07-10", "2024-08-01", "2024-08-31", "2024-10-15", "2024-11-15"])
    return xr.DataArray(s, dims=("time", "band", "y", "x"),
                        coords={"time": times, "band": list(BANDS), "y": np.arange(n) * -10.0,
                                "x": np.arange(n) * 10.0})


@composite.variant("np.nanmedian")
def _composite_numpy(quick: bool, repeat: int):
    import warnings

    from wetlandflow.inputs.seasons import season_mask

    n = 1024 if quick else 2048
    stack = _scenes(n)
    values = stack.values

    def work():
        sel = values[season_mask(stack["time"].values, *_SEASON["summer"])]
        with warnings.catch_warnings():  # all-NaN pixels
            warnings.simplefilter("ignore", RuntimeWarning)
            return np.nanmedian(sel, axis=0), np.isfinite(sel).all(axis=1).sum(axis=0)

    return n * n, timed(work, max(1, repeat - 2))


@composite.variant("wetlandflow")
def _composite_wetlandflow(quick: bool, repeat: int):
    from wetlandflow.features.composite import seasonal_composite

    n = 1024 if quick else 2048
    stack = _scenes(n)
    return n * n, timed(lambda: seasonal_composite(stack, _SEASON).compute(), repeat)


@composite.variant("wetlandflow (dask chunks)")
def _composite_dask(quick: bool, repeat: int):
    from wetlandflow.features.composite import seasonal_composite

    n = 1024 if quick else 2048
    stack = _scenes(n).chunk({"time": -1, "band": -1, "y": 512, "x": 512})
    return n * n, timed(lambda: seasonal_composite(stack, _SEASON).compute(), repeat)


# terrain cases live in their own file; importing it registers them after the optical ones
import cases_changepoint  # noqa: E402,F401
import cases_explain  # noqa: E402,F401
import cases_mapping  # noqa: E402,F401
import cases_terrain  # noqa: E402,F401
import cases_trends  # noqa: E402,F401
import cases_water_series  # noqa: E402,F401
