"""Terrain features from a DEM: conditioning, slope, aspect, curvature, flow routing, TWI, TPI, HAND, DTW.

Every function takes a DEM as an :class:`xarray.DataArray` with dims
``("y", "x")``, elevations in metres (NaN = nodata) and pixel-centre
coordinates in metres (``x`` increasing, ``y`` decreasing: north-up), and
returns a DataArray on the same coordinates with fresh provenance attrs.

Two kinds of operation live here:

* **neighbourhood operations** (slope, aspect, curvature, TPI) stay lazy on
  dask-backed input through :func:`dask.array.map_overlap` with an explicit
  depth; the array border and nodata are treated alike (see *Edge policy*);
* **global operations** (depression filling, flow accumulation, SCA, TWI,
  HAND, DTW) need the whole grid at once; they compute in memory and return
  an array chunked like the input when the input was dask-backed.

Edge policy for 3 x 3 stencils: a neighbour outside the grid or NaN is
replaced by linear extrapolation through the centre cell: an edge neighbour
by ``2 * z_centre - z_opposite`` (the centre value if the opposite is missing
too), a corner by ``z_vertical + z_horizontal - z_centre``.  Stencils
therefore stay exact on planes at borders, corners and next to nodata, and no
border ring of NaN is produced.  NaN cells stay NaN.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import xarray as xr

from .._provenance import with_attrs
from ..errors import GridMismatchError
from . import _terrain_kernels as K
from ._terrain_kernels import (
    _as_float_array,
    _check_dem,
    _index_dummy,
    _map_stencil,
    _require_choice,
    _square_cellsize,
    _wrap,
    grid_spacing,
)

HORN = "Horn, B. K. P. (1981) Hill shading and the reflectance map. Proceedings of the IEEE 69(1), 14-47"
BARNES = (
    "Barnes, R., Lehman, C., Mulla, D. (2014) Priority-flood: an optimal depression-filling and "
    "watershed-labeling algorithm for digital elevation models. Computers & Geosciences 62, 117-127"
)
OCALLAGHAN = (
    "O'Callaghan, J. F., Mark, D. M. (1984) The extraction of drainage networks from digital elevation "
    "data. Computer Vision, Graphics and Image Processing 28, 323-344"
)
FREEMAN = (
    "Freeman, T. G. (1991) Calculating catchment area with divergent flow based on a regular grid. "
    "Computers & Geosciences 17(3), 413-422"
)
QUINN = (
    "Quinn, P., Beven, K., Chevallier, P., Planchon, O. (1991) The prediction of hillslope flow paths for "
    "distributed hydrological modelling using digital terrain models. Hydrological Processes 5, 59-79"
)
ROUTING_REFERENCES = {"d8": OCALLAGHAN, "mfd": FREEMAN, "mfd_quinn": QUINN}
ZT = (
    "Zevenbergen, L. W., Thorne, C. R. (1987) Quantitative analysis of land surface topography. "
    "Earth Surface Processes and Landforms 12(1), 47-56"
)
MURPHY = (
    "Murphy, P. N. C., Ogilvie, J., Arp, P. (2009) Topographic modelling of soil moisture conditions: a "
    "comparison and verification of two models. European Journal of Soil Science 60, 94-109"
)
RENNO = (
    "Renno, C. D., Nobre, A. D., Cuartas, L. A., Soares, J. V., Hodnett, M. G., Tomasella, J., "
    "Waterloo, M. J. (2008) HAND, a new terrain descriptor using SRTM-DEM: mapping terra-firme "
    "rainforest environments in Amazonia. Remote Sensing of Environment 112, 3469-3481"
)
GUISAN = (
    "Guisan, A., Weiss, S. B., Weiss, A. D. (1999) GLM versus CCA spatial modeling of plant species "
    "distribution. Plant Ecology 143, 107-122"
)
BEVEN = (
    "Beven, K. J., Kirkby, M. J. (1979) A physically based, variable contributing area model of basin "
    "hydrology. Hydrological Sciences Bulletin 24(1), 43-69"
)

__all__ = [
    "aspect",
    "curvature",
    "depression_depth",
    "depth_to_water",
    "fill_depressions",
    "flow_accumulation",
    "grid_spacing",
    "height_above_nearest_drainage",
    "slope",
    "specific_catchment_area",
    "topographic_position_index",
    "topographic_wetness_index",
]


# ------------------------------------------------------------------ filling


def _filled_padded(values: np.ndarray, epsilon: bool) -> np.ndarray:
    """Filled DEM with the one-cell NaN ring the routing kernels work on."""
    return K.fill_padded(values, epsilon)


def _filled(values: np.ndarray, epsilon: bool) -> np.ndarray:
    return K.fill_array(values, epsilon)


def fill_depressions(
    dem: xr.DataArray, *, method: str = "priority_flood", epsilon: bool = True
) -> xr.DataArray:
    """Fill closed depressions by Priority-Flood so that every cell drains to the edge.

    Cells on the grid border and cells next to nodata are outlets: flow may
    leave into nodata.  Computed in memory (a global operation).

    Parameters
    ----------
    dem : xarray.DataArray
        DEM (m), dims ``("y", "x")``, NaN = nodata.
    method : {"priority_flood"}
        Barnes, Lehman & Mulla (2014), "improved" variant: a priority queue
        for cells above the flood level plus a FIFO queue for cells raised
        inside depressions.  The priority queue is a bitset over the cells'
        ranks in a radix sort of the elevations (exact order, no heap).
    epsilon : bool
        If True, each cell reached from a lower-or-equal level is raised to the
        next representable float above that level (``numpy.nextafter`` in the
        DEM's dtype), so filled areas and flats keep a strictly descending path
        to an outlet.  If False, depressions are filled exactly flat.

    Returns
    -------
    xarray.DataArray
        Conditioned DEM (m), same dtype as the input (float64 for integers);
        never lower than the input.

    References
    ----------
    Barnes, Lehman & Mulla (2014), Computers & Geosciences 62, 117-127.

    Examples
    --------
    >>> import numpy as np, xarray as xr
    >>> z = np.full((3, 3), 5.0); z[1, 1] = 1.0
    >>> dem = xr.DataArray(z, dims=("y", "x"), coords={"y": [20.0, 10.0, 0.0], "x": [0.0, 10.0, 20.0]})
    >>> float(fill_depressions(dem, epsilon=False)[1, 1])
    5.0
    """
    _check_dem(dem)
    _require_choice("method", method, ("priority_flood",))
    filled = _filled(_as_float_array(dem), epsilon)
    return with_attrs(
        _wrap(dem, filled),
        "dem_filled",
        long_name="depression-filled elevation",
        units="m",
        domain="terrain",
        method="priority-flood depression filling (rank-ordered priority queue + FIFO pit queue)"
        + (", epsilon (nextafter) gradient on flats" if epsilon else ", flat fill"),
        reference=BARNES,
        parameters={"conditioning": method, "epsilon": bool(epsilon), "connectivity": 8},
    )


def depression_depth(dem: xr.DataArray) -> xr.DataArray:
    """Depth of closed depressions: flat-filled DEM minus the DEM (m, >= 0).

    Computed in memory.  Uses the exact (``epsilon=False``) fill so depths are
    not inflated by the epsilon gradient.

    Parameters
    ----------
    dem : xarray.DataArray
        DEM (m), dims ``("y", "x")``, NaN = nodata.

    Returns
    -------
    xarray.DataArray
        Depression depth in metres; 0 outside depressions, NaN on nodata.
    """
    _check_dem(dem)
    values = _as_float_array(dem)
    depth = (_filled(values, False) - values).astype(np.float64)
    return with_attrs(
        _wrap(dem, depth),
        "depression_depth",
        long_name="depth of closed depressions",
        units="m",
        domain="terrain",
        formula="fill(dem) - dem",
        reference=BARNES,
        parameters={"conditioning": "priority_flood", "epsilon": False, "connectivity": 8},
    )


# --------------------------------------------------------------- slope, aspect


_SLOPE_UNITS = {"degrees": "degree", "percent": "%", "ratio": "1"}


def slope(dem: xr.DataArray, *, units: str = "degrees", cellsize: float | None = None) -> xr.DataArray:
    """Slope from the Horn (1981) 3 x 3 gradient.

    ``tan(beta) = sqrt((dz/dx)^2 + (dz/dy)^2)`` with
    ``dz/dx = [(z3 + 2 z6 + z9) - (z1 + 2 z4 + z7)] / (8 dx)`` and
    ``dz/dy = [(z1 + 2 z2 + z3) - (z7 + 2 z8 + z9)] / (8 dy)`` (z1..z9 row by
    row from the north-west).  Lazy under dask (``map_overlap``, depth 1).
    Borders and cells next to nodata use the module's extrapolation edge policy.

    Parameters
    ----------
    dem : xarray.DataArray
        DEM (m), dims ``("y", "x")``.
    units : {"degrees", "percent", "ratio"}
        ``beta`` in degrees, ``100 tan(beta)`` or ``tan(beta)``.
    cellsize : float, optional
        Pixel size (m) when it cannot or should not be read from the coordinates.

    Returns
    -------
    xarray.DataArray
        Slope, float64.

    Examples
    --------
    >>> import numpy as np, xarray as xr
    >>> x = np.arange(4) * 10.0; y = np.arange(4)[::-1] * 10.0
    >>> dem = xr.DataArray(np.add.outer(np.zeros(4), 0.1 * x), dims=("y", "x"), coords={"y": y, "x": x})
    >>> round(float(slope(dem, units="percent")[1, 1]), 6)
    10.0
    """
    _require_choice("units", units, tuple(_SLOPE_UNITS))
    dx, dy = grid_spacing(dem, cellsize)
    tan_b = _map_stencil(dem, K.horn_block, 1, dx=dx, dy=dy, what="slope")
    out = {"degrees": np.degrees(np.arctan(tan_b)), "percent": 100.0 * tan_b, "ratio": tan_b}[units]
    return with_attrs(
        out,
        "slope",
        long_name="terrain slope",
        units=_SLOPE_UNITS[units],
        domain="terrain",
        formula="atan(sqrt(p^2 + q^2)), p, q from the Horn 3x3 stencil",
        reference=HORN,
        parameters={"units": units, "dx": dx, "dy": dy, "edge_policy": "linear extrapolation"},
    )


def aspect(dem: xr.DataArray, *, cellsize: float | None = None) -> xr.DataArray:
    """Downslope azimuth from the Horn (1981) gradient, degrees clockwise from north.

    ``aspect = atan2(-dz/dx, -dz/dy)`` mapped to [0, 360): 0 = facing north,
    90 = east.  NaN where the gradient is exactly zero (flats) and on nodata.
    Lazy under dask (``map_overlap``, depth 1).

    Parameters
    ----------
    dem : xarray.DataArray
        DEM (m), dims ``("y", "x")``.
    cellsize : float, optional
        Pixel size (m).

    Returns
    -------
    xarray.DataArray
        Aspect in degrees.
    """
    dx, dy = grid_spacing(dem, cellsize)
    out = _map_stencil(dem, K.horn_block, 1, dx=dx, dy=dy, what="aspect")
    return with_attrs(
        out,
        "aspect",
        long_name="downslope azimuth (clockwise from north)",
        units="degree",
        domain="terrain",
        formula="atan2(-dz/dx, -dz/dy) mod 360; NaN where dz/dx = dz/dy = 0",
        reference=HORN,
        parameters={"dx": dx, "dy": dy, "edge_policy": "linear extrapolation"},
    )


# ------------------------------------------------------------------ curvature


def curvature(dem: xr.DataArray, kind: str = "total", *, cellsize: float | None = None) -> xr.DataArray:
    """Surface curvature from the Zevenbergen & Thorne (1987) quadratic fit (1/m).

    With ``D = [(z4 + z6)/2 - z5]/dx^2``, ``E = [(z2 + z8)/2 - z5]/dy^2``,
    ``F = (-z1 + z3 + z7 - z9)/(4 dx dy)``, ``G = (z6 - z4)/(2 dx)``,
    ``H = (z2 - z8)/(2 dy)`` (z1..z9 row by row from the north-west):

    * ``profile = -2 (D G^2 + E H^2 + F G H) / (G^2 + H^2)`` = minus the
      second derivative along the gradient: **positive = upwardly convex in
      the slope direction** (flow accelerates), negative = concave (footslope);
    * ``plan = 2 (D H^2 + E G^2 - F G H) / (G^2 + H^2)`` = the second
      derivative along the contour: **positive = laterally concave
      (converging flow, hollows)**, negative = laterally convex (spurs);
    * ``total = -2 (D + E)`` = minus the Laplacian: **positive = convex (caps)**.

    Profile and plan curvature are 0 where ``G = H = 0`` (no flow direction).
    Lazy under dask (``map_overlap``, depth 1); module edge policy at borders.

    Parameters
    ----------
    dem : xarray.DataArray
        DEM (m), dims ``("y", "x")``.
    kind : {"total", "profile", "plan"}
        Which curvature to return.
    cellsize : float, optional
        Pixel size (m).

    Returns
    -------
    xarray.DataArray
        Curvature in 1/m.
    """
    _require_choice("kind", kind, ("total", "profile", "plan"))
    dx, dy = grid_spacing(dem, cellsize)
    out = _map_stencil(dem, K.zt_block, 1, dx=dx, dy=dy, kind=kind)
    formulas = {
        "profile": "-2(D G^2 + E H^2 + F G H)/(G^2 + H^2); 0 where G = H = 0",
        "plan": "2(D H^2 + E G^2 - F G H)/(G^2 + H^2); 0 where G = H = 0",
        "total": "-2(D + E)",
    }
    return with_attrs(
        out,
        f"curvature_{kind}",
        long_name=f"{kind} curvature",
        units="m-1",
        domain="terrain",
        formula=formulas[kind],
        reference=ZT,
        parameters={"kind": kind, "dx": dx, "dy": dy, "edge_policy": "linear extrapolation"},
    )


# ------------------------------------------------------------------------ TPI


def topographic_position_index(
    dem: xr.DataArray, radius_m: float, *, inner_radius_m: float = 0.0, cellsize: float | None = None
) -> xr.DataArray:
    """Elevation minus the mean elevation of the surrounding annulus (m).

    The neighbourhood is every cell whose centre lies at a distance ``d`` with
    ``inner_radius_m < d <= radius_m`` (the centre cell is always excluded).
    Only valid cells inside the grid enter the mean, so border cells use the
    part of the annulus that exists.  Lazy under dask (``map_overlap`` with a
    depth of ``floor(radius / cellsize)`` cells).

    Parameters
    ----------
    dem : xarray.DataArray
        DEM (m), dims ``("y", "x")``.
    radius_m : float
        Outer radius in metres (at least one pixel).
    inner_radius_m : float
        Inner radius in metres; cells at or inside it are left out.
    cellsize : float, optional
        Pixel size (m).

    Returns
    -------
    xarray.DataArray
        TPI in metres: positive on crests, negative in hollows.

    References
    ----------
    Guisan, A., Weiss, S. B., Weiss, A. D. (1999) GLM versus CCA spatial modeling of plant species
    distribution. Plant Ecology 143, 107-122 (TPI as elevation minus neighbourhood mean; not verified in the original).
    """
    dx, dy = grid_spacing(dem, cellsize)
    if abs(dx - dy) > 1e-6 * dx:
        raise GridMismatchError(f"TPI needs square pixels, got dx={dx} m and dy={dy} m.")
    if not (radius_m >= dx and 0 <= inner_radius_m < radius_m):
        raise ValueError(
            f"need cellsize ({dx} m) <= radius_m and 0 <= inner_radius_m < radius_m, got "
            f"radius_m={radius_m}, inner_radius_m={inner_radius_m}. Choose a radius of at least one pixel."
        )
    footprint = K.disk(radius_m / dx, inner_radius_m / dx)
    depth = footprint.shape[0] // 2
    out = _map_stencil(dem, K.tpi_block, depth, footprint=footprint)
    return with_attrs(
        out,
        f"tpi_{radius_m:g}m",
        long_name=f"topographic position index, radius {radius_m:g} m",
        units="m",
        domain="terrain",
        formula="z - mean(z over inner_radius < d <= radius)",
        reference=GUISAN,
        parameters={"radius_m": radius_m, "inner_radius_m": inner_radius_m, "cells": int(footprint.sum())},
    )


# --------------------------------------------------------------- flow routing

_MFD_WEIGHTS = {"mfd": (1.0, 1.0), "mfd_quinn": (0.5, 0.354)}


def _routing_surface(dem: xr.DataArray, conditioned: bool) -> np.ndarray:
    """The routing surface padded with one ring of NaN (see ``K.pad_nan``), in the DEM's float dtype."""
    values = _as_float_array(dem)
    return _filled_padded(values, True) if conditioned else K.pad_nan(values)


def _route(zp: np.ndarray, method: str, cs: float, exponent: float) -> tuple[np.ndarray, np.ndarray | None]:
    """Contributing area (m^2) and, for D8, the receiver codes, from a NaN-padded surface."""
    dummy = _index_dummy(zp.size)
    if method == "d8":
        rec = K.d8_receivers(zp, cs, cs)
        acc, _ = K.d8_accumulate(rec, cs * cs, dummy, False)
        return acc, rec
    w_card, w_diag = _MFD_WEIGHTS[method]
    p = float(exponent) if method == "mfd" else 1.0  # Quinn et al. (1991) weight by tan(beta) itself
    return K.mfd_accumulate(zp, cs, cs, p, w_card, w_diag, cs * cs, dummy)[1:-1, 1:-1], None


def _routing_params(method: str, conditioned: bool, exponent: float, cs: float) -> dict[str, Any]:
    params: dict[str, Any] = {"method": method, "cellsize": cs, "conditioned": bool(conditioned)}
    if conditioned:
        params["conditioning"] = "priority_flood+epsilon"
    if method != "d8":
        params["exponent"] = exponent if method == "mfd" else 1.0
        params["contour_weights"] = list(_MFD_WEIGHTS[method])
    return params


def _check_routing(method: str, exponent: float) -> None:
    _require_choice("method", method, tuple(ROUTING_REFERENCES))
    if not exponent > 0:
        raise ValueError(f"exponent must be positive, got {exponent!r}; Freeman (1991) uses 1.1.")


def flow_accumulation(
    dem: xr.DataArray,
    *,
    method: str = "d8",
    conditioned: bool = True,
    exponent: float = 1.1,
    cellsize: float | None = None,
) -> xr.DataArray:
    """Upslope contributing area of every cell, including the cell itself (m^2).

    Computed in memory (a global operation).  Cells are visited in
    topological order in O(n) inside numba (Kahn's algorithm; for D8 as
    walks down the flow paths).  The routing kernels work on float32 DEMs
    directly (differences are taken in float64), so a float32 DEM costs no
    float64 copy.

    Parameters
    ----------
    dem : xarray.DataArray
        DEM (m), dims ``("y", "x")``, square pixels.
    method : {"d8", "mfd", "mfd_quinn"}
        ``"d8"``: all flow to the steepest-descent neighbour (O'Callaghan &
        Mark 1984).  ``"mfd"``: flow to every lower neighbour in proportion to
        ``tan(beta_k)**exponent`` (Freeman 1991, exponent 1.1).
        ``"mfd_quinn"``: proportion to ``tan(beta_k) * L_k`` with contour
        lengths 0.5 (cardinal) and 0.354 (diagonal) (Quinn et al. 1991).
    conditioned : bool
        Route over the Priority-Flood + epsilon filled DEM (every cell drains
        to an outlet).  If False, route over the DEM as given; closed pits and
        flats are then sinks where accumulation stops.
    exponent : float
        Flow-partition exponent for ``"mfd"`` (``"mfd_quinn"`` always uses 1).
    cellsize : float, optional
        Pixel size (m).

    Returns
    -------
    xarray.DataArray
        Contributing area in m^2 (>= one cell area), NaN on nodata.  Flow
        leaves the grid at border cells and next to nodata.
    """
    _check_dem(dem)
    _check_routing(method, exponent)
    cs = _square_cellsize(dem, cellsize)
    acc, _ = _route(_routing_surface(dem, conditioned), method, cs, exponent)
    return with_attrs(
        _wrap(dem, acc),
        f"flow_accumulation_{method}",
        long_name=f"upslope contributing area ({method})",
        units="m2",
        domain="terrain",
        method=f"{method} flow routing in topological order",
        reference=ROUTING_REFERENCES[method],
        parameters=_routing_params(method, conditioned, exponent, cs),
    )


def _sca_array(zp: np.ndarray, method: str, cs: float, exponent: float) -> np.ndarray:
    acc, rec = _route(zp, method, cs, exponent)
    if rec is None:
        return acc / cs
    return acc / np.where((rec >= 0) & (rec % 2 == 1), cs / np.sqrt(2.0), cs)


def specific_catchment_area(
    dem: xr.DataArray,
    *,
    method: str = "mfd",
    conditioned: bool = True,
    exponent: float = 1.1,
    cellsize: float | None = None,
) -> xr.DataArray:
    """Specific catchment area: upslope area per unit contour width (m^2/m = m).

    ``SCA = A / w``, with ``A`` from :func:`flow_accumulation` and the
    effective contour width ``w`` chosen so that SCA equals the flow length
    on a uniform plane (DERIVED in the tests):

    * D8: ``w = cellsize`` for a cardinal outflow and ``cellsize / sqrt(2)``
      for a diagonal one (the spacing between parallel D8 flow lines);
    * MFD: ``w = cellsize`` in every direction; with Freeman's exponent 1.1
      this is exact for grid-aligned flow and within 1 % for flow at 45
      degrees.  Quinn et al. (1991) instead divide by the summed contour
      lengths of the downslope directions, which underestimates SCA on a
      plane by about 20 %, so that convention is not used.

    Computed in memory.

    Parameters
    ----------
    dem : xarray.DataArray
        DEM (m), dims ``("y", "x")``, square pixels.
    method : {"mfd", "d8", "mfd_quinn"}
        Routing method (see :func:`flow_accumulation`).
    conditioned : bool
        Route over the Priority-Flood + epsilon filled DEM.
    exponent : float
        Flow-partition exponent for ``"mfd"``.
    cellsize : float, optional
        Pixel size (m).

    Returns
    -------
    xarray.DataArray
        SCA in metres.
    """
    _check_dem(dem)
    _check_routing(method, exponent)
    cs = _square_cellsize(dem, cellsize)
    z = _routing_surface(dem, conditioned)
    params = _routing_params(method, conditioned, exponent, cs)
    params["contour_width"] = "cellsize; D8 diagonal cellsize/sqrt(2)" if method == "d8" else "cellsize"
    return with_attrs(
        _wrap(dem, _sca_array(z, method, cs, exponent)),
        f"sca_{method}",
        long_name=f"specific catchment area ({method})",
        units="m",
        domain="terrain",
        formula="A / w",
        reference=ROUTING_REFERENCES[method],
        parameters=params,
    )


def topographic_wetness_index(
    dem: xr.DataArray,
    *,
    method: str = "mfd",
    min_slope: float = 0.001,
    exponent: float = 1.1,
    cellsize: float | None = None,
) -> xr.DataArray:
    """Topographic wetness index ``ln(a / tan(beta))`` (Beven & Kirkby 1979).

    ``a`` is :func:`specific_catchment_area` (m) and ``beta`` the Horn slope of
    the same Priority-Flood + epsilon conditioned DEM.  Zero slope would make
    TWI infinite, so ``tan(beta)`` is floored at ``min_slope`` (flooring at a
    small epsilon such as 0.001 is common practice, no source; Pan et al. 2004
    compare alternatives).  Computed in memory.

    Parameters
    ----------
    dem : xarray.DataArray
        DEM (m), dims ``("y", "x")``, square pixels.
    method : {"mfd", "d8", "mfd_quinn"}
        Routing method for ``a``.
    min_slope : float
        Floor for ``tan(beta)`` (dimensionless).
    exponent : float
        Flow-partition exponent for ``"mfd"``.
    cellsize : float, optional
        Pixel size (m).

    Returns
    -------
    xarray.DataArray
        TWI, ``ln(m)``.
    """
    _check_dem(dem)
    _check_routing(method, exponent)
    if not min_slope > 0:
        raise ValueError(f"min_slope must be a positive tan(beta), got {min_slope!r}; 0.001 is usual.")
    cs = _square_cellsize(dem, cellsize)
    zp = _routing_surface(dem, True)
    sca = _sca_array(zp, method, cs, exponent)
    tan_b = np.maximum(K.horn_block(zp[1:-1, 1:-1], dx=cs, dy=cs, what="slope"), min_slope)
    params = _routing_params(method, True, exponent, cs)
    params.update(min_slope=min_slope, slope="Horn 3x3 on the conditioned DEM")
    return with_attrs(
        _wrap(dem, np.log(sca / tan_b)),
        "twi",
        long_name="topographic wetness index",
        units="ln(m)",
        domain="terrain",
        formula="ln(SCA / max(tan(beta), min_slope))",
        reference=BEVEN,
        parameters=params,
    )


# ------------------------------------------------------------------ HAND, DTW


def _channels(zp: np.ndarray, cs: float, threshold_m2: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """D8 receivers, channel mask and upstream-first order from a NaN-padded surface."""
    rec = K.d8_receivers(zp, cs, cs)
    acc, order = K.d8_accumulate(rec, cs * cs, _index_dummy(zp.size), True)
    return rec, acc >= threshold_m2, order


def height_above_nearest_drainage(
    dem: xr.DataArray, *, channel_threshold_m2: float = 1e5, cellsize: float | None = None
) -> xr.DataArray:
    """Height above the nearest drainage along D8 flow paths (Renno et al. 2008), m.

    The DEM is conditioned by Priority-Flood + epsilon; channels are the cells
    whose D8 contributing area is at least ``channel_threshold_m2``.  Each
    cell's HAND is its conditioned elevation minus that of the first channel
    cell on its D8 path, so HAND >= 0 and is 0 on channels.  Cells whose path
    leaves the grid (or reaches nodata) before any channel are NaN: they have
    no drainage reference inside the grid.  Computed in memory.

    Parameters
    ----------
    dem : xarray.DataArray
        DEM (m), dims ``("y", "x")``, square pixels.
    channel_threshold_m2 : float
        Contributing area that starts a channel (m^2).  The default, 0.1 km^2,
        is a rule of thumb (common practice, no source); set it from the map
        scale of the drainage network.
    cellsize : float, optional
        Pixel size (m).

    Returns
    -------
    xarray.DataArray
        HAND in metres.

    References
    ----------
    Renno et al. (2008), Remote Sensing of Environment 112, 3469-3481.
    """
    _check_dem(dem)
    cs = _square_cellsize(dem, cellsize)
    zp = _routing_surface(dem, True)
    rec, channel, order = _channels(zp, cs, channel_threshold_m2)
    hand = K.hand_from_order(zp[1:-1, 1:-1], rec, channel, order)
    return with_attrs(
        _wrap(dem, hand),
        "hand",
        long_name="height above nearest drainage",
        units="m",
        domain="terrain",
        method="D8 path to the first channel cell on the Priority-Flood+epsilon DEM",
        reference=RENNO,
        parameters={"channel_threshold_m2": channel_threshold_m2, "cellsize": cs, "routing": "d8"},
    )


def _water_sources(
    dem: xr.DataArray, water_mask: xr.DataArray | None, threshold: float | None, cs: float
) -> tuple[np.ndarray, dict[str, Any]]:
    if (water_mask is None) == (threshold is None):
        raise ValueError(
            "give exactly one of water_mask= (a boolean DataArray of surface water) or "
            "channel_threshold_m2= (derive streams from D8 flow accumulation); got "
            f"water_mask={'a mask' if water_mask is not None else None}, channel_threshold_m2={threshold!r}."
        )
    if water_mask is not None:
        if water_mask.shape != dem.shape:
            raise GridMismatchError(f"water_mask has shape {water_mask.shape}, the DEM {dem.shape}.")
        return np.asarray(water_mask.data, dtype=bool), {"sources": "water_mask"}
    _, channel, _ = _channels(_routing_surface(dem, True), cs, threshold)
    return channel, {"sources": "d8 channels", "channel_threshold_m2": threshold}


def depth_to_water(
    dem: xr.DataArray,
    *,
    water_mask: xr.DataArray | None = None,
    channel_threshold_m2: float | None = None,
    cellsize: float | None = None,
) -> xr.DataArray:
    """Cartographic depth-to-water (Murphy et al. 2007, 2009), m.

    ``DTW = min over paths of sum_i tan(beta)_i * a_i * cellsize`` from the cell
    to the nearest surface-water cell, with ``a_i = 1`` for edge moves and
    ``sqrt(2)`` for diagonal moves: a Dijkstra cost-distance in numba where a
    step costs the mean Horn slope (ratio) of its two cells times its length.
    Water cells get 0; cells that cannot reach water are NaN.  Computed in memory.

    Parameters
    ----------
    dem : xarray.DataArray
        DEM (m), dims ``("y", "x")``, square pixels.
    water_mask : xarray.DataArray of bool, optional
        Surface water (lakes, streams) on the DEM grid.
    channel_threshold_m2 : float, optional
        Instead of ``water_mask``, treat cells with D8 contributing area of at
        least this many m^2 as water.
    cellsize : float, optional
        Pixel size (m).

    Returns
    -------
    xarray.DataArray
        Depth to water in metres (low = wet).

    References
    ----------
    Murphy, Ogilvie & Arp (2009), European Journal of Soil Science 60, 94-109.
    """
    _check_dem(dem)
    cs = _square_cellsize(dem, cellsize)
    sources, params = _water_sources(dem, water_mask, channel_threshold_m2, cs)
    tan_b = K.horn_block(_as_float_array(dem), dx=cs, dy=cs, what="slope")
    dtw = K.cost_distance(np.ascontiguousarray(tan_b), np.ascontiguousarray(sources), cs, cs)
    params.update(cellsize=cs, cost="Horn slope (ratio) x step length, mean of the two cells")
    return with_attrs(
        _wrap(dem, dtw),
        "dtw",
        long_name="cartographic depth to water",
        units="m",
        domain="terrain",
        formula="min path sum of tan(beta) * step length to surface water",
        reference=MURPHY,
        parameters=params,
    )
