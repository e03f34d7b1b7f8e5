"""HTML building blocks for the report: escaped tables, embedded images, sections and the page shell.

Everything a user typed (study name, notes, run ids, factor and response names) goes through
:func:`html.escape`; images are ``data:`` URIs; the style sheet is inline; nothing is fetched from a
network, so the page reads the same offline, in an e-mail attachment or on paper.
"""

from __future__ import annotations

import html
import math

import numpy as np
import pandas as pd

CSS = """
:root { --ink: #1d2433; --muted: #5b6475; --rule: #c9ced8; --band: #f2f4f7; --accent: #1f5f8b;
        --warn-bg: #fff4e0; --warn-rule: #b36b00; }
* { box-sizing: border-box; }
body { font: 15px/1.5 system-ui, -apple-system, "Segoe UI", Roboto, "Noto Sans", sans-serif;
       color: var(--ink); margin: 0 auto; max-width: 1180px; padding: 1.2rem 1.6rem 3rem; }
header.top { border-bottom: 3px solid var(--accent); margin-bottom: 1rem; }
header.top h1 { margin: 0 0 .2rem; font-size: 1.6rem; }
header.top p { margin: .1rem 0; color: var(--muted); }
nav.toc { font-size: .9rem; margin: .6rem 0 1.2rem; }
nav.toc a { margin-right: .9rem; color: var(--accent); text-decoration: none; }
section { margin: 1.8rem 0; }
section > h2 { font-size: 1.25rem; border-bottom: 1px solid var(--rule); padding-bottom: .2rem; }
h3 { font-size: 1.05rem; margin: 1.2rem 0 .4rem; }
table { border-collapse: collapse; margin: .4rem 0 1rem; font-size: .86rem; }
caption { text-align: left; font-weight: 600; padding: .2rem 0; }
th, td { border: 1px solid var(--rule); padding: .2rem .5rem; vertical-align: top; }
th { background: var(--band); text-align: left; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
tr.failed td { background: #fbe9e7; }
tr.outside td { background: #eef3fb; }
tr.planned td { color: var(--muted); }
tr.pick td { font-weight: 700; background: #fff8d6; }
.scroll { overflow-x: auto; }
.caution { border: 2px solid var(--warn-rule); background: var(--warn-bg); padding: .6rem .9rem;
           margin: .8rem 0 1.2rem; }
.caution p { margin: .25rem 0; }
.verdict { padding: .35rem .7rem; border-left: 4px solid var(--accent); background: var(--band); }
.verdict.bad { border-left-color: var(--warn-rule); background: var(--warn-bg); }
.headline { font-size: 1.05rem; }
figure { margin: .6rem 0 1.2rem; }
figure img { max-width: 100%; height: auto; border: 1px solid var(--rule); }
figcaption { color: var(--muted); font-size: .85rem; }
.side { display: flex; gap: 1.2rem; align-items: flex-start; flex-wrap: wrap; }
.side > div { flex: 1 1 20rem; }
.side figure { margin-top: 0; }
.refs li { margin-bottom: .25rem; }
@media print {
  body { max-width: none; padding: 0; font-size: 10.5pt; }
  nav.toc { display: none; }
  section { page-break-before: always; }
  section#summary { page-break-before: avoid; }
  figure, table, .caution { page-break-inside: avoid; }
  .scroll { overflow: visible; }
  a { color: inherit; text-decoration: none; }
}
"""


def esc(text) -> str:
    """HTML-escaped text (quotes included)."""
    return html.escape("" if text is None else str(text), quote=True)


def cell(v) -> tuple[str, bool]:
    """Text of a table cell and whether it is a number."""
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return "–", False
    if isinstance(v, (bool, np.bool_)):
        return ("yes" if v else "no"), False
    if isinstance(v, (int, np.integer)):
        return str(int(v)), True
    if isinstance(v, (float, np.floating)):
        return (f"{float(v):.4g}" if math.isfinite(float(v)) else "–"), True
    return esc(v), False


def html_table(frame: pd.DataFrame, caption: str | None = None, row_class=None) -> str:
    """An escaped HTML table of ``frame`` (no index); ``row_class`` is an optional list of CSS classes."""
    head = "".join(f"<th scope=\"col\">{esc(c)}</th>" for c in frame.columns)
    body = []
    classes = list(row_class) if row_class is not None else [""] * len(frame)
    for cls, rec in zip(classes, frame.itertuples(index=False, name=None)):
        cells = []
        for v in rec:
            text, num = cell(v)
            cells.append(f"<td class=\"num\">{text}</td>" if num else f"<td>{text}</td>")
        attr = f" class=\"{esc(cls)}\"" if cls else ""
        body.append(f"<tr{attr}>{''.join(cells)}</tr>")
    cap = f"<caption>{esc(caption)}</caption>" if caption else ""
    return (f"<div class=\"scroll\"><table>{cap}<thead><tr>{head}</tr></thead>"
            f"<tbody>{''.join(body)}</tbody></table></div>")


def image(png_base64: str, alt: str, caption: str = "") -> str:
    """A figure with an embedded PNG, alt text and an optional caption (all escaped)."""
    cap = f"<figcaption>{esc(caption)}</figcaption>" if caption else ""
    return (f"<figure><img src=\"data:image/png;base64,{png_base64}\" alt=\"{esc(alt)}\">{cap}"
            "</figure>")


def para(text: str, cls: str = "") -> str:
    attr = f" class=\"{cls}\"" if cls else ""
    return f"<p{attr}>{esc(text)}</p>"


def bullets(items) -> str:
    items = list(items)
    return "<ul>" + "".join(f"<li>{esc(i)}</li>" for i in items) + "</ul>" if items else ""


def section(sid: str, title: str, body: str) -> str:
    return f"<section id=\"{esc(sid)}\"><h2>{esc(title)}</h2>\n{body}\n</section>"


def page(title: str, subtitle_lines, sections) -> str:
    """The whole document: inline style, header, table of contents and the sections.

    ``sections`` is a list of ``(id, title, body_html)``.
    """
    toc = "".join(f"<a href=\"#{esc(s)}\">{esc(t)}</a>" for s, t, _ in sections)
    sub = "".join(f"<p>{esc(line)}</p>" for line in subtitle_lines)
    body = "\n".join(section(*s) for s in sections)
    return ("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n"
            f"<title>{esc(title)}</title>\n<style>{CSS}</style>\n</head>\n<body>\n"
            f"<header class=\"top\"><h1>{esc(title)}</h1>{sub}</header>\n"
            f"<nav class=\"toc\" aria-label=\"Contents\">{toc}</nav>\n{body}\n</body>\n</html>\n")
