"""Reed-Solomon decoder: error correction for every E, I and fill; failure flagging; outside oracles."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.fec import dual_basis_tables, rs_decode, rs_decode_blocks, rs_encode

C2D, D2C = dual_basis_tables()

# ---- slow obvious reference: syndromes by direct evaluation, carry-less multiply ---------------


def gf_mul_slow(x, y):
    """Multiply in GF(2^8) mod F(x) = x^8+x^7+x^2+x+1 bit by bit (131.0-B sec. 4.3.2)."""
    r = 0
    while y:
        if y & 1:
            r ^= x
        y >>= 1
        x <<= 1
        if x & 0x100:
            x ^= 0x187
    return r


def gf_pow_slow(x, n):
    r = 1
    for _ in range(n):
        r = gf_mul_slow(r, x)
    return r


def ref_syndromes(codeword_dual, e):
    """S_j = c(a^(11 j)) for j = 128-E..127+E on the full 255-symbol word (virtual fill prepended)."""
    word = [int(D2C[b]) for b in codeword_dual]
    word = [0] * (255 - len(word)) + word
    out = []
    for j in range(128 - e, 128 + e):
        root = gf_pow_slow(0xAD, j)  # a^11 = 0xAD
        acc = 0
        for sym in word:  # Horner, highest degree first
            acc = gf_mul_slow(acc, root) ^ sym
        out.append(acc)
    return out


def corrupt(block, interleave, n_err, rng, region=None):
    """Flip ``n_err`` distinct random symbols of every codeword to other values; return the copy."""
    bad = block.copy()
    n_cw = block.size // interleave
    for c in range(interleave):
        pos = rng.choice(n_cw if region is None else region, n_err, replace=False)
        bad[pos * interleave + c] ^= rng.integers(1, 256, n_err, dtype=np.uint8)
    return bad


# ---- known answers (small: also run uncompiled) ------------------------------------------------


@pytest.mark.kat
def test_known_vector_with_errors():
    # data 00 01 .. DE with the parity of REFERENCES.md sec. 10.2; 16 symbols damaged
    data = np.arange(223, dtype=np.uint8)
    block = rs_encode(data)
    assert block[223:].tobytes().hex().upper().startswith("4FFB92DD")
    bad = block.copy()
    bad[[0, 5, 17, 100, 150, 200, 222, 223, 230, 240, 241, 250, 251, 252, 253, 254]] ^= 0x5A
    out, corrected = rs_decode(bad)
    assert corrected == (16,) and np.array_equal(out, data)
    bad[3] ^= 1  # 17 errors: beyond E
    out, corrected = rs_decode(bad)
    assert corrected == (-1,) and np.array_equal(out, bad[:223])  # left as received


@pytest.mark.kat
def test_clean_and_bytes_in_bytes_out():
    data = bytes(range(100, 200)) * 2  # 200 octets: E = 8, I = 1, virtual fill q = 39
    block = rs_encode(data, e=8)
    assert isinstance(block, bytes) and len(block) == 216
    out, corrected = rs_decode(block, e=8)
    assert isinstance(out, bytes) and out == data and corrected == (0,)


@pytest.mark.kat
def test_errors_in_check_symbols_only():
    rng = np.random.default_rng(3)
    data = rng.integers(0, 256, 223 * 2, dtype=np.uint8)
    block = rs_encode(data, interleave=2)
    bad = block.copy()
    bad[-8:] ^= 0xFF  # four parity symbols of each of the two codewords
    out, corrected = rs_decode(bad, interleave=2)
    assert corrected == (4, 4) and np.array_equal(out, data)


# ---- correction for every E, I and fill ----------------------------------------------------------


@pytest.mark.parametrize("e", [16, 8])
@pytest.mark.parametrize("interleave", [1, 2, 3, 4, 5, 6, 7, 8])
def test_corrects_e_errors_every_depth_and_fill(e, interleave, rng):
    k = 255 - 2 * e
    for q in (0, 1, int(rng.integers(2, k - 1)), k - 1):
        data = rng.integers(0, 256, (k - q) * interleave, dtype=np.uint8)
        block = rs_encode(data, e=e, interleave=interleave)
        for n_err in (1, e):
            bad = corrupt(block, interleave, n_err, rng)
            out, corrected = rs_decode(bad, e=e, interleave=interleave)
            assert corrected == (n_err,) * interleave
            assert np.array_equal(out, data)


@pytest.mark.parametrize("e", [16, 8])
def test_beyond_e_is_flagged(e, rng):
    # issue 2: E+1 errors flagged uncorrectable in >= 99% of trials, never returned as clean/wrong
    k = 255 - 2 * e
    n_trials, flagged, wrong_unflagged = 0, 0, 0
    for q in (0, 40):
        data = rng.integers(0, 256, (500, (k - q) * 4), dtype=np.uint8)
        blocks = np.stack([rs_encode(d, e=e, interleave=4) for d in data])
        bad = np.stack([corrupt(b, 4, e + 1, rng) for b in blocks])
        out, corrected = rs_decode_blocks(bad, e=e, interleave=4)
        n_trials += corrected.size
        flagged += int((corrected == -1).sum())
        for b in range(out.shape[0]):
            for c in range(4):
                if corrected[b, c] != -1:
                    assert corrected[b, c] > 0  # never reported clean
                    if not np.array_equal(out[b, c::4], data[b, c::4]):
                        wrong_unflagged += 1  # a miscorrection onto another codeword
        # uncorrectable codewords are left exactly as received
        mask = np.repeat(corrected == -1, out.shape[1] // 4, axis=0).reshape(out.shape[0], 4, -1)
        recv = bad[:, : out.shape[1]].reshape(out.shape[0], -1, 4).transpose(0, 2, 1)
        got = out.reshape(out.shape[0], -1, 4).transpose(0, 2, 1)
        assert np.array_equal(got[mask], recv[mask])
    assert flagged >= 0.99 * n_trials
    assert wrong_unflagged <= 0.01 * n_trials


def test_corrected_codeword_has_zero_syndromes(rng):
    # oracle independent of the decoder's tables: direct evaluation at the 2E roots
    for e in (16, 8):
        k = 255 - 2 * e
        data = rng.integers(0, 256, k - 10, dtype=np.uint8)
        block = rs_encode(data, e=e)
        assert ref_syndromes(block, e) == [0] * (2 * e)
        bad = corrupt(block, 1, e, rng)
        assert any(ref_syndromes(bad, e))
        out, corrected = rs_decode(bad, e=e)
        fixed = np.concatenate([out, block[k - 10 :]])
        assert corrected == (e,) and ref_syndromes(fixed, e) == [0] * (2 * e)


def test_vs_reedsolo_decoder(rng):
    import reedsolo

    # reedsolo (PyPI) configured for CCSDS (REFERENCES.md sec. 10.2), dual basis mapped outside
    for e in (16, 8):
        codec = reedsolo.RSCodec(nsym=2 * e, nsize=255, fcr=128 - e, prim=0x187, generator=0xAD, c_exp=8)
        for q in (0, 30):
            data = rng.integers(0, 256, 255 - 2 * e - q, dtype=np.uint8)
            bad = corrupt(rs_encode(data, e=e), 1, int(rng.integers(1, e + 1)), rng)
            ref, _, errata = codec.decode(bytes(D2C[bad]))
            out, corrected = rs_decode(bad, e=e)
            assert bytes(C2D[np.frombuffer(bytes(ref), np.uint8)]) == out.tobytes()
            assert corrected[0] == len(errata)


def test_vs_galois_reed_solomon(rng):
    import galois

    # galois (PyPI) ReedSolomon: same field, primitive element a^11, first consecutive root c = 112.
    # (One test for encoder and decoder: building the galois code costs most of its run time.)
    gf = galois.GF(2**8, irreducible_poly=0x187, primitive_element=0xAD, verify=False)
    rs = galois.ReedSolomon(255, 223, field=gf, alpha=gf(0xAD), c=112)
    data = rng.integers(0, 256, 223 * 2, dtype=np.uint8)
    block = rs_encode(data, interleave=2)
    for c in range(2):
        ref = rs.encode(gf(D2C[data[c::2]].astype(int)))
        assert np.array_equal(C2D[np.asarray(ref, dtype=np.uint8)], block[c::2])
    bad = corrupt(rs_encode(data[:223]), 1, 12, rng)
    ref, n = rs.decode(gf(D2C[bad].astype(int)), errors=True)
    out, corrected = rs_decode(bad)
    assert np.array_equal(C2D[np.asarray(ref, dtype=np.uint8)], out)
    assert corrected == (int(n),)


def test_blocks_equals_single(rng):
    data = rng.integers(0, 256, (20, 1115), dtype=np.uint8)
    blocks = np.stack([rs_encode(d, interleave=5) for d in data])
    bad = np.stack([corrupt(b, 5, int(rng.integers(0, 18)), rng) for b in blocks])
    out, corrected = rs_decode_blocks(bad, interleave=5)
    for b in range(20):
        o, c = rs_decode(bad[b], interleave=5)
        assert np.array_equal(o, out[b]) and c == tuple(corrected[b])


@settings(max_examples=60, deadline=None)
@given(
    e=st.sampled_from([8, 16]),
    interleave=st.integers(1, 8),
    fill=st.integers(0, 200),
    seed=st.integers(0, 2**32 - 1),
    frac=st.floats(0, 1),
)
def test_property_encode_corrupt_decode(e, interleave, fill, seed, frac):
    # STYLE.md rule 11: encode, corrupt up to t symbols, decode, identity
    rng = np.random.default_rng(seed)
    k = 255 - 2 * e
    data = rng.integers(0, 256, (k - fill) * interleave, dtype=np.uint8)
    block = rs_encode(data, e=e, interleave=interleave)
    n_err = int(round(frac * e))
    out, corrected = rs_decode(corrupt(block, interleave, n_err, rng), e=e, interleave=interleave)
    assert np.array_equal(out, data) and corrected == (n_err,) * interleave


# ---- erasures ----------------------------------------------------------------------------------


def _errata(block, interleave, n_era, n_err, rng, wrong_fraction=0.7):
    """Erase n_era and corrupt n_err further symbols per codeword; return (received, erasure indices)."""
    bad = block.copy()
    n_cw = block.size // interleave
    erasures = []
    for c in range(interleave):
        pos = rng.choice(n_cw, n_era + n_err, replace=False)
        for p in pos[:n_era]:
            if rng.random() < wrong_fraction:  # an erased symbol may also have been right
                bad[p * interleave + c] ^= rng.integers(1, 256)
        bad[pos[n_era:] * interleave + c] ^= rng.integers(1, 256, n_err, dtype=np.uint8)
        erasures.extend(int(p) * interleave + c for p in pos[:n_era])
    return bad, erasures


@pytest.mark.parametrize("e", [16, 8])
def test_errors_and_erasures(e, rng):
    # errors-and-erasures decoding: v errors and f erasures are correctable when 2 v + f <= 2 E
    k = 255 - 2 * e
    for interleave, q in ((1, 0), (5, 3), (8, 100)):
        data = rng.integers(0, 256, (k - q) * interleave, dtype=np.uint8)
        block = rs_encode(data, e=e, interleave=interleave)
        for n_era in (1, e, 2 * e - 3, 2 * e):
            n_err = (2 * e - n_era) // 2
            bad, erasures = _errata(block, interleave, n_era, n_err, rng)
            out, corrected = rs_decode(bad, e=e, interleave=interleave, erasures=erasures)
            assert np.array_equal(out, data)
            assert all(0 <= v <= n_era + n_err for v in corrected)
        # 2E erasures that are all wrong: twice the error-only capability
        bad, erasures = _errata(block, interleave, 2 * e, 0, rng, wrong_fraction=1.0)
        out, corrected = rs_decode(bad, e=e, interleave=interleave, erasures=erasures)
        assert np.array_equal(out, data) and corrected == (2 * e,) * interleave
        assert rs_decode(bad, e=e, interleave=interleave)[1] == (-1,) * interleave  # without the hint


def test_erasures_vs_reedsolo(rng):
    import reedsolo

    codec = reedsolo.RSCodec(nsym=32, nsize=255, fcr=112, prim=0x187, generator=0xAD, c_exp=8)  # reedsolo (PyPI)
    data = rng.integers(0, 256, 223, dtype=np.uint8)
    bad, erasures = _errata(rs_encode(data), 1, 10, 11, rng)
    ref, _, _ = codec.decode(bytes(D2C[bad]), erase_pos=erasures)
    out, corrected = rs_decode(bad, erasures=erasures)
    assert bytes(C2D[np.frombuffer(bytes(ref), np.uint8)]) == out.tobytes() == data.tobytes()


def test_beyond_errata_capability_is_flagged(rng):
    flagged = 0
    for _ in range(200):
        data = rng.integers(0, 256, 223, dtype=np.uint8)
        bad, erasures = _errata(rs_encode(data), 1, 11, 11, rng, wrong_fraction=1.0)  # 2*11 + 11 > 32
        out, corrected = rs_decode(bad, erasures=erasures)
        if corrected == (-1,):
            flagged += 1
            assert np.array_equal(out, bad[:223])
        else:
            assert not np.array_equal(out, data) or corrected[0] > 0
    assert flagged >= 198


# ---- bad input ---------------------------------------------------------------------------------


@pytest.mark.kat
def test_bad_arguments():
    with pytest.raises(ValueError, match="Argument 'interleave' must be 1..8, not 9"):
        rs_decode(bytes(255 * 9), interleave=9)
    with pytest.raises(ValueError, match="Argument 'e' must be 16 or 8, not 5"):
        rs_decode(bytes(255), e=5)
    with pytest.raises(ValueError, match="Argument 'codeblock' must have a length"):
        rs_decode(bytes(256))
    with pytest.raises(ValueError, match="Argument 'codeblock' must have a length"):
        rs_decode(bytes(1273), interleave=5)
    with pytest.raises(ValueError, match="Argument 'codeblock' must have a length"):
        rs_decode(bytes(32))  # no data symbol left
    with pytest.raises(TypeError, match="Argument 'codeblock'"):
        rs_decode(np.zeros(255, np.int16))
    with pytest.raises(TypeError, match="Argument 'e' must be an integer"):
        rs_decode(bytes(255), e=16.0)
    with pytest.raises(ValueError, match="Argument 'codeblocks' must be 2-D"):
        rs_decode_blocks(np.zeros(255, np.uint8))
    with pytest.raises(ValueError, match="Argument 'erasures' must hold octet indices in 0..254"):
        rs_decode(bytes(255), erasures=[255])
    with pytest.raises(ValueError, match="Argument 'erasures' must mark at most 2E = 32 octets per codeword"):
        rs_decode(bytes(255), erasures=range(33))
    with pytest.raises(ValueError, match="Argument 'erasures' must not repeat"):
        rs_decode(bytes(255), erasures=[3, 3])
    with pytest.raises(TypeError, match="Argument 'erasures'"):
        rs_decode(bytes(255), erasures=[1.5])
