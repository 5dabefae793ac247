"""Executing a template notebook headless with new parameters (nbclient)."""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any

from ...errors import ParameterError, WetlandflowError


def parameters_source(parameters: Mapping[str, Any]) -> str:
    """Python assignments for a parameters cell (values written with ``repr``; paths as strings)."""
    lines = ["# Parameters injected for this execution"]
    for name, value in parameters.items():
        if not str(name).isidentifier():
            raise ParameterError(f"parameter name {name!r} is not a Python identifier")
        lines.append(f"{name} = {str(value)!r}" if isinstance(value, Path) else f"{name} = {value!r}")
    return "\n".join(lines)


def inject_parameters(nb: Any, parameters: Mapping[str, Any]) -> Any:
    """Insert a cell tagged ``injected-parameters`` right after the cell tagged ``parameters`` (in place).

    The template's defaults stay visible above the new values, which win because they run later.
    """
    import nbformat

    tagged = [i for i, c in enumerate(nb.cells) if "parameters" in c.get("metadata", {}).get("tags", [])]
    if not tagged:
        raise ParameterError(
            "the notebook has no cell tagged 'parameters'; tag the cell that holds its settings"
        )
    cell = nbformat.v4.new_code_cell(parameters_source(parameters))
    cell.metadata["tags"] = ["injected-parameters"]
    nb.cells.insert(tagged[0] + 1, cell)
    return nb


def run_notebook(
    source: str | Path,
    destination: str | Path | None = None,
    *,
    parameters: Mapping[str, Any] | None = None,
    timeout: int = 600,
    kernel_name: str = "python3",
    cwd: str | Path | None = None,
) -> Any:
    """Execute a template notebook headless with new parameters; return the executed notebook.

    Parameters
    ----------
    source : path
        The template (``notebooks/0N_*.ipynb``).
    destination : path, optional
        Where to write the executed notebook with its outputs.
    parameters : dict, optional
        New values for the parameters cell (:func:`inject_parameters`).
    timeout : int
        Seconds allowed per cell.
    kernel_name : str
    cwd : path, optional
        Working directory of the kernel (default: the template's folder, so its relative paths hold).

    Raises
    ------
    nbclient.exceptions.CellExecutionError
        With the failing cell's traceback.
    """
    try:
        import nbformat
        from nbclient import NotebookClient
    except ImportError as exc:
        raise WetlandflowError(
            "running notebooks headless needs nbclient and nbformat: pip install nbclient nbformat ipykernel"
        ) from exc
    nb = nbformat.read(Path(source), as_version=4)
    if parameters:
        inject_parameters(nb, parameters)
    client = NotebookClient(
        nb,
        timeout=timeout,
        kernel_name=kernel_name,
        resources={"metadata": {"path": str(cwd or Path(source).parent)}},
    )
    try:
        client.execute()
    finally:
        if destination is not None:
            nbformat.write(nb, Path(destination))
    return nb
