"""Small HTML building blocks: escaping, number formatting, tables, images, the page shell.

Pages are self-contained: one file, inline CSS, images as ``data:`` URIs (RFC 2397), no script,
no font or style sheet fetched from anywhere, so a page opens the same offline. Text is escaped
with :func:`html.escape` (quotes included), so ids and flags from data cannot inject markup.
"""

from __future__ import annotations

import html
from collections.abc import Sequence
from typing import Any, Final

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from fusion.report.drawing import png_data_uri

__all__ = ["CSS", "esc", "fmt", "img", "page", "table"]

CSS: Final = """
body { font-family: system-ui, sans-serif; margin: 1.2em 2em; color: #111; max-width: 1150px; }
h1 { font-size: 1.5em; margin-bottom: 0.2em; }
h2 { font-size: 1.25em; border-bottom: 2px solid #0072B2; padding-bottom: 0.15em;
     margin-top: 1.8em; }
h3 { font-size: 1.08em; margin-top: 1.4em; }
table { border-collapse: collapse; font-size: 0.82em; margin: 0.5em 0 1em 0; }
th, td { border: 1px solid #bbb; padding: 0.15em 0.45em; text-align: right; white-space: nowrap; }
.scroll { overflow-x: auto; max-width: 100%; }
th { background: #eef3f8; position: sticky; top: 0; }
td.t, th.t { text-align: left; }
.caution { border: 2px solid #E69F00; background: #fff8e6; padding: 0.6em 0.9em; }
.meta td { text-align: left; }
.muted { color: #555; font-size: 0.9em; }
.flag { font-family: ui-monospace, monospace; font-size: 0.95em; }
img { max-width: 100%; height: auto; display: block; margin: 0.4em 0; }
nav a { margin-right: 1em; }
"""


def esc(text: Any) -> str:
    """HTML-escape ``str(text)`` (quotes included); None and NaN give ''."""
    if text is None or (isinstance(text, float) and np.isnan(text)):
        return ""
    return html.escape(str(text), quote=True)


def fmt(values: Any, spec: str) -> NDArray[np.object_]:
    """Format numbers with a format spec such as ``'.3f'``; NaN and None give ''."""
    v = pd.to_numeric(pd.Series(values), errors="coerce").to_numpy(dtype=np.float64)
    out = np.full(v.shape[0], "", dtype=object)
    ok = np.isfinite(v)
    template = "{:" + spec + "}"
    out[ok] = [template.format(x) for x in v[ok]]
    return out


def img(png: bytes, alt: str) -> str:
    """An ``<img>`` with the PNG inline and an alt text for screen readers."""
    return f'<img src="{png_data_uri(png)}" alt="{esc(alt)}">'


def table(
    columns: Sequence[tuple[str, Any, bool]],
    *,
    row_ids: Sequence[str] | NDArray[Any] | None = None,
    caption: str = "",
) -> str:
    """An HTML table from columns of already-safe cell HTML.

    Parameters
    ----------
    columns : sequence of (header, cells, is_text)
        ``cells`` is an array of HTML strings (escape data first with :func:`esc`);
        ``is_text`` left-aligns the column.
    row_ids : sequence of str, optional
        ``id`` attribute of each row (link targets); must be HTML-safe.
    caption : str
        Plain text caption (escaped here).
    """
    if not columns:
        return ""
    n = len(columns[0][1])
    head = "".join(f'<th class="{"t" if t else "n"}">{esc(h)}</th>' for h, _, t in columns)
    body = pd.Series([""] * n, dtype=object)
    for _, cells, is_text in columns:
        cls = "t" if is_text else "n"
        body = body + f'<td class="{cls}">' + pd.Series(cells, dtype=object).astype(str) + "</td>"
    if row_ids is not None:
        starts = '<tr id="' + pd.Series(row_ids, dtype=object).astype(str) + '">'
    else:
        starts = pd.Series(["<tr>"] * n, dtype=object)
    rows = "\n".join((starts + body + "</tr>").tolist())
    cap = f"<caption>{esc(caption)}</caption>" if caption else ""
    return (
        f'<div class="scroll"><table>{cap}<thead><tr>{head}</tr></thead><tbody>\n{rows}\n'
        "</tbody></table></div>"
    )


def page(title: str, body: str) -> str:
    """A complete HTML5 document with the report's inline style."""
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en">\n<head>\n<meta charset="utf-8">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        f"<title>{esc(title)}</title>\n<style>{CSS}</style>\n</head>\n<body>\n"
        f"{body}\n</body>\n</html>\n"
    )
