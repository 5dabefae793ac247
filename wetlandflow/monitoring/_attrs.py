"""Provenance attrs for monitoring results (series statistics are not features, so no ``domain``)."""

from __future__ import annotations

import json
from typing import Any


def result_attrs(*, long_name: str, units: str, method: str, reference: str = "",
                 parameters: dict[str, Any] | None = None) -> dict[str, str]:
    """The attrs every monitoring layer or table column carries: what it is, its units, how and from whom.

    ``parameters`` is stored as a JSON string so the attrs survive Zarr, NetCDF and GeoTIFF tags alike.

    Examples
    --------
    >>> result_attrs(long_name="Sen slope", units="1/yr", method="median of pairwise slopes")["units"]
    '1/yr'
    """
    return {
        "long_name": long_name,
        "units": units,
        "method": method,
        "reference": reference,
        "parameters": json.dumps(parameters or {}, sort_keys=True, default=str),
    }
