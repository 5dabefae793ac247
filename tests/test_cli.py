"""The command line: one clear message on failure, the traceback only with --debug."""

from __future__ import annotations

import pytest

from wetlandflow.errors import ProjectFileError
from wetlandflow.ui.cli import main


def test_check_prints_the_inventory(small_demo, capsys):
    assert main(["check", str(small_demo)]) == 0
    out = capsys.readouterr().out
    assert "valid" in out and "EPSG:32633" in out
    assert "optical" in out and "sar" in out and "dem" in out
    assert "covers_grid" in out


def test_bad_project_gives_one_message_and_no_traceback(project_copy, capsys):
    path = project_copy(lambda d: d["model"].update(kind="svm"))
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and "[model.kind]" in err
    assert "Traceback" not in err


def test_debug_shows_the_traceback(project_copy):
    path = project_copy(lambda d: d["model"].update(kind="svm"))
    with pytest.raises(ProjectFileError):
        main(["--debug", "check", str(path)])


def test_help_carries_the_caution(capsys):
    with pytest.raises(SystemExit):
        main(["--help"])
    assert "screening-level" in capsys.readouterr().out


# -- totals first, the blind sample and its plan: on a light run of the committed small demo -------------
@pytest.fixture(scope="module")
def light_run(tmp_path_factory):
    from test_lock import light_copy

    from wetlandflow.pipeline.run import run_project

    folder = tmp_path_factory.mktemp("light_cli")
    return run_project(light_copy(folder), progress=False), folder


def _grouped(run_dir, name: str):
    import pandas as pd

    return pd.read_csv(run_dir / "accuracy" / name).set_index("class")


def test_run_summary_leads_with_the_total_wetland_area(light_run):
    import pandas as pd

    from wetlandflow import CAUTION

    result, _ = light_run
    text = result.summary()
    body = [line for line in text.splitlines()[1:] if line.strip()]
    areas = pd.read_csv(result.run_dir / "areas.csv").set_index("class")
    wetland = areas.loc[["marsh", "swamp", "fen", "bog"], "mapped_area_ha"].sum()
    assert body[0] == (f"Total wetland area (marsh, swamp, fen, bog): {wetland:,.1f} ha mapped (a pixel "
                       "count, not error-adjusted: no labelled sample assessed)")
    order = [text.index(s) for s in ("Total wetland area", "Class areas", "Cross-validated overall")]
    assert order == sorted(order)
    for name, ha in areas["mapped_area_ha"].items():
        assert any(line.split()[:2] == [name, f"{ha:,.1f}"] for line in body), name
    assert CAUTION in text


def test_sample_prints_its_plan_and_writes_a_blind_sample(light_run, capsys):
    import json

    import geopandas as gpd
    import pandas as pd

    from wetlandflow.accuracy.sampling import expected_overall_se
    from wetlandflow.inputs.class_definitions import DEFAULT_DEFINITIONS

    result, folder = light_run
    assert main(["sample", str(folder / "light.toml"), "--min-per-class", "8", "--target-se", "0.05",
                 "--buffer-m", "20", "--points-per-hour", "40"]) == 0
    out = capsys.readouterr().out
    sdir = result.run_dir / "validation_sample"
    design = json.loads((sdir / "sample_design.json").read_text())
    n = design["n_total"]
    order = [out.index(s) for s in (f"validation sample: {n} points", "Labelling effort", "written to")]
    assert order == sorted(order)
    assert f"about {n / 40:.1f} hours at 40 points per hour" in out and "common practice, no source" in out
    # the half-widths printed are the estimator's, from the design's proportions and expected accuracies
    users, props = design["expected_users"], design["mapped_proportions"]
    present = {c: props[c] for c in users}
    for what, factor in (("half the points", 0.5), ("as planned", 1.0), ("double the points", 2.0)):
        alloc = {c: (max(2, round(k * factor)) if factor != 1.0 else k)
                 for c, k in design["per_class"].items() if c in users}
        hw = 1.959964 * expected_overall_se(present, users, alloc)
        line = next(line for line in out.splitlines() if line.strip().startswith(what))
        assert f" {sum(alloc.values())} points " in line and line.endswith(f"+/- {hw:.3f}"), (line, hw)
    gdf = gpd.read_file(sdir / "sample.gpkg", layer="sample")
    assert "map_class" not in gdf.columns and len(gdf) == n
    table = pd.read_csv(sdir / "map_classes.csv")
    assert list(table.columns) == ["sample_id", "map_class"]
    assert sorted(table["sample_id"]) == sorted(gdf["sample_id"])
    assert table["map_class"].value_counts().to_dict() == {c: k for c, k in design["per_class"].items() if k}
    instructions = (sdir / "LABELLING.md").read_text()
    assert f"holds {n} points" in instructions and "reference_class" in instructions
    for name, d in DEFAULT_DEFINITIONS.items():
        assert f"| `{name}` | {d.label} | {d.definition} |" in instructions
    assert "map_class" not in instructions.replace("map_classes.csv", "")


def test_assess_leads_with_totals_and_the_summary_then_shows_them_adjusted(light_run, capsys, tmp_path):
    import geopandas as gpd
    import rioxarray

    from wetlandflow.accuracy.assessment import class_codes, label_from_reference
    from wetlandflow.inputs.project import load_project

    result, folder = light_run
    project = load_project(folder / "light.toml")
    sdir = result.run_dir / "validation_sample"
    truth = rioxarray.open_rasterio(folder / "truth.tif").isel(band=0, drop=True)
    labelled = label_from_reference(sdir / "sample.gpkg", truth, class_codes(project),
                                    sdir / "sample_labelled.gpkg")
    assert main(["assess", str(folder / "light.toml"), str(labelled)]) == 0
    out = capsys.readouterr().out.splitlines()
    w = _grouped(result.run_dir, "grouped_area_table.csv").loc["wetland"]
    assert out[0].startswith("Error-adjusted areas from")
    assert out[1] == (f"Total wetland area (marsh, swamp, fen, bog): {w['estimated_area_ha']:,.1f} ha "
                      f"error-adjusted, 95 % confidence interval {w['ci_low_ha']:,.1f} to "
                      f"{w['ci_high_ha']:,.1f} ha (the map shows {w['mapped_area_ha']:,.1f} ha)")
    text = "\n".join(out)
    assert text.index("Total wetland area") < text.index("adjusted ha") < text.index("Overall accuracy")

    summary = result.summary()  # read again from the run folder: error-adjusted, with the sample's accuracy
    body = [line for line in summary.splitlines()[1:] if line.strip()]
    assert body[0] == out[1]
    assert summary.index("Total wetland") < summary.index("Class areas") < summary.index(
        "from the labelled sample") < summary.index("Cross-validated")

    # a sample from before the split, carrying map_class itself (nothing beside it: the run folder's
    # map_classes.csv is joined too, and agrees)
    legacy = gpd.read_file(labelled, layer="sample").merge(
        gpd.pd.read_csv(sdir / "map_classes.csv"), on="sample_id")
    (tmp_path / "old").mkdir()
    legacy.to_file(tmp_path / "old" / "labelled.gpkg", layer="sample")
    assert main(["assess", str(folder / "light.toml"), str(tmp_path / "old" / "labelled.gpkg")]) == 0
    assert capsys.readouterr().out.splitlines()[1] == out[1]


def test_run_progress_leaves_every_finished_step_with_its_seconds(tmp_path, capsys):
    """Each step prints a start line and a finished line with its seconds, and the finished bars stay, with
    the seconds, in standard error (the recorded seconds of the manifest are the ones printed)."""
    import json
    import re

    from test_lock import light_copy

    project = light_copy(tmp_path, "progress")
    assert main(["run", str(project)]) == 0
    err = capsys.readouterr().err
    steps = json.loads((tmp_path / "runs" / "progress" / "manifest.json").read_text())["steps"]
    for name in ("inputs", "features", "samples", "validation", "model", "mapping", "inventory"):
        assert f"{name} ...\n" in err, name
        assert f"{name}: done in {steps[name]['seconds']:.1f} s\n" in err, name
    # tqdm redraws with carriage returns: the last state of each bar is what stays on the terminal
    finals = [chunk.rsplit("\r", 1)[-1] for chunk in err.split("\n")]
    for bar in ("cross-validating", "predicting"):
        assert any(re.match(rf"{bar}: 100%.*done in \d+\.\d s", line) for line in finals), bar
    assert main(["run", str(project)]) == 0  # a rerun reuses the steps, and says so
    err = capsys.readouterr().err
    seconds = steps["features"]["seconds"]
    assert f"features: reused from the earlier run (done there in {seconds:.1f} s)" in err
