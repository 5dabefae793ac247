"""Signal models of the synthetic demo: smooth fields, optical reflectance, scene masks, SAR backscatter.

:mod:`wetlandflow.demo.landscape` builds the landscape (terrain, classes); this module
turns the per-pixel fields of that landscape into what a sensor would record on
one date and writes it as tiled GeoTIFF.  Scenes are rendered by blocks of rows,
so no scene is ever held whole in memory.

The spectra, phenology and backscatter levels are illustrative values chosen
(common practice, no source) to be physically plausible (green vegetation bright in the NIR and
dark in the red, water dark in the NIR and SWIR, peat and moss brighter in the
SWIR than green canopies, calm water near -20 dB VV, double bounce brightening
flooded trees); they are not measurements and must not be used as check values.
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from affine import Affine
from scipy import ndimage as ndi

BLOCK = 256  # GeoTIFF tile size and rows per rendered block
BAND_NAMES = ("blue", "green", "red", "re1", "re2", "re3", "nir", "nir_narrow", "swir1", "swir2")
SWIR = (8, 9)
BANDS_20M = (3, 4, 5, 7, 8, 9)  # red edge, narrow NIR and SWIR are 20 m bands resampled to the 10 m grid
YEAR = 2024

# Endmember reflectance, one row per material, one column per band in BAND_NAMES order.
_EM = {
    "herb": (0.035, 0.080, 0.040, 0.130, 0.320, 0.420, 0.460, 0.470, 0.240, 0.120),
    "broadleaf": (0.030, 0.065, 0.030, 0.110, 0.300, 0.400, 0.440, 0.450, 0.200, 0.090),
    "conifer": (0.020, 0.040, 0.022, 0.070, 0.170, 0.220, 0.240, 0.250, 0.110, 0.050),
    "shrub": (0.030, 0.060, 0.050, 0.100, 0.200, 0.250, 0.270, 0.280, 0.190, 0.100),
    "litter": (0.060, 0.090, 0.120, 0.150, 0.200, 0.230, 0.250, 0.260, 0.320, 0.230),
    "understory": (0.035, 0.050, 0.060, 0.080, 0.110, 0.130, 0.140, 0.150, 0.170, 0.120),
    "soil": (0.070, 0.100, 0.130, 0.160, 0.190, 0.210, 0.230, 0.240, 0.310, 0.260),
    "peat": (0.030, 0.045, 0.055, 0.070, 0.090, 0.100, 0.110, 0.115, 0.140, 0.090),
    "moss": (0.035, 0.065, 0.070, 0.120, 0.170, 0.200, 0.220, 0.230, 0.230, 0.140),
    "water": (0.040, 0.045, 0.025, 0.020, 0.012, 0.010, 0.008, 0.007, 0.004, 0.003),
    "turbid": (0.060, 0.085, 0.065, 0.055, 0.028, 0.020, 0.016, 0.014, 0.006, 0.004),
    "cloud": (0.48, 0.47, 0.47, 0.48, 0.49, 0.50, 0.50, 0.50, 0.38, 0.27),
}
_CIRRUS = np.array((0.060, 0.052, 0.046, 0.042, 0.040, 0.038, 0.036, 0.036, 0.022, 0.016), np.float32)
_SHADOW = np.array((0.55, 0.46, 0.42, 0.40, 0.38, 0.37, 0.36, 0.36, 0.34, 0.34), np.float32)


@dataclass(frozen=True)
class Cover:
    """One land-cover type inside a class: its spectra, phenology and backscatter."""

    name: str
    code: int  # truth class code (1-based index into demo.CLASS_NAMES)
    veg: str  # green endmember
    back: str  # non-green background (litter, soil, moss ...)
    g: tuple[float, float, float, float]  # green fraction: min, max, start and end of season (day of year)
    g_sd: float  # within-class variability of the green fraction
    wet: float  # baseline wetness 0..1
    flood_wf: float  # share of the background that is open water when flooded (0: never floods)
    vv: tuple[float, float, float]  # dry VV dB: base, per unit green fraction, per unit moisture
    vh: tuple[float, float, float]
    vv_flood: tuple[float, float]  # flooded VV dB with sparse and with dense emergent canopy
    vh_flood: tuple[float, float]


COVERS = (
    Cover("upland_deciduous", 1, "broadleaf", "litter", (0.12, 0.92, 132, 282), 0.06, 0.20, 0.0,
          (-8.6, 1.0, 1.0), (-15.2, 2.0, 0.5), (0, 0), (0, 0)),
    Cover("upland_conifer", 1, "conifer", "understory", (0.78, 0.92, 128, 300), 0.05, 0.22, 0.0,
          (-7.6, 0.2, 0.5), (-13.0, 0.4, 0.3), (0, 0), (0, 0)),
    Cover("upland_grass", 1, "herb", "litter", (0.30, 0.85, 118, 285), 0.10, 0.25, 0.0,
          (-10.0, 0.8, 3.0), (-17.5, 2.5, 1.0), (0, 0), (0, 0)),
    Cover("upland_crop", 1, "herb", "soil", (0.02, 0.90, 152, 218), 0.08, 0.22, 0.0,
          (-11.5, 3.0, 3.5), (-20.0, 6.5, 1.5), (0, 0), (0, 0)),
    Cover("open_water", 2, "herb", "water", (0.0, 0.05, 150, 250), 0.02, 1.0, 1.0,
          (-20.0, 0.0, 0.0), (-27.0, 0.0, 0.0), (-20.0, -20.0), (-27.0, -27.0)),
    Cover("marsh", 3, "herb", "litter", (0.04, 0.86, 155, 255), 0.09, 0.82, 0.9,
          (-11.0, 2.0, 2.0), (-19.5, 4.0, 1.0), (-18.0, -6.5), (-25.0, -15.5)),
    Cover("swamp_conifer", 4, "conifer", "peat", (0.62, 0.86, 132, 292), 0.07, 0.58, 0.35,
          (-8.4, 0.4, 1.0), (-13.6, 0.6, 0.5), (-4.6, -4.6), (-13.2, -13.2)),
    Cover("swamp_deciduous", 4, "broadleaf", "peat", (0.18, 0.88, 136, 272), 0.07, 0.60, 0.35,
          (-8.8, 1.0, 1.0), (-14.6, 1.6, 0.5), (-5.2, -4.4), (-14.5, -13.6)),
    Cover("fen", 5, "herb", "peat", (0.14, 0.70, 146, 250), 0.08, 0.66, 0.6,
          (-12.0, 1.2, 3.0), (-20.0, 2.0, 1.0), (-16.0, -12.5), (-23.5, -19.5)),
    Cover("bog_open", 6, "shrub", "moss", (0.32, 0.58, 140, 268), 0.06, 0.50, 0.3,
          (-12.6, 0.5, 3.0), (-20.6, 1.0, 1.0), (-15.0, -13.5), (-22.5, -21.0)),
    Cover("bog_treed", 6, "conifer", "moss", (0.42, 0.62, 134, 290), 0.06, 0.48, 0.25,
          (-10.2, 0.4, 2.0), (-16.6, 0.6, 0.8), (-9.0, -8.0), (-17.0, -16.0)),
)
COVER_INDEX = {c.name: i for i, c in enumerate(COVERS)}
# Transitional neighbour of each cover (wet woodland, wet meadow, poor fen ...): pixels blend towards it,
# which is what makes neighbouring classes overlap in feature space.
_PARTNER = {"upland_deciduous": "swamp_deciduous", "upland_conifer": "swamp_conifer", "upland_grass": "fen",
            "upland_crop": "upland_grass", "open_water": "open_water", "marsh": "fen",
            "swamp_conifer": "bog_treed", "swamp_deciduous": "upland_deciduous", "fen": "bog_open",
            "bog_open": "fen", "bog_treed": "swamp_conifer"}
PARTNER = np.array([COVER_INDEX[_PARTNER[c.name]] for c in COVERS], np.uint8)


def _table(attr_of) -> np.ndarray:
    return np.array([attr_of(c) for c in COVERS], dtype=np.float32)


_VEG = _table(lambda c: _EM[c.veg])
_BACK = _table(lambda c: _EM[c.back])
_G_SD = _table(lambda c: c.g_sd)
_WF = _table(lambda c: c.flood_wf)
_VV = _table(lambda c: c.vv)
_VH = _table(lambda c: c.vh)
_VV_FL = _table(lambda c: c.vv_flood)
_VH_FL = _table(lambda c: c.vh_flood)
_IS_WATER = np.array([c.code == 2 for c in COVERS])
WET_BASE = _table(lambda c: c.wet)


# -- random fields ------------------------------------------------------------------------------------


def make_rng(seed: int, *keys: int) -> np.random.Generator:
    """An independent generator for one random step: ``default_rng(SeedSequence([seed, *keys]))``."""
    return np.random.default_rng(np.random.SeedSequence([int(seed), *keys]))


def upsample(a: np.ndarray, factor: float, shape: tuple[int, int]) -> np.ndarray:
    """Bilinear upsampling by ``factor`` with pixel-centre alignment, cropped to ``shape``."""
    if factor == 1:
        return a[: shape[0], : shape[1]]
    return ndi.zoom(a, factor, order=1, grid_mode=True, mode="nearest")[: shape[0], : shape[1]]


def smooth_noise(rng: np.random.Generator, shape: tuple[int, int], wavelength: float,
                 aspect: float = 1.0) -> np.ndarray:
    """Unit-variance smooth Gaussian field (float32) with features about ``wavelength`` pixels across.

    White noise is smoothed on a grid with one node per eighth of a wavelength
    and upsampled, which keeps large fields cheap.  ``aspect`` > 1 stretches
    the features along x (wind streaks, cirrus bands).
    """
    step = max(wavelength / 8.0, 1.0)
    ch, cw = int(math.ceil(shape[0] / step)) + 2, int(math.ceil(shape[1] / step)) + 2
    sigma = 2.0 if step > 1.0 else max(wavelength / 4.0, 0.5)
    coarse = ndi.gaussian_filter(rng.standard_normal((ch, cw), dtype=np.float32), (sigma, sigma * aspect))
    coarse = (coarse - coarse.mean()) / max(float(coarse.std()), 1e-6)
    return upsample(coarse.astype(np.float32), step, shape)


def smoothstep(x, lo: float, hi: float):
    """0 below ``lo``, 1 above ``hi``, a smooth cubic ramp between."""
    t = np.clip((x - lo) / (hi - lo), 0.0, 1.0)
    return t * t * (3.0 - 2.0 * t)

# -- dates and the hydrological year ----------------------------------------------------------------


def optical_dates(n: int) -> list[dt.date]:
    """``n`` dates from late April to late September, snapped to a 5-day revisit cycle."""
    first, last = dt.date(YEAR, 4, 22), dt.date(YEAR, 9, 25)
    span = (last - first).days
    days = np.round(np.linspace(0, span, n) / 5.0) * 5 if n > 1 else np.array([span / 2 // 5 * 5])
    return [first + dt.timedelta(days=int(d)) for d in days]


def sar_dates(n: int) -> list[tuple[dt.date, str]]:
    """``n`` acquisitions every 12 days (every 6 days beyond 18) from early April, orbits alternating."""
    step = 12 if n <= 18 else 6
    first = dt.date(YEAR, 4, 3)
    orbits = ("ascending", "descending")
    return [(first + dt.timedelta(days=step * i), orbits[i % 2]) for i in range(n)]


def day_of_year(date: dt.date) -> int:
    return date.timetuple().tm_yday


def water_level(doy: float) -> float:
    """Relative water table, 1 after snowmelt in April, lowest in late August, recovering in autumn."""
    return float(np.interp(doy, (90, 120, 160, 235, 305), (1.0, 1.0, 0.65, 0.0, 0.35)))


def flood_threshold(doy: float) -> float:
    """Wetness above which a floodable pixel carries standing water on ``doy``."""
    return 0.93 - 0.42 * water_level(doy)


def greenness(doy: float) -> np.ndarray:
    """Green fraction of every cover on ``doy`` (double logistic: green-up, senescence)."""
    out = np.empty(len(COVERS), np.float32)
    for i, c in enumerate(COVERS):
        gmin, gmax, sos, eos = c.g
        rise = 1.0 / (1.0 + np.exp(-(doy - sos) / 8.0))
        fall = 1.0 / (1.0 + np.exp(-(doy - eos) / 10.0))
        out[i] = gmin + (gmax - gmin) * rise * (1.0 - fall)
    return out


# -- per-pixel fields ---------------------------------------------------------------------------------


@dataclass(frozen=True)
class Fields:
    """Fine-grid fields shared by every date (full arrays or one block of rows of them)."""

    cover: np.ndarray  # uint8 index into COVERS
    mix: np.ndarray  # float32 0..0.5, share of the transitional partner cover (PARTNER[cover]) in the pixel
    vig: np.ndarray  # float32, unit-variance smooth field: canopy vigour
    brt: np.ndarray  # float32, unit-variance smooth field: background brightness, turbidity, roughness
    wet: np.ndarray  # float32 0..1 wetness
    illum_asc: np.ndarray  # float32 dB, terrain illumination for the ascending look
    illum_desc: np.ndarray

    def rows(self, r0: int, r1: int) -> Fields:
        return Fields(*(getattr(self, f)[r0:r1] for f in self.__dataclass_fields__))


def terrain_illumination_db(
    dzdx: np.ndarray, dzdy: np.ndarray, *, look_azimuth_deg: float, incidence_deg: float = 38.0
) -> np.ndarray:
    """Backscatter change in dB from local incidence on tilted ground, clipped to +-4 dB.

    ``dzdy`` is the gradient towards north.  The ratio cos(local incidence) /
    cos(nominal incidence) is a first-order radiometric slope effect.
    """
    az, th = np.deg2rad(look_azimuth_deg), np.deg2rad(incidence_deg)
    look = np.array([np.sin(th) * np.sin(az), np.sin(th) * np.cos(az), -np.cos(th)], np.float32)
    norm = np.sqrt(dzdx * dzdx + dzdy * dzdy + 1.0)
    cos_loc = (look[0] * dzdx + look[1] * dzdy - look[2]) / norm
    ratio = np.maximum(cos_loc, 0.05) / np.cos(th)
    return np.clip(10.0 * np.log10(ratio), -4.0, 4.0).astype(np.float32)


def _covers(rng: np.random.Generator, truth: np.ndarray, slope: np.ndarray, nominal_px: float) -> np.ndarray:
    """Cover types inside each class: upland forest, grass and crops by land use; treed and open wetland."""
    lu = smooth_noise(rng, truth.shape, 800.0 / nominal_px)
    ci = COVER_INDEX
    cover = np.full(truth.shape, ci["upland_deciduous"], np.uint8)
    upland = truth <= 1
    cover[upland & (lu < -0.45)] = ci["upland_conifer"]
    cover[upland & (lu > 0.5)] = ci["upland_grass"]
    cover[upland & (lu > 0.9) & (slope < 3.0)] = ci["upland_crop"]  # crops on gentle ground
    lu = smooth_noise(rng, truth.shape, 300.0 / nominal_px)
    for code, simple in ((2, "open_water"), (3, "marsh"), (5, "fen")):
        cover[truth == code] = ci[simple]
    cover[(truth == 4) & (lu < 0.25)] = ci["swamp_conifer"]
    cover[(truth == 4) & (lu >= 0.25)] = ci["swamp_deciduous"]
    cover[(truth == 6) & (lu > 0.7)] = ci["bog_treed"]
    cover[(truth == 6) & (lu <= 0.7)] = ci["bog_open"]
    return cover


def pixel_fields(rng: np.random.Generator, truth: np.ndarray, *, slope: np.ndarray, hand: np.ndarray,
                 dem: np.ndarray, pixel_size: float, nominal_px: float) -> Fields:
    """Cover types and the smooth per-pixel fields that drive the optical and SAR models.

    ``truth`` holds class codes 1..6; ``slope`` (degrees) and ``hand`` (height
    above the nearest stream, m) shape land use and wetness; ``nominal_px`` is
    the nominal length of one pixel in metres (landform scale).
    """
    cover = _covers(rng, truth, slope, nominal_px)
    mix = (0.5 * smoothstep(smooth_noise(rng, truth.shape, 250.0 / nominal_px), 0.0, 1.6)).astype(np.float32)
    vig = smooth_noise(rng, truth.shape, max(120.0 / nominal_px, 2.0))
    brt = smooth_noise(rng, truth.shape, 350.0 / nominal_px)
    wet = WET_BASE[cover] - 0.06 * np.minimum(hand, 8.0)
    wet += 0.12 * smooth_noise(rng, truth.shape, 150.0 / nominal_px)
    gy, gx = np.gradient(dem, pixel_size)
    asc = terrain_illumination_db(gx, -gy, look_azimuth_deg=78.0)  # right-looking: east on ascending passes
    desc = terrain_illumination_db(gx, -gy, look_azimuth_deg=282.0)
    return Fields(cover, mix, vig, brt, np.clip(wet, 0.0, 1.0).astype(np.float32), asc, desc)


def _green(f: Fields, cover: np.ndarray, doy: float) -> np.ndarray:
    g = greenness(doy)[cover] + 1.5 * _G_SD[cover] * f.vig
    return np.clip(g, 0.0, 0.97).astype(np.float32)


def _flood_share(f: Fields, cover: np.ndarray, doy: float, wet_anomaly: float = 0.0) -> np.ndarray:
    """Share of the ground that is open water: 1 on open water, ``flood_wf`` on flooded wetland."""
    flooded = (f.wet + wet_anomaly) > flood_threshold(doy)
    share = np.where(flooded, _WF[cover], np.float32(0.0))
    return np.where(_IS_WATER[cover], np.float32(1.0), share).astype(np.float32)


# -- optical -------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Sky:
    """Cloud, cirrus and shadow state of one optical scene (rows of full-scene fields)."""

    cloud: np.ndarray  # float32 smooth field; cloud where > cloud_thr
    cirrus: np.ndarray  # float32 smooth field; cirrus where > cirrus_thr
    shadow: np.ndarray  # bool, cloud mask displaced along the sun direction
    cloud_thr: float
    cirrus_thr: float

    def rows(self, r0: int, r1: int) -> Sky:
        return Sky(self.cloud[r0:r1], self.cirrus[r0:r1], self.shadow[r0:r1], self.cloud_thr, self.cirrus_thr)


def make_sky(rng: np.random.Generator, shape: tuple[int, int], pixel_size: float, shadow_scale: float) -> Sky:
    """Full-scene cloud, cirrus and shadow state of one date, cloud cover drawn in 0-35 %.

    Clouds are thresholded smooth noise; the shadow is the cloud mask moved
    north-north-west (sun in the south-south-east at a morning overpass).
    """
    lam = min(1200.0, shape[0] * pixel_size / 4.0) / pixel_size
    cloud = 0.8 * smooth_noise(rng, shape, lam) + 0.45 * smooth_noise(rng, shape, max(lam / 4.0, 2.0))
    cirrus = smooth_noise(rng, shape, 2.0 * lam, aspect=2.0)
    frac, frac_ci = 0.35 * rng.uniform() ** 1.5, 0.12 * rng.uniform()  # skewed towards clear scenes
    thr = float(np.quantile(cloud[::4, ::4], 1.0 - frac)) if frac > 0.01 else np.inf
    thr_ci = float(np.quantile(cirrus[::4, ::4], 1.0 - frac_ci)) if frac_ci > 0.01 else np.inf
    shift = rng.uniform(500.0, 1000.0) * shadow_scale / pixel_size
    sy, sx = int(round(shift * math.cos(math.radians(25)))), int(round(shift * math.sin(math.radians(25))))
    shadow = np.zeros(shape, bool)
    shadow[: shape[0] - sy, : shape[1] - sx] = cloud[sy:, sx:] > thr
    return Sky(cloud, cirrus, shadow, thr, thr_ci)


def _surface(f: Fields, cover: np.ndarray, doy: float) -> np.ndarray:
    """Noise-free reflectance (band, row, col) of ``cover``: green canopy over its background."""
    g = _green(f, cover, doy)
    fw = _flood_share(f, cover, doy)
    turb = np.clip(0.5 + 0.35 * f.brt, 0.0, 1.0)
    brightness = 1.0 + 0.2 * f.brt
    moisture = f.wet + 0.3 * (water_level(doy) - 0.5) - 0.5  # surfaces dry out towards late summer
    out = np.empty((len(BAND_NAMES),) + cover.shape, np.float32)
    for b in range(len(BAND_NAMES)):
        water = _EM["water"][b] + turb * (_EM["turbid"][b] - _EM["water"][b])
        back = _BACK[cover, b] * brightness * (1.0 - fw) + water * fw
        if b in SWIR:
            back = back * (1.0 - 0.45 * moisture)  # wet ground is dark in the SWIR
        out[b] = g * _VEG[cover, b] + (1.0 - g) * back
    return out


def clear_reflectance(f: Fields, doy: float, gains: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Surface reflectance (band, row, col) of a block under a clear sky, with sensor noise."""
    rho = _surface(f, f.cover, doy) * (1.0 - f.mix) + _surface(f, PARTNER[f.cover], doy) * f.mix
    for b in range(len(BAND_NAMES)):
        noise = rng.standard_normal((2,) + f.cover.shape, dtype=np.float32)
        rho[b] = rho[b] * gains[b] * (1.0 + 0.015 * noise[0]) + 0.002 * noise[1]
    return np.clip(rho, 0.0, 0.6)


def surface_codes(rho: np.ndarray) -> np.ndarray:
    """Scene-classification-like codes of a clear pixel: 4 vegetation, 5 not vegetated, 6 water."""
    red, nir = rho[2], rho[6]
    ndvi = (nir - red) / np.maximum(nir + red, 1e-4)
    codes = np.where(ndvi >= 0.35, 4, 5).astype(np.uint8)
    return np.where((nir < 0.05) & (ndvi < 0.1), np.uint8(6), codes)


def through_sky(rho: np.ndarray, sky: Sky) -> tuple[np.ndarray, np.ndarray]:
    """Apply cloud, haze, cirrus and shadow to clear reflectance; return it with the mask codes.

    Haze just outside the flagged cloud edge is left unflagged on purpose: real
    masks miss some of it, so masking helps without being perfect.
    """
    codes = surface_codes(rho)
    excess = sky.cloud - sky.cloud_thr
    cloudy = excess > 0
    alpha = np.where(cloudy, np.clip(0.6 + excess / 0.8, 0.0, 1.0), 0.2 * smoothstep(excess, -0.3, 0.0))
    cirrus = (sky.cirrus > sky.cirrus_thr) & ~cloudy
    thin = np.clip((sky.cirrus - sky.cirrus_thr) / 0.6, 0.0, 1.0) * cirrus
    shade = sky.shadow & ~cloudy
    cloud_em = np.array(_EM["cloud"], np.float32)
    out = rho.copy()
    for b in range(rho.shape[0]):
        band = out[b] * (1.0 - alpha) + cloud_em[b] * alpha + _CIRRUS[b] * (0.4 + thin)
        band = np.where(cirrus, band, out[b] * (1.0 - alpha) + cloud_em[b] * alpha)
        out[b] = np.where(shade, band * _SHADOW[b], band)
    codes = np.where(shade, np.uint8(3), codes)
    codes = np.where(cirrus, np.uint8(10), codes)
    codes = np.where(cloudy, np.where(excess > 0.5, np.uint8(9), np.uint8(8)), codes)
    return np.clip(out, 0.0, 0.6), codes


def as_20m(rho: np.ndarray) -> np.ndarray:
    """Replace the 20 m bands by 2 x 2 block means repeated onto the 10 m grid (blocks start at row 0)."""
    out = rho.copy()
    h, w = rho.shape[1:]
    for b in BANDS_20M:
        band = np.pad(rho[b], ((0, h % 2), (0, w % 2)), mode="edge")
        mean = band.reshape(band.shape[0] // 2, 2, band.shape[1] // 2, 2).mean(axis=(1, 3))
        out[b] = np.repeat(np.repeat(mean, 2, axis=0), 2, axis=1)[:h, :w]
    return out


def to_dn(rho: np.ndarray) -> np.ndarray:
    """Reflectance to uint16 DN with the +1000 additive offset (DN = reflectance * 10000 + 1000)."""
    return np.clip(np.round(rho * 10000.0 + 1000.0), 1, 65535).astype(np.uint16)


# -- SAR -------------------------------------------------------------------------------------------------


def backscatter_db(
    f: Fields, doy: float, *, orbit: str, wet_anomaly: float, wind: np.ndarray | None
) -> tuple[np.ndarray, np.ndarray]:
    """Mean VV and VH backscatter (dB) of a block on ``doy``, before speckle.

    The pixel's cover and its transitional partner are mixed in linear power.
    """
    own = _cover_db(f, f.cover, doy, wet_anomaly)
    other = _cover_db(f, PARTNER[f.cover], doy, wet_anomaly)
    vv, vh = (10.0 * np.log10((1.0 - f.mix) * 10.0 ** (a / 10.0) + f.mix * 10.0 ** (b / 10.0))
              for a, b in zip(own, other))
    water = _IS_WATER[f.cover]
    if wind is not None:
        vv = np.where(water, vv + 9.0 * wind, vv)
        vh = np.where(water, vh + 5.5 * wind, vh)
    illum = f.illum_asc if orbit == "ascending" else f.illum_desc
    illum = np.where(water, np.float32(0.0), illum)  # specular water shows no slope effect
    return (vv + illum).astype(np.float32), (vh + illum).astype(np.float32)


def _cover_db(f: Fields, c: np.ndarray, doy: float, wet_anomaly: float) -> tuple[np.ndarray, np.ndarray]:
    """VV and VH (dB) of cover ``c``: vegetation and moisture terms, or the flooded response."""
    g = _green(f, c, doy)
    moist = f.wet + wet_anomaly - 0.5
    # structure and roughness vary within a class by a dB or two
    vv = _VV[c, 0] + _VV[c, 1] * g + _VV[c, 2] * moist + 1.2 * f.brt
    vh = _VH[c, 0] + _VH[c, 1] * g + _VH[c, 2] * moist + 1.2 * f.vig
    canopy = smoothstep(g, 0.25, 0.6)
    vv_fl = _VV_FL[c, 0] + (_VV_FL[c, 1] - _VV_FL[c, 0]) * canopy + 0.8 * f.brt
    vh_fl = _VH_FL[c, 0] + (_VH_FL[c, 1] - _VH_FL[c, 0]) * canopy + 0.8 * f.vig
    flooded = _flood_share(f, c, doy, wet_anomaly) > 0
    return np.where(flooded, vv_fl, vv), np.where(flooded, vh_fl, vh)


def speckled_power(db: np.ndarray, rng: np.random.Generator, looks: float = 4.5) -> np.ndarray:
    """Linear power with multiplicative gamma speckle of mean 1 and ``looks`` equivalent looks."""
    speckle = rng.gamma(looks, 1.0 / looks, size=db.shape)
    return (np.power(10.0, db / 10.0) * speckle).astype(np.float32)


# -- GeoTIFF writing --------------------------------------------------------------------------------------


def create_tif(path: Path, *, width: int, height: int, count: int, dtype: str, crs: str, transform: Affine,
               nodata: float, descriptions=(), tags=None, zlevel: int = 6, tiled: bool = True):
    """Open a tiled (256 x 256), DEFLATE-compressed GeoTIFF for writing.

    ``tiled=False`` writes strips instead, for rasters smaller than one tile.
    GDAL writes no timestamp here, so the same data give the same bytes.
    """
    import rasterio

    layout = {"tiled": True, "blockxsize": BLOCK, "blockysize": BLOCK} if tiled else {}
    ds = rasterio.open(path, "w", driver="GTiff", width=width, height=height, count=count, dtype=dtype,
                       crs=crs, transform=transform, nodata=nodata, compress="deflate", zlevel=zlevel,
                       predictor=3 if dtype == "float32" else 2, **layout)
    for i, text in enumerate(descriptions, start=1):
        ds.set_band_description(i, text)
    if tags:
        ds.update_tags(**tags)
    return ds


def row_windows(height: int, width: int):
    """(first row, end row, window) of each block of ``BLOCK`` rows."""
    from rasterio.windows import Window

    for r0 in range(0, height, BLOCK):
        r1 = min(r0 + BLOCK, height)
        yield r0, r1, Window(0, r0, width, r1 - r0)


def write_dem(path: Path, grid, dem: np.ndarray, aoi_bounds, dem_crs: str | None, pixel: float) -> None:
    """Average the fine DEM onto a coarser grid in ``dem_crs`` covering the AOI plus three DEM pixels.

    Corners of that grid beyond the optical grid (the CRSs are rotated against
    each other) stay no data.
    """
    from rasterio.warp import Resampling, reproject, transform_bounds

    crs = dem_crs or grid.crs
    b = transform_bounds(grid.crs, crs, *aoi_bounds, densify_pts=21)
    x0, y1 = math.floor(b[0] / pixel - 3) * pixel, math.ceil(b[3] / pixel + 3) * pixel
    width = int(math.ceil(b[2] / pixel + 3 - x0 / pixel))
    height = int(math.ceil(y1 / pixel - b[1] / pixel + 3))
    transform = Affine(pixel, 0.0, x0, 0.0, -pixel, y1)
    out = np.full((height, width), -9999.0, np.float32)
    reproject(dem, out, src_transform=grid.transform, src_crs=grid.crs, src_nodata=-9999.0,
              dst_transform=transform, dst_crs=crs, dst_nodata=-9999.0, resampling=Resampling.average)
    with create_tif(path, width=width, height=height, count=1, dtype="float32", crs=crs, transform=transform,
                    nodata=-9999.0, descriptions=("elevation",), tags={"UNITS": "m"}) as ds:
        ds.write(out, 1)


@dataclass(frozen=True)
class Scene:
    """Where and how one date is written: grid, date, seed stream."""

    folder: Path
    crs: str
    transform: Affine
    shape: tuple[int, int]
    date: dt.date
    seed: tuple[int, ...]  # (seed, stream, index): block generators append the block number


def write_optical(scene: Scene, fields: Fields, *, shadow_scale: float, swath_edge: bool) -> None:
    """Write ``scene_YYYYMMDD.tif`` (10 bands, uint16 DN with the +1000 offset) and its ``_scl`` mask."""
    rng = make_rng(*scene.seed)
    h, w = scene.shape
    sky = make_sky(rng, scene.shape, scene.transform.a, shadow_scale)
    gains = (1.0 + 0.015 * rng.standard_normal(len(BAND_NAMES))).astype(np.float32)  # residual haze per band
    edge = w * rng.uniform(1.05, 1.15) if swath_edge else np.inf  # an orbit swath edge cutting ~10 % off
    stem, date = scene.folder / f"scene_{scene.date:%Y%m%d}", scene.date.isoformat()
    common = {"width": w, "height": h, "crs": scene.crs, "transform": scene.transform, "nodata": 0,
              "zlevel": 1}
    dn_tags = {"ACQUISITION_DATE": date, "SCALE": "0.0001", "OFFSET_DN": "-1000"}
    with create_tif(stem.with_suffix(".tif"), count=len(BAND_NAMES), dtype="uint16", descriptions=BAND_NAMES,
                    tags=dn_tags, **common) as dn_ds, \
            create_tif(stem.with_name(stem.name + "_scl.tif"), count=1, dtype="uint8",
                       descriptions=("scene_classification",), tags={"ACQUISITION_DATE": date},
                       **common) as scl_ds:
        doy = day_of_year(scene.date)
        for b, (r0, r1, win) in enumerate(row_windows(h, w)):
            rho = clear_reflectance(fields.rows(r0, r1), doy, gains, make_rng(*scene.seed, b))
            rho, codes = through_sky(rho, sky.rows(r0, r1))
            dn = to_dn(as_20m(rho) if math.isclose(scene.transform.a, 10.0) else rho)
            off = (np.arange(w)[None, :] + 0.35 * np.arange(r0, r1)[:, None]) > edge
            dn[:, off], codes[off] = 0, 0
            dn_ds.write(dn, window=win)
            scl_ds.write(codes, 1, window=win)


def write_sar(scene: Scene, fields: Fields, *, orbit: str, windy: bool, nominal_px: float) -> None:
    """Write ``sar_YYYYMMDD.tif``: VV and VH linear power with gamma speckle; ``windy`` roughens water."""
    rng = make_rng(*scene.seed)
    wet_anomaly = float(np.clip(rng.normal(0.0, 0.08), -0.15, 0.15))  # rain or drought before the pass
    wind = None
    if windy:
        wind = np.clip(0.55 + 0.3 * smooth_noise(rng, scene.shape, 500.0 / nominal_px, aspect=3.0), 0.0, 1.0)
        wind *= rng.uniform(0.7, 1.0)
    h, w = scene.shape
    tags = {"ACQUISITION_DATE": scene.date.isoformat(), "ORBIT": orbit, "UNITS": "linear power (sigma0)"}
    with create_tif(scene.folder / f"sar_{scene.date:%Y%m%d}.tif", width=w, height=h, count=2,
                    dtype="float32", crs=scene.crs, transform=scene.transform, nodata=-9999.0,
                    descriptions=("VV", "VH"), tags=tags, zlevel=1) as ds:
        for b, (r0, r1, win) in enumerate(row_windows(h, w)):
            vv, vh = backscatter_db(fields.rows(r0, r1), day_of_year(scene.date), orbit=orbit,
                                    wet_anomaly=wet_anomaly, wind=None if wind is None else wind[r0:r1])
            brng = make_rng(*scene.seed, b)
            ds.write(np.stack([speckled_power(vv, brng), speckled_power(vh, brng)]), window=win)
