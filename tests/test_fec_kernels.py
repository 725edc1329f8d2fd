"""Every pipeline.fec kernel gives the same answer compiled and as plain Python (STYLE.md rule 5)."""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.fec import _kernels as K
from pipeline.fec import conv_encode, rs_encode
from pipeline.fec._conv import _G1_MASK, _G2_MASK, _rate_tables
from pipeline.fec._crc import _TABLE as CRC_TABLE
from pipeline.fec._rs import _GTAB, B_EXP, B_LOG, CONV_TO_DUAL, DUAL_TO_CONV
from pipeline.fec._viterbi import _butterfly_signs, _new_work

# The rate-1/2 code (G2 inverted, CCSDS 131.0-B sec. 3.3); the tests below run its trellis.
_SIGN1, _SIGN2 = _butterfly_signs(True)


def ref_acs(sym, n_steps):
    """Textbook radix-2 add-compare-select in int64: final metrics and per-step decisions (state order)."""
    pm = np.zeros(64, np.int64)
    dec = np.zeros((n_steps, 64), np.uint8)
    j = np.arange(32)
    for t in range(n_steps):
        m = _SIGN1.astype(np.int64) * int(sym[2 * t]) + _SIGN2.astype(np.int64) * int(sym[2 * t + 1])
        a, b = pm[:32], pm[32:]
        new = np.empty(64, np.int64)
        for r, sgn in ((0, 1), (1, -1)):
            p, q = a + sgn * m, b - sgn * m
            new[2 * j + r] = np.maximum(p, q)
            dec[t, 2 * j + r] = q > p  # ties keep the lower predecessor
        pm = new
    return pm, dec


def both(kernel):
    """(compiled, plain Python) versions; equal when numba is disabled."""
    return kernel, getattr(kernel, "py_func", kernel)


def test_conv_encode_kernel(rng):
    bits = rng.integers(0, 2, 200, dtype=np.uint8)
    keep1, keep2 = _rate_tables("3/4")
    res = []
    for f in both(K.conv_encode_kernel):
        out = np.zeros(400, np.uint8)
        n, s, ph = f(bits, 5, 1, _G1_MASK, _G2_MASK, 1, keep1, keep2, out)
        res.append((int(n), int(s), int(ph), out.copy()))
    assert res[0][:3] == res[1][:3] and np.array_equal(res[0][3], res[1][3])


def test_pn_and_crc_kernels(rng):
    outs = []
    for f in both(K.pn_bits_kernel):
        o = np.zeros(600, np.uint8)
        f(o)
        outs.append(o)
    assert np.array_equal(*outs)
    data = rng.integers(0, 256, 300, dtype=np.uint8)
    a, b = (int(f(data, 0xFFFF, CRC_TABLE)) for f in both(K.crc16_kernel))
    assert a == b


def test_rs_kernels(rng):
    data = rng.integers(0, 256, 220 * 3, dtype=np.uint8)
    rems = []
    for f in both(K.rs_remainder_kernel):
        rem = np.zeros((3, 4), np.uint64)
        f(data, 220, 3, DUAL_TO_CONV, _GTAB[16], rem)
        rems.append(rem)
    assert np.array_equal(*rems)
    block = rs_encode(data, interleave=3)
    bad = block.copy()
    bad[[0, 4, 8, 30, 31, 500, 700]] ^= 0x33
    era = np.zeros((1, 3, 32), np.int64)
    n_era = np.zeros((1, 3), np.int64)
    era[0, 1, :2] = [254 - 3 - 0, 254 - 3 - 2]  # rows 0 and 2 of codeword 1 (octets 1 and 7)
    n_era[0, 1] = 2
    results = []
    for f in both(K.rs_decode_kernel):
        out = np.zeros((1, 660), np.uint8)
        corr = np.zeros((1, 3), np.int64)
        f(bad.reshape(1, -1), 220, 3, 32, 112, 3, era, n_era, DUAL_TO_CONV, CONV_TO_DUAL, _GTAB[16], B_EXP, B_LOG,
          out, corr)
        results.append((out, corr))
    assert np.array_equal(results[0][0], results[1][0]) and np.array_equal(results[0][1], results[1][1])
    assert np.array_equal(results[0][0][0], data)
    # the inner corrector on its own
    r8 = np.zeros(32, np.int64)
    r8[[0, 5, 17]] = [1, 200, 77]
    outs = []
    for f in both(K._rs_correct_codeword):
        scratch = [np.zeros(n, np.int64) for n in (32, 33, 33, 33, 32, 32, 32)]
        n = f(r8, 32, 112, 254, np.zeros(32, np.int64), 0, B_EXP, B_LOG, *scratch)
        outs.append((int(n), scratch[5].copy(), scratch[6].copy()))
    assert outs[0][0] == outs[1][0]
    assert np.array_equal(outs[0][1], outs[1][1]) and np.array_equal(outs[0][2], outs[1][2])


def test_viterbi_kernels(rng):
    soft = rng.normal(0, 1, 300).astype(np.float32)
    soft[::17] = 0.0
    qs = []
    for f in both(K.soft_quantize_kernel):
        q = np.zeros(300, np.int8)
        scale = f(soft, 32.0, q)
        qs.append((float(scale), q))
    assert qs[0][0] == qs[1][0] and np.array_equal(qs[0][1], qs[1][1])
    # the documented rule, computed the slow way (16 float32 partial sums, then float64)
    part = np.zeros(16, np.float32)
    for i, v in enumerate(np.abs(soft)):
        part[i % 16] += v
    scale = np.float32(32.0 * np.count_nonzero(soft) / part.astype(np.float64).sum())
    assert qs[0][0] == scale
    assert np.array_equal(qs[0][1], np.rint(np.clip(soft * scale, -127, 127)).astype(np.int8))
    rng_sym = np.random.default_rng(5)
    for n_steps in (75, 300):  # odd count (one radix-2 step at the end); more than one 256-step sub-block
        bits = rng_sym.integers(0, 2, n_steps, dtype=np.uint8)
        sym = np.clip(np.rint(40 * (1 - 2 * conv_encode(bits).astype(float)) + rng_sym.normal(0, 30, 2 * n_steps)),
                      -127, 127).astype(np.int8)
        ref_pm, ref_dec = ref_acs(sym, n_steps)
        res = []
        for acs, tb in zip(both(K.viterbi_acs_kernel), both(K.viterbi_traceback_kernel)):
            work = _new_work()
            words = np.zeros(n_steps, np.uint64)
            acs(sym, n_steps, work, words)
            out = np.zeros(n_steps, np.uint8)
            first = tb(words, n_steps, int(np.argmax(work[:64])), n_steps - 5, out)
            res.append((work.copy(), words, out, int(first)))
        for a, b in zip(*res):
            assert np.array_equal(a, b)
        work, words, out, _ = res[0]
        # the kernel against the textbook radix-2 recursion: metrics (up to a common offset),
        # decisions (split order: state s at bit (s >> 1) + 32 (s & 1)) and the traced-back bits
        assert np.array_equal(work[:64].astype(np.int64), ref_pm - ref_pm[0])
        assert np.array_equal(work[128:], _new_work()[128:])  # tables untouched
        s = np.arange(64)
        got = (words[:, None] >> ((s >> 1) + 32 * (s & 1)).astype(np.uint64)[None, :]) & np.uint64(1)
        assert np.array_equal(got.astype(np.uint8), ref_dec)
        assert (out[: n_steps - 10] != bits[: n_steps - 10]).sum() <= 3
    # the per-block kernel: same as the kernels one by one (rate 3/4: quantise, depuncture, ACS, traceback)
    from pipeline.fec._viterbi import _QUANT_LEVEL, _rate_layout

    n_sym, n_steps, positions, _ = _rate_layout("3/4")
    soft34 = rng.normal(0, 1, 400).astype(np.float32)
    steps34 = 300  # 400 symbols of rate 3/4 complete 300 branches
    q = np.zeros(n_sym, np.int8)
    K.soft_quantize_kernel(soft34, _QUANT_LEVEL, q[:400])
    mother = np.zeros(2 * n_steps, np.int8)
    K.depuncture_kernel(q[:400], positions[:400], mother)
    work = _new_work()
    words = np.zeros(steps34 + 40, np.uint64)
    K.viterbi_acs_kernel(mother, steps34, work, words)
    expect = np.zeros(steps34 - 40, np.uint8)
    K.viterbi_traceback_kernel(words, steps34, int(np.argmax(work[:64])), steps34 - 40, expect)
    for f in both(K.viterbi_block_kernel):
        work_b = _new_work()
        words_b = np.zeros(steps34 + 40, np.uint64)
        out = np.zeros(steps34, np.uint8)
        n = f(soft34, _QUANT_LEVEL, np.zeros(n_sym, np.int8), positions, np.full(2 * n_steps, 99, np.int8), steps34,
              work_b, words_b, 0, 40, out, rng.normal(0, 1, 50).astype(np.float32))
        assert n == steps34 - 40 and np.array_equal(out[:n], expect)
        assert np.array_equal(work_b, work) and np.array_equal(words_b[:40], words[steps34 - 40 : steps34])
    dp = []
    for f in both(K.depuncture_kernel):
        o = np.zeros(20, np.int8)
        f(np.arange(1, 9, dtype=np.int8), np.array([0, 1, 3, 4, 7, 8, 10, 13]), o)
        dp.append(o)
    assert np.array_equal(*dp)


@pytest.mark.parametrize("name", K.__all__)
def test_every_kernel_is_covered(name):
    covered = {"conv_encode_kernel", "pn_bits_kernel", "crc16_kernel", "rs_remainder_kernel", "rs_decode_kernel",
               "soft_quantize_kernel", "depuncture_kernel", "viterbi_acs_kernel", "viterbi_traceback_kernel",
               "viterbi_block_kernel", "viterbi_acs_vector_kernel"}
    assert name in covered


def test_viterbi_acs_metrics_stay_exact_at_full_scale():
    # |y| = 127 everywhere (largest branch metrics), random signs, from a known state (metrics
    # -8192 elsewhere, as ViterbiDecoder(initial_state=...) sets them): over many renormalisation
    # periods the int16 metrics must track the int64 textbook recursion exactly (no wrap-around)
    rng = np.random.default_rng(21)
    n_steps = 3001
    sym = (127 * (1 - 2 * rng.integers(0, 2, 2 * n_steps))).astype(np.int8)
    work = _new_work()
    work[:64] = -8192
    work[37] = 0
    words = np.zeros(n_steps, np.uint64)
    K.viterbi_acs_kernel(sym, n_steps, work, words)
    pm = np.full(64, -8192, np.int64)
    pm[37] = 0
    j = np.arange(32)
    bit_of_state = ((np.arange(64) >> 1) + 32 * (np.arange(64) & 1)).astype(np.uint64)
    for t in range(n_steps):
        m = _SIGN1.astype(np.int64) * int(sym[2 * t]) + _SIGN2.astype(np.int64) * int(sym[2 * t + 1])
        new = np.empty(64, np.int64)
        dec = np.empty(64, np.uint8)
        for r, sgn in ((0, 1), (1, -1)):
            p, q = pm[:32] + sgn * m, pm[32:] - sgn * m
            new[2 * j + r] = np.maximum(p, q)
            dec[2 * j + r] = q > p
        pm = new
        got = (words[t] >> bit_of_state) & np.uint64(1)
        assert np.array_equal(got.astype(np.uint8), dec), t
    assert np.array_equal(work[:64].astype(np.int64), pm - pm[0])


@pytest.mark.parametrize("rate", ["1/2", "2/3", "3/4", "5/6", "7/8"])
def test_viterbi_acs_vector_kernel_equals_acs_kernel(rate):
    # The LLVM vector add-compare-select against viterbi_acs_kernel, bit for bit (metrics after
    # renormalisation and every decision word), on the depunctured streams the decoder feeds it:
    # noisy codewords of each rate quantised as ViterbiDecoder does (punctured symbols are
    # erasures), pure noise, full-scale +-127 and -128, from equal, random and known-state
    # metrics, over step counts around the 32-step renormalisation and 256-step sub-block edges.
    from pipeline.fec._viterbi import _QUANT_LEVEL, _rate_layout

    rng = np.random.default_rng(77)
    _, block_steps, positions, steps_after = _rate_layout(rate)
    for n_steps in (0, 1, 7, 31, 32, 33, 255, 256, 257, 301, 1000):
        n_sym = int(np.searchsorted(steps_after, n_steps, side="left"))  # symbols completing n_steps branches
        bits = rng.integers(0, 2, n_steps + 8, dtype=np.uint8)
        chan = conv_encode(bits, rate)[:n_sym].astype(np.float32)
        kinds = {
            "codeword": (1 - 2 * chan) + rng.normal(0, 0.7, n_sym).astype(np.float32),
            "noise": rng.normal(0, 1, n_sym).astype(np.float32),
        }
        for kind, soft in kinds.items():
            q = np.zeros(n_sym, np.int8)
            K.soft_quantize_kernel(soft, _QUANT_LEVEL, q)
            mother = np.zeros(2 * n_steps, np.int8)
            K.depuncture_kernel(q, positions[:n_sym], mother)
            streams = [mother]
            if kind == "noise":
                streams.append(rng.choice(np.array([-128, -127, 127], np.int8), 2 * n_steps))
            for sym in streams:
                for start in ("equal", "random", "known"):
                    # punctured rates: no G2 inversion (131.0-B sec. 3.4; 130.1-G Fig. 4-2)
                    work = _new_work(rate == "1/2")
                    if start == "random":
                        work[:64] = rng.integers(-3000, 3000, 64)
                    elif start == "known":
                        work[:64] = -8192
                        work[int(rng.integers(0, 64))] = 0
                    ref_work, ref_words = work.copy(), np.full(n_steps + 2, 7, np.uint64)
                    K.viterbi_acs_kernel(sym, n_steps, ref_work, ref_words[1:])
                    got_work, got_words = work.copy(), np.full(n_steps + 2, 7, np.uint64)
                    ahead = rng.normal(0, 1, int(rng.integers(0, 3000))).astype(np.float32)
                    K.viterbi_acs_vector_kernel(sym, n_steps, got_work, got_words[1:], ahead)
                    assert np.array_equal(got_work, ref_work), (rate, n_steps, kind, start)
                    assert np.array_equal(got_words, ref_words), (rate, n_steps, kind, start)  # nothing outside
