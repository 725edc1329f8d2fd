"""Soft-decision Viterbi decoder for the CCSDS K=7 r=1/2 code and its punctured rates."""

from __future__ import annotations

import functools

import numpy as np

from pipeline.fec._args import Rate, as_soft, check_int, check_rate
from pipeline.fec._conv import _G1_MASK, _G2_MASK, puncture_pattern, resolve_g2_inverted
from pipeline.fec._kernels import viterbi_block_kernel

__all__ = ["ViterbiDecoder", "viterbi_decode", "DEFAULT_TRACEBACK_DEPTH"]

#: Survivor-path depth per rate, in trellis steps.  About 5 K suffices at rate 1/2; punctured
#: codes have weaker short paths and need more (common practice, no published source).
DEFAULT_TRACEBACK_DEPTH: dict[str, int] = {"1/2": 96, "2/3": 128, "3/4": 160, "5/6": 192, "7/8": 224}

# Mean soft magnitude after scaling: int8 levels of ~1/32 of the mean keep the quantisation loss
# negligible and clip only beyond 4x the mean (common practice, no published source).
_QUANT_LEVEL = 32.0
# Trellis steps per quantisation/ACS block (about; rounded down to whole puncturing periods): the
# packed decisions of a block (128 KiB) stay in L2 for the traceback, and per-block Python costs
# are spread over many bits.
_BLOCK_STEPS = 16384


def _parity(x: int) -> int:
    return bin(x).count("1") & 1


def _butterfly_signs(g2_inverted: bool) -> tuple[np.ndarray, np.ndarray]:
    """Expected signs (+1 = bit 0) of C1 and C2 on the branch j -> 2j, register value 2j."""
    s1 = np.empty(32, dtype=np.int16)
    s2 = np.empty(32, dtype=np.int16)
    for j in range(32):
        reg = 2 * j
        c1 = _parity(reg & _G1_MASK)
        c2 = _parity(reg & _G2_MASK) ^ int(g2_inverted)  # 131.0-B sec. 3.3: inverted at rate 1/2 only
        s1[j] = 1 - 2 * c1
        s2[j] = 1 - 2 * c2
    return s1, s2


def _sign_tables(g2_inverted: bool) -> np.ndarray:
    """The sign tables in the order viterbi_acs_kernel reads them (both steps of a radix-4 pair)."""
    s1, s2 = _butterfly_signs(g2_inverted)
    tables = np.concatenate([s1, s2, s1[0::2], s1[1::2], s2[0::2], s2[1::2]])
    tables.flags.writeable = False
    return tables


# Entries of the ACS work array (int16): 64 metrics, 64 scratch, then the sign tables.
_WORK_SIZE = 256
_SIGN_TABLES = {inv: _sign_tables(inv) for inv in (False, True)}
# rate 1/2: nothing to depuncture
_NO_POSITIONS = np.zeros(0, dtype=np.int64)
_NO_POSITIONS.flags.writeable = False
# nothing to prefetch; writable like the slices passed otherwise, so the kernel has one signature
_NO_SOFT = np.zeros(0, dtype=np.float32)


def _new_work(g2_inverted: bool = True) -> np.ndarray:
    """A zeroed ACS work array with the sign tables of the code (G2 inverted or not) in place."""
    work = np.zeros(_WORK_SIZE, dtype=np.int16)
    work[128:] = _SIGN_TABLES[bool(g2_inverted)]
    return work


@functools.cache
def _rate_layout(rate: str) -> tuple[int, int, np.ndarray, np.ndarray]:
    """Block geometry of a rate: (symbols per block, steps per block, mother position of each
    transmitted symbol of a block, steps completed by the first i symbols for i = 0..block)."""
    pat = puncture_pattern(rate)
    period = pat.shape[1]
    kept = int(pat.sum())
    # mother-code position (2 * column + row) of each transmitted symbol in one period
    order = [2 * c + r for c in range(period) for r in range(2) if pat[r, c]]
    n_periods = _BLOCK_STEPS // period
    block_symbols = n_periods * kept
    block_steps = n_periods * period
    positions = (
        np.asarray(order, dtype=np.int64)[None, :] + 2 * period * np.arange(n_periods, dtype=np.int64)[:, None]
    ).reshape(-1)
    # column c is complete once its last symbol (cumulative count - 1) has arrived
    per_col = np.resize(pat.sum(axis=0).astype(np.int64), block_steps)
    last_symbol_of_col = np.cumsum(per_col) - 1
    steps_after = np.searchsorted(last_symbol_of_col, np.arange(block_symbols + 1), side="left")
    for arr in (positions, steps_after):
        arr.flags.writeable = False
    return block_symbols, block_steps, positions, steps_after


class ViterbiDecoder:
    """Streaming maximum-likelihood decoder of the CCSDS convolutional code.

    Parameters
    ----------
    rate : {"1/2", "2/3", "3/4", "5/6", "7/8"}, keyword-only
    traceback_depth : int, optional, keyword-only
        Survivor depth in trellis steps (32..4096); default :data:`DEFAULT_TRACEBACK_DEPTH`.
    initial_state : int or None, keyword-only
        The encoder state before the first symbol, if known (0..63, as :class:`ConvEncoder`);
        None (default) starts with all states equally likely, as when joining a stream.
    g2_inverted : bool or None, keyword-only
        Whether the transmitter inverts the G2 output; None (default) follows the standard:
        at rate 1/2 only (:func:`pipeline.fec.g2_inverted_default`).

    Attributes
    ----------
    symbols_in : int
        Channel symbols received since the last :meth:`reset` (kept across :meth:`flush`).
    bits_out : int
        Decoded bits returned since the last :meth:`reset` (kept across :meth:`flush`).

    Notes
    -----
    Input: one float per channel symbol in transmission order, positive = bit 0, any scale, 0.0 =
    erasure.  The stream is cut into fixed blocks of about 16384 trellis steps counted from the
    reset (whole puncturing periods); each block is scaled so its mean magnitude is 32, rounded to
    int8 and depunctured (punctured positions become erasures).  Since the blocks do not depend on
    how the input is chunked, the output is the same for any chunking.  The 64-state trellis is
    searched with correlation metrics in int16 (add-compare-select, 32 butterflies per step as
    32-lane vector operations with the metrics in registers, written as LLVM vector IR; ties
    keep the lower predecessor);
    after each block the survivor of the best state is traced back and all but the last
    ``traceback_depth`` bits are released.  ``flush`` releases the rest by tracing back from the
    best final state (the code is not terminated).  Each block is one kernel call that releases
    the GIL, so decoders in different threads run in parallel.  Cost: O(64) per information bit
    plus O(1 + depth/block) per bit for the traceback; memory O(block + depth).

    Latency: a bit is returned once its block is complete and ``traceback_depth`` later steps
    have been decoded, so ``process`` may return nothing for up to one block plus the depth.
    Bit k of the output (counted from the reset) is branch k of the stream, whose first channel
    symbol is ``conv_bit_symbol_index(k + 1, rate)[k]`` counted from the reset: that is how
    positions are carried through the decoder.  The first symbol after a reset must be the
    first symbol of a puncturing period (C1 of column 0); other alignments are found upstream.

    References
    ----------
    CCSDS 131.0-B sec. 3 (code, puncturing; G2 inverted at rate 1/2 only, sec. 3.3 and 3.4);
    CCSDS 130.1-G sec. 4.3, Fig. 4-2; A. J. Viterbi, "Error bounds for convolutional codes
    and an asymptotically optimum decoding algorithm", IEEE Trans. IT-13, 1967; Lin & Costello,
    Error Control Coding, 2nd ed., ch. 12.
    """

    def __init__(self, *, rate: Rate = "1/2", traceback_depth: int | None = None, initial_state: int | None = None,
                 g2_inverted: bool | None = None):
        self.rate = check_rate(rate)
        self.g2_inverted = resolve_g2_inverted(self.rate, g2_inverted)
        if traceback_depth is None:
            traceback_depth = DEFAULT_TRACEBACK_DEPTH[self.rate]
        self.traceback_depth = check_int("traceback_depth", traceback_depth, 32, 4096)
        if initial_state is not None:
            initial_state = check_int("initial_state", initial_state, 0, 63, or_none=True)
        self.initial_state = initial_state
        layout = _rate_layout(self.rate)
        self._block_symbols, self._block_steps, self._positions, self._steps_after = layout
        self._punctured = self.rate != "1/2"
        # Work buffers; every entry is written before it is read, so np.empty suffices.
        self._quant = np.empty(self._block_symbols, dtype=np.int8)
        self._mother = np.empty(2 * self._block_steps, dtype=np.int8)
        self._words = np.empty(self._block_steps + self.traceback_depth, dtype=np.uint64)
        self._pending = np.empty(self._block_symbols, dtype=np.float32)
        self._work = _new_work(self.g2_inverted)  # path metrics in [0:64], see viterbi_acs_kernel
        self.reset()

    def reset(self) -> None:
        """Forget the stream: clear metrics, survivors and the pending input."""
        pm = self._work[:64]
        pm[:] = 0
        if self.initial_state is not None:
            pm[:] = -8192  # far below any reachable spread, so only the known state survives
            pm[self.initial_state] = 0
        self._rows = 0
        self._fill = 0  # symbols waiting in _pending for the current block
        self.symbols_in = 0
        self.bits_out = 0

    # ---- internals ---------------------------------------------------------------------------
    def _run_block(self, soft: np.ndarray, final: bool, out: np.ndarray, at: int, ahead: np.ndarray = _NO_SOFT) -> int:
        """Decode one block (or the final partial one); write the released bits to ``out[at:]``.

        ``ahead`` is the input that follows, if already at hand: the kernel prefetches it.
        """
        n_sym = soft.shape[0]
        n_steps = int(self._steps_after[n_sym]) if n_sym < self._block_symbols else self._block_steps
        rows = self._rows + n_steps
        keep = 0 if final else min(self.traceback_depth, rows)
        positions = self._positions if self._punctured else _NO_POSITIONS
        n_emit = viterbi_block_kernel(soft, _QUANT_LEVEL, self._quant, positions, self._mother, n_steps, self._work,
                                      self._words, self._rows, keep, out[at:], ahead)
        self._rows = keep if n_emit > 0 else rows
        return int(n_emit)

    def _feed(self, soft: np.ndarray, final: bool) -> np.ndarray:
        """Decode the blocks ``soft`` completes (and, if ``final``, the rest) into one output array."""
        B = self._block_symbols
        n = soft.shape[0]
        n_blocks = (self._fill + n) // B
        # at most: the survivors held back so far, every step of the completed blocks, one partial block
        out = np.empty(self._rows + (n_blocks + final) * self._block_steps, dtype=np.uint8)
        n_out = 0
        pos = 0
        while pos < n:
            if self._fill == 0 and n - pos >= B:
                ahead = soft[pos + B : pos + 2 * B]
                n_out += self._run_block(soft[pos : pos + B], False, out, n_out, ahead)  # whole block: no copy
                pos += B
                continue
            take = min(B - self._fill, n - pos)
            self._pending[self._fill : self._fill + take] = soft[pos : pos + take]
            self._fill += take
            pos += take
            if self._fill == B:
                n_out += self._run_block(self._pending, False, out, n_out, soft[pos : pos + B])
                self._fill = 0
        if final:
            n_out += self._run_block(self._pending[: self._fill], True, out, n_out)
        return out[:n_out]

    # ---- public ------------------------------------------------------------------------------
    def process(self, soft) -> np.ndarray:
        """Feed channel soft symbols; return the information bits (uint8 0/1) now decided."""
        soft = as_soft("soft", soft)
        self.symbols_in += soft.shape[0]
        out = self._feed(soft, final=False)
        self.bits_out += out.shape[0]
        return out

    def flush(self) -> np.ndarray:
        """End of stream: decode the pending symbols and release every remaining bit.

        Afterwards the decoder is ready for a new stream (metrics and survivors cleared; the
        counters keep running until :meth:`reset`).  A trailing symbol that does not complete an
        information bit's branch is dropped.
        """
        out = self._feed(self._pending[:0], final=True)
        bits_out = self.bits_out + out.shape[0]
        symbols_in = self.symbols_in
        self.reset()
        self.bits_out, self.symbols_in = bits_out, symbols_in
        return out


def viterbi_decode(soft, rate: Rate = "1/2", *, traceback_depth: int | None = None,
                   initial_state: int | None = None, g2_inverted: bool | None = None) -> np.ndarray:
    """Soft-decision ML decoding of a whole symbol stream (see :class:`ViterbiDecoder`).

    Parameters
    ----------
    soft : array_like of float, 1-D
        One value per channel symbol in transmission order: positive = bit 0, any scale, 0.0 = erasure.
    rate : {"1/2", "2/3", "3/4", "5/6", "7/8"}
    traceback_depth, initial_state, g2_inverted : see :class:`ViterbiDecoder`.

    Returns
    -------
    numpy.ndarray of uint8
        One decoded bit per complete branch: ``len(soft) // 2`` at rate 1/2.

    Examples
    --------
    >>> from pipeline.fec import conv_encode
    >>> bits = [1, 0, 1, 1, 0, 0, 1, 0, 1, 1, 1, 0]
    >>> sym = conv_encode(bits, "3/4")
    >>> viterbi_decode(1.0 - 2.0 * sym, "3/4", initial_state=0).tolist() == bits
    True
    """
    dec = ViterbiDecoder(rate=rate, traceback_depth=traceback_depth, initial_state=initial_state,
                         g2_inverted=g2_inverted)
    # process() then flush() in one pass, so the bits land in one array (no concatenation)
    return dec._feed(as_soft("soft", soft), final=True)
