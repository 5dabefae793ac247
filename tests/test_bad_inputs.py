"""Bad inputs: each is refused with one message that names the file or the key and says what to do.

A small demo (128 x 128 px, 3 optical scenes, 2 SAR dates) is generated and run once for the module; each
case copies its project file, corrupts one thing (a key, a raster, the plots) and runs ``wetlandflow run``
through the CLI entry point in this process.  Every case checks:

* exit code 2 (a deliberate :class:`~wetlandflow.errors.WetlandflowError`) and one ``error:`` line, no
  traceback;
* the message names the file or the key (a pattern per case) and says what to do (another pattern);
* nothing is written to the run folder's final outputs: no maps, model, areas, inventory or metrics, no
  temporary or partial file left behind, and besides ``manifest.json`` only the outputs of the steps the
  manifest records as done (the cube is seeded from the base run for the plot and validation cases, so
  those cases reach their step quickly).

Some bad inputs cannot reach the CLI yet (the check is not wired into the run) or are handled rather
than refused; they are tested on the library function at the end of the file.
"""

from __future__ import annotations

import copy
import json
import re
import shutil
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import rasterio
import tomli_w
from affine import Affine
from conftest import tiny_project_doc
from shapely import affinity
from shapely.geometry import LineString, MultiPoint, Point, Polygon

from wetlandflow.errors import BudgetError, ModelError, OutputError, SamplesError
from wetlandflow.inputs.project import load_project
from wetlandflow.ui.cli import main

FINAL_OUTPUTS = (
    "maps",
    "model",
    "areas.csv",
    "inventory.gpkg",
    "inventory_areas.csv",
    "explain",
    "validation/metrics.json",
)
STEP_OUTPUTS = {"features": "features.zarr", "samples": "samples.parquet", "validation": "validation"}


@dataclass(frozen=True)
class Demo:
    folder: Path
    doc: dict
    base_file: Path
    run_dir: Path


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> Demo:
    """The base project (valid: it runs end to end) that every case corrupts in one place."""
    from wetlandflow.pipeline.run import run_project

    folder = tmp_path_factory.mktemp("bad_inputs")
    doc = tiny_project_doc(folder, chunk_size=128)
    doc["project"]["output_dir"] = "runs/base"
    base = folder / "base.toml"
    base.write_text(tomli_w.dumps(doc))
    result = run_project(base, progress=False)
    return Demo(folder, doc, base, result.run_dir)


# -- corrupting helpers ---------------------------------------------------------------------------------


def rewrite_raster(
    src: Path,
    dst: Path,
    fn: Callable[[np.ndarray], np.ndarray] | None = None,
    *,
    units: str | None = None,
    **profile,
) -> Path:
    """Copy a raster, optionally transforming its data (``fn``) or profile, keeping band descriptions."""
    with rasterio.open(src) as s:
        data, prof, desc = s.read(), s.profile, s.descriptions
    prof.update(profile)
    data = fn(data) if fn else data
    prof["count"] = data.shape[0]
    with rasterio.open(dst, "w", **prof) as d:
        d.write(data.astype(prof["dtype"]))
        for i, name in enumerate(desc[: data.shape[0]], start=1):
            if name:
                d.set_band_description(i, name)
        if units:
            d.units = (units,) * data.shape[0]
    return dst


def optical(doc: dict, folder: Path, i: int, key: str = "path") -> Path:
    return folder / doc["optical"][i][key]


def sar(doc: dict, folder: Path, i: int) -> Path:
    return folder / doc["sar"][i]["path"]


def shifted(dx: float) -> Callable[[Path, Path], Path]:
    def f(src: Path, dst: Path) -> Path:
        with rasterio.open(src) as s:
            t = s.transform
        return rewrite_raster(src, dst, transform=Affine(t.a, t.b, t.c + dx, t.d, t.e, t.f))

    return f


def plots_variant(change: Callable[[gpd.GeoDataFrame], gpd.GeoDataFrame]):
    """A corruption replacing the plot file by ``change(plots)`` written to the case folder."""

    def corrupt(doc: dict, folder: Path, tmp: Path) -> None:
        plots = change(gpd.read_file(folder / doc["plots"]["path"]))
        plots.to_file(tmp / "plots_bad.gpkg", layer="plots")
        doc["plots"]["path"] = str(tmp / "plots_bad.gpkg")

    return corrupt


def set_label(i: int, label):
    def change(g):
        g.loc[i, "label"] = label
        return g

    return change


def set_geometry(i: int, geometry):
    def change(g):
        g.loc[i, "geometry"] = geometry(g.geometry[i])
        return g

    return change


def keep_one_plot_of(cls: str):
    def change(g):
        first = g.index[g["label"] == cls][0]
        return g[(g["label"] != cls) | (g.index == first)].reset_index(drop=True)

    return change


def duplicate_id_other_label(g):
    other = g["label"][g["label"] != g.loc[0, "label"]].iloc[0]
    g.loc[1, "plot_id"], g.loc[1, "label"] = g.loc[0, "plot_id"], other
    return g


def both(*corruptions):
    def corrupt(doc: dict, folder: Path, tmp: Path) -> None:
        for c in corruptions:
            c(doc, folder, tmp)

    return corrupt


def edit(fn: Callable[[dict], object]):
    """A corruption of the project file's keys only."""

    def corrupt(doc: dict, folder: Path, tmp: Path) -> None:
        fn(doc)

    return corrupt


def raster(kind: str, i: int, make: Callable[[Path, Path], Path], name: str, **keys):
    """A corruption replacing one raster (``kind`` optical/mask/sar/dem) by ``make(original, new)``."""

    def corrupt(doc: dict, folder: Path, tmp: Path) -> None:
        table = doc["dem"] if kind == "dem" else doc["sar" if kind == "sar" else "optical"][i]
        field = "mask" if kind == "mask" else "path"
        table[field] = str(make(folder / table[field], tmp / name))
        table.update(keys)

    return corrupt


def truncate(src: Path, dst: Path) -> Path:
    raw = src.read_bytes()
    dst.write_bytes(raw[: len(raw) // 3])
    return dst


def not_a_raster(src: Path, dst: Path) -> Path:
    dst.write_text("elevation,x,y\n12.5,1,2\n")
    return dst


def without_crs(src: Path, dst: Path) -> Path:
    return rewrite_raster(src, dst, crs=None)


def dem_only_east(src: Path, dst: Path) -> Path:
    def f(a):
        a = a.copy()
        a[:, :, : a.shape[2] // 2] = -9999
        return a

    return rewrite_raster(src, dst, f)


def dem_with_hole(src: Path, dst: Path) -> Path:
    def f(a):
        a = a.copy()
        h, w = a.shape[1:]
        a[:, h // 4 : 3 * h // 4, w // 4 : 3 * w // 4] = -9999
        return a

    return rewrite_raster(src, dst, f)


def dem_in_feet(src: Path, dst: Path) -> Path:
    return rewrite_raster(src, dst, lambda a: np.where(a == -9999, -9999, a / 0.3048), units="ft")


def dem_tagged_metres(src: Path, dst: Path) -> Path:
    return rewrite_raster(src, dst, units="metre")


def drop_last_band(src: Path, dst: Path) -> Path:
    return rewrite_raster(src, dst, lambda a: a[:-1])


def fully_clouded_mask(src: Path, dst: Path) -> Path:
    return rewrite_raster(src, dst, lambda a: np.full_like(a, 9))  # SCL 9: cloud, high probability


def all_nodata(src: Path, dst: Path) -> Path:
    return rewrite_raster(src, dst, lambda a: np.zeros_like(a))


def to_db(src: Path, dst: Path) -> Path:
    return rewrite_raster(src, dst, lambda a: np.where(a == -9999, -9999, 10 * np.log10(np.maximum(a, 1e-6))))


def aoi_variant(make: Callable[[gpd.GeoDataFrame, Path], None]):
    def corrupt(doc: dict, folder: Path, tmp: Path) -> None:
        make(gpd.read_file(folder / doc["area"]["aoi"]), tmp / "aoi_bad.gpkg")
        doc["area"]["aoi"] = str(tmp / "aoi_bad.gpkg")

    return corrupt


# the base project selects optical and terrain features: SAR files are read (and checked) only when selected
SELECT_SAR = edit(lambda d: d["features"].update(select=["optical", "sar", "terrain"]))


def raw_text(text: str):
    def corrupt(doc: dict, folder: Path, tmp: Path) -> str:
        return text

    return corrupt


def output_under_a_file(doc: dict, folder: Path, tmp: Path) -> None:
    (tmp / "a_file").write_text("not a folder")
    doc["project"]["output_dir"] = str(tmp / "a_file" / "run")


def output_is_a_file(doc: dict, folder: Path, tmp: Path) -> None:
    (tmp / "run_file").write_text("not a folder")
    doc["project"]["output_dir"] = str(tmp / "run_file")


def plots_with_layers(*, layer: str | None = None, empty: bool = False):
    """The plots written as two layers of one GeoPackage (``plots`` and a copy ``plots_2023``), or as one
    empty layer; ``layer`` is the plots.layer key set (None: not set)."""

    def corrupt(doc: dict, folder: Path, tmp: Path) -> None:
        plots = gpd.read_file(folder / doc["plots"]["path"])
        path = tmp / "plots_layers.gpkg"
        if empty:
            plots.iloc[:0].to_file(path, layer="plots")
        else:
            plots.to_file(path, layer="plots")
            plots.to_file(path, layer="plots_2023", mode="a")
        doc["plots"]["path"] = str(path)
        if layer is not None:
            doc["plots"]["layer"] = layer

    return corrupt


def aoi_with_two_layers(doc: dict, folder: Path, tmp: Path) -> None:
    aoi = gpd.read_file(folder / doc["area"]["aoi"])
    aoi.to_file(tmp / "aoi_layers.gpkg", layer="aoi")
    aoi.to_file(tmp / "aoi_layers.gpkg", layer="aoi_buffered", mode="a")
    doc["area"]["aoi"] = str(tmp / "aoi_layers.gpkg")
    doc["area"].pop("layer", None)


def drop_class(cls: str):
    def change(g):
        return g[g["label"] != cls].reset_index(drop=True)

    return change


def shrink_class(cls: str):
    """Every plot of ``cls`` replaced by a 1 m circle on the pixel corner nearest its centre (the demo's
    10 m pixels have edges on multiples of 10 m): no pixel centre falls inside."""

    def change(g):
        rows = g["label"] == cls
        c = g.geometry[rows].centroid
        corners = gpd.points_from_xy(np.round(c.x / 10) * 10, np.round(c.y / 10) * 10)
        g.loc[rows, "geometry"] = gpd.GeoSeries(corners, crs=g.crs).buffer(1.0).to_numpy()
        return g

    return change


def one_pixel_class(cls: str):
    """One plot of ``cls`` left, as a single point: the class has one sample."""

    def change(g):
        g = keep_one_plot_of(cls)(g)
        i = g.index[g["label"] == cls][0]
        g.loc[i, "geometry"] = g.geometry[i].centroid
        return g

    return change


def scale_aoi(factor: float):
    def make(g: gpd.GeoDataFrame, p: Path) -> None:
        g.set_geometry(g.geometry.scale(factor, factor, origin=g.union_all().centroid)).to_file(
            p, layer="aoi"
        )

    return make


def utf16_text(doc: dict, folder: Path, tmp: Path) -> bytes:
    return tomli_w.dumps(doc).encode("utf-16")


def multipoint_plot(g):
    c = g.geometry[0].centroid
    g.loc[0, "geometry"] = MultiPoint([c, affinity.translate(c, 5, 5)])
    return g


def files_and_path(d: dict) -> None:
    s = d["optical"][0]
    s["files"] = {b: s["path"] for b in s["bands"]}


def sar_files_missing_band(d: dict) -> None:
    s = d["sar"][0]
    s["files"] = {"VV": s.pop("path")}


def garbage_gpkg(path: Path) -> Path:
    path.write_bytes(b"SQLite format 3\x00" + bytes(range(256)) * 4)
    return path


# -- the catalogue ----------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Case:
    id: str
    corrupt: Callable[[dict, Path, Path], object]
    names: str  # pattern: the file or the key the message must name
    fix: str  # pattern: what the message tells the user to do
    seeded: bool = False  # start from the base run's cube (the case fails at the samples or validation step)
    check: bool = True  # ``wetlandflow check`` refuses it too, with the same message


CASES = [
    # the project file
    Case(
        "project-unknown-key",
        edit(lambda d: d["model"].update(n_tree=3)),
        r"\[model\.n_tree\]",
        r"valid keys here are",
    ),
    Case("project-unknown-section", edit(lambda d: d.update(modle={})), r"\[modle\]", r"valid sections are"),
    Case(
        "project-wrong-type-number",
        edit(lambda d: d["output"].update(chunk_size="big")),
        r"\[output\.chunk_size\]",
        r"expected a whole number",
    ),
    Case(
        "project-wrong-type-list",
        edit(lambda d: d["optical"][0].update(bands="blue")),
        r"\[optical\[0\]\.bands\]",
        r"expected a list",
    ),
    Case(
        "project-wrong-type-bool",
        edit(lambda d: d["output"].update(applicability="yes")),
        r"\[output\.applicability\]",
        r"expected true or false",
    ),
    Case(
        "project-wrong-type-date",
        edit(lambda d: d["optical"][0].update(date="14 May")),
        r"\[optical\[0\]\.date\]",
        r"expected a date like",
    ),
    Case(
        "project-relative-path",
        edit(lambda d: d["dem"].update(path="../dem.tif")),
        r"\[dem\.path\]",
        r"fix the path or move the file",
    ),
    Case(
        "project-missing-key",
        edit(lambda d: d["plots"].pop("path")),
        r"\[plots\.path\]",
        r"missing required key",
    ),
    Case(
        "project-bad-choice",
        edit(lambda d: d["sar"][0].update(units="decibel")),
        r"\[sar\[0\]\.units\]",
        r"not one of linear, amplitude, db",
    ),
    Case(
        "project-not-toml", raw_text("[model\nkind = \n"), r"case_project-not-toml\.toml", r"fix the syntax"
    ),
    Case(
        "project-one-fold",
        edit(lambda d: d["validation"].update(n_folds=1)),
        r"\[validation\.n_folds\]",
        r"must be >= 2",
    ),
    Case(
        "season-without-scene",
        edit(lambda d: d["seasons"].update(winter=["11-01", "12-31"])),
        r"\[seasons\.winter\]",
        r"Widen the window, add scenes for it, or remove the season",
    ),
    Case(
        "bands-duplicated",
        edit(lambda d: d["optical"][0].update(bands=d["optical"][0]["bands"][:-1] + ["blue"])),
        r"\[optical\[0\]\.bands\]",
        r"give each band of the file its own name",
    ),
    Case(
        "grid-geographic",
        edit(lambda d: d["grid"].update(crs="EPSG:4326")),
        r"grid\.crs",
        r"projected metric CRS",
    ),
    Case(
        "grid-in-feet",
        edit(lambda d: d["grid"].update(crs="EPSG:2227")),
        r"grid\.crs",
        r"metric projected CRS",
    ),
    Case(
        "grid-unknown-crs",
        edit(lambda d: d["grid"].update(crs="EPSG:99999")),
        r"EPSG:99999",
        r"Give an EPSG code",
    ),
    # rasters: readable, georeferenced, overlapping
    Case(
        "optical-truncated",
        raster("optical", 0, truncate, "trunc.tif"),
        r"trunc\.tif",
        r"copy or export it again",
    ),
    Case(
        "dem-not-a-raster",
        raster("dem", 0, not_a_raster, "dem_text.tif"),
        r"dem_text\.tif",
        r"copy or export it again",
    ),
    Case("optical-without-crs", raster("optical", 1, without_crs, "nocrs.tif"), r"nocrs\.tif", r"assign one"),
    Case(
        "mask-without-crs",
        raster("mask", 2, without_crs, "mask_nocrs.tif"),
        r"mask_nocrs\.tif",
        r"assign one",
    ),
    Case(
        "optical-no-overlap",
        raster("optical", 1, shifted(50_000), "far.tif"),
        r"far\.tif",
        r"Check the file and its CRS",
    ),
    Case(
        "dem-no-overlap",
        raster("dem", 0, shifted(-80_000), "dem_far.tif"),
        r"dem_far\.tif",
        r"Check the file and its CRS",
    ),
    Case(
        "dem-partial-cover",
        raster("dem", 0, dem_only_east, "dem_east.tif"),
        r"\[dem\.path\].*dem_east\.tif",
        r"use a DEM that covers the AOI",
    ),
    Case(
        "dem-nodata-hole",
        raster("dem", 0, dem_with_hole, "dem_hole.tif"),
        r"\[dem\.path\].*dem_hole\.tif",
        r"Fill the holes",
    ),
    Case(
        "dem-feet-declared-metres",
        raster("dem", 0, dem_in_feet, "dem_ft.tif"),
        r"\[dem\.units\].*dem_ft\.tif",
        r"Set dem\.units = 'ft'",
    ),
    Case(
        "dem-metres-declared-feet",
        raster("dem", 0, dem_tagged_metres, "dem_m.tif", units="ft"),
        r"\[dem\.units\].*dem_m\.tif",
        r"Set dem\.units = 'm'",
    ),
    # bands
    Case(
        "bands-one-missing",
        edit(lambda d: d["optical"][0].update(bands=d["optical"][0]["bands"][:-1])),
        r"scene_\d+\.tif",
        r"Fix the band list or the file",
    ),
    Case(
        "file-band-missing",
        raster("optical", 0, drop_last_band, "nine.tif"),
        r"nine\.tif",
        r"Fix the band list or the file",
    ),
    Case(
        "bands-renamed",
        edit(
            lambda d: [
                s.update(bands=[b if b != "nir" else "nir8" for b in s["bands"]]) for s in d["optical"]
            ]
        ),
        r"\[optical\[0\]\.bands\].*scene_\d+\.tif",
        r"List the bands in the file's order",
    ),
    Case(
        "bands-swapped",
        edit(lambda d: d["optical"][1].update(bands=["green", "blue", *d["optical"][1]["bands"][2:]])),
        r"\[optical\[1\]\.bands\]",
        r"List the bands in the file's order",
    ),
    Case(
        "bands-differ-between-scenes",
        raster(
            "optical",
            1,
            drop_last_band,
            "scene9.tif",
            bands=["blue", "green", "red", "re1", "re2", "re3", "nir", "nir_narrow", "swir1"],
        ),
        r"optical\[1\]\.bands",
        r"every scene must carry the same bands",
    ),
    Case(
        "sar-bands-mislabelled",
        both(SELECT_SAR, edit(lambda d: [s.update(bands=["HH", "HV"]) for s in d["sar"]])),
        r"\[sar\[0\]\.bands\].*sar_\d+\.tif",
        r"List the bands in the file's order",
    ),
    Case(
        "sar-band-count",
        both(SELECT_SAR, edit(lambda d: [s.update(bands=["VV"]) for s in d["sar"]])),
        r"sar_\d+\.tif",
        r"Fix the band list or the file",
    ),
    # observations
    Case(
        "scene-fully-clouded",
        raster("mask", 1, fully_clouded_mask, "cloud.tif"),
        r"\[seasons\.summer\].*scene_20240711\.tif",
        r"Add a clear scene in that window",
    ),
    Case(
        "scene-all-nodata",
        raster("optical", 2, all_nodata, "empty.tif"),
        r"\[seasons\.autumn\].*empty\.tif",
        r"Add a clear scene in that window",
    ),
    Case(
        "mask-codes-wrong",
        edit(lambda d: [s.update(mask_valid=[42]) for s in d["optical"]]),
        r"\[seasons\.\w+\]",
        r"Add a clear scene in that window",
    ),
    # values that contradict their declared scale or units
    Case(
        "reflectance-unscaled",
        edit(lambda d: d["optical"][0].update(scale=1.0, offset_dn=0)),
        r"scene_20240422\.tif",
        r"Set scale = 0\.0001",
    ),
    Case(
        "reflectance-offset-doubled",
        edit(lambda d: d["optical"][0].update(offset_dn=-2000)),
        r"scene_20240422\.tif",
        r"Set offset_dn = 0",
    ),
    Case(
        "reflectance-offset-missing",
        edit(lambda d: d["optical"][0].update(offset_dn=0)),
        r"scene_20240422\.tif",
        r"Set offset_dn = -1000",
    ),
    Case(
        "sar-linear-declared-db",
        both(SELECT_SAR, edit(lambda d: [s.update(units="db") for s in d["sar"]])),
        r"\[sar\[0\]\.units\].*sar_\d+\.tif",
        r'set units = "linear"',
    ),
    Case(
        "sar-db-declared-linear",
        both(SELECT_SAR, raster("sar", 0, to_db, "sar_db.tif")),
        r"\[sar\[0\]\.units\].*sar_db\.tif",
        r'set units = "db"',
    ),
    Case(
        "sar-season-without-date",
        edit(lambda d: d["features"].update(select=["optical", "sar", "terrain"])),
        r"\[seasons\]",
        r"Widen the window",
    ),
    # the AOI
    Case(
        "aoi-points",
        aoi_variant(lambda g, p: g.set_geometry(g.centroid).to_file(p, layer="aoi")),
        r"aoi_bad\.gpkg",
        r"draw the project area as one or more polygons",
    ),
    Case(
        "aoi-unreadable",
        aoi_variant(lambda g, p: garbage_gpkg(p)),
        r"aoi_bad\.gpkg",
        r"save it again as a vector format",
    ),
    Case(
        "aoi-without-crs",
        aoi_variant(lambda g, p: g.set_crs(None, allow_override=True).to_file(p, layer="aoi")),
        r"aoi_bad\.gpkg",
        r"assign one",
    ),
    # plots
    Case(
        "plots-outside-aoi",
        plots_variant(set_geometry(0, lambda g: affinity.translate(g, 30_000, 0))),
        r"plots_bad\.gpkg.*OB-0001",
        r"remove them or enlarge the AOI",
        seeded=True,
    ),
    Case(
        "plots-crs-mislabelled",
        plots_variant(lambda g: g.set_crs("EPSG:32634", allow_override=True)),
        r"plots_bad\.gpkg",
        r"check the plot file's CRS",
        seeded=True,
    ),
    Case(
        "plots-empty-geometry",
        plots_variant(set_geometry(0, lambda g: Polygon())),
        r"plots_bad\.gpkg.*OB-0001",
        r"delete or redraw them",
        seeded=True,
    ),
    Case(
        "plots-self-intersecting",
        plots_variant(
            set_geometry(
                0,
                lambda g: Polygon(
                    [(512100, 6401000), (512200, 6401100), (512200, 6401000), (512100, 6401100)]
                ),
            )
        ),
        r"plots_bad\.gpkg.*OB-0001",
        r"repair them",
        seeded=True,
    ),
    Case(
        "plots-line",
        plots_variant(set_geometry(0, lambda g: LineString(list(g.exterior.coords)[:3]))),
        r"plots_bad\.gpkg.*OB-0001",
        r"buffer lines into polygons",
        seeded=True,
    ),
    Case(
        "plots-unknown-label",
        plots_variant(set_label(0, "peatland")),
        r"plots_bad\.gpkg.*'peatland'",
        r"add the class to \[classes\]\.names",
        seeded=True,
    ),
    Case(
        "plots-misspelled-label",
        plots_variant(set_label(0, "swmap")),
        r"plots_bad\.gpkg.*'swmap'",
        r"did you mean 'swmap' -> 'swamp'",
        seeded=True,
    ),
    Case(
        "plots-label-case",
        plots_variant(set_label(0, "Open Water")),
        r"plots_bad\.gpkg.*'Open Water'",
        r"did you mean 'Open Water' -> 'open_water'",
        seeded=True,
    ),
    Case(
        "plots-missing-label",
        plots_variant(set_label(0, None)),
        r"plots_bad\.gpkg.*OB-0001",
        r"label them or delete them",
        seeded=True,
    ),
    Case(
        "plots-duplicate-ids",
        plots_variant(duplicate_id_other_label),
        r"plots_bad\.gpkg.*OB-0001",
        r"give each plot a unique id",
        seeded=True,
    ),
    Case(
        "plots-without-crs",
        plots_variant(lambda g: g.set_crs(None, allow_override=True)),
        r"plots_bad\.gpkg",
        r"assign one",
        seeded=True,
    ),
    Case(
        "plots-class-field-missing",
        edit(lambda d: d["plots"].update(class_field="klass")),
        r"'klass'",
        r"Set plots\.class_field",
        seeded=True,
    ),
    Case(
        "plots-id-field-missing",
        edit(lambda d: d["plots"].update(id_field="pid")),
        r"'pid'",
        r"Set plots\.id_field",
        seeded=True,
    ),
    Case(
        "plots-unreadable",
        lambda doc, folder, tmp: doc["plots"].update(path=str(garbage_gpkg(tmp / "p.gpkg"))),
        r"p\.gpkg",
        r"save it again",
        seeded=True,
    ),
    # validation design
    Case(
        "class-fewer-plots-than-folds",
        both(plots_variant(keep_one_plot_of("fen")), edit(lambda d: d["validation"].update(design="blocks"))),
        r"class '\w+' \(1 plot\(s\) in total\) is missing from the training side",
        r"collect more plots of it, or use fewer folds",
        seeded=True,
    ),
    Case(
        "blocks-larger-than-area",
        edit(lambda d: d["validation"].update(design="blocks", block_size_m=1e6)),
        r"block\(s\) of 1000000\.0 m",
        r"Use smaller blocks or fewer folds",
        seeded=True,
    ),
    Case(
        "model-no-trees",
        edit(lambda d: d.setdefault("model", {}).update(n_estimators=0)),
        r"\[model\.n_estimators\]",
        r">= 1 \(number of trees",
    ),
    Case(
        "model-learning-rate-zero",
        edit(lambda d: d.setdefault("model", {}).update(learning_rate=0.0)),
        r"\[model\.learning_rate\]",
        r"in \(0, 1\]",
    ),
    Case(
        "model-learning-rate-above-one",
        edit(lambda d: d.setdefault("model", {}).update(learning_rate=1.5)),
        r"\[model\.learning_rate\]",
        r"in \(0, 1\]",
    ),
    Case(
        "model-learning-rate-nan",
        edit(lambda d: d.setdefault("model", {}).update(learning_rate=float("nan"))),
        r"\[model\.learning_rate\]",
        r"got nan; set model\.learning_rate to a value in that range",
    ),
    Case(
        "model-depth-negative",
        edit(lambda d: d.setdefault("model", {}).update(max_depth=-1)),
        r"\[model\.max_depth\]",
        r">= 0 \(0 = no depth limit\)",
    ),
    Case(
        "model-threads-zero",
        edit(lambda d: d.setdefault("model", {}).update(n_threads=0)),
        r"\[model\.n_threads\]",
        r"set model\.n_threads to a value in that range",
    ),
    Case(
        "project-seed-negative",
        edit(lambda d: d.setdefault("project", {}).update(seed=-1)),
        r"\[project\.seed\]",
        r"in \[0, 4\.29497e\+09\]",
    ),
    Case(
        "project-seed-too-large",
        edit(lambda d: d.setdefault("project", {}).update(seed=2**40)),
        r"\[project\.seed\]",
        r"set project\.seed to a value in that range",
    ),
    Case(
        "validation-block-size-zero",
        edit(lambda d: d.setdefault("validation", {}).update(block_size_m=0.0)),
        r"\[validation\.block_size_m\]",
        r"> 0 \(side of the square blocks",
    ),
    Case(
        "validation-block-size-infinite",
        edit(lambda d: d.setdefault("validation", {}).update(block_size_m=float("inf"))),
        r"\[validation\.block_size_m\]",
        r"got inf; set validation\.block_size_m",
    ),
    Case(
        "samples-no-pixels",
        edit(lambda d: d.setdefault("samples", {}).update(max_pixels_per_plot=0)),
        r"\[samples\.max_pixels_per_plot\]",
        r"set samples\.max_pixels_per_plot to a value",
    ),
    Case(
        "samples-negative-buffer",
        edit(lambda d: d.setdefault("samples", {}).update(inward_buffer_m=-5.0)),
        r"\[samples\.inward_buffer_m\]",
        r">= 0 \(metres, 0 = no buffer\)",
    ),
    Case(
        "output-explain-rows-zero",
        edit(lambda d: d.setdefault("output", {}).update(explain_rows=0)),
        r"\[output\.explain_rows\]",
        r"set output\.explain_rows to a value",
    ),
    Case(
        "output-explain-window-zero",
        edit(lambda d: d.setdefault("output", {}).update(explain_window=0)),
        r"\[output\.explain_window\]",
        r"set output\.explain_window to a value",
    ),
    Case(
        "output-explain-seeds-negative",
        edit(lambda d: d.setdefault("output", {}).update(explain_seeds=-2)),
        r"\[output\.explain_seeds\]",
        r"set output\.explain_seeds to a value",
    ),
    Case(
        "output-memory-budget-zero",
        edit(lambda d: d.setdefault("output", {}).update(memory_budget_gb=0.0)),
        r"\[output\.memory_budget_gb\]",
        r"> 0 \(gigabytes\)",
    ),
    Case(
        "output-mmu-zero",
        edit(lambda d: d.setdefault("output", {}).update(mmu_pixels=0)),
        r"\[output\.mmu_pixels\]",
        r"1 keeps every patch",
    ),
    Case(
        "output-connectivity-six",
        edit(lambda d: d.setdefault("output", {}).update(connectivity=6)),
        r"\[output\.connectivity\]",
        r"set output\.connectivity = 4",
    ),
    Case(
        "output-chunk-too-small",
        edit(lambda d: d.setdefault("output", {}).update(chunk_size=32)),
        r"\[output\.chunk_size\]",
        r">= 64",
    ),
    Case(
        "compute-no-workers",
        edit(lambda d: d.setdefault("compute", {}).update(n_workers=0)),
        r"\[compute\.n_workers\]",
        r"set compute\.n_workers to a value",
    ),
    Case(
        "grid-pixel-size-negative",
        edit(lambda d: d.setdefault("grid", {}).update(pixel_size_m=-10.0)),
        r"\[grid\.pixel_size_m\]",
        r"set grid\.pixel_size_m to a value",
    ),
    Case(
        "model-gate-threshold-one",
        edit(lambda d: d.setdefault("model", {}).update(gate_threshold=1.0)),
        r"\[model\.gate_threshold\]",
        r"set model\.gate_threshold to a value in that range",
    ),
    Case(
        "model-plot-share-above-one",
        edit(lambda d: d.setdefault("model", {}).update(max_plot_share=1.5)),
        r"\[model\.max_plot_share\]",
        r"set model\.max_plot_share to a value",
    ),
    Case(
        "model-kind-unknown",
        edit(lambda d: d.setdefault("model", {}).update(kind="svm")),
        r"\[model\.kind\]",
        r"not one of xgboost, random_forest; set model\.kind",
    ),
    Case(
        "validation-design-unknown",
        edit(lambda d: d.setdefault("validation", {}).update(design="leave_one_out")),
        r"\[validation\.design\]",
        r"not one of blocks, group, random",
    ),
    Case(
        "samples-missing-policy-unknown",
        edit(lambda d: d.setdefault("samples", {}).update(missing="fill")),
        r"\[samples\.missing\]",
        r"not one of keep, drop",
    ),
    Case(
        "grid-align-to-unknown",
        edit(lambda d: d.setdefault("grid", {}).update(align_to="lidar")),
        r"\[grid\.align_to\]",
        r"set grid\.align_to to one of these",
    ),
    Case(
        "model-wrong-type-trees",
        edit(lambda d: d.setdefault("model", {}).update(n_estimators="300")),
        r"\[model\.n_estimators\]",
        r"expected a whole number",
    ),
    Case(
        "model-wrong-type-rate",
        edit(lambda d: d.setdefault("model", {}).update(learning_rate="fast")),
        r"\[model\.learning_rate\]",
        r"expected a number",
    ),
    Case(
        "validation-folds-float",
        edit(lambda d: d.setdefault("validation", {}).update(n_folds=2.5)),
        r"\[validation\.n_folds\]",
        r"expected a whole number",
    ),
    Case(
        "model-gate-without-hierarchy",
        edit(lambda d: d["model"].update(gate_threshold=0.5)),
        r"\[model\.gate_threshold\]",
        r"set model\.hierarchical = true, or remove gate_threshold",
    ),
    Case(
        "model-hierarchy-without-parents",
        edit(lambda d: (d["model"].update(hierarchical=True), d["classes"].pop("parents", None))),
        r"\[model\.hierarchical\]",
        r"add a \[classes\.parents\] table",
    ),
    Case(
        "classes-parent-reserved-name",
        edit(
            lambda d: (
                d["model"].update(hierarchical=True),
                d["classes"].update(parents={"top": d["classes"]["names"][2:]}),
            )
        ),
        r"\[classes\.parents\.top\]",
        r"rename the group",
    ),
    Case(
        "classes-parent-unknown-child",
        edit(lambda d: d["classes"].update(parents={"wetland": ["mire"]})),
        r"\[classes\.parents\.wetland\].*'mire'",
        r"add the class to \[classes\]\.names",
    ),
    Case(
        "classes-child-in-two-groups",
        edit(lambda d: d["classes"].update(parents={"wet": ["fen"], "peat": ["fen"]})),
        r"\[classes\.parents\.peat\]",
        r"put each class in one group",
    ),
    Case(
        "classes-only-one",
        edit(lambda d: d["classes"].update(names=["upland"], parents={})),
        r"\[classes\.names\]",
        r"list every class the plots are labelled with",
    ),
    Case(
        "classes-duplicated",
        edit(lambda d: d["classes"].update(names=[*d["classes"]["names"], "fen"])),
        r"\[classes\.names\]",
        r"list each class once",
    ),
    Case(
        "season-wraps-the-year",
        edit(lambda d: d.update(seasons={"winter": ["11-01", "02-28"]})),
        r"\[seasons\.winter\]",
        r"split it into two seasons",
    ),
    Case(
        "season-bad-month-day",
        edit(lambda d: d["seasons"].update(summer=["06-01", "13-01"])),
        r"\[seasons\.summer\]",
        r"expected a month-day like '04-15'",
    ),
    Case(
        "season-one-date",
        edit(lambda d: d["seasons"].update(summer=["06-01"])),
        r"\[seasons\.summer\]",
        r"give two month-days",
    ),
    Case(
        "project-no-image",
        edit(lambda d: (d.pop("optical"), d.pop("sar"))),
        r"\[optical\]",
        r"add at least one \[\[optical\]\] or \[\[sar\]\] table",
    ),
    Case(
        "optical-scale-zero",
        edit(lambda d: d["optical"][0].update(scale=0.0)),
        r"\[optical\[0\]\.scale\]",
        r"set the factor that turns DN into reflectance",
    ),
    Case(
        "optical-path-and-files",
        edit(files_and_path),
        r"\[optical\[0\]\]",
        r"give exactly one of path \(one multi-band file\), files",
    ),
    Case(
        "optical-plausibility-unknown",
        edit(lambda d: d["optical"][0].update(plausibility="ignore")),
        r"\[optical\[0\]\.plausibility\]",
        r"not one of raise, warn",
    ),
    Case(
        "optical-mask-missing",
        edit(lambda d: d["optical"][1].update(mask="masks/none.tif")),
        r"\[optical\[1\]\.mask\]",
        r"fix the path or move the file",
    ),
    Case(
        "sar-orbit-unknown",
        edit(lambda d: d["sar"][0].update(orbit="up")),
        r"\[sar\[0\]\.orbit\]",
        r"not one of ascending, descending",
    ),
    Case(
        "sar-unknown-polarisation",
        edit(lambda d: d["sar"][1].update(bands=["VV", "XX"])),
        r"\[sar\[1\]\.bands\]",
        r"use VV, VH, HH, HV",
    ),
    Case(
        "sar-per-band-files-incomplete",
        edit(sar_files_missing_band),
        r"\[sar\[0\]\.bands\]",
        r"add their files or remove them from bands",
    ),
    Case(
        "dem-units-centimetres",
        edit(lambda d: d["dem"].update(units="cm")),
        r"\[dem\.units\]",
        r"not one of m, ft",
    ),
    Case(
        "features-unknown-name",
        edit(lambda d: d["features"].update(select=["optical", "ndvii"])),
        r"features\.select",
        r"'ndvii'",
    ),
    Case(
        "project-empty-file",
        raw_text(""),
        r"\[project\]",
        r"missing required key 'project'; add it to the project file",
    ),
    Case(
        "project-duplicate-key",
        raw_text('[model]\nkind = "xgboost"\nkind = "random_forest"\n'),
        r"case_project-duplicate-key\.toml",
        r"fix the syntax",
    ),
    Case(
        "project-not-utf8",
        utf16_text,
        r"case_project-not-utf8\.toml",
        r"save the file as UTF-8",
    ),
    Case(
        "grid-pixels-too-large",
        edit(lambda d: d.setdefault("grid", {}).update(pixel_size_m=2000.0)),
        r"\[grid\.pixel_size_m\]",
        r"Set grid\.pixel_size_m to at most \d+ m",
    ),
    Case(
        "aoi-beyond-the-rasters",
        aoi_variant(scale_aoi(1.6)),
        r"\[area\.aoi\].*aoi_bad\.gpkg.*\d+% of its area",
        r"Shrink the AOI to the rasters' extent",
    ),
    Case(
        "aoi-two-layers-unnamed",
        aoi_with_two_layers,
        r"aoi_layers\.gpkg.*aoi, aoi_buffered",
        r"set area\.layer in the project file",
    ),
    Case(
        "plots-two-layers-unnamed",
        plots_with_layers(),
        r"plots_layers\.gpkg.*plots, plots_2023",
        r"set plots\.layer in the project file",
        seeded=True,
    ),
    Case(
        "plots-layer-not-in-file",
        plots_with_layers(layer="plot"),
        r"plots_layers\.gpkg.*no layer 'plot'",
        r"Correct plots\.layer",
        seeded=True,
    ),
    Case(
        "plots-empty-layer",
        plots_with_layers(empty=True),
        r"plots_layers\.gpkg",
        r"add the labelled plots to it, or set plots\.path",
        seeded=True,
    ),
    Case(
        "plots-class-without-plots",
        plots_variant(drop_class("fen")),
        r"plots_bad\.gpkg.*'fen': no plot",
        r"Add plots of these classes.*or remove the classes from \[classes\]\.names",
        seeded=True,
    ),
    Case(
        "plots-class-smaller-than-pixels",
        plots_variant(shrink_class("marsh")),
        r"plots_bad\.gpkg.*'marsh': \d+ plot\(s\), none holding a pixel centre",
        r"use a smaller grid\.pixel_size_m\), or remove the classes",
        seeded=True,
    ),
    Case(
        "plots-multipoint",
        plots_variant(multipoint_plot),
        r"plots_bad\.gpkg.*OB-0001",
        r"split multipoints into single points",
        seeded=True,
    ),
    Case(
        "group-folds-one-plot-class",
        plots_variant(keep_one_plot_of("fen")),
        r"class 'fen' \(1 plot\(s\) in total\) is missing from the training side "
        r".*validation\.design = 'group'",
        r"collect more plots of it, or use fewer folds",
        seeded=True,
    ),
    Case(
        "random-folds-one-pixel-class",
        both(
            plots_variant(one_pixel_class("fen")),
            edit(lambda d: d["validation"].update(design="random", allow_random_pixels=True)),
        ),
        r"class 'fen' \(1 plot\(s\) in total\) is missing from the training side "
        r".*validation\.design = 'random'",
        r"collect more plots of it, or use fewer folds",
        seeded=True,
    ),
    Case(
        "folds-more-than-plots",
        edit(lambda d: d["validation"].update(n_folds=500)),
        r"validation\.n_folds = 500",
        r"Use fewer folds or add plots",
        seeded=True,
    ),
    Case(
        "model-features-not-in-cube",
        edit(lambda d: d["model"].update(features=["ndvi_midwinter"])),
        r"\[model\.features\].*'ndvi_midwinter'",
        r"correct the names",
        seeded=True,
        check=False,  # check does not build the cube whose variables it would compare with
    ),
    Case(
        "output-dir-is-a-file",
        output_is_a_file,
        r"run_file",
        r"choose another project\.output_dir",
        check=False,
    ),
    # the run folder
    Case(
        "output-folder-not-writable",
        output_under_a_file,
        r"a_file",
        r"choose another project\.output_dir",
        check=False,
    ),
]


def assert_no_final_outputs(run_dir: Path) -> None:
    """No final output, no temporary or partial file; besides the manifest, only outputs of finished steps."""
    if not run_dir.is_dir():  # never made, or the user's own file (a case names a file as the folder)
        return
    for rel in FINAL_OUTPUTS:
        assert not (run_dir / rel).exists(), f"{rel} was written by a refused run"
    leftovers = [
        p for p in run_dir.rglob("*") if p.name.endswith(".partial") or p.name.startswith(".write-test-")
    ]
    assert not leftovers, leftovers
    steps = (
        json.loads((run_dir / "manifest.json").read_text())["steps"]
        if (run_dir / "manifest.json").exists()
        else {}
    )
    assert not [k for k, v in steps.items() if v["status"] == "running"], (
        "the manifest claims a step still runs"
    )
    allowed = {"manifest.json"} | {
        STEP_OUTPUTS[k] for k, v in steps.items() if v["status"] == "done" and k in STEP_OUTPUTS
    }
    assert {p.name for p in run_dir.iterdir()} <= allowed


def run_case(demo: Demo, case: Case, tmp_path: Path, capsys, verb: str = "run") -> tuple[int, str, Path]:
    doc = copy.deepcopy(demo.doc)
    doc["project"]["output_dir"] = str(tmp_path / "run")
    text = case.corrupt(doc, demo.folder, tmp_path)
    run_dir = Path(doc["project"]["output_dir"])
    if case.seeded:
        run_dir.mkdir(parents=True)
        shutil.copytree(demo.run_dir / "features.zarr", run_dir / "features.zarr")
        shutil.copy(demo.run_dir / "manifest.json", run_dir / "manifest.json")
    project_file = demo.folder / f"case_{case.id}.toml"
    if isinstance(text, bytes):
        project_file.write_bytes(text)
    else:
        project_file.write_text(text if isinstance(text, str) else tomli_w.dumps(doc))
    capsys.readouterr()
    rc = main([verb, "--quiet", str(project_file)] if verb == "run" else [verb, str(project_file)])
    return rc, capsys.readouterr().err, run_dir


def test_the_catalogue_is_large_and_distinct():
    ids = [c.id for c in CASES]
    assert len(ids) == len(set(ids)) >= 100


def test_the_base_project_is_valid(demo):
    manifest = json.loads((demo.run_dir / "manifest.json").read_text())
    assert all(s["status"] == "done" for s in manifest["steps"].values())
    assert (demo.run_dir / "maps" / "class_final.tif").exists()


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_bad_input_is_refused_clearly(demo, case, tmp_path, capsys):
    rc, err, run_dir = run_case(demo, case, tmp_path, capsys)
    assert rc == 2, err
    assert sum(line.startswith("error: ") for line in err.splitlines()) == 1, err
    assert "Traceback" not in err and "unexpected" not in err, err
    message = " ".join(err.split())
    assert re.search(case.names, message), f"the message does not name {case.names!r}: {message}"
    assert re.search(case.fix, message), f"the message does not say {case.fix!r}: {message}"
    assert_no_final_outputs(run_dir)


@pytest.mark.parametrize("case", [c for c in CASES if c.check], ids=[c.id for c in CASES if c.check])
def test_check_refuses_it_too(demo, case, tmp_path, capsys):
    """``wetlandflow check`` refuses what the run refuses before any final output, in the same words."""
    rc, err, run_dir = run_case(demo, case, tmp_path, capsys, verb="check")
    assert rc == 2, err
    assert "Traceback" not in err, err
    message = " ".join(err.split())
    assert re.search(case.names, message), f"the message does not name {case.names!r}: {message}"
    assert re.search(case.fix, message), f"the message does not say {case.fix!r}: {message}"
    if not case.seeded:
        assert not run_dir.exists() or not any(run_dir.iterdir()), "check wrote into the run folder"


def test_debug_shows_the_traceback_of_a_bad_input(demo, tmp_path):
    doc = copy.deepcopy(demo.doc)
    doc["dem"]["path"] = str(not_a_raster(Path(), tmp_path / "dem_text.tif"))
    project_file = demo.folder / "case_debug.toml"
    project_file.write_text(tomli_w.dumps(doc))
    from wetlandflow.errors import InputFileError

    with pytest.raises(InputFileError, match="dem_text"):
        main(["--debug", "run", "--quiet", str(project_file)])


# -- refused by a library check (the run does not call it yet) --------------------------------------------


def test_disk_too_small_is_refused_before_writing(demo, tmp_path, monkeypatch):
    """The estimate is made before anything is written; a disk with less room refuses with the figures."""
    import shutil as shutil_module

    from wetlandflow.inputs.layers import project_grid
    from wetlandflow.inputs.preflight import check_disk, estimate_output_bytes, preflight

    project = load_project(demo.base_file)
    grid = project_grid(project)
    need = estimate_output_bytes(project, grid, n_features=40)
    assert need["total"] == sum(v for k, v in need.items() if k != "total")
    assert estimate_output_bytes(project, grid, n_features=80)["features"] == 2 * need["features"]
    assert estimate_output_bytes(project, grid, n_features=40, cube_written=True)["features"] == 0
    free = shutil_module.disk_usage(tmp_path).free
    with pytest.raises(
        OutputError, match=r"not enough disk space .* Free some space, set project\.output_dir"
    ):
        check_disk(tmp_path / "not" / "yet" / "there", free + 2**40)
    assert not (tmp_path / "not").exists()

    usage = shutil_module.disk_usage(tmp_path)
    monkeypatch.setattr(shutil_module, "disk_usage", lambda p: usage._replace(free=need["total"] - 1))
    run_dir = tmp_path / "run"
    monkeypatch.setattr(type(project), "run_dir", property(lambda self: run_dir))
    with pytest.raises(OutputError, match=r"largest: \w+ \d"):
        preflight(project, grid, n_features=40)
    assert not any(run_dir.iterdir())


def test_output_folder_not_writable_is_refused_by_preflight(demo, tmp_path, monkeypatch):
    from wetlandflow.inputs.layers import project_grid
    from wetlandflow.inputs.preflight import preflight

    project = load_project(demo.base_file)
    (tmp_path / "a_file").write_text("x")
    monkeypatch.setattr(type(project), "run_dir", property(lambda self: tmp_path / "a_file" / "run"))
    with pytest.raises(OutputError, match=r"a_file.*choose another project\.output_dir"):
        preflight(project, project_grid(project), n_features=10)


def test_whole_layer_steps_beyond_the_memory_budget_are_refused(demo):
    from wetlandflow.inputs.layers import project_grid
    from wetlandflow.inputs.preflight import check_memory, estimate_memory_bytes

    project = load_project(demo.base_file)
    need = estimate_memory_bytes(project, project_grid(project))
    assert need["terrain"] > 0 and need["inventory"] > 0
    check_memory(need, project.output.memory_budget_gb)
    with pytest.raises(BudgetError, match=r"output\.memory_budget_gb = 1e-06.*split the AOI into tiles"):
        check_memory(need, 1e-6)


def test_model_bundle_whose_features_do_not_match_the_cube(demo):
    from wetlandflow.features.cube import open_cube
    from wetlandflow.models.bundle import load_bundle
    from wetlandflow.models.classifier import align_features

    _, bundle = load_bundle(demo.run_dir / "model")
    cube = open_cube(demo.run_dir / "features.zarr")
    dropped = bundle["features"][3]
    with pytest.raises(
        ModelError, match=rf"lack 1 feature.*'{dropped}'.*Rebuild the feature cube.*\[features\] select"
    ):
        align_features(cube.drop_vars(dropped), bundle)


@pytest.mark.parametrize("what", ["all-nan", "constant"])
def test_feature_without_information_over_the_training_data(demo, what):
    from wetlandflow.training.samples import check_training_features

    samples = pd.read_parquet(demo.run_dir / "samples.parquet")
    features = [c for c in samples.columns if c not in ("plot_id", "class", "x", "y")]
    check_training_features(samples, features)
    bad = samples.assign(**{features[0]: np.nan if what == "all-nan" else 3.5})
    words = "all NaN" if what == "all-nan" else "one constant value"
    with pytest.raises(
        SamplesError, match=rf"{words}.*{features[0]}.*leave the feature out in \[features\] select"
    ):
        check_training_features(bad, features)


def test_class_with_fewer_plots_than_folds_warns_with_the_fix():
    """Two plots and three folds: the class cannot reach every test fold (a warning, not a refusal)."""
    from wetlandflow.validation.splitters import FewPlotsWarning, check_splits

    y = np.array(["fen"] * 4 + ["bog"] * 12)
    groups = np.array(["f1", "f1", "f2", "f2"] + [f"b{i}" for i in range(12)])
    idx = np.arange(16)
    folds = [np.r_[0, 1, 4:8], np.r_[2, 3, 8:12], np.r_[12:16]]
    splits = [(np.setdiff1d(idx, t), t) for t in folds]
    with pytest.warns(
        FewPlotsWarning, match=r"'fen' has 2 plot\(s\) but there are 3 folds.*Collect more plots"
    ):
        check_splits(y, splits, groups, on_missing="raise")


# -- handled rather than refused ----------------------------------------------------------------------------


def test_aoi_in_another_crs_is_reprojected(demo, tmp_path):
    from wetlandflow.inputs.layers import project_grid

    doc = copy.deepcopy(demo.doc)
    gpd.read_file(demo.folder / doc["area"]["aoi"]).to_crs("EPSG:4326").to_file(
        tmp_path / "aoi.gpkg", layer="aoi"
    )
    doc["area"]["aoi"] = str(tmp_path / "aoi.gpkg")
    (demo.folder / "aoi_4326.toml").write_text(tomli_w.dumps(doc))
    assert project_grid(load_project(demo.folder / "aoi_4326.toml")) == project_grid(
        load_project(demo.base_file)
    )


def test_plots_in_another_crs_give_the_same_pixels(demo):
    from wetlandflow.inputs.layers import project_grid, read_aoi
    from wetlandflow.training.samples import plot_pixels, read_plots

    project = load_project(demo.base_file)
    grid, aoi = project_grid(project), read_aoi(project)
    plots = gpd.read_file(project.plots.path)

    def pixels(gdf, path):
        gdf.to_file(path, layer="plots")
        p = read_plots(
            path, class_field="label", id_field="plot_id", classes=project.classes.names, grid=grid, aoi=aoi
        )
        return set(map(tuple, plot_pixels(p, grid)[["plot_id", "row", "col"]].to_numpy()))

    same = pixels(plots, demo.folder / "plots_same.gpkg")
    other = pixels(plots.to_crs("EPSG:3035"), demo.folder / "plots_3035.gpkg")
    assert len(same ^ other) <= 0.01 * len(
        same
    )  # only pixel centres within rounding of a plot edge may differ


def test_dem_in_feet_declared_as_feet_is_converted(demo, tmp_path):
    from wetlandflow.inputs.layers import load_dem, project_grid

    doc = copy.deepcopy(demo.doc)
    doc["dem"].update(
        path=str(dem_in_feet(demo.folder / doc["dem"]["path"], tmp_path / "dem_ft.tif")), units="ft"
    )
    (demo.folder / "dem_ft.toml").write_text(tomli_w.dumps(doc))
    feet, metres = load_project(demo.folder / "dem_ft.toml"), load_project(demo.base_file)
    grid = project_grid(metres)
    a = load_dem(feet, grid, chunks=128).values
    b = load_dem(metres, grid, chunks=128).values
    np.testing.assert_allclose(a, b, rtol=1e-5, atol=1e-3)  # metres -> feet -> metres with 0.3048 m per foot


def test_one_clouded_scene_in_a_season_with_a_clear_one_is_kept_with_a_warning(demo, tmp_path):
    from wetlandflow.inputs.layers import InputCoverageWarning, load_inputs

    doc = copy.deepcopy(demo.doc)
    extra = copy.deepcopy(doc["optical"][0])
    extra.update(
        date="2024-05-02",
        mask=str(fully_clouded_mask(demo.folder / extra["mask"], tmp_path / "c.tif")),
        path=str(demo.folder / extra["path"]),
    )
    doc["optical"].append(extra)
    (demo.folder / "clouded.toml").write_text(tomli_w.dumps(doc))
    with pytest.warns(InputCoverageWarning, match=r"optical\[3\] scene_20240422\.tif: no clear pixel"):
        inputs = load_inputs(load_project(demo.folder / "clouded.toml"))
    assert inputs.optical.sizes["time"] == 4


def test_a_plot_smaller_than_a_pixel_is_named_in_a_warning(demo):
    from wetlandflow.inputs.layers import project_grid
    from wetlandflow.training.samples import plot_pixels

    project = load_project(demo.base_file)
    grid = project_grid(project)
    x, y = grid.xy_coords()
    plots = gpd.GeoDataFrame(
        {"plot_id": ["tiny", "big"], "class": ["fen", "bog"]},
        geometry=[Point(x[5] + 4.0, y[5]).buffer(0.5), Point(x[20], y[20]).buffer(25)],
        crs=grid.crs,
    )
    with pytest.warns(UserWarning, match=r"1 plot\(s\) contain no pixel centre.*\['tiny'\]"):
        px = plot_pixels(plots, grid)
    assert set(px["plot_id"]) == {"big"}


# -- issue 18 part C: findings, one test each -------------------------------------------------------------


def test_random_design_warns_only_what_is_true_and_hides_the_groups_warning(demo):
    """The random design splits pixels: a one-plot class reaches every test fold, so no 'few plots' warning
    is true there; scikit-learn's 'groups parameter is ignored' (KFold) must not reach the user either."""
    import dataclasses
    import warnings

    from wetlandflow.pipeline.run import design_folds

    project = load_project(demo.base_file)
    project = dataclasses.replace(
        project,
        validation=dataclasses.replace(project.validation, design="random", allow_random_pixels=True),
    )
    samples = pd.read_parquet(demo.run_dir / "samples.parquet")
    one_plot = samples["plot_id"] == samples.loc[samples["class"] == "fen", "plot_id"].iloc[0]
    samples = samples[(samples["class"] != "fen") | one_plot].reset_index(drop=True)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        folds = design_folds(project, samples)
    messages = [str(w.message) for w in caught]
    assert not [m for m in messages if "groups parameter is ignored" in m], messages
    assert not [m for m in messages if "'fen' has 1 plot(s)" in m], messages
    assert set(folds[samples["class"].to_numpy() == "fen"]) == {0, 1, 2}  # the warning would have been false


def test_a_named_plot_layer_is_the_one_read(demo, tmp_path):
    from wetlandflow.inputs.layers import project_grid
    from wetlandflow.training.samples import read_plots

    project = load_project(demo.base_file)
    plots = gpd.read_file(project.plots.path)
    path = tmp_path / "two.gpkg"
    plots.to_file(path, layer="plots")
    plots.iloc[:12].to_file(path, layer="plots_2023", mode="a")
    kwargs = dict(
        class_field="label", id_field="plot_id", classes=project.classes.names, grid=project_grid(project)
    )
    assert len(read_plots(path, layer="plots_2023", **kwargs)) == 12
    assert len(read_plots(path, layer="plots", **kwargs)) == len(plots)


def test_sar_amplitude_and_power_in_the_overlap_are_warned():
    """Values in the overlap of the two units (median 0.03 to 0.5) are accepted, with a warning when the
    median sits on the other unit's side (limits: common practice, no source; see SAR_UNIT_LIMITS)."""
    import xarray as xr

    from wetlandflow.errors import PlausibilityWarning
    from wetlandflow.inputs.sar_units import check_sar_units

    rng = np.random.default_rng(0)
    power = xr.DataArray(rng.gamma(4.0, 0.05 / 4.0, 5000))  # median about 0.05: linear power
    amplitude = np.sqrt(power) * 1.8  # median about 0.4: amplitude
    with pytest.warns(PlausibilityWarning, match=r"declared units = 'linear' .*set units = \"amplitude\""):
        check_sar_units(amplitude, "linear", name="sar_a.tif")
    with pytest.warns(PlausibilityWarning, match=r"declared units = 'amplitude' .*set units = \"linear\""):
        check_sar_units(power, "amplitude", name="sar_p.tif")
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("error", PlausibilityWarning)
        assert check_sar_units(power, "linear")["likely_units"] in ("linear", "linear or amplitude")


def test_dem_in_centimetres_declared_metres_is_warned():
    from wetlandflow.errors import PlausibilityWarning
    from wetlandflow.inputs.layers import dem_range_warning

    metres = np.linspace(2.0, 38.0, 400)  # a lowland: 36 m of relief over about 1.8 km
    assert dem_range_warning(metres, "m", extent_m=1800.0, name="dem.tif") is None
    with pytest.warns(PlausibilityWarning, match=r"\[dem\.units\] the DEM dem_cm\.tif .*centimetres"):
        dem_range_warning(metres * 100, "m", extent_m=1800.0, name="dem_cm.tif")


def test_one_file_for_two_dates_is_warned(demo, tmp_path):
    import shutil as shutil_module

    from wetlandflow.errors import PlausibilityWarning
    from wetlandflow.features.plausibility import duplicate_inputs

    doc = copy.deepcopy(demo.doc)
    copy_path = tmp_path / "copy_of_first.tif"
    shutil_module.copy(demo.folder / doc["optical"][0]["path"], copy_path)  # another name, same content
    doc["optical"][1]["path"] = str(copy_path)
    (demo.folder / "dup.toml").write_text(tomli_w.dumps(doc))
    with pytest.warns(
        PlausibilityWarning, match=r"optical\[0\] .* and optical\[1\] .*copy_of_first\.tif.*same"
    ):
        found = duplicate_inputs(load_project(demo.folder / "dup.toml"))
    assert len(found) == 1
    assert duplicate_inputs(load_project(demo.base_file)) == []


def test_plot_warnings_reach_the_manifest_and_the_summary(demo, tmp_path, capsys):
    """Overlapping plots with different labels and one id on two features with one label: the run goes on,
    and manifest.json and the printed summary keep both warnings."""
    doc = copy.deepcopy(demo.doc)
    plots = gpd.read_file(demo.folder / doc["plots"]["path"])
    other = plots.index[plots["label"] != plots.loc[0, "label"]][0]
    plots.loc[other, "geometry"] = affinity.translate(plots.geometry[0], 3.0, 0.0)  # overlaps plot 0
    same = plots.index[(plots["label"] == plots.loc[1, "label"]) & (plots.index > 1)][0]
    plots.loc[same, "plot_id"] = plots.loc[1, "plot_id"]
    plots.to_file(tmp_path / "plots_warn.gpkg", layer="plots")
    doc["plots"]["path"] = str(tmp_path / "plots_warn.gpkg")
    doc["project"]["output_dir"] = str(tmp_path / "run")
    (tmp_path / "run").mkdir()
    shutil.copytree(demo.run_dir / "features.zarr", tmp_path / "run" / "features.zarr")
    shutil.copy(demo.run_dir / "manifest.json", tmp_path / "run" / "manifest.json")
    project_file = demo.folder / "plot_warnings.toml"
    project_file.write_text(tomli_w.dumps(doc))
    assert main(["run", "--quiet", str(project_file)]) == 0
    kept = json.loads((tmp_path / "run" / "manifest.json").read_text())["plausibility_warnings"]
    messages = " | ".join(w["message"] for w in kept)
    assert "overlapping plots with different labels" in messages and "same label" in messages, messages
    assert {w["step"] for w in kept} == {"samples"}
    from wetlandflow.pipeline.run import RunResult, format_summary

    summary = format_summary(
        RunResult(
            tmp_path / "run",
            json.loads((tmp_path / "run" / "manifest.json").read_text()),
            pd.read_csv(tmp_path / "run" / "areas.csv"),
            {},
        )
    )
    assert "Plausibility warnings (2" in summary and "overlapping plots" in summary
    from wetlandflow.pipeline.check import check_project

    notes = " | ".join(check_project(project_file).notes)
    assert "overlapping plots with different labels" in notes and "same label" in notes, notes


def test_a_south_up_raster_is_read_like_its_north_up_twin(demo, tmp_path):
    """A positive y pixel size (first row at the bottom) is valid GeoTIFF: same values on the grid."""
    from wetlandflow.inputs.layers import load_optical, project_grid

    src = demo.folder / demo.doc["optical"][0]["path"]
    with rasterio.open(src) as s:
        t, h = s.transform, s.height
    south_up = rewrite_raster(
        src,
        tmp_path / "south_up.tif",
        lambda a: a[:, ::-1, :],
        transform=Affine(t.a, 0, t.c, 0, -t.e, t.f + t.e * h),
    )
    doc = copy.deepcopy(demo.doc)
    doc["optical"][0]["path"] = str(south_up)
    (demo.folder / "south_up.toml").write_text(tomli_w.dumps(doc))
    flipped, base = load_project(demo.folder / "south_up.toml"), load_project(demo.base_file)
    grid = project_grid(base)
    assert project_grid(flipped) == grid
    a = load_optical(flipped, grid, chunks=128).isel(time=0).values
    b = load_optical(base, grid, chunks=128).isel(time=0).values
    np.testing.assert_array_equal(a, b)


def test_inputs_no_selected_feature_reads_are_not_checked(demo, tmp_path):
    """The base project selects optical and terrain features only: SAR in dB declared linear is no refusal."""
    from wetlandflow.features.registry import needed_inputs
    from wetlandflow.inputs.layers import load_inputs

    doc = copy.deepcopy(demo.doc)
    doc["sar"][0]["path"] = str(to_db(demo.folder / doc["sar"][0]["path"], tmp_path / "sar_db.tif"))
    (demo.folder / "sar_unused.toml").write_text(tomli_w.dumps(doc))
    project = load_project(demo.folder / "sar_unused.toml")
    assert needed_inputs(project) == {"optical", "dem"}
    inputs = load_inputs(project)
    assert inputs.sar is None and inputs.optical is not None and inputs.dem is not None


def test_a_byte_order_mark_at_the_start_of_the_project_file_is_accepted(demo):
    text = demo.base_file.read_text(encoding="utf-8")
    with_bom = demo.folder / "bom.toml"
    with_bom.write_bytes(b"\xef\xbb\xbf" + text.encode("utf-8"))
    assert load_project(with_bom).classes == load_project(demo.base_file).classes
