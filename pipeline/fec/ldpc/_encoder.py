"""Systematic encoders of the CCSDS LDPC codes (C2 and AR4JA), one codeword or many."""

from __future__ import annotations

import functools

import numpy as np

from pipeline.fec.ldpc._codes import LdpcCode, qc_generator
from pipeline.fec.ldpc._gf2 import pack_rows
from pipeline.fec.ldpc._kernels import qc_encode_kernel

__all__ = ["ldpc_encode", "ldpc_encode_bits"]


@functools.cache
def _doubled_generator(code: LdpcCode, n_seg: int) -> np.ndarray:
    """The first ``n_seg`` generator segments, each stored twice (the layout qc_encode_kernel reads)."""
    gen = qc_generator(code)[:, :n_seg, :]
    n_blk, b = gen.shape[0], gen.shape[2]
    n_words = -(-2 * b // 64) + 1
    bits = np.zeros((n_blk * n_seg, 64 * n_words), dtype=np.uint8)
    bits[:, :2 * b] = np.concatenate([gen, gen], axis=2).reshape(n_blk * n_seg, 2 * b)
    out = pack_rows(bits).reshape(n_blk, n_seg, n_words)
    out.flags.writeable = False
    return out


def _check_code(code) -> LdpcCode:
    if not isinstance(code, LdpcCode):
        raise TypeError(f"Argument 'code' must be an LdpcCode (see ldpc_code), not {type(code).__name__}.")
    return code


def ldpc_encode_bits(code: LdpcCode, info_bits, *, full: bool = False) -> np.ndarray:
    """Encode information bits: the bit form of :func:`ldpc_encode`.

    Parameters
    ----------
    code : LdpcCode
    info_bits : array_like of 0/1, shape (k,) or (codewords, k)
    full : bool
        False: the sent codeword (``code.n`` bits).  True: all ``code.n_var`` variables of H
        (C2: the 18 shortened zeros, information, parity, without the extension bits; AR4JA:
        information and all 3 M parity bits, the punctured ones included), so that
        ``parity_check(code).syndrome(word)`` is zero.

    Returns
    -------
    numpy.ndarray of uint8 0/1, shape (n,) or (codewords, n)

    Examples
    --------
    >>> from pipeline.fec.ldpc import ldpc_code, parity_check
    >>> code = ldpc_code("ar4ja", rate="1/2", k=1024)
    >>> word = ldpc_encode_bits(code, np.ones(1024, np.uint8), full=True)
    >>> int(parity_check(code).syndrome(word).sum())
    0
    """
    code = _check_code(code)
    info = np.asarray(info_bits)
    single = info.ndim == 1
    info = np.atleast_2d(info)
    if info.ndim != 2 or info.shape[1] != code.k:
        raise ValueError(f"Argument 'info_bits' must have {code.k} bits per codeword, not shape {np.shape(info_bits)}.")
    if not (np.issubdtype(info.dtype, np.integer) or info.dtype == np.bool_):
        raise TypeError(f"Argument 'info_bits' must hold integer or bool bits, not dtype {info.dtype}.")
    if info.size and (info.min() < 0 or info.max() > 1):
        raise ValueError("Argument 'info_bits' must hold only 0 and 1.")
    n_cw = info.shape[0]
    head = code.head_zeros
    u = np.zeros((n_cw, head + code.k), dtype=np.uint8)
    u[:, head:] = info
    n_parity_full = code.n_var - code.k - head
    n_parity = n_parity_full if full else code.n - code.extension - code.k
    n_seg = -(-n_parity // code.circulant)
    parity = np.empty((n_cw, n_seg * code.circulant), dtype=np.uint8)
    acc = np.empty((n_seg, -(-code.circulant // 64)), dtype=np.uint64)
    qc_encode_kernel(u, _doubled_generator(code, n_seg), code.circulant, acc, parity)
    if full:
        out = np.concatenate([u, parity[:, :n_parity]], axis=1)
    else:
        out = np.zeros((n_cw, code.n), dtype=np.uint8)
        out[:, :code.k] = info
        out[:, code.k:code.k + n_parity] = parity[:, :n_parity]
    return out[0] if single else out


def ldpc_encode(code: LdpcCode, frames) -> np.ndarray:
    """Encode transfer frames into sent LDPC codewords, octets in and out.

    Parameters
    ----------
    code : LdpcCode
    frames : bytes, or uint8 array of shape (k/8,) or (codewords, k/8)
        One frame of ``code.frame_octets`` octets per codeword; bits are taken MSB first.

    Returns
    -------
    numpy.ndarray of uint8, shape (n/8,) or (codewords, n/8)
        The sent codewords, MSB first: ``[frame][parity]``; C2: 892 + 128 octets, the last two
        bits being the extension zeros; AR4JA: the frame and the first 2 M parity bits.  Not
        randomized (CCSDS 131.0-B sec. 9: the randomizer is applied after encoding).

    Notes
    -----
    Systematic quasi-cyclic encoding (:func:`pipeline.fec.ldpc.qc_generator`): the parity is the
    XOR, over the set information bits, of the generator rows, each a rotation of its block's
    first row.  Cost about (k / 2) x (parity bits) / 64 vector operations a codeword.

    References
    ----------
    CCSDS 131.0-B-2 sec. 7.3.4-7.3.5 (C2), sec. 7.4.3 (AR4JA); CCSDS 130.1-G-2 sec. 8 (C2
    shortening and extension).

    Examples
    --------
    >>> from pipeline.fec.ldpc import ldpc_code
    >>> word = ldpc_encode(ldpc_code("c2"), bytes(892))
    >>> word.shape, int(word.sum())
    ((1020,), 0)
    """
    code = _check_code(code)
    if isinstance(frames, (bytes, bytearray, memoryview)):
        frames = np.frombuffer(bytes(frames), dtype=np.uint8)
    arr = np.asarray(frames)
    if arr.dtype != np.uint8:
        raise TypeError(f"Argument 'frames' must be bytes or a uint8 array, not dtype {arr.dtype}.")
    if arr.ndim not in (1, 2) or arr.shape[-1] != code.frame_octets:
        raise ValueError(f"Argument 'frames' must hold {code.frame_octets} octets per codeword, not shape {arr.shape}.")
    bits = np.unpackbits(arr, axis=-1)
    return np.packbits(ldpc_encode_bits(code, bits), axis=-1)
