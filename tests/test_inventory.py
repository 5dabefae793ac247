"""Minimum mapping unit, polygons, area tables and the GeoPackage inventory."""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pytest
from scipy import ndimage

from wetlandflow.errors import GridMismatchError, ParameterError
from wetlandflow.inputs.grid import Grid
from wetlandflow.mapping.inventory import (
    INVENTORY_LAYER,
    apply_mmu,
    area_summary,
    polygonize,
    write_inventory,
)

NAMES = ("upland", "open_water", "marsh", "swamp", "fen", "bog")


def _uniform(cm, k=3):
    return np.full((k, *cm.shape), 1.0 / k, np.float32)


def _noisy_map(shape=(120, 150), k=6, sigma=2.0, seed=0):
    """Smoothed-noise class map (argmax of k smoothed fields) with matching probabilities."""
    rng = np.random.default_rng(seed)
    fields = np.stack([ndimage.gaussian_filter(rng.normal(size=shape), sigma) for _ in range(k)])
    e = np.exp(fields * 8)
    proba = (e / e.sum(0)).astype(np.float32)
    cm = (np.argmax(proba, 0) + 1).astype(np.uint8)
    return cm, proba


def test_small_island_merges_into_surrounding_class():
    cm = np.ones((10, 10), np.uint8)
    cm[4:6, 4:6] = 2
    out = apply_mmu(cm, _uniform(cm), min_pixels=9)
    assert (out == 1).all()


def test_island_goes_to_most_probable_neighbour():
    cm = np.ones((10, 10), np.uint8)
    cm[:, 5:] = 3
    cm[4:6, 4:6] = 2  # touches classes 1 and 3
    for favoured, other in ((3, 1), (1, 3)):
        p = _uniform(cm)
        p[favoured - 1, 4:6, 4:6] = 0.5
        p[other - 1, 4:6, 4:6] = 0.2
        p[1, 4:6, 4:6] = 0.3
        out = apply_mmu(cm, p, min_pixels=9)
        assert (out[4:6, 4:6] == favoured).all()
        expected = cm.copy()
        expected[4:6, 4:6] = favoured
        np.testing.assert_array_equal(out, expected)


def test_never_picks_a_class_that_does_not_touch_the_patch():
    cm = np.ones((10, 10), np.uint8)
    cm[4:6, 4:6] = 2
    p = _uniform(cm)
    p[2, 4:6, 4:6] = 0.9  # class 3 is most probable but absent from the neighbourhood
    out = apply_mmu(cm, p, min_pixels=9)
    assert (out == 1).all()


def test_patch_at_the_mmu_stays_and_below_it_goes():
    """min_pixels=9 (3 x 3) is common practice, no source; here it is only a parameter value."""
    cm = np.ones((12, 12), np.uint8)
    cm[2:5, 2:5] = 2
    np.testing.assert_array_equal(apply_mmu(cm, _uniform(cm), min_pixels=9), cm)
    assert (apply_mmu(cm, _uniform(cm), min_pixels=10) == 1).all()


def test_nodata_untouched_and_isolated_patch_kept():
    cm = np.zeros((10, 10), np.uint8)
    cm[:, 5:] = 1
    cm[1, 1] = 2  # surrounded by nodata only: no valid neighbour, kept
    cm[7, 7] = 3  # inside class 1: merged
    out = apply_mmu(cm, _uniform(cm))
    np.testing.assert_array_equal(out == 0, cm == 0)
    assert out[1, 1] == 2 and out[7, 7] == 1


def test_connectivity_decides_what_a_patch_is():
    cm = np.ones((8, 8), np.uint8)
    cm[2, 2] = cm[3, 3] = 2
    p = _uniform(cm)
    assert (apply_mmu(cm, p, min_pixels=2, connectivity=4) == 1).all()  # two singletons
    np.testing.assert_array_equal(apply_mmu(cm, p, min_pixels=2, connectivity=8), cm)  # one 2-pixel patch
    with pytest.raises(ParameterError, match="connectivity"):
        apply_mmu(cm, p, connectivity=6)


@pytest.mark.reference
def test_no_patch_below_mmu_remains_and_idempotent():
    """Components recounted independently with scipy.ndimage.label (reference library, SciPy)."""
    cm, proba = _noisy_map()
    cm[:10, :10] = 0
    out = apply_mmu(cm, proba, min_pixels=9)
    structure = np.ones((3, 3), bool)
    for c in range(1, 7):
        lab, _ = ndimage.label(out == c, structure=structure)
        assert np.bincount(lab.ravel())[1:].min(initial=9) >= 9
    np.testing.assert_array_equal(out == 0, cm == 0)
    assert (out != cm).any()
    np.testing.assert_array_equal(apply_mmu(out, proba, min_pixels=9), out)


def test_input_checks():
    cm = np.ones((5, 5), np.uint8)
    with pytest.raises(ParameterError, match="proba must be"):
        apply_mmu(cm, np.ones((1, 4, 4)))
    with pytest.raises(ParameterError, match="min_pixels"):
        apply_mmu(cm, _uniform(cm), min_pixels=0)


GRID = Grid.from_bbox((500000, 6000000, 501500, 6001200), crs="EPSG:32633", resolution=10)


def test_polygon_areas_sum_to_raster_class_areas():
    cm, proba = _noisy_map(shape=GRID.shape)
    cm[:5, :] = 0
    cm = apply_mmu(cm, proba)
    gdf = polygonize(cm, GRID, class_names=NAMES, proba=proba)
    assert gdf.crs == GRID.pyproj_crs
    assert gdf.geometry.is_valid.all()
    counts = np.bincount(cm.ravel(), minlength=7)[1:]
    by_class = gdf.groupby("class_code")["area_ha"].sum().reindex(range(1, 7), fill_value=0).to_numpy()
    np.testing.assert_allclose(by_class, counts * GRID.pixel_area_m2 / 1e4, rtol=1e-12)
    np.testing.assert_array_equal(gdf["n_pixels"].to_numpy() * GRID.pixel_area_m2 / 1e4, gdf["area_ha"])
    lab, n = ndimage.label(cm > 0, structure=np.ones((3, 3)))  # total polygon count is at least the regions
    assert len(gdf) >= n
    summary = area_summary(gdf)
    assert summary["share"].sum() == pytest.approx(1.0)
    np.testing.assert_allclose(summary["area_ha"], by_class[by_class > 0])
    assert list(summary["class"]) == [NAMES[c - 1] for c in range(1, 7) if counts[c - 1]]


def test_polygon_statistics_on_a_constructed_map():
    g = Grid.from_bbox((0, 0, 60, 40), crs="EPSG:32633", resolution=10)
    cm = np.ones((4, 6), np.uint8)
    cm[1:3, 1:3] = 2  # 2 x 2 block: 400 m2, perimeter 80 m
    proba = np.zeros((2, 4, 6), np.float32)
    proba[0] = 0.75
    proba[1] = 0.25
    proba[1, 1:3, 1:3] = [[0.6, 0.8], [0.7, 0.9]]
    outside = np.zeros((4, 6), bool)
    outside[1, 1] = True
    gdf = polygonize(cm, g, class_names=("upland", "fen"), proba=proba, outside_aoa=outside)
    assert list(gdf["polygon_id"]) == ["P000001", "P000002"]  # first pixels (0, 0) then (1, 1)
    fen = gdf.iloc[1]
    assert fen["class"] == "fen" and fen["class_code"] == 2
    assert fen["area_ha"] == pytest.approx(0.04) and fen["perimeter_m"] == pytest.approx(80.0)
    assert fen["mean_probability"] == pytest.approx(0.75)
    assert fen["share_outside_aoa"] == pytest.approx(0.25)
    up = gdf.iloc[0]
    assert up["mean_probability"] == pytest.approx(0.75) and up["share_outside_aoa"] == 0
    assert up["perimeter_m"] == pytest.approx(200.0 + 80.0)  # outer ring plus the hole
    assert np.isnan(polygonize(cm, g, class_names=("upland", "fen"))["mean_probability"]).all()


def test_corner_touching_pixels_form_one_valid_polygon():
    g = Grid.from_bbox((0, 0, 40, 40), crs="EPSG:32633", resolution=10)
    cm = np.ones((4, 4), np.uint8)
    cm[1, 1] = cm[2, 2] = 2
    gdf = polygonize(cm, g, class_names=("upland", "fen"))
    assert gdf.geometry.is_valid.all()
    assert (gdf["class_code"] == 2).sum() == 1
    assert gdf.loc[gdf["class_code"] == 2, "area_ha"].iloc[0] == pytest.approx(0.02)
    four = polygonize(cm, g, class_names=("upland", "fen"), connectivity=4)
    assert (four["class_code"] == 2).sum() == 2


def test_ids_are_stable_and_follow_row_major_first_pixels():
    cm, proba = _noisy_map(shape=GRID.shape, seed=3)
    cm = apply_mmu(cm, proba)
    a = polygonize(cm, GRID, class_names=NAMES, proba=proba)
    b = polygonize(cm.copy(), GRID, class_names=NAMES, proba=proba)
    assert a["polygon_id"].is_unique
    np.testing.assert_array_equal(a["polygon_id"], b["polygon_id"])
    assert a.geometry.geom_equals(b.geometry).all()
    # polygon i's top-left-most pixel comes before polygon i + 1's in row-major order
    x0, _, _, y1 = GRID.bounds
    rows = np.round((y1 - a.geometry.bounds["maxy"]) / 10).astype(int)
    assert (np.diff(rows) >= 0).all()


def test_polygonize_checks_grid_and_names():
    cm = np.ones((3, 3), np.uint8)
    with pytest.raises(GridMismatchError, match="shape"):
        polygonize(cm, GRID, class_names=NAMES)
    g = Grid.from_bbox((0, 0, 30, 30), crs="EPSG:32633", resolution=10)
    with pytest.raises(ParameterError, match="no name"):
        polygonize(cm * 3, g, class_names=("a", "b"))


def test_geopackage_round_trip(tmp_path):
    cm, proba = _noisy_map(shape=GRID.shape, seed=7)
    cm = apply_mmu(cm, proba)
    outside = proba[0] > 0.5
    gdf = polygonize(cm, GRID, class_names=NAMES, proba=proba, outside_aoa=outside)
    path = write_inventory(gdf, tmp_path / "inventory.gpkg")
    assert not list(tmp_path.glob("*.partial"))
    back = gpd.read_file(path, layer=INVENTORY_LAYER)
    assert back.crs == GRID.pyproj_crs
    assert list(back["polygon_id"]) == list(gdf["polygon_id"])
    for col in ("class_code", "area_ha", "perimeter_m", "mean_probability", "share_outside_aoa"):
        np.testing.assert_allclose(back[col].to_numpy(float), gdf[col].to_numpy(float), rtol=1e-9)
    np.testing.assert_allclose(back.geometry.area, gdf.geometry.area, rtol=1e-12)
