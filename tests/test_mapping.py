"""Window-by-window prediction: identical to in-memory prediction, valid COGs, confidence layers."""

from __future__ import annotations

import numpy as np
import pytest
import rasterio
import xarray as xr

from wetlandflow.inputs.grid import Grid, attach
from wetlandflow.mapping.predict import class_areas, confidence_layers, predict_map, windows
from wetlandflow.models.classifier import WetlandClassifier

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
    expected = model.predict_scheme_proba(X).reshape(GRID.height, GRID.width, 3).transpose(2, 0, 1)
    np.testing.assert_allclose(proba[:, ok], expected[:, ok], atol=1e-6)
    assert np.isnan(proba[:, ~ok]).all() and (cls[~ok] == 0).all()
    np.testing.assert_array_equal(cls[ok], np.argmax(proba[:, ok], axis=0) + 1)
    areas = class_areas(paths["class"], CLASSES, GRID.pixel_area_m2)
    assert areas["pixels"].sum() == ok.sum()
    assert not (tmp_path / "maps" / ".stage").exists()


class _Interrupting:
    """A model wrapper that counts windows and dies at the n-th one, like a killed run."""

    def __init__(self, model, die_at=None):
        self.model, self.die_at, self.calls = model, die_at, 0
        self.kind = model.kind
        self.model_ = model.model_
        self.scheme_ = model.scheme_

    def predict_scheme_proba(self, X):
        self.calls += 1
        if self.die_at is not None and self.calls == self.die_at:
            raise KeyboardInterrupt("simulated interruption")
        return self.model.predict_scheme_proba(X)


def _fitted(cube):
    X = np.stack([cube.a.values.ravel(), cube.b.values.ravel()], 1)
    y = np.where(X[:, 0] > 0.5, "fen", np.where(X[:, 1] > 0, "bog", "upland"))
    return WetlandClassifier(classes=CLASSES, n_estimators=20, max_depth=3).fit(X[::10], y[::10]), X


def test_interrupted_prediction_resumes_from_written_windows(tmp_path):
    cube, valid = synthetic_cube()
    model, _ = _fitted(cube)
    kw = dict(valid=valid, class_names=CLASSES, window_size=96, progress=False)
    counting = _Interrupting(model)
    whole = predict_map(counting, cube, ["a", "b"], GRID, tmp_path / "whole", **kw)
    dying = _Interrupting(model, die_at=4)
    with pytest.raises(KeyboardInterrupt):
        predict_map(dying, cube, ["a", "b"], GRID, tmp_path / "resumed", **kw)
    assert (tmp_path / "resumed" / ".stage" / "windows_done.json").exists()
    again = _Interrupting(model)
    resumed = predict_map(again, cube, ["a", "b"], GRID, tmp_path / "resumed", **kw)
    assert again.calls == counting.calls - 3, "the three finished windows must not be predicted again"
    for layer in ("probability", "class", "confidence"):
        with rasterio.open(whole[layer]) as a, rasterio.open(resumed[layer]) as b:
            np.testing.assert_array_equal(a.read(), b.read())


def test_applicability_layers_match_the_array_computation(tmp_path):
    from wetlandflow.mapping.applicability import applicability_map, fit_applicability

    cube, valid = synthetic_cube()
    model, X = _fitted(cube)
    train = X[::10][np.isfinite(X[::10]).all(axis=1)]
    aoa = fit_applicability(train, np.ones(2), np.arange(len(train)) % 4)
    paths = predict_map(model, cube, ["a", "b"], GRID, tmp_path / "maps", valid=valid, class_names=CLASSES,
                        window_size=96, aoa_model=aoa, progress=False)
    expected = applicability_map(aoa, cube, ["a", "b"], valid).compute()
    with rasterio.open(paths["dissimilarity"]) as src:
        np.testing.assert_allclose(src.read(1), expected["di"].values, rtol=1e-6, equal_nan=True)
    with rasterio.open(paths["applicability"]) as src:
        np.testing.assert_array_equal(src.read(1), expected["inside_aoa"].values)


def test_memory_budget_refuses_an_oversized_window(tmp_path):
    from wetlandflow.errors import BudgetError

    cube, valid = synthetic_cube()
    model, _ = _fitted(cube)
    with pytest.raises(BudgetError, match="memory budget.*output.chunk_size"):
        predict_map(model, cube, ["a", "b"], GRID, tmp_path / "maps", valid=valid, class_names=CLASSES,
                    window_size=4096, memory_budget_gb=0.01, progress=False)
