"""Bringing input rasters onto the reference grid, lazily.

Each chunk of the aligned array opens its own dataset (never shared between
threads or processes) and asks GDAL's warper, through a
:class:`rasterio.vrt.WarpedVRT` on the reference grid, for exactly that
window.  So alignment is lazy, bounded in memory by the chunk size, and gives
the same pixels as one call of :func:`rasterio.warp.reproject` on the whole
raster (tested).

The resampling follows from the layer's kind and is recorded in attrs:

============  ===========================  =================
kind          refining or same pixel size  coarsening
============  ===========================  =================
reflectance   bilinear                     average
sar_power     bilinear (in linear power)   average
elevation     bilinear                     average
categorical   nearest                      mode
============  ===========================  =================
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import dask.array as dsa
import numpy as np
import rasterio
import xarray as xr
from affine import Affine
from rasterio.enums import Resampling
from rasterio.vrt import WarpedVRT
from rasterio.warp import transform_bounds
from rasterio.windows import Window

from ..errors import AlignmentError, InputFileError
from .grid import Grid, attach, require_match

KINDS = ("reflectance", "sar_power", "elevation", "categorical")
_RESAMPLING = {
    "reflectance": (Resampling.bilinear, Resampling.average),
    "sar_power": (Resampling.bilinear, Resampling.average),
    "elevation": (Resampling.bilinear, Resampling.average),
    "categorical": (Resampling.nearest, Resampling.mode),
}


@dataclass(frozen=True)
class RasterInfo:
    """What :func:`inspect_raster` learns from a file's header."""

    path: str
    crs: str
    count: int
    width: int
    height: int
    dtype: str
    nodata: float | None
    resolution: tuple[float, float]
    bounds: tuple[float, float, float, float]
    descriptions: tuple[str | None, ...]


def _ordered_bounds(b) -> tuple[float, float, float, float]:
    """(xmin, ymin, xmax, ymax) whatever the row order: a south-up file (positive y pixel size, first row at
    the bottom) is valid, and rasterio then gives a bottom above the top."""
    return (min(b.left, b.right), min(b.bottom, b.top), max(b.left, b.right), max(b.bottom, b.top))


def inspect_raster(path: str | Path) -> RasterInfo:
    """Read a raster's header, with clear errors for unreadable files and missing CRS."""
    try:
        with rasterio.open(path) as src:
            if src.crs is None:
                raise AlignmentError(
                    f"{path}: the raster has no CRS; assign one (e.g. gdal_edit.py -a_srs EPSG:<code>) and rerun"
                )
            # read one small block so a truncated file fails here, not mid-run
            src.read(1, window=Window(0, 0, min(16, src.width), min(16, src.height)))
            src.read(src.count, window=Window(max(0, src.width - 16), max(0, src.height - 16), 16, 16),
                     boundless=True)
            return RasterInfo(
                str(path), src.crs.to_string(), src.count, src.width, src.height, src.dtypes[0], src.nodata,
                (abs(src.transform.a), abs(src.transform.e)), _ordered_bounds(src.bounds),
                tuple(src.descriptions),
            )
    except AlignmentError:
        raise
    except rasterio.errors.RasterioIOError as exc:
        raise InputFileError(
            f"cannot read the raster ({exc}). The file looks truncated (an interrupted copy or download) "
            "or is not a raster GDAL can open; copy or export it again and rerun",
            path=str(path),
        ) from None


def _source_resolution_on_grid(info: RasterInfo, grid: Grid) -> float:
    """Approximate source pixel size in the grid's units (metres)."""
    xmin, ymin, xmax, ymax = info.bounds
    gx0, gy0, gx1, gy1 = transform_bounds(info.crs, grid.crs, xmin, ymin, xmax, ymax, densify_pts=21)
    return float(np.sqrt(((gx1 - gx0) / info.width) * ((gy1 - gy0) / info.height)))


def choose_resampling(kind: str, src_res_m: float, grid: Grid) -> Resampling:
    """Resampling for a layer kind: average/mode when coarsening by more than 10 %, else bilinear/nearest."""
    if kind not in KINDS:
        raise ValueError(f"kind must be one of {KINDS}, got {kind!r}")
    refine, coarsen = _RESAMPLING[kind]
    return coarsen if grid.resolution > 1.1 * src_res_m else refine


def check_overlap(info: RasterInfo, grid: Grid, *, name: str) -> float:
    """Fraction of the grid's extent that the raster covers; raise if it is zero."""
    gx0, gy0, gx1, gy1 = grid.bounds
    sx0, sy0, sx1, sy1 = transform_bounds(info.crs, grid.crs, *info.bounds, densify_pts=21)
    ix = max(0.0, min(gx1, sx1) - max(gx0, sx0))
    iy = max(0.0, min(gy1, sy1) - max(gy0, sy0))
    frac = ix * iy / ((gx1 - gx0) * (gy1 - gy0))
    if frac <= 0:
        raise AlignmentError(
            f"{name} ({info.path}) does not overlap the project area: raster bounds {tuple(round(v) for v in info.bounds)} "
            f"in {info.crs}, grid bounds {tuple(round(v) for v in grid.bounds)} in {grid.crs}. "
            "Check the file and its CRS."
        )
    return frac


def _is_same_grid(path: str, grid: Grid) -> tuple[bool, int, int, bool]:
    """True (with pixel offsets) when the file shares the grid's CRS, pixel size and pixel edges.

    The fourth value says the file is south-up (positive y pixel size, first row at the bottom): its rows
    are then read in reverse.  Reading it this way, not by warping, keeps the values exact (GDAL's bilinear
    warp of a multi-band south-up file moves values slightly).
    """
    with rasterio.open(path) as src:
        t = src.transform
        height = src.height
        same_crs = src.crs is not None and rasterio.crs.CRS.from_user_input(grid.crs) == src.crs
    g = grid.transform
    flipped = bool(np.isclose(t.e, -g.e))
    if not same_crs or not np.isclose(t.a, g.a) or not (np.isclose(t.e, g.e) or flipped) or t.b or t.d:
        return False, 0, 0, False
    top = t.f + t.e * height if flipped else t.f  # the file's northern edge
    col = (g.c - t.c) / g.a
    row = (g.f - top) / g.e
    if abs(col - round(col)) > 1e-6 or abs(row - round(row)) > 1e-6:
        return False, 0, 0, False
    return True, int(round(row)), int(round(col)), flipped


def _read_block(_template: np.ndarray, path: str, grid: Grid, bands: list[int], resampling: Resampling, src_nodata: float | None,
                out_dtype: str, fill: float, same: tuple[bool, int, int], block_info=None) -> np.ndarray:
    (_, _), (r0, r1), (c0, c1) = block_info[None]["array-location"]
    window = Window(c0, r0, c1 - c0, r1 - r0)
    with rasterio.open(path) as src:
        nodata = src_nodata if src_nodata is not None else src.nodata
        if same[0]:
            fill_value = nodata if nodata is not None else 0
            if same[3]:  # south-up: grid rows r0..r1 are file rows counted from the bottom
                w = Window(c0 + same[2], src.height - (r1 + same[1]), c1 - c0, r1 - r0)
                data = src.read(bands, window=w, boundless=True, fill_value=fill_value, masked=False)
                data = data[:, ::-1, :]
            else:
                w = Window(c0 + same[2], r0 + same[1], c1 - c0, r1 - r0)
                data = src.read(bands, window=w, boundless=True, fill_value=fill_value, masked=False)
        else:
            with WarpedVRT(src, crs=grid.crs, transform=grid.transform, width=grid.width, height=grid.height,
                           resampling=resampling, src_nodata=nodata, nodata=nodata if nodata is not None else 0, tolerance=0.001,
                           dtype=out_dtype) as vrt:
                data = vrt.read(bands, window=window, masked=False)
                nodata = vrt.nodata
    data = data.astype(out_dtype, copy=False)
    if nodata is not None:
        bad = data == nodata
        if np.isnan(nodata):
            bad = np.isnan(data)
        if bad.any():
            data = np.where(bad, fill, data).astype(out_dtype, copy=False)
    return data


def read_aligned(
    path: str | Path,
    grid: Grid,
    *,
    kind: str,
    name: str,
    band_names: list[str] | tuple[str, ...] | None = None,
    nodata: float | None = None,
    chunks: int = 512,
) -> xr.DataArray:
    """Open a raster lazily on the reference grid.

    Parameters
    ----------
    path
        Raster file (any CRS and pixel size GDAL can warp).
    grid
        The reference grid.
    kind
        One of ``reflectance``, ``sar_power``, ``elevation``, ``categorical``; fixes the resampling.
    name
        Layer name used in messages and attrs.
    band_names
        Expected band names, in file order; their count must match the file's.
    nodata
        The file's no-data value (overrides the header's).  No data becomes NaN for continuous kinds and
        0 for categorical ones.

    Returns
    -------
    xarray.DataArray
        Dims ``(band, y, x)``, dask-backed, float32 (uint8/uint16 for categorical).
    """
    path = str(path)
    info = inspect_raster(path)
    if band_names is not None and len(band_names) != info.count:
        raise AlignmentError(
            f"{name} ({path}) has {info.count} band(s) but the project file lists {len(band_names)}: "
            f"{list(band_names)}. Fix the band list or the file: bands in that scene's [[optical]] or [[sar]] "
            "table names each band of the file, in the file's order (a named sensor's default list is its full "
            "band set, so a file with fewer bands needs its own list)."
        )
    check_overlap(info, grid, name=name)
    same = _is_same_grid(path, grid)
    src_res = info.resolution[0] if same[0] else _source_resolution_on_grid(info, grid)
    resampling = choose_resampling(kind, src_res, grid)
    categorical = kind == "categorical"
    out_dtype = info.dtype if categorical else "float32"
    fill = 0 if categorical else np.nan
    names = list(band_names) if band_names is not None else [d or f"band{i + 1}" for i, d in enumerate(info.descriptions)]
    shape = (info.count, grid.height, grid.width)
    chunk_spec = (info.count, chunks, chunks)
    template = dsa.empty(shape, chunks=chunk_spec, dtype=out_dtype)
    data = dsa.map_blocks(
        _read_block, template, path, grid, list(range(1, info.count + 1)), resampling, nodata, out_dtype, fill, same,
        dtype=out_dtype, chunks=template.chunks, meta=np.empty((0, 0, 0), dtype=out_dtype),
        name=f"align-{name}-{abs(hash((path, grid, kind))) % 10**12}",
    )
    da = xr.DataArray(data, dims=("band", "y", "x"), coords={"band": names, **grid.coords()}, name=name)
    da.attrs = {
        "source": Path(path).name,
        "kind": kind,
        "resampling": resampling.name,
        "source_crs": info.crs,
        "source_resolution_m": round(src_res, 4),
        "nodata_policy": "0 (categorical)" if categorical else "NaN",
    }
    da = attach(da, grid)
    require_match(da, grid, name=name)
    return da


def aoi_mask(aoi, grid: Grid, *, chunks: int = 512) -> xr.DataArray:
    """Boolean DataArray on the grid: True inside the AOI polygons (pixel centre rule), lazily by chunk."""
    from rasterio.features import rasterize

    geoms = list(aoi.to_crs(grid.crs).geometry)

    def block(_template: np.ndarray, block_info=None) -> np.ndarray:
        (r0, r1), (c0, c1) = block_info[None]["array-location"]
        t = grid.window(r0, c0, r1 - r0, c1 - c0).transform
        return rasterize(geoms, out_shape=(r1 - r0, c1 - c0), transform=t, fill=0, default_value=1,
                         dtype="uint8").astype(bool)

    template = dsa.empty(grid.shape, chunks=(chunks, chunks), dtype=bool)
    data = dsa.map_blocks(block, template, dtype=bool, chunks=template.chunks, meta=np.empty((0, 0), dtype=bool),
                          name=f"aoi-{abs(hash((grid, tuple(g.wkb for g in geoms)))) % 10**12}")
    da = xr.DataArray(data, dims=("y", "x"), coords=grid.coords(), name="aoi")
    da.attrs = {"long_name": "inside the area of interest", "method": "rasterize, pixel-centre rule"}
    return attach(da, grid)


# -- cheap looks at a raster's content (checks before a run computes anything) -----------------------


def values_on_coarse_grid(path: str | Path, grid: Grid, *, band: int = 1,
                          nodata: float | None = None) -> np.ndarray:
    """One band of a raster on ``grid`` (meant to be a coarse grid), by nearest neighbour, no data as NaN.

    The file is first read decimated (GDAL's nearest-neighbour overview-style read, so a large file is
    not read at full resolution when the grid is much coarser) and then warped onto ``grid``.  In
    memory, but the result has the coarse grid's size.

    Parameters
    ----------
    path
        Raster file.
    grid
        Target grid, usually ``project_grid.coarsen(k)``.
    band
        Band number (1-based).
    nodata
        No-data value (overrides the header's).

    Returns
    -------
    numpy.ndarray
        float64 array of ``grid.shape``; NaN for no data and outside the file.
    """
    from rasterio.warp import reproject

    info = inspect_raster(path)
    step = max(1, int(grid.resolution // max(_source_resolution_on_grid(info, grid), 1e-9)))
    with rasterio.open(path) as src:
        nd = nodata if nodata is not None else src.nodata
        shape = (max(1, src.height // step), max(1, src.width // step))
        data = src.read(band, out_shape=shape, resampling=Resampling.nearest).astype(np.float64)
        transform = src.transform @ Affine.scale(src.width / shape[1], src.height / shape[0])
        crs = src.crs
    if nd is not None and not np.isnan(nd):
        data[data == nd] = np.nan
    out = np.full(grid.shape, np.nan)
    reproject(data, out, src_transform=transform, src_crs=crs, dst_transform=grid.transform, dst_crs=grid.crs,
              resampling=Resampling.nearest, src_nodata=np.nan, dst_nodata=np.nan)
    return out


def aoi_on_grid(aoi, grid: Grid) -> np.ndarray:
    """Boolean array of ``grid.shape``: pixel centres inside the AOI polygons (in memory)."""
    from rasterio.features import rasterize

    geoms = list(aoi.to_crs(grid.crs).geometry)
    return rasterize(geoms, out_shape=grid.shape, transform=grid.transform, fill=0, default_value=1,
                     dtype="uint8").astype(bool)


def sample_windows(path: str | Path, *, nodata: float | None = None, size: int = 64,
                   per_side: int = 3) -> np.ndarray:
    """Values of every band in ``per_side`` x ``per_side`` windows spread over the file, no data as NaN.

    A cheap, resolution-independent look at a file's values (reads at most
    ``per_side**2`` windows of ``size`` x ``size`` pixels), e.g. to check units
    before anything is computed.  Returns an array of shape ``(bands, n)``.
    """
    with rasterio.open(path) as src:
        nd = nodata if nodata is not None else src.nodata
        h, w = min(size, src.height), min(size, src.width)
        rows = np.unique(np.linspace(0, src.height - h, per_side).astype(int))
        cols = np.unique(np.linspace(0, src.width - w, per_side).astype(int))
        blocks = [src.read(window=Window(int(c), int(r), w, h)).reshape(src.count, -1)
                  for r in rows for c in cols]
    values = np.concatenate(blocks, axis=1).astype(np.float64)
    if nd is not None and not np.isnan(nd):
        values[values == nd] = np.nan
    return values
