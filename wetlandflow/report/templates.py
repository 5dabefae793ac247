"""Rendering the report's sections as Markdown (figures as files) and as one self-contained HTML page.

The HTML carries its style inline and its figures as base64 PNG ``data:`` URIs;
its only links are to its own section anchors, so it opens anywhere, offline,
and cannot change after it was written.
"""

from __future__ import annotations

import base64
import html
import re
from collections.abc import Sequence

import pandas as pd

from .text import Bullets, Callout, Code, Figure, Paragraph, Section, Table

STYLE = """
body { font-family: Georgia, 'Times New Roman', serif; max-width: 60rem; margin: 2rem auto; padding: 0 1rem;
       line-height: 1.45; color: #1d1d1d; }
h1 { font-size: 1.6rem; } h2 { font-size: 1.25rem; border-bottom: 1px solid #bbb; margin-top: 2.2rem; }
nav ol { columns: 2; font-size: 0.9rem; }
.caution { border: 2px solid #b35806; background: #fff4e6; padding: 0.8rem 1rem; font-weight: bold; }
table { border-collapse: collapse; margin: 0.8rem 0; font-size: 0.8rem; }
caption { caption-side: top; text-align: left; font-style: italic; padding-bottom: 0.3rem; }
th, td { border: 1px solid #ccc; padding: 0.2rem 0.4rem; text-align: left; vertical-align: top;
         word-break: break-word; max-width: 22rem; }
th { background: #eee; }
figure { margin: 1rem 0; } figure img { max-width: 100%; } figcaption { font-size: 0.85rem; font-style: italic; }
code, pre { font-family: 'DejaVu Sans Mono', Menlo, monospace; font-size: 0.85rem; background: #f4f4f4; }
pre { padding: 0.6rem; overflow-x: auto; }
"""


def _inline_html(text: str) -> str:
    """Escape, then turn `spans` into <code>."""
    return re.sub(r"`([^`]+)`", r"<code>\1</code>", html.escape(text, quote=False))


def _table_html(t: Table) -> str:
    head = "".join(f"<th>{html.escape(str(c))}</th>" for c in t.frame.columns)
    rows = "".join("<tr>" + "".join(f"<td>{html.escape(_cell(v))}</td>" for v in row) + "</tr>"
                   for row in t.frame.itertuples(index=False))
    cap = f"<caption>{html.escape(t.caption)}</caption>" if t.caption else ""
    return f"<table>{cap}<thead><tr>{head}</tr></thead><tbody>{rows}</tbody></table>"


def _cell(v: object) -> str:
    if v is None or (isinstance(v, float) and pd.isna(v)):
        return ""
    return str(v)


def _block_html(b: object) -> str:
    if isinstance(b, Paragraph):
        return f"<p>{_inline_html(b.text)}</p>"
    if isinstance(b, Bullets):
        return "<ul>" + "".join(f"<li>{_inline_html(i)}</li>" for i in b.items) + "</ul>"
    if isinstance(b, Table):
        return _table_html(b)
    if isinstance(b, Figure):
        data = base64.b64encode(b.png).decode("ascii")
        return (f'<figure><img src="data:image/png;base64,{data}" alt="{html.escape(b.caption)}">'
                f"<figcaption>{html.escape(b.caption)}</figcaption></figure>")
    if isinstance(b, Code):
        return f"<pre><code>{html.escape(b.text)}</code></pre>"
    if isinstance(b, Callout):
        return f'<div class="caution">Caution. {html.escape(b.text)}</div>'
    raise TypeError(f"unknown report block {type(b).__name__}")


def render_html(sections: Sequence[Section], *, title: str = "Methods appendix") -> str:
    """One self-contained HTML page: inline style, embedded figures, links only to its own sections."""
    toc = "".join(f'<li><a href="#{s.anchor}">{html.escape(s.title)}</a></li>' for s in sections)
    body = "".join(f'<section id="{s.anchor}"><h2>{html.escape(s.title)}</h2>'
                   + "".join(_block_html(b) for b in s.blocks) + "</section>" for s in sections)
    return (f'<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8"><title>{html.escape(title)}</title>'
            f"<style>{STYLE}</style></head><body><h1>{html.escape(title)}</h1><nav><ol>{toc}</ol></nav>"
            f"{body}</body></html>\n")


def _md_cell(v: object) -> str:
    return _cell(v).replace("|", "\\|").replace("\n", " ")


def _table_md(t: Table) -> str:
    cols = [_md_cell(c) for c in t.frame.columns]
    lines = [f"*{t.caption}*", ""] if t.caption else []
    lines += ["| " + " | ".join(cols) + " |", "|" + "---|" * len(cols)]
    lines += ["| " + " | ".join(_md_cell(v) for v in row) + " |" for row in t.frame.itertuples(index=False)]
    return "\n".join(lines)


def _block_md(b: object, figure_dir: str) -> str:
    if isinstance(b, Paragraph):
        return b.text
    if isinstance(b, Bullets):
        return "\n".join(f"- {i}" for i in b.items)
    if isinstance(b, Table):
        return _table_md(b)
    if isinstance(b, Figure):
        return f"![{b.caption}]({figure_dir}/{b.name})\n\n*{b.caption}*"
    if isinstance(b, Code):
        return f"```\n{b.text}\n```"
    if isinstance(b, Callout):
        return f"> **Caution.** {b.text}"
    raise TypeError(f"unknown report block {type(b).__name__}")


def render_markdown(sections: Sequence[Section], *, figure_dir: str = "figures",
                    title: str = "Methods appendix") -> str:
    """The report as Markdown, figures referenced as files in ``figure_dir`` (relative)."""
    parts = [f"# {title}"]
    for s in sections:
        parts.append(f"## {s.title}")
        parts += [_block_md(b, figure_dir) for b in s.blocks]
    return "\n\n".join(parts) + "\n"
