"""Training samples from plots: pixel selection, extraction, and the plot checks."""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
from shapely.geometry import Point, Polygon, box

from wetlandflow.errors import SamplesError
from wetlandflow.inputs.grid import Grid
from wetlandflow.training.samples import (
    class_balance,
    drop_incomplete,
    extract_samples,
    plot_pixels,
    read_plots,
)

GRID = Grid.from_bbox((0, 0, 1000, 1000), crs="EPSG:32633", resolution=10)
CLASSES = ("upland", "fen", "bog")


def plots_file(tmp_path, geoms, labels, ids=None, crs="EPSG:32633"):
    ids = ids or [f"P{i}" for i in range(len(geoms))]
    gdf = gpd.GeoDataFrame({"plot_id": ids, "label": labels}, geometry=geoms, crs=crs)
    path = tmp_path / "plots.gpkg"
    gdf.to_file(path, driver="GPKG")
    return path


def read(path, aoi=None):
    return read_plots(path, class_field="label", id_field="plot_id", classes=CLASSES, grid=GRID, aoi=aoi)


def test_square_plot_takes_pixel_centres_inside(tmp_path):
    # a 50 m x 50 m square on pixel edges contains exactly 5 x 5 pixel centres
    p = read(plots_file(tmp_path, [box(100, 100, 150, 150)], ["fen"]))
    px = plot_pixels(p, GRID)
    assert len(px) == 25
    assert set(px["row"]) == set(range(85, 90)) and set(px["col"]) == set(range(10, 15))


def test_inward_buffer_drops_edge_pixels(tmp_path):
    p = read(plots_file(tmp_path, [box(100, 100, 150, 150)], ["fen"]))
    assert len(plot_pixels(p, GRID, inward_buffer_m=10)) == 9


def test_points_take_their_pixel_and_cap_subsamples(tmp_path):
    p = read(plots_file(tmp_path, [Point(455, 545), box(0, 0, 200, 200)], ["bog", "upland"]))
    px = plot_pixels(p, GRID, max_pixels_per_plot=30, seed=1)
    pt = px[px.plot_id == "P0"]
    assert len(pt) == 1 and pt.row.item() == 45 and pt.col.item() == 45
    assert (px.plot_id == "P1").sum() == 30
    again = plot_pixels(p, GRID, max_pixels_per_plot=30, seed=1)
    pd.testing.assert_frame_equal(px, again)


def test_plots_in_another_crs_are_reprojected(tmp_path):
    sq = gpd.GeoSeries([box(100, 100, 150, 150)], crs="EPSG:32633").to_crs("EPSG:4326")
    p = read(plots_file(tmp_path, list(sq), ["fen"], crs="EPSG:4326"))
    assert abs(len(plot_pixels(p, GRID)) - 25) <= 2


def test_extract_samples_values_and_coordinates(tmp_path):
    p = read(plots_file(tmp_path, [box(100, 100, 120, 120)], ["fen"]))
    cube = GRID.empty("a").to_dataset()
    cube["a"][:] = np.arange(GRID.height * GRID.width, dtype="float32").reshape(GRID.shape)
    s = extract_samples(cube, plot_pixels(p, GRID), GRID)
    assert list(s.columns[:4]) == ["plot_id", "class", "x", "y"]
    rows, cols = GRID.rowcol(s.x.values, s.y.values)
    np.testing.assert_array_equal(s["a"].values, rows * GRID.width + cols)


def test_unknown_label_is_named(tmp_path):
    with pytest.raises(SamplesError, match=r"\['fenn'\]"):
        read(plots_file(tmp_path, [box(0, 0, 50, 50)], ["fenn"]))


def test_duplicate_ids_with_different_labels(tmp_path):
    path = plots_file(tmp_path, [box(0, 0, 50, 50), box(200, 200, 250, 250)], ["fen", "bog"], ids=["A", "A"])
    with pytest.raises(SamplesError, match="duplicate plot id"):
        read(path)


def test_self_intersecting_plot(tmp_path):
    bowtie = Polygon([(0, 0), (50, 50), (50, 0), (0, 50)])
    with pytest.raises(SamplesError, match="invalid"):
        read(plots_file(tmp_path, [bowtie], ["fen"]))


def test_plot_outside_aoi(tmp_path):
    aoi = gpd.GeoDataFrame(geometry=[box(0, 0, 500, 500)], crs="EPSG:32633")
    path = plots_file(tmp_path, [box(10, 10, 40, 40), box(700, 700, 740, 740)], ["fen", "bog"])
    with pytest.raises(SamplesError, match=r"outside the AOI.*P1"):
        read(path, aoi=aoi)


def test_missing_class_field(tmp_path):
    path = plots_file(tmp_path, [box(0, 0, 50, 50)], ["fen"])
    with pytest.raises(SamplesError, match="no class field 'kind'"):
        read_plots(path, class_field="kind", id_field="plot_id", classes=CLASSES, grid=GRID)


def test_balance_and_missing_policy():
    s = pd.DataFrame({"plot_id": ["a", "a", "b"], "class": ["fen", "fen", "bog"], "x": 0.0, "y": 0.0,
                      "f": [1.0, np.nan, 2.0], "g": [1.0, 1.0, 1.0]})
    assert class_balance(s).set_index("class").loc["fen", "pixels"] == 2
    assert len(drop_incomplete(s, ["f", "g"])) == 2
    assert len(drop_incomplete(s, ["f", "g"], policy="keep")) == 3
    assert len(drop_incomplete(s, ["f"], policy="keep")) == 2  # rows with every feature NaN always go
