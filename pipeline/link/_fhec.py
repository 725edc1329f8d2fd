"""AOS Frame Header Error Control: a (10,6) Reed-Solomon code over GF(16).

The six information symbols are the four-bit nibbles of the first two header octets (version,
spacecraft id, virtual channel id) and of the signalling field, most significant nibble first;
the four check symbols are the 16-bit FHEC.  The virtual channel frame count is not protected.

Code definition (from memory, not confirmed against CCSDS 732.0-B; see
../shared/REFERENCES.md sec. 4 and sec. 12): field polynomial ``x^4 + x + 1``, primitive element
``alpha = x``, generator ``g(x) = (x + alpha^6)(x + alpha^7)(x + alpha^8)(x + alpha^9)``,
systematic encoding ``parity = m(x) x^4 mod g(x)``.

The code has minimum distance 5, so it corrects up to two erroneous symbols (nibbles) among the
ten; :func:`fhec_decode` does that before any header field is used (732.0-B sec. 4.1.2.6, clause
from memory, not confirmed).  A header with more errors is reported uncorrectable (or, rarely,
lies within distance 2 of another codeword and is "corrected" to it: bounded-distance decoding).
"""

from __future__ import annotations

import functools
from typing import NamedTuple

__all__ = ["fhec_generator", "fhec_parity", "fhec_check", "fhec_decode", "FhecResult", "GF16_EXP", "GF16_LOG"]

_FIELD_POLY = 0b10011  # x^4 + x + 1


def _tables() -> tuple[tuple[int, ...], tuple[int, ...]]:
    exp = [0] * 30
    log = [0] * 16
    x = 1
    for i in range(15):
        exp[i] = x
        log[x] = i
        x <<= 1
        if x & 0x10:
            x ^= _FIELD_POLY
    for i in range(15, 30):
        exp[i] = exp[i - 15]
    return tuple(exp), tuple(log)


GF16_EXP, GF16_LOG = _tables()


def _mul(a: int, b: int) -> int:
    if a == 0 or b == 0:
        return 0
    return GF16_EXP[GF16_LOG[a] + GF16_LOG[b]]


def fhec_generator() -> tuple[int, ...]:
    """Coefficients of ``g(x)``, highest degree first (monic, length 5)."""
    g = [1]
    for root_log in (6, 7, 8, 9):
        root = GF16_EXP[root_log]
        nxt = g + [0]
        for i, c in enumerate(g):  # multiply by (x + root): add root * g shifted down by one
            nxt[i + 1] ^= _mul(c, root)
        g = nxt
    return tuple(g)


_GEN = fhec_generator()


def _nibbles(header: bytes) -> list[int]:
    return [header[0] >> 4, header[0] & 0xF, header[1] >> 4, header[1] & 0xF, header[5] >> 4, header[5] & 0xF]


def fhec_parity(header: bytes) -> int:
    """The 16-bit FHEC of a 6-octet AOS primary header (octets 0, 1 and 5 are protected).

    Notes
    -----
    Long division of ``m(x) x^4`` by the monic ``g(x)`` over GF(16), 6 steps of 4 products.
    """
    reg = _nibbles(header) + [0, 0, 0, 0]
    for i in range(6):
        coef = reg[i]
        if coef:
            for j in range(1, 5):
                reg[i + j] ^= _mul(coef, _GEN[j])
    p = reg[6:]
    return (p[0] << 12) | (p[1] << 8) | (p[2] << 4) | p[3]


def fhec_check(header: bytes, fhec: int) -> bool:
    """True when ``fhec`` is the FHEC of the 6-octet header ``header`` (a zero syndrome)."""
    return fhec_parity(header) == fhec


def _syndrome(nibbles: list[int]) -> int:
    """Remainder syndrome of a 10-nibble word (6 information, 4 check): parity(info) XOR check."""
    header = bytes([(nibbles[0] << 4) | nibbles[1], (nibbles[2] << 4) | nibbles[3], 0, 0, 0,
                    (nibbles[4] << 4) | nibbles[5]])
    check = (nibbles[6] << 12) | (nibbles[7] << 8) | (nibbles[8] << 4) | nibbles[9]
    return fhec_parity(header) ^ check


@functools.cache
def _error_table() -> dict[int, tuple[tuple[int, int], ...]]:
    """Syndrome -> error pattern ((position, value), ...) for every pattern of one or two nibbles.

    The code is linear, so the syndrome of an error pattern is the XOR of the syndromes of its
    single-nibble parts; with minimum distance 5 no two patterns of weight <= 2 share a syndrome.
    10 x 15 single and 45 x 225 double patterns: built once, on first use.
    """
    single = {}
    for pos in range(10):
        for val in range(1, 16):
            word = [0] * 10
            word[pos] = val
            single[(pos, val)] = _syndrome(word)
    table: dict[int, tuple[tuple[int, int], ...]] = {}
    for key, syn in single.items():
        table[syn] = (key,)
    items = list(single.items())
    for i, ((p1, v1), s1) in enumerate(items):
        for (p2, v2), s2 in items[i + 1:]:
            if p2 > p1:
                table[s1 ^ s2] = ((p1, v1), (p2, v2))
    return table


class FhecResult(NamedTuple):
    """What :func:`fhec_decode` returns."""

    header: bytes
    """The 6-octet header with octets 0, 1 and 5 corrected (octets 2-4 as received)."""
    fhec: int
    """The corrected 16-bit FHEC."""
    corrected: int
    """Nibbles corrected (0, 1 or 2), or -1 when uncorrectable (header and FHEC left as received)."""


def fhec_decode(header: bytes, fhec: int) -> FhecResult:
    """Decode the FHEC: correct up to two nibble errors in the protected header fields and the FHEC.

    Parameters
    ----------
    header : bytes
        The first 6 octets of the AOS primary header (octets 0, 1 and 5 are protected).
    fhec : int
        The received 16-bit frame header error control field.

    Returns
    -------
    FhecResult
        ``(header, fhec, corrected)``: the corrected header and FHEC and the number of nibbles
        corrected, or the input unchanged with ``corrected = -1`` when more than two nibbles are
        wrong (no codeword within distance 2).

    Notes
    -----
    Syndrome decoding: ``s = parity(information nibbles) XOR fhec`` (16 bits); ``s = 0`` is a
    codeword; otherwise ``s`` is looked up in the table of the syndromes of every error pattern of
    weight 1 or 2 (10,275 patterns, built once).  Cost: one parity computation and a dict lookup.

    References
    ----------
    CCSDS 732.0-B sec. 4.1.2.6 (RS(10,6) over GF(16); code details from memory, not confirmed).

    Examples
    --------
    >>> h = bytes.fromhex("6aea12345600")
    >>> good = fhec_parity(h)
    >>> bad = bytes([h[0] ^ 0x40]) + h[1:]           # one nibble of the spacecraft id hit
    >>> res = fhec_decode(bad, good)
    >>> res.header == h, res.corrected
    (True, 1)
    """
    if len(header) < 6:
        raise ValueError(f"Argument 'header' must be 6 octets, not {len(header)}.")
    header = bytes(header[:6])
    fhec = int(fhec) & 0xFFFF
    syn = fhec_parity(header) ^ fhec
    if syn == 0:
        return FhecResult(header, fhec, 0)
    pattern = _error_table().get(syn)
    if pattern is None:
        return FhecResult(header, fhec, -1)
    nib = _nibbles(header) + [(fhec >> 12) & 0xF, (fhec >> 8) & 0xF, (fhec >> 4) & 0xF, fhec & 0xF]
    for pos, val in pattern:
        nib[pos] ^= val
    fixed = bytes([(nib[0] << 4) | nib[1], (nib[2] << 4) | nib[3]]) + header[2:5] + bytes([(nib[4] << 4) | nib[5]])
    return FhecResult(fixed, (nib[6] << 12) | (nib[7] << 8) | (nib[8] << 4) | nib[9], len(pattern))
