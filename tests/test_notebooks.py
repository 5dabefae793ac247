"""The template notebooks: committed clean, and each executes headless (nbclient) on one small demo run.

One light demo project is generated and run once per session (:func:`shared_notebook_run`, also used by
``test_widgets.py`` and ``test_browser.py``); every notebook then runs against it with parameters that keep
its own experiments small.
"""

from __future__ import annotations

import ast
import base64
import json
import sys
from pathlib import Path

import nbformat
import pytest

NOTEBOOKS = Path(__file__).resolve().parent.parent / "notebooks"
TEMPLATES = (
    "01_project_and_inputs",
    "02_features",
    "03_validation_and_training",
    "04_explain",
    "05_map_inventory",
    "06_validation_sample",
    "07_monitoring",
)

# Features left out of the light project: the slowest to build (SAR water frequency and its hydroperiod,
# the large-radius TPI); every domain stays represented.
LIGHT_FEATURES = [
    "optical",
    "sar_temporal",
    "elevation",
    "slope",
    "twi",
    "curvature",
    "depression_depth",
    "hand",
    "mrvbf",
    "mrrtf",
]


def shared_notebook_run(tmp_path_factory) -> Path:
    """The project file of a 200 x 200 px demo with a light model, run once per test session.

    The finished run folder lives under the session's base temporary folder, so the test modules that
    need a run share it whichever comes first.
    """
    import tomli_w

    from wetlandflow.demo.landscape import make_demo
    from wetlandflow.pipeline.run import run_project

    root = tmp_path_factory.getbasetemp() / "shared_notebook_demo"
    project_file = root / "notebooks.toml"
    if (root / "runs" / "notebooks" / "maps" / "class_final.tif").exists():
        return project_file
    demo = make_demo(root, size=200, seed=1, archive=True)
    data = tomllib_loads(demo.read_text())
    data["project"]["output_dir"] = "runs/notebooks"
    data.setdefault("features", {})["select"] = LIGHT_FEATURES
    data.setdefault("model", {})["n_estimators"] = 60
    data.setdefault("validation", {}).update(n_folds=3, block_size_m=300.0)
    data.setdefault("output", {}).update(explain=False, chunk_size=128)
    project_file.write_text(tomli_w.dumps(data))
    run_project(project_file, progress=False)
    return project_file


def tomllib_loads(text: str) -> dict:
    if sys.version_info >= (3, 11):
        import tomllib
    else:  # pragma: no cover
        import tomli as tomllib
    return tomllib.loads(text)


@pytest.fixture(scope="module")
def project_file(tmp_path_factory) -> Path:
    return shared_notebook_run(tmp_path_factory)


def small_parameters(name: str, project_file: Path, tmp: Path) -> dict:
    """Parameters that keep each notebook's own computations small (the run itself is shared)."""
    common = {"project_file": str(project_file), "run_if_missing": False}
    return {
        "01_project_and_inputs": {
            "project_file": str(project_file),
            "input_preview_px": 100,
            "edited_project_file": str(tmp / "edited.toml"),
        },
        "02_features": {**common, "preview_px": 300},
        "03_validation_and_training": {
            **common,
            "experiment_trees": 15,
            "model_kinds": ["xgboost", "random_forest"],
            "tune_grid": {"max_depth": [3]},
            "selection_max_features": 3,
            "selection_pool": 5,
        },
        "04_explain": {**common, "explain_rows": 200, "shap_map_px": 60},
        "05_map_inventory": {**common, "preview_px": 300},
        # the 2 km demo is dense with training plots: a 100 m buffer would leave open water without pixels
        "06_validation_sample": {**common, "redraw_sample": True, "exclude_buffer_m": 10.0},
        "07_monitoring": {"project_file": str(project_file), "preview_px": 200},
    }[name]


def outputs(nb, kind: str) -> list:
    """Every output of a notebook carrying ``kind`` (a MIME type, or "stdout"/"stderr")."""
    found = []
    for cell in nb.cells:
        for out in cell.get("outputs", []):
            if out.get("output_type") == "stream" and out.get("name") == kind:
                found.append(out["text"])
            elif kind in out.get("data", {}):
                found.append(out["data"][kind])
    return found


# -- the committed templates ---------------------------------------------------------------------------------
@pytest.mark.parametrize("name", TEMPLATES)
def test_template_is_committed_clean_with_a_parameters_cell(name):
    nb = nbformat.read(NOTEBOOKS / f"{name}.ipynb", as_version=4)
    nbformat.validate(nb)
    code = [c for c in nb.cells if c.cell_type == "code"]
    assert all(not c.outputs and c.execution_count is None for c in code), "commit notebooks without outputs"
    assert code[0].metadata.get("tags") == ["parameters"], "the first code cell must be tagged 'parameters'"
    assigned = {
        t.id for node in ast.parse(code[0].source).body if isinstance(node, ast.Assign) for t in node.targets
    }
    assert "project_file" in assigned
    assert nb.cells[0].cell_type == "markdown"


def test_injected_parameters_follow_the_parameters_cell_and_round_trip():
    from wetlandflow.ui.widgets import inject_parameters

    nb = nbformat.read(NOTEBOOKS / "03_validation_and_training.ipynb", as_version=4)
    values = {
        "project_file": str(Path("elsewhere") / "p.toml"),
        "tune_grid": {"max_depth": [2, 4]},
        "model_kinds": ["xgboost"],
        "experiment_trees": 7,
    }
    inject_parameters(nb, values)
    at = next(i for i, c in enumerate(nb.cells) if c.metadata.get("tags") == ["parameters"])
    injected = nb.cells[at + 1]
    assert injected.metadata["tags"] == ["injected-parameters"]
    parsed = {n.targets[0].id: ast.literal_eval(n.value) for n in ast.parse(injected.source).body}
    assert parsed == values


# -- headless execution on the shared demo run ---------------------------------------------------------------
@pytest.fixture(scope="module")
def executed(project_file, tmp_path_factory):
    """Execute a template once with small parameters; cached per notebook for this module."""
    from wetlandflow.ui.widgets import run_notebook

    tmp = tmp_path_factory.mktemp("executed")
    cache: dict[str, object] = {}

    def run(name: str):
        if name not in cache:
            cache[name] = run_notebook(
                NOTEBOOKS / f"{name}.ipynb",
                tmp / f"{name}.ipynb",
                parameters=small_parameters(name, project_file, tmp),
                timeout=600,
            )
        return cache[name]

    return run


def test_01_inputs_notebook_reports_the_dem_needs_warping(executed):
    nb = executed("01_project_and_inputs")
    tables = "".join(outputs(nb, "text/html"))
    # make_demo writes the DEM in ETRS89-LAEA (EPSG:3035) at 30 m, the optical grid in UTM at 10 m
    assert "reprojected, resampled" in tables and "as is" in tables
    assert len(outputs(nb, "image/png")) >= 2  # footprints and the true-colour preview
    assert outputs(nb, "application/vnd.jupyter.widget-view+json"), "the settings and run panel is shown"


def test_02_features_notebook_maps_and_compares_features(executed):
    nb = executed("02_features")
    assert len(outputs(nb, "image/png")) >= 6  # feature maps, distributions, correlation, separability
    assert any("features kept" in s for s in outputs(nb, "stdout"))


def test_03_validation_notebook_shows_both_designs_and_a_selection(executed):
    nb = executed("03_validation_and_training")
    html = "".join(outputs(nb, "text/html"))
    assert "blocks" in html and "random" in html and "random_forest" in html
    assert any(s.startswith("selected:") for s in outputs(nb, "stdout"))


def test_04_explain_notebook_draws_importance_and_shap_maps(executed):
    nb = executed("04_explain")
    assert len(outputs(nb, "image/png")) >= 5


def test_05_map_notebook_previews_every_layer(executed, project_file):
    nb = executed("05_map_inventory")
    pngs = outputs(nb, "image/png")
    assert len(pngs) >= 9
    # previews are screen-sized PNGs, not full-resolution rasters (the demo grid is 200 px a side)
    assert max(len(base64.b64decode(p)) for p in pngs) < 2_000_000


def test_06_sample_notebook_writes_accuracy_and_adjusted_areas(executed, project_file):
    nb = executed("06_validation_sample")
    assert any("overall accuracy" in s for s in outputs(nb, "stdout"))
    run = project_file.parent / "runs" / "notebooks"
    summary = json.loads((run / "accuracy" / "summary.json").read_text())
    assert 0.0 < summary["overall_accuracy"] <= 1.0
    assert (run / "validation_sample" / "sample_labelled.gpkg").exists()


def test_07_monitoring_notebook_shows_trends_water_baci_and_recovery(executed, project_file):
    nb = executed("07_monitoring")
    assert any("Monitoring written to" in s for s in outputs(nb, "stdout"))
    assert len(outputs(nb, "image/png")) >= 6  # trend maps, water frequency, BACI and recovery figures
    html = "".join(outputs(nb, "text/html"))
    assert "slope_lo" in html and "effect" in html and "years_to_recovery" in html
    assert outputs(nb, "application/vnd.jupyter.widget-view+json"), "the monitoring panel is shown"
    assert (project_file.parent / "runs" / "notebooks" / "monitor" / "polygon_trends.csv").exists()
