"""Numba kernels of pipeline.fec.

Rules (DEVELOPERS.md): module-level ``@njit(cache=True)`` functions, every parameter an argument
(tables are passed in, never read from globals), contiguous typed arrays, outputs preallocated by
the Python wrapper, no validation here.  Each kernel gives the same answer with
``NUMBA_DISABLE_JIT=1``; integer arithmetic is written with explicit casts so that plain Python
(with numpy scalars) and compiled code agree.
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = [
    "conv_encode_kernel",
    "pn_bits_kernel",
    "crc16_kernel",
    "rs_remainder_kernel",
]


# ---- convolutional encoder ---------------------------------------------------------------------

@njit(cache=True)
def conv_encode_kernel(bits, state, phase, g1_mask, g2_mask, g2_invert, keep1, keep2, out):
    """Encode ``bits`` with the K=7 code and puncture; return (symbols written, state, phase).

    ``state`` holds the last six input bits, bit 0 the newest (D1), bit 5 the oldest (D6).  The
    encoder register is ``(state << 1) | bit`` so bit 0 is the input and bit 6 is D6.  ``keep1`` /
    ``keep2`` are the C1/C2 rows of the puncturing pattern, ``phase`` the current column.
    """
    period = keep1.shape[0]
    n_out = 0
    s = state
    ph = phase
    for i in range(bits.shape[0]):
        reg = (s << 1) | bits[i]
        c1 = reg & g1_mask
        c2 = reg & g2_mask
        # parity of up to 7 bits by folding
        c1 ^= c1 >> 4
        c1 ^= c1 >> 2
        c1 ^= c1 >> 1
        c2 ^= c2 >> 4
        c2 ^= c2 >> 2
        c2 ^= c2 >> 1
        if keep1[ph]:
            out[n_out] = c1 & 1
            n_out += 1
        if keep2[ph]:
            out[n_out] = (c2 & 1) ^ g2_invert
            n_out += 1
        s = reg & 0x3F
        ph += 1
        if ph == period:
            ph = 0
    return n_out, s, ph


# ---- pseudo-randomizer -------------------------------------------------------------------------

@njit(cache=True)
def pn_bits_kernel(out):
    """Fill ``out`` with the TM pseudo-random bit sequence, h(x) = x^8+x^7+x^5+x^3+1, all-ones seed.

    Fibonacci form: a[k] = a[k-1] ^ a[k-3] ^ a[k-5] ^ a[k-8], with a[0..7] = 1.
    """
    n = out.shape[0]
    for k in range(min(n, 8)):
        out[k] = 1
    for k in range(8, n):
        out[k] = out[k - 1] ^ out[k - 3] ^ out[k - 5] ^ out[k - 8]


# ---- CRC-16 ------------------------------------------------------------------------------------

@njit(cache=True)
def crc16_kernel(data, crc, table):
    """Byte-wise MSB-first CRC-16 update of ``crc`` over ``data`` with a 256-entry ``table``."""
    c = crc
    for i in range(data.shape[0]):
        c = ((c << 8) & 0xFFFF) ^ table[((c >> 8) ^ data[i]) & 0xFF]
    return c


# ---- Reed-Solomon: systematic remainder (encoder and clean-codeword check) ----------------------

@njit(cache=True)
def rs_remainder_kernel(block, n_rows, interleave, dual_to_conv, gtab, rem):
    """Remainder of each interleaved codeword's data part times x^(2E), modulo g(x).

    ``block`` holds ``n_rows * interleave`` data octets in dual basis, codeword ``c`` at positions
    ``c, c + I, c + 2I, ...``.  ``gtab[f]`` is the product ``f * g(x)`` without its leading term,
    packed as ``W = 2E/8`` uint64 words, the coefficient of x^(2E-1) in the top octet of word 0.
    ``rem[c]`` (shape (I, W)) receives the remainder in the same packing, conventional basis; it is
    the parity of codeword ``c`` (highest degree first).  Cost: n_rows * I * (W + 1) word operations.
    """
    n_words = gtab.shape[1]
    for c in range(interleave):
        for w in range(n_words):
            rem[c, w] = np.uint64(0)
    pos = 0
    for r in range(n_rows):
        for c in range(interleave):
            d = np.uint64(dual_to_conv[block[pos]])
            pos += 1
            fb = (rem[c, 0] >> np.uint64(56)) ^ d
            for w in range(n_words - 1):
                rem[c, w] = ((rem[c, w] << np.uint64(8)) | (rem[c, w + 1] >> np.uint64(56))) ^ gtab[fb, w]
            rem[c, n_words - 1] = (rem[c, n_words - 1] << np.uint64(8)) ^ gtab[fb, n_words - 1]
