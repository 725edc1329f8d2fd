"""Plots of the pass report: PNG images drawn with matplotlib's Agg renderer, no display needed."""

from __future__ import annotations

import io
import logging
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["PlotData", "Figure", "render_plots", "MAX_CONSTELLATION_POINTS", "MAX_LINE_BINS"]

log = logging.getLogger(__name__)

#: Points drawn in the constellation snapshot; longer inputs are thinned evenly.
MAX_CONSTELLATION_POINTS = 4000

#: Line plots with more points are reduced to the minimum and maximum of each of this many bins.
MAX_LINE_BINS = 2000


@dataclass
class PlotData:
    """What the report plots; every field is optional (None = that plot is left out with a note).

    Attributes
    ----------
    spectrum_freq_hz, spectrum_db : array_like of float
        Power spectrum: frequency offset from the centre (Hz) and power (dB), equal lengths.
    constellation : array_like of complex
        Symbol-spaced matched-filter outputs (a few thousand points).
    track_time_s : array_like of float
        Time of each track point, seconds from the start of the recording.
    track_esn0_db, track_carrier_hz : array_like of float
        Es/N0 estimate (dB) and carrier offset (Hz) at each track point.
    track_locked : array_like of bool
        Carrier and symbol lock at each track point.
    frame_status_counts : dict of str to int
        Frames per status (``{"ok": 1200, "rs_uncorrectable": 3}``).
    """

    spectrum_freq_hz: Any = None
    spectrum_db: Any = None
    constellation: Any = None
    track_time_s: Any = None
    track_esn0_db: Any = None
    track_carrier_hz: Any = None
    track_locked: Any = None
    frame_status_counts: Any = None


@dataclass(frozen=True)
class Figure:
    """One plot of the report: ``png`` bytes, or None with ``note`` saying why it is missing."""

    key: str
    title: str
    png: bytes | None
    note: str = ""


class _Missing(Exception):
    """The data for a plot is absent or unusable; the message says which and why."""


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


def _new_figure(width_in: float, height_in: float, rows: int = 1):
    # The object-oriented API with an explicit Agg canvas: no pyplot, no global backend switch,
    # nothing left open between calls.
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure as MplFigure

    fig = MplFigure(figsize=(width_in, height_in), dpi=100, layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(rows, 1, sharex=True, squeeze=False)[:, 0]
    for ax in axes:
        ax.grid(True, alpha=0.3)
    return fig, axes


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return buf.getvalue()


def _plain(text: str) -> str:
    """Label text with mathtext switched off (a ``$`` in a status name must not start a formula)."""
    return str(text).replace("$", r"\$")


def _envelope(x: np.ndarray, y: np.ndarray, bins: int = MAX_LINE_BINS) -> tuple[np.ndarray, np.ndarray]:
    """Thin a long line to the min and max of ``bins`` equal runs of points (peaks stay visible).

    O(n); short inputs are returned unchanged.  NaN points are ignored within a bin.
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
            continue
        idx = np.flatnonzero(ok)
        i_lo, i_hi = idx[np.argmin(seg[ok])], idx[np.argmax(seg[ok])]
        for i in sorted((i_lo, i_hi)):
            xs.append(x[a + i])
            ys.append(seg[i])
    return np.asarray(xs), np.asarray(ys)


def _plot_spectrum(d: PlotData) -> bytes:
    f = _vector(d.spectrum_freq_hz, "spectrum frequency")
    p = _vector(d.spectrum_db, "spectrum power")
    _same_length(f, p, "spectrum frequency and power")
    ok = np.isfinite(f) & np.isfinite(p)
    if not ok.any():
        raise _Missing("spectrum data has no finite values")
    fig, (ax,) = _new_figure(8.0, 3.0)
    scale, unit = (1e-3, "kHz") if np.max(np.abs(f[ok])) < 5e6 else (1e-6, "MHz")
    fx, py = _envelope(f[ok], p[ok])
    ax.plot(fx * scale, py, lw=0.8, color="#1f4e79")
    ax.set_xlabel(f"frequency offset ({unit})")
    ax.set_ylabel("power (dB)")
    return _png(fig)


def _plot_constellation(d: PlotData) -> bytes:
    z = _vector(d.constellation, "constellation", dtype=np.complex128)
    z = z[np.isfinite(z)]
    if z.size == 0:
        raise _Missing("constellation data has no finite values")
    if z.size > MAX_CONSTELLATION_POINTS:
        z = z[np.linspace(0, z.size - 1, MAX_CONSTELLATION_POINTS).astype(np.int64)]
    fig, (ax,) = _new_figure(4.0, 4.0)
    ax.plot(z.real, z.imag, ".", ms=2.0, alpha=0.5, color="#1f4e79")
    lim = 1.1 * float(np.max(np.abs(np.concatenate([z.real, z.imag])))) or 1.0
    ax.set_xlim(-lim, lim)
    ax.set_ylim(-lim, lim)
    ax.set_aspect("equal")
    ax.set_xlabel("in phase")
    ax.set_ylabel("quadrature")
    return _png(fig)


def _plot_tracks(d: PlotData) -> bytes:
    t = _vector(d.track_time_s, "track time")
    series = []
    for value, name, label in ((d.track_esn0_db, "Es/N0", "Es/N0 (dB)"),
                               (d.track_carrier_hz, "carrier offset", "carrier offset (Hz)")):
        if value is None:
            continue
        y = _vector(value, name)
        _same_length(t, y, f"track time and {name}")
        series.append((y, label))
    if not series:
        raise _Missing("no Es/N0 or carrier-offset track")
    fig, axes = _new_figure(8.0, 2.2 * len(series) + 0.6, rows=len(series))
    for ax, (y, label) in zip(axes, series):
        tx, yy = _envelope(t, y)
        ax.plot(tx, yy, lw=0.9, color="#1f4e79")
        ax.set_ylabel(label)
    axes[-1].set_xlabel("time from start of recording (s)")
    return _png(fig)


def _lock_changes(t: np.ndarray, locked: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The points of a lock track where the state changes, plus the first and last point.

    A post-step plot through them is the same as through every point.  O(n).
    """
    keep = np.concatenate([[0], np.flatnonzero(np.diff(locked.astype(np.int8))) + 1, [t.shape[0] - 1]])
    keep = np.unique(keep)
    return t[keep], locked[keep].astype(float)


def _plot_lock(d: PlotData) -> bytes:
    t = _vector(d.track_time_s, "track time")
    locked = _vector(d.track_locked, "lock", dtype=bool)
    _same_length(t, locked, "track time and lock")
    tk, lk = _lock_changes(t, locked)
    fig, (ax,) = _new_figure(8.0, 1.6)
    ax.fill_between(tk, 0, lk, step="post", color="#2e7d32", alpha=0.6, lw=0)
    ax.step(tk, lk, where="post", color="#2e7d32", lw=0.8)
    ax.set_ylim(-0.1, 1.1)
    ax.set_yticks([0, 1], ["lost", "locked"])
    ax.set_xlabel("time from start of recording (s)")
    return _png(fig)


def _plot_frame_status(d: PlotData) -> bytes:
    counts = d.frame_status_counts
    if counts is None:
        raise _Missing("no frame status counts")
    if not isinstance(counts, dict):
        raise _Missing("frame status counts are not a mapping")
    items = []
    for k, v in counts.items():
        try:
            n = float(v)
        except (TypeError, ValueError):
            raise _Missing(f"frame status count for {k!r} is not a number") from None
        if np.isfinite(n):
            items.append((str(k), n))
    if not items:
        raise _Missing("no frames were counted")
    fig, (ax,) = _new_figure(max(4.0, 1.1 * len(items) + 2.0), 3.0)
    labels = [_plain(k) for k, _ in items]
    values = [n for _, n in items]
    colors = ["#2e7d32" if k == "ok" else "#b23b3b" if k in ("rs_uncorrectable", "fecf_error", "bad_header")
              else "#7a7a7a" for k, _ in items]
    bars = ax.bar(range(len(items)), values, color=colors)
    ax.set_xticks(range(len(items)), labels, rotation=20, ha="right")
    ax.bar_label(bars, labels=[f"{int(v)}" if float(v).is_integer() else f"{v:g}" for v in values], fontsize=8)
    ax.set_ylabel("frames")
    return _png(fig)


_PLOTS: tuple[tuple[str, str, Callable[[PlotData], bytes]], ...] = (
    ("spectrum", "Spectrum", _plot_spectrum),
    ("constellation", "Constellation snapshot", _plot_constellation),
    ("tracks", "Es/N0 and carrier offset over time", _plot_tracks),
    ("lock", "Lock timeline", _plot_lock),
    ("frame_status", "Frames by status", _plot_frame_status),
)


def render_plots(plots: PlotData | None) -> list[Figure]:
    """Draw every plot of the report; a plot without usable data is returned with a note instead.

    Notes
    -----
    Each plot is an independent matplotlib figure saved as PNG at 100 dpi.  Missing or
    inconsistent data (None, empty, lengths that differ, no finite value) gives a note naming
    the problem; a failure inside matplotlib is logged and also becomes a note, so the report of
    a long run is never lost to a plot.
    """
    out = []
    data = plots if plots is not None else PlotData()
    for key, title, fn in _PLOTS:
        try:
            out.append(Figure(key, title, fn(data)))
        except _Missing as why:
            out.append(Figure(key, title, None, f"not shown: {why}"))
        except Exception as exc:  # noqa: BLE001 - a plot must never cost the report
            log.warning("report plot %s failed: %s: %s", key, type(exc).__name__, exc)
            out.append(Figure(key, title, None, f"not shown: the plot could not be drawn ({type(exc).__name__})"))
    return out
