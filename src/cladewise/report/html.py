"""Building blocks of a self-contained HTML page.

Every string that may come from a user's file goes through :func:`esc`. The page
carries its own CSS and one small inline script (it records on ``<body>`` how many
images loaded, for automated checks); nothing is fetched from the network.
"""

from __future__ import annotations

import base64
import html
import math
from typing import Any, Iterable, Sequence

import pandas as pd

from cladewise.report.style import SavedFigure

__all__ = ["esc", "table_html", "figure_html", "page", "MARKER", "fmt"]

#: First line of every page written by cladewise: such a file may be regenerated.
MARKER = "<!-- written by cladewise report; regenerated on each run -->"

_CSS = """
:root { --ink:#1a1a1a; --muted:#555; --line:#d0d0d0; --bad:#8a1c00; --badbg:#fde8e1;
        --good:#00573f; --goodbg:#e3f4ee; --note:#fff7d6; }
* { box-sizing: border-box; }
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, "DejaVu Sans", sans-serif;
       color: var(--ink); max-width: 1080px; margin: 0 auto; padding: 1.2rem 1.4rem 4rem;
       line-height: 1.45; font-size: 15px; background: #fff; }
h1 { font-size: 1.6rem; margin-bottom: .2rem; }
h2 { font-size: 1.25rem; border-bottom: 2px solid var(--ink); padding-bottom: .15rem; margin-top: 2.2rem; }
h3 { font-size: 1.05rem; margin-bottom: .3rem; }
.sub { color: var(--muted); margin-top: 0; }
nav { background: #f4f4f4; padding: .5rem .8rem; border-radius: 4px; font-size: .92rem; }
nav a { margin-right: .9rem; color: #0b4f8a; }
table { border-collapse: collapse; margin: .6rem 0 1rem; font-size: .9rem; }
th, td { border-bottom: 1px solid var(--line); padding: .25rem .6rem; text-align: left; vertical-align: top; }
th { background: #f4f4f4; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
.banner { padding: .7rem 1rem; border-radius: 4px; margin: .8rem 0; border-left: 6px solid; }
.banner.bad { background: var(--badbg); border-color: var(--bad); color: var(--bad); }
.banner.good { background: var(--goodbg); border-color: var(--good); color: var(--good); }
.banner.note { background: var(--note); border-color: #8a6d00; color: #4a3b00; }
.formula { font-family: "DejaVu Sans Mono", Menlo, Consolas, monospace; background: #f7f7f7;
           padding: .5rem .8rem; border-radius: 4px; white-space: pre-wrap; font-size: .92rem; }
pre { background: #f7f7f7; padding: .6rem .8rem; border-radius: 4px; overflow-x: auto; font-size: .85rem; }
figure { margin: 1.2rem 0 1.8rem; }
figure img { max-width: 100%; height: auto; border: 1px solid #eee; }
figcaption { color: var(--muted); font-size: .9rem; max-width: 60rem; }
.files { font-size: .85rem; color: var(--muted); }
.skip { color: var(--muted); font-style: italic; }
@media print { nav { display: none; } h2 { page-break-after: avoid; } figure { page-break-inside: avoid; } }
"""

_SCRIPT = """
window.addEventListener('load', function () {
  var imgs = document.images, ok = 0;
  for (var i = 0; i < imgs.length; i++) { if (imgs[i].complete && imgs[i].naturalWidth > 0) ok++; }
  document.body.setAttribute('data-images-loaded', ok + '/' + imgs.length);
});
"""


def esc(value: Any) -> str:
    """HTML-escape anything (quotes too, so it is safe inside attributes)."""
    return html.escape("" if value is None else str(value), quote=True)


def fmt(value: Any, digits: int = 3) -> str:
    """A number in a short readable form; blanks for missing values."""
    if value is None:
        return ""
    if isinstance(value, (bool,)):
        return "yes" if value else "no"
    if isinstance(value, (int,)) and not isinstance(value, bool):
        return f"{value:,}"
    try:
        v = float(value)
    except (TypeError, ValueError):
        return str(value)
    if math.isnan(v):
        return ""
    if math.isinf(v):
        return "∞" if v > 0 else "−∞"
    if v == int(v) and abs(v) < 1e6 and not isinstance(value, float):
        return f"{int(v):,}"
    return f"{v:.{digits}g}"


def table_html(df: pd.DataFrame, numeric: Sequence[str] = (), headers: dict[str, str] | None = None,
               digits: int = 3) -> str:
    """A DataFrame as an escaped HTML table."""
    headers = headers or {}
    cols = list(df.columns)
    head = "".join(f"<th>{esc(headers.get(c, c))}</th>" for c in cols)
    rows = []
    for rec in df.itertuples(index=False):
        cells = []
        for c, v in zip(cols, rec):
            if c in numeric:
                cells.append(f'<td class="num">{esc(fmt(v, digits))}</td>')
            else:
                cells.append(f"<td>{esc('' if v is None or (isinstance(v, float) and math.isnan(v)) else v)}</td>")
        rows.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(rows)}</tbody></table>"


def figure_html(fig: SavedFigure, rel_base: str = "figures") -> str:
    """An embedded PNG with its caption and the names of the saved files."""
    data = base64.b64encode(fig.png_bytes).decode("ascii")
    return (
        f'<figure id="fig-{esc(fig.name)}"><h3>{esc(fig.title)}</h3>'
        f'<img alt="{esc(fig.title)}" src="data:image/png;base64,{data}">'
        f"<figcaption>{esc(fig.caption)} <span class=\"files\">Files: {esc(rel_base)}/{esc(fig.png.name)}, "
        f"{esc(rel_base)}/{esc(fig.svg.name)}</span></figcaption></figure>"
    )


def page(title: str, subtitle: str, sections: Iterable[tuple[str, str, str]]) -> str:
    """A whole page: sections are ``(anchor, heading, body_html)``; body is trusted HTML."""
    sections = list(sections)
    nav = "".join(f'<a href="#{esc(a)}">{esc(h)}</a>' for a, h, _ in sections)
    body = "".join(f'<section id="{esc(a)}"><h2>{esc(h)}</h2>{b}</section>' for a, h, b in sections)
    return (
        f"<!DOCTYPE html>\n{MARKER}\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{esc(title)}</title><style>{_CSS}</style><script>{_SCRIPT}</script></head>"
        f"<body><h1>{esc(title)}</h1><p class=\"sub\">{esc(subtitle)}</p><nav>{nav}</nav>{body}</body></html>\n"
    )
