"""The text of the methods report, generated from a run folder's manifest and results.

Each ``section_*`` function reads a :class:`wetlandflow.report.run_folder.RunFolder` and
returns a :class:`Section` of blocks (paragraphs, tables, figures).  The text
states what the recorded numbers show and no more: the cross-validated
accuracy serves model choice, and only a labelled probability sample gives
the inventory's accuracy and areas.  Sources are cited through the run
folder's :class:`~wetlandflow.report.references.Citations`, so the references section
lists exactly what the sections cited.
"""

from __future__ import annotations

import json
from typing import TYPE_CHECKING, Any

import pandas as pd

from .. import CAUTION, __version__
from .blocks import Bullets, Callout, Code, Figure, Paragraph, Section, Table  # noqa: F401  (re-exported)
from .references import cite_features

if TYPE_CHECKING:
    from .run_folder import RunFolder

SECTIONS = (
    "Caution",
    "Summary",
    "Classes mapped",
    "Study area and grid",
    "Inputs",
    "Features",
    "Training data",
    "Validation design",
    "Model",
    "Cross-validated accuracy (for model choice)",
    "Suspect training labels",
    "Inventory accuracy and error-adjusted areas (probability sample)",
    "Maps and mapped areas",
    "Drivers per class",
    "Area of applicability",
    "Change through time (monitoring)",
    "Limitations",
    "Software versions",
    "Reproducing this run",
    "References",
)
NO_SAMPLE = "No probability sample was assessed for this run"


# -- number formats (the tests read the same files and format them the same way) -------------------------------
def acc(x: float) -> str:
    """An accuracy or proportion, three decimals."""
    return f"{x:.3f}"


def ha(x: float) -> str:
    """An area in hectares, one decimal with thousands separators."""
    return f"{x:,.1f}"


def pct(x: float) -> str:
    """A share as a percentage, one decimal."""
    return f"{100 * x:.1f} %"


def ha_small(x: float) -> str:
    """A small area in hectares (a minimum mapping unit), three significant digits."""
    return f"{x:.3g}"


def _figure(blocks: list, name: str, png: bytes | None, caption: str) -> None:
    if png is not None:
        blocks.append(Figure(name, png, caption))


# -- sections -------------------------------------------------------------------------------------------------------
def section_caution(run: RunFolder) -> Section:
    return Section("Caution", [Callout(CAUTION)])


def section_summary(run: RunFolder) -> Section:
    """The answer first: total wetland area and each class's area (mapped and error-adjusted), then accuracy."""
    m, p = run.manifest, run.project
    name = p.get("project", {}).get("name", "(unnamed)")
    totals = area_totals(run)
    blocks: list = []
    if totals is not None:
        blocks.append(Paragraph(_totals_text(run, totals)))
        blocks.append(Table(_totals_display(run, totals),
                            "Areas of the inventory: groups of classes first, then each class"))
    blocks.append(Paragraph(_headline_accuracy(run)))
    if run.areas is not None and run.class_names:
        blocks.append(Paragraph(
            f"The run maps {len(run.class_names)} classes "
            f"({', '.join(_label(run, n) for n in run.class_names)}) on {run.pixel_size_m:g} m pixels over "
            f"{ha(run.areas['mapped_area_ha'].sum())} ha."))
    if run.dropped_classes:
        blocks.append(Paragraph(_dropped_text(run)))
    finished = f", finished {m['finished']}" if m.get("finished") else " (no finish time recorded)"
    blocks.append(Paragraph(
        f"This appendix documents the run of project \"{name}\" recorded in this folder: wetlandflow "
        f"{m.get('wetlandflow', '?')}, started {m.get('started', '?')}{finished}, seed {m.get('seed', '?')}, "
        f"resolved configuration SHA-256 `{m.get('config_sha256', '?')}`. It was generated from the run "
        f"folder alone by wetlandflow {__version__}."))
    steps = m.get("steps", {})
    unfinished = [f"{k} ({v.get('status')})" for k, v in steps.items() if v.get("status") != "done"]
    if unfinished:
        blocks.append(Paragraph(f"Not every step finished: {', '.join(unfinished)}. Sections that depend on "
                                "these steps say what is missing; other outputs in the folder may be left from an "
                                "earlier run and need not match this manifest."))
    return Section("Summary", blocks)


def section_classes(run: RunFolder) -> Section:
    """What each mapped class means, as the interpreters and the model were told."""
    from ..inputs.class_definitions import DEFAULT_DEFINITIONS

    defs = run.class_definitions
    own = set(run.project.get("classes", {}).get("definitions") or {})
    rows = pd.DataFrame({"class": [d.label for d in defs.values()], "code name": list(defs),
                         "definition": [d.definition or "(no definition given in the project file)"
                                        for d in defs.values()]})
    defaults = [n for n in defs if n in DEFAULT_DEFINITIONS and n not in own]
    blocks = [Paragraph("The classes of the inventory, with the definitions the plots were labelled by and "
                        "the interpreters of the validation sample were given.")]
    if own:
        named = ", ".join(_label(run, n) for n in defs if n in own)
        blocks.append(Paragraph(f"The definitions of {named} are the project's own (`[classes] definitions` "
                                "in the project file)."))
    if defaults:
        cite = run.cite("class_definitions", "definitions of the default classes")
        blocks.append(Paragraph(
            f"The definitions of {', '.join(_label(run, n) for n in defaults)} are wetlandflow's defaults, "
            "which describe in short the wetland classes of the Canadian Wetland Classification System "
            f"({cite}) and the land that is not wetland."))
    if run.dropped_classes:
        blocks.append(Paragraph(_dropped_text(run)))
    return Section("Classes mapped", [*blocks, Table(rows, "Class definitions")])


def _dropped_text(run: RunFolder) -> str:
    """One sentence per class the run left out of the scheme for want of plots (``[classes] drop_empty``)."""
    from ..inputs.project import dropped_class_note

    return " ".join(f"Note: {dropped_class_note(c)}." for c in run.dropped_classes)


def _label(run: RunFolder, name: str) -> str:
    """A class's printed label (the project's own, else the default); a group's name as it stands."""
    d = run.class_definitions.get(name)
    return d.label if d is not None else name


def class_groups(run: RunFolder) -> dict[str, list[str]]:
    """The groups of classes whose totals lead the summary: ``[classes.parents]`` of the project.

    Without parents, a scheme with an ``upland`` class gets one group ``wetland`` of all the other classes,
    said as such in the text.
    """
    names = run.class_names
    parents = {k: [n for n in v if n in names]  # a class dropped for want of plots is in no total
               for k, v in (run.project.get("classes", {}).get("parents") or {}).items()}
    parents = {k: v for k, v in parents.items() if v}
    if parents:
        return parents
    return {"wetland": [n for n in names if n != "upland"]} if "upland" in names and len(names) > 1 else {}


def area_totals(run: RunFolder) -> pd.DataFrame | None:
    """Per group of classes, then per class: mapped area and, once a sample is assessed, the error-adjusted
    area with its interval and the user's and producer's accuracies.

    Columns ``name``, ``kind`` (``group``/``class``), ``members``, ``mapped_ha``, ``adjusted_ha``, ``ci_low_ha``,
    ``ci_high_ha``, ``users``, ``producers`` (NaN where not estimated).
    """
    mapped = run.areas
    if mapped is None or not run.class_names:
        return None
    mapped_ha = dict(zip(mapped["class"], mapped["mapped_area_ha"], strict=True))
    est = run.csv("accuracy/area_table.csv")
    grouped = run.csv("accuracy/grouped_area_table.csv")
    accs = run.csv("accuracy/accuracy_table.csv")
    by_class = {} if est is None else est.set_index("class").to_dict("index")
    by_group = {} if grouped is None else grouped.set_index("class").to_dict("index")
    by_acc = {} if accs is None else accs.set_index("class").to_dict("index")
    nan = float("nan")
    rows = []
    for group, members in class_groups(run).items():
        g = by_group.get(group, {})
        rows.append({"name": group, "kind": "group", "members": ", ".join(members),
                     "mapped_ha": float(sum(mapped_ha.get(n, 0.0) for n in members)),
                     "adjusted_ha": g.get("estimated_area_ha", nan), "ci_low_ha": g.get("ci_low_ha", nan),
                     "ci_high_ha": g.get("ci_high_ha", nan), "users": nan, "producers": nan})
    for n in run.class_names:
        c, a = by_class.get(n, {}), by_acc.get(n, {})
        rows.append({"name": n, "kind": "class", "members": n, "mapped_ha": float(mapped_ha.get(n, 0.0)),
                     "adjusted_ha": c.get("estimated_area_ha", nan), "ci_low_ha": c.get("ci_low_ha", nan),
                     "ci_high_ha": c.get("ci_high_ha", nan), "users": a.get("users", nan),
                     "producers": a.get("producers", nan)})
    return pd.DataFrame(rows)


def _totals_text(run: RunFolder, totals: pd.DataFrame) -> str:
    s = run.accuracy_summary
    conf = _conf(s) if s else "95 %"
    parts = []
    for r in totals[totals["kind"] == "group"].itertuples():
        members = ", ".join(_label(run, n).lower() for n in r.members.split(", "))
        if pd.notna(r.adjusted_ha):
            parts.append(f"Total {r.name} area ({members}): {ha(r.adjusted_ha)} ha error-adjusted, {conf} "
                         f"confidence interval {ha(r.ci_low_ha)} to {ha(r.ci_high_ha)} ha; the map itself shows "
                         f"{ha(r.mapped_ha)} ha.")
        else:
            parts.append(f"Total {r.name} area ({members}) on the map: {ha(r.mapped_ha)} ha. {NO_SAMPLE}, so "
                         "this is a pixel count that carries the map's classification errors, without an "
                         "interval.")
    if not parts:
        parts.append(f"Mapped area of all classes: {ha(totals['mapped_ha'].sum())} ha.")
    if s is None and len(parts) and not any(NO_SAMPLE in x for x in parts):
        parts.append(f"{NO_SAMPLE}: the areas below are pixel counts of the map, without intervals.")
    return " ".join(parts)


def _totals_display(run: RunFolder, totals: pd.DataFrame) -> pd.DataFrame:
    def fmt(v: float, f) -> str:
        return "" if pd.isna(v) else f(v)

    names = [_label(run, n) if k == "class" else f"{n} (total)"
             for n, k in zip(totals["name"], totals["kind"], strict=True)]
    if totals["adjusted_ha"].isna().all():  # no sample assessed: pixel counts only, nothing to adjust them by
        return pd.DataFrame({"": names, "mapped ha": [ha(v) for v in totals["mapped_ha"]]})
    return pd.DataFrame({
        "": names,
        "mapped ha": [ha(v) for v in totals["mapped_ha"]],
        "error-adjusted ha": [fmt(v, ha) for v in totals["adjusted_ha"]],
        "95 % interval ha": ["" if pd.isna(lo) else f"{ha(lo)} to {ha(hi)}"
                             for lo, hi in zip(totals["ci_low_ha"], totals["ci_high_ha"], strict=True)],
        "user's accuracy": [fmt(v, acc) for v in totals["users"]],
        "producer's accuracy": [fmt(v, acc) for v in totals["producers"]],
    })


def _headline_accuracy(run: RunFolder) -> str:
    s, cv = run.accuracy_summary, run.metrics
    cv_text = (f" Spatial cross-validation on the training plots gave an overall accuracy of "
               f"{acc(cv['overall_accuracy'])}; that figure serves model choice only." if cv else "")
    if s is None:
        return (f"{NO_SAMPLE}: this report gives no accuracy or area estimate for the inventory. The mapped "
                "areas are pixel counts of the map and carry its classification errors." + cv_text)
    lo, hi = s["overall_accuracy"] - s["overall_ci_half_width"], s["overall_accuracy"] + s["overall_ci_half_width"]
    return (f"From the labelled probability sample, the overall accuracy of the final map is "
            f"{acc(s['overall_accuracy'])} ({_conf(s)} confidence interval {acc(lo)} to {acc(hi)}); the "
            "section on inventory accuracy gives the error-adjusted class areas." + cv_text)


def _conf(summary: dict[str, Any]) -> str:
    return f"{100 * summary.get('confidence', 0.95):g} %"


def section_study_area(run: RunFolder) -> Section:
    g = run.step("inputs").get("grid")
    if not g:
        return Section("Study area and grid", [Paragraph("The inputs step did not record a grid.")])
    t, w, h = g["transform"], g["width"], g["height"]
    left, top = t[2], t[5]
    right, bottom = left + w * t[0], top + h * t[4]
    aoi = run.manifest.get("inputs", {}).get("aoi", {}).get("file", "the AOI file")
    text = (f"The reference grid is {g['crs']} with {abs(t[0]):g} m pixels, {w:,} columns by {h:,} rows "
            f"({w * h * run.pixel_area_ha / 100:,.2f} km2); its outer edges are x {left:,.0f} to {right:,.0f} m and "
            f"y {bottom:,.0f} to {top:,.0f} m. Every raster of the run is on this grid.")
    if run.aoi_pixels:
        text += (f" The area of interest ({aoi}) covers {run.aoi_pixels:,} pixels "
                 f"({ha(run.aoi_pixels * run.pixel_area_ha)} ha); outside it every output is no data.")
    return Section("Study area and grid", [Paragraph(text)])


def section_inputs(run: RunFolder) -> Section:
    blocks = _optical_blocks(run) + _season_blocks(run) + _sar_blocks(run) + _dem_blocks(run)
    files = run.manifest.get("inputs", {})
    if files:
        blocks.append(Table(pd.DataFrame([{"input": k, "file": v.get("file", ""), "sha256": v.get("sha256", "")}
                                          for k, v in files.items()]), "Input files and their SHA-256"))
    return Section("Inputs", blocks or [Paragraph("The manifest records no inputs.")])


def _optical_blocks(run: RunFolder) -> list:
    files, checks = run.manifest.get("inputs", {}), run.step("inputs").get("checks", {})
    optical = sorted(run.project.get("optical", []), key=lambda s: str(s["date"]))
    if not optical:
        return []
    rows = [{"date": s["date"], "file": files.get(f"optical {s['date']}", {}).get("file", ""),
             "bands": len(s.get("bands", [])),
             "reflectance": f"(DN + {s.get('offset_dn', 0):g}) x {s.get('scale', 1):g}",
             "quality mask": files.get(f"optical mask {s['date']}", {}).get("file", "none"),
             "valid codes": ", ".join(str(c) for c in s.get("mask_valid", [])),
             "check": _diagnosis(checks.get(f"optical {s['date']}", {}))} for s in optical]
    resampling = run.step("inputs").get("layers", {}).get("optical", {}).get("resampling", "the recorded")
    text = (f"{len(optical)} multispectral optical scenes ({optical[0]['date']} to {optical[-1]['date']}), bands "
            f"{', '.join(optical[0].get('bands', []))}, resampled onto the grid with {resampling} resampling. "
            "Pixels whose quality code is not a valid code are masked (treated as cloud or no data); the check "
            "column is the reflectance plausibility diagnosis of each scene.")
    return [Paragraph(text), Table(pd.DataFrame(rows), "Optical scenes")]


def _sar_blocks(run: RunFolder) -> list:
    files, checks = run.manifest.get("inputs", {}), run.step("inputs").get("checks", {})
    sar = sorted(run.project.get("sar", []), key=lambda s: str(s["date"]))
    if not sar:
        return []
    rows = [{"date": s["date"], "file": files.get(f"sar {s['date']}", {}).get("file", ""),
             "orbit": s.get("orbit", ""), "polarisations": ", ".join(s.get("bands", [])),
             "declared units": s.get("units", ""),
             "range check": checks.get(f"sar {s['date']}", {}).get("likely_units", "")} for s in sar]
    text = (f"{len(sar)} SAR backscatter scenes ({sar[0]['date']} to {sar[-1]['date']}), converted to linear "
            f"power before any statistic. Speckle filter: {_speckle_text(run)}.")
    return [Paragraph(text), Table(pd.DataFrame(rows), "SAR scenes")]


def _dem_blocks(run: RunFolder) -> list:
    dem, cfg = run.step("inputs").get("layers", {}).get("dem", {}), run.project.get("dem")
    if not cfg:
        return []
    file = run.manifest.get("inputs", {}).get("dem", {}).get("file", "")
    return [Paragraph(f"Elevation model {file}: declared units {cfg.get('units', '?')}, source CRS "
                      f"{dem.get('source_crs', '?')}, source pixel {_num(dem.get('source_resolution_m'))} m, "
                      f"resampled to the grid with {dem.get('resampling', '?')} resampling.")]


def _num(x: Any) -> str:
    return f"{x:g}" if isinstance(x, (int, float)) else "?"


def _diagnosis(check: dict[str, Any]) -> str:
    values = [v.get("diagnosis") for v in check.values() if isinstance(v, dict) and "diagnosis" in v]
    return ", ".join(sorted(set(values))) if values else ""


def _season_blocks(run: RunFolder) -> list:
    cov = run.season_coverage()
    if cov is None:
        return []
    shown = cov.assign(**{"cloud-free coverage": [("not recorded" if v is None else pct(v))
                                                  for v in cov["cloud-free coverage"]]})
    return [Paragraph("Optical features are computed from per-season median composites of the valid "
                      "observations. Cloud-free coverage is the share of the area's pixels with at least one "
                      "valid observation in the season's composite."),
            Table(shown, "Seasons, optical scenes and cloud-free coverage")]


def _speckle_text(run: RunFolder) -> str:
    used = {json.dumps(pr.get("speckle_filter"), sort_keys=True) for n, pr in run.feature_parameters.items()
            if "speckle_filter" in pr}
    if not used:
        return "not recorded"
    out = []
    for u in sorted(used):
        v = json.loads(u)
        if isinstance(v, dict):
            method = {"lee": "lee_filter", "multitemporal": "multitemporal_filter"}.get(v.get("method"), "")
            cite = f" ({run.cite(method, 'SAR speckle filter')})" if method else ""
            out.append(f"{v.get('method')} with a {v.get('window')} x {v.get('window')} window{cite}")
        else:
            out.append(str(v))
    return "; ".join(out)


def section_features(run: RunFolder) -> Section:
    attrs = {k: a for k, a in run.feature_attrs.items() if "domain" in a}
    if not attrs:
        return Section("Features", [Paragraph("The run recorded no feature cube.")])
    cited = cite_features(run.citations, attrs, run.feature_parameters)
    used = run.model_features or list(attrs)
    domains = pd.Series([a["domain"] for a in attrs.values()]).value_counts()
    rows = [{"feature": k, "domain": a["domain"], "units": a.get("units", ""),
             "definition": a.get("formula") or a.get("method", ""),
             "parameters": _compact(run.feature_parameters.get(k, {})),
             "source": "; ".join(c.reference.short() if c.reference else c.text for c in cited[k])
             or "no published source recorded",
             "in model": "yes" if k in used else "no"} for k, a in attrs.items()]
    text = (f"The feature cube holds {len(attrs)} features ({', '.join(f'{n} {d}' for d, n in domains.items())}); "
            f"the model used {sum(k in used for k in attrs)} of them. Every feature carries its formula or "
            "method, units, parameters and published source as recorded when it was computed.")
    return Section("Features", [Paragraph(text), Table(pd.DataFrame(rows), "Features of the cube")])


def _compact(params: dict[str, Any]) -> str:
    return json.dumps(params, sort_keys=True, separators=(", ", ": "), default=str) if params else ""


def section_training(run: RunFolder) -> Section:
    s = run.samples
    if s is None:
        return Section("Training data", [Paragraph("The run wrote no samples table.")])
    g = s.groupby("class")
    table = pd.DataFrame({"plots": g["plot_id"].nunique(), "pixels": g.size()}).reindex(
        [c for c in run.class_names if c in g.groups] or list(g.groups)).reset_index()
    cfg = run.project.get("samples", {})
    text = (f"The model learned from {len(s):,} pixels of {s['plot_id'].nunique():,} labelled plots, at most "
            f"{cfg.get('max_pixels_per_plot', '?')} pixels per plot (inward buffer "
            f"{cfg.get('inward_buffer_m', 0):g} m). Pixels of one plot are strongly alike, so the plots, not the "
            "pixels, are the independent units.")
    blocks: list = [Paragraph(text), Table(table, "Plots and pixels per class")]
    missing = run.step("samples").get("missing_before_drop", {})
    gaps = {k: v for k, v in missing.items() if v}
    if gaps:
        worst = max(gaps, key=gaps.get)
        blocks.append(Paragraph(
            f"{len(gaps)} of {len(missing)} features had no value at some training pixels (most: {worst}, "
            f"{gaps[worst]:,} pixels), typically cloud in a season. Missing-data policy "
            f"\"{cfg.get('missing', '?')}\": " + ("the model routes missing values natively, the same way when "
                                                  "mapping." if cfg.get("missing") == "keep" else
                                                  "pixels with any missing feature were dropped.")))
    from .figures import plots_png

    _figure(blocks, "training_plots.png", plots_png(run), "Training plots by class over the mapped area.")
    return Section("Training data", blocks)


def section_validation_design(run: RunFolder) -> Section:
    v, rec = run.project.get("validation", {}), run.step("validation")
    if not rec:
        return Section("Validation design", [Paragraph("The validation step did not run.")])
    design = v.get("design", "?")
    blocks: list = [Paragraph(_design_text(run, v, design))]
    _figure(blocks, "fold_map.png", run.png("validation/fold_map.png"), "Training samples by test fold.")
    counts = run.csv("validation/fold_class_counts.csv")
    if counts is not None:
        blocks.append(Table(counts, "Samples and plots per class and test fold"))
    diag = rec.get("diagnostics", {})
    if diag.get("median_nn_distance_m"):
        blocks.append(Paragraph(_distance_text(run, diag)))
        _figure(blocks, "distance_ecdf.png", run.png("validation/distance_ecdf.png"),
                "Nearest-neighbour distance distributions: CV test to training, prediction locations to "
                "training, and sample to sample.")
    return Section("Validation design", blocks)


def _design_text(run: RunFolder, v: dict[str, Any], design: str) -> str:
    k = (run.metrics or {}).get("n_folds", v.get("n_folds", "?"))
    if design == "blocks":
        return (f"Spatial block cross-validation: square blocks of {v.get('block_size_m', 0):g} m are assigned "
                f"whole to {k} folds, with the classes balanced across folds and no plot split between folds. "
                "Nearby pixels and plots are alike, so a random split would test the model on near-copies of "
                "its training data and overstate the accuracy the map reaches away from the plots "
                f"({run.cite('spatial_cv', 'validation design')}).")
    if design == "group":
        return (f"Grouped cross-validation: whole plots are assigned to {k} folds, so no plot is on both sides "
                f"of a split; neighbouring plots can still fall on both sides "
                f"({run.cite('spatial_cv', 'validation design')}).")
    return (f"Random pixel cross-validation with {k} folds. Pixels of one plot fall on both sides of a split, so "
            "the accuracy below is optimistic for the map "
            f"({run.cite('spatial_cv', 'validation design')}).")


def _distance_text(run: RunFolder, diag: dict[str, Any]) -> str:
    med = diag["median_nn_distance_m"]
    cv = next((v for k, v in med.items() if k.startswith("CV")), None)
    pred = med.get("prediction-to-sample")
    text = "To judge whether the folds resemble the mapping task, nearest-neighbour distances are compared"
    cite = run.cite("cv_distance_diagnostics", "validation distance diagnostics")
    if cv is None or pred is None:
        return f"{text} ({cite}); the diagnostics are incomplete."
    text += (f" ({cite}): the median distance from a CV test sample to the nearest training sample is {cv:,.1f} m, "
             f"from a random location of the mapped area to the nearest training sample {pred:,.1f} m")
    if diag.get("wasserstein_W_m") is not None:
        text += f" (Wasserstein distance between the two distributions {diag['wasserstein_W_m']:,.1f} m)"
    # A ratio within 0.8-1.25 counts as "similar": a rule of thumb (common practice, no source).
    ratio = cv / pred if pred else float("nan")
    if ratio < 0.8:
        text += (". CV test samples lie closer to their training data than most mapped pixels do, so the "
                 "cross-validated accuracy may be optimistic for the map as a whole.")
    elif ratio > 1.25:
        text += (". CV test samples lie farther from their training data than most mapped pixels do, so the "
                 "cross-validated accuracy may be pessimistic for the map as a whole.")
    else:
        text += ". The two are of similar size, so the folds resemble the mapping task in this respect."
    return text


def section_model(run: RunFolder) -> Section:
    b = run.bundle
    if b is None:
        return Section("Model", [Paragraph("The model step did not write a bundle.")])
    kind = b.get("kind", "?")
    params = run.step("model").get("hyperparameters") or {k: v for k, v in b.get("params", {}).items()
                                                         if k != "classes"}
    method = {"xgboost": "xgboost", "random_forest": "random_forest"}.get(kind)
    label = {"xgboost": "gradient-boosted trees (XGBoost, multi-class soft probabilities)",
             "random_forest": "a random forest"}.get(kind, kind)
    cite = f" ({run.cite(method, 'classifier')})" if method else ""
    weighting = ("Samples were weighted so that each class carries equal total weight. "
                 if params.get("class_weighting") else "")
    n_cube = len([a for a in run.feature_attrs.values() if "domain" in a])
    n_used = len(run.model_features)
    selection = (f"The cube's features were not recorded; the model used {n_used}." if not n_cube else
                 "All features of the cube were used; the run selected none out." if n_cube == n_used else
                 f"{n_used} of the cube's {n_cube} features were used.")
    if b.get("structure") == "hierarchical":
        h = b.get("hierarchy", {})
        groups = "; ".join(f"{p}: {', '.join(c)}" for p, c in h.get("parents", {}).items())
        gate = float(h.get("gate_threshold", 0.0))
        label = (f"a two-level hierarchy of {label}: a top level over {', '.join(h.get('top_classes', []))}, "
                 f"then one model within each group ({groups}); a leaf's probability is P(group) x "
                 "P(leaf | group)" + (f", the second level evaluated only where P(group) > {gate:g} (elsewhere "
                                       f"the group's training shares, an error of at most {gate:g} per class)"
                                       if gate else ""))
    text = (f"The classifier is {label}{cite}, fitted on all training samples with seed "
            f"{params.get('random_state', run.manifest.get('seed', '?'))}. {weighting}The hyperparameters were "
            f"set in the project file; the run did not tune them. {selection} The training data's SHA-256 is "
            f"`{b.get('training_data_sha256', '?')}`.")
    table = pd.DataFrame({"parameter": list(params), "value": [str(v) for v in params.values()]})
    return Section("Model", [Paragraph(text), Table(table, "Model hyperparameters")])


def section_cv_accuracy(run: RunFolder) -> Section:
    m = run.metrics
    if m is None:
        return Section(_title(section_cv_accuracy), [Paragraph("The validation step wrote no metrics.")])
    per = pd.DataFrame(m["per_class"])
    text = (f"Out-of-fold predictions of the {m['n']:,} training pixels give an overall accuracy of "
            f"{acc(m['overall_accuracy'])} (plus or minus {acc(m['overall_accuracy_ci95_half_width'])}, 95 %), "
            f"quantity disagreement {acc(m['quantity_disagreement'])} and allocation disagreement "
            f"{acc(m['allocation_disagreement'])} ({run.cite('disagreement', 'cross-validated accuracy')}). "
            "These figures serve to choose models and predictors. They are not the accuracy of the inventory: "
            "the training plots were placed by people, not drawn as a probability sample of the map, so their "
            "accuracy does not carry over to the mapped area, and the standard errors treat pixels as "
            "independent although pixels of one plot are not.")
    table = per[["class", "users", "producers", "f1", "n_reference", "n_map"]].rename(columns={
        "users": "user's", "producers": "producer's", "n_reference": "reference pixels", "n_map": "mapped pixels"})
    blocks: list = [Paragraph(text), Table(_round(table), "Cross-validated accuracy per class")]
    matrix = run.csv("validation/error_matrix.csv")
    if matrix is not None:
        blocks.append(Table(matrix, "Cross-validated error matrix (pixel counts; rows map, columns reference)"))
    return Section(_title(section_cv_accuracy), blocks)


def section_suspects(run: RunFolder) -> Section:
    from .figures import suspects_png

    m = run.metrics or {}
    sus = m.get("suspect_labels")
    table = run.csv("validation/suspect_plots.csv")
    if not sus or table is None:
        return Section(_title(section_suspects), [Paragraph("Suspect labels were not screened in this run "
                                                            "(validation.suspect_labels = \"off\").")])
    text = (f"Each training plot was judged out of fold by three filters ({sus['filters'].split(': ')[-1]}), each "
            f"by its mean probability over the plot's pixels; a plot is suspect when "
            f"{'every filter' if sus['rule'] == 'consensus' else 'more than half of the filters'} gives it "
            f"another class than its label (the {sus['rule']} filter of "
            f"{run.cite('suspect_labels', 'suspect training labels')}). "
            f"{sus['n_suspect']} of {sus['n_plots']} plots are suspect. A suspect plot is not necessarily wrong: "
            "a rare but real class, or a plot on a class boundary, can look like a label error. Check each against "
            "the imagery or field notes.")
    blocks: list = [Paragraph(text)]
    wo = sus.get("without_suspects")
    if wo:
        blocks.append(Paragraph(
            f"The final model was fitted without the suspect plots (validation.suspect_labels = \"refit\"). "
            f"Cross-validated overall accuracy with them {acc(m['overall_accuracy'])}, without them "
            f"{acc(wo['overall_accuracy'])} (standard error {acc(wo['overall_accuracy_se'])}); the second figure "
            "is optimistic if the suspects were right, since the hardest plots left the test folds too."))
    flagged = table[table["suspect"].astype(bool)]
    if len(flagged):
        cols = ["plot_id", "label"] + [c for c in table.columns if c.endswith("_class")] + ["min_p_label"]
        blocks.append(Table(_round(flagged[cols].rename(columns={"min_p_label": "lowest P(label)"})),
                            "Suspect plots (validation/suspect_plots.csv lists every plot)"))
    _figure(blocks, "suspect_plots.png", suspects_png(run), "Training plots; suspect labels circled and named.")
    return Section(_title(section_suspects), blocks)


def _round(df: pd.DataFrame) -> pd.DataFrame:
    return df.assign(**{c: [acc(v) for v in df[c]] for c in df.columns if df[c].dtype.kind == "f"})


def section_inventory_accuracy(run: RunFolder) -> Section:
    s, design = run.accuracy_summary, run.sample_design
    title = _title(section_inventory_accuracy)
    if s is None:
        text = (f"{NO_SAMPLE}. The accuracy and the class areas of the inventory are therefore not estimated; "
                "the cross-validated accuracy above does not stand in for them. To estimate them, design a "
                "stratified random sample of the final map, label each point from imagery or field visits "
                "without looking at the map class, and assess it:")
        if design:
            text = (f"{NO_SAMPLE}: a sample of {design['n_total']:,} points was designed but no labelled sample "
                    "has been assessed. " + text.split(". ", 1)[1])
        return Section(title, [Paragraph(text), Code("wetlandflow sample PROJECT.toml\n"
                                                     "wetlandflow assess PROJECT.toml FILE")])
    cite = run.cite("stratified_area_estimation", "accuracy and error-adjusted areas")
    blocks: list = [Paragraph(_sample_text(run, s, design, cite))]
    blocks += _area_accuracy_tables(run, s)
    _figure(blocks, "areas.png", run.png("accuracy/areas.png"), "Mapped and error-adjusted areas with intervals.")
    _figure(blocks, "error_matrix.png", run.png("accuracy/error_matrix.png"),
            "Error matrix of the probability sample (estimated area proportions).")
    return Section(title, blocks)


def _sample_text(run: RunFolder, s: dict[str, Any], design: dict[str, Any] | None, cite: str) -> str:
    lo, hi = s["overall_accuracy"] - s["overall_ci_half_width"], s["overall_accuracy"] + s["overall_ci_half_width"]
    text = ""
    if design:
        text = (f"A {s.get('design', 'stratified')} random sample of {design['n_total']:,} points was drawn from "
                f"the final map ({design.get('allocation', '?')} allocation over the map classes, at least "
                f"{design.get('exclude_buffer_m', 0):g} m from any training plot, sized for a standard error of "
                f"{design.get('target_se', 0):g} in overall accuracy after {run.cite('sample_size', 'sample size')}). ")
    text += (f"With the reference labels of the sample, the {s.get('design', '')} estimator ({cite}) gives an "
             f"overall accuracy of {acc(s['overall_accuracy'])} (standard error {acc(s['overall_se'])}, "
             f"{_conf(s)} interval {acc(lo)} to {acc(hi)}). These are the estimates of the inventory's accuracy and "
             "class areas; the error-adjusted areas correct the map's pixel counts for its errors of "
             "omission and commission.")
    return text


def _area_accuracy_tables(run: RunFolder, s: dict[str, Any]) -> list:
    areas, accs = run.csv("accuracy/area_table.csv"), run.csv("accuracy/accuracy_table.csv")
    out: list = []
    if areas is not None:
        t = pd.DataFrame({"class": areas["class"], "mapped ha": [ha(v) for v in areas["mapped_area_ha"]],
                          "error-adjusted ha": [ha(v) for v in areas["estimated_area_ha"]],
                          f"{_conf(s)} interval ha": [f"{ha(a)} to {ha(b)}" for a, b in
                                                      zip(areas["ci_low_ha"], areas["ci_high_ha"], strict=True)]})
        notes = _zero_error_notes(areas)
        if any(notes):
            t["note"] = notes
        out.append(Table(t, "Mapped and error-adjusted class areas"))
    if accs is not None:
        notes = _zero_error_notes(accs)
        t = pd.DataFrame({"class": accs["class"], **{
            label: [_accuracy_cell(accs, key, i, bool(n)) for i, n in enumerate(notes)]
            for label, key in (("user's", "users"), ("producer's", "producers"))}})
        if any(notes):
            t["note"] = ["no error observed in the sample: interval of the unobserved error rate" if n else ""
                         for n in notes]
        out.append(Table(t, "User's and producer's accuracy from the probability sample"))
    return out


def _zero_error_notes(table: pd.DataFrame) -> list[str]:
    """The 'note' column of an area or accuracy table ('' where empty; absent in older runs)."""
    if "note" not in table.columns:
        return [""] * len(table)
    return [v if isinstance(v, str) else "" for v in table["note"]]


def _accuracy_cell(accs: pd.DataFrame, key: str, i: int, noted: bool) -> str:
    """'0.95 +/- 0.02', or the interval's bounds where an error rate observed as zero made it one-sided."""
    row = accs.iloc[i]
    if noted and f"{key}_ci_low" in accs.columns:
        return f"{acc(row[key])} ({acc(row[f'{key}_ci_low'])} to {acc(row[f'{key}_ci_high'])})"
    return f"{acc(row[key])} +/- {acc(row[f'{key}_ci'])}"


def section_maps(run: RunFolder) -> Section:
    from .figures import class_map_png, confidence_png

    blocks: list = []
    a = run.areas
    if a is not None:
        share = a["mapped_area_ha"] / a["mapped_area_ha"].sum()
        blocks += [Paragraph("Mapped areas are pixel counts of the final map (after the minimum mapping unit). "
                             "They are not error-adjusted: each class's count carries its errors of commission "
                             "and omission."),
                   Table(pd.DataFrame({"class": a["class"], "mapped ha": [ha(v) for v in a["mapped_area_ha"]],
                                       "share": [pct(v) for v in share],
                                       **({"before the MMU, ha": [ha(v) for v in a["mapped_area_ha_before_mmu"]]}
                                          if "mapped_area_ha_before_mmu" in a and a["mapped_area_ha_before_mmu"]
                                          .notna().all() else {})}),
                         "Mapped class areas (final map; the per-pixel map before the minimum mapping unit)")]
    pri = run.step("mapping").get("priors")
    if pri:
        blocks += [Paragraph(
            "The class probabilities were adjusted to the class priors of the area before the class map was taken "
            f"({pri['method']}; {run.cite('priors', 'prior adjustment')}): the model was fitted under the "
            "training shares below (balanced classes), which differ from the landscape's, and a classifier's "
            "probabilities carry its training priors."),
                   Table(pd.DataFrame({"class": list(pri["priors"]),
                                       "training prior": [pct(v["training"]) for v in pri["priors"].values()],
                                       "area prior": [pct(v["estimated"]) for v in pri["priors"].values()]}),
                         "Class priors: training and area")]
    inv = run.step("inventory")
    if inv.get("n_polygons") is not None:
        blocks.append(Paragraph(
            f"The polygon inventory (inventory.gpkg) holds {inv['n_polygons']:,} polygons after a minimum mapping "
            f"unit of {inv['mmu_pixels']} pixels ({ha_small(inv['mmu_pixels'] * run.pixel_area_ha)} ha, "
            f"{inv['connectivity']}-connected), which changed {inv.get('pixels_changed_by_mmu', 0):,} pixels of the "
            f"per-pixel class map; polygon and raster areas per class agree to within "
            f"{inv.get('polygon_vs_raster_area_max_diff_ha', 0):g} ha."))
    _figure(blocks, "class_map.png", class_map_png(run), "Final class map, from the COG's overview.")
    _figure(blocks, "confidence.png", confidence_png(run),
            "Maximum class probability: low values mark pixels where the model hesitates between classes.")
    return Section("Maps and mapped areas", blocks or [Paragraph("The run wrote no maps.")])


def section_drivers(run: RunFolder) -> Section:
    d = run.drivers
    if d is None:
        return Section("Drivers per class", [Paragraph("Explanations were not computed for this run.")])
    cite = run.cite("tree_shap", "drivers per class")
    blocks: list = [Paragraph(
        f"SHAP values ({cite}) of a spatially stratified subsample of {d.get('n_rows', '?'):,} training pixels "
        "rank the features by their mean absolute contribution to each class's score. They describe how the "
        "model uses the features, not what causes a wetland class on the ground."
        + (" The model is hierarchical, so these values explain its leaf probabilities as a whole: shap's "
           f"model-agnostic {d.get('combined', {}).get('explainer', 'permutation')} explainer on the probability "
           f"scale against {d.get('combined', {}).get('n_background', '?')} background rows (an estimate, not "
           "exact TreeSHAP); the maps use exact TreeSHAP of each level's own model (explain/levels/)."
           if d.get("structure") == "hierarchical" else "")),
        Table(pd.DataFrame([{"class": c, "top features": ", ".join(f),
                             "top domains": ", ".join(f"{x['domain']} {pct(x['share'])}"
                                                      for x in d.get("top_domains", {}).get(c, []))}
                            for c, f in d.get("top_drivers", {}).items()]), "Top drivers per class")]
    if d.get("cluster_note"):
        blocks.append(Paragraph(d["cluster_note"]))
    stab = d.get("ranking_stability")
    if stab:
        blocks.append(Paragraph(
            f"Stability of the ranking: refitted on {len(stab['seeds']) - 1} bootstrap samples of the plots, the "
            f"models' importance rankings agree with the final model's with a mean Spearman rank correlation of "
            f"{stab['mean_spearman_rho']:.2f} (lowest {stab['min_spearman_rho']:.2f}). "
            + ("Rankings this stable can be read as the model's." if stab["min_spearman_rho"] >= 0.8 else
               "The ranking depends on which plots were sampled: read the top features as candidates, not as "
               "a fixed order.")))
    _figure(blocks, "importance.png", run.png("explain/importance.png"), "Mean absolute SHAP value per feature.")
    _figure(blocks, "domains.png", run.png("explain/domains.png"), "Share of SHAP importance by data domain.")
    _figure(blocks, "shap_maps.png", run.png("explain/shap_maps.png"),
            "SHAP contribution of each class's leading data domain over a window at the centre of the grid "
            "(red raises the class's score, blue lowers it).")
    return Section("Drivers per class", blocks)


def section_applicability(run: RunFolder) -> Section:
    rec = run.step("mapping")
    if "share_outside_applicability" not in rec:
        return Section("Area of applicability", [Paragraph("The area of applicability was not computed.")])
    from .figures import applicability_png

    share = rec["share_outside_applicability"]
    blocks: list = [Paragraph(
        f"The area of applicability ({run.cite('area_of_applicability', 'area of applicability')}) flags pixels "
        "whose features, weighted by their importance to the model, are more dissimilar to the training data "
        "than cross-validation explored (dissimilarity index above the threshold "
        f"{rec.get('applicability_threshold', float('nan')):g}). {pct(share)} of the mapped pixels lie outside it; "
        "predictions there extrapolate beyond the training data and the cross-validated accuracy says nothing "
        "about them.")]
    _figure(blocks, "applicability.png", applicability_png(run), "Inside and outside the area of applicability.")
    return Section("Area of applicability", blocks)


def section_monitoring(run: RunFolder) -> Section:
    """Water, trends, BACI and recovery from ``monitor/`` (built in :mod:`.monitoring`)."""
    from .monitoring import section_monitoring as build

    return build(run)


def section_limitations(run: RunFolder) -> Section:
    items = [t for t in (_hard_classes_text(run), _sample_weak_text(run), _resolution_text(run),
                         _aoa_limit_text(run)) if t]
    items.append("Labels are taken as correct: errors in the training plots bias the model, and errors in the "
                 "reference labels of a validation sample bias the accuracy and area estimates. Classes that "
                 "grade into each other on the ground (for example fen and bog, or marsh and swamp) are the "
                 "hardest to label consistently.")
    items.append(CAUTION)
    return Section("Limitations", [Bullets(tuple(items))])


def _confused_pairs(matrix: pd.DataFrame, n: int = 2) -> list[tuple[str, str, int]]:
    m = matrix.set_index(matrix.columns[0])
    names = list(m.columns)
    values = m.loc[names, names].to_numpy()
    pairs = [(names[i], names[j], int(values[i, j] + values[j, i]))
             for i in range(len(names)) for j in range(i + 1, len(names))]
    return sorted((p for p in pairs if p[2] > 0), key=lambda p: -p[2])[:n]


def _hard_classes_text(run: RunFolder) -> str:
    matrix, m = run.csv("validation/error_matrix.csv"), run.metrics
    if matrix is None or m is None:
        return ""
    pairs = _confused_pairs(matrix)
    per = pd.DataFrame(m["per_class"]).sort_values("f1")
    text = (f"Hard to separate with these data: in cross-validation the lowest F1 scores are {per.iloc[0]['class']} "
            f"({acc(per.iloc[0]['f1'])})")
    if len(per) > 1:
        text += f" and {per.iloc[1]['class']} ({acc(per.iloc[1]['f1'])})"
    if pairs:
        text += ", and the most frequent confusions are " + ", ".join(
            f"{a} with {b} ({c:,} out-of-fold pixels)" for a, b, c in pairs)
    return text + "."


def _sample_weak_text(run: RunFolder) -> str:
    t = run.csv("accuracy/accuracy_table.csv")
    if t is None or run.accuracy_summary is None:
        return ""
    low = t.sort_values("users").head(2)
    return ("In the probability sample the lowest user's accuracies are " + " and ".join(
        f"{r['class']} ({acc(r['users'])})" for _, r in low.iterrows()) +
        ": much of the area mapped as these classes is another class on the ground.")


def _resolution_text(run: RunFolder) -> str:
    mmu = run.project.get("output", {}).get("mmu_pixels", 1)
    px = run.pixel_size_m
    text = (f"Resolution: pixels are {px:g} m wide, so a feature narrower than a pixel (a narrow channel or "
            "riparian strip) is mixed with its surroundings")
    if mmu and mmu > 1:
        text += (f", and patches smaller than the minimum mapping unit of {mmu} pixels "
                 f"({ha_small(mmu * run.pixel_area_ha)} ha) were merged into their neighbours, so smaller wetlands are "
                 "absent from the inventory")
    return text + "."


def _aoa_limit_text(run: RunFolder) -> str:
    share = run.step("mapping").get("share_outside_applicability")
    if share is None:
        return ("The area of applicability was not computed, so pixels whose features lie outside the training "
                "data's range are not flagged.")
    return f"{pct(share)} of the mapped pixels lie outside the area of applicability; treat them with most care."


def section_versions(run: RunFolder) -> Section:
    v = dict(run.manifest.get("versions", {}))
    rows = [{"library": "wetlandflow", "version": run.manifest.get("wetlandflow", "?")}]
    rows += [{"library": k, "version": str(x)} for k, x in sorted(v.items())]
    blocks: list = [Paragraph("Versions recorded by the run (GDAL and PROJ as loaded by rasterio and pyproj)."),
                    Table(pd.DataFrame(rows), "Software versions of the run")]
    c = run.manifest.get("compute")
    if c:
        blocks.append(Paragraph(f"Computation: {c.get('scheduler', '?')}, {c.get('cpu_count', '?')} CPUs, "
                                f"{c.get('model_threads', '?')} model threads."))
    blocks.append(Paragraph(f"This report was generated by wetlandflow {__version__}; "
                            "`wetlandflow doctor` lists the geospatial stack of the current environment."))
    return Section("Software versions", blocks)


def section_reproduce(run: RunFolder) -> Section:
    project_file = run.manifest.get("project_file", "PROJECT.toml")
    command = run.manifest.get("command") or f"wetlandflow run {project_file}"
    blocks: list = [Paragraph(
        f"The run is reproduced by this command, run beside the project file with inputs whose SHA-256 match "
        f"those listed under Inputs, the same seed ({run.manifest.get('seed', '?')}) and the library versions "
        "above:"), Code(command)]
    if run.accuracy_summary is not None:
        blocks += [Paragraph("The accuracy assessment is reproduced from the labelled sample file:"),
                   Code(f"wetlandflow assess {project_file} FILE")]
    blocks += [Paragraph("This report is regenerated from the run folder with:"),
               Code(f"wetlandflow report {run.project.get('project', {}).get('output_dir') or run.path.name}")]
    steps = run.manifest.get("steps", {})
    if steps:
        blocks.append(Table(pd.DataFrame([{"step": k, "status": s.get("status", "?"),
                                           "seconds": s.get("seconds", ""), "cache key": s.get("key", ""),
                                           "reused": "yes" if s.get("reused") else ""} for k, s in steps.items()]),
                            "Steps of the run"))
    return Section("Reproducing this run", blocks)


def section_references(run: RunFolder) -> Section:
    entries = run.citations.entries()
    if not entries:
        return Section("References", [Paragraph("The run used no method with a published source.")])
    items = []
    for c in entries:
        mark = _RECORDED_MARK if c.reference is None else \
            _CHECK_MARKS.get(c.reference.checked, _CHECK_MARKS["not verified"])
        items.append(f"{c.text}{mark} Used for: {_uses(c.used_for)}.")
    return Section("References", [Paragraph(_REFERENCES_NOTE), Bullets(tuple(items))])


# How each reference's ``checked`` status reads in the list (see wetlandflow.report.references).
_CHECK_MARKS = {
    "verified": "",
    "secondary": " [not verified in the original; details as given in published reference lists]",
    "not verified": " [not verified in the original]",
}
_RECORDED_MARK = " [as recorded with the feature; not verified in the original]"
_REFERENCES_NOTE = (
    "Sources of the methods this run used, as cited above. Unmarked entries were checked in the work's own "
    "record (publisher, DOI or catalogue record); marked entries say how far they were checked.")


def _uses(used_for: list[str]) -> str:
    """'feature a', 'feature b', 'classifier' -> 'features a, b; classifier'."""
    feats = [u.removeprefix("feature ") for u in used_for if u.startswith("feature ")]
    other = [u for u in used_for if not u.startswith("feature ")]
    parts = ([f"feature{'s' if len(feats) > 1 else ''} {', '.join(feats)}"] if feats else []) + other
    return "; ".join(parts)


BUILDERS = (section_caution, section_summary, section_classes, section_study_area, section_inputs, section_features,
            section_training, section_validation_design, section_model, section_cv_accuracy, section_suspects,
            section_inventory_accuracy, section_maps, section_drivers, section_applicability, section_monitoring,
            section_limitations, section_versions, section_reproduce, section_references)


def _title(builder) -> str:
    """A section's title, by its builder's place in :data:`BUILDERS` (titles and builders stay in step)."""
    return SECTIONS[BUILDERS.index(builder)]


def build_sections(run: RunFolder) -> list[Section]:
    """All sections in :data:`SECTIONS` order; the references come last so they hold every citation made."""
    return [build(run) for build in BUILDERS]
