"""Synthetic image archive of the Orlenmere Basin for the monitoring stage.

:func:`make_archive` writes, on a coarse grid over the demo's extent (same CRS as
:func:`wetlandflow.demo.landscape.make_demo`), 35 summers of Landsat-like surface
reflectance, one season of Sentinel-1-like backscatter, the monitoring sites and
every planted truth:

* a lake that shrinks at a known rate;
* a fen crossed by a road built in a known year: upslope of it the fen is
  impounded (more open water, vegetation dying back), downslope it dries (less
  water, shrubs encroaching); a second, untouched fen elsewhere is the control.
  Both fens follow one shared year-to-year weather signal, so a
  before/after-control-impact comparison isolates the road;
* a harvested forest block whose NDVI recovers exponentially towards its
  pre-harvest value with a known time constant;
* a floodplain meadow under water during a spring flood pulse in the SAR season.

The layout is designed, not grown from terrain rules as in the static demo: the
sites sit at fixed fractions of the extent so that every truth holds at any
size down to 32 x 32 pixels.  Spectra come from the static demo's endmembers
(:mod:`wetlandflow.demo.spectra`), illustrative values chosen (common practice,
no source) to be plausible; they are not measurements.  :func:`monitor_table`
gives the project file's ``[monitor]`` table for the archive.

All names are invented; the data are synthetic.
"""

from __future__ import annotations

import datetime as dt
import json
import math
import shutil
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import ParameterError
from . import spectra as sp
from ._place import GRID_CRS, PLACE, demo_grid
from .spectra import make_rng, smooth_noise

LS_BANDS = ("blue", "green", "red", "nir", "swir1", "swir2")
LS_SCALE, LS_OFFSET = 0.0000275, -0.2  # Landsat Collection 2 Level-2 surface reflectance scaling, fill 0
SENSOR = "landsat89_oli_c2l2"
SAR_BANDS = ("VV", "VH")
SAR_NODATA = -9999.0
ROAD_YEAR, HARVEST_YEAR = 2008, 2002  # used when they fit the span; otherwise placed inside it
SITE_NAMES = {"lake": "lake", "up": "fen_upslope", "down": "fen_downslope", "control": "fen_control",
              "harvest": "harvest_block", "flood": "floodplain"}
# random streams, distinct from those of the static landscape (1..7)
_S_BASE, _S_WEATHER, _S_OPTICAL, _S_SAR, _S_SITES = range(21, 26)
_IDX = [sp.BAND_NAMES.index(b) for b in LS_BANDS]
_RED, _GREEN, _NIR, _SWIR1 = (LS_BANDS.index(b) for b in ("red", "green", "nir", "swir1"))
_FLOODED_FW, _FLOODED_G = 0.85, 0.15  # open-water share and green cover of an inundated fen pixel

# planted magnitudes (illustrative, chosen so the effects stand well above the noise)
_LAKE_LOSS = 0.45  # share of the first-year lake area lost by the last year, linearly
_FEN = {"share": 0.14, "share_wx": 0.05, "ndvi": 0.60, "ndvi_wx": -0.025, "site_sd": 0.01,
        "up_share": 0.40, "down_keep": 0.25, "up_ndvi": -0.12, "up_tau": 3.0, "down_ndvi": 0.10,
        "down_tau": 4.0}
_HARVEST = {"baseline": 0.80, "after": 0.34, "tau_years": 4.25, "weather": 0.004}
_SAR_DB = {"forest": -8.0, "fen": -13.0, "fen_flooded": -18.0, "water": -20.5, "lakebed": -12.0,
           "meadow": -11.0, "road": -9.0, "harvest": -10.0}
_VH_BELOW_VV = 6.0


def _em(name: str, scale: float = 1.0) -> np.ndarray:
    """One endmember of the static demo in the six Landsat bands."""
    return np.asarray(sp._EM[name], np.float32)[_IDX] * np.float32(scale)


# -- layout -----------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Box:
    """Half-open pixel box: rows r0..r1-1, columns c0..c1-1."""

    r0: int
    r1: int
    c0: int
    c1: int

    @classmethod
    def frac(cls, n: int, y0: float, y1: float, x0: float, x1: float) -> _Box:
        return cls(round(y0 * n), round(y1 * n), round(x0 * n), round(x1 * n))

    def inner(self, top: int = 1, bottom: int = 1, side: int = 1) -> _Box:
        return _Box(self.r0 + top, self.r1 - bottom, self.c0 + side, self.c1 - side)

    def mask(self, shape: tuple[int, int]) -> np.ndarray:
        m = np.zeros(shape, bool)
        m[self.r0:self.r1, self.c0:self.c1] = True
        return m

    def polygon(self, grid):
        from shapely.geometry import box

        x0, y1 = grid.transform @ (self.c0, self.r0)
        x1, y0 = grid.transform @ (self.c1, self.r1)
        return box(x0, y0, x1, y1)


@dataclass(frozen=True)
class _Layout:
    """Where the sites sit, in pixels: fixed fractions of the extent, so any size shows the same story."""

    n: int
    fen: _Box  # the fen crossed by the road
    road_row: int
    road_end: int  # the road runs from the west edge to this column
    up: _Box  # impact polygons, one row clear of the road
    down: _Box
    control_fen: _Box
    control: _Box
    harvest: _Box
    flood: _Box
    lake_centre: tuple[float, float]  # (row, col)
    lake_axes: tuple[float, float]  # semi-axes (along, across) in pixels at the nominal first-year area
    lake_angle: float

    @classmethod
    def of(cls, n: int) -> _Layout:
        fen = _Box.frac(n, 0.06, 0.64, 0.08, 0.32)
        road = round(0.35 * n)
        control_fen = _Box.frac(n, 0.72, 0.95, 0.08, 0.32)
        return cls(n, fen, road, round(0.42 * n), _Box(fen.r0 + 1, road - 1, fen.c0 + 1, fen.c1 - 1),
                   _Box(road + 2, fen.r1 - 1, fen.c0 + 1, fen.c1 - 1), control_fen, control_fen.inner(),
                   _Box.frac(n, 0.60, 0.82, 0.70, 0.92), _Box.frac(n, 0.62, 0.94, 0.42, 0.62),
                   (0.28 * n, 0.68 * n), (0.15 * n, 0.11 * n), math.radians(15.0))

    def lake_radius(self) -> np.ndarray:
        """Elliptical distance of each pixel centre from the lake centre, 1 on the nominal shore."""
        yy, xx = np.mgrid[0:self.n, 0:self.n].astype(np.float64) + 0.5
        dy, dx = yy - self.lake_centre[0], xx - self.lake_centre[1]
        c, s = math.cos(self.lake_angle), math.sin(self.lake_angle)
        u, v = dx * c + dy * s, -dx * s + dy * c
        return np.hypot(u / self.lake_axes[0], v / self.lake_axes[1])


# -- the planted story -------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Plan:
    years: tuple[int, ...]
    road_year: int
    harvest_year: int
    sar_year: int
    weather: np.ndarray  # shared year-to-year signal, unit variance (wet > 0)
    site_noise: np.ndarray  # (year, [up, down, control], [share, ndvi]) small independent site terms
    lake_scale: np.ndarray  # per year: lake shore at this normalised radius
    cloudy: frozenset  # years with a cloud patch


def _planted_years(first: int, last: int) -> tuple[int, int]:
    """Road and harvest years: the defaults when they leave room before and after, else inside the span."""
    n = last - first + 1
    road = ROAD_YEAR if first + 5 <= ROAD_YEAR <= last - 5 else first + n // 2
    harvest = HARVEST_YEAR if first + 4 <= HARVEST_YEAR <= last - 8 else first + 4
    return road, harvest


def _plan(seed: int, first: int, last: int, sar_year: int) -> _Plan:
    years = tuple(range(first, last + 1))
    n = len(years)
    rng = make_rng(seed, _S_WEATHER)
    shocks = rng.standard_normal(n)
    weather = np.empty(n)
    weather[0] = shocks[0]
    for i in range(1, n):  # AR(1): wet and dry spells last a few years
        weather[i] = 0.4 * weather[i - 1] + math.sqrt(1 - 0.16) * shocks[i]
    site_noise = rng.standard_normal((n, 3, 2)) * _FEN["site_sd"]
    trend = 1.0 - _LAKE_LOSS * np.arange(n) / (n - 1)
    lake_area = trend + 0.015 * weather  # relative to the nominal first-year area
    road, harvest = _planted_years(first, last)
    spare = [y for y in years[1:-1] if y not in (road, harvest, sar_year)]
    n_cloudy = max(2, n // 9)
    cloudy = frozenset(int(y) for y in rng.choice(spare, size=min(n_cloudy, len(spare)), replace=False))
    return _Plan(years, road, harvest, sar_year, weather, site_noise, np.sqrt(lake_area), cloudy)


def _summer_date(seed: int, year: int) -> dt.date:
    """One summer scene a year, 5 July to 26 August: always after the 1 July event date of the road."""
    return dt.date(year, 7, 5) + dt.timedelta(days=int(make_rng(seed, _S_OPTICAL, year, 0).integers(0, 53)))


def sar_dates(year: int) -> list[dt.date]:
    """Acquisitions every 12 days from 1 March to the end of November of ``year``.

    Examples
    --------
    >>> len(sar_dates(2023)), sar_dates(2023)[0].isoformat()
    (23, '2023-03-01')
    """
    first, last = dt.date(year, 3, 1), dt.date(year, 11, 30)
    return [first + dt.timedelta(days=12 * i) for i in range((last - first).days // 12 + 1)]


def _pulse(dates: list[dt.date]) -> tuple[int, int, int, np.ndarray]:
    """Indices of the flood pulse's first, peak and last date, and the flooded share of the floodplain.

    The pulse follows snowmelt: water rises over two acquisitions to cover the
    whole floodplain in mid-May and drains over two more.
    """
    start = next(i for i, d in enumerate(dates) if d >= dt.date(d.year, 4, 15))
    peak, end = start + 2, start + 4
    share = np.zeros(len(dates))
    share[start:peak + 1] = np.arange(1, peak - start + 2) / (peak - start + 1)
    share[peak:end + 1] = (end - np.arange(peak, end + 1) + 1) / (end - peak + 1)
    return start, peak, end, share


# -- per-pixel fields ----------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Base:
    """Static per-pixel fields of the archive grid."""

    veg: np.ndarray  # (band, y, x) green-canopy spectrum of the upland forest
    back: np.ndarray  # (band, y, x) background spectrum under it
    g_forest: np.ndarray  # green cover of the forest
    vig: np.ndarray  # unit-variance smooth field: vigour within fens and blocks
    relief: np.ndarray  # micro-relief (fens, floodplain): lower floods first
    turbid: np.ndarray  # 0..1 turbidity of the lake
    tex: np.ndarray  # unit-variance SAR texture
    rr: np.ndarray  # normalised distance from the lake centre


def _base(seed: int, lay: _Layout) -> _Base:
    rng = make_rng(seed, _S_BASE)
    shape = (lay.n, lay.n)
    wl = max(lay.n / 12.0, 2.0)
    conifer = sp.smoothstep(smooth_noise(rng, shape, 2 * wl), -0.5, 0.5)[None]  # conifer share of the stands
    veg = conifer * _em("conifer")[:, None, None] + (1 - conifer) * _em("broadleaf")[:, None, None]
    back = conifer * _em("understory")[:, None, None] + (1 - conifer) * _em("litter")[:, None, None]
    g_forest = np.clip(0.86 + 0.04 * smooth_noise(rng, shape, wl), 0.7, 0.97)
    vig = smooth_noise(rng, shape, wl)
    relief = smooth_noise(rng, shape, wl) + 0.3 * rng.standard_normal(shape)
    turbid = np.clip(0.35 + 0.2 * smooth_noise(rng, shape, wl), 0.0, 1.0)
    tex = smooth_noise(rng, shape, max(wl / 2, 1.5))
    f32 = lambda a: np.asarray(a, np.float32)  # noqa: E731
    return _Base(f32(veg), f32(back), f32(g_forest), f32(vig), f32(relief), f32(turbid), f32(tex),
                 lay.lake_radius())


def _green_for_ndvi(ndvi: np.ndarray, veg: np.ndarray, back: np.ndarray) -> np.ndarray:
    """Green cover g that gives ``ndvi`` for a linear mix g * veg + (1 - g) * back (closed form)."""
    rv, nv, rb, nb = veg[_RED], veg[_NIR], back[_RED], back[_NIR]
    g = (rb * (1 + ndvi) - nb * (1 - ndvi)) / ((nv - nb) * (1 - ndvi) - (rv - rb) * (1 + ndvi))
    return np.clip(g, 0.0, 1.0).astype(np.float32)


def _ndvi(rho: np.ndarray) -> np.ndarray:
    return (rho[_NIR] - rho[_RED]) / np.maximum(rho[_NIR] + rho[_RED], 1e-6)


def _mndwi(rho: np.ndarray) -> np.ndarray:
    return (rho[_GREEN] - rho[_SWIR1]) / np.maximum(rho[_GREEN] + rho[_SWIR1], 1e-6)


# -- one year's surface ----------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Year:
    """The noise-free state of one summer: reflectance and the masks the truth is read from."""

    rho: np.ndarray  # (band, y, x)
    lake_water: np.ndarray  # bool
    lake_bed: np.ndarray  # bool, exposed former lake bed
    fen_flooded: np.ndarray  # bool


def _fen_targets(plan: _Plan, i: int) -> tuple[dict[str, float], dict[str, float]]:
    """Planted open-water share and NDVI of the three fen polygons in year index ``i``."""
    year, w = plan.years[i], plan.weather[i]
    share, ndvi = {}, {}
    for k, site in enumerate(("up", "down", "control")):
        s_noise, n_noise = plan.site_noise[i, k]
        share[site] = float(np.clip(_FEN["share"] + _FEN["share_wx"] * w + s_noise, 0.03, 0.4))
        ndvi[site] = _FEN["ndvi"] + _FEN["ndvi_wx"] * w + n_noise
    if year >= plan.road_year:
        t = year - plan.road_year + 1
        share["up"] += _FEN["up_share"]
        share["down"] *= _FEN["down_keep"]
        ndvi["up"] += _FEN["up_ndvi"] * (1 - math.exp(-t / _FEN["up_tau"]))
        ndvi["down"] += _FEN["down_ndvi"] * (1 - math.exp(-t / _FEN["down_tau"]))
    return share, ndvi


def harvest_ndvi(year: int | np.ndarray, harvest_year: int, *, baseline: float = _HARVEST["baseline"],
                 after: float = _HARVEST["after"], tau: float = _HARVEST["tau_years"]) -> np.ndarray:
    """The planted NDVI recovery curve of the harvest block (without the weather term).

    ``baseline`` before the harvest year, then
    ``baseline - (baseline - after) * exp(-(year - harvest_year) / tau)``.

    Examples
    --------
    >>> float(harvest_ndvi(2002, 2002))
    0.34
    """
    t = np.asarray(year, np.float64) - harvest_year
    return np.where(t < 0, baseline, baseline - (baseline - after) * np.exp(-np.maximum(t, 0.0) / tau))


def _fens(lay: _Layout, base: _Base, plan: _Plan, i: int, rho_bands) -> np.ndarray:
    """Paint both fens into ``rho_bands`` (veg, back, g, fw arrays, in place); return the flooded mask."""
    veg, back, g, fw = rho_bands
    share, ndvi = _fen_targets(plan, i)
    shape = g.shape
    flooded = np.zeros(shape, bool)
    regions = {"up": _Box(lay.fen.r0, lay.road_row + 1, lay.fen.c0, lay.fen.c1),
               "down": _Box(lay.road_row + 1, lay.fen.r1, lay.fen.c0, lay.fen.c1), "control": lay.control_fen}
    polys = {"up": lay.up, "down": lay.down, "control": lay.control}
    herb, peat = _em("herb"), _em("peat")
    for site, region in regions.items():
        m = region.mask(shape)
        # the water level that floods exactly the planted share of the polygon's pixels
        level = np.quantile(base.relief[polys[site].mask(shape)], share[site])
        veg[:, m], back[:, m] = herb[:, None], peat[:, None]
        target = ndvi[site] + 0.03 * base.vig[m]
        g[m] = _green_for_ndvi(target, herb[:, None], peat[:, None])
        wet = m & (base.relief < level)
        flooded |= wet
    g[flooded], fw[flooded] = _FLOODED_G, _FLOODED_FW
    return flooded


def _surface(lay: _Layout, base: _Base, plan: _Plan, i: int) -> _Year:
    """Noise-free reflectance of summer ``i``: forest, fens, lake, road, harvest block, floodplain meadow."""
    year, w = plan.years[i], plan.weather[i]
    shape = (lay.n, lay.n)
    veg, back, g = base.veg.copy(), base.back.copy(), base.g_forest + np.float32(0.01 * w)
    fw = np.zeros(shape, np.float32)
    flooded = _fens(lay, base, plan, i, (veg, back, g, fw))
    meadow = lay.flood.mask(shape)
    veg[:, meadow], back[:, meadow], g[meadow] = _em("herb")[:, None], _em("litter")[:, None], 0.72
    block = lay.harvest.mask(shape)
    target = harvest_ndvi(year, plan.harvest_year) + _HARVEST["weather"] * w + 0.015 * base.vig[block]
    veg[:, block], back[:, block] = _em("broadleaf")[:, None], _em("soil")[:, None]
    g[block] = _green_for_ndvi(target, _em("broadleaf")[:, None], _em("soil")[:, None])
    lake = base.rr < plan.lake_scale[i]
    # the exposed lake bed greens up a little more each year it stays dry
    dry_years = (base.rr[None] >= plan.lake_scale[: i + 1, None, None]).sum(axis=0)
    bed = (base.rr < plan.lake_scale.max()) & ~lake
    veg[:, bed], back[:, bed] = _em("herb")[:, None], _em("soil", 0.8)[:, None]
    g[bed] = np.minimum(0.08 * dry_years[bed], 0.6)
    if year >= plan.road_year:
        road = np.zeros(shape, bool)
        road[lay.road_row, : lay.road_end] = True
        veg[:, road], back[:, road] = _em("herb")[:, None], _em("soil", 1.2)[:, None]  # gravel and verges
        g[road], fw[road] = 0.2, 0.0
    water = _em("water")[:, None, None] + base.turbid * (_em("turbid") - _em("water"))[:, None, None]
    fw[lake] = 1.0
    land = g * veg + (1 - g) * back
    rho = fw * water + (1 - fw) * land
    return _Year(rho.astype(np.float32), lake, bed, flooded)


# -- writing ------------------------------------------------------------------------------------------------


def _to_dn(rho: np.ndarray) -> np.ndarray:
    """Reflectance to Collection 2 Level-2 DN, (reflectance + 0.2) / 0.0000275, clipped to 7273-43636."""
    return np.clip(np.round((rho - LS_OFFSET) / LS_SCALE), 7273, 43636).astype(np.uint16)


def _write_optical(path: Path, grid, state: _Year, seed: int, date: dt.date, cloudy: bool) -> float:
    """Write one scene with sensor noise and, when ``cloudy``, a cloud patch as no data; return its cover."""
    rng = make_rng(seed, _S_OPTICAL, date.year, 1)
    gains = (1.0 + 0.005 * rng.standard_normal(len(LS_BANDS))).astype(np.float32)[:, None, None]
    noise = rng.standard_normal((2,) + state.rho.shape, dtype=np.float32)
    rho = state.rho * gains * (1 + 0.01 * noise[0]) + 0.002 * noise[1]
    dn = _to_dn(np.clip(rho, 0.0, 1.0))
    cover = 0.0
    if cloudy:
        field = smooth_noise(rng, grid.shape, max(grid.height / 4.0, 3.0))
        frac = rng.uniform(0.1, 0.3)
        cloud = field > np.quantile(field, 1.0 - frac)
        dn[:, cloud] = 0
        cover = float(cloud.mean())
    tags = {"ACQUISITION_DATE": date.isoformat(), "SENSOR": SENSOR, "SCALE": str(LS_SCALE),
            "OFFSET": str(LS_OFFSET), "UNITS": "surface reflectance DN"}
    with sp.create_tif(path, width=grid.width, height=grid.height, count=len(LS_BANDS), dtype="uint16",
                       crs=grid.crs, transform=grid.transform, nodata=0, descriptions=LS_BANDS, tags=tags,
                       tiled=grid.width >= sp.BLOCK) as ds:
        ds.write(dn)
    return cover


def _sar_db(lay: _Layout, base: _Base, state: _Year, meadow_flooded: np.ndarray, doy: int,
            rng: np.random.Generator) -> np.ndarray:
    """Mean VV (dB) of one acquisition before speckle."""
    shape = (lay.n, lay.n)
    db = np.full(shape, _SAR_DB["forest"], np.float32)
    fen = lay.fen.mask(shape) | lay.control_fen.mask(shape)
    db[fen] = _SAR_DB["fen"]
    db[state.fen_flooded] = _SAR_DB["fen_flooded"]
    season = sp.smoothstep(doy, 120, 170) - sp.smoothstep(doy, 250, 300)  # herbs grow and brighten in summer
    db[lay.flood.mask(shape)] = _SAR_DB["meadow"] + 1.5 * season
    db[lay.harvest.mask(shape)] = _SAR_DB["harvest"]
    db[state.lake_bed] = _SAR_DB["lakebed"]
    db[lay.road_row, : lay.road_end] = _SAR_DB["road"]
    db += np.float32(rng.normal(0.0, 0.4)) + 0.8 * base.tex  # moisture of the day; roughness and structure
    calm = state.lake_water | meadow_flooded
    db[calm] = _SAR_DB["water"] + 0.5 * base.tex[calm]  # specular water: no moisture or structure terms
    return db


def _write_sar(folder: Path, grid, db_vv: np.ndarray, date: dt.date, rng: np.random.Generator) -> list[Path]:
    paths = []
    for band, db in zip(SAR_BANDS, (db_vv, db_vv - _VH_BELOW_VV), strict=True):
        path = folder / f"S1_{date:%Y%m%d}_{band}.tif"
        tags = {"ACQUISITION_DATE": date.isoformat(), "POLARISATION": band, "UNITS": "linear power (sigma0)"}
        with sp.create_tif(path, width=grid.width, height=grid.height, count=1, dtype="float32", crs=grid.crs,
                           transform=grid.transform, nodata=SAR_NODATA, descriptions=(band,), tags=tags,
                           zlevel=1, tiled=grid.width >= sp.BLOCK) as ds:
            ds.write(sp.speckled_power(db, rng), 1)
        paths.append(path)
    return paths


def _write_sites(path: Path, grid, lay: _Layout, plan: _Plan, flood_start: dt.date) -> None:
    """sites.gpkg, layer "sites": lake (first-year extent plus two pixels), fens, block and floodplain."""
    import geopandas as gpd
    import pandas as pd
    from shapely import affinity
    from shapely.geometry import Point

    px = grid.resolution
    (cy, cx), (a, b) = lay.lake_centre, lay.lake_axes
    x, y = grid.transform @ (cx, cy)
    s0 = float(plan.lake_scale[0])
    lake = affinity.scale(Point(x, y).buffer(1.0, 64), a * s0 * px, b * s0 * px)
    lake = affinity.rotate(lake, -math.degrees(lay.lake_angle), origin=(x, y)).buffer(2 * px)
    road = f"{plan.road_year}-07-01"
    rows = [("lake", "lake", lake, "", None),
            (SITE_NAMES["up"], "impact", lay.up.polygon(grid), road, plan.road_year),
            (SITE_NAMES["down"], "impact", lay.down.polygon(grid), road, plan.road_year),
            (SITE_NAMES["control"], "control", lay.control.polygon(grid), "", None),
            (SITE_NAMES["harvest"], "harvest", lay.harvest.polygon(grid), f"{plan.harvest_year}-02-15",
             plan.harvest_year),
            (SITE_NAMES["flood"], "flood", lay.flood.polygon(grid), flood_start.isoformat(), None)]
    name, role, geom, event, disturbed = zip(*rows, strict=True)
    gdf = gpd.GeoDataFrame({"name": list(name), "role": list(role), "event": list(event),
                            "disturbed": pd.array(list(disturbed), dtype="Int32")},
                           geometry=list(geom), crs=GRID_CRS)
    path.unlink(missing_ok=True)
    import pyogrio

    # a fixed timestamp in the GeoPackage's metadata keeps the file byte-identical for one seed
    pyogrio.set_gdal_config_options({"OGR_CURRENT_DATE": "2000-01-01T00:00:00Z"})
    try:
        gdf.to_file(path, driver="GPKG", layer="sites", engine="pyogrio")
    finally:
        pyogrio.set_gdal_config_options({"OGR_CURRENT_DATE": None})


def _slopes(years: np.ndarray, values: np.ndarray) -> tuple[float, float]:
    """Least-squares slope and Sen's slope (median of all pairwise slopes) of a series."""
    i, j = np.triu_indices(len(years), k=1)
    sen = float(np.median((values[j] - values[i]) / (years[j] - years[i])))
    return float(np.polyfit(years, values, 1)[0]), sen


def _baci(series: dict[str, np.ndarray], after: np.ndarray, impact: str, control: str) -> float:
    """Change of the mean impact-minus-control difference from before to after the event."""
    diff = series[impact] - series[control]
    return float(diff[after].mean() - diff[~after].mean())


def _fen_truth(lay: _Layout, plan: _Plan, states: list[_Year], shape) -> dict[str, Any]:
    """Per-polygon water share and median NDVI (noise-free) by year, and the planted BACI effects."""
    polys = {"up": lay.up, "down": lay.down, "control": lay.control}
    share = {s: np.array([st.fen_flooded[p.mask(shape)].mean() for st in states]) for s, p in polys.items()}
    ndvi = {s: np.array([np.median(_ndvi(st.rho)[p.mask(shape)]) for st in states]) for s, p in polys.items()}
    after = np.array(plan.years) >= plan.road_year
    out: dict[str, Any] = {"series": {SITE_NAMES[s]: {"water_share": share[s].round(4).tolist(),
                                                      "ndvi_median": ndvi[s].astype(float).round(4).tolist()}
                                      for s in polys}}
    out["baci"] = {}
    for site in ("up", "down"):
        eff_w, eff_n = _baci(share, after, site, "control"), _baci(ndvi, after, site, "control")
        out["baci"][SITE_NAMES[site]] = {
            "water_share": {"effect": round(eff_w, 4), "sign": int(np.sign(eff_w))},
            "ndvi": {"effect": round(eff_n, 4), "sign": int(np.sign(eff_n))}}
    out["control"] = SITE_NAMES["control"]
    out["definition"] = ("effect = mean(impact - control) after the event minus the same mean before; "
                         "water share = share of the polygon's pixels under open water, NDVI = polygon "
                         "median of the noise-free reflectance")
    return out


def _lake_truth(plan: _Plan, states: list[_Year], px: float, lay: _Layout) -> dict[str, Any]:
    years = np.array(plan.years, np.float64)
    ha = px * px / 1e4
    counts = np.array([int(st.lake_water.sum()) for st in states])
    area = counts * ha
    nominal = math.pi * lay.lake_axes[0] * lay.lake_axes[1] * ha
    ols, sen = _slopes(years, area)
    return {"name": SITE_NAMES["lake"], "pixel_count": counts.tolist(), "area_ha": area.round(4).tolist(),
            "planted_area_ha": (nominal * plan.lake_scale**2).round(4).tolist(),
            "planted_rate_ha_per_yr": round(-_LAKE_LOSS * nominal / (len(years) - 1), 4),
            "ols_slope_ha_per_yr": round(ols, 4), "sen_slope_ha_per_yr": round(sen, 4),
            "water_rule": "MNDWI > 0 (green, swir1) separates the lake from every other surface"}


def _harvest_truth(plan: _Plan, states: list[_Year], lay: _Layout, shape) -> dict[str, Any]:
    years = np.array(plan.years)
    curve = harvest_ndvi(years, plan.harvest_year)
    after = years >= plan.harvest_year
    first_80 = int(years[after & (curve >= 0.8 * _HARVEST["baseline"])][0])
    block = lay.harvest.mask(shape)
    median = np.array([np.median(_ndvi(st.rho)[block]) for st in states])
    return {"name": SITE_NAMES["harvest"], "year": plan.harvest_year, "baseline_ndvi": _HARVEST["baseline"],
            "after_ndvi": _HARVEST["after"], "tau_years": _HARVEST["tau_years"],
            "curve": "ndvi(t) = baseline - (baseline - after) * exp(-(t - year) / tau_years) for t >= year",
            "weather_ndvi_per_unit": _HARVEST["weather"], "recovery_80_year": first_80,
            "planted_ndvi": curve.round(4).tolist(), "ndvi_median": median.astype(float).round(4).tolist()}


def _check_args(size: int, pixel_size_m: float, first_year: int, last_year: int, sar_year: int) -> None:
    if not 32 <= int(size) <= 2048:
        raise ParameterError(f"make_archive: size must be 32..2048 pixels, got {size}; the archive grid is "
                             "size x size pixels (200 at 30 m covers the 6 km demo).")
    if not 10.0 <= float(pixel_size_m) <= 120.0:
        raise ParameterError(f"make_archive: pixel_size_m must be 10..120 m, got {pixel_size_m}; 30 matches "
                             "Landsat.")
    if last_year - first_year + 1 < 14:
        raise ParameterError(f"make_archive: the archive needs at least 14 summers, got {first_year}.."
                             f"{last_year}; widen first_year..last_year (default 1990..2024).")
    if not first_year <= sar_year <= last_year:
        raise ParameterError(f"make_archive: sar_year must lie in {first_year}..{last_year}, got {sar_year}; "
                             "pick a year of the optical archive (default 2023).")


def _render_optical(root: Path, grid, lay: _Layout, base: _Base, plan: _Plan, seed: int, bar):
    """Write every summer scene; return the noise-free states and the cloud cover of the cloudy dates."""
    states, clouds, paths = [], {}, []
    for i, year in enumerate(plan.years):
        date = _summer_date(seed, year)
        state = _surface(lay, base, plan, i)
        path = root / "optical" / f"LS_{date:%Y%m%d}.tif"
        cover = _write_optical(path, grid, state, seed, date, year in plan.cloudy)
        if year in plan.cloudy:
            clouds[date.isoformat()] = round(cover, 4)
        states.append(state)
        paths.append(path)
        bar.update(1)
    return states, clouds, paths


def _render_sar(root: Path, grid, lay: _Layout, base: _Base, state: _Year, seed: int, year: int, bar):
    """Write the SAR season; return its truth and the written paths."""
    dates = sar_dates(year)
    start, peak, end, share = _pulse(dates)
    meadow = lay.flood.mask(grid.shape)
    relief = base.relief[meadow]
    paths, area = [], []
    for i, date in enumerate(dates):
        rng = make_rng(seed, _S_SAR, i)
        level = np.quantile(relief, share[i]) if share[i] > 0 else -np.inf
        flooded = meadow & (base.relief <= level)
        area.append(float(flooded.sum()) * grid.resolution**2 / 1e4)
        db = _sar_db(lay, base, state, flooded, date.timetuple().tm_yday, rng)
        paths += _write_sar(root / "sar", grid, db, date, rng)
        bar.update(1)
    truth = {"year": year, "dates": [d.isoformat() for d in dates],
             "pulse": {"start": dates[start].isoformat(), "peak": dates[peak].isoformat(),
                       "end": dates[end].isoformat()},
             "flooded_share": share.round(4).tolist(), "flooded_area_ha": [round(a, 4) for a in area],
             "floodplain": SITE_NAMES["flood"], "floodplain_area_ha": round(float(meadow.sum()) *
                                                                            grid.resolution**2 / 1e4, 4),
             "levels_db": {"vv": dict(_SAR_DB), "vh_below_vv": _VH_BELOW_VV}, "looks": 4.5}
    return truth, paths


def make_archive(out_dir, *, seed: int = 0, size: int = 200, pixel_size_m: float = 30.0,
                 first_year: int = 1990, last_year: int = 2024, sar_year: int = 2023,
                 progress: bool = False) -> dict:
    """Write the synthetic image archive of the Orlenmere Basin into ``out_dir/archive/``.

    Parameters
    ----------
    out_dir : str or path-like
        Folder that receives ``archive/`` (replaced if present).
    seed : int
        Seed of every random step; the same seed gives byte-identical files.
    size : int
        Pixels per side of the archive grid (UTM 33N, the static demo's origin).
    pixel_size_m : float
        Pixel size; 200 pixels of 30 m cover the default 6 km demo.
    first_year, last_year : int
        One summer scene per year between them (at least 14 years).
    sar_year : int
        Year of the SAR season (every 12 days, March to November).
    progress : bool
        Show a progress bar.

    Returns
    -------
    dict
        The truth written to ``archive/truth.json`` (keys ``lake``, ``road``, ``fens``, ``harvest``,
        ``sar``, ``clouds``, ``optical``, ``weather`` ...) plus ``paths``: ``root``, ``optical`` (list),
        ``sar`` (list), ``sites`` and ``truth``, as strings.

    Notes
    -----
    Files: ``optical/LS_YYYYMMDD.tif`` (blue, green, red, nir, swir1, swir2; uint16 Collection 2 Level-2
    DN, reflectance = DN * 0.0000275 - 0.2, 0 = no data, including cloud patches),
    ``sar/S1_YYYYMMDD_{VV,VH}.tif`` (float32 linear sigma0 with 4.5-look gamma speckle),
    ``sites.gpkg`` (layer ``sites``: ``name``, ``role``, ``event``, ``disturbed``) and ``truth.json``.
    The default archive takes about 20 MB.

    Examples
    --------
    >>> truth = make_archive("demo_data", size=40)  # doctest: +SKIP
    >>> truth["road"]["year"]  # doctest: +SKIP
    2008
    """
    _check_args(size, pixel_size_m, first_year, last_year, sar_year)
    from tqdm.auto import tqdm

    from ..progress import done_text

    root = Path(out_dir) / "archive"
    shutil.rmtree(root, ignore_errors=True)
    for sub in ("optical", "sar"):
        (root / sub).mkdir(parents=True)
    grid, lay = demo_grid(int(size), float(pixel_size_m)), _Layout.of(int(size))
    plan = _plan(seed, int(first_year), int(last_year), int(sar_year))
    base = _base(seed, lay)
    bar = tqdm(total=len(plan.years) + len(sar_dates(sar_year)), desc="archive", disable=not progress)
    t0 = time.perf_counter()
    states, clouds, optical = _render_optical(root, grid, lay, base, plan, seed, bar)
    state_sar = states[plan.years.index(sar_year)]
    sar_truth, sar = _render_sar(root, grid, lay, base, state_sar, seed, sar_year, bar)
    bar.set_postfix_str(done_text(time.perf_counter() - t0))  # the finished bar stays, with its time
    bar.close()
    _write_sites(root / "sites.gpkg", grid, lay, plan, dt.date.fromisoformat(sar_truth["pulse"]["start"]))
    truth = _truth(grid, lay, plan, states, seed, clouds, sar_truth)
    (root / "truth.json").write_text(json.dumps(truth, indent=1, sort_keys=True), encoding="utf-8")
    truth["paths"] = {"root": str(root), "optical": [str(p) for p in optical], "sar": [str(p) for p in sar],
                      "sites": str(root / "sites.gpkg"), "truth": str(root / "truth.json")}
    return truth


def _truth(grid, lay: _Layout, plan: _Plan, states: list[_Year], seed: int, clouds: dict,
           sar_truth: dict) -> dict[str, Any]:
    shape = grid.shape
    return {
        "place": f"{PLACE} (synthetic)", "crs": GRID_CRS, "size": lay.n, "pixel_size_m": grid.resolution,
        "seed": int(seed), "years": list(plan.years),
        "optical": {"dates": [_summer_date(seed, y).isoformat() for y in plan.years], "bands": list(LS_BANDS),
                    "sensor": SENSOR, "scale": LS_SCALE, "offset": LS_OFFSET, "nodata": 0},
        "weather": plan.weather.round(4).tolist(),
        "clouds": {"dates": sorted(clouds), "cover": clouds},
        "lake": _lake_truth(plan, states, grid.resolution, lay),
        "road": {"year": plan.road_year, "event_date": f"{plan.road_year}-07-01",
                 "impact": [SITE_NAMES["up"], SITE_NAMES["down"]], "control": [SITE_NAMES["control"]]},
        "fens": _fen_truth(lay, plan, states, shape),
        "harvest": _harvest_truth(plan, states, lay, shape),
        "sar": sar_truth,
    }


def monitor_table(archive_dir: str = "archive", *, road_year: int = ROAD_YEAR) -> dict:
    """The project file's ``[monitor]`` table for an archive written by :func:`make_archive`.

    Parameters
    ----------
    archive_dir : str
        The archive folder relative to the project file.
    road_year : int
        Year the road was built (``truth["road"]["year"]``; 2008 for the default span).

    Returns
    -------
    dict
        ``{"monitor": {...}}``, ready for ``tomli_w.dumps`` (the event date is a ``datetime.date``).

    Examples
    --------
    >>> monitor_table()["monitor"]["baci"]["control"]
    ['fen_control']
    """
    a = archive_dir.rstrip("/")
    return {"monitor": {
        "polygons": f"{a}/sites.gpkg",
        "id_field": "name",
        "metrics": ["water", "mndwi", "ndvi"],
        "aggregate": "median",
        "fdr": 0.05,
        # the archive writes six bands, the sensor's default set has seven (coastal first): bands given here
        "optical": [{"pattern": f"{a}/optical/LS_{{date}}.tif", "sensor": SENSOR, "bands": list(LS_BANDS)}],
        "sar": [{"pattern": f"{a}/sar/S1_{{date}}_{{band}}.tif", "units": "linear"}],
        "water": {"sar_threshold": "split", "optical_threshold": "otsu", "period": "year"},
        "baci": {"event_date": dt.date(int(road_year), 7, 1),
                 "impact": [SITE_NAMES["up"], SITE_NAMES["down"]], "control": [SITE_NAMES["control"]]},
        "recovery": {"patches": [SITE_NAMES["harvest"]], "date_field": "disturbed", "metric": "ndvi"},
    }}
