"""Contract: ``check`` refuses every project a run refuses before (for the plots: instead of) its features.

The refusals of a run before its features step, from the code:

* ``inputs.project.load_project``: schema and values (``ProjectFileError``), sensors, scene layouts;
* ``inputs.layers.project_grid``: geographic CRS (``AlignmentError``), ``grid.align_to`` naming an absent
  input;
* ``inputs.layers.load_inputs``: band count vs the ``bands`` list and overlap (``align.read_aligned``,
  ``AlignmentError``), band descriptions vs the list (``ProjectFileError``), scenes with different band sets
  (``AlignmentError``), SAR values vs declared units (``DataQualityError``), DEM units and coverage, seasons
  without a clear observation;
* ``pipeline.run.plausibility_checks``: implausible reflectance for the sensor (``DataQualityError``);
* ``features.cube.build_cube`` before any feature is computed: unknown names, a named feature the inputs
  cannot compute, parameters for a feature not computed, nothing computable (``ProjectFileError``);

and, after the features but decided by the project file and the plots alone:

* ``training.samples.read_plots``: class field, labels outside the class scheme (``SamplesError``);
* ``pipeline.run.cross_validate``: more folds than plots (``ProjectFileError``).

For each, the test builds the project, has ``check`` refuse it and then ``run`` refuse it with an error of
the same class and the same message.
"""

from __future__ import annotations

import pytest
from own_data import make_project

from wetlandflow.errors import (
    AlignmentError,
    DataQualityError,
    ProjectFileError,
    SamplesError,
    WetlandflowError,
)
from wetlandflow.pipeline.check import check_project
from wetlandflow.pipeline.run import run_project

pytestmark = pytest.mark.filterwarnings(
    "ignore::DeprecationWarning", "ignore::PendingDeprecationWarning", "ignore::UserWarning"
)

LIGHT = {"features": {"select": ["ndvi", "ndwi"]}}

CASES = {
    "unknown feature name": (
        dict(dem=False, extra={"features": {"select": ["ndvii"]}}),
        ProjectFileError,
        "features.select",
    ),
    "selected feature needs a band the sensor lacks": (
        dict(sensor="landsat47_tm_etm_c2l2", dem=False, extra={"features": {"select": ["ndvi", "ndre1"]}}),
        ProjectFileError,
        "re1",
    ),
    "selected feature needs the DEM the project lacks": (
        dict(dem=False, extra={"features": {"select": ["slope"]}}),
        ProjectFileError,
        "DEM",
    ),
    "parameters for a feature not computed": (
        dict(dem=False, extra={"features": {"select": ["ndvi"], "params": {"twi": {"min_slope": 0.01}}}}),
        ProjectFileError,
        "features.params",
    ),
    "band count differs from the bands list": (
        dict(
            sensor="landsat47_tm_etm_c2l2",
            dem=False,
            extra=LIGHT,
            scene={"bands": ["blue", "green", "red", "nir", "swir1"]},
        ),
        AlignmentError,
        "bands",
    ),
    "reflectance implausible for the sensor": (
        dict(sensor="rgbn", dem=False, extra=LIGHT),
        DataQualityError,
        "scale",
    ),
    "SAR in dB declared linear": (  # SAR features selected: a file no selected feature reads is not checked
        dict(dem=False, sar="stack", sar_units="db", extra={"features": {"select": ["ndvi", "sar"]}}),
        DataQualityError,
        "units",
    ),
    "grid aligned to an input the project lacks": (
        dict(dem=False, extra={**LIGHT, "grid": {"align_to": "dem"}}),
        ProjectFileError,
        "grid.align_to",
    ),
    "geographic grid CRS": (
        dict(dem=False, extra={**LIGHT, "grid": {"crs": "EPSG:4326"}}),
        AlignmentError,
        "grid.crs",
    ),
    "wrong class field": (
        dict(dem=False, extra={**LIGHT, "plots": {"class_field": "klass"}}),
        SamplesError,
        "class_field",
    ),
    "labels outside the class scheme": (
        dict(dem=False, extra={**LIGHT, "classes": {"names": ["upland", "open_water", "fen"]}}),
        SamplesError,
        "marsh",
    ),
    "more folds than plots": (
        dict(dem=False, extra={**LIGHT, "validation": {"n_folds": 500}}),
        ProjectFileError,
        "validation.n_folds",
    ),
}


def _declare_linear(pf):
    pf.write_text(pf.read_text().replace('units = "db"', 'units = "linear"'))


@pytest.mark.parametrize("case", list(CASES))
def test_check_refuses_what_run_refuses(tmp_path, case):
    kwargs, error, word = CASES[case]
    pf = make_project(tmp_path, **kwargs)
    if case == "SAR in dB declared linear":
        _declare_linear(pf)
    with pytest.raises(WetlandflowError) as checked:
        check_project(pf)
    assert type(checked.value) is error, (case, checked.value)
    assert word in str(checked.value)
    with pytest.raises(WetlandflowError) as ran:
        run_project(pf, progress=False)
    assert type(ran.value) is type(checked.value)
    assert str(ran.value) == str(checked.value)


def test_check_accepts_what_run_accepts(tmp_path):
    pf = make_project(tmp_path, dem=False, extra=LIGHT)
    report = check_project(pf)
    assert report.features == ["ndvi", "ndwi"]
    assert report.plots["plots"].sum() == report.plots_info["n_plots"] == 64
    assert run_project(pf, progress=False).metrics["n_folds"] == 3
