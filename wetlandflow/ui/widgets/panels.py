"""The panels the template notebooks show: run a project, cross-validate, look at the maps."""

from __future__ import annotations

import dataclasses
from pathlib import Path
from typing import Any

import ipywidgets as w
import pandas as pd

from ...inputs.project import Project, parse_project
from .jobs import (
    CVResult,
    cross_validate_folds,
    cv_table,
    features_of,
    manifest_steps,
    run_with_control,
    with_settings,
)
from .settings import ModelSettings, ProjectPanel, ValidationSettings
from .tasks import BackgroundTask, Cancelled, Html, TaskControl, TaskPanel, show_in


def _run_render(result) -> list[Any]:
    from ..previews import plot_class_map

    dropped = set(result.manifest.get("dropped_classes") or [])  # [classes] drop_empty: not on the map
    names = tuple(n for n in result.manifest["project"]["classes"]["names"] if n not in dropped)
    out: list[Any] = [result.summary(), result.areas]
    final = result.run_dir / "maps" / "class_final.tif"
    if final.exists():
        out.append(plot_class_map(final, names, max_px=400))
    return out


class RunPanel(TaskPanel):
    """A :class:`ProjectPanel` and a run button: saves the project file, then runs it in the background.

    The output shows the run's summary, class areas and final class map; after a cancel, the manifest's
    steps (those done are reused by the next run).
    """

    def __init__(self, project_panel: ProjectPanel, *, title: str = "run the project") -> None:
        self.settings = project_panel
        self.saved: Path | None = None
        super().__init__(
            self._job, render=_run_render, render_stopped=self._stopped, title=title, run_label="Save and run"
        )
        self.children = (project_panel, *self.children)

    def _job(self, control: TaskControl):
        control.report("saving the project file", 0, 1)
        self.saved = self.settings.save()
        return run_with_control(self.saved, control)

    def _stopped(self, task: BackgroundTask) -> list[Any]:
        if self.saved is None:
            return []
        from ...inputs.project import load_project

        return [
            Html("<b>steps recorded in the manifest</b> (those done are reused by the next run)"),
            manifest_steps(load_project(self.saved).run_dir),
        ]


class CrossValidationPanel(TaskPanel):
    """Model and validation settings with a button that cross-validates fold by fold in the background.

    Parameters
    ----------
    project : Project
        The starting settings (``[model]`` and ``[validation]``).
    samples : pandas.DataFrame
        A run's ``samples.parquet``.
    features : list of str, optional
    """

    def __init__(
        self,
        project: Project,
        samples: pd.DataFrame,
        features: list[str] | None = None,
        *,
        title: str = "cross-validation",
    ) -> None:
        self.project, self.samples = project, samples
        self.features = list(features or features_of(samples))
        self.model = ModelSettings(dataclasses.asdict(project.model))
        self.validation = ValidationSettings(dataclasses.asdict(project.validation))
        self.compare_random = w.Checkbox(
            value=False, description="also random pixel folds (leaky, to compare)", indent=False
        )
        self.results: dict[str, CVResult] = {}
        super().__init__(
            self._job,
            render=self._render,
            render_stopped=self._stopped,
            title=title,
            run_label="Cross-validate",
        )
        self.children = (w.HBox([self.model, self.validation]), self.compare_random, *self.children)

    def settings(self) -> Project:
        """The project with the panel's model and validation settings, validated by the project parser."""
        from ...inputs.project import to_dict

        p = with_settings(
            with_settings(self.project, "model", **self.model.to_config()),
            "validation",
            **self.validation.to_config(),
        )
        data = {k: v for k, v in to_dict(p).items() if k != "file"}
        return parse_project(data, file=p.file)

    def _job(self, control: TaskControl) -> dict[str, CVResult]:
        p = self.settings()
        designs = [p.validation.design] + (
            ["random"] if self.compare_random.value and p.validation.design != "random" else []
        )
        self.results = {}
        try:
            self.results = cross_validate_folds(
                p, self.samples, self.features, control=control, designs=designs
            )
        except Cancelled as exc:
            self.results = getattr(exc, "partial", {})
            raise
        return self.results

    def _render(self, results: dict[str, CVResult]) -> list[Any]:
        from ...validation.splitters import plot_folds

        first = next(iter(results.values()))
        per_fold = pd.concat([r.per_fold for r in results.values()], ignore_index=True)
        fig = plot_folds(
            self.samples,
            first.folds,
            block_size_m=self.validation.controls["block_size_m"].value if first.design == "blocks" else None,
        )
        return [cv_table(results, self.samples), per_fold, fig]

    def _stopped(self, task: BackgroundTask) -> list[Any]:
        if not self.results:
            return []
        return [Html("<b>folds finished before the cancel</b>"), cv_table(self.results, self.samples)]


class MapViewer(w.VBox):
    """One map preview at a time, chosen from the run's rasters, redrawn in place in one output area.

    ``layer`` lists ``class_final``, ``class``, each class probability, each confidence band, and the
    dissimilarity index and applicability flag when the run wrote them.  Previews come from the COGs'
    overviews (:mod:`wetlandflow.ui.previews`).
    """

    def __init__(self, run_dir: str | Path, class_names: tuple[str, ...], *, max_px: int = 500) -> None:
        self.run_dir, self.class_names, self.max_px = Path(run_dir), tuple(class_names), max_px
        self.layers = self._layers()
        self.layer = w.Dropdown(options=list(self.layers), description="layer")
        self.show_button = w.Button(description="Show", icon="image")
        self.output = w.Output()
        self.show_button.on_click(lambda _: self.show())
        super().__init__([w.HBox([self.layer, self.show_button]), self.output])

    def _layers(self) -> dict[str, tuple[str, Any]]:
        import rasterio

        maps = self.run_dir / "maps"
        out: dict[str, tuple[str, Any]] = {
            n: (f"{n}.tif", None) for n in ("class_final", "class") if (maps / f"{n}.tif").exists()
        }
        for stem in ("probability", "confidence", "dissimilarity", "applicability"):
            if (maps / f"{stem}.tif").exists():
                with rasterio.open(maps / f"{stem}.tif") as src:
                    out |= {f"{stem}: {d}": (f"{stem}.tif", d) for d in src.descriptions}
        return out

    def figure(self, layer: str | None = None) -> Any:
        """The preview figure of ``layer`` (default: the one selected)."""
        from ..previews import plot_class_map, plot_layer

        file, band = self.layers[layer or self.layer.value]
        path = self.run_dir / "maps" / file
        if band is None:
            return plot_class_map(path, self.class_names, max_px=self.max_px)
        limits = {"vmin": 0.0, "vmax": 1.0} if file in ("probability.tif", "confidence.tif") else {}
        return plot_layer(path, band, max_px=self.max_px, **limits)

    def show(self) -> None:
        show_in(self.output, self.figure())
