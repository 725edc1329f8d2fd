"""Compiled kernels of the frame synchronizer.

Every parameter is an argument, arrays are contiguous and typed, outputs are preallocated by the
caller (``pipeline.sync._framesync``), nothing is validated here.  Each kernel gives the same
answer with ``NUMBA_DISABLE_JIT=1``.
"""

from __future__ import annotations

import numba

__all__ = ["find_marker", "marker_mismatches", "hard_decisions"]


@numba.njit(cache=True)
def find_marker(hard, start, stop, marker, max_errors, result):  # pragma: no cover - compiled
    """First offset in ``[start, stop)`` where ``marker`` or its complement matches ``hard``.

    A match at offset ``i`` means at most ``max_errors`` of the ``m = len(marker)`` bits
    ``hard[i:i + m]`` differ from the marker (upright) or from its complement (inverted).  The
    caller guarantees ``stop - 1 + m <= len(hard)``.

    Returns the offset (or -1) and writes ``result[0]`` = mismatches against the matching polarity,
    ``result[1]`` = 1 when it is the complement.  Cost: O(max_errors) bit comparisons per offset on
    random data (both polarities are abandoned as soon as each exceeds ``max_errors``), O(m) at worst.
    """
    m = marker.shape[0]
    for i in range(start, stop):
        err = 0
        upright_ok = True
        inverted_ok = True
        for j in range(m):
            if hard[i + j] != marker[j]:
                err += 1
                if err > max_errors:
                    upright_ok = False
            elif j + 1 - err > max_errors:
                inverted_ok = False
            if not upright_ok and not inverted_ok:
                break
        if upright_ok:
            result[0] = err
            result[1] = 0
            return i
        if inverted_ok:
            result[0] = m - err
            result[1] = 1
            return i
    return -1


@numba.njit(cache=True)
def marker_mismatches(hard, start, count, marker, out):  # pragma: no cover - compiled
    """``out[k]`` = number of bits of ``hard[start + k : start + k + m]`` that differ from ``marker``.

    ``k = 0 .. count - 1``; mismatches against the complement are ``m - out[k]``.  Cost O(count * m).
    """
    m = marker.shape[0]
    for k in range(count):
        err = 0
        base = start + k
        for j in range(m):
            if hard[base + j] != marker[j]:
                err += 1
        out[k] = err


@numba.njit(cache=True)
def hard_decisions(soft, out):  # pragma: no cover - compiled
    """``out[i] = 1`` where ``soft[i] < 0`` (bit 1), else 0 (positive soft value = bit 0, 0.0 = erasure -> 0)."""
    for i in range(soft.shape[0]):
        out[i] = 1 if soft[i] < 0.0 else 0
