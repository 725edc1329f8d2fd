"""Compiled kernels of the frame synchronizer.

Every parameter is an argument, arrays are contiguous and typed, outputs are preallocated by the
caller (``pipeline.sync._framesync``), nothing is validated here.  Each kernel gives the same
answer with ``NUMBA_DISABLE_JIT=1``.
"""

from __future__ import annotations

import numba
import numpy as np

__all__ = [
    "popcount64",
    "find_marker",
    "marker_mismatches",
    "marker_score",
    "find_marker_soft",
    "marker_scores",
    "near_marker_scores",
    "hard_decisions",
    "encoder_state_before",
    "reencode_metrics",
    "branch_output",
    "rotated_pairs",
]


@numba.njit(cache=True)
def popcount64(x):  # pragma: no cover - compiled
    """Number of set bits of a uint64 (SWAR, shifts and adds only, so it wraps the same uncompiled)."""
    x = x - ((x >> np.uint64(1)) & np.uint64(0x5555555555555555))
    x = (x & np.uint64(0x3333333333333333)) + ((x >> np.uint64(2)) & np.uint64(0x3333333333333333))
    x = (x + (x >> np.uint64(4))) & np.uint64(0x0F0F0F0F0F0F0F0F)
    x = x + (x >> np.uint64(8))
    x = x + (x >> np.uint64(16))
    x = x + (x >> np.uint64(32))
    return int(x & np.uint64(0x7F))


@numba.njit(cache=True)
def find_marker(hard, start, stop, marker, max_errors, result):  # pragma: no cover - compiled
    """First offset in ``[start, stop)`` where ``marker`` or its complement matches ``hard``.

    A match at offset ``i`` means at most ``max_errors`` of the ``m = len(marker)`` bits
    ``hard[i:i + m]`` differ from the marker (upright) or from its complement (inverted).  The
    caller guarantees ``stop > start`` and ``stop - 1 + m <= len(hard)``.

    Returns the offset (or -1) and writes ``result[0]`` = mismatches against the matching polarity,
    ``result[1]`` = 1 when it is the complement.

    Notes
    -----
    The first ``w = min(m, 64)`` bits at each offset are held in a shift register (one uint64, MSB
    = oldest bit) and compared with the marker's first ``w`` bits by XOR and popcount: O(1) per
    offset.  Only where that partial count passes (at most ``max_errors`` mismatches, or at most
    ``max_errors`` agreements for the complement; a necessary condition) are the remaining
    ``m - w`` bits counted.
    """
    m = marker.shape[0]
    w = m if m < 64 else 64
    one = np.uint64(1)
    mask = np.uint64(0xFFFFFFFFFFFFFFFF) if w == 64 else (one << np.uint64(w)) - one
    mword = np.uint64(0)
    for j in range(w):
        mword = (mword << one) | np.uint64(marker[j])
    reg = np.uint64(0)
    for j in range(w - 1):
        reg = (reg << one) | np.uint64(hard[start + j])
    for i in range(start, stop):
        reg = ((reg << one) | np.uint64(hard[i + w - 1])) & mask
        err = popcount64(reg ^ mword)
        if err <= max_errors or w - err <= max_errors:
            for j in range(w, m):
                if hard[i + j] != marker[j]:
                    err += 1
            if err <= max_errors:
                result[0] = err
                result[1] = 0
                return i
            if m - err <= max_errors:
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
def marker_score(soft, at, sign):  # pragma: no cover - compiled
    """Normalised soft correlation of the marker with ``soft[at:at + m]``: ``sum(s_j y_j) / sqrt(sum(y_j^2))``.

    ``sign[j]`` is +1.0 for a marker bit 0 and -1.0 for a bit 1 (positive soft value = bit 0).  The value
    lies in ``[-sqrt(m), sqrt(m)]``; negative means the complemented marker.  On noise it is about N(0, 1)
    whatever the scale of ``soft``; on a marker at amplitude A in Gaussian noise of variance sigma^2 per
    value it is about ``sqrt(m) A / sqrt(A^2 + sigma^2)``.  0.0 when every value is 0 (erasures).  Summed
    in float64 in index order, so the value at an offset never depends on where a search started.
    """
    m = sign.shape[0]
    c = 0.0
    e = 0.0
    for j in range(m):
        y = np.float64(soft[at + j])
        c += sign[j] * y
        e += y * y
    if e <= 0.0:
        return 0.0
    return c / np.sqrt(e)


@numba.njit(cache=True)
def find_marker_soft(soft, start, stop, sign, threshold, result):  # pragma: no cover - compiled
    """First offset in ``[start, stop)`` whose :func:`marker_score` has ``|score| >= threshold``.

    The caller guarantees ``stop - 1 + m <= len(soft)``.  Returns the offset (or -1) and writes
    ``result[0]`` = the score.  Cost O(m) per offset.
    """
    for i in range(start, stop):
        sc = marker_score(soft, i, sign)
        if sc >= threshold or -sc >= threshold:
            result[0] = sc
            return i
    return -1


@numba.njit(cache=True)
def marker_scores(soft, start, count, sign, out):  # pragma: no cover - compiled
    """``out[k]`` = :func:`marker_score` at offset ``start + k``, ``k = 0 .. count - 1``.  Cost O(count m)."""
    for k in range(count):
        out[k] = marker_score(soft, start + k, sign)


@numba.njit(cache=True)
def near_marker_scores(soft, places, near, sign, scores, offsets):  # pragma: no cover - compiled
    """At each of ``places``: the largest ``|marker_score|`` within ``near`` offsets of it (clipped to the array)
    into ``scores`` and its offset (the first of equals) into ``offsets``; 0.0 and the place itself where no
    offset fits.  Cost O(len(places) (2 near + 1) m)."""
    m = sign.shape[0]
    for i in range(places.shape[0]):
        p = places[i]
        lo = max(p - near, 0)
        hi = min(p + near, soft.shape[0] - m)
        best = 0.0
        at = p
        for k in range(lo, hi + 1):
            sc = abs(marker_score(soft, k, sign))
            if sc > best or k == lo:
                best = sc
                at = k
        scores[i] = best
        offsets[i] = at


@numba.njit(cache=True)
def hard_decisions(soft, out):  # pragma: no cover - compiled
    """``out[i] = 1`` where ``soft[i] < 0`` (bit 1), else 0 (positive soft value = bit 0, 0.0 = erasure -> 0)."""
    for i in range(soft.shape[0]):
        out[i] = 1 if soft[i] < 0.0 else 0


@numba.njit(cache=True)
def encoder_state_before(bits, at, state):  # pragma: no cover - compiled
    """The re-encoder's memory (6 bits, the newest in bit 0) just before ``bits[at]``, when it held ``state``
    before ``bits[0]``: only the last 6 bits matter, so it costs at most 6 steps."""
    s = state if at < 6 else 0
    for i in range(max(0, at - 6), at):
        s = ((s << 1) | bits[i]) & 63
    return s


@numba.njit(cache=True)
def reencode_metrics(bits, state, g1_mask, g2_mask, g2_invert, keep1, keep2, parity, soft_head, soft_rest, block_bits,
                     metrics, states):
    """Re-encode decoded bits with the (punctured) convolutional code and score them against soft symbols.

    The soft symbols are ``soft = concatenate((soft_head, soft_rest))``, given in two pieces (those kept from
    earlier input and the current input: no copy joins them).  For block ``j`` (``block_bits`` bits; the last
    block may be shorter) ``metrics[j] = sum(s (1 - 2 c)) / sum(|s|)`` over its transmitted symbols ``s`` and
    re-encoded code bits ``c`` (0.0 if all ``s`` are 0), summed in transmission order, and ``states[j]`` = the
    encoder memory after it.  The register is ``(state << 1) | bit`` (bit 0 the newest), C1 = parity(reg &
    g1_mask), C2 = parity(reg & g2_mask) XOR g2_invert (1 at rate 1/2, 0 for the punctured codes: CCSDS
    131.0-B sec. 3.3 and 3.4), C1 first; ``keep1/keep2`` are the puncturing rows (period = their length),
    starting at column 0.  ``parity`` is the 128-entry parity table.  Returns the number of soft symbols
    used.  Cost O(len(bits)), no allocation of the data's size.

    Notes
    -----
    Each block's two sums are serial chains of float64 additions (their order fixes the rounding), so one
    block at a time waits on the adder.  At rate 1/2 four whole blocks held in one piece are summed side by side
    instead (each block's sums still in transmission order, so the same bits), their encoder memories taken
    from the 6 bits before each (:func:`encoder_state_before`): four independent chains, about 1.2 ns per bit
    against 2.0 one block at a time on the development machine.
    """
    period = keep1.shape[0]
    n = bits.shape[0]
    nh = soft_head.shape[0]
    # +1.0 / -1.0 per register value for each generator (the sign of a code bit 0 / 1): the sums below
    # add +-s without a branch on the data (the same terms, in the same order, as ``corr +=`` / ``-=``)
    sign1 = np.empty(128, np.float64)
    sign2 = np.empty(128, np.float64)
    for r in range(128):
        sign1[r] = 1.0 - 2.0 * parity[r & g1_mask]
        sign2[r] = 1.0 - 2.0 * (parity[r & g2_mask] ^ g2_invert)
    unpunctured = period == 1 and keep1[0] != 0 and keep2[0] != 0
    n_blocks = metrics.shape[0]
    state0 = state
    k = 0
    phase = 0
    j = 0
    while j < n_blocks:
        a = j * block_bits
        if unpunctured and j + 4 <= n_blocks and a + 4 * block_bits <= n:
            m4 = 8 * block_bits  # four whole blocks, two symbols per bit
            if k + m4 <= nh or k >= nh:
                src = soft_head if k + m4 <= nh else soft_rest
                at = k if k + m4 <= nh else k - nh
                s0 = state
                s1 = encoder_state_before(bits, a + block_bits, state0)
                s2 = encoder_state_before(bits, a + 2 * block_bits, state0)
                s3 = encoder_state_before(bits, a + 3 * block_bits, state0)
                c0 = c1 = c2 = c3 = 0.0
                g0 = g1 = g2 = g3 = 0.0
                step = 2 * block_bits
                # one view per block: indices from 0 up, which the compiler knows are never negative (no
                # wrap-around arithmetic per access)
                x0 = src[at : at + step]
                x1 = src[at + step : at + 2 * step]
                x2 = src[at + 2 * step : at + 3 * step]
                x3 = src[at + 3 * step : at + 4 * step]
                b0 = bits[a : a + block_bits]
                b1 = bits[a + block_bits : a + 2 * block_bits]
                b2 = bits[a + 2 * block_bits : a + 3 * block_bits]
                b3 = bits[a + 3 * block_bits : a + 4 * block_bits]
                for i in range(block_bits):
                    r0 = ((s0 << 1) | b0[i]) & 127
                    r1 = ((s1 << 1) | b1[i]) & 127
                    r2 = ((s2 << 1) | b2[i]) & 127
                    r3 = ((s3 << 1) | b3[i]) & 127
                    s0 = r0 & 63
                    s1 = r1 & 63
                    s2 = r2 & 63
                    s3 = r3 & 63
                    for h in range(2):  # the branch's two symbols, C1 then C2
                        sign = sign1 if h == 0 else sign2
                        v0 = np.float64(x0[2 * i + h])
                        v1 = np.float64(x1[2 * i + h])
                        v2 = np.float64(x2[2 * i + h])
                        v3 = np.float64(x3[2 * i + h])
                        c0 += v0 * sign[r0]
                        c1 += v1 * sign[r1]
                        c2 += v2 * sign[r2]
                        c3 += v3 * sign[r3]
                        g0 += abs(v0)
                        g1 += abs(v1)
                        g2 += abs(v2)
                        g3 += abs(v3)
                metrics[j] = c0 / g0 if g0 > 0.0 else 0.0
                metrics[j + 1] = c1 / g1 if g1 > 0.0 else 0.0
                metrics[j + 2] = c2 / g2 if g2 > 0.0 else 0.0
                metrics[j + 3] = c3 / g3 if g3 > 0.0 else 0.0
                states[j] = s0
                states[j + 1] = s1
                states[j + 2] = s2
                states[j + 3] = s3
                state = s3
                k += m4
                j += 4
                continue
        b = a + block_bits
        if b > n:
            b = n
        corr = 0.0
        mag = 0.0
        m = 2 * (b - a)
        if unpunctured and (k + m <= nh or k >= nh):  # rate 1/2, a block within one piece: two symbols per bit
            src = soft_head if k + m <= nh else soft_rest
            at = k if k + m <= nh else k - nh
            for i in range(a, b):
                reg = ((state << 1) | bits[i]) & 127
                state = reg & 63
                s = np.float64(src[at])
                corr += s * sign1[reg]
                mag += abs(s)
                s = np.float64(src[at + 1])
                corr += s * sign2[reg]
                mag += abs(s)
                at += 2
            k += m
        else:  # punctured, or the block that spans the two pieces
            for i in range(a, b):
                reg = ((state << 1) | bits[i]) & 127
                state = reg & 63
                if keep1[phase]:
                    s = np.float64(soft_head[k] if k < nh else soft_rest[k - nh])
                    k += 1
                    corr += s * sign1[reg]
                    mag += abs(s)
                if keep2[phase]:
                    s = np.float64(soft_head[k] if k < nh else soft_rest[k - nh])
                    k += 1
                    corr += s * sign2[reg]
                    mag += abs(s)
                phase += 1
                if phase == period:
                    phase = 0
        metrics[j] = corr / mag if mag > 0.0 else 0.0
        states[j] = state
        j += 1
    return k


@numba.njit(cache=True)
def branch_output(bits, pos_head, pos_rest, first, period_index, period_symbols, signs, positions):  # pragma: no cover
    """Decoded bits -> output values and positions (simple loops, which compile to vector code).

    The channel bits' positions are held in two pieces, ``raw_pos = concatenate((pos_head, pos_rest))``
    (the positions kept from earlier calls, and those of the current input: no copy joins them).
    ``signs[i] = 1 - 2 bits[i]`` (float32: +1.0 for bit 0, -1.0 for bit 1) and ``positions[i] =
    raw_pos[first + (i // kp) * period_symbols + period_index[i % kp]]``, ``kp = len(period_index)``
    information bits per puncturing period: the position of the first channel bit of bit i's branch
    when the periods start at ``raw_pos[first]``.  Cost O(len(bits)), no allocation.
    """
    kp = period_index.shape[0]
    n = bits.shape[0]
    nh = pos_head.shape[0]
    for i in range(n):
        signs[i] = np.float32(1 - 2 * np.int64(bits[i]))
    if kp == 1:  # rate 1/2: two strided copies, the bits whose channel bit is in the head, then the rest
        at = first + period_index[0]
        split = 0
        if nh > at:
            split = min(n, (nh - at + period_symbols - 1) // period_symbols)
        for i in range(split):
            positions[i] = pos_head[at + i * period_symbols]
        at -= nh
        for i in range(split, n):
            positions[i] = pos_rest[at + i * period_symbols]
        return
    i = 0
    at = first
    while i < n:  # one puncturing period per pass (no integer division per bit)
        for r in range(kp):
            if i == n:
                break
            j = at + period_index[r]
            positions[i] = pos_head[j] if j < nh else pos_rest[j - nh]
            i += 1
        at += period_symbols


@numba.njit(cache=True)
def rotated_pairs(head, rest, rotation, out):  # pragma: no cover - compiled
    """Soft channel-bit pairs ``(a, b)`` of ``concatenate((head, rest))`` under a rotation hypothesis, into ``out``.

    ``rotation`` 1: ``(b, -a)`` (undoes ``I + jQ -> j (I + jQ)``), 2: ``(a, -b)``, 3: ``(b, a)``; the joined input
    has ``len(out)`` values, an even number (the pieces may split a pair).  One pass, no temporaries (the numpy
    column assignments it replaces made three passes and a temporary: 0.7 ms per 2^20 values).  The sign is a
    multiplication by +-1, exact.
    """
    nh = head.shape[0]
    n = out.shape[0]
    swap = rotation != 2
    sign = np.float32(1.0) if rotation == 3 else np.float32(-1.0)
    j = 2 * (min(nh, n) // 2)
    hs = head[:j]
    for i in range(j // 2):
        a = hs[2 * i]
        b = hs[2 * i + 1]
        out[2 * i] = b if swap else a
        out[2 * i + 1] = sign * (a if swap else b)
    if j < n:  # the first pair after the head's whole pairs: split between the pieces, or the rest's first
        a = head[j] if j < nh else rest[j - nh]
        b = head[j + 1] if j + 1 < nh else rest[j + 1 - nh]
        out[j] = b if swap else a
        out[j + 1] = sign * (a if swap else b)
        j += 2
    if j < n:
        src = rest[j - nh:n - nh]
        o = out[j:n]
        for i in range((n - j) // 2):
            a = src[2 * i]
            b = src[2 * i + 1]
            o[2 * i] = b if swap else a
            o[2 * i + 1] = sign * (a if swap else b)
