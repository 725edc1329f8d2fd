"""CodeblockDecoder: de-randomize + RS decode, on codeblocks built with reedsolo and REFERENCES.md's tables."""

from __future__ import annotations

import hashlib

import numpy as np
import pytest
import reedsolo

from pipeline.profile import LinkProfile, demo_profile_path, load_profile
from pipeline.sync import Cadu, CodeblockDecoder, DecodedFrame

# REFERENCES.md sec. 10.1 (computed there from the polynomial and seed confirmed in CCSDS 130.1-G-1 sec. 8.2)
PN_TABLE = bytes.fromhex(
    "FF 48 0E C0 9A 0D 70 BC 8E 2C 93 AD A7 B7 46 CE "
    "5A 97 7D CC 32 A2 BF 3E 0A 10 F1 88 94 CD EA B1 "
    "FE 90 1D 81 34 1A E1 79 1C 59 27 5B 4F 6E 8D 9C "
    "B5 2E FB 98 65 45 7E 7C 14 21 E3 11 29 9B D5 63 "
    "FD 20 3B 02 68 35 C2 F2 38 B2 4E B6 9E DD 1B 39 "
    "6A 5D F7 30 CA 8A FC F8 28 43 C6 22 53 37 AA C7 "
    "FA 40 76 04 D0 6B 85 E4 71 64 9D 6D 3D BA 36 72 "
    "D4 BB EE 61 95 15 F9 F0 50 87 8C 44 A6 6F 55 8F "
    "F4 80 EC 09 A0 D7 0B C8 E2 C9 3A DA 7B 74 6C E5 "
    "A9 77 DC C3 2A 2B F3 E0 A1 0F 18 89 4C DE AB 1F "
    "E9 01 D8 13 41 AE 17 91 C5 92 75 B4 F6 E8 D9 CB "
    "52 EF B9 86 54 57 E7 C1 42 1E 31 12 99 BD 56 3F "
    "D2 03 B0 26 83 5C 2F 23 8B 24 EB 69 ED D1 B3 96 "
    "A5 DF 73 0C A8 AF CF 82 84 3C 62 25 33 7A AC 7F "
    "A4 07 60 4D 06 B8 5E 47 16 49 D6 D3 DB A3 67 2D "
    "4B BE E6 19 51 5F 9F 05 08 78 C4 4A 66 F5 58 "
)
# REFERENCES.md sec. 10.2: conventional -> dual (T_al) and dual -> conventional (T_al^-1), CCSDS 131.0-B-2 sec. 4.3.9
TAL = bytes.fromhex(
    "00 7B AF D4 99 E2 36 4D FA 81 55 2E 63 18 CC B7 "
    "86 FD 29 52 1F 64 B0 CB 7C 07 D3 A8 E5 9E 4A 31 "
    "EC 97 43 38 75 0E DA A1 16 6D B9 C2 8F F4 20 5B "
    "6A 11 C5 BE F3 88 5C 27 90 EB 3F 44 09 72 A6 DD "
    "EF 94 40 3B 76 0D D9 A2 15 6E BA C1 8C F7 23 58 "
    "69 12 C6 BD F0 8B 5F 24 93 E8 3C 47 0A 71 A5 DE "
    "03 78 AC D7 9A E1 35 4E F9 82 56 2D 60 1B CF B4 "
    "85 FE 2A 51 1C 67 B3 C8 7F 04 D0 AB E6 9D 49 32 "
    "8D F6 22 59 14 6F BB C0 77 0C D8 A3 EE 95 41 3A "
    "0B 70 A4 DF 92 E9 3D 46 F1 8A 5E 25 68 13 C7 BC "
    "61 1A CE B5 F8 83 57 2C 9B E0 34 4F 02 79 AD D6 "
    "E7 9C 48 33 7E 05 D1 AA 1D 66 B2 C9 84 FF 2B 50 "
    "62 19 CD B6 FB 80 54 2F 98 E3 37 4C 01 7A AE D5 "
    "E4 9F 4B 30 7D 06 D2 A9 1E 65 B1 CA 87 FC 28 53 "
    "8E F5 21 5A 17 6C B8 C3 74 0F DB A0 ED 96 42 39 "
    "08 73 A7 DC 91 EA 3E 45 F2 89 5D 26 6B 10 C4 BF "
)
TAL_INV = bytes.fromhex(
    "00 CC AC 60 79 B5 D5 19 F0 3C 5C 90 89 45 25 E9 "
    "FD 31 51 9D 84 48 28 E4 0D C1 A1 6D 74 B8 D8 14 "
    "2E E2 82 4E 57 9B FB 37 DE 12 72 BE A7 6B 0B C7 "
    "D3 1F 7F B3 AA 66 06 CA 23 EF 8F 43 5A 96 F6 3A "
    "42 8E EE 22 3B F7 97 5B B2 7E 1E D2 CB 07 67 AB "
    "BF 73 13 DF C6 0A 6A A6 4F 83 E3 2F 36 FA 9A 56 "
    "6C A0 C0 0C 15 D9 B9 75 9C 50 30 FC E5 29 49 85 "
    "91 5D 3D F1 E8 24 44 88 61 AD CD 01 18 D4 B4 78 "
    "C5 09 69 A5 BC 70 10 DC 35 F9 99 55 4C 80 E0 2C "
    "38 F4 94 58 41 8D ED 21 C8 04 64 A8 B1 7D 1D D1 "
    "EB 27 47 8B 92 5E 3E F2 1B D7 B7 7B 62 AE CE 02 "
    "16 DA BA 76 6F A3 C3 0F E6 2A 4A 86 9F 53 33 FF "
    "87 4B 2B E7 FE 32 52 9E 77 BB DB 17 0E C2 A2 6E "
    "7A B6 D6 1A 03 CF AF 63 8A 46 26 EA F3 3F 5F 93 "
    "A9 65 05 C9 D0 1C 7C B0 59 95 F5 39 20 EC 8C 40 "
    "54 98 F8 34 2D E1 81 4D A4 68 08 C4 DD 11 71 BD "
)

TAL_A = np.frombuffer(TAL, dtype=np.uint8)
TAL_INV_A = np.frombuffer(TAL_INV, dtype=np.uint8)


def test_reference_tables_are_the_published_ones():
    # REFERENCES.md sec. 10.1: SHA-256 and byte sum of the 255-byte table; first 40 bits per CCSDS 130.1-G-1 sec. 8.2
    assert hashlib.sha256(PN_TABLE).hexdigest() == "6dac31e6759a382430c80ad84bcd698011f21961ab21318b310a85ef85c7246e"
    assert sum(PN_TABLE) == 32640
    assert PN_TABLE[:5] == bytes.fromhex("FF480EC09A")
    # REFERENCES.md pitfall 10 / CCSDS 131.0-B-2 sec. 4.3.9: tal[1] = 0x7B, tal_inv[1] = 0xCC; mutual inverses
    assert TAL[1] == 0x7B and TAL_INV[1] == 0xCC
    assert np.array_equal(TAL_INV_A[TAL_A], np.arange(256))


def ccsds_codec(e):
    # REFERENCES.md sec. 10.2: reedsolo configured for CCSDS (generator = field element alpha^11 = 0xAD)
    return reedsolo.RSCodec(nsym=2 * e, nsize=255, fcr=128 - e, prim=0x187, generator=0xAD, c_exp=8)


def build_codeblock(frame: bytes, e: int, interleave: int) -> bytes:
    """Frame (dual-basis octets as sent) -> codeblock with interleaved dual-basis parity, via reedsolo."""
    codec = ccsds_codec(e)
    f = np.frombuffer(frame, dtype=np.uint8)
    parity = np.zeros((2 * e, interleave), dtype=np.uint8)
    for j in range(interleave):
        conv = TAL_INV_A[f[j::interleave]]
        enc = np.frombuffer(bytes(codec.encode(bytearray(conv.tobytes()))), dtype=np.uint8)
        parity[:, j] = TAL_A[enc[-2 * e:]]
    return frame + parity.ravel().tobytes()


def randomize(block: bytes) -> bytes:
    pn = np.resize(np.frombuffer(PN_TABLE, dtype=np.uint8), len(block))
    return (np.frombuffer(block, dtype=np.uint8) ^ pn).tobytes()


def make_profile(e=16, interleave=5, length=1115, randomizer=True) -> LinkProfile:
    return load_profile(demo_profile_path()).with_changes(
        coding={"reed_solomon": e, "interleave": interleave, "randomizer": randomizer}, frames={"length": length})


def cadu_of(data: bytes, **kw) -> Cadu:
    base = dict(position=123.5, asm_errors=0, inverted=False, flywheel=False, bit_index=77)
    base.update(kw)
    return Cadu(data=data, **base)


def corrupt(block: bytes, rng, per_codeword, interleave, frame_len, e):
    """Flip random octets: ``per_codeword[j]`` distinct symbols of codeword j (octets j, j+I, ...)."""
    b = np.frombuffer(block, dtype=np.uint8).copy()
    n_cw = len(b) // interleave
    for j, k in enumerate(per_codeword):
        rows = rng.choice(n_cw, size=k, replace=False)
        b[rows * interleave + j] ^= rng.integers(1, 256, size=k, dtype=np.uint8)
    return b.tobytes()


# ---- clean and corrected codeblocks ---------------------------------------------------------------------
@pytest.mark.parametrize("e,interleave,length", [(16, 5, 1115), (16, 1, 223), (8, 4, 892), (16, 8, 1000), (8, 2, 300)])
def test_clean_and_corrected(rng, e, interleave, length):
    prof = make_profile(e, interleave, length)
    dec = CodeblockDecoder(profile=prof)
    frame = rng.integers(0, 256, length, dtype=np.uint8).tobytes()
    block = build_codeblock(frame, e, interleave)
    assert len(block) == prof.codeblock_bytes
    out = dec.process(cadu_of(randomize(block)))
    assert isinstance(out, DecodedFrame)
    assert out.status == "ok" and out.frame == frame and out.rs_corrected == (0,) * interleave
    per = [int(v) for v in rng.integers(0, e + 1, interleave)]
    per[0] = e  # at least one codeword at the full correction capability
    bad = corrupt(block, rng, per, interleave, length, e)
    out = dec.process(cadu_of(randomize(bad)))
    assert out.status == "ok" and out.frame == frame  # CCSDS 131.0-B-2 sec. 4.3.1: E symbols correctable
    assert out.rs_corrected == tuple(per)
    assert dec.stats.symbols_corrected == sum(per)
    assert dec.stats.ok == 2 and dec.stats.rs_uncorrectable == 0


def test_uncorrectable_keeps_received_bytes(rng):
    e, interleave, length = 16, 5, 1115
    prof = make_profile(e, interleave, length)
    dec = CodeblockDecoder(profile=prof)
    frame = rng.integers(0, 256, length, dtype=np.uint8).tobytes()
    block = build_codeblock(frame, e, interleave)
    per = [3, 60, 0, 60, 16]
    bad = corrupt(block, rng, per, interleave, length, e)
    out = dec.process(cadu_of(randomize(bad), flywheel=True))
    assert out.status == "rs_uncorrectable"
    assert out.rs_corrected[0] == 3 and out.rs_corrected[2] == 0 and out.rs_corrected[4] == 16
    assert out.rs_corrected[1] == -1 and out.rs_corrected[3] == -1
    got = np.frombuffer(out.frame, dtype=np.uint8)
    want = np.frombuffer(frame, dtype=np.uint8)
    recv = np.frombuffer(bad, dtype=np.uint8)[:length]
    for j in (0, 2, 4):
        assert np.array_equal(got[j::5], want[j::5])  # corrected codewords
    for j in (1, 3):
        assert np.array_equal(got[j::5], recv[j::5])  # failed codewords: as received, never "fixed"
    assert dec.stats.rs_uncorrectable == 1 and dec.stats.codewords_uncorrectable == 2
    assert dec.stats.flywheel_codeblocks == 1
    assert out.cadu.flywheel and out.position == 123.5


def test_many_errors_never_ok_with_wrong_data(rng):
    # E+1 .. 39 errors in one codeword: the codeblock must come out "rs_uncorrectable", never "ok".
    e, interleave, length = 16, 2, 446
    prof = make_profile(e, interleave, length)
    dec = CodeblockDecoder(profile=prof)
    flagged = 0
    trials = 40
    for _ in range(trials):
        frame = rng.integers(0, 256, length, dtype=np.uint8).tobytes()
        block = build_codeblock(frame, e, interleave)
        bad = corrupt(block, rng, [int(rng.integers(e + 1, 40)), 0], interleave, length, e)
        out = dec.process(cadu_of(randomize(bad)))
        assert out.rs_corrected[1] == 0
        flagged += out.status == "rs_uncorrectable"
    # a miscorrection of RS(255,223) beyond E errors has probability about 1/16! (from memory, not confirmed)
    assert flagged == trials


def test_without_reed_solomon_derandomizes_only(rng):
    prof = make_profile(e=0, interleave=1, length=1115)
    dec = CodeblockDecoder(profile=prof)
    frame = rng.integers(0, 256, 1115, dtype=np.uint8).tobytes()
    out = dec.process(cadu_of(randomize(frame)))
    assert out.status == "ok" and out.frame == frame and out.rs_corrected == ()


def test_without_randomizer(rng):
    prof = make_profile(e=16, interleave=5, length=1115, randomizer=False)
    dec = CodeblockDecoder(profile=prof)
    frame = rng.integers(0, 256, 1115, dtype=np.uint8).tobytes()
    out = dec.process(cadu_of(build_codeblock(frame, 16, 5)))
    assert out.status == "ok" and out.frame == frame


@pytest.mark.kat
def test_kat_published_parity_all_zero_but_one():
    # REFERENCES.md sec. 10.2 check vector (computed there, reproduced by reedsolo): E=16, 222 x 00 then 01
    want = bytes.fromhex("660827F283411B8B28E61FAD2759C879C85927AD1FE6288B1B4183F227086601")
    frame = bytes(222) + b"\x01"
    assert build_codeblock(frame, 16, 1)[223:] == want
    prof = make_profile(e=16, interleave=1, length=223, randomizer=False)
    out = CodeblockDecoder(profile=prof).process(cadu_of(frame + want))
    assert out.status == "ok" and out.frame == frame and out.rs_corrected == (0,)


def test_reset_and_bad_arguments(rng):
    prof = make_profile()
    dec = CodeblockDecoder(profile=prof)
    with pytest.raises(ValueError, match=r"must carry 1275 octets \(the profile's codeblock\), not 10\."):
        dec.process(cadu_of(bytes(10)))
    with pytest.raises(TypeError, match="Argument 'cadu' must be a Cadu, not bytes."):
        dec.process(bytes(1275))
    with pytest.raises(TypeError, match="Argument 'profile' must be a LinkProfile, not dict."):
        CodeblockDecoder(profile={})
    dec.process(cadu_of(randomize(build_codeblock(bytes(1115), 16, 5))))
    assert dec.stats.codeblocks == 1
    dec.reset()
    assert dec.stats.as_dict()["codeblocks"] == 0


# ---- the whole sync path: conv-coded, randomized, RS-coded CADUs through BranchSync/FrameSync/CodeblockDecoder ----
def test_chain_branch_frame_codeblock(rng):
    from pipeline.fec import ASM, conv_encode
    from pipeline.sync import BranchSync, FrameSync

    prof = make_profile(16, 5, 1115)
    frames = [rng.integers(0, 256, 1115, dtype=np.uint8).tobytes() for _ in range(6)]
    cadus = b"".join(ASM + randomize(build_codeblock(f, 16, 5)) for f in frames)
    lead = rng.integers(0, 2, 333, dtype=np.uint8)
    bits = np.concatenate((lead, np.unpackbits(np.frombuffer(cadus, dtype=np.uint8)), lead[:50]))
    sym = conv_encode(bits, "1/2")
    esn0 = 10 ** ((4.0 - 3.0103) / 10)  # Eb/N0 = 4 dB per channel-coded information bit
    soft = -((1.0 - 2.0 * sym) + rng.normal(0, np.sqrt(1 / (2 * esn0)), sym.size)).astype(np.float32)  # inverted
    soft = soft[3:]  # start mid-branch
    pos = 10.0 + 4.2 * np.arange(soft.size)  # 4.2 samples per channel symbol
    bs = BranchSync(rate="1/2", modulation="bpsk")
    fs = FrameSync(frame_bits=8 * prof.codeblock_bytes)
    dec = CodeblockDecoder(profile=prof)
    out = []
    for a in range(0, soft.size, 7001):
        b, p = bs.process(soft[a: a + 7001], pos[a: a + 7001])
        out += [dec.process(c) for c in fs.process(b, p)]
    b, p = bs.flush()
    out += [dec.process(c) for c in fs.process(b, p) + fs.flush()]
    assert [o.frame for o in out] == frames
    assert all(o.status == "ok" and o.cadu.inverted for o in out)
    # position = first channel symbol of the ASM's first bit (bit 333 + k * 10232 -> symbol 2 * that - 3)
    want = [10.0 + 4.2 * (2 * (333 + k * 8 * (4 + 1275)) - 3) for k in range(6)]
    assert np.allclose([o.position for o in out], want)


@pytest.mark.parametrize("e,interleave,length,randomizer", [(16, 5, 1115, True), (8, 2, 300, False)])
def test_batch_of_cadus_equals_one_at_a_time(rng, e, interleave, length, randomizer):
    """process_cadus (one decoder call for the batch) gives the frames and statistics of process() per CADU:
    clean, corrected (E symbols, CCSDS 131.0-B-2 sec. 4.3.1) and uncorrectable codeblocks (reedsolo-built)."""
    prof = make_profile(e, interleave, length, randomizer)
    cadus = []
    for k, per in enumerate(([0] * interleave, [e] * interleave, [3, 60] + [0] * (interleave - 2))):
        frame = rng.integers(0, 256, length, dtype=np.uint8).tobytes()
        block = corrupt(build_codeblock(frame, e, interleave), rng, per, interleave, length, e)
        cadus.append(cadu_of(randomize(block) if randomizer else block, flywheel=k == 2, position=100.0 * k))
    one, batch = CodeblockDecoder(profile=prof), CodeblockDecoder(profile=prof)
    want = [one.process(c) for c in cadus]
    got = batch.process_cadus(cadus)
    assert [g.status for g in got] == ["ok", "ok", "rs_uncorrectable"]
    assert got == want and batch.stats == one.stats
    with pytest.raises(ValueError, match="octets"):  # a bad CADU in a batch: the same error as process()
        batch.process_cadus([cadus[0], cadu_of(b"\x00" * 10)])
