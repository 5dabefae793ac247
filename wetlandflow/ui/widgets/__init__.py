"""Notebook controls: project settings panels and background tasks with progress and cancel.

Every control maps to one field of the project file (:mod:`wetlandflow.inputs.project`):
:class:`FeaturePicker` to ``[features]`` (``select`` and ``params``),
:class:`ModelSettings`, :class:`ValidationSettings` (with the suspect-label
options), :class:`OutputSettings` and :class:`PriorsSettings` (with ``[priors.shares]``)
to their sections.  :class:`ProjectPanel` gathers them, validates what they
represent with the library's own parser and saves it as a project file.

Heavy steps run in a background thread (:class:`TaskPanel`), so the notebook
stays responsive, with a progress bar, the elapsed time, an estimate of the time
left, and a cancel button that stops at the job's next cancel point (between
folds, chunks or prediction windows), keeping what was finished
(:mod:`.jobs` says where each job can stop).  :class:`RunPanel` runs a whole
project, :class:`CrossValidationPanel` cross-validates fold by fold, and
:class:`MapViewer` redraws one map preview at a time, and :class:`MonitorPanel` runs the ``[monitor]``
analyses with its controls (:mod:`.monitor`).  :func:`run_notebook`
executes a template notebook headless with new parameters.

Everything is importable from ``wetlandflow.ui.widgets``; the submodules are
:mod:`.tasks` (background tasks and their panel), :mod:`.settings` (controls and
the project panel), :mod:`.jobs` (the heavy steps, composed from the library),
:mod:`.panels` and :mod:`.headless`.

Examples
--------
>>> from wetlandflow import widgets                        # doctest: +SKIP
>>> panel = widgets.ProjectPanel("project.toml")           # doctest: +SKIP
>>> panel.model.controls["n_estimators"].value = 200       # doctest: +SKIP
>>> widgets.RunPanel(panel)                                 # doctest: +SKIP
"""

from __future__ import annotations

from .headless import inject_parameters, parameters_source, run_notebook
from .jobs import (
    CVResult,
    cross_validate_folds,
    cv_table,
    design_folds,
    features_of,
    manifest_steps,
    require_run,
    run_steps,
    run_with_control,
    select_features,
    tune,
    with_settings,
)
from .monitor import MonitorPanel, MonitorSettings
from .panels import CrossValidationPanel, MapViewer, RunPanel
from .settings import (
    FeaturePicker,
    ModelSettings,
    OutputSettings,
    PriorsSettings,
    ProjectPanel,
    SectionSettings,
    ValidationSettings,
    rebase_paths,
)
from .tasks import (
    BackgroundTask,
    Cancelled,
    Html,
    TaskControl,
    TaskPanel,
    estimate_remaining,
    format_seconds,
    mime_bundle,
    show_in,
)

__all__ = [
    "BackgroundTask",
    "CVResult",
    "Cancelled",
    "CrossValidationPanel",
    "FeaturePicker",
    "Html",
    "MapViewer",
    "ModelSettings",
    "MonitorPanel",
    "MonitorSettings",
    "OutputSettings",
    "PriorsSettings",
    "ProjectPanel",
    "RunPanel",
    "SectionSettings",
    "TaskControl",
    "TaskPanel",
    "ValidationSettings",
    "cross_validate_folds",
    "cv_table",
    "design_folds",
    "estimate_remaining",
    "features_of",
    "format_seconds",
    "inject_parameters",
    "manifest_steps",
    "mime_bundle",
    "parameters_source",
    "rebase_paths",
    "require_run",
    "run_notebook",
    "run_steps",
    "run_with_control",
    "select_features",
    "show_in",
    "tune",
    "with_settings",
]
