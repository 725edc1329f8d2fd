"""Numba kernels of pipeline.fec.ldpc.

Rules (DEVELOPERS.md): module-level ``@njit(cache=True)`` functions, every parameter an argument,
contiguous typed arrays, outputs preallocated by the Python wrapper, no validation here.  Each
kernel gives the same answer with ``NUMBA_DISABLE_JIT=1``: integer arithmetic is written on Python
ints (``int(x)``) with explicit clamps, so numpy's int8 wrap-around never enters.
"""

from __future__ import annotations

import numpy as np
from llvmlite import ir
from numba import njit, types
from numba.extending import intrinsic, overload

from pipeline.fec._kernels import _IR_I8, _IR_I32, _IR_I64, _ir_i64, _ir_splat, _IrLoop, _is_c_vector

__all__ = [
    "gf2_rref_kernel",
    "qc_encode_kernel",
    "ldpc_iteration_kernel",
    "ldpc_syndrome_kernel",
    "ldpc_decode_scalar_kernel",
    "ldpc_decode_vector_kernel",
    "block_parity_kernel",
    "LDPC_LANES",
    "LDPC_MAX_ROW_WEIGHT",
]

#: Codewords decoded side by side by the vector kernel (int8 lanes of one vector).
LDPC_LANES = (32, 64)
#: Longest row of H the vector kernel accepts (its per-row buffer; C2 has 32, AR4JA at most 18).
LDPC_MAX_ROW_WEIGHT = 64


# ---- block parities of packed codewords (C2 expurgation checks) ------------------------------------


@njit(cache=True, nogil=True)
def block_parity_kernel(words, n_bits, offset, block_bits, byte_parity, parity):
    """``parity[c, b]`` ^= the parity of the bits of block ``b`` in codeword ``c``.

    Bit ``i`` of ``words[c]`` (uint8, packed MSB first; the first ``n_bits`` count) is variable
    ``offset + i``, which lies in block ``(offset + i) // block_bits``.  ``byte_parity`` (uint8, 256) is
    the parity of each octet value; ``parity`` (uint8, (codewords, blocks), zeroed by the caller) is
    the output.  Octets inside one block cost one table look-up (the block boundary is followed
    incrementally, no division), the few that straddle a boundary (or end the word) are taken bit
    by bit.  Cost: one pass over the octets, about 1 ns each.
    """
    n_oct = min(words.shape[1], (n_bits + 7) // 8)
    for c in range(words.shape[0]):
        b = offset // block_bits
        edge = (b + 1) * block_bits  # first variable of the next block
        acc = 0
        for j in range(n_oct):
            v0 = offset + 8 * j
            last = min(8, n_bits - 8 * j)
            byte = int(words[c, j])
            if last == 8 and v0 + 8 <= edge:
                acc ^= int(byte_parity[byte])
                if v0 + 8 == edge:
                    parity[c, b] ^= acc
                    acc = 0
                    b += 1
                    edge += block_bits
            else:
                for t in range(last):
                    if v0 + t >= edge:
                        parity[c, b] ^= acc
                        acc = 0
                        b += 1
                        edge += block_bits
                    acc ^= (byte >> (7 - t)) & 1
        if acc:  # (b may be one past the last block when the word ends on a block boundary; acc is 0 then)
            parity[c, b] ^= acc


# ---- GF(2) elimination --------------------------------------------------------------------------


@njit(cache=True, nogil=True)
def gf2_rref_kernel(a, n_pivot_cols, pivots):
    """Gauss-Jordan elimination over GF(2) of packed rows ``a`` (uint64, in place); returns the rank.

    Column ``j`` is bit ``j & 63`` of word ``j >> 6``.  Pivots are sought among the first
    ``n_pivot_cols`` columns; ``pivots[r]`` receives the pivot column of row ``r``.
    """
    n_rows = a.shape[0]
    rank = 0
    for col in range(n_pivot_cols):
        if rank == n_rows:
            break
        w = col >> 6
        bit = np.uint64(1) << np.uint64(col & 63)
        p = -1
        for r in range(rank, n_rows):
            if a[r, w] & bit:
                p = r
                break
        if p < 0:
            continue
        if p != rank:
            tmp = a[p, w:].copy()
            a[p, w:] = a[rank, w:]
            a[rank, w:] = tmp
        piv = a[rank, w:]
        for r in range(n_rows):
            if r != rank and (a[r, w] & bit):
                a[r, w:] ^= piv
        pivots[rank] = col
        rank += 1
    return rank


# ---- quasi-cyclic systematic encoder -----------------------------------------------------------


@njit(cache=True, nogil=True)
def qc_encode_kernel(info, gen_words, b, acc, out):
    """Parity of a quasi-cyclic systematic code: ``out[c] = info[c] . W`` over GF(2).

    ``info`` (uint8 0/1, shape (codewords, blocks x b)): the information bits in blocks of ``b``.
    ``gen_words`` (uint64, shape (blocks, segments, words)): for each block the parity of its first
    unit vector as ``segments`` circulant segments of ``b`` bits, each segment stored twice in a
    row (2 b bits, bit j at bit ``j & 63`` of word ``j >> 6``, one spare zero word at the end).
    The parity of unit vector ``r`` of a block is every segment rotated right by ``r``, i.e. bits
    ``b - r .. 2 b - r - 1`` of the doubled segment.  ``acc`` (uint64, shape (segments, ceil(b/64)))
    is work space; ``out`` (uint8 0/1, shape (codewords, segments x b)).
    Cost: (set information bits) x segments x ceil(b / 64) word operations.
    """
    n_cw = info.shape[0]
    n_blk, n_seg, _ = gen_words.shape
    nw = acc.shape[1]
    one = np.uint64(1)
    for c in range(n_cw):
        acc[:, :] = 0
        for blk in range(n_blk):
            base = blk * b
            for r in range(b):
                if info[c, base + r]:
                    off = b - r
                    q = off >> 6
                    sh = np.uint64(off & 63)
                    back = np.uint64(64 - (off & 63))
                    for t in range(n_seg):
                        g = gen_words[blk, t]
                        a = acc[t]
                        if sh == 0:
                            for w in range(nw):
                                a[w] ^= g[q + w]
                        else:
                            for w in range(nw):
                                a[w] ^= (g[q + w] >> sh) | (g[q + w + 1] << back)
        for t in range(n_seg):
            for j in range(b):
                out[c, t * b + j] = np.uint8((acc[t, j >> 6] >> np.uint64(j & 63)) & one)


# ---- layered min-sum decoder: the scalar reference ----------------------------------------------
#
# Fixed point, in units of 1 / llr_scale: posteriors L (one per variable) are int16 in
# -32767..32767, check-to-variable messages R (one per edge) int8 in -127..127.  One iteration
# visits the rows of H in order; for row m with edges j (variables v_j):
#     Q_j = clamp16(L[v_j] - R_j)                     (variable-to-check, extrinsic)
#     a_j = min(|Q_j|, 127)
#     min1, min2 = the two smallest a_j (min1's edge: the first one reaching it), sign product s of Q
#     o(x) = max((x * alpha16) >> 4 - beta, 0)      (normalized: beta = 0; offset: alpha16 = 16)
#     R_j = (s * sign Q_j) * o(min2 if j is min1's edge else min1)
#     L[v_j] = clamp16(Q_j + R_j)
# with clamp16 to -32767..32767; a negative value means bit 1, zero and positive bit 0.  The
# posteriors never saturate (channel values are clipped to +-127, a variable has at most 6 checks
# here), so L stays the channel value plus the current messages: with int8 posteriors that
# saturate, the channel term is forgotten and the decoder can settle on the complement of the
# sent codeword (an all-ones difference is a codeword of these codes) with a zero syndrome, an
# undetected error; measured with offset min-sum at FER ~3e-3, 10 of 54 frame errors were that.
# Known zeros are +32767.  The vector kernel below does exactly this on LDPC_LANES codewords at
# once (int16 and int8 lanes).


@njit(cache=True, nogil=True)
def _quantize_llr(x, scale, clip):
    """round(x * scale) clipped to -clip..clip (round half to even, in float64)."""
    return int(min(max(np.rint(np.float64(x) * scale), -clip), clip))


@njit(cache=True, nogil=True)
def _scale_magnitude(x, alpha16, beta):
    return max(((x * alpha16) >> 4) - beta, 0)


@njit(cache=True, nogil=True)
def ldpc_iteration_kernel(post, msg, row_start, cols, alpha16, beta, qbuf):
    """One layered min-sum iteration on one codeword, in place.

    ``post`` (int16, variables): posteriors; ``msg`` (int8, edges): check-to-variable messages;
    ``row_start``/``cols`` (int32): H in compressed rows; ``alpha16``, ``beta``: the magnitude
    correction ``max((x alpha16 >> 4) - beta, 0)``; ``qbuf`` (int64, >= longest row): work space.
    Cost: about 2 passes over the edges of H.
    """
    n_rows = row_start.shape[0] - 1
    for m in range(n_rows):
        s = row_start[m]
        e = row_start[m + 1]
        m1 = 127
        m2 = 127
        idx = 0
        sgn = 0
        for j in range(s, e):  # written with min/max/selects: data-dependent branches mispredict
            k = j - s
            q = min(max(int(post[cols[j]]) - int(msg[j]), -32767), 32767)
            qbuf[k] = q
            a = min(abs(q), 127)
            sgn ^= (q >> 63) & 1
            lt = a < m1
            m2 = m1 if lt else min(m2, a)
            m1 = min(m1, a)
            idx = k if lt else idx
        o1 = _scale_magnitude(m1, alpha16, beta)
        o2 = _scale_magnitude(m2, alpha16, beta)
        for j in range(s, e):
            k = j - s
            q = qbuf[k]
            mag = o2 if k == idx else o1
            r = -mag if sgn ^ ((q >> 63) & 1) else mag
            msg[j] = r
            post[cols[j]] = min(max(q + r, -32767), 32767)


@njit(cache=True, nogil=True)
def ldpc_syndrome_kernel(post, row_start, cols):
    """Number of rows of H whose check fails on the hard decisions of ``post`` (negative = 1)."""
    n_rows = row_start.shape[0] - 1
    weight = 0
    for m in range(n_rows):
        par = 0
        for j in range(row_start[m], row_start[m + 1]):
            par ^= int(post[cols[j]])
        weight += 1 if par < 0 else 0
    return weight


@njit(cache=True, nogil=True)
def _emit(hard, stride, lane, llr_row, n_sent, head_zeros, out_word):
    """Pack the decided sent bits of a lane (the first ``min(n_sent, 8 x len(out_word))``, MSB first, the
    rest of ``out_word`` zero) and return how many of the ``n_sent`` sent bits the decoder flipped against
    the signs of ``llr_row``."""
    n_out = 8 * out_word.shape[0]
    flips = 0
    acc = 0
    for i in range(n_sent):
        d = 1 if hard[(head_zeros + i) * stride + lane] < 0 else 0
        flips += d ^ (1 if llr_row[i] < 0 else 0)
        if i < n_out:
            acc = (acc << 1) | d
            if i & 7 == 7:
                out_word[i >> 3] = acc
                acc = 0
    if n_sent < n_out and n_sent & 7:
        out_word[n_sent >> 3] = acc << (8 - (n_sent & 7))
    for j in range((n_sent + 7) >> 3, out_word.shape[0]):
        out_word[j] = 0
    return flips


@njit(cache=True, nogil=True)
def _load(post, stride, lane, llr_row, n_sent, scale, clip, head_zeros, qtmp):
    """Quantised channel values of one codeword into a lane: known zeros (+32767), the ``n_sent``
    sent bits, then erasures (0) up to the last variable."""
    for i in range(n_sent):  # contiguous, so LLVM vectorises the rounding
        qtmp[i] = _quantize_llr(llr_row[i], scale, clip)
    for v in range(head_zeros):
        post[v * stride + lane] = 32767
    for i in range(n_sent):
        post[(head_zeros + i) * stride + lane] = qtmp[i]
    for v in range(head_zeros + n_sent, qtmp.shape[0]):
        post[v * stride + lane] = 0


@njit(cache=True, nogil=True)
def _finish_scalar(post, msg, row_start, cols, it, max_iter, alpha16, beta, qbuf):
    """Iterate one codeword until its syndrome is zero or ``max_iter``; returns (iterations, weight)."""
    weight = -1
    while it < max_iter:
        ldpc_iteration_kernel(post, msg, row_start, cols, alpha16, beta, qbuf)
        it += 1
        weight = ldpc_syndrome_kernel(post, row_start, cols)
        if weight == 0:
            break
    if weight < 0:
        weight = ldpc_syndrome_kernel(post, row_start, cols)
    return it, weight


@njit(cache=True, nogil=True)
def ldpc_decode_scalar_kernel(llr, n_sent, scale, clip, head_zeros, row_start, cols, max_iter, alpha16, beta,
                              post, msg, qbuf, qtmp, out_words, out_iters, out_weight, out_flips):
    """Decode codewords one at a time with :func:`ldpc_iteration_kernel` (the reference kernel).

    ``llr`` (float32, shape (codewords, >= n_sent)): soft values of the sent bits, + = bit 0; the
    first ``n_sent`` of each row are variables ``head_zeros ..`` of H (the rest, C2's extension
    bits, are not read).  They are quantised as ``round(llr x scale)`` clipped to +-``clip``; the
    ``head_zeros`` leading variables are set to +32767 (known zeros), the variables after the sent
    ones to 0 (punctured: erasures).  Each codeword starts with all messages 0 and runs
    iterations until the syndrome of the posteriors is zero (checked after every iteration, so
    at least one runs) or ``max_iter``.  Outputs per codeword: ``out_words`` the decided sent bits
    packed MSB first (as many as it holds; the information bits come first, bits past ``n_sent`` are 0),
    ``out_iters`` the iterations run,
    ``out_weight`` the final syndrome weight (0 = success), ``out_flips`` how many sent bits
    differ from the signs of ``llr``.  ``post`` (int16, variables), ``msg`` (int8, edges), ``qbuf``,
    ``qtmp`` (int8, variables): work space.
    """
    for c in range(llr.shape[0]):
        _load(post, 1, 0, llr[c], n_sent, scale, clip, head_zeros, qtmp)
        msg[:] = 0
        it, weight = _finish_scalar(post, msg, row_start, cols, 0, max_iter, alpha16, beta, qbuf)
        out_iters[c] = it
        out_weight[c] = weight
        out_flips[c] = _emit(post, 1, 0, llr[c], n_sent, head_zeros, out_words[c])


# ---- layered min-sum decoder: codewords side by side as LLVM vector code -----------------------
#
# The same arithmetic on W = 32 or 64 codewords at once: variable v of lane l is post[v W + l],
# the message of edge j of lane l is msg[j W + l], so every load and store of the row update is
# one <W x i16> or <W x i8> vector and the lanes never interact.  numba does not vectorise this by
# itself (it widens the arithmetic to int64), so the row loop is written as generic LLVM IR:
# saturating add/subtract, smin/smax/abs intrinsics, selects; no target-specific intrinsics.  A lane whose
# ``fresh`` flag is set reads its old messages as 0 (a new codeword was loaded into it), so each
# lane is refilled as soon as its codeword is finished and no lane waits for the slowest.  The
# codewords that finish (or arrive) after the same iteration are moved out (or in) together: the
# sign bits of all lanes are first gathered into one 64-bit word per variable (another small IR
# loop), so the W-lane rows are read once and not once per codeword (emission went from 18 to 3 us
# per C2 codeword).


def _ir_vec_intrinsic(module, base, vty):
    """Declare a generic LLVM vector intrinsic: ``llvm.<base>.v<N>i<B>(v, v)``, or ``(v, i1)`` for abs."""
    name = f"llvm.{base}.v{vty.count}i{vty.element.width}"
    if name in module.globals:
        return module.globals[name]
    second = ir.IntType(1) if base == "abs" else vty
    return ir.Function(module, ir.FunctionType(vty, [vty, second]), name)


def _ir_new_function(module, name, arg_types):
    """``(fn, builder)`` for a new internal ``void name(arg_types)`` whose pointer arguments are
    ``noalias``, or ``(fn, None)`` when the module has it already."""
    if name in module.globals:
        return module.globals[name], None
    fn = ir.Function(module, ir.FunctionType(ir.VoidType(), arg_types), name)
    fn.linkage = "internal"
    for a in fn.args:
        if isinstance(a.type, ir.PointerType):
            a.add_attribute("noalias")
    return fn, ir.IRBuilder(fn.append_basic_block("entry"))


def _ir_row_bounds(b, row_start, m):
    """First and one-past-last edge of row ``m`` (i64) from the int32 ``row_start``."""
    s = b.sext(b.load(b.gep(row_start, [m])), _IR_I64)
    return s, b.sext(b.load(b.gep(row_start, [b.add(m, _ir_i64(1))])), _IR_I64)


def _ir_ldpc_iteration_function(module, lanes):
    """Define ``void it(i16* post, i8* msg, i8* fresh, i32* row_start, i32* cols_w, i64 n_rows, i32 alpha16,
    i32 beta)`` for ``lanes`` codewords (cols_w = column x lanes, an index into post)."""
    i16 = ir.IntType(16)
    i8p, i16p, i32p = _IR_I8.as_pointer(), i16.as_pointer(), _IR_I32.as_pointer()
    fn, b = _ir_new_function(module, f"pipeline_fec_ldpc_iteration_{lanes}",
                             [i16p, i8p, i8p, i32p, i32p, _IR_I64, _IR_I32, _IR_I32])
    if b is None:
        return fn
    vec = ir.VectorType(_IR_I8, lanes)
    v16 = ir.VectorType(i16, lanes)
    post, msg, fresh, row_start, cols_w, n_rows, alpha16, beta = fn.args
    sadd16 = _ir_vec_intrinsic(module, "sadd.sat", v16)
    ssub16 = _ir_vec_intrinsic(module, "ssub.sat", v16)
    smax16 = _ir_vec_intrinsic(module, "smax", v16)
    smin16 = _ir_vec_intrinsic(module, "smin", v16)
    abs16 = _ir_vec_intrinsic(module, "abs", v16)
    smin8 = _ir_vec_intrinsic(module, "smin", vec)
    qbuf = b.alloca(v16, size=LDPC_MAX_ROW_WEIGHT)
    qbuf.align = 64
    zero = ir.Constant(vec, None)
    z16 = ir.Constant(v16, None)
    lo16 = ir.Constant(v16, [-32767] * lanes)
    cap16 = ir.Constant(v16, [127] * lanes)
    top = ir.Constant(vec, [127] * lanes)
    is_fresh = b.icmp_signed("!=", b.load(b.bitcast(fresh, vec.as_pointer()), align=1), zero)
    a16 = _ir_splat(b, b.trunc(alpha16, i16), lanes)
    b16 = _ir_splat(b, b.trunc(beta, i16), lanes)
    four = ir.Constant(v16, [4] * lanes)
    w64 = _ir_i64(lanes)

    def at(base, idx, ty):  # <lanes x ty>* at base + idx (elements)
        return b.bitcast(b.gep(base, [idx]), ty.as_pointer())

    def scaled(x):
        y = b.sub(b.ashr(b.mul(b.sext(x, v16), a16), four), b16)
        return b.trunc(b.call(smax16, [y, z16]), vec)

    rows = _IrLoop(fn, b, "row", _ir_i64(0))
    rows.while_below(n_rows)
    s, e = _ir_row_bounds(b, row_start, rows.i)
    p1 = _IrLoop(fn, b, "pass1", s, [top, top, zero, z16])
    p1.while_below(e)
    m1, m2, idx, sgn = p1.vals
    k = b.sub(p1.i, s)
    off = b.sext(b.load(b.gep(cols_w, [p1.i])), _IR_I64)
    lv = b.load(at(post, off, v16), align=2)
    rv = b.select(is_fresh, zero, b.load(at(msg, b.mul(p1.i, w64), vec), align=1))
    q = b.call(smax16, [b.call(ssub16, [lv, b.sext(rv, v16)]), lo16])
    b.store(q, b.gep(qbuf, [k]), align=64)
    a = b.trunc(b.call(smin16, [b.call(abs16, [q, ir.Constant(ir.IntType(1), 0)]), cap16]), vec)
    lt = b.icmp_signed("<", a, m1)
    m2n = b.select(lt, m1, b.call(smin8, [m2, a]))
    m1n = b.select(lt, a, m1)
    idxn = b.select(lt, _ir_splat(b, b.trunc(k, _IR_I8), lanes), idx)
    p1.next(1, [m1n, m2n, idxn, b.xor(sgn, q)])
    m1, m2, idx, sgn = p1.vals
    o1 = scaled(m1)
    o2 = scaled(m2)
    p2 = _IrLoop(fn, b, "pass2", s)
    p2.while_below(e)
    k = b.sub(p2.i, s)
    q = b.load(b.gep(qbuf, [k]), align=64)
    mag = b.select(b.icmp_signed("==", idx, _ir_splat(b, b.trunc(k, _IR_I8), lanes)), o2, o1)
    neg = b.icmp_signed("<", b.xor(sgn, q), z16)
    rn = b.select(neg, b.sub(zero, mag), mag)
    b.store(rn, at(msg, b.mul(p2.i, w64), vec), align=1)
    off = b.sext(b.load(b.gep(cols_w, [p2.i])), _IR_I64)
    b.store(b.call(smax16, [b.call(sadd16, [q, b.sext(rn, v16)]), lo16]), at(post, off, v16), align=2)
    p2.next(1)
    rows.next(1)
    b.ret_void()
    return fn


def _ir_ldpc_syndrome_function(module, lanes):
    """Define ``void syn(i16* post, i32* row_start, i32* cols_w, i64 n_rows, i32* weight)`` (weight per lane)."""
    i16p, i32p = ir.IntType(16).as_pointer(), _IR_I32.as_pointer()
    fn, b = _ir_new_function(module, f"pipeline_fec_ldpc_syndrome_{lanes}", [i16p, i32p, i32p, _IR_I64, i32p])
    if b is None:
        return fn
    vec = ir.VectorType(ir.IntType(16), lanes)
    v32 = ir.VectorType(_IR_I32, lanes)
    post, row_start, cols_w, n_rows, weight = fn.args
    zero = ir.Constant(vec, None)
    rows = _IrLoop(fn, b, "row", _ir_i64(0), [ir.Constant(v32, None)])
    rows.while_below(n_rows)
    s, e = _ir_row_bounds(b, row_start, rows.i)
    edges = _IrLoop(fn, b, "edge", s, [zero])
    edges.while_below(e)
    off = b.sext(b.load(b.gep(cols_w, [edges.i])), _IR_I64)
    lv = b.load(b.bitcast(b.gep(post, [off]), vec.as_pointer()), align=2)
    edges.next(1, [b.xor(edges.vals[0], lv)])
    bad = b.zext(b.icmp_signed("<", edges.vals[0], zero), v32)
    rows.next(1, [b.add(rows.vals[0], bad)])
    b.store(rows.vals[0], b.bitcast(weight, v32.as_pointer()), align=4)
    b.ret_void()
    return fn


def _ir_ldpc_signs_function(module, lanes):
    """Define ``void signs(i16* post, i64 n_var, i64* masks)``: bit l of masks[v] = (post[v lanes + l] < 0)."""
    fn, b = _ir_new_function(module, f"pipeline_fec_ldpc_signs_{lanes}",
                             [ir.IntType(16).as_pointer(), _IR_I64, _IR_I64.as_pointer()])
    if b is None:
        return fn
    v16 = ir.VectorType(ir.IntType(16), lanes)
    post, n_var, masks = fn.args
    loop = _IrLoop(fn, b, "var", _ir_i64(0))
    loop.while_below(n_var)
    x = b.load(b.bitcast(b.gep(post, [b.mul(loop.i, _ir_i64(lanes))]), v16.as_pointer()), align=2)
    bits = b.bitcast(b.icmp_signed("<", x, ir.Constant(v16, None)), ir.IntType(lanes))
    if lanes < 64:
        bits = b.zext(bits, _IR_I64)
    b.store(bits, b.gep(masks, [loop.i]), align=8)
    loop.next(1)
    b.ret_void()
    return fn


def _make_signs_intrinsic(lanes):
    @intrinsic
    def _signs_ir(typingctx, post, masks):
        if not (_is_c_vector(post, types.int16) and _is_c_vector(masks, types.uint64)):
            return None
        sig = types.void(post, masks)

        def codegen(context, builder, signature, args):
            arrs = [context.make_array(signature.args[k])(context, builder, args[k]) for k in range(2)]
            fn = _ir_ldpc_signs_function(builder.module, lanes)
            builder.call(fn, [arrs[0].data, arrs[1].nitems, arrs[1].data])
            return context.get_dummy_value()

        return sig, codegen
    return _signs_ir


_signs_ir_32 = _make_signs_intrinsic(32)
_signs_ir_64 = _make_signs_intrinsic(64)


def _lanes_signs(post, masks):
    """Plain-Python meaning of the sign masks: bit l of ``masks[v]`` is ``post[v W + l] < 0``, W = lanes."""
    lanes = post.shape[0] // masks.shape[0]
    neg = (post.reshape(masks.shape[0], lanes) < 0).astype(np.uint64)
    masks[:] = (neg << np.arange(lanes, dtype=np.uint64)).sum(axis=1, dtype=np.uint64)


@overload(_lanes_signs, jit_options={"nogil": True})
def _lanes_signs_jit(post, masks):
    def impl(post, masks):
        if post.shape[0] == 64 * masks.shape[0]:
            _signs_ir_64(post, masks)
        else:
            _signs_ir_32(post, masks)
    return impl


def _int_args_ok(*args):
    return all(isinstance(a, types.Integer) for a in args)


def _make_iteration_intrinsic(lanes):
    @intrinsic
    def _iteration_ir(typingctx, post, msg, fresh, row_start, cols_w, alpha16, beta):
        if not (_is_c_vector(post, types.int16) and _is_c_vector(msg, types.int8)
                and _is_c_vector(fresh, types.int8) and _is_c_vector(row_start, types.int32)
                and _is_c_vector(cols_w, types.int32) and _int_args_ok(alpha16, beta)):
            return None
        sig = types.void(post, msg, fresh, row_start, cols_w, alpha16, beta)

        def codegen(context, builder, signature, args):
            arrs = [context.make_array(signature.args[k])(context, builder, args[k]) for k in range(5)]
            n_rows = builder.sub(arrs[3].nitems, _ir_i64(1))
            a16 = context.cast(builder, args[5], signature.args[5], types.int32)
            bt = context.cast(builder, args[6], signature.args[6], types.int32)
            fn = _ir_ldpc_iteration_function(builder.module, lanes)
            builder.call(fn, [arrs[0].data, arrs[1].data, arrs[2].data, arrs[3].data, arrs[4].data, n_rows, a16, bt])
            return context.get_dummy_value()

        return sig, codegen
    return _iteration_ir


def _make_syndrome_intrinsic(lanes):
    @intrinsic
    def _syndrome_ir(typingctx, post, row_start, cols_w, weight):
        if not (_is_c_vector(post, types.int16) and _is_c_vector(row_start, types.int32)
                and _is_c_vector(cols_w, types.int32) and _is_c_vector(weight, types.int32)):
            return None
        sig = types.void(post, row_start, cols_w, weight)

        def codegen(context, builder, signature, args):
            arrs = [context.make_array(signature.args[k])(context, builder, args[k]) for k in range(4)]
            n_rows = builder.sub(arrs[1].nitems, _ir_i64(1))
            fn = _ir_ldpc_syndrome_function(builder.module, lanes)
            builder.call(fn, [arrs[0].data, arrs[1].data, arrs[2].data, n_rows, arrs[3].data])
            return context.get_dummy_value()

        return sig, codegen
    return _syndrome_ir


_iteration_ir_32 = _make_iteration_intrinsic(32)
_iteration_ir_64 = _make_iteration_intrinsic(64)
_syndrome_ir_32 = _make_syndrome_intrinsic(32)
_syndrome_ir_64 = _make_syndrome_intrinsic(64)


def _lanes_iteration(post, msg, fresh, row_start, cols_w, alpha16, beta):
    """Plain-Python meaning of the vector iteration: :func:`ldpc_iteration_kernel` on each lane.

    Compiled code runs the LLVM vector version instead (overload below).
    """
    lanes = fresh.shape[0]
    cols = (cols_w // lanes).astype(np.int32)
    qbuf = np.zeros(LDPC_MAX_ROW_WEIGHT, dtype=np.int64)
    for lane in range(lanes):
        p = post[lane::lanes].copy()
        m = msg[lane::lanes].copy()
        if fresh[lane]:
            m[:] = 0
        ldpc_iteration_kernel(p, m, row_start, cols, alpha16, beta, qbuf)
        post[lane::lanes] = p
        msg[lane::lanes] = m


@overload(_lanes_iteration, jit_options={"nogil": True})
def _lanes_iteration_jit(post, msg, fresh, row_start, cols_w, alpha16, beta):
    def impl(post, msg, fresh, row_start, cols_w, alpha16, beta):
        if fresh.shape[0] == 64:
            _iteration_ir_64(post, msg, fresh, row_start, cols_w, alpha16, beta)
        else:
            _iteration_ir_32(post, msg, fresh, row_start, cols_w, alpha16, beta)
    return impl


def _lanes_syndrome(post, row_start, cols_w, weight):
    """Plain-Python meaning of the vector syndrome: :func:`ldpc_syndrome_kernel` on each lane."""
    lanes = weight.shape[0]
    cols = (cols_w // lanes).astype(np.int32)
    for lane in range(lanes):
        weight[lane] = ldpc_syndrome_kernel(post[lane::lanes].copy(), row_start, cols)


@overload(_lanes_syndrome, jit_options={"nogil": True})
def _lanes_syndrome_jit(post, row_start, cols_w, weight):
    def impl(post, row_start, cols_w, weight):
        if weight.shape[0] == 64:
            _syndrome_ir_64(post, row_start, cols_w, weight)
        else:
            _syndrome_ir_32(post, row_start, cols_w, weight)
    return impl


@njit(cache=True, nogil=True)
def _load_lanes(post, lanes_in, n_in, lane_cw, llr, n_sent, scale, clip, head_zeros, qlanes):
    """:func:`_load` for the codewords ``lane_cw[lanes_in[t]]``, t < ``n_in``, into their lanes at once.

    Each codeword is first quantised contiguously (vectorised), then the values are written
    variable by variable, so each W-lane row of ``post`` is touched once for all of them.
    """
    if n_in == 0:
        return
    lanes = lane_cw.shape[0]
    n_var = qlanes.shape[1]
    for t in range(n_in):
        row = llr[lane_cw[lanes_in[t]]]
        q = qlanes[t]
        for i in range(n_sent):
            q[i] = _quantize_llr(row[i], scale, clip)
    for v in range(n_var):
        base = v * lanes
        if v < head_zeros:
            for t in range(n_in):
                post[base + lanes_in[t]] = 32767
        elif v < head_zeros + n_sent:
            for t in range(n_in):
                post[base + lanes_in[t]] = qlanes[t, v - head_zeros]
        else:
            for t in range(n_in):
                post[base + lanes_in[t]] = 0


@njit(cache=True, nogil=True)
def _emit_lanes(post, lanes_out, n_out, lane_cw, llr, n_sent, head_zeros, masks, out_words, out_flips):
    """:func:`_emit` for the codewords in lanes ``lanes_out[t]``, t < ``n_out``, at once: the sign bits
    of all lanes are gathered into one word per variable (``masks``), then read per lane."""
    _lanes_signs(post, masks)
    n_oct = out_words.shape[1]
    n_full = min(n_oct, n_sent // 8)  # octets of 8 sent bits; a last partial one is padded with zeros
    one = np.uint64(1)
    for t in range(n_out):
        lane = np.uint64(lanes_out[t])
        c = lane_cw[lanes_out[t]]
        word = out_words[c]
        for j in range(n_full):
            acc = np.uint64(0)
            base = head_zeros + 8 * j
            for b in range(8):
                acc = (acc << one) | ((masks[base + b] >> lane) & one)
            word[j] = np.uint8(acc)
        if n_full < n_oct and n_sent % 8:
            acc = np.uint64(0)
            base = head_zeros + 8 * n_full
            for b in range(8):
                acc = acc << one
                if b < n_sent % 8:
                    acc = acc | ((masks[base + b] >> lane) & one)
            word[n_full] = np.uint8(acc)
        row = llr[c]
        flips = 0
        for i in range(n_sent):
            flips += int((masks[head_zeros + i] >> lane) & one) ^ (1 if row[i] < 0 else 0)
        out_flips[c] = flips


@njit(cache=True, nogil=True)
def _finish_lane(post, msg, fresh, lane, row_start, cols, it, max_iter, alpha16, beta, p1, m1, qbuf):
    """Move lane ``lane`` out of the vector state and finish it with the scalar kernel."""
    lanes = fresh.shape[0]
    for v in range(p1.shape[0]):
        p1[v] = post[v * lanes + lane]
    if fresh[lane]:
        m1[:] = 0
    else:
        for j in range(m1.shape[0]):
            m1[j] = msg[j * lanes + lane]
    return _finish_scalar(p1, m1, row_start, cols, it, max_iter, alpha16, beta, qbuf)


@njit(cache=True, nogil=True)
def ldpc_decode_vector_kernel(llr, n_sent, scale, clip, head_zeros, row_start, cols, cols_w, max_iter, alpha16,
                              beta, tail_lanes, post, msg, fresh, weight, lane_cw, lane_it, p1, m1, qbuf, qtmp,
                              out_words, out_iters, out_weight, out_flips):
    """:func:`ldpc_decode_scalar_kernel` with W = ``fresh.shape[0]`` (32 or 64) codewords side by side.

    Same arguments and outputs, bit for bit, plus: ``cols_w`` (int32) = ``cols`` x W; ``post``
    (int16, variables x W), ``msg`` (int8, edges x W), ``fresh`` (int8, W), ``weight`` (int32, W),
    ``lane_cw``, ``lane_it`` (int64, W), ``p1`` (int16, variables), ``m1`` (int8, edges): work
    space (``qbuf``, ``qtmp`` as for the scalar kernel).  A lane takes the next codeword as soon
    as its own is finished (syndrome zero or ``max_iter``); once every codeword is in a lane and
    at most ``tail_lanes`` lanes are still busy, those are finished one by one by the scalar
    kernel (also when there are that few codewords to begin with).  Cost per iteration: about 2
    passes over the edges with W-lane int16/int8 vector operations, plus one pass for the syndromes.
    """
    lanes = fresh.shape[0]
    n_cw = llr.shape[0]
    n_var = p1.shape[0]
    nxt = 0
    active = 0
    moved = np.zeros(lanes, np.int64)  # lanes whose codeword leaves (or arrives) at this iteration
    qlanes = np.zeros((lanes, n_var), np.int8)  # quantised channel values of the arriving codewords
    masks = np.zeros(n_var, np.uint64)  # sign bits of all lanes, one word per variable
    n_new = 0
    for lane in range(lanes):
        fresh[lane] = -1
        lane_it[lane] = 0
        if n_cw > tail_lanes and nxt < n_cw:
            lane_cw[lane] = nxt
            moved[n_new] = lane
            n_new += 1
            nxt += 1
            active += 1
        else:
            for v in range(n_var):
                post[v * lanes + lane] = 32767
            lane_cw[lane] = -1
    _load_lanes(post, moved, n_new, lane_cw, llr, n_sent, scale, clip, head_zeros, qlanes)
    while active > tail_lanes or (active > 0 and nxt < n_cw):
        _lanes_iteration(post, msg, fresh, row_start, cols_w, alpha16, beta)
        fresh[:] = 0
        _lanes_syndrome(post, row_start, cols_w, weight)
        n_done = 0
        for lane in range(lanes):
            c = lane_cw[lane]
            if c < 0:
                continue
            lane_it[lane] += 1
            if weight[lane] == 0 or lane_it[lane] >= max_iter:
                out_iters[c] = lane_it[lane]
                out_weight[c] = weight[lane]
                moved[n_done] = lane
                n_done += 1
        if n_done == 0:
            continue
        _emit_lanes(post, moved, n_done, lane_cw, llr, n_sent, head_zeros, masks, out_words, out_flips)
        n_new = 0
        for t in range(n_done):
            lane = moved[t]
            if nxt < n_cw:
                lane_cw[lane] = nxt
                lane_it[lane] = 0
                fresh[lane] = -1
                moved[n_new] = lane
                n_new += 1
                nxt += 1
            else:
                lane_cw[lane] = -1
                active -= 1
        _load_lanes(post, moved, n_new, lane_cw, llr, n_sent, scale, clip, head_zeros, qlanes)
    for lane in range(lanes):
        c = lane_cw[lane]
        if c < 0:
            continue
        it, w = _finish_lane(post, msg, fresh, lane, row_start, cols, lane_it[lane], max_iter, alpha16, beta,
                             p1, m1, qbuf)
        out_iters[c] = it
        out_weight[c] = w
        out_flips[c] = _emit(p1, 1, 0, llr[c], n_sent, head_zeros, out_words[c])
    if n_cw <= tail_lanes:
        ldpc_decode_scalar_kernel(llr, n_sent, scale, clip, head_zeros, row_start, cols, max_iter, alpha16, beta,
                                  p1, m1, qbuf, qtmp, out_words, out_iters, out_weight, out_flips)
