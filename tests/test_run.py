"""End to end on the default-size demo: the run folder, its georeferencing, and accuracy against the truth."""

from __future__ import annotations

import json

import numpy as np
import rasterio

from wetlandflow import CAUTION
from wetlandflow.demo.landscape import load_truth
from wetlandflow.inputs.layers import project_grid
from wetlandflow.inputs.project import load_project


def test_run_folder_is_complete(demo_run):
    d = demo_run.run_dir
    for rel in ("manifest.json", "features.zarr", "samples.parquet", "validation/error_matrix.csv",
                "validation/metrics.json", "validation/oof_predictions.parquet", "model/bundle.json",
                "maps/probability.tif", "maps/class.tif", "maps/confidence.tif", "maps/class_final.tif",
                "maps/dissimilarity.tif", "maps/applicability.tif", "inventory.gpkg", "inventory_areas.csv",
                "explain/importance.csv", "explain/domain_importance.csv", "explain/drivers.json", "areas.csv",
                "explain/shap_maps.png", "explain/waterfall_centre.png", "explain/ranking_stability.csv"):
        assert (d / rel).exists(), rel
    manifest = json.loads((d / "manifest.json").read_text())
    assert all(s["status"] == "done" for s in manifest["steps"].values())
    assert set(manifest["steps"]) == {"inputs", "features", "samples", "validation", "model", "mapping",
                                       "inventory", "explain"}
    assert all(len(v["sha256"]) == 64 for v in manifest["inputs"].values())
    versions = manifest["versions"]
    assert versions["gdal"] and versions["proj (rasterio)"] and versions["proj (pyproj)"] and versions["geos"]
    assert manifest["command"] == "wetlandflow run project.toml"
    assert set(manifest["steps"]["features"]["season_coverage"]) == set(manifest["project"]["seasons"])
    assert not list(d.rglob("*.partial"))
    drivers = json.loads((d / "explain" / "drivers.json").read_text())
    assert drivers["maps"] and all((d / "explain" / m["file"]).exists() for m in drivers["maps"].values())
    assert -1 <= drivers["ranking_stability"]["min_spearman_rho"] <= drivers["ranking_stability"]["mean_spearman_rho"] <= 1


def test_maps_are_on_the_grid(demo_run):
    project = load_project(demo_run.run_dir.parent.parent / "project.toml")
    grid = project_grid(project)
    for name in ("probability", "class", "confidence"):
        with rasterio.open(demo_run.run_dir / "maps" / f"{name}.tif") as src:
            assert src.crs.to_string() == grid.crs
            assert src.transform == grid.transform
            assert (src.height, src.width) == grid.shape
    with rasterio.open(demo_run.run_dir / "maps" / "probability.tif") as src:
        assert src.descriptions == project.classes.names


def test_probabilities_sum_to_one_and_class_is_argmax(demo_run):
    with rasterio.open(demo_run.run_dir / "maps" / "probability.tif") as src:
        p = src.read()
    with rasterio.open(demo_run.run_dir / "maps" / "class.tif") as src:
        c = src.read(1)
    valid = c > 0
    assert valid.mean() > 0.8
    np.testing.assert_allclose(p[:, valid].sum(axis=0), 1.0, atol=1e-5)
    np.testing.assert_array_equal(c[valid], np.argmax(p[:, valid], axis=0) + 1)
    assert np.isnan(p[:, ~valid]).all()


def map_and_truth(demo_run):
    import rioxarray

    c = rioxarray.open_rasterio(demo_run.run_dir / "maps" / "class.tif").isel(band=0, drop=True)
    truth = load_truth(demo_run.run_dir.parent.parent).reindex_like(c, method="nearest", tolerance=1.0)
    return c.values, truth.values


def test_map_accuracy_against_truth_far_above_chance(demo_run):
    c, truth = map_and_truth(demo_run)
    both = (truth > 0) & (c > 0)
    acc = (truth[both] == c[both]).mean()
    shares = np.bincount(truth[both], minlength=7)[1:] / both.sum()
    # chance agreement of a map with the same class shares drawn independently: sum of squared shares
    chance = float((shares**2).sum())
    assert acc > chance + 0.3, (acc, chance)
    assert acc > 0.7


def test_summary_states_accuracy_areas_and_caution(demo_run):
    text = demo_run.summary()
    assert "overall accuracy" in text and "ha" in text
    assert CAUTION in text
    for name in ("upland", "open_water", "marsh", "swamp", "fen", "bog"):
        assert name in text


def test_inventory_polygons_match_the_final_raster(demo_run):
    import geopandas as gpd

    d = demo_run.run_dir
    gdf = gpd.read_file(d / "inventory.gpkg", layer="inventory")
    with rasterio.open(d / "maps" / "class_final.tif") as src:
        final = src.read(1)
        pixel_ha = abs(src.transform.a * src.transform.e) / 1e4
    counts = np.bincount(final.ravel(), minlength=7)[1:]
    per_class = gdf.groupby("class_code")["area_ha"].sum().reindex(range(1, 7), fill_value=0.0).to_numpy()
    np.testing.assert_allclose(per_class, counts * pixel_ha, rtol=1e-9)
    assert gdf["polygon_id"].is_unique
    assert (gdf["n_pixels"] >= 9).sum() >= 0.95 * len(gdf)  # below-MMU patches survive only with no neighbour
    assert gdf["share_outside_aoa"].between(0, 1).all()


def test_applicability_flags_cover_the_mapped_pixels(demo_run):
    d = demo_run.run_dir
    with rasterio.open(d / "maps" / "applicability.tif") as a, rasterio.open(d / "maps" / "class.tif") as c:
        flag, cls = a.read(1), c.read(1)
    np.testing.assert_array_equal(flag == 255, cls == 0)
    share = json.loads((d / "manifest.json").read_text())["steps"]["mapping"]["share_outside_applicability"]
    assert share == round(float((flag == 0).sum() / (flag != 255).sum()), 4)
