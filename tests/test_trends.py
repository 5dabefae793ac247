"""Tests for wetlandflow.monitoring.trends.

Reference checks compare with general-purpose libraries from PyPI: pymannkendall (Hussain et al. 2019,
``original_test``, ``hamed_rao_modification_test`` after Hamed & Rao 1998, ``sens_slope``) and scipy.stats
(``theilslopes`` after Sen 1968, ``kendalltau``, ``false_discovery_control`` after Benjamini & Hochberg 1995
and Benjamini & Yekutieli 2001).  The series they run on are random draws (with ties, a gap year, short,
long, AR(1)); the expected values come from the libraries, never from this file.  Behaviour tests use
stacks with a planted slope.
"""

from __future__ import annotations

import warnings

import dask
import numpy as np
import pandas as pd
import pytest
import xarray as xr

from wetlandflow.errors import DataQualityError, MonitoringDesignError
from wetlandflow.monitoring import trends as T

YEARS0 = 2001


def annual(values, units: str | None = None) -> xr.DataArray:
    values = np.asarray(values, dtype=float)
    da = xr.DataArray(values, dims="year", coords={"year": np.arange(YEARS0, YEARS0 + values.size)})
    return da.assign_attrs(units=units) if units else da


def ar1(n: int, phi: float, slope: float, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    e = np.zeros(n)
    for i in range(1, n):
        e[i] = phi * e[i - 1] + rng.normal()
    return e + slope * np.arange(n)


def series_cases() -> dict[str, np.ndarray]:
    rng = np.random.default_rng(42)
    ties = np.round(rng.normal(size=20) * 2 + 0.1 * np.arange(20))  # integers: many tie groups
    gap = rng.normal(size=25) + 0.05 * np.arange(25)
    gap[9] = np.nan
    zeros = np.where(rng.uniform(size=30) < 0.6, 0.0, rng.uniform(size=30))  # mostly dry: many tied slopes
    return {"ties": ties, "zeros": zeros, "gap": gap, "short": rng.normal(size=6) + np.arange(6) * 0.2,
            "long": rng.normal(size=60) + 0.02 * np.arange(60), "ar1": ar1(40, 0.7, 0.05, seed=7),
            "ar1_strong": ar1(35, 0.9, 0.0, seed=11)}


CASES = series_cases()


def scalar(ds: xr.Dataset, name: str) -> float:
    return float(ds[name].values)


def quiet(func, *args, **kwargs):
    with warnings.catch_warnings():  # pymannkendall warns on sqrt of a negative corrected variance
        warnings.simplefilter("ignore", RuntimeWarning)
        return func(*args, **kwargs)


# -- reference: pymannkendall -----------------------------------------------------------------------------
@pytest.mark.reference
@pytest.mark.parametrize("name", sorted(CASES))
def test_original_test_matches_pymannkendall(name):
    # pymannkendall.original_test and sens_slope (PyPI pymannkendall; Mann 1945, Kendall 1975, Sen 1968)
    pymk = pytest.importorskip("pymannkendall")
    x = CASES[name]
    ref = pymk.original_test(x, alpha=0.05)
    sen = pymk.sens_slope(x)
    ds = T.mann_kendall(annual(x), autocorrelation="none")
    assert scalar(ds, "n") == np.isfinite(x).sum()
    np.testing.assert_allclose([scalar(ds, k) for k in ("s", "var_s", "var_s_corrected", "z", "p", "tau")],
                               [ref.s, ref.var_s, ref.var_s, ref.z, ref.p, ref.Tau], rtol=1e-10, atol=1e-14)
    # the intercept is the Sen line at the first year, as pymannkendall's at position 0
    np.testing.assert_allclose([scalar(ds, "slope"), scalar(ds, "intercept")],
                               [sen.slope, sen.intercept], rtol=1e-10, atol=1e-12)


@pytest.mark.reference
@pytest.mark.parametrize("name", sorted(set(CASES) - {"gap"}))
@pytest.mark.parametrize("lag", [None, 3])
def test_hamed_rao_matches_pymannkendall(name, lag):
    # pymannkendall.hamed_rao_modification_test (PyPI pymannkendall), after Hamed & Rao (1998) "A modified
    # Mann-Kendall trend test for autocorrelated data", J. Hydrology 204
    pymk = pytest.importorskip("pymannkendall")
    x = CASES[name]
    ref = quiet(pymk.hamed_rao_modification_test, x, alpha=0.05, lag=lag)
    ds = T.mann_kendall(annual(x), autocorrelation="hamed_rao", lag=lag)
    got = [scalar(ds, k) for k in ("s", "var_s_corrected", "z", "p", "tau", "slope", "intercept")]
    want = [ref.s, ref.var_s, ref.z, ref.p, ref.Tau, ref.slope, ref.intercept]
    np.testing.assert_allclose(got, want, rtol=1e-10, atol=1e-12, equal_nan=True)


@pytest.mark.reference
def test_hamed_rao_corrects_the_autocorrelated_series():
    # the strongly autocorrelated AR(1) series: the correction is active (n/n* != 1), as pymannkendall's
    pymk = pytest.importorskip("pymannkendall")
    x = CASES["ar1_strong"]
    ref = quiet(pymk.hamed_rao_modification_test, x)
    ds = T.mann_kendall(annual(x))
    assert scalar(ds, "var_s_corrected") != pytest.approx(scalar(ds, "var_s"))
    assert scalar(ds, "var_s_corrected") == pytest.approx(ref.var_s, rel=1e-10)


@pytest.mark.reference
def test_gap_year_statistics_that_do_not_depend_on_the_detrending_match_pymannkendall():
    # with a gap, S, tau, slope and intercept of pymannkendall.hamed_rao_modification_test still apply
    pymk = pytest.importorskip("pymannkendall")
    x = CASES["gap"]
    ref = quiet(pymk.hamed_rao_modification_test, x)
    ds = T.mann_kendall(annual(x))
    np.testing.assert_allclose([scalar(ds, k) for k in ("s", "tau", "slope", "intercept")],
                               [ref.s, ref.Tau, ref.slope, ref.intercept], rtol=1e-10)


# -- reference: scipy.stats ---------------------------------------------------------------------------------
@pytest.mark.reference
@pytest.mark.parametrize("name", sorted(CASES))
@pytest.mark.parametrize("alpha", [0.05, 0.1])
def test_slope_interval_matches_scipy_theilslopes(name, alpha):
    # scipy.stats.theilslopes (PyPI scipy), Sen (1968) eq. 2.6 interval; x = years since the first year
    from scipy.stats import theilslopes

    x = CASES[name]
    years = np.arange(x.size, dtype=float)
    ok = np.isfinite(x)
    ref = theilslopes(x[ok], years[ok], alpha=1 - alpha)
    ds = T.mann_kendall(annual(x), alpha=alpha)
    np.testing.assert_allclose([scalar(ds, k) for k in ("slope", "slope_lo", "slope_hi", "intercept")],
                               [ref.slope, ref.low_slope, ref.high_slope, ref.intercept],
                               rtol=1e-10, atol=1e-12)


@pytest.mark.reference
def test_tau_matches_scipy_kendalltau_without_ties():
    # scipy.stats.kendalltau (PyPI scipy): without ties tau-b equals the Mann-Kendall tau
    from scipy.stats import kendalltau

    x = CASES["long"]
    assert np.unique(x).size == x.size
    ds = T.mann_kendall(annual(x))
    assert scalar(ds, "tau") == pytest.approx(kendalltau(np.arange(x.size), x).statistic, rel=1e-12)


@pytest.mark.reference
@pytest.mark.parametrize("method", ["bh", "by"])
@pytest.mark.parametrize("chunked", [False, True])
def test_false_discovery_matches_scipy(method, chunked):
    # scipy.stats.false_discovery_control (PyPI scipy): Benjamini & Hochberg (1995), Benjamini & Yekutieli
    # (2001); the map's NaNs are no tests
    from scipy.stats import false_discovery_control

    rng = np.random.default_rng(5)
    p = rng.uniform(size=(30, 40)) ** 3
    p[rng.uniform(size=p.shape) < 0.2] = np.nan
    pa = xr.DataArray(p, dims=("y", "x"), name="p")
    if chunked:
        pa = pa.chunk({"y": 10, "x": 15})
    q = T.false_discovery(pa, method=method)
    assert (q.chunks is not None) == chunked
    q = q.values
    ok = np.isfinite(p)
    np.testing.assert_allclose(q[ok], false_discovery_control(p[ok], method=method), rtol=1e-12)
    assert np.isnan(q[~ok]).all()


# -- behaviour ----------------------------------------------------------------------------------------------
def planted_stack(slope=0.3, n_years=25, shape=(12, 14), seed=0) -> xr.DataArray:
    rng = np.random.default_rng(seed)
    t = np.arange(n_years)
    values = slope * t[:, None, None] + rng.normal(scale=1.0, size=(n_years, *shape))
    values[rng.uniform(size=values.shape) < 0.1] = np.nan
    return xr.DataArray(values, dims=("year", "y", "x"),
                        coords={"year": YEARS0 + t, "y": np.arange(shape[0]) * -10.0,
                                "x": np.arange(shape[1]) * 10.0}, attrs={"units": "m"})


def test_planted_slope_is_recovered_within_its_interval():
    stack = planted_stack(slope=0.3)
    ds = T.mann_kendall(stack)
    inside = (ds["slope_lo"] <= 0.3) & (0.3 <= ds["slope_hi"])
    assert float(inside.mean()) >= 0.9  # a 95 % interval covers the planted slope at most pixels
    assert float(ds["slope"].median()) == pytest.approx(0.3, abs=0.03)
    # Hamed-Rao's n/n* can turn negative on a short strongly trending series: p is then undefined (NaN, as
    # in pymannkendall); everywhere else the planted trend is significant
    defined = ds["var_s_corrected"] > 0
    assert (ds["p"].where(defined) < 0.05).sum() == defined.sum() >= 0.9 * defined.size
    assert ds["p"].where(~defined).isnull().all()
    assert ds["slope"].dims == ("y", "x")
    np.testing.assert_array_equal(ds["x"], stack["x"])


def test_dask_result_equals_numpy_and_stays_lazy():
    stack = planted_stack(slope=0.1)
    eager = T.mann_kendall(stack)

    def forbid(*args, **kwargs):
        raise AssertionError("computed before .compute()")

    chunked = stack.chunk({"year": 5, "y": 5, "x": 7})  # the year axis split on purpose
    with dask.config.set(scheduler=forbid):
        lazy = T.mann_kendall(chunked)
    assert all(v.chunks is not None for v in lazy.data_vars.values())
    assert lazy["slope"].chunks == ((5, 5, 2), (7, 7))
    xr.testing.assert_allclose(lazy.compute(), eager, rtol=1e-12)


def test_too_short_series_give_nan_not_an_error():
    stack = planted_stack(n_years=8, shape=(2, 2))
    values = stack.values.copy()
    values[:, 0, 0] = np.nan
    values[3:, 0, 1] = np.nan  # three valid years
    ds = T.mann_kendall(stack.copy(data=values))
    assert int(ds["n"][0, 0]) == 0 and int(ds["n"][0, 1]) == 3
    for name in ("s", "z", "p", "tau", "slope", "slope_lo", "slope_hi", "intercept"):
        assert np.isnan(ds[name].values[0, :2]).all(), name
        assert np.isfinite(ds[name].values[1]).all(), name


def test_too_few_years_overall_raise_with_the_minimum():
    with pytest.raises(MonitoringDesignError, match="at least 4 years"):
        T.mann_kendall(annual([1.0, 2.0, 3.0]))


def test_gap_years_use_the_coordinate():
    # a perfectly linear series with a missing year keeps its slope per year
    years = np.array([2001, 2002, 2004, 2005, 2008, 2009])
    s = xr.DataArray(2.0 * years - 4000.0, dims="year", coords={"year": years})
    ds = T.mann_kendall(s)
    assert scalar(ds, "slope") == pytest.approx(2.0)
    assert scalar(ds, "intercept") == pytest.approx(2.0)  # the line at the first year, 2001
    assert ds.attrs["time_origin"] == 2001


def test_unsorted_years_give_the_sorted_result():
    s = annual(CASES["ar1"])
    shuffled = s.isel(year=np.random.default_rng(0).permutation(s.sizes["year"]))
    xr.testing.assert_allclose(T.mann_kendall(shuffled), T.mann_kendall(s))


def test_attrs_and_units():
    ds = T.mann_kendall(annual(CASES["long"], units="ha"))
    assert ds["slope"].attrs["units"] == "ha/yr"
    assert ds["slope_lo"].attrs["units"] == "ha/yr"
    assert ds["intercept"].attrs["units"] == "ha"
    assert ds["p"].attrs["units"] == "1"
    for name, var in ds.data_vars.items():
        assert {"long_name", "units", "method", "reference", "parameters"} <= set(var.attrs), name
    assert "Hamed" in ds["var_s_corrected"].attrs["reference"]
    assert '"autocorrelation": "hamed_rao"' in ds["z"].attrs["parameters"]


def test_no_autocorrelation_correction_keeps_the_variance():
    ds = T.mann_kendall(annual(CASES["ar1_strong"]), autocorrelation="none")
    assert scalar(ds, "var_s_corrected") == scalar(ds, "var_s")


@pytest.mark.parametrize("kwargs, match", [({"alpha": 1.5}, "alpha"),
                                           ({"autocorrelation": "pw"}, "hamed_rao"), ({"lag": 0}, "lag"),
                                           ({"min_count": 2}, "min_count"),
                                           ({"dim": "time"}, "no dimension 'time'")])
def test_bad_options_raise_clear_errors(kwargs, match):
    with pytest.raises(MonitoringDesignError, match=match):
        T.mann_kendall(annual(CASES["long"]), **kwargs)


def test_repeated_years_raise():
    s = xr.DataArray(np.arange(6.0), dims="year", coords={"year": [2001, 2002, 2002, 2003, 2004, 2005]})
    with pytest.raises(MonitoringDesignError, match="repeats"):
        T.mann_kendall(s)


def test_false_discovery_rejects_values_outside_unit_interval():
    with pytest.raises(DataQualityError, match=r"\[0, 1\]"):
        T.false_discovery(xr.DataArray([0.1, 1.2]))


# -- annual values ------------------------------------------------------------------------------------------
def dated(chunk: bool = False) -> xr.DataArray:
    times = pd.to_datetime(["2020-02-10", "2020-05-01", "2020-06-15", "2020-09-30", "2020-11-01",
                            "2021-05-20", "2021-07-01",
                            "2022-01-05", "2022-06-01", "2022-08-01", "2022-09-01"])
    rng = np.random.default_rng(3)
    values = rng.uniform(size=(times.size, 3, 4))
    values[2, 0, 0] = np.nan
    da = xr.DataArray(values, dims=("time", "y", "x"), coords={"time": times}, name="water",
                      attrs={"units": "1"})
    return da.chunk({"time": 4, "y": 2}) if chunk else da


@pytest.mark.parametrize("how", ["median", "mean", "max", "min"])
def test_annual_values_per_year_in_the_season(how):
    da = dated()
    out = T.annual_values(da, how=how, season=("05-01", "09-30"))
    assert out.dims == ("year", "y", "x")
    assert out["year"].values.tolist() == [2020, 2021, 2022]
    assert out["n_dates"].values.tolist() == [3, 2, 3]
    reducer = {"median": np.nanmedian, "mean": np.nanmean, "max": np.nanmax, "min": np.nanmin}[how]
    expected_2020 = reducer(da.values[[1, 2, 3]], axis=0)  # 05-01, 06-15 and 09-30: the bounds are inclusive
    np.testing.assert_allclose(out.sel(year=2020).values, expected_2020)
    assert '"how": "' + how in out.attrs["parameters"]


def test_annual_values_lazy_and_equal_to_eager():
    eager = T.annual_values(dated())
    lazy = T.annual_values(dated(chunk=True))
    assert lazy.chunks is not None
    xr.testing.assert_allclose(lazy.compute(), eager)
    assert eager["n_dates"].values.tolist() == [5, 2, 4]


def test_annual_values_feed_the_trend_test():
    ds = T.mann_kendall(T.annual_values(dated()), min_count=3)
    assert ds["slope"].shape == (3, 4)


@pytest.mark.parametrize("season, match", [(("10-01", "03-31"), "wraps"), (("12-01", "12-31"), "no date")])
def test_annual_values_season_errors(season, match):
    with pytest.raises(MonitoringDesignError, match=match):
        T.annual_values(dated(), season=season)


# -- polygons -----------------------------------------------------------------------------------------------
def polygon_table() -> pd.DataFrame:
    rng = np.random.default_rng(9)
    rows = []
    for pid, slope in [("a", 1.0), ("b", 0.0), ("c", -0.5)]:
        for year in range(2001, 2021):
            if pid == "c" and year in (2001, 2010):
                continue  # a late start and a gap
            rows.append({"pid": pid, "year": year, "area": slope * (year - 2001) + rng.normal(),
                         "wet_days": rng.integers(0, 5) + 0.2 * slope * (year - 2001)})
    return pd.DataFrame(rows)


def test_polygon_trends_equal_the_per_series_test():
    table = polygon_table()
    out = T.polygon_trends(table, id_col="pid", value_cols=["area", "wet_days"])
    assert list(out.columns) == ["pid", "metric", "n", "s", "z", "p", "q", "tau", "slope", "slope_lo",
                                 "slope_hi", "intercept", "first_year", "last_year"]
    assert len(out) == 6
    full_years = np.arange(2001, 2021)
    for _, row in out.iterrows():
        part = table[table["pid"] == row["pid"]].set_index("year")[row["metric"]].reindex(full_years)
        ds = T.mann_kendall(xr.DataArray(part.to_numpy(), dims="year", coords={"year": full_years}))
        for name in ("n", "s", "z", "p", "tau", "slope", "slope_lo", "slope_hi", "intercept"):
            assert row[name] == pytest.approx(scalar(ds, name), rel=1e-12), name
    c = out[(out["pid"] == "c") & (out["metric"] == "area")].iloc[0]
    assert (c["first_year"], c["last_year"], c["n"]) == (2002, 2020, 18)
    assert out.attrs["time_origin"] == 2001
    assert out.attrs["columns"]["slope"]["units"] == "1/yr"


@pytest.mark.reference
def test_polygon_q_values_are_bh_across_rows():
    # scipy.stats.false_discovery_control (PyPI scipy), Benjamini & Hochberg (1995)
    from scipy.stats import false_discovery_control

    out = T.polygon_trends(polygon_table(), id_col="pid", value_cols=["area", "wet_days"])
    np.testing.assert_allclose(out["q"], false_discovery_control(out["p"]), rtol=1e-12)


def test_polygon_duplicates_and_missing_columns_raise():
    table = polygon_table()
    with pytest.raises(DataQualityError, match="repeat"):
        T.polygon_trends(pd.concat([table, table.iloc[:1]]), id_col="pid", value_cols=["area"])
    with pytest.raises(MonitoringDesignError, match="lacks the columns"):
        T.polygon_trends(table, id_col="pid", value_cols=["depth"])


# -- figures ------------------------------------------------------------------------------------------------
def test_trend_series_figure_from_dataset_and_row():
    from matplotlib.figure import Figure

    s = annual(CASES["ar1"], units="ha")
    fig = T.trend_series_figure(s, T.mann_kendall(s), title="polygon a")
    assert isinstance(fig, Figure)
    ax = fig.axes[0]
    assert ax.get_title() == "polygon a" and len(ax.lines) == 2 and len(ax.collections) == 1
    row = T.polygon_trends(polygon_table(), id_col="pid", value_cols=["area"]).iloc[0]
    table = polygon_table()
    part = table[table["pid"] == row["pid"]].set_index("year")["area"]
    assert isinstance(T.trend_series_figure(part, row), Figure)


def test_trend_map_figure_greys_non_significant_pixels():
    from matplotlib.figure import Figure

    stack = planted_stack(slope=0.3)
    values = stack.values.copy()
    values[:, :4] = np.random.default_rng(1).normal(size=values[:, :4].shape)  # no trend in the top rows
    ds = T.mann_kendall(stack.copy(data=values))
    fig = T.trend_map_figure(ds, q_max=0.05)
    assert isinstance(fig, Figure)
    grey, colour = fig.axes[0].images
    shown = np.isfinite(np.asarray(colour.get_array(), float))
    greyed = np.isfinite(np.asarray(grey.get_array(), float))
    significant = (T.false_discovery(ds["p"]) <= 0.05).values
    np.testing.assert_array_equal(shown, significant)
    np.testing.assert_array_equal(greyed, np.isfinite(ds["slope"].values) & ~significant)
    assert greyed[:4].mean() > 0.8 and shown[4:].mean() > 0.9
    assert "m/yr" in fig.axes[1].get_ylabel()
