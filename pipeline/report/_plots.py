"""Plots of the pass report: PNG images drawn with matplotlib's Agg renderer, no display needed.

Three figures at most, so a run pays for few canvases: the pass timeline (waterfall, Es/N0, carrier
offset, frame quality, bit error rate on one shared time axis, so a failure can be placed in time), a
receiver snapshot (spectrum and constellation), and the link's CLCW over the pass when frames carry one.
"""

from __future__ import annotations

import io
import logging
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["PlotData", "Figure", "render_plots", "MAX_CONSTELLATION_POINTS", "MAX_LINE_BINS"]

log = logging.getLogger(__name__)

#: Points drawn in the constellation snapshot; longer inputs are thinned evenly.
MAX_CONSTELLATION_POINTS = 4000

#: Line plots with more points are reduced to the minimum and maximum of each of this many bins.
MAX_LINE_BINS = 2000

#: Per-frame markers drawn at most; more frames are reduced to the worst of each of this many time bins.
MAX_FRAME_MARKERS = 1500

#: Waterfall cells drawn at most (time rows x frequency bins); larger ones are averaged down first.
_WATERFALL_MAX = (300, 128)

_DPI = 100
_INK = "#1f4e79"
_GOOD, _IDLE, _FAILED, _OTHER, _MISSING = "#2e7d32", "#9e9e9e", "#c62828", "#6a1b9a", "#ef6c00"
_UNLOCKED = "#e8e8e8"


@dataclass
class PlotData:
    """What the report plots; every field is optional (None = that panel or plot is left out with a note).

    Times are seconds on one axis: UTC seconds since 1970-01-01 when ``time_is_utc``, else seconds from
    the start of the recording.

    Attributes
    ----------
    time_is_utc : bool
    span_s : (float, float) or None
        The recording's first and last instant (the time axis' limits).
    spectrum_freq_hz, spectrum_db : array_like of float
        Power spectrum: frequency offset from the centre (Hz) and power (dB), equal lengths.
    constellation : array_like of complex
        Symbol-spaced matched-filter outputs (a few thousand points).
    waterfall_time_s : array_like of float
        Edges of the waterfall's time rows (one more than rows).
    waterfall_freq_hz : array_like of float
        Frequency offset of each bin (Hz, ascending, equal steps).
    waterfall_db : 2-D array_like of float
        Power (dB) per row and bin; NaN rows carry no data.
    track_time_s, track_esn0_db, track_carrier_hz : array_like of float
        Receiver track: time, Es/N0 (dB) and carrier offset (Hz); NaN where not to be drawn (unlocked).
    track_locked : array_like of bool
        Carrier and symbol lock at each track point (unlocked stretches are shaded).
    frame_time_s : array_like of float
        Time of each frame (its ASM).
    frame_duration_s : float
        Length of one frame on the link.
    frame_category : array_like of int
        0 good, 1 idle, 2 failed, 3 another spacecraft.
    frame_rs_corrected : array_like of int
        Reed-Solomon symbols corrected per codeblock, -1 failed (None without Reed-Solomon).
    track_doppler_residual_hz : array_like of float
        Measured minus predicted Doppler at each track point (``decode --tle`` / ``--oem``), NaN where none.
    frame_iterations, frame_iterations_max : array_like of int, int
        Iterations the LDPC or turbo decoder used per frame (-1: none ran) and its limit.
    frame_rs_max : int
        Symbols a codeblock can correct (E x interleave).
    frame_asm_errors : array_like of int
        Wrong ASM bits per frame (-1 unknown).
    frame_flywheel : array_like of bool
        Frames the synchronizer emitted without finding their marker.
    missing_spans_s : list of (float, float)
        Stretches where frames are missing by their counters.
    ber_time_s, ber_estimate, ber_upper : array_like of float
        Bit error rate estimate over the pass and its upper end (:func:`pipeline.report._quality.bit_error_series`).
    ber_zero, ber_lower_bound : array_like of bool
        Points with no error (the bound is drawn) and points that are lower bounds.
    clcw_time_s, clcw_report_value, clcw_flags : array_like
        Frames carrying a CLCW: time, report value, flags (bit 0 lockout, 1 wait, 2 retransmit,
        3 no RF available, 4 no bit lock).
    """

    time_is_utc: bool = False
    span_s: Any = None
    spectrum_freq_hz: Any = None
    spectrum_db: Any = None
    constellation: Any = None
    waterfall_time_s: Any = None
    waterfall_freq_hz: Any = None
    waterfall_db: Any = None
    track_time_s: Any = None
    track_esn0_db: Any = None
    track_carrier_hz: Any = None
    track_locked: Any = None
    frame_time_s: Any = None
    frame_duration_s: float = 0.0
    frame_category: Any = None
    frame_rs_corrected: Any = None
    frame_rs_max: int = 0
    frame_asm_errors: Any = None
    frame_iterations: Any = None
    frame_iterations_max: int = 0
    track_doppler_residual_hz: Any = None
    frame_flywheel: Any = None
    missing_spans_s: list = field(default_factory=list)
    ber_time_s: Any = None
    ber_estimate: Any = None
    ber_upper: Any = None
    ber_zero: Any = None
    ber_lower_bound: Any = None
    clcw_time_s: Any = None
    clcw_report_value: Any = None
    clcw_flags: Any = None


@dataclass(frozen=True)
class Figure:
    """One plot of the report: ``png`` bytes, or None with ``note`` saying why it is missing.

    ``panels`` names the panels drawn, top to bottom (the page explains each).
    """

    key: str
    title: str
    png: bytes | None
    note: str = ""
    panels: tuple[str, ...] = ()


class _Missing(Exception):
    """The data for a plot is absent or unusable; the message says which and why."""


# ---- helpers ------------------------------------------------------------------------------------


def _vector(value: Any, name: str, dtype=np.float64) -> np.ndarray:
    if value is None:
        raise _Missing(f"no {name} data")
    try:
        arr = np.asarray(value, dtype=dtype)
    except (TypeError, ValueError):
        raise _Missing(f"{name} data is not numeric") from None
    if arr.ndim != 1:
        arr = arr.reshape(-1) if arr.size else arr.reshape(0)
    if arr.size == 0:
        raise _Missing(f"{name} data is empty")
    return arr


def _same_length(a: np.ndarray, b: np.ndarray, what: str) -> None:
    if a.shape[0] != b.shape[0]:
        raise _Missing(f"{what} lengths differ ({a.shape[0]} and {b.shape[0]})")


def _optional(value: Any, name: str, like: np.ndarray, dtype=np.float64) -> np.ndarray | None:
    """A per-item series matching ``like`` in length, or None when absent."""
    if value is None:
        return None
    arr = _vector(value, name, dtype)
    _same_length(like, arr, f"{name} and its times")
    return arr


def _canvas(width_in: float, height_in: float):
    # The object-oriented API with an explicit Agg canvas: no pyplot, no global backend switch,
    # nothing left open between calls.  No constrained layout: margins are fixed (cheaper to draw).
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure as MplFigure

    fig = MplFigure(figsize=(width_in, height_in), dpi=_DPI)
    FigureCanvasAgg(fig)
    return fig


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=_DPI)
    return buf.getvalue()


def _envelope(x: np.ndarray, y: np.ndarray, bins: int = MAX_LINE_BINS) -> tuple[np.ndarray, np.ndarray]:
    """Thin a long line to the min and max of ``bins`` equal runs of points (peaks stay visible).

    O(n); short inputs are returned unchanged.  NaN points are ignored within a bin; a bin with no
    finite point gives one NaN point, so gaps in the line stay gaps.
    """
    n = x.shape[0]
    if n <= 2 * bins:
        return x, y
    edges = np.linspace(0, n, bins + 1).astype(np.int64)
    xs, ys = [], []
    for a, b in zip(edges[:-1], edges[1:]):
        seg = y[a:b]
        ok = np.isfinite(seg)
        if not ok.any():
            xs.append(x[a])
            ys.append(np.nan)
            continue
        idx = np.flatnonzero(ok)
        i_lo, i_hi = idx[np.argmin(seg[ok])], idx[np.argmax(seg[ok])]
        for i in sorted({int(i_lo), int(i_hi)}):
            xs.append(x[a + i])
            ys.append(seg[i])
    return np.asarray(xs), np.asarray(ys)


def _runs(t: np.ndarray, flag: np.ndarray, width: float) -> list[tuple[float, float]]:
    """Stretches of consecutive items with ``flag`` set, as (start, length); each item covers ``width``.

    Items further apart than 1.5 ``width`` start a new stretch.  O(n); the result has one entry per run.
    """
    idx = np.flatnonzero(flag)
    if idx.size == 0:
        return []
    ts = t[idx]
    breaks = np.flatnonzero((np.diff(idx) != 1) | (np.diff(ts) > 1.5 * width)) + 1
    starts = np.concatenate([[0], breaks])
    ends = np.concatenate([breaks, [idx.size]]) - 1
    return [(float(ts[a]), float(ts[b] - ts[a] + width)) for a, b in zip(starts, ends)]


def _worst_per_bin(t: np.ndarray, v: np.ndarray, bins: int = MAX_FRAME_MARKERS) -> tuple[np.ndarray, np.ndarray]:
    """At most ``bins`` points: the largest value of each equal run of items (all items when few)."""
    if t.size <= bins:
        return t, v
    edges = np.linspace(0, t.size, bins + 1).astype(np.int64)[:-1]
    return t[edges], np.maximum.reduceat(v, edges)


def _time_bins(t: np.ndarray, v: np.ndarray, width: float,
               bins: int = MAX_FRAME_MARKERS) -> tuple[np.ndarray, np.ndarray, float]:
    """Sorted items on at most ``bins`` equal time bins: (start of each non-empty bin, its largest value, the
    bin width); the items themselves when there are few.  Bounds the rectangles a strip draws.  O(n)."""
    if t.size <= bins:
        return t, v, width
    lo, hi = float(t[0]), float(t[-1]) + width
    step = (hi - lo) / bins
    k = np.minimum(((t - lo) / step).astype(np.int64), bins - 1)
    starts = np.flatnonzero(np.concatenate([[True], np.diff(k) != 0]))
    return lo + k[starts] * step, np.maximum.reduceat(v, starts), max(step, width)


def _block_mean(a: np.ndarray, axis: int, most: int) -> tuple[np.ndarray, int]:
    """Average ``a`` down to at most ``most`` entries along ``axis`` (NaN-aware, runs of ``k``); (array, k)."""
    n = a.shape[axis]
    if n <= most:
        return a, 1
    k = -(-n // most)
    pad = (-n) % k
    if pad:
        widths = [(0, 0)] * a.ndim
        widths[axis] = (0, pad)
        a = np.pad(a, widths, constant_values=np.nan)
    shape = list(a.shape)
    shape[axis: axis + 1] = [shape[axis] // k, k]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # a run of NaN rows stays NaN
        return np.nanmean(a.reshape(shape), axis=axis + 1), k


# ---- time axis ----------------------------------------------------------------------------------


class _Axis:
    """Plot x values from the report's seconds: matplotlib date numbers (days) for UTC, else seconds."""

    def __init__(self, d: PlotData):
        self.utc = bool(d.time_is_utc)

    def x(self, seconds) -> np.ndarray:
        s = np.asarray(seconds, dtype=np.float64)
        return s / 86400.0 if self.utc else s

    def width(self, seconds: float) -> float:
        return seconds / 86400.0 if self.utc else seconds

    def label(self, ax) -> None:
        if self.utc:
            import matplotlib.dates as mdates

            loc = mdates.AutoDateLocator(minticks=5, maxticks=9)
            loc.intervald[mdates.SECONDLY] = [1, 2, 5, 10, 15, 30]  # 2 s steps on a short pass, not 5
            ax.xaxis.set_major_locator(loc)
            ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(loc, show_offset=True))
            ax.set_xlabel("UTC (Earth-received time)")
        else:
            ax.set_xlabel("seconds from the start of the recording (its UTC time is unknown)")


# ---- the pass timeline --------------------------------------------------------------------------


def _shade_unlocked(ax, axis: _Axis, d: PlotData) -> None:
    if d.track_time_s is None or d.track_locked is None:
        return
    t = np.asarray(d.track_time_s, dtype=np.float64)
    lk = np.asarray(d.track_locked, dtype=bool)
    if t.size != lk.size or t.size == 0:
        return
    step = float(np.median(np.diff(t))) if t.size > 1 else 1.0
    tb, unlocked, width = _time_bins(t - step, (~lk).astype(np.int8), step)
    for start, length in _runs(tb, unlocked > 0, width):
        ax.axvspan(axis.x(start), axis.x(start + length), color=_UNLOCKED, lw=0, zorder=0)


def _panel_waterfall(ax, axis: _Axis, d: PlotData) -> None:
    if d.waterfall_db is None or d.waterfall_time_s is None or d.waterfall_freq_hz is None:
        raise _Missing("no waterfall")
    db = np.asarray(d.waterfall_db, dtype=np.float64)
    edges = _vector(d.waterfall_time_s, "waterfall time")
    freq = _vector(d.waterfall_freq_hz, "waterfall frequency")
    if db.ndim != 2 or db.shape != (edges.size - 1, freq.size) or not np.isfinite(db).any():
        raise _Missing("waterfall data has the wrong shape or no finite value")
    rows_before = db.shape[0]
    db, _ = _block_mean(db, 1, _WATERFALL_MAX[1])
    db, k = _block_mean(db, 0, _WATERFALL_MAX[0])
    t_hi = edges[0] + (edges[-1] - edges[0]) * (db.shape[0] * k) / rows_before  # padded rows extend the last
    if db.shape[1] != freq.size:
        kf = -(-freq.size // db.shape[1])
        freq = freq[: db.shape[1] * kf: kf] + (kf - 1) * (freq[1] - freq[0]) / 2
    df = freq[1] - freq[0] if freq.size > 1 else 1.0
    scale, unit = (1e-3, "kHz") if np.max(np.abs(freq)) < 5e6 else (1e-6, "MHz")
    lo, hi = np.nanpercentile(db, [5.0, 99.7])
    import matplotlib

    # 12 colour steps: as readable as a continuous map, and the PNG is a third smaller (noise compresses badly)
    cmap = matplotlib.colormaps["viridis"].resampled(12)
    ax.imshow(db.T, origin="lower", aspect="auto", interpolation="nearest", cmap=cmap, vmin=lo, vmax=hi,
              extent=(axis.x(edges[0]), axis.x(t_hi), (freq[0] - df / 2) * scale, (freq[-1] + df / 2) * scale))
    ax.set_ylabel(f"frequency\noffset ({unit})")
    ax.locator_params(axis="y", nbins=4)
    # The colour scale as two labelled swatches (a colorbar is one more axes: about 20 ms to draw).
    for y, v, va, c in ((0.98, hi, "top", 1.0), (0.02, lo, "bottom", 0.0)):
        ax.text(1.012, y, "\u25a0", transform=ax.transAxes, fontsize=9, va=va, color=cmap(c))
        ax.text(1.04, y, f"{v:.0f} dB", transform=ax.transAxes, fontsize=7, va=va)
    ax.text(1.012, 0.5, "colour:\npower", transform=ax.transAxes, fontsize=7, va="center", color="#555555")


def _panel_line(ax, axis: _Axis, d: PlotData, value: Any, name: str, ylabel: str) -> None:
    t = _vector(d.track_time_s, "track time")
    y = _vector(value, name)
    _same_length(t, y, f"track time and {name}")
    if not np.isfinite(y).any():
        raise _Missing(f"no {name} while locked")
    _shade_unlocked(ax, axis, d)
    tx, yy = _envelope(t, y)
    ax.plot(axis.x(tx), yy, lw=1.0, color=_INK, marker="." if np.isfinite(yy).sum() < 60 else None, ms=3)
    ax.set_ylabel(ylabel)
    ax.locator_params(axis="y", nbins=4)


def _legend_patches(items):
    from matplotlib.patches import Patch

    return [Patch(color=c, label=lab) for c, lab in items]


def _panel_quality(ax, axis: _Axis, d: PlotData) -> tuple[str, ...]:
    """Frame quality in lanes of one panel, top to bottom: status, RS symbols corrected or decoder iterations,
    ASM bits wrong.

    One axes instead of three (each axes costs matplotlib about 20 ms to build); each lane is labelled
    with its scale, markers sit at ``lane + 0.05 + 0.75 value / top``.
    """
    t = _vector(d.frame_time_s, "frame time")
    cat = _optional(d.frame_category, "frame status", t, np.int64)
    if cat is None:
        raise _Missing("no frame status")
    rs = _optional(d.frame_rs_corrected, "RS corrections", t, np.int64)
    asm = _optional(d.frame_asm_errors, "ASM errors", t, np.int64)
    fly = _optional(d.frame_flywheel, "flywheel", t, bool)
    fly = np.zeros(t.size, bool) if fly is None else fly
    order = np.argsort(t, kind="stable")
    t, cat, fly = t[order], cat[order], fly[order]
    lanes: list[tuple[str, str]] = []  # (panel name, label), bottom lane first
    handles = []
    if asm is not None and (asm >= 0).any():
        asm = asm[order]
        y0, top = float(len(lanes)), max(4, int(asm.max()))
        for sel, style in ((~fly & (asm >= 0), dict(color=_INK)), (fly & (asm >= 0), dict(color=_FAILED, mfc="none"))):
            if sel.any():
                tt, vv = _worst_per_bin(t[sel], asm[sel])
                ax.plot(axis.x(tt), y0 + 0.05 + 0.75 * vv / top, "o", ms=2.5, **style)
        lanes.append(("ASM errors", f"ASM wrong\n0 to {top}"))
    its = _optional(d.frame_iterations, "decoder iterations", t, np.int64)
    if its is not None and (its >= 0).any():
        its = its[order]
        y0, top = float(len(lanes)), max(int(d.frame_iterations_max), 1)
        ran = its >= 0
        tt, vv = _worst_per_bin(t[ran], its[ran])
        ax.plot(axis.x(tt), y0 + 0.05 + 0.75 * np.minimum(vv, top) / top, ".", ms=3, color=_INK)
        lanes.append(("decoder iterations", f"iterations\n0 to {top}"))
    if rs is not None:
        rs = rs[order]
        y0, top = float(len(lanes)), max(int(d.frame_rs_max), 1)
        ok, failed = rs >= 0, rs == -1
        if ok.any():
            tt, vv = _worst_per_bin(t[ok], rs[ok])
            ax.plot(axis.x(tt), y0 + 0.05 + 0.75 * vv / top, ".", ms=3, color=_INK)
        if failed.any():
            tf, _ = _worst_per_bin(t[failed], rs[failed])
            ax.plot(axis.x(tf), np.full(tf.size, y0 + 0.9), "x", ms=5, color=_FAILED)
        lanes.append(("RS corrections", f"RS corrected\n0 to {top}"))
    y0 = float(len(lanes))
    w = float(d.frame_duration_s) or (float(np.median(np.diff(t))) if t.size > 1 else 1.0)
    rows = ((0, _GOOD, "good"), (1, _IDLE, "idle"), (3, _OTHER, "other spacecraft"), (2, _FAILED, "failed"))
    rank = np.array([0, 1, 3, 2])  # a time bin shows its worst frame: failed, other spacecraft, idle, good
    tb, worst, wb = _time_bins(t, rank[np.clip(cat, 0, 3)], w)
    shown = rank[worst]  # the rank table is its own inverse
    for code, color, _ in rows:
        spans = _runs(tb, shown == code, wb)
        if spans:
            ax.broken_barh([(axis.x(a), axis.width(b)) for a, b in spans], (y0 + 0.15, 0.7), color=color, lw=0)
    for a, b in d.missing_spans_s or ():
        ax.broken_barh([(axis.x(a), axis.x(b) - axis.x(a))], (y0 + 0.15, 0.7), color=_MISSING, lw=0)
    lanes.append(("frame status", "frames"))
    present = {int(c) for c in np.unique(cat)}
    handles = _legend_patches([(c, lab) for code, c, lab in rows if code in present]
                              + ([(_MISSING, "missing (frame count)")] if d.missing_spans_s else []))
    n = len(lanes)
    ax.set_ylim(-0.02, n)
    ax.set_yticks(np.arange(n) + 0.5, [label for _, label in lanes], fontsize=7)
    ax.tick_params(axis="y", length=0)
    ax.hlines(np.arange(n), 0, 1, transform=ax.get_yaxis_transform(), color="#9e9e9e", lw=0.6)
    from matplotlib.lines import Line2D

    if rs is not None and (rs == -1).any():
        handles.append(Line2D([], [], ls="none", marker="x", color=_FAILED, label="RS failed"))
    if fly.any():
        handles.append(Line2D([], [], ls="none", marker="o", mfc="none", color=_FAILED, label="flywheel frame"))
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.0, 1.02), fontsize=7, frameon=False,
              handlelength=1.0, borderaxespad=0.2)
    return tuple(name for name, _ in reversed(lanes))


def _panel_ber(ax, axis: _Axis, d: PlotData) -> None:
    t = _vector(d.ber_time_s, "bit error rate time")
    est = _optional(d.ber_estimate, "bit error rate", t)
    upper = _optional(d.ber_upper, "bit error rate upper end", t)
    zero = _optional(d.ber_zero, "no-error flags", t, bool)
    low = _optional(d.ber_lower_bound, "lower-bound flags", t, bool)
    if est is None or upper is None:
        raise _Missing("no bit error rate estimate")
    zero = np.zeros(t.size, bool) if zero is None else zero
    low = np.zeros(t.size, bool) if low is None else low
    x = axis.x(t)
    seen = ~zero
    if seen.any():
        ax.vlines(x[seen], est[seen], upper[seen], color=_INK, lw=0.8, alpha=0.5)
        ax.plot(x[seen & ~low], est[seen & ~low], "o", ms=3.5, color=_INK, label="estimate")
        if (seen & low).any():
            ax.plot(x[seen & low], est[seen & low], "^", ms=5, color=_FAILED, label="at least\n(codeblock failed)")
    if zero.any():
        ax.plot(x[zero], upper[zero], "v", ms=4, color="#757575", label="no error:\nbelow (95 %)")
    vals = np.concatenate([est[seen], upper])
    vals = vals[np.isfinite(vals) & (vals > 0)]
    lo = 10 ** np.floor(np.log10(max(vals.min(), 1e-12))) if vals.size else 1e-8
    ax.set_yscale("log")
    ax.yaxis.set_major_formatter(_power_of_ten_formatter())
    ax.yaxis.set_minor_locator(_null_locator())  # eight tick objects per decade otherwise
    ax.set_ylim(lo / 2, min(1.0, 10 ** np.ceil(np.log10(vals.max()))) * 2 if vals.size else 1.0)
    ax.set_ylabel("bit error\nrate")
    ax.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0), fontsize=7, frameon=False, handlelength=1.0,
              borderaxespad=0.2)


def _power_of_ten_formatter():
    """Log-axis labels as plain text (``1e-3``): matplotlib's default writes mathtext, whose parser costs
    about 0.1 s to set up in every fresh process."""
    from matplotlib.ticker import FuncFormatter

    return FuncFormatter(lambda v, _: f"1e{int(round(np.log10(v)))}" if v > 0 else "")


def _null_locator():
    from matplotlib.ticker import NullLocator

    return NullLocator()


_TIMELINE: tuple[tuple[str, float, Callable], ...] = (
    ("waterfall", 1.9, _panel_waterfall),
    ("Es/N0", 1.1, lambda ax, axis, d: _panel_line(ax, axis, d, d.track_esn0_db, "Es/N0", "Es/N0 (dB)")),
    ("carrier offset", 1.1, lambda ax, axis, d: _panel_line(ax, axis, d, d.track_carrier_hz, "carrier offset",
                                                            "carrier\noffset (Hz)")),
    ("Doppler residual", 1.0, lambda ax, axis, d: _panel_line(ax, axis, d, d.track_doppler_residual_hz,
                                                              "Doppler residual", "Doppler\nresidual (Hz)")),
    ("frame quality", 1.7, _panel_quality),
    ("bit error rate", 1.1, _panel_ber),
)


def _usable_panels(d: PlotData) -> list[tuple[str, float, Callable]]:
    """Panels with data; a panel whose data is absent is left out (its note is kept for the page)."""
    present = {
        "waterfall": d.waterfall_db is not None,
        "Es/N0": d.track_esn0_db is not None and d.track_time_s is not None,
        "carrier offset": d.track_carrier_hz is not None and d.track_time_s is not None,
        "Doppler residual": d.track_doppler_residual_hz is not None and d.track_time_s is not None,
        "frame quality": d.frame_time_s is not None and d.frame_category is not None,
        "bit error rate": d.ber_time_s is not None and len(d.ber_time_s) > 0,
    }
    return [p for p in _TIMELINE if present[p[0]]]


def _plot_timeline(d: PlotData) -> tuple[bytes, tuple[str, ...], list[str]]:
    panels = _usable_panels(d)
    if not panels:
        raise _Missing("no receiver track, waterfall or frames")
    axis = _Axis(d)
    # Draw each panel into a throw-away list first: one whose data is unusable is dropped with a note.
    heights = [h for _, h, _ in panels]
    fig = _canvas(10.0, sum(heights) + 0.35 * len(panels) + 0.7)
    gs = fig.add_gridspec(len(panels), 1, height_ratios=heights, left=0.095, right=0.84,
                          top=1 - 0.15 / fig.get_figheight(), bottom=0.55 / fig.get_figheight(), hspace=0.35)
    axes, drawn, notes = [], [], []
    for i, (name, _, fn) in enumerate(panels):
        ax = fig.add_subplot(gs[i])
        try:
            names = fn(ax, axis, d)
        except _Missing as why:
            fig.delaxes(ax)
            notes.append(f"{name} ({why})")
            continue
        ax.tick_params(labelsize=8)
        ax.yaxis.label.set_size(9)
        axes.append(ax)
        drawn.extend(names or (name,))
    if not axes:
        raise _Missing("; ".join(notes))
    _stack_time_axes(axes, axis, d.span_s)
    return _png(fig), tuple(drawn), [f"not shown: {n}" for n in notes]


def _stack_time_axes(axes: list, axis: _Axis, span_s) -> None:
    """One time axis for a column of panels: the same limits, tick labels on the bottom panel only.

    The upper panels get no x ticks of their own (tick objects are most of matplotlib's drawing cost);
    their vertical grid lines are drawn at the bottom panel's tick positions as one line collection.
    """
    from matplotlib.ticker import NullLocator

    if span_s is not None and float(span_s[1]) > float(span_s[0]):
        lo, hi = axis.x(float(span_s[0])), axis.x(float(span_s[1]))
    else:
        lims = [ax.dataLim.intervalx for ax in axes if np.all(np.isfinite(ax.dataLim.intervalx))]
        lo, hi = (min(v[0] for v in lims), max(v[1] for v in lims)) if lims else (0.0, 1.0)
        if not hi > lo:
            lo, hi = lo - axis.width(0.5), hi + axis.width(0.5)
    bottom = axes[-1]
    for ax in axes:
        ax.set_xlim(lo, hi)
    axis.label(bottom)
    bottom.grid(True, alpha=0.3)
    ticks = [t for t in bottom.xaxis.get_majorticklocs() if lo <= t <= hi]
    for ax in axes[:-1]:
        ax.xaxis.set_major_locator(NullLocator())
        ax.xaxis.set_minor_locator(NullLocator())
        ax.grid(True, axis="y", alpha=0.3)
        ax.vlines(ticks, 0, 1, transform=ax.get_xaxis_transform(), color="#b0b0b0", lw=0.8, alpha=0.3)


# ---- receiver snapshot --------------------------------------------------------------------------


def _snapshot_spectrum(ax, d: PlotData) -> None:
    f = _vector(d.spectrum_freq_hz, "spectrum frequency")
    p = _vector(d.spectrum_db, "spectrum power")
    _same_length(f, p, "spectrum frequency and power")
    ok = np.isfinite(f) & np.isfinite(p)
    if not ok.any():
        raise _Missing("spectrum data has no finite values")
    scale, unit = (1e-3, "kHz") if np.max(np.abs(f[ok])) < 5e6 else (1e-6, "MHz")
    fx, py = _envelope(f[ok], p[ok])
    ax.plot(fx * scale, py, lw=0.8, color=_INK)
    ax.set_xlabel(f"frequency offset ({unit})")
    ax.set_ylabel("power (dB)")
    ax.locator_params(nbins=6)
    ax.text(0.0, 1.02, "spectrum of the first samples", transform=ax.transAxes, fontsize=9)


def _snapshot_constellation(ax, d: PlotData) -> None:
    z = _vector(d.constellation, "constellation", dtype=np.complex128)
    z = z[np.isfinite(z)]
    if z.size == 0:
        raise _Missing("constellation data has no finite values")
    if z.size > MAX_CONSTELLATION_POINTS:
        z = z[np.linspace(0, z.size - 1, MAX_CONSTELLATION_POINTS).astype(np.int64)]
    ax.plot(z.real, z.imag, ".", ms=2.0, alpha=0.5, color=_INK)
    lim = 1.1 * float(np.max(np.abs(np.concatenate([z.real, z.imag])))) or 1.0
    ax.set_xlim(-lim, lim)
    ax.set_ylim(-lim, lim)
    ax.set_aspect("equal")
    ax.set_xlabel("in phase")
    ax.set_ylabel("quadrature")
    ax.locator_params(nbins=5)
    ax.text(0.0, 1.02, "constellation (last locked symbols)", transform=ax.transAxes, fontsize=9)


def _plot_snapshot(d: PlotData) -> tuple[bytes, tuple[str, ...], list[str]]:
    fig = _canvas(10.0, 3.3)
    gs = fig.add_gridspec(1, 2, width_ratios=[2.3, 1.0], left=0.07, right=0.98, top=0.9, bottom=0.16, wspace=0.22)
    drawn, notes = [], []
    for i, (name, fn) in enumerate((("spectrum", _snapshot_spectrum), ("constellation", _snapshot_constellation))):
        ax = fig.add_subplot(gs[i])
        try:
            fn(ax, d)
        except _Missing as why:
            fig.delaxes(ax)
            notes.append(f"{name} ({why})")
            continue
        ax.grid(True, alpha=0.3)
        ax.tick_params(labelsize=8)
        drawn.append(name)
    if not drawn:
        raise _Missing("; ".join(notes))
    return _png(fig), tuple(drawn), [f"not shown: {n}" for n in notes]


# ---- CLCW ---------------------------------------------------------------------------------------

_CLCW_FLAGS = ((0, "lockout"), (1, "wait"), (2, "retransmit"), (3, "no RF available"), (4, "no bit lock"))


def _plot_clcw(d: PlotData) -> tuple[bytes, tuple[str, ...], list[str]]:
    """One panel in lanes: the report value N(R) on top (scaled to its range), then one lane per flag."""
    t = _vector(d.clcw_time_s, "CLCW time")
    value = _optional(d.clcw_report_value, "CLCW report value", t, np.int64)
    flags = _optional(d.clcw_flags, "CLCW flags", t, np.int64)
    if value is None or flags is None:
        raise _Missing("no CLCW")
    axis = _Axis(d)
    n = len(_CLCW_FLAGS)
    fig = _canvas(10.0, 3.0)
    ax = fig.add_subplot(fig.add_gridspec(1, 1, left=0.125, right=0.84, top=0.96, bottom=0.2)[0])
    w = float(np.median(np.diff(t))) if t.size > 1 else (float(d.frame_duration_s) or 1.0)
    for lane, (bit, _) in enumerate(reversed(_CLCW_FLAGS)):
        tb, on, wb = _time_bins(t, ((flags >> bit) & 1).astype(np.int8), w)
        spans = _runs(tb, on > 0, wb)
        if spans:
            ax.broken_barh([(axis.x(a), axis.width(b)) for a, b in spans], (lane + 0.2, 0.6), color=_FAILED, lw=0)
    lo, hi = int(value.min()), int(value.max())
    span = max(hi - lo, 1)
    tx, vv = _worst_per_bin(t, value, MAX_LINE_BINS)
    ax.step(axis.x(tx), n + 0.15 + 1.5 * (vv - lo) / span, where="post", color=_INK, lw=1.0)
    scale = f"{lo} to {hi}" if hi > lo else f"always {lo}"
    labels = [name for _, name in reversed(_CLCW_FLAGS)] + [f"report value N(R)\n{scale}"]
    ax.set_yticks(list(np.arange(n) + 0.5) + [n + 0.9], labels, fontsize=8)
    ax.tick_params(axis="y", length=0)
    ax.set_ylim(0, n + 1.8)
    ax.hlines(list(range(n + 1)), 0, 1, transform=ax.get_yaxis_transform(), color="#9e9e9e", lw=0.6)
    note = "red: flag set" if flags.any() else "no flag was set\nin any CLCW"
    ax.text(1.005, (n / 2) / (n + 1.8), note, transform=ax.transAxes, fontsize=7, va="center", color="#555555")
    ax.tick_params(labelsize=8)
    _stack_time_axes([ax], axis, d.span_s)
    ax.grid(False, axis="y")
    return _png(fig), ("CLCW report value", "CLCW flags"), []


_PLOTS: tuple[tuple[str, str, Callable[[PlotData], tuple[bytes, tuple[str, ...], list[str]]]], ...] = (
    ("timeline", "The pass over time", _plot_timeline),
    ("snapshot", "Receiver snapshot", _plot_snapshot),
    ("clcw", "Link control word (CLCW) over the pass", _plot_clcw),
)


def render_plots(plots: PlotData | None) -> list[Figure]:
    """Draw every plot of the report; a plot without usable data is returned with a note instead.

    Returns
    -------
    list of Figure
        ``timeline``, ``snapshot`` and ``clcw``, in this order.  A figure with some panels left out
        carries a note naming them and why.

    Notes
    -----
    Each plot is one matplotlib figure saved as PNG at 100 dpi with fixed margins (no layout solver).
    Missing or inconsistent data (None, empty, lengths that differ, no finite value) gives a note naming
    the problem; a failure inside matplotlib is logged and also becomes a note, so the report of a long
    run is never lost to a plot.  Cost: O(points) to thin the data, then a bounded number of artists
    (:data:`MAX_LINE_BINS`, :data:`MAX_FRAME_MARKERS`, a waterfall of at most 300 x 128 cells).
    """
    out = []
    data = plots if plots is not None else PlotData()
    for key, title, fn in _PLOTS:
        if key == "clcw" and data.clcw_time_s is None:
            continue  # a link without an OCF: no section at all
        try:
            png, panels, notes = fn(data)
            out.append(Figure(key, title, png, "; ".join(notes), panels))
        except _Missing as why:
            out.append(Figure(key, title, None, f"not shown: {why}"))
        except Exception as exc:  # noqa: BLE001 - a plot must never cost the report
            log.warning("report plot %s failed: %s: %s", key, type(exc).__name__, exc)
            out.append(Figure(key, title, None, f"not shown: the plot could not be drawn ({type(exc).__name__})"))
    return out
