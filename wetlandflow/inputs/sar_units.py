"""Backscatter units: do a SAR file's values look like the units the project file declares?

A cheap check on a subsample, run before any conversion: once dB values have been converted as if they
were linear (or the reverse), the result looks like yet another unit and the advice would be wrong.
"""

from __future__ import annotations

from collections.abc import Mapping
from types import MappingProxyType
from typing import Any

import numpy as np
import xarray as xr

from ..errors import DataQualityError

UNITS = ("linear", "amplitude", "db")


# Typical ranges (common practice, no source): linear power of land
# and water mostly in (0, 1.5] with a scene median of about 0.01-0.3
# (-20 to -5 dB); dB mostly negative within about [-35, 5]; amplitude is the
# square root of power, so its median sits at about 0.1-0.55.
SAR_UNIT_LIMITS: Mapping[str, float] = MappingProxyType(
    {
        "negative_share_db": 0.5,
        "positive_share_linear": 0.99,
        "linear_median_max": 0.5,
        "amplitude_median_min": 0.03,
        "db_median_min": -35.0,
        "db_median_max": 5.0,
        "power_max": 1.5,
        "large_share_max": 0.05,
        # the overlap of the two positive units: a linear-power median above this looks more like amplitude,
        # an amplitude median below "amplitude_typical_min" more like power (a warning, not a refusal)
        "linear_typical_max": 0.3,
        "amplitude_typical_min": 0.1,
    }
)


def _unit_stats(da: xr.DataArray, max_pixels: int, lim: Mapping[str, float]) -> dict[str, float]:
    """Summary of the finite values on a strided subsample (computes)."""
    step = 1
    if "y" in da.dims and "x" in da.dims:
        step = max(1, int(np.ceil(np.sqrt(da.size / max_pixels))))
        da = da.isel(y=slice(None, None, step), x=slice(None, None, step))
    v = np.asarray(da.values, dtype=np.float64).ravel()
    v = v[np.isfinite(v)]
    if v.size == 0:
        return {"n_valid": 0}
    return {
        "n_valid": int(v.size),
        "median": float(np.median(v)),
        "negative_share": float(np.mean(v < 0)),
        "positive_share": float(np.mean(v > 0)),
        "large_share": float(np.mean(v > lim["power_max"])),
    }


def _likely_units(s: Mapping[str, float], lim: Mapping[str, float]) -> str:
    if s["negative_share"] > lim["negative_share_db"]:
        return "db" if lim["db_median_min"] <= s["median"] <= lim["db_median_max"] else "unknown"
    if s["large_share"] > lim["large_share_max"]:
        return "unscaled"
    if s["median"] > lim["linear_median_max"]:
        return "amplitude"
    if s["median"] < lim["amplitude_median_min"]:
        return "linear"
    return "linear or amplitude"


def check_sar_units(
    da: xr.DataArray,
    declared: str,
    *,
    name: str | None = None,
    max_pixels: int = 1_000_000,
    limits: Mapping[str, float] | None = None,
) -> dict[str, Any]:
    """Check that backscatter values look like the units they are declared in.

    Computes on a strided subsample.  Linear power is mostly in (0, 1.5] with
    a median of about 0.01-0.3; dB values are mostly negative within about
    [-35, 5]; amplitude is ``sqrt(power)`` (ranges: common practice, no source; see
    :data:`SAR_UNIT_LIMITS`).

    Parameters
    ----------
    da : xarray.DataArray
        Backscatter (a stack or one image).
    declared : {"linear", "amplitude", "db"}
        The units the data claim to be in (the ``units`` key of ``[[sar]]``).
    name : str, optional
        Label of the data in messages (e.g. the file name).
    max_pixels : int
        Pixels per image sampled.
    limits : mapping, optional
        Overrides for :data:`SAR_UNIT_LIMITS`.

    Returns
    -------
    dict
        The summary statistics and ``likely_units``.

    Raises
    ------
    DataQualityError
        If the values contradict ``declared``; the message names the likely units and the fix.
    """
    if declared not in UNITS:
        raise ValueError(f"declared must be one of {UNITS}, received {declared!r}")
    lim = {**SAR_UNIT_LIMITS, **(limits or {})}
    stats = _unit_stats(da, max_pixels, lim)
    what = f"SAR data {name}" if name else "SAR data"
    if stats["n_valid"] == 0:
        raise DataQualityError(
            f"{what} (declared {declared!r}) hold no finite value; check nodata and the file."
        )
    stats["likely_units"] = likely = _likely_units(stats, lim)
    consistent = {
        "db": likely == "db",
        "linear": likely in ("linear", "linear or amplitude"),
        "amplitude": likely in ("amplitude", "linear or amplitude"),
    }[declared]
    if not consistent:
        raise DataQualityError(_units_message(what, declared, stats))
    _warn_ambiguous(what, declared, stats, lim)
    return stats


def _warn_ambiguous(what: str, declared: str, s: Mapping[str, Any], lim: Mapping[str, float]) -> None:
    """Power and amplitude overlap (0.03 to 0.5): warn when the median sits on the other unit's side."""
    import warnings

    from ..errors import PlausibilityWarning

    other = None
    if declared == "linear" and s["median"] > lim["linear_typical_max"]:
        other, typical = "amplitude", f"a linear-power median is usually below {lim['linear_typical_max']:g}"
    elif declared == "amplitude" and s["median"] < lim["amplitude_typical_min"]:
        other, typical = "linear", f"an amplitude median is usually above {lim['amplitude_typical_min']:g}"
    if other:
        s = {**s, "likely_units": other}
        warnings.warn(f"{what} declared units = {declared!r} has median {s['median']:.3g}; {typical}. If "
                      f"the file holds {other} values, set units = \"{other}\" in its [[sar]] table (a wrong "
                      "unit squares or roots every backscatter value)", PlausibilityWarning, stacklevel=3)


def _units_message(what: str, declared: str, s: Mapping[str, Any]) -> str:
    seen = (
        f"received values with median {s['median']:.4g}, {s['negative_share']:.0%} negative and "
        f"{s['large_share']:.0%} above 1.5"
    )
    expected = {
        "linear": "linear power is positive with a median of about 0.01-0.3",
        "amplitude": "amplitude is positive with a median of about 0.1-0.55",
        "db": "dB values are mostly negative, median within about -35 to 5",
    }[declared]
    likely = s["likely_units"]
    if likely == "unscaled":
        fix = "the values look like unscaled digital numbers: calibrate them to backscatter before use"
    elif likely == "unknown":
        fix = "the values fit none of the units: check the file, its scale and its nodata value"
    else:
        fix = (
            f"they look like {likely!r}: set units = \"{likely.split()[0]}\" in the [[sar]] tables of the "
            "project file"
        )
    return f"{what} declared units = {declared!r}, {seen}; {expected}. Likely mislabelled: {fix}."
