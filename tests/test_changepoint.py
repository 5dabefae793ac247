"""Pettitt's change-point test: the paper's statistic, a reference library, planted steps, pixels, dask."""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

from wetlandflow.errors import ParameterError
from wetlandflow.monitoring.changepoint import pettitt


def _by_definition(x: np.ndarray) -> tuple[float, int, float]:
    """Pettitt (1979), Applied Statistics 28(2): U_t = sum_{i<=t} sum_{j>t} sign(x_i - x_j),
    K = max |U_t| (first t), p = 2 exp(-6 K^2 / (n^3 + n^2)); returns K, 0-based last index before, p."""
    n = x.size
    u = np.array([np.sign(x[: t + 1, None] - x[None, t + 1:]).sum() for t in range(n - 1)])
    t = int(np.argmax(np.abs(u)))
    k = float(np.abs(u)[t])
    return k, t, min(1.0, 2 * np.exp(-6 * k ** 2 / (n ** 3 + n ** 2)))


def _series(values, start=2000, dim="year"):
    years = np.arange(start, start + len(values))
    return xr.DataArray(np.asarray(values, float), dims=dim, coords={dim: years})


@pytest.mark.reference
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_matches_paper_definition_on_small_series(seed):
    """Reference: the double-sum definition of U_t and the p approximation in Pettitt (1979), computed
    directly on a short series with ties."""
    x = np.round(np.random.default_rng(seed).normal(size=15), 1)
    k, t, p = _by_definition(x)
    res = pettitt(_series(x))
    assert float(res["k"]) == k
    assert int(res["change_index"]) == t
    assert float(res["p"]) == pytest.approx(p, rel=1e-12)
    assert int(res["change_coord"]) == 2000 + t


@pytest.mark.reference
@pytest.mark.parametrize("seed", [3, 4])
def test_matches_pyhomogeneity(seed):
    """Reference: pyhomogeneity.pettitt_test (PyPI), asymptotic p (sim=None); its cp is the 1-based
    position of the last observation before the change."""
    hg = pytest.importorskip("pyhomogeneity")
    x = np.random.default_rng(seed).normal(size=30)
    x[18:] += 1.2
    ref = hg.pettitt_test(x, sim=None)
    res = pettitt(_series(x))
    assert float(res["k"]) == pytest.approx(float(ref.U))
    assert int(res["change_index"]) + 1 == int(ref.cp)
    assert float(res["p"]) == pytest.approx(min(1.0, float(ref.p)))


def test_planted_step_found_at_the_right_year_with_its_shift():
    rng = np.random.default_rng(5)
    x = 0.6 + 0.02 * rng.normal(size=24)
    x[14:] -= 0.3  # new level from 2014: last year before the change is 2013
    res = pettitt(_series(x))
    assert int(res["change_coord"]) == 2013
    assert float(res["p"]) < 0.01
    assert float(res["shift"]) == pytest.approx(-0.3, abs=0.05)


def test_nan_dropped_and_index_refers_to_the_original_axis():
    x = np.r_[np.zeros(6), np.ones(6)]
    with_gaps = np.r_[x[:3], np.nan, x[3:], np.nan]
    res = pettitt(_series(with_gaps))
    assert int(res["n"]) == 12
    assert int(res["change_index"]) == 6  # the sixth zero sits at position 6 after the inserted NaN
    assert float(res["k"]) == pettitt(_series(x))["k"].item()


def test_too_short_gives_nan():
    res = pettitt(_series([1.0, np.nan, np.nan]))
    assert np.isnan(float(res["k"])) and np.isnan(float(res["change_coord"]))


def test_datetime_coordinate_gives_the_date():
    x = xr.DataArray(np.r_[np.zeros(5), np.ones(5)], dims="time",
                     coords={"time": np.arange("2001-01", "2011-01", 12, dtype="datetime64[M]")[:10]
                             .astype("datetime64[ns]")})
    res = pettitt(x, dim="time")
    assert res["change_coord"].values == x["time"].values[4]


def _stack(seed=6):
    rng = np.random.default_rng(seed)
    data = rng.normal(scale=0.2, size=(20, 4, 5))
    data[10:, :2] -= 2.0  # step in the top rows only, mid-series (Pettitt favours balanced splits)
    data[3, 0, 0] = np.nan
    return xr.DataArray(data, dims=("year", "y", "x"), coords={"year": np.arange(1990, 2010)})


def test_per_pixel_equals_one_series_at_a_time_and_dask_stays_lazy():
    stack = _stack()
    lazy = pettitt(stack.chunk({"y": 2, "x": 3}))
    assert lazy["k"].chunks is not None  # nothing computed yet
    eager = pettitt(stack)
    xr.testing.assert_allclose(lazy.compute(), eager)
    one = pettitt(stack.isel(y=0, x=0))
    assert float(eager["k"][0, 0]) == float(one["k"])
    assert (eager["change_coord"][:2] == 1999).all()
    assert eager["p"].attrs["reference"].startswith("Pettitt")


def test_time_split_over_chunks_is_refused_with_the_fix():
    with pytest.raises(ParameterError, match=r"chunk\(\{'year': -1\}\)"):
        pettitt(_stack().chunk({"year": 5}))


def test_unknown_dim_is_refused():
    with pytest.raises(ParameterError, match="not a dimension"):
        pettitt(_series([1.0, 2.0, 3.0]), dim="time")
