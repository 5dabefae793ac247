"""The methods report of a run folder: ``report/index.html``, ``methods.md``, ``methods.pdf``, ``figures/``, ``maps/``.

The report is rebuilt from the run folder alone (``manifest.json`` and the
step outputs); the inputs need not exist.  Its text is generated from the
recorded numbers (:mod:`.text`), its maps come from the COG overviews (never
the full-resolution rasters) with scale bar, north arrow and legend
(:mod:`.figures`), and the HTML is self-contained: style inline, figures
embedded as base64 PNG, no link to any outside resource.  The PDF (A4) carries
the same sections for print (:mod:`.pdf`); ``maps/class_map.pdf`` is the final
map as a standalone A4 page with a scale that holds when printed at 100 %.

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
    """Write ``index.html`` (self-contained), ``methods.md``, ``methods.pdf``, ``figures/`` and ``maps/``.

    Parameters
    ----------
    run_dir : str or Path
        The run folder (``manifest.json`` and the step outputs; the inputs are not needed).
    out_dir : str or Path, optional
        Where to write; default ``RUN_DIR/report``.

    Returns
    -------
    dict of str to Path
        ``{"html", "markdown", "pdf", "summary_pdf", "figures", "map_pdf", "map_png"}`` to paths (the
        map pages only when the run has a final class map).

    Raises
    ------
    InputFileError
        When the folder has no readable ``manifest.json``.

    Notes
    -----
    Every file is written to a temporary name and renamed (the figures folder as a whole), so an
    interrupted report never leaves a half-written file under a final name.
    """
    from .figures import export_maps
    from .pdf import render_pdf
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
    paths = {"markdown": out / "methods.md", "html": out / "index.html", "pdf": out / "methods.pdf",
             "figures": figures}
    for key, text in (("markdown", render_markdown(sections, figure_dir="figures", title=title)),
                      ("html", render_html(sections, title=title))):
        with atomic_path(paths[key]) as tmp:
            tmp.write_text(text, encoding="utf-8")
    name = run.project.get("project", {}).get("name", run.path.name)
    pdf = render_pdf(sections, title=title, footer=f"{name} - screening-level model product, not a legal "
                                                  "wetland delineation")
    with atomic_path(paths["pdf"]) as tmp:
        tmp.write_bytes(pdf)
    paths["summary_pdf"] = out / "summary.pdf"
    with atomic_path(paths["summary_pdf"]) as tmp:
        tmp.write_bytes(render_pdf(summary_sheet(run, sections), title=f"Summary: {name}",
                                   footer=f"{name} - see methods.pdf for the methods and their sources"))
    paths.update({f"map_{k}": v for k, v in export_maps(run, out / "maps").items()})
    return paths


def summary_sheet(run: RunFolder, sections: list) -> list:
    """The one-page summary: the caution, the totals with their intervals and accuracy, a small class map."""
    from .figures import class_map_png
    from .text import Figure, Section

    by_title = {s.title: s for s in sections}
    summary = by_title["Summary"]
    blocks = [b for b in summary.blocks if not (b.__class__.__name__ == "Paragraph" and
                                                b.text.startswith("This appendix documents"))]
    png = class_map_png(run, size=(7.0, 4.2))
    if png is not None:
        blocks.append(Figure("class_map_small.png", png, "Final class map (the methods appendix has the full map "
                                                          "and how it was made)."))
    return [by_title["Caution"], Section("Summary", blocks)]


def _figures(sections: list) -> list:
    from .text import Figure

    return [b for s in sections for b in s.blocks if isinstance(b, Figure)]
