"""The later steps of a run, each a composition of library functions that writes its outputs.

:func:`wetlandflow.pipeline.run.run_project` calls these after the model is fitted:
the area of applicability model, the inventory (minimum mapping unit and
polygons) and the explanations.  Each returns the small record the manifest
keeps; the tables and figures go into the run folder.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import rasterio

from ..inputs.grid import Grid
from ..inputs.io import write_figure, write_json, write_table
from ..mapping.applicability import ApplicabilityModel, fit_applicability, xgb_importance_weights


# -- area of applicability ------------------------------------------------------------------------------------
def importance_weights(model, features: list[str]) -> np.ndarray:
    """Importance weights for the AOA: gain for XGBoost, impurity decrease for a random forest.

    For a :class:`~wetlandflow.models.hierarchy.HierarchicalClassifier` the weights combine its levels: each
    fitted level's importances (gain or impurity decrease, as for a flat model) are divided by their sum,
    so that every level's weights sum to 1 whatever the scale of its trees, and the levels are then
    averaged with weights equal to the number of training rows each level was fitted on (``level_rows_``:
    all rows for the top level, a parent's rows for its child model).  A feature thus counts in
    proportion to how much of the training data it separates, at whichever level.  A parent with a
    single child in training has no model (its priors are its probabilities) and takes no part; a level
    whose importances are all 0 (no split) adds zeros.  Only the ratios matter to the AOA
    (:func:`~wetlandflow.mapping.applicability.fit_applicability`); the result sums to 1.
    """
    from ..models.classifier import WetlandClassifier
    from ..models.hierarchy import HierarchicalClassifier

    if isinstance(model, HierarchicalClassifier):
        levels = [("top", model.top_model_)] + [(p, m) for p, m in model.child_models_.items()
                                                if isinstance(m, WetlandClassifier)]
        rows = getattr(model, "level_rows_", {})
        total = np.zeros(len(features))
        n_total = 0.0
        for name, level in levels:
            w = importance_weights(level, features)
            n = float(rows.get(name, 0))
            if w.sum() > 0:
                total += n * w / w.sum()
            n_total += n
        return total / n_total if n_total > 0 else total
    if model.kind == "xgboost":
        return xgb_importance_weights(model, features)
    return np.asarray(model.model_.feature_importances_, dtype=np.float64)


def applicability_model(model, samples: pd.DataFrame, features: list[str], folds: np.ndarray
                        ) -> ApplicabilityModel:
    """The AOA model (Meyer & Pebesma 2021) from the training samples, the fitted model and the CV folds.

    Missing feature values count as the training mean (``nan_policy="impute_mean"``), as the
    samples keep NaN where a layer has no data.
    """
    X = samples[features].to_numpy(np.float64)
    return fit_applicability(X, importance_weights(model, features), np.asarray(folds),
                             nan_policy="impute_mean")


# -- inventory: minimum mapping unit and polygons --------------------------------------------------------------
def _read(path: Path) -> np.ndarray:
    with rasterio.open(path) as src:
        return src.read()


def _write_class_cog(values: np.ndarray, like: Path, dst: Path) -> Path:
    """Write a class raster with the profile of ``like`` (staged, then COG with mode overviews)."""
    from ..mapping.predict import build_cog

    stage = dst.with_name(f".{dst.stem}.stage.tif")
    with rasterio.open(like) as src:
        profile = src.profile | {"driver": "GTiff", "tiled": True, "blockxsize": 256, "blockysize": 256,
                                 "compress": "deflate"}
        desc = src.descriptions
    with rasterio.open(stage, "w", **profile) as out:
        out.write(values[None])
        out.set_band_description(1, desc[0] or "class")
    build_cog(stage, dst, overview_resampling="mode")
    stage.unlink()
    return dst


def write_inventory_outputs(maps: dict[str, Path], run_dir: Path, grid: Grid, class_names: tuple[str, ...], *,
                            mmu_pixels: int, connectivity: int) -> dict[str, Any]:
    """Apply the minimum mapping unit, write ``maps/class_final.tif`` and the polygon inventory.

    Writes ``inventory.gpkg`` (layer ``inventory``) and ``inventory_areas.csv``; returns the
    record for the manifest, including the check that polygon areas per class sum to the final
    raster's class areas.  Computes in memory (connected components are global).
    """
    from ..mapping.inventory import apply_mmu, area_summary, polygonize, write_inventory

    cm = _read(maps["class"])[0]
    proba = np.nan_to_num(_read(maps["probability"]), nan=0.0)
    final = apply_mmu(cm, proba, min_pixels=mmu_pixels, connectivity=connectivity) if mmu_pixels > 1 else cm
    final_path = _write_class_cog(final, maps["class"], run_dir / "maps" / "class_final.tif")
    outside = None
    if "applicability" in maps:
        outside = _read(maps["applicability"])[0] == 0
    gdf = polygonize(final, grid, class_names=class_names, proba=proba, outside_aoa=outside,
                     connectivity=connectivity)
    write_inventory(gdf, run_dir / "inventory.gpkg")
    summary = area_summary(gdf)
    write_table(summary, run_dir / "inventory_areas.csv")
    raster_ha = np.bincount(final.ravel(), minlength=len(class_names) + 1)[1:] * grid.pixel_area_m2 / 1e4
    poly_ha = summary.set_index("class_code")["area_ha"].reindex(range(1, len(class_names) + 1), fill_value=0.0)
    worst = float(np.max(np.abs(poly_ha.to_numpy() - raster_ha))) if raster_ha.size else 0.0
    return {"mmu_pixels": int(mmu_pixels), "connectivity": int(connectivity),
            "pixels_changed_by_mmu": int((final != cm).sum()), "n_polygons": int(len(gdf)),
            "polygon_vs_raster_area_max_diff_ha": round(worst, 6),
            "outputs": {"class_final": str(final_path.relative_to(run_dir)), "inventory": "inventory.gpkg",
                        "inventory_areas": "inventory_areas.csv"}}


# -- explanations -------------------------------------------------------------------------------------------------
def _domains(cube_attrs: dict[str, dict], features: list[str]) -> dict[str, str]:
    return {f: str(cube_attrs.get(f, {}).get("domain", "user")) for f in features}


def top_drivers(importance: pd.DataFrame, classes: list[str], n: int = 3) -> dict[str, list[str]]:
    """The ``n`` features with the largest mean |SHAP| for each class."""
    return {c: [str(f) for f in importance[c].sort_values(ascending=False).head(n).index] for c in classes}


def write_explanations(model, samples: pd.DataFrame, features: list[str], cube, out_dir: Path, *, n_rows: int,
                       seed: int, block_size_m: float, window_px: int = 64,
                       refit: Callable[[int], Any] | None = None, stability_seeds: int = 3,
                       n_background: int = 25, n_permutations: int = 1) -> dict[str, Any]:
    """SHAP values of a spatially stratified subsample, their summaries, SHAP maps and ranking stability.

    Writes into ``out_dir`` (``explain/``): ``shap_values.parquet`` (long table), ``importance.csv``
    (mean |SHAP| per feature and class), ``domain_importance.csv``, ``cluster_importance.csv``
    (correlation clusters, |r| >= 0.8), figures ``importance.png``, ``domains.png``,
    ``beeswarm_<class>.png`` and ``dependence_<class>.png`` (each class's top feature against its SHAP
    value, coloured by the second); ``maps/shap_<domain>_<class>.tif`` for each class's leading domain
    over a ``window_px`` window at the centre of the grid, drawn in ``shap_maps.png``, with the
    ``waterfall_centre.png`` breakdown of the window's centre pixel; and, when ``refit(seed)`` is given,
    ``ranking_stability.csv``: Spearman's rho between the importance rankings of the model and of
    ``stability_seeds - 1`` refits (``refit(seed)`` returns a model refitted, e.g. on a bootstrap of the
    plots, for that seed).

    A :class:`~wetlandflow.models.hierarchy.HierarchicalClassifier` is explained as a whole for everything per
    class: the tables, figures, ``drivers.json``, the centre pixel's waterfall and the ranking stability
    use the combined SHAP values of its leaf probabilities
    (:func:`~wetlandflow.explain.attribution.combined_shap_values`: probability scale, a permutation estimate with
    ``n_permutations`` forward-and-backward permutations per row, or exact enumeration for 10 features
    or fewer, against ``n_background`` rows of the subsample, the same rows for every refit), so they
    keep their flat meaning (what drives the probability of each class).  Each level is also explained
    with exact TreeSHAP into ``levels/importance_<level>.csv`` and ``levels/importance_<level>.png``
    (``"top"``: the parent groups and classes under no parent; one per parent: its children, given the
    parent).  Model-agnostic SHAP for every pixel of a window costs too much, so the maps are per
    level: each class is mapped with TreeSHAP of the level that outputs it (the top level for classes
    under no parent and for each parent group, the parent's child model for its children, i.e.
    ``P(class | parent)``), for its leading domain at that level and on that level's scale, into
    ``maps/shap_<level>_<domain>_<class>.tif``; ``drivers.json`` records the level, scale and method
    of every map.
    """
    import matplotlib.pyplot as plt

    from ..explain.attribution import (
        cluster_importance,
        combined_shap_values,
        domain_importance,
        global_importance,
        hierarchical_shap_values,
        shap_values,
        stratified_subsample,
    )
    from ..explain.plots import plot_beeswarm, plot_dependence, plot_domain_importance, plot_importance
    from ..models.hierarchy import HierarchicalClassifier
    from ..training.explore import predictor_correlation, redundant_predictors

    hierarchical = isinstance(model, HierarchicalClassifier)
    cube_attrs = {k: dict(v.attrs) for k, v in cube.data_vars.items()}
    sub = stratified_subsample(samples, n=n_rows, seed=seed, block_size_m=block_size_m)
    feature_domains = _domains(cube_attrs, features)
    figures: dict[str, Any] = {}
    level_record: dict[str, Any] = {}
    explain_fn = None
    if hierarchical:
        pick = np.sort(np.random.default_rng(seed).choice(len(sub), size=min(n_background, len(sub)),
                                                          replace=False))
        background = sub[features].iloc[pick]

        def explain_fn(m, X, features):
            return combined_shap_values(m, X, features=features, background=background,
                                        n_permutations=n_permutations, seed=seed)

        sv = explain_fn(model, sub[features], features)
        for level, lsv in hierarchical_shap_values(model, sub[features], features=features,
                                                   combined=False).items():
            limp = global_importance(lsv)
            write_table(limp.reset_index(), out_dir / "levels" / f"importance_{level}.csv")
            figures[f"levels/importance_{level}.png"] = plot_importance(limp)
            present = [str(c) for c in lsv["class"].values if bool(lsv["present"].sel({"class": c}))]
            level_record[level] = {"classes": [str(c) for c in lsv["class"].values],
                                   "output_scale": lsv.attrs["output_scale"], "method": lsv.attrs["method"],
                                   "file": f"levels/importance_{level}.csv",
                                   "top_drivers": top_drivers(limp, present),
                                   "top_domains": _leading_domains(domain_importance(lsv, feature_domains),
                                                                   present)}
    else:
        sv = shap_values(model, sub[features], features=features)
    imp = global_importance(sv)
    domains = domain_importance(sv, feature_domains)
    corr = predictor_correlation(samples, features)
    red = redundant_predictors(corr, threshold=0.8)
    clusters = cluster_importance(sv, {f: f"cluster {int(c)} ({red.table['kept_member'][f]})"
                                       for f, c in red.table["cluster"].items()})
    values = sv["values"]
    long = values.drop_vars("present").to_dataframe(name="shap").reset_index()
    write_table(long, out_dir / "shap_values.parquet")
    write_table(imp.reset_index(), out_dir / "importance.csv")
    write_table(domains, out_dir / "domain_importance.csv")
    write_table(clusters, out_dir / "cluster_importance.csv")
    classes = [str(c) for c in values["class"].values if bool(values["present"].sel({"class": c}))]
    drivers = top_drivers(imp, classes)
    figures |= {"importance.png": plot_importance(imp), "domains.png": plot_domain_importance(domains)}
    figures |= {f"beeswarm_{c}.png": plot_beeswarm(sv, sub[features], c, seed=seed) for c in classes}
    figures |= {f"dependence_{c}.png": plot_dependence(sv, sub[features], drivers[c][0], c,
                                                       color_by=drivers[c][1] if len(drivers[c]) > 1 else None)
                for c in classes}
    by_domain = _leading_domains(domains, classes)
    if hierarchical:
        maps, map_figures = _hierarchical_maps(model, cube, features, feature_domains, by_domain,
                                               level_record, out_dir, window_px, explain_fn)
    else:
        maps, map_figures = _explanation_maps(model, cube, features, feature_domains, by_domain, out_dir,
                                              window_px, sv["base_value"])
    figures |= map_figures
    for name, fig in figures.items():
        write_figure(fig, out_dir / name)
        plt.close(fig)
    record = {"n_rows": int(len(sub)), "output_scale": sv.attrs["output_scale"], "method": sv.attrs["method"],
              "top_drivers": drivers, "top_domains": by_domain,
              "cluster_note": clusters.attrs.get("note", ""), "maps": maps}
    if hierarchical:
        combined = {k: sv.attrs[k] for k in ("explainer", "n_background", "n_permutations", "seed")}
        record |= {"structure": "hierarchical", "levels": level_record, "combined": combined,
                   "maps_note": "The tables, figures and drivers are the combined model's (its leaf "
                                "probabilities, on the probability scale; see method). Model-agnostic SHAP "
                                "for every pixel of a window costs too much, so each map is the exact "
                                "TreeSHAP of the level that outputs the class, for the leading domain at "
                                "that level and on that level's scale (see each map's level and "
                                "output_scale)."}
    if refit is not None and stability_seeds >= 2:
        record["ranking_stability"] = _ranking_stability(refit, model, sub, features, seed, stability_seeds,
                                                         out_dir, explain=explain_fn, final=imp["overall"])
    write_json(record, out_dir / "drivers.json")
    return record


def _leading_domains(domains: pd.DataFrame, classes: list[str], n: int = 2) -> dict[str, list[dict]]:
    """The ``n`` domains with the largest share of |SHAP| per class."""
    return {c: [{"domain": str(r.domain), "share": round(float(r.share), 3)}
                for r in domains[domains["class"] == c].nlargest(n, "share").itertuples()] for c in classes}


def _ranking_stability(refit: Callable[[int], Any], model, sub: pd.DataFrame, features: list[str], seed: int,
                       n_seeds: int, out_dir: Path, explain: Callable[..., Any] | None = None,
                       final: pd.Series | None = None) -> dict[str, Any]:
    """Spearman's rho between importance rankings of the model and refits with other seeds
    (``final``: the model's overall importance, already computed, so it is not explained twice)."""
    from ..explain.attribution import ranking_stability

    seeds = [seed + i for i in range(n_seeds)]
    table = ranking_stability(lambda X, y, s: model if s == seed else refit(s), sub[features],
                              sub["class"].to_numpy(), seeds, explain=explain,
                              known=None if final is None else {seed: final})
    write_table(table.reset_index(), out_dir / "ranking_stability.csv")
    off = table.to_numpy()[~np.eye(n_seeds, dtype=bool)]
    return {"seeds": seeds, "mean_spearman_rho": round(table.attrs["mean_rho"], 4),
            "min_spearman_rho": round(float(np.nanmin(off)), 4)}


def _centre_window(cube, window_px: int) -> tuple[tuple[slice, slice], int, int, int, int]:
    ny, nx = cube.sizes["y"], cube.sizes["x"]
    h, w = min(window_px, ny), min(window_px, nx)
    r0, c0 = (ny - h) // 2, (nx - w) // 2
    return (slice(r0, r0 + h), slice(c0, c0 + w)), r0, c0, h, w


def _map_panels(panels: list[tuple[str, str, Any]], r0: int, c0: int, h: int, w: int) -> Any:
    """One figure with a panel per (title, map) pair, diverging colours around 0."""
    import matplotlib.pyplot as plt

    cols = min(3, len(panels))
    rows = -(-len(panels) // cols)
    fig, axes = plt.subplots(rows, cols, figsize=(3.6 * cols, 3.2 * rows), squeeze=False)
    for ax, (title, da) in zip(axes.ravel(), panels, strict=False):
        lim = float(np.nanmax(np.abs(da.values))) if np.isfinite(da.values).any() else 1.0
        im = ax.imshow(da.values, cmap="RdBu_r", vmin=-lim, vmax=lim)
        ax.set_title(title, fontsize=9)
        ax.set_axis_off()
        fig.colorbar(im, ax=ax, shrink=0.75, label=da.attrs.get("units", ""))
    for ax in axes.ravel()[len(panels):]:
        ax.set_visible(False)
    fig.suptitle(f"SHAP contribution of each class's leading domain, rows {r0}-{r0 + h}, "
                 f"columns {c0}-{c0 + w}", fontsize=9)
    return fig


def _explanation_maps(model, cube, features: list[str], feature_domains: dict[str, str],
                      by_domain: dict[str, list[dict]], out_dir: Path, window_px: int,
                      base_value) -> tuple[dict, dict]:
    """SHAP maps of each class's leading domain over a window at the grid's centre, and its centre pixel."""
    from ..explain.attribution import contribution_map, window_contributions, write_shap_map
    from ..explain.plots import plot_waterfall

    window, r0, c0, h, w = _centre_window(cube, window_px)
    contrib = window_contributions(model, cube, features, window=window)
    written, panels = {}, []
    for c, top in by_domain.items():
        if not top:
            continue
        da = contribution_map(contrib, cube, c, domain=top[0]["domain"], domains=feature_domains)
        name = f"maps/shap_{top[0]['domain']}_{c}.tif"
        write_shap_map(da, out_dir / name)
        written[c] = {"domain": top[0]["domain"], "file": name}
        panels.append((f"{top[0]['domain']} -> {c}", da))
    figures = {}
    if panels:
        figures["shap_maps.png"] = _map_panels(panels, r0, c0, h, w)
    centre = contrib.isel(y=h // 2, x=w // 2)
    if np.isfinite(centre.values).any():  # the base value is the model's, the same for every pixel
        pixel = cube[features].isel(y=r0 + h // 2, x=c0 + w // 2).to_dataarray("feature").values[None]
        predicted = str(model.predict(np.asarray(pixel, np.float32))[0])
        figures["waterfall_centre.png"] = plot_waterfall(centre.sel({"class": predicted}), base_value, predicted)
    return written, figures


def _hierarchical_maps(model, cube, features: list[str], feature_domains: dict[str, str],
                        by_domain: dict[str, list[dict]], level_record: dict[str, Any], out_dir: Path,
                       window_px: int, explain_fn: Callable[..., Any]) -> tuple[dict, dict]:
    """Per-level TreeSHAP maps of a hierarchical model, and the combined waterfall of the centre pixel.

    Each leaf class is mapped with the level that outputs it, and each parent group with the top level,
    for the leading domain at that level (the level's own TreeSHAP domain shares, so that the map shows
    the domain that matters most to what it maps).
    """
    from ..explain.attribution import contribution_map, model_levels, window_contributions, write_shap_map
    from ..explain.plots import plot_waterfall

    window, r0, c0, h, w = _centre_window(cube, window_px)
    levels = model_levels(model)
    contrib = {name: window_contributions(level, cube, features, window=window)
               for name, level in levels.items()}
    parent_of = {c: p for p, cs in model.parents_.items() for c in cs}
    wanted = [(c, parent_of.get(c, "top")) for c in by_domain] + [(p, "top") for p in model.parents_]
    written, panels = {}, []
    for c, level in wanted:
        if level not in contrib:  # a parent with one child in training has no model to map
            continue
        top = level_record[level]["top_domains"].get(c, [])
        if not top:
            continue
        d = top[0]["domain"]
        da = contribution_map(contrib[level], cube, c, domain=d, domains=feature_domains)
        given = "" if level == "top" else f" | {level}"
        da.attrs["long_name"] = f"{da.attrs.get('long_name', '')} (level {level}: P({c}{given}))"
        da.attrs["level"] = level
        name = f"maps/shap_{level}_{d}_{c}.tif"
        write_shap_map(da, out_dir / name)
        written[c] = {"domain": d, "file": name, "level": level, "explains": f"P({c}{given})",
                      "output_scale": contrib[level].attrs["output_scale"],
                      "method": "exact TreeSHAP (tree-path-dependent) of the level's model"}
        panels.append((f"{d} -> P({c}{given})", da))
    figures = {}
    if panels:
        figures["shap_maps.png"] = _map_panels(panels, r0, c0, h, w)
    pixel = cube[features].isel(y=r0 + h // 2, x=c0 + w // 2).to_dataarray("feature").values[None]
    pixel = np.asarray(pixel, np.float32)
    if np.isfinite(pixel).any():  # the combined values of one pixel are cheap
        centre = explain_fn(model, pixel, features)
        predicted = str(model.predict(pixel)[0])
        figures["waterfall_centre.png"] = plot_waterfall(
            centre["values"].isel(sample=0).sel({"class": predicted}), centre["base_value"], predicted)
    return written, figures
