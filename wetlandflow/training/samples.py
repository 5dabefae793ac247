"""Training samples from plots: one row per pixel, grouped by plot.

The samples table has columns ``plot_id``, ``class``, ``x``, ``y`` and then
one column per feature.  Polygons give all pixels whose centre falls inside
(optionally after an inward buffer, to drop mixed edge pixels), capped per
plot by a seeded random subsample; points give the pixel they fall in.
"""

from __future__ import annotations

import difflib
import warnings

import numpy as np
import pandas as pd
import xarray as xr
from rasterio.features import rasterize

from ..errors import SamplesError
from ..inputs.grid import Grid
from ..inputs.io import read_vector


def read_plots(path, *, class_field: str, id_field: str, classes: tuple[str, ...], grid: Grid, aoi=None,
               layer: str = ""):
    """Read and check training plots; return a GeoDataFrame in the grid CRS with ``plot_id`` and ``class``.

    ``layer`` names the layer of a file with several (``plots.layer``); such a file without it is refused.
    """
    gdf = read_vector(path, layer=layer or None, what="plot file", key="plots.layer")
    where = f"plot file {path}" + (f" (layer {layer!r})" if layer else "")
    if len(gdf) == 0:
        raise SamplesError(f"{where}: the file holds no plot (no feature); add the labelled plots to it, or "
                           "set plots.path (and plots.layer) to the file and layer that hold them")
    if class_field not in gdf.columns:
        raise SamplesError(f"{where}: no class field {class_field!r}; fields are {list(gdf.columns.drop('geometry'))}. "
                           "Set plots.class_field in the project file")
    if id_field and id_field not in gdf.columns:
        raise SamplesError(f"{where}: no id field {id_field!r}; fields are {list(gdf.columns.drop('geometry'))}. "
                           "Set plots.id_field in the project file, or leave it empty for one id per feature")
    ids = gdf[id_field].astype(str) if id_field else pd.Series([f"plot-{i + 1}" for i in range(len(gdf))],
                                                               index=gdf.index)
    unlabelled = gdf[class_field].isna() | (gdf[class_field].astype(str).str.strip() == "")
    if unlabelled.any():
        raise SamplesError(f"{where}: {int(unlabelled.sum())} plot(s) without a label in field "
                           f"{class_field!r}, ids {ids[unlabelled].tolist()[:10]}; label them or delete them")
    gdf = gdf.assign(plot_id=ids.values, **{"class": gdf[class_field].astype(str).str.strip().values})
    _check_geometries(gdf, where)
    unknown = sorted(set(gdf["class"]) - set(classes))
    if unknown:
        raise SamplesError(f"{where}: label(s) {unknown} are not in the class scheme {list(classes)}"
                           f"{_suggestions(unknown, classes)}; fix the labels in field {class_field!r} or "
                           "add the class to [classes].names")
    dup = gdf.groupby("plot_id").size()
    if id_field and (dup > 1).any():
        # multipart plots with one id are fine when they share a label; conflicting labels are not
        conflict = gdf.groupby("plot_id")["class"].nunique()
        bad = conflict[conflict > 1].index.tolist()
        if bad:
            raise SamplesError(f"{where}: duplicate plot id(s) with different labels: {bad[:10]}; "
                               "give each plot a unique id")
    gdf = gdf.to_crs(grid.crs)
    plot_warnings(gdf, where)
    if aoi is not None:
        inside = gdf.geometry.intersects(aoi.to_crs(grid.crs).union_all())
        if not inside.any():
            bounds = tuple(round(v) for v in gdf.total_bounds)
            aoi_bounds = tuple(round(v) for v in aoi.to_crs(grid.crs).total_bounds)
            raise SamplesError(f"{where}: no plot lies inside the AOI (plots span {bounds}, the AOI "
                               f"{aoi_bounds}, both in {grid.crs}); check the plot file's CRS and the AOI")
        if (~inside).any():
            raise SamplesError(f"{where}: {int((~inside).sum())} plot(s) lie outside the AOI, ids "
                               f"{gdf.loc[~inside, 'plot_id'].tolist()[:10]}; remove them or enlarge the AOI")
    return gdf[["plot_id", "class", "geometry"]]


PLOT_GEOMETRIES = ("Polygon", "MultiPolygon", "Point")


def plot_warnings(gdf, where: str) -> list[str]:
    """Warn (:class:`~wetlandflow.errors.PlausibilityWarning`) about plots that are valid but look wrong.

    * one id on several features with the same label: read as one multipart plot (its pixels share a fold),
      which is right for a plot drawn in parts and wrong for two plots given the same id by mistake;
    * plots of different labels that overlap: the pixels they share train both classes.
    """
    import geopandas as gpd

    from ..errors import PlausibilityWarning

    found = []
    counts = gdf.groupby("plot_id").size()
    dup = counts[counts > 1].index.tolist()
    if dup:
        found.append(f"{where}: {len(dup)} plot id(s) on several features with the same label, read as one "
                     f"multipart plot each: {dup[:10]}. If they are separate plots, give each a unique id")
    polys = gdf[gdf.geom_type.isin(["Polygon", "MultiPolygon"])]
    if len(polys) > 1:
        pairs = gpd.sjoin(polys[["plot_id", "class", "geometry"]], polys[["plot_id", "class", "geometry"]],
                          predicate="intersects")
        pairs = pairs[(pairs["class_left"] != pairs["class_right"])
                      & (pairs["plot_id_left"] < pairs["plot_id_right"])]
        # shared area, not a shared edge (neighbouring plots drawn against each other touch)
        other = gpd.GeoSeries(polys.geometry.loc[pairs["index_right"]].to_numpy(), index=pairs.index,
                              crs=polys.crs)
        pairs = pairs[pairs.geometry.intersection(other).area > 0]
        if len(pairs):
            shown = [f"{a} ({ca}) / {b} ({cb})" for a, ca, b, cb in pairs[
                ["plot_id_left", "class_left", "plot_id_right", "class_right"]].itertuples(index=False)][:10]
            found.append(f"{where}: {len(pairs)} pair(s) of overlapping plots with different labels: "
                         f"{', '.join(shown)}; their shared pixels train both classes. Correct the outlines "
                         "or the labels")
    for message in found:
        warnings.warn(message, PlausibilityWarning, stacklevel=3)
    return found


def check_class_plots(pixels: pd.DataFrame, plots, classes: tuple[str, ...], *, where: str,
                      pixel_size_m: float | None = None) -> None:
    """Refuse a class of the scheme that no plot trains: no plot at all, or plots without a pixel centre.

    A model cannot learn such a class; a run would map an inventory that can never show it, and the
    accuracy figures would not say so.
    """
    with_pixels = set(pixels["class"]) if len(pixels) else set()
    n_plots = plots.groupby("class").size() if len(plots) else pd.Series(dtype=int)
    empty = [c for c in classes if c not in with_pixels]
    if not empty:
        return
    detail = "; ".join(f"{c!r}: no plot" if not n_plots.get(c, 0) else
                       f"{c!r}: {int(n_plots[c])} plot(s), none holding a pixel centre"
                       + (f" of the {pixel_size_m:g} m grid" if pixel_size_m else "") for c in empty)
    no_plot = [repr(c) for c in empty if not n_plots.get(c, 0)]
    option = (f". To run without {', '.join(no_plot)} (no plot at all), set drop_empty = true in [classes]: "
              "such a class then leaves the scheme with a warning and the map cannot show it"
              if no_plot else "")
    raise SamplesError(f"{where}: class(es) of the scheme without training data ({detail}); the model "
                       "could never map them. Add plots of these classes to the plot file (or, for plots "
                       "smaller than a pixel, use a smaller grid.pixel_size_m), or remove the classes from "
                       f"[classes].names (and [classes.parents]) in the project file{option}")


def classes_without_plots(plots, classes: tuple[str, ...]) -> list[str]:
    """The classes of the scheme no plot is labelled with, in scheme order.

    Examples
    --------
    >>> import pandas as pd
    >>> classes_without_plots(pd.DataFrame({"class": ["bog", "bog", "marsh"]}), ("bog", "fen", "marsh"))
    ['fen']
    """
    present = set(plots["class"]) if len(plots) else set()
    return [c for c in classes if c not in present]


def _check_geometries(gdf, where: str) -> None:
    empty = gdf.geometry.isna() | gdf.geometry.is_empty
    if empty.any():
        raise SamplesError(f"{where}: {int(empty.sum())} plot(s) with empty geometry, ids "
                           f"{gdf.loc[empty, 'plot_id'].tolist()[:10]}; delete or redraw them")
    kinds = ~gdf.geom_type.isin(PLOT_GEOMETRIES)
    if kinds.any():
        raise SamplesError(f"{where}: {int(kinds.sum())} plot(s) of geometry type "
                           f"{sorted(set(gdf.geom_type[kinds]))}, ids "
                           f"{gdf.loc[kinds, 'plot_id'].tolist()[:10]}; "
                           f"plots must be {', '.join(PLOT_GEOMETRIES)}: buffer lines into polygons or split "
                           "multipoints into single points")
    invalid = ~gdf.geometry.is_valid
    if invalid.any():
        raise SamplesError(f"{where}: {int(invalid.sum())} plot(s) with invalid (e.g. self-intersecting) geometry, "
                           f"ids {gdf.loc[invalid, 'plot_id'].tolist()[:10]}; repair them (e.g. make valid) and save")


def _suggestions(unknown: list[str], classes: tuple[str, ...]) -> str:
    """' (did you mean ...)' for labels that differ from a class only in case, spacing or a typo."""
    lower = {c.lower().replace(" ", "_"): c for c in classes}
    hints = []
    for label in unknown:
        key = label.lower().replace(" ", "_")
        close = [lower[key]] if key in lower else difflib.get_close_matches(label, classes, n=1, cutoff=0.75)
        if close:
            hints.append(f"{label!r} -> {close[0]!r}")
    return f" (did you mean {', '.join(hints)}?)" if hints else ""


def check_training_features(samples: pd.DataFrame, features: list[str]) -> None:
    """Refuse features that carry nothing over the training samples: all NaN, or one constant value.

    Such a feature cannot inform the model, and it breaks what divides by a
    feature's spread (the standardisation of the area of applicability); it
    usually means an input is missing or wrong under the plots (a DEM hole, a
    season without data, a flat or constant layer).

    Raises
    ------
    SamplesError
        Naming the features, what they hold, and the fixes.
    """
    values = samples[features]
    all_nan = [f for f in features if values[f].isna().all()]
    constant = [f for f in features if f not in all_nan and values[f].nunique(dropna=True) == 1]
    if all_nan or constant:
        pairs = [(f, float(values[f].dropna().iloc[0])) for f in constant]
        parts = [f"all NaN: {all_nan}"] if all_nan else []
        parts += [f"one constant value: {pairs}"] if pairs else []
        raise SamplesError(
            f"over the {len(samples)} training samples, feature(s) hold {'; '.join(parts)}. Check the "
            "input layer behind each under the plots (no data, a season without clear scenes, a flat DEM), "
            "or leave the feature out in [features] select of the project file"
        )


def plot_pixels(plots, grid: Grid, *, inward_buffer_m: float = 0.0, max_pixels_per_plot: int | None = None,
                seed: int = 0) -> pd.DataFrame:
    """Pixel (row, col) of every plot: polygons by centre-inside rule, points by containing pixel."""
    rng = np.random.default_rng(seed)
    geoms = plots.geometry
    if inward_buffer_m > 0:
        geoms = geoms.where(geoms.geom_type.isin(["Point", "MultiPoint"]), geoms.buffer(-inward_buffer_m))
    frames = []
    poly = geoms.geom_type.isin(["Polygon", "MultiPolygon"]) & ~geoms.is_empty
    if poly.any():
        index = rasterize(((g, i + 1) for i, g in zip(np.flatnonzero(poly), geoms[poly], strict=True)),
                          out_shape=grid.shape, transform=grid.transform, fill=0, dtype="int32")
        rows, cols = np.nonzero(index)
        frames.append(pd.DataFrame({"i": index[rows, cols] - 1, "row": rows, "col": cols}))
    pts = geoms.geom_type.isin(["Point"])
    if pts.any():
        r, c = grid.rowcol(geoms[pts].x.values, geoms[pts].y.values)
        frames.append(pd.DataFrame({"i": np.flatnonzero(pts), "row": r, "col": c}))
    px = pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(columns=["i", "row", "col"])
    px = px[(px.row >= 0) & (px.row < grid.height) & (px.col >= 0) & (px.col < grid.width)]
    if max_pixels_per_plot:
        keys = rng.random(len(px))
        px = (px.assign(_k=keys).sort_values(["i", "_k"]).groupby("i", sort=False).head(max_pixels_per_plot)
              .drop(columns="_k"))
    lost = np.setdiff1d(np.arange(len(plots)), px["i"].to_numpy())
    if lost.size:
        warnings.warn(f"{lost.size} plot(s) contain no pixel centre of the grid (smaller than a pixel, "
                      f"outside the grid, or emptied by the inward buffer of {inward_buffer_m:g} m), ids "
                      f"{plots['plot_id'].values[lost].tolist()[:10]}; they give no training sample",
                      UserWarning, stacklevel=2)
    px = px.sort_values(["i", "row", "col"]).reset_index(drop=True)
    px["plot_id"] = plots["plot_id"].values[px["i"].values]
    px["class"] = plots["class"].values[px["i"].values]
    return px.drop(columns="i")


def extract_samples(cube: xr.Dataset, pixels: pd.DataFrame, grid: Grid) -> pd.DataFrame:
    """Feature values at the given pixels, as the samples table."""
    rows = xr.DataArray(pixels["row"].to_numpy(), dims="sample")
    cols = xr.DataArray(pixels["col"].to_numpy(), dims="sample")
    values = cube.isel(y=rows, x=cols).compute()
    x, y = grid.xy_coords()
    table = pd.DataFrame({
        "plot_id": pixels["plot_id"].to_numpy(), "class": pixels["class"].to_numpy(),
        "x": x[pixels["col"].to_numpy()], "y": y[pixels["row"].to_numpy()],
    })
    feats = pd.DataFrame({k: np.asarray(v.values, dtype=np.float32) for k, v in values.data_vars.items()})
    return pd.concat([table, feats], axis=1)


def missing_report(samples: pd.DataFrame, features: list[str]) -> pd.DataFrame:
    """NaN count per feature and class, reported before any model sees the data."""
    nan = samples[features].isna()
    return nan.groupby(samples["class"]).sum().T.rename_axis("feature")


def class_balance(samples: pd.DataFrame) -> pd.DataFrame:
    """Plots and pixels per class."""
    g = samples.groupby("class")
    return pd.DataFrame({"plots": g["plot_id"].nunique(), "pixels": g.size()}).reset_index()


def drop_incomplete(samples: pd.DataFrame, features: list[str], *, policy: str = "drop") -> pd.DataFrame:
    """Apply the missing-data policy.

    ``drop`` removes rows with any NaN feature; ``keep`` keeps them (the model
    routes NaN natively, the same way at fit and at predict time) and removes
    only rows in which every feature is NaN, which carry nothing to learn from.
    """
    if policy not in ("keep", "drop"):
        raise ValueError(f"policy must be 'drop' or 'keep', got {policy!r}")
    present = samples[features].notna()
    keep = present.all(axis=1) if policy == "drop" else present.any(axis=1)
    return samples[keep].reset_index(drop=True)
