"""Line decoding of soft channel bits (NRZ-M to NRZ-L)."""

from __future__ import annotations

import numpy as np

from pipeline.demod._kernels import nrzm_decode

__all__ = ["LineDecoder"]

_SUPPORTED = ("nrz-l", "nrz-m")


class LineDecoder:
    """Turn soft channel bits of a line code into soft NRZ-L bits, streaming.

    Parameters
    ----------
    line_code : {"nrz-l", "nrz-m"}
        ``"nrz-l"`` passes through; ``"nrz-m"`` differentially decodes.

    Notes
    -----
    NRZ-M: a 1 is a change of level, a 0 no change (CCSDS 131.0-B-2 sec. 3.3.3).  The soft
    NRZ-L bit is ``sgn(a) sgn(b) min(|a|, |b|)`` of two successive soft levels ``a, b``: the
    min-sum approximation of the log-likelihood ratio of ``a XOR b``.  It is invariant to a sign
    flip of the whole stream, which removes the 180-degree ambiguity.  The last level is carried
    across calls; the very first output is 0.0 (erasure) since the level before it is unknown.
    Cost O(n).  Bi-phase-L is not handled here: it needs half-symbol demodulation.
    """

    def __init__(self, *, line_code: str) -> None:
        if line_code not in _SUPPORTED:
            raise ValueError(f"Argument 'line_code' must be {' | '.join(_SUPPORTED)}, not {line_code!r}.")
        self.line_code = line_code
        self.reset()

    def reset(self) -> None:
        """Forget the carried level."""
        self._prev = 0.0

    def process(self, soft: np.ndarray) -> np.ndarray:
        """Decode a run of soft channel bits (float32, positive = bit 0); returns float32 of equal length."""
        a = np.asarray(soft)
        if a.ndim != 1:
            raise ValueError(f"Argument 'soft' must be one-dimensional, not shape {a.shape}.")
        if not (np.issubdtype(a.dtype, np.floating) or np.issubdtype(a.dtype, np.integer)):
            raise TypeError(f"Argument 'soft' must be a real array, not {a.dtype}.")
        a = np.ascontiguousarray(a, dtype=np.float32)
        if self.line_code == "nrz-l":
            return a.copy()
        out = np.empty_like(a)
        self._prev = float(nrzm_decode(a, np.float32(self._prev), out))
        return out
