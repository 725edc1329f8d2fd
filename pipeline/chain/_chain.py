"""The decode chain: a recording (or channel symbols) in, packets, frames and a pass report out.

The chain is the only place that knows the order of the stages (../shared/DESIGN.md, data flow):

    samples -> Demodulator -> BranchSync (Viterbi) -> LineDecoder (NRZ-M) -> FrameSync -> CodeblockDecoder
            -> FrameParser -> ChannelAccounting -> PacketExtractor -> sinks

Every stage streams with explicit state, so the chain holds constant memory whatever the length of
the recording.  Time stays a sample position until a frame or packet is written; then
``Timebase.utc_ns`` turns it into UTC.
"""

from __future__ import annotations

import bisect
import csv
import json
import math
import sys
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.chain._output import OutputFolder
from pipeline._version import __version__
from pipeline.demod.residual import DOPPLER_COLUMNS, doppler_rows
from pipeline.errors import ProfileError, RecordingError
from pipeline.profile import LinkProfile

__all__ = ["CAUTION", "DecodeChain", "DecodeSummary", "SymbolTimebase", "decode_to_folder"]

CAUTION = "Decoded data is no substitute for the mission's validated ground segment."

_SPECTRUM_SAMPLES = 1 << 18
_CONSTELLATION_POINTS = 2000


@dataclass
class DecodeSummary:
    """Counts of one decode run (the one-line summary at the end)."""

    input_kind: str = "iq"
    samples: int = 0
    channel_symbols: int = 0
    duration_s: float = 0.0
    elapsed_s: float = 0.0
    cadus: int = 0
    frames: int = 0
    frames_ok: int = 0
    frames_idle: int = 0
    packets: int = 0
    out: str = ""

    def line(self) -> str:
        rate = self.samples / self.elapsed_s / 1e6 if self.elapsed_s > 0 else float("nan")
        rt = self.duration_s / self.elapsed_s if self.elapsed_s > 0 else float("nan")
        unit = f"{self.samples} samples" if self.input_kind == "iq" else f"{self.channel_symbols} channel symbols"
        speed = f"{rate:.1f} Msample/s, " if self.input_kind == "iq" else ""
        return (f"decoded {self.duration_s:.2f} s ({unit}) in {self.elapsed_s:.2f} s ({speed}{rt:.1f}x real time): "
                f"{self.cadus} CADUs, {self.frames_ok}/{self.frames} frames good, {self.packets} packets")


class SymbolTimebase:
    """Time base for ``--input soft|bits``: position = channel symbol index.

    ``utc = start + position / channel_bit_rate`` where the channel bit rate is the modulation
    symbol rate times the channel bits per modulation symbol.
    """

    def __init__(self, *, start_ns: int, channel_bit_rate: float):
        self.start_ns = int(start_ns)
        self.channel_bit_rate = float(channel_bit_rate)

    def utc_ns(self, position: float) -> int:
        return self.start_ns + int(round(float(position) * 1e9 / self.channel_bit_rate))


class _Sinks:
    """packets.jsonl, frames.jsonl and one binary file per APID, written as items arrive."""

    def __init__(self, folder: Path):
        self.folder = folder
        self.packets = open(folder / "packets.jsonl", "w", encoding="utf-8")
        self.frames = open(folder / "frames.jsonl", "w", encoding="utf-8")
        self.apid_files: dict[int, Any] = {}
        self.doppler_file = None

    def doppler(self, rows: list[dict]) -> None:
        """Append rows to doppler.csv (the carrier-frequency track: one-way Doppler and range rate)."""
        if self.doppler_file is None:
            self.doppler_file = open(self.folder / "doppler.csv", "w", encoding="utf-8", newline="")
            self._doppler_csv = csv.DictWriter(self.doppler_file, fieldnames=list(DOPPLER_COLUMNS))
            self._doppler_csv.writeheader()
        for row in rows:
            self._doppler_csv.writerow({k: ("" if row.get(k) is None else row.get(k)) for k in DOPPLER_COLUMNS})

    def frame(self, obj: dict) -> None:
        self.frames.write(json.dumps(obj, separators=(",", ":")) + "\n")

    def packet(self, obj: dict, data: bytes) -> None:
        self.packets.write(json.dumps(obj, separators=(",", ":")) + "\n")
        apid = obj["apid"]
        key = apid if apid is not None else ("encapsulation", obj.get("protocol_id"))
        f = self.apid_files.get(key)
        if f is None:
            name = f"apid_{apid:04d}.bin" if apid is not None else f"encapsulation_pid{obj.get('protocol_id')}.bin"
            f = self.apid_files[key] = open(self.folder / name, "wb")
        f.write(data)

    def close(self) -> None:
        self.packets.close()
        self.frames.close()
        for f in self.apid_files.values():
            f.close()
        if self.doppler_file is not None:
            self.doppler_file.close()


class DecodeChain:
    """Every stage after the sample source, wired in order.

    Parameters
    ----------
    profile : LinkProfile
    input_kind : {"iq", "soft", "bits"}
        "iq" starts at the demodulator; "soft" and "bits" start at the line decoder with channel symbols.
    sample_rate_hz : float
        Sample rate of an IQ recording (ignored otherwise).
    timebase : object with ``utc_ns(position) -> int``
    """

    def __init__(self, profile: LinkProfile, *, input_kind: str = "iq", sample_rate_hz: float | None = None,
                 timebase=None):
        from pipeline.demod import LineDecoder
        from pipeline.link import ChannelAccounting, FrameParser
        from pipeline.packets import PacketExtractor, format_ert
        from pipeline.sync import BranchSync, CodeblockDecoder, FrameSync

        if input_kind not in ("iq", "soft", "bits"):
            raise ValueError(f"Argument 'input_kind' must be iq | soft | bits, not {input_kind!r}.")
        self.profile = profile
        self.input_kind = input_kind
        self.timebase = timebase
        self._format_ert = format_ert
        rx = profile.receiver
        self.demod = None
        if input_kind == "iq":
            from pipeline.demod.residual import make_demodulator

            try:
                self.demod = make_demodulator(link=profile.link, receiver=rx, sample_rate_hz=float(sample_rate_hz))
            except ValueError as exc:  # a link the demodulators cannot serve at this sample rate
                raise ProfileError(f"{profile.name}: {exc}") from None
        # Bi-phase-L is removed inside the demodulator (half-symbol integration); what is left is NRZ-L.
        line_code = "nrz-l" if profile.link.line_code == "bi-phase-l" else profile.link.line_code
        self.line = LineDecoder(line_code=line_code)
        self.branch = BranchSync(rate=profile.coding.convolutional, modulation=profile.link.modulation)
        self.fsync = FrameSync(frame_bits=8 * profile.codeblock_bytes, max_errors=rx.asm_max_errors,
                               flywheel=rx.flywheel_frames)
        self.codeblock = CodeblockDecoder(profile=profile)
        self.parser = FrameParser(frames=profile.frames)
        self.accounting = ChannelAccounting(spacecraft_id=profile.frames.spacecraft_id)
        self.extractor = PacketExtractor(profile=profile)
        self.sinks: _Sinks | None = None
        self.doppler_frequency_hz: float | None = None  # nominal downlink frequency, for range rate
        self.doppler_tuning_offset_hz = 0.0
        # tracks for the report
        self.track_position: list[float] = []
        self.track_carrier_hz: list[float] = []
        self.track_esn0_db: list[float] = []
        self.track_carrier_locked: list[bool] = []
        self.track_symbol_locked: list[bool] = []
        self.track_modulation_index: list[float] = []
        self.status_counts: dict[str, int] = {}
        self.frame_count = 0
        self.packet_count = 0
        self.cadu_count = 0
        self.channel_symbols = 0
        self.locked_symbols = 0
        self.nonfinite = 0
        self.samples = 0
        self.spectrum: tuple[np.ndarray, np.ndarray] | None = None
        self._spectrum_buf: list[np.ndarray] = []
        self._spectrum_len = 0
        self.constellation: np.ndarray | None = None
        self.gaps: list[dict] = []
        self.events: list[dict] = []
        self._was_locked: bool | None = None

    # ---- feeding --------------------------------------------------------------------------
    def process_chunk(self, chunk) -> None:
        """Feed one recording chunk (``samples``, ``start``, ``nonfinite``)."""
        self.samples += len(chunk.samples)
        self.nonfinite += int(getattr(chunk, "nonfinite", 0))
        if self.spectrum is None and self._spectrum_len < _SPECTRUM_SAMPLES:
            self._spectrum_buf.append(np.asarray(chunk.samples[: _SPECTRUM_SAMPLES - self._spectrum_len]))
            self._spectrum_len += len(self._spectrum_buf[-1])
            if self._spectrum_len >= _SPECTRUM_SAMPLES:
                self._make_spectrum()
        block = self.demod.process(chunk)
        self._symbols(block)

    def process_soft(self, soft: np.ndarray, position: np.ndarray) -> None:
        """Feed channel symbols (``--input soft|bits``): soft float32 and their positions."""
        self._channel(np.asarray(soft, dtype=np.float32), np.asarray(position, dtype=np.float64))

    def finish(self) -> None:
        """Flush every stage in order."""
        if self.demod is not None:
            self._symbols(self.demod.flush())
            if self.spectrum is None and self._spectrum_buf:
                self._make_spectrum()
        bits, pos = self.branch.flush()
        self._bits(bits, pos)
        for cadu in self.fsync.flush():
            self._cadu(cadu)
        for pkt in self.extractor.flush():
            self._packet(pkt)

    # ---- internals ------------------------------------------------------------------------
    def _make_spectrum(self) -> None:
        from scipy.signal import welch

        x = np.concatenate(self._spectrum_buf) if self._spectrum_buf else np.zeros(0, np.complex64)
        self._spectrum_buf = []
        if len(x) < 256:
            return
        fs = self.demod_rate
        f, p = welch(x, fs=fs, nperseg=min(4096, len(x)), return_onesided=False, detrend=False)
        order = np.argsort(f)
        self.spectrum = (f[order], 10 * np.log10(np.maximum(p[order], 1e-30)))

    @property
    def demod_rate(self) -> float:
        return float(getattr(self.demod, "sample_rate_hz", 1.0))

    def _symbols(self, block) -> None:
        if self.sinks is not None and block.track and self.timebase is not None:
            rows = doppler_rows(block.track, self.timebase, self.doppler_frequency_hz,
                                tuning_offset_hz=self.doppler_tuning_offset_hz)
            self.sinks.doppler(rows)
        for tp in block.track:
            self.track_position.append(float(tp.position))
            self.track_carrier_hz.append(float(tp.carrier_offset_hz))
            self.track_esn0_db.append(float(tp.esn0_db))
            self.track_carrier_locked.append(bool(tp.carrier_locked))
            self.track_symbol_locked.append(bool(tp.symbol_locked))
            m = getattr(tp, "modulation_index_rad", None)
            if m is not None and math.isfinite(float(m)):
                self.track_modulation_index.append(float(m))
            locked = bool(tp.carrier_locked and tp.symbol_locked)
            if locked != self._was_locked:
                self.events.append({"kind": "demod_lock_acquired" if locked else "demod_lock_lost",
                                    "position": float(tp.position),
                                    "detail": f"carrier {tp.carrier_offset_hz:.1f} Hz" if locked else ""})
                self._was_locked = locked
        if len(block.locked):
            self.locked_symbols += int(np.count_nonzero(block.locked))
        syms = getattr(block, "symbols", None)
        if syms is not None and len(syms) >= 256 and len(block.locked) and bool(block.locked[-1]):
            # the most recent locked stretch: a snapshot of the constellation as the pass went on
            self.constellation = np.array(syms[-_CONSTELLATION_POINTS:], dtype=np.complex64)
        self._channel(block.soft, block.position)

    def _channel(self, soft: np.ndarray, position: np.ndarray) -> None:
        self.channel_symbols += len(soft)
        bits, pos = self.branch.process(soft, position)
        self._bits(bits, pos)

    def _bits(self, bits: np.ndarray, pos: np.ndarray) -> None:
        if len(bits) == 0:
            return
        # CCSDS 131.0-B-2 sec. 3.3.3: NRZ-M conversion is done at the convolutional encoder input,
        # so it is undone at the decoder output (uncoded links: the same place, on channel bits).
        bits = self.line.process(bits)
        was = self.fsync.locked
        for cadu in self.fsync.process(bits, pos):
            self._cadu(cadu)
        if was and not self.fsync.locked:
            self.branch.notify_lost_lock()

    def _esn0_at(self, position: float) -> float | None:
        i = bisect.bisect_right(self.track_position, position) - 1
        if i < 0:
            i = 0 if self.track_position else -1
        if i < 0:
            return None
        v = self.track_esn0_db[i]
        return round(v, 2) if math.isfinite(v) else None

    def _cadu(self, cadu) -> None:
        self.cadu_count += 1
        decoded = self.codeblock.process(cadu)
        record = self.parser.process(decoded)
        for g in self.accounting.process(record):
            gd = g.as_dict()
            gd["ert"] = self._ert(gd.get("position", cadu.position))
            self.gaps.append(gd)
        self.frame_count += 1
        self.status_counts[record.status] = self.status_counts.get(record.status, 0) + 1
        if self.sinks is not None:
            fd = record.as_dict()
            fd["ert"] = self._ert(record.position)
            fd["esn0_db"] = self._esn0_at(record.position)
            self.sinks.frame(fd)
        for pkt in self.extractor.process(record):
            self._packet(pkt)
        for sg in self.extractor.take_sequence_gaps():
            gd = sg.as_dict()
            gd.setdefault("kind", "apid")
            if "position" in gd:
                gd["ert"] = self._ert(float(gd["position"]))
            self.gaps.append(gd)

    def _ert(self, position: float) -> str | None:
        if self.timebase is None:
            return None
        return self._format_ert(self.timebase.utc_ns(position))

    def _packet(self, pkt) -> None:
        self.packet_count += 1
        if self.sinks is None:
            return
        d = pkt.as_dict()
        obj = {
            "ert": self._ert(pkt.position),
            "apid": None if pkt.apid is None else int(pkt.apid),  # None: an encapsulation packet
            "seq_count": None if pkt.seq_count is None else int(pkt.seq_count),
            "hex": bytes(pkt.data).hex(),
            "scid": int(pkt.scid),
            "vcid": int(pkt.vcid),
        }
        for key, value in d.items():
            if key not in obj and key not in ("data", "hex"):
                obj[key] = value
        obj["esn0_db"] = self._esn0_at(pkt.position)
        if getattr(pkt, "time_ns", None) is not None:
            obj["packet_time"] = self._format_ert(int(pkt.time_ns))
        self.sinks.packet(obj, bytes(pkt.data))

    # ---- report ---------------------------------------------------------------------------
    def report(self, *, recording_info: dict, elapsed_s: float, duration_s: float) -> tuple[dict, Any]:
        """The report dict and plot data of this run."""
        from pipeline.report import PlotData

        p = self.profile
        tpos = np.asarray(self.track_position, dtype=np.float64)
        rate = self.demod_rate if self.demod is not None else getattr(self.timebase, "channel_bit_rate", 1.0)
        esn0 = np.asarray(self.track_esn0_db, dtype=np.float64)
        carrier = np.asarray(self.track_carrier_hz, dtype=np.float64)
        locked = np.asarray(self.track_carrier_locked, bool) & np.asarray(self.track_symbol_locked, bool)
        lock_fraction = (self.locked_symbols / self.channel_symbols) if (self.demod is not None and
                                                                          self.channel_symbols) else None
        good_esn0 = esn0[locked & np.isfinite(esn0)] if len(esn0) else esn0
        demod = {
            "input": self.input_kind,
            "lock_fraction": None if lock_fraction is None else round(lock_fraction, 4),
            "esn0_db_median": round(float(np.median(good_esn0)), 2) if len(good_esn0) else None,
            "carrier_offset_hz_first": round(float(carrier[locked][0]), 1) if locked.any() else None,
            "carrier_offset_hz_last": round(float(carrier[locked][-1]), 1) if locked.any() else None,
            "nonfinite_samples": self.nonfinite,
            "channel_symbols": self.channel_symbols,
        }
        if self.track_modulation_index:
            demod["modulation_index_rad_median"] = round(float(np.median(self.track_modulation_index)), 4)
        if self.doppler_frequency_hz:
            demod["downlink_frequency_hz"] = self.doppler_frequency_hz
        if self.demod is not None:
            demod["doppler_file"] = "doppler.csv"
        if self.demod is not None and not locked.any():
            demod["note"] = "no lock was found: no carrier or symbol lock anywhere in the recording"
        sync_stats = {}
        for stage_name, stage in (("branch", self.branch), ("frame_sync", self.fsync), ("codeblock", self.codeblock)):
            for k, v in stage.stats.as_dict().items():
                sync_stats[f"{stage_name}.{k}"] = v
        all_events = list(self.events)
        for stage in (self.branch, self.fsync):
            all_events.extend(ev.as_dict() for ev in stage.events)
        events = []
        for e in sorted(all_events, key=lambda e: float(e.get("position", 0.0))):
            e = dict(e)
            if "position" in e and self.timebase is not None:
                e["ert"] = self._ert(float(e["position"]))
            events.append(e)
        acc = self.accounting.as_dict()
        pstats = self.extractor.stats.as_dict()
        report = {
            "summary": {
                "tool": f"downlink {__version__}",
                "caution": CAUTION,
                "profile": p.name,
                "input": self.input_kind,
                "duration_s": round(duration_s, 6),
                "elapsed_s": round(elapsed_s, 3),
                "realtime_factor": round(duration_s / elapsed_s, 2) if elapsed_s > 0 else None,
                "samples": self.samples,
                "cadus": self.cadu_count,
                "frames": self.frame_count,
                "frames_ok": self.status_counts.get("ok", 0),
                "packets": self.packet_count,
                "gaps": len(self.gaps),
            },
            "recording": recording_info,
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
            "frames": {"status_counts": dict(self.status_counts)},
            "virtual_channels": acc.get("virtual_channels", []),
            "master_channel": {k: v for k, v in acc.items() if k != "virtual_channels"},
            "packets": {k: v for k, v in pstats.items() if k != "apids"},
            "apids": pstats.get("apids", []),
            "gaps": self.gaps,
            "events": events,
        }
        t = tpos / rate if len(tpos) else tpos
        plots = PlotData(
            spectrum_freq_hz=None if self.spectrum is None else self.spectrum[0],
            spectrum_db=None if self.spectrum is None else self.spectrum[1],
            constellation=self.constellation,
            track_time_s=t if len(t) else None,
            track_esn0_db=esn0 if len(esn0) else None,
            track_carrier_hz=carrier if len(carrier) else None,
            track_locked=locked if len(locked) else None,
            frame_status_counts=dict(self.status_counts),
        )
        return report, plots


def decode_to_folder(recording: str, profile: LinkProfile, out: str, *, overwrite: bool = False,
                     input_kind: str = "iq", datatype: str | None = None, sample_rate_hz: float | None = None,
                     start: str | None = None, progress: bool = False, threads: int = 1) -> DecodeSummary:
    """Decode ``recording`` with ``profile`` into the folder ``out`` (see ../shared/DESIGN.md outputs).

    The folder appears only when the run completes; an existing folder needs ``overwrite``.
    """
    from pipeline.packets import format_ert
    from pipeline.report import write_report

    summary = DecodeSummary(input_kind=input_kind, out=str(out))
    t0 = time.perf_counter()
    if input_kind == "iq":
        from pipeline.recording import open_recording

        rec = open_recording(recording, datatype=datatype, sample_rate_hz=sample_rate_hz, start=start)
        total = rec.num_samples
        info = {
            "path": Path(rec.path).name, "datatype": rec.datatype, "sample_rate_hz": rec.sample_rate_hz,
            "samples": rec.num_samples, "duration_s": rec.duration_s, "start": format_ert(rec.start_ns),
            "frequency_hz": rec.frequency_hz, "captures": len(rec.captures),
        }
    else:
        from pipeline.recording import open_symbols

        if sample_rate_hz is not None or datatype is not None:
            raise ProfileError("--format and --sample-rate apply to --input iq only; channel symbols are timed by "
                               "the profile's symbol rate")
        syms = open_symbols(recording, input_kind)
        total = syms.num_symbols
        start_ns = _parse_start(start, recording)
        bps = profile.link.bits_per_symbol
        timebase = SymbolTimebase(start_ns=start_ns, channel_bit_rate=profile.link.symbol_rate_baud * bps)
        info = {"path": Path(recording).name, "input": input_kind, "channel_symbols": total,
                "duration_s": total / timebase.channel_bit_rate, "start": format_ert(start_ns)}
    with OutputFolder(out, overwrite=overwrite) as tmp:
        if input_kind == "iq":
            chain = DecodeChain(profile, input_kind="iq", sample_rate_hz=rec.sample_rate_hz, timebase=rec)
            nominal = profile.link.downlink_frequency_hz or rec.frequency_hz
            chain.doppler_frequency_hz = nominal
            if nominal and rec.frequency_hz:
                chain.doppler_tuning_offset_hz = float(rec.frequency_hz) - float(nominal)
        else:
            chain = DecodeChain(profile, input_kind=input_kind, timebase=timebase)
        chain.sinks = _Sinks(tmp)
        bar = _Progress(total, enabled=progress)
        try:
            if input_kind == "iq":
                from pipeline.chain._parallel import run_chain

                # IQ recordings are decoded in fixed overlapping segments (pipeline/chain/_parallel.py); the
                # output depends on the segment size only, never on the number of threads.
                run_chain(chain, rec, threads=threads, mode="segments", on_progress=bar.update)
            else:
                for chunk in syms.chunks(profile.receiver.chunk_samples):
                    pos = chunk.start + np.arange(len(chunk.soft), dtype=np.float64)
                    chain.process_soft(chunk.soft, pos)
                    bar.update(chunk.start + len(chunk.soft))
                chain.finish()
        finally:
            bar.close()
            chain.sinks.close()
        elapsed = time.perf_counter() - t0
        duration = float(info["duration_s"])
        report, plots = chain.report(recording_info=info, elapsed_s=elapsed, duration_s=duration)
        write_report(tmp, report, plots)
    summary.samples = chain.samples
    summary.channel_symbols = chain.channel_symbols
    summary.duration_s = duration
    summary.elapsed_s = elapsed  # the decode itself; the report's plots are drawn after
    summary.cadus = chain.cadu_count
    summary.frames = chain.frame_count
    summary.frames_ok = chain.status_counts.get("ok", 0)
    summary.frames_idle = chain.status_counts.get("idle", 0)
    summary.packets = chain.packet_count
    return summary


def _parse_start(start: str | None, path: str) -> int:
    from pipeline.recording._time import parse_iso_ns

    if start is None:
        return 0
    try:
        return parse_iso_ns(start)
    except ValueError as exc:
        raise RecordingError(f"{path}: --start {start!r} is not an ISO-8601 UTC time ({exc})") from None


class _Progress:
    """A progress bar on stderr when it is a terminal; silent otherwise."""

    def __init__(self, total: int, *, enabled: bool):
        self.total = max(int(total), 1)
        self.enabled = enabled
        self.t0 = time.perf_counter()
        self.last = 0.0

    def update(self, done: int) -> None:
        if not self.enabled:
            return
        now = time.perf_counter()
        if now - self.last < 0.2 and done < self.total:
            return
        self.last = now
        frac = min(done / self.total, 1.0)
        width = 30
        fill = int(frac * width)
        sys.stderr.write(f"\r[{'#' * fill}{'.' * (width - fill)}] {100 * frac:5.1f}%  {now - self.t0:6.1f} s")
        sys.stderr.flush()

    def close(self) -> None:
        if self.enabled:
            sys.stderr.write("\n")
            sys.stderr.flush()
