"""A small, independent frame and packet builder for the link / packets tests, and its own checks.

Headers are built from bit strings field by field (the obvious way), not with the shifts and
masks of pipeline.link, so that a wrong shift on either side shows up.
"""

from __future__ import annotations

from dataclasses import dataclass

import pytest

# ---- bit strings ----------------------------------------------------------------------------


def pack_bits(*fields: tuple[int, int]) -> bytes:
    """Concatenate (value, width) fields MSB first into octets."""
    s = "".join(format(v, f"0{w}b") for v, w in fields)
    assert len(s) % 8 == 0 and all(v < (1 << w) for v, w in fields)
    return int(s, 2).to_bytes(len(s) // 8, "big") if s else b""


def crc16_ref(data: bytes) -> int:
    """Bit-by-bit CRC-16, poly 0x1021, preset 0xFFFF (CCSDS 132.0-B sec. 4.1.6, [TM-DL] p. 4-13)."""
    reg = 0xFFFF
    for byte in data:
        for i in range(7, -1, -1):
            bit = (byte >> i) & 1
            top = (reg >> 15) & 1
            reg = (reg << 1) & 0xFFFF
            if top ^ bit:
                reg ^= 0x1021
    return reg


# ---- headers --------------------------------------------------------------------------------


def tm_primary(scid, vcid, mcfc, vcfc, *, ocf=False, sec=False, sync=False, order=False, seglen=3, fhp=0,
               version=0) -> bytes:
    """TM primary header (layout: ../shared/REFERENCES.md sec. 3, from memory, not confirmed)."""
    return pack_bits((version, 2), (scid, 10), (vcid, 3), (int(ocf), 1), (mcfc, 8), (vcfc, 8), (int(sec), 1),
                     (int(sync), 1), (int(order), 1), (seglen, 2), (fhp, 11))


def aos_primary(scid, vcid, vcfc, *, replay=False, usage=False, cycle=0, version=1) -> bytes:
    """AOS primary header without FHEC (REFERENCES.md sec. 4, from memory, not confirmed)."""
    return pack_bits((version, 2), (scid, 8), (vcid, 6), (vcfc, 24), (int(replay), 1), (int(usage), 1), (0, 2),
                     (cycle, 4))


def clcw_word(*, status=0, cop=1, vcid=0, no_rf=0, no_bitlock=0, lockout=0, wait=0, retransmit=0, farm_b=0,
              report=0) -> bytes:
    """CLCW (CCSDS 232.0-B sec. 4.2, from memory, not confirmed; REFERENCES.md sec. 3)."""
    return pack_bits((0, 1), (0, 2), (status, 3), (cop, 2), (vcid, 6), (0, 2), (no_rf, 1), (no_bitlock, 1),
                     (lockout, 1), (wait, 1), (retransmit, 1), (farm_b, 2), (0, 1), (report, 8))


def space_packet(apid: int, seq: int, data: bytes, *, flags: int = 3, ptype: int = 0, sec: bool = False) -> bytes:
    """Space packet (REFERENCES.md sec. 5, from memory, not confirmed): 6-octet header + data."""
    assert 1 <= len(data) <= 65536
    return pack_bits((0, 3), (ptype, 1), (int(sec), 1), (apid, 11), (flags, 2), (seq % 16384, 14),
                     (len(data) - 1, 16)) + data


def idle_packet(total: int) -> bytes:
    """An idle space packet (APID 0x7FF) of ``total`` >= 7 octets."""
    return space_packet(0x7FF, 0, b"\x55" * (total - 6))


def encap_packet(pid: int, data: bytes, *, lol: int | None = None) -> bytes:
    """Encapsulation packet (CCSDS 133.1-B, from memory, not confirmed); length counts the whole packet."""
    if lol is None:
        lol = 1 if len(data) + 2 <= 255 else (2 if len(data) + 4 <= 0xFFFF else 3)
    if lol == 1:
        return pack_bits((7, 3), (pid, 3), (1, 2), (len(data) + 2, 8)) + data
    if lol == 2:
        return pack_bits((7, 3), (pid, 3), (2, 2), (0, 4), (0, 4), (len(data) + 4, 16)) + data
    return pack_bits((7, 3), (pid, 3), (3, 2), (0, 4), (0, 4), (0, 16), (len(data) + 8, 32)) + data


# ---- streams --------------------------------------------------------------------------------


@dataclass
class Zone:
    fhp: int
    data: bytes


def cut_stream(packets: list[bytes], zone_len: int, *, idle_fill: bytes | None = None):
    """Concatenate packets and cut into equal zones with first header pointers.

    The stream is padded to a whole number of zones with one idle space packet (or repeated
    ``idle_fill`` octets).  Returns (zones, spans): spans[i] = (first zone, last zone, offset)
    of packets[i].
    """
    stream = b"".join(packets)
    starts = []
    off = 0
    for p in packets:
        starts.append(off)
        off += len(p)
    pad = (-len(stream)) % zone_len
    if pad:
        if idle_fill is not None:
            stream += idle_fill * pad
            starts_pad = list(range(len(stream) - pad, len(stream)))
        else:
            if pad < 7:
                pad += zone_len
            stream += idle_packet(pad)
            starts_pad = [len(stream) - pad]
    else:
        starts_pad = []
    all_starts = starts + starts_pad
    zones = []
    for z in range(len(stream) // zone_len):
        lo, hi = z * zone_len, (z + 1) * zone_len
        first = [s for s in all_starts if lo <= s < hi]
        zones.append(Zone(fhp=(first[0] - lo) if first else 0x7FF, data=stream[lo:hi]))
    spans = [(s // zone_len, (s + len(p) - 1) // zone_len, s % zone_len) for s, p in zip(starts, packets)]
    return zones, spans


# ---- frames ---------------------------------------------------------------------------------


def tm_frame(frames, *, vcid, mcfc, vcfc, zone: Zone | bytes, fhp=None, ocf: bytes | None = None,
             sec_header: bytes | None = None, scid=None, sync=False) -> bytes:
    """A whole TM transfer frame for a FramesSection (FECF computed with crc16_ref)."""
    if isinstance(zone, Zone):
        fhp, zone = zone.fhp, zone.data
    scid = frames.spacecraft_id if scid is None else scid
    out = tm_primary(scid, vcid, mcfc, vcfc, ocf=frames.ocf, sec=sec_header is not None, sync=sync, fhp=fhp,
                     seglen=3)
    if sec_header is not None:
        out += sec_header
    out += zone
    if frames.ocf:
        out += ocf if ocf is not None else clcw_word(vcid=vcid)
    if frames.fecf:
        out += crc16_ref(out).to_bytes(2, "big")
    assert len(out) == frames.length, (len(out), frames.length)
    return out


def tm_zone_length(frames, sec_header_length: int = 0) -> int:
    return frames.length - 6 - sec_header_length - (4 if frames.ocf else 0) - (2 if frames.fecf else 0)


def aos_frame(frames, *, vcid, vcfc, zone: Zone | bytes, fhp=None, usage=False, cycle=0, scid=None,
              fhec: int | None = None, insert_zone: bytes | None = None, bpdu: bool = False) -> bytes:
    """A whole AOS frame: header, [FHEC], [insert zone], M_PDU (or B_PDU) header + zone, [OCF], [FECF]."""
    if isinstance(zone, Zone):
        fhp, zone = zone.fhp, zone.data
    scid = frames.spacecraft_id if scid is None else scid
    out = aos_primary(scid, vcid, vcfc, usage=usage, cycle=cycle)
    if frames.fhec:
        out += (fhec or 0).to_bytes(2, "big")
    if frames.insert_zone_length:
        out += insert_zone if insert_zone is not None else bytes(frames.insert_zone_length)
    out += pack_bits((0, 2), (fhp, 14)) if bpdu else pack_bits((0, 5), (fhp, 11))
    out += zone
    if frames.ocf:
        out += clcw_word(vcid=vcid)
    if frames.fecf:
        out += crc16_ref(out).to_bytes(2, "big")
    assert len(out) == frames.length, (len(out), frames.length)
    return out


def aos_zone_length(frames) -> int:
    return (frames.length - 6 - (2 if frames.fhec else 0) - frames.insert_zone_length - 2
            - (4 if frames.ocf else 0) - (2 if frames.fecf else 0))


@dataclass(frozen=True)
class FakeCadu:
    position: float
    asm_errors: int = 0
    inverted: bool = False
    flywheel: bool = False


@dataclass(frozen=True)
class FakeDecoded:
    """Duck-typed stand-in for pipeline.sync.DecodedFrame."""

    frame: bytes
    status: str = "ok"
    rs_corrected: tuple = (0,)
    cadu: FakeCadu = FakeCadu(0.0)


def decoded(frame: bytes, position: float = 0.0, status: str = "ok", rs=(0,)) -> FakeDecoded:
    return FakeDecoded(frame=frame, status=status, rs_corrected=tuple(rs), cadu=FakeCadu(position))


# ---- checks of the builder itself -----------------------------------------------------------


@pytest.mark.kat
def test_builder_tm_worked_example():
    # ../shared/REFERENCES.md sec. 3, computed there: SCID 0x123, VCID 5, OCF 1, MCFC 0x45, VCFC 0x67, FHP 0
    assert tm_primary(0x123, 5, 0x45, 0x67, ocf=True, fhp=0) == bytes.fromhex("123B45671800")
    assert tm_primary(0x123, 5, 0x45, 0x67, ocf=True, fhp=0x7FF)[4:] == bytes.fromhex("1FFF")
    assert tm_primary(0x123, 5, 0x45, 0x67, ocf=True, fhp=0x7FE)[4:] == bytes.fromhex("1FFE")


@pytest.mark.kat
def test_builder_aos_and_packet_worked_examples():
    # ../shared/REFERENCES.md sec. 4 and 5, computed there
    assert aos_primary(0xAB, 0x2A, 0x123456) == bytes.fromhex("6AEA12345600")
    assert space_packet(0x123, 0x1234, bytes(10), sec=True)[:6] == bytes.fromhex("0923D2340009")
    assert idle_packet(7)[:2] == bytes.fromhex("07FF")
    assert encap_packet(0, b"", lol=1)[:1] == bytes([0xE1])


@pytest.mark.kat
def test_crc16_ref_check_values():
    # ../shared/REFERENCES.md sec. 10.4: "123456789" -> 0x29B1; empty -> 0xFFFF; 6 zero octets -> 0x0E10
    assert crc16_ref(b"123456789") == 0x29B1
    assert crc16_ref(b"") == 0xFFFF
    assert crc16_ref(bytes(6)) == 0x0E10


def test_crc16_ref_against_crccheck():
    from crccheck.crc import Crc16CcittFalse  # crccheck (PyPI), CRC-16/CCITT-FALSE

    data = bytes(range(200))
    assert crc16_ref(data) == Crc16CcittFalse.calc(data)


def test_cut_stream_pointers():
    pk = [space_packet(1, i, bytes([i]) * (5 + 3 * i)) for i in range(6)]
    zones, spans = cut_stream(pk, 16)
    joined = b"".join(z.data for z in zones)
    for p, (a, _b, off) in zip(pk, spans):
        assert joined[a * 16 + off:a * 16 + off + len(p)] == p
        assert zones[a].fhp <= off
    assert all(len(z.data) == 16 for z in zones)
