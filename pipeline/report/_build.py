"""The report dictionary of a decode run, built from the run's counters.

The decode chain gathers what it counted into a :class:`RunFacts` and calls :func:`build_report`; the
result is what ``report.json`` holds and what ``report.html`` renders, plus the data of its plots.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from pipeline.report._plots import PlotData

__all__ = ["CAUTION", "RunFacts", "build_report"]

#: The caution printed with every decode and in every report (one home for the sentence).
CAUTION = "Decoded data is no substitute for the mission's validated ground segment."


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
        What the input is (path, format, rate, start, ...).
    duration_s, elapsed_s : float
        Length of the input and wall time of the decode.
    samples, nonfinite, channel_symbols, locked_symbols : int
        Front-end counts (see :class:`pipeline.chain.FrontCounts`).
    stage_stats : dict
        ``{"branch" | "frame_sync" | "codeblock": statistics dataclass}``.
    sync_events, demod_events : list of dict
        Synchronizer events and receiver lock changes, each with a ``position``.
    track : dict of arrays
        ``position`` (samples), ``carrier_hz``, ``esn0_db``, ``locked`` per track point.
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
    downlink_frequency_hz: float | None = None
    spectrum: Any = None
    constellation: Any = None
    waterfall: Any = None
    frame_log: dict = field(default_factory=dict)
    parser_stats: dict = field(default_factory=dict)
    doppler_check: dict | None = None


def build_report(f: RunFacts) -> tuple[dict, PlotData]:
    """The report dictionary and the plot data of one run.

    Sections: ``summary``, ``recording``, ``profile``, ``demod``, ``sync`` (stage counters),
    ``frames``, ``virtual_channels``, ``master_channel``, ``packets``, ``apids``, ``gaps``, ``events``
    (synchronizer and receiver events in stream order, with their ERT).
    """
    p = f.profile
    iq = f.input_kind == "iq"
    tpos = np.asarray(f.track.get("position", ()), dtype=np.float64)
    esn0 = np.asarray(f.track.get("esn0_db", ()), dtype=np.float64)
    carrier = np.asarray(f.track.get("carrier_hz", ()), dtype=np.float64)
    locked = np.asarray(f.track.get("locked", ()), dtype=bool)
    lock_fraction = f.locked_symbols / f.channel_symbols if iq and f.channel_symbols else None
    good_esn0 = esn0[locked & np.isfinite(esn0)] if len(esn0) else esn0
    demod = {
        "input": f.input_kind,
        "lock_fraction": None if lock_fraction is None else round(lock_fraction, 4),
        "esn0_db_median": round(float(np.median(good_esn0)), 2) if len(good_esn0) else None,
        "carrier_offset_hz_first": round(float(carrier[locked][0]), 1) if locked.any() else None,
        "carrier_offset_hz_last": round(float(carrier[locked][-1]), 1) if locked.any() else None,
        "nonfinite_samples": f.nonfinite,
        "channel_symbols": f.channel_symbols,
    }
    if f.modulation_index_rad:
        demod["modulation_index_rad_median"] = round(float(np.median(f.modulation_index_rad)), 4)
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
    for e in sorted([*f.demod_events, *f.sync_events], key=lambda e: float(e.get("position", 0.0))):
        e = dict(e)
        if "position" in e and f.ert is not None:
            e["ert"] = f.ert(float(e["position"]))
        events.append(e)
    report = {
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
        "virtual_channels": f.accounting.get("virtual_channels", []),
        "master_channel": {k: v for k, v in f.accounting.items() if k != "virtual_channels"},
        "packets": {k: v for k, v in f.packet_stats.items() if k != "apids"},
        "apids": f.packet_stats.get("apids", []),
        "gaps": f.gaps,
        "events": events,
    }
    if f.doppler_check is not None:
        report["doppler_check"] = f.doppler_check
    t = tpos / f.position_rate_hz
    plots = PlotData(
        spectrum_freq_hz=None if f.spectrum is None else f.spectrum[0],
        spectrum_db=None if f.spectrum is None else f.spectrum[1],
        constellation=f.constellation,
        track_time_s=t if len(t) else None,
        track_esn0_db=esn0 if len(esn0) else None,
        track_carrier_hz=carrier if len(carrier) else None,
        track_locked=locked if len(locked) else None,
        frame_status_counts=dict(f.status_counts),
    )
    return report, plots
