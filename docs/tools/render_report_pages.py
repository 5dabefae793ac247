"""Render the first pages of a demo run's methods appendix (methods.pdf) to PNG for the documentation.

Runs a small demo landscape end to end (200 x 200 pixels, a light model), draws and labels its validation
sample from the demo's hidden truth, assesses it, writes the report and renders its first pages with PDFium
(pypdfium2) into ``docs/images/report-page-<n>.png``.  Not a test: rerun it when the report's layout changes.

    python docs/tools/render_report_pages.py [--pages 3] [--out docs/images] [--keep DIR]

Each image is reduced to a palette of colours when needed to stay under ``--max-kb`` (default 300).
"""

from __future__ import annotations

import argparse
import io
import shutil
import tempfile
from pathlib import Path

import tomllib

ROOT = Path(__file__).resolve().parents[2]
LIGHT = {"model": {"n_estimators": 30}, "validation": {"n_folds": 3, "block_size_m": 200.0},
         "output": {"explain_rows": 300, "chunk_size": 128}, "project": {"output_dir": "runs/tiny"}}


def demo_report(folder: Path) -> Path:
    """A small assessed demo run in ``folder`` and its report; returns the methods PDF."""
    import tomli_w

    from wetlandflow.accuracy.assessment import assess, class_codes, design_sample, label_from_reference
    from wetlandflow.demo.landscape import load_truth, make_demo
    from wetlandflow.inputs.project import load_project
    from wetlandflow.pipeline.run import run_project
    from wetlandflow.report.appendix import write_report

    base = make_demo(folder, size=200, seed=1, progress=False)
    doc = tomllib.loads(base.read_text())
    for section, values in LIGHT.items():
        doc.setdefault(section, {}).update(values)
    project_file = base.with_name("tiny.toml")
    project_file.write_text(tomli_w.dumps(doc))
    run_project(project_file, progress=False)
    project = load_project(project_file)
    sample = design_sample(project, overwrite=True, min_per_class=20, exclude_buffer_m=20.0, target_se=0.03)
    # the demo's "photo-interpreter" is its hidden truth raster; with real data people label the sample
    assess(project, label_from_reference(sample, load_truth(folder), class_codes(project),
                                         sample.with_name("sample_labelled.gpkg")))
    return write_report(project.run_dir)["pdf"]


def png_bytes(image, max_kb: float) -> bytes:
    """PNG of a PIL image, reduced to fewer colours until it fits in ``max_kb``."""
    for colours in (None, 256, 128, 64, 32):
        img = image if colours is None else image.convert("P", palette=1, colors=colours)  # 1: ADAPTIVE
        buf = io.BytesIO()
        img.save(buf, format="PNG", optimize=True)
        if buf.tell() <= max_kb * 1024:
            return buf.getvalue()
    return buf.getvalue()


def render_pages(pdf: Path, out: Path, *, pages: int, width_px: int, max_kb: float) -> list[Path]:
    import pypdfium2 as pdfium

    out.mkdir(parents=True, exist_ok=True)
    doc = pdfium.PdfDocument(str(pdf))
    written = []
    try:
        for i in range(min(pages, len(doc))):
            page = doc[i]
            image = page.render(scale=width_px / page.get_width()).to_pil().convert("RGB")
            path = out / f"report-page-{i + 1}.png"
            path.write_bytes(png_bytes(image, max_kb))
            written.append(path)
    finally:
        doc.close()
    return written


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pages", type=int, default=3)
    ap.add_argument("--out", type=Path, default=ROOT / "docs" / "images")
    ap.add_argument("--width", type=int, default=900, help="image width in pixels")
    ap.add_argument("--max-kb", type=float, default=300.0)
    ap.add_argument("--keep", type=Path, default=None, help="keep the demo run in this folder")
    a = ap.parse_args(argv)
    folder = Path(tempfile.mkdtemp(prefix="wetlandflow_report_pages_")) if a.keep is None else a.keep
    try:
        pdf = demo_report(folder)
        for path in render_pages(pdf, a.out, pages=a.pages, width_px=a.width, max_kb=a.max_kb):
            print(f"{path.relative_to(ROOT) if path.is_relative_to(ROOT) else path}: "
                  f"{path.stat().st_size / 1024:.0f} KB")
    finally:
        if a.keep is None:
            shutil.rmtree(folder, ignore_errors=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
