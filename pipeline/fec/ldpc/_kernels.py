"""Numba kernels of pipeline.fec.ldpc.

Rules (DEVELOPERS.md): module-level ``@njit(cache=True)`` functions, every parameter an argument,
contiguous typed arrays, outputs preallocated by the Python wrapper, no validation here.  Each
kernel gives the same answer with ``NUMBA_DISABLE_JIT=1``: integer arithmetic is written on Python
ints (``int(x)``) with explicit clamps, so numpy's int8 wrap-around never enters.
"""

from __future__ import annotations

import numpy as np
from numba import njit

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
def qc_encode_kernel(info, gen2, out):
    """Parity of quasi-cyclic systematic codes: ``out[c] = info[c] . W`` over GF(2).

    ``info`` (uint8 0/1, shape (codewords, blocks x b)): the information bits, in blocks of
    ``b`` bits.  ``gen2`` (uint8, shape (blocks, segments, 2 b)): for each block the parity of its
    first unit vector, ``segments`` circulant segments of ``b`` bits, each stored twice in a row,
    so that the parity of unit vector ``r`` of the block (every segment rotated right by ``r``)
    is ``gen2[blk, t, b - r : 2 b - r]``.  ``out`` (uint8, shape (codewords, segments x b)).
    Cost: (set information bits) x segments x b byte XORs.
    """
    n_cw = info.shape[0]
    n_blk, n_seg, b2 = gen2.shape
    b = b2 // 2
    for c in range(n_cw):
        par = out[c]
        par[:] = 0
        for blk in range(n_blk):
            base = blk * b
            for r in range(b):
                if info[c, base + r]:
                    for t in range(n_seg):
                        par[t * b:(t + 1) * b] ^= gen2[blk, t, b - r:2 * b - r]
