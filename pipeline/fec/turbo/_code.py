"""The CCSDS turbo codes (131.0-B sec. 6): block sizes, component codes, interleaver, output order.

:class:`TurboCode` is the frozen description of one (rate, k) that the encoder and the decoder
share; it holds every table either of them needs, so each fact of the code lives here once.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, field
from typing import Literal, get_args

import numpy as np

from pipeline.fec._markers import TURBO_ASMS

__all__ = [
    "TurboRate",
    "TURBO_RATES",
    "TURBO_BLOCK_SIZES",
    "FEEDBACK_VECTOR",
    "FORWARD_VECTORS",
    "TurboCode",
    "turbo_interleaver",
    "component_trellis",
]

#: Nominal turbo code rates of CCSDS 131.0-B sec. 6 (the tail makes the true rate k / (k + 4) r).
TurboRate = Literal["1/2", "1/3", "1/4", "1/6"]
TURBO_RATES: tuple[str, ...] = get_args(TurboRate)
#: Information block lengths k in bits (131.0-B Table 6-3): k1 = 8 times k2 = 223, 446, 892, 1115.
TURBO_BLOCK_SIZES: tuple[int, ...] = (1784, 3568, 7136, 8920)

#: Backward (feedback) connection vector G0, coefficients of D^0..D^4 left to right: 1 + D^3 + D^4.
FEEDBACK_VECTOR = "10011"
#: Forward connection vectors G1, G2, G3 (131.0-B sec. 6.3 h), same convention; output j uses Gj.
FORWARD_VECTORS: tuple[str, str, str] = ("11011", "10101", "11111")

# Interleaver primes p1..p8 (131.0-B sec. 6.3 step 2).
_PRIMES = (31, 37, 43, 47, 53, 59, 61, 67)
_K1 = 8

# Output multiplexing, 131.0-B sec. 6.3 h) and the note on p. 6-7: for each bit time, the outputs sent,
# as (encoder, output) with output 0 the systematic line and output j >= 1 the one using Gj.  Rate 1/2
# alternates two patterns (out0a, out1a) and (out0a, out1b): the other parity is punctured.
_MUX: dict[str, tuple[tuple[tuple[int, int], ...], ...]] = {
    "1/2": (((0, 0), (0, 1)), ((0, 0), (1, 1))),
    "1/3": (((0, 0), (0, 1), (1, 1)),),
    "1/4": (((0, 0), (0, 2), (0, 3), (1, 1)),),
    "1/6": (((0, 0), (0, 1), (0, 2), (0, 3), (1, 1), (1, 3)),),
}
_TAIL = 4  # bit times of trellis termination per encoder (memory 4)


def _vector_taps(vector: str) -> tuple[int, ...]:
    return tuple(int(ch) for ch in vector)


def component_trellis(outputs: tuple[int, ...]) -> tuple[np.ndarray, np.ndarray]:
    """The 16-state trellis of a CCSDS turbo component encoder.

    Parameters
    ----------
    outputs : tuple of int
        The forward vectors whose outputs are observed, as indices 1..3 into G1..G3, in the order
        their channel rows are kept.

    Returns
    -------
    next_state, label : numpy.ndarray of int64, shape (16, 2)
        ``next_state[s, u]`` is the state after input bit ``u`` in state ``s``; ``label[s, u]`` holds
        the output bits of that branch: bit 0 the systematic bit ``u``, bit ``r`` the output of
        ``G[outputs[r - 1]]``.

    Notes
    -----
    State ``s`` has the delay cells D1..D4 in bits 0..3 (D1 = the newest).  With the feedback
    vector G0 the bit entering D1 is ``a = u + sum_i g0_i D_i`` and output ``j`` is
    ``g_j0 a + sum_i g_ji D_i`` (mod 2), where ``g_i`` is the coefficient of D^i.  During
    termination the input is the feedback sum itself, so ``a = 0``: no separate tail trellis is
    needed, a path ending in state 0 has exactly that tail.

    References
    ----------
    CCSDS 131.0-B-2 sec. 6.3 (Figure 6-2) and the note on p. 6-7.
    """
    g0 = _vector_taps(FEEDBACK_VECTOR)
    forward = [_vector_taps(FORWARD_VECTORS[j - 1]) for j in outputs]
    next_state = np.zeros((16, 2), dtype=np.int64)
    label = np.zeros((16, 2), dtype=np.int64)
    for s in range(16):
        cells = [(s >> i) & 1 for i in range(4)]  # D1..D4
        fb = 0
        for i in range(4):
            fb ^= g0[i + 1] & cells[i]
        for u in range(2):
            a = u ^ fb
            lab = u
            for r, g in enumerate(forward):
                p = g[0] & a
                for i in range(4):
                    p ^= g[i + 1] & cells[i]
                lab |= p << (r + 1)
            next_state[s, u] = ((s << 1) | a) & 15
            label[s, u] = lab
    next_state.flags.writeable = False
    label.flags.writeable = False
    return next_state, label


@functools.cache
def turbo_interleaver(k: int) -> np.ndarray:
    """The turbo interleaver of CCSDS 131.0-B sec. 6.3 as a 0-based permutation.

    Parameters
    ----------
    k : {1784, 3568, 7136, 8920}

    Returns
    -------
    numpy.ndarray of int64, shape (k,), read-only
        ``perm[s]`` is the index (0-based) in the information block of the ``s``-th bit fed to
        encoder b, i.e. ``pi(s + 1) - 1``.

    Notes
    -----
    For s = 1..k: m = (s - 1) mod 2, i = floor((s - 1) / (2 k2)), j = floor((s - 1) / 2) - i k2,
    t = (19 i + 1) mod (k1 / 2), q = t mod 8 + 1, c = (p_q j + 21 m) mod k2 and
    pi(s) = 2 (t + c k1 / 2 + 1) - m, with k1 = 8, k2 = k / 8 and the primes p1..p8.  Cost O(k).

    References
    ----------
    CCSDS 131.0-B-2 sec. 6.3 (interleaver, steps 1-2, and item g).

    Examples
    --------
    >>> turbo_interleaver(1784)[:4] + 1
    array([  4, 171, 300, 467])
    """
    if k not in TURBO_BLOCK_SIZES:
        raise ValueError(f"Argument 'k' must be one of {', '.join(map(str, TURBO_BLOCK_SIZES))}, not {k!r}.")
    k2 = k // _K1
    s = np.arange(1, k + 1, dtype=np.int64)
    m = (s - 1) % 2
    i = (s - 1) // (2 * k2)
    j = (s - 1) // 2 - i * k2
    t = (19 * i + 1) % (_K1 // 2)
    q = t % 8 + 1
    primes = np.asarray(_PRIMES, dtype=np.int64)
    c = (primes[q - 1] * j + 21 * m) % k2
    pi = 2 * (t + c * (_K1 // 2) + 1) - m
    perm = pi - 1
    perm.flags.writeable = False
    return perm


def _readonly(a: np.ndarray) -> np.ndarray:
    a.flags.writeable = False
    return a


@dataclass(frozen=True)
class TurboCode:
    """One CCSDS turbo code: nominal rate and information block length, with its derived tables.

    Parameters
    ----------
    rate : {"1/2", "1/3", "1/4", "1/6"}
        Nominal code rate (the profile's ``turbo`` key).
    k : {1784, 3568, 7136, 8920}
        Information bits per block (the profile's ``turbo_k``): one transfer frame of k/8 octets.

    Attributes
    ----------
    steps : int
        Trellis steps per component encoder, ``k + 4`` (4 termination bit times).
    n : int
        Channel bits per codeword, ``(k + 4) / r``: 3576 / 5364 / 7152 / 10728 for k = 1784 and
        17848 / 26772 / 35696 / 53544 for k = 8920.
    frame_octets : int
        ``k / 8``: the transfer frame length this code carries (223, 446, 892 or 1115).
    marker : bytes
        The code's attached sync marker (64, 96, 128 or 192 bits, 131.0-B sec. 8).
    outputs_a, outputs_b : tuple of int
        The forward vectors (1..3 for G1..G3) whose outputs encoder a / b sends.
    interleaver : numpy.ndarray
        :func:`turbo_interleaver` of ``k``.
    source : numpy.ndarray of int64, shape (n,)
        Where each channel bit comes from: ``((e * steps + t) * 4 + o)`` for output ``o`` (0 the
        systematic line, j the Gj output) of encoder ``e`` (0 = a, 1 = b) at bit time ``t``.

    Notes
    -----
    Codeword order: for each bit time, the outputs listed by the standard for the rate -- 1/3:
    out0a, out1a, out1b; 1/4: out0a, out2a, out3a, out1b; 1/6: out0a, out1a, out2a, out3a, out1b,
    out3b; 1/2: out0a, out1a at even and out0a, out1b at odd bit times (counted from 0, i.e.
    out1b punctured at the 1st, 3rd, ... and out1a at the 2nd, 4th, ... bit time).  out0b is never
    sent, not even during termination.

    References
    ----------
    CCSDS 131.0-B-2 sec. 6.2-6.4, Table 6-3, Figures 6-2 and 6-3 and the note on p. 6-7.

    Examples
    --------
    >>> code = TurboCode(rate="1/2", k=8920)
    >>> code.n, code.frame_octets, len(code.marker) * 8
    (17848, 1115, 64)
    """

    rate: str
    k: int
    steps: int = field(init=False, repr=False)
    n: int = field(init=False, repr=False)
    frame_octets: int = field(init=False, repr=False)
    marker: bytes = field(init=False, repr=False)
    outputs_a: tuple[int, ...] = field(init=False, repr=False)
    outputs_b: tuple[int, ...] = field(init=False, repr=False)
    interleaver: np.ndarray = field(init=False, repr=False, compare=False)
    source: np.ndarray = field(init=False, repr=False, compare=False)

    def __post_init__(self):
        if not isinstance(self.rate, str) or self.rate not in TURBO_RATES:
            raise ValueError(f"Argument 'rate' must be one of {', '.join(TURBO_RATES)}, not {self.rate!r}.")
        k_ok = isinstance(self.k, (int, np.integer)) and not isinstance(self.k, bool)
        if not k_ok or int(self.k) not in TURBO_BLOCK_SIZES:
            raise ValueError(f"Argument 'k' must be one of {', '.join(map(str, TURBO_BLOCK_SIZES))}, not {self.k!r}.")
        k = int(self.k)
        steps = k + _TAIL
        mux = _MUX[self.rate]
        seen = {(e, o) for pattern in mux for (e, o) in pattern}
        put = functools.partial(object.__setattr__, self)
        put("k", k)
        put("steps", steps)
        put("frame_octets", k // 8)
        put("marker", TURBO_ASMS[self.rate])
        put("outputs_a", tuple(sorted(o for e, o in seen if e == 0 and o > 0)))
        put("outputs_b", tuple(sorted(o for e, o in seen if e == 1 and o > 0)))
        put("interleaver", turbo_interleaver(k))
        src = [(e * steps + t) * 4 + o for t in range(steps) for (e, o) in mux[t % len(mux)]]
        put("source", _readonly(np.asarray(src, dtype=np.int64)))
        put("n", len(src))

    @property
    def code_rate(self) -> float:
        """The true rate k / n (the tail included)."""
        return self.k / self.n
