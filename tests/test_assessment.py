"""Validation sample design, label ingestion and error-adjusted areas for a finished run (the demo run)."""

from __future__ import annotations

import json

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest

from wetlandflow.accuracy.assessment import (
    assess,
    class_codes,
    coverage_study,
    design_sample,
    final_class_map,
    label_from_reference,
)
from wetlandflow.demo.landscape import load_truth
from wetlandflow.errors import OutputError
from wetlandflow.inputs.project import load_project


@pytest.fixture(scope="module")
def project(demo_run):
    return load_project(demo_run.run_dir.parent.parent / "project.toml")


@pytest.fixture(scope="module")
def sample_path(project):
    return design_sample(project, target_se=0.015, min_per_class=40, exclude_buffer_m=100.0, overwrite=True)


def test_sample_follows_the_design_and_keeps_away_from_plots(project, sample_path):
    design = json.loads((sample_path.parent / "sample_design.json").read_text())
    gdf = gpd.read_file(sample_path, layer="sample")
    assert "map_class" not in gdf.columns, "the interpreters' file does not show the map class"
    strata = pd.read_csv(sample_path.parent / "map_classes.csv")
    assert sorted(strata["sample_id"]) == sorted(gdf["sample_id"])
    counts = strata["map_class"].value_counts()
    assert counts.to_dict() == {k: v for k, v in design["per_class"].items() if v}
    assert min(design["per_class"].values()) >= 40
    assert (gdf["reference_class"].fillna("") == "").all(), "labels start empty for the interpreters"
    plots = gpd.read_file(project.plots.path).to_crs(gdf.crs)
    assert gdf.geometry.distance(plots.union_all()).min() >= 100.0
    with pytest.raises(OutputError, match="already exists"):
        design_sample(project, target_se=0.015, min_per_class=40)


def test_assessment_writes_adjusted_areas_and_accuracy(project, sample_path, tmp_path):
    truth = load_truth(project.file.parent)
    labelled = label_from_reference(sample_path, truth, class_codes(project), tmp_path / "labelled.gpkg")
    res = assess(project, labelled)
    areas = pd.read_csv(project.run_dir / "areas.csv")
    assert {"mapped_area_ha", "estimated_area_ha", "ci_low_ha", "ci_high_ha"} <= set(areas.columns)
    # error-adjusted areas re-distribute the mapped total, they do not change it
    np.testing.assert_allclose(areas["estimated_area_ha"].sum(), areas["mapped_area_ha"].sum(), rtol=1e-9)
    acc = pd.read_csv(project.run_dir / "accuracy" / "accuracy_table.csv")
    assert acc[["users", "producers"]].apply(lambda c: c.between(0, 1)).all().all()
    grouped = pd.read_csv(project.run_dir / "accuracy" / "grouped_area_table.csv")
    assert set(grouped["class"]) == {"upland", "open_water", "wetland"}
    assert 0.5 < res["overall_accuracy"] <= 1
    for fig in ("error_matrix.png", "areas.png"):
        assert (project.run_dir / "accuracy" / fig).stat().st_size > 0


def test_interval_coverage_near_nominal_and_map_counts_biased(project, sample_path):
    """Over 200 repeated stratified samples of the demo map labelled from its truth, the 95 % intervals of the
    stratified estimator (Olofsson et al. 2014) should cover the true class areas about 95 % of the time; a class
    below 85 % would show a broken estimator.  The map's pixel counts, by contrast, miss by far more."""
    cm = final_class_map(project.run_dir)
    truth = load_truth(project.file.parent).reindex_like(cm, method="nearest", tolerance=1.0)
    design = json.loads((sample_path.parent / "sample_design.json").read_text())
    codes = class_codes(project)
    alloc = {c: design["per_class"][n] for c, n in codes.items()}
    table = coverage_study(cm, truth, codes, allocation=alloc, n_reps=200, seed=11)
    print(table.round(3).to_string())
    assert (table["coverage"] >= 0.85).all(), table
    assert table["coverage"].mean() >= 0.90
    big = table["mapped_bias_ha"].abs() > 20
    assert big.any()
    assert (table.loc[big, "estimator_bias_ha"].abs() < 0.25 * table.loc[big, "mapped_bias_ha"].abs()).all()


def test_cli_sample_and_assess_print_tables_and_caution(project, tmp_path, capsys):
    from wetlandflow import CAUTION
    from wetlandflow.ui.cli import main

    assert main(["sample", str(project.file), "--target-se", "0.02", "--overwrite"]) == 0
    out = capsys.readouterr().out
    assert "validation sample:" in out and "reference_class" in out
    sample = project.run_dir / "validation_sample" / "sample.gpkg"
    labelled = label_from_reference(sample, load_truth(project.file.parent), class_codes(project),
                                    tmp_path / "labelled.gpkg")
    assert main(["assess", str(project.file), str(labelled)]) == 0
    out = capsys.readouterr().out
    assert "adjusted ha" in out and "95% CI" in out and CAUTION in out
    for name in project.classes.names:
        assert name in out
