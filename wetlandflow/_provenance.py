"""Provenance attrs for every computed layer.

A feature never inherits its inputs' attrs (a slope must not carry the DEM's
units); it gets fresh ones from :func:`feature_attrs`.
"""

from __future__ import annotations

import json
from typing import Any

import xarray as xr

DOMAINS = ("optical", "sar", "terrain", "user")


def feature_attrs(
    *,
    long_name: str,
    units: str,
    domain: str,
    formula: str | None = None,
    method: str | None = None,
    reference: str = "",
    parameters: dict[str, Any] | None = None,
) -> dict[str, str]:
    """Return the attrs dict the feature-cube contract asks for.

    ``parameters`` is stored as a JSON string so the attrs survive Zarr,
    NetCDF and GeoTIFF tags alike.
    """
    if domain not in DOMAINS:
        raise ValueError(f"domain must be one of {DOMAINS}, got {domain!r}")
    if formula is None and method is None:
        raise ValueError("give a formula or a method")
    attrs = {
        "long_name": long_name,
        "units": units,
        "domain": domain,
        "reference": reference,
        "parameters": json.dumps(parameters or {}, sort_keys=True, default=str),
    }
    if formula is not None:
        attrs["formula"] = formula
    if method is not None:
        attrs["method"] = method
    return attrs


def with_attrs(da: xr.DataArray, name: str, **kwargs: Any) -> xr.DataArray:
    """Rename ``da`` and replace (never merge) its attrs with fresh provenance."""
    out = da.rename(name)
    out.attrs = feature_attrs(**kwargs)
    return out


def parameters_of(da: xr.DataArray) -> dict[str, Any]:
    """Decode the ``parameters`` attr written by :func:`feature_attrs`."""
    return json.loads(da.attrs.get("parameters", "{}"))
