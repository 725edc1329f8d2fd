"""Encoders of pipeline.fec against published values and outside libraries (sources beside each check)."""

from __future__ import annotations

import hashlib

import numpy as np
import pytest

from pipeline.fec import (
    ASM,
    ASM_BITS,
    ASM_INVERTED,
    TURBO_ASM_R1_3,
    TURBO_ASM_R1_4,
    TURBO_ASM_R1_6,
    ConvEncoder,
    conv_bit_symbol_index,
    conv_encode,
    conv_output_length,
    crc16,
    dual_basis_tables,
    g2_inverted_default,
    pn_sequence,
    puncture_pattern,
    rs_encode,
    rs_generator,
)

# ---- slow obvious references -------------------------------------------------------------------


def ref_conv_encode(bits, rate="1/2", g2_inverted=None):
    """Shift register drawn as in 131.0-B Fig. 3-1: [input, D1..D6], taps read from the printed vectors.

    G2 inverted at rate 1/2 only: CCSDS 131.0-B sec. 3.3 ("Symbol inversion: On output path of G2");
    the punctured codes of sec. 3.4 have no inverter (CCSDS 130.1-G sec. 4.3, Fig. 4-2).
    """
    invert = (rate == "1/2") if g2_inverted is None else g2_inverted
    g1 = [int(c) for c in "1111001"]  # 171 octal, leftmost = input
    g2 = [int(c) for c in "1011011"]  # 133 octal
    reg = [0] * 7
    pat = puncture_pattern(rate)
    out = []
    for k, b in enumerate(bits):
        reg = [int(b)] + reg[:6]
        c1 = sum(r * g for r, g in zip(reg, g1)) % 2
        c2 = (sum(r * g for r, g in zip(reg, g2)) % 2) ^ int(invert)
        col = k % pat.shape[1]
        if pat[0, col]:
            out.append(c1)
        if pat[1, col]:
            out.append(c2)
    return np.array(out, dtype=np.uint8)


def ref_pn_bits(n_bits):
    """Fibonacci LFSR for h(x) = x^8+x^7+x^5+x^3+1 written out bit by bit."""
    a = [1] * 8
    while len(a) < n_bits:
        k = len(a)
        a.append(a[k - 1] ^ a[k - 3] ^ a[k - 5] ^ a[k - 8])
    return np.array(a[:n_bits], dtype=np.uint8)


def ref_crc16(data):
    """Bit-serial CRC, G(X) = X^16+X^12+X^5+1, register preset to ones (132.0-B sec. 4.1.6.2)."""
    c = 0xFFFF
    for byte in data:
        for i in range(7, -1, -1):
            bit = (byte >> i) & 1
            fb = ((c >> 15) & 1) ^ bit
            c = (c << 1) & 0xFFFF
            if fb:
                c ^= 0x1021
    return c


# ---- markers -----------------------------------------------------------------------------------


@pytest.mark.kat
def test_markers():
    assert ASM.hex().upper() == "1ACFFC1D"  # from memory, universal (REFERENCES.md sec. 1.1)
    assert ASM_INVERTED.hex().upper() == "E53003E2"  # computed: complement of the ASM
    assert ASM_BITS.tolist()[:8] == [0, 0, 0, 1, 1, 0, 1, 0]
    # CCSDS 131.0-B-2 Figs. 8-3..8-5 (bit strings): 1/4 and 1/6 markers are a marker then its complement
    half = len(TURBO_ASM_R1_4) // 2
    assert bytes(b ^ 0xFF for b in TURBO_ASM_R1_4[:half]) == TURBO_ASM_R1_4[half:]
    assert TURBO_ASM_R1_6[:12] == TURBO_ASM_R1_3
    assert bytes(b ^ 0xFF for b in TURBO_ASM_R1_6[:12]) == TURBO_ASM_R1_6[12:]


# ---- randomizer --------------------------------------------------------------------------------


@pytest.mark.kat
def test_pn_first_40_bits():
    # CCSDS 130.1-G-1 sec. 8.2: 1111 1111 0100 1000 0000 1110 1100 0000 1001 1010
    bits = np.unpackbits(pn_sequence(5))
    assert "".join(map(str, bits)) == "1111111101001000000011101100000010011010"


@pytest.mark.kat
def test_pn_table_and_period():
    table = pn_sequence(255)
    # computed here from the confirmed polynomial and seed (REFERENCES.md sec. 10.1)
    assert hashlib.sha256(table.tobytes()).hexdigest() == (
        "6dac31e6759a382430c80ad84bcd698011f21961ab21318b310a85ef85c7246e"
    )
    assert np.array_equal(np.unpackbits(pn_sequence(40)), ref_pn_bits(320))
    # period 255 bits by property: the m-sequence of a degree-8 primitive h(x)
    bits = ref_pn_bits(3 * 255)
    assert np.array_equal(bits[:255], bits[255:510])
    assert all(not np.array_equal(bits[:255], bits[p:p + 255]) for p in range(1, 255))
    assert int(bits[:255].sum()) == 128  # m-sequence balance
    assert np.array_equal(pn_sequence(600)[255:510], table)
    assert pn_sequence(0).shape == (0,)


# ---- CRC ---------------------------------------------------------------------------------------


@pytest.mark.kat
def test_crc16_check_value():
    assert crc16(b"123456789") == 0x29B1  # CRC-16/IBM-3740 check value, public CRC catalogue
    assert crc16(b"") == 0xFFFF  # computed here (REFERENCES.md sec. 10.4)
    assert crc16(bytes(6)) == 0x0E10  # computed here (REFERENCES.md sec. 10.4)


def test_crc16_vs_crccheck_and_reference(rng):
    from crccheck.crc import Crc16Ibm3740

    for n in (1, 2, 7, 100, 1113):
        data = rng.integers(0, 256, n, dtype=np.uint8).tobytes()
        c = crc16(data)
        assert c == Crc16Ibm3740.calc(data)  # crccheck (PyPI)
        assert c == ref_crc16(data)  # 132.0-B sec. 4.1.6.2 bit-serial
        # 132.0-B sec. 4.1.6.3: the decoder's syndrome over frame + FECF is zero
        assert crc16(data + c.to_bytes(2, "big")) == 0
        cut = n // 2
        assert crc16(data[cut:], init=crc16(data[:cut])) == c


# ---- convolutional code ------------------------------------------------------------------------


@pytest.mark.kat
def test_conv_known_answers():
    # computed here, REFERENCES.md sec. 10.3: encoded ASM from the all-zero state
    enc = conv_encode(ASM_BITS)
    assert np.packbits(enc).tobytes().hex().upper() == "56081C971AA73D3E"
    # from the all-ones prior state
    enc1 = ConvEncoder(initial_state=63).process(ASM_BITS)
    assert np.packbits(enc1).tobytes().hex().upper() == "70B81C971AA73D3E"
    # zeros give 0101...: the inverted G2 (131.0-B sec. 3.3.1(5))
    assert conv_encode(np.zeros(8, np.uint8)).tolist() == [0, 1] * 8


@pytest.mark.kat
def test_conv_dfree_from_impulse_response():
    # 130.1-G-1 sec. 4.2: dfree = 10.  The impulse response of the (non-inverted) code is the
    # minimum-weight path: weight 10 over the 7 branches.
    impulse = np.zeros(7, np.uint8)
    impulse[0] = 1
    resp = conv_encode(impulse) ^ conv_encode(np.zeros(7, np.uint8))  # remove the inversion
    assert "".join(map(str, resp)) == "11101111000111"  # REFERENCES.md sec. 10.3
    assert int(resp.sum()) == 10


def test_conv_dfree_by_search():
    # dfree = 10 (130.1-G-1 sec. 4.2) by exhaustive search over short input sequences
    best = 99
    zero = conv_encode(np.zeros(20, np.uint8))
    for m in range(1, 1 << 10):
        bits = np.zeros(20, np.uint8)
        bits[:10] = [(m >> i) & 1 for i in range(10)]
        if bits[0] == 0:
            continue
        best = min(best, int((conv_encode(bits) ^ zero).sum()))
    assert best == 10


@pytest.mark.parametrize("rate", ["1/2", "2/3", "3/4", "5/6", "7/8"])
def test_conv_vs_reference(rate, rng):
    bits = rng.integers(0, 2, 301, dtype=np.uint8)
    assert np.array_equal(conv_encode(bits, rate), ref_conv_encode(bits, rate))
    assert conv_encode(bits, rate).shape[0] == conv_output_length(301, rate)
    for inverted in (False, True):  # the profile override, either way
        assert np.array_equal(conv_encode(bits, rate, g2_inverted=inverted),
                              ref_conv_encode(bits, rate, g2_inverted=inverted))


@pytest.mark.kat
def test_g2_inverted_at_rate_half_only():
    # CCSDS 131.0-B sec. 3.3: "Symbol inversion: On output path of G2" (the rate-1/2 code); sec. 3.4:
    # the punctured codes use the same generators, and the punctured encoder of CCSDS 130.1-G sec. 4.3,
    # Fig. 4-2 has no inverter
    assert g2_inverted_default("1/2") is True
    for rate in ("2/3", "3/4", "5/6", "7/8"):
        assert g2_inverted_default(rate) is False
        # zero input from the zero state: no inverter, so the channel stays at 0
        assert not conv_encode(np.zeros(8 * 7 * 5, np.uint8), rate).any()
        # a punctured code is the plain (non-inverted) mother code with the Table 3-2 pattern applied
        bits = np.random.default_rng(3).integers(0, 2, 210, dtype=np.uint8)
        mother = conv_encode(bits, "1/2", g2_inverted=False).reshape(-1, 2)
        pat = puncture_pattern(rate)
        keep = np.stack([pat[0][np.arange(210) % pat.shape[1]], pat[1][np.arange(210) % pat.shape[1]]], axis=1)
        assert np.array_equal(conv_encode(bits, rate), mother[keep.astype(bool)])
    with pytest.raises(TypeError, match="Argument 'g2_inverted' must be True, False or None"):
        ConvEncoder(rate="3/4", g2_inverted=1)


def test_conv_vs_commpy(rng):
    import commpy.channelcoding as cc

    bits = rng.integers(0, 2, 1000, dtype=np.uint8)
    # scikit-commpy (PyPI) reads the generator octals with the newest bit as the LSB, so the CCSDS
    # 171/133 become 117/155 there; the G2 inversion is applied on top.
    trellis = cc.Trellis(np.array([6]), np.array([[0o117, 0o155]]))
    ref = np.asarray(cc.conv_encode(bits, trellis, termination="cont"), dtype=np.uint8)
    ref[1::2] ^= 1
    assert np.array_equal(conv_encode(bits), ref)


@pytest.mark.kat
def test_puncture_patterns():
    # 131.0-B Table 3-2 / 130.1-G-1 Table 4-1; 7/8 per REFERENCES.md pitfall 7
    expect = {
        "1/2": ("1", "1"),
        "2/3": ("10", "11"),
        "3/4": ("101", "110"),
        "5/6": ("10101", "11010"),
        "7/8": ("1000101", "1111010"),
    }
    for rate, (c1, c2) in expect.items():
        pat = puncture_pattern(rate)
        assert "".join(map(str, pat[0])) == c1 and "".join(map(str, pat[1])) == c2
        num, den = map(int, rate.split("/"))
        assert pat.shape[1] * den == int(pat.sum()) * num  # the pattern gives the nominal rate


@pytest.mark.kat
def test_bit_symbol_index():
    assert conv_bit_symbol_index(5, "1/2").tolist() == [0, 2, 4, 6, 8]
    # 7/8 order: C1(1) C2(1) C2(2) C2(3) C2(4) C1(5) C2(6) C1(7)
    assert conv_bit_symbol_index(9, "7/8").tolist() == [0, 2, 3, 4, 5, 6, 7, 8, 10]
    assert conv_bit_symbol_index(4, "3/4").tolist() == [0, 2, 3, 4]
    assert conv_bit_symbol_index(4, "3/4", phase=1).tolist() == [0, 1, 2, 4]


def test_bit_symbol_index_matches_encoder(rng):
    # the symbol index of bit k is where flipping bit k first changes the encoder output
    for rate in ("1/2", "2/3", "5/6", "7/8"):
        bits = rng.integers(0, 2, 40, dtype=np.uint8)
        ref = conv_encode(bits, rate)
        idx = conv_bit_symbol_index(40, rate)
        for k in range(40):
            flipped = bits.copy()
            flipped[k] ^= 1
            assert int(np.flatnonzero(conv_encode(flipped, rate) != ref)[0]) == idx[k]


@pytest.mark.parametrize("rate", ["1/2", "3/4", "7/8"])
def test_encoder_chunking_invariance(rate, rng):
    bits = rng.integers(0, 2, 5000, dtype=np.uint8)
    whole = conv_encode(bits, rate)
    enc = ConvEncoder(rate=rate)
    cuts = np.sort(rng.integers(0, bits.size, 12))
    parts = [enc.process(p) for p in np.split(bits, cuts)]
    assert np.array_equal(np.concatenate(parts), whole)
    enc.reset()
    assert np.array_equal(enc.process(bits), whole)


# ---- Reed-Solomon encoder ----------------------------------------------------------------------

T_AL = """10001101 11101111 11101100 10000110 11111010 10011001 10101111 01111011"""
T_AL_INV = """11000101 01000010 00101110 11111101 11110000 01111001 10101100 11001100"""


def _apply_matrix(rows, vec_bits):
    out = np.zeros(8, dtype=np.uint8)
    for i, v in enumerate(vec_bits):
        if v:
            out ^= rows[i]
    return out


@pytest.mark.kat
def test_dual_basis_matrices_as_printed():
    # CCSDS 131.0-B-2 sec. 4.3.9 (p. 4-6): [z0..z7] = [u7..u0] x T_al; [u7..u0] = [z0..z7] x T_al^-1
    t_al = np.array([[int(c) for c in r] for r in T_AL.split()], dtype=np.uint8)
    t_inv = np.array([[int(c) for c in r] for r in T_AL_INV.split()], dtype=np.uint8)
    c2d, d2c = dual_basis_tables()
    for u in range(256):
        ubits = [(u >> (7 - i)) & 1 for i in range(8)]  # u7 first
        z = _apply_matrix(t_al, ubits)
        assert int(np.packbits(z)[0]) == c2d[u]
        zbits = [(int(c2d[u]) >> (7 - i)) & 1 for i in range(8)]
        assert int(np.packbits(_apply_matrix(t_inv, zbits))[0]) == u
    assert c2d[1] == 0x7B and d2c[1] == 0xCC  # REFERENCES.md pitfall 10


@pytest.mark.kat
def test_rs_generator_and_parity_vectors():
    # computed here from 131.0-B sec. 4.3 (REFERENCES.md sec. 10.2)
    g16 = "01 5B 7F 56 10 1E 0D EB 61 A5 08 2A 36 56 AB 20 71 20 AB 56 36 2A 08 A5 61 EB 0D 1E 10 56 7F 5B 01"
    g8 = "01 A5 69 1B 9F 68 98 65 4A 65 98 68 9F 1B 69 A5 01"
    assert rs_generator(16).tobytes().hex(" ").upper() == g16
    assert rs_generator(8).tobytes().hex(" ").upper() == g8
    # the generators are palindromes (130.1-G-2 p. 5-3)
    assert rs_generator(16).tolist() == rs_generator(16).tolist()[::-1]
    p = rs_encode(bytes(range(223)))[223:]
    assert p.hex().upper() == "4FFB92DD557EC67F27FB8982CF58F8FD028AD117FCEF6B2793D0418826578651"
    p = rs_encode(bytes(222) + b"\x01")[223:]
    assert p.hex().upper() == "660827F283411B8B28E61FAD2759C879C85927AD1FE6288B1B4183F2270866" + "01"
    assert rs_encode(bytes(range(239)), e=8)[239:].hex().upper() == "9755133F2714A3FBE0101E8F0E0AC1D2"
    assert rs_encode(bytes(238) + b"\x01", e=8)[239:].hex().upper() == "286D24C56C532D952D536CC5246D2801"
    assert rs_encode(bytes(223)) == bytes(255)


def _reedsolo_codec(e):
    import reedsolo

    # reedsolo (PyPI) configured for CCSDS: generator is the field element a^11 = 0xAD (REFERENCES.md 10.2)
    return reedsolo.RSCodec(nsym=2 * e, nsize=255, fcr=128 - e, prim=0x187, generator=0xAD, c_exp=8)


@pytest.mark.parametrize("e", [16, 8])
@pytest.mark.parametrize("interleave", [1, 2, 5, 8])
def test_rs_encode_vs_reedsolo(e, interleave, rng):
    c2d, d2c = dual_basis_tables()
    codec = _reedsolo_codec(e)
    k = 255 - 2 * e
    for q in (0, 3, 100):
        data = rng.integers(0, 256, (k - q) * interleave, dtype=np.uint8)
        block = rs_encode(data, e=e, interleave=interleave)
        assert isinstance(block, np.ndarray) and block.shape[0] == (255 - q) * interleave
        assert np.array_equal(block[: data.size], data)
        for c in range(interleave):
            cw_dual = block[c::interleave]
            ref = codec.encode(bytes(d2c[cw_dual[: k - q]]))
            assert bytes(c2d[np.frombuffer(bytes(ref), np.uint8)]) == cw_dual.tobytes()


def test_rs_codewords_vanish_at_galois_roots(rng):
    import galois

    # galois (PyPI) field arithmetic: every interleaved codeword, read in the conventional basis,
    # evaluates to zero at the 2E roots (a^11)^j, j = 128-E..127+E (131.0-B sec. 4.3.3)
    gf = galois.GF(2**8, irreducible_poly=0x187, primitive_element=0xAD, verify=False)
    c2d, d2c = dual_basis_tables()
    for e in (16, 8):
        roots = gf(0xAD) ** np.arange(128 - e, 128 + e)
        block = rs_encode(rng.integers(0, 256, (255 - 2 * e - 7) * 3, dtype=np.uint8), e=e, interleave=3)
        for c in range(3):
            poly = galois.Poly(gf(d2c[block[c::3]].astype(int)))
            assert not np.any(poly(roots))
        poly = galois.Poly(gf(d2c[block[0::3]].astype(int) ^ 1))
        assert np.any(poly(roots))


def test_rs_encode_shortened_equals_zero_prefix(rng):
    # 131.0-B sec. 4.3.7: virtual fill = leading zeros neither encoded into the stream nor sent
    data = rng.integers(0, 256, 220 * 5, dtype=np.uint8)
    short = rs_encode(data, interleave=5)
    full = rs_encode(np.concatenate([np.zeros(15, np.uint8), data]), interleave=5)
    assert np.array_equal(full[15:], short)
    assert isinstance(rs_encode(data.tobytes(), interleave=5), bytes)


@pytest.mark.kat
def test_bad_arguments():
    with pytest.raises(ValueError, match="Argument 'interleave' must be 1..8, not 9"):
        rs_encode(bytes(223 * 9), interleave=9)
    with pytest.raises(ValueError, match="Argument 'e' must be 16 or 8, not 5"):
        rs_encode(bytes(223), e=5)
    with pytest.raises(ValueError, match="Argument 'data' must have a length"):
        rs_encode(bytes(224))
    with pytest.raises(ValueError, match="Argument 'data' must have a length"):
        rs_encode(bytes(11), interleave=2)
    with pytest.raises(TypeError, match="Argument 'data'"):
        rs_encode(np.zeros(223, np.int32))
    with pytest.raises(ValueError, match="Argument 'rate' must be one of"):
        conv_encode(np.zeros(4, np.uint8), "4/5")
    with pytest.raises(ValueError, match="Argument 'bits' must hold only 0 and 1"):
        conv_encode(np.array([0, 2]))
    with pytest.raises(TypeError, match="Argument 'bits'"):
        conv_encode(np.array([0.0, 1.0]))
    with pytest.raises(ValueError, match="Argument 'n' must be >= 0, not -1"):
        pn_sequence(-1)
    with pytest.raises(TypeError, match="Argument 'data'"):
        crc16("123")
