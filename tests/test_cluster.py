"""The same run on a dask.distributed LocalCluster gives the same maps as in-process threads."""

from __future__ import annotations

import json

import numpy as np
import pytest
import rasterio
import tomli_w

from wetlandflow.run import SCHEDULER_ENV, run_project

try:
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python < 3.11
    import tomli as tomllib


@pytest.fixture(scope="module")
def small_project(tmp_path_factory):
    """A 300 x 300 px demo with a light model and 3 folds, to keep two full runs short."""
    from wetlandflow.demo import make_demo

    pf = make_demo(tmp_path_factory.mktemp("cluster_demo"), size=300, seed=1)
    data = tomllib.loads(pf.read_text())
    data["model"]["n_estimators"] = 60
    data["validation"]["n_folds"] = 3
    data["validation"]["block_size_m"] = 300
    data["output"] = {"explain": False, "chunk_size": 128}
    pf.write_text(tomli_w.dumps(data))
    return pf


@pytest.mark.slow
def test_local_cluster_run_matches_threaded_run(small_project, monkeypatch):
    monkeypatch.setenv(SCHEDULER_ENV, "")
    threaded = run_project(small_project, progress=False)
    (threaded.run_dir.parent / "threads").mkdir()
    for name in ("probability", "class_final", "applicability"):
        (threaded.run_dir / "maps" / f"{name}.tif").rename(threaded.run_dir.parent / "threads" / f"{name}.tif")
    monkeypatch.setenv(SCHEDULER_ENV, "local")
    clustered = run_project(small_project, progress=False)
    assert clustered.manifest["compute"]["scheduler"].startswith("tcp://")
    assert json.loads((clustered.run_dir / "manifest.json").read_text())["compute"] == clustered.manifest["compute"]
    for name in ("probability", "class_final", "applicability"):
        with rasterio.open(threaded.run_dir.parent / "threads" / f"{name}.tif") as a, \
             rasterio.open(clustered.run_dir / "maps" / f"{name}.tif") as b:
            np.testing.assert_array_equal(a.read(), b.read())
    assert clustered.metrics["overall_accuracy"] == threaded.metrics["overall_accuracy"]
