"""File layouts and optional inputs: one file per band or polarisation, patterns, CSV scene lists, mixed
layouts, VV-only SAR, no DEM, no optical, no seasons, a single date, geographic plots, and the grid snapped
to the reference input's pixel edges.  Each end-to-end case runs from the CLI on a 40 x 40 pixel fixture.

The equivalence tests compare a layout with the same data in one multi-band file per date: the reference is
the layout every version of the package has read.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import rasterio
from own_data import X0, Y0, make_project

from wetlandflow.errors import ProjectFileError
from wetlandflow.inputs.layers import input_inventory, load_inputs, project_grid
from wetlandflow.inputs.project import load_project
from wetlandflow.ui.cli import main

pytestmark = pytest.mark.filterwarnings("ignore::DeprecationWarning", "ignore::PendingDeprecationWarning")


def _stacks(pf):
    project = load_project(pf)
    inputs = load_inputs(project, project_grid(project), check=False)
    opt = inputs.optical.compute() if inputs.optical is not None else None
    sar = inputs.sar.compute() if inputs.sar is not None else None
    return project, opt, sar


@pytest.mark.parametrize("optical, sar", [("files", "pattern"), ("pattern", "list"), ("list", "pattern")])
def test_layouts_read_the_same_values_as_one_file_per_date(tmp_path, optical, sar):
    _, ref_opt, ref_sar = _stacks(make_project(tmp_path / "stack", optical="stack", sar="stack", dem=False))
    project, opt, sar_stack = _stacks(make_project(tmp_path / "split", optical=optical, sar=sar, dem=False))
    assert (
        len(project.optical) == 2 and project.optical[0].path is None and len(project.optical[0].files) == 10
    )
    assert list(opt["band"].values) == list(ref_opt["band"].values)
    np.testing.assert_array_equal(opt.values, ref_opt.values)
    np.testing.assert_allclose(sar_stack.values, ref_sar.values, rtol=1e-6)
    assert list(sar_stack["pol"].values) == ["VV", "VH"]


def test_csv_scene_list_reads_orbits(tmp_path):
    project = load_project(make_project(tmp_path, optical="stack", sar="list", dem=False))
    assert [s.orbit for s in project.sar] == ["descending", "descending"]
    assert all(set(s.files) == {"VV", "VH"} for s in project.sar)


def test_mixed_layouts_in_one_project(tmp_path):
    import tomli_w
    import tomllib

    pf = make_project(tmp_path, optical="files", sar="stack", dem=False)
    project = load_project(pf)
    extra = tmp_path / "optical" / "extra"
    extra.mkdir()
    for band, src in project.optical[1].files.items():
        (extra / f"late_20240901_{band}.tif").write_bytes(src.read_bytes())
    doc = tomllib.loads(pf.read_text())
    doc["optical"].append({"pattern": "optical/extra/late_{date}_{band}.tif", "sensor": "sentinel2_l2a"})
    doc["optical"][0] = {"date": "2024-05-10", "path": "stack_20240510.tif", "sensor": "sentinel2_l2a"}
    with rasterio.open(project.optical[0].files["blue"]) as src:
        profile = {**src.profile, "count": 10}
    with rasterio.open(tmp_path / "stack_20240510.tif", "w", **profile) as dst:
        for i, band in enumerate(project.optical[0].bands):
            with rasterio.open(project.optical[0].files[band]) as src:
                dst.write(src.read(1), i + 1)
    pf.write_text(tomli_w.dumps(doc))
    mixed = load_project(pf)
    assert [s.date.isoformat() for s in mixed.optical] == ["2024-05-10", "2024-07-20", "2024-09-01"]
    assert [bool(s.path) for s in mixed.optical] == [True, False, False]
    opt = load_inputs(mixed, project_grid(mixed), check=False).optical.compute()
    np.testing.assert_array_equal(opt.isel(time=1).values, opt.isel(time=2).values)  # same files, two layouts


def test_pattern_that_matches_nothing_names_the_key(tmp_path):
    pf = make_project(tmp_path, optical="pattern", dem=False)
    pf.write_text(pf.read_text().replace("scene_{date}_{band}.tif", "img_{date}_{band}.tif"))
    with pytest.raises(ProjectFileError, match=r"\[optical\[0\]\.pattern\] no file matches"):
        load_project(pf)


def _run_cli(pf, capsys) -> tuple[str, dict]:
    assert main(["check", str(pf)]) == 0
    checked = capsys.readouterr().out
    assert main(["run", str(pf), "--quiet"]) == 0
    capsys.readouterr()
    manifest = json.loads((pf.parent / "runs" / "project" / "manifest.json").read_text())
    return checked, manifest


CASES = {
    # name: (make_project keywords, features that must be skipped, a word each reason must contain)
    "per-band optical + per-polarisation SAR in dB (patterns)": (
        dict(optical="pattern", sar="pattern", sar_units="db"),
        {},
        "",
    ),
    "Landsat 4-7 6-band stack, linear SAR list, no DEM, one date": (
        dict(
            sensor="landsat47_tm_etm_c2l2", sar="list", sar_units="linear", dem=False, dates=("2024-06-15",)
        ),
        {"ndre1": "re1", "reip": "re1", "elevation": "DEM"},
        "",
    ),
    "8-bit RGBN at 5 m, VV-only SAR, no DEM": (
        dict(sensor="rgbn", pixel=5.0, sar="stack", pols=("VV",), dem=False, scene={"scale": 1 / 255}),
        {"ndmi": "swir1", "ndre2": "re2"},
        "",
    ),
    "RGB only, geographic plots": (
        dict(sensor="rgb", dem=False, plots_crs="EPSG:4326", scene={"scale": 1 / 255}),
        {"ndvi": "nir"},
        "",
    ),
    "SAR and DEM only (no optical), seasons given": (
        dict(
            optical=None,
            sar="pattern",
            dem=True,
            seasons={"spring": ["04-01", "06-10"], "summer": ["06-11", "08-31"]},
        ),
        {"ndvi": "optical"},
        "",
    ),
}


@pytest.mark.parametrize("case", list(CASES))
def test_own_data_runs_from_the_cli(tmp_path, capsys, case):
    kwargs, must_skip, _ = CASES[case]
    pf = make_project(tmp_path, **kwargs)
    checked, manifest = _run_cli(pf, capsys)
    skipped = manifest["steps"]["features"]["skipped"]
    for name, word in must_skip.items():
        assert word in skipped[name], (name, skipped.get(name))
        assert f"{name}: " in checked  # check lists the same skip with its reason
    metrics = json.loads((pf.parent / "runs" / "project" / "validation" / "metrics.json").read_text())
    assert 0 <= metrics["overall_accuracy"] <= 1
    features = manifest["steps"]["features"]["features"]
    if kwargs.get("sensor") in ("rgb", "rgbn"):  # few indices possible: the raw seasonal band medians join
        assert {"red_all", "green_all", "blue_all"} <= set(features)
        assert ("nir_all" in features) == (kwargs["sensor"] == "rgbn")
    if kwargs.get("pols") == ("VV",):
        assert "vv_mean_db" in features and not any(k.startswith("vh") for k in features)
        assert "water_frequency" in features


def test_explicit_feature_the_bands_cannot_compute_is_refused_by_check(tmp_path, capsys):
    pf = make_project(
        tmp_path, sensor="landsat89_oli_c2l2", dem=False, extra={"features": {"select": ["ndre1"]}}
    )
    assert main(["check", str(pf)]) == 2
    err = capsys.readouterr().err
    assert "features.select" in err and "ndre1" in err and "re1" in err and "landsat89_oli_c2l2" in err


def test_grid_snaps_to_the_first_scene_pixel_edges(tmp_path):
    # a 30 m scene whose corner is at X0 = ...015 m: the grid shares its edges, so no pixel is resampled
    pf = make_project(tmp_path, sensor="landsat47_tm_etm_c2l2", pixel=30.0, dem=False)
    project = load_project(pf)
    grid = project_grid(project)
    assert (grid.transform.c - X0) % 30 == 0 and (Y0 - grid.transform.f) % 30 == 0
    assert set(input_inventory(project, grid)["to_grid"]) == {"on the grid's pixels"}
    opt = load_inputs(project, grid, check=False).optical.isel(time=0).compute()
    with rasterio.open(project.optical[0].path) as src:
        dn = src.read(4).astype(np.float64)
        col, row = ~src.transform * (float(opt["x"][3]), float(opt["y"][3]))
    expected = dn[int(row), int(col)] * 0.0000275 - 0.2
    assert float(opt.sel(band="nir").isel(y=3, x=3)) == pytest.approx(expected, abs=1e-6)
    # align_to = "none": the origin is a multiple of the pixel size, and the inventory says it resamples
    pf = make_project(
        tmp_path / "none",
        sensor="landsat47_tm_etm_c2l2",
        pixel=30.0,
        dem=False,
        extra={"grid": {"align_to": "none"}},
    )
    project = load_project(pf)
    grid = project_grid(project)
    assert grid.transform.c % 30 == 0
    assert all(v.startswith("resampled") for v in input_inventory(project, grid)["to_grid"])


def _registry_example() -> str:
    """The code example of the registry's docstring, as the user would copy it."""
    import textwrap

    from wetlandflow.features import registry

    doc = registry.__doc__
    block = doc[doc.index("::\n\n") + 4 :]
    lines = []
    for line in block.splitlines():
        if line.strip() and not line.startswith("    "):
            break
        lines.append(line)
    return textwrap.dedent("\n".join(lines))


def test_user_feature_from_a_plugin_file_runs_end_to_end(tmp_path, capsys):
    from wetlandflow.features.registry import REGISTRY

    (tmp_path / "my_indices.py").write_text(_registry_example())
    pf = make_project(tmp_path, dem=False, extra={"features": {"plugins": ["my_indices.py"]}})
    try:
        checked, manifest = _run_cli(pf, capsys)
        assert "green_red_ratio" in checked
        attrs = manifest["steps"]["features"]["features"]["green_red_ratio_all"]
        assert attrs["domain"] == "user" and attrs["units"] == "unspecified"
        assert attrs["long_name"] == "Green / red ratio of the seasonal composites."
        assert "ndvi_all" in manifest["steps"]["features"]["features"]  # the built-in default stays
        # the plugin's value at a plot pixel is the ratio of the composite's bands
        import xarray as xr

        cube = xr.open_zarr(pf.parent / "runs" / "project" / "features.zarr")
        ratio = cube["green_red_ratio_all"].values
        assert np.nanmax(ratio) > 1 > np.nanmin(ratio)  # water is greener than red, upland redder (fixture)
    finally:
        REGISTRY.pop("green_red_ratio", None)


def test_plugin_that_registers_nothing_is_refused_by_check(tmp_path, capsys):
    (tmp_path / "empty.py").write_text("x = 1\n")
    pf = make_project(tmp_path, dem=False, extra={"features": {"plugins": ["empty.py"]}})
    assert main(["check", str(pf)]) == 2
    assert "features.plugins[0]" in capsys.readouterr().err


def test_user_feature_registered_in_a_notebook_runs_through_run_project(tmp_path):
    import wetlandflow
    from wetlandflow.features.registry import REGISTRY
    from wetlandflow.pipeline.run import run_project

    @wetlandflow.feature("nir_minus_red", needs=("composite",), bands=("nir", "red"))
    def nir_minus_red(inputs):
        """NIR minus red reflectance of the seasonal composites."""
        r = inputs.composite["reflectance"]
        out = r.sel(band="nir", drop=True) - r.sel(band="red", drop=True)
        return out.assign_attrs(units="1", formula="nir - red")

    try:
        pf = make_project(tmp_path, dem=False, extra={"features": {"select": ["ndvi", "nir_minus_red"]}})
        result = run_project(pf, progress=False)
        attrs = result.manifest["steps"]["features"]["features"]
        assert set(attrs) == {"ndvi_all", "nir_minus_red_all"}
        mine = attrs["nir_minus_red_all"]
        assert mine["units"] == "1" and mine["formula"] == "nir - red" and mine["domain"] == "user"
    finally:
        REGISTRY.pop("nir_minus_red", None)
