"""The report's map figures, drawn from the COG overviews of a run folder (never the full-resolution rasters).

Each ``*_png`` function takes a :class:`~wetlandflow.report.appendix.run_folder.RunFolder` and returns PNG bytes, or
``None`` when the run has no such output; the text builder places them, the appendix writer saves them.
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np

from ..errors import InputFileError
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

    from ..models.classifier import ClassScheme

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
    from ..models.classifier import ClassScheme

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
