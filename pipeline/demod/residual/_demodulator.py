"""Residual-carrier (PCM/PM, PCM/PSK/PM) and Bi-phase-L demodulator: IQ chunks in, soft channel bits out."""

from __future__ import annotations

import dataclasses
import functools
import math
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from pipeline.demod import DemodStats, Demodulator, SymbolBlock, TrackPoint
from pipeline.demod._acquire import CarrierSearch, SpectralLine, _next_pow2
from pipeline.demod._demodulator import (
    DcBlocker,
    agc_average,
    centre_window,
    check_chunk,
    check_prediction,
    continue_stream,
    cut_blocks,
    level_change_at,
    level_suspect,
    mirrored_line,
    shifted_line,
)
from pipeline.demod._iq import MirrorLine
from pipeline.demod._predicted import CarrierPrediction
from pipeline.demod._tones import TONE_LOOK_RISE, TONE_STRETCH, ToneCanceller, tone_look_blocks
from pipeline.demod.residual._kernels import (
    CARRIER_PARAMS,
    CARRIER_STATE,
    SYMBOL_PARAMS,
    SYMBOL_STATE,
    phasor_table,
    rect_symbols,
    symbol_integrals,
    timing_energy,
    track_carrier,
)
from pipeline.demod.residual._lock import HeldDecision, MeanStatistic
from pipeline.demod.residual._loops import LoopPlan, loop_gains, plan_loops
from pipeline.demod.residual._search import CarrierFix, DataSidebands, ResidualCarrierSearch
from pipeline.profile import LinkSection, ReceiverSection

__all__ = ["ResidualCarrierDemodulator", "ResidualTrackPoint", "make_demodulator",
           "modulation_index_from_amplitudes", "MAX_SAMPLES_PER_SYMBOL"]

_ZETA = 1.0 / math.sqrt(2.0)
_SQUARE_WINDOW_CYCLES = 0.0625  # half-width of the windowed quadrature reference of a square subcarrier
_DTTL_WINDOW = 0.125  # half-width of the transition window, x symbol period
#: Samples per symbol the residual-carrier demodulator serves at most: its work per sample does not grow
#: with it, but one processing block (256 symbols or more) must stay a fraction of a second of work.
MAX_SAMPLES_PER_SYMBOL = 4096.0
#: Symbol-period offset the transition tracking loop follows (fraction of the nominal period).
_TIMING_RATE_LIMIT = 0.02
_TIMING_TRIALS = 32
#: Symbol and subcarrier clock offsets the acquisition searches (fraction of nominal).
_CLOCK_SEARCH = 200e-6
_TIMING_MAX_SYMBOLS = 8192
#: Symbol timing re-found in a block whose last symbols' mean energy fell (a recorder that dropped samples moves the
#: symbols by a fraction of a period at once, which a transition loop narrowed for low Es/N0 takes thousands of
#: symbols to follow; :meth:`ResidualCarrierDemodulator._timing_jump`): the mean symbol energy over the block's last
#: symbols (at most ``_JUMP_SYMBOLS``, at least ``_JUMP_MIN_SYMBOLS``) at ``_JUMP_TRIALS`` timings per period, and a
#: timing at least ``_JUMP_MIN_PERIODS`` away whose energy beats the tracked symbols' by ``_JUMP_SIGMAS`` standard
#: errors of their paired difference is taken from the symbol the move happened at.
_JUMP_SYMBOLS = 1024
_JUMP_MIN_SYMBOLS = 256
_JUMP_TRIALS = 16
_JUMP_MIN_PERIODS = 0.125
_JUMP_SIGMAS = 5.0
#: The carrier's phase re-found (:meth:`ResidualCarrierDemodulator._phase_jump`) in a block whose mean in-phase
#: carrier fell under ``_PHASE_JUMP_TRIGGER`` of the carrier's amplitude, and significantly, or whose loop phase
#: strayed from where it would have run by more than ``_PHASE_JUMP_TURN`` rad, once the loop has been locked for
#: ``_PHASE_JUMP_SETTLED`` blocks: the block's stretches of ``_PHASE_JUMP_STRETCH`` samples, the cut where their
#: mean changes most, the change over the ``_PHASE_JUMP_LOCAL`` stretches each side of it standing ``_PHASE_JUMP_Z``
#: out (a chi-square statistic with two degrees of freedom) and turning the carrier by more than
#: ``_PHASE_JUMP_MIN_RAD``.
_PHASE_JUMP_TRIGGER = 0.9
_PHASE_JUMP_TURN = 1.2
_PHASE_JUMP_SETTLED = 4
_PHASE_JUMP_STRETCH = 256
_PHASE_JUMP_LOCAL = 32
_PHASE_JUMP_Z = 20.0
_PHASE_JUMP_MIN_RAD = math.pi / 4.0
#: A tracked residual carrier within this many bins (``fs / block_samples``) of 0 Hz holds the DC offset estimate:
#: the blocks' means would take it for the offset (a carrier ``f`` from 0 Hz leaves ``sinc(f T_b)`` of its amplitude
#: in a block's mean, and the estimate's average over blocks more of it the slower it turns).
_DC_GUARD_BINS = 2.0
#: The I/Q image is measured on the carrier's mirror line (:class:`~pipeline.demod._iq.MirrorLine`) only in blocks
#: whose carrier is at least this many bins (of the block) from 0 Hz, where the carrier and its mirror are one line.
_MIRROR_GUARD_BINS = 4.0
#: The carrier loop's sums over a block (track_carrier), cleared before it runs.
_BLOCK_SUMS = ("sum_re", "sum_re2", "sum_im", "img_re", "img_im", "dbl_re", "dbl_im")
_SUB_BLOCKS = 8
_REACQUIRE_BLOCKS = 3
#: A carrier held for ``_PHASE_JUMP_SETTLED`` blocks whose amplitude stood at least ``_GONE_MIN_Z`` standard errors of a
#: block's in-phase mean over 0, and whose in-phase mean then falls under ``_GONE_FRACTION`` of that amplitude over a
#: whole block (with no phase jump taken), is gone: its frequency jumped (a transponder switched between coherent and
#: one-way, a receiver retuned) or the signal ended.  The search starts with the next block instead of after
#: ``_REACQUIRE_BLOCKS`` unlocked blocks (the lock detector's two decision intervals and the three blocks cost a 2 kHz
#: step at 8 ksym/s 0.7 s of symbols), and the block's symbols are flagged unlocked.  A carrier found again more than
#: ``_MOVED_HZ`` from where it went counts in ``stats.carrier_moved``.
_GONE_MIN_Z = 8.0
_GONE_FRACTION = 0.25
_MOVED_HZ = 20.0
#: The carrier search accumulates up to this many symbols (at most 32 blocks) before it starts again.
_DWELL_SYMBOLS = 8192
_MAX_DWELL_BLOCKS = 32
#: Samples held back while searching (so that the window the carrier was found in is demodulated): at most
#: this many (complex64: 32 MB), and at most one dwell.
_HOLD_SAMPLES = 1 << 22
#: Per block, this fraction of the rate the second-order carrier loop's frequency integrator followed goes
#: into the rate aiding.
_RATE_AIDING_GAIN = 0.25
#: Doppler rates hypothesised by the carrier search (Hz/s).
_MAX_DOPPLER_RATE = 10.0
#: Carrier lock: t statistic of the coherent carrier amplitude, on above 5 (two decisions in a row), off below 3.
_CARRIER_Z_ON, _CARRIER_Z_OFF, _CARRIER_HOLD = 5.0, 3.0, 2
#: Symbol and subcarrier lock: t statistics over about this many symbols, on above 5 / off below 3 for two blocks.
_LOCK_MEMORY_SYMBOLS = 8192.0
_SYMBOL_Z_ON, _SYMBOL_Z_OFF, _SYMBOL_HOLD = 5.0, 3.0, 2
#: Es/N0 and modulation-index estimates average over about this many symbols.
_ESN0_MEMORY_SYMBOLS = 2048.0
#: Bi-phase-L BPSK (Costas loop): symbol lock from the block's M2M4 Es/N0 above this.
_COSTAS_SYMBOL_LOCK_ESN0_DB = -3.0


@dataclass(frozen=True)
class ResidualTrackPoint(TrackPoint):
    """A :class:`pipeline.demod.TrackPoint` plus the residual-carrier observables of one block.

    ``position`` is the centre sample of the processing block, the epoch of the mean frequency
    ``carrier_offset_hz`` over the block (the one-way Doppler observable when the recording is
    tuned to the nominal downlink frequency); ``carrier_std_hz`` the standard error of that mean
    (residual spread of 8 sub-block frequencies about a straight line, over ``sqrt 8``);
    ``modulation_index_rad`` the index estimated from the coherent carrier and data amplitudes
    (``nan`` without lock or for suppressed carrier); ``cn0_dbhz`` the residual carrier's power
    over the noise density measured in the block (dB-Hz); ``subcarrier_locked`` the subcarrier lock
    (None without a subcarrier); the three lock statistics (t statistics: about N(0, 1) on noise)
    at the block's end.  A block passed while the carrier was being searched has ``nan`` values.
    """

    carrier_std_hz: float = float("nan")
    modulation_index_rad: float = float("nan")
    cn0_dbhz: float = float("nan")
    subcarrier_locked: bool | None = None
    carrier_lock_statistic: float = float("nan")
    symbol_lock_statistic: float = float("nan")
    subcarrier_lock_statistic: float = float("nan")


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

    Examples
    --------
    >>> round(modulation_index_from_amplitudes(math.cos(1.2), math.sin(1.2), wave="square"), 6)
    1.2
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


def _power_split(wave: str, index_rad: float) -> tuple[float, float]:
    """Fractions of the power in the residual carrier and in the data (first-harmonic sidebands for a sine)."""
    if wave == "sine":
        from scipy.special import j0, j1

        return float(j0(index_rad)) ** 2, 2.0 * float(j1(index_rad)) ** 2
    return math.cos(index_rad) ** 2, math.sin(index_rad) ** 2


def _frequency_std_hz(phase_rad: np.ndarray, edges: np.ndarray, sample_rate_hz: float) -> float:
    """Standard error of a block's mean carrier frequency from 8 sub-block frequencies.

    ``phase_rad`` holds the carrier phase at the sub-block ``edges`` (sample indices).  Each sub-block
    frequency is its phase advance over its duration; a straight line in time is fitted to them (a
    Doppler rate moves the frequency within the block and is not noise), and the standard error of
    the line at the block centre is ``s_r / sqrt(K)`` with the residual standard deviation ``s_r``
    (``K - 2`` degrees of freedom).  The sub-block values share their end phases, which makes
    successive ones negatively correlated, so this errs on the large side.
    """
    if edges.size != _SUB_BLOCKS + 1 or edges[-1] < 4 * _SUB_BLOCKS:
        return float("nan")
    e0, e1 = edges[:-1], edges[1:]
    freq = (phase_rad[1:] - phase_rad[:-1]) / (2.0 * math.pi * (e1 - e0)) * sample_rate_hz
    t = 0.5 * (e0 + e1) - 0.5 * edges[-1]
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


class _Ew:
    """Exponentially weighted sums per symbol (weights fall by e over ``memory`` symbols)."""

    def __init__(self, memory: float, size: int) -> None:
        self.memory = memory
        self.sums = np.zeros(size)
        self.weight = 0.0

    def add(self, n: int, values) -> None:
        lam = math.exp(-n / self.memory)
        self.sums = lam * self.sums + np.asarray(values, dtype=np.float64)
        self.weight = lam * self.weight + n

    def mean(self) -> np.ndarray:
        return self.sums / self.weight if self.weight > 0 else np.full(self.sums.size, np.nan)


class ResidualCarrierDemodulator:
    """Residual-carrier PCM/PM and PCM/PSK/PM, and Bi-phase-L on suppressed-carrier BPSK, streaming.

    Parameters
    ----------
    link : LinkSection
        ``modulation`` ``"pcm-pm"`` (NRZ-L, NRZ-M or Bi-phase-L data directly on the carrier),
        ``"pcm-psk-pm"`` (data BPSK on a ``subcarrier_hz`` square or sine subcarrier), or ``"bpsk"``
        with ``line_code = "bi-phase-l"`` (no carrier left).  ``modulation_index_rad`` sets the
        power split the loop bandwidths assume and is reported against the estimate; the
        waveforms are rectangular (``pulse`` and ``rolloff`` are not used).
    receiver : ReceiverSection
        ``carrier_loop_bandwidth_hz`` (0 = automatic), ``carrier_loop_order`` (2 or 3),
        ``timing_loop_bandwidth`` (x symbol rate: the widest transition loop),
        ``acquisition_range_hz``, ``spectrum_inverted``.
    sample_rate_hz : float
        4 (8 for Bi-phase-L) to 4096 samples per symbol, and at least 4 per subcarrier cycle.
    phasor : {"table", "exact"}
        How the carrier loop rotates each sample: a 4096-entry phasor table (default) or ``cos`` and
        ``sin`` of the exact phase (the reference the table is measured against).
    carrier_prediction : CarrierPrediction or None
        The carrier's predicted offset over the recording (``--tle``/``--oem``): the searches run over
        ``+- acquisition_search_hz`` around it (below) instead of around 0 Hz.

    Notes
    -----
    Same interface and conventions as :class:`pipeline.demod.Demodulator`: soft float32 per
    channel bit, positive = bit 0, about +-1; positions are the centre of each data symbol (for
    Bi-phase-L its mid-bit transition); line decoding (NRZ-M) is left to the chain, and Bi-phase-L
    is fully decoded here (the soft values are NRZ-L levels).  Samples are processed in blocks of
    ``block_samples`` (at least 256 symbols) aligned to the first sample, so the output does not
    depend on the chunking.  Per block:

    1. NaN/Inf samples become 0 (counted); conjugated when ``[receiver] spectrum_inverted = true``;
       the DC offset removed (:class:`pipeline.demod.DcBlocker`; its estimate held at 0 while the carrier is
       searched for, which keeps and searches 0 Hz too, and held as it is while a carrier is tracked within
       ``_DC_GUARD_BINS`` of 0 Hz: a carrier there is not taken for the offset); AGC to unit mean power (a level
       change over ``_AGC_ATTACK`` inside a block is scaled back from its first 256-sample stretch and taken at
       once, as in the suppressed-carrier demodulator).
    2. While no carrier is held, the block goes to the search and is held back
       (:class:`~pipeline.demod.residual._search.ResidualCarrierSearch`: periodograms accumulated over
       up to ``dwell_blocks`` blocks, about 8192 symbols).  When the line is found the window grows
       until it holds the symbols the subcarrier and timing estimates need at the measured ``P_c /
       N0`` (``_window_needed``, at most ``hold_blocks``), the line is refined coherently over it
       (frequency, Doppler rate, phase, amplitude, ``P_c / N0``), and it is demodulated from its start
       (from the first block that carries the signal); blocks that leave the hold unfound pass with no
       symbols and a track point with ``nan`` values.  Bi-phase-L BPSK uses a
       :class:`pipeline.demod.CarrierSearch` per block instead.  The subcarrier's frequency offset
       (+-200 ppm) and phase come from the squared chip correlations of a first carrier pass over the
       window (a line at twice the offset; half-cycle ambiguity, resolved by the frame synchronizer as
       a data inversion), the symbol period (+-200 ppm) and timing from the largest mean symbol energy
       over 32 timings per trial period and up to 8192 symbols (trial periods around the one the
       subcarrier's frequency implies, when it was measured: a subcarrier coherent with the symbol
       clock).
    3. :func:`~pipeline.demod.residual._kernels.track_carrier`: a second- or third-order PLL at the
       sample rate on the residual carrier (a Costas loop for BPSK), started from the acquired
       frequency, phase and Doppler rate (a second-order loop keeps the rate as aiding), and a
       Costas loop on the subcarrier; the data signal is the carrier's quadrature times the
       subcarrier reference.  A residual carrier's loop also sums the carrier's mirror line, which gives the front
       end's I/Q imbalance (:class:`~pipeline.demod._iq.MirrorLine`): once it stands clear of its noise the image is
       taken out of each block before the loop (``stats.iq_image_db``); blocks whose carrier is within
       ``_MIRROR_GUARD_BINS`` of 0 Hz, where the two lines are one, are not measured.
    4. :func:`~pipeline.demod.residual._kernels.rect_symbols`: integrate-and-dump matched filter
       (``+`` then ``-`` half for Bi-phase-L) and a data-transition tracking loop.
    5. One :class:`ResidualTrackPoint`: mean carrier frequency over the block with its standard
       error, ``P_c / N0``, Es/N0, modulation index, lock flags and statistics.

    Loop bandwidths (:func:`~pipeline.demod.residual._loops.plan_loops`, per block) come from the
    symbol rate and the measured ``P_c / N0`` (smoothed over blocks): carrier ``B_L = (P_c /
    N0) / 50`` within ``[2e-4, 5e-3] R_s`` (``1e-3`` for NRZ PCM/PM), or the profile's value;
    subcarrier and transition loops from ``Es/N0 = (P_c / N0) (P_d / P_c) / R_s`` with the
    squaring loss, wide after an acquisition and narrowing as ``2 / t``.  A second-order carrier
    loop is rate-aided: the acquired Doppler rate, then per block a quarter of the rate its
    frequency integrator drifted by (a slow third integrator).

    Es/N0 (per symbol, data power): ``(<s^2> - N_s) / (2 N_s)`` averaged over about 2048 symbols,
    with the symbol noise ``N_s = sigma^2 (T - 1/3) g`` known from the carrier stage (``sigma^2``
    the variance of ``Re r`` per sample, ``T - 1/3`` the integrate-and-dump's weight energy at a
    random sample phase, ``g`` = 1, or 1/2 for a sine subcarrier); the soft values are ``s / (A T)``
    with the data amplitude ``A`` from the same estimate.  Bi-phase-L BPSK: M2M4 per block.

    Lock (each a statistic above its threshold for a stated time; on noise alone each statistic is
    about N(0, 1)): carrier, the coherent carrier amplitude ``sum(Re r)`` over its standard error
    per decision interval ``1 / B_L``, locked after two intervals above 5, lost after two below 3;
    symbol, the mean of ``s_k^2 - h_k^2`` over its standard error (``h_k`` the integral from the
    centre of symbol ``k`` to that of ``k + 1``: on time it holds half the symbol energy of ``s_k``;
    on noise the two are alike), over about 8192 symbols, locked after two blocks above 5, lost
    after two below 3; subcarrier, the same with ``s_k^2 - q_k^2`` (``q_k`` the integral with the
    quadrature reference).  ``TrackPoint.symbol_locked`` is all three; a symbol's ``locked`` flag
    is the carrier lock at its centre.  After three unlocked blocks (once the carrier detector has
    decided) the carrier is searched again; a strong carrier that is gone over a whole block (its frequency
    jumped, or the signal ended) from the next block (``_carrier_went``).  Bi-phase-L BPSK: the Costas ratio
    ``<I^2 - Q^2> / <I^2 + Q^2>`` above 0.1 (off below 0.05), symbol lock from Es/N0 above -3 dB.
    Cost per sample: one complex rotation (a table read) and about 40 flops; per symbol O(samples
    per symbol); per searched block one FFT of the block.

    With a ``carrier_prediction`` every searched block has its mean removed and is rotated by the
    prediction before it is accumulated (one rotation per block), and the held window is rotated as one
    piece (a continuous phase) before the fine stage; the fix is then moved back: the prediction's
    offset, rate (its straight piece) and phase at the fix's start are added.  Bi-phase-L BPSK: the
    block is centred likewise before :meth:`CarrierSearch.search`.  ``stats.acquisition_centre_hz``
    records the prediction at the middle of the first searched block.

    Under ``spectrum_inverted = "auto"`` with a prediction (:attr:`mirror_search`), when the prediction at the
    middle of a dwell's first block (Bi-phase-L BPSK: of the block) lies further from 0 Hz than
    ``acquisition_search_hz`` (the mirrored band clear of the upright one; nearer 0 Hz the sign cannot be
    told), the carrier is also searched at the mirror image of the prediction: a second dwell accumulates
    the same blocks conjugated and centred on the same prediction (which is the search at the negated
    prediction), and is tested when the upright one finds nothing (Bi-phase-L BPSK: the block searched again
    conjugated).  A line found there and confirmed by the fine stage (over the conjugated held blocks, with
    the mirrored dwell's floor) is a spectrally inverted recording: from then on the samples are conjugated
    as with ``spectrum_inverted = true`` (the held blocks and the DC offset estimate too; the mirrored dwell
    becomes the upright one), and ``stats.carrier_found_mirrored`` counts it.  The switch is one way.  Cost,
    only while nothing is found and only then: a second periodogram per searched block (one conjugation, one
    rotation, one FFT of the decimated block and the rate sums; about 1 ms per block of 32768 samples, as
    much again as the upright search, ``bench/bench_residual.py``) and a second accumulator (rates x bins
    float32, at most 32 MB); Bi-phase-L BPSK a second :meth:`CarrierSearch.search` of the unfound block.

    References
    ----------
    J. H. Yuen (ed.), *Deep Space Telecommunications Systems Engineering*, Plenum 1983, ch. 5
    (residual-carrier receivers, subcarrier and symbol loops); CCSDS 401.0-B sec. 2.4 (PCM/PM,
    PCM/PSK/PM, Bi-phase-L), from memory, not confirmed.
    """

    def __init__(self, *, link: LinkSection, receiver: ReceiverSection, sample_rate_hz: float,
                 phasor: Literal["table", "exact"] = "table",
                 carrier_prediction: CarrierPrediction | None = None) -> None:
        if not isinstance(link, LinkSection):
            raise TypeError(f"Argument 'link' must be a LinkSection, not {type(link).__name__}.")
        if not isinstance(receiver, ReceiverSection):
            raise TypeError(f"Argument 'receiver' must be a ReceiverSection, not {type(receiver).__name__}.")
        if isinstance(sample_rate_hz, bool) or not isinstance(sample_rate_hz, (int, float)):
            raise TypeError(f"Argument 'sample_rate_hz' must be a number, not {type(sample_rate_hz).__name__}.")
        if phasor not in ("table", "exact"):
            raise ValueError(f"Argument 'phasor' must be table | exact, not {phasor!r}.")
        check_prediction(carrier_prediction)
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
        self.carrier_prediction = carrier_prediction
        self.samples_per_symbol = sps
        self.symbol_rate_baud = float(link.symbol_rate_baud)
        self.modulation = link.modulation
        self.bits_per_symbol = 1
        self.residual = residual
        self.subcarrier_mode = sc_mode
        self.phasor = phasor
        self.wave = {0: "nrz", 1: "square", 2: "sine"}[sc_mode]
        self.block_samples = max(32768, _next_pow2(256 * sps))
        self._tone_look_blocks = tone_look_blocks(self.sample_rate_hz, self.block_samples)
        rng = receiver.acquisition_range_hz
        self.acquisition_search_hz = 0.5 * fs if rng is None else min(float(rng), 0.5 * fs)
        self.conjugate = receiver.spectrum_inverted is True
        # "auto" with a prediction: a carrier not found at the prediction is searched at its mirror image too
        self.mirror_search = receiver.spectrum_inverted == "auto" and carrier_prediction is not None
        self.nrz_pm = link.modulation == "pcm-pm" and not self.biphase
        fixed = float(receiver.carrier_loop_bandwidth_hz or 0.0)
        if fixed >= 0.05 * link.symbol_rate_baud:
            raise ValueError(f"Argument 'receiver.carrier_loop_bandwidth_hz' must be below 5% of the symbol rate, "
                             f"not {fixed:g} Hz.")
        self.fixed_carrier_hz = fixed or None
        self.carrier_loop_order = int(receiver.carrier_loop_order)
        self.timing_bt_max = float(receiver.timing_loop_bandwidth)
        self.chip_samples = sps / (2.0 if self.biphase else 1.0)
        self.subcarrier_cycles_per_sample = link.subcarrier_hz / fs if sc_mode else 0.0
        if residual:
            pc, pd = _power_split(self.wave, link.modulation_index_rad)
            self.data_to_carrier = pd / pc
        else:
            self.data_to_carrier = math.inf
        # the integrated symbol noise per unit sample variance: the reference's mean square
        self._ref_power = 0.5 if sc_mode == 2 else 1.0
        # mean square of the one-pole arm filter's output for a +-1 chip stream of unit amplitude:
        # E[y^2] = a / (2 - a) sum_k (1 - a)^|k| R(k), R(k) = max(0, 1 - |k| / L) (the chips' autocorrelation)
        a_arm = min(1.0, 2.0 / self.chip_samples)
        lag = np.arange(-int(self.chip_samples), int(self.chip_samples) + 1)
        corr = np.maximum(0.0, 1.0 - np.abs(lag) / self.chip_samples)
        self._arm_power = float(a_arm / (2.0 - a_arm) * np.sum((1.0 - a_arm) ** np.abs(lag) * corr))
        self._cos, self._sin = phasor_table()

        p = np.zeros(1, dtype=CARRIER_PARAMS)
        p["carrier_mode"] = 0 if residual else 1
        p["subcarrier_mode"] = sc_mode
        p["third_order"] = 1 if self.carrier_loop_order == 3 else 0
        p["table_phasor"] = 1 if phasor == "table" else 0
        p["a_arm"] = a_arm
        # the window holds at least a sample on each side of an edge (0.0625 cycles at 16 or more samples per cycle)
        p["w_sq"] = max(_SQUARE_WINDOW_CYCLES, self.subcarrier_cycles_per_sample)
        p["z_on"], p["z_off"] = _CARRIER_Z_ON, _CARRIER_Z_OFF
        p["on_count"], p["off_count"] = _CARRIER_HOLD, _CARRIER_HOLD
        # Costas lock: <I^2 - Q^2> / <I^2 + Q^2> of the chip-long arms is about S / (S + 2 N_arm) when locked,
        # measured 0.37 at Es/N0 = 5 dB, 0.15 at 0 dB and 0.10 at -2 dB (20 samples per symbol), and within
        # +-0.045 on noise alone
        p["costas_on"], p["costas_off"] = 0.1, 0.05
        self._cparams = p
        q = np.zeros(1, dtype=SYMBOL_PARAMS)
        q["biphase"] = 1 if self.biphase else 0
        q["quadrature"] = 1 if sc_mode else 0
        q["window"] = _DTTL_WINDOW
        q["nominal"] = sps
        q["limit"] = _TIMING_RATE_LIMIT
        q["a_amp"] = 0.0 if residual else 1.0 / 256.0  # residual: the amplitude comes from the Es/N0 estimate
        self._sparams = q
        # rect_symbols bound: a symbol moves tau by at least T (1 - limit) (1 - kp / 2) samples; kp <= 2.67 B_L T / 0.05
        # (the largest transition-loop bandwidth, over the smallest error slope of _plan)
        self._min_symbol_advance = sps * (1.0 - _TIMING_RATE_LIMIT) * (1.0 - 0.5 * min(53.4 * self.timing_bt_max, 1.0))
        symbols_per_block = self.block_samples / sps
        self.symbols_per_block = symbols_per_block
        self.dwell_blocks = 1
        self.hold_blocks = 1
        self._search: ResidualCarrierSearch | CarrierSearch
        #: the dwell at the mirror image of the prediction (conjugated blocks), accumulated beside the upright one
        #: under mirror_search (residual carrier only; Bi-phase-L BPSK searches its block again instead)
        self._mirror: ResidualCarrierSearch | None = None
        if residual:
            self.dwell_blocks = int(min(_MAX_DWELL_BLOCKS, max(1, math.ceil(_DWELL_SYMBOLS / symbols_per_block))))
            self.hold_blocks = int(max(1, min(self.dwell_blocks, _HOLD_SAMPLES // self.block_samples)))
            dwell = functools.partial(ResidualCarrierSearch, sample_rate_hz=fs, block_samples=self.block_samples,
                                      search_hz=self.acquisition_search_hz, max_blocks=self.dwell_blocks,
                                      max_rate_hz_per_s=_MAX_DOPPLER_RATE, keep_dc=True,
                                      sidebands=DataSidebands(symbol_rate_hz=self.symbol_rate_baud,
                                                              data_to_carrier=self.data_to_carrier,
                                                              biphase=self.biphase,
                                                              subcarrier_hz=link.subcarrier_hz if sc_mode else 0.0,
                                                              subcarrier_wave=link.subcarrier_wave))
            self._search = dwell()
            if self.mirror_search:
                self._mirror = dwell()
            t = self._search.threshold(self.dwell_blocks) / self.dwell_blocks
            self.line_threshold_db = 10.0 * math.log10(t)
        else:
            # Bi-phase-L BPSK: the chip-long box before squaring; the band's shape is the Manchester pulse's
            box = np.ones(max(1, int(round(self.chip_samples))), dtype=np.float64)
            manchester = np.concatenate([box, -box])
            bw = plan_loops(symbol_rate_baud=self.symbol_rate_baud, cn0_hz=float("nan"), data_to_carrier=1.0,
                            nrz_pm=False, since_s=0.0, fixed_carrier_hz=self.fixed_carrier_hz).carrier_hz
            wn = loop_gains(bw / fs, 2)[0] / (2.0 * _ZETA) * fs  # natural frequency, rad/s
            # a line found is tested against the carriers it could be a data line of (at multiples of R_s / 2)
            # through a half-chip box: measured on squared Bi-phase-L at 20 ksym/s, the carrier's own line then
            # stands 12 dB over the strongest other, the chip-long box's only 5 dB
            half_chip = np.ones(max(1, int(round(0.5 * self.chip_samples))), dtype=np.float64)
            self._search = CarrierSearch(sample_rate_hz=fs, power=2, prefilter=box / math.sqrt(box.size),
                                         template=manchester, occupied_hz=4.0 * link.symbol_rate_baud,
                                         search_hz=self.acquisition_search_hz, fine_hz=0.05 * link.symbol_rate_baud,
                                         max_rate_hz_per_s=min(5000.0, 0.2 * wn * wn / (2.0 * math.pi)),
                                         symbol_rate_hz=link.symbol_rate_baud, check_taps=half_chip)
            from pipeline.demod._acquire import LINE_THRESHOLD

            self.line_threshold_db = 10.0 * math.log10(LINE_THRESHOLD * math.log(2.0))
        #: samples a fresh demodulator may hold while it searches and grows its window (a segmented decode's
        #: lead-in covers twice this, so a segment is locked before its own samples begin)
        self.acquisition_samples = int(min(_HOLD_SAMPLES, 2 * self.dwell_blocks * self.block_samples))
        self.reset()

    # ---- state -------------------------------------------------------------------------
    def reset(self) -> None:
        """Forget all state: the next :meth:`process` starts a new stream."""
        self._next_start: int | None = None
        self._pending = np.zeros(0, dtype=np.complex64)
        self._pending_start = 0
        self._agc_power = 0.0
        self._dc = DcBlocker()
        self._cs = np.zeros(1, dtype=CARRIER_STATE)
        self._cs[0]["sc_frequency"] = self.subcarrier_cycles_per_sample
        self._ss = np.zeros(1, dtype=SYMBOL_STATE)
        self._ss[0]["period"] = self.samples_per_symbol
        self._clear_symbol_stage(0)
        self._tracking = False
        self._held: list[tuple[np.ndarray, float, int]] = []
        self._found = None  # the detection whose window is still growing
        self._dwell_start = 0
        self._acq_start = 0
        self._amp_floor = 0.0
        self._carrier_amp = float("nan")
        self._tone_look_due = False
        self._loop_rate = float("nan")  # the carrier loop's mean frequency rate over the last block (rad/sample^2)
        self._locked_blocks = 0  # blocks in a row the carrier stage ended locked
        self._loop_mean_w = float("nan")  # its mean frequency over the last block (rad/sample) ...
        self._loop_mean_n = 0  # ... of this many samples
        self._cn0_hz = float("nan")
        self._noise_var = float("nan")
        self._clock_ratio = 1.0
        self._unlocked_blocks = 0
        self._went_hz: float | None = None  # the carrier's frequency when it went (until it is found again)
        self._finished = False
        self.loop_plan: LoopPlan | None = None
        self.modulation_index_rad = float("nan")
        self.conjugate = self.receiver.spectrum_inverted is True  # "auto" may turn it on (the mirrored search)
        self.stats = DemodStats(search_hz=self.acquisition_search_hz, line_threshold_db=self.line_threshold_db)
        self._tones = ToneCanceller(self.sample_rate_hz)
        self._image = MirrorLine()
        self._restart_search()

    def _clear_symbol_stage(self, base: int) -> None:
        """Empty the symbol buffers (the next symbols start a new timing acquisition at ``base``)."""
        self._ubuf = np.zeros(0, dtype=np.float32)
        self._uqbuf = np.zeros(0, dtype=np.float32)
        self._lbuf = np.zeros(0, dtype=np.int8)
        self._ubase = int(base)
        self._timing_acquired = False
        self._energy_ref = float("nan")
        self._symbol_lock = MeanStatistic(memory_symbols=_LOCK_MEMORY_SYMBOLS)
        self._subcarrier_lock = MeanStatistic(memory_symbols=_LOCK_MEMORY_SYMBOLS)
        self._symbol_decision = HeldDecision(on=_SYMBOL_Z_ON, off=_SYMBOL_Z_OFF, hold=_SYMBOL_HOLD)
        self._subcarrier_decision = HeldDecision(on=_SYMBOL_Z_ON, off=_SYMBOL_Z_OFF, hold=_SYMBOL_HOLD)
        # sums of s^2, the symbol noise N_s and the carrier amplitude, per symbol
        self._esn0_ew = _Ew(_ESN0_MEMORY_SYMBOLS, 3)
        self._data_amp = float("nan")

    # ---- public ------------------------------------------------------------------------
    def process(self, chunk: Any) -> SymbolBlock:
        """Demodulate one chunk (an object with ``samples``, ``start`` and ``nonfinite``).

        Returns the symbols of every block completed so far; a partial block waits (and so do the
        blocks held back while the carrier is searched).
        """
        if self._finished:
            raise ValueError("Argument 'chunk' cannot be processed after flush(); call reset() first.")
        samples, start = check_chunk(chunk)
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
            self._feed(block, self._pending_start, parts)
            self._pending_start += self.block_samples
        return self._assemble(parts)

    def flush(self) -> SymbolBlock:
        """Demodulate the last partial block and what the search still holds; symbols whose interval ends past
        the last sample are dropped."""
        if self._finished or self._next_start is None:
            self._finished = True
            return SymbolBlock()
        parts: list[dict] = []
        if self._pending.size:
            self._feed(self._pending, self._pending_start, parts)
            self._pending = np.zeros(0, dtype=np.complex64)
        if self._found is not None:
            self._complete_acquisition(parts)
        if not self._tracking and self.residual and self._search.blocks:
            self._saw_dwell()
        while self._held:
            self._skip(self._held.pop(0), parts)
        self._finished = True
        return self._assemble(parts)

    def no_lock_message(self) -> str | None:
        """One line for stderr when no carrier lock was found so far (``DemodStats.no_lock_message``)."""
        return self.stats.no_lock_message()

    # ---- blocks ------------------------------------------------------------------------
    def _condition(self, block: np.ndarray) -> tuple[np.ndarray, float]:
        """NaN/Inf to zero, conjugation, DC removal; the block and its AGC gain."""
        block = np.array(block, dtype=np.complex64)
        if not np.isfinite(block.view(np.float32).sum()):
            bad = ~np.isfinite(block)
            self.stats.nonfinite_samples += int(bad.sum())
            block[bad] = 0
        if self.conjugate:
            block = np.conj(block)
        # a residual carrier may stand at or pass through 0 Hz (a recording tuned to its predicted frequency), where
        # the blocks' means would take it for the offset: while it is searched for the offset is left in the samples
        # (held at 0; the search refuses its bare line as any tone's), and while one is tracked within
        # _DC_GUARD_BINS of 0 Hz the estimate is held as it is (at 0 for a carrier found there: the loop then holds
        # the carrier and a front end's offset together)
        if self.residual:
            if self._tracking:
                f = float(self._cs[0]["frequency"]) * self.block_samples / (2.0 * math.pi)  # bins
                self._dc.frozen = abs(f) < _DC_GUARD_BINS
            else:
                self._dc.frozen = True
                self._dc.offset = 0j
        block, pw = self._dc.process(block)
        agc = self._agc_power
        if level_suspect(pw, agc):
            # the level changed by more than _AGC_ATTACK in power (a gain switched, out of a fade): the samples from
            # the change on are scaled to the level before it, whose gain the block takes, and the AGC the new level
            # (as the suppressed-carrier demodulator's AGC does; else the average's 0.8 / 0.2 step per block lags)
            found = level_change_at(block, agc, rise=pw > agc)
            if found is not None:
                k, p_after = found
                if p_after > 0.0:
                    block[k:] *= np.float32(math.sqrt(agc / p_after))
                    self._agc_power = p_after
                return block, 1.0 / math.sqrt(agc)
        if pw > 0:
            if agc > 0 and pw > agc * TONE_LOOK_RISE:
                self._tone_look_due = True  # a tone may have come up: looked for in the next block
            self._agc_power = agc_average(agc, pw)
        gain = 1.0 / math.sqrt(self._agc_power) if self._agc_power > 0 else 1.0
        return block, gain

    def _feed(self, block: np.ndarray, start: int, parts: list) -> None:
        block, gain = self._condition(block)
        if self._tracking:
            carrier_hz = float(self._cs[0]["frequency"]) * self.sample_rate_hz / (2.0 * math.pi)
            block = self._tones.apply(block, start, only=self._tones_clear_of(carrier_hz))
            # tones are looked for when the carrier is first tracked, in every block whose index on the recording's
            # block grid is a multiple of _tone_look_blocks (about every TONE_LOOK_S of recording) and in the block
            # after one whose power rose (_condition)
            if self._tone_look_due or (start // self.block_samples) % self._tone_look_blocks == 0:
                self._tone_look_due = False
                block = self._tones.apply(block, start, only=self._look_for_tones(block, carrier_hz))
            self._track([(block, gain, start)], parts)
            return
        block = self._tones.apply(block, start, only=self._tones_clear_of(None))
        item = (block, gain, start)
        if not self.residual:
            self._feed_costas(item, parts)
            return
        search = self._search
        if self._found is not None:
            self._held.append(item)
            if self._window_ready(self._found[1]) or len(self._held) >= self.hold_blocks \
                    or block.size < self.block_samples:
                self._complete_acquisition(parts)
            return
        if block.size == self.block_samples:
            if search.blocks >= search.max_blocks:
                self._saw_dwell()  # the dwell ends unfound: what it saw, then a new one
                self._restart_search()
            middle = self._dwell_add(search, block, gain, start)
            if search.blocks == 1:
                self._dwell_start = start
                while self._held:  # blocks of an earlier dwell
                    self._skip(self._held.pop(0), parts)
                # "auto" with a prediction whose mirrored band does not overlap the upright one (nearer 0 Hz the
                # sign cannot be told): the dwell is accumulated at the mirror image of the prediction too
                self._mirror_dwell = self._mirror is not None and self._mirror_due(middle)
            if self._mirror_dwell:
                self._dwell_add(self._mirror, block, gain, start, mirrored=True)
            self.stats.acquisitions += 1
        self._held.append(item)
        if search.blocks and block.size == self.block_samples:
            det = search.detect()
            self.stats.last_peak_ratio = 10.0 ** (det.level_db / 10.0) + 1.0
            mirrored = False
            if not det.found and self._mirror_dwell:
                mirror_det = self._mirror.detect()
                if mirror_det.found:  # a spectrally inverted recording (if the fine stage confirms it)
                    det, mirrored = mirror_det, True
            if det.found:
                self._saw(det, mirrored)
                fix = self._refine(det, mirrored)
                if fix is not None:
                    if mirrored:  # from now on demodulated as spectrum_inverted = true does
                        self._conjugate_from_now()
                    while self._held and self._held[0][2] < fix.start:
                        self._skip(self._held.pop(0), parts)
                    need = self._window_needed(fix.cn0_hz)
                    self._found = (det, need, fix)
                    if self._window_ready(need) or len(self._held) >= self.hold_blocks:
                        self._complete_acquisition(parts, fix)
                    return
        while len(self._held) > self.hold_blocks:
            self._skip(self._held.pop(0), parts)

    def _dwell_add(self, search: ResidualCarrierSearch, block: np.ndarray, gain: float, start: int,
                   mirrored: bool = False) -> float:
        """Add a full block to a dwell; the prediction at the block's middle (0 without one).

        ``mirrored``: the block conjugated, i.e. accumulated at the mirror image of the prediction.
        """
        if self.carrier_prediction is None:
            search.add(block, gain)
            return 0.0
        # each block on its own: the periodograms add up incoherently
        centred, _, middle = centre_window(np.conj(block) if mirrored else block, start, self.carrier_prediction,
                                           self.sample_rate_hz, self.stats)
        search.add(centred, gain)
        return middle

    def _mirror_due(self, middle: float) -> bool:
        """Whether a carrier not found at the prediction (``middle``: at the searched window's middle) is
        searched at its mirror image: ``"auto"`` with a prediction, not yet conjugating, and the mirrored band
        clear of the upright one."""
        return self.mirror_search and not self.conjugate and abs(middle) > self.acquisition_search_hz

    def _restart_search(self) -> None:
        """Start new dwells (upright and, under the mirrored search, mirrored)."""
        self._mirror_dwell = False
        if self.residual:
            self._search.restart()
        if self._mirror is not None:
            self._mirror.restart()

    def _saw_dwell(self) -> None:
        """What the dwell (and its mirrored twin, when accumulated) saw, for the no-lock line."""
        self._saw(self._search.detect())
        if self._mirror_dwell:
            self._saw(self._mirror.detect(), mirrored=True)

    def _conjugate_from_now(self) -> None:
        """The carrier was found at the mirror image of the prediction: from now on the samples are conjugated
        as with ``spectrum_inverted = true`` (the held blocks and the DC offset estimate, too), and the mirrored
        dwell becomes the upright one."""
        self.conjugate = True
        self.stats.carrier_found_mirrored += 1
        self._tones.conjugate()
        self._image.conjugate()
        self._held = [(np.conj(b), g, s) for b, g, s in self._held]
        self._dc.offset = self._dc.offset.conjugate()
        if self._mirror is not None:
            self._search, self._mirror = self._mirror, self._search
        self._mirror_dwell = False

    def _refine(self, det, mirrored: bool = False) -> CarrierFix | None:
        """The fine fix over the held blocks (``mirrored``: conjugated, with the mirrored dwell's floor)."""
        blocks = [np.conj(b) if mirrored else b for b, _, _ in self._held]
        gains = [g for _, g, _ in self._held]
        starts = [s for _, _, s in self._held]
        pred = self.carrier_prediction
        search = self._mirror if mirrored else self._search
        if pred is None:
            return search.refine(blocks, gains, starts, det, self._dwell_start)
        # the held blocks are consecutive: rotated as one window, so the phase runs on across them
        fs = self.sample_rate_hz
        sizes = [b.size for b in blocks]
        rot = pred.rotation(starts[0], sum(sizes), fs)
        edges = np.cumsum([0] + sizes)
        centred = [(b - np.complex64(np.mean(b, dtype=np.complex128))) * rot[edges[i]:edges[i + 1]]
                   for i, b in enumerate(blocks)]
        fix = search.refine(centred, gains, starts, det, self._dwell_start)
        if fix is None:
            return None
        k = fix.start - starts[0]
        phase = fix.phase_rad - math.atan2(float(rot[k].imag), float(rot[k].real))
        return dataclasses.replace(fix, frequency_hz=fix.frequency_hz + float(pred.offset_hz(fix.start)),
                                   rate_hz_per_s=fix.rate_hz_per_s + pred.rate_hz_per_s(fix.start, fs),
                                   phase_rad=(phase + math.pi) % (2.0 * math.pi) - math.pi)

    def _window_ready(self, need_symbols: float) -> bool:
        return sum(b.size for b, _, _ in self._held) / self.samples_per_symbol >= need_symbols

    def _window_needed(self, cn0_hz: float) -> float:
        """Symbols the acquisition window should hold at this ``P_c / N0`` (at most the hold).

        Timing: the energy search places the symbol within ``sqrt((2 N^2 + 4 N S) / n) / (2 S)`` symbols
        (``S / N = 2 Es/N0``: the mean energy falls by ``2 S x`` at ``x`` symbols off), 0.03 wanted.
        Subcarrier: the line of the squared chip correlations has an SNR of ``(2/3) rho^2 / (4 rho + 2)``
        per chip (``rho`` the chip correlation's SNR, ``(8 / pi^2) 2 E_chip`` for a square wave's
        fundamental, ``2 E_chip`` for a sine; 2/3 for chips that straddle a data transition), 30 wanted.
        """
        e = cn0_hz * self.data_to_carrier / self.symbol_rate_baud
        if not (e > 0 and math.isfinite(e)):
            return 0.0
        need = (2.0 + 8.0 * e) / (16.0 * 0.03 ** 2 * e * e)
        if self.subcarrier_mode:
            chips = 2.0 if self.biphase else 1.0
            e_chip = e / chips
            rho = (8.0 / math.pi ** 2 if self.subcarrier_mode == 1 else 1.0) * 2.0 * e_chip
            need = max(need, 30.0 * (4.0 * rho + 2.0) / (2.0 / 3.0 * rho * rho) / chips)
        return min(max(need, 256.0), self.hold_blocks * self.symbols_per_block)

    def _complete_acquisition(self, parts: list, fix: CarrierFix | None = None) -> None:
        """Refine the carrier over the whole held window and start tracking from it."""
        det, _, first_fix = self._found
        self._found = None
        if fix is None:
            # over the grown window (a line too weak to hold over it: the fix from the detection window)
            fix = self._refine(det) or first_fix
        self._restart_search()
        if fix is None:  # the line did not hold over the longer window: search again
            while self._held:
                self._skip(self._held.pop(0), parts)
            return
        while self._held and self._held[0][2] < fix.start:
            self._skip(self._held.pop(0), parts)
        items, self._held = self._held, []
        self._start_tracking(fix, items, parts)

    def _saw(self, det, mirrored: bool = False) -> None:
        """Keep a dwell's line in the stats, in the recording's frame (``mirrored``: found in the mirrored dwell)."""
        if det.blocks:
            level = 10.0 * math.log10(max(10.0 ** (det.level_db / 10.0) + 1.0, 1e-12))
            line = SpectralLine(det.frequency_hz, level, "CW tone" if det.tone else "carrier line")
            if self.carrier_prediction is not None:  # the detection is relative to the dwell's first block
                hz = float(self.carrier_prediction.offset_hz(self._dwell_start + 0.5 * (self.block_samples - 1)))
                line = (mirrored_line if mirrored else shifted_line)(line, hz)
            self.stats.saw(line)

    def _feed_costas(self, item, parts: list) -> None:
        """Bi-phase-L BPSK: a :class:`CarrierSearch` on the block; found, the block is tracked from it."""
        block, gain, start = item
        if block.size < 1024:
            self._skip(item, parts)
            return
        self.stats.acquisitions += 1
        acq, first, middle = self._costas_search(block, gain, start)
        if not acq.found and self._mirror_due(middle):
            # "auto" with a prediction: the mirror image of the prediction (its band clear of the upright one); a
            # carrier there is a spectrally inverted recording, demodulated from now on as spectrum_inverted = true
            acq, _, _ = self._costas_search(block, gain, start, mirrored=True)
            if acq.found:
                block = np.conj(block)
                item = (block, gain, start)
                self._conjugate_from_now()
        if not acq.found:
            self._skip(item, parts)
            return
        self.stats.carrier_found += 1
        fs = self.sample_rate_hz
        offset = acq.offset_hz + first
        m = max(64, block.size // 4)
        rot = block[:m].astype(np.complex128) * gain * np.exp(-2j * math.pi * offset / fs * np.arange(m))
        c2 = complex(np.mean(rot * rot))
        phase0 = 0.5 * math.atan2(c2.imag, c2.real)
        self._reset_carrier(phase0, 2.0 * math.pi * offset / fs, 0.0, 0.0)  # (costas_warm zeroed too)
        self._acq_start = start
        self._tracking = True
        self._clear_symbol_stage(start)
        self._track([item], parts)

    def _costas_search(self, block: np.ndarray, gain: float, start: int, mirrored: bool = False):
        """The :class:`CarrierSearch` of one Bi-phase-L BPSK block (``mirrored``: conjugated, i.e. at the mirror
        image of the prediction); ``(result, prediction at the first sample, at the middle)``."""
        window, first, middle = centre_window(np.conj(block) if mirrored else block, start, self.carrier_prediction,
                                              self.sample_rate_hz, self.stats)
        acq = self._search.search(window.astype(np.complex128) * gain)
        self.stats.saw((mirrored_line if mirrored else shifted_line)(acq.line, middle))
        if not mirrored:
            self.stats.last_peak_ratio = 10.0 ** (acq.line.level_db / 10.0) / math.log(2.0)
        return acq, first, middle

    def _skip(self, item, parts: list) -> None:
        """A block passed without demodulation (searched, not found): a track point of ``nan`` values."""
        block, _, start = item
        n = block.size
        self._clear_symbol_stage(start + n)
        track = [ResidualTrackPoint(position=float(start + 0.5 * (n - 1)), carrier_offset_hz=float("nan"),
                                    esn0_db=float("nan"), carrier_locked=False, symbol_locked=False,
                                    subcarrier_locked=False if self.subcarrier_mode else None)]
        parts.append({"pos": np.zeros(0), "soft": np.zeros(0, np.float32), "locked": np.zeros(0, bool),
                      "track": track})

    def _reset_carrier(self, phase: float, omega: float, rate: float, amplitude: float) -> None:
        st = self._cs[0]
        jump = (phase - st["phase"] + math.pi) % (2.0 * math.pi) - math.pi
        st["total"] += jump  # the total phase stays continuous across a re-acquisition
        st["phase"] = phase % (2.0 * math.pi)
        st["frequency"] = omega
        st["rate"] = rate
        st["amplitude"] = amplitude
        for name in ("sc_i", "sc_q", "costas_i", "costas_q", "costas_num", "costas_den", "costas_warm",
                     "lk_sum", "lk_sum2", "lock_z"):
            st[name] = 0.0
        for name in ("locked", "above", "below", "decisions", "lk_count"):
            st[name] = 0
        st["sc_frequency"] = self.subcarrier_cycles_per_sample
        st["sc_phase"] = 0.0

    # ---- tones --------------------------------------------------------------------------
    def _carrier_lines(self, carrier_hz: float) -> list[float]:
        """Where the signal's own lines may stand: the carrier and, on a subcarrier, the carrier plus and minus its
        odd harmonics (a data pattern that repeats, or an unbalanced one, leaves the subcarrier a line)."""
        lines = [carrier_hz]
        if self.subcarrier_mode:
            sc = self.subcarrier_cycles_per_sample * self.sample_rate_hz
            lines += [carrier_hz + k * sc for k in (-5, -3, -1, 1, 3, 5)]
        return lines

    def _tone_guard_hz(self) -> float:
        """A tone this close to one of the signal's lines is left alone: 5 % of the symbol rate, and at least two
        stretch bins (the notch's width), so that the carrier is never taken out as it drifts past a tone."""
        return max(0.05 * self.symbol_rate_baud, 2.0 * self.sample_rate_hz / TONE_STRETCH)

    def _look_for_tones(self, samples: np.ndarray, carrier_hz: float) -> list[int]:
        """Tones in ``samples`` (known tones already out of them) away from the signal's lines, taken out from
        now on; the indices of the new ones."""
        new = self._tones.look(samples, self._carrier_lines(carrier_hz), self._tone_guard_hz())
        self.stats.tones_hz = self._tones.recorded_hz(self.conjugate)
        return new

    def _tones_clear_of(self, carrier_hz: float | None) -> list[int]:
        """The known tones not within the guard of the signal's lines (all while the carrier is not tracked)."""
        if carrier_hz is None:
            return list(range(len(self._tones.tones_hz)))
        guard = self._tone_guard_hz()
        lines = self._carrier_lines(carrier_hz)
        return [k for k, f in enumerate(self._tones.tones_hz) if all(abs(f - g) > guard for g in lines)]

    def _start_tracking(self, fix: CarrierFix, items: list, parts: list) -> None:
        """Start the loops from the fine acquisition and demodulate the held window ``items`` (tones away from the
        signal's lines taken out of it first)."""
        fs = self.sample_rate_hz
        if items:
            held = np.concatenate([b for b, _, _ in items]) if len(items) > 1 else items[0][0]
            new = self._look_for_tones(held, fix.frequency_hz)
            if new:
                items = [(self._tones.apply(b, st, only=new), g, st) for b, g, st in items]
        self.stats.carrier_found += 1
        self._reset_carrier(fix.phase_rad, 2.0 * math.pi * fix.frequency_hz / fs,
                            2.0 * math.pi * fix.rate_hz_per_s / (fs * fs), fix.amplitude)
        if self._went_hz is not None:
            if abs(fix.frequency_hz - self._went_hz) > _MOVED_HZ:
                self.stats.carrier_moved += 1
            self._went_hz = None
        self._amp_floor = 0.25 * fix.amplitude
        self._carrier_amp = fix.amplitude
        self._cn0_hz = fix.cn0_hz
        self._acq_start = fix.start
        self._unlocked_blocks = 0
        self._locked_blocks = 0
        self._tracking = True
        self._clear_symbol_stage(items[0][2])
        self._clock_ratio = 1.0
        if self.subcarrier_mode:
            self._acquire_subcarrier(items)
        self._track(items, parts)

    def _plan(self, start: int) -> LoopPlan:
        """Loop bandwidths for the block starting at ``start``, written into the kernels' parameters."""
        fs = self.sample_rate_hz
        since = (start - self._acq_start) / fs
        plan = plan_loops(symbol_rate_baud=self.symbol_rate_baud, cn0_hz=self._cn0_hz,
                          data_to_carrier=self.data_to_carrier, nrz_pm=self.nrz_pm, since_s=since,
                          fixed_carrier_hz=self.fixed_carrier_hz, timing_bt_max=self.timing_bt_max,
                          period_aided=self._clock_ratio != 1.0)
        self.loop_plan = plan
        p = self._cparams[0]
        kp, ki, kr = loop_gains(plan.carrier_hz / fs, self.carrier_loop_order)
        p["kp_c"], p["ki_c"], p["kr_c"] = kp, ki, kr
        p["a_amp"] = min(0.01, 4.0 * plan.carrier_hz / fs)
        p["amp_floor"] = self._amp_floor
        p["lock_interval"] = max(64, int(round(plan.lock_interval_s * fs)))
        p["a_costas"] = 0.25 * p["a_amp"]
        if self.subcarrier_mode:
            # the in-phase arm's data power: A_d = A_c sqrt(P_d / P_c x the reference's mean square)
            a_d = self._carrier_amp * math.sqrt(self.data_to_carrier * self._ref_power)
            p["sc_norm"] = self._arm_power * a_d * a_d if math.isfinite(a_d) and a_d > 0 else 1e-30
            kp_s, ki_s, _ = loop_gains(plan.subcarrier_hz / fs, 2)
            slope = 4.0 if self.subcarrier_mode == 1 else 2.0 * math.pi  # error per cycle of subcarrier phase
            p["kp_s"], p["ki_s"] = kp_s / slope, ki_s / slope
        # the transition loop's mean error per symbol: half the NRZ symbols have a transition (every Bi-phase-L
        # symbol has one), and it is detected with probability about (1 + erf(sqrt(Es/N0))) / 2, so the mean
        # error is erf(sqrt(Es/N0)) of its noise-free value (Yuen (ed.), ch. 5: the DTTL's S-curve slope)
        esn0 = self._cn0_hz * self.data_to_carrier / self.symbol_rate_baud if self.residual else math.inf
        slope_t = max(math.erf(math.sqrt(esn0)), 0.1) if math.isfinite(esn0) and esn0 > 0 else 1.0
        if not self.biphase:
            slope_t *= 0.5
        kp_t, ki_t, _ = loop_gains(plan.timing_bt, 2)
        q = self._sparams[0]
        q["kp_t"], q["ki_t"] = kp_t / slope_t, ki_t / slope_t
        return plan

    # ---- acquisition of subcarrier and timing ---------------------------------------------
    def _acquire_subcarrier(self, items: list) -> None:
        """Subcarrier frequency offset and phase from a carrier pass over the held window (see the class Notes)."""
        state = self._cs.copy()
        self._plan(items[0][2])
        params = self._cparams.copy()
        params[0]["kp_s"] = 0.0
        params[0]["ki_s"] = 0.0
        params[0]["raw"] = 1
        qs = []
        for block, gain, _ in items:
            n = block.size
            q = np.empty(n, dtype=np.float32)
            qq = np.empty(n, dtype=np.float32)
            lk = np.empty(n, dtype=np.int8)
            ph = np.empty(0, dtype=np.float64)
            track_carrier(block, gain, params, state, self._cos, self._sin, np.zeros(0, np.int64), q, qq, lk, ph)
            qs.append(q)
        q = np.concatenate(qs)
        n = q.size
        nu = self.subcarrier_cycles_per_sample
        chip = max(1, int(round(self.chip_samples)))
        nwin = n // chip
        if nwin < 16:
            return
        # chip correlations with exp(-j 2 pi nu n), a few thousand chips at a time (bounded temporaries)
        cj = np.empty(nwin, dtype=np.complex128)
        step = max(1, (1 << 18) // chip)
        for a in range(0, nwin, step):
            b = min(nwin, a + step)
            idx = np.arange(a * chip, b * chip, dtype=np.float64)
            ref = q[a * chip:b * chip].astype(np.float64) * np.exp(-2j * math.pi * ((nu * idx) % 1.0))
            cj[a:b] = ref.reshape(b - a, chip).sum(axis=1)
        zj = -(cj * cj)  # the data sign removed: exp(j 4 pi delta) for a reference delta cycles behind
        # a subcarrier offset dnu (cycles/sample) turns zj at 2 dnu chip cycles per chip
        span = 2.0 * _CLOCK_SEARCH * nu * chip
        nfft = 8 * _next_pow2(nwin)
        spec = np.fft.fft(zj * np.hanning(nwin), nfft)
        pw = spec.real ** 2 + spec.imag ** 2
        f = np.fft.fftfreq(nfft)
        band = np.flatnonzero(np.abs(f) <= span + 1.0 / nwin)
        k = int(band[np.argmax(pw[band])])
        lo, mid, hi = pw[(k - 1) % nfft], pw[k], pw[(k + 1) % nfft]
        den = lo - 2.0 * mid + hi
        frac = 0.5 * (lo - hi) / den if den < 0 else 0.0
        rot = (k + frac) / nfft
        if rot >= 0.5:
            rot -= 1.0
        # an offset only when its line stands out of the noise (exponential bins, the floor from the spectrum
        # outside the band: one of the band's about band / 8 independent noise bins passes ln(independent /
        # 1e-3) times the mean with probability 1e-3)
        independent = max(band.size / 8.0, 1.0)
        outside = np.ones(nfft, dtype=bool)
        outside[band] = False
        floor = float(np.median(pw[outside])) / math.log(2.0)
        found = floor > 0 and pw[k] > math.log(independent / 1e-3) * floor
        dnu = rot / (2.0 * chip) if found else 0.0
        # the symbol clock's rate relative to nominal, if the subcarrier is coherent with it (the usual
        # design: an integer number of subcarrier cycles per symbol; CCSDS 401.0-B sec. 2.4, from memory,
        # not confirmed): the centre of the timing search's trial periods
        self._clock_ratio = (nu + dnu) / nu if found else 1.0
        centres = (np.arange(nwin) + 0.5) * chip
        acc = complex(np.sum(zj * np.exp(-2j * math.pi * 2.0 * dnu * centres)))
        delta = math.atan2(acc.imag, acc.real) / (4.0 * math.pi)
        st = self._cs[0]
        st["sc_frequency"] = nu + dnu
        st["sc_phase"] = delta % 1.0

    def _acquire_timing(self) -> None:
        """Symbol period and timing: the largest mean symbol energy over trial periods and 32 timings each."""
        T = self.samples_per_symbol
        u = self._ubuf
        base = self._ubase
        end = base + u.size
        first = base + 0.5 * T
        n_sym = min(_TIMING_MAX_SYMBOLS, int((end - first - 0.5 * T - 2.0) / (T * (1.0 + _CLOCK_SEARCH))) - 1)
        if n_sym < 16:
            return
        # trial periods 1 / (8 n_sym) apart (an eighth of a symbol of drift over the window) within +-200 ppm, when
        # the window can tell them apart (at least 1024 symbols); the transition loop, wide at first, takes
        # the rest
        step = 1.0 / (8.0 * n_sym)
        half = int(math.ceil(_CLOCK_SEARCH / step)) if self.residual and n_sym >= 1024 else 0
        periods = T / self._clock_ratio * (1.0 + step * np.arange(-half, half + 1))
        cum = np.zeros(u.size + 1, dtype=np.float64)
        np.cumsum(u, dtype=np.float64, out=cum[1:])
        energy = np.empty((periods.size, _TIMING_TRIALS), dtype=np.float64)
        timing_energy(cum, u, np.int64(base), first, periods, _TIMING_TRIALS, n_sym, 1 if self.biphase else 0,
                      energy)
        i = half
        if half:
            # another period only when its best timing beats the nominal period's by 3 standard errors of a
            # difference of two mean energies (var s^2 = 2 N^2 + 4 N S for Gaussian noise N and signal S)
            best = energy.max(axis=1)
            n_s = self._symbol_noise(T)
            s_est = max(float(best.max()) - n_s, 0.0) if math.isfinite(n_s) else 0.0
            se = math.sqrt(2.0 * (2.0 * n_s * n_s + 4.0 * n_s * s_est) / n_sym) if math.isfinite(n_s) else 0.0
            cand = int(np.argmax(best))
            if best[cand] - best[half] > 3.0 * se:
                i = cand
        j = int(np.argmax(energy[i]))
        row = energy[i]
        e_m, e_0, e_p = row[(j - 1) % _TIMING_TRIALS], row[j], row[(j + 1) % _TIMING_TRIALS]
        den = e_m - 2.0 * e_0 + e_p
        frac = 0.5 * (e_m - e_p) / den if den < 0 else 0.0
        period = float(periods[i])
        tau = first + (j + frac) * period / _TIMING_TRIALS
        # go back to the first symbol whose centre is in the buffer (cut by its start)
        tau -= period * math.floor((tau - (base - 0.5)) / period)
        ss = self._ss[0]
        ss["tau"] = tau
        ss["period"] = period
        ss["prev"] = 0.0
        if self.residual:
            n_s = self._symbol_noise(period)
            s = float(e_0) - n_s if math.isfinite(n_s) else float(e_0)
            s = max(s, 0.05 * n_s if math.isfinite(n_s) else 0.0, 1e-30)
            ss["amp"] = math.sqrt(s) / period
            self._data_amp = ss["amp"]
        else:
            ss["amp"] = math.sqrt(float(e_0)) / period
        self._timing_acquired = True

    def _energy_fell(self, raw: np.ndarray) -> bool:
        """The mean energy of the block's last symbols (at most ``_JUMP_SYMBOLS``) under 0.95 of the blocks' before,
        and under it by 3 standard errors: the symbols may have moved (the timing check's trigger; a timing ``d``
        periods off takes ``2 |d| - 2 d^2`` of the signal's energy, 0.22 at an eighth of a period)."""
        ref = self._energy_ref
        if not math.isfinite(ref):
            return False
        e = raw[-_JUMP_SYMBOLS:] ** 2
        mean = float(np.mean(e))
        return mean < 0.95 * ref and ref - mean > 3.0 * float(np.std(e)) / math.sqrt(e.size)

    def _carrier_went(self, mean_re: float, var_re: float, n: float) -> bool:
        """A strong carrier's in-phase mean gone over a whole block (``_GONE_MIN_Z``, ``_GONE_FRACTION``)."""
        a = self._carrier_amp
        return math.isfinite(a) and a > _GONE_MIN_Z * math.sqrt(var_re / n) and mean_re < _GONE_FRACTION * a

    def _in_phase_fell(self, n: int) -> bool:
        """The block's mean in-phase carrier (``Re r``, the carrier stage's sums) under ``_PHASE_JUMP_TRIGGER`` of the
        carrier's amplitude, and under it by 3 standard errors: the carrier may have turned (a phase jump)."""
        st = self._cs[0]
        a = self._carrier_amp
        if not (math.isfinite(a) and a > 0 and n > 1):
            return False
        mean = float(st["sum_re"]) / n
        var = max(float(st["sum_re2"]) / n - mean * mean, 0.0)
        return mean < _PHASE_JUMP_TRIGGER * a and a - mean > 3.0 * math.sqrt(var / n)

    def _phase_jump(self, block: np.ndarray, gain: float, at: np.ndarray, before: np.ndarray, free: tuple,
                    u: np.ndarray, uq: np.ndarray, lk: np.ndarray, ph: np.ndarray) -> float:
        """The block's carrier stage again, from where the carrier's phase jumped, with the loop's phase moved by the
        jump: ``u, uq, lk, ph`` (filled by the first pass, which started from the state ``before``) overwritten.
        Returns the phase the loop was moved by (0 when the carrier did not jump).

        A loop error ``Im(r) / A_c`` is ``sin`` of the phase error, so a phase that jumps by more than a quarter turn
        (samples lost by the recorder: the carrier's phase moves by ``2 pi f`` times the samples lost) leaves the loop
        near its unstable point, through which it turns back slowly, for hundreds of milliseconds at the narrow
        bandwidths of a weak carrier, the data arm fading through zero on the way.  The block's samples, derotated
        as the loop would have run (``free``: its phase at the block's start, the mean frequency of the block
        before, the Doppler rate), are averaged over stretches of ``_PHASE_JUMP_STRETCH`` samples; the cut where
        their mean changes most (each part weighed by its spread: the real part holds the carrier and noise, the
        imaginary part the data too) is the candidate, and the change across it over the ``_PHASE_JUMP_LOCAL``
        stretches each side (a loop still taking up a frequency turns the carrier smoothly, far less over so short
        a span) is the jump, taken when it stands ``_PHASE_JUMP_Z`` out (a chi-square statistic of two degrees of
        freedom) and turns the carrier by more than ``_PHASE_JUMP_MIN_RAD``.  Called only for a block whose
        in-phase carrier fell or whose loop turned (:meth:`_in_phase_fell`, :func:`_loop_turned`).  At P_c/N0 =
        25 dB-Hz (Es/N0 = 0 dB, m = 1.2 rad, 2 ksym/s) jumps of 135 degrees and more are found and taken, 90 in
        one case of five, 60 not (tests/test_residual_timing_jump.py; the loop turns back from those by itself).
        """
        n = block.size
        m = n // _PHASE_JUMP_STRETCH
        if m < 8 or at.size < 2:
            return 0.0
        x = block[:m * _PHASE_JUMP_STRETCH].astype(np.complex128)
        t = np.arange(m * _PHASE_JUMP_STRETCH, dtype=np.float64)
        # derotated as the loop would have run (``free``: its phase and frequency at the block's start, the Doppler
        # rate): the carrier stands still before a jump and at the jump's angle after it, whatever the loop did
        phase0, _, omega, rate = free
        means = gain * (x * np.exp(-1j * (phase0 + omega * t + 0.5 * rate * t * t))).reshape(
            m, _PHASE_JUMP_STRETCH).mean(axis=1)
        c = np.concatenate([[0.0], np.cumsum(means)])
        k = np.arange(1, m)
        left = c[k] / k
        right = (c[m] - c[k]) / (m - k)
        # the cut where the two parts' means differ most (each part of the stretch means in units of its spread)
        stat = k * (m - k) / m * ((right.real - left.real) ** 2 / max(float(np.var(means.real)), 1e-30)
                                  + (right.imag - left.imag) ** 2 / max(float(np.var(means.imag)), 1e-30))
        kk = int(k[int(np.argmax(stat))])
        # then the change across it over the stretches next to it only (a frequency or a Doppler rate the loop was
        # still taking up turns the carrier smoothly, which over so short a span stays far under a jump's angle),
        # against the spread within them
        span = min(_PHASE_JUMP_LOCAL, kk, m - kk)
        if span < 8:
            return 0.0
        a, b = means[kk - span:kk], means[kk:kk + span]
        ma, mb = a.mean(), b.mean()
        var_re = max(0.5 * (float(np.var(a.real)) + float(np.var(b.real))), 1e-30)
        var_im = max(0.5 * (float(np.var(a.imag)) + float(np.var(b.imag))), 1e-30)
        z = 0.5 * span * ((mb.real - ma.real) ** 2 / var_re + (mb.imag - ma.imag) ** 2 / var_im)
        jump = math.atan2(mb.imag, mb.real) - math.atan2(ma.imag, ma.real)
        jump = (jump + math.pi) % (2.0 * math.pi) - math.pi
        if not (z > _PHASE_JUMP_Z and abs(jump) > _PHASE_JUMP_MIN_RAD):
            return 0.0
        cut = kk * _PHASE_JUMP_STRETCH
        self._cs[:] = before
        st = self._cs[0]
        for name in _BLOCK_SUMS:
            st[name] = 0.0
        first = at < cut
        ph1 = np.empty(int(first.sum()))
        ph2 = np.empty(at.size - ph1.size)
        track_carrier(block[:cut], gain, self._cparams, self._cs, self._cos, self._sin, at[first], u[:cut],
                      uq[:cut] if uq.size else uq, lk[:cut], ph1)
        st = self._cs[0]
        st["phase"] = (float(st["phase"]) + jump) % (2.0 * math.pi)
        st["total"] = float(st["total"]) + jump
        track_carrier(block[cut:], gain, self._cparams, self._cs, self._cos, self._sin, at[~first] - cut, u[cut:],
                      uq[cut:] if uq.size else uq, lk[cut:], ph2)
        ph[:] = np.concatenate([ph1, ph2])
        self.stats.phase_jumps += 1
        return jump

    def _timing_jump(self, cols: tuple, upto: int) -> tuple:
        """The block's symbols ``cols`` (as :meth:`_symbols` gives them), again from where the symbols moved by a
        fraction of a period at once, at the new timing; ``cols`` as they were when they did not move.

        A timing ``d`` periods late integrates an NRZ symbol with a transition to ``1 - 2 |d|`` of its value, so the
        mean energy falls as ``1 - 2 |d| + 2 d^2`` of the signal's (0.54 at ``d = 0.36``): over 1024 symbols at
        Es/N0 = -1.5 dB that is about 8 standard errors.  The energies at ``_JUMP_TRIALS`` timings over the block's
        last symbols come from prefix sums (:func:`timing_energy`); a candidate at least ``_JUMP_MIN_PERIODS`` from
        the tracked timing (outside the loop's own range) is tested symbol by symbol against the tracked symbols
        (the noise they share cancels in the paired difference).  Once taken, the move's symbol is where the
        paired difference's sum from there on is largest (it is ``-mu`` a symbol before the move and ``+mu``
        after), and the symbols from there are integrated again at the new timing (no transition update across the
        move): the block loses nothing but the symbols the move itself broke.
        """
        pos, raw = cols[0], cols[1]
        ss = self._ss[0]
        period = float(ss["period"])
        n = min(pos.size, _JUMP_SYMBOLS)
        centres = pos[-n:-1]  # the last symbol's successor may lie beyond the block
        lo = max(int(math.floor(pos[0] - period)) - 2 - self._ubase, 0)
        u = self._ubuf[lo:upto]
        base = self._ubase + lo
        cum = np.zeros(u.size + 1, dtype=np.float64)
        np.cumsum(u, dtype=np.float64, out=cum[1:])
        energy = np.empty((1, _JUMP_TRIALS), dtype=np.float64)
        timing_energy(cum, u, np.int64(base), float(centres[0]), np.array([period]), _JUMP_TRIALS, centres.size,
                      1 if self.biphase else 0, energy)
        row = energy[0]
        j = int(np.argmax(row))
        e_m, e_0, e_p = row[(j - 1) % _JUMP_TRIALS], row[j], row[(j + 1) % _JUMP_TRIALS]
        den = e_m - 2.0 * e_0 + e_p
        frac = 0.5 * (e_m - e_p) / den if den < 0 else 0.0
        d = (j + frac) / _JUMP_TRIALS
        d -= math.floor(d + 0.5)  # in [-1/2, 1/2) periods
        if abs(d) < _JUMP_MIN_PERIODS:
            return cols
        s_new = np.empty(pos.size - 1)
        symbol_integrals(cum, u, np.int64(base), pos[:-1] + d * period, 0.5 * period, 1 if self.biphase else 0, s_new)
        diff = s_new * s_new - raw[:-1] * raw[:-1]
        tail = diff[-(n - 1):]
        if not float(np.mean(tail)) > _JUMP_SIGMAS * float(np.std(tail)) / math.sqrt(tail.size):
            return cols
        gain = np.cumsum(diff[::-1])[::-1]  # gain[k] = sum of diff[k:]
        k = int(np.argmax(gain))
        ss["tau"] = float(pos[k]) + d * period
        ss["prev"] = 0.0  # no transition update across the move
        self.stats.timing_jumps += 1
        again = self._symbols(upto)
        return tuple(np.concatenate([c[:k], a]) for c, a in zip(cols, again))

    def _symbol_noise(self, period: float) -> float:
        """Noise variance of one integrated symbol, ``sigma^2 (T - 1/3) g``, from the carrier stage's last block."""
        return self._noise_var * (period - 1.0 / 3.0) * self._ref_power

    # ---- tracking ------------------------------------------------------------------------
    def _track(self, items: list, parts: list) -> None:
        """Carrier stage over the blocks ``items``, then their symbols, lock statistics and track points."""
        fs = self.sample_rate_hz
        infos = []
        went = False
        for block, gain, start in items:
            plan = self._plan(start)
            n = block.size
            u = np.empty(n, dtype=np.float32)
            uq = np.empty(n if self.subcarrier_mode else 0, dtype=np.float32)
            lk = np.empty(n, dtype=np.int8)
            edges = np.linspace(0, n - 1, _SUB_BLOCKS + 1).astype(np.int64) if n >= 4 * _SUB_BLOCKS else \
                np.zeros(0, np.int64)
            at = np.unique(np.concatenate([edges, [0, (n - 1) // 2, n - 1]])).astype(np.int64)
            ph = np.empty(at.size, dtype=np.float64)
            st = self._cs[0]
            for name in _BLOCK_SUMS:
                st[name] = 0.0
            if self.residual:
                # the front end's I/Q image, measured on the carrier's mirror line, out of the samples
                block = self._image.apply(block)
                if self._image.applied:
                    self.stats.iq_image_db = self._image.image_db
            omega0, rate0 = float(st["frequency"]), float(st["rate"])
            # (the phase-jump check only once the loop has held lock for a few blocks: while it still takes up a
            # Doppler rate its phase turns smoothly, by more than a jump's angle over a block)
            settled = self.residual and st["locked"] and self._locked_blocks >= _PHASE_JUMP_SETTLED
            before = self._cs.copy() if settled else None
            moved = 0.0
            track_carrier(block, gain, self._cparams, self._cs, self._cos, self._sin, at, u, uq, lk, ph)
            if before is not None and math.isfinite(self._loop_mean_w):
                # where the loop would have run: from its phase at the block's start on at the mean frequency it ran
                # at over the last block, moved on by the Doppler rate it followed (the frequency and rate integrators'
                # own values are too noisy to run on over a block)
                rate = self._loop_rate if self.carrier_loop_order == 3 else rate0
                rate = rate if math.isfinite(rate) else rate0
                free = (float(before[0]["phase"]), float(before[0]["total"]),
                        self._loop_mean_w + 0.5 * rate * self._loop_mean_n, rate)
                if self._in_phase_fell(n) or _loop_turned(free, at, ph):
                    moved = self._phase_jump(block, gain, at, before, free, u, uq, lk, ph)
            st = self._cs[0]
            cnt = max(float(n), 1.0)  # the sums run over every sample of the block
            mean_re = st["sum_re"] / cnt
            var_re = max(st["sum_re2"] / cnt - mean_re * mean_re, 1e-30)
            if settled and moved == 0.0 and not went and self._carrier_went(mean_re, var_re, cnt):
                went = True
                self._went_hz = omega0 * fs / (2.0 * math.pi)  # (where it was when the block began)
                lk[:] = 0  # (the lock detector still holds: its decisions lag by up to two intervals)
                st["locked"] = 0
            if settled and st["locked"] and moved == 0.0 and \
                    abs(float(st["frequency"])) * n / (2.0 * math.pi) >= _MIRROR_GUARD_BINS:
                self._image.update(n, complex(st["sum_re"], st["sum_im"]), complex(st["img_re"], st["img_im"]),
                                   complex(st["dbl_re"], st["dbl_im"]))
            self._loop_rate = (float(st["frequency"]) - omega0) / n
            # the loop's mean frequency over the block (rad/sample), from its total phase at the first and last samples
            # (less the phase a jump moved it by)
            self._loop_mean_w = (float(ph[-1]) - float(ph[0]) - moved) / max(int(at[-1]) - int(at[0]), 1) \
                if at.size > 1 else float("nan")
            self._loop_mean_n = n
            self._locked_blocks = self._locked_blocks + 1 if st["locked"] else 0
            if self.residual and self.carrier_loop_order == 2 and st["locked"]:
                # rate aiding follows the Doppler rate: the frequency's drift over the block beyond the aiding's
                # own is the rate the aiding misses (a slow third integrator, one update per block)
                st["rate"] = rate0 + _RATE_AIDING_GAIN * ((float(st["frequency"]) - omega0) / n - rate0)
            info = {"start": start, "n": n, "at": at, "ph": ph, "edges": edges, "mean_re": mean_re,
                    "var_re": var_re, "locked": bool(st["locked"]), "lock_z": float(st["lock_z"]), "plan": plan,
                    "decisions": int(st["decisions"]),
                    "cn0": mean_re * mean_re * fs / (2.0 * var_re) if mean_re > 0 else 0.0}
            if self.residual and st["locked"]:
                # P_c / N0 for the loop plan, smoothed over about four blocks
                c = info["cn0"]
                self._cn0_hz = c if not math.isfinite(self._cn0_hz) else 0.75 * self._cn0_hz + 0.25 * c
                a = mean_re
                self._carrier_amp = a if not math.isfinite(self._carrier_amp) else 0.75 * self._carrier_amp + 0.25 * a
            self._noise_var = var_re
            infos.append(info)
            self._ubuf = np.concatenate([self._ubuf, u])
            self._uqbuf = np.concatenate([self._uqbuf, uq])
            self._lbuf = np.concatenate([self._lbuf, lk])
        if not self._timing_acquired:
            self._noise_var = infos[0]["var_re"]
            self._acquire_timing()
        for info in infos:
            self._block_symbols(info, parts)
        if self._unlocked_blocks >= _REACQUIRE_BLOCKS or went:  # search for the carrier again
            self._tracking = False
            self._unlocked_blocks = 0
            self._restart_search()
        # keep the samples the next symbol needs
        if self._timing_acquired:
            keep = int(math.floor(self._ss[0]["tau"] - (0.5 + 2.0 * _DTTL_WINDOW) * self._ss[0]["period"])) - 2
            keep -= self._ubase
        else:
            keep = self._ubuf.size - self.block_samples  # wait for more samples to acquire the timing on
        keep = min(max(keep, 0), self._ubuf.size)
        if keep:
            self._ubuf = self._ubuf[keep:].copy()
            self._uqbuf = self._uqbuf[keep:].copy() if self._uqbuf.size else self._uqbuf
            self._lbuf = self._lbuf[keep:].copy()
            self._ubase += keep

    def _block_symbols(self, info: dict, parts: list) -> None:
        fs = self.sample_rate_hz
        start, n = info["start"], info["n"]
        self._noise_var = info["var_re"]
        pos = raw = soft = h1 = h2 = sq = np.zeros(0)
        slock = np.zeros(0, dtype=bool)
        if self._timing_acquired:
            upto = start + n - self._ubase
            ss = self._ss[0]
            if self.residual and math.isfinite(self._data_amp) and self._data_amp > 0:
                ss["amp"] = self._data_amp
            cols = self._symbols(upto)
            if info["locked"] and cols[0].size >= _JUMP_MIN_SYMBOLS and self._energy_fell(cols[1]):
                cols = self._timing_jump(cols, upto)
            pos, raw, soft, slock, h1, h2, sq = cols
            if raw.size:
                e = float(np.mean(raw * raw))
                self._energy_ref = e if not math.isfinite(self._energy_ref) else 0.75 * self._energy_ref + 0.25 * e
        nsym = pos.size
        # ---- statistics ----------------------------------------------------------------------
        carrier_locked = info["locked"]
        esn0_db = float("nan")
        sym_z = sc_z = float("nan")
        sc_locked = None
        mod_index = float("nan")
        if self.residual:
            period = float(self._ss[0]["period"])
            n_s = self._symbol_noise(period)
            if nsym:
                self._esn0_ew.add(nsym, (float(np.dot(raw, raw)), nsym * n_s, nsym * info["mean_re"]))
                m2, noise, a_c = self._esn0_ew.mean()
                sig = m2 - noise
                if sig > 0:
                    self._data_amp = math.sqrt(sig) / period
                if nsym >= 32:
                    esn0_db = 10.0 * math.log10(sig / (2.0 * noise)) if sig > 0 else -math.inf
                if carrier_locked and sig > 0:
                    mod_index = modulation_index_from_amplitudes(a_c, math.sqrt(sig) / period, wave=self.wave)
                    self.modulation_index_rad = mod_index
                sign = -1.0 if self.biphase else 1.0
                if nsym >= 2:
                    h = h2[:-1] + sign * h1[1:]
                    self._symbol_lock.add((raw[:-1] ** 2 - h * h) / n_s)
                if self.subcarrier_mode:
                    self._subcarrier_lock.add((raw * raw - sq * sq) / n_s)
            sym_z = self._symbol_lock.z
            symbol_ok = self._symbol_decision.update(sym_z) if nsym else self._symbol_decision.locked
            if self.subcarrier_mode:
                sc_z = self._subcarrier_lock.z
                sc_locked = bool(carrier_locked and (self._subcarrier_decision.update(sc_z) if nsym
                                                     else self._subcarrier_decision.locked))
            symbol_locked = bool(carrier_locked and symbol_ok and (sc_locked if self.subcarrier_mode else True))
        else:
            s_pow, n_pow = _real_m2m4(raw)
            esn0_db = (10.0 * math.log10(s_pow / (2.0 * n_pow)) if (s_pow > 0 and n_pow > 0) else
                       (float("inf") if s_pow > 0 else float("nan")))
            symbol_locked = bool(carrier_locked and esn0_db > _COSTAS_SYMBOL_LOCK_ESN0_DB)
        # ---- the block's track point ----------------------------------------------------------
        at, ph = info["at"], info["ph"]
        ph_of = dict(zip(at.tolist(), ph.tolist()))
        freq = (ph_of[n - 1] - ph_of[0]) / (2.0 * math.pi * max(n - 1, 1)) * fs if n > 1 else float("nan")
        edges = info["edges"]
        std = _frequency_std_hz(np.array([ph_of[int(e)] for e in edges]), edges, fs) if edges.size else float("nan")
        cn0 = info["cn0"]
        centre = start + 0.5 * (n - 1)
        track = [ResidualTrackPoint(position=float(centre), carrier_offset_hz=float(freq), esn0_db=float(esn0_db),
                                    carrier_locked=carrier_locked, symbol_locked=symbol_locked,
                                    carrier_phase_rad=float(ph_of[(n - 1) // 2]), carrier_std_hz=std,
                                    modulation_index_rad=mod_index,
                                    cn0_dbhz=10.0 * math.log10(cn0) if cn0 > 0 else float("nan"),
                                    subcarrier_locked=sc_locked, carrier_lock_statistic=info["lock_z"],
                                    symbol_lock_statistic=sym_z, subcarrier_lock_statistic=sc_z)]
        parts.append({"pos": pos, "soft": soft.astype(np.float32), "locked": slock, "track": track})
        self.stats.symbols_out += nsym
        self.stats.carrier_locked_symbols += int(slock.sum())
        self._after_block(info)

    def _after_block(self, info: dict) -> None:
        """Count the blocks that end unlocked once the lock detector has decided since the acquisition."""
        if info["locked"]:
            self._unlocked_blocks = 0
        elif not self.residual or info["decisions"] >= _CARRIER_HOLD + 2:
            self._unlocked_blocks += 1

    def _symbols(self, upto: int):
        """:func:`rect_symbols` over the buffer's first ``upto`` samples, outputs sized from its bound."""
        u = self._ubuf[:upto]
        uq = self._uqbuf[:upto] if self._uqbuf.size else self._uqbuf
        lk = self._lbuf[:upto]
        cap = int(u.size / self._min_symbol_advance) + 2
        outs = []
        while True:
            out = (np.empty(cap), np.empty(cap), np.empty(cap), np.empty(cap, dtype=np.int8), np.empty(cap),
                   np.empty(cap), np.empty(cap))
            k = rect_symbols(u, uq, lk, np.int64(self._ubase), self._sparams, self._ss, *out)
            outs.append(tuple(a[:k] for a in out))
            if k < cap:
                break
        cols = outs[0] if len(outs) == 1 else tuple(np.concatenate(c) for c in zip(*outs))
        pos, raw, soft, lock, h1, h2, sq = cols
        return pos, raw, soft, lock.astype(bool), h1, h2, sq

    def _assemble(self, parts: list) -> SymbolBlock:
        if not parts:
            return SymbolBlock()
        pos = np.concatenate([p["pos"] for p in parts]).astype(np.float64)
        soft = np.concatenate([p["soft"] for p in parts]).astype(np.float32)
        locked = np.concatenate([p["locked"] for p in parts]).astype(bool)
        track = [t for p in parts for t in p["track"]]
        return SymbolBlock(soft=soft, position=pos, locked=locked, track=track, symbols=soft.astype(np.complex64))


def _loop_turned(free: tuple, at: np.ndarray, ph: np.ndarray) -> bool:
    """The loop's phase at the block's last recorded sample (``ph`` at the samples ``at``) strays from where the loop
    would have run by more than ``_PHASE_JUMP_TURN``: the loop turned after the carrier (a locked loop's phase follows
    its frequency and Doppler rate, its jitter over a block a few tenths of a radian at most).  ``free`` is the
    loop's ``(phase, total phase, frequency, rate)`` at the block's start (rad, rad/sample, rad/sample^2)."""
    if at.size < 2:
        return False
    _, total, omega, rate = free
    t = float(at[-1])
    return abs(float(ph[-1]) - (total + omega * t + 0.5 * rate * t * t)) > _PHASE_JUMP_TURN


def make_demodulator(*, link: LinkSection, receiver: ReceiverSection, sample_rate_hz: float,
                     carrier_prediction: CarrierPrediction | None = None):
    """The demodulator for a profile's ``[link]`` (``carrier_prediction``: see either demodulator).

    Returns
    -------
    pipeline.demod.Demodulator or ResidualCarrierDemodulator
        The suppressed-carrier :class:`pipeline.demod.Demodulator` for bpsk / qpsk / oqpsk with NRZ-L or
        NRZ-M; :class:`ResidualCarrierDemodulator` for pcm-pm, pcm-psk-pm and bpsk with Bi-phase-L.

    Raises
    ------
    ValueError
        QPSK / OQPSK with Bi-phase-L (not a CCSDS combination, and not supported).

    Examples
    --------
    >>> from pipeline.profile import LinkSection, ReceiverSection
    >>> link = LinkSection(modulation="pcm-psk-pm", symbol_rate_baud=2000.0, subcarrier_hz=16000.0)
    >>> type(make_demodulator(link=link, receiver=ReceiverSection(), sample_rate_hz=200e3)).__name__
    'ResidualCarrierDemodulator'
    """
    if not isinstance(link, LinkSection):
        raise TypeError(f"Argument 'link' must be a LinkSection, not {type(link).__name__}.")
    if link.modulation in ("qpsk", "oqpsk") and link.line_code == "bi-phase-l":
        raise ValueError(f"Argument 'link.line_code' must be nrz-l | nrz-m for {link.modulation}, not 'bi-phase-l'.")
    if link.modulation in ("pcm-pm", "pcm-psk-pm") or link.line_code == "bi-phase-l":
        return ResidualCarrierDemodulator(link=link, receiver=receiver, sample_rate_hz=sample_rate_hz,
                                          carrier_prediction=carrier_prediction)
    return Demodulator(link=link, receiver=receiver, sample_rate_hz=sample_rate_hz,
                       carrier_prediction=carrier_prediction)
