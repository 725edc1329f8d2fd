"""Tests of pipeline.link: TM / AOS frame parsing, CLCW, FECF, FHEC and channel accounting."""

from __future__ import annotations

import functools
import json

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from test_link_builders import (
    aos_frame,
    aos_zone_length,
    clcw_word,
    crc16_ref,
    decoded,
    pack_bits,
    tm_frame,
    tm_primary,
    tm_zone_length,
)

from pipeline.link import (
    ChannelAccounting,
    FrameParser,
    Gap,
    count_step,
    decode_clcw,
    fhec_check,
    fhec_decode,
    fhec_parity,
)
from pipeline.link._fhec import fhec_generator
from pipeline.profile import FramesSection

TM = FramesSection(kind="tm", length=64, ocf=True, fecf=False, spacecraft_id=0x123)
TM_FECF = FramesSection(kind="tm", length=64, ocf=False, fecf=True, spacecraft_id=499)
AOS = FramesSection(kind="aos", length=80, ocf=True, fecf=True, spacecraft_id=0xAB, fhec=True,
                    insert_zone_length=4, bitstream_vcids=(9,))


def _tm(vcid=5, mcfc=0x45, vcfc=0x67, fhp=0, frames=TM, **kw):
    z = bytes(range(tm_zone_length(frames, len(kw.get("sec_header", b"") or b""))))
    return tm_frame(frames, vcid=vcid, mcfc=mcfc, vcfc=vcfc, zone=z, fhp=fhp, **kw)


@functools.lru_cache(maxsize=1)
def _galois_rs():
    import galois

    # pure-Python arithmetic: GF(16) is tiny and galois' JIT compilation would take seconds
    gf = galois.GF(2**4, irreducible_poly="x^4 + x + 1", compile="python-calculate")
    return gf, galois.ReedSolomon(15, 11, field=gf, c=6)


def _aos_fhec(hdr6: bytes) -> int:
    """FHEC by the galois (PyPI) Reed-Solomon code RS(15,11) shortened to (10,6), roots alpha^6..alpha^9."""
    gf, rs = _galois_rs()
    msg = gf([hdr6[0] >> 4, hdr6[0] & 15, hdr6[1] >> 4, hdr6[1] & 15, hdr6[5] >> 4, hdr6[5] & 15])
    par = [int(v) for v in rs.encode(msg)[6:]]
    return (par[0] << 12) | (par[1] << 8) | (par[2] << 4) | par[3]


# ---- TM -------------------------------------------------------------------------------------

@pytest.mark.kat
def test_tm_worked_example_header():
    # ../shared/REFERENCES.md sec. 3, computed there: header 12 3B 45 67 18 00
    frame = _tm()
    assert frame[:6] == bytes.fromhex("123B45671800")
    rec = FrameParser(frames=TM).process(decoded(frame, position=1234.5, rs=(1, 0, 2)))
    assert rec.status == "ok", rec.detail
    assert (rec.version, rec.scid, rec.vcid, rec.ocf_flag, rec.mcfc, rec.vcfc) == (0, 0x123, 5, True, 0x45, 0x67)
    assert (rec.sec_header_flag, rec.sync_flag, rec.packet_order, rec.segment_length_id, rec.fhp) == \
        (False, False, False, 3, 0)
    assert rec.data_field == frame[6:60] and rec.packet_zone == rec.data_field
    assert rec.ocf == frame[60:64] and rec.clcw["vcid"] == 5 and rec.fecf_ok is None
    assert rec.position == 1234.5 and rec.rs_corrected == (1, 0, 2) and rec.vcfc_modulus == 256
    d = rec.as_dict()
    json.dumps(d)
    assert d["scid"] == 0x123 and d["ocf"] == frame[60:64].hex() and d["data_field_length"] == 54


def test_tm_fields_against_bit_string_builder(rng):
    p = FrameParser(frames=FramesSection(kind="tm", length=40, spacecraft_id=0))
    for _ in range(300):
        scid, vcid, mc, vc, fhp = (int(rng.integers(0, n)) for n in (1024, 8, 256, 256, 28))
        order, seglen = bool(rng.integers(2)), int(rng.integers(4))
        frames = FramesSection(kind="tm", length=40, spacecraft_id=scid)
        p.frames = frames
        frame = tm_primary(scid, vcid, mc, vc, fhp=fhp, order=order, seglen=seglen) + bytes(34)
        rec = p.process(decoded(frame))
        assert (rec.status, rec.scid, rec.vcid, rec.mcfc, rec.vcfc, rec.fhp, rec.packet_order,
                rec.segment_length_id) == ("ok", scid, vcid, mc, vc, fhp, order, seglen)


@pytest.mark.kat
def test_clcw_fields():
    # CCSDS 232.0-B sec. 4.2 bit map (from memory, not confirmed), built as a bit string
    w = clcw_word(status=5, cop=1, vcid=0x2A, no_rf=1, no_bitlock=0, lockout=1, wait=0, retransmit=1, farm_b=2,
                  report=0xC3)
    c = decode_clcw(w)
    assert c == {"control_word_type": 0, "version": 0, "status_field": 5, "cop_in_effect": 1, "vcid": 0x2A,
                 "spare1": 0, "no_rf_available": 1, "no_bit_lock": 0, "lockout": 1, "wait": 0, "retransmit": 1,
                 "farm_b_counter": 2, "spare2": 0, "report_value": 0xC3}
    assert decode_clcw(b"\x80\x00\x00\x00") is None  # type-2 report ([TM-DL] sec. 4.1.5.4)
    with pytest.raises(ValueError, match="Argument 'ocf' must be 4 octets"):
        decode_clcw(b"\x00")


def test_tm_secondary_header():
    frames = FramesSection(kind="tm", length=64, spacecraft_id=7, secondary_header_length=5)
    sh = bytes([0x04, 1, 2, 3, 4])  # version 00, length - 1 = 4
    frame = tm_frame(frames, vcid=1, mcfc=0, vcfc=0, zone=bytes(64 - 11), fhp=0, sec_header=sh)
    rec = FrameParser(frames=frames).process(decoded(frame))
    assert rec.status == "ok" and rec.sec_header == sh and len(rec.data_field) == 64 - 11
    bad = bytearray(frame)
    bad[6] = 0x03  # says 4 octets, profile says 5
    assert FrameParser(frames=frames).process(decoded(bytes(bad))).status == "bad_header"
    # the profile does not fix the length: taken from the first octet
    free = FramesSection(kind="tm", length=64, spacecraft_id=7)
    rec = FrameParser(frames=free).process(decoded(frame))
    assert rec.status == "ok" and rec.sec_header == sh


def test_tm_statuses():
    p = FrameParser(frames=TM)
    assert p.process(decoded(_tm(fhp=0x7FE))).status == "idle"  # OID frame, [GB2] p. 97
    assert p.process(decoded(_tm(fhp=0x7FF))).status == "ok"
    r = p.process(decoded(_tm(fhp=54)))  # the data field is 54 octets: 54 is past it
    assert r.status == "bad_header" and "first header pointer 54" in r.detail
    assert p.process(decoded(_tm(fhp=53))).status == "ok"
    foreign = tm_frame(TM, vcid=1, mcfc=0, vcfc=0, zone=bytes(54), fhp=0, scid=0x124)
    rec = p.process(decoded(foreign))
    assert rec.status == "foreign_scid" and rec.verified and rec.scid == 0x124  # RS-verified octets: kept
    v1 = bytearray(_tm())
    v1[0] |= 0x40
    assert p.process(decoded(bytes(v1))).status == "bad_header"
    no_ocf = bytearray(_tm())
    no_ocf[1] &= 0xFE
    assert "OCF flag" in p.process(decoded(bytes(no_ocf))).detail
    assert p.process(decoded(_tm(), status="rs_uncorrectable")).status == "rs_uncorrectable"
    short = p.process(decoded(_tm()[:-1]))
    assert short.status == "bad_header" and short.scid is None
    vca = p.process(decoded(_tm(fhp=0x7FF, sync=True)))
    assert vca.status == "ok" and vca.fhp is None and vca.packet_zone is None
    st = p.stats.statuses
    assert st["idle"] == 1 and st["foreign_scid"] == 1 and st["rs_uncorrectable"] == 1
    p.reset()
    assert sum(p.stats.statuses.values()) == 0 and p.stats.verified == 0


def test_verified_and_unverified_headers():
    # issue 13: a frame is verified when its RS decode or its FECF succeeded; a frame that failed its
    # checks without verified octets carries no header fields at the top level, only under "unverified"
    p = FrameParser(frames=TM)
    ok_rs = p.process(decoded(_tm(), rs=(3,)))
    assert ok_rs.status == "ok" and ok_rs.verified and ok_rs.as_dict()["verified"] is True
    plain = p.process(decoded(_tm(), rs=()))  # no RS, no FECF: delivered, not verified
    assert plain.status == "ok" and not plain.verified and plain.scid == 0x123 and plain.unverified is None
    failed = p.process(decoded(_tm(), status="rs_uncorrectable", rs=(-1,)))
    assert not failed.verified and failed.scid is None and failed.vcid is None and failed.fhp is None
    d = failed.as_dict()
    assert d["scid"] is None and d["mcfc"] is None and d["ocf"] is None and d["clcw"] is None
    assert d["unverified"]["scid"] == 0x123 and d["unverified"]["vcfc"] == 0x67
    json.dumps(d)
    foreign = tm_frame(TM, vcid=1, mcfc=0, vcfc=0, zone=bytes(54), fhp=0, scid=0x124)
    unv = p.process(decoded(foreign, rs=()))
    assert unv.status == "foreign_scid" and unv.scid is None and unv.unverified["scid"] == 0x124
    pf = FrameParser(frames=TM_FECF)
    fecf_ok = pf.process(decoded(_tm(frames=TM_FECF, vcid=2), rs=()))
    assert fecf_ok.verified and fecf_ok.fecf_ok
    bad = bytearray(_tm(frames=TM_FECF, vcid=2))
    bad[30] ^= 1
    fecf_bad = pf.process(decoded(bytes(bad), rs=()))
    assert fecf_bad.status == "fecf_error" and not fecf_bad.verified and fecf_bad.unverified["vcid"] == 2
    assert p.stats.verified == 1 and p.stats.unverified == 3

    class LdpcFrame:  # an LDPC / turbo decoder's frame: no RS counts, fec_verified set
        frame, status, rs_corrected, fec_verified = _tm(), "ok", (), True
        cadu = decoded(b"").cadu

    assert p.process(LdpcFrame()).verified


def test_fecf():
    frame = _tm(frames=TM_FECF, vcid=2, fhp=0)
    assert crc16_ref(frame) == 0  # the residue of a good frame ([TM-DL] sec. 4.1.6.3)
    p = FrameParser(frames=TM_FECF)
    rec = p.process(decoded(frame))
    assert rec.status == "ok" and rec.fecf_ok is True
    for i in (0, 10, 63):
        bad = bytearray(frame)
        bad[i] ^= 0x10
        rec = p.process(decoded(bytes(bad)))
        assert rec.status == "fecf_error" and rec.fecf_ok is False


# ---- AOS ------------------------------------------------------------------------------------

def _gf16_mul_slow(a: int, b: int) -> int:
    """Carry-less multiply, then reduce by x^4 + x + 1 (the obvious way, no tables)."""
    prod = 0
    for i in range(4):
        if (b >> i) & 1:
            prod ^= a << i
    for bit in (6, 5, 4):
        if (prod >> bit) & 1:
            prod ^= 0b10011 << (bit - 4)
    return prod


@pytest.mark.kat
def test_fhec_generator_slow_reference():
    # g(x) = (x + a^6)(x + a^7)(x + a^8)(x + a^9), a = x in GF(16) mod x^4 + x + 1 (from memory, not confirmed)
    g = _ref_generator()
    assert g == fhec_generator()
    # systematic: header nibbles followed by the parity form a multiple of g(x), so the remainder is 0
    hdr = bytes.fromhex("6AEA12345600")
    par = fhec_parity(hdr)
    word = [6, 10, 14, 10, 0, 0] + [(par >> s) & 15 for s in (12, 8, 4, 0)]
    for i in range(6):
        c = word[i]
        for j in range(5):
            word[i + j] ^= _gf16_mul_slow(c, g[j])
    assert word == [0] * 10


def test_fhec_generator_and_parity_against_galois():
    # galois (PyPI) RS over GF(16) with the from-memory CCSDS 732.0-B definition (not confirmed)
    gf, rs = _galois_rs()
    assert [int(c) for c in rs.generator_poly.coeffs] == list(fhec_generator())
    for hdr in (bytes.fromhex("6AEA12345600"), bytes.fromhex("40000000000F"), bytes.fromhex("FFFFFFFFFFFF")):
        assert fhec_parity(hdr) == _aos_fhec(hdr)
        assert fhec_check(hdr, _aos_fhec(hdr))


def test_fhec_detects_every_error_of_up_to_four_symbols(rng):
    # minimum distance 5 of RS(10,6): any 1..4 symbol errors change the syndrome
    for _ in range(300):
        hdr = bytes(rng.integers(0, 256, 6, dtype=np.uint8))
        par = fhec_parity(hdr)
        word = [hdr[0] >> 4, hdr[0] & 15, hdr[1] >> 4, hdr[1] & 15, hdr[5] >> 4, hdr[5] & 15] + \
               [(par >> s) & 15 for s in (12, 8, 4, 0)]
        for pos in rng.choice(10, int(rng.integers(1, 5)), replace=False):
            word[pos] ^= int(rng.integers(1, 16))
        h2 = bytes([(word[0] << 4) | word[1], (word[2] << 4) | word[3], hdr[2], hdr[3], hdr[4],
                    (word[4] << 4) | word[5]])
        assert not fhec_check(h2, (word[6] << 12) | (word[7] << 8) | (word[8] << 4) | word[9])


def _fhec_word(hdr6: bytes, fhec: int) -> list[int]:
    """The ten code symbols: the protected nibbles (octets 0, 1, 5) and the four FHEC nibbles."""
    return [hdr6[0] >> 4, hdr6[0] & 15, hdr6[1] >> 4, hdr6[1] & 15, hdr6[5] >> 4, hdr6[5] & 15] + \
        [(fhec >> s) & 15 for s in (12, 8, 4, 0)]


def _from_word(word: list[int], hdr6: bytes) -> tuple[bytes, int]:
    h = bytes([(word[0] << 4) | word[1], (word[2] << 4) | word[3], hdr6[2], hdr6[3], hdr6[4], (word[4] << 4) | word[5]])
    return h, (word[6] << 12) | (word[7] << 8) | (word[8] << 4) | word[9]


@functools.lru_cache(maxsize=1)
def _ref_generator() -> tuple[int, ...]:
    """g(x) = (x + a^6)(x + a^7)(x + a^8)(x + a^9) with the slow GF(16) multiply."""
    alpha = [1]
    for _ in range(15):
        alpha.append(_gf16_mul_slow(alpha[-1], 2))
    g = [1]
    for k in (6, 7, 8, 9):
        g = [a ^ _gf16_mul_slow(b, alpha[k]) for a, b in zip(g + [0], [0] + g)]
    return tuple(g)


@functools.cache
def _ref_parity(info: tuple[int, ...]) -> tuple[int, ...]:
    """Systematic parity by long division with the slow GF(16) multiply (no tables)."""
    g = _ref_generator()
    reg = list(info) + [0, 0, 0, 0]
    for i in range(6):
        c = reg[i]
        for j in range(1, 5):
            reg[i + j] ^= _gf16_mul_slow(c, g[j])
    return tuple(reg[6:])


@functools.lru_cache(maxsize=1)
def _error_patterns() -> list[list[tuple[int, int]]]:
    cands = [[]] + [[(p, v)] for p in range(10) for v in range(1, 16)]
    cands += [[(p, v), (q, w)] for p in range(10) for q in range(p + 1, 10) for v in range(1, 16)
              for w in range(1, 16)]
    return cands


def _ref_nearest_codewords(word: list[int]) -> list[list[int]]:
    """Slow reference decoder: every codeword within distance 2 of ``word``, by brute force over the
    10,275 error patterns of weight 1 and 2 (and weight 0), each checked with the slow encoder."""
    found = []
    for pattern in _error_patterns():
        c = list(word)
        for pos, val in pattern:
            c[pos] ^= val
        if _ref_parity(tuple(c[:6])) == tuple(c[6:]):
            found.append(c)
    return found


def test_fhec_corrects_up_to_two_nibbles(rng):
    # RS(10,6) over GF(16) has minimum distance 5: any one or two symbol errors are corrected
    # (CCSDS 732.0-B sec. 4.1.2.6, code from memory, not confirmed); galois (PyPI) agrees on each
    gf, rs = _galois_rs()
    for n_err in (1, 2):
        for _ in range(150):
            hdr = bytes(rng.integers(0, 256, 6, dtype=np.uint8))
            word = _fhec_word(hdr, fhec_parity(hdr))
            bad = list(word)
            for pos in rng.choice(10, n_err, replace=False):
                bad[pos] ^= int(rng.integers(1, 16))
            h2, f2 = _from_word(bad, hdr)
            res = fhec_decode(h2, f2)
            assert res.corrected == n_err and res.header == hdr and res.fhec == fhec_parity(hdr)
            dec, nerr = rs.decode(gf(bad), errors=True)
            assert int(nerr) == n_err and [int(v) for v in dec] == word[:6]
    assert fhec_decode(hdr, fhec_parity(hdr)) == (hdr, fhec_parity(hdr), 0)


def test_fhec_uncorrectable_patterns_confirmed_by_brute_force(rng):
    # words with 3..5 symbol errors: where the brute-force reference finds no codeword within distance 2,
    # the decoder must say uncorrectable (and galois too); where it finds one, the decoder returns it
    gf, rs = _galois_rs()
    seen_uncorrectable = 0
    for _ in range(10):
        hdr = bytes(rng.integers(0, 256, 6, dtype=np.uint8))
        bad = _fhec_word(hdr, fhec_parity(hdr))
        for pos in rng.choice(10, int(rng.integers(3, 6)), replace=False):
            bad[pos] ^= int(rng.integers(1, 16))
        h2, f2 = _from_word(bad, hdr)
        res = fhec_decode(h2, f2)
        near = _ref_nearest_codewords(bad)
        assert len(near) <= 1  # minimum distance 5
        if near:
            assert res.corrected in (1, 2) and _fhec_word(res.header, res.fhec) == near[0]
        else:
            seen_uncorrectable += 1
            assert res.corrected == -1 and res.header == h2 and res.fhec == f2
            assert int(rs.decode(gf(bad), errors=True)[1]) == -1
    assert seen_uncorrectable >= 6


def test_parser_uses_the_fhec_before_any_header_field(rng):
    p = FrameParser(frames=AOS)
    good = _aos()
    for nibbles in ((0,), (1, 4), (2, 5)):  # version/scid, scid and signalling, vcid and signalling
        bad = bytearray(good)
        word = _fhec_word(bytes(bad[:6]), (bad[6] << 8) | bad[7])
        for n in nibbles:
            word[n] ^= 0x9
        h, f = _from_word(word, bytes(bad[:6]))
        bad[:6], bad[6:8] = h, f.to_bytes(2, "big")
        rec = p.process(decoded(bytes(bad)))
        assert rec.status == "ok" and rec.fhec_corrected == len(nibbles) and rec.fecf_ok
        assert (rec.version, rec.scid, rec.vcid, rec.vcfc) == (1, 0xAB, 0x2A, 0x123456)
        assert rec.as_dict()["fhec_corrected"] == len(nibbles)
    assert p.stats.fhec_corrected_frames == 3 and p.stats.fhec_corrected_nibbles == 5
    # three nibbles of the spacecraft id wrong, confirmed uncorrectable: bad_header, not foreign_scid
    for _ in range(20):
        bad = bytearray(good)
        word = _fhec_word(bytes(bad[:6]), (bad[6] << 8) | bad[7])
        for n in (1, 2, 3):
            word[n] ^= int(rng.integers(1, 16))
        if _ref_nearest_codewords(word):
            continue
        h, f = _from_word(word, bytes(bad[:6]))
        bad[:6], bad[6:8] = h, f.to_bytes(2, "big")
        bad[-2:] = crc16_ref(bytes(bad[:-2])).to_bytes(2, "big")  # only the FHEC can tell
        rec = p.process(decoded(bytes(bad)))
        assert rec.status == "bad_header" and "FHEC" in rec.detail and rec.fhec_corrected == -1
        assert rec.fhec_ok is False and rec.as_dict()["fhec_ok"] is False
        break
    else:
        raise AssertionError("no uncorrectable pattern drawn")
    assert p.stats.fhec_uncorrectable == 1 and p.stats.statuses["foreign_scid"] == 0


def _aos(vcid=0x2A, vcfc=0x123456, fhp=0, frames=AOS, **kw):
    from test_link_builders import aos_primary

    hdr = aos_primary(frames.spacecraft_id, vcid, vcfc, usage=kw.get("usage", False), cycle=kw.get("cycle", 0))
    return aos_frame(frames, vcid=vcid, vcfc=vcfc, zone=bytes(range(aos_zone_length(frames))), fhp=fhp,
                     fhec=_aos_fhec(hdr) if frames.fhec else None, insert_zone=b"\xde\xad\xbe\xef", **kw)


def test_aos_worked_example_and_fields():
    frame = _aos()
    assert frame[:6] == bytes.fromhex("6AEA12345600")  # ../shared/REFERENCES.md sec. 4, computed there
    rec = FrameParser(frames=AOS).process(decoded(frame))
    assert rec.status == "ok", rec.detail
    assert (rec.version, rec.scid, rec.vcid, rec.vcfc, rec.vcfc_modulus, rec.mcfc) == (1, 0xAB, 0x2A, 0x123456,
                                                                                       1 << 24, None)
    assert rec.fhec_ok and rec.insert_zone == b"\xde\xad\xbe\xef" and rec.fecf_ok and rec.fhp == 0
    assert rec.packet_zone == bytes(range(aos_zone_length(AOS))) and rec.data_field[2:] == rec.packet_zone
    json.dumps(rec.as_dict())
    cyc = FrameParser(frames=AOS).process(decoded(_aos(usage=True, cycle=0xB)))
    assert cyc.vcfc == (0xB << 24) | 0x123456 and cyc.vcfc_modulus == 1 << 28 and cyc.vc_count_cycle == 0xB


def test_aos_statuses():
    p = FrameParser(frames=AOS)
    assert p.process(decoded(_aos(vcid=63))).status == "idle"  # idle VC 63 (REFERENCES.md sec. 4)
    assert p.process(decoded(_aos(fhp=0x7FE))).status == "idle"
    bad = bytearray(_aos())
    bad[5] ^= 0x20  # one nibble of the signalling field, protected by the FHEC: corrected, then the FECF holds
    r = p.process(decoded(bytes(bad)))
    assert r.status == "ok" and r.fhec_ok and r.fhec_corrected == 1 and r.fecf_ok and not r.replay_flag
    assert p.process(decoded(_aos(fhp=aos_zone_length(AOS)))).status == "bad_header"
    bpdu = p.process(decoded(_aos(vcid=9, fhp=0x3FFF, bpdu=True)))
    assert bpdu.status == "ok" and bpdu.bdp == 0x3FFF and bpdu.packet_zone is None
    assert bpdu.bitstream_valid_bits == 8 * aos_zone_length(AOS)
    part = p.process(decoded(_aos(vcid=9, fhp=100, bpdu=True)))
    assert part.bitstream_valid_bits == 101 and part.as_dict()["bitstream_valid_bits"] == 101
    assert p.process(decoded(_aos(vcid=9, fhp=0x3FFE, bpdu=True))).status == "idle"
    assert p.process(decoded(_aos(vcid=9, fhp=8 * (aos_zone_length(AOS)), bpdu=True))).status == "bad_header"


@given(st.binary(min_size=0, max_size=90), st.sampled_from([TM, TM_FECF, AOS]), st.sampled_from(["ok", "x"]))
@settings(max_examples=400, deadline=None)
def test_parser_fuzz_never_crashes(data, frames, status):
    p = FrameParser(frames=frames)
    if len(data) < frames.length:
        data = data + bytes(frames.length - len(data)) if len(data) > frames.length - 8 else data
    rec = p.process(decoded(data, status=status))
    assert rec.status in ("ok", "rs_uncorrectable", "fecf_error", "idle", "foreign_scid", "bad_header", "x")
    json.dumps(rec.as_dict())
    if rec.status == "ok" and rec.fhp is not None and rec.fhp != 0x7FF:
        assert rec.fhp < len(rec.packet_zone)


def test_parser_argument_errors():
    with pytest.raises(TypeError, match="Argument 'frames' must be a FramesSection"):
        FrameParser(frames={"kind": "tm"})


# ---- accounting -----------------------------------------------------------------------------

@pytest.mark.kat
def test_count_step():
    assert count_step(255, 0, 256) == ("next", 0)  # wrap-around
    assert count_step(10, 10, 256) == ("duplicate", 0)
    assert count_step(10, 9, 256) == ("behind", 0)
    assert count_step(250, 3, 256) == ("gap", 8)
    assert count_step((1 << 24) - 1, 0, 1 << 24) == ("next", 0)


def _rec(p, vcid, mc, vc, pos, status="ok", frames=TM, fhp=0):
    return p.process(decoded(_tm(vcid=vcid, mcfc=mc % 256, vcfc=vc % 256, fhp=fhp, frames=frames), position=pos,
                             status=status))


def test_accounting_gaps_wrap_duplicates():
    p, acc = FrameParser(frames=TM), ChannelAccounting()
    gaps = []
    seq = [(0, 250, 250), (1, 251, 0), (0, 252, 251), (0, 253, 252), (0, 253, 252),  # duplicate
           (0, 256, 255), (0, 257, 256),  # wrap of both counts; MC lost 254, 255
           (1, 255, 1)]  # behind on MC: a replay or restart
    for i, (vc, mc, vcc) in enumerate(seq):
        gaps += acc.process(_rec(p, vc, mc, vcc, float(i)))
    assert [(g.kind, g.vcid, g.expected, g.got, g.missing, g.position) for g in gaps] == \
        [("mc", None, 254, 0, 2, 5.0), ("vc", 0, 253, 255, 2, 5.0)]
    d = acc.as_dict()
    json.dumps(d)
    assert d["mc_duplicates"] == 1 and d["mc_backward"] == 1 and d["mc_gaps"] == 1 and d["mc_missing"] == 2
    vc0 = next(v for v in d["virtual_channels"] if v["vcid"] == 0)
    assert vc0["gaps"] == 1 and vc0["missing"] == 2 and vc0["last_count"] == 0
    assert isinstance(gaps[0], Gap) and gaps[0].as_dict()["kind"] == "mc"


def test_accounting_counts_corrupt_frames_in_gap():
    p, acc = FrameParser(frames=TM), ChannelAccounting()
    acc.process(_rec(p, 0, 0, 0, 0.0))
    acc.process(_rec(p, 0, 1, 1, 1.0, status="rs_uncorrectable"))
    acc.process(_rec(p, 0, 2, 2, 2.0, status="rs_uncorrectable"))
    gaps = acc.process(_rec(p, 0, 4, 4, 4.0))
    assert [(g.kind, g.missing, g.unusable_between, g.after_position) for g in gaps] == \
        [("mc", 3, 2, 0.0), ("vc", 3, 2, 0.0)]
    foreign = p.process(decoded(tm_frame(TM, vcid=0, mcfc=9, vcfc=9, zone=bytes(54), fhp=0, scid=5)))
    assert acc.process(foreign) == [] and acc.as_dict()["foreign_scids"] == {"5": 1}
    assert acc.as_dict()["status_counts"] == {"ok": 2, "rs_uncorrectable": 2, "foreign_scid": 1}


def test_accounting_idle_frames_keep_counts():
    p, acc = FrameParser(frames=TM), ChannelAccounting()
    gaps = []
    for i in range(6):
        gaps += acc.process(_rec(p, 7 if i % 2 else 0, i, i // 2, float(i), fhp=0x7FE if i % 2 else 0))
    assert gaps == []
    d = acc.as_dict()
    assert d["master_channels"][0]["idle_frames"] == 3 and d["master_channels"][0]["gaps"] == 0


def test_accounting_aos_vc_only():
    p, acc = FrameParser(frames=AOS), ChannelAccounting()
    assert acc.process(p.process(decoded(_aos(vcfc=(1 << 24) - 1)))) == []
    assert acc.process(p.process(decoded(_aos(vcfc=0)))) == []
    g = acc.process(p.process(decoded(_aos(vcfc=5))))
    assert [(x.kind, x.missing) for x in g] == [("vc", 4)]
    assert acc.as_dict()["master_channels"] == []


def test_accounting_batches_and_reset_match_fresh(rng):
    # Chunking invariance: the same record stream cut into random batches, with reset() between runs,
    # gives the same gaps as one pass on a fresh object.
    p = FrameParser(frames=TM)
    recs = []
    mc = 0
    vcs = [0, 0]
    for i in range(400):
        vc = int(rng.integers(2))
        mc += 1 + int(rng.random() < 0.05)
        vcs[vc] += 1 + int(rng.random() < 0.05)
        status = "rs_uncorrectable" if rng.random() < 0.03 else "ok"
        recs.append(_rec(p, vc, mc, vcs[vc], float(i), status=status))
    fresh = ChannelAccounting()
    one = [g for r in recs for g in fresh.process(r)]
    acc = ChannelAccounting()
    for _ in range(2):
        acc.reset()
        cuts = sorted(rng.choice(np.arange(1, 400), 7, replace=False))
        got = []
        for lo, hi in zip([0, *cuts], [*cuts, 400]):
            for r in recs[lo:hi]:
                got += acc.process(r)
        assert got == one and acc.as_dict() == fresh.as_dict()
    assert any(g.kind == "mc" for g in one) and any(g.kind == "vc" for g in one)


def test_accounting_argument_errors():
    with pytest.raises(ValueError, match="Argument 'spacecraft_id' must be 0..1023"):
        ChannelAccounting(spacecraft_id=5000)


def test_pack_bits_helper_is_msb_first():
    assert pack_bits((1, 1), (0, 7)) == b"\x80"


def test_long_outage_uses_frame_period():
    # 300 frames lost (more than the 8-bit counts can tell): the positions give the true count.
    p, acc = FrameParser(frames=TM), ChannelAccounting()
    period = 37_166.7  # samples per frame, not an integer, as in a real recording
    gaps = []
    for i in list(range(10)) + list(range(310, 316)):
        gaps += acc.process(_rec(p, 0, i, i, 1000.0 + i * period))
    assert [(g.kind, g.missing, g.ambiguous) for g in gaps] == [("mc", 300, False), ("vc", 300 % 256, True)]
    d = acc.as_dict()
    assert d["mc_backward"] == 0 and d["virtual_channels"][0]["backward"] == 0
    # without positions the same counts read as a short gap (the counter limit)
    acc2 = ChannelAccounting()
    g2 = [g for i in list(range(10)) + list(range(310, 316)) for g in acc2.process(_rec(p, 0, i, i, float("nan")))]
    assert [(g.kind, g.missing) for g in g2] == [("mc", 300 % 256), ("vc", 300 % 256)]


def test_count_step_with_elapsed_time():
    assert count_step(10, 140, 256) == ("behind", 0)
    assert count_step(10, 140, 256, elapsed_frames=130.0) == ("gap", 129)
    assert count_step(10, 10, 256, elapsed_frames=256.0) == ("gap", 255)
    assert count_step(10, 11, 256, elapsed_frames=200.0) == ("next", 0)  # a sparse VC: most likely the next


def test_parser_is_stateless_across_batches(rng):
    # Chunking invariance of a per-frame stage: records do not depend on what was parsed before.
    frames = [_tm(vcid=int(rng.integers(8)), mcfc=i % 256, vcfc=i % 256, fhp=int(rng.integers(0, 54)))
              for i in range(50)]
    frames += [bytes(rng.integers(0, 256, 64, dtype=np.uint8)) for _ in range(20)]
    one = [FrameParser(frames=TM).process(decoded(f, position=float(i))) for i, f in enumerate(frames)]
    shared = FrameParser(frames=TM)
    order = rng.permutation(len(frames))
    again = {int(i): shared.process(decoded(frames[i], position=float(i))) for i in order}
    assert [again[i] for i in range(len(frames))] == one


# ---- counters that repeat, restart or replay (issue 13) --------------------------------------

def test_restarting_counters_are_flagged_not_gaps():
    # a recording of 4 repetitions of a 30-frame pass: the counts restart at every seam.  Nothing is a gap,
    # the first frame after each seam is "backward" (a restart), every other frame follows its track.
    p, acc = FrameParser(frames=TM), ChannelAccounting(spacecraft_id=0x123)
    gaps, flags = [], []
    for i in range(120):
        k = i % 30
        rec = _rec(p, k % 2, k, k // 2, 1000.0 * i)
        gaps += acc.process(rec)
        flags.append(rec.count_anomaly)
    assert gaps == []
    # the first frame of each virtual channel after a seam
    assert [i for i, f in enumerate(flags) if f] == [30, 31, 60, 61, 90, 91]
    assert {f for f in flags if f} == {"backward"}
    d = acc.as_dict()
    assert d["mc_backward"] == 3 and d["vc_backward"] == 6 and d["mc_gaps"] == 0
    assert _rec(p, 0, 0, 0, 0.0).as_dict()["count_anomaly"] is None


def test_restart_that_looks_like_a_forward_jump():
    # 200-frame repetitions with 8-bit counts: 199 -> 0 reads as a jump of 57 counts, but only one frame
    # period passed, so it is a restart (backward), not 56 missing frames
    p, acc = FrameParser(frames=TM), ChannelAccounting()
    gaps = []
    for i in range(400):
        k = i % 200
        rec = _rec(p, 0, k, k, 500.0 * i)
        gaps += acc.process(rec)
        assert rec.count_anomaly == ("backward" if i == 200 else None)
    assert gaps == []
    # without positions the counts alone cannot tell: that is a gap (the counters' own limit)
    acc2 = ChannelAccounting()
    g2 = [g for i in range(201) for g in acc2.process(_rec(p, 0, i % 200, i % 200, float("nan")))]
    assert [(g.kind, g.missing) for g in g2] == [("mc", 56), ("vc", 56)]


def test_replayed_frames_between_newer_ones():
    # VC 1 plays back its frames 5..9 between newer frames (new master channel counts): the first replayed
    # frame is behind, the rest follow the replay, the newer stream continues without a gap
    p, acc = FrameParser(frames=TM), ChannelAccounting()
    seq = [(i % 2, i // 2) for i in range(30)]  # (vcid, vc count): VC 1 reached 14
    seq += [(1, 5 + j) for j in range(5)] + [(i % 2, i // 2) for i in range(30, 50)]
    flags, gaps = [], []
    for i, (vc, vcc) in enumerate(seq):
        rec = _rec(p, vc, i, vcc, 10.0 * i)
        gaps += acc.process(rec)
        flags.append(rec.count_anomaly)
    assert gaps == []
    assert flags[30] == "backward" and flags.count("backward") == 1 and flags.count("duplicate") == 0
    vc1 = next(v for v in acc.as_dict()["virtual_channels"] if v["vcid"] == 1)
    assert vc1["backward"] == 1 and vc1["gaps"] == 0 and vc1["frames"] == 30


def test_duplicate_frame_is_flagged_and_stream_continues():
    p, acc = FrameParser(frames=TM), ChannelAccounting()
    flags = []
    gaps = []
    for i, k in enumerate([0, 1, 2, 2, 3, 4]):
        rec = _rec(p, 0, k, k, 10.0 * i)
        gaps += acc.process(rec)
        flags.append(rec.count_anomaly)
    assert flags == [None, None, None, "duplicate", None, None] and gaps == []
    assert acc.as_dict()["mc_duplicates"] == 1


@pytest.mark.kat
def test_count_tracker_tracks():
    from pipeline.link import CountTracker, FramePeriod

    t = CountTracker(modulus=256, max_tracks=2)
    kinds = [t.step(c).kind for c in (10, 11, 12, 3, 4, 13, 5, 5, 14, 200, 201, 150)]
    # 3 starts a replay track, 13 continues the first, 5 the replay, 5 again is a duplicate, 200 a third
    # track (the least recent, the replay at 5, is given up: max_tracks 2); 150 is behind 14 and 201
    assert kinds == ["first", "next", "next", "backward", "next", "next", "next", "duplicate", "next", "backward",
                     "next", "backward"]
    assert [tr.last for tr in t.tracks] == [201, 150]
    res = t.step(153)
    assert res.kind == "gap" and res.missing == 2 and res.expected == 151 and t.newest.last == 153
    # a track silent for half the count range in time is given up
    period = FramePeriod()
    for x in (0.0, 1.0, 2.0, 3.0):
        period.update(x)
    t2 = CountTracker(modulus=256)
    t2.step(10, 0.0, period)
    assert t2.step(50, 1.0, period).kind == "backward"  # 40 counts ahead after one period: a restart
    assert len(t2.tracks) == 2
    res = t2.step(51, 200.0, period)
    assert res.kind == "next" and [tr.last for tr in t2.tracks] == [51] and res.dropped[0].last == 10
    with pytest.raises(ValueError, match="Argument 'max_tracks' must be 1..64"):
        CountTracker(modulus=256, max_tracks=0)
