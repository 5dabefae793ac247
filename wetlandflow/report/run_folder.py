"""Read access to a run folder: the manifest, each step's tables and figures, and the cube's attributes.

Everything the methods report says is read through :class:`RunFolder`; the inputs need not exist.
"""

from __future__ import annotations

import json
from functools import cached_property
from pathlib import Path
from typing import Any

import pandas as pd

from ..errors import InputFileError
from ..features.cube import season_variable
from .references import Citations


class RunFolder:
    """Read access to a finished (or partly finished) run folder; every artefact is optional but the manifest.

    Parameters
    ----------
    path : str or Path
        The run folder (holds ``manifest.json``).

    Raises
    ------
    InputFileError
        When ``manifest.json`` is missing or unreadable.
    """

    def __init__(self, path: str | Path):
        self.path = Path(path)
        manifest = self.path / "manifest.json"
        try:
            self.manifest: dict[str, Any] = json.loads(manifest.read_text())
        except (OSError, ValueError) as exc:
            raise InputFileError(f"cannot read the run's manifest ({exc}); expected the folder a run wrote "
                                 "(wetlandflow run PROJECT.toml), which holds manifest.json",
                                 path=str(manifest)) from None
        self.citations = Citations()

    # -- files ------------------------------------------------------------------------------------------------
    def exists(self, rel: str) -> bool:
        return (self.path / rel).exists()

    def json(self, rel: str) -> dict[str, Any] | None:
        p = self.path / rel
        return json.loads(p.read_text()) if p.exists() else None

    def csv(self, rel: str) -> pd.DataFrame | None:
        p = self.path / rel
        return pd.read_csv(p) if p.exists() else None

    def png(self, rel: str) -> bytes | None:
        p = self.path / rel
        return p.read_bytes() if p.exists() else None

    # -- manifest ---------------------------------------------------------------------------------------------
    @property
    def project(self) -> dict[str, Any]:
        return self.manifest.get("project", {})

    def step(self, name: str) -> dict[str, Any]:
        """The manifest record of a step ({} when the step did not run)."""
        return self.manifest.get("steps", {}).get(name, {})

    def step_done(self, name: str) -> bool:
        return self.step(name).get("status") == "done"

    @property
    def class_definitions(self) -> dict[str, Any]:
        """Label and definition of every mapped class: the project's ``[classes] definitions``, else the
        defaults (:mod:`wetlandflow.inputs.class_definitions`), else the class name."""
        from ..inputs.class_definitions import class_definition, project_definitions

        own = project_definitions(self.project.get("classes", {}).get("definitions"))
        return {n: class_definition(n, own) for n in self.class_names}

    @cached_property
    def class_names(self) -> list[str]:
        bundle = self.bundle or {}
        names = bundle.get("scheme", {}).get("names") or self.project.get("classes", {}).get("names", [])
        return [n for n in names if n not in self.dropped_classes]

    @property
    def dropped_classes(self) -> list[str]:
        """Classes without plots left out of the scheme (``[classes] drop_empty = true``)."""
        return list(self.manifest.get("dropped_classes") or [])

    @property
    def pixel_size_m(self) -> float:
        t = self.step("inputs").get("grid", {}).get("transform")
        return float(abs(t[0])) if t else float(self.project.get("grid", {}).get("pixel_size_m", 0.0))

    @property
    def pixel_area_ha(self) -> float:
        t = self.step("inputs").get("grid", {}).get("transform")
        return abs(t[0] * t[4]) / 1e4 if t else self.pixel_size_m ** 2 / 1e4

    # -- step outputs -----------------------------------------------------------------------------------------
    @cached_property
    def metrics(self) -> dict[str, Any] | None:
        return self.json("validation/metrics.json")

    @cached_property
    def bundle(self) -> dict[str, Any] | None:
        return self.json("model/bundle.json")

    @cached_property
    def areas(self) -> pd.DataFrame | None:
        return self.csv("areas.csv")

    @cached_property
    def accuracy_summary(self) -> dict[str, Any] | None:
        return self.json("accuracy/summary.json")

    @cached_property
    def sample_design(self) -> dict[str, Any] | None:
        return self.json("validation_sample/sample_design.json")

    @cached_property
    def drivers(self) -> dict[str, Any] | None:
        return self.json("explain/drivers.json")

    @cached_property
    def samples(self) -> pd.DataFrame | None:
        p = self.path / "samples.parquet"
        return pd.read_parquet(p, columns=["plot_id", "class", "x", "y"]) if p.exists() else None

    @cached_property
    def feature_attrs(self) -> dict[str, dict[str, Any]]:
        """Provenance attrs per cube variable: the features step record, else the Zarr store's metadata."""
        recorded = self.step("features").get("features")
        if recorded:
            return {k: dict(v) for k, v in recorded.items()}
        cube = self.cube
        return {} if cube is None else {k: dict(v.attrs) for k, v in cube.data_vars.items()}

    @cached_property
    def feature_parameters(self) -> dict[str, dict[str, Any]]:
        out = {}
        for name, attrs in self.feature_attrs.items():
            try:
                out[name] = json.loads(attrs.get("parameters", "{}") or "{}")
            except (TypeError, ValueError):
                out[name] = {}
        return out

    @cached_property
    def cube(self):
        """The feature cube, opened lazily (None when the folder has none)."""
        p = self.path / "features.zarr"
        if not p.exists():
            return None
        import xarray as xr

        return xr.open_zarr(p, consolidated=None)

    @cached_property
    def model_features(self) -> list[str]:
        return list((self.bundle or {}).get("features", []))

    @cached_property
    def aoi_pixels(self) -> int | None:
        """Pixels mapped inside the area of interest, from ``areas.csv``."""
        a = self.areas
        if a is None:
            return None
        if "pixels" in a:
            return int(a["pixels"].sum())
        return int(round(a["mapped_area_ha"].sum() / self.pixel_area_ha))

    def season_coverage(self) -> pd.DataFrame | None:
        """Per season: optical scenes, and the share of the area's pixels with a cloud-free composite value.

        Uses the features step's ``season_coverage`` record when the run wrote one; otherwise counts, in
        the cube, the pixels where the season's optical feature (NDVI when present) has a value (the cube
        is NaN outside the area of interest and where a season has no valid observation).
        """
        seasons = self.project.get("seasons", {})
        if not seasons:
            return None
        dates = sorted(str(s.get("date")) for s in self.project.get("optical", []))
        recorded = self.step("features").get("season_coverage") or {}
        rows = []
        for name, (start, end) in seasons.items():
            in_season = [d for d in dates if _in_window(d, start, end)]
            share = recorded.get(name, {}).get("share_valid") if recorded else self._cube_share(name)
            rows.append({"season": name, "window": f"{start} to {end}", "optical scenes": len(in_season),
                         "dates": ", ".join(in_season), "cloud-free coverage": share})
        return pd.DataFrame(rows)

    def _cube_share(self, season: str) -> float | None:
        var = season_variable(self.feature_attrs, season)
        if var is None or self.cube is None or not self.aoi_pixels:
            return None
        finite = int(self.cube[var].notnull().sum().compute())
        return finite / self.aoi_pixels

    def cite(self, method: str, used_for: str) -> str:
        """Record that ``method``'s sources were used and return their in-text form."""
        return "; ".join(c.reference.short(parenthetical=True) for c in self.citations.add_method(method, used_for)
                         if c.reference is not None)


def _in_window(date: str, start: str, end: str) -> bool:
    md = date[5:10]
    return start <= md <= end if start <= end else (md >= start or md <= end)
