"""Class labels and definitions: what each mapped class means, for legends, the report and the interpreters.

The defaults describe the six classes of the default scheme in our own words, after the five wetland classes of
the Canadian Wetland Classification System (National Wetlands Working Group 1997, 2nd edition, eds. B. G. Warner
and C. D. A. Rubec, Wetlands Research Centre, University of Waterloo; ISBN 0-662-25857-6), which separates
wetlands by their water source, peat and vegetation.  A project with another scheme gives its own labels and
definitions; a class without one is shown by its name.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

SOURCE = (
    "National Wetlands Working Group (1997). The Canadian Wetland Classification System, 2nd edition. "
    "Warner, B. G., Rubec, C. D. A. (eds.). Wetlands Research Centre, University of Waterloo, "
    "Waterloo, Ontario. ISBN 0-662-25857-6"
)


@dataclass(frozen=True, slots=True)
class ClassDefinition:
    """A class's label as printed (``"Shallow open water"``) and a one-to-three sentence definition."""

    label: str
    definition: str


DEFAULT_DEFINITIONS: Mapping[str, ClassDefinition] = {
    "upland": ClassDefinition(
        "Upland (not wetland)",
        "Land that is not saturated or flooded long enough to develop wetland soils or vegetation: forest, "
        "shrubland, grassland, cropland, rock and built-up land.",
    ),
    "open_water": ClassDefinition(
        "Shallow open water",
        "Standing or slowly moving water, typically less than about 2 m deep in midsummer, with little "
        "emergent or woody cover; floating-leaved and submerged plants may be present. Transitional between "
        "deep water and the vegetated wetland classes.",
    ),
    "marsh": ClassDefinition(
        "Marsh",
        "A mineral-soil wetland whose water level rises and falls through the season, flooded at times and "
        "dominated by emergent grasses, sedges, rushes, reeds and other herbs.",
    ),
    "swamp": ClassDefinition(
        "Swamp",
        "A wetland dominated by trees or tall shrubs, on mineral soil or peat, with water at or near the surface "
        "for much of the season, often moving slowly and rich in nutrients.",
    ),
    "fen": ClassDefinition(
        "Fen",
        "A peatland fed by groundwater or surface water moving through it, with the water table at or near the "
        "surface; sedges, brown mosses and shrubs dominate, with scattered trees in some fens.",
    ),
    "bog": ClassDefinition(
        "Bog",
        "A peatland raised above or level with its surroundings and fed only by rain and snow, so acidic and "
        "poor in nutrients; peat mosses (Sphagnum) and heath shrubs dominate, sometimes with stunted conifers.",
    ),
}


def check_definitions(table: Mapping[str, object], *, known: tuple[str, ...]) -> None:
    """Refuse a ``[classes] definitions`` table naming an unknown class or holding anything but a definition.

    Each value is a string (the definition) or a table with ``definition`` and optionally ``label``.
    """
    from ..errors import ProjectFileError

    for name, value in table.items():
        key = f"classes.definitions.{name}"
        if name not in known:
            raise ProjectFileError(f"unknown class {name!r}; definitions are given for classes of the scheme "
                                   f"({', '.join(known)})", key=key)
        if isinstance(value, str):
            continue
        extra = set(value) - {"label", "definition"} if isinstance(value, Mapping) else set()
        if not isinstance(value, Mapping) or "definition" not in value or extra:
            raise ProjectFileError("expected a string, or a table {label = \"...\", definition = \"...\"}, "
                                   f"got {value!r}", key=key)
        if not all(isinstance(v, str) for v in value.values()):
            raise ProjectFileError(f"label and definition must be strings, got {value!r}", key=key)


def project_definitions(table: Mapping[str, object] | None) -> dict[str, ClassDefinition]:
    """The ``[classes] definitions`` of a project (as read, or from a run's manifest) as
    :class:`ClassDefinition` values; a definition without a label keeps the default label of its class."""
    out: dict[str, ClassDefinition] = {}
    for name, value in (table or {}).items():
        default = class_definition(name)
        if isinstance(value, str):
            out[name] = ClassDefinition(default.label, value.strip())
        elif isinstance(value, Mapping):
            out[name] = ClassDefinition(str(value.get("label") or default.label),
                                        str(value.get("definition", "")).strip())
    return out


def class_definition(name: str, overrides: Mapping[str, ClassDefinition] | None = None) -> ClassDefinition:
    """The definition of ``name``: the project's own, else the default, else the name itself as label."""
    if overrides and name in overrides:
        return overrides[name]
    return DEFAULT_DEFINITIONS.get(name, ClassDefinition(name.replace("_", " ").capitalize(), ""))


def class_label(name: str, overrides: Mapping[str, ClassDefinition] | None = None) -> str:
    """The printed label of a class (``"open_water"`` -> ``"Shallow open water"``)."""
    return class_definition(name, overrides).label
