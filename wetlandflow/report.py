"""The methods report of a run folder: ``report/index.html``, ``report/methods.md``, ``report/figures/``.

The report is rebuilt from the run folder alone (``manifest.json`` and the
step outputs); the inputs need not exist.  Its text is generated from the
recorded numbers (:mod:`.report_text`), its map previews come from the COG
overviews (never the full-resolution rasters), and the HTML is self-contained:
style inline, figures embedded as base64 PNG, no link to any outside resource.

Examples
--------
>>> paths = write_report("demo/runs/demo")   # doctest: +SKIP
>>> paths["html"]                            # doctest: +SKIP
PosixPath('demo/runs/demo/report/index.html')
"""

from __future__ import annotations

import io
import json
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .errors import InputFileError
from .features.cube import season_variable
from .io import atomic_path
from .references import Citations

REPORT_DIR = "report"
PREVIEW_MAX_SIDE = 1024


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

    @cached_property
    def class_names(self) -> list[str]:
        bundle = self.bundle or {}
        return list(bundle.get("scheme", {}).get("names") or self.project.get("classes", {}).get("names", []))

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


# -- map previews from COG overviews ----------------------------------------------------------------------------
def read_preview(path: str | Path, band: int = 1, *, max_side: int = PREVIEW_MAX_SIDE
                 ) -> tuple[np.ndarray, tuple[float, float, float, float], float]:
    """Read one band of a COG from an overview level, never at full resolution.

    Picks the finest overview whose longer side is at most ``max_side`` pixels (the coarsest one when
    none is that small).  A raster without overviews is read only when it is itself no larger than
    ``max_side``; COGs of a run always carry overviews above 512 pixels.

    Returns
    -------
    values : numpy.ndarray
        The band at the overview's resolution, with the no-data value as NaN for float bands.
    extent : tuple of float
        ``(left, right, bottom, top)`` in the raster's CRS, for ``imshow``.
    factor : float
        Decimation of the preview relative to the full-resolution raster.

    Raises
    ------
    InputFileError
        When the raster has no overviews and is larger than ``max_side``.
    """
    import rasterio

    with rasterio.open(path) as src:
        factors, full = src.overviews(band), (src.height, src.width)
        b = src.bounds
        extent = (b.left, b.right, b.bottom, b.top)
    if not factors:
        if max(full) > max_side:
            raise InputFileError(f"the raster is {full[1]} x {full[0]} pixels and has no overviews; a preview "
                                 "would need the full resolution. Rebuild it as a COG with overviews "
                                 "(wetlandflow.mapping.build_cog)", path=str(path))
        level = None
    else:
        fitting = [i for i, f in enumerate(factors) if max(full) / f <= max_side]
        level = fitting[0] if fitting else len(factors) - 1
    kwargs = {} if level is None else {"overview_level": level}
    with rasterio.open(path, **kwargs) as src:
        values = src.read(band)
        nodata = src.nodata
        factor = full[1] / src.width
    if values.dtype.kind == "f" and nodata is not None and not np.isnan(nodata):
        values = np.where(values == nodata, np.nan, values)
    return values, extent, factor


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100)
    return buf.getvalue()


def _map_axes(title: str, size: tuple[float, float] = (6.4, 5.2)):
    from matplotlib.figure import Figure

    fig = Figure(figsize=size, layout="constrained")
    ax = fig.subplots()
    ax.set_title(title, fontsize=10)
    ax.set_xlabel("x (m)", fontsize=8)
    ax.set_ylabel("y (m)", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.ticklabel_format(useOffset=False, style="plain")  # map coordinates in full metres, no "1e6" offset
    return fig, ax


def class_map_png(run: RunFolder, rel: str = "maps/class_final.tif") -> bytes | None:
    """Preview of a class map with the scheme's colours and a legend."""
    from matplotlib.colors import ListedColormap
    from matplotlib.patches import Patch

    from .models import ClassScheme

    if not run.exists(rel) or not run.class_names:
        return None
    codes, extent, factor = read_preview(run.path / rel)
    scheme = ClassScheme(tuple(run.class_names), {})
    colours = ["#ffffff"] + [scheme.colours[n] for n in scheme.names]
    fig, ax = _map_axes(f"Final class map (preview, 1:{factor:g} of full resolution)")
    ax.imshow(np.ma.masked_equal(codes, 0), cmap=ListedColormap(colours), vmin=0, vmax=len(colours) - 1,
              extent=extent, interpolation="nearest")
    ax.legend(handles=[Patch(color=scheme.colours[n], label=n) for n in scheme.names], fontsize=7,
              loc="upper left", bbox_to_anchor=(1.01, 1.0))
    return _png(fig)


def confidence_png(run: RunFolder) -> bytes | None:
    """Preview of the maximum class probability (band 1 of ``maps/confidence.tif``)."""
    if not run.exists("maps/confidence.tif"):
        return None
    values, extent, factor = read_preview(run.path / "maps/confidence.tif", 1)
    fig, ax = _map_axes(f"Maximum class probability (preview, 1:{factor:g})")
    im = ax.imshow(values, cmap="viridis", vmin=0, vmax=1, extent=extent, interpolation="nearest")
    fig.colorbar(im, ax=ax, shrink=0.8, label="probability")
    return _png(fig)


def applicability_png(run: RunFolder) -> bytes | None:
    """Preview of the area-of-applicability flag (inside 1, outside 0, no data 255)."""
    from matplotlib.colors import ListedColormap
    from matplotlib.patches import Patch

    if not run.exists("maps/applicability.tif"):
        return None
    flag, extent, factor = read_preview(run.path / "maps/applicability.tif")
    fig, ax = _map_axes(f"Area of applicability (preview, 1:{factor:g})")
    ax.imshow(np.ma.masked_greater(flag, 1), cmap=ListedColormap(["#d7301f", "#c7e9c0"]), vmin=0, vmax=1,
              extent=extent, interpolation="nearest")
    ax.legend(handles=[Patch(color="#c7e9c0", label="inside"), Patch(color="#d7301f", label="outside")],
              fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    return _png(fig)


def plots_png(run: RunFolder) -> bytes | None:
    """Map of the training plots (centre of each plot's sampled pixels) by class, over the mapped area."""
    from .models import ClassScheme

    s = run.samples
    if s is None or s.empty:
        return None
    fig, ax = _map_axes("Training plots (centre of each plot's sampled pixels)")
    if run.exists("maps/class_final.tif"):
        codes, extent, _ = read_preview(run.path / "maps/class_final.tif")
        ax.imshow(np.ma.masked_equal((codes > 0).astype(np.uint8), 0), cmap="Greys", vmin=0, vmax=4,
                  extent=extent, interpolation="nearest")
    plots = s.groupby("plot_id").agg(x=("x", "mean"), y=("y", "mean"), cls=("class", "first"))
    scheme = ClassScheme(tuple(run.class_names or sorted(plots["cls"].unique())), {})
    for name in scheme.names:
        sel = plots[plots["cls"] == name]
        ax.scatter(sel["x"], sel["y"], s=14, color=scheme.colours[name], edgecolor="k", linewidth=0.3,
                   label=f"{name} ({len(sel)})")
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    ax.set_aspect("equal")
    return _png(fig)


# -- building and writing -----------------------------------------------------------------------------------------
def build_report(run_dir: str | Path) -> list:
    """The report's sections (:class:`wetlandflow.report_text.Section`), built from the run folder alone."""
    from .report_text import build_sections

    return build_sections(RunFolder(run_dir))


def write_report(run_dir: str | Path, *, out_dir: str | Path | None = None) -> dict[str, Path]:
    """Write ``index.html`` (self-contained), ``methods.md`` and ``figures/`` for a run folder.

    Parameters
    ----------
    run_dir : str or Path
        The run folder (``manifest.json`` and the step outputs; the inputs are not needed).
    out_dir : str or Path, optional
        Where to write; default ``RUN_DIR/report``.

    Returns
    -------
    dict of str to Path
        ``{"html": ..., "markdown": ..., "figures": ...}``.

    Raises
    ------
    InputFileError
        When the folder has no readable ``manifest.json``.

    Notes
    -----
    Every file is written to a temporary name and renamed (the figures folder as a whole), so an
    interrupted report never leaves a half-written file under a final name.
    """
    from .report_templates import render_html, render_markdown
    from .report_text import build_sections

    run = RunFolder(run_dir)
    sections = build_sections(run)
    title = f"Methods appendix: {run.project.get('project', {}).get('name', run.path.name)}"
    out = Path(out_dir) if out_dir is not None else Path(run_dir) / REPORT_DIR
    out.mkdir(parents=True, exist_ok=True)
    figures = out / "figures"
    with atomic_path(figures) as tmp:
        tmp.mkdir()
        for fig in _figures(sections):
            (tmp / fig.name).write_bytes(fig.png)
    paths = {"markdown": out / "methods.md", "html": out / "index.html", "figures": figures}
    for key, text in (("markdown", render_markdown(sections, figure_dir="figures", title=title)),
                      ("html", render_html(sections, title=title))):
        with atomic_path(paths[key]) as tmp:
            tmp.write_text(text, encoding="utf-8")
    return paths


def _figures(sections: list) -> list:
    from .report_text import Figure

    return [b for s in sections for b in s.blocks if isinstance(b, Figure)]
