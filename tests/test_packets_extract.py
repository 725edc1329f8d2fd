"""Tests of pipeline.packets.PacketExtractor: reassembly across frames, gaps, bad data, time codes."""

from __future__ import annotations

import json

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from test_link_builders import (
    aos_frame,
    aos_zone_length,
    cut_stream,
    decoded,
    encap_packet,
    idle_packet,
    space_packet,
    tm_frame,
    tm_zone_length,
)

from pipeline.link import FrameParser
from pipeline.packets import PacketExtractor, decode_cds, encode_cds, encode_cuc
from pipeline.profile import FramesSection, LinkProfile, PacketsSection, TimeCodeConfig
from pipeline.timescales import posix_ns_from_tai as tai_ns_to_utc_ns
from pipeline.timescales import tai_from_posix_ns as utc_ns_to_tai_ns

NS = 1_000_000_000


def _profile(frames: FramesSection, **packets) -> LinkProfile:
    return LinkProfile(frames=frames, packets=PacketsSection(**packets))


TM = FramesSection(kind="tm", length=48, spacecraft_id=499)
TM_FECF = FramesSection(kind="tm", length=60, spacecraft_id=499, fecf=True, ocf=True)
AOS = FramesSection(kind="aos", length=56, spacecraft_id=0x5A, insert_zone_length=2)


def _frames_for_vc(frames, vcid, zones, first_index=0, first_mc=0, pos0=0.0):
    out = []
    for i, z in enumerate(zones):
        idx = first_index + i
        if frames.kind == "tm":
            f = tm_frame(frames, vcid=vcid, mcfc=(first_mc + i) % 256, vcfc=idx % 256, zone=z)
        else:
            f = aos_frame(frames, vcid=vcid, vcfc=idx % (1 << 24), zone=z)
        out.append(decoded(f, position=pos0 + 1000.0 * i, rs=(i % 3,)))
    return out


def _zone_len(frames):
    return tm_zone_length(frames) if frames.kind == "tm" else aos_zone_length(frames)


def _run(frames, decs, **kw):
    parser = FrameParser(frames=frames)
    ex = PacketExtractor(profile=_profile(frames), **kw)
    out = []
    for d in decs:
        out += ex.process(parser.process(d))
    ex.flush()
    return out, ex


# ---- basic reassembly -----------------------------------------------------------------------

@pytest.mark.kat
def test_packets_within_and_across_frames():
    pk = [space_packet(100, i, bytes([i]) * n) for i, n in enumerate((10, 3, 100, 1, 250, 21))]
    zones, spans = cut_stream(pk, _zone_len(TM))
    out, ex = _run(TM, _frames_for_vc(TM, 2, zones))
    assert [p.data for p in out] == pk
    for p, (a, b, _) in zip(out, spans):
        # provenance: the frame holding the first octet
        assert (p.vcid, p.vcfc, p.mcfc, p.position, p.rs_corrected, p.frames) == (2, a, a, 1000.0 * a, (a % 3,),
                                                                                   b - a + 1)
        assert p.apid == 100 and p.seq_flags == 3 and p.kind == "space" and p.time_ns is None
    assert [p.seq_count for p in out] == list(range(6))
    s = ex.stats.as_dict()
    json.dumps(s)
    assert s["packets"] == 6 and s["idle_packets"] == 1 and s["dropped_total"] == 0 and s["sequence_gaps"] == 0
    assert s["apids"][0]["apid"] == 100 and s["apids"][0]["packets"] == 6
    d = out[0].as_dict()
    json.dumps(d)
    assert d["hex"] == pk[0].hex() and d["apid"] == 100 and d["length"] == 16


def test_header_split_across_frames():
    zl = _zone_len(TM)
    for split in range(1, 7):  # a header of which 1..5 octets are in the first frame
        first = space_packet(1, 0, bytes(zl - 6 - split))
        pk = [first, space_packet(1, 1, b"\xaa" * 30), space_packet(1, 2, b"\xbb")]
        zones, _ = cut_stream(pk, zl)
        out, ex = _run(TM, _frames_for_vc(TM, 0, zones))
        assert [p.data for p in out] == pk, split


def test_aos_mpdu_with_24_bit_count_wrap():
    pk = [space_packet(7, i, bytes([i]) * (20 + 7 * i)) for i in range(12)]
    zones, _ = cut_stream(pk, _zone_len(AOS))
    decs = _frames_for_vc(AOS, 3, zones, first_index=(1 << 24) - 3)
    out, ex = _run(AOS, decs)
    assert [p.data for p in out] == pk and ex.stats.frames["gap"] == 0
    assert out[0].mcfc is None and out[0].vcfc == (1 << 24) - 3


# ---- gaps, duplicates, reordering -----------------------------------------------------------

def test_gap_discards_partial_and_resyncs():
    zl = _zone_len(TM)
    pk = [space_packet(5, i, bytes([i]) * 60) for i in range(8)]  # 66 octets each, > one 42-octet zone
    zones, spans = cut_stream(pk, zl)
    decs = _frames_for_vc(TM, 0, zones)
    lost = 4
    out, ex = _run(TM, decs[:lost] + decs[lost + 1:])
    whole = [p for p, (a, b, _) in zip(pk, spans) if b < lost or a > lost]
    assert [p.data for p in out] == whole
    assert ex.stats.dropped["frame_gap"] == 1 and ex.stats.frames["gap"] == 1
    assert ex.stats.sequence_gaps >= 1
    g = ex.take_sequence_gaps()
    assert g and g[0].apid == 5 and ex.take_sequence_gaps() == []


def test_rs_failed_frame_is_a_gap_and_repeated_frames_are_flagged():
    zl = _zone_len(TM)
    pk = [space_packet(5, i, bytes([i]) * 50) for i in range(10)]
    zones, spans = cut_stream(pk, zl)
    decs = _frames_for_vc(TM, 0, zones)
    bad = decoded(b"\x00" * TM.length, position=decs[5].cadu.position, status="rs_uncorrectable")
    feed = decs[:3] + [decs[2], decs[1]] + decs[3:5] + [bad] + decs[6:]
    out, ex = _run(TM, feed)
    # frame 2 repeated restarts reassembly at its first header pointer (the packet it began is taken from
    # the copy, once); frame 1 replayed starts a track of its own, whose packets run into frames it never
    # sees; the stream goes on from frame 3.  Nothing is lost to the counters, nothing made twice.
    assert [p.data for p in out] == [p for p, (a, b, _) in zip(pk, spans) if b < 5 or a > 5]
    assert ex.stats.frames["duplicate"] == 1 and ex.stats.frames["backward"] == 1
    assert ex.stats.frames["unusable"] == 1 and ex.stats.dropped["superseded"] == 1
    # the packet whose first frame is the repeated frame 2 is flagged with that fact
    assert [p.count_anomaly for p in out] == ["duplicate" if a == 2 else None for _, (a, b, _) in
                                              zip(pk, spans) if b < 5 or a > 5]


def test_gap_argument_forces_resync():
    pk = [space_packet(5, i, bytes(60)) for i in range(4)]
    zones, _ = cut_stream(pk, _zone_len(TM))
    decs = _frames_for_vc(TM, 0, zones)
    parser = FrameParser(frames=TM)
    ex = PacketExtractor(profile=_profile(TM))
    recs = [parser.process(d) for d in decs]
    out = ex.process(recs[0]) + ex.process(recs[1], gap=True)
    assert ex.stats.dropped["frame_gap"] == 1 and pk[0] not in [p.data for p in out]


# ---- bad data ------------------------------------------------------------------------------

def test_length_beyond_stream_is_dropped_not_invented():
    zl = _zone_len(TM)
    liar = bytearray(space_packet(9, 0, bytes(30)))
    liar[4:6] = (60000).to_bytes(2, "big")  # claims 60 007 octets
    pk = [space_packet(9, 1, b"\x11" * 10), bytes(liar)] + [space_packet(9, i, b"\x22" * 50) for i in range(2, 6)]
    zones, spans = cut_stream(pk, zl)
    out, ex = _run(TM, _frames_for_vc(TM, 0, zones))
    got = [p.data for p in out]
    assert bytes(liar) not in got and pk[0] in got
    assert all(p in pk for p in got)  # nothing that was not sent
    assert ex.stats.dropped["fhp_mismatch"] >= 1
    assert got[-1] == pk[-1]  # resynchronised at a later first header pointer


def test_bad_version_and_too_long():
    zl = _zone_len(TM)
    bad = bytearray(space_packet(9, 0, bytes(12)))
    bad[0] |= 0x40  # version 010
    pk = [space_packet(9, 1, b"\x01" * 5), bytes(bad), space_packet(9, 2, b"\x02" * 5)] + \
         [space_packet(9, i, b"\x03" * 70) for i in range(3, 6)]
    zones, spans = cut_stream(pk, zl)
    out, ex = _run(TM, _frames_for_vc(TM, 0, zones))
    got = [p.data for p in out]
    assert pk[0] in got and bytes(bad) not in got and all(p in pk for p in got)
    assert ex.stats.dropped["bad_version"] == 1 and ex.stats.skipped_octets > 0
    out, ex = _run(TM, _frames_for_vc(TM, 0, zones), max_packet_octets=40)
    assert ex.stats.dropped["too_long"] >= 1 and all(len(p.data) <= 40 for p in out)


def test_encapsulation_packets_and_idle_octets():
    zl = _zone_len(TM)
    pk = [encap_packet(2, b"\x10" * 5), b"\xe0", b"\xe0", encap_packet(3, b"\x20" * 300, lol=2),
          encap_packet(4, b"\x30" * 9, lol=3), space_packet(8, 0, b"\x40" * 3), encap_packet(0, b"\x00" * 4)]
    zones, _ = cut_stream(pk, zl, idle_fill=b"\xe0")
    out, ex = _run(TM, _frames_for_vc(TM, 0, zones))
    assert [p.data for p in out] == [pk[0], pk[3], pk[4], pk[5]]
    assert [p.kind for p in out] == ["encapsulation"] * 3 + ["space"]
    assert [p.protocol_id for p in out[:3]] == [2, 3, 4] and out[0].apid is None
    assert ex.stats.encapsulation_idle >= 3 and ex.stats.encapsulation_packets == 3
    # with encapsulation switched off, version 111 is a bad version
    prof = LinkProfile(frames=TM, packets=PacketsSection(encapsulation=False))
    ex = PacketExtractor(profile=prof)
    parser = FrameParser(frames=TM)
    for d in _frames_for_vc(TM, 0, zones):
        assert all(p.kind == "space" for p in ex.process(parser.process(d)))
    assert ex.stats.dropped["bad_version"] >= 1


def test_sequence_count_wrap_and_gaps():
    seqs = [16382, 16383, 0, 1, 4, 4, 3, 5]
    pk = [space_packet(42, s, bytes(3)) for s in seqs]
    zones, _ = cut_stream(pk, _zone_len(TM))
    out, ex = _run(TM, _frames_for_vc(TM, 1, zones))
    assert [p.seq_count for p in out] == seqs  # every packet is delivered; the counts are only checked
    # 4 again: a repeat; 3: behind (its own track); 5 follows the first track's 4
    assert [p.count_anomaly for p in out] == [None] * 5 + ["duplicate", "backward", None]
    s = ex.stats.as_dict()
    assert s["sequence_gaps"] == 1 and s["sequence_missing"] == 2
    assert s["sequence_duplicates"] == 1 and s["sequence_backward"] == 1
    assert s["count_anomalies"] == {"duplicate": 1, "backward": 1} and s["copies"] == 0
    assert s["sequence_gap_events"][0] == {"apid": 42, "vcid": 1, "expected": 2, "got": 4, "missing": 2,
                                           "position": 0.0}


def test_fhp_mismatch_when_partial_does_not_end_at_pointer():
    # CCSDS 132.0-B-3 sec. 4.1.2.7 (first header pointer: where the first packet header of the data field starts,
    # all ones if none does; from memory, not confirmed): a pointer one octet short of where packet 0 ends by its
    # length cuts it: it cannot be whole and is dropped
    zl = _zone_len(TM)
    pk = [space_packet(3, 0, bytes(60)), space_packet(3, 1, bytes(10)), space_packet(3, 2, bytes(10))]
    zones, _ = cut_stream(pk, zl)
    zones[1].fhp -= 1
    out, ex = _run(TM, _frames_for_vc(TM, 0, zones))
    got = [p.data for p in out]
    assert pk[0] not in got and ex.stats.dropped["fhp_mismatch"] >= 1 and all(p in pk for p in got)
    assert ex.stats.fhp_mismatch_delivered == 0


def test_a_whole_packet_before_a_mismatched_pointer_is_delivered():
    # a pointer one octet past where packet 0 ends by its own length: every octet of packet 0 is there, so it is
    # delivered (it used to be dropped), the octet between skipped and the mismatch counted
    zl = _zone_len(TM)
    pk = [space_packet(3, 0, bytes(60)), space_packet(3, 1, bytes(10)), space_packet(3, 2, bytes(10))]
    zones, _ = cut_stream(pk, zl)
    zones[1].fhp += 1
    out, ex = _run(TM, _frames_for_vc(TM, 0, zones))
    got = [p.data for p in out]
    assert got[0] == pk[0] and all(p in pk for p in got)  # (the packets after the wrong pointer are misread)
    assert ex.stats.fhp_mismatch_delivered == 1 and ex.stats.as_dict()["fhp_mismatch_delivered"] == 1


def test_a_packet_ending_in_a_frame_without_a_header_before_a_pad_is_delivered():
    # a sender that fills the last few octets of a frame (too few for an idle packet, which needs 7) with zeros and
    # sets the pointer to all ones (no header starts here): the packet that ends in that frame is whole by its
    # length and is delivered, the pad skipped; the next frame's pointer brings the extractor back in step
    zl = _zone_len(TM)
    first = space_packet(5, 0, bytes(range(10)))
    pad = 4
    # packet 1 spans from frame 0 into frame 1 and ends pad octets before frame 1's end
    body = 2 * zl - pad - len(first) - 6
    second = space_packet(5, 1, bytes(i % 251 for i in range(body)))
    third = space_packet(5, 2, b"\x33" * 30)
    from test_link_builders import Zone
    stream = first + second
    zones = [Zone(fhp=0, data=stream[:zl]), Zone(fhp=0x7FF, data=stream[zl:] + bytes(pad))]
    more, _ = cut_stream([third], zl)
    out, ex = _run(TM, _frames_for_vc(TM, 0, zones + more))
    assert [p.data for p in out] == [first, second, third]
    assert ex.stats.fhp_mismatch_delivered == 1 and ex.stats.skipped_octets == pad
    assert sum(ex.stats.dropped.values()) == 0


def test_flush_counts_incomplete():
    pk = [space_packet(3, 0, bytes(200))]
    zones, _ = cut_stream(pk, _zone_len(TM))
    parser, ex = FrameParser(frames=TM), PacketExtractor(profile=_profile(TM))
    for d in _frames_for_vc(TM, 0, zones)[:2]:
        ex.process(parser.process(d))
    assert ex.flush() == [] and ex.stats.dropped["incomplete_at_end"] == 1
    ex.reset()
    assert ex.stats.packets == 0 and ex.channels == {}


def test_foreign_idle_and_vca_frames_are_not_used():
    zl = _zone_len(TM)
    parser, ex = FrameParser(frames=TM), PacketExtractor(profile=_profile(TM))
    pk = space_packet(1, 0, bytes(10))
    foreign = tm_frame(TM, vcid=0, mcfc=0, vcfc=0, zone=pk + idle_packet(zl - len(pk)), fhp=0, scid=12)
    idle = tm_frame(TM, vcid=0, mcfc=1, vcfc=0, zone=bytes(zl), fhp=0x7FE)
    vca = tm_frame(TM, vcid=0, mcfc=2, vcfc=1, zone=pk + idle_packet(zl - len(pk)), fhp=0, sync=True)
    assert ex.process(parser.process(decoded(foreign))) == []
    assert ex.process(parser.process(decoded(idle))) == []
    assert ex.process(parser.process(decoded(vca))) == []
    assert ex.stats.frames["foreign"] == 1 and ex.stats.frames["idle"] == 1 and ex.stats.frames["no_packet_zone"] == 1


def test_argument_errors():
    with pytest.raises(TypeError, match="Argument 'profile' must be a LinkProfile"):
        PacketExtractor(profile=TM)
    with pytest.raises(ValueError, match="Argument 'max_packet_octets' must be 7..4294967295"):
        PacketExtractor(profile=_profile(TM), max_packet_octets=3)
    bad = LinkProfile(frames=TM, packets=PacketsSection(time_codes=(TimeCodeConfig(apid=5, pfield=0x4E),)))
    with pytest.raises(ValueError, match="apid 5: pfield is not a valid CUC P-field"):
        PacketExtractor(profile=bad)
    bad = LinkProfile(frames=TM, packets=PacketsSection(time_codes=(TimeCodeConfig(apid=5, code="cds",
                                                                                   pfield=0x1E),)))
    with pytest.raises(ValueError, match="apid 5: pfield is not a valid CDS P-field"):
        PacketExtractor(profile=bad)
    bad = LinkProfile(frames=TM, packets=PacketsSection(time_codes=(TimeCodeConfig(apid=5, epoch="soon"),)))
    with pytest.raises(ValueError,
                       match="apid 5: epoch must be an ISO-8601 date and time without a zone offset, not 'soon'[.]$"):
        PacketExtractor(profile=bad)


# ---- time codes -----------------------------------------------------------------------------

def test_time_codes_attached():
    t_utc = 1_773_480_600 * NS + 250_000_000  # 2026-03-14T09:30:00.25Z
    tai = utc_ns_to_tai_ns(t_utc)
    codes = (TimeCodeConfig(apid=100, code="cuc", pfield=0x1E),
             TimeCodeConfig(apid=101, code="cuc", pfield=None),
             TimeCodeConfig(apid=102, code="cds", pfield=0x45, offset=1))  # 24-bit day, microseconds
    prof = LinkProfile(frames=TM, packets=PacketsSection(time_codes=codes))
    far_future = bytes.fromhex("FFFFFF000000000000")
    assert decode_cds(far_future, pfield=0x45)[1] == 9  # decodes: the extractor must still not report it
    pk = [space_packet(100, 0, encode_cuc(tai, pfield=0x1E) + b"hk", sec=True),
          space_packet(101, 0, encode_cuc(tai, pfield=0x1F, explicit=True) + b"x", sec=True),
          space_packet(102, 0, b"\x99" + encode_cds(tai, pfield=0x45) + b"y", sec=True),
          space_packet(100, 1, b"\x00\x01", sec=True),  # too short for its time code
          space_packet(100, 2, encode_cuc(tai, pfield=0x1E), sec=False),  # no secondary header
          space_packet(200, 0, encode_cuc(tai, pfield=0x1E), sec=True),  # APID without a time code
          space_packet(102, 1, b"\x99" + far_future, sec=True)]  # a valid code, but after the year 9999
    zones, _ = cut_stream(pk, _zone_len(TM))
    parser, ex = FrameParser(frames=TM), PacketExtractor(profile=prof)
    out = []
    for d in _frames_for_vc(TM, 0, zones):
        out += ex.process(parser.process(d))
    assert [p.time_ns for p in out] == [t_utc, t_utc, t_utc, None, None, None, None]
    assert out[0].time_tai_ns == tai and tai_ns_to_utc_ns(tai) == t_utc
    assert ex.stats.time_codes == 3 and ex.stats.time_code_errors == 3


def test_demo_profile_round_trip(demo_profile):
    # Tamarisk: 1115-octet TM frames with OCF, CUC 0x1E on APIDs 100 and 300
    F = demo_profile.frames
    zl = tm_zone_length(F)
    t0 = utc_ns_to_tai_ns(1_773_480_600 * NS)
    pk = []
    for i in range(40):
        apid = (100, 200, 300)[i % 3]
        body = (encode_cuc(t0 + i * NS // 10, pfield=0x1E) if apid != 200 else b"") + bytes([i]) * (60 + 37 * i)
        pk.append(space_packet(apid, i // 3, body, sec=apid != 200))
    zones, _ = cut_stream(pk, zl)
    decs = [decoded(tm_frame(F, vcid=0, mcfc=i % 256, vcfc=i % 256, zone=z), position=i * 37_500.0)
            for i, z in enumerate(zones)]
    parser, ex = FrameParser(frames=F), PacketExtractor(profile=demo_profile)
    out = [p for d in decs for p in ex.process(parser.process(d))]
    assert [p.data for p in out] == pk
    want = [tai_ns_to_utc_ns(t0 + i * NS // 10) for i in range(40) if i % 3 != 1]
    got = [p.time_ns for p in out if p.apid != 200]
    assert len(got) == len(want) and all(abs(g - w) <= NS / 2**17 for g, w in zip(got, want))  # half a 2^-16 s LSB


# ---- property tests -------------------------------------------------------------------------

def _reference_extract(records, scid):
    """Slow obvious reference: assign each usable frame to a count track with pipeline.link.CountTracker
    (tested on its own in test_link_frames.py), join the packet zones of each run of consecutive counts
    of a track into one string, and read packets one after another from the run's first header pointer."""
    from pipeline.link import CountTracker, FramePeriod

    out, trackers, runs, period = [], {}, [], FramePeriod()
    for r in records:
        period.update(r.position)
        if r.status not in ("ok", "idle") or r.scid != scid or r.vcid is None:
            continue
        tr = trackers.get(r.vcid)
        if tr is None or tr.modulus != r.vcfc_modulus:
            tr = trackers[r.vcid] = CountTracker(modulus=r.vcfc_modulus, max_tracks=4)
        res = tr.step(r.vcfc, r.position, period)
        if res.kind != "next" or res.track.payload is None:
            res.track.payload = {"data": bytearray(), "starts": [], "origin": []}
            runs.append(res.track.payload)
        for t in res.dropped:
            t.payload = None
        run = res.track.payload
        if r.status == "idle" or r.packet_zone is None:
            continue
        if r.fhp != 0x7FF:
            run["starts"].append(len(run["data"]) + r.fhp)
        run["origin"].append((len(run["data"]), r))
        run["data"] += r.packet_zone
    for run in runs:
        _flush_run(run, out)
    return out


def _flush_run(run, out):
    if not run or not run["starts"]:
        return
    data, pos = bytes(run["data"]), run["starts"][0]
    while pos < len(data):
        if data[pos] == 0xE0:
            pos += 1
            continue
        if data[pos] >> 5 == 7:
            lol = data[pos] & 3
            hl = (1, 2, 4, 8)[lol]
            if pos + hl > len(data):
                break
            n = int.from_bytes(data[pos + {1: 1, 2: 2, 3: 4}[lol]:pos + hl], "big")
        else:
            if pos + 6 > len(data):
                break
            n = 7 + int.from_bytes(data[pos + 4:pos + 6], "big")
        if pos + n > len(data):
            break
        pkt = data[pos:pos + n]
        rec = [r for off, r in run["origin"] if off <= pos][-1]
        idle = (pkt[0] >> 5 == 0 and ((pkt[0] & 7) << 8 | pkt[1]) == 0x7FF) or \
               (pkt[0] >> 5 == 7 and (pkt[0] >> 2) & 7 == 0)
        if not idle:
            out.append((rec.vcid, pkt, rec.vcfc, rec.position))
        pos += n



@st.composite
def _scenario(draw):
    kind = draw(st.sampled_from(["tm", "tm_fecf", "aos"]))
    frames = {"tm": TM, "tm_fecf": TM_FECF, "aos": AOS}[kind]
    return dict(frames=frames, seed=draw(st.integers(0, 2**32 - 1)), n_vc=draw(st.integers(1, 3)),
                n_packets=draw(st.integers(1, 30)), loss=draw(st.sampled_from([0.0, 0.05, 0.2])),
                corrupt=draw(st.sampled_from([0.0, 0.05, 0.15])), dup=draw(st.sampled_from([0.0, 0.05])),
                swap=draw(st.sampled_from([0.0, 0.05])), encap=draw(st.booleans()))


def _build_and_impair(sc):
    rng = np.random.default_rng(sc["seed"])
    frames = sc["frames"]
    zl = _zone_len(frames)
    per_vc = {}
    for v in range(sc["n_vc"]):
        vcid = v * 3 + 1
        pk = []
        for i in range(sc["n_packets"]):
            r = rng.random()
            n = int(rng.integers(1, 40)) if r < 0.6 else int(rng.integers(40, 400))
            body = rng.integers(0, 256, n, dtype=np.uint8).tobytes()
            if sc["encap"] and rng.random() < 0.3:
                lol = int(rng.integers(1 if n + 2 <= 255 else 2, 4))
                pk.append(encap_packet(int(rng.integers(1, 8)), body, lol=lol))
            elif rng.random() < 0.1:
                pk.append(idle_packet(7 + n))
            else:
                pk.append(space_packet(int(rng.integers(0, 5)) * 10 + vcid, i, body))
        fill = b"\xe0" if sc["encap"] and rng.random() < 0.5 else None
        zones, spans = cut_stream(pk, zl, idle_fill=fill)
        per_vc[vcid] = (pk, zones, spans)
    # interleave the VCs' frames on the master channel, keeping each VC's order
    order = [v for v, (_, zones, _) in per_vc.items() for _ in zones]
    rng.shuffle(order)
    nxt = {v: 0 for v in per_vc}
    sent = []
    for mc, v in enumerate(order):
        i = nxt[v]
        nxt[v] += 1
        z = per_vc[v][1][i]
        if frames.kind == "tm":
            f = tm_frame(frames, vcid=v, mcfc=mc % 256, vcfc=i % 256, zone=z)
        else:
            f = aos_frame(frames, vcid=v, vcfc=(i + 16_777_000) % (1 << 24), zone=z)
        sent.append({"vcid": v, "index": i, "frame": f, "position": 1000.0 * mc, "rs": (mc % 4,)})
    # impairments
    delivered = []
    for s in sent:
        r = rng.random()
        if r < sc["loss"]:
            continue
        item = dict(s, good=True, status="ok")
        if rng.random() < sc["corrupt"]:
            item["good"] = False
            if frames.fecf and rng.random() < 0.7:  # undetected by RS, caught by the FECF
                f = bytearray(s["frame"])
                f[int(rng.integers(len(f)))] ^= 1 << int(rng.integers(8))
                item["frame"] = bytes(f)
            else:
                item["status"] = "rs_uncorrectable"
                item["frame"] = rng.integers(0, 256, len(s["frame"]), dtype=np.uint8).tobytes()
        delivered.append(item)
        if rng.random() < sc["dup"]:
            delivered.append(dict(item))
    for i in range(len(delivered) - 1):
        if rng.random() < sc["swap"]:
            delivered[i], delivered[i + 1] = delivered[i + 1], delivered[i]
    return per_vc, delivered


def _surely_whole(per_vc, delivered):
    """Packets that must come out: those whose frames a..b all arrived good, one after another among the
    good frames of their virtual channel (whatever else was repeated, replayed or lost around them)."""
    good = {v: [it for it in delivered if it["good"] and it["vcid"] == v] for v in per_vc}
    must = {}
    for v, (pk, _zones, spans) in per_vc.items():
        idx = [it["index"] for it in good[v]]
        must[v] = []
        for p, (a, b, _) in zip(pk, spans):
            space_idle = p[0] >> 5 == 0 and ((p[0] & 7) << 8 | p[1]) == 0x7FF
            if space_idle or (p[0] >> 5 == 7 and (p[0] >> 2) & 7 == 0):
                continue
            run = list(range(a, b + 1))
            if any(idx[j:j + len(run)] == run for j in range(len(idx))):
                must[v].append(p)
    return must


@given(_scenario(), st.booleans())
@settings(max_examples=60, deadline=None)
def test_property_every_whole_packet_delivered_none_invented(sc, drop):
    frames = sc["frames"]
    per_vc, delivered = _build_and_impair(sc)
    parser, ex = FrameParser(frames=frames), PacketExtractor(profile=_profile(frames), drop_duplicates=drop)
    records = [parser.process(decoded(it["frame"], position=it["position"], status=it["status"], rs=it["rs"]))
               for it in delivered]
    for it, r in zip(delivered, records):
        if not it["good"]:
            assert r.status != "ok"  # corruption is never passed on as good
    out = ex.process_many(records)
    ex.flush()
    must = _surely_whole(per_vc, delivered)
    position_of = {(it["vcid"], it["index"]): it["position"] for it in delivered}
    seen = set()
    for p in out:
        pk, _, spans = per_vc[p.vcid]
        starts = [a for q, (a, _, _) in zip(pk, spans) if q == p.data]
        # nothing invented: a packet that was sent, with the count and position of the frame it began in
        assert starts, "a packet that was never sent"
        mod = 256 if frames.kind == "tm" else 1 << 24
        a = next(a for a in starts if p.vcfc == (a + (0 if frames.kind == "tm" else 16_777_000)) % mod)
        assert p.position == position_of[(p.vcid, a)] and p.verified  # every frame here is RS-verified
        key = (p.vcid, p.vcfc, p.data)
        # a byte-identical copy from the same frame count is flagged (and suppressed with drop_duplicates)
        assert p.copy == (key in seen) and not (drop and p.copy)
        if p.copy:
            assert p.count_anomaly == "duplicate"
        seen.add(key)
    for v in per_vc:
        got = [p.data for p in out if p.vcid == v]
        assert all(p in got for p in must[v])
    # the slow reference reads the same packets from the same records (up to the order of the tracks)
    ref = _reference_extract(records, frames.spacecraft_id)
    if not drop:
        assert sorted((p.vcid, p.data, p.vcfc, p.position) for p in out) == sorted(ref)
    else:
        assert sorted({(p.vcid, p.data, p.vcfc, p.position) for p in out}) == sorted(set(ref))


@given(_scenario(), st.lists(st.integers(1, 400), max_size=6))
@settings(max_examples=25, deadline=None)
def test_property_batches_give_the_same_packets(sc, cuts):
    frames = sc["frames"]
    _, delivered = _build_and_impair(sc)
    parser = FrameParser(frames=frames)
    records = [parser.process(decoded(it["frame"], position=it["position"], status=it["status"], rs=it["rs"]))
               for it in delivered]
    one = PacketExtractor(profile=_profile(frames))
    each = [p for r in records for p in one.process(r)]
    batched = PacketExtractor(profile=_profile(frames))
    cuts = sorted({c for c in cuts if c < len(records)})
    got = []
    for lo, hi in zip([0, *cuts], [*cuts, len(records)]):
        got += batched.process_many(records[lo:hi])
    assert got == each and batched.stats.as_dict() == one.stats.as_dict()


@given(st.lists(st.tuples(st.binary(min_size=0, max_size=60), st.integers(0, 0x7FF), st.integers(0, 255),
                          st.sampled_from(["ok", "idle", "bad_header"])), max_size=40),
       st.booleans())
@settings(max_examples=300, deadline=None)
def test_extractor_fuzz_never_crashes(items, encapsulation):
    from pipeline.link import FrameRecord

    ex = PacketExtractor(profile=LinkProfile(frames=TM, packets=PacketsSection(encapsulation=encapsulation)),
                         max_packet_octets=300)
    for i, (zone, fhp, vcfc, status) in enumerate(items):
        rec = FrameRecord(status=status, kind="tm", position=float(i), scid=499, vcid=vcfc % 2, vcfc=vcfc,
                          vcfc_modulus=256, mcfc=i % 256, fhp=fhp, packet_zone=zone, data_field=zone)
        for p in ex.process(rec):
            assert 1 <= len(p.data) <= 300
            json.dumps(p.as_dict())
    ex.flush()
    json.dumps(ex.stats.as_dict())


@given(st.binary(min_size=48, max_size=48), st.binary(min_size=48, max_size=48))
@settings(max_examples=300, deadline=None)
def test_parser_and_extractor_on_random_frames(a, b):
    parser, ex = FrameParser(frames=TM), PacketExtractor(profile=_profile(TM))
    for f in (a, b, a):
        ex.process(parser.process(decoded(f)))
    ex.flush()


def test_long_outage_resyncs_instead_of_dropping():
    # 150 VC frames lost: by the counts alone every later frame would look late ("behind").
    zl = _zone_len(TM)
    pk = [space_packet(5, i, bytes([i % 256]) * 30) for i in range(300)]
    zones, spans = cut_stream(pk, zl)
    decs = _frames_for_vc(TM, 0, zones)
    keep = list(range(20)) + list(range(170, len(decs)))
    out, ex = _run(TM, [decs[i] for i in keep])
    want = [p for p, (a, b, _) in zip(pk, spans) if b < 20 or a >= 170]
    assert [p.data for p in out] == want
    assert ex.stats.frames["backward"] == 0 and ex.stats.frames["gap"] == 1


def test_sparse_vc_continues_across_long_intervals():
    # VC 1 sends one frame per 200 physical frames: consecutive counts, far apart in time.
    zl = _zone_len(TM)
    pk = [space_packet(6, i, bytes([i]) * 50) for i in range(6)]
    zones, _ = cut_stream(pk, zl)
    parser, ex = FrameParser(frames=TM), PacketExtractor(profile=_profile(TM))
    filler = space_packet(1, 0, bytes(zl - 6 - 7)) + idle_packet(7)
    out, mc = [], 0
    for i, z in enumerate(zones):
        for _ in range(200):
            f = tm_frame(TM, vcid=0, mcfc=mc % 256, vcfc=mc % 256, zone=filler, fhp=0)
            ex.process(parser.process(decoded(f, position=100.0 * mc)))
            mc += 1
        f = tm_frame(TM, vcid=1, mcfc=mc % 256, vcfc=i, zone=z)
        out += [p for p in ex.process(parser.process(decoded(f, position=100.0 * mc))) if p.vcid == 1]
        mc += 1
    assert [p.data for p in out] == pk


# ---- delivery rule (issue 13): counters are facts, verified data is never withheld -------------------

def _pass(frames, vcid, n_packets, seed, pos0=0.0, rs=(1,)):
    rng = np.random.default_rng(seed)
    pk = [space_packet(300 + vcid, i, rng.integers(0, 256, int(rng.integers(5, 90)), dtype=np.uint8).tobytes())
          for i in range(n_packets)]
    zones, spans = cut_stream(pk, _zone_len(frames))
    decs = [decoded(tm_frame(frames, vcid=vcid, mcfc=i % 256, vcfc=i % 256, zone=z), position=pos0 + 1000.0 * i,
                    rs=rs) for i, z in enumerate(zones)]
    return pk, spans, decs


def test_restarting_counters_deliver_every_repetition():
    # one pass repeated 5 times (frame and packet counters restart at every seam): 5 x the packets, the
    # repetitions flagged as byte-identical copies from the same frame counts; drop_duplicates keeps one
    pk, spans, decs = _pass(TM, 2, 40, seed=1)
    whole = pk  # the last packet ends in the last frame (cut_stream fills it with an idle packet)
    feed = []  # one continuous recording: the positions go on across the seams
    for r in range(5):
        feed += [decoded(d.frame, position=1000.0 * len(decs) * r + d.cadu.position, rs=d.rs_corrected)
                 for d in decs]
    out, ex = _run(TM, feed)
    assert [p.data for p in out] == whole * 5
    n = len(whole)
    assert [p.count_anomaly for p in out[:n]] == [None] * n
    assert all(p.count_anomaly == "duplicate" and p.copy for p in out[n:])
    assert ex.stats.frames["backward"] == 4 and ex.stats.copies == 4 * n and ex.stats.copies_dropped == 0
    assert ex.stats.count_anomalies == {"duplicate": 4 * n, "backward": 0}
    out, ex = _run(TM, feed, drop_duplicates=True)
    assert [p.data for p in out] == whole and ex.stats.copies_dropped == 4 * n


def test_two_different_passes_joined_are_flagged_backward():
    # a restart with new content: nothing is a copy, so the packets after the seam are "backward" where their
    # counters went behind (the first frame's count, and each APID's sequence count)
    pk1, _, decs1 = _pass(TM, 2, 30, seed=1)
    pk2, _, decs2 = _pass(TM, 2, 30, seed=2, pos0=1000.0 * len(decs1))
    out, ex = _run(TM, decs1 + decs2)
    assert [p.data for p in out] == pk1 + pk2
    second = out[len(pk1):]
    assert second[0].count_anomaly == "backward" and not any(p.copy for p in out)
    # APID 302's sequence restarts at 0: its first packet starts a new track, the rest follow it
    assert [p.count_anomaly for p in second[1:]] == [None] * (len(pk2) - 1)
    assert ex.stats.sequence_backward == 1 and ex.stats.frames["backward"] == 1 and ex.stats.sequence_gaps == 0


def test_replay_between_newer_frames_keeps_the_running_packet():
    # frames 4..8 of a VC played back between frames 12 and 13: the packet running from 12 into 13 is not
    # lost; the played-back packets are delivered again, flagged as copies
    pk, spans, decs = _pass(TM, 1, 60, seed=3)
    replay = [decoded(d.frame, position=12_500.0 + i, rs=d.rs_corrected) for i, d in enumerate(decs[4:9])]
    out, ex = _run(TM, decs[:13] + replay + decs[13:])
    again = [p for p, (a, b, _) in zip(pk, spans) if 4 <= a and b <= 8]  # wholly inside the played-back frames
    assert [p.data for p in out if not p.copy] == pk
    assert [p.data for p in out if p.copy] == again and len(again) >= 2
    assert all(p.count_anomaly == "duplicate" for p in out if p.copy)
    assert ex.stats.frames["backward"] == 1 and ex.stats.frames["gap"] == 0 and ex.stats.dropped["frame_gap"] == 0


def test_verified_flag_follows_the_frames():
    pk, spans, decs = _pass(TM, 0, 30, seed=4, rs=())  # no RS, no FECF: delivered, not verified
    out, ex = _run(TM, decs)
    assert [p.data for p in out] == pk and not any(p.verified for p in out)
    assert ex.stats.unverified_packets == len(pk) and out[0].as_dict()["verified"] is False
    # a packet is verified only when every frame it spans was
    mixed = [decoded(d.frame, position=d.cadu.position, rs=(0,) if i != 3 else ()) for i, d in enumerate(decs)]
    out, _ = _run(TM, mixed)
    for p, (a, b, _) in zip(out, spans):
        assert p.verified == (not a <= 3 <= b)


def test_duplicate_window_and_arguments():
    pk, _, decs = _pass(TM, 0, 10, seed=5)
    out, ex = _run(TM, decs + [decoded(d.frame, position=1e6 + d.cadu.position) for d in decs], duplicate_window=1)
    assert ex.stats.copies <= 1  # only the last delivered packet is remembered
    with pytest.raises(TypeError, match="Argument 'drop_duplicates' must be True or False"):
        PacketExtractor(profile=_profile(TM), drop_duplicates=1)
    with pytest.raises(ValueError, match="Argument 'duplicate_window' must be 1..4194304, not 0"):
        PacketExtractor(profile=_profile(TM), duplicate_window=0)
