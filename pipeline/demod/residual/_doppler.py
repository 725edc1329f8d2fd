"""Doppler observables: the carrier loop's frequency track as time-tagged rows (``doppler.csv``)."""

from __future__ import annotations

import csv
import math
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Any

__all__ = ["DOPPLER_COLUMNS", "SPEED_OF_LIGHT_M_PER_S", "doppler_rows", "range_rate_from_doppler",
           "doppler_from_range_rate", "write_doppler_csv"]

#: Speed of light in vacuum, m/s (exact by the SI definition of the metre).
SPEED_OF_LIGHT_M_PER_S = 299_792_458.0

#: Column names of :func:`doppler_rows` / ``doppler.csv``, in order.
DOPPLER_COLUMNS = ("utc", "sample_position", "carrier_offset_hz", "carrier_std_hz", "locked", "range_rate_m_per_s",
                   "range_rate_std_m_per_s")


def range_rate_from_doppler(doppler_hz: float, downlink_frequency_hz: float) -> float:
    """One-way range rate ``v = -c f_d / f`` (m/s, positive = receding) from a Doppler shift ``f_d``.

    First-order one-way Doppler ``f_d = -f v / c`` (REFERENCES.md sec. 9, formula from memory; the
    relativistic terms are below 1e-8 of ``f_d`` for ``v`` < 3 km/s).
    """
    f = float(downlink_frequency_hz)
    if not (math.isfinite(f) and f > 0):
        raise ValueError(f"Argument 'downlink_frequency_hz' must be a positive finite number, "
                         f"not {downlink_frequency_hz!r}.")
    return -SPEED_OF_LIGHT_M_PER_S * float(doppler_hz) / f


def doppler_from_range_rate(range_rate_m_per_s: float, downlink_frequency_hz: float) -> float:
    """One-way Doppler ``f_d = -f v / c`` (Hz) of a range rate ``v`` (m/s, positive = receding)."""
    f = float(downlink_frequency_hz)
    if not (math.isfinite(f) and f > 0):
        raise ValueError(f"Argument 'downlink_frequency_hz' must be a positive finite number, "
                         f"not {downlink_frequency_hz!r}.")
    return -f * float(range_rate_m_per_s) / SPEED_OF_LIGHT_M_PER_S


def doppler_rows(track_points: Iterable[Any], utc_ns: Callable[[float], int] | Any,
                 downlink_frequency_hz: float | None = None, *, tuning_offset_hz: float = 0.0) -> list[dict]:
    """Time-tagged carrier-frequency rows from demodulator track points.

    Parameters
    ----------
    track_points : iterable of TrackPoint
        From :class:`ResidualCarrierDemodulator` (with ``carrier_std_hz``) or the suppressed-carrier
        :class:`pipeline.demod.Demodulator` (then the std is ``None``).
    utc_ns : callable or object with ``utc_ns`` or ``received_tai_ns``
        Sample position -> integer UTC nanoseconds (POSIX count, ``Recording.utc_ns``), or an object whose
        ``received_tai_ns(position)`` gives TAI nanoseconds (:class:`pipeline.chain.ErtClock`): then the
        ``utc`` text is formatted from TAI, and an instant in a leap second reads ``23:59:60.x`` (the POSIX
        count has no such second: its rows there would all read ``23:59:59.999999999``).
    downlink_frequency_hz : float, optional
        Nominal downlink carrier frequency ``f``; when given, the range rate is added.
    tuning_offset_hz : float
        Recording centre frequency minus ``f`` (0 when the recording is tuned to the nominal
        frequency): the Doppler shift is ``f_d = carrier_offset_hz + tuning_offset_hz``.

    Returns
    -------
    list of dict
        One per track point, keys :data:`DOPPLER_COLUMNS`: ``utc`` ("YYYY-MM-DDTHH:MM:SS.nnnnnnnnnZ"),
        ``position`` (samples), ``carrier_offset_hz``, ``carrier_std_hz`` (or None), ``locked``
        (carrier lock), ``range_rate_m_per_s`` and ``range_rate_std_m_per_s`` (``v = -c f_d / f``;
        None without ``f``).  Values are rounded to 1e-6 Hz and 1e-6 m/s.

    Notes
    -----
    The carrier offset is the receiver's mean carrier frequency over the block around ``position``
    relative to the recording's centre frequency; it is the one-way Doppler only when the
    spacecraft oscillator is on its nominal frequency (a one-way link).
    """
    from pipeline.packets import format_ert
    from pipeline.timescales import format_utc

    to_tai = getattr(utc_ns, "received_tai_ns", None)
    to_ns = getattr(utc_ns, "utc_ns", utc_ns)
    if to_tai is not None:
        def text(pos: float) -> str:
            return format_utc(int(to_tai(pos)))
    elif callable(to_ns):
        def text(pos: float) -> str:
            return format_ert(int(to_ns(pos)))
    else:
        raise TypeError(f"Argument 'utc_ns' must be callable or have a 'utc_ns' method, not {type(utc_ns).__name__}.")
    if downlink_frequency_hz is not None:
        f = float(downlink_frequency_hz)
        if not (math.isfinite(f) and f > 0):
            raise ValueError(f"Argument 'downlink_frequency_hz' must be a positive finite number or None, "
                             f"not {downlink_frequency_hz!r}.")
    rows = []
    for tp in track_points:
        pos = float(tp.position)
        off = float(tp.carrier_offset_hz)
        std = getattr(tp, "carrier_std_hz", None)
        std = float(std) if std is not None and math.isfinite(float(std)) else None
        row = {
            "utc": text(pos),
            "sample_position": round(pos, 3),
            "carrier_offset_hz": round(off, 6) if math.isfinite(off) else None,
            "carrier_std_hz": None if std is None else round(std, 6),
            "locked": bool(tp.carrier_locked),
            "range_rate_m_per_s": None,
            "range_rate_std_m_per_s": None,
        }
        if downlink_frequency_hz is not None and math.isfinite(off):
            row["range_rate_m_per_s"] = round(range_rate_from_doppler(off + tuning_offset_hz, downlink_frequency_hz), 6)
            if std is not None:
                row["range_rate_std_m_per_s"] = round(SPEED_OF_LIGHT_M_PER_S * std / float(downlink_frequency_hz), 6)
        rows.append(row)
    return rows


def write_doppler_csv(path: str | Path, rows: Iterable[dict]) -> Path:
    """Write rows of :func:`doppler_rows` as CSV with a header of :data:`DOPPLER_COLUMNS` (None -> empty)."""
    path = Path(path)
    with open(path, "w", encoding="utf-8", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(DOPPLER_COLUMNS)
        for r in rows:
            w.writerow(["" if r.get(c) is None else (int(r[c]) if isinstance(r[c], bool) else r[c])
                        for c in DOPPLER_COLUMNS])
    return path
