"""Numba kernels of the CCSDS turbo encoder and decoder.

Rules (DEVELOPERS.md): module-level ``@njit(cache=True)`` functions, every parameter an argument
(tables passed in), contiguous typed arrays, outputs preallocated by the Python wrapper, no
validation here.  Each kernel gives the same answer with ``NUMBA_DISABLE_JIT=1``: integers read
from arrays are turned into Python/int64 integers with ``int()`` before any arithmetic, so no
int16 wrap-around can happen in plain Python either.

Decoder layout.  Frames sit side by side in ``L`` lanes (``L = 32`` for the vector kernel, 1 for
the scalar path): channel values ``ch[t, r, lane]`` (row 0 the systematic bit, rows 1.. the
parity outputs of that component, int16, 1 LSB = 1/8 nat), extrinsic values ``ext[i, lane]``
in natural (information block) order, hard decisions as one uint32 per bit with bit ``lane`` set
for a 1.  The component decoder reads its a-priori values at ``read_idx[t]`` and writes its
extrinsic values and decisions at ``write_idx[t]``: the identity for encoder a, the interleaver
for encoder b, so no separate (de)interleaving pass is needed.  Rows ``k`` (always zero: the
a-priori value of the tail bits) and ``k + 1`` (where the tail's outputs are dropped) follow
the ``k`` information rows.
"""

from __future__ import annotations

import numpy as np
from llvmlite import ir
from numba import njit, types
from numba.core import cgutils
from numba.extending import intrinsic, overload

from pipeline.fec._kernels import _ir_i64, _ir_splat, _IrLoop, _is_c_vector
from pipeline.fec.turbo._code import component_trellis

__all__ = [
    "LANES",
    "WINDOW",
    "VECTOR_CONFIGS",
    "vector_config",
    "PARAMS_DTYPE",
    "turbo_encode_kernel",
    "turbo_quantize_kernel",
    "turbo_load_kernel",
    "turbo_siso_kernel",
    "turbo_siso_lanes",
    "turbo_siso_vector_kernel",
    "turbo_decode_kernel",
]

#: Decoder parameters, one record (read by name in the kernels).
PARAMS_DTYPE = np.dtype([
    ("llr_scale", np.float32),   # LSB per nat of the channel LLRs
    ("llr_clip", np.int64),      # channel values are clipped to +-llr_clip
    ("ext_clip", np.int64),      # extrinsic values are clipped to +-ext_clip
    ("scale_num", np.int64),     # extrinsic scaling (e * scale_num) >> scale_shift
    ("scale_shift", np.int64),
    ("corr_c", np.int64),        # vector kernel's log-MAP correction max(0, corr_c - |d|) >> corr_shift
    ("corr_shift", np.int64),
    ("neg", np.int64),           # metric of the states a path cannot be in at the block ends
    ("norm_mask", np.int64),     # metrics are renormalised when (step & norm_mask) == 0
    ("max_iterations", np.int64),
    ("check_fecf", np.int64),    # 1: a frame passes only if its CRC-16 (FECF included) is 0
    ("cfg_a", np.int64),         # vector kernel configurations of decoders a and b (VECTOR_CONFIGS)
    ("cfg_b", np.int64),
    ("use_vector", np.int64),    # 1: the LLVM vector component decoder, 0: the scalar one per lane
])


# ---- encoder -----------------------------------------------------------------------------------

@njit(cache=True)
def turbo_encode_kernel(info, perm, feedback, forward, source, work, out):
    """Encode each row of ``info`` (uint8 bits, shape (B, k)) into ``out`` (uint8, shape (B, n)).

    ``feedback`` (int64[5]) and ``forward`` (int64[3, 5]) are G0 and G1..G3, coefficient of D^i at
    index i.  ``work`` (uint8, shape (2, k + 4, 4)) receives, per encoder (a, b) and bit time, the
    systematic bit and the three forward outputs; ``out[b, i] = work.flat[source[i]]``.  Encoder a
    reads the block in natural order, encoder b bit ``perm[s]`` at time s; for the last four bit
    times each encoder's input is its own feedback sum, which empties the register.  Cost: about
    40 operations per bit time and encoder.
    """
    n_blocks, k = info.shape
    steps = work.shape[1]
    flat = work.reshape(-1)
    for blk in range(n_blocks):
        for e in range(2):
            d1 = 0
            d2 = 0
            d3 = 0
            d4 = 0
            for t in range(steps):
                fb = (feedback[1] & d1) ^ (feedback[2] & d2) ^ (feedback[3] & d3) ^ (feedback[4] & d4)
                if t < k:
                    u = int(info[blk, t]) if e == 0 else int(info[blk, perm[t]])
                else:
                    u = fb
                a = u ^ fb
                work[e, t, 0] = u
                for j in range(3):
                    g = forward[j]
                    work[e, t, j + 1] = (g[0] & a) ^ (g[1] & d1) ^ (g[2] & d2) ^ (g[3] & d3) ^ (g[4] & d4)
                d4 = d3
                d3 = d2
                d2 = d1
                d1 = a
        for i in range(source.shape[0]):
            out[blk, i] = flat[source[i]]


# ---- decoder: loading a frame into a lane --------------------------------------------------------

@njit(cache=True, nogil=True)
def turbo_quantize_kernel(llr, params, q):
    """``q[i] = clip(rint(llr[i] * llr_scale), +-llr_clip)`` for i < len(llr) (int16); ``q[len(llr)] = 0``."""
    p = params[0]
    scale = np.float32(p.llr_scale)
    clip = np.float32(p.llr_clip)
    n = llr.shape[0]
    for i in range(n):
        v = np.rint(np.float32(llr[i] * scale))
        q[i] = np.int16(min(max(v, -clip), clip))
    q[n] = 0


@njit(cache=True, nogil=True)
def turbo_load_kernel(q, lanes, n_load, pos, ch):
    """``ch[t, r, lanes[j]] = q[j, pos[t, r]]`` for j < ``n_load``: quantised codewords into lanes.

    ``pos[t, r]`` is the index of the channel bit of row ``r`` at step ``t``, or ``q.shape[1] - 1``
    (where ``q`` holds 0) for a punctured bit or the tail of encoder b's systematic line.  All the
    lanes are filled in one pass over ``ch``, so a refill costs one sweep of the channel rows
    however many lanes it fills.
    """
    for t in range(pos.shape[0]):
        for r in range(pos.shape[1]):
            i = pos[t, r]
            for j in range(n_load):
                ch[t, r, lanes[j]] = q[j, i]


# ---- decoder: one component (scalar reference) -----------------------------------------------------

@njit(cache=True, nogil=True)
def _maxstar_pairs(x, y, out, table):
    """``out[i] = max(x[i], y[i]) + table[min(|x[i] - y[i]|, len(table) - 1)]`` (the last entry is 0).

    With ``table = [0]`` this is max (max-log-MAP); with the correction table, max* (log-MAP).
    """
    last = table.shape[0] - 1
    for i in range(out.shape[0]):
        u = x[i]
        v = y[i]
        if u >= v:
            out[i] = u + table[min(u - v, last)]
        else:
            out[i] = v + table[min(v - u, last)]


@njit(cache=True, nogil=True)
def _maxstar_tree(v, table):
    """M over ``v`` (16 values, overwritten) as a balanced pairwise tree in index order."""
    width = v.shape[0] // 2
    while width >= 1:
        _maxstar_pairs(v[0:2 * width:2], v[1:2 * width:2], v[:width], table)
        width //= 2
    return v[0]


@njit(cache=True, nogil=True)
def turbo_siso_kernel(ch, lane, ext_in, read_idx, ext_out, write_idx, dec, next_state, label, params, table,
                      alpha, gam):
    """One soft-in soft-out pass of a component decoder over lane ``lane`` (fixed point, scalar).

    Parameters
    ----------
    ch : int16, shape (T, R, L)
        Channel values of this component (row 0 systematic, rows 1..R-1 parities).
    ext_in, ext_out : int16, shape (k + 2, L)
        A-priori values in (read at ``read_idx[t]``) and extrinsic values out (written at
        ``write_idx[t]``).
    dec : uint32, shape (k + 2,)
        Bit ``lane`` of ``dec[write_idx[t]]`` becomes the hard decision on the step's input bit.
    next_state, label : int64, shape (16, 2)
        The component trellis (:func:`pipeline.fec.turbo.component_trellis`).
    params : PARAMS_DTYPE record array
    table : int64
        The correction table of M, last entry 0: ``[0]`` for max-log-MAP.
    alpha : int64, shape (T, 16); gam : int64, shape (2**R,)
        Work arrays.

    Notes
    -----
    Branch metric of a branch with output bits c_r: ``sum over rows with c_r = 0 of L_r``, where
    ``L_0 = ch_0 + ext_in`` (systematic plus a-priori) and ``L_r = ch_r``.  Forward metrics start
    at ``[0, neg, ..., neg]`` (state 0), backward metrics end there (both encoders terminate in
    state 0); ``M(x, y) = max(x, y) + table[min(|x - y|, len - 1)]`` (max* with the table
    correction; max for max-log-MAP).  ``alpha_{t+1}(s') = M`` over the two branches into s'
    (the predecessor with D4 = 0 first); ``beta_t(s) = M(x(s, 0) + L_0, x(s, 1))`` with
    ``x(s, u)`` = parity metric + ``beta_{t+1}(next)``; the extrinsic value is
    ``e = M_s(alpha_t(s) + x(s, 0)) - M_s(alpha_t(s) + x(s, 1))``, each M over the 16 states as a
    balanced pairwise tree in state order; the decision is ``L_0 + e < 0``.  The value stored for
    the other decoder is ``clip((clip(e, 32767 // scale_num) * scale_num) >> scale_shift,
    ext_clip)``.  Metrics are renormalised to state 0 when ``(step & norm_mask) == 0`` (forward:
    step t + 1, backward: step t).  Cost: 32 branch additions and 16 M per step forward, 64
    additions and 46 M backward.
    """
    p = params[0]
    neg = p.neg
    mask = p.norm_mask
    ext_clip = p.ext_clip
    num = p.scale_num
    shift = p.scale_shift
    pre_clip = 32767 // num
    n_steps = ch.shape[0]
    n_rows = ch.shape[1]
    n_lab = 1 << n_rows
    # the two branches into each state: predecessor and label (D4 = 0 first)
    pred = np.empty((2, 16), dtype=np.int64)
    plab = np.empty((2, 16), dtype=np.int64)
    for s in range(16):
        for u in range(2):
            pred[s >> 3, next_state[s, u]] = s
            plab[s >> 3, next_state[s, u]] = label[s, u]
    cur = np.empty(16, dtype=np.int64)
    new = np.empty(16, dtype=np.int64)
    c0 = np.empty(16, dtype=np.int64)
    c1 = np.empty(16, dtype=np.int64)
    t0 = np.empty(16, dtype=np.int64)
    t1 = np.empty(16, dtype=np.int64)
    for s in range(16):
        cur[s] = neg
    cur[0] = 0
    for t in range(n_steps):
        for s in range(16):
            alpha[t, s] = cur[s]
        l0 = int(ch[t, 0, lane]) + int(ext_in[read_idx[t], lane])
        for lab in range(n_lab):
            g = 0 if lab & 1 else l0
            for r in range(1, n_rows):
                if not (lab >> r) & 1:
                    g += int(ch[t, r, lane])
            gam[lab] = g
        for s in range(16):
            c0[s] = cur[pred[0, s]] + gam[plab[0, s]]
            c1[s] = cur[pred[1, s]] + gam[plab[1, s]]
        _maxstar_pairs(c0, c1, new, table)
        if ((t + 1) & mask) == 0:
            ref = new[0]
            for s in range(16):
                new[s] -= ref
        for s in range(16):
            cur[s] = new[s]
    # backward pass with the extrinsic output
    for s in range(16):
        cur[s] = neg
    cur[0] = 0
    for t in range(n_steps - 1, -1, -1):
        l0 = int(ch[t, 0, lane]) + int(ext_in[read_idx[t], lane])
        for lab in range(0, n_lab, 2):
            g = 0
            for r in range(1, n_rows):
                if not (lab >> r) & 1:
                    g += int(ch[t, r, lane])
            gam[lab] = g
            gam[lab + 1] = g
        for s in range(16):
            x0 = gam[label[s, 0]] + cur[next_state[s, 0]]
            x1 = gam[label[s, 1]] + cur[next_state[s, 1]]
            c0[s] = x0 + l0
            c1[s] = x1
            t0[s] = alpha[t, s] + x0
            t1[s] = alpha[t, s] + x1
        _maxstar_pairs(c0, c1, new, table)
        e = _maxstar_tree(t0, table) - _maxstar_tree(t1, table)
        w = write_idx[t]
        bit = np.uint32(1) << np.uint32(lane)
        if l0 + e < 0:
            dec[w] |= bit
        else:
            dec[w] &= ~bit
        ec = min(max(e, -pre_clip), pre_clip)
        ext_out[w, lane] = min(max((ec * num) >> shift, -ext_clip), ext_clip)
        if (t & mask) == 0:
            ref = new[0]
            for s in range(16):
                new[s] -= ref
        for s in range(16):
            cur[s] = new[s]


# ---- decoder: the component decoder as LLVM vector IR, 32 frames side by side ------------------
#
# Numba does not vectorise the scalar component decoder (``turbo_siso_kernel``) across frames by
# itself, so the same fixed-point algorithm is written here as LLVM IR with generic vector types
# (no target-specific intrinsics: it compiles for any target numba supports; on AVX-512 every
# ``<32 x i16>`` value is one zmm register).  Each of the 16 state metrics is one vector holding
# that state's metric for 32 frames, so a trellis step is lane-wise adds, maxima and (log-MAP)
# corrections with no shuffles at all; the trellis wiring, the branch labels and the tree order
# are unrolled at code-generation time from :func:`pipeline.fec.turbo.component_trellis`.
#
# Every operation is the one of the scalar kernel on each lane: the metrics stay within int16
# (bounds in ``_decoder.py``), so plain adds equal the scalar kernel's int64 adds; the max*
# correction ``max(0, corr_c - |d|) >> corr_shift`` is the scalar kernel's table in closed form,
# computed from a saturating difference whose magnitude, clamped at 32767, still gives the same
# entry (every entry from ``corr_c`` on is 0).  tests/test_fec_turbo_decoder.py compares the two
# lane by lane at full scale.
#
# Memory: the forward metrics of a whole block (1 KiB per step, 9 MiB for k = 8920) do not stay in
# cache, and streaming them measured 1.2x (log-MAP) to 2.6x (max-log) slower per step than on a
# block that fits in L2. So a pass runs forward once keeping only the metrics at the first step of
# every WINDOW steps, then for each segment from the last: forward again from its checkpoint into a
# WINDOW-step buffer (32 KiB, in L1/L2), then backward over it with the outputs. That is exact (the
# recomputed metrics are bit-identical) for one extra forward recursion. Measured here (AVX-512,
# numba 0.68 / LLVM 22, ns per trellis step of one component over 32 lanes, k = 8920, the machine
# shared): log-MAP 107-110, max-log-MAP 36-42 (44-54 before the butterfly emission order below,
# which cuts register spills); the scalar kernel takes 93 per step for one frame. log-MAP is bound
# by its operation count: a max* is six vector operations (max, saturating subtract, abs,
# saturating subtract from corr_c, shift, add) against one for max. Tried and not kept: a plain max
# in the output tree of log-MAP (recursions with max*): 25 % faster, but the unscaled extrinsic
# values are then overconfident and the decoder stops converging (FER 0.5 at 0.9 dB, k = 8920).

#: Frames decoded side by side by the vector kernel.
LANES = 32
#: Trellis steps per segment of the vector kernel's backward pass (forward metrics kept: 32 KiB).
WINDOW = 32
#: Vector kernel configurations: (component outputs, log-MAP).  The component outputs are those
#: of encoder a or b at some rate (131.0-B sec. 6.3 h): G1; G2, G3; G1, G2, G3; G1, G3.
VECTOR_CONFIGS: tuple[tuple[tuple[int, ...], bool], ...] = tuple(
    (outputs, logmap) for outputs in ((1,), (2, 3), (1, 2, 3), (1, 3)) for logmap in (False, True)
)

_I16 = ir.IntType(16)
_I32 = ir.IntType(32)
_I64 = ir.IntType(64)
_V = ir.VectorType(_I16, LANES)
_VP = _V.as_pointer()


def vector_config(outputs: tuple[int, ...], logmap: bool) -> int:
    """Index into :data:`VECTOR_CONFIGS` of a component's outputs and the algorithm."""
    return VECTOR_CONFIGS.index((tuple(outputs), bool(logmap)))


def _intrinsic_fn(module, name, ret, args):
    if name in module.globals:
        return module.globals[name]
    return ir.Function(module, ir.FunctionType(ret, args), name)


class _Ops:
    """Lane-wise int16 helpers on one IR builder."""

    def __init__(self, b: ir.IRBuilder, logmap: bool, corr_c, corr_shift):
        self.b = b
        m = b.module
        self.smax = _intrinsic_fn(m, "llvm.smax.v32i16", _V, [_V, _V])
        self.smin = _intrinsic_fn(m, "llvm.smin.v32i16", _V, [_V, _V])
        self.ssub_sat = _intrinsic_fn(m, "llvm.ssub.sat.v32i16", _V, [_V, _V])
        self.usub_sat = _intrinsic_fn(m, "llvm.usub.sat.v32i16", _V, [_V, _V])
        self.abs = _intrinsic_fn(m, "llvm.abs.v32i16", _V, [_V, ir.IntType(1)])
        self.logmap = logmap
        self.corr_c = corr_c
        self.corr_shift = corr_shift

    def add(self, x, y):
        if y is None:
            return x
        if x is None:
            return y
        return self.b.add(x, y)

    def m(self, x, y):
        """max(x, y), or max* = max + table[|x - y|] (table[d] = max(0, corr_c - d) >> corr_shift)."""
        b = self.b
        mx = b.call(self.smax, [x, y])
        if not self.logmap:
            return mx
        d = b.call(self.abs, [b.call(self.ssub_sat, [x, y]), ir.Constant(ir.IntType(1), 0)])
        corr = b.lshr(b.call(self.usub_sat, [self.corr_c, d]), self.corr_shift)
        return b.add(mx, corr)


def _norm_branch(fn, b, cond, vals):
    """``vals - vals[0]`` when ``cond``, else ``vals``, as a branch (taken once per 8 steps)."""
    pre = b.block
    norm = fn.append_basic_block("norm")
    join = fn.append_basic_block("join")
    b.cbranch(cond, norm, join)
    b.position_at_end(norm)
    ref = vals[0]  # each lane subtracts its own state-0 metric
    normed = [b.sub(v, ref) for v in vals]
    b.branch(join)
    b.position_at_end(join)
    out = []
    for v, w in zip(vals, normed):
        phi = b.phi(_V)
        phi.add_incoming(v, pre)
        phi.add_incoming(w, norm)
        out.append(phi)
    return out


def _siso_function(module, cfg: int):
    """Define (once per module) the component decoder of configuration ``cfg``:

    ``void siso(i16* ch, i64 n_steps, i16* ext_in, i32* read_idx, i16* ext_out, i32* write_idx,
    i32* dec, i16* alpha, i16 ext_clip, i16 scale_num, i16 scale_shift, i16 corr_c, i16 corr_shift,
    i16 neg, i64 norm_mask)`` with the layouts of ``turbo_siso_kernel`` (32 lanes); ``alpha`` holds
    :data:`WINDOW` rows of 16 x 32 metrics (one segment's forward metrics), then one row per
    segment (the forward metrics at its first step).
    """
    name = f"pipeline_fec_turbo_siso_{cfg}"
    if name in module.globals:
        return module.globals[name]
    outputs, logmap = VECTOR_CONFIGS[cfg]
    n_rows = 1 + len(outputs)
    next_state, label = component_trellis(outputs)
    i16p = _I16.as_pointer()
    i32p = _I32.as_pointer()
    fnty = ir.FunctionType(ir.VoidType(), [i16p, _I64, i16p, i32p, i16p, i32p, i32p, i16p] + [_I16] * 6 + [_I64])
    fn = ir.Function(module, fnty, name)
    fn.linkage = "internal"
    (ch, n_steps, ext_in, read_idx, ext_out, write_idx, dec, alpha,
     ext_clip, scale_num, scale_shift, corr_c, corr_shift, neg, norm_mask) = fn.args
    for a in (ch, ext_in, read_idx, ext_out, write_idx, dec, alpha):
        a.add_attribute("noalias")
    b = ir.IRBuilder(fn.append_basic_block("entry"))
    ops = _Ops(b, logmap, _ir_splat(b, corr_c, LANES), _ir_splat(b, corr_shift, LANES))
    v_neg = _ir_splat(b, neg, LANES)
    v_zero = ir.Constant(_V, None)
    v_clip = _ir_splat(b, ext_clip, LANES)
    v_mclip = b.sub(v_zero, v_clip)
    v_num = _ir_splat(b, scale_num, LANES)
    v_shift = _ir_splat(b, scale_shift, LANES)
    v_pre = _ir_splat(b, b.sdiv(ir.Constant(_I16, 32767), scale_num), LANES)
    v_mpre = b.sub(v_zero, v_pre)

    def i64(v):
        return _ir_i64(v)

    def vptr(base, index):
        return b.bitcast(b.gep(base, [b.mul(index, i64(LANES))]), _VP)

    def vload(base, index):
        return b.load(vptr(base, index), align=2)

    def metrics_row(row):
        """Pointers to the 16 state vectors of ``alpha`` row ``row``."""
        return [vptr(alpha, b.add(b.mul(row, i64(16)), i64(s))) for s in range(16)]

    def step_inputs(t):
        """(L0 = systematic + a-priori, [parity rows]) of step t."""
        row = b.mul(t, i64(n_rows))
        sys_v = vload(ch, row)
        apriori = vload(ext_in, b.sext(b.load(b.gep(read_idx, [t])), _I64))
        pars = [vload(ch, b.add(row, i64(r))) for r in range(1, n_rows)]
        return b.add(sys_v, apriori), pars

    def parity_metric(cache, pars, plab):
        """Sum of the parity rows whose bit in ``plab`` is 0 (None when the sum is empty)."""
        if plab not in cache:
            acc = None
            for r, pv in enumerate(pars):
                if not (plab >> r) & 1:
                    acc = ops.add(acc, pv)
            cache[plab] = acc
        return cache[plab]

    # Butterflies: states j and j + 8 lead to 2j and 2j + 1 (the register shifts by one).  Steps are
    # emitted one butterfly at a time so that few vectors are live at once (fewer register spills);
    # the order of emission does not change any result.
    into = {}  # new state -> [(old state, label)] with the D4 = 0 predecessor first
    for s_old in range(16):
        for u in range(2):
            into.setdefault(int(next_state[s_old, u]), []).append((s_old, int(label[s_old, u])))

    def forward_step(t, cur):
        """The forward metrics of step t + 1 from those of step t (renormalised as the scalar kernel)."""
        l0, pars = step_inputs(t)
        pcache, gcache = {}, {}

        def gamma(lab):
            if lab not in gcache:
                gcache[lab] = ops.add(parity_metric(pcache, pars, lab >> 1), None if lab & 1 else l0)
            return gcache[lab]

        new = [None] * 16
        for j in range(8):
            for ns in (2 * j, 2 * j + 1):
                (s0, lab0), (s1, lab1) = sorted(into[ns])
                new[ns] = ops.m(ops.add(cur[s0], gamma(lab0)), ops.add(cur[s1], gamma(lab1)))
        t1 = b.add(t, i64(1))
        return _norm_branch(fn, b, b.icmp_signed("==", b.and_(t1, norm_mask), i64(0)), new)

    def backward_step(t, cur, alpha_row):
        """The backward metrics of step t from those of step t + 1; stores the step's outputs."""
        l0, pars = step_inputs(t)
        pcache = {}
        new = [None] * 16
        # the balanced pairwise tree over states 0..15 is M(tree(0..7), tree(8..15)); each half is
        # reduced as its terms arrive (a stack of complete subtrees), which builds the same tree
        stacks = {(u, half): [] for u in range(2) for half in range(2)}

        def push(stack, v):
            level = 0
            while stack and stack[-1][0] == level:
                v = ops.m(stack.pop()[1], v)
                level += 1
            stack.append((level, v))

        for j in range(8):
            for s in (j, j + 8):
                alpha_s = b.load(alpha_row[s], align=2)
                x = []
                for u in range(2):
                    lab = int(label[s, u])
                    x.append(ops.add(parity_metric(pcache, pars, lab >> 1), cur[int(next_state[s, u])]))
                    push(stacks[(u, s >> 3)], b.add(alpha_s, x[u]))
                new[s] = ops.m(b.add(x[0], l0), x[1])
        m = [ops.m(stacks[(u, 0)][0][1], stacks[(u, 1)][0][1]) for u in range(2)]
        e = b.sub(m[0], m[1])
        w = b.sext(b.load(b.gep(write_idx, [t])), _I64)
        bits = b.icmp_signed("<", b.add(l0, e), v_zero)
        b.store(b.bitcast(bits, _I32), b.gep(dec, [w]), align=4)
        ec = b.call(ops.smin, [b.call(ops.smax, [e, v_mpre]), v_pre])
        es = b.ashr(b.mul(ec, v_num), v_shift)
        es = b.call(ops.smin, [b.call(ops.smax, [es, v_mclip]), v_clip])
        b.store(es, vptr(ext_out, w), align=2)
        return _norm_branch(fn, b, b.icmp_signed("==", b.and_(t, norm_mask), i64(0)), new)

    start = [v_zero] + [v_neg] * 15  # the encoders start and end in state 0
    n_seg = b.udiv(b.add(n_steps, i64(WINDOW - 1)), i64(WINDOW))
    # pass 1: forward over the block, keeping the metrics at the first step of each segment
    fwd = _IrLoop(fn, b, "fwd", i64(0), start)
    fwd.while_below(n_steps)
    t = fwd.i
    with b.if_then(b.icmp_signed("==", b.and_(t, i64(WINDOW - 1)), i64(0))):
        for ptr, v in zip(metrics_row(b.add(i64(WINDOW), b.udiv(t, i64(WINDOW)))), fwd.vals):
            b.store(v, ptr, align=2)
    fwd.next(1, forward_step(t, fwd.vals))
    # pass 2: segments from the last, each: forward again from its checkpoint into rows 0..WINDOW-1
    # (L1/L2-resident), then backward over it with the outputs
    seg = _IrLoop(fn, b, "seg", i64(0), start)
    seg.while_below(n_seg)
    j = b.sub(b.sub(n_seg, i64(1)), seg.i)
    t0 = b.mul(j, i64(WINDOW))
    t_end = b.add(t0, i64(WINDOW))
    t_end = b.select(b.icmp_signed("<", t_end, n_steps), t_end, n_steps)
    ck = [b.load(ptr, align=2) for ptr in metrics_row(b.add(i64(WINDOW), j))]
    refwd = _IrLoop(fn, b, "refwd", t0, ck)
    refwd.while_below(t_end)
    t = refwd.i
    for ptr, v in zip(metrics_row(b.sub(t, t0)), refwd.vals):
        b.store(v, ptr, align=2)
    refwd.next(1, forward_step(t, refwd.vals))
    bwd = _IrLoop(fn, b, "bwd", i64(0), seg.vals)
    bwd.while_below(b.sub(t_end, t0))
    t = b.sub(b.sub(t_end, i64(1)), bwd.i)
    bwd.next(1, backward_step(t, bwd.vals, metrics_row(b.sub(t, t0))))
    seg.next(1, bwd.vals)
    b.ret_void()
    return fn


def _ok_args(ch, ext_in, read_idx, ext_out, write_idx, dec, alpha, scalars):
    def c_array(a, dtype, ndim):
        return isinstance(a, types.Array) and a.ndim == ndim and a.layout == "C" and a.dtype == dtype
    return (c_array(ch, types.int16, 3) and c_array(ext_in, types.int16, 2) and _is_c_vector(read_idx, types.int32)
            and c_array(ext_out, types.int16, 2) and _is_c_vector(write_idx, types.int32)
            and _is_c_vector(dec, types.uint32) and c_array(alpha, types.int16, 3)
            and all(isinstance(x, types.Integer) for x in scalars))


@intrinsic
def siso_lanes_ir(typingctx, cfg, ch, ext_in, read_idx, ext_out, write_idx, dec, alpha, ext_clip, scale_num,
                  scale_shift, corr_c, corr_shift, neg, norm_mask):
    """Compiled component decoder over 32 lanes, configuration ``cfg`` (see ``turbo_siso_lanes``)."""
    scalars = (cfg, ext_clip, scale_num, scale_shift, corr_c, corr_shift, neg, norm_mask)
    if not _ok_args(ch, ext_in, read_idx, ext_out, write_idx, dec, alpha, scalars):
        return None
    sig = types.void(cfg, ch, ext_in, read_idx, ext_out, write_idx, dec, alpha, ext_clip, scale_num, scale_shift,
                     corr_c, corr_shift, neg, norm_mask)

    def codegen(context, builder, signature, args):
        tys = signature.args
        arr = {k: context.make_array(tys[k])(context, builder, args[k]) for k in range(1, 8)}
        n_steps = cgutils.unpack_tuple(builder, arr[1].shape, 3)[0]
        small = [builder.trunc(context.cast(builder, args[k], tys[k], types.int64), _I16) for k in range(8, 14)]
        mask = context.cast(builder, args[14], tys[14], types.int64)
        cfg_v = context.cast(builder, args[0], tys[0], types.int64)
        call_args = [arr[1].data, n_steps, arr[2].data, arr[3].data, arr[4].data, arr[5].data, arr[6].data,
                     arr[7].data] + small + [mask]
        fn = builder.function
        end = fn.append_basic_block("siso.end")
        switch = builder.switch(cfg_v, end)
        for cfg_i in range(len(VECTOR_CONFIGS)):
            case = fn.append_basic_block(f"siso.cfg{cfg_i}")
            switch.add_case(ir.Constant(_I64, cfg_i), case)
            builder.position_at_end(case)
            builder.call(_siso_function(builder.module, cfg_i), call_args)
            builder.branch(end)
        builder.position_at_end(end)
        return context.get_dummy_value()

    return sig, codegen


# ---- decoder: one component over all lanes (vector kernel) ---------------------------------------

def turbo_siso_lanes(cfg, ch, active, ext_in, read_idx, ext_out, write_idx, dec, next_state, label, params, table,
                     alpha16):
    """One component pass over every lane: ``turbo_siso_kernel`` on each lane set in ``active``.

    Compiled, this is the LLVM vector kernel above (configuration ``cfg``, the index into
    ``VECTOR_CONFIGS`` of the component's outputs and algorithm, which must match ``next_state``,
    ``label`` and ``table``): it computes all 32 lanes at once with the same integer arithmetic
    in int16 and gives the same results on the active lanes (the others hold garbage, which
    nobody reads); as plain Python (``NUMBA_DISABLE_JIT=1``) the scalar kernel runs lane by
    lane.  ``alpha16`` (int16, shape (WINDOW + ceil(T / WINDOW), 16, 32)) is the vector kernel's
    work array.
    """
    n_steps = ch.shape[0]
    alpha = np.empty((n_steps, 16), dtype=np.int64)
    gam = np.empty(1 << ch.shape[1], dtype=np.int64)
    for lane in range(ch.shape[2]):
        if (int(active) >> lane) & 1:
            turbo_siso_kernel(ch, lane, ext_in, read_idx, ext_out, write_idx, dec, next_state, label, params,
                              table, alpha, gam)


@overload(turbo_siso_lanes, jit_options={"nogil": True})
def _turbo_siso_lanes_jit(cfg, ch, active, ext_in, read_idx, ext_out, write_idx, dec, next_state, label, params, table,
                          alpha16):
    def impl(cfg, ch, active, ext_in, read_idx, ext_out, write_idx, dec, next_state, label, params, table, alpha16):
        p = params[0]
        siso_lanes_ir(cfg, ch, ext_in, read_idx, ext_out, write_idx, dec, alpha16, p.ext_clip, p.scale_num,
                      p.scale_shift, p.corr_c, p.corr_shift, p.neg, p.norm_mask)
    return impl


@njit(cache=True, nogil=True)
def turbo_siso_vector_kernel(cfg, ch, active, ext_in, read_idx, ext_out, write_idx, dec, next_state, label, params,
                             table, alpha16):
    """:func:`turbo_siso_lanes` as a compiled entry point (the decoder's component pass over 32 lanes)."""
    turbo_siso_lanes(cfg, ch, active, ext_in, read_idx, ext_out, write_idx, dec, next_state, label, params, table,
                     alpha16)


# ---- decoder: iterations, early stop, lanes refilled as frames finish ---------------------------

@njit(cache=True, nogil=True)
def _lane_octets(dec, lane, octets):
    """The decisions of lane ``lane`` (``dec[i]`` bit ``lane``, i < 8 len(octets)) packed MSB first."""
    for j in range(octets.shape[0]):
        v = 0
        for b in range(8):
            v = (v << 1) | int((dec[8 * j + b] >> np.uint32(lane)) & np.uint32(1))
        octets[j] = v


@njit(cache=True, nogil=True)
def _crc16(data, table):
    c = 0xFFFF
    for i in range(data.shape[0]):
        c = ((c << 8) & 0xFFFF) ^ table[((c >> 8) ^ int(data[i])) & 0xFF]
    return c


@njit(cache=True, nogil=True)
def turbo_decode_kernel(llr, params, pos_a, pos_b, read_a, write_a, read_b, write_b, trellis_a, trellis_b, table,
                        crc_table, ch_a, ch_b, ext_ab, ext_ba, dec_a, dec_b, alpha16, out, iterations, passed):
    """Decode the codewords ``llr`` (float32, shape (B, n)) into ``out`` (uint8, shape (B, k/8)).

    Frames run in the ``L = ch_a.shape[2]`` lanes; a lane whose frame has finished takes the next
    frame at the start of the next iteration.  An iteration is a pass of decoder a
    (``read_a``/``write_a``, identity order) then of decoder b (interleaved order), each through
    :func:`turbo_siso_vector_kernel` (``params.use_vector``) or :func:`turbo_siso_kernel` per lane.  The
    decisions of the two passes are stable when they agree on all k bits.  A frame stops when
    it is stable and, with ``check_fecf``, the CRC-16 of its k/8 decided octets (FECF included)
    is 0; after ``max_iterations`` it stops in any case.  ``passed[f]`` is then the check
    (``check_fecf``: CRC zero; else: stable), ``iterations[f]`` the iterations run, ``out[f]``
    decoder b's decisions.  ``trellis_*`` is (next_state, label) stacked, shape (2, 16, 2).
    Work arrays: ``ch_a``/``ch_b`` (int16, (T, R, L)), ``ext_ab``/``ext_ba`` (int16, (k + 2, L)),
    ``dec_a``/``dec_b`` (uint32, (k + 2,)), ``alpha16`` (int16, (WINDOW + ceil(T / WINDOW), 16, 32), or empty).
    """
    p = params[0]
    n_frames = llr.shape[0]
    n_lanes = ch_a.shape[2]
    k = dec_a.shape[0] - 2
    n_oct = k // 8
    octets = np.empty(n_oct, dtype=np.uint8)
    q = np.empty((n_lanes, llr.shape[1] + 1), dtype=np.int16)
    load = np.empty(n_lanes, dtype=np.int64)
    frame_of = np.full(n_lanes, -1, dtype=np.int64)
    iters = np.zeros(n_lanes, dtype=np.int64)
    alpha = np.empty((ch_a.shape[0], 16), dtype=np.int64)
    gam = np.empty(1 << max(ch_a.shape[1], ch_b.shape[1]), dtype=np.int64)
    ext_ab[:, :] = 0
    ext_ba[:, :] = 0
    next_frame = 0
    n_active = 0
    while True:
        # refill free lanes
        n_load = 0
        for lane in range(n_lanes):
            if frame_of[lane] < 0 and next_frame < n_frames:
                frame_of[lane] = next_frame
                iters[lane] = 0
                turbo_quantize_kernel(llr[next_frame], params, q[n_load])
                load[n_load] = lane
                n_load += 1
                next_frame += 1
        if n_load:
            turbo_load_kernel(q, load, n_load, pos_a, ch_a)
            turbo_load_kernel(q, load, n_load, pos_b, ch_b)
            for i in range(k + 2):
                for j in range(n_load):
                    ext_ba[i, load[j]] = 0
            n_active += n_load
        if n_active == 0:
            break
        active = 0
        for lane in range(n_lanes):
            if frame_of[lane] >= 0:
                active |= 1 << lane
        if p.use_vector:
            turbo_siso_vector_kernel(p.cfg_a, ch_a, active, ext_ba, read_a, ext_ab, write_a, dec_a, trellis_a[0],
                                     trellis_a[1], params, table, alpha16)
            turbo_siso_vector_kernel(p.cfg_b, ch_b, active, ext_ab, read_b, ext_ba, write_b, dec_b, trellis_b[0],
                                     trellis_b[1], params, table, alpha16)
        else:
            for lane in range(n_lanes):
                if frame_of[lane] >= 0:
                    turbo_siso_kernel(ch_a, lane, ext_ba, read_a, ext_ab, write_a, dec_a, trellis_a[0], trellis_a[1],
                                      params, table, alpha, gam)
                    turbo_siso_kernel(ch_b, lane, ext_ab, read_b, ext_ba, write_b, dec_b, trellis_b[0], trellis_b[1],
                                      params, table, alpha, gam)
        unstable = np.uint32(0)
        for i in range(k):
            unstable |= dec_a[i] ^ dec_b[i]
        for lane in range(n_lanes):
            f = frame_of[lane]
            if f < 0:
                continue
            iters[lane] += 1
            stable = ((unstable >> np.uint32(lane)) & np.uint32(1)) == 0
            last = iters[lane] >= p.max_iterations
            if not (stable or last):
                continue
            _lane_octets(dec_b, lane, octets)
            if p.check_fecf:
                ok = _crc16(octets, crc_table) == 0
                done = (stable and ok) or last
            else:
                ok = stable
                done = True
            if done:
                for j in range(n_oct):
                    out[f, j] = octets[j]
                iterations[f] = iters[lane]
                passed[f] = ok
                frame_of[lane] = -1
                n_active -= 1
