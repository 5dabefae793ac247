"""Sensor descriptions: the agencies' scaling conventions, centre wavelengths, and the plausibility check.

References
----------
- USGS, "How do I use a scale factor with Landsat Level-2 science products?" (FAQ): Collection 2 surface
  reflectance = DN x 0.0000275 - 0.2, fill 0, valid range 7273-43636; worked example DN 18,639 -> 0.313.
- ESA (2022), Sentinel-2 processing baseline 04.00: L2A surface reflectance = (DN + BOA_ADD_OFFSET) /
  QUANTIFICATION_VALUE, with BOA_ADD_OFFSET = -1000 and QUANTIFICATION_VALUE = 10000; DN 0 is no data.
- Montero et al. (2023), "A standardized catalogue of spectral indices to advance the use of remote sensing
  in Earth system research", Scientific Data 10, 197: the band table shipped with the PyPI package spyndex.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import xarray as xr
from own_data import make_project, write_tif

from wetlandflow.errors import DataQualityError, ProjectFileError
from wetlandflow.features.plausibility import ReflectanceWarning, index_range_counts, optical_plausibility
from wetlandflow.inputs.layers import load_inputs, project_grid
from wetlandflow.inputs.project import load_project
from wetlandflow.inputs.sensors import SENSORS

pytestmark = pytest.mark.filterwarnings("ignore::DeprecationWarning")


def _one_pixel_project(tmp_path, dn: int, sensor: str, dtype="uint16"):
    """A 4 x 4 scene whose every band holds ``dn``; returns the loaded reflectance of its first band."""
    bands = SENSORS[sensor].bands
    pf = make_project(tmp_path, sensor=sensor, dates=("2024-06-01",), dem=False)
    data = np.full((len(bands), 40, 40), dn, dtype=dtype)
    write_tif(tmp_path / "optical" / "scene_20240601.tif", data, pixel=10.0)
    project = load_project(pf)
    inputs = load_inputs(project, project_grid(project), check=False)
    return float(inputs.optical.isel(time=0, band=0, y=5, x=5).compute())


@pytest.mark.reference
def test_landsat_collection2_worked_example(tmp_path):
    # USGS FAQ: a pixel value of 18,639 x 0.0000275 - 0.2 gives a reflectance of 0.313
    value = _one_pixel_project(tmp_path, 18639, "landsat89_oli_c2l2")
    assert value == pytest.approx(18639 * 0.0000275 - 0.2, abs=1e-6)
    assert round(value, 3) == 0.313


@pytest.mark.reference
@pytest.mark.parametrize("name", ["landsat89_oli_c2l2", "landsat47_tm_etm_c2l2"])
def test_landsat_valid_range_maps_to_unit_interval(name):
    # USGS: valid DN 7273-43636 for Collection 2 SR, i.e. reflectance about 0 to 1 after scale and offset
    s = SENSORS[name]
    assert s.scale == 0.0000275 and s.offset == -0.2 and s.nodata == 0
    assert s.valid_range[0] == pytest.approx(0.0, abs=1e-4) and s.valid_range[1] == pytest.approx(
        1.0, abs=1e-4
    )


@pytest.mark.reference
@pytest.mark.parametrize(
    "sensor, expected", [("sentinel2_l2a", (1452 - 1000) / 10000), ("sentinel2_l2a_pre2022", 1452 / 10000)]
)
def test_sentinel2_both_offset_conventions(tmp_path, sensor, expected):
    # ESA processing baseline 04.00: (DN + BOA_ADD_OFFSET) / QUANTIFICATION_VALUE; before it, no offset
    assert _one_pixel_project(tmp_path, 1452, sensor) == pytest.approx(expected, abs=1e-6)


@pytest.mark.reference
@pytest.mark.parametrize(
    "sensor, platform",
    [
        ("sentinel2_l2a", "sentinel2a"),
        ("landsat89_oli_c2l2", "landsat8"),
        ("landsat89_oli_c2l2", "landsat9"),
        ("landsat47_tm_etm_c2l2", "landsat7"),
    ],
)
def test_centre_wavelengths_match_the_spectral_index_catalogue(sensor, platform):
    spyndex = pytest.importorskip("spyndex")
    # portable band name -> catalogue band (Landsat 8/9's NIR is the catalogue's narrow NIR N2)
    catalogue = {
        "coastal": "A",
        "blue": "B",
        "green": "G",
        "red": "R",
        "re1": "RE1",
        "re2": "RE2",
        "re3": "RE3",
        "nir": "N2" if platform.startswith("landsat8") or platform == "landsat9" else "N",
        "nir_narrow": "N2",
        "swir1": "S1",
        "swir2": "S2",
    }
    s = SENSORS[sensor]
    for band, centre in zip(s.bands, s.centre_nm, strict=True):
        ref = getattr(spyndex.bands[catalogue[band]], platform)
        assert centre == pytest.approx(ref.wavelength, abs=0.05), (sensor, band)


def test_every_sensor_is_consistent():
    for s in SENSORS.values():
        assert len(s.bands) == len(s.centre_nm) and s.valid_range[0] < s.valid_range[1]
        assert not s.native or len(s.native) == len(s.bands)
        assert list(s.centre_nm) == sorted(s.centre_nm) or s.name in (
            "rgbn",
            "rgb",
        )  # file order, not spectral


def test_unscaled_8bit_rgbn_is_refused_with_the_fix(tmp_path):
    pf = make_project(tmp_path, sensor="rgbn", dem=False, dates=("2024-06-01",))
    project = load_project(pf)
    inputs = load_inputs(project, project_grid(project))
    with pytest.raises(DataQualityError, match=r"optical\[0\].*scale = 0.00392157 \(1/255\)"):
        optical_plausibility(project, inputs)


def test_warn_only_switch_turns_the_refusal_into_a_warning(tmp_path):
    pf = make_project(
        tmp_path, sensor="rgbn", dem=False, dates=("2024-06-01",), scene={"plausibility": "warn"}
    )
    project = load_project(pf)
    inputs = load_inputs(project, project_grid(project))
    with pytest.warns(ReflectanceWarning, match="plausibility"):
        record = optical_plausibility(project, inputs)
    assert next(iter(record["optical 2024-06-01"].values()))["diagnosis"] == "implausible (warned)"


@pytest.mark.reference
def test_index_outside_its_mathematical_range_is_counted():
    # a normalised difference (a - b) / (a + b) lies in [-1, 1] for non-negative a, b (the form of
    # Rouse et al. 1974);
    # a negative reflectance (e.g. a doubled offset) pushes it outside, and that must be counted, not hidden
    refl = xr.DataArray(
        np.array([[[0.3, 0.2]], [[0.1, -0.05]], [[0.05, 0.04]]]),
        dims=("band", "y", "x"),
        coords={"band": ["nir", "red", "green"]},
    )
    counts = index_range_counts(refl)
    assert counts == {"ndvi": 1, "ndwi": 0}  # (0.2 + 0.05) / (0.2 - 0.05) = 1.67 for the second pixel


def test_inline_sensor_and_unknown_sensor(tmp_path):
    cam = {
        "bands": ["red", "green", "blue", "nir"],
        "scale": 1 / 255,
        "valid_range": [0.0, 1.0],
        "description": "survey camera, 8-bit",
    }
    pf = make_project(
        tmp_path,
        sensor="rgbn",
        dem=False,
        dates=("2024-06-01",),
        scene={"sensor": "survey_cam"},
        extra={"sensors": {"survey_cam": cam}},
    )
    project = load_project(pf)
    assert project.optical[0].bands == ("red", "green", "blue", "nir")
    assert project.optical[0].scale == pytest.approx(1 / 255)
    with warnings.catch_warnings():
        warnings.simplefilter("error", ReflectanceWarning)
        optical_plausibility(project, load_inputs(project, project_grid(project)))
    pf.write_text(pf.read_text().replace('sensor = "survey_cam"', 'sensor = "survey_cam2"'))
    with pytest.raises(ProjectFileError, match=r"unknown sensor 'survey_cam2'.*\[sensors.survey_cam2\]"):
        load_project(pf)
