"""Same project and seed, same numbers; a changed seed changes them; reruns reuse what did not change."""

from __future__ import annotations

import json
import shutil

import pandas as pd
import pytest
from conftest import project_variant

from wetlandflow.pipeline.run import run_project

TABLES = ("samples.parquet", "validation/oof_predictions.parquet", "validation/error_matrix.csv", "areas.csv",
          "inventory_areas.csv")


def _fingerprint(result) -> dict:
    steps = result.manifest["steps"]
    rasters = {**steps["mapping"]["data_sha256"], **steps["inventory"]["data_sha256"]}
    tables = {t: pd.read_parquet(result.run_dir / t) if t.endswith(".parquet") else pd.read_csv(result.run_dir / t)
              for t in TABLES}
    return {"rasters": rasters, "tables": tables}


def _variant(light_demo, name: str, **changes):
    return project_variant(light_demo, name, **{"project.output_dir": f"runs/{name}", **changes})


@pytest.fixture(scope="module")
def two_runs(light_demo, light_run):
    """The shared light run and a second run of the same project and seed in another folder."""
    return light_run, run_project(_variant(light_demo, "rep_b"), progress=False)


@pytest.mark.slow
def test_same_seed_gives_identical_tables_and_pixels(two_runs):
    a, b = (_fingerprint(r) for r in two_runs)
    assert a["rasters"] == b["rasters"]
    for name in TABLES:
        pd.testing.assert_frame_equal(a["tables"][name], b["tables"][name], check_exact=True)
    assert two_runs[0].manifest["config_sha256"] != ""  # the resolved config is recorded


@pytest.mark.slow
def test_changed_seed_changes_results(light_demo, two_runs):
    # Started from a copy of the first run's folder: the cube does not depend on the seed and is reused,
    # everything the seed touches (pixel subsample, folds, model) is recomputed.
    shutil.copytree(two_runs[0].run_dir, light_demo.parent / "runs" / "rep_c")
    c = run_project(_variant(light_demo, "rep_c", **{"project.seed": 99}), progress=False)
    assert c.manifest["steps"]["features"].get("reused")
    assert not any(c.manifest["steps"][s].get("reused") for s in ("samples", "validation", "model", "mapping"))
    fa, fc = _fingerprint(two_runs[0]), _fingerprint(c)
    assert fa["rasters"]["probability"] != fc["rasters"]["probability"]
    assert not fa["tables"]["samples.parquet"].equals(fc["tables"]["samples.parquet"])


@pytest.mark.slow
def test_rerun_reuses_unchanged_steps_and_recomputes_what_a_change_touches(light_demo, two_runs):
    first = two_runs[0]
    again = run_project(_variant(light_demo, "rep_b"), progress=False)
    reused = {k for k, s in again.manifest["steps"].items() if s.get("reused")}
    assert reused == set(again.manifest["steps"]) - {"inputs"}
    assert _fingerprint(again)["rasters"] == _fingerprint(first)["rasters"]
    # a model change leaves the cube and the samples alone
    changed = run_project(_variant(light_demo, "rep_b", **{"model.max_depth": 3}), progress=False)
    steps = changed.manifest["steps"]
    assert steps["features"].get("reused") and steps["samples"].get("reused")
    assert not any(steps[s].get("reused") for s in ("validation", "model", "mapping", "inventory"))
    manifest = json.loads((changed.run_dir / "manifest.json").read_text())
    assert manifest["steps"]["model"]["hyperparameters"]["max_depth"] == 3
