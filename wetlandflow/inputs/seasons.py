"""Seasons as month-day windows: which dates fall in a season.

Shared by the inputs (scenes per season, clear-observation checks) and the features (seasonal composites,
SAR seasonal statistics).
"""

from __future__ import annotations

import numpy as np
import xarray as xr


def _month_day(text: str) -> int:
    """'MM-DD' -> MM * 100 + DD, validated."""
    try:
        month, day = (int(p) for p in text.split("-"))
    except (ValueError, AttributeError):
        month = day = -1
    if not (1 <= month <= 12 and 1 <= day <= 31):
        raise ValueError(f"season bounds must be 'MM-DD' strings such as '04-01', received {text!r}")
    return month * 100 + day


def season_mask(times: xr.DataArray | np.ndarray, start: str, end: str) -> np.ndarray:
    """Boolean mask of the dates whose month-day lies in ``[start, end]`` (inclusive).

    A window whose start is later than its end wraps over the new year
    (``("12-01", "02-28")`` is winter).
    """
    t = np.asarray(times, dtype="datetime64[D]")
    months = t.astype("datetime64[M]").astype(int) % 12 + 1
    days = (t - t.astype("datetime64[M]")).astype(int) + 1
    md = months * 100 + days
    lo, hi = _month_day(start), _month_day(end)
    return (md >= lo) & (md <= hi) if lo <= hi else (md >= lo) | (md <= hi)
