"""Stage 6, report: the methods appendix of a run folder (HTML, Markdown and figures).

Takes a run folder alone (``manifest.json`` and the step outputs, read through :class:`RunFolder`) and
returns the appendix: sections of text and tables built from the recorded numbers (``text``), map figures
from the COG overviews (``figures``), the bibliography (``references``), rendered to self-contained HTML and
Markdown (``templates``) and written atomically (``appendix``).
"""

from .._lazy import exports

__all__, __getattr__, __dir__ = exports(__name__, {
    "appendix": ["build_report", "write_report"],
    "run_folder": ["RunFolder"],
    "figures": ["class_map_png", "confidence_png", "applicability_png", "plots_png", "suspects_png"],
    "text": ["Section", "build_sections"],
    "templates": ["render_html", "render_markdown"],
    "references": ["Reference", "Citations", "cite_features"],
})
