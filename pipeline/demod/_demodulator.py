"""The demodulator stage: complex IQ chunks in, soft channel bits with sample positions out."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from pipeline.demod._acquire import estimate_carrier_offset
from pipeline.demod._filters import gardner_detector_gain, matched_filter_taps, midpoint_energy_ratio
from pipeline.demod._kernels import (
    PARAM_SIZE,
    STATE_F_SIZE,
    STATE_I_SIZE,
    derotate,
    fir_interleaved,
    power_nonzero,
    track_symbols,
)
from pipeline.demod._snr import estimate_esn0_m2m4
from pipeline.profile import LinkSection, ReceiverSection

__all__ = ["Demodulator", "SymbolBlock", "TrackPoint", "DemodStats", "check_chunk", "continue_stream", "cut_blocks"]

_MOD_CODES = {"bpsk": 0, "qpsk": 1, "oqpsk": 2}
_RRC_SPAN_SYMBOLS = 8
_AUTO_CARRIER_BANDWIDTH = 0.002  # x symbol rate; see Demodulator Notes
_ZETA = 1.0 / math.sqrt(2.0)


@dataclass(frozen=True)
class TrackPoint:
    """Receiver state at the end of one processing block.

    ``position`` is the sample position of the block's last symbol, ``carrier_offset_hz`` the
    carrier frequency measured over the block (numerically-controlled oscillator plus the loop's
    phase advance), ``esn0_db`` the block's M2M4 estimate (``nan`` if not measurable).
    ``carrier_phase_rad`` is the receiver's total, unwrapped carrier phase at ``position``
    (oscillator plus loop), continuous over the whole run, for precise frequency fits.
    """

    position: float
    carrier_offset_hz: float
    esn0_db: float
    carrier_locked: bool
    symbol_locked: bool
    carrier_phase_rad: float = float("nan")


def _empty_f64() -> np.ndarray:
    return np.zeros(0, dtype=np.float64)


@dataclass(frozen=True)
class SymbolBlock:
    """Output of :meth:`Demodulator.process` (see DEVELOPERS.md, pipeline.demod).

    ``soft``: float32 per channel bit in transmission order (QPSK/OQPSK: I then Q), positive =
    bit 0, about +-1 when noise-free.  ``position``: float64 sample position of the modulation
    symbol carrying each bit.  ``locked``: carrier lock per channel bit.  ``track``: one
    :class:`TrackPoint` per processing block completed.  ``symbols``: the normalised complex
    symbols (one per modulation symbol; OQPSK: I and its half-symbol-later Q), for plots.

    The carrier phase ambiguity (180 degrees BPSK, 90 degrees QPSK/OQPSK) is left to the
    synchronizer.  For OQPSK a 90-degree slip also exchanges the roles of the I and Q strobes:
    the interleaved bit stream is then shifted by one channel bit (one channel inverted) and
    positions refer to the other channel's pulse peak, half a symbol later.
    """

    soft: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.float32))
    position: np.ndarray = field(default_factory=_empty_f64)
    locked: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=bool))
    track: list = field(default_factory=list)
    symbols: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.complex64))

    def __len__(self) -> int:
        return int(self.soft.shape[0])


@dataclass
class DemodStats:
    """Counters of one run (bad data is counted here, never raised)."""

    samples_in: int = 0
    nonfinite_samples: int = 0
    symbols_out: int = 0
    carrier_locked_symbols: int = 0
    acquisitions: int = 0
    carrier_found: int = 0
    last_peak_ratio: float = 0.0


def _next_pow2(n: float) -> int:
    return 1 << max(0, int(math.ceil(math.log2(max(1.0, n)))))


def check_chunk(chunk: Any) -> tuple[np.ndarray, int]:
    """Validate a chunk (``samples`` complex 1-D, ``start`` int >= 0): contiguous complex64 samples, start."""
    try:
        samples = chunk.samples
        start = chunk.start
    except AttributeError:
        raise TypeError(f"Argument 'chunk' must have 'samples' and 'start', not {type(chunk).__name__}.") from None
    samples = np.asarray(samples)
    if samples.ndim != 1:
        raise ValueError(f"Argument 'chunk.samples' must be one-dimensional, not shape {samples.shape}.")
    if not np.iscomplexobj(samples):
        raise TypeError(f"Argument 'chunk.samples' must be complex, not {samples.dtype}.")
    if isinstance(start, bool) or not isinstance(start, (int, np.integer)) or start < 0:
        raise ValueError(f"Argument 'chunk.start' must be a non-negative integer, not {start!r}.")
    return np.ascontiguousarray(samples, dtype=np.complex64), int(start)


def continue_stream(next_start: int | None, start: int) -> None:
    """Raise unless a chunk starting at ``start`` continues a stream expected at ``next_start``."""
    if next_start is not None and start != next_start:
        raise ValueError(f"Argument 'chunk' must continue the stream at sample {next_start}, not start at {start}.")


def cut_blocks(pending: np.ndarray, samples: np.ndarray, block_samples: int) -> tuple[list[np.ndarray], np.ndarray]:
    """``pending`` then ``samples`` cut into full blocks of ``block_samples``, and the rest (an own copy)."""
    buf = np.concatenate([pending, samples]) if pending.size else samples
    nfull = buf.size // block_samples
    blocks = [buf[j * block_samples:(j + 1) * block_samples] for j in range(nfull)]
    return blocks, np.array(buf[nfull * block_samples:], dtype=np.complex64)


class Demodulator:
    """Suppressed-carrier BPSK / QPSK / OQPSK demodulator streaming in chunks.

    Parameters
    ----------
    link : LinkSection
        Modulation, symbol rate, pulse and roll-off.
    receiver : ReceiverSection
        Loop bandwidths, loop order and acquisition range.
    sample_rate_hz : float
        Sample rate of the recording; any ratio to the symbol rate of at least 2.

    Notes
    -----
    Samples are processed in blocks of ``block_samples`` aligned to the first sample fed, so
    the output does not depend on how the input is chunked (a partial block waits for the next
    call or for :meth:`flush`).  Per block:

    1. NaN/Inf samples become 0 (erasures; counted), block AGC to unit mean power (zeros excluded).
    2. Rotation by the numerically-controlled oscillator (NCO) at the current carrier estimate.
    3. RRC: matched filter over 8 symbols (its truncation leaves the Es/N0 estimate unbiased
       to 25 dB at roll-off 0.5), a blocked FIR of odd length ``2 D + 1`` whose output is
       re-indexed by ``D`` so that MF sample ``n`` is centred on recording sample ``n``.
       Rect: no FIR; the tracker integrates the samples over the exact (fractional) symbol
       window at each strobe, which is the matched filter evaluated where it is needed.
    4. Gardner timing recovery with a cubic Farrow interpolator and a decision-directed Costas
       loop at symbol rate (:func:`pipeline.demod._kernels.track_symbols`).  At the block end
       the loop's frequency integrator is moved into the NCO, so the matched filter always sees
       a nearly centred spectrum even under large Doppler drift.
    5. One :class:`TrackPoint` with the measured frequency and the block's M2M4 Es/N0.

    Acquisition (at start, when the carrier stayed unlocked for ``reacquire_symbols``, and
    again right away after a search that found no line while the loop is still unlocked):
    ``acquisition_samples`` are held, the carrier is estimated from the spectral line of the
    squared / fourth-power matched-filter output over ``+- acquisition_range * symbol_rate``,
    and the held samples are then demodulated with that estimate, so nothing is lost.

    Carrier loop bandwidth: ``[receiver] carrier_loop_bandwidth_hz``, or automatic
    ``0.002 * symbol_rate`` (480 Hz at 240 ksym/s): at Es/N0 = -1 dB its phase jitter is about
    4 degrees (squaring loss included), and the second-order loop's lag under a 500 Hz/s
    Doppler rate ``2 pi R / wn^2`` is 0.004 rad.  Positions are exact strobe times: a symbol's
    position is the recording sample at which its pulse peaks once the timing loop has locked.

    Cost per sample: one complex rotation, ``2 D + 1`` real multiply-adds per I and Q, and
    per symbol two cubic interpolations and the loop updates.
    """

    def __init__(self, *, link: LinkSection, receiver: ReceiverSection, sample_rate_hz: float) -> None:
        if not isinstance(link, LinkSection):
            raise TypeError(f"Argument 'link' must be a LinkSection, not {type(link).__name__}.")
        if not isinstance(receiver, ReceiverSection):
            raise TypeError(f"Argument 'receiver' must be a ReceiverSection, not {type(receiver).__name__}.")
        if isinstance(sample_rate_hz, bool) or not isinstance(sample_rate_hz, (int, float)):
            raise TypeError(f"Argument 'sample_rate_hz' must be a number, not {type(sample_rate_hz).__name__}.")
        fs = float(sample_rate_hz)
        if not (math.isfinite(fs) and fs > 0):
            raise ValueError(f"Argument 'sample_rate_hz' must be a positive finite number, not {sample_rate_hz!r}.")
        if link.modulation not in _MOD_CODES:
            raise ValueError(f"Argument 'link.modulation' must be bpsk | qpsk | oqpsk for the Demodulator, "
                             f"not {link.modulation!r}.")
        if link.pulse not in ("rrc", "rect"):
            raise ValueError(f"Argument 'link.pulse' must be rrc | rect, not {link.pulse!r}.")
        if not (link.symbol_rate_baud > 0 and math.isfinite(link.symbol_rate_baud)):
            raise ValueError(f"Argument 'link.symbol_rate_baud' must be > 0, not {link.symbol_rate_baud!r}.")
        sps = fs / link.symbol_rate_baud
        if sps < 2.0:
            raise ValueError(f"Argument 'sample_rate_hz' must give at least 2 samples per symbol, not {sps:.4g} "
                             f"({fs:g} Hz for {link.symbol_rate_baud:g} baud).")
        self.link = link
        self.receiver = receiver
        self.sample_rate_hz = fs
        self.samples_per_symbol = sps
        self.modulation = link.modulation
        self.bits_per_symbol = link.bits_per_symbol
        self._mod_code = _MOD_CODES[link.modulation]
        self._power = 2 if self._mod_code == 0 else 4

        self.taps = matched_filter_taps(link.pulse, link.rolloff, sps, _RRC_SPAN_SYMBOLS)
        # rect pulses: the tracker integrates the raw samples over the exact symbol window at each
        # strobe (no FIR, no interpolation error on the triangular matched-filter response)
        self._box_half = 0.5 * sps if link.pulse == "rect" else 0.0
        self.filter_delay_samples = 0 if self._box_half else (self.taps.size - 1) // 2
        self._look = int(self._box_half + 0.5) + 2 if self._box_half else 2
        self.block_samples = max(32768, _next_pow2(4096 * sps))
        self.acquisition_samples = max(self.block_samples, _next_pow2(8192 * sps))
        self.reacquire_symbols = 65536
        self.acquisition_search_hz = receiver.acquisition_range * link.symbol_rate_baud

        bw_hz = receiver.carrier_loop_bandwidth_hz or _AUTO_CARRIER_BANDWIDTH * link.symbol_rate_baud
        self.carrier_loop_bandwidth_hz = float(bw_hz)
        self.carrier_loop_order = int(receiver.carrier_loop_order)
        bn_c = bw_hz / link.symbol_rate_baud
        if bn_c >= 0.05:
            raise ValueError(f"Argument 'receiver.carrier_loop_bandwidth_hz' must be below 5% of the symbol rate, "
                             f"not {bw_hz:g} Hz.")
        # loop gains in the continuous-time approximation, valid for B_L T << 1
        # (F. M. Gardner, Phaselock Techniques, 3rd ed., ch. 2-3; E. D. Kaplan, Understanding GPS, 2nd ed., 5.6)
        wn2 = 2.0 * bn_c / (_ZETA + 1.0 / (4.0 * _ZETA))
        kp_c2 = 2.0 * _ZETA * wn2
        if self.carrier_loop_order == 3:
            wn3 = bn_c / 0.7845
            kp_c, ki_c, kr_c = 2.4 * wn3, 1.1 * wn3 * wn3, wn3 ** 3
        else:
            kp_c, ki_c, kr_c = kp_c2, wn2 * wn2, 0.0
        bn_t = receiver.timing_loop_bandwidth
        wnt = 2.0 * bn_t / (_ZETA + 1.0 / (4.0 * _ZETA))
        kd = gardner_detector_gain(link.pulse, link.rolloff)
        r0 = midpoint_energy_ratio(link.pulse, link.rolloff)
        qpsk = self._mod_code != 0
        params = np.zeros(PARAM_SIZE, dtype=np.float64)
        params[:20] = [
            sps, 2.0 * _ZETA * wnt, wnt * wnt, kp_c, ki_c, kr_c, min(0.2, 4.0 * kp_c2),
            1.0 / 1024.0,                       # amplitude (M2M4) averaging
            1.0 / (2048.0 if qpsk else 256.0),  # carrier-lock averaging: r^4 is noisier than r^2
            1.0 / 1024.0,                       # symbol-lock averaging
            0.75, 0.3, 0.15 if qpsk else 0.25,  # carrier lock on / off (relative), minimum absolute
            0.5, 0.25, 0.04,                    # symbol lock on / off (relative), minimum absolute
            r0, kd,
            128.0,                              # warm-up, and symbols in a row meeting the lock condition
            self._box_half,                     # > 0: exact integrate-and-dump (rect pulses)
        ]
        self._params = params
        self.reset()

    # ---- state -------------------------------------------------------------------------
    def reset(self) -> None:
        """Forget all state: the next :meth:`process` starts a new stream."""
        self._next_start: int | None = None
        self._stream_start = 0
        self._pending = np.zeros(0, dtype=np.complex64)
        self._pending_start = 0
        self._held: list[np.ndarray] = []
        self._held_start = 0
        self._acquiring = True
        self._agc_power = 0.0
        self._nco_hz = 0.0
        self._nco_phase = 0.0
        self._nco_phase_unwrapped = 0.0
        self._run_sample = 0
        self._fir_hist = np.zeros(self.taps.size - 1, dtype=np.complex64)
        self._mf_tail = np.zeros(0, dtype=np.complex64)
        self._mf_tail_base = -self.filter_delay_samples
        self._sf = np.zeros(STATE_F_SIZE, dtype=np.float64)
        self._si = np.zeros(STATE_I_SIZE, dtype=np.int64)
        self._sf[18] = 1.0
        self._unlocked_run = 0
        self._retry_acquisition = False
        self._finished = False
        self.stats = DemodStats()

    # ---- public ------------------------------------------------------------------------
    def process(self, chunk: Any) -> SymbolBlock:
        """Demodulate one chunk (an object with ``samples``, ``start`` and ``nonfinite``).

        Returns the symbols of every processing block completed so far; a partial block is kept.
        """
        if self._finished:
            raise ValueError("Argument 'chunk' cannot be processed after flush(); call reset() first.")
        samples, start = self._check_chunk(chunk)
        self.stats.nonfinite_samples += int(getattr(chunk, "nonfinite", 0) or 0)
        continue_stream(self._next_start, start)
        if self._next_start is None:
            self._stream_start = start
            self._pending_start = start
            self._mf_tail_base = start - self.filter_delay_samples
            self._sf[0] = float(start)
            self._run_sample = start
        self._next_start = start + samples.size
        self.stats.samples_in += samples.size
        blocks, self._pending = cut_blocks(self._pending, samples, self.block_samples)
        parts: list[dict] = []
        for block in blocks:
            self._feed_block(block, parts)
        self._pending_start += len(blocks) * self.block_samples
        return self._assemble(parts)

    def flush(self) -> SymbolBlock:
        """Demodulate what is left (partial block, held acquisition samples) up to the last sample."""
        if self._finished or self._next_start is None:
            self._finished = True
            return SymbolBlock()
        parts: list[dict] = []
        end = float(self._next_start)
        if self._pending.size:
            self._feed_block(self._pending, parts, final=True)
            self._pending = np.zeros(0, dtype=np.complex64)
        elif self._acquiring and self._held:
            self._acquire_and_release(parts)
        # push the matched filter's delay line out with zeros so the last symbols are produced
        tail = np.zeros(max(self.filter_delay_samples, self._look) + 4, dtype=np.complex64)
        self._run_block(tail, parts, t_limit=end, tail=True)
        self._finished = True
        return self._assemble(parts)

    # ---- internals ---------------------------------------------------------------------
    def _check_chunk(self, chunk: Any) -> tuple[np.ndarray, int]:
        return check_chunk(chunk)

    def _feed_block(self, block: np.ndarray, parts: list, final: bool = False) -> None:
        # the sum is NaN/Inf when any sample is (or, harmlessly, on float32 overflow)
        if not np.isfinite(block.view(np.float32).sum()):
            bad = ~np.isfinite(block)
            if bad.any():
                # Chunk readers normally zero these already; count only the ones that reach us
                self.stats.nonfinite_samples += int(bad.sum())
                block = block.copy()
                block[bad] = 0
        if self._acquiring:
            self._held.append(np.array(block, dtype=np.complex64))  # own copy: the caller's buffer may change
            held = sum(h.size for h in self._held)
            if held >= self.acquisition_samples or final:
                self._acquire_and_release(parts)
            return
        self._run_block(block, parts)

    def _acquire_and_release(self, parts: list) -> None:
        held = np.concatenate(self._held)
        self._held = []
        self._acquiring = False
        self.stats.acquisitions += 1
        if held.size >= 1024:
            est = estimate_carrier_offset(held, sample_rate_hz=self.sample_rate_hz, power=self._power,
                                          search_hz=self.acquisition_search_hz, prefilter=self.taps)
            self.stats.last_peak_ratio = est.peak_ratio
            if est.found:
                self.stats.carrier_found += 1
                self._nco_hz = est.offset_hz
                self._sf[3] = 0.0
                self._sf[4] = 0.0
            # nothing found (no signal yet, or a fade): look again as soon as these blocks are
            # demodulated, unless the loop has locked on its own meanwhile
            self._retry_acquisition = not est.found
        b = self.block_samples
        for j in range(0, held.size, b):
            self._run_block(held[j:j + b], parts)
        if self._retry_acquisition and not self._si[1]:
            self._acquiring = True
            self._unlocked_run = 0
        self._retry_acquisition = False

    def _run_block(self, block: np.ndarray, parts: list, t_limit: float = math.inf, tail: bool = False) -> None:
        fs = self.sample_rate_hz
        n = block.size
        if not tail:
            p, cnt = power_nonzero(block)
            if cnt:
                self._agc_power = p if self._agc_power == 0.0 else 0.8 * self._agc_power + 0.2 * p
        gain = 1.0 / math.sqrt(self._agc_power) if self._agc_power > 0.0 else 1.0
        y = np.empty(n, dtype=np.complex64)
        dphase = 2.0 * math.pi * self._nco_hz / fs
        phase_at_block = self._nco_phase_unwrapped
        block_first = self._run_sample
        self._nco_phase = derotate(block, gain, self._nco_phase, dphase, 256, y)
        self._nco_phase_unwrapped += dphase * n
        self._run_sample += n
        if self._box_half:
            mf = y
        else:
            u = np.concatenate([self._fir_hist, y])
            mf = np.empty(n, dtype=np.complex64)
            fir_interleaved(u.view(np.float32), self.taps, mf.view(np.float32))
            self._fir_hist = u[u.size - (self.taps.size - 1):].copy()
        mfbuf = np.concatenate([self._mf_tail, mf])
        base = self._mf_tail_base
        cap = int(mfbuf.size / self.samples_per_symbol * 1.1) + 8
        pos = np.empty(cap, dtype=np.float64)
        sym = np.empty(cap, dtype=np.complex64)
        amp = np.empty(cap, dtype=np.float32)
        flags = np.empty(cap, dtype=np.int8)
        theta = np.empty(cap, dtype=np.float64)
        nsym = track_symbols(mfbuf, base, t_limit, self._params, self._mod_code,
                             1 if self.carrier_loop_order == 3 else 0, self._sf, self._si,
                             pos, sym, amp, flags, theta)
        keep_from = max(0, int(math.floor(self._sf[0])) - self._look - base)
        self._mf_tail = mfbuf[keep_from:].copy()
        self._mf_tail_base = base + keep_from

        pos, sym, amp, flags, theta = pos[:nsym], sym[:nsym], amp[:nsym], flags[:nsym], theta[:nsym]
        # carrier frequency over the block: NCO plus the loop's phase advance between strobes
        sym_period = self.samples_per_symbol * (1.0 - self._sf[1])
        if nsym >= 64 and pos[-1] > pos[0]:
            loop_hz = (theta[-1] - theta[0]) / (2.0 * math.pi) * fs / (pos[-1] - pos[0])
        else:
            loop_hz = self._sf[3] * fs / (2.0 * math.pi * sym_period)
        freq_hz = self._nco_hz + loop_hz
        # hand the loop's frequency integrator to the NCO (the total correction is unchanged)
        self._nco_hz += self._sf[3] * fs / (2.0 * math.pi * sym_period)
        self._sf[3] = 0.0

        clock = (flags & 1).astype(bool)
        if nsym:
            # Es/N0 from the symbols before the amplitude normalisation: the running amplitude
            # estimate fluctuates at low SNR and would inflate M4 (-0.35 dB bias at -1 dB)
            # the symbol's matched-filter centre was rotated at about this oscillator phase
            total_phase = phase_at_block + dphase * (pos[-1] - block_first) + theta[-1]
            track = [TrackPoint(float(pos[-1]), float(freq_hz), estimate_esn0_m2m4(sym * amp),
                                bool(clock[-1]), bool(flags[-1] & 2), float(total_phase))]
            run = 0
            if not clock.any():
                self._unlocked_run += nsym
            else:
                last_locked = int(np.flatnonzero(clock)[-1])
                run = nsym - 1 - last_locked
                self._unlocked_run = run
        else:
            track = []
        parts.append({"pos": pos, "sym": sym, "amp": amp, "locked": clock, "track": track})
        self.stats.symbols_out += nsym
        self.stats.carrier_locked_symbols += int(clock.sum())
        if not tail and self._unlocked_run >= self.reacquire_symbols:
            self._unlocked_run = 0
            self._acquiring = True

    def _assemble(self, parts: list) -> SymbolBlock:
        if not parts:
            return SymbolBlock()
        pos = np.concatenate([p["pos"] for p in parts])
        sym = np.concatenate([p["sym"] for p in parts])
        locked = np.concatenate([p["locked"] for p in parts])
        track = [t for p in parts for t in p["track"]]
        norm = sym  # already divided by the amplitude estimate in the kernel
        if self.bits_per_symbol == 1:
            soft = norm.real.astype(np.float32)
            position = pos
            lock_bits = locked
        else:
            soft = np.empty(2 * sym.size, dtype=np.float32)
            soft[0::2] = math.sqrt(2.0) * norm.real
            soft[1::2] = math.sqrt(2.0) * norm.imag
            position = np.repeat(pos, 2)
            lock_bits = np.repeat(locked, 2)
        return SymbolBlock(soft=soft, position=position, locked=lock_bits, track=track, symbols=norm)
