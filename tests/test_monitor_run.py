"""The monitoring run on the demo's archive: it finds the truths the generator planted.

These are behaviour tests on invented data (the planted lake, road and harvest of ``demo/archive.py``),
not reference checks: the statistics themselves are checked against outside references in
test_trends.py, test_baci.py, test_recovery.py, test_changepoint.py and test_water_series.py.
"""

from __future__ import annotations

import json
import re
import shutil

import pandas as pd
import pytest
import rasterio
from test_run import documented_tables, matches_documented

from wetlandflow.errors import ProjectFileError
from wetlandflow.ui.cli import main


@pytest.fixture(scope="module")
def monitored(tmp_path_factory):
    from wetlandflow.demo.landscape import make_demo
    from wetlandflow.pipeline.monitor import monitor_project

    root = tmp_path_factory.mktemp("monitor")
    project_file = make_demo(root, size=120, seed=0, archive=True)
    result = monitor_project(project_file, progress=False)
    truth = json.loads((root / "archive" / "truth.json").read_text())
    return project_file, result, truth


def test_the_shrinking_lake_is_found_at_its_planted_rate(monitored):
    _, result, truth = monitored
    trends = result.tables["polygon_trends"].set_index(["polygon", "metric"])
    lake = trends.loc[("lake", "water_optical")]
    area = result.tables["series"].query("polygon == 'lake'")["area_ha"].iloc[0]
    planted = truth["lake"]["planted_rate_ha_per_yr"]
    assert lake["q"] < 0.01
    assert lake["slope_lo"] * area <= planted <= lake["slope_hi"] * area  # water share per year x area


def test_the_road_effect_has_the_planted_sign_and_size(monitored):
    _, result, truth = monitored
    baci = result.tables["baci"].set_index(["impact", "metric"])
    for site, effects in truth["fens"]["baci"].items():
        water = baci.loc[(site, "water_optical")]
        assert water["effect_lo"] <= effects["water_share"]["effect"] <= water["effect_hi"], site
        assert water["p"] < 0.01
        # NDVI: the truth is the polygon median of noise-free reflectance, the series a mean of noisy pixels
        assert (baci.loc[(site, "ndvi"), "effect"] > 0) == (effects["ndvi"]["sign"] > 0), site


def test_the_harvest_recovers_within_a_year_of_the_planted_curve(monitored):
    _, result, truth = monitored
    row = result.tables["recovery"].set_index("polygon").loc["harvest_block"]
    assert row["disturbance_year"] == truth["harvest"]["year"]
    recovered = row["disturbance_year"] + row["years_to_recovery"]
    assert abs(recovered - truth["harvest"]["recovery_80_year"]) <= 1


def test_the_sar_flood_pulse_shows_in_the_floodplain_water(monitored):
    _, result, truth = monitored
    series = result.tables["series"].query("polygon == 'floodplain' and metric == 'water_sar'")
    pulse = truth["sar"]["pulse"]
    inside = series["date"].between(pd.Timestamp(pulse["start"]), pd.Timestamp(pulse["end"]))
    assert series.loc[inside, "value"].mean() > 0.5 > series.loc[~inside, "value"].mean() + 0.2


def test_outputs_are_documented_georeferenced_and_in_the_report(monitored):
    project_file, result, _ = monitored
    out = result.out_dir
    docs = documented_tables()
    for path in [*out.glob("*.csv"), *out.glob("*.parquet")]:
        rel = f"monitor/{path.name}"
        assert rel in docs, f"{rel} is not documented in docs/outputs.md"
        df = pd.read_csv(path) if path.suffix == ".csv" else pd.read_parquet(path)
        assert matches_documented(list(df.columns), docs[rel][1], {}), (rel, list(df.columns))
    with rasterio.open(out / "trends" / "water_optical_trend.tif") as src:
        assert src.descriptions == ("slope", "slope_lo", "slope_hi", "p", "q") and src.crs is not None
    from wetlandflow.report.run_folder import RunFolder
    from wetlandflow.report.text import build_sections

    json_path = out.parent / "manifest.json"
    if not json_path.exists():  # the report reads a run folder: a minimal one for the monitoring alone
        json_path.write_text(json.dumps({"project": {"classes": {"names": ["upland", "fen"]}}, "steps": {}}))
    section = next(s for s in build_sections(RunFolder(out.parent)) if s.title.startswith("Change through"))
    text = " ".join(getattr(b, "text", "") for b in section.blocks)
    assert "Mann" in text and "not a legal delineation" in text
    assert len([b for b in section.blocks if type(b).__name__ == "Figure"]) >= 3


def test_a_new_scene_is_mapped_alone(monitored, tmp_path, capsys):
    project_file, result, _ = monitored
    root = project_file.parent
    scenes = sorted((root / "archive" / "optical").glob("LS_*.tif"))
    extra = scenes[-1].with_name("LS_20250720.tif")
    shutil.copy(scenes[-1], extra)
    try:
        assert main(["monitor", str(project_file), "--quiet"]) == 0
        printed = capsys.readouterr().out
        assert re.search(r"water_optical: 1 date\(s\) computed, 35 reused", printed), printed
        assert "not a legal delineation" in printed
    finally:
        extra.unlink()


def test_monitor_without_a_monitor_section_names_the_key(tmp_path):
    from wetlandflow.demo.landscape import make_demo
    from wetlandflow.pipeline.monitor import monitor_project

    project_file = make_demo(tmp_path, size=64, seed=2)
    with pytest.raises(ProjectFileError, match=r"\[monitor\]"):
        monitor_project(project_file, progress=False)
