"""CCSDS Reed-Solomon codes RS(255,223) E=16 and RS(255,239) E=8, dual basis, interleave 1..8, virtual fill.

Field GF(2^8) with F(x) = x^8+x^7+x^2+x+1; code generator g(x) = prod_{j=128-E}^{127+E} (x - a^(11 j)).
All arithmetic here uses logarithms to the base b = a^11 (0xAD, primitive), so the code roots are
b^j for consecutive j starting at ``fcr = 128 - E``.
"""

from __future__ import annotations

import functools

import numpy as np

from pipeline.fec._args import as_bytes, check_int
from pipeline.fec._kernels import rs_decode_kernel, rs_remainder_kernel

__all__ = [
    "RS_FIELD_POLY",
    "RS_ROOT_ELEMENT",
    "rs_k",
    "rs_generator",
    "dual_basis_tables",
    "rs_encode",
    "rs_fill",
    "rs_decode",
    "rs_decode_blocks",
]

#: F(x) = x^8 + x^7 + x^2 + x + 1 (131.0-B sec. 4.3.2).
RS_FIELD_POLY = 0x187
#: a^11, the element whose powers are the code roots.
RS_ROOT_ELEMENT = 0xAD
#: a^117: the dual basis is the trace-dual of (1, a^117, ..., a^(7*117)) (131.0-B sec. 4.4.2).
_DUAL_BASIS_ELEMENT_EXP = 117

_N = 255


def _alpha_tables() -> tuple[np.ndarray, np.ndarray]:
    exp = np.zeros(510, dtype=np.int64)
    x = 1
    for i in range(255):
        exp[i] = x
        x <<= 1
        if x & 0x100:
            x ^= RS_FIELD_POLY
    exp[255:] = exp[:255]
    log = np.zeros(256, dtype=np.int64)
    log[exp[:255]] = np.arange(255)
    return exp, log


_A_EXP, _A_LOG = _alpha_tables()


def _amul(x: int, y: int) -> int:
    if x == 0 or y == 0:
        return 0
    return int(_A_EXP[_A_LOG[x] + _A_LOG[y]])


def _beta_tables() -> tuple[np.ndarray, np.ndarray]:
    """exp/log to the base b = a^11; ``exp`` has 512 entries so a sum of two logs needs no modulo."""
    exp = np.zeros(512, dtype=np.int64)
    x = 1
    for i in range(255):
        exp[i] = x
        x = _amul(x, RS_ROOT_ELEMENT)
    exp[255:510] = exp[:255]
    exp[510:] = exp[:2]
    log = np.zeros(256, dtype=np.int64)
    log[exp[:255]] = np.arange(255)
    log[0] = 0  # never used for 0: callers test for zero first
    return exp, log


B_EXP, B_LOG = _beta_tables()


def _bmul(x: int, y: int) -> int:
    if x == 0 or y == 0:
        return 0
    return int(B_EXP[(int(B_LOG[x]) + int(B_LOG[y])) % 255])


def _trace(x: int) -> int:
    t, y = 0, x
    for _ in range(8):
        t ^= y
        y = _amul(y, y)
    return t  # 0 or 1


def dual_basis_tables() -> tuple[np.ndarray, np.ndarray]:
    """Conversions between the conventional basis (1, a, ..., a^7) and the CCSDS dual basis.

    Returns
    -------
    conv_to_dual, dual_to_conv : numpy.ndarray of uint8, shape (256,)
        ``conv_to_dual[u]`` is the transmitted octet (z0 = MSB) of the element with conventional
        bits u7..u0; ``dual_to_conv`` is its inverse.

    Notes
    -----
    With b' = a^117 and Tr(z) = sum_k z^(2^k), the dual basis (l0..l7) satisfies
    Tr(l_i b'^j) = delta_ij, so the dual coordinates of x are z_j = Tr(x b'^j).

    References
    ----------
    CCSDS 131.0-B sec. 4.3.9 and 4.4.2 (Annex F in later issues).
    """
    beta = [int(_A_EXP[(_DUAL_BASIS_ELEMENT_EXP * j) % 255]) for j in range(8)]
    c2d = np.zeros(256, dtype=np.uint8)
    for u in range(256):
        z = 0
        for j in range(8):
            z = (z << 1) | _trace(_amul(u, beta[j]))
        c2d[u] = z
    d2c = np.zeros(256, dtype=np.uint8)
    d2c[c2d] = np.arange(256, dtype=np.uint8)
    return c2d, d2c


CONV_TO_DUAL, DUAL_TO_CONV = dual_basis_tables()
for _t in (CONV_TO_DUAL, DUAL_TO_CONV, B_EXP, B_LOG):
    _t.flags.writeable = False


def rs_k(e: int) -> int:
    """Information symbols per codeword for correction power ``e`` (223 for 16, 239 for 8)."""
    e = _check_e(e)
    return _N - 2 * e


def _check_e(e) -> int:
    return check_int("e", e, allowed=(16, 8))


def _check_interleave(interleave) -> int:
    return check_int("interleave", interleave, 1, 8)


def rs_generator(e: int) -> np.ndarray:
    """Coefficients of g(x), highest degree first, conventional basis (2E + 1 octets, g[0] = 1).

    References
    ----------
    CCSDS 131.0-B sec. 4.3.3: g(x) = prod_{j=128-E}^{127+E} (x - a^(11 j)).
    """
    e = _check_e(e)
    g = [1]
    for j in range(128 - e, 128 + e):
        root = int(B_EXP[j % 255])
        # multiply g by (x + root); g highest degree first
        g = [a ^ _bmul(root, b) for a, b in zip(g + [0], [0] + g)]
    return np.array(g, dtype=np.uint8)


def _gtab(e: int) -> np.ndarray:
    """``gtab[f]``: f * (g(x) - x^(2E)) packed as 2E/8 uint64 words, x^(2E-1) in the top octet of word 0."""
    g = rs_generator(e)
    n_par = 2 * e
    tab = np.zeros((256, n_par // 8), dtype=np.uint64)
    for f in range(256):
        prod = bytes(_bmul(f, int(c)) for c in g[1:])  # coefficients of x^(2E-1) .. x^0
        tab[f] = np.frombuffer(prod, dtype=">u8").astype(np.uint64)
    return tab


_GTAB = {e: _gtab(e) for e in (16, 8)}
for _t in _GTAB.values():
    _t.flags.writeable = False


def rs_fill(data_len: int, e: int = 16, interleave: int = 1) -> int:
    """Virtual fill symbols per codeword, q = k - data_len / I, after checking ``data_len``."""
    e = _check_e(e)
    interleave = _check_interleave(interleave)
    k = _N - 2 * e
    if data_len % interleave or not interleave <= data_len <= k * interleave:
        raise ValueError(
            f"Argument 'data' must have a length that is a multiple of interleave {interleave} in "
            f"{interleave}..{k * interleave}, not {data_len}."
        )
    return k - data_len // interleave


def _parity_bytes(data: np.ndarray, e: int, interleave: int) -> np.ndarray:
    """The 2 E I check octets (dual basis, interleaved) for ``data`` (dual basis)."""
    n_rows = data.shape[0] // interleave
    rem = np.empty((interleave, (2 * e) // 8), dtype=np.uint64)
    rs_remainder_kernel(data, n_rows, interleave, DUAL_TO_CONV, _GTAB[e], rem)
    # rem[c] as big-endian octets is parity symbol j of codeword c at j; interleave symbol-wise
    par_conv = rem.astype(">u8").view(np.uint8).reshape(interleave, 2 * e)
    return CONV_TO_DUAL[par_conv.T.reshape(-1)]


def rs_encode(data, e: int = 16, interleave: int = 1):
    """Append CCSDS Reed-Solomon check symbols to ``data``.

    Parameters
    ----------
    data : bytes-like or uint8 array
        The frame: ``(k - q) I`` octets in transmission order (dual basis, as on the link), where
        ``q >= 0`` virtual fill symbols per codeword are implied by the length.  Its length must be
        a multiple of ``interleave`` and at most ``k I``.
    e : {16, 8}
        Correctable symbols per codeword: RS(255,223) or RS(255,239).
    interleave : int
        Interleave depth I, 1..8.

    Returns
    -------
    bytes or numpy.ndarray of uint8
        The codeblock, ``data`` followed by the 2 E I check octets, symbol-interleaved (codeword c
        owns positions c, c + I, ...).  Same kind as ``data`` (bytes for bytes-like input).

    Notes
    -----
    Dual-basis octets are mapped to the conventional basis, divided by g(x) in a byte-wise
    table-driven LFSR (one 2E-octet table row per symbol, held as 2E/8 64-bit words), and the
    remainder mapped back.  Virtual fill zeros do not change the remainder, so they are skipped.
    Cost: about (2E/8 + 1) word operations per data octet.

    References
    ----------
    CCSDS 131.0-B sec. 4.3 (code, shortening), 4.4 (interleaving, dual basis).
    """
    arr, as_bytes_out = as_bytes("data", data)
    e = _check_e(e)
    interleave = _check_interleave(interleave)
    rs_fill(arr.shape[0], e, interleave)
    out = np.concatenate([arr, _parity_bytes(arr, e, interleave)])
    return out.tobytes() if as_bytes_out else out


@functools.lru_cache(maxsize=64)
def _layout(e: int, interleave: int, length: int) -> tuple[int, int, np.ndarray, np.ndarray]:
    """(fill, data rows, no-erasure tables) for one codeblock shape, after checking the length."""
    n_par = 2 * e
    if length % interleave or not (n_par + 1) * interleave <= length <= _N * interleave:
        raise ValueError(
            f"Argument 'codeblock' must have a length that is a multiple of interleave {interleave} in "
            f"{(n_par + 1) * interleave}..{_N * interleave}, not {length}."
        )
    fill = _N - length // interleave
    era = np.zeros((1, interleave, n_par), dtype=np.int64)
    n_era = np.zeros((1, interleave), dtype=np.int64)
    era.flags.writeable = False
    n_era.flags.writeable = False
    return fill, _N - n_par - fill, era, n_era


def _decode(blocks: np.ndarray, e: int, interleave: int, erasures=None) -> tuple[np.ndarray, np.ndarray]:
    n_par = 2 * e
    length = blocks.shape[1]
    fill, n_rows, era, n_era = _layout(e, interleave, length)
    n_blocks = blocks.shape[0]
    if erasures is not None:
        idx = _check_erasures(erasures, length)
        era = np.zeros((1, interleave, n_par), dtype=np.int64)
        n_era = np.zeros((1, interleave), dtype=np.int64)
        max_degree = 254 - fill
        for c in range(interleave):
            rows = idx[idx % interleave == c] // interleave
            if rows.size > n_par:
                raise ValueError(
                    f"Argument 'erasures' must mark at most 2E = {n_par} octets per codeword, not {rows.size} "
                    f"in codeword {c}."
                )
            n_era[0, c] = rows.size
            era[0, c, : rows.size] = max_degree - rows
    elif n_blocks != 1:
        era = np.zeros((n_blocks, interleave, n_par), dtype=np.int64)
        n_era = np.zeros((n_blocks, interleave), dtype=np.int64)
    # read-only like the cached arrays of _layout: one compiled signature of the kernel, not two (each is about
    # 1.7 s of a cold start)
    era.flags.writeable = False
    n_era.flags.writeable = False
    out = np.empty((n_blocks, n_rows * interleave), dtype=np.uint8)
    corrected = np.empty((n_blocks, interleave), dtype=np.int64)
    rs_decode_kernel(blocks, n_rows, interleave, n_par, 128 - e, fill, era, n_era, DUAL_TO_CONV, CONV_TO_DUAL,
                     _GTAB[e], B_EXP, B_LOG, out, corrected)
    return out, corrected


def _check_erasures(erasures, length: int) -> np.ndarray:
    idx = np.asarray(erasures)
    if idx.ndim != 1 or (idx.size and not np.issubdtype(idx.dtype, np.integer)):
        raise TypeError("Argument 'erasures' must be a 1-D sequence of integer octet indices.")
    idx = idx.astype(np.int64)
    if idx.size and (idx.min() < 0 or idx.max() >= length):
        raise ValueError(
            f"Argument 'erasures' must hold octet indices in 0..{length - 1}, not {idx.min()}..{idx.max()}."
        )
    if np.unique(idx).size != idx.size:
        raise ValueError("Argument 'erasures' must not repeat an index.")
    return idx


def rs_decode(codeblock, e: int = 16, interleave: int = 1, *, erasures=None):
    """Correct a CCSDS Reed-Solomon codeblock and return its data octets.

    Parameters
    ----------
    codeblock : bytes-like or uint8 array
        ``(255 - q) I`` octets in transmission order (dual basis, de-randomized, ASM removed): the
        data followed by the 2 E I check octets, symbol-interleaved.  The virtual fill q per
        codeword is inferred from the length.
    e : {16, 8}
        Correctable symbols per codeword: RS(255,223) or RS(255,239).
    interleave : int
        Interleave depth I, 1..8.
    erasures : sequence of int, optional, keyword-only
        Indices of octets in ``codeblock`` known to be unreliable (e.g. lost lock).  A codeword
        with v errors and f erasures is corrected when 2 v + f <= 2 E.

    Returns
    -------
    data : bytes or numpy.ndarray of uint8
        The ``(k - q) I`` corrected data octets (same kind as ``codeblock``).  A codeword that
        cannot be corrected is left exactly as received.
    corrected : tuple of int
        Per codeword (c = 0..I-1, codeword c owns octets c, c + I, ...): the number of symbols
        changed (0 for a clean codeword; an erased octet that was right is not counted), or -1
        when it is uncorrectable.  Bad data is reported
        here, never raised.

    Notes
    -----
    Per codeword: the remainder r(x) mod g(x) is computed by the encoder's byte-wise LFSR; if it is
    zero the codeword is clean (the fast path, one table row per octet).  Otherwise the 2E
    syndromes are evaluated on the 2E-term remainder, the errata locator found by Berlekamp-Massey
    (seeded with the erasure locator when erasures are given),
    its roots by a Chien search restricted to the transmitted positions (a root in the virtual
    fill means failure), and the values by Forney's formula.  A codeword is declared correctable
    only when the locator of degree L <= E has exactly L distinct roots there, so a corrected
    codeword always has zero syndromes.  Cost: O(n) per clean codeword, O(n E) otherwise.

    References
    ----------
    CCSDS 131.0-B sec. 4; E. R. Berlekamp, Algebraic Coding Theory (1968); J. L. Massey, "Shift-
    register synthesis and BCH decoding", IEEE Trans. IT-15, 1969; G. D. Forney, "On decoding BCH
    codes", IEEE Trans. IT-11, 1965; Lin & Costello, Error Control Coding, 2nd ed., ch. 7.
    """
    arr, as_bytes_out = as_bytes("codeblock", codeblock)
    e = _check_e(e)
    interleave = _check_interleave(interleave)
    data, corrected = _decode(arr.reshape(1, -1), e, interleave, erasures)
    counts = tuple(int(v) for v in corrected[0])
    return (data[0].tobytes() if as_bytes_out else data[0]), counts


def rs_decode_blocks(codeblocks, e: int = 16, interleave: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """:func:`rs_decode` for many codeblocks of one length at once (one compiled call).

    Parameters
    ----------
    codeblocks : numpy.ndarray of uint8, shape (B, L)
        B codeblocks of the same length L, one per row.
    e, interleave : as :func:`rs_decode`.

    Returns
    -------
    data : numpy.ndarray of uint8, shape (B, (k - q) I)
    corrected : numpy.ndarray of int64, shape (B, I)
        As in :func:`rs_decode`, -1 for an uncorrectable codeword.
    """
    if not isinstance(codeblocks, np.ndarray):
        raise TypeError(f"Argument 'codeblocks' must be a uint8 array, not {type(codeblocks).__name__}.")
    if codeblocks.ndim != 2:
        raise ValueError(f"Argument 'codeblocks' must be 2-D (blocks, octets), not {codeblocks.ndim}-D.")
    if codeblocks.dtype != np.uint8:
        raise TypeError(f"Argument 'codeblocks' must be a uint8 array, not dtype {codeblocks.dtype}.")
    e = _check_e(e)
    interleave = _check_interleave(interleave)
    return _decode(np.ascontiguousarray(codeblocks), e, interleave)
