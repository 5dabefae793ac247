"""Settings controls: one widget per field of the project file, and the panel that saves the file.

Each control's initial value is the file's value or the schema's default
(:mod:`wetlandflow.inputs.project`); :class:`ProjectPanel` rebuilds the TOML mapping
from the controls, validates it with the library's own parser (errors name the
key) and writes it.
"""

from __future__ import annotations

import copy
import json
import sys
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import ipywidgets as w
import pandas as pd

from ...errors import ProjectFileError, WetlandflowError
from ...inputs.project import (
    CV_DESIGNS,
    MODEL_KINDS,
    PRIOR_ADJUSTMENTS,
    SUSPECT_LABELS,
    SUSPECT_RULES,
    ModelSection,
    OutputSection,
    PriorsSection,
    Project,
    ValidationSection,
    parse_project,
)

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib


def _field_widget(name: str, value: Any, options: Sequence[Any] | None = None) -> w.Widget:
    style = {"description_width": "11em"}
    if options is not None:
        return w.Dropdown(options=list(options), value=value, description=name, style=style)
    if isinstance(value, bool):
        return w.Checkbox(value=value, description=name, style=style, indent=False)
    if isinstance(value, int):
        return w.IntText(value=value, description=name, style=style)
    if isinstance(value, float):
        return w.FloatText(value=value, description=name, style=style)
    return w.Text(value=str(value), description=name, style=style)


class SectionSettings(w.VBox):
    """Controls for some fields of one project-file section (``[model]``, ``[validation]`` ...).

    ``controls[field]`` is the widget of ``section.field``; its initial value is the file's value, or
    the schema's default.  :meth:`to_config` gives ``{field: value}`` for the fields shown.
    """

    section: str = ""
    schema: type = object
    fields: tuple[str, ...] = ()
    choices: dict[str, tuple[Any, ...]] = {}
    # keys of the section the controls decide even when :meth:`to_config` leaves them out (then removed)
    owned: tuple[str, ...] = ()

    def __init__(self, values: Mapping[str, Any] | None = None) -> None:
        values = dict(values or {})
        defaults = self.schema()
        self.controls = {
            f: _field_widget(
                f, type(getattr(defaults, f))(values.get(f, getattr(defaults, f))), self.choices.get(f)
            )
            for f in self.fields
        }
        super().__init__(list(self.controls.values()))

    def to_config(self) -> dict[str, Any]:
        return {f: c.value for f, c in self.controls.items()}


class ModelSettings(SectionSettings):
    """``[model]``: kind, size, learning rate, class weighting, threads."""

    section, schema = "model", ModelSection
    fields = ("kind", "n_estimators", "max_depth", "learning_rate", "class_weighting", "n_threads")
    choices = {"kind": MODEL_KINDS}


class ValidationSettings(SectionSettings):
    """``[validation]``: design, folds, block size, the explicit permission for random pixel folds, and what
    to do with suspect training labels (``suspect_labels``: flag, refit or off; ``suspect_rule``)."""

    section, schema = "validation", ValidationSection
    fields = ("design", "n_folds", "block_size_m", "allow_random_pixels", "suspect_labels", "suspect_rule")
    choices = {"design": CV_DESIGNS, "suspect_labels": SUSPECT_LABELS, "suspect_rule": SUSPECT_RULES}


class PriorsSettings(SectionSettings):
    """``[priors]``: adjust the map to the area's class priors (``adjust``: none, em or given), the pixels of
    the EM estimate, and one share per class for ``adjust = "given"`` (``[priors.shares]``).

    ``share_boxes[class]`` holds a class's share; the shares are written only with ``adjust = "given"``
    (the parser normalises them and refuses them otherwise).

    Examples
    --------
    >>> s = PriorsSettings({"adjust": "given"}, classes=("upland", "bog"))
    >>> s.share_boxes["bog"].value = 0.2
    >>> s.to_config()["shares"]
    {'upland': 0.0, 'bog': 0.2}
    """

    section, schema = "priors", PriorsSection
    fields = ("adjust", "sample_pixels")
    choices = {"adjust": PRIOR_ADJUSTMENTS}
    owned = ("shares",)

    def __init__(self, values: Mapping[str, Any] | None = None, *, classes: Sequence[str] = ()) -> None:
        super().__init__(values)
        shares = dict((values or {}).get("shares") or {})
        style = {"description_width": "11em"}
        self.share_boxes = {c: w.FloatText(value=float(shares.get(c, 0.0)), description=f"share {c}",
                                           style=style) for c in classes}
        self.shares_box = w.VBox([w.HTML("<small>[priors.shares], used with adjust = given</small>"),
                                  *self.share_boxes.values()])
        self.children = (*self.children, self.shares_box)

    def to_config(self) -> dict[str, Any]:
        cfg = super().to_config()
        if cfg["adjust"] == "given":
            cfg["shares"] = {c: b.value for c, b in self.share_boxes.items()}
        return cfg


class OutputSettings(SectionSettings):
    """``[output]``: window size, area of applicability, minimum mapping unit, explanations."""

    section, schema = "output", OutputSection
    fields = ("chunk_size", "applicability", "mmu_pixels", "connectivity", "explain", "explain_rows")
    choices = {"connectivity": (8, 4)}


def _param_text(value: Any) -> str:
    return json.dumps(list(value) if isinstance(value, tuple) else value)


class FeaturePicker(w.VBox):
    """``[features]``: one checkbox per registered feature, grouped by domain, with its parameters.

    ``checkboxes[name]`` selects a feature, ``domain_boxes[domain]`` (un)ticks a whole domain, and
    ``param_boxes[(name, param)]`` holds a parameter as JSON text (``"lee"``, ``7``, ``[100, 300]``).
    :attr:`select` names a whole domain when all its features are ticked; :attr:`params` lists only
    parameters that differ from the feature's defaults.
    """

    def __init__(
        self,
        select: Sequence[str] = ("optical", "sar", "terrain"),
        params: Mapping[str, Mapping[str, Any]] | None = None,
    ) -> None:
        from ...features.registry import registry_table, resolve_selection

        self.table = registry_table()
        chosen = {d.name for d in resolve_selection(tuple(select))}
        params = {k: dict(v) for k, v in (params or {}).items()}
        self.checkboxes: dict[str, w.Checkbox] = {}
        self.param_boxes: dict[tuple[str, str], w.Text] = {}
        self.domain_boxes: dict[str, w.Checkbox] = {}
        sections, titles = [], []
        for domain, rows in self.table.groupby("domain", sort=False):
            sections.append(self._domain_box(str(domain), rows, chosen, params))
            titles.append(str(domain))
        self.accordion = w.Accordion(children=sections, titles=tuple(titles))
        super().__init__([self.accordion])

    def _domain_box(self, domain: str, rows: pd.DataFrame, chosen: set[str], params: dict) -> w.VBox:
        whole = w.Checkbox(
            value=all(n in chosen for n in rows["name"]), description=f"all {domain} features", indent=False
        )
        self.domain_boxes[domain] = whole
        items = [whole]
        for _, r in rows.iterrows():
            box = w.Checkbox(
                value=r["name"] in chosen, description=r["name"], indent=False, layout=w.Layout(width="14em")
            )
            self.checkboxes[r["name"]] = box
            fields = []
            for p, default in r["defaults"].items():
                text = w.Text(
                    value=_param_text(params.get(r["name"], {}).get(p, default)),
                    description=p,
                    layout=w.Layout(width="16em"),
                    style={"description_width": "7em"},
                )
                self.param_boxes[(r["name"], p)] = text
                fields.append(text)
            items.append(w.HBox([box, w.HTML(f"<small>{r['description']}</small>"), *fields]))

        def toggle(change: dict) -> None:
            for n in rows["name"]:
                self.checkboxes[n].value = change["new"]

        whole.observe(toggle, names="value")
        return w.VBox(items)

    @property
    def select(self) -> tuple[str, ...]:
        out: list[str] = []
        for domain, rows in self.table.groupby("domain", sort=False):
            names = [n for n in rows["name"] if self.checkboxes[n].value]
            # a domain stands for its default features (band_medians, say, is named on its own)
            defaults = [n for n, d in zip(rows["name"], rows["default"], strict=True) if d]
            whole = bool(defaults) and set(defaults) <= set(names)
            out += [str(domain), *[n for n in names if n not in defaults]] if whole else names
        return tuple(out)

    @property
    def params(self) -> dict[str, dict[str, Any]]:
        chosen = {n for n, b in self.checkboxes.items() if b.value}
        defaults = dict(zip(self.table["name"], self.table["defaults"], strict=True))
        out: dict[str, dict[str, Any]] = {}
        for (name, p), box in self.param_boxes.items():
            try:
                value = json.loads(box.value)
            except ValueError:
                raise ProjectFileError(
                    f'{box.value!r} is not a JSON value (a number, "text" or [1, 2]); correct the field',
                    key=f"features.params.{name}.{p}",
                ) from None
            if name in chosen and value != json.loads(_param_text(defaults[name][p])):
                out.setdefault(name, {})[p] = value
        return out

    def to_config(self) -> dict[str, Any]:
        cfg: dict[str, Any] = {"select": list(self.select)}
        if self.params:
            cfg["params"] = self.params
        return cfg


# -- the project panel ---------------------------------------------------------------------------------------
_PATH_KEYS = (("area", "aoi"), ("plots", "path"), ("dem", "path"))


def _rebase(value: str, src: Path, dst: Path) -> str:
    """A path of the project file written in ``src``, as seen from ``dst`` (absolute paths kept)."""
    import os

    p = Path(value)
    return value if p.is_absolute() else Path(os.path.relpath((src / p).resolve(), dst.resolve())).as_posix()


def rebase_paths(data: dict[str, Any], src_dir: Path, dst_dir: Path) -> dict[str, Any]:
    """A copy of a parsed project file whose relative input paths work from ``dst_dir``."""
    out = copy.deepcopy(data)
    if Path(src_dir).resolve() == Path(dst_dir).resolve():
        return out
    for section, key in _PATH_KEYS:
        if key in out.get(section, {}):
            out[section][key] = _rebase(out[section][key], src_dir, dst_dir)
    monitor = out.get("monitor", {})
    scenes = [*out.get("optical", []), *out.get("sar", []), *monitor.get("optical", []), *monitor.get("sar", [])]
    for scene in scenes:
        for key in ("path", "mask", "pattern", "list"):  # a pattern's placeholders survive as plain text
            if key in scene:
                scene[key] = _rebase(scene[key], src_dir, dst_dir)
        if isinstance(scene.get("files"), dict):
            scene["files"] = {b: _rebase(f, src_dir, dst_dir) for b, f in scene["files"].items()}
    if monitor.get("polygons", "inventory") not in ("inventory", "aoi"):
        monitor["polygons"] = _rebase(monitor["polygons"], src_dir, dst_dir)
    return out


class ProjectPanel(w.VBox):
    """Settings of one project file in tabs (features, model, validation, output, priors), with a save button.

    Parameters
    ----------
    project_file : path
        The project file the panel starts from.
    save_as : path, optional
        Where :meth:`save` writes (default: ``project_file`` itself).  Relative input paths are rewritten
        so that they still point at the same files from the new folder.
    """

    def __init__(self, project_file: str | Path, *, save_as: str | Path | None = None) -> None:
        self.source = Path(project_file)
        self.raw = tomllib.loads(self.source.read_text(encoding="utf-8"))
        feats = self.raw.get("features", {})
        self.features = FeaturePicker(feats.get("select", ("optical", "sar", "terrain")), feats.get("params"))
        self.model = ModelSettings(self.raw.get("model"))
        self.validation = ValidationSettings(self.raw.get("validation"))
        self.output_settings = OutputSettings(self.raw.get("output"))
        self.priors = PriorsSettings(self.raw.get("priors"),
                                     classes=self.raw.get("classes", {}).get("names", ()))
        self.path = w.Text(
            value=str(save_as or self.source), description="save as", layout=w.Layout(width="60%")
        )
        self.save_button = w.Button(description="Save project file", icon="save")
        self.message = w.HTML()
        self.save_button.on_click(lambda _: self._save_clicked())
        tabs = w.Tab(
            children=[self.features, self.model, self.validation, self.output_settings, self.priors],
            titles=("features", "model", "validation", "output", "priors"),
        )
        super().__init__([tabs, w.HBox([self.path, self.save_button]), self.message])

    @property
    def target(self) -> Path:
        return Path(self.path.value).expanduser()

    def to_dict(self) -> dict[str, Any]:
        """The project file the controls represent (a TOML mapping), paths relative to :attr:`target`."""
        data = rebase_paths(self.raw, self.source.parent, self.target.parent)
        data["features"] = {
            k: v for k, v in data.get("features", {}).items() if k not in ("select", "params")
        }
        data["features"].update(self.features.to_config())
        for panel in (self.model, self.validation, self.output_settings, self.priors):
            kept = {k: v for k, v in data.get(panel.section, {}).items() if k not in panel.owned}
            data[panel.section] = {**kept, **panel.to_config()}
        return data

    def project(self) -> Project:
        """The validated project (raises :class:`~wetlandflow.errors.ProjectFileError` naming the field)."""
        return parse_project(self.to_dict(), file=self.target)

    def save(self, path: str | Path | None = None) -> Path:
        """Validate and write the project file; return its path."""
        import tomli_w

        if path is not None:
            self.path.value = str(path)
        data = self.to_dict()
        parse_project(data, file=self.target)
        self.target.parent.mkdir(parents=True, exist_ok=True)
        self.target.write_text(tomli_w.dumps(data), encoding="utf-8")
        return self.target

    def _save_clicked(self) -> None:
        try:
            self.message.value = f"saved {self.save().name}"
        except WetlandflowError as exc:
            self.message.value = f"<span style='color:#a00'>not saved: {exc}</span>"
