"""Coarse carrier acquisition: FFT of the squared (BPSK) or fourth-power (QPSK) signal."""

from __future__ import annotations

import math

import numpy as np

__all__ = ["CarrierEstimate", "estimate_carrier_offset", "spectral_line"]

from dataclasses import dataclass


@dataclass(frozen=True)
class CarrierEstimate:
    """Result of :func:`estimate_carrier_offset`.

    ``offset_hz`` is the carrier offset; ``peak_ratio`` the spectral line over the median bin of
    the searched band (a detection statistic); ``found`` whether it exceeded the threshold.
    """

    offset_hz: float
    peak_ratio: float
    found: bool


def estimate_carrier_offset(samples: np.ndarray, *, sample_rate_hz: float, power: int, search_hz: float,
                            prefilter: np.ndarray | None = None, threshold: float = 40.0) -> CarrierEstimate:
    """Estimate a suppressed carrier's frequency offset from the spectral line of ``x^power``.

    Parameters
    ----------
    samples : complex ndarray
        Baseband samples (any scale).
    sample_rate_hz : float
        Sample rate.
    power : {2, 4}
        2 removes BPSK modulation, 4 removes QPSK / OQPSK modulation.
    search_hz : float
        The carrier is searched in ``+- search_hz``.
    prefilter : ndarray, optional
        Real FIR applied first (the matched filter), which raises the line-to-noise ratio.
    threshold : float
        Detection threshold on ``peak / median`` of the searched bins.

    Returns
    -------
    CarrierEstimate

    Notes
    -----
    ``y = (x - mean x)^power`` under a Hann window, zero-padded FFT of twice the length, peak
    bin in ``+- power * search_hz``, refined by a parabola through the log-power of the peak and
    its two neighbours, divided by ``power``.  A square-law (``M``-th power) nonlinearity turns
    M-PSK into a line at ``M`` times the offset.  Cost O(n log n).

    References
    ----------
    F. M. Gardner, *Phaselock Techniques*, 3rd ed., ch. 11 (squaring and Costas loops);
    U. Mengali, A. N. D'Andrea, *Synchronization Techniques for Digital Receivers*, ch. 3.
    """
    if power not in (2, 4):
        raise ValueError(f"Argument 'power' must be 2 or 4, not {power!r}.")
    if not (sample_rate_hz > 0 and math.isfinite(sample_rate_hz)):
        raise ValueError(f"Argument 'sample_rate_hz' must be a positive finite number, not {sample_rate_hz!r}.")
    if not search_hz > 0:
        raise ValueError(f"Argument 'search_hz' must be > 0, not {search_hz!r}.")
    x = np.asarray(samples, dtype=np.complex128)
    if x.ndim != 1 or x.size < 64:
        raise ValueError(f"Argument 'samples' must be one-dimensional with at least 64 samples, not shape {x.shape}.")
    if prefilter is not None:
        x = np.convolve(x, np.asarray(prefilter, dtype=np.float64), mode="same")
    x = x - x.mean()  # a receiver DC spike would otherwise square into a false line at 0 Hz
    rms = math.sqrt(float(np.mean(np.abs(x) ** 2)))
    if rms == 0.0:
        return CarrierEstimate(0.0, 0.0, False)
    y = (x / rms) ** power
    f_line, ratio = spectral_line(y, sample_rate_hz=sample_rate_hz, search_hz=power * search_hz)
    return CarrierEstimate(f_line / power, ratio, ratio >= threshold)


def spectral_line(y: np.ndarray, *, sample_rate_hz: float, search_hz: float) -> tuple[float, float]:
    """Frequency of the strongest spectral line of ``y`` within ``+- search_hz``, and its peak/median ratio.

    Hann window, zero-padded FFT of twice the length (next power of two), peak bin refined by a
    parabola through the log-power of the peak and its two neighbours.  The ratio is 0 for an
    all-zero input and infinite when the median of the searched bins is 0 but the peak is not.
    Cost O(n log n).
    """
    n = y.size
    nfft = 1 << int(math.ceil(math.log2(2 * n)))
    spec = np.abs(np.fft.fft(y * np.hanning(n), nfft)) ** 2
    freqs = np.fft.fftfreq(nfft, d=1.0 / sample_rate_hz)
    band = np.abs(freqs) <= min(search_hz, 0.5 * sample_rate_hz)
    idx = np.flatnonzero(band)
    k = int(idx[np.argmax(spec[idx])])
    med = float(np.median(spec[idx]))
    if med > 0:
        ratio = float(spec[k] / med)
    else:
        ratio = float("inf") if spec[k] > 0 else 0.0
    lo, mid, hi = spec[(k - 1) % nfft], spec[k], spec[(k + 1) % nfft]
    delta = 0.0
    if lo > 0 and mid > 0 and hi > 0:
        la, lb, lc = math.log(lo), math.log(mid), math.log(hi)
        den = la - 2.0 * lb + lc
        if den < 0:
            delta = 0.5 * (la - lc) / den
    f_line = (k + delta) * sample_rate_hz / nfft
    if f_line >= 0.5 * sample_rate_hz:
        f_line -= sample_rate_hz
    return f_line, ratio
