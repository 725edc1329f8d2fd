"""CCSDS 131.0-B convolutional code (K=7, r=1/2, G1=171, G2=133 octal, G2 inverted) and its punctured rates."""

from __future__ import annotations

import numpy as np

from pipeline.fec._args import Rate, as_bits, check_int, check_rate
from pipeline.fec._kernels import conv_encode_kernel

__all__ = [
    "G1_OCTAL",
    "G2_OCTAL",
    "CONSTRAINT_LENGTH",
    "puncture_pattern",
    "conv_encode",
    "ConvEncoder",
    "conv_bit_symbol_index",
    "conv_output_length",
]

#: Connection vectors as printed in 131.0-B sec. 3.3.1: the leftmost bit taps the input.
G1_OCTAL = 0o171
G2_OCTAL = 0o133
CONSTRAINT_LENGTH = 7

# The encoder register is (state << 1) | input: bit 0 = input, bit i = D_i.  The printed vectors
# read input..D6 left to right, so they are reversed into these masks.
_G1_MASK = int(f"{G1_OCTAL:07b}"[::-1], 2)  # 0x4F
_G2_MASK = int(f"{G2_OCTAL:07b}"[::-1], 2)  # 0x6D

# 131.0-B Table 3-2 (patterns also in 130.1-G-1 Table 4-1); row 0 = C1, row 1 = C2.
_PATTERNS: dict[str, tuple[str, str]] = {
    "1/2": ("1", "1"),
    "2/3": ("10", "11"),
    "3/4": ("101", "110"),
    "5/6": ("10101", "11010"),
    "7/8": ("1000101", "1111010"),
}


def puncture_pattern(rate: Rate) -> np.ndarray:
    """The puncturing matrix of a CCSDS convolutional code rate.

    Parameters
    ----------
    rate : {"1/2", "2/3", "3/4", "5/6", "7/8"}

    Returns
    -------
    numpy.ndarray of uint8, shape (2, P)
        Row 0 is the C1 (G1) pattern, row 1 the C2 (G2) pattern over one period of P information
        bits; 1 means the symbol is transmitted.  Symbols go out column by column, C1 before C2,
        e.g. rate 3/4: C1(1) C2(1) C2(2) C1(3).

    References
    ----------
    CCSDS 131.0-B sec. 3.4, Table 3-2; CCSDS 130.1-G-1 Table 4-1.
    """
    rate = check_rate(rate)
    c1, c2 = _PATTERNS[rate]
    pat = np.array([[int(ch) for ch in c1], [int(ch) for ch in c2]], dtype=np.uint8)
    pat.flags.writeable = False
    return pat


def _rate_tables(rate: str) -> tuple[np.ndarray, np.ndarray]:
    pat = puncture_pattern(rate)
    return np.ascontiguousarray(pat[0]), np.ascontiguousarray(pat[1])


def conv_output_length(n_bits: int, rate: Rate, phase: int = 0) -> int:
    """Channel symbols produced by ``n_bits`` information bits starting at pattern column ``phase``."""
    rate = check_rate(rate)
    pat = puncture_pattern(rate)
    period = pat.shape[1]
    per_col = pat.sum(axis=0).astype(np.int64)
    full, rest = divmod(int(n_bits), period)
    cols = (np.arange(rest) + phase) % period
    return int(full * per_col.sum() + per_col[cols].sum())


class ConvEncoder:
    """Streaming CCSDS convolutional encoder (state carried between calls).

    Parameters
    ----------
    rate : {"1/2", "2/3", "3/4", "5/6", "7/8"}, keyword-only
    initial_state : int, keyword-only
        The six register bits before the first input bit (bit 0 = most recent), 0..63; 0 by default.

    Attributes
    ----------
    state : int
        Register contents after the last bit processed.
    phase : int
        Column of the puncturing pattern the next bit uses.

    Notes
    -----
    Register ``[input, D1..D6]``; C1 = parity of the taps of G1 = 1111001, C2 = NOT parity of the
    taps of G2 = 1011011; C1 is sent first.  Cost: one table-free parity per output symbol.

    References
    ----------
    CCSDS 131.0-B sec. 3.3 (Fig. 3-1), sec. 3.4 (puncturing).
    """

    def __init__(self, *, rate: Rate = "1/2", initial_state: int = 0):
        self.rate = check_rate(rate)
        self.initial_state = check_int("initial_state", initial_state, "0..63", lambda v: 0 <= v <= 63)
        self._keep1, self._keep2 = _rate_tables(self.rate)
        self.reset()

    def reset(self) -> None:
        """Return to the initial register state and pattern column 0."""
        self.state = self.initial_state
        self.phase = 0

    def process(self, bits) -> np.ndarray:
        """Encode information bits (uint8/bool/int 0/1) into channel bits (uint8 0/1) in transmission order."""
        b = as_bits("bits", bits)
        out = np.empty(2 * b.shape[0], dtype=np.uint8)
        n, state, phase = conv_encode_kernel(
            b, self.state, self.phase, _G1_MASK, _G2_MASK, 1, self._keep1, self._keep2, out
        )
        self.state, self.phase = int(state), int(phase)
        return out[:n]


def conv_encode(bits, rate: Rate = "1/2") -> np.ndarray:
    """Convolutionally encode ``bits`` with the CCSDS K=7 code from the all-zero state.

    Parameters
    ----------
    bits : array_like of 0/1 (uint8, bool or integer), 1-D
        Information bits in transmission order.
    rate : {"1/2", "2/3", "3/4", "5/6", "7/8"}
        "1/2" is the basic code; the others puncture it with the CCSDS patterns.

    Returns
    -------
    numpy.ndarray of uint8
        Channel bits, C1 first, G2 output inverted; ``2 n`` of them at rate 1/2, ``n / r`` for
        punctured rates when ``n`` is a multiple of the period.  No tail bits are added.

    See Also
    --------
    ConvEncoder : the same with state kept between calls.

    References
    ----------
    CCSDS 131.0-B sec. 3.3, sec. 3.4.
    """
    return ConvEncoder(rate=rate).process(bits)


def conv_bit_symbol_index(n_bits: int, rate: Rate = "1/2", *, phase: int = 0) -> np.ndarray:
    """For each information bit k, the index of the first channel symbol of its branch.

    Parameters
    ----------
    n_bits : int
        Number of information bits.
    rate : {"1/2", "2/3", "3/4", "5/6", "7/8"}
    phase : int, keyword-only
        Puncturing-pattern column of bit 0 (0 when the stream starts at a period boundary, as for
        :func:`conv_encode` and :class:`ViterbiDecoder`), 0..P-1.

    Returns
    -------
    numpy.ndarray of int64, shape (n_bits,)
        ``2 k`` at rate 1/2; for punctured rates the index in the transmitted (punctured) stream of
        C1(k) if it is sent, else of C2(k).  Every CCSDS pattern sends at least one symbol per bit.

    Notes
    -----
    An exclusive cumulative sum of the symbols sent per pattern column.  Cost O(n_bits).
    """
    rate = check_rate(rate)
    n_bits = check_int("n_bits", n_bits, ">= 0", lambda v: v >= 0)
    pat = puncture_pattern(rate)
    period = pat.shape[1]
    phase = check_int("phase", phase, f"0..{period - 1}", lambda v: 0 <= v < period)
    per_col = pat.sum(axis=0).astype(np.int64)
    counts = per_col[(np.arange(n_bits) + phase) % period]
    idx = np.zeros(n_bits, dtype=np.int64)
    if n_bits > 1:
        np.cumsum(counts[:-1], out=idx[1:])
    return idx
