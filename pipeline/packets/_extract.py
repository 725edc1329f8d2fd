"""Space packets (CCSDS 133.0-B) and encapsulation packets (CCSDS 133.1-B) out of transfer frames.

Space packet primary header, 6 octets (from memory, not confirmed; ../shared/REFERENCES.md sec. 5)
    bits 0-2 version ``000``, 3 type, 4 secondary header flag, 5-15 APID (``0x7FF`` idle),
    16-17 sequence flags, 18-31 sequence count (14 bits), 32-47 packet data length
    (octets of the data field - 1).  Whole packet: 7..65542 octets.
Encapsulation packet header (version ``111``; PID/PVN confirmed by [SLI] sec. 7.7, the rest from
memory, not confirmed)
    octet 0: version (3), protocol id (3, ``000`` idle), length of length (2).
    LoL 00: the packet is this one octet (``E0`` = idle);
    LoL 01: octet 1 is the packet length; LoL 10: octet 1 user defined + protocol id
    extension, octets 2-3 the packet length; LoL 11: octet 1 as before, octets 2-3 CCSDS
    defined, octets 4-7 the packet length.  The packet length counts the whole packet.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field, replace
from typing import Any

from pipeline.link._accounting import FramePeriod, count_step
from pipeline.packets._timecodes import cds_pfield_layout, cuc_pfield_layout, decode_time_code
from pipeline.profile import LinkProfile, TimeCodeConfig
from pipeline.timescales import leap_seconds, tai_from_calendar

__all__ = ["Packet", "PacketExtractor", "PacketStats", "SequenceGap", "IDLE_APID", "DROP_REASONS"]

#: APID of idle space packets.
IDLE_APID = 0x7FF
_FHP_NO_HEADER = 0x7FF
_SEQ_MODULUS = 1 << 14
_MAX_SPACE_PACKET = 65542
_IDLE_OCTET = 0xE0
_MAX_GAP_EVENTS = 1000
# Packet times after 9999-12-31 UTC are counted as time-code errors.
_TIME_MAX_NS = 2_932_897 * 86_400 * 1_000_000_000  # days from 1970-01-01 to 10000-01-01

#: Reasons a (partial) packet is discarded.
DROP_REASONS = ("frame_gap", "fhp_mismatch", "bad_version", "bad_length", "too_long", "incomplete_at_end")

# _packet_length results below zero
_NEED_MORE = 0
_BAD_VERSION = -1
_BAD_LENGTH = -2
_TOO_LONG = -3
_REASON = {_BAD_VERSION: "bad_version", _BAD_LENGTH: "bad_length", _TOO_LONG: "too_long"}


@dataclass(frozen=True, slots=True)
class Packet:
    """One reassembled packet with the provenance of the frame holding its first octet.

    Attributes
    ----------
    apid, seq_count, seq_flags : int or None
        Space packet fields; None for encapsulation packets.
    data : bytes
        The whole packet, primary header included.
    scid, vcid : int
    mcfc : int or None
        Master channel frame count of the first frame (None for AOS).
    vcfc : int
        Virtual channel frame count of the first frame.
    position : float
        Sample position of the first frame's ASM (its ERT is the packet's ERT).
    rs_corrected : tuple of int
        RS symbols corrected per codeword in that frame.
    time_ns : int or None
        UTC ns since 1970 (POSIX count) from the secondary-header time code, when the APID has one
        configured and it decoded to a date in 1972..9999; None otherwise.
    time_tai_ns : int or None
        The time code as TAI ns since 1958 (exact also inside a leap second; kept also before 1972,
        where UTC has no meaning); None when the code could not be decoded or lies beyond 9999
        (counted in ``stats.time_code_errors``).
    kind : {"space", "encapsulation"}
    packet_type : int or None
        Space packet type bit (0 telemetry, 1 telecommand).
    sec_header_flag : bool or None
    protocol_id : int or None
        Encapsulation protocol id.
    frames : int
        Number of transfer frames the packet spans.
    """

    apid: int | None
    seq_count: int | None
    seq_flags: int | None
    data: bytes
    scid: int
    vcid: int
    mcfc: int | None
    vcfc: int
    position: float
    rs_corrected: tuple[int, ...]
    time_ns: int | None = None
    time_tai_ns: int | None = None
    kind: str = "space"
    packet_type: int | None = None
    sec_header_flag: bool | None = None
    protocol_id: int | None = None
    frames: int = 1

    def as_dict(self) -> dict[str, Any]:
        """JSON-ready fields; the packet as ``hex``."""
        return {
            "kind": self.kind,
            "apid": self.apid,
            "seq_count": self.seq_count,
            "seq_flags": self.seq_flags,
            "packet_type": self.packet_type,
            "sec_header_flag": self.sec_header_flag,
            "protocol_id": self.protocol_id,
            "length": len(self.data),
            "scid": self.scid,
            "vcid": self.vcid,
            "mcfc": self.mcfc,
            "vcfc": self.vcfc,
            "frames": self.frames,
            "position": float(self.position),
            "rs_corrected": list(self.rs_corrected),
            "time_ns": self.time_ns,
            "hex": self.data.hex(),
        }


@dataclass(frozen=True)
class SequenceGap:
    """A jump of an APID's 14-bit sequence count: ``missing`` packets between two received."""

    apid: int
    vcid: int
    expected: int
    got: int
    missing: int
    position: float

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass
class _ApidStats:
    packets: int = 0
    octets: int = 0
    sequence_gaps: int = 0
    missing: int = 0
    out_of_order: int = 0
    last_seq: int | None = None
    vcids: set = field(default_factory=set)
    time_codes: int = 0


@dataclass
class PacketStats:
    """Counters of a :class:`PacketExtractor` run; :meth:`as_dict` for the report."""

    packets: int = 0
    space_packets: int = 0
    encapsulation_packets: int = 0
    idle_packets: int = 0
    encapsulation_idle: int = 0
    dropped: dict = field(default_factory=lambda: {r: 0 for r in DROP_REASONS})
    frames: dict = field(default_factory=lambda: {
        "used": 0, "unusable": 0, "foreign": 0, "idle": 0, "no_packet_zone": 0, "duplicate": 0,
        "out_of_order": 0, "gap": 0})
    skipped_octets: int = 0
    sequence_gaps: int = 0
    sequence_missing: int = 0
    sequence_out_of_order: int = 0
    time_codes: int = 0
    time_code_errors: int = 0
    apids: dict = field(default_factory=dict)
    gap_events: list = field(default_factory=list)
    gap_events_dropped: int = 0

    def as_dict(self) -> dict[str, Any]:
        return {
            "packets": self.packets,
            "space_packets": self.space_packets,
            "encapsulation_packets": self.encapsulation_packets,
            "idle_packets": self.idle_packets,
            "encapsulation_idle": self.encapsulation_idle,
            "dropped": dict(self.dropped),
            "dropped_total": sum(self.dropped.values()),
            "frames": dict(self.frames),
            "skipped_octets": self.skipped_octets,
            "sequence_gaps": self.sequence_gaps,
            "sequence_missing": self.sequence_missing,
            "sequence_out_of_order": self.sequence_out_of_order,
            "time_codes": self.time_codes,
            "time_code_errors": self.time_code_errors,
            "sequence_gap_events": [g.as_dict() for g in self.gap_events],
            "sequence_gap_events_not_listed": self.gap_events_dropped,
            "apids": [
                {"apid": apid, "vcids": sorted(a.vcids), "packets": a.packets, "octets": a.octets,
                 "sequence_gaps": a.sequence_gaps, "missing": a.missing, "out_of_order": a.out_of_order,
                 "time_codes": a.time_codes}
                for apid, a in sorted(self.apids.items())
            ],
        }


@dataclass
class _VcState:
    """Reassembly state of one virtual channel."""

    last_count: int | None = None
    last_position: float | None = None
    modulus: int = 0
    synced: bool = False
    partial: bytearray = field(default_factory=bytearray)
    need: int = _NEED_MORE  # whole length of the partial packet once its header is complete
    origin: tuple = ()
    frames: int = 0  # frames the partial spans so far


def _checked_time_code(tc: TimeCodeConfig) -> TimeCodeConfig:
    """Validate one ``[[packets.time_code]]`` entry once; an integral float P-field becomes an int.

    (The TOML loader reads ``pfield = 0x1E`` into a field whose default is None as a float.)
    """
    where = f"Argument 'profile' [[packets.time_code]] apid {tc.apid}"
    pfield = tc.pfield
    if pfield is not None:
        if isinstance(pfield, float) and pfield.is_integer():
            pfield = int(pfield)
        if isinstance(pfield, bool) or not isinstance(pfield, int):
            raise ValueError(f"{where}: pfield must be an integer P-field or absent, not {tc.pfield!r}.")
        try:
            if tc.code == "cuc":
                octets = pfield.to_bytes(2 if pfield > 0xFF else 1, "big") if 0 <= pfield <= 0xFFFF else b""
                if not octets:
                    raise ValueError(f"0x{pfield:x} is not one or two octets")
                if cuc_pfield_layout(octets)[3] != len(octets):
                    raise ValueError(f"0x{pfield:x}: the extension flag disagrees with its length")
            else:
                if not 0 <= pfield <= 0xFF:
                    raise ValueError(f"0x{pfield:x} is not one octet")
                cds_pfield_layout(pfield)
        except ValueError as exc:
            raise ValueError(f"{where}: pfield is not a valid {tc.code.upper()} P-field ({exc}).") from None
    if isinstance(tc.offset, bool) or not isinstance(tc.offset, int) or not 0 <= tc.offset <= 65535:
        raise ValueError(f"{where}: offset must be 0..65535 octets, not {tc.offset!r}.")
    try:
        tai_from_calendar(tc.epoch)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{where}: {exc}") from None
    return replace(tc, pfield=pfield)


def _packet_length(head: bytes, encapsulation: bool, max_octets: int) -> int:
    """Whole length of the packet starting at ``head[0]``; _NEED_MORE or a negative code."""
    pvn = head[0] >> 5
    if pvn == 0:
        if len(head) < 6:
            return _NEED_MORE
        length = 7 + ((head[4] << 8) | head[5])
        return _TOO_LONG if length > max_octets else length
    if pvn != 7 or not encapsulation:
        return _BAD_VERSION
    lol = head[0] & 0x3
    if lol == 0:
        # A one-octet packet; 133.1-B allows it only as the idle packet (protocol id 000).
        return 1 if head[0] == _IDLE_OCTET else _BAD_LENGTH
    hlen = (2, 4, 8)[lol - 1]
    if len(head) < hlen:
        return _NEED_MORE
    if lol == 1:
        length = head[1]
    elif lol == 2:
        length = (head[2] << 8) | head[3]
    else:
        length = int.from_bytes(head[4:8], "big")
    if length < hlen:
        return _BAD_LENGTH
    return _TOO_LONG if length > max_octets else length


class PacketExtractor:
    """Reassemble packets per virtual channel from :class:`~pipeline.link.FrameRecord` objects.

    Parameters
    ----------
    profile : LinkProfile
        Uses ``frames.spacecraft_id``, ``packets.encapsulation`` and ``packets.time_codes``.
    max_packet_octets : int
        Longest packet accepted (default 65542, the largest space packet); a header announcing
        more is dropped as ``too_long`` and the channel re-synchronises at the next first header
        pointer.  Also caps the reassembly buffer, so memory stays bounded.

    Notes
    -----
    The extractor tracks each virtual channel's frame count itself (see
    :func:`pipeline.link.count_step`), so it needs no help from :class:`ChannelAccounting`:

    * frame positions give a running frame period (:class:`pipeline.link.FramePeriod`), so a
      jump after an outage longer than half the count range is still seen as a gap;
    * a frame with the next count continues the packet in progress;
    * a duplicate or a frame from the past is ignored (counted), so no packet is made twice;
    * a jump, the first frame of a channel, or ``gap=True`` from the caller discards the
      packet in progress (``dropped["frame_gap"]``) and extraction resumes at the first header
      pointer of the next frame that has one: a packet is never stitched across a gap;
    * frames whose status is not ``ok`` are never used; idle frames advance the count only.

    Consistency checks guard against data that was never sent: a packet in progress must end
    exactly where the next frame's first header pointer says the next header starts
    (``fhp_mismatch`` otherwise), it must not end inside a frame whose pointer says no header
    starts there, and a header with a version other than 000 (or 111 with encapsulation) or an
    impossible length throws away the rest of that frame (``bad_version``, ``bad_length``,
    ``too_long``).  After each such drop the channel waits for the next first header pointer.

    Idle space packets (APID 0x7FF) and idle encapsulation packets (protocol id 000, e.g. the
    octet ``E0``) are counted and dropped.  Sequence counts are checked per APID modulo 2**14.

    Cost: O(octets) per frame (slicing), plus O(1) per packet.  State per VC: at most one
    partial packet (<= ``max_packet_octets``).

    References
    ----------
    CCSDS 133.0-B sec. 4.1 (space packet), CCSDS 133.1-B sec. 4.1 (encapsulation packet),
    CCSDS 132.0-B sec. 4.1.2.7 / 732.0-B sec. 4.1.4.2 (first header pointer).
    """

    def __init__(self, *, profile: LinkProfile, max_packet_octets: int = _MAX_SPACE_PACKET) -> None:
        if not isinstance(profile, LinkProfile):
            raise TypeError(f"Argument 'profile' must be a LinkProfile, not {type(profile).__name__}.")
        if isinstance(max_packet_octets, bool) or not isinstance(max_packet_octets, int) \
                or not 7 <= max_packet_octets <= (1 << 32) - 1:
            raise ValueError(f"Argument 'max_packet_octets' must be 7..4294967295, not {max_packet_octets!r}.")
        self.profile = profile
        self.spacecraft_id = profile.frames.spacecraft_id
        self.encapsulation = bool(profile.packets.encapsulation)
        self.max_packet_octets = max_packet_octets
        self.time_codes = {tc.apid: _checked_time_code(tc) for tc in profile.packets.time_codes}
        self._leap = leap_seconds() if self.time_codes else None
        self.reset()

    def reset(self) -> None:
        """Forget every partial packet, frame count and counter."""
        self.channels: dict[int, _VcState] = {}
        self.stats = PacketStats()
        self._pending_gaps: list[SequenceGap] = []
        self.period = FramePeriod()

    def take_sequence_gaps(self) -> list[SequenceGap]:
        """The sequence-count gaps found since the last call (and forget them)."""
        out, self._pending_gaps = self._pending_gaps, []
        return out

    def flush(self) -> list[Packet]:
        """End of input: packets still in progress are incomplete and dropped (counted)."""
        for st in self.channels.values():
            if st.partial:
                self.stats.dropped["incomplete_at_end"] += 1
            st.partial, st.need, st.synced = bytearray(), _NEED_MORE, False
        return []

    # ---- frames -----------------------------------------------------------------------------
    def process_many(self, records) -> list[Packet]:
        """Packets completed by a batch of frame records (the same as calling :meth:`process` on each)."""
        out: list[Packet] = []
        for record in records:
            out += self.process(record)
        return out

    def process(self, record, gap: bool = False) -> list[Packet]:
        """Packets completed by one frame record, in order.

        Parameters
        ----------
        record : FrameRecord
        gap : bool
            The caller knows frames of this virtual channel were lost just before ``record``
            (the extractor also detects it from the counts).
        """
        S = self.stats
        self.period.update(float(record.position))
        if record.status == "foreign_scid":
            S.frames["foreign"] += 1
            return []
        if record.status not in ("ok", "idle"):
            S.frames["unusable"] += 1
            return []
        if record.scid != self.spacecraft_id:
            S.frames["foreign"] += 1
            return []
        if record.vcid is None or record.vcfc is None:
            S.frames["unusable"] += 1
            return []
        st = self.channels.get(record.vcid)
        if st is None:
            st = self.channels[record.vcid] = _VcState()
        count, modulus = int(record.vcfc), int(record.vcfc_modulus)
        if st.last_count is None or st.modulus != modulus:
            jump = True
        else:
            step, _ = count_step(st.last_count, count, modulus,
                                 self.period.frames_between(st.last_position, float(record.position)))
            if step == "duplicate":
                S.frames["duplicate"] += 1
                return []
            if step == "behind":
                S.frames["out_of_order"] += 1
                return []
            jump = step == "gap"
            if jump:
                S.frames["gap"] += 1
        st.last_count, st.modulus, st.last_position = count, modulus, float(record.position)
        if jump or gap:
            self._lose_sync(st, "frame_gap")
        if record.status == "idle":
            S.frames["idle"] += 1
            return []
        zone = record.packet_zone
        if zone is None or record.fhp is None:
            S.frames["no_packet_zone"] += 1
            return []
        S.frames["used"] += 1
        origin = (int(record.scid), int(record.vcid), record.mcfc, count, float(record.position),
                  tuple(record.rs_corrected))
        out: list[Packet] = []
        fhp = int(record.fhp)
        if st.synced:
            self._continue(st, zone, fhp, origin, out)
        elif fhp == _FHP_NO_HEADER:
            S.skipped_octets += len(zone)
        else:
            S.skipped_octets += fhp
            st.synced = True
            self._walk(st, zone, fhp, origin, out)
        return out

    def _lose_sync(self, st: _VcState, reason: str) -> None:
        if st.partial:
            self.stats.dropped[reason] += 1
        st.partial, st.need, st.synced, st.frames = bytearray(), _NEED_MORE, False, 0

    def _continue(self, st: _VcState, zone: bytes, fhp: int, origin: tuple, out: list[Packet]) -> None:
        """A frame in sequence on a synchronised channel."""
        if fhp == _FHP_NO_HEADER:
            if not st.partial:
                # Nothing in progress, yet no header starts here: this data belongs to a packet we
                # never saw the start of.
                self.stats.skipped_octets += len(zone)
                self._lose_sync(st, "fhp_mismatch")
                return
            st.partial += zone
            st.frames += 1
            length = self._partial_length(st)
            if length < 0:
                return
            if length and len(st.partial) >= length:
                if len(st.partial) == length:
                    self._emit(bytes(st.partial), st.origin, st.frames, out)
                    st.partial, st.need, st.frames = bytearray(), _NEED_MORE, 0
                else:  # the packet ends inside a frame whose pointer says no header starts there
                    self._lose_sync(st, "fhp_mismatch")
            return
        if st.partial:
            if fhp:
                st.partial += zone[:fhp]
                st.frames += 1
            length = self._partial_length(st)
            if length >= 0:
                if length and len(st.partial) == length:
                    self._emit(bytes(st.partial), st.origin, st.frames, out)
                    st.partial, st.need, st.frames = bytearray(), _NEED_MORE, 0
                else:
                    self._lose_sync(st, "fhp_mismatch")
        elif fhp:
            self.stats.skipped_octets += fhp  # octets of a packet whose start we never had
        st.partial, st.need, st.synced, st.frames = bytearray(), _NEED_MORE, True, 0
        self._walk(st, zone, fhp, origin, out)

    def _partial_length(self, st: _VcState) -> int:
        """Whole length of the packet in progress (0 while its header is incomplete).

        A negative result means the header is impossible: the partial has been dropped.
        """
        if st.need:
            return st.need
        length = _packet_length(bytes(st.partial[:8]), self.encapsulation, self.max_packet_octets)
        if length < 0:
            self._lose_sync(st, _REASON[length])
            return length
        st.need = length
        return length

    def _walk(self, st: _VcState, zone: bytes, pos: int, origin: tuple, out: list[Packet]) -> None:
        """Cut packets from ``zone`` starting with a header at ``pos``; keep the unfinished tail."""
        n = len(zone)
        while pos < n:
            if self.encapsulation and zone[pos] == _IDLE_OCTET:
                run = (n - pos) - len(zone[pos:].lstrip(b"\xe0"))
                self.stats.encapsulation_idle += run
                pos += run
                continue
            length = _packet_length(zone[pos:pos + 8], self.encapsulation, self.max_packet_octets)
            if length < 0:
                self.stats.dropped[_REASON[length]] += 1
                self.stats.skipped_octets += n - pos
                st.partial, st.need, st.synced, st.frames = bytearray(), _NEED_MORE, False, 0
                return
            if length and pos + length <= n:
                self._emit(zone[pos:pos + length], origin, 1, out)
                pos += length
                continue
            st.partial, st.need, st.origin, st.frames = bytearray(zone[pos:]), length, origin, 1
            return
        st.partial, st.need, st.frames = bytearray(), _NEED_MORE, 0

    # ---- packets ----------------------------------------------------------------------------
    def _emit(self, pkt: bytes, origin: tuple, frames: int, out: list[Packet]) -> None:
        S = self.stats
        scid, vcid, mcfc, vcfc, position, rs = origin
        if pkt[0] >> 5 == 7:
            pid = (pkt[0] >> 2) & 0x7
            if pid == 0:
                S.encapsulation_idle += 1
                return
            S.packets += 1
            S.encapsulation_packets += 1
            out.append(Packet(apid=None, seq_count=None, seq_flags=None, data=pkt, scid=scid, vcid=vcid, mcfc=mcfc,
                              vcfc=vcfc, position=position, rs_corrected=rs, kind="encapsulation", protocol_id=pid,
                              frames=frames))
            return
        apid = ((pkt[0] & 0x07) << 8) | pkt[1]
        if apid == IDLE_APID:
            S.idle_packets += 1
            return
        seq_flags = pkt[2] >> 6
        seq = ((pkt[2] & 0x3F) << 8) | pkt[3]
        sec_flag = bool(pkt[0] & 0x08)
        a = S.apids.get(apid)
        if a is None:
            a = S.apids[apid] = _ApidStats()
        a.packets += 1
        a.octets += len(pkt)
        a.vcids.add(vcid)
        if a.last_seq is None:
            a.last_seq = seq
        else:
            step, missing = count_step(a.last_seq, seq, _SEQ_MODULUS)
            if step in ("duplicate", "behind"):
                a.out_of_order += 1
                S.sequence_out_of_order += 1
            else:
                if step == "gap":
                    a.sequence_gaps += 1
                    a.missing += missing
                    S.sequence_gaps += 1
                    S.sequence_missing += missing
                    g = SequenceGap(apid=apid, vcid=vcid, expected=(a.last_seq + 1) % _SEQ_MODULUS, got=seq,
                                    missing=missing, position=position)
                    self._pending_gaps.append(g)
                    if len(self._pending_gaps) > 10 * _MAX_GAP_EVENTS:
                        del self._pending_gaps[: _MAX_GAP_EVENTS]
                    if len(S.gap_events) < _MAX_GAP_EVENTS:
                        S.gap_events.append(g)
                    else:
                        S.gap_events_dropped += 1
                a.last_seq = seq
        time_ns = time_tai = None
        tc = self.time_codes.get(apid)
        if tc is not None:
            time_tai = self._time_code(pkt, sec_flag, tc)
            if time_tai is not None:
                try:
                    time_ns = self._leap.tai_to_utc(time_tai)
                except ValueError:
                    # before 1972 (e.g. an onboard clock counting from its level-1 epoch): no UTC, the
                    # TAI count stays (decode --clock turns such onboard time into UTC)
                    time_ns = None
                if time_ns is not None and time_ns >= _TIME_MAX_NS:
                    # e.g. a 24-bit CDS day count far in the future: not a time anyone can print
                    time_ns = time_tai = None
            if time_tai is not None:
                a.time_codes += 1
                S.time_codes += 1
            else:
                S.time_code_errors += 1
        S.packets += 1
        S.space_packets += 1
        out.append(Packet(apid=apid, seq_count=seq, seq_flags=seq_flags, data=pkt, scid=scid, vcid=vcid, mcfc=mcfc,
                          vcfc=vcfc, position=position, rs_corrected=rs, time_ns=time_ns, time_tai_ns=time_tai,
                          kind="space", packet_type=(pkt[0] >> 4) & 1, sec_header_flag=sec_flag, frames=frames))

    def _time_code(self, pkt: bytes, sec_flag: bool, tc) -> int | None:
        if not sec_flag:
            return None
        try:
            tai, _ = decode_time_code(pkt[6 + tc.offset:], code=tc.code, pfield=tc.pfield, epoch=tc.epoch,
                                      table=self._leap)
        except ValueError:
            return None
        return tai
