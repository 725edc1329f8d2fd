"""Residual-carrier search: a spectral line accumulated over blocks, then refined over the held window."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import scipy.fft
from scipy.special import gammainccinv, gammaincinv

__all__ = ["CarrierFix", "LineDetection", "ResidualCarrierSearch"]

#: Decimated samples per block in the fine stage (the line is within a bin of the coarse estimate, and the
#: decimated band spans this many bins).
_FINE_PER_BLOCK = 64
#: Zero padding of the fine transform.
_FINE_PAD = 8
#: At most this many Doppler-rate hypotheses in the coarse accumulation, and in the fine stage.
_MAX_RATES = 65
_MAX_FINE_RATES = 2049
#: Memory bound of the coarse accumulators (float32 values: rates x bins).
_MAX_ACCUMULATOR_VALUES = 1 << 23
#: Coherent line SNR over the window (power over the noise of one bin) the fine stage must confirm.
_FINE_MIN_SNR = 20.0


@dataclass(frozen=True)
class LineDetection:
    """Outcome of :meth:`ResidualCarrierSearch.detect` for the blocks accumulated so far.

    ``found``: the accumulated line exceeded the threshold for this many blocks; ``frequency_hz``
    the line's frequency in the dwell's first block (bin centre), ``rate_hz_per_s`` its rate
    hypothesis, ``level_db`` the peak's mean excess over the noise floor (dB) and ``threshold_db``
    what ``found`` needed (the same unit), ``blocks`` the number accumulated.
    """

    found: bool
    frequency_hz: float
    rate_hz_per_s: float
    level_db: float
    threshold_db: float
    blocks: int


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

    Notes
    -----
    **Coarse (per block, while searching).**  The block (gain-scaled, its mean removed: a receiver
    DC offset is never taken for the carrier, and a carrier within a bin of 0 Hz goes with it) is
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
    (1974) 591 (single-tone frequency estimation).  Rate hypotheses by shifting: common practice,
    no published source.
    """

    def __init__(self, *, sample_rate_hz: float, block_samples: int, search_hz: float, max_blocks: int,
                 max_rate_hz_per_s: float = 0.0, false_alarm: float = 1e-6) -> None:
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
        searched = (np.abs(freqs) <= self.search_hz) & (np.abs(np.arange(self.bins) - 0.0) > 1) \
            & (np.abs(np.arange(self.bins) - self.bins) > 1)
        self._searched = np.flatnonzero(searched)
        self._outside = np.flatnonzero(~searched)  # zeroed in every periodogram: never a peak
        self._floor_bins = self._searched[::max(1, self._searched.size // 65536)]  # the floor from <= 2^16 bins
        self._freqs = freqs
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
        self.restart()

    # ---- coarse ---------------------------------------------------------------------------
    def restart(self) -> None:
        """Start a new dwell (forget the accumulated periodograms)."""
        self._acc = np.zeros((self.rates_hz_per_s.size, self.bins), dtype=np.float32)
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
        y = y - y.mean(dtype=np.complex128).astype(np.complex64)
        spec = scipy.fft.fft(y * self._window, workers=1)
        p = spec.real * spec.real + spec.imag * spec.imag
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
        i, j = divmod(int(np.argmax(acc)), acc.shape[1])
        if i:
            # a Doppler rate only when it beats the rate-0 accumulator's peak by 3 standard deviations of a
            # sum of k noise bins (sqrt(k) floors): with few blocks the hypotheses differ by noise alone
            j0 = int(np.argmax(acc[0]))
            if float(acc[i, j]) - float(acc[0, j0]) <= 3.0 * math.sqrt(k) * floor:
                i, j = 0, j0
        peak = float(acc[i, j])
        t = self.threshold(k)
        bin_k = j
        f = float(self._freqs[bin_k])
        level = 10.0 * math.log10(max(peak / (k * floor) - 1.0, 1e-12)) if floor > 0 else math.inf
        need = 10.0 * math.log10(max(t / k - 1.0, 1e-12))
        found = floor > 0 and peak > t * floor
        return LineDetection(bool(found), f, float(self.rates_hz_per_s[i]), level, need, k)

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
            y = (x.astype(np.complex128) - x.mean(dtype=np.complex128)) * g * model
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
        """The fine line again with no rate at all when the total rate is within 3 standard errors of 0.

        The rate's standard error is ``sqrt(90 / SNR) / (pi T^2)`` (Cramer-Rao bound of the quadratic phase
        coefficient of a tone over a window ``T``, uniform sampling; Kay, *Fundamentals of Statistical Signal
        Processing*, vol. I, sec. 3.11 for the polynomial-phase form): a rate aiding from noise would drag a
        narrow carrier loop.
        """
        f_res, r_res, c0, snr = fix
        span = z.size * dec / self.sample_rate_hz
        sigma_r = math.sqrt(90.0 / max(snr, 1e-9)) / (math.pi * span * span)
        if abs(r_coarse + r_res) >= 3.0 * sigma_r:
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
