"""Where the demo lies: its invented name, its CRS and the origin every demo grid is snapped to.

Shared by the static landscape (:mod:`wetlandflow.demo.landscape`) and the image archive
(:mod:`wetlandflow.demo.archive`), so both cover the same ground.
"""

from __future__ import annotations

import math

from ..inputs.grid import Grid

PLACE = "Orlenmere Basin"
GRID_CRS = "EPSG:32633"
X0, YTOP = 512_000.0, 6_402_000.0


def demo_grid(size: int, pixel_size_m: float) -> Grid:
    """The optical grid of the demo: ``size`` x ``size`` pixels in UTM 33N, origin snapped to the pixel.

    Examples
    --------
    >>> demo_grid(40, 30.0).shape
    (40, 40)
    """
    x0 = math.floor(X0 / pixel_size_m) * pixel_size_m
    y1 = math.ceil(YTOP / pixel_size_m) * pixel_size_m
    return Grid.from_bbox((x0, y1 - size * pixel_size_m, x0 + size * pixel_size_m, y1), crs=GRID_CRS,
                          resolution=pixel_size_m)
