"""Tests for wetlandflow.features.composite: seasonal median composites and reflectance checks.

Outside references: NumPy's nanmedian over the scenes of each season window
for the composite; the plausibility rules are common practice, no source
(their thresholds are documented in the module).
"""

from __future__ import annotations

import warnings

import dask.array as dsa
import numpy as np
import pandas as pd
import pytest
import xarray as xr

from wetlandflow.errors import DataQualityError
from wetlandflow.features import composite as C
from wetlandflow.features import optical as O


def _numpy_nanmedian(a, axis=0):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # numpy warns on all-NaN pixels
        return np.nanmedian(a, axis=axis)


def stack(dates, ny=6, nx=7, seed=1, missing=0.3) -> xr.DataArray:
    rng = np.random.default_rng(seed)
    data = rng.uniform(0.01, 0.5, (len(dates), len(O.BANDS), ny, nx)).astype("float32")
    data[rng.random(data.shape) < missing] = np.nan
    return xr.DataArray(data, dims=("time", "band", "y", "x"),
                        coords={"time": pd.to_datetime(dates), "band": list(O.BANDS),
                                "y": 5.0 + 10.0 * np.arange(ny)[::-1], "x": 5.0 + 10.0 * np.arange(nx)},
                        attrs={"units": "DN", "source": "should not propagate"})

# ---------------------------------------------------------------------------
# Seasonal composites
# ---------------------------------------------------------------------------

DATES = ["2024-04-01", "2024-05-20", "2024-06-10", "2024-06-11", "2024-08-20", "2024-08-21", "2024-12-15"]
SEASONS = {"spring": ("04-01", "06-10"), "summer": ("06-11", "08-20"), "winter": ("12-01", "02-28")}


@pytest.mark.reference
def test_seasonal_composite_median_and_count():
    """Reference: numpy.nanmedian over the scenes whose dates are in each window (bounds inclusive)."""
    s = stack(DATES)
    comp = C.seasonal_composite(s, SEASONS)
    members = {"spring": [0, 1, 2], "summer": [3, 4], "winter": [6]}  # by hand from DATES and SEASONS
    assert comp["reflectance"].dims == ("season", "band", "y", "x")
    assert comp["valid_count"].dims == ("season", "y", "x") and comp["valid_count"].dtype == np.int16
    for season, idx in members.items():
        sub = s.values[idx]
        got = comp["reflectance"].sel(season=season).values
        np.testing.assert_array_equal(got, _numpy_nanmedian(sub))
        count = np.isfinite(sub).all(axis=1).sum(axis=0)
        np.testing.assert_array_equal(comp["valid_count"].sel(season=season).values, count)
    assert comp["n_scenes"].values.tolist() == [3, 2, 1]
    assert comp["reflectance"].attrs["units"] == "1" and "source" not in comp["reflectance"].attrs


def test_seasonal_composite_is_lazy_on_dask():
    s = stack(DATES).chunk({"y": 3, "x": 4})
    comp = C.seasonal_composite(s, SEASONS)
    assert isinstance(comp["reflectance"].data, dsa.Array)
    assert isinstance(comp["valid_count"].data, dsa.Array)
    xr.testing.assert_identical(comp.compute(), C.seasonal_composite(stack(DATES), SEASONS))


def test_seasonal_composite_empty_season_names_it_and_lists_dates():
    s = stack(DATES[:3])
    with pytest.raises(DataQualityError, match=r"season 'summer'.*2024-04-01.*2024-06-10"):
        C.seasonal_composite(s, {"spring": ("04-01", "06-10"), "summer": ("06-11", "08-20")})


def test_seasonal_composite_rejects_bad_dims_and_bounds():
    s = stack(DATES)
    with pytest.raises(DataQualityError, match="transpose"):
        C.seasonal_composite(s.transpose("band", "time", "y", "x"), SEASONS)
    with pytest.raises(ValueError, match="MM-DD"):
        C.seasonal_composite(s, {"spring": ("April", "06-10")})


# ---------------------------------------------------------------------------
# Reflectance plausibility (rules are common practice, no source)
# ---------------------------------------------------------------------------


def plausible_scene_stack() -> xr.DataArray:
    """Two scenes of land (0.02-0.45) with a dark-water patch (blue about 0.02)."""
    s = stack(["2024-05-14", "2024-07-02"], ny=40, nx=40, missing=0.0)
    s[:, :, :10, :10] = 0.02
    return s


def test_plausible_reflectance_passes():
    report = C.check_reflectance(plausible_scene_stack())
    assert set(report) == {"2024-05-14", "2024-07-02"}
    assert all(m["diagnosis"] == "ok" for m in report.values())


@pytest.mark.parametrize(
    ("transform", "diagnosis", "fix"),
    [
        (lambda s: s + 0.1, "offset_missing", "offset_dn = -1000"),
        (lambda s: s - 0.1, "offset_doubled", "offset_dn = 0"),
        (lambda s: s * 10000, "unscaled", "scale = 0.0001"),
    ],
)
def test_implausible_reflectance_is_diagnosed(transform, diagnosis, fix):
    """A -1000 DN offset at scale 1e-4 shifts reflectance by 0.1 (reflectance = (DN + offset_dn) * scale)."""
    s = plausible_scene_stack()
    bad = xr.concat([s.isel(time=[0]), transform(s.isel(time=[1]))], dim="time")
    report = C.reflectance_plausibility(bad)
    assert report["2024-05-14"]["diagnosis"] == "ok"
    assert report["2024-07-02"]["diagnosis"] == diagnosis
    with pytest.raises(DataQualityError, match=rf"scene 2024-07-02:(.|\n)*{fix}") as info:
        C.check_reflectance(bad)
    assert "2024-05-14" not in str(info.value)


def test_single_scene_named_in_message():
    scene = plausible_scene_stack().isel(time=0, drop=True) + 0.1
    with pytest.raises(DataQualityError, match="scene_20240514.tif"):
        C.check_reflectance(scene, name="scene_20240514.tif")


def test_optical_module_still_exports_the_moved_functions():
    """The split kept ``optical.seasonal_composite`` and friends (callers in the package use them)."""
    for name in ("seasonal_composite", "season_mask", "check_reflectance", "reflectance_plausibility",
                 "PLAUSIBILITY_LIMITS"):
        assert getattr(O, name) is getattr(C, name)
