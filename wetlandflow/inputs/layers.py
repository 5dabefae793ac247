"""A project's inputs, inspected and aligned onto its reference grid.

:func:`project_grid` derives the grid from the AOI and pixel size,
:func:`load_inputs` opens every layer lazily on it into a :class:`FeatureInputs` (with reflectance scaling,
quality masks, SAR scale and DEM units handled), and :func:`input_inventory`
is the table that ``wetlandflow check`` prints.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import AlignmentError, DataQualityError, InputFileError, ProjectFileError
from .align import (
    aoi_mask,
    aoi_on_grid,
    check_overlap,
    inspect_raster,
    read_aligned,
    sample_windows,
    values_on_coarse_grid,
)
from .grid import Grid, attach, require_projected
from .io import read_vector
from .project import SAR_POLARISATIONS, Project, scene_files
from .sensors import BAND_NAMES

FEET_TO_M = 0.3048  # international foot, exact by definition
_METRE_NAMES = {"m", "metre", "meter", "metres", "meters"}
_FOOT_NAMES = {"ft", "foot", "feet", "us survey foot", "us_survey_foot", "ftus", "foot_us", "us-ft",
               "international foot"}


@dataclass
class FeatureInputs:
    """Aligned inputs of a run, on one grid, plus a cache for shared intermediates."""

    grid: Grid
    optical: xr.DataArray | None = None  # (time, band, y, x) reflectance
    composite: xr.Dataset | None = None  # reflectance (season, band, y, x), valid_count (season, y, x)
    sar: xr.DataArray | None = None  # (time, pol, y, x) linear power
    dem: xr.DataArray | None = None  # (y, x) elevation in metres
    aoi: xr.DataArray | None = None  # (y, x) bool
    seasons: dict[str, tuple[str, str]] = field(default_factory=dict)  # name -> (month-day, month-day)
    cache: dict[str, Any] = field(default_factory=dict)

    def cached(self, key: str, make: Callable[[], Any]) -> Any:
        """Compute an intermediate once per run (e.g. the filled DEM, the flow accumulation)."""
        if key not in self.cache:
            self.cache[key] = make()
        return self.cache[key]


class InputCoverageWarning(UserWarning):
    """An input holds no usable pixel inside the area of interest and contributes nothing."""


def read_aoi(project: Project):
    aoi = read_vector(project.area.aoi, layer=project.area.layer or None, what="AOI polygon file",
                      key="area.layer")
    aoi = aoi[~aoi.geometry.is_empty & aoi.geometry.notna()]
    if aoi.empty:
        raise InputFileError("the AOI file holds no polygon; draw the project area and save it", path=str(project.area.aoi))
    if not set(aoi.geom_type) <= {"Polygon", "MultiPolygon"}:
        kinds = sorted(set(aoi.geom_type))
        raise InputFileError(f"the AOI must be polygons, found {kinds}; draw the project area as one or more "
                             "polygons and save it (area.aoi in the project file)",
                             path=str(project.area.aoi))
    if not aoi.is_valid.all():
        aoi = aoi.assign(geometry=aoi.geometry.make_valid())
    return aoi


def grid_reference(project: Project) -> tuple[str, Path | None]:
    """The input whose CRS, pixel size and pixel edges the default grid follows: ``(label, file)``.

    ``grid.align_to`` names the kind (``optical``, ``sar``, ``dem``; ``none`` snaps the origin to whole
    multiples of the pixel size instead); by default the first optical scene (by date), else the first SAR
    scene, else the DEM.
    """
    choice = project.grid.align_to
    candidates = {
        "optical": [("optical", s) for s in sorted(project.optical, key=lambda s: s.date)],
        "sar": [("sar", s) for s in sorted(project.sar, key=lambda s: s.date)],
        "dem": [("dem", project.dem)] if project.dem is not None else [],
    }
    order = ["optical", "sar", "dem"] if choice in ("", "none") else [choice]
    for kind in order:
        if candidates[kind]:
            _, item = candidates[kind][0]
            path = scene_files(item)[0][0] if kind != "dem" else item.path
            return f"{kind} {path.name}", path
    if choice not in ("", "none"):
        raise ProjectFileError(f"grid.align_to = {choice!r}, but the project has no {choice} input; name one it "
                               "has (optical, sar, dem), or remove the key", key="grid.align_to",
                               file=str(project.file))
    raise ProjectFileError("the project has no raster input to take the grid from", key="grid")


def project_grid(project: Project) -> Grid:
    """The reference grid: AOI bounds in the grid CRS, snapped outward to whole pixels.

    Defaults: the CRS and pixel size of the reference input (:func:`grid_reference`: the first optical
    scene unless ``grid.align_to`` says otherwise).  When the grid has that input's CRS, its origin is
    snapped to that input's pixel edges, so a grid of the same pixel size reads its pixels without any
    resampling, and a grid of a whole multiple of its pixel size averages whole blocks of them.  With
    ``grid.align_to = "none"`` (or another CRS) the origin is a whole multiple of the pixel size.
    """
    label, ref_path = grid_reference(project)
    first = inspect_raster(ref_path)
    crs = project.grid.crs or first.crs
    require_projected(crs, what="grid")
    res = project.grid.pixel_size_m or first.resolution[0]
    if not project.grid.crs:
        require_projected(first.crs, what=label)
    aoi = read_aoi(project).to_crs(crs)
    anchor = None
    if project.grid.align_to != "none" and require_projected(crs) == require_projected(first.crs):
        anchor = (first.bounds[0], first.bounds[3])  # the reference's top-left pixel corner
    grid = Grid.from_bbox(tuple(aoi.total_bounds), crs=crs, resolution=res, anchor=anchor)
    if min(grid.width, grid.height) < MIN_GRID_SIDE:
        key = "grid.pixel_size_m" if project.grid.pixel_size_m else "grid.align_to"
        x0, y0, x1, y1 = aoi.total_bounds
        raise ProjectFileError(
            f"pixels of {res:g} m give a grid of only {grid.height} x {grid.width} over the AOI; a map (and "
            f"the checks of every input on it) needs at least {MIN_GRID_SIDE} pixels a side. Set "
            f"grid.pixel_size_m to at most {min(x1 - x0, y1 - y0) / MIN_GRID_SIDE:.0f} m (0 = the reference "
            "input's pixel size)", key=key, file=str(project.file))
    return grid


# pixels a side of the smallest grid worth mapping (a rule of thumb: common practice, no source)
MIN_GRID_SIDE = 10


def _optical_scene(scene, grid: Grid, chunks: int) -> xr.DataArray:
    name = f"optical {scene.date.isoformat()}"
    parts = [read_aligned(path, grid, kind="reflectance", name=f"{name} {path.name}", band_names=bands,
                          nodata=scene.nodata, chunks=chunks) for path, bands in scene_files(scene)]
    dn = parts[0] if len(parts) == 1 else xr.concat(parts, dim="band", combine_attrs="drop_conflicts")
    refl = (dn + np.float32(scene.offset_dn)) * np.float32(scene.scale)
    if scene.offset:
        refl = refl + np.float32(scene.offset)
    if scene.mask is not None:
        qa = read_aligned(scene.mask, grid, kind="categorical", name=f"{name} mask", chunks=chunks).isel(band=0)
        refl = refl.where(qa.isin(list(scene.mask_valid)))
    refl = refl.astype(np.float32).expand_dims(time=[np.datetime64(scene.date, "ns")])
    refl.attrs = {**parts[0].attrs, "units": "1", "long_name": "surface reflectance",
                  "scaling": f"(DN + {scene.offset_dn:g}) * {scene.scale:g} + {scene.offset:g}",
                  "sensor": scene.sensor or "unnamed",
                  "files": [p.name for p, _ in scene_files(scene)],
                  "mask": scene.mask.name if scene.mask else "none",
                  "mask_valid": list(scene.mask_valid)}
    return refl


def check_band_names(path: str | Path, bands: tuple[str, ...] | list[str], *, key: str,
                     vocabulary: tuple[str, ...], project_file: str | Path | None = None) -> None:
    """Refuse a band list that contradicts the band descriptions stored in the file itself.

    Only files whose every band is described with a name of ``vocabulary``
    (the portable names, e.g. ``nir``) are compared; files without
    descriptions, or described in another naming, are taken as the project
    file says.  A band count that differs is left to :func:`read_aligned`.

    Raises
    ------
    ProjectFileError
        Naming the key (``optical[2].bands``), the file, both lists and the fix.
    """
    described = [d or "" for d in inspect_raster(path).descriptions]
    if len(described) != len(bands) or not all(described) or not set(described) <= set(vocabulary):
        return
    if described != list(bands):
        dup = sorted({d for d in described if described.count(d) > 1})
        what = f" (the file names {dup} more than once; fix its band descriptions)" if dup else ""
        raise ProjectFileError(
            f"the file {Path(path).name} describes its bands, in order, as {described}{what}, but the "
            f"project file lists {list(bands)}. List the bands in the file's order, or fix the file if its "
            "descriptions are wrong",
            key=key, file=str(project_file) if project_file else None,
        )


def load_optical(project: Project, grid: Grid, *, chunks: int) -> xr.DataArray | None:
    """All optical scenes as one (time, band, y, x) reflectance stack, sorted by date (None without any)."""
    if not project.optical:
        return None
    bands = project.optical[0].bands
    scenes = []
    for i, s in sorted(enumerate(project.optical), key=lambda t: t[1].date):
        if set(s.bands) != set(bands):
            raise AlignmentError(
                f"optical scene {s.label} (optical[{i}].bands) has bands {list(s.bands)}, the first "
                f"scene {list(bands)}; every scene must carry the same bands: fix the band lists in the "
                "project file (or leave out the bands only some scenes have)"
            )
        for path, file_bands in scene_files(s):
            check_band_names(path, file_bands, key=f"optical[{i}].bands", vocabulary=BAND_NAMES,
                             project_file=project.file)
        scenes.append(_optical_scene(s, grid, chunks).sel(band=list(bands)))
    stack = xr.concat(scenes, dim="time", combine_attrs="drop_conflicts")
    stack.attrs = {"units": "1", "long_name": "surface reflectance", "kind": "reflectance",
                   "resampling": scenes[0].attrs["resampling"],
                   "sensor": ", ".join(dict.fromkeys(s.sensor or "unnamed" for s in project.optical))}
    return attach(stack.rename("optical"), grid)


def _to_linear_power(da: xr.DataArray, units: str) -> xr.DataArray:
    if units == "db":
        return 10.0 ** (da / 10.0)
    if units == "amplitude":
        return da * da
    return da


def check_sar_file_units(path: str | Path, declared: str, *, nodata: float | None, key: str) -> dict | None:
    """Check the values in a SAR file against the units the project file declares, before any conversion.

    Reads a few small windows (:func:`~wetlandflow.inputs.align.sample_windows`), so
    it is cheap whatever the file's size.  Checking the raw values matters:
    once dB values have been converted as if they were linear (or the
    reverse), the result looks like yet another unit and the advice would be
    wrong.  Returns the statistics, or ``None`` when the windows hold no data
    (the run's check on the aligned layer then decides).

    Raises
    ------
    DataQualityError
        Naming the key (``sar[3].units``), the file, what the values look like and the fix.
    """
    from .sar_units import check_sar_units

    values = sample_windows(path, nodata=nodata)
    if not np.isfinite(values).any():
        return None
    try:
        return check_sar_units(xr.DataArray(values, dims=("pol", "sample")), declared, name=Path(path).name)
    except DataQualityError as exc:
        raise DataQualityError(f"[{key}] {exc}") from None


def load_sar(project: Project, grid: Grid, *, chunks: int) -> xr.DataArray | None:
    """All SAR scenes as (time, pol, y, x) linear power, with an ``orbit`` coordinate on time.

    dB and amplitude inputs are converted to power *before* resampling would
    matter: GDAL resamples the file's own values, so dB inputs are resampled in
    dB; that bias is small for same-grid inputs and recorded in attrs.
    """
    if not project.sar:
        return None
    pols = project.sar[0].bands
    layers, orbits = [], []
    for i, s in sorted(enumerate(project.sar), key=lambda t: t[1].date):
        if set(s.bands) != set(pols):
            raise AlignmentError(
                f"SAR scene {s.label} (sar[{i}].bands) has polarisations {list(s.bands)}, the first scene "
                f"{list(pols)}; every SAR date must carry the same polarisations: fix the band lists in the "
                "project file, or leave out the polarisation only some dates have")
        parts = []
        for path, file_bands in scene_files(s):
            check_band_names(path, file_bands, key=f"sar[{i}].bands", vocabulary=SAR_POLARISATIONS,
                             project_file=project.file)
            parts.append(read_aligned(path, grid, kind="sar_power", name=f"sar {s.date.isoformat()} {path.name}",
                                      band_names=file_bands, nodata=s.nodata, chunks=chunks))
            check_sar_file_units(path, s.units, nodata=s.nodata, key=f"sar[{i}].units")
        da = parts[0] if len(parts) == 1 else xr.concat(parts, dim="band", combine_attrs="drop_conflicts")
        da = _to_linear_power(da.sel(band=list(pols)), s.units).rename({"band": "pol"})
        layers.append(da.astype(np.float32).expand_dims(time=[np.datetime64(s.date, "ns")]))
        orbits.append(s.orbit)
    stack = xr.concat(layers, dim="time", combine_attrs="drop_conflicts").assign_coords(orbit=("time", orbits))
    stack.attrs = {"units": "1 (linear power)", "long_name": "SAR backscatter", "kind": "sar_power",
                   "source_units": sorted({s.units for s in project.sar})}
    return attach(stack.rename("sar"), grid)


def load_dem(project: Project, grid: Grid, *, chunks: int) -> xr.DataArray | None:
    """The DEM on the grid in metres (reprojected before any derivative is taken); None without a DEM."""
    if project.dem is None:
        return None
    da = read_aligned(project.dem.path, grid, kind="elevation", name="dem", nodata=project.dem.nodata,
                      chunks=chunks).isel(band=0, drop=True)
    if project.dem.units == "ft":
        da = da * np.float32(FEET_TO_M)
    out = da.astype(np.float32).rename("dem")
    out.attrs = {**da.attrs, "units": "m", "long_name": "elevation", "source_units": project.dem.units}
    return attach(out, grid)


def _units_of(name: str) -> str | None:
    name = name.strip().lower()
    return "m" if name in _METRE_NAMES else "ft" if name in _FOOT_NAMES else None


def _file_elevation_units(path: Path) -> tuple[str | None, str]:
    """The DEM's elevation unit from its metadata (band unit, else a vertical CRS), and where it was found."""
    import rasterio
    from pyproj import CRS

    with rasterio.open(path) as src:
        band_unit = (src.units[0] or "") if src.units else ""
        crs = src.crs
    if _units_of(band_unit):
        return _units_of(band_unit), f"band unit {band_unit!r}"
    if crs is not None:
        c = CRS.from_user_input(crs.to_wkt())
        for sub in c.sub_crs_list if c.is_compound else []:
            if sub.is_vertical and sub.axis_info and _units_of(sub.axis_info[0].unit_name):
                return _units_of(sub.axis_info[0].unit_name), f"vertical CRS {sub.name!r}"
    return None, ""


# Elevations on land lie between about -430 m (the Dead Sea shore) and 8849 m (the summit of Everest); a
# relief larger than the horizontal extent (a mean slope above 45 degrees across the whole area) is not a
# landscape with wetlands (a rule of thumb: common practice, no source).
ELEVATION_RANGE_M = (-450.0, 8850.0)


def dem_range_warning(values: np.ndarray, units: str, *, extent_m: float, name: str) -> str | None:
    """Warn (:class:`~wetlandflow.errors.PlausibilityWarning`) when elevations contradict their declared
    unit: beyond the elevations of land, or a relief steeper than the area is wide (centimetres declared as
    metres)."""
    from ..errors import PlausibilityWarning

    v = values[np.isfinite(values)] * (0.3048 if units == "ft" else 1.0)
    if v.size == 0:
        return None
    lo, hi = float(v.min()), float(v.max())
    beyond = lo < ELEVATION_RANGE_M[0] or hi > ELEVATION_RANGE_M[1]
    steep = hi - lo > extent_m
    if not (beyond or steep):
        return None
    why = (f"beyond the elevations of land ({ELEVATION_RANGE_M[0]:g} to {ELEVATION_RANGE_M[1]:g} m)" if beyond
           else f"a relief of {hi - lo:,.0f} m over an area {extent_m:,.0f} m across")
    unit = "feet" if units == "ft" else "metres"
    message = (f"[dem.units] the DEM {name} declared in {unit} holds elevations from {lo:,.1f} to "
               f"{hi:,.1f} m, {why}: the values may be in another unit (centimetres, "
               "decimetres). Convert the file to metres (or feet and set dem.units = 'ft'); slope, TWI and "
               "height above drainage scale with it")
    warnings.warn(message, PlausibilityWarning, stacklevel=3)
    return message


def check_dem(project: Project, grid: Grid, aoi, *, max_nodata_share: float = 0.05,
              max_side: int = 256) -> float:
    """Check the DEM's declared units against its metadata and its coverage of the AOI.

    Elevations in feet are recognised only from metadata (a band unit or a
    vertical CRS in feet): the values alone cannot tell feet from metres.
    Coverage is measured on a coarse copy of the grid (at most ``max_side``
    pixels a side): flow routing and the terrain features need elevation
    everywhere, so more than ``max_nodata_share`` of the AOI without data
    (holes, or a DEM that does not reach) is refused.  The 5 % default is a
    rule of thumb (common practice, no source).

    Returns
    -------
    float
        Share of the AOI with elevation data (NaN when the grid holds no AOI pixel).

    Raises
    ------
    ProjectFileError
        ``dem.units`` contradicts the file's metadata.
    DataQualityError
        Too much of the AOI has no elevation.
    """
    dem = project.dem
    if dem is None:
        return float("nan")
    found, where = _file_elevation_units(dem.path)
    if found is not None and found != dem.units:
        unit = "feet" if found == "ft" else "metres"
        raise ProjectFileError(
            f"the DEM {dem.path.name} gives its elevations in {unit} ({where}), but the project file says "
            f"units = {dem.units!r}. Set dem.units = {found!r} (feet are converted to metres), or correct "
            "the file's metadata if the values really are in the declared unit",
            key="dem.units", file=str(project.file),
        )
    coarse = grid.coarsen(max(1, math.ceil(max(grid.width, grid.height) / max_side)))
    inside = aoi_on_grid(aoi, coarse)
    if not inside.any():
        return float("nan")
    values = values_on_coarse_grid(dem.path, coarse, nodata=dem.nodata)
    share = float(np.isfinite(values)[inside].mean())
    extent = float(np.hypot(grid.width, grid.height) * grid.resolution)
    dem_range_warning(values[inside], dem.units, extent_m=extent, name=dem.path.name)
    if share < 1.0 - max_nodata_share:
        raise DataQualityError(
            f"[dem.path] the DEM {dem.path.name} has no elevation over {1 - share:.0%} of the area of "
            f"interest (no-data value {dem.nodata:g}, or the file does not reach that far); terrain features "
            f"and flow routing need elevation everywhere in it (at most {max_nodata_share:.0%} missing). "
            "Fill the holes (e.g. gdal_fillnodata.py, or mosaic a second DEM in), use a DEM that covers the "
            "AOI, or correct dem.nodata if it is a real elevation"
        )
    return share


def _clear_share(scene, coarse: Grid, inside: np.ndarray) -> float:
    """Share of the AOI where a scene has data in its first band and, with a mask, a valid mask code."""
    ok = np.isfinite(values_on_coarse_grid(scene_files(scene)[0][0], coarse, nodata=scene.nodata))
    if scene.mask is not None:
        codes = values_on_coarse_grid(scene.mask, coarse, nodata=0)
        ok &= np.isin(codes, list(scene.mask_valid))
    return float(ok[inside].mean())


def check_observations(project: Project, grid: Grid, aoi, *, max_side: int = 256) -> dict[str, float]:
    """Share of the AOI with a clear observation, per optical scene; refuse a season with none.

    Measured on a coarse copy of the grid (at most ``max_side`` pixels a
    side, nearest neighbour), from the scene's no-data value and its quality
    mask codes (``mask_valid``).  A fully clouded scene is kept, with an
    :class:`InputCoverageWarning`; a season none of whose scenes has a clear
    pixel would give an empty composite, and is refused.

    Returns
    -------
    dict
        ``"optical[i] file"`` -> clear share of the AOI.

    Raises
    ------
    DataQualityError
        Naming the season key, its scenes and the fixes.
    """
    from .seasons import season_mask

    if not project.optical:
        return {}
    coarse = grid.coarsen(max(1, math.ceil(max(grid.width, grid.height) / max_side)))
    inside = aoi_on_grid(aoi, coarse)
    if not inside.any():
        return {}
    shares = {i: _clear_share(s, coarse, inside) for i, s in enumerate(project.optical)}
    for i, share in shares.items():
        if share == 0:
            s = project.optical[i]
            warnings.warn(f"optical[{i}] {s.label}: no clear pixel inside the area of interest (fully "
                          f"clouded, or no data under mask codes {list(s.mask_valid)}); the scene adds "
                          "nothing to the composites", InputCoverageWarning, stacklevel=2)
    dates = np.array([np.datetime64(s.date, "D") for s in project.optical])
    for name, (start, end) in project.seasons.items():
        members = np.flatnonzero(season_mask(dates, start, end))
        if members.size and all(shares[i] == 0 for i in members):
            files = [project.optical[i].label for i in members]
            raise DataQualityError(
                f"[seasons.{name}] season {name!r} ({start} to {end}) has no valid observation inside the "
                f"area of interest: its scene(s) {files} are fully clouded or without data. Add a clear "
                "scene in that window, widen the window in [seasons], or remove the season from the project "
                "file"
            )
    return {f"optical[{i}] {project.optical[i].label}": round(v, 4) for i, v in shares.items()}


# Set by wetlandflow.features.registry when the feature stage is imported: this stage must not import it.
NEEDS_RESOLVER: list[Callable[[Project], set[str]]] = []


def needed_inputs(project: Project) -> set[str]:
    """The inputs (``optical``, ``sar``, ``dem``) the feature selection reads
    (:func:`wetlandflow.features.registry.needed_inputs`); every input when the feature stage is not loaded."""
    if NEEDS_RESOLVER:
        return NEEDS_RESOLVER[0](project)
    return {"optical", "sar", "dem"}


def selected_inputs(project: Project) -> Project:
    """The project without the image inputs no selected feature reads (optical, SAR, DEM).

    Seasons are checked against every scene when the file is loaded; here only the reading is skipped.
    """
    import dataclasses

    needed = needed_inputs(project)
    keep = {"optical": project.optical if "optical" in needed else (),
            "sar": project.sar if "sar" in needed else (),
            "dem": project.dem if "dem" in needed else None}
    if not keep["optical"] and not keep["sar"]:  # the grid and the AOI mask still need a raster to follow
        return project
    return dataclasses.replace(project, **keep)


def check_aoi_covered(project: Project, grid: Grid, aoi, *, max_uncovered: float = 0.05) -> float:
    """Refuse an AOI that reaches beyond every input raster (more than ``max_uncovered`` of its area, the
    DEM's rule of thumb), naming the AOI and the share, rather than blaming the first layer short of it."""
    from rasterio.warp import transform_bounds
    from shapely.geometry import box
    from shapely.ops import unary_union

    files = [p for s in (*project.optical, *project.sar) for p, _ in scene_files(s)]
    files += [project.dem.path] if project.dem is not None else []
    footprints = []
    for path in files:
        info = inspect_raster(path)
        footprints.append(box(*transform_bounds(info.crs, grid.crs, *info.bounds, densify_pts=21)))
    area = aoi.to_crs(grid.crs).union_all()
    if not footprints or area.area <= 0:
        return 0.0
    uncovered = area.difference(unary_union(footprints)).area / area.area
    if uncovered > max_uncovered:
        aoi_bounds = tuple(round(v) for v in aoi.to_crs(grid.crs).total_bounds)
        raster_bounds = tuple(round(v) for v in unary_union(footprints).bounds)
        raise AlignmentError(
            f"[area.aoi] the AOI {project.area.aoi.name} reaches beyond every input raster: {uncovered:.0%} "
            f"of its area (AOI bounds {aoi_bounds}, rasters up to {raster_bounds} in {grid.crs}) has no "
            "image. Shrink the AOI to the rasters' extent, or add rasters that cover it")
    return uncovered


def load_inputs(project: Project, grid: Grid | None = None, *, check: bool = True) -> FeatureInputs:
    """Every input of the project, aligned lazily onto the grid.

    Opening the layers checks their headers, band names and counts, overlap
    and SAR units against the files.  With ``check`` (the default) the DEM's
    units and coverage (:func:`check_dem`) and the clear observations of every
    season (:func:`check_observations`) are then checked on a coarse sample of
    the grid, before anything is computed at full resolution.
    """
    grid = grid or project_grid(project)
    chunks = project.output.chunk_size
    aoi_polygons = read_aoi(project)
    # only the inputs the selected features read: a file no feature uses must not refuse (or slow) the run
    project = selected_inputs(project)
    # the lazy layers first: opening them checks headers, band counts and overlap, which explain more
    # precisely than a coverage check what is wrong with a file
    optical = load_optical(project, grid, chunks=chunks)
    sar = load_sar(project, grid, chunks=chunks)
    dem = load_dem(project, grid, chunks=chunks)
    if check:
        check_aoi_covered(project, grid, aoi_polygons)
        check_dem(project, grid, aoi_polygons)
        check_observations(project, grid, aoi_polygons)
    return FeatureInputs(grid=grid, optical=optical, sar=sar, dem=dem,
                         aoi=aoi_mask(aoi_polygons, grid, chunks=chunks), seasons=dict(project.seasons))


def input_inventory(project: Project, grid: Grid | None = None) -> pd.DataFrame:
    """One row per input raster file: kind, date, bands, CRS, pixel size, share of the grid covered, and
    how it reaches the grid (read as is when it shares the grid's pixels, else the resampling used)."""
    from .align import _is_same_grid, _source_resolution_on_grid, choose_resampling

    grid = grid or project_grid(project)
    rows = []

    def add(kind, date, path, bands, extra="", layer_kind="reflectance"):
        info = inspect_raster(path)
        frac = check_overlap(info, grid, name=f"{kind} {path.name}")
        same = _is_same_grid(str(path), grid)[0]
        how = "on the grid's pixels" if same else \
            f"resampled ({choose_resampling(layer_kind, _source_resolution_on_grid(info, grid), grid).name})"
        rows.append({"kind": kind, "date": date, "file": path.name, "bands": ",".join(bands) or str(info.count),
                     "crs": info.crs, "pixel_m": round(info.resolution[0], 3),
                     "covers_grid": round(min(frac, 1.0), 3), "to_grid": how, "notes": extra})

    for s in sorted(project.optical, key=lambda s: s.date):
        for path, bands in scene_files(s):
            add("optical", s.date.isoformat(), path, bands, f"{s.sensor or 'no sensor named'}; scale {s.scale:g}, "
                f"offset {s.offset_dn:g} DN, {s.offset:+g}")
    for s in sorted(project.sar, key=lambda s: s.date):
        for path, bands in scene_files(s):
            add("sar", s.date.isoformat(), path, bands, f"{s.units}, {s.orbit}", layer_kind="sar_power")
    if project.dem is not None:
        add("dem", "", project.dem.path, (), f"units {project.dem.units}", layer_kind="elevation")
    return pd.DataFrame(rows)
