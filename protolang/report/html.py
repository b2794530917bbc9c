"""Static HTML building blocks: text, tables and figures in, one self-contained page out.

Pages written with these helpers open from disk in any browser with no server and no
network: styles are inline and figures are embedded as ``data:`` URIs. Tables come from
pandas DataFrames; every value is escaped. No matplotlib here (figures arrive as PNG files).
"""

from __future__ import annotations

import base64
import html
import math
import os
from pathlib import Path
from typing import TYPE_CHECKING, Iterable

if TYPE_CHECKING:
    import pandas as pd

STYLE = """
body { font-family: "DejaVu Sans", Arial, sans-serif; margin: 2em auto; max-width: 60em;
       color: #111; line-height: 1.4; padding: 0 1em; }
h1 { font-size: 1.6em; border-bottom: 2px solid #333; padding-bottom: .2em; }
h2 { font-size: 1.25em; margin-top: 1.6em; border-bottom: 1px solid #999; }
h3 { font-size: 1.05em; }
table { border-collapse: collapse; margin: .6em 0 1em 0; font-size: .85em; }
th, td { border: 1px solid #999; padding: .2em .45em; text-align: left; vertical-align: top; }
th { background: #eee; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
td.blank { min-width: 8em; }
figure { margin: 1em 0; page-break-inside: avoid; }
figure img { max-width: 100%; border: 1px solid #ccc; }
figcaption { font-size: .85em; color: #333; }
pre { background: #f6f6f6; border: 1px solid #ddd; padding: .6em; overflow-x: auto; font-size: .8em; }
details { margin: .6em 0; }
details > summary { cursor: pointer; color: #225; }
nav ul { margin: .3em 0; }
.wide { overflow-x: auto; }
.wide td { white-space: nowrap; }
.caution { border: 2px solid #a33; background: #fff4f4; padding: .6em 1em; margin: 1em 0; }
.note { color: #444; font-size: .9em; }
dl { display: grid; grid-template-columns: max-content auto; gap: .2em 1em; }
dt { font-weight: bold; }
dd { margin: 0; }
@media print { body { margin: 0; max-width: none; } h2 { page-break-after: avoid; }
               table, figure, .caution { page-break-inside: avoid; } }
"""


def escape(text: object) -> str:
    """``text`` as HTML-safe text (quotes escaped too)."""
    return html.escape("" if text is None else str(text), quote=True)


def page(title: str, body: str, *, lang: str = "en", script: str | None = None) -> str:
    """A whole HTML document: ``title`` in the head and as the first heading, then ``body``.

    ``script`` (optional) is inline JavaScript placed at the end of the body; it must not
    load anything (the page stays self-contained).
    """
    tail = ""
    if script:
        if "</script" in script.lower():
            raise ValueError("inline script must not contain '</script'")
        tail = f"<script>\n{script}\n</script>\n"
    return (f'<!DOCTYPE html>\n<html lang="{escape(lang)}">\n<head>\n<meta charset="utf-8">\n'
            f'<meta name="viewport" content="width=device-width, initial-scale=1">\n'
            f"<title>{escape(title)}</title>\n<style>{STYLE}</style>\n</head>\n<body>\n"
            f"<h1>{escape(title)}</h1>\n{body}\n{tail}</body>\n</html>\n")


def anchor_id(text: str) -> str:
    """An HTML ``id`` made from ``text``: letters, digits, ``-`` and ``_`` only (others become ``-``)."""
    out = "".join(c if (c.isascii() and c.isalnum()) or c in "-_" else "-" for c in str(text)).strip("-")
    return out or "section"


def section(title: str, body: str, *, anchor: str | None = None) -> str:
    """A titled section; ``anchor`` becomes its ``id`` (for links from a contents list)."""
    ident = f' id="{escape(anchor)}"' if anchor else ""
    return f"<section{ident}>\n<h2>{escape(title)}</h2>\n{body}\n</section>\n"


def paragraph(text: str, *, cls: str | None = None) -> str:
    """One paragraph of plain text (escaped)."""
    klass = f' class="{escape(cls)}"' if cls else ""
    return f"<p{klass}>{escape(text)}</p>\n"


def bullet_list(items: Iterable[str]) -> str:
    """An unordered list of plain-text items (escaped)."""
    return "<ul>\n" + "".join(f"<li>{escape(i)}</li>\n" for i in items) + "</ul>\n"


def link_list(items: Iterable[tuple]) -> str:
    """A nested list of links to anchors on the same page (a contents list).

    Args:
        items: ``(anchor, text)`` or ``(anchor, text, children)`` where ``children`` is again
            such a list.
    """
    out = ["<ul>"]
    for item in items:
        ident, text = item[0], item[1]
        children = item[2] if len(item) > 2 else ()
        inner = link_list(children) if children else ""
        out.append(f'<li><a href="#{escape(ident)}">{escape(text)}</a>{inner}</li>')
    out.append("</ul>\n")
    return "\n".join(out)


def details(summary: str, body: str, *, opened: bool = False) -> str:
    """A collapsible block: ``summary`` (plain text) is shown, ``body`` (HTML) opens on a click."""
    flag = " open" if opened else ""
    return f"<details{flag}><summary>{escape(summary)}</summary>\n{body}</details>\n"


def definitions(pairs: Iterable[tuple[str, object]]) -> str:
    """A two-column list of (term, value) pairs, both escaped."""
    return "<dl>\n" + "".join(f"<dt>{escape(k)}</dt><dd>{escape(v)}</dd>\n" for k, v in pairs) + "</dl>\n"


def preformatted(text: str) -> str:
    """A block of text kept as written (a protocol, a JSON document)."""
    return f"<pre>{escape(text)}</pre>\n"


def format_value(value: object, digits: int = 4) -> tuple[str, bool]:
    """A cell's text and whether it is a number (numbers print with ``digits`` significant digits)."""
    if value is None:
        return "", False
    if isinstance(value, bool):
        return ("yes" if value else "no"), False
    if isinstance(value, int):
        return str(value), True
    if isinstance(value, float):
        if math.isnan(value):
            return "", True
        return f"{value:.{digits}g}", True
    try:   # numpy scalars and pandas NA
        import numpy as np

        if isinstance(value, np.bool_):
            return ("yes" if bool(value) else "no"), False
        if isinstance(value, np.integer):
            return str(int(value)), True
        if isinstance(value, np.floating):
            return format_value(float(value), digits)
    except ImportError:  # pragma: no cover - numpy is a dependency
        pass
    text = str(value)
    return ("" if text in ("<NA>", "nan", "NaT") else text), False


def table(df: "pd.DataFrame", *, caption: str | None = None, max_rows: int | None = 200,
          digits: int = 4, blank_columns: Iterable[str] = (), cls: str = "data",
          total_rows: int | None = None, source: str | None = None, ident: str | None = None) -> str:
    """A DataFrame as an HTML table.

    Args:
        df: the table (its column names are the header; the index is not shown).
        caption: text above the table.
        max_rows: show at most this many rows and say how many were left out (None: all).
        digits: significant digits of floating-point values.
        blank_columns: extra empty columns appended to every row (space to write by hand).
        cls: the table's CSS class.
        total_rows: rows of the whole table when ``df`` holds only its first rows (for the note).
        source: the file holding the whole table, named in the note when rows are left out.
        ident: the table's HTML ``id``.

    Returns:
        The ``<table>`` element (with a note when rows were left out).
    """
    blanks = list(blank_columns)
    head = "".join(f"<th>{escape(c)}</th>" for c in list(df.columns) + blanks)
    shown = df if max_rows is None else df.head(max_rows)
    rows = []
    for values in shown.itertuples(index=False, name=None):
        cells = []
        for v in values:
            text, numeric = format_value(v, digits)
            cells.append(f'<td class="num">{escape(text)}</td>' if numeric else f"<td>{escape(text)}</td>")
        cells += ['<td class="blank"></td>'] * len(blanks)
        rows.append("<tr>" + "".join(cells) + "</tr>")
    cap = f"<caption>{escape(caption)}</caption>" if caption else ""
    id_attr = f' id="{escape(ident)}"' if ident else ""
    out = (f'<table class="{escape(cls)}"{id_attr}>{cap}\n<thead><tr>{head}</tr></thead>\n<tbody>\n'
           + "\n".join(rows) + "\n</tbody>\n</table>\n")
    total = max(len(df), total_rows or 0)
    if total > len(shown):
        where = source or "the CSV file"
        out += paragraph(f"{total - len(shown)} more rows not shown; the full table is in {where}.",
                         cls="note")
    return out


def image_data_uri(path: str | os.PathLike) -> str:
    """A PNG (or SVG) file as a ``data:`` URI, so the page needs no file beside it."""
    path = Path(path)
    kind = "image/svg+xml" if path.suffix.lower() == ".svg" else "image/png"
    return f"data:{kind};base64," + base64.b64encode(path.read_bytes()).decode("ascii")


def figure(path: str | os.PathLike, caption: str, *, alt: str | None = None) -> str:
    """An embedded figure with its caption."""
    return (f'<figure><img src="{image_data_uri(path)}" alt="{escape(alt or caption)}">'
            f"<figcaption>{escape(caption)}</figcaption></figure>\n")
