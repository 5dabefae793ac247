"""The command line: one clear message on failure, the traceback only with --debug."""

from __future__ import annotations

import pytest

from wetlandflow.errors import ProjectFileError
from wetlandflow.ui.cli import main


def test_check_prints_the_inventory(small_demo, capsys):
    assert main(["check", str(small_demo)]) == 0
    out = capsys.readouterr().out
    assert "valid" in out and "EPSG:32633" in out
    assert "optical" in out and "sar" in out and "dem" in out
    assert "covers_grid" in out


def test_bad_project_gives_one_message_and_no_traceback(project_copy, capsys):
    path = project_copy(lambda d: d["model"].update(kind="svm"))
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and "[model.kind]" in err
    assert "Traceback" not in err


def test_debug_shows_the_traceback(project_copy):
    path = project_copy(lambda d: d["model"].update(kind="svm"))
    with pytest.raises(ProjectFileError):
        main(["--debug", "check", str(path)])


def test_help_carries_the_caution(capsys):
    with pytest.raises(SystemExit):
        main(["--help"])
    assert "screening-level" in capsys.readouterr().out
