"""AOS Frame Header Error Control: a (10,6) Reed-Solomon code over GF(16).

The six information symbols are the four-bit nibbles of the first two header octets (version,
spacecraft id, virtual channel id) and of the signalling field, most significant nibble first;
the four check symbols are the 16-bit FHEC.  The virtual channel frame count is not protected.

Code definition (from memory, not confirmed against CCSDS 732.0-B; see
../shared/REFERENCES.md sec. 4 and sec. 12): field polynomial ``x^4 + x + 1``, primitive element
``alpha = x``, generator ``g(x) = (x + alpha^6)(x + alpha^7)(x + alpha^8)(x + alpha^9)``,
systematic encoding ``parity = m(x) x^4 mod g(x)``.

This module only *checks* the FHEC (syndrome zero or not).  It does not correct: a header that
fails is reported as ``bad_header``; on a Reed-Solomon-coded link the codeblock decoder has
already corrected the header.
"""

from __future__ import annotations

__all__ = ["fhec_generator", "fhec_parity", "fhec_check", "GF16_EXP", "GF16_LOG"]

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
