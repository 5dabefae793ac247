"""The project file: schema, defaults, validation with clear messages.

A project is a TOML file (format in ``docs/project-file.md``).  It is parsed
once into nested frozen dataclasses; unknown keys, wrong types and bad values
raise :class:`~wetlandflow.errors.ProjectFileError` naming the full key path
(``validation.n_folds``) and what to do.  Serialisation is derived from the
fields (:func:`to_dict`), and :func:`config_hash` fingerprints the resolved
project for every output.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import hashlib
import json
import math
import sys
import types
import typing
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

from ..errors import ProjectFileError

OPTICAL_BANDS = ("blue", "green", "red", "re1", "re2", "re3", "nir", "nir_narrow", "swir1", "swir2")
SAR_POLARISATIONS = ("VV", "VH", "HH", "HV")
# Without a [seasons] table a project has one season spanning the whole year: every date falls in it.
DEFAULT_SEASONS: dict[str, tuple[str, str]] = {"all": ("01-01", "12-31")}
PLAUSIBILITY = ("raise", "warn")
ALIGN_TO = ("", "optical", "sar", "dem", "none")
PRIOR_ADJUSTMENTS = ("none", "em", "given")
SAR_UNITS = ("linear", "amplitude", "db")
ORBITS = ("ascending", "descending")
MODEL_KINDS = ("xgboost", "random_forest")
CV_DESIGNS = ("blocks", "group", "random")
MONITOR_AGGREGATES = ("median", "mean", "max", "min")
MONITOR_PERIODS = ("year", "season", "month", "all")
MONITOR_THRESHOLDS = {"sar_threshold": ("split", "otsu"), "optical_threshold": ("otsu",)}
SUSPECT_LABELS = ("flag", "refit", "off")
SUSPECT_RULES = ("consensus", "majority")


# -- schema -------------------------------------------------------------------------------
@dataclass(frozen=True)
class ProjectSection:
    name: str = "wetland inventory"
    seed: int = 0
    output_dir: str = ""


@dataclass(frozen=True)
class AreaSection:
    aoi: Path
    layer: str = ""


@dataclass(frozen=True)
class GridSection:
    crs: str = ""
    pixel_size_m: float = 0.0
    align_to: str = ""  # "" first optical scene (else SAR, else DEM); "optical", "sar", "dem"; "none"


@dataclass(frozen=True)
class ClassesSection:
    names: tuple[str, ...]
    parents: dict[str, tuple[str, ...]] = field(default_factory=dict)
    # class -> short definition (string), or {label = "...", definition = "..."}; the six default classes
    # fall back to wetlandflow.inputs.class_definitions.DEFAULT_DEFINITIONS
    definitions: dict[str, Any] = field(default_factory=dict)
    # true: a class no plot is labelled with leaves the scheme before training, with a warning; false: refused
    drop_empty: bool = False


@dataclass(frozen=True)
class PlotsSection:
    path: Path
    class_field: str = "class"
    id_field: str = ""
    layer: str = ""  # the layer to read from a file with several (a GeoPackage); "" = the file's only layer


@dataclass(frozen=True)
class OpticalScene:
    """One optical acquisition: one multi-band file (``path``) or one file per band (``files``)."""

    date: dt.date
    path: Path | None = None
    files: dict[str, Path] = field(default_factory=dict)  # band name -> single-band file
    bands: tuple[str, ...] = OPTICAL_BANDS
    sensor: str = ""  # a shipped or [sensors.<name>] description: defaults of the keys below
    scale: float = 0.0001
    offset_dn: float = 0.0
    offset: float = 0.0  # added after scaling: reflectance = (DN + offset_dn) * scale + offset
    nodata: float = 0.0
    mask: Path | None = None
    mask_valid: tuple[int, ...] = (4, 5, 6, 7)
    plausibility: str = "raise"  # "raise": refuse implausible reflectance; "warn": warn and go on

    @property
    def label(self) -> str:
        """A short name for messages: the file, or the first per-band file with its band count."""
        return scene_label(self)


@dataclass(frozen=True)
class SarScene:
    """One SAR acquisition: one file with every polarisation (``path``) or one per polarisation (``files``)."""

    date: dt.date
    path: Path | None = None
    files: dict[str, Path] = field(default_factory=dict)  # polarisation -> single-band file
    bands: tuple[str, ...] = ("VV", "VH")
    units: str = "linear"
    orbit: str = "ascending"
    nodata: float = -9999.0

    @property
    def label(self) -> str:
        return scene_label(self)


def scene_label(scene: OpticalScene | SarScene) -> str:
    if scene.path is not None:
        return scene.path.name
    first = next(iter(scene.files.values()))
    return f"{first.name} (+{len(scene.files) - 1} per-band files)" if len(scene.files) > 1 else first.name


def scene_files(scene: OpticalScene | SarScene) -> list[tuple[Path, tuple[str, ...]]]:
    """The files of a scene with the bands each holds, in the scene's band order."""
    if scene.path is not None:
        return [(scene.path, tuple(scene.bands))]
    return [(scene.files[b], (b,)) for b in scene.bands]


@dataclass(frozen=True)
class DemSection:
    path: Path
    units: str = "m"
    nodata: float = -9999.0


@dataclass(frozen=True)
class FeaturesSection:
    select: tuple[str, ...] = ()  # () = every built-in feature the inputs can compute
    params: dict[str, dict[str, Any]] = field(default_factory=dict)
    plugins: tuple[Path, ...] = ()  # Python files whose @wetlandflow.feature functions are registered


@dataclass(frozen=True)
class ModelSection:
    kind: str = "xgboost"
    n_estimators: int = 300
    max_depth: int = 6
    learning_rate: float = 0.1
    class_weighting: bool = True
    max_plot_share: float = 0.1  # largest share of its class's weight one plot may carry; 0 = no cap
    n_threads: int = 2
    features: tuple[str, ...] = ()  # train on these cube variables only (e.g. a selection's result); () = all
    hierarchical: bool = False  # top level over [classes.parents], then one model per parent group
    gate_threshold: float = 0.0  # hierarchical only, in [0, 1): a child model runs where P(parent) > this


@dataclass(frozen=True)
class ValidationSection:
    design: str = "blocks"
    n_folds: int = 5
    block_size_m: float = 1000.0
    allow_random_pixels: bool = False
    suspect_labels: str = "flag"  # "flag": list plots the filters reject; "refit": also fit without them; "off"
    suspect_rule: str = "consensus"  # "consensus" (every filter rejects) or "majority" (Brodley & Friedl 1999)


@dataclass(frozen=True)
class SamplesSection:
    max_pixels_per_plot: int = 200
    inward_buffer_m: float = 0.0
    missing: str = "keep"  # "keep": the model sees NaN (handled natively); "drop": drop pixels with any NaN


@dataclass(frozen=True)
class OutputSection:
    chunk_size: int = 512
    memory_budget_gb: float = 4.0
    applicability: bool = True
    mmu_pixels: int = 9
    connectivity: int = 8
    explain: bool = True
    explain_rows: int = 1200
    explain_window: int = 64  # pixels per side of the window mapped with SHAP (explain/maps/)
    explain_seeds: int = 3  # models refitted with this many seeds for the ranking stability (< 2 = off)


@dataclass(frozen=True)
class PriorsSection:
    # "em" (default): estimate the area's class priors (Saerens et al. 2002); "given": use shares; "none".
    # The default follows docs/benchmarks-truth.md: on both synthetic landscapes EM raised the final map's
    # overall accuracy against the truth by 3.5 points and brought the spatial-CV estimate closer to it.
    adjust: str = "em"
    shares: dict[str, float] = field(default_factory=dict)  # adjust = "given": class -> share of the area
    sample_pixels: int = 20000  # adjust = "em": pixels drawn at random from the AOI for the estimate


@dataclass(frozen=True)
class ComputeSection:
    scheduler: str = ""  # "" threads in this process; "local" a LocalCluster; else a scheduler address
    n_workers: int = 2


@dataclass(frozen=True)
class MonitorWater:
    """How each date's surface water is mapped (``[monitor.water]``)."""

    sar_threshold: Any = "split"  # "split" (tiles, Martinis et al. 2009), "otsu" (whole scene) or a dB value
    optical_threshold: Any = "otsu"  # "otsu" or an MNDWI value (e.g. 0.0)
    pol: str = "VV"  # SAR polarisation the water is mapped from
    period: str = "year"  # water frequency and hydroperiod per "year", "season", "month" or "all"


@dataclass(frozen=True)
class MonitorBaci:
    """A before/after-control-impact comparison (``[monitor.baci]``): polygon names of the sites."""

    event_date: dt.date
    impact: tuple[str, ...]
    control: tuple[str, ...]
    metrics: tuple[str, ...] = ()  # () = every [monitor] metric


@dataclass(frozen=True)
class MonitorRecovery:
    """Recovery of disturbed patches (``[monitor.recovery]``)."""

    patches: tuple[str, ...]
    date_field: str = ""  # column of the polygons with the disturbance year; "" = detected (Pettitt change)
    metric: str = "ndvi"
    post_years: int = 5  # years after the disturbance the recovery indicators look at


@dataclass(frozen=True)
class MonitorSection:
    """Change through time (``[monitor]``): the archive's scenes, the polygons summarised and the analyses."""

    polygons: str = "inventory"  # "inventory" (the run's polygons), "aoi", or a vector file
    id_field: str = ""  # the polygons' name column ("" = the inventory's id / a running number)
    layer: str = ""
    metrics: tuple[str, ...] = ("water",)  # "water" and optical indices (ndvi, mndwi, ndmi, ...)
    aggregate: str = "median"  # one value per year from the dated values: median, mean, max or min
    season: tuple[str, ...] = ()  # ["06-01", "09-15"]: only dates in this month-day window count
    alpha: float = 0.05  # significance level of the tests and confidence intervals
    fdr: float = 0.05  # false discovery rate of the per-pixel trend maps (Benjamini & Hochberg 1995)
    pixel_size_m: float = 0.0  # 0 = the archive's own pixel
    trend_maps: bool = True  # per-pixel trend rasters (slope, CI, p, q) besides the polygon tables
    optical: tuple[OpticalScene, ...] = ()  # [[monitor.optical]]: same keys as [[optical]]; none = those
    sar: tuple[SarScene, ...] = ()  # [[monitor.sar]]: same keys as [[sar]]; none (and no optical) = those
    water: MonitorWater = MonitorWater()
    baci: MonitorBaci | None = None
    recovery: MonitorRecovery | None = None


@dataclass(frozen=True)
class Project:
    """A validated, resolved project.  Build it with :func:`load_project`."""

    file: Path
    project: ProjectSection
    area: AreaSection
    classes: ClassesSection
    plots: PlotsSection
    optical: tuple[OpticalScene, ...] = ()
    sar: tuple[SarScene, ...] = ()
    dem: DemSection | None = None
    seasons: dict[str, tuple[str, str]] = field(default_factory=dict)  # {} -> DEFAULT_SEASONS
    sensors: dict[str, dict[str, Any]] = field(default_factory=dict)  # inline sensor descriptions
    grid: GridSection = GridSection()
    features: FeaturesSection = FeaturesSection()
    model: ModelSection = ModelSection()
    validation: ValidationSection = ValidationSection()
    samples: SamplesSection = SamplesSection()
    output: OutputSection = OutputSection()
    priors: PriorsSection = PriorsSection()
    compute: ComputeSection = ComputeSection()
    monitor: MonitorSection | None = None

    @property
    def root(self) -> Path:
        return self.file.parent

    @property
    def run_dir(self) -> Path:
        out = self.project.output_dir or f"runs/{self.file.stem}"
        return (self.root / out).resolve()

    @property
    def class_codes(self) -> dict[str, int]:
        """Class name -> raster code (1-based, in scheme order; 0 is nodata)."""
        return {n: i + 1 for i, n in enumerate(self.classes.names)}


# -- generic builder from dataclass fields ---------------------------------------------------
_TOP_LEVEL = {f.name for f in dataclasses.fields(Project)} - {"file"}


def _type_name(tp: Any) -> str:
    return getattr(tp, "__name__", str(tp)).replace("typing.", "")


def _coerce(value: Any, tp: Any, key: str, root: Path) -> Any:
    origin = typing.get_origin(tp)
    args = typing.get_args(tp)
    if origin in (typing.Union, types.UnionType):
        if value is None and type(None) in args:
            return None
        inner = [a for a in args if a is not type(None)][0]
        return _coerce(value, inner, key, root)
    if tp is Path:
        if not isinstance(value, str) or not value:
            raise ProjectFileError(f"expected a file path (string), got {value!r}", key=key)
        p = Path(value)
        return (p if p.is_absolute() else root / p).resolve()
    if tp is dt.date:
        if isinstance(value, dt.datetime):
            return value.date()
        if isinstance(value, dt.date):
            return value
        if isinstance(value, str):
            try:
                return dt.date.fromisoformat(value)
            except ValueError:
                pass
        raise ProjectFileError(f"expected a date like 2024-05-14, got {value!r}", key=key)
    if tp is bool:
        if not isinstance(value, bool):
            raise ProjectFileError(f"expected true or false, got {value!r}", key=key)
        return value
    if tp is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise ProjectFileError(f"expected a whole number, got {value!r}", key=key)
        return value
    if tp is float:
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise ProjectFileError(f"expected a number, got {value!r}", key=key)
        return float(value)
    if tp is str:
        if not isinstance(value, str):
            raise ProjectFileError(f"expected a string, got {value!r}", key=key)
        return value
    if origin is tuple:
        if not isinstance(value, list):
            raise ProjectFileError(f"expected a list, got {value!r}", key=key)
        return tuple(_coerce(v, args[0], f"{key}[{i}]", root) for i, v in enumerate(value))
    if origin is dict:
        if not isinstance(value, dict):
            raise ProjectFileError(f"expected a table, got {value!r}", key=key)
        return {k: _coerce(v, args[1], f"{key}.{k}", root) for k, v in value.items()}
    if tp is Any:
        return value
    if dataclasses.is_dataclass(tp):
        return _build(tp, value, key, root)
    raise ProjectFileError(f"unsupported type {_type_name(tp)}", key=key)  # pragma: no cover


def _build(cls: type, table: Any, key: str, root: Path, fixed: dict[str, Any] | None = None) -> Any:
    if not isinstance(table, dict):
        raise ProjectFileError(f"expected a table [{key}], got {table!r}", key=key)
    hints = typing.get_type_hints(cls)
    fixed = fixed or {}
    fields = {f.name: f for f in dataclasses.fields(cls) if f.name not in fixed}
    unknown = sorted(set(table) - set(fields))
    if unknown:
        raise ProjectFileError(
            f"unknown key {unknown[0]!r}; valid keys here are: {', '.join(sorted(fields))}",
            key=f"{key}.{unknown[0]}" if key else unknown[0],
        )
    kwargs = dict(fixed)
    for name, f in fields.items():
        sub = f"{key}.{name}" if key else name
        if name in table:
            kwargs[name] = _coerce(table[name], hints[name], sub, root)
        elif f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
            raise ProjectFileError(f"missing required key {name!r}; add it to the project file "
                                   "(docs/project-file.md shows every key)", key=sub)
    return cls(**kwargs)


# -- semantic checks ---------------------------------------------------------------------
def _check_choice(value: str, allowed: tuple[str, ...], key: str) -> None:
    if value not in allowed:
        raise ProjectFileError(f"{value!r} is not one of {', '.join(allowed)}; set {key} to one of these",
                               key=key)


def _require_file(path: Path | None, key: str) -> None:
    if path is not None and not path.exists():
        raise ProjectFileError(
            f"file not found: {path}. Relative paths are resolved against the project file's folder; "
            "fix the path or move the file",
            key=key,
        )


def _month_day(s: str, key: str) -> tuple[int, int]:
    try:
        d = dt.date.fromisoformat(f"2000-{s}")
    except ValueError:
        raise ProjectFileError(f"expected a month-day like '04-15', got {s!r}", key=key) from None
    return d.month, d.day


def _check_seasons(seasons: dict[str, tuple[str, str]]) -> None:
    if not seasons:
        raise ProjectFileError("define at least one season, e.g. summer = ['06-01', '08-31']", key="seasons")
    spans = []
    for name, window in seasons.items():
        if len(window) != 2:
            raise ProjectFileError(f"a season is [start, end], got {list(window)}; give two month-days like "
                                   "['06-01', '08-31']", key=f"seasons.{name}")
        a, b = (_month_day(s, f"seasons.{name}") for s in window)
        if b < a:
            raise ProjectFileError(
                f"season ends ({window[1]}) before it starts ({window[0]}); windows may not wrap the year: "
                "split it into two seasons (one ending 12-31, one starting 01-01) or swap the dates",
                key=f"seasons.{name}",
            )
        spans.append((a, b, name))
    spans.sort()
    for (_, b1, n1), (a2, _, n2) in zip(spans, spans[1:], strict=False):
        if a2 <= b1:
            raise ProjectFileError(
                f"seasons {n1!r} and {n2!r} overlap; make each date fall in at most one season", key="seasons"
            )


def _check_season_scenes(p: Project) -> None:
    """Every season must hold at least one acquisition date (optical or SAR), or its features are empty."""
    dates = sorted({s.date for s in p.optical} | {s.date for s in p.sar})
    for name, (start, end) in p.seasons.items():
        a, b = _month_day(start, f"seasons.{name}"), _month_day(end, f"seasons.{name}")
        if not any(a <= (d.month, d.day) <= b for d in dates):
            raise ProjectFileError(
                f"season {name!r} ({start} to {end}) contains no scene: the acquisition dates are "
                f"{[d.isoformat() for d in dates]}. Widen the window, add scenes for it, or remove the season",
                key=f"seasons.{name}",
            )


def _check_classes(c: ClassesSection) -> None:
    if len(c.names) < 2:
        raise ProjectFileError(f"a class scheme needs at least two classes, got {list(c.names)}; list every "
                               "class the plots are labelled with", key="classes.names")
    if len(set(c.names)) != len(c.names):
        dup = sorted({n for n in c.names if c.names.count(n) > 1})
        raise ProjectFileError(f"duplicate class names: {dup}; list each class once", key="classes.names")
    seen: dict[str, str] = {}
    for parent, children in c.parents.items():
        if parent in c.names:
            raise ProjectFileError(f"parent {parent!r} must not also be a leaf class; rename the group",
                                   key=f"classes.parents.{parent}")
        for child in children:
            if child not in c.names:
                raise ProjectFileError(
                    f"unknown class {child!r}; known classes: {', '.join(c.names)}. Correct the name or add "
                    "the class to [classes].names", key=f"classes.parents.{parent}"
                )
            if child in seen:
                raise ProjectFileError(
                    f"class {child!r} is under both {seen[child]!r} and {parent!r}; put each class in one "
                    "group",
                    key=f"classes.parents.{parent}"
                )
            seen[child] = parent
    from .class_definitions import check_definitions

    check_definitions(c.definitions, known=(*c.names, *c.parents))


RESERVED_PARENTS = ("top", "leaf")  # level names of the hierarchical model (wetlandflow.models.hierarchy)


def check_model_section(p: Project) -> None:
    """Model keys whose valid values depend on each other or on the class scheme (also called by
    :func:`wetlandflow.pipeline.run.make_model`, for a project built without :func:`load_project`)."""
    m = p.model
    if not 0 <= m.gate_threshold < 1:
        raise ProjectFileError(f"gate_threshold must be in [0, 1) (0 = no gate), got {m.gate_threshold}; set "
                               "model.gate_threshold to a value in that range",
                               key="model.gate_threshold")
    if m.gate_threshold and not m.hierarchical:
        raise ProjectFileError(
            f"gate_threshold = {m.gate_threshold} has an effect only on a hierarchical model; set "
            "model.hierarchical = true, or remove gate_threshold (or set it to 0)",
            key="model.gate_threshold")
    if not m.hierarchical:
        return
    if not p.classes.parents:
        raise ProjectFileError(
            "hierarchical = true needs parent groups of classes, and the class scheme has none; add a "
            "[classes.parents] table (e.g. wetland = [\"marsh\", \"swamp\", \"fen\", \"bog\"]) or set "
            "model.hierarchical = false", key="model.hierarchical")
    for parent, children in p.classes.parents.items():
        if parent in RESERVED_PARENTS:
            raise ProjectFileError(
                f"parent name {parent!r} is reserved for a level of the hierarchical model "
                f"({', '.join(RESERVED_PARENTS)}); rename the group (e.g. 'wetland')",
                key=f"classes.parents.{parent}")
        if not children:
            raise ProjectFileError(
                f"parent {parent!r} has no classes; list at least one of {', '.join(p.classes.names)}, or "
                "remove the group", key=f"classes.parents.{parent}")


def _check_scene_files(s: OpticalScene | SarScene, key: str) -> None:
    """One layout per scene, every file present, the band list matching the per-band files."""
    if (s.path is None) == (not s.files):
        raise ProjectFileError("give either path (one multi-band file) or files (one file per band), not both",
                               key=key)
    if len(set(s.bands)) != len(s.bands):
        raise ProjectFileError(f"duplicate band names in {list(s.bands)}; give each band of the file its own "
                               "name, in the file's band order", key=f"{key}.bands")
    if s.path is not None:
        _require_file(s.path, f"{key}.path")
        return
    missing = [b for b in s.bands if b not in s.files]
    if missing:
        raise ProjectFileError(f"bands {missing} have no file in files (bands with a file: {list(s.files)}); "
                               "add their files or remove them from bands", key=f"{key}.bands")
    for band, path in s.files.items():
        _require_file(path, f"{key}.files.{band}")


def given_shares(shares: dict[str, float], classes: tuple[str, ...]) -> list[float]:
    """``[priors] shares`` in scheme order, normalised to sum 1; refused naming the key when incomplete."""
    unknown = sorted(set(shares) - set(classes))
    if unknown:
        raise ProjectFileError(f"names {unknown}, not in classes.names {list(classes)}; use the scheme's "
                               "class names", key="priors.shares")
    missing = [c for c in classes if c not in shares]
    if missing:
        raise ProjectFileError(f"lacks {missing}: give a share for every class (0 for a class absent from the "
                               "area)", key="priors.shares")
    values = [float(shares[c]) for c in classes]
    if any(not math.isfinite(v) or v < 0 for v in values) or sum(values) <= 0:
        raise ProjectFileError(f"shares must be non-negative numbers with a positive sum, got {dict(shares)}",
                               key="priors.shares")
    return [v / sum(values) for v in values]


def dropped_class_note(name: str) -> str:
    """The sentence every output (warning, check, summary, report) gives for a class left out of the scheme
    by ``[classes] drop_empty = true``."""
    return (f"class {name} had no training plots and was dropped (classes.drop_empty = true): the map cannot "
            "show it")


def without_classes(project: Project, dropped: tuple[str, ...] | list[str]) -> Project:
    """The project with the classes ``dropped`` left out of its scheme (``[classes] drop_empty``).

    They leave ``names``, their parent groups (a group left empty goes too), their definitions and, for
    ``priors.adjust = "given"``, their shares (the rest are renormalised when used).

    Examples
    --------
    >>> p = Project(Path("p.toml"), ProjectSection(), AreaSection(Path("aoi.gpkg")),
    ...             ClassesSection(("a", "b", "c"), parents={"g": ("b", "c")}), PlotsSection(Path("p.gpkg")))
    >>> q = without_classes(p, ["c"])
    >>> q.classes.names, q.classes.parents
    (('a', 'b'), {'g': ('b',)})
    """
    gone = set(dropped)
    c = project.classes
    parents = {k: tuple(n for n in v if n not in gone) for k, v in c.parents.items()}
    classes = dataclasses.replace(
        c, names=tuple(n for n in c.names if n not in gone),
        parents={k: v for k, v in parents.items() if v},
        definitions={k: v for k, v in c.definitions.items() if k not in gone})
    priors = dataclasses.replace(project.priors,
                                 shares={k: v for k, v in project.priors.shares.items() if k not in gone})
    return dataclasses.replace(project, classes=classes, priors=priors)


def as_mapped(project: Project) -> Project:
    """The project with the class scheme its run folder's maps use: without the classes the last run dropped
    (``[classes] drop_empty = true``, recorded as ``dropped_classes`` in ``manifest.json``), so that map
    codes 1..K name the right classes after a run.  The project as it is without such a run.

    Examples
    --------
    >>> p = Project(Path("p.toml"), ProjectSection(), AreaSection(Path("aoi.gpkg")),
    ...             ClassesSection(("a", "b")), PlotsSection(Path("p.gpkg")))
    >>> as_mapped(p) is p
    True
    """
    manifest = project.run_dir / "manifest.json"
    if not project.classes.drop_empty or not manifest.exists():
        return project
    try:
        dropped = json.loads(manifest.read_text()).get("dropped_classes") or []
    except ValueError:  # an unreadable manifest is reported by whatever reads the run next
        return project
    return without_classes(project, dropped) if dropped else project


def _validate(p: Project) -> None:
    _require_file(p.area.aoi, "area.aoi")
    _require_file(p.plots.path, "plots.path")
    if p.dem is not None:
        _require_file(p.dem.path, "dem.path")
        _check_choice(p.dem.units, ("m", "ft"), "dem.units")
    if not p.optical and not p.sar:
        raise ProjectFileError(
            "the project has no image: add at least one [[optical]] or [[sar]] table, e.g. [[optical]] with "
            "date = 2024-05-14 and path = \"optical/scene.tif\" (docs/project-file.md, 'Your own data')",
            key="optical")
    _check_choice(p.grid.align_to, ALIGN_TO, "grid.align_to")
    for kind, scenes in (("optical", p.optical), ("sar", p.sar)):
        for i, s in enumerate(scenes):
            _check_scene_files(s, f"{kind}[{i}]")
    for i, s in enumerate(p.optical):
        _require_file(s.mask, f"optical[{i}].mask")
        if s.scale <= 0:
            raise ProjectFileError(f"scale must be > 0, got {s.scale}; set the factor that turns DN into "
                                   "reflectance (0.0001 for Sentinel-2)", key=f"optical[{i}].scale")
        _check_choice(s.plausibility, PLAUSIBILITY, f"optical[{i}].plausibility")
    for i, s in enumerate(p.sar):
        bad = [b for b in s.bands if b not in SAR_POLARISATIONS]
        if bad:
            raise ProjectFileError(f"unknown polarisation(s) {bad}; use {', '.join(SAR_POLARISATIONS)}",
                                   key=f"sar[{i}].bands")
        _check_choice(s.units, SAR_UNITS, f"sar[{i}].units")
        _check_choice(s.orbit, ORBITS, f"sar[{i}].orbit")
        if len(set(s.bands)) != len(s.bands):
            raise ProjectFileError(f"duplicate band names in {list(s.bands)}; give each band of the file its own "
                                   "name, in the file's band order", key=f"sar[{i}].bands")
    _check_classes(p.classes)
    _check_seasons(p.seasons)
    _check_season_scenes(p)
    _check_choice(p.model.kind, MODEL_KINDS, "model.kind")
    check_model_section(p)
    _check_choice(p.samples.missing, ("keep", "drop"), "samples.missing")
    if not 0 <= p.model.max_plot_share <= 1:
        raise ProjectFileError("max_plot_share must be in [0, 1] (0 = no cap), got "
                               f"{p.model.max_plot_share}; set model.max_plot_share to a value in that range",
                               key="model.max_plot_share")
    _check_choice(p.validation.design, CV_DESIGNS, "validation.design")
    _check_choice(p.validation.suspect_labels, SUSPECT_LABELS, "validation.suspect_labels")
    _check_choice(p.validation.suspect_rule, SUSPECT_RULES, "validation.suspect_rule")
    check_ranges(p)
    if p.validation.design == "random" and not p.validation.allow_random_pixels:
        raise ProjectFileError(
            "random pixel folds leak (neighbouring pixels of one plot land on both sides) and overstate accuracy; "
            "use design = 'blocks', or set allow_random_pixels = true to run it for comparison only",
            key="validation.design",
        )
    _check_choice(p.priors.adjust, PRIOR_ADJUSTMENTS, "priors.adjust")
    if p.priors.adjust == "given":
        if not p.priors.shares:
            raise ProjectFileError("adjust = \"given\" needs the area's class shares: add a [priors.shares] "
                                   "table with one share per class (e.g. from a previous inventory), or set "
                                   "adjust = \"em\" to estimate them", key="priors.shares")
        given_shares(p.priors.shares, p.classes.names)
    elif p.priors.shares:
        raise ProjectFileError(f"shares are used only with adjust = \"given\" (adjust is {p.priors.adjust!r}); "
                               "set adjust = \"given\" or remove [priors.shares]", key="priors.shares")
    if p.monitor is not None:
        _check_monitor(p)
    if p.output.connectivity not in (4, 8):
        raise ProjectFileError(f"connectivity must be 4 or 8, got {p.output.connectivity}; set "
                               "output.connectivity = 4 (edge neighbours) or 8 (edge and corner neighbours)",
                               key="output.connectivity")


def _check_monitor(p: Project) -> None:
    """The ``[monitor]`` keys whose valid values the schema's types cannot say (metric names are checked
    against the feature registry by ``wetlandflow check``)."""
    m = p.monitor
    assert m is not None
    if m.polygons not in ("inventory", "aoi"):
        _require_file((p.root / m.polygons).resolve(), "monitor.polygons")
    _check_choice(m.aggregate, MONITOR_AGGREGATES, "monitor.aggregate")
    _check_choice(m.water.period, MONITOR_PERIODS, "monitor.water.period")
    _check_choice(m.water.pol, SAR_POLARISATIONS, "monitor.water.pol")
    if not m.metrics:
        raise ProjectFileError("list at least one metric, e.g. metrics = [\"water\", \"ndvi\"]",
                               key="monitor.metrics")
    if m.season:
        if len(m.season) != 2:
            raise ProjectFileError(f"season is [start, end], got {list(m.season)}; give two month-days like "
                                   "['06-01', '09-15'], or remove the key to use every date",
                                   key="monitor.season")
        _check_seasons({"monitor": tuple(m.season)})
    for name, named in MONITOR_THRESHOLDS.items():
        value = getattr(m.water, name)
        if not (value in named or (isinstance(value, int | float) and not isinstance(value, bool)
                                   and math.isfinite(value))):
            choices = " or ".join(repr(n) for n in named)
            raise ProjectFileError(f"expected {choices} or a number, got {value!r}",
                                   key=f"monitor.water.{name}")
    for kind, scenes in (("optical", m.optical), ("sar", m.sar)):
        for i, s in enumerate(scenes):
            _check_scene_files(s, f"monitor.{kind}[{i}]")
    if m.baci is not None:
        for role in ("impact", "control"):
            if not getattr(m.baci, role):
                column = m.id_field or "id"
                raise ProjectFileError(f"name at least one {role} polygon (values of the {column} column)",
                                       key=f"monitor.baci.{role}")
        both = sorted(set(m.baci.impact) & set(m.baci.control))
        if both:
            raise ProjectFileError(f"{both} named as both impact and control; a site is one or the other",
                                   key="monitor.baci")
    if m.recovery is not None:
        if not m.recovery.patches:
            raise ProjectFileError("name at least one disturbed polygon", key="monitor.recovery.patches")
        if m.recovery.post_years < 1:
            raise ProjectFileError(f"post_years must be >= 1, got {m.recovery.post_years}",
                                   key="monitor.recovery.post_years")


INF = float("inf")
# Numeric keys and their valid ranges: (key, low, high, low included, high included, why).  Where a value goes
# straight to XGBoost or scikit-learn, the bounds are theirs:
# * XGBoost parameter documentation (doc/parameter.rst, "Parameters for Tree Booster"): eta (learning_rate)
#   range [0, 1], max_depth range [0, inf] (0 = no limit, accepted by the hist tree method used here); a
#   learning rate of 0 never learns, so it is excluded here;
# * scikit-learn RandomForestClassifier._parameter_constraints: n_estimators Interval(Integral, 1, None);
#   the seed becomes numpy's RandomState seed (sklearn.utils.check_random_state), which must lie in
#   [0, 2**32 - 1];
# * the rest are wetlandflow's own (a count of at least one, a size or distance that is positive).
RANGES: tuple[tuple[str, float, float, bool, bool, str], ...] = (
    ("project.seed", 0, 2**32 - 1, True, True, "numpy's seed range"),
    ("model.n_estimators", 1, INF, True, True, "number of trees or boosting rounds"),
    ("model.max_depth", 0, INF, True, True, "0 = no depth limit"),
    ("model.learning_rate", 0, 1, False, True, "XGBoost's eta"),
    ("model.n_threads", 1, INF, True, True, "threads per model fit"),
    ("validation.n_folds", 2, INF, True, True, "at least two folds"),
    ("validation.block_size_m", 0, INF, False, False, "side of the square blocks, metres"),
    ("samples.max_pixels_per_plot", 1, INF, True, True, "pixels drawn per plot"),
    ("samples.inward_buffer_m", 0, INF, True, False, "metres, 0 = no buffer"),
    ("output.chunk_size", 64, INF, True, True, "pixels per side of a window"),
    ("output.mmu_pixels", 1, INF, True, True, "1 keeps every patch"),
    ("output.memory_budget_gb", 0, INF, False, False, "gigabytes"),
    ("output.explain_rows", 1, INF, True, True, "samples explained"),
    ("output.explain_window", 1, INF, True, True, "pixels per side"),
    ("output.explain_seeds", 0, INF, True, True, "refits, < 2 = off"),
    ("priors.sample_pixels", 1000, INF, True, True, "AOI pixels for the EM estimate: fewer, more sampling error"),
    ("compute.n_workers", 1, INF, True, True, "worker processes"),
    ("grid.pixel_size_m", 0, INF, True, False, "metres, 0 = the reference input's"),
    ("monitor.alpha", 0, 0.5, False, False, "significance level"),
    ("monitor.fdr", 0, 1, False, False, "false discovery rate"),
    ("monitor.pixel_size_m", 0, INF, True, False, "metres, 0 = the archive's own"),
)


def _interval(low: float, high: float, low_in: bool, high_in: bool) -> str:
    if high == INF:
        return f"{'>=' if low_in else '>'} {low:g}"
    return f"{'[' if low_in else '('}{low:g}, {high:g}{']' if high_in else ')'}"


def check_ranges(p: Project) -> None:
    """Refuse a numeric key outside its valid range (:data:`RANGES`), naming the key and the range."""
    for key, low, high, low_in, high_in, why in RANGES:
        section, name = key.split(".")
        if getattr(p, section) is None:  # an optional section the project does not have
            continue
        value = getattr(getattr(p, section), name)
        above = value >= low if low_in else value > low
        below = value <= high if high_in else value < high
        if not (above and below):  # NaN fails both
            rng = _interval(low, high, low_in, high_in)
            within = f"in {rng}" if rng[0] in "[(" else rng
            raise ProjectFileError(
                f"{name} must be {within} ({why}), got {value!r}; set {key} to a value in that range",
                key=key)


# -- public API ----------------------------------------------------------------------------
def parse_project(data: dict[str, Any], *, file: Path) -> Project:
    """Build a :class:`Project` from an already-parsed TOML mapping."""
    file = Path(file).resolve()
    unknown = sorted(set(data) - _TOP_LEVEL)
    if unknown:
        raise ProjectFileError(
            f"unknown section {unknown[0]!r}; valid sections are: {', '.join(sorted(_TOP_LEVEL))}",
            key=unknown[0],
            file=str(file),
        )
    try:
        from .scenes import expand_scene_tables, inline_sensors

        sensors = inline_sensors(data.get("sensors"))
        data = {**data, "optical": expand_scene_tables(data.get("optical", []), "optical", file.parent, sensors),
                "sar": expand_scene_tables(data.get("sar", []), "sar", file.parent, sensors)}
        if isinstance(data.get("monitor"), dict):
            mon = data["monitor"]
            data["monitor"] = {**mon, **{k: expand_scene_tables(mon[k], k, file.parent, sensors, key=f"monitor.{k}")
                                         for k in ("optical", "sar") if k in mon}}
        project = _build(Project, data, "", file.parent, fixed={"file": file})
        if not project.seasons:
            project = dataclasses.replace(project, seasons=dict(DEFAULT_SEASONS))
        if project.monitor is not None and not (project.monitor.optical or project.monitor.sar):
            # no archive of its own: the monitoring follows the project's dated scenes
            project = dataclasses.replace(project, monitor=dataclasses.replace(
                project.monitor, optical=project.optical, sar=project.sar))
    except ProjectFileError as exc:
        raise ProjectFileError(exc.detail, key=exc.key, file=str(file)) from None
    try:
        _validate(project)
    except ProjectFileError as exc:
        raise ProjectFileError(exc.detail, key=exc.key, file=str(file)) from None
    return project


def load_project(path: str | Path) -> Project:
    """Read, validate and resolve a project file.

    Raises
    ------
    ProjectFileError
        With the file, the full key path and what to do.
    """
    path = Path(path)
    if not path.exists():
        raise ProjectFileError("project file not found; check the path", file=str(path))
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8-sig"))  # a byte-order mark (some editors) is fine
    except UnicodeDecodeError as exc:
        raise ProjectFileError(f"not UTF-8 text (byte {exc.start}: {exc.reason}); save the file as UTF-8 (an "
                               "editor's 'save with encoding' menu)", file=str(path)) from None
    except tomllib.TOMLDecodeError as exc:
        raise ProjectFileError(f"not valid TOML: {exc}; fix the syntax at the line and column shown "
                               "(docs/project-file.md describes the format)", file=str(path)) from None
    return parse_project(data, file=path)


def to_dict(obj: Any) -> Any:
    """JSON-ready dict of a project (or any part of it), derived from the fields."""
    if dataclasses.is_dataclass(obj):
        return {f.name: to_dict(getattr(obj, f.name)) for f in dataclasses.fields(obj)}
    if isinstance(obj, dict):
        return {k: to_dict(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [to_dict(v) for v in obj]
    if isinstance(obj, Path):
        return str(obj)
    if isinstance(obj, dt.date):
        return obj.isoformat()
    return obj


def portable_dict(project: Project) -> dict[str, Any]:
    """The resolved project as plain data, its folder replaced by ``<project>`` (survives moving the folder)."""
    text = json.dumps(to_dict(project), sort_keys=True, default=str).replace(str(project.root), "<project>")
    return json.loads(text)


def config_hash(project: Project) -> str:
    """SHA-256 of the resolved project, independent of where the folder lies."""
    return hashlib.sha256(json.dumps(portable_dict(project), sort_keys=True).encode()).hexdigest()
