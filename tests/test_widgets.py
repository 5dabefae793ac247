"""Widget panels driven programmatically (set values, click, wait, check), and the map previews.

The panels run on the shared light demo run of ``test_notebooks.py``.  Previews are checked on
small synthetic Cloud-Optimized GeoTIFFs whose overviews have closed-form values.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rasterio

from wetlandflow.errors import ParameterError, ProjectFileError
from wetlandflow.inputs.project import load_project
from wetlandflow.ui import previews, widgets


@pytest.fixture(scope="module")
def project_file(tmp_path_factory) -> Path:
    from test_notebooks import shared_notebook_run

    return shared_notebook_run(tmp_path_factory)


@pytest.fixture(scope="module")
def samples(project_file) -> pd.DataFrame:
    return pd.read_parquet(load_project(project_file).run_dir / "samples.parquet")


# -- progress arithmetic -------------------------------------------------------------------------------------
def test_estimate_is_the_pace_so_far_extrapolated():
    # closed form: a quarter done in 10 s leaves 30 s at the same pace
    assert widgets.estimate_remaining(10.0, 0.25) == pytest.approx(30.0)
    assert widgets.estimate_remaining(10.0, 0.0) is None and widgets.estimate_remaining(5.0, 1.0) is None
    assert [widgets.format_seconds(s) for s in (42, 185, 3720, None)] == [
        "42 s",
        "3 min 05 s",
        "1 h 02 min",
        "-",
    ]


def test_task_panel_shows_a_failure_and_frees_the_run_button():
    def job(control):
        control.report("step one", 1, 2)
        raise ValueError("bad input on purpose")

    panel = widgets.TaskPanel(job, interval=0.05)
    panel.run_button.click()
    assert panel.wait(30) == "failed"
    shown = panel.output.outputs[0]["data"]["text/plain"]
    assert "ValueError: bad input on purpose" in shown
    assert not panel.run_button.disabled and panel.cancel_button.disabled
    assert panel.status.value.startswith("failed: step one (1 of 2)")


# -- settings panels -----------------------------------------------------------------------------------------
def test_project_panel_saves_what_its_controls_say(project_file, tmp_path):
    panel = widgets.ProjectPanel(project_file, save_as=tmp_path / "sub" / "edited.toml")
    panel.features.domain_boxes["sar"].value = False
    panel.features.checkboxes["sar_temporal"].value = True
    panel.features.param_boxes[("sar_temporal", "speckle")].value = '"lee"'
    panel.features.param_boxes[("sar_temporal", "window")].value = "5"
    panel.model.controls["kind"].value = "random_forest"
    panel.model.controls["n_estimators"].value = 40
    panel.validation.controls["n_folds"].value = 4
    panel.output_settings.controls["mmu_pixels"].value = 4
    panel.save_button.click()
    assert panel.message.value == "saved edited.toml"

    saved = load_project(tmp_path / "sub" / "edited.toml")
    original = load_project(project_file)
    assert "sar_temporal" in saved.features.select and "water_frequency" not in saved.features.select
    assert saved.features.params == {"sar_temporal": {"speckle": "lee", "window": 5}}
    assert (saved.model.kind, saved.model.n_estimators) == ("random_forest", 40)
    assert saved.validation.n_folds == 4 and saved.output.mmu_pixels == 4
    # the file lives in another folder: its relative input paths were rewritten to reach the same files
    assert saved.dem.path == original.dem.path and saved.optical[0].mask == original.optical[0].mask
    assert saved.model.learning_rate == original.model.learning_rate  # untouched fields keep their value


def test_suspect_label_and_prior_controls_write_their_project_keys(project_file, tmp_path):
    panel = widgets.ProjectPanel(project_file, save_as=tmp_path / "priors.toml")
    names = load_project(project_file).classes.names
    assert set(panel.priors.share_boxes) == set(names)
    panel.validation.controls["suspect_labels"].value = "refit"
    panel.validation.controls["suspect_rule"].value = "majority"
    panel.priors.controls["adjust"].value = "given"
    for i, c in enumerate(names):
        panel.priors.share_boxes[c].value = float(i + 1)
    panel.save()
    saved = load_project(tmp_path / "priors.toml")
    assert (saved.validation.suspect_labels, saved.validation.suspect_rule) == ("refit", "majority")
    assert saved.priors.adjust == "given"
    assert saved.priors.shares == {c: float(i + 1) for i, c in enumerate(names)}

    # back to "em": the shares saved above leave the file (the parser refuses shares without "given")
    again = widgets.ProjectPanel(tmp_path / "priors.toml")
    assert again.priors.controls["adjust"].value == "given"
    assert again.priors.share_boxes[names[0]].value == 1.0
    again.priors.controls["adjust"].value = "em"
    again.priors.controls["sample_pixels"].value = 5000
    again.validation.controls["suspect_labels"].value = "off"
    again.save()
    resaved = load_project(tmp_path / "priors.toml")
    assert (resaved.priors.adjust, resaved.priors.sample_pixels, resaved.priors.shares) == ("em", 5000, {})
    assert resaved.validation.suspect_labels == "off"


def test_given_priors_without_shares_are_refused_naming_the_key(project_file, tmp_path):
    panel = widgets.ProjectPanel(project_file, save_as=tmp_path / "no_shares.toml")
    panel.priors.controls["adjust"].value = "given"  # every share left at 0
    with pytest.raises(ProjectFileError, match=r"priors\.shares"):
        panel.save()
    assert not (tmp_path / "no_shares.toml").exists()


def test_project_panel_refuses_an_invalid_setting_and_names_the_key(project_file, tmp_path):
    panel = widgets.ProjectPanel(project_file, save_as=tmp_path / "bad.toml")
    panel.validation.controls["n_folds"].value = 1
    with pytest.raises(ProjectFileError, match="n_folds"):
        panel.save()
    panel.save_button.click()
    assert "not saved" in panel.message.value and "validation.n_folds" in panel.message.value
    assert not (tmp_path / "bad.toml").exists()


def test_feature_picker_collapses_whole_domains_and_checks_parameters():
    picker = widgets.FeaturePicker(select=("optical", "slope"))
    terrain = [
        n
        for n, b in picker.checkboxes.items()
        if picker.table.set_index("name").loc[n, "domain"] == "terrain"
    ]
    assert picker.select == ("optical", "slope")
    picker.domain_boxes["terrain"].value = True
    assert all(picker.checkboxes[n].value for n in terrain) and picker.select == ("optical", "terrain")
    picker.param_boxes[("slope", "units")].value = "degrees"  # not JSON: a string needs quotes
    with pytest.raises(ProjectFileError, match="features.params.slope.units"):
        _ = picker.params


# -- cross-validation panel ----------------------------------------------------------------------------------
@pytest.mark.reference
def test_cv_panel_matches_scikit_learn_cross_val_predict(project_file, samples):
    """Reference: scikit-learn's ``cross_validate`` over a ``PredefinedSplit`` of the same folds
    (Pedregosa et al. 2011, Scikit-learn: Machine Learning in Python, JMLR 12), its fitted clones
    predicting their test indices, gives the same out-of-fold probabilities as the panel's loop."""
    from sklearn.model_selection import PredefinedSplit, cross_validate

    from wetlandflow.pipeline.run import make_model

    panel = widgets.CrossValidationPanel(load_project(project_file), samples)
    panel.model.controls["n_estimators"].value = 12
    panel.compare_random.value = True
    panel.run_button.click()
    assert panel.wait(300) == "done"
    assert set(panel.results) == {"blocks", "random"} and all(r.complete for r in panel.results.values())
    assert panel.progress.value == 1.0 and panel.status.value.startswith("done")
    html = [o["data"].get("text/html", "") for o in panel.output.outputs]
    assert any("overall_accuracy" in h for h in html) and any(
        "image/png" in o["data"] for o in panel.output.outputs
    )

    blocks = panel.results["blocks"]
    features = widgets.features_of(samples)
    X = samples[features].to_numpy(np.float32)
    ref = cross_validate(
        make_model(panel.settings()),
        X,
        samples["class"].to_numpy(),
        cv=PredefinedSplit(blocks.folds),
        return_estimator=True,
        return_indices=True,
    )
    expected = np.full_like(blocks.oof, np.nan)
    for model, test in zip(ref["estimator"], ref["indices"]["test"], strict=True):
        expected[test] = model.predict_scheme_proba(X[test])
    np.testing.assert_allclose(blocks.oof, expected, rtol=1e-5, atol=1e-6)


def test_cv_cancel_stops_between_folds_and_keeps_the_finished_fold(project_file, samples, monkeypatch):
    from wetlandflow.models.classifier import WetlandClassifier

    fits = []
    original_fit = WetlandClassifier.fit
    monkeypatch.setattr(
        WetlandClassifier, "fit", lambda self, *a, **k: fits.append(1) or original_fit(self, *a, **k)
    )
    panel = widgets.CrossValidationPanel(load_project(project_file), samples)
    panel.model.controls["n_estimators"].value = 12
    task = panel.start()
    task.control.subscribe(lambda c: c.cancel() if c.done >= 1 else None)  # press cancel once fold 1 is done
    assert panel.wait(300) == "cancelled"
    assert len(fits) == 1, "no fold may start after the cancel"
    done = panel.results["blocks"]
    assert len(done.per_fold) == 1 and not done.complete
    first = done.folds == done.per_fold["fold"].iloc[0]
    assert np.isfinite(done.oof[first]).all() and np.isnan(done.oof[~first]).all()
    assert "folds_done" in "".join(o["data"].get("text/html", "") for o in panel.output.outputs)
    assert not panel.run_button.disabled


# -- run panel -----------------------------------------------------------------------------------------------
def test_run_panel_cancel_keeps_the_steps_finished(project_file, tmp_path):
    settings = widgets.ProjectPanel(project_file, save_as=project_file.with_name("cancelled.toml"))
    settings.raw["project"]["output_dir"] = "runs/cancelled"
    panel = widgets.RunPanel(settings)
    task = panel.start()
    task.control.subscribe(lambda c: c.cancel() if c.stage == "step features" else None)
    assert panel.wait(600) == "cancelled"
    run_dir = project_file.parent / "runs" / "cancelled"
    steps = json.loads((run_dir / "manifest.json").read_text())["steps"]
    assert steps["inputs"]["status"] == "done"
    assert steps["features"]["status"] == "cancelled" and "Cancelled" in steps["features"]["error"]
    assert set(steps) == {"inputs", "features"}, "no step after the cancelled one may start"
    assert not (run_dir / "features.zarr").exists() and not list(run_dir.glob("*.partial"))
    shown = "".join(o["data"].get("text/html", "") for o in panel.output.outputs)
    assert "features" in shown and "cancelled" in shown


def test_run_panel_reruns_only_what_a_changed_setting_touches(project_file):
    """On a copy of the shared run, a new minimum mapping unit reruns the inventory and reuses the rest."""
    shared = load_project(project_file).run_dir
    shutil.copytree(shared, shared.with_name("panel"))
    settings = widgets.ProjectPanel(project_file, save_as=project_file.with_name("panel.toml"))
    settings.raw["project"]["output_dir"] = "runs/panel"
    settings.output_settings.controls["mmu_pixels"].value = 4
    panel = widgets.RunPanel(settings)
    panel.run_button.click()
    assert panel.wait(600) == "done", panel.output.outputs
    steps = panel.task.result.manifest["steps"]
    assert steps["inventory"]["mmu_pixels"] == 4 and not steps["inventory"].get("reused")
    assert all(steps[s].get("reused") for s in ("features", "samples", "validation", "model", "mapping"))
    kinds = [next(iter(o["data"])) for o in panel.output.outputs]
    assert kinds == ["text/plain", "text/html", "image/png"]  # summary, areas, final class map
    assert panel.progress.value == 1.0


# -- map viewer and previews ---------------------------------------------------------------------------------
def test_map_viewer_lists_every_band_and_redraws_in_place(project_file):
    project = load_project(project_file)
    viewer = widgets.MapViewer(project.run_dir, project.classes.names, max_px=120)
    assert {f"probability: {c}" for c in project.classes.names} <= set(viewer.layer.options)
    assert {"class_final", "confidence: margin", "applicability: inside_aoa"} <= set(viewer.layer.options)
    for layer in ("class_final", "probability: bog"):
        viewer.layer.value = layer
        viewer.show_button.click()
        assert len(viewer.output.outputs) == 1 and "image/png" in viewer.output.outputs[0]["data"]


def _cog(tmp_path: Path, values: np.ndarray, resampling: str) -> Path:
    """A single-band COG of ``values`` (10 m pixels) with overviews, through the library's writer."""
    from affine import Affine

    from wetlandflow.mapping.predict import build_cog

    stage = tmp_path / f"stage_{resampling}.tif"
    profile = {
        "driver": "GTiff",
        "width": values.shape[1],
        "height": values.shape[0],
        "count": 1,
        "dtype": values.dtype.name,
        "crs": "EPSG:32633",
        "transform": Affine(10, 0, 500000, 0, -10, 6001000),
        "tiled": True,
        "blockxsize": 256,
        "blockysize": 256,
    }
    with rasterio.open(stage, "w", **profile) as dst:
        dst.write(values[None])
    return build_cog(stage, tmp_path / f"cog_{resampling}.tif", overview_resampling=resampling)


@pytest.mark.reference
def test_preview_reads_the_average_overview_which_is_the_block_mean(tmp_path):
    """Reference: GDAL's ``average`` overview of factor 2 is the mean of each 2 x 2 block (GDAL
    documentation of gdaladdo / the COG driver's OVERVIEW_RESAMPLING); computed here in closed form."""
    values = np.arange(1024 * 1024, dtype=np.float32).reshape(1024, 1024) % 997
    path = _cog(tmp_path, values, "average")
    with rasterio.open(path) as src:
        assert src.overviews(1)[:2] == [2, 4]
    da = previews.read_preview(path, max_px=512)
    assert da.attrs["overview_level"] == 0 and da.shape == (1, 512, 512)
    block_mean = values.reshape(512, 2, 512, 2).mean(axis=(1, 3))
    np.testing.assert_allclose(da.values[0], block_mean, rtol=1e-6)
    # pixel centres of the overview: origin + 20 m * (i + 0.5)
    np.testing.assert_allclose(da["x"].values[:2], [500010.0, 500030.0])
    np.testing.assert_allclose(da["y"].values[:2], [6000990.0, 6000970.0])
    coarser = previews.read_preview(path, max_px=200)
    assert coarser.attrs["overview_level"] == 1 and max(coarser.shape[1:]) <= 200


def test_small_rasters_are_read_at_their_own_size_and_class_codes_keep_their_values(tmp_path):
    codes = np.repeat(np.repeat(np.arange(1, 7, dtype=np.uint8).reshape(2, 3), 100, axis=0), 100, axis=1)
    path = _cog(tmp_path, codes, "mode")
    small = previews.read_preview(path, max_px=600)
    assert small.attrs["overview_level"] == -1 and small.shape == (1, 200, 300)
    tiny = previews.read_preview(path, max_px=60)
    assert max(tiny.shape[1:]) == 60 and set(np.unique(tiny.values)) <= set(range(1, 7))
    with pytest.raises(ParameterError, match="max_px"):
        previews.read_preview(path, max_px=4)


def test_class_map_uses_the_scheme_palette_with_a_legend(tmp_path):
    from matplotlib.colors import to_hex

    from wetlandflow.models.classifier import ClassScheme

    names = ("upland", "open_water", "marsh", "swamp", "fen", "bog")
    codes = np.repeat(np.arange(0, 7, dtype=np.uint8), 20)[None, :].repeat(40, axis=0)
    path = _cog(tmp_path, codes, "mode")
    fig = previews.plot_class_map(path, names, max_px=100)
    ax = fig.axes[0]
    cmap = ax.images[0].get_cmap()
    expected = ClassScheme(names, {}).colours
    assert [to_hex(cmap(i)) for i in range(1, 7)] == [expected[n] for n in names]
    assert cmap(0)[3] == 0.0  # no data is transparent
    assert [t.get_text() for t in ax.get_legend().get_texts()] == list(names)
    assert any(t.get_text() == "N" for t in ax.texts)  # north arrow


def test_coarsened_cube_previews_are_block_means_ignoring_nan():
    import xarray as xr

    values = np.arange(36, dtype=float).reshape(6, 6)
    values[0, 0] = np.nan
    da = xr.DataArray(
        values, dims=("y", "x"), coords={"y": np.arange(6)[::-1] * 10.0, "x": np.arange(6) * 10.0}
    )
    out = previews.coarsen_preview(da, max_px=16)
    np.testing.assert_array_equal(out.values, values)  # already small: unchanged
    big = xr.concat([da] * 4, dim="x").assign_coords(x=np.arange(24) * 10.0)
    out = previews.coarsen_preview(big, max_px=16)
    assert out.shape == (3, 12) and out.attrs["preview_factor"] == 2
    assert out.values[0, 0] == pytest.approx(
        np.nanmean([values[0, 0], values[0, 1], values[1, 0], values[1, 1]])
    )


def test_preview_grid_covers_the_grid_with_whole_pixel_factors():
    from wetlandflow.inputs.grid import Grid

    grid = Grid.from_bbox((500000, 6000000, 513070, 6004010), crs="EPSG:32633", resolution=10)
    coarse = previews.preview_grid(grid, max_px=200)
    factor = coarse.resolution / grid.resolution
    assert factor == int(factor) and max(coarse.shape) <= 200
    assert coarse.bounds[0] == grid.bounds[0] and coarse.bounds[3] == grid.bounds[3]
    assert coarse.bounds[2] >= grid.bounds[2] and coarse.bounds[1] <= grid.bounds[1]


def test_monitor_panel_controls_write_the_monitor_keys(tmp_path):
    """The monitoring panel's controls become [monitor] keys, validated by the project parser."""
    from wetlandflow.demo.landscape import make_demo
    from wetlandflow.errors import ProjectFileError
    from wetlandflow.ui.widgets import MonitorPanel

    panel = MonitorPanel(make_demo(tmp_path, size=64, seed=3, archive=True))
    c = panel.settings.controls
    c["metrics"].value = ("water", "ndvi")
    c["aggregate"].value = "max"
    c["water.sar_threshold"].value = "-16.5"
    c["water.period"].value = "month"
    m = panel.project().monitor
    assert m.metrics == ("water", "ndvi") and m.aggregate == "max"
    assert m.water.sar_threshold == -16.5 and m.water.period == "month"
    assert m.baci is not None and m.baci.impact == ("fen_upslope", "fen_downslope")  # file keys kept
    c["water.optical_threshold"].value = "bright"
    with pytest.raises(ProjectFileError, match="monitor.water.optical_threshold"):
        panel.project()
