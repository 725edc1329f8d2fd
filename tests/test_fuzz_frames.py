"""Fuzz (Hypothesis, STYLE.md rule 20; issue 13): random profiles within the validator's ranges and random
frames through the frame parser, the channel accounting and the packet extractor.

A profile either loads or is refused with one ProfileError; a profile that loads is accepted by every
frame/packet stage; any frame, however malformed, gives a record and packets (or none), never an exception.
"""

from __future__ import annotations

import json

import numpy as np
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from pipeline.errors import ProfileError
from pipeline.link import ChannelAccounting, FrameParser
from pipeline.packets import PacketExtractor
from pipeline.profile import profile_from_dict
from pipeline.sync import Cadu, DecodedFrame


@st.composite
def frames_tables(draw):
    kind = draw(st.sampled_from(["tm", "aos"]))
    t = {"kind": kind, "fecf": draw(st.booleans()), "ocf": draw(st.booleans()),
         "length": draw(st.integers(-2, 120))}
    if kind == "tm":
        t["spacecraft_id"] = draw(st.integers(0, 1023))
        t["secondary_header_length"] = draw(st.sampled_from([0, 0, 1, 2, 5, 64, 65]))
    else:
        t["spacecraft_id"] = draw(st.integers(0, 255))
        t["fhec"] = draw(st.booleans())
        t["insert_zone_length"] = draw(st.sampled_from([0, 0, 1, 4, -1]))
        t["bitstream_vcids"] = draw(st.lists(st.integers(0, 63), max_size=2))
        t["idle_vcid"] = draw(st.sampled_from([63, 0, 5]))
    return t


@st.composite
def time_codes(draw):
    code = draw(st.sampled_from(["cuc", "cds"]))
    entry = {"apid": draw(st.integers(0, 7)), "code": code,
             "offset": draw(st.sampled_from([0, 1, 3])),
             "epoch": draw(st.sampled_from(["1958-01-01T00:00:00", "2000-01-01T12:00:00", "9999-12-31T23:59:59",
                                            "0001-01-01", "nonsense"]))}
    if draw(st.booleans()):
        entry["pfield"] = draw(st.integers(0, 0x1FFFF))
    return entry


@st.composite
def profiles(draw):
    tree = {"link": {}, "coding": {"convolutional": "none", "reed_solomon": 0, "interleave": 1},
            "frames": draw(frames_tables()),
            "packets": {"encapsulation": draw(st.booleans()),
                        "time_code": draw(st.lists(time_codes(), max_size=2, unique_by=lambda e: e["apid"]))}}
    try:
        return profile_from_dict(tree, source="fuzz.toml")
    except ProfileError as exc:
        assert str(exc).startswith("fuzz.toml: ") and "\n" not in str(exc)
        assume(False)


def _decoded(frame: bytes, i: int, status: str, rs: tuple) -> DecodedFrame:
    cadu = Cadu(data=frame, position=float(1000 * i), asm_errors=0, inverted=False, flywheel=False, bit_index=i)
    return DecodedFrame(frame=frame, status=status, rs_corrected=rs, cadu=cadu)


def _packet_bytes(rng, apids: list[int]) -> bytes:
    """A few plausible space packets (some with a secondary header) and some junk, to reach the time codes."""
    out = bytearray()
    for _ in range(int(rng.integers(1, 4))):
        n = int(rng.integers(1, 30))
        apid = int(rng.choice(apids))
        head = bytes([0x08 | (apid >> 8), apid & 0xFF, 0xC0 | int(rng.integers(0, 64)), int(rng.integers(0, 256)),
                      (n - 1) >> 8, (n - 1) & 0xFF])
        out += head + rng.integers(0, 256, n, dtype=np.uint8).tobytes()
    return bytes(out)


@settings(max_examples=250, deadline=None, suppress_health_check=[HealthCheck.filter_too_much])
@given(profile=profiles(), seed=st.integers(0, 2**32 - 1), n=st.integers(1, 25))
def test_random_frames_through_parser_accounting_and_extractor(profile, seed, n):
    rng = np.random.default_rng(seed)
    F = profile.frames
    parser, acc = FrameParser(frames=F), ChannelAccounting(spacecraft_id=F.spacecraft_id)
    ex = PacketExtractor(profile=profile, drop_duplicates=bool(seed & 1), duplicate_window=1 + seed % 50)
    apids = [tc.apid for tc in profile.packets.time_codes] or [1]
    for i in range(n):
        how = rng.integers(0, 4)
        length = F.length if rng.random() < 0.9 else int(rng.integers(0, F.length + 3))
        frame = bytearray(rng.integers(0, 256, length, dtype=np.uint8).tobytes())
        if how >= 1 and length >= 8:  # a header that belongs to the profile, so the checks go deeper
            frame[0] = (0x00 if F.kind == "tm" else 0x40) | (frame[0] & 0x3F)
            if F.kind == "tm":
                frame[0] = (frame[0] & 0xC0) | ((F.spacecraft_id >> 4) & 0x3F)
                frame[1] = ((F.spacecraft_id & 0xF) << 4) | (frame[1] & 0x0F)
            else:
                frame[0] = 0x40 | (F.spacecraft_id >> 2)
                frame[1] = ((F.spacecraft_id & 0x3) << 6) | (frame[1] & 0x3F)
        if how >= 2:
            body = _packet_bytes(rng, apids)
            start = min(length, 8 + (2 if F.kind == "aos" else 0))
            frame[start:start + len(body)] = body[: max(0, length - start)]
            del frame[length:]
        status = "ok" if rng.random() < 0.85 else "rs_uncorrectable"
        rs = tuple(int(v) for v in rng.integers(-1, 9, int(rng.integers(0, 3))))
        rec = parser.process(_decoded(bytes(frame), i, status, rs))
        acc.process(rec)
        json.dumps(rec.as_dict())
        for p in ex.process(rec, gap=bool(rng.random() < 0.05)):
            json.dumps(p.as_dict())
            assert 1 <= len(p.data) <= 65542
        ex.take_sequence_gaps()
    ex.flush()
    json.dumps(ex.stats.as_dict())
    json.dumps(acc.as_dict())
    json.dumps(parser.stats.as_dict())


@settings(max_examples=200, deadline=None)
@given(frames=frames_tables())
def test_validator_ranges_are_the_parsers(frames):
    # a frames table either is refused with one ProfileError or parses frames of its length, of any content
    tree = {"link": {}, "coding": {"convolutional": "none", "reed_solomon": 0}, "frames": frames}
    try:
        p = profile_from_dict(tree, source="f.toml")
    except ProfileError:
        return
    parser = FrameParser(frames=p.frames)
    for fill in (0x00, 0xFF, 0x40, 0x7F):
        rec = parser.process(_decoded(bytes([fill]) * p.frames.length, 0, "ok", ()))
        json.dumps(rec.as_dict())
