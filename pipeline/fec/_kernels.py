"""Numba kernels of pipeline.fec.

Rules (DEVELOPERS.md): module-level ``@njit(cache=True)`` functions, every parameter an argument
(tables are passed in, never read from globals), contiguous typed arrays, outputs preallocated by
the Python wrapper, no validation here.  Each kernel gives the same answer with
``NUMBA_DISABLE_JIT=1``; integer arithmetic is written with explicit casts so that plain Python
(with numpy scalars) and compiled code agree.
"""

from __future__ import annotations

import numpy as np
from llvmlite import ir
from numba import njit, types
from numba.extending import intrinsic, overload

__all__ = [
    "conv_encode_kernel",
    "pn_bits_kernel",
    "crc16_kernel",
    "rs_remainder_kernel",
    "rs_decode_kernel",
    "soft_quantize_kernel",
    "depuncture_kernel",
    "viterbi_acs_kernel",
    "viterbi_acs_vector_kernel",
    "viterbi_traceback_kernel",
    "viterbi_block_kernel",
]


# ---- convolutional encoder ---------------------------------------------------------------------

@njit(cache=True)
def conv_encode_kernel(bits, state, phase, g1_mask, g2_mask, g2_invert, keep1, keep2, out):
    """Encode ``bits`` with the K=7 code and puncture; return (symbols written, state, phase).

    ``state`` holds the last six input bits, bit 0 the newest (D1), bit 5 the oldest (D6).  The
    encoder register is ``(state << 1) | bit`` so bit 0 is the input and bit 6 is D6.  ``keep1`` /
    ``keep2`` are the C1/C2 rows of the puncturing pattern, ``phase`` the current column.
    """
    period = keep1.shape[0]
    n_out = 0
    s = state
    ph = phase
    for i in range(bits.shape[0]):
        reg = (s << 1) | bits[i]
        c1 = reg & g1_mask
        c2 = reg & g2_mask
        # parity of up to 7 bits by folding
        c1 ^= c1 >> 4
        c1 ^= c1 >> 2
        c1 ^= c1 >> 1
        c2 ^= c2 >> 4
        c2 ^= c2 >> 2
        c2 ^= c2 >> 1
        if keep1[ph]:
            out[n_out] = c1 & 1
            n_out += 1
        if keep2[ph]:
            out[n_out] = (c2 & 1) ^ g2_invert
            n_out += 1
        s = reg & 0x3F
        ph += 1
        if ph == period:
            ph = 0
    return n_out, s, ph


# ---- pseudo-randomizer -------------------------------------------------------------------------

@njit(cache=True)
def pn_bits_kernel(out):
    """Fill ``out`` with the TM pseudo-random bit sequence, h(x) = x^8+x^7+x^5+x^3+1, all-ones seed.

    Fibonacci form: a[k] = a[k-1] ^ a[k-3] ^ a[k-5] ^ a[k-8], with a[0..7] = 1.
    """
    n = out.shape[0]
    for k in range(min(n, 8)):
        out[k] = 1
    for k in range(8, n):
        out[k] = out[k - 1] ^ out[k - 3] ^ out[k - 5] ^ out[k - 8]


# ---- CRC-16 ------------------------------------------------------------------------------------

@njit(cache=True)
def crc16_kernel(data, crc, table):
    """Byte-wise MSB-first CRC-16 update of ``crc`` over ``data`` with a 256-entry ``table``."""
    c = crc
    for i in range(data.shape[0]):
        c = ((c << 8) & 0xFFFF) ^ table[((c >> 8) ^ data[i]) & 0xFF]
    return c


# ---- Reed-Solomon: systematic remainder (encoder and clean-codeword check) ----------------------

@njit(cache=True)
def rs_remainder_kernel(block, n_rows, interleave, dual_to_conv, gtab, rem):
    """Remainder of each interleaved codeword's data part times x^(2E), modulo g(x).

    ``block`` holds ``n_rows * interleave`` data octets in dual basis, codeword ``c`` at positions
    ``c, c + I, c + 2I, ...``.  ``gtab[f]`` is the product ``f * g(x)`` without its leading term,
    packed as ``W = 2E/8`` uint64 words, the coefficient of x^(2E-1) in the top octet of word 0.
    ``rem[c]`` (shape (I, W)) receives the remainder in the same packing, conventional basis; it is
    the parity of codeword ``c`` (highest degree first).  Cost: n_rows * I * (W + 1) word operations.
    """
    n_words = gtab.shape[1]
    for c in range(interleave):
        for w in range(n_words):
            rem[c, w] = np.uint64(0)
    pos = 0
    for _ in range(n_rows):
        for c in range(interleave):
            d = np.uint64(dual_to_conv[block[pos]])
            pos += 1
            fb = (rem[c, 0] >> np.uint64(56)) ^ d
            for w in range(n_words - 1):
                rem[c, w] = ((rem[c, w] << np.uint64(8)) | (rem[c, w + 1] >> np.uint64(56))) ^ gtab[fb, w]
            rem[c, n_words - 1] = (rem[c, n_words - 1] << np.uint64(8)) ^ gtab[fb, n_words - 1]


# ---- Viterbi decoder (K=7, 64 states) ---------------------------------------------------------
#
# The decoder calls viterbi_acs_vector_kernel (LLVM vector IR, further down); viterbi_acs_kernel
# below is the portable numba version it must equal bit for bit, and what it runs as plain Python.
#
# Path metrics are int16 (64 of them, state s at index s) in a fixed work array that also holds
# the branch-sign tables, so every access in the add-compare-select loop is a constant offset from
# one base pointer: LLVM then needs no aliasing checks between metrics and tables and vectorises
# the loop over 16 lanes (ymm).  The trellis is advanced two steps at a time (radix 4): the four
# predecessors of the states 4u..4u+3 two steps later are u, u+16, u+32 and u+48, four contiguous
# runs of 16, so both steps of a pair are straight-line vector code over one loop of 16 lanes with
# the intermediate metrics in registers.  Only the write-back to state order (state 4u + r from
# run r, lane u) needs a shuffle; it is a separate loop over uint64 words whose length is not a
# compile-time constant, which LLVM vectorises as widen-shift-or instead of unrolling into scalar
# moves.  Measured on AVX-512 hardware with numba 0.68 (ns per trellis step, kernel alone, 16384
# steps in cache): previous radix-2 kernel with interleaved stores 9.0-9.4, radix-2 with the
# write-back loop 8.5, radix 4 7.3-7.5.  (Tried and slower: decisions packed by an OR-reduction of
# shifted compares inside the loop, 21; interleaved stores inside the loop with a runtime trip
# count, 17-20; the write-back fused into the radix-4 loop, 25; 64 metrics as scalar locals, 44:
# in each case LLVM stopped vectorising.)
#
# Decisions: one bit per new state, 1 when the survivor came from the upper predecessor (old
# state j + 32).  A step's 64 bits form one uint64 in "split" order: bit (s >> 1) + 32 (s & 1)
# holds state s (even states in the low half, in order).  The decisions of a sub-block are first
# stored as octets (what the vector compare produces) and packed afterwards, element-wise.  All
# of this assumes a little-endian machine.

@njit(cache=True, nogil=True)
def soft_quantize_kernel(soft, level, out):
    """Scale ``soft`` so its mean magnitude (zeros excluded) is ``level``, clip to +-127, round to int8.

    Returns the scale used (float32; 0 when every value is 0, and then ``out`` is all 0).
    """
    # 16 partial sums in a fixed order, identical compiled and as plain Python (float32 partials:
    # 2048 terms each lose at most ~1e-4 relative, far below what matters for a quantiser scale).
    # Compiled, the whole 16-element groups are one LLVM vector loop that also counts the nonzero
    # values (_abs_sums; the numba loops it replaced kept the partials in memory, 0.7 ns per bit).
    n = soft.shape[0]
    part = np.zeros(16, dtype=np.float32)
    n16 = n - n % 16
    cnt = _abs_sums(soft, n16, part)
    for i in range(n16, n):
        part[i - n16] += abs(soft[i])
        cnt += soft[i] != np.float32(0.0)
    if cnt == 0:
        for i in range(n):
            out[i] = 0
        return np.float32(0.0)
    acc = np.float64(0.0)
    for k in range(16):
        acc += np.float64(part[k])
    scale = np.float32(np.float64(level) * np.float64(cnt) / acc)
    for i in range(n):
        v = min(max(np.float32(soft[i] * scale), np.float32(-127.0)), np.float32(127.0))
        out[i] = np.int8(np.rint(v))
    return scale


@njit(cache=True, nogil=True)
def depuncture_kernel(sym, positions, out):
    """Scatter ``sym[i]`` to ``out[positions[i]]``; the other entries of ``out`` stay (0 = erasure)."""
    for i in range(sym.shape[0]):
        out[positions[i]] = sym[i]


@njit(cache=True, nogil=True)
def viterbi_acs_kernel(sym, n_steps, work, words):
    """Run ``n_steps`` trellis steps and write their packed decisions to ``words[:n_steps]``.

    ``sym`` holds 2 int8 symbols per step (C1, C2; + = bit 0, 0 = erasure).  ``work`` (int16[256])
    holds the path metrics of the 64 states in ``work[0:64]`` (read, then overwritten with the
    metrics after the last step, renormalised so state 0 is 0) and the sign tables in
    ``work[128:256]``: ``sign1``, ``sign2`` (the expected C1/C2 sign on the branch j -> 2j of
    butterfly j, 32 each), then ``sign1[0::2]``, ``sign1[1::2]``, ``sign2[0::2]``, ``sign2[1::2]``
    (16 each).

    Butterfly j joins the old states j, j+32 to the new states 2j, 2j+1; with
    ``m = sign1[j] y1 + sign2[j] y2`` the branch metrics are +m (j -> 2j), -m (j+32 -> 2j),
    -m (j -> 2j+1), +m (j+32 -> 2j+1); the survivor is the larger sum, the lower predecessor on a
    tie.  Steps go in pairs (radix 4, see the section comment) and in sub-blocks of 256 steps,
    whose decision octets (16 KiB) are packed while in L1 cache.  Metrics are renormalised to
    state 0 every 32 steps: the spread of the metrics is at most 12 x 254 (every state is
    reachable from the best one in 6 steps, |m| <= 254), so with 32 more steps of growth they
    stay below 12000, far from the int16 limit.  Cost: 64 add-compare-selects per step, 16 lanes
    wide.
    """
    # Working copies allocated here, not passed in: LLVM knows fresh allocations do not alias
    # each other, which is what lets it vectorise the loops below without run-time overlap
    # checks (with the caller's arrays the kernel measured 3x slower).
    w = np.empty(256, dtype=np.int16)
    for j in range(256):
        w[j] = work[j]
    w64 = w.view(np.uint64)
    nq = work.shape[0] // 16  # 16, but unknown to the compiler: the write-back loop stays a vector loop
    sub = 256  # a literal: with the length as an argument the kernel measured 12% slower
    dec1 = np.empty(32 * sub, dtype=np.uint8)  # first step of each pair, 64 octets per pair
    decx = np.empty(16 * sub, dtype=np.uint8)  # second step: states 4u and 4u+1, 32 octets per pair
    decy = np.empty(16 * sub, dtype=np.uint8)  # second step: states 4u+2 and 4u+3
    t1 = np.empty(sub // 2, dtype=np.uint64)
    t2 = np.empty(sub // 2, dtype=np.uint64)
    d1 = dec1.view(np.uint64)
    dx = decx.view(np.uint64)
    dy = decy.view(np.uint64)
    t1b = t1.view(np.uint8)
    t2h = t2.view(np.uint16)
    for s0 in range(0, n_steps, sub):
        ns = min(sub, n_steps - s0)
        t = 0
        while t + 1 < ns:
            k = 2 * (s0 + t)
            y1 = np.int16(sym[k])
            y2 = np.int16(sym[k + 1])
            z1 = np.int16(sym[k + 2])
            z2 = np.int16(sym[k + 3])
            base = 32 * t
            hb = 16 * t
            for u in range(16):
                # first step: butterflies u and u + 16 give the states 2u, 2u+1 and 2u+32, 2u+33
                # sign1[u + 16] = sign1[u] and sign2[u + 16] = -sign2[u] for this code (the tap
                # D5 is in G2 only), so both branch metrics come from one pair of products
                c1 = np.int16(w[128 + u] * y1)
                c2 = np.int16(w[160 + u] * y2)
                ml = np.int16(c1 + c2)
                mh = np.int16(c1 - c2)
                o0 = w[u]
                o1 = w[16 + u]
                o2 = w[32 + u]
                o3 = w[48 + u]
                pa0 = np.int16(o0 + ml)
                qa0 = np.int16(o2 - ml)
                pa1 = np.int16(o0 - ml)
                qa1 = np.int16(o2 + ml)
                pb0 = np.int16(o1 + mh)
                qb0 = np.int16(o3 - mh)
                pb1 = np.int16(o1 - mh)
                qb1 = np.int16(o3 + mh)
                a0 = max(pa0, qa0)
                a1 = max(pa1, qa1)
                b0 = max(pb0, qb0)
                b1 = max(pb1, qb1)
                dec1[base + u] = qa0 > pa0
                dec1[base + 16 + u] = qb0 > pb0
                dec1[base + 32 + u] = qa1 > pa1
                dec1[base + 48 + u] = qb1 > pb1
                # second step: butterflies 2u (states a0, b0) and 2u + 1 (a1, b1) give 4u..4u+3
                # likewise sign1[2u + 1] = -sign1[2u], sign2[2u + 1] = sign2[2u] (D1 is in G1 only)
                e1 = np.int16(w[192 + u] * z1)
                e2 = np.int16(w[224 + u] * z2)
                me = np.int16(e1 + e2)
                mo = np.int16(e2 - e1)
                p00 = np.int16(a0 + me)
                q00 = np.int16(b0 - me)
                p01 = np.int16(a0 - me)
                q01 = np.int16(b0 + me)
                p10 = np.int16(a1 + mo)
                q10 = np.int16(b1 - mo)
                p11 = np.int16(a1 - mo)
                q11 = np.int16(b1 + mo)
                w[64 + u] = max(p00, q00)
                w[80 + u] = max(p01, q01)
                w[96 + u] = max(p10, q10)
                w[112 + u] = max(p11, q11)
                decx[hb + u] = q00 > p00
                decx[hb + 16 + u] = q01 > p01
                decy[hb + u] = q10 > p10
                decy[hb + 16 + u] = q11 > p11
            # back to state order: word u holds the states 4u..4u+3
            for u in range(nq):
                w64[u] = (np.uint64(np.uint16(w[64 + u])) | (np.uint64(np.uint16(w[80 + u])) << np.uint64(16))
                          | (np.uint64(np.uint16(w[96 + u])) << np.uint64(32))
                          | (np.uint64(np.uint16(w[112 + u])) << np.uint64(48)))
            t += 2
            if (t & 31) == 0:
                ref = w[0]
                for j in range(64):
                    w[j] = np.int16(w[j] - ref)
        npairs = t // 2
        if t < ns:  # odd count: one radix-2 step, its decisions straight into the word
            k = 2 * (s0 + t)
            y1 = np.int16(sym[k])
            y2 = np.int16(sym[k + 1])
            acc = np.uint64(0)
            for j in range(32):
                m = np.int16(np.int16(w[128 + j] * y1) + np.int16(w[160 + j] * y2))
                a = w[j]
                b = w[j + 32]
                p0 = np.int16(a + m)
                q0 = np.int16(b - m)
                p1 = np.int16(a - m)
                q1 = np.int16(b + m)
                w[64 + 2 * j] = max(p0, q0)
                w[65 + 2 * j] = max(p1, q1)
                acc |= (np.uint64(q0 > p0) << np.uint64(j)) | (np.uint64(q1 > p1) << np.uint64(j + 32))
            words[s0 + t] = acc
            for j in range(64):
                w[j] = w[64 + j]
        # First steps: the octets are already in split order; gather 8 octets (0/1) of a uint64
        # into its low octet with three shift-or folds.
        for i in range(8 * npairs):
            x = d1[i]
            x |= x >> np.uint64(7)
            x |= x >> np.uint64(14)
            x |= x >> np.uint64(28)
            t1b[i] = np.uint8(x & np.uint64(0xFF))
        # Second steps: split order wants states 4u and 4u+2 at bits 2u and 2u+1 (and 4u+1, 4u+3
        # at 32 + 2u, 33 + 2u), so pair octet i of decx with octet i of decy (2-bit fields) and
        # fold the fields into 16 bits.
        for i in range(4 * npairs):
            z = dx[i] | (dy[i] << np.uint64(1))
            z = (z | (z >> np.uint64(6))) & np.uint64(0x000F000F000F000F)
            z = (z | (z >> np.uint64(12))) & np.uint64(0x000000FF000000FF)
            z = (z | (z >> np.uint64(24))) & np.uint64(0xFFFF)
            t2h[i] = np.uint16(z)
        for p in range(npairs):
            words[s0 + 2 * p] = t1[p]
            words[s0 + 2 * p + 1] = t2[p]
    ref = w[0]
    for j in range(64):
        work[j] = np.int16(w[j] - ref)


# ---- Viterbi add-compare-select as LLVM vector code -------------------------------------------
#
# The loops of viterbi_acs_kernel leave LLVM's auto-vectoriser to keep the 64 metrics in memory
# between loops (re-ordering ~2.5 ns and decision packing ~1.5 ns of its ~8 ns per step).  Here
# the whole step loop is written as LLVM IR with generic vector types (no target intrinsics, so
# it compiles for any target numba supports): the metrics live in two <32 x i16> values X (states
# with s5 = 0) and Y (s5 = 1) carried through the loop, a step is 4 adds, 2 compares, 2 selects
# (max) and 4 shuffles (which LLVM merges into two 2-source permutes), and each compare
# (<32 x i1>) is stored as one i32 mask.  On AVX-512 that is two zmm registers and kmov stores;
# other targets get the same arithmetic in narrower registers.
#
# Lane layout: lane l of X holds state swap34(l) (bits 3 and 4 exchanged), lane l of Y state
# swap34(l) + 32.  With the butterfly outputs N0 (new states 2j) and N1 (2j + 1) of lanes l, an
# interleave of N0 and N1 inside each 128-bit lane followed by a 128-bit lane shuffle puts every
# new state at the lane this same layout asks for: it is a fixed point, so no other re-ordering
# is needed (in state order every step needs an arbitrary 64-lane permutation).  The price is
# that mask bit l holds state swap34(l): octets 1 and 2 of each mask are exchanged when the masks
# of a sub-block are written as split-order words.  The branch metric m of butterfly j is
# +-(y1 + y2) or +-(y1 - y2); the two sums of every step are computed for a whole sub-block first,
# each stored as an i32 holding the same i16 twice, so a step broadcasts them with plain loads and
# picks per lane with two selects (masks from the sign tables, computed once per call).
# Renormalisation (every 32 steps, to state 0) and the final metrics follow viterbi_acs_kernel
# exactly, so metrics and decisions are bit-identical to it, wrap-around included.
#
# Measured here (ns per trellis step, 16384 steps in cache, numba 0.68 / LLVM 22): 3.4-3.9 with
# AVX-512 code and the same with AVX2 code (NUMBA_CPU_NAME=haswell), 9.3 for baseline x86-64
# (SSE2), against 8.5-9.4 (18 with SSE2) for viterbi_acs_kernel.  The step is bound by the
# metric chain (add, max, permute): without the decision stores it is still 3.4.  Tried and no
# faster: the interleave and lane shuffle kept apart (a freeze between them; LLVM then emits
# unpack + 128-bit shuffles), branch metrics loaded ready-made instead of two selects,
# decisions from the sign of the difference (off the shuffle port); a 32-step body unrolled 4,
# 8, 16 or 32 times is the same.  Elsewhere in the decoder: a traceback reading two rows per
# pass (both candidates of the second row, then a select) measured 1.58 ns per bit against
# 1.48 for viterbi_traceback_kernel, so it was not kept.

_IR_I8 = ir.IntType(8)
_IR_I16 = ir.IntType(16)
_IR_I32 = ir.IntType(32)
_IR_I64 = ir.IntType(64)
_IR_V32 = ir.VectorType(_IR_I16, 32)
_IR_V64 = ir.VectorType(_IR_I16, 64)
_ACS_UNROLL = 8  # steps per pass of the inner loop (of 32 between renormalisations)
_ACS_SUB = 256  # steps per sub-block: the sums (2 KiB) and the masks (2 KiB) stay in L1


def _ir_i64(v):
    return ir.Constant(_IR_I64, v)


def _ir_lanes(idx):
    return ir.Constant(ir.VectorType(_IR_I32, len(idx)), list(idx))


def _swap34(x):
    return (x & ~0x18) | ((x >> 1) & 0x8) | ((x << 1) & 0x10)


def _ir_splat(b, x, n):
    v = b.insert_element(ir.Constant(ir.VectorType(x.type, n), ir.Undefined), x, ir.Constant(_IR_I32, 0))
    return b.shuffle_vector(v, v, _ir_lanes([0] * n))


def _ir_const_like(x, v):
    if isinstance(x.type, ir.VectorType):
        return ir.Constant(x.type, [v] * x.type.count)
    return ir.Constant(x.type, v)


# butterfly outputs (N0 lanes 0..31, N1 lanes 32..63) interleaved inside 128-bit lanes ...
_ACS_UNPACK_LO = [32 * r + 8 * q + e for q in range(4) for e in range(4) for r in range(2)]
_ACS_UNPACK_HI = [32 * r + 8 * q + 4 + e for q in range(4) for e in range(4) for r in range(2)]
# ... then the 128-bit lanes of (lo, hi) that make the next X and Y
_ACS_LANES_X = [8 * q + i + 32 * (k >= 2) for k, q in enumerate((0, 2, 0, 2)) for i in range(8)]
_ACS_LANES_Y = [8 * q + i + 32 * (k >= 2) for k, q in enumerate((1, 3, 1, 3)) for i in range(8)]


class _IrLoop:
    """``for i in range(start, stop)`` in IR with loop-carried values (phi nodes)."""

    def __init__(self, fn, b, name, start, carried=()):
        self.b = b
        pre = b.block
        self.head = fn.append_basic_block(name + ".head")
        self.body = fn.append_basic_block(name + ".body")
        self.exit = fn.append_basic_block(name + ".exit")
        b.branch(self.head)
        b.position_at_end(self.head)
        self.i = b.phi(start.type)
        self.i.add_incoming(start, pre)
        self.vals = []
        for v in carried:
            p = b.phi(v.type)
            p.add_incoming(v, pre)
            self.vals.append(p)

    def while_below(self, stop):
        self.b.cbranch(self.b.icmp_signed("<", self.i, stop), self.body, self.exit)
        self.b.position_at_end(self.body)

    def next(self, step, carried=()):
        b = self.b
        self.i.add_incoming(b.add(self.i, _ir_i64(step)), b.block)
        for p, v in zip(self.vals, carried):
            p.add_incoming(v, b.block)
        b.branch(self.head)
        b.position_at_end(self.exit)


def _ir_acs_step(b, x, y, i, sums, diffs, same, neg, masks):
    """One trellis step on (X, Y) with the sums of step ``i`` of the sub-block; returns (X, Y)."""
    def pair(buf):  # an i32 holding one i16 twice, over 16 lanes: 32 copies of the i16
        return b.bitcast(_ir_splat(b, b.load(b.gep(buf, [i]), align=4), 16), _IR_V32)
    v = b.select(same, pair(sums), pair(diffs))
    m = b.select(neg, b.sub(ir.Constant(_IR_V32, None), v), v)
    p0 = b.add(x, m)  # j -> 2j
    q0 = b.sub(y, m)  # j + 32 -> 2j
    p1 = b.sub(x, m)  # j -> 2j + 1
    q1 = b.add(y, m)  # j + 32 -> 2j + 1
    d0 = b.icmp_signed(">", q0, p0)  # ties keep the lower predecessor
    d1 = b.icmp_signed(">", q1, p1)
    n0 = b.select(d0, q0, p0)
    n1 = b.select(d1, q1, p1)
    i2 = b.shl(i, _ir_i64(1))
    b.store(b.bitcast(d0, _IR_I32), b.gep(masks, [i2]), align=4)
    b.store(b.bitcast(d1, _IR_I32), b.gep(masks, [b.add(i2, _ir_i64(1))]), align=4)
    lo = b.shuffle_vector(n0, n1, _ir_lanes(_ACS_UNPACK_LO))
    hi = b.shuffle_vector(n0, n1, _ir_lanes(_ACS_UNPACK_HI))
    return b.shuffle_vector(lo, hi, _ir_lanes(_ACS_LANES_X)), b.shuffle_vector(lo, hi, _ir_lanes(_ACS_LANES_Y))


def _ir_renorm(b, x, y):
    ref = _ir_splat(b, b.extract_element(x, ir.Constant(_IR_I32, 0)), 32)  # lane 0 of X is state 0
    return b.sub(x, ref), b.sub(y, ref)


def _ir_split_order(b, mask):
    """Exchange octets 1 and 2 of (each lane of) an i32 mask: bit swap34(l) <- bit l."""
    keep = b.and_(mask, _ir_const_like(mask, 0xFF0000FF))
    down = b.and_(b.lshr(mask, _ir_const_like(mask, 8)), _ir_const_like(mask, 0x0000FF00))
    up = b.and_(b.shl(mask, _ir_const_like(mask, 8)), _ir_const_like(mask, 0x00FF0000))
    return b.or_(keep, b.or_(down, up))


def _ir_prefetch(module):
    name = "llvm.prefetch.p0"
    if name in module.globals:
        return module.globals[name]
    return ir.Function(module, ir.FunctionType(ir.VoidType(), [_IR_I8.as_pointer(), _IR_I32, _IR_I32, _IR_I32]),
                       name)


def _ir_acs_function(module):
    """Define (once per module) ``void acs(i8* sym, i64 n_steps, i16* work, i64* words, i8* ahead,
    i64 ahead_bytes)``."""
    name = "pipeline_fec_viterbi_acs_vector"
    if name in module.globals:
        return module.globals[name]
    fnty = ir.FunctionType(ir.VoidType(), [_IR_I8.as_pointer(), _IR_I64, _IR_I16.as_pointer(),
                                           _IR_I64.as_pointer(), _IR_I8.as_pointer(), _IR_I64])
    fn = ir.Function(module, fnty, name)
    fn.linkage = "internal"
    sym, n_steps, work, words, ahead, ahead_bytes = fn.args
    prefetch = _ir_prefetch(module)
    for a in (sym, work, words):
        a.add_attribute("noalias")
    b = ir.IRBuilder(fn.append_basic_block("entry"))
    sums = b.alloca(_IR_I32, size=_ACS_SUB)
    diffs = b.alloca(_IR_I32, size=_ACS_SUB)
    masks = b.alloca(_IR_I32, size=2 * _ACS_SUB)
    for buf in (sums, diffs, masks):
        buf.align = 64
    layout = _ir_lanes([_swap34(p) for p in range(64)])  # an involution: state <-> lane order
    pm = b.load(b.bitcast(work, _IR_V64.as_pointer()), align=2)
    pm = b.shuffle_vector(pm, pm, layout)
    x0 = b.shuffle_vector(pm, pm, _ir_lanes(range(32)))
    y0 = b.shuffle_vector(pm, pm, _ir_lanes(range(32, 64)))
    lanes32 = _ir_lanes([_swap34(q) for q in range(32)])
    s1 = b.load(b.bitcast(b.gep(work, [_ir_i64(128)]), _IR_V32.as_pointer()), align=2)
    s2 = b.load(b.bitcast(b.gep(work, [_ir_i64(160)]), _IR_V32.as_pointer()), align=2)
    s1 = b.shuffle_vector(s1, s1, lanes32)
    s2 = b.shuffle_vector(s2, s2, lanes32)
    same = b.icmp_signed("==", s1, s2)  # m = +-(y1 + y2), else +-(y1 - y2)
    neg = b.icmp_signed("<", s1, ir.Constant(_IR_V32, None))
    sub = _IrLoop(fn, b, "sub", _ir_i64(0), [x0, y0])
    s0 = sub.i
    sub.while_below(n_steps)
    left = b.sub(n_steps, s0)
    ns = b.select(b.icmp_signed("<", left, _ir_i64(_ACS_SUB)), left, _ir_i64(_ACS_SUB))
    # sums and differences of the sub-block, 16 steps per pass, then one at a time
    n16 = b.and_(ns, _ir_i64(~15))
    pre = _IrLoop(fn, b, "pre", _ir_i64(0))
    pre.while_below(n16)
    src = b.gep(sym, [b.shl(b.add(s0, pre.i), _ir_i64(1))])
    raw = b.load(b.bitcast(src, ir.VectorType(_IR_I8, 32).as_pointer()), align=1)
    y1 = b.sext(b.shuffle_vector(raw, raw, _ir_lanes(range(0, 32, 2))), ir.VectorType(_IR_I16, 16))
    y2 = b.sext(b.shuffle_vector(raw, raw, _ir_lanes(range(1, 32, 2))), ir.VectorType(_IR_I16, 16))
    twice = _ir_lanes([k // 2 for k in range(32)])
    for buf, val in ((sums, b.add(y1, y2)), (diffs, b.sub(y1, y2))):
        dst = b.bitcast(b.gep(buf, [pre.i]), _IR_V32.as_pointer())
        b.store(b.shuffle_vector(val, val, twice), dst, align=64)
    pre.next(16)
    pre1 = _IrLoop(fn, b, "pre1", n16)
    pre1.while_below(ns)
    k = b.shl(b.add(s0, pre1.i), _ir_i64(1))
    a1 = b.sext(b.load(b.gep(sym, [k])), _IR_I32)
    a2 = b.sext(b.load(b.gep(sym, [b.add(k, _ir_i64(1))])), _IR_I32)
    for buf, val in ((sums, b.add(a1, a2)), (diffs, b.sub(a1, a2))):
        twice1 = b.mul(b.and_(val, ir.Constant(_IR_I32, 0xFFFF)), ir.Constant(_IR_I32, 0x10001))
        b.store(twice1, b.gep(buf, [pre1.i]), align=4)
    pre1.next(1)
    # runs of 32 steps (straight-line code), renormalised after each; then the last steps
    n32 = b.and_(ns, _ir_i64(~31))
    run = _IrLoop(fn, b, "run", _ir_i64(0), sub.vals)
    run.while_below(n32)
    # meanwhile, bring ``ahead`` (the caller's next input) into cache, 256 octets per 32 steps
    # (8 per step: two float32 symbols at rate 1/2); a hint with no effect on the results
    base = b.shl(b.add(s0, run.i), _ir_i64(3))
    for line in range(4):
        off = b.add(base, _ir_i64(64 * line))
        with b.if_then(b.icmp_unsigned("<", off, ahead_bytes)):
            b.call(prefetch, [b.gep(ahead, [off]), ir.Constant(_IR_I32, 0), ir.Constant(_IR_I32, 2),
                              ir.Constant(_IR_I32, 1)])
    inner = _IrLoop(fn, b, "inner", run.i, run.vals)
    inner.while_below(b.add(run.i, _ir_i64(32)))
    x, y = inner.vals
    for j in range(_ACS_UNROLL):
        x, y = _ir_acs_step(b, x, y, b.add(inner.i, _ir_i64(j)), sums, diffs, same, neg, masks)
    inner.next(_ACS_UNROLL, [x, y])
    run.next(32, _ir_renorm(b, *inner.vals))
    tail = _IrLoop(fn, b, "tail", n32, run.vals)
    tail.while_below(ns)
    tail.next(1, _ir_acs_step(b, tail.vals[0], tail.vals[1], tail.i, sums, diffs, same, neg, masks))
    # masks -> split-order words (even states in the low half), 8 words per pass, then one at a time
    n8 = b.and_(ns, _ir_i64(~7))
    pack = _IrLoop(fn, b, "pack", _ir_i64(0))
    pack.while_below(n8)
    v16 = b.load(b.bitcast(b.gep(masks, [b.shl(pack.i, _ir_i64(1))]), ir.VectorType(_IR_I32, 16).as_pointer()),
                 align=64)
    v16 = _ir_split_order(b, v16)
    v8 = ir.VectorType(_IR_I64, 8)
    lo = b.zext(b.shuffle_vector(v16, v16, _ir_lanes(range(0, 16, 2))), v8)
    hi = b.zext(b.shuffle_vector(v16, v16, _ir_lanes(range(1, 16, 2))), v8)
    word8 = b.or_(lo, b.shl(hi, ir.Constant(v8, [32] * 8)))
    b.store(word8, b.bitcast(b.gep(words, [b.add(s0, pack.i)]), v8.as_pointer()), align=8)
    pack.next(8)
    pack1 = _IrLoop(fn, b, "pack1", n8)
    pack1.while_below(ns)
    i2 = b.shl(pack1.i, _ir_i64(1))
    lo = b.zext(_ir_split_order(b, b.load(b.gep(masks, [i2]), align=4)), _IR_I64)
    hi = b.zext(_ir_split_order(b, b.load(b.gep(masks, [b.add(i2, _ir_i64(1))]), align=4)), _IR_I64)
    b.store(b.or_(lo, b.shl(hi, _ir_i64(32))), b.gep(words, [b.add(s0, pack1.i)]), align=8)
    pack1.next(1)
    sub.next(_ACS_SUB, tail.vals)
    x, y = _ir_renorm(b, *sub.vals)
    pm = b.shuffle_vector(x, y, _ir_lanes(range(64)))
    b.store(b.shuffle_vector(pm, pm, layout), b.bitcast(work, _IR_V64.as_pointer()), align=2)
    b.ret_void()
    return fn


def _ir_abs_sums_function(module):
    """Define (once per module) ``i64 abs_sums(float* soft, i64 n16, float* part)``, see _abs_sums."""
    name = "pipeline_fec_abs_sums"
    if name in module.globals:
        return module.globals[name]
    f32 = ir.FloatType()
    v16f = ir.VectorType(f32, 16)
    v16i = ir.VectorType(_IR_I32, 16)
    fnty = ir.FunctionType(_IR_I64, [f32.as_pointer(), _IR_I64, f32.as_pointer()])
    fn = ir.Function(module, fnty, name)
    fn.linkage = "internal"
    soft, n16, part = fn.args
    for a in (soft, part):
        a.add_attribute("noalias")
    b = ir.IRBuilder(fn.append_basic_block("entry"))
    acc0 = b.load(b.bitcast(part, v16f.as_pointer()), align=4)
    loop = _IrLoop(fn, b, "sum", _ir_i64(0), [acc0, ir.Constant(v16i, None)])
    loop.while_below(n16)
    acc, cnt = loop.vals
    v = b.load(b.bitcast(b.gep(soft, [loop.i]), v16f.as_pointer()), align=4)
    mag = b.bitcast(b.and_(b.bitcast(v, v16i), ir.Constant(v16i, [0x7FFFFFFF] * 16)), v16f)  # |v|
    nonzero = b.zext(b.fcmp_unordered("!=", v, ir.Constant(v16f, None)), v16i)  # as v != 0 (NaN counts)
    loop.next(16, [b.fadd(acc, mag), b.add(cnt, nonzero)])  # no fast-math flags: lane order kept
    acc, cnt = loop.vals
    b.store(acc, b.bitcast(part, v16f.as_pointer()), align=4)
    total = ir.Constant(_IR_I64, 0)
    for k in range(16):
        total = b.add(total, b.zext(b.extract_element(cnt, ir.Constant(_IR_I32, k)), _IR_I64))
    b.ret(total)
    return fn


@intrinsic
def _abs_sums_ir(typingctx, soft, n16, part):
    """Compiled body of :func:`_abs_sums` (C-contiguous float32 arrays)."""
    if not (_is_c_vector(soft, types.float32) and isinstance(n16, types.Integer)
            and _is_c_vector(part, types.float32)):
        return None
    sig = types.int64(soft, n16, part)

    def codegen(context, builder, signature, args):
        s_arr = context.make_array(signature.args[0])(context, builder, args[0])
        p_arr = context.make_array(signature.args[2])(context, builder, args[2])
        n = context.cast(builder, args[1], signature.args[1], types.int64)
        return builder.call(_ir_abs_sums_function(builder.module), [s_arr.data, n, p_arr.data])

    return sig, codegen


def _abs_sums(soft, n16, part):
    """``part[k] += |soft[i + k]|`` for i = 0, 16, 32, ... < ``n16``, in that order (float32);
    returns the number of nonzero values among ``soft[:n16]``.  Compiled: one LLVM vector loop."""
    cnt = 0
    for i in range(0, n16, 16):
        for k in range(16):
            part[k] += abs(soft[i + k])
            cnt += soft[i + k] != np.float32(0.0)
    return cnt


@overload(_abs_sums, jit_options={"nogil": True})
def _abs_sums_jit(soft, n16, part):
    def impl(soft, n16, part):
        return _abs_sums_ir(soft, n16, part)
    return impl


def _is_c_vector(a, dtype):
    return isinstance(a, types.Array) and a.ndim == 1 and a.layout == "C" and a.dtype == dtype


@intrinsic
def _acs_vector_ir(typingctx, sym, n_steps, work, words, ahead):
    """Compiled body of :func:`_acs_vector` (C-contiguous int8, int16, uint64, float32 arrays)."""
    if not (_is_c_vector(sym, types.int8) and isinstance(n_steps, types.Integer)
            and _is_c_vector(work, types.int16) and _is_c_vector(words, types.uint64)
            and _is_c_vector(ahead, types.float32)):
        return None
    sig = types.void(sym, n_steps, work, words, ahead)

    def codegen(context, builder, signature, args):
        arrays = [context.make_array(signature.args[k])(context, builder, args[k]) for k in (0, 2, 3, 4)]
        n = context.cast(builder, args[1], signature.args[1], types.int64)
        ahead_bytes = builder.mul(arrays[3].nitems, _ir_i64(4))
        ahead_ptr = builder.bitcast(arrays[3].data, _IR_I8.as_pointer())
        fn = _ir_acs_function(builder.module)
        builder.call(fn, [arrays[0].data, n, arrays[1].data, arrays[2].data, ahead_ptr, ahead_bytes])
        return context.get_dummy_value()

    return sig, codegen


def _acs_vector(sym, n_steps, work, words, ahead):
    """Plain-Python meaning of the vector add-compare-select: exactly ``viterbi_acs_kernel``.

    Compiled code calls the LLVM vector version instead (overload below); with
    ``NUMBA_DISABLE_JIT=1`` this function runs as it is (``ahead`` is only a cache hint).
    """
    viterbi_acs_kernel(sym, n_steps, work, words)


@overload(_acs_vector, jit_options={"nogil": True})
def _acs_vector_jit(sym, n_steps, work, words, ahead):
    def impl(sym, n_steps, work, words, ahead):
        _acs_vector_ir(sym, n_steps, work, words, ahead)
    return impl


@njit(cache=True, nogil=True)
def viterbi_acs_vector_kernel(sym, n_steps, work, words, ahead):
    """``viterbi_acs_kernel`` with the step loop written as LLVM vector IR: same results.

    ``sym``, ``n_steps``, ``work`` and ``words`` are as for :func:`viterbi_acs_kernel`; metrics,
    decisions (split order), renormalisation and tie-breaking are bit-identical to it, and it is
    what runs as plain Python.  ``ahead`` (float32, may be empty) is only a cache hint: the
    caller's next input, prefetched while the steps run, so the next block does not wait for
    memory.  Notes: 64 add-compare-selects per step as 32-lane int16 vector operations with
    the metrics in registers between steps (see the section comment); about 3.7 ns per step
    against 8-9 for ``viterbi_acs_kernel`` here, with AVX-512 and with AVX2 code
    (bench/bench_fec.py).
    """
    _acs_vector(sym, n_steps, work, words, ahead)


@njit(cache=True, nogil=True)
def viterbi_traceback_kernel(words, n_rows, state, n_emit, out):
    """Trace back from ``state`` after row ``n_rows - 1``; write the bits of rows < ``n_emit`` to ``out``.

    ``words[t]`` holds the 64 decisions of step t in split order (state s at bit
    ``(s >> 1) + 32 (s & 1)``, see ``viterbi_acs_kernel``).  The bit decided at a step is the
    newest bit of the state it leads to; the predecessor of state s is ``(s >> 1) | (decision << 5)``.
    Returns the state before row 0.

    Notes
    -----
    The loop carries the bit position ``q = (s >> 1) | ((s & 1) << 5)`` rather than the state:
    the predecessor's position is ``((q & 1) << 5) | ((q >> 1) & 15) | (decision << 4)``, whose
    first two terms do not wait for the decision, so the serial chain is four operations per row
    (shift the word, mask, shift, or), as with state-order words.  The decided bit is ``q >> 5``.
    """
    one = np.uint64(1)
    q = (np.uint64(state) >> one) | ((np.uint64(state) & one) << np.uint64(5))
    for t in range(n_rows - 1, n_emit - 1, -1):
        rest = ((q & one) << np.uint64(5)) | ((q >> one) & np.uint64(15))
        q = rest | (((words[t] >> q) & one) << np.uint64(4))
    for t in range(n_emit - 1, -1, -1):
        out[t] = q >> np.uint64(5)
        rest = ((q & one) << np.uint64(5)) | ((q >> one) & np.uint64(15))
        q = rest | (((words[t] >> q) & one) << np.uint64(4))
    return ((q & np.uint64(31)) << one) | (q >> np.uint64(5))


@njit(cache=True, nogil=True)
def viterbi_block_kernel(soft, level, quant, positions, mother, n_steps, work, words, rows, keep, out, ahead):
    """Decode one block: quantise, depuncture, ``n_steps`` trellis steps, trace back, keep survivors.

    ``soft`` (float32) is the block's channel symbols, quantised with ``soft_quantize_kernel`` at
    ``level``; for a punctured rate (``positions`` not empty) into ``quant`` and scattered to the
    mother-code positions ``positions`` of ``mother`` (int8, 2 per step; the other entries become
    erasures), else straight into ``mother``.  ``viterbi_acs_vector_kernel`` then appends the
    decisions of ``n_steps`` steps to ``words[rows:]``, prefetching ``ahead`` (float32, the next
    block's symbols if the caller has them, else empty; a cache hint only).  If more than
    ``keep`` rows are then held, the survivor of the best state (the first of equal metrics) is
    traced back, the bits of all but the last ``keep`` rows are written to ``out`` and those
    ``keep`` rows move to the front of ``words``.  Returns the number of bits written.  One call
    per block keeps the per-block cost of the Python wrapper (four kernel dispatches and an
    argmax, ~14 us) down to one dispatch.
    """
    n_sym = soft.shape[0]
    if positions.shape[0] > 0:
        soft_quantize_kernel(soft, level, quant[:n_sym])
        for i in range(2 * n_steps):
            mother[i] = 0
        depuncture_kernel(quant[:n_sym], positions[:n_sym], mother)
    else:
        soft_quantize_kernel(soft, level, mother[:n_sym])
    viterbi_acs_vector_kernel(mother, n_steps, work, words[rows:], ahead)
    total = rows + n_steps
    n_emit = total - keep
    if n_emit <= 0:
        return 0
    best = np.int64(0)  # not the literal 0: the traceback then compiles once, for an int64 state
    for s in range(1, 64):
        if work[s] > work[best]:
            best = s
    viterbi_traceback_kernel(words, total, best, n_emit, out)
    for i in range(keep):
        words[i] = words[n_emit + i]
    return n_emit


# ---- Reed-Solomon decoder ----------------------------------------------------------------------
#
# Logarithms are to the base b = a^11 (the code-root element), so root j is b^j and the locator of
# the symbol of polynomial degree d is b^d.  ``b_exp`` has 512 entries: the sum of two logarithms
# (each < 255) needs no reduction, which keeps ``%`` out of the inner loops.


@njit(cache=True)
def _rs_correct_codeword(rem, n_par, fcr, max_degree, era, n_era, b_exp, b_log, syn, lam, prev, tmp, omega,
                         err_deg, err_val):
    """Locate and size the errors of one codeword from its remainder ``rem`` (conventional basis).

    ``rem[i]`` is the coefficient of x^(2E-1-i) of r(x) mod g(x).  Symbols exist for polynomial
    degrees 0..``max_degree`` (virtual fill above).  Writes the degrees and values of the errors
    to ``err_deg``/``err_val`` and returns their number, or -1 if the word is uncorrectable.
    Steps: syndromes S_j = rem(b^(fcr+j)); Berlekamp-Massey; Chien search over the transmitted
    degrees only; Forney, e = X^(1-fcr) Omega(1/X) / Lambda'(1/X).
    """
    # syndromes by Horner on the 2E-term remainder (not on the 255-term word)
    for j in range(n_par):
        p = fcr + j
        acc = 0
        for i in range(n_par):
            if acc != 0:
                acc = b_exp[b_log[acc] + p]
            acc ^= rem[i]
        syn[j] = acc
    # Berlekamp-Massey: lam = C(x), prev = B(x), both of length 2E + 1
    for i in range(n_par + 1):
        lam[i] = 0
        prev[i] = 0
    lam[0] = 1
    # erasure locator Gamma(x) = prod (1 - Y x), Y = b^deg; it seeds both C(x) and B(x)
    for r in range(n_era):
        y_log = era[r]
        for i in range(r + 1, 0, -1):
            if lam[i - 1] != 0:
                lam[i] ^= b_exp[b_log[lam[i - 1]] + y_log]
    for i in range(n_era + 1):
        prev[i] = lam[i]
    big_l = n_era
    m = 1
    bb = 1
    for n in range(n_era, n_par):
        d = syn[n]
        for i in range(1, big_l + 1):
            if lam[i] != 0 and syn[n - i] != 0:
                d ^= b_exp[b_log[lam[i]] + b_log[syn[n - i]]]
        if d == 0:
            m += 1
            continue
        coef_log = b_log[d] + 255 - b_log[bb]
        if coef_log >= 255:
            coef_log -= 255
        if 2 * big_l <= n + n_era:
            for i in range(n_par + 1):
                tmp[i] = lam[i]
            for i in range(m, n_par + 1):
                if prev[i - m] != 0:
                    lam[i] ^= b_exp[coef_log + b_log[prev[i - m]]]
            big_l = n + 1 + n_era - big_l
            for i in range(n_par + 1):
                prev[i] = tmp[i]
            bb = d
            m = 1
        else:
            for i in range(m, n_par + 1):
                if prev[i - m] != 0:
                    lam[i] ^= b_exp[coef_log + b_log[prev[i - m]]]
            m += 1
    if 2 * (big_l - n_era) + n_era > n_par or big_l > n_par:
        return -1
    for i in range(big_l + 1, n_par + 1):
        if lam[i] != 0:
            return -1
    # Chien search: Lambda(b^-d) for d = 0..max_degree; term i steps by b^-i per degree
    n_terms = 0
    for i in range(1, big_l + 1):
        if lam[i] != 0:
            tmp[n_terms] = b_log[lam[i]]  # running log of lam_i b^(-i d)
            prev[n_terms] = 255 - i  # log step per degree
            n_terms += 1
    n_found = 0
    for d in range(max_degree + 1):
        v = 1  # lam_0
        for t in range(n_terms):
            v ^= b_exp[tmp[t]]
            lt = tmp[t] + prev[t]
            if lt >= 255:
                lt -= 255
            tmp[t] = lt
        if v == 0:
            if n_found == big_l:
                return -1
            err_deg[n_found] = d
            n_found += 1
    if n_found != big_l:
        return -1
    # Omega(x) = S(x) Lambda(x) mod x^L (its degree is below L)
    for i in range(big_l):
        acc = 0
        for j in range(i + 1):
            if lam[j] != 0 and syn[i - j] != 0:
                acc ^= b_exp[b_log[lam[j]] + b_log[syn[i - j]]]
        omega[i] = acc
    # Forney
    for k in range(n_found):
        d = err_deg[k]
        inv_log = (255 - d) % 255  # log of X^-1
        num = 0
        for i in range(big_l - 1, -1, -1):  # Horner, Omega(X^-1)
            if num != 0:
                num = b_exp[b_log[num] + inv_log]
            num ^= omega[i]
        den = 0
        top = big_l if big_l % 2 == 1 else big_l - 1  # Lambda'(x) = sum of odd i: lam_i x^(i-1)
        for i in range(top, 0, -2):
            if den != 0:
                den = b_exp[b_log[den] + 2 * inv_log - 255 * (2 * inv_log >= 255)]
            den ^= lam[i]
        if den == 0:
            return -1
        if num == 0:
            # a zero value is consistent only at an erased position that happened to be right
            erased = False
            for r in range(n_era):
                if era[r] == d:
                    erased = True
            if not erased:
                return -1
            err_val[k] = 0
            continue
        val_log = (b_log[num] + 255 - b_log[den] + d * (256 - fcr)) % 255  # X^(1-fcr) = b^(d (1 - fcr))
        err_val[k] = b_exp[val_log]
    return n_found


@njit(cache=True)
def rs_decode_kernel(blocks, n_rows, interleave, n_par, fcr, fill, era, n_era, dual_to_conv, conv_to_dual, gtab,
                     b_exp, b_log, out, corrected):
    """Decode ``blocks`` (shape (B, (255 - fill) I), dual basis) into ``out`` (shape (B, n_rows I)).

    ``n_rows = 255 - 2E - fill`` data symbols per codeword.  Per codeword the remainder of r(x)
    modulo g(x) is computed with the encoder's LFSR (``rs_remainder_kernel``) and XORed with the
    received check symbols: all zero means a clean codeword (the fast path, about (2E/8 + 1) word
    operations per octet); otherwise ``_rs_correct_codeword`` runs.  ``corrected[b, c]`` receives
    the number of symbols corrected in codeword c of block b, or -1 (data left as received).
    ``era[b, c, :n_era[b, c]]`` are the polynomial degrees of erased symbols of that codeword.
    """
    n_words = gtab.shape[1]
    rem = np.zeros((interleave, n_words), dtype=np.uint64)
    r8 = np.zeros(n_par, dtype=np.int64)
    syn = np.zeros(n_par, dtype=np.int64)
    lam = np.zeros(n_par + 1, dtype=np.int64)
    prev = np.zeros(n_par + 1, dtype=np.int64)
    tmp = np.zeros(n_par + 1, dtype=np.int64)
    omega = np.zeros(n_par, dtype=np.int64)
    err_deg = np.zeros(n_par, dtype=np.int64)
    err_val = np.zeros(n_par, dtype=np.int64)
    n_data = n_rows * interleave
    max_degree = 254 - fill
    for blk in range(blocks.shape[0]):
        block = blocks[blk]
        rs_remainder_kernel(block, n_rows, interleave, dual_to_conv, gtab, rem)
        for i in range(n_data):
            out[blk, i] = block[i]
        for c in range(interleave):
            nonzero = False
            for i in range(n_par):
                w = rem[c, i // 8]
                v = np.int64((w >> np.uint64(56 - 8 * (i % 8))) & np.uint64(0xFF))
                v ^= np.int64(dual_to_conv[block[n_data + i * interleave + c]])
                r8[i] = v
                if v != 0:
                    nonzero = True
            if not nonzero:
                corrected[blk, c] = 0
                continue
            n_err = _rs_correct_codeword(r8, n_par, fcr, max_degree, era[blk, c], n_era[blk, c], b_exp, b_log,
                                         syn, lam, prev, tmp, omega, err_deg, err_val)
            if n_err < 0:
                corrected[blk, c] = -1
                continue
            n_changed = 0
            for k in range(n_err):
                if err_val[k] == 0:
                    continue
                n_changed += 1
                row = max_degree - err_deg[k]  # index within the transmitted codeword
                if row < n_rows:
                    out[blk, row * interleave + c] ^= conv_to_dual[err_val[k]]
            corrected[blk, c] = n_changed
