"""An independent residual-carrier transmitter for the tests: PCM/PM and PCM/PSK/PM written from the textbook model.

No pipeline code: the waveform is ``s(t) = exp(j (m w(t) + 2 pi f t + pi r t^2 + phi0))`` (CCSDS 401.0-B sec. 2.4, from
memory, not confirmed; J. H. Yuen (ed.), *Deep Space Telecommunications Systems Engineering*, ch. 5) with ``w`` the
NRZ-L data ``d(t)`` (PCM/PM), its Bi-phase-L chips (a 0 is +1 then -1), or ``d(t)`` times a unit subcarrier
(PCM/PSK/PM: a +-1 square wave, or ``sin``).  Data power (what Es/N0 refers to): ``sin^2 m`` for NRZ and a square
subcarrier, ``2 J1(m)^2`` for a sine subcarrier (first-harmonic sidebands; Jacobi-Anger expansion, Abramowitz and
Stegun 9.1.41; ``scipy.special.j1``).  The symbol clock and the subcarrier share one oscillator: a clock offset of
``ppm`` scales both.  Complex white Gaussian noise of variance ``P_d T / (Es/N0)`` per sample (``T`` samples per
symbol).  Generated in pieces so long recordings stay within memory.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.special import j1

_PIECE = 1 << 20


@dataclass
class ResidualSignal:
    """What the transmitter sent (for checking a receiver against it)."""

    samples: np.ndarray  # complex64
    bits: np.ndarray  # uint8, one per symbol (NRZ-L level 1 - 2 b)
    sample_rate_hz: float
    period: float  # samples per symbol
    start: float  # sample index where symbol 0 begins
    index_rad: float
    data_power: float
    esn0_db: float | None
    carrier_hz: float
    rate_hz_per_s: float
    phase_rad: float
    subcarrier_cycles_per_sample: float
    wave: str  # "nrz", "biphase", "square", "sine"

    def centre(self, k) -> np.ndarray:
        """Sample position of the centre of symbol ``k``."""
        return self.start + (np.asarray(k, dtype=np.float64) + 0.5) * self.period

    def symbol_index(self, position) -> np.ndarray:
        """Nearest symbol index of a centre position."""
        return np.rint((np.asarray(position, dtype=np.float64) - self.start) / self.period - 0.5).astype(np.int64)

    def carrier_phase(self, n) -> np.ndarray:
        """The carrier phase (rad) at sample ``n``."""
        t = np.asarray(n, dtype=np.float64) / self.sample_rate_hz
        return 2.0 * math.pi * (self.carrier_hz * t + 0.5 * self.rate_hz_per_s * t * t) + self.phase_rad

    def subcarrier_phase(self, n) -> np.ndarray:
        """The subcarrier phase (cycles) at sample ``n``: 0 at the start of symbol 0."""
        return (np.asarray(n, dtype=np.float64) - self.start) * self.subcarrier_cycles_per_sample


def _data_power(wave: str, index_rad: float) -> float:
    if wave == "sine":
        return 2.0 * float(j1(index_rad)) ** 2
    return math.sin(index_rad) ** 2


def transmit(n_symbols: int, *, wave: str, sample_rate_hz: float, symbol_rate_baud: float, index_rad: float = 1.2,
             subcarrier_hz: float = 0.0, esn0_db: float | None, carrier_hz: float = 0.0, rate_hz_per_s: float = 0.0,
             phase_rad: float = 0.3, clock_ppm: float = 0.0, start: float = 0.37, lead_samples: int = 0,
             seed: int = 1, bits: np.ndarray | None = None) -> ResidualSignal:
    """Random (or given) bits as PCM/PM (``wave`` "nrz" | "biphase") or PCM/PSK/PM ("square" | "sine").

    ``start`` is where symbol 0 begins (samples, after ``lead_samples`` of unmodulated carrier plus noise);
    the recording ends one symbol after the last.
    """
    if wave not in ("nrz", "biphase", "square", "sine"):
        raise ValueError(wave)
    rng = np.random.default_rng(seed)
    if bits is None:
        bits = rng.integers(0, 2, n_symbols).astype(np.uint8)
    bits = np.asarray(bits, dtype=np.uint8)
    fs = float(sample_rate_hz)
    period = fs / (symbol_rate_baud * (1.0 + clock_ppm * 1e-6))
    nu = subcarrier_hz * (1.0 + clock_ppm * 1e-6) / fs if wave in ("square", "sine") else 0.0
    s0 = float(lead_samples) + start
    total = int(math.ceil(s0 + (bits.size + 1) * period))
    pd = _data_power(wave, index_rad)
    sigma = 0.0 if esn0_db is None else math.sqrt(pd * period / 10.0 ** (esn0_db / 10.0) / 2.0)
    levels = 1.0 - 2.0 * bits.astype(np.float64)
    out = np.empty(total, dtype=np.complex64)
    sig = ResidualSignal(out, bits, fs, period, s0, index_rad, pd, esn0_db, carrier_hz, rate_hz_per_s, phase_rad,
                         nu, wave)
    for a in range(0, total, _PIECE):
        n = np.arange(a, min(total, a + _PIECE), dtype=np.float64)
        rel = (n - s0) / period
        k = np.floor(rel).astype(np.int64)
        inside = (k >= 0) & (k < bits.size)
        d = np.where(inside, levels[np.clip(k, 0, bits.size - 1)], 0.0)
        if wave == "biphase":
            d = d * np.where(rel - np.floor(rel) < 0.5, 1.0, -1.0)
        elif wave == "square":
            cyc = sig.subcarrier_phase(n)
            d = d * np.where(cyc - np.floor(cyc) < 0.5, 1.0, -1.0)
        elif wave == "sine":
            d = d * np.sin(2.0 * math.pi * sig.subcarrier_phase(n))
        x = np.exp(1j * (index_rad * d + sig.carrier_phase(n)))
        if sigma:
            x = x + sigma * (rng.standard_normal(n.size) + 1j * rng.standard_normal(n.size))
        out[a:a + n.size] = x
    return sig


def genie_symbols(sig: ResidualSignal, samples: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Ideal coherent detection: the true carrier, subcarrier and symbol intervals (slow, obvious reference).

    Returns ``(k, s)``: symbol indices and the matched-filter output (data signal integrated over each symbol,
    Bi-phase-L first half minus second half), positive = bit 0.
    """
    x = sig.samples if samples is None else samples
    n = np.arange(x.size, dtype=np.float64)
    q = (x.astype(np.complex128) * np.exp(-1j * sig.carrier_phase(n))).imag
    if sig.wave == "square":
        c = sig.subcarrier_phase(n)
        q = q * np.where(c - np.floor(c) < 0.5, 1.0, -1.0)
    elif sig.wave == "sine":
        q = q * np.sin(2.0 * math.pi * sig.subcarrier_phase(n))
    cum = np.concatenate([[0.0], np.cumsum(q)])
    k = np.arange(sig.bits.size)
    a = np.ceil(sig.start + k * sig.period).astype(np.int64)
    m = np.ceil(sig.start + (k + 0.5) * sig.period).astype(np.int64)
    b = np.ceil(sig.start + (k + 1) * sig.period).astype(np.int64)
    ok = b <= x.size
    k, a, m, b = k[ok], a[ok], m[ok], b[ok]
    s = (cum[m] - cum[a]) - (cum[b] - cum[m]) if sig.wave == "biphase" else cum[b] - cum[a]
    return k, s


def bit_error_rate_theory(esn0_db: float) -> float:
    """Coherent antipodal signalling: ``Pb = Q(sqrt(2 Es/N0)) = erfc(sqrt(Es/N0)) / 2`` (Proakis & Salehi,
    *Digital Communications*, 5th ed., sec. 4.2)."""
    return 0.5 * math.erfc(math.sqrt(10.0 ** (esn0_db / 10.0)))
