"""Window-by-window prediction: identical to in-memory prediction, valid COGs, confidence layers."""

from __future__ import annotations

import numpy as np
import pytest
import rasterio
import xarray as xr

from wetlandflow.grid import Grid, attach
from wetlandflow.mapping import class_areas, confidence_layers, predict_map, windows
from wetlandflow.models import WetlandClassifier

GRID = Grid.from_bbox((0, 0, 3000, 2000), crs="EPSG:32633", resolution=10)
CLASSES = ("upland", "fen", "bog")


def test_windows_cover_the_grid_once():
    cover = np.zeros(GRID.shape, int)
    for w in windows(GRID, 128):
        cover[w.row_off:w.row_off + w.height, w.col_off:w.col_off + w.width] += 1
    assert (cover == 1).all()


@pytest.mark.reference
def test_confidence_layers_definitions():
    """Shannon entropy normalised by ln K is 1 for the uniform distribution and 0 for a certain one
    (Shannon 1948, A mathematical theory of communication)."""
    p = np.array([[1 / 3, 1 / 3, 1 / 3], [1.0, 0.0, 0.0], [0.5, 0.3, 0.2]])
    mx, margin, ent = confidence_layers(p)
    np.testing.assert_allclose(mx, [1 / 3, 1, 0.5])
    np.testing.assert_allclose(margin, [0, 1, 0.2], atol=1e-7)
    np.testing.assert_allclose(ent, [1, 0, -(0.5 * np.log(0.5) + 0.3 * np.log(0.3) + 0.2 * np.log(0.2)) / np.log(3)],
                               atol=1e-6)


def synthetic_cube():
    rng = np.random.default_rng(0)
    yy, xx = np.mgrid[0:GRID.height, 0:GRID.width]
    a = (np.sin(xx / 20) + rng.normal(0, 0.2, GRID.shape)).astype("float32")
    b = (np.cos(yy / 15) + rng.normal(0, 0.2, GRID.shape)).astype("float32")
    b[:5, :5] = np.nan
    cube = xr.Dataset({"a": (("y", "x"), a), "b": (("y", "x"), b)}, coords=GRID.coords())
    valid = xr.DataArray(np.ones(GRID.shape, bool), dims=("y", "x"), coords=GRID.coords())
    valid[:, -20:] = False
    return attach(cube, GRID).chunk({"y": 64, "x": 64}), valid


def test_windowed_prediction_equals_in_memory(tmp_path):
    cube, valid = synthetic_cube()
    X = np.stack([cube.a.values.ravel(), cube.b.values.ravel()], 1)
    y = np.where(X[:, 0] > 0.5, "fen", np.where(X[:, 1] > 0, "bog", "upland"))
    model = WetlandClassifier(classes=CLASSES, n_estimators=20, max_depth=3).fit(X[::10], y[::10])
    paths = predict_map(model, cube, ["a", "b"], GRID, tmp_path / "maps", valid=valid, class_names=CLASSES,
                        window_size=96, progress=False)
    with rasterio.open(paths["probability"]) as src:
        proba = src.read()
        assert src.descriptions == CLASSES
        assert src.crs.to_string() == GRID.crs and src.transform == GRID.transform
        assert src.overviews(1), "COG must carry overviews"
    with rasterio.open(paths["class"]) as src:
        cls = src.read(1)
        assert src.nodata == 0
    ok = valid.values
    expected = model.predict_proba(X).reshape(GRID.height, GRID.width, 3).transpose(2, 0, 1)
    np.testing.assert_allclose(proba[:, ok], expected[:, ok], atol=1e-6)
    assert np.isnan(proba[:, ~ok]).all() and (cls[~ok] == 0).all()
    np.testing.assert_array_equal(cls[ok], np.argmax(proba[:, ok], axis=0) + 1)
    areas = class_areas(paths["class"], CLASSES, GRID.pixel_area_m2)
    assert areas["pixels"].sum() == ok.sum()
    assert not (tmp_path / "maps" / ".stage").exists()
