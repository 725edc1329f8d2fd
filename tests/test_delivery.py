"""Delivery rule end to end (issue 13): counters that restart or replay never cost a verified packet.

The channel bits come from the independent transmitter (tests/third_party_tx.py: reedsolo RS, its own
randomizer and shift-register convolutional encoder), decoded with the public ``pipeline.decode`` from a
symbol file (``input_kind="bits"``), so the whole chain runs: Viterbi, frame sync, RS, frame parser,
channel accounting, packet extractor.
"""

from __future__ import annotations

from collections import Counter

import numpy as np
import pytest
import third_party_tx as tx

from pipeline import decode
from pipeline.profile import profile_from_dict

FIELD = 223 - 6 - 4  # TM data field: 223-octet frame, 6-octet header, 4-octet OCF (CCSDS 132.0-B sec. 4.1)
START = "2026-03-14T09:30:00Z"


def _profile(rs: int = 16):
    return profile_from_dict({
        "name": "delivery",
        "link": {"modulation": "bpsk", "symbol_rate": 48_000.0, "line_code": "nrz-m"},
        "coding": {"convolutional": "1/2", "reed_solomon": rs, "interleave": 1, "randomizer": True},
        "frames": {"kind": "tm", "length": 223, "fecf": False, "ocf": True, "spacecraft_id": 77},
    })


def _packets(rng, apid, n):
    return [tx.space_packet(apid, i, bytes(rng.integers(0, 256, int(rng.integers(20, 160)), dtype=np.uint8)))
            for i in range(n)]


def _frame_span(packets):
    """(first frame, last frame) of each packet in the data fields cut by tx.tm_frames."""
    out, off = [], 0
    for p in packets:
        out.append((off // FIELD, (off + len(p) - 1) // FIELD))
        off += len(p)
    return out


def _decode(tmp_path, bits, name, rs: int = 16):
    path = tmp_path / f"{name}.bits"
    path.write_bytes(np.packbits(bits).tobytes())
    return decode(path, _profile(rs), input_kind="bits", start=START)


def test_link_without_rs_or_fecf_delivers_unverified(tmp_path):
    # neither a Reed-Solomon code nor an FECF: nothing can verify the frames, they and their packets are
    # delivered all the same, marked "verified": false
    rng = np.random.default_rng(5)
    packets = _packets(rng, 100, 40)
    frames = tx.tm_frames(packets, scid=77, vcid=1, length=223, ocf=True, fecf=False)
    bits = tx.channel_bits(frames, rs_e=0, interleave=1, randomize=True, conv=True, nrz_m=True)
    res = _decode(tmp_path, bits, "plain", rs=0)
    assert [bytes.fromhex(p["hex"]) for p in res.packets_list] == packets
    assert res.frames_ok == len(frames) and not any(f["verified"] for f in res.frames_list)
    assert not any(p["verified"] for p in res.packets_list)


def test_sixteen_repetitions_give_sixteen_times_the_packets(tmp_path):
    # one 90-frame pass, then the same 90 frames sent 16 times in one recording: frame and packet counters
    # restart at every seam (the frame grid goes on, as after an onboard reset or a recorder playback).
    # Every packet is delivered 16 times; the repetitions are flagged as copies.
    rng = np.random.default_rng(16)
    packets = _packets(rng, 100, 250)
    frames = tx.tm_frames(packets, scid=77, vcid=1, length=223, ocf=True, fecf=False)[:90]
    assert len(frames) == 90
    in_90 = [p for p, (a, b) in zip(packets, _frame_span(packets)) if b < 90]
    one = _decode(tmp_path, tx.channel_bits(frames, rs_e=16, interleave=1, randomize=True, conv=True, nrz_m=True),
                  "one")
    assert [bytes.fromhex(p["hex"]) for p in one.packets_list] == in_90
    assert all(p["count_anomaly"] is None and p["verified"] for p in one.packets_list)
    bits = tx.channel_bits(frames * 16, rs_e=16, interleave=1, randomize=True, conv=True, nrz_m=True)
    many = _decode(tmp_path, bits, "sixteen")
    n = len(one.packets_list)
    assert many.packets == 16 * n and many.frames_ok == 16 * one.frames_ok and many.frames_failed == 0
    assert [bytes.fromhex(p["hex"]) for p in many.packets_list] == in_90 * 16
    # flagged where the counters jumped: the first frame after each seam went backward; every packet of a
    # repetition is a byte-identical copy of one delivered from the same frame counts
    backward = [i for i, f in enumerate(many.frames_list) if f["count_anomaly"] == "backward"]
    assert backward == [90 * r for r in range(1, 16)]
    assert all(f["count_anomaly"] is None for i, f in enumerate(many.frames_list) if i not in backward)
    flags = [p["count_anomaly"] for p in many.packets_list]
    assert flags[:n] == [None] * n and flags[n:] == ["duplicate"] * (15 * n)
    assert all(p["verified"] for p in many.packets_list) and all(f["verified"] for f in many.frames_list)
    print(f"repetitions: {n} packets in one pass, {many.packets} in sixteen")  # figure for the report


def test_virtual_channel_playback_between_newer_frames(tmp_path):
    # VC 1 and VC 2 interleaved on one master channel; then VC 2 plays back its frames 10..19 (byte-identical,
    # old counts) between newer frames.  Every packet comes out, and those wholly inside the played-back
    # frames come out again, flagged; no gap is reported and the running packets of both VCs survive.
    rng = np.random.default_rng(2)
    pk1, pk2 = _packets(rng, 101, 90), _packets(rng, 202, 90)
    f1 = tx.tm_frames(pk1, scid=77, vcid=1, length=223, ocf=True, fecf=False)
    f2 = tx.tm_frames(pk2, scid=77, vcid=2, length=223, ocf=True, fecf=False)
    stream = []
    for k in range(max(len(f1), len(f2))):
        stream += [f for f in (f1[k] if k < len(f1) else None, f2[k] if k < len(f2) else None) if f is not None]
    mc = [bytearray(f) for f in stream]
    for i, f in enumerate(mc):
        f[2] = i % 256  # master channel frame count in transmission order (CCSDS 132.0-B sec. 4.1.2.4)
    vc2 = [bytes(f) for f in mc if (f[1] >> 1) & 7 == 2]
    cut = 2 * 24  # VC 2 has sent its frames 0..23
    sent = [bytes(f) for f in mc]
    recording = sent[:cut] + vc2[10:20] + sent[cut:]
    bits = tx.channel_bits(recording, rs_e=16, interleave=1, randomize=True, conv=True, nrz_m=True)
    res = _decode(tmp_path, bits, "playback")
    again = [p for p, (a, b) in zip(pk2, _frame_span(pk2)) if 10 <= a and b <= 19]
    got = [bytes.fromhex(p["hex"]) for p in res.packets_list]
    assert Counter(got) == Counter(pk1) + Counter(pk2) + Counter(again) and len(again) >= 10
    flags = Counter(p["count_anomaly"] for p in res.packets_list)
    assert flags == {None: len(pk1) + len(pk2), "duplicate": len(again)}
    copies = [bytes.fromhex(p["hex"]) for p in res.packets_list if p["count_anomaly"] == "duplicate"]
    assert copies == again
    frame_flags = [f["count_anomaly"] for f in res.frames_list]
    assert frame_flags[cut] == "backward" and frame_flags.count("backward") == 1
    print(f"playback: {len(pk1) + len(pk2)} packets sent, {len(again)} played back, {res.packets} delivered")


@pytest.mark.slow
def test_sixteen_repetitions_of_a_pass_long(tmp_path):
    # 16 repetitions of 400 frames: the 8-bit TM counts also wrap inside each repetition, and the restart
    # 399 -> 0 reads as 143 -> 0, a jump forward of 113 counts after one frame period (a restart, not a gap)
    rng = np.random.default_rng(160)
    packets = _packets(rng, 100, 1100)
    frames = tx.tm_frames(packets, scid=77, vcid=1, length=223, ocf=True, fecf=False)[:400]
    in_400 = [p for p, (a, b) in zip(packets, _frame_span(packets)) if b < 400]
    bits = tx.channel_bits(frames * 16, rs_e=16, interleave=1, randomize=True, conv=True, nrz_m=True)
    many = _decode(tmp_path, bits, "long")
    assert [bytes.fromhex(p["hex"]) for p in many.packets_list] == in_400 * 16
