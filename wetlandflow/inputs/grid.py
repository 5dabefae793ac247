"""The reference grid: a small frozen value, and the pure functions around it.

Every raster in a run lives on one :class:`Grid` (CRS, affine transform,
shape).  The grid must be projected and metric so that pixel areas are real
areas.  Operations return new grids; nothing mutates.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import xarray as xr
from affine import Affine
from pyproj import CRS

from ..errors import AlignmentError, GridMismatchError


def _as_crs(crs: object) -> CRS:
    try:
        return CRS.from_user_input(crs)
    except Exception as exc:  # pyproj raises its own CRSError
        raise AlignmentError(
            f"cannot read CRS {crs!r}: {exc}. Give an EPSG code such as 'EPSG:32633' or a WKT string."
        ) from exc


def require_projected(crs: object, *, what: str = "grid") -> CRS:
    """Return ``crs`` as a pyproj CRS, or raise if it is not projected and metric."""
    c = _as_crs(crs)
    if not c.is_projected:
        raise AlignmentError(
            f"the {what} CRS {c.to_string()} is geographic (degrees); areas and slopes would be wrong. "
            "Set grid.crs in the project file to a projected metric CRS, e.g. the UTM zone of the area."
        )
    unit = c.axis_info[0].unit_name if c.axis_info else ""
    if unit not in ("metre", "meter", "m"):
        raise AlignmentError(
            f"the {what} CRS {c.to_string()} has axis unit {unit!r}; wetlandflow needs metres. "
            "Set grid.crs in the project file to a metric projected CRS (UTM or a national metric grid)."
        )
    return c


@dataclass(frozen=True, slots=True)
class Grid:
    """A north-up reference grid.

    Parameters
    ----------
    crs : str
        The CRS as an authority string or WKT (projected, metric).
    transform : affine.Affine
        Pixel-corner affine transform (north-up: ``b == d == 0``, ``e < 0``).
    width, height : int
        Number of columns and rows.

    Examples
    --------
    >>> g = Grid.from_bbox((500003.0, 6000001.0, 500997.0, 6000999.0), crs="EPSG:32633", resolution=10)
    >>> g.shape, g.bounds
    ((100, 100), (500000.0, 6000000.0, 501000.0, 6001000.0))
    """

    crs: str
    transform: Affine
    width: int
    height: int

    def __post_init__(self) -> None:
        t = self.transform
        if t.b != 0 or t.d != 0 or t.e >= 0 or t.a <= 0:
            raise AlignmentError(f"only north-up grids are supported, got transform {tuple(t)[:6]}")
        if self.width <= 0 or self.height <= 0:
            raise AlignmentError(f"grid shape must be positive, got {self.height} x {self.width}")

    # -- constructors -------------------------------------------------------------
    @classmethod
    def from_bbox(cls, bounds: tuple[float, float, float, float], *, crs: object, resolution: float,
                  anchor: tuple[float, float] | None = None) -> Grid:
        """Grid covering ``bounds`` (xmin, ymin, xmax, ymax), snapped outward to whole pixels.

        The pixel edges pass through ``anchor`` (x, y), e.g. a corner of the raster the grid should
        follow, so that raster's pixels are read without resampling; by default through multiples of
        ``resolution``, so that grids of neighbouring projects with the same pixel size share pixel edges.

        Examples
        --------
        >>> Grid.from_bbox((103, 207, 297, 390), crs="EPSG:32633", resolution=30, anchor=(15, 15)).bounds
        (75.0, 195.0, 315.0, 405.0)
        """
        c = require_projected(crs)
        if resolution <= 0:
            raise AlignmentError(f"resolution must be > 0 metres, got {resolution}")
        xmin, ymin, xmax, ymax = bounds
        if not (xmax > xmin and ymax > ymin):
            raise AlignmentError(f"empty bounds {bounds}")
        ax, ay = anchor if anchor is not None else (0.0, 0.0)

        def steps(v: float, a: float, rounding) -> float:
            # a few ULPs of slack so that an edge already on the lattice stays put
            return a + rounding(round((v - a) / resolution, 9)) * resolution

        x0, x1 = steps(xmin, ax, math.floor), steps(xmax, ax, math.ceil)
        y0, y1 = steps(ymin, ay, math.floor), steps(ymax, ay, math.ceil)
        width = int(round((x1 - x0) / resolution))
        height = int(round((y1 - y0) / resolution))
        return cls(c.to_string(), Affine(resolution, 0.0, x0, 0.0, -resolution, y1), width, height)

    @classmethod
    def from_dataarray(cls, da: xr.DataArray) -> Grid:
        """Grid of a rioxarray-backed DataArray (reads ``rio.crs`` and ``rio.transform()``)."""
        crs = da.rio.crs
        if crs is None:
            raise AlignmentError(f"array {da.name!r} carries no CRS; cannot derive a grid from it")
        return cls(CRS.from_user_input(crs).to_string(), da.rio.transform(), da.sizes["x"], da.sizes["y"])

    # -- properties -----------------------------------------------------------------
    @property
    def shape(self) -> tuple[int, int]:
        return (self.height, self.width)

    @property
    def resolution(self) -> float:
        return float(self.transform.a)

    @property
    def pixel_area_m2(self) -> float:
        return float(self.transform.a * -self.transform.e)

    @property
    def bounds(self) -> tuple[float, float, float, float]:
        t = self.transform
        return (t.c, t.f + t.e * self.height, t.c + t.a * self.width, t.f)

    @property
    def pyproj_crs(self) -> CRS:
        return CRS.from_user_input(self.crs)

    def xy_coords(self) -> tuple[np.ndarray, np.ndarray]:
        """Pixel-centre coordinates ``(x, y)`` as 1-D float64 arrays."""
        t = self.transform
        x = t.c + t.a * (np.arange(self.width) + 0.5)
        y = t.f + t.e * (np.arange(self.height) + 0.5)
        return x, y

    def coords(self) -> dict[str, xr.DataArray]:
        x, y = self.xy_coords()
        return {
            "y": xr.DataArray(y, dims="y", attrs={"units": "metre", "axis": "Y"}),
            "x": xr.DataArray(x, dims="x", attrs={"units": "metre", "axis": "X"}),
        }

    # -- operations (all return new values) -----------------------------------------
    def window(self, row: int, col: int, height: int, width: int) -> Grid:
        """Sub-grid starting at pixel ``(row, col)``."""
        t = self.transform @ Affine.translation(col, row)
        return Grid(self.crs, t, width, height)

    def coarsen(self, factor: int) -> Grid:
        """Grid with the same origin and ``factor`` times larger pixels, covering at least this extent.

        Examples
        --------
        >>> Grid.from_bbox((0, 0, 1000, 990), crs="EPSG:32633", resolution=10).coarsen(4).shape
        (25, 25)
        """
        if not isinstance(factor, int | np.integer) or factor < 1:
            raise AlignmentError(f"a coarsening factor is a whole number >= 1, got {factor!r}")
        f = int(factor)
        width, height = math.ceil(self.width / f), math.ceil(self.height / f)
        return Grid(self.crs, self.transform @ Affine.scale(f), width, height)

    def rowcol(self, x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Row and column indices of map coordinates (floor; may fall outside the grid)."""
        inv = ~self.transform
        cols, rows = inv @ (np.asarray(x, float), np.asarray(y, float))
        return np.floor(rows).astype(np.int64), np.floor(cols).astype(np.int64)

    def empty(self, name: str = "layer", dtype: object = np.float32, fill: float = np.nan) -> xr.DataArray:
        """A filled DataArray on this grid, with the CRS attached."""
        da = xr.DataArray(np.full(self.shape, fill, dtype=dtype), dims=("y", "x"), coords=self.coords(), name=name)
        return attach(da, self)

    def to_dict(self) -> dict[str, object]:
        return {
            "crs": self.crs,
            "transform": list(self.transform)[:6],
            "width": self.width,
            "height": self.height,
        }

    @classmethod
    def from_dict(cls, d: dict) -> Grid:
        return cls(d["crs"], Affine(*d["transform"]), int(d["width"]), int(d["height"]))


def attach(da: xr.DataArray, grid: Grid) -> xr.DataArray:
    """Attach the grid's CRS and transform to ``da`` (rioxarray ``spatial_ref`` coordinate)."""
    import rioxarray  # noqa: F401  (registers the .rio accessor)

    out = da.rio.write_crs(grid.crs)
    return out.rio.write_transform(grid.transform)


def require_match(obj: xr.DataArray | xr.Dataset, grid: Grid, *, name: str | None = None) -> None:
    """Raise :class:`GridMismatchError` naming the first field in which ``obj`` differs from ``grid``.

    Coordinates must equal the grid's pixel centres to within 1e-6 pixel.
    """
    label = name or getattr(obj, "name", None) or "layer"
    if obj.sizes.get("y") != grid.height or obj.sizes.get("x") != grid.width:
        raise GridMismatchError(
            f"{label!s}: shape (y={obj.sizes.get('y')}, x={obj.sizes.get('x')}) differs from the grid's "
            f"(y={grid.height}, x={grid.width}); align it with wetlandflow.inputs.align.align_to_grid first"
        )
    x, y = grid.xy_coords()
    res = grid.resolution
    for axis, expected in (("x", x), ("y", y)):
        got = np.asarray(obj[axis].values, dtype=float)
        offset = np.max(np.abs(got - expected)) / res
        if offset > 1e-6:
            raise GridMismatchError(
                f"{label!s}: {axis} coordinates are offset from the grid by up to {offset:.4g} pixel "
                f"({offset * res:.4g} m); it must be resampled onto the grid, not merely relabelled"
            )
    crs = obj.rio.crs if hasattr(obj, "rio") else None
    if crs is not None and CRS.from_user_input(crs) != grid.pyproj_crs:
        raise GridMismatchError(f"{label!s}: CRS {crs} differs from the grid's {grid.crs}")
