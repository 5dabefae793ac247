"""Benchmark cases for wall-to-wall mapping: ``predict_map`` against plain baselines; the hierarchical gate.

Work is counted in valid pixels (the pixels sent to the model), so every
throughput is in Mpx/s; ``end_to_end`` counts grid pixels instead.

Input data (a synthetic feature cube, its GeoTIFF copy, the demo project and
its feature cube) is built once per size into a cache folder
(``WETLANDFLOW_BENCH_DIR``, default ``<system temp>/wetlandflow-bench``) by a
separate process, so building it never counts in a variant's peak memory.
Each variant is timed once after a warm-up on a 256 x 256 crop: one run at
full size takes tens of seconds on two cores, and the ratios come from one
suite run.  Figures the harness has no field for (the gate's probability
error, the run's per-step seconds) are printed to stderr.
"""

from __future__ import annotations

import json
import multiprocessing as mp
import os
import shutil
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
from _harness import case

CLASSES = ("upland", "open_water", "marsh", "swamp", "fen", "bog")
PARENTS = {"wetland": ("marsh", "swamp", "fen", "bog")}
N_FEATURES = 40
FEATURES = [f"f{i:02d}" for i in range(N_FEATURES)]
WINDOW = 512
WARM = 256  # warm-up crop: compiles nothing, but opens every library and file once
PIXEL_M = 10.0
NODATA_SHARE = 0.10  # a disc of no data in the middle of the synthetic grid


# -- cache and builders --------------------------------------------------------------------------------------
def _cache() -> Path:
    root = Path(os.environ.get("WETLANDFLOW_BENCH_DIR", Path(tempfile.gettempdir()) / "wetlandflow-bench"))
    root.mkdir(parents=True, exist_ok=True)
    return root


def _built(name: str, builder: Callable[..., None], *args) -> Path:
    """``cache/name``, built by ``builder(path, *args)`` in a separate process the first time."""
    path = _cache() / name
    if (path / ".done").exists():
        return path
    shutil.rmtree(path, ignore_errors=True)
    path.mkdir(parents=True)
    proc = mp.get_context("spawn").Process(target=builder, args=(path, *args))
    proc.start()
    proc.join()
    if proc.exitcode != 0:
        raise RuntimeError(f"building benchmark data {path} failed (exit code {proc.exitcode})")
    (path / ".done").touch()
    return path


def _grid(n: int):
    from affine import Affine

    from wetlandflow.inputs.grid import Grid

    return Grid("EPSG:32633", Affine(PIXEL_M, 0.0, 500000.0, 0.0, -PIXEL_M, 6000000.0), n, n)


def _training(seed: int = 0, n: int = 4000) -> tuple[np.ndarray, np.ndarray]:
    """Samples drawn like the cube's pixels (independent N(0, 1) features); labels from six noisy projections,
    so that the boosted trees grow to full depth."""
    rng = np.random.default_rng(seed)
    w = rng.normal(size=(N_FEATURES, len(CLASSES))).astype(np.float32)
    X = rng.normal(size=(n, N_FEATURES)).astype(np.float32)
    y = np.argmax(X @ w + rng.normal(0, 1.0, (n, len(CLASSES))), axis=1)
    return X, np.array(CLASSES)[y]


def _model(n_rounds: int):
    """XGBoost WetlandClassifier of ``n_rounds`` x 6 trees (100 rounds = 600 trees), depth 6, 2 threads."""
    from wetlandflow.models.classifier import WetlandClassifier

    X, y = _training()
    return WetlandClassifier(classes=CLASSES, n_estimators=n_rounds, max_depth=6, n_threads=2).fit(X, y)


def _build_synthetic(path: Path, n: int) -> None:
    """40 float32 N(0, 1) features on an n x n grid, NaN in a central disc (10 % of the pixels), as Zarr."""
    import dask.array as da
    import xarray as xr

    from wetlandflow.features.cube import save_cube

    grid = _grid(n)
    r2 = NODATA_SHARE * n * n / np.pi
    yy = da.arange(n, chunks=WINDOW)[:, None] - n / 2
    xx = da.arange(n, chunks=WINDOW)[None, :] - n / 2
    valid = (yy * yy + xx * xx) > r2
    rng = da.random.default_rng(1)
    data = {f: (("y", "x"), da.where(valid, rng.standard_normal((n, n), chunks=WINDOW, dtype=np.float32),
                                     np.float32(np.nan))) for f in FEATURES}
    data["valid"] = (("y", "x"), valid.astype(np.uint8))
    save_cube(xr.Dataset(data, coords=grid.coords()), path / "cube.zarr", chunk=WINDOW)


def _synthetic(n: int) -> Path:
    return _built(f"synthetic_{n}", _build_synthetic, n) / "cube.zarr"


def _build_stack_tif(path: Path, n: int) -> None:
    """The synthetic cube copied window by window into one 40-band tiled float32 GeoTIFF (uncompressed)."""
    import rasterio

    from wetlandflow.features.cube import open_cube
    from wetlandflow.mapping.predict import windows

    grid = _grid(n)
    cube = open_cube(_synthetic(n))
    profile = {"driver": "GTiff", "width": n, "height": n, "count": N_FEATURES, "dtype": "float32",
               "crs": grid.crs, "transform": grid.transform, "nodata": np.nan, "tiled": True,
               "blockxsize": WINDOW, "blockysize": WINDOW, "interleave": "pixel"}
    with rasterio.open(path / "stack.tif", "w", **profile) as dst:
        dst.descriptions = tuple(FEATURES)
        for w in windows(grid, WINDOW):
            sl = {"y": slice(w.row_off, w.row_off + w.height), "x": slice(w.col_off, w.col_off + w.width)}
            dst.write(np.stack([cube[f].isel(sl).values for f in FEATURES]), window=w)


def _stack_tif(n: int) -> Path:
    return _built(f"stack_{n}", _build_stack_tif, n) / "stack.tif"


def _build_demo(path: Path, size: int) -> None:
    """The demo project at ``size`` x ``size`` pixels, its feature cube (Zarr) and its samples table."""
    from wetlandflow.demo.landscape import make_demo
    from wetlandflow.features.cube import build_cube, save_cube
    from wetlandflow.inputs.layers import load_inputs, project_grid, read_aoi
    from wetlandflow.inputs.project import load_project
    from wetlandflow.pipeline.run import feature_names
    from wetlandflow.training.samples import drop_incomplete, extract_samples, plot_pixels, read_plots

    t0 = time.perf_counter()
    project = load_project(make_demo(path, size=size, seed=0))
    t1 = time.perf_counter()
    grid = project_grid(project)
    inputs = load_inputs(project, grid)
    cube = save_cube(build_cube(inputs, project.features.select, project.features.params),
                     path / "features.zarr", chunk=project.output.chunk_size)
    pf = project.plots
    plots = read_plots(pf.path, class_field=pf.class_field, id_field=pf.id_field,
                       classes=project.classes.names, grid=grid, aoi=read_aoi(project))
    px = plot_pixels(plots, grid, inward_buffer_m=project.samples.inward_buffer_m,
                     max_pixels_per_plot=project.samples.max_pixels_per_plot, seed=project.project.seed)
    samples = extract_samples(cube, px, grid)
    samples = drop_incomplete(samples, feature_names(samples), policy=project.samples.missing)
    samples.to_parquet(path / "samples.parquet")
    print(f"[demo {size}] make_demo {t1 - t0:.1f} s, cube and samples {time.perf_counter() - t1:.1f} s",
          file=sys.stderr)


def _demo(size: int) -> Path:
    return _built(f"demo_{size}", _build_demo, size)


# -- timing helpers ------------------------------------------------------------------------------------------
class _Clock:
    """Wall seconds of a block (what the harness gets) and this process's CPU seconds (all threads), the
    latter printed to stderr: on a shared machine the CPU time is the steadier of the two."""

    def __init__(self, label: str):
        self.label = label

    def __enter__(self) -> _Clock:
        self.wall, self.cpu = time.perf_counter(), time.process_time()
        return self

    def __exit__(self, *exc) -> None:
        self.wall, self.cpu = time.perf_counter() - self.wall, time.process_time() - self.cpu
        print(f"[{self.label}] wall {self.wall:.2f} s, cpu {self.cpu:.2f} s", file=sys.stderr)


def _map_once(model, cube, features: list[str], grid, valid) -> float:
    """Seconds of one ``predict_map`` over the whole grid, after a warm-up on a 256 x 256 crop."""
    from wetlandflow.inputs.grid import Grid
    from wetlandflow.mapping.predict import predict_map

    crop = {"y": slice(0, WARM), "x": slice(0, WARM)}
    small = Grid(grid.crs, grid.transform, min(WARM, grid.width), min(WARM, grid.height))
    with tempfile.TemporaryDirectory(dir=_cache()) as out:
        predict_map(model, cube.isel(crop), features, small, Path(out) / "warm", valid=valid.isel(crop),
                    class_names=CLASSES, window_size=WINDOW, progress=False)
        with _Clock(f"predict_map {grid.height} x {grid.width}") as clock:
            predict_map(model, cube, features, grid, Path(out) / "maps", valid=valid, class_names=CLASSES,
                        window_size=WINDOW, progress=False)
        return clock.wall


def _synthetic_map(n: int, n_rounds: int) -> tuple[int, float]:
    from wetlandflow.features.cube import open_cube

    cube = open_cube(_synthetic(n))
    valid = cube["valid"].astype(bool)
    model = _model(n_rounds)
    seconds = _map_once(model, cube, FEATURES, _grid(n), valid)
    return int(valid.sum()), seconds


def _predict_size(quick: bool) -> int:
    return 1024 if quick else 2048


# -- predict: the pipeline against the bare booster ----------------------------------------------------------
predict = case("predict", unit="Mpx/s", baseline="inplace_predict",
               description="prediction throughput per valid pixel: predict_map over a synthetic "
                           "40-feature float32 Zarr cube (n x n, n = 2048, quick 1024, 10 % no data; "
                           "windows 512) with an XGBoost WetlandClassifier of 600 trees (100 rounds x 6 "
                           "classes, depth 6), against Booster.inplace_predict on the same valid pixels "
                           "held in memory")


@predict.variant("inplace_predict")
def _predict_raw(quick: bool, repeat: int):
    from wetlandflow.features.cube import open_cube

    cube = open_cube(_synthetic(_predict_size(quick)))
    ok = cube["valid"].values.astype(bool).ravel()
    X = np.empty((int(ok.sum()), N_FEATURES), np.float32)
    for j, f in enumerate(FEATURES):  # one feature at a time: the pixels only, never the whole stack twice
        X[:, j] = cube[f].values.ravel()[ok]
    booster = _model(100).model_.get_booster()
    booster.inplace_predict(X[:WARM * WARM])
    with _Clock(f"inplace_predict {X.shape[0]} pixels") as clock:
        booster.inplace_predict(X)
    return X.shape[0], clock.wall


@predict.variant("predict_map")
def _predict_pipeline(quick: bool, repeat: int):
    return _synthetic_map(_predict_size(quick), 100)


# -- gating: hierarchical model with a gate against the flat model, on the demo ------------------------------
def _demo_size(quick: bool) -> int:
    return 300 if quick else 1000


def _run_size(quick: bool) -> int:
    # 600 (the default demo) in quick mode: at 300 the demo has too few open-water plots for 5 spatial folds
    return 600 if quick else 1000


GATE = 0.02

gating = case("gating", unit="Mpx/s", baseline="flat",
              description=f"predict_map on the demo (n x n, n = 1000, quick 300; all demo features) with "
                          f"the project's XGBoost model (200 rounds, depth 6): flat over six classes, against"
                          f" the hierarchical model (upland / open water / wetland, then the four wetland "
                          f"classes) without a gate and with gate {GATE}; the gated variant prints its mean "
                          f"and maximum absolute probability difference from the ungated model to stderr")


def _demo_inputs(quick: bool):
    """The demo's cube, samples, grid and lazy AOI mask, as the run's mapping step sees them."""
    import pandas as pd

    from wetlandflow.features.cube import open_cube
    from wetlandflow.inputs.align import aoi_mask
    from wetlandflow.inputs.layers import project_grid, read_aoi
    from wetlandflow.inputs.project import load_project
    from wetlandflow.pipeline.run import feature_names

    folder = _demo(_demo_size(quick))
    project = load_project(folder / "project.toml")
    grid = project_grid(project)
    samples = pd.read_parquet(folder / "samples.parquet")
    valid = aoi_mask(read_aoi(project), grid, chunks=project.output.chunk_size)
    return project, open_cube(folder / "features.zarr"), samples, feature_names(samples), grid, valid


def _hierarchical(project, gate: float):
    from wetlandflow.models.hierarchy import HierarchicalClassifier
    from wetlandflow.pipeline.run import make_model

    params = {k: v for k, v in make_model(project).get_params().items() if k != "classes"}
    return HierarchicalClassifier(project.classes.names, project.classes.parents, base_params=params,
                                  gate_threshold=gate)


def _gating_run(quick: bool, make) -> tuple[int, float, object, tuple]:
    project, cube, samples, features, grid, valid = _demo_inputs(quick)
    model = make(project).fit(samples[features].to_numpy(np.float32), samples["class"].to_numpy())
    seconds = _map_once(model, cube, features, grid, valid)
    return int(valid.sum()), seconds, model, (cube, features, grid, valid)


@gating.variant("flat")
def _gating_flat(quick: bool, repeat: int):
    from wetlandflow.pipeline.run import make_model

    work, seconds, _, _ = _gating_run(quick, make_model)
    return work, seconds


@gating.variant("hierarchical, no gate")
def _gating_ungated(quick: bool, repeat: int):
    work, seconds, _, _ = _gating_run(quick, lambda p: _hierarchical(p, 0.0))
    return work, seconds


@gating.variant(f"hierarchical, gate {GATE}")
def _gating_gated(quick: bool, repeat: int):
    work, seconds, model, where = _gating_run(quick, lambda p: _hierarchical(p, GATE))
    _report_gate_error(model, *where)
    return work, seconds


def _report_gate_error(model, cube, features: list[str], grid, valid) -> None:
    """Mean and max |P_gated - P_ungated| over every valid pixel, window by window, and the share of pixels
    whose gate was open (where the child model ran)."""
    from wetlandflow.mapping.predict import windows

    data = cube[features].to_dataarray("feature").transpose("feature", "y", "x")
    total, worst, n, n_open = 0.0, 0.0, 0, 0
    for w in windows(grid, WINDOW):
        sl = {"y": slice(w.row_off, w.row_off + w.height), "x": slice(w.col_off, w.col_off + w.width)}
        ok = np.asarray(valid.isel(sl).values, dtype=bool).ravel()
        X = np.asarray(data.isel(sl).values, np.float32).reshape(len(features), -1).T[ok]
        if not X.shape[0]:
            continue
        levels = model.set_params(gate_threshold=GATE).predict_proba_levels(X)
        gated = levels["leaf"].to_numpy()
        exact = model.set_params(gate_threshold=0.0).predict_scheme_proba(X)
        diff = np.abs(gated - exact)
        total, worst = total + float(diff.sum()), max(worst, float(diff.max()))
        n, n_open = n + X.shape[0], n_open + int((levels["top"]["wetland"].to_numpy() > GATE).sum())
    model.set_params(gate_threshold=GATE)
    print(f"[gating] gate {GATE}: mean |P_gated - P_ungated| = {total / (n * len(CLASSES)):.2e} per class "
          f"probability, max = {worst:.2e} (bound {GATE}); gate open (child model run) on "
          f"{n_open / n:.1%} of {n} valid pixels", file=sys.stderr)


# -- memory scaling: the same window size on a grid 16 times larger ------------------------------------------
def _scaling_sizes(quick: bool) -> tuple[int, int]:
    return (256, 1024) if quick else (1024, 4096)


memory_scaling = case("memory_scaling", unit="Mpx/s", baseline="n",
                      description="predict_map peak memory on the synthetic 40-feature cube at n x n and "
                                  "4n x 4n (16 times the pixels; n = 1024, quick 256), windows 512, an "
                                  "XGBoost model of 60 trees (10 rounds x 6 classes): the memory ratio is "
                                  "the figure that matters")


@memory_scaling.variant("n")
def _scaling_small(quick: bool, repeat: int):
    return _synthetic_map(_scaling_sizes(quick)[0], 10)


@memory_scaling.variant("4n")
def _scaling_large(quick: bool, repeat: int):
    return _synthetic_map(_scaling_sizes(quick)[1], 10)


# -- plain baseline: the script a user would otherwise write -------------------------------------------------
plain_baseline = case("plain_baseline", unit="Mpx/s", baseline="plain script",
                      description="the synthetic 40-band float32 GeoTIFF stack (n x n, n = 2048, quick 1024; "
                                  "10 % no data) and the 600-tree model of 'predict': a plain script "
                                  "(read the whole stack with rasterio, predict the valid pixels in one "
                                  "call, write probability and class GeoTIFFs) against predict_map reading "
                                  "the same file lazily (which also writes the confidence layers and COGs "
                                  "with overviews)")


def _write_tif(path: Path, values: np.ndarray, profile: dict, nodata) -> None:
    import rasterio

    prof = {**profile, "count": values.shape[0], "dtype": values.dtype.name, "nodata": nodata,
            "compress": "deflate", "tiled": True, "blockxsize": 256, "blockysize": 256}
    with rasterio.open(path, "w", **prof) as dst:
        dst.write(values)


def _plain_script(src_path: Path, model, out: Path) -> None:
    """Read everything, predict the valid pixels at once, write the probabilities and the class map."""
    import rasterio

    with rasterio.open(src_path) as src:
        stack, profile = src.read(), src.profile
    bands, h, w = stack.shape
    X = stack.reshape(bands, -1).T
    ok = ~np.isnan(X[:, 0])
    p = model.predict_scheme_proba(X[ok])  # bands in scheme order
    proba = np.full((p.shape[1], h * w), np.nan, np.float32)
    proba[:, ok] = p.T
    classes = np.zeros(h * w, np.uint8)
    classes[ok] = np.argmax(p, axis=1) + 1
    _write_tif(out / "probability.tif", proba.reshape(-1, h, w), profile, np.nan)
    _write_tif(out / "class.tif", classes.reshape(1, h, w), profile, 0)


def _valid_pixels(src_path: Path) -> int:
    """Valid pixels of the stack from its first band alone (summing a lazy mask of the 40-band chunks with
    dask would read every chunk at once and inflate the variant's peak memory)."""
    import rasterio

    with rasterio.open(src_path) as src:
        return int((~np.isnan(src.read(1))).sum())


@plain_baseline.variant("plain script")
def _plain(quick: bool, repeat: int):
    src_path = _stack_tif(_predict_size(quick))
    model = _model(100)
    model.predict_proba(np.zeros((WARM, N_FEATURES), np.float32))
    with tempfile.TemporaryDirectory(dir=_cache()) as out, _Clock("plain script") as clock:
        _plain_script(src_path, model, Path(out))
    return _valid_pixels(src_path), clock.wall


@plain_baseline.variant("predict_map")
def _plain_pipeline(quick: bool, repeat: int):
    import rioxarray

    n = _predict_size(quick)
    src_path = _stack_tif(n)
    stack = rioxarray.open_rasterio(src_path, chunks={"band": -1, "y": WINDOW, "x": WINDOW})
    cube = stack.assign_coords(band=FEATURES).to_dataset("band")
    valid = stack.isel(band=0).notnull()
    seconds = _map_once(_model(100), cube, FEATURES, _grid(n), valid)
    return _valid_pixels(src_path), seconds


# -- end to end: the demo run --------------------------------------------------------------------------------
end_to_end = case("end_to_end", unit="Mpx/s", baseline="run_project + report",
                  description="the demo (n x n, n = 1000, quick 600; generated beforehand, not timed) run "
                              "end to end with its project file: inputs, all features, samples, spatial CV, "
                              "model, mapping with applicability, inventory, explanations, then the methods "
                              "report; "
                              "work = grid pixels; per-step seconds from the manifest go to stderr")


def _fresh_project(folder: Path) -> Path:
    """A copy of the demo's project file with a new output folder, so no step of an earlier run is reused."""
    import tomli_w
    import tomllib

    doc = tomllib.loads((folder / "project.toml").read_text())
    doc["project"]["output_dir"] = f"runs/bench_{os.getpid()}"
    path = folder / f"project_bench_{os.getpid()}.toml"
    path.write_text(tomli_w.dumps(doc))
    return path


@end_to_end.variant("run_project + report")
def _end_to_end(quick: bool, repeat: int):
    from wetlandflow.pipeline.run import run_project
    from wetlandflow.report.appendix import write_report

    size = _run_size(quick)
    path = _fresh_project(_demo(size))
    try:
        with _Clock(f"end_to_end {size}") as clock:
            t0 = time.perf_counter()
            result = run_project(path, progress=False)
            t1 = time.perf_counter()
            write_report(result.run_dir)
    finally:
        path.unlink()
    steps = {k: v.get("seconds") for k, v in result.manifest["steps"].items()}
    print(f"[end_to_end {size}] run_project {t1 - t0:.1f} s, report {clock.wall - (t1 - t0):.1f} s; "
          f"steps (s): {json.dumps(steps)}", file=sys.stderr)
    shutil.rmtree(result.run_dir)
    return size * size, clock.wall
