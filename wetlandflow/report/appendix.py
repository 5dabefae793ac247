"""The methods report of a run folder: ``report/index.html``, ``report/methods.md``, ``report/figures/``.

The report is rebuilt from the run folder alone (``manifest.json`` and the
step outputs); the inputs need not exist.  Its text is generated from the
recorded numbers (:mod:`.report_text`), its map previews come from the COG
overviews (never the full-resolution rasters), and the HTML is self-contained:
style inline, figures embedded as base64 PNG, no link to any outside resource.

Examples
--------
>>> paths = write_report("demo/runs/demo")   # doctest: +SKIP
>>> paths["html"]                            # doctest: +SKIP
PosixPath('demo/runs/demo/report/index.html')
"""

from __future__ import annotations

from pathlib import Path

from ..inputs.io import atomic_path
from .run_folder import RunFolder

REPORT_DIR = "report"


# -- building and writing -----------------------------------------------------------------------------------------
def build_report(run_dir: str | Path) -> list:
    """The report's sections (:class:`wetlandflow.report.text.Section`), built from the run folder alone."""
    from .text import build_sections

    return build_sections(RunFolder(run_dir))


def write_report(run_dir: str | Path, *, out_dir: str | Path | None = None) -> dict[str, Path]:
    """Write ``index.html`` (self-contained), ``methods.md`` and ``figures/`` for a run folder.

    Parameters
    ----------
    run_dir : str or Path
        The run folder (``manifest.json`` and the step outputs; the inputs are not needed).
    out_dir : str or Path, optional
        Where to write; default ``RUN_DIR/report``.

    Returns
    -------
    dict of str to Path
        ``{"html": ..., "markdown": ..., "figures": ...}``.

    Raises
    ------
    InputFileError
        When the folder has no readable ``manifest.json``.

    Notes
    -----
    Every file is written to a temporary name and renamed (the figures folder as a whole), so an
    interrupted report never leaves a half-written file under a final name.
    """
    from .templates import render_html, render_markdown
    from .text import build_sections

    run = RunFolder(run_dir)
    sections = build_sections(run)
    title = f"Methods appendix: {run.project.get('project', {}).get('name', run.path.name)}"
    out = Path(out_dir) if out_dir is not None else Path(run_dir) / REPORT_DIR
    out.mkdir(parents=True, exist_ok=True)
    figures = out / "figures"
    with atomic_path(figures) as tmp:
        tmp.mkdir()
        for fig in _figures(sections):
            (tmp / fig.name).write_bytes(fig.png)
    paths = {"markdown": out / "methods.md", "html": out / "index.html", "figures": figures}
    for key, text in (("markdown", render_markdown(sections, figure_dir="figures", title=title)),
                      ("html", render_html(sections, title=title))):
        with atomic_path(paths[key]) as tmp:
            tmp.write_text(text, encoding="utf-8")
    return paths


def _figures(sections: list) -> list:
    from .text import Figure

    return [b for s in sections for b in s.blocks if isinstance(b, Figure)]
