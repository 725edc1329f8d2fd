"""Link quality from the per-frame log: the bit error rate estimated from the decoders' corrections.

Two estimators, chosen by what the link carries:

- **Reed-Solomon corrections.**  A codeblock that decodes tells exactly how many of its octets were
  wrong (the symbols the decoder corrected).  With ``s`` wrong octets among ``N`` octets received and
  independent bit errors of probability ``p``, an octet is wrong with probability ``1 - (1 - p)^8``, so
  ``p = 1 - (1 - s/N)^(1/8)``.  A codeblock that fails has more than ``E`` wrong octets in at least one
  codeword: it is counted as ``E + 1`` (the estimate is then a lower bound).
- **ASM bit errors** (links without Reed-Solomon): ``p = e / (32 F)`` from the ``e`` wrong bits among the
  32 known marker bits of ``F`` frames.

Both measure the bit stream entering the frame synchronizer and the Reed-Solomon decoder: on a link with a
convolutional code that is the Viterbi decoder's *output*, not the channel symbols.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

__all__ = ["BitErrorEstimate", "bit_error_estimate", "bit_error_series", "octet_to_bit_error_rate",
           "zero_count_bound"]

#: Confidence of the upper bound quoted when no error was seen.
ZERO_COUNT_CONFIDENCE = 0.95

#: Points of the bit-error-rate series over a pass (frames are grouped into this many runs at most).
MAX_SERIES_POINTS = 60


def octet_to_bit_error_rate(octet_error_rate):
    """Bit error rate ``p`` giving an octet error rate ``P = 1 - (1 - p)^8`` under independent bit errors.

    Parameters
    ----------
    octet_error_rate : float or array_like
        ``P`` in 0..1.

    Returns
    -------
    float or numpy.ndarray
        ``1 - (1 - P)^(1/8)``.

    Notes
    -----
    Each of the 8 bits of an octet is wrong independently with probability ``p``, so the octet is right
    with probability ``(1 - p)^8``.  For small ``P`` this is ``P / 8``.  Errors that come in bursts (after
    a Viterbi decoder) put several wrong bits into one octet: ``p`` is then the low end of the range
    ``P / 8 .. P``.

    References
    ----------
    Elementary probability (independent Bernoulli bits); common practice, no published source cited.

    Examples
    --------
    >>> round(float(octet_to_bit_error_rate(1 - 0.99 ** 8)), 12)
    0.01
    """
    p = np.clip(np.asarray(octet_error_rate, dtype=np.float64), 0.0, 1.0)
    out = 1.0 - (1.0 - p) ** 0.125
    return float(out) if out.ndim == 0 else out


def zero_count_bound(trials, confidence: float = ZERO_COUNT_CONFIDENCE):
    """Upper confidence bound of a probability when none of ``trials`` Bernoulli trials succeeded.

    ``1 - (1 - confidence)^(1 / trials)`` (exact binomial; about ``3 / trials`` at 95 %, the "rule of three").

    Examples
    --------
    >>> round(zero_count_bound(1000), 6)
    0.002991
    """
    n = np.asarray(trials, dtype=np.float64)
    with np.errstate(divide="ignore"):
        out = np.where(n > 0, 1.0 - (1.0 - confidence) ** (1.0 / np.maximum(n, 1.0)), 1.0)
    return float(out) if out.ndim == 0 else out


@dataclass(frozen=True)
class BitErrorEstimate:
    """A bit error rate estimated from the corrections the decoders made.

    Attributes
    ----------
    method : {"reed_solomon", "asm"}
        Which count it comes from (module notes).
    applies_to : str
        The bit stream it describes, in plain words.
    frames : int
        Frames counted.
    bits : int
        Bits those frames put through the estimator (RS-protected octets x 8, or 32 per ASM).
    errors : int
        Octets corrected (failed codeblocks counted as E + 1) or ASM bits wrong.
    failed_codeblocks : int
        Codeblocks Reed-Solomon could not correct (each counted as E + 1 wrong octets).
    estimate : float or None
        The bit error rate; None when nothing was counted.  With ``errors == 0`` it is 0.
    upper : float or None
        With errors: ``errors / octets`` for Reed-Solomon (every bit of a wrong octet wrong, the burst
        limit; the ASM count has no such range: ``estimate``).  Without errors: the 95 % upper bound.
    lower_bound : bool
        True when failed codeblocks were counted at E + 1: the true rate is higher.
    """

    method: str
    applies_to: str
    frames: int
    bits: int
    errors: int
    failed_codeblocks: int
    estimate: float | None
    upper: float | None
    lower_bound: bool

    def as_dict(self) -> dict:
        return asdict(self)


def _applies_to(method: str, convolutional: bool) -> str:
    if convolutional:
        return ("the Viterbi decoder's output (the Reed-Solomon decoder's input); the channel symbols' own error "
                "rate, corrected by the Viterbi decoder, is higher and not counted here") if method == "reed_solomon" \
            else "the Viterbi decoder's output, from the 32 bits of each frame's ASM"
    return ("the channel bits after line decoding and de-randomizing (the Reed-Solomon decoder's input)"
            if method == "reed_solomon" else "the channel bits after line decoding, from the 32 bits of each ASM")


def _counts(rs_corrected: np.ndarray, asm_errors: np.ndarray, *, codeblock_octets: int, rs_e: int):
    """Per-frame (errors, bits, failed) for the chosen method, and the method."""
    if rs_e > 0:
        failed = rs_corrected == -1
        errors = np.where(failed, rs_e + 1, np.maximum(rs_corrected, 0)).astype(np.int64)
        bits = np.full(rs_corrected.shape, 8 * codeblock_octets, dtype=np.int64)
        return "reed_solomon", errors, bits, failed
    valid = asm_errors >= 0
    return ("asm", np.where(valid, asm_errors, 0).astype(np.int64), np.where(valid, 32, 0).astype(np.int64),
            np.zeros(asm_errors.shape, dtype=bool))


def _rate(method: str, errors: np.ndarray, bits: np.ndarray):
    """(estimate, upper) of summed counts, elementwise."""
    errors = np.asarray(errors, dtype=np.float64)
    bits = np.asarray(bits, dtype=np.float64)
    safe = np.maximum(bits, 1.0)
    if method == "reed_solomon":
        octets = safe / 8.0
        est = octet_to_bit_error_rate(errors / octets)
        bound = octet_to_bit_error_rate(zero_count_bound(octets))
        upper = np.where(errors > 0, np.minimum(errors / octets, 1.0), bound)
    else:
        est = errors / safe
        upper = np.where(errors > 0, est, zero_count_bound(safe))
    return est, upper


def bit_error_estimate(rs_corrected, asm_errors, *, codeblock_octets: int, rs_e: int,
                       convolutional: bool) -> BitErrorEstimate:
    """The bit error rate over a set of frames (the module notes give the estimators).

    Parameters
    ----------
    rs_corrected : array_like of int
        Per frame: Reed-Solomon symbols corrected in its codeblock, -1 if a codeword failed, -2 without
        Reed-Solomon (the :class:`~pipeline.chain.FrameLog` convention).
    asm_errors : array_like of int
        Per frame: wrong bits of its 32-bit ASM (-1 unknown).
    codeblock_octets : int
        Octets protected by Reed-Solomon per frame (the profile's ``codeblock_bytes``).
    rs_e : int
        Symbols one codeword corrects (``E``: 16 or 8), 0 without Reed-Solomon.
    convolutional : bool
        Whether a convolutional code is decoded before (names the stream measured).

    Returns
    -------
    BitErrorEstimate

    Notes
    -----
    O(frames).  With Reed-Solomon the octet counts of every frame are summed first and converted once.

    Examples
    --------
    >>> e = bit_error_estimate([3, 0, 1], [0, 0, 2], codeblock_octets=255, rs_e=16, convolutional=False)
    >>> e.method, e.errors, e.bits, round(e.estimate, 7)
    ('reed_solomon', 4, 6120, 0.0006551)
    """
    rs = np.asarray(rs_corrected, dtype=np.int64).reshape(-1)
    asm = np.asarray(asm_errors, dtype=np.int64).reshape(-1)
    if rs.shape != asm.shape:
        raise ValueError(f"Arguments 'rs_corrected' and 'asm_errors' must have one entry per frame, not "
                         f"{rs.size} and {asm.size}.")
    method, errors, bits, failed = _counts(rs, asm, codeblock_octets=codeblock_octets, rs_e=rs_e)
    n_bits, n_err = int(bits.sum()), int(errors.sum())
    if n_bits == 0:
        return BitErrorEstimate(method, _applies_to(method, convolutional), int(rs.size), 0, 0, 0, None, None, False)
    est, upper = _rate(method, n_err, n_bits)
    return BitErrorEstimate(method, _applies_to(method, convolutional), int(rs.size), n_bits, n_err,
                            int(failed.sum()), float(est), float(upper), bool(failed.any()))


def bit_error_series(time_s, rs_corrected, asm_errors, *, codeblock_octets: int, rs_e: int,
                     points: int = MAX_SERIES_POINTS) -> dict:
    """The estimate over a pass: consecutive frames in at most ``points`` runs of ``ceil(frames / points)``.

    Returns
    -------
    dict
        ``time_s`` (mean time of each run's frames), ``estimate``, ``upper`` (as in
        :class:`BitErrorEstimate`), ``zero`` (no error in the run: plot the bound), ``lower_bound`` (a
        failed codeblock in the run), ``frames`` per run.  Empty arrays when there is nothing to count.

    Examples
    --------
    >>> s = bit_error_series([0.0, 1.0, 2.0, 3.0], [0, 0, 4, -1], [0, 0, 0, 9], codeblock_octets=255,
    ...                      rs_e=16, points=2)
    >>> s["time_s"].tolist(), s["zero"].tolist(), s["lower_bound"].tolist()
    ([0.5, 2.5], [True, False], [False, True])
    """
    t = np.asarray(time_s, dtype=np.float64).reshape(-1)
    rs = np.asarray(rs_corrected, dtype=np.int64).reshape(-1)
    asm = np.asarray(asm_errors, dtype=np.int64).reshape(-1)
    method, errors, bits, failed = _counts(rs, asm, codeblock_octets=codeblock_octets, rs_e=rs_e)
    keep = bits > 0
    t, errors, bits, failed = t[keep], errors[keep], bits[keep], failed[keep]
    n = t.size
    if n == 0:
        empty = np.zeros(0)
        return {"time_s": empty, "estimate": empty, "upper": empty, "zero": empty.astype(bool),
                "lower_bound": empty.astype(bool), "frames": empty.astype(np.int64)}
    size = -(-n // max(int(points), 1))  # equal runs of ``size`` frames, the last one may be shorter
    starts = np.arange(0, n, size, dtype=np.int64)
    count = np.diff(np.append(starts, n))
    e_sum = np.add.reduceat(errors, starts)
    b_sum = np.add.reduceat(bits, starts)
    est, upper = _rate(method, e_sum, b_sum)
    return {"time_s": np.add.reduceat(t, starts) / count, "estimate": est, "upper": upper, "zero": e_sum == 0,
            "lower_bound": np.add.reduceat(failed.astype(np.int64), starts) > 0, "frames": count}
