"""Orchestration of a run: the composition of the library's steps.

Each step records its status, timing and outputs in ``manifest.json``
(:mod:`.manifest`), rewritten atomically after every step, so an interrupted run
leaves an honest account of what finished; a step done earlier is reused only
when its outputs check out (:mod:`.checks`).  The run holds the folder's lock
(:mod:`.lock`) throughout.
"""

from __future__ import annotations

import datetime as dt
import json
import sys
from collections.abc import Callable
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .. import CAUTION
from ..errors import ClassDroppedWarning, ProjectFileError, SamplesError
from ..features.cube import build_cube, open_cube, save_cube, season_coverage
from ..inputs.io import (
    check_disk_space,
    check_file_size_limit,
    check_writable,
    sha256_file,
    write_figure,
    write_json,
    write_table,
)
from ..inputs.layers import grid_reference, input_inventory, load_inputs, project_grid, read_aoi
from ..inputs.preflight import preflight
from ..inputs.project import (
    Project,
    check_model_section,
    dropped_class_note,
    load_project,
    portable_dict,
    scene_files,
    without_classes,
)
from ..mapping.predict import AOA_LAYERS, LAYERS, code_counts, predict_map
from ..models.bundle import load_bundle, save_bundle
from ..models.classifier import ClassScheme, WetlandClassifier, data_hash, scheme_proba
from ..models.hierarchy import HierarchicalClassifier
from ..training.samples import (
    check_class_plots,
    check_training_features,
    class_balance,
    classes_without_plots,
    drop_incomplete,
    extract_samples,
    missing_report,
    plot_pixels,
    read_plots,
)
from .checks import (
    areas_mismatch,
    areas_with_assessment,
    bundle_mismatch,
    check_class_map_complete,
    check_layer_complete,
    inventory_areas,
    missing_files,
    staged_map_sizes,
)
from .lock import run_folder_lock
from .manifest import Manifest, step_key
from .steps import applicability_model, write_explanations, write_inventory_outputs


@dataclass
class RunResult:
    """What a finished run returns: its folder, the manifest and the headline tables."""

    run_dir: Path
    manifest: dict[str, Any]
    areas: pd.DataFrame
    metrics: dict[str, Any]
    class_balance: pd.DataFrame = field(default_factory=pd.DataFrame)

    def summary(self) -> str:
        return format_summary(self)


def _record_inputs(manifest: Manifest, project: Project) -> None:
    files = {"aoi": project.area.aoi, "plots": project.plots.path}
    if project.dem is not None:
        files["dem"] = project.dem.path
    for kind, scenes in (("optical", project.optical), ("sar", project.sar)):
        for s in scenes:  # one file per band or polarisation: the first under the date, the others by band
            for j, (path, bands) in enumerate(scene_files(s)):
                files[f"{kind} {s.date}" + (f" {bands[0]}" if j else "")] = path
            if getattr(s, "mask", None) is not None:
                files[f"optical mask {s.date}"] = s.mask
    for path in project.features.plugins:  # a changed plugin recomputes the features
        files[f"plugin {path.name}"] = path
    manifest.data["inputs"] = {k: {"file": str(Path(p).relative_to(project.root)) if Path(p).is_relative_to(
        project.root) else str(p), "sha256": sha256_file(p)} for k, p in files.items()}


def scheme_config(classes: dict[str, Any]) -> dict[str, Any]:
    """The ``[classes]`` settings that shape the samples and models: all but the definitions, which are words
    for people (editing them must not refit anything)."""
    return {k: v for k, v in classes.items() if k != "definitions"}


def feature_names(samples: pd.DataFrame) -> list[str]:
    return [c for c in samples.columns if c not in ("plot_id", "class", "x", "y")]


def make_splitter(project: Project, coords: np.ndarray):
    """The validation design from the project file, as a scikit-learn splitter."""
    from sklearn.model_selection import GroupKFold

    from ..validation.splitters import SpatialBlockKFold

    v = project.validation
    if v.design == "blocks":  # classes missing from folds are refused the same way for every design
        return SpatialBlockKFold(n_splits=v.n_folds, block_size_m=v.block_size_m, random_state=project.project.seed,
                                 coords=coords, on_class_missing="ignore")
    if v.design == "group":
        return GroupKFold(n_splits=v.n_folds)
    from ..validation.splitters import random_pixel_kfold

    return random_pixel_kfold(n_splits=v.n_folds, random_state=project.project.seed,
                              allow_random_pixels=v.allow_random_pixels)


def make_model(project: Project, *, random_state: int | None = None
               ) -> WetlandClassifier | HierarchicalClassifier:
    """The classifier of the project file, seeded with ``project.seed`` (or ``random_state``).

    With ``model.hierarchical = true`` a :class:`~wetlandflow.models.hierarchy.HierarchicalClassifier` over
    ``[classes.parents]``, every level with the same estimator settings.  Class balance comes from
    :func:`training_weights` when plots are capped, and always for a hierarchy (balanced over the leaf
    classes, so that the levels estimate the same leaf priors as a flat model would).

    Raises
    ------
    ProjectFileError
        Naming ``model.hierarchical`` when a hierarchy is asked for and the class scheme has no parents.
    """
    m = project.model
    seed = project.project.seed if random_state is None else int(random_state)
    base = {"kind": m.kind, "n_estimators": m.n_estimators, "max_depth": m.max_depth,
            "learning_rate": m.learning_rate, "class_weighting": m.class_weighting and not m.max_plot_share,
            "n_threads": m.n_threads, "random_state": seed}
    if not m.hierarchical:
        return WetlandClassifier(classes=project.classes.names, **base)
    check_model_section(project)
    # the leaf-balanced weights of training_weights balance the classes; the levels must not re-balance
    return HierarchicalClassifier(classes=project.classes.names, parents=dict(project.classes.parents),
                                  base_params={**base, "class_weighting": False},
                                  gate_threshold=m.gate_threshold)


def training_weights(project: Project, samples: pd.DataFrame) -> np.ndarray | None:
    """Per-sample weights for a fit: classes balanced (``model.class_weighting``) and no plot above
    ``model.max_plot_share`` of its class (see :func:`wetlandflow.training.weights.sample_weights`); ``None``
    when the cap is off (the classifier then balances classes itself).

    A class with too few plots to meet the cap gets equal plot totals, the most even split possible;
    the model step's record in the manifest shows the largest share any plot carries.

    A hierarchical model always gets weights when ``class_weighting`` is on, balanced over the leaf
    classes (capped or not): every level is fitted on its rows with these weights, so the top level
    sees each parent group with the summed weight of its classes, and ``P(parent) x P(leaf | parent)``
    estimates the leaf probabilities of the same balanced population as a flat model.  Balancing each
    level on its own would give a parent's classes together the weight of one top-level class.
    """
    share = project.model.max_plot_share
    hierarchical_balance = project.model.hierarchical and project.model.class_weighting
    if not share and not hierarchical_balance:
        return None
    from ..training.weights import sample_weights

    return sample_weights(samples["class"].to_numpy(), samples["plot_id"].to_numpy(),
                          balance_classes=project.model.class_weighting, max_plot_share=share or None,
                          on_infeasible="ignore")


def refit_with_seed(project: Project, samples: pd.DataFrame, features: list[str], seed: int
                    ) -> WetlandClassifier | HierarchicalClassifier:
    """The final model refitted on a bootstrap of the plots drawn with ``seed`` (and that model seed).

    Plots, not pixels, are drawn with replacement within each class, so a refit sees another plausible
    set of field plots; the stability of the importance ranking over such refits says how much of it
    rests on particular plots.  (A seed alone changes nothing in XGBoost without row subsampling.)
    """
    rng = np.random.default_rng(seed)
    plots = samples.groupby("class")["plot_id"].unique()
    drawn = np.concatenate([rng.choice(p, size=len(p), replace=True) for p in plots])
    counts = pd.Series(drawn).value_counts()
    boot = samples.loc[samples["plot_id"].isin(counts.index)]
    boot = boot.loc[boot.index.repeat(boot["plot_id"].map(counts).to_numpy())]
    model = make_model(project, random_state=seed)
    return model.fit(boot[features].to_numpy(np.float32), boot["class"].to_numpy(),
                     sample_weight=training_weights(project, boot))


def model_hyperparameters(model: WetlandClassifier | HierarchicalClassifier) -> dict[str, Any]:
    """The settings of a fitted model for the manifest: the estimator's, and for a hierarchy also its tree."""
    if isinstance(model, HierarchicalClassifier):
        base = {k: v for k, v in (model.base_params or {}).items() if k != "classes"}
        return {**base, "hierarchical": True, "parents": {p: list(c) for p, c in model.parents_.items()},
                "gate_threshold": float(model.gate_threshold)}
    return {k: v for k, v in model.get_params().items() if k != "classes"}


def model_features(project: Project, samples: pd.DataFrame) -> list[str]:
    """The features a model trains on: ``model.features`` if given (checked against the cube), else all."""
    available = feature_names(samples)
    chosen = list(project.model.features)
    if not chosen:
        return available
    missing = [f for f in chosen if f not in available]
    if missing:
        raise ProjectFileError(
            f"model.features names {missing}, which the feature cube does not hold (it has: "
            f"{', '.join(available)}); correct the names (a selection writes them to "
            "comparison/selected_features.txt), or add the features to [features] select",
            key="model.features", file=str(project.file))
    return chosen


def cross_validate(project: Project, samples: pd.DataFrame, features: list[str], *,
                   progress: bool = True, check: Callable[[], None] | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Out-of-fold class probabilities for every sample, and each sample's test fold
    (``check`` is called before every fold: a cancel point)."""
    from ..progress import progress_bar

    X = samples[features].to_numpy(np.float32)
    y = samples["class"].to_numpy()
    folds = design_folds(project, samples)
    oof = np.full((len(samples), len(project.classes.names)), np.nan, np.float32)
    for k in progress_bar(np.unique(folds), desc="cross-validating", unit="fold", disable=not progress):
        test = folds == k
        if check is not None:
            check()
        w = training_weights(project, samples[~test])
        model = make_model(project).fit(X[~test], y[~test], sample_weight=w)
        oof[test] = scheme_proba(model, X[test])  # columns in scheme order, as the oof table
    return oof, folds


def design_folds(project: Project, samples: pd.DataFrame) -> np.ndarray:
    """The test fold of every sample under the project's design, refused (for every design alike) when the
    cross-validated accuracy would be a silently wrong number (:func:`require_testable_folds`).

    ``samples`` needs ``plot_id``, ``class``, ``x`` and ``y``; ``check`` calls this on the plot pixels.
    """
    from ..validation.splitters import assign_folds, require_testable_folds

    y = samples["class"].to_numpy()
    groups = samples["plot_id"].to_numpy()
    n_plots = len(np.unique(groups))
    if project.validation.n_folds > n_plots:
        raise ProjectFileError(
            f"validation.n_folds = {project.validation.n_folds} but the samples come from {n_plots} plot(s); "
            "plots are never split across folds, so there can be at most one fold per plot. Use fewer folds "
            "or add plots", key="validation.n_folds", file=str(project.file))
    coords = samples[["x", "y"]].to_numpy()
    folds = assign_folds(make_splitter(project, coords), coords, y, groups)
    require_testable_folds(y, folds, groups, design=project.validation.design)
    return folds


SCHEDULER_ENV = "WETLANDFLOW_SCHEDULER"


@contextmanager
def kept_warnings(manifest: Manifest, step: str):
    """Record the :class:`~wetlandflow.errors.PlausibilityWarning` raised inside in ``manifest.json``
    (``plausibility_warnings``: step and message, each once), and pass every warning on to the user."""
    import warnings

    from ..errors import PlausibilityWarning

    kept = manifest.data.setdefault("plausibility_warnings", [])
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", PlausibilityWarning)
        try:
            yield kept
        finally:
            for w in caught:
                message = str(w.message)
                known = any(k["message"] == message for k in kept)
                if issubclass(w.category, PlausibilityWarning) and not known:
                    kept.append({"step": step, "message": message})
    for w in caught:
        warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)


@contextmanager
def compute_context(project: Project):
    """Where dask work runs: this process's threads, a LocalCluster, or a cluster at an address.

    ``compute.scheduler`` in the project file, or the environment variable ``WETLANDFLOW_SCHEDULER``
    (which wins, so a notebook or batch job can redirect a run without editing the file): ``""`` keeps
    dask's threaded scheduler in this process; ``"local"`` starts a ``dask.distributed.LocalCluster``
    with ``compute.n_workers`` single-threaded worker processes for the run; anything else is taken as
    a scheduler address (``tcp://host:8786``) of a running cluster whose workers can read the
    project's input files under the same paths.  Yields the client (``None`` for threads).
    """
    import os

    target = os.environ.get(SCHEDULER_ENV, project.compute.scheduler).strip()
    if not target:
        yield None
        return
    from distributed import Client, LocalCluster

    if target == "local":
        with LocalCluster(n_workers=project.compute.n_workers, threads_per_worker=1, processes=True,
                          dashboard_address=None) as cluster, Client(cluster) as client:
            yield client
        return
    with Client(target) as client:
        yield client


def run_project(project: Project | str | Path, *, progress: bool = True, control: Any = None) -> RunResult:
    """Run a project end to end and write its run folder (on the cluster of :func:`compute_context`).

    ``control`` is anything with a ``check()`` method that raises
    :class:`~wetlandflow.errors.Cancelled` on request (a notebook's
    :class:`~wetlandflow.ui.widgets.TaskControl`); it is called before every
    step, cross-validation fold and prediction window.  The step stopped is
    recorded as ``cancelled`` and the next run resumes from the steps done.

    Examples
    --------
    >>> result = run_project("demo/project.toml")  # doctest: +SKIP
    >>> print(result.summary())                     # doctest: +SKIP
    """
    if not isinstance(project, Project):
        project = load_project(project)
    run_dir = check_writable(project.run_dir)
    with run_folder_lock(run_dir, f"run {project.file.name}") as lock, compute_context(project) as client:
        result = _run(project, progress=progress, check=None if control is None else control.check, lock=lock)
        import os

        result.manifest["compute"] = {
            "scheduler": "threads (this process)" if client is None else str(client.scheduler.address),
            "workers": None if client is None else len(client.scheduler_info().get("workers", {})),
            "cpu_count": os.cpu_count(), "model_threads": project.model.n_threads,
            "omp_wait_policy": os.environ.get("OMP_WAIT_POLICY", "")}
        write_json(result.manifest, result.run_dir / "manifest.json")
        return result


def _run(project: Project, *, progress: bool = True, check: Callable[[], None] | None = None,
         lock: dict[str, str] | None = None) -> RunResult:
    """The steps of a run; each is skipped when an earlier run in the folder finished it with the same key
    and its outputs check out (see :class:`Manifest`)."""
    run_dir = check_writable(project.run_dir)
    manifest = Manifest(run_dir, project, check, progress=progress)
    if lock:
        manifest.data["lock"] = lock
        if "stale_lock_removed" in lock:
            print(f"wetlandflow: {lock['stale_lock_removed']}", file=sys.stderr, flush=True)
    cfg = portable_dict(project)
    seed = project.project.seed

    with manifest.step("inputs") as rec, kept_warnings(manifest, "inputs"):
        _record_inputs(manifest, project)
        grid = project_grid(project)
        inputs = load_inputs(project, grid)
        rec["grid"] = grid.to_dict()
        rec["grid_follows"] = grid_reference(project)[0]
        rec["to_grid"] = {f"{r.kind} {r.date} {r.file}".replace("  ", " "): r.to_grid
                          for r in input_inventory(project, grid).itertuples()}
        rec["layers"] = {k: getattr(inputs, k).attrs if getattr(inputs, k) is not None else None
                         for k in ("optical", "dem", "sar")}
        rec["checks"] = plausibility_checks(project, inputs)
        if project.classes.drop_empty:  # the reduced scheme shapes every later step and its key
            project, dropped = drop_empty_classes(project, read_project_plots(project, grid))
            manifest.data["dropped_classes"] = dropped
            cfg = portable_dict(project)
    hashes = {k: v["sha256"] for k, v in manifest.data["inputs"].items()}

    k_feat = step_key(*(cfg[s] for s in ("area", "grid", "optical", "sar", "dem", "seasons", "features")),
                      cfg["output"]["chunk_size"], {k: v for k, v in hashes.items() if k != "plots"})
    zarr_path = run_dir / "features.zarr"
    if manifest.reusable("features", k_feat, [zarr_path]):
        cube = open_cube(zarr_path)
        manifest.data["preflight"] = preflight(project, grid, n_features=len(cube.data_vars), cube_written=True)
    else:
        with manifest.step("features", k_feat, outputs=[zarr_path]) as rec:
            cube = build_cube(inputs, project.features.select, project.features.params,
                              plugins=project.features.plugins)
            rec["skipped"] = json.loads(cube.attrs.get("skipped", "{}"))
            # the lazy cube tells the number of layers: refuse now, not half-way, if disk or memory is short
            manifest.data["preflight"] = preflight(project, grid, n_features=len(cube.data_vars))
            cube = save_cube(cube, zarr_path, chunk=project.output.chunk_size)
            rec["features"] = {k: dict(v.attrs) for k, v in cube.data_vars.items()}
            rec["season_coverage"] = season_coverage(cube, inputs.aoi, project.seasons)

    k_samples = step_key(k_feat, cfg["plots"], scheme_config(cfg["classes"]), cfg["samples"], seed,
                         hashes["plots"])
    samples_path = run_dir / "samples.parquet"
    if manifest.reusable("samples", k_samples, [samples_path], uses=[zarr_path]):
        samples = pd.read_parquet(samples_path)
        earlier = manifest.previous.get("plausibility_warnings", [])
        manifest.data["plausibility_warnings"] += [w for w in earlier if w.get("step") == "samples"]
    else:
        with (manifest.step("samples", k_samples, outputs=[samples_path], uses=[zarr_path]) as rec,
              kept_warnings(manifest, "samples")):
            samples = _samples_step(project, grid, cube, rec)
            write_table(samples, samples_path)
    features = model_features(project, samples)
    balance = class_balance(samples)

    k_val = step_key(k_samples, cfg["validation"], cfg["model"], seed)
    vdir = run_dir / "validation"
    if manifest.reusable("validation", k_val, [vdir], uses=[samples_path],
                          verify=lambda: missing_files(vdir, ("metrics.json", "oof_predictions.parquet"))):
        metrics = json.loads((vdir / "metrics.json").read_text())
        folds = pd.read_parquet(vdir / "oof_predictions.parquet", columns=["fold"])["fold"].to_numpy()
    else:
        with manifest.step("validation", k_val, outputs=[vdir], uses=[samples_path]) as rec:
            metrics, folds = _validation_step(project, samples, features, inputs.aoi, grid, vdir, rec, progress,
                                              check)

    refit = project.validation.suspect_labels == "refit"
    k_model = step_key(k_samples, cfg["model"], seed, *((k_val,) if refit else ()))
    model_dir = run_dir / "model"
    fit_samples = samples
    dropped = {str(d) for d in suspect_plot_ids(project, vdir)}
    if dropped:  # suspect_labels = "refit": the final model leaves the suspect plots out
        fit_samples = samples.loc[~samples["plot_id"].astype(str).isin(dropped)].reset_index(drop=True)
    training_hash = data_hash(fit_samples, features)
    if manifest.reusable("model", k_model, [model_dir], uses=[samples_path],
                         verify=lambda: bundle_mismatch(model_dir, training_hash, features)):
        model, _ = load_bundle(model_dir)
    else:
        with manifest.step("model", k_model, outputs=[model_dir], uses=[samples_path]) as rec:
            w = training_weights(project, fit_samples)
            model = make_model(project).fit(fit_samples[features].to_numpy(np.float32),
                                            fit_samples["class"].to_numpy(), sample_weight=w)
            save_bundle(model, model_dir, features=features,
                        scheme=ClassScheme(project.classes.names, project.classes.parents),
                        training_hash=training_hash,
                        extra={"config_sha256": manifest.data["config_sha256"]})
            rec["n_features"] = len(features)
            rec["weights"] = _weights_record(project, fit_samples, w)
            if dropped:
                rec["suspect_plots_left_out"] = sorted(dropped)
            rec["hyperparameters"] = model_hyperparameters(model)

    applicability = project.output.applicability
    k_map = step_key(k_model, k_val if applicability else None, applicability, cfg["output"]["chunk_size"],
                     *((cfg["priors"], seed) if project.priors.adjust != "none" else ()))
    layers = LAYERS + (AOA_LAYERS if applicability else ())
    map_paths = {n: run_dir / "maps" / f"{n}.tif" for n in layers}
    map_uses = [model_dir, zarr_path] + ([vdir] if applicability else [])
    if not manifest.reusable("mapping", k_map, list(map_paths.values()), uses=map_uses):
        with manifest.step("mapping", k_map, outputs=list(map_paths.values()), uses=map_uses) as rec:
            staged = staged_map_sizes(grid, len(project.classes.names))
            check_file_size_limit(run_dir, staged, step="mapping")
            check_disk_space(run_dir, 2 * sum(staged.values()))  # the stage, then the COGs beside it
            aoa_model = None
            if applicability:
                aoa_model = applicability_model(model, samples, features, folds)
                rec["applicability_threshold"] = round(aoa_model.threshold, 6)
            map_model = model
            if project.priors.adjust != "none":
                map_model, rec["priors"] = prior_adjusted_model(project, model, fit_samples, features, cube,
                                                                inputs.aoi, run_dir / "maps")
            map_paths = predict_map(map_model, cube, features, grid, run_dir / "maps", valid=inputs.aoi,
                                    class_names=project.classes.names, window_size=project.output.chunk_size,
                                    aoa_model=aoa_model, memory_budget_gb=project.output.memory_budget_gb,
                                    progress=progress, check=check)
            check_class_map_complete(map_paths["class"], inputs.aoi, len(project.classes.names),
                                     step="mapping")
            for layer in ("probability", "confidence"):
                check_layer_complete(map_paths[layer], inputs.aoi, step="mapping")
            rec["outputs"] = {k: str(v.relative_to(run_dir)) for k, v in map_paths.items()}
            rec["data_sha256"] = {k: raster_data_sha256(v) for k, v in map_paths.items()}
            if applicability:
                rec["share_outside_applicability"] = share_outside_applicability(map_paths["applicability"])

    k_inv = step_key(k_map, cfg["output"]["mmu_pixels"], cfg["output"]["connectivity"])
    final_path = run_dir / "maps" / "class_final.tif"
    inv_outputs = [final_path, run_dir / "inventory.gpkg", run_dir / "inventory_areas.csv"]
    inv_uses = list(map_paths.values())
    areas_path = run_dir / "areas.csv"
    if manifest.reusable("inventory", k_inv, inv_outputs, uses=inv_uses,
                         verify=lambda: areas_mismatch(areas_path, final_path, project, grid)):
        areas = pd.read_csv(areas_path)  # it may hold an assessment's error-adjusted areas by now
    else:
        previous_final = manifest.previous.get("steps", {}).get("inventory", {}).get("data_sha256", {})
        with manifest.step("inventory", k_inv, outputs=inv_outputs, uses=inv_uses) as rec:
            rec.update(write_inventory_outputs(map_paths, run_dir, grid, project.classes.names,
                                               mmu_pixels=project.output.mmu_pixels,
                                               connectivity=project.output.connectivity))
            check_class_map_complete(final_path, inputs.aoi, len(project.classes.names), step="inventory")
            rec["data_sha256"] = {"class_final": raster_data_sha256(final_path)}
            mapped = inventory_areas(final_path, project.classes.names, grid.pixel_area_m2)
            if previous_final.get("class_final") != rec["data_sha256"]["class_final"]:
                stale = _set_aside_stale_assessment(run_dir)
                if stale:
                    rec["stale_assessment_moved_to"] = stale
            areas = areas_with_assessment(run_dir, mapped)
            write_table(areas, areas_path)

    if project.output.explain:
        explain_cfg = [cfg["output"][k] for k in ("explain_rows", "explain_window", "explain_seeds")]
        k_exp = step_key(k_model, k_feat, explain_cfg, cfg["validation"]["block_size_m"], seed)
        exp_dir, exp_uses = run_dir / "explain", [model_dir, zarr_path, samples_path]
        if not manifest.reusable("explain", k_exp, [exp_dir], uses=exp_uses,
                                 verify=lambda: missing_files(exp_dir, ("drivers.json",))):
            with manifest.step("explain", k_exp, outputs=[exp_dir], uses=exp_uses) as rec:
                rec.update(write_explanations(model, samples, features, cube, run_dir / "explain",
                                              n_rows=project.output.explain_rows, seed=seed,
                                              block_size_m=project.validation.block_size_m,
                                              window_px=project.output.explain_window,
                                              refit=lambda s: refit_with_seed(project, samples, features, s),
                                              stability_seeds=project.output.explain_seeds))

    manifest.data["finished"] = dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds")
    manifest.save()
    return RunResult(run_dir, manifest.data, areas, metrics, balance)


def prior_adjusted_model(project: Project, model, samples: pd.DataFrame, features: list[str], cube, valid,
                         out_dir: Path) -> tuple[Any, dict[str, Any]]:
    """The model predicting under the area's class priors (``[priors]``), and the record of them.

    The priors the model was fitted under are the weighted class shares of its training samples (balanced
    when ``model.class_weighting``); the area's priors are estimated by EM on a random pixel sample of the
    AOI (Saerens, Latinne & Decaestecker 2002) or taken from ``priors.shares``.  Writes ``priors.csv``
    (class, training prior, area prior) into ``out_dir``.
    """
    from ..mapping.prior_shift import adjusted_model, area_priors, given_priors
    from ..models.priors import SOURCE, training_priors

    names = project.classes.names
    w = training_weights(project, samples)
    y = samples["class"].to_numpy()
    fitted = (training_priors(y, names, w) if w is not None
              else training_priors(y, names, balanced=project.model.class_weighting))
    if project.priors.adjust == "em":
        est = area_priors(model, cube, features, valid, fitted, n_pixels=project.priors.sample_pixels,
                          seed=project.project.seed, classes=names)
        priors, record = est.estimated, est.to_dict()
    else:
        priors = given_priors(project.priors.shares, names)
        record = {"method": "given (priors.shares)", "source": SOURCE,
                  "priors": {c: {"training": round(float(t), 6), "estimated": round(float(e), 6)}
                             for c, t, e in zip(names, fitted, priors, strict=True)}}
    out_dir.mkdir(parents=True, exist_ok=True)
    write_table(pd.DataFrame({"class": list(names), "training_prior": fitted, "area_prior": priors}),
                out_dir / "priors.csv")
    return adjusted_model(model, fitted, priors), record


def read_project_plots(project: Project, grid):
    """The project's plots (``[plots]``), checked against its class scheme and AOI, in the grid CRS."""
    p = project.plots
    return read_plots(p.path, class_field=p.class_field, id_field=p.id_field, classes=project.classes.names,
                      grid=grid, aoi=read_aoi(project), layer=p.layer)


def drop_empty_classes(project: Project, plots) -> tuple[Project, list[str]]:
    """With ``[classes] drop_empty = true``: the project without the classes no plot is labelled with.

    Each dropped class is warned (:class:`~wetlandflow.errors.ClassDroppedWarning`, the words of
    :func:`~wetlandflow.inputs.project.dropped_class_note`); with ``drop_empty = false`` the project is
    returned as it is and :func:`~wetlandflow.training.samples.check_class_plots` refuses such a class.

    Parameters
    ----------
    project : Project
        The project as read.
    plots : pandas.DataFrame
        The plots (:func:`read_project_plots`), with a ``class`` column.

    Returns
    -------
    tuple of (Project, list of str)
        The project whose scheme training and mapping use, and the dropped classes in scheme order.

    Raises
    ------
    SamplesError
        When fewer than two classes would be left.
    ProjectFileError
        When a hierarchical model would be left without parent groups.

    Examples
    --------
    >>> from wetlandflow.inputs.project import AreaSection, ClassesSection, PlotsSection, ProjectSection
    >>> p = Project(Path("p.toml"), ProjectSection(), AreaSection(Path("aoi.gpkg")),
    ...             ClassesSection(("bog", "fen", "marsh"), drop_empty=True), PlotsSection(Path("p.gpkg")))
    >>> reduced, dropped = drop_empty_classes(p, pd.DataFrame({"class": ["bog", "marsh"]}))
    >>> reduced.classes.names, dropped
    (('bog', 'marsh'), ['fen'])
    """
    if not project.classes.drop_empty:
        return project, []
    empty = classes_without_plots(plots, project.classes.names)
    if not empty:
        return project, []
    kept = [c for c in project.classes.names if c not in empty]
    if len(kept) < 2:
        raise SamplesError(f"plot file {project.plots.path}: only {kept} of the class scheme "
                           f"{list(project.classes.names)} has plots; a model needs at least two classes. "
                           "Add plots of the other classes to the plot file")
    import warnings

    for name in empty:
        warnings.warn(dropped_class_note(name), ClassDroppedWarning, stacklevel=2)
    reduced = without_classes(project, empty)
    check_model_section(reduced)
    return reduced, empty


def _samples_step(project: Project, grid, cube, rec: dict[str, Any]) -> pd.DataFrame:
    plots = read_project_plots(project, grid)
    px = plot_pixels(plots, grid, inward_buffer_m=project.samples.inward_buffer_m,
                     max_pixels_per_plot=project.samples.max_pixels_per_plot, seed=project.project.seed)
    check_class_plots(px, plots, project.classes.names, where=f"plot file {project.plots.path}",
                      pixel_size_m=grid.resolution)
    samples = extract_samples(cube, px, grid)
    features = feature_names(samples)
    check_training_features(samples, features)
    rec["missing_before_drop"] = missing_report(samples, features).sum(axis=1).astype(int).to_dict()
    samples = drop_incomplete(samples, features, policy=project.samples.missing)
    rec["class_balance"] = class_balance(samples).to_dict(orient="records")
    rec["n_samples"], rec["n_plots"] = len(samples), int(samples["plot_id"].nunique())
    return samples


def _validation_step(project: Project, samples: pd.DataFrame, features: list[str], aoi, grid, vdir: Path,
                     rec: dict[str, Any], progress: bool,
                     check: Callable[[], None] | None) -> tuple[dict[str, Any], np.ndarray]:
    from ..accuracy.estimators import accuracy_measures, error_matrix

    oof, folds = cross_validate(project, samples, features, progress=progress, check=check)
    names = list(project.classes.names)
    pred = np.array(names)[np.argmax(oof, axis=1)]
    write_table(pd.DataFrame({"plot_id": samples["plot_id"], "class": samples["class"], "fold": folds,
                              "predicted": pred, **{f"p_{c}": oof[:, i] for i, c in enumerate(names)}}),
                vdir / "oof_predictions.parquet")
    matrix = error_matrix(samples["class"].to_numpy(), pred, names)
    write_table(matrix.reset_index(names="map \\ reference"), vdir / "error_matrix.csv")
    metrics = _metrics_dict(accuracy_measures(matrix))
    metrics["design"] = project.validation.design
    metrics["n_folds"] = int(len(np.unique(folds)))
    rec["splitter"] = splitter_record(make_splitter(project, samples[["x", "y"]].to_numpy()))
    rec["folds_file"] = "validation/folds.parquet"
    rec["diagnostics"] = write_fold_diagnostics(vdir, samples, folds, aoi, grid,
                                                block_size_m=project.validation.block_size_m,
                                                seed=project.project.seed)
    if project.validation.suspect_labels != "off":
        metrics["suspect_labels"] = _suspects(project, samples, features, oof, folds, vdir, rec, progress, check)
    metrics["note"] = ("Spatial cross-validation serves to choose models and predictors; the inventory's "
                       "accuracy and areas come from an independent probability sample.")
    write_json(metrics, vdir / "metrics.json")
    rec["overall_accuracy"] = metrics["overall_accuracy"]
    return metrics, folds


def _suspects(project: Project, samples: pd.DataFrame, features: list[str], oof: np.ndarray, folds: np.ndarray,
              vdir: Path, rec: dict[str, Any], progress: bool, check) -> dict[str, Any]:
    """Suspect training labels (Brodley & Friedl 1999) over the run's folds, written to
    ``validation/suspect_plots.csv``; with ``suspect_labels = "refit"`` also the CV without them."""
    from ..validation.suspects import SOURCE, label_filter

    table = label_filter(samples[features].to_numpy(np.float64), samples["class"].to_numpy(),
                         samples["plot_id"].to_numpy(), folds, project.classes.names,
                         precomputed={"model": oof}, rule=project.validation.suspect_rule)
    xy = samples.groupby("plot_id")[["x", "y"]].mean()
    table = table.join(xy, on="plot_id")
    write_table(table, vdir / "suspect_plots.csv")
    flagged = table.loc[table["suspect"], "plot_id"].tolist()
    out: dict[str, Any] = {"rule": project.validation.suspect_rule, "filters": table["rule"].iloc[0],
                           "n_plots": int(len(table)), "n_suspect": len(flagged),
                           "suspect_plot_ids": [str(p) for p in flagged], "source": SOURCE}
    rec["suspect_plots"] = len(flagged)
    if project.validation.suspect_labels == "refit" and flagged:
        from ..accuracy.estimators import accuracy_measures, error_matrix

        keep = ~samples["plot_id"].isin(flagged).to_numpy()
        kept = samples.loc[keep].reset_index(drop=True)
        oof2, _ = cross_validate(project, kept, features, progress=progress, check=check)
        names = list(project.classes.names)
        pred = np.array(names)[np.argmax(oof2, axis=1)]
        m2 = _metrics_dict(accuracy_measures(error_matrix(kept["class"].to_numpy(), pred, names)))
        out["without_suspects"] = {"overall_accuracy": m2["overall_accuracy"],
                                   "overall_accuracy_se": m2["overall_accuracy_se"], "n": m2["n"]}
    return out


def suspect_plot_ids(project: Project, vdir: Path) -> list[Any]:
    """Plot ids the final model leaves out (``validation.suspect_labels = "refit"``), else none."""
    if project.validation.suspect_labels != "refit" or not (vdir / "suspect_plots.csv").exists():
        return []
    table = pd.read_csv(vdir / "suspect_plots.csv")
    return table.loc[table["suspect"], "plot_id"].tolist()


def splitter_record(splitter: Any) -> dict[str, Any]:
    """The splitter's class and scalar settings (arrays such as sample coordinates are in samples.parquet)."""
    params = {k: v for k, v in vars(splitter).items() if not k.startswith("_") and np.ndim(v) == 0}
    return {"class": type(splitter).__name__,
            **{k: v if isinstance(v, (bool, int, float, str, type(None))) else str(v) for k, v in params.items()}}


def _weights_record(project: Project, samples: pd.DataFrame, w: np.ndarray | None) -> dict[str, Any]:
    """How the final fit weighted its samples: the cap and the largest share any plot carries in its class."""
    if w is None:
        return {"max_plot_share": 0, "class_weighting": project.model.class_weighting}
    per_plot = pd.DataFrame({"c": samples["class"].to_numpy(), "p": samples["plot_id"].to_numpy(), "w": w})
    totals = per_plot.groupby(["c", "p"])["w"].sum()
    share = totals / totals.groupby(level="c").transform("sum")
    return {"max_plot_share": project.model.max_plot_share, "class_weighting": project.model.class_weighting,
            "largest_plot_share": {str(c): round(float(v), 4) for c, v in share.groupby(level="c").max().items()}}


def _set_aside_stale_assessment(run_dir: Path) -> str | None:
    """A new final map makes an earlier accuracy assessment stale: move it aside (never delete user work)."""
    acc = run_dir / "accuracy"
    if not acc.exists():
        return None
    stamp = dt.datetime.now(dt.timezone.utc).strftime("%Y%m%dT%H%M%S")
    target = run_dir / f"accuracy_stale_{stamp}"
    acc.rename(target)
    return target.name


def raster_data_sha256(path: Path) -> str:
    """SHA-256 of a raster's pixel values (all bands, read in order), independent of file layout."""
    import hashlib

    import rasterio

    h = hashlib.sha256()
    with rasterio.open(path) as src:
        for b in range(1, src.count + 1):
            for _, w in src.block_windows(b):
                h.update(np.ascontiguousarray(src.read(b, window=w)).tobytes())
    return h.hexdigest()


def share_outside_applicability(path: Path) -> float:
    """Share of the mapped pixels (applicability flag 0 or 1) outside the area of applicability."""
    counts = code_counts(path, 256)
    mapped = counts[0] + counts[1]
    return round(float(counts[0] / mapped), 4) if mapped else float("nan")


def prediction_points(aoi, grid, *, n: int, seed: int) -> np.ndarray:
    """Coordinates of ``n`` random pixel centres inside the AOI: the prediction task's locations."""
    inside = np.flatnonzero(np.asarray(aoi.values).ravel())
    pick = np.random.default_rng(seed).choice(inside, size=min(n, inside.size), replace=False)
    x, y = grid.xy_coords()
    return np.column_stack([x[pick % grid.width], y[pick // grid.width]])


def write_fold_diagnostics(vdir: Path, samples: pd.DataFrame, folds: np.ndarray, aoi, grid, *,
                           block_size_m: float, seed: int) -> dict[str, Any]:
    """Folds, per-class fold counts, the fold map and the distance ECDFs, into ``validation/``."""
    from ..validation.splitters import (
        cv_distance_diagnostics,
        fold_class_counts,
        plot_distance_ecdf,
        plot_folds,
    )

    write_table(pd.DataFrame({"plot_id": samples["plot_id"], "x": samples["x"], "y": samples["y"],
                              "fold": folds}), vdir / "folds.parquet")
    counts = fold_class_counts(samples["class"], folds, samples["plot_id"])
    counts.columns = [f"{m}_fold{f}" for m, f in counts.columns]
    write_table(counts.reset_index(), vdir / "fold_class_counts.csv")
    diag = cv_distance_diagnostics(samples[["x", "y"]].to_numpy(), {"spatial blocks": folds},
                                   prediction_points(aoi, grid, n=2000, seed=seed))
    write_table(diag, vdir / "distance_diagnostics.parquet")
    for name, fig in (("fold_map.png", plot_folds(samples, folds, block_size_m=block_size_m)),
                      ("distance_ecdf.png", plot_distance_ecdf(diag))):
        write_figure(fig, vdir / name)
    summary = diag.groupby("what")["distance"].median().round(1).to_dict()
    w = diag["W"].dropna()
    return {"median_nn_distance_m": summary, "wasserstein_W_m": float(w.iloc[0]) if len(w) else None}


def _metrics_dict(measures: dict[str, Any]) -> dict[str, Any]:
    """Flatten :func:`accuracy.accuracy_measures` into JSON-ready numbers."""
    o = measures["overall"]
    return {"overall_accuracy": float(o.value), "overall_accuracy_se": float(o.se),
            "overall_accuracy_ci95_half_width": float(o.ci), "n": int(measures["n"]),
            "per_class": measures["per_class"].to_dict(orient="records"),
            "quantity_disagreement": float(measures["quantity_disagreement"]),
            "allocation_disagreement": float(measures["allocation_disagreement"]),
            "standard_error_note": measures["note"]}


def plausibility_checks(project: Project, inputs) -> dict[str, Any]:
    """Reflectance (per sensor) and SAR unit checks on a sample of each layer; raise on a likely mislabel."""
    from ..features.plausibility import plausibility_checks as checks

    return checks(project, inputs)


def format_totals(run_dir: str | Path, *, classes: bool = True) -> list[str]:
    """The answer first, as printed lines: the total area of each group of classes (``[classes.parents]``, or
    every class but ``upland``), mapped and, once a labelled sample is assessed, error-adjusted with its
    interval; then (``classes=True``) each class.  Read from the run folder (``areas.csv``,
    ``accuracy/``)."""
    from ..report.run_folder import RunFolder
    from ..report.text import area_totals

    run = RunFolder(run_dir)
    totals = area_totals(run)
    if totals is None:
        return ["No class areas in the run folder (the inventory step did not finish)."]
    summary = run.accuracy_summary
    conf = f"{100 * (summary or {}).get('confidence', 0.95):g} %"
    adjusted = totals["adjusted_ha"].notna().any()
    lines = []
    for r in totals[totals["kind"] == "group"].itertuples():
        if pd.notna(r.adjusted_ha):
            lines.append(f"Total {r.name} area ({r.members}): {r.adjusted_ha:,.1f} ha error-adjusted, {conf} "
                         f"confidence interval {r.ci_low_ha:,.1f} to {r.ci_high_ha:,.1f} ha (the map shows "
                         f"{r.mapped_ha:,.1f} ha)")
        else:
            lines.append(f"Total {r.name} area ({r.members}): {r.mapped_ha:,.1f} ha mapped (a pixel count, "
                         "not error-adjusted: no labelled sample assessed)")
    if not lines:
        lines.append(f"Total mapped area of all classes: {totals['mapped_ha'].sum():,.1f} ha")
    if not classes:
        return lines
    per_class = totals[totals["kind"] == "class"]
    lines += ["", "Class areas (ha):" if adjusted else "Class areas (pixel counts of the final map; not "
                                                       "error-adjusted):"]
    if adjusted:
        lines.append(f"  {'class':<12s} {'mapped':>10s} {'adjusted':>10s} {conf + ' CI':>23s}")
    total_ha = max(per_class["mapped_ha"].sum(), 1e-12)
    for r in per_class.itertuples():
        if adjusted:
            ci = f"{r.ci_low_ha:,.1f} to {r.ci_high_ha:,.1f}" if pd.notna(r.ci_low_ha) else ""
            lines.append(f"  {r.name:<12s} {r.mapped_ha:>10,.1f} {r.adjusted_ha:>10,.1f} {ci:>23s}")
        else:
            lines.append(f"  {r.name:<12s} {r.mapped_ha:>12,.1f} ha ({100 * r.mapped_ha / total_ha:5.1f} %)")
    return lines


def _sample_accuracy(run_dir: Path) -> str | None:
    """``0.853 (95 % CI 0.82 to 0.88, n = 240)`` from an assessment in the run folder, else None."""
    path = Path(run_dir) / "accuracy" / "summary.json"
    if not path.exists():
        return None
    s = json.loads(path.read_text())
    oa, hw = s["overall_accuracy"], s["overall_ci_half_width"]
    return f"{oa:.3f} ({100 * s.get('confidence', 0.95):g} % CI {oa - hw:.3f} to {oa + hw:.3f})"


def format_summary(result: RunResult) -> str:
    """The short printed summary: total wetland area first (mapped, and error-adjusted once a sample is
    assessed), then each class, then accuracy, outputs and the caution."""
    m = result.metrics
    lines = [f"wetlandflow run: {result.run_dir}", "", *format_totals(result.run_dir), ""]
    dropped = result.manifest.get("dropped_classes")
    if dropped:
        lines += ["Classes dropped from the scheme:", *(f"  - {dropped_class_note(c)}" for c in dropped), ""]
    acc = _sample_accuracy(result.run_dir)
    if acc is not None:
        lines.append(f"Overall accuracy of the final map from the labelled sample: {acc}")
    lines += [f"Cross-validated overall accuracy ({m.get('design')} design, {m.get('n_folds')} folds): "
              f"{m.get('overall_accuracy', float('nan')):.3f} (serves model choice; the inventory's accuracy "
              "and areas come from a labelled probability sample: wetlandflow sample, then assess)"]
    steps = result.manifest.get("steps", {})
    share = steps.get("mapping", {}).get("share_outside_applicability")
    if share is not None:
        lines += ["", f"Outside the area of applicability (Meyer & Pebesma 2021): {100 * share:.1f} % of the "
                      "mapped pixels; predictions there extrapolate beyond the training data."]
    sus = m.get("suspect_labels")
    if sus:
        lines += ["", f"Suspect training labels ({sus['rule']} filter, Brodley & Friedl 1999): {sus['n_suspect']} of "
                      f"{sus['n_plots']} plots (validation/suspect_plots.csv); check them against the imagery."]
        wo = sus.get("without_suspects")
        if wo:
            lines.append(f"  Cross-validated overall accuracy without them: {wo['overall_accuracy']:.3f} "
                         f"(with them {m.get('overall_accuracy', float('nan')):.3f}); the final model leaves them "
                         "out.")
    priors = steps.get("mapping", {}).get("priors")
    if priors:
        lines += ["", f"Probabilities adjusted to the area's class priors ({priors['method']}); training -> area:"]
        lines += [f"  {c:<12s} {100 * v['training']:5.1f} % -> {100 * v['estimated']:5.1f} %"
                  for c, v in priors["priors"].items()]
    inputs_rec = steps.get("inputs", {})
    if inputs_rec.get("grid_follows"):
        moved = [k for k, v in inputs_rec.get("to_grid", {}).items() if v.startswith("resampled")]
        lines += ["", f"Grid: follows {inputs_rec['grid_follows']}; "
                      + (f"{len(moved)} input file(s) resampled onto it ({', '.join(moved[:3])}"
                         f"{', ...' if len(moved) > 3 else ''}; see manifest.json steps.inputs.to_grid)"
                         if moved else "every input file lies on its pixels (no resampling)")]
    plausibility = result.manifest.get("plausibility_warnings", [])
    if plausibility:
        lines += ["", f"Plausibility warnings ({len(plausibility)}; also in manifest.json "
                      "plausibility_warnings):"]
        lines += [f"  - {w['message']}" for w in plausibility]
    skipped = steps.get("features", {}).get("skipped")
    if skipped:
        lines += ["", "Features skipped (the inputs cannot compute them):"]
        lines += [f"  {name}: {why}" for name, why in skipped.items()]
    inv = steps.get("inventory", {})
    if inv:
        lines += [f"Inventory: {inv['n_polygons']:,} polygons after a minimum mapping unit of "
                  f"{inv['mmu_pixels']} pixels ({inv['connectivity']}-connected)."]
    drivers = steps.get("explain", {}).get("top_drivers")
    if drivers:
        lines += ["", "Top drivers per class (mean |SHAP|):"]
        lines += [f"  {c:<12s} {', '.join(f)}" for c, f in drivers.items()]
    lines += ["", "Outputs: maps/ (probability, class, class_final, confidence, dissimilarity, applicability), "
              "inventory.gpkg, validation/, model/, explain/, areas.csv, manifest.json", "",
              f"CAUTION: {CAUTION}"]
    return "\n".join(lines)

