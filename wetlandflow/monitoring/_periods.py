"""Periods of a dated series (year, season, month, all): which dates fall in each, and the period's bounds."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ..inputs.seasons import _month_day

PERIODS = ("year", "season", "month", "all")


@dataclass(frozen=True)
class Period:
    """A labelled time span ``[start, end)`` (days) and the positions of the dates inside it."""

    label: str
    start: np.datetime64
    end: np.datetime64
    index: np.ndarray

    @property
    def days(self) -> float:
        return float((self.end - self.start) / np.timedelta64(1, "D"))


def _day(year: int, month_day: str) -> np.datetime64:
    _month_day(month_day)  # validates the 'MM-DD' text
    try:
        return np.datetime64(f"{year:04d}-{month_day}", "D")
    except ValueError:  # 02-29 in a year without it
        return np.datetime64(f"{year:04d}-{month_day[:3]}28", "D")


def _spans(
    days: np.ndarray, period: str, seasons: Mapping[str, tuple[str, str]] | None
) -> list[tuple[str, np.datetime64, np.datetime64]]:
    y0, y1 = int(str(days.min())[:4]), int(str(days.max())[:4])
    if period == "all":
        return [("all", days.min(), days.max() + np.timedelta64(1, "D"))]
    if period == "year":
        return [
            (str(y), np.datetime64(f"{y:04d}-01-01"), np.datetime64(f"{y + 1:04d}-01-01"))
            for y in range(y0, y1 + 1)
        ]
    if period == "month":
        months = np.arange(days.min().astype("datetime64[M]"), days.max().astype("datetime64[M]") + 1)
        return [(str(m), m.astype("datetime64[D]"), (m + 1).astype("datetime64[D]")) for m in months]
    if not seasons:
        raise ParameterError(
            "period='season' needs seasons, e.g. {'spring': ('04-01', '06-10')}; received none."
        )
    spans = []
    for y in range(y0 - 1, y1 + 1):  # a wrapping window of the year before can reach into the first year
        for name, (start, end) in seasons.items():
            wraps = _month_day(start) > _month_day(end)
            spans.append((f"{y} {name}", _day(y, start), _day(y + wraps, end) + np.timedelta64(1, "D")))
    return spans


def periods(
    times: np.ndarray, period: str, seasons: Mapping[str, tuple[str, str]] | None = None
) -> list[Period]:
    """The periods of ``period`` kind that hold at least one of ``times``, in time order.

    Examples
    --------
    >>> t = np.array(["2023-05-01", "2024-02-01"], dtype="datetime64[ns]")
    >>> [p.label for p in periods(t, "year")]
    ['2023', '2024']
    """
    if period not in PERIODS:
        raise ParameterError(f"period must be one of {PERIODS}; received {period!r}.")
    t = np.asarray(times, dtype="datetime64[ns]")
    if t.size == 0:
        raise ParameterError("the series has no dates; at least one is needed to form periods.")
    days = t.astype("datetime64[D]")
    found = []
    for label, start, end in _spans(days, period, seasons):
        inside = np.flatnonzero((t >= start) & (t < end))
        if inside.size:
            found.append(Period(label, start, end, inside))
    return sorted(found, key=lambda p: (p.start, p.label))
