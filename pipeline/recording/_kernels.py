"""Numba kernels of pipeline.recording: stored IQ components -> complex64, bits -> soft values.

Every parameter is an argument, outputs are preallocated by the caller, nothing is validated
here (see the wrappers in ``_recording.py`` and ``_symbols.py``).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

__all__ = [
    "float_iq_to_complex64",
    "zero_nonfinite_complex64",
    "int_iq_to_complex64",
    "complex_to_int_iq",
    "unpack_bits_to_soft",
    "int8_to_soft",
]


@njit(cache=True)
def float_iq_to_complex64(components, out):  # pragma: no cover - compiled
    """Interleaved float32 I/Q -> complex64, a sample with a NaN/Inf component becomes 0.

    ``components`` has ``2 * len(out)`` native float32 values.  Returns the number of samples
    replaced (a sample counts once even if both components are bad).
    """
    n = out.shape[0]
    bad = 0
    for i in range(n):
        re = components[2 * i]
        im = components[2 * i + 1]
        if math.isfinite(re) and math.isfinite(im):
            out[i] = complex(re, im)
        else:
            out[i] = 0.0
            bad += 1
    return bad


@njit(cache=True)
def zero_nonfinite_complex64(samples):  # pragma: no cover - compiled
    """In place: a sample with a NaN/Inf component becomes 0; returns the number of samples replaced.

    The same result as :func:`float_iq_to_complex64` on the samples' own components, for samples read
    straight into a complex64 array (one pass less over memory).  A first pass, without stores, counts
    the components whose float32 exponent bits are all ones (NaN and Inf; it vectorizes); only when there
    is one does a second pass zero the samples.
    """
    bits = samples.view(np.uint32)
    exponent = np.uint32(0x7F800000)
    hits = 0
    for i in range(bits.shape[0]):
        hits += (bits[i] & exponent) == exponent
    if hits == 0:
        return 0
    bad = 0
    for i in range(samples.shape[0]):
        v = samples[i]
        if not (math.isfinite(v.real) and math.isfinite(v.imag)):
            samples[i] = 0.0
            bad += 1
    return bad


@njit(cache=True)
def int_iq_to_complex64(components, offset, scale, out):  # pragma: no cover - compiled
    """Interleaved integer I/Q -> complex64 as ``(x - offset) * scale``; returns 0 (no NaN possible)."""
    n = out.shape[0]
    for i in range(n):
        re = (np.float32(components[2 * i]) - offset) * scale
        im = (np.float32(components[2 * i + 1]) - offset) * scale
        out[i] = complex(re, im)
    return 0


@njit(cache=True)
def complex_to_int_iq(samples, gain, offset, lo, hi, out):  # pragma: no cover - compiled
    """complex -> interleaved integers ``clip(round(x * gain + offset), lo, hi)``.

    NaN components are written as ``round(offset)`` (the zero level).  Returns the number of
    components that had to be clipped (saturated).
    """
    n = samples.shape[0]
    clipped = 0
    for i in range(n):
        for k in range(2):
            v = samples[i].real if k == 0 else samples[i].imag
            y = v * gain + offset
            if not (y == y):
                y = offset
            y = np.floor(y + 0.5)
            if y > hi:
                y = hi
                clipped += 1
            elif y < lo:
                y = lo
                clipped += 1
            out[2 * i + k] = y
    return clipped


@njit(cache=True)
def unpack_bits_to_soft(packed, first_bit, out):  # pragma: no cover - compiled
    """Packed hard bits, MSB first -> soft values: bit 0 -> +1.0, bit 1 -> -1.0.

    ``out[j]`` is bit number ``first_bit + j`` of ``packed`` (bit 0 = MSB of ``packed[0]``).
    """
    n = out.shape[0]
    for j in range(n):
        b = first_bit + j
        bit = (packed[b >> 3] >> (7 - (b & 7))) & 1
        out[j] = 1.0 - 2.0 * bit
    return n


@njit(cache=True)
def int8_to_soft(values, out):  # pragma: no cover - compiled
    """int8 soft symbols -> float32 with the same value (positive = bit 0, 0 = erasure)."""
    n = out.shape[0]
    for j in range(n):
        out[j] = values[j]
    return n
