"""Numba kernels of pipeline.fec.

Rules (DEVELOPERS.md): module-level ``@njit(cache=True)`` functions, every parameter an argument
(tables are passed in, never read from globals), contiguous typed arrays, outputs preallocated by
the Python wrapper, no validation here.  Each kernel gives the same answer with
``NUMBA_DISABLE_JIT=1``; integer arithmetic is written with explicit casts so that plain Python
(with numpy scalars) and compiled code agree.
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = [
    "conv_encode_kernel",
    "pn_bits_kernel",
    "crc16_kernel",
    "rs_remainder_kernel",
    "rs_decode_kernel",
    "soft_quantize_kernel",
    "depuncture_kernel",
    "decision_pack_kernel",
    "viterbi_acs_kernel",
    "viterbi_traceback_kernel",
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
# Path metrics are int16 in two fixed 64-entry buffers (allocated as uint32[32] and viewed as
# int16).  Two trellis steps are unrolled (A -> B, B -> A) rather than swapping arrays.  The two
# new metrics of a butterfly (states 2j and 2j+1) are stored side by side; with numba 0.6x /
# LLVM 1x this interleaved int16 store vectorised on ymm registers and measured 5% faster than
# packing both into one uint32 store (which limited LLVM to 8 lanes).  The decisions of one step
# are 64 octets (one per new state), written as 32 uint16 pairs; that and the decision packing
# assume a little-endian machine.


@njit(cache=True)
def soft_quantize_kernel(soft, level, out):
    """Scale ``soft`` so its mean magnitude (zeros excluded) is ``level``, clip to +-127, round to int8.

    Returns the scale used (float32; 0 when every value is 0, and then ``out`` is all 0).
    """
    # 16 partial sums in a fixed order: the loop vectorises without fastmath, and plain Python
    # adds in exactly the same order, so the scale is bit-identical either way.
    # (float32 partials: 16 lanes per vector; 2048 terms each lose at most ~1e-4 relative, far
    # below what matters for a quantiser scale.)
    n = soft.shape[0]
    part = np.zeros(16, dtype=np.float32)
    cnt = 0
    n16 = n - n % 16
    for i in range(0, n16, 16):
        for k in range(16):
            v = abs(soft[i + k])
            part[k] += v
            cnt += v > np.float32(0.0)
    for i in range(n16, n):
        v = abs(soft[i])
        part[i - n16] += v
        cnt += v > np.float32(0.0)
    if cnt == 0:
        for i in range(n):
            out[i] = 0
        return np.float32(0.0)
    acc = np.float64(0.0)
    for k in range(16):
        acc += np.float64(part[k])
    scale = np.float32(np.float64(level) * np.float64(cnt) / acc)
    for i in range(soft.shape[0]):
        v = min(max(np.float32(soft[i] * scale), np.float32(-127.0)), np.float32(127.0))
        out[i] = np.int8(np.rint(v))
    return scale


@njit(cache=True)
def depuncture_kernel(sym, positions, out):
    """Scatter ``sym[i]`` to ``out[positions[i]]``; the other entries of ``out`` stay (0 = erasure)."""
    for i in range(sym.shape[0]):
        out[positions[i]] = sym[i]


@njit(cache=True)
def decision_pack_kernel(dec, n_rows, words):
    """Pack 64 decision octets (0/1) per row into one uint64 per row, state s at bit s.

    Each group of eight octets is read as one uint64 whose set bits sit at 8i; three shift-or
    folds gather them into its low octet, which is octet k of the row's word (little-endian).
    Element-wise, so it vectorises.
    """
    d = dec.view(np.uint64)
    w8 = words.view(np.uint8)
    for i in range(n_rows * 8):
        x = d[i]
        x |= x >> np.uint64(7)
        x |= x >> np.uint64(14)
        x |= x >> np.uint64(28)
        w8[i] = np.uint8(x & np.uint64(0xFF))


@njit(cache=True)
def _acs_steps(sym, sym0, n_steps, sign1, sign2, pm_a, pm_b, dec):
    """Add-compare-select over ``n_steps`` trellis steps of the 64-state code.

    ``sym[sym0:]`` holds 2 int8 symbols per step (C1, C2; + = bit 0, 0 = erasure).  Butterfly j joins the
    old states j and j+32 to the new states 2j and 2j+1; with ``m = sign1[j] y1 + sign2[j] y2`` the
    branch metrics are +m (j -> 2j), -m (j+32 -> 2j), -m (j -> 2j+1), +m (j+32 -> 2j+1).
    ``pm_a`` (uint32[32] = int16[64]) holds the metrics before and after; ``pm_b`` is scratch.
    ``dec`` (uint8, flat) receives 64 decisions per step, step t at ``dec[64 t : 64 t + 64]``: 1 when
    the survivor into that state came from the old state j + 32.  (The decision index is built
    from t alone, ``t * 32`` then ``+ 32``: with a runtime offset, or ``(t + 1) * 32``, LLVM
    vectorised worse, measured 2-3x slower.)  Metrics are renormalised to state 0 every two
    steps, so their spread (under 4000 for |y| <= 127) never nears the int16 limit.
    Cost: 32 butterflies per step, vectorised.
    """
    a16 = pm_a.view(np.int16)
    b16 = pm_b.view(np.int16)
    dec16 = dec.view(np.uint16)
    t = 0
    while t + 1 < n_steps:
        base = t * 32
        y1 = np.int16(sym[sym0 + 2 * t])
        y2 = np.int16(sym[sym0 + 2 * t + 1])
        for j in range(32):
            m = np.int16(sign1[j] * y1 + sign2[j] * y2)
            a = a16[j]
            b = a16[j + 32]
            p0 = np.int16(a + m)
            q0 = np.int16(b - m)
            p1 = np.int16(a - m)
            q1 = np.int16(b + m)
            n0 = max(p0, q0)
            n1 = max(p1, q1)
            b16[2 * j] = n0
            b16[2 * j + 1] = n1
            dec16[base + j] = np.uint16(q0 > p0) | (np.uint16(q1 > p1) << np.uint16(8))
        base += 32
        y1 = np.int16(sym[sym0 + 2 * t + 2])
        y2 = np.int16(sym[sym0 + 2 * t + 3])
        for j in range(32):
            m = np.int16(sign1[j] * y1 + sign2[j] * y2)
            a = b16[j]
            b = b16[j + 32]
            p0 = np.int16(a + m)
            q0 = np.int16(b - m)
            p1 = np.int16(a - m)
            q1 = np.int16(b + m)
            n0 = max(p0, q0)
            n1 = max(p1, q1)
            a16[2 * j] = n0
            a16[2 * j + 1] = n1
            dec16[base + j] = np.uint16(q0 > p0) | (np.uint16(q1 > p1) << np.uint16(8))
        t += 2
        ref = a16[0]
        for j in range(64):
            a16[j] = np.int16(a16[j] - ref)
    if t < n_steps:  # odd step count: one more step A -> B, then copy back
        base = t * 32
        y1 = np.int16(sym[sym0 + 2 * t])
        y2 = np.int16(sym[sym0 + 2 * t + 1])
        for j in range(32):
            m = np.int16(sign1[j] * y1 + sign2[j] * y2)
            a = a16[j]
            b = a16[j + 32]
            p0 = np.int16(a + m)
            q0 = np.int16(b - m)
            p1 = np.int16(a - m)
            q1 = np.int16(b + m)
            n0 = max(p0, q0)
            n1 = max(p1, q1)
            b16[2 * j] = n0
            b16[2 * j + 1] = n1
            dec16[base + j] = np.uint16(q0 > p0) | (np.uint16(q1 > p1) << np.uint16(8))
        ref = b16[0]
        for j in range(64):
            a16[j] = np.int16(b16[j] - ref)


@njit(cache=True)
def viterbi_acs_kernel(sym, n_steps, sign1, sign2, pm_a, pm_b, scratch, words):
    """Run ``n_steps`` trellis steps and write their packed decisions to ``words[:n_steps]``.

    Steps go in sub-blocks of ``scratch.size // 64`` so the 64 decision octets per step are packed
    (``decision_pack_kernel``) while still in L1 cache.  See ``_acs_steps`` for the trellis.
    """
    sub = scratch.shape[0] // 64
    for s0 in range(0, n_steps, sub):
        m = min(sub, n_steps - s0)
        _acs_steps(sym, 2 * s0, m, sign1, sign2, pm_a, pm_b, scratch)
        decision_pack_kernel(scratch, m, words[s0:])


@njit(cache=True)
def viterbi_traceback_kernel(words, n_rows, state, n_emit, out):
    """Trace back from ``state`` after row ``n_rows - 1``; write the bits of rows < ``n_emit`` to ``out``.

    ``words[t]`` holds the 64 decisions of step t (see ``decision_pack_kernel``).  The bit decided
    at a step is the newest bit of the state it leads to; the predecessor of state s is
    ``(s >> 1) | (decision << 5)``.  The word load does not depend on the state, so only a shift
    chain is serial.  Returns the state before row 0.  Cost: about 4 integer operations per row.
    """
    one = np.uint64(1)
    st = np.uint64(state)
    for t in range(n_rows - 1, n_emit - 1, -1):
        st = (st >> one) | (((words[t] >> st) & one) << np.uint64(5))
    for t in range(n_emit - 1, -1, -1):
        out[t] = st & one
        st = (st >> one) | (((words[t] >> st) & one) << np.uint64(5))
    return st


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
