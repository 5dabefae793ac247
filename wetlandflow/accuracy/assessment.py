"""The accuracy assessment of a run: design the validation sample, ingest its labels, write the tables.

Good practice (Olofsson et al. 2014, Good practices for estimating area and
assessing accuracy of land change, Remote Sensing of Environment 148) estimates
class areas and accuracies from a probability sample of reference labels, with
the map classes as strata; the map's own pixel counts are biased by its errors.
This module composes :mod:`.sampling` and :mod:`.accuracy` for a run folder:

1. :func:`design_sample` sizes the sample for a target standard error of overall
   accuracy, allocates it over the final map's classes, draws it (away from the
   training plots) and writes ``validation_sample/sample.gpkg`` with an empty
   ``reference_class`` column and no map class for the photo-interpreters, the map
   classes aside in ``validation_sample/map_classes.csv`` and the labelling
   instructions with the class definitions in ``validation_sample/LABELLING.md``
   (:func:`plan_sample` gives the size, effort and precision before anything is written);
2. :func:`assess` reads the labelled file back and writes ``accuracy/`` and the
   error-adjusted ``areas.csv``.

:func:`coverage_study` repeats design, draw and estimation against a reference
raster to measure how often the confidence intervals contain the true areas.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from .. import CAUTION
from ..errors import ValidationDesignError
from ..inputs.io import write_figure, write_json, write_table, write_vector
from ..inputs.project import Project, as_mapped, load_project

SAMPLE_DIR = "validation_sample"
ACCURACY_DIR = "accuracy"
# Conjectured user's accuracies for sizing the sample (Olofsson et al. 2014 suggest using expected values;
# these defaults are a rule of thumb: common practice, no source).
DEFAULT_EXPECTED_USERS = 0.8
# Points an interpreter labels per hour from imagery, for the effort estimate printed before a sample is
# written: a rule of thumb (common practice, no source); it varies with the imagery and the classes.
DEFAULT_POINTS_PER_HOUR = 30.0
MAP_CLASSES_NAME = "map_classes.csv"

# The columns of the run's areas.csv, in order, before and after an assessment: a script reading it by
# column works at every stage.  The mapped columns come from the final map's pixel counts (biased by the
# map's errors); the error-adjusted ones (Olofsson et al. 2014) stay empty until `assess` fills them.
# The *_before_mmu columns count the per-pixel class map (maps/class.tif) before the minimum mapping unit
# merged small patches into their neighbours: on a speckled class the unit can remove much of its area.
MAPPED_AREA_COLUMNS = ("class", "pixels", "mapped_area_ha", "mapped_share", "pixels_before_mmu",
                       "mapped_area_ha_before_mmu", "mapped_share_before_mmu")
ADJUSTED_AREA_COLUMNS = ("estimated_proportion", "se_proportion", "estimated_area_ha", "se_area_ha",
                         "ci_low_ha", "ci_high_ha", "ci_half_width_ha", "confidence")
AREAS_COLUMNS = MAPPED_AREA_COLUMNS + ADJUSTED_AREA_COLUMNS


def areas_table(mapped: pd.DataFrame, adjusted: pd.DataFrame | None = None, *,
                confidence: float | None = None) -> pd.DataFrame:
    """The run's ``areas.csv``: the columns :data:`AREAS_COLUMNS`, the same before and after an assessment.

    Parameters
    ----------
    mapped : pandas.DataFrame
        ``class``, ``pixels``, ``mapped_area_ha``, ``mapped_share`` per class of the final map
        (:func:`wetlandflow.mapping.predict.class_areas`).
    adjusted : pandas.DataFrame, optional
        An assessment's area table (``accuracy/area_table.csv``); without it the error-adjusted columns
        are empty (NaN).
    confidence : float, optional
        The confidence level of the assessment's intervals (filled only with ``adjusted``).

    Raises
    ------
    ValidationDesignError
        When ``adjusted`` does not list the same classes as ``mapped``.
    """
    table = mapped.reindex(columns=list(MAPPED_AREA_COLUMNS)).reset_index(drop=True)
    for col in ADJUSTED_AREA_COLUMNS:
        table[col] = np.nan
    if adjusted is None:
        return table
    adj = adjusted.set_index("class")
    if set(adj.index.astype(str)) != set(table["class"].astype(str)):
        raise ValidationDesignError(
            f"the assessment's area table lists the classes {sorted(map(str, adj.index))}, the final map "
            f"{sorted(map(str, table['class']))}; assess the sample against this run's final map again")
    adj = adj.reindex(table["class"])
    for col in ADJUSTED_AREA_COLUMNS[:-1]:
        table[col] = adj[col].to_numpy(np.float64)
    table["confidence"] = np.nan if confidence is None else float(confidence)
    return table


def mapped_areas(class_map: xr.DataArray, codes: Mapping[int, str], pixel_area_m2: float) -> pd.DataFrame:
    """``class``, ``pixels``, ``mapped_area_ha``, ``mapped_share`` of a class map (codes 1..K, 0 = no data),
    computed as :func:`wetlandflow.mapping.predict.class_areas` computes them from the file."""
    values = np.asarray(class_map.values).astype(np.int64).ravel()
    px = np.bincount(values[(values >= 0) & (values <= max(codes))], minlength=max(codes) + 1)[1:]
    return pd.DataFrame({"class": [codes[c] for c in sorted(codes)], "pixels": px,
                         "mapped_area_ha": px * pixel_area_m2 / 1e4, "mapped_share": px / max(px.sum(), 1)})


def with_before_mmu(mapped: pd.DataFrame, before: pd.DataFrame) -> pd.DataFrame:
    """The final map's areas with the per-pixel map's (before the minimum mapping unit) beside them, by class."""
    b = before.set_index("class").reindex(mapped["class"])
    out = mapped.copy()
    out["pixels_before_mmu"] = b["pixels"].to_numpy()
    out["mapped_area_ha_before_mmu"] = b["mapped_area_ha"].to_numpy()
    out["mapped_share_before_mmu"] = b["mapped_share"].to_numpy()
    return out


def _project(project: Project | str | Path) -> Project:
    """The project with the scheme of its run's maps (:func:`~wetlandflow.inputs.project.as_mapped`)."""
    return as_mapped(project if isinstance(project, Project) else load_project(project))


def final_class_map(run_dir: Path) -> xr.DataArray:
    """The run's final class map (after the minimum mapping unit) as a DataArray with its CRS."""
    import rioxarray

    path = run_dir / "maps" / "class_final.tif"
    if not path.exists():
        raise ValidationDesignError(f"{path} not found: run the project first (wetlandflow run PROJECT.toml)")
    return rioxarray.open_rasterio(path).isel(band=0, drop=True).load()


def class_codes(project: Project) -> dict[int, str]:
    """Map code -> class name, in the order of the scheme the run mapped (codes 1..K; a class dropped for want
    of plots has no code)."""
    return {i + 1: n for i, n in enumerate(as_mapped(project).classes.names)}


@dataclass(frozen=True)
class SamplePlan:
    """A validation sample sized and allocated, not yet drawn: what :func:`plan_sample` returns.

    ``per_class`` holds the points per class (codes), ``expected_users`` the user's accuracies assumed for
    sizing, ``half_widths`` the expected 95 % half-width of overall accuracy at half, the planned and double
    the points (the same allocation scaled in every class), from :func:`~.sampling.expected_overall_se`.
    """

    project: Project
    target_se: float
    allocation: str
    min_per_class: int
    exclude_buffer_m: float
    seed: int
    n_from_formula: int
    per_class: dict[int, int]
    proportions: dict[int, float]
    expected_users: dict[int, float]
    half_widths: dict[str, tuple[int, float]]
    points_per_hour: float

    @property
    def n_total(self) -> int:
        return int(sum(self.per_class.values()))

    @property
    def hours(self) -> float:
        return self.n_total / self.points_per_hour

    def text(self) -> str:
        """What the sample will cost and give, printed before it is written."""
        codes = class_codes(self.project)
        lines = [f"validation sample: {self.n_total} points (formula: {self.n_from_formula} for a standard "
                 f"error of {self.target_se:g} in overall accuracy), {self.allocation} allocation:"]
        lines += [f"  {codes[c]:<12s} {n:>6d}" for c, n in self.per_class.items()]
        lines += ["", f"Labelling effort: about {self.hours:.1f} hours at {self.points_per_hour:g} points "
                      "per hour (a rule of thumb: common practice, no source; --points-per-hour sets yours).",
                  "Expected 95 % confidence half-width of overall accuracy (Olofsson et al. 2014 stratified "
                  "estimator, if user's accuracies come out at "
                  f"{_users_text(self.expected_users, codes)}), the same allocation scaled in every class:"]
        for key, what in (("half", "half the points"), ("planned", "as planned"),
                          ("double", "double the points")):
            n, hw = self.half_widths[key]
            lines.append(f"  {what:<18s} {n:>6d} points  +/- {hw:.3f}")
        return "\n".join(lines)


def _users_text(users: Mapping[int, float], codes: Mapping[int, str]) -> str:
    values = set(users.values())
    if len(values) == 1:
        return f"{values.pop():g}"
    return ", ".join(f"{codes[c]} {u:g}" for c, u in users.items())


def _scaled(per_class: Mapping[int, int], factor: float) -> dict[int, int]:
    """The allocation scaled by ``factor`` in every class (at least 2 points where there were any)."""
    return {c: (max(2, round(n * factor)) if n else 0) for c, n in per_class.items()}


def plan_sample(project: Project | str | Path, *, target_se: float = 0.01,
                expected_users: Mapping[str, float] | float = DEFAULT_EXPECTED_USERS,
                allocation: str = "min_per_class", min_per_class: int = 50, exclude_buffer_m: float = 100.0,
                seed: int | None = None, points_per_hour: float = DEFAULT_POINTS_PER_HOUR) -> SamplePlan:
    """Size and allocate the validation sample of a finished run, and say what it costs and gives.

    The parameters are those of :func:`design_sample`, plus ``points_per_hour`` (interpreter speed for the
    effort estimate; :data:`DEFAULT_POINTS_PER_HOUR` is a rule of thumb: common practice, no source).
    """
    from .estimators import _z
    from .sampling import allocate, expected_overall_se, mapped_proportions, sample_size_overall

    if not points_per_hour > 0:
        raise ValidationDesignError(f"points_per_hour must be > 0, got {points_per_hour!r}; e.g. 30.")
    p = _project(project)
    codes = class_codes(p)
    props = mapped_proportions(final_class_map(p.run_dir), codes)
    users = {c: (expected_users.get(n, DEFAULT_EXPECTED_USERS) if isinstance(expected_users, Mapping)
                 else float(expected_users)) for c, n in codes.items()}
    present = {c: w for c, w in props.items() if w > 0}
    n = sample_size_overall(present, {c: users[c] for c in present}, target_se)
    if allocation == "min_per_class":
        n = max(n, min_per_class * len(present))  # the floor must fit inside the total
    alloc = allocate(n, present, method=allocation, min_per_class=min_per_class)
    z = _z(0.95)
    widths = {}
    for key, factor in (("half", 0.5), ("planned", 1.0), ("double", 2.0)):
        scaled = alloc if factor == 1.0 else _scaled(alloc, factor)
        se = expected_overall_se(present, {c: users[c] for c in present}, scaled)
        widths[key] = (int(sum(scaled.values())), z * se)
    return SamplePlan(p, target_se, allocation, min_per_class, exclude_buffer_m,
                      p.project.seed if seed is None else seed, int(n), alloc,
                      {c: float(w) for c, w in props.items()}, {c: users[c] for c in present}, widths,
                      float(points_per_hour))


def design_sample(project: Project | str | Path, *, target_se: float = 0.01,
                  expected_users: Mapping[str, float] | float = DEFAULT_EXPECTED_USERS,
                  allocation: str = "min_per_class", min_per_class: int = 50, exclude_buffer_m: float = 100.0,
                  seed: int | None = None, overwrite: bool = False, plan: SamplePlan | None = None) -> Path:
    """Size, allocate and draw the validation sample of a finished run; return the GeoPackage written.

    Writes, into ``validation_sample/``: ``sample.gpkg`` (``sample_id, x, y, reference_class``: no map
    class, for blind labelling), ``map_classes.csv`` (``sample_id, map_class``, joined back by
    :func:`assess`), ``LABELLING.md`` (instructions with the class definitions) and ``sample_design.json``.

    Parameters
    ----------
    project : Project or path
        The project whose run folder holds ``maps/class_final.tif``.
    target_se : float
        Target standard error of overall accuracy (0.01 = one percentage point).
    expected_users : float or dict
        Conjectured user's accuracy per class (or one value for all) for the sample-size formula.
    allocation : {"min_per_class", "proportional", "equal"}
        How the total is split over the map classes; ``"min_per_class"`` is proportional with a floor
        (Olofsson et al. 2014 recommend enough points in rare classes).
    min_per_class : int
        The floor for ``"min_per_class"``.
    exclude_buffer_m : float
        No point within this distance of a training plot (spatially independent validation).
    seed : int, optional
        Seed of the draw; default: the project's seed.
    overwrite : bool
        Replace an existing sample file (off: it may already hold labels).
    plan : SamplePlan, optional
        A plan from :func:`plan_sample` (its settings replace the ones above).
    """
    from ..inputs.layers import project_grid
    from ..training.samples import read_plots
    from .instructions import INSTRUCTIONS_NAME, labelling_instructions
    from .sampling import INTERPRETER_COLUMNS, draw_stratified_sample, write_map_classes, write_sample

    if plan is None:
        plan = plan_sample(project, target_se=target_se, expected_users=expected_users, allocation=allocation,
                           min_per_class=min_per_class, exclude_buffer_m=exclude_buffer_m, seed=seed)
    p = plan.project
    codes = class_codes(p)
    cmap = final_class_map(p.run_dir)
    plots = read_plots(p.plots.path, class_field=p.plots.class_field, id_field=p.plots.id_field,
                       classes=p.classes.names, grid=project_grid(p), aoi=None, layer=p.plots.layer)
    gdf = draw_stratified_sample(cmap, plan.per_class, seed=plan.seed, exclude=plots,
                                 exclude_buffer_m=plan.exclude_buffer_m, class_names=codes)
    out = p.run_dir / SAMPLE_DIR
    path = write_sample(gdf[[*INTERPRETER_COLUMNS, "geometry"]], out / "sample.gpkg", overwrite=overwrite)
    write_map_classes(gdf, out / MAP_CLASSES_NAME)
    _write_text(out / INSTRUCTIONS_NAME, labelling_instructions(
        p.classes.names, sample_definitions(p), n_points=plan.n_total, project_name=p.project.name))
    write_json({"n_total": plan.n_total, "n_from_formula": plan.n_from_formula, "target_se": plan.target_se,
                "allocation": plan.allocation,
                "per_class": {codes[c]: int(k) for c, k in plan.per_class.items()},
                "expected_users": {codes[c]: u for c, u in plan.expected_users.items()},
                "mapped_proportions": {codes[c]: w for c, w in plan.proportions.items()},
                "exclude_buffer_m": plan.exclude_buffer_m, "seed": plan.seed,
                "points_per_hour": plan.points_per_hour, "labelling_hours": round(plan.hours, 2),
                "expected_overall_ci95_half_width": {k: {"n": n, "half_width": round(hw, 5)}
                                                     for k, (n, hw) in plan.half_widths.items()},
                "instructions": "Fill reference_class for every point with a class name of the scheme from "
                                f"imagery or field visits, as {SAMPLE_DIR}/{INSTRUCTIONS_NAME} describes "
                                "(the file has no map class, so that the map cannot steer the labels); then "
                                "run `wetlandflow assess PROJECT.toml " + f"{SAMPLE_DIR}/sample.gpkg`."},
               out / "sample_design.json")
    return path


def sample_definitions(project: Project) -> dict:
    """Label and definition of every class of the project (its own, else the defaults, else the name)."""
    from ..inputs.class_definitions import class_definition, project_definitions

    own = project_definitions(project.classes.definitions)
    return {n: class_definition(n, own) for n in project.classes.names}


def _write_text(path: Path, text: str) -> Path:
    from ..inputs.io import atomic_path

    path.parent.mkdir(parents=True, exist_ok=True)
    with atomic_path(path) as tmp:
        Path(tmp).write_text(text, encoding="utf-8")
    return path


def assess(project: Project | str | Path, labelled: str | Path, *, design: str = "stratified",
           confidence: float = 0.95) -> dict[str, Any]:
    """Error-adjusted areas and accuracies from the labelled validation sample; write the tables and figures.

    Writes ``accuracy/area_table.csv``, ``accuracy/accuracy_table.csv`` (user's, producer's, F1 with SE
    and CI), ``accuracy/proportion_matrix.csv``, ``accuracy/summary.json`` (overall accuracy, disagreement,
    notes, caution), the same tables at the level of the scheme's parent groups (``accuracy/grouped_*``),
    figures ``error_matrix.png`` and ``areas.png``, and fills the error-adjusted columns of the run's
    ``areas.csv`` (its columns stay :data:`AREAS_COLUMNS`; see :func:`areas_table`).
    """
    from .estimators import plot_areas, plot_error_matrix
    from .sampling import estimates_from_sample, read_labelled_sample, read_map_classes

    p = _project(project)
    codes = class_codes(p)
    cmap = final_class_map(p.run_dir)
    labelled = Path(labelled)
    if not labelled.is_absolute() and not labelled.exists():
        labelled = p.run_dir / labelled
    table = map_classes_file(p.run_dir, labelled)
    gdf = read_labelled_sample(labelled, codes, cmap,
                               map_classes=None if table is None else read_map_classes(table))
    result = estimates_from_sample(gdf, cmap, codes, design=design, confidence=confidence)
    out = p.run_dir / ACCURACY_DIR
    _write_result(result, out, "")
    if p.classes.parents:
        placed = {c for children in p.classes.parents.values() for c in children}
        collapse = {k: list(v) for k, v in p.classes.parents.items()} | {
            c: [c] for c in p.classes.names if c not in placed}
        grouped = estimates_from_sample(gdf, cmap, codes, design=design, confidence=confidence, collapse=collapse)
        _write_result(grouped, out, "grouped_")
    import matplotlib.pyplot as plt

    for name, fig in (("error_matrix.png", plot_error_matrix(result.proportion_matrix)),
                      ("areas.png", plot_areas(result))):
        write_figure(fig, out / name)
        plt.close(fig)
    dx, dy = (float(v) for v in cmap.rio.resolution())
    mapped = mapped_areas(cmap, codes, abs(dx * dy))
    raw = p.run_dir / "maps" / "class.tif"
    if raw.exists():
        import rioxarray

        mapped = with_before_mmu(mapped, mapped_areas(rioxarray.open_rasterio(raw).isel(band=0, drop=True).load(),
                                                      codes, abs(dx * dy)))
    write_table(areas_table(mapped, result.area_table, confidence=result.confidence), p.run_dir / "areas.csv")
    return {"n": int(len(gdf)), "overall_accuracy": result.overall.value, "overall_se": result.overall.se,
            "overall_ci_half_width": result.overall.ci, "confidence": result.confidence, "folder": str(out),
            "area_table": result.area_table, "accuracy_table": result.accuracy_table}


def map_classes_file(run_dir: Path, labelled: Path) -> Path | None:
    """The map classes of a sample's draw: ``map_classes.csv`` beside the labelled file, else in the run's
    sample folder; None when neither exists (a sample from before the split carries ``map_class`` itself,
    and the map class is read from the map in any case)."""
    for candidate in (labelled.parent / MAP_CLASSES_NAME, run_dir / SAMPLE_DIR / MAP_CLASSES_NAME):
        if candidate.exists():
            return candidate
    return None


def _write_result(result, out: Path, prefix: str) -> None:
    write_table(result.area_table, out / f"{prefix}area_table.csv")
    write_table(result.accuracy_table, out / f"{prefix}accuracy_table.csv")
    write_table(result.proportion_matrix.reset_index(names="map \\ reference"),
                out / f"{prefix}proportion_matrix.csv")
    write_json({"overall_accuracy": result.overall.value, "overall_se": result.overall.se,
                "overall_ci_half_width": result.overall.ci, "confidence": result.confidence,
                "design": result.design, "disagreement": result.disagreement, "notes": list(result.notes),
                "caution": CAUTION}, out / f"{prefix}summary.json")


def label_from_reference(sample_path: str | Path, reference: xr.DataArray, codes: Mapping[int, str],
                         out_path: str | Path) -> Path:
    """Fill ``reference_class`` of a sample from a reference raster of class codes (e.g. a prior survey).

    Points on reference no-data (code 0) keep an empty label and must be labelled by hand.
    """
    import geopandas as gpd

    gdf = gpd.read_file(sample_path, layer="sample")
    xs = xr.DataArray(gdf.geometry.x.to_numpy(), dims="p")
    ys = xr.DataArray(gdf.geometry.y.to_numpy(), dims="p")
    ref = np.asarray(reference.sel(x=xs, y=ys, method="nearest").values).astype(int)
    gdf["reference_class"] = [codes.get(int(c), "") for c in ref]
    return write_vector(gdf, out_path, layer="sample")


def coverage_study(class_map: xr.DataArray, reference: xr.DataArray, codes: Mapping[int, str], *,
                   allocation: Mapping[int, int], n_reps: int = 200, seed: int = 0,
                   confidence: float = 0.95) -> pd.DataFrame:
    """How often the stratified estimator's confidence intervals contain the true class areas.

    Each repetition draws a stratified random sample of the map with ``allocation``, labels it from
    ``reference`` (the truth), and estimates areas (Olofsson et al. 2014).  Returns, per class: the true
    area, the mapped area and its bias, the mean estimated area, the estimator's mean bias, and the share
    of repetitions whose interval covered the true area.
    """
    from .estimators import error_matrix, stratified_estimates

    cm = np.asarray(class_map.values).astype(int).ravel()
    ref = np.asarray(reference.values).astype(int).ravel()
    if cm.shape != ref.shape:
        raise ValidationDesignError(f"class map {class_map.shape} and reference {reference.shape} differ in shape;"
                                    " put the reference on the map's grid first")
    both = (cm > 0) & (ref > 0)
    cm, ref = cm[both], ref[both]
    dx = float(abs(class_map["x"].values[1] - class_map["x"].values[0]))
    dy = float(abs(class_map["y"].values[1] - class_map["y"].values[0]))
    pixel_ha = dx * dy / 1e4
    names = [codes[c] for c in sorted(codes)]
    true_ha = np.array([(ref == c).sum() for c in sorted(codes)]) * pixel_ha
    mapped_ha = np.array([(cm == c).sum() for c in sorted(codes)]) * pixel_ha
    areas = dict(zip(names, mapped_ha / pixel_ha, strict=True))
    pools = {c: np.flatnonzero(cm == c) for c in sorted(codes)}
    rng = np.random.default_rng(seed)
    covered = np.zeros(len(names))
    estimates = np.zeros((n_reps, len(names)))
    for r in range(n_reps):  # a loop over repetitions, each fully vectorised over its sample
        idx = np.concatenate([rng.choice(pools[c], size=min(allocation.get(c, 0), pools[c].size), replace=False)
                              for c in sorted(codes) if pools[c].size])
        counts = error_matrix([codes[c] for c in ref[idx]], [codes[c] for c in cm[idx]], names)
        res = stratified_estimates(counts, areas, pixel_area_ha=pixel_ha, confidence=confidence)
        t = res.area_table
        estimates[r] = t["estimated_area_ha"].to_numpy()
        covered += (t["ci_low_ha"].to_numpy() <= true_ha) & (true_ha <= t["ci_high_ha"].to_numpy())
    return pd.DataFrame({"class": names, "true_area_ha": true_ha, "mapped_area_ha": mapped_ha,
                         "mapped_bias_ha": mapped_ha - true_ha, "mean_estimated_area_ha": estimates.mean(axis=0),
                         "estimator_bias_ha": estimates.mean(axis=0) - true_ha,
                         "coverage": covered / n_reps, "n_reps": n_reps})


def sample_design_record(run_dir: Path) -> dict[str, Any]:
    path = run_dir / SAMPLE_DIR / "sample_design.json"
    return json.loads(path.read_text()) if path.exists() else {}
