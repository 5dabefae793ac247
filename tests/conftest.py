"""Shared fixtures: small demo landscapes generated once per session."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib


@pytest.fixture(scope="session")
def small_demo(tmp_path_factory) -> Path:
    """A 160 x 160 pixel demo (1.6 km at 10 m): fast, for validation and alignment tests."""
    from wetlandflow.demo.landscape import make_demo

    return make_demo(tmp_path_factory.mktemp("small_demo"), size=160, seed=3)


@pytest.fixture(scope="session")
def demo_run(tmp_path_factory):
    """The default-size demo (600 x 600 pixels, 6 km) run end to end once per session."""
    from wetlandflow.demo.landscape import make_demo
    from wetlandflow.pipeline.run import run_project

    project_file = make_demo(tmp_path_factory.mktemp("demo"), size=600, seed=0)
    return run_project(project_file, progress=False)


def read_toml(path: Path) -> dict:
    return tomllib.loads(Path(path).read_text())


@pytest.fixture()
def project_copy(small_demo, tmp_path):
    """Write a modified copy of the small demo's project file; returns a function(dict -> path)."""
    import tomli_w

    base = read_toml(small_demo)

    def write(mutate) -> Path:
        data = read_toml(small_demo)
        mutate(data)
        out = small_demo.parent / f"variant_{tmp_path.name}.toml"
        out.write_text(tomli_w.dumps(data))
        return out

    write.base = base
    return write


def project_variant(project_file: Path, name: str, **changes) -> Path:
    """A sibling project file ``<name>.toml`` with ``{"section.key": value}`` edits (same inputs)."""
    import tomli_w

    data = tomllib.loads(Path(project_file).read_text())
    for dotted, value in changes.items():
        section, key = dotted.split(".")
        data.setdefault(section, {})[key] = value
    out = Path(project_file).with_name(f"{name}.toml")
    out.write_text(tomli_w.dumps(data))
    return out


def _drop_thin_classes(folder: Path, doc: dict, *, min_plots: int) -> None:
    """Leave out classes with fewer than ``min_plots`` plots (their plots and their names): a one-plot class
    cannot be on both sides of plot-grouped folds, and a run refuses it."""
    import geopandas as gpd

    path = folder / doc["plots"]["path"]
    plots = gpd.read_file(path)
    field = doc["plots"].get("class_field", "class")
    counts = plots[field].value_counts()
    thin = {c for c in doc["classes"]["names"] if counts.get(c, 0) < min_plots}
    if not thin:
        return
    plots[~plots[field].isin(thin)].to_file(path, layer=plots_layer(path))
    doc["classes"]["names"] = [c for c in doc["classes"]["names"] if c not in thin]
    for parent, children in doc["classes"].get("parents", {}).items():
        doc["classes"]["parents"][parent] = [c for c in children if c not in thin]


def plots_layer(path: Path) -> str:
    import pyogrio

    return str(pyogrio.list_layers(path)[0, 0])


def tiny_project_doc(folder: Path, *, chunk_size: int) -> dict:
    """The project document of a 128 x 128 px demo with optical and terrain features only, a 30-tree model
    and 3 plot folds: the smallest project that runs end to end, for tests that corrupt or kill a run."""
    from wetlandflow.demo.landscape import make_demo

    doc = read_toml(make_demo(folder, size=128, seed=3, n_optical=3, n_sar=2))
    _drop_thin_classes(folder, doc, min_plots=2)
    doc["features"] = {"select": ["optical", "terrain"]}
    doc["model"].update(n_estimators=30)
    doc["validation"].update(design="group", n_folds=3)
    doc["samples"] = {"max_pixels_per_plot": 20}
    doc["output"] = {"chunk_size": chunk_size, "explain": False}
    return doc


def light_project(folder: Path) -> Path:
    """A 300 x 300 px demo with a light model and 3 folds, so that several full runs stay short."""
    from wetlandflow.demo.landscape import make_demo

    pf = make_demo(folder, size=300, seed=1)
    # Capping pixels per plot keeps the runs light and gives the seed something to choose (which pixels train).
    return project_variant(pf, "light", **{"model.n_estimators": 60, "validation.n_folds": 3,
                                           "samples.max_pixels_per_plot": 30,
                                           "validation.block_size_m": 300.0, "output.explain": False,
                                           "output.chunk_size": 128, "project.output_dir": "runs/light"})


@pytest.fixture(scope="session")
def light_demo(tmp_path_factory) -> Path:
    """The project file of :func:`light_project` (inputs generated once per session)."""
    return light_project(tmp_path_factory.mktemp("light_demo"))


@pytest.fixture(scope="session")
def light_run(light_demo):
    """One threaded run of the light project (``runs/light``), shared by the tests that compare runs."""
    from wetlandflow.pipeline.run import run_project

    return run_project(light_demo, progress=False)
