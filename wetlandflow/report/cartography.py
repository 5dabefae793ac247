"""Cartographic elements for map figures that go to print: scale bar, north arrow, outline, grid, legend, notes.

Every map figure of the report and of the standalone exports is drawn on the map's own projected coordinates
(metres) and then decorated here:

- a scale bar (``matplotlib-scalebar``: a maintained artist that keeps its length true at any zoom);
- a north arrow pointing to true north, turned by the grid convergence at the map's centre (computed with
  pyproj), with the angle printed when it exceeds half a degree;
- the outline of the mapped area (the area of interest clipped to the grid);
- ticks labelled in full metres with the coordinate reference system named under the map;
- a legend with the classes' full labels;
- a source line (inputs, dates, run) and the caution.

A representative fraction (1:N) is printed only on page exports whose printed size makes it true
(:func:`representative_fraction`); screen figures carry the scale bar alone.
"""

from __future__ import annotations

import math
import textwrap
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

A4_LANDSCAPE_IN = (11.69, 8.27)
INCH_M = 0.0254


@dataclass(frozen=True, slots=True)
class MapNotes:
    """The text around a map: its title, the CRS name, where the data came from, and the caution."""

    title: str
    crs_name: str = ""
    source: str = ""
    caution: str = ""


def crs_name(crs: Any) -> str:
    """A printable name for a CRS: ``"WGS 84 / UTM zone 33N (EPSG:32633)"``, or its WKT name."""
    from pyproj import CRS

    c = CRS.from_user_input(crs)
    epsg = c.to_epsg()
    return f"{c.name} (EPSG:{epsg})" if epsg else c.name


def true_north_angle(crs: Any, x: float, y: float) -> float:
    """Angle in degrees from grid north (+y) to true north at ``(x, y)``, positive clockwise.

    Found by stepping 100 m towards the pole along the meridian through the point and reading the direction
    of that step in the map's coordinates; 0 for a geographic CRS.
    """
    from pyproj import CRS, Transformer

    c = CRS.from_user_input(crs)
    if c.is_geographic:
        return 0.0
    to_geo = Transformer.from_crs(c, c.geodetic_crs, always_xy=True)
    to_map = Transformer.from_crs(c.geodetic_crs, c, always_xy=True)
    lon, lat = to_geo.transform(x, y)
    step = 100.0 / 111_320.0  # degrees of latitude in about 100 m
    x2, y2 = to_map.transform(lon, lat + step if lat < 89.9 else lat - step)
    dx, dy = (x2 - x, y2 - y) if lat < 89.9 else (x - x2, y - y2)
    return math.degrees(math.atan2(dx, dy))


def add_scale_bar(ax: Any) -> Any:
    """A scale bar in the lower left, in metres or kilometres, true at the axes' current limits."""
    from matplotlib_scalebar.scalebar import ScaleBar

    bar = ScaleBar(
        1.0, "m", location="lower left", length_fraction=0.25, box_alpha=0.8, font_properties={"size": 7}
    )
    ax.add_artist(bar)
    return bar


def add_north_arrow(ax: Any, angle_deg: float = 0.0) -> None:
    """A north arrow in the upper right, turned ``angle_deg`` clockwise from the top of the map."""
    cx, cy, length = 0.93, 0.86, 0.09
    a = math.radians(angle_deg)
    tip = (cx + 0.5 * length * math.sin(a), cy + 0.5 * length * math.cos(a))
    tail = (cx - 0.5 * length * math.sin(a), cy - 0.5 * length * math.cos(a))
    ax.annotate(
        "",
        xy=tip,
        xytext=tail,
        xycoords="axes fraction",
        arrowprops={"arrowstyle": "-|>", "color": "black", "lw": 1.4},
    )
    label = "N" if abs(angle_deg) < 0.5 else f"N\n({angle_deg:+.1f}°)"
    ax.text(
        tip[0],
        tip[1] + 0.015,
        label,
        transform=ax.transAxes,
        ha="center",
        va="bottom",
        fontsize=8,
        fontweight="bold",
        linespacing=0.9,
    )


def add_outline(ax: Any, mask: np.ndarray, extent: tuple[float, float, float, float]) -> None:
    """The outline of the mapped area (``mask`` True inside), drawn as a thin black line."""
    if not mask.any() or mask.all():
        left, right, bottom, top = extent
        ax.plot([left, right, right, left, left], [bottom, bottom, top, top, bottom], color="black", lw=0.8)
        return
    left, right, bottom, top = extent
    h, w = mask.shape
    xs = left + (np.arange(w) + 0.5) * (right - left) / w
    ys = top - (np.arange(h) + 0.5) * (top - bottom) / h
    ax.contour(xs, ys, mask.astype(np.uint8), levels=[0.5], colors="black", linewidths=0.8)


def format_axes(ax: Any, notes: MapNotes) -> None:
    """Title, tick labels in full metres (no offset), axis names and the CRS."""
    ax.set_title(notes.title, fontsize=10)
    ax.ticklabel_format(useOffset=False, style="plain")
    ax.tick_params(labelsize=6)
    for label in ax.get_yticklabels():
        label.set_rotation(90)
        label.set_verticalalignment("center")
    crs = f" ({notes.crs_name})" if notes.crs_name else ""
    ax.set_xlabel(f"Easting (m){crs}", fontsize=7)
    ax.set_ylabel("Northing (m)", fontsize=7)
    ax.set_aspect("equal")


def add_footer(fig: Any, notes: MapNotes, *, width_chars: int = 130) -> None:
    """The source line and the caution along the bottom of the figure (laid out with the figure, never over it)."""
    lines = []
    if notes.source:
        lines += textwrap.wrap(notes.source, width_chars)
    if notes.caution:
        lines += textwrap.wrap(notes.caution, width_chars)
    if lines:
        fig.supxlabel("\n".join(lines), fontsize=6, x=0.01, ha="left", color="#333333")


def legend(ax: Any, entries: Sequence[tuple[str, str]], *, title: str | None = None) -> None:
    """A legend right of the map from ``(colour, label)`` pairs."""
    from matplotlib.patches import Patch

    ax.legend(
        handles=[Patch(facecolor=c, edgecolor="#555555", linewidth=0.4, label=lab) for c, lab in entries],
        fontsize=7,
        title=title,
        title_fontsize=7,
        loc="upper left",
        bbox_to_anchor=(1.02, 1.0),
        frameon=False,
    )


def decorate(
    ax: Any,
    notes: MapNotes,
    *,
    extent: tuple[float, float, float, float],
    mask: np.ndarray | None,
    north_angle: float = 0.0,
) -> None:
    """Everything a printed map carries besides its data and legend."""
    ax.set_xlim(extent[0], extent[1])
    ax.set_ylim(extent[2], extent[3])
    format_axes(ax, notes)
    if mask is not None:
        add_outline(ax, mask, extent)
    add_scale_bar(ax)
    add_north_arrow(ax, north_angle)
    add_footer(ax.figure, notes)


def representative_fraction(ax: Any) -> float:
    """Ground metres per metre of paper for the axes as drawn at the figure's printed size (1:N -> N).

    Measured through the data-to-display transform after a draw, so it holds for an equal-aspect map
    whatever box the layout gave it.  True only when the figure is printed at 100 %: use it on page
    exports of a fixed paper size.
    """
    fig = ax.figure
    fig.draw_without_rendering()  # settle the layout and the aspect so the transform is final
    (x0, y0), (x1, _) = ax.transData.transform([(0.0, 0.0), (1000.0, 0.0)])
    paper_m = abs(x1 - x0) / fig.dpi * INCH_M  # 1000 ground metres on paper
    return 1000.0 / paper_m


def nice_fraction(n: float) -> str:
    """``24312.7`` -> ``"1:24,300"`` (three significant figures; the rounding error is under 0.5 %)."""
    digits = max(0, int(math.floor(math.log10(n))) - 2)
    return f"1:{round(n / 10**digits) * 10**digits:,.0f}"
