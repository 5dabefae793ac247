"""Tiny projects in the shapes a consultant's own data arrives in (tests of issue-style layouts and sensors).

A 3-class landscape (upland, open_water, marsh) of 8 x 8 blocks on a 40 x 40 pixel grid, written as:
optical scenes of a named sensor convention (Sentinel-2 L2A with the -1000 DN offset, Landsat Collection 2
surface reflectance, 8-bit RGB+NIR or RGB), in one multi-band file per date or one file per band, SAR per
date as one file or one file per polarisation (dB or linear), an optional DEM, and square plots.  The class
spectra are invented (fixture data, never a check value); the encodings follow the agencies' conventions
(see wetlandflow.inputs.sensors).
"""

from __future__ import annotations

import csv
import datetime as dt
from pathlib import Path

import geopandas as gpd
import numpy as np
import rasterio
import tomli_w
from affine import Affine
from shapely.geometry import box

CLASSES = ("upland", "open_water", "marsh")
SPECTRA = {  # invented surface reflectance per class
    "upland": dict(
        coastal=0.05,
        blue=0.05,
        green=0.08,
        red=0.09,
        re1=0.14,
        re2=0.20,
        re3=0.24,
        nir=0.26,
        nir_narrow=0.27,
        swir1=0.28,
        swir2=0.20,
    ),
    "open_water": dict(
        coastal=0.07,
        blue=0.06,
        green=0.05,
        red=0.03,
        re1=0.02,
        re2=0.015,
        re3=0.01,
        nir=0.01,
        nir_narrow=0.01,
        swir1=0.005,
        swir2=0.003,
    ),
    "marsh": dict(
        coastal=0.04,
        blue=0.04,
        green=0.07,
        red=0.05,
        re1=0.12,
        re2=0.25,
        re3=0.30,
        nir=0.32,
        nir_narrow=0.33,
        swir1=0.18,
        swir2=0.09,
    ),
}
SAR_DB = {
    "upland": {"VV": -9.0, "VH": -15.0},
    "open_water": {"VV": -22.0, "VH": -28.0},
    "marsh": {"VV": -12.0, "VH": -18.0},
}
SENSOR_BANDS = {
    "sentinel2_l2a": ("blue", "green", "red", "re1", "re2", "re3", "nir", "nir_narrow", "swir1", "swir2"),
    "sentinel2_l2a_pre2022": (
        "blue",
        "green",
        "red",
        "re1",
        "re2",
        "re3",
        "nir",
        "nir_narrow",
        "swir1",
        "swir2",
    ),
    "landsat89_oli_c2l2": ("coastal", "blue", "green", "red", "nir", "swir1", "swir2"),
    "landsat47_tm_etm_c2l2": ("blue", "green", "red", "nir", "swir1", "swir2"),
    "rgbn": ("red", "green", "blue", "nir"),
    "rgb": ("red", "green", "blue"),
}
CRS = "EPSG:32633"
X0, Y0 = 500_015.0, 6_000_985.0  # top-left corner: not a multiple of the pixel size on purpose


def encode(refl: np.ndarray, sensor: str) -> np.ndarray:
    """Reflectance -> the DN a product of that sensor stores."""
    if sensor == "sentinel2_l2a":  # (DN - 1000) / 10000 (ESA processing baseline 04.00)
        return np.clip(np.round(refl * 10000 + 1000), 1, 65535).astype("uint16")
    if sensor == "sentinel2_l2a_pre2022":  # DN / 10000
        return np.clip(np.round(refl * 10000), 1, 65535).astype("uint16")
    if sensor.startswith("landsat"):  # DN * 0.0000275 - 0.2 (USGS Collection 2 Level-2)
        return np.clip(np.round((refl + 0.2) / 0.0000275), 1, 65535).astype("uint16")
    return np.clip(np.round(refl * 2 * 255), 1, 255).astype("uint8")  # 8-bit brightness, not reflectance


def class_map(n: int = 40, block: int = 5, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    k = n // block
    blocks = rng.permutation(np.arange(k * k) % len(CLASSES)).reshape(k, k)
    return np.kron(blocks, np.ones((block, block), dtype=int))


def write_tif(
    path: Path, data: np.ndarray, *, pixel: float, descriptions=None, nodata=None, crs=CRS, origin=(X0, Y0)
) -> Path:
    data = data if data.ndim == 3 else data[None]
    path.parent.mkdir(parents=True, exist_ok=True)
    profile = dict(
        driver="GTiff",
        width=data.shape[2],
        height=data.shape[1],
        count=data.shape[0],
        dtype=data.dtype,
        crs=crs,
        transform=Affine(pixel, 0, origin[0], 0, -pixel, origin[1]),
    )
    if nodata is not None:
        profile["nodata"] = nodata
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(data)
        for i, d in enumerate(descriptions or []):
            dst.set_band_description(i + 1, d)
    return path


def make_project(
    root: Path,
    *,
    sensor: str = "sentinel2_l2a",
    optical: str | None = "stack",
    sar: str | None = None,
    sar_units: str = "db",
    pols=("VV", "VH"),
    dem: bool = True,
    dates=("2024-05-10", "2024-07-20"),
    seasons: dict | None = None,
    pixel: float = 10.0,
    plots_crs: str | None = None,
    bands=None,
    extra: dict | None = None,
    seed: int = 0,
    scene: dict | None = None,
) -> Path:
    """Write the inputs and the project file; returns the project file's path.

    ``optical``: ``"stack"`` (one multi-band file per date), ``"files"`` (per-band files in the table),
    ``"pattern"`` (per-band files found by a pattern), ``"list"`` (a CSV scene list) or None.
    ``sar``: ``"stack"``, ``"pattern"`` (one file per polarisation), ``"list"`` or None.
    ``scene``: keys added to (or, as None, removed from) every ``[[optical]]`` table; ``extra``: keys merged
    into the project file's sections.
    """
    root = Path(root)
    root.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    cmap = class_map(seed=seed)
    n = cmap.shape[0]
    names = np.array(CLASSES)[cmap]
    bands = tuple(bands or SENSOR_BANDS[sensor])
    doc: dict = {
        "project": {"name": "Fenwick Hollow test", "seed": 1},
        "area": {"aoi": "aoi.gpkg"},
        "classes": {"names": list(CLASSES)},
        "plots": {"path": "plots.gpkg", "class_field": "label"},
        "model": {"n_estimators": 20, "max_depth": 3},
        "validation": {"design": "group", "n_folds": 3},
        "samples": {"max_pixels_per_plot": 9},
        "output": {"chunk_size": 64, "explain": False, "applicability": False, "mmu_pixels": 1},
    }
    x1, y1 = X0 + n * pixel, Y0 - n * pixel
    gpd.GeoDataFrame(
        {"name": ["area"]}, geometry=[box(X0 + pixel, y1 + pixel, x1 - pixel, Y0 - pixel)], crs=CRS
    ).to_file(root / "aoi.gpkg")
    plots, labels = [], []
    for r in range(2, n - 2, 5):
        for c in range(2, n - 2, 5):
            cx, cy = X0 + (c + 0.5) * pixel, Y0 - (r + 0.5) * pixel
            plots.append(box(cx - pixel, cy - pixel, cx + pixel, cy + pixel))
            labels.append(names[r, c])
    gdf = gpd.GeoDataFrame({"label": labels}, geometry=plots, crs=CRS)
    (gdf.to_crs(plots_crs) if plots_crs else gdf).to_file(root / "plots.gpkg")
    tables, rows = [], []
    for i, date in enumerate(dates):
        stamp = date.replace("-", "")
        refl = np.stack([np.vectorize(lambda k, b=b: SPECTRA[k][b])(names) for b in bands]).astype(np.float64)
        refl = np.clip(refl * (1 + 0.1 * i) + rng.normal(0, 0.008, refl.shape), 0.002, None)
        if optical is None:
            break
        dn = encode(refl, sensor)
        if optical == "stack":
            path = write_tif(root / "optical" / f"scene_{stamp}.tif", dn, pixel=pixel)
            tables.append(
                {
                    "date": date,
                    "path": str(path.relative_to(root)),
                    "sensor": sensor,
                    **({"bands": list(bands)} if bands != SENSOR_BANDS[sensor] else {}),
                }
            )
        else:
            files = {
                b: write_tif(root / "optical" / f"scene_{stamp}_{b}.tif", dn[j], pixel=pixel)
                for j, b in enumerate(bands)
            }
            if optical == "files":
                tables.append(
                    {
                        "date": date,
                        "sensor": sensor,
                        "files": {b: str(p.relative_to(root)) for b, p in files.items()},
                    }
                )
            rows += [{"date": date, "path": str(p.relative_to(root)), "band": b} for b, p in files.items()]
    if optical == "pattern":
        tables = [{"pattern": "optical/scene_{date}_{band}.tif", "sensor": sensor}]
    elif optical == "list":
        _write_csv(root / "optical_scenes.csv", rows)
        tables = [{"list": "optical_scenes.csv", "sensor": sensor}]
    for t in tables:
        for k, v in (scene or {}).items():
            if v is None:
                t.pop(k, None)
            else:
                t[k] = v
    if tables:
        doc["optical"] = tables
    if sar:
        doc["sar"] = _write_sar(root, sar, sar_units, pols, names, dates, rng, pixel)
    if dem:
        yy, xx = np.mgrid[0:n, 0:n]
        relief = 0.08 * yy + 1.5 * np.sin(xx / 4.0) * np.cos(yy / 5.0)
        elev = 100 + relief + np.where(cmap == 0, 3.0, np.where(cmap == 1, 0.0, 0.8))
        write_tif(root / "dem.tif", elev.astype("float32"), pixel=pixel)
        doc["dem"] = {"path": "dem.tif"}
        # a channel on a 40 x 40 px fixture needs a smaller catchment than the default 20 ha
        doc["features"] = {"params": {"hand": {"channel_threshold_m2": 20 * pixel * pixel}}}
    if seasons:
        doc["seasons"] = seasons
    for section, values in (extra or {}).items():
        doc.setdefault(section, {}).update(values)
    pf = root / "project.toml"
    pf.write_text(tomli_w.dumps(doc))
    return pf


def _write_csv(path: Path, rows: list[dict]) -> None:
    with path.open("w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)


def _write_sar(root, layout, units, pols, names, dates, rng, pixel) -> list[dict]:
    tables, rows = [], []
    for date in dates:
        stamp = dt.date.fromisoformat(date).strftime("%Y%m%d")
        layers = []
        for p in pols:
            db = np.vectorize(lambda k, p=p: SAR_DB[k][p])(names) + rng.normal(0, 0.8, names.shape)
            layers.append((db if units == "db" else 10 ** (db / 10)).astype("float32"))
        if layout == "stack":
            path = write_tif(root / "sar" / f"S1_{stamp}.tif", np.stack(layers), pixel=pixel, nodata=-9999)
            tables.append(
                {"date": date, "path": str(path.relative_to(root)), "bands": list(pols), "units": units}
            )
        else:
            for p, layer in zip(pols, layers, strict=True):
                path = write_tif(
                    root / "sar" / f"S1_{stamp}_{p.lower()}.tif", layer, pixel=pixel, nodata=-9999
                )
                rows.append(
                    {
                        "date": date,
                        "path": str(path.relative_to(root)),
                        "polarisation": p,
                        "orbit": "descending",
                    }
                )
    if layout == "pattern":
        return [{"pattern": "sar/S1_{date}_{band}.tif", "units": units}]
    if layout == "list":
        _write_csv(root / "sar_scenes.csv", rows)
        return [{"list": "sar_scenes.csv", "units": units}]
    return tables
