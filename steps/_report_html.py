"""HTML of the run report: one self-contained page, every string escaped.

Plain markup, no method of its own. The page carries its style sheet
inline and its figures as base64 PNG data URIs (RFC 2397, Masinter 1998),
so it opens without a network and without the files beside it. It holds
no script. Every value that did not come from this module's own literals
(names, identifiers, notes and numbers from input files and upstream
tables) goes through :func:`esc` (``html.escape`` with quotes).

References
----------
Masinter, L. (1998). The "data" URL scheme. RFC 2397. [RFC2397]_
"""

from __future__ import annotations

import base64
import html
import math

import numpy as np
import pandas as pd

__all__ = ["esc", "fmt", "table_html", "pairs_html", "figure_html", "page_html"]

STYLE = """
body { font-family: sans-serif; margin: 0 auto; max-width: 1100px; padding: 0 1.5em 3em; color: #222; line-height: 1.4; }
h1 { font-size: 1.6em; margin-top: 1em; } h2 { border-bottom: 2px solid #ccc; margin-top: 2em; }
table { border-collapse: collapse; font-size: 0.85em; margin: 0.6em 0; }
th, td { border: 1px solid #ccc; padding: 2px 6px; text-align: right; }
th { background: #f0f0f0; } td.text, th.text { text-align: left; }
figure { margin: 1em 0; } figure img { max-width: 100%; height: auto; border: 1px solid #ddd; }
figcaption { font-size: 0.9em; color: #444; }
.caution { border: 2px solid #b00; background: #fff4f4; padding: 0.6em 1em; }
.note { color: #555; font-size: 0.9em; }
nav ul { columns: 2; font-size: 0.95em; }
.wide { overflow-x: auto; max-width: 100%; }
"""

_COORD = {"easting_m": 2, "northing_m": 2, "easting": 2, "northing": 2, "longitude": 7, "latitude": 7, "lon": 7, "lat": 7}


def esc(value) -> str:
    """``value`` as HTML text (``&``, ``<``, ``>``, quotes escaped)."""
    return html.escape("" if value is None else str(value), quote=True)


def fmt(value, column: str = "") -> str:
    """A table cell's text: numbers with sensible figures, NaN empty, everything escaped."""
    if value is None or value is pd.NA:
        return ""
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return esc(f"{int(value):,}" if abs(int(value)) >= 10_000 else int(value))
    if isinstance(value, (float, np.floating)):
        v = float(value)
        if not math.isfinite(v):
            return ""
        if column in _COORD:
            return esc(f"{v:.{_COORD[column]}f}")
        if abs(v) >= 1000:
            return esc(f"{v:,.1f}")
        if v != 0 and abs(v) < 1e-3:
            return esc(f"{v:.3e}")
        return esc(f"{v:.4g}")
    return esc(value)


def table_html(table: pd.DataFrame, columns=None, max_rows: int | None = None, caption: str = "") -> str:
    """An HTML table of ``table`` (the named columns that exist, at most ``max_rows`` rows)."""
    if table is None or not len(table):
        return f'<p class="note">{esc(caption)}: none.</p>' if caption else '<p class="note">None.</p>'
    cols = [c for c in (columns or table.columns) if c in table.columns]
    shown = table if max_rows is None else table.head(max_rows)
    text_cols = {c for c in cols if not pd.api.types.is_numeric_dtype(table[c]) or pd.api.types.is_bool_dtype(table[c])}
    head = "".join(f'<th class="text">{esc(c)}</th>' if c in text_cols else f"<th>{esc(c)}</th>" for c in cols)
    rows = []
    for rec in shown[cols].itertuples(index=False, name=None):
        cells = "".join(f'<td class="text">{fmt(v, c)}</td>' if c in text_cols else f"<td>{fmt(v, c)}</td>"
                        for c, v in zip(cols, rec))
        rows.append(f"<tr>{cells}</tr>")
    more = ""
    if max_rows is not None and len(table) > max_rows:
        more = f'<p class="note">First {max_rows} of {len(table)} rows.</p>'
    cap = f"<caption>{esc(caption)}</caption>" if caption else ""
    return (f'<div class="wide"><table>{cap}<thead><tr>{head}</tr></thead><tbody>{"".join(rows)}</tbody></table></div>'
            f"{more}")


def pairs_html(pairs) -> str:
    """A two-column table of (label, value) pairs."""
    rows = "".join(f'<tr><th class="text">{esc(k)}</th><td class="text">{fmt(v, str(k))}</td></tr>' for k, v in pairs)
    return f"<table><tbody>{rows}</tbody></table>"


def figure_html(png: bytes, alt: str, caption: str, name: str) -> str:
    """An ``<img>`` with the PNG embedded as a data URI, and its caption."""
    data = base64.b64encode(png).decode("ascii")
    return (f'<figure id="fig-{esc(name)}"><img src="data:image/png;base64,{data}" alt="{esc(alt)}" '
            f'data-file="{esc(name)}"><figcaption>{esc(caption)}</figcaption></figure>')


def page_html(title: str, subtitle: str, sections: list[tuple[str, str, str]]) -> str:
    """The whole page: title, contents, then each (anchor, heading, body html) section.

    ``title``, ``subtitle`` and headings are escaped here; bodies are HTML
    made by this module's functions.
    """
    nav = "".join(f'<li><a href="#{esc(a)}">{esc(h)}</a></li>' for a, h, _ in sections)
    body = "".join(f'<section id="{esc(a)}"><h2>{esc(h)}</h2>{b}</section>' for a, h, b in sections)
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>{esc(title)}</title><style>{STYLE}</style></head><body>"
            f"<h1>{esc(title)}</h1><p class=\"note\">{esc(subtitle)}</p><nav><ul>{nav}</ul></nav>{body}"
            "</body></html>\n")
