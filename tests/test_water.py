"""Tests for wetlandflow.features.water (open water from SAR backscatter).

Outside references: scikit-image's threshold_otsu for Otsu (1979); Ashman et
al. (1994) for the D measure; NumPy's nanmean for the water frequency.  The
fallback water threshold is a rule of thumb (from memory) and is tested as
behaviour, not as a check value.
"""

from __future__ import annotations

import warnings

import dask.array as dsa
import numpy as np
import pytest
import xarray as xr
from test_sar import sar_stack, speckle  # the shared synthetic SAR data

from wetlandflow._provenance import parameters_of
from wetlandflow.errors import DataQualityError, GridMismatchError
from wetlandflow.features import sar
from wetlandflow.features import water as S


def db(x):
    return 10 * np.log10(x)


def _ignore_warnings(func, *args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return func(*args, **kwargs)


def test_sar_module_still_exports_the_water_functions():
    for name in S.__all__:
        assert getattr(sar, name) is getattr(S, name)


def test_water_masks_rejects_missing_pol_and_bad_dims():
    s = sar_stack(n=2)
    with pytest.raises(DataQualityError, match=r"pol 'HH' is not in the SAR stack.*\['VV', 'VH'\]"):
        S.water_masks(s, pol="HH")
    with pytest.raises(DataQualityError, match="Transpose"):
        S.water_masks(s.transpose("pol", "time", "y", "x"))



@pytest.mark.reference
@pytest.mark.parametrize("nbins", [256, 64])
@pytest.mark.parametrize("kind", ["bimodal", "uniform", "exponential", "db_like"])
def test_otsu_matches_skimage(kind, nbins):
    """Reference: skimage.filters.threshold_otsu (Otsu 1979, IEEE SMC-9(1), 62-66)."""
    skf = pytest.importorskip("skimage.filters")
    rng = np.random.default_rng(len(kind) + nbins)
    values = {
        "bimodal": np.concatenate([rng.normal(-22, 2, 3000), rng.normal(-9, 3, 7000)]),
        "uniform": rng.uniform(0, 1, 5000),
        "exponential": rng.exponential(2.0, 5000),
        "db_like": db(speckle(8000, seed=3) * np.where(rng.random(8000) < 0.3, 0.004, 0.08)),
    }[kind].reshape(50, -1)
    expected = skf.threshold_otsu(values, nbins=nbins)
    assert S.otsu_threshold(values, nbins=nbins) == pytest.approx(expected, abs=1e-12)


@pytest.mark.reference
def test_otsu_two_level_image_separates_levels():
    """DERIVED: half 0, half 10: the foreground image > t is exactly the 10s."""
    img = np.zeros((20, 20))
    img[:, 10:] = 10
    t = S.otsu_threshold(xr.DataArray(img).chunk(5))  # dask input is computed (a global operation)
    np.testing.assert_array_equal(img > t, img == 10)


@pytest.mark.reference
def test_bimodality_ashman_d():
    """Ashman et al. (1994): D = sqrt(2)|mu1 - mu2| / sqrt(s1^2 + s2^2); N(-22, 2) + N(-10, 2) has D = 6."""
    rng = np.random.default_rng(7)
    two = np.concatenate([rng.normal(-22, 2, 4000), rng.normal(-10, 2, 6000)])
    res = S.bimodality(two)
    assert res["bimodal"] and res["ashman_d"] == pytest.approx(6.0, rel=0.05)
    assert S.ashman_d(-22, -10, 2, 2) == pytest.approx(6.0)
    one = S.bimodality(rng.normal(-12, 3, 10000))
    assert not one["bimodal"] and one["ashman_d"] < 2


def water_stack(n=5, seed=5) -> xr.DataArray:
    """Water in the top 15 rows (VV about -23 dB), land elsewhere (-10 dB); no water on the last date."""
    s = sar_stack(n=n, ny=40, nx=30, seed=seed, orbits=("ascending", "descending"))
    level = np.ones((n, 2, 40, 30), dtype="float32")
    level[:-1, :, :15, :] = 0.005 / 0.05  # VV 0.005 -> -23 dB (VH scaled alike)
    level[:, 0] *= 2.0  # VV land at 0.1 -> -10 dB
    return s * level


def test_water_masks_otsu_per_date_and_fallback():
    s = water_stack()
    masks = S.water_masks(s.chunk({"y": 20}))
    assert isinstance(masks.data, dsa.Array) and masks.dims == ("time", "y", "x")
    m = masks.compute().values
    truth = np.zeros((40, 30), bool)
    truth[:15] = True
    for k in range(4):
        assert (m[k] == truth).mean() > 0.97
    methods = list(masks["threshold_method"].values)
    assert methods[:4] == ["otsu"] * 4 and methods[4] == "fallback"  # the land-only date is unimodal
    assert masks["threshold_db"].values[4] == -18.0
    assert -23 < masks["threshold_db"].values[0] < -10


def test_water_masks_aoi_and_frequency():
    s = water_stack()
    aoi = xr.DataArray(np.ones((40, 30), bool), dims=("y", "x"), coords={"y": s.y, "x": s.x})
    aoi[:, :5] = False
    masks = S.water_masks(s, aoi_mask=aoi)
    assert np.isnan(masks.values[:, :, :5]).all()
    freq = S.surface_water_frequency(s, aoi_mask=aoi)
    expected = _ignore_warnings(np.nanmean, masks.values, axis=0)  # reference: numpy nanmean of 1/0 masks
    np.testing.assert_allclose(freq.values, expected, rtol=1e-6)
    assert np.isnan(freq.values[:, :5]).all()
    assert freq.values[:15, 5:].mean() == pytest.approx(0.8, abs=0.05)  # water on 4 of 5 dates
    with pytest.raises(GridMismatchError, match=r"shape \(40, 30\)"):
        S.water_masks(s, aoi_mask=aoi.isel(x=slice(0, 20)))


def test_frequency_counts_only_valid_dates():
    values = np.array([[1.0, 0.0, np.nan], [1.0, np.nan, np.nan], [0.0, 1.0, np.nan]]).reshape(3, 1, 3)
    masks = xr.DataArray(values, dims=("time", "y", "x"))
    freq = S.surface_water_frequency(masks)
    np.testing.assert_allclose(freq.values[0, :2], [2 / 3, 1 / 2])
    assert np.isnan(freq.values[0, 2])


def test_hydroperiod_class_boundaries():
    f = xr.DataArray(np.array([0.0, 0.05, 0.1, 0.39, 0.4, 0.79, 0.8, 1.0, np.nan]), dims="x")
    codes = S.hydroperiod_class(f, thresholds=(0.1, 0.4, 0.8))
    assert codes.values.tolist() == [0, 1, 2, 2, 3, 3, 4, 4, -1] and codes.dtype == np.int8
    meanings = parameters_of(codes)["flag_meanings"]
    assert meanings == ["no_data", "not_flooded", "temporary", "seasonal", "semi_permanent", "permanent"]
    with pytest.raises(ValueError, match="increasing"):
        S.hydroperiod_class(f, thresholds=(0.4, 0.1, 0.8))
