"""Plausibility of a run's inputs before any feature is computed: reflectance per scene, SAR units.

The expected reflectance range comes from the scene's sensor description
(:mod:`wetlandflow.inputs.sensors`); scenes that name no sensor get the
Sentinel-2-style default (dark-object test on the blue band, values above 1.5
taken for unscaled digital numbers).  ``plausibility = "warn"`` in a scene's
table turns a refusal into a warning.  Normalised-difference indices of the
scene's bands are counted outside their mathematical range [-1, 1] (which
only happens when a reflectance is negative) and reported per scene.
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np
import xarray as xr

from ..errors import DataQualityError, PlausibilityWarning
from ..inputs.scenes import sensor_of
from .composite import check_reflectance

# the normalised differences whose band pairs a scene may hold (index -> (a, b))
_ND_PAIRS = {
    "ndvi": ("nir", "red"),
    "ndwi": ("green", "nir"),
    "ndmi": ("nir", "swir1"),
    "mndwi": ("green", "swir1"),
    "ndre1": ("nir", "re1"),
    "ndre2": ("nir", "re2"),
}


class ReflectanceWarning(UserWarning):
    """A scene's reflectance looks implausible and its table says ``plausibility = "warn"``."""


def index_range_counts(scene: xr.DataArray) -> dict[str, int]:
    """Pixels of each computable normalised difference outside [-1, 1] in one ``(band, y, x)`` scene."""
    present = {str(b) for b in scene["band"].values}
    out = {}
    for name, (a, b) in _ND_PAIRS.items():
        if a in present and b in present:
            va = np.asarray(scene.sel(band=a).values, dtype=np.float64)
            vb = np.asarray(scene.sel(band=b).values, dtype=np.float64)
            with np.errstate(divide="ignore", invalid="ignore"):
                nd = (va - vb) / (va + vb)
            out[name] = int(np.sum(np.isfinite(nd) & (np.abs(nd) > 1.0)))
    return out


def _sensor_limits(sensor) -> dict[str, float] | None:
    if sensor is None:
        return None
    lo, hi = sensor.valid_range
    return {"valid_low": lo, "valid_high": hi}


def _range_check(sub: xr.DataArray, scene, sensor, key: str) -> dict[str, Any]:
    """A sensor's own range: more than 1 % of values outside it is refused (common practice, no source)."""
    v = np.asarray(sub.values, dtype=np.float64)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return {"n_valid": 0, "diagnosis": "empty"}
    lo, hi = sensor.valid_range
    below, above = float(np.mean(v < lo)), float(np.mean(v > hi))
    rec = {
        "n_valid": int(v.size),
        "below_range": round(below, 4),
        "above_range": round(above, 4),
        "median": float(np.median(v)),
        "valid_range": [lo, hi],
        "sensor": sensor.name,
        "diagnosis": "ok",
    }
    if below + above > 0.01:
        rec["diagnosis"] = "out_of_range"
        raw_max = (float(v.max()) - scene.offset) / scene.scale - scene.offset_dn
        hint = ""
        if above > 0.5:
            guess = 255 if raw_max <= 255 else 65535 if raw_max > 10000 else 10000
            hint = (
                f" The largest value is {float(v.max()):.4g} (DN about {raw_max:.4g}): if these are "
                f"unscaled digital numbers, set scale = {1 / guess:.6g} (1/{guess}) in {key}."
            )
        raise DataQualityError(
            f"[{key}] scene {scene.label}: {below:.1%} of values fall below and {above:.1%} above the range "
            f"{lo:g} to {hi:g} expected of sensor {sensor.name!r} after scaling "
            f"((DN + {scene.offset_dn:g}) x "
            f"{scene.scale:g} + {scene.offset:g}).{hint} Check scale, offset_dn and offset in {key}, or the "
            f'sensor name; set plausibility = "warn" in {key} to go on anyway'
        )
    return rec


def optical_plausibility(project: Any, inputs: Any, *, max_side: int = 256) -> dict[str, Any]:
    """Check every optical scene's reflectance on a strided sample of the grid.

    Returns a record per scene (the plausibility metrics, and ``index_out_of_range``: pixels of each
    normalised difference outside [-1, 1]).  Raises :class:`DataQualityError` for a scene that fails
    unless its table says ``plausibility = "warn"``, which warns instead.
    """
    out: dict[str, Any] = {}
    if inputs.optical is None:
        return out
    step = max(1, max(inputs.grid.height, inputs.grid.width) // max_side)
    order = sorted(enumerate(project.optical), key=lambda t: t[1].date)
    for (i, scene), t in zip(order, inputs.optical["time"].values, strict=True):
        key = f"optical[{i}]"
        sub = inputs.optical.sel(time=t).isel(y=slice(None, None, step), x=slice(None, None, step)).compute()
        sensor = sensor_of(project, scene)
        try:
            if sensor is not None and not sensor.dark_object_check:
                rec = _range_check(sub, scene, sensor, key)
            else:
                rec = check_reflectance(sub, name=scene.label)
                rec = next(iter(rec.values()))
                if sensor is not None:
                    rec.update(_range_check(sub, scene, sensor, key))
        except DataQualityError as exc:
            if scene.plausibility != "warn":
                raise
            warnings.warn(f'{exc} (plausibility = "warn": the run goes on)', ReflectanceWarning, stacklevel=2)
            rec = {"diagnosis": "implausible (warned)", "message": str(exc)}
        counts = index_range_counts(sub)
        rec["index_out_of_range"] = counts
        if any(counts.values()):
            bad = {k: v for k, v in counts.items() if v}
            warnings.warn(
                f"{key} {scene.label}: normalised differences outside [-1, 1] on the checked sample "
                f"({bad} pixels): some reflectance is negative. Check scale, offset_dn and offset "
                f"in {key}",
                ReflectanceWarning,
                stacklevel=2,
            )
        out[f"optical {scene.date}"] = {scene.label: rec}
    return out


def sar_plausibility(project: Any, inputs: Any, *, max_side: int = 256) -> dict[str, Any]:
    """The SAR unit check on each date's converted linear power (a strided sample of the grid)."""
    from ..inputs.sar_units import check_sar_units

    out: dict[str, Any] = {}
    if inputs.sar is None:
        return out
    step = max(1, max(inputs.grid.height, inputs.grid.width) // max_side)
    for scene, t in zip(sorted(project.sar, key=lambda s: s.date), inputs.sar["time"].values, strict=True):
        sub = inputs.sar.sel(time=t).isel(y=slice(None, None, step), x=slice(None, None, step)).compute()
        with warnings.catch_warnings():  # converted values: the declared unit was judged on the raw file
            warnings.simplefilter("ignore", PlausibilityWarning)
            out[f"sar {scene.date}"] = check_sar_units(sub, "linear", name=scene.label)
    return out


def duplicate_inputs(project: Any) -> list[str]:
    """Warn about one file given for two acquisitions (same content, by hash): two dates that are one.

    Masks are left out (one mask for several scenes is unusual but not wrong in itself).
    """
    from ..inputs.io import fingerprint
    from ..inputs.project import scene_files

    seen: dict[str, str] = {}
    found = []
    for kind, scenes in (("optical", project.optical), ("sar", project.sar)):
        for i, scene in enumerate(scenes):
            for path, _ in scene_files(scene):
                label = f"{kind}[{i}] ({scene.date}, {path.name})"
                digest = fingerprint(path)
                if digest in seen:
                    found.append(f"{seen[digest]} and {label} are the same file content: one acquisition "
                                 "given for two dates counts twice in every seasonal composite. Give each "
                                 f"[[{kind}]] table its own file, or remove the copy")
                else:
                    seen[digest] = label
    for message in found:
        warnings.warn(message, PlausibilityWarning, stacklevel=2)
    return found


def plausibility_checks(project: Any, inputs: Any) -> dict[str, Any]:
    """Reflectance (per sensor) and SAR unit checks on a sample of each layer; raise on a likely mislabel.

    Also warns (:class:`~wetlandflow.errors.PlausibilityWarning`) about one file given for two dates."""
    out = {**optical_plausibility(project, inputs), **sar_plausibility(project, inputs)}
    out["duplicate_inputs"] = duplicate_inputs(project)
    return out
