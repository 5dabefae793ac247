"""Project-file validation: every bad file gives one message naming the key or file."""

from __future__ import annotations

import pytest

from wetlandflow.errors import ProjectFileError
from wetlandflow.inputs.project import config_hash, load_project, to_dict


def test_demo_project_loads(small_demo):
    p = load_project(small_demo)
    assert p.classes.names[0] == "upland"
    assert len(p.optical) >= 4 and len(p.sar) >= 12
    assert all(s.path.exists() for s in p.optical)
    assert p.classes.parents["wetland"] == ("marsh", "swamp", "fen", "bog")
    assert p.run_dir.name == "demo"


def test_defaults_are_filled(project_copy):
    def drop(d):
        d.pop("model", None)
        d.pop("output", None)

    p = load_project(project_copy(drop))
    assert p.model.kind == "xgboost" and p.output.chunk_size == 512
    assert p.model.hierarchical is False and p.model.gate_threshold == 0.0


def test_round_trip_and_hash_is_stable(small_demo):
    a, b = load_project(small_demo), load_project(small_demo)
    assert to_dict(a) == to_dict(b)
    assert config_hash(a) == config_hash(b)


def test_hash_changes_with_parameters(project_copy, small_demo):
    p = load_project(project_copy(lambda d: d["model"].update(max_depth=3)))
    assert config_hash(p) != config_hash(load_project(small_demo))


@pytest.mark.parametrize(
    ("mutate", "key", "words"),
    [
        (lambda d: d["model"].update(depth=3), "model.depth", "valid keys here are"),
        (lambda d: d.update(modle={}), "modle", "valid sections"),
        (lambda d: d["validation"].update(n_folds="five"), "validation.n_folds", "whole number"),
        (lambda d: d["model"].update(kind="svm"), "model.kind", "xgboost"),
        (lambda d: d["dem"].update(path="missing_dem.tif"), "dem.path", "file not found"),
        (lambda d: d["optical"][1].update(path="nope.tif"), "optical[1].path", "file not found"),
        (lambda d: d["classes"]["parents"].update(wetland=["marsh", "peatland"]), "classes.parents.wetland",
         "unknown class 'peatland'"),
        (lambda d: d["seasons"].update(spring=["04-01", "07-01"]), "seasons", "overlap"),
        (lambda d: d["seasons"].update(spring=["06-01", "04-01"]), "seasons.spring", "before it starts"),
        (lambda d: d["seasons"].update(spring=["04-31", "05-01"]), "seasons.spring", "month-day"),
        (lambda d: d["optical"][0].update(bands=["blue", "blue"]), "optical[0].bands", "duplicate band"),
        (lambda d: d["sar"][0].update(units="decibel"), "sar[0].units", "linear"),
        (lambda d: d["validation"].update(design="random"), "validation.design", "leak"),
        (lambda d: d["classes"].update(names=["upland", "upland", "fen"]), "classes.names", "duplicate"),
        (lambda d: d["plots"].pop("path"), "plots.path", "missing required key"),
        (lambda d: d["optical"][0].update(date="May 14"), "optical[0].date", "date"),
        (lambda d: (d["model"].update(hierarchical=True), d["classes"].pop("parents")), "model.hierarchical",
         "[classes.parents]"),
        (lambda d: d["model"].update(hierarchical="yes"), "model.hierarchical", "true or false"),
        (lambda d: d["model"].update(hierarchical=True, gate_threshold=1.0), "model.gate_threshold",
         "[0, 1)"),
        (lambda d: d["model"].update(hierarchical=True, gate_threshold=-0.1), "model.gate_threshold",
         "[0, 1)"),
        (lambda d: d["model"].update(gate_threshold=0.05), "model.gate_threshold", "hierarchical = true"),
        (lambda d: (d["model"].update(hierarchical=True), d["classes"]["parents"].update(top=["upland"])),
         "classes.parents.top", "reserved"),
        (lambda d: (d["model"].update(hierarchical=True), d["classes"]["parents"].update(peat=[])),
         "classes.parents.peat", "no classes"),
        (lambda d: d["classes"].update(definitions={"peatland": "A wetland with peat."}),
         "classes.definitions.peatland", "unknown class 'peatland'"),
        (lambda d: d["classes"].update(definitions={"fen": {"label": "Fen"}}), "classes.definitions.fen",
         "definition"),
        (lambda d: d["classes"].update(definitions={"fen": 3}), "classes.definitions.fen",
         "expected a string"),
    ],
)
def test_bad_project_files_name_the_key(project_copy, mutate, key, words):
    path = project_copy(mutate)
    with pytest.raises(ProjectFileError) as info:
        load_project(path)
    msg = str(info.value)
    assert info.value.key == key
    assert f"[{key}]" in msg and words in msg
    assert path.name in msg


def test_class_definitions_fall_back_to_the_defaults(project_copy):
    from wetlandflow.inputs.class_definitions import (
        DEFAULT_DEFINITIONS,
        class_definition,
        project_definitions,
    )

    own = {"fen": "Sedge peatland fed by seepage.", "bog": {"label": "Raised bog", "definition": "Rain-fed."}}
    p = load_project(project_copy(lambda d: d["classes"].update(definitions=own)))
    defs = project_definitions(p.classes.definitions)
    assert defs["fen"].definition == own["fen"] and defs["fen"].label == DEFAULT_DEFINITIONS["fen"].label
    assert defs["bog"].label == "Raised bog" and defs["bog"].definition == "Rain-fed."
    assert class_definition("marsh", defs) == DEFAULT_DEFINITIONS["marsh"]  # not given: the default
    assert class_definition("reed_bed", defs).label == "Reed bed"  # a class of another scheme, without one
    assert class_definition("reed_bed", defs).definition == ""


def test_class_definitions_do_not_change_the_samples_step_key(project_copy, small_demo):
    """Definitions are words for people: editing them must not refit anything (left out of the key)."""
    from wetlandflow.inputs.project import portable_dict
    from wetlandflow.pipeline.run import scheme_config

    a = portable_dict(load_project(small_demo))["classes"]
    edited = project_copy(lambda d: d["classes"].update(definitions={"fen": "x"}))
    b = portable_dict(load_project(edited))["classes"]
    assert a["definitions"] == {} and b["definitions"] == {"fen": "x"}
    assert scheme_config(a) == scheme_config(b) and "names" in scheme_config(a)
    c = portable_dict(load_project(project_copy(lambda d: d["classes"]["parents"].update(wetland=["marsh"]))))
    assert scheme_config(c["classes"]) != scheme_config(a)


def test_missing_project_file(tmp_path):
    with pytest.raises(ProjectFileError, match="not found"):
        load_project(tmp_path / "absent.toml")


def test_invalid_toml(tmp_path):
    f = tmp_path / "broken.toml"
    f.write_text("[project\nname = 1\n")
    with pytest.raises(ProjectFileError, match="not valid TOML"):
        load_project(f)


# -- the documentation of the project file covers the schema -------------------------------------------
def _schema_keys() -> set[str]:
    """Every ``section.key`` the project file accepts (scene layout keys and inline sensors included)."""
    import dataclasses
    import typing

    from wetlandflow.inputs.project import Project
    from wetlandflow.inputs.scenes import LAYOUT_KEYS
    from wetlandflow.inputs.sensors import Sensor

    keys = set()
    hints = typing.get_type_hints(Project)
    for f in dataclasses.fields(Project):
        if f.name in ("file", "seasons", "sensors"):
            continue
        tp = hints[f.name]
        args = [a for a in typing.get_args(tp) if a is not type(None) and a is not Ellipsis]
        cls = args[0] if args else tp
        keys |= {f"{f.name}.{g.name}" for g in dataclasses.fields(cls)}
        inner_hints = typing.get_type_hints(cls)
        for g in dataclasses.fields(cls):  # sub-tables such as [monitor.water]: their keys too
            inner = [a for a in (typing.get_args(inner_hints[g.name]) or (inner_hints[g.name],))
                     if dataclasses.is_dataclass(a)]
            if inner and g.name not in ("optical", "sar"):  # scene tables are checked as [[optical]]
                keys |= {f"{f.name}.{g.name}.{h.name}" for h in dataclasses.fields(inner[0])}
    keys |= {f"{kind}.{k}" for kind in ("optical", "sar") for k in (*LAYOUT_KEYS, "date_format")}
    keys |= {f"sensors.{g.name}" for g in dataclasses.fields(Sensor) if g.name != "name"}
    return keys | {"seasons"}


def _documented_keys(text: str) -> set[str]:
    """``section.key`` pairs of the TOML examples in a Markdown page (each block must be valid TOML)."""
    import re

    import tomllib

    keys = set()
    for block in re.findall(r"```toml\n(.*?)```", text, flags=re.S):
        doc = tomllib.loads(block)
        for section, value in doc.items():
            if section == "seasons":
                keys.add("seasons")
                continue
            tables = value if isinstance(value, list) else [value]
            for table in tables:
                if section == "sensors":
                    keys |= {f"sensors.{k}" for t in table.values() for k in t}
                elif section == "features":
                    keys |= {f"features.{k}" for k in table}
                else:
                    keys |= {f"{section}.{k}" for k in table}
                    keys |= {f"{section}.{k}.{kk}" for k, v in table.items() if isinstance(v, dict)
                             and section == "monitor" for kk in v}
    return keys


def test_every_project_file_key_is_documented():
    from pathlib import Path

    text = (Path(__file__).parents[1] / "docs" / "project-file.md").read_text()
    schema, documented = _schema_keys(), _documented_keys(text)
    assert not schema - documented, f"keys missing from docs/project-file.md: {sorted(schema - documented)}"
    assert not documented - schema, f"docs/project-file.md shows keys the schema lacks: {sorted(documented - schema)}"


def test_docs_feature_table_is_the_registry():
    from pathlib import Path

    import wetlandflow.features  # noqa: F401  (registers the built-in features)
    from wetlandflow.features.registry import registry_markdown

    text = (Path(__file__).parents[1] / "docs" / "methods.md").read_text()
    start, end = "<!-- feature table: generated by registry_markdown() -->\n", "\n<!-- end of feature table -->"
    assert start in text and end in text
    documented = text[text.index(start) + len(start):text.index(end)]
    assert documented == registry_markdown(), (
        "docs/methods.md's feature table differs from the registry; paste the output of "
        "python -c 'import wetlandflow.features; from wetlandflow.features.registry import registry_markdown; "
        "print(registry_markdown())' between its markers")


def test_sar_only_project_without_dem_or_seasons_loads(tmp_path):
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).parent))
    from own_data import make_project

    from wetlandflow.inputs.project import DEFAULT_SEASONS

    project = load_project(make_project(tmp_path, optical=None, sar="pattern", dem=False))
    assert project.optical == () and project.dem is None and project.seasons == DEFAULT_SEASONS


def test_a_project_without_any_image_is_refused(tmp_path):
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).parent))
    from own_data import make_project

    with pytest.raises(ProjectFileError, match=r"\[optical\].*no image.*\[\[optical\]\] or \[\[sar\]\]"):
        load_project(make_project(tmp_path, optical=None, dem=False))
