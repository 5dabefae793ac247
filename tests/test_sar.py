"""Tests for wetlandflow.features.sar.

Outside references: the definition of the decibel (10 log10 of a power ratio);
NumPy's nanmean / nanstd / nanmedian / nanquantile for the temporal statistics;
the moments of the gamma
distribution for speckle (intensity of L-look speckle is gamma with shape L
and mean 1, so its variance is 1/L; e.g. Lee 1980 multiplicative model); and
the variance of a mean of N independent values (var / N).  The unit ranges
under test are rules of thumb (from memory) and are tested as behaviour, not
as check values.  The open-water tests are in test_water.py.
"""

from __future__ import annotations

import warnings

import dask.array as dsa
import numpy as np
import pandas as pd
import pytest
import xarray as xr

from wetlandflow._provenance import parameters_of
from wetlandflow.errors import DataQualityError
from wetlandflow.features import sar as S

ENL = 4.4


def speckle(shape, seed=0, looks=ENL) -> np.ndarray:
    """Unit-mean gamma speckle of ``looks`` looks (variance 1 / looks)."""
    return np.random.default_rng(seed).gamma(looks, 1.0 / looks, shape).astype("float32")


def sar_stack(n=8, ny=20, nx=30, seed=0, orbits=("ascending", "descending")) -> xr.DataArray:
    """Linear power: VV about -13 dB, VH about -20 dB, with speckle; orbits alternate."""
    level = np.array([0.05, 0.01], dtype="float32")[None, :, None, None]
    data = speckle((n, 2, ny, nx), seed) * level
    times = pd.date_range("2024-04-03", periods=n, freq="12D")
    orbit = [orbits[i % len(orbits)] for i in range(n)]
    return xr.DataArray(
        data, dims=("time", "pol", "y", "x"),
        coords={"time": times, "pol": ["VV", "VH"], "orbit": ("time", orbit),
                "y": 5.0 + 10.0 * np.arange(ny)[::-1], "x": 5.0 + 10.0 * np.arange(nx)},
        attrs={"units": "should not propagate"},
    )


def db(x):
    return 10 * np.log10(x)


# ---------------------------------------------------------------------------
# Units
# ---------------------------------------------------------------------------


@pytest.mark.reference
def test_db_definition_and_round_trip():
    """Decibel definition: 10 log10(P); 0.01 -> -20 dB, 1 -> 0 dB; P <= 0 has no dB value (NaN)."""
    x = xr.DataArray(np.array([0.01, 1.0, 0.1, 0.0, -1.0, np.nan], dtype="float32"), dims="x")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        d = S.to_db(x)
    np.testing.assert_allclose(d.values[:3], [-20.0, 0.0, -10.0], rtol=0, atol=1e-6)
    assert np.isnan(d.values[3:]).all() and d.dtype == np.float32 and d.attrs["units"] == "dB"
    rng = np.random.default_rng(0)
    p = xr.DataArray(rng.uniform(1e-4, 1.5, 1000), dims="x")
    np.testing.assert_allclose(S.from_db(S.to_db(p)).values, p.values, rtol=1e-12)


def test_db_stays_lazy():
    x = sar_stack().chunk({"y": 10})
    assert isinstance(S.to_db(x).data, dsa.Array)
    assert isinstance(S.from_db(S.to_db(x)).data, dsa.Array)


def test_units_check_accepts_correct_labels():
    s = sar_stack()
    assert S.check_sar_units(s, "linear")["likely_units"] == "linear"
    assert S.check_sar_units(S.to_db(s), "db")["likely_units"] == "db"


@pytest.mark.parametrize(
    ("make", "declared", "fix"),
    [
        (lambda s: S.to_db(s), "linear", 'units = "db"'),  # dB data labelled linear
        (lambda s: s, "db", 'units = "linear"'),  # linear data labelled dB
        (lambda s: s, "amplitude", 'units = "linear"'),  # power at -13 / -20 dB is far too dark for amplitude
        (lambda s: s * 10000, "linear", "digital numbers"),
    ],
)
def test_units_check_catches_mislabels(make, declared, fix):
    with pytest.raises(DataQualityError, match=fix) as info:
        S.check_sar_units(make(sar_stack()), declared, name="sar_20240403.tif")
    assert "sar_20240403.tif" in str(info.value) and repr(declared) in str(info.value)


# ---------------------------------------------------------------------------
# Temporal statistics
# ---------------------------------------------------------------------------


def _ignore_warnings(func, *args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return func(*args, **kwargs)


@pytest.mark.reference
def test_temporal_stats_pooled_match_numpy():
    """Reference: NumPy nan-reductions over time in linear power, then 10 log10 for the levels."""
    s = sar_stack(n=9)
    a = s.values.astype("float64")
    a[2, :, :3, :3] = np.nan
    s = s.copy(data=a.astype("float32"))
    ds = S.temporal_stats(s, orbit_policy="pooled")
    vv, vh = s.values[:, 0], s.values[:, 1]
    ratio = vh / vv
    for prefix, x in (("vv", vv), ("vh", vh), ("vhvv_ratio", ratio)):
        mean, std = np.nanmean(x, 0), np.nanstd(x, 0, ddof=1)
        p10, p90 = np.nanquantile(x, 0.1, axis=0), np.nanquantile(x, 0.9, axis=0)
        np.testing.assert_allclose(ds[f"{prefix}_mean_db"], db(mean), atol=2e-4)
        np.testing.assert_allclose(ds[f"{prefix}_median_db"], db(np.nanmedian(x, 0)), atol=2e-4)
        np.testing.assert_allclose(ds[f"{prefix}_p10_db"], db(p10), atol=2e-4)
        np.testing.assert_allclose(ds[f"{prefix}_p90_db"], db(p90), atol=2e-4)
        np.testing.assert_allclose(ds[f"{prefix}_std"], std, rtol=2e-4)
        np.testing.assert_allclose(ds[f"{prefix}_cv"], std / mean, rtol=2e-4)
        np.testing.assert_allclose(ds[f"{prefix}_amplitude_db"], db(p90) - db(p10), atol=4e-4)
    assert ds["vv_mean_db"].attrs["units"] == "dB" and ds["vh_std"].attrs["units"] == "1"
    assert "should not propagate" not in ds["vv_mean_db"].attrs.values()


@pytest.mark.reference
def test_temporal_stats_per_orbit_average_in_linear_power():
    """Reference: NumPy per-orbit means, averaged in linear power before the dB conversion."""
    s = sar_stack(n=8)
    ds = S.temporal_stats(s, stats=("mean", "std"))
    asc, desc = s.values[0::2, 0], s.values[1::2, 0]
    expected = db((asc.mean(0) + desc.mean(0)) / 2)
    np.testing.assert_allclose(ds["vv_mean_db"], expected, atol=2e-4)
    std = (asc.std(0, ddof=1) + desc.std(0, ddof=1)) / 2
    np.testing.assert_allclose(ds["vv_std"], std, rtol=2e-4)
    assert parameters_of(ds["vv_mean_db"])["orbit_policy"] == "per_orbit"


@pytest.mark.reference
def test_season_difference_of_mean_db():
    """Reference: NumPy means of the dates in each window, differenced in dB."""
    s = sar_stack(n=12, orbits=("ascending",))
    seasons = {"spring": ("04-01", "06-10"), "summer": ("06-11", "08-20")}
    ds = S.temporal_stats(s, stats=("mean",), seasons=seasons)
    t = pd.DatetimeIndex(s["time"].values)
    md = t.month * 100 + t.day
    spring, summer = (md >= 401) & (md <= 610), (md >= 611) & (md <= 820)
    vv = s.values[:, 0]
    expected = db(vv[spring].mean(0)) - db(vv[summer].mean(0))
    np.testing.assert_allclose(ds["vv_spring_minus_summer_db"], expected, atol=2e-4)
    assert {"vh_spring_minus_summer_db", "vhvv_ratio_spring_minus_summer_db"} <= set(ds)


def test_temporal_stats_lazy_and_equal_to_eager():
    s = sar_stack()
    lazy = S.temporal_stats(s.chunk({"y": 10, "x": 15}))
    for name, var in lazy.data_vars.items():
        assert isinstance(var.data, dsa.Array), name
        assert var.dtype == np.float32
    xr.testing.assert_allclose(lazy.compute(), S.temporal_stats(s))


def test_temporal_stats_rejects_bad_input():
    s = sar_stack()
    with pytest.raises(DataQualityError, match="transpose"):
        S.temporal_stats(s.transpose("pol", "time", "y", "x"))
    with pytest.raises(ValueError, match="unknown statistics"):
        S.temporal_stats(s, stats=("mean", "kurtosis"))
    with pytest.raises(DataQualityError, match="season 'winter'"):
        S.temporal_stats(s, seasons={"spring": ("04-01", "06-10"), "winter": ("12-01", "02-28")})


# ---------------------------------------------------------------------------
# Speckle filters
# ---------------------------------------------------------------------------


@pytest.mark.reference
def test_lee_constant_field_is_unchanged():
    """DERIVED (Lee 1980 model): var(z) = 0 gives k = 0 and the local mean, which equals the constant."""
    img = xr.DataArray(np.full((30, 40), 0.07, dtype="float32"), dims=("y", "x"))
    out = S.lee_filter(img)
    np.testing.assert_array_equal(out.values, img.values)
    assert out.attrs["units"] == "1" and parameters_of(out) == {"edge": "truncate", "enl": 4.4, "window": 7}


@pytest.mark.reference
def test_lee_pure_speckle_variance_goes_to_enl_level():
    """Gamma moments: L-look speckle has variance 1/L; its 7 x 7 mean has 1/(49 L) (independent pixels).

    On pure speckle var(x) is about 0, so the Lee output is close to the local
    mean: its variance must fall from 1/L to near 1/(49 L).
    """
    z = xr.DataArray(speckle((300, 300), seed=1), dims=("y", "x"))
    out = S.lee_filter(z, window=7, enl=ENL).values
    assert z.values.var() == pytest.approx(1 / ENL, rel=0.05)
    floor = 1 / (49 * ENL)
    assert 0.8 * floor < out.var() < 2.0 * floor
    assert out.mean() == pytest.approx(1.0, abs=0.01)  # the filter is mean-preserving on speckle


@pytest.mark.parametrize("edge", ["truncate", "symmetric"])
def test_lee_chunked_equals_whole_and_keeps_nan(edge):
    z = speckle((2, 50, 61), seed=2)
    z[0, 10, 10] = np.nan
    da = xr.DataArray(z, dims=("time", "y", "x"))
    whole = S.lee_filter(da, window=5, edge=edge)
    chunked = S.lee_filter(da.chunk({"y": 17, "x": 20}), window=5, edge=edge)
    assert isinstance(chunked.data, dsa.Array)
    np.testing.assert_array_equal(chunked.compute().values, whole.values)
    assert np.isnan(whole.values[0, 10, 10]) and np.isfinite(whole.values[0, 11, 10])


def test_lee_rejects_even_window():
    with pytest.raises(ValueError, match="odd integer"):
        S.lee_filter(xr.DataArray(np.ones((9, 9), "float32"), dims=("y", "x")), window=4)


@pytest.mark.reference
def test_temporal_ratio_filter_constant_and_speckle():
    """Constant series stay constant (ratios are 1); a mean of M independent ratio images has variance / M."""
    const = sar_stack(n=6) * 0 + 0.05
    out = S.temporal_ratio_filter(const)
    np.testing.assert_allclose(out.values, const.values, rtol=1e-6)
    s = sar_stack(n=8, ny=80, nx=80, seed=4)
    filt = S.temporal_ratio_filter(s.chunk({"y": 40}), window=7).compute()
    assert filt.dims == s.dims
    v_in = float(s.isel(time=0, pol=0).var())
    v_out = float(filt.isel(time=0, pol=0).var())
    assert v_out < v_in / 4  # M = 8 dates
