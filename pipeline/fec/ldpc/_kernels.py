"""Numba kernels of pipeline.fec.ldpc.

Rules (DEVELOPERS.md): module-level ``@njit(cache=True)`` functions, every parameter an argument,
contiguous typed arrays, outputs preallocated by the Python wrapper, no validation here.  Each
kernel gives the same answer with ``NUMBA_DISABLE_JIT=1``: integer arithmetic is written on Python
ints (``int(x)``) with explicit clamps, so numpy's int8 wrap-around never enters.
"""

from __future__ import annotations

import numpy as np
from numba import njit
from numba.extending import overload

__all__ = [
    "gf2_rref_kernel",
    "qc_encode_kernel",
]


# ---- GF(2) elimination --------------------------------------------------------------------------


@njit(cache=True)
def gf2_rref_kernel(a, n_pivot_cols, pivots):
    """Gauss-Jordan elimination over GF(2) of packed rows ``a`` (uint64, in place); returns the rank.

    Column ``j`` is bit ``j & 63`` of word ``j >> 6``.  Pivots are sought among the first
    ``n_pivot_cols`` columns; ``pivots[r]`` receives the pivot column of row ``r``.
    """
    n_rows = a.shape[0]
    rank = 0
    for col in range(n_pivot_cols):
        if rank == n_rows:
            break
        w = col >> 6
        bit = np.uint64(1) << np.uint64(col & 63)
        p = -1
        for r in range(rank, n_rows):
            if a[r, w] & bit:
                p = r
                break
        if p < 0:
            continue
        if p != rank:
            tmp = a[p, w:].copy()
            a[p, w:] = a[rank, w:]
            a[rank, w:] = tmp
        piv = a[rank, w:]
        for r in range(n_rows):
            if r != rank and (a[r, w] & bit):
                a[r, w:] ^= piv
        pivots[rank] = col
        rank += 1
    return rank


# ---- quasi-cyclic systematic encoder -----------------------------------------------------------


@njit(cache=True)
def qc_encode_kernel(info, gen_words, b, acc, out):
    """Parity of a quasi-cyclic systematic code: ``out[c] = info[c] . W`` over GF(2).

    ``info`` (uint8 0/1, shape (codewords, blocks x b)): the information bits in blocks of ``b``.
    ``gen_words`` (uint64, shape (blocks, segments, words)): for each block the parity of its first
    unit vector as ``segments`` circulant segments of ``b`` bits, each segment stored twice in a
    row (2 b bits, bit j at bit ``j & 63`` of word ``j >> 6``, one spare zero word at the end).
    The parity of unit vector ``r`` of a block is every segment rotated right by ``r``, i.e. bits
    ``b - r .. 2 b - r - 1`` of the doubled segment.  ``acc`` (uint64, shape (segments, ceil(b/64)))
    is work space; ``out`` (uint8 0/1, shape (codewords, segments x b)).
    Cost: (set information bits) x segments x ceil(b / 64) word operations.
    """
    n_cw = info.shape[0]
    n_blk, n_seg, _ = gen_words.shape
    nw = acc.shape[1]
    one = np.uint64(1)
    for c in range(n_cw):
        acc[:, :] = 0
        for blk in range(n_blk):
            base = blk * b
            for r in range(b):
                if info[c, base + r]:
                    off = b - r
                    q = off >> 6
                    sh = np.uint64(off & 63)
                    back = np.uint64(64 - (off & 63))
                    for t in range(n_seg):
                        g = gen_words[blk, t]
                        a = acc[t]
                        if sh == 0:
                            for w in range(nw):
                                a[w] ^= g[q + w]
                        else:
                            for w in range(nw):
                                a[w] ^= (g[q + w] >> sh) | (g[q + w + 1] << back)
        for t in range(n_seg):
            for j in range(b):
                out[c, t * b + j] = np.uint8((acc[t, j >> 6] >> np.uint64(j & 63)) & one)
