"""The feature registry: named feature functions grouped by domain.

A feature function takes a :class:`FeatureInputs` (the aligned inputs of a run)
and keyword parameters, and returns a DataArray or a Dataset on the grid.  A
DataArray with a ``season`` dimension becomes one cube variable per season
(``ndvi_summer``).  Users add their own with :func:`feature`::

    @wetlandflow.feature("green_red_ratio", domain="user", needs=("composite",))
    def green_red_ratio(inputs):
        r = inputs.composite["reflectance"]
        return (r.sel(band="green") / r.sel(band="red")).assign_attrs(...)

and select them by name in the project file like the built-in ones.
"""

from __future__ import annotations

import inspect
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import xarray as xr

from .._provenance import DOMAINS
from ..errors import ProjectFileError
from ..inputs.layers import FeatureInputs  # noqa: F401  (re-exported: feature functions take it)

NEEDS = ("composite", "optical", "sar", "dem", "aoi")


@dataclass(frozen=True)
class FeatureDef:
    name: str
    domain: str
    func: Callable[..., xr.DataArray | xr.Dataset]
    needs: tuple[str, ...]
    description: str
    defaults: dict[str, Any]


REGISTRY: dict[str, FeatureDef] = {}


def feature(name: str, *, domain: str, needs: tuple[str, ...], replace: bool = False):
    """Decorator registering a feature function under ``name`` in ``domain``.

    The function's keyword defaults become the feature's default parameters; a
    project file overrides them in ``[features.params.<name>]``.
    """
    if domain not in DOMAINS:
        raise ValueError(f"domain must be one of {DOMAINS}, got {domain!r}")
    bad = [n for n in needs if n not in NEEDS]
    if bad:
        raise ValueError(f"unknown input(s) {bad}; a feature may need any of {NEEDS}")

    def wrap(func: Callable[..., Any]) -> Callable[..., Any]:
        if name in REGISTRY and not replace and REGISTRY[name].func is not func:
            raise ValueError(f"feature {name!r} is already registered; pass replace=True to redefine it")
        sig = inspect.signature(func)
        defaults = {k: p.default for k, p in sig.parameters.items() if p.default is not inspect.Parameter.empty}
        doc = (inspect.getdoc(func) or name).splitlines()[0]
        REGISTRY[name] = FeatureDef(name, domain, func, tuple(needs), doc, defaults)
        return func

    return wrap


def resolve_selection(select: tuple[str, ...] | list[str]) -> list[FeatureDef]:
    """Feature definitions for names and/or whole domains, in registry order, without duplicates."""
    chosen: list[str] = []
    for item in select:
        if item in DOMAINS:
            chosen += [n for n, d in REGISTRY.items() if d.domain == item]
        elif item in REGISTRY:
            chosen.append(item)
        else:
            raise ProjectFileError(
                f"unknown feature or domain {item!r}; domains: {', '.join(DOMAINS)}; "
                f"features: {', '.join(sorted(REGISTRY))}",
                key="features.select",
            )
    seen: set[str] = set()
    return [REGISTRY[n] for n in chosen if not (n in seen or seen.add(n))]


def registry_table() -> Any:
    """The registry as a DataFrame (name, domain, needs, description, default parameters)."""
    import pandas as pd

    return pd.DataFrame(
        [(d.name, d.domain, ", ".join(d.needs), d.description, d.defaults) for d in REGISTRY.values()],
        columns=["name", "domain", "needs", "description", "defaults"],
    )
