"""Water area per polygon and date: the polygons rasterised once on the water grid, one bincount per date."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import DataQualityError, GridMismatchError
from ._attrs import result_attrs
from .water_series import _require_series

__all__ = ["water_area_series"]


# -- water area per polygon ----------------------------------------------------------------------------------
def _grid_of(water: xr.DataArray) -> tuple[Any, float]:
    """Affine transform (pixel corners) and pixel area from regular x / y coordinates (pixel centres)."""
    from affine import Affine

    x, y = np.asarray(water["x"].values, float), np.asarray(water["y"].values, float)
    if (
        x.size < 2
        or y.size < 2
        or not (np.allclose(np.diff(x), x[1] - x[0]) and np.allclose(np.diff(y), y[1] - y[0]))
    ):
        raise GridMismatchError(
            f"water_area_series needs regularly spaced x and y coordinates (pixel centres) of at least 2 "
            f"pixels; received {x.size} x and {y.size} y values. Put the maps on the run's grid first."
        )
    dx, dy = x[1] - x[0], y[1] - y[0]
    return Affine(dx, 0.0, x[0] - dx / 2, 0.0, dy, y[0] - dy / 2), abs(dx * dy)


def _labels(water: xr.DataArray, polygons: Any, id_field: str) -> tuple[np.ndarray, list[Any]]:
    """Polygon number (1..P, 0 outside) per pixel, rasterised once on the water grid (pixel-centre rule)."""
    from rasterio.features import rasterize

    if id_field not in polygons.columns:
        raise DataQualityError(
            f"id_field {id_field!r} is not a column of the polygons; columns are "
            f"{list(polygons.columns)}. Pass id_field= one of them."
        )
    ids = list(polygons[id_field])
    if len(set(ids)) != len(ids):
        raise DataQualityError(
            f"polygon ids in {id_field!r} must be unique; {len(ids) - len(set(ids))} repeat."
        )
    crs = water.rio.crs if "spatial_ref" in water.coords and _has_rio() else None
    if crs is not None and polygons.crs is not None and polygons.crs != crs:
        polygons = polygons.to_crs(crs)
    union_area = polygons.geometry.union_all().area
    if polygons.geometry.area.sum() > union_area * (1 + 1e-9) + 1e-9:
        raise DataQualityError(
            f"the polygons overlap (sum of areas {polygons.geometry.area.sum():.1f} > area of their union "
            f"{union_area:.1f}); a pixel can be counted for one polygon only. Split the overlapping ones "
            "into separate calls."
        )
    transform, _ = _grid_of(water)
    shape = (water.sizes["y"], water.sizes["x"])
    labels = rasterize(
        ((g, i + 1) for i, g in enumerate(polygons.geometry)),
        out_shape=shape,
        transform=transform,
        fill=0,
        dtype="int32",
    )
    return labels, ids


def _has_rio() -> bool:
    try:
        import rioxarray  # noqa: F401
    except ImportError:
        return False
    return True


def water_area_series(water: xr.DataArray, polygons: Any, *, id_field: str) -> pd.DataFrame:
    """Water area per polygon and date, from the per-date maps.

    The polygons are rasterised once on the water grid (pixel-centre rule, grid from the x / y
    coordinates, reprojected to the maps' CRS when both carry one); each date is then one bincount over
    the pixels inside the polygons' bounding box.  Areas are pixel counts times the pixel area, so the
    grid's units must be metres.

    Parameters
    ----------
    water : xarray.DataArray
        ``(time, y, x)`` water maps (1 / 0 / NaN).
    polygons : geopandas.GeoDataFrame
        Non-overlapping polygons in the maps' CRS (or with a CRS to reproject from).
    id_field : str
        Column with unique polygon ids.

    Returns
    -------
    pandas.DataFrame
        One row per polygon and date: ``polygon``, ``date``, ``water_ha``, ``observed_ha`` (valid pixels),
        ``observed_share`` (of the polygon's rasterised area), ``water_share`` (of the observed area; NaN
        when nothing was observed).  ``attrs`` from ``result_attrs`` plus ``polygon_ha`` per id.

    Examples
    --------
    >>> import geopandas as gpd
    >>> from shapely.geometry import box
    >>> w = xr.DataArray(np.ones((1, 4, 4), "float32"), dims=("time", "y", "x"),
    ...                  coords={"time": pd.to_datetime(["2024-05-01"]), "y": [35., 25., 15., 5.],
    ...                          "x": [5., 15., 25., 35.]})
    >>> gdf = gpd.GeoDataFrame({"id": ["a"]}, geometry=[box(0, 0, 20, 40)])
    >>> float(water_area_series(w, gdf, id_field="id")["water_ha"].iloc[0])
    0.08
    """
    _require_series(water)
    labels, ids = _labels(water, polygons, id_field)
    _, pixel_area = _grid_of(water)
    rows, cols = np.nonzero(labels)
    box = (
        {"y": slice(rows.min(), rows.max() + 1), "x": slice(cols.min(), cols.max() + 1)}
        if rows.size
        else None
    )
    sub_labels = labels[box["y"], box["x"]] if box else labels[:0, :0]
    n = len(ids) + 1
    per_poly = np.bincount(sub_labels.ravel(), minlength=n)[1:]
    observed, wet = [], []
    for i in range(water.sizes["time"]):  # one date in memory at a time
        img = np.asarray(water.isel(time=i, **box).values) if box else np.empty((0, 0))
        ok = np.isfinite(img)
        observed.append(np.bincount(sub_labels[ok], minlength=n)[1:])
        wet.append(np.bincount(sub_labels[ok], weights=img[ok], minlength=n)[1:])
    return _area_table(water, ids, np.array(observed), np.array(wet), per_poly, pixel_area)


def _area_table(
    water: xr.DataArray,
    ids: list[Any],
    observed: np.ndarray,
    wet: np.ndarray,
    per_poly: np.ndarray,
    pixel_area: float,
) -> pd.DataFrame:
    t, p = observed.shape
    obs_ha = observed * pixel_area / 1e4
    with np.errstate(invalid="ignore", divide="ignore"):
        table = pd.DataFrame(
            {
                "polygon": np.tile(ids, t),
                "date": np.repeat(pd.to_datetime(water["time"].values), p),
                "water_ha": (wet * pixel_area / 1e4).ravel(),
                "observed_ha": obs_ha.ravel(),
                "observed_share": (observed / np.where(per_poly > 0, per_poly, np.nan)).ravel(),
                "water_share": (wet / np.where(observed > 0, observed, np.nan)).ravel(),
            }
        )
    table.attrs = result_attrs(
        long_name="Water area per polygon and date",
        units="ha",
        method="polygons rasterised once on the water grid (pixel-centre rule); per date a bincount of valid "
        "and water pixels per polygon times the pixel area",
        parameters={"pixel_area_m2": pixel_area},
    )
    table.attrs["polygon_ha"] = {
        str(i): float(c * pixel_area / 1e4) for i, c in zip(ids, per_poly, strict=True)
    }
    return table
