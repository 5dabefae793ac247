"""Synthetic demo landscape: the Orlenmere Basin, a fictional wetland basin.

:func:`make_demo` writes a complete, self-consistent project into a folder: an
area of interest, a DEM in a different CRS and at a coarser pixel than the
optical grid, multi-date optical scenes with scene-classification masks, a SAR
VV/VH series, clustered photo-interpreted plots with a little label noise, the
hidden truth raster, and a ``project.toml`` that points at all of them.

The landscape is built from rules, not drawn: a tilted, hilly surface is
drained by priority-flood routing; the stream network carves flat-floored
valleys; a lake and ponds sit in closed depressions; classes follow hydrology
and topography (water in deep depressions, marsh in shallow ones and on lake
margins, fen on valley floors with through-flow, bog on flat raised
interfluves and infilled basins, swamp as treed belts around wetlands and on
lower valley sides, upland elsewhere).  Every random step draws from its own
``numpy.random.default_rng(SeedSequence([seed, stream, ...]))``, so one seed
gives byte-identical rasters.  Optical and SAR rasters are rendered by blocks
of rows (:mod:`wetlandflow.demo.spectra`), so memory grows with the area, not
with the number of dates.

All names in the demo are invented; the data are synthetic.
"""

from __future__ import annotations

import heapq
import math
import shutil
import time
from dataclasses import dataclass
from pathlib import Path

import numba
import numpy as np
import xarray as xr
from scipy import ndimage as ndi

from .._provenance import with_attrs
from ..errors import AlignmentError, InputFileError, ProjectFileError
from ..features._terrain_kernels import fill_array
from ..inputs.grid import Grid, attach, require_projected
from . import spectra as sp
from ._place import GRID_CRS, PLACE, demo_grid
from .archive import make_archive, monitor_table
from .spectra import make_rng as _rng
from .spectra import smooth_noise as _noise
from .spectra import smoothstep as _smoothstep

CLASS_NAMES = ("upland", "open_water", "marsh", "swamp", "fen", "bog")
WETLAND_CLASSES = ("marsh", "swamp", "fen", "bog")
PLOT_PREFIX = "OB"
_NOMINAL_EXTENT_M = 6000.0
# random streams: one integer per independent random step
_S_TERRAIN, _S_CLASSES, _S_COVER, _S_AOI, _S_PLOTS, _S_OPTICAL, _S_SAR = range(1, 8)
# plausible confusions of a photo-interpreter (label noise)
_NEIGHBOUR_LABEL = {"fen": "bog", "bog": "fen", "marsh": "swamp", "swamp": "marsh",
                    "open_water": "marsh", "upland": "swamp"}


# -- hydrology kernels (global operations, in memory) -------------------------------------------------


@numba.njit(cache=True)
def _priority_flood(z):
    """Depression filling and the flood's drainage tree by Priority-Flood (Barnes et al. 2014).

    Inside a depression the cells are taken in the order of their own
    elevation (key = filled + 1e-7 * original) rather than first-in first-out,
    so flow paths follow the depression floor instead of running straight.
    Returns the filled surface, the receiver of every cell (-1 at the edge
    outlets) and the order in which cells were reached (downstream first).
    The library's fill (``features._terrain_kernels.fill_array``) gives the
    same filled surface but not this tree, which shapes the demo's streams,
    so the tree is built here and plain filling uses the library.
    """
    h, w = z.shape
    z0 = z.ravel()
    zf = z0.copy()
    recv = np.full(z0.size, -1, np.int64)
    order = np.empty(z0.size, np.int64)
    done = np.zeros(z0.size, np.bool_)
    heap = [(0.0, 0)]
    heap.pop()
    for c in range(z0.size):
        if c // w == 0 or c % w == 0 or c // w == h - 1 or c % w == w - 1:
            done[c] = True
            heapq.heappush(heap, (zf[c] * (1.0 + 1e-7), c))
    count = 0
    while len(heap) > 0:
        c = heapq.heappop(heap)[1]
        order[count] = c
        count += 1
        r, q = c // w, c % w
        for rr in range(max(r - 1, 0), min(r + 2, h)):
            for qq in range(max(q - 1, 0), min(q + 2, w)):
                nb = rr * w + qq
                if not done[nb]:
                    done[nb] = True
                    recv[nb] = c
                    zf[nb] = max(zf[nb], zf[c])
                    heapq.heappush(heap, (zf[nb] + 1e-7 * z0[nb], nb))
    return zf.reshape(h, w), recv, order


@numba.njit(cache=True)
def _accumulate(recv, order):
    """Number of cells draining through each cell (itself included), from the flood order."""
    acc = np.ones(recv.size, np.float64)
    for k in range(order.size - 1, -1, -1):
        c = order[k]
        if recv[c] >= 0:
            acc[recv[c]] += acc[c]
    return acc


@numba.njit(cache=True)
def _cone_envelope(seed, step):
    """min over cells q of seed[q] + step * (3 x 3 chamfer distance to q), by two raster passes."""
    z = seed.copy()
    h, w = z.shape
    diag = step * math.sqrt(2.0)
    for i in range(h):
        for j in range(w):
            v = z[i, j]
            if j > 0:
                v = min(v, z[i, j - 1] + step)
            if i > 0:
                v = min(v, z[i - 1, j] + step)
                if j > 0:
                    v = min(v, z[i - 1, j - 1] + diag)
                if j < w - 1:
                    v = min(v, z[i - 1, j + 1] + diag)
            z[i, j] = v
    for i in range(h - 1, -1, -1):
        for j in range(w - 1, -1, -1):
            v = z[i, j]
            if j < w - 1:
                v = min(v, z[i, j + 1] + step)
            if i < h - 1:
                v = min(v, z[i + 1, j] + step)
                if j < w - 1:
                    v = min(v, z[i + 1, j + 1] + diag)
                if j > 0:
                    v = min(v, z[i + 1, j - 1] + diag)
            z[i, j] = v
    return z


# -- layout -------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Layout:
    """The optical grid plus the coarser design grid on which the terrain is shaped.

    ``k`` scales landform sizes: a small demo is a miniature of the nominal
    6 km basin (down to half size), a large one repeats its landforms.
    """

    grid: Grid
    k: float
    f: int

    @classmethod
    def of(cls, grid: Grid) -> _Layout:
        extent = grid.width * grid.resolution
        k = float(np.clip(extent / _NOMINAL_EXTENT_M, 0.5, 1.0))
        return cls(grid, k, max(1, int(round(20.0 * k / grid.resolution))))

    @property
    def shape(self) -> tuple[int, int]:
        return self.grid.shape

    @property
    def dshape(self) -> tuple[int, int]:
        h, w = self.grid.shape
        return (-(-h // self.f), -(-w // self.f))

    @property
    def ds(self) -> float:
        return self.grid.resolution * self.f

    @property
    def nominal_km2(self) -> float:
        """Area in nominal (unscaled) square kilometres: sets how many landforms there are."""
        h, w = self.grid.shape
        return h * w * (self.grid.resolution / self.k) ** 2 / 1e6

    def dpx(self, metres: float) -> float:
        """A nominal length in design pixels."""
        return metres * self.k / self.ds

    def fpx(self, metres: float) -> float:
        """A nominal length in optical pixels."""
        return metres * self.k / self.grid.resolution

    def up(self, a: np.ndarray) -> np.ndarray:
        """A design-grid field on the optical grid (bilinear)."""
        return sp.upsample(np.asarray(a, np.float32), self.f, self.shape)


# -- terrain -------------------------------------------------------------------------------------------------


def _relief(lay: _Layout, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Tilted hilly surface with ridges; flattened, slightly raised plateaus where bogs can form."""
    h, w = lay.dshape
    n1, n2, n3, ridge, plat = (_noise(rng, (h, w), lay.dpx(m)) for m in (3200, 1100, 380, 2200, 2600))
    theta = rng.uniform(0, 2 * math.pi)
    yy, xx = np.ogrid[0:h, 0:w]
    u = (math.cos(theta) * xx / w + math.sin(theta) * yy / h).astype(np.float32)
    drop = min(28.0 * math.sqrt(max(lay.nominal_km2 / 36.0, 1.0)), 60.0)  # regional fall across the area, m
    tilt = drop * (u - u.min()) / max(float(u.max() - u.min()), 1e-6)
    hills = 8.0 * n2 + 2.5 * n3 + 7.0 * (1.0 - np.abs(ridge)) ** 2
    lo, hi = np.quantile(plat[::4, ::4], (0.78, 0.95))  # plateaus: about the top fifth of a broad field
    pw = _smoothstep(plat, float(lo), float(hi)).astype(np.float32)
    vert = math.sqrt(lay.k)  # miniatures get gentler relief so their slopes stay plausible
    z0 = 60.0 + vert * (tilt + 10.0 * n1 + (1.0 - pw) * hills + pw * (float(hills.mean()) + 4.0 * pw))
    # beyond the nominal basin broad swells keep regional gradients from fading as the tilt spreads out
    swell = 15.0 * float(_smoothstep(lay.nominal_km2, 50.0, 400.0))
    if swell > 0:
        z0 += swell * _noise(rng, (h, w), lay.dpx(9000))
    return z0.astype(np.float32), pw


def _stamp_bowl(depth: np.ndarray, ds: float, cx: float, cy: float, radius: float, deep: float,
                rng: np.random.Generator) -> None:
    """Add one irregular, elongated bowl (a closed depression) to ``depth`` in place (max-merge)."""
    aspect, rot = rng.uniform(1.0, 1.6), rng.uniform(0, math.pi)
    harm, phase = rng.uniform(0.0, 0.12, 2), rng.uniform(0, 2 * math.pi, 2)
    reach = radius * 1.3 * aspect / ds
    h, w = depth.shape
    r0, r1 = max(int(cy - reach), 0), min(int(cy + reach) + 2, h)
    c0, c1 = max(int(cx - reach), 0), min(int(cx + reach) + 2, w)
    if r0 >= r1 or c0 >= c1:
        return
    yy, xx = np.ogrid[r0:r1, c0:c1]
    dx, dy = (xx + 0.5 - cx) * ds, (yy + 0.5 - cy) * ds
    u, v = dx * math.cos(rot) + dy * math.sin(rot), -dx * math.sin(rot) + dy * math.cos(rot)
    ang = np.arctan2(v, u)
    rim = radius * (1.0 + harm[0] * np.cos(2 * ang + phase[0]) + harm[1] * np.cos(3 * ang + phase[1]))
    rr = np.sqrt((u / aspect) ** 2 + (v * aspect) ** 2) / rim
    prof = deep * np.clip(1.0 - rr * rr, 0.0, 1.0) ** 2
    depth[r0:r1, c0:c1] = np.maximum(depth[r0:r1, c0:c1], prof.astype(np.float32))


def _flatten_basin(z: np.ndarray, ds: float, cx: float, cy: float, radius: float, deep: float) -> None:
    """Sink a broad lowland basin around a lake and halve its local relief, in place.

    Keeping half of the relief matters: on a smooth cone or plain the routed
    streams would run in straight lines.
    """
    reach = 2.6 * radius / ds
    h, w = z.shape
    r0, r1 = max(int(cy - reach), 0), min(int(cy + reach) + 2, h)
    c0, c1 = max(int(cx - reach), 0), min(int(cx + reach) + 2, w)
    yy, xx = np.ogrid[r0:r1, c0:c1]
    inner = 1.0 - _smoothstep(np.hypot((xx + 0.5 - cx) * ds, (yy + 0.5 - cy) * ds) / radius, 0.8, 2.6)
    level = float(z[min(int(cy), h - 1), min(int(cx), w - 1)])
    weight = 0.5 * inner
    z[r0:r1, c0:c1] = z[r0:r1, c0:c1] * (1.0 - weight) + level * weight - deep * inner


def _bowls(lay: _Layout, rng: np.random.Generator, z0: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Designed closed depressions: lakes in flattened low ground, ponds on gentle ground.

    Returns the surface (with the lake basins flattened) and the depth of the bowls.
    """
    h, w = lay.dshape
    z0 = z0.copy()
    depth = np.zeros((h, w), np.float32)
    smooth = ndi.gaussian_filter(z0, max(lay.dpx(150), 1.0))
    n_lakes = max(1, int(round(lay.nominal_km2 / 30.0)))
    for i in range(n_lakes):
        lo, hi = (0.3, 0.7) if i == 0 else (0.1, 0.9)
        cand = rng.uniform(lo, hi, (40, 2)) * (h, w)
        best = int(np.argmin(smooth[cand[:, 0].astype(int), cand[:, 1].astype(int)]))
        radius = rng.uniform(450, 700) * lay.k
        _flatten_basin(z0, lay.ds, cand[best, 1], cand[best, 0], radius, 5.0 * math.sqrt(lay.k))
        _stamp_bowl(depth, lay.ds, cand[best, 1], cand[best, 0], radius, rng.uniform(6, 10), rng)
    smooth = ndi.gaussian_filter(z0, max(lay.dpx(150), 1.0))
    gy, gx = np.gradient(smooth, lay.ds)
    slope = np.hypot(gx, gy)
    n_ponds = int(round(1.5 * lay.nominal_km2 * lay.k))  # ponds shrink less than the landforms in a miniature
    cand = rng.uniform(0.04, 0.96, (12 * n_ponds + 12, 2)) * (h, w)
    gentle = cand[slope[cand[:, 0].astype(int), cand[:, 1].astype(int)] < 0.03][:n_ponds]
    for cy, cx in gentle:
        radius = math.exp(rng.uniform(math.log(35), math.log(140))) * math.sqrt(lay.k)
        # half are marshy hollows, half ponds with open water
        deep = rng.uniform(0.6, 1.1) if rng.uniform() < 0.5 else rng.uniform(1.5, 4.0)
        _stamp_bowl(depth, lay.ds, cx, cy, radius, deep, rng)
    return z0, depth


@dataclass(frozen=True)
class _Terrain:
    """Design-grid terrain fields (float32)."""

    z: np.ndarray  # elevation, m
    zfill: np.ndarray  # depression-filled elevation (water surface of ponds and lakes), m
    dep: np.ndarray  # depth of closed depressions, m
    dist: np.ndarray  # distance to the nearest stream, m
    hand: np.ndarray  # height above the nearest stream, m
    area: np.ndarray  # upstream area of the nearest stream, m^2
    floor: np.ndarray  # half-width of the valley floor there, m
    plateau: np.ndarray  # 0..1 plateau weight
    infilled: np.ndarray  # 1 where a natural depression was infilled by peat or sediment
    slope: np.ndarray  # degrees


def _carve_valleys(lay: _Layout, z0: np.ndarray, zf: np.ndarray, area: np.ndarray, a_min: float):
    """Cut flat-floored valleys along the streams: floors at the stream level, sides of bounded slope."""
    stream = area >= a_min
    dist, (iy, ix) = ndi.distance_transform_edt(~stream, sampling=lay.ds, return_indices=True)
    z_stream, a_stream = zf[iy, ix], area[iy, ix]
    del iy, ix
    floor = np.clip(30.0 * lay.k * (a_stream / a_min) ** 0.25, 20.0 * lay.k, 150.0 * lay.k)
    seed = np.where(dist <= floor, z_stream + 0.004 * dist, np.inf)
    side = min(0.06 / lay.k, 0.15)
    zv = _cone_envelope(seed, side * lay.ds)
    return np.minimum(z0, zv), dist, z_stream, a_stream, floor


def _terrain(lay: _Layout, seed: int) -> _Terrain:
    """Shape the design-grid DEM: relief, depressions, drainage, valleys, partial infilling."""
    rng = _rng(seed, _S_TERRAIN)
    z0, plateau = _relief(lay, rng)
    z0, bowl = _bowls(lay, rng, z0)
    z0 = (z0 - bowl).astype(np.float64)
    zf0, recv, order = _priority_flood(z0)
    area = _accumulate(recv, order).reshape(z0.shape) * lay.ds**2
    del recv, order
    a_min = 0.3e6 * lay.k**2
    z1, dist, z_stream, a_stream, floor = _carve_valleys(lay, z0, zf0, area, a_min)
    del zf0, area
    zf1 = fill_array(z1, epsilon=False)
    dep1 = zf1 - z1
    hollow = 0.6 * _smoothstep(_noise(rng, z1.shape, lay.dpx(500)), 0.3, 1.5)
    dep = np.minimum(dep1, bowl + hollow)
    z = zf1 - dep
    gy, gx = np.gradient(z, lay.ds)
    f32 = lambda a: np.asarray(a, np.float32)  # noqa: E731
    return _Terrain(
        z=f32(z), zfill=f32(zf1), dep=f32(dep), dist=f32(dist), hand=f32(np.maximum(z - z_stream, 0.0)),
        area=f32(a_stream), floor=f32(floor), plateau=plateau,
        infilled=f32((dep1 - dep > 1.0) & (bowl < 0.1)), slope=f32(np.degrees(np.arctan(np.hypot(gx, gy)))),
    )


# -- classes -------------------------------------------------------------------------------------------------


def _classify(lay: _Layout, seed: int, t: _Terrain) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Truth codes on the optical grid from hydrological and topographic rules.

    Thresholds are nominal: a miniature has its lengths scaled by k and its
    relief by sqrt(k), so height thresholds scale by sqrt(k) and slope
    thresholds by 1/sqrt(k).  Returns the codes (1..6, whole grid) and the
    fine-grid terrain fields that the DEM and the signal models reuse.
    """
    rng = _rng(seed, _S_CLASSES)
    k, v = lay.k, math.sqrt(lay.k)  # v: vertical scale; transition belts also shrink by v, not k
    nb, nb2 = _noise(rng, lay.shape, lay.fpx(90)), _noise(rng, lay.shape, lay.fpx(250))
    reach = v * _smoothstep(_noise(rng, lay.shape, lay.fpx(450)), -0.4, 1.2)  # belt widths vary along shores
    dep, dist, area, floor = lay.up(t.dep), lay.up(t.dist), lay.up(t.area), lay.up(t.floor)
    hand, slope = lay.up(t.hand), lay.up(t.slope)
    river = dist < 1.5 * np.sqrt(area / 1e6)
    water = (dep > 1.0 + 0.2 * nb) | (river & (area > 40e6))
    d_water = lay.up(ndi.distance_transform_edt(t.dep <= 1.0, sampling=lay.ds))
    marsh = ~water & ((dep > 0.25 + 0.1 * nb)  # shallow, seasonally flooded depressions
                      | ((d_water < 90.0 * reach + 8.0 * nb) & (hand < 2.0 * v) & (slope < 4.0 / v))  # shores
                      | ((area > 20e6 * k**2) & (dist < 0.5 * floor) & (hand < 0.5 * v)))  # floodplains
    del d_water
    free = ~water & ~marsh
    fen = free & (hand < (1.0 + 0.4 * nb2) * v) & (slope < 1.4 / v) & (dist < floor + 60.0 * k)
    free &= ~fen
    raised = (lay.up(t.plateau) > 0.5 + 0.15 * nb2) & (dist > 150.0 * k)
    basin = (lay.up(t.infilled) > 0.5) & (dist > 250.0 * k)
    bog = free & (slope < 1.1 / v) & (raised | basin)
    free &= ~bog
    wet = marsh | fen | bog | water
    near_wet = ndi.distance_transform_edt(~wet, sampling=lay.grid.resolution) < 80.0 * reach
    lower_side = (hand < 1.5 * v) & (slope < 2.0 / v) & (dist < floor + 120.0 * k)
    swamp = free & ((near_wet & (slope < 6.0 / v) & (hand < 6.0 * v)) | lower_side)
    codes = np.ones(lay.shape, np.uint8)
    for name, mask in (("open_water", water), ("marsh", marsh), ("fen", fen), ("bog", bog), ("swamp", swamp)):
        codes[mask] = CLASS_NAMES.index(name) + 1
    return codes, {"hand": hand, "slope": slope, "dist": dist, "area": area, "river": river}


def _fine_dem(lay: _Layout, seed: int, t: _Terrain, truth: np.ndarray, fine: dict) -> np.ndarray:
    """Elevation on the optical grid: design surface, micro-relief, channels, flat water surfaces."""
    rng = _rng(seed, _S_TERRAIN, 1)
    dem = lay.up(t.z)
    dem += 0.5 * _noise(rng, lay.shape, lay.fpx(220)) + 0.2 * _noise(rng, lay.shape, max(lay.fpx(50), 2.0))
    a_rel = np.maximum(fine["area"] / (0.3e6 * lay.k**2), 1.0)
    half = np.maximum(1.5 * np.sqrt(fine["area"] / 1e6), 0.6 * lay.grid.resolution)
    dem -= (0.8 + 0.6 * np.log10(a_rel)) * np.exp(-((fine["dist"] / half) ** 2))
    lake = (truth == CLASS_NAMES.index("open_water") + 1) & ~fine["river"]
    dem[lake] = lay.up(t.zfill)[lake]
    return dem.astype(np.float32)


# -- area of interest and plots ------------------------------------------------------------------------------


def _aoi_polygon(lay: _Layout, seed: int):
    """An irregular simple polygon covering most of the grid: jittered margins and one cut corner."""
    from shapely.geometry import Polygon

    rng = _rng(seed, _S_AOI)
    x0, y0, x1, y1 = lay.grid.bounds
    ext = min(x1 - x0, y1 - y0)
    ml, mb, mr, mt = rng.uniform(0.02, 0.05, 4) * ext
    corners = [(x0 + ml, y0 + mb), (x1 - mr, y0 + mb), (x1 - mr, y1 - mt), (x0 + ml, y1 - mt)]
    cut, legs = int(rng.integers(4)), rng.uniform(0.15, 0.28, 2) * ext
    cx, cy = corners[cut]
    sx, sy = (1 if cut in (0, 3) else -1), (1 if cut in (0, 1) else -1)
    near = [(cx, cy + sy * legs[1]), (cx + sx * legs[0], cy)] if cut in (0, 2) else \
        [(cx + sx * legs[0], cy), (cx, cy + sy * legs[1])]
    ring = corners[:cut] + near + corners[cut + 1:]
    pts = []
    for (ax, ay), (bx, by) in zip(ring, ring[1:] + ring[:1]):
        t = np.linspace(0.0, 1.0, 6)[:-1]
        nx, ny = by - ay, ax - bx
        norm = math.hypot(nx, ny)
        off = np.r_[0.0, rng.uniform(-0.006, 0.006, 4)] * ext / norm
        pts += list(zip(ax + t * (bx - ax) + off * nx, ay + t * (by - ay) + off * ny))
    poly = Polygon(pts)
    if not poly.is_valid:  # the jitter is far smaller than the vertex spacing, so this cannot happen
        raise AlignmentError(f"demo AOI polygon is not simple for seed {seed}; choose another seed")
    return poly


def _class_quota(truth: np.ndarray, n_total: int) -> dict[int, int]:
    """Plots per class: square-root allocation, at least 20 each (rare classes get more than their share)."""
    share = np.array([(truth == c + 1).mean() for c in range(len(CLASS_NAMES))])
    weight = np.sqrt(share) / np.sqrt(share).sum()
    return {c + 1: max(20, int(round(n_total * weight[c]))) for c in range(len(CLASS_NAMES))}


def _cluster_candidates(lay: _Layout, rng: np.random.Generator, n_clusters: int, centres=None) -> np.ndarray:
    """Candidate plot centres (x, y) in clusters: along access tracks, or around given centres."""
    x0, y0, x1, y1 = lay.grid.bounds
    ext = x1 - x0
    if centres is None:
        n_tracks = max(2, int(round(1.2 * ext / 2000.0)))
        start = rng.uniform((x0, y0), (x1, y1), (n_tracks, 2))
        head = rng.uniform(0, math.pi, n_tracks)
        pick = rng.integers(n_tracks, size=4 * n_clusters)
        along = rng.uniform(-ext, ext, 4 * n_clusters)
        side = rng.normal(0.0, 150.0, 4 * n_clusters)
        cx = start[pick, 0] + along * np.cos(head[pick]) - side * np.sin(head[pick])
        cy = start[pick, 1] + along * np.sin(head[pick]) + side * np.cos(head[pick])
        inside = (cx > x0) & (cx < x1) & (cy > y0) & (cy < y1)
        centres = np.c_[cx, cy][inside][:n_clusters]
    spread = 120.0  # m: a morning of photo-interpretation around one stop
    pts = centres[:, None, :] + rng.normal(0.0, spread, (len(centres), 40, 2))
    return pts.reshape(-1, 2)


def _site_plots(lay: _Layout, rng: np.random.Generator, truth: np.ndarray, room: np.ndarray, quota: dict):
    """Greedy siting: each plot a disc that fits inside one class patch and overlaps no other plot.

    Candidates come from clusters along access tracks; a class that the track
    clusters under-sample gets extra clusters of its own (interpreters visit
    rare types on purpose).  Rare classes are sited first.
    """
    occupied = np.zeros(truth.shape, bool)
    pool = _cluster_candidates(lay, rng, max(6, sum(quota.values()) // 10))
    plots: list = []
    for code in sorted(quota, key=lambda c: int((truth == c).sum())):
        got = _take(lay, rng, pool, truth, room, occupied, code, quota[code], plots)
        for _ in range(3):
            if got == quota[code]:
                break
            extra = _targeted_candidates(lay, rng, truth, room, code, quota[code] - got)
            got += _take(lay, rng, extra, truth, room, occupied, code, quota[code] - got, plots)
    return plots


def _targeted_candidates(lay: _Layout, rng, truth, room, code: int, deficit: int) -> np.ndarray:
    """Candidate centres (x, y) on pixels of class ``code`` with room for a plot, near a few random ones."""
    from scipy.spatial import cKDTree

    rows, cols = np.nonzero((truth == code) & (room >= 20.0))
    if rows.size == 0:
        return np.empty((0, 2))
    x, y = lay.grid.transform @ (cols + rng.uniform(0.2, 0.8, cols.size),
                                 rows + rng.uniform(0.2, 0.8, rows.size))
    xy = np.c_[x, y]
    centres = xy[rng.choice(rows.size, size=min(rows.size, 2 + deficit // 4), replace=False)]
    near = cKDTree(centres).query(xy, distance_upper_bound=200.0)[0] < np.inf
    xy = xy[near]
    return xy[rng.permutation(len(xy))[: 60 * deficit]]


def _take(lay, rng, pool, truth, room, occupied, code, want, plots) -> int:
    """Accept up to ``want`` candidates of class ``code`` from ``pool``; mark their discs occupied.

    A plot is centred on its pixel centre; its radius never exceeds ``room``,
    the distance to the nearest pixel on a class edge, so every pixel centre it
    covers has its class.  Radii lean towards the small end of 20-60 m.
    """
    rows, cols = lay.grid.rowcol(pool[:, 0], pool[:, 1])
    h, w = truth.shape
    idx = np.flatnonzero((rows >= 0) & (rows < h) & (cols >= 0) & (cols < w))
    idx = idx[truth[rows[idx], cols[idx]] == code]
    px, got = lay.grid.resolution, 0
    for i in rng.permutation(idx):
        r, c = int(rows[i]), int(cols[i])
        radius = min(20.0 + 40.0 * rng.uniform() ** 2, float(room[r, c]))
        if radius < 20.0:
            continue
        reach = (radius + 5.0) / px  # half of a 10 m gap between neighbouring plots
        k = int(math.ceil(reach))
        yy, xx = np.ogrid[max(r - k, 0) - r:min(r + k + 1, h) - r, max(c - k, 0) - c:min(c + k + 1, w) - c]
        disc = yy * yy + xx * xx <= reach * reach
        win = (slice(max(r - k, 0), min(r + k + 1, h)), slice(max(c - k, 0), min(c + k + 1, w)))
        if occupied[win][disc].any():
            continue
        occupied[win] |= disc
        x, y = lay.grid.transform @ (c + 0.5, r + 0.5)
        plots.append((x, y, radius, code))
        got += 1
        if got == want:
            break
    return got


def _plot_shape(rng: np.random.Generator, x: float, y: float, radius: float):
    """A roughly round, irregular polygon that stays within ``radius`` of its centre."""
    from shapely.geometry import Polygon

    ang = (np.arange(18) + rng.uniform(-0.3, 0.3, 18)) * (2 * math.pi / 18)
    a, ph = rng.uniform(0.3, 1.0, 2), rng.uniform(0, 2 * math.pi, 2)
    wobble = (a[0] * np.cos(2 * ang + ph[0]) + a[1] * np.cos(3 * ang + ph[1])) / a.sum()
    r = radius * (0.91 - 0.09 * wobble)
    return Polygon(np.c_[x + r * np.cos(ang), y + r * np.sin(ang)])


def _plots(lay: _Layout, seed: int, truth_aoi: np.ndarray):
    """Clustered photo-interpreted plots with about 3 % plausible label confusion."""
    import geopandas as gpd

    rng = _rng(seed, _S_PLOTS)
    px = lay.grid.resolution
    edge = ndi.maximum_filter(truth_aoi, 3) != ndi.minimum_filter(truth_aoi, 3)
    room = ndi.distance_transform_edt(~edge, sampling=px).astype(np.float32)
    room[truth_aoi == 0] = 0.0
    area_km2 = truth_aoi.size * px * px / 1e6
    quota = _class_quota(truth_aoi[truth_aoi > 0], max(int(round(200 * area_km2 / 36.0)), 120))
    sited = _site_plots(lay, rng, truth_aoi, room, quota)
    labels = [CLASS_NAMES[code - 1] for *_, code in sited]
    n_flip = int(round(0.03 * len(sited)))
    for i in rng.choice(len(sited), size=n_flip, replace=False):
        labels[i] = _NEIGHBOUR_LABEL[labels[i]]
    order = rng.permutation(len(sited))
    geoms = [_plot_shape(rng, *sited[i][:3]) for i in order]
    ids = [f"{PLOT_PREFIX}-{n + 1:04d}" for n in range(len(order))]
    return gpd.GeoDataFrame({"plot_id": ids, "label": [labels[i] for i in order]}, geometry=geoms,
                            crs=GRID_CRS)


# -- writing -------------------------------------------------------------------------------------------------


def _write_vector(path: Path, gdf, layer: str) -> None:
    path.unlink(missing_ok=True)
    gdf.to_file(path, driver="GPKG", layer=layer)


def _write_area(out: Path, lay: _Layout, aoi, codes: np.ndarray) -> np.ndarray:
    """Write aoi.gpkg and truth.tif (codes inside the AOI, 0 outside); return the masked truth."""
    import geopandas as gpd
    from rasterio.features import geometry_mask

    _write_vector(out / "aoi.gpkg", gpd.GeoDataFrame({"name": [PLACE]}, geometry=[aoi], crs=GRID_CRS), "aoi")
    outside = geometry_mask([aoi], out_shape=lay.shape, transform=lay.grid.transform)
    truth = np.where(outside, np.uint8(0), codes)
    g = lay.grid
    meaning = " ".join(f"{i + 1}={n}" for i, n in enumerate(CLASS_NAMES))
    with sp.create_tif(out / "truth.tif", width=g.width, height=g.height, count=1, dtype="uint8", crs=g.crs,
                       transform=g.transform, nodata=0, descriptions=("truth",),
                       tags={"CLASSES": meaning}) as ds:
        ds.write(truth, 1)
    return truth


def _project_doc(seed: int, px: float, optical: list, sar: list) -> dict:
    """The project file as a dict, in the layout of docs/project-file.md (relative paths)."""
    return {
        "project": {"name": f"{PLACE} (synthetic demo)", "seed": int(seed), "output_dir": "runs/demo"},
        "area": {"aoi": "aoi.gpkg", "layer": "aoi"},
        "grid": {"crs": GRID_CRS, "pixel_size_m": int(px) if float(px).is_integer() else float(px)},
        "classes": {"names": list(CLASS_NAMES), "parents": {"wetland": list(WETLAND_CLASSES)}},
        "plots": {"path": "plots.gpkg", "class_field": "label", "id_field": "plot_id"},
        "optical": [{"date": d, "path": f"optical/scene_{d:%Y%m%d}.tif", "bands": list(sp.BAND_NAMES),
                     "scale": 0.0001, "offset_dn": -1000, "nodata": 0,
                     "mask": f"optical/scene_{d:%Y%m%d}_scl.tif", "mask_valid": [4, 5, 6, 7]}
                    for d in optical],
        "sar": [{"date": d, "path": f"sar/sar_{d:%Y%m%d}.tif", "bands": ["VV", "VH"], "units": "linear",
                 "orbit": o, "nodata": -9999} for d, o in sar],
        "dem": {"path": "dem.tif", "units": "m", "nodata": -9999},
        "seasons": {"spring": ["04-01", "06-10"], "summer": ["06-11", "08-20"], "autumn": ["08-21", "10-31"]},
        "features": {"select": ["optical", "sar", "terrain"]},
        "model": {"kind": "xgboost", "n_estimators": 200, "max_depth": 6, "learning_rate": 0.1},
        "validation": {"design": "blocks", "n_folds": 5, "block_size_m": 500},
        "output": {"chunk_size": 512},
    }


def _write_project(out: Path, seed: int, px: float, optical: list, sar: list,
                   monitor: dict | None = None) -> Path:
    """Write project.toml; ``monitor`` (the archive's ``[monitor]`` table) is appended when given."""
    import tomli_w

    doc = _project_doc(seed, px, optical, sar) | (monitor or {})
    head = (f"# {PLACE}: synthetic demo project (a fictional place; synthetic data).\n"
            "# Written by wetlandflow.demo.make_demo; paths are relative to this file.\n\n")
    path = out / "project.toml"
    path.write_text(head + tomli_w.dumps(doc), encoding="utf-8")
    return path


# -- public API ----------------------------------------------------------------------------------------------


def _check_args(size: int, pixel_size_m: float, n_optical: int, n_sar: int, dem_pixel_size_m: float,
                dem_crs: str | None) -> None:
    if not 64 <= int(size) <= 16384:
        raise AlignmentError(f"size must be between 64 and 16384 pixels, got {size}; "
                             "the demo grid is size x size pixels.")
    if not 1.0 <= pixel_size_m <= 60.0:
        raise AlignmentError(f"pixel_size_m must be between 1 and 60 m, got {pixel_size_m}; 10 m matches "
                             "Sentinel-2.")
    if dem_pixel_size_m <= pixel_size_m:
        raise AlignmentError(f"dem_pixel_size_m ({dem_pixel_size_m}) must be coarser than pixel_size_m "
                             f"({pixel_size_m}) so that the demo exercises resampling; try 30.")
    if dem_crs is not None:
        require_projected(dem_crs, what="DEM")
    if not 1 <= n_optical <= 32:
        raise ProjectFileError(f"n_optical must be 1..32 scenes between late April and late September, "
                               f"got {n_optical}", key="optical")
    if not 1 <= n_sar <= 35:
        raise ProjectFileError(f"n_sar must be 1..35 acquisitions from April to October, got {n_sar}",
                               key="sar")


def make_demo(out_dir, *, size: int = 600, pixel_size_m: float = 10.0, seed: int = 0, n_optical: int = 5,
              n_sar: int = 14, dem_pixel_size_m: float = 30.0, dem_crs: str | None = "EPSG:3035",
              progress: bool = False, archive: bool = False) -> Path:
    """Generate the synthetic Orlenmere Basin demo project into ``out_dir``.

    Parameters
    ----------
    out_dir : str or path-like
        Folder to write into; created if needed, existing demo files are replaced.
    size : int
        Pixels per side of the optical grid (UTM 33N, origin 512000 E, 6402000 N).
    pixel_size_m : float
        Optical pixel size in metres.
    seed : int
        Seed of every random step; the same seed gives byte-identical rasters.
    n_optical : int
        Optical scenes, late April to late September 2024 on a 5-day cycle.
    n_sar : int
        SAR acquisitions, every 12 days from 3 April 2024 (6 days beyond 18), orbits alternating.
    dem_pixel_size_m : float
        DEM pixel size; must be coarser than ``pixel_size_m``.
    dem_crs : str or None
        CRS of the DEM file (default ETRS89-LAEA, a different CRS from the
        optical grid); ``None`` writes it in the optical CRS.
    progress : bool
        Show a progress bar.
    archive : bool
        Also write the image archive for the monitoring stage (:func:`wetlandflow.demo.archive.make_archive`,
        30 m pixels over the same extent) into ``out_dir/archive/`` and its ``[monitor]`` table into the
        project file.

    Returns
    -------
    pathlib.Path
        The path of ``out_dir/project.toml``.

    Notes
    -----
    Depression filling and flow routing (Barnes, Lehman and Mulla 2014,
    Priority-Flood: an optimal depression-filling and watershed-labeling
    algorithm for digital elevation models, Computers & Geosciences 62,
    117-127) run in memory on a design grid of about 20 m pixels.  Peak memory
    grows with the area, not with the number of dates: about 0.8 GB at
    ``size=2048`` and 6 GB at ``size=8192`` (measured peak resident size).
    Around 200 plots are sited at ``size=600`` (proportionally more for larger
    areas, at least 120), with at least 20 per class where the class has room.

    Examples
    --------
    >>> path = make_demo("demo_data", size=256)  # doctest: +SKIP
    >>> truth = load_truth(path.parent)  # doctest: +SKIP
    """
    _check_args(size, pixel_size_m, n_optical, n_sar, dem_pixel_size_m, dem_crs)
    from tqdm.auto import tqdm

    from ..progress import done_text

    out = Path(out_dir)
    for sub in ("optical", "sar"):
        shutil.rmtree(out / sub, ignore_errors=True)
        (out / sub).mkdir(parents=True, exist_ok=True)
    lay = _Layout.of(demo_grid(int(size), float(pixel_size_m)))
    bar = tqdm(total=4 + n_optical + n_sar, desc="demo", disable=not progress)
    t0 = time.perf_counter()
    fields = _landscape(out, lay, seed, dem_crs, float(dem_pixel_size_m), bar)
    opt_dates, sar_dates = sp.optical_dates(n_optical), sp.sar_dates(n_sar)
    _render_dates(out, lay, seed, fields, opt_dates, sar_dates, bar)
    monitor = _archive(out, seed, int(size) * float(pixel_size_m), progress) if archive else None
    path = _write_project(out, seed, pixel_size_m, opt_dates, sar_dates, monitor)
    bar.set_postfix_str(done_text(time.perf_counter() - t0))  # the finished bar stays, with its time
    bar.close()
    return path


def _archive(out: Path, seed: int, extent_m: float, progress: bool) -> dict:
    """Write the 30 m image archive over the demo's extent; return its ``[monitor]`` table."""
    px = 30.0
    # the 30 m origin snaps up to 20 m west of the demo's: one more pixel keeps the east edge covered
    truth = make_archive(out, seed=seed, size=max(32, math.ceil(extent_m / px) + 1), pixel_size_m=px,
                         progress=progress)
    return monitor_table("archive", road_year=truth["road"]["year"])


def _landscape(out: Path, lay: _Layout, seed: int, dem_crs: str | None, dem_px: float, bar) -> sp.Fields:
    """Terrain, classes, AOI, truth, DEM and plots; returns the per-pixel fields for the sensors."""
    bar.set_postfix_str("terrain")
    terrain = _terrain(lay, seed)
    codes, fine = _classify(lay, seed, terrain)
    bar.update(1)
    bar.set_postfix_str("area and DEM")
    aoi = _aoi_polygon(lay, seed)
    truth = _write_area(out, lay, aoi, codes)
    dem = _fine_dem(lay, seed, terrain, codes, fine)
    del terrain
    sp.write_dem(out / "dem.tif", lay.grid, dem, aoi.bounds, dem_crs, dem_px)
    bar.update(1)
    bar.set_postfix_str("plots")
    _write_vector(out / "plots.gpkg", _plots(lay, seed, truth), "plots")
    del truth
    bar.update(1)
    bar.set_postfix_str("pixel fields")
    fields = sp.pixel_fields(_rng(seed, _S_COVER), codes, slope=fine["slope"], hand=fine["hand"], dem=dem,
                             pixel_size=lay.grid.resolution, nominal_px=lay.grid.resolution / lay.k)
    bar.update(1)
    return fields


def _render_dates(out: Path, lay: _Layout, seed: int, fields: sp.Fields, opt_dates, sar_dates, bar) -> None:
    """Write every optical scene and SAR acquisition, one date at a time."""
    g = lay.grid
    for i, date in enumerate(opt_dates):
        bar.set_postfix_str(f"optical {date}")
        scene = sp.Scene(out / "optical", g.crs, g.transform, g.shape, date, (seed, _S_OPTICAL, i))
        sp.write_optical(scene, fields, shadow_scale=lay.k, swath_edge=(i == 1 and len(opt_dates) >= 3))
        bar.update(1)
    n = len(sar_dates)
    windy = set(_rng(seed, _S_SAR).choice(n, size=min(2, n), replace=False).tolist())  # wind-roughened water
    for i, (date, orbit) in enumerate(sar_dates):
        bar.set_postfix_str(f"sar {date}")
        scene = sp.Scene(out / "sar", g.crs, g.transform, g.shape, date, (seed, _S_SAR, i + 1))
        sp.write_sar(scene, fields, orbit=orbit, windy=i in windy, nominal_px=g.resolution / lay.k)
        bar.update(1)


def load_truth(out_dir) -> xr.DataArray:
    """The hidden truth raster of a demo folder, on the optical grid.

    Parameters
    ----------
    out_dir : str or path-like
        A folder written by :func:`make_demo`.

    Returns
    -------
    xarray.DataArray
        uint8 codes with dims ``("y", "x")``: 1..6 in :data:`CLASS_NAMES`
        order, 0 outside the AOI; pixel-centre coordinates in metres, CRS and
        transform attached.
    """
    import rasterio

    path = Path(out_dir) / "truth.tif"
    if not path.exists():
        raise InputFileError("no truth.tif here; generate the demo first with "
                             "wetlandflow.demo.make_demo(out_dir)", path=str(path))
    with rasterio.open(path) as src:
        data, grid = src.read(1), Grid(src.crs.to_string(), src.transform, src.width, src.height)
    da = xr.DataArray(data, dims=("y", "x"), coords=grid.coords())
    da = with_attrs(da, "truth", long_name="demo truth class code", units="1", domain="user",
                    method="hydrological and topographic rules of the synthetic demo landscape",
                    parameters={"class_names": list(CLASS_NAMES), "nodata": 0})
    return attach(da, grid).rio.write_nodata(0)
