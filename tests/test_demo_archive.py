"""Tests of the synthetic image archive (wetlandflow.demo.archive).

Behaviour tests: the files follow their contract, one seed gives the same bytes, and every planted truth
(lake trend, road impact against the control fen, harvest recovery, SAR flood pulse, clouds) can be read
back from the written rasters.  The archive is invented data, so nothing here is a reference check.
"""

from __future__ import annotations

import datetime as dt
import json
import re
from pathlib import Path

import geopandas as gpd
import numpy as np
import pytest
import rasterio
import tomli_w
import tomllib
from pyproj import CRS
from rasterio.features import geometry_mask

from wetlandflow.demo import archive as arc
from wetlandflow.errors import ParameterError
from wetlandflow.inputs.sensors import SENSORS

SIZE, SEED = 40, 0


@pytest.fixture(scope="module")
def made(tmp_path_factory) -> tuple[Path, dict]:
    out = tmp_path_factory.mktemp("archive")
    truth = arc.make_archive(out, size=SIZE, seed=SEED)
    return out / "archive", truth


@pytest.fixture(scope="module")
def sites(made) -> gpd.GeoDataFrame:
    return gpd.read_file(made[0] / "sites.gpkg", layer="sites").set_index("name")


@pytest.fixture(scope="module")
def scenes(made) -> dict[dt.date, np.ndarray]:
    """Reflectance (band, y, x) per summer date, NaN where the scene has no data."""
    out = {}
    for path in sorted((made[0] / "optical").glob("LS_*.tif")):
        with rasterio.open(path) as src:
            dn = src.read().astype(np.float64)
        refl = dn * 0.0000275 - 0.2
        refl[dn == 0] = np.nan
        out[dt.datetime.strptime(path.stem[3:], "%Y%m%d").date()] = refl
    return out


def _mask(made, sites, name: str) -> np.ndarray:
    with rasterio.open(next((made[0] / "optical").glob("LS_*.tif"))) as src:
        transform, shape = src.transform, src.shape
    return ~geometry_mask([sites.loc[name].geometry], out_shape=shape, transform=transform)


def _index(refl: np.ndarray, a: str, b: str) -> np.ndarray:
    x, y = refl[arc.LS_BANDS.index(a)], refl[arc.LS_BANDS.index(b)]
    return (x - y) / (x + y)


def _site_series(made, sites, scenes, name: str) -> tuple[np.ndarray, np.ndarray]:
    """Per year: share of valid pixels with MNDWI > 0, and median NDVI (NaN if half the site is cloud)."""
    inside = _mask(made, sites, name)
    water, ndvi = [], []
    for refl in scenes.values():
        valid = inside & ~np.isnan(refl[0])
        ok = valid.sum() >= 0.5 * inside.sum()
        water.append((_index(refl, "green", "swir1")[valid] > 0).mean() if ok else np.nan)
        ndvi.append(np.median(_index(refl, "nir", "red")[valid]) if ok else np.nan)
    return np.array(water), np.array(ndvi)


# -- file contract -------------------------------------------------------------------------------------------


def test_optical_scenes_one_summer_a_year_six_bands_landsat_scaling(made, scenes):
    root, truth = made
    dates = sorted(scenes)
    assert [d.year for d in dates] == list(range(1990, 2025))
    assert all(dt.date(d.year, 7, 1) < d <= dt.date(d.year, 8, 31) for d in dates)
    assert len({(d.month, d.day) for d in dates}) > 10  # the date varies from year to year
    assert truth["optical"]["dates"] == [d.isoformat() for d in dates]
    for path in sorted((root / "optical").glob("*.tif")):
        with rasterio.open(path) as src:
            assert re.fullmatch(r"LS_\d{8}\.tif", path.name)
            assert src.descriptions == arc.LS_BANDS
            assert (src.count, src.dtypes[0], src.nodata) == (6, "uint16", 0.0)
            assert (src.crs, src.res) == (CRS.from_epsg(32633), (30.0, 30.0)) and src.shape == (SIZE, SIZE)
            assert src.profile["compress"] == "deflate"
            stamp = dt.datetime.strptime(path.stem[3:], "%Y%m%d").date().isoformat()
            assert src.tags()["ACQUISITION_DATE"] == stamp
    valid = np.concatenate([r[~np.isnan(r)] for r in scenes.values()])
    assert valid.min() >= 0.0 and valid.max() < 0.7  # surface reflectance of natural surfaces


def test_sar_season_every_12_days_float32_linear(made):
    root, truth = made
    dates = arc.sar_dates(2023)
    assert dates[0] >= dt.date(2023, 3, 1) and dates[-1] <= dt.date(2023, 11, 30) and len(dates) >= 20
    assert {(b - a).days for a, b in zip(dates, dates[1:], strict=False)} == {12}
    names = sorted(p.name for p in (root / "sar").glob("*.tif"))
    assert names == sorted(f"S1_{d:%Y%m%d}_{b}.tif" for d in dates for b in ("VV", "VH"))
    assert truth["sar"]["dates"] == [d.isoformat() for d in dates]
    with rasterio.open(root / "sar" / names[0]) as src:
        assert (src.count, src.dtypes[0], src.res) == (1, "float32", (30.0, 30.0))
        assert src.crs == CRS.from_epsg(32633)
        assert src.descriptions[0] in ("VV", "VH") and (src.read(1) > 0).all()


def test_sites_layer_fields_roles_and_truth_file(made, sites):
    root, truth = made
    assert set(sites.columns) >= {"role", "event", "disturbed", "geometry"}
    assert sites.crs == CRS.from_epsg(32633)
    assert sites["role"].to_dict() == {"lake": "lake", "fen_upslope": "impact", "fen_downslope": "impact",
                                       "fen_control": "control", "harvest_block": "harvest",
                                       "floodplain": "flood"}
    assert sites.loc["fen_upslope", "event"] == f"{truth['road']['year']}-07-01"
    assert sites.loc["fen_control", "event"] == "" and np.isnan(sites.loc["fen_control", "disturbed"])
    assert int(sites.loc["harvest_block", "disturbed"]) == truth["harvest"]["year"]
    assert sites.loc["floodplain", "event"] == truth["sar"]["pulse"]["start"]
    on_disk = json.loads((root / "truth.json").read_text())
    assert on_disk == {k: v for k, v in truth.items() if k != "paths"}
    assert len(truth["paths"]["optical"]) == 35 and Path(truth["paths"]["sites"]).exists()


def test_same_seed_same_bytes_other_seed_differs(made, tmp_path):
    root, _ = made
    again = Path(arc.make_archive(tmp_path / "again", size=SIZE, seed=SEED)["paths"]["root"])
    other = Path(arc.make_archive(tmp_path / "other", size=SIZE, seed=SEED + 1)["paths"]["root"])
    files = sorted(p.relative_to(root) for p in root.rglob("*") if p.is_file())
    assert files == sorted(p.relative_to(again) for p in again.rglob("*") if p.is_file())
    for rel in files:
        assert (root / rel).read_bytes() == (again / rel).read_bytes(), rel
    sar = sorted((root / "sar").glob("*.tif"))[0].name
    assert (root / "sar" / sar).read_bytes() != (other / "sar" / sar).read_bytes()


# -- planted truths ------------------------------------------------------------------------------------------


def test_clouds_are_nodata_patches_on_the_listed_dates_only(made, scenes):
    _, truth = made
    cloudy = set(truth["clouds"]["dates"])
    assert len(cloudy) >= 2
    for date, refl in scenes.items():
        share = np.isnan(refl).all(axis=0).mean()
        assert (share > 0.05) == (date.isoformat() in cloudy), date
        assert np.array_equal(np.isnan(refl).any(axis=0), np.isnan(refl).all(axis=0))  # all bands together


def test_lake_water_pixels_fall_at_the_planted_rate(made, sites, scenes):
    _, truth = made
    lake = truth["lake"]
    inside = _mask(made, sites, "lake")
    clear = [i for i, d in enumerate(scenes) if d.isoformat() not in truth["clouds"]["dates"]]
    counts = np.array([(_index(r, "green", "swir1")[inside] > 0).sum() for r in scenes.values()])
    assert counts[clear].tolist() == [lake["pixel_count"][i] for i in clear]
    years = np.arange(1990, 2025)[clear]
    slope = np.polyfit(years, counts[clear] * 0.09, 1)[0]  # 30 m pixels: 0.09 ha each
    assert lake["planted_rate_ha_per_yr"] < 0
    assert slope == pytest.approx(lake["planted_rate_ha_per_yr"], rel=0.15)
    assert lake["sen_slope_ha_per_yr"] == pytest.approx(lake["planted_rate_ha_per_yr"], rel=0.15)


def test_road_impact_against_control_changes_as_planted(made, sites, scenes):
    _, truth = made
    years = np.array([d.year for d in scenes])
    after = years >= truth["road"]["year"]
    water_c, ndvi_c = _site_series(made, sites, scenes, "fen_control")
    for name in ("fen_upslope", "fen_downslope"):
        water, ndvi = _site_series(made, sites, scenes, name)
        planted = truth["fens"]["baci"][name]
        for measured, control, key in ((water, water_c, "water_share"), (ndvi, ndvi_c, "ndvi")):
            diff = measured - control
            effect = np.nanmean(diff[after]) - np.nanmean(diff[~after])
            assert np.sign(effect) == planted[key]["sign"], (name, key)
            assert effect == pytest.approx(planted[key]["effect"], abs=0.05), (name, key)
    assert truth["fens"]["baci"]["fen_upslope"]["water_share"]["sign"] == 1
    assert truth["fens"]["baci"]["fen_downslope"]["water_share"]["sign"] == -1
    # the shared weather signal: before the road, impact and control move together from year to year
    water_u, _ = _site_series(made, sites, scenes, "fen_upslope")
    ok = ~after & ~np.isnan(water_u) & ~np.isnan(water_c)
    assert np.corrcoef(water_u[ok], water_c[ok])[0, 1] > 0.6


def test_harvest_block_ndvi_follows_the_recovery_curve(made, sites, scenes):
    _, truth = made
    h = truth["harvest"]
    years = np.array([d.year for d in scenes])
    _, ndvi = _site_series(made, sites, scenes, "harvest_block")
    curve = arc.harvest_ndvi(years, h["year"], baseline=h["baseline_ndvi"], after=h["after_ndvi"],
                             tau=h["tau_years"])
    ok = ~np.isnan(ndvi)
    assert np.abs(ndvi[ok] - curve[ok]).max() < 0.03
    baseline = np.nanmedian(ndvi[years < h["year"]])
    regained = years[(years >= h["year"]) & (ndvi >= 0.8 * baseline)]
    assert regained[0] == h["recovery_80_year"]
    assert h["recovery_80_year"] == h["year"] + int(np.ceil(h["tau_years"] * np.log(
        (h["baseline_ndvi"] - h["after_ndvi"]) / (0.2 * h["baseline_ndvi"])))
    )


def test_sar_floodplain_is_dark_on_pulse_dates_only(made, sites):
    root, truth = made
    sar = truth["sar"]
    flood, lake = _mask(made, sites, "floodplain"), _mask(made, sites, "lake")
    for date, share in zip(sar["dates"], sar["flooded_share"], strict=True):
        stem = root / "sar" / f"S1_{date.replace('-', '')}"
        with rasterio.open(f"{stem}_VV.tif") as a, rasterio.open(f"{stem}_VH.tif") as b:
            vv, vh = 10 * np.log10(a.read(1)), 10 * np.log10(b.read(1))
        median = np.median(vv[flood])
        if share >= 0.6:
            assert median < -17.0, date
        elif share == 0:
            assert -14.0 < median < -8.0, date
        in_pulse = sar["pulse"]["start"] <= date <= sar["pulse"]["end"]
        assert (share > 0) == in_pulse
        land = ~flood & ~lake
        assert np.median(vv[land] - vh[land]) == pytest.approx(6.0, abs=1.0)
    assert max(sar["flooded_area_ha"]) == pytest.approx(sar["floodplain_area_ha"], rel=0.02)
    assert sar["flooded_area_ha"][sar["dates"].index(sar["pulse"]["peak"])] == max(sar["flooded_area_ha"])


def test_sar_speckle_has_a_few_looks_and_open_water_is_dark(made, sites):
    root, truth = made
    with rasterio.open(root / "sar" / f"S1_{truth['sar']['dates'][0].replace('-', '')}_VV.tif") as src:
        vv = src.read(1).astype(np.float64)
    block = _mask(made, sites, "harvest_block")
    ratio = vv[block] / np.exp(np.mean(np.log(vv[block])))  # texture is smooth; speckle dominates
    enl = np.mean(ratio) ** 2 / np.var(ratio)
    assert 2.0 < enl < 8.0
    lake_water = _mask(made, sites, "lake") & (10 * np.log10(vv) < -16)
    assert np.median(10 * np.log10(vv[lake_water])) == pytest.approx(-20.5, abs=1.5)


# -- project file table and arguments -----------------------------------------------------------------------


def test_monitor_table_round_trips_and_matches_the_files(made):
    root, truth = made
    table = arc.monitor_table("archive", road_year=truth["road"]["year"])
    assert tomllib.loads(tomli_w.dumps(table)) == table
    mon = table["monitor"]
    assert mon["baci"]["event_date"] == dt.date(truth["road"]["year"], 7, 1)
    assert mon["polygons"] == "archive/sites.gpkg" and mon["id_field"] == "name"
    sensor = SENSORS[mon["optical"][0]["sensor"]]
    assert set(mon["optical"][0]["bands"]) <= set(sensor.bands)
    assert (sensor.scale, sensor.offset, sensor.nodata) == (0.0000275, -0.2, 0.0)
    first = dt.date.fromisoformat(truth["optical"]["dates"][0])
    assert (root.parent / mon["optical"][0]["pattern"].format(date=f"{first:%Y%m%d}")).exists()
    sar = mon["sar"][0]["pattern"].format(date=truth["sar"]["dates"][0].replace("-", ""), band="VH")
    assert (root.parent / sar).exists()
    assert set(mon["baci"]["impact"] + mon["baci"]["control"] + mon["recovery"]["patches"]) <= set(
        gpd.read_file(root / "sites.gpkg", layer="sites")["name"])


def test_make_demo_archive_appends_the_monitor_table(tmp_path):
    from wetlandflow.demo import make_demo

    path = make_demo(tmp_path, size=64, n_optical=1, n_sar=1, archive=True)
    doc = tomllib.loads(path.read_text())
    truth = json.loads((tmp_path / "archive" / "truth.json").read_text())
    assert doc["monitor"] == arc.monitor_table("archive", road_year=truth["road"]["year"])["monitor"]
    assert "project" in doc and "optical" in doc
    scene = tmp_path / "archive" / "optical" / f"LS_{truth['optical']['dates'][0].replace('-', '')}.tif"
    with rasterio.open(tmp_path / "truth.tif") as fine, rasterio.open(scene) as coarse:
        f, c = fine.bounds, coarse.bounds
    assert c.left <= f.left and c.bottom <= f.bottom and c.right >= f.right and c.top >= f.top


@pytest.mark.parametrize("kwargs, words", [
    ({"size": 8}, "size must be 32..2048"),
    ({"first_year": 2015}, "at least 14 summers"),
    ({"sar_year": 2030}, "sar_year must lie in"),
    ({"pixel_size_m": 2.0}, "pixel_size_m must be"),
])
def test_bad_arguments_say_what_and_how(tmp_path, kwargs, words):
    with pytest.raises(ParameterError, match=words):
        arc.make_archive(tmp_path, **kwargs)
