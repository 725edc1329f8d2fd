"""CCSDS 131.0-B convolutional code (K=7, G1=171, G2=133 octal) and its punctured rates.

G2 inversion: the rate-1/2 code inverts the G2 output (131.0-B sec. 3.3: "Symbol inversion: On
output path of G2"); the punctured codes of sec. 3.4 (2/3, 3/4, 5/6, 7/8) use the same two
generators without inversion (the punctured encoder of CCSDS 130.1-G sec. 4.3, Fig. 4-2, has no
inverter).  :func:`g2_inverted_default` gives that rule; every encoder and decoder here takes a
``g2_inverted`` argument that overrides it (None = the standard's rule) for equipment that differs.
"""

from __future__ import annotations

import numpy as np

from pipeline.fec._args import Rate, as_bits, check_int, check_rate
from pipeline.fec._kernels import conv_encode_kernel

__all__ = [
    "G1_OCTAL",
    "G2_OCTAL",
    "CONSTRAINT_LENGTH",
    "g2_inverted_default",
    "resolve_g2_inverted",
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


def g2_inverted_default(rate: Rate) -> bool:
    """Whether the CCSDS code of ``rate`` inverts the G2 output: True at rate 1/2 only.

    Parameters
    ----------
    rate : {"1/2", "2/3", "3/4", "5/6", "7/8"}

    Returns
    -------
    bool

    References
    ----------
    CCSDS 131.0-B sec. 3.3 (rate 1/2: "Symbol inversion: On output path of G2"); sec. 3.4 and
    CCSDS 130.1-G sec. 4.3, Fig. 4-2 (punctured codes: no inverter).

    Examples
    --------
    >>> g2_inverted_default("1/2"), g2_inverted_default("7/8")
    (True, False)
    """
    return check_rate(rate) == "1/2"


def resolve_g2_inverted(rate: Rate, g2_inverted: bool | None) -> bool:
    """``g2_inverted`` checked, or the standard's rule for ``rate`` when it is None."""
    if g2_inverted is None:
        return g2_inverted_default(rate)
    if not isinstance(g2_inverted, (bool, np.bool_)):
        raise TypeError(f"Argument 'g2_inverted' must be True, False or None, not {g2_inverted!r}.")
    return bool(g2_inverted)


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
    g2_inverted : bool or None, keyword-only
        Invert the G2 output; None (default) follows the standard: inverted at rate 1/2 only
        (:func:`g2_inverted_default`).

    Attributes
    ----------
    state : int
        Register contents after the last bit processed.
    phase : int
        Column of the puncturing pattern the next bit uses.

    Notes
    -----
    Register ``[input, D1..D6]``; C1 = parity of the taps of G1 = 1111001, C2 = parity of the
    taps of G2 = 1011011, complemented when ``g2_inverted``; C1 is sent first.  Cost: one
    table-free parity per output symbol.

    References
    ----------
    CCSDS 131.0-B sec. 3.3 (Fig. 3-1, G2 inverted), sec. 3.4 (puncturing, no inversion);
    CCSDS 130.1-G sec. 4.3, Fig. 4-2.

    Examples
    --------
    >>> ConvEncoder(rate="1/2").process([0, 0, 0, 0]).tolist()  # the inverted G2 gives 0101...
    [0, 1, 0, 1, 0, 1, 0, 1]
    >>> ConvEncoder(rate="2/3").process([0, 0, 0, 0]).tolist()  # punctured: no inversion
    [0, 0, 0, 0, 0, 0]
    """

    def __init__(self, *, rate: Rate = "1/2", initial_state: int = 0, g2_inverted: bool | None = None):
        self.rate = check_rate(rate)
        self.initial_state = check_int("initial_state", initial_state, 0, 63)
        self.g2_inverted = resolve_g2_inverted(self.rate, g2_inverted)
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
            b, self.state, self.phase, _G1_MASK, _G2_MASK, int(self.g2_inverted), self._keep1, self._keep2, out
        )
        self.state, self.phase = int(state), int(phase)
        return out[:n]


def conv_encode(bits, rate: Rate = "1/2", *, g2_inverted: bool | None = None) -> np.ndarray:
    """Convolutionally encode ``bits`` with the CCSDS K=7 code from the all-zero state.

    Parameters
    ----------
    bits : array_like of 0/1 (uint8, bool or integer), 1-D
        Information bits in transmission order.
    rate : {"1/2", "2/3", "3/4", "5/6", "7/8"}
        "1/2" is the basic code; the others puncture it with the CCSDS patterns.
    g2_inverted : bool or None, keyword-only
        Invert the G2 output; None (default): at rate 1/2 only, as the standard says.

    Returns
    -------
    numpy.ndarray of uint8
        Channel bits, C1 first; ``2 n`` of them at rate 1/2, ``n / r`` for punctured rates when
        ``n`` is a multiple of the period.  No tail bits are added.

    See Also
    --------
    ConvEncoder : the same with state kept between calls.

    References
    ----------
    CCSDS 131.0-B sec. 3.3, sec. 3.4; CCSDS 130.1-G sec. 4.3, Fig. 4-2.

    Examples
    --------
    >>> conv_encode([1, 0, 0, 0, 0, 0, 0], "1/2", g2_inverted=False).tolist()  # the impulse response
    [1, 1, 1, 0, 1, 1, 1, 1, 0, 0, 0, 1, 1, 1]
    """
    return ConvEncoder(rate=rate, g2_inverted=g2_inverted).process(bits)


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
    n_bits = check_int("n_bits", n_bits, 0)
    pat = puncture_pattern(rate)
    period = pat.shape[1]
    phase = check_int("phase", phase, 0, period - 1)
    per_col = pat.sum(axis=0).astype(np.int64)
    counts = per_col[(np.arange(n_bits) + phase) % period]
    idx = np.zeros(n_bits, dtype=np.int64)
    if n_bits > 1:
        np.cumsum(counts[:-1], out=idx[1:])
    return idx
