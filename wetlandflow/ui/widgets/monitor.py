"""The monitoring panel of notebook 7: ``[monitor]`` controls and a background monitoring run.

Each control maps to one key of ``[monitor]`` or ``[monitor.water]``; :meth:`MonitorPanel.project` rebuilds
the project from its file with those keys replaced and validates it with the library's own parser (errors
name the key), and the run button runs :func:`wetlandflow.pipeline.monitor.monitor_project` in the
background with progress and a cancel point before every step.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Any

import ipywidgets as w
import pandas as pd

from ...inputs.project import (
    MONITOR_AGGREGATES,
    MONITOR_PERIODS,
    MonitorSection,
    Project,
    load_project,
    parse_project,
)
from .tasks import Html, TaskControl, TaskPanel

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

STYLE = {"description_width": "11em"}


def _threshold_value(text: str) -> str | float:
    """A threshold control's text: a method name as is, a number as a float."""
    try:
        return float(text)
    except ValueError:
        return text.strip()


class MonitorSettings(w.VBox):
    """Controls for the ``[monitor]`` keys a user tunes between runs.

    ``controls[key]`` is the widget of ``monitor.key`` (``water.period`` for ``[monitor.water] period``);
    :meth:`to_config` gives the ``[monitor]`` table they represent, sub-tables nested.
    """

    def __init__(self, section: MonitorSection | None = None) -> None:
        from ...features.optical import OPTICAL_INDICES

        m = section or MonitorSection()
        metrics = ["water", *OPTICAL_INDICES]
        self.controls: dict[str, w.Widget] = {
            "metrics": w.SelectMultiple(options=metrics, value=[x for x in m.metrics if x in metrics],
                                        description="metrics", style=STYLE),
            "aggregate": w.Dropdown(options=MONITOR_AGGREGATES, value=m.aggregate, description="aggregate",
                                    style=STYLE),
            "alpha": w.FloatText(value=m.alpha, description="alpha", style=STYLE),
            "fdr": w.FloatText(value=m.fdr, description="fdr", style=STYLE),
            "trend_maps": w.Checkbox(value=m.trend_maps, description="trend_maps", indent=False),
            "water.sar_threshold": w.Text(value=str(m.water.sar_threshold), description="SAR threshold",
                                          placeholder="split, otsu or dB", style=STYLE),
            "water.optical_threshold": w.Text(value=str(m.water.optical_threshold),
                                              description="MNDWI threshold", placeholder="otsu or a value",
                                              style=STYLE),
            "water.period": w.Dropdown(options=MONITOR_PERIODS, value=m.water.period, description="period",
                                       style=STYLE),
        }
        super().__init__(list(self.controls.values()))

    def to_config(self) -> dict[str, Any]:
        out: dict[str, Any] = {"water": {}}
        for key, control in self.controls.items():
            value = control.value
            if key.endswith("_threshold"):
                value = _threshold_value(value)
            elif isinstance(value, tuple):
                value = list(value)
            if key.startswith("water."):
                out["water"][key.split(".", 1)[1]] = value
            else:
                out[key] = value
        return out


def _monitor_render(result) -> list[Any]:
    out: list[Any] = [result.summary()]
    for name in ("polygon_trends", "baci", "recovery"):
        table = result.tables.get(name)
        if isinstance(table, pd.DataFrame) and len(table):
            out += [Html(f"<b>{name.replace('_', ' ')}</b>"), table]
    return out


class MonitorPanel(TaskPanel):
    """``[monitor]`` controls and a button that runs the monitoring with them in the background.

    The project file is not changed: the run uses the file's ``[monitor]`` section with the controls'
    values in place (recorded in ``monitor/manifest.json``).  Copy them into the file to keep them.
    """

    def __init__(self, project_file: str | Path, *, title: str = "monitor the archive") -> None:
        self.project_file = Path(project_file)
        self.settings = MonitorSettings(load_project(self.project_file).monitor)
        super().__init__(self._job, render=_monitor_render, title=title, run_label="Run monitoring")
        self.children = (self.settings, *self.children)

    def project(self) -> Project:
        """The project with ``[monitor]`` as the controls say, validated (errors name the key)."""
        data = tomllib.loads(self.project_file.read_text(encoding="utf-8-sig"))
        table = dict(data.get("monitor", {}))
        config = self.settings.to_config()
        table["water"] = {**table.get("water", {}), **config.pop("water")}
        data["monitor"] = {**table, **config}
        return parse_project(data, file=self.project_file)

    def _job(self, control: TaskControl):
        from ...pipeline.monitor import monitor_project

        return monitor_project(self.project(), progress=False, control=control)
