"""The feature cube: registry selection, provenance attrs, user features, laziness, Zarr round trip."""

from __future__ import annotations

import json

import numpy as np
import pytest
import xarray as xr

from wetlandflow._provenance import with_attrs
from wetlandflow.errors import ProjectFileError
from wetlandflow.features.cube import REQUIRED_ATTRS, build_cube, cube_summary, save_cube
from wetlandflow.features.registry import REGISTRY, feature, registry_table, resolve_selection
from wetlandflow.inputs.layers import load_inputs
from wetlandflow.inputs.project import load_project


@pytest.fixture(scope="module")
def inputs(small_demo):
    return load_inputs(load_project(small_demo))


def test_registry_groups_by_domain():
    table = registry_table()
    assert {"optical", "sar", "terrain"} <= set(table["domain"])
    names = [d.name for d in resolve_selection(["terrain"])]
    assert "twi" in names and "mrvbf" in names and "ndvi" not in names


def test_unknown_feature_names_the_choices():
    with pytest.raises(ProjectFileError, match=r"unknown feature or domain 'ndvii'.*ndvi"):
        resolve_selection(["ndvii"])


def test_cube_variables_carry_provenance(inputs):
    cube = build_cube(inputs, ["ndvi", "sar_temporal", "slope", "twi"])
    assert {"ndvi_spring", "ndvi_summer", "ndvi_autumn", "slope", "twi"} <= set(cube.data_vars)
    for name, da in cube.data_vars.items():
        assert da.dims == ("y", "x"), name
        assert da.dtype == np.float32, name
        for key in REQUIRED_ATTRS:
            assert key in da.attrs, (name, key)
        assert "formula" in da.attrs or "method" in da.attrs
        json.loads(da.attrs["parameters"])
    assert cube["slope"].attrs["units"] != inputs.dem.attrs.get("units") or cube["slope"].attrs["units"] == "degrees"


def test_cube_is_lazy_until_saved(inputs, tmp_path):
    import dask.array as dsa

    cube = build_cube(inputs, ["ndvi", "slope"])
    assert all(isinstance(v.data, dsa.Array) for v in cube.data_vars.values())
    saved = save_cube(cube, tmp_path / "features.zarr", chunk=64)
    xr.testing.assert_allclose(saved["ndvi_summer"].load(), cube["ndvi_summer"].compute())
    assert saved["ndvi_summer"].attrs["reference"] == cube["ndvi_summer"].attrs["reference"]


def test_outside_aoi_is_nan(inputs):
    cube = build_cube(inputs, ["slope"]).compute()
    outside = ~inputs.aoi.values
    assert outside.any() and np.isnan(cube["slope"].values[outside]).all()


def test_user_feature_flows_into_the_cube(inputs):
    @feature("green_red_ratio_test", domain="user", needs=("optical",), replace=True)
    def green_red_ratio(inputs, *, season="summer"):
        """Green over red reflectance of one season's composite."""
        from wetlandflow.features.builtin import composite

        r = composite(inputs)["reflectance"].sel(season=season)
        return with_attrs(r.sel(band="green") / r.sel(band="red"), "grr", long_name="green/red", units="1",
                          domain="user", formula="green / red", reference="", parameters={"season": season})

    try:
        cube = build_cube(inputs, ["green_red_ratio_test"], {"green_red_ratio_test": {"season": "spring"}})
        da = cube["green_red_ratio_test"]
        assert da.attrs["domain"] == "user" and json.loads(da.attrs["parameters"]) == {"season": "spring"}
        assert np.nanmedian(da.values) > 0
        table = cube_summary(cube)
        assert table.loc[0, "feature"] == "green_red_ratio_test" and 0 < table.loc[0, "valid_fraction"] <= 1
    finally:
        REGISTRY.pop("green_red_ratio_test", None)


def test_user_feature_without_provenance_gets_honest_defaults(inputs):
    """A user's function that says nothing about its output gets 'unspecified' units, never invented ones."""
    @feature("bare_test", domain="user", needs=("dem",), replace=True)
    def bare(inputs):
        """Twice the elevation."""
        return inputs.dem * 2

    try:
        attrs = build_cube(inputs, ["bare_test"])["bare_test"].attrs
        assert attrs["units"] == "unspecified" and attrs["domain"] == "user"
        assert attrs["long_name"] == "Twice the elevation." and "bare" in attrs["method"]
    finally:
        REGISTRY.pop("bare_test", None)


def test_builtin_feature_without_provenance_is_refused(inputs):
    from wetlandflow.features.registry import FeatureDef

    def bare(inputs):
        return inputs.dem * 2

    REGISTRY["bare_builtin_test"] = FeatureDef("bare_builtin_test", "terrain", bare, ("dem",), "bare", {})
    try:
        with pytest.raises(ValueError, match="lacks provenance attrs"):
            build_cube(inputs, ["bare_builtin_test"])
    finally:
        REGISTRY.pop("bare_builtin_test", None)


def test_sar_speckle_filter_and_hydroperiod_are_cube_options(inputs):
    params = {"sar_temporal": {"speckle": "lee", "window": 5}, "hydroperiod": {"thresholds": (0.2, 0.5, 0.9)}}
    cube = build_cube(inputs, ["sar_temporal", "water_frequency", "hydroperiod"], params).compute()
    plain = build_cube(inputs, ["sar_temporal"]).compute()
    recorded = json.loads(cube["vv_mean_db"].attrs["parameters"])["speckle_filter"]
    assert recorded == {"method": "lee", "window": 5}
    assert json.loads(plain["vv_mean_db"].attrs["parameters"])["speckle_filter"] == "none"
    # the filter smooths: the spread of the temporal-mean level across neighbouring pixels drops
    rough = lambda a: float(np.nanstd(np.diff(a.values, axis=1)))  # noqa: E731
    assert rough(cube["vv_mean_db"]) < rough(plain["vv_mean_db"])
    # hydroperiod codes follow the frequency and the thresholds given
    f, h = cube["water_frequency"].values, cube["hydroperiod"].values
    ok = np.isfinite(f)
    expected = np.select([f == 0, f < 0.2, f < 0.5, f < 0.9], [0, 1, 2, 3], 4)
    np.testing.assert_array_equal(h[ok], expected[ok])
    assert np.isnan(h[~ok]).all()


def test_unknown_speckle_filter_names_the_choices(inputs):
    with pytest.raises(ProjectFileError, match=r"speckle filter 'gamma'.*lee"):
        build_cube(inputs, ["sar_temporal"], {"sar_temporal": {"speckle": "gamma"}})
