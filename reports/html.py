"""HTML building blocks of the report: escaped text and tables, embedded figures, the page.

Every piece of text that comes from a file (site names, settings, warnings, parameter
names) goes through :func:`esc`; the only unescaped markup is the markup built here.
Figures are embedded as base64 PNG ``data:`` URIs, and the style sheet is inline, so
the page needs nothing else to display: it can be mailed or archived as one file.
"""
from __future__ import annotations

import base64
import html
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import pandas as pd

__all__ = ["esc", "Cell", "format_probability", "format_number", "format_points", "format_interval", "table", "frame_table",
           "figure", "section", "notice", "page", "STYLE"]


def esc(text: Any) -> str:
    """HTML-escaped text of any value (quotes included).

    Args:
        text: any value; None gives "".

    Returns:
        str safe to place in element content or an attribute value.
    """
    return "" if text is None else html.escape(str(text), quote=True)


@dataclass(frozen=True)
class Cell:
    """A table cell: text (escaped when rendered) and an optional CSS class.

    Attributes:
        text: the cell's text.
        cls: CSS class, e.g. "pass", "fail", "na", "num".
    """

    text: str
    cls: str | None = None


def _finite(x: Any) -> float | None:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def format_probability(p: Any) -> str:
    """A probability as a percentage readable by a non-specialist.

    Args:
        p: a fraction in [0, 1] (None or NaN for "not available").

    Returns:
        e.g. "12.3%", "0.042%", "< 0.001%", "> 99.9%", "0%", "—".
    """
    v = _finite(p)
    if v is None:
        return "—"
    if v <= 0:
        return "0%"
    if v >= 1:
        return "100%"
    if v < 1e-5:
        return "< 0.001%"
    if v > 0.999:
        return "> 99.9%"
    pct = 100 * v
    if pct >= 10:
        return f"{pct:.1f}%"
    if pct >= 1:
        return f"{pct:.1f}%"
    return f"{pct:.2g}%"


def format_number(x: Any, digits: int = 3) -> str:
    """A number with ``digits`` significant digits (integers in plain form; "—" when missing).

    Args:
        x: a number.
        digits: significant digits.

    Returns:
        str.
    """
    v = _finite(x)
    if v is None:
        return "—"
    if v == int(v) and abs(v) < 1e9:
        return f"{int(v)}"
    if v != 0 and (abs(v) < 1e-3 or abs(v) >= 1e6):
        return f"{v:.{digits - 1}e}"
    return f"{v:.{digits}g}"


def format_points(d: Any) -> str:
    """A difference of two probabilities in percentage points, signed ("≈ 0 pts" below 0.001 points).

    Args:
        d: the difference as a fraction (e.g. 0.042 for 4.2 points).

    Returns:
        e.g. "+4.2 pts", "−0.0089 pts", "≈ 0 pts", "—".
    """
    v = _finite(d)
    if v is None:
        return "—"
    pts = 100 * v
    if abs(pts) < 1e-3:
        return "≈ 0 pts"
    text = f"{abs(pts):.2g}" if abs(pts) < 10 else f"{abs(pts):.0f}"
    return ("+" if pts > 0 else "−") + text + " pts"


def format_interval(lo: Any, hi: Any, fmt: Callable[[Any], str] = format_number) -> str:
    """An interval as "lo to hi".

    Args:
        lo, hi: the ends.
        fmt: formatter of each end.

    Returns:
        str ("—" when either end is missing).
    """
    if _finite(lo) is None or _finite(hi) is None:
        return "—"
    return f"{fmt(lo)} to {fmt(hi)}"


def table(header: Sequence[str], rows: Sequence[Sequence[Any]], *, caption: str | None = None,
          cls: str = "") -> str:
    """An HTML table; every cell's text is escaped.

    Args:
        header: column titles.
        rows: rows of cells (str, numbers, or Cell for a CSS class).
        caption: optional caption.
        cls: extra CSS class of the table.

    Returns:
        HTML string.

    Raises:
        ValueError: a row's length differs from the header's.
    """
    out = [f'<table class="{esc(cls)}">' if cls else "<table>"]
    if caption:
        out.append(f"<caption>{esc(caption)}</caption>")
    out.append("<thead><tr>" + "".join(f"<th>{esc(h)}</th>" for h in header) + "</tr></thead><tbody>")
    for i, row in enumerate(rows):
        if len(row) != len(header):
            raise ValueError(f"table row {i} has {len(row)} cells, the header {len(header)}")
        cells = []
        for c in row:
            if isinstance(c, Cell):
                cells.append(f'<td class="{esc(c.cls)}">{esc(c.text)}</td>' if c.cls else f"<td>{esc(c.text)}</td>")
            elif isinstance(c, (int, float)) and not isinstance(c, bool):
                cells.append(f'<td class="num">{esc(format_number(c))}</td>')
            else:
                cells.append(f"<td>{esc(c)}</td>")
        out.append("<tr>" + "".join(cells) + "</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def frame_table(df: pd.DataFrame, columns: Mapping[str, str], *,
                formats: Mapping[str, Callable[[Any], str]] | None = None, index: str | None = None,
                caption: str | None = None) -> str:
    """An HTML table from a DataFrame: chosen columns, titles and formatters; escaped.

    Args:
        df: the data.
        columns: {column: title}, in display order.
        formats: {column: formatter}; numbers default to :func:`format_number`.
        index: title of an index column to show first (None hides the index).
        caption: optional caption.

    Returns:
        HTML string.

    Raises:
        KeyError: a column is not in ``df``.
    """
    formats = dict(formats or {})
    missing = [c for c in columns if c not in df.columns]
    if missing:
        raise KeyError(f"columns not in the table: {', '.join(missing)}")
    header = ([index] if index is not None else []) + list(columns.values())
    rows = []
    for idx, r in df.iterrows():
        row: list[Any] = [Cell(str(idx))] if index is not None else []
        for c in columns:
            v = r[c]
            f = formats.get(c)
            if f is not None:
                row.append(Cell(f(v), "num"))
            elif isinstance(v, (int, float)) and not isinstance(v, bool):
                row.append(Cell(format_number(v), "num"))
            else:
                row.append(Cell("—" if v is None or (isinstance(v, float) and math.isnan(v)) else str(v)))
        rows.append(row)
    return table(header, rows, caption=caption)


def figure(png: bytes, alt: str, caption: str = "", *, file_name: str | None = None) -> str:
    """An embedded figure: the PNG as a base64 data URI, with alt text and a caption.

    Args:
        png: the PNG bytes.
        alt: alternative text (describes the figure).
        caption: caption text.
        file_name: the copy saved beside the report (named in the caption).

    Returns:
        HTML string.
    """
    data = base64.b64encode(png).decode("ascii")
    cap = esc(caption)
    if file_name:
        cap += f' <span class="file">({esc(file_name)})</span>'
    return (f'<figure><img src="data:image/png;base64,{data}" alt="{esc(alt)}">'
            + (f"<figcaption>{cap}</figcaption>" if cap else "") + "</figure>")


def section(anchor: str, title: str, body: str) -> str:
    """A report section with an anchor for the contents list.

    Args:
        anchor: the id (letters, digits and dashes).
        title: heading text.
        body: the section's HTML (already built and escaped).

    Returns:
        HTML string.
    """
    return f'<section id="{esc(anchor)}"><h2>{esc(title)}</h2>{body}</section>'


def notice(title: str, items: Sequence[str], kind: str = "note") -> str:
    """A boxed list: "alert" (failed checks, shown loudly), "warn" or "note".

    Args:
        title: the box's heading.
        items: one line each (escaped).
        kind: "alert", "warn", "ok" or "note".

    Returns:
        HTML string ("" when there are no items and kind is not "ok").
    """
    if not items and kind != "ok":
        return ""
    role = ' role="alert"' if kind == "alert" else ""
    body = "<ul>" + "".join(f"<li>{esc(i)}</li>" for i in items) + "</ul>" if items else ""
    return f'<div class="box {esc(kind)}"{role}><p class="box-title">{esc(title)}</p>{body}</div>'


STYLE = """
:root { --ink:#222; --muted:#666; --rule:#d6d6d6; --paper:#fff; --band:#f6f4ef; --blue:#27598a;
        --bad:#9e2a1f; --badbg:#fbe9e6; --warnbg:#fdf5df; --good:#2e6b45; --goodbg:#e9f4ec; }
* { box-sizing: border-box; }
body { margin: 0; background: var(--band); color: var(--ink);
       font: 15px/1.5 "Segoe UI", "Helvetica Neue", Arial, sans-serif; }
main { max-width: 62rem; margin: 0 auto; padding: 1.5rem 1.75rem 3rem; background: var(--paper); }
header.top h1 { font-size: 1.55rem; margin: 0 0 .2rem; }
header.top p { margin: .1rem 0; color: var(--muted); }
h2 { font-size: 1.2rem; margin: 2.2rem 0 .6rem; padding-bottom: .2rem; border-bottom: 2px solid var(--ink); }
h3 { font-size: 1rem; margin: 1.4rem 0 .4rem; }
nav ol { columns: 2; margin: .4rem 0 0; padding-left: 1.4rem; }
nav a, a { color: var(--blue); }
table { border-collapse: collapse; margin: .5rem 0 1rem; font-size: .88rem; }
caption { text-align: left; color: var(--muted); padding-bottom: .25rem; }
th, td { padding: .22rem .6rem; border-bottom: 1px solid var(--rule); text-align: left; vertical-align: top; }
th { border-bottom: 1.5px solid #999; font-weight: 600; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
td.pass { color: var(--good); font-weight: 600; }
td.fail { color: var(--bad); font-weight: 700; background: var(--badbg); }
td.na { color: var(--muted); }
figure { margin: .8rem 0 1.4rem; }
figure img { max-width: 100%; height: auto; border: 1px solid var(--rule); }
figcaption { font-size: .85rem; color: var(--muted); margin-top: .3rem; }
.file { font-family: monospace; font-size: .8rem; }
.box { border-left: 6px solid var(--muted); background: #f3f3f3; padding: .6rem 1rem; margin: 1rem 0; }
.box ul { margin: .3rem 0 0; padding-left: 1.2rem; }
.box-title { margin: 0; font-weight: 700; }
.box.alert { border-color: var(--bad); background: var(--badbg); }
.box.alert .box-title { color: var(--bad); font-size: 1.1rem; text-transform: uppercase; letter-spacing: .02em; }
.box.warn { border-color: #c79a1e; background: var(--warnbg); }
.box.ok { border-color: var(--good); background: var(--goodbg); }
.headline { font-size: 1.15rem; line-height: 1.45; margin: .4rem 0 1rem; }
.caution { border: 1.5px solid var(--ink); padding: .6rem 1rem; margin: 1rem 0; }
.key { font-size: 1.02rem; }
.key li { margin: .25rem 0; }
pre.model { background: var(--band); padding: .6rem .8rem; font-size: .82rem; white-space: pre-wrap;
            border-left: 3px solid var(--rule); }
code, .mono { font-family: "SFMono-Regular", Consolas, monospace; font-size: .84rem; word-break: break-all; }
"""


def page(title: str, subtitle: Sequence[str], banner: str, contents: Sequence[tuple[str, str]],
         sections: Sequence[str]) -> str:
    """The whole self-contained page.

    Args:
        title: page title.
        subtitle: lines under the title (escaped).
        banner: HTML shown first (the failed-checks box, or the all-passed line).
        contents: (anchor, title) per section, for the contents list.
        sections: the sections' HTML.

    Returns:
        the HTML document as a string.
    """
    toc = "<nav><strong>Contents</strong><ol>" + "".join(
        f'<li><a href="#{esc(a)}">{esc(t)}</a></li>' for a, t in contents) + "</ol></nav>"
    sub = "".join(f"<p>{esc(s)}</p>" for s in subtitle)
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            f"<title>{esc(title)}</title><style>{STYLE}</style></head><body><main>"
            f'<header class="top"><h1>{esc(title)}</h1>{sub}</header>{banner}{toc}'
            + "".join(sections) + "</main></body></html>\n")
