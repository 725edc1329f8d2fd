"""A whole decode run: open the input, run the chain, build the report, write the output.

:func:`decode_to_folder` is what ``downlink decode`` does; :func:`decode_in_memory` the same with the
records kept in lists (``pipeline.decode(..., out=None)``).
"""

from __future__ import annotations

import logging
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from pipeline._version import __version__
from pipeline.chain._backend import BackEnd
from pipeline.chain._chain import DecodeChain
from pipeline.chain._frontend import FrontSummary
from pipeline.chain._output import OutputFolder
from pipeline.chain._progress import Progress
from pipeline.chain._segments import DEFAULT_SEGMENT_SAMPLES, SegmentedDecode
from pipeline.chain._sinks import FolderSinks, MemorySinks
from pipeline.errors import ProfileError, UsageError
from pipeline.profile import LinkProfile

log = logging.getLogger(__name__)

#: Said in the report (``demod.inversion_note``) and the log when the carrier was found at the mirror image of the
#: predicted Doppler only: the inversion is inferred from the prediction's sign, not seen in the signal itself.
MIRRORED_PREDICTION_NOTE = ("the recording is spectrally inverted (I/Q swapped or conjugated), inferred from the "
                            "predicted Doppler's sign: the carrier was found at the mirror image of the predicted "
                            "carrier, not at it, so the samples were conjugated from then on (as with [receiver] "
                            "spectrum_inverted = true) and the Doppler is given with its true sign")

__all__ = ["DecodeSummary", "TimeProducts", "carrier_prediction", "decode_in_memory", "decode_to_folder", "is_stream",
           "kernel_cache_cold", "stream_carrier_prediction"]

#: Samples at the start of an IQ recording whose spectrum the report shows.
SPECTRUM_SAMPLES = 1 << 18

INPUT_KINDS = ("iq", "soft", "bits")

#: Spacing (s) of the predicted carrier offsets the demodulators' searches are centred on (``--tle``/``--oem``).
PREDICTION_STEP_S = 0.5


def kernel_cache_cold() -> bool:
    """Whether numba's disk cache lacks the main kernels of the decode path (a first run compiles them).

    Looks for the cache index of the demodulator's timing loop, the Viterbi block kernel and the
    Reed-Solomon decoder; False when it cannot tell (kernels run uncompiled, or numba's cache layout
    changed), so the worst case is a missing notice.
    """
    import os

    try:
        from pipeline.demod import _kernels as demod_kernels
        from pipeline.fec import _kernels as fec_kernels

        for kernel in (demod_kernels.track_each, fec_kernels.viterbi_block_kernel, fec_kernels.rs_decode_kernel):
            if not os.path.exists(kernel._cache._cache_file._index_path):
                return True
    except Exception:  # numba internals are not an API: never fail a decode over a notice
        return False
    return False


@dataclass
class DecodeSummary:
    """What a decode run returns: its counts, and the records when it ran in memory.

    Attributes
    ----------
    frames, frames_ok, frames_idle, frames_failed : int
        Frames found (every status); frames that passed their checks and carry data; idle frames;
        frames that failed a check (any other status).
    packets : int
        Packets delivered.
    duration_s, elapsed_s : float
        Length of the input and wall time of the decode (the report's plots are drawn after).
    samples, channel_symbols : int
        IQ samples read (0 for symbol input) and channel bits decoded.
    input_kind : {"iq", "soft", "bits"}
    out : str or None
        The output folder (None for an in-memory decode).
    report : dict
        The report dictionary (what ``report.json`` holds).
    packets_list, frames_list : list of dict
        In-memory decodes only: the objects ``packets.jsonl`` and ``frames.jsonl`` would hold.
    no_lock : str or None
        When the receiver never locked: one line saying what it searched and the strongest line it saw.
    """

    frames: int = 0
    frames_ok: int = 0
    frames_idle: int = 0
    frames_failed: int = 0
    packets: int = 0
    duration_s: float = 0.0
    elapsed_s: float = 0.0
    samples: int = 0
    channel_symbols: int = 0
    input_kind: str = "iq"
    out: str | None = None
    report: dict = field(default_factory=dict, repr=False)
    packets_list: list = field(default_factory=list, repr=False)
    frames_list: list = field(default_factory=list, repr=False)
    no_lock: str | None = None

    def line(self) -> str:
        """The one-line summary printed at the end of a run."""
        rt = self.duration_s / self.elapsed_s if self.elapsed_s > 0 else float("nan")
        if self.input_kind == "iq":
            rate = self.samples / self.elapsed_s / 1e6 if self.elapsed_s > 0 else float("nan")
            what = f"{self.samples} samples"
            speed = f"{rate:.1f} Msample/s, "
        else:
            what, speed = f"{self.channel_symbols} channel symbols", ""
        return (f"decoded {self.duration_s:.2f} s ({what}) in {self.elapsed_s:.2f} s ({speed}{rt:.1f}x real time): "
                f"{self.frames} frames ({self.frames_ok} good, {self.frames_idle} idle, {self.frames_failed} failed), "
                f"{self.packets} packets")


@dataclass
class _Input:
    """An opened input: a recording, a symbol file or a live stream, with its time base and report facts.

    ``total`` and ``duration_s`` are None for a live stream until it has ended.
    """

    kind: str
    source: Any
    total: int | None
    timebase: Any
    info: dict
    duration_s: float | None
    position_rate_hz: float
    live: bool = False


def is_stream(path: str) -> bool:
    """Whether ``path`` names a live stream: ``-`` (standard input), a named pipe or a character device."""
    import os
    import stat

    if path == "-":
        return True
    try:
        mode = os.stat(path).st_mode
    except OSError:
        return False
    return stat.S_ISFIFO(mode) or stat.S_ISCHR(mode)


@dataclass
class TimeProducts:
    """What ``--clock``, ``--tle`` and ``--oem`` add to a decode (all optional).

    Attributes
    ----------
    clock : path or None
        A ``clock.json`` from ``downlink clock``: packets whose time code is onboard time get ``utc_from_obt``.
    tle, oem : path or None
        An orbit (two-line element set, or a CCSDS OEM ephemeris): ``doppler.csv`` gets ``predicted_hz`` and
        ``residual_hz`` and the report the mean residual and its RMS, and the demodulator's carrier search of
        an IQ recording is centred on the predicted Doppler (:func:`carrier_prediction`).  Needs
        ``[station]`` with a position.
    ut1_minus_utc_s : float
        UT1 - UTC for the Earth's rotation in the prediction.
    """

    clock: str | None = None
    tle: str | None = None
    oem: str | None = None
    ut1_minus_utc_s: float = 0.0

    def obt_to_utc(self, profile: LinkProfile):
        if self.clock is None:
            return None
        from pipeline.packets import ObtToUtc, read_clock_json

        return ObtToUtc(model=read_clock_json(self.clock), profile=profile)

    def _orbit_given(self) -> bool:
        if self.tle is not None and self.oem is not None:
            raise UsageError("--tle and --oem exclude each other: give one orbit")
        return self.tle is not None or self.oem is not None

    def orbit_predictor(self, profile: LinkProfile):
        """The :class:`~pipeline.orbit.OrbitPredictor` of ``tle`` or ``oem`` seen from the profile's station
        (None without an orbit); ``downlink clock`` takes its light time from it too.

        Raises
        ------
        UsageError
            Both ``tle`` and ``oem`` given.
        ProfileError
            The profile's ``[station]`` has no position (checked before the orbit file is read).
        DataFileError
            The element set or ephemeris cannot be read.

        Examples
        --------
        >>> import pipeline
        >>> from pipeline.timescales import parse_utc
        >>> with open("tamarisk.tle", "w") as f:  # an invented element set, not a real spacecraft
        ...     _ = f.write("1 99999U 26001A   26073.39583333  .00000000  00000+0  00000+0 0  9997\\n"
        ...                 "2 99999  97.5000 120.0000 0010000  90.0000 270.0000 15.20000000    19\\n")
        >>> demo = pipeline.load_profile(pipeline.demo_profile_path())
        >>> predictor = TimeProducts(tle="tamarisk.tle").orbit_predictor(demo)
        >>> 0.002 < predictor.predict(parse_utc("2026-03-14T09:30:00Z")).light_time_s < 0.05
        True
        """
        if not self._orbit_given():
            return None
        from pipeline.orbit import GroundStation, OrbitPredictor, read_oem, read_tle

        try:
            station = GroundStation.from_profile(profile)
        except ValueError as exc:
            raise ProfileError(str(exc)) from None
        orbit = read_tle(self.tle) if self.tle is not None else read_oem(self.oem)
        return OrbitPredictor(orbit, station, ut1_minus_utc_s=self.ut1_minus_utc_s)

    def doppler_check(self, profile: LinkProfile, downlink_hz: float | None, tuning_hz: float):
        if not self._orbit_given():
            return None
        if not downlink_hz:
            raise UsageError("--tle/--oem need the downlink frequency: [link] downlink_frequency_hz in the profile "
                             "or core:frequency in the recording")
        from pipeline.orbit import DopplerComparison

        return DopplerComparison(predictor=self.orbit_predictor(profile), downlink_frequency_hz=downlink_hz,
                                 tuning_offset_hz=tuning_hz)


def carrier_prediction(check, recording, *, step_s: float = PREDICTION_STEP_S):
    """The predicted carrier offset over ``recording`` as a :class:`~pipeline.demod.CarrierPrediction` (None when
    the orbit has no state anywhere in it).

    ``check`` is the decode's :class:`~pipeline.orbit.DopplerComparison`, so the offset is the one its residuals
    are measured against (:meth:`~pipeline.orbit.DopplerComparison.predicted_offset_hz`: the one-way Doppler,
    light time included, less the tuning offset), at sample positions ``0, step, 2 step, ..., N`` (``step`` =
    ``step_s`` in samples) through the recording's own time base; positions where the orbit has no state are
    left out.  Cost: one prediction per point (about 0.2 ms: 0.4 s for a 15-minute pass).
    """
    from pipeline.demod import CarrierPrediction

    n = int(recording.num_samples)
    step = max(1, int(round(step_s * recording.sample_rate_hz)))
    positions, offsets = [], []
    for p in [*range(0, n, step), n]:
        off = check.predicted_offset_hz(recording.tai_ns(p))
        if off is not None and (not positions or p > positions[-1]):
            positions.append(float(p))
            offsets.append(off)
    if not positions:
        return None
    return CarrierPrediction(positions=np.array(positions), offsets_hz=np.array(offsets))


def stream_carrier_prediction(check, stream, sample_rate_hz: float, *, step_s: float = PREDICTION_STEP_S):
    """The predicted carrier offset over a live stream, worked out ahead as the stream goes
    (:class:`~pipeline.demod.StreamPrediction`; None when the orbit has no state over its first minute).

    As :func:`carrier_prediction`, through the stream's own time base (``stream.tai_ns``, from ``--start``).
    """
    from pipeline.demod import StreamPrediction

    step = max(1, int(round(step_s * float(sample_rate_hz))))
    try:
        return StreamPrediction(lambda p: check.predicted_offset_hz(stream.tai_ns(p)), step_samples=step)
    except ValueError:
        return None


def _no_start(path: str) -> UsageError:
    return UsageError(f"{path}: the input carries no start time: give --start (ISO-8601 UTC of its first sample) "
                      f"or --no-time (then every ERT is null)")


def _open_input(recording: str, profile: LinkProfile, *, input_kind: str, datatype: str | None,
                sample_rate_hz: float | None, start: str | None, no_time: bool, verify_checksum: bool = True) -> _Input:
    """Open the input and its time base; refuse to invent a start time (no silent epoch)."""
    from pipeline.chain._time import ERT_DEFINITION
    from pipeline.timescales import format_utc

    if input_kind not in INPUT_KINDS:
        raise ValueError(f"Argument 'input_kind' must be iq | soft | bits, not {input_kind!r}.")
    if no_time and start is not None:
        raise UsageError("--start and --no-time exclude each other")
    live = is_stream(recording)
    if input_kind == "iq":
        from pipeline.recording import open_recording, open_stream

        if live:
            rec = open_stream(recording, format=datatype, sample_rate_hz=sample_rate_hz, start=start)
        else:
            rec = open_recording(recording, format=datatype, sample_rate_hz=sample_rate_hz, start=start,
                                 verify_checksum=verify_checksum)
        source, rate, total = rec, rec.sample_rate_hz, rec.num_samples
        info = {"path": Path(rec.path).name, "datatype": rec.datatype, "sample_rate_hz": rec.sample_rate_hz,
                "samples": rec.num_samples, "duration_s": rec.duration_s, "frequency_hz": rec.frequency_hz,
                "captures": len(rec.captures)}
    else:
        from pipeline.recording import open_symbol_stream, open_symbols

        if sample_rate_hz is not None or datatype is not None:
            raise UsageError("--format and --sample-rate apply to --input iq only; channel symbols are timed by "
                             "the profile's symbol rate")
        rate = profile.link.channel_bit_rate
        opener = open_symbol_stream if live else open_symbols
        source = opener(recording, input_kind, start=None if no_time else start, symbol_rate_hz=rate)
        total = source.num_symbols
        info = {"path": Path(recording).name, "input": input_kind, "channel_symbols": total,
                "duration_s": None if total is None else total / rate}
    if not source.time_known and not no_time:
        raise _no_start(recording)
    timed = source.time_known and not no_time
    info.update({"live": live, "start": format_utc(source.tai_ns(0)) if timed else None, "time_known": timed,
                 "time_source": source.time_source if timed else None,
                 "receive_delay_ns": profile.station.receive_delay_ns,
                 "ert_definition": ERT_DEFINITION if timed else None})
    return _Input(input_kind, source, total, source if timed else None, info, info["duration_s"], rate, live)


class _SpectrumTap:
    """The first :data:`SPECTRUM_SAMPLES` samples of a stream, kept for the report's spectrum."""

    def __init__(self):
        self.parts: list[np.ndarray] = []
        self.n = 0

    def feed(self, samples: np.ndarray) -> None:
        if self.n < SPECTRUM_SAMPLES:
            part = np.array(samples[: SPECTRUM_SAMPLES - self.n], dtype=np.complex64)
            self.parts.append(part)
            self.n += len(part)

    def samples(self) -> np.ndarray:
        return np.concatenate(self.parts) if self.parts else np.zeros(0, np.complex64)


def _spectrum(x: np.ndarray, sample_rate_hz: float) -> tuple[np.ndarray, np.ndarray] | None:
    """Welch power spectrum (dB, frequency offset sorted) of the first samples of an IQ recording."""
    from scipy.signal import welch

    if len(x) < 256:
        return None
    f, p = welch(x, fs=sample_rate_hz, nperseg=min(4096, len(x)), return_onesided=False, detrend=False)
    order = np.argsort(f)
    return f[order], 10 * np.log10(np.maximum(p[order], 1e-30))


def _run(inp: _Input, profile: LinkProfile, sinks, *, workers: int, progress: bool,
         segment_samples: int = DEFAULT_SEGMENT_SAMPLES, scheduler: str | None = None, verbose: bool = False,
         products: TimeProducts | None = None, drop_duplicates: bool = False, live_latency: bool = False):
    """Decode ``inp`` into ``sinks``; returns the summary (with the report dict), the plot data and the
    seconds each track point (a ``doppler.csv`` row) averages, ``doppler.tdm``'s INTEGRATION_INTERVAL (None
    for symbol input).

    ``live_latency`` hands a live stream's samples on as each read returns them (``--follow``) instead of
    in whole chunks; the output is the same either way.
    """
    from pipeline.report import RunFacts, build_report, waterfall_row_samples

    if scheduler is not None and inp.kind != "iq":
        raise UsageError("--scheduler applies to IQ recordings (their segments run as tasks); symbol files are "
                         "decoded in one process")
    products = products or TimeProducts()
    downlink_hz, tuning = _downlink(inp, profile)
    obt = products.obt_to_utc(profile)
    check = products.doppler_check(profile, downlink_hz, tuning) if inp.kind == "iq" else None
    if check is not None and inp.timebase is None:
        raise UsageError("--tle/--oem compare the Doppler at known times: they need the recording's start time")
    if inp.live and (workers > 1 or scheduler is not None):
        raise UsageError("a live stream is read once, in order, by one process: leave out --workers and --scheduler")
    t0 = time.perf_counter()
    bar = Progress(inp.total, enabled=progress, unit="sample" if inp.kind == "iq" else "symbol")
    back_options = dict(downlink_frequency_hz=downlink_hz, tuning_offset_hz=tuning, drop_duplicates=drop_duplicates,
                        obt_to_utc=obt, doppler_check=check)
    spectrum_tap = _SpectrumTap()
    block_samples = None  # samples each track point (a doppler.csv row) averages: the demodulator's block
    try:
        if inp.kind == "iq" and not inp.live:
            rec = inp.source
            back = BackEnd(profile, timebase=inp.timebase, sample_rate_hz=rec.sample_rate_hz, sinks=sinks,
                           **back_options)
            # IQ recordings are decoded in fixed overlapping segments: the output depends on the segment
            # length only, never on the number of workers.
            row = waterfall_row_samples(rec.num_samples, rec.sample_rate_hz)
            prediction = None if check is None else carrier_prediction(check, rec)
            segmented = SegmentedDecode(profile, workers=workers, segment_samples=segment_samples,
                                        waterfall_row_samples=row, scheduler=scheduler, verbose=verbose,
                                        carrier_prediction=prediction)
            front: FrontSummary = segmented.run(rec, back, on_segment=lambda res: bar.update(res.owned_stop))
            block_samples = segmented.block_samples
            spectrum_tap.feed(rec.read(0, min(SPECTRUM_SAMPLES, rec.num_samples)).samples)
        else:
            iq = inp.kind == "iq"
            # a live stream's length is not known: the prediction is worked out ahead as it goes
            prediction = None if check is None or not iq else \
                stream_carrier_prediction(check, inp.timebase, inp.source.sample_rate_hz)
            chain = DecodeChain(profile, input_kind=inp.kind, sample_rate_hz=inp.source.sample_rate_hz if iq else None,
                                timebase=inp.timebase, sinks=sinks, carrier_prediction=prediction,
                                waterfall_row_samples=waterfall_row_samples(inp.total, inp.position_rate_hz)
                                if iq else None, **back_options)
            try:
                n = profile.receiver.chunk_samples
                chunks = inp.source.chunks(n, fill=not live_latency) if inp.live else inp.source.chunks(n)
                for chunk in chunks:
                    if iq:
                        spectrum_tap.feed(chunk.samples)
                        chain.process_chunk(chunk)
                        bar.update(chunk.start + len(chunk.samples))
                    else:
                        chain.process_symbols(chunk.soft, chunk.start + np.arange(len(chunk.soft), dtype=np.float64))
                        bar.update(chunk.start + len(chunk.soft))
            except KeyboardInterrupt:
                if not inp.live:
                    raise
                inp.info["ended_by"] = "interrupt"  # Ctrl-C (or SIGTERM) is the normal end of a live run
            front = chain.finish()
            back = chain.back
            block_samples = chain.front.block_samples if iq else None
    finally:
        bar.close()
        sinks.close()
    if inp.live:  # the length of a stream is known at its end
        inp.total = inp.source.num_samples if inp.kind == "iq" else inp.source.num_symbols
        if inp.total is None:
            inp.total = inp.source.samples_read if inp.kind == "iq" else inp.source.symbols_read
        inp.duration_s = inp.total / inp.position_rate_hz
        inp.info.update({"samples" if inp.kind == "iq" else "channel_symbols": inp.total,
                         "duration_s": inp.duration_s})
    elapsed = time.perf_counter() - t0
    if inp.kind == "iq" and not inp.live:
        rec = inp.source
        inp.info["checksum"] = ("verified" if rec.checksum_verified else
                                "none in the metadata" if not rec.sha512 else "not checked (--no-checksum)")
    status = back.status_counts
    ok, idle = status.get("ok", 0), status.get("idle", 0)
    facts = RunFacts(
        tool=f"downlink {__version__}", profile=profile, input_kind=inp.kind, recording_info=inp.info,
        duration_s=float(inp.duration_s), elapsed_s=elapsed, samples=front.counts.samples,
        nonfinite=front.counts.nonfinite, clip_checked=front.counts.clip_checked,
        clipped_values=front.counts.clipped_values, demod_stats=front.demod,
        channel_symbols=front.counts.channel_symbols,
        locked_symbols=front.counts.locked_symbols, stage_stats=front.stats, sync_events=front.events,
        demod_events=back.events, track=back.track.arrays(), modulation_index_rad=back.track.modulation_index_rad,
        position_rate_hz=inp.position_rate_hz, frames=back.frame_count, packets=back.packet_count,
        status_counts=dict(status), accounting=back.accounting.as_dict(),
        packet_stats=back.extractor.stats.as_dict(), gaps=back.gaps, ert=back.ert if inp.timebase else None,
        utc_ns=None if back.clock is None else back.clock.utc_ns,
        downlink_frequency_hz=downlink_hz,
        spectrum=_spectrum(spectrum_tap.samples(), inp.position_rate_hz) if inp.kind == "iq" else None,
        constellation=front.constellation, waterfall=front.waterfall, frame_log=back.frame_log.arrays(),
        parser_stats=back.parser.stats.as_dict(),
        doppler_check=None if check is None else check.summary().as_dict(),
    )
    report, plots = build_report(facts)
    no_lock = None if front.demod is None else front.demod.no_lock_message()
    if no_lock is not None:
        report["demod"]["no_lock"] = no_lock
    if front.demod is not None and front.demod.acquisition_centre_hz is not None:
        report["demod"]["acquisition_centre_hz"] = front.demod.acquisition_centre_hz  # centred on the prediction
    if front.demod is not None and front.demod.carrier_found_mirrored:
        # spectrum_inverted = "auto" with an orbit: the carrier was found at the mirror image of the prediction only
        report["demod"]["carrier_found_mirrored"] = front.demod.carrier_found_mirrored
        report["demod"]["inversion_note"] = MIRRORED_PREDICTION_NOTE
        log.warning(MIRRORED_PREDICTION_NOTE)
    if report["pass"].get("clipping_note"):
        log.warning(report["pass"]["clipping_note"])
    summary = DecodeSummary(frames=back.frame_count, frames_ok=ok, frames_idle=idle,
                            frames_failed=back.frame_count - ok - idle, packets=back.packet_count,
                            duration_s=float(inp.duration_s), elapsed_s=elapsed, samples=front.counts.samples,
                            channel_symbols=front.counts.channel_symbols, input_kind=inp.kind, report=report,
                            no_lock=no_lock)
    interval_s = None if block_samples is None else block_samples / inp.source.sample_rate_hz
    return summary, plots, interval_s


def _downlink(inp: _Input, profile: LinkProfile) -> tuple[float | None, float]:
    """Nominal downlink frequency (profile, else the recording's centre) and the recording's tuning offset."""
    if inp.kind != "iq":
        return profile.link.downlink_frequency_hz, 0.0
    rec = inp.source
    downlink_hz = profile.link.downlink_frequency_hz or rec.frequency_hz
    tuning = float(rec.frequency_hz) - float(downlink_hz) if (downlink_hz and rec.frequency_hz) else 0.0
    return downlink_hz, tuning


class _TrackFolderSinks(FolderSinks):
    """:class:`FolderSinks` that also write ``doppler.tdm`` as the rows of ``doppler.csv`` pass: its data lines
    go to a body file in the folder at once (:class:`pipeline.orbit.TdmWriter`), so a live stream of any
    length holds no rows in memory; :meth:`finish_tdm` writes the message at the end of the run.

    ``tdm`` holds :class:`~pipeline.orbit.TdmWriter`'s keywords (None: no ``doppler.tdm``)."""

    def __init__(self, folder: Path, *, tdm: dict | None = None, **options):
        super().__init__(folder, **options)
        self.tdm = None
        if tdm is not None:
            from pipeline.orbit import TdmWriter

            self.tdm = TdmWriter(self.folder / "doppler.tdm", **tdm)

    def doppler(self, rows: list[dict]) -> None:
        super().doppler(rows)
        if self.tdm is not None:
            try:
                self.tdm.process(rows)
            except OSError as exc:
                raise self._error(exc) from None

    def close(self) -> None:
        super().close()
        if self.tdm is not None:
            try:
                self.tdm.close()
            except OSError as exc:
                raise self._error(exc) from None

    def finish_tdm(self, integration_interval_s: float | None) -> None:
        """Write ``doppler.tdm`` when a data line came (a locked row with a finite offset; the interval known);
        else remove its body (:meth:`pipeline.orbit.TdmWriter.finish` writes no message without a data line)."""
        if self.tdm is None:
            return
        try:
            if self.tdm.locked_rows and integration_interval_s:
                self.tdm.finish(integration_interval_s=integration_interval_s)
            else:
                self.tdm.discard()
        except OSError as exc:
            raise self._error(exc) from None


def _tdm_keywords(inp: _Input, profile: LinkProfile) -> dict | None:
    """:class:`pipeline.orbit.TdmWriter`'s keywords for this input; None where no ``doppler.tdm`` is written
    (symbol input, no time, no downlink frequency)."""
    if inp.kind != "iq" or inp.timebase is None:
        return None
    downlink_hz, tuning = _downlink(inp, profile)
    if not downlink_hz:
        return None
    return dict(spacecraft=profile.name.upper(), station=(profile.station.name or "STATION"),
                downlink_frequency_hz=downlink_hz, tuning_offset_hz=tuning)


def decode_to_folder(recording: str, profile: LinkProfile, out: str, *, overwrite: bool = False,
                     input_kind: str = "iq", datatype: str | None = None, sample_rate_hz: float | None = None,
                     start: str | None = None, no_time: bool = False, progress: bool = False, workers: int = 1,
                     cadus: bool = False, scheduler: str | None = None, verbose: bool = False,
                     products: TimeProducts | None = None, drop_duplicates: bool = False,
                     verify_checksum: bool = True, follow: bool = False, packets_to=None,
                     segment_samples: int = DEFAULT_SEGMENT_SAMPLES) -> DecodeSummary:
    """Decode ``recording`` with ``profile`` into the folder ``out``.

    Writes ``packets.jsonl``, ``frames.jsonl``, ``apid_NNNN.bin``, ``frames.bin``, ``frames_vcN.bin``,
    ``doppler.csv`` (IQ input), ``doppler.tdm`` (its locked rows as a CCSDS Tracking Data Message, when the
    input's time and the downlink frequency are known), ``report.json`` and ``report.html``; with ``cadus``
    also ``cadus.bin`` (see :class:`~pipeline.chain.FolderSinks`).

    ``recording`` may be ``-`` (standard input) or a pipe: a live stream, decoded in one process as it
    comes; its end (or Ctrl-C) is the normal end of the run.  ``follow`` writes the records straight into
    ``out`` as they are decoded, with a file ``INCOMPLETE`` there until the run has ended; ``packets_to``
    (a text stream, e.g. standard output) also receives every packet's JSON line at once.  Otherwise the
    folder appears only when the run completes.  An existing folder needs ``overwrite``.  The input is
    opened (and refused) before anything is written.
    """
    from pipeline.report import write_report

    inp = _open_input(recording, profile, input_kind=input_kind, datatype=datatype, sample_rate_hz=sample_rate_hz,
                      start=start, no_time=no_time, verify_checksum=verify_checksum)
    columns = None
    if products is not None and (products.tle or products.oem):
        from pipeline.demod.residual import DOPPLER_COLUMNS
        from pipeline.orbit import PREDICTION_COLUMNS

        columns = (*DOPPLER_COLUMNS, *PREDICTION_COLUMNS)
    with OutputFolder(out, overwrite=overwrite, live=follow) as tmp:
        # the carrier track as a CCSDS Tracking Data Message (503.0-B), its data lines written as they come
        sinks = _TrackFolderSinks(tmp, cadus=cadus, doppler_columns=columns, flush=follow, packets_to=packets_to,
                                  tdm=_tdm_keywords(inp, profile))
        summary, plots, interval_s = _run(inp, profile, sinks, workers=workers, progress=progress,
                                          segment_samples=segment_samples, scheduler=scheduler, verbose=verbose,
                                          products=products, drop_duplicates=drop_duplicates, live_latency=follow)
        sinks.finish_tdm(interval_s)
        write_report(tmp, summary.report, plots)
    summary.out = str(out)
    return summary


def decode_in_memory(recording: str, profile: LinkProfile, *, input_kind: str = "iq", datatype: str | None = None,
                     sample_rate_hz: float | None = None, start: str | None = None, no_time: bool = False,
                     progress: bool = False, workers: int = 1, scheduler: str | None = None,
                     products: TimeProducts | None = None, drop_duplicates: bool = False,
                     verify_checksum: bool = True, segment_samples: int = DEFAULT_SEGMENT_SAMPLES) -> DecodeSummary:
    """The same decode with the records kept in memory (``packets_list``, ``frames_list``); no files."""
    inp = _open_input(recording, profile, input_kind=input_kind, datatype=datatype, sample_rate_hz=sample_rate_hz,
                      start=start, no_time=no_time, verify_checksum=verify_checksum)
    sinks = MemorySinks()
    summary, _, _ = _run(inp, profile, sinks, workers=workers, progress=progress, segment_samples=segment_samples,
                         scheduler=scheduler, products=products, drop_duplicates=drop_duplicates)
    summary.packets_list = sinks.packets
    summary.frames_list = sinks.frames
    return summary
