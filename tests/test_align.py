"""Alignment onto the reference grid, checked against rasterio.warp.reproject called directly."""

from __future__ import annotations

import numpy as np
import pytest
import rasterio
from rasterio.enums import Resampling
from rasterio.transform import from_origin
from rasterio.warp import reproject, transform_bounds

from wetlandflow.errors import AlignmentError, InputFileError
from wetlandflow.inputs.align import aoi_mask, choose_resampling, read_aligned
from wetlandflow.inputs.grid import Grid

GRID = Grid.from_bbox((512000, 6396000, 514000, 6398000), crs="EPSG:32633", resolution=10)


def write(path, data, *, crs, transform, nodata=None):
    data = np.asarray(data)
    if data.ndim == 2:
        data = data[None]
    with rasterio.open(path, "w", driver="GTiff", width=data.shape[2], height=data.shape[1], count=data.shape[0],
                       dtype=data.dtype, crs=crs, transform=transform, nodata=nodata) as dst:
        dst.write(data)
    return path


def smooth_field(h, w, seed=0):
    yy, xx = np.mgrid[0:h, 0:w].astype("float64")
    rng = np.random.default_rng(seed)
    a, b, c = rng.uniform(0.5, 2, 3)
    return (100 + a * np.sin(xx / 17) * 5 + b * np.cos(yy / 23) * 5 + c * xx * yy / (h * w) * 10).astype("float32")


def reference(src, src_t, src_crs, resampling, nodata=None, dtype="float32"):
    """The same data warped in one call of rasterio.warp.reproject onto the grid."""
    dst = np.full(GRID.shape, np.nan if dtype == "float32" else 0, dtype=dtype)
    reproject(src, dst, src_transform=src_t, src_crs=src_crs, dst_transform=GRID.transform, dst_crs=GRID.crs,
              resampling=resampling, src_nodata=nodata, dst_nodata=np.nan if dtype == "float32" else 0)
    return dst


@pytest.mark.reference
def test_dem_in_other_crs_and_resolution_matches_reproject(tmp_path):
    """Reference: rasterio.warp.reproject (GDAL's warper) on the same data.

    Both paths use GDAL's approximate transformer (error threshold 0.125 px by default, 0.001 px here),
    so values agree to a small fraction of the local relief per pixel, not bit for bit.
    """
    b = transform_bounds(GRID.crs, "EPSG:3035", *GRID.bounds)
    t = from_origin(b[0] - 300, b[3] + 300, 30, 30)
    h, w = int((b[3] - b[1] + 600) / 30), int((b[2] - b[0] + 600) / 30)
    dem = smooth_field(h, w)
    path = write(tmp_path / "dem.tif", dem, crs="EPSG:3035", transform=t, nodata=-9999)
    da = read_aligned(path, GRID, kind="elevation", name="dem", chunks=64)
    assert da.attrs["resampling"] == "bilinear"
    got = da.values[0]
    ref = reference(dem, t, "EPSG:3035", Resampling.bilinear, nodata=-9999)
    relief_per_px = np.nanmedian(np.abs(np.diff(ref, axis=1)))
    assert np.isfinite(got).all()
    assert np.nanmax(np.abs(got - ref)) < 0.2 * relief_per_px + 1e-4


@pytest.mark.reference
def test_coarsening_uses_average_and_equals_reproject(tmp_path):
    """Reference: rasterio.warp.reproject with Resampling.average, same CRS, 3 m -> 10 m."""
    t = from_origin(511970, 6398030, 2.5, 2.5)
    data = smooth_field(880, 880, seed=1)
    path = write(tmp_path / "fine.tif", data, crs="EPSG:32633", transform=t)
    da = read_aligned(path, GRID, kind="reflectance", name="fine", chunks=50)
    assert da.attrs["resampling"] == "average"
    ref = reference(data, t, "EPSG:32633", Resampling.average)
    np.testing.assert_allclose(da.values[0], ref, rtol=0, atol=1e-4)


@pytest.mark.reference
def test_categorical_mask_uses_mode_when_coarsening(tmp_path):
    """Reference: rasterio.warp.reproject with Resampling.mode."""
    t = from_origin(512000, 6398000, 5, 5)
    rng = np.random.default_rng(2)
    codes = rng.choice(np.array([4, 6, 9], dtype="uint8"), size=(400, 400), p=[0.6, 0.3, 0.1])
    path = write(tmp_path / "scl.tif", codes, crs="EPSG:32633", transform=t, nodata=0)
    da = read_aligned(path, GRID, kind="categorical", name="scl", chunks=64)
    assert da.attrs["resampling"] == "mode" and da.dtype == np.uint8
    ref = reference(codes, t, "EPSG:32633", Resampling.mode, nodata=0, dtype="uint8")
    assert (da.values[0] == ref).mean() > 0.999


def test_same_grid_is_read_directly_and_nodata_becomes_nan(tmp_path):
    data = np.arange(200 * 200, dtype="uint16").reshape(200, 200) % 5000 + 1
    data[10:20, 30:40] = 0
    path = write(tmp_path / "s2.tif", data, crs="EPSG:32633", transform=GRID.transform, nodata=0)
    da = read_aligned(path, GRID, kind="reflectance", name="scene", chunks=64)
    got = da.values[0]
    assert np.isnan(got[10:20, 30:40]).all()
    np.testing.assert_array_equal(got[50:], data[50:].astype("float32"))


def test_chunked_equals_single_chunk(tmp_path):
    b = transform_bounds(GRID.crs, "EPSG:3035", *GRID.bounds)
    t = from_origin(b[0] - 100, b[3] + 100, 20, 20)
    dem = smooth_field(int((b[3] - b[1]) / 20) + 12, int((b[2] - b[0]) / 20) + 12, seed=4)
    path = write(tmp_path / "dem.tif", dem, crs="EPSG:3035", transform=t)
    small = read_aligned(path, GRID, kind="elevation", name="dem", chunks=64).values
    whole = read_aligned(path, GRID, kind="elevation", name="dem", chunks=1024).values
    relief = np.nanmedian(np.abs(np.diff(whole[0], axis=1)))
    assert np.nanmax(np.abs(small - whole)) < 0.05 * relief + 1e-4


def test_aligned_read_is_lazy(tmp_path):
    import dask.array as dsa

    path = write(tmp_path / "s.tif", np.ones((200, 200), "float32"), crs="EPSG:32633", transform=GRID.transform)
    da = read_aligned(path, GRID, kind="reflectance", name="s", chunks=64)
    assert isinstance(da.data, dsa.Array)
    assert da.data.npartitions == 16


def test_resampling_follows_kind():
    assert choose_resampling("elevation", 30, GRID) == Resampling.bilinear
    assert choose_resampling("elevation", 2, GRID) == Resampling.average
    assert choose_resampling("categorical", 10, GRID) == Resampling.nearest
    assert choose_resampling("categorical", 5, GRID) == Resampling.mode
    with pytest.raises(ValueError, match="kind"):
        choose_resampling("ndvi", 10, GRID)


def test_raster_without_crs(tmp_path):
    path = tmp_path / "nocrs.tif"
    with rasterio.open(path, "w", driver="GTiff", width=10, height=10, count=1, dtype="float32") as dst:
        dst.write(np.ones((1, 10, 10), "float32"))
    with pytest.raises(AlignmentError, match=r"nocrs\.tif.*no CRS"):
        read_aligned(path, GRID, kind="elevation", name="dem")


def test_no_overlap(tmp_path):
    path = write(tmp_path / "far.tif", np.ones((10, 10), "float32"), crs="EPSG:32633",
                 transform=from_origin(800000, 5000000, 10, 10))
    with pytest.raises(AlignmentError, match="does not overlap"):
        read_aligned(path, GRID, kind="elevation", name="dem")


def test_wrong_band_count(tmp_path):
    path = write(tmp_path / "two.tif", np.ones((2, 10, 10), "float32"), crs="EPSG:32633", transform=GRID.transform)
    with pytest.raises(AlignmentError, match="2 band.*lists 3"):
        read_aligned(path, GRID, kind="sar_power", name="sar", band_names=["VV", "VH", "HH"])


def test_truncated_file(tmp_path):
    path = write(tmp_path / "t.tif", np.random.default_rng(0).random((300, 300)).astype("float32"),
                 crs="EPSG:32633", transform=GRID.transform)
    raw = path.read_bytes()
    path.write_bytes(raw[: len(raw) // 3])
    with pytest.raises((InputFileError, AlignmentError)) as info:
        read_aligned(path, GRID, kind="elevation", name="dem")
    assert "t.tif" in str(info.value)


def test_aoi_mask_pixel_centre_rule():
    import geopandas as gpd
    from shapely.geometry import box

    aoi = gpd.GeoDataFrame(geometry=[box(512000, 6396000, 513000, 6398000)], crs="EPSG:32633")
    m = aoi_mask(aoi, GRID, chunks=64).values
    assert m[:, :100].all() and not m[:, 100:].any()
    # the same polygon given in another CRS lands on the same pixels (all but a rim of boundary pixels)
    m2 = aoi_mask(aoi.to_crs("EPSG:4326"), GRID, chunks=64).values
    assert (m2 != m).mean() < 0.01
