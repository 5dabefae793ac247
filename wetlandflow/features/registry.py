"""The feature registry: named feature functions grouped by domain, with what each needs.

A feature function takes a :class:`FeatureInputs` (the aligned inputs of a run)
and keyword parameters, and returns a DataArray or a Dataset on the grid.  A
DataArray with a ``season`` dimension becomes one cube variable per season
(``ndvi_summer``).  Each feature declares the inputs (``needs``), optical bands
(``bands``) and SAR polarisations (``pols``) it reads, so a run computes what its
inputs allow and says why it skips the rest.  Users add their own with
:func:`feature`, in a notebook or in a file named in the project file
(``[features] plugins = ["my_indices.py"]``)::

    import wetlandflow

    @wetlandflow.feature("green_red_ratio", needs=("composite",), bands=("green", "red"))
    def green_red_ratio(inputs):
        \"\"\"Green / red ratio of the seasonal composites.\"\"\"
        r = inputs.composite["reflectance"]
        return r.sel(band="green", drop=True) / r.sel(band="red", drop=True)

and select them by name in the project file like the built-in ones (features of
a plugin file join the default selection).  A user feature's output may carry
``units``, ``long_name``, ``formula`` and ``reference`` attrs; missing ones are
filled in (``units = "unspecified"``, the method naming the function).
"""

from __future__ import annotations

import importlib.util
import inspect
import sys
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import xarray as xr

from .._provenance import DOMAINS
from ..errors import ProjectFileError
from ..inputs.layers import FeatureInputs  # noqa: F401  (re-exported: feature functions take it)
from ..inputs.project import Project

NEEDS = ("composite", "optical", "sar", "dem", "aoi")
# Selection keyword: the default set (every built-in feature the inputs can compute, plus plugin features).
DEFAULT_KEYWORD = "default"
_INPUT_WORDS = {"optical": "optical scenes ([[optical]])", "composite": "optical scenes ([[optical]])",
                "sar": "SAR scenes ([[sar]])", "dem": "a DEM ([dem])", "aoi": "an AOI"}


@dataclass(frozen=True)
class Availability:
    """What a run's inputs offer: which inputs, optical bands, SAR polarisations and seasons."""

    inputs: frozenset[str]
    bands: tuple[str, ...] = ()
    pols: tuple[str, ...] = ()
    seasons: tuple[str, ...] = ()
    sensor: str = ""

    @classmethod
    def from_project(cls, project: Any) -> Availability:
        """From the project file alone (no raster is read)."""
        have = {"aoi"}
        if project.optical:
            have |= {"optical", "composite"}
        if project.sar:
            have.add("sar")
        if project.dem is not None:
            have.add("dem")
        return cls(frozenset(have), tuple(project.optical[0].bands) if project.optical else (),
                   tuple(project.sar[0].bands) if project.sar else (), tuple(project.seasons),
                   project.optical[0].sensor if project.optical else "")

    @classmethod
    def from_inputs(cls, inputs: FeatureInputs) -> Availability:
        """From the aligned inputs of a run."""
        have = {n for n in ("optical", "sar", "dem", "aoi") if getattr(inputs, n) is not None}
        if inputs.optical is not None:
            have.add("composite")
        bands = tuple(str(b) for b in inputs.optical["band"].values) if inputs.optical is not None else ()
        pols = tuple(str(p) for p in inputs.sar["pol"].values) if inputs.sar is not None else ()
        sensor = inputs.optical.attrs.get("sensor", "") if inputs.optical is not None else ""
        return cls(frozenset(have), bands, pols, tuple(inputs.seasons), "" if sensor == "unnamed" else sensor)


@dataclass(frozen=True)
class FeatureDef:
    name: str
    domain: str
    func: Callable[..., xr.DataArray | xr.Dataset]
    needs: tuple[str, ...]
    description: str
    defaults: dict[str, Any]
    bands: tuple[str, ...] = ()
    pols: tuple[str, ...] = ()
    default: bool = True
    check: Callable[[Availability, dict[str, Any]], str | None] | None = field(default=None, compare=False)
    origin: str = "builtin"

    def missing(self, avail: Availability, params: dict[str, Any] | None = None) -> str | None:
        """Why the inputs cannot compute this feature (None when they can)."""
        lacking = [n for n in self.needs if n not in avail.inputs]
        if lacking:
            words = ", ".join(dict.fromkeys(_INPUT_WORDS[n] for n in lacking))
            return f"needs {words}, which the project lacks"
        bands = [b for b in self.bands if b not in avail.bands]
        if bands:
            who = f"sensor {avail.sensor}" if avail.sensor else "the optical scenes"
            return (f"needs band{'s' if len(bands) > 1 else ''} {', '.join(bands)}, which {who} "
                    f"lack{'s' if avail.sensor else ''} (bands: {', '.join(avail.bands)})")
        pols = [p for p in self.pols if p not in avail.pols]
        if pols:
            return f"needs polarisation {', '.join(pols)}; the SAR scenes have {', '.join(avail.pols)}"
        if self.check is not None:
            return self.check(avail, {**self.defaults, **(params or {})})
        return None


REGISTRY: dict[str, FeatureDef] = {}


def feature(name: str, *, domain: str = "user", needs: Sequence[str] = (), bands: Sequence[str] = (),
            pols: Sequence[str] = (), default: bool = True,
            check: Callable[[Availability, dict[str, Any]], str | None] | None = None, replace: bool = False):
    """Decorator registering a feature function under ``name`` in ``domain``.

    Parameters
    ----------
    name : str
        The name used in ``[features] select`` and as the cube variable (or its prefix).
    domain : str
        One of ``optical``, ``sar``, ``terrain``, ``user`` (the default).
    needs : sequence of str
        Inputs the function reads from :class:`FeatureInputs`: any of ``composite`` (the seasonal
        composites, computed before the call), ``optical``, ``sar``, ``dem``, ``aoi``.
    bands, pols : sequence of str
        Optical bands (portable names) and SAR polarisations the function reads.
    default : bool
        Part of its domain's default selection (a feature outside it runs when named).
    check : callable, optional
        ``check(availability, params) -> reason or None`` for needs that depend on parameters.
    replace : bool
        Redefine an existing name (a file registered again, e.g. a notebook cell run twice, may always).

    The function's keyword defaults become the feature's default parameters; a
    project file overrides them in ``[features.params.<name>]``.
    """
    if domain not in DOMAINS:
        raise ValueError(f"domain must be one of {DOMAINS}, got {domain!r}")
    bad = [n for n in needs if n not in NEEDS]
    if bad:
        raise ValueError(f"unknown input(s) {bad}; a feature may need any of {NEEDS}")
    reads_optical = "optical" in needs or "composite" in needs
    needs = tuple(needs) + (("optical",) if bands and not reads_optical else ())
    needs += ("sar",) if pols and "sar" not in needs else ()

    def wrap(func: Callable[..., Any]) -> Callable[..., Any]:
        old = REGISTRY.get(name)
        same_source = old is not None and _source_of(old.func) == _source_of(func)
        if old is not None and not replace and old.func is not func and not same_source:
            raise ValueError(f"feature {name!r} is already registered (by {old.origin}); pass replace=True "
                             "to "
                             "redefine it, or choose another name")
        sig = inspect.signature(func)
        empty = inspect.Parameter.empty
        defaults = {k: p.default for k, p in sig.parameters.items() if p.default is not empty}
        doc = (inspect.getdoc(func) or name).splitlines()[0]
        origin = "builtin" if func.__module__.startswith("wetlandflow.") else _source_of(func)
        REGISTRY[name] = FeatureDef(name, domain, func, tuple(needs), doc, defaults, tuple(bands),
                                    tuple(pols),
                                    default, check, origin)
        return func

    return wrap


def _source_of(func: Callable[..., Any]) -> str:
    return f"{getattr(func, '__module__', '?')}.{getattr(func, '__qualname__', '?')}@" \
           f"{getattr(getattr(func, '__code__', None), 'co_filename', '?')}"


def load_plugins(paths: Sequence[str | Path]) -> list[str]:
    """Run the Python files named in ``[features] plugins``; return the feature names they register.

    Each file is imported as a module of its own (``wetlandflow_plugin_<stem>``); its
    :func:`feature`-decorated functions register themselves.  Loading a file again replaces its features.
    """
    names: list[str] = []
    for i, path in enumerate(paths):
        path = Path(path)
        key = f"features.plugins[{i}]"
        if not path.exists():
            raise ProjectFileError(f"plugin file not found: {path}; relative paths are resolved against the "
                                   "project file's folder", key=key)
        before = {n: d.func for n, d in REGISTRY.items()}
        mod_name = f"wetlandflow_plugin_{path.stem}"
        spec = importlib.util.spec_from_file_location(mod_name, path)
        module = importlib.util.module_from_spec(spec)
        sys.modules[mod_name] = module
        try:
            spec.loader.exec_module(module)
        except Exception as exc:  # the user's code: say which file and what it raised
            raise ProjectFileError(f"the plugin {path.name} raised {type(exc).__name__}: {exc}; fix the file "
                                   "(run it in a notebook to see the traceback)", key=key) from exc
        found = [n for n, d in REGISTRY.items() if before.get(n) is not d.func]
        if not found:
            raise ProjectFileError(f"the plugin {path.name} registers no feature; decorate its functions "
                                   "with "
                                   "@wetlandflow.feature(\"name\", needs=(...), bands=(...))", key=key)
        names += found
    return names


def default_selection(avail: Availability, plugin_names: Sequence[str] = ()) -> list[str]:
    """Every built-in feature the inputs can compute, then the plugins' features.

    ``band_medians`` (the raw seasonal band values) joins when the bands allow fewer than three of the
    other optical features (RGB or RGB+NIR data), so an optical project never goes without optical features.
    """
    chosen = [n for n, d in REGISTRY.items() if d.origin == "builtin" and d.default]
    optical = [n for n in chosen if REGISTRY[n].domain == "optical" and REGISTRY[n].missing(avail) is None]
    if "band_medians" in REGISTRY and "optical" in avail.inputs and len(optical) < 3:
        chosen.append("band_medians")
    return chosen + [n for n in plugin_names if n not in chosen]


def plan_selection(select: Sequence[str], avail: Availability,
                   params: dict[str, dict[str, Any]] | None = None,
                   *, plugin_names: Sequence[str] = ()) -> tuple[list[FeatureDef], dict[str, str]]:
    """The features a run computes, and those it skips with the reason.

    An empty ``select`` (or the keyword ``"default"``) means :func:`default_selection`; a domain name means
    that domain's default features.  Features reached through a domain or the default that the inputs cannot
    compute are skipped, with the reason; a feature named on its own that they cannot compute is refused.

    Raises
    ------
    ProjectFileError
        ``features.select``: an unknown name, or a named feature the inputs cannot compute (with why);
        ``features.params``: parameters for a feature that is not selected.
    """
    params = params or {}
    explicit: list[str] = []
    implied: list[str] = []
    for item in (select or [DEFAULT_KEYWORD]):
        if item == DEFAULT_KEYWORD:
            implied += default_selection(avail, plugin_names)
        elif item in DOMAINS:
            implied += [n for n in default_selection(avail, plugin_names) if REGISTRY[n].domain == item]
        elif item in REGISTRY:
            explicit.append(item)
        else:
            raise ProjectFileError(
                f"unknown feature or domain {item!r}; domains: {', '.join(DOMAINS)}; features: "
                f"{', '.join(sorted(REGISTRY))}; or {DEFAULT_KEYWORD!r} for every built-in feature the "
                "inputs can "
                "compute (docs/methods.md lists them)", key="features.select")
    for name in explicit:
        reason = REGISTRY[name].missing(avail, params.get(name))
        if reason:
            raise ProjectFileError(f"feature {name!r} {reason}; remove it from select, or add the input it "
                                   "needs", key="features.select")
    chosen, skipped, seen = [], {}, set()
    for name in [n for n in REGISTRY if n in set(explicit) | set(implied)]:
        if name in seen:
            continue
        seen.add(name)
        reason = REGISTRY[name].missing(avail, params.get(name))
        if reason:
            skipped[name] = reason
        else:
            chosen.append(REGISTRY[name])
    unknown = sorted(set(params) - {d.name for d in chosen})
    if unknown:
        raise ProjectFileError(
            f"parameters given for feature(s) not computed: {unknown}"
            + (f" (skipped: {'; '.join(f'{n} {skipped[n]}' for n in unknown if n in skipped)})"
               if set(unknown) & set(skipped) else "")
            + "; select the feature or remove its [features.params] table", key="features.params")
    return chosen, skipped


def resolve_selection(select: Sequence[str], avail: Availability | None = None) -> list[FeatureDef]:
    """Feature definitions for names and/or whole domains, in registry order, without duplicates.

    Without ``avail`` every input is taken as present (no feature is skipped for want of one).
    """
    if avail is None:
        return [REGISTRY[n] for n in dict.fromkeys(_expand_names(select))]
    return plan_selection(select, avail)[0]


def _expand_names(select: Sequence[str]) -> list[str]:
    out: list[str] = []
    for item in (select or [DEFAULT_KEYWORD]):
        if item == DEFAULT_KEYWORD:
            out += [n for n, d in REGISTRY.items() if d.origin == "builtin" and d.default]
        elif item in DOMAINS:
            out += [n for n, d in REGISTRY.items() if d.domain == item and d.default]
        elif item in REGISTRY:
            out.append(item)
        else:
            raise ProjectFileError(f"unknown feature or domain {item!r}; domains: {', '.join(DOMAINS)}; "
                                   f"features: {', '.join(sorted(REGISTRY))}", key="features.select")
    return out


def registry_table() -> Any:
    """The registry as a DataFrame (name, domain, needs, description, default parameters)."""
    import pandas as pd

    return pd.DataFrame(
        [(d.name, d.domain, ", ".join(d.needs), ", ".join(d.bands + d.pols), d.default, d.description,
          d.defaults)
         for d in REGISTRY.values()],
        columns=["name", "domain", "needs", "bands", "default", "description", "defaults"],
    )


def registry_markdown() -> str:
    """The built-in features as the Markdown table of ``docs/methods.md`` (a test keeps the two equal)."""
    rows = ["| feature | domain | needs | default | what it computes |", "|---|---|---|---|---|"]
    for d in REGISTRY.values():
        if d.origin != "builtin":
            continue
        needs = ", ".join([n for n in d.needs if n != "composite"] + [f"`{b}`" for b in d.bands + d.pols])
        default = "yes" if d.default else "when named" + (" (or RGB/RGBN data)" * (d.name == "band_medians"))
        rows.append(f"| `{d.name}` | {d.domain} | {needs} | {default} | {d.description} |")
    return "\n".join(rows)


def needed_inputs(project: Project) -> set[str]:
    """The inputs (``optical``, ``sar``, ``dem``) the selection reads, from the project file alone.

    A domain named in ``select`` needs what its features read (so a named domain's files are always checked,
    even when none of its features can run); a feature name needs what it declares; an empty selection,
    ``"default"``, a plugin or a name not (yet) registered needs every input (the features step then says
    what runs).
    """
    import wetlandflow.features  # noqa: F401  (registers the built-in features)

    everything = {"optical", "sar", "dem"}
    select = project.features.select
    if not select or "default" in select or project.features.plugins:
        return everything
    needs: set[str] = set()
    for item in select:
        defs = [d for d in REGISTRY.values() if d.domain == item] or (
            [REGISTRY[item]] if item in REGISTRY else None)
        if not defs:
            return everything
        needs |= {n for d in defs for n in d.needs}
    if "composite" in needs:
        needs.add("optical")
    return needs & everything


def _register_resolver() -> None:
    from ..inputs import layers

    if needed_inputs not in layers.NEEDS_RESOLVER:
        layers.NEEDS_RESOLVER.append(needed_inputs)


_register_resolver()
