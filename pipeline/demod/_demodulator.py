"""The demodulator stage: complex IQ chunks in, soft channel bits with sample positions out."""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from pipeline.demod._acquire import LINE_THRESHOLD, CarrierSearch, SpectralLine, _next_pow2
from pipeline.demod._filters import gardner_detector_gain, matched_filter_taps, midpoint_energy_ratio
from pipeline.demod._iq import IqBalance, MirrorLine
from pipeline.demod._kernels import (
    BLOCK_SUMMARY,
    TRACK_PARAMS,
    TRACK_STATE,
    block_summary,
    condition_block,
    mean_power_nonzero,
    mirror_sums,
    phasor_table,
    remove_dc,
    track_symbols,
)
from pipeline.demod._predicted import CarrierPrediction
from pipeline.demod._snr import esn0_db_from_moments
from pipeline.demod._tones import TONE_LOOK_RISE, ToneCanceller, tone_look_blocks
from pipeline.profile import TIMING_LOOP_BANDWIDTH_RANGE, LinkSection, ReceiverSection

__all__ = ["Demodulator", "SymbolBlock", "TrackPoint", "DemodStats", "DcBlocker", "centre_window", "check_chunk",
           "check_prediction", "continue_stream", "agc_average", "level_change_at", "level_suspect",
           "mirrored_line", "shifted_line",
           "cut_blocks", "MIN_SAMPLES_PER_SYMBOL", "MAX_SAMPLES_PER_SYMBOL"]

_MOD_CODES = {"bpsk": 0, "qpsk": 1, "oqpsk": 2}
_RRC_SPAN_SYMBOLS = 8
#: QPSK/OQPSK carrier lock: the lowest locked value of the fourth-power statistic taken from its own window, as a
#: fraction of S^2 from the M2M4 moments (rails clipped at their rms read 0.44; track_symbols Notes).
_LOCK_MAGNITUDE_FLOOR = 0.4
_AUTO_CARRIER_BANDWIDTH = 0.002  # x symbol rate; see Demodulator Notes
_ZETA = 1.0 / math.sqrt(2.0)
#: Samples per symbol the suppressed-carrier demodulator serves.  Below 2 the Gardner detector has no
#: midpoint sample; above 64 the matched filter (8 symbols of taps) costs more than 1000 multiply-adds
#: per sample and one block's filter call would pass a tenth of a second: decimate such recordings first.
MIN_SAMPLES_PER_SYMBOL = 2.0
MAX_SAMPLES_PER_SYMBOL = 64.0
#: Symbol-rate offset the timing loop follows (fraction of the nominal rate).
_TIMING_RATE_LIMIT = 0.02
#: Doppler rates the acquisition searches, at most (Hz/s); fewer when the carrier loop cannot follow them.
_MAX_DOPPLER_RATE = 5000.0
#: Band of the line search around the coarse estimate, x symbol rate (the coarse error is about 1 % rms).
_FINE_SEARCH = 0.05
#: Symbols per update of the amplitude, lock and Es/N0 statistics inside the timing loop.
_STAT_SYMBOLS = 64
#: Below this Es/N0 (dB) the locked timing loop's bandwidth is narrowed in proportion to Es/N0 ...
_TIMING_REFERENCE_ESN0_DB = 6.0
#: ... to at most this fraction of ``[receiver] timing_loop_bandwidth``.
_TIMING_MIN_SCALE = 0.125
#: Symbols of carrier lock after which the loop bandwidths follow Es/N0 (pull-in at the full ones).
_GEAR_SYMBOLS = 1024
#: Loop SNR (1 / phase variance) the locked carrier loop keeps by narrowing its bandwidth at low Es/N0.
_CARRIER_LOOP_SNR = 100.0
#: QPSK/OQPSK: symbols a carrier the acquisition found is tracked (loops in their locked form) awaiting lock.
_PULL_SYMBOLS = 131072
#: QPSK/OQPSK: symbols of the long carrier-lock average (weight 1 / this per symbol).
_SLOW_LOCK_SYMBOLS = 65536
#: QPSK/OQPSK: below this Es/N0 (dB, over the long average) the long average holds a lock the short one lost.
_SLOW_LOCK_ESN0_DB = 1.0
#: QPSK/OQPSK: the carrier loop is narrowed to at most this fraction of its configured bandwidth.
_CARRIER_MIN_SCALE = 1.0 / 16.0
#: QPSK/OQPSK: symbols in the window of the long carrier search (run when the short one saw a signal band
#: but no line: the fourth-power line of a weak carrier rises over the noise only in a longer window).
_LONG_SEARCH_SYMBOLS = 131072
#: ... at most this many samples (fewer symbols above 8 samples per symbol).
_LONG_SEARCH_MAX_SAMPLES = 1 << 20
#: ... tried again after this many failed short searches (blocks).
_LONG_SEARCH_EVERY = 8
#: QPSK/OQPSK: below this Es/N0 (dB) the carrier loop takes the soft detector (above it the hard one, whose
#: noise is then as low and which costs less in the timing loop).
_SOFT_BELOW_DB = 2.0
#: Es/N0 grid of the soft Costas detector's slope table: first value, step, end (dB).
_SLOPE_TABLE_DB = (-10.0, 0.25, 40.25)
#: Symbols the first lock after an acquisition (a carrier found, or the loop locking on its own) is on trial:
#: lost within them, the acquisition starts again at once instead of after ``reacquire_symbols`` unlocked (at
#: low Es/N0 the short lock average can hold for a few thousand symbols on a loop still pulling in).
_LOCK_TRIAL = 16384
#: Symbols the carrier stays unlocked, after a lock held past its trial, before the acquisition starts again.
#: What was demodulated unlocked meanwhile is lost; the held window from then on is not.  A carrier that jumps
#: (a transponder switching between coherent and one-way, a receiver retuned) is lost about 2 ms after the
#: step at 240 ksym/s; 65536 symbols (273 ms there, 3.3 s at 20 ksym/s) cost the demo pass 4 frames for a
#: 2 kHz step, 16384 cost it 1 (the frame the step falls in); tests/test_demod_performance.py.  Over a fade the
#: coasting loop relocks on its own when the signal returns, or the search finds it (about 2 ms of CPU per
#: 32768-sample block while nothing is there, the band detector's cost).
_REACQUIRE_SYMBOLS = 16384
#: ... but at once, after this many symbols unlocked, when the block's Es/N0 (M2M4, which needs no carrier) stays
#: within this many dB of the locked blocks': the signal is there, its carrier moved.
_MOVED_SYMBOLS = 2048
_MOVED_ESN0_DB = 3.0
#: The AGC's attack and release: a block whose mean power is over this times the AGC's average, or under it by the
#: same factor, is run again with its samples from the change on scaled to the level before it
#: (:meth:`Demodulator._level_change`), and the average takes the new level, instead of its 0.8 / 0.2 step per
#: block that lags a change.  On the 2 Msym/s QPSK link a 20 dB step up in the samples (signal and noise) handed
#: the loops ten times the amplitude their normalisation expected: the timing error was clipped every symbol,
#: the strobe wandered by 0.4 samples and the two frames after the step failed RS; on a turbo k = 1784 QPSK
#: link at Eb/N0 1.5 dB a 10 dB step down left the soft values a third of their scale while the amplitude
#: estimate followed, the LLRs of the codewords around it mis-scaled, and 13 codewords of 791 failed.  With
#: both none fails.  Within this (6 dB) the loops take a step unharmed (+10 dB measured).  A fade at low Es/N0
#: hardly moves the power (the noise fills the band); a deep one at high Es/N0 raises the gain to the noise's
#: level, and the signal's return is a rise.
_AGC_ATTACK = 4.0
#: A block whose mean power is under this times the AGC's average has its 256-sample stretches looked at for a
#: fall beyond _AGC_ATTACK inside it (its mean falls by the fraction after the fall only).
_AGC_FALL_CHECK = 0.85
#: BPSK's I/Q image (:class:`~pipeline.demod._iq.MirrorLine`): measured on the first ``_IMAGE_SYMBOLS`` symbols of
#: every ``_IMAGE_EVERY``-th block once the carrier was locked over more than ``_IMAGE_SETTLED`` whole blocks in a row
#: (an image 13 dB down is taken out after about 8 such blocks; the measurement costs about 1 % of the demo link's
#: front end).
_IMAGE_SYMBOLS = 512
_IMAGE_EVERY = 4
_IMAGE_SETTLED = 4
#: Sub-intervals of a block whose mean frequencies give a track point's ``carrier_std_hz``.
_FREQ_SUBINTERVALS = 8


@dataclass(frozen=True)
class TrackPoint:
    """Receiver state over one processing block.

    ``carrier_offset_hz`` is the mean carrier frequency over the block's symbols (numerically-
    controlled oscillator plus the loop's phase advance from the first to the last symbol) and
    ``esn0_db`` the M2M4 estimate over the same symbols (``nan`` if not measurable, or when the
    block holds fewer than a quarter of a full block's symbols: the short block at the end of a
    stream); ``position`` is the middle of that interval (the instant a mean refers to);
    ``carrier_locked`` and ``symbol_locked`` are the lock flags at the block's last symbol.
    ``carrier_phase_rad`` is the receiver's total, unwrapped carrier phase at ``position``
    (oscillator plus loop), continuous over the whole run, for precise frequency fits.
    ``carrier_std_hz`` is the standard error of that mean frequency, as the residual-carrier
    receiver's: the mean frequencies of ``K = 8`` equal sub-intervals about a straight line fitted to
    them (a Doppler rate is not spread; ``K - 2 = 6`` degrees of freedom), their residual standard
    deviation over ``sqrt K``; ``nan`` below 64 symbols.  Exact when the loop's frequency error is
    white; when its phase error decorrelates within a sub-interval (a loop bandwidth of more than
    about ``8 / T``), the sub-intervals' frequencies are negatively correlated and it errs on the large
    side, up to ``sqrt K`` (measured 2.4-3.0 times the actual error at 240 ksym/s, 33 ms blocks).
    """

    position: float
    carrier_offset_hz: float
    esn0_db: float
    carrier_locked: bool
    symbol_locked: bool
    carrier_phase_rad: float = float("nan")
    carrier_std_hz: float = float("nan")


def _empty_f64() -> np.ndarray:
    return np.zeros(0, dtype=np.float64)


@dataclass(frozen=True)
class SymbolBlock:
    """Output of :meth:`Demodulator.process` (see DEVELOPERS.md, pipeline.demod).

    ``soft``: float32 per channel bit in transmission order (QPSK/OQPSK: I then Q), positive =
    bit 0, about +-1 when noise-free.  ``position``: float64 sample position of the pulse peak
    carrying each bit (BPSK/QPSK: the modulation symbol's; OQPSK: the strobe of the bit's own
    rail, the Q bit half a symbol after the I bit).  ``locked``: carrier lock per channel bit.
    ``track``: one :class:`TrackPoint` per processing block completed.  ``symbols``: the
    normalised complex symbols (one per modulation symbol; OQPSK: I and its half-symbol-later Q),
    for plots.

    The carrier phase ambiguity (180 degrees BPSK, 90 degrees QPSK/OQPSK) and the mirror image of
    a spectrally inverted recording are left to the synchronizer.  For OQPSK a 90-degree slip
    also exchanges the roles of the I and Q strobes: the interleaved bit stream is then shifted by
    one channel bit (one channel inverted); each bit's position stays its own pulse peak.
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
    """Counters of one run (bad data is counted here, never raised).

    ``strongest_line`` is the strongest spectral line (or signal band) any acquisition saw;
    ``search_hz`` and ``line_threshold_db`` are the demodulator's searched half-band and the level a
    line needs, so that :meth:`no_lock_message` needs nothing else.  ``acquisition_centre_hz`` is set when
    the search was centred on a predicted carrier (a :class:`~pipeline.demod.CarrierPrediction`): the
    prediction at the middle of the first acquisition window (None: centred on 0 Hz, the nominal
    frequency).  ``carrier_found_mirrored`` counts the acquisitions (under ``spectrum_inverted = "auto"``
    with a prediction) that found the carrier only at the mirror image of the prediction: the recording is
    spectrally inverted, as inferred from the predicted Doppler's sign, and its samples were conjugated from
    then on.  ``tones_hz`` are the CW tones found in the band and taken out of the samples before the matched
    filter (:class:`~pipeline.demod._tones.ToneCanceller`); ``iq_image_db`` the level of the front end's I/Q image
    under the signal when it was taken out (QPSK/OQPSK, :class:`~pipeline.demod._iq.IqBalance`; BPSK and a residual
    carrier, :class:`~pipeline.demod._iq.MirrorLine`), else None.  ``carrier_moved`` counts the searches started
    at once because the carrier's frequency jumped: the suppressed-carrier receiver's when the lock went while the
    signal stayed, the residual-carrier receiver's when a strong carrier went within a block and was found again
    elsewhere; ``timing_jumps`` and ``phase_jumps`` the jumps the residual-carrier receiver followed.
    Picklable; segments of one decode combine with :meth:`merge` (not a field-wise sum; the first segment's centre
    is kept).
    """

    samples_in: int = 0
    nonfinite_samples: int = 0
    symbols_out: int = 0
    carrier_locked_symbols: int = 0
    acquisitions: int = 0
    carrier_found: int = 0
    last_peak_ratio: float = 0.0
    strongest_line: SpectralLine | None = None
    search_hz: float = float("nan")
    line_threshold_db: float = float("nan")
    acquisition_centre_hz: float | None = None
    carrier_found_mirrored: int = 0
    tones_hz: list = field(default_factory=list)
    iq_image_db: float | None = None
    timing_jumps: int = 0
    phase_jumps: int = 0
    carrier_moved: int = 0

    def saw(self, line: SpectralLine) -> None:
        """Keep ``line`` if it is stronger than the strongest seen so far (a line beats a band)."""
        old = self.strongest_line
        rank = (line.kind != "band", line.level_db)
        if old is None or rank > (old.kind != "band", old.level_db):
            self.strongest_line = line

    def merge(self, other: DemodStats) -> None:
        """Add another run's (a later segment's) counters; keep the stronger line."""
        for name in ("samples_in", "nonfinite_samples", "symbols_out", "carrier_locked_symbols", "acquisitions",
                     "carrier_found", "carrier_found_mirrored", "timing_jumps", "phase_jumps", "carrier_moved"):
            setattr(self, name, getattr(self, name) + getattr(other, name))
        self.last_peak_ratio = other.last_peak_ratio
        if other.strongest_line is not None:
            self.saw(other.strongest_line)
        if not math.isfinite(self.search_hz):
            self.search_hz, self.line_threshold_db = other.search_hz, other.line_threshold_db
        if self.acquisition_centre_hz is None:
            self.acquisition_centre_hz = other.acquisition_centre_hz
        if other.iq_image_db is not None:
            self.iq_image_db = other.iq_image_db
        # the tones each segment took out (a segment finds its own; the same tone within a few Hz once)
        for f in other.tones_hz:
            if all(abs(f - g) > 1.0 for g in self.tones_hz):
                self.tones_hz.append(f)

    def no_lock_message(self) -> str | None:
        """The one line to print when no carrier lock was found (None when there was lock).

        Examples
        --------
        >>> from pipeline.demod import DemodStats, SpectralLine
        >>> s = DemodStats(samples_in=100000, search_hz=500e3, line_threshold_db=14.4)
        >>> s.saw(SpectralLine(-1234.5, 9.06, "x^2 line"))
        >>> s.no_lock_message()[:64]
        'no carrier lock in +-500000 Hz: strongest x^2 line at -1234.5 Hz'
        >>> s.no_lock_message()[64:]
        ', 9.1 dB above the noise floor (14.4 dB needed)'
        """
        if self.carrier_locked_symbols:
            return None
        text = f"no carrier lock in +-{self.search_hz:.0f} Hz"
        if self.acquisition_centre_hz is not None:
            text += f" of the predicted carrier ({self.acquisition_centre_hz:+.0f} Hz at the first search)"
        line = self.strongest_line
        # tones taken out before the search (a tone without the modulation around it is never the carrier)
        tones = "".join(f"; CW tone at {f:+.0f} Hz taken out (not the link's carrier)" for f in self.tones_hz)
        if line is None:
            return text + ": no acquisition could be tried (recording too short)" + tones
        if line.kind == "band":
            return f"{text}: no signal band stood out of the noise ({line.describe()}){tones}"
        if line.kind == "CW tone":
            return (f"{text}: {line.describe()} (a tone without the modulation around it, not the link's carrier: "
                    f"ignored){tones}")
        return f"{text}: {line.describe()} ({self.line_threshold_db:.1f} dB needed){tones}"


class DcBlocker:
    """Removes a receiver's DC offset (a constant added to the samples) block by block.

    The offset estimate is the mean of each block's non-zero samples (zeros are erasures),
    averaged over blocks with weight ``1/8`` (the first block's mean is taken as it is); the
    block's samples minus the estimate are returned, erasures kept at zero, with the block's mean
    power after removal.  A signal whose carrier lies within about ``fs / (8 N)`` of 0 Hz (``N``
    samples per block: 3.8 Hz at 1 Msample/s and 32768) cannot be told from an offset and is
    attenuated; a modulated carrier's own block mean is about ``1 / sqrt(symbols per block)`` of
    its amplitude.  A receiver that knows its carrier is there sets :attr:`frozen` (the residual-carrier
    receiver: while it searches, with the offset at 0, and while it tracks a carrier within two bins of
    0 Hz).  Cost: two passes over the block.

    Examples
    --------
    >>> import numpy as np
    >>> dc = DcBlocker()
    >>> x = (np.exp(2j * np.pi * 0.01 * np.arange(1000)) + (3 - 1j)).astype(np.complex64)
    >>> y, p = dc.process(x)
    >>> round(abs(complex(dc.offset) - (3 - 1j)), 3), round(p, 2)
    (0.0, 1.0)
    """

    def __init__(self, weight: float = 0.125) -> None:
        self.weight = float(weight)
        #: Hold the estimate as it is (a residual carrier near 0 Hz, which the block means would take for an offset).
        self.frozen = False
        self.reset()

    def reset(self) -> None:
        """Forget the estimate."""
        self.offset = 0j
        self._started = False
        self._moments = np.zeros(3, dtype=np.float64)

    def process(self, block: np.ndarray) -> tuple[np.ndarray, float]:
        """``(block - offset, mean power of the non-zero samples after removal)``; power 0.0 for an all-zero block."""
        cnt = mean_power_nonzero(block, self._moments)
        power = self.update(cnt, self._moments)
        if cnt == 0:
            return block, 0.0
        d = self.offset
        out = np.empty_like(block)
        remove_dc(block, d.real, d.imag, out)
        return out, power

    @property
    def started(self) -> bool:
        """Whether an offset has been estimated (a block with a non-zero sample was taken)."""
        return self._started

    def update(self, count: int, moments: np.ndarray) -> float:
        """Take a block's ``count`` non-zero samples and their ``moments`` (``mean_power_nonzero``: mean re,
        mean im, mean power): update :attr:`offset` (unless :attr:`frozen`), return the block's mean power after
        removal (0.0 if empty).
        """
        if count == 0:
            return 0.0
        mean = complex(moments[0], moments[1])
        if not self.frozen:
            if self._started:
                self.offset += self.weight * (mean - self.offset)
            else:
                self.offset, self._started = mean, True
        return max(self.power_after(moments), 0.0)

    def power_after(self, moments: np.ndarray) -> float:
        """A block's mean power (``moments`` as :meth:`update` takes them) less the current offset: mean
        ``|x - d|^2`` over the non-zero samples ``= mean |x|^2 - 2 Re(conj(d) mean) + |d|^2``."""
        d = self.offset
        return float(moments[2]) - 2.0 * (d.real * float(moments[0]) + d.imag * float(moments[1])) + abs(d) ** 2


def agc_average(agc_power: float, power: float) -> float:
    """The AGC's average after a block of mean ``power`` (> 0): the first block's own, a block over
    ``_AGC_ATTACK`` times the average or under it by as much its own too, else 0.8 of the average and 0.2 of it."""
    if agc_power == 0.0 or power > _AGC_ATTACK * agc_power or _AGC_ATTACK * power < agc_power:
        return power
    return 0.8 * agc_power + 0.2 * power


def level_suspect(power: float, agc_power: float) -> bool:
    """Whether a block of mean ``power`` may hold a level change for :func:`level_change_at` to look for: over
    ``_AGC_ATTACK`` times the average, or under ``_AGC_FALL_CHECK`` of it (a fall inside a block lowers its mean by
    the fraction after it only)."""
    return agc_power > 0.0 and power > 0.0 and (power > _AGC_ATTACK * agc_power or power < _AGC_FALL_CHECK * agc_power)


def level_change_at(dev: np.ndarray, agc_power: float, rise: bool, stretch: int = 256) -> tuple[int, float] | None:
    """Where a block's level crossed ``_AGC_ATTACK`` times the AGC's power (``rise``) or fell under it by as much.

    ``dev`` the block's samples less the DC offset (zeros are erasures: they count in no mean).  Returns the index
    of the first ``stretch``-sample stretch beyond the threshold and the mean power from there on, or None when no
    stretch is beyond it (a rise with none: the whole block, index 0).  Both demodulators' AGC scale the samples
    from that index on by ``sqrt(agc_power / power)`` and then take ``power`` (:data:`_AGC_ATTACK`).
    """
    live = dev != 0
    e = dev.real.astype(np.float64) ** 2 + dev.imag.astype(np.float64) ** 2
    m = dev.size // stretch * stretch
    cnt = live[:m].reshape(-1, stretch).sum(axis=1)
    mean = e[:m].reshape(-1, stretch).sum(axis=1) / np.maximum(cnt, 1)
    beyond = (mean > _AGC_ATTACK * agc_power) if rise else (_AGC_ATTACK * mean < agc_power)
    over = np.flatnonzero(beyond & (cnt > 0))
    if not over.size and not rise:
        return None
    k = int(over[0]) * stretch if over.size else 0
    return k, float(np.sum(e[k:])) / max(int(np.count_nonzero(live[k:])), 1)


@functools.lru_cache(maxsize=1)
def _slope_table() -> np.ndarray:
    """:func:`soft_costas_slope` on the grid :data:`_SLOPE_TABLE_DB`, computed once per process (1 ms; the tracker
    only reads it)."""
    return soft_costas_slope(np.arange(_SLOPE_TABLE_DB[0], _SLOPE_TABLE_DB[2], _SLOPE_TABLE_DB[1]))


def soft_costas_slope(esn0_db: np.ndarray) -> np.ndarray:
    """Slope (per radian, unit symbol amplitude) of the soft QPSK Costas detector at Es/N0 ``esn0_db``.

    The detector ``e = tanh(a I) Q - tanh(a Q) I``, ``a = sqrt(2) x`` (``x = Es/N0``; ``I, Q`` the
    carrier-corrected symbol over its amplitude, rails at ``+-1/sqrt 2`` with noise variance
    ``1 / (2 x)`` each), is ``1 / (sqrt(2) x)`` times the derivative of the non-data-aided
    log-likelihood of the phase, so its slope is ``J / (sqrt(2) x)`` with the Fisher information
    per symbol ``J = 2 x^2 E[e^2]``; with independent rails
    ``E[e^2] = 2 E[tanh^2(a I)] E[I^2] - 2 E[tanh(a I) I]^2``, the expectations over
    ``I ~ N(1/sqrt 2, 1/(2x))`` by 60-point Gauss-Hermite quadrature.  High Es/N0: ``J -> 2 x``
    and the slope -> ``sqrt 2`` (the hard-decision detector's); at -3 dB J = 0.0254.

    Examples
    --------
    >>> import numpy as np
    >>> s = soft_costas_slope(np.array([-3.0, 0.0, 30.0]))
    >>> [round(float(v), 4) for v in s]
    [0.0358, 0.1426, 1.4142]

    References
    ----------
    U. Mengali, A. N. D'Andrea, *Synchronization Techniques for Digital Receivers* (1997), ch. 5
    (maximum-likelihood non-data-aided phase recovery, its low-SNR form and the modified Cramer-Rao bound).
    """
    z, w = np.polynomial.hermite.hermgauss(60)
    x = 10.0 ** (np.asarray(esn0_db, dtype=np.float64)[:, None] / 10.0)
    var = 0.5 / x
    rail = math.sqrt(0.5) + np.sqrt(2.0 * var) * z[None, :]
    t = np.tanh(math.sqrt(2.0) * x * rail)
    wt = w[None, :] / math.sqrt(math.pi)
    t1 = np.sum(wt * t * rail, axis=1)
    t2 = np.sum(wt * t * t, axis=1)
    e2 = 2.0 * t2 * (0.5 + var[:, 0]) - 2.0 * t1 * t1
    fisher = 2.0 * x[:, 0] ** 2 * e2
    return np.ascontiguousarray(fisher / (math.sqrt(2.0) * x[:, 0]))


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


def check_prediction(carrier_prediction: Any) -> None:
    """Raise unless ``carrier_prediction`` is None or a :class:`CarrierPrediction`."""
    if carrier_prediction is not None and not isinstance(carrier_prediction, CarrierPrediction):
        raise TypeError(f"Argument 'carrier_prediction' must be a CarrierPrediction or None, "
                        f"not {type(carrier_prediction).__name__}.")


def centre_window(window: np.ndarray, start: int, prediction: CarrierPrediction | None, sample_rate_hz: float,
                  stats: DemodStats) -> tuple[np.ndarray, float, float]:
    """A search window moved to the prediction: ``(window, prediction at its first sample, at its middle)``.

    Without a prediction the window as it is and zeros.  With one: its mean removed (a DC offset must not
    be moved off 0 Hz, where the search removes it), rotated by :meth:`CarrierPrediction.rotation` from
    ``start``; the first call records the middle's prediction in ``stats.acquisition_centre_hz``.
    """
    if prediction is None:
        return window, 0.0, 0.0
    n = window.size
    first, middle = (float(v) for v in prediction.offset_hz([float(start), start + 0.5 * (n - 1)]))
    if stats.acquisition_centre_hz is None:
        stats.acquisition_centre_hz = round(middle, 3)
    x = window - np.complex64(np.mean(window, dtype=np.complex128))
    return x * prediction.rotation(start, n, sample_rate_hz), first, middle


def shifted_line(line: SpectralLine, hz: float) -> SpectralLine:
    """``line`` moved by ``hz`` (a line found relative to the prediction, back in the recording's frame)."""
    return line if hz == 0.0 else SpectralLine(line.frequency_hz + hz, line.level_db, line.kind)


def mirrored_line(line: SpectralLine, hz: float) -> SpectralLine:
    """A line found relative to the prediction in the conjugated window (the mirrored search), in the
    recording's frame: at ``-(hz + f)``."""
    return SpectralLine(-(line.frequency_hz + hz), line.level_db, line.kind)


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


class SymbolOut:
    """The symbols of one :meth:`Demodulator.process` / :meth:`Demodulator.flush` call, written in place.

    The tracker writes each block's symbols straight into these arrays (views at the fill point), so a
    call's output needs no per-block arrays and no concatenation; ``reserve`` grows them (doubling, a
    copy) on the rare call whose first estimate was short.  ``bits_per_symbol`` 1 (BPSK: the bit
    positions are the symbol positions, one array) or 2.
    """

    def __init__(self, bits_per_symbol: int, capacity: int) -> None:
        self.bits_per_symbol = bits_per_symbol
        self.n = 0
        self.track: list[TrackPoint] = []
        self._allocate(max(int(capacity), 16))

    def _allocate(self, cap: int) -> None:
        bps = self.bits_per_symbol
        self.pos = np.empty(cap, dtype=np.float64)
        self.bitpos = self.pos if bps == 1 else np.empty(bps * cap, dtype=np.float64)
        self.soft = np.empty(bps * cap, dtype=np.float32)
        self.sym = np.empty(cap, dtype=np.complex64)
        self.flags = np.empty(cap, dtype=np.int8)
        self.theta = np.empty(cap, dtype=np.float64)
        self.cap = cap

    def reserve(self, count: int) -> None:
        """Room for ``count`` more symbols after the fill point."""
        if self.n + count <= self.cap:
            return
        old, n, bps = (self.pos, self.bitpos, self.soft, self.sym, self.flags, self.theta), self.n, self.bits_per_symbol
        self._allocate(max(2 * self.cap, n + count))
        self.pos[:n] = old[0][:n]
        if bps != 1:
            self.bitpos[:bps * n] = old[1][:bps * n]
        self.soft[:bps * n] = old[2][:bps * n]
        self.sym[:n] = old[3][:n]
        self.flags[:n] = old[4][:n]
        self.theta[:n] = old[5][:n]

    def block(self) -> SymbolBlock:
        """The symbols written so far as a :class:`SymbolBlock` (views into the arrays)."""
        n, bps = self.n, self.bits_per_symbol
        if n == 0 and not self.track:
            return SymbolBlock()
        locked = (self.flags[:n] & 1).view(bool)
        if bps == 2:
            # each symbol's flag for both its bits: 257 b is the two bytes (b, b) in either byte order (a tenth
            # of np.repeat's time)
            locked = (locked.view(np.uint8).astype(np.uint16) * np.uint16(257)).view(bool)
        return SymbolBlock(soft=self.soft[:bps * n], position=self.bitpos[:bps * n], locked=locked,
                           track=self.track, symbols=self.sym[:n])


class Demodulator:
    """Suppressed-carrier BPSK / QPSK / OQPSK demodulator streaming in chunks.

    Parameters
    ----------
    link : LinkSection
        Modulation, symbol rate, pulse and roll-off.
    receiver : ReceiverSection
        Loop bandwidths, loop order, acquisition range and spectrum inversion.
    sample_rate_hz : float
        Sample rate of the recording: 2 to 64 samples per symbol
        (:data:`MIN_SAMPLES_PER_SYMBOL`, :data:`MAX_SAMPLES_PER_SYMBOL`).
    carrier_prediction : CarrierPrediction or None
        The carrier's predicted offset over the recording (``--tle``/``--oem``): every acquisition searches
        ``+- acquisition_search_hz`` around the prediction at the time of its window instead of around 0 Hz.

    Attributes
    ----------
    acquisition_search_hz : float
        Half-width of the band searched for the carrier (``[receiver] acquisition_range_hz``, or
        ``fs / 2``: everywhere).
    line_threshold_db : float
        Level over the noise floor a spectral line needs to count as a carrier (14.4 dB).

    Notes
    -----
    Samples are processed in blocks of ``block_samples`` aligned to the first sample fed, so
    the output does not depend on how the input is chunked (a partial block waits for the next
    call or for :meth:`flush`).  Per block:

    1. NaN/Inf samples become 0 (erasures; counted).  ``[receiver] spectrum_inverted = true``:
       the samples are conjugated.  The receiver's DC offset is removed (:class:`DcBlocker`), then
       block AGC to unit mean power (zeros excluded): with the offset and power of the blocks
       before (a block's own moments are taken in the same pass and apply from the next block;
       the first block of a stream, held acquisition windows and a block with NaN/Inf take their
       own first; a block whose power rose over :data:`_AGC_ATTACK` times the average, or fell under it by as
       much, is run again with its samples from the change on scaled to the level before it, and the average
       takes the new level).
    2. Rotation by the numerically-controlled oscillator (NCO) at the current carrier estimate
       (a 256-entry phasor table times an exact phasor every 256 samples).
    3. RRC: matched filter over 8 symbols (its truncation leaves the Es/N0 estimate unbiased
       to 25 dB at roll-off 0.5), a blocked FIR of odd length ``2 D + 1`` whose output is
       re-indexed by ``D`` so that MF sample ``n`` is centred on recording sample ``n``.
       Rect: no FIR; the tracker integrates the samples over the exact (fractional) symbol
       window at each strobe, which is the matched filter evaluated where it is needed.
       Steps 1-3 are one kernel pass (:func:`pipeline.demod._kernels.condition_block`).
    4. Gardner timing recovery with a cubic interpolator and a decision-directed Costas loop at
       symbol rate, with loop bandwidths that follow Es/N0 in lock
       (:func:`pipeline.demod._kernels.track_symbols`).  At the block end the loop's frequency
       integrator is moved into the NCO, so the matched filter always sees a nearly centred
       spectrum even under large Doppler drift.
    5. One :class:`TrackPoint` with the measured frequency, its spread and the block's M2M4
       Es/N0 (``nan`` below a quarter of a full block's symbols).

    Acquisition (at the start, when the carrier stayed unlocked for ``reacquire_symbols``, and at once
    when the first lock after an acquisition is lost within ``_LOCK_TRIAL`` symbols):
    windows of ``acquisition_samples`` (two blocks) are held and searched with a
    :class:`~pipeline.demod._acquire.CarrierSearch` over ``+- acquisition_search_hz`` (where the
    signal's band lies, then the ``x^2`` / ``x^4`` line of the matched-filter output under Doppler
    rates up to +-5 kHz/s, fewer when the carrier loop could not follow them).  When a carrier is
    found the held samples are demodulated from the window start with the frequency the search
    gives for that instant, so nothing is lost; when none is found only the window's first block
    is released (demodulated unlocked) and the search is tried again one block later, so a signal
    that starts anywhere in a window is found in the window that begins before it.  The strongest
    line of every search is kept (``stats.strongest_line``, :meth:`no_lock_message`).  QPSK/OQPSK:
    when the band detector saw a signal but no line passed, the released blocks and the held window
    are searched again as one long window (:meth:`CarrierSearch.search_long`: 4, then 8 blocks, then
    ``long_search_blocks`` (about 131072 symbols, at most 2^20 samples: fewer symbols above 8 samples
    per symbol) every 8 blocks; Doppler rates within +-64 grid steps, +-233 Hz/s over 524288 samples),
    which finds a carrier at Es/N0 = -3 dB at 4.17 samples per symbol; its frequency is carried to the
    held window's start with the found rate.  A carrier found (short or long search) below Es/N0 =
    2 dB is then tracked with the loops in their locked form, the carrier loop narrowed from Es/N0 at
    once, for up to 131072 symbols awaiting lock (no reacquisition meanwhile).

    With a ``carrier_prediction`` each searched window (short or long) first has its mean removed (a
    receiver DC offset, which the search removes itself otherwise) and is rotated by the prediction over
    its samples (:meth:`CarrierPrediction.rotation`: its offset and its rate), so the search runs around
    0 Hz and 0 Hz/s of the prediction; the prediction at the held window's first sample is added back to
    the frequency found, and lines seen are reported at the prediction at the window's middle plus their
    offset.  ``stats.acquisition_centre_hz`` records the centre of the first search.  Under
    ``spectrum_inverted = "auto"`` (:attr:`mirror_search`), a window where nothing was found is searched again
    conjugated (at the mirror image of the prediction) when the prediction lies further from 0 Hz than
    ``acquisition_search_hz``; a carrier found there means a spectrally inverted recording, and from then on
    the samples are conjugated as with ``spectrum_inverted = true`` (``stats.carrier_found_mirrored``).

    Carrier loop bandwidth: ``[receiver] carrier_loop_bandwidth_hz``, or automatic
    ``0.002 * symbol_rate`` (480 Hz at 240 ksym/s): at Es/N0 = -1 dB its phase jitter is about
    4 degrees (squaring loss included), and the second-order loop's lag under a 5 kHz/s
    Doppler rate ``2 pi R / wn^2`` is 0.04 rad.  Positions are exact strobe times: a symbol's
    position is the recording sample at which its pulse peaks once the timing loop has locked.
    The timing rate integrator is held within +-2 % of the nominal symbol rate.

    Cost per sample: one complex rotation, ``D + 1`` real multiplies and ``2 D + 1`` adds per I
    and Q, and per symbol two cubic interpolations and the loop updates (about 16 ns a sample at
    4.17 samples per symbol on the development machine, ``python bench/bench_demod.py``); a search
    costs about 4 blocks' demodulation (BPSK, 65536 samples: 2 ms coarse, 6 ms fine).
    """

    def __init__(self, *, link: LinkSection, receiver: ReceiverSection, sample_rate_hz: float,
                 carrier_prediction: CarrierPrediction | None = None) -> None:
        if not isinstance(link, LinkSection):
            raise TypeError(f"Argument 'link' must be a LinkSection, not {type(link).__name__}.")
        if not isinstance(receiver, ReceiverSection):
            raise TypeError(f"Argument 'receiver' must be a ReceiverSection, not {type(receiver).__name__}.")
        if isinstance(sample_rate_hz, bool) or not isinstance(sample_rate_hz, (int, float)):
            raise TypeError(f"Argument 'sample_rate_hz' must be a number, not {type(sample_rate_hz).__name__}.")
        fs = float(sample_rate_hz)
        if not (math.isfinite(fs) and fs > 0):
            raise ValueError(f"Argument 'sample_rate_hz' must be a positive finite number, not {sample_rate_hz!r}.")
        check_prediction(carrier_prediction)
        if link.modulation not in _MOD_CODES:
            raise ValueError(f"Argument 'link.modulation' must be bpsk | qpsk | oqpsk for the Demodulator, "
                             f"not {link.modulation!r}.")
        if link.pulse not in ("rrc", "rect"):
            raise ValueError(f"Argument 'link.pulse' must be rrc | rect, not {link.pulse!r}.")
        if not (link.symbol_rate_baud > 0 and math.isfinite(link.symbol_rate_baud)):
            raise ValueError(f"Argument 'link.symbol_rate_baud' must be > 0, not {link.symbol_rate_baud!r}.")
        sps = fs / link.symbol_rate_baud
        if not MIN_SAMPLES_PER_SYMBOL <= sps <= MAX_SAMPLES_PER_SYMBOL:
            raise ValueError(f"Argument 'sample_rate_hz' must give {MIN_SAMPLES_PER_SYMBOL:g} to "
                             f"{MAX_SAMPLES_PER_SYMBOL:g} samples per symbol for {link.modulation}, not {sps:.4g} "
                             f"({fs:g} Hz for {link.symbol_rate_baud:g} baud).")
        self.link = link
        self.receiver = receiver
        self.sample_rate_hz = fs
        self.carrier_prediction = carrier_prediction
        self.samples_per_symbol = sps
        self.modulation = link.modulation
        self.bits_per_symbol = link.bits_per_symbol
        self._mod_code = _MOD_CODES[link.modulation]
        self._power = 2 if self._mod_code == 0 else 4
        self.conjugate = receiver.spectrum_inverted is True
        # "auto" with a prediction: a carrier not found at the prediction is searched at its mirror image too
        self.mirror_search = receiver.spectrum_inverted == "auto" and carrier_prediction is not None

        self.taps = matched_filter_taps(link.pulse, link.rolloff, sps, _RRC_SPAN_SYMBOLS)
        # rect pulses: the tracker integrates the raw samples over the exact symbol window at each
        # strobe (no FIR, no interpolation error on the triangular matched-filter response)
        self._box_half = 0.5 * sps if link.pulse == "rect" else 0.0
        self.filter_delay_samples = 0 if self._box_half else (self.taps.size - 1) // 2
        self._look = int(self._box_half + 0.5) + 2 if self._box_half else 2
        self.block_samples = max(32768, _next_pow2(4096 * sps))
        self._tone_look_blocks = tone_look_blocks(self.sample_rate_hz, self.block_samples)
        self.acquisition_samples = 2 * self.block_samples
        # QPSK/OQPSK: the long search's window (whole blocks, about _LONG_SEARCH_SYMBOLS) and its period
        # (at most _LONG_SEARCH_MAX_SAMPLES: memory and the matched filter's cost at many samples per symbol)
        self.long_search_blocks = (max(4, min(int(math.ceil(_LONG_SEARCH_SYMBOLS * sps / self.block_samples)),
                                              _LONG_SEARCH_MAX_SAMPLES // self.block_samples))
                                   if self._mod_code != 0 else 0)
        self.reacquire_symbols = _REACQUIRE_SYMBOLS

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
        params = np.zeros(1, dtype=TRACK_PARAMS)
        pr = params[0]
        pr["sps"] = sps
        pr["kp_t"], pr["ki_t"] = 2.0 * _ZETA * wnt, wnt * wnt
        pr["kp_c"], pr["ki_c"], pr["kr_c"], pr["kp_c_wide"] = kp_c, ki_c, kr_c, min(0.2, 4.0 * kp_c2)
        # averages of weight a per symbol, updated every _STAT_SYMBOLS symbol periods with the decay (1 - a)^n
        pr["stat_symbols"] = _STAT_SYMBOLS
        pr["l_amp"] = math.log1p(-1.0 / 1024.0)                        # amplitude (M2M4)
        pr["l_lock_c"] = math.log1p(-1.0 / (2048.0 if qpsk else 256.0))  # carrier lock: r^4 is noisier than r^2
        pr["l_lock_s"] = math.log1p(-1.0 / 1024.0)                     # symbol lock
        pr["dd_gain"] = 1.0
        pr["t_ref_esn0"] = 10.0 ** (_TIMING_REFERENCE_ESN0_DB / 10.0)
        pr["t_min_scale"] = _TIMING_MIN_SCALE
        pr["c_bn"] = bn_c
        pr["c_loop_snr"] = _CARRIER_LOOP_SNR
        pr["gear_symbols"] = _GEAR_SYMBOLS
        # the carrier lock condition must hold this long: 128 symbols (BPSK), 768 (QPSK/OQPSK, whose
        # fourth-power statistic is averaged over 2048 symbols and rose on noise for a few hundred)
        pr["c_hold"] = 384.0 if qpsk else 128.0
        pr["c_on"], pr["c_off"], pr["c_min"] = 0.75, 0.3, 0.15 if qpsk else 0.25
        # QPSK/OQPSK: the fourth-power statistic's locked value is its window's own magnitude where that is below
        # S^2 from M2M4, down to _LOCK_MAGNITUDE_FLOOR of it (clipped rails; track_symbols Notes)
        pr["c_mag"] = _LOCK_MAGNITUDE_FLOOR if qpsk else 1.0
        if qpsk:
            # low Es/N0 (QPSK/OQPSK): a found carrier is tracked for _PULL_SYMBOLS before lock is declared,
            # and lock may come from the long average of the fourth-power statistic
            pr["pull_symbols"] = _PULL_SYMBOLS
            pr["l_lock_slow"] = math.log1p(-1.0 / _SLOW_LOCK_SYMBOLS)
            pr["c_on_slow"], pr["c_min_slow"], pr["c_hold_slow"] = 0.5, 0.03, _SLOW_LOCK_SYMBOLS / 4
            pr["slow_esn0"] = 10.0 ** (_SLOW_LOCK_ESN0_DB / 10.0)
            pr["soft_below"] = 10.0 ** (_SOFT_BELOW_DB / 10.0)
        pr["ct_db0"], pr["ct_step"] = _SLOPE_TABLE_DB[:2]
        self._c_table = _slope_table()
        pr["c_min_scale"] = _CARRIER_MIN_SCALE if qpsk else _TIMING_MIN_SCALE
        pr["s_on"], pr["s_off"], pr["s_min"] = 0.5, 0.25, 0.04
        pr["r0"], pr["kd"] = r0, kd
        pr["warmup"] = 128.0  # warm-up, and symbols in a row meeting the lock condition
        pr["hbox"] = self._box_half  # > 0: exact integrate-and-dump (rect pulses)
        pr["v_max"] = _TIMING_RATE_LIMIT
        # QPSK in lock: symbols in batches with the loops held (track_symbols Notes); BPSK's 2-3 % is worth less
        # than the 2 s track_locked compiles from an empty cache (DEVELOPERS.md)
        pr["batch"] = 1.0 if self._mod_code == 1 else 0.0
        self._params = params
        # A symbol moves the strobe by at least sps (1 - v_max - kp_t) samples (track_symbols Notes); with
        # kp_t = 2.67 B_L T <= 0.134 (the validator's largest timing bandwidth, 0.05) that is more than 0.84 sps.
        lo, hi = TIMING_LOOP_BANDWIDTH_RANGE
        if not lo <= bn_t <= hi:
            raise ValueError(f"Argument 'receiver.timing_loop_bandwidth' must be {lo:g}..{hi:g}, not {bn_t!r}.")
        self._min_symbol_advance = sps * (1.0 - _TIMING_RATE_LIMIT - float(pr["kp_t"]))
        # Es/N0 of a block is measured from a quarter of a full block's symbols up
        self.min_esn0_symbols = max(64, int(self.block_samples / sps) // 4)
        # the matched-filter output buffer: the tail the tracker still needs, then one block
        # (a strobe stops at most 2 look + 1 samples before the end: track_symbols)
        self._mf_head = 2 * self._look + 64
        self._taps_run = np.zeros(0, dtype=np.float32) if self._box_half else self.taps
        if self._taps_run.size and (self._taps_run.size % 2 == 0
                                    or not np.array_equal(self._taps_run, self._taps_run[::-1])):
            raise ValueError("Argument 'link.pulse' gives matched-filter taps that are not symmetric.")  # never

        # acquisition: rates the carrier loop can follow with a lag under 0.2 rad (2 pi R / wn^2)
        wn_rad_s = wn2 * link.symbol_rate_baud
        max_rate = min(_MAX_DOPPLER_RATE, 0.2 * wn_rad_s * wn_rad_s / (2.0 * math.pi))
        rng = receiver.acquisition_range_hz
        self.acquisition_search_hz = 0.5 * fs if rng is None else min(float(rng), 0.5 * fs)
        if link.pulse == "rrc":
            occupied = link.symbol_rate_baud * (1.0 + link.rolloff)
        else:
            occupied = 2.0 * link.symbol_rate_baud  # the main lobe of sinc^2
        self._search = CarrierSearch(sample_rate_hz=fs, power=self._power, prefilter=self.taps, occupied_hz=occupied,
                                     search_hz=self.acquisition_search_hz,
                                     fine_hz=_FINE_SEARCH * link.symbol_rate_baud, max_rate_hz_per_s=max_rate,
                                     symbol_rate_hz=link.symbol_rate_baud)
        self.line_threshold_db = 10.0 * math.log10(LINE_THRESHOLD * math.log(2.0))
        self.reset()

    # ---- state -------------------------------------------------------------------------
    def reset(self) -> None:
        """Forget all state: the next :meth:`process` starts a new stream."""
        self._next_start: int | None = None
        self._stream_start = 0
        self._pending = np.zeros(0, dtype=np.complex64)
        self._pending_start = 0
        self._held: list[np.ndarray] = []
        self._history: list[np.ndarray] = []  # blocks released unfound, for the long search
        self._since_long = 0
        self._long_tried = 0
        self._acquiring = True
        self._tones_looked = False  # the acquisition under way has looked for tones in its window
        self._tones = ToneCanceller(self.sample_rate_hz)
        # a front end's I/Q imbalance is measured and taken out: QPSK/OQPSK are circular (IqBalance); BPSK is not,
        # and its image is measured on its decisions against the carrier's phase (MirrorLine)
        self._iq = IqBalance() if self._mod_code != 0 else None
        self._image = MirrorLine() if self._mod_code == 0 else None
        self._image_blocks = 0  # blocks in a row wholly carrier-locked (BPSK's image is measured after a few)
        self._agc_power = 0.0
        self._tone_look_due = False
        self._dc = DcBlocker()
        self._nco_hz = 0.0
        self._nco_phase = 0.0
        self._nco_phase_unwrapped = 0.0
        self._run_sample = 0
        self._fir_hist2 = np.zeros(2 * max(self._taps_run.size - 1, 0), dtype=np.float32)
        self._table2 = np.zeros(512, dtype=np.float32)
        self._table_dphase = math.nan
        self._mf_buf = np.zeros(self._mf_head + self.block_samples, dtype=np.complex64)
        self._mf_tail_len = 0
        self._mf_tail_base = -self.filter_delay_samples
        self._state = np.zeros(1, dtype=TRACK_STATE)
        self._state[0]["amp"] = 1.0
        self._state[0]["inv_amp"] = 1.0
        self._state[0]["kdc"] = 1.0
        self._state[0]["t_scale"] = 1.0
        self._state[0]["c_scale"] = 1.0
        self._state[0]["c_clip"] = 4.0
        self._state[0]["a_soft"] = math.sqrt(2.0)  # the soft detector's scale at Es/N0 = 0 dB until measured
        self._state[0]["ph_cos"] = 1.0  # the carrier phasor at theta = 0
        self._summary = np.zeros(1, dtype=BLOCK_SUMMARY)
        self._mom4 = np.zeros(4, dtype=np.float64)
        self._mirror8 = np.zeros(8, dtype=np.float64)
        self._unlocked_run = 0
        self._locked_esn0_db = math.nan  # Es/N0 over the blocks that ended locked (an average)
        self._moved_armed = False  # a block ended locked since the search last started because the carrier moved
        self._trial_armed = False  # an acquisition ended: its first lock goes on trial (_LOCK_TRIAL)
        self._on_trial = 0  # symbols left of that lock's trial
        self._finished = False
        self.conjugate = self.receiver.spectrum_inverted is True  # "auto" may turn it on (the mirrored search)
        self.stats = DemodStats(search_hz=self.acquisition_search_hz, line_threshold_db=self.line_threshold_db)

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
            self._state[0]["t"] = float(start)
            self._run_sample = start
        self._next_start = start + samples.size
        self.stats.samples_in += samples.size
        blocks, self._pending = cut_blocks(self._pending, samples, self.block_samples)
        out = self._output(len(blocks) * self.block_samples, len(blocks))
        for k, block in enumerate(blocks):
            self._feed_block(block, self._pending_start + k * self.block_samples, out)
        self._pending_start += len(blocks) * self.block_samples
        return out.block()

    def flush(self) -> SymbolBlock:
        """Demodulate what is left (partial block, held acquisition samples) up to the last sample."""
        if self._finished or self._next_start is None:
            self._finished = True
            return SymbolBlock()
        held = sum(h[0].size for h in self._held)
        out = self._output(self._pending.size + held, len(self._held) + 2)
        end = float(self._next_start)
        if self._pending.size:
            self._feed_block(self._pending, self._pending_start, out, final=True)
            self._pending = np.zeros(0, dtype=np.complex64)
        elif self._acquiring and self._held:
            self._acquire(out, final=True)
        # push the matched filter's delay line out with zeros so the last symbols are produced
        tail = np.zeros(max(self.filter_delay_samples, self._look) + 4, dtype=np.complex64)
        self._run_block(tail, None, out, t_limit=end, tail=True)
        self._finished = True
        return out.block()

    def no_lock_message(self) -> str | None:
        """One line for stderr when no carrier lock was found so far (None when there was lock).

        It names the searched band and the strongest spectral line the acquisitions saw, with its
        level over the noise floor (:meth:`DemodStats.no_lock_message`).
        """
        return self.stats.no_lock_message()

    # ---- internals ---------------------------------------------------------------------
    def _check_chunk(self, chunk: Any) -> tuple[np.ndarray, int]:
        return check_chunk(chunk)

    def _feed_block(self, block: np.ndarray, start: int, out: SymbolOut, final: bool = False) -> None:
        if self.conjugate:
            block = np.conj(block)
        if self._iq is not None:
            self._iq.update(block)
            block = self._iq.apply(block)
            if self._iq.applied:
                self.stats.iq_image_db = self._iq.image_db
        elif self._image is not None:
            block = self._image.apply(block)
            if self._image.applied:
                self.stats.iq_image_db = self._image.image_db
        block = self._tones.apply(block, start)
        # tones are looked for in each acquisition's window, in every block whose index on the recording's block grid
        # is a multiple of _tone_look_blocks (about every TONE_LOOK_S of recording) and in the block after one whose
        # power rose (_take_moments): a tone that comes up later (an interferer switched on) is taken out from there
        if not self._acquiring and (self._tone_look_due or (start // self.block_samples) % self._tone_look_blocks == 0):
            self._tone_look_due = False
            block = self._look_for_tones(block, start)
        if self._acquiring:
            block, cnt, mom = self._moments(block)
            # own copy: the caller's buffer may change
            self._held.append((np.array(block, dtype=np.complex64), cnt, mom))
            if sum(h[0].size for h in self._held) >= self.acquisition_samples or final:
                self._acquire(out, final=final)
            return
        self._run_block(block, None, out)

    def _look_for_tones(self, block: np.ndarray, start: int) -> np.ndarray:
        """CW tones in ``block`` (its first sample at ``start``, the tones known already taken out) taken out from now
        on, this block included (:func:`~pipeline.demod._tones.find_tones`)."""
        new = self._tones.look(block)
        self.stats.tones_hz = self._tones.recorded_hz(self.conjugate)
        return self._tones.apply(block, start, only=new)

    def _held_window(self) -> np.ndarray:
        """The blocks held for the acquisition as one window."""
        return np.concatenate([h[0] for h in self._held]) if len(self._held) > 1 else self._held[0][0]

    def _moments(self, block: np.ndarray) -> tuple[np.ndarray, int, np.ndarray]:
        """The block (NaN/Inf replaced by 0 and counted), its non-zero count and moments (one pass)."""
        mom = np.empty(3, dtype=np.float64)
        cnt = mean_power_nonzero(block, mom)
        if not (math.isfinite(mom[0]) and math.isfinite(mom[1]) and math.isfinite(mom[2])):
            bad = ~np.isfinite(block)
            if bad.any():
                # Chunk readers normally zero these already; count only the ones that reach us
                self.stats.nonfinite_samples += int(bad.sum())
                block = block.copy()
                block[bad] = 0
            cnt = mean_power_nonzero(block, mom)
        return block, cnt, mom

    def _take_moments(self, count: int, moments: np.ndarray) -> None:
        """DC offset and AGC power from a block's moments."""
        p = self._dc.update(count, moments)
        if p > 0.0:
            if self._agc_power > 0.0 and p > self._agc_power * TONE_LOOK_RISE:
                self._tone_look_due = True  # a tone may have come up: looked for in the next block
            self._agc_power = agc_average(self._agc_power, p)

    def _acquire(self, out: SymbolOut, final: bool = False) -> None:
        """Search the held window; release all of it if found (or at the end), else its first block."""
        held = self._held_window()
        self.stats.acquisitions += 1
        if not self._tones_looked:
            # once per acquisition: tones in its window are taken out of it, and of every block after it
            self._tones_looked = True
            new = self._tones.look(held)
            self.stats.tones_hz = self._tones.recorded_hz(self.conjugate)
            if new:
                start, rebuilt = self._run_sample, []  # the held window's first sample is the next one to run
                for b, _, _ in self._held:
                    rebuilt.append(self._moments(self._tones.apply(b, start, only=new)))
                    start += b.size
                self._held = rebuilt
                held = self._held_window()
        found = False
        if held.size >= 1024:
            acq, offset, first, middle, long_nb = self._search_held(held, final)
            if not acq.found and self.mirror_search and not self.conjugate and abs(middle) > self.acquisition_search_hz:
                # "auto" with a prediction: the mirror image of the prediction, when its band does not overlap the
                # upright one (nearer 0 Hz the sign cannot be told); a carrier there is a spectrally inverted
                # recording, demodulated from now on as spectrum_inverted = true does (conjugated samples)
                acq, offset, _, _, _ = self._search_held(held, final, long_nb=long_nb, mirrored=True)
                if acq.found:
                    self._conjugate_held()
            if acq.found:
                found = True
                self._trial_armed = True
                self.stats.carrier_found += 1
                self._nco_hz = offset + first
                self._state[0]["w_int"] = 0.0
                self._state[0]["w_rate"] = 0.0
                st = self._state[0]
                if not st["clock"]:
                    # a new carrier: pulled in with the loops in their locked form, the long lock average afresh
                    st["pull_left"] = int(self._params[0]["pull_symbols"])
                    # narrowest until the next statistics interval sets the bandwidth from Es/N0: at the full
                    # one a few dozen symbols of low-Es/N0 noise would walk the frequency integrator away
                    st["c_scale"] = self._params[0]["c_min_scale"]
                    st["m2g"], st["m4g"], st["wg"], st["cnum_g"], st["cgood_g"] = 0.0, 0.0, 0.0, 0.0, 0
                self._history = []
                self._long_tried = 0
        if found or final:
            blocks, self._held = self._held, []
            self._acquiring = False
        else:
            # slide the window by one block: the oldest is demodulated as it is (no carrier yet)
            blocks, self._held = self._held[:1], self._held[1:]
            if self.long_search_blocks:
                self._history = (self._history + [blocks[0][0]])[-self.long_search_blocks:]
        for b, cnt, mom in blocks:
            self._run_block(b, (cnt, mom), out)
        if self._acquiring and self._state[0]["clock"]:
            # the loop locked on its own meanwhile: no search needed; the blocks released unfound are forgotten
            # as after a find (a later acquisition's long search must not join them to blocks far after them)
            blocks, self._held = self._held, []
            self._acquiring = False
            self._history = []
            self._long_tried = 0
            self._trial_armed = True
            for b, cnt, mom in blocks:
                self._run_block(b, (cnt, mom), out)

    def _search_held(self, held: np.ndarray, final: bool, long_nb: int | None = None, mirrored: bool = False):
        """The short search of the held window, then the long one when due and a band was seen.

        ``mirrored``: the window conjugated, i.e. searched at the mirror image of the prediction (its lines are
        kept in the recording's frame).  ``long_nb``: the long search's length in blocks when already decided
        for this acquisition (0: not due), so the mirrored search runs the long search exactly when the upright
        one did.  Returns ``(result, offset_hz, first, middle, long_nb)``: the offset at the held window's first
        sample relative to the prediction there (``first``), and the prediction at the window's middle.
        """
        # the held window's first sample is the next one to run (the blocks before it have run)
        window, first, middle = centre_window(np.conj(held) if mirrored else held, self._run_sample,
                                              self.carrier_prediction, self.sample_rate_hz, self.stats)
        acq = self._search.search(window)
        if not mirrored:
            self.stats.last_peak_ratio = 10.0 ** (acq.line.level_db / 10.0) / math.log(2.0)
        self.stats.saw((mirrored_line if mirrored else shifted_line)(acq.line, middle))
        offset = acq.offset_hz
        if not acq.found and not final and acq.line.kind != "band":
            if long_nb is None:
                long_nb = self._long_search_due()
            if long_nb:
                acq, offset = self._search_long(long_nb, acq.band_hz, mirrored)
        return acq, offset, first, middle, long_nb

    def _conjugate_held(self) -> None:
        """The carrier was found at the mirrored prediction: from now on the samples are conjugated as with
        ``spectrum_inverted = true`` (the held blocks and their moments, and the DC offset estimate, too)."""
        self.conjugate = True
        self.stats.carrier_found_mirrored += 1
        flip = np.array([1.0, -1.0, 1.0])  # moments [mean re, mean im, mean power] of the conjugate
        self._held = [(np.conj(b), cnt, mom * flip) for b, cnt, mom in self._held]
        self._dc.offset = self._dc.offset.conjugate()
        self._tones.conjugate()
        if self._iq is not None:
            self._iq.conjugate()
        if self._image is not None:
            self._image.conjugate()

    def _long_search_due(self) -> int:
        """The long search's window in blocks when one is due now, else 0 (counted once per acquisition)."""
        self._since_long += 1
        if not self.long_search_blocks:
            return 0
        # the window grows 4, 8, ... blocks up to its full length (a stronger carrier is found sooner), then
        # the full one every _LONG_SEARCH_EVERY blocks
        have = len(self._history) + len(self._held)
        nb = min(self.long_search_blocks, have)
        due = nb == self.long_search_blocks and self._since_long >= _LONG_SEARCH_EVERY
        if not (due or (nb >= 4 and nb & (nb - 1) == 0 and nb > self._long_tried)):
            return 0
        self._since_long = 0
        self._long_tried = nb
        return nb

    def _search_long(self, nb: int, band_hz: float, mirrored: bool = False):
        """The long search over the last ``nb`` blocks (released ones and the held window; ``mirrored``:
        conjugated); ``(result, offset_hz)`` with the frequency at the held window's first sample."""
        past = self._history[len(self._history) + len(self._held) - nb:]
        window = np.concatenate(past + [h[0] for h in self._held])
        lead_samples = sum(b.size for b in past)
        # with a prediction: relative to it over the long window (the caller adds it back at the held start)
        window, _, middle = centre_window(np.conj(window) if mirrored else window, self._run_sample - lead_samples,
                                          self.carrier_prediction, self.sample_rate_hz, self.stats)
        acq = self._search.search_long(window, band_hz)
        self.stats.saw((mirrored_line if mirrored else shifted_line)(acq.line, middle))
        lead = lead_samples / self.sample_rate_hz
        return acq, acq.offset_hz + acq.rate_hz_per_s * lead

    def _run_block(self, block: np.ndarray, moments: tuple | None, out: SymbolOut, t_limit: float = math.inf,
                   tail: bool = False) -> None:
        """Demodulate one block.

        ``moments`` = ``(count, [mean re, mean im, power])`` of its non-zero samples (blocks held for
        acquisition, whose NaN/Inf are already gone): the DC offset and gain take them first.  None: the
        block's own moments come out of :func:`condition_block` and apply from the next block on, the
        offset and gain of the blocks before applying to this one (the first block of a stream takes its
        own, in a pass of its own; a block with NaN/Inf is cleaned and run again with its own).
        ``tail``: the zeros that push the matched filter's delay line out at the end (nothing taken).
        """
        fs = self.sample_rate_hz
        n = block.size
        lagged = moments is None and not tail
        if lagged and not self._dc.started:
            block, cnt, mom = self._moments(block)
            moments, lagged = (cnt, mom), False
        if moments is not None:
            self._take_moments(moments[0], moments[1])
        dc = 0j if tail else self._dc.offset
        gain = 1.0 / math.sqrt(self._agc_power) if self._agc_power > 0.0 else 1.0
        dphase = 2.0 * math.pi * self._nco_hz / fs
        if dphase != self._table_dphase:
            phasor_table(dphase, self._table2)
            self._table_dphase = dphase
        phase_at_block = self._nco_phase_unwrapped
        block_first = self._run_sample
        head, tl = self._mf_head, self._mf_tail_len
        buf = self._mf_buf
        if head + n > buf.size:  # never for a block; kept for any caller
            buf = self._mf_buf = np.concatenate([buf, np.zeros(head + n - buf.size, dtype=np.complex64)])
        hist_before, phase_before = (self._fir_hist2.copy(), self._nco_phase) if lagged else (None, 0.0)
        mom = self._mom4
        self._nco_phase = condition_block(block.view(np.float32), dc.real, dc.imag, gain, self._nco_phase, dphase,
                                          self._table2, self._taps_run, self._fir_hist2,
                                          buf[head:head + n].view(np.float32), mom)
        if lagged:
            if not (math.isfinite(mom[0]) and math.isfinite(mom[1]) and math.isfinite(mom[2])):
                # NaN/Inf in the block: undo, clean, and run it with its own moments
                self._fir_hist2[:] = hist_before
                self._nco_phase = phase_before
                block, cnt, m3 = self._moments(block)
                self._run_block(block, (cnt, m3), out, t_limit)
                return
            p_block = self._dc.power_after(mom) if mom[3] > 0 else 0.0
            change = None
            if level_suspect(p_block, self._agc_power):
                change = self._level_change(block, rise=p_block > self._agc_power)
            if change is not None:
                # the level changed by more than _AGC_ATTACK in power (out of a fade, a gain switched): undo, scale
                # the samples from the change on to the level before it, run the block so, and take the new level
                self._fir_hist2[:] = hist_before
                self._nco_phase = phase_before
                scaled, p_after = change
                self._run_block(scaled, None, out, t_limit)
                self._agc_power = p_after
                return
            self._take_moments(int(mom[3]), mom)
        self._nco_phase_unwrapped += dphase * n
        self._run_sample += n
        mfbuf = buf[head - tl:head + n]
        base = self._mf_tail_base
        st = self._state[0]
        st["blk_n"], st["blk_m2"], st["blk_m4"] = 0, 0.0, 0.0
        first = out.n
        self._track(mfbuf, base, t_limit, out)
        nsym = out.n - first
        pos, flags, theta = out.pos[first:out.n], out.flags[first:out.n], out.theta[first:out.n]
        # keep what the next strobes need (a strobe can stand past the buffer's end: keep nothing then)
        keep_from = min(max(0, int(math.floor(st["t"])) - self._look - base), mfbuf.size)
        kept = mfbuf.size - keep_from
        if kept > head:  # only after the last strobe at flush; nothing follows then
            kept, keep_from = 0, mfbuf.size
        buf[head - kept:head] = mfbuf[keep_from:]
        self._mf_tail_len = kept
        self._mf_tail_base = base + keep_from

        # carrier frequency over the block: NCO plus the loop's phase advance between strobes
        summ = self._summary
        block_summary(pos, theta, flags, _FREQ_SUBINTERVALS, summ)
        sm = summ[0]
        sym_period = self.samples_per_symbol * (1.0 - st["v_int"])
        loop_hz = float(sm["loop_hz_per_fs"]) * fs
        if not math.isfinite(loop_hz):
            loop_hz = st["w_int"] * fs / (2.0 * math.pi * sym_period)
        freq_hz = self._nco_hz + loop_hz
        # hand the loop's frequency integrator to the NCO (the total correction is unchanged)
        self._nco_hz += st["w_int"] * fs / (2.0 * math.pi * sym_period)
        st["w_int"] = 0.0

        locked = int(sm["locked"])
        if self._image is not None and not tail:
            self._image_update(out.sym[first:out.n], pos, theta, phase_at_block, dphase, block_first,
                               nsym > 0 and locked == nsym)
        if nsym:
            # the block's means (frequency, Es/N0) refer to the middle of its symbols' interval;
            # the symbol's matched-filter centre was rotated at about this oscillator phase
            mid = float(sm["mid"])
            total_phase = phase_at_block + dphase * (mid - block_first) + float(sm["theta_mid"])
            esn0_db = self._block_esn0_db(st)
            out.track.append(TrackPoint(mid, float(freq_hz), esn0_db, bool(flags[-1] & 1),
                                    bool(flags[-1] & 2), float(total_phase),
                                    float(sm["spread_per_fs"]) * fs / math.sqrt(_FREQ_SUBINTERVALS)))
            self._unlocked_run = (self._unlocked_run + nsym) if locked == 0 else nsym - 1 - int(sm["last_locked"])
            if flags[-1] & 1 and math.isfinite(esn0_db):
                self._locked_esn0_db = esn0_db if not math.isfinite(self._locked_esn0_db) else \
                    0.8 * self._locked_esn0_db + 0.2 * esn0_db
                self._moved_armed = True
            # the lock lost while the signal stays (M2M4's Es/N0 needs no carrier: it holds through a frequency step,
            # and falls in a fade): the carrier moved (a transponder switched between coherent and one-way, a receiver
            # retuned), and the search starts at once instead of after reacquire_symbols
            # (once a lock: a carrier the search then cannot hold is searched for as before)
            moved = (self._moved_armed and not flags[-1] & 1 and self._unlocked_run >= _MOVED_SYMBOLS
                     and math.isfinite(esn0_db) and esn0_db > self._locked_esn0_db - _MOVED_ESN0_DB)
        else:
            moved = False
        self.stats.symbols_out += nsym
        self.stats.carrier_locked_symbols += locked
        # (not while a found carrier is pulled in at low Es/N0: lock is declared from the long average there)
        if self._trial_armed and locked:
            self._trial_armed = False
            self._on_trial = _LOCK_TRIAL
        if self._on_trial and nsym:
            if flags[-1] & 1:
                self._on_trial = max(0, self._on_trial - nsym)
            else:
                self._on_trial = 0
                if not tail and not self._acquiring:
                    self._unlocked_run = 0
                    self._acquiring = True
                    self._tones_looked = False
        if not tail and (self._unlocked_run >= self.reacquire_symbols or moved) \
                and not (st["pull_left"] and st["soft_on"]):
            if moved and not self._acquiring:
                self.stats.carrier_moved += 1
                self._moved_armed = False
            self._unlocked_run = 0
            self._acquiring = True
            self._tones_looked = False

    def _image_update(self, sym: np.ndarray, pos: np.ndarray, theta: np.ndarray, phase0: float, dphase: float,
                      sample0: int, locked: bool) -> None:
        """BPSK: the block's image sums (its first ``_IMAGE_SYMBOLS`` symbols, :func:`mirror_sums`) into the estimate,
        every ``_IMAGE_EVERY``-th block once the carrier has been locked over ``_IMAGE_SETTLED`` whole blocks, and
        when the carrier turned enough over them for the image to be told from a change of the signal's gain
        (``|mean e^{2 j T}| < 1/2``)."""
        self._image_blocks = self._image_blocks + 1 if locked else 0
        if self._image_blocks <= _IMAGE_SETTLED or self._image_blocks % _IMAGE_EVERY:
            return
        m = min(sym.size, _IMAGE_SYMBOLS)
        s = self._mirror8
        mirror_sums(sym[:m], pos[:m], theta[:m], phase0, dphase, float(sample0), s)
        double = complex(s[4], s[5])
        if abs(double) < 0.5 * m:
            self._image.update(m, complex(s[0], s[1]), complex(s[2], s[3]), double, power=float(s[6]) / m)

    def _level_change(self, block: np.ndarray, rise: bool) -> tuple[np.ndarray, float] | None:
        """A block whose power rose over ``_AGC_ATTACK`` times the AGC's (``rise``) or fell under it by as much: a
        copy with its samples from the first 256-sample stretch beyond that threshold on scaled about the DC
        offset to the AGC's level (erasures stay zero), and their mean power less the offset, which the AGC takes
        (None for a fall with no stretch beyond the threshold; :func:`level_change_at`).  The loops then see one
        level across the change (within the stretch it falls in), and the block stays one block (one track
        point, the chunking unchanged)."""
        agc = self._agc_power
        d = np.complex64(self._dc.offset)
        live = block != 0
        dev = np.where(live, block - d, np.complex64(0))
        found = level_change_at(dev, agc, rise)
        if found is None:
            return None
        k, p_after = found
        scaled = block.copy()
        if p_after > 0.0:
            g = np.float32(math.sqrt(agc / p_after))
            scaled[k:] = np.where(live[k:], d + g * dev[k:], np.complex64(0))
        return scaled, p_after

    def _block_esn0_db(self, st) -> float:
        """Es/N0 (dB) by M2M4 from the block's symbol moments; nan for a block too short to tell."""
        n = int(st["blk_n"])
        if n < self.min_esn0_symbols:
            return float("nan")
        return esn0_db_from_moments(float(st["blk_m2"]) / n, float(st["blk_m4"]) / n)

    def _output(self, samples: int, blocks: int) -> SymbolOut:
        """A :class:`SymbolOut` sized for ``samples`` new samples in ``blocks`` blocks (track_symbols' bound)."""
        per_block = self._mf_head / self._min_symbol_advance + 2
        return SymbolOut(self.bits_per_symbol, int(samples / self._min_symbol_advance + (blocks + 1) * per_block))

    def _track(self, mfbuf: np.ndarray, base: int, t_limit: float, out: SymbolOut) -> None:
        """:func:`track_symbols` over ``mfbuf``, writing at ``out``'s fill point (room from its bound)."""
        # bound (track_symbols Notes): strobes lie within the buffer, one symbol per min_symbol_advance samples
        cap = int(mfbuf.size / self._min_symbol_advance) + 2
        bps = self.bits_per_symbol
        while True:
            out.reserve(cap)
            n = out.n
            nsym = track_symbols(mfbuf, base, t_limit, self._params, self._mod_code,
                                 1 if self.carrier_loop_order == 3 else 0, self._state, self._c_table,
                                 out.pos[n:n + cap], out.bitpos[bps * n:bps * (n + cap)],
                                 out.soft[bps * n:bps * (n + cap)], out.sym[n:n + cap], out.flags[n:n + cap],
                                 out.theta[n:n + cap])
            out.n = n + nsym
            if nsym < cap:
                break
