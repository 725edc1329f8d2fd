"""Numba kernels of pipeline.sim (transmitter and channel).

Rules (DEVELOPERS.md): module-level ``@njit(cache=True)`` functions, every parameter an argument,
contiguous typed arrays, outputs preallocated by the Python wrapper, no validation here.  Each
kernel gives the same answer with ``NUMBA_DISABLE_JIT=1``.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

__all__ = [
    "idle_lfsr_fill",
    "nrzm_encode_kernel",
    "scatter_pulses",
    "scatter_rect",
    "ou_phase_noise",
    "apply_channel_kernel",
    "phase_modulate",
]


@njit(cache=True)
def idle_lfsr_fill(state, out):
    """Fill ``out`` (uint8 octets) with the idle pattern of x^32 + x^22 + x^2 + x + 1; return the state.

    Fibonacci register of 32 cells, the output bit is the oldest cell, so the output obeys
    ``o[k+32] = o[k] ^ o[k+1] ^ o[k+2] ^ o[k+22]``; octets are packed MSB first.  The polynomial
    is that of the 132.0-B-2 idle pattern as remembered (REFERENCES.md sec. 3, not confirmed); only
    idle data uses it, which a receiver discards.
    ``state`` is a Python int / uint64 holding the 32 cells (bit 31 oldest).
    """
    s = np.uint64(state)
    mask = np.uint64(0xFFFFFFFF)
    one = np.uint64(1)
    for i in range(out.shape[0]):
        octet = 0
        for _ in range(8):
            bit = (s >> np.uint64(31)) & one
            # cell j holds o[k + 31 - j]; o[k+32] = o[k] ^ o[k+1] ^ o[k+2] ^ o[k+22] is the recurrence of
            # x^32 + x^22 + x^2 + x + 1
            fb = bit ^ ((s >> np.uint64(30)) & one) ^ ((s >> np.uint64(29)) & one) ^ ((s >> np.uint64(9)) & one)
            s = ((s << one) | fb) & mask
            octet = (octet << 1) | int(bit)
        out[i] = octet
    return s


@njit(cache=True)
def nrzm_encode_kernel(bits, level, out):
    """NRZ-L -> NRZ-M: ``out[i] = out[i-1] XOR bits[i]`` (a 1 is a change of level); return the last level."""
    lv = level
    for i in range(bits.shape[0]):
        lv = lv ^ bits[i]
        out[i] = lv
    return lv


@njit(cache=True)
def scatter_pulses(values, k0, p0, period, shift, table, table_step, half_span, base, buf):
    """Add ``values[i] * h((n - p_i) / period)`` into ``buf[n - base]`` for every sample ``n`` in reach.

    ``p_i = p0 + (k0 + i) * period + shift`` is the peak position of pulse ``i`` in samples;
    ``h`` is tabulated as ``table[j] = h(j / table_step - half_span)`` (symbol units) and linearly
    interpolated; samples outside ``buf`` are skipped.
    """
    n_buf = buf.shape[0]
    last_j = table.shape[0] - 1
    for i in range(values.shape[0]):
        p = p0 + (k0 + i) * period + shift
        lo = int(math.ceil(p - half_span * period))
        hi = int(math.floor(p + half_span * period))
        v = values[i]
        # table coordinate of sample lo, then a constant step per sample (saves a division per tap)
        u0 = ((lo - p) / period + half_span) * table_step
        du = table_step / period
        for n in range(lo, hi + 1):
            idx = n - base
            if idx < 0 or idx >= n_buf:
                continue
            u = u0 + (n - lo) * du
            j = int(math.floor(u))
            if j < 0 or j >= last_j:
                continue
            frac = u - j
            h = table[j] + frac * (table[j + 1] - table[j])
            buf[idx] += v * h


@njit(cache=True)
def scatter_rect(values, k0, p0, period, shift, base, buf):
    """Rectangular pulses: ``buf[n - base] += values[i]`` for ``e_i <= n < e_{i+1}``.

    ``e_m = p0 + m * period + shift - period / 2`` is the leading edge of symbol ``m = k0 + i``
    (its peak ``p_m`` is the centre of the rectangle).  Both edges of every symbol are evaluated by
    the same expression, so consecutive rectangles tile the time axis exactly and every sample gets
    exactly one symbol (sample-and-hold NRZ).
    """
    n_buf = buf.shape[0]
    half = 0.5 * period
    for i in range(values.shape[0]):
        m = k0 + i
        lo = int(math.ceil(p0 + m * period + shift - half))
        hi = int(math.ceil(p0 + (m + 1) * period + shift - half))  # exclusive
        v = values[i]
        for n in range(lo, hi):
            idx = n - base
            if 0 <= idx < n_buf:
                buf[idx] += v


@njit(cache=True)
def ou_phase_noise(normals, a, b, state, out):
    """First-order Gauss-Markov phase: ``th[n] = a th[n-1] + b w[n]``; return the last value.

    With ``a = exp(-2 pi B / fs)`` and ``b = sigma sqrt(1 - a^2)`` the process is stationary with
    standard deviation ``sigma`` and a Lorentzian spectrum of corner frequency ``B``.
    """
    th = state
    for n in range(normals.shape[0]):
        th = a * th + b * normals[n]
        out[n] = th
    return th


@njit(cache=True)
def apply_channel_kernel(x, cycles, theta, gain, noise, out):
    """``out[n] = x[n] * gain[n] * exp(j (2 pi frac(cycles[n]) + theta[n])) + noise[n]``."""
    two_pi = 2.0 * math.pi
    for n in range(x.shape[0]):
        c = cycles[n]
        ph = two_pi * (c - math.floor(c)) + theta[n]
        g = gain[n]
        out[n] = x[n] * complex(g * math.cos(ph), g * math.sin(ph)) + noise[n]


@njit(cache=True)
def phase_modulate(levels, n0, index_rad, subcarrier_mode, subcarrier_cycles_per_sample, subcarrier_phase0_cycles,
                   amplitude, out):
    """Residual-carrier phase modulation: ``out[i] = amplitude * exp(j index_rad * levels[i] * S(psi_i))``.

    ``psi_i = subcarrier_phase0_cycles + (n0 + i) * subcarrier_cycles_per_sample`` is the subcarrier
    phase in cycles at absolute sample ``n0 + i``; ``S`` is 1 (``subcarrier_mode`` 0, PCM/PM), the
    square wave ``+1`` on ``frac(psi) < 1/2`` and ``-1`` after (mode 1), or ``sin(2 pi psi)`` (mode 2).
    The subcarrier phase is evaluated from the absolute sample index every sample, so any split of
    the stream gives the same samples.
    """
    two_pi = 2.0 * math.pi
    for i in range(levels.shape[0]):
        w = levels[i]
        if subcarrier_mode != 0:
            psi = subcarrier_phase0_cycles + (n0 + i) * subcarrier_cycles_per_sample
            f = psi - math.floor(psi)
            if subcarrier_mode == 1:
                w = w if f < 0.5 else -w
            else:
                w = w * math.sin(two_pi * f)
        ph = index_rad * w
        out[i] = complex(amplitude * math.cos(ph), amplitude * math.sin(ph))
