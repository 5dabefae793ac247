"""Tests for wetlandflow.monitoring.water_series, water_threshold, water_area, water_store, water_figures.

Outside references: scikit-image's ``filters.threshold_otsu`` (Otsu 1979) for the pooled threshold;
scikit-learn's ``mixture.GaussianMixture`` for the per-tile two-Gaussian fits; the definition of Ashman's D,
``D = |mu1 - mu2| / sqrt((s1**2 + s2**2) / 2)`` (Ashman, Bird & Zepf 1994, "Detecting bimodality in
astronomical datasets", AJ 108, 2348-2361, as quoted by the "Multimodal distribution" encyclopedia article
and the R package ``modes`` documentation of ``Ashmans_D``, which also quote the rule of thumb D > 2);
shapely / geopandas polygon areas for the water area per polygon.  Everything else is behaviour on
synthetic scenes with a planted water extent.
"""

from __future__ import annotations

import datetime as dt
import warnings

import dask.array as dsa
import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import xarray as xr
from shapely.geometry import box

from wetlandflow.errors import DataQualityError, GridMismatchError, ParameterError, PlausibilityWarning
from wetlandflow.features.water import ashman_d, otsu_threshold
from wetlandflow.inputs.io import sha256_file
from wetlandflow.monitoring import water_store as WS
from wetlandflow.monitoring.water_area import water_area_series
from wetlandflow.monitoring.water_figures import water_area_figure, water_frequency_figure
from wetlandflow.monitoring.water_series import hydroperiod_days, optical_water, sar_water, water_frequency
from wetlandflow.monitoring.water_threshold import _fit_mixtures, _tile_histograms, split_threshold

N = 256
WATER = (slice(10, 46), slice(10, 46))  # 36 x 36 = 1296 pixels, 2 % of the 256 x 256 scene


def _scene(seed: int = 0, water: bool = True) -> np.ndarray:
    """dB scene: two land types (left -6 dB, right -12 dB) and, if ``water``, a 2 % water square at -22 dB."""
    rng = np.random.default_rng(seed)
    img = np.where(np.arange(N)[None, :] < N // 2, rng.normal(-6, 1.5, (N, N)), rng.normal(-12, 1.5, (N, N)))
    if water:
        img[WATER] = rng.normal(-22, 1.0, (36, 36))
    return img


def _stack(scenes: list[np.ndarray], start: str = "2024-04-01") -> xr.DataArray:
    lin = 10 ** (np.stack(scenes)[:, None] / 10)
    return xr.DataArray(
        lin,
        dims=("time", "pol", "y", "x"),
        coords={
            "time": pd.date_range(start, periods=len(scenes), freq="12D"),
            "pol": ["VV"],
            "y": np.arange(N) * -10.0,
            "x": np.arange(N) * 10.0,
        },
    )


# -- split threshold -----------------------------------------------------------------------------------------
def test_split_threshold_finds_water_where_scene_otsu_fails():
    img = _scene()
    truth = np.zeros((N, N), bool)
    truth[WATER] = True
    scene_t = otsu_threshold(img)
    assert (img <= scene_t).mean() > 0.2  # the scene's Otsu cuts between the land types: 2 % water planted
    t = split_threshold(xr.DataArray(img, dims=("y", "x")))
    assert -19 < t < -15
    assert ((img <= t) == truth).mean() > 0.999


@pytest.mark.reference
def test_split_threshold_is_otsu_of_the_kept_tile():
    """Reference: skimage.filters.threshold_otsu (scikit-image; Otsu 1979, IEEE SMC-9(1), 62-66).

    Only the top-left tile holds two modes (water and land), so the pooled values are that tile's.
    """
    skf = pytest.importorskip("skimage.filters")
    img = _scene(seed=1)
    assert split_threshold(img) == pytest.approx(skf.threshold_otsu(img[:64, :64], nbins=256), abs=1e-12)
    water = sar_water(_stack([img]))
    assert int(water["tiles_kept"][0]) == 1 and water["threshold_method"].values[0] == "split"


@pytest.mark.reference
def test_ashman_d_matches_its_definition():
    """Reference: Ashman, Bird & Zepf (1994), D = |mu1 - mu2| / sqrt((s1^2 + s2^2) / 2) (checked in two
    secondary sources with the search tool, see the module docstring)."""
    for mu1, mu2, s1, s2 in [(0, 15, 1, 3), (-20, -8, 1, 1.5), (4, 5, 1, 1)]:
        assert ashman_d(mu1, mu2, s1, s2) == pytest.approx(abs(mu1 - mu2) / np.sqrt((s1**2 + s2**2) / 2))


@pytest.mark.reference
def test_tile_mixture_fit_matches_sklearn_gaussian_mixture():
    """Reference: sklearn.mixture.GaussianMixture (scikit-learn) on the same tile values."""
    from sklearn.mixture import GaussianMixture

    rng = np.random.default_rng(4)
    tile = np.concatenate([rng.normal(-20, 1.0, 1200), rng.normal(-8, 1.5, 2896)])
    hist, centres = _tile_histograms(tile[None, :], 256)
    mu, sd, w = _fit_mixtures(hist, centres)
    gm = GaussianMixture(2, random_state=0).fit(tile[:, None])
    order = np.argsort(gm.means_.ravel())
    np.testing.assert_allclose(mu[0], gm.means_.ravel()[order], atol=0.02)
    np.testing.assert_allclose(sd[0], np.sqrt(gm.covariances_.ravel()[order]), rtol=0.02)
    np.testing.assert_allclose(w[0], gm.weights_[order], atol=0.01)


def test_unimodal_tiles_are_not_kept_and_fallback_warns():
    rng = np.random.default_rng(2)
    tiles = rng.normal(-8, 1.5, (6, 4096))
    hist, centres = _tile_histograms(tiles, 256)
    mu, sd, w = _fit_mixtures(hist, centres)
    d = [ashman_d(*m, *s) for m, s in zip(mu, sd, strict=True)]
    assert max(d) < 2 or (w.min(1)[np.argmax(d)] < 0.1)
    with pytest.warns(PlausibilityWarning, match="none of the 16 tiles"):
        t = split_threshold(_scene(water=False))
    assert t == pytest.approx(otsu_threshold(_scene(water=False)))


def test_split_threshold_rejects_bad_input():
    with pytest.raises(DataQualityError, match=r"\(y, x\)"):
        split_threshold(np.full((3, 8, 8), np.nan))


# -- SAR and optical maps ------------------------------------------------------------------------------------
def test_sar_water_per_date_thresholds_fallback_and_no_data():
    scenes = [_scene(0), _scene(1, water=False)]
    scenes[0][100:110, 100:110] = np.nan  # no data
    with pytest.warns(PlausibilityWarning, match="date 2024-04-13"):
        water = sar_water(_stack(scenes))
    assert water.dims == ("time", "y", "x") and water.dtype == np.float32
    assert list(water["threshold_method"].values) == ["split", "scene_otsu_fallback"]
    assert water.attrs["fallback_dates"] == "2024-04-13"
    assert water.attrs["units"] == "1" and "Martinis" in water.attrs["reference"]
    assert np.isnan(water[0, 100:110, 100:110]).all()
    assert float(water[0][WATER].mean()) > 0.99
    assert water["threshold_db"].values[0] == pytest.approx(split_threshold(_scene(0)), abs=0.2)


def test_sar_water_is_lazy_and_equals_the_numpy_result():
    stack = _stack([_scene(0), _scene(3)])
    eager = sar_water(stack, threshold="otsu")
    lazy = sar_water(stack.chunk({"y": 64, "x": 64}), threshold="otsu")
    assert isinstance(lazy.data, dsa.Array)
    xr.testing.assert_identical(lazy.compute(), eager)
    fixed = sar_water(stack, threshold=-15.0)
    assert list(fixed["threshold_method"].values) == ["fixed", "fixed"]
    with pytest.raises(ParameterError, match="threshold must be one of"):
        sar_water(stack, threshold="kittler")


def test_sar_water_subsample_keeps_tiles_on_the_ground():
    water = sar_water(
        _stack([_scene(0)]), max_pixels=N * N // 4
    )  # every 2nd pixel: 32-px tiles on the sample
    assert water.attrs["parameters"].count('"subsample_step": 2') == 1
    assert float(water[0][WATER].mean()) > 0.99


def _mndwi() -> tuple[xr.DataArray, xr.DataArray]:
    rng = np.random.default_rng(5)
    m = rng.normal(-0.3, 0.05, (3, 64, 64))
    m[:, :, :16] = rng.normal(0.4, 0.05, (3, 64, 16))
    m[0, 60:, 60:] = np.nan
    valid = np.ones(m.shape, bool)
    valid[1, :20, :20] = False  # a cloud over water and land
    valid[2] = False  # a fully clouded date
    coords = {"time": pd.date_range("2024-05-01", periods=3, freq="5D")}
    return (
        xr.DataArray(m, dims=("time", "y", "x"), coords=coords),
        xr.DataArray(valid, dims=("time", "y", "x"), coords=coords),
    )


def test_optical_water_keeps_cloud_nans():
    mndwi, valid = _mndwi()
    water = optical_water(mndwi, valid=valid)
    assert np.isnan(water[1, :20, :20]).all() and np.isnan(water[0, 60:, 60:]).all()
    assert np.isnan(water[2]).all() and np.isnan(water["threshold"][2])
    assert -0.2 < float(water["threshold"][0]) < 0.3
    assert float(water[0, :, :16].mean()) == 1.0 and float(water[0, :60, 16:].mean()) < 1e-3
    assert float(water[1, 20:, :16].mean()) == 1.0
    fixed = optical_water(mndwi, threshold=0.0, valid=valid.isel(time=0))
    assert float(fixed["threshold"][1]) == 0.0 and not np.isnan(fixed[1, :20, :20]).any()


# -- frequency and hydroperiod -------------------------------------------------------------------------------
# 10 dates in 2023, 40 days apart: day offsets 0, 40, ..., 360 (2023 has 365 days).
OFFSETS = np.arange(10) * 40
DATES = np.datetime64("2023-01-01") + OFFSETS.astype("timedelta64[D]")
BLOCKS = {  # block name -> (water state per date, NaN = no data)
    "a": [0, 0, 0, 1, 1, 1, 0, 0, 0, 0],
    "always": [1] * 10,
    "never": [0] * 10,
    "cloudy_wet": [1, 1, np.nan, 1, 1, 1, 1, np.nan, 1, 1],
    "first": [1] + [0] * 9,
    "last": [0] * 9 + [1],
    "empty": [np.nan] * 10,
    "gap": [0, 0, 0, 1, np.nan, 1, 0, 0, 0, 0],
}


def _series(chunked: bool = False) -> xr.DataArray:
    data = np.zeros((10, 64, 64), np.float32)
    for i, states in enumerate(BLOCKS.values()):
        data[:, 8 * i : 8 * (i + 1)] = np.asarray(states, np.float32)[:, None, None]
    da = xr.DataArray(data, dims=("time", "y", "x"), coords={"time": DATES.astype("datetime64[ns]")})
    return da.chunk({"time": 5, "y": 32, "x": 32}) if chunked else da


def _block(layer: xr.DataArray, name: str) -> np.ndarray:
    i = list(BLOCKS).index(name)
    return np.asarray(layer[..., 8 * i : 8 * (i + 1), :])


def test_water_frequency_on_planted_series():
    freq = water_frequency(_series())
    assert freq.dims == ("period", "y", "x") and list(freq["period"].values) == ["2023"]
    assert int(freq["n_obs"][0]) == 10
    expected = {
        "a": 0.3,
        "always": 1.0,
        "never": 0.0,
        "cloudy_wet": 1.0,
        "first": 0.1,
        "last": 0.1,
        "gap": 2 / 9,
    }
    for name, value in expected.items():
        np.testing.assert_allclose(_block(freq, name), value, rtol=1e-6)
    assert np.isnan(_block(freq, "empty")).all()
    monthly = water_frequency(_series(), period="month")
    assert monthly["n_obs"].sum() == 10 and monthly.sizes["period"] == 10


def test_water_frequency_seasons_and_all():
    spring = water_frequency(_series(), period="season", seasons={"spring": ("04-01", "06-10")})
    assert list(spring["period"].values) == ["2023 spring"] and int(spring["n_obs"][0]) == 2  # May 1, Jun 10
    np.testing.assert_allclose(_block(spring, "a"), 1.0)
    winter = water_frequency(_series(), period="season", seasons={"winter": ("12-01", "02-28")})
    assert list(winter["period"].values) == ["2022 winter", "2023 winter"]  # Jan 1 and Feb 10; Dec 27
    assert list(winter["n_obs"].values) == [2, 1]
    everything = water_frequency(_series(), period="all")
    xr.testing.assert_allclose(
        everything.isel(period=0, drop=True), water_frequency(_series()).isel(period=0, drop=True)
    )
    with pytest.raises(ParameterError, match="needs seasons"):
        water_frequency(_series(), period="season")
    with pytest.raises(ParameterError, match="period must be one of"):
        water_frequency(_series(), period="decade")


def test_hydroperiod_days_on_planted_series():
    days = hydroperiod_days(_series())
    assert days.attrs["units"] == "d" and float(days["period_days"][0]) == 365
    # each date covers from halfway to the previous date to halfway to the next (40-day steps: 40 days),
    # the first date from the year's start (0 to 20), the last to its end (340 to 365)
    expected = {
        "a": 3 * 40,
        "always": 365,
        "never": 0,
        "cloudy_wet": 365,
        "first": 20,
        "last": 365 - 340,
        "gap": (160 - 100) + (220 - 160),
    }  # dates at 120 and 200, the one at 160 is missing
    for name, value in expected.items():
        np.testing.assert_allclose(_block(days, name), value, rtol=1e-6)
    assert np.isnan(_block(days, "empty")).all()
    spring = hydroperiod_days(_series(), period="season", seasons={"spring": ("04-01", "06-10")})
    np.testing.assert_allclose(_block(spring, "a"), 71)  # April 1 to June 10 inclusive


def test_frequency_and_hydroperiod_stay_lazy_and_agree_with_numpy():
    lazy_days = hydroperiod_days(_series(chunked=True))
    lazy_freq = water_frequency(_series(chunked=True))
    assert isinstance(lazy_days.data, dsa.Array) and isinstance(lazy_freq.data, dsa.Array)
    xr.testing.assert_allclose(lazy_days.compute(), hydroperiod_days(_series()))
    xr.testing.assert_allclose(lazy_freq.compute(), water_frequency(_series()))
    with pytest.raises(DataQualityError, match="dims"):
        water_frequency(_series().transpose("y", "time", "x"))


# -- water area per polygon ----------------------------------------------------------------------------------
def _area_fixture() -> tuple[xr.DataArray, gpd.GeoDataFrame, list, object]:
    """40 x 40 pixels of 10 m; water rectangles on pixel edges; a cloud on date 3."""
    x = np.arange(40) * 10.0 + 5
    y = 400 - 5 - np.arange(40) * 10.0
    polys = gpd.GeoDataFrame(
        {"site": ["p1", "p2"]}, geometry=[box(0, 0, 200, 400), box(200, 0, 400, 200)], crs="EPSG:32633"
    )
    lakes = [box(50, 100, 150, 300), box(250, 50, 350, 150)]
    cloud = box(0, 300, 200, 400)
    xx, yy = np.meshgrid(x, y)

    def inside(g):
        x0, y0, x1, y1 = g.bounds
        return (xx > x0) & (xx < x1) & (yy > y0) & (yy < y1)

    data = np.zeros((3, 40, 40), np.float32)
    data[:, inside(lakes[0])] = 1
    data[1:, inside(lakes[1])] = 1
    data[2, inside(cloud)] = np.nan
    water = xr.DataArray(
        data,
        dims=("time", "y", "x"),
        coords={"time": pd.date_range("2024-06-01", periods=3, freq="10D"), "y": y, "x": x},
    )
    return water, polys, lakes, cloud


@pytest.mark.reference
def test_water_area_series_matches_polygon_areas():
    """Reference: shapely intersection areas (via geopandas) of the planted water rectangles and polygons."""
    water, polys, lakes, cloud = _area_fixture()
    table = water_area_series(water, polys, id_field="site")
    assert list(table.columns) == [
        "polygon",
        "date",
        "water_ha",
        "observed_ha",
        "observed_share",
        "water_share",
    ]
    assert len(table) == 6
    for t in range(3):
        for _, poly in polys.iterrows():
            row = table[(table["polygon"] == poly["site"]) & (table["date"] == water["time"].values[t])].iloc[
                0
            ]
            wet = sum(poly.geometry.intersection(lake).area for lake in (lakes if t else lakes[:1]))
            seen = poly.geometry.area - (poly.geometry.intersection(cloud).area if t == 2 else 0)
            assert row["water_ha"] == pytest.approx(wet / 1e4)
            assert row["observed_ha"] == pytest.approx(seen / 1e4)
            assert row["observed_share"] == pytest.approx(seen / poly.geometry.area)
            assert row["water_share"] == pytest.approx(wet / seen)
    assert table.attrs["units"] == "ha" and table.attrs["polygon_ha"]["p1"] == pytest.approx(8.0)


def test_water_area_series_rejects_overlaps_and_missing_ids():
    water, polys, _, _ = _area_fixture()
    overlapping = gpd.GeoDataFrame(
        {"site": ["a", "b"]}, geometry=[box(0, 0, 200, 200), box(100, 0, 300, 200)]
    )
    with pytest.raises(DataQualityError, match="overlap"):
        water_area_series(water, overlapping, id_field="site")
    with pytest.raises(DataQualityError, match="id_field 'name'"):
        water_area_series(water, polys, id_field="name")
    with pytest.raises(GridMismatchError, match="regularly spaced"):
        water_area_series(water.isel(x=[0, 1, 5]), polys, id_field="site")


# -- the store -----------------------------------------------------------------------------------------------
class Spy:
    """Counts load() calls per date."""

    def __init__(self):
        self.calls: list[dt.date] = []

    def items(self, n: int, keys: dict[int, str] | None = None) -> list[WS.DatedInput]:
        return [
            WS.DatedInput(self.day(i), (keys or {}).get(i, f"scene-{i}"), self.loader(i, (keys or {}).get(i)))
            for i in range(n)
        ]

    @staticmethod
    def day(i: int) -> dt.date:
        return dt.date(2024, 1, 1) + dt.timedelta(days=12 * i)

    def loader(self, i: int, variant: str | None = None):
        def load() -> xr.DataArray:
            self.calls.append(self.day(i))
            data = np.zeros((64, 64), np.float32)
            data[: i + 1 + (10 if variant else 0)] = 1  # water rows grow with the date: every date differs
            data[-1, -1] = np.nan
            return xr.DataArray(
                data,
                dims=("y", "x"),
                coords={"y": np.arange(64) * -10.0, "x": np.arange(64) * 10.0},
                attrs={"units": "1"},
            )

        return load


def _folder_hashes(store: WS.WaterSeriesStore) -> dict[str, str]:
    return {p.name: sha256_file(p) for p in sorted((store.path / "dates").iterdir())}


def test_store_appends_one_date_without_recomputing(tmp_path):
    spy, store = Spy(), WS.WaterSeriesStore(tmp_path / "water")
    report = store.update(spy.items(10))
    assert len(report.computed) == 10 and len(spy.calls) == 10
    before = _folder_hashes(store)
    spy.calls.clear()
    report = store.update(spy.items(11))
    assert spy.calls == [spy.day(10)]
    assert report.computed == (spy.day(10),) and len(report.kept) == 10 and report.removed == ()
    after = _folder_hashes(store)
    assert {k: after[k] for k in before} == before and len(after) == 11
    series = store.open()
    assert series.dims == ("time", "y", "x") and series.sizes["time"] == 11
    assert isinstance(series.data, dsa.Array)
    np.testing.assert_array_equal(series.isel(time=10).values, spy.loader(10)().values)
    assert series["time"].values[10] == np.datetime64(spy.day(10), "ns")


def test_store_recomputes_a_changed_key_and_removes_a_dropped_date(tmp_path):
    spy, store = Spy(), WS.WaterSeriesStore(tmp_path / "water")
    store.update(spy.items(10))
    before = _folder_hashes(store)
    spy.calls.clear()
    report = store.update(spy.items(10, keys={4: "scene-4-reprocessed"}))
    assert spy.calls == [spy.day(4)] and report.computed == (spy.day(4),)
    after = _folder_hashes(store)
    changed = set(before) ^ set(after)
    assert len(changed) == 2 and all(n.startswith(spy.day(4).isoformat()) for n in changed)
    assert all(after[k] == v for k, v in before.items() if k in after)
    np.testing.assert_array_equal(store.open().isel(time=4).values, spy.loader(4, "x")().values)
    spy.calls.clear()
    items = [it for it in spy.items(10, keys={4: "scene-4-reprocessed"}) if it.date != spy.day(2)]
    report = store.update(items)
    assert report.removed == (spy.day(2),) and spy.calls == [] and len(report.kept) == 9
    assert spy.day(2) not in store.dates() and len(list((store.path / "dates").iterdir())) == 9
    assert np.datetime64(spy.day(2), "ns") not in store.open()["time"].values


def test_store_survives_a_crash_mid_write(tmp_path, monkeypatch):
    spy, store = Spy(), WS.WaterSeriesStore(tmp_path / "water", chunk=16)
    store.update(spy.items(3))
    index, hashes = store.index(), _folder_hashes(store)

    def failing_load():  # the map's last chunk fails while it is written: part of the date is on disk
        good = spy.loader(3)()

        def boom(block, block_info=None):
            if block_info[None]["chunk-location"] == (3, 3):
                raise OSError("disk went away")
            return block

        return good.copy(data=dsa.from_array(good.values, chunks=16).map_blocks(boom, dtype=np.float32))

    with pytest.raises(OSError, match="disk went away"):
        store.update(spy.items(3) + [WS.DatedInput(spy.day(3), "scene-3", failing_load)])
    assert store.index() == index and _folder_hashes(store) == hashes and store.open().sizes["time"] == 3

    # killed after the date's folder was complete but before the index named it: an orphan, not a date
    def no_index(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(WS, "write_json", no_index)
    with pytest.raises(KeyboardInterrupt):
        store.update(spy.items(4))
    monkeypatch.undo()
    assert (
        store.dates() == [spy.day(i) for i in range(3)] and len(list((store.path / "dates").iterdir())) == 4
    )
    (store.path / "dates" / ".left-by-a-kill.partial").mkdir()
    spy.calls.clear()
    report = store.update(spy.items(4))
    assert spy.calls == [spy.day(3)] and report.computed == (spy.day(3),)
    assert len(list((store.path / "dates").iterdir())) == 4 and store.open().sizes["time"] == 4


def test_store_rejects_other_grids_and_duplicate_dates(tmp_path):
    spy, store = Spy(), WS.WaterSeriesStore(tmp_path / "water")
    store.update(spy.items(2))
    shifted = lambda: spy.loader(2)().assign_coords(x=np.arange(64) * 10.0 + 5)  # noqa: E731
    with pytest.raises(GridMismatchError, match="start a new store"):
        store.update(spy.items(2) + [WS.DatedInput(spy.day(2), "k", shifted)])
    assert len(store.dates()) == 2
    with pytest.raises(ParameterError, match="given twice"):
        store.update(spy.items(2) + spy.items(1))
    with pytest.raises(DataQualityError, match="holds no date"):
        WS.WaterSeriesStore(tmp_path / "empty").open()


# -- figures -------------------------------------------------------------------------------------------------
def test_figures_draw_every_polygon_and_period():
    import matplotlib

    matplotlib.use("Agg")
    water, polys, _, _ = _area_fixture()
    table = water_area_series(water, polys, id_field="site")
    fig = water_area_figure(table)
    labels = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert sorted(labels) == ["p1", "p2"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        freq = water_frequency(_series(), period="month")
    fig = water_frequency_figure(freq)
    assert len([a for a in fig.axes if a.images]) == 10
    with pytest.raises(DataQualityError, match="lacks columns"):
        water_area_figure(table.drop(columns="water_ha"))
