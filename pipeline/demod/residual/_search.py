"""Residual-carrier search: a spectral line accumulated over blocks, then refined over the held window."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import scipy.fft
from scipy.special import gammainccinv, gammaincinv

from pipeline.demod._acquire import _without_spikes

__all__ = ["CarrierFix", "DataSidebands", "LineDetection", "ResidualCarrierSearch"]

#: Decimated samples per block in the fine stage (the line is within a bin of the coarse estimate, and the
#: decimated band spans this many bins).
_FINE_PER_BLOCK = 64
#: Zero padding of the fine transform.
_FINE_PAD = 8
#: A Doppler rate is taken only this many standard errors from 0 (:meth:`ResidualCarrierSearch.refine`).
_RATE_SIGMAS = 3.0
#: At most this many Doppler-rate hypotheses in the coarse accumulation, and in the fine stage.
_MAX_RATES = 65
_MAX_FINE_RATES = 2049
#: Memory bound of the coarse accumulators (float32 values: rates x bins).
_MAX_ACCUMULATOR_VALUES = 1 << 23
#: Coherent line SNR over the window (power over the noise of one bin) the fine stage must confirm.
_FINE_MIN_SNR = 20.0
#: At most this many lines above the threshold are weighed against each other by their data sidebands.
_MAX_CANDIDATES = 8
#: Data sidebands: seen when their z score reaches this and a tenth of what the line's power predicts; a line
#: is refused for want of them only when they were predicted at least this z (below it they cannot be told).
_SIDEBAND_Z_SEEN, _SIDEBAND_FRACTION, _SIDEBAND_Z_TESTABLE = 4.0, 0.1, 8.0
#: The local level a line must stand above is the spike-free periodogram's mean over this many bins.
_LOCAL_BINS = 81
#: Variance of a smooth weighted sum of Hann periodogram bins over that of independent bins: 1 + 2 (2/3)^2 +
#: 2 (1/6)^2 (the power correlations of adjacent and next bins, |rho|^2 of the Hann-windowed DFT's
#: -2/3 and 1/6; Harris 1978).
_HANN_SUM_VARIANCE = 1.0 + 2.0 * (2.0 / 3.0) ** 2 + 2.0 * (1.0 / 6.0) ** 2


@dataclass(frozen=True)
class DataSidebands:
    """Where a residual-carrier modulation puts its data power around the carrier, and how much of it.

    ``symbol_rate_hz`` the channel symbol rate, ``data_to_carrier`` the data's power over the residual
    carrier's (``tan^2 m`` for NRZ and a square subcarrier, ``2 J1(m)^2 / J0(m)^2`` for a sine subcarrier's
    first-harmonic sidebands), ``biphase`` Bi-phase-L chips, ``subcarrier_hz`` (0: data directly on the
    carrier) and ``subcarrier_wave`` "square" | "sine".
    """

    symbol_rate_hz: float
    data_to_carrier: float
    biphase: bool = False
    subcarrier_hz: float = 0.0
    subcarrier_wave: str = "square"

    def __post_init__(self) -> None:
        if not (self.symbol_rate_hz > 0 and math.isfinite(self.symbol_rate_hz)):
            raise ValueError(f"Argument 'symbol_rate_hz' must be a positive finite number, "
                             f"not {self.symbol_rate_hz!r}.")
        if not (self.data_to_carrier >= 0 and math.isfinite(self.data_to_carrier)):
            raise ValueError(f"Argument 'data_to_carrier' must be >= 0, not {self.data_to_carrier!r}.")
        if not (self.subcarrier_hz >= 0 and math.isfinite(self.subcarrier_hz)):
            raise ValueError(f"Argument 'subcarrier_hz' must be >= 0, not {self.subcarrier_hz!r}.")
        if self.subcarrier_wave not in ("square", "sine"):
            raise ValueError(f"Argument 'subcarrier_wave' must be square | sine, not {self.subcarrier_wave!r}.")

    @property
    def half_width_hz(self) -> float:
        """Half the band the test looks at: the subcarrier plus two (Bi-phase-L three) symbol rates."""
        return self.subcarrier_hz + (3.0 if self.biphase else 2.0) * self.symbol_rate_hz

    def density(self, f_hz: np.ndarray) -> np.ndarray:
        """The data's power spectral density per unit data power (1/Hz) at ``f_hz`` from the carrier.

        NRZ: ``T sinc^2(f T)``; Bi-phase-L: ``T sinc^2(f T / 2) sin^2(pi f T / 2)``; on a subcarrier that shape
        at ``+-f_sc``, halved for a sine, and for a square wave at the odd harmonics ``+-n f_sc`` with weight
        ``(2 / (pi n))^2`` (n <= 7, 95 % of the power).  Each integrates to 1 (the last to 0.95).  On a
        subcarrier coherent with the symbol clock the shifted lobes also interfere; their powers are summed here
        (against Welch's periodogram of such a PCM/PSK/PM signal, 4 subcarrier cycles a symbol: correlation 0.99
        within ``half_width_hz``, tests/test_residual_tones.py).

        Examples
        --------
        >>> s = DataSidebands(symbol_rate_hz=1000.0, data_to_carrier=1.0)
        >>> f = np.arange(-200000.0, 200000.0, 1.0)
        >>> round(float(np.sum(s.density(f))), 2)
        1.0
        """
        f = np.asarray(f_hz, dtype=np.float64)
        t = 1.0 / self.symbol_rate_hz

        def base(v):
            if self.biphase:
                return t * np.sinc(0.5 * v * t) ** 2 * np.sin(0.5 * math.pi * v * t) ** 2
            return t * np.sinc(v * t) ** 2

        if self.subcarrier_hz <= 0:
            return base(f)
        fsc = self.subcarrier_hz
        if self.subcarrier_wave == "sine":
            return 0.5 * (base(f - fsc) + base(f + fsc))
        out = np.zeros_like(f)
        for n in (1, 3, 5, 7):
            out += (2.0 / (math.pi * n)) ** 2 * (base(f - n * fsc) + base(f + n * fsc))
        return out


@dataclass(frozen=True)
class LineDetection:
    """Outcome of :meth:`ResidualCarrierSearch.detect` for the blocks accumulated so far.

    ``found``: the accumulated line exceeded the threshold for this many blocks; ``frequency_hz``
    the line's frequency in the dwell's first block (bin centre), ``rate_hz_per_s`` its rate
    hypothesis, ``level_db`` the peak's mean excess over the noise floor (dB) and ``threshold_db``
    what ``found`` needed (the same unit), ``blocks`` the number accumulated.  ``tone``: lines exceeded
    the threshold but none carried the modulation's data sidebands (``found`` False; the line given is the
    strongest of them, a CW tone); ``sideband_z`` the data sidebands' z score at the line given (``nan``
    when not tested).
    """

    found: bool
    frequency_hz: float
    rate_hz_per_s: float
    level_db: float
    threshold_db: float
    blocks: int
    tone: bool = False
    sideband_z: float = float("nan")


@dataclass(frozen=True)
class CarrierFix:
    """The carrier as the fine stage measured it over the held window.

    ``frequency_hz`` and ``phase_rad`` at ``start`` (an absolute sample index), ``rate_hz_per_s``,
    ``amplitude`` (carrier amplitude per sample in the units of the gain-scaled samples),
    ``noise_variance`` (complex noise variance per sample, same units), ``cn0_hz`` = ``P_c / N0``
    (Hz), ``snr`` (the coherent line's power over the window against the noise, a detection
    statistic), ``first_block`` (index of the first held block that carries the signal).
    """

    frequency_hz: float
    phase_rad: float
    rate_hz_per_s: float
    amplitude: float
    noise_variance: float
    cn0_hz: float
    snr: float
    start: int
    first_block: int


class ResidualCarrierSearch:
    """Find a residual carrier anywhere in the band, at a carrier-to-noise density down to about 20 dB-Hz.

    Parameters
    ----------
    sample_rate_hz : float
    block_samples : int
        The demodulator's processing block (a power of two); one periodogram per block.
    search_hz : float
        The carrier is searched within ``+- search_hz`` (at most ``fs / 2``).
    max_blocks : int
        Blocks accumulated in one dwell (the detector's memory), 1 .. 64.
    max_rate_hz_per_s : float
        Doppler rates within ``+-`` this are hypothesised in the accumulation.
    false_alarm : float
        Probability that one test on noise alone passes (union bound over the searched bins).
    sidebands : DataSidebands or None
        The modulation's data spectrum around the carrier: lines above the threshold are weighed by the data
        sidebands seen around them (see Notes).  None: the strongest line is taken, whatever it is.
    keep_dc : bool
        Keep the blocks' means and search 0 Hz too (a carrier there: a recording tuned to its predicted
        frequency); a receiver DC offset is then a bare line at 0 Hz, which ``sidebands`` refuse as any tone's.
        False: each block's mean is removed (a DC offset is never taken for the carrier, and a carrier within a
        bin of 0 Hz goes with it) and the bins within one of 0 Hz are not searched.

    Notes
    -----
    **Coarse (per block, while searching).**  The block (gain-scaled, its mean removed unless ``keep_dc``) is
    decimated by a power of two ``D`` when the searched band allows it (``search_hz <= fs / 16``:
    sums of ``D <= fs / (4 search_hz)`` samples, which keep white noise white and lose at most 0.9 dB
    of the line at the band edge), Hann-windowed and transformed (``L = block / D`` points, single
    precision; bin ``fs / block``).  Periodograms add up over the blocks of a dwell, one accumulator
    per Doppler-rate hypothesis ``r`` (block ``b``'s periodogram shifted by ``round(r b T_b^2)``
    bins, ``T_b`` the block duration; spacing one bin of drift over the whole dwell, at most 65
    hypotheses and ``2^23`` accumulated values).  After ``K`` blocks a bin's sum of noise alone is
    ``Gamma(K)`` times the floor, estimated as the median of (at most 65536 of) the searched bins over
    the median of ``Gamma(K)``; the line is found when the peak exceeds ``gammainccinv(K, p / M)`` floors (``M``
    searched bins, ``p`` = ``false_alarm``, so every test on noise passes with probability at most
    ``p``).  The per-block line SNR is ``(2/3) P_c T_b / N0`` on a bin centre (Hann), so at 256
    symbols per block and ``P_c / N0 = 0.024 R_s`` (Es/N0 = -8 dB, m = 1.2 rad) the line needs 16
    blocks (1 - 2 % missed).  A dwell ends after ``max_blocks``; the next one starts empty.  Cost
    per block: one FFT of ``L`` points and ``R L`` additions.

    **Data sidebands (with** ``sidebands`` **, when a line is found).**  A residual carrier carries its data's
    spectrum around it; a CW tone in the band (a receiver spur, an interferer) carries none, and may stand far
    above the carrier's line.  The dwell also keeps the rate-0 sum of the whole periodograms (the unsearched
    bins too), whose mean over the ``K`` blocks, in floors, with its narrow lines taken out
    (:func:`pipeline.demod._acquire._without_spikes`), less 1, is ``q``.  Up to 8 lines above the threshold
    times the local level (the mean of ``q + 1`` over 81 bins, at least 1: the data's own periodogram peaks
    do not pass at a high Es/N0; the strongest first, each blanking the bins a rate hypothesis can move it
    by plus 6) are each scored
    ``Z = sum_k w_k q_(c+k) / sqrt(1.94 sum_k w_k^2 / K)``: ``w`` the data's density (:meth:`DataSidebands.density`)
    over ``|f| <= f_sc + 2 R_s`` (``3 R_s`` Bi-phase-L) from the line, the line's own 9 bins left out, made
    zero-mean over that window (a floor's level and slope cancel); on noise alone ``Z`` is about N(0, 1)
    (1.94: the power correlation of neighbouring Hann bins).  The line's power predicts ``Z``: its excess
    ``r`` over 5 bins (floors) gives the data excess ``r (P_d / P_c) bin density(f)`` per bin, hence
    ``Z_exp``.  A line shows its data when ``Z >= max(4, Z_exp / 10)`` (a tenth: a modulation index well
    off the profile's still passes); a line whose ``Z_exp >= 8`` that does not is refused.  Of the lines left,
    the one with the largest ``Z`` among those that show data, else the strongest, is taken; when every
    line is refused nothing is found and the strongest is reported as a tone (``LineDetection.tone``).
    The window must fit in the periodogram's band (``2 (f_sc + 2 R_s) <= fs / D``), else the strongest line
    is taken as without ``sidebands``; the block sums' droop (at most 0.9 dB at the band edge) is not
    corrected.  Cost, only while a line is above the threshold: one running median of 11 over the bins, and
    one weighted sum over the window per line.

    **Fine (once, on the held samples).**  The held blocks are rotated by the coarse line (its rate
    too) and summed over ``block / 64`` samples (64 points per block: the residual offset, within
    a bin, loses nothing); the decimated window is dechirped for fine rate hypotheses (within the
    coarse spacing), transformed with 8-fold zero padding, and the best peak refined by a parabola
    (frequency), then correlated with the line model for amplitude and phase at the window start.
    The noise variance per sample comes from the coarse floor, so ``P_c / N0 = A^2 fs / sigma^2``.
    Blocks before the signal (the fine line's per-block power compared with the window's) are left
    out of the window.  Cost: one complex rotation per held sample, FFTs of ``64 H`` points.

    References
    ----------
    P. D. Welch, IEEE Trans. Audio Electroacoust. 15 (1967) 70 (averaged periodogram); F. J. Harris,
    Proc. IEEE 66 (1978) 51 (Hann window: equivalent noise bandwidth 1.5 bins); threshold from the
    chi-square (Gamma) distribution of a sum of periodogram bins (S. M. Kay, *Fundamentals of
    Statistical Signal Processing*, vol. II, ch. 7); Rife and Boorstyn, IEEE Trans. Inf. Theory 20
    (1974) 591 (single-tone frequency estimation); data spectra of NRZ and Bi-phase-L and a subcarrier's
    harmonics: M. K. Simon, S. M. Hinedi, W. C. Lindsey, *Digital Communication Techniques*, Prentice Hall
    1995, ch. 2 (from memory, not confirmed).  Rate hypotheses by shifting, and the sideband score: common
    practice, no published source.
    """

    def __init__(self, *, sample_rate_hz: float, block_samples: int, search_hz: float, max_blocks: int,
                 max_rate_hz_per_s: float = 0.0, false_alarm: float = 1e-6,
                 sidebands: DataSidebands | None = None, keep_dc: bool = False) -> None:
        fs = float(sample_rate_hz)
        if not (fs > 0 and math.isfinite(fs)):
            raise ValueError(f"Argument 'sample_rate_hz' must be a positive finite number, not {sample_rate_hz!r}.")
        if isinstance(block_samples, bool) or not isinstance(block_samples, int) or block_samples < 1024 \
                or block_samples & (block_samples - 1):
            raise ValueError(f"Argument 'block_samples' must be a power of two >= 1024, not {block_samples!r}.")
        if not (search_hz > 0 and math.isfinite(search_hz)):
            raise ValueError(f"Argument 'search_hz' must be a positive finite number, not {search_hz!r}.")
        if isinstance(max_blocks, bool) or not isinstance(max_blocks, int) or not 1 <= max_blocks <= 64:
            raise ValueError(f"Argument 'max_blocks' must be 1..64, not {max_blocks!r}.")
        if not (max_rate_hz_per_s >= 0 and math.isfinite(max_rate_hz_per_s)):
            raise ValueError(f"Argument 'max_rate_hz_per_s' must be >= 0, not {max_rate_hz_per_s!r}.")
        if not 0 < false_alarm < 1:
            raise ValueError(f"Argument 'false_alarm' must be in (0, 1), not {false_alarm!r}.")
        if sidebands is not None and not isinstance(sidebands, DataSidebands):
            raise TypeError(f"Argument 'sidebands' must be a DataSidebands or None, not {type(sidebands).__name__}.")
        self.sample_rate_hz = fs
        self.block_samples = int(block_samples)
        self.search_hz = min(float(search_hz), 0.5 * fs)
        self.max_blocks = int(max_blocks)
        self.false_alarm = float(false_alarm)
        dec = 1
        if self.search_hz <= fs / 16.0:
            dec = 1 << max(0, int(math.floor(math.log2(fs / (4.0 * self.search_hz)))))
        dec = min(dec, self.block_samples // 1024)
        self.decimation = dec
        self.bins = self.block_samples // dec
        self.bin_hz = fs / self.block_samples
        self.block_s = self.block_samples / fs
        freqs = np.fft.fftfreq(self.bins, d=dec / fs)
        self._freqs = freqs
        self.keep_dc = bool(keep_dc)
        # the searched bins: within search_hz, and, unless keep_dc, not within a bin of 0 Hz (where the blocks'
        # means are taken out)
        near_dc = (np.abs(np.arange(self.bins)) <= 1) | (np.abs(np.arange(self.bins) - self.bins) <= 1)
        searched = (np.abs(freqs) <= self.search_hz) & (self.keep_dc | ~near_dc)
        self._searched = np.flatnonzero(searched)
        self._outside = np.flatnonzero(~searched)  # zeroed in every periodogram: never a peak
        self._floor_bins = self._searched[::max(1, self._searched.size // 65536)]  # the floor from <= 2^16 bins
        self._window = np.hanning(self.bins).astype(np.float32)
        self.window_power = float(np.sum(self._window.astype(np.float64) ** 2))
        # rate hypotheses: one bin of drift over a whole dwell apart
        step = self.bin_hz / (self.max_blocks * self.block_s) if self.max_blocks > 1 else 0.0
        half = int(math.ceil(max_rate_hz_per_s / step)) if step > 0 and max_rate_hz_per_s > 0 else 0
        half = min(half, (_MAX_RATES - 1) // 2, max(0, (_MAX_ACCUMULATOR_VALUES // self.bins - 1) // 2))
        if half and step * half < max_rate_hz_per_s:
            step = max_rate_hz_per_s / half
        # ordered by |r| (0, +s, -s, +2s, ...): a tie goes to the smallest rate (with one block they all tie)
        order = sorted(range(-half, half + 1), key=lambda i: (abs(i), -i))
        self.rates_hz_per_s = np.array(order, dtype=np.float64) * step if half else np.zeros(1)
        self.max_rate_hz_per_s = float(max_rate_hz_per_s)
        self.rate_step_hz_per_s = step if half else 0.0
        self._thresholds: dict[int, float] = {}
        # bins a rate hypothesis moves a line by over a dwell (a line's smear across the accumulators)
        self._max_shift = int(math.ceil(float(np.max(np.abs(self.rates_hz_per_s))) * self.max_blocks * self.block_s
                                        / self.bin_hz))
        self.sidebands = sidebands
        self._sideband_offsets = self._sideband_weights = self._sideband_density = None
        fs_d = fs / dec
        if sidebands is not None and 2.0 * sidebands.half_width_hz <= fs_d:
            off = np.rint(freqs / self.bin_hz).astype(np.int64)  # bin offsets from a line, -bins/2 .. bins/2 - 1
            use = (np.abs(freqs) <= sidebands.half_width_hz) & (np.abs(off) > 4)
            dens = sidebands.density(freqs[use])
            self._sideband_offsets = off[use]
            self._sideband_weights = dens - float(np.mean(dens))
            self._sideband_density = dens * sidebands.data_to_carrier * self.bin_hz
        self.restart()

    # ---- coarse ---------------------------------------------------------------------------
    def restart(self) -> None:
        """Start a new dwell (forget the accumulated periodograms)."""
        self._acc = np.zeros((self.rates_hz_per_s.size, self.bins), dtype=np.float32)
        self._whole = np.zeros(self.bins if self._sideband_offsets is not None else 0, dtype=np.float32)
        self.blocks = 0

    def threshold(self, k: int) -> float:
        """Floors a sum of ``k`` periodograms must exceed in one bin (``gammainccinv(k, p / M)``)."""
        t = self._thresholds.get(k)
        if t is None:
            t = float(gammainccinv(k, self.false_alarm / max(1, self._searched.size * self.rates_hz_per_s.size)))
            self._thresholds[k] = t
        return t

    def add(self, block: np.ndarray, gain: float) -> None:
        """Accumulate one full block (complex, ``block_samples`` long) scaled by ``gain``."""
        x = np.asarray(block)
        if x.shape != (self.block_samples,):
            raise ValueError(f"Argument 'block' must hold {self.block_samples} samples, not {x.shape}.")
        if self.blocks >= self.max_blocks:
            self.restart()
        y = x.astype(np.complex64) * np.float32(gain)
        if self.decimation > 1:
            y = y.reshape(self.bins, self.decimation).sum(axis=1, dtype=np.complex64)
        if not self.keep_dc:
            y = y - y.mean(dtype=np.complex128).astype(np.complex64)
        spec = scipy.fft.fft(y * self._window, workers=1)
        p = spec.real * spec.real + spec.imag * spec.imag
        if self._whole.size:
            self._whole += p  # the whole band: the data sidebands reach past the searched one
        p[self._outside] = 0.0
        b = self.blocks
        for i, r in enumerate(self.rates_hz_per_s):
            shift = int(round(r * b * self.block_s / self.bin_hz))  # the line's drift since the first block, bins
            self._acc[i] += np.roll(p, -shift) if shift else p
        self.blocks += 1

    def floor(self) -> float:
        """Mean noise floor of one accumulated bin per block (median of the searched bins over Gamma's median)."""
        k = max(self.blocks, 1)
        med = float(np.median(self._acc[0, self._floor_bins]))  # the rate-0 accumulator
        return med / float(gammaincinv(k, 0.5))

    def detect(self) -> LineDetection:
        """Test the dwell's accumulated periodograms (see the class Notes)."""
        k = self.blocks
        if k == 0:
            return LineDetection(False, float("nan"), 0.0, -math.inf, math.inf, 0)
        acc = self._acc  # bins outside the searched band hold 0
        floor = self.floor()
        t = self.threshold(k)
        need = 10.0 * math.log10(max(t / k - 1.0, 1e-12))
        i, j = self._line_at(int(np.argmax(acc)) % acc.shape[1], floor, global_peak=True)
        found = floor > 0 and float(acc[i, j]) > t * floor
        if not found or self._sideband_offsets is None:
            return self._detection(bool(found), i, j, floor, need)
        return self._weighed(floor, t, need)

    def _line_at(self, j: int, floor: float, global_peak: bool = False) -> tuple[int, int]:
        """Rate hypothesis and bin of the line peaking at bin ``j`` of the accumulators' maximum over rates.

        A Doppler rate only when it beats the rate-0 accumulator's peak (over all bins when ``global_peak``,
        else within the bins the rates move a line by) by 3 standard deviations of a sum of ``k`` noise bins
        (``sqrt(k)`` floors): with few blocks the hypotheses differ by noise alone.
        """
        acc = self._acc
        k = max(self.blocks, 1)
        i = int(np.argmax(acc[:, j]))
        if i:
            if global_peak:
                j0 = int(np.argmax(acc[0]))
            else:
                near = (j + np.arange(-self._max_shift - 2, self._max_shift + 3)) % self.bins
                j0 = int(near[np.argmax(acc[0, near])])
            if float(acc[i, j]) - float(acc[0, j0]) <= 3.0 * math.sqrt(k) * floor:
                i, j = 0, j0
        return i, j

    def _detection(self, found: bool, i: int, j: int, floor: float, need: float, tone: bool = False,
                   z: float = float("nan")) -> LineDetection:
        k = self.blocks
        peak = float(self._acc[i, j])
        level = 10.0 * math.log10(max(peak / (k * floor) - 1.0, 1e-12)) if floor > 0 else math.inf
        return LineDetection(found, float(self._freqs[j]), float(self.rates_hz_per_s[i]), level, need, k, tone,
                             float(z))

    def _candidates(self, level: np.ndarray) -> list[int]:
        """Bins of up to 8 lines above ``level`` (per bin) in the accumulators' maximum over rates, the strongest
        first."""
        m = self._acc.max(axis=0)
        out: list[int] = []
        blank = np.arange(-self._max_shift - 6, self._max_shift + 7)
        above = m > level
        while len(out) < _MAX_CANDIDATES and above.any():
            j = int(np.argmax(np.where(above, m, 0.0)))
            out.append(j)
            above[(j + blank) % self.bins] = False
        return out

    def _weighed(self, floor: float, t: float, need: float) -> LineDetection:
        """The line whose data sidebands are seen (the class Notes), or a tone, or nothing."""
        k = self.blocks
        q_raw = self._whole.astype(np.float64) / (k * floor) - 1.0
        q = _without_spikes(q_raw + 1.0) - 1.0
        # a line stands above the local level (the data's own periodogram peaks do not, at a high Es/N0): the
        # spike-free periodogram's mean over 81 bins, in floors
        cands = self._candidates(t * floor * np.maximum(_moving_mean(q + 1.0, _LOCAL_BINS), 1.0))
        if not cands:
            i, j = self._line_at(int(np.argmax(self._acc)) % self.bins, floor, global_peak=True)
            return self._detection(False, i, j, floor, need)
        w, dens, offs = self._sideband_weights, self._sideband_density, self._sideband_offsets
        sigma = math.sqrt(_HANN_SUM_VARIANCE * float(np.dot(w, w)) / k)
        scored = []
        for j in cands:
            i, jj = self._line_at(j, floor)
            r = max(float(np.sum(q_raw[(jj + np.arange(-2, 3)) % self.bins] - q[(jj + np.arange(-2, 3)) % self.bins])),
                    0.0)
            z = float(np.dot(w, q[(jj + offs) % self.bins])) / sigma
            z_exp = r * float(np.dot(w, dens)) / sigma
            seen = z >= max(_SIDEBAND_Z_SEEN, _SIDEBAND_FRACTION * z_exp)
            scored.append((i, jj, z, seen, seen or z_exp < _SIDEBAND_Z_TESTABLE))
        kept = [c for c in scored if c[4]]
        if not kept:
            i, j, z, _, _ = scored[0]
            return self._detection(False, i, j, floor, need, tone=True, z=z)
        shown = [c for c in kept if c[3]]
        i, j, z, _, _ = max(shown, key=lambda c: c[2]) if shown else kept[0]
        return self._detection(True, i, j, floor, need, z=z)

    # ---- fine -----------------------------------------------------------------------------
    def refine(self, blocks: list[np.ndarray], gains: list[float], starts: list[int], detection: LineDetection,
               dwell_start: int) -> CarrierFix | None:
        """Fine frequency, rate, phase and amplitude over the held blocks (None if the line does not hold).

        ``blocks`` are the held blocks in stream order (the last ``len(blocks)`` of the dwell), with their
        gains and absolute start samples; ``dwell_start`` is the first sample of the dwell's first block.
        A short last block (the end of a stream) is left out of the estimate.
        """
        fs = self.sample_rate_hz
        n_blk = self.block_samples
        nb = len(blocks)
        while nb and blocks[nb - 1].shape[0] != n_blk:
            nb -= 1
        if nb == 0:
            return None
        blocks, gains, starts = blocks[:nb], gains[:nb], starts[:nb]
        dec = n_blk // _FINE_PER_BLOCK
        f_c, r_c = detection.frequency_hz, detection.rate_hz_per_s
        # the coarse model's phase (cycles) at absolute sample t: f_c at the dwell's first block centre
        t_ref = dwell_start + 0.5 * n_blk
        z = np.empty(nb * _FINE_PER_BLOCK, dtype=np.complex128)
        times = np.empty(nb * _FINE_PER_BLOCK, dtype=np.float64)  # decimated sample centres, s from the first
        t_first = starts[0]
        for b, (x, g, s0) in enumerate(zip(blocks, gains, starts)):
            n = np.arange(n_blk, dtype=np.float64) + (s0 - t_ref)
            tt = n / fs
            model = np.exp(-2j * np.pi * (f_c * tt + 0.5 * r_c * tt * tt))
            y = (x.astype(np.complex128) - (0.0 if self.keep_dc else x.mean(dtype=np.complex128))) * g * model
            z[b * _FINE_PER_BLOCK:(b + 1) * _FINE_PER_BLOCK] = y.reshape(_FINE_PER_BLOCK, dec).sum(axis=1)
            times[b * _FINE_PER_BLOCK:(b + 1) * _FINE_PER_BLOCK] = \
                (s0 - t_first + dec * np.arange(_FINE_PER_BLOCK) + 0.5 * (dec - 1)) / fs
        # noise per full-rate sample from the coarse floor (Hann-windowed sums of D samples)
        sigma2 = self.floor() / (self.window_power * self.decimation)
        if not sigma2 > 0:
            return None
        fix = self._fine_line(z, times, dec, sigma2, r_c)
        if fix is None:
            return None
        f_res, r_res, c0, snr = self._without_insignificant_rate(z, times, dec, sigma2, r_c, fix)
        # per-block power of the fine line: leave out the blocks before the signal
        tc = times - 0.5 * (times[0] + times[-1])
        rot = z * np.exp(-2j * np.pi * (f_res * tc + 0.5 * r_res * tc * tc))
        per_block = np.abs(rot.reshape(nb, _FINE_PER_BLOCK).sum(axis=1)) ** 2 / (n_blk * sigma2)
        first = _signal_start(per_block)
        if first:
            keep = slice(first * _FINE_PER_BLOCK, None)
            zk, tk = z[keep], times[keep] - times[keep][0] + 0.5 * (dec - 1) / fs
            fix = self._fine_line(zk, tk, dec, sigma2, r_c)
            if fix is None:
                return None
            f_res, r_res, c0, snr = self._without_insignificant_rate(zk, tk, dec, sigma2, r_c, fix)
            t_first = starts[first]
        # the model at the window start: phase of the coarse model plus the residual line
        t0 = (t_first - t_ref) / fs
        tc0 = -(0.5 * (nb - first) * n_blk - 0.5) / fs  # the window's first sample from the residual line's centre
        amp = abs(c0) / dec
        phase = (math.atan2(c0.imag, c0.real) + 2.0 * math.pi * (f_res * tc0 + 0.5 * r_res * tc0 * tc0)
                 + 2.0 * math.pi * (f_c * t0 + 0.5 * r_c * t0 * t0))
        rate = r_c + r_res
        freq = f_c + r_c * t0 + f_res + r_res * tc0
        phase = (phase + math.pi) % (2.0 * math.pi) - math.pi
        return CarrierFix(frequency_hz=float(freq), phase_rad=float(phase), rate_hz_per_s=float(rate),
                          amplitude=float(amp), noise_variance=float(sigma2), cn0_hz=float(amp * amp * fs / sigma2),
                          snr=float(snr), start=int(t_first), first_block=int(first))

    def _without_insignificant_rate(self, z, times, dec, sigma2, r_coarse, fix):
        """The fine line again with no rate at all when the total rate is within ``_RATE_SIGMAS`` standard errors
        of 0: a rate aiding from noise would drag a narrow carrier loop.

        The standard error is the fine search's own: it takes the peak of the Hann-windowed, dechirped window,
        which weighs the samples as a weighted least-squares fit of the line's phase (constant, frequency and rate)
        with the window's weights, and the window's edges, which tell the rate most, weigh least.  Its variance is
        the sandwich ``(X'WX)^-1 X'W^2X (X'WX)^-1`` times the phase noise ``dec sigma^2 / (2 |c|^2)`` per decimated
        sample (Kay, *Fundamentals of Statistical Signal Processing*, vol. I, sec. 3.11 for the polynomial phase,
        ch. 8 for weighted least squares; from memory): 3.1 times the Cramer-Rao bound of a uniformly weighted fit
        in variance, which alone let a rate of noise through in about 1 acquisition in 10 (a tone in white noise at
        an SNR of 70 to 300 over the window; measured 1.7 to 2.1 times the bound's deviation).  The noise is the
        line's *and* the data's own spectrum at the carrier (``sidebands``; NRZ PCM/PM puts its data's density peak
        there: at Es/N0 = 10 dB, m = 1.2 rad and 64 samples a symbol ten times the noise's).
        """
        f_res, r_res, c0, snr = fix
        noise = sigma2
        sb = self.sidebands
        if sb is not None and sb.data_to_carrier > 0:
            # the data's power per full-rate sample in the line's neighbourhood: P_d x density(0) x fs
            amp = abs(c0) / dec
            noise = sigma2 + amp * amp * sb.data_to_carrier * float(sb.density(np.zeros(1))[0]) * self.sample_rate_hz
        tc = times - 0.5 * (times[0] + times[-1])
        x = np.stack([np.ones_like(tc), 2.0 * np.pi * tc, np.pi * tc * tc], axis=1)
        w = np.hanning(tc.size)
        a = np.linalg.pinv(x.T @ (w[:, None] * x))
        v = a @ (x.T @ ((w * w)[:, None] * x)) @ a
        sigma_r = math.sqrt(max(float(v[2, 2]), 0.0) * dec * noise / (2.0 * max(abs(c0) ** 2, 1e-300)))
        if abs(r_coarse + r_res) >= _RATE_SIGMAS * sigma_r:
            return fix
        again = self._fine_line(z, times, dec, sigma2, r_coarse, rates=np.array([-r_coarse]))
        return fix if again is None else again

    def _fine_line(self, z: np.ndarray, times: np.ndarray, dec: int, sigma2: float, r_coarse: float,
                   rates: np.ndarray | None = None) -> tuple[float, float, complex, float] | None:
        """Residual line of the decimated window: (frequency, rate, amplitude at the centre, SNR) or None."""
        fs = self.sample_rate_hz
        n = z.size
        span = n * dec / fs
        tc = times - 0.5 * (times[0] + times[-1])
        if rates is None:
            # fine rates pi r (T/2)^2 <= pi / 4 apart (1 / T^2) over the whole searched range (the coarse
            # accumulation tells rates apart only over many blocks), at most _MAX_FINE_RATES
            step = 1.0 / (span * span)
            half = min(int(math.ceil(self.max_rate_hz_per_s / step)), (_MAX_FINE_RATES - 1) // 2)
            if half and half * step < self.max_rate_hz_per_s:
                step = self.max_rate_hz_per_s / half
            rates = np.arange(-half, half + 1) * step - r_coarse  # total rates around 0
        nfft = _FINE_PAD * (1 << int(math.ceil(math.log2(n))))
        fd = fs / dec
        freqs = np.fft.fftfreq(nfft, d=1.0 / fd)
        band = np.flatnonzero(np.abs(freqs) <= 2.0 * self.bin_hz + 0.5 * self.rate_step_hz_per_s * span)
        win = np.hanning(n)
        peaks = np.empty(rates.size)
        zw = z * win
        tt = tc * tc
        for a in range(0, rates.size, 64):  # 64 hypotheses per transform call
            r = rates[a:a + 64]
            spec = np.fft.fft(zw[None, :] * np.exp(-1j * np.pi * r[:, None] * tt[None, :]), nfft, axis=1)
            pw = spec.real[:, band] ** 2 + spec.imag[:, band] ** 2
            peaks[a:a + r.size] = pw.max(axis=1)
        best = float(peaks.max())
        tied = np.flatnonzero(peaks >= best)
        pick = int(tied[np.argmin(np.abs(rates[tied] + r_coarse))])  # a tie goes to the smallest total rate
        order = np.argsort(rates)
        rates, peaks = rates[order], peaks[order]
        i = int(np.flatnonzero(order == pick)[0])
        r_res = float(rates[i])
        if 0 < i < rates.size - 1:
            # the rate between the grid points: a parabola through the three peak powers (log)
            la, lb, lc = (math.log(max(v, 1e-300)) for v in peaks[i - 1:i + 2])
            den = la - 2.0 * lb + lc
            if den < 0:
                r_res += 0.5 * (la - lc) / den * float(rates[i + 1] - rates[i])
        y = z * win * (np.exp(-1j * np.pi * r_res * tc * tc) if r_res else 1.0)
        spec = np.fft.fft(y, nfft)
        pw = spec.real ** 2 + spec.imag ** 2
        k = int(band[np.argmax(pw[band])])
        lo, mid, hi = pw[(k - 1) % nfft], pw[k], pw[(k + 1) % nfft]
        delta = 0.0
        if lo > 0 and mid > 0 and hi > 0:
            la, lb, lc = math.log(lo), math.log(mid), math.log(hi)
            den = la - 2.0 * lb + lc
            if den < 0:
                delta = 0.5 * (la - lc) / den
        f_res = (k + delta) * fd / nfft
        if f_res >= 0.5 * fd:
            f_res -= fd
        c0 = complex(np.mean(z * np.exp(-2j * np.pi * (f_res * tc + 0.5 * r_res * tc * tc))))
        # |sum|^2 over the noise of the sum of n * dec samples
        snr = abs(c0 * n) ** 2 / (n * dec * sigma2)
        if snr < _FINE_MIN_SNR:
            return None
        return f_res, r_res, c0, snr


def _moving_mean(x: np.ndarray, width: int) -> np.ndarray:
    """Circular moving mean of ``x`` over ``width`` (odd) bins centred on each (prefix sums)."""
    half = width // 2
    if x.size < width:
        return np.full(x.size, float(np.mean(x)))
    c = np.concatenate([[0.0], np.cumsum(np.concatenate([x[-half:], x, x[:half]]))])
    return (c[width:] - c[:-width]) / width


def _signal_start(per_block: np.ndarray) -> int:
    """First block of the signal from per-block line power over noise (about 1 + SNR with signal, 1 without).

    The start maximises ``sum_{b >= j} (p_b - theta)`` with ``theta = 1 + s / 2`` and ``s`` the
    line's SNR per block in the window's second half (the signal is there: it was just found).
    """
    nb = per_block.size
    if nb < 2:
        return 0
    s = max(0.0, float(np.mean(per_block[nb // 2:])) - 1.0)
    theta = 1.0 + 0.5 * s
    gain = np.cumsum((per_block - theta)[::-1])[::-1]  # gain[j] = sum_{b >= j}
    return int(np.argmax(gain))
