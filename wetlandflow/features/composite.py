"""Seasonal median composites of a reflectance stack, and reflectance plausibility checks.

A reflectance stack is an ``xr.DataArray`` with dims ``("time", "band", "y", "x")``,
float32 surface reflectance (already scaled, NaN where masked) and a ``band``
coordinate of portable names (see :data:`wetlandflow.features.optical.BANDS`).
:func:`seasonal_composite` stays lazy on dask input; the plausibility checks
reduce each scene to a few numbers and so compute.  :func:`~wetlandflow.inputs.seasons.season_mask`
(dates inside a month-day window) lives with the inputs, which select scenes by season too.
"""

from __future__ import annotations

from collections.abc import Mapping
from types import MappingProxyType
from typing import Any

import numpy as np
import xarray as xr

from .._provenance import with_attrs
from ..errors import DataQualityError
from ..inputs.seasons import season_mask
from ._kernels import nanmedian_time

_OFFSET_HINT = (
    "reflectance = (DN + offset_dn) * scale + offset; Sentinel-2 L2A products from processing baseline 04.00 "
    "(2022) on carry offset_dn = -1000, earlier ones 0 (not verified in the product specification; check the "
    "product metadata's BOA_ADD_OFFSET). The advice "
    "above assumes Sentinel-2-like surface reflectance: for other data name the sensor in the scene's table "
    "(sensor = \"landsat89_oli_c2l2\", \"landsat47_tm_etm_c2l2\", \"rgbn\", \"rgb\", or your own "
    "[sensors.<name>]), which sets the convention and the range checked, or set plausibility = \"warn\""
)


# ---------------------------------------------------------------------------
# Seasonal composites
# ---------------------------------------------------------------------------


def _require_stack(stack: xr.DataArray) -> None:
    if tuple(stack.dims) != ("time", "band", "y", "x"):
        raise DataQualityError(
            f"expected a reflectance stack with dims ('time', 'band', 'y', 'x'), received {stack.dims}. "
            "Transpose with stack.transpose('time', 'band', 'y', 'x')."
        )


def seasonal_composite(stack: xr.DataArray, seasons: Mapping[str, tuple[str, str]]) -> xr.Dataset:
    """Per-pixel median of the valid observations in each season.

    Parameters
    ----------
    stack : xarray.DataArray
        Reflectance stack ``("time", "band", "y", "x")``, NaN where masked; lazy input stays lazy.
    seasons : mapping of str to (str, str)
        Season name to an inclusive ``("MM-DD", "MM-DD")`` window.

    Returns
    -------
    xarray.Dataset
        ``reflectance`` ``("season", "band", "y", "x")``: median of the non-NaN
        values per band (NaN where a pixel has none); ``valid_count``
        ``("season", "y", "x")`` int16: number of scenes in which the pixel is
        finite in every band.  Coordinates ``season_start``, ``season_end`` and
        ``n_scenes`` ride along the season dim.

    Raises
    ------
    DataQualityError
        If a season window holds no scene (the message lists the scene dates).
    """
    _require_stack(stack)
    if not seasons:
        raise ValueError("seasons is empty; give at least one, e.g. {'summer': ('06-11', '08-20')}")
    dates = [str(d)[:10] for d in np.asarray(stack["time"].values, dtype="datetime64[D]")]
    medians, counts, n_scenes = [], [], []
    for season, (start, end) in seasons.items():
        mask = season_mask(stack["time"].values, start, end)
        if not mask.any():
            raise DataQualityError(
                f"season {season!r} ({start} to {end}, inclusive) contains no scene; the scene dates are "
                f"{dates}. Widen the window in [seasons] of the project file or add scenes for it."
            )
        sub = stack.isel(time=np.flatnonzero(mask))
        medians.append(nanmedian_time(sub))
        counts.append(sub.notnull().all("band").sum("time").astype(np.int16))
        n_scenes.append(int(mask.sum()))
    season_coords = {
        "season": list(seasons),
        "season_start": ("season", [w[0] for w in seasons.values()]),
        "season_end": ("season", [w[1] for w in seasons.values()]),
        "n_scenes": ("season", n_scenes),
    }
    refl = xr.concat(medians, dim="season").assign_coords(season_coords)
    count = xr.concat(counts, dim="season").assign_coords(season_coords)
    params = {"seasons": {k: list(v) for k, v in seasons.items()}}
    return xr.Dataset(
        {
            "reflectance": with_attrs(
                refl.transpose("season", "band", "y", "x"),
                "reflectance",
                long_name="Seasonal median surface reflectance",
                units="1",
                domain="optical",
                method="per-pixel median of the non-NaN observations of the scenes dated inside each "
                "month-day window (inclusive)",
                parameters=params,
            ),
            "valid_count": with_attrs(
                count.transpose("season", "y", "x"),
                "valid_count",
                long_name="Number of valid observations in the seasonal composite",
                units="1",
                domain="optical",
                method="count of scenes in the window with finite reflectance in every band",
                parameters=params,
            ),
        }
    )


# ---------------------------------------------------------------------------
# Reflectance plausibility (missing or doubled offset, unscaled DN)
# ---------------------------------------------------------------------------

# Plausibility thresholds: common practice, no source.  Dark objects (clear
# water, shadow) put the low percentile of blue surface reflectance at about
# 0 to 0.05; a forgotten -1000 DN offset (x 1e-4 scale) lifts it by ~0.1, a
# doubled one pushes it to ~-0.1 with many negatives; DN left unscaled are
# hundreds to thousands.
PLAUSIBILITY_LIMITS: Mapping[str, float] = MappingProxyType(
    {
        "dark_percentile": 1.0,
        "dark_blue_max": 0.08,
        "dark_blue_min": -0.03,
        "negative_fraction_max": 0.05,
        "unscaled_value": 1.5,
        "unscaled_fraction_max": 0.01,
    }
)


def _scene_metrics(scene: xr.DataArray, max_pixels: int, limits: Mapping[str, float]) -> dict[str, Any]:
    """Metrics of one ``(band, y, x)`` scene on a strided subsample (computes)."""
    step = max(1, int(np.ceil(np.sqrt(scene.sizes["y"] * scene.sizes["x"] / max_pixels))))
    sample = scene.isel(y=slice(None, None, step), x=slice(None, None, step))
    values = np.asarray(sample.values, dtype=np.float64)
    valid = values[np.isfinite(values)]
    has_blue = "blue" in [str(b) for b in sample["band"].values]
    blue = np.asarray(sample.sel(band="blue").values, dtype=np.float64) if has_blue else np.empty(0)
    blue = blue[np.isfinite(blue)]  # no blue band: the dark-object test is skipped (NaN)
    if valid.size == 0:
        return {"n_valid": 0, "diagnosis": "empty"}
    metrics = {
        "n_valid": int(valid.size),
        "negative_fraction": float(np.mean(valid < 0)),
        "dark_blue": float(np.percentile(blue, limits["dark_percentile"])) if blue.size else float("nan"),
        "unscaled_fraction": float(np.mean(valid > limits["unscaled_value"])),
        "median": float(np.median(valid)),
    }
    metrics["diagnosis"] = _diagnose(metrics, limits)
    return metrics


def _diagnose(m: Mapping[str, float], limits: Mapping[str, float]) -> str:
    if m["unscaled_fraction"] > limits["unscaled_fraction_max"]:
        return "unscaled"
    if m["negative_fraction"] > limits["negative_fraction_max"] or m["dark_blue"] < limits["dark_blue_min"]:
        return "offset_doubled"
    if m["dark_blue"] > limits["dark_blue_max"]:
        return "offset_missing"
    return "ok"


def _scene_label(scene: xr.DataArray, name: str | None) -> str:
    """A label for messages: the given name, else the scalar time coordinate, else 'scene'."""
    if name:
        return name
    if "time" in scene.coords and scene["time"].ndim == 0:
        return str(np.datetime64(scene["time"].values, "D"))
    return "scene"


def reflectance_plausibility(
    stack_or_scene: xr.DataArray,
    *,
    name: str | None = None,
    max_pixels: int = 1_000_000,
    limits: Mapping[str, float] | None = None,
) -> dict[str, dict[str, Any]]:
    """Per-scene checks for a missing or doubled additive offset and for unscaled DN.

    Computes (each scene is reduced to a few numbers on a strided subsample of
    at most ``max_pixels`` pixels).

    Parameters
    ----------
    stack_or_scene : xarray.DataArray
        ``("time", "band", "y", "x")`` stack or one ``("band", "y", "x")`` scene.
    name : str, optional
        Label of a single scene in the report (e.g. its file name).
    max_pixels : int
        Pixels per scene sampled on a regular stride.
    limits : mapping, optional
        Overrides for :data:`PLAUSIBILITY_LIMITS` (thresholds are common practice, no source).

    Returns
    -------
    dict
        Scene label (ISO date for a stack; ``name``, the date or ``"scene"``
        for one scene) to a dict with ``n_valid``, ``negative_fraction``
        (share of valid values < 0), ``dark_blue`` (1st percentile of blue),
        ``unscaled_fraction`` (share > 1.5), ``median`` and ``diagnosis`` in
        {"ok", "offset_missing", "offset_doubled", "unscaled", "empty"}.
    """
    lim = {**PLAUSIBILITY_LIMITS, **(limits or {})}
    if "time" not in stack_or_scene.dims:
        return {_scene_label(stack_or_scene, name): _scene_metrics(stack_or_scene, max_pixels, lim)}
    labels = [str(t)[:10] for t in np.asarray(stack_or_scene["time"].values, dtype="datetime64[D]")]
    return {
        label: _scene_metrics(stack_or_scene.isel(time=i), max_pixels, lim) for i, label in enumerate(labels)
    }


def _explain(label: str, m: Mapping[str, Any]) -> str:
    where = f"scene {label}"
    if m["diagnosis"] == "unscaled":
        return (
            f"{where}: {m['unscaled_fraction']:.0%} of valid values exceed 1.5 (median {m['median']:.4g}); "
            "surface reflectance lies in about [0, 1], so these look like unscaled digital numbers. "
            "Set scale = 0.0001 (and offset_dn) in that scene's [[optical]] table of the project file."
        )
    if m["diagnosis"] == "offset_missing":
        return (
            f"{where}: the darkest 1% of blue pixels sit at {m['dark_blue']:.3f}; dark objects should be "
            "near 0 to 0.05, so the additive offset seems not applied. Set offset_dn = -1000 in that "
            "scene's [[optical]] table of the project file."
        )
    if m["diagnosis"] == "offset_doubled":
        return (
            f"{where}: {m['negative_fraction']:.1%} of valid values are negative (dark blue level "
            f"{m['dark_blue']:.3f}); this looks like the offset applied twice, or to data that already "
            "carried it. Set offset_dn = 0 in that scene's [[optical]] table of the project file."
        )
    return f"{where}: no valid pixel; check the mask codes (mask_valid) and nodata of that scene."


def check_reflectance(
    stack_or_scene: xr.DataArray,
    *,
    name: str | None = None,
    max_pixels: int = 1_000_000,
    limits: Mapping[str, float] | None = None,
    allow_empty: bool = True,
) -> dict[str, dict[str, Any]]:
    """Raise :class:`DataQualityError` if any scene fails :func:`reflectance_plausibility`.

    Parameters
    ----------
    stack_or_scene : xarray.DataArray
        Stack or scene, as for :func:`reflectance_plausibility`.
    name : str, optional
        Label of a single scene in messages (e.g. its file name).
    max_pixels, limits
        Passed to :func:`reflectance_plausibility`.
    allow_empty : bool
        Accept scenes with no valid pixel (fully clouded).

    Returns
    -------
    dict
        The plausibility report, when every scene passes.
    """
    report = reflectance_plausibility(stack_or_scene, name=name, max_pixels=max_pixels, limits=limits)
    bad = {
        k: m
        for k, m in report.items()
        if m["diagnosis"] != "ok" and not (allow_empty and m["diagnosis"] == "empty")
    }
    if bad:
        lines = [_explain(k, m) for k, m in bad.items()]
        message = "implausible surface reflectance:\n" + "\n".join(lines)
        raise DataQualityError(f"{message}\nNote: {_OFFSET_HINT}.")
    return report
