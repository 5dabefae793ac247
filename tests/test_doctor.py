"""``wetlandflow doctor``: versions as loaded, and each known-conflict rule on its own."""

from __future__ import annotations

import pytest

from wetlandflow.ui.doctor import (
    doctor_report,
    find_notes,
    find_problems,
    format_report,
    installed_distributions,
    proj_db_version,
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


# -- two PROJ builds in separate wheels: information when each reads its own data, a problem otherwise ----
def _proj_dir(path, version: str | None):
    """A PROJ data folder whose proj.db records ``PROJ.VERSION`` (as a real one does in its metadata table);
    ``None``: a folder without proj.db."""
    import sqlite3

    path.mkdir(parents=True)
    if version is not None:
        con = sqlite3.connect(path / "proj.db")
        con.execute("CREATE TABLE metadata (key TEXT, value TEXT)")
        con.executemany("INSERT INTO metadata VALUES (?, ?)", [("DATABASE.LAYOUT.VERSION.MAJOR", "1"),
                                                               ("PROJ.VERSION", version)])
        con.commit()
        con.close()
    return path


@pytest.fixture
def two_wheels(tmp_path, monkeypatch):
    """Patch the loaded PROJ versions and data folders of rasterio and pyproj; returns a function
    (rasterio's PROJ, its proj.db version, pyproj's PROJ, its proj.db version) -> (text, problems, info)."""
    import pyproj
    import rasterio
    import rasterio._env

    for var in ("PROJ_DATA", "PROJ_LIB", "GDAL_DATA"):
        monkeypatch.delenv(var, raising=False)

    def make(ras: str, ras_db: str | None, pyp: str, pyp_db: str | None):
        ras_dir = _proj_dir(tmp_path / f"rasterio_{ras}_{ras_db}" / "proj_data", ras_db)
        pyp_dir = _proj_dir(tmp_path / f"pyproj_{pyp}_{pyp_db}" / "proj", pyp_db)
        monkeypatch.setattr(rasterio, "__proj_version__", ras)
        monkeypatch.setattr(pyproj, "proj_version_str", pyp)
        monkeypatch.setattr(rasterio._env, "get_proj_data_search_paths", lambda: [str(ras_dir)])
        monkeypatch.setattr(pyproj.datadir, "get_data_dir", lambda: str(pyp_dir))
        text, problems = doctor_report()
        return text, [p for p in problems if "PROJ" in p or "proj.db" in p], stack_info()

    return make


def test_separate_self_consistent_proj_wheels_are_information_not_a_problem(two_wheels):
    text, problems, info = two_wheels("9.7.1", "9.7.1", "9.5.1", "9.5.1")
    assert info["proj_db"] == {"rasterio": "9.7.1", "pyproj": "9.5.1"}
    assert problems == [] and find_problems(info, {}, []) == []
    notes = find_notes(info)
    assert len(notes) == 1 and "PROJ 9.7.1 and PROJ 9.5.1" in notes[0] and "not a problem" in notes[0]
    assert "Information (not a problem):" in text and notes[0] in text
    assert "(proj.db of PROJ 9.7.1)" in text and "(proj.db of PROJ 9.5.1)" in text


def test_a_library_reading_the_proj_db_of_another_version_is_a_problem(two_wheels):
    text, problems, info = two_wheels("9.7.1", "9.5.1", "9.5.1", "9.5.1")
    assert len(problems) == 1 and problems[0].startswith("rasterio loads PROJ 9.7.1 but reads the proj.db of "
                                                         "PROJ 9.5.1")
    assert "With pip: unset PROJ_DATA and PROJ_LIB" in problems[0] and problems[0] in text
    assert find_notes(info) == [] and "Information" not in text
    _, problems, _ = two_wheels("9.7.1", "9.7.1", "9.5.1", None)  # pyproj's folder lost its proj.db
    assert len(problems) == 1 and problems[0].startswith("pyproj (PROJ 9.5.1) finds no readable proj.db")
    assert "pip install --force-reinstall --no-deps pyproj" in problems[0]


def test_patch_releases_of_one_proj_share_a_database():
    """PROJ's database layout follows its minor release: 9.5.0 reading the proj.db of 9.5.1 is consistent."""
    info = {"versions": {"PROJ (rasterio)": "9.5.0", "PROJ (pyproj)": "9.5.1"},
            "proj_data": {"rasterio": "/a", "pyproj": "/b"},
            "proj_db": {"rasterio": "9.5.1", "pyproj": "9.5.1"}}
    assert find_problems(info, {}, []) == [] and len(find_notes(info)) == 1


def test_proj_db_version_reads_the_first_folder_holding_one(tmp_path):
    empty = _proj_dir(tmp_path / "empty", None)
    db = _proj_dir(tmp_path / "db", "9.4.0")
    import os

    assert proj_db_version(os.pathsep.join([str(empty), str(db)])) == "9.4.0"
    assert proj_db_version(str(empty)) == "" and proj_db_version("") == ""


def test_every_problem_says_what_a_pip_user_can_do(tmp_path):
    info = clean_info(tmp_path)
    cases = [
        find_problems(info | {"proj_data": {"rasterio": str(tmp_path / "a"), "pyproj": str(tmp_path / "b")}},
                      {}, []),
        find_problems(info | {"versions": {"PROJ (rasterio)": "9.7.1", "PROJ (pyproj)": "9.5.1"}}, {}, []),
        find_problems(info | {"proj_db": {"rasterio": "9.5.1", "pyproj": ""}}, {}, []),
        find_problems(info | {"proj_db": {"rasterio": "9.4.0", "pyproj": "9.5.1"}}, {}, []),
        find_problems(info, {"PROJ_LIB": str(tmp_path / "gone")}, []),
        find_problems(info, {"PROJ_DATA": str(tmp_path)}, []),
        find_problems(info, {}, ["xgboost", "xgboost-cpu"]),
    ]
    assert all(cases), cases  # each rule fired
    for problems in cases:
        for p in problems:
            advice = p.split("With pip: ")[1]
            assert "pip " in advice or "unset" in advice, p
