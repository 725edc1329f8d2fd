"""Residual-carrier (PCM/PM, PCM/PSK/PM) and Bi-phase-L demodulator: IQ chunks in, soft channel bits out."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from pipeline.demod import DemodStats, Demodulator, SymbolBlock, TrackPoint
from pipeline.demod._acquire import LINE_THRESHOLD, CarrierSearch, SpectralLine, spectral_line
from pipeline.demod._demodulator import DcBlocker, check_chunk, continue_stream, cut_blocks
from pipeline.demod.residual._kernels import (
    CARRIER_PARAM_SIZE,
    CARRIER_STATE_SIZE,
    SYMBOL_PARAM_SIZE,
    SYMBOL_STATE_SIZE,
    rect_symbols,
    timing_search,
    track_carrier,
)
from pipeline.profile import LinkSection, ReceiverSection

__all__ = ["ResidualCarrierDemodulator", "ResidualTrackPoint", "make_demodulator",
           "modulation_index_from_amplitudes", "MAX_SAMPLES_PER_SYMBOL"]

_ZETA = 1.0 / math.sqrt(2.0)
#: automatic carrier loop bandwidth, x symbol rate (see ResidualCarrierDemodulator Notes)
_AUTO_CARRIER_BW = 0.005
_AUTO_CARRIER_BW_NRZ_PM = 0.001
#: subcarrier loop bandwidth, x symbol rate
_SUBCARRIER_BW = 0.002
_SQUARE_WINDOW_CYCLES = 0.125  # half-width of the windowed quadrature reference of a square subcarrier
_DTTL_WINDOW = 0.125  # half-width of the transition window, x symbol period
#: Samples per symbol the residual-carrier demodulator serves at most: its work per sample does not grow
#: with it, but one processing block (256 symbols or more) must stay a fraction of a second of work.
MAX_SAMPLES_PER_SYMBOL = 4096.0
#: Symbol-period offset the transition tracking loop follows (fraction of the nominal period).
_TIMING_RATE_LIMIT = 0.02
_TIMING_TRIALS = 32
_SUB_BLOCKS = 8
_REACQUIRE_BLOCKS = 3
_SYMBOL_LOCK_ESN0_DB = -3.0


@dataclass(frozen=True)
class ResidualTrackPoint(TrackPoint):
    """A :class:`pipeline.demod.TrackPoint` plus the residual-carrier observables of one block.

    ``position`` is the centre sample of the processing block, the epoch of the mean frequency
    ``carrier_offset_hz`` over the block (the one-way Doppler observable when the recording is
    tuned to the nominal downlink frequency); ``carrier_std_hz`` the standard error of that mean
    (residual spread of 8 sub-block frequencies about a straight line, over ``sqrt 8``);
    ``modulation_index_rad`` the index estimated from the coherent carrier and data amplitudes of
    the block (``nan`` without lock or for suppressed carrier).
    """

    carrier_std_hz: float = float("nan")
    modulation_index_rad: float = float("nan")


def modulation_index_from_amplitudes(carrier_amplitude: float, data_amplitude: float, *, wave: str) -> float:
    """Modulation index ``m`` (rad) from the coherent carrier and data amplitudes.

    Parameters
    ----------
    carrier_amplitude, data_amplitude : float
        Mean in-phase carrier ``A_c`` and the data amplitude ``A_d`` per sample after the carrier loop
        (any common scale).
    wave : {"nrz", "square", "sine"}
        ``"nrz"`` for PCM/PM (NRZ or Bi-phase-L) and ``"square"`` for a square subcarrier:
        ``A_c = A cos m``, ``A_d = A sin m``, so ``m = atan2(A_d, A_c)`` and the carrier keeps
        ``cos^2 m = A_c^2 / (A_c^2 + A_d^2)`` of the power.  ``"sine"``: ``A_c = A J0(m)`` and the
        first-harmonic correlation ``A_d = A J1(m)``, solved for ``m`` on (0, 2.4) by bisection
        (``J1 / J0`` increases there).

    Returns
    -------
    float
        ``m`` in radians, ``nan`` when an amplitude is not positive.

    References
    ----------
    Jacobi-Anger expansion ``exp(j m sin x) = sum_n J_n(m) exp(j n x)``, Abramowitz & Stegun 9.1.41-9.1.43.
    """
    ac = float(carrier_amplitude)
    ad = float(data_amplitude)
    if not (ac > 0.0 and ad > 0.0 and math.isfinite(ac) and math.isfinite(ad)):
        return float("nan")
    if wave in ("nrz", "square"):
        return math.atan2(ad, ac)
    if wave != "sine":
        raise ValueError(f"Argument 'wave' must be nrz | square | sine, not {wave!r}.")
    from scipy.special import j0, j1

    target = ad / ac
    lo, hi = 1e-9, 2.4
    if target >= float(j1(hi) / j0(hi)):
        return hi
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        if float(j1(mid) / j0(mid)) < target:
            lo = mid
        else:
            hi = mid
    return 0.5 * (lo + hi)


def _next_pow2(n: float) -> int:
    return 1 << max(0, int(math.ceil(math.log2(max(1.0, n)))))


def _loop_gains(bn: float, order: int) -> tuple[float, float, float]:
    """Proportional, integral and rate gains of a loop of noise bandwidth ``bn`` (per update), B_L T << 1.

    Second order, damping 1/sqrt 2; third order with Kaplan's coefficients (E. D. Kaplan,
    *Understanding GPS*, 2nd ed., table 5.6; F. M. Gardner, *Phaselock Techniques*, 3rd ed., ch. 2-3).
    """
    if order == 3:
        wn = bn / 0.7845
        return 2.4 * wn, 1.1 * wn * wn, wn ** 3
    wn = 2.0 * bn / (_ZETA + 1.0 / (4.0 * _ZETA))
    return 2.0 * _ZETA * wn, wn * wn, 0.0


def _frequency_std_hz(phase_rad: np.ndarray, sample_rate_hz: float) -> float:
    """Standard error of a block's mean carrier frequency from 8 sub-block frequencies.

    Each sub-block frequency is its phase advance over its duration; a straight line in time is
    fitted to them (a Doppler rate moves the frequency within the block and is not noise), and the
    standard error of the line at the block centre is ``s_r / sqrt(K)`` with the residual standard
    deviation ``s_r`` (``K - 2`` degrees of freedom).  The sub-block values share their end phases,
    which makes successive ones negatively correlated, so this errs on the large side.
    """
    n = phase_rad.size
    if n < 4 * _SUB_BLOCKS:
        return float("nan")
    edges = np.linspace(0, n - 1, _SUB_BLOCKS + 1).astype(np.int64)
    e0, e1 = edges[:-1], edges[1:]
    freq = (phase_rad[e1] - phase_rad[e0]) / (2.0 * math.pi * (e1 - e0)) * sample_rate_hz
    t = 0.5 * (e0 + e1) - 0.5 * (n - 1)
    a = np.vstack([np.ones_like(t, dtype=np.float64), t.astype(np.float64)]).T
    coef, *_ = np.linalg.lstsq(a, freq, rcond=None)
    resid = freq - a @ coef
    s_r = math.sqrt(float(np.sum(resid * resid)) / (_SUB_BLOCKS - 2))
    return s_r / math.sqrt(_SUB_BLOCKS)


def _real_m2m4(raw: np.ndarray) -> tuple[float, float]:
    """Signal power ``S`` and noise variance ``N`` of real antipodal symbols in real Gaussian noise.

    ``M2 = S + N``, ``M4 = S^2 + 6 S N + 3 N^2``, hence ``S = sqrt((3 M2^2 - M4) / 2)`` (Pauluzzi &
    Beaulieu, IEEE Trans. Commun. 48 (2000) 1681, the real-channel form of sec. II-E).
    """
    r = np.asarray(raw, dtype=np.float64)
    if r.size < 8:
        return float("nan"), float("nan")
    m2 = float(np.mean(r * r))
    m4 = float(np.mean(r ** 4))
    d = 0.5 * (3.0 * m2 * m2 - m4)
    s = math.sqrt(d) if d > 0.0 else 0.0
    return s, m2 - s


class ResidualCarrierDemodulator:
    """Residual-carrier PCM/PM and PCM/PSK/PM, and Bi-phase-L on suppressed-carrier BPSK, streaming.

    Parameters
    ----------
    link : LinkSection
        ``modulation`` ``"pcm-pm"`` (NRZ-L, NRZ-M or Bi-phase-L data directly on the carrier),
        ``"pcm-psk-pm"`` (data BPSK on a ``subcarrier_hz`` square or sine subcarrier), or ``"bpsk"``
        with ``line_code = "bi-phase-l"`` (no carrier left).  ``modulation_index_rad`` is reported
        against the estimate; the waveforms are rectangular (``pulse`` and ``rolloff`` are not used).
    receiver : ReceiverSection
        ``carrier_loop_bandwidth_hz`` (0 = automatic), ``carrier_loop_order`` (2 or 3),
        ``timing_loop_bandwidth`` (x symbol rate), ``acquisition_range_hz``, ``spectrum_inverted``.
    sample_rate_hz : float
        4 (8 for Bi-phase-L) to 4096 samples per symbol, and at least 4 per subcarrier cycle.

    Notes
    -----
    Same interface and conventions as :class:`pipeline.demod.Demodulator`: soft float32 per
    channel bit, positive = bit 0, about +-1; positions are the centre of each data symbol (for
    Bi-phase-L its mid-bit transition); line decoding (NRZ-M) is left to the chain, and Bi-phase-L
    is fully decoded here (the soft values are NRZ-L levels).  Samples are processed in blocks of
    ``block_samples`` aligned to the first sample, so the output does not depend on the chunking.
    Per block:

    1. NaN/Inf samples become 0 (counted); conjugated when ``[receiver] spectrum_inverted = true``
       (the data of a residual-carrier link come out inverted otherwise, which the frame
       synchronizer's inverted marker resolves, but the Doppler sign would be wrong); the DC
       offset removed (:class:`pipeline.demod.DcBlocker`); AGC to unit mean power.
    2. Acquisition (first block, and after the carrier stayed unlocked for 3 blocks): the
       residual carrier is the strongest line of the block's spectrum (its mean removed) in
       ``+- acquisition_range_hz`` (default: the whole band); its phase and amplitude come from a
       correlation at that frequency.  BPSK Bi-phase-L: a :class:`pipeline.demod.CarrierSearch`
       (the band of the Manchester spectrum, then the squared signal's line).  The
       subcarrier phase (to a half cycle, the data-sign ambiguity the frame sync resolves) is the
       angle of ``-sum c_j^2`` over chip-long correlations ``c_j`` with ``exp(-j 2 pi psi)``; the
       symbol timing is the best of 32 trial phases by mean ``|s|``.
    3. :func:`~pipeline.demod.residual._kernels.track_carrier`: a second- or third-order PLL at the
       sample rate on the residual carrier (a Costas loop for BPSK), and a Costas loop on the
       subcarrier; the data signal is the carrier's quadrature times the subcarrier reference.
    4. :func:`~pipeline.demod.residual._kernels.rect_symbols`: integrate-and-dump matched filter
       (``+`` then ``-`` half for Bi-phase-L) and a data-transition tracking loop.
    5. One :class:`ResidualTrackPoint`: mean carrier frequency over the block with its standard
       error, Es/N0 (real M2M4 on the symbols), modulation index, lock flags.

    Loop bandwidths: carrier automatic ``0.005 x symbol rate`` (10 Hz at 2 ksym/s), ``0.001 x``
    for NRZ PCM/PM, whose data spectrum peaks at the carrier: the data then adds a phase
    variance of about ``2 B_L T tan^2 m`` rad^2 (0.008 rad^2 at m = 1.1, from the NRZ spectrum
    ``T sinc^2 f T`` at 0 Hz).  Thermal phase variance ``B_L / (P_c / N0)`` =
    ``(B_L T) tan^2 m / (Es/N0)`` (0.006 rad^2 at Es/N0 = 5 dB, m = 1.1; Gardner, *Phaselock
    Techniques*, ch. 4).  Subcarrier ``0.002 x symbol rate``: a square subcarrier loses
    ``1 - 4 |delta|`` of its amplitude to a phase error of ``delta`` cycles (about 0.006 cycles
    rms at Es/N0 = 5 dB, 0.15 dB), so its jitter matters more than a sine's.  Timing
    ``timing_loop_bandwidth``.

    Lock: the residual carrier is locked when its averaged in-phase amplitude makes a phase-error
    cosine above 0.9 and stands 4 standard deviations (SNR 16) above the noise of its average
    (lost below 0.7 or SNR 4); the BPSK Costas loop when ``<I^2 - Q^2> / <I^2 + Q^2>`` of its arms
    exceeds 0.1 (lost below 0.05; noise alone stays within +-0.045).  No lock is declared before the
    averages have half their weight after an acquisition.  A symbol's ``locked`` flag is the
    carrier lock at its centre; ``symbol_locked`` adds the block's Es/N0 estimate above -3 dB.
    Cost per sample: one complex rotation and about 40 flops; per symbol O(samples per symbol).

    References
    ----------
    J. H. Yuen (ed.), *Deep Space Telecommunications Systems Engineering*, Plenum 1983, ch. 5
    (residual-carrier receivers, subcarrier and symbol loops); CCSDS 401.0-B sec. 2.4 (PCM/PM,
    PCM/PSK/PM, Bi-phase-L), from memory, not confirmed.
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
        residual = link.modulation in ("pcm-pm", "pcm-psk-pm")
        if not residual and not (link.modulation == "bpsk" and link.line_code == "bi-phase-l"):
            raise ValueError(f"Argument 'link.modulation' must be pcm-pm | pcm-psk-pm (or bpsk with bi-phase-l) for "
                             f"the ResidualCarrierDemodulator, not {link.modulation!r} with {link.line_code!r}.")
        if not (link.symbol_rate_baud > 0 and math.isfinite(link.symbol_rate_baud)):
            raise ValueError(f"Argument 'link.symbol_rate_baud' must be > 0, not {link.symbol_rate_baud!r}.")
        self.biphase = link.line_code == "bi-phase-l"
        sps = fs / link.symbol_rate_baud
        min_sps = 8.0 if self.biphase else 4.0
        if not min_sps <= sps <= MAX_SAMPLES_PER_SYMBOL:
            kind = f"{link.modulation} with {link.line_code}"
            raise ValueError(f"Argument 'sample_rate_hz' must give {min_sps:g} to {MAX_SAMPLES_PER_SYMBOL:g} samples "
                             f"per symbol for {kind}, not {sps:.4g} ({fs:g} Hz for {link.symbol_rate_baud:g} baud).")
        if residual and not 0.0 < link.modulation_index_rad < math.pi / 2:
            raise ValueError(f"Argument 'link.modulation_index_rad' must be in (0, pi/2), "
                             f"not {link.modulation_index_rad!r}.")
        sc_mode = 0
        if link.modulation == "pcm-psk-pm":
            if not link.subcarrier_hz > 0:
                raise ValueError(f"Argument 'link.subcarrier_hz' must be > 0 for pcm-psk-pm, "
                                 f"not {link.subcarrier_hz!r}.")
            chip_rate = link.symbol_rate_baud * (2.0 if self.biphase else 1.0)
            if link.subcarrier_hz < chip_rate:
                raise ValueError(f"Argument 'link.subcarrier_hz' must be at least the chip rate {chip_rate:g} Hz, "
                                 f"not {link.subcarrier_hz:g}.")
            if fs < 4.0 * link.subcarrier_hz:
                raise ValueError(f"Argument 'sample_rate_hz' must give at least 4 samples per subcarrier cycle, "
                                 f"not {fs / link.subcarrier_hz:.4g}.")
            sc_mode = 1 if link.subcarrier_wave == "square" else 2
        self.link = link
        self.receiver = receiver
        self.sample_rate_hz = fs
        self.samples_per_symbol = sps
        self.modulation = link.modulation
        self.bits_per_symbol = 1
        self.residual = residual
        self.subcarrier_mode = sc_mode
        self.wave = {0: "nrz", 1: "square", 2: "sine"}[sc_mode]
        self.block_samples = max(32768, _next_pow2(256 * sps))
        rng = receiver.acquisition_range_hz
        self.acquisition_search_hz = 0.5 * fs if rng is None else min(float(rng), 0.5 * fs)
        self.conjugate = receiver.spectrum_inverted is True
        self.line_threshold_db = 10.0 * math.log10(LINE_THRESHOLD * math.log(2.0))
        nrz_pm = link.modulation == "pcm-pm" and not self.biphase
        auto = (_AUTO_CARRIER_BW_NRZ_PM if nrz_pm else _AUTO_CARRIER_BW) * link.symbol_rate_baud
        bw = float(receiver.carrier_loop_bandwidth_hz or auto)
        if bw >= 0.05 * link.symbol_rate_baud:
            raise ValueError(f"Argument 'receiver.carrier_loop_bandwidth_hz' must be below 5% of the symbol rate, "
                             f"not {bw:g} Hz.")
        self.carrier_loop_bandwidth_hz = bw
        self.carrier_loop_order = int(receiver.carrier_loop_order)
        self.subcarrier_loop_bandwidth_hz = _SUBCARRIER_BW * link.symbol_rate_baud if sc_mode else 0.0
        chip = sps / (2.0 if self.biphase else 1.0)
        self.chip_samples = chip

        kp_c, ki_c, kr_c = _loop_gains(bw / fs, self.carrier_loop_order)
        p = np.zeros(CARRIER_PARAM_SIZE, dtype=np.float64)
        p[0] = 0.0 if residual else 1.0
        p[1] = float(sc_mode)
        p[2:5] = (kp_c, ki_c, kr_c)
        if sc_mode:
            self.subcarrier_cycles_per_sample = link.subcarrier_hz / fs
            kp_s, ki_s, _ = _loop_gains(self.subcarrier_loop_bandwidth_hz / fs, 2)
            slope = 4.0 if sc_mode == 1 else 2.0 * math.pi  # error per cycle of subcarrier phase (kernel Notes)
            p[5] = self.subcarrier_cycles_per_sample
            p[6] = kp_s / slope
            p[7] = ki_s / slope
        else:
            self.subcarrier_cycles_per_sample = 0.0
        p[8] = min(1.0, 2.0 / chip)
        p[9] = min(0.01, 4.0 * bw / fs)  # amplitude / lock averages: a few loop time constants
        p[10] = _SQUARE_WINDOW_CYCLES
        # Costas lock: <I^2 - Q^2> / <I^2 + Q^2> of the chip-long arms is about S / (S + 2 N_arm) when locked,
        # measured 0.37 at Es/N0 = 5 dB, 0.15 at 0 dB and 0.10 at -2 dB (20 samples per symbol), and within
        # +-0.045 on noise alone; a lock lost for 3 blocks means a new acquisition (and a possible data inversion)
        p[12:16] = (0.9, 0.7, 16.0, 4.0) if residual else (0.1, 0.05, 0.0, -1.0)
        p[16] = 0.25 * p[9] if not residual else p[9]
        self._cparams = p
        bn_t = receiver.timing_loop_bandwidth
        kp_t, ki_t, _ = _loop_gains(bn_t, 2)
        q = np.zeros(SYMBOL_PARAM_SIZE, dtype=np.float64)
        q[:7] = (1.0 if self.biphase else 0.0, kp_t, ki_t, _DTTL_WINDOW, 1.0 / 256.0, sps, _TIMING_RATE_LIMIT)
        self._sparams = q
        # rect_symbols bound: a symbol moves tau by at least T (1 - limit) (1 - kp W) samples
        self._min_symbol_advance = sps * (1.0 - _TIMING_RATE_LIMIT) * (1.0 - kp_t * _DTTL_WINDOW)
        self._search = None
        if not residual:
            # Bi-phase-L BPSK: the chip-long box before squaring; the band's shape is the Manchester pulse's
            box = np.ones(max(1, int(round(chip))), dtype=np.float64)
            manchester = np.concatenate([box, -box])
            wn = _loop_gains(bw / fs, 2)[0] / (2.0 * _ZETA) * fs  # natural frequency, rad/s
            self._search = CarrierSearch(sample_rate_hz=fs, power=2, prefilter=box / math.sqrt(box.size),
                                         template=manchester, occupied_hz=4.0 * link.symbol_rate_baud,
                                         search_hz=self.acquisition_search_hz, fine_hz=0.05 * link.symbol_rate_baud,
                                         max_rate_hz_per_s=min(5000.0, 0.2 * wn * wn / (2.0 * math.pi)))
        self.reset()

    # ---- state -------------------------------------------------------------------------
    def reset(self) -> None:
        """Forget all state: the next :meth:`process` starts a new stream."""
        self._next_start: int | None = None
        self._pending = np.zeros(0, dtype=np.complex64)
        self._agc_power = 0.0
        self._dc = DcBlocker()
        self._cs = np.zeros(CARRIER_STATE_SIZE, dtype=np.float64)
        self._cs[16] = 1.0 if self.carrier_loop_order == 3 else 0.0
        self._cs[8] = self.subcarrier_cycles_per_sample
        self._ss = np.zeros(SYMBOL_STATE_SIZE, dtype=np.float64)
        self._ss[1] = self.samples_per_symbol
        self._ubuf = np.zeros(0, dtype=np.float64)
        self._lbuf = np.zeros(0, dtype=np.int8)
        self._ubase = 0
        self._need_acq = True
        self._timing_acquired = False
        self._unlocked_blocks = 0
        self._symbol_locked = False
        self._finished = False
        self.modulation_index_rad = float("nan")
        self.stats = DemodStats(search_hz=self.acquisition_search_hz, line_threshold_db=self.line_threshold_db)

    # ---- public ------------------------------------------------------------------------
    def process(self, chunk: Any) -> SymbolBlock:
        """Demodulate one chunk (an object with ``samples``, ``start`` and ``nonfinite``).

        Returns the symbols of every block completed so far; a partial block waits.
        """
        if self._finished:
            raise ValueError("Argument 'chunk' cannot be processed after flush(); call reset() first.")
        samples, start = self._check_chunk(chunk)
        self.stats.nonfinite_samples += int(getattr(chunk, "nonfinite", 0) or 0)
        continue_stream(self._next_start, start)
        if self._next_start is None:
            self._pending_start = start
            self._ubase = start
        self._next_start = start + samples.size
        self.stats.samples_in += samples.size
        blocks, self._pending = cut_blocks(self._pending, samples, self.block_samples)
        parts: list[dict] = []
        for block in blocks:
            self._run_block(block, self._pending_start, parts)
            self._pending_start += self.block_samples
        return self._assemble(parts)

    def flush(self) -> SymbolBlock:
        """Demodulate the last partial block; symbols whose interval ends past the last sample are dropped."""
        if self._finished or self._next_start is None:
            self._finished = True
            return SymbolBlock()
        parts: list[dict] = []
        if self._pending.size:
            self._run_block(self._pending, self._pending_start, parts)
            self._pending = np.zeros(0, dtype=np.complex64)
        self._finished = True
        return self._assemble(parts)

    # ---- internals ---------------------------------------------------------------------
    def _check_chunk(self, chunk: Any) -> tuple[np.ndarray, int]:
        return check_chunk(chunk)

    def _acquire(self, block: np.ndarray, gain: float) -> bool:
        """Carrier frequency, phase and amplitude (and subcarrier phase) from one block; True if found."""
        self.stats.acquisitions += 1
        fs = self.sample_rate_hz
        n = block.size
        x = block.astype(np.complex128) * gain
        if self.residual:
            # the residual carrier itself is the line (no squaring); the block mean goes first, so that a
            # receiver DC offset is never taken for it (a carrier within fs / n of 0 Hz goes with it)
            f_hz, ratio = spectral_line(x - x.mean(), sample_rate_hz=fs, search_hz=self.acquisition_search_hz)
            found = ratio >= LINE_THRESHOLD
            level = 10.0 * math.log10(ratio * math.log(2.0)) if ratio > 0 else -math.inf
            self.stats.saw(SpectralLine(f_hz, level, "carrier line"))
        else:
            acq = self._search.search(x)
            f_hz, found = acq.offset_hz, acq.found
            ratio = 10.0 ** (acq.line.level_db / 10.0) / math.log(2.0)
            self.stats.saw(acq.line)
        self.stats.last_peak_ratio = ratio
        if not found:
            return False
        self.stats.carrier_found += 1
        m = max(64, n // 4)
        rot = x[:m] * np.exp(-2j * math.pi * f_hz / fs * np.arange(m))
        if self.residual:
            c = complex(np.mean(rot))
            phase0 = math.atan2(c.imag, c.real)
            self._cs[4] = abs(c)
        else:
            c2 = complex(np.mean(rot * rot))
            phase0 = 0.5 * math.atan2(c2.imag, c2.real)
        cs = self._cs
        jump = (phase0 - cs[0] + math.pi) % (2.0 * math.pi) - math.pi
        cs[0] = phase0
        cs[3] += jump  # the total phase stays continuous across a re-acquisition
        cs[1] = 2.0 * math.pi * f_hz / fs
        cs[2] = 0.0
        cs[5] = 0.0
        cs[6] = cs[4] ** 2
        cs[8] = self.subcarrier_cycles_per_sample  # whatever the subcarrier loop did before, start nominal
        cs[9:15] = 0.0
        cs[15] = 0.0
        cs[20] = 0.0
        cs[21] = 0.0
        cs[22] = 0.0
        if self.subcarrier_mode:
            self._acquire_subcarrier(block, gain)
        return True

    def _acquire_subcarrier(self, block: np.ndarray, gain: float) -> None:
        """Subcarrier phase: run the carrier loop over the block with ``Im r`` out, then ``arg(-sum c_j^2) / 4 pi``."""
        n = block.size
        trial = self._cs.copy()
        params = self._cparams.copy()
        params[6] = 0.0
        params[7] = 0.0
        params[11] = 1.0
        q = np.empty(n, dtype=np.float64)
        lk = np.empty(n, dtype=np.int8)
        ph = np.empty(n, dtype=np.float64)
        track_carrier(block, gain, params, trial, q, lk, ph)
        nu = self._cs[8]
        psi = self._cs[7] + nu * np.arange(n)
        ref = q * np.exp(-2j * math.pi * psi)
        chip = max(1, int(round(self.chip_samples)))
        half = n // 2  # the carrier loop has settled in the second half
        nwin = (n - half) // chip
        if nwin < 4:
            return
        cj = ref[half:half + nwin * chip].reshape(nwin, chip).sum(axis=1)
        acc = -complex(np.sum(cj * cj))
        delta = math.atan2(acc.imag, acc.real) / (4.0 * math.pi)
        self._cs[7] = (self._cs[7] + delta) % 1.0

    def _run_block(self, block: np.ndarray, block_start: int, parts: list) -> None:
        block = np.array(block, dtype=np.complex64)
        if not np.isfinite(block.view(np.float32).sum()):
            bad = ~np.isfinite(block)
            self.stats.nonfinite_samples += int(bad.sum())
            block[bad] = 0
        if self.conjugate:
            block = np.conj(block)
        n = block.size
        block, pw = self._dc.process(block)
        if pw > 0:
            self._agc_power = pw if self._agc_power == 0.0 else 0.8 * self._agc_power + 0.2 * pw
        gain = 1.0 / math.sqrt(self._agc_power) if self._agc_power > 0 else 1.0
        acquired_now = False
        if self._need_acq and n >= 1024:
            acquired_now = self._acquire(block, gain)
            self._need_acq = not acquired_now
            self._unlocked_blocks = 0
        u = np.empty(n, dtype=np.float64)
        lk = np.empty(n, dtype=np.int8)
        ph = np.empty(n, dtype=np.float64)
        self._cs[17:20] = 0.0
        params = self._cparams
        if self._need_acq and self.subcarrier_mode and not self.stats.carrier_found:
            # no carrier yet: the subcarrier loop would only wander on noise, so it holds
            params = params.copy()
            params[6:8] = 0.0
        track_carrier(block, gain, params, self._cs, u, lk, ph)
        carrier_amp = self._cs[17] / self._cs[19] if self._cs[19] > 0 else float("nan")

        # symbol stage on the carried-over tail plus this block
        self._ubuf = np.concatenate([self._ubuf, u])
        self._lbuf = np.concatenate([self._lbuf, lk])
        T = self.samples_per_symbol
        if (acquired_now and not self._symbol_locked) or (not self._timing_acquired and not self._need_acq):
            self._acquire_timing(block_start)
        nsym = 0
        pos = raw = soft = np.zeros(0, dtype=np.float64)
        slock = np.zeros(0, dtype=np.int8)
        if self._timing_acquired:
            pos, raw, soft, slock = self._symbols()
            nsym = pos.size
            keep = int(math.floor(self._ss[0] - (0.5 + 2.0 * _DTTL_WINDOW) * self._ss[1])) - 2 - self._ubase
        else:
            keep = self._ubuf.size - int(math.ceil(2 * T)) - 2  # keep a little for the first symbol
        keep = min(max(keep, 0), self._ubuf.size)
        self._ubuf = self._ubuf[keep:].copy()
        self._lbuf = self._lbuf[keep:].copy()
        self._ubase += keep
        pos, raw, soft, slock = pos[:nsym], raw[:nsym], soft[:nsym], slock[:nsym].astype(bool)

        # ---- the block's track point -----------------------------------------------------
        fs = self.sample_rate_hz
        freq = (ph[-1] - ph[0]) / (2.0 * math.pi * max(n - 1, 1)) * fs if n > 1 else float("nan")
        std = _frequency_std_hz(ph, fs)
        s_pow, n_pow = _real_m2m4(raw)
        esn0_db = (10.0 * math.log10(s_pow / (2.0 * n_pow)) if (s_pow > 0 and n_pow > 0) else
                   (float("inf") if s_pow > 0 else float("nan")))
        carrier_locked = bool(lk[-1]) if n else False
        symbol_locked = bool(carrier_locked and esn0_db > _SYMBOL_LOCK_ESN0_DB)
        self._symbol_locked = symbol_locked
        mod_index = float("nan")
        if self.residual and carrier_locked and nsym >= 32 and s_pow > 0:
            mod_index = modulation_index_from_amplitudes(carrier_amp, math.sqrt(s_pow) / self._ss[1], wave=self.wave)
            self.modulation_index_rad = mod_index
        centre = block_start + 0.5 * (n - 1)
        track = [ResidualTrackPoint(position=float(centre), carrier_offset_hz=float(freq), esn0_db=float(esn0_db),
                                    carrier_locked=carrier_locked, symbol_locked=symbol_locked,
                                    carrier_phase_rad=float(ph[(n - 1) // 2]), carrier_std_hz=std,
                                    modulation_index_rad=mod_index)]
        parts.append({"pos": pos, "soft": soft.astype(np.float32), "locked": slock, "track": track})
        self.stats.symbols_out += nsym
        self.stats.carrier_locked_symbols += int(slock.sum())
        if carrier_locked:
            self._unlocked_blocks = 0
        else:
            self._unlocked_blocks += 1
            if self._unlocked_blocks >= _REACQUIRE_BLOCKS:
                self._need_acq = True

    def _symbols(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """:func:`rect_symbols` over the buffer, with outputs sized from its bound (grown if ever full)."""
        cap = int(self._ubuf.size / self._min_symbol_advance) + 2
        outs = []
        while True:
            out = (np.empty(cap), np.empty(cap), np.empty(cap), np.empty(cap, dtype=np.int8))
            n = rect_symbols(self._ubuf, self._lbuf, np.int64(self._ubase), self._sparams, self._ss, *out)
            outs.append(tuple(a[:n] for a in out))
            if n < cap:
                break
        if len(outs) == 1:
            return outs[0]
        return tuple(np.concatenate(col) for col in zip(*outs))

    def no_lock_message(self) -> str | None:
        """One line for stderr when no carrier lock was found so far (``DemodStats.no_lock_message``)."""
        return self.stats.no_lock_message()

    def _acquire_timing(self, block_start: int) -> None:
        """Symbol timing by the best of 32 trial phases over the symbols of the buffer from ``block_start``."""
        T = self.samples_per_symbol
        end = self._ubase + self._ubuf.size
        first = max(float(block_start), float(self._ubase)) + 0.5 * T + 1.0
        if self._timing_acquired:
            first = max(first, self._ss[0] - 0.5 * T)
        n_sym = min(256, int((end - first - 0.5 * T - 2.0) // T) - 1)
        if n_sym < 16:
            return
        energy = np.empty(_TIMING_TRIALS, dtype=np.float64)
        timing_search(self._ubuf, np.int64(self._ubase), first, T, 1 if self.biphase else 0, _TIMING_TRIALS,
                      n_sym, energy)
        j = int(np.argmax(energy))
        e_m, e_0, e_p = energy[(j - 1) % _TIMING_TRIALS], energy[j], energy[(j + 1) % _TIMING_TRIALS]
        den = e_m - 2.0 * e_0 + e_p
        frac = 0.5 * (e_m - e_p) / den if den < 0 else 0.0
        tau = first + (j + frac) * T / _TIMING_TRIALS
        if not self._timing_acquired:
            # go back to the first symbol whose centre is in the stream (cut by its start, or by the search window)
            tau -= T * math.floor((tau - (self._ubase - 0.5)) / T)
        self._ss[0] = tau
        self._ss[1] = T
        self._ss[2] = 0.0
        self._ss[3] = float(e_0) / T
        self._timing_acquired = True

    def _assemble(self, parts: list) -> SymbolBlock:
        if not parts:
            return SymbolBlock()
        pos = np.concatenate([p["pos"] for p in parts])
        soft = np.concatenate([p["soft"] for p in parts]).astype(np.float32)
        locked = np.concatenate([p["locked"] for p in parts])
        track = [t for p in parts for t in p["track"]]
        return SymbolBlock(soft=soft, position=pos, locked=locked, track=track, symbols=soft.astype(np.complex64))


def make_demodulator(*, link: LinkSection, receiver: ReceiverSection, sample_rate_hz: float):
    """The demodulator for a profile's ``[link]``.

    Returns
    -------
    pipeline.demod.Demodulator or ResidualCarrierDemodulator
        The suppressed-carrier :class:`pipeline.demod.Demodulator` for bpsk / qpsk / oqpsk with NRZ-L or
        NRZ-M; :class:`ResidualCarrierDemodulator` for pcm-pm, pcm-psk-pm and bpsk with Bi-phase-L.

    Raises
    ------
    ValueError
        QPSK / OQPSK with Bi-phase-L (not a CCSDS combination, and not supported).
    """
    if not isinstance(link, LinkSection):
        raise TypeError(f"Argument 'link' must be a LinkSection, not {type(link).__name__}.")
    if link.modulation in ("qpsk", "oqpsk") and link.line_code == "bi-phase-l":
        raise ValueError(f"Argument 'link.line_code' must be nrz-l | nrz-m for {link.modulation}, not 'bi-phase-l'.")
    if link.modulation in ("pcm-pm", "pcm-psk-pm") or link.line_code == "bi-phase-l":
        return ResidualCarrierDemodulator(link=link, receiver=receiver, sample_rate_hz=sample_rate_hz)
    return Demodulator(link=link, receiver=receiver, sample_rate_hz=sample_rate_hz)
