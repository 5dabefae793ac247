"""``wetlandflow doctor``: versions as loaded, and each known-conflict rule on its own."""

from __future__ import annotations

import pytest

from wetlandflow.ui.doctor import (
    doctor_report,
    find_problems,
    format_report,
    installed_distributions,
    stack_info,
)


def clean_info(tmp_path) -> dict:
    """A stack record with one shared PROJ data folder and one PROJ version: nothing to flag."""
    data = tmp_path / "proj"
    data.mkdir(exist_ok=True)
    return {"versions": {"PROJ (rasterio)": "9.5.1", "PROJ (pyproj)": "9.5.1"},
            "proj_data": {"rasterio": str(data), "pyproj": str(data)}}


@pytest.mark.reference
def test_versions_are_the_ones_the_libraries_report():
    """Reference libraries: rasterio's, pyproj's and shapely's own version attributes."""
    import dask
    import numpy
    import pyproj
    import rasterio
    import shapely
    import xgboost
    import zarr

    v = stack_info()["versions"]
    assert v["GDAL (rasterio)"] == rasterio.__gdal_version__
    assert v["PROJ (rasterio)"] == rasterio.__proj_version__
    assert v["PROJ (pyproj)"] == pyproj.proj_version_str
    assert v["GEOS (shapely)"] == shapely.geos_version_string
    assert v["numpy"] == numpy.__version__ and v["dask"] == dask.__version__ and v["zarr"] == zarr.__version__
    assert v["xgboost"].startswith(xgboost.__version__)
    assert stack_info()["proj_data"]["pyproj"] == pyproj.datadir.get_data_dir()


def test_clean_stack_has_no_problem(tmp_path):
    assert find_problems(clean_info(tmp_path), {}, ["numpy", "xgboost-cpu", "rasterio"]) == []


def test_two_proj_data_directories_are_flagged(tmp_path):
    info = clean_info(tmp_path)
    info["proj_data"]["pyproj"] = str(tmp_path / "other")
    problems = find_problems(info, {}, [])
    assert len(problems) == 1 and "two PROJ data directories" in problems[0]
    assert str(tmp_path / "other") in problems[0] and info["proj_data"]["rasterio"] in problems[0]


def test_two_proj_versions_are_flagged(tmp_path):
    info = clean_info(tmp_path)
    info["versions"]["PROJ (rasterio)"] = "9.7.1"
    problems = find_problems(info, {}, [])
    assert len(problems) == 1 and "9.7.1" in problems[0] and "9.5.1" in problems[0]


def test_both_xgboost_distributions_are_flagged(tmp_path):
    problems = find_problems(clean_info(tmp_path), {}, ["XGBoost", "xgboost_cpu"])  # names as pip may spell them
    assert len(problems) == 1 and "xgboost and xgboost-cpu" in problems[0] and "pip uninstall" in problems[0]


def test_environment_pointing_to_missing_or_foreign_folders(tmp_path):
    info = clean_info(tmp_path)
    gdal = tmp_path / "gdal"
    gdal.mkdir()
    assert find_problems(info, {"GDAL_DATA": str(gdal)}, []) == []
    missing = find_problems(info, {"PROJ_LIB": str(tmp_path / "gone")}, [])
    assert len(missing) == 1 and "PROJ_LIB" in missing[0] and "not an existing folder" in missing[0]
    no_db = find_problems(info, {"PROJ_DATA": str(gdal)}, [])
    assert len(no_db) == 1 and "proj.db" in no_db[0]
    (gdal / "proj.db").write_bytes(b"")
    assert find_problems(info, {"PROJ_DATA": str(gdal)}, []) == []


def test_report_text_and_problems_agree():
    import os

    text, problems = doctor_report()
    assert "GDAL (rasterio)" in text and "PROJ (pyproj)" in text and "GEOS (shapely)" in text
    assert problems == find_problems(stack_info(), os.environ, installed_distributions())
    assert ("No known conflict found." in text) == (not problems)
    for p in problems:
        assert p in text


def test_format_lists_every_version(tmp_path):
    info = clean_info(tmp_path) | {"versions": {"numpy": "1.0", "PROJ (pyproj)": "9"}}
    text = format_report(info, ["something wrong"], {"PROJ_LIB": "/x"})
    assert "numpy" in text and "1.0" in text and "1 problem(s):" in text and "- something wrong" in text
    assert "PROJ_LIB" in text and "/x" in text and "GDAL_DATA" in text and "(unset)" in text
