"""Pulse shapes and matched-filter taps sampled at a non-integer number of samples per symbol."""

from __future__ import annotations

import math

import numpy as np

__all__ = [
    "rrc_pulse",
    "raised_cosine_pulse",
    "matched_filter_taps",
    "gardner_detector_gain",
    "midpoint_energy_ratio",
]


def rrc_pulse(x: np.ndarray, rolloff: float) -> np.ndarray:
    """Root-raised-cosine pulse of unit energy per symbol, at times ``x`` in symbol periods.

    Parameters
    ----------
    x : ndarray
        Time in symbol periods (0 = pulse centre).
    rolloff : float
        Excess bandwidth ``beta`` in (0, 1].

    Returns
    -------
    ndarray
        ``p(x)`` with ``integral p(x)^2 dx = 1`` (so ``p(0) = 1 - beta + 4 beta / pi``).

    Notes
    -----
    ``p(x) = [sin(pi x (1-b)) + 4 b x cos(pi x (1+b))] / [pi x (1 - (4 b x)^2)]``; the removable
    singularities at ``x = 0`` and ``|x| = 1/(4b)`` take their limits.  Cost O(len(x)).

    References
    ----------
    J. G. Proakis, *Digital Communications*, 4th ed., sec. 9.2 (square-root raised-cosine spectrum).
    """
    b = float(rolloff)
    x = np.asarray(x, dtype=np.float64)
    out = np.empty_like(x)
    near0 = np.abs(x) < 1e-9
    sing = np.abs(np.abs(x) - 1.0 / (4.0 * b)) < 1e-9
    reg = ~(near0 | sing)
    xr = x[reg]
    num = np.sin(math.pi * xr * (1.0 - b)) + 4.0 * b * xr * np.cos(math.pi * xr * (1.0 + b))
    den = math.pi * xr * (1.0 - (4.0 * b * xr) ** 2)
    out[reg] = num / den
    out[near0] = 1.0 - b + 4.0 * b / math.pi
    out[sing] = (b / math.sqrt(2.0)) * (
        (1.0 + 2.0 / math.pi) * math.sin(math.pi / (4.0 * b)) + (1.0 - 2.0 / math.pi) * math.cos(math.pi / (4.0 * b))
    )
    return out


def raised_cosine_pulse(x: np.ndarray, rolloff: float) -> np.ndarray:
    """Raised-cosine pulse (the RRC pulse convolved with itself), peak 1, zero at non-zero integers.

    ``g(x) = sinc(x) cos(pi b x) / (1 - (2 b x)^2)``, limit ``(pi/4) sinc(1/(2b))`` at ``|x| = 1/(2b)``.
    Proakis, *Digital Communications*, 4th ed., eq. 9.2-26.
    """
    b = float(rolloff)
    x = np.asarray(x, dtype=np.float64)
    den = 1.0 - (2.0 * b * x) ** 2
    sing = np.abs(den) < 1e-10
    safe = np.where(sing, 1.0, den)
    out = np.sinc(x) * np.cos(math.pi * b * x) / safe
    out[sing] = (math.pi / 4.0) * np.sinc(1.0 / (2.0 * b))
    return out


def matched_filter_taps(pulse: str, rolloff: float, samples_per_symbol: float, span_symbols: int) -> np.ndarray:
    """Real, symmetric matched-filter taps (odd length, unit energy) for the transmitted pulse.

    Parameters
    ----------
    pulse : {"rrc", "rect"}
        Transmitted pulse shape.
    rolloff : float
        RRC excess bandwidth (ignored for ``"rect"``).
    samples_per_symbol : float
        Samples per modulation symbol, need not be an integer.
    span_symbols : int
        RRC filter span in symbols (the filter covers ``+- span_symbols / 2``).

    Returns
    -------
    ndarray of float32
        ``2 D + 1`` taps, centre tap at index ``D``; the filter delay is exactly ``D`` samples.

    Notes
    -----
    RRC: the pulse sampled at ``(k - D) / sps`` symbols.  Rect: each tap is the overlap of the
    one-sample interval ``[k - D - 1/2, k - D + 1/2]`` with the rectangle ``[-sps/2, sps/2]``,
    which is the exact integrate-and-dump for a fractional number of samples per symbol.
    Normalised so that ``sum(h^2) = 1``: white noise keeps its variance through the filter.
    """
    sps = float(samples_per_symbol)
    if pulse == "rrc":
        half = int(math.ceil(0.5 * span_symbols * sps))
        k = np.arange(-half, half + 1, dtype=np.float64)
        h = rrc_pulse(k / sps, rolloff)
    else:
        half = int(math.ceil(0.5 * sps + 0.5))
        k = np.arange(-half, half + 1, dtype=np.float64)
        lo = np.maximum(k - 0.5, -0.5 * sps)
        hi = np.minimum(k + 0.5, 0.5 * sps)
        h = np.clip(hi - lo, 0.0, None)
        while h.size > 1 and h[0] == 0.0:  # symmetric, so trim both ends
            h = h[1:-1]
    h = h / math.sqrt(float(np.sum(h * h)))
    return h.astype(np.float32)


def _combined_response(pulse: str, rolloff: float, x: np.ndarray) -> np.ndarray:
    """Pulse convolved with its matched filter, peak 1, at ``x`` symbol periods."""
    if pulse == "rrc":
        return raised_cosine_pulse(x, rolloff)
    return np.clip(1.0 - np.abs(x), 0.0, None)  # rect * rect = triangle


def gardner_detector_gain(pulse: str, rolloff: float) -> float:
    """Slope of the Gardner detector's S-curve at zero error, per symbol of timing error, unit symbols.

    For random +-1 data ``E[e(tau)] = g(tau - 1/2) - g(tau + 1/2)`` with ``g`` the combined
    (transmit * matched) response, so the slope is ``-2 g'(1/2)``, taken here by a central difference.
    F. M. Gardner, "A BPSK/QPSK timing-error detector for sampled receivers", IEEE Trans. Commun.
    COM-34 (1986) 423-429.
    """
    d = 1e-5
    x = np.array([0.5 - d, 0.5 + d])
    g = _combined_response(pulse, rolloff, x)
    return float(-2.0 * (g[1] - g[0]) / (2.0 * d))


def midpoint_energy_ratio(pulse: str, rolloff: float) -> float:
    """``1 - E|y(kT + T/2)|^2 / E|y(kT)|^2`` for random data: the on-time / midpoint energy contrast.

    ``E|y(kT + T/2)|^2 = sum_i g(i + 1/2)^2`` (unit symbol energy); used by the symbol-lock detector.
    """
    i = np.arange(-40, 40, dtype=np.float64) + 0.5
    g = _combined_response(pulse, rolloff, i)
    return float(1.0 - np.sum(g * g))
