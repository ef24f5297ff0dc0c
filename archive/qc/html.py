"""Building blocks of the report page: escaped HTML fragments, no templates, no scripts.

The page is self-contained: its style sheet is inlined from ``report.css`` and figures are
data URIs, so it opens anywhere without network access. Text cells of its tables that a
spreadsheet would run as a formula when the table is pasted or opened in one get a leading
apostrophe (:func:`archive.store.outfiles.spreadsheet_text`, OWASP's advice against CSV
injection); numeric columns are left as they are.
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Sequence
from datetime import datetime
from html import escape
from importlib import resources
from typing import Any

from archive.store.outfiles import spreadsheet_text

MAX_LIST = 20
"""Entries of a long list of records in the lineage shown before the rest are counted."""
MAX_VALUES = 3
"""Values of a long flat list (e.g. fix table hashes) shown; the manifest holds them all."""


def css() -> str:
    """The report's style sheet."""
    return resources.files("archive.qc").joinpath("report.css").read_text(encoding="utf-8")


def num(v: Any, fmt: str = "{:.3f}") -> str:
    """A number for a table cell; '–' for missing."""
    if v is None or (isinstance(v, float) and v != v):
        return "–"
    return fmt.format(v)


def pct(v: float | None) -> str:
    """A fraction as a percentage."""
    return "–" if v is None else f"{100 * v:.0f} %"


def table(headers: Sequence[str], rows: Iterable[Sequence[Any]], *, numeric: Sequence[int] = (),
          cls: str = "", raw: Sequence[int] = ()) -> str:
    """An HTML table; cells are escaped unless their column is in ``raw``, and text cells
    (columns not in ``numeric`` or ``raw``) kept from being run as spreadsheet formulas."""
    head = "".join(f'<th class="num">{escape(h)}</th>' if i in numeric else f"<th>{escape(h)}</th>"
                   for i, h in enumerate(headers))
    body = []
    for r in rows:
        cells = []
        for i, v in enumerate(r):
            text = "" if v is None else str(v)
            if i not in raw:
                text = escape(text if i in numeric else spreadsheet_text(text))
            cells.append(f'<td class="num">{text}</td>' if i in numeric else f"<td>{text}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    c = f' class="{cls}"' if cls else ""
    return f"<table{c}><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def figure(uri: str, caption: str, name: str, alt: str) -> str:
    """A figure with its caption; ``name`` goes into ``data-figure`` for checks."""
    return (f'<figure class="figure" data-figure="{escape(name)}" id="fig-{escape(name)}">'
            f'<img src="{uri}" alt="{escape(alt)}"><figcaption>{escape(caption)}</figcaption>'
            "</figure>")


def section(sid: str, title: str, body: str, cls: str = "") -> str:
    """A titled section with an anchor."""
    c = f' class="{cls}"' if cls else ""
    return f'<section id="{sid}"{c}><h2>{escape(title)}</h2>{body}</section>'


def _short(v: Any) -> str:
    if isinstance(v, datetime):
        return v.isoformat()
    if isinstance(v, (dict, list)):
        return json.dumps(v, ensure_ascii=False, default=str)
    return str(v)


def flatten(value: Any, prefix: str = "") -> list[tuple[str, str]]:
    """Nested manifest data as (dotted key, text) pairs; long lists shortened."""
    out: list[tuple[str, str]] = []
    if isinstance(value, dict):
        for k in sorted(value, key=str):
            out += flatten(value[k], f"{prefix}.{k}" if prefix else str(k))
    elif isinstance(value, list) and value and all(isinstance(x, (dict, list)) for x in value):
        for i, x in enumerate(value[:MAX_LIST]):
            out += flatten(x, f"{prefix}[{i}]")
        if len(value) > MAX_LIST:
            out.append((f"{prefix}[…]", f"{len(value) - MAX_LIST} more entries"))
    elif isinstance(value, list):
        shown = ", ".join(_short(x) for x in value[:MAX_VALUES])
        if len(value) > MAX_VALUES:
            shown = (f"{len(value):,} entries (all in the manifest object): {shown}, "
                     f"… and {len(value) - MAX_VALUES:,} more")
        out.append((prefix, shown))
    else:
        out.append((prefix, _short(value)))
    return out


def _has_hash(text: str) -> bool:
    return any(len(w.strip(",:")) == 64 and all(c in "0123456789abcdef" for c in w.strip(",:"))
               for w in text.split())


def kv_table(pairs: Iterable[tuple[str, str]], hash_like: bool = False) -> str:
    """A two-column key/value table; long hex values set in a monospace cell."""
    rows = []
    for k, v in pairs:
        mono = hash_like or _has_hash(v)
        v = escape(spreadsheet_text(v))
        cell = f'<td class="hash">{v}</td>' if mono else f"<td>{v}</td>"
        rows.append(f"<tr><th>{escape(spreadsheet_text(k))}</th>{cell}</tr>")
    return f'<table class="wide">{"".join(rows)}</table>'


def page(title: str, subtitle: str, nav: Sequence[tuple[str, str]], body: str,
         footer: str) -> str:
    """The whole document."""
    links = "".join(f'<a href="#{sid}">{escape(label)}</a>' for sid, label in nav)
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
        f"<title>{escape(title)}</title><style>{css()}</style></head><body>"
        f'<header class="top"><div class="inner"><h1>{escape(title)}</h1>'
        f"<p>{escape(subtitle)}</p><nav>{links}</nav></div></header>"
        f"<main>{body}<footer>{escape(footer)}</footer></main></body></html>\n"
    )
