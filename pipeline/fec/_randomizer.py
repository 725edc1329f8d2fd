"""TM pseudo-randomizer of CCSDS 131.0-B sec. 9 (h(x) = x^8 + x^7 + x^5 + x^3 + 1, all-ones seed)."""

from __future__ import annotations

import numpy as np

from pipeline.fec._args import check_int
from pipeline.fec._kernels import pn_bits_kernel

__all__ = ["pn_sequence", "PN_PERIOD_BITS"]

#: The sequence repeats every 255 bits (and so every 255 octets).
PN_PERIOD_BITS = 255


def _one_period() -> np.ndarray:
    bits = np.empty(8 * PN_PERIOD_BITS, dtype=np.uint8)
    pn_bits_kernel(bits)
    return np.packbits(bits)


_PERIOD_BYTES = _one_period()
_PERIOD_BYTES.flags.writeable = False


def pn_sequence(n: int) -> np.ndarray:
    """The first ``n`` octets of the TM pseudo-random sequence.

    Randomizing and de-randomizing are the same operation: ``data ^ pn_sequence(len(data))``,
    applied to the codeblock (or frame) after the ASM; the generator restarts at every ASM.

    Parameters
    ----------
    n : int
        Number of octets, >= 0.

    Returns
    -------
    numpy.ndarray of uint8, shape (n,)
        MSB of octet 0 is the first bit of the sequence; starts ``FF 48 0E C0 9A``.

    Notes
    -----
    a[k] = a[k-1] XOR a[k-3] XOR a[k-5] XOR a[k-8], a[0..7] = 1.  The 255-octet period is
    generated once at import and tiled, so the cost is one copy of n octets.

    References
    ----------
    CCSDS 131.0-B sec. 9 (sec. 10 in later issues); CCSDS 130.1-G-1 sec. 8.2.
    """
    n = check_int("n", n, 0)
    reps = -(-n // PN_PERIOD_BITS)
    return np.tile(_PERIOD_BYTES, reps)[:n]
