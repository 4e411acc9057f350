"""HTML pieces of the report: escaped text, numbers that carry their exact value, figures.

Every number taken from the manifest is written as
``<td data-key="rows_read" data-value="5000">5,000</td>``: ``data-key`` is its path in
``manifest.json`` (``/`` between keys; in a list, an item is picked by its ``name`` or its
index), ``data-value`` the exact value as JSON. Numbers from full-column aggregates carry
``data-key="aggregate/..."``. Tests (and anyone scripting the report) read them back.
"""

from __future__ import annotations

import base64
import html
import json
import math

CSS = """
:root { --ink: #1b1b1b; --muted: #5a5a5a; --rule: #d0d0d0; --band: #f4f6f8; --accent: #0072B2; }
* { box-sizing: border-box; }
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial,
       sans-serif; color: var(--ink); margin: 0; line-height: 1.45; background: #fff; }
main { max-width: 1000px; margin: 0 auto; padding: 1.2rem 1.4rem 3rem; }
h1 { font-size: 1.55rem; margin: 0.2rem 0 0.2rem; }
h2 { font-size: 1.2rem; margin: 2.2rem 0 0.6rem; padding-bottom: 0.25rem;
     border-bottom: 2px solid var(--accent); }
h3 { font-size: 1.0rem; margin: 1.3rem 0 0.4rem; }
p.lead { color: var(--muted); margin-top: 0; }
nav { font-size: 0.9rem; margin: 0.6rem 0 0.4rem; }
nav a { margin-right: 0.9rem; color: var(--accent); text-decoration: none; }
nav a:hover { text-decoration: underline; }
.cards { display: grid; grid-template-columns: repeat(auto-fill, minmax(170px, 1fr));
         gap: 0.6rem; margin: 0.8rem 0; }
.card { background: var(--band); border-radius: 6px; padding: 0.55rem 0.75rem; }
.card .label { font-size: 0.78rem; color: var(--muted); text-transform: uppercase;
               letter-spacing: 0.03em; }
.card .value { font-size: 1.35rem; font-weight: 600; font-variant-numeric: tabular-nums; }
.card .sub { font-size: 0.8rem; color: var(--muted); }
table { border-collapse: collapse; width: 100%; font-size: 0.88rem; margin: 0.3rem 0 0.8rem; }
th, td { text-align: left; padding: 0.28rem 0.5rem; border-bottom: 1px solid var(--rule);
         vertical-align: top; }
th { background: var(--band); font-weight: 600; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
td code, p code, li code { font-size: 0.85em; background: var(--band); padding: 0 0.2em;
                            border-radius: 3px; word-break: break-all; }
.two { display: grid; grid-template-columns: 1fr 1fr; gap: 1.2rem; }
@media (max-width: 760px) { .two { grid-template-columns: 1fr; } }
figure { margin: 0.6rem 0 1.2rem; }
figure img { max-width: 100%; height: auto; display: block; border: 1px solid var(--rule); }
figcaption { font-size: 0.86rem; color: var(--muted); margin-top: 0.35rem; }
.note { background: #fff7e0; border-left: 4px solid #E69F00; padding: 0.45rem 0.7rem;
        font-size: 0.9rem; }
.muted { color: var(--muted); }
pre.raw { white-space: pre-wrap; word-break: break-all; margin: 0; font-size: 0.8rem; }
footer { margin-top: 2.5rem; font-size: 0.8rem; color: var(--muted); }
@media print { nav { display: none; } h2 { break-after: avoid; } figure { break-inside: avoid; } }
"""


def esc(value) -> str:
    return html.escape(str(value), quote=True)


def fmt_number(value, digits: int = 6) -> str:
    """Readable form of a number: thousands separators, a few significant digits."""
    if value is None:
        return "—"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        if not math.isfinite(value):
            return str(value)
        if value != 0 and (abs(value) >= 1e9 or abs(value) < 1e-4):
            return f"{value:.{digits - 2}e}"
        if abs(value) >= 1e3:
            return f"{value:,.1f}" if abs(value) < 1e6 else f"{value:,.0f}"
        return f"{value:.{digits}g}"
    return str(value)


def cell(key: str, value, *, text: str | None = None, numeric: bool = True,
         tag: str = "td", attrs: dict[str, str] | None = None) -> str:
    """A table cell carrying the exact value of ``key`` (a manifest path)."""
    shown = fmt_number(value) if text is None else text
    cls = ' class="num"' if numeric else ""
    more = "".join(f' {k}="{esc(v)}"' for k, v in (attrs or {}).items())
    return (f'<{tag}{cls} data-key="{esc(key)}" data-value="{esc(json.dumps(value))}"{more}>'
            f'{esc(shown)}</{tag}>')


def card(label: str, key: str, value, sub: str = "", text: str | None = None) -> str:
    shown = fmt_number(value) if text is None else text
    sub_html = f'<div class="sub">{esc(sub)}</div>' if sub else ""
    return (f'<div class="card"><div class="label">{esc(label)}</div>'
            f'<div class="value" data-key="{esc(key)}" data-value="{esc(json.dumps(value))}">'
            f'{esc(shown)}</div>{sub_html}</div>')


def figure(figure_id: str, png: bytes, alt: str, caption_html: str) -> str:
    data = base64.b64encode(png).decode("ascii")
    width, height = png_size(png)
    return (f'<figure id="fig-{esc(figure_id)}">'
            f'<img data-figure="{esc(figure_id)}" alt="{esc(alt)}" width="{width}" '
            f'height="{height}" src="data:image/png;base64,{data}">'
            f'<figcaption>{caption_html}</figcaption></figure>')


def png_size(png: bytes) -> tuple[int, int]:
    """Width and height from the PNG header (IHDR is the first chunk)."""
    return int.from_bytes(png[16:20], "big"), int.from_bytes(png[20:24], "big")


def note(text_html: str, skipped: str | None = None) -> str:
    attr = f' data-skipped="{esc(skipped)}"' if skipped else ""
    return f'<p class="note"{attr}>{text_html}</p>'


def table(head: list[str], rows: list[list[str]], numeric_cols: tuple[int, ...] = (),
          table_id: str | None = None) -> str:
    """``rows`` hold ready HTML cells (from :func:`cell`) or plain strings (escaped here)."""
    tid = f' id="{esc(table_id)}"' if table_id else ""
    num = ' class="num"'
    ths = "".join(f"<th{num if i in numeric_cols else ''}>{esc(h)}</th>"
                  for i, h in enumerate(head))
    body = []
    for row in rows:
        tds = []
        for i, c in enumerate(row):
            if isinstance(c, str) and c.startswith("<td"):
                tds.append(c)
            else:
                cls = ' class="num"' if i in numeric_cols else ""
                tds.append(f"<td{cls}>{esc(c)}</td>")
        body.append("<tr>" + "".join(tds) + "</tr>")
    return f"<table{tid}><thead><tr>{ths}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def raw_cell(html_text: str) -> str:
    """A cell whose content is already HTML."""
    return f"<td>{html_text}</td>"


def document(title: str, body: str) -> str:
    return ("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n"
            f"<title>{esc(title)}</title>\n<style>{CSS}</style>\n</head>\n"
            f"<body>\n<main>\n{body}\n</main>\n</body>\n</html>\n")
