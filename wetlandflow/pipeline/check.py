"""``wetlandflow check``: everything a run would refuse before its features step, without computing features.

:func:`check_project` opens every raster header, aligns the inputs lazily (band lists and counts, band
descriptions, overlap, SAR units, DEM units and coverage, clear observations per season), runs the
reflectance and SAR plausibility checks on a coarse sample, resolves the feature selection against the
bands and inputs (what runs, what is skipped and why; a SAR date in every season the SAR season differences
compare), reads the plots (class field, labels, geometries,
CRS, inside the AOI) and counts them per class against the fold design.  It raises the same error, of the
same class, as :func:`~wetlandflow.pipeline.run.run_project` would on the same project.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd

from ..errors import ClassDroppedWarning, PlausibilityWarning, ProjectFileError
from ..features.cube import plan_features
from ..features.plausibility import ReflectanceWarning, plausibility_checks
from ..features.sar import check_season_dates
from ..inputs.grid import Grid
from ..inputs.io import read_vector
from ..inputs.layers import (
    InputCoverageWarning,
    grid_reference,
    input_inventory,
    load_inputs,
    project_grid,
    read_aoi,
)
from ..inputs.preflight import check_memory, estimate_memory_bytes
from ..inputs.project import Project, load_project
from ..training.samples import check_class_plots, plot_pixels, read_plots

# Built-in features whose output compares [seasons] by their SAR dates (features.builtin.sar_temporal).
SAR_SEASON_FEATURES = ("sar_temporal",)


@dataclass
class CheckReport:
    """What ``check`` found: the grid, the inputs, the features, the plots, and notes worth reading."""

    project: Project
    grid: Grid
    grid_follows: str
    inputs: pd.DataFrame
    features: list[str]
    skipped: dict[str, str]
    plots: pd.DataFrame
    plots_info: dict[str, Any]
    plausibility: dict[str, Any]
    notes: list[str] = field(default_factory=list)

    def text(self) -> str:
        """The printed inventory of inputs, features and plots."""
        p, g = self.project, self.grid
        x0, y0, x1, y1 = g.bounds
        lines = [
            f"project: {p.project.name} ({p.file.name}) - valid: a run would pass every check before its "
            "features step",
            f"grid: {g.crs}, {g.resolution:g} m pixels, {g.height} x {g.width} "
            f"({g.height * g.width * g.pixel_area_m2 / 1e6:,.2f} km2), bounds {x0:.0f} {y0:.0f} {x1:.0f} "
            f"{y1:.0f}; follows {self.grid_follows}",
            f"classes: {', '.join(p.classes.names)}",
            f"seasons: {', '.join(f'{k} {a}..{b}' for k, (a, b) in p.seasons.items())}"
            + (
                "  (default: no [seasons] table, one season over the whole year)"
                if list(p.seasons) == ["all"]
                else ""
            ),
            "",
            "inputs:",
        ]
        with pd.option_context("display.width", 200, "display.max_columns", 20):
            lines.append(self.inputs.to_string(index=False) if len(self.inputs) else "  (none)")
        lines += ["", f"features ({len(self.features)}): {', '.join(self.features)}"]
        if self.skipped:
            lines.append("skipped:")
            lines += [f"  {k}: {v}" for k, v in self.skipped.items()]
        info = self.plots_info
        lines += [
            "",
            f"plots: {info['n_plots']} in {info['file']} (CRS {info['crs']}; geometry "
            f"{', '.join(f'{k} {v}' for k, v in info['geometry_types'].items())}); "
            f"{p.validation.n_folds} folds ({p.validation.design} design)",
        ]
        with pd.option_context("display.width", 200):
            lines.append(self.plots.to_string(index=False))
        if self.notes:
            lines += ["", "notes:"] + [f"  - {n}" for n in self.notes]
        return "\n".join(lines)


def _plot_table(project: Project, plots, px) -> pd.DataFrame:
    counts = plots.groupby("class").size().reindex(project.classes.names, fill_value=0)
    pixels = (
        px.groupby("class").size().reindex(project.classes.names, fill_value=0) if len(px) else counts * 0
    )
    return pd.DataFrame({"class": counts.index, "plots": counts.values, "pixels": pixels.values})


def _fold_notes(project: Project, grid: Grid, px: pd.DataFrame) -> list[str]:
    """Refuse what the run's validation step refuses (the same function on the plot pixels: more folds than
    plots, folds that cannot test every class); note classes thin for the folds."""
    from .run import design_folds

    x, y = grid.xy_coords()
    samples = pd.DataFrame({"plot_id": px["plot_id"].to_numpy(), "class": px["class"].to_numpy(),
                            "x": x[px["col"].to_numpy()], "y": y[px["row"].to_numpy()]})
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        design_folds(project, samples)
    return list(dict.fromkeys(str(w.message) for w in caught if issubclass(w.category, UserWarning)))


def _check_sar_seasons(inputs, defs) -> None:
    """Refuse a ``[seasons]`` window without a SAR date when the SAR season differences are selected (the
    features step would refuse it, in these words, while building them)."""
    if inputs.sar is not None and any(d.name in SAR_SEASON_FEATURES for d in defs):
        check_season_dates(inputs.sar["time"].values, inputs.seasons)


def check_project(project: Project | str | Path) -> CheckReport:
    """Every refusal of a run before its features step, and an inventory of inputs, features and plots.

    Raises
    ------
    WetlandflowError
        The same error (same class, same message) a run would raise.
    """
    from .run import drop_empty_classes

    if not isinstance(project, Project):
        project = load_project(project)
    grid = project_grid(project)
    follows = grid_reference(project)[0]
    inventory = input_inventory(project, grid)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        inputs = load_inputs(project, grid)
        checks = plausibility_checks(project, inputs)
    defs, skipped = plan_features(
        inputs, project.features.select, project.features.params, project.features.plugins
    )
    if not defs:
        raise ProjectFileError(
            "no feature can be computed from these inputs: "
            + ("; ".join(f"{k} {v}" for k, v in skipped.items()) or "the selection is empty")
            + ". Add the inputs the features need, or select features the inputs allow "
            "(docs/methods.md)",
            key="features.select",
            file=str(project.file),
        )
    _check_sar_seasons(inputs, defs)
    check_memory(estimate_memory_bytes(project, grid), project.output.memory_budget_gb)
    raw = read_vector(project.plots.path, layer=project.plots.layer or None, what="plot file",
                      key="plots.layer")
    with warnings.catch_warnings(record=True) as caught_plots:
        warnings.simplefilter("always", PlausibilityWarning)
        plots = read_plots(
            project.plots.path,
            layer=project.plots.layer,
            class_field=project.plots.class_field,
            id_field=project.plots.id_field,
            classes=project.classes.names,
            grid=grid,
            aoi=read_aoi(project),
        )
        project, _ = drop_empty_classes(project, plots)
    caught += caught_plots
    px = plot_pixels(
        plots,
        grid,
        inward_buffer_m=project.samples.inward_buffer_m,
        max_pixels_per_plot=project.samples.max_pixels_per_plot,
        seed=project.project.seed,
    )
    check_class_plots(px, plots, project.classes.names, where=f"plot file {project.plots.path}",
                      pixel_size_m=grid.resolution)
    table = _plot_table(project, plots, px)
    ours = (InputCoverageWarning, ReflectanceWarning, PlausibilityWarning, ClassDroppedWarning)
    notes = list(dict.fromkeys(str(w.message) for w in caught if issubclass(w.category, ours)))
    notes += _fold_notes(project, grid, px)
    info = {
        "file": project.plots.path.name,
        "n_plots": int(plots["plot_id"].nunique()),
        "crs": raw.crs.to_string() if raw.crs is not None else "none",
        "geometry_types": raw.geom_type.value_counts().to_dict(),
    }
    return CheckReport(
        project, grid, follows, inventory, [d.name for d in defs], skipped, table, info, checks, notes
    )
