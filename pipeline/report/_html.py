"""The pass report: ``report.json`` and a self-contained ``report.html``."""

from __future__ import annotations

import base64
import html
import json
import math
import os
import re
from collections.abc import Iterable
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

#: Sections the page places itself, in page order (verdict, gap tables, CLCW, recording and link); every
#: other section is listed under "Internal counters", folded, in the dict's order.
KNOWN_SECTIONS = ("pass", "bit_error_rate", "virtual_channels", "gaps", "apids", "clcw", "recording", "profile")

#: Rows shown of a list section; the rest is counted in a note (report.json keeps them all).
MAX_TABLE_ROWS = 200


_MAX_CELL_CHARS = 300
_MAX_DEPTH = 4

_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", sans-serif; margin: 1.5rem auto; max-width: 72rem;
       padding: 0 1rem; color: #1d1d1d; background: #fff; line-height: 1.4; }
h1 { font-size: 1.5rem; margin-bottom: 0.2rem; }
h2 { font-size: 1.2rem; border-bottom: 1px solid #ccc; margin-top: 2rem; padding-bottom: 0.2rem; }
h3 { font-size: 1rem; margin-top: 1.2rem; }
p.sub { color: #555; margin-top: 0; }
p.caution { background: #fff4d6; border-left: 4px solid #c98a00; padding: 0.5rem 0.8rem; }
p.note { color: #666; font-style: italic; }
nav ul { list-style: none; padding: 0; display: flex; flex-wrap: wrap; gap: 0.3rem 1rem; }
section.verdict { border: 1px solid #cfd8dc; border-left: 6px solid #2e7d32; border-radius: 4px;
                  padding: 0.6rem 1rem 0.8rem; margin-top: 1rem; background: #f7faf7; }
section.verdict.warn { border-left-color: #ef6c00; background: #fffaf3; }
section.verdict.bad { border-left-color: #c62828; background: #fdf5f5; }
section.verdict h2 { border: none; margin: 0.2rem 0 0.3rem; }
p.headline { font-size: 1.15rem; font-weight: 600; margin: 0.2rem 0 0.8rem; }
dl.cards { display: grid; grid-template-columns: repeat(auto-fill, minmax(16rem, 1fr)); gap: 0.6rem;
           margin: 0; }
dl.cards div.wide { grid-column: span 2; }
dl.cards div { background: #fff; border: 1px solid #e0e0e0; border-radius: 4px; padding: 0.4rem 0.6rem; }
dl.cards dt { font-size: 0.8rem; color: #555; }
dl.cards dd { margin: 0.1rem 0 0; font-size: 1.05rem; font-variant-numeric: tabular-nums; }
dl.cards dd small { display: block; font-size: 0.8rem; color: #555; }
.flag { color: #c62828; font-weight: 600; }
p.time { font-size: 0.85rem; color: #444; margin: 0.8rem 0 0; }
table { border-collapse: collapse; margin: 0.5rem 0; font-size: 0.9rem; }
th, td { border: 1px solid #ddd; padding: 0.2rem 0.5rem; text-align: left; vertical-align: top; }
th { background: #f3f3f3; }
table.kv th { width: 16rem; font-weight: normal; color: #444; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
.scroll { overflow-x: auto; }
figure { margin: 1rem 0; }
figure img { max-width: 100%; height: auto; border: 1px solid #eee; }
figcaption { font-size: 0.9rem; color: #444; }
ul.panels { font-size: 0.9rem; color: #333; margin-top: 0.2rem; padding-left: 1.2rem; }
p.method { font-size: 0.9rem; color: #333; max-width: 62rem; }
details { margin-top: 1rem; border: 1px solid #e0e0e0; border-radius: 4px; padding: 0.3rem 0.8rem; }
details > summary { cursor: pointer; font-weight: 600; padding: 0.2rem 0; }
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


def _kv_table(items: Iterable[tuple[str, Any]]) -> str:
    """A key/value table: one row per (heading, value), the heading already HTML."""
    rows = "".join(f"<tr><th>{heading}</th>{_cell(v)}</tr>" for heading, v in items)
    return f'<table class="kv"><tbody>{rows}</tbody></table>'


def _row_table(headings: list[str], rows: list[str], total: int) -> str:
    """A scrolling table of rows: ``headings`` (HTML) over ``rows`` (each the HTML of its cells), and a note
    when ``total`` rows were more than those shown."""
    head = "".join(f"<th>{h}</th>" for h in headings)
    body = "".join(f"<tr>{r}</tr>" for r in rows)
    table = f'<div class="scroll"><table class="rows"><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table></div>'
    left = total - len(rows)
    if left <= 0:
        return table
    return (f'{table}<p class="note">{left} more row{"s" if left != 1 else ""} not shown '
            f"({total} in all; report.json has every row).</p>")


def _list_table(rows: list[Any]) -> str:
    """Every key of a list's dicts as a column (a row that is no dict spans them all)."""
    shown = rows[:MAX_TABLE_ROWS]
    cols: list[str] = []
    seen: set[str] = set()
    for r in shown:
        if isinstance(r, dict):
            for k in r:
                if k not in seen:
                    seen.add(k)
                    cols.append(k)
    cells = []
    for r in shown:
        if isinstance(r, dict) and cols:
            cells.append("".join(_cell(r.get(c)) if c in r else "<td></td>" for c in cols))
        else:
            span = f' colspan="{len(cols)}"' if len(cols) > 1 else ""
            cell = _cell(r)
            cells.append(cell.replace("<td", f"<td{span}", 1) if span else cell)
    return _row_table([_label(c) for c in cols] or ["value"], cells, len(rows))


def _render_value(value: Any, depth: int) -> str:
    """HTML for one section value: key/value table, row table, list or paragraph."""
    if isinstance(value, dict):
        if not value:
            return '<p class="note">(empty)</p>'
        scalars = [(k, v) for k, v in value.items() if _is_scalar(v) or depth >= _MAX_DEPTH]
        nested = [(k, v) for k, v in value.items() if not (_is_scalar(v) or depth >= _MAX_DEPTH)]
        parts = [_kv_table((_label(k), v) for k, v in scalars)] if scalars else []
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


# ---- the verdict --------------------------------------------------------------------------------


def _num(v: Any, fmt: str, unit: str = "") -> str:
    if not isinstance(v, (int, float)) or isinstance(v, bool):
        return "&#8212;"
    return _esc(format(v, fmt) + (f" {unit}" if unit else ""))


def _utc_parts(iso: Any) -> tuple[str, str] | None:
    """``YYYY-MM-DDTHH:MM:SS.fffffffffZ`` -> (date, time to the millisecond); None if not such a string."""
    if not isinstance(iso, str) or len(iso) < 19 or iso[10] != "T":
        return None
    return iso[:10], iso[11:23].rstrip("Z")


def _window_card(v: dict) -> tuple[str, str]:
    first, last = _utc_parts(v.get("first_lock_utc")), _utc_parts(v.get("last_lock_utc"))
    res = v.get("lock_resolution_s")
    res_txt = f"; lock times to within {_num(res, '.3g', 's')}" if isinstance(res, (int, float)) else ""
    locked = f"locked {_num(v.get('locked_s'), '.2f', 's')}"
    losses = v.get("lock_losses")
    if isinstance(losses, int) and losses > 0:
        # a lock lost and found again inside the window: the window is not all locked time
        locked += (f" of {_num(v.get('lock_span_s'), '.2f', 's')}, lock lost {losses} "
                   f"time{'s' if losses > 1 else ''}")
    if first and last:
        day = first[0] if first[0] == last[0] else f"{first[0]} to {last[0]}"
        return f"{_esc(first[1])} &#8594; {_esc(last[1])} UTC", f"{_esc(day)}; {locked}{res_txt}"
    if v.get("first_lock_s") is not None:
        return (f"{_num(v.get('first_lock_s'), '.3f')} &#8594; {_num(v.get('last_lock_s'), '.3f', 's')}",
                f"seconds from the start of the recording (UTC unknown); {locked}{res_txt}")
    return "no lock", "the receiver never held carrier and symbol lock"


def _count(n: Any, flag_if_positive: bool = True) -> str:
    text = _num(n, "d")
    return f'<span class="flag">{text}</span>' if flag_if_positive and isinstance(n, int) and n > 0 else text


def _ber_card(v: dict, ber: dict) -> tuple[str, str]:
    where = ("at the Reed-Solomon decoder's input" if ber.get("method") == "reed_solomon"
             else "from ASM bit errors" if ber.get("method") == "asm" else "")
    est, errors = v.get("bit_error_rate"), ber.get("errors")
    if est is None:
        return "&#8212;", "no frames to count"
    if errors == 0:
        return "no error seen", f"below {_num(ber.get('upper'), '.2g')} (95 %), {_esc(where)}"
    prefix = "at least " if ber.get("lower_bound") else ""
    return f"{prefix}{_num(est, '.2g')}", f"{_esc(where)}; see below the timeline"


def _sentence(text: Any) -> str:
    """``ERT: <definition>.`` from the definition string ("" when there is none)."""
    if not isinstance(text, str) or not text:
        return ""
    return f"ERT (Earth-received time): {text}{'' if text.endswith('.') else '.'}"


#: The verdict's notes (``pass`` keys) and their labels on the page, in the page's order.
_VERDICT_NOTES = (("doppler_note", "Doppler check"), ("tones_note", "Interference"), ("iq_note", "I/Q balance"),
                  ("symbol_rate_note", "Symbol rate"), ("jumps_note", "Jumps"), ("clipping_note", "Clipping"))


def _verdict_html(v: dict, ber: dict | None, anchor: str) -> str:
    ok, failed, missing = v.get("frames_ok"), v.get("frames_failed"), v.get("frames_missing")
    packets, pk_missing = v.get("packets"), v.get("packets_missing")
    nolock = v.get("lock_source") is None
    if nolock and not ok:
        cls, headline = "bad", "No lock: the receiver found no signal it could hold, and nothing was decoded."
    else:
        trouble = any(isinstance(x, int) and x > 0 for x in (failed, missing, pk_missing))
        cls = "bad" if not ok else "warn" if trouble else ""
        headline = (f"{_num(packets, 'd')} packets delivered; {_num(ok, 'd')} frames good, "
                    f"{_num(failed, 'd')} failed, {_num(missing, 'd')} missing.")
    window, window_sub = _window_card(v)
    fly = v.get("frames_failed_flywheel")
    fly_txt = f"; {_num(fly, 'd')} of the failed were flywheel frames (no marker found)" if fly else ""
    ber_main, ber_sub = _ber_card(v, ber or {})
    cmin, cmax = v.get("carrier_offset_hz_min"), v.get("carrier_offset_hz_max")
    span = cmax - cmin if isinstance(cmin, (int, float)) and isinstance(cmax, (int, float)) else None
    esn0 = (f"mean {_num(v.get('esn0_db_mean'), '.1f', 'dB')}",
            f"worst {_num(v.get('esn0_db_min'), '.1f', 'dB')}, best {_num(v.get('esn0_db_max'), '.1f', 'dB')}")
    carrier = (f"{_num(cmin, '.1f')} &#8230; {_num(cmax, '.1f', 'Hz')}", f"range {_num(span, '.1f', 'Hz')}")
    if v.get("esn0_db_mean") is None:
        why = ("not measured: channel-symbol input has no receiver" if v.get("lock_source") == "frame synchronizer"
               else "not measured: the receiver was never locked over a whole block")
        esn0 = carrier = ("&#8212;", why)
    cards = [
        ("Pass window (first to last lock)", window, window_sub),
        ("Packets delivered", _num(packets, "d"), f"{_count(pk_missing)} missing by sequence count"),
        ("Frames good / failed / missing", f"{_num(ok, 'd')} / {_count(failed)} / {_count(missing)}",
         f"missing by frame count; {_num(v.get('frames_idle'), 'd')} idle frames{fly_txt}"),
        ("Es/N0 while locked", *esn0),
        ("Carrier offset while locked", *carrier),
        ("Bit error rate (estimated)", ber_main, ber_sub),
    ]
    if "carrier_cn0_dbhz_mean" in v:  # residual carrier only
        cn0_mean, cn0_min = v.get("carrier_cn0_dbhz_mean"), v.get("carrier_cn0_dbhz_min")
        cards.append(("Residual carrier Pc/N0 while locked", f"mean {_num(cn0_mean, '.1f', 'dB-Hz')}",
                      f"worst {_num(cn0_min, '.1f', 'dB-Hz')}" if cn0_mean is not None else "not measured"))
    body = "".join(f'<div class="{"wide" if i == 0 else "card"}"><dt>{_esc(t)}</dt><dd>{main}<small>{sub}</small>'
                   "</dd></div>" for i, (t, main, sub) in enumerate(cards))
    known = v.get("time_known")
    time_txt = ("Time is known: ERT and the times above are UTC. " if known else
                "Time is unknown: the recording carries no start time, so no ERT is given and times are seconds "
                "from its start. ")
    # the verdict's notes, each a line under its label when the run has it; a Doppler note or clipping makes the
    # verdict a warning
    if cls == "" and v.get("doppler_note"):
        cls = "warn"
    if v.get("clipping_note"):
        cls = cls or "warn"
    note_html = "".join(f'<p class="time"><strong>{label}:</strong> {_esc(v[key])}.</p>'
                        for key, label in _VERDICT_NOTES if v.get(key))
    return (f'<section id="{anchor}" class="verdict {cls}"><h2>Verdict</h2>'
            f'<p class="headline">{headline}</p><dl class="cards">{body}</dl>'
            f'<p class="time">{_esc(time_txt)}{_esc(_sentence(v.get("ert_definition")))}</p>{note_html}</section>')


# ---- figures and tables -------------------------------------------------------------------------

_PANEL_TEXT = {
    "waterfall": "Waterfall: received power over frequency (vertical) and time; bright is strong. A signal "
                 "drifting with Doppler shows as a slanted band.",
    "Es/N0": "Es/N0: energy per modulation symbol over noise density, measured by the receiver on each "
             "processing block, drawn only while carrier and symbols were locked (grey background: no lock).",
    "carrier offset": "Carrier offset: the received carrier's frequency minus the recording's centre "
                      "frequency (Doppler plus oscillator offsets), while locked.",
    "Doppler residual": "Doppler residual: the measured carrier frequency minus the one predicted from the orbit "
                        "given with --tle or --oem (light time included), while locked. Flat means the orbit and "
                        "the measurement agree; its level is the spacecraft oscillator's offset.",
    "decoder iterations": "Iterations lane: how many iterations the LDPC or turbo decoder used on each frame, on "
                          "the scale given at the left (its limit); a frame at the limit was hard to decode.",
    "frame status": "Frame quality, top lane: each frame where it was received; green good, grey idle, red "
                    "failed a check (Reed-Solomon, FECF or header), purple another spacecraft, orange missing by the "
                    "frame count.",
    "RS corrections": "Middle lane: Reed-Solomon symbols corrected in each codeblock, on the scale given at the "
                      "left (at most E x interleave can be); red crosses: a codeword could not be corrected.",
    "ASM errors": "Bottom lane: wrong bits in each frame's 32-bit attached sync marker (ASM); hollow red: "
                  "flywheel frames, placed where the marker was expected without finding it.",
    "spectrum": "Spectrum of the recording's first samples (Welch average).",
    "constellation": "Constellation: the receiver's symbols at the end of the last locked stretch.",
    "CLCW flags": "Lower lanes: the flags of the spacecraft's telecommand receiver, from each good frame's "
                  "OCF: lockout, wait, retransmit, no RF available, no bit lock (red: set).",
    "CLCW report value": "Top lane: the report value N(R), the sequence number of the next telecommand frame the "
                         "spacecraft expects, on the range given at the left.",
}


def _ber_text(ber: dict | None) -> str:
    if not isinstance(ber, dict):
        return "Bit error rate: not estimated (no frames)."
    return (f"Bit error rate of {ber.get('applies_to', '')}, estimated for runs of consecutive frames received "
            "while the receiver held lock (how: below the figure). Dots: the estimate, with a bar up to the burst "
            "limit; triangles down: no error was seen, the rate lies below the mark (95 % confidence); red "
            "triangles up: a codeblock failed, the rate is at least this.")


def _ber_method_html(ber: dict | None) -> str:
    if not isinstance(ber, dict):
        return ""
    what = "octets corrected" if ber.get("method") == "reed_solomon" else "ASM bits wrong"
    return (f'<p class="method"><b>How the bit error rate is estimated.</b> {_esc(ber.get("estimator", ""))}. '
            f"Counted: {_esc(ber.get('frames_counted', ''))}: {_esc(ber.get('errors'))} {what} in "
            f"{_esc(ber.get('bits'))} bits of {_esc(ber.get('frames'))} frames.</p>")


def _figure_html(fig: Figure, ber: dict | None) -> str:
    if fig.png is None:
        return f'<p class="note">{_esc(fig.note)}</p>'
    b64 = base64.b64encode(fig.png).decode("ascii")
    items = "".join(f"<li>{_esc(_ber_text(ber) if p == 'bit error rate' else _PANEL_TEXT.get(p, p))}</li>"
                    for p in fig.panels)
    note = f'<p class="note">{_esc(fig.note)}</p>' if fig.note else ""
    method = _ber_method_html(ber) if "bit error rate" in fig.panels else ""
    return (f'<figure id="plot-{_esc(fig.key)}"><img src="data:image/png;base64,{b64}" '
            f'alt="{_esc(fig.title)}: {_esc(", ".join(fig.panels))}"><figcaption><ul class="panels">{items}</ul>'
            f"</figcaption></figure>{method}{note}")


def _row_cell(v: Any) -> str:
    if isinstance(v, list) and all(_is_scalar(x) for x in v):
        return "<td>" + ", ".join(_fmt_scalar(x)[0] for x in v) + "</td>"
    return _cell(v)


def _rows_table(rows: Any, columns: tuple[tuple[str, str], ...], empty: str) -> str:
    """A table of chosen columns (key, heading) of a list of dicts; other keys stay in report.json."""
    if not isinstance(rows, list) or not rows:
        return f'<p class="note">{_esc(empty)}</p>'
    shown = [r for r in rows if isinstance(r, dict)][:MAX_TABLE_ROWS]
    cols = [(k, h) for k, h in columns if any(k in r for r in shown)]
    cells = ["".join(_row_cell(r.get(k)) for k, _ in cols) for r in shown]
    return _row_table([_esc(h) for _, h in cols], cells, len(rows))


_VC_COLUMNS = (("scid", "spacecraft"), ("vcid", "VCID"), ("frames", "frames"), ("idle_frames", "idle"),
               ("gaps", "gaps"), ("missing", "missing"), ("duplicates", "duplicates"),
               ("out_of_order", "out of order"), ("first_count", "first count"), ("last_count", "last count"))
_FRAME_GAP_COLUMNS = (("ert", "ERT of the frame after the gap"), ("channel", "channel"), ("expected", "expected count"),
                      ("got", "received count"), ("missing", "missing"),
                      ("unusable_between", "of which received but failed"),
                      ("ambiguous", "more may be missing (count wrapped)"))
_APID_COLUMNS = (("apid", "APID"), ("vcids", "VCIDs"), ("packets", "packets"), ("octets", "octets"),
                 ("sequence_gaps", "sequence gaps"), ("missing", "missing"), ("out_of_order", "out of order"),
                 ("time_codes", "time codes"))
_PACKET_GAP_COLUMNS = (("ert", "ERT of the packet after the gap"), ("apid", "APID"), ("vcid", "VCID"),
                       ("expected", "expected count"), ("got", "received count"), ("missing", "missing"))


_CLCW_LABELS = (("frames_with_clcw", "good frames carrying a CLCW"), ("lockout_frames", "with lockout"),
                ("wait_frames", "with wait"), ("retransmit_frames", "with retransmit"),
                ("no_rf_available_frames", "with no RF available"), ("no_bit_lock_frames", "with no bit lock"),
                ("report_value_first", "first report value N(R)"), ("report_value_last", "last report value N(R)"),
                ("report_value_changes", "report value changes"))


def _gap_sections(data: dict, anchors: dict[str, str]) -> str:
    gaps = data.get("gaps") if isinstance(data.get("gaps"), list) else []
    frame_gaps = []
    for g in gaps:
        if isinstance(g, dict) and g.get("kind") in ("mc", "vc"):
            g = dict(g)
            g["channel"] = "master channel" if g["kind"] == "mc" else f"VC {g.get('vcid')}"
            frame_gaps.append(g)
    packet_gaps = [g for g in gaps if isinstance(g, dict) and g.get("kind") == "apid"]
    return (f'<section id="{anchors["channels"]}"><h2>Channels and frame-count gaps</h2>'
            + _rows_table(data.get("virtual_channels"), _VC_COLUMNS, "No frame was counted on any channel.")
            + "<h3>Frame-count gaps</h3>"
            + _rows_table(frame_gaps, _FRAME_GAP_COLUMNS, "None: every frame count followed the one before.")
            + "</section>"
            f'<section id="{anchors["apids"]}"><h2>APIDs and packet sequence gaps</h2>'
            + _rows_table(data.get("apids"), _APID_COLUMNS, "No packet was delivered.")
            + "<h3>Packet sequence gaps</h3>"
            + _rows_table(packet_gaps, _PACKET_GAP_COLUMNS, "None: every sequence count followed the one before.")
            + "</section>")


def _details(title: str, sections: list[tuple[str, Any]], anchor: str) -> str:
    if not sections:
        return ""
    parts = [f'<details id="{anchor}"><summary>{_esc(title)}</summary>']
    for key, value in sections:
        parts.append(f"<h3>{_label(key)}</h3>{_render_value(value, 1)}")
    parts.append("</details>")
    return "".join(parts)


def render_html(report: dict, plots: PlotData | None = None) -> str:
    """The pass report as one self-contained HTML document.

    Parameters
    ----------
    report : dict
        Top-level sections, as :func:`~pipeline.report.build_report` makes them.  The page shows, top to
        bottom: the verdict (``pass``), the timeline figure with a line on each panel (the bit error
        rate's estimator from ``bit_error_rate``), the receiver snapshot, the channel and APID tables
        with their gaps (``virtual_channels``, ``gaps``, ``apids``), the CLCW (``clcw`` and its figure,
        only when frames carry one), then folded: the recording and link profile, and every other
        section as internal counters (a dict becomes a key/value table, a list of dicts a table capped at
        :data:`MAX_TABLE_ROWS` rows, a scalar a paragraph).  Missing sections are left out.
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
    same way as they are written to ``report.json``.  Cost: linear in the report size plus the
    figures of :func:`~pipeline.report.render_plots` (three at most).
    """
    if not isinstance(report, dict):
        raise TypeError(f"Argument 'report' must be a dict, not {type(report).__name__}.")
    if plots is not None and not isinstance(plots, PlotData):
        raise TypeError(f"Argument 'plots' must be a PlotData or None, not {type(plots).__name__}.")
    data = jsonable(report)
    summary = data.get("summary") if isinstance(data.get("summary"), dict) else {}
    recording = data.get("recording") if isinstance(data.get("recording"), dict) else {}
    verdict = data.get("pass") if isinstance(data.get("pass"), dict) else None
    ber = data.get("bit_error_rate") if isinstance(data.get("bit_error_rate"), dict) else None
    name = summary.get("profile") if isinstance(summary.get("profile"), str) else ""
    title = f"Pass report: {name}" if name else "Pass report"
    sub = " · ".join(str(x) for x in (recording.get("path"), recording.get("start")) if isinstance(x, str) and x)

    used: set[str] = set()
    anchors = {k: _anchor(k, used) for k in ("verdict", "timeline", "snapshot", "channels", "apids", "clcw",
                                             "recording", "counters")}
    figures = {fig.key: fig for fig in render_plots(plots)}
    nav: list[tuple[str, str]] = []
    body: list[str] = []
    if verdict is not None:
        nav.append((anchors["verdict"], "verdict"))
        body.append(_verdict_html(verdict, ber, anchors["verdict"]))
    for key, label in (("timeline", "over the pass"), ("snapshot", "receiver snapshot")):
        if key in figures:
            nav.append((anchors[key], label))
            body.append(f'<section id="{anchors[key]}"><h2>{_esc(figures[key].title)}</h2>'
                        f"{_figure_html(figures[key], ber)}</section>")
    nav += [(anchors["channels"], "channels"), (anchors["apids"], "APIDs")]
    body.append(_gap_sections(data, anchors))
    if "clcw" in figures or isinstance(data.get("clcw"), dict):
        nav.append((anchors["clcw"], "CLCW"))
        clcw = data.get("clcw")
        table = (_kv_table((_esc(label), clcw[k]) for k, label in _CLCW_LABELS if k in clcw)
                 if isinstance(clcw, dict) else "")
        fig = _figure_html(figures["clcw"], ber) if "clcw" in figures else ""
        body.append(f'<section id="{anchors["clcw"]}"><h2>Link control word (CLCW) over the pass</h2>'
                    f"{fig}{table}</section>")
    setup = [(k, data[k]) for k in ("recording", "profile") if k in data]
    counters = [(k, v) for k, v in data.items() if k not in KNOWN_SECTIONS and k != "schema_version"]
    if setup:
        nav.append((anchors["recording"], "recording and link"))
        body.append(_details("Recording and link profile", setup, anchors["recording"]))
    if counters:
        nav.append((anchors["counters"], "internal counters"))
        body.append(_details("Internal counters (every section of report.json not shown above)", counters,
                             anchors["counters"]))
    tool = summary.get("tool") if isinstance(summary.get("tool"), str) else "downlink"
    schema = data.get("schema_version")
    schema_txt = f" (schema version {_esc(schema)})" if schema is not None else ""
    nav_html = "".join(f'<li><a href="#{a}">{_esc(label)}</a></li>' for a, label in nav)
    return "".join([
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">",
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_esc(title)}</title><style>{_CSS}</style></head><body>",
        f"<header><h1>{_esc(title)}</h1>",
        f'<p class="sub">{_esc(sub)}</p>' if sub else "",
        f'<p class="caution">Caution: {_esc(CAUTION)}</p>',
        f"<nav><ul>{nav_html}</ul></nav></header><main>",
        "".join(body),
        f"</main><footer>Written by {_esc(tool)}. Every number shown here is also in report.json{schema_txt}."
        "</footer></body></html>\n",
    ])


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
