"""The pass report: ``report.json`` and a self-contained ``report.html``."""

from __future__ import annotations

import base64
import html
import json
import math
import os
import re
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.errors import OutputError
from pipeline.report._build import CAUTION
from pipeline.report._plots import Figure, PlotData, render_plots

__all__ = [
    "KNOWN_SECTIONS",
    "MAX_TABLE_ROWS",
    "jsonable",
    "render_html",
    "write_report",
]

#: Sections placed first, in this order; any other top-level section follows in the dict's order.
KNOWN_SECTIONS = ("summary", "recording", "profile", "demod", "sync", "frames", "virtual_channels",
                  "packets", "apids", "gaps", "events")

#: Rows shown of a list section; the rest is counted in a note (report.json keeps them all).
MAX_TABLE_ROWS = 200


_MAX_CELL_CHARS = 300
_MAX_DEPTH = 4

_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", sans-serif; margin: 1.5rem auto; max-width: 70rem;
       padding: 0 1rem; color: #1d1d1d; background: #fff; line-height: 1.4; }
h1 { font-size: 1.5rem; margin-bottom: 0.2rem; }
h2 { font-size: 1.2rem; border-bottom: 1px solid #ccc; margin-top: 2rem; padding-bottom: 0.2rem; }
h3 { font-size: 1rem; margin-top: 1.2rem; }
p.caution { background: #fff4d6; border-left: 4px solid #c98a00; padding: 0.5rem 0.8rem; }
p.note { color: #666; font-style: italic; }
nav ul { list-style: none; padding: 0; display: flex; flex-wrap: wrap; gap: 0.3rem 1rem; }
table { border-collapse: collapse; margin: 0.5rem 0; font-size: 0.9rem; }
th, td { border: 1px solid #ddd; padding: 0.2rem 0.5rem; text-align: left; vertical-align: top; }
th { background: #f3f3f3; }
table.kv th { width: 16rem; font-weight: normal; color: #444; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
.scroll { overflow-x: auto; }
figure { margin: 1rem 0; }
figure img { max-width: 100%; height: auto; border: 1px solid #eee; }
figcaption { font-size: 0.9rem; color: #444; }
footer { margin-top: 2rem; font-size: 0.8rem; color: #777; }
"""


# ---- JSON ---------------------------------------------------------------------------------------


def jsonable(value: Any, _depth: int = 0) -> Any:
    """A strict-JSON copy of ``value``: numpy scalars and arrays become Python numbers and lists,
    NaN and +-Inf become None, tuples and sets lists, keys strings, bytes hex, anything else its str().
    """
    if _depth > 64:
        return str(value)
    if value is None or isinstance(value, (bool, str)):
        return value
    if isinstance(value, np.bool_):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        v = float(value)
        return v if math.isfinite(v) else None
    if isinstance(value, (complex, np.complexfloating)):
        return [jsonable(value.real), jsonable(value.imag)]
    if isinstance(value, dict):
        return {str(k): jsonable(v, _depth + 1) for k, v in value.items()}
    if isinstance(value, np.ndarray):
        return [jsonable(v, _depth + 1) for v in value.tolist()]
    if isinstance(value, (list, tuple)):
        return [jsonable(v, _depth + 1) for v in value]
    if isinstance(value, (set, frozenset)):
        return [jsonable(v, _depth + 1) for v in sorted(value, key=repr)]
    if isinstance(value, (bytes, bytearray, memoryview)):
        return bytes(value).hex()
    if hasattr(value, "as_dict") and callable(value.as_dict):
        try:
            return jsonable(value.as_dict(), _depth + 1)
        except Exception:  # noqa: BLE001 - fall back to the text form
            pass
    return str(value)


# ---- HTML pieces --------------------------------------------------------------------------------


def _esc(text: Any) -> str:
    return html.escape(str(text), quote=True)


def _is_scalar(v: Any) -> bool:
    return v is None or isinstance(v, (bool, int, float, str))


def _fmt_scalar(v: Any) -> tuple[str, bool]:
    """(escaped text, is numeric) of a JSON scalar."""
    if v is None:
        return "&#8212;", False
    if isinstance(v, bool):
        return ("yes" if v else "no"), False
    if isinstance(v, int):
        return _esc(v), True
    if isinstance(v, float):
        if v.is_integer() and abs(v) < 1e15:
            return _esc(f"{v:.1f}"), True
        return _esc(f"{v:.6g}"), True
    text = str(v)
    if len(text) > _MAX_CELL_CHARS:
        text = text[:_MAX_CELL_CHARS] + " ..."
    return _esc(text), False


def _cell(v: Any) -> str:
    if _is_scalar(v):
        text, num = _fmt_scalar(v)
        return f'<td class="num">{text}</td>' if num else f"<td>{text}</td>"
    text = json.dumps(v, separators=(", ", ": "))
    if len(text) > _MAX_CELL_CHARS:
        text = text[:_MAX_CELL_CHARS] + " ..."
    return f"<td><code>{_esc(text)}</code></td>"


def _label(key: str) -> str:
    return _esc(str(key).replace("_", " "))


def _kv_table(items: list[tuple[str, Any]]) -> str:
    rows = "".join(f"<tr><th>{_label(k)}</th>{_cell(v)}</tr>" for k, v in items)
    return f'<table class="kv"><tbody>{rows}</tbody></table>'


def _list_table(rows: list[Any]) -> str:
    shown = rows[:MAX_TABLE_ROWS]
    cols: list[str] = []
    seen: set[str] = set()
    for r in shown:
        if isinstance(r, dict):
            for k in r:
                if k not in seen:
                    seen.add(k)
                    cols.append(k)
    parts = ['<div class="scroll"><table class="rows"><thead><tr>']
    if not cols:
        cols_html = "<th>value</th>"
    else:
        cols_html = "".join(f"<th>{_label(c)}</th>" for c in cols)
    parts.append(cols_html + "</tr></thead><tbody>")
    for r in shown:
        if isinstance(r, dict) and cols:
            parts.append("<tr>" + "".join(_cell(r.get(c)) if c in r else "<td></td>" for c in cols) + "</tr>")
        else:
            span = f' colspan="{len(cols)}"' if len(cols) > 1 else ""
            cell = _cell(r)
            parts.append("<tr>" + (cell.replace("<td", f"<td{span}", 1) if span else cell) + "</tr>")
    parts.append("</tbody></table></div>")
    if len(rows) > len(shown):
        left = len(rows) - len(shown)
        parts.append(f'<p class="note">{left} more row{"s" if left != 1 else ""} not shown '
                     f"({len(rows)} in all; report.json has every row).</p>")
    return "".join(parts)


def _render_value(value: Any, depth: int) -> str:
    """HTML for one section value: key/value table, row table, list or paragraph."""
    if isinstance(value, dict):
        if not value:
            return '<p class="note">(empty)</p>'
        scalars = [(k, v) for k, v in value.items() if _is_scalar(v) or depth >= _MAX_DEPTH]
        nested = [(k, v) for k, v in value.items() if not (_is_scalar(v) or depth >= _MAX_DEPTH)]
        parts = [_kv_table(scalars)] if scalars else []
        tag = "h3" if depth == 0 else "h4"
        for k, v in nested:
            parts.append(f"<{tag}>{_label(k)}</{tag}>")
            parts.append(_render_value(v, depth + 1))
        return "".join(parts)
    if isinstance(value, list):
        if not value:
            return '<p class="note">(none)</p>'
        if all(_is_scalar(v) for v in value) and len(value) <= 20 and sum(len(str(v)) for v in value) < 400:
            return "<p>" + ", ".join(_fmt_scalar(v)[0] for v in value) + "</p>"
        return _list_table(value)
    text, _ = _fmt_scalar(value)
    return f"<p>{text}</p>"


def _anchor(key: str, used: set[str]) -> str:
    base = "s-" + (re.sub(r"[^A-Za-z0-9_-]+", "-", str(key)).strip("-") or "section")
    name, i = base, 2
    while name in used:
        name, i = f"{base}-{i}", i + 1
    used.add(name)
    return name


def _figure_html(fig: Figure) -> str:
    if fig.png is None:
        return f'<h3>{_esc(fig.title)}</h3><p class="note">{_esc(fig.note)}</p>'
    b64 = base64.b64encode(fig.png).decode("ascii")
    return (f'<figure id="plot-{_esc(fig.key)}"><img src="data:image/png;base64,{b64}" '
            f'alt="{_esc(fig.title)}"><figcaption>{_esc(fig.title)}</figcaption></figure>')


def _ordered_sections(report: dict) -> list[tuple[str, Any]]:
    first = [(k, report[k]) for k in KNOWN_SECTIONS if k in report]
    rest = [(k, v) for k, v in report.items() if k not in KNOWN_SECTIONS]
    return first + rest


def render_html(report: dict, plots: PlotData | None = None) -> str:
    """The pass report as one self-contained HTML document.

    Parameters
    ----------
    report : dict
        Top-level sections.  The known ones (:data:`KNOWN_SECTIONS`) come first, in that order,
        then the others in the dict's order.  A dict section becomes a key/value table (nested
        dicts and lists become sub-sections), a list of dicts a table whose columns are the union
        of the keys (at most :data:`MAX_TABLE_ROWS` rows, with a note of how many were left
        out), a short list of scalars one line, a scalar a paragraph.
    plots : PlotData, optional
        The plot data; each missing plot is replaced by a note.

    Returns
    -------
    str
        HTML5 with inline CSS and the plots as base64 PNG data URIs: no script, no external file
        or network access.  Every string taken from ``report`` is HTML-escaped.

    Notes
    -----
    The report is first made strict JSON (:func:`jsonable`), so numpy values and NaN render the
    same way as they are written to ``report.json``.  Cost: linear in the report size plus one
    matplotlib figure per plot.
    """
    if not isinstance(report, dict):
        raise TypeError(f"Argument 'report' must be a dict, not {type(report).__name__}.")
    if plots is not None and not isinstance(plots, PlotData):
        raise TypeError(f"Argument 'plots' must be a PlotData or None, not {type(plots).__name__}.")
    data = jsonable(report)
    sections = _ordered_sections(data)
    summary = data.get("summary") if isinstance(data.get("summary"), dict) else {}
    title = "Pass report"
    for key in ("title", "pass", "recording", "profile"):
        if isinstance(summary.get(key), str) and summary[key]:
            title = f"Pass report: {summary[key]}"
            break
    used: set[str] = set()
    anchors = [(k, _anchor(k, used)) for k, _ in sections]
    plots_anchor = _anchor("plots", used)
    figures = render_plots(plots)

    nav_items = []
    body = []
    for i, ((key, value), (_, anchor)) in enumerate(zip(sections, anchors)):
        nav_items.append(f'<li><a href="#{anchor}">{_label(key)}</a></li>')
        body.append(f'<section id="{anchor}"><h2>{_label(key)}</h2>{_render_value(value, 0)}</section>')
        if i == 0 and key == "summary":
            nav_items.append(f'<li><a href="#{plots_anchor}">plots</a></li>')
            body.append(_plots_section(figures, plots_anchor))
    if not (sections and sections[0][0] == "summary"):
        nav_items.insert(0, f'<li><a href="#{plots_anchor}">plots</a></li>')
        body.insert(0, _plots_section(figures, plots_anchor))
    tool = summary.get("tool") if isinstance(summary.get("tool"), str) else "downlink"
    return "".join([
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">",
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_esc(title)}</title><style>{_CSS}</style></head><body>",
        f"<header><h1>{_esc(title)}</h1>",
        f'<p class="caution">Caution: {_esc(CAUTION)}</p>',
        f"<nav><ul>{''.join(nav_items)}</ul></nav></header><main>",
        "".join(body),
        f"</main><footer>Written by {_esc(tool)}. Every number shown here is also in report.json.</footer>",
        "</body></html>\n",
    ])


def _plots_section(figures: list[Figure], anchor: str) -> str:
    return f'<section id="{anchor}"><h2>plots</h2>' + "".join(_figure_html(f) for f in figures) + "</section>"


def _write_atomic(path: Path, text: str) -> None:
    tmp = path.with_name(path.name + ".part")
    try:
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, path)
    except OSError as exc:
        raise OutputError(f"{path}: cannot write ({exc.strerror})") from None


def write_report(out_dir: str | os.PathLike, report: dict, plots: PlotData | None = None) -> None:
    """Write ``report.json`` (strict JSON, :func:`jsonable`) and ``report.html`` (:func:`render_html`).

    The folder is created if needed; each file is written under a temporary name and renamed.

    Raises
    ------
    OutputError
        The folder or a file cannot be written.
    """
    if not isinstance(report, dict):
        raise TypeError(f"Argument 'report' must be a dict, not {type(report).__name__}.")
    out = Path(os.fspath(out_dir))
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"{out}: cannot create the report folder ({exc.strerror})") from None
    text = json.dumps(jsonable(report), indent=2, allow_nan=False, ensure_ascii=False)
    _write_atomic(out / "report.json", text + "\n")
    _write_atomic(out / "report.html", render_html(report, plots))
