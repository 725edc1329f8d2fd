"""Compiled kernels of the decode chain's own bookkeeping.

Every parameter is an argument, arrays are contiguous and typed, outputs are preallocated by the
caller (``pipeline.chain._frontend``), nothing is validated here.  Each kernel gives the same answer
with ``NUMBA_DISABLE_JIT=1``.
"""

from __future__ import annotations

import numba

__all__ = ["owned_counts"]


@numba.njit(cache=True)
def owned_counts(position, mask, lo, hi, out):  # pragma: no cover - compiled
    """Count the positions in ``[lo, hi)``, and those of them whose ``mask`` entry is set, in one pass.

    ``position`` is float64, ``mask`` bool of the same length or empty (no mask: the second count is 0),
    ``out`` int64 of length 2: ``out[0] = count(lo <= position < hi)``, ``out[1] = count(lo <= position
    < hi and mask)``.  A NaN position is never inside.  Cost O(len(position)), one read of each array
    (``min``, ``max`` and ``count_nonzero`` read them three times).
    """
    with_mask = mask.shape[0] > 0
    n_in = 0
    n_mask = 0
    for i in range(position.shape[0]):
        p = position[i]
        inside = 1 if (p >= lo and p < hi) else 0
        n_in += inside
        if with_mask:
            n_mask += inside if mask[i] else 0
    out[0] = n_in
    out[1] = n_mask
