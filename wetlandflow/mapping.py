"""Wall-to-wall prediction by windows, written through a single writer.

The cube is read window by window (each window computed by dask from the
Zarr store), only valid pixels (inside the AOI) are sent to the model, and
the per-class probabilities, class map and confidence layers are written by
this one thread into tiled GeoTIFFs.  Cloud-Optimized GeoTIFFs with overviews
are then built from them as a separate step.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import numpy as np
import rasterio
import xarray as xr
from rasterio.windows import Window

from .grid import Grid
from .io import atomic_path
from .progress import progress_bar

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
    return {"driver": "GTiff", "width": grid.width, "height": grid.height, "count": count, "dtype": dtype,
            "crs": grid.crs, "transform": grid.transform, "nodata": nodata, "tiled": True, "blockxsize": 256,
            "blockysize": 256, "compress": "deflate", "BIGTIFF": "IF_SAFER"}


def predict_map(model, cube: xr.Dataset, features: list[str], grid: Grid, out_dir: str | Path, *,
                valid: xr.DataArray, class_names: tuple[str, ...], window_size: int = 512,
                progress: bool = True) -> dict[str, Path]:
    """Predict the whole grid window by window; return the paths of the COGs written.

    Writes ``probability.tif`` (one band per class, band descriptions = class
    names), ``class.tif`` (codes 1..K, 0 = nodata, equal to the per-pixel argmax)
    and ``confidence.tif`` into ``out_dir``.
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    k = len(class_names)
    stage = out_dir / ".stage"
    stage.mkdir(exist_ok=True)
    paths = {n: stage / f"{n}.tif" for n in ("probability", "class", "confidence")}
    wins = list(windows(grid, window_size))
    data = cube[features].to_dataarray("feature").transpose("feature", "y", "x")
    with rasterio.open(paths["probability"], "w", **_profile(grid, k, "float32", np.nan)) as p_dst, \
         rasterio.open(paths["class"], "w", **_profile(grid, 1, "uint8", CLASS_NODATA)) as c_dst, \
         rasterio.open(paths["confidence"], "w", **_profile(grid, 3, "float32", np.nan)) as q_dst:
        for dst, names in ((p_dst, class_names), (q_dst, CONFIDENCE_BANDS), (c_dst, ("class",))):
            for i, n in enumerate(names, start=1):
                dst.set_band_description(i, n)
        for w in progress_bar(wins, desc="predicting", unit="window", disable=not progress):
            sl = {"y": slice(w.row_off, w.row_off + w.height), "x": slice(w.col_off, w.col_off + w.width)}
            block = np.asarray(data.isel(sl).values, dtype=np.float32)
            ok = np.asarray(valid.isel(sl).values, dtype=bool).ravel()
            X = block.reshape(len(features), -1).T[ok]
            proba = np.full((w.height * w.width, k), np.nan, np.float32)
            cls = np.zeros(w.height * w.width, np.uint8)
            conf = np.full((w.height * w.width, 3), np.nan, np.float32)
            if X.shape[0]:
                p = model.predict_proba(X)
                proba[ok] = p
                cls[ok] = np.argmax(p, axis=1) + 1
                conf[ok] = confidence_layers(p).T
            p_dst.write(proba.T.reshape(k, w.height, w.width), window=w)
            c_dst.write(cls.reshape(1, w.height, w.width), window=w)
            q_dst.write(conf.T.reshape(3, w.height, w.width), window=w)
    out = {}
    for name, resampling in (("probability", "average"), ("class", "mode"), ("confidence", "average")):
        out[name] = build_cog(paths[name], out_dir / f"{name}.tif", overview_resampling=resampling)
        paths[name].unlink()
    stage.rmdir()
    return out


def build_cog(src_path: str | Path, dst_path: str | Path, *, overview_resampling: str) -> Path:
    """Copy a tiled GeoTIFF into a validated Cloud-Optimized GeoTIFF with overviews, atomically."""
    from rasterio.shutil import copy as rio_copy

    with atomic_path(dst_path) as tmp:
        rio_copy(str(src_path), str(tmp), driver="COG", compress="DEFLATE", blocksize=256,
                 overview_resampling=overview_resampling, BIGTIFF="IF_SAFER")
        with rasterio.open(tmp) as ds:
            if not ds.overviews(1) and max(ds.width, ds.height) > 512:
                raise RuntimeError(f"COG {dst_path} was written without overviews")
            if ds.block_shapes[0] != (256, 256) and min(ds.width, ds.height) > 256:
                raise RuntimeError(f"COG {dst_path} is not tiled 256 x 256")
    return Path(dst_path)


def class_areas(class_tif: str | Path, class_names: tuple[str, ...], pixel_area_m2: float):
    """Mapped pixel counts and areas (ha) per class, read window by window."""
    import pandas as pd

    counts = np.zeros(len(class_names) + 1, np.int64)
    with rasterio.open(class_tif) as src:
        for _, w in src.block_windows(1):
            counts += np.bincount(src.read(1, window=w).ravel(), minlength=len(class_names) + 1)
    px = counts[1:]
    return pd.DataFrame({"class": list(class_names), "pixels": px, "mapped_area_ha": px * pixel_area_m2 / 1e4,
                         "mapped_share": px / max(px.sum(), 1)})

