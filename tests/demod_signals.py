"""Reference modulator and channel for the demodulator tests.

Written for the tests only and independently of pipeline.sim and pipeline.demod: the pulse is
evaluated in closed form at every (non-integer) sample time, so sample-clock offset, timing
offset and pulse position are exact by construction.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

__all__ = ["Chunk", "Waveform", "rrc_closed_form", "modulate", "chunked", "symbol_errors", "theory_ser",
           "esn0_from_ser"]


@dataclass
class Chunk:
    """Duck-typed stand-in for pipeline.recording.Chunk."""

    samples: np.ndarray
    start: int
    nonfinite: int = 0


@dataclass
class Waveform:
    samples: np.ndarray  # complex64
    peak_position: np.ndarray  # float64 sample index where each symbol's (I) pulse peaks
    i_bits: np.ndarray  # uint8, bit of the in-phase channel (BPSK: the only bit)
    q_bits: np.ndarray  # uint8, quadrature bit (zeros for BPSK)
    pulse_energy: float = float("nan")  # mean sum of g(n)^2 over a symbol's samples (about sps for RRC)


def rrc_closed_form(x: np.ndarray, beta: float) -> np.ndarray:
    """Square-root raised-cosine, unit energy per symbol period, ``x`` in symbol periods.

    Written as ``(4 b / pi) [cos((1+b) pi x) + sin((1-b) pi x) / (4 b x)] / (1 - (4 b x)^2)``
    (Proakis, Digital Communications, 4th ed., sec. 9.2; the same function as the usual form,
    rearranged), with the limits at x = 0 and |x| = 1/(4b) from l'Hopital.
    """
    x = np.asarray(x, dtype=np.float64)
    out = np.empty_like(x)
    z = np.abs(x) < 1e-12
    s = np.abs(np.abs(x) - 1.0 / (4 * beta)) < 1e-9
    r = ~(z | s)
    xr = x[r]
    bracket = np.cos((1 + beta) * math.pi * xr) + np.sin((1 - beta) * math.pi * xr) / (4 * beta * xr)
    out[r] = (4 * beta / math.pi) * bracket / (1 - (4 * beta * xr) ** 2)
    out[z] = 1 + beta * (4 / math.pi - 1)
    a = math.pi / (4 * beta)
    out[s] = (beta / math.sqrt(2)) * ((1 + 2 / math.pi) * math.sin(a) + (1 - 2 / math.pi) * math.cos(a))
    return out


def _pulse(x: np.ndarray, pulse: str, beta: float, sps: float) -> np.ndarray:
    if pulse == "rrc":
        return rrc_closed_form(x, beta)
    # rect as seen by an integrating sampler: the share of the sample period [n - 1/2, n + 1/2]
    # (x = (n - c) / sps) covered by the symbol [-1/2, 1/2) of the pulse
    lo = np.maximum(x - 0.5 / sps, -0.5)
    hi = np.minimum(x + 0.5 / sps, 0.5)
    return np.clip((hi - lo) * sps, 0.0, 1.0)


def _add_pulses(n_samples: int, centres: np.ndarray, amps: np.ndarray, sps: float, pulse: str, beta: float,
                span: int) -> np.ndarray:
    half = (span / 2 + 1) * sps if pulse == "rrc" else 0.5 * sps + 1
    width = int(math.ceil(2 * half)) + 2
    out_re = np.zeros(n_samples)
    out_im = np.zeros(n_samples)
    energy = 0.0
    batch = max(1, 2_000_000 // width)
    offs = np.arange(width)
    for b0 in range(0, centres.size, batch):
        c = centres[b0:b0 + batch]
        a = amps[b0:b0 + batch]
        first = np.floor(c - half).astype(np.int64)
        idx = first[:, None] + offs[None, :]
        x = (idx - c[:, None]) / sps
        g = _pulse(x, pulse, beta, sps)
        if pulse == "rrc":
            g[np.abs(x) > span / 2] = 0.0
        ok = (idx >= 0) & (idx < n_samples)
        w = g * ok
        energy += float(np.sum(g * g))
        idc = np.clip(idx, 0, n_samples - 1).ravel()
        out_re += np.bincount(idc, weights=(w * a.real[:, None]).ravel(), minlength=n_samples)
        out_im += np.bincount(idc, weights=(w * a.imag[:, None]).ravel(), minlength=n_samples)
    return out_re + 1j * out_im, energy / max(1, centres.size)


def modulate(n_symbols: int, *, modulation: str = "bpsk", sample_rate_hz: float = 1e6, symbol_rate_baud: float = 240e3,
             pulse: str = "rrc", rolloff: float = 0.5, timing_offset: float = 0.37, clock_offset_ppm: float = 0.0,
             carrier_offset_hz: float = 0.0, doppler_rate_hz_per_s: float = 0.0, phase_rad: float = 0.0,
             esn0_db: float | None = None, rng: np.random.Generator, lead_symbols: int = 8, span: int = 16,
             amplitude: float = 1.0, dropout: tuple[float, float] | None = None,
             bits: tuple[np.ndarray, np.ndarray] | None = None) -> Waveform:
    """Modulate random bits: BPSK bit 0 -> +1; QPSK (I + jQ)/sqrt(2), I = +1 for b_I = 0; OQPSK Q late by T/2.

    The symbol clock runs ``clock_offset_ppm`` slow relative to the sample clock (samples per
    symbol ``fs / Rs * (1 + ppm 1e-6)``).  Symbol ``k`` peaks at sample
    ``(lead_symbols + k + timing_offset) * sps_tx``.  Noise: complex white Gaussian with
    ``Es/N0 = E_pulse * E|a|^2 * amplitude^2 / sigma^2``, ``E_pulse`` the mean of ``sum_n g^2``
    over the symbols (about ``sps_tx`` for the unit-energy RRC).  ``dropout = (t0_s, t1_s)``
    switches the signal (not the noise) off.
    """
    sps_tx = sample_rate_hz / symbol_rate_baud * (1.0 + clock_offset_ppm * 1e-6)
    if bits is None:
        bi = rng.integers(0, 2, n_symbols).astype(np.uint8)
        bq = rng.integers(0, 2, n_symbols).astype(np.uint8) if modulation != "bpsk" else np.zeros(n_symbols, np.uint8)
    else:
        bi, bq = bits
    ii = 1.0 - 2.0 * bi
    qq = 1.0 - 2.0 * bq
    centres = (lead_symbols + np.arange(n_symbols) + timing_offset) * sps_tx
    n_samples = int(math.ceil((lead_symbols * 2 + n_symbols + timing_offset) * sps_tx))
    if modulation == "bpsk":
        s, e_pulse = _add_pulses(n_samples, centres, ii.astype(np.complex128), sps_tx, pulse, rolloff, span)
    elif modulation == "qpsk":
        s, e_pulse = _add_pulses(n_samples, centres, (ii + 1j * qq) / math.sqrt(2), sps_tx, pulse, rolloff, span)
    else:
        s, e_pulse = _add_pulses(n_samples, centres, ii / math.sqrt(2) + 0j, sps_tx, pulse, rolloff, span)
        s = s + _add_pulses(n_samples, centres + 0.5 * sps_tx, 1j * qq / math.sqrt(2), sps_tx, pulse, rolloff, span)[0]
    t = np.arange(n_samples) / sample_rate_hz
    s = amplitude * s * np.exp(1j * (2 * math.pi * (carrier_offset_hz * t + 0.5 * doppler_rate_hz_per_s * t * t)
                                     + phase_rad))
    if dropout is not None:
        s[(t >= dropout[0]) & (t < dropout[1])] = 0.0
    if esn0_db is not None:
        # Es = amplitude^2 E|a|^2 sum_n g(n)^2, the pulse energy over the samples actually produced
        # (sps_tx for RRC; less for an integrating sampler's rect, whose edge samples are partial)
        sigma2 = e_pulse * amplitude ** 2 / 10 ** (esn0_db / 10)
        s = s + math.sqrt(sigma2 / 2) * (rng.standard_normal(n_samples) + 1j * rng.standard_normal(n_samples))
    return Waveform(s.astype(np.complex64), centres, bi, bq, float(e_pulse))


def chunked(samples: np.ndarray, cuts: list[int], start: int = 0):
    """Yield Chunk objects splitting ``samples`` at the sorted indices ``cuts``."""
    edges = [0, *cuts, samples.size]
    for a, b in zip(edges[:-1], edges[1:]):
        yield Chunk(samples[a:b], start + a, 0)


def symbol_errors(block, wave: Waveform, modulation: str, skip: int = 2000):
    """Match demodulated symbols to transmitted ones by position; count hard symbol errors.

    Returns ``(errors, compared, max_position_error_symbols)`` after resolving the phase
    ambiguity (BPSK sign, QPSK the four rotations / the I-Q swap) by majority.
    """
    bps = 1 if modulation == "bpsk" else 2
    pos = block.position[::bps]
    sps = np.median(np.diff(wave.peak_position))
    k = np.rint((pos - wave.peak_position[0]) / sps).astype(np.int64)
    ok = (k >= 0) & (k < wave.peak_position.size)
    ok[:skip] = False
    k = k[ok]
    perr = np.abs(pos[ok] - wave.peak_position[k]) / sps
    if bps == 1:
        hard = (block.soft[ok] < 0).astype(np.uint8)
        e0 = np.count_nonzero(hard != wave.i_bits[k])
        errs = min(e0, k.size - e0)
        return errs, int(k.size), float(perr.max())
    si = block.soft[0::2][ok]
    sq = block.soft[1::2][ok]
    z = si + 1j * sq
    best = None
    for rot in range(4):
        zr = z * (1j ** rot)
        for swap in (False, True):
            a, b = (zr.imag, zr.real) if swap else (zr.real, zr.imag)
            e = np.count_nonzero(((a < 0) != wave.i_bits[k].astype(bool)) | ((b < 0) != wave.q_bits[k].astype(bool)))
            best = e if best is None else min(best, e)
    return int(best), int(k.size), float(perr.max())


def _q(x):
    from scipy.special import erfc

    return 0.5 * erfc(np.asarray(x) / math.sqrt(2))


def theory_ser(esn0_db: float, modulation: str) -> float:
    """Coherent symbol error rate in AWGN: BPSK Q(sqrt(2 Es/N0)); QPSK 2Q(sqrt(Es/N0)) - Q(sqrt(Es/N0))^2.

    (J. G. Proakis, Digital Communications, 4th ed., eqs. 5.2-5 and 5.2-59.)
    """
    g = 10 ** (esn0_db / 10)
    if modulation == "bpsk":
        return float(_q(math.sqrt(2 * g)))
    p = float(_q(math.sqrt(g)))
    return 2 * p - p * p


def esn0_from_ser(ser: float, modulation: str) -> float:
    """Invert :func:`theory_ser` by bisection: the Es/N0 (dB) at which theory gives ``ser``."""
    lo, hi = -10.0, 20.0
    for _ in range(80):
        mid = 0.5 * (lo + hi)
        if theory_ser(mid, modulation) > ser:
            lo = mid
        else:
            hi = mid
    return 0.5 * (lo + hi)


def bit_errors_iq(block, wave: Waveform, skip: int = 2000):
    """Bit errors of an OQPSK soft stream (I, Q interleaved) against the transmitted bits.

    The demodulator's ambiguity (a 90-degree rotation maps I to Q and Q to -I; for OQPSK that also
    moves the symbol boundary by half a symbol) is resolved by trying a lag of -1, 0, +1 channel
    bits and a sign per channel, keeping the best.  Returns ``(errors, compared)``.  (For QPSK,
    where the rotation swaps I and Q within a symbol, use :func:`symbol_errors`.)
    """
    sps = np.median(np.diff(wave.peak_position))
    pos = block.position[0::2]
    k0 = int(np.rint((pos[skip] - wave.peak_position[0]) / sps))
    rx = block.soft[2 * skip:]
    tx = np.empty(2 * wave.i_bits.size, dtype=np.uint8)
    tx[0::2] = wave.i_bits
    tx[1::2] = wave.q_bits
    best = None
    for lag in (-1, 0, 1):
        a = 2 * k0 + lag
        if a < 0:
            continue
        n = min(rx.size, tx.size - a) - 4
        r = (rx[:n] < 0).astype(np.uint8)
        t = tx[a:a + n]
        e = 0
        for par in (0, 1):
            d = np.count_nonzero(r[par::2] != t[par::2])
            e += min(d, r[par::2].size - d)
        if best is None or e < best[0]:
            best = (e, n)
    return best


def rewritten_recording(sim, samples: np.ndarray, folder) -> Path:
    """A copy of a simulated SigMF recording (``sim``: what ``pipeline.sim.simulate`` returned) in ``folder`` with
    ``samples`` (complex64) as its data: the metadata as it was, less the ``core:sha512`` the new samples would fail
    and the sample count samples dropped or inserted would.  Returns the copy's metadata path (for an impaired copy
    of a pass: clipped, with a tone, with samples dropped, ...)."""
    folder = Path(folder)
    folder.mkdir(parents=True)
    np.asarray(samples, dtype=np.complex64).tofile(folder / Path(sim.data_path).name)
    meta = json.loads(Path(sim.meta_path).read_text())
    meta["global"].pop("core:sha512", None)
    meta["global"].pop("downlink:sample_count", None)
    path = folder / Path(sim.meta_path).name
    path.write_text(json.dumps(meta))
    return path


def imbalanced(x: np.ndarray, gain_db: float, phase_deg: float) -> np.ndarray:
    """``x`` through a front end whose Q path is ``gain_db`` stronger and ``phase_deg`` off quadrature
    (bench/bench_impairments.py's model): ``I + j g (sin(phi) I + cos(phi) Q)``."""
    g, ph = 10.0 ** (gain_db / 20.0), math.radians(phase_deg)
    return (x.real + 1j * g * (math.sin(ph) * x.real + math.cos(ph) * x.imag)).astype(np.complex64)


def image_rejection_db(gain_db: float, phase_deg: float) -> float:
    """The image rejection ratio (dB) of that front end: ``(1 + 2 g cos phi + g^2) / (1 - 2 g cos phi + g^2)``
    (B. Razavi, RF Microelectronics, 2nd ed., sec. 4.2.5; from memory)."""
    g, ph = 10.0 ** (gain_db / 20.0), math.radians(phase_deg)
    return 10.0 * math.log10((1 + 2 * g * math.cos(ph) + g * g) / (1 - 2 * g * math.cos(ph) + g * g))
