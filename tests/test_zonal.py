"""Tests for wetlandflow.monitoring.zonal (per-polygon series from dated rasters).

Outside references: xarray's ``groupby(...).mean()`` for the zonal means and shapely's polygon areas for the
burnt zones (general-purpose libraries from PyPI).
"""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import shapely
import xarray as xr

from wetlandflow.errors import MonitoringDesignError
from wetlandflow.monitoring.zonal import annual_table, in_window, zonal_series, zone_ids


def _stack(n_dates: int = 6, size: int = 20, seed: int = 0) -> xr.DataArray:
    rng = np.random.default_rng(seed)
    values = rng.normal(0.5, 0.2, (n_dates, size, size))
    values[rng.random(values.shape) < 0.2] = np.nan  # clouds
    times = pd.date_range("2001-07-01", periods=n_dates, freq="365D")
    centres = np.arange(size) * 10.0 + 5
    coords = {"time": times, "y": centres[::-1], "x": centres}
    return xr.DataArray(values, dims=("time", "y", "x"), coords=coords,
                        attrs={"units": "1"})


def _sites() -> gpd.GeoDataFrame:
    return gpd.GeoDataFrame({"name": ["a", "b"]},
                            geometry=[shapely.box(0, 0, 80, 60), shapely.box(100, 100, 200, 200)])


@pytest.mark.reference
def test_zone_areas_equal_the_polygon_areas():
    """Pixel-aligned rectangles burn to exactly their area (shapely's polygon area)."""
    ids, names = zone_ids(_sites(), _stack(), id_field="name")
    areas = _sites().geometry.area.to_numpy()
    assert names == ["a", "b"]
    assert [(ids == k).sum() * 100.0 for k in (1, 2)] == list(areas)


@pytest.mark.reference
def test_zonal_means_equal_xarray_groupby():
    """The bincount means equal xarray's groupby mean over the same zones (NaN skipped)."""
    stack = _stack()
    ids, names = zone_ids(_sites(), stack, id_field="name")
    table = zonal_series(stack, ids, names, metric="ndvi", pixel_area_ha=0.01)
    zones = xr.DataArray(ids, dims=("y", "x"), coords={"y": stack.y, "x": stack.x}, name="zone")
    expected = stack.where(zones > 0).groupby(zones).mean()  # over each zone's pixels, per date
    for k, name in enumerate(names, start=1):
        got = table[table["polygon"] == name]["value"].to_numpy()
        np.testing.assert_allclose(got, expected.sel(zone=k).values, rtol=1e-12)
    assert set(table.columns) == {"polygon", "date", "metric", "value", "observed_share", "area_ha"}
    assert table.loc[table["polygon"] == "a", "area_ha"].iloc[0] == pytest.approx(0.48)


def test_unobserved_dates_stay_as_gaps():
    stack = _stack()
    stack[2] = np.nan
    ids, names = zone_ids(_sites(), stack, id_field="name")
    table = zonal_series(stack, ids, names, metric="water")
    gap = table[table["date"] == pd.Timestamp(stack.time.values[2])]
    assert gap["value"].isna().all() and (gap["observed_share"] == 0).all()


def test_annual_table_keeps_the_window_and_the_observed_dates():
    dates = pd.to_datetime(["2001-05-01", "2001-07-01", "2001-08-01", "2002-07-15", "2002-09-30"])
    table = pd.DataFrame({"polygon": "a", "date": dates, "metric": "ndvi", "value": [9.0, 1.0, 3.0, 5.0, 9.0],
                          "observed_share": [1.0, 1.0, 1.0, 1.0, 1.0]})
    out = annual_table(table, how="median", season=("06-01", "08-31"))
    assert out[["year", "value", "n_dates"]].values.tolist() == [[2001, 2.0, 2], [2002, 5.0, 1]]
    assert "06-01 to 08-31" in out.attrs["method"]
    cloudy = table.assign(observed_share=[1.0, 0.2, 1.0, 1.0, 1.0])
    assert annual_table(cloudy, how="max", season=("06-01", "08-31"))["value"].tolist() == [3.0, 5.0]
    with pytest.raises(MonitoringDesignError, match="monitor.aggregate"):
        annual_table(table, how="mode")


def test_in_window_without_a_window_keeps_every_date():
    dates = pd.Series(pd.to_datetime(["2001-01-01", "2001-12-31"]))
    assert in_window(dates).all()
    assert in_window(dates, ("12-01", "12-31")).tolist() == [False, True]
