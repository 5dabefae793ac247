"""Tests of the synthetic demo landscape (wetlandflow.demo.landscape).

One module-scoped demo (size 256) serves most tests; the determinism test makes
two more of the same size.  Checks marked ``reference`` compare the synthetic
data with physical facts or published relations, each labelled with its source
or as "common practice, no source" / "from memory".
"""

from __future__ import annotations

import datetime as dt
import re
from pathlib import Path

import geopandas as gpd
import numpy as np
import pytest
import rasterio
import shapely
import tomllib
from pyproj import CRS
from rasterio.features import rasterize
from rasterio.warp import transform_bounds

from wetlandflow.demo import landscape as demo
from wetlandflow.errors import AlignmentError, InputFileError, ProjectFileError

SIZE, SEED = 256, 0
CODE = {name: i + 1 for i, name in enumerate(demo.CLASS_NAMES)}


@pytest.fixture(scope="module")
def demo_dir(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("demo")
    demo.make_demo(out, size=SIZE, seed=SEED)
    return out


@pytest.fixture(scope="module")
def truth(demo_dir) -> np.ndarray:
    return demo.load_truth(demo_dir).values


def _scenes(demo_dir: Path) -> list[Path]:
    return sorted((demo_dir / "optical").glob("scene_????????.tif"))


def _reflectance(path: Path) -> tuple[np.ndarray, np.ndarray]:
    """Reflectance (band, y, x) with the +1000 offset removed, and the scene mask."""
    with rasterio.open(path) as src:
        dn = src.read().astype(np.float64)
    with rasterio.open(path.with_name(path.stem + "_scl.tif")) as src:
        scl = src.read(1)
    return (dn - 1000.0) / 10000.0, scl


def _db(path: Path) -> np.ndarray:
    with rasterio.open(path) as src:
        return 10.0 * np.log10(src.read())


def _tif_bytes(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*.tif"))}


# -- determinism --------------------------------------------------------------------------------------------


def test_same_seed_same_bytes_other_seed_differs(demo_dir, tmp_path):
    again = demo.make_demo(tmp_path / "again", size=SIZE, seed=SEED).parent
    other = demo.make_demo(tmp_path / "other", size=SIZE, seed=SEED + 1).parent
    first, second, third = _tif_bytes(demo_dir), _tif_bytes(again), _tif_bytes(other)
    assert len(first) == 2 + 2 * 5 + 14
    assert first.keys() == second.keys()
    for name in first:
        assert first[name] == second[name], name
    assert first["truth.tif"] != third["truth.tif"]
    assert first["optical/scene_20240711.tif"] != third["optical/scene_20240711.tif"]
    p1, p2 = gpd.read_file(demo_dir / "plots.gpkg"), gpd.read_file(again / "plots.gpkg")
    assert list(p1["plot_id"]) == list(p2["plot_id"]) and list(p1["label"]) == list(p2["label"])
    assert [g.wkb for g in p1.geometry] == [g.wkb for g in p2.geometry]
    p3 = gpd.read_file(other / "plots.gpkg")
    assert [g.wkb for g in p1.geometry] != [g.wkb for g in p3.geometry]


# -- file contract -------------------------------------------------------------------------------------------


def test_rasters_are_tiled_deflate_with_band_names(demo_dir):
    for path in sorted(demo_dir.rglob("*.tif")):
        with rasterio.open(path) as src:
            assert src.profile["compress"] == "deflate", path.name
            assert src.block_shapes[0] == (256, 256), path.name
    for path in _scenes(demo_dir):
        with rasterio.open(path) as src:
            assert src.descriptions == ("blue", "green", "red", "re1", "re2", "re3", "nir", "nir_narrow",
                                        "swir1", "swir2")
            assert (src.dtypes[0], src.nodata, src.crs) == ("uint16", 0.0, CRS.from_epsg(32633))
    for path in sorted((demo_dir / "sar").glob("*.tif")):
        with rasterio.open(path) as src:
            assert src.descriptions == ("VV", "VH") and src.dtypes[0] == "float32" and src.nodata == -9999
            assert src.tags()["ORBIT"] in ("ascending", "descending")


def test_load_truth_is_on_the_optical_grid(demo_dir):
    da = demo.load_truth(demo_dir)
    assert da.dims == ("y", "x") and da.dtype == np.uint8 and da.shape == (SIZE, SIZE)
    assert CRS.from_user_input(da.rio.crs) == CRS.from_epsg(32633)
    grid = demo.demo_grid(SIZE, 10.0)
    x, y = grid.xy_coords()
    np.testing.assert_allclose(da.x.values, x)
    np.testing.assert_allclose(da.y.values, y)
    assert set(np.unique(da.values)) <= set(range(7))
    with pytest.raises(InputFileError, match="make_demo"):
        demo.load_truth(demo_dir / "optical")


def test_project_file_parses_and_its_paths_exist(demo_dir):
    """The written project follows the keys of the example in docs/project-file.md."""
    doc = tomllib.loads((demo_dir / "project.toml").read_text(encoding="utf-8"))
    example = _documented_example()
    for table in ("project", "area", "grid", "classes", "plots", "dem", "seasons", "features", "model",
                  "validation", "output"):
        assert set(doc[table]) <= set(example[table]), table
    assert set(doc["optical"][0]) <= set(example["optical"][0])  # the sensor keys are optional
    assert set(doc["sar"][0]) == set(example["sar"][0])
    assert doc["classes"]["names"] == list(demo.CLASS_NAMES)
    assert doc["classes"]["parents"] == {"wetland": ["marsh", "swamp", "fen", "bog"]}
    assert len(doc["optical"]) == 5 and len(doc["sar"]) == 14
    for entry in doc["optical"] + doc["sar"]:
        assert isinstance(entry["date"], dt.date)
    assert doc["optical"][0]["offset_dn"] == -1000 and doc["optical"][0]["mask_valid"] == [4, 5, 6, 7]
    paths = [doc["area"]["aoi"], doc["plots"]["path"], doc["dem"]["path"]]
    paths += [e["path"] for e in doc["optical"] + doc["sar"]] + [e["mask"] for e in doc["optical"]]
    for rel in paths:
        assert not Path(rel).is_absolute() and (demo_dir / rel).is_file(), rel


def _documented_example() -> dict:
    text = (Path(__file__).parents[1] / "docs" / "project-file.md").read_text(encoding="utf-8")
    return tomllib.loads(re.search(r"```toml\n(.*?)```", text, re.S).group(1))


def test_bad_arguments_raise_clear_errors(tmp_path):
    with pytest.raises(AlignmentError, match="size"):
        demo.make_demo(tmp_path, size=10)
    with pytest.raises(AlignmentError, match="coarser"):
        demo.make_demo(tmp_path, size=128, dem_pixel_size_m=10.0)
    with pytest.raises(AlignmentError, match="geographic"):
        demo.make_demo(tmp_path, size=128, dem_crs="EPSG:4326")
    with pytest.raises(ProjectFileError, match="n_optical"):
        demo.make_demo(tmp_path, size=128, n_optical=0)


def test_dem_in_optical_crs_when_asked_and_progress_bar(tmp_path, capsys):
    demo.make_demo(tmp_path, size=96, n_optical=1, n_sar=1, dem_crs=None, progress=True)
    with rasterio.open(tmp_path / "dem.tif") as src:
        assert src.crs == CRS.from_epsg(32633) and src.res == (30.0, 30.0)
    assert "demo" in capsys.readouterr().err


# -- plausibility --------------------------------------------------------------------------------------------


@pytest.mark.reference
def test_class_proportions_are_plausible(truth):
    """Common practice, no source: a wetland-rich lowland basin that is still mostly upland.

    Ranges from the demo's design brief: upland about 50-65 %, each wetland
    class a few to about 12 %, open water a few %.
    """
    inside = truth[truth > 0]
    share = {name: float(np.mean(inside == code)) for name, code in CODE.items()}
    assert 0.50 <= share["upland"] <= 0.70, share
    assert 0.01 <= share["open_water"] <= 0.08, share
    for name in ("marsh", "swamp", "fen", "bog"):
        assert 0.02 <= share[name] <= 0.15, share


def test_truth_has_every_class_and_nodata_outside_aoi(demo_dir, truth):
    assert set(np.unique(truth)) == set(range(7))
    aoi = gpd.read_file(demo_dir / "aoi.gpkg")
    assert len(aoi) == 1 and aoi.crs == CRS.from_epsg(32633) and aoi.geometry.iloc[0].is_valid
    with rasterio.open(demo_dir / "truth.tif") as src:
        inside = rasterize(aoi.geometry, out_shape=src.shape, transform=src.transform).astype(bool)
        x0, y0, x1, y1 = src.bounds
    assert np.all(truth[~inside] == 0) and np.all(truth[inside] > 0)
    area = aoi.geometry.iloc[0].area / ((x1 - x0) * (y1 - y0))
    assert 0.75 < area < 0.96  # most of the grid, with margins and a cut corner


@pytest.mark.reference
def test_open_water_is_dark_in_the_nir(demo_dir, truth):
    """Common practice, no source: water absorbs near-infrared light, vegetated land reflects it strongly."""
    for path in _scenes(demo_dir):
        rho, scl = _reflectance(path)
        clear = np.isin(scl, (4, 5, 6))
        nir = rho[6]
        water, upland = nir[clear & (truth == CODE["open_water"])], nir[clear & (truth == CODE["upland"])]
        assert np.median(water) < 0.06 < 0.15 < np.median(upland), path.name


@pytest.mark.reference
def test_open_water_is_dark_in_sar_vv(demo_dir, truth):
    """Typical backscatter (FROM MEMORY): calm water VV about -18 to -25 dB,
    vegetated land about -6 to -12 dB.  Wind roughens water on a date or two, so the ranges must hold on
    most dates and water must stay darker than upland on all of them."""
    in_range = []
    for path in sorted((demo_dir / "sar").glob("*.tif")):
        vv = _db(path)[0]
        water, upland = np.median(vv[truth == CODE["open_water"]]), np.median(vv[truth == CODE["upland"]])
        assert water < upland - 3.0, path.name
        in_range.append(-25.0 <= water <= -18.0 and -12.0 <= upland <= -6.0)
    assert sum(in_range) >= len(in_range) - 2


@pytest.mark.reference
def test_speckle_has_the_equivalent_number_of_looks(demo_dir, truth):
    """Lee (1980), multiplicative speckle model (FROM MEMORY): for intensity with
    L looks var = mean^2 / L.  Calm water is near homogeneous, so mean^2 / var there estimates L (4-5 here;
    a little texture lowers it)."""
    enl = []
    for path in sorted((demo_dir / "sar").glob("*.tif")):
        with rasterio.open(path) as src:
            vv = src.read(1)[truth == CODE["open_water"]].astype(np.float64)
        enl.append(vv.mean() ** 2 / vv.var())
    assert 3.0 < np.median(enl) < 5.5


@pytest.mark.reference
def test_wetland_backscatter_seasonality(demo_dir, truth):
    """FROM MEMORY: flooded forest and emergent marsh brighten VV by double bounce;
    open flooded marsh without a canopy is specular and dark.  Spring (April) is flooded, July has canopy."""
    april, july = _db(demo_dir / "sar" / "sar_20240415.tif")[0], _db(demo_dir / "sar" / "sar_20240708.tif")[0]
    marsh, swamp = truth == CODE["marsh"], truth == CODE["swamp"]
    assert np.median(april[marsh]) + 3.0 < np.median(july[marsh])
    assert np.median(april[swamp]) > np.median(july[swamp])


@pytest.mark.reference
def test_optical_phenology_and_bog_spectra(demo_dir, truth):
    """Common practice, no source: marsh greens up from a flooded spring to a summer peak (NDVI); bogs
    (moss, dwarf shrubs) have a lower summer NDVI than fens and a higher SWIR relative to NIR."""
    stats = {}
    for path in _scenes(demo_dir):
        rho, scl = _reflectance(path)
        clear = np.isin(scl, (4, 5, 6))
        ndvi = (rho[6] - rho[2]) / (rho[6] + rho[2])
        swir_nir = rho[8] / rho[6]
        stats[path.stem[6:]] = {name: (np.median(ndvi[clear & (truth == c)]),
                                       np.median(swir_nir[clear & (truth == c)])) for name, c in CODE.items()}
    spring, summer = stats["20240422"], stats["20240711"]
    assert spring["marsh"][0] + 0.3 < summer["marsh"][0]
    assert summer["bog"][0] < summer["fen"][0] and summer["bog"][1] > summer["fen"][1]


@pytest.mark.reference
def test_clouds_are_bright_and_shadows_dark(demo_dir):
    """Common practice, no source: clouds are bright in the visible, their shadows darker than clear land."""
    seen = 0
    for path in _scenes(demo_dir):
        rho, scl = _reflectance(path)
        assert set(np.unique(scl)) <= {0, 3, 4, 5, 6, 8, 9, 10}
        assert np.mean(np.isin(scl, (8, 9))) <= 0.36
        land = np.isin(scl, (4, 5))
        if (scl == 9).sum() > 50 and (scl == 3).sum() > 50:
            seen += 1
            assert np.median(rho[0][scl == 9]) > 2 * np.median(rho[0][land])
            assert np.median(rho[6][scl == 3]) < 0.7 * np.median(rho[6][land])
    assert seen >= 1


@pytest.mark.reference
def test_reflectance_carries_the_additive_offset(demo_dir):
    """From memory (also docs/project-file.md): Sentinel-2 L2A processed since 2022 stores
    DN = 10000 * reflectance + 1000, so valid DN start at 1000; 0 is no data (SCL 0)."""
    for path in _scenes(demo_dir):
        with rasterio.open(path) as src:
            dn = src.read()
        with rasterio.open(path.with_name(path.stem + "_scl.tif")) as src:
            nodata = src.read(1) == 0
        assert np.all(dn[:, nodata] == 0)
        valid = dn[:, ~nodata]
        assert valid.min() >= 1000 and valid.max() <= 7000  # reflectance in [0, 0.6]
    with rasterio.open(_scenes(demo_dir)[1]) as src:
        assert 0.02 < np.mean(src.read(1) == 0) < 0.2  # the second scene is cut by a swath edge


@pytest.mark.reference
def test_dem_has_another_crs_a_coarser_pixel_and_covers_the_aoi(demo_dir):
    """EPSG registry (via pyproj): EPSG:3035 is ETRS89-LAEA, not the UTM 33N optical grid."""
    aoi = gpd.read_file(demo_dir / "aoi.gpkg")
    with rasterio.open(demo_dir / "dem.tif") as dem, rasterio.open(demo_dir / "truth.tif") as grid:
        assert dem.crs != grid.crs and dem.crs == CRS.from_epsg(3035)
        assert dem.res[0] > grid.res[0] and dem.res == (30.0, 30.0)
        b = transform_bounds(aoi.crs, dem.crs, *aoi.total_bounds, densify_pts=21)
        assert dem.bounds.left < b[0] and dem.bounds.bottom < b[1]
        assert dem.bounds.right > b[2] and dem.bounds.top > b[3]
        z = dem.read(1, masked=True)
    assert 30.0 < float(z.max() - z.min()) < 200.0  # relief of a lowland basin
    gy, gx = np.gradient(np.ma.filled(z, np.nan), 30.0)
    slope = np.degrees(np.arctan(np.hypot(gx, gy)))
    assert np.nanpercentile(slope, 99) < 15.0  # no cliffs: common practice, no source


@pytest.mark.reference
def test_plots_are_inside_the_aoi_clustered_and_cover_every_class(demo_dir, truth):
    """Clark, P. J., Evans, F. C. (1954), Distance to nearest neighbor as a measure of spatial relationships
    in populations, Ecology 35(4), 445-453 (FROM MEMORY): R = mean nearest-neighbour distance /
    (0.5 / sqrt(density)) is about 1 for a random pattern and below 1 for a clustered one."""
    from scipy.spatial import cKDTree

    plots = gpd.read_file(demo_dir / "plots.gpkg")
    aoi = gpd.read_file(demo_dir / "aoi.gpkg").geometry.iloc[0]
    assert plots.crs == CRS.from_epsg(32633)
    assert plots.geometry.within(aoi).all()
    counts = plots["label"].value_counts()
    assert set(counts.index) == set(demo.CLASS_NAMES) and counts.min() >= 15
    assert plots["plot_id"].is_unique and plots["plot_id"].str.fullmatch(r"OB-\d{4}").all()
    assert not plots.geometry.union_all().is_empty and plots.geometry.area.sum() == pytest.approx(
        plots.geometry.union_all().area)  # no overlaps
    radius = shapely.minimum_bounding_radius(plots.geometry.values)
    assert radius.min() > 16.0 and radius.max() <= 60.0  # discs of 20-60 m, irregular by up to 18 %
    xy = np.c_[plots.geometry.centroid.x, plots.geometry.centroid.y]
    nn = cKDTree(xy).query(xy, k=2)[0][:, 1]
    r = nn.mean() / (0.5 / np.sqrt(len(xy) / aoi.area))
    assert r < 0.95  # plots never overlap, which pushes a random pattern above 1


def test_plots_sit_in_one_class_with_a_little_label_noise(demo_dir, truth):
    plots = gpd.read_file(demo_dir / "plots.gpkg")
    with rasterio.open(demo_dir / "truth.tif") as src:
        transform = src.transform
    pure, wrong = 0, 0
    for geom, label in zip(plots.geometry, plots["label"]):
        cover = rasterize([geom], out_shape=truth.shape, transform=transform).astype(bool)
        codes = np.unique(truth[cover])
        pure += codes.size == 1
        wrong += CODE[label] not in codes
    assert pure / len(plots) > 0.95
    assert 0.01 <= wrong / len(plots) <= 0.06


def test_classes_overlap_in_feature_space(demo_dir, truth):
    """The demo must be a real classification problem: one summer scene does not separate the classes."""
    from sklearn.model_selection import cross_val_score
    from sklearn.naive_bayes import GaussianNB

    rho, scl = _reflectance(demo_dir / "optical" / "scene_20240815.tif")
    ok = np.isin(scl, (4, 5, 6)) & (truth > 0)
    rng = np.random.default_rng(0)
    idx = rng.choice(np.flatnonzero(ok), size=6000, replace=False)
    x, y = rho.reshape(10, -1)[:, idx].T, truth.ravel()[idx]
    acc = cross_val_score(GaussianNB(), x, y, cv=3).mean()
    assert 0.4 < acc < 0.95
