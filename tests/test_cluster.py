"""The same run on a dask.distributed LocalCluster gives the same maps as in-process threads."""

from __future__ import annotations

import json

import numpy as np
import pytest
import rasterio

from wetlandflow.pipeline.run import SCHEDULER_ENV, run_project


@pytest.mark.slow
def test_local_cluster_run_matches_threaded_run(light_demo, light_run, monkeypatch):
    from conftest import project_variant

    threaded = light_run
    assert threaded.manifest["compute"]["scheduler"] == "threads (this process)"
    monkeypatch.setenv(SCHEDULER_ENV, "local")
    clustered = run_project(project_variant(light_demo, "cluster", **{"project.output_dir": "runs/cluster"}),
                            progress=False)
    assert clustered.manifest["compute"]["scheduler"].startswith("tcp://")
    assert not any(s.get("reused") for s in clustered.manifest["steps"].values())
    assert json.loads((clustered.run_dir / "manifest.json").read_text())["compute"] == clustered.manifest["compute"]
    for name in ("probability", "class_final", "applicability"):
        with rasterio.open(threaded.run_dir / "maps" / f"{name}.tif") as a, \
             rasterio.open(clustered.run_dir / "maps" / f"{name}.tif") as b:
            np.testing.assert_array_equal(a.read(), b.read())
    assert clustered.metrics["overall_accuracy"] == threaded.metrics["overall_accuracy"]
