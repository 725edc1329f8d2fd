"""Transfer frame builders of the simulated spacecraft: TM (CCSDS 132.0-B) and AOS (CCSDS 732.0-B).

Both builders multiplex the packets of several virtual channels into fixed-length frames.  Each
virtual channel is a continuous octet stream of packets; a frame of that channel carries the next
``data_field`` octets of it and a First Header Pointer to the first packet header that starts in
the frame (0x7FF when none does).  When a channel runs out of real packets part-way through a frame
the rest is filled with idle packets (APID 0x7FF); when no channel has data at all the builder
sends an Only-Idle-Data frame (TM: FHP 0x7FE on the idle VC; AOS: a frame of the idle VC 63), or,
with ``idle="packets"``, a frame of idle packets on ``idle_packets_vcid``.  The idle VC carries no
packets in either mode.

The channel served next is the one whose oldest unsent packet is oldest (first come, first served
across channels; ties go to the lower VCID).
"""

from __future__ import annotations

from collections import deque
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Literal

import numpy as np

from pipeline.profile import FramesSection
from pipeline.sim._kernels import idle_lfsr_fill
from pipeline.sim._packets import SimPacket, idle_packet

__all__ = [
    "FHP_NO_PACKET",
    "FHP_IDLE",
    "IdleMode",
    "BuiltFrame",
    "clcw_word",
    "tm_primary_header",
    "aos_primary_header",
    "TmFrameBuilder",
    "AosFrameBuilder",
]

#: First Header Pointer when no packet starts in the frame (132.0-B; from memory, not confirmed).
FHP_NO_PACKET = 0x7FF
#: First Header Pointer of an Only-Idle-Data frame (130.1-G-2 p.97, REFERENCES.md sec. 3).
FHP_IDLE = 0x7FE

IdleMode = Literal["oid", "packets"]

_MAX_FRAME = 2048  # CCSDS 132.0-B / 732.0-B maximum frame length in octets (from memory, not confirmed)


def _crc16():
    # imported late: pipeline.fec is landing concurrently and this keeps the packet/frame layer
    # importable without it (the FECF is the only fec piece the builders need).
    from pipeline.fec import crc16

    return crc16


@dataclass(frozen=True)
class BuiltFrame:
    """One transfer frame as sent, with what it carries.

    Attributes
    ----------
    data : bytes
        The whole frame (header to FECF).
    vcid, vcfc : int
        Virtual channel and its frame count.
    mcfc : int or None
        Master channel frame count (TM); ``None`` for AOS, which has none.
    fhp : int or None
        First Header Pointer (``None`` for an AOS idle frame, which has no M_PDU header).
    idle : bool
        True for Only-Idle-Data / idle-VC frames.
    ocf : bytes or None
        The 4-octet Operational Control Field (a CLCW), when present.
    started : tuple of SimPacket
        Real (non-idle) packets whose first octet is in this frame, in order.
    completed : tuple of SimPacket
        Real packets whose last octet is in this frame, in order.
    """

    data: bytes
    vcid: int
    vcfc: int
    mcfc: int | None
    fhp: int | None
    idle: bool
    ocf: bytes | None
    started: tuple[SimPacket, ...]
    completed: tuple[SimPacket, ...]


def clcw_word(*, vcid: int = 0, report_value: int = 0, farm_b_counter: int = 0, no_rf: bool = False,
              no_bit_lock: bool = False, lockout: bool = False, wait: bool = False, retransmit: bool = False,
              status: int = 0) -> bytes:
    """A Type-1 report (CLCW, 32 bits) for the OCF.

    Bits: 0 type (0), 1-2 version (00), 3-5 status, 6-7 COP in effect (01 = COP-1), 8-13 VCID,
    14-15 spare, 16 No RF Available, 17 No Bit Lock, 18 Lockout, 19 Wait, 20 Retransmit,
    21-22 FARM-B counter (2 LSBs), 23 spare, 24-31 report value V(R).

    References
    ----------
    CCSDS 232.0-B sec. 4.2 (bit map from memory, not confirmed; REFERENCES.md sec. 3);
    the FARM-B counter's two LSBs: CCSDS 232.1-B-2 sec. 6.1.6.
    """
    if not 0 <= vcid <= 63:
        raise ValueError(f"Argument 'vcid' must be 0..63, not {vcid}.")
    if not 0 <= report_value <= 255:
        raise ValueError(f"Argument 'report_value' must be 0..255, not {report_value}.")
    w = (0 << 31) | (0 << 29) | ((status & 7) << 26) | (1 << 24) | (vcid << 18)
    w |= (int(no_rf) << 15) | (int(no_bit_lock) << 14) | (int(lockout) << 13) | (int(wait) << 12)
    w |= (int(retransmit) << 11) | ((farm_b_counter & 3) << 9) | report_value
    return w.to_bytes(4, "big")


def tm_primary_header(*, scid: int, vcid: int, ocf: bool, mcfc: int, vcfc: int, fhp: int,
                      secondary_header: bool = False) -> bytes:
    """The 6-octet TM Transfer Frame Primary Header (version 00, sync flag 0, segment length ID 11).

    References
    ----------
    CCSDS 132.0-B sec. 4.1.2 (layout from memory, not confirmed; worked example REFERENCES.md sec. 3).
    """
    word0 = (0 << 14) | ((scid & 0x3FF) << 4) | ((vcid & 7) << 1) | int(ocf)
    status = (int(secondary_header) << 15) | (0 << 14) | (0 << 13) | (0b11 << 11) | (fhp & 0x7FF)
    return word0.to_bytes(2, "big") + bytes([mcfc & 0xFF, vcfc & 0xFF]) + status.to_bytes(2, "big")


def aos_primary_header(*, scid: int, vcid: int, vcfc: int, replay: bool = False) -> bytes:
    """The 6-octet AOS Transfer Frame Primary Header (version 01, no FHEC, count cycle unused).

    References
    ----------
    CCSDS 732.0-B sec. 4.1.2 (layout from memory, not confirmed; worked example REFERENCES.md sec. 4).
    """
    word0 = (1 << 14) | ((scid & 0xFF) << 6) | (vcid & 0x3F)
    signalling = int(replay) << 7
    return word0.to_bytes(2, "big") + (vcfc & 0xFFFFFF).to_bytes(3, "big") + bytes([signalling])


class _VcStream:
    """The octet stream of one virtual channel with packet boundaries (absolute octet counts)."""

    def __init__(self):
        self.buf = bytearray()
        self.buf_start = 0  # absolute octet index of buf[0]
        self.written = 0
        self.sent = 0
        self.real = deque()  # (start, end, SimPacket) of real packets not yet completely sent
        self.starts = deque()  # (start, is_real) of every packet not yet started in a frame

    @property
    def pending(self) -> bool:
        return bool(self.real)

    def oldest_s(self) -> float:
        return self.real[0][2].generation_s

    def append(self, data: bytes, pkt: SimPacket | None) -> None:
        start = self.written
        self.buf += data
        self.written += len(data)
        self.starts.append(start)
        if pkt is not None:
            self.real.append((start, self.written, pkt))

    def take(self, n: int):
        """Next ``n`` octets, the offset of the first packet start in them (or None), started/completed."""
        lo, hi = self.sent, self.sent + n
        first = None
        while self.starts and self.starts[0] < hi:
            s = self.starts.popleft()
            if first is None:
                first = s - lo
        started, completed = [], []
        for start, end, pkt in self.real:
            if start >= hi:
                break
            if start >= lo:
                started.append(pkt)
            if end <= hi:
                completed.append(pkt)
        while self.real and self.real[0][1] <= hi:
            self.real.popleft()
        off = lo - self.buf_start
        chunk = bytes(self.buf[off:off + n])
        del self.buf[:off + n]
        self.buf_start = hi
        self.sent = hi
        return chunk, first, started, completed


class _FrameBuilderBase:
    """Shared multiplexing of TM and AOS builders (see the module docstring)."""

    _max_vcid = 7

    def __init__(self, *, frames: FramesSection, idle: IdleMode, idle_vcid: int, idle_packets_vcid: int,
                 clcw_every: int):
        if not isinstance(frames, FramesSection):
            raise TypeError(f"Argument 'frames' must be a FramesSection, not {type(frames).__name__}.")
        if idle not in ("oid", "packets"):
            raise ValueError(f"Argument 'idle' must be 'oid' or 'packets', not {idle!r}.")
        if not 0 <= idle_vcid <= self._max_vcid:
            raise ValueError(f"Argument 'idle_vcid' must be 0..{self._max_vcid}, not {idle_vcid}.")
        if not 0 <= idle_packets_vcid <= self._max_vcid:
            raise ValueError(f"Argument 'idle_packets_vcid' must be 0..{self._max_vcid}, not {idle_packets_vcid}.")
        if frames.length > _MAX_FRAME:
            raise ValueError(f"Argument 'frames' length must be at most {_MAX_FRAME} octets, not {frames.length}.")
        if not isinstance(clcw_every, int) or clcw_every < 1:
            raise ValueError(f"Argument 'clcw_every' must be an integer >= 1, not {clcw_every!r}.")
        self.frames = frames
        self.idle = idle
        self.idle_vcid = idle_vcid
        self.idle_packets_vcid = idle_packets_vcid
        self.clcw_every = clcw_every
        self.trailer_bytes = (4 if frames.ocf else 0) + (2 if frames.fecf else 0)
        self.reset()

    def reset(self) -> None:
        """Empty every virtual channel and restart the frame counts and the idle pattern."""
        self.streams: dict[int, _VcStream] = {}
        self.vc_counts: dict[int, int] = {}
        self.mc_count = 0
        self.frames_built = 0
        self.idle_state = 0xFFFFFFFF

    # ---- input -------------------------------------------------------------------------------
    def push(self, packets: Iterable[SimPacket]) -> None:
        """Queue packets on their virtual channels."""
        for p in packets:
            if not isinstance(p, SimPacket):
                raise TypeError(f"Argument 'packets' must hold SimPacket items, not {type(p).__name__}.")
            if not 0 <= p.vcid <= self._max_vcid or p.vcid == self._reserved_vcid():
                raise ValueError(f"Argument 'packets' VCID must be 0..{self._max_vcid} and not the idle VC "
                                 f"{self._reserved_vcid()}, not {p.vcid}.")
            if p.vcid in self.frames.bitstream_vcids:
                raise ValueError(f"Argument 'packets' VCID {p.vcid} is a bitstream VC; the simulator sends packets "
                                 "only on packet (M_PDU) channels.")
            self._stream(p.vcid).append(p.data, p)

    def process(self, packets: Iterable[SimPacket] = (), *, force_idle: bool = False) -> BuiltFrame:
        """Queue ``packets`` and build the next frame (see :meth:`next_frame`)."""
        self.push(packets)
        return self.next_frame(force_idle=force_idle)

    def _stream(self, vcid: int) -> _VcStream:
        s = self.streams.get(vcid)
        if s is None:
            s = self.streams[vcid] = _VcStream()
        return s

    def _reserved_vcid(self) -> int:
        return self.idle_vcid

    def _idle_octets(self, n: int) -> bytes:
        out = np.zeros(n, dtype=np.uint8)
        self.idle_state = int(idle_lfsr_fill(self.idle_state, out))
        return out.tobytes()

    def _ocf(self) -> bytes | None:
        if not self.frames.ocf:
            return None
        # a slowly advancing V(R), as if telecommands were being accepted now and then
        return clcw_word(vcid=0, report_value=(self.frames_built // self.clcw_every) & 0xFF)

    def _next_count(self, vcid: int) -> int:
        c = self.vc_counts.get(vcid, 0)
        self.vc_counts[vcid] = c + 1
        return c

    # ---- output ------------------------------------------------------------------------------
    def next_frame(self, *, force_idle: bool = False) -> BuiltFrame:
        """Build one frame from the queued packets (see the module docstring for the policy).

        With ``force_idle`` the frame is an Only-Idle-Data / idle-VC frame whatever is queued (the
        queues keep their data for later frames).
        """
        pending = [v for v, s in self.streams.items() if s.pending]
        if force_idle:
            frame = self._idle_frame()
        elif pending:
            vcid = min(pending, key=lambda v: (self.streams[v].oldest_s(), v))
            frame = self._packet_frame(vcid)
        elif self.idle == "packets":
            frame = self._packet_frame(self.idle_packets_vcid)
        else:
            frame = self._idle_frame()
        self.frames_built += 1
        return frame

    def _fill_vc(self, stream: _VcStream, n: int) -> None:
        """Top the stream up with idle packets so at least ``n`` octets are available."""
        avail = stream.written - stream.sent
        if avail >= n:
            return
        need = n - avail
        length = max(need, 7)
        stream.append(idle_packet(length, self._idle_octets(length - 6)), None)

    def _packet_zone(self, vcid: int, n: int):
        stream = self._stream(vcid)
        self._fill_vc(stream, n)
        chunk, first, started, completed = stream.take(n)
        fhp = FHP_NO_PACKET if first is None else first
        return chunk, fhp, tuple(started), tuple(completed)

    def _finish(self, body: bytes) -> bytes:
        if self.frames.fecf:
            crc = int(_crc16()(body))
            body += crc.to_bytes(2, "big")
        return body


class TmFrameBuilder(_FrameBuilderBase):
    """Fixed-length TM Transfer Frames (CCSDS 132.0-B) from queued packets.

    Parameters
    ----------
    frames :
        ``[frames]`` of the profile (length, SCID, OCF, FECF, secondary header length).
    idle :
        ``"oid"``: when no channel has data send an Only-Idle-Data frame (FHP 0x7FE) on
        ``idle_vcid``; ``"packets"``: send a frame of idle packets on ``idle_packets_vcid``.
    idle_vcid :
        VC of OID frames (default 7: common practice, no published source).
    clcw_every :
        Frames between increments of the CLCW report value.

    Notes
    -----
    Frame = primary header (6) + optional secondary header (version 00, length - 1 in the first
    octet, zeros after) + data field + optional OCF (CLCW, 4) + optional FECF (CRC-16 of all the
    preceding octets, :func:`pipeline.fec.crc16`).  The master channel count (8 bits) counts every
    frame, each VC count (8 bits) the frames of its channel.  O(frame length) per frame.

    References
    ----------
    CCSDS 132.0-B sec. 4.1 (frame structure); REFERENCES.md sec. 3.
    """

    _max_vcid = 7

    def __init__(self, *, frames: FramesSection, idle: IdleMode = "oid", idle_vcid: int = 7,
                 idle_packets_vcid: int = 0, clcw_every: int = 16):
        if frames.kind != "tm":
            raise ValueError(f"Argument 'frames' kind must be 'tm' for TmFrameBuilder, not {frames.kind!r}.")
        super().__init__(frames=frames, idle=idle, idle_vcid=idle_vcid, idle_packets_vcid=idle_packets_vcid,
                         clcw_every=clcw_every)
        self.secondary_bytes = frames.secondary_header_length
        self.data_field_bytes = frames.length - 6 - self.secondary_bytes - self.trailer_bytes
        if self.data_field_bytes < 1:
            raise ValueError(f"Argument 'frames' length {frames.length} leaves no data field.")

    def _secondary(self) -> bytes:
        if not self.secondary_bytes:
            return b""
        return bytes([self.secondary_bytes - 1]) + bytes(self.secondary_bytes - 1)

    def _assemble(self, vcid: int, fhp: int, zone: bytes, idle: bool, started, completed) -> BuiltFrame:
        mcfc = self.mc_count & 0xFF
        vcfc = self._next_count(vcid) & 0xFF
        self.mc_count += 1
        ocf = self._ocf()
        hdr = tm_primary_header(scid=self.frames.spacecraft_id, vcid=vcid, ocf=self.frames.ocf, mcfc=mcfc,
                                vcfc=vcfc, fhp=fhp, secondary_header=bool(self.secondary_bytes))
        body = hdr + self._secondary() + zone + (ocf or b"")
        return BuiltFrame(data=self._finish(body), vcid=vcid, vcfc=vcfc, mcfc=mcfc, fhp=fhp, idle=idle, ocf=ocf,
                          started=started, completed=completed)

    def _packet_frame(self, vcid: int) -> BuiltFrame:
        zone, fhp, started, completed = self._packet_zone(vcid, self.data_field_bytes)
        return self._assemble(vcid, fhp, zone, False, started, completed)

    def _idle_frame(self) -> BuiltFrame:
        return self._assemble(self.idle_vcid, FHP_IDLE, self._idle_octets(self.data_field_bytes), True, (), ())


class AosFrameBuilder(_FrameBuilderBase):
    """Fixed-length AOS Transfer Frames (CCSDS 732.0-B) carrying M_PDUs.

    Parameters
    ----------
    frames :
        ``[frames]`` of the profile (length, SCID, OCF, FECF, insert zone, idle VC).
    idle :
        ``"oid"``: when no channel has data send a frame of the idle VC (``frames.idle_vcid``,
        63) whose data field is idle data; ``"packets"``: an M_PDU of idle packets on
        ``idle_packets_vcid``.

    Notes
    -----
    Frame = primary header (6; no FHEC) + insert zone (zeros) + data field + optional OCF (CLCW)
    + optional FECF.  A packet channel's data field is an M_PDU: 5 spare bits and an 11-bit First
    Header Pointer, then the packet zone.  The VC frame count is 24 bits; AOS has no master channel
    count.  The optional FHEC (a RS(10,6) code over GF(16)) is not generated: a profile asking for
    it is refused.

    References
    ----------
    CCSDS 732.0-B sec. 4.1 (frame structure, M_PDU); REFERENCES.md sec. 4 (from memory, not confirmed).
    """

    _max_vcid = 63

    def __init__(self, *, frames: FramesSection, idle: IdleMode = "oid", idle_packets_vcid: int = 0,
                 clcw_every: int = 16):
        if frames.kind != "aos":
            raise ValueError(f"Argument 'frames' kind must be 'aos' for AosFrameBuilder, not {frames.kind!r}.")
        if frames.fhec:
            raise ValueError("Argument 'frames' fhec must be false: the simulator does not generate the AOS "
                             "frame header error control.")
        super().__init__(frames=frames, idle=idle, idle_vcid=frames.idle_vcid, idle_packets_vcid=idle_packets_vcid,
                         clcw_every=clcw_every)
        self.insert_bytes = frames.insert_zone_length
        self.data_field_bytes = frames.length - 6 - self.insert_bytes - self.trailer_bytes
        self.packet_zone_bytes = self.data_field_bytes - 2
        if self.packet_zone_bytes < 1:
            raise ValueError(f"Argument 'frames' length {frames.length} leaves no packet zone.")

    def _assemble(self, vcid: int, fhp: int | None, field: bytes, idle: bool, started, completed) -> BuiltFrame:
        vcfc = self._next_count(vcid) & 0xFFFFFF
        ocf = self._ocf()
        hdr = aos_primary_header(scid=self.frames.spacecraft_id, vcid=vcid, vcfc=vcfc)
        body = hdr + bytes(self.insert_bytes) + field + (ocf or b"")
        return BuiltFrame(data=self._finish(body), vcid=vcid, vcfc=vcfc, mcfc=None, fhp=fhp, idle=idle, ocf=ocf,
                          started=started, completed=completed)

    def _packet_frame(self, vcid: int) -> BuiltFrame:
        zone, fhp, started, completed = self._packet_zone(vcid, self.packet_zone_bytes)
        mpdu_header = (fhp & 0x7FF).to_bytes(2, "big")  # 5 spare bits = 0
        return self._assemble(vcid, fhp, mpdu_header + zone, False, started, completed)

    def _idle_frame(self) -> BuiltFrame:
        return self._assemble(self.idle_vcid, None, self._idle_octets(self.data_field_bytes), True, (), ())
