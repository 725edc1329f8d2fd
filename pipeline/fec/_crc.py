"""Frame Error Control Field of TM/AOS frames (CCSDS 132.0-B sec. 4.1.6): CRC-16, poly 0x1021, preset all ones."""

from __future__ import annotations

import numpy as np

from pipeline.fec._args import as_bytes, check_int
from pipeline.fec._kernels import crc16_kernel

__all__ = ["crc16", "CRC16_POLY", "CRC16_INIT"]

#: G(X) = X^16 + X^12 + X^5 + 1 without the X^16 term.
CRC16_POLY = 0x1021
#: L(X) = sum of X^i for i < 16 presets the register to all ones.
CRC16_INIT = 0xFFFF


def _table(poly: int) -> np.ndarray:
    tab = np.zeros(256, dtype=np.int64)
    for b in range(256):
        c = b << 8
        for _ in range(8):
            c = ((c << 1) ^ poly) if c & 0x8000 else (c << 1)
        tab[b] = c & 0xFFFF
    return tab


_TABLE = _table(CRC16_POLY)
_TABLE.flags.writeable = False


def crc16(data, init: int = CRC16_INIT) -> int:
    """CRC-16 of ``data`` as used for the TM/AOS FECF.

    Parameters
    ----------
    data : bytes-like or uint8 array
    init : int
        Register value before the first octet (default 0xFFFF); pass a previous result to continue
        a CRC over data split into pieces.

    Returns
    -------
    int
        The 16-bit CRC: MSB-first, not reflected, no final XOR (CRC-16/IBM-3740, also called
        CRC-16/CCITT-FALSE).  A frame whose last two octets are its FECF (big-endian) has
        ``crc16(frame) == 0``.

    Notes
    -----
    Table-driven, one lookup per octet.

    References
    ----------
    CCSDS 132.0-B sec. 4.1.6.
    """
    arr, _ = as_bytes("data", data)
    init = check_int("init", init, 0, 0xFFFF)
    return int(crc16_kernel(arr, init, _TABLE))
