"""LDPC codes: parity-check matrices, generators and encoders against CCSDS 131.0-B and REFERENCES.md sec. 13."""

from __future__ import annotations

import hashlib

import numpy as np
import pytest

from pipeline.fec.ldpc import (
    AR4JA_K,
    AR4JA_RATES,
    _codes,
    _gf2,
    ar4ja_permutation,
    gf2_rank,
    ldpc_code,
    ldpc_codes,
    ldpc_encode,
    ldpc_encode_bits,
    parity_check,
    qc_generator,
)

C2 = ldpc_code("c2")


def _octets(first: str, n: int) -> np.ndarray:
    if first == "FF":
        return np.full(n, 0xFF, np.uint8)
    if first == "first bit 1":
        out = np.zeros(n, np.uint8)
        out[0] = 0x80
        return out
    return (np.arange(n) % 256).astype(np.uint8)  # octets 00 01 02 ... (i mod 256)


# ../shared/REFERENCES.md sec. 13.1, C2 encoder vectors (computed there; 1020-octet codewords)
C2_VECTORS = [
    ("FF", "A4110585FE2461B17E33B4B72F8AD799", "1306abced50272d1b90caee85d95b197fa3b9263e387f531b9d089df85adf0fd"),
    ("first bit 1", "DD672ADFAB662A941EFF77F546467F82",
     "ffc70301fa99bde8b42c56ecfcf59d29893393a48cbf85c5fc7c871a57bc27d3"),
    ("ramp", "7E4D270EFA46FC16ACEE8A556F935672", "728a37d9deb3b9926d415b3812c21932c95be4598f4dd177cbb7ad455feb9518"),
]
# ../shared/REFERENCES.md sec. 13.2, AR4JA encoder vectors (computed there from the [LTB] tables)
AR4JA_VECTORS = [
    ("1/2", "first bit 1", "CFA794F49FA5A0D88BB31D8FCA7EA8BB",
     "609cdbd430248e229047f3572802799f791593b1e7912a63a0f2512cc7a64d60"),
    ("1/2", "ramp", "EEA9AAAF98D916CE6C2B282D1A5B944C",
     "7c5e6c22b8ec032effe5873b7e7786b968f10fd61d96131d6812e3be5f9705eb"),
    ("2/3", "first bit 1", "51236781781D416AB0C8419FA21559A8",
     "ce6fbf5510aeceee8ea3ef43168cb072db6c9e78ba95a00d02c91daec543d721"),
    ("2/3", "ramp", "994D02175387C8DD422E4629066A026D",
     "345b48d3e8fd72b94cae5565022cdee0efd3257d54d54f80debe3c53619e5a20"),
    ("4/5", "first bit 1", "678ECB51FE821D5CFA5F424BF55927AA",
     "788cdc40e3c1096c4080eed97467760874f1098056cdcde50dda96a13a4a45d6"),
    ("4/5", "ramp", "F168E07945E308AEEFD16856600A90FA",
     "002961b4d4e1e053e72323867c3c051c3a5142816ddcf4fd0dffaf2d0e371b3f"),
]


@pytest.mark.kat
def test_c2_generator_matches_table_c1_digest():
    # CCSDS 131.0-B-2 Annex C Table C-1: 28 first rows, 511 bits each printed as 128 hex digits after one
    # leading 0 bit; SHA-256 of the uppercase strings b1,1 .. b14,2 from ../shared/REFERENCES.md sec. 13.1
    gen = qc_generator(C2)
    assert gen.shape == (14, 2, 511)
    text = "".join(format(int("0" + "".join(map(str, gen[i, j])), 2), "0128X") for i in range(14) for j in range(2))
    assert hashlib.sha256(text.encode()).hexdigest() == \
        "40d761df7b57b695d563588749ad4d6f3281d34f5bc5972c250964991f2e76d7"
    # [TM-SC] p. C-2 (via REFERENCES.md 13.1): all 28 entries even, i.e. the last hex digit of each is even
    assert all(int(text[128 * e + 127], 16) % 2 == 0 for e in range(28))


@pytest.mark.kat
@pytest.mark.parametrize("info, parity16, digest", C2_VECTORS)
def test_c2_encoder_vectors(info, parity16, digest):
    # ../shared/REFERENCES.md sec. 13.1 encoder vectors (computed there by the 131.0-B-2 sec. 7.3.4 recipe)
    word = ldpc_encode(C2, _octets(info, 892))
    assert word.shape == (1020,)
    assert word[892:908].tobytes().hex().upper() == parity16
    assert hashlib.sha256(word.tobytes()).hexdigest() == digest
    assert word[-1] & 0b11 == 0  # the two extension bits are zeros (130.1-G-2 sec. 8)


@pytest.mark.kat
@pytest.mark.parametrize("rate, info, parity16, digest", AR4JA_VECTORS)
def test_ar4ja_encoder_vectors(rate, info, parity16, digest):
    # ../shared/REFERENCES.md sec. 13.2 encoder vectors: [info][first 2M parity bits], info MSB first
    code = ldpc_code("ar4ja", rate=rate, k=1024)
    word = ldpc_encode(code, _octets(info, 128))
    assert word.shape == (code.n // 8,)
    assert word[:128].tobytes() == _octets(info, 128).tobytes()  # systematic (131.0-B-2 sec. 7.4.3.4)
    assert word[128:144].tobytes().hex().upper() == parity16
    assert hashlib.sha256(word.tobytes()).hexdigest() == digest


@pytest.mark.parametrize("code", ldpc_codes(), ids=lambda c: c.name)
def test_every_codeword_satisfies_every_check(code):
    # CCSDS 131.0-B-2 sec. 7.3, 7.4: H c^T = 0 for every codeword (random information, fixed seed)
    rng = np.random.default_rng([15, code.n, code.k])
    info = rng.integers(0, 2, (3, code.k), dtype=np.uint8)
    full = ldpc_encode_bits(code, info, full=True)
    assert full.shape == (3, code.n_var)
    assert not parity_check(code).syndrome(full).any()
    sent = ldpc_encode_bits(code, info)
    assert sent.shape == (3, code.n)
    assert np.array_equal(sent[:, :code.k], info)  # systematic
    # the sent word is the H variables head_zeros.. minus the punctured ones, then the extension zeros
    assert np.array_equal(sent[:, :code.sent_vars], full[:, code.head_zeros:code.head_zeros + code.sent_vars])
    assert not sent[:, code.sent_vars:].any()
    # batch encode equals one codeword at a time
    assert np.array_equal(ldpc_encode_bits(code, info[1]), sent[1])


def test_encoder_is_linear_over_gf2():
    # linearity of any linear block code: enc(a ^ b) = enc(a) ^ enc(b)
    code = ldpc_code("ar4ja", rate="2/3", k=4096)
    rng = np.random.default_rng(5)
    a, b = rng.integers(0, 2, (2, code.k), dtype=np.uint8)
    assert np.array_equal(ldpc_encode_bits(code, a ^ b), ldpc_encode_bits(code, a) ^ ldpc_encode_bits(code, b))


def test_c2_codewords_lie_in_the_expurgated_subcode():
    # ../shared/REFERENCES.md sec. 13.1 (expurgation seen as checks, computed there; principle [GB2] p. 8-x):
    # the sums over the 511-blocks flagged by ha and hb are even on every (8176,7154) subcode word
    rng = np.random.default_rng(7)
    full = ldpc_encode_bits(C2, rng.integers(0, 2, (8, 7136), dtype=np.uint8), full=True)
    block_parity = full.reshape(8, 16, 511).sum(axis=2) % 2
    for flags in ("0000110101111101", "0000011011100110"):
        assert not (block_parity @ np.array([int(f) for f in flags]) % 2).any()


@pytest.mark.kat
def test_c2_parity_check_structure():
    # CCSDS 131.0-B-2 sec. 7.3.2-7.3.3: 1022 x 8176, two ones per circulant row: row weight 32, column weight 4
    h = parity_check(C2)
    assert (h.n_rows, h.n_cols, h.n_edges) == (1022, 8176, 32704)
    assert set(np.diff(h.row_start)) == {32}
    assert set(np.bincount(h.cols, minlength=8176)) == {4}
    # Table 7-1 absolute positions of row 0 (../shared/REFERENCES.md sec. 13.1, "abs." column)
    row0 = [0, 176, 523, 750, 1022, 1374, 1557, 1964, 2044, 2436, 2706, 2964, 3066, 3417, 3586, 3936,
            4088, 4395, 4652, 4928, 5110, 5317, 5639, 5902, 6132, 6531, 6845, 7100, 7154, 7401, 7701, 7926]
    assert h.cols[:32].tolist() == row0
    # row 511 (first row of the second circulant row): A2,j first rows
    row511 = sorted(511 * j + p for j, pair in enumerate(_codes._C2_A[1]) for p in pair)
    assert h.cols[h.row_start[511]:h.row_start[512]].tolist() == row511


def test_c2_parity_check_rank_is_1020():
    # CCSDS 131.0-B-2 sec. 7.3.2: H has rank 1020 (two dependent rows)
    assert gf2_rank(parity_check(C2).to_dense()) == 1020


def test_c2_rank_with_galois():
    # galois (PyPI) as the outside reference for the same rank
    import galois

    gf2 = galois.GF(2)
    assert np.linalg.matrix_rank(gf2(parity_check(C2).to_dense())) == 1020


def test_gf2_rank_agrees_with_galois_on_small_matrices():
    # galois (PyPI) matrix_rank over GF(2)
    import galois

    gf2 = galois.GF(2)
    rng = np.random.default_rng(11)
    for shape in [(5, 9), (12, 12), (30, 70), (70, 30), (64, 129)]:
        for density in (0.1, 0.5):
            a = (rng.random(shape) < density).astype(np.uint8)
            a[-1] = a[0] ^ a[1 % shape[0]]  # force a dependent row now and then
            assert gf2_rank(a) == int(np.linalg.matrix_rank(gf2(a)))


@pytest.mark.kat
def test_gf2_pack_round_trip():
    rng = np.random.default_rng(3)
    a = rng.integers(0, 2, (7, 130), dtype=np.uint8)
    assert np.array_equal(_gf2.unpack_rows(_gf2.pack_rows(a), 130), a)


@pytest.mark.kat
def test_ar4ja_permutation_first_values_m512():
    # ../shared/REFERENCES.md sec. 13.2: pi_k(0) for M = 512, k = 1..26 (computed there from the [LTB] tables)
    expect = [400, 103, 233, 256, 306, 413, 115, 158, 92, 206, 326, 66, 295, 468, 79, 198, 285, 32, 173, 369,
              86, 129, 298, 246, 289, 510]
    assert [int(ar4ja_permutation(k, 512)[0]) for k in range(1, 27)] == expect


def test_every_ar4ja_permutation_is_a_permutation():
    # ../shared/REFERENCES.md sec. 13.2 check values; CCSDS 131.0-B sec. 7.4.2.4 defines Pi_k as permutations
    for m in (128, 256, 512, 1024, 2048, 4096, 8192):
        b = m // 4
        for k in range(1, 27):
            pi = ar4ja_permutation(k, m)
            assert np.array_equal(np.sort(pi), np.arange(m))
            assert all(_codes._AR4JA_PHI[m][j][k - 1] < b for j in range(4))
            # each quarter of the rows maps onto one quarter of the columns, cyclically shifted
            assert all(len(set(pi[q * b:(q + 1) * b] // b)) == 1 for q in range(4))


@pytest.mark.kat
def test_ar4ja_rate_half_degrees_m512():
    # ../shared/REFERENCES.md sec. 13.2 (computed check for rate 1/2, M = 512): column degrees 512 x 1,
    # 512 x 2, 1024 x 3, 512 x 6 (punctured block); row weights 512 x 3 and 1024 x 6
    h = parity_check(ldpc_code("ar4ja", rate="1/2", k=1024))
    col_deg = np.bincount(h.cols, minlength=h.n_cols)
    assert sorted(np.unique(col_deg, return_counts=True)[1].tolist()) == [512, 512, 512, 1024]
    assert dict(zip(*np.unique(col_deg, return_counts=True))) == {1: 512, 2: 512, 3: 1024, 6: 512}
    assert (col_deg[2048:] == 6).all()  # the punctured block column
    assert dict(zip(*np.unique(np.diff(h.row_start), return_counts=True))) == {3: 512, 6: 1024}


@pytest.mark.parametrize("rate", AR4JA_RATES)
def test_ar4ja_k1024_has_full_rank(rate):
    # ../shared/REFERENCES.md sec. 13.2: H has full rank 3M for every rate at k = 1024
    code = ldpc_code("ar4ja", rate=rate, k=1024)
    assert gf2_rank(parity_check(code).to_dense()) == 3 * code.m


@pytest.mark.kat
def test_code_table():
    # CCSDS 131.0-B-2 Table 7-5 (n for each k and rate) and sec. 7.3.1 (C2)
    n = {(1024, "1/2"): 2048, (1024, "2/3"): 1536, (1024, "4/5"): 1280, (4096, "1/2"): 8192,
         (4096, "2/3"): 6144, (4096, "4/5"): 5120, (16384, "1/2"): 32768, (16384, "2/3"): 24576,
         (16384, "4/5"): 20480}
    for k in AR4JA_K:
        for rate in AR4JA_RATES:
            code = ldpc_code("ar4ja", rate=rate, k=k)
            assert code.n == n[k, rate]
            assert code.n_var == code.n + code.m and code.punctured == code.m
            assert code.frame_octets == k // 8
    assert (C2.n, C2.k, C2.n_var, C2.head_zeros, C2.extension, C2.frame_octets) == (8160, 7136, 8176, 18, 2, 892)
    assert len(ldpc_codes()) == 10


@pytest.mark.kat
@pytest.mark.parametrize("kwargs, message", [
    (dict(family="ldpc"), "Argument 'family' must be one of c2, ar4ja, not 'ldpc'."),
    (dict(family="ar4ja", rate="3/4", k=1024), "Argument 'rate' must be one of 1/2, 2/3, 4/5 for AR4JA, not '3/4'."),
    (dict(family="ar4ja", rate="1/2", k=2048), "Argument 'k' must be one of 1024, 4096, 16384 for AR4JA, not 2048."),
    (dict(family="ar4ja", rate="1/2"), "Argument 'k' must be one of 1024, 4096, 16384 for AR4JA, not None."),
    (dict(family="c2", rate="1/2"), "Argument 'rate' must be None for C2, not '1/2'."),
])
def test_bad_code_names(kwargs, message):
    fam = kwargs.pop("family")
    with pytest.raises(ValueError) as err:
        ldpc_code(fam, **kwargs)
    assert str(err.value) == message


@pytest.mark.kat
def test_encoder_argument_errors():
    code = ldpc_code("ar4ja", rate="4/5", k=1024)
    with pytest.raises(ValueError, match="Argument 'frames' must hold 128 octets per codeword"):
        ldpc_encode(code, bytes(127))
    with pytest.raises(TypeError, match="Argument 'frames' must be bytes or a uint8 array"):
        ldpc_encode(code, np.zeros(128, np.int16))
    with pytest.raises(ValueError, match="only 0 and 1"):
        ldpc_encode_bits(code, np.full(1024, 2))
    with pytest.raises(TypeError, match="Argument 'code' must be an LdpcCode"):
        ldpc_encode("c2", bytes(892))
    # two frames at once: one row per codeword
    assert ldpc_encode(code, np.zeros((2, 128), np.uint8)).shape == (2, 160)



@pytest.mark.kat
def test_block_parity_kernel_equals_the_obvious_sum():
    # the per-block parity of packed words (C2 expurgation checks) against unpack-and-sum, odd offsets and lengths
    from pipeline.fec.ldpc._codes import _BYTE_PARITY
    from pipeline.fec.ldpc._kernels import block_parity_kernel

    rng = np.random.default_rng(81)
    for n_bits, offset, block in ((8158, 18, 511), (101, 3, 7), (64, 0, 8)):
        words = rng.integers(0, 256, (5, (n_bits + 7) // 8 + 1), dtype=np.uint8)
        n_blocks = (offset + n_bits + block - 1) // block
        got = np.zeros((5, n_blocks), np.uint8)
        block_parity_kernel(words, n_bits, offset, block, _BYTE_PARITY, got)
        bits = np.zeros((5, n_blocks * block), np.int64)
        bits[:, offset:offset + n_bits] = np.unpackbits(words, axis=1)[:, :n_bits]
        assert np.array_equal(got, bits.reshape(5, n_blocks, block).sum(axis=2) % 2)
