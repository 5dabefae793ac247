"""``[classes] drop_empty``: a class of the scheme that no plot is labelled with is refused by default (the
message names the class and the option) and, with the option, left out of the scheme with the same sentence in
the warning, ``check``, the manifest, the run summary and the methods report."""

from __future__ import annotations

import pandas as pd
import pytest
import rasterio
from own_data import CLASSES, make_project

from wetlandflow.errors import ClassDroppedWarning, ProjectFileError, SamplesError
from wetlandflow.inputs.project import dropped_class_note, load_project
from wetlandflow.pipeline.check import check_project
from wetlandflow.pipeline.run import run_project
from wetlandflow.report.appendix import build_report
from wetlandflow.report.templates import render_markdown

pytestmark = pytest.mark.filterwarnings("ignore::DeprecationWarning", "ignore::PendingDeprecationWarning")

NOTE = "class fen had no training plots and was dropped (classes.drop_empty = true): the map cannot show it"


def _project(tmp_path, **classes):
    """The own-data fixture (upland, open_water, marsh plots) with a fourth class, fen, that no plot has."""
    return make_project(tmp_path, dem=False, extra={"classes": {"names": [*CLASSES, "fen"], **classes},
                                                     "features": {"select": ["ndvi", "ndwi"]}})


def test_the_note_is_the_documented_sentence():
    assert dropped_class_note("fen") == NOTE


def test_drop_empty_must_be_true_or_false(tmp_path):
    with pytest.raises(ProjectFileError, match=r"classes\.drop_empty.*expected true or false"):
        load_project(_project(tmp_path, drop_empty="yes"))


def test_a_class_without_plots_is_refused_by_default_naming_the_option(tmp_path):
    pf = _project(tmp_path)
    assert load_project(pf).classes.drop_empty is False
    with pytest.raises(SamplesError) as checked:
        check_project(pf)
    message = str(checked.value)
    assert "'fen': no plot" in message
    assert "drop_empty = true in [classes]" in message
    with pytest.raises(SamplesError) as ran:
        run_project(pf, progress=False)
    assert str(ran.value) == message


def test_drop_empty_leaves_the_class_out_and_says_so_everywhere(tmp_path):
    pf = _project(tmp_path, drop_empty=True)

    report = check_project(pf)  # its warnings become the report's notes
    assert report.project.classes.names == CLASSES
    assert NOTE in report.notes and NOTE in report.text()
    assert "fen" not in report.plots["class"].tolist()

    with pytest.warns(ClassDroppedWarning, match="class fen had no training plots"):
        result = run_project(pf, progress=False)
    assert result.manifest["dropped_classes"] == ["fen"]
    with rasterio.open(result.run_dir / "maps" / "probability.tif") as src:
        assert src.count == len(CLASSES)
        assert list(src.descriptions) == list(CLASSES)
    areas = pd.read_csv(result.run_dir / "areas.csv")
    assert areas["class"].tolist() == list(CLASSES)
    assert NOTE in result.summary()
    methods = " ".join(render_markdown(build_report(result.run_dir)).split())
    assert NOTE in methods
