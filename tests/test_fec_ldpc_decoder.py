"""LDPC decoder: the vector kernel against the scalar one, an obvious numpy reference, error patterns and
frame error rates near 1e-2 on AWGN."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from pipeline.fec.ldpc import LdpcDecoder, ldpc_code, ldpc_decode, ldpc_encode_bits, parity_check
from pipeline.fec.ldpc import _kernels as K
from pipeline.fec.ldpc._codes import _csr

C2 = ldpc_code("c2")
R12 = ldpc_code("ar4ja", rate="1/2", k=1024)
R45 = ldpc_code("ar4ja", rate="4/5", k=1024)


def awgn(code, ebn0_db, n_cw, seed):
    """Random information, encoded, BPSK + AWGN, LLR = 2 y / sigma^2 (float32)."""
    rng = np.random.default_rng(seed)
    info = rng.integers(0, 2, (n_cw, code.k), dtype=np.uint8)
    word = ldpc_encode_bits(code, info)
    sigma = math.sqrt(1 / (2 * 10 ** (ebn0_db / 10) * code.k / code.n))
    y = 1.0 - 2.0 * word + sigma * rng.standard_normal(word.shape)
    return info, word, (2 * y / sigma**2).astype(np.float32)


def same_results(a, b):
    for field in ("frames", "ok", "iterations", "syndrome_weight", "corrected_bits", "codewords"):
        assert np.array_equal(getattr(a, field), getattr(b, field)), field


# ---- an obvious reference: layered min-sum row by row in numpy ------------------------------------------


def reference_layered_min_sum(h, start, *, max_iter, alpha16=12, beta=0, exact=True):
    """Layered normalized/offset min-sum, one numpy row update at a time.

    ``exact``: int posteriors clamped to -32767..32767, messages from magnitudes ``min(|Q|, 127)`` as
    ``max((x alpha16 >> 4) - beta, 0)`` (the decoder's fixed point); else float with magnitudes
    ``x alpha16 / 16`` and no clamps.
    Returns (posteriors, iterations, final syndrome weight).
    """
    post = np.array(start, dtype=np.int64 if exact else np.float64)
    msg = np.zeros(h.n_edges, dtype=post.dtype)
    weight = -1
    for it in range(1, max_iter + 1):
        for m in range(h.n_rows):
            sl = slice(h.row_start[m], h.row_start[m + 1])
            v = h.cols[sl]
            q = post[v] - msg[sl]
            if exact:
                q = np.clip(q, -32767, 32767)
            a = np.minimum(np.abs(q), 127) if exact else np.abs(q)
            order = np.argsort(a, kind="stable")  # ties: the first edge holds the minimum
            mag = np.full(a.shape, a[order[0]])
            mag[order[0]] = a[order[1]]
            mag = np.maximum(((mag * alpha16) >> 4) - beta, 0) if exact else mag * alpha16 / 16
            sign = np.where(q < 0, -1, 1)
            r = np.prod(sign) * sign * mag
            msg[sl] = r
            post[v] = np.clip(q + r, -32767, 32767) if exact else q + r
        weight = int(h.syndrome((post < 0).astype(np.uint8)).sum())
        if weight == 0:
            return post, it, 0
    return post, max_iter, weight


def quantized_start(code, llr, scale=4.0, clip=63):
    """The decoder's starting posteriors: +32767 for the known zeros, round(llr scale) clipped, 0 for erasures."""
    start = np.zeros(code.n_var, dtype=np.int64)
    start[:code.head_zeros] = 32767
    sent = slice(code.head_zeros, code.head_zeros + code.sent_vars)
    start[sent] = np.clip(np.rint(llr[:code.sent_vars] * scale), -clip, clip)
    return start


def small_code(seed=1, n_rows=24, n_cols=48):
    """A small (3, 6)-regular random LDPC code (rows of weight 6, columns of weight 3)."""
    rng = np.random.default_rng(seed)
    cols = np.concatenate([rng.permutation(n_cols) for _ in range(3)])
    rows = np.repeat(np.arange(n_rows), 6)
    return _csr(rows, cols, n_rows, n_cols)


def run_kernels(h, llr, *, lanes, max_iter, alpha16=12, beta=0, tail=0):
    """Both kernels on raw soft values of all variables (no known zeros); returns the outputs of each."""
    n_cw, n = llr.shape
    outs = []
    for kind in ("scalar", "vector"):
        frames = np.zeros((n_cw, n // 8), np.uint8)
        iters, weight, flips = (np.zeros(n_cw, np.int32) for _ in range(3))
        p1, m1 = np.zeros(n, np.int16), np.zeros(h.n_edges, np.int8)
        qbuf, qtmp = np.zeros(64, np.int64), np.zeros(n, np.int8)
        if kind == "scalar":
            K.ldpc_decode_scalar_kernel(llr, n, 4.0, 63, 0, h.row_start, h.cols, max_iter, alpha16, beta,
                                        p1, m1, qbuf, qtmp, frames, iters, weight, flips)
        else:
            cols_w = (h.cols * lanes).astype(np.int32)
            K.ldpc_decode_vector_kernel(llr, n, 4.0, 63, 0, h.row_start, h.cols, cols_w, max_iter, alpha16, beta,
                                        tail, np.zeros(n * lanes, np.int16), np.zeros(h.n_edges * lanes, np.int8),
                                        np.zeros(lanes, np.int8), np.zeros(lanes, np.int32),
                                        np.zeros(lanes, np.int64), np.zeros(lanes, np.int64), p1, m1, qbuf, qtmp,
                                        frames, iters, weight, flips)
        outs.append((frames, iters, weight, flips))
    return outs


@pytest.mark.kat
@pytest.mark.parametrize("lanes, tail", [(32, 0), (64, 2)])
def test_vector_kernel_equals_scalar_kernel_on_a_small_code(lanes, tail):
    # the vector kernel must reproduce the scalar one bit for bit (same fixed-point arithmetic); the
    # all-zero word of any linear code plus Gaussian noise, many of the 70 codewords failing
    h = small_code()
    rng = np.random.default_rng(2)
    llr = (2.0 + 2.2 * rng.standard_normal((70, 48))).astype(np.float32)
    scalar, vector = run_kernels(h, llr, lanes=lanes, max_iter=12, tail=tail)
    for a, b in zip(scalar, vector):
        assert np.array_equal(a, b)
    iters, weight = scalar[1], scalar[2]
    assert 0 < np.count_nonzero(weight) < 70 and iters.max() == 12 and iters.min() >= 1


@pytest.mark.kat
def test_scalar_kernel_equals_numpy_reference_on_a_small_code():
    # slow obvious reference (row-by-row numpy, same fixed point): posteriors' signs, iterations, syndrome weight
    h = small_code(seed=4)
    rng = np.random.default_rng(5)
    llr = (2.0 + 2.0 * rng.standard_normal((12, 48))).astype(np.float32)
    (frames, iters, weight, _), _ = run_kernels(h, llr, lanes=32, max_iter=9)
    for c in range(12):
        post, it, w = reference_layered_min_sum(h, np.clip(np.rint(llr[c] * 4.0), -63, 63), max_iter=9)
        assert (it, w) == (iters[c], weight[c])
        assert np.packbits((post < 0).astype(np.uint8)).tobytes() == frames[c].tobytes()


@pytest.mark.parametrize("code, ebn0_db", [(C2, 3.6), (R12, 1.3), (R45, 3.1),
                                           (ldpc_code("ar4ja", rate="2/3", k=4096), 1.9)],
                         ids=["c2", "r12-1024", "r45-1024", "r23-4096"])
def test_vector_decoder_equals_scalar_decoder(code, ebn0_db):
    # bit-identical decisions, iteration counts, syndrome weights and flip counts, failures included
    _, _, llr = awgn(code, ebn0_db, 150, seed=[1, code.n])
    scalar = LdpcDecoder(code=code, kernel="scalar", max_iterations=20).decode(llr)
    assert 0 < scalar.failed < 150
    for lanes in (32, 64):
        same_results(scalar, LdpcDecoder(code=code, lanes=lanes, max_iterations=20).decode(llr))
    off = dict(variant="offset", correction=0.25, max_iterations=20)
    same_results(LdpcDecoder(code=code, kernel="scalar", **off).decode(llr[:40]),
                 LdpcDecoder(code=code, **off).decode(llr[:40]))


def test_batch_equals_one_by_one_and_any_split():
    # codewords are independent: any split of a batch gives the same results (stage chunking invariance)
    _, _, llr = awgn(R12, 1.4, 90, seed=8)
    dec = LdpcDecoder(code=R12)
    whole = dec.decode(llr)
    rng = np.random.default_rng(9)
    cuts = np.sort(rng.choice(np.arange(1, 90), 5, replace=False))
    parts = [dec.decode(p) for p in np.split(llr, cuts)]
    for field in ("frames", "ok", "iterations", "syndrome_weight", "corrected_bits"):
        assert np.array_equal(np.concatenate([getattr(p, field) for p in parts]), getattr(whole, field))
    for c in (0, 17, 89):
        one = dec.decode(llr[c])
        assert one.frames.shape == (1, 128)
        assert np.array_equal(one.frames[0], whole.frames[c]) and one.iterations[0] == whole.iterations[c]
    assert dec.codewords == 90 + 90 + 3 and dec.failed == 2 * whole.failed + int((~whole.ok[[0, 17, 89]]).sum())
    dec.reset()
    assert (dec.codewords, dec.failed, dec.iterations_total) == (0, 0, 0)


def test_kernel_equals_integer_reference_on_ar4ja():
    # the numpy reference on a real code: known zeros/erasures mapped as the decoder does, same fixed point
    _, _, llr = awgn(R12, 1.5, 4, seed=21)
    res = LdpcDecoder(code=R12, max_iterations=15).decode(llr)
    for c in range(4):
        post, it, w = reference_layered_min_sum(parity_check(R12), quantized_start(R12, llr[c]), max_iter=15)
        assert (it, w) == (res.iterations[c], res.syndrome_weight[c])
        assert np.packbits((post[:1024] < 0).astype(np.uint8)).tobytes() == res.frames[c].tobytes()


def test_float_min_sum_reference_agrees_where_both_succeed():
    # unquantized float layered min-sum (normalized 0.75): where both decoders reach a zero syndrome they
    # return the sent frame (at 4.1 dB on C2 both always do for these seeds)
    info, _, llr = awgn(C2, 4.1, 6, seed=31)
    res = ldpc_decode(C2, llr)
    assert res.ok.all()
    for c in range(6):
        start = np.zeros(C2.n_var)
        start[:18] = 1e3
        start[18:] = llr[c, :C2.sent_vars]
        post, it, w = reference_layered_min_sum(parity_check(C2), start, max_iter=50, exact=False)
        assert w == 0
        assert np.array_equal((post[18:18 + 7136] < 0).astype(np.uint8), info[c])
        assert np.array_equal(np.unpackbits(res.frames[c]), info[c])


@pytest.mark.kat
def test_correctable_patterns_are_corrected():
    # hard-decision input (|LLR| = 4) with 60 bit errors spread over the C2 codeword, and AR4JA r=1/2 with
    # 150 erased and 40 wrong sent bits: decoded to the sent frame, with the flips counted
    # (common practice, no published source: well inside what these codes correct)
    rng = np.random.default_rng(41)
    for code, n_err, n_erase in ((C2, 60, 0), (R12, 40, 150)):
        info = rng.integers(0, 2, code.k, dtype=np.uint8)
        word = ldpc_encode_bits(code, info)
        llr = np.where(word == 0, 4.0, -4.0).astype(np.float32)
        pos = rng.choice(code.sent_vars, n_err + n_erase, replace=False)
        llr[pos[:n_err]] *= -1
        llr[pos[n_err:]] = 0.0
        res = LdpcDecoder(code=code, kernel="scalar").decode(llr)
        assert res.ok[0] and res.syndrome_weight[0] == 0
        assert np.array_equal(np.unpackbits(res.frames[0]), info)
        # flips: the errors, plus the erased bits that decode to 1 (an erasure reads as bit 0)
        assert res.corrected_bits[0] == n_err + int(word[pos[n_err:]].sum())


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n_err=st.integers(0, 30), n_erase=st.integers(0, 60))
def test_encode_corrupt_decode_is_identity(seed, n_err, n_erase):
    # Hypothesis property (encode, corrupt, decode, identity): up to 30 wrong and 60 erased bits of a
    # hard-decision AR4JA r=1/2 k=1024 codeword (2000 random such patterns at 40 + 100 all decoded in at most
    # 5 iterations here; common practice, no published source)
    rng = np.random.default_rng(seed)
    info = rng.integers(0, 2, R12.k, dtype=np.uint8)
    llr = np.where(ldpc_encode_bits(R12, info) == 0, 4.0, -4.0).astype(np.float32)
    pos = rng.choice(R12.n, n_err + n_erase, replace=False)
    llr[pos[:n_err]] *= -1
    llr[pos[n_err:]] = 0.0
    res = ldpc_decode(R12, llr)
    assert res.ok[0] and np.array_equal(np.unpackbits(res.frames[0]), info)


def test_c2_extension_bits_are_ignored():
    # 130.1-G-2 sec. 8: the two appended zeros are outside H; their soft values change nothing
    _, _, llr = awgn(C2, 3.7, 40, seed=51)
    a = ldpc_decode(C2, llr)
    llr[:, -2:] = -50.0
    same_results(a, ldpc_decode(C2, llr))


def test_decoded_codewords_are_the_sent_words():
    # the decided sent bits (information first, C2's two extension zeros last) equal the encoder's codewords
    for code, ebn0 in ((C2, 4.3), (R12, 2.5)):
        info, word, llr = awgn(code, ebn0, 6, seed=71)
        res = ldpc_decode(code, llr)
        assert res.ok.all() and res.codewords.shape == (6, code.n // 8)
        assert np.array_equal(np.unpackbits(res.codewords, axis=1), word)
        assert np.array_equal(res.frames, res.codewords[:, :code.frame_octets])


def test_c2_word_of_the_basic_code_outside_the_subcode_is_failed():
    # CCSDS 131.0-B-2 sec. 7.3.4: the sent code is the (8176,7154) subcode of the basic (8176,7156) code whose
    # H (rank 1020) the decoder iterates on.  The basic code's words with zero information part are the null
    # space of H's parity columns (computed with galois, PyPI); the three nonzero ones satisfy H but not the
    # expurgation checks (../shared/REFERENCES.md sec. 13.1, computed there), so they must be failed codewords.
    import galois

    h = parity_check(C2).to_dense()
    null = np.asarray(galois.GF2(np.ascontiguousarray(h[:, 7154:])).null_space(), dtype=np.uint8)
    assert null.shape == (2, 1022)
    words = np.zeros((3, C2.n_var), np.uint8)
    words[:, 7154:] = [null[0], null[1], null[0] ^ null[1]]
    assert not (h @ words.T % 2).any()
    sent = np.concatenate([words[:, 18:], np.zeros((3, 2), np.uint8)], axis=1)
    for kernel in ("vector", "scalar"):
        res = LdpcDecoder(code=C2, kernel=kernel).decode(np.where(sent == 0, 5.0, -5.0).astype(np.float32))
        assert not res.ok.any() and (res.iterations == 1).all()
        assert set(res.syndrome_weight.tolist()) <= {1, 2}


@pytest.mark.kat
def test_far_too_many_errors_are_reported_failed():
    # noise alone, and a codeword with every sent bit inverted: failed status, never an exception
    rng = np.random.default_rng(61)
    noise = rng.standard_normal((3, R45.n)).astype(np.float32) * 3
    word = ldpc_encode_bits(R45, rng.integers(0, 2, R45.k, dtype=np.uint8))
    inverted = np.where(word == 0, -5.0, 5.0).astype(np.float32)[None]
    res = LdpcDecoder(code=R45, kernel="scalar", max_iterations=8).decode(np.concatenate([noise, inverted]))
    assert not res.ok.any() and res.failed == 4
    assert (res.syndrome_weight > 0).all() and (res.iterations == 8).all()


# Frame error rates near 1e-2.  Reference counts were measured with bench/sweep_ldpc.py (seed 15, other
# seeds than here; default decoder: normalized 0.75, llr_scale 4, clip 63, 50 iterations).  The test
# accepts k errors in N codewords when k lies between the 1e-6 and 1 - 1e-6 quantiles of Binomial(N, p)
# for p at the ends of the 99.99 % Clopper-Pearson interval of the reference: a decoder as good as the
# reference fails it with probability below about 1e-5, one with twice (or half) the FER almost surely.
REGRESSION = [
    (R12, 1.5, 404, 16640, 2500),
    (R45, 3.3, 401, 29952, 2500),
    (C2, 3.7, 308, 40000, 2500),
]


def _binomial_window(ref_err, ref_n, n):
    lo_p = stats.beta.ppf(0.5e-4, ref_err, ref_n - ref_err + 1)
    hi_p = stats.beta.ppf(1 - 0.5e-4, ref_err + 1, ref_n - ref_err)
    return int(stats.binom.ppf(1e-6, n, lo_p)), int(stats.binom.isf(1e-6, n, hi_p))


@pytest.mark.parametrize("code, ebn0_db, ref_err, ref_n, n", REGRESSION, ids=["r12-1024", "r45-1024", "c2"])
def test_frame_error_rate_regression(code, ebn0_db, ref_err, ref_n, n):
    info, _, llr = awgn(code, ebn0_db, n, seed=[99, code.n, code.k])
    res = LdpcDecoder(code=code).decode(llr)
    wrong = (res.frames != np.packbits(info, axis=1)).any(axis=1)
    lo, hi = _binomial_window(ref_err, ref_n, n)
    assert lo <= int(wrong.sum()) <= hi, (int(wrong.sum()), lo, hi)
    assert not (wrong & res.ok).any()  # no undetected errors at these sample sizes


@pytest.mark.kat
def test_decoder_argument_errors():
    with pytest.raises(ValueError, match=r"Argument 'max_iterations' must be an integer 1..1000, not 0."):
        LdpcDecoder(code=R45, max_iterations=0)
    with pytest.raises(ValueError, match="Argument 'variant' must be one of normalized, offset"):
        LdpcDecoder(code=R45, variant="sum-product")
    with pytest.raises(ValueError, match="Argument 'correction' must be a multiple of 1/16"):
        LdpcDecoder(code=R45, correction=0.7)
    with pytest.raises(ValueError, match="Argument 'lanes' must be one of 32, 64"):
        LdpcDecoder(code=R45, lanes=16)
    with pytest.raises(TypeError, match="Argument 'code' must be an LdpcCode"):
        LdpcDecoder(code="c2")
    dec = LdpcDecoder(code=R45)
    with pytest.raises(ValueError, match=r"Argument 'llr' must hold 1280 values per codeword"):
        dec.decode(np.zeros(1279, np.float32))
    with pytest.raises(ValueError, match="finite"):
        dec.decode(np.full(1280, np.nan, np.float32))
    with pytest.raises(TypeError, match="float array"):
        dec.decode(np.zeros(1280, np.int8))
    assert len(dec.decode(np.zeros((0, 1280), np.float32))) == 0
