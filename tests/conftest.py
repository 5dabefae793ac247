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
    from wetlandflow.demo import make_demo

    return make_demo(tmp_path_factory.mktemp("small_demo"), size=160, seed=3)


@pytest.fixture(scope="session")
def demo_run(tmp_path_factory):
    """The default-size demo (600 x 600 pixels, 6 km) run end to end once per session."""
    from wetlandflow.demo import make_demo
    from wetlandflow.run import run_project

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
