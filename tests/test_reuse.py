"""A cached step is reused only when what it wrote and what it used are still what the manifest recorded.

A reference run of the committed small demo is copied into fresh run folders, which are then tampered
with as a user (or a sync tool) might: the model bundle replaced by another project's bundle with the
same feature names, a map overwritten, the cross-validation metrics and the area table edited.  Rerunning
must rerun exactly the tampered steps, say so (printed, and ``rerun_because`` in the manifest), and give
outputs equal to the untampered run.
"""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rasterio
import tomli_w
from conftest import read_toml
from test_faults import assert_same_results
from test_lock import light_copy

from wetlandflow.inputs.io import fingerprint


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("reuse")
    light_copy(folder, "light")
    doc = read_toml(folder / "light.toml")  # another project: other training pixels, same feature names
    doc["project"].update(output_dir="runs/foreign", seed=11)
    doc["samples"] = {"max_pixels_per_plot": 8}
    (folder / "foreign.toml").write_text(tomli_w.dumps(doc))
    return folder


@pytest.fixture(scope="module")
def reference(demo) -> Path:
    from wetlandflow.pipeline.run import run_project

    return run_project(demo / "light.toml", progress=False).run_dir


@pytest.fixture(scope="module")
def foreign(demo) -> Path:
    from wetlandflow.pipeline.run import run_project

    return run_project(demo / "foreign.toml", progress=False).run_dir


def copy_of_reference(demo: Path, reference: Path, name: str) -> Path:
    """A project ``<name>.toml`` whose run folder is a copy of the reference run (all steps reusable)."""
    doc = read_toml(demo / "light.toml")
    doc["project"]["output_dir"] = f"runs/{name}"
    (demo / f"{name}.toml").write_text(tomli_w.dumps(doc))
    shutil.copytree(reference, demo / "runs" / name)
    return demo / f"{name}.toml"


def steps(result) -> dict:
    return result.manifest["steps"]


def test_an_untampered_copy_reuses_every_step(demo, reference):
    from wetlandflow.pipeline.run import run_project

    result = run_project(copy_of_reference(demo, reference, "untouched"), progress=False)
    assert all(steps(result)[s].get("reused") for s in steps(result) if s != "inputs")
    assert_same_results(result.run_dir, reference)


def test_a_foreign_model_bundle_is_refitted_not_reused(demo, reference, foreign, capsys):
    from wetlandflow.pipeline.run import run_project

    project = copy_of_reference(demo, reference, "foreign_model")
    run_dir = project.parent / "runs" / "foreign_model"
    ours, theirs = (json.loads((d / "model" / "bundle.json").read_text()) for d in (reference, foreign))
    assert ours["features"] == theirs["features"]
    assert ours["training_data_sha256"] != theirs["training_data_sha256"]
    shutil.rmtree(run_dir / "model")
    shutil.copytree(foreign / "model", run_dir / "model")

    result = run_project(project, progress=False)
    model = steps(result)["model"]
    assert not model.get("reused") and model["status"] == "done"
    assert any("model changed" in r for r in model["rerun_because"])
    assert "rerunning step 'model'" in capsys.readouterr().err
    assert json.loads((run_dir / "model" / "bundle.json").read_text())["training_data_sha256"] == \
        ours["training_data_sha256"]
    assert_same_results(run_dir, reference)


def test_a_foreign_bundle_with_a_forged_fingerprint_is_caught_by_its_training_hash(demo, reference, foreign):
    """Even when the manifest's fingerprint is made to match (an older manifest, a copied folder), the
    bundle's ``training_data_sha256`` must equal the hash of this run's samples."""
    from wetlandflow.pipeline.run import run_project

    project = copy_of_reference(demo, reference, "forged")
    run_dir = project.parent / "runs" / "forged"
    shutil.rmtree(run_dir / "model")
    shutil.copytree(foreign / "model", run_dir / "model")
    manifest = json.loads((run_dir / "manifest.json").read_text())
    forged = fingerprint(run_dir / "model")
    for rec in manifest["steps"].values():
        if "model" in rec.get("fingerprints", {}):
            rec["fingerprints"]["model"] = forged
    (run_dir / "manifest.json").write_text(json.dumps(manifest))

    result = run_project(project, progress=False)
    reasons = steps(result)["model"]["rerun_because"]
    assert any("trained on other data" in r for r in reasons), reasons
    assert_same_results(run_dir, reference)


def test_a_tampered_map_metrics_and_area_table_rerun_their_steps(demo, reference, capsys):
    from wetlandflow.pipeline.run import run_project

    project = copy_of_reference(demo, reference, "tampered")
    run_dir = project.parent / "runs" / "tampered"
    class_tif = run_dir / "maps" / "class.tif"
    with rasterio.open(class_tif) as src:  # every pixel one class: what two runs in one folder left
        profile, values = src.profile, src.read()
    with rasterio.open(class_tif, "w", **(profile | {"driver": "GTiff"})) as dst:
        dst.write(np.where(values > 0, 3, 0).astype(values.dtype))
    metrics = json.loads((run_dir / "validation" / "metrics.json").read_text())
    (run_dir / "validation" / "metrics.json").write_text(json.dumps({**metrics, "overall_accuracy": 0.99}))
    areas = pd.read_csv(run_dir / "areas.csv")
    areas.loc[0, "mapped_area_ha"] += 10.0
    areas.to_csv(run_dir / "areas.csv", index=False)

    result = run_project(project, progress=False)
    rec = steps(result)
    for step, what in (("mapping", "maps/class.tif changed"), ("validation", "validation changed"),
                       ("inventory", "mapped areas in areas.csv differ")):
        assert not rec[step].get("reused"), step
        assert any(what in r for r in rec[step]["rerun_because"]), (step, rec[step]["rerun_because"])
    assert rec["features"].get("reused") and rec["samples"].get("reused") and rec["model"].get("reused")
    err = capsys.readouterr().err
    assert all(f"rerunning step '{s}'" in err for s in ("mapping", "validation", "inventory"))
    assert_same_results(run_dir, reference)


def test_the_full_fingerprint_is_sha256_and_the_sampled_one_sees_metadata_and_size(tmp_path):
    """Full kind: the SHA-256 of the bytes (checked against Python's hashlib, FIPS 180-4).  Sampled kind
    (stores above the limit): a change of a file's size or of a metadata file changes it."""
    f = tmp_path / "table.csv"
    f.write_bytes(b"class,pixels\nmarsh,3\n")
    assert fingerprint(f) == "sha256:" + hashlib.sha256(f.read_bytes()).hexdigest()

    store = tmp_path / "cube.zarr"
    (store / "ndvi").mkdir(parents=True)
    (store / ".zgroup").write_text('{"zarr_format": 2}')
    (store / "ndvi" / ".zarray").write_text('{"chunks": [64, 64]}')
    for i in range(100):
        (store / "ndvi" / f"{i}.0").write_bytes(bytes([i]) * 300)
    before = fingerprint(store, full_limit=1000)
    assert before.startswith("sampled:") and fingerprint(store, full_limit=1000) == before
    (store / "ndvi" / ".zarray").write_text('{"chunks": [32, 32]}')
    assert fingerprint(store, full_limit=1000) != before
    (store / "ndvi" / ".zarray").write_text('{"chunks": [64, 64]}')
    (store / "ndvi" / "57.0").write_bytes(bytes([57]) * 299)
    assert fingerprint(store, full_limit=1000) != before
