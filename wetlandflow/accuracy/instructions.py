"""Plain labelling instructions for the interpreters of a validation sample, with the class definitions.

The file goes into the sample folder beside ``sample.gpkg``; it tells the interpreter what to fill in, what to
look at and what not to do (look at the map, move or drop points), and defines every class in the words of the
project (``[classes] definitions``) or of the defaults (:mod:`wetlandflow.inputs.class_definitions`).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

from ..inputs.class_definitions import ClassDefinition

INSTRUCTIONS_NAME = "LABELLING.md"


def labelling_instructions(class_names: Sequence[str], definitions: Mapping[str, ClassDefinition], *,
                           n_points: int, sample_file: str = "sample.gpkg", project_name: str = "") -> str:
    """The Markdown text of the labelling instructions.

    Parameters
    ----------
    class_names : sequence of str
        The scheme's class names, the values ``reference_class`` may take.
    definitions : mapping
        Class name -> :class:`~wetlandflow.inputs.class_definitions.ClassDefinition` (label and definition).
    n_points : int
        The number of points to label.
    sample_file : str
        The file name of the sample, as the interpreter receives it.
    project_name : str
        Shown in the title.
    """
    title = f"# Labelling the validation sample{f' of {project_name}' if project_name else ''}"
    rows = [f"| `{n}` | {definitions[n].label} | {definitions[n].definition or '(no definition given)'} |"
            for n in class_names]
    return "\n".join([
        title, "",
        f"`{sample_file}` holds {n_points} points (layer `sample`). For every point, write the class you see "
        "at the point into the column `reference_class`, using the code name of the table below.", "",
        "## How", "",
        "1. Open the file in a GIS (QGIS, ArcGIS) over the best imagery you have from the season and year of "
        "the map: aerial photos, high-resolution satellite images, field notes or site visits.",
        "2. Judge the ground at the point itself (the pixel under it), not the surrounding patch.",
        "3. Label every point. Where you cannot decide, choose the most likely class and say why in a note "
        "kept with your records; do not leave a point empty.", "",
        "## Do not", "",
        "- look at the wetland map, its class layers or its probabilities while labelling: the file "
        "deliberately has no map class, so that the map cannot steer the labels;",
        "- delete, add or move points, or change `sample_id`: the points are a probability sample, and "
        "dropping or moving points can bias the accuracy and area estimates;",
        "- rename the file's columns.", "",
        "## Classes", "",
        "| code name | class | definition |",
        "|---|---|---|",
        *rows, "",
        "## When done", "",
        "Return the file. The analyst runs `wetlandflow assess PROJECT.toml <the labelled file>`, which "
        "joins the map classes kept aside in `map_classes.csv` and estimates the accuracy and the "
        "error-adjusted areas.", "",
    ])
