"""A project's inputs, inspected and aligned onto its reference grid.

:func:`project_grid` derives the grid from the AOI and pixel size,
:func:`load_inputs` opens every layer lazily on it (with reflectance scaling,
quality masks, SAR scale and DEM units handled), and :func:`input_inventory`
is the table that ``wetlandflow check`` prints.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import xarray as xr

from .align import aoi_mask, check_overlap, inspect_raster, read_aligned
from .errors import AlignmentError, InputFileError
from .features.registry import FeatureInputs
from .grid import Grid, attach, require_projected
from .io import read_vector
from .project import Project

FEET_TO_M = 0.3048  # international foot, exact by definition


def read_aoi(project: Project):
    aoi = read_vector(project.area.aoi, layer=project.area.layer or None, what="AOI polygon file")
    aoi = aoi[~aoi.geometry.is_empty & aoi.geometry.notna()]
    if aoi.empty:
        raise InputFileError("the AOI file holds no polygon; draw the project area and save it", path=str(project.area.aoi))
    if not set(aoi.geom_type) <= {"Polygon", "MultiPolygon"}:
        raise InputFileError(f"the AOI must be polygons, found {sorted(set(aoi.geom_type))}", path=str(project.area.aoi))
    if not aoi.is_valid.all():
        aoi = aoi.assign(geometry=aoi.geometry.make_valid())
    return aoi


def project_grid(project: Project) -> Grid:
    """The reference grid: AOI bounds in the grid CRS, snapped outward to whole pixels.

    Defaults: the CRS and pixel size of the first optical scene.
    """
    first = inspect_raster(project.optical[0].path)
    crs = project.grid.crs or first.crs
    require_projected(crs, what="grid")
    res = project.grid.pixel_size_m or first.resolution[0]
    if not project.grid.crs:
        require_projected(first.crs, what=f"optical scene {project.optical[0].path.name}")
    aoi = read_aoi(project).to_crs(crs)
    return Grid.from_bbox(tuple(aoi.total_bounds), crs=crs, resolution=res)


def _optical_scene(scene, grid: Grid, chunks: int) -> xr.DataArray:
    name = f"optical {scene.date.isoformat()}"
    dn = read_aligned(scene.path, grid, kind="reflectance", name=name, band_names=scene.bands,
                      nodata=scene.nodata, chunks=chunks)
    refl = (dn + np.float32(scene.offset_dn)) * np.float32(scene.scale)
    if scene.mask is not None:
        qa = read_aligned(scene.mask, grid, kind="categorical", name=f"{name} mask", chunks=chunks).isel(band=0)
        refl = refl.where(qa.isin(list(scene.mask_valid)))
    refl = refl.astype(np.float32).expand_dims(time=[np.datetime64(scene.date, "ns")])
    refl.attrs = {**dn.attrs, "units": "1", "long_name": "surface reflectance",
                  "scaling": f"(DN + {scene.offset_dn:g}) * {scene.scale:g}",
                  "mask": scene.mask.name if scene.mask else "none",
                  "mask_valid": list(scene.mask_valid)}
    return refl


def load_optical(project: Project, grid: Grid, *, chunks: int) -> xr.DataArray:
    """All optical scenes as one (time, band, y, x) reflectance stack, sorted by date."""
    bands = project.optical[0].bands
    scenes = []
    for s in sorted(project.optical, key=lambda s: s.date):
        if set(s.bands) != set(bands):
            raise AlignmentError(
                f"optical scene {s.path.name} has bands {list(s.bands)}, the first scene {list(bands)}; "
                "every scene must carry the same bands"
            )
        scenes.append(_optical_scene(s, grid, chunks).sel(band=list(bands)))
    stack = xr.concat(scenes, dim="time", combine_attrs="drop_conflicts")
    stack.attrs = {"units": "1", "long_name": "surface reflectance", "kind": "reflectance",
                   "resampling": scenes[0].attrs["resampling"]}
    return attach(stack.rename("optical"), grid)


def _to_linear_power(da: xr.DataArray, units: str) -> xr.DataArray:
    if units == "db":
        return 10.0 ** (da / 10.0)
    if units == "amplitude":
        return da * da
    return da


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
    for s in sorted(project.sar, key=lambda s: s.date):
        da = read_aligned(s.path, grid, kind="sar_power", name=f"sar {s.date.isoformat()}", band_names=s.bands,
                          nodata=s.nodata, chunks=chunks).sel(band=list(pols))
        da = _to_linear_power(da, s.units).rename({"band": "pol"})
        layers.append(da.astype(np.float32).expand_dims(time=[np.datetime64(s.date, "ns")]))
        orbits.append(s.orbit)
    stack = xr.concat(layers, dim="time", combine_attrs="drop_conflicts").assign_coords(orbit=("time", orbits))
    stack.attrs = {"units": "1 (linear power)", "long_name": "SAR backscatter", "kind": "sar_power",
                   "source_units": sorted({s.units for s in project.sar})}
    return attach(stack.rename("sar"), grid)


def load_dem(project: Project, grid: Grid, *, chunks: int) -> xr.DataArray:
    """The DEM on the grid in metres (reprojected before any derivative is taken)."""
    da = read_aligned(project.dem.path, grid, kind="elevation", name="dem", nodata=project.dem.nodata,
                      chunks=chunks).isel(band=0, drop=True)
    if project.dem.units == "ft":
        da = da * np.float32(FEET_TO_M)
    out = da.astype(np.float32).rename("dem")
    out.attrs = {**da.attrs, "units": "m", "long_name": "elevation", "source_units": project.dem.units}
    return attach(out, grid)


def load_inputs(project: Project, grid: Grid | None = None) -> FeatureInputs:
    """Every input of the project, aligned lazily onto the grid."""
    grid = grid or project_grid(project)
    chunks = project.output.chunk_size
    aoi = aoi_mask(read_aoi(project), grid, chunks=chunks)
    return FeatureInputs(
        grid=grid,
        optical=load_optical(project, grid, chunks=chunks),
        sar=load_sar(project, grid, chunks=chunks),
        dem=load_dem(project, grid, chunks=chunks),
        aoi=aoi,
        seasons=dict(project.seasons),
    )


def input_inventory(project: Project, grid: Grid | None = None) -> pd.DataFrame:
    """One row per input raster: kind, date, bands, CRS, pixel size, share of the grid covered."""
    grid = grid or project_grid(project)
    rows = []

    def add(kind, date, path, bands, extra=""):
        info = inspect_raster(path)
        frac = check_overlap(info, grid, name=f"{kind} {path.name}")
        rows.append({"kind": kind, "date": date, "file": path.name, "bands": ",".join(bands) or str(info.count),
                     "crs": info.crs, "pixel_m": round(info.resolution[0], 3),
                     "covers_grid": round(min(frac, 1.0), 3), "notes": extra})

    for s in sorted(project.optical, key=lambda s: s.date):
        add("optical", s.date.isoformat(), s.path, s.bands, f"scale {s.scale:g}, offset {s.offset_dn:g} DN")
    for s in sorted(project.sar, key=lambda s: s.date):
        add("sar", s.date.isoformat(), s.path, s.bands, f"{s.units}, {s.orbit}")
    add("dem", "", project.dem.path, (), f"units {project.dem.units}")
    return pd.DataFrame(rows)

