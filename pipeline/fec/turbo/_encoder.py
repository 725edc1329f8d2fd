"""CCSDS turbo encoder: transfer frames (k/8 octets) to codewords of n = (k + 4)/r channel bits."""

from __future__ import annotations

import numpy as np

from pipeline.fec.turbo._code import FEEDBACK_VECTOR, FORWARD_VECTORS, TURBO_BLOCK_SIZES, TurboCode
from pipeline.fec.turbo._kernels import turbo_encode_kernel

__all__ = ["turbo_encode"]

_FEEDBACK = np.array([int(c) for c in FEEDBACK_VECTOR], dtype=np.int64)
_FORWARD = np.array([[int(c) for c in g] for g in FORWARD_VECTORS], dtype=np.int64)
for _a in (_FEEDBACK, _FORWARD):
    _a.flags.writeable = False


def _frames_2d(frames) -> tuple[np.ndarray, bool]:
    """Frames as a C-contiguous uint8 array of shape (B, octets); True when one frame was given."""
    if isinstance(frames, (bytes, bytearray, memoryview)):
        return np.frombuffer(bytes(frames), dtype=np.uint8)[None, :], True
    if not isinstance(frames, np.ndarray):
        raise TypeError(f"Argument 'frames' must be bytes or a uint8 array, not {type(frames).__name__}.")
    if frames.dtype != np.uint8:
        raise TypeError(f"Argument 'frames' must be bytes or a uint8 array, not dtype {frames.dtype}.")
    if frames.ndim not in (1, 2):
        raise ValueError(f"Argument 'frames' must be 1-D (one frame) or 2-D (one frame a row), not {frames.ndim}-D.")
    single = frames.ndim == 1
    return np.ascontiguousarray(frames.reshape(1, -1) if single else frames), single


def turbo_encode(frames, *, rate: str) -> np.ndarray:
    """Encode transfer frames with the CCSDS turbo code of their length.

    Parameters
    ----------
    frames : bytes or numpy.ndarray of uint8
        One frame (bytes, or a 1-D array) or several (a 2-D array, one frame per row) of k/8
        octets each, k = 1784, 3568, 7136 or 8920: the information block, sent MSB first.
    rate : {"1/2", "1/3", "1/4", "1/6"}, keyword-only

    Returns
    -------
    numpy.ndarray of uint8
        Channel bits (0/1) in transmission order, ``(k + 4) / r`` per frame: 1-D for one frame,
        shape (B, n) for several.  Not randomized; no marker.

    Notes
    -----
    Encoder a reads the block in natural order, encoder b in the interleaver's order; each is the
    16-state recursive encoder with feedback G0 and forward vectors G1..G3, terminated by four
    bit times whose input is the feedback sum.  The outputs are multiplexed (and at rate 1/2
    punctured) as :class:`TurboCode` describes.  Cost: O(k) per frame, about 10 ns per bit.

    References
    ----------
    CCSDS 131.0-B-2 sec. 6.3, Figure 6-2, and the note on p. 6-7.

    Examples
    --------
    >>> bits = turbo_encode(bytes(223), rate="1/3")
    >>> bits.shape, int(bits.sum())
    ((5364,), 0)
    """
    arr, single = _frames_2d(frames)
    k = 8 * arr.shape[1]
    if k not in TURBO_BLOCK_SIZES:
        sizes = ", ".join(str(b // 8) for b in TURBO_BLOCK_SIZES)
        raise ValueError(f"Argument 'frames' must hold frames of {sizes} octets, not {arr.shape[1]}.")
    code = TurboCode(rate=rate, k=k)
    info = np.unpackbits(arr, axis=1)
    out = np.empty((arr.shape[0], code.n), dtype=np.uint8)
    work = np.empty((2, code.steps, 4), dtype=np.uint8)
    turbo_encode_kernel(info, code.interleaver, _FEEDBACK, _FORWARD, code.source, work, out)
    return out[0] if single else out
