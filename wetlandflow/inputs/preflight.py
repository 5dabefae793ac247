"""Checks before a run writes anything: a writable run folder, room on the disk, memory for the global steps.

A run that would fail half-way for want of disk or memory should refuse at
the start, with the figures, instead of leaving a folder of partial work.
The estimates are upper bounds computed from the grid and the project
(pixels, features, classes), not from the data:

* disk: every raster counted uncompressed (float32 features, the staged
  prediction windows and their Cloud-Optimized copies with overviews), plus an
  allowance for the tables, the model and the figures;
* memory: the steps that hold a whole layer in memory (flow routing and the
  terrain features derived from it on the DEM, the minimum mapping unit and
  the polygons on the class map), at bytes per pixel measured on the demo
  (``docs/limits.md``).

Examples
--------
>>> from wetlandflow.inputs.grid import Grid
>>> g = Grid.from_bbox((0, 0, 10_000, 10_000), crs="EPSG:32633", resolution=10)
>>> round(raster_bytes(g, bands=40) / 2**30, 2)  # 40 float32 layers of 1000 x 1000 pixels, in GiB
0.15
"""

from __future__ import annotations

import shutil
from pathlib import Path
from typing import Any

from ..errors import BudgetError, OutputError
from .grid import Grid
from .io import check_writable

# Overviews of a COG (levels /2, /4, ...) add at most a third of the full-resolution size.
OVERVIEW_FACTOR = 4.0 / 3.0
# Tables, model, validation and explanation files, figures: small, but not nothing.
ALLOWANCE_BYTES = 64 * 2**20
# Peak working memory of the whole-layer steps, measured on the demo (docs/limits.md): the terrain
# features (flow routing on the whole DEM) grew by 285 MB at 0.94 Mpx and 453 MB at 3.76 Mpx, i.e. about
# 230 MB fixed and 60 bytes per pixel, rounded up here; the minimum mapping unit and polygons took
# 139 bytes per pixel with 6 classes at 0.94 Mpx (about 23 per pixel and class), rounded up.
TERRAIN_FIXED_BYTES = 256 * 2**20
TERRAIN_BYTES_PER_PIXEL = 64
INVENTORY_BYTES_PER_PIXEL_PER_CLASS = 24
# the terrain features computed on the whole DEM in memory (the others are chunked neighbourhood operations)
GLOBAL_TERRAIN_FEATURES = ("twi", "hand", "mrvbf", "mrrtf", "depression_depth")


def raster_bytes(grid: Grid, *, bands: int, itemsize: int = 4) -> int:
    """Uncompressed size of ``bands`` layers of ``itemsize`` bytes per pixel on ``grid``."""
    return int(grid.width) * int(grid.height) * int(bands) * int(itemsize)


def _n_plots(project: Any) -> int:
    """Number of plot features in the plot file, from its header (0 when it cannot be read)."""
    try:
        import pyogrio

        return int(pyogrio.read_info(project.plots.path)["features"])
    except Exception:  # the plot checks of the samples step report an unreadable file properly
        return 0


def estimate_output_bytes(
    project: Any, grid: Grid, *, n_features: int, n_plots: int | None = None, cube_written: bool = False
) -> dict[str, int]:
    """Upper bound of the disk space a run of ``project`` on ``grid`` needs, by output.

    Parameters
    ----------
    project : wetlandflow.inputs.project.Project
        The resolved project (classes, samples and output options are read).
    grid : Grid
        The run's reference grid.
    n_features : int
        Number of cube variables (``len(cube.data_vars)`` of the lazily built cube).
    n_plots : int, optional
        Number of plots; read from the plot file's header when not given.
    cube_written : bool
        The cube is already on disk (a rerun reusing it): it needs no more room.

    Returns
    -------
    dict
        Bytes per item: ``features`` (the Zarr cube), ``samples``, ``maps_peak`` (staged windows and
        COGs, which exist together until the staging is removed), ``final_map``, ``inventory``,
        ``other`` (allowance) and ``total``.
    """
    if n_features < 1:
        raise OutputError(f"n_features must be >= 1 to estimate the outputs, got {n_features}")
    k = len(project.classes.names)
    aoa = bool(project.output.applicability)
    n_plots = _n_plots(project) if n_plots is None else int(n_plots)
    rows = min(grid.width * grid.height, n_plots * project.samples.max_pixels_per_plot)
    # probability (k float32), confidence (3 float32), class (uint8); AOA: DI (float32) and flag (uint8)
    map_layers = raster_bytes(grid, bands=k + 3) + raster_bytes(grid, bands=1, itemsize=1)
    if aoa:
        map_layers += raster_bytes(grid, bands=1) + raster_bytes(grid, bands=1, itemsize=1)
    parts = {
        "features": 0 if cube_written else raster_bytes(grid, bands=n_features),
        "samples": rows * (n_features + 4) * 8,
        "maps_peak": int(map_layers * (1.0 + OVERVIEW_FACTOR)),
        "final_map": int(raster_bytes(grid, bands=1, itemsize=1) * OVERVIEW_FACTOR),
        "inventory": raster_bytes(grid, bands=1, itemsize=8),
        "other": ALLOWANCE_BYTES,
    }
    parts["total"] = sum(parts.values())
    return parts


def _existing(folder: Path) -> Path:
    """``folder`` or its nearest existing parent (the run folder may not exist yet)."""
    folder = Path(folder).resolve()
    while not folder.exists() and folder != folder.parent:
        folder = folder.parent
    return folder


def _gib(n: float) -> str:
    return f"{n / 2**30:.2f} GiB"


def check_disk(folder: str | Path, need_bytes: int, *, breakdown: dict[str, int] | None = None) -> int:
    """Refuse, before anything is written, when the disk under ``folder`` has less room than needed.

    Parameters
    ----------
    folder : path
        The run folder (it need not exist yet: the disk of its nearest existing parent is measured).
    need_bytes : int
        Bytes the outputs need (:func:`estimate_output_bytes` ``["total"]``).
    breakdown : dict, optional
        Bytes per output, printed in the message.

    Returns
    -------
    int
        Free bytes on that disk.

    Raises
    ------
    OutputError
        With the need, the free space, the largest outputs and the ways out.
    """
    free = shutil.disk_usage(_existing(Path(folder))).free
    if free < need_bytes:
        parts = ""
        if breakdown:
            big = sorted(((v, k) for k, v in breakdown.items() if k != "total"), reverse=True)[:3]
            parts = " (largest: " + ", ".join(f"{k} {_gib(v)}" for v, k in big) + ")"
        raise OutputError(
            f"not enough disk space for the run folder {folder}: the outputs need up to {_gib(need_bytes)}"
            f"{parts}, the disk has {_gib(free)} free. Free some space, set project.output_dir to a folder "
            "on a larger disk, or make the run smaller (a smaller AOI, fewer features in [features] select)"
        )
    return int(free)


def estimate_memory_bytes(project: Any, grid: Grid) -> dict[str, int]:
    """Peak working memory of the steps that hold a whole layer in memory, by step.

    ``terrain``: flow routing (depression filling, accumulation, TWI, HAND,
    MRVBF) on the whole DEM; ``inventory``: the minimum mapping unit and the
    polygons on the class map with the per-class probabilities.  The chunked
    steps (alignment, composites, indices, prediction) are bounded by the chunk
    size instead (see :func:`wetlandflow.mapping.predict.window_memory_bytes`).
    """
    px = grid.width * grid.height
    k = len(project.classes.names)
    select = project.features.select or ("default",)
    uses_terrain = project.dem is not None and any(
        s in ("default", "terrain") or s in GLOBAL_TERRAIN_FEATURES for s in select)
    return {
        "terrain": TERRAIN_FIXED_BYTES + px * TERRAIN_BYTES_PER_PIXEL if uses_terrain else 0,
        "inventory": px * (1 + INVENTORY_BYTES_PER_PIXEL_PER_CLASS * k),
    }


def check_memory(need: dict[str, int], budget_gb: float) -> None:
    """Refuse when a whole-layer step would need more memory than ``output.memory_budget_gb``.

    Raises
    ------
    BudgetError
        Naming the step, its estimate, the budget and the ways out.
    """
    step, peak = max(need.items(), key=lambda kv: kv[1])
    if peak > budget_gb * 2**30:
        raise BudgetError(
            f"the {step} step holds whole layers in memory and needs about {_gib(peak)} on this grid, above "
            f"output.memory_budget_gb = {budget_gb:g}. Raise the budget if the machine has the memory, use a "
            "coarser grid.pixel_size_m, or split the AOI into tiles run one by one (see docs/limits.md)"
        )


def preflight(project: Any, grid: Grid, *, n_features: int, cube_written: bool = False) -> dict[str, Any]:
    """All the checks before the first output is written; returns a record for the manifest.

    The run folder must be writable (:func:`wetlandflow.inputs.io.check_writable`), its disk must hold the
    outputs (:func:`check_disk`), and the whole-layer steps must fit ``output.memory_budget_gb``
    (:func:`check_memory`).
    """
    run_dir = check_writable(project.run_dir)
    disk = estimate_output_bytes(project, grid, n_features=n_features, cube_written=cube_written)
    free = check_disk(run_dir, disk["total"], breakdown=disk)
    memory = estimate_memory_bytes(project, grid)
    check_memory(memory, project.output.memory_budget_gb)
    return {
        "disk_bytes_needed": disk,
        "disk_bytes_free": free,
        "memory_bytes_needed": memory,
        "memory_budget_gb": project.output.memory_budget_gb,
    }
