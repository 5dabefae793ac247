"""The report's map figures, drawn from the COG overviews of a run folder (never the full-resolution rasters).

Each ``*_png`` function takes a :class:`~wetlandflow.report.run_folder.RunFolder` and returns PNG bytes, or
``None`` when the run has no such output; the text builder places them, the appendix writer saves them.
Every map carries the elements of :mod:`.cartography` (scale bar, true-north arrow, outline of the mapped
area, CRS, full class labels, source line and caution); :func:`export_maps` writes the same maps as
standalone A4 pages (PNG and PDF) with a representative fraction that is true when printed at 100 %.
"""

from __future__ import annotations

import io
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .. import CAUTION
from ..errors import InputFileError
from ..inputs.io import atomic_path
from . import cartography
from .run_folder import RunFolder

PREVIEW_MAX_SIDE = 1024


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
                                 "(wetlandflow.mapping.predict.build_cog)", path=str(path))
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


def _pdf(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="pdf")
    return buf.getvalue()


@dataclass(frozen=True)
class _MapData:
    values: np.ndarray
    extent: tuple[float, float, float, float]
    factor: float
    crs: Any


def _read_map(run: RunFolder, rel: str, band: int = 1) -> _MapData | None:
    import rasterio

    if not run.exists(rel):
        return None
    values, extent, factor = read_preview(run.path / rel, band)
    with rasterio.open(run.path / rel) as src:
        crs = src.crs
    return _MapData(values, extent, factor, crs)


def source_line(run: RunFolder, factor: float = 1.0) -> str:
    """Where a map's data came from: the inputs and their dates, the run, the display resolution."""
    p = run.project
    parts = []
    optical = sorted(str(s.get("date")) for s in p.get("optical", []))
    sar = sorted(str(s.get("date")) for s in p.get("sar", []))
    if optical:
        parts.append(f"optical reflectance, {len(optical)} scene(s) {optical[0]} to {optical[-1]}")
    if sar:
        parts.append(f"SAR backscatter, {len(sar)} scene(s) {sar[0]} to {sar[-1]}")
    if (p.get("dem") or {}).get("path"):
        parts.append("DEM")
    if p.get("plots", {}).get("path"):
        parts.append("labelled plots")
    name = p.get("project", {}).get("name", run.path.name)
    when = str(run.manifest.get("finished") or run.manifest.get("started") or "")[:10]
    pixel = run.pixel_size_m
    shown = (f"; shown at 1/{factor:g} of full resolution ({pixel * factor:g} m display cells from the "
             f"{pixel:g} m map)" if factor > 1 and pixel else "")
    return (f"Sources: {'; '.join(parts) or 'see the methods appendix'}. Project \"{name}\", wetlandflow run "
            f"{when}{shown}.")


def _notes(run: RunFolder, title: str, data: _MapData) -> cartography.MapNotes:
    return cartography.MapNotes(title=title, crs_name=cartography.crs_name(data.crs) if data.crs else "",
                                source=source_line(run, data.factor), caution=CAUTION)


def _map_figure(size: tuple[float, float] = (7.5, 5.6)):
    from matplotlib.figure import Figure

    fig = Figure(figsize=size, layout="constrained")
    return fig, fig.subplots()


def _draw(ax, run: RunFolder, data: _MapData, title: str, mask: np.ndarray) -> None:
    e = data.extent
    angle = cartography.true_north_angle(data.crs, (e[0] + e[1]) / 2, (e[2] + e[3]) / 2) if data.crs else 0.0
    cartography.decorate(ax, _notes(run, title, data), extent=e, mask=mask, north_angle=angle)


def _labels(run: RunFolder) -> dict[str, str]:
    return {n: d.label for n, d in run.class_definitions.items()}


def _class_map(run: RunFolder, rel: str, size: tuple[float, float]):
    from matplotlib.colors import ListedColormap

    from ..models.classifier import ClassScheme

    data = _read_map(run, rel)
    if data is None or not run.class_names:
        return None
    scheme = ClassScheme(tuple(run.class_names), {})
    colours = ["#ffffff"] + [scheme.colours[n] for n in scheme.names]
    fig, ax = _map_figure(size)
    ax.imshow(np.ma.masked_equal(data.values, 0), cmap=ListedColormap(colours), vmin=0, vmax=len(colours) - 1,
              extent=data.extent, interpolation="nearest")
    labels = _labels(run)
    cartography.legend(ax, [(scheme.colours[n], labels[n]) for n in scheme.names], title="Class")
    _draw(ax, run, data, "Wetland classes (final map, after the minimum mapping unit)", data.values > 0)
    return fig


def class_map_png(run: RunFolder, rel: str = "maps/class_final.tif", *,
                  size: tuple[float, float] = (7.5, 5.6)) -> bytes | None:
    """The final class map with the scheme's colours, full class labels and the cartographic elements."""
    fig = _class_map(run, rel, size)
    return None if fig is None else _png(fig)


def confidence_png(run: RunFolder) -> bytes | None:
    """The maximum class probability (band 1 of ``maps/confidence.tif``)."""
    data = _read_map(run, "maps/confidence.tif", 1)
    if data is None:
        return None
    fig, ax = _map_figure()
    im = ax.imshow(data.values, cmap="viridis", vmin=0, vmax=1, extent=data.extent, interpolation="nearest")
    fig.colorbar(im, ax=ax, shrink=0.7, label="probability of the most likely class")
    _draw(ax, run, data, "Confidence: maximum class probability", np.isfinite(data.values))
    return _png(fig)


def applicability_png(run: RunFolder) -> bytes | None:
    """The area-of-applicability flag (inside 1, outside 0, no data 255)."""
    from matplotlib.colors import ListedColormap

    data = _read_map(run, "maps/applicability.tif")
    if data is None:
        return None
    fig, ax = _map_figure()
    ax.imshow(np.ma.masked_greater(data.values, 1), cmap=ListedColormap(["#d7301f", "#c7e9c0"]), vmin=0,
              vmax=1, extent=data.extent, interpolation="nearest")
    cartography.legend(ax, [("#c7e9c0", "inside: predictors like the training data"),
                            ("#d7301f", "outside: predictors unlike any training data")])
    _draw(ax, run, data, "Area of applicability of the model", data.values <= 1)
    return _png(fig)


def plots_png(run: RunFolder) -> bytes | None:
    """The training plots (centre of each plot's sampled pixels) by class, over the mapped area."""
    from ..models.classifier import ClassScheme

    s = run.samples
    data = _read_map(run, "maps/class_final.tif")
    if s is None or s.empty or data is None:
        return None
    fig, ax = _map_figure()
    inside = data.values > 0
    ax.imshow(np.ma.masked_equal(inside.astype(np.uint8), 0), cmap="Greys", vmin=0, vmax=4, extent=data.extent,
              interpolation="nearest")
    plots = s.groupby("plot_id").agg(x=("x", "mean"), y=("y", "mean"), cls=("class", "first"))
    scheme = ClassScheme(tuple(run.class_names or sorted(plots["cls"].unique())), {})
    labels = _labels(run)
    for name in scheme.names:
        sel = plots[plots["cls"] == name]
        ax.scatter(sel["x"], sel["y"], s=14, color=scheme.colours[name], edgecolor="k", linewidth=0.3,
                   label=f"{labels.get(name, name)} ({len(sel)} plots)")
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.02, 1.0), frameon=False, title="Training plots",
              title_fontsize=7)
    _draw(ax, run, data, "Training plots (centre of each plot's sampled pixels)", inside)
    return _png(fig)


def suspects_png(run: RunFolder) -> bytes | None:
    """Training plots over the mapped area, the suspect ones (``validation/suspect_plots.csv``) marked and named."""
    table = run.csv("validation/suspect_plots.csv")
    data = _read_map(run, "maps/class_final.tif")
    if table is None or table.empty or data is None or not {"x", "y"} <= set(table.columns):
        return None
    fig, ax = _map_figure()
    inside = data.values > 0
    ax.imshow(np.ma.masked_equal(inside.astype(np.uint8), 0), cmap="Greys", vmin=0, vmax=4, extent=data.extent,
              interpolation="nearest")
    sus = table["suspect"].astype(bool)
    ax.scatter(table.loc[~sus, "x"], table.loc[~sus, "y"], s=10, color="0.55", edgecolor="none",
               label=f"label confirmed ({int((~sus).sum())} plots)")
    ax.scatter(table.loc[sus, "x"], table.loc[sus, "y"], s=40, facecolor="none", edgecolor="#b2182b",
               linewidth=1.4, label=f"suspect label ({int(sus.sum())} plots)")
    for _, r in table.loc[sus].iterrows():
        ax.annotate(str(r["plot_id"]), (r["x"], r["y"]), xytext=(3, 3), textcoords="offset points", fontsize=6)
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.02, 1.0), frameon=False, title="Training plots",
              title_fontsize=7)
    _draw(ax, run, data, "Training plots whose label the filters reject", inside)
    return _png(fig)


def export_maps(run: RunFolder, out_dir: Path) -> dict[str, Path]:
    """The final class map as standalone A4 landscape pages, ``class_map.pdf`` and ``class_map.png``.

    The page carries the representative fraction that holds when it is printed at 100 % on A4.
    """
    fig = _class_map(run, "maps/class_final.tif", cartography.A4_LANDSCAPE_IN)
    if fig is None:
        return {}
    ax = fig.axes[0]
    title = ax.get_title()
    text = f"{title}\nScale 1:000,000 when printed at 100 % on A4"  # same lines as the final title
    for _ in range(3):  # the title's width can move the layout: repeat until the printed figure is stable
        ax.set_title(text, fontsize=10)
        rf = cartography.representative_fraction(ax)
        new_text = f"{title}\nScale {cartography.nice_fraction(rf)} when printed at 100 % on A4"
        if new_text == text:
            break
        text = new_text
    out_dir.mkdir(parents=True, exist_ok=True)
    paths = {"pdf": out_dir / "class_map.pdf", "png": out_dir / "class_map.png"}
    for key, data in (("pdf", _pdf(fig)), ("png", _png(fig))):
        with atomic_path(paths[key]) as tmp:
            tmp.write_bytes(data)
    return paths
