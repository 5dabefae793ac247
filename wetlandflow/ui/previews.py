"""Map previews for notebooks: screen-resolution figures read from overviews, never full-resolution arrays.

The run's maps are Cloud-Optimized GeoTIFFs with overviews (average for
probabilities, mode for classes).  :func:`read_preview` opens the coarsest
overview that still has at least ``max_px`` pixels on its longer side (GDAL's
``OVERVIEW_LEVEL``) and decimates it to at most ``max_px``, so a figure of a
map of any size costs a screen's worth of pixels.  Inputs and the feature cube
have no overviews of their own: :func:`preview_grid` is a coarse copy of the
run's grid, and the library's own alignment (:func:`~wetlandflow.inputs.layers.load_inputs`
on that grid, which averages reflectance and takes the mode of categorical
layers) or a block mean of the cube brings them to screen size.

Class maps use the class scheme's own palette (:attr:`~wetlandflow.models.classifier.ClassScheme.colours`)
with a legend; probabilities get a colour bar; map figures carry a scale bar
and a north arrow (every grid is north-up).  Figures are
:class:`matplotlib.figure.Figure` objects, never shown by this module; a notebook
displays them by naming them.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import rasterio
import xarray as xr
from affine import Affine
from rasterio.enums import Resampling

from ..errors import OutputError, ParameterError
from ..inputs.grid import Grid
from ..models.classifier import ClassScheme

DEFAULT_MAX_PX = 600
PROBABILITY_CMAP = "YlGnBu"


# -- reading at screen resolution ----------------------------------------------------------------------------
def _check_max_px(max_px: int) -> int:
    if isinstance(max_px, bool) or not isinstance(max_px, int | np.integer) or max_px < 16:
        raise ParameterError(
            f"max_px must be a whole number of pixels >= 16, got {max_px!r}; "
            f"use about the width of the figure in screen pixels (default {DEFAULT_MAX_PX})"
        )
    return int(max_px)


def overview_level(path: str | Path, max_px: int = DEFAULT_MAX_PX) -> int | None:
    """The overview to read for a preview of ``max_px`` pixels: the coarsest one whose longer side is
    still at least ``max_px``, or ``None`` for the full-resolution level (a raster already at screen size,
    or one whose first overview is smaller than the screen)."""
    max_px = _check_max_px(max_px)
    with rasterio.open(path) as src:
        longest = max(src.width, src.height)
        level = None
        for i, factor in enumerate(src.overviews(1)):
            if math.ceil(longest / factor) >= max_px:
                level = i
        return level


def read_preview(
    path: str | Path,
    *,
    max_px: int = DEFAULT_MAX_PX,
    bands: Sequence[int] | None = None,
    resampling: str = "nearest",
) -> xr.DataArray:
    """Bands of a raster at screen resolution, read from its overviews.

    Parameters
    ----------
    path : path
        A GeoTIFF; a run's maps are COGs with overviews.
    max_px : int
        Longest side of the returned array, in pixels.
    bands : sequence of int, optional
        1-based band numbers (default: all).
    resampling : {"nearest", "average", "mode"}
        Used only for the last decimation from the chosen overview down to ``max_px``; class codes keep
        ``"nearest"`` or ``"mode"``.

    Returns
    -------
    xarray.DataArray
        ``(band, y, x)`` with pixel-centre coordinates in metres, band descriptions as the ``band``
        coordinate, and attrs ``overview_level`` (``-1`` = full resolution), ``full_shape``, ``crs``,
        ``nodata`` and ``pixel_size_m``.
    """
    max_px = _check_max_px(max_px)
    path = Path(path)
    if not path.exists():
        raise OutputError(
            f"{path} not found; run the step that writes it first (wetlandflow run PROJECT.toml)"
        )
    level = overview_level(path, max_px)
    opts = {} if level is None else {"overview_level": level}
    with rasterio.open(path) as full:
        full_shape, descriptions = (full.height, full.width), full.descriptions
        full_transform = full.transform
    with rasterio.open(path, **opts) as src:
        idx = list(bands) if bands is not None else list(range(1, src.count + 1))
        scale = max(1.0, max(src.width, src.height) / max_px)
        h, w = max(1, round(src.height / scale)), max(1, round(src.width / scale))
        values = src.read(idx, out_shape=(len(idx), h, w), resampling=Resampling[resampling], masked=False)
        nodata = src.nodata
        crs = src.crs.to_string() if src.crs else ""
    t = full_transform @ Affine.scale(full_shape[1] / w, full_shape[0] / h)
    x = t.c + t.a * (np.arange(w) + 0.5)
    y = t.f + t.e * (np.arange(h) + 0.5)
    names = [descriptions[i - 1] or f"band {i}" for i in idx]
    return xr.DataArray(
        values,
        dims=("band", "y", "x"),
        coords={"band": names, "y": y, "x": x},
        name=path.stem,
        attrs={
            "overview_level": -1 if level is None else int(level),
            "full_shape": full_shape,
            "crs": crs,
            "nodata": nodata,
            "pixel_size_m": float(t.a),
        },
    )


def preview_grid(grid: Grid, max_px: int = DEFAULT_MAX_PX) -> Grid:
    """A coarse copy of ``grid`` (same origin, whole-number pixel factor) with at most ``max_px`` a side."""
    max_px = _check_max_px(max_px)
    factor = max(1, math.ceil(max(grid.width, grid.height) / max_px))
    return Grid(
        grid.crs,
        grid.transform @ Affine.scale(factor),
        math.ceil(grid.width / factor),
        math.ceil(grid.height / factor),
    )


def coarsen_preview(da: xr.DataArray | xr.Dataset, max_px: int = DEFAULT_MAX_PX) -> xr.DataArray | xr.Dataset:
    """Block mean of ``(y, x)`` layers (cube variables, a SHAP map) down to at most ``max_px`` a side.

    Lazy inputs stay lazy until the small result is computed; NaN is left out of each block's mean.
    """
    max_px = _check_max_px(max_px)
    factor = max(1, math.ceil(max(da.sizes["y"], da.sizes["x"]) / max_px))
    if factor == 1:
        return da.compute()
    out = da.coarsen(y=factor, x=factor, boundary="pad").mean()
    return out.compute().assign_attrs(preview_factor=factor)


# -- map decorations -----------------------------------------------------------------------------------------
def _nice_length(span_m: float) -> float:
    """A round scale-bar length of about a fifth of the map width (1, 2 or 5 times a power of ten)."""
    target = span_m / 5.0
    power = 10 ** math.floor(math.log10(target))
    return max(m * power for m in (1, 2, 5) if m * power <= target)


def add_scale_bar(ax: Any, *, length_m: float | None = None) -> float:
    """Draw a scale bar in the lower left of a map whose axes are in metres; return its length."""
    x0, x1 = ax.get_xlim()
    y0, y1 = ax.get_ylim()
    length = length_m or _nice_length(abs(x1 - x0))
    bx, by = x0 + 0.05 * (x1 - x0), y0 + 0.06 * (y1 - y0)
    ax.plot([bx, bx + length], [by, by], color="black", linewidth=3, solid_capstyle="butt")
    label = f"{length / 1000:g} km" if length >= 1000 else f"{length:g} m"
    ax.text(
        bx + length / 2,
        by + 0.02 * (y1 - y0),
        label,
        ha="center",
        va="bottom",
        fontsize=8,
        bbox={"facecolor": "white", "alpha": 0.7, "edgecolor": "none", "pad": 1},
    )
    return float(length)


def add_north_arrow(ax: Any) -> None:
    """Draw a north arrow in the upper right (grids are north-up, so north is the +y direction)."""
    ax.annotate(
        "N",
        xy=(0.94, 0.95),
        xytext=(0.94, 0.82),
        xycoords="axes fraction",
        ha="center",
        va="center",
        fontsize=9,
        fontweight="bold",
        arrowprops={"arrowstyle": "-|>", "color": "black"},
    )


def _map_axes(ax: Any, size: tuple[float, float] = (6.0, 5.0)) -> tuple[Any, Any]:
    from matplotlib.figure import Figure

    if ax is not None:
        return ax.figure, ax
    fig = Figure(figsize=size, layout="constrained")
    return fig, fig.subplots()


def _extent(da: xr.DataArray) -> tuple[float, float, float, float]:
    dx = (
        float(da["x"].values[1] - da["x"].values[0])
        if da.sizes["x"] > 1
        else da.attrs.get("pixel_size_m", 1.0)
    )
    dy = float(da["y"].values[0] - da["y"].values[1]) if da.sizes["y"] > 1 else dx
    x, y = da["x"].values, da["y"].values
    return (x[0] - dx / 2, x[-1] + dx / 2, y[-1] - dy / 2, y[0] + dy / 2)


def _class_legend(ax: Any, names: Sequence[str], colours: dict[str, str]) -> None:
    """One patch per class, outside the map on the right."""
    from matplotlib.patches import Patch

    ax.legend(handles=[Patch(facecolor=colours[n], edgecolor="0.3", label=n) for n in names],
              loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=8, frameon=False)


def _finish_map(ax: Any, title: str, decorations: bool) -> None:
    ax.set_title(title, fontsize=10)
    ax.set_xlabel("x (m)", fontsize=8)
    ax.set_ylabel("y (m)", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.ticklabel_format(useOffset=False, style="plain")
    if decorations:
        add_scale_bar(ax)
        add_north_arrow(ax)


# -- class maps, probabilities, continuous layers ------------------------------------------------------------
def class_palette(class_names: Sequence[str], parents: dict | None = None):
    """A :class:`matplotlib.colors.ListedColormap` for codes 0..K (0 transparent) in the scheme's colours."""
    from matplotlib.colors import ListedColormap

    colours = ClassScheme(tuple(class_names), parents or {}).colours
    return ListedColormap([(0, 0, 0, 0)] + [colours[n] for n in class_names])


def plot_class_codes(
    codes: xr.DataArray,
    class_names: Sequence[str],
    *,
    ax: Any = None,
    title: str = "class map",
    decorations: bool = True,
) -> Any:
    """A class-code layer (0 = no data, 1..K in scheme order) in the scheme's palette, with a legend."""

    fig, ax = _map_axes(ax)
    k = len(class_names)
    ax.imshow(
        np.asarray(codes.values),
        cmap=class_palette(class_names),
        vmin=-0.5,
        vmax=k + 0.5,
        extent=_extent(codes),
        interpolation="nearest",
    )
    _class_legend(ax, class_names, ClassScheme(tuple(class_names), {}).colours)
    _finish_map(ax, title, decorations)
    return fig


def plot_class_map(
    path: str | Path,
    class_names: Sequence[str],
    *,
    max_px: int = DEFAULT_MAX_PX,
    ax: Any = None,
    title: str | None = None,
) -> Any:
    """A run's class map (``maps/class.tif`` or ``class_final.tif``) from its mode overviews."""
    da = read_preview(path, max_px=max_px, bands=[1])
    return plot_class_codes(da.isel(band=0), class_names, ax=ax, title=title or Path(path).stem)


def plot_probability(
    path: str | Path, classes: Sequence[str] | None = None, *, max_px: int = DEFAULT_MAX_PX, ncols: int = 3
) -> Any:
    """Per-class probability maps (``maps/probability.tif``) side by side with one colour bar (0 to 1)."""
    from matplotlib.figure import Figure

    with rasterio.open(path) as src:
        names = [d or f"band {i + 1}" for i, d in enumerate(src.descriptions)]
    classes = list(classes) if classes is not None else names
    unknown = [c for c in classes if c not in names]
    if unknown:
        raise ParameterError(f"classes {unknown} are not bands of {Path(path).name}; its bands are {names}")
    ncols = min(ncols, len(classes))
    da = read_preview(path, max_px=max(64, max_px // ncols), bands=[names.index(c) + 1 for c in classes])
    nrows = math.ceil(len(classes) / ncols)
    fig = Figure(figsize=(3.2 * ncols + 0.8, 3.0 * nrows), layout="constrained")
    axes = np.atleast_1d(fig.subplots(nrows, ncols, squeeze=False)).ravel()
    im = None
    for ax, c in zip(axes, classes, strict=False):
        im = ax.imshow(
            da.sel(band=c).values,
            cmap=PROBABILITY_CMAP,
            vmin=0,
            vmax=1,
            extent=_extent(da),
            interpolation="nearest",
        )
        _finish_map(ax, f"P({c})", decorations=ax is axes[0])
    for ax in axes[len(classes) :]:
        ax.set_visible(False)
    fig.colorbar(im, ax=list(axes[: len(classes)]), label="probability", shrink=0.8)
    return fig


def plot_values(
    da: xr.DataArray,
    *,
    ax: Any = None,
    title: str | None = None,
    cmap: str = "viridis",
    label: str | None = None,
    vmin: float | None = None,
    vmax: float | None = None,
    centre: float | None = None,
    decorations: bool = True,
) -> Any:
    """A continuous ``(y, x)`` layer at preview size with a colour bar (``centre`` for diverging maps)."""
    from matplotlib.colors import TwoSlopeNorm

    fig, ax = _map_axes(ax)
    values = np.asarray(da.values, dtype=float)
    norm = None
    if centre is not None and np.isfinite(values).any():
        lo, hi = np.nanmin(values), np.nanmax(values)
        span = max(abs(lo - centre), abs(hi - centre), 1e-12)
        norm = TwoSlopeNorm(vcenter=centre, vmin=centre - span, vmax=centre + span)
        vmin = vmax = None
    im = ax.imshow(
        values, cmap=cmap, vmin=vmin, vmax=vmax, norm=norm, extent=_extent(da), interpolation="nearest"
    )
    units = da.attrs.get("units")
    fig.colorbar(im, ax=ax, label=label or (f"{da.name} ({units})" if units else str(da.name)), shrink=0.85)
    _finish_map(ax, title or str(da.attrs.get("long_name", da.name)), decorations)
    return fig


def plot_layer(path: str | Path, band: int | str = 1, *, max_px: int = DEFAULT_MAX_PX, **kwargs: Any) -> Any:
    """One band of a run's raster (confidence, dissimilarity, applicability ...) from its overviews."""
    if isinstance(band, str):
        with rasterio.open(path) as src:
            names = list(src.descriptions)
        if band not in names:
            raise ParameterError(f"{Path(path).name} has no band {band!r}; its bands are {names}")
        band = names.index(band) + 1
    da = read_preview(path, max_px=max_px, bands=[band], resampling="average")
    layer = da.isel(band=0)
    nodata = da.attrs["nodata"]
    values = layer.where(layer != nodata) if nodata is not None and not np.isnan(nodata) else layer
    return plot_values(
        values.astype(float),
        title=kwargs.pop("title", f"{Path(path).stem}: {layer['band'].item()}"),
        **kwargs,
    )


def plot_preview_stack(
    ds: xr.Dataset, variables: Sequence[str], *, ncols: int = 3, cmap: str = "viridis"
) -> Any:
    """Several ``(y, x)`` variables (e.g. of a :func:`coarsen_preview`-ed cube) side by side, each with
    its colour bar (2nd to 98th percentile)."""
    from matplotlib.figure import Figure

    ncols = min(ncols, len(variables))
    nrows = math.ceil(len(variables) / ncols)
    fig = Figure(figsize=(3.6 * ncols, 3.0 * nrows), layout="constrained")
    axes = np.atleast_1d(fig.subplots(nrows, ncols, squeeze=False)).ravel()
    for ax, name in zip(axes, variables, strict=False):
        da = ds[name]
        finite = np.asarray(da.values, float)[np.isfinite(da.values)]
        lo, hi = np.percentile(finite, [2, 98]) if finite.size else (None, None)
        plot_values(
            da,
            ax=ax,
            title=name,
            cmap=cmap,
            vmin=lo,
            vmax=hi,
            label=da.attrs.get("units", ""),
            decorations=ax is axes[0],
        )
    for ax in axes[len(variables) :]:
        ax.set_visible(False)
    return fig


def plot_inventory(
    gdf: Any,
    class_names: Sequence[str],
    *,
    ax: Any = None,
    title: str = "polygon inventory",
    class_column: str = "class",
) -> Any:
    """Polygons of the inventory (``inventory.gpkg``) filled with the scheme's colours."""

    fig, ax = _map_axes(ax)
    colours = ClassScheme(tuple(class_names), {}).colours
    for name, part in gdf.groupby(class_column):
        part.plot(ax=ax, color=colours.get(str(name), "#999999"), edgecolor="0.25", linewidth=0.2)
    present = [n for n in class_names if n in set(gdf[class_column].astype(str))]
    _class_legend(ax, present, colours)
    ax.set_aspect("equal")
    _finish_map(ax, title, True)
    return fig


def plot_sample_points(
    points: Any,
    class_map: str | Path,
    class_names: Sequence[str],
    *,
    max_px: int = DEFAULT_MAX_PX,
    column: str = "map_class",
) -> Any:
    """Validation sample points (a GeoDataFrame) as white dots over the class map; the title counts them."""
    fig = plot_class_map(class_map, class_names, max_px=max_px, title="validation sample over the final map")
    ax = fig.axes[0]
    ax.scatter(
        points.geometry.x,
        points.geometry.y,
        s=10,
        facecolor="white",
        edgecolor="black",
        linewidth=0.6,
    )
    if column in points:
        ax.set_title(
            f"validation sample: {len(points)} points in {points[column].nunique()} map classes", fontsize=10
        )
    return fig


# -- inputs: footprints, previews, clear share, alignment ----------------------------------------------------
def input_footprints(project: Any) -> Any:
    """Footprint of every input raster in the grid CRS: a GeoDataFrame with ``kind, date, file, geometry``."""
    import geopandas as gpd
    from shapely.geometry import box

    from ..inputs.align import inspect_raster
    from ..inputs.layers import project_grid

    grid = project_grid(project)
    layers = (
        [("optical", s.date.isoformat(), s.path) for s in sorted(project.optical, key=lambda s: s.date)]
        + [("sar", s.date.isoformat(), s.path) for s in sorted(project.sar, key=lambda s: s.date)]
        + [("dem", "", project.dem.path)]
    )
    frames = []
    for kind, date, path in layers:
        info = inspect_raster(path)
        g = gpd.GeoDataFrame(
            {"kind": [kind], "date": [date], "file": [Path(path).name]},
            geometry=[box(*info.bounds)],
            crs=info.crs,
        )
        frames.append(g.to_crs(grid.crs))
    return gpd.GeoDataFrame(pd.concat(frames, ignore_index=True), crs=grid.crs)


def plot_footprints(project: Any, *, ax: Any = None) -> Any:
    """Input footprints (outlines by kind) over the AOI, in the grid CRS, with the grid's extent."""
    from matplotlib.lines import Line2D

    from ..inputs.layers import project_grid, read_aoi

    grid = project_grid(project)
    fig, ax = _map_axes(ax, (6.5, 5.5))
    read_aoi(project).to_crs(grid.crs).plot(ax=ax, color="#d9e6d2", edgecolor="#3d6b35", linewidth=1)
    styles = {"optical": ("#2f5f8a", "-"), "sar": ("#8c5a3c", "--"), "dem": ("#555555", ":")}
    feet = input_footprints(project)
    for kind, (colour, style) in styles.items():
        part = feet[feet["kind"] == kind]
        if len(part):
            part.boundary.plot(ax=ax, color=colour, linestyle=style, linewidth=1.2)
    x0, y0, x1, y1 = grid.bounds
    ax.plot([x0, x1, x1, x0, x0], [y0, y0, y1, y1, y0], color="black", linewidth=0.8)
    handles = [
        Line2D([], [], color=c, linestyle=s, label=f"{k} ({int((feet['kind'] == k).sum())})")
        for k, (c, s) in styles.items()
    ] + [Line2D([], [], color="black", linewidth=0.8, label="grid")]
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=8, frameon=False)
    ax.set_aspect("equal")
    _finish_map(ax, "input footprints over the AOI", True)
    return fig


def preview_inputs(project: Any, *, max_px: int = 200) -> Any:
    """Every input aligned onto a coarse copy of the grid (:func:`preview_grid`) by the library's own
    alignment: a :class:`~wetlandflow.features.registry.FeatureInputs` at screen resolution."""
    from ..inputs.layers import load_inputs, project_grid

    return load_inputs(project, preview_grid(project_grid(project), max_px))


def season_of(date: Any, seasons: dict[str, tuple[str, str]]) -> str:
    """The season whose month-day window holds ``date`` ("" when none does)."""
    md = f"{date.month:02d}-{date.day:02d}"
    return next((name for name, (a, b) in seasons.items() if a <= md <= b), "")


def _clear(inputs: Any) -> tuple[np.ndarray, pd.DatetimeIndex]:
    """Clear (every band valid after the quality mask) per scene and AOI pixel: (time, n_aoi_pixels)."""
    aoi = np.asarray(inputs.aoi.values, bool)
    clear = np.asarray(np.isfinite(inputs.optical).all("band").values)[:, aoi]
    return clear, pd.to_datetime(inputs.optical["time"].values)


def clear_share(inputs: Any, seasons: dict[str, tuple[str, str]]) -> pd.DataFrame:
    """Share of the AOI observed clear (quality mask and no data applied) in each optical scene.

    ``inputs`` is :func:`preview_inputs` (the estimate is made on the preview grid); one row per scene
    with its date and season.
    """
    clear, dates = _clear(inputs)
    return pd.DataFrame(
        {
            "date": [d.date().isoformat() for d in dates],
            "season": [season_of(d, seasons) for d in dates],
            "clear_share": clear.mean(axis=1).round(3),
        }
    )


def clear_share_by_season(inputs: Any, seasons: dict[str, tuple[str, str]]) -> pd.DataFrame:
    """Per season: the scenes it holds, their mean clear share, and the share of the AOI clear in at least
    one of them (what a seasonal composite can fill); seasons without a scene show 0 scenes."""
    clear, dates = _clear(inputs)
    of = np.array([season_of(d, seasons) for d in dates])
    rows = []
    for name in seasons:
        hit = clear[of == name]
        rows.append(
            {
                "season": name,
                "scenes": int(hit.shape[0]),
                "mean_clear_share": round(float(hit.mean()), 3) if hit.size else 0.0,
                "clear_in_any_scene": round(float(hit.any(axis=0).mean()), 3) if hit.size else 0.0,
            }
        )
    return pd.DataFrame(rows)


def alignment_check(project: Any) -> pd.DataFrame:
    """Per input raster: does it cover the grid, share its CRS and pixel size, or need warping (and how)."""
    from ..inputs.layers import input_inventory, project_grid

    grid = project_grid(project)
    table = input_inventory(project, grid)
    from pyproj import CRS

    same_crs = np.array([CRS.from_user_input(c) == grid.pyproj_crs for c in table["crs"]])
    same_pixel = np.isclose(table["pixel_m"].to_numpy(float), grid.resolution)
    handling = [
        ", ".join(w for w, need in (("reprojected", not c), ("resampled", not p)) if need) or "as is"
        for c, p in zip(same_crs, same_pixel, strict=True)
    ]
    return table.assign(
        same_crs=same_crs,
        same_pixel=same_pixel,
        covers_grid_fully=table["covers_grid"] >= 0.99,
        handling=handling,
    )


def plot_rgb(
    inputs: Any,
    *,
    date: str | None = None,
    bands: tuple[str, str, str] = ("red", "green", "blue"),
    ax: Any = None,
    stretch: tuple[float, float] = (2, 98),
) -> Any:
    """A true-colour view of one optical scene of :func:`preview_inputs` (percentile stretch)."""
    fig, ax = _map_axes(ax)
    opt = inputs.optical
    t = opt["time"].values[0] if date is None else np.datetime64(date, "ns")
    rgb = np.stack([opt.sel(time=t, band=b).values for b in bands], axis=-1).astype(float)
    lo, hi = np.nanpercentile(rgb, stretch)
    img = np.clip((rgb - lo) / max(hi - lo, 1e-6), 0, 1)
    img = np.where(np.isfinite(img), img, 1.0)
    ax.imshow(img, extent=_extent(opt.isel(time=0, band=0)), interpolation="nearest")
    _finish_map(ax, f"optical {str(t)[:10]} ({', '.join(bands)})", True)
    return fig


# -- explanations --------------------------------------------------------------------------------------------
def shap_map_preview(
    model: Any,
    cube: xr.Dataset,
    features: list[str],
    class_name: str,
    *,
    feature: str | None = None,
    domain: str | None = None,
    domains: dict | None = None,
    max_px: int = 150,
) -> xr.DataArray:
    """A SHAP map (:func:`~wetlandflow.explain.attribution.shap_map`) of the whole grid at preview resolution.

    The model explains every ``k``-th pixel of the cube (a regular subsample, so the cost is that of
    ``max_px`` squared pixels, not of the grid), not a block mean: SHAP values of averaged features
    would explain pixels that do not exist.
    """
    from ..explain.attribution import shap_map

    max_px = _check_max_px(max_px)
    k = max(1, math.ceil(max(cube.sizes["y"], cube.sizes["x"]) / max_px))
    sub = cube[features].isel(y=slice(k // 2, None, k), x=slice(k // 2, None, k))
    window = (slice(0, sub.sizes["y"]), slice(0, sub.sizes["x"]))
    out = shap_map(
        model, sub, features, class_name, window=window, feature=feature, domain=domain, domains=domains
    )
    return out.assign_attrs(preview_step=k)
