"""Attached sync markers of CCSDS 131.0-B (sec. 8), as named constants.

Each marker is given as ``bytes``; the first transmitted bit is the most significant bit of the
first octet.  ``*_BITS`` are the same markers as uint8 0/1 arrays in transmission order.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "ASM",
    "ASM_INVERTED",
    "ASM_BITS",
    "TURBO_ASM_R1_2",
    "TURBO_ASM_R1_3",
    "TURBO_ASM_R1_4",
    "TURBO_ASM_R1_6",
    "TURBO_ASMS",
    "marker_bits",
]

#: 32-bit ASM for uncoded, convolutional, Reed-Solomon and concatenated data (131.0-B sec. 8.2).
ASM: bytes = bytes.fromhex("1ACFFC1D")
#: The ASM as received through a 180-degree phase ambiguity (every bit complemented).
ASM_INVERTED: bytes = bytes(b ^ 0xFF for b in ASM)
#: 64-bit turbo marker, rate 1/2 (the first half of the rate-1/4 marker; from memory, not confirmed).
TURBO_ASM_R1_2: bytes = bytes.fromhex("034776C7272895B0")
#: 96-bit turbo marker, rate 1/3 (131.0-B-2 Fig. 8-3).
TURBO_ASM_R1_3: bytes = bytes.fromhex("25D5C0CE8990F6C9461BF79C")
#: 128-bit turbo marker, rate 1/4 (131.0-B-2 Fig. 8-4).
TURBO_ASM_R1_4: bytes = bytes.fromhex("034776C7272895B0FCB88938D8D76A4F")
#: 192-bit turbo marker, rate 1/6 (131.0-B-2 Fig. 8-5).
TURBO_ASM_R1_6: bytes = bytes.fromhex("25D5C0CE8990F6C9461BF79CDA2A3F31766F0936B9E40863")
#: Turbo markers by nominal code rate.
TURBO_ASMS: dict[str, bytes] = {
    "1/2": TURBO_ASM_R1_2,
    "1/3": TURBO_ASM_R1_3,
    "1/4": TURBO_ASM_R1_4,
    "1/6": TURBO_ASM_R1_6,
}


def marker_bits(marker: bytes) -> np.ndarray:
    """The bits of ``marker`` in transmission order (MSB of the first octet first), uint8 0/1."""
    if not isinstance(marker, (bytes, bytearray)):
        raise TypeError(f"Argument 'marker' must be bytes, not {type(marker).__name__}.")
    return np.unpackbits(np.frombuffer(bytes(marker), dtype=np.uint8))


#: :data:`ASM` as 32 bits in transmission order.
ASM_BITS: np.ndarray = marker_bits(ASM)
ASM_BITS.flags.writeable = False
