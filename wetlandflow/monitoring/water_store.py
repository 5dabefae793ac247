"""A dated water-map series on disk that grows by appending: only new or changed dates are computed.

Layout of a store folder::

    index.json                      the truth: date -> input key and folder, plus the grid
    dates/<date>_<key hash>.zarr    one Zarr store per date, (y, x) variable ``water``

A date exists only once ``index.json`` names it, and ``index.json`` names a folder only after the folder
was written completely (written under a temporary name, then renamed, see
:func:`wetlandflow.inputs.io.atomic_path`).  A changed date is written to a new folder (its key hash
differs) and the index is switched to it before the old folder is deleted.  So an update interrupted at
any point leaves the previous state or the new one for every date, never half a date; folders the index
does not name (an interrupted write) are deleted by the next update.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import shutil
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from ..errors import DataQualityError, GridMismatchError, ParameterError
from ..inputs.io import atomic_path, write_json

__all__ = ["DatedInput", "UpdateReport", "WaterSeriesStore"]

_FORMAT = 1


@dataclass(frozen=True)
class DatedInput:
    """One date of a series: its ``date``, the ``key`` that identifies its input and parameters (e.g. a
    :func:`wetlandflow.inputs.io.fingerprint` of the scene plus the threshold settings) and ``load``, which
    returns the date's ``(y, x)`` water map (1 / 0 / NaN) and is called only when the date must be computed.
    """

    date: dt.date
    key: str
    load: Callable[[], xr.DataArray]


@dataclass(frozen=True)
class UpdateReport:
    """What :meth:`WaterSeriesStore.update` did: dates ``computed``, ``kept``, ``removed``."""

    computed: tuple[dt.date, ...]
    kept: tuple[dt.date, ...]
    removed: tuple[dt.date, ...]

    def __str__(self) -> str:
        return f"{len(self.computed)} dates computed, {len(self.kept)} kept, {len(self.removed)} removed"


def _grid_record(da: xr.DataArray) -> dict[str, Any]:
    x, y = np.asarray(da["x"].values, float), np.asarray(da["y"].values, float)
    return {
        "nx": int(x.size),
        "ny": int(y.size),
        "x0": float(x[0]),
        "y0": float(y[0]),
        "dx": float(x[1] - x[0]) if x.size > 1 else 0.0,
        "dy": float(y[1] - y[0]) if y.size > 1 else 0.0,
    }


def _as_map(da: Any, date: dt.date) -> xr.DataArray:
    """The loaded water map as (y, x), with a time dimension of one dropped."""
    if not isinstance(da, xr.DataArray):
        raise DataQualityError(
            f"load() for {date} must return an xarray.DataArray; received {type(da).__name__}."
        )
    if "time" in da.dims and da.sizes["time"] == 1:
        da = da.isel(time=0)
    if set(da.dims) != {"y", "x"} or "x" not in da.coords or "y" not in da.coords:
        raise DataQualityError(
            f"load() for {date} must return a (y, x) water map with x and y coordinates; "
            f"received dims {da.dims}. Select the date: water.sel(time=...)."
        )
    return da.transpose("y", "x").drop_vars("time", errors="ignore")


class WaterSeriesStore:
    """Per-date water maps in a folder, updated by date: unchanged dates are neither loaded nor recomputed.

    Parameters
    ----------
    path : str or pathlib.Path
        The store folder (created on the first update).
    chunk : int
        Zarr chunk side in pixels.

    Examples
    --------
    >>> import tempfile, datetime
    >>> def load():
    ...     return xr.DataArray(np.zeros((4, 4), "float32"), dims=("y", "x"),
    ...                         coords={"y": [3.0, 2.0, 1.0, 0.0], "x": [0.0, 1.0, 2.0, 3.0]})
    >>> store = WaterSeriesStore(tempfile.mkdtemp())
    >>> str(store.update([DatedInput(datetime.date(2024, 5, 1), "scene-a", load)]))
    '1 dates computed, 0 kept, 0 removed'
    >>> str(store.update([DatedInput(datetime.date(2024, 5, 1), "scene-a", load)]))
    '0 dates computed, 1 kept, 0 removed'
    >>> store.open().sizes["time"]
    1
    """

    def __init__(self, path: str | Path, *, chunk: int = 1024):
        self.path = Path(path)
        self.chunk = chunk

    # -- the index ------------------------------------------------------------------------------------------
    @property
    def _index_path(self) -> Path:
        return self.path / "index.json"

    def index(self) -> dict[str, Any]:
        """The stored index: ``{"format", "grid", "dates": {iso date: {"key", "folder"}}}``."""
        if not self._index_path.exists():
            return {"format": _FORMAT, "grid": None, "dates": {}}
        return json.loads(self._index_path.read_text(encoding="utf-8"))

    def dates(self) -> list[dt.date]:
        """The stored dates, in order."""
        return sorted(dt.date.fromisoformat(d) for d in self.index()["dates"])

    def _save(self, index: dict[str, Any]) -> None:
        write_json(index, self._index_path)

    def _remove_unindexed(self, index: dict[str, Any]) -> None:
        """Delete date folders the index does not name (left by an interrupted update)."""
        named = {entry["folder"] for entry in index["dates"].values()}
        folder = self.path / "dates"
        for p in folder.iterdir() if folder.exists() else []:
            if f"dates/{p.name}" not in named:
                shutil.rmtree(p, ignore_errors=True) if p.is_dir() else p.unlink(missing_ok=True)

    # -- update ---------------------------------------------------------------------------------------------
    def update(self, items: Iterable[DatedInput]) -> UpdateReport:
        """Make the store hold exactly ``items``: compute new or changed dates, keep the others, drop others.

        Parameters
        ----------
        items : iterable of DatedInput
            The whole series as it should be; a date whose ``key`` equals the stored one is kept as it is
            (``load`` is not called).

        Returns
        -------
        UpdateReport
            The dates computed, kept and removed.
        """
        wanted = _by_date(items)
        index = self.index()
        self.path.mkdir(parents=True, exist_ok=True)
        self._remove_unindexed(index)
        stored = index["dates"]
        removed = sorted(d for d in stored if d not in wanted)
        for d in removed:  # the index forgets the date first: a crash then leaves an orphan, never a gap
            folder = stored.pop(d)["folder"]
            self._save(index)
            shutil.rmtree(self.path / folder, ignore_errors=True)
        if not stored:
            index["grid"] = None
        kept = sorted(d for d, it in wanted.items() if d in stored and stored[d]["key"] == it.key)
        computed = sorted(d for d in wanted if d not in kept)
        for d in computed:
            self._write_date(index, d, wanted[d])
        as_dates = lambda ds: tuple(dt.date.fromisoformat(d) for d in ds)  # noqa: E731
        return UpdateReport(as_dates(computed), as_dates(kept), as_dates(removed))

    def _write_date(self, index: dict[str, Any], date: str, item: DatedInput) -> None:
        da = _as_map(item.load(), item.date)
        self._check_grid(index, da, date)
        folder = f"dates/{date}_{hashlib.sha256(item.key.encode()).hexdigest()[:16]}.zarr"
        ds = da.astype(np.float32).chunk({"y": self.chunk, "x": self.chunk}).to_dataset(name="water")
        for v in ds.variables.values():
            v.encoding = {}
        with atomic_path(self.path / folder) as tmp:
            ds.to_zarr(tmp, mode="w", consolidated=True, zarr_format=2)
        old = index["dates"].get(date, {}).get("folder")
        index["dates"][date] = {"key": item.key, "folder": folder}
        self._save(index)
        if old and old != folder:
            shutil.rmtree(self.path / old, ignore_errors=True)

    @staticmethod
    def _check_grid(index: dict[str, Any], da: xr.DataArray, date: str) -> None:
        grid = _grid_record(da)
        if index["grid"] is None:
            index["grid"] = grid
            return
        same = all(np.isclose(grid[k], index["grid"][k]) for k in grid)
        if not same:
            raise GridMismatchError(
                f"the water map of {date} is on grid {grid}, but the store's are on grid {index['grid']}. "
                "Put every date on the same grid, or start a new store for the new grid."
            )

    # -- reading --------------------------------------------------------------------------------------------
    def open(self) -> xr.DataArray:
        """The stored series as a lazy ``(time, y, x)`` float32 ``water`` (coordinate ``input_key``).

        Raises ``DataQualityError`` when the store holds no date.
        """
        entries = self.index()["dates"]
        if not entries:
            raise DataQualityError(
                f"the water-series store {self.path} holds no date; call update(items) first."
            )
        layers = []
        for d in sorted(entries):
            water = xr.open_zarr(self.path / entries[d]["folder"], consolidated=True)["water"]
            layers.append(water.expand_dims(time=[np.datetime64(d, "ns")]))
        out = xr.concat(
            layers, dim="time", coords="different", compat="equals", join="override", combine_attrs="override"
        )
        return out.assign_coords(input_key=("time", [entries[d]["key"] for d in sorted(entries)]))


def _by_date(items: Iterable[DatedInput]) -> dict[str, DatedInput]:
    wanted: dict[str, DatedInput] = {}
    for it in items:
        if not isinstance(it, DatedInput) or not isinstance(it.date, dt.date):
            raise ParameterError(f"update() takes DatedInput(date, key, load) items; received {it!r}.")
        day = it.date.date() if isinstance(it.date, dt.datetime) else it.date
        if day.isoformat() in wanted:
            raise ParameterError(
                f"the date {day} is given twice; give one input per date (merge or pick one)."
            )
        wanted[day.isoformat()] = it
    return wanted
