"""Tests for wetlandflow.features.optical and the median kernel in features._kernels.

Outside references: spyndex (Montero et al. 2023, A standardized catalogue of
spectral indices to advance the use of remote sensing in Earth system research,
Scientific Data 10, 197) for every index formula and the Sentinel-2 band
centres; NumPy's nanmedian / nanquantile for the order-statistic kernel; the
0-1 principle for sorting networks (Knuth 1998, The Art of Computer
Programming vol. 3, 2nd ed., section 5.3.4) for the comparator network.
"""

from __future__ import annotations

import itertools
import warnings

import dask.array as dsa
import numpy as np
import pytest
import xarray as xr
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from wetlandflow._provenance import parameters_of
from wetlandflow.errors import DataQualityError, GridMismatchError
from wetlandflow.features import _kernels as K
from wetlandflow.features import optical as O

spyndex = pytest.importorskip("spyndex")

# Catalogue letter of each portable band name (spyndex bands.json: B = B2, G = B3, ...).
CATALOGUE = {"blue": "B", "green": "G", "red": "R", "re1": "RE1", "re2": "RE2", "re3": "RE3",
             "nir": "N", "nir_narrow": "N2", "swir1": "S1", "swir2": "S2"}


def reflectance(shape=(3, 8, 9), seed=0, dtype="float64", low=0.0, high=0.6) -> xr.DataArray:
    """Random reflectances with a band dim first; the other dims are (season-like, y, x)."""
    rng = np.random.default_rng(seed)
    data = rng.uniform(low, high, (len(O.BANDS),) + shape).astype(dtype)
    coords = {"band": list(O.BANDS), "season": ["spring", "summer", "autumn"][: shape[0]],
              "y": 5.0 + 10.0 * np.arange(shape[1])[::-1], "x": 5.0 + 10.0 * np.arange(shape[2])}
    return xr.DataArray(data, dims=("band", "season", "y", "x"), coords=coords)


def spyndex_value(index: str, refl: xr.DataArray, **rename: str) -> np.ndarray:
    """Evaluate a catalogue index; ``rename`` maps a catalogue letter to another portable band."""
    params = {}
    for letter in spyndex.indices[index].bands:
        band = rename.get(letter) or next(b for b, c in CATALOGUE.items() if c == letter)
        params[letter] = refl.sel(band=band).values
    return np.asarray(spyndex.computeIndex(index=index, params=params))


# ---------------------------------------------------------------------------
# Kernel: NaN median and quantiles
# ---------------------------------------------------------------------------


def _numpy_nanmedian(a, axis=0):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # numpy warns on all-NaN pixels
        return np.nanmedian(a, axis=axis)


@pytest.mark.reference
@pytest.mark.parametrize("dtype", ["float32", "float64"])
@pytest.mark.parametrize("nt", [1, 2, 5, 12, 40])
def test_nanmedian_equals_numpy_exactly(dtype, nt):
    """Reference: numpy.nanmedian, bit for bit, including all-NaN pixels (NaN) and +/-inf values."""
    rng = np.random.default_rng(nt)
    a = rng.normal(size=(nt, 33, 41)).astype(dtype)
    a[rng.random(a.shape) < 0.3] = np.nan
    a[:, 0, :5] = np.nan  # all-NaN pixels
    a[0, 1, :3] = np.inf
    a[-1, 2, :3] = -np.inf
    da = xr.DataArray(a, dims=("time", "y", "x"))
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # the kernel itself must not warn
        got = K.nanmedian_time(da).values
    expected = _numpy_nanmedian(a)
    assert got.dtype == a.dtype
    np.testing.assert_array_equal(got, expected)
    assert np.isnan(got[0, :5]).all()


@pytest.mark.reference
def test_nanmedian_other_dim_and_leading_dims():
    """Reference: numpy.nanmedian over a non-leading axis with extra dims kept in order."""
    rng = np.random.default_rng(5)
    a = rng.random((3, 7, 11, 9)).astype("float32")
    a[rng.random(a.shape) < 0.4] = np.nan
    da = xr.DataArray(a, dims=("band", "y", "time", "x"))
    got = K.nanmedian_time(da, dim="time")
    assert got.dims == ("band", "y", "x")
    np.testing.assert_array_equal(got.values, _numpy_nanmedian(a, axis=2))


@pytest.mark.reference
@pytest.mark.parametrize("q", [0.0, 0.1, 0.25, 0.5, 1 / 3, 0.9, 1.0])
def test_nanquantile_equals_numpy(q):
    """Reference: numpy.nanquantile (method 'linear'), exactly on float32."""
    rng = np.random.default_rng(11)
    a = rng.gamma(2.0, size=(9, 12, 10)).astype("float32")
    a[rng.random(a.shape) < 0.3] = np.nan
    a[:, 0, 0] = np.nan
    got = K.nanquantile_time(xr.DataArray(a, dims=("time", "y", "x")), [q]).sel(quantile=q).values
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        expected = np.nanquantile(a, q, axis=0)
    np.testing.assert_array_equal(got, expected)


@pytest.mark.reference
@pytest.mark.parametrize("n", range(1, 13))
def test_batcher_network_sorts_every_binary_input(n):
    """0-1 principle (Knuth 1998, TAOCP vol. 3, 5.3.4; from memory): sorting all 0/1 inputs sorts any."""
    pairs = K.batcher_pairs(n)
    inputs = np.array(list(itertools.product([0, 1], repeat=n)))
    v = inputs.copy()
    for i, j in pairs:
        lo, hi = np.minimum(v[:, i], v[:, j]), np.maximum(v[:, i], v[:, j])
        v[:, i], v[:, j] = lo, hi
    np.testing.assert_array_equal(v, np.sort(inputs, axis=1))


@pytest.mark.reference
def test_nanmedian_dask_is_lazy_and_chunking_does_not_matter():
    """Reference: numpy.nanmedian; chunks along y/x and along time give the same result."""
    rng = np.random.default_rng(2)
    a = rng.random((10, 40, 50)).astype("float32")
    a[rng.random(a.shape) < 0.3] = np.nan
    da = xr.DataArray(a, dims=("time", "y", "x"))
    for chunks in ({"y": 16, "x": 20}, {"time": 3, "y": 25}):
        out = K.nanmedian_time(da.chunk(chunks))
        assert isinstance(out.data, dsa.Array)
        np.testing.assert_array_equal(out.compute().values, _numpy_nanmedian(a))


# ---------------------------------------------------------------------------
# Index formulas against the spyndex catalogue
# ---------------------------------------------------------------------------

CASES = [  # (our function, catalogue index, band substitutions)
    (O.ndvi, "NDVI", {}),
    (O.ndwi_mcfeeters, "NDWI", {}),
    (O.ndmi, "NDMI", {}),
    (O.ndmi, "LSWI", {}),  # the same formula under its other catalogue name
    (O.mndwi, "MNDWI", {}),
    (O.ndre1, "NDREI", {}),
    (O.ndre2, "NDREI", {"RE1": "re2"}),  # the catalogue's NDREI formula with B06 in place of B05
]


@pytest.mark.reference
@pytest.mark.parametrize(("func", "index", "rename"), CASES, ids=[f"{c[0].__name__}-{c[1]}" for c in CASES])
def test_index_matches_spyndex(func, index, rename):
    """Reference: spyndex.computeIndex (Montero et al. 2023, Scientific Data 10, 197), random reflectances."""
    refl = reflectance(seed=len(index) + len(rename))  # deterministic (str hash is salted per process)
    got = func(refl)
    assert got.dims == ("season", "y", "x")
    np.testing.assert_allclose(got.values, spyndex_value(index, refl, **rename), rtol=1e-12, atol=0)


@pytest.mark.reference
def test_ndvi_documented_spyndex_example():
    """spyndex documentation example: NDVI with N = 0.643, R = 0.175 gives 0.5721271393643031."""
    documented = 0.5721271393643031
    assert spyndex.computeIndex(index="NDVI", params={"N": 0.643, "R": 0.175}) == documented
    nir, red = xr.DataArray([0.643]), xr.DataArray([0.175])
    got = O.normalized_difference(nir, red, name="ndvi")
    assert float(got[0]) == pytest.approx(documented, rel=1e-15)


@pytest.mark.reference
def test_reip_nominal_centres_equal_s2rep():
    """Reference: spyndex S2REP = 705 + 35 ((RE3 + R)/2 - RE1)/(RE2 - RE1).

    Frampton, Dash, Watmough & Milton (2013), Evaluating the capabilities of Sentinel-2 for
    quantitative estimation of biophysical variables in vegetation.
    """
    refl = reflectance(seed=7, low=0.02)
    got = O.reip(refl, centres="nominal")
    np.testing.assert_allclose(got.values, spyndex_value("S2REP", refl), rtol=1e-12)


@pytest.mark.reference
def test_reip_s2a_centres_hand_derived():
    """DERIVED: with S2A centres 704.1 / 740.5 nm, REIP = 704.1 + 36.4 (...).

    The centre wavelengths themselves are checked against the spyndex catalogue
    (bands.json, sentinel2a / sentinel2b entries).
    """
    refl = reflectance(seed=8, low=0.02)
    r = {b: refl.sel(band=b).values for b in ("red", "re1", "re2", "re3")}
    expected = 704.1 + 36.4 * (((r["red"] + r["re3"]) / 2 - r["re1"]) / (r["re2"] - r["re1"]))
    got = O.reip(refl)
    np.testing.assert_allclose(got.values, expected, rtol=1e-10)
    assert got.attrs["units"] == "nm"
    assert parameters_of(got)["centres"] == "S2A"
    for sat in ("S2A", "S2B"):
        platform = "sentinel2a" if sat == "S2A" else "sentinel2b"
        for band, nm in O.CENTRE_WAVELENGTH_NM[sat].items():
            assert getattr(spyndex.bands[CATALOGUE[band]], platform).wavelength == nm


def test_reip_clip_bounds_to_band_centres():
    refl = reflectance(seed=10)
    raw, clipped = O.reip(refl).values, O.reip(refl, clip=True).values
    inside = (raw >= 704.1) & (raw <= 740.5)
    assert (~inside).any()  # random spectra extrapolate
    np.testing.assert_allclose(clipped[inside], raw[inside], rtol=1e-6)
    assert clipped.min() >= 704.1 - 1e-4 and clipped.max() <= 740.5 + 1e-4


def test_reip_equal_red_edge_bands_is_nan():
    """re2 == re1 makes the interpolation undefined: NaN, not inf, and no warning."""
    refl = reflectance(seed=9)
    refl.loc[{"band": "re2"}] = refl.sel(band="re1")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert np.isnan(O.reip(refl).values).all()


nonneg = st.floats(min_value=0.0, max_value=float(np.finfo(np.float32).max), allow_nan=False, width=32)


@pytest.mark.reference
@settings(max_examples=60, deadline=None)
@given(arrays(np.float32, (len(O.BANDS), 6), elements=nonneg))
def test_indices_bounded_for_nonnegative_reflectance(data):
    """Analytic: |a - b| <= a + b for a, b >= 0, so every normalised difference is in [-1, 1] or NaN."""
    refl = xr.DataArray(data, dims=("band", "x"), coords={"band": list(O.BANDS)})
    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)
        for name in ("ndvi", "ndwi_mcfeeters", "ndmi", "mndwi", "ndre1", "ndre2"):
            v = O.OPTICAL_INDICES[name](refl).values
            ok = np.isnan(v) | ((v >= -1) & (v <= 1))
            assert ok.all(), (name, v)


def test_normalized_difference_zero_sum_is_nan():
    a = xr.DataArray(np.array([0.0, 0.2, 0.0], dtype="float32"))
    b = xr.DataArray(np.array([0.0, 0.2, 0.3], dtype="float32"))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        out = O.normalized_difference(a, b, name="nd").values
    assert np.isnan(out[0]) and out[1] == 0 and out[2] == -1
    assert out.dtype == np.float32


def test_normalized_difference_requires_same_grid():
    refl = reflectance()
    shifted = refl.assign_coords(x=refl.x + 5.0)
    with pytest.raises(GridMismatchError, match="same grid"):
        O.normalized_difference(refl.sel(band="nir"), shifted.sel(band="red"), name="nd")


def test_indices_stay_lazy_on_dask_and_match_numpy():
    refl = reflectance(seed=3, dtype="float32")
    lazy = O.optical_indices(refl.chunk({"y": 4, "x": 5}))
    for name, var in lazy.data_vars.items():
        assert isinstance(var.data, dsa.Array), name
    eager = O.optical_indices(refl)
    xr.testing.assert_identical(lazy.compute(), eager)


def test_index_attrs_are_fresh_and_band_dim_dropped():
    refl = reflectance(seed=4).assign_attrs(units="DN", long_name="input")
    out = O.ndvi(refl)
    assert out.name == "ndvi" and out.attrs["units"] == "1" and out.attrs["domain"] == "optical"
    assert "Rouse" in out.attrs["reference"] and "band" not in out.coords
    assert parameters_of(out)["sentinel2"] == ["B08", "B04"]


# ---------------------------------------------------------------------------
# Fused normalised differences
# ---------------------------------------------------------------------------

# ten pairs over the ten bands: the six listed indices plus four unnamed ones
FUSED_PAIRS = {**{n: O._ND_SPECS[n][:2] for n in O._ND_SPECS},
               "nd_nir_re3": ("nir", "re3"), "nd_n2_re1": ("nir_narrow", "re1"),
               "nd_swir": ("swir1", "swir2"), "nd_re3_red": ("re3", "red")}


def zero_sum_reflectance(dtype) -> xr.DataArray:
    """Random reflectances with some pixels where a + b == 0 (both zero, or opposite signs)."""
    refl = reflectance(seed=8, dtype=dtype, low=-0.2)
    refl.loc[{"band": "nir", "y": refl.y[0]}] = 0.0
    refl.loc[{"band": "red", "y": refl.y[0]}] = 0.0
    refl.loc[{"band": "swir1", "y": refl.y[1]}] = 0.25
    refl.loc[{"band": "swir2", "y": refl.y[1]}] = -0.25
    return refl


@pytest.mark.reference
@pytest.mark.parametrize("dtype", ["float32", "float64"])
def test_fused_differences_equal_numpy_float64_arithmetic(dtype):
    """Reference: NumPy, (a - b) / (a + b) in float64 rounded once to the input dtype; NaN where a + b == 0."""
    refl = zero_sum_reflectance(dtype)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        got = O.normalized_differences(refl, FUSED_PAIRS)
    for name, (a, b) in FUSED_PAIRS.items():
        x = refl.sel(band=a).values.astype(np.float64)
        y = refl.sel(band=b).values.astype(np.float64)
        with np.errstate(all="ignore"):
            expected = np.where(x + y != 0, (x - y) / (x + y), np.nan).astype(dtype)
        assert got[name].dtype == np.dtype(dtype)
        np.testing.assert_array_equal(got[name].values, expected, err_msg=name)
    assert np.isnan(got["ndvi"].values[:, 0]).all() and np.isnan(got["nd_swir"].values[:, 1]).all()


def test_fused_differences_identical_to_single_index_functions():
    refl = zero_sum_reflectance("float32").transpose("y", "band", "season", "x")  # band not first
    got = O.normalized_differences(refl, FUSED_PAIRS)
    for name in O._ND_SPECS:
        xr.testing.assert_identical(got[name], O.OPTICAL_INDICES[name](refl))
    for name, (a, b) in FUSED_PAIRS.items():
        single = O.normalized_difference(refl.sel(band=a, drop=True), refl.sel(band=b, drop=True), name=name)
        xr.testing.assert_equal(got[name], single)
    assert got["nd_swir"].attrs["formula"] == "(swir1 - swir2) / (swir1 + swir2)"
    assert parameters_of(got["nd_swir"]) == {"bands": ["swir1", "swir2"], "sentinel2": ["B11", "B12"]}


def test_fused_differences_lazy_one_task_per_chunk_and_chunking_does_not_matter():
    refl = zero_sum_reflectance("float32")
    chunked = refl.chunk({"band": 3, "y": 4, "x": 5})  # band split: rechunked to one chunk
    lazy = O.normalized_differences(chunked, FUSED_PAIRS)
    for name, var in lazy.data_vars.items():
        assert isinstance(var.data, dsa.Array), name
        assert var.chunks == (((3,), (4, 4), (5, 4))), name
    xr.testing.assert_identical(lazy.compute(), O.normalized_differences(refl, FUSED_PAIRS))
    fused_tasks = [k for k in dict(lazy["ndvi"].data.__dask_graph__()) if "nd_fused_block" in str(k[0])]
    assert len(fused_tasks) == 4  # one kernel call per (y, x) chunk, shared by the ten indices


@pytest.mark.reference
@pytest.mark.parametrize("parallel", [False, True])
def test_fused_block_tiles_and_strided_views_equal_numpy(parallel):
    """Reference: NumPy float64 arithmetic, as above, on blocks the kernel tiles and stages.

    Rows of 3000 float32 pixels make tiles of two rows, so seven rows end in a
    partial tile; a view into a wider array (rows far apart) takes the staged
    path through the tile buffer, a C-contiguous copy the in-place one; two
    leading planes (seasons) are each run on their own.
    """
    rng = np.random.default_rng(11)
    wide = rng.uniform(-0.1, 0.5, (10, 2, 7, 3100)).astype(np.float32)
    wide[1, :, 3, 40:90] = -wide[2, :, 3, 40:90]  # a + b == 0 for pair (1, 2) in the view
    ia, ib = np.array([6, 1, 0, 9], dtype=np.int64), np.array([2, 2, 8, 4], dtype=np.int64)
    view = wide[:, :, :, 40:3040]
    with np.errstate(all="ignore"):
        x, y = view[ia].astype(np.float64), view[ib].astype(np.float64)
        expected = np.where(x + y != 0, (x - y) / (x + y), np.nan).astype(np.float32)
    for block in (view, np.ascontiguousarray(view), view[:, 1]):
        got = O.nd_fused_block(block, ia, ib, parallel=parallel)
        want = expected if block.ndim == 4 else expected[:, 1]
        assert got.shape == want.shape
        np.testing.assert_array_equal(got, want)
    assert np.isnan(expected[1, :, 3, :50]).all()


def test_fused_differences_reject_bad_pairs():
    refl = reflectance()
    with pytest.raises(ValueError, match=r"'ndvi' is defined as \(nir - red\)"):
        O.normalized_differences(refl, {"ndvi": ("red", "nir")})
    with pytest.raises(DataQualityError, match="band 'nir' is missing"):
        O.normalized_differences(refl.sel(band=["red", "green"]), {"ndvi": ("nir", "red")})
    with pytest.raises(ValueError, match="pairs is empty"):
        O.normalized_differences(refl, {})


def test_missing_band_names_present_bands():
    refl = reflectance().sel(band=["red", "green"])
    with pytest.raises(DataQualityError, match=r"band 'nir' is missing.*\['red', 'green'\]"):
        O.ndvi(refl)


def test_season_difference_per_variable_and_for_a_dataarray():
    ds = O.optical_indices(reflectance(seed=6), names=["ndvi", "mndwi"])
    diff = O.season_difference(ds, a="spring", b="summer")
    assert set(diff) == {"ndvi_spring_minus_summer", "mndwi_spring_minus_summer"}
    expected = ds["ndvi"].sel(season="spring") - ds["ndvi"].sel(season="summer")
    np.testing.assert_array_equal(diff["ndvi_spring_minus_summer"].values, expected.values)
    single = O.season_difference(ds["ndvi"], a="spring", b="autumn")
    assert isinstance(single, xr.DataArray) and single.name == "ndvi_spring_minus_autumn"
    with pytest.raises(ValueError, match="season 'winter' not in the data"):
        O.season_difference(ds, a="winter")
