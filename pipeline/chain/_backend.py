"""The back end of the decode chain: decoded frames in, frame records, packets and sinks out.

::

    DecodedFrame -> FrameParser -> ChannelAccounting -> PacketExtractor -> sinks
    TrackPoint   -> track log (report, Es/N0 per frame), lock events, doppler.csv rows

The back end is fed in stream order: by a :class:`~pipeline.chain.FrontEnd` directly, or by the merge
of a segmented decode.  Time stays a sample position until a record is written; then the time base
turns it into UTC.
"""

from __future__ import annotations

import bisect
import math
from dataclasses import dataclass, field

import numpy as np

from pipeline.profile import LinkProfile

__all__ = ["BackEnd", "FrameLog", "TrackLog", "sample_keys"]

#: Entries above which :class:`FrameLog` keeps every other one (memory stays bounded on endless streams).
MAX_FRAME_LOG = 1 << 20
#: Track points above which :class:`TrackLog` keeps every other one of its older half.
MAX_TRACK_LOG = 1 << 18

_ALIGNED = ("position", "carrier_hz", "esn0_db", "carrier_locked", "symbol_locked", "residual_hz", "predicted_hz",
            "cn0_dbhz")


@dataclass
class TrackLog:
    """The receiver track of a run, one entry per track point, in stream order.

    Bounded on endless streams: past :data:`MAX_TRACK_LOG` entries the older half keeps every other entry
    (the history grows coarser, geometrically, with its age), so the newest quarter of a million points,
    the ones :meth:`esn0_at` is asked about, stay exact.
    """

    position: list = field(default_factory=list)
    carrier_hz: list = field(default_factory=list)
    esn0_db: list = field(default_factory=list)
    carrier_locked: list = field(default_factory=list)
    symbol_locked: list = field(default_factory=list)
    modulation_index_rad: list = field(default_factory=list)
    residual_hz: list = field(default_factory=list)  # measured - predicted Doppler (--tle/--oem), NaN where none
    predicted_hz: list = field(default_factory=list)  # the predicted one-way Doppler (--tle/--oem), NaN where none
    cn0_dbhz: list = field(default_factory=list)  # residual carrier's Pc/N0 (dB-Hz), NaN where none

    def append(self, tp) -> None:
        self.position.append(float(tp.position))
        self.carrier_hz.append(float(tp.carrier_offset_hz))
        self.esn0_db.append(float(tp.esn0_db))
        self.carrier_locked.append(bool(tp.carrier_locked))
        self.symbol_locked.append(bool(tp.symbol_locked))
        c = getattr(tp, "cn0_dbhz", None)  # residual-carrier track points only
        self.cn0_dbhz.append(float(c) if c is not None else math.nan)
        m = getattr(tp, "modulation_index_rad", None)
        if m is not None and math.isfinite(float(m)):
            self.modulation_index_rad.append(float(m))
            if len(self.modulation_index_rad) > MAX_TRACK_LOG:
                _thin_older_half(self.modulation_index_rad)
        if len(self.position) > MAX_TRACK_LOG:
            half = len(self.position) // 2
            for name in _ALIGNED:
                _thin_older_half(getattr(self, name), half)

    def esn0_at(self, position: float) -> float | None:
        """Es/N0 (dB, 2 decimals) of the track point at or before ``position`` (the first one before it)."""
        if not self.position:
            return None
        i = max(bisect.bisect_right(self.position, position) - 1, 0)
        v = self.esn0_db[i]
        return round(v, 2) if math.isfinite(v) else None

    def arrays(self) -> dict[str, np.ndarray]:
        """The track as arrays; ``locked`` is carrier and symbol lock together."""
        locked = np.asarray(self.carrier_locked, bool) & np.asarray(self.symbol_locked, bool)
        out = {"position": np.asarray(self.position, np.float64), "carrier_hz": np.asarray(self.carrier_hz),
               "esn0_db": np.asarray(self.esn0_db), "locked": locked}
        if self.residual_hz:
            out["residual_hz"] = np.asarray(self.residual_hz, np.float64)
        if self.predicted_hz:
            out["predicted_hz"] = np.asarray(self.predicted_hz, np.float64)
        cn0 = np.asarray(self.cn0_dbhz, np.float64)
        if np.isfinite(cn0).any():
            out["cn0_dbhz"] = cn0
        return out


def _thin_older_half(values: list, half: int | None = None) -> None:
    """Keep every other one of the first ``half`` entries (default: half the list) of ``values``, in place."""
    half = len(values) // 2 if half is None else min(half, len(values))
    values[:half] = values[:half:2]


def sample_keys(d: dict) -> dict:
    """An output record with its positions named by their unit: ``position`` -> ``sample_position`` and
    ``after_position`` -> ``after_sample_position`` (sample index in the recording; channel-symbol index for
    symbol input)."""
    return {("sample_position" if k == "position" else "after_sample_position" if k == "after_position" else k): v
            for k, v in d.items()}


class FrameLog:
    """One compact entry per frame, for the report's quality timeline and link-control plot.

    Per frame: ``position`` (samples), ``status`` (index into :attr:`statuses`), ``rs_corrected`` (symbols
    corrected in the codeblock; -1 when a codeword failed, -2 without Reed-Solomon), ``asm_errors``,
    ``flywheel``, ``decoder_iterations`` (turbo / LDPC iterations, -1 for other codes),
    ``decoder_syndrome_weight`` (LDPC final syndrome weight, -1 for other codes), and the CLCW of a frame
    that passed its checks (``clcw_report_value``, -1 without one; ``clcw_flags``: bit 0 lockout, 1 wait,
    2 retransmit, 3 no RF available, 4 no bit lock).  Stored in
    growing numpy arrays; past :data:`MAX_FRAME_LOG` entries every other one is dropped and ``stride`` doubles.
    """

    FIELDS = (("position", np.float64), ("status", np.int8), ("rs_corrected", np.int16), ("asm_errors", np.int8),
              ("flywheel", np.bool_), ("decoder_iterations", np.int16), ("decoder_syndrome_weight", np.int16),
              ("clcw_report_value", np.int16), ("clcw_flags", np.int8))

    def __init__(self):
        self.statuses: list[str] = []
        self.stride = 1
        self._seen = 0
        self._n = 0
        self._cap = 1024
        self._data = {name: np.zeros(self._cap, dtype) for name, dtype in self.FIELDS}

    def __len__(self) -> int:
        return self._n

    def append(self, record) -> None:
        self._seen += 1
        if (self._seen - 1) % self.stride:
            return
        if self._n == self._cap:
            if self._cap >= MAX_FRAME_LOG:
                for name in self._data:
                    self._data[name][: self._n // 2] = self._data[name][: self._n : 2]
                self._n //= 2
                self.stride *= 2
            else:
                self._cap *= 2
                for name in self._data:
                    self._data[name] = np.resize(self._data[name], self._cap)
        if record.status not in self.statuses:
            self.statuses.append(record.status)
        rs = record.rs_corrected
        clcw = record.clcw if record.status == "ok" else None
        d, i = self._data, self._n
        d["position"][i] = record.position
        d["status"][i] = self.statuses.index(record.status)
        d["rs_corrected"][i] = -2 if not rs else (-1 if min(rs) < 0 else sum(rs))
        d["asm_errors"][i] = -1 if record.asm_errors is None else min(int(record.asm_errors), 127)
        d["flywheel"][i] = bool(record.flywheel)
        iterations = getattr(record, "decoder_iterations", None)  # turbo / LDPC records only
        d["decoder_iterations"][i] = -1 if iterations is None else iterations
        syndrome = getattr(record, "decoder_syndrome_weight", None)  # LDPC records only
        d["decoder_syndrome_weight"][i] = -1 if syndrome is None else min(int(syndrome), 32767)
        d["clcw_report_value"][i] = -1 if clcw is None else clcw["report_value"]
        d["clcw_flags"][i] = 0 if clcw is None else (clcw["lockout"] | clcw["wait"] << 1 | clcw["retransmit"] << 2
                                                      | clcw["no_rf_available"] << 3 | clcw["no_bit_lock"] << 4)
        self._n += 1

    def arrays(self) -> dict[str, np.ndarray]:
        """The entries as arrays (views cut to length), plus ``statuses`` and ``stride``."""
        out: dict = {name: arr[: self._n] for name, arr in self._data.items()}
        out["statuses"] = list(self.statuses)
        out["stride"] = self.stride
        return out


class BackEnd:
    """Decoded frames -> frame records, channel accounting, packets -> sinks.

    Parameters
    ----------
    profile : LinkProfile
    timebase : object with ``tai_ns(position) -> int``, or None, keyword-only
        The recording (or symbol file) whose positions the frames carry; None leaves ERT fields null.
    sample_rate_hz : float or None, keyword-only
        Samples per second when positions are samples of an IQ recording; None when they are channel
        symbols.  Turning a symbol's centre into its leading edge needs it (see :class:`ErtClock`).
    sinks : object or None, keyword-only
        Receives ``frame(obj)``, ``packet(obj, data)`` and ``doppler(rows)`` (see
        :mod:`pipeline.chain._sinks`); None counts without writing.
    downlink_frequency_hz : float or None, keyword-only
        Nominal downlink frequency, for the range rate in ``doppler.csv``.
    tuning_offset_hz : float, keyword-only
        Recording centre frequency minus the nominal frequency.
    drop_duplicates : bool, keyword-only
        Suppress byte-identical copies of packets already delivered from the same frame counts (a replay);
        by default they are delivered and flagged ``count_anomaly = "duplicate"``.
    obt_to_utc : pipeline.packets.ObtToUtc or None, keyword-only
        Adds ``utc_from_obt`` to packets whose time code is onboard time (``decode --clock``).
    doppler_check : pipeline.orbit.DopplerComparison or None, keyword-only
        Adds ``predicted_hz`` and ``residual_hz`` to the Doppler rows (``decode --tle`` / ``--oem``).
    """

    def __init__(self, profile: LinkProfile, *, timebase=None, sample_rate_hz: float | None = None, sinks=None,
                 downlink_frequency_hz: float | None = None, tuning_offset_hz: float = 0.0,
                 drop_duplicates: bool = False, obt_to_utc=None, doppler_check=None):
        from pipeline.chain._time import ErtClock
        from pipeline.link import ChannelAccounting, FrameParser
        from pipeline.packets import PacketExtractor
        from pipeline.timescales import format_utc

        self.profile = profile
        self.clock = None if timebase is None else ErtClock(timebase, profile, sample_rate_hz)
        self.sinks = sinks
        self.downlink_frequency_hz = downlink_frequency_hz
        self.tuning_offset_hz = float(tuning_offset_hz)
        self.obt_to_utc = obt_to_utc
        self.doppler_check = doppler_check
        self._format_utc = format_utc
        from pipeline.sync import link_marker

        self._marker = link_marker(profile)  # the marker in front of every CADU (cadus.bin)
        self.parser = FrameParser(frames=profile.frames)
        self.accounting = ChannelAccounting(spacecraft_id=profile.frames.spacecraft_id)
        self.extractor = PacketExtractor(profile=profile, drop_duplicates=drop_duplicates)
        self.track = TrackLog()
        self.frame_log = FrameLog()
        self.status_counts: dict[str, int] = {}
        self.frame_count = 0
        self.packet_count = 0
        self.gaps: list[dict] = []
        self.events: list[dict] = []  # receiver lock changes
        self._was_locked: bool | None = None
        # ERT text of recent positions: a frame's packets (and gaps) carry the position of the frame they started in
        self._ert_recent: dict[float, str | None] = {}

    # ---- feeding --------------------------------------------------------------------------
    def process(self, out) -> None:
        """Take one :class:`~pipeline.chain.FrontOutput`: its track points, then its frames."""
        self.process_track(out.track)
        for decoded in out.frames:
            self.process_frame(decoded)

    def process_track(self, track: list) -> None:
        """Receiver track points, in stream order: the track log, lock events and Doppler rows."""
        if not track:
            return
        if self.sinks is not None and self.clock is not None:
            from pipeline.demod.residual import doppler_rows

            rows = doppler_rows(track, self.clock, self.downlink_frequency_hz, tuning_offset_hz=self.tuning_offset_hz)
            if self.doppler_check is not None:
                rows = self.doppler_check.process(rows)
                self.track.residual_hz.extend(math.nan if r["residual_hz"] is None else float(r["residual_hz"])
                                              for r in rows)
                self.track.predicted_hz.extend(math.nan if r["predicted_hz"] is None else float(r["predicted_hz"])
                                               for r in rows)
            self.sinks.doppler(rows)
        for tp in track:
            self.track.append(tp)
            locked = bool(tp.carrier_locked and tp.symbol_locked)
            if locked != self._was_locked:
                self.events.append({"kind": "demod_lock_acquired" if locked else "demod_lock_lost",
                                    "sample_position": float(tp.position),
                                    "detail": f"carrier {tp.carrier_offset_hz:.1f} Hz" if locked else ""})
                self._was_locked = locked

    def process_frame(self, decoded) -> None:
        """One decoded frame (a :class:`~pipeline.sync.DecodedFrame`), in stream order."""
        record = self.parser.process(decoded)
        for g in self.accounting.process(record):
            gd = sample_keys(g.as_dict())
            gd["ert"] = self.ert(gd.get("sample_position", decoded.position))
            self.gaps.append(gd)
        self.frame_count += 1
        self.status_counts[record.status] = self.status_counts.get(record.status, 0) + 1
        self.frame_log.append(record)
        if self.sinks is not None:
            self.sinks.cadu(self._marker + decoded.cadu.data)
            if record.status in ("ok", "idle"):
                self.sinks.frame_octets(record.vcid, decoded.frame)
            fd = record.as_dict()
            fd["ert"] = self.ert(record.position)
            fd["esn0_db"] = self.track.esn0_at(record.position)
            self.sinks.frame(fd)
        for pkt in self.extractor.process(record):
            self._packet(pkt)
        for sg in self.extractor.take_sequence_gaps():
            gd = sample_keys(sg.as_dict())
            gd.setdefault("kind", "apid")
            if "sample_position" in gd:
                gd["ert"] = self.ert(float(gd["sample_position"]))
            self.gaps.append(gd)

    def finish(self) -> None:
        """Flush the packet extractor (a packet still waiting for the next frame's pointer)."""
        for pkt in self.extractor.flush():
            self._packet(pkt)

    # ---- helpers --------------------------------------------------------------------------
    def ert(self, position: float) -> str | None:
        """The ERT string of a position (the centre of a frame's first ASM symbol); None without a time base."""
        if self.clock is None:
            return None
        text = self._ert_recent.get(position)
        if text is None:
            if len(self._ert_recent) >= 64:
                self._ert_recent.clear()
            text = self._ert_recent[position] = self.clock.ert(position)
        return text

    def _packet(self, pkt) -> None:
        self.packet_count += 1
        if self.sinks is None:
            return
        fields = pkt.as_dict()  # (its "hex" is the packet's octets as hex)
        obj = {
            "ert": self.ert(pkt.position),
            "apid": None if pkt.apid is None else int(pkt.apid),  # None: an encapsulation packet
            "seq_count": None if pkt.seq_count is None else int(pkt.seq_count),
            "hex": fields["hex"],
            "scid": int(pkt.scid),
            "vcid": int(pkt.vcid),
        }
        for key, value in fields.items():
            if key not in obj and key != "data":
                obj[key] = value
        obj["esn0_db"] = self.track.esn0_at(pkt.position)
        if pkt.time_ns is not None:  # a time code on UTC's scale (None before 1972)
            obj["packet_time"] = self._format_utc(int(pkt.time_tai_ns))
        if self.obt_to_utc is not None:
            obj = self.obt_to_utc.process(obj)
        self.sinks.packet(obj, bytes(pkt.data))
