"""The report dictionary of a decode run, built from the run's counters.

The decode chain gathers what it counted into a :class:`RunFacts` and calls :func:`build_report`; the
result is what ``report.json`` holds and what ``report.html`` renders, plus the data of its plots.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from types import SimpleNamespace
from typing import Any

import numpy as np

from pipeline.report._plots import PlotData
from pipeline.report._quality import bit_error_estimate, bit_error_series

__all__ = ["CAUTION", "SCHEMA_VERSION", "RunFacts", "build_report"]

#: The caution printed with every decode and in every report (one home for the sentence).
CAUTION = "Decoded data is no substitute for the mission's validated ground segment."

#: Version of the layout of ``report.json``; raised when a key changes meaning or goes away.
#: 2: ``pass.locked_s`` is the time in lock (in 1 it was the span from first to last lock, now ``lock_span_s``).
SCHEMA_VERSION = 2


@dataclass
class RunFacts:
    """Everything a decode run counted, as plain values (the report's only input).

    Attributes
    ----------
    tool : str
        ``"downlink <version>"``.
    profile : LinkProfile
    input_kind : {"iq", "soft", "bits"}
    recording_info : dict
        What the input is (path, format, rate, start, ``time_known``, ``ert_definition``, ...).
    duration_s, elapsed_s : float
        Length of the input and wall time of the decode.
    samples, nonfinite, channel_symbols, locked_symbols, clip_checked, clipped_values : int
        Front-end counts (see :class:`pipeline.chain.FrontCounts`).
    demod_stats : object or None
        The receiver's counters (a :class:`pipeline.demod.DemodStats`, read by its field names: the report room does
        not import the receiver's; None for symbol input): the report takes the
        CW tones it took out (``tones_hz``, the recording's frame), the I/Q image it took out (``iq_image_db``),
        the jumps of the symbols' timing and the carrier's phase the residual-carrier receiver took
        (``timing_jumps``, ``phase_jumps``: samples lost by the recorder, most likely) and the carrier searches
        either receiver started at once because the carrier's frequency jumped (``carrier_moved``).
    stage_stats : dict
        ``{"branch" | "frame_sync" | "codeblock": statistics dataclass}``.
    sync_events, demod_events : list of dict
        Synchronizer events and receiver lock changes, each with a ``position``.
    track : dict of arrays
        ``position`` (samples), ``carrier_hz``, ``esn0_db``, ``locked`` per track point; ``cn0_dbhz``
        (residual carrier's Pc/N0, NaN where none) when the receiver measures it, ``residual_hz`` with an orbit.
    modulation_index_rad : list of float
        Residual-carrier modulation-index estimates.
    position_rate_hz : float
        Positions per second (the sample rate, or the channel bit rate for symbol input), for time axes.
    frames, packets : int
    status_counts : dict of str to int
    accounting, packet_stats : dict
        :meth:`ChannelAccounting.as_dict` and the packet extractor's statistics.
    gaps : list of dict
    ert : callable or None
        Sample position -> ERT string (None when the time is unknown).
    utc_ns : callable or None
        Sample position -> reception time, POSIX nanoseconds (None when the time is unknown); the time
        axis of the plots.
    downlink_frequency_hz : float or None
    spectrum : (freq_hz, power_db) or None
    constellation : array or None
    waterfall : Waterfall or None
        The recording's waterfall (rows of ``waterfall.effective_row_samples`` samples).
    parser_stats : dict
        The frame parser's counters (statuses, verified, header corrections).
    doppler_check : dict or None
        Measured against predicted Doppler (``decode --tle`` / ``--oem``): rows, mean residual, its RMS.
    frame_log : dict of arrays
        One entry per frame (see :class:`pipeline.chain.FrameLog`): ``position``, ``status`` (index into
        ``statuses``), ``rs_corrected``, ``asm_errors``, ``flywheel``, ``clcw_report_value``, ``clcw_flags``.
    """

    tool: str
    profile: Any
    input_kind: str
    recording_info: dict
    duration_s: float
    elapsed_s: float
    samples: int = 0
    nonfinite: int = 0
    clip_checked: int = 0
    clipped_values: int = 0
    demod_stats: Any = None
    channel_symbols: int = 0
    locked_symbols: int = 0
    stage_stats: dict = field(default_factory=dict)
    sync_events: list = field(default_factory=list)
    demod_events: list = field(default_factory=list)
    track: dict = field(default_factory=dict)
    modulation_index_rad: list = field(default_factory=list)
    position_rate_hz: float = 1.0
    frames: int = 0
    packets: int = 0
    status_counts: dict = field(default_factory=dict)
    accounting: dict = field(default_factory=dict)
    packet_stats: dict = field(default_factory=dict)
    gaps: list = field(default_factory=list)
    ert: Any = None
    utc_ns: Callable[[float], int] | None = None
    downlink_frequency_hz: float | None = None
    spectrum: Any = None
    constellation: Any = None
    waterfall: Any = None
    frame_log: dict = field(default_factory=dict)
    parser_stats: dict = field(default_factory=dict)
    doppler_check: dict | None = None


# ---- time -----------------------------------------------------------------------------------


class _Clock:
    """Sample positions -> plot time: UTC seconds since 1970 when the time is known, else seconds from start.

    The position -> UTC map is linear within a capture; it is evaluated exactly at 257 anchors over the
    positions in play and interpolated between them (a capture boundary is blurred over one anchor step,
    1/256 of the span: plots only).  O(n) per call after 257 exact conversions.
    """

    def __init__(self, f: RunFacts, span: tuple[float, float]):
        self.rate = float(f.position_rate_hz) or 1.0
        self.utc = f.utc_ns is not None
        lo, hi = span
        self._anchors = np.linspace(lo, hi, 257) if hi > lo else np.array([lo, lo + 1.0])
        if self.utc:
            self._t = np.array([f.utc_ns(float(a)) for a in self._anchors], dtype=np.float64) * 1e-9
        else:
            self._t = self._anchors / self.rate

    def seconds(self, positions) -> np.ndarray:
        pos = np.asarray(positions, dtype=np.float64)
        if pos.size == 0:
            return pos
        a, t = self._anchors, self._t
        out = np.interp(pos, a, t)
        slope = (t[-1] - t[0]) / (a[-1] - a[0])  # outside the anchors: the same rate, continued
        out = np.where(pos < a[0], t[0] + (pos - a[0]) * slope, out)
        return np.where(pos > a[-1], t[-1] + (pos - a[-1]) * slope, out)


# ---- pieces ---------------------------------------------------------------------------------


def _track_usable(tpos: np.ndarray, locked: np.ndarray) -> np.ndarray:
    """Track points whose Es/N0 and carrier offset describe a locked receiver over a whole, full block.

    A point's lock flags hold at its block's end, so the block was locked throughout only when the
    point before was locked too (the block in which lock was gained is partly noise; the first point of
    the input counts as locked before).  A block too short to measure (the end of a stream) has an Es/N0 of
    nan from the demodulator itself and is left out where Es/N0 is used.
    """
    if tpos.size == 0:
        return locked
    held_before = np.concatenate([[True], locked[:-1]])
    return locked & held_before


def _lock_time(pos: np.ndarray, held: np.ndarray, period: float | None = None) -> tuple[float, int]:
    """``(samples in lock, losses of lock)`` between the first and the last point held.

    Receiver track (``period`` None): each point stands for the interval from the point before it, and a point
    held counts that interval, but the first point held counts nothing (so an unbroken lock gives exactly the
    span from first to last lock).  Frames (``period`` = samples per CADU, positions in order): each frame
    covers ``period`` samples from its position, at most up to the next frame.  A loss is a run of points not
    held (receiver) or a step longer than 1.5 periods between frames (frames missed) inside that span.
    """
    idx = np.flatnonzero(held)
    if idx.size == 0:
        return 0.0, 0
    if period is not None:
        step = np.diff(np.sort(pos[idx]))
        return float(np.minimum(step, period).sum()) + period, int(np.count_nonzero(step > 1.5 * period))
    lo, hi = int(idx[0]), int(idx[-1])
    inside = held[lo:hi + 1]
    losses = int(np.count_nonzero(inside[:-1] & ~inside[1:]))
    return float(np.diff(pos[lo:hi + 1])[inside[1:]].sum()), losses


def _frames_missing(f: RunFacts) -> int:
    """Frames never received, by the frame counters (TM: master channel; AOS: virtual channels).

    A gap's ``unusable_between`` frames were received but failed their checks: they count as failed, not
    as missing.
    """
    kind = "mc" if f.profile.frames.kind == "tm" else "vc"
    return int(sum(max(int(g.get("missing", 0)) - int(g.get("unusable_between", 0)), 0)
                   for g in f.gaps if g.get("kind") == kind))


def _round(v, nd):
    return None if v is None or not np.isfinite(v) else round(float(v), nd)


def _frame_categories(log: dict) -> np.ndarray:
    """Per frame: 0 good, 1 idle, 2 failed, 3 another spacecraft (for the quality strip)."""
    statuses = list(log.get("statuses", []))
    table = np.array([0 if s == "ok" else 1 if s == "idle" else 3 if s == "foreign_scid" else 2 for s in statuses]
                     or [2], dtype=np.int8)
    idx = np.asarray(log.get("status", np.zeros(0, np.int8)), dtype=np.int64)
    return table[idx] if idx.size else idx.astype(np.int8)


@dataclass
class _FrameArrays:
    """The frame log's per-frame arrays (:attr:`RunFacts.frame_log`), taken out once for the verdict, the CLCW
    summary and the plots.

    ``category`` is :func:`_frame_categories`; ``clcw_value`` is -1 where a frame carries no CLCW;
    ``iterations`` the iterative decoder's (-1 where none ran; None when the log has none); ``stride`` is how
    many frames each entry stands for (the log keeps every other one past its size).
    """

    position: np.ndarray
    rs_corrected: np.ndarray
    asm_errors: np.ndarray
    category: np.ndarray
    flywheel: np.ndarray
    clcw_value: np.ndarray
    clcw_flags: np.ndarray
    iterations: np.ndarray | None
    stride: int

    @classmethod
    def of(cls, log: dict) -> _FrameArrays:
        category = _frame_categories(log)
        return cls(position=np.asarray(log.get("position", ()), dtype=np.float64),
                   rs_corrected=np.asarray(log.get("rs_corrected", ()), dtype=np.int64),
                   asm_errors=np.asarray(log.get("asm_errors", ()), dtype=np.int64),
                   category=category,
                   flywheel=np.asarray(log.get("flywheel", np.zeros(category.size, bool)), dtype=bool),
                   clcw_value=np.asarray(log.get("clcw_report_value", ()), dtype=np.int64),
                   clcw_flags=np.asarray(log.get("clcw_flags", ()), dtype=np.int64),
                   iterations=(np.asarray(log["decoder_iterations"], dtype=np.int64)
                               if "decoder_iterations" in log else None),
                   stride=int(log.get("stride", 1)))


def _clcw_summary(frames: _FrameArrays) -> dict | None:
    value = frames.clcw_value
    have = value >= 0
    if not have.any():
        return None
    flags = frames.clcw_flags[have]
    v = value[have]
    return {
        "frames_with_clcw": int(have.sum()),
        "lockout_frames": int(np.count_nonzero(flags & 1)),
        "wait_frames": int(np.count_nonzero(flags & 2)),
        "retransmit_frames": int(np.count_nonzero(flags & 4)),
        "no_rf_available_frames": int(np.count_nonzero(flags & 8)),
        "no_bit_lock_frames": int(np.count_nonzero(flags & 16)),
        "report_value_first": int(v[0]),
        "report_value_last": int(v[-1]),
        "report_value_changes": int(np.count_nonzero(np.diff(v))),
        "frames_sampled_every": frames.stride,
    }


#: What the report reads of a run without receiver counters (symbol input): no tones, image or jumps.
_NO_DEMOD_STATS = SimpleNamespace(tones_hz=[], iq_image_db=None, timing_jumps=0, phase_jumps=0, carrier_moved=0)


def _pass_verdict(f: RunFacts, *, tpos, esn0, carrier, usable, locked, clock, frames: _FrameArrays, ber,
                  rate) -> dict:
    """The ``pass`` object: what an operator reads first."""
    p = f.profile
    fpos = frames.position
    if locked.any():
        source = "receiver"
        first_pos, last_pos = float(tpos[locked][0]), float(tpos[locked][-1])
        resolution = float(np.median(np.diff(tpos))) / clock.rate if tpos.size > 1 else None
        in_lock, losses = _lock_time(tpos, locked)
    elif f.input_kind != "iq" and fpos.size:
        # channel-symbol input has no receiver: the frame synchronizer's first and last frame
        source = "frame synchronizer"
        cadu = p.samples_per_cadu(clock.rate)
        first_pos, last_pos = float(fpos[0]), float(fpos[-1] + cadu)
        resolution = cadu / clock.rate
        in_lock, losses = _lock_time(fpos, np.ones(fpos.shape, bool), cadu)
    else:
        source, first_pos, last_pos, resolution, in_lock, losses = None, None, None, None, None, None
    good = esn0[usable & np.isfinite(esn0)]
    good_carrier = carrier[usable & np.isfinite(carrier)]
    status = dict(f.status_counts)
    ok, idle = status.get("ok", 0), status.get("idle", 0)
    time_known = f.ert is not None
    verdict = {
        "first_lock_utc": f.ert(first_pos) if time_known and first_pos is not None else None,
        "last_lock_utc": f.ert(last_pos) if time_known and last_pos is not None else None,
        "first_lock_s": _round(None if first_pos is None else first_pos / clock.rate, 6),
        "last_lock_s": _round(None if last_pos is None else last_pos / clock.rate, 6),
        "locked_s": _round(None if in_lock is None else in_lock / clock.rate, 6),
        "lock_span_s": _round(None if first_pos is None else (last_pos - first_pos) / clock.rate, 6),
        "lock_losses": losses,
        "lock_source": source,
        "lock_resolution_s": _round(resolution, 6),
        "packets": f.packets,
        "packets_missing": int(f.packet_stats.get("sequence_missing", 0)),
        "frames_ok": ok,
        "frames_failed": f.frames - ok - idle,
        "frames_failed_flywheel": int(np.count_nonzero((frames.category == 2) & frames.flywheel)) * frames.stride,
        "frames_missing": _frames_missing(f),
        "frames_idle": idle,
        "esn0_db_mean": _round(10 * np.log10(np.mean(10 ** (good / 10))), 2) if good.size else None,
        "esn0_db_min": _round(np.min(good), 2) if good.size else None,
        "esn0_db_max": _round(np.max(good), 2) if good.size else None,
        "carrier_offset_hz_min": _round(np.min(good_carrier), 1) if good_carrier.size else None,
        "carrier_offset_hz_max": _round(np.max(good_carrier), 1) if good_carrier.size else None,
        "bit_error_rate": None if ber is None or ber.estimate is None else float(f"{ber.estimate:.3g}"),
        "bit_error_rate_of": None if ber is None else ber.applies_to,
        "time_known": time_known,
        "ert_definition": f.recording_info.get("ert_definition"),
    }
    cn0 = np.asarray(f.track.get("cn0_dbhz", ()), dtype=np.float64)
    if cn0.size == usable.size and cn0.size:
        # residual carrier: Pc/N0 over the blocks used for Es/N0 (mean of the power ratio)
        good_cn0 = cn0[usable & np.isfinite(cn0)]
        verdict["carrier_cn0_dbhz_mean"] = (_round(10 * np.log10(np.mean(10 ** (good_cn0 / 10))), 2)
                                            if good_cn0.size else None)
        verdict["carrier_cn0_dbhz_min"] = _round(np.min(good_cn0), 2) if good_cn0.size else None
    if f.doppler_check and f.doppler_check.get("note"):
        verdict["doppler_note"] = f.doppler_check["note"]
    d = f.demod_stats or _NO_DEMOD_STATS
    if d.tones_hz:
        listed = ", ".join(f"{t:+.0f} Hz" for t in sorted(d.tones_hz))
        verdict["tones_note"] = (f"CW tone{'s' if len(d.tones_hz) > 1 else ''} at {listed} (a spur or an interferer in "
                                 "the band) taken out of the samples before demodulation")
    if d.iq_image_db is not None:
        verdict["iq_note"] = (f"the receiver's I and Q paths were out of balance: the signal's mirror image stood "
                              f"{-d.iq_image_db:.1f} dB under it, taken out of the samples before demodulation")
    if d.timing_jumps or d.phase_jumps or d.carrier_moved:
        def times(k: int) -> str:
            return "once" if k == 1 else f"{k} times"
        what = [f"the symbols moved by a fraction of a symbol period at once {times(d.timing_jumps)}"] \
            if d.timing_jumps else []
        what += [f"the carrier's phase jumped {times(d.phase_jumps)}"] if d.phase_jumps else []
        why = ["samples lost by the recorder, most likely"] if what else []
        if d.carrier_moved:
            what += [f"the carrier's frequency jumped {times(d.carrier_moved)}"]
            why += ["a transponder switching between coherent and one-way, a receiver retuned"]
        verdict["jumps_note"] = (f"{', '.join(what[:-1]) + ' and ' if len(what) > 1 else ''}{what[-1]} "
                                 f"({'; '.join(why)}); the receiver took each at once, and the frames around it "
                                 "are lost")
    if rate is not None:
        verdict["symbol_rate_note"] = (
            f"{rate[0]:,.2f} symbols per second from the spacing of the frame markers over {rate[2]} CADUs, "
            f"{rate[1]:+.2f} ppm from the profile's {f.profile.link.symbol_rate_baud:,.0f}: the spacecraft's symbol "
            "clock, the Doppler (the range rate over the speed of light) and the recording's sample clock together"
            + ("" if rate[3] is None else
               f"; less the orbit's predicted Doppler ({rate[3]:+.2f} ppm), {_less_doppler_ppm(rate[1], rate[3]):+.2f}"
               " ppm: the spacecraft's symbol clock and the recording's sample clock"))
    clipped = _clipped_fraction(f)
    if clipped:
        verdict["clipping_note"] = (
            f"{100 * clipped:.3g} % of the samples' real and imaginary parts sit at the recording's rails: the "
            "receiver's input was clipped (its gain too high for the signal); Es/N0 then reads high, and the data "
            "lost part of its margin")
    return verdict


def _clipped_fraction(f: RunFacts) -> float | None:
    """Values at clipped rails per value looked at (``FrontCounts``); None when nothing was looked at."""
    if not f.clip_checked:
        return None
    return round(f.clipped_values / (2 * f.clip_checked), 5)


#: Frame-marker spacings more than this fraction from the nominal CADU (samples lost or inserted by the recorder, a
#: re-acquisition), or more than half a symbol period off the median spacing over the CADUs they span (a symbol
#: slipped), break the runs the symbol rate is fitted over; at least ``_RATE_MIN_CADUS`` CADUs of runs are needed.
_RATE_FAR = 2e-3
_RATE_MIN_CADUS = 10


def measured_symbol_rate(position: np.ndarray, marker_found: np.ndarray, cadu_samples: float,
                         symbol_samples: float) -> tuple[float, int] | None:
    """The spacing of the frame markers, samples per CADU, and the CADUs it was measured over (None when fewer than
    ``_RATE_MIN_CADUS``).

    Parameters
    ----------
    position : float array
        The frames' marker positions (samples, increasing; a thinned log's entries are fine).
    marker_found : bool array
        Frames whose marker was found (verified frames, not flywheel ones).
    cadu_samples : float
        The nominal CADU length in samples (:meth:`~pipeline.profile.LinkProfile.samples_per_cadu`).
    symbol_samples : float
        The nominal symbol period in samples.

    Notes
    -----
    Consecutive found markers ``p_i, p_{i+1}`` are ``k_i = round((p_{i+1} - p_i) / C)`` CADUs apart.  A pair whose
    mean spacing is more than ``_RATE_FAR`` from ``C`` (samples lost or inserted, a re-acquisition), or whose
    spacing is more than half a symbol period off ``k_i`` times the median spacing (a symbol slipped), ends a run;
    over the runs, ``p = a_run + s n`` with ``n`` the CADU index is fitted by least squares (one slope, an
    intercept per run), so a marker's jitter (a few hundredths of a sample) and a first marker still settling count
    as in a straight-line fit, over a baseline of the whole pass.  The symbol rate is the profile's times ``C / s``;
    measured against the recording's sample clock, it holds the spacecraft's symbol clock, the Doppler's time
    compression (``-v / c``: 25 ppm at 7.5 km/s) and the recorder's clock error together.
    """
    p = np.asarray(position, dtype=np.float64)[np.asarray(marker_found, dtype=bool)]
    if p.size < 2 or not cadu_samples > 0:
        return None
    diff = np.diff(p)
    k = np.rint(diff / cadu_samples)
    ok = k >= 1
    spacing = diff / np.maximum(k, 1.0)
    ok &= np.abs(spacing / cadu_samples - 1.0) < _RATE_FAR
    if not ok.any():
        return None
    median = float(np.median(spacing[ok]))
    ok &= np.abs(diff - k * median) < 0.5 * symbol_samples
    n = np.concatenate([[0.0], np.cumsum(np.where(ok, k, 0.0))])  # CADU index within the runs
    run = np.concatenate([[0], np.cumsum(~ok)])  # a new run after each pair left out
    counts = np.bincount(run)
    n_mean = np.bincount(run, n) / counts
    p_mean = np.bincount(run, p) / counts
    dn = n - n_mean[run]
    sxx = float(np.sum(dn * dn))
    cadus = int(np.sum(np.where(ok, k, 0.0)))
    if cadus < _RATE_MIN_CADUS or sxx <= 0.0:
        return None
    return float(np.sum(dn * (p - p_mean[run])) / sxx), cadus


def _symbol_rate(f: RunFacts, frames: _FrameArrays, clock) -> tuple[float, float, int, float | None] | None:
    """IQ input: the symbol rate measured on the frame markers (:func:`measured_symbol_rate`), its offset from the
    profile's (ppm), the CADUs it spans, and with an orbit the Doppler's part of that offset (ppm: the mean predicted
    one-way Doppler over the markers' span over the downlink frequency, ``-v / c``; None without); None otherwise."""
    if f.input_kind != "iq" or not frames.position.size:
        return None
    cadu = f.profile.samples_per_cadu(clock.rate)
    symbol = clock.rate / f.profile.link.symbol_rate_baud
    found = (frames.category <= 1) & ~frames.flywheel
    got = measured_symbol_rate(frames.position, found, cadu, symbol)
    if got is None:
        return None
    ratio = cadu / got[0]
    doppler_ppm = None
    predicted = np.asarray(f.track.get("predicted_hz", ()), dtype=np.float64)
    tpos = np.asarray(f.track.get("position", ()), dtype=np.float64)
    if predicted.size == tpos.size and predicted.size and f.downlink_frequency_hz:
        p = frames.position[found]
        inside = (tpos >= p.min()) & (tpos <= p.max()) & np.isfinite(predicted)
        if inside.any():
            doppler_ppm = float(np.mean(predicted[inside])) / float(f.downlink_frequency_hz) * 1e6
    return f.profile.link.symbol_rate_baud * ratio, (ratio - 1.0) * 1e6, got[1], doppler_ppm


def _less_doppler_ppm(offset_ppm: float, doppler_ppm: float) -> float:
    """The offset with the Doppler's time compression divided out (ppm)."""
    return ((1.0 + offset_ppm * 1e-6) / (1.0 + doppler_ppm * 1e-6) - 1.0) * 1e6


def _frames_while_locked(fpos: np.ndarray, tpos: np.ndarray, locked: np.ndarray) -> np.ndarray:
    """Frames received while the receiver held lock: the first track point at or after a frame is locked.

    Without a receiver track (channel-symbol input) every frame counts.  O(frames log track points).
    """
    if tpos.size == 0:
        return np.ones(fpos.shape, bool)
    idx = np.minimum(np.searchsorted(tpos, fpos, side="left"), tpos.size - 1)
    return locked[idx]


def build_report(f: RunFacts) -> tuple[dict, PlotData]:
    """The report dictionary and the plot data of one run.

    Sections, in this order: ``schema_version``; ``pass`` (the verdict: lock window, packets and frames
    delivered, failed and missing, Es/N0 and carrier offset while locked, the bit error rate estimate,
    the ERT definition); ``bit_error_rate`` (the estimator and its counts); ``clcw`` (when frames carry
    one); ``virtual_channels``, ``gaps``, ``apids``; then the details: ``summary``, ``recording``,
    ``profile``, ``demod``, ``sync`` (stage counters), ``frames``, ``master_channel``, ``packets``,
    ``events`` (synchronizer and receiver events in stream order, with their ERT).

    Notes
    -----
    Es/N0 and carrier offset are taken only from track points whose whole block was locked (carrier and
    symbols) and that cover a full block (:func:`_track_usable`); the mean Es/N0 is that of the power ratio.
    The bit error rate counts the frames received while the receiver held lock
    (:mod:`pipeline.report._quality` gives the estimators).  Cost: O(track points + frames).
    """
    p = f.profile
    iq = f.input_kind == "iq"
    tpos = np.asarray(f.track.get("position", ()), dtype=np.float64)
    esn0 = np.asarray(f.track.get("esn0_db", ()), dtype=np.float64)
    carrier = np.asarray(f.track.get("carrier_hz", ()), dtype=np.float64)
    locked = np.asarray(f.track.get("locked", ()), dtype=bool)
    usable = _track_usable(tpos, locked)
    frames = _FrameArrays.of(f.frame_log or {})
    fpos, rs, asm = frames.position, frames.rs_corrected, frames.asm_errors
    span_hi = max([f.duration_s * f.position_rate_hz, *(x.max() for x in (tpos, fpos) if x.size)])
    clock = _Clock(f, (0.0, float(span_hi)))

    counted = _frames_while_locked(fpos, tpos, locked)
    rs_e = p.coding.reed_solomon
    ber_kw = dict(codeblock_octets=p.codeblock_bytes, rs_e=rs_e)
    conv = p.coding.convolutional != "none"
    ber = bit_error_estimate(rs[counted], asm[counted], convolutional=conv, **ber_kw) if fpos.size else None

    lock_fraction = f.locked_symbols / f.channel_symbols if iq and f.channel_symbols else None
    good_esn0 = esn0[usable & np.isfinite(esn0)]
    ds = f.demod_stats or _NO_DEMOD_STATS
    rate = _symbol_rate(f, frames, clock)
    demod = {
        "input": f.input_kind,
        "lock_fraction": None if lock_fraction is None else round(lock_fraction, 4),
        "esn0_db_median": round(float(np.median(good_esn0)), 2) if len(good_esn0) else None,
        "carrier_offset_hz_first": round(float(carrier[usable][0]), 1) if usable.any() else None,
        "carrier_offset_hz_last": round(float(carrier[usable][-1]), 1) if usable.any() else None,
        "nonfinite_samples": f.nonfinite,
        "clipped_fraction": _clipped_fraction(f),
        "channel_symbols": f.channel_symbols,
        **({"tones_removed_hz": [round(t, 1) for t in sorted(ds.tones_hz)]} if ds.tones_hz else {}),
        **({"iq_image_removed_db": round(ds.iq_image_db, 1)} if ds.iq_image_db is not None else {}),
        **({"timing_jumps": ds.timing_jumps} if ds.timing_jumps else {}),
        **({"phase_jumps": ds.phase_jumps} if ds.phase_jumps else {}),
        **({"carrier_moves": ds.carrier_moved} if ds.carrier_moved else {}),
    }
    if f.modulation_index_rad:
        demod["modulation_index_rad_median"] = round(float(np.median(f.modulation_index_rad)), 4)
    if rate is not None:
        demod["symbol_rate_measured_baud"] = round(rate[0], 4)
        demod["symbol_rate_offset_ppm"] = round(rate[1], 3)
        demod["symbol_rate_cadus"] = rate[2]
        if rate[3] is not None:
            demod["symbol_rate_doppler_ppm"] = round(rate[3], 3)
            demod["symbol_rate_offset_less_doppler_ppm"] = round(_less_doppler_ppm(rate[1], rate[3]), 3)
    if f.downlink_frequency_hz:
        demod["downlink_frequency_hz"] = f.downlink_frequency_hz
    if iq:
        demod["doppler_file"] = "doppler.csv"
        if not locked.any():
            demod["note"] = "no lock was found: no carrier or symbol lock anywhere in the recording"
    sync_stats = {}
    for stage_name, stats in f.stage_stats.items():
        for k, v in stats.as_dict().items():
            sync_stats[f"{stage_name}.{k}"] = v
    events = []
    for e in sorted([*f.demod_events, *f.sync_events], key=lambda e: float(e.get("sample_position", 0.0))):
        e = dict(e)
        if "sample_position" in e and f.ert is not None:
            e["ert"] = f.ert(float(e["sample_position"]))
        events.append(e)
    clcw = _clcw_summary(frames) if p.frames.ocf else None
    report: dict = {
        "schema_version": SCHEMA_VERSION,
        "pass": _pass_verdict(f, tpos=tpos, esn0=esn0, carrier=carrier, usable=usable, locked=locked, clock=clock,
                              frames=frames, ber=ber, rate=rate),
        "bit_error_rate": None if ber is None else {
            **ber.as_dict(),
            "estimator": ("Reed-Solomon: p = 1 - (1 - s/N)^(1/8) from s octets corrected among N received, "
                          "independent bit errors assumed; a failed codeblock counts E + 1 octets (the figure is "
                          "then a lower bound); bursts of errors put several wrong bits in one octet, so the rate "
                          "lies between the estimate and s/N" if ber.method == "reed_solomon" else
                          "ASM: wrong bits among the 32 known bits of each frame's marker; frames whose marker had "
                          "more wrong bits than the synchronizer accepts are missed, so the figure is low"),
            "frames_counted": "frames received while the receiver held lock",
        },
    }
    if clcw is not None:
        report["clcw"] = clcw
    report.update({
        "virtual_channels": f.accounting.get("virtual_channels", []),
        "gaps": f.gaps,
        "apids": f.packet_stats.get("apids", []),
        "summary": {
            "tool": f.tool,
            "caution": CAUTION,
            "profile": p.name,
            "input": f.input_kind,
            "duration_s": round(f.duration_s, 6),
            "elapsed_s": round(f.elapsed_s, 3),
            "realtime_factor": round(f.duration_s / f.elapsed_s, 2) if f.elapsed_s > 0 else None,
            "samples": f.samples,
            "frames": f.frames,
            "frames_ok": f.status_counts.get("ok", 0),
            "frames_idle": f.status_counts.get("idle", 0),
            "packets": f.packets,
            "gaps": len(f.gaps),
        },
        "recording": f.recording_info,
        "profile": {
            "modulation": p.link.modulation, "symbol_rate_baud": p.link.symbol_rate_baud,
            "pulse": p.link.pulse, "rolloff": p.link.rolloff, "line_code": p.link.line_code,
            "convolutional": p.coding.convolutional, "reed_solomon_e": p.coding.reed_solomon,
            "interleave": p.coding.interleave, "randomizer": p.coding.randomizer,
            "frame_kind": p.frames.kind, "frame_length": p.frames.length, "fecf": p.frames.fecf,
            "ocf": p.frames.ocf, "spacecraft_id": p.frames.spacecraft_id,
        },
        "demod": demod,
        "sync": sync_stats,
        "frames": {"status_counts": dict(f.status_counts), **({"checks": f.parser_stats} if f.parser_stats else {})},
        "master_channel": {k: v for k, v in f.accounting.items() if k != "virtual_channels"},
        "packets": {k: v for k, v in f.packet_stats.items() if k != "apids"},
        "events": events,
    })
    if f.doppler_check is not None:
        report["doppler_check"] = f.doppler_check
    return report, _plot_data(f, clock, tpos=tpos, esn0=esn0, carrier=carrier, usable=usable, locked=locked,
                              frames=frames, counted=counted, ber_kw=ber_kw, ocf=clcw is not None)


def _max_iterations(p) -> int:
    """The iteration limit of the link's iterative decoder (LDPC or turbo); 0 without one."""
    c = p.coding
    if c.turbo != "none":
        return int(c.turbo_max_iterations)
    if c.ldpc != "none":
        return int(c.ldpc_max_iterations)
    return 0


def _iterations(frames: _FrameArrays, p) -> np.ndarray | None:
    """Decoder iterations per frame (-1 where none ran), or None on links without an iterative decoder."""
    return frames.iterations if _max_iterations(p) else None


def _plot_data(f: RunFacts, clock: _Clock, *, tpos, esn0, carrier, usable, locked, frames: _FrameArrays, counted,
               ber_kw, ocf) -> PlotData:
    p = f.profile
    fpos, rs, asm = frames.position, frames.rs_corrected, frames.asm_errors
    ft = clock.seconds(fpos)
    series = bit_error_series(ft[counted], rs[counted], asm[counted], **ber_kw) if fpos.size else None
    wf_t = wf_f = wf_db = None
    if f.waterfall is not None:
        rows, db = f.waterfall.result()
        if rows.size:
            row = f.waterfall.effective_row_samples
            dense = np.full((int(rows[-1] - rows[0]) + 1, db.shape[1]), np.nan, dtype=np.float32)
            dense[rows - rows[0]] = db
            wf_db = dense
            wf_t = clock.seconds(np.arange(rows[0], rows[-1] + 2, dtype=np.float64) * row)  # row edges
            nfft = db.shape[1]
            wf_f = (np.arange(nfft) - nfft // 2) * (clock.rate / nfft)
    counter = "mc" if p.frames.kind == "tm" else "vc"
    gap_spans = [(float(g["after_sample_position"]), float(g["sample_position"])) for g in f.gaps
                 if g.get("kind") == counter and g.get("after_sample_position") is not None
                 and int(g.get("missing", 0)) > int(g.get("unusable_between", 0))]
    frame_s = p.samples_per_cadu(clock.rate) / clock.rate
    clcw_value = frames.clcw_value
    return PlotData(
        time_is_utc=clock.utc,
        span_s=(float(clock.seconds([0.0])[0]), float(clock.seconds([f.duration_s * clock.rate])[0])),
        spectrum_freq_hz=None if f.spectrum is None else f.spectrum[0],
        spectrum_db=None if f.spectrum is None else f.spectrum[1],
        constellation=f.constellation,
        waterfall_time_s=wf_t, waterfall_freq_hz=wf_f, waterfall_db=wf_db,
        track_time_s=clock.seconds(tpos) if tpos.size else None,
        track_esn0_db=np.where(usable, esn0, np.nan) if tpos.size else None,
        track_carrier_hz=np.where(usable, carrier, np.nan) if tpos.size else None,
        track_locked=locked if tpos.size else None,
        track_doppler_residual_hz=(np.where(usable, np.asarray(f.track["residual_hz"], np.float64), np.nan)
                                   if tpos.size and "residual_hz" in f.track else None),
        frame_time_s=ft if fpos.size else None,
        frame_duration_s=frame_s,
        frame_category=frames.category if fpos.size else None,
        frame_rs_corrected=rs if fpos.size and p.coding.reed_solomon else None,
        frame_rs_max=p.coding.reed_solomon * p.coding.interleave,
        frame_asm_errors=asm if fpos.size else None,
        frame_iterations=_iterations(frames, p) if fpos.size else None,
        frame_iterations_max=_max_iterations(p),
        frame_flywheel=frames.flywheel if fpos.size else None,
        missing_spans_s=[tuple(clock.seconds(list(s))) for s in gap_spans],
        ber_time_s=None if series is None else series["time_s"],
        ber_estimate=None if series is None else series["estimate"],
        ber_upper=None if series is None else series["upper"],
        ber_zero=None if series is None else series["zero"],
        ber_lower_bound=None if series is None else series["lower_bound"],
        clcw_time_s=ft[clcw_value >= 0] if ocf else None,
        clcw_report_value=clcw_value[clcw_value >= 0] if ocf else None,
        clcw_flags=frames.clcw_flags[clcw_value >= 0] if ocf else None,
    )
