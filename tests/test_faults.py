"""Faults: a run killed with SIGKILL in the middle of feature building or of prediction, then rerun.

For real: ``wetlandflow run`` is started as a subprocess on a small demo (128 x 128 px, 64 px chunks, so
the cube is written in many chunks and the map in 4 windows), the run folder is polled until the stage
is under way (the cube's temporary Zarr store exists; some prediction windows are recorded as done), and
the process is killed with ``os.kill(pid, SIGKILL)``, which no handler can intercept.  The same folder is
killed twice, first in feature building, then (rerun) in prediction, and finally rerun to the end:

* no final-named file is partial: every file or store under its final name opens and reads completely,
  and the manifest is valid JSON that still shows the killed step as running;
* rerunning finishes, resumes prediction at the first window not written, leaves no temporary behind,
  and gives results identical to an uninterrupted run (cube values, out-of-fold metrics, the data of
  every map, the area table).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rasterio
import tomli_w
import xarray as xr
from conftest import tiny_project_doc

pytestmark = pytest.mark.skipif(not hasattr(signal, "SIGKILL"), reason="needs POSIX signals")

MAPS = ("probability", "class", "confidence", "dissimilarity", "applicability", "class_final")


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> Path:
    """The demo folder with a light base project (optical and terrain features, 64 px chunks)."""
    folder = tmp_path_factory.mktemp("faults")
    doc = tiny_project_doc(folder, chunk_size=64)
    for name in ("reference", "killed"):
        doc["project"]["output_dir"] = f"runs/{name}"
        (folder / f"{name}.toml").write_text(tomli_w.dumps(doc))
    return folder


@pytest.fixture(scope="module")
def reference(demo) -> Path:
    """An uninterrupted run of the same project."""
    from wetlandflow.pipeline.run import run_project

    return run_project(demo / "reference.toml", progress=False).run_dir


def start_run(demo: Path, name: str) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-m", "wetlandflow.ui.cli", "run", "--quiet", f"{name}.toml"],
        cwd=demo,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
    )


def kill_when(proc: subprocess.Popen, ready, *, timeout: float = 300.0) -> None:
    """Poll ``ready()`` every few milliseconds; SIGKILL the run as soon as it is true."""
    t0 = time.monotonic()
    while not ready():
        if proc.poll() is not None:
            pytest.fail(
                f"the run ended (code {proc.returncode}) before the stage was reached: "
                f"{proc.stderr.read().decode()[-2000:]}"
            )
        if time.monotonic() - t0 > timeout:
            proc.kill()
            pytest.fail("the stage was not reached in time")
        time.sleep(0.005)
    os.kill(proc.pid, signal.SIGKILL)
    assert proc.wait(timeout=60) == -signal.SIGKILL


def step_status(run_dir: Path, step: str) -> str | None:
    try:
        return json.loads((run_dir / "manifest.json").read_text())["steps"].get(step, {}).get("status")
    except (OSError, ValueError, KeyError):
        return None


def windows_done(run_dir: Path) -> int:
    try:
        return len(json.loads((run_dir / "maps" / ".stage" / "windows_done.json").read_text())["done"])
    except (OSError, ValueError, KeyError):
        return 0


def assert_final_files_complete(run_dir: Path) -> None:
    """Every file under its final name (not a dot-named temporary or stage) reads completely."""
    from wetlandflow.features.cube import open_cube

    for path in sorted(run_dir.rglob("*")):
        rel = path.relative_to(run_dir)
        if any(part.startswith(".") for part in rel.parts) or any(p.suffix == ".zarr" for p in rel.parents):
            continue
        if path.suffix == ".zarr":
            open_cube(path).load()
        elif path.suffix == ".json":
            json.loads(path.read_text())
        elif path.suffix == ".tif":
            with rasterio.open(path) as src:
                src.read()
        elif path.suffix == ".parquet":
            pd.read_parquet(path)
        elif path.suffix == ".csv":
            pd.read_csv(path)


def leftovers(run_dir: Path) -> list[Path]:
    return [p for p in run_dir.rglob("*") if p.name.endswith(".partial") or p.name == ".stage"]


def raster_data(path: Path) -> np.ndarray:
    with rasterio.open(path) as src:
        return src.read()


def assert_same_results(run_dir: Path, reference: Path) -> None:
    from wetlandflow.features.cube import open_cube

    xr.testing.assert_identical(
        open_cube(run_dir / "features.zarr").load(), open_cube(reference / "features.zarr").load()
    )
    assert json.loads((run_dir / "validation" / "metrics.json").read_text()) == json.loads(
        (reference / "validation" / "metrics.json").read_text()
    )
    for name in MAPS:
        np.testing.assert_array_equal(
            raster_data(run_dir / "maps" / f"{name}.tif"),
            raster_data(reference / "maps" / f"{name}.tif"),
            err_msg=name,
        )
    pd.testing.assert_frame_equal(pd.read_csv(run_dir / "areas.csv"), pd.read_csv(reference / "areas.csv"))


def test_killed_in_features_then_in_prediction_then_rerun(demo, reference, monkeypatch):
    """One run folder: killed while writing the cube, rerun and killed while predicting, rerun to the end."""
    import wetlandflow.mapping.predict as mapping
    from wetlandflow.pipeline.run import run_project

    run_dir = demo / "runs" / "killed"
    n_windows = len(list(mapping.windows(read_grid(reference), 64)))
    assert n_windows >= 4

    # 1. killed while the cube is written: its temporary Zarr store exists and holds chunks
    kill_when(
        start_run(demo, "killed"),
        lambda: any(p.is_dir() and any(p.rglob("*.*")) for p in run_dir.glob(".features.zarr.*.partial")),
    )
    assert not (run_dir / "features.zarr").exists()
    assert step_status(run_dir, "features") == "running"  # the manifest tells what was under way
    assert_final_files_complete(run_dir)

    # 2. rerun, killed while predicting: some windows are staged, no map exists under its final name
    kill_when(start_run(demo, "killed"), lambda: 1 <= windows_done(run_dir) < n_windows - 1)
    done = windows_done(run_dir)
    assert step_status(run_dir, "features") == "done" and step_status(run_dir, "mapping") == "running"
    assert not any((run_dir / "maps" / f"{n}.tif").exists() for n in MAPS)
    assert_final_files_complete(run_dir)

    # 3. rerun to the end: prediction resumes at the first window not written
    predicted = []
    original = mapping._predict_window
    monkeypatch.setattr(mapping, "_predict_window", lambda *a, **k: predicted.append(1) or original(*a, **k))
    result = run_project(demo / "killed.toml", progress=False)
    assert all(s["status"] == "done" for s in result.manifest["steps"].values())
    assert result.manifest["steps"]["model"].get("reused")  # the steps the killed run finished are kept
    assert 1 <= len(predicted) <= n_windows - done  # windows written before the kill are not predicted again
    assert not leftovers(run_dir)
    assert_same_results(run_dir, reference)


def read_grid(run_dir: Path):
    from wetlandflow.inputs.grid import Grid

    return Grid.from_dict(json.loads((run_dir / "manifest.json").read_text())["steps"]["inputs"]["grid"])


# -- a disk that fills: the file-size limit (ulimit -f) in a subprocess -------------------------------------
def _limited_run(folder: Path, project: str, limit_bytes: int) -> subprocess.CompletedProcess:
    """``wetlandflow run`` in a child whose files may not grow beyond ``limit_bytes`` (RLIMIT_FSIZE).

    SIGXFSZ is ignored in the child (as CPython does by default), so that a write beyond the limit fails
    with ``OSError: [Errno 27] File too large`` instead of killing the process, as on a full disk (ENOSPC).
    """
    import resource

    def limit() -> None:
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit_bytes, limit_bytes))

    return subprocess.run([sys.executable, "-m", "wetlandflow.ui.cli", "run", "--quiet", project], cwd=folder,
                          preexec_fn=limit, capture_output=True, text=True, timeout=600)


@pytest.mark.skipif(not hasattr(signal, "SIGXFSZ"), reason="needs POSIX resource limits")
def test_a_full_disk_names_the_file_the_step_and_the_free_space(tmp_path):
    from test_lock import light_copy

    project = light_copy(tmp_path)
    run_dir = tmp_path / "runs" / "light"

    # 100 kB: the cube's chunks fit, the samples table (about 330 kB) does not; pyarrow raises EFBIG.
    # 400 kB (rerun): the samples fit now; the map stage (uncompressed 256 x 256 tiles) would not, and
    # GDAL only prints a failed block write, so the run refuses before writing it.
    for limit, step, file in ((100_000, "samples", "samples.parquet"),
                              (400_000, "mapping", "maps/.stage/probability.tif")):
        proc = _limited_run(tmp_path, project.name, limit)
        message = proc.stderr.strip()
        assert proc.returncode == 2, message
        assert message.count("\n") == 0 and "Traceback" not in message and "unexpected" not in message
        assert f"could not write {run_dir / file} in step '{step}'" in message, message
        assert "free on the disk of" in message and "ulimit -f" in message
        record = json.loads((run_dir / "manifest.json").read_text())["steps"][step]
        assert record["status"] == "failed" and record["error"].startswith("OutputError: could not write")
    assert not (run_dir / "maps" / "probability.tif").exists() and not leftovers(run_dir)
    steps = json.loads((run_dir / "manifest.json").read_text())["steps"]
    assert steps["samples"]["status"] == "done" and steps["features"].get("reused")


def test_a_class_map_with_an_unwritten_block_is_refused(tmp_path):
    """A block GDAL failed to write reads back as no data; inside the area of interest that cannot be a
    result (every pixel there is classified), so the map is refused, naming the file, step and free space."""
    from wetlandflow.errors import OutputError
    from wetlandflow.pipeline.checks import check_class_map_complete, check_layer_complete

    aoi = xr.DataArray(np.ones((64, 64), bool), dims=("y", "x"))
    aoi[:, :8] = False
    values = np.where(aoi.values, 2, 0).astype(np.uint8)
    path = tmp_path / "class.tif"
    profile = {"driver": "GTiff", "width": 64, "height": 64, "count": 1, "dtype": "uint8", "nodata": 0,
               "tiled": True, "blockxsize": 16, "blockysize": 16}
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(values[None])
    check_class_map_complete(path, aoi, 3, step="mapping")  # complete: no error

    values[16:32, 16:32] = 0  # one block inside the AOI never written
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(values[None])
    expected = r"in step 'inventory'.*256 pixel\(s\) inside the area of interest have no value"
    with pytest.raises(OutputError, match=expected) as e:
        check_class_map_complete(path, aoi, 3, step="inventory")
    assert f"could not write {path}" in str(e.value) and "free on the disk of" in str(e.value)

    proba = np.where(aoi.values, 0.5, np.nan).astype(np.float32)[None].repeat(2, axis=0)
    proba_path = tmp_path / "probability.tif"
    for gap in (False, True):
        if gap:
            proba[:, 40:56, 40:56] = np.nan  # an unwritten tile holds no band
        float_profile = profile | {"count": 2, "dtype": "float32", "nodata": np.nan}
        with rasterio.open(proba_path, "w", **float_profile) as dst:
            dst.write(proba)
        if not gap:
            check_layer_complete(proba_path, aoi, step="mapping")
    with pytest.raises(OutputError, match=r"in step 'mapping'.*256 pixel\(s\) inside the area of interest"):
        check_layer_complete(proba_path, aoi, step="mapping")
