"""Assembling named features into the feature cube.

The cube is an ``xarray.Dataset`` on the grid: one float32 variable per
feature, dims ``(y, x)``, NaN for no data and outside the AOI, each variable
with provenance attrs (long_name, units, domain, formula or method, reference,
parameters).  It is built lazily and saved to Zarr.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import ProjectFileError
from ..inputs.grid import attach, require_match
from ..inputs.layers import FeatureInputs
from .registry import Availability, FeatureDef, load_plugins, plan_selection

REQUIRED_ATTRS = ("long_name", "units", "domain", "reference", "parameters")


def _as_variables(out: xr.DataArray | xr.Dataset, fdef: FeatureDef) -> dict[str, xr.DataArray]:
    if isinstance(out, xr.Dataset):
        return {str(k): v for k, v in out.data_vars.items()}
    if "season" in out.dims:
        return {f"{fdef.name}_{s}": out.sel(season=s, drop=True).assign_attrs(out.attrs, season=str(s))
                for s in out["season"].values}
    return {fdef.name: out}


def _own_attrs(attrs: dict[str, Any], inputs: FeatureInputs) -> dict[str, Any]:
    """A user's output that is an input layer unchanged keeps none of that layer's attrs.

    (User functions run with ``keep_attrs=False``, so arithmetic drops the inputs' attrs; only what the
    function assigns itself survives, and an input layer returned as it is would still carry its own.)
    """
    layers = [getattr(inputs, n) for n in ("optical", "sar", "dem", "aoi")]
    if inputs.composite is not None:
        layers.append(inputs.composite["reflectance"])
    return {} if any(da is not None and attrs == dict(da.attrs) for da in layers) and attrs else attrs


def _finish(da: xr.DataArray, name: str, fdef: FeatureDef, inputs: FeatureInputs) -> xr.DataArray:
    extra = [d for d in da.dims if d not in ("y", "x")]
    if extra:
        raise ValueError(f"feature {fdef.name!r} returned {name!r} with extra dims {extra}; expected (y, x)")
    attrs = dict(da.attrs)
    if fdef.origin != "builtin":  # a user's function: fill what it did not say, never invent a unit
        attrs = _own_attrs(attrs, inputs)
        attrs = {"long_name": fdef.description, "units": "unspecified", "domain": fdef.domain,
                 "reference": "",
                 "parameters": "{}", **attrs}
        if "formula" not in attrs and "method" not in attrs:
            attrs["method"] = f"user feature {fdef.func.__module__}.{fdef.func.__qualname__}"
    missing = [a for a in REQUIRED_ATTRS if a not in attrs] + ([] if ("formula" in attrs or "method" in attrs)
                                                                else ["formula or method"])
    if missing:
        raise ValueError(f"feature {fdef.name!r} output {name!r} lacks provenance attrs {missing}; "
                         "build them with wetlandflow._provenance.with_attrs")
    attrs["domain"] = fdef.domain if fdef.domain == "user" else attrs["domain"]
    drop = [c for c in da.coords if c not in ("y", "x")]
    da = da.drop_vars(drop).astype(np.float32).transpose("y", "x")
    if inputs.aoi is not None:
        da = da.where(inputs.aoi)
    da = da.rename(name)
    da.attrs = attrs
    require_match(da, inputs.grid, name=name)
    return da


def plan_features(inputs: FeatureInputs | Availability, select: tuple[str, ...] | list[str],
                  params: dict[str, dict[str, Any]] | None = None,
                  plugins: tuple[str | Path, ...] | list[str | Path] = (),
                  ) -> tuple[list[FeatureDef], dict[str, str]]:
    """Load the plugin files, then resolve the selection against what the inputs offer.

    Returns the features to compute and ``{skipped feature: reason}``; see
    :func:`~wetlandflow.features.registry.plan_selection` for what is refused.
    """
    names = load_plugins(plugins) if plugins else []
    avail = inputs if isinstance(inputs, Availability) else Availability.from_inputs(inputs)
    return plan_selection(select, avail, params, plugin_names=names)


def build_cube(inputs: FeatureInputs, select: tuple[str, ...] | list[str],
               params: dict[str, dict[str, Any]] | None = None, *,
               plugins: tuple[str | Path, ...] | list[str | Path] = ()) -> xr.Dataset:
    """Compute the selected features (lazily where the feature allows) into one Dataset.

    Features the inputs cannot compute are left out when reached through a domain or the default selection;
    the cube's ``skipped`` attr (JSON) names them with the reason.
    """
    from .builtin import composite

    params = params or {}
    defs, skipped = plan_features(inputs, select, params, plugins)
    if not defs:
        raise ProjectFileError(
            "no feature can be computed from these inputs: "
            + ("; ".join(f"{k} {v}" for k, v in skipped.items()) or "the selection is empty")
            + ". Add the inputs the features need, or select features the inputs allow (docs/methods.md)",
            key="features.select")
    variables: dict[str, xr.DataArray] = {}
    for fdef in defs:
        if "composite" in fdef.needs:
            composite(inputs)
        kwargs = {**fdef.defaults, **params.get(fdef.name, {})}
        if fdef.origin == "builtin":
            out = fdef.func(inputs, **kwargs)
        else:  # a user's arithmetic must not pass the inputs' units and names off as its own
            with xr.set_options(keep_attrs=False):
                out = fdef.func(inputs, **kwargs)
        for name, da in _as_variables(out, fdef).items():
            if name in variables:
                raise ValueError(f"feature variable {name!r} produced twice (by {fdef.name!r})")
            variables[name] = _finish(da, name, fdef, inputs)
    cube = xr.Dataset(variables)
    cube.attrs = {"grid": str(inputs.grid.to_dict()), "features": ", ".join(d.name for d in defs),
                  "skipped": json.dumps(skipped)}
    return attach(cube, inputs.grid)


def save_cube(cube: xr.Dataset, path: str | Path, *, chunk: int = 512) -> xr.Dataset:
    """Write the cube to Zarr atomically and return it reopened lazily from disk."""
    from ..inputs.io import atomic_path

    cube = cube.chunk({"y": chunk, "x": chunk})
    for v in cube.data_vars.values():
        v.encoding = {}
    with atomic_path(path) as tmp:
        cube.to_zarr(tmp, mode="w", consolidated=True, zarr_format=2)
    return open_cube(path)


def open_cube(path: str | Path) -> xr.Dataset:
    import rioxarray  # noqa: F401

    ds = xr.open_zarr(path, consolidated=True)
    return ds


def cube_summary(cube: xr.Dataset) -> pd.DataFrame:
    """Per feature: domain, units, valid fraction, min, median, max."""
    rows = []
    for name, da in cube.data_vars.items():
        v = np.asarray(da.values, dtype=np.float64).ravel()
        ok = np.isfinite(v)
        vals = v[ok]
        rows.append({
            "feature": name, "domain": da.attrs.get("domain"), "units": da.attrs.get("units"),
            "valid_fraction": float(ok.mean()) if v.size else 0.0,
            "min": float(vals.min()) if vals.size else np.nan,
            "median": float(np.median(vals)) if vals.size else np.nan,
            "max": float(vals.max()) if vals.size else np.nan,
        })
    return pd.DataFrame(rows)


def season_variable(attrs: dict[str, dict], season: str) -> str | None:
    """The cube variable that stands for a season's optical coverage (its NDVI when present), or None."""
    names = [k for k, a in attrs.items() if a.get("season") == season and a.get("domain") == "optical"]
    preferred = [n for n in names if n.startswith("ndvi_")]
    return (preferred or sorted(names) or [None])[0]


def season_coverage(cube: xr.Dataset, aoi: xr.DataArray, seasons) -> dict[str, dict]:
    """Per season, the share of the area's pixels with a cloud-free composite value.

    The share counts pixels inside ``aoi`` (boolean, on the grid) where the
    season's optical variable (:func:`season_variable`) is finite; ``None``
    when the cube holds no optical variable of that season.
    """
    attrs = {k: dict(v.attrs) for k, v in cube.data_vars.items()}
    n_area = int(aoi.sum())
    out = {}
    for name in seasons:
        var = season_variable(attrs, name)
        share = None
        if var is not None and n_area:
            share = round(float((cube[var].notnull() & aoi).sum().compute()) / n_area, 4)
        out[name] = {"variable": var, "share_valid": share}
    return out
