"""The methods appendix as a print-ready PDF (A4), from the same sections as the HTML and Markdown.

Built with ReportLab's page-layout engine (platypus), a pure-Python PDF library that needs no browser and no
system library: paragraphs, bullet lists, tables that repeat their header row across pages, figures scaled to
the text width, the caution in a box, and page numbers with the run's name in the footer.
"""

from __future__ import annotations

import io
import re
from collections.abc import Sequence
from xml.sax.saxutils import escape

import pandas as pd

from .text import Bullets, Callout, Code, Figure, Paragraph, Section, Table

_MARGIN_CM = 1.8


def _styles():
    from reportlab.lib import colors
    from reportlab.lib.styles import ParagraphStyle, getSampleStyleSheet

    base = getSampleStyleSheet()
    return {
        "title": ParagraphStyle("title", parent=base["Title"], fontSize=17, leading=21, spaceAfter=10),
        "h2": ParagraphStyle("h2", parent=base["Heading2"], fontSize=12.5, leading=15, spaceBefore=12,
                             spaceAfter=5, keepWithNext=1),
        "body": ParagraphStyle("body", parent=base["BodyText"], fontName="Times-Roman", fontSize=9.5,
                               leading=12.5, spaceAfter=5),
        "bullet": ParagraphStyle("bullet", parent=base["BodyText"], fontName="Times-Roman", fontSize=9.5,
                                 leading=12, leftIndent=12, bulletIndent=2, spaceAfter=2),
        "cell": ParagraphStyle("cell", parent=base["BodyText"], fontName="Helvetica", fontSize=6.8, leading=8),
        "head": ParagraphStyle("head", parent=base["BodyText"], fontName="Helvetica-Bold", fontSize=6.8,
                               leading=8),
        "caption": ParagraphStyle("caption", parent=base["Italic"], fontSize=8, leading=10, spaceAfter=8),
        "code": ParagraphStyle("code", parent=base["Code"], fontSize=7, leading=8.5, backColor="#f4f4f4"),
        "caution": ParagraphStyle("caution", parent=base["BodyText"], fontName="Helvetica-Bold", fontSize=9.5,
                                  leading=12.5, borderColor=colors.HexColor("#b35806"), borderWidth=1.5,
                                  borderPadding=6, backColor=colors.HexColor("#fff4e6"), spaceBefore=4,
                                  spaceAfter=10),
    }


def _inline(text: str) -> str:
    """Escape for ReportLab's mini-markup, then `spans` in a monospace font."""
    return re.sub(r"`([^`]+)`", r'<font face="Courier">\1</font>', escape(text))


def _cell(v: object) -> str:
    if v is None or (isinstance(v, float) and pd.isna(v)):
        return ""
    return str(v)


def column_widths(frame: pd.DataFrame, width: float, *, low: int = 8, high: int = 60,
                  font_size: float = 6.8, padding: float = 12.0) -> list[float]:
    """Widths of a table's columns summing to ``width``, in proportion to each column's longest text
    (header or cell, counted between ``low`` and ``high`` characters), so a column of definitions gets room
    and a column of numbers does not; no column narrower than its longest word (a date, a file name) in
    Helvetica at ``font_size`` plus the cell ``padding``, up to 40 % of the width."""
    from reportlab.pdfbase.pdfmetrics import stringWidth

    if not len(frame.columns):
        return [width]
    texts = [[str(c), *(_cell(v) for v in frame.iloc[:, i])] for i, c in enumerate(frame.columns)]
    weights = [min(max(max(map(len, t)), low), high) for t in texts]
    def longest_word(t: list[str]) -> float:  # t[0] is the header, set in bold
        return max((stringWidth(w, "Helvetica-Bold" if k == 0 else "Helvetica", font_size)
                    for k, cell in enumerate(t) for w in cell.split()), default=0.0)

    floors = [min(padding + longest_word(t), 0.4 * width) for t in texts]
    if sum(floors) >= width:
        return [width * f / sum(floors) for f in floors]
    fixed: set[int] = set()
    while True:  # columns below their floor take it; the rest share what is left by weight
        free = width - sum(floors[i] for i in fixed)
        rest = sum(w for i, w in enumerate(weights) if i not in fixed)
        widths = [floors[i] if i in fixed else free * w / rest for i, w in enumerate(weights)]
        short = {i for i, w in enumerate(widths) if i not in fixed and w < floors[i]}
        if not short:
            return widths
        fixed |= short


def _table(t: Table, st: dict, width: float) -> list:
    from reportlab.lib import colors
    from reportlab.platypus import LongTable
    from reportlab.platypus import Paragraph as P

    rows = [[P(_inline(str(c)), st["head"]) for c in t.frame.columns]]
    rows += [[P(_inline(_cell(v)), st["cell"]) for v in row] for row in t.frame.itertuples(index=False)]
    table = LongTable(rows, colWidths=column_widths(t.frame, width), repeatRows=1, hAlign="LEFT")
    table.setStyle([("GRID", (0, 0), (-1, -1), 0.3, colors.HexColor("#bbbbbb")),
                    ("BACKGROUND", (0, 0), (-1, 0), colors.HexColor("#eeeeee")),
                    ("VALIGN", (0, 0), (-1, -1), "TOP"),
                    ("TOPPADDING", (0, 0), (-1, -1), 1.5), ("BOTTOMPADDING", (0, 0), (-1, -1), 1.5)])
    out = [P(_inline(t.caption), st["caption"])] if t.caption else []
    return [*out, table]


def _figure(f: Figure, st: dict, width: float, height: float) -> list:
    from reportlab.lib.utils import ImageReader
    from reportlab.platypus import Image
    from reportlab.platypus import Paragraph as P

    w, h = ImageReader(io.BytesIO(f.png)).getSize()
    scale = min(width / w, 0.62 * height / h)  # the text width, and never more than 62 % of a page's height
    return [Image(io.BytesIO(f.png), width=w * scale, height=h * scale, hAlign="LEFT"),
            P(_inline(f.caption), st["caption"])]


def _flowables(b: object, st: dict, width: float, height: float) -> list:
    from reportlab.platypus import ListFlowable, ListItem, Preformatted
    from reportlab.platypus import Paragraph as P

    if isinstance(b, Paragraph):
        return [P(_inline(b.text), st["body"])]
    if isinstance(b, Bullets):
        return [ListFlowable([ListItem(P(_inline(i), st["bullet"]), leftIndent=12) for i in b.items],
                             bulletType="bullet", start="\u2022", leftIndent=12)]
    if isinstance(b, Table):
        return _table(b, st, width)
    if isinstance(b, Figure):
        return _figure(b, st, width, height)
    if isinstance(b, Code):
        return [Preformatted(b.text, st["code"])]
    if isinstance(b, Callout):
        return [P(f"Caution. {_inline(b.text)}", st["caution"])]
    raise TypeError(f"unknown report block {type(b).__name__}")


def render_pdf(sections: Sequence[Section], *, title: str = "Methods appendix", footer: str = "") -> bytes:
    """The sections as an A4 PDF: title, then each section with its text, tables and figures; page numbers.

    Parameters
    ----------
    sections : sequence of Section
        As built by :func:`wetlandflow.report.text.build_sections`.
    title : str
        The document title (first page, and the PDF's metadata).
    footer : str
        Text printed at the foot of every page beside the page number (e.g. the project's name).
    """
    from reportlab.lib.pagesizes import A4
    from reportlab.lib.units import cm
    from reportlab.platypus import Paragraph as P
    from reportlab.platypus import SimpleDocTemplate

    st = _styles()
    buf = io.BytesIO()
    doc = SimpleDocTemplate(buf, pagesize=A4, leftMargin=_MARGIN_CM * cm, rightMargin=_MARGIN_CM * cm,
                            topMargin=_MARGIN_CM * cm, bottomMargin=_MARGIN_CM * cm, title=title,
                            author="wetlandflow", subject="Methods appendix of a wetland inventory run")
    story: list = [P(_inline(title), st["title"])]
    for s in sections:
        story.append(P(_inline(s.title), st["h2"]))
        for b in s.blocks:
            story += _flowables(b, st, doc.width, doc.height)

    def on_page(canvas, document) -> None:
        canvas.saveState()
        canvas.setFont("Helvetica", 7)
        canvas.drawString(_MARGIN_CM * cm, 1.0 * cm, footer[:140])
        canvas.drawRightString(A4[0] - _MARGIN_CM * cm, 1.0 * cm, f"page {document.page}")
        canvas.restoreState()

    doc.build(story, onFirstPage=on_page, onLaterPages=on_page)
    return buf.getvalue()
