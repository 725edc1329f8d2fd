"""pipeline.sim: time codes, space packets, the traffic source and the TM / AOS frame builders."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from pipeline.profile import ApidTraffic, FramesSection
from pipeline.sim import (
    FHP_IDLE,
    FHP_NO_PACKET,
    AosFrameBuilder,
    PacketSource,
    SimPacket,
    TmFrameBuilder,
    aos_primary_header,
    clcw_word,
    cuc_4_2,
    cuc_4_2_tai,
    format_tai_ns_as_utc,
    format_utc_ns,
    idle_packet,
    parse_utc_ns,
    space_packet_header,
    tai_ns_from_utc_ns,
    tai_seconds_since_1958,
    tm_primary_header,
)
from pipeline.sim._time import _LEAP_TABLE

START = "2026-03-14T09:30:00Z"
TRAFFIC = (
    ApidTraffic(apid=100, length=120, rate_hz=10.0, vcid=0, time_code=True),
    ApidTraffic(apid=200, length=2000, rate_hz=4.0, vcid=1),
    ApidTraffic(apid=300, length=60, rate_hz=5.0, vcid=0, time_code=True),
)


# ---- headers: worked examples -------------------------------------------------------------------

@pytest.mark.kat
def test_tm_header_worked_example():
    # REFERENCES.md sec. 3 worked example (computed there from the 132.0-B layout, from memory, not confirmed)
    hdr = tm_primary_header(scid=0x123, vcid=5, ocf=True, mcfc=0x45, vcfc=0x67, fhp=0)
    assert hdr == bytes.fromhex("123B45671800")
    assert tm_primary_header(scid=0x123, vcid=5, ocf=True, mcfc=0, vcfc=0, fhp=FHP_NO_PACKET)[4:] == b"\x1f\xff"
    assert tm_primary_header(scid=0x123, vcid=5, ocf=True, mcfc=0, vcfc=0, fhp=FHP_IDLE)[4:] == b"\x1f\xfe"


@pytest.mark.kat
def test_aos_header_worked_example():
    # REFERENCES.md sec. 4 computed example (732.0-B layout from memory, not confirmed)
    assert aos_primary_header(scid=0xAB, vcid=0x2A, vcfc=0x123456) == bytes.fromhex("6AEA12345600")


@pytest.mark.kat
def test_packet_header_worked_example():
    # REFERENCES.md sec. 5 computed example (133.0-B layout from memory, not confirmed)
    hdr = space_packet_header(apid=0x123, seq_count=0x1234, data_length=10, secondary_header=True)
    assert hdr == bytes.fromhex("0923D2340009")
    assert idle_packet(7)[:2] == bytes.fromhex("07FF")  # REFERENCES.md sec. 5: "An idle packet starts with 07 FF"
    assert len(idle_packet(100)) == 100


@pytest.mark.kat
def test_clcw_bits():
    # CLCW bit map of REFERENCES.md sec. 3 (232.0-B sec. 4.2, from memory, not confirmed)
    w = int.from_bytes(clcw_word(vcid=5, report_value=0xAB, farm_b_counter=3, wait=True), "big")
    assert w >> 31 == 0  # type-1 report
    assert (w >> 24) & 3 == 1  # COP-1
    assert (w >> 18) & 0x3F == 5
    assert (w >> 12) & 1 == 1  # wait
    assert (w >> 9) & 3 == 3
    assert w & 0xFF == 0xAB
    assert clcw_word() == bytes.fromhex("01000000")


def test_header_argument_errors():
    with pytest.raises(ValueError, match="Argument 'apid' must be 0..2047, not 4096"):
        space_packet_header(apid=4096, seq_count=0, data_length=1, secondary_header=False)
    with pytest.raises(ValueError, match="Argument 'length' must be >= 7"):
        idle_packet(6)


# ---- time -------------------------------------------------------------------------------------

@pytest.mark.kat
def test_utc_parse_format_roundtrip():
    ns = parse_utc_ns("2026-03-14T09:30:00.123456789Z")
    assert format_utc_ns(ns) == "2026-03-14T09:30:00.123456789Z"
    assert parse_utc_ns("1970-01-01T00:00:00Z") == 0
    assert parse_utc_ns("2000-01-01T00:00:00Z") == 946_684_800 * 10**9  # POSIX time of 2000-01-01
    with pytest.raises(ValueError, match="Argument 'start'"):
        parse_utc_ns("2026-02-30T00:00:00Z")


@pytest.mark.kat
def test_tai_1958_worked_example():
    # REFERENCES.md sec. 6: CUC coarse for 2000-01-01T00:00:00 TAI = 1 325 376 000; that instant is
    # 2000-01-01T00:00:00 TAI = 1999-12-31T23:59:28 UTC (TAI - UTC = 32 s, IERS)
    secs, ns = tai_seconds_since_1958(parse_utc_ns("1999-12-31T23:59:28Z"))
    assert (secs, ns) == (1_325_376_000, 0)
    assert cuc_4_2(parse_utc_ns("1999-12-31T23:59:28.5Z")) == bytes.fromhex("4EFFA2008000")


def test_leap_table_against_astropy():
    import astropy.time as astropy_time
    from astropy.utils import iers

    iers.conf.auto_download = False
    epoch = astropy_time.Time("1958-01-01T00:00:00", scale="tai")
    for (y, m, d), _ in _LEAP_TABLE:
        for text in (f"{y:04d}-{m:02d}-{d:02d}T00:00:00", f"{y:04d}-{m:02d}-{d:02d}T12:34:56.25"):
            t = astropy_time.Time(text, scale="utc")
            want = (t.tai - epoch).to_value("s")  # astropy (PyPI), leap seconds from its bundled table
            secs, ns = tai_seconds_since_1958(parse_utc_ns(text + "Z"))
            assert secs + ns * 1e-9 == pytest.approx(want, abs=1e-6), text
    t = astropy_time.Time("2026-03-14T09:30:00", scale="utc")
    secs, ns = tai_seconds_since_1958(parse_utc_ns(START))
    assert secs + ns * 1e-9 == pytest.approx((t.tai - epoch).to_value("s"), abs=1e-6)  # astropy (PyPI)


@pytest.mark.parametrize("start", ["2016-12-31T23:59:58.25Z", "2015-06-30T23:59:59.9Z", "2026-03-14T09:30:00Z"])
def test_time_after_a_start_across_a_leap_second_against_astropy(start):
    # UTC + elapsed SI seconds: astropy (PyPI) counts leap seconds and prints 23:59:60.x inside one; the CUC
    # coarse count runs on uniformly (TAI since 1958)
    import astropy.time as astropy_time
    from astropy.utils import iers

    iers.conf.auto_download = False
    t0 = astropy_time.Time(start[:-1], scale="utc", precision=9)
    epoch = astropy_time.Time("1958-01-01T00:00:00", scale="tai")
    tai0 = tai_ns_from_utc_ns(parse_utc_ns(start))
    for e in (0.0, 0.5, 1.0, 1.25, 1.5, 1.75, 2.0, 2.5, 3.0):
        ns = int(round(e * 1e9))
        want = (t0 + astropy_time.TimeDelta(e, format="sec")).isot + "Z"
        assert format_tai_ns_as_utc(tai0 + ns) == want, (start, e)
        secs = int.from_bytes(cuc_4_2_tai(tai0 + ns)[:4], "big")
        assert secs == int(np.floor(((t0 + astropy_time.TimeDelta(e, format="sec")).tai - epoch).to_value("s") + 1e-7))


# ---- packet source ----------------------------------------------------------------------------

def _source(**kw):
    args = dict(traffic=TRAFFIC, start_ns=parse_utc_ns(START), seed=7)
    args.update(kw)
    return PacketSource(**args)


def test_packet_source_rates_order_and_time_codes():
    src = _source()
    pkts = src.process(10.0)
    counts = {a: sum(p.apid == a for p in pkts) for a in (100, 200, 300)}
    assert counts == {100: 100, 200: 40, 300: 50}  # rate x 10 s exactly: one packet per period
    times = [p.generation_s for p in pkts]
    assert times == sorted(times)
    for a in (100, 200, 300):
        seqs = [p.seq_count for p in pkts if p.apid == a]
        assert seqs == list(range(len(seqs)))
    for p in pkts:
        assert len(p.data) == 6 + {100: 120, 200: 2000, 300: 60}[p.apid]
        word0 = int.from_bytes(p.data[:2], "big")
        assert word0 & 0x7FF == p.apid
        assert (word0 >> 11) & 1 == (p.apid != 200)  # secondary header flag with a time code
        assert int.from_bytes(p.data[4:6], "big") == len(p.data) - 7
        if p.apid != 200:
            # the CUC T-field equals the generation time (TAI since 1958, 2^-16 s fine)
            coarse = int.from_bytes(p.data[6:10], "big")
            fine = int.from_bytes(p.data[10:12], "big")
            secs, ns = tai_seconds_since_1958(p.generation_ns)
            assert coarse == secs and abs(fine / 65536 - ns * 1e-9) < 2**-16


def test_packet_source_chunking_invariance(rng):
    whole = _source().process(20.0)
    src = _source()
    cuts = np.sort(rng.uniform(0, 20, 15))
    parts = []
    for c in list(cuts) + [20.0]:
        parts += src.process(c)
    assert parts == whole
    src.reset()
    assert src.process(20.0) == whole  # reset gives the same packets again


def test_packet_source_seed_and_window():
    a = _source(seed=1).process(5.0)
    b = _source(seed=2).process(5.0)
    assert [p.data for p in a] != [p.data for p in b]
    w = _source(start_s=1.0, stop_s=2.0).process(10.0)
    assert all(1.0 <= p.generation_s < 2.0 for p in w) and w


def test_sequence_count_wraps():
    src = PacketSource(traffic=(ApidTraffic(apid=5, length=1, rate_hz=1000.0),), start_ns=parse_utc_ns(START))
    pkts = src.process(16.5)
    assert [p.seq_count for p in pkts[16383:16386]] == [16383, 0, 1]


# ---- an independent reference demultiplexer --------------------------------------------------

def _parse_tm(frame: bytes, sec_len: int, ocf: bool, fecf: bool):
    """Slow, obvious TM frame parse (REFERENCES.md sec. 3 bit positions)."""
    bits = "".join(f"{b:08b}" for b in frame[:6])
    hdr = {
        "version": int(bits[0:2], 2), "scid": int(bits[2:12], 2), "vcid": int(bits[12:15], 2),
        "ocf_flag": int(bits[15], 2), "mcfc": int(bits[16:24], 2), "vcfc": int(bits[24:32], 2),
        "sec_flag": int(bits[32], 2), "sync": int(bits[33], 2), "order": int(bits[34], 2),
        "seglen": int(bits[35:37], 2), "fhp": int(bits[37:48], 2),
    }
    end = len(frame) - (2 if fecf else 0) - (4 if ocf else 0)
    return hdr, frame[6 + sec_len:end]


def _reassemble(fields):
    """Packets from (fhp, data field) of one VC's frames in order: follow the length fields."""
    stream = bytearray()
    synced = False
    out = []
    for fhp, field in fields:
        if not synced:
            if fhp >= 0x7FE:
                continue
            field = field[fhp:]
            synced = True
        stream += field
        while len(stream) >= 6:
            n = 7 + int.from_bytes(stream[4:6], "big")
            if len(stream) < n:
                break
            out.append(bytes(stream[:n]))
            del stream[:n]
    return out


def _run_builder(builder, src, n_frames, frame_period_s):
    frames = []
    for j in range(n_frames):
        frames.append(builder.process(src.process(j * frame_period_s)))
    return frames


@pytest.mark.parametrize("ocf,fecf,sec_len", [(True, False, 0), (False, True, 0), (True, True, 4)])
def test_tm_frames_parse_and_carry_every_packet(ocf, fecf, sec_len):
    import crccheck.crc as crccheck

    fr = FramesSection(kind="tm", length=1115, ocf=ocf, fecf=fecf, spacecraft_id=499,
                       secondary_header_length=sec_len)
    src = _source()
    frames = _run_builder(TmFrameBuilder(frames=fr), src, 200, 0.085)
    sent = {}
    per_vc = {}
    mc = []
    for f in frames:
        assert len(f.data) == 1115
        hdr, field = _parse_tm(f.data, sec_len, ocf, fecf)
        assert (hdr["version"], hdr["scid"], hdr["ocf_flag"], hdr["sync"], hdr["seglen"]) == (0, 499, ocf, 0, 3)
        assert hdr["sec_flag"] == (sec_len > 0)
        assert (hdr["vcid"], hdr["mcfc"], hdr["vcfc"], hdr["fhp"]) == (f.vcid, f.mcfc, f.vcfc, f.fhp)
        if sec_len:
            assert f.data[6] == sec_len - 1  # version 00 + length - 1
        if fecf:
            assert crccheck.Crc16CcittFalse.calc(f.data[:-2]) == int.from_bytes(f.data[-2:], "big")  # crccheck (PyPI)
        if ocf:
            assert f.data[1115 - 4 - (2 if fecf else 0):][:4] == f.ocf
        mc.append(hdr["mcfc"])
        if f.idle:
            assert hdr["fhp"] == FHP_IDLE and hdr["vcid"] == 7
            continue
        per_vc.setdefault(f.vcid, []).append((hdr["fhp"], field))
        for p in f.completed:
            sent.setdefault(f.vcid, []).append(p.data)
    assert mc == [i & 0xFF for i in range(200)]
    for vcid, fields in per_vc.items():
        got = [p for p in _reassemble(fields) if int.from_bytes(p[:2], "big") & 0x7FF != 0x7FF]
        assert got == sent[vcid]  # every packet, in order, unchanged; idle packets removed
    assert sum(len(v) for v in sent.values()) > 300


def test_tm_vc_counts_and_idle_frames():
    fr = FramesSection(kind="tm", length=1115, spacecraft_id=499)
    b = TmFrameBuilder(frames=fr)
    f0 = b.process([])  # nothing queued -> an OID frame on VC 7
    assert f0.idle and f0.fhp == FHP_IDLE and f0.vcid == 7 and f0.completed == ()
    pkt = SimPacket(apid=1, seq_count=0, vcid=2, data=bytes(6) + bytes(20), generation_ns=0, generation_s=0.0)
    f1 = b.process([pkt])
    assert (f1.vcid, f1.vcfc, f1.mcfc, f1.fhp, f1.idle) == (2, 0, 1, 0, False)
    # the rest of the data field is one idle packet right after the packet
    assert f1.data[6 + 26:6 + 28] == bytes.fromhex("07FF")
    f2 = b.process([])
    assert f2.vcid == 7 and f2.vcfc == 1
    with pytest.raises(ValueError, match="Argument 'packets' VCID"):
        b.push([replace(pkt, vcid=7)])


def test_tm_idle_packets_mode():
    fr = FramesSection(kind="tm", length=200, spacecraft_id=1)
    b = TmFrameBuilder(frames=fr, idle="packets", idle_packets_vcid=3)
    f = b.process([])
    assert not f.idle and f.vcid == 3 and f.fhp == 0
    assert int.from_bytes(f.data[6:8], "big") & 0x7FF == 0x7FF


def test_tm_short_remainder_idle_packet_spans_frames():
    # a packet that leaves fewer than 7 octets: the idle packet continues into the next frame of the VC
    fr = FramesSection(kind="tm", length=106, spacecraft_id=1)  # data field of 100 octets
    b = TmFrameBuilder(frames=fr, idle="packets")
    from pipeline.sim import space_packet

    data = space_packet(apid=9, seq_count=0, data_field=bytes(range(89)), secondary_header=False)
    p = SimPacket(apid=9, seq_count=0, vcid=0, data=data, generation_ns=0, generation_s=0.0)
    assert len(p.data) == 95
    f1 = b.process([p])
    f2 = b.process([])
    got = _reassemble([(f1.fhp, f1.data[6:]), (f2.fhp, f2.data[6:])])
    assert got[0] == p.data and all(int.from_bytes(q[:2], "big") & 0x7FF == 0x7FF for q in got[1:])
    assert f2.fhp == 2  # the idle packet took 5 octets of frame 1 and 2 of frame 2


def test_frame_builder_chunking_invariance(rng):
    fr = FramesSection(kind="tm", length=1115, ocf=True, spacecraft_id=499)
    pkts = _source().process(3.0)
    whole = TmFrameBuilder(frames=fr)
    whole.push(pkts)
    ref = [whole.next_frame() for _ in range(40)]
    b = TmFrameBuilder(frames=fr)
    cuts = np.sort(rng.integers(0, len(pkts), 6))
    for part in np.split(np.arange(len(pkts)), cuts):
        b.push([pkts[i] for i in part])
    got = [b.next_frame() for _ in range(40)]
    assert [f.data for f in got] == [f.data for f in ref]


def test_aos_frames_mpdu():
    fr = FramesSection(kind="aos", length=892, ocf=True, fecf=True, spacecraft_id=0xAB, insert_zone_length=4)
    traffic = tuple(replace(t, vcid=v) for t, v in zip(TRAFFIC, (1, 42, 1)))
    src = PacketSource(traffic=traffic, start_ns=parse_utc_ns(START), seed=3)
    frames = _run_builder(AosFrameBuilder(frames=fr), src, 150, 0.07)
    per_vc, sent = {}, {}
    counts = {}
    for f in frames:
        d = f.data
        word0 = int.from_bytes(d[:2], "big")
        assert word0 >> 14 == 1 and (word0 >> 6) & 0xFF == 0xAB and word0 & 0x3F == f.vcid
        assert int.from_bytes(d[2:5], "big") == counts.get(f.vcid, 0) == f.vcfc
        counts[f.vcid] = f.vcfc + 1
        assert f.mcfc is None
        from pipeline.fec import crc16

        assert crc16(d) == 0  # FECF residue (REFERENCES.md sec. 10.4)
        if f.idle:
            assert f.vcid == 63 and f.fhp is None
            continue
        mpdu = d[6 + 4:]
        fhp = int.from_bytes(mpdu[:2], "big")
        assert fhp >> 11 == 0 and fhp == f.fhp  # 5 spare bits
        per_vc.setdefault(f.vcid, []).append((fhp, mpdu[2:len(mpdu) - 6]))
        for p in f.completed:
            sent.setdefault(f.vcid, []).append(p.data)
    for vcid, fields in per_vc.items():
        got = [p for p in _reassemble(fields) if int.from_bytes(p[:2], "big") & 0x7FF != 0x7FF]
        assert got == sent[vcid]
    assert set(per_vc) == {1, 42}


def test_builder_argument_errors():
    with pytest.raises(ValueError, match="Argument 'frames' kind must be 'tm'"):
        TmFrameBuilder(frames=FramesSection(kind="aos"))
    with pytest.raises(ValueError, match="fhec"):
        AosFrameBuilder(frames=FramesSection(kind="aos", fhec=True))
    with pytest.raises(ValueError, match="Argument 'idle'"):
        TmFrameBuilder(frames=FramesSection(), idle="none")
    with pytest.raises(ValueError, match="at most 2048"):
        TmFrameBuilder(frames=FramesSection(length=4000))
