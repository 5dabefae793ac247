"""The built-in features, registered by name and domain.

Each entry is a thin adapter from the run's :class:`FeatureInputs` to a pure
function in :mod:`.optical`, :mod:`.sar` or :mod:`.terrain`, where the
formula, units and published source live.
"""

from __future__ import annotations

import json

import xarray as xr

from .._provenance import parameters_of
from ..errors import ProjectFileError
from ..inputs.layers import FeatureInputs
from . import mrvbf as mrvbf_module
from . import optical, sar, terrain, water
from .registry import feature


# -- shared intermediates -------------------------------------------------------------------
def composite(inputs: FeatureInputs) -> xr.Dataset:
    """Seasonal median composites of the optical stack, computed once per run."""
    if inputs.composite is None:
        inputs.composite = inputs.cached(
            "composite", lambda: optical.seasonal_composite(inputs.optical, inputs.seasons)
        )
    return inputs.composite


def dem_in_memory(inputs: FeatureInputs) -> xr.DataArray:
    """The aligned DEM as one in-memory array: flow routing is global (see docs/limits.md)."""
    return inputs.cached("dem", lambda: inputs.dem.compute())


def _reflectance(inputs: FeatureInputs) -> xr.DataArray:
    return composite(inputs)["reflectance"]


# -- optical ------------------------------------------------------------------------------
def _optical_index(name: str, func, bands: tuple[str, ...]) -> None:
    def _index(inputs: FeatureInputs) -> xr.DataArray:
        return func(_reflectance(inputs))

    _index.__doc__ = (func.__doc__ or name).strip().splitlines()[0]
    feature(name, domain="optical", needs=("optical",), bands=bands)(_index)


for _name, (_func, _bands) in {
    "ndvi": (optical.ndvi, ("nir", "red")),
    "ndwi": (optical.ndwi_mcfeeters, ("green", "nir")),
    "ndmi": (optical.ndmi, ("nir", "swir1")),
    "mndwi": (optical.mndwi, ("green", "swir1")),
    "ndre1": (optical.ndre1, ("nir", "re1")),
    "ndre2": (optical.ndre2, ("nir", "re2")),
    "reip": (optical.reip, ("red", "re1", "re2", "re3")),
}.items():
    _optical_index(_name, _func, _bands)


def _two_seasons(avail, params) -> str | None:
    lacking = [params[k] for k in ("a", "b") if params[k] not in avail.seasons]
    if lacking:
        return (f"compares seasons {params['a']!r} and {params['b']!r}, and the project has no season "
                f"{', '.join(map(repr, lacking))} (seasons: {', '.join(avail.seasons)}); set a and b in "
                "[features.params.ndvi_season_difference] to two of them")
    return None


@feature("ndvi_season_difference", domain="optical", needs=("optical",), bands=("nir", "red"), check=_two_seasons)
def ndvi_season_difference(inputs: FeatureInputs, *, a: str = "spring", b: str = "summer") -> xr.DataArray:
    """NDVI of season a minus season b (phenology contrast)."""
    return optical.season_difference(optical.ndvi(_reflectance(inputs)), a=a, b=b)


@feature("band_medians", domain="optical", needs=("optical",), default=False)
def band_medians(inputs: FeatureInputs) -> xr.Dataset:
    """Seasonal median reflectance of every band, one variable per band and season (``red_summer``)."""
    return optical.band_medians(composite(inputs))


# -- SAR -----------------------------------------------------------------------------------
SPECKLE_FILTERS = ("none", "lee", "multitemporal")


def sar_stack(inputs: FeatureInputs, speckle: str = "none", window: int = 7) -> xr.DataArray:
    """The SAR stack in linear power, speckle-filtered per date as asked, computed once per choice."""
    if speckle not in SPECKLE_FILTERS:
        raise ProjectFileError(f"speckle filter {speckle!r} is unknown; choose one of {list(SPECKLE_FILTERS)}",
                               key="features.params")
    if speckle == "none":
        return inputs.sar

    def make() -> xr.DataArray:
        if speckle == "lee":
            return sar.lee_filter(inputs.sar, window=window)
        return sar.temporal_ratio_filter(inputs.sar, window=window)

    return inputs.cached(f"sar_{speckle}_{window}", make)


def _note_speckle(out: xr.Dataset | xr.DataArray, speckle: str, window: int):
    """Record the speckle filter in every output's ``parameters`` attr."""
    for da in (out.data_vars.values() if isinstance(out, xr.Dataset) else [out]):
        params = parameters_of(da)
        params["speckle_filter"] = speckle if speckle == "none" else {"method": speckle, "window": int(window)}
        da.attrs["parameters"] = json.dumps(params, sort_keys=True, default=str)
    return out


def _vv_or_vh(avail, params) -> str | None:
    if not {"VV", "VH"} & set(avail.pols):
        return f"needs polarisation VV or VH; the SAR scenes have {', '.join(avail.pols)}"
    return None


@feature("sar_temporal", domain="sar", needs=("sar",), check=_vv_or_vh)
def sar_temporal(inputs: FeatureInputs, *, speckle: str = "none", window: int = 7,
                 orbit_policy: str = "per_orbit") -> xr.Dataset:
    """Temporal statistics of VV, VH and VH/VV (those present), in linear power, levels in dB.

    ``speckle`` filters each date first: ``"lee"`` (Lee 1980) or
    ``"multitemporal"`` (ratio-to-local-mean averaging over dates).  With a single date only the
    mean level is computed.
    """
    stack = sar_stack(inputs, speckle, window)
    # one date has a level but no spread: the spread statistics would be all NaN or all 0, so only the mean
    stats = sar.STATS if stack.sizes["time"] >= 2 else ("mean",)
    out = sar.temporal_stats(stack, stats, seasons=inputs.seasons, orbit_policy=orbit_policy)
    return _note_speckle(out, speckle, window)


def _water_frequency(inputs: FeatureInputs, speckle: str, window: int) -> xr.DataArray:
    def make() -> xr.DataArray:
        return sar.surface_water_frequency(sar_stack(inputs, speckle, window), aoi_mask=inputs.aoi)

    return inputs.cached(f"water_frequency_{speckle}_{window}", make)


@feature("water_frequency", domain="sar", needs=("sar",), pols=("VV",))
def water_frequency(inputs: FeatureInputs, *, speckle: str = "none", window: int = 7) -> xr.DataArray:
    """Fraction of valid SAR dates detected as open water (Otsu per date on VV dB)."""
    return _note_speckle(_water_frequency(inputs, speckle, window).copy(), speckle, window)


@feature("hydroperiod", domain="sar", needs=("sar",), pols=("VV",))
def hydroperiod(inputs: FeatureInputs, *, thresholds: tuple[float, float, float] = (0.1, 0.4, 0.8),
                speckle: str = "none", window: int = 7) -> xr.DataArray:
    """Hydroperiod class (0 not flooded .. 4 permanent) from surface-water frequency; no data as NaN."""
    code = water.hydroperiod_class(_water_frequency(inputs, speckle, window), thresholds=tuple(thresholds))
    out = code.where(code >= 0).astype("float32").assign_attrs(code.attrs)
    return _note_speckle(out.rename("hydroperiod"), speckle, window)


# -- terrain -------------------------------------------------------------------------------
@feature("elevation", domain="terrain", needs=("dem",))
def elevation(inputs: FeatureInputs) -> xr.DataArray:
    """Elevation of the aligned DEM (m)."""
    from .._provenance import with_attrs

    return with_attrs(inputs.dem, "elevation", long_name="elevation", units="m", domain="terrain",
                      method="DEM aligned onto the grid", reference="", parameters={})


@feature("slope", domain="terrain", needs=("dem",))
def slope_feature(inputs: FeatureInputs, *, units: str = "degrees") -> xr.DataArray:
    """Slope, Horn (1981) 3 x 3 stencil."""
    return terrain.slope(inputs.dem, units=units)


@feature("twi", domain="terrain", needs=("dem",))
def twi(inputs: FeatureInputs, *, method: str = "mfd", min_slope: float = 0.001) -> xr.DataArray:
    """Topographic wetness index ln(a / tan b), Beven & Kirkby (1979)."""
    return terrain.topographic_wetness_index(dem_in_memory(inputs), method=method, min_slope=min_slope)


@feature("tpi", domain="terrain", needs=("dem",))
def tpi(inputs: FeatureInputs, *, radii_m: tuple[float, ...] = (100.0, 300.0)) -> xr.Dataset:
    """Topographic position index at several radii."""
    out = {}
    for r in radii_m:
        da = terrain.topographic_position_index(inputs.dem, radius_m=r)
        out[f"tpi_{int(r)}m"] = da
    return xr.Dataset(out)


@feature("curvature", domain="terrain", needs=("dem",))
def curvature(inputs: FeatureInputs) -> xr.Dataset:
    """Plan and profile curvature, Zevenbergen & Thorne (1987)."""
    return xr.Dataset({f"curvature_{k}": terrain.curvature(inputs.dem, kind=k) for k in ("plan", "profile")})


@feature("depression_depth", domain="terrain", needs=("dem",))
def depression_depth(inputs: FeatureInputs) -> xr.DataArray:
    """Depth of closed depressions: filled minus original elevation (m)."""
    return terrain.depression_depth(dem_in_memory(inputs))


@feature("hand", domain="terrain", needs=("dem",))
def hand(inputs: FeatureInputs, *, channel_threshold_m2: float = 2e5) -> xr.DataArray:
    """Height above nearest drainage, Renno et al. (2008)."""
    return terrain.height_above_nearest_drainage(dem_in_memory(inputs), channel_threshold_m2=channel_threshold_m2)


@feature("mrvbf", domain="terrain", needs=("dem",))
def mrvbf(inputs: FeatureInputs) -> xr.DataArray:
    """Multi-resolution valley bottom flatness, Gallant & Dowling (2003)."""
    return mrvbf_module.mrvbf(dem_in_memory(inputs))


@feature("mrrtf", domain="terrain", needs=("dem",))
def mrrtf(inputs: FeatureInputs) -> xr.DataArray:
    """Multi-resolution ridge top flatness, Gallant & Dowling (2003)."""
    return mrvbf_module.mrrtf(dem_in_memory(inputs))
