"""Wall-to-wall prediction by windows, written through a single writer.

The cube is read window by window (each window computed by dask from the
Zarr store), only valid pixels (inside the AOI) are sent to the model, and
the per-class probabilities, class map and confidence layers are written by
this one thread into tiled GeoTIFFs.  Cloud-Optimized GeoTIFFs with overviews
are then built from them as a separate step.
"""

from __future__ import annotations

import json
import shutil
from collections.abc import Callable, Iterator
from pathlib import Path

import numpy as np
import rasterio
import xarray as xr
from rasterio.windows import Window

from ..inputs.grid import Grid
from ..inputs.io import atomic_path, write_json
from ..models.classifier import scheme_proba
from ..progress import progress_bar

CLASS_NODATA = 0


def windows(grid: Grid, size: int) -> Iterator[Window]:
    """Row-major square windows of at most ``size`` pixels a side covering the grid."""
    for r in range(0, grid.height, size):
        for c in range(0, grid.width, size):
            yield Window(c, r, min(size, grid.width - c), min(size, grid.height - r))


def confidence_layers(proba: np.ndarray) -> np.ndarray:
    """Maximum probability, margin between the two most likely classes, and normalised entropy.

    ``proba`` is (n, K); returns (3, n).  Entropy is -sum p ln p / ln K (0 = certain, 1 = uniform).
    """
    k = proba.shape[1]
    top2 = np.sort(proba, axis=1)[:, -2:]
    with np.errstate(divide="ignore", invalid="ignore"):
        ent = -np.nansum(np.where(proba > 0, proba * np.log(proba), 0.0), axis=1) / np.log(k)
    return np.stack([top2[:, 1], top2[:, 1] - top2[:, 0], ent]).astype(np.float32)


CONFIDENCE_BANDS = ("max_probability", "margin", "normalised_entropy")


def _profile(grid: Grid, count: int, dtype: str, nodata: float) -> dict:
    # Staged windows are written uncompressed: they are read once, by the COG build, which compresses;
    # compressing them too would spend a second deflate pass of every layer on the single writer.
    return {"driver": "GTiff", "width": grid.width, "height": grid.height, "count": count, "dtype": dtype,
            "crs": grid.crs, "transform": grid.transform, "nodata": nodata, "tiled": True, "blockxsize": 256,
            "blockysize": 256, "compress": "none", "BIGTIFF": "IF_SAFER"}


LAYERS = ("probability", "class", "confidence")
AOA_LAYERS = ("dissimilarity", "applicability")


def window_memory_bytes(n_features: int, n_classes: int, window_size: int, *, n_train: int = 0) -> int:
    """Working memory of one prediction window: the feature block (float32, read and transposed),
    the outputs, and the AOA distance block (2048 rows x training points, float32) when asked."""
    px = window_size * window_size
    features = 2 * 4 * n_features * px
    outputs = 4 * (2 * n_classes + 3) * px + px
    aoa = 4 * 2048 * n_train * 2 if n_train else 0
    return int(features + outputs + aoa)


def _stage_profiles(grid: Grid, k: int, with_aoa: bool) -> dict[str, dict]:
    # one entry per layer of LAYERS (+ AOA_LAYERS)
    profiles = {"probability": _profile(grid, k, "float32", np.nan),
                "class": _profile(grid, 1, "uint8", CLASS_NODATA),
                "confidence": _profile(grid, 3, "float32", np.nan)}
    if with_aoa:
        profiles["dissimilarity"] = _profile(grid, 1, "float32", np.nan)
        profiles["applicability"] = _profile(grid, 1, "uint8", 255)
    return profiles


class _Progress:
    """Which windows are already on disk: a small JSON beside the staged rasters, rewritten per window.

    A window is recorded only after all its layers were written, so a run killed at any moment
    resumes at a window boundary and never trusts a half-written window.
    """

    def __init__(self, stage: Path, signature: dict):
        self.path = stage / "windows_done.json"
        self.signature = signature
        self.done: set[int] = set()
        if self.path.exists():
            record = json.loads(self.path.read_text())
            if record.get("signature") == signature:
                self.done = set(record.get("done", []))

    def mark(self, i: int) -> None:
        self.done.add(i)
        write_json({"signature": self.signature, "done": sorted(self.done)}, self.path)


def _create_stage(stage: Path, profiles: dict[str, dict], class_names: tuple[str, ...], resume: bool) -> None:
    """Create the staged tiled GeoTIFFs (kept as they are when resuming)."""
    names = {"probability": class_names, "confidence": CONFIDENCE_BANDS, "class": ("class",),
             "dissimilarity": ("dissimilarity_index",), "applicability": ("inside_aoa",)}
    for layer, prof in profiles.items():
        path = stage / f"{layer}.tif"
        if resume and path.exists():
            continue
        with rasterio.open(path, "w", **prof) as dst:
            for i, n in enumerate(names[layer], start=1):
                dst.set_band_description(i, n)


def _write_window(stage: Path, res: dict[str, np.ndarray], w: Window) -> None:
    """Write one window to every staged layer and close them: only a closed file is surely on disk
    (rasterio exposes no flush), and a window is recorded as done only after this returns."""
    for name, values in res.items():
        with rasterio.open(stage / f"{name}.tif", "r+") as dst:
            dst.write(values.T.reshape(values.shape[1], w.height, w.width), window=w)


def _predict_window(model, X: np.ndarray, ok: np.ndarray, k: int, aoa_model) -> dict[str, np.ndarray]:
    n = ok.size
    res = {"probability": np.full((n, k), np.nan, np.float32), "class": np.zeros((n, 1), np.uint8),
           "confidence": np.full((n, 3), np.nan, np.float32)}
    if aoa_model is not None:
        res["dissimilarity"] = np.full((n, 1), np.nan, np.float32)
        res["applicability"] = np.full((n, 1), 255, np.uint8)
    if X.shape[0]:
        p = scheme_proba(model, X)  # bands in scheme order
        res["probability"][ok] = p
        res["class"][ok, 0] = np.argmax(p, axis=1) + 1
        res["confidence"][ok] = confidence_layers(p).T
        if aoa_model is not None:
            from .applicability import dissimilarity_index, inside_flag

            di = dissimilarity_index(aoa_model, X)
            res["dissimilarity"][ok, 0] = di
            res["applicability"][ok, 0] = inside_flag(di, aoa_model.threshold)
    return res


def predict_map(model, cube: xr.Dataset, features: list[str], grid: Grid, out_dir: str | Path, *,
                valid: xr.DataArray, class_names: tuple[str, ...], window_size: int = 512,
                aoa_model=None, memory_budget_gb: float | None = None, progress: bool = True,
                check: Callable[[], None] | None = None) -> dict[str, Path]:
    """Predict the whole grid window by window; return the paths of the COGs written.

    Writes ``probability.tif`` (one band per class, band descriptions = class
    names), ``class.tif`` (codes 1..K, 0 = nodata, equal to the per-pixel argmax)
    and ``confidence.tif`` into ``out_dir``; with an ``aoa_model``
    (:func:`~wetlandflow.mapping.applicability.fit_applicability`) also
    ``dissimilarity.tif`` (DI) and ``applicability.tif`` (1 inside the area of
    applicability, 0 outside, 255 no data).

    Only pixels inside ``valid`` are sent to the model.  Windows are staged in
    ``out_dir/.stage`` and recorded as done one by one: calling again after an
    interruption (same model, features and grid) resumes at the first window
    not yet written.  ``memory_budget_gb`` refuses to start when one window's
    working memory (:func:`window_memory_bytes`) would exceed the budget.
    ``check`` is called before every window (a cancel point: it may raise
    :class:`~wetlandflow.errors.Cancelled`; the windows written stay staged).
    """
    from ..errors import BudgetError

    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    k = len(class_names)
    need = window_memory_bytes(len(features), k, window_size,
                               n_train=0 if aoa_model is None else aoa_model.train_scaled.shape[0])
    if memory_budget_gb is not None and need > memory_budget_gb * 2**30:
        raise BudgetError(f"one prediction window of {window_size} x {window_size} pixels needs about "
                          f"{need / 2**30:.2f} GiB, above the memory budget of {memory_budget_gb} GiB; "
                          "lower output.chunk_size or raise output.memory_budget_gb")
    stage = out_dir / ".stage"
    stage.mkdir(exist_ok=True)
    profiles = _stage_profiles(grid, k, aoa_model is not None)
    signature = {"features": list(features), "classes": list(class_names), "grid": str(grid.to_dict()),
                 "window_size": int(window_size), "model": _model_signature(model),
                 "aoa": None if aoa_model is None else float(aoa_model.threshold)}
    done = _Progress(stage, signature)
    wins = list(windows(grid, window_size))
    data = cube[features].to_dataarray("feature").transpose("feature", "y", "x")
    _create_stage(stage, profiles, class_names, resume=bool(done.done))
    todo = [(i, w) for i, w in enumerate(wins) if i not in done.done]
    for i, w in progress_bar(todo, desc="predicting", unit="window", disable=not progress):
        if check is not None:
            check()
        sl = {"y": slice(w.row_off, w.row_off + w.height), "x": slice(w.col_off, w.col_off + w.width)}
        block = np.asarray(data.isel(sl).values, dtype=np.float32)
        ok = np.asarray(valid.isel(sl).values, dtype=bool).ravel()
        _write_window(stage, _predict_window(model, block.reshape(len(features), -1).T[ok], ok, k, aoa_model), w)
        done.mark(i)
    out = {}
    for name in profiles:
        resampling = "mode" if name in ("class", "applicability") else "average"
        out[name] = build_cog(stage / f"{name}.tif", out_dir / f"{name}.tif", overview_resampling=resampling)
    shutil.rmtree(stage)
    return out


def _model_signature(model) -> str:
    """A short fingerprint of a fitted model, so staged windows of another model are never reused.

    Deterministic, and the same for a model and its reloaded bundle: XGBoost by the booster's raw bytes,
    a scikit-learn forest by its trees' arrays (field by field: the padding bytes of the node records
    are arbitrary), a hierarchical model by its tree (classes, parents, priors, gate) and the fingerprint
    of every level; anything else by its pickle.
    """
    import hashlib

    if hasattr(model, "base") and hasattr(model, "train_priors"):  # a PriorAdjustedClassifier
        parts = [_model_signature(model.base), np.asarray(model.train_priors, np.float64).round(12).tolist(),
                 np.asarray(model.priors, np.float64).round(12).tolist()]
        return hashlib.sha256(json.dumps(parts).encode()).hexdigest()[:16]
    if hasattr(model, "top_model_") and hasattr(model, "child_models_"):  # a fitted HierarchicalClassifier
        levels = {"top": _model_signature(model.top_model_)}
        # a parent with one child in training has no model: its priors (recorded below) are its output
        levels |= {p: _model_signature(c) if hasattr(c, "model_") else "constant"
                   for p, c in model.child_models_.items()}
        tree = {"classes": [str(c) for c in model.scheme_],
                "parents": {p: list(c) for p, c in model.parents_.items()},
                "priors": {p: np.asarray(v, np.float64).tolist() for p, v in model.priors_.items()},
                "gate_threshold": float(model.gate_threshold), "levels": levels}
        return hashlib.sha256(json.dumps(tree, sort_keys=True).encode()).hexdigest()[:16]
    return hashlib.sha256(_estimator_bytes(model)).hexdigest()[:16]


def _estimator_bytes(model) -> bytes:
    import pickle

    inner = getattr(model, "model_", None)
    if getattr(model, "kind", "") == "xgboost" and inner is not None:
        try:
            return bytes(inner.get_booster().save_raw("ubj"))
        except AttributeError:  # not a booster after all: fall through to the pickle
            pass
    trees = getattr(inner, "estimators_", None)
    if trees is not None and all(hasattr(t, "tree_") for t in trees):
        classes = [[str(c) for c in getattr(model, name, [])] for name in ("scheme_", "present_")]
        parts = [json.dumps(classes).encode()]
        for t in trees:
            state = t.tree_.__getstate__()
            nodes = state["nodes"]
            parts += [np.ascontiguousarray(nodes[f]).tobytes() for f in nodes.dtype.names]
            parts.append(np.ascontiguousarray(state["values"]).tobytes())
        return b"".join(parts)
    return pickle.dumps(model)


def build_cog(src_path: str | Path, dst_path: str | Path, *, overview_resampling: str) -> Path:
    """Copy a tiled GeoTIFF into a validated Cloud-Optimized GeoTIFF with overviews, atomically."""
    from rasterio.shutil import copy as rio_copy

    with atomic_path(dst_path) as tmp:
        # NUM_THREADS: GDAL compresses the tiles and computes the overviews on every core.  A 64 MB block
        # cache for the copy: the source is read once, so a larger cache only holds memory (measured on a
        # 4096 x 4096 map: peak 667 MB with the process's 128 MB, 520 MB with 64 MB, same time).
        with rasterio.Env(GDAL_CACHEMAX=64):
            rio_copy(str(src_path), str(tmp), driver="COG", compress="DEFLATE", blocksize=256,
                     overview_resampling=overview_resampling, BIGTIFF="IF_SAFER", NUM_THREADS="ALL_CPUS")
        with rasterio.open(tmp) as ds:
            if not ds.overviews(1) and max(ds.width, ds.height) > 512:
                raise RuntimeError(f"COG {dst_path} was written without overviews")
            if ds.block_shapes[0] != (256, 256) and min(ds.width, ds.height) > 256:
                raise RuntimeError(f"COG {dst_path} is not tiled 256 x 256")
    return Path(dst_path)


def code_counts(path: str | Path, n_codes: int) -> np.ndarray:
    """Pixel count of each integer code 0..n_codes-1 in band 1 of a raster, read block by block."""
    counts = np.zeros(n_codes, np.int64)
    with rasterio.open(path) as src:
        for _, w in src.block_windows(1):
            counts += np.bincount(src.read(1, window=w).ravel(), minlength=n_codes)[:n_codes]
    return counts


def class_areas(class_tif: str | Path, class_names: tuple[str, ...], pixel_area_m2: float):
    """Mapped pixel counts and areas (ha) per class, read window by window."""
    import pandas as pd

    px = code_counts(class_tif, len(class_names) + 1)[1:]
    return pd.DataFrame({"class": list(class_names), "pixels": px, "mapped_area_ha": px * pixel_area_m2 / 1e4,
                         "mapped_share": px / max(px.sum(), 1)})

