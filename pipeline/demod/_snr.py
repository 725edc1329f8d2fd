"""Es/N0 estimation from matched-filter symbol samples."""

from __future__ import annotations

import math

import numpy as np

from pipeline.demod._kernels import moments_m2m4

__all__ = ["esn0_db_from_moments", "estimate_esn0_m2m4", "m2m4_signal_noise"]


def m2m4_signal_noise(symbols: np.ndarray) -> tuple[float, float]:
    """Signal power ``S`` and noise power ``N`` of complex PSK symbols by the M2M4 moments.

    Parameters
    ----------
    symbols : array_like of complex
        One matched-filter sample per modulation symbol (any carrier phase, any scale).

    Returns
    -------
    (float, float)
        ``S = sqrt(2 M2^2 - M4)`` and ``N = M2 - S``; ``S = 0`` when ``2 M2^2 <= M4``.

    Notes
    -----
    For a constant-modulus signal in circular complex Gaussian noise ``M2 = S + N`` and
    ``M4 = S^2 + 4 S N + 2 N^2``, so the pair of equations solves exactly for ``S`` and ``N``.
    Blind: no decisions, no carrier or timing phase needed.  Cost O(n).

    References
    ----------
    D. R. Pauluzzi, N. C. Beaulieu, "A comparison of SNR estimation techniques for the AWGN
    channel", IEEE Trans. Commun. 48 (2000) 1681-1691, sec. II-E.
    """
    sym = np.ascontiguousarray(symbols, dtype=np.complex64)
    if sym.ndim != 1:
        raise ValueError(f"Argument 'symbols' must be one-dimensional, not {sym.ndim}-dimensional.")
    mom = np.zeros(2, dtype=np.float64)
    moments_m2m4(sym, mom)
    return _signal_noise(float(mom[0]), float(mom[1]))


def _signal_noise(m2: float, m4: float) -> tuple[float, float]:
    s2 = 2.0 * m2 * m2 - m4
    s = math.sqrt(s2) if s2 > 0.0 else 0.0
    return s, m2 - s


def estimate_esn0_m2m4(symbols: np.ndarray) -> float:
    """Es/N0 in dB per modulation symbol by the M2M4 estimator (see :func:`m2m4_signal_noise`).

    Returns ``nan`` when the moments give no positive signal power or no symbols are given, and
    ``inf`` for a noise-free input.  The estimate refers to the complex noise ``N0`` of the
    matched-filter output, i.e. Es/N0 as ../shared/DESIGN.md defines it.
    """
    sym = np.asarray(symbols)
    if sym.size == 0:
        return float("nan")
    s, n = m2m4_signal_noise(sym)
    return _esn0_db(s, n)


def esn0_db_from_moments(m2: float, m4: float) -> float:
    """Es/N0 in dB from the moments ``M2 = mean |r|^2`` and ``M4 = mean |r|^4`` (as :func:`estimate_esn0_m2m4`).

    ``nan`` when ``2 M2^2 <= M4`` (no positive signal power), ``inf`` when no noise is left.

    Examples
    --------
    >>> round(esn0_db_from_moments(2.0, 7.0), 3)  # S = 1, N = 1 (M4 = S^2 + 4 S N + 2 N^2)
    0.0
    """
    return _esn0_db(*_signal_noise(m2, m4))


def _esn0_db(s: float, n: float) -> float:
    if s <= 0.0:
        return float("nan")
    if n <= 0.0:
        return float("inf")
    return 10.0 * math.log10(s / n)
