"""End to end on the default-size demo: the run folder, its georeferencing, and accuracy against the truth."""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import rasterio

from wetlandflow import CAUTION
from wetlandflow.demo.landscape import load_truth
from wetlandflow.inputs.layers import project_grid
from wetlandflow.inputs.project import load_project


def test_run_folder_is_complete(demo_run):
    d = demo_run.run_dir
    for rel in ("manifest.json", "features.zarr", "samples.parquet", "validation/error_matrix.csv",
                "validation/metrics.json", "validation/oof_predictions.parquet", "model/bundle.json",
                "maps/probability.tif", "maps/class.tif", "maps/confidence.tif", "maps/class_final.tif",
                "maps/dissimilarity.tif", "maps/applicability.tif", "inventory.gpkg", "inventory_areas.csv",
                "explain/importance.csv", "explain/domain_importance.csv", "explain/drivers.json", "areas.csv",
                "explain/shap_maps.png", "explain/waterfall_centre.png", "explain/ranking_stability.csv"):
        assert (d / rel).exists(), rel
    manifest = json.loads((d / "manifest.json").read_text())
    assert all(s["status"] == "done" for s in manifest["steps"].values())
    assert set(manifest["steps"]) == {"inputs", "features", "samples", "validation", "model", "mapping",
                                       "inventory", "explain"}
    assert all(len(v["sha256"]) == 64 for v in manifest["inputs"].values())
    versions = manifest["versions"]
    assert versions["gdal"] and versions["proj (rasterio)"] and versions["proj (pyproj)"] and versions["geos"]
    assert manifest["command"] == "wetlandflow run project.toml"
    assert set(manifest["steps"]["features"]["season_coverage"]) == set(manifest["project"]["seasons"])
    assert not list(d.rglob("*.partial"))
    drivers = json.loads((d / "explain" / "drivers.json").read_text())
    assert drivers["maps"] and all((d / "explain" / m["file"]).exists() for m in drivers["maps"].values())
    assert -1 <= drivers["ranking_stability"]["min_spearman_rho"] <= drivers["ranking_stability"]["mean_spearman_rho"] <= 1


def test_maps_are_on_the_grid(demo_run):
    project = load_project(demo_run.run_dir.parent.parent / "project.toml")
    grid = project_grid(project)
    for name in ("probability", "class", "confidence"):
        with rasterio.open(demo_run.run_dir / "maps" / f"{name}.tif") as src:
            assert src.crs.to_string() == grid.crs
            assert src.transform == grid.transform
            assert (src.height, src.width) == grid.shape
    with rasterio.open(demo_run.run_dir / "maps" / "probability.tif") as src:
        assert src.descriptions == project.classes.names


def test_probabilities_sum_to_one_and_class_is_argmax(demo_run):
    with rasterio.open(demo_run.run_dir / "maps" / "probability.tif") as src:
        p = src.read()
    with rasterio.open(demo_run.run_dir / "maps" / "class.tif") as src:
        c = src.read(1)
    valid = c > 0
    assert valid.mean() > 0.8
    np.testing.assert_allclose(p[:, valid].sum(axis=0), 1.0, atol=1e-5)
    np.testing.assert_array_equal(c[valid], np.argmax(p[:, valid], axis=0) + 1)
    assert np.isnan(p[:, ~valid]).all()


def map_and_truth(demo_run):
    import rioxarray

    c = rioxarray.open_rasterio(demo_run.run_dir / "maps" / "class.tif").isel(band=0, drop=True)
    truth = load_truth(demo_run.run_dir.parent.parent).reindex_like(c, method="nearest", tolerance=1.0)
    return c.values, truth.values


def test_map_accuracy_against_truth_far_above_chance(demo_run):
    c, truth = map_and_truth(demo_run)
    both = (truth > 0) & (c > 0)
    acc = (truth[both] == c[both]).mean()
    shares = np.bincount(truth[both], minlength=7)[1:] / both.sum()
    # chance agreement of a map with the same class shares drawn independently: sum of squared shares
    chance = float((shares**2).sum())
    assert acc > chance + 0.3, (acc, chance)
    assert acc > 0.7


def test_summary_states_accuracy_areas_and_caution(demo_run):
    text = demo_run.summary()
    assert "overall accuracy" in text and "ha" in text
    assert CAUTION in text
    for name in ("upland", "open_water", "marsh", "swamp", "fen", "bog"):
        assert name in text


def test_inventory_polygons_match_the_final_raster(demo_run):
    import geopandas as gpd

    d = demo_run.run_dir
    gdf = gpd.read_file(d / "inventory.gpkg", layer="inventory")
    with rasterio.open(d / "maps" / "class_final.tif") as src:
        final = src.read(1)
        pixel_ha = abs(src.transform.a * src.transform.e) / 1e4
    counts = np.bincount(final.ravel(), minlength=7)[1:]
    per_class = gdf.groupby("class_code")["area_ha"].sum().reindex(range(1, 7), fill_value=0.0).to_numpy()
    np.testing.assert_allclose(per_class, counts * pixel_ha, rtol=1e-9)
    assert gdf["polygon_id"].is_unique
    assert (gdf["n_pixels"] >= 9).sum() >= 0.95 * len(gdf)  # below-MMU patches survive only with no neighbour
    assert gdf["share_outside_aoa"].between(0, 1).all()


def test_applicability_flags_cover_the_mapped_pixels(demo_run):
    d = demo_run.run_dir
    with rasterio.open(d / "maps" / "applicability.tif") as a, rasterio.open(d / "maps" / "class.tif") as c:
        flag, cls = a.read(1), c.read(1)
    np.testing.assert_array_equal(flag == 255, cls == 0)
    share = json.loads((d / "manifest.json").read_text())["steps"]["mapping"]["share_outside_applicability"]
    assert share == round(float((flag == 0).sum() / (flag != 255).sum()), 4)


# -- the tables a run writes: fixed columns, documented in docs/outputs.md ---------------------------------
DOCS_OUTPUTS = Path(__file__).resolve().parent.parent / "docs" / "outputs.md"


def documented_tables() -> dict[str, tuple[str, list[str]]]:
    """``{file pattern: (heading, [column names in order])}`` from the tables of docs/outputs.md."""
    tables: dict[str, tuple[str, list[str]]] = {}
    current = None
    for line in DOCS_OUTPUTS.read_text().splitlines():
        if line.startswith("### "):
            current = re.match(r"### `([^`]+)`", line).group(1)
            tables[current] = (line, [])
        elif current and line.startswith("| `"):
            tables[current][1].append(line.split("`")[1])
    return tables


def matches_documented(columns: list[str], documented: list[str], values: dict[str, str]) -> bool:
    """True when ``columns`` are ``documented`` in order, each ``<placeholder>`` standing for one or more
    consecutive columns whose placeholder part matches ``values[placeholder]`` (a regular expression)."""
    i = 0
    for k, doc in enumerate(documented):
        m = re.fullmatch(r"(.*)<(\w+)>(.*)", doc)
        if m is None:
            if i >= len(columns) or columns[i] != doc:
                return False
            i += 1
            continue
        pattern = re.compile(re.escape(m.group(1)) + f"(?:{values[m.group(2)]})" + re.escape(m.group(3)))
        following = documented[k + 1] if k + 1 < len(documented) else None
        start = i
        while i < len(columns) and pattern.fullmatch(columns[i]) and columns[i] != following:
            i += 1
        if i == start:
            return False
    return i == len(columns)


def test_every_table_has_the_documented_columns_and_areas_csv_keeps_them_through_assess(tmp_path):
    """Each CSV, Parquet and GeoPackage table of a run folder (run with explanations, then `sample` and
    `assess`) is listed in docs/outputs.md with exactly its columns; ``areas.csv`` has the same columns
    before and after the assessment, its mapped columns unchanged, its error-adjusted columns empty
    before and equal to the assessment's area table after."""
    import geopandas as gpd
    import pandas as pd
    import pyogrio
    import rioxarray
    import tomli_w
    from conftest import read_toml
    from test_lock import light_copy

    from wetlandflow.accuracy.assessment import (
        ADJUSTED_AREA_COLUMNS,
        AREAS_COLUMNS,
        assess,
        class_codes,
        design_sample,
        label_from_reference,
    )
    from wetlandflow.pipeline.run import run_project

    project_file = light_copy(tmp_path)
    doc = read_toml(project_file)
    doc["output"].update(explain=True, explain_rows=60, explain_seeds=2)
    project_file.write_text(tomli_w.dumps(doc))
    result = run_project(project_file, progress=False)
    run_dir = result.run_dir
    before = pd.read_csv(run_dir / "areas.csv")
    assert tuple(before.columns) == AREAS_COLUMNS
    assert before[list(ADJUSTED_AREA_COLUMNS)].isna().all().all()

    project = load_project(project_file)
    # the small fixture's mapped open water lies within 100 m (the default buffer) of its training plots
    sample = design_sample(project, min_per_class=8, target_se=0.05, exclude_buffer_m=20.0)
    truth = rioxarray.open_rasterio(tmp_path / "truth.tif").isel(band=0, drop=True)
    labelled = label_from_reference(sample, truth, class_codes(project), tmp_path / "labelled.gpkg")
    res = assess(project, labelled)
    after = pd.read_csv(run_dir / "areas.csv")
    assert tuple(after.columns) == AREAS_COLUMNS
    pd.testing.assert_frame_equal(after[["class", "pixels", "mapped_area_ha", "mapped_share"]],
                                  before[["class", "pixels", "mapped_area_ha", "mapped_share"]])
    adjusted = res["area_table"].set_index("class").loc[after["class"]]
    for col in ADJUSTED_AREA_COLUMNS[:-1]:
        np.testing.assert_allclose(after[col].to_numpy(), adjusted[col].to_numpy(), rtol=1e-12, err_msg=col)
    assert (after["confidence"] == 0.95).all()
    # a rerun keeps the assessment: the final map did not change, and areas.csv checks out
    again = run_project(project_file, progress=False)
    assert again.manifest["steps"]["inventory"].get("reused")
    pd.testing.assert_frame_equal(pd.read_csv(run_dir / "areas.csv"), after)

    bundle = json.loads((run_dir / "model" / "bundle.json").read_text())
    names = list(project.classes.names)
    groups = list(project.classes.parents) + [c for c in names if not any(
        c in children for children in project.classes.parents.values())]
    values = {"class": "|".join(map(re.escape, names)), "group": "|".join(map(re.escape, groups)),
              "feature": "|".join(map(re.escape, bundle["features"])), "fold": r"\d+", "seed": r"\d+",
              "filter": r"[a-z0-9]+"}
    docs = documented_tables()
    seen = set()
    for path in sorted(run_dir.rglob("*")):
        rel = path.relative_to(run_dir).as_posix()
        if path.suffix not in (".csv", ".parquet", ".gpkg") or any(p.startswith(".") or p.endswith(".zarr")
                                                                    for p in rel.split("/")):
            continue
        grouped = re.sub(r"/grouped_", "/", rel)
        key = next((k for k in docs if re.fullmatch(re.sub(r"<\w+>", "[^/]+", re.escape(k)), grouped)), None)
        assert key is not None, f"{rel} is not documented in docs/outputs.md"
        seen.add(key)
        if path.suffix == ".gpkg":
            layer = re.search(r"layer `(\w+)`", docs[key][0]).group(1)
            assert [name for name, _ in pyogrio.list_layers(path)] == [layer], rel
            columns = list(gpd.read_file(path, layer=layer).columns)
        else:
            table = pd.read_csv(path) if path.suffix == ".csv" else pd.read_parquet(path)
            columns = list(table.columns)
        local = values | ({"class": values["group"]} if grouped != rel else {})
        assert matches_documented(columns, docs[key][1], local), (rel, columns, docs[key][1])
    assert all(k in seen or "only" in docs[k][0] for k in docs), set(docs) - seen
