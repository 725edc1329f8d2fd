"""CW tones inside the band (a receiver's spur, an interferer): found in a window's periodogram, taken out of the
samples before the matched filter.

The acquisition already refuses to take a tone for the carrier (``pipeline.demod._acquire``); this takes the tone's
power out of the data: a tone about as strong as the signal inside its band costs a soft-decoded link near its
threshold every codeword.
"""

from __future__ import annotations

import math

import numpy as np
import scipy.fft

from pipeline.demod._acquire import _hann
from pipeline.demod._kernels import cancel_tones

__all__ = ["TONE_LOOK_RISE", "TONE_LOOK_RISE_DB", "TONE_STRETCH", "ToneCanceller", "find_tones", "tone_look_blocks"]

#: Samples per stretch over which a tone's amplitude is measured and taken out (a notch ``fs / 4096`` wide).
TONE_STRETCH = 4096
#: A tone must stand this far over the local level of a window's periodogram (dB): a bin of noise or of a
#: signal's band passes it with probability ``exp(-100 ln 2)``.
TONE_THRESHOLD_DB = 20.0
#: At most this many tones are taken out; a window with more narrow lines than this is a signal with a line
#: spectrum of its own (data that repeats), and none is taken out.
MAX_TONES = 4
#: A receiver looks for new tones about this often (seconds of recording), and in the block after one whose power
#: rose by ``TONE_LOOK_RISE_DB`` or more over the receiver's average (a tone 10 dB under the samples' power adds
#: 0.4 dB): a tone that comes up mid-pass (an interferer switched on) is taken out within a block, or within about
#: ``TONE_LOOK_S`` when it is too weak to show in the power.  One look costs one periodogram of up to 32768 samples
#: (about 0.5 ms), so 0.25 ms of CPU a second of recording whatever the sample rate.
TONE_LOOK_S = 2.0
TONE_LOOK_RISE_DB = 0.25
#: ... as a power ratio.
TONE_LOOK_RISE = 10.0 ** (TONE_LOOK_RISE_DB / 10.0)
_NFFT_MAX = 32768
_FLOOR_BINS = 64  # the local level: the median of each run of this many bins
_EDGE_BINS = 4  # a tone's line has fallen 20 dB this many bins from its peak (Hann: main lobe +-2 bins)


def tone_look_blocks(sample_rate_hz: float, block_samples: int) -> int:
    """Blocks of ``block_samples`` between a receiver's looks for new tones: about ``TONE_LOOK_S`` of recording, at
    least one.

    Examples
    --------
    >>> tone_look_blocks(1e6, 32768), tone_look_blocks(5e6, 32768), tone_look_blocks(8e3, 32768)
    (61, 305, 1)
    """
    return max(1, int(round(TONE_LOOK_S * float(sample_rate_hz) / int(block_samples))))


def find_tones(x: np.ndarray, sample_rate_hz: float, max_tones: int = MAX_TONES) -> np.ndarray:
    """Frequencies (Hz, ascending) of the CW tones in ``x``; empty when there are none or more than ``max_tones``.

    Parameters
    ----------
    x : complex array
        A window of samples (its first ``2^k <= 32768`` are used; at least 1024).
    sample_rate_hz : float
    max_tones : int
        More narrow lines than this are the signal's own (a line spectrum): none is returned.

    Notes
    -----
    The window's mean is removed (a DC offset is the DC blocker's), then one Hann-windowed periodogram of
    ``N`` bins (single precision; at most 32768: a tone 20 dB under white noise's power stands 25 dB over it); the
    local level is the largest of the medians of the 64-bin run a bin lies in and of the runs beside it, and a
    tone is a bin more than :data:`TONE_THRESHOLD_DB` over it that is the largest within 4 bins and whose line
    has fallen 20 dB 4 bins away on both sides (a Hann line's main lobe spans +-2 bins; a signal's band,
    however strong, is wider).  Bins within 4 of 0 Hz are skipped.  The frequency is refined by a parabola
    through the log-power at the peak and its two neighbours (a Gaussian fit: 0.01 to 0.1 of a bin for a Hann
    window, the more the weaker the tone; the cancellation needs a tenth of a stretch's bin, 8 of these).  Cost: one
    FFT of ``N`` points (0.45 ms at 32768).

    Examples
    --------
    >>> import numpy as np
    >>> n = np.arange(32768)
    >>> rng = np.random.default_rng(1)
    >>> x = 0.3 * np.exp(2j * np.pi * 0.1234567 * n) + rng.standard_normal(n.size) + 1j * rng.standard_normal(n.size)
    >>> f = find_tones(x, 1e6)
    >>> f.size, round(float(f[0]), 1)
    (1, 123457.3)
    """
    x = np.asarray(x)
    nfft = 1 << int(math.floor(math.log2(max(min(x.size, _NFFT_MAX), 1))))
    if x.size < 1024:
        return np.zeros(0)
    y = x[:nfft]
    spec = scipy.fft.fft((y - np.complex64(y.mean(dtype=np.complex128))) * _hann(nfft, np.float32), workers=1)
    p = spec.real.astype(np.float64) ** 2 + spec.imag.astype(np.float64) ** 2
    med = np.partition(p.reshape(-1, _FLOOR_BINS), _FLOOR_BINS // 2, axis=1)[:, _FLOOR_BINS // 2]
    level = np.repeat(np.maximum(np.maximum(med, np.roll(med, 1)), np.roll(med, -1)), _FLOOR_BINS)
    thr = 10.0 ** (TONE_THRESHOLD_DB / 10.0)
    cand = np.flatnonzero(p > thr * np.maximum(level, 1e-300))
    found = []
    for k in cand:
        d = min(k, nfft - k)
        if d <= _EDGE_BINS:
            continue  # 0 Hz: the DC blocker's
        near = p[(k + np.arange(-_EDGE_BINS, _EDGE_BINS + 1)) % nfft]
        if p[k] < near.max():
            continue  # not the line's peak
        if near[0] * 100.0 > p[k] or near[-1] * 100.0 > p[k]:
            continue  # not narrow: part of a band
        lm, l0, lp = (math.log(max(p[(k + j) % nfft], 1e-300)) for j in (-1, 0, 1))
        den = lm - 2.0 * l0 + lp
        delta = 0.5 * (lm - lp) / den if den < 0 else 0.0
        f = (k + delta) / nfft
        found.append((f - 1.0 if f >= 0.5 else f) * sample_rate_hz)
    if len(found) > max_tones:
        return np.zeros(0)
    return np.sort(np.array(found, dtype=np.float64))


class ToneCanceller:
    """The tones found so far, taken out of each block (:func:`~pipeline.demod._kernels.cancel_tones`).

    Parameters
    ----------
    sample_rate_hz : float
    stretch : int
        Samples per stretch (:data:`TONE_STRETCH`); a stream's blocks should be multiples of it on the recording's
        grid, so that every stretch but the recording's first and last is whole.

    Attributes
    ----------
    tones_hz : list of float
        The tones taken out, in the order found (at most :data:`MAX_TONES`).
    """

    def __init__(self, sample_rate_hz: float, stretch: int = TONE_STRETCH) -> None:
        self.sample_rate_hz = float(sample_rate_hz)
        self.stretch = int(stretch)
        self.tones_hz: list[float] = []
        self._freqs = np.zeros(0)
        self._amps = np.zeros(0, dtype=np.complex128)

    def add(self, tones_hz: np.ndarray) -> list[int]:
        """Take these tones out from now on; returns the indices of the new ones.

        One within two stretch bins (``2 fs / stretch``) of a known tone is that tone, whose frequency it becomes
        when they differ by more than a fortieth of a bin (a tone that drifts is followed at each look; within a
        stretch a tenth of a bin off costs about 20 dB of the cancellation); no more than :data:`MAX_TONES` in all.
        """
        new = []
        bin_hz = self.sample_rate_hz / self.stretch
        for f in np.asarray(tones_hz, dtype=np.float64):
            near = [k for k, g in enumerate(self.tones_hz) if abs(f - g) < 2.0 * bin_hz]
            if near:
                k = near[0]
                if abs(f - self.tones_hz[k]) > bin_hz / 40.0:
                    self.tones_hz[k] = float(f)
                continue
            if len(self.tones_hz) >= MAX_TONES:
                continue
            self.tones_hz.append(float(f))
            new.append(len(self.tones_hz) - 1)
        self._freqs = np.array(self.tones_hz) / self.sample_rate_hz
        if new:
            self._amps = np.concatenate([self._amps, np.zeros(len(new), dtype=np.complex128)])
        return new

    def look(self, samples: np.ndarray, away_from: tuple = (), guard_hz: float = 0.0) -> list[int]:
        """The tones :func:`find_tones` sees in ``samples`` (the known ones already out of them), but none within
        ``guard_hz`` of a frequency of ``away_from`` (a residual carrier's own lines), taken out from now on
        (:meth:`add`); the indices of the new ones."""
        found = [f for f in find_tones(samples, self.sample_rate_hz) if all(abs(f - g) > guard_hz for g in away_from)]
        return self.add(np.array(found))

    def recorded_hz(self, conjugated: bool) -> list[float]:
        """The tones' frequencies in the recording's own frame (``conjugated``: the samples taken out of are the
        recording's conjugate, a spectrally inverted recording)."""
        return [-f if conjugated else f for f in self.tones_hz]

    def conjugate(self) -> None:
        """The samples are conjugated from now on (a spectrally inverted recording): each tone at minus its
        frequency, its amplitude conjugated."""
        self.tones_hz = [-f for f in self.tones_hz]
        self._freqs = -self._freqs
        self._amps = np.conj(self._amps)

    def apply(self, block: np.ndarray, start: int, only: list[int] | None = None) -> np.ndarray:
        """``block`` (complex64, its first sample at ``start``) with the tones (or those of ``only``) taken out: a
        new array, or ``block`` itself when there is nothing to take out."""
        if not self.tones_hz or (only is not None and not only):
            return block
        out = np.array(block, dtype=np.complex64)
        if only is None:
            cancel_tones(out.view(np.float32), int(start), self._freqs, self.stretch, self._amps)
        else:
            idx = np.asarray(only, dtype=np.int64)
            amps = self._amps[idx]
            cancel_tones(out.view(np.float32), int(start), self._freqs[idx], self.stretch, amps)
            self._amps[idx] = amps
        return out
